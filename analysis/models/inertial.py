"""Inertial oscillations as a complex Ornstein-Uhlenbeck process.

Constant frequency (family ``inertial``)::

    R(tau) = sigma^2 exp(2 pi i f0 tau - gamma |tau|),       tau >= 0 (Hermitian for tau < 0)
    S(f)   = sigma^2 * 2 gamma / (gamma^2 + (2 pi (f - f0))^2)

``f0`` is signed (cpd; negative = clockwise), ``gamma`` the damping (1/day); the oscillation's e-folding
time is ``1/gamma``.

Latitude-following (family ``inertial_following``): the oscillation frequency follows the local inertial
frequency ``f(t) = -2 Omega sin(latitude(t))`` along the window. The process is a zero-frequency complex
OU process ``y`` times the known unit-modulus sequence ``exp(i phase(t))`` with ``phase`` the running
integral of ``2 pi f(t)``; the likelihood folds that sequence into its lag weights once per window, so
each evaluation stays one FFT.

References
----------
Arnold, L. (1974). Stochastic Differential Equations: Theory and Applications. Wiley (the OU process).
"Lagrangian time series models for ocean surface drifter trajectories". Journal of the Royal
Statistical Society C 65, 29-50 (2016). doi:10.1111/rssc.12112
"""

from __future__ import annotations

import numpy as np

from ..conventions import inertial_frequency_cpd
from .base import FitContext, ModelFamily, Parameter


def _peak_share(f, p, f0, half_width):
    near = np.abs(f - f0) < half_width
    if not near.any():
        return 0.0, None
    df = np.ptp(f) / (f.size - 1) if f.size > 1 else 1.0
    background = np.median(p[(np.abs(f - f0) < 3 * half_width) & ~near]) if (
        (np.abs(f - f0) < 3 * half_width) & ~near).any() else 0.0
    excess = np.clip(p[near] - background, 0, None)
    return float(excess.sum() * df), background


class Inertial(ModelFamily):
    """Damped inertial oscillation: ``inertial_variance``, ``inertial_frequency``, ``inertial_damping``."""

    name = "inertial"
    parameters = (
        Parameter("inertial_variance", "m2 s-2", 1e-10, 10.0, "variance of the inertial oscillation"),
        Parameter("inertial_frequency", "day-1", -3.0, 3.0,
                  "oscillation frequency, cpd, signed (negative = clockwise)", scale="linear"),
        Parameter("inertial_damping", "day-1", 1e-3, 20.0, "damping gamma"),
    )

    def _autocovariance(self, theta, lags_days, context=None):
        var, f0, gam = theta
        tau = np.asarray(lags_days, float)
        return var * np.exp((2j * np.pi * f0 - gam) * tau)

    def _autocovariance_jacobian(self, theta, lags_days, context=None):
        return _ou_jacobian(theta, lags_days)

    def _autocovariance_basis(self, theta, lags_days, context=None):
        return _ou_basis(theta, lags_days)

    def _spectral_density(self, theta, freq_cpd, context=None):
        var, f0, gam = theta
        f = np.asarray(freq_cpd, float)
        return var * 2 * gam / (gam**2 + (2 * np.pi * (f - f0)) ** 2)

    def _spectral_density_jacobian(self, theta, freq_cpd, context=None):
        var, f0, gam = theta
        return _lorentzian_jacobian(var, gam, np.asarray(freq_cpd, float) - f0)

    def bounds(self, context: FitContext):
        b = [(p.lower, p.upper) for p in self.parameters]
        fc = context.inertial_frequency_cpd
        if fc is not None and np.isfinite(fc):
            half = 0.25 * abs(fc) + 0.1
            b[1] = (max(-3.0, fc - half), min(3.0, fc + half))
        return b

    def _initial_guess(self, freq_cpd, power, context: FitContext):
        f, p = np.asarray(freq_cpd, float), np.asarray(power, float)
        fc = context.inertial_frequency_cpd
        if fc is None or not np.isfinite(fc):
            sel = (np.abs(f) > 0.5) & (np.abs(f) < 2.5)
            fc = float(f[sel][np.argmax(p[sel])]) if sel.any() else -1.0
        else:
            lo, hi = self.bounds(context)[1]
            sel = (f >= lo) & (f <= hi)
            if sel.sum() > 2:
                fc = float(f[sel][np.argmax(p[sel])])
        share, _ = _peak_share(f, p, fc, 0.15)
        total = float(np.sum(p) * (np.ptp(f) / (f.size - 1) if f.size > 1 else 1.0))
        var = float(np.clip(share, 1e-3 * total + 1e-9, 0.9 * total + 1e-9))
        return np.array([var, fc, 0.3])

    def _derived(self, theta, context=None):
        return {"inertial_efold_days": float(1.0 / theta[2])}


class InertialFollowing(ModelFamily):
    """Inertial oscillation that follows the local inertial frequency along the track, with a fitted offset.

    Parameters ``inertial_variance``, ``inertial_frequency_offset`` (cpd) and ``inertial_damping``: the process is
    a complex OU process at the constant frequency ``delta`` (the offset) times the window's known modulation
    ``exp(i phase(t))``, ``phase`` the running integral of ``2 pi f(t)``, ``f(t) = -2 Omega sin(latitude(t))``. So
    the oscillation runs at ``f(t) + delta``. Where the latitude does not change this is the constant-frequency
    model with ``f0 = f + delta``, so the family nests it and no contest between the two is needed; ``delta`` reads
    as the shift of the inertial peak by background vorticity (about half the relative vorticity, in cpd).
    """

    name = "inertial_following"
    modulated = True
    parameters = (
        Inertial.parameters[0],
        Parameter("inertial_frequency_offset", "day-1", -0.6, 0.6,
                  "offset of the oscillation from the local inertial frequency, cpd", scale="linear"),
        Inertial.parameters[2],
    )

    def _autocovariance(self, theta, lags_days, context=None):
        var, delta, gam = theta
        return var * np.exp((2j * np.pi * delta - gam) * np.asarray(lags_days, float))

    def _autocovariance_jacobian(self, theta, lags_days, context=None):
        return _ou_jacobian(theta, lags_days)

    def _autocovariance_basis(self, theta, lags_days, context=None):
        return _ou_basis(theta, lags_days)

    def _spectral_density(self, theta, freq_cpd, context: FitContext):
        var, delta, gam = theta
        fc = context.inertial_frequency_cpd if context is not None and context.inertial_frequency_cpd is not None \
            else 0.0
        f = np.asarray(freq_cpd, float)
        return var * 2 * gam / (gam**2 + (2 * np.pi * (f - fc - delta)) ** 2)

    def _spectral_density_jacobian(self, theta, freq_cpd, context: FitContext):
        var, delta, gam = theta
        fc = context.inertial_frequency_cpd if context is not None and context.inertial_frequency_cpd is not None \
            else 0.0
        return _lorentzian_jacobian(var, gam, np.asarray(freq_cpd, float) - fc - delta)

    def bounds(self, context: FitContext):
        b = [(p.lower, p.upper) for p in self.parameters]
        fc = context.inertial_frequency_cpd if context is not None else None
        if fc is not None and np.isfinite(fc):
            half = min(0.6, 0.25 * abs(fc) + 0.1)  # the constant model's frequency range about f
            b[1] = (-half, half)
        return b

    def _initial_guess(self, freq_cpd, power, context):
        g = Inertial().initial_guess(freq_cpd, power, context)
        fc = context.inertial_frequency_cpd if context is not None and context.inertial_frequency_cpd is not None \
            else g[1]
        return np.array([g[0], float(np.clip(g[1] - fc, -0.5, 0.5)), g[2]])

    def _derived(self, theta, context=None):
        return {"inertial_efold_days": float(1.0 / theta[2])}


def _lorentzian_jacobian(var, gam, df):
    """``S = var 2 gamma / (gamma^2 + (2 pi df)^2)`` and its exact derivatives in (log variance, the centre
    frequency, log gamma), ``df`` the distance from the centre, cpd."""
    w2 = (2 * np.pi * df) ** 2
    den = gam**2 + w2
    s = var * 2 * gam / den
    jac = np.empty((3, s.size))
    jac[0] = s
    jac[1] = s * 2 * (2 * np.pi) ** 2 * df / den
    jac[2] = s * (1 - 2 * gam**2 / den)
    return s, jac


def lag_truncated_lorentzian_jacobian(var, gam, df, max_lag_days):
    """The density of the damped oscillation's autocovariance cut to ``|tau| <= L`` (``L = max_lag_days``) and its
    derivatives in (log variance, the centre frequency, log gamma), ``df`` the distance from the centre, cpd::

        S_L(f) = int_(-L)^L var exp(-gamma |tau| + 2 pi i f0 tau) exp(-2 pi i f tau) dtau
               = 2 var Re[(exp(u L) - 1) / u],   u = -gamma - 2 pi i (f - f0),

    which tends to the Lorentzian of :func:`_lorentzian_jacobian` as ``L`` grows. A rectangle rule of step ``d``
    over ``S K`` with ``K`` the squared transform of a function supported on a span ``T`` is exact for ``S_L`` when
    ``L + T <= 1 / d`` (Poisson summation), while for the Lorentzian itself it is off by the autocovariance at lags
    beyond ``1/d - T``: large for a peak narrower than the grid (``gamma`` near its lower bound of 0.001 per day).
    """
    u = -gam - 2j * np.pi * np.asarray(df, float)
    e = np.exp(u * max_lag_days)
    q = (e - 1.0) / u
    dq = (max_lag_days * e - q) / u
    s = 2 * var * q.real
    jac = np.empty((3, s.size))
    jac[0] = s
    jac[1] = 2 * var * (dq * 2j * np.pi).real
    jac[2] = -2 * var * gam * dq.real
    return s, jac


def cut_density_change(component, theta, freq_cpd, context, max_lag_days):
    """For a damped oscillation (:class:`Inertial`, :class:`InertialFollowing`): how its density and derivatives
    change when its autocovariance is cut at ``max_lag_days`` (:func:`lag_truncated_lorentzian_jacobian` less the
    plain Lorentzian), as ``(dS, dJ)``; ``None`` for any other component."""
    if not isinstance(component, (Inertial, InertialFollowing)):
        return None
    var, centre, gam = theta
    if isinstance(component, InertialFollowing):
        fc = context.inertial_frequency_cpd if context is not None else None
        centre = centre + (fc if fc is not None else 0.0)
    df = np.asarray(freq_cpd, float) - centre
    s_plain, j_plain = _lorentzian_jacobian(var, gam, df)
    s_cut, j_cut = lag_truncated_lorentzian_jacobian(var, gam, df, max_lag_days)
    return s_cut - s_plain, j_cut - j_plain


def modulation_sequence(latitude_series, dt_days) -> np.ndarray:
    """``exp(i phase_t)`` with ``phase`` the running integral of ``2 pi f_inertial(latitude_t)``."""
    lat = np.asarray(latitude_series, float)
    lat = np.interp(np.arange(lat.size), np.flatnonzero(np.isfinite(lat)), lat[np.isfinite(lat)])
    f = inertial_frequency_cpd(lat)
    phase = 2 * np.pi * dt_days * (np.cumsum(f) - f[0])
    return np.exp(1j * phase)


def _ou_basis(theta, lags_days):
    """Rows ``(R, tau R)`` and the matrix that makes ``[R; dR/dlog var; dR/df; dR/dlog gamma]`` of them. On a
    regular grid of lags from 0, ``R`` is a running product (a complex exponential costs three times as much; the
    product drifts from it by about 1e-15 over 1,440 lags)."""
    var, f0, gam = theta
    tau = np.asarray(lags_days, float)
    b = np.empty((2, tau.size), complex)
    rate = 2j * np.pi * f0 - gam
    if tau.size > 2 and tau[0] == 0 and np.array_equal(tau, np.arange(tau.size) * tau[1]):
        b[0] = np.exp(rate * tau[1])
        b[0, 0] = var
        np.cumprod(b[0], out=b[0])
    else:
        np.multiply(rate, tau, out=b[0])
        np.exp(b[0], out=b[0])
        b[0] *= var
    np.multiply(b[0], tau, out=b[1])
    mix = np.array([[1, 0], [1, 0], [0, 2j * np.pi], [0, -gam]], complex)
    return b, mix


def _ou_jacobian(theta, lags_days):
    """``R(tau) = var exp((2 pi i f - gamma) tau)`` and its derivatives in (log var, f, log gamma)."""
    var, f0, gam = theta
    tau = np.asarray(lags_days, float)
    jac = np.empty((3, tau.size), complex)
    np.multiply((2j * np.pi * f0 - gam), tau, out=jac[0])
    np.exp(jac[0], out=jac[0])
    jac[0] *= var
    np.multiply(jac[0], 2j * np.pi * tau, out=jac[1])
    np.multiply(jac[0], -gam * tau, out=jac[2])
    return jac[0].copy(), jac
