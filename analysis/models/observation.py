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
integral is evaluated on the window's regular lag grid: for the few lags within ``H`` of zero, where the
Matérn autocovariance has its cusp, by 16-point Gauss-Legendre rules on each unit sub-interval (split
where the cusp falls); for lags up to 24 samples by Simpson's rule on half-sample nodes (error
``O((lambda D)^4)``); beyond, where ``R`` is smooth on the scale of the triangle, by the rule on integer
nodes ``-h..h`` that matches the triangle's moments up to degree ``2h`` (error ``O((D / tau)^(2h+2))``).
So each evaluation costs the model on about ``N + 50`` lags, not ``2N``: with the observation model a
fit costs under twice the plain fit (see ``benchmarks/bench_fit.py``). The quadrature error is
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
about ``0.25 f_N`` (3 cpd for hourly data), and even then the Matérn slope is biased by noise. These fractions
are applied in one place, :meth:`driftspec.analysis.fitting.spec.FitSpec.max_freq`.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from ..conventions import SECONDS_PER_DAY
from .base import FitContext, ModelFamily, Parameter, leading_zero_frequency_jacobian

OBSERVATIONS = ("none", "differenced", "differenced+noise")
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(16)
#: from this lag on (in samples) the averaged autocovariance uses integer nodes only (error O((D/tau)^(2h+2)))
_FAR_LAG = 24


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


@functools.lru_cache(maxsize=8)
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


@functools.lru_cache(maxsize=8)
def _moment_weights(h: int) -> np.ndarray:
    """Weights on nodes -h..h (samples) matching the triangle's even moments 0, 2, .., 2h exactly.

    The triangle ``(h - |s|)/h^2`` has moments ``int s^(2k) = 2 h^(2k) / ((2k + 1)(2k + 2))``.
    """
    nodes = np.arange(-h, h + 1, dtype=float)
    k = np.arange(h + 1)
    moments = 2.0 * float(h) ** (2 * k) / ((2 * k + 1) * (2 * k + 2))
    a = np.array([[np.sum(np.where(np.abs(nodes) == m, nodes ** (2 * kk), 0.0)) for m in range(h + 1)] for kk in k])
    w_half = np.linalg.solve(a, moments)  # weight of node 0, of +-1, ..., of +-h (per node)
    return np.array([w_half[abs(int(x))] for x in nodes])


class _LagGrid:
    """Signed lags (days) at which a component is evaluated for one window shape, and their quadrature layout."""

    def __init__(self, x_all, n_int, n_half, n_mid, near, near_weights, mids, mid_index, n_lags):
        self.x_days = x_all
        neg = x_all < 0
        self.negative = neg if neg.any() else None
        self.abs_days = np.abs(x_all)
        self.n_int, self.n_half, self.n_mid = n_int, n_half, n_mid
        self.near, self.near_weights = near, near_weights
        self.mids, self.mid_index = mids, mid_index
        self.n_lags = n_lags
        self._rotations = {}

    def rotation(self, f_cpd: float, lags_only: bool = False) -> np.ndarray:
        """``exp(2 pi i f x)`` at the grid's lags (or at the window's lags ``0..n-1`` times the step)."""
        key = (f_cpd, lags_only)
        if key not in self._rotations:
            if len(self._rotations) > 8:
                self._rotations.clear()
            dt = self.x_days[1] if self.x_days.size > 1 else 0.0
            x = np.arange(self.n_lags) * dt if lags_only else self.x_days
            self._rotations[key] = np.exp(2j * np.pi * f_cpd * x)
        return self._rotations[key]


class _AveragedComponent(ModelFamily):
    """One model component seen through the difference operator."""

    def __init__(self, base: ModelFamily, op: DifferenceOperator):
        self.base = base
        self.op = op
        self.name = base.name
        self.parameters = base.parameters
        self.modulated = base.modulated
        self.real_autocovariance = base.real_autocovariance  # a symmetric average of a real, even function
        self._s, self._w = _simpson_weights(op.half_width)
        self._w_int = _moment_weights(op.half_width)

    def _raw(self, theta, grid, ctx, jac):
        """Base autocovariance at the grid's signed lags (R(-x) = conj R(x)), shifted to the window's mean
        inertial frequency for a modulated component: rows ``R`` (``jac`` false), ``R`` and its derivatives
        (``jac`` true) or the base's basis rows (``jac == "basis"``; see ``autocovariance_basis``), with the
        matrix that mixes them (``None`` for the identity)."""
        mix = None
        if jac == "basis":
            stack, mix = self.base._autocovariance_basis(theta, grid.abs_days, ctx)
            if mix is not None and np.iscomplexobj(mix):  # conj(M B) is not M conj(B): the full rows instead
                stack, mix = mix @ stack, None
        elif jac:
            r, j = self.base._autocovariance_jacobian(theta, grid.abs_days, ctx)
            stack = np.concatenate([r[None, :], j], axis=0)
        else:
            stack = self.base._autocovariance(theta, grid.abs_days, ctx)[None, :]
        if grid.negative is not None and np.iscomplexobj(stack):
            stack = np.where(grid.negative[None, :], np.conj(stack), stack)
        if self.modulated and ctx.inertial_frequency_cpd is not None:
            stack = stack * grid.rotation(ctx.inertial_frequency_cpd)
        return stack, mix

    def _apply(self, theta, lags_days, ctx, jac):
        n = len(lags_days)
        h = self.op.half_width
        grid = self._grid(n, ctx.dt_days)
        stack, mix = self._raw(theta, grid, ctx, jac)
        a, b = grid.n_int, grid.n_int + grid.n_half
        v_int, v_half, v_near = stack[:, :a], stack[:, a:b], stack[:, b:]
        out = np.empty((stack.shape[0], n), stack.dtype)  # real for a real autocovariance
        n_mid = grid.n_mid
        # far lags: the moment-matched rule on integer nodes j-h .. j+h (exact for polynomials of degree 2h);
        # its weights are symmetric, so nodes j-m and j+m share one multiplication
        if n > n_mid:
            far = out[:, n_mid:]
            np.multiply(v_int[:, n_mid:n], self._w_int[h], out=far)
            for m in range(1, h + 1):
                far += self._w_int[h + m] * (v_int[:, n_mid - m:n - m] + v_int[:, n_mid + m:n + m])
        # middle lags: Simpson on half samples; v_half[q - 2] is the value at q / 2 samples
        if grid.mids.size:
            out[:, grid.mids] = v_half[:, grid.mid_index] @ self._w
        # lags within h of zero: Gauss-Legendre on unit sub-intervals, the cusp at 0 on their edges
        out[:, grid.near] = (v_near.reshape(stack.shape[0], grid.near.size, -1) * grid.near_weights).sum(axis=2)
        if self.modulated and ctx.inertial_frequency_cpd is not None:
            out *= np.conj(grid.rotation(ctx.inertial_frequency_cpd, lags_only=True))[None, :]
        if jac == "basis":
            return out, mix
        return out[0], (out[1:] if jac else None)

    def _grid(self, n, dt):
        """The quadrature nodes for ``n`` lags at step ``dt`` (days), kept for the last window seen."""
        key = (n, dt)
        if getattr(self, "_grid_key", None) != key:
            h = self.op.half_width
            n_mid = min(n, _FAR_LAG)  # lags h < j < n_mid: Simpson on half samples; j >= n_mid: integer nodes
            near, x_near, wq = self._near_rule(min(h + 1, n), dt)
            x_int = np.arange(n + h) * dt
            x_half = (np.arange(2, 2 * (n_mid - 1 + h) + 1) / 2.0) * dt if n_mid > h + 1 else np.zeros(0)
            x_all = np.concatenate([x_int, x_half, x_near])
            mids = np.arange(h + 1, n_mid) if n_mid > h + 1 else np.zeros(0, int)
            self._grid_key = key
            self._grid_val = _LagGrid(x_all, x_int.size, x_half.size, n_mid, near, wq, mids,
                                      (2 * mids - 2 * h - 2)[:, None] + np.arange(4 * h + 1)[None, :], n)
        return self._grid_val

    def _near_rule(self, n_near, dt):
        """Lags 0..n_near-1, their Gauss-Legendre abscissae (days) and weights (cached per window step)."""
        key = (n_near, dt)
        if getattr(self, "_near_key", None) != key:
            h = self.op.half_width
            near = np.arange(n_near)
            sub = np.arange(-h, h)
            u = 0.5 * (_GL_NODES + 1.0)  # nodes on (0, 1)
            s = (sub[:, None] + u[None, :]).ravel()  # offsets in samples
            wq = np.tile(0.5 * _GL_WEIGHTS, len(sub)) * (h - np.abs(s)) / h**2
            x = (near[:, None] + s[None, :]).ravel() * dt
            self._near_key, self._near_val = key, (near, x, wq)
        return self._near_val

    def _autocovariance(self, theta, lags_days, context):
        return self._apply(np.asarray(theta, float), np.asarray(lags_days, float), context, False)[0]

    def _autocovariance_jacobian(self, theta, lags_days, context):
        return self._apply(np.asarray(theta, float), np.asarray(lags_days, float), context, True)

    def _autocovariance_basis(self, theta, lags_days, context):
        return self._apply(np.asarray(theta, float), np.asarray(lags_days, float), context, "basis")

    def _spectral_density(self, theta, freq_cpd, context):
        return self.base.spectral_density(theta, freq_cpd, context) * self.op.power_response(
            freq_cpd, context.dt_days)

    def _zero_frequency_density(self, theta, context):
        return self.base.zero_frequency_density(theta, context)

    def _zero_frequency_density_jacobian(self, theta, context):
        return self.base._zero_frequency_density_jacobian(theta, context)

    def _initial_guess(self, freq_cpd, power, context):
        return self.base.initial_guess(freq_cpd, power, context)

    def bounds(self, context):
        return self.base.bounds(context)

    def _derived(self, theta, context):
        return self.base.derived(theta, context)


class PositionNoise(ModelFamily):
    """White position noise seen through the difference operator: parameter ``position_noise`` (m)."""

    name = "position_noise"
    parameters = (Parameter("position_noise", "m", 0.5, 5000.0, "white position noise per component"),)
    real_autocovariance = True

    def __init__(self, op: DifferenceOperator):
        self.op = op

    def _autocovariance(self, theta, lags_days, context):
        dt_s = context.dt_days * SECONDS_PER_DAY
        return self.op.noise_autocovariance(theta[0], dt_s, len(lags_days)).astype(complex)

    def _autocovariance_jacobian(self, theta, lags_days, context):
        r = self.autocovariance(theta, lags_days, context)
        return r, (2.0 * r)[None, :]  # d/d log(sigma) of sigma^2 * const

    def _spectral_density(self, theta, freq_cpd, context):
        dt_s = context.dt_days * SECONDS_PER_DAY
        d = np.asarray(self.op.stencil, float) / dt_s
        f = np.asarray(freq_cpd, float)
        resp = np.abs(np.exp(-2j * np.pi * np.outer(f, np.arange(d.size)) * context.dt_days) @ d) ** 2
        return context.dt_days * 2 * theta[0] ** 2 * resp

    def _zero_frequency_density(self, theta, context):
        return 0.0

    def _zero_frequency_density_jacobian(self, theta, context):
        return 0.0, np.zeros(len(theta))

    def _initial_guess(self, freq_cpd, power, context):
        # the noise floor from the top of the band, where the ocean spectrum has fallen off
        f = np.abs(np.asarray(freq_cpd, float))
        p = np.asarray(power, float)
        top = f >= 0.8 * f.max() if f.size else np.zeros(0, bool)
        if not top.any():
            return np.array([50.0])
        shape = self.spectral_density([1.0], freq_cpd[top], context)
        # the mean ratio to the unit-noise spectrum, less a fifth for the ocean's share up there
        sigma2 = 0.8 * np.mean(p[top] / np.maximum(shape, 1e-300))
        return np.array([float(np.clip(np.sqrt(max(sigma2, 0)), 2.0, 2000.0))])


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

    def _autocovariance(self, theta, lags_days, context):
        theta = np.asarray(theta, float)
        return sum(c.autocovariance(theta[s], lags_days, context) for c, s in self._parts)

    def _spectral_density(self, theta, freq_cpd, context):
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

    def _zero_frequency_density(self, theta, context):
        return self.base.zero_frequency_density(np.asarray(theta, float)[: len(self.base.parameters)], context)

    def _zero_frequency_density_jacobian(self, theta, context):
        return leading_zero_frequency_jacobian(self.base, theta, context)

    def bounds(self, context):
        b = self.base.bounds(context)
        if len(self.parameters) > len(self.base.parameters):
            b = b + [(PositionNoise.parameters[0].lower, PositionNoise.parameters[0].upper)]
        return b

    def _initial_guess(self, freq_cpd, power, context: FitContext):
        # noise from the top of the band first; the ocean from what is left, with the operator's
        # averaging undone where it still passes a tenth of the power
        f, p = np.asarray(freq_cpd, float), np.asarray(power, float)
        g_noise = np.zeros(0)
        if len(self.parameters) > len(self.base.parameters):
            noise = self._parts[-1][0]
            g_noise = noise.initial_guess(f, p, context)
            p = np.maximum(p - np.real(noise.spectral_density(g_noise, f, context)), 0.05 * p)
        p = p / np.maximum(self.operator.power_response(f, context.dt_days), 0.1)
        return np.concatenate([self.base.initial_guess(f, p, context), g_noise])

    def _derived(self, theta, context):
        return self.base.derived(np.asarray(theta, float)[: len(self.base.parameters)], context)


def observed(family: ModelFamily, observation: str = "none", operator: str = "central") -> ModelFamily:
    """Wrap ``family`` in the observation model named by ``observation``."""
    if observation not in OBSERVATIONS:
        raise ValueError(f"observation must be one of {OBSERVATIONS}, got {observation!r}")
    if observation == "none":
        return family
    return ObservedFamily(family, operator, noise=observation == "differenced+noise")
