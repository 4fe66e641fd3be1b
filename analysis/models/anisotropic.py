"""Anisotropic (improper) versions of the model families: velocity with a preferred direction.

An isotropic family describes a *proper* (circular) complex velocity ``z = u + i v``: its complementary
covariance ``E[z(t + tau) z(t)]`` is zero, so the variance of the velocity is the same along every direction.
:class:`Anisotropic` adds a complementary covariance to one real-autocovariance component of a family (the
Matérn background; an inertial oscillation stays circular, position noise stays isotropic)::

    R(tau) = E[z(t + tau) conj z(t)] = R_base(tau)                         (unchanged)
    C(tau) = E[z(t + tau) z(t)]      = gamma R_M(tau),  gamma = rho exp(2 i theta)

with ``R_M`` the (real, even) autocovariance of the Matérn component, ``rho`` in ``[0, 1)`` the anisotropy
(parameter ``anisotropy``) and ``theta`` the orientation of the major axis, counterclockwise from east
(``anisotropy_angle_deg``, degrees in ``[-90, 90)``; an axis, so ``theta`` and ``theta + 180`` are the same).

Conventions (those of P. J. Schreier, L. L. Scharf, *Statistical Signal Processing of Complex-Valued Data:
The Theory of Improper and Noncircular Signals*, Cambridge University Press, 2010, chapters 2 and 8): the
*complementary* covariance (their "complementary correlation") is ``E[z(t + tau) z(t)]`` without conjugation,
the complementary spectrum ``C~(f) = int C(tau) exp(-2 pi i f tau) dtau`` and ``rho`` is their *circularity
coefficient* ``|C(0)| / R(0)`` of the Matérn part. ``C(-tau) = C(tau)`` always (a symmetric function), and the
augmented spectral matrix ``[[S(f), C~(f)], [conj C~(f), S(-f)]]`` is non-negative definite exactly when
``|C~(f)|^2 <= S(f) S(-f)``; here ``|C~(f)| = rho S_M(f) <= S(f)`` and ``<= S(-f)`` because every other
component only adds to ``S``, so every ``rho < 1`` is a valid process.

In terms of the real pair ``(u, v)`` (u east, v north), with ``R_uv(tau) = E[u(t + tau) v(t)]``::

    R_uu = Re(R + C) / 2,    R_vv = Re(R - C) / 2,    R_uv = Im(C - R) / 2

so the Matérn part has the 2 x 2 covariance ``R_M(tau) / 2 * [[1 + rho cos 2 theta, rho sin 2 theta],
[rho sin 2 theta, 1 - rho cos 2 theta]]``: variances ``sigma^2 (1 +- rho) / 2`` along and across the axis at
``theta`` (a ratio ``(1 + rho) / (1 - rho)``; 3:1 is ``rho = 1/2``), the same correlation function along both
axes. The 2 x 2 spectral matrix of ``(u, v)`` (two-sided, per cpd, Hermitian, ``S_uv(f) = int R_uv(tau)
exp(-2 pi i f tau) dtau``) is ``S_M(f) / 2 * [[1 + rho cos 2 theta, rho sin 2 theta], [rho sin 2 theta,
1 - rho cos 2 theta]]`` plus the proper part ``[[S_e(f), -i S_o(f)], [i S_o(f), S_e(f)]] / 2`` of the other
components, ``S_e(f) = (S(f) + S(-f)) / 2`` and ``S_o(f) = (S(f) - S(-f)) / 2`` (a counterclockwise-polarised
part makes ``S_uv`` imaginary).

Equivalently, the anisotropic Matérn part is the widely linear transform ``z_M = a w + b conj(w)`` of a proper
Matérn process ``w`` with ``a = (sqrt(1 + rho) + sqrt(1 - rho)) / 2`` and ``b = exp(2 i theta) (sqrt(1 + rho) -
sqrt(1 - rho)) / 2`` (:meth:`Anisotropic.widely_linear_coefficients`), i.e. two independent real Matérn series
of variances ``sigma^2 (1 +- rho) / 2`` rotated by ``theta``: that is how it is simulated.

References
----------
P. J. Schreier, L. L. Scharf (2010). Statistical Signal Processing of Complex-Valued Data. Cambridge University
Press. doi:10.1017/CBO9780511815911
"Frequency-domain stochastic modeling of stationary bivariate or complex-valued signals". IEEE Transactions on
Signal Processing 65(12), 3136-3151 (2017). doi:10.1109/TSP.2017.2686334
"""

from __future__ import annotations

import numpy as np

from .base import FitContext, ModelFamily, Parameter, leading_zero_frequency_jacobian

#: the two parameters an anisotropic family adds after its base family's
ANISOTROPY_PARAMETERS = (
    Parameter("anisotropy", "1", 0.0, 0.99,
              "anisotropy rho of the background: variances sigma^2 (1 +- rho) / 2 along / across the major axis",
              scale="linear"),
    Parameter("anisotropy_angle_deg", "degree", -90.0, 90.0,
              "orientation of the major axis, degrees counterclockwise from east, in [-90, 90)", scale="linear"),
)


def wrap_axis_deg(angle):
    """An axial direction (degrees) wrapped into ``[-90, 90)``."""
    return (np.asarray(angle, float) + 90.0) % 180.0 - 90.0


class Anisotropic(ModelFamily):
    """A family whose Matérn component has a preferred direction (see the module docstring).

    Parameters
    ----------
    base : ModelFamily
        The isotropic family (``matern``, ``matern+inertial``, or either seen through an observation model):
        its parameters come first, then ``anisotropy`` and ``anisotropy_angle_deg``.
    part : str
        Name of the component that gets the complementary covariance (default ``"matern"``); it must have a
        real autocovariance.

    Notes
    -----
    The proper part (``autocovariance``, ``spectral_density``) is the base family's: anisotropy moves variance
    between directions without changing ``E|z|^2`` or the rotary spectrum ``S(f)``. What it adds is the
    complementary covariance (:meth:`complementary_autocovariance`) and spectrum
    (:meth:`complementary_spectral_density`), and so the (u, v) matrices :meth:`uv_autocovariance`,
    :meth:`spectral_matrix` and :meth:`zero_frequency_matrix`.
    """

    anisotropic = True

    def __init__(self, base: ModelFamily, part: str = "matern", name: str | None = None):
        if isinstance(base, Anisotropic):
            raise ValueError(f"{base.name} is already anisotropic")
        comps = base.components()
        hits = [i for i, (c, _) in enumerate(comps) if c.name == part]
        if not hits:
            raise ValueError(f"{base.name} has no {part!r} component to make anisotropic")
        comp, sl = comps[hits[0]]
        if not comp.real_autocovariance or comp.modulated:
            raise ValueError(f"the {part!r} component of {base.name} must have a real, unmodulated autocovariance")
        self.base = base
        self.part_index = hits[0]
        self.part, self.part_slice = comp, sl
        self.name = name or f"anisotropic_{base.name}"
        self.parameters = tuple(base.parameters) + ANISOTROPY_PARAMETERS
        self.modulated = base.modulated
        self.n_base = len(base.parameters)

    # --- the proper part is the base family's ----------------------------------------------------------------
    def components(self):
        """The base family's components (their slices index the leading base parameters)."""
        return self.base.components()

    def _autocovariance(self, theta, lags_days, context):
        return self.base.autocovariance(theta[: self.n_base], lags_days, context)

    def _autocovariance_jacobian(self, theta, lags_days, context):
        r, jac = self.base.autocovariance_jacobian(theta[: self.n_base], lags_days, context)
        return r, np.vstack([jac, np.zeros((2, r.size), dtype=jac.dtype)])  # R does not depend on rho, theta

    def _spectral_density(self, theta, freq_cpd, context):
        return self.base.spectral_density(theta[: self.n_base], freq_cpd, context)

    def _zero_frequency_density(self, theta, context):
        return self.base.zero_frequency_density(theta[: self.n_base], context)

    def _zero_frequency_density_jacobian(self, theta, context):
        return leading_zero_frequency_jacobian(self.base, theta, context)

    def _initial_guess(self, freq_cpd, power, context):
        return np.concatenate([self.base.initial_guess(freq_cpd, power, context), [0.0, 0.0]])

    def bounds(self, context):
        return self.base.bounds(context) + [(q.lower, q.upper) for q in ANISOTROPY_PARAMETERS]

    def _derived(self, theta, context):
        return self.base.derived(theta[: self.n_base], context)

    # --- the complementary part -------------------------------------------------------------------------------
    @staticmethod
    def gamma(theta) -> complex:
        """``rho exp(2 i theta)`` from the last two parameters (the complementary covariance per unit ``R_M``)."""
        rho, angle = float(theta[-2]), float(theta[-1])
        return rho * np.exp(2j * np.deg2rad(angle))

    def widely_linear_coefficients(self, theta) -> tuple[float, complex]:
        """``(a, b)`` with ``z_M = a w + b conj(w)`` for a proper Matérn process ``w`` (module docstring)."""
        theta = self.check_theta(theta)
        rho, angle = theta[-2], theta[-1]
        sp, sm = np.sqrt(1 + rho), np.sqrt(1 - rho)
        return float(0.5 * (sp + sm)), complex(0.5 * (sp - sm) * np.exp(2j * np.deg2rad(angle)))

    def part_autocovariance(self, theta, lags_days, context: FitContext | None = None) -> np.ndarray:
        """``R_M(tau)`` of the anisotropic component alone (real, m^2/s^2)."""
        theta = self.check_theta(theta)
        return np.real(self.part.autocovariance(theta[self.part_slice], np.asarray(lags_days, float), context))

    def complementary_autocovariance(self, theta, lags_days, context: FitContext | None = None) -> np.ndarray:
        """``C(tau) = E[z(t + tau) z(t)] = rho exp(2 i theta) R_M(tau)`` in m^2/s^2 (even in ``tau``)."""
        theta = self.check_theta(theta)
        return self.gamma(theta) * self.part_autocovariance(theta, np.abs(np.asarray(lags_days, float)), context)

    def complementary_spectral_density(self, theta, freq_cpd, context: FitContext | None = None) -> np.ndarray:
        """``C~(f) = rho exp(2 i theta) S_M(f)`` in (m/s)^2 per cpd (complex; even in ``f``)."""
        theta = self.check_theta(theta)
        s_m = np.real(self.part.spectral_density(theta[self.part_slice], np.asarray(freq_cpd, float), context))
        return self.gamma(theta) * s_m

    def uv_autocovariance(self, theta, lags_days, context: FitContext | None = None) -> np.ndarray:
        """The 2 x 2 covariance ``[[R_uu, R_uv], [R_vu, R_vv]](tau)``, ``R_uv(tau) = E[u(t + tau) v(t)]``,
        shape ``(len(lags), 2, 2)``, m^2/s^2; negative lags allowed (``R(-tau) = conj R(tau)``)."""
        theta = self.check_theta(theta)
        tau = np.asarray(lags_days, float)
        r = self.base.autocovariance(theta[: self.n_base], np.abs(tau), context)
        r = np.where(tau < 0, np.conj(r), r)
        c = self.complementary_autocovariance(theta, tau, context)
        out = np.empty(tau.shape + (2, 2))
        out[..., 0, 0] = 0.5 * np.real(r + c)
        out[..., 1, 1] = 0.5 * np.real(r - c)
        out[..., 0, 1] = 0.5 * np.imag(c - r)
        out[..., 1, 0] = 0.5 * np.imag(c + r)  # R_vu(tau) = R_uv(-tau)
        return out

    def spectral_matrix(self, theta, freq_cpd, context: FitContext | None = None) -> np.ndarray:
        """The two-sided 2 x 2 spectral matrix of ``(u, v)`` in (m/s)^2 per cpd, shape ``(len(f), 2, 2)``,
        Hermitian, ``S_uv(f) = int R_uv(tau) exp(-2 pi i f tau) dtau`` (so ``E[J_u conj J_v]`` of tapered DFTs
        ``J = sum_t h_t x_t exp(-2 pi i f t dt)``; ``scipy.signal.csd(u, v)`` estimates its complex conjugate).
        ``int S df`` over all frequencies is the covariance matrix of ``(u, v)``."""
        theta = self.check_theta(theta)
        f = np.asarray(freq_cpd, float)
        sp = np.real(self.base.spectral_density(theta[: self.n_base], f, context))
        sm = np.real(self.base.spectral_density(theta[: self.n_base], -f, context))
        cp = self.complementary_spectral_density(theta, f, context)
        cm = self.complementary_spectral_density(theta, -f, context)
        # J_u = (J_z(f) + conj J_z(-f)) / 2,  J_v = (J_z(f) - conj J_z(-f)) / (2 i)
        out = np.empty(f.shape + (2, 2), complex)
        out[..., 0, 0] = 0.25 * (sp + sm + cp + np.conj(cm))
        out[..., 1, 1] = 0.25 * (sp + sm - cp - np.conj(cm))
        out[..., 0, 1] = 0.25j * (sp - sm + np.conj(cm) - cp)
        out[..., 1, 0] = np.conj(out[..., 0, 1])
        return out

    def zero_frequency_matrix(self, theta, context: FitContext | None = None) -> np.ndarray:
        """``S(0)`` of ``(u, v)``, (m/s)^2 per cpd: ``[[S0 + Re C0, Im C0], [Im C0, S0 - Re C0]] / 2`` with ``S0``
        the rotary density at zero frequency and ``C0 = rho exp(2 i theta) S_M(0)`` (real symmetric)."""
        theta = self.check_theta(theta)
        s0 = self.base.zero_frequency_density(theta[: self.n_base], context)
        c0 = self.gamma(theta) * self.part.zero_frequency_density(theta[self.part_slice], context)
        return 0.5 * np.array([[s0 + c0.real, c0.imag], [c0.imag, s0 - c0.real]])


def anisotropic(family: ModelFamily, part: str = "matern") -> Anisotropic:
    """The anisotropic version of ``family`` (its ``part`` component gets a preferred direction)."""
    return family if isinstance(family, Anisotropic) else Anisotropic(family, part)


__all__ = ["ANISOTROPY_PARAMETERS", "Anisotropic", "anisotropic", "wrap_axis_deg"]
