"""The standard chain from a source of fixes to gridded velocities, with its options in one place."""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd

from ..io import read_fixes
from ..runs import run_bounds, track_codes
from .qc import DEFAULT_MAX_SPEED, QCReport, clean_fixes
from .resample import DEFAULT_MASK_DISTANCE, DEFAULT_SPLIT_GAP, DEFAULT_STEP, regular_grid
from .velocity import add_velocity


@dataclass
class PrepOptions:
    """Options of the chain from fixes to velocities (defaults are the documented ones)."""

    max_speed: float = DEFAULT_MAX_SPEED
    step: str = str(DEFAULT_STEP)
    split_gap: str = str(DEFAULT_SPLIT_GAP)
    mask_distance: str = str(DEFAULT_MASK_DISTANCE)
    velocity_method: str = "central"

    def to_dict(self) -> dict:
        return asdict(self)


def grid_velocities(fixes: pd.DataFrame, options: PrepOptions | None = None) -> pd.DataFrame:
    """Regular grid and velocities for cleaned fixes (the second half of :func:`load_velocities`)."""
    o = options or PrepOptions()
    mask = o.mask_distance if o.mask_distance == "auto" else pd.Timedelta(o.mask_distance)
    grid = regular_grid(fixes, step=pd.Timedelta(o.step), split_gap=pd.Timedelta(o.split_gap), mask_distance=mask)
    return add_velocity(grid, method=o.velocity_method)


def iter_velocity_batches(fixes: pd.DataFrame, options: PrepOptions | None = None, tracks_per_batch: int = 200):
    """Gridded velocities for groups of ``tracks_per_batch`` tracks at a time (fixes sorted by track), so that
    a whole data set never needs its full hourly grid in memory."""
    codes, _ = track_codes(fixes["id"])
    starts, _ = run_bounds(codes)
    bounds = np.r_[starts[::tracks_per_batch], len(codes)]
    for a, b in zip(bounds[:-1], bounds[1:]):
        yield grid_velocities(fixes.iloc[a:b], options)


def estimate_windows(spans: pd.DataFrame, window_days: float, overlap: float) -> int:
    """Upper estimate of the number of windows from each track's time span (columns ``first``, ``last``, as
    :meth:`~driftspec.analysis.io.FixReader.spans` gives them, or fixes with ``id``, ``time``), for progress."""
    if "time" in spans:
        spans = spans.dropna(subset=["id", "time"]).groupby("id", observed=True)["time"].agg(
            first="min", last="max")
    days = (spans["last"] - spans["first"]).dt.total_seconds().to_numpy() / 86400.0
    hop = window_days * (1 - overlap)
    return int(np.sum(np.maximum(0, np.floor((days - window_days) / hop) + 1)))


def load_velocities(source, options: PrepOptions | None = None) -> tuple[pd.DataFrame, QCReport, pd.DataFrame]:
    """Read, quality-control, grid and difference a source of fixes.

    Returns ``(velocities, qc_report, clean_fixes)``; see :func:`~driftspec.analysis.resample.regular_grid`
    and :func:`~driftspec.analysis.velocity.add_velocity` for the columns.
    """
    o = options or PrepOptions()
    raw = read_fixes(source)
    name = source if isinstance(source, str) else getattr(source, "name", type(source).__name__)
    fixes, report = clean_fixes(raw, max_speed=o.max_speed, source=str(name))
    return grid_velocities(fixes, o), report, fixes
