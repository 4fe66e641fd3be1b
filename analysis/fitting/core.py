"""The window-fit driver: :func:`fit_window` for a :class:`~driftspec.analysis.tracks.windows.Window` and a
:class:`~.spec.FitSpec`, :func:`fit_series` for arrays (it builds a specification and takes the same path), and
:func:`fit_prepared`, the short driver both end in: start, optimise, covariance (each from the estimator object,
:mod:`.estimators`), then derived quantities, goodness of fit and status.

Standard errors of positive parameters and of derived quantities follow by the delta method. Diffusivity:
single-particle, per velocity component, ``kappa = S(0) / 4`` with ``S`` the fitted complex-velocity density
converted to (m/s)^2 per Hz, in m^2/s (G. I. Taylor, "Diffusion by continuous movements", Proc. London Math. Soc.
s2-20, 196-212, 1921, doi:10.1112/plms/s2-20.1.196; for the Matérn process "Fractional Brownian motion, the
Matérn process, and stochastic modeling of turbulent dispersion", Nonlinear Processes in Geophysics 24, 2017,
doi:10.5194/npg-24-481-2017).
"""

from __future__ import annotations

import warnings

import numpy as np

from ..conventions import SECONDS_PER_DAY, parse_timedelta_seconds
from ..models import FitContext, ModelFamily
from ..spectral.irregular import IrregularlyObserved, IrregularObservation, one_blas_thread
from ..spectral.likelihood import PreparedWindow, prepare_window
from .estimators import Estimator, Problem, get_estimator, natural_jacobian
from .result import FitResult, ks_exponential_pvalue
from .selection import select
from .spec import FitSpec, WindowPlan

#: windows with fewer valid samples than this are not fitted
MIN_VALID_SAMPLES = 64
#: above this many valid samples with gaps the exact likelihood warns (its dense fallback grows as N^3)
EXACT_WARN_SAMPLES = 3000


def fit_window(window, spec: FitSpec, start: dict | None = None) -> list[FitResult]:
    """Fit every candidate model of ``spec`` to one window: the one window-fit function of driftspec.

    Parameters
    ----------
    window : Window
        From :func:`~driftspec.analysis.tracks.windows.iter_windows` (``z`` in m/s with NaN where missing, sample
        latitudes, the typical fix interval and position error of its fixes).
    spec : FitSpec
    start : dict, optional
        Starting values overriding the heuristic (natural units).

    Returns
    -------
    list of FitResult
        One per candidate, in the order of ``spec.candidate_models``, the chosen one marked ``selected``
        (:mod:`.selection`); a failed fit is a result with a status.
    """
    with one_blas_thread():  # small matrices: one thread is faster, and the sums are the same in every process
        return _fit_window(window, spec, start)


def _fit_window(window, spec: FitSpec, start: dict | None = None) -> list[FitResult]:
    fix_days = window.fix_interval_s / SECONDS_PER_DAY if window.fix_interval_s else None
    plan = spec.resolve(window.dt_seconds / SECONDS_PER_DAY, window.latitude, fix_days, window.position_error_m,
                        irregular=window.irregular, fix_times_days=window.fix_times_days,
                        fix_error_m=window.fix_error_m)
    defer = not spec.keep_all and len(spec.candidate_models) > 1
    shared = {}  # what the candidates share: the irregular-fix operator is built once per window
    results = [_fit_planned(window.z, plan, spec, m, start=start, defer=defer, shared=shared)
               for m in spec.candidate_models]
    for r in results:
        r.window_start = window.start
        r.observation = plan.observation
    best = select(results, window.n_samples * window.dt_seconds / SECONDS_PER_DAY)
    if defer and best >= 0:  # the sandwich and the goodness of fit for the selected candidate only
        complete(results[best])
    if spec.anisotropic and best >= 0:
        results.append(_anisotropic_candidate(window, plan, spec, results))
    return results


#: level at which rejecting isotropy selects the anisotropic fit
ISOTROPY_LEVEL = 0.01


def _anisotropic_candidate(window, plan: WindowPlan, spec: FitSpec, results):
    """The anisotropic version of the selected model, its isotropy test and diffusivity tensor; selected in place of
    the isotropic fit where isotropy is rejected at :data:`ISOTROPY_LEVEL`."""
    from .anisotropy import AnisotropicFit, fit_anisotropic

    chosen = next(r for r in results if r.selected)
    if chosen.family is None or not np.all(np.isfinite(chosen.theta)):
        aniso = AnisotropicFit(model=f"anisotropic_{chosen.model}", params={}, stderr={}, units={},
                               status="failed", message=f"not fitted anisotropically: isotropic fit {chosen.status}")
    else:
        try:
            aniso = fit_anisotropic(window.z, plan.dt_days, base_fit=chosen, taper=spec.taper,
                                    exclude=spec.exclude, stderr=spec.stderr)
        except ValueError as exc:
            aniso = AnisotropicFit(model=f"anisotropic_{chosen.model}", params={}, stderr={}, units={},
                                   status="failed", message=str(exc))
    aniso.window_start, aniso.observation = window.start, plan.observation
    pval = aniso.isotropy_pvalue
    if aniso.status == "ok" and np.isfinite(pval) and pval < ISOTROPY_LEVEL:
        for r in results:
            r.selected, r.selection = False, f"not selected: {aniso.model} chosen"
        aniso.selected = True
        aniso.selection = f"{aniso.model}: isotropy rejected (p = {pval:.2g})"
    else:
        aniso.selected = False
        aniso.selection = (f"not selected: isotropy not rejected (p = {pval:.2g})" if np.isfinite(pval)
                           else f"not selected: {aniso.status}")
    for r in results:
        r.isotropy_pvalue = pval
    return aniso


def fit_series(z, dt, *, model="matern+inertial", estimator="debiased", max_freq=None, latitude=None,
               mask=None, taper=None, exclude=None, fixed=None, inertial_frequency="free",
               observation="none", velocity_operator=None, position_noise=None,
               start=None, stderr="auto") -> FitResult:
    """Fit a parametric model to the rotary spectrum of one window of complex velocity.

    Builds a :class:`~.spec.FitSpec` from the keywords and fits through the same path as :func:`fit_window`.

    Parameters
    ----------
    z : array_like of complex
        Complex velocity ``u + i v`` in m/s at regular times; NaN marks missing samples. A real array is
        fitted as a real-valued series (one-sided band).
    dt : pandas.Timedelta, numpy.timedelta64, datetime.timedelta or float
        Sample interval (a float is in seconds).
    model : str or ModelFamily
        ``"matern"``, ``"inertial"``, ``"matern+inertial"`` (default) or any registered family.
    estimator : {"debiased", "whittle", "exact"}
        Debiased Whittle (default), standard Whittle, or exact Gaussian likelihood.
    max_freq : float, optional
        Fit only ``0 < |f| <= max_freq`` (cpd). Default: the specification's automatic band (up to the Nyquist
        frequency for velocities that are not differences; see :mod:`.spec`).
    latitude : float or array_like, optional
        Latitude (degrees north), a scalar or one value per sample. Used for the starting value and
        bounds of the inertial frequency, and by the latitude-following inertial model.
    mask : array_like of bool, optional
        ``False`` marks samples to treat as missing (in addition to NaN).
    taper : {"none", "hann", "dpss"}, optional
        Data taper for the periodogram (default none).
    exclude : sequence of (low, high), optional
        Frequency-magnitude bands (cpd) to leave out of the fit, e.g. around tidal lines.
    fixed : dict, optional
        Parameters held at given values, e.g. ``{"matern_alpha": 1.0}``.
    inertial_frequency : {"free", "follow-latitude"}
        Fit the inertial frequency as a free constant (default), or follow ``2 Omega sin(latitude(t))``.
    observation : {"none", "differenced", "differenced+noise"}
        How ``z`` was observed (see :mod:`driftspec.analysis.models.observation`): ``"none"`` for measured or
        simulated velocities (default here); for velocities differenced from positions, ``"differenced"`` (the
        model averaged by the difference operator) or ``"differenced+noise"`` (plus white position noise, the
        parameter ``position_noise`` in m).
    velocity_operator : {"central", "forward"}, optional
        The difference operator that made ``z`` from positions. Default: ``"central"`` with an observation
        model, measured velocities without one.
    position_noise : float, optional
        Hold ``position_noise`` (m) at this value instead of fitting it.
    start : dict, optional
        Starting values overriding the heuristic.
    stderr : {"auto", "fisher", "sandwich"}
        Debiased-Whittle standard errors: ``fisher`` inflates the inverse Fisher information by
        ``N sum h^4`` (fast; right for complete, untapered windows); ``sandwich`` is ``F^-1 V F^-1`` with
        ``V`` the variance of the score over periodograms simulated from the fitted model with the window's
        mask and taper (honest when gaps correlate the ordinates; costs about one extra fit); ``auto``
        (default) uses the sandwich exactly when the window has gaps or a taper.

    Returns
    -------
    FitResult
        Never raises for a fit that fails numerically: such results carry ``status != "ok"``.

    Examples
    --------
    >>> import numpy as np
    >>> from driftspec.analysis import fit_series, simulate
    >>> z = simulate("matern", [0.02, 1.2, 1.0], n=1440, dt=3600.0, seed=1)
    >>> res = fit_series(z, 3600.0, model="matern")
    >>> res.status, round(res.params["matern_alpha"], 1)
    ('ok', 1.2)
    """
    velocity = velocity_operator or ("measured" if observation == "none" else "central")
    spec = FitSpec(models=(model,), estimator=estimator, band="auto" if max_freq is None else max_freq,
                   velocity=velocity, observation=observation,
                   position_noise="fit" if position_noise is None else position_noise,
                   inertial_frequency=inertial_frequency, taper=taper or "none", exclude=tuple(exclude or ()),
                   fixed=fixed or {}, stderr=stderr)
    z = np.asarray(z)
    if latitude is not None and np.ndim(latitude) and np.shape(latitude) != z.shape:
        raise ValueError("latitude must be a scalar or have one value per sample")
    plan = spec.resolve(parse_timedelta_seconds(dt) / SECONDS_PER_DAY, latitude)
    with one_blas_thread():
        result = _fit_planned(z, plan, spec, spec.candidate_models[0], mask=mask, start=start)
    result.observation = plan.observation
    return result


def _fit_planned(z, plan: WindowPlan, spec: FitSpec, model, mask=None, start=None, defer=False,
                 shared: dict | None = None) -> FitResult:
    """Prepare one window for one candidate as ``plan`` says and fit it."""
    family = spec.family(model, plan.follow_latitude, plan.observation)
    name = spec.model_name(model)
    estimator = get_estimator(spec.estimator)
    z = np.asarray(z)
    n = z.size
    lat_series = plan.latitude_series
    if lat_series is None and family.modulated and plan.latitude is not None:
        lat_series = np.full(n, plan.latitude)
    context = FitContext(dt_days=plan.dt_days, latitude=plan.latitude,
                         inertial_frequency_cpd=plan.inertial_frequency_cpd, latitude_series=lat_series)
    valid = np.isfinite(z) if mask is None else np.isfinite(z) & np.asarray(mask, bool)
    n_valid = int(valid.sum())

    def failed(status, message):
        return _unfitted(name, spec.estimator, family, status, message, n, n_valid, plan.max_freq)

    if n_valid < MIN_VALID_SAMPLES:
        return failed("too_few_samples", f"{n_valid} valid samples (need {MIN_VALID_SAMPLES})")
    if family.modulated and lat_series is None:
        return failed("failed", "latitude-following inertial model needs latitude")
    fixed = {k: v for k, v in spec.fixed if k in family.names}
    if plan.position_noise is not None and "position_noise" in family.names:
        fixed["position_noise"] = plan.position_noise
    try:
        prep = prepare_window(z, plan.dt_days, mask=mask, taper=spec.taper, max_freq=plan.max_freq,
                              exclude=spec.exclude, modulated=family.modulated, latitude_series=lat_series)
    except ValueError as exc:
        return failed("failed", str(exc))
    if plan.observation == "irregular":
        if spec.estimator != "debiased":
            return failed("failed", f"the {spec.estimator} estimator does not model irregular fixes; use debiased")
        try:
            family = _irregularly_observed(family, prep, plan, context, spec.operator, shared)
        except ValueError as exc:
            return failed("failed", f"irregular observation: {exc}")
        fixed = {k: v for k, v in fixed.items() if k in family.names}
    n_free = len(family.names) - len(fixed)
    if prep.band.sum() < max(2 * n_free + 2, 8):
        return failed("too_few_samples", f"{int(prep.band.sum())} frequencies in the fitted band "
                                         f"(0 < |f| <= {plan.max_freq:.3g} cpd)")
    if spec.estimator == "exact" and n_valid > EXACT_WARN_SAMPLES and not prep.valid.all():
        warnings.warn(f"exact likelihood with {n_valid} samples and gaps uses a dense factorisation (cost grows as "
                      "N^3)", stacklevel=3)
    try:
        return fit_prepared(family, prep, context, estimator, fixed=fixed, start=start, stderr=spec.stderr,
                            model_name=name, defer=defer)
    except (ValueError, FloatingPointError, np.linalg.LinAlgError) as exc:
        return failed("failed", f"{type(exc).__name__}: {exc}")


def _irregularly_observed(family, prep, plan: WindowPlan, context, operator, shared: dict | None = None):
    """The ocean family seen through the window's interpolation of irregular fixes (the operator is built once
    per window and kept in ``shared`` for the other candidates)."""
    shared = {} if shared is None else shared
    if "operator" not in shared:
        noise = "fixed" if plan.fix_error_m is not None else "fitted"
        shared["operator"] = IrregularObservation(
            plan.fix_times_days, plan.dt_days, prep.n, valid=prep.valid, operator=operator, taper=prep.taper,
            position_error_m=plan.fix_error_m, noise=noise, band_index=prep.band_index,
            inertial_frequency_cpd=context.inertial_frequency_cpd)
    return IrregularlyObserved(family, shared["operator"])


def fit_prepared(family: ModelFamily, prep: PreparedWindow, context: FitContext, estimator: Estimator, *,
                 fixed: dict | None = None, start: dict | None = None, stderr: str = "auto",
                 model_name: str | None = None, defer: bool = False) -> FitResult:
    """The short driver: start, optimise and covariance from ``estimator``; then the diffusivity (delta
    method), goodness of fit and status. ``fixed`` holds parameters at values (natural units).

    ``defer=True`` leaves the costly extras, the simulated sandwich and the goodness of fit, for
    :func:`complete` (the Fisher-information errors stand in until then): a window's candidates are fitted that
    way and only the selected one is completed.
    """
    fixed = dict(fixed or {})
    names = family.names
    f_band = prep.freq_cpd[prep.band]
    theta0 = family.initial_guess(f_band, prep.periodogram[prep.band], context)
    for k, v in (start or {}).items():
        theta0[names.index(k)] = v
    problem = Problem.build(family, prep, context, theta0, fixed)
    x0 = estimator.start(problem) if not start else problem.x0
    opt = estimator.optimise(problem, x0)
    theta = problem.theta(opt.x)
    kappa, kappa_grad = _diffusivity_and_gradient(problem, opt.x)
    loglik = -opt.value
    n_free = int(problem.free.sum())
    result = FitResult(
        model=model_name or family.name, estimator=estimator.name,
        params=dict(zip(names, map(float, theta))), stderr={}, units=family.units, loglik=loglik,
        aic=2 * n_free - 2 * loglik, diffusivity=kappa, derived=family.derived(theta, context), n_samples=prep.n,
        n_valid=prep.n_valid, n_freq=int(prep.band.sum()), n_evaluations=problem.n_evaluations,
        max_freq=float(np.abs(prep.freq_cpd[prep.band_index]).max()), fixed=fixed, family=family,
        context=context, prepared=prep,
    )
    result.pending = (problem, opt, estimator, stderr, kappa_grad)
    deferred = defer and estimator.name == "debiased"
    _set_covariance(result, "fisher" if deferred else stderr)
    result.covariance_deferred = deferred
    if not defer:
        complete(result)
    return result


def complete(result: FitResult) -> FitResult:
    """Finish a result fitted with ``defer=True``: the requested standard errors and the goodness of fit."""
    if result.pending is None:
        return result
    problem, opt, estimator, stderr, _ = result.pending
    if result.covariance_deferred and stderr != "fisher":
        _set_covariance(result, stderr)
    e_band = estimator.expected_band(problem, opt)
    prep = problem.prep
    result.gof_pvalue = ks_exponential_pvalue(prep.periodogram[prep.band_index] / np.maximum(e_band, 1e-300))
    result.pending = None
    return result


def _set_covariance(result: FitResult, stderr: str) -> None:
    """Covariance, standard errors (natural units, delta method) and status of a result for ``stderr``."""
    problem, opt, estimator, _, kappa_grad = result.pending
    free = problem.free
    n_free = int(free.sum())
    names = problem.family.names
    cov_x = np.full((n_free, n_free), np.nan)
    method = ""
    with np.errstate(all="ignore"):
        try:
            cov_x, method = estimator.covariance(problem, opt, stderr)
        except np.linalg.LinAlgError:
            pass
    theta = result.theta
    jac_nat = natural_jacobian(theta, problem.family)[free]
    cov_nat = cov_x * np.outer(jac_nat, jac_nat)
    se = np.full(len(names), np.nan)
    se[free] = np.sqrt(np.clip(np.diag(cov_nat), 0, None)) if np.all(np.isfinite(cov_nat)) else np.nan
    se[~free] = 0.0
    finite = np.all(np.isfinite(cov_x))
    result.diffusivity_se = float(np.sqrt(max(kappa_grad @ cov_x @ kappa_grad, 0))) if finite else np.nan
    status, message, below = _status(problem, problem.full(opt.x), opt, se)
    se[below] = np.nan  # a curvature at the bound is no standard error
    result.stderr = dict(zip(names, map(float, se)))
    result.covariance, result.stderr_method = cov_nat, method
    result.status, result.message = status, message


def _diffusivity_and_gradient(problem: Problem, xf):
    """``kappa = S(0) / 4`` in m^2/s and its gradient in the free coordinates: the family's exact gradient of
    ``S(0)`` where it has one, else one-sided differences that step into the bounds (so every evaluation is a valid
    parameter set)."""
    family, context = problem.family, problem.context
    theta = family.check_theta(problem.theta(xf))
    to_kappa = SECONDS_PER_DAY / 4.0
    exact = family._zero_frequency_density_jacobian(theta, context)
    if exact is not None:
        return float(exact[0]) * to_kappa, np.asarray(exact[1], float)[problem.free] * to_kappa

    def kappa(x):  # the steps stay inside the bounds: no check per step
        return float(family._zero_frequency_density(problem.theta(x), context)) * to_kappa

    k0 = kappa(xf)
    lo, hi = problem.x_lo[problem.free], problem.x_hi[problem.free]
    grad = np.zeros(xf.size)
    for j in range(xf.size):
        h = 1e-6 if xf[j] + 1e-6 <= hi[j] else -1e-6
        if h < 0 and xf[j] + h < lo[j]:
            continue  # a degenerate interval: no direction to move in
        xs = xf.copy()
        xs[j] += h
        grad[j] = (kappa(xs) - k0) / h
    return float(k0), grad


def _status(problem: Problem, x_hat, opt, se):
    """``(status, message, below)``: at a bound, not converged, failed or ok; ``below`` marks a position noise
    below what the band can detect (a finding, not a failed fit)."""
    names = problem.family.names
    span = problem.x_hi - problem.x_lo
    near = problem.free & ((x_hat - problem.x_lo < 1e-5 * span) | (problem.x_hi - x_hat < 1e-5 * span))
    notes = []
    below = np.zeros(len(names), bool)
    if "position_noise" in names:
        k = names.index("position_noise")
        if near[k] and x_hat[k] - problem.x_lo[k] < 1e-5 * span[k]:
            near[k] = False
            notes.append("position noise below detection")
            below[k] = True
    if not opt.success and not np.isfinite(opt.value):
        status, message = "failed", opt.message
    elif not opt.success:
        status, message = "no_convergence", opt.message
    elif near.any():
        status, message = "at_bound", "at bound: " + ", ".join(n for n, b in zip(names, near) if b)
    elif not np.all(np.isfinite(se[problem.free & ~below])):
        status, message = "ok", "standard errors unavailable (singular information)"
    else:
        status, message = "ok", ""
    if notes:
        message = "; ".join([m for m in [message] if m] + notes)
    return status, message, below


def _unfitted(model, estimator, family, status, message, n=0, n_valid=0, max_freq=np.nan):
    nan = {name: np.nan for name in family.names}
    return FitResult(model, estimator, dict(nan), dict(nan), family.units, status=status, message=message,
                     n_samples=n, n_valid=n_valid, max_freq=max_freq, family=family)


__all__ = ["EXACT_WARN_SAMPLES", "MIN_VALID_SAMPLES", "complete", "fit_prepared", "fit_series", "fit_window"]
