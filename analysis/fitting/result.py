"""The outcome of one fit (:class:`FitResult`) and the goodness-of-fit test.

Goodness of fit: over the fitted band the ratios ``I_k / E[I_k]`` are approximately independent standard
exponential variables when the model is right; the p-value is the Kolmogorov-Smirnov test of that (the same as
``scipy.stats.kstest(ratios, "expon")``). Ordinates correlated by tapering or gaps make it approximate.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.stats import kstwo

from ..models import FitContext, ModelFamily
from ..spectral.likelihood import PreparedWindow, expected_periodogram, prepare_window
from .uncertainty import score_covariance, simulator

STATUSES = ("ok", "at_bound", "no_convergence", "too_few_samples", "failed")


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
    max_freq : float
        Top of the fitted band, cpd.
    window_start : pandas.Timestamp or None
        First sample of the window, when the fit came from a :class:`~driftspec.analysis.tracks.windows.Window`.
    fixed : dict
        Parameters held fixed (their standard errors are zero).
    selected, selection : bool, str
        Whether this candidate was chosen for its window, and why (:mod:`~driftspec.analysis.fitting.selection`).
    observation : str
        The observation model the window was fitted with (``none``, ``differenced``, ``differenced+noise`` or
        ``irregular``).
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
    max_freq: float = np.nan
    window_start: object = None
    selected: bool = True
    selection: str = ""
    observation: str = ""
    isotropy_pvalue: float = np.nan  # with an anisotropic candidate: its isotropy test's p-value
    fixed: dict = field(default_factory=dict)
    covariance: np.ndarray | None = field(default=None, repr=False)
    pending: tuple | None = field(default=None, repr=False)  # what completing a deferred fit needs
    covariance_deferred: bool = field(default=False, repr=False)  # Fisher errors standing in until completed
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
        """The fitted model's expected periodogram on the window's frequencies (sorted), for plotting (for a window
        of irregular fixes over the fitted band only, NaN elsewhere).

        Returns ``(freq_cpd, expected, in_band)``. With ``freq_cpd`` given, returns the continuous
        spectral density there instead (``in_band`` then marks ``|f| <= max_freq``).
        """
        self._require_fit()
        if freq_cpd is not None:
            f = np.asarray(freq_cpd, float)
            s = np.real(self.family.spectral_density(self.theta, f, self.context))
            top = np.abs(self.prepared.freq_cpd[self.prepared.band]).max()
            return f, s, np.abs(f) <= top
        p = self.prepared
        if hasattr(self.family, "expected_in_band"):  # seen through irregular fixes: its operator covers the band
            e = np.full(p.n, np.nan)
            e[p.band_index] = self.family.expected_in_band(self.theta, p, self.context, jacobian=False)
        else:
            e = expected_periodogram(self.family, self.theta, p, self.context)
        o = np.argsort(p.freq_cpd, kind="stable")
        return p.freq_cpd[o], e[o], p.band[o]

    def noise_floor(self, freq_cpd):
        """The fitted position noise at ``freq_cpd``, (m/s)^2/cpd, zeros without a noise model: its spectral density
        through the difference operator for a regular window; for a window of irregular fixes its expected
        periodogram through the interpolation between them, at the window's nearest Fourier frequency (NaN above
        the Nyquist frequency)."""
        f = np.asarray(freq_cpd, float)
        fn = getattr(self.family, "noise_spectral_density", None)
        return np.zeros_like(f) if fn is None else np.real(fn(self.theta, f, self.context))

    def to_row(self) -> dict:
        """A flat dict: the columns of a fits table for this window."""
        row = {
            "model": self.model, "estimator": self.estimator, "status": self.status,
            "message": self.message, "loglik": self.loglik, "aic": self.aic,
            "gof_pvalue": self.gof_pvalue, "n_valid": self.n_valid, "n_freq": self.n_freq,
            "max_freq": self.max_freq, "stderr_method": self.stderr_method, "selected": self.selected,
            "selection": self.selection, "observation": self.observation,
        }
        for k, v in self.params.items():
            row[k] = v
            row[k + "_se"] = self.stderr.get(k, np.nan)
        row["diffusivity"] = self.diffusivity
        row["diffusivity_se"] = self.diffusivity_se
        row.update(self.derived)
        return row

    def sandwich_covariance(self, n_sim: int = 64, seed=None) -> np.ndarray:
        """The debiased-Whittle sandwich ``F^-1 V F^-1`` at the fitted values (natural units, free parameters),
        with ``V`` the score covariance over ``n_sim`` periodograms simulated with the window's mask and taper
        (:func:`~driftspec.analysis.fitting.uncertainty.score_covariance`)."""
        from .estimators import DebiasedEstimator, Problem, natural_jacobian

        self._require_fit()
        problem = Problem.build(self.family, self.prepared, self.context, self.theta, self.fixed)
        fisher = DebiasedEstimator().fisher(problem, problem.x0)
        f_inv = np.linalg.inv(fisher)
        v = score_covariance(self.family, self.theta, self.prepared, self.context, problem.free, n_sim, seed)
        jac = natural_jacobian(self.theta, self.family)[problem.free]
        return (f_inv @ v @ f_inv) * np.outer(jac, jac)

    def bootstrap_stderr(self, n_boot: int = 100, seed=0) -> dict:
        """Parametric-bootstrap standard errors: simulate the fitted (observed) process with the window's mask by
        circulant embedding, refit each replicate by debiased Whittle over the same band, and take the standard
        deviation. A dict keyed by parameter name and ``diffusivity``; NaN when fewer than a quarter of the
        replicates (and fewer than 10) fit."""
        from .core import fit_prepared
        from .estimators import DebiasedEstimator

        names = [*self.family.names, "diffusivity"] if self.family is not None else [*self.params, "diffusivity"]
        if self.family is None or not np.all(np.isfinite(self.theta)):
            return {k: np.nan for k in names}
        prep, ctx, fam = self.prepared, self.context, self.family
        rng = np.random.default_rng(seed)
        draw = simulator(fam, self.theta, prep, ctx)
        est = []
        for _ in range(n_boot):
            z = draw(rng, 1)[0]
            p = prepare_window(z, prep.dt_days, max_freq=self.max_freq, modulated=fam.modulated,
                               latitude_series=ctx.latitude_series)
            r = fit_prepared(fam, p, ctx, DebiasedEstimator(), fixed=self.fixed, model_name=self.model)
            if r.status == "ok":
                est.append([*r.theta, r.diffusivity])
        est = np.array(est)
        if len(est) < max(10, n_boot // 4):
            return {k: np.nan for k in names}
        return dict(zip(names, map(float, est.std(axis=0, ddof=1))))

    def _require_fit(self):
        if self.family is None or self.prepared is None or not np.all(np.isfinite(self.theta)):
            raise ValueError(f"no fitted model ({self.status}: {self.message})")


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
