"""Reader for fixes already in memory as a :class:`pandas.DataFrame` (columns named as in
:data:`~driftspec.analysis.io.columns.COLUMN_ALIASES`, case-insensitive)."""

from __future__ import annotations

import pandas as pd

from ..errors import InputError
from .backend import FixBackend
from .columns import source_label

__all__ = ["DataFrameBackend"]


class DataFrameBackend(FixBackend):
    """A :class:`pandas.DataFrame`, one row per fix; its index is ignored (``row`` counts from 0)."""

    name = "dataframe"
    description = "pandas.DataFrame, one row per fix"

    def guess_can_open(self, source) -> bool:
        return isinstance(source, pd.DataFrame)

    def read_table(self, source) -> pd.DataFrame:
        if not isinstance(source, pd.DataFrame):
            raise InputError(f"{source_label(source)}: the {self.name} reader takes a pandas.DataFrame")
        return source.reset_index(drop=True)
