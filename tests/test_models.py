"""Model families: autocovariances and spectra against reference libraries and closed forms."""

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.special import gamma

from driftspec.analysis.models import Inertial, Matern, get_family, matern_correlation
from driftspec.analysis.models.base import FitContext
from driftspec.analysis.spectral.likelihood import expected_periodogram, prepare_window

CTX = FitContext(dt_days=1 / 24, latitude=30.0, inertial_frequency_cpd=-1.0027)


@pytest.mark.parametrize("alpha,lam", [(0.75, 0.5), (1.0, 1.0), (1.3, 2.0), (2.2, 0.7), (3.5, 4.0)])
def test_matern_against_sklearn(alpha, lam):
    # scikit-learn's Matern kernel: k(r) = 2^(1-nu)/Gamma(nu) (sqrt(2 nu) r / l)^nu K_nu(sqrt(2 nu) r / l),
    # so our damping lambda corresponds to length_scale l = sqrt(2 nu) / lambda with nu = alpha - 1/2
    from sklearn.gaussian_process.kernels import Matern as SkMatern

    nu = alpha - 0.5
    lags = np.arange(0, 2000) / 24.0
    ref = SkMatern(length_scale=np.sqrt(2 * nu) / lam, nu=nu)(np.zeros((1, 1)), lags[:, None])[0]
    ours = Matern().autocovariance([0.03, alpha, lam], lags).real / 0.03
    np.testing.assert_allclose(ours, ref, atol=5e-7)  # tabulated K_nu: ~1e-7


def test_matern_correlation_derivatives_by_finite_differences():
    x = np.geomspace(1e-4, 40, 300)
    for nu in (0.313, 0.777, 1.905):  # between table nodes, where the interpolant is smooth
        _, d_nu, d_u = matern_correlation(nu, x, derivatives=True)
        h = 1e-5
        fd_nu = (matern_correlation(nu + h, x) - matern_correlation(nu - h, x)) / (2 * h)
        fd_u = (matern_correlation(nu, x * np.exp(h)) - matern_correlation(nu, x * np.exp(-h))) / (2 * h)
        np.testing.assert_allclose(d_nu, fd_nu, atol=1e-5)
        np.testing.assert_allclose(d_u, fd_u, atol=1e-5)


@pytest.mark.parametrize("family,theta", [
    (Matern(), [0.02, 1.2, 1.0]),
    (Matern(), [0.05, 0.8, 3.0]),
    (Inertial(), [0.01, -1.0, 0.3]),
])
def test_spectrum_is_fourier_transform_of_autocovariance(family, theta):
    # R(tau) = int S(f) exp(2 pi i f tau) df, by scipy.integrate.quad's Fourier-integral rule (QAWF)
    def s(f):
        return family.spectral_density(theta, np.array([f]), CTX)[0]

    for tau in (0.3, 1.7):
        w = 2 * np.pi * tau
        re = quad(lambda f: s(f) + s(-f), 0, np.inf, weight="cos", wvar=w, limlst=200)[0]
        im = quad(lambda f: s(f) - s(-f), 0, np.inf, weight="sin", wvar=w, limlst=200)[0]
        r = family.autocovariance(theta, np.array([tau]), CTX)[0]
        assert re == pytest.approx(r.real, rel=1e-4, abs=1e-8)
        assert im == pytest.approx(r.imag, rel=1e-4, abs=1e-8)
    total = quad(s, -np.inf, np.inf, limit=400, points=None)[0]
    assert total == pytest.approx(theta[0], rel=1e-5)  # the density integrates to the variance


def test_ou_diffusivity_is_taylor_value():
    # Taylor (1921): kappa = sigma_u^2 T_L for an exponential autocorrelation; sigma_u^2 = E|z|^2 / 2
    var, lam = 0.02, 0.8  # m^2/s^2, 1/day
    s0 = Matern().zero_frequency_density([var, 1.0, lam])  # (m/s)^2 per cpd
    kappa = s0 * 86400 / 4
    assert kappa == pytest.approx(var / 2 * 86400 / lam, rel=1e-12)
    # the general-alpha integral time scale of the Matern correlation
    alpha = 1.7
    t_int = Matern().derived([var, alpha, lam])["matern_timescale_days"]
    expect = np.sqrt(np.pi) * gamma(alpha) / (gamma(alpha - 0.5) * lam)
    assert t_int == pytest.approx(expect)
    num = quad(lambda t: matern_correlation(alpha - 0.5, np.array([lam * t]))[0], 0, 200)[0]
    assert t_int == pytest.approx(num, rel=1e-5)


@pytest.mark.parametrize("model,theta,modulated,real,observation", [
    ("matern+inertial", [0.02, 1.3, 1.0, 0.01, -1.0, 0.3], False, False, "none"),
    ("matern+inertial", [0.02, 1.3, 1.0, 0.01, 0.05, 0.3], True, False, "none"),
    ("matern+inertial", [0.02, 1.3, 1.0, 0.01, -1.0, 0.3], False, True, "none"),
    ("matern+inertial", [0.02, 1.3, 1.0, 0.01, -0.05, 0.3], True, True, "none"),
    ("matern+inertial", [0.02, 1.3, 1.0, 0.01, -1.0, 0.3, 150.0], False, False, "differenced+noise"),
])
def test_expected_periodogram_equals_quadratic_form(model, theta, modulated, real, observation, rng):
    # E|sum_t h_t z_t e^{-i theta t}|^2 = b^H Sigma b with b_t = h_t e^{+i theta t} and
    # Sigma_ts = E[z_t conj z_s]: a brute-force O(N^2) evaluation of the same expectation, for the full
    # FFT-order expected periodogram and for the optimiser's band-only path (real FFT for real parts)
    from driftspec.analysis.models.observation import observed
    from driftspec.analysis.spectral.likelihood import expected_in_band

    n = 200
    fam = observed(get_family(model, "follow-latitude" if modulated else "free"), observation)
    z = rng.standard_normal(n) + (0 if real else 1j * rng.standard_normal(n))
    z[50:80] = np.nan
    lat = np.linspace(25, 35, n)
    prep = prepare_window(z, 1 / 24, taper="hann", modulated=modulated, latitude_series=lat, max_freq=9.0)
    ctx = FitContext(dt_days=1 / 24, latitude=30.0, inertial_frequency_cpd=-1.0, latitude_series=lat)
    e = expected_periodogram(fam, theta, prep, ctx)
    e_band, de_band = expected_in_band(fam, theta, prep, ctx)
    in_band = dict(zip(prep.band_index, e_band))
    t = np.arange(n)
    lag = t[:, None] - t[None, :]
    sigma = np.zeros((n, n), complex)
    for comp, sl in fam.components():
        r = np.asarray(comp.autocovariance(np.asarray(theta)[sl], np.arange(n) / 24.0, ctx))[np.abs(lag)]
        r = np.where(lag >= 0, r, np.conj(r))
        if comp.modulated:
            r = r * np.outer(prep.modulation, np.conj(prep.modulation))
        sigma += r
    if real:
        sigma = sigma.real
    for k in (1, 7, 40, 100, 150, 190):
        b = prep.taper * np.exp(2j * np.pi * k * t / n)
        ref = (1 / 24) * np.real(np.conj(b) @ sigma @ b)
        assert e[k] == pytest.approx(ref, rel=1e-9)
        if k in in_band:
            assert in_band[k] == pytest.approx(ref, rel=1e-9)
    assert len(in_band) == prep.band.sum() > 20
    # the band path's derivatives (optimiser coordinates: log for scale parameters) by central differences
    x = np.array([np.log(v) if p.scale == "log" else v for v, p in zip(theta, fam.parameters)])
    for j in range(len(theta)):
        step = np.zeros(len(theta))
        step[j] = 1e-6
        up, dn = ([np.exp(v) if p.scale == "log" else v for v, p in zip(x + sgn * step, fam.parameters)]
                  for sgn in (1, -1))
        fd = (expected_in_band(fam, up, prep, ctx)[0] - expected_in_band(fam, dn, prep, ctx)[0]) / 2e-6
        assert np.allclose(de_band[j], fd, rtol=1e-5, atol=1e-6 * np.abs(fd).max())


@pytest.mark.parametrize("name, theta, fc", [
    ("matern", [0.02, 1.3, 0.8], None),
    ("matern+inertial", [0.02, 0.9, 0.05, 0.01, -1.0, 0.3], None),
    ("matern+inertial", [0.01, 2.2, 3.0, 0.005, 0.7, 0.02], None),
    ("follow-latitude", [0.02, 1.2, 1.0, 0.01, 0.05, 0.3], -1.3),
])
def test_spectral_density_derivatives_against_scipy_differentiate(name, theta, fc):
    # the exact density derivatives the irregular-fix likelihood uses, in the optimiser's coordinates (log for
    # scale parameters), against scipy.differentiate.derivative (adaptive finite differences, scipy >= 1.15)
    from scipy.differentiate import derivative

    fam = get_family("matern+inertial", "follow-latitude") if name == "follow-latitude" else get_family(name)
    ctx = FitContext(dt_days=1 / 24, inertial_frequency_cpd=fc)
    theta = np.asarray(theta, float)
    f = np.r_[-12.0, np.linspace(-3, 3, 61), 0.0, 12.0]
    s, jac = fam.spectral_density_jacobian(theta, f, ctx)
    np.testing.assert_allclose(s, np.real(fam.spectral_density(theta, f, ctx)), rtol=1e-13)
    for j, par in enumerate(fam.parameters):
        def along(x, j=j, par=par):  # S(f_i) as x_j moves (x = log value for log-scale parameters), elementwise
            out = np.empty(x.shape)
            for idx in np.ndindex(*x.shape):
                th = theta.copy()
                th[j] = np.exp(x[idx]) if par.scale == "log" else x[idx]
                out[idx] = np.real(fam._spectral_density(th, f[idx[0]:idx[0] + 1], ctx))[0]
            return out
        x0 = np.log(theta[j]) if par.scale == "log" else theta[j]
        # (the absolute tolerance lets the iteration stop where the derivative crosses zero, at a peak's centre)
        ref = derivative(along, np.full(f.shape, x0), initial_step=1e-3,
                         tolerances={"atol": 1e-12 * np.abs(s).max(), "rtol": 1e-9})
        np.testing.assert_allclose(jac[j], ref.df, rtol=1e-6, atol=1e-6 * np.abs(ref.df).max(), err_msg=par.name)


@pytest.mark.parametrize("name, wrap, theta", [
    ("matern", None, [0.02, 1.3, 0.8]),
    ("inertial", None, [0.01, -1.1, 0.3]),
    ("matern+inertial", None, [0.02, 0.9, 0.05, 0.01, -1.0, 0.3]),
    ("follow-latitude", None, [0.02, 1.2, 1.0, 0.01, 0.05, 0.3]),
    ("matern+inertial", "differenced+noise", [0.02, 2.2, 3.0, 0.005, 0.7, 0.02, 40.0]),
    ("matern+inertial", "anisotropic", [0.02, 1.2, 1.0, 0.01, -1.0, 0.3, 0.4, 25.0]),
])
def test_zero_frequency_gradient_against_scipy_differentiate(name, wrap, theta):
    # the diffusivity's delta-method gradient: the families' exact d S(0) / dx (x = log value for scale parameters)
    # against scipy.differentiate.derivative of S(0) itself (adaptive finite differences, scipy >= 1.15)
    from scipy.differentiate import derivative

    from driftspec.analysis.models.anisotropic import anisotropic
    from driftspec.analysis.models.observation import observed

    fam = get_family("matern+inertial", "follow-latitude") if name == "follow-latitude" else get_family(name)
    if wrap == "anisotropic":
        fam = anisotropic(fam)
    elif wrap:
        fam = observed(fam, wrap)
    ctx = FitContext(dt_days=1 / 24, inertial_frequency_cpd=-1.3)
    theta = np.asarray(theta, float)
    s0, grad = fam._zero_frequency_density_jacobian(theta, ctx)
    assert s0 == pytest.approx(fam.zero_frequency_density(theta, ctx), rel=1e-13)
    for j, par in enumerate(fam.parameters):
        def along(x, j=j, par=par):
            out = np.empty(x.shape)
            for idx in np.ndindex(*x.shape):
                th = theta.copy()
                th[j] = np.exp(x[idx]) if par.scale == "log" else x[idx]
                out[idx] = fam._zero_frequency_density(th, ctx)
            return out
        x0 = np.log(theta[j]) if par.scale == "log" else theta[j]
        ref = derivative(along, np.array([x0]), initial_step=1e-3, tolerances={"atol": 1e-12 * s0, "rtol": 1e-9})
        assert grad[j] == pytest.approx(ref.df[0], rel=1e-6, abs=1e-9 * s0), par.name
