"""Fits against reference estimators (statsmodels) and their statistical behaviour on simulations."""

import warnings

import numpy as np
import pytest

from driftspec.analysis import fit_series, inertial_frequency_cpd, simulate
from driftspec.analysis.spectral.exact import exact_negloglik

HOUR = 3600.0
TRUTH = {"matern_variance": 0.02, "matern_alpha": 1.2, "matern_damping": 1.0,
         "inertial_variance": 0.01, "inertial_frequency": -1.0027, "inertial_damping": 0.2}


def test_ou_series_matches_statsmodels_arima():
    # A real Ornstein-Uhlenbeck series sampled every dt is an AR(1) with phi = exp(-lambda dt);
    # statsmodels' exact-likelihood ARIMA(1,0,0) is the reference (Brockwell & Davis, "Time Series:
    # Theory and Methods", 1991, section 8.7).
    from statsmodels.tsa.arima.model import ARIMA

    dt_days = 1 / 24
    lam, var = 2.0, 0.01
    phi = np.exp(-lam * dt_days)
    rng = np.random.default_rng(4)
    x = np.empty(1000)
    x[0] = rng.normal(0, np.sqrt(var))
    e = rng.normal(0, np.sqrt(var * (1 - phi**2)), x.size)
    for t in range(1, x.size):
        x[t] = phi * x[t - 1] + e[t]
    ref = ARIMA(x - x.mean(), order=(1, 0, 0), trend="n").fit()
    lam_ref = -np.log(ref.params[0]) / dt_days
    var_ref = ref.params[1] / (1 - ref.params[0] ** 2)
    for est in ("exact", "debiased"):
        r = fit_series(x, HOUR, model="matern", estimator=est, fixed={"matern_alpha": 1.0})
        assert r.ok, r.message
        se = r.stderr["matern_damping"]
        assert abs(r.params["matern_damping"] - lam_ref) < se, est
        assert abs(r.params["matern_variance"] - var_ref) < r.stderr["matern_variance"], est
        assert 0.3 * se < np.sqrt(ref.cov_params()[0, 0]) / (ref.params[0] * dt_days) < 3 * se


def test_inertial_frequency_at_30n_recovered():
    f30 = inertial_frequency_cpd(30.0)
    assert f30 == pytest.approx(-1.0027, abs=1e-4)
    est = []
    for seed in range(6):
        z = simulate("matern+inertial", TRUTH, n=1440, dt=HOUR, seed=seed)
        r = fit_series(z, HOUR, latitude=30.0)
        assert r.ok, r.message
        est.append(r.params["inertial_frequency"])
        assert abs(r.params["inertial_frequency"] - f30) < 4 * r.stderr["inertial_frequency"]
    assert np.mean(est) == pytest.approx(f30, abs=0.01)


def test_exact_and_debiased_agree_on_short_windows():
    # the exact Gaussian likelihood is the reference; the debiased estimate is close to it, window by
    # window, and unbiased relative to it on average ("The debiased Whittle likelihood", Biometrika 2019, section 6)
    theta = [0.02, 1.3, 1.0]
    a_all, b_all = [], []
    for seed in range(6):
        z = simulate("matern", theta, n=480, dt=HOUR, seed=seed)
        a = fit_series(z, HOUR, model="matern", estimator="exact")
        b = fit_series(z, HOUR, model="matern")
        assert a.ok and b.ok
        # the exact optimiser improved on the debiased estimate under the exact likelihood (evaluated afresh)
        assert -exact_negloglik(a.family, b.theta, a.prepared, a.context) <= a.loglik + 1e-6
        se = max(a.stderr["matern_alpha"], b.stderr["matern_alpha"])
        assert abs(a.params["matern_alpha"] - b.params["matern_alpha"]) < 4 * se
        a_all.append(a.params["matern_alpha"])
        b_all.append(b.params["matern_alpha"])
    assert abs(np.mean(a_all) - np.mean(b_all)) < 0.05


def _replicates(theta, n_rep, estimator="debiased", mask_fn=None, max_freq=None):
    out = []
    for seed in range(n_rep):
        z = simulate("matern", theta, n=1440, dt=HOUR, seed=100 + seed)
        if mask_fn is not None:
            z = z.copy()
            z[mask_fn(np.random.default_rng(seed))] = np.nan
        r = fit_series(z, HOUR, model="matern", estimator=estimator, max_freq=max_freq)
        if r.ok:
            out.append((r.params["matern_alpha"], r.stderr["matern_alpha"], r.params["matern_damping"],
                        r.stderr["matern_damping"]))
    return np.array(out)


def test_debiased_is_unbiased_where_whittle_is_not():
    # "The debiased Whittle likelihood", Biometrika 106 (2019), section 6: aliasing and leakage bias the
    # standard Whittle estimator for a rough, strongly damped process; the debiased estimator removes it.
    theta = [0.02, 1.0, 2.0]
    deb = _replicates(theta, 24)
    whi = _replicates(theta, 24, estimator="whittle")
    n = len(deb)
    assert n >= 22
    bias_deb = deb[:, 0].mean() - 1.0
    bias_whi = whi[:, 0].mean() - 1.0
    se_mean = deb[:, 1].mean() / np.sqrt(n)
    assert abs(bias_deb) < 3 * se_mean + 0.1 * deb[:, 1].mean()
    assert abs(bias_whi) > 5 * abs(bias_deb) and abs(bias_whi) > 3 * se_mean


def test_standard_errors_cover_truth_quick():
    # a quick subset of the coverage study (the full one is a benchmark): 95 % intervals over 40 fits
    theta = [0.02, 1.2, 1.0]
    r = _replicates(theta, 40)
    cover_a = np.mean(np.abs(r[:, 0] - 1.2) < 1.96 * r[:, 1])
    cover_l = np.mean(np.abs(r[:, 2] - 1.0) < 1.96 * r[:, 3])
    assert cover_a > 0.82 and cover_l > 0.82
    # bias small next to the standard error
    assert abs(r[:, 0].mean() - 1.2) < 0.5 * r[:, 1].mean()


def _gaps(rng):  # 20 % missing in 6 gaps of 48 samples
    m = np.zeros(1440, bool)
    for s in rng.choice(np.arange(0, 1440 - 48, 60), 6, replace=False):
        m[s:s + 48] = True
    return m


def test_missing_samples_do_not_bias_debiased_fit():
    theta = [0.02, 1.2, 1.0]
    r = _replicates(theta, 24, mask_fn=_gaps)
    assert len(r) >= 22
    assert abs(r[:, 0].mean() - 1.2) < 0.5 * r[:, 1].mean()
    assert abs(np.log(r[:, 2].mean() / 1.0)) < 0.5 * (r[:, 3] / r[:, 2]).mean()


def test_failed_fits_are_results_not_exceptions():
    r = fit_series(np.full(50, np.nan + 0j), HOUR)
    assert r.status == "too_few_samples" and not r.ok and np.isnan(r.params["matern_alpha"])
    r = fit_series(np.zeros(2000, complex), HOUR)
    assert r.status in ("failed", "at_bound", "no_convergence")
    with pytest.raises(ValueError, match="estimator"):
        fit_series(np.zeros(10, complex), HOUR, estimator="nonsense")


def test_follow_latitude_model_fits_a_meridional_track():
    lat = np.linspace(20, 35, 1440)  # a fast float moving north through 15 degrees in 60 days
    theta = [0.02, 1.2, 1.0, 0.01, 0.0, 0.2]
    z = simulate("matern+inertial", theta, n=1440, dt=HOUR, seed=3, latitude=lat,
                 inertial_frequency="follow-latitude")
    r = fit_series(z, HOUR, latitude=lat, inertial_frequency="follow-latitude")
    assert r.ok, r.message
    assert abs(r.params["inertial_variance"] - 0.01) < 3 * r.stderr["inertial_variance"]
    # a constant-frequency fit of the same data is worse by AIC
    c = fit_series(z, HOUR, latitude=float(lat.mean()))
    assert r.aic < c.aic


def test_dt_types_are_equivalent():
    import datetime

    import pandas as pd

    z = simulate("matern", [0.02, 1.2, 1.0], n=500, dt=HOUR, seed=1)
    ref = fit_series(z, HOUR, model="matern").params
    for dt in (pd.Timedelta(hours=1), np.timedelta64(3600, "s"), datetime.timedelta(hours=1)):
        assert fit_series(z, dt, model="matern").params == pytest.approx(ref)


def test_exact_warns_when_gaps_force_the_dense_factorisation(monkeypatch):
    # with gaps the exact likelihood factorises a dense covariance (cost N^3): above the limit it warns, and
    # a complete window of the same length (the O(N^2) Toeplitz path) does not
    from driftspec.analysis.fitting import core

    monkeypatch.setattr(core, "EXACT_WARN_SAMPLES", 200)
    z = simulate("matern", [0.02, 1.2, 1.0], n=300, dt=HOUR, seed=1)
    gappy = z.copy()
    gappy[100:120] = np.nan
    kw = dict(model="matern", estimator="exact", max_freq=4.0, fixed={"matern_alpha": 1.2, "matern_damping": 1.0})
    with pytest.warns(UserWarning, match="dense factorisation"):
        fit_series(gappy, HOUR, **kw)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fit_series(z, HOUR, **kw)


def test_parametric_bootstrap_agrees_with_curvature_errors():
    # the bootstrap (simulate from the fit by circulant embedding, refit) and the Fisher-information
    # standard errors estimate the same spread ("The debiased Whittle likelihood", Biometrika 2019,
    # section 4); 60 replicates
    z = simulate("matern", [0.02, 1.2, 1.0], n=1440, dt=HOUR, seed=11)
    z[300:400] = np.nan
    r = fit_series(z, HOUR, model="matern")
    boot = r.bootstrap_stderr(n_boot=60, seed=1)
    for k in ("matern_alpha", "matern_damping"):
        assert 0.6 < boot[k] / r.stderr[k] < 1.6, (k, boot[k], r.stderr[k])
    assert np.isfinite(boot["diffusivity"])


def test_goodness_of_fit_pvalue_matches_scipy_kstest(rng):
    # scipy.stats.kstest against the standard exponential is the reference
    from scipy.stats import kstest

    from driftspec.analysis.fitting import ks_exponential_pvalue

    for sample in (rng.exponential(1.0, 700), rng.exponential(1.3, 700), rng.gamma(2.0, 0.5, 50)):
        assert ks_exponential_pvalue(sample) == pytest.approx(kstest(sample, "expon").pvalue, rel=1e-6, abs=1e-12)


@pytest.mark.parametrize("model, theta", [
    ("matern", [0.02, 1.2, 1.0]),
    # an inertial oscillation decaying over 12 days in an 11-day window: the covariance is far from zero at the
    # window's length, where a circulant embedding of twice the window wraps around
    ("matern+inertial", [0.0076, 1.38, 0.987, 0.0103, -1.066, 0.0838]),
    # a Matérn background decorrelating over 20 days (damping 0.05 per day) in the same window
    ("matern", [0.02, 1.2, 0.05]),
])
def test_score_covariance_matches_gaussian_quadratic_form_formula(model, theta):
    # For a proper complex Gaussian series the tapered DFT J of the demeaned series is Gaussian with
    # covariance C = dt F diag(h) P Sigma P^H diag(h) F^H (P removes the mean of the valid samples), and
    # Cov(I_j, I_k) = |C_jk|^2 (Isserlis' theorem); the score covariance is then
    # sum_jk u_j u_k |C_jk|^2 / (E_j E_k) with u = d log E. The simulated estimate used for sandwich
    # standard errors must agree with this O(N^2) formula on a gappy window.
    import scipy.linalg

    from driftspec.analysis.fitting import score_covariance
    from driftspec.analysis.models import FitContext, get_family
    from driftspec.analysis.spectral.likelihood import expected_in_band, prepare_window

    n, dt = 256, 1 / 24
    theta = np.array(theta)
    fam = get_family(model)
    z = simulate(model, theta, n=n, dt=HOUR, seed=3)
    z[40:80] = np.nan
    z[150:170] = np.nan
    prep = prepare_window(z, dt, max_freq=6.0)
    ctx = FitContext(dt_days=dt)
    e, de = expected_in_band(fam, theta, prep, ctx)
    u = de / e
    r = fam.autocovariance(theta, prep.lags_days, ctx).astype(complex)
    sigma = scipy.linalg.toeplitz(r, np.conj(r))
    demean = np.eye(n) - np.outer(np.ones(n), prep.valid / prep.valid.sum())
    sigma = demean @ sigma @ demean.T
    h = prep.taper
    m = (h[:, None] * sigma) * h[None, :]
    c = dt * np.fft.fft(np.fft.fft(m, axis=0).conj().T, axis=0).conj().T
    k = prep.band_index
    exact = u @ (np.abs(c[np.ix_(k, k)]) ** 2 / np.outer(e, e)) @ u.T
    sim = score_covariance(fam, theta, prep, ctx, n_sim=6000, seed=1)
    assert np.allclose(np.diag(sim), np.diag(exact), rtol=0.06)  # 6000 draws: ~2 % sampling error
    corr = lambda a: a / np.sqrt(np.outer(np.diag(a), np.diag(a)))  # noqa: E731
    assert np.allclose(corr(sim), corr(exact), atol=0.03)
    if theta[2] == 1.0:  # and gaps make it far from the Fisher information times N sum h^4 for log lambda
        fisher = u @ u.T
        assert exact[2, 2] > 1.3 * fisher[2, 2] * prep.variance_inflation


def test_sandwich_errors_cover_the_damping_with_gaps():
    # 20 % of samples missing in gaps: the spread of the damping estimate over replicates is matched by
    # the default (sandwich) standard errors, not by the inflated inverse Fisher information
    theta = [0.02, 1.2, 1.0]
    ratios = {}
    for mode in ("fisher", "auto"):
        est, se = [], []
        for k in range(60):
            rng = np.random.default_rng(500 + k)
            z = simulate("matern", theta, n=1440, dt=HOUR, seed=rng)
            z[_gaps(rng)] = np.nan
            r = fit_series(z, HOUR, model="matern", stderr=mode)
            if r.ok:
                est.append(np.log(r.params["matern_damping"]))
                se.append(r.stderr["matern_damping"] / r.params["matern_damping"])
        ratios[mode] = np.std(est) / np.mean(se)
    assert ratios["fisher"] > 1.25  # overconfident
    assert 0.75 < ratios["auto"] < 1.25


def test_satellite_fixes_are_fitted_through_the_interpolation_operator():
    # irregular, clustered fixes with per-fix errors (the project's scenario simulator): the default specification
    # models the interpolation exactly, keeps the given errors' fix-by-fix structure with a fitted scale near one
    # (the simulated errors are the stated ones), reports sandwich errors from simulated fixes, and the slope lies
    # within three of them of the generating value (independent truth, not the code's own numbers)
    from driftspec.analysis import FitSpec, fit_window, read_fixes
    from driftspec.analysis.simulation.scenarios import generate_scenario
    from driftspec.analysis.spectral.irregular import IrregularlyObserved
    from driftspec.analysis.tracks.pipeline import grid_velocities
    from driftspec.analysis.tracks.qc import clean_fixes
    from driftspec.analysis.tracks.windows import iter_windows

    fixes, truth = generate_scenario("satellite", n_tracks=3, days=75, seed=5)
    vel = grid_velocities(clean_fixes(read_fixes(fixes))[0])
    windows = list(iter_windows(vel, window_days=60, overlap=0.5))
    assert len(windows) >= 2 and all(w.irregular for w in windows)
    truth = truth.set_index("id")
    for w in windows:
        r = next(r for r in fit_window(w, FitSpec(models=("matern+inertial",), inertial_frequency="free")))
        assert isinstance(r.family, IrregularlyObserved) and r.status == "ok", r.message
        assert r.stderr_method == "sandwich"
        assert 0.7 < r.params["position_error_scale"] < 1.4
        t = truth.loc[w.track_id]
        assert abs(r.params["matern_alpha"] - t["matern_alpha"]) < 3 * r.stderr["matern_alpha"]


def test_anisotropic_candidate_is_selected_for_a_flow_with_a_preferred_direction():
    # velocities three times as variable along an axis 30 degrees from east as across it, built independently of
    # the model code (two independent real Matern series, scaled and rotated): with --anisotropic the fit rejects
    # isotropy, selects the anisotropic version and its diffusivity tensor has the simulated axis and a ratio near 3
    # (for equal Matern shapes the principal diffusivities scale with the component variances)
    import pandas as pd

    from driftspec.analysis import FitSpec, Window, fit_window
    from driftspec.analysis.fitting.batch import window_rows

    along = simulate("matern", [0.03, 1.2, 1.0], n=1440, dt=HOUR, seed=21, real=True)
    across = simulate("matern", [0.01, 1.2, 1.0], n=1440, dt=HOUR, seed=22, real=True)
    z = np.exp(1j * np.deg2rad(30.0)) * (along + 1j * across)
    t0 = pd.Timestamp("2031-01-01")
    w = Window("SIM-0001", 0, 0, t0, t0 + pd.Timedelta(hours=1439), HOUR, z, np.full(1440, 30.0), np.full(1440, -140.0))
    spec = FitSpec(models=("matern",), velocity="measured", anisotropic=True)
    results = fit_window(w, spec)
    chosen = [r for r in results if r.selected]
    assert len(chosen) == 1 and chosen[0].model.startswith("anisotropic"), [(r.model, r.selection) for r in results]
    a = chosen[0]
    assert a.isotropy_pvalue < 0.01
    assert 2.0 < a.diffusivity_major / a.diffusivity_minor < 4.5
    assert abs(a.diffusivity_angle_deg - 30.0) < 15.0
    rows = window_rows(w, spec)
    assert {r["model"] for r in rows} == {"matern", a.model} and sum(bool(r["selected"]) for r in rows) == 1
    iso = next(r for r in rows if r["model"] == "matern")
    assert iso["diffusivity_major"] == iso["diffusivity_minor"] == iso["diffusivity"]


def test_ou_series_has_the_closed_form_autocovariance():
    # the exact AR(1) recursion behind the sandwich's draws of damped oscillations: sample autocovariance of
    # 4000 series against var exp((2 pi i f0 - gamma) tau), the complex OU process's closed form
    from driftspec.analysis.fitting.uncertainty import ou_series

    var, f0, gam, dt = 0.01, -1.07, 0.09, 1 / 72
    rng = np.random.default_rng(11)
    z = ou_series(var, 2j * np.pi * f0 - gam, 400, dt, rng, 4000)
    for lag in (0, 1, 17, 200, 399):
        emp = np.mean(z[:, lag:] * np.conj(z[:, : z.shape[1] - lag]))
        ref = var * np.exp((2j * np.pi * f0 - gam) * lag * dt)
        # the sample mean of 4000 x (400 - lag) products, strongly correlated along a series: ~2 % of var
        assert abs(emp - ref) < 0.05 * var, (lag, emp, ref)
    # stationary from the first sample to the last (sampling error of each mean of 4000 |z|^2: 1.6 %)
    assert np.mean(np.abs(z[:, 0]) ** 2) == pytest.approx(var, rel=0.06)
    assert np.mean(np.abs(z[:, -1]) ** 2) == pytest.approx(var, rel=0.06)
