"""The observation model: what the velocities that driftspec fits actually are.

Velocities made from positions are finite differences of (interpolated) fixes that carry position
error. The likelihood's expected periodogram is therefore computed from the autocovariance of the
*observed* series, in two parts.

Differencing
------------
A difference of positions is an average of the continuous velocity: the central difference
``(x(t + D) - x(t - D)) / (2 D)`` is the mean of ``v`` over ``[t - D, t + D]``, so the observed
autocovariance is the model's averaged against a triangle of half-width ``H = 2 D``::

    R_obs(tau) = int_{-H}^{H} (H - |s|) / H^2 * R(tau + s) ds

(the forward difference ``(x(t + D) - x(t)) / D`` gives a triangle of half-width ``H = D``). The
integral is evaluated on the sample grid: for lags beyond ``H``, where ``R`` is smooth over the
triangle, by Simpson's rule on half-sample nodes (the model is evaluated once on the sample grid and
once on the half-sample grid; error ``O((lambda D)^4)``, below 1e-5 relative for ``lambda D <= 0.1``);
for the few lags within ``H`` of zero, where the Matérn autocovariance has its cusp, by 16-point
Gauss-Legendre rules on each unit sub-interval, split where the cusp falls. The quadrature error is
checked against adaptive quadrature (``scipy.integrate.quad``) in the tests. A latitude-following
(modulated) component is averaged as an oscillation at the window's mean inertial frequency.

Position noise
--------------
White noise of standard deviation ``sigma_n`` (m) on each position component, independent between
samples, gives velocity noise ``d eps``. For the central difference (complex velocity,
``E|eps|^2 = 2 sigma_n^2``)::

    R_n(0) = sigma_n^2 / D^2,   R_n(+-2 D) = -sigma_n^2 / (2 D^2),   zero otherwise
    S_n(f) = 2 dt sigma_n^2 / D^2 * sin^2(2 pi f D)

and for the forward difference ``R_n(0) = 4 sigma_n^2 / D^2``, ``R_n(+-D) = -2 sigma_n^2 / D^2``,
``S_n(f) = 8 dt sigma_n^2 / D^2 sin^2(pi f D)``. (Derivation: ``R_n(k) = 2 sigma_n^2 sum_m d_m d_{m+k}``
for the difference stencil ``d``.) Positions interpolated between irregular fixes carry correlated
noise of smaller variance; the fitted ``position_noise`` is then the white noise with the same
high-frequency effect, which is why it is fitted by default rather than fixed from ``position_error_m``.

How close to Nyquist to fit
---------------------------
A central difference has no response at the Nyquist frequency ``f_N`` (``sinc^2(2 f D) = 0`` there), for
the ocean and the noise alike, so the top periodogram bins carry almost no information: with the
observation model fit up to ``0.75 f_N`` (the default). A forward difference moves the zero to
``2 f_N``: fit up to ``f_N``. Measured velocities (no differencing): up to ``f_N``. Without the
observation model, differenced velocities should be fitted only where ``sinc^2`` is close to one,
about ``0.25 f_N`` (3 cpd for hourly data), and even then the Matérn slope is biased by noise.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .conventions import SECONDS_PER_DAY
from .models.base import FitContext, ModelFamily, Parameter

OBSERVATIONS = ("none", "differenced", "differenced+noise")
#: fraction of the Nyquist frequency fitted by default, per velocity operator (see module docstring)
DEFAULT_BAND_FRACTION = {"central": 0.75, "forward": 1.0, "none": 1.0}
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(16)


def default_max_freq(dt_days: float, operator: str = "central", observation: str = "differenced+noise"):
    """The default top of the fitted band (cpd) for a velocity operator and observation model."""
    nyquist = 0.5 / dt_days
    if observation == "none" and operator != "none":
        return 0.25 * nyquist
    return DEFAULT_BAND_FRACTION[operator] * nyquist


@dataclass(frozen=True)
class DifferenceOperator:
    """A velocity-from-position operator: triangle half-width in samples and noise stencil."""

    name: str
    half_width: int  # H / D
    stencil: tuple  # position weights at offsets 0, 1, ... (times 1/D), e.g. central (-1/2, 0, 1/2)

    def noise_autocovariance(self, sigma_m: float, dt_seconds: float, max_lag: int) -> np.ndarray:
        """``R_n(k)`` for k = 0..max_lag-1, (m/s)^2."""
        d = np.asarray(self.stencil, float) / dt_seconds
        full = np.correlate(d, d, mode="full")[len(d) - 1:]  # sum_m d_m d_{m+k}, k >= 0
        out = np.zeros(max_lag)
        out[: min(max_lag, full.size)] = 2 * sigma_m**2 * full[:max_lag]
        return out

    def power_response(self, freq_cpd, dt_days):
        """``|H(f)|^2`` of the averaging, ``sinc^2(f * 2H_half)`` with numpy's normalised sinc."""
        width = self.half_width * dt_days  # box width of the average
        return np.sinc(np.asarray(freq_cpd) * width) ** 2


OPERATORS = {
    "central": DifferenceOperator("central", 2, (-0.5, 0.0, 0.5)),
    "forward": DifferenceOperator("forward", 1, (-1.0, 1.0)),
}


def _simpson_weights(h: int) -> tuple[np.ndarray, np.ndarray]:
    """Offsets (in samples, step 1/2) and weights of Simpson's rule for the triangle of half-width h."""
    s = np.arange(-2 * h, 2 * h + 1) / 2.0
    tri = (h - np.abs(s)) / h**2
    w = np.zeros_like(s)
    for m in range(-h, h):
        i0 = 2 * (m + h)
        w[i0] += tri[i0] / 6
        w[i0 + 1] += 4 * tri[i0 + 1] / 6
        w[i0 + 2] += tri[i0 + 2] / 6
    return s, w


class _AveragedComponent(ModelFamily):
    """One model component seen through the difference operator."""

    def __init__(self, base: ModelFamily, op: DifferenceOperator):
        self.base = base
        self.op = op
        self.name = base.name
        self.parameters = base.parameters
        self.modulated = base.modulated
        self._s, self._w = _simpson_weights(op.half_width)

    def _raw(self, theta, x_days, ctx, jac):
        """Base autocovariance at arbitrary signed lags (R(-x) = conj R(x)), shifted to the window's mean
        inertial frequency for a modulated component."""
        ax = np.abs(x_days)
        if jac:
            r, j = self.base.autocovariance_jacobian(theta, ax, ctx)
        else:
            r, j = self.base.autocovariance(theta, ax, ctx), None
        neg = x_days < 0
        r = np.where(neg, np.conj(r), r)
        if j is not None:
            j = np.where(neg[None, :], np.conj(j), j)
        if self.modulated and ctx.inertial_frequency_cpd is not None:
            rot = np.exp(2j * np.pi * ctx.inertial_frequency_cpd * x_days)
            r = r * rot
            if j is not None:
                j = j * rot
        return r, j

    def _apply(self, theta, lags_days, ctx, jac):
        dt = ctx.dt_days
        n = len(lags_days)
        h = self.op.half_width
        # Simpson on the half-sample grid for lags beyond h: one evaluation on k/2 for k = 2h .. 2(n-1) + 2h
        k = np.arange(0, 2 * (n - 1) + 2 * h + 1)
        grid = k * dt / 2.0
        r, j = self._raw(theta, grid, ctx, jac)
        out = np.zeros(n, complex)
        jout = np.zeros((len(theta), n), complex) if jac else None
        idx = np.arange(n)
        for off, w in zip(self._s, self._w):
            pos = 2 * idx + int(round(2 * off))
            ok = pos >= 0
            out[ok] += w * r[pos[ok]]
            if jac:
                jout[:, ok] += w * j[:, pos[ok]]
        # lags within h of zero: Gauss-Legendre on unit sub-intervals, where the cusp at 0 falls on an edge
        near = np.arange(min(h + 1, n))
        sub = np.arange(-h, h)
        u = 0.5 * (_GL_NODES + 1.0)  # nodes on (0, 1)
        s = (sub[:, None] + u[None, :]).ravel()  # offsets in samples
        wq = (0.5 * _GL_WEIGHTS[None, :] * np.ones((len(sub), 1))).ravel() * (h - np.abs(s)) / h**2
        x = (near[:, None] + s[None, :]).ravel() * dt
        rq, jq = self._raw(theta, x, ctx, jac)
        out[near] = (rq.reshape(len(near), -1) * wq).sum(axis=1)
        if jac:
            jout[:, near] = (jq.reshape(len(theta), len(near), -1) * wq).sum(axis=2)
        if self.modulated and ctx.inertial_frequency_cpd is not None:
            back = np.exp(-2j * np.pi * ctx.inertial_frequency_cpd * np.asarray(lags_days))
            out *= back
            if jac:
                jout *= back
        return out, jout

    def autocovariance(self, theta, lags_days, context):
        return self._apply(np.asarray(theta, float), np.asarray(lags_days, float), context, False)[0]

    def autocovariance_jacobian(self, theta, lags_days, context):
        return self._apply(np.asarray(theta, float), np.asarray(lags_days, float), context, True)

    def spectral_density(self, theta, freq_cpd, context):
        return self.base.spectral_density(theta, freq_cpd, context) * self.op.power_response(
            freq_cpd, context.dt_days)

    def zero_frequency_density(self, theta, context):
        return self.base.zero_frequency_density(theta, context)

    def initial_guess(self, freq_cpd, power, context):
        return self.base.initial_guess(freq_cpd, power, context)

    def bounds(self, context):
        return self.base.bounds(context)

    def derived(self, theta, context):
        return self.base.derived(theta, context)


class PositionNoise(ModelFamily):
    """White position noise seen through the difference operator: parameter ``position_noise`` (m)."""

    name = "position_noise"
    parameters = (Parameter("position_noise", "m", 0.5, 5000.0, "white position noise per component"),)

    def __init__(self, op: DifferenceOperator):
        self.op = op

    def autocovariance(self, theta, lags_days, context):
        dt_s = context.dt_days * SECONDS_PER_DAY
        return self.op.noise_autocovariance(theta[0], dt_s, len(lags_days)).astype(complex)

    def autocovariance_jacobian(self, theta, lags_days, context):
        r = self.autocovariance(theta, lags_days, context)
        return r, (2.0 * r)[None, :]  # d/d log(sigma) of sigma^2 * const

    def spectral_density(self, theta, freq_cpd, context):
        dt_s = context.dt_days * SECONDS_PER_DAY
        d = np.asarray(self.op.stencil, float) / dt_s
        f = np.asarray(freq_cpd, float)
        resp = np.abs(np.exp(-2j * np.pi * np.outer(f, np.arange(d.size)) * context.dt_days) @ d) ** 2
        return context.dt_days * 2 * theta[0] ** 2 * resp

    def zero_frequency_density(self, theta, context):
        return 0.0

    def initial_guess(self, freq_cpd, power, context):
        # the noise floor from the top of the band, where the ocean spectrum has fallen off
        f = np.abs(np.asarray(freq_cpd, float))
        p = np.asarray(power, float)
        top = f >= 0.8 * f.max() if f.size else np.zeros(0, bool)
        if not top.any():
            return np.array([50.0])
        shape = self.spectral_density([1.0], freq_cpd[top], context)
        sigma2 = np.median(p[top] / np.maximum(shape, 1e-300))
        return np.array([float(np.clip(np.sqrt(max(sigma2, 0)) * 0.5, 2.0, 2000.0))])


class ObservedFamily(ModelFamily):
    """A model family seen through a velocity operator, optionally with position noise."""

    def __init__(self, base: ModelFamily, operator: str = "central", noise: bool = True):
        if operator not in OPERATORS:
            raise ValueError(f"velocity operator must be one of {list(OPERATORS)}, got {operator!r}")
        op = OPERATORS[operator]
        self.base = base
        self.operator = op
        self._parts = [(_AveragedComponent(c, op), sl) for c, sl in base.components()]
        p = len(base.parameters)
        if noise:
            self._parts.append((PositionNoise(op), slice(p, p + 1)))
        self.parameters = tuple(base.parameters) + ((PositionNoise.parameters[0],) if noise else ())
        self.name = base.name
        self.modulated = base.modulated

    def components(self):
        return self._parts

    def autocovariance(self, theta, lags_days, context):
        theta = np.asarray(theta, float)
        return sum(c.autocovariance(theta[s], lags_days, context) for c, s in self._parts)

    def spectral_density(self, theta, freq_cpd, context):
        theta = np.asarray(theta, float)
        return sum(c.spectral_density(theta[s], freq_cpd, context) for c, s in self._parts)

    def ocean_spectral_density(self, theta, freq_cpd, context):
        """The continuous spectrum of the ocean model alone (no averaging, no noise)."""
        return self.base.spectral_density(np.asarray(theta, float)[: len(self.base.parameters)], freq_cpd,
                                          context)

    def noise_spectral_density(self, theta, freq_cpd, context):
        if len(self.parameters) == len(self.base.parameters):
            return np.zeros_like(np.asarray(freq_cpd, float))
        c, s = self._parts[-1]
        return c.spectral_density(np.asarray(theta, float)[s], freq_cpd, context)

    def zero_frequency_density(self, theta, context):
        return self.base.zero_frequency_density(np.asarray(theta, float)[: len(self.base.parameters)], context)

    def bounds(self, context):
        b = self.base.bounds(context)
        if len(self.parameters) > len(self.base.parameters):
            b = b + [(PositionNoise.parameters[0].lower, PositionNoise.parameters[0].upper)]
        return b

    def initial_guess(self, freq_cpd, power, context: FitContext):
        g = self.base.initial_guess(freq_cpd, power, context)
        if len(self.parameters) > len(self.base.parameters):
            g = np.concatenate([g, self._parts[-1][0].initial_guess(freq_cpd, power, context)])
        return g

    def derived(self, theta, context):
        return self.base.derived(np.asarray(theta, float)[: len(self.base.parameters)], context)


def observed(family: ModelFamily, observation: str = "none", operator: str = "central") -> ModelFamily:
    """Wrap ``family`` in the observation model named by ``observation``."""
    if observation not in OBSERVATIONS:
        raise ValueError(f"observation must be one of {OBSERVATIONS}, got {observation!r}")
    if observation == "none":
        return family
    return ObservedFamily(family, operator, noise=observation == "differenced+noise")
