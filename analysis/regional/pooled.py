"""Pooled (composite-likelihood) fits: one model fitted to every window of a region at once.

The likelihood
--------------
The debiased Whittle negative log-likelihood of a window is ``L_w = sum_k log E_wk + I_wk / E_wk`` over its fitted
band (:mod:`driftspec.analysis.spectral.likelihood`). A region's windows are fitted together by minimising the
composite likelihood ``L = sum_w L_w``: every window keeps its own periodogram, band, observation model and
latitude, resolved from the :class:`~driftspec.analysis.fitting.spec.FitSpec` exactly as
:func:`~driftspec.analysis.fitting.core.fit_window` resolves them (a window of irregular fixes is seen through the
interpolation of its own fixes, :class:`~driftspec.analysis.spectral.irregular.IrregularlyObserved`, and its noise
level is the factor ``position_error_scale`` on its given fix errors where it has them). Its parameters are

* **shared** (one value for the region): the shape of the spectrum -- Matérn slope ``matern_alpha`` and damping
  ``matern_damping``, inertial damping ``inertial_damping`` and the inertial frequency *through its latitude
  dependence*: the shared parameter is ``inertial_frequency_offset = f0 - f_local`` (cpd, signed like every
  frequency, positive = counterclockwise) and window ``w`` oscillates at ``f_local(lat_w) + offset``. With the
  latitude-following family (``inertial_frequency="follow-latitude"``) the frequency is not a parameter at all;
* **nuisance** (one value per window, by default): the amplitudes -- ``matern_variance``, ``inertial_variance``
  and ``position_noise`` (or ``position_error_scale``; a slot that is one in some windows and the other in others
  is per window even with ``share="all"``). ``share="all"`` shares those too. A parameter held fixed in some
  windows only (the position noise with ``position_noise="input"``) is always per window.

The optimiser
-------------
Levenberg-Marquardt-damped Fisher scoring, as for one window (:mod:`driftspec.analysis.fitting.estimators`), on
all parameters at once. Each window's gradient and Fisher information ``F_w = sum_k (dlog E_wk)(dlog E_wk)^T``
come from one :func:`~driftspec.analysis.spectral.likelihood.expected_in_band` call; a window's information
touches only the shared parameters and its own nuisance parameters, so the pooled information is
*block-arrowhead*::

    [ sum_w A_w   B_1  B_2 ... ]         A_w: shared x shared, B_w: shared x nuisance of w,
    [ B_1^T       C_1          ]         C_w: nuisance x nuisance of w
    [ B_2^T            C_2     ]
    [ ...                  ... ]

and each (damped) step is solved through the Schur complement ``S = sum_w (A_w - B_w C_w^-1 B_w^T)`` with one
batched small solve per window: ``O(n_windows)`` work, so one iteration costs one likelihood evaluation of every
window. ``S`` at the optimum is the information on the shared parameters with the nuisance parameters profiled
out.

Uncertainty
-----------
Windows from one drifter are dependent (they overlap in time, and a drifter samples one water mass), so the
inverse information ``S^-1`` is not the variance. The estimate solves the composite score equation, and its
variance is the sandwich ``S^-1 J S^-1`` with ``J`` the variance of the composite score (Godambe information;
C. Varin, N. Reid, D. Firth, "An overview of composite likelihood methods", Statistica Sinica 21, 5-42, 2011,
section 2.3 and section 5 on estimating ``J`` from independent clusters). ``J`` is estimated by summing the
windows' efficient scores ``u_w = g_w,shared - B_w C_w^-1 g_w,nuisance`` within each drifter (cluster) ``c``
and taking ``J = C/(C-1) sum_c U_c U_c^T`` (``C`` clusters; the factor is the usual small-sample correction).
That needs enough clusters: below :data:`MIN_CLUSTERS` drifters the model-based ``J`` below is used instead
(``stderr_method`` says which).

Model-based score covariance (few drifters, and the heterogeneity check): each drifter is simulated from the fit
over its whole span by circulant embedding (C. R. Dietrich, G. N. Newsam, SIAM J. Sci. Comput. 18, 1088-1107,
1997), each window taking its samples, mask, taper and amplitudes, so the covariance of the windows' efficient
scores includes their overlap, gaps and the leakage that correlates periodogram ordinates of steep spectra (which
makes the inverse Fisher information too small: "The debiased Whittle likelihood", section 4). A drifter's windows of
irregular fixes are simulated as the data were made: the velocity on a fine grid integrated to positions, read at
the fixes with their errors, interpolated and differenced by each window's own operator (:func:`_irregular_draws`).

Heterogeneity check
-------------------
Do the drifters share the shared parameters? Under the alternative each drifter ``c`` has its own shared values
``theta + delta_c``; the score test of ``delta = 0`` uses the drifters' efficient scores ``u_c`` at the pooled
estimate. To first order ``u = Q v`` with ``v`` the scores at the truth (independent between drifters, covariance
``J_c`` from the model-based formula above, overlaps included) and ``Q = I - D M (M^T D M)^-1 M^T`` the
projection that estimating ``theta`` applies (``D`` = block-diagonal of the drifters' information ``I_c``, ``M``
stacked identities). The statistic is ``T = sum_c u_c^T I_c^-1 u_c``, the score form of Cochran's homogeneity
statistic ``sum_c (theta_c - theta)^T I_c (theta_c - theta)`` (W. G. Cochran, "The combination of estimates from
different experiments", Biometrics 10(1), 101-129, 1954, doi:10.2307/3001666); were the likelihood correctly
specified (``J_c = I_c``) it would be Rao's score statistic ``u^T (Q J Q^T)^+ u`` (C. R. Rao, Proc. Cambridge
Philos. Soc. 44, 50-57, 1948, doi:10.1017/S0305004100023987), chi-squared with ``(C - 1) p`` degrees of freedom.
The Whittle likelihood is not (leakage, overlaps), so ``T`` is referred to the scaled chi-squared ``a chi2_nu``
with its null mean and variance (F. E. Satterthwaite, "An approximate distribution of estimates of variance
components", Biometrics Bulletin 2(6), 110-114, 1946, doi:10.2307/3002019): ``T = v^T B v`` with ``B = Q^T
D^-1 Q``, so ``E T = sum_c tr(B_cc J_c)`` and ``Var T = sum_c Var(v_c^T B_cc v_c) + 2 sum_{c != d} tr(B_cd J_d
B_dc J_c)``. ``J_c`` and the within-drifter variances (which carry the heavy tail of scores from the few
ordinates near the inertial peak) come from drifters simulated from the fit (each over its whole span, so that
overlapping windows share samples). In each simulated window the amplitudes are re-estimated, as the fit estimated
the data's (a few scoring steps on the window's amplitudes with the shape held; :func:`_reprofiled_scores`): the
first-order efficient score overstates how much the data's scores at the estimate vary (on the benchmark's
drifters, the variance of ``T`` by about half), which made the test conservative. As the simulations enter only
through sums over drifters, the Monte Carlo error averages out: :func:`n_simulations` gives about
:data:`N_SIM_WINDOWS` simulated windows and :data:`N_SIM_DRIFTERS` simulated drifters in all (between
:data:`N_SIM_MIN` and :data:`N_SIM` per drifter) instead of a fixed number of bootstrap replicates of ``T``. With
a single drifter the windows are the groups (one block). ``T / a``, the effective degrees of freedom ``nu`` and
the p-value are reported beside the estimate.

Anisotropy
----------
The pooled likelihood is that of the isotropic (rotary) model. With ``spec.anisotropic`` (``driftspec pool
--anisotropic``) each bin's map row also carries the anisotropy summaries of ``driftspec map``
(:func:`~.maps.anisotropy_summary`: median anisotropy, axial mean of the anisotropy angle, share of windows whose
isotropy test rejects at 1 %, principal values and axis of the mean diffusivity tensor), computed from every
window's *own* fit under the same specification (:func:`~driftspec.analysis.fitting.batch.window_rows`: the
selected model and its anisotropic version), not from a pooled anisotropic likelihood; the variables' long names
say so. This costs about one single-window fit per window and its anisotropic fit on top of the pooled fit.

The debiased Whittle likelihood: "The debiased Whittle likelihood", Biometrika 106(2), 251-266 (2019),
doi:10.1093/biomet/asy071.
"""

from __future__ import annotations

import json
import os
import shutil
import zlib
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import scipy.fft
import scipy.stats
import xarray as xr

from ..conventions import SECONDS_PER_DAY
from ..fitting.core import MIN_VALID_SAMPLES, _irregularly_observed
from ..fitting.estimators import Problem
from ..fitting.spec import FitSpec
from ..models import FitContext
from ..spectral.irregular import ERROR_SCALE, IrregularlyObserved
from ..spectral.likelihood import expected_in_band, prepare_window
from .maps import add_anisotropy_variables, anisotropy_summary, cf_grid

#: amplitudes: per window by default (``share="shape"``)
NUISANCE = ("matern_variance", "inertial_variance", "position_noise")
SHARE_MODES = ("shape", "all")
OFFSET = "inertial_frequency_offset"
#: fewest drifters for the cluster-robust (empirical) score covariance; below, the model-based one
MIN_CLUSTERS = 10
#: drifters simulated from the fit for the model-based score covariance: at most N_SIM, at least N_SIM_MIN, and
#: enough for about N_SIM_WINDOWS simulated windows and N_SIM_DRIFTERS simulated drifters in all (the heterogeneity
#: test's null moments are sums over drifters, which average the Monte Carlo error)
N_SIM = 128
N_SIM_MIN = 12
N_SIM_WINDOWS = 1200
N_SIM_DRIFTERS = 400


def n_simulations(n_windows: int, n_tracks: int = 1) -> int:
    """Simulated drifters for a pooled fit of ``n_windows`` windows of ``n_tracks`` drifters."""
    need = max(-(-N_SIM_WINDOWS // max(int(n_windows), 1)), -(-N_SIM_DRIFTERS // max(int(n_tracks), 1)))
    return int(np.clip(need, N_SIM_MIN, N_SIM))


def _canonical(name: str) -> str:
    """The pool's name of a family parameter: a constant inertial frequency is shared as its offset from the local
    one, and a factor on given per-fix errors fills the position-noise slot of a window of irregular fixes (both
    set the level of the noise floor, and its ``E[I]`` goes as the parameter squared)."""
    if name in ("inertial_frequency", OFFSET):
        return OFFSET
    return "position_noise" if name == ERROR_SCALE.name else name


def _default_model(spec: FitSpec):
    """The candidate pooled when none is named: the first explicit one, or the richest automatic candidate."""
    models = spec.models
    if isinstance(models, str):  # "auto": a set of candidates, the last the richest
        return tuple(getattr(spec, "candidate_models", ("matern+inertial",)))[-1]
    return models[0]


def _family(spec: FitSpec, model, follow, observation, cache: dict):
    """``spec.family(model)`` seen through the window's observation model, with the inertial part following the
    latitude where the window's plan says so (for irregular fixes the ocean family, which the window's operator
    observes)."""
    if (follow, observation) not in cache:
        cache[follow, observation] = spec.family(model, follow, observation)
    return cache[follow, observation]


# ---------------------------------------------------------------------------------------------- preparation
@dataclass
class PooledWindow:
    """One window prepared for a pooled fit: its :class:`~driftspec.analysis.fitting.estimators.Problem` (prepared
    periodogram, band, observation model, latitude, fixed parameters, bounds, heuristic start) and its identity."""

    problem: Problem
    track_id: str
    start: pd.Timestamp | None
    lat: float
    lon: float
    #: times (days after the window's start) of the fixes a window of irregular fixes interpolates (those its
    #: operator uses); None for windows on a regular grid
    fix_times_days: np.ndarray | None = None


def prepare_pooled_window(window, spec: FitSpec, model=None, families: dict | None = None) -> PooledWindow | str:
    """Resolve ``spec`` for ``window`` exactly as :func:`~driftspec.analysis.fitting.core.fit_window` does and
    prepare its likelihood; returns a :class:`PooledWindow`, or a one-line reason why the window cannot be fitted.
    ``families`` caches the model families between windows."""
    model = _default_model(spec) if model is None else model
    fix_days = window.fix_interval_s / SECONDS_PER_DAY if window.fix_interval_s else None
    plan = spec.resolve(window.dt_seconds / SECONDS_PER_DAY, window.latitude, fix_days, window.position_error_m,
                        irregular=getattr(window, "irregular", False),
                        fix_times_days=getattr(window, "fix_times_days", None),
                        fix_error_m=getattr(window, "fix_error_m", None))
    family = _family(spec, model, getattr(plan, "follow_latitude", None), plan.observation,
                     {} if families is None else families)
    z = np.asarray(window.z)
    lat_series = plan.latitude_series
    if lat_series is None and family.modulated and plan.latitude is not None:
        lat_series = np.full(z.size, plan.latitude)
    context = FitContext(dt_days=plan.dt_days, latitude=plan.latitude,
                         inertial_frequency_cpd=plan.inertial_frequency_cpd, latitude_series=lat_series)
    n_valid = int(np.isfinite(z).sum())
    if n_valid < MIN_VALID_SAMPLES:
        return f"{n_valid} valid samples (need {MIN_VALID_SAMPLES})"
    if family.modulated and lat_series is None:
        return "latitude-following inertial model needs latitude"
    fixed = {k: v for k, v in spec.fixed if k in family.names}
    if plan.position_noise is not None and "position_noise" in family.names:
        fixed["position_noise"] = plan.position_noise
    try:
        prep = prepare_window(z, plan.dt_days, taper=spec.taper, max_freq=plan.max_freq, exclude=spec.exclude,
                              modulated=family.modulated, latitude_series=lat_series)
    except ValueError as exc:
        return str(exc)
    if plan.observation == "irregular":
        try:
            family = _irregularly_observed(family, prep, plan, context, spec.operator)
        except ValueError as exc:
            return f"irregular observation: {exc}"
        fixed = {k: v for k, v in fixed.items() if k in family.names}
    if prep.band.sum() < max(2 * (len(family.names) - len(fixed)) + 2, 8):
        return f"{int(prep.band.sum())} frequencies in the fitted band"
    theta0 = family.initial_guess(prep.freq_cpd[prep.band], prep.periodogram[prep.band], context)
    problem = Problem.build(family, prep, context, theta0, fixed)
    start = getattr(window, "start", None)
    fix_times = None
    if isinstance(family, IrregularlyObserved):
        fix_times = np.asarray(plan.fix_times_days, float)[family.operator.fix_index]
    return PooledWindow(problem, str(window.track_id), start, float(window.lat), float(window.lon), fix_times)


# ---------------------------------------------------------------------------------------------- result
@dataclass
class PooledResult:
    """A pooled fit of a region's windows.

    Attributes
    ----------
    model, share : str
    params, stderr : dict
        Shared parameters in natural units (``inertial_frequency_offset`` in cpd; see ``units``) and their
        standard errors (``stderr_method``: ``cluster`` sandwich or ``model``-based, see the module docstring).
    units : dict
    covariance : ndarray
        Covariance of the shared parameters (natural units, order of ``params``).
    information : ndarray
        Fisher information of the shared parameters with the nuisance parameters profiled out (the Schur complement
        ``S``), in optimiser coordinates (log of log-scaled parameters), for those not at a bound.
    loglik : float
        Maximised composite log-likelihood (sum over windows).
    n_windows, n_tracks, n_skipped : int
        Windows fitted, drifters (clusters) among them, windows that could not be prepared.
    heterogeneity_statistic, heterogeneity_df, heterogeneity_pvalue : float
        Test that the groups share the shared parameters: Cochran's statistic over its scale ``a``, the effective
        degrees of freedom ``nu`` and the p-value of the scaled chi-squared ``a chi2_nu`` (module docstring); NaN
        with one group.
    heterogeneity_groups : str
        ``"tracks"`` (drifters) or ``"windows"`` (a single drifter's windows).
    status, message : str
        ``ok``, ``at_bound``, ``no_convergence``, ``too_few_windows`` or ``failed``.
    windows : pandas.DataFrame
        One row per fitted window: identity, position, its nuisance parameters (natural units) and ``loglik``.
    n_iterations, n_evaluations : int
        Scoring iterations, window-likelihood evaluations.
    """

    model: str
    share: str
    params: dict
    stderr: dict
    units: dict
    covariance: np.ndarray | None = field(default=None, repr=False)
    information: np.ndarray | None = field(default=None, repr=False)
    loglik: float = np.nan
    n_windows: int = 0
    n_tracks: int = 0
    n_skipped: int = 0
    stderr_method: str = ""
    heterogeneity_statistic: float = np.nan
    heterogeneity_df: float = np.nan
    heterogeneity_pvalue: float = np.nan
    heterogeneity_groups: str = ""
    status: str = "failed"
    message: str = ""
    windows: pd.DataFrame = field(default_factory=pd.DataFrame, repr=False)
    n_iterations: int = 0
    n_evaluations: int = 0

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    def to_row(self) -> dict:
        """A flat dict: ``P``, ``P_se`` for each shared parameter, counts, the heterogeneity check, status."""
        row = {"model": self.model, "share": self.share, "status": self.status, "message": self.message,
               "n_windows": self.n_windows, "n_tracks": self.n_tracks, "loglik": self.loglik,
               "stderr_method": self.stderr_method, "heterogeneity_statistic": self.heterogeneity_statistic,
               "heterogeneity_df": self.heterogeneity_df, "heterogeneity_pvalue": self.heterogeneity_pvalue}
        for k, v in self.params.items():
            row[k] = v
            row[k + "_se"] = self.stderr.get(k, np.nan)
        return row


# ---------------------------------------------------------------------------------------------- the pool
class _Pool:
    """Windows, the split of their parameters into shared and nuisance coordinates, and one sweep of evaluations.

    Parameters are kept in one global order of *canonical* names: the inertial frequency of a constant-frequency
    window (``inertial_frequency``, shifted by its local inertial frequency) and the offset of a latitude-following
    one (``inertial_frequency_offset``) are the same shared coordinate, the offset from the local inertial frequency.
    """

    def __init__(self, items: list[PooledWindow], share: str):
        self.items = items
        canon = [[_canonical(n) for n in it.problem.family.names] for it in items]
        names = canon[0]
        if any(sorted(c) != sorted(names) for c in canon):
            raise ValueError("the windows' models have different parameters: they cannot be pooled")
        self.names = names
        self.perm = np.array([[c.index(n) for n in names] for c in canon], int)  # global -> family index
        free = np.array([it.problem.free[pm] for it, pm in zip(items, self.perm)])  # (W, K) global order
        always, never = free.all(axis=0), ~free.any(axis=0)
        # a slot that is a position noise (m) in some windows and a factor on given errors in others: per window
        mixed = [len({it.problem.family.names[pm[k]] for it, pm in zip(items, self.perm)}) > 1 and n != OFFSET
                 for k, n in enumerate(names)]
        self.shared = [k for k, n in enumerate(names)
                       if always[k] and (share == "all" or n not in NUISANCE) and not mixed[k]]
        self.nuis = [k for k in range(len(names)) if k not in self.shared and not never[k]]
        self.fixed_a = ~free[:, self.nuis]  # (W, na): nuisance held fixed in a window
        fam0 = items[0].problem.family
        self.scales = [fam0.parameters[self.perm[0][k]].scale for k in range(len(names))]
        self.units = [fam0.parameters[self.perm[0][k]].unit for k in range(len(names))]
        # a constant inertial frequency is shared as its offset from each window's local inertial frequency
        self.shift = np.zeros((len(items), len(self.shared)))
        for w, it in enumerate(items):
            fam_names = it.problem.family.names
            for j, k in enumerate(self.shared):
                if fam_names[self.perm[w][k]] == "inertial_frequency":
                    fc = it.problem.context.inertial_frequency_cpd
                    self.shift[w, j] = fc if fc is not None and np.isfinite(fc) else 0.0
        # reported under the windows' own name (a shared factor on given fix errors is not a noise in metres); the
        # inertial frequency under the pool's (the offset)
        self.shared_names = [names[k] if names[k] == OFFSET else fam0.names[self.perm[0][k]] for k in self.shared]
        lo = np.array([it.problem.x_lo[pm] for it, pm in zip(items, self.perm)])
        hi = np.array([it.problem.x_hi[pm] for it, pm in zip(items, self.perm)])
        self.s_lo = (lo[:, self.shared] - self.shift).max(axis=0)
        self.s_hi = (hi[:, self.shared] - self.shift).min(axis=0)
        if np.any(self.s_lo >= self.s_hi):
            bad = [self.shared_names[j] for j in np.flatnonzero(self.s_lo >= self.s_hi)]
            raise ValueError(f"the windows' bounds for {', '.join(bad)} do not overlap: they cannot share it")
        self.a_lo, self.a_hi = lo[:, self.nuis], hi[:, self.nuis]
        x0 = np.array([it.problem.x_fixed[pm] for it, pm in zip(items, self.perm)])
        self.x_fixed = x0
        span = self.s_hi - self.s_lo
        self.s0 = np.clip(np.median(x0[:, self.shared] - self.shift, axis=0), self.s_lo + 1e-6 * span,
                          self.s_hi - 1e-6 * span)
        self.a0 = x0[:, self.nuis]
        self.n_evaluations = 0

    @property
    def n_windows(self) -> int:
        return len(self.items)

    def full_x(self, w, s, a_w) -> np.ndarray:
        """Window ``w``'s coordinates in its family's order."""
        xg = self.x_fixed[w].copy()
        xg[self.shared] = s + self.shift[w]
        if self.nuis:
            keep = ~self.fixed_a[w]
            xg[np.asarray(self.nuis)[keep]] = a_w[keep]
        x = np.empty_like(xg)
        x[self.perm[w]] = xg
        return x

    def thetas(self, s, a) -> np.ndarray:
        """Every window's parameters in natural units, its family's order, kept inside its bounds (W, K): what
        :meth:`Problem.theta` gives for :meth:`full_x`, for all windows at once."""
        if not hasattr(self, "_nat"):
            fams = [it.problem for it in self.items]
            self._rows = np.arange(self.n_windows)[:, None]
            self._log = np.array([[q.scale == "log" for q in p.family.parameters] for p in fams])
            lo = np.array([p.x_lo for p in fams])
            hi = np.array([p.x_hi for p in fams])
            self._nat = (np.where(self._log, np.exp(np.where(self._log, lo, 0.0)), lo),
                         np.where(self._log, np.exp(np.where(self._log, hi, 0.0)), hi))
            self._nuis = np.asarray(self.nuis, int)
            self._order = np.array(self.shared + self.nuis, int)
            self._sel = self.perm[:, self._order]
        xg = self.x_fixed.copy()
        xg[:, self.shared] = s + self.shift
        if self.nuis:
            xg[:, self._nuis] = np.where(self.fixed_a, xg[:, self._nuis], a)
        x = np.empty_like(xg)
        x[self._rows, self.perm] = xg
        return np.clip(np.where(self._log, np.exp(np.where(self._log, x, 0.0)), x), *self._nat)

    def evaluate(self, s, a, keep_dlog=False):
        """One sweep: the composite objective and its block-arrowhead pieces (``values`` per window as well)."""
        W, ns, na = self.n_windows, len(self.shared), len(self.nuis)
        gs, ga = np.zeros((W, ns)), np.zeros((W, na))
        A, B, C = np.zeros((W, ns, ns)), np.zeros((W, ns, na)), np.zeros((W, na, na))
        values = np.zeros(W)
        dlogs = [] if keep_dlog else None
        es = [] if keep_dlog else None
        thetas = self.thetas(s, a)
        self.n_evaluations += W
        for w, it in enumerate(self.items):
            p = it.problem
            p.n_evaluations += 1
            e, de = expected_in_band(p.family, thetas[w], p.prep, p.context)
            if not (e.min() > 0 and np.isfinite(e.sum() + de.sum())):
                return np.inf, None
            ratio = p.prep.periodogram[p.prep.band_index] / e
            values[w] = float(np.log(e).sum() + ratio.sum())
            dlog = de[self._sel[w]] / e
            if na:
                dlog[ns:][self.fixed_a[w]] = 0.0
            g = dlog @ (1.0 - ratio)
            f = dlog @ dlog.T
            gs[w], ga[w] = g[:ns], g[ns:]
            A[w], B[w], C[w] = f[:ns, :ns], f[:ns, ns:], f[ns:, ns:]
            if keep_dlog:
                dlogs.append(dlog)
                es.append(e)
        return float(values.sum()), {"gs": gs, "ga": ga, "A": A, "B": B, "C": C, "values": values, "dlogs": dlogs,
                                     "e": es}


def _solve(st, act_s, act_a, mu):
    """The damped Fisher-scoring step ``-(F + mu diag F)^-1 g`` on the active coordinates, by the Schur complement
    over the per-window blocks; returns ``(ds, da, masked pieces)``."""
    gs = st["gs"].sum(axis=0)
    A = st["A"].sum(axis=0)
    B, C, ga = st["B"].copy(), st["C"].copy(), st["ga"].copy()
    ns, na = A.shape[0], C.shape[1]
    off_s = ~act_s
    if off_s.any():
        A[off_s, :] = 0.0
        A[:, off_s] = 0.0
        A[off_s, off_s] = 1.0
        gs = np.where(off_s, 0.0, gs)
        B[:, off_s, :] = 0.0
    if na:
        off = ~act_a
        C[off[:, :, None] | off[:, None, :]] = 0.0
        w_i, m_i = np.nonzero(off)
        C[w_i, m_i, m_i] = 1.0
        B[np.broadcast_to(off[:, None, :], B.shape)] = 0.0
        ga[off] = 0.0
    a_d = A + mu * np.diag(np.diag(A))
    if na:
        c_d = C + mu * (np.einsum("wii->wi", C)[:, :, None] * np.eye(na))
        x = np.linalg.solve(c_d, np.concatenate([B.transpose(0, 2, 1), ga[:, :, None]], axis=2))
        xb, xg = x[:, :, :ns], x[:, :, ns]
        schur = a_d - np.einsum("wsa,wat->st", B, xb)
        ds = np.linalg.solve(schur, -gs + np.einsum("wsa,wa->s", B, xg))
        da = -xg - np.einsum("wat,t->wa", xb, ds)
    else:
        schur = a_d
        ds = np.linalg.solve(a_d, -gs)
        da = np.zeros_like(ga)
    return ds, da, (gs, A, B, C, ga), schur


def _quadratic(ds, da, masked):
    """``g.d`` and ``d^T F d`` for a step on the masked (undamped) system."""
    gs, A, B, C, ga = masked
    gd = float(gs @ ds + np.sum(ga * da))
    dfd = float(ds @ A @ ds + 2 * np.einsum("s,wsa,wa->", ds, B, da) + np.einsum("wa,wab,wb->", da, C, da))
    return gd, dfd


def _scoring(pool: _Pool, max_iter: int = 100):
    """Levenberg-Marquardt-damped Fisher scoring on the block-arrowhead system (the single-window rules of
    :func:`driftspec.analysis.fitting.estimators._fisher_scoring`: gain-ratio damping, a longest step per
    coordinate, stop on a small Newton decrement).

    The Newton decrement ``g^T F^-1 g`` is a squared distance in standard errors (of the Fisher information). The
    fit stops when the shared parameters' part of it (``ds^T S ds``, ``S`` the profiled information) is below
    ``1e-5 W`` (at most 1e-3: within 0.03 standard errors) and the whole of it below ``1e-4 W`` (each window's
    amplitudes within about 0.01 standard errors on average); one window: the single-window rule (1e-5)."""
    W = pool.n_windows
    s, a = pool.s0.copy(), pool.a0.copy()
    val, st = pool.evaluate(s, a, keep_dlog=True)
    if not np.isfinite(val):
        return s, a, val, None, False, "the start is not a valid parameter set", 0
    s_cap = np.array([3.0 if pool.scales[k] == "log" else 0.5 * (h - lo)
                      for k, lo, h in zip(pool.shared, pool.s_lo, pool.s_hi)])
    a_cap = np.array([[3.0 if pool.scales[k] == "log" else 0.5 * (h - lo) for k, lo, h in zip(pool.nuis, lw, hw)]
                      for lw, hw in zip(pool.a_lo, pool.a_hi)]).reshape(a.shape)
    tol_shared, tol = min(1e-5 * W, 1e-3), 1e-4 * W if W > 1 else 1e-5
    mu, nu, flat = 1e-3, 2.0, 0
    success, message = False, "maximum iterations reached"
    n_iter = 0
    for n_iter in range(1, max_iter + 1):  # noqa: B007 - the count is reported
        gs_tot = st["gs"].sum(axis=0)
        act_s = ~(((s <= pool.s_lo) & (gs_tot > 0)) | ((s >= pool.s_hi) & (gs_tot < 0)))
        act_a = ~(pool.fixed_a | ((a <= pool.a_lo) & (st["ga"] > 0)) | ((a >= pool.a_hi) & (st["ga"] < 0)))
        if not act_s.any() and not act_a.any():
            success, message = True, "all parameters at bounds"
            break
        try:
            ds0, da0, masked, schur = _solve(st, act_s, act_a, 0.0)
            decrement = -_quadratic(ds0, da0, masked)[0]
            converged = decrement < tol and float(ds0 @ schur @ ds0) < tol_shared
        except np.linalg.LinAlgError:
            decrement, converged = np.inf, False
        if converged:
            success, message = True, "converged (Newton decrement)"
            break
        improved = False
        while mu < 1e8:
            try:
                ds, da, masked, _ = _solve(st, act_s, act_a, mu)
            except np.linalg.LinAlgError:
                mu *= 10
                continue
            longest = max(float(np.max(np.abs(ds) / s_cap, initial=0.0)),
                          float(np.max(np.abs(da) / a_cap, initial=0.0)))
            if longest > 1.0:
                ds, da = ds / longest, da / longest
            s_new = np.clip(s + ds, pool.s_lo, pool.s_hi)
            a_new = np.clip(a + da, pool.a_lo, pool.a_hi)
            val_new, st_new = pool.evaluate(s_new, a_new, keep_dlog=True)
            if val_new < val:
                improved = True
                small = val - val_new < 1e-10 * max(1.0, abs(val))
                flat = flat + 1 if val - val_new < 1e-7 * W else 0
                gd, dfd = _quadratic(s_new - s, a_new - a, masked)
                predicted = -(gd + 0.5 * dfd)
                rho = (val - val_new) / predicted if predicted > 0 else 0.0
                s, a, val, st = s_new, a_new, val_new, st_new
                mu = max(mu * max(1 / 3, 1 - (2 * rho - 1) ** 3), 1e-7)
                nu = 2.0
                break
            mu *= nu
            nu *= 2
        if not improved:
            success = decrement < 10 * tol
            message = "no further decrease" if success else "line search failed"
            break
        if (small and converged) or flat >= 3:
            success, message = True, "converged (objective change)"
            break
    return s, a, val, st, success, message, n_iter


# ---------------------------------------------------------------------------------------------- covariances
def _efficient(st, act_s, act_a):
    """Per window: efficient scores ``u_w`` (W, p), efficient score weights ``Dt_w`` (p, nb) and informations
    ``S_w`` (W, p, p), the nuisance coordinates at bounds or fixed treated as known."""
    W = st["gs"].shape[0]
    ns = st["gs"].shape[1]
    u = st["gs"].copy()
    s_w = st["A"].copy()
    dt = []
    for w in range(W):
        dlog = st["dlogs"][w]
        d_s = dlog[:ns]
        keep = act_a[w]
        if keep.any():
            bw = st["B"][w][:, keep]
            cw = st["C"][w][np.ix_(keep, keep)]
            k = np.linalg.solve(cw, bw.T).T  # B C^-1
            u[w] = u[w] - k @ st["ga"][w][keep]
            s_w[w] = s_w[w] - k @ bw.T
            d_s = d_s - k @ dlog[ns:][keep]
        dt.append(d_s[act_s])
    return u[:, act_s], dt, s_w[:, act_s][:, :, act_s]


def _circulant_draws(acov, n, rng, size):
    """``size`` proper complex Gaussian series of ``n`` samples with autocovariance ``acov`` (lags ``0..m/2``) by
    circulant embedding (C. R. Dietrich, G. N. Newsam, SIAM J. Sci. Comput. 18, 1088-1107, 1997), drawn in single
    precision (ample for a score covariance, twice as fast)."""
    acov = np.asarray(acov, complex)
    half = acov.size - 1
    row = np.concatenate([acov, np.conj(acov[1:half][::-1])])
    amp = np.sqrt(np.clip(scipy.fft.fft(row).real, 0, None) * row.size / 2.0).astype(np.float32)
    eps = rng.standard_normal((size, 2 * row.size), dtype=np.float32).view(np.complex64)
    return scipy.fft.ifft(eps * amp, axis=-1, overwrite_x=True)[:, :n]


#: amplitudes re-estimated in each simulated window, and the power of the parameter ``E[I]`` is proportional to
_AMPLITUDE_POWER = {"matern_variance": 1.0, "inertial_variance": 1.0, "position_noise": 2.0}  # (pool names)
#: largest standard error (of the log amplitude, from the window's Fisher information) of an amplitude re-estimated
#: in simulated windows: a poorly determined one can swing by large factors and scale its component's scores with it
AMPLITUDE_SE_MAX = 0.25


def _amplitude_map(pool: _Pool, w: int, act_s, act_a) -> tuple | None:
    """For window ``w``: the active nuisance coordinates (positions in ``pool.nuis``), their powers, and for each
    active shared coordinate the position (among those nuisances) of its component's amplitude, or -1; ``None``
    where a nuisance coordinate is not a known amplitude."""
    fam = pool.items[w].problem.family
    nuis_pos = np.flatnonzero(act_a[w])
    names = [pool.names[pool.nuis[j]] for j in nuis_pos]
    if not names or any(n not in _AMPLITUDE_POWER for n in names):
        return None
    inv = np.empty_like(pool.perm[w])
    inv[pool.perm[w]] = np.arange(inv.size)  # family index -> global index
    owner = {}
    for _, sl in fam.components():
        glob = [int(inv[i]) for i in range(sl.start, sl.stop)]
        amp = [k for k, j in enumerate(nuis_pos) if pool.nuis[j] in glob]
        if len(amp) > 1:  # two amplitudes in one component: not a sum of separately scaled parts
            return None
        for g in glob:
            owner[g] = amp[0] if amp else -1
    shared_act = [k for k, on in zip(pool.shared, act_s) if on]
    return nuis_pos, np.array([_AMPLITUDE_POWER[n] for n in names]), np.array([owner.get(k, -1) for k in shared_act])


def _reprofiled_scores(pg, e, d_e, amap, n_iter: int = 2):
    """Shared-parameter scores of simulated periodograms with each window's amplitudes re-estimated (the shape held
    at the fit), for ``G`` windows of one layout at once.

    ``pg`` (G, n_sim, nb) simulated periodograms, ``e`` (G, nb) the fitted ``E[I]``, ``d_e`` (G, p + J, nb) its
    derivatives ``dE/dx`` for the active shared coordinates then the active amplitudes. ``E = R + sum_j exp(k_j
    d_j) C_j`` with ``C_j = (dE/dx_j) / k_j`` the part of ``E`` carried by amplitude ``j`` (``E`` proportional to
    its parameter to the power ``k_j``) and ``R`` the rest: scoring steps on ``d`` for every simulated window, then
    the score ``sum_k (dE'_k / E'_k) (1 - I_k / E'_k)`` of the shared coordinates, each component's derivative
    scaled with its amplitude. Returns (G, n_sim, p), NaN for windows where ``E`` is not of that form.
    """
    power, owner = amap
    n_s = owner.size
    contrib = d_e[:, n_s:] / power[None, :, None]  # (G, J, nb)
    rest = e - contrib.sum(axis=1)
    bad = np.any(rest < -1e-9 * e, axis=1)
    rest = np.clip(rest, 0.0, None)[:, None, :]
    n_g, n_j, nb = contrib.shape
    pairs = (contrib[:, :, None, :] * contrib[:, None, :, :]).reshape(n_g, n_j * n_j, nb).swapaxes(1, 2)
    c_t = contrib.swapaxes(1, 2)
    lam = np.zeros((*pg.shape[:2], n_j))
    for _ in range(n_iter):  # Fisher scoring (the expected information of the amplitudes' Whittle likelihood)
        m = np.exp(lam)
        inv = 1.0 / (rest + m @ contrib)
        g = m * (((1.0 - pg * inv) * inv) @ c_t)
        f = (m[..., :, None] * m[..., None, :]) * ((inv * inv) @ pairs).reshape(*m.shape, n_j)
        lam = np.clip(lam - np.clip(np.linalg.solve(f, g[..., None])[..., 0], -1.0, 1.0), -3.0, 3.0)
    # the shared scores at the re-estimated amplitudes, less their regression on what is left of the amplitudes'
    # score (the efficient score there: the few steps need not reach the amplitudes' optimum exactly)
    m = np.exp(lam)
    inv = 1.0 / (rest + m @ contrib)
    resid = (1.0 - pg * inv) * inv
    g = m * (resid @ c_t)
    f = (m[..., :, None] * m[..., None, :]) * ((inv * inv) @ pairs).reshape(*m.shape, n_j)
    scale = np.where(owner >= 0, m[..., np.clip(owner, 0, None)], 1.0)  # (G, S, p)
    shared = d_e[:, :n_s]
    cross = (shared[:, :, None, :] * contrib[:, None, :, :]).reshape(n_g, n_s * n_j, nb).swapaxes(1, 2)
    f_sa = ((inv * inv) @ cross).reshape(*scale.shape, n_j) * scale[..., None] * m[..., None, :]
    out = scale * (resid @ shared.swapaxes(1, 2)) - (f_sa @ np.linalg.solve(f, g[..., None]))[..., 0]
    out[bad] = np.nan
    return out


def _periodograms(z, prep) -> np.ndarray:
    """Periodograms over the fitted band of simulated windows ``z`` (n_sim, n), prepared as the data were: masked,
    demeaned over the valid samples, tapered (``z`` is overwritten)."""
    valid = prep.valid
    z *= valid
    z -= z.sum(axis=1, keepdims=True) / np.float32(max(prep.n_valid, 1))
    z *= (prep.taper * valid).astype(np.float32)
    return prep.dt_days * np.abs(scipy.fft.fft(z, axis=-1, overwrite_x=True)[:, prep.band_index]) ** 2


def _window_offsets_days(items) -> np.ndarray:
    """Start of each window (days after the first); where a start is unknown, one after another, each past the last
    fix of the one before (no overlap)."""
    starts = [it.start for it in items]
    if any(t is None for t in starts):
        out, t = [], 0.0
        for it in items:
            p = it.problem.prep
            first, last = (0.0, p.n * p.dt_days) if it.fix_times_days is None else \
                (min(0.0, float(it.fix_times_days.min())), max(p.n * p.dt_days, float(it.fix_times_days.max())))
            out.append(t - first)
            t += last - first + p.dt_days
        return np.array(out)
    t0 = min(pd.Timestamp(t).value for t in starts)
    return np.array([(pd.Timestamp(t).value - t0) / (SECONDS_PER_DAY * 1e9) for t in starts])


def _regular_draws(pool: _Pool, ws, s, a, n_sim, rng):
    """Simulated periodograms of one drifter's windows on a regular grid (one (n_sim, band) array per window, in
    order): the drifter simulated once over its whole span, so that overlapping windows share samples."""
    from ..models.inertial import modulation_sequence
    from ..simulation.simulate import embedding_autocovariance

    items = [pool.items[w] for w in ws]
    dt_days = items[0].problem.prep.dt_days
    starts = [it.start for it in items]
    if any(t is None for t in starts) or any(abs(it.problem.prep.dt_days - dt_days) > 1e-9 * dt_days
                                             for it in items):
        offsets = np.cumsum([0] + [it.problem.prep.n for it in items[:-1]])  # unknown times: no overlap
    else:
        t0 = min(pd.Timestamp(t).value for t in starts)
        step_ns = dt_days * SECONDS_PER_DAY * 1e9
        offsets = np.array([round((pd.Timestamp(t).value - t0) / step_ns) for t in starts])
    span = int(max(o + it.problem.prep.n for o, it in zip(offsets, items)))
    ref = items[0].problem
    theta_ref = ref.theta(pool.full_x(ws[0], s, a[ws[0]])[ref.free])
    lat = None
    comps = []
    for comp, sl in ref.family.components():
        r = embedding_autocovariance(
            lambda lag, c=comp, q=theta_ref[sl], ctx=ref.context: c.autocovariance(q, lag, ctx), span, dt_days,
            max_factor=2)
        x = _circulant_draws(r, span, rng, n_sim)
        if comp.modulated:
            if lat is None:
                lat = np.full(span, np.nan)
                for o, it in zip(offsets, items):
                    series = it.problem.context.latitude_series
                    lat[o:o + it.problem.prep.n] = it.lat if series is None else series
            x = x * modulation_sequence(lat, dt_days)
        v_ref = float(np.real(comp.autocovariance(theta_ref[sl], np.zeros(1), ref.context))[0])
        comps.append((comp, sl, x, v_ref))
    for w, o, it in zip(ws, offsets, items):
        p = it.problem
        z = np.zeros((n_sim, p.prep.n), np.complex64)
        for (_, _, x, v_ref), v_w in zip(comps, _component_variances(pool, w, s, a, p.family)):
            if v_ref > 0:
                z += np.float32(np.sqrt(max(v_w, 0.0) / v_ref)) * x[:, o:o + p.prep.n]
        yield _periodograms(z, p.prep)


def _component_variances(pool: _Pool, w, s, a, family) -> list[float]:
    """Variance (lag-0 autocovariance) of each component of ``family`` (window ``w``'s own, whose components are
    those of the drifter's reference window: the same model) at the window's fitted parameters."""
    p = pool.items[w].problem
    theta_w = p.theta(pool.full_x(w, s, a[w])[p.free])
    return [float(np.real(comp.autocovariance(theta_w[sl], np.zeros(1), p.context))[0])
            for comp, sl in family.components()]


#: simulated drifters x fine-grid samples per batch of :func:`_irregular_velocities` (a few arrays of that many
#: complex numbers each: about 0.2 GB at most, whatever the drifter's span)
SIM_BATCH_CELLS = 2_000_000


def _irregular_draws(pool: _Pool, ws, s, a, n_sim, rng):
    """Simulated periodograms of one drifter's windows of irregular fixes (one (n_sim, band) array per window, in
    order): :func:`_irregular_velocities`, prepared as the data were, in batches of drifters that bound the memory
    (:data:`SIM_BATCH_CELLS`)."""
    from ..fitting.uncertainty import _FINE_STEPS

    items = [pool.items[w] for w in ws]
    days = max(o + it.problem.prep.n * it.problem.prep.dt_days for o, it in zip(_window_offsets_days(items), items))
    n_fine = _FINE_STEPS * days / items[0].problem.prep.dt_days
    batch = int(np.clip(SIM_BATCH_CELLS // max(n_fine, 1.0), 8, n_sim))
    parts = [[] for _ in ws]
    for first in range(0, n_sim, batch):
        size = min(batch, n_sim - first)
        for part, w, z in zip(parts, ws, _irregular_velocities(pool, ws, s, a, size, rng)):
            part.append(_periodograms(z, pool.items[w].problem.prep))
    for part in parts:
        yield np.concatenate(part)


def _irregular_velocities(pool: _Pool, ws, s, a, n_sim, rng):
    """Simulated velocity windows (n_sim, n; m/s, zero where invalid) of one drifter's windows of irregular fixes, in
    order, made as the data were and as the single-window sandwich makes them
    (:func:`~driftspec.analysis.fitting.uncertainty.irregular_velocities`), but once over the drifter's whole span so
    that overlapping windows share their fixes: the ocean velocity on a grid three times finer than the windows'
    (damped oscillations exactly by their recursion, the rest by circulant embedding), integrated to positions, read
    at each window's fix times, plus one position error per fix (the same in every window that uses the fix, scaled
    to each window's fitted noise level or factor on the given errors), then each window's interpolation and
    difference operator ``W`` (the sparse matrix its expected periodogram comes from).

    An inertial oscillation is drawn once, without rotation, and each window turns it at its own fitted frequency
    (its constant frequency, or its local inertial frequency plus the offset) before integrating: each window sees
    the constant-frequency peak its operator models, and overlapping windows share the oscillation's random
    amplitude and phase. Each component is rescaled to each window's amplitude."""
    from ..fitting.uncertainty import (
        _FINE_STEPS,
        _OSCILLATIONS,
        EMBEDDING_MAX_FACTOR,
        _fix_error_sd,
        integrate_velocity,
        interpolate_rows,
        ou_series,
    )
    from ..models.inertial import modulation_sequence
    from ..simulation.simulate import embedding_autocovariance

    items = [pool.items[w] for w in ws]
    dt_days = items[0].problem.prep.dt_days
    offsets = _window_offsets_days(items)
    fix_t = [o + it.fix_times_days for o, it in zip(offsets, items)]
    lo = min(t.min() for t in fix_t) - dt_days
    step = dt_days / _FINE_STEPS
    n_fine = int(np.ceil((max(t.max() for t in fix_t) + dt_days - lo) / step)) + 2
    t_fine = lo + step * np.arange(n_fine)
    ref = items[0].problem
    theta_ref = ref.theta(pool.full_x(ws[0], s, a[ws[0]])[ref.free])
    comps = []  # (positions, or the unrotated oscillation to turn per window; variance at the reference)
    for comp, sl in ref.family.base.components():
        q = theta_ref[sl]
        v_ref = float(np.real(comp.autocovariance(q, np.zeros(1), ref.context))[0])
        if isinstance(comp, _OSCILLATIONS):  # exactly by its recursion (no embedding to outgrow)
            comps.append((None, ou_series(q[0], -q[2] + 0j, n_fine, step, rng, n_sim), v_ref))
            continue
        r = embedding_autocovariance(lambda lag, c=comp, q=q, ctx=ref.context: c.autocovariance(q, lag, ctx),
                                     n_fine, step, max_factor=EMBEDDING_MAX_FACTOR)
        x = _circulant_draws(r, n_fine, rng, n_sim)
        if comp.modulated:
            x = x * modulation_sequence(np.full(n_fine, items[0].lat), step)
        comps.append((integrate_velocity(x, step), None, v_ref))
    # one standard complex normal per distinct fix (times to the second), shared by the windows that use it
    keys = [np.round(t * SECONDS_PER_DAY).astype(np.int64) for t in fix_t]
    distinct, where = np.unique(np.concatenate(keys), return_inverse=True)
    eps = rng.standard_normal((n_sim, distinct.size)) + 1j * rng.standard_normal((n_sim, distinct.size))
    bounds = np.cumsum([0] + [k.size for k in keys])
    for j, (w, it, t) in enumerate(zip(ws, items, fix_t)):
        p = it.problem
        fam = p.family
        theta_w = p.theta(pool.full_x(w, s, a[w])[p.free])
        u = (t - lo) / step  # the fixes on the fine grid
        k0 = max(int(np.floor(u.min())), 0)
        k1 = min(int(np.floor(u.max())) + 2, n_fine)  # the window's stretch of the fine grid
        x_fix = np.zeros((n_sim, t.size), complex)
        own = fam.base.components()
        for (pos, unrotated, v_ref), v_w, (comp, sl) in zip(comps, _component_variances(pool, w, s, a, fam.base), own):
            if v_ref <= 0:
                continue
            if pos is None:  # turned at this window's own frequency, then integrated over its stretch only
                f_w = float(theta_w[sl][1])
                if comp.modulated:
                    f_w += p.context.inertial_frequency_cpd or 0.0
                turned = unrotated[:, k0:k1] * np.exp(2j * np.pi * f_w * (t_fine[k0:k1] - lo))
                x_fix += np.sqrt(max(v_w, 0.0) / v_ref) * interpolate_rows(integrate_velocity(turned, step), u - k0)
            else:
                x_fix += np.sqrt(max(v_w, 0.0) / v_ref) * interpolate_rows(pos, u)
        sigma = _fix_error_sd(fam, theta_w[len(fam.base.parameters):], t.size)
        x_fix += sigma * eps[:, where[bounds[j]:bounds[j + 1]]]
        yield np.ascontiguousarray((fam.operator.weights @ x_fix.T).T / SECONDS_PER_DAY, np.complex64)


def _simulated_scores(pool: _Pool, s, a, st, dt, n_sim: int | None = None, act=None) -> dict:
    """The efficient scores of every window over ``n_sim`` drifters simulated from the fit: ``{track: (window
    indices, scores (n_sim, n_windows, p))}``.

    Each drifter is simulated once over its whole span (circulant embedding, one series per model component, with
    its first window's parameters), so overlapping windows see the same samples; window ``w`` takes each component
    rescaled to its own amplitude, its own mask, taper and demeaning. With ``act = (act_s, act_a)`` (the active
    coordinates), each simulated window's amplitudes are re-estimated as the fit estimated the data's
    (:func:`_reprofiled_scores`), so the scores vary as the data's efficient scores at the estimate do (the
    first-order efficient score at the fitted ``E[I]`` overstates the spread of windows whose amplitudes are poorly
    determined); otherwise, or where the amplitudes are not of that form, the first-order score.

    A drifter's windows of irregular fixes are simulated as such (:func:`_irregular_draws`), apart from its windows on
    a regular grid (:func:`_regular_draws`): where a drifter has both, the two kinds are drawn independently, so the
    overlap between a window of each kind is not in the scores' covariance.
    """
    n_sim = N_SIM if n_sim is None else n_sim
    layouts = {}  # windows whose amplitudes are re-estimated, by band size and amplitude layout
    by_track = {}
    for w, it in enumerate(pool.items):
        by_track.setdefault(it.track_id, []).append(w)
    out = {}
    for track, ws in by_track.items():
        items = [pool.items[w] for w in ws]
        rng = np.random.default_rng(zlib.crc32(b"".join(it.problem.prep.periodogram[:8].tobytes() for it in items)))
        regular = [i for i, it in enumerate(items) if it.fix_times_days is None]
        irregular = [i for i, it in enumerate(items) if it.fix_times_days is not None]
        scores = np.zeros((n_sim, len(ws), dt[ws[0]].shape[0]))
        for part, draws in ((regular, _regular_draws), (irregular, _irregular_draws)):
            if not part:
                continue
            for i, pg in zip(part, draws(pool, [ws[i] for i in part], s, a, n_sim, rng)):
                w = ws[i]
                amap = _amplitude_map(pool, w, *act) if act is not None else None
                if amap is not None:  # only well-determined amplitudes are re-estimated (else first order)
                    try:
                        cov = np.linalg.inv(st["C"][w][np.ix_(amap[0], amap[0])])
                        amap = amap if np.all(np.diag(cov) <= AMPLITUDE_SE_MAX ** 2) else None
                    except np.linalg.LinAlgError:
                        amap = None
                if amap is None:
                    scores[:, i] = (1.0 - pg / st["e"][w]) @ dt[w].T
                else:  # re-estimated below, for windows of one layout at once
                    key = (pg.shape[1], tuple(amap[0]), tuple(amap[1]), tuple(amap[2]))
                    layouts.setdefault(key, []).append((track, i, w, pg))
        out[track] = (ws, scores)
    ns = len(pool.shared)
    for (_, nuis_pos, power, owner), group in layouts.items():
        amap = (np.array(power), np.array(owner))
        rows = np.r_[np.flatnonzero(act[0]), ns + np.array(nuis_pos, int)]
        for lo in range(0, len(group), 64):
            part = group[lo:lo + 64]
            pg = np.stack([g[3] for g in part])
            e = np.stack([st["e"][g[2]] for g in part])
            d_e = np.stack([st["dlogs"][g[2]][rows] * st["e"][g[2]] for g in part])
            sc = _reprofiled_scores(pg, e, d_e, amap)
            for (track, i, w, pg_w), sc_w in zip(part, sc):
                out[track][1][:, i] = sc_w if np.isfinite(sc_w).all() else (1.0 - pg_w / st["e"][w]) @ dt[w].T
    return out


def heterogeneity_test(u_groups, info_groups, null_scores, blocks=None):
    """Score test that groups share parameters (module docstring): ``(statistic, df, p)``.

    Parameters
    ----------
    u_groups : ndarray, shape (G, p)
        Efficient scores per group at the pooled estimate.
    info_groups : ndarray, shape (G, p, p)
        Their information (sensitivity).
    null_scores : ndarray, shape (n_sim, G, p)
        Scores of the groups at the truth in series simulated from the fit.
    blocks : array_like of int, shape (G,), optional
        Independent units the groups belong to (drifters; default: every group its own). Scores of different
        blocks are independent; groups of one block (windows of one drifter) may be correlated.

    Returns
    -------
    statistic, df, p : float
        ``T / a`` with ``T = sum_g u_g^T I_g^+ u_g`` (Cochran's homogeneity statistic in score form), and the
        scaled chi-squared ``a chi2_df`` with the null mean and variance of ``T`` (Satterthwaite): ``a = Var / (2
        E)``, ``df = 2 E^2 / Var``; ``p = P(chi2_df > T / a)``.

    Notes
    -----
    To first order ``u = Q v`` (module docstring), so ``T = v^T B v`` with ``B = Q^T W Q``, ``W`` the block-diagonal
    of the pseudo-inverse informations. With ``V_b`` the covariance of block ``b``'s scores, ``E T = sum_b tr(B_bb
    V_b)`` and ``Var T = sum_b Var(v_b^T B_bb v_b) + 2 sum_{b != c} tr(B_bc V_c B_cb V_b)`` (blocks independent).
    ``V_b`` and the within-block variances (which carry the skewness of scores from few periodogram ordinates) are
    estimated from ``null_scores``; the other terms are exact, and the sums over blocks average the Monte Carlo
    error, so a few simulated drifters per block suffice where there are many blocks.
    """
    u_groups = np.asarray(u_groups, float)
    n_g, p = u_groups.shape
    if n_g < 2 or p == 0:
        return np.nan, np.nan, np.nan
    blocks = np.arange(n_g) if blocks is None else pd.factorize(np.asarray(blocks))[0]
    w_inv = np.linalg.pinv(info_groups, rcond=1e-10, hermitian=True)
    h_inv = np.linalg.pinv(info_groups.sum(axis=0), rcond=1e-10, hermitian=True)
    # B = Q^T W Q with Q = I - D M H^-1 M^T: blocks B_gh = delta_gh W_g + F_g + F_h^T + K
    f = -np.einsum("gab,gbc,cd->gad", w_inv, info_groups, h_inv)
    k = h_inv @ np.einsum("gab,gbc,gcd->ad", info_groups, w_inv, info_groups) @ h_inv
    big = (f[:, None] + np.swapaxes(f, 1, 2)[None, :] + k).transpose(0, 2, 1, 3).reshape(n_g * p, n_g * p)
    for g in range(n_g):
        big[g * p:(g + 1) * p, g * p:(g + 1) * p] += w_inv[g]
    big = 0.5 * (big + big.T)
    stat = float(np.einsum("ga,gab,gb->", u_groups, w_inv, u_groups))
    v = np.asarray(null_scores, float).reshape(null_scores.shape[0], n_g * p)
    v = v - v.mean(axis=0)
    n_sim = v.shape[0]
    idx = np.repeat(blocks, p)
    vb = np.zeros((n_g * p, n_g * p))  # block-diagonal estimate of the scores' covariance
    mean, var_within, same = 0.0, 0.0, 0.0
    for b in range(blocks.max() + 1):
        sel = np.flatnonzero(idx == b)
        v_b = np.atleast_2d(np.cov(v[:, sel], rowvar=False))
        vb[np.ix_(sel, sel)] = v_b
        b_bb = big[np.ix_(sel, sel)]
        q = np.einsum("ia,ab,ib->i", v[:, sel], b_bb, v[:, sel])
        mean += float(np.trace(b_bb @ v_b))
        var_within += float(np.var(q, ddof=1)) if n_sim > 1 else 0.0
        same += float(np.sum((b_bb @ v_b) * (b_bb @ v_b).T))
    bv = big @ vb
    var = var_within + 2.0 * (float(np.sum(bv * bv.T)) - same)
    if not (mean > 0 and var > 0):
        return stat, np.nan, np.nan
    scale, df = var / (2.0 * mean), 2.0 * mean ** 2 / var
    return stat / scale, float(df), float(scipy.stats.chi2.sf(stat / scale, df))


# ---------------------------------------------------------------------------------------------- the fit
def pool_fit(windows: Iterable, spec: FitSpec | None = None, *, model=None, share: str = "shape",
             min_windows: int = 1) -> PooledResult:
    """Fit one model to every window at once (the composite debiased Whittle likelihood; module docstring).

    Parameters
    ----------
    windows : iterable of Window
        :class:`~driftspec.analysis.tracks.windows.Window` objects (``z`` in m/s, NaN where missing; ``track_id``
        names the drifter, the cluster of the standard errors; ``start`` places overlapping windows in time).
    spec : FitSpec, optional
        Band rule, observation model, latitude handling, position noise, taper, exclusions, fixed parameters
        (default ``FitSpec()``); its estimator must be ``"debiased"``.
    model : str, optional
        The candidate to pool (default: the first of ``spec.models``).
    share : {"shape", "all"}
        Share the spectral shape with per-window amplitudes (default), or share every parameter.
    min_windows : int
        Fewest fittable windows for a fit (fewer: status ``too_few_windows``).

    Returns
    -------
    PooledResult
        Shared parameters in natural units with cluster-robust standard errors, the heterogeneity check, and the
        per-window nuisance parameters. Numerical failures are a status, not an exception.

    Raises
    ------
    ValueError
        For invalid options (one line).
    """
    spec = FitSpec() if spec is None else spec
    if share not in SHARE_MODES:
        raise ValueError(f"share must be one of {', '.join(SHARE_MODES)}; got {share!r}")
    if spec.estimator != "debiased":
        raise ValueError(f"pooled fits use the debiased Whittle likelihood; got estimator {spec.estimator!r}")
    if int(min_windows) != min_windows or min_windows < 1:
        raise ValueError(f"min_windows must be a whole number >= 1; got {min_windows!r}")
    model = _default_model(spec) if model is None else model
    name = spec.model_name(model)
    families = {}
    items, skipped = [], 0
    for w in windows:
        pw = prepare_pooled_window(w, spec, model, families)
        if isinstance(pw, str):
            skipped += 1
        else:
            items.append(pw)
    empty = PooledResult(name, share, {}, {}, {}, n_windows=len(items), n_skipped=skipped,
                         n_tracks=len({it.track_id for it in items}))
    if len(items) < min_windows or not items:
        empty.status, empty.message = "too_few_windows", f"{len(items)} fittable windows (need {min_windows})"
        return empty
    try:
        pool = _Pool(items, share)
    except ValueError as exc:
        empty.message = str(exc)
        return empty
    with np.errstate(all="ignore"):
        try:
            s, a, val, st, success, message, n_iter = _scoring(pool)
        except (ValueError, FloatingPointError, np.linalg.LinAlgError) as exc:
            empty.message = f"{type(exc).__name__}: {exc}"
            return empty
    if st is None:
        empty.message = message
        return empty
    with np.errstate(all="ignore"):
        return _finish(pool, s, a, val, st, success, message, n_iter, name, share, skipped)


def _finish(pool: _Pool, s, a, val, st, success, message, n_iter, name, share, skipped) -> PooledResult:
    items = pool.items
    W, ns = pool.n_windows, len(pool.shared)
    span = pool.s_hi - pool.s_lo
    at_s = (s - pool.s_lo < 1e-5 * span) | (pool.s_hi - s < 1e-5 * span)
    a_span = pool.a_hi - pool.a_lo
    at_a = (a - pool.a_lo < 1e-5 * a_span) | (pool.a_hi - a < 1e-5 * a_span)
    act_s, act_a = ~at_s, ~(pool.fixed_a | at_a)
    p = int(act_s.sum())
    u, dt, s_w = _efficient(st, act_s, act_a)
    info = s_w.sum(axis=0)
    tracks = [it.track_id for it in items]
    codes, track_names = pd.factorize(pd.Index(tracks))
    n_tracks = len(track_names)
    cov = np.full((p, p), np.nan)
    stderr_method = ""
    track_names = pd.Index(track_names)
    # model-based covariance of the scores: drifters simulated from the fit (overlaps, gaps, leakage included)
    sims = _simulated_scores(pool, s, a, st, dt, n_simulations(W, n_tracks), act=(act_s, act_a)) if p else {}
    j_tracks = np.zeros((n_tracks, p, p))
    for track, (_, sc) in sims.items():
        j_tracks[track_names.get_loc(track)] = np.atleast_2d(np.cov(sc.sum(axis=1), rowvar=False))
    try:
        info_inv = np.linalg.inv(info)
        if n_tracks >= MIN_CLUSTERS:
            u_c = np.zeros((n_tracks, p))
            np.add.at(u_c, codes, u)
            j = n_tracks / (n_tracks - 1) * (u_c.T @ u_c)
            stderr_method = "cluster"
        else:
            j = j_tracks.sum(axis=0)
            stderr_method = "model"
        cov = info_inv @ j @ info_inv
    except np.linalg.LinAlgError:
        pass
    # heterogeneity: drifters as groups; a single drifter's windows otherwise
    het = (np.nan, np.nan, np.nan)
    groups = ""
    try:
        if n_tracks >= 2 and p:
            u_g = np.zeros((n_tracks, p))
            np.add.at(u_g, codes, u)
            i_g = np.zeros((n_tracks, p, p))
            np.add.at(i_g, codes, s_w)
            null = np.zeros((next(iter(sims.values()))[1].shape[0], n_tracks, p))
            for track, (_, sc) in sims.items():
                null[:, track_names.get_loc(track)] = sc.sum(axis=1)
            het, groups = heterogeneity_test(u_g, i_g, null), "tracks"
        elif W >= 2 and p:
            (ws, sc), = sims.values()
            order = np.argsort(ws)
            het = heterogeneity_test(u, s_w, sc[:, order], blocks=np.zeros(W, int))
            groups = "windows"
    except np.linalg.LinAlgError:
        pass
    # natural units: values and the delta method for the log-scaled parameters
    shared_nat = np.array([s[j] if pool.scales[k] == "linear" else np.exp(s[j]) for j, k in enumerate(pool.shared)])
    jac = np.array([1.0 if pool.scales[k] == "linear" else shared_nat[j] for j, k in enumerate(pool.shared)])
    se = np.full(ns, np.nan)
    cov_full = np.full((ns, ns), np.nan)
    if p:
        ja = jac[act_s]
        cov_nat = cov * np.outer(ja, ja)
        cov_full[np.ix_(act_s, act_s)] = cov_nat
        se[act_s] = np.sqrt(np.clip(np.diag(cov_nat), 0, None))
    units = {n: pool.units[k] for n, k in zip(pool.shared_names, pool.shared)}
    # per-window table
    rows = []
    for w, it in enumerate(items):
        x = pool.full_x(w, s, a[w])
        theta = it.problem.theta(x[it.problem.free])[pool.perm[w]]  # global order
        fc = it.problem.context.inertial_frequency_cpd
        row = {"track_id": it.track_id, "window_start": it.start, "lat": it.lat, "lon": it.lon,
               "loglik": -float(st["values"][w])}
        own = it.problem.family.names
        row.update({own[pool.perm[w][k]]: float(theta[k]) for k in pool.nuis})  # the window's own names
        if OFFSET in pool.names and fc is not None:
            row["inertial_frequency"] = float(fc + theta[pool.names.index(OFFSET)]) if \
                it.problem.family.names[pool.perm[w][pool.names.index(OFFSET)]] == OFFSET else \
                float(theta[pool.names.index(OFFSET)])
        rows.append(row)
    if not success:
        status = "no_convergence"
    elif at_s.any():
        status = "at_bound"
        message = "at bound: " + ", ".join(n for n, b in zip(pool.shared_names, at_s) if b)
    else:
        status, message = "ok", "" if message.startswith("converged") or message == "no further decrease" else message
    if status == "ok" and not np.all(np.isfinite(se)):
        message = "standard errors unavailable (singular information)"
    return PooledResult(
        model=name, share=share, params=dict(zip(pool.shared_names, map(float, shared_nat))),
        stderr=dict(zip(pool.shared_names, map(float, se))), units=units, covariance=cov_full, information=info,
        loglik=-float(val),
        n_windows=W, n_tracks=n_tracks, n_skipped=skipped, stderr_method=stderr_method,
        heterogeneity_statistic=het[0], heterogeneity_df=het[1], heterogeneity_pvalue=het[2],
        heterogeneity_groups=groups, status=status, message=message, windows=pd.DataFrame(rows),
        n_iterations=n_iter, n_evaluations=pool.n_evaluations)


# ---------------------------------------------------------------------------------------------- maps
#: pooled status codes in the map (CF flag_values / flag_meanings)
STATUS_FLAGS = ("ok", "at_bound", "no_convergence", "too_few_windows", "failed")


def _grid_edges(region, bin_deg):
    """Bin edges (degrees): the globe, or the region snapped outwards to whole bins."""
    if region is None:
        return np.arange(-90.0, 90.0 + bin_deg / 2, bin_deg), np.arange(-180.0, 180.0 + bin_deg / 2, bin_deg)
    lon0, lat0, lon1, lat1 = region
    lat_e = np.arange(np.floor(lat0 / bin_deg) * bin_deg, lat1 + bin_deg - 1e-9, bin_deg)
    lon_e = np.arange(np.floor(lon0 / bin_deg) * bin_deg, lon1 + bin_deg - 1e-9, bin_deg)
    return lat_e, lon_e


def check_region(region):
    """``(lon0, lat0, lon1, lat1)`` as floats, or a one-line ``ValueError``."""
    if region is None:
        return None
    try:
        lon0, lat0, lon1, lat1 = (float(v) for v in region)
    except (TypeError, ValueError):
        raise ValueError(f"region must be LON0,LAT0,LON1,LAT1 in degrees; got {region!r}") from None
    if not (-90 <= lat0 < lat1 <= 90):
        raise ValueError(f"region needs -90 <= LAT0 < LAT1 <= 90; got {lat0:g}, {lat1:g}")
    if not (-180 <= lon0 < lon1 <= 360 and lon1 - lon0 <= 360):
        raise ValueError(f"region needs -180 <= LON0 < LON1 <= 360 (at most 360 apart); got {lon0:g}, {lon1:g}")
    return lon0, lat0, lon1, lat1


def bin_windows(windows: Iterable, bin_deg: float, region=None) -> tuple[dict, np.ndarray, np.ndarray]:
    """Windows by ``bin_deg`` bin of their mean position: ``({(iy, ix): [Window, ...]}, lat_edges, lon_edges)``;
    windows outside ``region`` (or the grid) are left out."""
    lat_e, lon_e = _grid_edges(region, bin_deg)
    bins = {}
    for w in windows:
        lat, lon = float(w.lat), float(w.lon)
        lon = (lon - lon_e[0]) % 360.0 + lon_e[0]  # into [lon_e[0], lon_e[0] + 360)
        if not (np.isfinite(lat) and np.isfinite(lon)):
            continue
        if region is not None and not (region[1] <= lat < region[3] and region[0] <= lon < region[2]):
            continue
        iy = int(np.searchsorted(lat_e, lat, side="right") - 1)
        ix = int(np.searchsorted(lon_e, lon, side="right") - 1)
        if 0 <= iy < lat_e.size - 1 and 0 <= ix < lon_e.size - 1:
            bins.setdefault((iy, ix), []).append(w)
    return bins, lat_e, lon_e


def window_anisotropy(windows, spec: FitSpec) -> dict:
    """:func:`~.maps.anisotropy_summary` of the windows' own fits under ``spec`` (with ``spec.anisotropic``: the
    selected model per window, its isotropy test and diffusivity tensor), as ``driftspec map`` summarises them."""
    from ..fitting.batch import window_rows
    from .maps import is_selected

    rows = pd.DataFrame([r for w in windows for r in window_rows(w, spec)])
    if rows.empty or "status" not in rows:
        return anisotropy_summary(rows)
    return anisotropy_summary(rows[(rows["status"] == "ok") & is_selected(rows)])


def fit_bin(key, windows, spec: FitSpec, model=None, share: str = "shape", min_windows: int = 2) -> dict:
    """The map row of one bin: :meth:`PooledResult.to_row` plus the bin's key (a failure is a row with a status);
    with ``spec.anisotropic`` also the anisotropy summaries of the windows' own fits (``anisotropy``)."""
    try:
        res = pool_fit(windows, spec, model=model, share=share, min_windows=min_windows)
        row = res.to_row()
        row["units"] = res.units
    except Exception as exc:  # noqa: BLE001 - a failed bin is a row, not a crash
        row = {"status": "failed", "message": f"{type(exc).__name__}: {exc}", "n_windows": len(windows),
               "n_tracks": len({w.track_id for w in windows}), "units": {}}
    if spec.anisotropic:
        try:
            row["anisotropy"] = window_anisotropy(windows, spec)
        except Exception as exc:  # noqa: BLE001 - the pooled fit stands; the summary says why it is missing
            row["anisotropy"] = {}
            row["message"] = (row.get("message") or "") + f" anisotropy summary failed: {type(exc).__name__}: {exc}"
    row["iy"], row["ix"] = key
    return row


def _run_bins(tasks, work, workers, dask_address, done):
    """Run ``work(*task)`` for every task serially, on a process pool or on Dask, calling ``done(task, row)`` as each
    finishes (at most ``2 workers`` tasks in flight)."""
    if dask_address:
        from dask.distributed import Client, LocalCluster
        from dask.distributed import as_completed as dask_completed

        cluster = LocalCluster(n_workers=min(2, os.cpu_count() or 1), threads_per_worker=1, processes=True,
                               dashboard_address=None) if dask_address == "local" else None
        client = Client(cluster if cluster is not None else dask_address)
        try:
            futures = {}
            queue = dask_completed()
            it = iter(tasks)
            n = max(1, len(client.scheduler_info().get("workers", {})))

            def submit():
                t = next(it, None)
                if t is not None:
                    f = client.submit(work, *t, pure=False)
                    futures[f.key] = t
                    queue.add(f)

            for _ in range(2 * n):
                submit()
            for f in queue:
                done(futures.pop(f.key), f.result())
                submit()
        finally:
            client.close()
            if cluster is not None:
                cluster.close()
    elif workers > 1:
        import multiprocessing
        from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

        ctx = multiprocessing.get_context("forkserver") if "forkserver" in multiprocessing.get_all_start_methods() \
            else None
        with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
            in_flight = {}
            for t in [*tasks, None]:
                if t is not None:
                    in_flight[pool.submit(work, *t)] = t
                while in_flight and (t is None or len(in_flight) >= 2 * workers):
                    finished, _ = wait(in_flight, return_when=FIRST_COMPLETED)
                    for f in finished:
                        done(in_flight.pop(f), f.result())
    else:
        for t in tasks:
            done(t, work(*t))


def pool_map(windows: Iterable, spec: FitSpec | None = None, *, bin_deg: float = 2.0, region=None, out=None,
             model=None, share: str = "shape", min_windows: int = 2, workers: int = 1, dask_address=None,
             resume: bool = False, progress: bool = True, windowing: dict | None = None, source: str = "",
             command: str = "") -> xr.Dataset:
    """A pooled fit per ``bin_deg`` x ``bin_deg`` bin: a CF netCDF map like :func:`~.maps.grid_fits`.

    Parameters
    ----------
    windows : iterable of Window
        Every window (binned by its mean position; all windows of a bin are held in memory until it is fitted).
    spec : FitSpec, optional
    bin_deg : float
        Bin size, degrees.
    region : (lon0, lat0, lon1, lat1), optional
        Only windows whose mean position is inside; the grid covers the region (default: the globe).
    out : path, optional
        NetCDF file, written atomically. Finished bins are kept in ``<out>.partial/`` until the map is written,
        so ``resume=True`` after an interruption refits only the bins that were in flight.
    model, share, min_windows
        As :func:`pool_fit` (``min_windows`` per bin, default 2).
    workers, dask_address
        Processes for a local pool (1: serial), or a Dask scheduler address (``"local"``: a ``LocalCluster``).
    windowing : dict, optional
        Window and preparation settings, stored with the run (a resume under other settings is refused).
    source, command : str
        Provenance written to the ``source`` and ``history`` attributes.

    Returns
    -------
    xarray.Dataset
        For each shared parameter ``P``: ``P`` and ``P_se``; ``n_windows`` (standard name
        ``number_of_observations``), ``n_tracks``, ``heterogeneity_statistic``, ``heterogeneity_df``,
        ``heterogeneity_pvalue`` and ``pooled_status`` per bin; ``lat_bnds``/``lon_bnds``.

    Raises
    ------
    driftspec.analysis.fitting.batch.NoWindows
        When no window falls in a bin (inside ``region``): nothing is written and the file at ``out`` stays.
    """
    if progress:  # tqdm.auto warns on import in a notebook without ipywidgets, even for a disabled bar
        from tqdm.auto import tqdm
    else:
        from tqdm import tqdm

    from ..fitting.batch import NoWindows, Tally, run_settings, stored_settings
    from ..wording import counted

    spec = FitSpec() if spec is None else spec
    if not (np.isfinite(bin_deg) and bin_deg > 0):
        raise ValueError(f"bin size must be positive degrees; got {bin_deg!r}")
    if share not in SHARE_MODES:
        raise ValueError(f"share must be one of {', '.join(SHARE_MODES)}; got {share!r}")
    if spec.estimator != "debiased":
        raise ValueError(f"pooled fits use the debiased Whittle likelihood; got estimator {spec.estimator!r}")
    if int(workers) != workers or workers < 1:
        raise ValueError(f"workers must be a whole number >= 1; got {workers!r}")
    region = check_region(region)
    settings = run_settings(spec, {**(windowing or {}), "bin_deg": float(bin_deg), "region": region and list(region),
                                   "model": None if model is None else spec.model_name(model), "share": share,
                                   "min_windows": int(min_windows)})
    parts, had_parts = None, False
    if out is not None:
        out = Path(out)
        if not out.parent.is_dir() or not os.access(out.parent, os.W_OK):
            raise ValueError(f"{out.parent}: not a writable folder")
        parts = out.with_name(out.name + ".partial")
        if resume:
            before = stored_settings(out)
            if before is not None and json.loads(json.dumps(before)) != json.loads(json.dumps(settings)):
                raise ValueError(f"cannot resume {out}: it was made with other settings; rerun without --resume, "
                                 "or with the same settings")
        elif parts.exists():
            shutil.rmtree(parts)
        had_parts = parts.exists()  # an interrupted run's, kept for this resume
        parts.mkdir(exist_ok=True)
        (parts / "settings.json").write_text(json.dumps(settings, sort_keys=True))
    seen = Tally(windows)
    bins, lat_e, lon_e = bin_windows(seen, bin_deg, region)
    if not bins:  # nothing to pool: whatever is at `out` stays, and no parts are left behind
        if parts is not None and not had_parts:  # (an interrupted run's parts stay for a resume)
            shutil.rmtree(parts, ignore_errors=True)
        where = (f" inside the region ({counted(seen.n, 'window')}, all outside it)" if region is not None and seen.n
                 else "")
        kept = f"{out} is left as it was" if out is not None and out.exists() else "nothing written"
        raise NoWindows(f"no windows to pool{where}; {kept}")
    rows = {}
    if parts is not None and resume:
        for f in parts.glob("bin-*.json"):
            row = json.loads(f.read_text())
            rows[(row["iy"], row["ix"])] = row
    keys = sorted(k for k in bins if k not in rows)
    bar = tqdm(total=sum(len(bins[k]) for k in keys), unit="window", disable=not progress, desc="pooling")

    def done(task, row):
        key = (row["iy"], row["ix"])
        rows[key] = row
        if parts is not None:
            tmp = parts / f"bin-{key[0]:05d}-{key[1]:05d}.json.tmp"
            tmp.write_text(json.dumps(row, default=float))
            os.replace(tmp, tmp.with_suffix(""))
        bar.update(len(task[1]))

    try:
        _run_bins([(k, bins[k], spec, model, share, min_windows) for k in keys], fit_bin, workers, dask_address,
                  done)
    finally:
        bar.close()
    ds = _map_dataset(rows, lat_e, lon_e, bin_deg, spec, model, share)
    from importlib.metadata import PackageNotFoundError, version

    try:
        ver = version("driftspec")
    except PackageNotFoundError:
        ver = "unknown"
    ds.attrs.update({"history": f"{pd.Timestamp.now('UTC').isoformat()} {command}".strip(), "source": source,
                     "driftspec_version": ver})
    if out is not None:
        tmp = out.with_name(out.name + ".tmp")
        ds.to_netcdf(tmp)
        os.replace(tmp, out)
        shutil.rmtree(parts, ignore_errors=True)
    return ds


def _map_dataset(rows: dict, lat_e, lon_e, bin_deg, spec, model, share) -> xr.Dataset:
    ny, nx = lat_e.size - 1, lon_e.size - 1
    ds = cf_grid(lat_e, lon_e)

    def grid(col, fill=np.nan):
        a = np.full((ny, nx), fill, float)
        for (iy, ix), row in rows.items():
            v = row.get(col)
            a[iy, ix] = np.nan if v is None else float(v)
        return a

    ds["n_windows"] = (("lat", "lon"), grid("n_windows", 0).astype(np.int32),
                       {"standard_name": "number_of_observations", "long_name": "windows in the pooled fit",
                        "units": "1", "cell_methods": "area: sum"})
    ds["n_tracks"] = (("lat", "lon"), grid("n_tracks", 0).astype(np.int32),
                      {"long_name": "drifters (clusters) in the pooled fit", "units": "1", "cell_methods": "area: sum"})
    units, params = {}, []
    for row in rows.values():
        for k, u in (row.get("units") or {}).items():
            units.setdefault(k, u)
            if k not in params:
                params.append(k)
    for p in params:
        ok = {k: r for k, r in rows.items() if r.get("status") in ("ok", "at_bound")}
        vals = np.full((ny, nx), np.nan)
        ses = np.full((ny, nx), np.nan)
        for (iy, ix), r in ok.items():
            vals[iy, ix] = r.get(p, np.nan)
            ses[iy, ix] = r.get(p + "_se", np.nan)
        ds[p] = (("lat", "lon"), vals, {"long_name": f"pooled estimate of {p} over the windows in the cell",
                                        "units": units[p], "cell_methods": "area: point",
                                        "ancillary_variables": f"{p}_se"})
        ds[p + "_se"] = (("lat", "lon"), ses, {"long_name": f"standard error of the pooled {p} (sandwich, score "
                                                            "summed within drifters)", "units": units[p]})
    ds["heterogeneity_statistic"] = (("lat", "lon"), grid("heterogeneity_statistic"),
                                     {"long_name": "homogeneity statistic (Cochran, score form, scaled): do the cell's "
                                                  "drifters share the parameters",
                                      "units": "1"})
    ds["heterogeneity_df"] = (("lat", "lon"), grid("heterogeneity_df"),
                              {"long_name": "effective degrees of freedom of the heterogeneity statistic "
                                           "(Satterthwaite)", "units": "1"})
    ds["heterogeneity_pvalue"] = (("lat", "lon"), grid("heterogeneity_pvalue"),
                                  {"long_name": "heterogeneity p-value (scaled chi-squared)", "units": "1"})
    summaries = {k: r["anisotropy"] for k, r in rows.items() if isinstance(r.get("anisotropy"), dict)}
    if spec.anisotropic or summaries:
        add_anisotropy_variables(ds, summaries, over="the windows in the cell, from each window's own "
                                                   "(not pooled) anisotropic fit")
    status = np.full((ny, nx), -1, np.int8)
    for (iy, ix), r in rows.items():
        status[iy, ix] = STATUS_FLAGS.index(r["status"]) if r.get("status") in STATUS_FLAGS else len(STATUS_FLAGS) - 1
    ds["pooled_status"] = (("lat", "lon"), status,
                           {"long_name": "status of the pooled fit", "flag_values": np.arange(len(STATUS_FLAGS),
                                                                                              dtype=np.int8),
                            "flag_meanings": " ".join(STATUS_FLAGS), "_FillValue": np.int8(-1)})
    ds.attrs.update({"Conventions": "CF-1.11", "title": "driftspec pooled (composite-likelihood) fits per cell",
                     "bin_size_degrees": float(bin_deg), "share": share,
                     "model": spec.model_name(model) if model is not None else str(_default_model(spec)),
                     "references": "C. Varin, N. Reid, D. Firth, An overview of composite likelihood methods, "
                                   "Statistica Sinica 21, 5-42 (2011)",
                     "pooled_cells": int(sum(1 for r in rows.values() if r.get("status") == "ok"))})
    return ds


__all__ = ["MIN_CLUSTERS", "NUISANCE", "OFFSET", "PooledResult", "PooledWindow", "SHARE_MODES", "STATUS_FLAGS",
           "bin_windows", "check_region", "fit_bin", "heterogeneity_test", "n_simulations", "pool_fit", "pool_map",
           "prepare_pooled_window"]
