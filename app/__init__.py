"""driftspec.app: the command line and the Panel dashboard (imports driftspec.analysis).

``explore(source)`` builds the dashboard for a path, DataFrame or Dataset; see
:func:`driftspec.app.dashboard.explore`.
"""


def explore(source, fits=None, title="driftspec", **state):
    from .dashboard import explore as _explore

    return _explore(source, fits=fits, title=title, **state)


__all__ = ["explore"]
