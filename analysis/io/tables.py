"""Reading and writing result tables (fits, per-window products): Parquet with units, or CSV."""

from __future__ import annotations

import os
from pathlib import Path

import pandas as pd


def read_table(path) -> pd.DataFrame:
    path = Path(path)
    df = pd.read_csv(path) if path.suffix.lower() == ".csv" else pd.read_parquet(path)
    for col in ("window_start", "window_end"):
        if col in df:
            df[col] = naive_utc(df[col])
    return df


def naive_utc(values) -> pd.Series:
    """Times as timezone-naive UTC datetime64[ns] (how every driftspec table stores them)."""
    t = pd.to_datetime(values, utc=True)
    return t.dt.tz_localize(None).astype("datetime64[ns]")


def write_table(df: pd.DataFrame, path, units: dict | None = None, metadata: dict | None = None) -> Path:
    """Write a table atomically; Parquet columns carry ``units`` in their field metadata."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = Path(path)
    tmp = path.with_name(path.name + ".tmp")
    if path.suffix.lower() == ".csv":
        df.to_csv(tmp, index=False, date_format="%Y-%m-%dT%H:%M:%SZ")
    else:
        table = pa.Table.from_pandas(df, preserve_index=False)
        fields = []
        for f in table.schema:
            meta = {"units": units[f.name]} if units and f.name in units else None
            fields.append(f.with_metadata(meta) if meta else f)
        schema = pa.schema(fields, metadata={**(table.schema.metadata or {}),
                                             **{k.encode(): str(v).encode() for k, v in (metadata or {}).items()}})
        pq.write_table(table.cast(schema), tmp)
    os.replace(tmp, path)
    return path
