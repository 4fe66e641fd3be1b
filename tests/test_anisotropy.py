"""Anisotropic models, the bivariate debiased Whittle likelihood, the isotropy test and the diffusivity tensor.

Every anisotropic series here is simulated by an independent construction: two independent *real* Matérn series
(the project's circulant-embedding simulator) scaled to variances ``sigma^2 (1 +- rho) / 2`` and rotated by
``theta`` (a real 2 x 2 transform), plus an independent proper inertial series where a test needs one; no code
of the anisotropic model, the bivariate likelihood or the fit is used to make data.
"""

import numpy as np
import pytest
import scipy.optimize
import scipy.signal
from scipy.special import gamma as gamma_fn

from driftspec.analysis import simulate
from driftspec.analysis.conventions import SECONDS_PER_DAY
from driftspec.analysis.fitting.anisotropy import (
    AnisotropicFit,
    fit_anisotropic,
    isotropic_tensor_columns,
    principal_axes,
    simulate_anisotropic,
)
from driftspec.analysis.models import FitContext, Matern, SumFamily, get_family
from driftspec.analysis.models.anisotropic import Anisotropic, anisotropic, wrap_axis_deg
from driftspec.analysis.models.inertial import Inertial
from driftspec.analysis.spectral.bivariate import expected_matrix, periodogram_matrix, prepare_bivariate, whittle_terms
from driftspec.analysis.spectral.periodogram import masked_taper

HOUR = 3600.0
DT = 1 / 24
MATERN = [0.04, 1.2, 1.0]  # sigma^2 (m^2/s^2), alpha, lambda (1/day): the 3:1 example
INERTIAL = [0.01, -1.0, 0.5]


def anisotropic_series(n, rho, angle_deg, rng, size=None, matern=MATERN, inertial=None):
    """``u + i v``: real Matérn series ``x1, x2`` of variance sigma^2, scaled by sqrt((1 +- rho)/2), rotated."""
    k = 1 if size is None else size
    x = simulate("matern", matern, n=n, dt=HOUR, seed=rng, real=True, size=2 * k)
    a = np.sqrt((1 + rho) / 2) * x[:k]
    b = np.sqrt((1 - rho) / 2) * x[k:]
    c, s = np.cos(np.radians(angle_deg)), np.sin(np.radians(angle_deg))
    z = (c * a - s * b) + 1j * (s * a + c * b)
    if inertial is not None:
        z = z + simulate("inertial", inertial, n=n, dt=HOUR, seed=rng, size=k)
    return z[0] if size is None else z


def matern_timescale_days(alpha, lam):
    # integral time scale int_0^inf R / R(0) of the Matérn process: sqrt(pi) Gamma(alpha) / Gamma(alpha - 1/2) / lam
    # ("Fractional Brownian motion, the Matérn process, and stochastic modeling of turbulent dispersion", NPG 2017)
    return np.sqrt(np.pi) * gamma_fn(alpha) / gamma_fn(alpha - 0.5) / lam


def tensor_truth(rho, matern=MATERN):
    """Principal diffusivities (m^2/s) in closed form: the variance along/across the axis times T (Taylor 1921)."""
    t = matern_timescale_days(*matern[1:]) * SECONDS_PER_DAY
    return matern[0] * (1 + rho) / 2 * t, matern[0] * (1 - rho) / 2 * t


# --- the model ---------------------------------------------------------------------------------------------------
def test_model_covariance_matches_the_rotated_pair():
    # reference: the covariance of the independent construction, Rot(theta) diag((1+rho)/2, (1-rho)/2) Rot^T sigma^2,
    # written out by hand; and the Schreier & Scharf circularity coefficient |E z^2| / E|z|^2 = rho
    fam = anisotropic(get_family("matern"))
    rho, ang = 0.5, 30.0
    th = [*MATERN, rho, ang]
    c, s = np.cos(np.radians(ang)), np.sin(np.radians(ang))
    rot = np.array([[c, -s], [s, c]])
    expect = MATERN[0] * rot @ np.diag([(1 + rho) / 2, (1 - rho) / 2]) @ rot.T
    got = fam.uv_autocovariance(th, [0.0])[0]
    np.testing.assert_allclose(got, expect, rtol=1e-12, atol=1e-15)
    cz = fam.complementary_autocovariance(th, [0.0])[0]
    assert abs(cz) / fam.autocovariance(th, [0.0])[0].real == pytest.approx(rho)
    assert np.degrees(np.angle(cz)) / 2 == pytest.approx(ang)
    # the widely linear form z = a w + b conj(w) has the same second moments (a^2 + |b|^2 = 1, 2 a b = gamma)
    a, b = fam.widely_linear_coefficients(th)
    assert a**2 + abs(b) ** 2 == pytest.approx(1.0)
    assert 2 * a * b == pytest.approx(rho * np.exp(2j * np.radians(ang)))
    # and the independent construction itself: sample moments of a long simulated series
    z = anisotropic_series(2**15, rho, ang, np.random.default_rng(3))
    cov = np.cov(np.vstack([z.real, z.imag]))
    np.testing.assert_allclose(cov, expect, atol=0.08 * MATERN[0])


def test_model_checks_its_inputs():
    with pytest.raises(ValueError, match="no 'matern' component"):
        Anisotropic(Inertial())
    with pytest.raises(ValueError, match="already anisotropic"):
        Anisotropic(anisotropic(Matern()))
    fam = anisotropic(Matern())
    with pytest.raises(ValueError, match="anisotropy"):
        fam.complementary_autocovariance([*MATERN, 1.2, 0.0], [0.0])
    assert wrap_axis_deg(90.0) == -90.0 and wrap_axis_deg(-100.0) == 80.0


def test_spectral_matrix_against_scipy_csd():
    # reference: scipy.signal.csd / welch on a long simulated series (Welch 1967); scipy's csd(x, y) estimates
    # E[conj(X) Y], the complex conjugate of the model's S_uv = E[J_u conj J_v]. Below 3 cpd aliasing of the
    # hourly series is under 1 %.
    rng = np.random.default_rng(11)
    rho, ang = 0.5, 30.0
    z = anisotropic_series(2**18, rho, ang, rng, inertial=[0.01, -1.0, 0.5])
    u, v = z.real, z.imag
    fs = 24.0
    kw = dict(fs=fs, nperseg=1024, return_onesided=False, detrend=False)
    f, puu = scipy.signal.welch(u, **kw)
    _, pvv = scipy.signal.welch(v, **kw)
    _, puv = scipy.signal.csd(u, v, **kw)
    sel = (np.abs(f) > 0.2) & (np.abs(f) < 3.0) & (np.abs(np.abs(f) - 1.0) > 0.15)
    fam = anisotropic(SumFamily(Matern(), Inertial(), name="matern+inertial"))
    s = fam.spectral_matrix([*MATERN, *INERTIAL[:2], 0.5, rho, ang], f[sel])
    np.testing.assert_allclose(np.median(puu[sel] / s[:, 0, 0].real), 1.0, atol=0.03)
    np.testing.assert_allclose(np.median(pvv[sel] / s[:, 1, 1].real), 1.0, atol=0.03)
    scale = np.sqrt(s[:, 0, 0].real * s[:, 1, 1].real)
    err = np.abs(np.conj(puv[sel]) - s[:, 0, 1]) / scale
    assert np.median(err) < 0.05, np.median(err)
    # the imaginary part (the inertial oscillation's polarisation) has the model's sign
    near = sel & (np.abs(f) > 0.6) & (np.abs(f) < 1.4)
    s_near = fam.spectral_matrix([*MATERN, *INERTIAL[:2], 0.5, rho, ang], f[near])
    assert np.corrcoef(np.conj(puv[near]).imag, s_near[:, 0, 1].imag)[0, 1] > 0.9


# --- the expected periodogram matrix -----------------------------------------------------------------------------
def _gappy_window(n, rng):
    valid = np.ones(n, bool)
    valid[100:160] = False
    valid[rng.choice(n, 40, replace=False)] = False
    return valid


def test_expected_matrix_equals_mean_periodogram_with_gaps_and_taper():
    # reference: Monte Carlo, the mean (u, v) periodogram matrix J J^H (J the Hann-tapered DFT with gaps, computed
    # here by hand) of 3000 series of the independent construction plus an independent inertial series
    rng = np.random.default_rng(5)
    n, rho, ang, n_sim = 480, 0.5, 30.0, 3000
    valid = _gappy_window(n, rng)
    z = anisotropic_series(n, rho, ang, rng, size=n_sim, inertial=INERTIAL)
    h = masked_taper(n, valid, "hann")
    ju = np.sqrt(DT) * np.fft.fft(h * z.real, axis=1)
    jv = np.sqrt(DT) * np.fft.fft(h * z.imag, axis=1)
    fam = anisotropic(SumFamily(Matern(), Inertial(), name="matern+inertial"))
    ctx = FitContext(dt_days=DT)
    win = prepare_bivariate(np.where(valid, z[0], np.nan), DT, taper="hann")
    e = expected_matrix(fam, [*MATERN, *INERTIAL, rho, ang], win, ctx, jacobian=False).uv()
    k = win.k_pos
    m_uu = np.mean(np.abs(ju[:, k]) ** 2, axis=0)
    m_vv = np.mean(np.abs(jv[:, k]) ** 2, axis=0)
    m_uv = np.mean(ju[:, k] * np.conj(jv[:, k]), axis=0)
    # per ordinate the Monte Carlo error is 1/sqrt(3000) ~ 2 %; in bands of 12 ordinates ~ 0.6 %
    for m, ex in ((m_uu, e[:, 0, 0].real), (m_vv, e[:, 1, 1].real)):
        ratio = m / ex
        assert np.median(np.abs(ratio - 1)) < 0.025
        bands = ratio[: ratio.size // 12 * 12].reshape(-1, 12).mean(axis=1)
        assert np.max(np.abs(bands - 1)) < 0.04, bands
    scale = np.sqrt(e[:, 0, 0].real * e[:, 1, 1].real)
    err = np.abs(m_uv - e[:, 0, 1]) / scale
    assert np.median(err) < 0.03
    assert np.max(np.abs((m_uv - e[:, 0, 1])[: err.size // 12 * 12].reshape(-1, 12).mean(axis=1)
                         / scale[: err.size // 12 * 12].reshape(-1, 12).mean(axis=1))) < 0.05
    # the cross term is material here (so the check could fail): |E_uv| / sqrt(E_uu E_vv) ~ rho sin 60 / ...
    assert np.median(np.abs(e[:, 0, 1]) / scale) > 0.2


def test_isotropic_model_has_no_complementary_part():
    # reference: the definition (a proper process has E[J(f) J(-f)] = 0) and Monte Carlo on isotropic series
    rng = np.random.default_rng(8)
    n = 480
    valid = _gappy_window(n, rng)
    z = simulate("matern+inertial", [*MATERN, *INERTIAL], n=n, dt=HOUR, seed=rng, size=2000)
    win = prepare_bivariate(np.where(valid, z[0], np.nan), DT, taper="hann")
    ctx = FitContext(dt_days=DT)
    iso = get_family("matern+inertial")
    e_iso = expected_matrix(iso, [*MATERN, *INERTIAL], win, ctx)
    e_rho0 = expected_matrix(anisotropic(iso), [*MATERN, *INERTIAL, 0.0, 25.0], win, ctx)
    assert np.all(e_iso.cross == 0) and np.all(e_rho0.cross == 0)
    np.testing.assert_allclose(e_rho0.pos, e_iso.pos)
    uv = e_iso.uv()
    np.testing.assert_allclose(uv[:, 0, 0], uv[:, 1, 1])  # equal variance in every direction
    np.testing.assert_allclose(uv[:, 0, 1].real, 0, atol=1e-12 * uv[:, 0, 0].real.max())
    h = masked_taper(n, valid, "hann")
    j = np.sqrt(DT) * np.fft.fft(h * z, axis=1)
    mean_cross = np.mean(j[:, win.k_pos] * j[:, win.k_neg], axis=0)
    rel = np.abs(mean_cross) / np.sqrt(e_iso.pos * e_iso.neg)
    assert np.median(rel) < 3 / np.sqrt(2000)


def test_bivariate_gradient_against_finite_differences():
    # reference: scipy.optimize.approx_fprime of the objective itself
    rng = np.random.default_rng(2)
    z = anisotropic_series(720, 0.4, -50.0, rng, inertial=INERTIAL)
    fam = anisotropic(get_family("matern+inertial"))
    win = prepare_bivariate(z, DT)
    ctx = FitContext(dt_days=DT)
    base = np.array([0.03, 1.4, 0.8, 0.02, -0.95, 0.3])
    x0 = np.concatenate([np.log(base[[0]]), base[[1]], np.log(base[[2, 3]]), base[[4]], np.log(base[[5]]),
                         [0.2, -0.3]])

    def theta(x):
        b = np.array([np.exp(x[0]), x[1], np.exp(x[2]), np.exp(x[3]), x[4], np.exp(x[5])])
        g = complex(x[6], x[7])
        return np.concatenate([b, [abs(g), wrap_axis_deg(np.degrees(np.angle(g) / 2))]])

    def value(x):
        em = expected_matrix(fam, theta(x), win, ctx, jacobian=False)
        return whittle_terms(em, win.i_pos, win.i_neg, win.i_cross, derivatives=False).value

    em = expected_matrix(fam, theta(x0), win, ctx)
    t = whittle_terms(em, win.i_pos, win.i_neg, win.i_cross)
    fd = scipy.optimize.approx_fprime(x0, value, 1e-6)
    np.testing.assert_allclose(t.gradient, fd, rtol=2e-3, atol=2e-3 * np.abs(fd).max())
    assert np.all(np.linalg.eigvalsh(t.fisher) > 0)


def test_bivariate_form_equals_the_uv_periodogram_form():
    # reference: the Whittle form written directly over the (u, v) matrices (Whittle 1953), with numpy's det/inv;
    # the augmented form differs by the constant log|det A|^2 per frequency
    rng = np.random.default_rng(4)
    z = anisotropic_series(480, 0.5, 30.0, rng)
    fam = anisotropic(Matern())
    win = prepare_bivariate(z, DT)
    em = expected_matrix(fam, [*MATERN, 0.5, 30.0], win, FitContext(dt_days=DT), jacobian=False)
    e_uv, i_uv = em.uv(), periodogram_matrix(win)
    direct = np.sum(np.log(np.linalg.det(e_uv).real) + np.trace(np.linalg.solve(e_uv, i_uv), axis1=1, axis2=2).real)
    ours = whittle_terms(em, win.i_pos, win.i_neg, win.i_cross, derivatives=False).value
    assert ours == pytest.approx(direct + win.n_freq * np.log(4.0), rel=1e-10)


# --- fits ---------------------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def fits_3to1():
    rng = np.random.default_rng(2024)
    zs = [anisotropic_series(1440, 0.5, 30.0, rng) for _ in range(16)]
    return [fit_anisotropic(z, DT, max_freq=6.0) for z in zs]


def test_recovers_3_to_1_anisotropy_at_30_degrees(fits_3to1):
    # reference: the simulation's truth (ratio 3, angle 30 degrees) and the closed-form principal diffusivities
    # sigma^2 (1 +- rho) / 2 * T (Taylor 1921; Matérn T from the NPG 2017 paper)
    fits = fits_3to1
    assert all(f.status == "ok" for f in fits), [f.message for f in fits]
    ratio = np.median([f.diffusivity_major / f.diffusivity_minor for f in fits])
    assert 2.2 <= ratio <= 4.0, ratio
    angles = np.array([f.diffusivity_angle_deg for f in fits])
    assert abs(np.median(angles) - 30.0) < 10.0
    major_true, minor_true = tensor_truth(0.5)
    major = np.median([f.diffusivity_major for f in fits])
    assert major_true / 1.5 < major < major_true * 1.5, (major, major_true)
    # power: reject isotropy at 1 % in at least 90 % of the windows
    assert np.mean([f.isotropy_pvalue < 0.01 for f in fits]) >= 0.9
    # the anisotropy parameter itself: (ratio - 1) / (ratio + 1) = 0.5
    assert abs(np.median([f.params["anisotropy"] for f in fits]) - 0.5) < 0.1
    # standard errors are honest to a factor: the spread of the angle over windows against its median error
    assert 0.5 < np.std(angles) / np.median([f.stderr["anisotropy_angle_deg"] for f in fits]) < 2.0


def test_row_carries_the_columns(fits_3to1):
    row = fits_3to1[0].to_row()
    for c in ("isotropy_pvalue", "anisotropy", "anisotropy_se", "anisotropy_angle_deg", "anisotropy_angle_deg_se",
              "diffusivity_major", "diffusivity_minor", "diffusivity_angle_deg", "diffusivity_major_se",
              "diffusivity_minor_se", "diffusivity_angle_deg_se", "diffusivity", "status", "loglik", "aic"):
        assert c in row, c
    f = fits_3to1[0]
    # the principal values are those of the tensor (numpy's symmetric eigensolver as the reference)
    w, v = np.linalg.eigh(f.tensor)
    assert row["diffusivity_major"] == pytest.approx(w[1]) and row["diffusivity_minor"] == pytest.approx(w[0])
    assert row["diffusivity_angle_deg"] == pytest.approx(wrap_axis_deg(np.degrees(np.arctan2(v[1, 1], v[0, 1]))))
    assert -90 <= row["diffusivity_angle_deg"] < 90
    assert f.diffusivity == pytest.approx(0.5 * (w[0] + w[1]))


def test_isotropic_fit_tensor_equals_the_scalar_diffusivity():
    # reference: the scalar diffusivity S(0)/4 of the isotropic Matérn in closed form, sigma^2 T / 2 (Taylor 1921)
    fam = anisotropic(Matern())
    th = [*MATERN, 0.0, 10.0]
    major, minor, _ = principal_axes(0.5 * SECONDS_PER_DAY * fam.zero_frequency_matrix(th))
    kappa = MATERN[0] * matern_timescale_days(*MATERN[1:]) * SECONDS_PER_DAY / 2
    assert major == pytest.approx(kappa) and minor == pytest.approx(kappa)
    cols = isotropic_tensor_columns(1234.0, 56.0)
    assert cols["diffusivity_major"] == cols["diffusivity_minor"] == 1234.0
    assert np.isnan(cols["diffusivity_angle_deg"])
    # anisotropic: the closed forms sigma^2 (1 +- rho) T / 2 along and across the axis
    major, minor, angle = principal_axes(0.5 * SECONDS_PER_DAY * fam.zero_frequency_matrix([*MATERN, 0.5, -60.0]))
    assert (major, minor) == pytest.approx(tensor_truth(0.5)) and angle == pytest.approx(-60.0)


def test_isotropy_test_keeps_its_size_small():
    # reference: Monte Carlo on isotropic windows (60-day hourly, alpha 1.2, lambda 1/day, fitted to 6 cpd, no
    # taper: the field notes' setting where the uncorrected chi-squared test rejected 17.5 % at 5 %)
    rng = np.random.default_rng(99)
    fits = [fit_anisotropic(simulate("matern", MATERN, n=1440, dt=HOUR, seed=rng), DT, max_freq=6.0)
            for _ in range(40)]
    p = np.array([f.isotropy_pvalue for f in fits])
    assert np.all(np.isfinite(p))
    # 40 windows at a true 5 %: P(more than 5 rejections) = 0.05; at the uncorrected 17.5 %: P(at most 5) = 0.13
    assert np.sum(p < 0.05) <= 5, np.sort(p)[:8]
    assert np.median([f.isotropy_lr_scale for f in fits]) > 1.2  # the correction is doing something
    # the same windows against plain chi2_2 (the field notes' oversized test): the LRs are identical, only the
    # reference differs, so the simulated reference never rejects more often
    plain = np.array([np.exp(-f.isotropy_lr / 2) for f in fits])
    assert np.sum(plain < 0.05) >= np.sum(p < 0.05)


def test_pvalue_reference_against_scipy_chi2():
    # reference: scipy.stats.chi2 (the chi2_2 survival function is exp(-x/2)); Monte Carlo p-value by counting
    from scipy.stats import chi2

    from driftspec.analysis.fitting.anisotropy import isotropy_pvalue

    rng = np.random.default_rng(0)
    draws = 2.0 * rng.chisquare(2, 4000)  # lambda = 2
    p, lam = isotropy_pvalue(9.0, draws, "scaled")
    assert lam == pytest.approx(np.mean(draws) / 2) and p == pytest.approx(chi2.sf(9.0 / lam, 2))
    p, _ = isotropy_pvalue(9.0, draws, "simulated")
    assert p == pytest.approx((1 + np.sum(draws >= 9.0)) / 4001)
    assert p == pytest.approx(np.exp(-9.0 / 4), abs=0.02)
    assert isotropy_pvalue(9.0, draws, "chi2")[0] == pytest.approx(chi2.sf(9.0, 2))
    # far in the tail the two-moment approximation takes over (here nu = 2, a = 2: exact)
    p_far, _ = isotropy_pvalue(60.0, draws, "simulated")
    assert 0 < p_far < 1 / 4001 and np.exp(-15.0) / 3 < p_far < 3 * np.exp(-15.0)  # moments from 4000 draws


@pytest.mark.slow
def test_isotropy_test_size_and_power_large():
    # reference: Monte Carlo, 300 isotropic and 60 anisotropic (3:1 at 30 degrees) windows
    rng = np.random.default_rng(7)
    p = np.array([fit_anisotropic(simulate("matern", MATERN, n=1440, dt=HOUR, seed=rng), DT,
                                  max_freq=6.0).isotropy_pvalue for _ in range(300)])
    # binomial(300, 0.05): 15 expected, sd 3.8; binomial(300, 0.01): 3 expected, sd 1.7
    assert 6 <= np.sum(p < 0.05) <= 24
    assert np.sum(p < 0.01) <= 8
    q = np.array([fit_anisotropic(anisotropic_series(1440, 0.5, 30.0, rng), DT, max_freq=6.0).isotropy_pvalue
                  for _ in range(60)])
    assert np.mean(q < 0.01) >= 0.9


def test_tensor_against_the_dispersion_of_simulated_tracks():
    # reference: single-particle dispersion of tracks integrated from the simulated velocities (Taylor 1921, Davis
    # 1991): the tensor (1/2) d<D_i D_j>/dtau at long lags, by brute force over all start times, against the
    # median fitted tensor of 60-day windows of the same velocities
    rng = np.random.default_rng(31)
    n_tracks, n, rho, ang = 24, 1440 * 4, 0.5, 30.0
    z = anisotropic_series(n, rho, ang, rng, size=n_tracks)
    dt_s = HOUR
    pos = np.concatenate([np.zeros((n_tracks, 1)), np.cumsum(z, axis=1) * dt_s], axis=1)  # m
    lags = np.array([10 * 24, 20 * 24])
    disp = []
    for m in lags:
        d = pos[:, m:] - pos[:, :-m]
        disp.append([np.mean(d.real**2), np.mean(d.imag**2), np.mean(d.real * d.imag)])
    disp = np.array(disp)
    slope = (disp[1] - disp[0]) / ((lags[1] - lags[0]) * dt_s) / 2
    k_disp = np.array([[slope[0], slope[2]], [slope[2], slope[1]]])
    fits = [fit_anisotropic(z[i, j * 1440:(j + 1) * 1440], DT, max_freq=6.0, calibration="chi2")
            for i in range(0, n_tracks, 4) for j in range(0, 4, 2)]
    k_fit = np.median([f.tensor for f in fits], axis=0)
    maj_d, min_d, ang_d = principal_axes(k_disp)
    maj_f, min_f, ang_f = principal_axes(k_fit)
    assert abs(ang_d - ang_f) < 10, (ang_d, ang_f)
    assert 1 / 1.35 < maj_f / maj_d < 1.35, (maj_f, maj_d)
    assert 1 / 1.5 < min_f / min_d < 1.5, (min_f, min_d)
    # and the dispersion tensor agrees with the closed form (a check of the brute force itself)
    assert 1 / 1.3 < maj_d / tensor_truth(rho)[0] < 1.3


def test_gappy_window_uses_the_sandwich_and_bad_input_is_refused():
    rng = np.random.default_rng(12)
    z = anisotropic_series(1440, 0.5, -20.0, rng, inertial=INERTIAL)
    z[300:400] = np.nan
    f = fit_anisotropic(z, DT, model="matern+inertial", latitude=30.0, taper="hann")
    assert isinstance(f, AnisotropicFit) and f.status == "ok", f.message
    assert f.stderr_method == "sandwich"
    assert abs(f.params["anisotropy_angle_deg"] + 20) < 15
    assert f.isotropy_pvalue < 0.01
    with pytest.raises(ValueError, match="complex"):
        fit_anisotropic(z.real, DT)
    with pytest.raises(ValueError, match="calibration"):
        fit_anisotropic(z, DT, calibration="bootstrap?")
    with pytest.raises(ValueError, match="dt_days"):
        fit_anisotropic(z, -1.0)
    short = fit_anisotropic(z[:40], DT)
    assert short.status == "too_few_samples"


def test_simulate_anisotropic_has_the_model_covariance():
    # reference: sample covariance of the simulated (u, v) against the model's lag-0 and lag-1 day covariances
    fam = anisotropic(get_family("matern+inertial"))
    th = [*MATERN, *INERTIAL, 0.6, 75.0]
    z = simulate_anisotropic(fam, th, 2**17, DT, seed=1)
    for lag in (0, 24):
        u1, v1 = z.real[lag:], z.imag[lag:]
        u0, v0 = z.real[: z.size - lag], z.imag[: z.size - lag]
        sample = np.array([[np.mean(u1 * u0), np.mean(u1 * v0)], [np.mean(v1 * u0), np.mean(v1 * v0)]])
        np.testing.assert_allclose(sample, fam.uv_autocovariance(th, [lag * DT])[0], atol=0.004)


# --- windows of irregular fixes ---------------------------------------------------------------------------------
FIVE_MIN = 300.0
SUB = 288  # five-minute steps per day


def anisotropic_positions(days, rho, angle_deg, rng, size, matern=MATERN):
    """Planar positions (m, complex x + i y) every five minutes of the independent construction (two real Matérn
    series scaled and rotated), integrated by the trapezoid rule: rows of ``size`` tracks from 0 to ``days``."""
    m = int(round(days * SUB)) + 1
    x = simulate("matern", matern, n=m, dt=FIVE_MIN, seed=rng, real=True, size=2 * size)
    a = np.sqrt((1 + rho) / 2) * x[:size]
    b = np.sqrt((1 - rho) / 2) * x[size:]
    c, s = np.cos(np.radians(angle_deg)), np.sin(np.radians(angle_deg))
    z = (c * a - s * b) + 1j * (s * a + c * b)
    return np.concatenate([np.zeros((size, 1)), np.cumsum(0.5 * (z[:, 1:] + z[:, :-1]) * FIVE_MIN, axis=1)], axis=1)


def _irregular_setup(rng, n=720):
    """Satellite-like fix times (the project's scenario generator) from -0.25 days, on the five-minute lattice, the
    valid central differences (grid positions within 3 h of a fix, inside the span) and per-fix errors."""
    from driftspec.analysis.simulation.scenarios import ACCURACY_CLASSES_M, satellite_fix_times

    t = np.unique(np.round(satellite_fix_times(rng, n * DT + 0.5) * SUB)) / SUB - 0.25
    t_pos = np.arange(-1, n + 1) * DT
    near = np.min(np.abs(t_pos[:, None] - t[None, :]), axis=1) <= 3 / 24 + 1e-12
    near &= (t_pos >= t[0]) & (t_pos <= t[-1])
    valid = near[:-2] & near[1:-1] & near[2:]
    sigma = rng.choice(ACCURACY_CLASSES_M, t.size)
    return t, valid, sigma


def _mc_band_dfts(t, valid, sigma, rho, angle, reps, rng, chunk=100):
    """``J(+f)`` and ``J(-f)`` over all frequencies of ``reps`` simulated windows, computed by hand: positions at the
    fixes plus independent errors (per fix, per component), linear interpolation to the hourly grid
    (scipy.interpolate.interp1d), central difference, mask, demeaning over the valid samples, Hann taper."""
    from scipy.interpolate import interp1d

    n = valid.size
    h = masked_taper(n, valid, "hann")
    i_fix = np.round((t - t[0]) * SUB).astype(int)
    grid = np.clip(np.arange(-1, n + 1) * DT, t[0], t[-1])
    out = []
    done = 0
    while done < reps:
        k = min(chunk, reps - done)
        xf = anisotropic_positions((t[-1] - t[0]), rho, angle, rng, k)[:, i_fix]
        xf = xf + sigma * (rng.standard_normal(xf.shape) + 1j * rng.standard_normal(xf.shape))
        xg = interp1d(t, xf, axis=1, assume_sorted=True)(grid)
        z = (xg[:, 2:] - xg[:, :-2]) / (2 * DT * SECONDS_PER_DAY)
        z = np.where(valid, z - (z * valid).sum(axis=1, keepdims=True) / valid.sum(), 0.0)
        out.append(np.sqrt(DT) * np.fft.fft(h * z, axis=1))
        done += k
    return np.concatenate(out)


def _irregular_family(t, valid, sigma, win):
    from driftspec.analysis.fitting.anisotropy import _anisotropic_family
    from driftspec.analysis.spectral.irregular import IrregularlyObserved, IrregularObservation

    op = IrregularObservation(t, DT, valid.size, valid, "central", "hann", position_error_m=sigma, noise="fixed",
                              band_index=win.prep.band_index)
    return _anisotropic_family(IrregularlyObserved(Matern(), op))


@pytest.mark.parametrize("rho", [0.5, 0.0])
def test_irregular_cross_term_equals_monte_carlo_mean(rho):
    # reference: Monte Carlo, the mean of J(f) J(-f) over 800 windows simulated independently of the model code
    # (real Matérn pair rotated, positions read at satellite-like fixes, errors added, interpolated, differenced,
    # masked, demeaned and tapered by hand) against E[J(f) J(-f)] = gamma dt int S_M K_k df through the same fixes;
    # E[|J(+-f)|^2] is checked on the same draws. For rho = 0 the expectation is exactly zero.
    rng = np.random.default_rng(31)
    t, valid, sigma = _irregular_setup(rng)
    reps = 800
    win = prepare_bivariate(np.where(valid, 1j, np.nan), DT, taper="hann", max_freq=6.0)
    fam = _irregular_family(t, valid, sigma, win)
    theta = [*MATERN, 1.0, rho, 30.0]
    em = expected_matrix(fam, theta, win, FitContext(dt_days=DT), jacobian=False)
    j = _mc_band_dfts(t, valid, sigma, rho, 30.0, reps, rng)
    jp, jn = j[:, win.k_pos], j[:, win.k_neg]
    prod = jp * jn
    scale = np.sqrt(em.pos * em.neg)
    # the proper part on the same draws: band averages within 3 % (Monte Carlo error ~ 1 % here)
    for i, e in ((np.abs(jp) ** 2, em.pos), (np.abs(jn) ** 2, em.neg)):
        assert abs(np.mean(i.mean(axis=0) / e) - 1) < 0.03
    # blocks of 16 adjacent ordinates and the whole band: the mean of J J- against E, in units of sqrt(E+ E-),
    # within 4 Monte Carlo standard errors (from the replicates), real and imaginary parts
    order = np.argsort(win.freq_cpd)
    m = order.size // 16 * 16
    d = ((prod - em.cross) / scale)[:, order[:m]].reshape(reps, -1, 16).mean(axis=2)
    d = np.concatenate([d, ((prod - em.cross) / scale).mean(axis=1, keepdims=True)], axis=1)
    for part in (d.real, d.imag):
        se = part.std(axis=0, ddof=1) / np.sqrt(reps)
        assert np.all(np.abs(part.mean(axis=0)) < 4 * se), np.max(np.abs(part.mean(axis=0)) / se)
    if rho == 0:
        assert np.all(em.cross == 0)
        return
    # the cross term is material (so the check can fail), and the band's total agrees within 4 %
    assert np.median(np.abs(em.cross) / scale) > 0.1
    assert abs(prod.mean(axis=0).sum() / em.cross.sum() - 1) < 0.04


R_EARTH_M = 6371000.0  # a local tangent plane is enough for tracks of tens of km


def _satellite_tracks(n_tracks, days, rho, angle, seed):
    """Fixes (id, time, lat, lon, position_error_m) of tracks of the independent construction, read at satellite-like
    fix times (the project's scenario generator) with per-fix errors of its accuracy classes."""
    import pandas as pd

    from driftspec.analysis.simulation.scenarios import ACCURACY_CLASS_SHARES, ACCURACY_CLASSES_M, satellite_fix_times

    rng = np.random.default_rng(seed)
    rows = []
    for k in range(n_tracks):
        xy = anisotropic_positions(days, rho, angle, rng, 1)[0]
        t = satellite_fix_times(rng, days)
        i = np.round(t * SUB).astype(int)
        err = rng.choice(ACCURACY_CLASSES_M, i.size, p=ACCURACY_CLASS_SHARES)
        x = xy[i].real + err * rng.standard_normal(i.size)
        y = xy[i].imag + err * rng.standard_normal(i.size)
        lat = 35.0 + np.degrees(y / R_EARTH_M)
        lon = -40.0 + np.degrees(x / (R_EARTH_M * np.cos(np.radians(35.0))))
        rows.append(pd.DataFrame({"id": f"S{k}", "time": pd.Timestamp("2031-01-01") + pd.to_timedelta(i / SUB, "D"),
                                  "lat": lat, "lon": lon, "position_error_m": err}))
    return pd.concat(rows, ignore_index=True)


@pytest.fixture(scope="module")
def irregular_windows_3to1():
    from driftspec.analysis import read_fixes
    from driftspec.analysis.tracks.pipeline import grid_velocities
    from driftspec.analysis.tracks.qc import clean_fixes
    from driftspec.analysis.tracks.windows import iter_windows

    fixes = _satellite_tracks(5, 61.0, 0.5, 30.0, seed=41)
    vel = grid_velocities(clean_fixes(read_fixes(fixes))[0])
    return list(iter_windows(vel, window_days=60, overlap=0.5))


def test_irregular_windows_recover_3_to_1_at_30_degrees(irregular_windows_3to1):
    # reference: the generating values of the independent simulation (3:1 variances along 30 degrees)
    from driftspec.analysis import FitSpec, fit_window

    windows = irregular_windows_3to1
    assert len(windows) == 5 and all(w.irregular for w in windows)
    fits = [fit_window(w, FitSpec(models=("matern",), anisotropic=True))[-1] for w in windows]
    assert all(f.status == "ok" and f.stderr_method == "sandwich" for f in fits), [f.message for f in fits]
    angles = np.array([f.params["anisotropy_angle_deg"] for f in fits])
    rho = np.array([f.params["anisotropy"] for f in fits])
    # the median axis within 15 degrees (axial difference), the variance ratio (1 + rho) / (1 - rho) near 3
    assert abs(wrap_axis_deg(np.median(angles) - 30.0)) < 15, angles
    assert 1.8 < np.median((1 + rho) / (1 - rho)) < 5.0, rho
    assert np.mean([f.isotropy_pvalue < 0.01 for f in fits]) >= 0.6
    # the standard error of the angle covers the scatter about the truth (a z-score within 4 for every window)
    se = np.array([f.stderr["anisotropy_angle_deg"] for f in fits])
    assert np.all(np.abs(wrap_axis_deg(angles - 30.0)) < 4 * se), (angles, se)


def test_fit_window_gives_irregular_windows_an_anisotropic_row(irregular_windows_3to1):
    # end to end through the window driver and the fits-table rows with the default candidates (matern and
    # matern+inertial): the window of irregular fixes gets an anisotropic row with a finite isotropy p-value, which
    # rejects isotropy for this 3:1 flow, so that row is the selected one, and its tensor's axis is near the
    # simulated 30 degrees (the generating value)
    from driftspec.analysis import FitSpec
    from driftspec.analysis.fitting.batch import window_rows

    rows = window_rows(irregular_windows_3to1[1], FitSpec(anisotropic=True))
    assert len(rows) == 1, [(r["model"], r["status"], r.get("message")) for r in rows]
    row = rows[0]
    assert row["model"].startswith("anisotropic_") and row["observation"] == "irregular", row["selection"]
    assert row["status"] in ("ok", "at_bound") and np.isfinite(row["isotropy_pvalue"]), row["message"]
    assert row["isotropy_pvalue"] < 0.01 and row["selected"]
    assert abs(wrap_axis_deg(row["diffusivity_angle_deg"] - 30.0)) < 20
    assert row["diffusivity_major"] > row["diffusivity_minor"] > 0


def test_irregular_expected_matrix_derivatives_against_finite_differences():
    # reference: central differences of the expected matrix itself in the optimiser's coordinates (log variance,
    # alpha, log damping, log error scale, (Re gamma, Im gamma)), for a window of irregular fixes
    rng = np.random.default_rng(32)
    t, valid, sigma = _irregular_setup(rng, n=480)
    win = prepare_bivariate(np.where(valid, 1j, np.nan), DT, taper="hann", max_freq=6.0)
    fam = _irregular_family(t, valid, sigma, win)
    ctx = FitContext(dt_days=DT)
    x0 = np.array([np.log(0.04), 1.2, np.log(1.0), np.log(1.3), 0.3, 0.25])

    def theta(x):
        g = complex(x[4], x[5])
        return [np.exp(x[0]), x[1], *np.exp(x[2:4]), abs(g), np.degrees(0.5 * np.angle(g))]

    em = expected_matrix(fam, theta(x0), win, ctx)
    assert em.d_cross.shape == (6, win.n_freq) and np.all(em.d_cross[3] == 0)  # the error scale: no cross term
    for j in range(6):
        h = 1e-4
        xp, xm = x0.copy(), x0.copy()
        xp[j] += h
        xm[j] -= h
        ep = expected_matrix(fam, theta(xp), win, ctx, jacobian=False)
        emn = expected_matrix(fam, theta(xm), win, ctx, jacobian=False)
        for num, ana, ref in (((ep.pos - emn.pos) / (2 * h), em.d_pos[j], em.pos),
                              ((ep.neg - emn.neg) / (2 * h), em.d_neg[j], em.neg),
                              ((ep.cross - emn.cross) / (2 * h), em.d_cross[j], em.pos)):
            np.testing.assert_allclose(ana, num, rtol=0, atol=1e-4 * np.max(np.abs(ref)))
