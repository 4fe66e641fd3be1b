"""The model-family interface: what a family declares, and how families add up.

A family (in the spirit of one ``scipy.stats`` distribution class) declares

* ``parameters``: names, units, bounds and how the optimiser sees them (``log`` or ``linear`` scale);
* ``autocovariance(theta, lags_days, context)``: ``R(tau) = E[z(t + tau) conj z(t)]`` in m^2/s^2 at
  lags ``tau >= 0`` (days), with its Jacobian with respect to the optimiser's coordinates;
* ``spectral_density(theta, freq_cpd, context)``: the matching two-sided density in (m/s)^2/cpd;
* ``initial_guess(freq_cpd, power, context)``: starting values from a periodogram.

Everything else (likelihoods, fitting, standard errors, simulation, plotting) is shared code that only
uses this interface. ``theta`` is always a 1-D array in the order of ``parameters``, in natural units.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np


@dataclass(frozen=True)
class Parameter:
    """One model parameter.

    ``scale="log"`` means the optimiser works with ``log(value)``; ``"linear"`` with the value itself.
    """

    name: str
    unit: str
    lower: float
    upper: float
    description: str
    scale: str = "log"


@dataclass
class FitContext:
    """What a family may know about the window it is fitted to.

    Attributes
    ----------
    dt_days : float
        Sample interval in days.
    latitude : float or None
        Mean latitude of the window, degrees north.
    inertial_frequency_cpd : float or None
        Local inertial frequency at the mean latitude (negative in the northern hemisphere).
    latitude_series : ndarray or None
        Latitude of each sample (for latitude-following components).
    extra : dict
        Free-form additions for new families.
    """

    dt_days: float
    latitude: float | None = None
    inertial_frequency_cpd: float | None = None
    latitude_series: np.ndarray | None = None
    extra: dict = field(default_factory=dict)


class ModelFamily:
    """Base class: a stationary (or modulated) complex-velocity process with named parameters.

    As with ``scipy.stats``' distributions, the public methods check their arguments (``theta`` has one finite
    value per parameter, inside the declared bounds) and then call the private ones, which a family implements:
    ``_autocovariance``, ``_spectral_density``, ``_initial_guess`` (required), ``_autocovariance_jacobian``,
    ``_zero_frequency_density``, ``_derived`` (optional, with generic defaults). The private methods receive
    ``theta`` as a float array and never need to validate it.
    """

    name: str = ""
    parameters: tuple[Parameter, ...] = ()
    #: ``True`` when the component is a stationary process multiplied by the known unit-modulus
    #: sequence ``exp(i phase(t))`` of the window (see :mod:`driftspec.analysis.spectral.likelihood`).
    modulated: bool = False
    #: ``True`` when the autocovariance is real (so even in the lag): its expected periodogram is then
    #: symmetric and comes from a real FFT of half the cost (see ``likelihood.expected_in_band``).
    real_autocovariance: bool = False

    # --- public interface: checks, then the family's private computation --------------------------------
    def check_theta(self, theta) -> np.ndarray:
        """``theta`` as a float array, or a one-line ``ValueError`` naming what is wrong with it."""
        theta = np.asarray(theta, dtype=float)
        p = len(self.parameters)
        if theta.shape != (p,):
            raise ValueError(f"{self.name}: expected {p} parameters ({', '.join(self.names)}), got shape "
                             f"{theta.shape}")
        lo, hi = self._static_bounds
        bad = ~((theta >= lo) & (theta <= hi))  # also catches NaN
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            q = self.parameters[k]
            raise ValueError(f"{self.name}: {q.name} = {theta[k]:g} is outside [{q.lower:g}, {q.upper:g}] {q.unit}")
        return theta

    def autocovariance(self, theta, lags_days, context: FitContext | None = None) -> np.ndarray:
        """``R(tau) = E[z(t + tau) conj z(t)]`` in m^2/s^2 at lags ``tau >= 0`` (days)."""
        return self._autocovariance(self.check_theta(theta), np.asarray(lags_days, float), context)

    def autocovariance_jacobian(self, theta, lags_days, context: FitContext | None = None):
        """``R`` and ``dR/dx_j`` for the optimiser coordinates ``x`` (``log`` or the value, per parameter)."""
        return self._autocovariance_jacobian(self.check_theta(theta), np.asarray(lags_days, float), context)

    def autocovariance_basis(self, theta, lags_days, context: FitContext | None = None):
        """``(B, M)`` with ``[R; dR/dx] = M @ B``: the numbers of :meth:`autocovariance_jacobian` in fewer rows
        ``B`` and a constant matrix ``M`` (``None`` for the identity), so that a linear map of the rows (an FFT,
        an average over lags) runs over fewer of them."""
        return self._autocovariance_basis(self.check_theta(theta), np.asarray(lags_days, float), context)

    def spectral_density(self, theta, freq_cpd, context: FitContext | None = None) -> np.ndarray:
        """Two-sided density in (m/s)^2 per cpd at ``freq_cpd`` (positive = counterclockwise)."""
        return self._spectral_density(self.check_theta(theta), np.asarray(freq_cpd, float), context)

    def spectral_density_jacobian(self, theta, freq_cpd, context: FitContext | None = None):
        """``S`` and ``dS/dx_j`` for the optimiser coordinates ``x`` (``log`` or the value, per parameter)."""
        return self._spectral_density_jacobian(self.check_theta(theta), np.asarray(freq_cpd, float), context)

    def initial_guess(self, freq_cpd, power, context: FitContext | None = None) -> np.ndarray:
        """Starting values from a periodogram over the fitted band, clipped into the bounds."""
        g = np.asarray(self._initial_guess(np.asarray(freq_cpd, float), np.asarray(power, float), context), float)
        lo, hi = self._static_bounds
        g = np.where(np.isfinite(g), g, 0.5 * (lo + hi))
        return np.clip(g, lo, hi)

    def zero_frequency_density(self, theta, context: FitContext | None = None) -> float:
        """``S(0)`` in (m/s)^2 per cpd (used for the diffusivity)."""
        return float(self._zero_frequency_density(self.check_theta(theta), context))

    def derived(self, theta, context: FitContext | None = None) -> dict[str, float]:
        """Named derived quantities (time scales, ...) in natural units."""
        return self._derived(self.check_theta(theta), context)

    @functools.cached_property
    def _static_bounds(self):
        lo = np.array([q.lower for q in self.parameters], float)
        hi = np.array([q.upper for q in self.parameters], float)
        return lo * (1 - 1e-9) - 1e-300, hi * (1 + 1e-9) + 1e-300

    # --- what a family provides -----------------------------------------------------------------------
    def _autocovariance(self, theta, lags_days, context):
        raise NotImplementedError

    def _spectral_density(self, theta, freq_cpd, context):
        raise NotImplementedError

    def _initial_guess(self, freq_cpd, power, context):
        raise NotImplementedError

    def _central_steps(self, theta, h):
        """``(j, theta + step e_j, theta - step e_j, step)`` per parameter, the step ``h`` in the optimiser's
        coordinates (relative for log-scaled parameters, scaled by ``max(1, |value|)`` for linear ones)."""
        for j, p in enumerate(self.parameters):
            tp, tm = theta.copy(), theta.copy()
            if p.scale == "log":
                tp[j] *= np.exp(h)
                tm[j] *= np.exp(-h)
                step = h
            else:
                step = h * max(1.0, abs(theta[j]))
                tp[j] += step
                tm[j] -= step
            yield j, tp, tm, step

    def _autocovariance_jacobian(self, theta, lags_days, context):
        """Default: central finite differences of ``_autocovariance``; families override with exact ones."""
        r = self._autocovariance(theta, lags_days, context)
        jac = np.empty((len(theta), len(r)), dtype=complex)
        for j, tp, tm, step in self._central_steps(theta, 1e-6):
            jac[j] = (self._autocovariance(tp, lags_days, context) - self._autocovariance(tm, lags_days, context)) \
                / (2 * step)
        return r, jac

    def _autocovariance_basis(self, theta, lags_days, context):
        """Default: the rows of ``_autocovariance_jacobian`` themselves; families whose derivative rows repeat
        (the log-variance row is ``R``) or are proportional override with fewer."""
        r, jac = self._autocovariance_jacobian(theta, lags_days, context)
        return np.vstack([r[None, :], jac]), None

    def _spectral_density_jacobian(self, theta, freq_cpd, context):
        """Default: ``S`` and central finite differences of ``_spectral_density`` in the optimiser coordinates
        (step 1e-5, which may leave the bounds by that much); families override with exact ones."""
        s = np.real(self._spectral_density(theta, freq_cpd, context))
        jac = np.empty((len(theta), np.size(s)))
        for j, tp, tm, step in self._central_steps(theta, 1e-5):
            jac[j] = np.real(self._spectral_density(tp, freq_cpd, context)
                             - self._spectral_density(tm, freq_cpd, context)) / (2 * step)
        return s, jac

    def _zero_frequency_density(self, theta, context):
        return float(np.real(self._spectral_density(theta, np.array([0.0]), context))[0])

    def _zero_frequency_density_jacobian(self, theta, context):
        """``(S(0), dS(0)/dx)`` in the optimiser coordinates, or ``None`` where the family has none (the diffusivity's
        gradient is then differenced). Default: the density's Jacobian at ``f = 0``, for a family whose ``S(0)`` is
        its density there; a family that overrides ``_zero_frequency_density`` overrides this too or gets ``None``."""
        if type(self)._zero_frequency_density is not ModelFamily._zero_frequency_density:
            return None
        s, jac = self._spectral_density_jacobian(theta, np.zeros(1), context)
        return float(np.real(s[0])), np.real(jac[:, 0])

    def _derived(self, theta, context):
        return {}

    def bounds(self, context: FitContext | None) -> list[tuple[float, float]]:
        """Bounds in natural units; families may narrow them from the context."""
        return [(p.lower, p.upper) for p in self.parameters]

    # --- shared conveniences ----------------------------------------------------------------------
    @property
    def names(self) -> list[str]:
        return [p.name for p in self.parameters]

    @property
    def units(self) -> dict[str, str]:
        return {p.name: p.unit for p in self.parameters}

    def components(self):
        """``(family, slice)`` pairs of the stationary/modulated pieces that add up to this model."""
        return [(self, slice(0, len(self.parameters)))]

    def __add__(self, other: ModelFamily) -> SumFamily:
        return SumFamily(self, other)

    def __repr__(self) -> str:
        return f"<model family {self.name!r}: {', '.join(self.names)}>"


class SumFamily(ModelFamily):
    """The sum of independent components: autocovariances and spectra add.

    The public methods check the whole ``theta`` once (against the parts' bounds, concatenated); the parts are then
    called through their private methods, with no second check.
    """

    def __init__(self, *parts: ModelFamily, name: str | None = None):
        self.parts = parts
        self.name = name or "+".join(p.name for p in parts)
        self.parameters = tuple(q for p in parts for q in p.parameters)
        self.modulated = any(p.modulated for p in parts)
        self._slices = []
        start = 0
        for p in parts:
            self._slices.append(slice(start, start + len(p.parameters)))
            start += len(p.parameters)

    def components(self):
        return [(p, s) for p, s in zip(self.parts, self._slices)]

    def _autocovariance(self, theta, lags_days, context):
        theta = np.asarray(theta, float)
        return sum(p._autocovariance(theta[s], lags_days, context) for p, s in self.components())

    def _autocovariance_jacobian(self, theta, lags_days, context):
        theta = np.asarray(theta, float)
        r = np.zeros(len(lags_days), dtype=complex)
        jac = np.zeros((len(theta), len(lags_days)), dtype=complex)
        for p, s in self.components():
            rp, jp = p._autocovariance_jacobian(theta[s], lags_days, context)
            r += rp
            jac[s] = jp
        return r, jac

    def _spectral_density(self, theta, freq_cpd, context):
        theta = np.asarray(theta, float)
        return sum(p._spectral_density(theta[s], freq_cpd, context) for p, s in self.components())

    def _spectral_density_jacobian(self, theta, freq_cpd, context):
        theta = np.asarray(theta, float)
        dens = np.zeros(np.shape(freq_cpd))
        jac = np.zeros((len(theta), np.size(freq_cpd)))
        for p, s in self.components():
            dp, jp = p._spectral_density_jacobian(theta[s], freq_cpd, context)
            dens += dp
            jac[s] = jp
        return dens, jac

    def _zero_frequency_density(self, theta, context):
        theta = np.asarray(theta, float)
        return sum(p._zero_frequency_density(theta[s], context) for p, s in self.components())

    def _zero_frequency_density_jacobian(self, theta, context):
        theta = np.asarray(theta, float)
        total, grad = 0.0, np.zeros(len(theta))
        for p, s in self.components():
            part = p._zero_frequency_density_jacobian(theta[s], context)
            if part is None:
                return None
            total += part[0]
            grad[s] = part[1]
        return total, grad

    def bounds(self, context):
        return [b for p in self.parts for b in p.bounds(context)]

    def _initial_guess(self, freq_cpd, power, context):
        # Each part guesses from the periodogram with the other parts' share removed in turn:
        # later parts (narrow-band) are guessed first and subtracted.
        guesses = [None] * len(self.parts)
        residual = np.asarray(power, float).copy()
        for i in reversed(range(len(self.parts))):
            part = self.parts[i]
            g = part.initial_guess(freq_cpd, residual, context)
            guesses[i] = g
            if i > 0:
                model = np.real(part.spectral_density(g, freq_cpd, context))
                residual = np.maximum(residual - model, 0.05 * residual)
        return np.concatenate(guesses)

    def _derived(self, theta, context):
        theta = np.asarray(theta, float)
        out = {}
        for p, s in self.components():
            out.update(p.derived(theta[s], context))
        return out


def leading_zero_frequency_jacobian(base: ModelFamily, theta, context):
    """For a family whose ``S(0)`` is ``base``'s at the leading parameters of ``theta`` (observation and anisotropy
    wrappers): ``base``'s ``(S(0), gradient)`` with zeros for the other parameters, or ``None``."""
    theta = np.asarray(theta, float)
    p = len(base.parameters)
    out = base._zero_frequency_density_jacobian(theta[:p], context)
    if out is None:
        return None
    return out[0], np.concatenate([out[1], np.zeros(len(theta) - p)])
