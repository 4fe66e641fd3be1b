"""Stage 2, track preparation: quality control, regular grid, velocities on the sphere, analysis windows."""
