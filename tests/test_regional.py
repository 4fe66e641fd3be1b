"""Regional products: gridded CF maps, observed dispersion against the model diffusivity, ellipses."""

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from driftspec.analysis import fit_series, simulate
from driftspec.analysis.regional import grid_fits, grid_fits_file
from driftspec.analysis.regional.dispersion import model_diffusivity, single_particle_dispersion
from driftspec.analysis.tracks.ellipse import variance_ellipse

HOUR = 3600.0


def _fits_table(rng, n=400):
    return pd.DataFrame({
        "track_id": [f"T{i % 17}" for i in range(n)],
        "window_start": pd.Timestamp("2030-01-01") + pd.to_timedelta(np.arange(n), unit="D"),
        "window_end": pd.Timestamp("2030-02-01") + pd.to_timedelta(np.arange(n), unit="D"),
        "lat": rng.uniform(-10, 30, n), "lon": rng.uniform(170, 200, n) % 360,
        "status": np.where(rng.uniform(size=n) < 0.85, "ok", "at_bound"), "model": "matern",
        "matern_alpha": rng.normal(1.3, 0.1, n), "diffusivity": rng.lognormal(7, 0.5, n),
    })


def test_gridded_counts_and_medians(rng):
    fits = _fits_table(rng)
    ds = grid_fits(fits, ["matern_alpha", "diffusivity"], bin_deg=5.0, stat="median",
                   units={"diffusivity": "m2 s-1"})
    ok = fits[fits["status"] == "ok"]
    assert int(ds["count"].sum()) == len(ok)  # every ok fit inside the grid is counted once
    assert ds["count"].attrs["standard_name"] == "number_of_observations"
    # a cell checked by hand with pandas: the antimeridian is handled (lon 190 -> -170)
    lon = ((ok["lon"] + 180) % 360) - 180
    cell = ok[(ok["lat"] >= 10) & (ok["lat"] < 15) & (lon >= -175) & (lon < -170)]
    got = ds["matern_alpha"].sel(lat=12.5, lon=-172.5).item()
    assert got == pytest.approx(cell["matern_alpha"].median())
    assert ds["matern_alpha_spread"].sel(lat=12.5, lon=-172.5).item() == pytest.approx(
        cell["matern_alpha"].quantile(0.75) - cell["matern_alpha"].quantile(0.25))
    assert ds["diffusivity"].attrs["units"] == "m2 s-1"
    assert ds["diffusivity"].attrs["cell_methods"] == "area: median"
    assert ds["lat"].attrs["bounds"] == "lat_bnds"


def test_map_file_is_cf_netcdf_with_provenance(tmp_path, rng):
    from driftspec.analysis.io.tables import write_table

    path = write_table(_fits_table(rng), tmp_path / "fits.parquet", {"diffusivity": "m2 s-1"})
    out = tmp_path / "map.nc"
    grid_fits_file(path, bin_deg=2.0, stat="mean", out=out, command="driftspec map fits.parquet")
    ds = xr.open_dataset(out)
    assert ds.attrs["Conventions"].startswith("CF-")
    assert "sha256" in ds.attrs["source"] and "driftspec map" in ds.attrs["history"]
    assert set(ds.data_vars) >= {"count", "matern_alpha", "matern_alpha_spread", "diffusivity", "lat_bnds"}
    assert ds["diffusivity"].attrs["units"] == "m2 s-1" and ds["diffusivity"].attrs["cell_methods"] == "area: mean"
    # reads back with xarray alone and the bounds enclose the centres
    assert bool(((ds["lat_bnds"][:, 0] < ds["lat"]) & (ds["lat"] < ds["lat_bnds"][:, 1])).all())


def test_variance_ellipse_of_rotated_series(rng):
    # two independent series with variances 4 and 1, rotated by 30 degrees: known ellipse; and the same
    # numbers from numpy's eigen-decomposition of the 2x2 covariance
    a = rng.normal(0, 2.0, 200_000)
    b = rng.normal(0, 1.0, 200_000)
    th = np.deg2rad(30.0)
    z = (a + 1j * b) * np.exp(1j * th) + (0.3 - 0.1j)
    e = variance_ellipse(z)
    assert e["var_major"] == pytest.approx(4.0, rel=0.02)
    assert e["var_minor"] == pytest.approx(1.0, rel=0.02)
    assert e["ellipse_angle_deg"] == pytest.approx(30.0, abs=0.5)
    assert e["anisotropy_ratio"] == pytest.approx(4.0, rel=0.03)
    d = z - z.mean()
    w, vecs = np.linalg.eigh(np.cov(np.vstack([d.real, d.imag]), bias=True))
    assert e["var_major"] == pytest.approx(w[1]) and e["var_minor"] == pytest.approx(w[0])
    ang = np.degrees(np.arctan2(vecs[1, 1], vecs[0, 1]))
    assert (e["ellipse_angle_deg"] - ang + 90) % 180 - 90 == pytest.approx(0, abs=1e-6)


def _ou_tracks(n_tracks, days, var, lam, seed):
    rng = np.random.default_rng(seed)
    n = int(days * 24)
    z = simulate("matern", [var, 1.0, lam], n=n, dt=HOUR, seed=rng, size=n_tracks)
    t = pd.Timestamp("2030-01-01") + pd.to_timedelta(np.arange(n), unit="h")
    return pd.concat([pd.DataFrame({"id": f"S{k:03d}", "segment": 0, "time": t, "lat": 20.0, "lon": -140.0,
                                    "u": z[k].real + 0.05, "v": z[k].imag, "valid": True})
                      for k in range(n_tracks)], ignore_index=True)


def test_dispersion_plateau_and_model_diffusivity_match_taylor():
    # Taylor (1921): for an exponential velocity autocorrelation kappa = sigma_u^2 T_L per component
    var, lam = 0.02, 0.5  # m^2/s^2 (E|z|^2), 1/day
    kappa_true = var / 2 * 86400 / lam
    vel = _ou_tracks(40, 120, var, lam, seed=3)
    res = single_particle_dispersion(vel, region=(-150, 10, -130, 30), max_lag_days=20, plateau_lags=(8, 16),
                                     n_boot=100)
    assert res.n_tracks == 40
    assert res.mean_velocity.real == pytest.approx(0.05, abs=0.01)  # the mean flow is removed
    assert res.plateau == pytest.approx(kappa_true, rel=0.15)
    assert res.plateau_lower < kappa_true < res.plateau_upper
    # model-based: fits of 60-day windows
    rows = []
    for _, g in vel.groupby("id"):
        zz = (g["u"] + 1j * g["v"]).to_numpy()[:1440]
        r = fit_series(zz, HOUR, model="matern")
        rows.append({"lat": 20.0, "lon": -140.0, "status": r.status, "diffusivity": r.diffusivity})
    med, n = model_diffusivity(pd.DataFrame(rows), region=(-150, 10, -130, 30))
    assert n >= 35
    assert med == pytest.approx(kappa_true, rel=0.2)
