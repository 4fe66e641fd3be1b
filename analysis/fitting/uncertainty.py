"""Uncertainty beyond the Fisher information: the simulated score covariance of the debiased Whittle sandwich,
and simulation of the fitted (observed) process for the parametric bootstrap.

Both draw series from the fitted model, damped oscillations (complex OU processes) by their exact AR(1) recursion
and the rest by circulant embedding (C. R. Dietrich, G. N. Newsam, "Fast and exact
simulation of stationary Gaussian processes through circulant embedding of the covariance matrix", SIAM J. Sci.
Comput. 18, 1088-1107, 1997) with the window's mask, taper and mean removal, so what they measure is the spread
of what was actually observed. "The debiased Whittle likelihood", Biometrika 106(2), 251-266 (2019),
doi:10.1093/biomet/asy071, section 4, gives the sandwich form ``F^-1 V F^-1``. For windows of irregular fixes the
score's covariance needs no simulation: :func:`irregular_periodogram_covariance` gives the periodogram's covariance
in closed form (exact, and below :data:`CLOSED_FORM_MAX_WORK` faster than 64 draws: a third of their time on the
demo's 30-day windows, about half on 60-day ones).
"""

from __future__ import annotations

import zlib

import numpy as np
import scipy.fft
import scipy.integrate
import scipy.signal

from ..conventions import SECONDS_PER_DAY
from ..models.inertial import Inertial, InertialFollowing
from ..simulation.simulate import embedding_autocovariance
from ..spectral.irregular import IrregularlyObserved
from ..spectral.likelihood import expected_in_band

#: the largest circulant embedding of the simulations behind sandwich errors and simulated null distributions, in
#: multiples of the smallest (twice the series): the smallest non-negative definite one up to this is used. Clipping
#: the negative eigenvalues of the smallest embedding instead misstates a slowly decaying covariance: for an inertial
#: oscillation with an e-folding time near the window's length (now drawn by its recursion instead) the draws' mean
#: periodogram was up to 3 times the expected one in parts of the band of a 700-sample window; a Matérn background
#: with a small damping still needs the larger embedding (checked against the Isserlis formula in the tests).
EMBEDDING_MAX_FACTOR = 4
#: components drawn exactly by their AR(1) recursion (:func:`ou_series`) instead of a circulant embedding
_OSCILLATIONS = (Inertial, InertialFollowing)


def simulator(family, theta, prep, context, max_factor: int = 64):
    """A function ``rng, size -> (size, n)`` series of the fitted (observed) process by circulant embedding,
    modulated components multiplied by the window's modulation, with the window's missing samples NaN.

    ``max_factor`` bounds the embedding (at most ``2 n max_factor`` points; negative eigenvalues left are
    set to zero): slowly decaying models otherwise need embeddings many times the window.
    """
    theta = np.asarray(theta, float)
    # damped oscillations (complex OU processes) exactly by their recursion; independent stationary components
    # otherwise add up to one stationary process: one embedding for all of them
    parts = family.components()
    ou = [(c, sl) for c, sl in parts if isinstance(c, _OSCILLATIONS)]
    parts = [(c, sl) for c, sl in parts if not isinstance(c, _OSCILLATIONS)]
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
        for comp, sl in ou:
            var, f0, gam = theta[sl]
            x = ou_series(var, 2j * np.pi * f0 - gam, prep.n, prep.dt_days, rng, size)
            z += x * prep.modulation if comp.modulated else x
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
    For a window of irregular fixes of a complex series ``V`` is exact, from the periodogram's covariance in closed
    form (:func:`irregular_periodogram_covariance`; ``n_sim`` and ``seed`` are then unused).
    ``seed`` defaults to one drawn from the window's periodogram, so a window always gets the same value.
    """
    free = np.ones(len(theta), bool) if free is None else np.asarray(free, bool)
    e_band, de = expected_in_band(family, theta, prep, context)
    dlog = de[free] / e_band
    if seed is None:
        seed = zlib.crc32(prep.periodogram.tobytes())
    rng = np.random.default_rng(seed)
    # the smallest non-negative definite embedding up to 8 N (EMBEDDING_MAX_FACTOR; checked against the Isserlis
    # formula in the tests)
    if isinstance(family, IrregularlyObserved):
        fixes = family.operator._s.size
        if not prep.real_valued and fixes <= CLOSED_FORM_MAX_FIXES and prep.band_index.size * fixes**2 <= \
                CLOSED_FORM_MAX_WORK:
            # the periodogram's covariance in closed form: no simulation needed
            w = dlog / e_band
            return np.atleast_2d(w @ irregular_periodogram_covariance(family, np.asarray(theta, float), prep,
                                                                       context) @ w.T)
        pg = _irregular_periodograms(family, np.asarray(theta, float), prep, context, rng, n_sim)
    else:
        z = simulator(family, theta, prep, context, max_factor=EMBEDDING_MAX_FACTOR)(rng, n_sim)
        pg = _band_periodograms(z, prep)
    scores = (1.0 - pg / e_band) @ dlog.T  # (n_sim, free)
    return np.atleast_2d(np.cov(scores, rowvar=False))


def _band_periodograms(z, prep) -> np.ndarray:
    """Periodograms over the band of series ``z`` (rows) prepared as the window was: mask, demean, taper."""
    valid = prep.valid
    z = np.where(valid, z, 0.0)
    zz = np.where(valid, z - z.sum(axis=1, keepdims=True) / max(prep.n_valid, 1), 0.0)
    return prep.dt_days * np.abs(scipy.fft.fft(prep.taper * zz, axis=-1)[:, prep.band_index]) ** 2


#: sub-steps per grid step of the continuous velocity simulated for windows of irregular fixes
_FINE_STEPS = 3


def _irregular_periodograms(family, theta, prep, context, rng, n_sim: int) -> np.ndarray:
    """Periodograms over the band of windows observed as this one was from irregular fixes
    (:func:`irregular_velocities`)."""
    return _band_periodograms(irregular_velocities(family, theta, prep, context, rng, n_sim), prep)


#: windows of irregular fixes get the closed-form score covariance while band bins x fixes^2 is at most this, longer
#: ones the 64 draws: the closed form's cost grows as that product, the draws' about linearly with the window, and
#: they cost the same near 2.5e8 (measured: 21 against 38 ms for 60 days of satellite-like fixes, 105 against 80 ms
#: for 120 days, one core)
CLOSED_FORM_MAX_WORK = 2.5e8
#: and at most this many fixes (its memory is about 100 bytes x fixes^2: 0.6 GB here)
CLOSED_FORM_MAX_FIXES = 2500
#: lag step of the tabulated position covariance, in grid steps (Hermite interpolation between the nodes)
_LAG_STEP_FRACTION = 0.25
#: steps of the finer table over the first two lag steps
_NEAR_STEPS = 32


def _hermite(x, step, f, df):
    """Cubic Hermite interpolation at ``x >= 0`` (clipped to the table) of values ``f`` with derivatives ``df``
    tabulated every ``step`` from zero (each interval's cubic in Horner form)."""
    f0, f1, d0, d1 = f[:-1], f[1:], step * df[:-1], step * df[1:]
    c0, c1, c2, c3 = f0, d0, 3 * (f1 - f0) - 2 * d0 - d1, 2 * (f0 - f1) + d0 + d1
    x = np.clip(x, 0.0, None) / step
    i = np.minimum(x.astype(np.int64), f0.size - 1)
    t = x - i
    return ((c3[i] * t + c2[i]) * t + c1[i]) * t + c0[i]


def _fix_error_sd(family, extra, n_fixes) -> np.ndarray:
    """Each fix's position error standard deviation per component (m) as ``family`` has it at its extra parameters
    ``extra``: the given errors times the fitted scale, one fitted white noise, or none."""
    op = family.operator
    if op.noise == "fixed":
        return op.sigma_used * (extra[-1] if family._scaled else 1.0)
    if op.noise == "fitted":
        return np.full(n_fixes, extra[0])
    return np.zeros(n_fixes)


def irregular_periodogram_covariance(family, theta, prep, context) -> np.ndarray:
    """``cov(I_j, I_k)`` over the band (band x band, ((m/s)^2 per cpd)^2) of a window of velocities made from
    irregular fixes (``family``: an :class:`~driftspec.analysis.spectral.irregular.IrregularlyObserved`), in closed
    form.

    The window's Fourier ordinates are linear in the fix positions, ``J = A X / 86400`` (``A``, band x fixes, the
    operator's ``a_j(k)``; :mod:`driftspec.analysis.spectral.irregular`), and the weights of every ordinate sum to
    zero, so ``J = B D`` with ``D_i = (X(s_(i+1)) - X(s_i)) / 86400`` the displacements between consecutive fixes
    and ``B_i = sum_(j > i) a_j``. For a stationary velocity with autocovariance ``R`` (m^2/s^2, lag in days)::

        cov(D_i, D_l) = int_(s_i)^(s_(i+1)) int_(s_l)^(s_(l+1)) R(u - v) du dv
                      = F(s_(i+1) - s_l) - F(s_i - s_l) - F(s_(i+1) - s_(l+1)) + F(s_i - s_(l+1)),
        F(tau) = int_0^tau (tau - u) R(u) du,   F(-tau) = conj F(tau),

    plus the fixes' independent errors (``E|eps_j|^2 = 2 sigma_j^2``) on the two displacements each enters. With
    ``C = B cov(D) B^H`` the covariance of the ordinates, a proper complex Gaussian series (isotropic ocean,
    errors equal in both coordinates) has ``cov(I_j, I_k) = dt^2 |C_jk|^2`` (Isserlis' theorem:
    L. Isserlis, "On a formula for the product-moment coefficient of any order of a normal frequency
    distribution in any number of variables", Biometrika 12, 134-139, 1918, doi:10.1093/biomet/12.1-2.134), and
    ``dt C_jj`` is the expected periodogram. ``F`` is tabulated every quarter grid step (every 1/64 grid step over
    the first half step: a rough Matérn's cusp at zero lag matters for fixes minutes apart) by Simpson's rule and
    read between the nodes by cubic Hermite interpolation (``F' = int_0^tau R``). A latitude-following part is
    taken at the window's mean inertial frequency, as the operator takes it.
    """
    op = family.operator
    p = len(family.base.parameters)
    ocean, extra = theta[:p], theta[p:]
    s = op._s
    fc = context.inertial_frequency_cpd or 0.0
    def acov(lags):
        r = np.zeros(lags.size, complex)
        for comp, sl in family.base.components():
            rc = comp.autocovariance(ocean[sl], lags, context)
            r += rc * np.exp(2j * np.pi * fc * lags) if comp.modulated else rc
        return r

    # F and F' tabulated: every h / 16 up to 2 h (a rough Matérn's autocovariance has a cusp at zero lag, which
    # matters for fixes minutes apart), then every h from there on
    h = prep.dt_days * _LAG_STEP_FRACTION
    near = np.arange(_NEAR_STEPS + 1) * (2 * h / _NEAR_STEPS)
    r = acov(near)
    g1_near = scipy.integrate.cumulative_simpson(r, x=near, initial=0.0)  # F'
    f_near = near * g1_near - scipy.integrate.cumulative_simpson(near * r, x=near, initial=0.0)  # F
    far = np.arange(int(np.ceil((s[-1] - s[0]) / h)) + 2) * h  # lags beyond 2 h, less 2 h
    r = acov(far + 2 * h)
    g1_far = g1_near[-1] + scipy.integrate.cumulative_simpson(r, dx=h, initial=0.0)
    f_far = (f_near[-1] + far * g1_near[-1] + far * scipy.integrate.cumulative_simpson(r, dx=h, initial=0.0)
             - scipy.integrate.cumulative_simpson(far * r, dx=h, initial=0.0))
    below = np.tril_indices(s.size, -1)  # the fixes are in time order: s_j - s_l > 0 below the diagonal
    tau = s[below[0]] - s[below[1]]
    v = _hermite(tau - 2 * h, h, f_far, g1_far)
    close = tau < 2 * h
    v[close] = _hermite(tau[close], 2 * h / _NEAR_STEPS, f_near, g1_near)
    m = np.zeros((s.size, s.size), complex)  # F(s_j - s_l), with F(0) = 0 and F(-tau) = conj F(tau)
    m[below] = v
    m[below[1], below[0]] = np.conj(v)
    d = m[1:, :-1] - m[:-1, :-1] - m[1:, 1:] + m[:-1, 1:]  # cov of the displacements, (m/s)^2 day^2
    sigma = _fix_error_sd(family, extra, s.size)
    nv = 2.0 * sigma**2 / SECONDS_PER_DAY**2  # each fix's error variance, ((m/s) day)^2
    k = np.arange(s.size - 1)
    d[k, k] += nv[:-1] + nv[1:]
    d[k[:-1], k[:-1] + 1] -= nv[1:-1]
    d[k[:-1] + 1, k[:-1]] -= nv[1:-1]
    b = np.cumsum(op._a[:, ::-1], axis=1)[:, ::-1][:, 1:]  # B_i = sum_(j > i) a_j, band x displacements
    # single precision for the products: B and cov(D) carry no cancelling large terms (the positions' large lags
    # cancelled in double precision above), and C is needed to about 1e-4
    b32 = b.astype(np.complex64)
    c = (b32 @ d.astype(np.complex64)) @ b32.conj().T
    return prep.dt_days**2 * (c.real.astype(float) ** 2 + c.imag.astype(float) ** 2)


def irregular_velocities(family, theta, prep, context, rng, n_sim: int, improper=None) -> np.ndarray:
    """Velocity windows ``(n_sim, n)`` (m/s, zero where invalid) observed as this one was from irregular fixes:
    the ocean velocity simulated every ``dt / 3`` (:func:`simulator`'s methods), integrated to positions, read at the
    fix times, given the fixes' errors (scaled as fitted) or the fitted white noise, interpolated to the grid and
    differenced through the window's own operator (``family.operator.weights``).

    ``improper=(index, a, b)`` makes ocean component ``index`` the widely linear ``a w + b conj(w)`` of its proper
    series ``w`` (an anisotropic Matérn part, :mod:`driftspec.analysis.models.anisotropic`).
    """
    op = family.operator
    p = len(family.base.parameters)
    ocean, extra = theta[:p], theta[p:]
    dt_f = prep.dt_days / _FINE_STEPS
    s = op._s - op._s[0]  # fix times from the first fix used, days
    n_f = int(np.ceil(s[-1] / dt_f)) + 2
    fc = context.inertial_frequency_cpd or 0.0
    comps = list(enumerate(family.base.components()))
    special = None if improper is None else improper[0]

    def draw(parts):  # one proper complex series (n_sim, n_f) of the summed components
        ou = [(c, sl) for _, (c, sl) in parts if isinstance(c, _OSCILLATIONS)]
        out = None
        for comp, sl in ou:  # damped oscillations exactly by their recursion (no embedding to outgrow)
            var, f0, gam = ocean[sl]
            x = ou_series(var, 2j * np.pi * (f0 + (fc if comp.modulated else 0.0)) - gam, n_f, dt_f, rng, n_sim)
            out = x if out is None else out + x
        parts = [(i, (c, sl)) for i, (c, sl) in parts if not isinstance(c, _OSCILLATIONS)]
        if not parts:
            return out

        def acov(lag):  # a latitude-following part at the window's mean inertial frequency, as the operator has it
            r = np.zeros(len(lag), complex)
            for _, (comp, sl) in parts:
                rc = comp.autocovariance(ocean[sl], lag, context)
                r += rc * np.exp(2j * np.pi * fc * lag) if comp.modulated else rc
            return r

        r = np.asarray(embedding_autocovariance(acov, n_f, dt_f, max_factor=EMBEDDING_MAX_FACTOR), complex)
        half = r.size - 1
        row = np.concatenate([r, np.conj(r[1:half][::-1])])
        amp = np.sqrt(np.clip(scipy.fft.fft(row).real, 0, None) * (row.size / 2.0)).astype(np.float32)
        # single precision for the draws and their transform (twice as fast; ample for a variance from n_sim
        # draws); the positions are summed in double precision below
        eps = rng.standard_normal((n_sim, 2 * amp.size), dtype=np.float32).view(np.complex64)
        eps *= amp
        x = scipy.fft.ifft(eps, axis=-1, overwrite_x=True)[:, :n_f]  # m/s, complex64
        return x if out is None else out + x

    rest = [c for c in comps if c[0] != special]
    v = draw(rest) if rest else np.zeros((n_sim, n_f), complex)
    if special is not None:
        w = draw([c for c in comps if c[0] == special])
        v = v + improper[1] * w + improper[2] * np.conj(w)
    pos = interpolate_rows(integrate_velocity(v, dt_f), s / dt_f)
    sigma = _fix_error_sd(family, extra, s.size)
    pos = pos + sigma * (rng.standard_normal(pos.shape) + 1j * rng.standard_normal(pos.shape))
    return (op.weights @ pos.T).T / SECONDS_PER_DAY  # m/s on the grid (zero rows where invalid)


def ou_series(var: float, rate: complex, n: int, dt_days: float, rng, size: int) -> np.ndarray:
    """``size`` stationary complex Ornstein-Uhlenbeck series ``(size, n)`` with ``E[z(t + tau) conj z(t)] = var
    exp(rate tau)`` (``rate = 2 pi i f0 - gamma``, per day) sampled every ``dt_days``: exactly, by the AR(1)
    recursion ``z_t = phi z_(t-1) + e_t``, ``phi = exp(rate dt)``, ``E|e_t|^2 = var (1 - |phi|^2)``, from a
    stationary ``z_0`` (a linear filter along the series, ``scipy.signal.lfilter``)."""
    phi = np.exp(rate * dt_days)
    e = (rng.standard_normal((size, n)) + 1j * rng.standard_normal((size, n))) * np.sqrt(0.5 * var)
    e[:, 1:] *= np.sqrt(max(1.0 - abs(phi) ** 2, 0.0))
    return scipy.signal.lfilter([1.0], [1.0, -phi], e, axis=-1)


def integrate_velocity(v, step_days) -> np.ndarray:
    """Positions (m) from velocities ``v`` (n_sim, n; m/s) every ``step_days``, by the trapezoid rule, summed in
    double precision, from zero (the constant is free: each row of an irregular window's operator sums to zero)."""
    pos = np.zeros(v.shape, complex)
    np.cumsum(0.5 * (v[:, 1:] + v[:, :-1]), axis=1, dtype=complex, out=pos[:, 1:])
    pos *= step_days * SECONDS_PER_DAY
    return pos


def interpolate_rows(x, at):
    """Rows of ``x`` (samples at 0, 1, 2, ...) linearly interpolated at the fractional positions ``at``."""
    i = np.clip(np.floor(at).astype(int), 0, x.shape[1] - 2)
    w = at - i
    return x[:, i] * (1 - w) + x[:, i + 1] * w
