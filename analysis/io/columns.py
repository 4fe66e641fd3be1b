"""The standard form of position fixes, and the column handling every reader shares.

In-memory representation
------------------------
Every stage of driftspec passes position fixes as a :class:`pandas.DataFrame` with one row per fix:

============================  ===============================================================
column                        meaning
============================  ===============================================================
``id``                        track identifier (categorical of strings)
``time``                      fix time, ``datetime64[ns]``, UTC without a time-zone tag
``lat``                       latitude, degrees north, in [-90, 90]
``lon``                       longitude, degrees east, wrapped to [-180, 180)
``position_error_m``          optional, one-sigma position error per component, m
``u``, ``v``                  optional, measured eastward/northward velocity, m/s
``row``                       the fix's 0-based row in the source (for accounting)
============================  ===============================================================

plus the private flags ``time_unparseable`` and ``value_unparseable`` that quality control counts.
Readers return the fixes *as read*, with ``time``/``lat``/``lon`` parsed but nothing dropped: unparseable
values become NaN/NaT so that :func:`driftspec.analysis.tracks.qc.clean_fixes` can count them.

A reader only has to deliver a table whose column names are any of :data:`COLUMN_ALIASES` (case-insensitive)
and whose values are typed or text; :func:`standard_fixes` does the rest, the same way for every format.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError

__all__ = ["COLUMN_ALIASES", "REQUIRED", "OPTIONAL_NUMERIC", "column_map", "standardise_columns", "coerce",
           "standard_fixes", "unreadable", "source_label", "as_path"]

#: accepted column names (case-insensitive) for each standard column
COLUMN_ALIASES = {
    "id": ("id", "track", "track_id", "platform", "platform_id", "trajectory", "drifter", "float"),
    "time": ("time", "datetime", "timestamp", "date_time", "t"),
    "lat": ("lat", "latitude"),
    "lon": ("lon", "longitude", "long"),
    "position_error_m": ("position_error_m", "position_error", "err_m"),
    "u": ("u", "ve", "u_ms"),
    "v": ("v", "vn", "v_ms"),
}
REQUIRED = ("id", "time", "lat", "lon")
OPTIONAL_NUMERIC = ("position_error_m", "u", "v")


def source_label(source) -> str:
    """How messages name a source: its path, or its type (``DataFrame``, ``Dataset``) when in memory."""
    if isinstance(source, (str, os.PathLike)):
        return str(Path(os.fspath(source)))
    return type(source).__name__


def as_path(source, reader: str) -> Path:
    """``source`` as a :class:`~pathlib.Path`, or a one-line error if it is not a file name."""
    if not isinstance(source, (str, os.PathLike)):
        raise InputError(f"{source_label(source)}: the {reader} reader takes a file path, not an object in memory")
    return Path(os.fspath(source))


#: columns every fits table has (``driftspec fit``, ``window_rows``): how a fits table given as fixes is recognised
FITS_TABLE_COLUMNS = ("track_id", "window_start", "status")


def column_map(columns, where: str) -> dict:
    """``{source column: standard column}`` for the columns driftspec reads (first alias found wins)."""
    lower = {str(c).strip().lower(): c for c in columns}
    rename = {}
    for std, aliases in COLUMN_ALIASES.items():
        for a in aliases:
            if a in lower:
                rename[lower[a]] = std
                break
    missing = [c for c in REQUIRED if c not in rename.values()]
    if missing and set(FITS_TABLE_COLUMNS) <= set(lower):
        raise InputError(f"{where}: this is a fits table (one row per window, as `driftspec fit` writes), not fixes; "
                         "give the file of position fixes (columns id, time, lat, lon)")
    if missing:
        raise InputError(
            f"{where}: missing column(s) {', '.join(missing)}; found {', '.join(map(str, columns))}"
        )
    return rename


def standardise_columns(df: pd.DataFrame, where: str) -> pd.DataFrame:
    """The standard columns of ``df``, renamed from their aliases, in the standard order."""
    rename = column_map(df.columns, where)
    return df.rename(columns=rename)[[c for c in COLUMN_ALIASES if c in rename.values()]]


def _parse_times(values) -> pd.Series:
    s = pd.Series(values)
    if pd.api.types.is_datetime64_any_dtype(s.dtype):
        t = pd.to_datetime(s, utc=False)
        if getattr(t.dt, "tz", None) is not None:
            t = t.dt.tz_convert("UTC").dt.tz_localize(None)
        return t.astype("datetime64[ns]")
    t = pd.to_datetime(s, errors="coerce", utc=True, format="mixed").dt.tz_localize(None)
    # times outside the nanosecond range (years before 1677 or after 2262) cannot be real fixes
    inside = (t >= pd.Timestamp.min) & (t <= pd.Timestamp.max)
    return t.where(inside).astype("datetime64[ns]")


def _is_text(series: pd.Series) -> bool:
    return series.dtype == object or pd.api.types.is_string_dtype(series.dtype)


def _blank(series: pd.Series) -> np.ndarray:
    """Missing, or an empty/blank string."""
    missing = series.isna().to_numpy().copy()
    if _is_text(series):
        missing |= (series.astype("string").str.strip() == "").fillna(True).to_numpy()
    return missing


def _track_ids(ids: pd.Series) -> pd.Categorical:
    """Track ids as a categorical with sorted, stripped names (one string per track, not per fix); empty
    or missing ids are NaN."""
    if isinstance(ids.dtype, pd.CategoricalDtype):
        names = pd.Index(ids.cat.categories.astype(str)).str.strip()
        if names.is_unique:
            cat = ids.cat.rename_categories(names)
            cat = cat.cat.remove_categories([n for n in names if n == ""]) if (names == "").any() else cat
            return pd.Categorical(cat).reorder_categories(sorted(cat.cat.categories))
        ids = ids.astype(object)
    missing = _blank(ids)
    text = ids.astype("string").str.strip() if _is_text(ids) else ids.astype("string")
    return pd.Categorical(text.where(~missing).to_numpy(dtype=object, na_value=None))


def coerce(df: pd.DataFrame, first_row: int = 0) -> pd.DataFrame:
    """Parse standard-named columns; keep every row; record which raw values were present but unparseable.

    Typed columns (as Parquet and netCDF deliver them) skip the string handling that CSV needs.
    ``first_row`` is the source row of ``df``'s first row (for chunks of a larger input).
    """
    out = pd.DataFrame(index=np.arange(len(df)))
    out["id"] = _track_ids(df["id"])
    raw_time = df["time"]
    time_missing = _blank(raw_time)
    out["time"] = _parse_times(raw_time.to_numpy())
    out["time_unparseable"] = (~time_missing) & out["time"].isna().to_numpy()
    bad_value = np.zeros(len(df), dtype=bool)
    for col in ("lat", "lon", *OPTIONAL_NUMERIC):
        if col not in df:
            continue
        raw = df[col]
        if pd.api.types.is_numeric_dtype(raw.dtype) and not pd.api.types.is_bool_dtype(raw.dtype):
            out[col] = raw.to_numpy(dtype=float, na_value=np.nan)
            continue
        num = pd.to_numeric(raw, errors="coerce").astype(float)
        if col in ("lat", "lon"):
            bad_value |= (~_blank(raw)) & num.isna().to_numpy()
        out[col] = num.to_numpy()
    out["value_unparseable"] = bad_value
    out["row"] = np.arange(first_row, first_row + len(df), dtype=np.int64)
    return out


def standard_fixes(table: pd.DataFrame, where: str, first_row: int = 0) -> pd.DataFrame:
    """A table as a reader delivered it (aliased column names, typed or text values) in the standard form."""
    return coerce(standardise_columns(table, where), first_row)


def unreadable(where, exc) -> InputError:
    """The one-line error for a file that cannot be read or decoded."""
    lines = str(exc).strip().splitlines() or [type(exc).__name__]
    return InputError(f"{where}: cannot read ({lines[0]})")
