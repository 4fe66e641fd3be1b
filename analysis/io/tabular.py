"""Readers for tables on disk: CSV and Parquet (one row per fix, columns named as in
:data:`~driftspec.analysis.io.columns.COLUMN_ALIASES`)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..errors import InputError
from ..runs import run_bounds
from .backend import FixBackend, FixChunks
from .columns import COLUMN_ALIASES, as_path, column_map, standard_fixes, unreadable

__all__ = ["CsvBackend", "ParquetBackend"]

#: the first bytes of every Parquet file (Apache Parquet format specification, "File format")
PARQUET_MAGIC = b"PAR1"


def _starts_with(path, magic: bytes) -> bool:
    try:
        with open(path, "rb") as f:
            return f.read(len(magic)) == magic
    except OSError:
        return False


class CsvBackend(FixBackend):
    """Comma-separated text with a header row; ``#`` starts a comment; compressed files are read by their
    ending (``.gz``, ``.bz2``, ``.xz``, ``.zst``)."""

    name = "csv"
    description = "comma-separated values with a header row"
    suffixes = (".csv", ".txt", ".csv.gz", ".csv.bz2", ".csv.xz", ".csv.zst")

    def read_table(self, source) -> pd.DataFrame:
        path = as_path(source, self.name)
        try:
            return pd.read_csv(path, dtype=str, keep_default_na=False, na_values=[""], skipinitialspace=True,
                               comment="#", on_bad_lines="error")
        except pd.errors.ParserError as exc:
            raise InputError(f"{path}: malformed CSV ({str(exc).strip().splitlines()[-1]})") from exc
        except (OSError, ValueError) as exc:
            raise unreadable(path, exc) from exc


class ParquetBackend(FixBackend):
    """Apache Parquet. A file whose tracks are contiguous (each track's rows together, as ``driftspec qc``
    and ``driftspec demo`` write them) and whose times are timestamps can be streamed (:meth:`open_chunks`)."""

    name = "parquet"
    description = "Apache Parquet table"
    suffixes = (".parquet", ".pq")

    def guess_can_open(self, source) -> bool:
        if super().guess_can_open(source):
            return True
        try:
            return _starts_with(as_path(source, self.name), PARQUET_MAGIC)
        except InputError:
            return False

    def read_table(self, source) -> pd.DataFrame:
        import pyarrow as pa
        import pyarrow.parquet as pq

        path = as_path(source, self.name)
        try:
            # read the id column dictionary-encoded: a categorical, not one Python string per fix
            names = pq.read_schema(path).names
            id_col = next((c for c in names if c.strip().lower() in COLUMN_ALIASES["id"]), None)
            table = pq.read_table(path, read_dictionary=[id_col] if id_col else None)
            return table.to_pandas()
        except (OSError, ValueError, pa.ArrowException) as exc:
            raise unreadable(path, exc) from exc

    def open_chunks(self, source, rows_per_chunk: int) -> FixChunks | None:
        import pyarrow as pa
        import pyarrow.parquet as pq

        path = as_path(source, self.name)
        try:
            schema = pq.read_schema(path)
        except (OSError, ValueError, pa.ArrowException) as exc:
            raise unreadable(path, exc) from exc
        src = {std: col for col, std in column_map(schema.names, str(path)).items()}
        if not pa.types.is_timestamp(schema.field(src["time"]).type):
            return None  # times as text: parsed in one piece by read
        try:
            table = pq.read_table(path, columns=[src["id"], src["time"]], read_dictionary=[src["id"]])
        except (OSError, ValueError, pa.ArrowException) as exc:
            raise unreadable(path, exc) from exc
        ids = table.column(0).to_pandas()
        names = pd.Index(ids.cat.categories.astype(str)).str.strip() if isinstance(
            ids.dtype, pd.CategoricalDtype) else None
        if names is None or not names.is_unique:
            return None
        codes = ids.cat.codes.to_numpy()
        t = table.column(1).cast(pa.timestamp("ns")).to_numpy(zero_copy_only=False).view(np.int64)
        del table, ids
        has = codes >= 0
        c, t = codes[has], t[has]
        starts, _ = run_bounds(c)
        if starts.size != np.unique(c).size:
            return None  # a track's rows are split: read whole
        nat, never = np.iinfo(np.int64).min, np.iinfo(np.int64).max
        first = np.minimum.reduceat(np.where(t == nat, never, t), starts) if c.size else t
        last = np.maximum.reduceat(t, starts) if c.size else t
        ok = (first != never) & (last != nat)
        spans = pd.DataFrame({"id": names[c[starts]][ok], "first": first[ok].astype("datetime64[ns]"),
                              "last": last[ok].astype("datetime64[ns]")})
        cols = [src[k] for k in COLUMN_ALIASES if k in src]
        return FixChunks(spans, lambda: _contiguous_chunks(path, cols, src["id"], int(rows_per_chunk)))


def _reraise_as_input_error(batches, where):
    """Record batches, with a damaged file reported as bad input rather than a traceback."""
    import pyarrow as pa

    while True:
        try:
            batch = next(batches)
        except StopIteration:
            return
        except (OSError, ValueError, pa.ArrowException) as exc:
            raise unreadable(where, exc) from exc
        yield batch


def _contiguous_chunks(path, cols, id_col, rows_per_chunk):
    """Chunks of a track-contiguous Parquet file, each ending at a track boundary."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    where = str(path)
    try:
        pf = pq.ParquetFile(path, read_dictionary=[id_col])
        batches = pf.iter_batches(batch_size=rows_per_chunk, columns=cols)
    except (OSError, ValueError, pa.ArrowException) as exc:
        raise unreadable(where, exc) from exc
    carry, first_row = None, 0
    for batch in _reraise_as_input_error(batches, where):
        table = pa.Table.from_batches([batch])
        if carry is not None:
            table = pa.concat_tables([carry, table])
        codes = table.column(id_col).to_pandas().cat.codes.to_numpy()
        # hold back the last track (it may go on in the next batch), with any id-less rows after it
        real = np.flatnonzero(codes >= 0)
        cut = table.num_rows
        if real.size:
            last = codes[real[-1]]
            other = real[codes[real] != last]
            cut = int(other[-1]) + 1 if other.size else 0
        if cut == 0:
            carry = table
            continue
        carry = table.slice(cut) if cut < table.num_rows else None
        yield standard_fixes(table.slice(0, cut).to_pandas(), where, first_row)
        first_row += cut
    if carry is not None and carry.num_rows:
        yield standard_fixes(carry.to_pandas(), where, first_row)
