"""Stage 1, reading and writing: fixes from CSV, Parquet, CF trajectory netCDF, DataFrames and Datasets;
result tables with their units.

Modules
-------
``columns``    the standard form of fixes, column aliases and the parsing every reader shares
``backend``    :class:`FixBackend`, the base class of readers (and :class:`FixChunks` for streamed ones)
``tabular``    CSV and Parquet readers (Parquet streams track-contiguous files)
``netcdf``     CF trajectory netCDF files and in-memory xarray Datasets (all three array representations)
``frames``     in-memory pandas DataFrames
``registry``   :data:`BACKENDS`, :func:`register_backend`, :func:`find_backend`
``fixes``      :func:`read_fixes` and :class:`FixReader`, which read through the registry
``writers``    :func:`write_fixes`, :func:`fixes_to_cf_dataset`
``tables``     result tables (fits, per-window products)

Adding a reader
---------------
Subclass :class:`FixBackend`, give it a ``name`` (what ``engine=`` selects), a one-line ``description`` and
the file endings it claims in ``suffixes``, and implement ``read_table(source)`` returning the source's rows
as a DataFrame whose columns carry any of the names in :data:`~.columns.COLUMN_ALIASES` (values may be text;
time parsing, numeric coercion, track ids and row numbers are then done by :func:`~.columns.standard_fixes`,
the same way as for every other format). Override ``guess_can_open(source)`` to recognise sources by content
or type rather than ending, and ``open_chunks(source, rows_per_chunk)`` if the format can be streamed a few
whole tracks at a time. Then call ``register_backend(MyBackend())``: :func:`read_fixes` and
:class:`FixReader` find it by guessing (readers registered later are asked first) or by
``engine="<name>"``. Errors for bad input must be one-line :class:`~driftspec.analysis.errors.InputError`
messages that name the file.
"""

from .backend import FixBackend, FixChunks
from .fixes import FixReader, read_fixes
from .registry import BACKENDS, find_backend, register_backend
from .tables import read_table, write_table
from .writers import fixes_to_cf_dataset, write_fixes

__all__ = ["BACKENDS", "FixBackend", "FixChunks", "FixReader", "find_backend", "fixes_to_cf_dataset",
           "read_fixes", "read_table", "register_backend", "write_fixes", "write_table"]
