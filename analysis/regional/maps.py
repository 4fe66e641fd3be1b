"""Regional products: fitted parameters gridded into latitude-longitude bins, as CF netCDF.

Each fit (window) is assigned to the bin holding its mean position; only ``status == "ok"`` fits count, and of a
window's candidates only the selected one (column ``selected``, where the table has it).
For every gridded column ``P`` the dataset holds ``P`` (median or mean per bin), ``P_spread``
(interquartile range for the median, standard error of the mean for the mean) and ``P_count``; the
variable ``count`` (standard name ``number_of_observations``) counts ok fits per bin.

Directions and tensors
----------------------
Angles of axes (``anisotropy_angle_deg``, ``ellipse_angle_deg``: degrees counterclockwise from east, in
``[-90, 90)``) are axial: 89 and -89 degrees are 2 degrees apart, and their plain mean (0) is across both. They are
averaged as axial directions: the mean direction of the doubled angles ``2 theta``, halved, with the mean
resultant length ``R`` of the doubled angles as ``P_concentration`` (1: all windows share the axis, 0: no
preferred axis) and the circular standard deviation ``sqrt(-2 ln R) / 2`` (degrees) as ``P_spread``.

The columns of ``driftspec fit --anisotropic`` are summarised per bin by :func:`anisotropy_summary` (the same
summaries go into the pooled maps of :mod:`.pooled`):

* ``anisotropy``: median of the selected models' anisotropy, an isotropic model selected counting as 0 (its
  diffusivity tensor has equal principal values), with its interquartile range;
* ``anisotropy_angle_deg``: the axial mean over windows whose selected model is anisotropic;
* ``isotropy_rejected_fraction``: the share of tested windows whose isotropy test rejects at 1 %;
* ``diffusivity_major``, ``diffusivity_minor``, ``diffusivity_angle_deg``: the principal values and axis of the
  mean diffusivity tensor. Each window's tensor ``K = R(phi) diag(major, minor) R(phi)^T`` (components
  ``K_xx = m + h cos 2 phi``, ``K_yy = m - h cos 2 phi``, ``K_xy = h sin 2 phi``, ``m``, ``h`` half the sum and
  difference of the principal values) is averaged component by component and the mean diagonalised, so a bin of
  windows with crossed axes comes out nearly isotropic, as the spreading of its particles would.

References
----------
NetCDF Climate and Forecast (CF) Metadata Conventions, version 1.11: section 7.1 (cell boundaries),
section 7.3 (cell_methods), appendix C (standard-name modifier ``number_of_observations``).
K. V. Mardia, P. E. Jupp, "Directional Statistics", Wiley (2000), chapter 2 (mean direction, mean resultant
length, circular standard deviation; axial data through the doubled angles).
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import InputError
from ..fitting.anisotropy import principal_axes
from ..fitting.core import ISOTROPY_LEVEL
from ..models.anisotropic import wrap_axis_deg

#: columns that are never gridded (identifiers, bookkeeping)
NOT_GRIDDED = {"track_id", "window_start", "window_end", "lat", "lon", "model", "estimator", "status",
               "message", "n_samples", "n_valid", "n_freq", "coverage", "loglik", "aic", "max_freq",
               "inertial_frequency_local"}
#: axial directions (degrees counterclockwise from east): averaged through the doubled angles
AXIAL_COLUMNS = ("anisotropy_angle_deg", "ellipse_angle_deg")
#: columns of ``driftspec fit --anisotropic`` summarised together by :func:`anisotropy_summary`
ANISOTROPY_INPUTS = ("anisotropy", "anisotropy_angle_deg", "isotropy_pvalue", "diffusivity_major",
                     "diffusivity_minor", "diffusivity_angle_deg")


def default_params(fits: pd.DataFrame) -> list[str]:
    """Columns gridded one by one (median or mean): numeric, not bookkeeping, not a standard error, not a column
    of the anisotropy summary (:func:`anisotropy_summary`)."""
    cols = [c for c in fits.columns if c not in NOT_GRIDDED and not c.endswith("_se")
            and c not in ANISOTROPY_INPUTS and pd.api.types.is_numeric_dtype(fits[c])]
    return cols


# ---------------------------------------------------------------------------------------------- directions, tensors
def axial_mean(angles_deg) -> tuple[float, float, int]:
    """Mean of axial directions: ``(mean_deg, R, n)``.

    Parameters
    ----------
    angles_deg : array_like
        Directions of axes in degrees (any range; an axis at ``theta`` is the one at ``theta + 180``); NaN
        values are left out.

    Returns
    -------
    mean_deg : float
        ``arg(mean exp(2 i theta)) / 2`` in ``[-90, 90)`` degrees; NaN without values or where the doubled angles
        cancel (``R`` below 1e-12).
    R : float
        Mean resultant length ``|mean exp(2 i theta)|`` of the doubled angles, in ``[0, 1]`` (1: one axis).
    n : int
        Finite values used.

    Notes
    -----
    K. V. Mardia, P. E. Jupp, "Directional Statistics", Wiley (2000), chapter 2: axial data are averaged as the
    circular mean of the doubled angles, halved.

    Examples
    --------
    >>> axial_mean([85.0, -85.0])[0]  # the axes straddle north-south; a plain mean would say east-west
    -90.0
    """
    a = np.asarray(angles_deg, float).ravel()
    a = a[np.isfinite(a)]
    if a.size == 0:
        return np.nan, np.nan, 0
    c = np.mean(np.exp(2j * np.radians(a)))
    r = float(min(abs(c), 1.0))
    mean = float(wrap_axis_deg(np.degrees(0.5 * np.angle(c)))) if r > 1e-12 else np.nan
    return mean, r, int(a.size)


def axial_spread_deg(r):
    """Circular standard deviation of axial data from the mean resultant length ``r`` of the doubled angles:
    ``sqrt(-2 ln r) / 2``, in degrees (Mardia and Jupp 2000, chapter 2; infinite at ``r = 0``)."""
    r = np.asarray(r, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.degrees(0.5 * np.sqrt(-2.0 * np.log(np.clip(r, 0.0, 1.0))))


def tensor_components(major, minor, angle_deg):
    """``(K_xx, K_yy, K_xy)`` of symmetric 2 x 2 tensors from principal values and the major axis' direction
    (degrees counterclockwise from east). An isotropic tensor (``major == minor``) may have a NaN angle."""
    major, minor, angle = (np.asarray(v, float) for v in (major, minor, angle_deg))
    m, h = 0.5 * (major + minor), 0.5 * (major - minor)
    two = np.radians(2.0 * np.where(np.isfinite(angle) | (h != 0), angle, 0.0))
    return m + h * np.cos(two), m - h * np.cos(two), h * np.sin(two)


def mean_tensor(major, minor, angle_deg) -> tuple[float, float, float, int]:
    """Principal values and axis of the mean of tensors given by their principal values and axes:
    ``(major, minor, angle_deg, n)``; the components are averaged, then the mean diagonalised (angle in
    ``[-90, 90)``, NaN for an isotropic mean). Tensors with a non-finite value are left out."""
    kxx, kyy, kxy = tensor_components(major, minor, angle_deg)
    ok = np.isfinite(kxx) & np.isfinite(kyy) & np.isfinite(kxy)
    n = int(ok.sum())
    if n == 0:
        return np.nan, np.nan, np.nan, 0
    k = np.array([[kxx[ok].mean(), kxy[ok].mean()], [kxy[ok].mean(), kyy[ok].mean()]])
    big, small, angle = principal_axes(k)
    if big - small <= 1e-12 * abs(big + small):
        angle = np.nan
    return big, small, angle, n


def anisotropy_summary(rows: pd.DataFrame) -> dict:
    """The anisotropy summaries of one bin's windows (their selected, ok fits; module docstring).

    Returns
    -------
    dict
        ``anisotropy`` (median; an isotropic model selected after a test counts as 0), ``anisotropy_spread``
        (interquartile range), ``anisotropy_count``; ``anisotropy_angle_deg`` (axial mean over anisotropic
        fits), ``anisotropy_angle_deg_spread`` (circular standard deviation, degrees),
        ``anisotropy_angle_deg_concentration`` (mean resultant length of the doubled angles),
        ``anisotropy_angle_deg_count``; ``isotropy_rejected_fraction`` (share of tested windows with
        ``isotropy_pvalue`` below 1 %) and ``isotropy_tested_count``; ``diffusivity_major``,
        ``diffusivity_minor``, ``diffusivity_angle_deg`` and ``diffusivity_tensor_count`` of the mean tensor.
        Values are NaN (counts 0) where the columns are missing or empty.
    """

    def col(name):
        return rows[name].to_numpy(float) if name in rows else np.full(len(rows), np.nan)

    pval, rho, angle = col("isotropy_pvalue"), col("anisotropy"), col("anisotropy_angle_deg")
    tested = np.isfinite(pval)
    rho = np.where(np.isfinite(rho), rho, np.where(tested, 0.0, np.nan))
    rho = rho[np.isfinite(rho)]
    out = {"anisotropy": float(np.median(rho)) if rho.size else np.nan,
           "anisotropy_spread": float(np.subtract(*np.quantile(rho, [0.75, 0.25]))) if rho.size else np.nan,
           "anisotropy_count": int(rho.size)}
    mean, r, n = axial_mean(angle)
    out.update({"anisotropy_angle_deg": mean, "anisotropy_angle_deg_spread": float(axial_spread_deg(r)),
                "anisotropy_angle_deg_concentration": r, "anisotropy_angle_deg_count": n,
                "isotropy_rejected_fraction": float(np.mean(pval[tested] < ISOTROPY_LEVEL)) if tested.any()
                else np.nan, "isotropy_tested_count": int(tested.sum())})
    big, small, ang, n = mean_tensor(col("diffusivity_major"), col("diffusivity_minor"), col("diffusivity_angle_deg"))
    out.update({"diffusivity_major": big, "diffusivity_minor": small, "diffusivity_angle_deg": ang,
                "diffusivity_tensor_count": n})
    return out


def anisotropy_attrs(over: str = "windows in the cell") -> dict:
    """CF attributes of the variables of :func:`anisotropy_summary`; ``over`` completes each long name."""
    axial = "axial direction of the major axis, degrees counterclockwise from east, in [-90, 90)"
    count = {"units": "1", "standard_name": "number_of_observations"}
    return {
        "anisotropy": {"long_name": f"median anisotropy of the selected fits (0 for isotropic ones) over {over}",
                       "units": "1", "cell_methods": "area: median"},
        "anisotropy_spread": {"long_name": "interquartile range of the anisotropy", "units": "1",
                              "cell_methods": "area: range within quartiles"},
        "anisotropy_count": {"long_name": f"windows with a tested or fitted anisotropy among {over}", **count},
        "anisotropy_angle_deg": {"long_name": f"axial mean of the anisotropy angle of anisotropic fits over {over}",
                                 "units": "degree", "comment": f"{axial}; mean direction of the doubled angles, "
                                 "halved", "cell_methods": "area: mean (axial)"},
        "anisotropy_angle_deg_spread": {"long_name": "circular standard deviation of the anisotropy angle "
                                                     "(axial: sqrt(-2 ln R) / 2)", "units": "degree"},
        "anisotropy_angle_deg_concentration": {"long_name": "mean resultant length R of the doubled anisotropy "
                                                            "angles (1: one axis, 0: none)", "units": "1"},
        "anisotropy_angle_deg_count": {"long_name": f"windows with an anisotropic fit among {over}", **count},
        "isotropy_rejected_fraction": {"long_name": f"fraction of tested windows whose isotropy test rejects at "
                                                    f"{ISOTROPY_LEVEL:.0%} over {over}", "units": "1"},
        "isotropy_tested_count": {"long_name": f"windows with an isotropy test among {over}", **count},
        "diffusivity_major": {"long_name": f"major principal value of the mean diffusivity tensor over {over}",
                              "units": "m2 s-1", "cell_methods": "area: mean (tensor components)"},
        "diffusivity_minor": {"long_name": f"minor principal value of the mean diffusivity tensor over {over}",
                              "units": "m2 s-1", "cell_methods": "area: mean (tensor components)"},
        "diffusivity_angle_deg": {"long_name": f"major axis of the mean diffusivity tensor over {over}",
                                  "units": "degree", "comment": f"{axial}; NaN where the mean tensor is isotropic",
                                  "cell_methods": "area: mean (tensor components)"},
        "diffusivity_tensor_count": {"long_name": f"windows in the mean diffusivity tensor among {over}", **count},
    }


def add_anisotropy_variables(ds: xr.Dataset, summaries: dict, over: str = "windows in the cell") -> xr.Dataset:
    """Write :func:`anisotropy_summary` dicts keyed by ``(iy, ix)`` into ``ds`` as CF variables (in place)."""
    ny, nx = ds.sizes["lat"], ds.sizes["lon"]
    for name, attrs in anisotropy_attrs(over).items():
        is_count = name.endswith("_count")
        a = np.zeros((ny, nx), np.int32) if is_count else np.full((ny, nx), np.nan)
        for (iy, ix), summ in summaries.items():
            a[iy, ix] = summ.get(name, 0 if is_count else np.nan)
        ds[name] = (("lat", "lon"), a, attrs)
    return ds


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
    requested = list(params) if params else default_params(fits)
    missing = [p for p in requested if p not in fits]
    if missing:
        raise InputError(f"fits table has no column(s) {', '.join(missing)}")
    summarise = any(c in fits for c in ANISOTROPY_INPUTS) and (not params or bool(set(requested) &
                                                                                    set(ANISOTROPY_INPUTS)))
    axial = [p for p in requested if p in AXIAL_COLUMNS and p not in ANISOTROPY_INPUTS]
    if not params:
        axial = [c for c in AXIAL_COLUMNS if c in fits and c not in ANISOTROPY_INPUTS]
    params = [p for p in requested if p not in ANISOTROPY_INPUTS and p not in AXIAL_COLUMNS]
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
    for p in [*params, *axial, *(c for c in ANISOTROPY_INPUTS if summarise and c in fits)]:
        frame[p] = ok[p].to_numpy(float)[inside]
    grouped = frame.groupby("cell")
    for p in axial:
        mean, spread, conc, n = (np.full(ny * nx, np.nan) for _ in range(4))
        for c, g in grouped[p]:
            mean[c], conc[c], n[c] = axial_mean(g.to_numpy())
        spread = axial_spread_deg(conc)
        ds[p] = (("lat", "lon"), mean.reshape(ny, nx),
                 {"long_name": f"axial mean of {p} over windows in the cell", "units": "degree",
                  "comment": "axial direction, degrees counterclockwise from east, in [-90, 90); mean direction of "
                             "the doubled angles, halved", "cell_methods": "area: mean (axial)"})
        ds[p + "_spread"] = (("lat", "lon"), spread.reshape(ny, nx),
                             {"long_name": f"circular standard deviation of {p} (axial: sqrt(-2 ln R) / 2)",
                              "units": "degree"})
        ds[p + "_concentration"] = (("lat", "lon"), conc.reshape(ny, nx),
                                    {"long_name": f"mean resultant length R of the doubled {p} (1: one axis, "
                                                  "0: none)", "units": "1"})
        ds[p + "_count"] = (("lat", "lon"), np.nan_to_num(n).astype(np.int32).reshape(ny, nx),
                            {"long_name": f"number of finite {p} values", "units": "1",
                             "standard_name": "number_of_observations"})
    if summarise:
        add_anisotropy_variables(ds, {(c // nx, c % nx): anisotropy_summary(g) for c, g in frame.groupby("cell")})
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
    if "status" not in fits and {"time", "lat", "lon"} <= set(fits.columns):
        raise InputError(f"{path}: this is a table of position fixes, not fits; give the table `driftspec fit` "
                         "wrote (one row per window)")
    try:
        ds = grid_fits(fits, params, bin_deg, stat, units)
    except InputError as exc:
        raise InputError(f"{path}: {exc}") from None
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
