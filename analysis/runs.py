"""Where one track (or segment) ends and the next begins, and longitudes that behave across the antimeridian.

The one home of these helpers: every stage that walks a table sorted by track asks :func:`run_bounds`, and
every stage that averages or wraps longitudes uses :func:`wrap_lon` and :func:`circular_mean_lon`. This module
depends on numpy and pandas only, so any stage (reading included) may use it.
"""

from __future__ import annotations

import numpy as np
import pandas as pd


def track_codes(ids) -> tuple[np.ndarray, np.ndarray]:
    """Integer codes (int64, -1 for a missing id) and names of a track-id column.

    Cheap for the categorical columns driftspec writes; other columns are factorised in order of appearance.
    """
    if isinstance(ids, pd.Series) and isinstance(ids.dtype, pd.CategoricalDtype):
        return ids.cat.codes.to_numpy().astype(np.int64), np.asarray(ids.cat.categories, dtype=object)
    codes, names = pd.factorize(np.asarray(ids), sort=False)
    return codes.astype(np.int64), np.asarray(names, dtype=object)


def run_bounds(*keys) -> tuple[np.ndarray, np.ndarray]:
    """Start and stop indices of the runs of equal consecutive values of one or more key arrays.

    ``run_bounds(codes)`` gives the rows of each track of a table sorted by track; ``run_bounds(codes, segment)``
    the rows of each segment. Empty input gives two empty arrays.

    Examples
    --------
    >>> run_bounds(np.array([0, 0, 1, 1, 1, 0]))
    (array([0, 2, 5]), array([2, 5, 6]))
    """
    keys = [np.asarray(k) for k in keys]
    n = keys[0].size
    if n == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    new = np.zeros(n, bool)
    new[0] = True
    for k in keys:
        new[1:] |= k[1:] != k[:-1]
    starts = np.flatnonzero(new)
    return starts, np.r_[starts[1:], n]


def wrap_lon(lon):
    """Longitude wrapped to [-180, 180)."""
    return (np.asarray(lon, dtype=float) + 180.0) % 360.0 - 180.0


def circular_mean_lon(lon_deg) -> float:
    """Mean longitude that is sane across the antimeridian, in [-180, 180)."""
    lam = np.deg2rad(np.asarray(lon_deg, dtype=float))
    return float(wrap_lon(np.rad2deg(np.arctan2(np.nanmean(np.sin(lam)), np.nanmean(np.cos(lam))))))

