"""Regional products: fitted parameters gridded into latitude-longitude bins, as CF netCDF.

Each fit (window) is assigned to the bin holding its mean position; only ``status == "ok"`` fits count, and of a
window's candidates only the selected one (column ``selected``, where the table has it).
For every gridded column ``P`` the dataset holds ``P`` (median or mean per bin), ``P_spread``
(interquartile range for the median, standard error of the mean for the mean) and ``P_count``; the
variable ``count`` (standard name ``number_of_observations``) counts ok fits per bin.

References
----------
NetCDF Climate and Forecast (CF) Metadata Conventions, version 1.11: section 7.1 (cell boundaries),
section 7.3 (cell_methods), appendix C (standard-name modifier ``number_of_observations``).
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import InputError

#: columns that are never gridded (identifiers, bookkeeping)
NOT_GRIDDED = {"track_id", "window_start", "window_end", "lat", "lon", "model", "estimator", "status",
               "message", "n_samples", "n_valid", "n_freq", "coverage", "loglik", "aic", "max_freq",
               "inertial_frequency_local"}


def default_params(fits: pd.DataFrame) -> list[str]:
    cols = [c for c in fits.columns if c not in NOT_GRIDDED and not c.endswith("_se")
            and pd.api.types.is_numeric_dtype(fits[c])]
    return cols


def _edges(lo, hi, step):
    return np.arange(lo, hi + step / 2, step)


def cf_grid(lat_e, lon_e) -> xr.Dataset:
    """An empty CF latitude-longitude grid from bin edges (degrees): cell centres with ``bounds`` attributes and
    ``lat_bnds``/``lon_bnds`` (CF conventions 1.11, section 7.1), for every gridded product."""
    lat_e, lon_e = np.asarray(lat_e, float), np.asarray(lon_e, float)
    ds = xr.Dataset(coords={
        "lat": ("lat", 0.5 * (lat_e[:-1] + lat_e[1:]),
                {"standard_name": "latitude", "units": "degrees_north", "bounds": "lat_bnds", "axis": "Y"}),
        "lon": ("lon", 0.5 * (lon_e[:-1] + lon_e[1:]),
                {"standard_name": "longitude", "units": "degrees_east", "bounds": "lon_bnds", "axis": "X"}),
    })
    ds["lat_bnds"] = (("lat", "nv"), np.stack([lat_e[:-1], lat_e[1:]], axis=1))
    ds["lon_bnds"] = (("lon", "nv"), np.stack([lon_e[:-1], lon_e[1:]], axis=1))
    return ds


def grid_fits(fits: pd.DataFrame, params=None, bin_deg: float = 2.0, stat: str = "median",
              units: dict | None = None, lat_range=(-90.0, 90.0), lon_range=(-180.0, 180.0)) -> xr.Dataset:
    """Grid fitted columns into ``bin_deg`` x ``bin_deg`` bins.

    Parameters
    ----------
    fits : pandas.DataFrame
        A fits table (``driftspec fit`` output) with ``lat``, ``lon`` and ``status``.
    params : list of str, optional
        Columns to grid (default: every fitted parameter, ``diffusivity`` and derived time scales).
    bin_deg : float
        Bin size in degrees.
    stat : {"median", "mean"}
    units : dict, optional
        Units per column (written to the variables' ``units``).
    lat_range, lon_range : tuple
        Extent of the grid (degrees).

    Returns
    -------
    xarray.Dataset
        CF-compliant gridded dataset with ``lat``/``lon`` cell centres and ``lat_bnds``/``lon_bnds``.
    """
    if stat not in ("median", "mean"):
        raise ValueError("stat must be 'median' or 'mean'")
    if not bin_deg > 0:
        raise ValueError("bin_deg must be positive")
    for col in ("lat", "lon", "status"):
        if col not in fits:
            raise InputError(f"fits table has no column {col!r}")
    params = list(params) if params else default_params(fits)
    missing = [p for p in params if p not in fits]
    if missing:
        raise InputError(f"fits table has no column(s) {', '.join(missing)}")
    lat_e = _edges(*lat_range, bin_deg)
    lon_e = _edges(*lon_range, bin_deg)
    ok = fits[(fits["status"] == "ok") & is_selected(fits)]
    lon = ((ok["lon"].to_numpy(float) + 180) % 360) - 180
    lat = ok["lat"].to_numpy(float)
    inside = (lat >= lat_e[0]) & (lat < lat_e[-1]) & (lon >= lon_e[0]) & (lon < lon_e[-1])
    iy = np.clip(np.searchsorted(lat_e, lat, side="right") - 1, 0, len(lat_e) - 2)
    ix = np.clip(np.searchsorted(lon_e, lon, side="right") - 1, 0, len(lon_e) - 2)
    ny, nx = len(lat_e) - 1, len(lon_e) - 1
    cell = np.where(inside, iy * nx + ix, -1)
    count = np.bincount(cell[inside], minlength=ny * nx).reshape(ny, nx)
    ds = cf_grid(lat_e, lon_e)
    ds["count"] = (("lat", "lon"), count.astype(np.int32),
                   {"standard_name": "number_of_observations", "long_name": "number of ok window fits",
                    "units": "1", "cell_methods": "area: sum"})
    frame = pd.DataFrame({"cell": cell[inside]})
    for p in params:
        frame[p] = ok[p].to_numpy(float)[inside]
    grouped = frame.groupby("cell")
    method = "median" if stat == "median" else "mean"
    for p in params:
        g = grouped[p]
        center = g.median() if stat == "median" else g.mean()
        if stat == "median":
            spread = g.quantile(0.75) - g.quantile(0.25)
            spread_name, spread_method = "interquartile range", "area: range within quartiles"
        else:
            spread = g.std(ddof=1) / np.sqrt(g.count())
            spread_name, spread_method = "standard error of the mean", "area: standard_error"
        n = g.count()
        arrays = {}
        for name, series in (("", center), ("_spread", spread), ("_count", n)):
            a = np.full(ny * nx, np.nan)
            a[series.index.to_numpy()] = series.to_numpy(float)
            arrays[name] = a.reshape(ny, nx)
        unit = (units or {}).get(p, "1")
        ds[p] = (("lat", "lon"), arrays[""], {"long_name": f"{method} of {p} over windows in the cell",
                                              "units": unit, "cell_methods": f"area: {method}"})
        ds[p + "_spread"] = (("lat", "lon"), arrays["_spread"],
                             {"long_name": f"{spread_name} of {p}", "units": unit,
                              "cell_methods": spread_method})
        ds[p + "_count"] = (("lat", "lon"), np.nan_to_num(arrays["_count"]).astype(np.int32),
                            {"long_name": f"number of finite {p} values", "units": "1",
                             "standard_name": "number_of_observations"})
    ds.attrs.update({"Conventions": "CF-1.11", "title": "driftspec gridded window fits",
                     "bin_size_degrees": float(bin_deg), "statistic": stat,
                     "ok_fits_in_grid": int(count.sum())})
    return ds


def file_digest(path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def grid_fits_file(path, params=None, bin_deg=2.0, stat="median", out=None, command="") -> xr.Dataset:
    """Read a fits table, grid it, and write CF netCDF with provenance to ``out``."""
    import pyarrow.parquet as pq

    from ..io.tables import read_table

    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: no such file")
    try:
        fits = read_table(path)
    except Exception as exc:  # noqa: BLE001
        raise InputError(f"{path}: cannot read fits table ({str(exc).splitlines()[0]})") from exc
    units = {}
    if path.suffix.lower() != ".csv":
        schema = pq.read_schema(path)
        units = {f.name: f.metadata[b"units"].decode() for f in schema if f.metadata and b"units" in f.metadata}
    ds = grid_fits(fits, params, bin_deg, stat, units)
    from importlib.metadata import PackageNotFoundError, version

    try:
        ver = version("driftspec")
    except PackageNotFoundError:
        ver = "unknown"
    ds.attrs.update({"history": f"{pd.Timestamp.now('UTC').isoformat()} {command}".strip(),
                     "source": f"{path.name} (sha256 {file_digest(path)})", "driftspec_version": ver})
    if out is not None:
        out = Path(out)
        tmp = out.with_name(out.name + ".tmp")
        ds.to_netcdf(tmp)
        import os

        os.replace(tmp, out)
    return ds


def is_selected(fits: pd.DataFrame) -> pd.Series:
    """Rows chosen for their window (all rows of a table made before the column existed)."""
    if "selected" not in fits:
        return pd.Series(True, index=fits.index)
    return fits["selected"].astype(str).str.lower().isin(["true", "1"])
