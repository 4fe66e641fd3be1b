"""Static figures for reports (matplotlib and cartopy), drawn with the shipped shoreline."""

from __future__ import annotations

from pathlib import Path

import numpy as np


def _mpl():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def quicklook_map(ds, png, param: str | None = None, return_projection: bool = False):
    """A map of one gridded variable of a ``grid_fits`` dataset, with bins, shoreline, filled land and labelled
    graticule, in the projection the dashboard would choose for the same extent (Mercator, or polar
    stereographic beyond 60° of latitude; :func:`driftspec.app.geo.choose_projection`).

    Returns the PNG's path (and the chosen :class:`~driftspec.app.geo.MapProjection` when asked).
    """
    import cartopy.crs as ccrs
    import cartopy.feature as cfeature

    from .coastline import configure_cartopy
    from .geo import choose_projection

    configure_cartopy()
    plt = _mpl()
    names = [v for v in ds.data_vars if v not in ("count", "lat_bnds", "lon_bnds")
             and not v.endswith(("_spread", "_count"))]
    param = param or ("matern_alpha" if "matern_alpha" in names else names[0])
    lon_e = np.r_[ds["lon_bnds"].values[:, 0], ds["lon_bnds"].values[-1, 1]]
    lat_e = np.r_[ds["lat_bnds"].values[:, 0], ds["lat_bnds"].values[-1, 1]]
    has = ds["count"].values > 0
    rows, cols = np.flatnonzero(has.any(1)), np.flatnonzero(has.any(0))
    glon, glat = np.meshgrid(ds["lon"].values, ds["lat"].values)
    proj = choose_projection(glon[has], glat[has])
    fig = plt.figure(figsize=(9, 5.5 if proj.cylindrical else 7.5), dpi=120)
    ax = fig.add_subplot(1, 1, 1, projection=proj.crs)
    vals = np.where(has, ds[param].values, np.nan)
    mesh = ax.pcolormesh(lon_e, lat_e, vals, transform=ccrs.PlateCarree(), cmap="cividis", shading="flat")
    ax.add_feature(cfeature.GSHHSFeature(scale="c", levels=[1], facecolor="#d9d4c7", edgecolor="#555"))
    if rows.size and cols.size:
        pad = 2 * float(ds.attrs.get("bin_size_degrees", 2.0))
        ax.set_extent([lon_e[cols[0]] - pad, lon_e[cols[-1] + 1] + pad, max(lat_e[rows[0]] - pad, -89.5),
                       min(lat_e[rows[-1] + 1] + pad, 89.5)], crs=ccrs.PlateCarree())
    grid = ax.gridlines(draw_labels=True, linewidth=0.4, color="#888", linestyle="--")
    if proj.cylindrical:  # labels left and below; the colour bar is on the right
        grid.top_labels = grid.right_labels = False
    unit = ds[param].attrs.get("units", "")
    fig.colorbar(mesh, ax=ax, shrink=0.8, label=f"{ds[param].attrs.get('cell_methods', '')} {param} ({unit})")
    ax.set_title(f"{param}: {int(ds['count'].sum())} ok window fits in {ds.attrs.get('bin_size_degrees')}° bins")
    fig.savefig(png, bbox_inches="tight")
    plt.close(fig)
    return (Path(png), proj) if return_projection else Path(png)


def dispersion_figure(res, png, model_kappa: float | None = None) -> Path:
    """kappa(tau) with its bootstrap band, the plateau, and the model-based value."""
    plt = _mpl()
    fig, ax = plt.subplots(figsize=(7, 4.2), dpi=120)
    ax.fill_between(res.lag_days, res.kappa_lower, res.kappa_upper, color="#1f7a7a", alpha=0.2,
                    label="95% bootstrap over tracks")
    ax.plot(res.lag_days, res.kappa, color="#1f7a7a", lw=2, label="observed κ(τ)")
    a, b = res.plateau_lags
    ax.hlines(res.plateau, a, b, color="#20203a", lw=3, label=f"plateau {res.plateau:.0f} m²/s")
    if model_kappa is not None and np.isfinite(model_kappa):
        ax.axhline(model_kappa, color="#b5522b", ls="--", lw=1.5, label=f"model (median fit) {model_kappa:.0f} m²/s")
    ax.set_xlabel("lag τ (days)")
    ax.set_ylabel("diffusivity per component (m²/s)")
    ax.set_title(f"single-particle diffusivity, {res.n_tracks} track segments")
    ax.legend(frameon=False, fontsize=8)
    ax.grid(alpha=0.3)
    fig.savefig(png, bbox_inches="tight")
    plt.close(fig)
    return Path(png)
