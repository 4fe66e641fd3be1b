"""The O(N^2) exact Gaussian likelihood (analysis/spectral/exact.py) against dense references and statsmodels."""

import numpy as np
import pytest
import scipy.linalg
import scipy.stats

from driftspec.analysis import simulate
from driftspec.analysis.models import FitContext, get_family
from driftspec.analysis.spectral.exact import exact_negloglik, exact_negloglik_grad, exact_observed_information
from driftspec.analysis.spectral.likelihood import prepare_window

HOUR = 3600.0
DT = 1 / 24
# alpha off the Matérn table's nu grid, where the interpolant's derivative is smooth
THETAS = {
    "matern": [0.02, 1.234, 1.0],
    "inertial": [0.01, -1.0027, 0.2],
    "matern+inertial": [0.02, 1.234, 1.0, 0.01, -1.0027, 0.2],
}
FOLLOW = [0.02, 1.234, 1.0, 0.01, 0.03, 0.2]


def _context(lat=None):
    return FitContext(dt_days=DT, latitude=None if lat is None else float(np.mean(lat)), latitude_series=lat)


def _dense_cov(family, theta, prep, ctx):
    """``Sigma`` of the valid samples built entry by entry from the components' autocovariances."""
    idx = np.flatnonzero(prep.valid)
    theta = np.asarray(theta, float)
    cov = 0
    for comp, sl in family.components():
        r = comp.autocovariance(theta[sl], prep.lags_days, ctx)
        if prep.real_valued:
            r = np.real(r)
        t = scipy.linalg.toeplitz(r, np.conj(r))[np.ix_(idx, idx)]  # Sigma_ij = R((i - j) dt)
        if comp.modulated:
            w = prep.modulation[idx]
            t = w[:, None] * t * np.conj(w)[None, :]
        cov = cov + t
    cov = np.real(cov) if prep.real_valued else np.asarray(cov, complex)
    cov = cov.copy()
    cov[np.diag_indices_from(cov)] += 1e-10 * np.real(cov[0, 0])  # the documented relative nugget
    return idx, cov


def dense_reference(family, theta, prep, ctx):
    """Negative log-likelihood from scipy: multivariate_normal.logpdf (real) or the proper complex Gaussian
    density ``pi^-m det(Sigma)^-1 exp(-x^H Sigma^-1 x)`` through scipy.linalg.cho_factor (complex)."""
    idx, cov = _dense_cov(family, theta, prep, ctx)
    x = prep.z[idx]
    if prep.real_valued:
        return -scipy.stats.multivariate_normal(mean=np.zeros(idx.size), cov=cov).logpdf(np.real(x))
    c, low = scipy.linalg.cho_factor(cov, lower=True)
    logdet = 2 * np.sum(np.log(np.real(np.diag(c))))
    quad = np.real(np.vdot(x, scipy.linalg.cho_solve((c, low), x)))
    return idx.size * np.log(np.pi) + logdet + quad


def _shift(family, theta, j, h):
    """theta moved by h in optimiser coordinate j (log for log-scale parameters)."""
    t = np.array(theta, float)
    if family.parameters[j].scale == "log":
        t[j] *= np.exp(h)
    else:
        t[j] += h
    return t


def _window(model, n, *, real=False, seed=0, gaps=False, follow=False):
    lat = None
    if follow:
        lat = np.linspace(28.0, 33.0, n)  # a float drifting north: the inertial frequency changes along the window
        z = simulate(model, FOLLOW, n=n, dt=HOUR, seed=seed, latitude=lat, inertial_frequency="follow-latitude")
    else:
        z = simulate(model, THETAS[model], n=n, dt=HOUR, seed=seed, real=real)
    if real:
        z = np.real(z)
    if gaps:
        z = z.copy()
        z[40:65] = np.nan
        z[n // 2] = np.nan
    prep = prepare_window(z, DT, modulated=follow, latitude_series=lat)
    return prep, _context(lat)


@pytest.mark.parametrize("model", list(THETAS))
@pytest.mark.parametrize("real", [False, True])
def test_value_matches_dense_gaussian(model, real):
    # reference: scipy.stats.multivariate_normal.logpdf (real) / complex Gaussian via scipy.linalg.cho_factor
    fam = get_family(model)
    prep, ctx = _window(model, 400, real=real, seed=3)
    assert prep.real_valued == real
    for scale in (1.0, 0.5, 2.0):  # at and away from the generating parameters
        theta = np.array(THETAS[model]) * np.where([p.scale == "log" for p in fam.parameters], scale, 1.0)
        ref = dense_reference(fam, theta, prep, ctx)
        assert exact_negloglik(fam, theta, prep, ctx) == pytest.approx(ref, rel=1e-10, abs=1e-7)
        value, _ = exact_negloglik_grad(fam, theta, prep, ctx)
        assert value == pytest.approx(ref, rel=1e-10, abs=1e-7)


@pytest.mark.parametrize("real", [False, True])
def test_gaps_use_the_dense_fallback_and_match(real):
    # reference: the dense Gaussian density of the valid samples only (scipy)
    fam = get_family("matern+inertial")
    prep, ctx = _window("matern+inertial", 300, real=real, seed=5, gaps=True)
    assert not prep.valid.all()
    theta = THETAS["matern+inertial"]
    ref = dense_reference(fam, theta, prep, ctx)
    assert exact_negloglik(fam, theta, prep, ctx) == pytest.approx(ref, rel=1e-10, abs=1e-7)


def test_latitude_following_uses_the_dense_fallback_and_matches():
    # reference: complex Gaussian via scipy.linalg.cho_factor with Sigma = T_matern + diag(w) T_inertial diag(w)^H
    fam = get_family("matern+inertial", "follow-latitude")
    for gaps in (False, True):
        prep, ctx = _window("matern+inertial", 300, seed=6, follow=True, gaps=gaps)
        ref = dense_reference(fam, FOLLOW, prep, ctx)
        assert exact_negloglik(fam, FOLLOW, prep, ctx) == pytest.approx(ref, rel=1e-10, abs=1e-7)


def test_long_complete_window_matches_dense():
    # reference: the complex Gaussian density via scipy.linalg.cho_factor, at the benchmark's length
    fam = get_family("matern+inertial")
    prep, ctx = _window("matern+inertial", 1440, seed=8)
    theta = THETAS["matern+inertial"]
    assert exact_negloglik(fam, theta, prep, ctx) == pytest.approx(dense_reference(fam, theta, prep, ctx),
                                                                   rel=1e-9)


def test_ou_value_matches_statsmodels_arima():
    # A real OU series (Matérn alpha = 1: R = sigma^2 exp(-lambda |tau|)) sampled every dt is an AR(1) with
    # phi = exp(-lambda dt) and innovation variance sigma^2 (1 - phi^2); statsmodels' ARIMA(1,0,0) evaluates its
    # exact likelihood by the Kalman filter (Brockwell & Davis, "Time Series: Theory and Methods", 1991, 8.7).
    from statsmodels.tsa.arima.model import ARIMA

    fam = get_family("matern")
    lam, var = 2.0, 0.01
    z = simulate("matern", [var, 1.0, lam], n=800, dt=HOUR, seed=11, real=True).real
    prep = prepare_window(z, DT)
    ctx = _context()
    model = ARIMA(prep.z, order=(1, 0, 0), trend="n")
    for lam_t, var_t in ((lam, var), (1.0, 0.02), (4.0, 0.005)):
        phi = np.exp(-lam_t * DT)
        ref = -model.loglike(np.array([phi, var_t * (1 - phi**2)]))
        assert exact_negloglik(fam, [var_t, 1.0, lam_t], prep, ctx) == pytest.approx(ref, rel=1e-8)


@pytest.mark.parametrize("case", ["complex", "real", "gaps", "follow"])
def test_gradient_matches_finite_differences(case):
    # reference: central differences (step 1e-5 in the optimiser coordinates) of the dense scipy density
    model = "matern+inertial"
    follow = case == "follow"
    fam = get_family(model, "follow-latitude" if follow else "free")
    prep, ctx = _window(model, 240, real=case == "real", seed=2, gaps=case == "gaps", follow=follow)
    theta = np.array(FOLLOW if follow else THETAS[model]) * np.where(
        [p.scale == "log" for p in fam.parameters], 1.3, 1.0)  # away from the generating values
    _, grad = exact_negloglik_grad(fam, theta, prep, ctx)
    h = 1e-5
    fd = np.array([(dense_reference(fam, _shift(fam, theta, j, h), prep, ctx)
                    - dense_reference(fam, _shift(fam, theta, j, -h), prep, ctx)) / (2 * h)
                   for j in range(theta.size)])
    np.testing.assert_allclose(grad, fd, rtol=1e-5, atol=1e-4 * np.max(np.abs(fd)))


def test_information_matches_finite_difference_hessian():
    # reference: second central differences of the dense scipy density (step 1e-3)
    fam = get_family("matern+inertial")
    prep, ctx = _window("matern+inertial", 240, seed=9)
    theta = np.array(THETAS["matern+inertial"])
    info = exact_observed_information(fam, theta, prep, ctx)
    p, h = theta.size, 1e-3

    def f(t):
        return dense_reference(fam, t, prep, ctx)

    hess = np.empty((p, p))
    for i in range(p):
        for j in range(p):
            tp, tm = _shift(fam, theta, i, h), _shift(fam, theta, i, -h)
            hess[i, j] = (f(_shift(fam, tp, j, h)) - f(_shift(fam, tp, j, -h))
                          - f(_shift(fam, tm, j, h)) + f(_shift(fam, tm, j, -h))) / (4 * h * h)
    np.testing.assert_allclose(info, hess, rtol=1e-3, atol=1e-3 * np.max(np.abs(hess)))


def test_information_at_a_bound_differences_into_the_bounds():
    # a fit that ends with the Matérn slope on its lower bound (seen on demo windows): the information is still
    # computed (it raised before, stepping outside the bounds) and matches the dense scipy density's second
    # differences, forward in the slope and central in the rest (step 1e-3, error O(step) in the slope)
    fam = get_family("matern+inertial")
    prep, ctx = _window("matern+inertial", 240, seed=9)
    theta = np.array(THETAS["matern+inertial"], float)
    ka = fam.names.index("matern_alpha")
    theta[ka] = fam.parameters[ka].lower
    info = exact_observed_information(fam, theta, prep, ctx)
    p, h = theta.size, 1e-3

    def f(t):
        return dense_reference(fam, t, prep, ctx)

    def d(t, i):  # first difference in coordinate i: forward for the slope, central otherwise
        if i == ka:
            return (f(_shift(fam, t, i, h)) - f(t)) / h
        return (f(_shift(fam, t, i, h)) - f(_shift(fam, t, i, -h))) / (2 * h)

    hess = np.empty((p, p))
    for i in range(p):
        for j in range(p):
            if j == ka:
                hess[i, j] = (d(_shift(fam, theta, j, h), i) - d(theta, i)) / h
            else:
                hess[i, j] = (d(_shift(fam, theta, j, h), i) - d(_shift(fam, theta, j, -h), i)) / (2 * h)
    hess = 0.5 * (hess + hess.T)
    np.testing.assert_allclose(info, hess, rtol=2e-2, atol=2e-2 * np.max(np.abs(hess)))


def test_bad_input_is_a_clear_value_error():
    fam = get_family("matern+inertial")
    prep, ctx = _window("matern+inertial", 100, seed=1)
    with pytest.raises(ValueError, match="parameters"):
        exact_negloglik(fam, [0.02, 1.2, 1.0], prep, ctx)
    with pytest.raises(ValueError, match="finite"):
        exact_negloglik_grad(fam, [0.02, np.nan, 1.0, 0.01, -1.0, 0.2], prep, ctx)
    with pytest.raises(ValueError, match="modulated"):
        exact_negloglik(get_family("matern+inertial", "follow-latitude"), FOLLOW, prep, ctx)
