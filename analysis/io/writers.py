"""Writing position fixes: Parquet, CSV, or CF contiguous ragged array trajectory netCDF.

References
----------
NetCDF Climate and Forecast (CF) Metadata Conventions, version 1.11, chapter 9 "Discrete Sampling
Geometries" and appendix H.4.3 (contiguous ragged array representation of trajectories).
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import InputError
from .columns import OPTIONAL_NUMERIC

__all__ = ["write_fixes", "fixes_to_cf_dataset"]


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
