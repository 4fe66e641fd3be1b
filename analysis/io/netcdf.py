"""Readers for CF trajectory data: netCDF files and in-memory :class:`xarray.Dataset` objects.

A CF discrete-sampling-geometry dataset of featureType ``trajectory`` is flattened to one row per fix,
whichever of the three array representations it uses: contiguous ragged (a count variable with a
``sample_dimension`` attribute), indexed ragged (an index variable with an ``instance_dimension``
attribute) or multidimensional (``(trajectory, obs)`` arrays padded with fill values).

References
----------
NetCDF Climate and Forecast (CF) Metadata Conventions, version 1.11, chapter 9 "Discrete Sampling
Geometries" and appendix H (examples H.4.1-H.4.4 for trajectories).
NetCDF file format specifications (Unidata): classic and 64-bit offset files begin with ``CDF\\x01`` or
``CDF\\x02``, CDF-5 files with ``CDF\\x05``; netCDF-4 files are HDF5 files, which begin with
``\\x89HDF\\r\\n\\x1a\\n``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import InputError
from .backend import FixBackend
from .columns import COLUMN_ALIASES, OPTIONAL_NUMERIC, as_path, source_label

__all__ = ["NetcdfBackend", "DatasetBackend", "dataset_to_frame"]

NETCDF_MAGIC = (b"CDF\x01", b"CDF\x02", b"CDF\x05", b"\x89HDF\r\n\x1a\n")


def _find_var(ds: xr.Dataset, std: str):
    keys = {"lat": ("latitude",), "lon": ("longitude",), "time": ("time",)}[std]
    for name, var in ds.variables.items():
        if var.attrs.get("standard_name") in keys:
            return name
    for name in ds.variables:
        if str(name).lower() in COLUMN_ALIASES[std]:
            return name
    return None


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


def _undecoded_times(var: xr.DataArray) -> bool:
    """Numeric times with CF units (``<unit> since <reference time>``), not yet decoded to datetimes."""
    return var.dtype.kind in "iuf" and " since " in str(var.attrs.get("units", ""))


def dataset_to_frame(ds: xr.Dataset, where: str) -> pd.DataFrame:
    """Flatten a CF trajectory dataset (any of the three array representations) to one row per fix, with
    columns ``id``, ``time``, ``lat``, ``lon`` and any of ``position_error_m``, ``u``, ``v``."""
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


class DatasetBackend(FixBackend):
    """An :class:`xarray.Dataset` in memory holding CF trajectory data."""

    name = "dataset"
    description = "xarray.Dataset with CF trajectory data"

    def guess_can_open(self, source) -> bool:
        return isinstance(source, xr.Dataset)

    def read_table(self, source) -> pd.DataFrame:
        where = source_label(source)
        if not isinstance(source, xr.Dataset):
            raise InputError(f"{where}: the {self.name} reader takes an xarray.Dataset")
        tname = _find_var(source, "time")
        if tname is not None and _undecoded_times(source[tname]):
            # built in memory or opened with decode_times=False: numbers with CF units ("seconds since ...")
            try:
                source = xr.decode_cf(source)
            except Exception as exc:  # noqa: BLE001 - any decoding failure is bad input here
                first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
                raise InputError(f"{where}: cannot decode {tname} ({first})") from exc
        return dataset_to_frame(source, where)


class NetcdfBackend(FixBackend):
    """A CF trajectory netCDF file (netCDF-3 or netCDF-4, as the installed xarray engines can read it);
    recognised by its ending or, failing that, by the file's first bytes."""

    name = "netcdf"
    description = "CF trajectory netCDF file"
    suffixes = (".nc", ".nc4", ".cdf", ".netcdf")

    def guess_can_open(self, source) -> bool:
        if super().guess_can_open(source):
            return True
        try:
            with open(as_path(source, self.name), "rb") as f:
                head = f.read(8)
        except (OSError, InputError):
            return False
        return any(head.startswith(m) for m in NETCDF_MAGIC)

    def read_table(self, source) -> pd.DataFrame:
        path = as_path(source, self.name)
        try:
            with xr.open_dataset(path, decode_times=True) as ds:
                return dataset_to_frame(ds.load(), str(path))
        except InputError:
            raise
        except Exception as exc:  # noqa: BLE001 - any backend failure is bad input here
            first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
            raise InputError(f"{path}: cannot read as netCDF ({first})") from exc
