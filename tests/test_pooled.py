"""Pooled (composite-likelihood) fits over a region's windows: estimates against a known simulated truth, standard
errors against the 1/sqrt(n) law, the heterogeneity test against its chi-squared null and a two-regime
alternative, the block elimination against a dense inverse, a single window against fit_window, the command line.

Simulations: complex velocity from driftspec.analysis.simulate (circulant embedding), hourly, measured velocities
(observation "none"); 60-day drifters cut into 30-day windows with 50 % overlap (3 windows per drifter), each
drifter at its own latitude (so its own inertial frequency) and with its own amplitudes.
"""

import re
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import scipy.stats
import xarray as xr

from driftspec.analysis import FitSpec, Window, fit_window, inertial_frequency_cpd, simulate
from driftspec.analysis.fitting.estimators import DebiasedEstimator, to_x
from driftspec.analysis.regional.pooled import OFFSET, heterogeneity_test, pool_fit, pool_map, prepare_pooled_window

HOUR = 3600.0
T0 = pd.Timestamp("2030-01-01")
TRUTH = {"matern_alpha": 1.2, "matern_damping": 1.0, "inertial_damping": 0.15, OFFSET: 0.02}
SPEC = FitSpec(models=("matern+inertial",), velocity="measured", observation="none", inertial_frequency="free")


def drifters(n_tracks, seed, days=60, window_days=30, overlap=0.5, alpha=None, lon=-30.0):
    """Windows of ``n_tracks`` simulated drifters sharing TRUTH (``alpha``: per-drifter slopes instead)."""
    rng = np.random.default_rng(seed)
    n, length = int(days * 24), int(window_days * 24)
    hop = int(length * (1 - overlap))
    out = []
    for t in range(n_tracks):
        lat = rng.uniform(20, 40)
        fc = inertial_frequency_cpd(lat)
        a = TRUTH["matern_alpha"] if alpha is None else alpha[t]
        theta = [rng.uniform(0.01, 0.04), a, TRUTH["matern_damping"], rng.uniform(0.005, 0.02),
                 fc + TRUTH[OFFSET], TRUTH["inertial_damping"]]
        z = simulate("matern+inertial", theta, n=n, dt=HOUR, seed=rng)
        for k, s in enumerate(range(0, n - length + 1, hop)):
            out.append(Window(f"D{seed}-{t}", 0, k, T0 + pd.Timedelta(hours=s), T0 + pd.Timedelta(hours=s + length - 1),
                              HOUR, z[s:s + length].copy(), np.full(length, lat), np.full(length, lon)))
    return out


@pytest.fixture(scope="module")
def shared40():
    return drifters(40, seed=11)


def test_estimates_near_truth_and_errors_shrink_as_one_over_root_n(shared40):
    small = pool_fit(shared40[:30], SPEC)  # 10 drifters, 30 windows
    large = pool_fit(shared40, SPEC)  # 40 drifters, 120 windows
    for res in (small, large):
        assert res.status == "ok", res.message
        assert res.stderr_method == "cluster" and res.n_tracks in (10, 40)
        # the simulated truth lies within about two standard errors (3 allows for four parameters at once)
        for k, v in TRUTH.items():
            assert abs(res.params[k] - v) < 3 * res.stderr[k], (k, res.params[k], res.stderr[k])
    # composite-likelihood asymptotics over independent clusters (Varin, Reid & Firth 2011, section 2.3): the
    # variance falls as 1 / (number of clusters): 4 times the drifters, half the standard error
    ratios = [small.stderr[k] / large.stderr[k] for k in TRUTH]
    assert 1.4 < np.median(ratios) < 2.8, ratios
    # the amplitudes are per window: one row per window with its own variances
    assert len(large.windows) == 120 and large.windows["matern_variance"].nunique() == 120


def test_heterogeneity_rejects_two_slopes_and_keeps_a_shared_truth(shared40):
    # the score form of Cochran's homogeneity statistic, referred to a scaled chi-squared (Satterthwaite) whose
    # degrees of freedom are at most (drifters - 1) x parameters (fewer where the scores have heavy tails)
    same = pool_fit(shared40[:60], SPEC)
    assert same.heterogeneity_groups == "tracks" and 0.3 * 76 < same.heterogeneity_df < 1.1 * 76
    assert same.heterogeneity_pvalue > 0.05
    # the statistic is of the size of its degrees of freedom (chi-squared mean df, sd sqrt(2 df))
    df = same.heterogeneity_df
    assert abs(same.heterogeneity_statistic - df) < 3 * np.sqrt(2 * df)
    two = pool_fit(drifters(20, seed=12, alpha=[1.0] * 10 + [1.5] * 10), SPEC)
    df = two.heterogeneity_df
    assert two.heterogeneity_pvalue < 0.01 and two.heterogeneity_statistic > df + 5 * np.sqrt(2 * df)


def _gaussian_groups(rng, n_groups, p, n_sim):
    """Informations of ``n_groups`` groups, scores of the groups at the pooled estimate (``u = Q v``) and
    ``n_sim`` simulated scores ``v``, all Gaussian with covariance equal to the information (a correctly specified
    likelihood), from numpy alone."""
    info = []
    for _ in range(n_groups):
        m = rng.normal(size=(p, p))
        info.append(m @ m.T + p * np.eye(p))
    info = np.array(info)
    chol = np.linalg.cholesky(info)
    v = np.einsum("gab,ngb->nga", chol, rng.normal(size=(n_sim + 1, n_groups, p)))
    h = info.sum(axis=0)
    u = v[0] - np.einsum("gab,bc,c->ga", info, np.linalg.inv(h), v[0].sum(axis=0))
    return u, info, v[1:]


def test_heterogeneity_statistic_against_rao_and_uniform_pvalues():
    rng = np.random.default_rng(3)
    n_groups, p = 6, 2
    # with the score covariance equal to the information, Rao's statistic u^T (Q J Q^T)^+ u (numpy's pseudo-inverse
    # of the dense matrices) is chi-squared with (groups - 1) p degrees of freedom, and the Satterthwaite reference
    # recovers that (from 4000 simulated score sets, to Monte Carlo error)
    u, info, v = _gaussian_groups(rng, n_groups, p, 4000)
    d = np.zeros((n_groups * p, n_groups * p))
    for g in range(n_groups):
        d[g * p:(g + 1) * p, g * p:(g + 1) * p] = info[g]
    m = np.tile(np.eye(p), (n_groups, 1))
    q = np.eye(n_groups * p) - d @ m @ np.linalg.solve(m.T @ d @ m, m.T)
    rao = float(u.ravel() @ np.linalg.pinv(q @ d @ q.T, rcond=1e-10, hermitian=True) @ u.ravel())
    stat, df, pval = heterogeneity_test(u, info, v)
    assert df == pytest.approx((n_groups - 1) * p, rel=0.1)
    assert stat == pytest.approx(rao * df / ((n_groups - 1) * p), rel=0.1)
    assert pval == pytest.approx(scipy.stats.chi2.sf(rao, (n_groups - 1) * p), abs=0.03)
    # under the null the p-values are uniform (Kolmogorov-Smirnov, scipy.stats.kstest), with few simulated score
    # sets per call as in the pooled fits of many drifters
    pvals = [heterogeneity_test(*_gaussian_groups(rng, 30, p, 16))[2] for _ in range(300)]
    assert scipy.stats.kstest(pvals, "uniform").pvalue > 0.01
    assert 0.02 < np.mean(np.array(pvals) < 0.05) < 0.09


def test_heterogeneity_check_holds_its_level_on_drifters_moved_by_their_own_eddies():
    # drifters as real ones move (the scenario simulator: positions integrated on the sphere every 5 minutes, fixed
    # hourly with 20 m errors, the inertial oscillation at the local inertial frequency of each drifter's own path,
    # which its eddying background moves about a degree in 30 days), sharing a spectral shape with their own
    # amplitudes: at the 5 % level the check rejects 20 such sets of 12 drifters no more often than chance allows
    # (binomial(20, 0.05): four or more rejections has probability scipy.stats.binom.sf(3, 20, 0.05) = 0.016). When
    # the oscillation followed only the mean drift's latitude, each drifter's peak sat off the frequency its path
    # gives by a different amount, and 14 of the 20 were rejected.
    from driftspec.analysis.simulation.scenarios import generate_scenario
    from driftspec.analysis.tracks.pipeline import load_velocities
    from driftspec.analysis.tracks.windows import iter_windows

    shape = {"matern_alpha": 1.35, "matern_damping": 0.8, "inertial_damping": 0.2}
    spec = FitSpec(models=("matern+inertial",))
    pvals = []
    for r in range(20):
        fixes, _ = generate_scenario("satellite", n_tracks=12, days=60, seed=5000 + r, shape=shape, sampling="hourly")
        vel, _, _ = load_velocities(fixes)
        windows = [w for _, v in vel.groupby("id", sort=True) for w in iter_windows(v, 30.0, 0.5, 0.5)]
        res = pool_fit(windows, spec)
        assert res.status == "ok" and res.heterogeneity_groups == "tracks", res.message
        pvals.append(res.heterogeneity_pvalue)
    assert np.sum(np.array(pvals) < 0.05) <= 3, np.round(pvals, 3)


def test_schur_elimination_matches_a_dense_inverse():
    # five drifters, one complete window each: the profiled information S (Schur complement over the per-window
    # blocks) inverts to the shared block of the inverse of the whole (shared + every window's amplitudes) Fisher
    # information, built densely here from each window's own DebiasedEstimator.fisher and inverted by numpy
    ws = [drifters(1, seed=20 + i, days=30)[0] for i in range(5)]
    res = pool_fit(ws, SPEC)
    assert res.status == "ok" and res.stderr_method == "model"
    names = list(TRUTH)
    nuis = ["matern_variance", "inertial_variance"]
    size = len(names) + len(nuis) * len(ws)
    dense = np.zeros((size, size))
    for w, win in enumerate(ws):
        pw = prepare_pooled_window(win, SPEC)
        fam = pw.problem.family
        row = res.windows.iloc[w]
        theta = {**{k: row[k] for k in nuis}, "inertial_frequency": row["inertial_frequency"],
                 **{k: res.params[k] for k in names if k != OFFSET}}
        x = to_x([theta[k] for k in fam.names], fam)
        f = DebiasedEstimator().fisher(pw.problem, x)
        idx = [names.index(OFFSET) if k == "inertial_frequency" else
               (names.index(k) if k in names else len(names) + len(nuis) * w + nuis.index(k)) for k in fam.names]
        dense[np.ix_(idx, idx)] += f
    order = [names.index(k) for k in res.params]
    np.testing.assert_allclose(np.linalg.inv(res.information),
                               np.linalg.inv(dense)[np.ix_(order, order)], rtol=1e-6, atol=1e-12)


def differenced_window(seed, lat=30.0):
    """30 days of hourly central-difference velocities, (x(t + 1 h) - x(t - 1 h)) / 2 h, of positions integrated
    from a velocity simulated every 10 minutes: what the observation model "differenced" describes."""
    theta = [0.02, 1.2, 1.0, 0.01, inertial_frequency_cpd(lat) + 0.02, 0.15]
    fine = simulate("matern+inertial", theta, n=6 * 722, dt=600.0, seed=seed)
    x = np.cumsum(fine) * 600.0
    t = np.arange(1, 721)
    z = (x[6 * (t + 1)] - x[6 * (t - 1)]) / (2 * HOUR)
    return Window("A", 0, 0, T0, T0 + pd.Timedelta(hours=719), HOUR, z, np.full(720, lat), np.full(720, -30.0))


@pytest.mark.parametrize("velocity, observation", [("measured", "none"), ("central", "differenced")])
def test_single_window_equals_fit_window(velocity, observation):
    # an independent computation: fit_window's own optimiser on the same window and specification
    spec = SPEC.replace(velocity=velocity, observation=observation)
    w = drifters(1, seed=5, days=30)[0] if velocity == "measured" else differenced_window(seed=6)
    single = fit_window(w, spec)[0]
    sandwich = fit_window(w, spec.replace(stderr="sandwich"))[0]
    pooled = pool_fit([w], spec)
    assert single.status == pooled.status == "ok"
    for k in ("matern_alpha", "matern_damping", "inertial_damping"):
        assert pooled.params[k] == pytest.approx(single.params[k], abs=0.02 * single.stderr[k])
        # model-based errors (score covariance of drifters simulated from the fit) against fit_window's sandwich
        # (its own simulation of the window): the same up to Monte Carlo error
        assert 0.5 < pooled.stderr[k] / sandwich.stderr[k] < 2.0
    f_local = inertial_frequency_cpd(w.lat)
    assert pooled.params[OFFSET] + f_local == pytest.approx(single.params["inertial_frequency"],
                                                            abs=0.02 * single.stderr["inertial_frequency"])
    for k in ("matern_variance", "inertial_variance"):
        assert pooled.windows[k].iloc[0] == pytest.approx(single.params[k], abs=0.02 * single.stderr[k])
    assert np.isnan(pooled.heterogeneity_pvalue)  # one window: nothing to compare


def test_share_all_and_bad_options():
    ws = drifters(3, seed=7)
    res = pool_fit(ws, SPEC, share="all")  # the drifters' amplitudes differ: a bound may be met
    assert res.status in ("ok", "at_bound") and "matern_variance" in res.params and "matern_variance" not in res.windows
    with pytest.raises(ValueError, match="share must be"):
        pool_fit(ws, SPEC, share="some")
    with pytest.raises(ValueError, match="debiased Whittle"):
        pool_fit(ws, SPEC.replace(estimator="whittle"))
    assert pool_fit(ws[:1], SPEC, min_windows=2).status == "too_few_windows"


def test_pool_map_bins_and_cf_layout(tmp_path):
    # drifters at longitudes 30 W and 10 W (latitudes 20-40 N) land in two 20-degree bins
    ws = drifters(4, seed=8, lon=-30.0) + drifters(4, seed=9, lon=-10.0)
    ds = pool_map(ws, SPEC, bin_deg=20.0, region=(-40.0, 20.0, 0.0, 40.0), out=tmp_path / "p.nc", progress=False)
    back = xr.open_dataset(tmp_path / "p.nc")
    assert int(back["n_windows"].sum()) == len(ws) and int(back["n_tracks"].sum()) == 8
    assert back["n_windows"].attrs["standard_name"] == "number_of_observations"  # CF 1.11 appendix C
    for k in TRUTH:
        assert k in back and k + "_se" in back
    assert back["matern_damping"].attrs["units"] == "day-1" and back.attrs["Conventions"] == "CF-1.11"
    assert "heterogeneity_pvalue" in back and "flag_meanings" in back["pooled_status"].attrs
    assert not (tmp_path / "p.nc.partial").exists()
    # the map's cell equals a pooled fit of the same windows
    one = pool_fit(ws[:12], SPEC)
    cell = ds.sel(lat=30.0, lon=-30.0)
    assert float(cell["matern_alpha"]) == pytest.approx(one.params["matern_alpha"])
    with pytest.raises(ValueError, match="LAT0 < LAT1"):
        pool_map(ws, SPEC, bin_deg=20.0, region=(-40, 50, 0, 0), progress=False)


def test_command_line(tmp_path, demo_dir):
    def run(*args):
        return subprocess.run([sys.executable, "-m", "driftspec.app.cli", *map(str, args)], capture_output=True,
                              text=True, timeout=600)

    out = tmp_path / "pooled.nc"
    r = run("pool", demo_dir / "fixes.parquet", "--window-days", 60, "--bin-deg", 10, "--out", out, "--workers", 1,
            "--no-progress", "--region=-180,10,0,30")
    assert r.returncode == 0, r.stderr
    ds = xr.open_dataset(out)
    assert {"matern_alpha", "matern_alpha_se", "n_windows", "n_tracks", "heterogeneity_pvalue"} <= set(ds.data_vars)
    assert "sha256" in ds.attrs["source"] and "driftspec pool" in ds.attrs["history"]
    assert int(ds["n_windows"].sum()) > 0
    # --anisotropic: the per-bin anisotropy summaries of the windows' own fits, beside the pooled estimates
    r = run("pool", demo_dir / "fixes.parquet", "--window-days", 60, "--bin-deg", 10, "--out", out, "--workers", 1,
            "--no-progress", "--region=-180,10,0,30", "--anisotropic")
    assert r.returncode == 0, r.stderr
    ds = xr.open_dataset(out)
    assert {"anisotropy", "anisotropy_angle_deg", "isotropy_rejected_fraction", "diffusivity_major",
            "diffusivity_minor", "diffusivity_angle_deg"} <= set(ds.data_vars)
    assert int(ds["diffusivity_tensor_count"].sum()) > 0 and ds["anisotropy_angle_deg"].attrs["units"] == "degree"
    for bad in (["--bin-deg", 0], ["--bin-deg", 5, "--region", "1,2"], ["--bin-deg", 5, "--overlap", 1.5]):
        r = run("pool", demo_dir / "fixes.parquet", "--window-days", 30, "--out", out, *bad)
        assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1, r.stderr
    # a region no window falls in (the South Atlantic, far from every demo track): nothing to pool, so the map already
    # at --out stays byte for byte, exit status 2, and the count of windows outside agrees with the window census
    before = out.read_bytes()
    r = run("pool", demo_dir / "fixes.parquet", "--window-days", 60, "--bin-deg", 10, "--out", out, "--workers", 1,
            "--no-progress", "--region=-30,-40,0,-20")
    assert r.returncode == 2, r.stderr
    outside = re.search(r"no windows to pool inside the region \((\d+) windows?, all outside it\); (.+) is left as it "
                        r"was$", r.stderr.strip().splitlines()[-1])
    kept = re.search(r"windows: (\d+) of \d+ candidate windows? kept", r.stderr)
    assert outside and kept and int(outside.group(1)) == int(kept.group(1)) > 0, r.stderr
    assert outside.group(2) == str(out) and out.read_bytes() == before and not list(tmp_path.glob("*.partial"))


@pytest.mark.slow
def test_heterogeneity_size_over_replicates():
    # under a shared truth the score test rejects about 5 % of the time at the 5 % level (binomial band for 100
    # replicates: 1-11 %)
    p = [pool_fit(drifters(12, seed=1000 + r), SPEC).heterogeneity_pvalue for r in range(100)]
    assert 0.01 <= np.mean(np.array(p) < 0.05) <= 0.11


def test_pool_map_anisotropy_summaries_match_map_of_the_window_fits(tmp_path):
    # a 3:1 flow along an axis 30 degrees from east (two independent real Matern series, scaled and rotated, as in
    # tests/test_fitting.py): the pooled map's anisotropy summaries come from the windows' own anisotropic fits, so
    # they equal what grid_fits makes of the same windows fitted one by one (window_rows, the fits table's rows),
    # and the simulated axis is recovered
    from driftspec.analysis.fitting.batch import window_rows
    from driftspec.analysis.regional import grid_fits

    spec = FitSpec(models=("matern",), velocity="measured", observation="none", anisotropic=True)
    ws = []
    for t in range(3):
        along = simulate("matern", [0.03, 1.2, 1.0], n=1440, dt=HOUR, seed=40 + 2 * t, real=True)
        across = simulate("matern", [0.01, 1.2, 1.0], n=1440, dt=HOUR, seed=41 + 2 * t, real=True)
        z = np.exp(1j * np.deg2rad(30.0)) * (along + 1j * across)
        for k, s in enumerate((0, 360, 720)):
            ws.append(Window(f"A{t}", 0, k, T0 + pd.Timedelta(hours=s), T0 + pd.Timedelta(hours=s + 719), HOUR,
                             z[s:s + 720].copy(), np.full(720, 30.0), np.full(720, -30.0)))
    ds = pool_map(ws, spec, bin_deg=20.0, region=(-40.0, 20.0, 0.0, 40.0), out=tmp_path / "a.nc", progress=False)
    back = xr.open_dataset(tmp_path / "a.nc")
    cell = back.sel(lat=30.0, lon=-30.0)
    fits = pd.DataFrame([r for w in ws for r in window_rows(w, spec)])
    ref = grid_fits(fits, bin_deg=20.0, lat_range=(20.0, 40.0), lon_range=(-40.0, 0.0)).sel(lat=30.0, lon=-30.0)
    for k in ("anisotropy", "anisotropy_angle_deg", "isotropy_rejected_fraction", "diffusivity_major",
              "diffusivity_minor", "diffusivity_angle_deg", "diffusivity_tensor_count"):
        assert float(cell[k]) == pytest.approx(float(ref[k]), rel=1e-6, nan_ok=True), k
        assert "not pooled" in back[k].attrs["long_name"]
    assert back["diffusivity_angle_deg"].attrs["units"] == "degree"
    assert float(cell["isotropy_rejected_fraction"]) >= 0.5
    assert abs(float(cell["diffusivity_angle_deg"]) - 30.0) < 15.0
    assert 1.5 < float(cell["diffusivity_major"]) / float(cell["diffusivity_minor"]) < 5.0
    assert int(ds["n_windows"].sum()) == len(ws)


def test_simulated_amplitudes_are_reestimated_as_scipy_minimize_finds_them():
    # the heterogeneity check's simulated windows have their amplitudes re-estimated (two Newton-type steps and an
    # efficient-score correction): the shared scores equal those at the amplitudes scipy.optimize.minimize finds for
    # the same Whittle objective sum log E + I / E, with E = R + m_1 C_1 + m_2 C_2 (to a small fraction of their spread)
    from scipy.optimize import minimize

    from driftspec.analysis.regional.pooled import _reprofiled_scores

    rng = np.random.default_rng(5)
    nb, n_sim = 300, 6
    f = np.linspace(0.05, 6, nb)
    contrib = np.array([0.02 / (1 + (f / 0.5) ** 2) ** 1.2, 0.01 / (1 + ((f - 1.1) / 0.1) ** 2)])
    rest = np.full(nb, 1e-4)
    e = rest + contrib.sum(axis=0)
    shared = np.array([contrib[0] * np.log1p(f), contrib[1] * (f - 1.1) / 0.01, 1e-4 * np.cos(f)])
    owner = np.array([0, 1, -1])  # the first shared row scales with amplitude 1, the second with 2, the third not
    pg = e * rng.exponential(size=(n_sim, nb))
    got = _reprofiled_scores(pg[None], e[None], np.vstack([shared, contrib])[None], (np.ones(2), owner))[0]
    worst = 0.0
    for s in range(n_sim):
        def objective(lam, i=pg[s]):
            ee = rest + np.exp(lam) @ contrib
            return np.sum(np.log(ee) + i / ee)

        m = np.exp(minimize(objective, np.zeros(2), method="BFGS", options={"gtol": 1e-10}).x)
        ee = rest + m @ contrib
        scale = np.where(owner >= 0, m[np.clip(owner, 0, None)], 1.0)
        ref = scale * (shared @ ((1 - pg[s] / ee) / ee))
        spread = np.sqrt(((shared / e) ** 2).sum(axis=1))  # the score's standard deviation, about
        assert np.all(np.abs(got[s] - ref) < 0.02 * spread), (got[s], ref, spread)
        # the first-order score at the fitted amplitudes is not that close: the check can tell them apart
        worst = max(worst, np.max(np.abs(shared @ ((1 - pg[s] / e) / e) - ref) / spread))
    assert worst > 0.1


@pytest.fixture(scope="module")
def irregular_demo_windows(demo_dir):
    """Windows of satellite-like (irregular) fixes from the demo generator's drifters (positions read at irregular
    times with per-fix errors)."""
    from driftspec.analysis.tracks.pipeline import load_velocities
    from driftspec.analysis.tracks.windows import iter_windows

    vel, _, _ = load_velocities(str(demo_dir / "fixes.parquet"))
    windows = [w for _, v in vel.groupby("id", sort=True) for w in iter_windows(v, 30.0, 0.5, 0.5)]
    return [w for w in windows if w.irregular]


def test_an_irregular_window_is_pooled_through_its_operator_as_fit_window_fits_it(irregular_demo_windows):
    # an independent computation: fit_window's own optimiser, which fits such a window through the interpolation of
    # its fixes (observation "irregular"); a pool of that one window maximises the same likelihood
    spec = FitSpec(models=("matern+inertial",), inertial_frequency="free")
    w = irregular_demo_windows[0]
    single = fit_window(w, spec)[0]
    assert single.observation == "irregular" and single.status == "ok", single.message
    pooled = pool_fit([w], spec, share="all")
    assert pooled.status == "ok", pooled.message
    assert pooled.loglik == pytest.approx(single.loglik, abs=1e-3)
    # the pool's model-based errors (128 drifters simulated from the fit through the window's fixes) against
    # fit_window's sandwich, whose score covariance for such a window is in closed form
    # (fitting/uncertainty.py::irregular_periodogram_covariance): equal up to the simulation's error (about 6 %)
    sandwich = fit_window(w, spec.replace(stderr="sandwich"))[0]
    assert pooled.stderr_method == "model"
    for k in ("matern_alpha", "matern_damping", "inertial_damping"):
        assert pooled.params[k] == pytest.approx(single.params[k], abs=0.02 * single.stderr[k])
        assert 0.75 < pooled.stderr[k] / sandwich.stderr[k] < 1.33, (k, pooled.stderr[k], sandwich.stderr[k])
    # the per-fix errors' fitted factor is the window's own column, not a position noise in metres
    shape_only = pool_fit([w], spec)
    assert "position_error_scale" in shape_only.windows and "position_noise" not in shape_only.windows
    assert shape_only.windows["position_error_scale"].iloc[0] == pytest.approx(
        single.params["position_error_scale"], rel=0.05)


@pytest.mark.parametrize("fixed", [(), (("inertial_frequency", -0.9),)], ids=["free", "fixed frequency"])
def test_drifters_of_irregular_fixes_are_simulated_with_their_expected_periodogram(irregular_demo_windows, fixed):
    # the pooled fit's simulation of a drifter's windows of irregular fixes (velocity on a fine grid, integrated,
    # read at the fixes with their errors, interpolated and differenced) against the kernel integral of the expected
    # periodogram (spectral/irregular.py), a computation that shares nothing with it but the fixes' weights; with the
    # inertial frequency free (each window's local one plus a shared offset) and held at one value in every window
    from driftspec.analysis.regional.pooled import _irregular_draws, _Pool, _scoring

    spec = FitSpec(models=("matern+inertial",), inertial_frequency="free", fixed=fixed)
    track = irregular_demo_windows[0].track_id
    mine = [w for w in irregular_demo_windows if w.track_id == track][:3]  # overlapping windows of one drifter
    items = [prepare_pooled_window(w, spec) for w in mine]
    assert all(it.fix_times_days is not None for it in items)
    pool = _Pool(items, "shape")
    s, a = _scoring(pool)[:2]  # at the pooled fit, where the fit simulates (at the bounds' corner of the start
    thetas = pool.thetas(s, a)  # values, a flat spectrum, both simulators put 3 % more power than the kernel's tail)
    reps = 1600
    draws = list(_irregular_draws(pool, list(range(len(items))), s, a, reps, np.random.default_rng(3)))
    for it, theta, pg in zip(items, thetas, draws):
        p = it.problem
        expected = p.family.expected_in_band(theta, p.prep, p.context, jacobian=False)
        ratio = pg / expected
        blocks = np.array_split(np.argsort(p.prep.freq_cpd[p.prep.band_index]), 12)  # adjacent ordinates
        values = np.stack([ratio[:, b].mean(axis=1) for b in blocks], axis=1)
        mean = values.mean(axis=0)
        se = values.std(axis=0, ddof=1) / np.sqrt(reps)
        assert np.all(np.abs(mean - 1) < 4.0 * se), (np.max(np.abs(mean - 1) / se), mean)


def test_overlapping_windows_of_irregular_fixes_share_their_simulated_fixes(irregular_demo_windows):
    # in the data, two overlapping windows of one drifter interpolate the same fixes, so their velocities agree where
    # both are valid; the simulated drifters must too (one path, one error per fix), or the score covariance of
    # overlapping windows comes out too small. A Matérn model with every parameter shared: nothing differs between
    # the windows but their fixes and masks.
    from driftspec.analysis.regional.pooled import _irregular_velocities, _Pool, _scoring

    spec = FitSpec(models=("matern",))
    by_track = {}
    for w in irregular_demo_windows:
        by_track.setdefault(w.track_id, []).append(w)
    first, second = next(ws[:2] for ws in by_track.values() if len(ws) >= 2)
    shift = round((second.start - first.start).total_seconds() / first.dt_seconds)
    n = first.z.size
    assert 0 < shift < n and second.z.size == n
    items = [prepare_pooled_window(w, spec) for w in (first, second)]
    pool = _Pool(items, "all")
    s, a = _scoring(pool)[:2]
    z0, z1 = _irregular_velocities(pool, [0, 1], s, a, 32, np.random.default_rng(5))
    both = items[0].problem.prep.valid[shift:] & items[1].problem.prep.valid[:n - shift]
    assert both.sum() > 100
    assert np.allclose(first.z[shift:][both], second.z[:n - shift][both], rtol=1e-9)  # the data
    np.testing.assert_allclose(z0[:, shift:][:, both], z1[:, :n - shift][:, both], rtol=2e-4, atol=1e-6)
    assert np.abs(z0[:, shift:][:, both]).mean() > 0.01  # m/s: a real signal, not zeros
