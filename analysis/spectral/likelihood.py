"""Likelihoods for a model family on one window: debiased Whittle, standard Whittle, exact Gaussian.

Debiased Whittle (the default)
------------------------------
For a window of ``N`` samples at interval ``dt`` with data taper ``h`` (zero on missing samples, unit sum
of squares), the expected periodogram of a stationary process with autocovariance ``R`` is::

    E[I_k] = dt * sum_{tau=-(N-1)}^{N-1} c(tau) R(tau dt) exp(-2 pi i k tau / N),
    c(tau) = sum_t h_{t+tau} h_t

and, because ``c(-tau) R(-tau) = conj(c(tau) R(tau))``, this is ``dt * (2 Re FFT[c R](k) - c(0) R(0))``:
one FFT of length ``N`` per evaluation. ``c`` is computed once per window. A component that is a
stationary process times a known unit-modulus sequence ``w_t = exp(i phase_t)`` uses the lag weights
``c_w(tau) = sum_t h_{t+tau} h_t w_{t+tau} conj(w_t)`` instead, which is again exact. The (negative)
log-likelihood over the fitted band ``K`` is::

    L(theta) = sum_{k in K} [ log E[I_k](theta) + I_k / E[I_k](theta) ]

Its gradient uses ``dE/dtheta``, which is the same FFT applied to ``c dR/dtheta``: all derivatives come
from one batched FFT.

Standard Whittle uses the continuous spectral density ``S(f_k)`` in place of ``E[I_k]``. The exact Gaussian
likelihood is in :mod:`driftspec.analysis.spectral.exact`.

References
----------
"The debiased Whittle likelihood". Biometrika 106, 251-266 (2019). doi:10.1093/biomet/asy071
Whittle, P. (1953). Estimation and information in stationary time series. Arkiv för Matematik 2,
423-434. doi:10.1007/BF02590998
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
import scipy.fft

from ..models.base import FitContext, ModelFamily
from ..models.inertial import modulation_sequence
from .periodogram import masked_taper

ESTIMATORS = ("debiased", "whittle", "exact")


@dataclass
class PreparedWindow:
    """Everything about a window that stays fixed while the parameters change."""

    z: np.ndarray  # demeaned, zero where missing
    valid: np.ndarray
    dt_days: float
    taper: np.ndarray  # normalised, zero where missing
    freq_cpd: np.ndarray  # FFT order
    periodogram: np.ndarray  # FFT order
    band: np.ndarray  # bool, FFT order
    lags_days: np.ndarray
    lag_weights: np.ndarray  # c(tau), tau = 0..N-1
    modulated_weights: np.ndarray | None
    modulation: np.ndarray | None  # w_t
    real_valued: bool
    variance_inflation: float  # N sum h^4 (variance inflation of tapered/masked periodograms)

    @property
    def n(self) -> int:
        return self.z.size

    @functools.cached_property
    def band_index(self) -> np.ndarray:
        """FFT-order indices of the fitted band."""
        return np.flatnonzero(self.band)

    @functools.cached_property
    def band_fold(self) -> np.ndarray:
        """``|k|`` for each band index (its place in a one-sided real FFT)."""
        k = self.band_index
        return np.minimum(k, self.n - k)

    @property
    def n_valid(self) -> int:
        return int(self.valid.sum())


def _autocorrelate(x: np.ndarray) -> np.ndarray:
    """``c(tau) = sum_t x_{t+tau} conj(x_t)`` for tau = 0..N-1, by zero-padded FFT."""
    n = x.size
    m = scipy.fft.next_fast_len(2 * n)
    f = scipy.fft.fft(x, m)
    return scipy.fft.ifft(np.abs(f) ** 2 if np.isrealobj(x) else f * np.conj(f))[:n]


def prepare_window(z, dt_days: float, *, mask=None, taper=None, max_freq=None, exclude=None,
                   modulated: bool = False, latitude_series=None) -> PreparedWindow:
    """Periodogram, band and lag weights of a window (see module docstring)."""
    z = np.asarray(z)
    real_valued = not np.iscomplexobj(z) or bool(np.all(np.imag(z[np.isfinite(z)]) == 0))
    zc = np.asarray(z, complex)
    valid = np.isfinite(zc)
    if mask is not None:
        valid &= np.asarray(mask, bool)
    n = zc.size
    if valid.sum() < 2:
        raise ValueError("fewer than two valid samples")
    zz = np.where(valid, zc - zc[valid].mean(), 0)
    if real_valued:
        zz = zz.real
    h = masked_taper(n, valid, taper)
    pgram = dt_days * np.abs(scipy.fft.fft(h * zz)) ** 2
    freq = scipy.fft.fftfreq(n, d=dt_days)
    nyquist = 0.5 / dt_days
    top = nyquist if max_freq is None else float(max_freq)
    if top <= 0:
        raise ValueError("max_freq must be positive")
    band = (np.abs(freq) <= top + 1e-12) & (freq != 0)
    if real_valued:
        band &= freq > 0
        if n % 2 == 0:  # the Nyquist bin of a real series belongs to one side only
            band[n // 2] = top >= nyquist - 1e-12
    for lo, hi in exclude or ():
        band &= ~((np.abs(freq) >= lo) & (np.abs(freq) <= hi))
    c = _autocorrelate(h).real
    w = cw = None
    if modulated:
        if latitude_series is None:
            raise ValueError("a latitude-following model needs the latitude of every sample")
        w = modulation_sequence(latitude_series, dt_days)
        cw = _autocorrelate(h * w)
    return PreparedWindow(
        z=zz, valid=valid, dt_days=dt_days, taper=h, freq_cpd=freq, periodogram=pgram, band=band,
        lags_days=np.arange(n) * dt_days, lag_weights=c, modulated_weights=cw, modulation=w,
        real_valued=real_valued, variance_inflation=float(n * np.sum(h**4)),
    )


def expected_periodogram(family: ModelFamily, theta, prep: PreparedWindow, context: FitContext,
                         jacobian: bool = False):
    """Expected periodogram ``E[I_k]`` (FFT order) and optionally ``dE/dx`` for optimiser coordinates."""
    theta = np.asarray(theta, float)
    n = prep.n
    p = len(theta)
    stack = np.zeros((1 + p if jacobian else 1, n), dtype=complex)
    for comp, sl in family.components():
        weights = prep.modulated_weights if comp.modulated else prep.lag_weights
        if jacobian:
            r, jac = comp.autocovariance_jacobian(theta[sl], prep.lags_days, context)
            stack[0] += weights * r
            stack[1 + sl.start:1 + sl.stop] = weights * jac
        else:
            stack[0] += weights * comp.autocovariance(theta[sl], prep.lags_days, context)
    if prep.real_valued:
        stack = stack.real.astype(complex)
    spec = scipy.fft.fft(stack, axis=-1)
    e = prep.dt_days * (2 * spec.real - stack[:, :1].real)
    return (e[0], e[1:]) if jacobian else e[0]


def expected_in_band(family: ModelFamily, theta, prep: PreparedWindow, context: FitContext):
    """``E[I_k]`` and ``dE/dx`` over the fitted band only (what the optimiser needs), in band order.

    Same values as :func:`expected_periodogram`; components with a real autocovariance and real lag weights
    (a stationary Matérn, position noise, any component of a real-valued series) go through a real FFT and
    are read off at ``|k|``, the others through a complex FFT.
    """
    if hasattr(family, "expected_in_band"):  # a family observed through its own operator (irregular fixes)
        return family.expected_in_band(theta, prep, context)
    theta = np.asarray(theta, float)
    nb = prep.band_index.size
    e = np.zeros(nb)
    de = np.empty((len(theta), nb))
    for comp, sl in family.components():
        basis, mix = comp.autocovariance_basis(theta[sl], prep.lags_days, context)
        weights = prep.modulated_weights if comp.modulated else prep.lag_weights
        if mix is not None and np.iscomplexobj(mix) and prep.real_valued:
            basis, mix = mix @ basis, None  # the real part is taken of the rows: a complex mix must come first
        if comp.modulated and prep.real_valued:
            rows = np.real(weights * basis)
            spec = scipy.fft.rfft(rows, axis=-1).real[:, prep.band_fold]
        elif prep.real_valued or (comp.real_autocovariance and not comp.modulated):
            rows = np.real(basis) * weights
            spec = scipy.fft.rfft(rows, axis=-1).real[:, prep.band_fold]
        else:
            rows = basis * weights
            spec = scipy.fft.fft(rows, axis=-1)[:, prep.band_index]
        spec *= 2.0
        spec -= rows[:, :1]
        if mix is not None:
            spec = mix @ spec
        if np.iscomplexobj(spec):
            spec = spec.real
        e += spec[0]
        de[sl] = spec[1:]
    e *= prep.dt_days
    de *= prep.dt_days
    return e, de


def whittle_expectation(family: ModelFamily, theta, prep: PreparedWindow, context: FitContext):
    """The continuous spectral density at the Fourier frequencies (standard Whittle)."""
    return np.real(family.spectral_density(np.asarray(theta, float), prep.freq_cpd, context))


def negloglik_whittle_form(expected, prep: PreparedWindow, d_expected=None):
    """``sum_band log E + I/E`` and its gradient."""
    b = prep.band
    e = np.maximum(expected[b], 1e-300)
    i = prep.periodogram[b]
    val = float(np.sum(np.log(e) + i / e))
    if d_expected is None:
        return val
    g = d_expected[:, b] @ ((e - i) / e**2)
    return val, g
