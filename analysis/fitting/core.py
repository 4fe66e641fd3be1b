"""Fit a model family to one window of complex velocity: :func:`fit_series`.

The optimiser (L-BFGS-B, scipy) works in coordinates ``x`` that are ``log`` of positive scale parameters
and the value itself for shape/frequency parameters, inside the family's bounds. The debiased Whittle
objective comes with its exact gradient (one batched FFT); the others use finite differences.

Standard errors (debiased and standard Whittle) come from the Fisher information of the Whittle form,
``F = sum_band (d log E_k)(d log E_k)^T``. For a complete, untapered window the ordinates are nearly
independent and ``F^-1`` is the variance (inflated by ``N sum_t h_t^4``, the variance inflation of a
tapered or masked periodogram, Percival & Walden 1993, section 6.4). Gaps and tapers correlate ordinates
by an amount that depends on the spectrum itself (a red spectrum leaks through the gaps' sidelobes), so
for such windows the debiased estimator uses the sandwich ``F^-1 V F^-1`` with ``V`` the covariance of the
score over periodograms simulated from the fitted model (:func:`score_covariance`); ``stderr=`` chooses.
The exact likelihood uses its observed information (a finite-difference Hessian). Standard errors of
positive parameters and of derived quantities follow by the delta method.

Goodness of fit: over the fitted band the ratios ``I_k / E[I_k]`` are approximately independent standard
exponential variables when the model is right; the p-value is the Kolmogorov-Smirnov test of that
(scipy.stats.kstest). Ordinates correlated by tapering or gaps make it approximate.

Diffusivity: single-particle, per velocity component, ``kappa = S(0) / 4`` with ``S`` the fitted
complex-velocity density converted to (m/s)^2 per Hz, in m^2/s (Taylor 1921; for the Matérn process
"Fractional Brownian motion, the Matérn process, and stochastic modeling of turbulent
dispersion", Nonlinear Processes in Geophysics 24, 2017).

References
----------
Taylor, G. I. (1921). Diffusion by continuous movements. Proceedings of the London Mathematical Society
s2-20, 196-212. doi:10.1112/plms/s2-20.1.196
"The debiased Whittle likelihood", Biometrika 106, 251-266 (2019), doi:10.1093/biomet/asy071
(standard errors: section 4).
"""

from __future__ import annotations

import warnings
import zlib
from dataclasses import dataclass, field

import numpy as np
import scipy.fft
import scipy.optimize
from scipy.stats import kstwo

from ..conventions import SECONDS_PER_DAY, inertial_frequency_cpd, parse_timedelta_seconds
from ..models import FitContext, ModelFamily, get_family
from ..models.observation import default_max_freq, observed
from ..spectral.likelihood import (
    ESTIMATORS,
    PreparedWindow,
    exact_negloglik,
    expected_in_band,
    expected_periodogram,
    negloglik_whittle_form,
    prepare_window,
    whittle_expectation,
)

STATUSES = ("ok", "at_bound", "no_convergence", "too_few_samples", "failed")
#: windows with fewer valid samples than this are not fitted
MIN_VALID_SAMPLES = 64
#: above this many valid samples the exact likelihood warns (its cost grows as N^3)
EXACT_WARN_SAMPLES = 3000
#: how debiased-Whittle standard errors are computed (see :func:`fit_series`)
STDERR_METHODS = ("auto", "fisher", "sandwich")


@dataclass
class FitResult:
    """The outcome of one fit. A failed fit still returns a result with ``status`` and ``message``.

    Attributes
    ----------
    model, estimator : str
    params, stderr : dict
        Parameter values and standard errors in natural units (see ``units``); NaN when not fitted.
    units : dict
    loglik : float
        Maximised log-likelihood (Whittle form for the Whittle estimators).
    aic : float
    gof_pvalue : float
        Goodness-of-fit p-value over the fitted band.
    status, message : str
    diffusivity, diffusivity_se : float
        Single-particle diffusivity per component, m^2/s, and its standard error.
    derived : dict
        Time scales (days) and other derived quantities.
    n_samples, n_valid, n_freq : int
        Window length, valid samples, frequencies in the fitted band.
    n_evaluations : int
    stderr_method : str
        How the standard errors were computed: ``fisher`` (inflated inverse Fisher information),
        ``sandwich`` (simulated score covariance), ``observed`` (exact likelihood's Hessian), or ``""``.
    """

    model: str
    estimator: str
    params: dict
    stderr: dict
    units: dict
    loglik: float = np.nan
    aic: float = np.nan
    gof_pvalue: float = np.nan
    status: str = "failed"
    message: str = ""
    diffusivity: float = np.nan
    diffusivity_se: float = np.nan
    derived: dict = field(default_factory=dict)
    n_samples: int = 0
    n_valid: int = 0
    n_freq: int = 0
    n_evaluations: int = 0
    stderr_method: str = ""
    covariance: np.ndarray | None = field(default=None, repr=False)
    family: ModelFamily | None = field(default=None, repr=False)
    context: FitContext | None = field(default=None, repr=False)
    prepared: PreparedWindow | None = field(default=None, repr=False)

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    @property
    def theta(self) -> np.ndarray:
        return np.array([self.params[n] for n in self.family.names], float)

    def expected_spectrum(self, freq_cpd=None):
        """The fitted model's expected periodogram on the window's frequencies (sorted), for plotting.

        Returns ``(freq_cpd, expected, in_band)``. With ``freq_cpd`` given, returns the continuous
        spectral density there instead (``in_band`` then marks ``|f| <= max_freq``).
        """
        if self.family is None or not np.all(np.isfinite(self.theta)):
            raise ValueError(f"no fitted model ({self.status}: {self.message})")
        if freq_cpd is not None:
            f = np.asarray(freq_cpd, float)
            s = np.real(self.family.spectral_density(self.theta, f, self.context))
            top = np.abs(self.prepared.freq_cpd[self.prepared.band]).max()
            return f, s, np.abs(f) <= top
        p = self.prepared
        e = expected_periodogram(self.family, self.theta, p, self.context)
        o = np.argsort(p.freq_cpd, kind="stable")
        return p.freq_cpd[o], e[o], p.band[o]

    def noise_floor(self, freq_cpd):
        """Spectral density of the fitted position noise at ``freq_cpd`` (zeros without a noise model)."""
        f = np.asarray(freq_cpd, float)
        fn = getattr(self.family, "noise_spectral_density", None)
        return np.zeros_like(f) if fn is None else np.real(fn(self.theta, f, self.context))

    def to_row(self) -> dict:
        """A flat dict: the columns of a fits table for this window."""
        row = {
            "model": self.model, "estimator": self.estimator, "status": self.status,
            "message": self.message, "loglik": self.loglik, "aic": self.aic,
            "gof_pvalue": self.gof_pvalue, "n_valid": self.n_valid, "n_freq": self.n_freq,
            "stderr_method": self.stderr_method,
        }
        for k, v in self.params.items():
            row[k] = v
            row[k + "_se"] = self.stderr.get(k, np.nan)
        row["diffusivity"] = self.diffusivity
        row["diffusivity_se"] = self.diffusivity_se
        row.update(self.derived)
        return row


def ks_exponential_pvalue(ratios) -> float:
    """Kolmogorov-Smirnov p-value of ``ratios`` against the standard exponential distribution.

    The same test as ``scipy.stats.kstest(ratios, "expon")`` (checked in the tests), without its
    per-call overhead: statistic from the sorted sample, p-value from ``scipy.stats.kstwo``.
    """
    r = np.sort(np.asarray(ratios, float))
    n = r.size
    if n == 0:
        return np.nan
    cdf = -np.expm1(-r)
    i = np.arange(1, n + 1)
    d = max(float(np.max(i / n - cdf)), float(np.max(cdf - (i - 1) / n)))
    return float(kstwo.sf(d, n))


def _to_x(theta, family):
    return np.array([np.log(t) if p.scale == "log" else t for t, p in zip(theta, family.parameters)])


def _from_x(x, family):
    return np.array([np.exp(v) if p.scale == "log" else v for v, p in zip(x, family.parameters)])


def _nat_jacobian(theta, family):
    """d theta / d x (diagonal)."""
    return np.array([t if p.scale == "log" else 1.0 for t, p in zip(theta, family.parameters)])


def _numerical_hessian(fun, x, step=1e-4):
    p = x.size
    hess = np.empty((p, p))
    f0 = fun(x)
    for i in range(p):
        for j in range(i, p):
            ei = np.zeros(p)
            ej = np.zeros(p)
            ei[i] = step
            ej[j] = step
            if i == j:
                hess[i, i] = (fun(x + ei) - 2 * f0 + fun(x - ei)) / step**2
            else:
                hess[i, j] = hess[j, i] = (fun(x + ei + ej) - fun(x + ei - ej) - fun(x - ei + ej)
                                           + fun(x - ei - ej)) / (4 * step**2)
    return hess


def _simulator(family, theta, prep, context, max_factor: int = 64):
    """A function ``rng, size -> (size, n)`` series of the fitted (observed) process by circulant embedding,
    modulated components multiplied by the window's modulation, with the window's missing samples NaN.

    ``max_factor`` bounds the embedding (at most ``2 n max_factor`` points; negative eigenvalues left are
    set to zero): slowly decaying models otherwise need embeddings many times the window.
    """
    from ..simulation.simulate import embedding_autocovariance

    theta = np.asarray(theta, float)
    # independent stationary components add up to one stationary process: one embedding for all of them
    parts = family.components()
    steady = [(c, sl) for c, sl in parts if not c.modulated]
    groups = [(False, lambda lag: sum(c.autocovariance(theta[sl], lag, context) for c, sl in steady))] if steady \
        else []
    groups += [(True, lambda lag, c=c, sl=sl: c.autocovariance(theta[sl], lag, context))
               for c, sl in parts if c.modulated]
    comps = []
    for modulated, fn in groups:
        acov = np.asarray(embedding_autocovariance(fn, prep.n, prep.dt_days, max_factor), complex)
        half = acov.size - 1
        row = np.concatenate([acov, np.conj(acov[1:half][::-1])])
        lam = np.clip(scipy.fft.fft(row).real, 0, None)  # the circulant embedding's eigenvalues
        comps.append((modulated, np.sqrt(lam * row.size)))

    def draw(rng, size):
        z = np.zeros((size, prep.n), complex)
        for modulated, amp in comps:
            # z_j = sum_k sqrt(lam_k / m) eps_k exp(+2 pi i j k / m), eps standard complex normal
            # (single-precision normals: twice as fast to draw, ample for a variance)
            eps = rng.standard_normal((size, 2 * amp.size), dtype=np.float32).view(np.complex64)
            x = scipy.fft.ifft(eps * (amp / np.sqrt(2.0)), axis=-1, overwrite_x=True)[:, :prep.n]
            z += x * prep.modulation if modulated else x
        if prep.real_valued:
            z = np.sqrt(2.0) * z.real  # the real part of a proper complex series carries half its variance
        return np.where(prep.valid, z, np.nan)

    return draw


def score_covariance(family, theta, prep, context, free=None, n_sim: int = 64, seed=None) -> np.ndarray:
    """Covariance of the debiased-Whittle score at ``theta`` (optimiser coordinates, free parameters) over
    periodograms of series simulated from the model with the window's mask, taper and demeaning.

    With independent ordinates it equals the Fisher information; gaps and tapers correlate them (by an
    amount that depends on the spectrum's shape, which the ``N sum h^4`` factor ignores), and then the
    sandwich ``F^-1 V F^-1`` is the variance of the estimator (the debiased Whittle paper, section 4).
    ``seed`` defaults to one drawn from the window's periodogram, so a window always gets the same value.
    """
    free = np.ones(len(theta), bool) if free is None else np.asarray(free, bool)
    e_band, de = expected_in_band(family, theta, prep, context)
    dlog = de[free] / e_band
    if seed is None:
        seed = zlib.crc32(prep.periodogram.tobytes())
    rng = np.random.default_rng(seed)
    # an embedding of at most 4 N: a variance needs no exact long-lag covariance, and this bounds the cost
    z = _simulator(family, theta, prep, context, max_factor=2)(rng, n_sim)
    valid = prep.valid
    z = np.where(valid, z, 0.0)
    zz = np.where(valid, z - z.sum(axis=1, keepdims=True) / max(prep.n_valid, 1), 0.0)
    pg = prep.dt_days * np.abs(scipy.fft.fft(prep.taper * zz, axis=-1)[:, prep.band_index]) ** 2
    scores = (1.0 - pg / e_band) @ dlog.T  # (n_sim, free)
    return np.atleast_2d(np.cov(scores, rowvar=False))


def bootstrap_stderr(result: FitResult, n_boot: int = 100, seed=0) -> dict:
    """Parametric-bootstrap standard errors: simulate from the fitted model by circulant embedding (the
    observed process, with the window's mask), refit each replicate, and take the standard deviation.

    Returns a dict keyed by parameter name (and ``diffusivity``); NaN when too few replicates fit.
    """
    if result.family is None or not np.all(np.isfinite(result.theta)):
        return {k: np.nan for k in [*result.params, "diffusivity"]}
    prep, ctx, fam = result.prepared, result.context, result.family
    rng = np.random.default_rng(seed)
    draw = _simulator(fam, result.theta, prep, ctx)
    top = float(np.abs(prep.freq_cpd[prep.band]).max())
    fixed = {k: v for k, v in result.params.items() if result.stderr.get(k) == 0.0}
    est = []
    for _ in range(n_boot):
        z = draw(rng, 1)[0]
        r = _optimise(fam, result.model, "debiased", prepare_window(
            z, prep.dt_days, max_freq=top, modulated=fam.modulated, latitude_series=ctx.latitude_series),
            ctx, fixed, np.array([k not in fixed for k in fam.names]), None)
        if r.status == "ok":
            est.append([*r.theta, r.diffusivity])
    est = np.array(est)
    names = [*fam.names, "diffusivity"]
    if len(est) < max(10, n_boot // 4):
        return {k: np.nan for k in names}
    return dict(zip(names, map(float, est.std(axis=0, ddof=1))))


def _fisher_scoring(family, prep, context, full, x0, lo, hi, free, counter, max_iter=60):
    """Levenberg-Marquardt-damped Fisher scoring for the debiased Whittle objective.

    The expected Hessian of the Whittle form is the Fisher information ``sum (dlogE)(dlogE)^T``, which
    comes free with the gradient; from the heuristic start this converges in a handful of evaluations.
    Returns ``None`` when the start is not usable (the caller then falls back to L-BFGS-B).
    """
    i_band = prep.periodogram[prep.band_index]
    all_free = bool(np.all(free))

    def evaluate(xf):
        counter[0] += 1
        eb, de = expected_in_band(family, _from_x(full(xf), family), prep, context)
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
    mu, nu = 1e-3, 2.0
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
        while mu < 1e8:
            step = np.zeros_like(x)
            try:
                step[act] = -np.linalg.solve(f_act + mu * np.diag(np.diag(f_act)), g_act)
            except np.linalg.LinAlgError:
                mu *= 10
                continue
            longest = float(np.max(np.abs(step) / cap))
            if longest > 1.0:
                step /= longest
            x_new = np.clip(x + step, lo, hi)
            val_new, grad_new, fisher_new = evaluate(x_new)
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
    return scipy.optimize.OptimizeResult(x=x, fun=val, success=success, message=message, fisher=fisher,
                                         expected_band=last.get(np.asarray(x).tobytes()))


def _empty(model, estimator, family, status, message, n=0, n_valid=0):
    nan = {name: np.nan for name in family.names}
    return FitResult(model, estimator, dict(nan), dict(nan), family.units, status=status, message=message,
                     n_samples=n, n_valid=n_valid, family=family)


def fit_series(z, dt, *, model="matern+inertial", estimator="debiased", max_freq=None, latitude=None,
               mask=None, taper=None, exclude=None, fixed=None, inertial_frequency="free",
               observation="none", velocity_operator="central", position_noise=None,
               start=None, stderr="auto") -> FitResult:
    """Fit a parametric model to the rotary spectrum of one window of complex velocity.

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
        Fit only ``0 < |f| <= max_freq`` (cpd). Default: up to the Nyquist frequency.
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
        How ``z`` was observed (see :mod:`driftspec.analysis.observation`): ``"none"`` for measured
        velocities (default here); for velocities differenced from positions, ``"differenced"`` (the model
        averaged by the difference operator) or ``"differenced+noise"`` (plus white position noise, the
        parameter ``position_noise`` in m).
    velocity_operator : {"central", "forward"}
        The difference operator that made ``z`` from positions.
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
    if estimator not in ESTIMATORS:
        raise ValueError(f"estimator must be one of {ESTIMATORS}, got {estimator!r}")
    if stderr not in STDERR_METHODS:
        raise ValueError(f"stderr must be one of {STDERR_METHODS}, got {stderr!r}")
    family = observed(get_family(model, inertial_frequency), observation, velocity_operator)
    model_name = model if isinstance(model, str) else family.name
    dt_days = parse_timedelta_seconds(dt) / SECONDS_PER_DAY
    if max_freq is None and observation != "none":
        max_freq = default_max_freq(dt_days, velocity_operator, observation)
    if position_noise is not None:
        if observation != "differenced+noise":
            raise ValueError("position_noise needs observation='differenced+noise'")
        fixed = {**(fixed or {}), "position_noise": float(position_noise)}
    z = np.asarray(z)
    n = z.size
    lat_series = None
    lat_mean = None
    if latitude is not None:
        lat_arr = np.asarray(latitude, float)
        if lat_arr.ndim == 0:
            lat_mean = float(lat_arr)
            lat_series = np.full(n, lat_mean)
        else:
            if lat_arr.shape != (n,):
                raise ValueError("latitude must be a scalar or have one value per sample")
            lat_series = lat_arr
            lat_mean = float(np.nanmean(lat_arr))
    fc = inertial_frequency_cpd(lat_mean) if lat_mean is not None else None
    context = FitContext(dt_days=dt_days, latitude=lat_mean, inertial_frequency_cpd=fc,
                         latitude_series=lat_series)
    valid = np.isfinite(z) if mask is None else np.isfinite(z) & np.asarray(mask, bool)
    n_valid = int(valid.sum())
    if n_valid < MIN_VALID_SAMPLES:
        return _empty(model_name, estimator, family, "too_few_samples",
                      f"{n_valid} valid samples (need {MIN_VALID_SAMPLES})", n, n_valid)
    if family.modulated and lat_series is None:
        return _empty(model_name, estimator, family, "failed",
                      "latitude-following inertial model needs latitude", n, n_valid)
    try:
        prep = prepare_window(z, dt_days, mask=mask, taper=taper, max_freq=max_freq, exclude=exclude,
                              modulated=family.modulated, latitude_series=lat_series)
    except ValueError as exc:
        return _empty(model_name, estimator, family, "failed", str(exc), n, n_valid)
    fixed = dict(fixed or {})
    unknown = set(fixed) - set(family.names)
    if unknown:
        raise ValueError(f"fixed names {sorted(unknown)} are not parameters of {family.name}")
    free = np.array([name not in fixed for name in family.names])
    n_free = int(free.sum())
    if prep.band.sum() < max(2 * n_free + 2, 8):
        return _empty(model_name, estimator, family, "too_few_samples",
                      f"{int(prep.band.sum())} frequencies in the fitted band", n, n_valid)
    if estimator == "exact" and n_valid > EXACT_WARN_SAMPLES:
        warnings.warn(f"exact likelihood with {n_valid} samples is slow (cost grows as N^3)", stacklevel=2)
    try:
        return _optimise(family, model_name, estimator, prep, context, fixed, free, start, stderr)
    except (ValueError, FloatingPointError, np.linalg.LinAlgError) as exc:
        return _empty(model_name, estimator, family, "failed", f"{type(exc).__name__}: {exc}", n, n_valid)


def _optimise(family, model_name, estimator, prep, context, fixed, free, start, stderr="fisher"):
    names = family.names
    bounds_nat = family.bounds(context)
    f_band = prep.freq_cpd[prep.band]
    theta0 = family.initial_guess(f_band, prep.periodogram[prep.band], context)
    if estimator == "exact" and not start:
        # the debiased Whittle estimate is near-exact and cheap: start the exact likelihood from it
        pilot = _optimise(family, model_name, "debiased", prep, context, fixed, free, None)
        if np.all(np.isfinite(pilot.theta)):
            theta0 = pilot.theta
    for k, v in (start or {}).items():
        theta0[names.index(k)] = v
    for k, v in fixed.items():
        theta0[names.index(k)] = v
    lo_nat = np.array([b[0] for b in bounds_nat])
    hi_nat = np.array([b[1] for b in bounds_nat])
    theta0 = np.clip(theta0, lo_nat * (1 + 1e-9), hi_nat * (1 - 1e-9))
    theta0 = np.where(~np.isfinite(theta0), 0.5 * (lo_nat + hi_nat), theta0)
    x_lo, x_hi = _to_x(lo_nat, family), _to_x(hi_nat, family)
    x0 = _to_x(theta0, family)
    x_fixed = x0.copy()
    counter = [0]

    def full(xf):
        x = x_fixed.copy()
        x[free] = xf
        return x

    if estimator == "debiased":
        def objective(xf):
            counter[0] += 1
            theta = _from_x(full(xf), family)
            e, de = expected_periodogram(family, theta, prep, context, jacobian=True)
            if np.any(e[prep.band] <= 0) or not np.all(np.isfinite(e[prep.band])):
                return 1e300, np.zeros(free.sum())
            val, g = negloglik_whittle_form(e, prep, de)
            return val, g[free]
        jac = True
    elif estimator == "whittle":
        def objective(xf):
            counter[0] += 1
            e = whittle_expectation(family, _from_x(full(xf), family), prep, context)
            return negloglik_whittle_form(e, prep)
        jac = False
    else:
        def objective(xf):
            counter[0] += 1
            val = exact_negloglik(family, _from_x(full(xf), family), prep, context)
            return val if np.isfinite(val) else 1e300
        jac = False

    res = None
    if estimator == "debiased":
        res = _fisher_scoring(family, prep, context, full, x0[free], x_lo[free], x_hi[free], free, counter)
    if estimator == "exact":
        # from the (near-exact) debiased start; the objective is scaled to O(1) per sample so that
        # L-BFGS-B's first trial step stays local, with a derivative-free fallback
        scale = 1.0 / max(prep.n_valid, 1)
        with np.errstate(all="ignore"):
            res = scipy.optimize.minimize(lambda xf: scale * objective(xf), x0[free], method="L-BFGS-B",
                                          bounds=list(zip(x_lo[free], x_hi[free])),
                                          options={"maxiter": 200, "ftol": 1e-13, "gtol": 1e-7, "eps": 1e-7})
            res.fun = res.fun / scale
            if not res.success or res.nit <= 1:
                res = scipy.optimize.minimize(objective, res.x, method="Powell",
                                              bounds=list(zip(x_lo[free], x_hi[free])),
                                              options={"xtol": 1e-6, "ftol": 1e-12, "maxfev": 3000})
    if res is None or not res.success:
        with np.errstate(all="ignore"):
            res = scipy.optimize.minimize(objective, x0[free] if res is None else res.x, jac=jac,
                                          method="L-BFGS-B", bounds=list(zip(x_lo[free], x_hi[free])),
                                          options={"maxiter": 500, "ftol": 1e-10, "gtol": 1e-6})
    x_hat = full(res.x)
    theta = _from_x(x_hat, family)
    value = float(res.fun if np.ndim(res.fun) == 0 else res.fun[0])
    n_free = int(free.sum())

    # covariance in x coordinates for the free parameters
    cov_x = np.full((n_free, n_free), np.nan)
    stderr_method = "observed" if estimator == "exact" else "fisher"
    with np.errstate(all="ignore"):
        try:
            if estimator == "exact":
                hess = _numerical_hessian(lambda xf: exact_negloglik(
                    family, _from_x(full(xf), family), prep, context), res.x)
                cov_x = np.linalg.inv(hess)
            else:
                if estimator == "debiased" and getattr(res, "fisher", None) is not None:
                    e, de = None, None
                    fisher = res.fisher  # at the optimum, from the last scoring step
                elif estimator == "debiased":
                    e, de = expected_periodogram(family, theta, prep, context, jacobian=True)
                    de = de[free]
                else:
                    e = whittle_expectation(family, theta, prep, context)
                    de = np.empty((n_free, e.size))
                    for j, k in enumerate(np.flatnonzero(free)):
                        xp, xm = x_hat.copy(), x_hat.copy()
                        xp[k] += 1e-6
                        xm[k] -= 1e-6
                        de[j] = (whittle_expectation(family, _from_x(xp, family), prep, context)
                                 - whittle_expectation(family, _from_x(xm, family), prep, context)) / 2e-6
                if de is not None:
                    b = prep.band
                    dlog = de[:, b] / e[b]
                    fisher = dlog @ dlog.T
                gappy = bool(np.ptp(prep.taper) > 0)  # missing samples or a taper
                if estimator == "debiased" and (stderr == "sandwich" or (stderr == "auto" and gappy)):
                    f_inv = np.linalg.inv(fisher)
                    cov_x = f_inv @ score_covariance(family, theta, prep, context, free) @ f_inv
                    stderr_method = "sandwich"
                else:
                    cov_x = np.linalg.inv(fisher) * prep.variance_inflation
        except np.linalg.LinAlgError:
            pass
    jac_nat = _nat_jacobian(theta, family)[free]
    cov_nat_free = cov_x * np.outer(jac_nat, jac_nat)
    se = np.full(len(names), np.nan)
    se[free] = np.sqrt(np.clip(np.diag(cov_nat_free), 0, None)) if np.all(np.isfinite(cov_nat_free)) else np.nan
    se[~free] = 0.0

    # derived quantities
    def kappa(th):
        return family.zero_frequency_density(th, context) * SECONDS_PER_DAY / 4.0

    kap = kappa(theta)
    grad = np.zeros(n_free)
    for j, k in enumerate(np.flatnonzero(free)):
        xp, xm = x_hat.copy(), x_hat.copy()
        xp[k] += 1e-6
        xm[k] -= 1e-6
        grad[j] = (kappa(_from_x(xp, family)) - kappa(_from_x(xm, family))) / 2e-6
    kap_se = float(np.sqrt(max(grad @ cov_x @ grad, 0))) if np.all(np.isfinite(cov_x)) else np.nan

    # goodness of fit over the band
    e_band = getattr(res, "expected_band", None) if estimator == "debiased" else None
    if e_band is None:
        if estimator == "whittle":
            e_fit = whittle_expectation(family, theta, prep, context)
        else:
            e_fit = expected_periodogram(family, theta, prep, context)
        e_band = e_fit[prep.band_index]
    ratios = prep.periodogram[prep.band_index] / np.maximum(e_band, 1e-300)
    gof = ks_exponential_pvalue(ratios)

    # status
    span = x_hi - x_lo
    near = free & ((x_hat - x_lo < 1e-5 * span) | (x_hi - x_hat < 1e-5 * span))
    notes = []
    below = np.zeros(len(names), bool)
    if "position_noise" in names:
        k = names.index("position_noise")
        if near[k] and x_hat[k] - x_lo[k] < 1e-5 * span[k]:
            near[k] = False  # noise below what the band can detect: a finding, not a failed fit
            notes.append("position noise below detection")
            se[k] = np.nan  # a curvature at the bound is no standard error
            below[k] = True
    if not res.success and not np.isfinite(value):
        status, message = "failed", str(res.message)
    elif not res.success:
        status, message = "no_convergence", str(res.message)
    elif near.any():
        status = "at_bound"
        message = "at bound: " + ", ".join(n for n, b in zip(names, near) if b)
    elif not np.all(np.isfinite(se[free & ~below])):
        status, message = "ok", "standard errors unavailable (singular information)"
    else:
        status, message = "ok", ""
    if notes:
        message = "; ".join([m for m in [message] if m] + notes)
    loglik = -value
    return FitResult(
        model=model_name, estimator=estimator,
        params=dict(zip(names, map(float, theta))), stderr=dict(zip(names, map(float, se))),
        units=family.units, loglik=loglik, aic=2 * n_free - 2 * loglik, gof_pvalue=gof,
        status=status, message=message, diffusivity=float(kap), diffusivity_se=kap_se,
        derived=family.derived(theta, context), n_samples=prep.n, n_valid=prep.n_valid,
        n_freq=int(prep.band.sum()), n_evaluations=counter[0], stderr_method=stderr_method,
        covariance=cov_nat_free,
        family=family, context=context, prepared=prep,
    )
