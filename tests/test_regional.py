"""Regional products: gridded CF maps, observed dispersion against the model diffusivity, ellipses."""

import numpy as np
import pandas as pd
import pytest
import scipy.stats
import xarray as xr

from driftspec.analysis import fit_series, simulate
from driftspec.analysis.regional import grid_fits, grid_fits_file
from driftspec.analysis.regional.dispersion import model_diffusivity, single_particle_dispersion
from driftspec.analysis.regional.maps import axial_mean
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
    assert res.levelled_off and res.plateau_note() == ""  # kappa_true - kappa(8 d) = kappa_true e^(-4): flat
    # model-based: fits of 60-day windows
    rows = []
    for _, g in vel.groupby("id"):
        zz = (g["u"] + 1j * g["v"]).to_numpy()[:1440]
        r = fit_series(zz, HOUR, model="matern")
        rows.append({"lat": 20.0, "lon": -140.0, "status": r.status, "diffusivity": r.diffusivity})
    med, n = model_diffusivity(pd.DataFrame(rows), region=(-150, 10, -130, 30))
    assert n >= 35
    assert med == pytest.approx(kappa_true, rel=0.2)


def test_dispersion_says_when_kappa_has_not_levelled_off():
    # the same tracks, each carried by its own constant velocity (sd 0.05 m/s per component) on top: one mean
    # velocity per region removes only their average, so every track keeps a ballistic part u0 tau, whose dispersion
    # u0^2 tau^2 adds u0^2 tau to kappa (Taylor 1921, for a velocity correlated at every lag): kappa rises by
    # E[u0^2] times the 4 days between the two halves of the 8-16-day lags, about 860 m^2/s, and no plateau is claimed
    rng = np.random.default_rng(8)
    vel = _ou_tracks(40, 120, 0.02, 0.5, seed=3)
    offsets = {k: rng.normal(0, 0.05, 2) for k in vel["id"].unique()}
    vel["u"] += vel["id"].map(lambda k: offsets[k][0])
    vel["v"] += vel["id"].map(lambda k: offsets[k][1])
    u0 = np.array(list(offsets.values()))
    expected = np.mean((u0 - u0.mean(axis=0)) ** 2) * 4 * 86400
    res = single_particle_dispersion(vel, region=(-150, 10, -130, 30), max_lag_days=20, plateau_lags=(8, 16),
                                     n_boot=100)
    assert not res.levelled_off and res.rise_lower > 0
    assert 0.6 * expected < res.rise < 1.5 * expected, (res.rise, expected)
    assert "still rising" in res.plateau_note()


def _anisotropic_table(rng, n=600):
    """Rows as ``driftspec fit --anisotropic`` writes them (selected rows): about half the windows anisotropic with
    axes scattered around north-south (so across the -90/90 seam), the others isotropic (angle NaN, equal principal
    values), a few untested (isotropy_pvalue NaN, as for irregular fixes)."""
    aniso = rng.uniform(size=n) < 0.5
    axis = (rng.normal(88.0, 12.0, n) + 90.0) % 180.0 - 90.0
    major = rng.lognormal(7.0, 0.4, n)
    rho = rng.uniform(0.2, 0.7, n)
    minor = np.where(aniso, major * (1 - rho) / (1 + rho), major)
    pval = np.where(aniso, rng.uniform(0, 0.01, n), rng.uniform(0.01, 1, n))
    pval[rng.uniform(size=n) < 0.05] = np.nan
    return pd.DataFrame({
        "lat": rng.uniform(0, 10, n), "lon": rng.uniform(-20, -10, n), "status": "ok",
        "model": np.where(aniso, "anisotropic_matern", "matern"), "isotropy_pvalue": pval,
        "anisotropy": np.where(aniso, rho, np.nan), "anisotropy_angle_deg": np.where(aniso, axis, np.nan),
        "diffusivity_major": major, "diffusivity_minor": minor,
        "diffusivity_angle_deg": np.where(aniso, axis, np.nan), "diffusivity": 0.5 * (major + minor),
        "ellipse_angle_deg": axis,
    })


def test_axial_mean_is_not_the_arithmetic_mean():
    # axes at 85 and -85 degrees are 10 degrees apart about north-south: their mean axis is +-90 (north-south), not
    # the 0 (east-west) of a plain average
    mean, r, n = axial_mean([85.0, -85.0])
    assert abs(mean) == pytest.approx(90.0) and n == 2
    assert r == pytest.approx(np.cos(np.radians(10.0)))  # |mean of exp(2i theta)| = cos(10 degrees)
    assert axial_mean([10.0, 10.0 + 180.0])[0] == pytest.approx(10.0)  # an axis and its reverse are one axis
    assert np.isnan(axial_mean([0.0, 90.0])[0])  # crossed axes: no mean axis


def test_anisotropy_map_against_scipy_circmean_and_numpy_eigh(rng, tmp_path):
    from driftspec.analysis.io.tables import write_table

    fits = _anisotropic_table(rng)
    path = write_table(fits, tmp_path / "fits.parquet", {"diffusivity_major": "m2 s-1"})
    out = tmp_path / "map.nc"
    grid_fits_file(path, bin_deg=5.0, out=out, command="driftspec map fits.parquet")
    ds = xr.open_dataset(out)  # real netCDF, read back with xarray
    lon = fits["lon"].to_numpy()
    for lat0 in (0.0, 5.0):
        for lon0 in (-20.0, -15.0):
            cell = fits[(fits["lat"] >= lat0) & (fits["lat"] < lat0 + 5) & (lon >= lon0) & (lon < lon0 + 5)]
            got = ds.sel(lat=lat0 + 2.5, lon=lon0 + 2.5)
            # axial mean: scipy.stats.circmean of the doubled angles (radians, period 2 pi), halved
            ang = cell["anisotropy_angle_deg"].dropna().to_numpy()
            ref = np.degrees(scipy.stats.circmean(np.radians(2 * ang), high=2 * np.pi, low=0.0) / 2)
            ref = (ref + 90) % 180 - 90
            assert (float(got["anisotropy_angle_deg"]) - ref + 90) % 180 - 90 == pytest.approx(0, abs=1e-9)
            # a plain mean of angles scattered about +-90 lands near 0 (east-west): far from the axial mean
            assert abs(np.mean(ang)) < 45 < abs(float(got["anisotropy_angle_deg"]))
            # mean resultant length R = 1 - scipy.stats.circvar; circular standard deviation scipy.stats.circstd / 2
            assert float(got["anisotropy_angle_deg_concentration"]) == pytest.approx(
                1 - scipy.stats.circvar(np.radians(2 * ang)), rel=1e-9)
            assert float(got["anisotropy_angle_deg_spread"]) == pytest.approx(
                np.degrees(scipy.stats.circstd(np.radians(2 * ang)) / 2), rel=1e-9)
            assert int(got["anisotropy_angle_deg_count"]) == ang.size
            ell = cell["ellipse_angle_deg"].to_numpy()
            ref = np.degrees(scipy.stats.circmean(np.radians(2 * ell), high=2 * np.pi, low=0.0) / 2)
            assert (float(got["ellipse_angle_deg"]) - ref + 90) % 180 - 90 == pytest.approx(0, abs=1e-9)
            # tensor: each window's K = R diag(major, minor) R^T built with rotation matrices, averaged, and
            # diagonalised by numpy.linalg.eigh (isotropic windows: K = major I, whatever their NaN angle)
            ks = []
            for _, r in cell.iterrows():
                phi = np.radians(np.nan_to_num(r["diffusivity_angle_deg"]))
                rot = np.array([[np.cos(phi), -np.sin(phi)], [np.sin(phi), np.cos(phi)]])
                ks.append(rot @ np.diag([r["diffusivity_major"], r["diffusivity_minor"]]) @ rot.T)
            w, v = np.linalg.eigh(np.mean(ks, axis=0))
            assert float(got["diffusivity_major"]) == pytest.approx(w[1], rel=1e-9)
            assert float(got["diffusivity_minor"]) == pytest.approx(w[0], rel=1e-9)
            ref = np.degrees(np.arctan2(v[1, 1], v[0, 1]))
            assert (float(got["diffusivity_angle_deg"]) - ref + 90) % 180 - 90 == pytest.approx(0, abs=1e-6)
            assert int(got["diffusivity_tensor_count"]) == len(cell)
            # the trace is linear: the mean tensor's mean principal value is the mean of the windows' diffusivity
            assert 0.5 * (w[0] + w[1]) == pytest.approx(cell["diffusivity"].mean(), rel=1e-9)
            # median anisotropy, isotropic selections after a test counting as 0 (counted by hand with pandas)
            tested = cell["isotropy_pvalue"].notna()
            rho = cell["anisotropy"].where(cell["anisotropy"].notna(), 0.0)[tested | cell["anisotropy"].notna()]
            assert float(got["anisotropy"]) == pytest.approx(rho.median())
            assert float(got["isotropy_rejected_fraction"]) == pytest.approx(
                (cell["isotropy_pvalue"][tested] < 0.01).mean())
    # CF attributes: units and long names; angles in degrees with the axial convention in a comment
    for name in ("anisotropy", "anisotropy_angle_deg", "isotropy_rejected_fraction", "diffusivity_major",
                 "diffusivity_minor", "diffusivity_angle_deg", "ellipse_angle_deg"):
        assert ds[name].attrs["long_name"] and "units" in ds[name].attrs, name
    for name in ("anisotropy_angle_deg", "diffusivity_angle_deg", "ellipse_angle_deg"):
        assert ds[name].attrs["units"] == "degree" and "counterclockwise from east" in ds[name].attrs["comment"]
    assert ds["diffusivity_major"].attrs["units"] == "m2 s-1"
    # the angles are not also gridded as plain numbers
    assert "diffusivity_angle_deg_spread" not in ds and "isotropy_pvalue" not in ds


def test_isotropic_bin_has_equal_principal_values_and_no_axis(rng):
    fits = _anisotropic_table(rng, n=50)
    iso = fits[fits["model"] == "matern"].assign(lat=1.0, lon=1.0)
    ds = grid_fits(iso, bin_deg=2.0, lat_range=(0, 2), lon_range=(0, 2))
    cell = ds.isel(lat=0, lon=0)
    assert float(cell["diffusivity_major"]) == pytest.approx(float(cell["diffusivity_minor"]))
    assert float(cell["diffusivity_major"]) == pytest.approx(iso["diffusivity_major"].mean())
    assert np.isnan(float(cell["diffusivity_angle_deg"])) and int(cell["anisotropy_angle_deg_count"]) == 0
    assert float(cell["anisotropy"]) == 0.0 and float(cell["isotropy_rejected_fraction"]) == 0.0
