"""driftspec.app: the command line and the Panel dashboard (imports driftspec.analysis)."""
