"""The standard chain from a source of fixes to gridded velocities, with its options in one place."""

from __future__ import annotations

from dataclasses import asdict, dataclass

import pandas as pd

from .io import read_fixes
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


def load_velocities(source, options: PrepOptions | None = None) -> tuple[pd.DataFrame, QCReport, pd.DataFrame]:
    """Read, quality-control, grid and difference a source of fixes.

    Returns ``(velocities, qc_report, clean_fixes)``; see :func:`~driftspec.analysis.resample.regular_grid`
    and :func:`~driftspec.analysis.velocity.add_velocity` for the columns.
    """
    o = options or PrepOptions()
    raw = read_fixes(source)
    name = source if isinstance(source, str) else getattr(source, "name", type(source).__name__)
    fixes, report = clean_fixes(raw, max_speed=o.max_speed, source=str(name))
    grid = regular_grid(fixes, step=pd.Timedelta(o.step), split_gap=pd.Timedelta(o.split_gap),
                        mask_distance=pd.Timedelta(o.mask_distance))
    vel = add_velocity(grid, method=o.velocity_method)
    return vel, report, fixes
