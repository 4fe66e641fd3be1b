"""Velocities from gridded positions by finite differences on the sphere.

Operators (``method``):

``central``   ``(x[t+1] - x[t-1]) / (2 dt)`` at each sample: the displacement between the neighbouring
              samples, expressed in the local east/north frame of the sample itself. It is the mean of
              the true velocity over ``[t - dt, t + dt]``; its power response is ``sinc^2(2 f dt)``, which
              vanishes at the Nyquist frequency.
``forward``   ``(x[t+1] - x[t]) / dt``, reported at the midpoint time ``t + dt/2`` in the frame of the
              arc's midpoint; power response ``sinc^2(f dt)``.

A velocity is valid only where every position it uses is valid and in the same segment.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..runs import track_codes
from .geodesy import PointFrames, displacement_east_north_m

VELOCITY_METHODS = ("central", "forward")


def add_velocity(grid: pd.DataFrame, method: str = "central") -> pd.DataFrame:
    """Add ``u``, ``v`` (m/s) and ``valid_velocity`` to a gridded table from :func:`regular_grid`.

    Parameters
    ----------
    grid : pandas.DataFrame
        Output of :func:`~driftspec.analysis.resample.regular_grid`.
    method : {"central", "forward"}
        Finite-difference operator (see the module docstring).

    Returns
    -------
    pandas.DataFrame
        A copy with ``u`` (east), ``v`` (north) in m/s, NaN where invalid, and the boolean
        ``valid_velocity``. For ``forward`` the ``time``, ``lat`` and ``lon`` columns move to midpoints.
    """
    if method not in VELOCITY_METHODS:
        raise ValueError(f"method must be one of {VELOCITY_METHODS}, got {method!r}")
    g = grid.copy()
    n = len(g)
    if n == 0:
        return g.assign(u=np.array([]), v=np.array([]), valid_velocity=np.array([], dtype=bool))
    ids = track_codes(g["id"])[0]
    seg = g["segment"].to_numpy()
    t_ns = g["time"].to_numpy().astype("datetime64[ns]").astype(np.int64)
    lat, lon = g["lat"].to_numpy(float), g["lon"].to_numpy(float)
    valid = g["valid"].to_numpy(bool)
    same_next = np.zeros(n, dtype=bool)
    same_next[:-1] = (ids[1:] == ids[:-1]) & (seg[1:] == seg[:-1])
    u = np.full(n, np.nan)
    v = np.full(n, np.nan)
    if method == "central":
        ok = np.zeros(n, dtype=bool)
        ok[1:-1] = same_next[:-2] & same_next[1:-1] & valid[:-2] & valid[2:] & valid[1:-1]
        i = np.flatnonzero(ok)
        dt = (t_ns[i + 1] - t_ns[i - 1]) / 1e9
        e, nn = PointFrames(lat, lon).displacement_east_north_m(i - 1, i + 1, i)
        u[i], v[i] = e / dt, nn / dt
    else:
        ok = same_next & valid & np.append(valid[1:], False)
        i = np.flatnonzero(ok)
        dt = (t_ns[i + 1] - t_ns[i]) / 1e9
        e, nn = displacement_east_north_m(lat[i], lon[i], lat[i + 1], lon[i + 1])
        u[i], v[i] = e / dt, nn / dt
        # report at midpoints; the last sample of each segment has no forward difference
        mid_t = t_ns.copy()
        mid_t[i] = t_ns[i] + (t_ns[i + 1] - t_ns[i]) // 2
        # the last sample of a segment moves by half the grid step (the step of the grid's own neighbours, not the
        # time between the first two rows, which may belong to two segments)
        within = np.diff(t_ns)[same_next[:-1]]
        step = int(np.median(within)) if within.size else 0
        mid_t[~same_next] = t_ns[~same_next] + step // 2
        g["time"] = mid_t.astype("datetime64[ns]")
        from .geodesy import unit_vectors

        p = unit_vectors(lat[i], lon[i]) + unit_vectors(lat[i + 1], lon[i + 1])
        p /= np.linalg.norm(p, axis=-1, keepdims=True)
        lat2, lon2 = lat.copy(), lon.copy()
        lat2[i] = np.rad2deg(np.arcsin(np.clip(p[:, 2], -1, 1)))
        lon2[i] = np.rad2deg(np.arctan2(p[:, 1], p[:, 0]))
        g["lat"], g["lon"] = lat2, lon2
    g["u"], g["v"] = u, v
    g["valid_velocity"] = ok
    return g
