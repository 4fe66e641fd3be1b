"""Reading and writing position fixes.

In-memory representation
------------------------
Every stage of driftspec passes position fixes as a :class:`pandas.DataFrame` with one row per fix:

============================  ===============================================================
column                        meaning
============================  ===============================================================
``id``                        track identifier (string)
``time``                      fix time, ``datetime64[ns]``, UTC without a time-zone tag
``lat``                       latitude, degrees north, in [-90, 90]
``lon``                       longitude, degrees east, wrapped to [-180, 180)
``position_error_m``          optional, one-sigma position error per component, m
``u``, ``v``                  optional, measured eastward/northward velocity, m/s
``row``                       the fix's 0-based row in the source (for accounting)
============================  ===============================================================

:func:`read_fixes` returns the fixes *as read*, with ``time``/``lat``/``lon`` parsed but nothing dropped:
unparseable values become NaN/NaT so that :func:`driftspec.analysis.qc.clean_fixes` can count them.
Readers accept CSV, Parquet, CF discrete-sampling-geometry netCDF (featureType ``trajectory``, as
contiguous ragged, indexed ragged or multidimensional arrays), a DataFrame or an xarray Dataset.

References
----------
NetCDF Climate and Forecast (CF) Metadata Conventions, version 1.11, chapter 9 "Discrete Sampling
Geometries" and appendix H (examples H.4.1-H.4.3 for trajectories).
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import InputError
from ..runs import run_bounds

__all__ = ["read_fixes", "FixReader", "write_fixes", "fixes_to_cf_dataset", "COLUMN_ALIASES"]

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


def _column_map(columns, where: str) -> dict:
    """``{source column: standard column}`` for the columns driftspec reads (first alias found wins)."""
    lower = {str(c).strip().lower(): c for c in columns}
    rename = {}
    for std, aliases in COLUMN_ALIASES.items():
        for a in aliases:
            if a in lower:
                rename[lower[a]] = std
                break
    missing = [c for c in REQUIRED if c not in rename.values()]
    if missing:
        raise InputError(
            f"{where}: missing column(s) {', '.join(missing)}; found {', '.join(map(str, columns))}"
        )
    return rename


def _standardise_columns(df: pd.DataFrame, where: str) -> pd.DataFrame:
    rename = _column_map(df.columns, where)
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


def _coerce(df: pd.DataFrame, first_row: int = 0) -> pd.DataFrame:
    """Parse columns; keep every row; record which raw values were present but unparseable.

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


def _unreadable(where, exc) -> InputError:
    """The one-line error for a file that cannot be read or decoded."""
    return InputError(f"{where}: cannot read ({str(exc).strip().splitlines()[0]})")


def _read_table(path: Path) -> pd.DataFrame:
    suffix = path.suffix.lower()
    try:
        if suffix in (".parquet", ".pq"):
            import pyarrow.parquet as pq

            # read the id column dictionary-encoded: a categorical, not one Python string per fix
            names = pq.read_schema(path).names
            id_col = next((c for c in names if c.strip().lower() in COLUMN_ALIASES["id"]), None)
            table = pq.read_table(path, read_dictionary=[id_col] if id_col else None)
            return table.to_pandas()
        return pd.read_csv(path, dtype=str, keep_default_na=False, na_values=[""], skipinitialspace=True,
                           comment="#", on_bad_lines="error")
    except pd.errors.ParserError as exc:
        raise InputError(f"{path}: malformed CSV ({str(exc).strip().splitlines()[-1]})") from exc
    except (OSError, ValueError) as exc:
        raise _unreadable(path, exc) from exc


def _find_var(ds: xr.Dataset, std: str):
    keys = {"lat": ("latitude",), "lon": ("longitude",), "time": ("time",)}[std]
    for name, var in ds.variables.items():
        if var.attrs.get("standard_name") in keys:
            return name
    for name in ds.variables:
        if str(name).lower() in COLUMN_ALIASES[std]:
            return name
    return None


def _dataset_to_frame(ds: xr.Dataset, where: str) -> pd.DataFrame:
    """Flatten a CF trajectory dataset (any of the three array representations) to one row per fix."""
    tname, yname, xname = (_find_var(ds, k) for k in ("time", "lat", "lon"))
    if None in (tname, yname, xname):
        raise InputError(f"{where}: no time/latitude/longitude variables found (CF standard_name or name)")
    id_var = next((n for n, v in ds.variables.items() if v.attrs.get("cf_role") == "trajectory_id"), None)
    count_var = next((n for n, v in ds.variables.items() if "sample_dimension" in v.attrs), None)
    index_var = next((n for n, v in ds.variables.items() if "instance_dimension" in v.attrs), None)
    extra = {c: _find_extra(ds, c) for c in OPTIONAL_NUMERIC}
    extra = {k: v for k, v in extra.items() if v is not None}

    if count_var is not None:  # contiguous ragged array
        counts = ds[count_var].values.astype(np.int64)
        ids = ds[id_var].values if id_var else np.arange(len(counts))
        obs_dim = ds[count_var].attrs["sample_dimension"]
        if counts.sum() != ds.sizes.get(obs_dim, -1):
            raise InputError(f"{where}: {count_var} sums to {counts.sum()} but dimension {obs_dim} "
                             f"has {ds.sizes.get(obs_dim)} samples")
        id_per_obs = np.repeat(_as_str(ids), counts)
    elif index_var is not None:  # indexed ragged array
        index = ds[index_var].values.astype(np.int64)
        n_inst = ds.sizes[ds[index_var].attrs["instance_dimension"]]
        ids = _as_str(ds[id_var].values) if id_var else np.arange(n_inst).astype(str)
        if (index < 0).any() or (index >= n_inst).any():
            raise InputError(f"{where}: {index_var} has values outside 0..{n_inst - 1}")
        id_per_obs = ids[index]
    else:  # multidimensional array (trajectory, obs)
        if ds[yname].ndim != 2:
            raise InputError(f"{where}: not a CF trajectory dataset (no count or index variable, "
                             f"and {yname} is not 2-D)")
        inst_dim = ds[yname].dims[0]
        ids = _as_str(ds[id_var].values) if id_var else np.arange(ds.sizes[inst_dim]).astype(str)
        n_obs = ds[yname].shape[1]
        frame = {
            "id": np.repeat(ids, n_obs),
            "time": _broadcast(ds[tname], ds[yname]).ravel(),
            "lat": ds[yname].values.ravel(),
            "lon": ds[xname].values.ravel(),
        }
        for c, n in extra.items():
            frame[c] = ds[n].values.ravel()
        df = pd.DataFrame(frame)
        # trailing fill values of shorter trajectories are padding, not data
        pad = df["lat"].isna() & df["lon"].isna() & pd.isna(df["time"])
        return df.loc[~pad].reset_index(drop=True)
    frame = {"id": id_per_obs, "time": ds[tname].values, "lat": ds[yname].values, "lon": ds[xname].values}
    for c, n in extra.items():
        frame[c] = ds[n].values
    return pd.DataFrame(frame)


def _find_extra(ds, col):
    for name in ds.variables:
        if str(name).lower() in COLUMN_ALIASES[col]:
            return name
    std = {"u": "eastward_sea_water_velocity", "v": "northward_sea_water_velocity"}.get(col)
    for name, var in ds.variables.items():
        if std and var.attrs.get("standard_name") == std:
            return name
    return None


def _as_str(values) -> np.ndarray:
    values = np.asarray(values)
    if values.dtype.kind == "S":
        values = np.char.decode(values, "utf-8")
    return np.char.strip(values.astype(str))


def _broadcast(t: xr.DataArray, like: xr.DataArray) -> np.ndarray:
    return t.broadcast_like(like).transpose(*like.dims).values


def read_fixes(source) -> pd.DataFrame:
    """Read position fixes from a file, DataFrame or Dataset into the standard representation.

    Parameters
    ----------
    source : str, os.PathLike, pandas.DataFrame or xarray.Dataset
        CSV (``.csv``, ``.txt``), Parquet (``.parquet``) or CF netCDF (``.nc``) trajectory data, or an
        in-memory table or dataset with the same content.

    Returns
    -------
    pandas.DataFrame
        One row per input row (nothing dropped), columns as in the module docstring plus the private
        flags ``time_unparseable`` and ``value_unparseable`` used by quality control.

    Raises
    ------
    InputError
        If the file cannot be read, or required columns are missing.
    """
    if isinstance(source, pd.DataFrame):
        raw, where = _standardise_columns(source.reset_index(drop=True), "DataFrame"), "DataFrame"
    elif isinstance(source, xr.Dataset):
        raw = _standardise_columns(_dataset_to_frame(source, "Dataset"), "Dataset")
    else:
        path = Path(os.fspath(source))
        where = str(path)
        if not path.exists():
            raise InputError(f"{path}: no such file")
        if path.suffix.lower() in (".nc", ".nc4", ".cdf", ".netcdf"):
            try:
                with xr.open_dataset(path, decode_times=True) as ds:
                    raw = _standardise_columns(_dataset_to_frame(ds.load(), where), where)
            except InputError:
                raise
            except Exception as exc:  # noqa: BLE001 - any backend failure is bad input here
                raise InputError(f"{path}: cannot read as netCDF ({str(exc).splitlines()[0]})") from exc
        else:
            raw = _standardise_columns(_read_table(path), where)
    return _coerce(raw)


def _reraise_as_input_error(batches, where):
    """Record batches, with a damaged file reported as bad input rather than a traceback."""
    import pyarrow as pa

    while True:
        try:
            batch = next(batches)
        except StopIteration:
            return
        except (OSError, ValueError, pa.ArrowException) as exc:
            raise _unreadable(where, exc) from exc
        yield batch


class FixReader:
    """Fixes from a source, whole or a few hundred thousand rows at a time, each chunk holding whole tracks.

    A Parquet file whose tracks are contiguous (each track's rows together, as ``driftspec qc`` and
    ``driftspec demo`` write them) is read in chunks of about ``rows_per_chunk`` rows, so that memory stays
    bounded however large the input; any other source is read whole by :func:`read_fixes`. Either way every
    chunk is in the form ``read_fixes`` returns, ``row`` numbering the source rows, and the chunks together
    hold every input row exactly once.

    >>> reader = FixReader("demo_data/fixes.parquet")        # doctest: +SKIP
    >>> for chunk in reader: ...                             # doctest: +SKIP
    """

    def __init__(self, source, rows_per_chunk: int = 1_000_000):
        self.source = source
        self.rows_per_chunk = int(rows_per_chunk)
        self._whole = None
        self._spans = None
        self.streaming = False
        path = None if isinstance(source, (pd.DataFrame, xr.Dataset)) else Path(os.fspath(source))
        if path is not None and path.suffix.lower() in (".parquet", ".pq") and path.exists():
            self._open_parquet(path)
        if not self.streaming:
            self._whole = read_fixes(source)

    def _open_parquet(self, path: Path) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq

        try:
            schema = pq.read_schema(path)
        except (OSError, ValueError) as exc:
            raise _unreadable(path, exc) from exc
        rename = _column_map(schema.names, str(path))
        self._path, self._rename = path, rename
        src = {std: col for col, std in rename.items()}
        if not pa.types.is_timestamp(schema.field(src["time"]).type):
            return  # times as text: parsed in one piece by read_fixes
        try:
            table = pq.read_table(path, columns=[src["id"], src["time"]], read_dictionary=[src["id"]])
        except (OSError, ValueError, pa.ArrowException) as exc:
            raise _unreadable(path, exc) from exc
        ids = table.column(0).to_pandas()
        names = pd.Index(ids.cat.categories.astype(str)).str.strip() if isinstance(
            ids.dtype, pd.CategoricalDtype) else None
        if names is None or not names.is_unique:
            return
        codes = ids.cat.codes.to_numpy()
        t = table.column(1).cast(pa.timestamp("ns")).to_numpy(zero_copy_only=False).view(np.int64)
        del table, ids
        has = codes >= 0
        c, t = codes[has], t[has]
        starts, _ = run_bounds(c)
        if starts.size != np.unique(c).size:
            return  # a track's rows are split: read whole
        nat = np.iinfo(np.int64).min
        first = np.minimum.reduceat(np.where(t == nat, np.iinfo(np.int64).max, t), starts) if c.size else t
        last = np.maximum.reduceat(t, starts) if c.size else t
        ok = (first != np.iinfo(np.int64).max) & (last != nat)
        self._spans = pd.DataFrame({"id": names[c[starts]][ok], "first": first[ok].astype("datetime64[ns]"),
                                    "last": last[ok].astype("datetime64[ns]")})
        self.streaming = True

    def spans(self) -> pd.DataFrame:
        """First and last fix time of each track (``id``, ``first``, ``last``), for progress estimates."""
        if self._spans is None:
            span = self._whole.dropna(subset=["id", "time"]).groupby("id", observed=True)["time"].agg(
                first="min", last="max")
            self._spans = span.reset_index()
        return self._spans

    def __iter__(self):
        if not self.streaming:
            yield self._whole
            return
        import pyarrow as pa
        import pyarrow.parquet as pq

        src = {std: col for col, std in self._rename.items()}
        cols = [src[c] for c in COLUMN_ALIASES if c in src]
        where = str(self._path)
        try:
            pf = pq.ParquetFile(self._path, read_dictionary=[src["id"]])
            batches = pf.iter_batches(batch_size=self.rows_per_chunk, columns=cols)
        except (OSError, ValueError, pa.ArrowException) as exc:
            raise _unreadable(where, exc) from exc
        carry, first_row = None, 0
        for batch in _reraise_as_input_error(batches, where):
            table = pa.Table.from_batches([batch])
            if carry is not None:
                table = pa.concat_tables([carry, table])
            codes = table.column(src["id"]).to_pandas().cat.codes.to_numpy()
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
            yield self._chunk(table.slice(0, cut), where, first_row)
            first_row += cut
        if carry is not None and carry.num_rows:
            yield self._chunk(carry, where, first_row)

    def _chunk(self, table, where, first_row):
        return _coerce(_standardise_columns(table.to_pandas(), where), first_row)


def fixes_to_cf_dataset(fixes: pd.DataFrame, attrs: dict | None = None) -> xr.Dataset:
    """Fixes (sorted by id, time) as a CF contiguous ragged array trajectory dataset."""
    fixes = fixes.sort_values(["id", "time"], kind="stable")
    ids, counts = np.unique(fixes["id"].to_numpy().astype(str), return_counts=True)
    # np.unique sorts ids; the stable sort above sorted them the same way
    ds = xr.Dataset(
        {
            "trajectory": ("trajectory", ids.astype(object),
                           {"cf_role": "trajectory_id", "long_name": "track identifier"}),
            "fix_count": ("trajectory", counts.astype(np.int32),
                        {"sample_dimension": "obs", "long_name": "number of fixes in this track"}),
            "time": ("obs", fixes["time"].to_numpy(), {"standard_name": "time", "axis": "T"}),
            "lat": ("obs", fixes["lat"].to_numpy(float),
                    {"standard_name": "latitude", "units": "degrees_north", "axis": "Y"}),
            "lon": ("obs", fixes["lon"].to_numpy(float),
                    {"standard_name": "longitude", "units": "degrees_east", "axis": "X"}),
        },
        attrs={"Conventions": "CF-1.11", "featureType": "trajectory", **(attrs or {})},
    )
    units = {"position_error_m": ("m", None), "u": ("m s-1", "eastward_sea_water_velocity"),
             "v": ("m s-1", "northward_sea_water_velocity")}
    for col, (unit, std) in units.items():
        if col in fixes:
            a = {"units": unit, "coordinates": "time lat lon"}
            if std:
                a["standard_name"] = std
            ds[col] = ("obs", fixes[col].to_numpy(float), a)
    ds = ds.set_coords(["time", "lat", "lon"])
    ds["time"].encoding.update(units="seconds since 1970-01-01 00:00:00", dtype="float64")
    return ds


def write_fixes(fixes: pd.DataFrame, path, attrs: dict | None = None) -> Path:
    """Write fixes as Parquet (``.parquet``), CSV (``.csv``) or CF contiguous ragged netCDF (``.nc``)."""
    path = Path(path)
    cols = [c for c in ("id", "time", "lat", "lon", *OPTIONAL_NUMERIC) if c in fixes]
    tmp = path.with_name(path.name + ".tmp")
    suffix = path.suffix.lower()
    if suffix == ".nc":
        fixes_to_cf_dataset(fixes[cols], attrs).to_netcdf(tmp)
    elif suffix in (".parquet", ".pq"):
        fixes[cols].to_parquet(tmp, index=False, compression="zstd")
    elif suffix == ".csv":
        fixes[cols].to_csv(tmp, index=False, date_format="%Y-%m-%dT%H:%M:%SZ")
    else:
        raise InputError(f"{path}: unknown output format (use .parquet, .csv or .nc)")
    os.replace(tmp, path)
    return path
