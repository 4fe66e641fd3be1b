"""Rotary spectra against published examples and data shipped with statsmodels."""

import numpy as np
import pytest
import scipy.signal

from driftspec.analysis.spectral.periodogram import multitaper_spectrum, rotary_periodogram


def test_parseval_with_gaps(rng):
    z = rng.standard_normal(1000) + 1j * rng.standard_normal(1000)
    z[100:180] = np.nan
    s = rotary_periodogram(z, 1800.0)
    df = 1.0 / (1000 * 1800.0 / 86400.0)
    valid = z[np.isfinite(z)]
    assert s.power.sum() * df == pytest.approx(np.mean(np.abs(valid - valid.mean()) ** 2), rel=1e-10)


def test_rotary_sides_separate_rotation(rng):
    # a counterclockwise circle at +2 cpd shows on the positive side only
    t = np.arange(960) / 48.0
    z = 0.3 * np.exp(2j * np.pi * 2.0 * t)
    s = rotary_periodogram(z, 1800.0)
    assert s.freq_cpd[np.argmax(s.power)] == pytest.approx(2.0)
    f_ccw, p_ccw = s.counterclockwise
    f_cw, p_cw = s.clockwise
    assert p_ccw.max() > 1e10 * max(p_cw.max(), 1e-300) or p_cw.max() < 1e-20


def test_periodogram_matches_scipy_for_real_series(rng):
    # scipy.signal.periodogram (two-sided, density) is the reference for a real series
    x = rng.standard_normal(512)
    f_ref, p_ref = scipy.signal.periodogram(x, fs=1.0, return_onesided=False, detrend="constant")
    s = rotary_periodogram(x, 86400.0)  # one sample per day: cpd = cycles per sample
    o = np.argsort(f_ref)
    np.testing.assert_allclose(s.freq_cpd, f_ref[o])
    np.testing.assert_allclose(s.power, p_ref[o], rtol=1e-10, atol=1e-14)


AR4 = np.array([2.7607, -3.8106, 2.6535, -0.9238])  # Percival & Walden (1993), from memory


def _ar4_true(f):
    k = np.arange(1, 5)
    return 1.0 / np.abs(1 - np.exp(-2j * np.pi * np.outer(f, k)) @ AR4) ** 2


def test_multitaper_controls_leakage_of_ar4():
    # Percival & Walden (1993), "Spectral Analysis for Physical Applications", AR(4) example with a
    # dynamic range of ~50 dB: the raw periodogram leaks far above the truth at high frequency, a
    # multitaper estimate with NW = 4 and a few tapers does not. Averaged over 8 realisations, N = 256.
    n, burn = 256, 2000
    err_mt, err_pg, cover = [], [], []
    for seed in range(8):
        rng = np.random.default_rng(seed)
        x = scipy.signal.lfilter([1.0], np.r_[1.0, -AR4], rng.standard_normal(n + burn))[burn:]
        mt = multitaper_spectrum(x, 86400.0, time_bandwidth=4, n_tapers=4)
        pg = rotary_periodogram(x, 86400.0)
        hi = np.abs(mt.freq_cpd) > 0.3
        truth = _ar4_true(mt.freq_cpd[hi])
        err_mt.append(np.median(10 * np.log10(mt.power[hi] / truth)))
        err_pg.append(np.median(10 * np.log10(pg.power[hi] / truth)))
        cover.append(np.mean((mt.lower[hi] <= truth) & (truth <= mt.upper[hi])))
    assert abs(np.mean(err_mt)) < 3.0
    assert np.mean(err_pg) > 10.0
    assert np.mean(cover) > 0.8  # pointwise 95 % intervals; neighbours are correlated


def test_sunspot_cycle_from_statsmodels_data():
    # statsmodels.datasets.sunspots: yearly sunspot numbers 1700-2008; the Schwabe cycle is ~11 years
    sm = pytest.importorskip("statsmodels.api")
    x = sm.datasets.sunspots.load_pandas().data["SUNACTIVITY"].to_numpy()
    year_s = 365.25 * 86400.0
    mt = multitaper_spectrum(x, year_s, time_bandwidth=2, n_tapers=3)
    pos = mt.freq_cpd > 0
    f_peak = mt.freq_cpd[pos][np.argmax(mt.power[pos])]
    period_years = 1.0 / (f_peak * 365.25)
    assert 10.0 <= period_years <= 12.0


def test_multitaper_defaults_give_the_documented_tapers_and_interval(rng):
    # defaults: NW = 4 and K = 2 NW - 3 = 5 tapers; the pointwise 95 % interval comes from chi-squared with 2K
    # degrees of freedom (Percival & Walden 1993, eq. 370a). On complex white noise of known density, the interval
    # covers the true spectrum at about 95 % of the frequencies away from zero (each frequency is a draw from that
    # distribution; neighbours are correlated, so the tolerance is generous)
    from scipy.stats import chi2

    n, dt = 2048, 3600.0
    density = 0.02 * dt / 86400.0  # (m/s)^2 per cpd of white noise of variance 0.02 at hourly steps
    hits = []
    for _ in range(6):
        z = np.sqrt(0.01) * (rng.standard_normal(n) + 1j * rng.standard_normal(n))
        mt = multitaper_spectrum(z, dt)
        f, s_lo, s_hi = mt.freq_cpd, mt.lower, mt.upper
        away = np.abs(f) > 0.1
        hits.append(np.mean((s_lo[away] <= density) & (density <= s_hi[away])))
        # the interval's width is the chi-squared(10) one: upper/lower = q(0.975)/q(0.025) of chi2(2K)/2K
        ratio = np.median(s_hi[away] / s_lo[away])
        assert ratio == pytest.approx(chi2.ppf(0.975, 10) / chi2.ppf(0.025, 10), rel=1e-6)
    assert 0.90 < np.mean(hits) < 0.99
