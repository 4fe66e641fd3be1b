"""Anisotropic fits: the bivariate debiased Whittle fit, the test of isotropy and the diffusivity tensor.

:func:`fit_anisotropic` fits the anisotropic version (:mod:`driftspec.analysis.models.anisotropic`) of a family
to one window by the bivariate debiased Whittle likelihood (:mod:`driftspec.analysis.spectral.bivariate`), and
the isotropic family (``rho = 0``) by the same likelihood on the same ordinates, and returns an
:class:`AnisotropicFit`.

Optimisation
------------
In the base family's optimiser coordinates (``log`` or the value per parameter) and the Cartesian anisotropy
coordinates ``(Re gamma, Im gamma) = rho (cos 2 theta, sin 2 theta)``, by Levenberg-Marquardt-damped Fisher
scoring (the expected Hessian comes with the gradient), projected onto the base family's bounds and the disc
``|gamma| <= 0.99``; L-BFGS-B with the analytic gradient where scoring stalls.

Test of isotropy
----------------
The likelihood ratio ``LR = 2 (L_iso - L_aniso)`` of the isotropic against the anisotropic fit (``L`` the
minimised negative log-likelihood). Isotropy is ``gamma = 0``, an interior point of the Cartesian coordinates
(the angle is unidentified there only in polar coordinates), so for a correctly specified likelihood ``LR`` would
be asymptotically chi-squared with 2 degrees of freedom, as for the generalised likelihood ratio test of
impropriety of a complex Gaussian vector (A. T. Walden, P. Rubin-Delanchy, "On testing for impropriety of
complex-valued Gaussian vectors", IEEE Transactions on Signal Processing 57(3), 825-834, 2009,
doi:10.1109/TSP.2008.2010617). The Whittle likelihood is a quasi-likelihood: leakage of a red spectrum (and
gaps, tapers) correlate the ordinates, so the score's variance ``V`` is not the Fisher information ``F`` and
``LR`` tends to ``sum_j lambda_j chi2_1`` with ``lambda_j`` the eigenvalues of ``F_psi^-1 V_psi`` for the tested
coordinates (J. T. Kent, "Robust properties of likelihood ratio tests", Biometrika 69(1), 19-27, 1982,
doi:10.1093/biomet/69.1.19). Under isotropy the process is circular, so the score of ``gamma`` is a circular
complex variable ``-2 S``, ``S = sum_k w_k J(f_k) J(-f_k)``, ``w_k = E_M(k) / (E+(k) E-(k))``, orthogonal to
the other parameters, and ``LR ~ 2 |S|^2 / F_half`` with ``F_half = sum_k E_M(k)^2 / (E+(k) E-(k))`` (half the
Fisher information of each anisotropy coordinate). The reference distribution is that of ``2 |S|^2 / F_half``
over ``n_sim`` series simulated from the isotropic fit with the window's mask, taper and demeaning (circulant
embedding): a parametric bootstrap of the likelihood ratio's quadratic approximation, which needs no refits.
``isotropy_lr_scale`` ``lambda = E|S|^2 / F_half`` is the sandwich-over-Fisher variance ratio of the anisotropy
coordinates: with a taper ``LR / lambda`` is close to chi-squared with 2 degrees of freedom (``calibration=
"scaled"``); without one, the leakage of a red spectrum also makes the tail heavier than chi-squared (on 60-day
hourly Matérn windows fitted to 6 cpd, ``lambda`` is about 2.2 and a two-moment fit ``a chi2_nu`` has ``nu``
about 0.9), which the simulated distribution carries (see :func:`isotropy_pvalue` and
``benchmarks/bench_anisotropy.py`` for the measured sizes).

Windows of irregular fixes
--------------------------
The base fit's family seen through the window's interpolation of its fixes
(:class:`~driftspec.analysis.spectral.irregular.IrregularlyObserved`, ``base_fit=`` from ``fit_window``) is made
anisotropic in its ocean family's Matérn part; the expected matrix comes from the fixes' operator
(:mod:`driftspec.analysis.spectral.bivariate`). The null draws of the isotropy test and the sandwich simulate the
ocean velocity finely, read the positions at the fix times, add the fixes' errors, interpolate, difference, mask
and taper as the window was (:func:`~driftspec.analysis.fitting.uncertainty.irregular_velocities`), the Matérn
part made improper as ``a w + b conj(w)``; the sandwich is always used for them (the interpolation correlates the
ordinates).

Diffusivity tensor
------------------
``K = S(0) / 2`` with ``S(0)`` the fitted 2 x 2 zero-frequency spectral matrix of ``(u, v)`` (two-sided, converted
from per cpd to per Hz), m^2/s::

    K = SECONDS_PER_DAY / 4 * [[S0 + Re C0, Im C0], [Im C0, S0 - Re C0]],    C0 = rho exp(2 i theta) S_M(0)

with ``S0`` the rotary density at zero frequency. Its principal values ``diffusivity_major``/``_minor`` are
``SECONDS_PER_DAY / 4 * (S0 +- |C0|)`` along ``diffusivity_angle_deg = theta`` and across it; their mean is the
project's scalar diffusivity ``S0 / 4`` per component, and for an isotropic fit both equal it. For the Matérn
background the major value is ``sigma^2 (1 + rho) / 2 * T`` (the variance along the axis times the integral time
scale ``T = S_M(0) / (2 sigma^2)``). Standard errors by the delta method.

How it relates to the dispersion of the tracks: G. I. Taylor ("Diffusion by continuous movements", Proc. London
Math. Soc. s2-20, 196-212, 1921, doi:10.1112/plms/s2-20.1.196) showed that the displacement ``D`` of a particle in a
stationary velocity field has ``d<D_i D_j>/dt -> 2 K_ij`` at times long against the integral time scale, with
``K_ij = (1/2) int_-inf^inf R_ij(tau) dtau`` the symmetric part of the integral of the velocity covariance, i.e.
``S(0)/2``. R. E. Davis ("Observing the general circulation with floats", Deep-Sea Research 38 Suppl. 1,
S531-S571, 1991, doi:10.1016/S0198-0149(12)80023-9) defines the single-particle diffusivity tensor from observed
tracks as ``kappa_ij(tau) = <u'_i(t) D_j(t -> t - tau)>``, whose symmetric part is ``(1/2) d<D_i D_j>/dtau`` and
tends to the same ``K`` (its antisymmetric part, from rotation such as inertial oscillations, moves no particles
apart and has no counterpart here). So the fitted tensor predicts the long-lag slope of the dispersion tensor of
the tracks (:mod:`driftspec.analysis.regional.dispersion` measures its isotropic part); the tests check the two
against each other on simulated tracks.
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass, field

import numpy as np
import scipy.fft
import scipy.optimize

from ..conventions import SECONDS_PER_DAY, inertial_frequency_cpd
from ..models import FitContext, ModelFamily, SumFamily, get_family
from ..models.anisotropic import ANISOTROPY_PARAMETERS, Anisotropic, anisotropic, wrap_axis_deg
from ..models.observation import observed
from ..simulation.simulate import circulant_sample, embedding_autocovariance
from ..spectral.bivariate import (
    BivariateWindow,
    WhittleTerms,
    band_dfts,
    expected_matrix,
    prepare_bivariate,
    simulated_scores,
    whittle_terms,
)
from ..spectral.irregular import IrregularlyObserved
from .estimators import from_x, natural_jacobian, to_x
from .uncertainty import EMBEDDING_MAX_FACTOR, irregular_velocities, simulator

#: the columns an anisotropic fit adds to a fits table (besides its parameters and their ``_se``)
TENSOR_COLUMNS = ("diffusivity_major", "diffusivity_minor", "diffusivity_angle_deg")
ANISOTROPY_COLUMNS = ("isotropy_pvalue", "isotropy_lr", "isotropy_lr_scale", *TENSOR_COLUMNS,
                      *(c + "_se" for c in TENSOR_COLUMNS))
#: the largest anisotropy the optimiser may reach (the parameter's upper bound)
RHO_MAX = 0.99
_MIN_VALID = 64


@dataclass
class AnisotropicFit:
    """The outcome of an anisotropic fit of one window (:func:`fit_anisotropic`).

    Attributes
    ----------
    model : str
        ``anisotropic_<base family>``.
    params, stderr, units : dict
        Natural units; the base family's parameters, then ``anisotropy`` (``rho``, 1) and
        ``anisotropy_angle_deg`` (degrees counterclockwise from east, ``[-90, 90)``).
    loglik, aic : float
        Maximised bivariate debiased Whittle log-likelihood and its AIC.
    loglik_isotropic, aic_isotropic : float
        The same for the isotropic family on the same ordinates (compare AICs only within this pair).
    params_isotropic : dict
        The isotropic fit.
    isotropy_lr, isotropy_lr_scale, isotropy_pvalue : float
        ``LR = 2 (L_iso - L_aniso)``, its calibration ``lambda`` and the p-value ``P(lambda chi2_2 > LR)``.
    diffusivity, diffusivity_se : float
        Mean of the principal values: the scalar per-component diffusivity ``S0 / 4``, m^2/s.
    diffusivity_major, diffusivity_minor, diffusivity_angle_deg (and ``_se``) : float
        Principal values of the diffusivity tensor (m^2/s) and the direction of the major axis (degrees
        counterclockwise from east, ``[-90, 90)``).
    status, message : str
        ``ok``, ``at_bound``, ``no_convergence``, ``too_few_samples`` or ``failed``, as for ``FitResult``.
    stderr_method : str
        ``fisher`` or ``sandwich``.
    """

    model: str
    params: dict
    stderr: dict
    units: dict
    loglik: float = np.nan
    aic: float = np.nan
    loglik_isotropic: float = np.nan
    aic_isotropic: float = np.nan
    params_isotropic: dict = field(default_factory=dict)
    isotropy_lr: float = np.nan
    isotropy_lr_scale: float = np.nan
    isotropy_pvalue: float = np.nan
    diffusivity: float = np.nan
    diffusivity_se: float = np.nan
    diffusivity_major: float = np.nan
    diffusivity_minor: float = np.nan
    diffusivity_angle_deg: float = np.nan
    diffusivity_major_se: float = np.nan
    diffusivity_minor_se: float = np.nan
    diffusivity_angle_deg_se: float = np.nan
    status: str = "failed"
    message: str = ""
    estimator: str = "debiased"
    stderr_method: str = ""
    derived: dict = field(default_factory=dict)
    n_samples: int = 0
    n_valid: int = 0
    n_freq: int = 0
    max_freq: float = np.nan
    n_evaluations: int = 0
    fixed: dict = field(default_factory=dict)
    covariance: np.ndarray | None = field(default=None, repr=False)
    family: Anisotropic | None = field(default=None, repr=False)
    context: FitContext | None = field(default=None, repr=False)
    window: BivariateWindow | None = field(default=None, repr=False)

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    @property
    def theta(self) -> np.ndarray:
        return np.array([self.params[n] for n in self.family.names], float)

    @property
    def tensor(self) -> np.ndarray:
        """The fitted diffusivity tensor ``[[K_uu, K_uv], [K_uv, K_vv]]``, m^2/s."""
        return diffusivity_tensor(self.family, self.theta, self.context)

    def to_row(self) -> dict:
        """A flat dict: the columns of a fits table (those of ``FitResult.to_row`` plus :data:`ANISOTROPY_COLUMNS`)."""
        row = {"model": self.model, "estimator": self.estimator, "status": self.status, "message": self.message,
               "loglik": self.loglik, "aic": self.aic, "n_valid": self.n_valid, "n_freq": self.n_freq,
               "max_freq": self.max_freq, "stderr_method": self.stderr_method}
        for k, v in self.params.items():
            row[k] = v
            row[k + "_se"] = self.stderr.get(k, np.nan)
        row["diffusivity"] = self.diffusivity
        row["diffusivity_se"] = self.diffusivity_se
        for c in ANISOTROPY_COLUMNS:
            row[c] = getattr(self, c)
        row.update(self.derived)
        return row


def isotropic_tensor_columns(diffusivity: float, diffusivity_se: float = np.nan) -> dict:
    """The tensor columns of an isotropic fit: both principal values the scalar diffusivity, no direction."""
    return {"diffusivity_major": diffusivity, "diffusivity_minor": diffusivity, "diffusivity_angle_deg": np.nan,
            "diffusivity_major_se": diffusivity_se, "diffusivity_minor_se": diffusivity_se,
            "diffusivity_angle_deg_se": np.nan}


def diffusivity_tensor(family: Anisotropic, theta, context: FitContext | None = None) -> np.ndarray:
    """``K = S(0) / 2`` in m^2/s from the (u, v) zero-frequency spectral matrix (module docstring)."""
    return 0.5 * SECONDS_PER_DAY * family.zero_frequency_matrix(theta, context)


def principal_axes(k) -> tuple[float, float, float]:
    """``(major, minor, angle_deg)`` of a symmetric 2 x 2 matrix; the angle of the major axis counterclockwise
    from the first axis, in ``[-90, 90)`` (closed form of the symmetric eigenproblem)."""
    k = np.asarray(k, float)
    mean = 0.5 * (k[0, 0] + k[1, 1])
    half = float(np.hypot(0.5 * (k[0, 0] - k[1, 1]), k[0, 1]))
    angle = float(wrap_axis_deg(np.degrees(0.5 * np.arctan2(2 * k[0, 1], k[0, 0] - k[1, 1]))))
    return mean + half, mean - half, angle


# --- simulation -------------------------------------------------------------------------------------------------
def simulate_anisotropic(family: Anisotropic, theta, n: int, dt_days: float, *, size: int | None = None, seed=None,
                         context: FitContext | None = None) -> np.ndarray:
    """Complex velocity (m/s) of an anisotropic family: the proper components by circulant embedding, the
    anisotropic one as ``a w + b conj(w)`` of a proper Matérn series ``w`` (see
    :meth:`~driftspec.analysis.models.anisotropic.Anisotropic.widely_linear_coefficients`). Modulated
    (latitude-following) components are not supported here."""
    theta = family.check_theta(theta)
    if family.modulated:
        raise ValueError("simulate_anisotropic does not simulate latitude-following components")
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    ctx = context or FitContext(dt_days=dt_days)
    k = 1 if size is None else size
    a, b = family.widely_linear_coefficients(theta)
    out = np.zeros((k, n), complex)
    for i, (comp, sl) in enumerate(family.components()):
        r = embedding_autocovariance(lambda lag, c=comp, s=sl: c.autocovariance(theta[s], lag, ctx), n, dt_days)
        x = circulant_sample(r, n, rng, k)
        out += a * x + b * np.conj(x) if i == family.part_index else x
    return out[0] if size is None else out


def _window_simulator(family: Anisotropic, theta, win: BivariateWindow, context):
    """``rng, size -> (size, n)`` series of the (an)isotropic model with the window's missing samples NaN (zero for
    a window of irregular fixes, :func:`_irregular_simulator`)."""
    theta = np.asarray(theta, float)
    if isinstance(family.base, IrregularlyObserved):
        return _irregular_simulator(family, theta, win, context)
    comps = family.components()
    part, psl = comps[family.part_index]
    draw_part = simulator(part, theta[psl], win.prep, context, max_factor=EMBEDDING_MAX_FACTOR)
    rest = [(c, sl) for i, (c, sl) in enumerate(comps) if i != family.part_index]
    draw_rest = None
    if rest:
        fam = rest[0][0] if len(rest) == 1 else SumFamily(*[c for c, _ in rest])
        draw_rest = simulator(fam, np.concatenate([theta[sl] for _, sl in rest]), win.prep, context,
                              max_factor=EMBEDDING_MAX_FACTOR)
    a, b = family.widely_linear_coefficients(theta)

    def draw(rng, size):
        w = draw_part(rng, size)
        z = a * w + b * np.conj(w)
        return z if draw_rest is None else z + draw_rest(rng, size)

    return draw


def _irregular_simulator(family: Anisotropic, theta, win: BivariateWindow, context):
    """``rng, size -> (size, n)`` windows of the (an)isotropic model observed through the window's irregular fixes:
    positions at the fix times, the fixes' errors, interpolation, differencing and mask as the fit's operator has
    them (:func:`~driftspec.analysis.fitting.uncertainty.irregular_velocities`), the Matérn part made improper as
    ``a w + b conj(w)``; zero where invalid. Tapering and demeaning are :func:`band_dfts`'s."""
    theta = np.asarray(theta, float)
    base = family.base
    th_base = theta[: family.n_base]
    improper = None
    if theta[-2] > 0:
        a, b = family.widely_linear_coefficients(theta)
        improper = (family.part_index, a, b)

    def draw(rng, size):
        return irregular_velocities(base, th_base, win.prep, context, rng, size, improper=improper)

    return draw


def _anisotropic_family(base: ModelFamily) -> Anisotropic:
    """The anisotropic version of ``base``. For a family seen through irregular fixes the Matérn component is that
    of its ocean family (whose parameters lead the irregular family's) and the proper part is the irregular
    family, noise included."""
    if not isinstance(base, IrregularlyObserved):
        return anisotropic(base)
    family = Anisotropic(base.base)
    family.base = base
    family.name = f"anisotropic_{base.name}"
    family.parameters = tuple(base.parameters) + ANISOTROPY_PARAMETERS
    family.n_base = len(base.parameters)
    family.modulated = base.modulated
    return family


# --- optimisation -----------------------------------------------------------------------------------------------
@dataclass
class _Problem:
    family: Anisotropic
    win: BivariateWindow
    context: FitContext
    lo: np.ndarray  # bounds of the base coordinates
    hi: np.ndarray
    n_evaluations: int = 0

    @property
    def nb(self) -> int:
        return self.family.n_base

    def theta(self, x) -> np.ndarray:
        """Natural parameters (base, rho, angle) from coordinates (base x, Re gamma, Im gamma)."""
        base = np.clip(from_x(x[: self.nb], self.family.base), from_x(self.lo, self.family.base),
                       from_x(self.hi, self.family.base))
        g = complex(x[self.nb], x[self.nb + 1])
        rho = min(abs(g), RHO_MAX)
        angle = float(wrap_axis_deg(np.degrees(0.5 * np.angle(g)))) if rho > 0 else 0.0
        return np.concatenate([base, [rho, angle]])

    def terms(self, x, derivatives=True, proper=False):
        """The objective's terms at ``x``; ``proper=True`` (gamma held at zero) needs only the base coordinates and
        takes the univariate form ``sum log E+ E- + I+/E+ + I-/E-`` (the same value, a quarter of the work)."""
        self.n_evaluations += 1
        em = expected_matrix(self.family, self.theta(x), self.win, self.context, jacobian=derivatives)
        w = self.win
        if not proper:
            return whittle_terms(em, w.i_pos, w.i_neg, w.i_cross, derivatives), em
        p, q = em.pos, em.neg
        if not (np.all(p > 0) and np.all(q > 0) and np.all(np.isfinite(p)) and np.all(np.isfinite(q))):
            return WhittleTerms(np.inf, None, None), em
        rp, rq = w.i_pos / p, w.i_neg / q
        value = float(np.sum(np.log(p * q)) + np.sum(rp) + np.sum(rq))
        if not derivatives:
            return WhittleTerms(value, None, None), em
        nb = self.nb
        lp, lq = em.d_pos[:nb] / p, em.d_neg[:nb] / q
        grad = np.zeros(nb + 2)
        fisher = np.zeros((nb + 2, nb + 2))
        grad[:nb] = lp @ (1.0 - rp) + lq @ (1.0 - rq)
        fisher[:nb, :nb] = lp @ lp.T + lq @ lq.T
        fisher[nb:, nb:] = np.eye(2)  # not used: gamma is held
        return WhittleTerms(value, grad, fisher), em

    def project(self, x) -> np.ndarray:
        x = x.copy()
        x[: self.nb] = np.clip(x[: self.nb], self.lo, self.hi)
        r = np.hypot(x[self.nb], x[self.nb + 1])
        if r > RHO_MAX:
            x[self.nb:] *= RHO_MAX / r
        return x


def _optimise(prob: _Problem, x0, free, max_iter=80):
    """Damped Fisher scoring over the ``free`` coordinates; returns ``(x, terms, success, message)``."""
    x = prob.project(np.asarray(x0, float))
    proper = not free[prob.nb:].any() and not x[prob.nb:].any()
    t, _ = prob.terms(x, proper=proper)
    if not np.isfinite(t.value):
        return x, t, False, "the starting point gives no valid expected periodogram"
    nb = prob.nb
    lo = np.concatenate([prob.lo, [-RHO_MAX, -RHO_MAX]])
    hi = np.concatenate([prob.hi, [RHO_MAX, RHO_MAX]])
    scales = [p.scale for p in prob.family.base.parameters] + ["linear", "linear"]
    cap = np.array([3.0 if s == "log" else 0.5 * (h - l) for s, l, h in zip(scales, lo, hi)])
    mu = 1e-3
    success, message = False, "maximum iterations reached"
    for _ in range(max_iter):
        g = t.gradient.copy()
        active = free & (((x <= lo + 1e-12 * (hi - lo)) & (g > 0)) | ((x >= hi - 1e-12 * (hi - lo)) & (g < 0)))
        active[nb:] = False  # the disc is handled by projection
        act = free & ~active
        if not act.any():
            success, message = True, "all parameters at bounds"
            break
        f_act = t.fisher[np.ix_(act, act)]
        g_act = g[act]
        try:
            decrement = float(g_act @ np.linalg.solve(f_act, g_act))
        except np.linalg.LinAlgError:
            decrement = np.inf
        if decrement < 1e-8:
            success, message = True, "converged"
            break
        improved = False
        while mu < 1e10:
            try:
                step = -np.linalg.solve(f_act + mu * np.diag(np.diag(f_act)) + 1e-12 * np.eye(act.sum()), g_act)
            except np.linalg.LinAlgError:
                mu *= 10
                continue
            step *= min(1.0, float(np.min(cap[act] / np.maximum(np.abs(step), 1e-300))))
            xn = x.copy()
            xn[act] += step
            xn = prob.project(xn)
            tn, _ = prob.terms(xn, proper=proper)
            if np.isfinite(tn.value) and tn.value <= t.value:
                gain = t.value - tn.value
                x, t = xn, tn
                mu = max(mu / 10, 1e-9)
                improved = True
                break
            mu *= 10
        if not improved:
            success, message = decrement < 1e-4, "no further decrease"
            break
        if gain < 1e-10 * max(1.0, abs(t.value)) and decrement < 1e-5:
            success, message = True, "converged"
            break
    return x, t, success, message


def _lbfgs(prob: _Problem, x0, free):
    """L-BFGS-B with the analytic gradient (the fallback)."""
    lo = np.concatenate([prob.lo, [-RHO_MAX, -RHO_MAX]])[free]
    hi = np.concatenate([prob.hi, [RHO_MAX, RHO_MAX]])[free]
    base = np.asarray(x0, float).copy()

    def f(xf):
        x = base.copy()
        x[free] = xf
        t, _ = prob.terms(prob.project(x))
        if not np.isfinite(t.value):
            return 1e300, np.zeros(xf.size)
        return t.value, t.gradient[free]

    with np.errstate(all="ignore"):
        res = scipy.optimize.minimize(f, base[free], jac=True, method="L-BFGS-B", bounds=list(zip(lo, hi)),
                                      options={"maxiter": 500, "ftol": 1e-12, "gtol": 1e-7})
    x = base.copy()
    x[free] = res.x
    x = prob.project(x)
    t, _ = prob.terms(x)
    return x, t, bool(res.success), str(res.message)


def _fit(prob: _Problem, x0, free):
    x, t, ok, msg = _optimise(prob, x0, free)
    if not ok and np.isfinite(t.value):
        x2, t2, ok2, msg2 = _lbfgs(prob, x, free)
        if np.isfinite(t2.value) and t2.value <= t.value + 1e-9:
            x, t, ok, msg = x2, t2, ok2, msg2
    return x, t, ok, msg


# --- the public entry -------------------------------------------------------------------------------------------
def fit_anisotropic(z, dt_days: float, *, model="matern", base_fit=None, latitude=None, taper="none", max_freq=None,
                    mask=None, exclude=None, observation: str = "none", velocity_operator: str = "central",
                    fixed: dict | None = None, stderr: str = "auto", calibration: str = "simulated", n_sim: int = 100,
                    seed=None) -> AnisotropicFit:
    """Fit the anisotropic version of a model family to one window, test isotropy, and give the diffusivity tensor.

    Parameters
    ----------
    z : array_like of complex
        Complex velocity ``u + i v`` (m/s, u east, v north) on a regular grid; NaN marks missing samples.
    dt_days : float
        Sample interval, days.
    model : str or ModelFamily
        The isotropic family to make anisotropic (``"matern"`` default, ``"matern+inertial"``, or a family
        object); its Matérn component gets the preferred direction. Ignored when ``base_fit`` is given.
    base_fit : FitResult, optional
        An isotropic fit of the same window (``fit_series``/``fit_window``): its family (with its observation
        model), context, band and fixed parameters are used and its parameters start both fits.
    latitude : float or array_like, optional
        Degrees north (for the inertial frequency's bounds and start; per sample for a latitude-following part).
    taper : {"none", "hann", "dpss"}
    max_freq : float, optional
        Top of the fitted band (cpd); default the Nyquist frequency (or ``base_fit``'s band).
    mask : array_like of bool, optional
        ``False`` marks samples to treat as missing.
    exclude : sequence of (low, high), optional
        Frequency-magnitude bands (cpd) left out.
    observation : {"none", "differenced", "differenced+noise"}
        Observation model (see :mod:`driftspec.analysis.models.observation`); a window of irregular fixes
        comes with its isotropic fit (``base_fit``, observation ``irregular``).
    velocity_operator : {"central", "forward"}
    fixed : dict, optional
        Base parameters held at values (natural units).
    stderr : {"auto", "fisher", "sandwich"}
        As for ``fit_series``: ``auto`` uses the simulated sandwich where the window has gaps or a taper.
    calibration : {"simulated", "scaled", "chi2"}
        Reference distribution of the isotropy test (module docstring, :func:`isotropy_pvalue`): the simulated
        null distribution of the likelihood ratio's quadratic approximation (default), ``lambda chi2_2`` with
        ``lambda`` from the simulated score variance, or the uncorrected ``chi2_2``.
    n_sim : int
        Simulated series for the calibration and the sandwich.
    seed : int, optional
        Default: drawn from the window's data, so a window always gets the same p-value.

    Returns
    -------
    AnisotropicFit
        Never raises for a fit that fails numerically (``status != "ok"``); bad arguments raise ``ValueError``.

    Examples
    --------
    >>> import numpy as np
    >>> from driftspec.analysis import simulate
    >>> rng = np.random.default_rng(0)
    >>> x = simulate("matern", [0.04, 1.2, 1.0], n=1440, dt=3600.0, seed=rng, real=True, size=2)
    >>> c, s = np.cos(np.radians(30)), np.sin(np.radians(30))
    >>> u = np.sqrt(1.5) * c * x[0] - np.sqrt(0.5) * s * x[1]   # 3:1 variances along 30 degrees
    >>> v = np.sqrt(1.5) * s * x[0] + np.sqrt(0.5) * c * x[1]
    >>> fit = fit_anisotropic((u + 1j * v) / np.sqrt(2), 1 / 24)
    >>> fit.status, fit.isotropy_pvalue < 0.01, abs(fit.diffusivity_angle_deg - 30) < 10
    ('ok', True, True)
    """
    if stderr not in ("auto", "fisher", "sandwich"):
        raise ValueError(f"stderr must be 'auto', 'fisher' or 'sandwich', got {stderr!r}")
    if calibration not in ("simulated", "scaled", "chi2"):
        raise ValueError(f"calibration must be 'simulated', 'scaled' or 'chi2', got {calibration!r}")
    dt_days = float(dt_days)
    if not np.isfinite(dt_days) or dt_days <= 0:
        raise ValueError(f"dt_days must be positive, got {dt_days!r}")
    z = np.asarray(z)
    if z.ndim != 1:
        raise ValueError(f"z must be one series (1-D), got shape {z.shape}")
    if not np.iscomplexobj(z):
        raise ValueError("z must be complex velocity u + i v: a real series has no direction")
    fixed = dict(fixed or {})
    start = None
    if base_fit is not None:
        if base_fit.family is None:
            raise ValueError("base_fit has no fitted family")
        base = base_fit.family
        context = base_fit.context
        if max_freq is None and np.isfinite(base_fit.max_freq):
            max_freq = base_fit.max_freq * (1 + 1e-9)
        fixed = {**base_fit.fixed, **fixed}
        if np.all(np.isfinite(base_fit.theta)):
            start = base_fit.theta
    else:
        base = model if isinstance(model, ModelFamily) else get_family(model)
        base = observed(base, observation, velocity_operator)
        context = None
    if isinstance(base, Anisotropic):
        base = base.base
    irregular = isinstance(base, IrregularlyObserved)
    if irregular and base_fit is None:
        raise ValueError("a window of irregular fixes is fitted anisotropically from its isotropic fit (base_fit=)")
    if irregular and mask is None and getattr(base_fit, "prepared", None) is not None:
        mask = base_fit.prepared.valid  # the valid samples the fixes' operator was built on
    family = _anisotropic_family(base)
    for k in fixed:
        if k not in base.names:
            raise ValueError(f"fixed parameter {k!r} is not a parameter of {base.name}")
    n = z.size
    lat_series = None
    if context is None:
        lat_mean = None
        if latitude is not None:
            lat = np.asarray(latitude, float)
            if lat.ndim and lat.shape != z.shape:
                raise ValueError("latitude must be a scalar or have one value per sample")
            lat_mean = float(np.nanmean(lat))
            lat_series = np.broadcast_to(lat, z.shape).astype(float) if family.modulated else None
        f_c = None if lat_mean is None else float(inertial_frequency_cpd(lat_mean))
        context = FitContext(dt_days=dt_days, latitude=lat_mean, inertial_frequency_cpd=f_c, latitude_series=lat_series)
    lat_series = context.latitude_series
    if family.modulated and lat_series is None and context.latitude is not None:
        lat_series = np.full(n, context.latitude)
    valid = np.isfinite(z) if mask is None else np.isfinite(z) & np.asarray(mask, bool)
    n_valid = int(valid.sum())
    out = AnisotropicFit(model=family.name, params={k: np.nan for k in family.names},
                         stderr={k: np.nan for k in family.names}, units=family.units, n_samples=n, n_valid=n_valid,
                         family=family, context=context, fixed=fixed)
    if n_valid < _MIN_VALID:
        out.status, out.message = "too_few_samples", f"{n_valid} valid samples (need {_MIN_VALID})"
        return out
    if family.modulated and lat_series is None:
        out.message = "latitude-following inertial model needs latitude"
        return out
    try:
        win = prepare_bivariate(z, dt_days, mask=mask, taper=taper, max_freq=max_freq, exclude=exclude,
                                modulated=family.modulated, latitude_series=lat_series)
        if irregular and not np.array_equal(win.prep.band_index, base.operator.band_index):
            raise ValueError("the fitted band differs from the one the irregular-fix operator was built for")
    except ValueError as exc:
        out.message = str(exc)
        return out
    n_free = len(base.names) - len(fixed) + 2
    if win.n_freq < max(n_free + 2, 8):
        out.status, out.message = "too_few_samples", f"{win.n_freq} positive frequencies in the fitted band"
        return out
    out.window, out.n_freq = win, win.n_freq
    out.max_freq = float(win.freq_cpd.max())
    try:
        _fit_window(out, family, win, context, fixed, start, stderr, calibration, n_sim, seed)
    except (ValueError, FloatingPointError, np.linalg.LinAlgError) as exc:
        out.status, out.message = "failed", f"{type(exc).__name__}: {exc}"
    return out


def _fit_window(out: AnisotropicFit, family: Anisotropic, win: BivariateWindow, context, fixed, start, stderr,
                calibration, n_sim, seed):
    base = family.base
    names = base.names
    nb = len(names)
    bounds = base.bounds(context)
    lo_nat = np.array([b[0] for b in bounds], float)
    hi_nat = np.array([b[1] for b in bounds], float)
    prep = win.prep
    if start is None:
        start = base.initial_guess(prep.freq_cpd[prep.band], prep.periodogram[prep.band], context)
    theta0 = np.array(start, float)
    for k, v in fixed.items():
        theta0[names.index(k)] = v
    theta0 = np.clip(np.where(np.isfinite(theta0), theta0, 0.5 * (lo_nat + hi_nat)), lo_nat * (1 + 1e-9),
                     hi_nat * (1 - 1e-9))
    lo, hi = to_x(lo_nat, base), to_x(hi_nat, base)
    for k in fixed:  # a fixed parameter: a degenerate interval
        j = names.index(k)
        lo[j] = hi[j] = to_x(theta0, base)[j]
    prob = _Problem(family, win, context, lo, hi)
    free = np.ones(nb + 2, bool)
    free[[names.index(k) for k in fixed]] = False
    # isotropic fit: gamma held at zero
    free0 = free.copy()
    free0[nb:] = False
    x0 = np.concatenate([to_x(theta0, base), [0.0, 0.0]])
    x_iso, t_iso, ok_iso, _ = _fit(prob, x0, free0)
    # anisotropic fit from the isotropic one, gamma started from the sample complementary variance of z
    zz = prep.z[prep.valid]
    g0 = complex(np.sum(zz**2) / max(np.sum(np.abs(zz) ** 2), 1e-300))
    th_iso = prob.theta(x_iso)
    part, psl = family.part, family.part_slice
    ocean = base.base if isinstance(base, IrregularlyObserved) else base  # the velocity's own variance
    share = ocean.autocovariance(th_iso[: len(ocean.parameters)], [0.0], context)[0].real / max(
        part.autocovariance(th_iso[psl], [0.0], context)[0].real, 1e-300)
    g0 *= min(share, 10.0)
    if abs(g0) > 0.9:
        g0 *= 0.9 / abs(g0)
    x1 = x_iso.copy()
    x1[nb:] = g0.real, g0.imag
    x_hat, t_hat, ok, msg = _fit(prob, x1, free)
    if not np.isfinite(t_hat.value):
        out.status, out.message = "failed", msg
        out.n_evaluations = prob.n_evaluations
        return
    if np.isfinite(t_iso.value) and t_iso.value < t_hat.value:  # the nested optimum is never worse
        x_hat, t_hat, _ = x_iso.copy(), t_iso, None
        x_hat2, t_hat2, ok2, msg2 = _fit(prob, x_hat, free)
        if t_hat2.value <= t_hat.value:
            x_hat, t_hat, ok, msg = x_hat2, t_hat2, ok2, msg2
    theta = prob.theta(x_hat)
    n_free = int(free.sum())
    out.params = dict(zip(family.names, map(float, theta)))
    out.params_isotropic = dict(zip(names, map(float, th_iso[:nb])))
    out.loglik = -t_hat.value
    out.aic = 2 * n_free - 2 * out.loglik
    out.loglik_isotropic = -t_iso.value
    out.aic_isotropic = 2 * (n_free - 2) - 2 * out.loglik_isotropic
    out.derived = family.derived(theta, context)
    rng = np.random.default_rng(zlib.crc32(np.ascontiguousarray(win.j_pos).tobytes()) if seed is None else seed)

    # the isotropy test
    lr = max(2.0 * (t_iso.value - t_hat.value), 0.0)
    null = _null_lr_sample(family, th_iso, win, context, rng, n_sim) if calibration != "chi2" else []
    pvalue, scale = isotropy_pvalue(lr, null, calibration)
    out.isotropy_lr, out.isotropy_lr_scale = lr, scale
    out.isotropy_pvalue = pvalue if ok_iso else np.nan

    # covariance of the free coordinates
    fisher = t_hat.fisher[np.ix_(free, free)]
    gappy = bool(np.ptp(prep.taper) > 0) or isinstance(base, IrregularlyObserved)  # fixes correlate the ordinates
    cov = np.full((n_free, n_free), np.nan)
    method = ""
    with np.errstate(all="ignore"):
        try:
            f_inv = np.linalg.inv(fisher)
            if stderr == "sandwich" or (stderr == "auto" and gappy):
                draw = _window_simulator(family, theta, win, context)
                jp, jn = band_dfts(draw(rng, min(n_sim, 64)), win)
                scores = simulated_scores(t_hat, np.abs(jp) ** 2, np.abs(jn) ** 2, jp * jn)[:, free]
                cov, method = f_inv @ np.atleast_2d(np.cov(scores, rowvar=False)) @ f_inv, "sandwich"
            else:
                cov, method = f_inv * prep.variance_inflation, "fisher"
        except np.linalg.LinAlgError:
            pass
    cov_full = np.zeros((nb + 2, nb + 2))
    cov_full[np.ix_(free, free)] = cov
    out.stderr_method = method
    _standard_errors(out, prob, x_hat, theta, cov_full, free)
    out.n_evaluations = prob.n_evaluations
    out.status, out.message = _status(prob, x_hat, free, ok, msg, t_hat, out)


#: windows drawn per circulant draw for the isotropy test's null distribution (see :func:`_null_band_dfts`)
_WINDOWS_PER_DRAW = 16


def _null_band_dfts(family: Anisotropic, theta_iso, win: BivariateWindow, context):
    """A fast ``rng, size -> (J(+f_k), J(-f_k))`` for series of the isotropic model prepared as the window was.

    One circulant embedding of size ``M = 8 N`` of the summed (proper) autocovariance, in single precision; every
    segment of ``N`` consecutive samples (wrapping round the circle) of such a draw has exactly the model's
    covariance, because ``N <= M / 2`` (C. R. Dietrich, G. N. Newsam, SIAM J. Sci. Comput. 18, 1088-1107, 1997),
    so each draw gives 16 windows, starting every ``N / 2`` samples: a quarter of the normal deviates per window
    that separate draws would need. The windows of one draw are not independent, which costs the Monte Carlo some
    effective size but no bias. The window's demeaning is folded in as ``J(h x) - mean(x) J(h)``. Latitude-following
    models go through the general simulator.
    """
    prep = win.prep
    if family.modulated or isinstance(family.base, IrregularlyObserved):
        draw = _window_simulator(family, theta_iso, win, context)
        return lambda rng, size: band_dfts(draw(rng, size), win)
    th = np.asarray(theta_iso, float)
    base = family.base
    n, nk = prep.n, win.k_pos.size
    half_m = _WINDOWS_PER_DRAW * n // 4
    acov = np.asarray(base.autocovariance(th[: family.n_base], np.arange(half_m + 1) * prep.dt_days, context), complex)
    row = np.concatenate([acov, np.conj(acov[1:half_m][::-1])])
    m = row.size
    amp = (np.sqrt(np.clip(scipy.fft.fft(row).real, 0, None) * m / 2.0)).astype(np.complex64)
    h = prep.taper.astype(np.float32)
    valid = (prep.valid / max(prep.n_valid, 1)).astype(np.complex64)
    k = np.concatenate([win.k_pos, win.k_neg])
    j_h = scipy.fft.fft(prep.taper)[k].astype(np.complex64)
    root_dt = np.float32(np.sqrt(prep.dt_days))
    step = n // 2
    flat = bool(np.ptp(prep.taper[prep.valid]) == 0)  # no taper: the mean is the DFT at zero over h(0) N_valid

    def draw(rng, size):
        n_draw = -(-size // _WINDOWS_PER_DRAW)
        eps = rng.standard_normal((n_draw, 2 * m), dtype=np.float32).view(np.complex64)
        eps *= amp
        y = scipy.fft.ifft(eps, axis=-1, overwrite_x=True)
        y = np.concatenate([y, y[:, : n - step]], axis=1)  # the circle, so the last windows wrap round
        x = np.lib.stride_tricks.sliding_window_view(y, n, axis=-1)[:, : _WINDOWS_PER_DRAW * step: step]
        xh = (x * h).reshape(-1, n)[:size]
        jf = scipy.fft.fft(xh, axis=-1, overwrite_x=True)
        if flat:
            mean = jf[:, 0] * np.float32(1.0 / (float(h[prep.valid][0]) * prep.n_valid))
        else:
            mean = (x.reshape(-1, n)[:size] * valid).sum(axis=1)
        j = jf[:, k]
        j -= mean[:, None] * j_h[None, :]
        j *= root_dt
        return j[:, :nk], j[:, nk:]

    return draw


def _null_lr_sample(family: Anisotropic, theta_iso, win: BivariateWindow, context, rng, n_sim) -> np.ndarray:
    """``2 |S|^2 / F_half`` for ``n_sim`` series simulated from the isotropic fit (module docstring): draws from
    the null distribution of the likelihood ratio to first order (its quadratic approximation in the score)."""
    em = expected_matrix(family, theta_iso, win, context, jacobian=False)
    wk = em.part / (em.pos * em.neg)
    fisher_half = float(np.sum(em.part * wk))
    draw = _null_band_dfts(family, theta_iso, win, context)
    out = []
    done = 0
    while done < n_sim:
        jp, jn = draw(rng, min(128, n_sim - done))
        prod = jp * jn
        prod *= wk.astype(np.float32)
        out.append(2.0 * np.abs(prod.sum(axis=1, dtype=np.complex128)) ** 2 / fisher_half)
        done += jp.shape[0]
    return np.concatenate(out).astype(float)


def isotropy_pvalue(lr: float, null_sample, method: str = "simulated") -> tuple[float, float]:
    """``(p-value, lambda)`` of the likelihood ratio ``lr`` against simulated null draws ``null_sample``.

    ``method="simulated"``: the Monte Carlo p-value ``(1 + #{T_i >= lr}) / (1 + n)``; where fewer than 5 draws
    exceed ``lr`` it is refined (never raised) by the two-moment approximation ``a chi2_nu`` with ``a = var / (2
    mean)``, ``nu = 2 mean^2 / var`` (F. E. Satterthwaite, "An approximate distribution of estimates of variance
    components", Biometrics Bulletin 2(6), 110-114, 1946, doi:10.2307/3002019), which carries the heavier-than-chi2
    tail that leakage gives an untapered window. ``"scaled"``: ``lambda chi2_2``; ``"chi2"``: ``chi2_2``.
    ``lambda = mean / 2`` is the ratio of the score's simulated variance to its Fisher information.
    """
    from scipy.stats import chi2

    t = np.asarray(null_sample, float)
    t = t[np.isfinite(t)]
    if method == "chi2" or t.size == 0:
        return float(chi2.sf(lr, 2)), 1.0
    mean = float(t.mean())
    lam = mean / 2.0
    if method == "scaled":
        return float(chi2.sf(lr / lam, 2)), lam
    count = int(np.sum(t >= lr))
    p = (1.0 + count) / (1.0 + t.size)
    if count < 5:
        var = float(t.var(ddof=1))
        nu, a = 2 * mean**2 / var, var / (2 * mean)
        p = min(p, float(chi2.sf(lr / a, nu)))
    return float(p), lam


def _standard_errors(out: AnisotropicFit, prob: _Problem, x, theta, cov, free):
    """Parameter and tensor standard errors (natural units, delta method) from the coordinates' covariance."""
    family, context = prob.family, prob.context
    nb = prob.nb
    base = family.base
    finite = np.all(np.isfinite(cov))
    jac = np.zeros((nb + 2, nb + 2))  # d natural / d coordinates
    jac[:nb, :nb] = np.diag(natural_jacobian(theta[:nb], base))
    a, b = x[nb], x[nb + 1]
    rho = np.hypot(a, b)
    if rho > 1e-12:
        jac[nb, nb:] = a / rho, b / rho
        jac[nb + 1, nb:] = np.degrees(np.array([-b, a]) / (2 * rho**2))
    else:
        jac[nb:, nb:] = np.nan
    cov_nat = jac @ cov @ jac.T if finite else np.full_like(cov, np.nan)
    se = np.sqrt(np.clip(np.diag(cov_nat), 0, None))
    se[~free] = 0.0
    out.stderr = dict(zip(family.names, map(float, se)))
    out.covariance = cov_nat

    # the tensor: K+- = SECONDS_PER_DAY / 4 (S0 +- rho S_M(0))
    part, psl = family.part, family.part_slice

    def pieces(xx):
        th = prob.theta(xx)
        return (base.zero_frequency_density(th[:nb], context), part.zero_frequency_density(th[psl], context))

    s0, sm0 = pieces(x)
    c = SECONDS_PER_DAY / 4.0
    major, minor, angle = principal_axes(diffusivity_tensor(family, theta, context))
    out.diffusivity_major, out.diffusivity_minor, out.diffusivity_angle_deg = major, minor, angle
    out.diffusivity = 0.5 * (major + minor)
    g_s0, g_sm0 = np.zeros(nb + 2), np.zeros(nb + 2)
    for j in np.flatnonzero(free[:nb]):
        h = 1e-6 if x[j] + 1e-6 <= prob.hi[j] else -1e-6
        xs = x.copy()
        xs[j] += h
        p1 = pieces(xs)
        g_s0[j], g_sm0[j] = (p1[0] - s0) / h, (p1[1] - sm0) / h
    g_rho = np.zeros(nb + 2)
    if rho > 1e-12:
        g_rho[nb:] = a / rho, b / rho
    g_plus = c * (g_s0 + rho * g_sm0 + sm0 * g_rho)
    g_minus = c * (g_s0 - rho * g_sm0 - sm0 * g_rho)
    g_mean = c * g_s0
    if finite:
        out.diffusivity_major_se = float(np.sqrt(max(g_plus @ cov @ g_plus, 0.0)))
        out.diffusivity_minor_se = float(np.sqrt(max(g_minus @ cov @ g_minus, 0.0)))
        out.diffusivity_se = float(np.sqrt(max(g_mean @ cov @ g_mean, 0.0)))
        out.diffusivity_angle_deg_se = out.stderr["anisotropy_angle_deg"]


def _status(prob: _Problem, x, free, ok, msg, t, out):
    names = prob.family.base.names
    nb = prob.nb
    span = prob.hi - prob.lo
    near = free[:nb] & ((x[:nb] - prob.lo < 1e-5 * span) | (prob.hi - x[:nb] < 1e-5 * span))
    notes = []
    if "position_noise" in names:
        k = names.index("position_noise")
        if near[k] and x[k] - prob.lo[k] < 1e-5 * span[k]:
            near[k] = False
            notes.append("position noise below detection")
    bound = [n for n, b in zip(names, near) if b]
    if np.hypot(x[nb], x[nb + 1]) >= RHO_MAX * (1 - 1e-6):
        bound.append("anisotropy")
    if not np.isfinite(t.value):
        status, message = "failed", msg
    elif not ok:
        status, message = "no_convergence", msg
    elif bound:
        status, message = "at_bound", "at bound: " + ", ".join(bound)
    elif not np.all(np.isfinite([out.stderr[k] for k in out.stderr])):
        status, message = "ok", "standard errors unavailable (singular information)"
    else:
        status, message = "ok", ""
    return status, "; ".join([m for m in [message] if m] + notes)


__all__ = ["ANISOTROPY_COLUMNS", "AnisotropicFit", "TENSOR_COLUMNS", "diffusivity_tensor", "fit_anisotropic",
           "isotropic_tensor_columns", "isotropy_pvalue", "principal_axes", "simulate_anisotropic"]
