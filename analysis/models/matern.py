"""The Matérn process for the turbulent background.

Spectral density (two-sided, complex velocity, cycles per day)::

    S(f) = c * (omega^2 + lambda^2)^(-alpha),    omega = 2 pi f  (rad/day)

with ``c`` chosen so that the integral of S over frequency is the variance ``sigma^2 = E|z|^2``::

    c = sigma^2 * 2 sqrt(pi) * lambda^(2 alpha - 1) * Gamma(alpha) / Gamma(alpha - 1/2)

Autocovariance, with ``nu = alpha - 1/2``::

    R(tau) = sigma^2 * 2^(1 - nu) / Gamma(nu) * (lambda |tau|)^nu * K_nu(lambda |tau|)

``alpha`` sets the high-frequency slope ``|omega|^(-2 alpha)``, ``lambda`` the damping (the low-frequency
corner); ``alpha = 1`` is the Ornstein-Uhlenbeck process ``R = sigma^2 exp(-lambda |tau|)``.

Evaluating ``K_nu`` at every lag dominates a likelihood evaluation, so the normalised correlation
``rho_nu(x) = 2^(1-nu)/Gamma(nu) x^nu K_nu(x)`` is tabulated once per process on a grid in ``nu`` and
``u = log x``, with its exact ``u``-derivative ``d rho/du = -2^(1-nu)/Gamma(nu) x^(nu+1) K_(nu-1)(x)``; it is
interpolated by cubic Lagrange polynomials in ``nu`` and cubic Hermite polynomials in ``u``. The
interpolant agrees with ``scipy.special.kv`` to about 1e-8 (checked in the tests), and its derivatives
are the exact derivatives of the interpolant, which the optimiser needs.

References
----------
"Fractional Brownian motion, the Matérn process, and stochastic modeling of turbulent dispersion".
Nonlinear Processes in Geophysics 24, 481-514 (2017). doi:10.5194/npg-24-481-2017

"Matérn cross-covariance functions for multivariate random fields". Journal of the American Statistical
Association 105, 1167-1177 (2010) (the Matérn form).
"""

from __future__ import annotations

import functools
import math

import numpy as np
from scipy.special import digamma, gammaln, kv

from .base import FitContext, ModelFamily, Parameter

_NU_MIN, _NU_MAX, _NU_STEP = 0.06, 4.52, 0.01
_U_MIN, _U_MAX, _U_N = float(np.log(1e-7)), float(np.log(80.0)), 1601
_INV_H = (_U_N - 1) / (_U_MAX - _U_MIN)
_X_TINY = 1e-300


@functools.lru_cache(maxsize=1)
def _tables():
    nu = np.arange(_NU_MIN - 2 * _NU_STEP, _NU_MAX + 2.5 * _NU_STEP, _NU_STEP)
    u = np.linspace(_U_MIN, _U_MAX, _U_N)
    x = np.exp(u)[None, :]
    n = nu[:, None]
    logc = (1 - n) * np.log(2.0) - gammaln(n)
    rho = np.exp(logc + n * np.log(x)) * kv(n, x)
    drho = -np.exp(logc + (n + 1) * np.log(x)) * kv(n - 1, x)
    # the cubic Hermite interpolant on each u-interval as a polynomial in q = (u - u_i)/h:
    # c0 + c1 q + c2 q^2 + c3 q^3, stored as (nu row, coefficient, interval) for row-wise combination
    h = u[1] - u[0]
    y0, y1, m0, m1 = rho[:, :-1], rho[:, 1:], h * drho[:, :-1], h * drho[:, 1:]
    coef = np.stack([y0, m0, 3 * (y1 - y0) - 2 * m0 - m1, 2 * (y0 - y1) + m0 + m1], axis=1)
    return nu, np.ascontiguousarray(coef)  # the values and slopes live on in the coefficients only


def _lagrange(t: float):
    """Cubic Lagrange weights over rows k-1 .. k+2 at offset ``t`` from row k, and their t-derivatives."""
    w = np.array([-t * (t - 1) * (t - 2) / 6, (t + 1) * (t - 1) * (t - 2) / 2,
                  -(t + 1) * t * (t - 2) / 2, (t + 1) * t * (t - 1) / 6])
    dw = np.array([-(3 * t * t - 6 * t + 2) / 6, (3 * t * t - 4 * t - 1) / 2,
                   -(3 * t * t - 2 * t - 2) / 2, (3 * t * t - 1) / 6])
    return w, dw


def matern_correlation_exact(nu, x):
    """``rho_nu(x)`` straight from ``scipy.special.kv`` (reference; slow)."""
    x = np.abs(np.asarray(x, float))
    out = np.ones_like(x)
    pos = x > 0
    out[pos] = np.exp((1 - nu) * np.log(2.0) - gammaln(nu) + nu * np.log(x[pos])) * kv(nu, x[pos])
    return out


def matern_correlation(nu: float, x: np.ndarray, derivatives: bool = False):
    """Tabulated ``rho_nu(x)`` for ``x >= 0``, optionally with ``d rho/d nu`` and ``d rho/d log x``."""
    nus, coef = _tables()
    nu = float(nu)
    if not (_NU_MIN - 1e-12 <= nu <= _NU_MAX + 1e-12):
        raise ValueError(f"Matérn order nu={nu} outside the tabulated range [{_NU_MIN}, {_NU_MAX}]")
    x = np.asarray(x, float)
    s = (nu - float(nus[0])) / _NU_STEP
    k = min(max(math.floor(s), 1), len(nus) - 3)
    w, dw = _lagrange(s - k)
    block = coef[k - 1:k + 3].reshape(4, -1)
    # combine the four nu rows first (table length), then evaluate the interval polynomials at the lags
    c = (w @ block).reshape(4, -1)
    u = np.log(np.maximum(x, _X_TINY))
    j = np.minimum(np.maximum(u, _U_MIN), _U_MAX)
    j -= _U_MIN
    j *= _INV_H
    i = np.minimum(j.astype(np.int64), _U_N - 2)
    q = j - i
    c0, c1, c2, c3 = c[0][i], c[1][i], c[2][i], c[3][i]
    val = ((c3 * q + c2) * q + c1) * q + c0
    zero = x <= 0
    outside = zero | (u >= _U_MAX)  # rho = 1 at 0 and 0 beyond the table, both with zero derivatives
    val[outside] = 0.0
    val[zero] = 1.0
    if not derivatives:
        return val
    d = (dw @ block).reshape(4, -1)
    d *= 1.0 / _NU_STEP
    d_nu = ((d[3][i] * q + d[2][i]) * q + d[1][i]) * q + d[0][i]
    d_u = ((3 * c3 * q + 2 * c2) * q + c1) * _INV_H
    d_u[u < _U_MIN] = 0.0  # clamped region: treated as constant
    d_nu[outside] = 0.0
    d_u[outside] = 0.0
    return val, d_nu, d_u


#: ``[R; dR/dlog var; dR/dalpha; dR/dlog lambda]`` from the basis rows ``(R, dR/dnu, dR/dlog lambda)``
_MATERN_MIX = np.array([[1.0, 0, 0], [1.0, 0, 0], [0, 1.0, 0], [0, 0, 1.0]])


class Matern(ModelFamily):
    """Matérn background: ``matern_variance``, ``matern_alpha``, ``matern_damping``."""

    name = "matern"
    real_autocovariance = True
    parameters = (
        Parameter("matern_variance", "m2 s-2", 1e-8, 10.0, "variance E|z|^2 of the background"),
        Parameter("matern_alpha", "1", _NU_MIN + 0.5 + 0.03, _NU_MAX + 0.5 - 0.03,
                  "slope parameter; the spectrum falls as |omega|^(-2 alpha)", scale="linear"),
        Parameter("matern_damping", "day-1", 1e-3, 100.0, "damping lambda (low-frequency corner)"),
    )

    def _autocovariance(self, theta, lags_days, context=None):
        var, alpha, lam = theta
        return var * matern_correlation(alpha - 0.5, lam * np.abs(lags_days))

    def _autocovariance_jacobian(self, theta, lags_days, context=None):
        var, alpha, lam = theta
        rho, d_nu, d_u = matern_correlation(alpha - 0.5, lam * np.abs(lags_days), derivatives=True)
        r = var * rho
        jac = np.empty((3, r.size))
        jac[0], jac[1], jac[2] = r, d_nu, d_u
        jac[1:] *= var
        return r, jac

    def _autocovariance_basis(self, theta, lags_days, context=None):
        # rows R, dR/dnu, dR/dlog(lambda); the log-variance row repeats R
        var, alpha, lam = theta
        b = np.vstack(matern_correlation(alpha - 0.5, lam * np.abs(lags_days), derivatives=True))
        b *= var
        return b, _MATERN_MIX

    @staticmethod
    def _norm(var, alpha, lam):
        return var * 2 * np.sqrt(np.pi) * lam ** (2 * alpha - 1) * np.exp(gammaln(alpha) - gammaln(alpha - 0.5))

    def _spectral_density(self, theta, freq_cpd, context=None):
        var, alpha, lam = theta
        omega = 2 * np.pi * np.asarray(freq_cpd, float)
        return self._norm(var, alpha, lam) * (omega**2 + lam**2) ** (-alpha)

    def _spectral_density_jacobian(self, theta, freq_cpd, context=None):
        """``S`` and its exact derivatives in (log variance, alpha, log lambda)."""
        var, alpha, lam = theta
        omega2 = (2 * np.pi * np.asarray(freq_cpd, float)) ** 2
        base = omega2 + lam**2
        s = self._norm(var, alpha, lam) * base ** (-alpha)
        jac = np.empty((3, s.size))
        jac[0] = s
        jac[1] = s * (2 * np.log(lam) + digamma(alpha) - digamma(alpha - 0.5) - np.log(base))
        jac[2] = s * ((2 * alpha - 1) - 2 * alpha * lam**2 / base)
        return s, jac

    def _zero_frequency_density(self, theta, context=None):
        var, alpha, lam = theta
        return float(self._norm(var, alpha, lam) * lam ** (-2 * alpha))

    def _initial_guess(self, freq_cpd, power, context: FitContext):
        f, p = np.asarray(freq_cpd, float), np.asarray(power, float)
        df = np.ptp(f) / (f.size - 1) if f.size > 1 else 1.0  # the band is a regular grid (minus gaps)
        var = max(float(np.sum(p) * df), 1e-6)
        af = np.abs(f)
        fmax = af.max() if af.size else 1.0
        # the slope from the upper band, but below half the Nyquist frequency, where aliasing flattens it
        top = min(fmax, 0.25 / context.dt_days) if context.dt_days else fmax
        hi = (af > 0.25 * top) & (af <= top) & (p > 0)
        if context.inertial_frequency_cpd is not None:
            hi &= np.abs(np.abs(f) - abs(context.inertial_frequency_cpd)) > 0.3
        alpha = 1.0
        if hi.sum() > 8:
            lx, ly = np.log(af[hi]), np.log(p[hi])
            lx = lx - lx.mean()
            slope = float(lx @ (ly - ly.mean()) / (lx @ lx))  # least-squares slope in log-log
            alpha = float(np.clip(-slope / 2, 0.6, 3.5))
        # S(0) = var 2 sqrt(pi) Gamma(alpha) / Gamma(alpha - 1/2) / lambda, with S(0) from the lowest bins
        # corrected for the fall-off (1 + (omega/lambda)^2)^(-alpha) across them (a few fixed-point steps)
        lo = np.argsort(af)[: max(3, int(0.02 * af.size))]
        num = var * 2 * np.sqrt(np.pi) * np.exp(gammaln(alpha) - gammaln(alpha - 0.5))
        w2 = (2 * np.pi * af[lo]) ** 2
        lam = num / max(float(np.mean(p[lo])), 1e-12) if lo.size else 1.0
        for _ in range(4 if lo.size else 0):
            lam = float(np.clip(lam, 0.02, 20.0))
            s0 = float(np.mean(p[lo] * (1 + w2 / lam**2) ** alpha))
            lam = num / max(s0, 1e-12)
        lam = float(np.clip(lam, 0.02, 20.0))
        return np.array([var, alpha, lam])

    def _zero_frequency_density_jacobian(self, theta, context=None):
        # S(0) = var 2 sqrt(pi) Gamma(alpha) / (Gamma(alpha - 1/2) lambda)
        s0 = self._zero_frequency_density(theta, context)
        alpha = theta[1]
        return s0, np.array([s0, s0 * (digamma(alpha) - digamma(alpha - 0.5)), -s0])

    def _derived(self, theta, context=None):
        var, alpha, lam = theta
        # integral time scale int_0^inf R / R(0) = S(0) / (2 sigma^2), days
        t_int = np.sqrt(np.pi) * np.exp(gammaln(alpha) - gammaln(alpha - 0.5)) / lam
        return {"matern_timescale_days": float(t_int)}
