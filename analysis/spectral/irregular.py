"""Expected periodogram of velocities made from irregular position fixes: the observation as a linear map.

Fixes at irregular times ``s_j`` (days) are linearly interpolated onto a regular grid of step ``dt``,
differenced into velocities, masked, tapered, optionally demeaned and Fourier transformed. Every step is
linear, so the discrete Fourier transform of the observed velocities is a fixed linear functional of the
true positions ``X(s_j)`` (m)::

    J_k = sum_n h_n (y_n - ybar) exp(-2 pi i k n / N) = sum_j a_j(k) X(s_j) / 86400,
    a_j(k) = sum_n h_n (W_nj - m_j) exp(-2 pi i k n / N)                           (1/day)

with ``W_nj`` the weight of fix ``j`` in velocity sample ``n`` (interpolation weights times the difference
stencil, ``+-1 / (2 dt)`` for the central difference, ``1 / dt`` for the forward one; in 1/day), ``m_j``
its mean over the valid samples (zero without demeaning) and ``h`` the data taper, zero at missing samples
and of unit sum of squares (:func:`~driftspec.analysis.spectral.periodogram.masked_taper`). Each row of
``W`` sums to zero (interpolation weights sum to one, a difference stencil to zero), so ``sum_j a_j = 0``.

The ocean
---------
With the complex velocity ``v(t) = int exp(2 pi i f t) dZ(f)``, ``E|dZ|^2 = S(f) df`` (two-sided density
in (m/s)^2 per cpd, positive ``f`` counterclockwise), the position is ``X(s) = 86400 int (exp(2 pi i f s)
- 1) / (2 pi i f) dZ(f)`` and, the constant dropping out of the zero-sum weights, the periodogram
``I_k = dt |J_k|^2`` (as in :func:`~driftspec.analysis.spectral.likelihood.prepare_window`) has mean::

    E[I_k] = dt * int S(f) K_k(f) df,     K_k(f) = | sum_j a_j(k) exp(2 pi i f s_j) |^2 / (2 pi f)^2

``K_k`` is finite at ``f = 0`` (it is ``|sum_j a_j(k) s_j|^2`` there). (The form with ``N^(-1/2)`` in front
of ``G`` belongs to an untapered series; with the unit-energy taper ``h`` the factor is inside ``a``.)
``K_k`` is the squared Fourier transform of ``g_k(t) = sum_j a_j(k) 1[0 <= t < s_j]``, a function supported
on the fixes' span ``T'``; so on a uniform frequency grid of step ``delta`` the rectangle rule is exact up
to aliasing terms of the integrand's Fourier transform at lags ``>= 1/delta - T'``, which are the velocity
autocovariance there (Poisson summation). Hence the integration grid:

* on the fine bands (near zero frequency and around the inertial range): step ``1 / (4 T')`` (``oversample``),
  ``S`` evaluated at every point. The rule is exact for a density whose autocovariance vanishes beyond lag
  ``3 T'``; a damped oscillation enters there by the density of its autocovariance cut at that lag (less the
  partition's reach), so a peak narrower than the step (damping near its lower bound of 0.001/day, whose
  autocovariance lasts years) is integrated as the window sees it. A Matérn background enters by its plain
  density, exact while its damping is above about 0.1/day on a 30-day window; at 0.03/day the lowest bins are
  off by 8 % and at 0.01/day by a factor of two (a known limit: such a corner lies far below the window's lowest
  frequency, where the damping is barely determined anyway);
* from there to ``quad_max_cpd`` (default 1.5 times the sampling rate, 36 cpd for hourly samples, which
  holds the first alias of the whole fitted band, ``f_k +- 1/dt``): step ``1 / (3 T')``, and ``S`` is
  smooth (a power law and Lorentzian tails), so it is represented by a cubic spline in ``log |f|`` on
  about 60 nodes and the kernel is integrated against each spline basis function once, at build time
  (product integration). A smooth partition of width ``transition_cpd`` (0.25 cpd) joins the two
  grids, so both integrands go smoothly to zero where their grid ends and the Poisson argument holds;
* beyond ``quad_max_cpd`` the red spectrum is continued as a power law (slope from the two outermost
  nodes), and fixes far apart in time decorrelate there: only the diagonal ``sum_j |a_j(k)|^2`` of
  ``|sum_j a_j exp(2 pi i f s_j)|^2`` is kept (the tail is a white position noise of the variance
  ``int_{|f| > F} S / (2 pi f)^2 df``). For a red spectrum this is well below 1 % of ``E[I_k]`` anywhere in
  the band (checked in the tests against a quadrature carried to three times as far).

The aliasing of the red spectrum from above the grid's Nyquist frequency is therefore in ``E[I_k]`` up
to 1.5 sampling rates exactly, and beyond in the white-noise form. Each evaluation is one product of the
kernel matrix (band x nodes, about 1080 x 3300 for a 60-day hourly window) with the spectral density
on the nodes, and its derivatives (central differences of the density in the optimiser's coordinates).

Building the kernel: ``K_k(f) = |G_k(f)|^2 / (2 pi f)^2`` with ``G_k(f) = sum_j a_j(k) exp(2 pi i f s_j)`` (``a_j(k)``
the tapered, demeaned transform of fix ``j``'s weights at bin ``k``, below). Both grids are uniform in ``f``, so
``G_k`` on a grid of step ``d`` is a type-1 non-uniform FFT of the strengths ``a_j(k)`` at the points
``x_j = 2 pi d s_j`` (finufft, one transform per band bin in one call), to a requested 1e-10 relative
error, about ten times faster than summing the exponentials.

Position error
--------------
Independent errors ``eps_j`` of standard deviation ``sigma_j`` (m) per component (``E|eps_j|^2 =
2 sigma_j^2``) add::

    E_noise[I_k] = dt * 2 / 86400^2 * sum_j sigma_j^2 |a_j(k)|^2

either with the given per-fix ``sigma_j`` (``noise="fixed"``) or with one fitted ``sigma`` for every fix
(``noise="fitted"``: parameter ``position_noise``, m, appended to the family's parameters).

Complementary moment (anisotropic models)
-----------------------------------------
With ``E[dZ(f) dZ(f')] = C(f) delta(f + f') df`` (``C`` the complementary spectrum, even in ``f``), and because
the weights are real, ``a_j(-k) = conj a_j(k)`` and so ``G_{-k}(-f) = conj G_k(f)``, with ``G_k(f) = sum_j a_j(k)
exp(2 pi i f s_j)``::

    dt E[J_k J_{-k}] = dt * int C(f) K_k(f) df

with the same kernel ``K_k``. For ``C = gamma S_M`` (an anisotropic Matérn part) this is ``gamma`` times that
component's own kernel integral (:meth:`IrregularObservation.component_in_band`); white position errors, equal
and independent in both coordinates, have no complementary part.

Modulated (latitude-following) components are treated as stationary at the window's mean inertial
frequency (their ``spectral_density`` with ``context.inertial_frequency_cpd``); the exact treatment folds
the modulation into ``g_k`` and is not done here.

References
----------
"The debiased Whittle likelihood". Biometrika 106, 251-266 (2019). doi:10.1093/biomet/asy071
Percival, D. B., Walden, A. T. (1993). Spectral Analysis for Physical Applications. Cambridge University
Press. doi:10.1017/CBO9780511622762 (tapered periodogram, its expectation as a kernel-weighted spectrum).
Davis, P. J., Rabinowitz, P. (1984). Methods of Numerical Integration, 2nd ed. Academic Press (product
integration; the trapezoidal rule for band-limited integrands).
Barnett, A. H., Magland, J., af Klinteberg, L. (2019). "A parallel nonuniform fast Fourier transform library based
on an 'exponential of semicircle' kernel". SIAM J. Sci. Comput. 41, C479-C504. doi:10.1137/18M120885X (finufft).
"""

from __future__ import annotations

import contextlib
import functools
import threading

import finufft
import numpy as np
import scipy.fft
import scipy.sparse
from scipy.interpolate import BSpline, make_interp_spline
from threadpoolctl import ThreadpoolController

from ..conventions import SECONDS_PER_DAY
from ..models.base import FitContext, ModelFamily, Parameter, leading_zero_frequency_jacobian
from ..models.inertial import Inertial, cut_density_change
from ..models.observation import PositionNoise
from .periodogram import masked_taper

NOISE_MODES = ("auto", "fixed", "fitted", "none")
#: the fitted white position noise (m per component): the same parameter as the regular observation model's
POSITION_NOISE: Parameter = PositionNoise.parameters[0]


@contextlib.contextmanager
def one_blas_thread():
    """A context in which BLAS runs on one thread, so the kernel product sums in the same order everywhere (a
    serial run and a process pool then give bit-identical fits). Nested and concurrent uses share one limit: the
    first to enter sets it and the last to leave restores the library's setting, so a window's fit enters it once
    (:func:`~driftspec.analysis.fitting.core.fit_window`) and its hundred kernel products inside run free of
    threadpoolctl's bookkeeping (about 3 % of a fit otherwise)."""
    global _BLAS_USERS, _BLAS_LIMIT
    with _BLAS_LOCK:
        if _BLAS_USERS == 0:
            _BLAS_LIMIT = _CONTROLLER.limit(limits=1, user_api="blas")
        _BLAS_USERS += 1
    try:
        yield
    finally:
        with _BLAS_LOCK:
            _BLAS_USERS -= 1
            if _BLAS_USERS == 0:
                _BLAS_LIMIT.restore_original_limits()
                _BLAS_LIMIT = None


_CONTROLLER = ThreadpoolController()
_BLAS_LOCK = threading.Lock()
_BLAS_USERS = 0  # contexts inside one_blas_thread, in all threads
_BLAS_LIMIT = None
#: a fitted factor on the given per-fix position errors (their fix-by-fix structure kept, their level fitted)
ERROR_SCALE = Parameter("position_error_scale", "1", 0.05, 20.0, "factor on the given per-fix position errors")
#: requested relative accuracy of the non-uniform FFT that builds the kernel
_NUFFT_EPS = 1e-10


#: the grids' steps are at most 1 / (oversample x this), days (short windows get the steps of a longer one)
_MIN_GRID_SPAN_DAYS = 30.0
#: the spectrum's structure near zero frequency (a Matérn corner) is resolved on the fine grid up to here, cpd
_LOW_BAND_CPD = 0.3
#: a peak's flanks are resolved on the fine grid this far beyond the range its centre may take, cpd
_PEAK_MARGIN_CPD = 0.3
#: the widest range of a fitted oscillation frequency (the constant-frequency inertial family's bounds), cpd
_INERTIAL_MAX_CPD = 3.0


def _smooth_step(x):
    """1 for x <= 0, 0 for x >= 1, three times continuously differentiable (the degree-7 smoothstep)."""
    x = np.clip(x, 0.0, 1.0)
    return 1.0 - x**4 * (35.0 - 84.0 * x + 70.0 * x**2 - 20.0 * x**3)


def _merge_bands(bands, transition, fmax):
    """Sorted, clipped to ``[-fmax, fmax]``, and merged where their transitions would overlap."""
    out = []
    for lo, hi in sorted((max(lo, -fmax), min(hi, fmax)) for lo, hi in bands):
        if hi <= lo:
            continue
        if out and lo - out[-1][1] < 2 * transition:
            out[-1] = (out[-1][0], max(out[-1][1], hi))
        else:
            out.append((lo, hi))
    return out


def _partition(f, bands, transition):
    """``psi(f)``: 1 on the bands, falling smoothly to 0 within ``transition`` outside each."""
    psi = np.zeros(f.shape)
    for lo, hi in bands:
        dist = np.maximum(lo - f, f - hi)
        psi += _smooth_step(np.maximum(dist, 0.0) / transition)
    return psi


def _gaps(bands, fmax):
    """The stretches of ``[-fmax, fmax]`` between the bands (never containing 0), as (lo, hi)."""
    edges = [-fmax] + [x for b in bands for x in b] + [fmax]
    out = []
    for lo, hi in zip(edges[::2], edges[1::2]):
        if hi - lo > 1e-12:
            if lo < 0 < hi:
                raise ValueError("the fine bands must contain zero frequency")
            out.append((lo, hi))
    return out


def interpolation_weights(fix_times_days, times_days):
    """Linear-interpolation weights of ``times_days`` between sorted fix times, as ``np.interp`` uses them.

    Returns ``(left, w)``: the value at ``times_days[i]`` is ``(1 - w[i]) x[left[i]] + w[i] x[left[i] + 1]``.
    Raises ``ValueError`` for a time outside the fixes' span.
    """
    s = np.asarray(fix_times_days, float)
    t = np.asarray(times_days, float)
    eps = 1e-9 * max(1.0, float(np.abs(s).max()))
    if t.size and (t.min() < s[0] - eps or t.max() > s[-1] + eps):
        bad = t[(t < s[0] - eps) | (t > s[-1] + eps)][0]
        raise ValueError(f"a valid velocity needs the position at {bad:.6g} days, outside the fixes' span "
                         f"[{s[0]:.6g}, {s[-1]:.6g}]")
    left = np.clip(np.searchsorted(s, t, side="right") - 1, 0, s.size - 2)
    w = np.clip((t - s[left]) / (s[left + 1] - s[left]), 0.0, 1.0)
    return left, w


class IrregularObservation:
    """The expected periodogram of one window of velocities made from irregular fixes (module docstring).

    Built once per window; then :meth:`expected_in_band` costs one matrix product per evaluation.

    Parameters
    ----------
    fix_times_days : array_like
        Fix times in days relative to the first grid sample (strictly increasing). Fixes before 0 and
        after the last sample are needed when the first and last velocities use positions there.
    dt_days : float
        Grid step, days.
    n : int
        Number of velocity samples in the window.
    valid : array_like of bool, optional
        Validity of each velocity sample (what ``prepare_window`` gets as ``mask``); default all valid.
        Every valid sample must have its positions inside the fixes' span.
    operator : {"central", "forward"}
        ``central``: ``(x[n+1] - x[n-1]) / (2 dt)`` from positions at grid times ``(n +- 1) dt``;
        ``forward``: ``(x[n+1] - x[n]) / dt`` from positions at ``n dt`` and ``(n + 1) dt``.
    taper : None, str or array_like
        Data taper as ``prepare_window`` takes it (``None``, ``"hann"``, ``"dpss"`` or an array of length
        ``n``, e.g. ``PreparedWindow.taper``); it is masked and normalised to unit sum of squares.
    position_error_m : array_like, optional
        Standard deviation of each fix's error per component, m.
    noise : {"auto", "fixed", "fitted", "none"}
        ``fixed`` uses ``position_error_m``; ``fitted`` appends the parameter ``position_noise`` (m, white,
        the same for every fix); ``auto`` is ``fixed`` when errors are given and ``fitted`` otherwise.
    band_index : array_like of int, optional
        FFT-order indices of the fitted band (pass ``PreparedWindow.band_index``). Default: every nonzero
        frequency with ``|f| <= max_freq_cpd``.
    max_freq_cpd : float, optional
        Top of the default band, cpd (default the Nyquist frequency ``0.5 / dt_days``).
    demean : bool
        The window mean of the valid samples is removed before the periodogram (as ``prepare_window``
        does); ``False`` gives the expectation without it.
    fine_band_cpd, transition_cpd, quad_max_cpd : float
        Integration grid (module docstring); ``quad_max_cpd`` defaults to ``1.5 / dt_days``.
    oversample : float
        The fine grid's step is ``1 / (oversample T')``, ``T'`` the span of the fixes used.

    Examples
    --------
    >>> import numpy as np
    >>> from driftspec.analysis.models import Matern, FitContext
    >>> t = np.sort(np.random.default_rng(0).uniform(-0.2, 30.2, 200))
    >>> obs = IrregularObservation(t, 1 / 24, 720, noise="none", max_freq_cpd=9.0)
    >>> e, de = obs.expected_in_band(Matern(), [0.02, 1.2, 1.0], FitContext(dt_days=1 / 24))
    >>> e.shape, de.shape
    ((540,), (3, 540))
    """

    def __init__(self, fix_times_days, dt_days: float, n: int, valid=None, operator: str = "central",
                 taper=None, position_error_m=None, *, noise: str = "auto", band_index=None,
                 max_freq_cpd: float | None = None, demean: bool = True,
                 inertial_frequency_cpd: float | None = None, fine_bands_cpd=None, transition_cpd: float = 0.25,
                 quad_max_cpd: float | None = None, oversample: float = 4.0, coarse_oversample: float = 1.5,
                 log_node_step: float = 0.05):
        s = np.asarray(fix_times_days, float).ravel()
        n = int(n)
        dt = float(dt_days)
        if not (np.isfinite(dt) and dt > 0):
            raise ValueError(f"dt_days must be positive, got {dt_days!r}")
        if n < 3:
            raise ValueError(f"need at least 3 grid samples, got {n}")
        if s.size < 2 or not np.all(np.isfinite(s)):
            raise ValueError("need at least two finite fix times")
        if np.any(np.diff(s) <= 0):
            raise ValueError("fix times must be strictly increasing")
        if operator not in ("central", "forward"):
            raise ValueError(f"operator must be 'central' or 'forward', got {operator!r}")
        if noise not in NOISE_MODES:
            raise ValueError(f"noise must be one of {NOISE_MODES}, got {noise!r}")
        sigma = None
        if position_error_m is not None:
            sigma = np.broadcast_to(np.asarray(position_error_m, float), s.shape).copy()
            if not np.all(np.isfinite(sigma) & (sigma >= 0)):
                raise ValueError("position_error_m must be finite and non-negative")
        if noise == "auto":
            noise = "fixed" if sigma is not None else "fitted"
        if noise == "fixed" and sigma is None:
            raise ValueError("noise='fixed' needs position_error_m")
        valid = np.ones(n, bool) if valid is None else np.asarray(valid, bool).ravel()
        if valid.shape != (n,):
            raise ValueError(f"valid must have length n={n}")
        if valid.sum() < 2:
            raise ValueError("fewer than two valid samples")
        if oversample < 2 or coarse_oversample < 1.5 or transition_cpd <= 0 or not 0 < log_node_step <= 0.5:
            raise ValueError("need oversample >= 2, coarse_oversample >= 1.5, transition_cpd > 0 and "
                             "0 < log_node_step <= 0.5")
        self.n, self.dt_days, self.operator, self.noise, self.demean = n, dt, operator, noise, demean
        self.valid = valid
        self.taper = masked_taper(n, valid, taper)
        freq = scipy.fft.fftfreq(n, d=dt)
        if band_index is None:
            top = 0.5 / dt if max_freq_cpd is None else float(max_freq_cpd)
            band_index = np.flatnonzero((np.abs(freq) <= top + 1e-12) & (freq != 0))
        self.band_index = np.asarray(band_index, np.int64).ravel()
        if self.band_index.size == 0 or self.band_index.min() < 0 or self.band_index.max() >= n:
            raise ValueError("band_index must be non-empty FFT-order indices below n")
        self.freq_cpd = freq[self.band_index]

        # --- the linear map: velocity sample n <- fixes (W, 1/day), on the fixes it uses ---------------
        rows = np.flatnonzero(valid)
        if operator == "central":
            t_a, t_b, scale = (rows - 1) * dt, (rows + 1) * dt, 1.0 / (2 * dt)
        else:
            t_a, t_b, scale = rows * dt, (rows + 1) * dt, 1.0 / dt
        la, wa = interpolation_weights(s, t_a)
        lb, wb = interpolation_weights(s, t_b)
        r4 = np.repeat(rows, 4)
        c4 = np.stack([lb, lb + 1, la, la + 1], axis=1).ravel()
        v4 = scale * np.stack([1 - wb, wb, -(1 - wa), -wa], axis=1).ravel()
        w = scipy.sparse.csr_matrix((v4, (r4, c4)), shape=(n, s.size))
        w.sum_duplicates()
        w.eliminate_zeros()
        used = np.flatnonzero(np.diff(w.tocsc().indptr) > 0)
        self.fix_index = used  # the fixes the window's velocities use (indices into fix_times_days)
        self.weights = w[:, used].tocsr()  # W, 1/day, shape (n, len(used))
        s_used = s[used]
        self._s = s_used - 0.5 * (s_used[0] + s_used[-1])  # centred: the zero-sum weights make the origin free
        self.span_days = float(s_used[-1] - s_used[0])

        # --- a_j(k) and the diagonal kernel sum_j |a_j(k)|^2 ------------------------------------------
        self._a = np.ascontiguousarray(self._fourier_weights(self.band_index))  # (band, fixes), 1/day
        a2 = np.abs(self._a) ** 2
        self._diag = a2.sum(axis=1)  # sum_j |a_j(k)|^2, day^-2
        #: ``E_noise[I_k]`` per unit variance (m^2) of white position noise on each component
        self.noise_kernel = dt * 2.0 / SECONDS_PER_DAY**2 * self._diag
        self.fixed_noise = None
        self.sigma_used = None if sigma is None else sigma[used]  # given errors of the fixes used, m
        if sigma is not None:
            self.fixed_noise = dt * 2.0 / SECONDS_PER_DAY**2 * (a2 @ sigma[used] ** 2)

        # --- integration grid and kernel ---------------------------------------------------------------
        tspan = max(self.span_days, n * dt)
        fmax = 1.0 / dt if quad_max_cpd is None else float(quad_max_cpd)
        bands = _merge_bands(self._fine_bands(fine_bands_cpd, inertial_frequency_cpd, dt), transition_cpd, fmax)
        self.fine_bands_cpd = bands
        # fine part: rectangle rule at every point, weight psi (1 on the bands, smoothly 0 a transition away)
        # at least 30 days' worth of span, so that short windows too have an exact lag beyond their kernel's reach
        d1 = 1.0 / (oversample * max(tspan, _MIN_GRID_SPAN_DAYS))
        q1 = int(np.ceil(fmax / d1))
        grid1 = np.arange(-q1, q1 + 1) * d1
        psi1 = _partition(grid1, bands, transition_cpd)
        keep = psi1 > 0
        fine, w_fine = grid1[keep], d1 * psi1[keep]
        self._fine_count = fine.size
        # the lag up to which the fine rule is exact: its alias lag 1/d1 less the kernel's span and the partition's
        # reach in lag (about two over its transition width)
        reach = tspan + 2.0 / transition_cpd  # the kernel's reach in lag, with the partition's
        cut = 1.0 / d1 - reach
        # cutting at L keeps the integral only when L >= reach (the cut-off autocovariance never meets the kernel);
        # with the steps' 30-day floor this holds for every window at the default oversample of 4
        self._truncation_lag_days = cut if cut >= reach else None
        kernels = [self._kernel_columns(d1, np.arange(-q1, q1 + 1)[keep], w_fine)]
        nodes_all = [fine]
        # smooth part: a cubic spline in log|f| on each stretch between the bands, integrated with weight 1 - psi
        d2 = 1.0 / (coarse_oversample * max(tspan, _MIN_GRID_SPAN_DAYS))
        q2 = int(np.floor(fmax / d2))
        grid2 = np.arange(-q2, q2 + 1) * d2
        w2 = d2 * (1.0 - _partition(grid2, bands, transition_cpd))
        p2 = self._power(d2, q2)  # |G_k|^2 on the whole coarse grid, sliced per stretch below
        self._outer = []
        start = fine.size
        for lo, hi in _gaps(bands, fmax):
            inside = (grid2 > lo) & (grid2 < hi) & (w2 > 0)
            a_, b_ = (lo, hi) if lo > 0 else (-hi, -lo)  # |f| range of the stretch
            sign = 1.0 if lo > 0 else -1.0
            count = max(4, int(np.ceil(np.log(b_ / a_) / log_node_step)) + 1)
            nodes = np.geomspace(a_, b_, count)
            # the interpolating spline's cardinal functions, as B-splines (4 nonzero per point) times coefficients
            spline = make_interp_spline(np.log(nodes), np.eye(count), k=3)
            basis = (BSpline.design_matrix(np.log(np.abs(grid2[inside])), spline.t, 3), spline.c)
            kernels.append(self._kernel_columns(d2, np.flatnonzero(inside) - q2, w2[inside], basis=basis,
                                                power=(p2, q2)))
            nodes_all.append(sign * nodes)
            if np.isclose(b_, fmax):  # the outermost stretch of one side: the tail continues from its last nodes
                self._outer.append((start + count - 1, start + count - 2))
            start += count
        self._tail = (fmax, float(np.log(nodes[-1] / nodes[-2]))) if self._outer else None
        self.kernel = np.ascontiguousarray(np.concatenate(kernels, axis=1))  # (band, nodes), dt included
        self.nodes_cpd = np.concatenate(nodes_all)

    @staticmethod
    def _fine_bands(fine_bands_cpd, inertial_frequency_cpd, dt):
        """Where the spectrum may have structure finer than a spline in log|f| resolves (see __init__)."""
        if fine_bands_cpd is not None:
            bands = [(float(lo), float(hi)) for lo, hi in fine_bands_cpd]
            if any(not hi > lo for lo, hi in bands):
                raise ValueError("each fine band must be (low, high) with low < high, cpd")
            return [*bands, (-_LOW_BAND_CPD, _LOW_BAND_CPD)]
        if inertial_frequency_cpd is None:
            return [(-_INERTIAL_MAX_CPD - _PEAK_MARGIN_CPD, _INERTIAL_MAX_CPD + _PEAK_MARGIN_CPD)]
        lo, hi = Inertial().bounds(FitContext(dt_days=dt, inertial_frequency_cpd=float(inertial_frequency_cpd)))[1]
        return [(-_LOW_BAND_CPD, _LOW_BAND_CPD), (lo - _PEAK_MARGIN_CPD, hi + _PEAK_MARGIN_CPD)]

    def _fourier_weights(self, index=None):
        """``a_j(k)``: how fix ``j`` enters the tapered, demeaned transform of the window's velocities at the Fourier
        frequencies ``index`` (FFT order; default all), shape (frequencies, fixes used), 1/day."""
        dense = self.weights.toarray()
        index = slice(None) if index is None else index
        a = scipy.fft.fft(self.taper[:, None] * dense, axis=0)[index]
        if self.demean:  # each fix's mean weight over the valid samples (where the taper lives) x the taper's transform
            mean = (self.valid / self.valid.sum()) @ dense
            a -= np.outer(scipy.fft.fft(self.taper)[index], mean)
        return a

    @functools.cached_property
    def _noise_power_all(self):
        """``|a_j(k)|^2`` at every Fourier frequency (FFT order) x fixes used, day^-2 (the band's rows are in
        ``_a``; these are for drawing the noise beyond the band)."""
        a = self._fourier_weights()
        return a.real**2 + a.imag**2

    def noise_periodogram(self, position_error_m) -> np.ndarray:
        """``E[I_k]`` of white position noise alone, in (m/s)^2/cpd, at every Fourier frequency of the window (FFT
        order, ``n`` values): errors ``position_error_m`` (m on each component; one value, or one per fix used,
        ``fix_index``) carried through the interpolation between fixes, the difference, the taper and the mean's
        removal. Inside the band this is the noise term of :meth:`expected_in_band`; beyond it, what the window's
        velocities hold of the noise (far below a difference of independent grid positions: interpolated positions
        between fixes are smooth)."""
        sigma = np.broadcast_to(np.asarray(position_error_m, float), (self.fix_index.size,))
        return self.dt_days * 2.0 / SECONDS_PER_DAY**2 * (self._noise_power_all @ sigma**2)

    # ------------------------------------------------------------------------------------------------
    def _power(self, step, qmax):
        """``|G_k(q * step)|^2`` for ``q = -qmax..qmax`` (band x 2 qmax + 1), at ``q = 0`` the limit
        ``|sum_j a_j(k) s_j|^2`` of ``|G_k(f)|^2 / (2 pi f)^2`` instead: ``G_k`` by a type-1 non-uniform FFT over the
        fixes.

        The points ``2 pi step s_j`` lie within +-pi / oversample (the grids' steps are at most 1 / (1.5 span) and
        ``s`` is centred), so nothing folds; one thread, so a serial run and a process pool agree to the bit."""
        x = 2 * np.pi * step * self._s
        if np.abs(x).max() >= np.pi:
            raise ValueError("frequency step too coarse for the window's span")
        m = 2 * int(qmax) + 1
        pos, partner = self._conjugate_pairs
        rows = slice(None) if pos is None else pos
        g = finufft.nufft1d1(x, self._a[rows], n_modes=m, eps=_NUFFT_EPS, isign=1, nthreads=1)
        g[:, qmax] = self._a[rows] @ self._s
        if pos is None:
            return g.real ** 2 + g.imag ** 2
        # the weights are real, so a_j(-k) = conj a_j(k) and |G_{-k}(f)| = |G_k(-f)|: transform the positive bins
        # only and read their partners' power off the mirrored grid (half the work)
        power = np.empty((self._a.shape[0], m))
        power[pos] = g.real ** 2 + g.imag ** 2
        neg = np.flatnonzero(partner >= 0)
        power[neg] = power[partner[neg], ::-1]
        return power

    @functools.cached_property
    def _conjugate_pairs(self):
        """Rows of the positive band bins, and for each row the row of its mirror bin ``n - k`` (-1 for the
        positive rows); ``(None, None)`` unless the band's negative bins mirror its positive ones one to one."""
        k = self.band_index
        row_of = {int(v): i for i, v in enumerate(k)}
        pos, neg = np.flatnonzero(2 * k < self.n), np.flatnonzero(2 * k > self.n)
        partner = np.full(k.size, -1)
        partner[neg] = [row_of.get(int(self.n - k[i]), -1) for i in neg]
        if len(pos) != len(neg) or np.any(2 * k == self.n) or np.any(partner[neg] < 0) \
                or np.unique(partner[neg]).size != neg.size:
            return None, None
        return pos, partner

    def _kernel_columns(self, step, q, weight, basis=None, power=None):
        """``dt * weight_q * K_k(q * step)`` (band x points), or integrated against ``basis`` (band x nodes), given as
        ``(design, coefficients)``: the functions' values at the points are ``design @ coefficients``, with ``design``
        a sparse B-spline design matrix (the product is taken in that order, cheaper than with the dense values).

        ``K_k(f) = |G_k(f)|^2 / (2 pi f)^2``: the rows of the weights sum to zero, so the ``-1`` of
        ``(exp(2 pi i f s_j) - 1) / (2 pi i f)`` drops out; at ``f = 0`` the limit ``|sum_j a_j(k) s_j|^2``.
        ``power`` is ``(|G|^2, qmax)`` from :meth:`_power` when it is already computed.
        """
        q = np.asarray(q, np.int64)
        if power is None:
            qmax = int(np.abs(q).max())
            power = (self._power(step, qmax), qmax)
        p, qmax = power
        k = p[:, q + qmax]  # (band, points), a copy
        zero = q == 0
        f = q * step
        scale = 1.0 / np.where(zero, 1.0, 2 * np.pi * f) ** 2
        k *= self.dt_days * weight * scale
        if basis is None:
            return k
        design, coefficients = basis
        with one_blas_thread():  # the same summation order in a serial run and in a process pool
            return (design.T @ k.T).T @ coefficients

    # ------------------------------------------------------------------------------------------------
    def parameters(self, family: ModelFamily) -> tuple[Parameter, ...]:
        """The parameters ``theta`` holds for :meth:`expected_in_band`: the family's, then
        ``position_noise`` (m) when the noise is fitted."""
        return tuple(family.parameters) + ((POSITION_NOISE,) if self.noise == "fitted" else ())

    def _tail_integral(self, s_last, s_prev):
        """``int_{F}^{inf} S / (2 pi f)^2 df`` for ``S`` continued as a power law, and its derivatives in
        ``s_last = S(F)`` and ``s_prev = S(F / r)`` (arrays over columns)."""
        fmax, log_ratio = self._tail
        s_last = max(float(s_last), 1e-300)
        s_prev = max(float(s_prev), 1e-300)
        p = np.log(s_prev / s_last) / log_ratio  # S ~ f^(-p) beyond the last node
        c = 1.0 / (4 * np.pi**2 * fmax)  # int_F^inf (f/F)^(-p) / (2 pi f)^2 df = c / (p + 1)
        if p <= 0.0:  # not red at the top: a flat continuation (bounded, and the tail is negligible then)
            return c * s_last, c, 0.0
        val = c * s_last / (p + 1)
        return val, val / s_last * (1 + 1 / ((p + 1) * log_ratio)), -val / ((p + 1) * log_ratio * s_prev)

    def _density_stack(self, family, theta, context, jacobian):
        """``S`` at the nodes and, optionally, ``dS/dx`` (rows) in the optimiser's coordinates (exact where the
        family has them, else central differences: ``ModelFamily._spectral_density_jacobian``).

        On the fine grid a damped oscillation enters by the density of its autocovariance cut at the lag where the
        grid's rectangle rule stays exact
        (:func:`~driftspec.analysis.models.inertial.lag_truncated_lorentzian_jacobian`), so a peak narrower than the
        grid step is integrated as the window sees it."""
        if not jacobian:
            dens, jac = np.real(family.spectral_density(theta, self.nodes_cpd, context)), None
        else:
            dens, jac = family.spectral_density_jacobian(theta, self.nodes_cpd, context)
        if self._truncation_lag_days is None:
            return dens, jac
        fine = slice(0, self._fine_count)
        theta = np.asarray(theta, float)
        for comp, sl in family.components():
            change = cut_density_change(comp, theta[sl], self.nodes_cpd[fine], context, self._truncation_lag_days)
            if change is None:
                continue
            dens = dens.copy() if jac is None else dens
            dens[fine] += change[0]
            if jac is not None:
                jac[sl, fine] += change[1]
        return dens, jac

    def _kernel_integral(self, family, theta, context, jacobian):
        """``dt int S K_k df`` over the band (column 0) and its derivatives in the optimiser's coordinates (the
        other columns): the kernel product plus the tail beyond ``quad_max_cpd``, no position noise."""
        p_model = len(family.parameters)
        dens, jac = self._density_stack(family, theta, context, jacobian)
        cols = dens[:, None] if jac is None else np.concatenate([dens[:, None], jac[:p_model].T], axis=1)
        with one_blas_thread():  # the same sums in every process, and faster than threads on a busy machine
            out = self.kernel @ cols  # (band, 1 + p_model)
        if self._tail is not None:
            tot = np.zeros(cols.shape[1])
            for last, prev in self._outer:
                val, d_last, d_prev = self._tail_integral(dens[last], dens[prev])
                tot[0] += val
                if jac is not None:
                    tot[1:] += d_last * jac[:p_model, last] + d_prev * jac[:p_model, prev]
            out += np.outer(self.dt_days * self._diag, tot)
        return out

    def component_in_band(self, component: ModelFamily, theta, context: FitContext, jacobian: bool = True):
        """``dt int S_c(f) K_k(f) df`` of one ocean component alone (no position noise), over the band in band
        order, and its derivatives in the component's optimiser coordinates.

        This is also the complementary expectation per unit ``gamma``: for a real-linear observation (real
        weights ``W_nj``) ``G_{-k}(-f) = conj G_k(f)``, so a complementary spectrum ``C(f) = gamma S_c(f)`` (``S_c``
        even) gives ``E[J_k J_{-k}] = gamma dt int S_c K_k df`` with the same kernel ``K_k`` (the bivariate
        likelihood's ``X(k)``, :mod:`driftspec.analysis.spectral.bivariate`); white position errors equal in
        both coordinates have no complementary part.

        Returns
        -------
        e : ndarray (band,)
            (m/s)^2 per cpd.
        de : ndarray (component parameters, band)
            Only when ``jacobian``.
        """
        theta = np.asarray(theta, float)
        if theta.shape != (len(component.parameters),):
            raise ValueError(f"theta must have {len(component.parameters)} values ({', '.join(component.names)})")
        out = self._kernel_integral(component, theta, context, jacobian)
        e = out[:, 0].copy()
        return (e, np.ascontiguousarray(out[:, 1:].T)) if jacobian else e

    def expected_in_band(self, family: ModelFamily, theta, context: FitContext, band_index=None,
                         jacobian: bool = True):
        """``E[I_k]`` over the band and ``dE/dx`` for the optimiser's coordinates, in band order.

        Parameters
        ----------
        family : ModelFamily
            The ocean model (not wrapped in an observation model: differencing and noise are here).
        theta : array_like
            Natural units, in the order of :meth:`parameters` (the family's, then ``position_noise`` when
            the noise is fitted).
        context : FitContext
            Passed to ``family.spectral_density``.
        band_index : array_like of int, optional
            Must equal the band the operator was built for (``None`` for that band).
        jacobian : bool
            Also return ``dE/dx`` (``x = log(theta)`` for log-scale parameters, ``theta`` otherwise).

        Returns
        -------
        e : ndarray (band,)
            ``E[I_k]``, (m/s)^2 per cpd, at ``freq_cpd`` (FFT order of ``band_index``).
        de : ndarray (parameters, band)
            Its derivatives (only when ``jacobian``).
        """
        if band_index is not None and not np.array_equal(np.asarray(band_index), self.band_index):
            raise ValueError("band_index differs from the band this operator was built for")
        theta = np.asarray(theta, float)
        p_model = len(family.parameters)
        p_all = p_model + (self.noise == "fitted")
        if theta.shape != (p_all,):
            raise ValueError(f"theta must have {p_all} values ({', '.join(q.name for q in self.parameters(family))})")
        out = self._kernel_integral(family, theta[:p_model], context, jacobian)
        e = out[:, 0].copy()
        de = np.zeros((p_all, e.size)) if jacobian else None
        if jacobian:
            de[:p_model] = out[:, 1:].T
        if self.noise == "fixed":
            e += self.fixed_noise
        elif self.noise == "fitted":
            en = theta[-1] ** 2 * self.noise_kernel
            e += en
            if jacobian:
                de[-1] = 2.0 * en  # d/d log(sigma)
        return (e, de) if jacobian else e

    def expected(self, family: ModelFamily, theta, context: FitContext) -> np.ndarray:
        """``E[I_k]`` over the band without derivatives."""
        return self.expected_in_band(family, theta, context, jacobian=False)


class IrregularlyObserved(ModelFamily):
    """An ocean model family seen through one window's :class:`IrregularObservation`: what the debiased Whittle
    likelihood fits for a window of velocities made from irregular fixes.

    Its parameters are the ocean family's, then ``position_noise`` (m) when the noise is fitted. The expected
    periodogram comes from the operator (:meth:`expected_in_band`, which
    :func:`~driftspec.analysis.spectral.likelihood.expected_in_band` defers to); the continuous densities, the
    zero-frequency density (diffusivity), derived quantities and bounds are the ocean family's. There is no
    autocovariance of the observed series to simulate from, so ``simulable`` is False (the fit then reports
    Fisher-information errors).
    """

    simulable = False

    def __init__(self, base: ModelFamily, operator: IrregularObservation):
        self.base = base
        self.operator = operator
        self.name = base.name
        self._p = len(base.parameters)
        # given per-fix errors keep their fix-by-fix structure, with one fitted scale for their level (reported
        # accuracies of satellite fixes are nominal classes, not measured standard deviations)
        self._scaled = operator.noise == "fixed"
        self.parameters = operator.parameters(base) + ((ERROR_SCALE,) if self._scaled else ())
        self.modulated = False  # the operator treats a latitude-following part at the mean inertial frequency

    def expected_in_band(self, theta, prep, context, jacobian: bool = True):
        """``E[I_k]`` and ``dE/dx`` over the window's band (``prep`` must be the window the operator was built on);
        ``E[I_k]`` alone when not ``jacobian``."""
        theta = self.check_theta(theta)
        if not self._scaled:
            return self.operator.expected_in_band(self.base, theta, context, prep.band_index, jacobian)
        out = self.operator.expected_in_band(self.base, theta[:-1], context, prep.band_index, jacobian)
        noise = (theta[-1] ** 2 - 1.0) * self.operator.fixed_noise  # the operator added the unscaled noise
        if not jacobian:
            return out + noise
        e, de = out
        return e + noise, np.vstack([de, 2.0 * theta[-1] ** 2 * self.operator.fixed_noise])

    def _spectral_density(self, theta, freq_cpd, context):
        return self.base._spectral_density(theta[: self._p], freq_cpd, context)

    def noise_spectral_density(self, theta, freq_cpd, context):
        """The fitted position noise's expected periodogram at the window's Fourier frequency nearest each of
        ``freq_cpd``, through the interpolation between the window's fixes
        (:meth:`IrregularObservation.noise_periodogram`), for drawing a noise floor beside the periodogram;
        (m/s)^2/cpd, zeros without a noise model, NaN above the grid's Nyquist frequency."""
        op = self.operator
        theta = np.asarray(theta, float)
        f = np.asarray(freq_cpd, float)
        k = np.rint(f * op.n * op.dt_days).astype(np.int64) % op.n
        beyond = np.abs(f) > 0.5 / op.dt_days * (1 + 1e-9)  # above the grid's Nyquist frequency: NaN, not an alias
        if self._scaled:
            e = theta[-1] ** 2 * op.noise_periodogram(op.sigma_used)[k]
        elif op.noise == "fitted":
            e = op.noise_periodogram(max(float(theta[self._p]), POSITION_NOISE.lower))[k]
        else:
            e = np.zeros(k.shape)
        return np.where(beyond, np.nan, e)

    def _zero_frequency_density(self, theta, context):
        return self.base._zero_frequency_density(theta[: self._p], context)

    def _zero_frequency_density_jacobian(self, theta, context):
        return leading_zero_frequency_jacobian(self.base, theta, context)

    def _derived(self, theta, context):
        return self.base._derived(theta[: self._p], context)

    def bounds(self, context):
        extra = self.parameters[self._p:]
        return self.base.bounds(context) + [(q.lower, q.upper) for q in extra]

    def _initial_guess(self, freq_cpd, power, context):
        # the operator's response to a white velocity spectrum undoes the interpolation's smoothing before the
        # ocean family guesses; a fixed noise is taken off first, a fitted one guessed from the top of the band
        op = self.operator
        p = np.asarray(power, float)
        if op.fixed_noise is not None:
            p = np.maximum(p - op.fixed_noise, 0.05 * p)
        response = op.kernel.sum(axis=1)  # E[I_k] for a white velocity of unit density
        guess = [self.base.initial_guess(freq_cpd, p / np.maximum(response, 0.1), context)]
        if self._scaled:
            guess.append([1.0])
        elif len(self.parameters) > self._p:
            top = np.abs(freq_cpd) >= 0.8 * np.abs(freq_cpd).max()
            ratio = p[top] / np.maximum(op.noise_kernel[top], 1e-300) if top.any() else np.array([2500.0])
            guess.append([float(np.clip(np.sqrt(0.5 * np.median(ratio)), 5.0, 2000.0))])
        return np.concatenate(guess)
