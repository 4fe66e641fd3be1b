"""Estimators as objects: each owns its objective (and gradient where it has one), its optimisation and its
covariance. The driver (:func:`~driftspec.analysis.fitting.core.fit_prepared`) only asks for a start, an optimum
and a covariance, so adding an estimator is one class here and one line in :data:`ESTIMATORS`.

All work in optimiser coordinates ``x``: ``log`` of a positive parameter with ``scale="log"`` and the value
itself otherwise, inside the family's bounds for the window (:class:`Problem`).

* :class:`DebiasedEstimator`: ``sum_band log E[I_k] + I_k / E[I_k]`` with the expected periodogram ``E`` of the
  window (mask, taper, observation model), its exact gradient from one batched FFT, Levenberg-Marquardt-damped
  Fisher scoring (the expected Hessian ``sum (dlog E)(dlog E)^T`` comes free with the gradient). Covariance: the
  inverse Fisher information inflated by ``N sum h^4`` for complete untapered windows, the sandwich
  ``F^-1 V F^-1`` with a simulated score covariance where gaps or a taper correlate the ordinates.
  "The debiased Whittle likelihood", Biometrika 106(2), 251-266 (2019), doi:10.1093/biomet/asy071.
* :class:`WhittleEstimator`: the same form with the continuous density ``S(f_k)`` in place of ``E[I_k]``; biased
  by aliasing and leakage, kept as the textbook reference. P. Whittle (1953), Arkiv för Matematik 2, 423-434.
* :class:`ExactEstimator`: the Gaussian likelihood of the valid samples (see
  :mod:`driftspec.analysis.spectral.exact`), started from the debiased estimate; covariance from the observed
  information.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.optimize

from ..models import FitContext, ModelFamily
from ..spectral.exact import exact_negloglik, exact_negloglik_grad, exact_observed_information
from ..spectral.likelihood import PreparedWindow, expected_in_band, whittle_expectation
from .uncertainty import score_covariance


def _log_scaled(family: ModelFamily) -> np.ndarray:
    return np.array([p.scale == "log" for p in family.parameters], bool)


def to_x(theta, family: ModelFamily) -> np.ndarray:
    """Natural units to optimiser coordinates."""
    theta = np.asarray(theta, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(_log_scaled(family), np.log(np.where(_log_scaled(family), theta, 1.0)), theta)


def from_x(x, family: ModelFamily) -> np.ndarray:
    """Optimiser coordinates to natural units."""
    x = np.asarray(x, float)
    log = _log_scaled(family)
    return np.where(log, np.exp(np.where(log, x, 0.0)), x)


def natural_jacobian(theta, family: ModelFamily) -> np.ndarray:
    """``d theta / d x`` (the diagonal of the coordinate change)."""
    return np.array([t if p.scale == "log" else 1.0 for t, p in zip(theta, family.parameters)], float)


@dataclass
class Problem:
    """One model family on one prepared window, in optimiser coordinates, with some parameters held fixed."""

    family: ModelFamily
    prep: PreparedWindow
    context: FitContext
    free: np.ndarray  # bool per parameter
    x_fixed: np.ndarray  # full coordinates; the free entries are overwritten by the optimiser
    x_lo: np.ndarray
    x_hi: np.ndarray
    n_evaluations: int = 0
    _natural: tuple | None = None  # bounds in natural units, computed once

    @classmethod
    def build(cls, family: ModelFamily, prep: PreparedWindow, context: FitContext, theta0, fixed: dict) -> Problem:
        """``theta0`` (natural units) is clipped into the window's bounds; ``fixed`` values override it."""
        names = family.names
        theta0 = np.array(theta0, float)
        for k, v in fixed.items():
            theta0[names.index(k)] = v
        bounds = family.bounds(context)
        lo = np.array([b[0] for b in bounds], float)
        hi = np.array([b[1] for b in bounds], float)
        theta0 = np.where(np.isfinite(theta0), theta0, 0.5 * (lo + hi))
        theta0 = np.clip(theta0, lo * (1 + 1e-9), hi * (1 - 1e-9))
        free = np.array([n not in fixed for n in names])
        return cls(family, prep, context, free, to_x(theta0, family), to_x(lo, family), to_x(hi, family))

    def full(self, xf) -> np.ndarray:
        x = self.x_fixed.copy()
        x[self.free] = xf
        return x

    def theta(self, xf) -> np.ndarray:
        """Natural-unit parameters for free coordinates ``xf``, kept inside the declared bounds."""
        if self._natural is None:
            self._natural = (from_x(self.x_lo, self.family), from_x(self.x_hi, self.family))
        return np.clip(from_x(self.full(xf), self.family), *self._natural)

    @property
    def x0(self) -> np.ndarray:
        return self.x_fixed[self.free]

    @property
    def bounds(self) -> list[tuple[float, float]]:
        return list(zip(self.x_lo[self.free], self.x_hi[self.free]))


@dataclass
class Optimum:
    """Where an estimator's optimisation ended (free coordinates) and what it learnt on the way."""

    x: np.ndarray
    value: float  # the minimised objective (negative log-likelihood)
    success: bool
    message: str
    fisher: np.ndarray | None = None  # information at x, when the optimiser had it
    expected_band: np.ndarray | None = None  # E[I_k] over the band at x, when computed


class Estimator:
    """Base class: an objective over optimiser coordinates, its optimisation and its covariance."""

    name = ""

    def objective(self, problem: Problem, xf) -> float:
        """The negative log-likelihood at free coordinates ``xf``."""
        raise NotImplementedError

    def start(self, problem: Problem) -> np.ndarray:
        """Free coordinates to start from (default: the problem's heuristic start)."""
        return problem.x0

    def optimise(self, problem: Problem, x0) -> Optimum:
        """Minimise :meth:`objective` from ``x0`` (default: L-BFGS-B with finite-difference gradients)."""
        def f(xf):
            problem.n_evaluations += 1
            v = self.objective(problem, xf)
            return v if np.isfinite(v) else 1e300

        with np.errstate(all="ignore"):
            res = scipy.optimize.minimize(f, x0, method="L-BFGS-B", bounds=problem.bounds,
                                          options={"maxiter": 500, "ftol": 1e-10, "gtol": 1e-6})
        return Optimum(res.x, float(res.fun), bool(res.success), str(res.message))

    def covariance(self, problem: Problem, opt: Optimum, stderr: str = "auto") -> tuple[np.ndarray, str]:
        """Covariance of the free coordinates at the optimum, and the name of the method."""
        raise NotImplementedError

    def expected_band(self, problem: Problem, opt: Optimum) -> np.ndarray:
        """``E[I_k]`` over the band at the optimum (for the goodness of fit)."""
        if opt.expected_band is not None:
            return opt.expected_band
        return expected_in_band(problem.family, problem.theta(opt.x), problem.prep, problem.context)[0]


class DebiasedEstimator(Estimator):
    """The debiased Whittle likelihood (see the module docstring)."""

    name = "debiased"

    def objective_and_gradient(self, problem: Problem, xf):
        e, de = expected_in_band(problem.family, problem.theta(xf), problem.prep, problem.context)
        if np.any(e <= 0) or not np.all(np.isfinite(e)):
            return 1e300, np.zeros(int(problem.free.sum()))
        i = problem.prep.periodogram[problem.prep.band_index]
        return float(np.sum(np.log(e) + i / e)), de[problem.free] @ ((e - i) / e**2)

    def objective(self, problem: Problem, xf) -> float:
        return self.objective_and_gradient(problem, xf)[0]

    def optimise(self, problem: Problem, x0) -> Optimum:
        opt = _fisher_scoring(problem, x0)
        if opt is not None and opt.success:
            return opt

        def f(xf):
            problem.n_evaluations += 1
            return self.objective_and_gradient(problem, xf)

        with np.errstate(all="ignore"):
            res = scipy.optimize.minimize(f, x0 if opt is None else opt.x, jac=True, method="L-BFGS-B",
                                          bounds=problem.bounds, options={"maxiter": 500, "ftol": 1e-10, "gtol": 1e-6})
        return Optimum(res.x, float(res.fun), bool(res.success), str(res.message))

    def fisher(self, problem: Problem, xf) -> np.ndarray:
        e, de = expected_in_band(problem.family, problem.theta(xf), problem.prep, problem.context)
        dlog = de[problem.free] / e
        return dlog @ dlog.T

    def covariance(self, problem: Problem, opt: Optimum, stderr: str = "auto") -> tuple[np.ndarray, str]:
        fisher = opt.fisher if opt.fisher is not None else self.fisher(problem, opt.x)
        f_inv = np.linalg.inv(fisher)
        gappy = bool(np.ptp(problem.prep.taper) > 0)  # missing samples or a taper
        irregular = not getattr(problem.family, "simulable", True)  # seen through irregular fixes: always
        if stderr == "sandwich" or (stderr == "auto" and (gappy or irregular)):
            v = score_covariance(problem.family, problem.theta(opt.x), problem.prep, problem.context, problem.free)
            return f_inv @ v @ f_inv, "sandwich"
        return f_inv * problem.prep.variance_inflation, "fisher"


class WhittleEstimator(Estimator):
    """The standard Whittle likelihood: the continuous spectral density at the Fourier frequencies."""

    name = "whittle"

    def _density(self, problem: Problem, xf) -> np.ndarray:
        s = whittle_expectation(problem.family, problem.theta(xf), problem.prep, problem.context)
        return np.maximum(s[problem.prep.band_index], 1e-300)

    def objective(self, problem: Problem, xf) -> float:
        s = self._density(problem, xf)
        return float(np.sum(np.log(s) + problem.prep.periodogram[problem.prep.band_index] / s))

    def covariance(self, problem: Problem, opt: Optimum, stderr: str = "auto") -> tuple[np.ndarray, str]:
        # the Whittle form's Fisher information sum (dlog S)(dlog S)^T, derivatives by central differences
        s0 = self._density(problem, opt.x)
        dlog = np.empty((opt.x.size, s0.size))
        for j in range(opt.x.size):
            xp, xm = opt.x.copy(), opt.x.copy()
            xp[j] += 1e-6
            xm[j] -= 1e-6
            dlog[j] = (np.log(self._density(problem, xp)) - np.log(self._density(problem, xm))) / 2e-6
        return np.linalg.inv(dlog @ dlog.T) * problem.prep.variance_inflation, "fisher"

    def expected_band(self, problem: Problem, opt: Optimum) -> np.ndarray:
        return self._density(problem, opt.x)


class ExactEstimator(Estimator):
    """The exact Gaussian likelihood of the valid samples (:mod:`driftspec.analysis.spectral.exact`: O(N^2) by
    Levinson recursion for complete windows, a dense factorisation with gaps), with its analytic gradient,
    started from the debiased Whittle estimate; covariance from the observed information (central differences
    of the analytic gradient)."""

    name = "exact"

    def objective_and_gradient(self, problem: Problem, xf):
        value, grad = exact_negloglik_grad(problem.family, problem.theta(xf), problem.prep, problem.context)
        if not np.isfinite(value):
            return 1e300, np.zeros(int(problem.free.sum()))
        return value, grad[problem.free]

    def objective(self, problem: Problem, xf) -> float:
        return exact_negloglik(problem.family, problem.theta(xf), problem.prep, problem.context)

    def start(self, problem: Problem) -> np.ndarray:
        pilot = DebiasedEstimator().optimise(problem, problem.x0)  # near-exact and cheap
        return pilot.x if np.all(np.isfinite(pilot.x)) else problem.x0

    def optimise(self, problem: Problem, x0) -> Optimum:
        # the objective scaled to O(1) per sample, so that L-BFGS-B's first trial step stays local
        scale = 1.0 / max(problem.prep.n_valid, 1)

        def f(xf):
            problem.n_evaluations += 1
            value, grad = self.objective_and_gradient(problem, xf)
            return scale * value, scale * grad

        with np.errstate(all="ignore"):
            res = scipy.optimize.minimize(f, x0, jac=True, method="L-BFGS-B", bounds=problem.bounds,
                                          options={"maxiter": 200, "ftol": 1e-13, "gtol": 1e-7})
        return Optimum(res.x, float(res.fun / scale), bool(res.success), str(res.message))

    def covariance(self, problem: Problem, opt: Optimum, stderr: str = "auto") -> tuple[np.ndarray, str]:
        info = exact_observed_information(problem.family, problem.theta(opt.x), problem.prep, problem.context)
        free = problem.free
        return np.linalg.inv(info[np.ix_(free, free)]), "observed"


#: estimator name -> class
ESTIMATORS = {cls.name: cls for cls in (DebiasedEstimator, WhittleEstimator, ExactEstimator)}


def get_estimator(name: str) -> Estimator:
    if name not in ESTIMATORS:
        raise ValueError(f"estimator must be one of {', '.join(ESTIMATORS)}; got {name!r}")
    return ESTIMATORS[name]()


#: the scoring's initial damping (relative to the Fisher information's diagonal). Measured on 40 demo tracks (104
#: windows): 1e-2 instead of 1e-3 took the irregular-fix fits from 25.3 to 22.0 evaluations on average, the
#: regular-grid ones from 15.6 to 15.9 and clean hourly windows unchanged at 5.6, with the same optima.
_MU0 = 1e-2


def _fisher_scoring(problem: Problem, x0, max_iter=60):
    """Levenberg-Marquardt-damped Fisher scoring for the debiased Whittle objective.

    The expected Hessian of the Whittle form is the Fisher information ``sum (dlogE)(dlogE)^T``, which
    comes free with the gradient; from the heuristic start this converges in a handful of evaluations.
    Returns ``None`` when the start is not usable (the caller then falls back to L-BFGS-B).
    """
    family, prep, context, free = problem.family, problem.prep, problem.context, problem.free
    lo, hi = problem.x_lo[free], problem.x_hi[free]
    i_band = prep.periodogram[prep.band_index]
    all_free = bool(np.all(free))

    def evaluate(xf):
        problem.n_evaluations += 1
        eb, de = expected_in_band(family, problem.theta(xf), prep, context)
        if not (np.all(eb > 0) and np.isfinite(eb).all() and np.isfinite(de).all()):
            return np.inf, None, None
        ratio = i_band / eb
        val = float(np.sum(np.log(eb)) + np.sum(ratio))
        dlog = de if all_free else de[free]
        dlog /= eb
        grad = dlog @ (1.0 - ratio)
        last[xf.tobytes()] = eb
        return val, grad, dlog @ dlog.T

    last = {}  # expected periodogram in the band at each evaluated point (the optimum's is kept)

    x = np.clip(x0, lo, hi)
    val, grad, fisher = evaluate(x)
    if not np.isfinite(val):
        return None
    # the longest step per coordinate: a factor e^3 for log-scaled parameters, half the range for linear
    # ones; a poorly determined parameter (tiny curvature) would otherwise jump from bound to bound
    scales = [p.scale for p, f in zip(family.parameters, free) if f]
    cap = np.array([3.0 if sc == "log" else 0.5 * (h - l) for sc, l, h in zip(scales, lo, hi)])
    mu, nu = _MU0, 2.0
    flat = 0  # accepted steps in a row that changed the objective by a negligible amount
    success, message = False, "maximum iterations reached"
    for _ in range(max_iter):
        active = ((x <= lo) & (grad > 0)) | ((x >= hi) & (grad < 0))
        act = ~active
        if not act.any():
            success, message = True, "all parameters at bounds"
            break
        f_act = fisher if act.all() else fisher[np.ix_(act, act)]
        g_act = grad if act.all() else grad[act]
        try:
            decrement = float(g_act @ np.linalg.solve(f_act, g_act))
        except np.linalg.LinAlgError:
            decrement = np.inf
        if decrement < 1e-5:  # the log-likelihood is then within about 5e-6 of its maximum (0.003 SE)
            success, message = True, "converged (Newton decrement)"
            break
        improved = False
        reach = 1.0  # the longest step allowed, in units of the cap
        while mu < 1e8:
            step = np.zeros_like(x)
            try:
                step[act] = -np.linalg.solve(f_act + mu * np.diag(np.diag(f_act)), g_act)
            except np.linalg.LinAlgError:
                mu *= 10
                continue
            longest = float(np.max(np.abs(step) / cap))
            if longest > reach:
                step *= reach / longest
                longest = reach
            x_new = np.clip(x + step, lo, hi)
            val_new, grad_new, fisher_new = evaluate(x_new)
            if val_new >= val:
                # a rejected step is not tried again at the same length: a capped step would otherwise come back
                # unchanged while the damping grows (up to five wasted evaluations seen on irregular-fix windows)
                reach = 0.5 * longest
            if val_new < val:
                improved = True
                small = val - val_new < 1e-10 * max(1.0, abs(val))
                flat = flat + 1 if val - val_new < 1e-7 else 0
                # gain ratio: actual decrease over the quadratic model's (Nielsen's damping update), so
                # that a poor quadratic model (a curved valley) keeps the steps damped instead of zig-zagging
                s_act = (x_new - x)[act]
                predicted = -(g_act @ s_act + 0.5 * s_act @ f_act @ s_act)
                rho = (val - val_new) / predicted if predicted > 0 else 0.0
                x, val, grad, fisher = x_new, val_new, grad_new, fisher_new
                mu = max(mu * max(1 / 3, 1 - (2 * rho - 1) ** 3), 1e-7)
                nu = 2.0
                break
            mu *= nu
            nu *= 2
        if not improved:
            success = decrement < 1e-4
            message = "no further decrease" if success else "line search failed"
            break
        if (small and decrement < 1e-5) or flat >= 3:
            success, message = True, "converged (objective change)"
            break
    return Optimum(x, float(val), success, message, fisher=fisher, expected_band=last.get(np.asarray(x).tobytes()))
