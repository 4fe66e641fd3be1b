"""Reading position fixes through the registry of readers: :func:`read_fixes` and :class:`FixReader`.

The standard form the readers return is described in :mod:`driftspec.analysis.io.columns`; the readers
themselves are in :mod:`~driftspec.analysis.io.tabular` (CSV, Parquet), :mod:`~driftspec.analysis.io.netcdf`
(CF trajectory netCDF, xarray Datasets) and :mod:`~driftspec.analysis.io.frames` (DataFrames), and
:mod:`~driftspec.analysis.io.registry` chooses among them.
"""

from __future__ import annotations

import pandas as pd

from .columns import COLUMN_ALIASES
from .registry import find_backend
from .writers import fixes_to_cf_dataset, write_fixes

__all__ = ["read_fixes", "FixReader", "write_fixes", "fixes_to_cf_dataset", "COLUMN_ALIASES"]


def read_fixes(source, engine: str | None = None) -> pd.DataFrame:
    """Read position fixes from a file, DataFrame or Dataset into the standard representation.

    Parameters
    ----------
    source : str, os.PathLike, pandas.DataFrame or xarray.Dataset
        CSV (``.csv``, ``.txt``, compressed ``.csv.gz`` ...), Parquet (``.parquet``, ``.pq``) or CF netCDF
        (``.nc``) trajectory data, or an in-memory table or dataset with the same content; or anything a
        reader added with :func:`~driftspec.analysis.io.register_backend` claims.
    engine : str, optional
        The name of the reader to use (``"csv"``, ``"parquet"``, ``"netcdf"``, ``"dataframe"``,
        ``"dataset"`` or a registered one), overriding the guess from the file's ending, content or type.

    Returns
    -------
    pandas.DataFrame
        One row per input row (nothing dropped), columns as described in
        :mod:`driftspec.analysis.io.columns` plus the private flags ``time_unparseable`` and
        ``value_unparseable`` used by quality control.

    Raises
    ------
    InputError
        If the file does not exist or cannot be read, no reader claims it, ``engine`` is unknown, or
        required columns are missing.
    """
    return find_backend(source, engine).read(source)


class FixReader:
    """Fixes from a source, whole or a few hundred thousand rows at a time, each chunk holding whole tracks.

    The source is streamed when its reader can stream it (:meth:`FixBackend.open_chunks`; today a Parquet
    file whose tracks are contiguous, each track's rows together, as ``driftspec qc`` and ``driftspec demo``
    write them), in chunks of about ``rows_per_chunk`` rows, so that memory stays bounded however large the
    input; any other source is read whole. Either way every chunk is in the form :func:`read_fixes` returns,
    ``row`` numbering the source rows, and the chunks together hold every input row exactly once.

    Parameters
    ----------
    source : str, os.PathLike, pandas.DataFrame or xarray.Dataset
        As for :func:`read_fixes`.
    rows_per_chunk : int
        Rows read at a time when streaming (a chunk may be longer, to end at a track boundary).
    engine : str, optional
        As for :func:`read_fixes`.

    >>> reader = FixReader("demo_data/fixes.parquet")        # doctest: +SKIP
    >>> for chunk in reader: ...                             # doctest: +SKIP
    """

    def __init__(self, source, rows_per_chunk: int = 1_000_000, engine: str | None = None):
        self.source = source
        self.rows_per_chunk = int(rows_per_chunk)
        self.backend = find_backend(source, engine)
        self._chunks = self.backend.open_chunks(source, self.rows_per_chunk)
        self.streaming = self._chunks is not None
        self._whole = None if self.streaming else self.backend.read(source)
        self._spans = self._chunks.spans if self.streaming else None

    def spans(self) -> pd.DataFrame:
        """First and last fix time of each track (``id``, ``first``, ``last``), for progress estimates."""
        if self._spans is None:
            span = self._whole.dropna(subset=["id", "time"]).groupby("id", observed=True)["time"].agg(
                first="min", last="max")
            self._spans = span.reset_index()
        return self._spans

    @property
    def empty(self) -> bool:
        """The source has no data rows (a header only)."""
        return len(self._whole) == 0 if not self.streaming else len(self.spans()) == 0

    def __iter__(self):
        if not self.streaming:
            yield self._whole
            return
        yield from self._chunks
