"""The observation model: differencing and position noise in the expected periodogram."""

import numpy as np
import pytest
from scipy.integrate import quad

from driftspec.analysis import fit_series, simulate
from driftspec.analysis.models import Matern, get_family
from driftspec.analysis.models.base import FitContext
from driftspec.analysis.models.observation import OPERATORS, ObservedFamily, PositionNoise, observed
from driftspec.analysis.spectral.likelihood import expected_periodogram, prepare_window

HOUR = 3600.0
CTX = FitContext(dt_days=1 / 24, latitude=30.0, inertial_frequency_cpd=-1.0027)


@pytest.mark.parametrize("name,r0,r_lag,lag", [("central", 1.0, -0.5, 2), ("forward", 4.0, -2.0, 1)])
def test_noise_autocovariance_closed_form(name, r0, r_lag, lag):
    # white position noise eps (variance s^2 per component, E|eps|^2 = 2 s^2) through the difference:
    # central (eps[t+1] - eps[t-1]) / (2D): R(0) = s^2/D^2, R(2D) = -s^2/(2 D^2);
    # forward (eps[t+1] - eps[t]) / D:       R(0) = 4 s^2/D^2, R(D) = -2 s^2/D^2
    s, d = 200.0, HOUR
    noise = PositionNoise(OPERATORS[name])
    r = noise.autocovariance([s], np.arange(6) / 24.0, CTX).real
    expect = np.zeros(6)
    expect[0], expect[lag] = r0 * s**2 / d**2, r_lag * s**2 / d**2
    np.testing.assert_allclose(r, expect, rtol=1e-12, atol=1e-20)
    # its spectral density integrates to the variance (scipy quad over the Nyquist band)
    nyq = 12.0
    total = quad(lambda f: noise.spectral_density([s], np.array([f]), CTX)[0], -nyq, nyq, limit=200)[0]
    assert total == pytest.approx(r[0], rel=1e-8)


@pytest.mark.parametrize("nu,lam", [(0.3, 1.0), (0.7, 1.0), (1.5, 0.5), (0.7, 4.8)])
def test_averaging_quadrature_against_adaptive_quad(nu, lam):
    # R_obs(tau) = int (H - |s|)/H^2 R(tau + s) ds, H = 2D, against scipy.integrate.quad with the cusp
    # at s = -tau given as a break point
    fam = Matern()
    theta = [1.0, nu + 0.5, lam]
    comp = ObservedFamily(fam, "central", noise=False).components()[0][0]
    lags = np.arange(120) / 24.0  # the operator works on the window's regular lag grid
    got = comp.autocovariance(theta, lags, CTX).real
    h = 2 / 24.0
    for j in [*range(12), 22, 23, 24, 25, 40, 119]:  # near, Simpson and far-lag rules
        tau = lags[j]
        def f(s, tau=tau):
            return (h - abs(s)) / h**2 * fam.autocovariance(theta, np.array([abs(tau + s)]))[0].real

        pts = [p for p in (-tau, 0.0) if -h < p < h]
        ref = quad(f, -h, h, points=pts or None, limit=400, epsabs=1e-13, epsrel=1e-11)[0]
        assert got[j] == pytest.approx(ref, rel=2e-5), (j, got[j], ref)


def _positions(model, theta, n, noise_m, rng, sub=16, dt=HOUR):
    """Positions (m, complex) of a float whose velocity is simulated every dt/sub and integrated exactly
    (piecewise linear velocity -> trapezoid), plus white noise on each component."""
    v = simulate(model, theta, n=n * sub + 1, dt=dt / sub, seed=rng, latitude=30.0)
    x = np.concatenate([[0], np.cumsum(0.5 * (v[1:] + v[:-1]) * dt / sub)])[::sub]
    return x[:n] + noise_m * (rng.standard_normal(n) + 1j * rng.standard_normal(n))


def _central(x, dt=HOUR):
    v = np.full(x.size, np.nan + 0j)
    v[1:-1] = (x[2:] - x[:-2]) / (2 * dt)
    return v


def test_expected_periodogram_matches_monte_carlo():
    # the observation model's expected periodogram against the mean periodogram of simulated series:
    # continuous velocity -> positions -> noise -> central differences; 3000 replicates of 128 samples
    rng = np.random.default_rng(0)
    theta = [0.02, 1.2, 1.0, 0.01, -1.0027, 0.3]
    noise = 150.0
    n, reps = 130, 3000
    acc = None
    for _ in range(reps):
        v = _central(_positions("matern+inertial", theta, n, noise, rng))[1:-1]
        p = prepare_window(v, 1 / 24).periodogram
        acc = p if acc is None else acc + p
    mean = acc / reps
    fam = observed(get_family("matern+inertial"), "differenced+noise", "central")
    prep = prepare_window(_central(_positions("matern+inertial", theta, n, noise, rng))[1:-1], 1 / 24)
    e = expected_periodogram(fam, theta + [noise], prep, CTX)
    k = np.flatnonzero(prep.freq_cpd != 0)
    ratio = mean[k] / e[k]
    # each mean has a standard error of 1/sqrt(3000) = 1.8 %; demeaning biases the lowest bins
    low = np.abs(prep.freq_cpd[k]) < 0.6
    assert np.all(np.abs(ratio[~low] - 1) < 0.075), np.abs(ratio[~low] - 1).max()
    assert abs(np.mean(ratio[~low]) - 1) < 0.01


@pytest.mark.parametrize("noise,alpha_tol,lam_tol", [(10.0, 0.05, 0.15), (200.0, 0.05, 0.15)])
def test_fit_of_noisy_differenced_positions(noise, alpha_tol, lam_tol):
    # Matérn alpha 1.2, lambda 1/day, variance 0.02 plus an inertial oscillation at 30 N; positions every
    # 30 minutes (velocity integrated from 2-minute steps), resampled hourly, central differences;
    # fitted to 3/4 of Nyquist (9 cpd) with the observation model; 8 windows of 60 days
    rng = np.random.default_rng(int(noise))
    theta = [0.02, 1.2, 1.0, 0.01, -1.0027, 0.2]
    est = []
    for _ in range(8):
        x = _positions("matern+inertial", theta, 2 * 1440, noise, rng, sub=15, dt=1800.0)[::2]
        r = fit_series(_central(x), HOUR, latitude=30.0, observation="differenced+noise")
        assert r.status == "ok", r.message
        assert r.prepared.freq_cpd[r.prepared.band].max() == pytest.approx(9.0, abs=0.02)
        est.append((r.params["matern_alpha"], r.params["matern_damping"], r.params["position_noise"]))
    a, lam, pn = np.median(np.array(est), axis=0)
    assert abs(a - 1.2) < alpha_tol
    assert abs(lam - 1.0) < lam_tol
    if noise >= 100:
        assert abs(pn - noise) < 0.2 * noise
    else:
        assert pn < 30.0


def test_differenced_density_is_the_model_times_the_difference_response():
    # a difference of positions is a running mean of the velocity: the central difference (x(t+D) - x(t-D))/(2D)
    # has the frequency response sin(2 pi f D)/(2 pi f D), the forward difference (x(t+D) - x(t))/D the response
    # sin(pi f D)/(pi f D) times a phase (textbook linear filtering; numpy's sinc is sin(pi x)/(pi x))
    fam = get_family("matern+inertial")
    theta = [0.02, 1.2, 1.0, 0.01, -1.0, 0.2]
    ctx = FitContext(dt_days=1 / 24, latitude=30.0, inertial_frequency_cpd=-1.0)
    f = np.linspace(-12, 12, 97)
    base = np.real(fam.spectral_density(theta, f, ctx))
    for op, width in (("central", 2 / 24), ("forward", 1 / 24)):
        obs = np.real(observed(fam, "differenced", op).spectral_density(theta, f, ctx))
        np.testing.assert_allclose(obs, base * np.sinc(f * width) ** 2, rtol=1e-12)
    assert observed(fam, "none") is fam


def test_noise_parameter_can_be_fixed():
    z = simulate("matern", [0.02, 1.2, 1.0], n=1440, dt=HOUR, seed=2)
    r = fit_series(z, HOUR, model="matern", observation="differenced+noise", position_noise=50.0)
    assert r.params["position_noise"] == pytest.approx(50.0) and r.stderr["position_noise"] == 0.0
    with pytest.raises(ValueError):
        fit_series(z, HOUR, model="matern", position_noise=50.0)
