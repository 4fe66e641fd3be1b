"""The bivariate debiased Whittle likelihood: the 2 x 2 periodogram of ``(u, v)`` for improper (anisotropic) models.

A proper model is fitted to the rotary periodogram ``|J_z(f)|^2`` alone; an improper one also predicts the
product ``J_z(f) J_z(-f)`` of the positive- and negative-frequency ordinates (zero in expectation for a proper
process). Both are read off the augmented vector ``y_k = (J_z(f_k), conj J_z(-f_k))`` at the positive
frequencies ``0 < f_k < f_N`` of the band, with ``J_z(f) = sqrt(dt) sum_t h_t z_t exp(-2 pi i f t dt)`` the
tapered DFT (``h`` the window's taper, zero on missing samples, unit sum of squares). ``y_k`` is a fixed linear
map of the ``(u, v)`` DFT vector: ``(J_u, J_v) = A y_k`` with ``A = [[1, 1], [-i, i]] / 2``, ``A`` a multiple of a
unitary matrix, so the Whittle form below is the same (up to a constant) over the ``(u, v)`` periodogram matrix
``I_k = J_k J_k^H``, and the positive frequencies carry all of it for the real pair ``(u, v)``.

Expected periodogram matrix (debiased)::

    E[y_k y_k^H] = [[E+(k), X(k)], [conj X(k), E-(k)]]
    E+-(k) = dt sum_tau c(tau) R(tau dt) exp(-+ 2 pi i k tau / N)       (the univariate debiased expectation)
    X(k)   = E[J_z(f_k) J_z(-f_k)] = dt sum_tau c(tau) C(tau dt) exp(-2 pi i k tau / N)

with ``c(tau) = sum_t h_{t+tau} h_t`` the lag weights and ``C`` the complementary covariance. For the families of
:mod:`driftspec.analysis.models.anisotropic`, ``C = gamma R_M`` with ``R_M`` real and even, so ``X(k) = gamma
E_M(k)``: the complementary expectation is the anisotropic component's own (real-FFT) expected periodogram times
``gamma = rho exp(2 i theta)``, and an evaluation costs the same FFTs as the univariate one. For a window of
irregular fixes (base family
:class:`~driftspec.analysis.spectral.irregular.IrregularlyObserved`) the interpolation of the fixes is a real-linear
map, so the same holds with the operator's kernel in place of the lag sum: ``E+-`` are the family's expected
periodogram at ``+-f_k`` (position errors included) and ``E_M`` the Matérn component's own kernel integral at
``+f_k``, without the errors (see :mod:`driftspec.analysis.spectral.irregular`). The negative
log-likelihood over the band is::

    L = sum_k [ log det E_k + tr(E_k^-1 I_k) ],     I_k = y_k y_k^H

with gradient ``dL/dx_j = sum_k tr(E_k^-1 (E_k - I_k) E_k^-1 dE_k/dx_j)`` and Fisher information
``F_jl = sum_k tr(E_k^-1 dE_k/dx_j E_k^-1 dE_k/dx_l)`` (the expected Hessian). Derivatives are taken with respect
to the base family's optimiser coordinates (``log`` or the value, per parameter) and the Cartesian anisotropy
coordinates ``(Re gamma, Im gamma) = rho (cos 2 theta, sin 2 theta)``, which are smooth through isotropy
(``rho = 0``), where the polar angle is not identified.

References
----------
"Frequency-domain stochastic modeling of stationary bivariate or complex-valued signals". IEEE Transactions on
Signal Processing 65(12), 3136-3151 (2017). doi:10.1109/TSP.2017.2686334
"The debiased Whittle likelihood". Biometrika 106(2), 251-266 (2019). doi:10.1093/biomet/asy071
P. Whittle (1953). The analysis of multiple stationary time series. Journal of the Royal Statistical Society B
15(1), 125-139. doi:10.1111/j.2517-6161.1953.tb00131.x
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft

from ..models.base import FitContext, ModelFamily
from .irregular import IrregularlyObserved
from .likelihood import PreparedWindow, prepare_window


@dataclass
class BivariateWindow:
    """A window's augmented DFT over the positive frequencies of the band, and its univariate preparation.

    Attributes
    ----------
    prep : PreparedWindow
        The univariate preparation (taper, lag weights, band over both signs, periodogram of ``z``).
    k_pos, k_neg : ndarray of int
        FFT-order indices of ``+f_k`` and ``-f_k`` (``k_neg = N - k_pos``).
    freq_cpd : ndarray
        ``f_k > 0``, cpd.
    j_pos, j_neg : ndarray of complex
        ``J_z(+f_k)`` and ``J_z(-f_k)`` of the demeaned, tapered series (sqrt((m/s)^2 / cpd)).
    """

    prep: PreparedWindow
    k_pos: np.ndarray
    k_neg: np.ndarray
    freq_cpd: np.ndarray
    j_pos: np.ndarray
    j_neg: np.ndarray

    @property
    def n(self) -> int:
        return self.prep.n

    @property
    def dt_days(self) -> float:
        return self.prep.dt_days

    @property
    def n_freq(self) -> int:
        return self.k_pos.size

    @property
    def i_pos(self) -> np.ndarray:
        return np.abs(self.j_pos) ** 2

    @property
    def i_neg(self) -> np.ndarray:
        return np.abs(self.j_neg) ** 2

    @property
    def i_cross(self) -> np.ndarray:
        """``J_z(f) J_z(-f)``, whose expectation is the complementary expected periodogram ``X(k)``."""
        return self.j_pos * self.j_neg


def prepare_bivariate(z, dt_days: float, *, mask=None, taper=None, max_freq=None, exclude=None,
                      modulated: bool = False, latitude_series=None) -> BivariateWindow:
    """Prepare a window of complex velocity for the bivariate likelihood.

    Parameters
    ----------
    z : array_like of complex
        ``u + i v`` in m/s on a regular grid; NaN marks missing samples.
    dt_days : float
        Sample interval, days.
    mask, taper, max_freq, exclude, modulated, latitude_series
        As for :func:`~driftspec.analysis.spectral.likelihood.prepare_window`. The band keeps the frequencies
        ``0 < f < f_N`` whose positive and negative ordinates are both in the univariate band (``|f| <=
        max_freq``, outside ``exclude``).
    """
    z = np.asarray(z)
    if not np.iscomplexobj(z):
        raise ValueError("the bivariate likelihood needs complex velocity u + i v (got a real series)")
    prep = prepare_window(z, dt_days, mask=mask, taper=taper, max_freq=max_freq, exclude=exclude,
                          modulated=modulated, latitude_series=latitude_series)
    n = prep.n
    k = np.arange(1, (n + 1) // 2)  # 0 < k < N/2 (the Nyquist ordinate of a real pair is not complex)
    keep = prep.band[k] & prep.band[n - k]
    k = k[keep]
    jz = np.sqrt(dt_days) * scipy.fft.fft(prep.taper * prep.z)
    return BivariateWindow(prep=prep, k_pos=k, k_neg=n - k, freq_cpd=prep.freq_cpd[k], j_pos=jz[k], j_neg=jz[n - k])


@dataclass
class ExpectedMatrix:
    """The expected augmented periodogram over the band and its derivatives.

    ``pos``, ``neg`` (real) and ``cross`` (complex) are ``E+``, ``E-`` and ``X`` (module docstring), shape
    ``(n_freq,)``; ``d_pos``, ``d_neg``, ``d_cross`` their derivatives, shape ``(n_coords, n_freq)``, with respect
    to the base family's optimiser coordinates followed by ``(Re gamma, Im gamma)`` when the family is
    anisotropic; ``part`` is the anisotropic component's ``E_M`` (zeros for a proper family).
    """

    pos: np.ndarray
    neg: np.ndarray
    cross: np.ndarray
    d_pos: np.ndarray | None = None
    d_neg: np.ndarray | None = None
    d_cross: np.ndarray | None = None
    part: np.ndarray | None = None

    def uv(self) -> np.ndarray:
        """The expected periodogram matrix of ``(u, v)``, ``E[J J^H]`` with ``J = (J_u, J_v)``, shape
        ``(n_freq, 2, 2)``, (m/s)^2 per cpd."""
        return augmented_to_uv(self.pos, self.neg, self.cross)


def augmented_to_uv(pos, neg, cross) -> np.ndarray:
    """``A M A^H`` for the augmented matrices ``M = [[pos, cross], [conj cross, neg]]``, ``A = [[1, 1], [-i, i]]/2``:
    the same second moments for the ``(u, v)`` DFT vector."""
    pos, neg, cross = (np.asarray(a) for a in (pos, neg, cross))
    out = np.empty(pos.shape + (2, 2), complex)
    out[..., 0, 0] = 0.25 * (pos + neg + 2 * np.real(cross))
    out[..., 1, 1] = 0.25 * (pos + neg - 2 * np.real(cross))
    out[..., 0, 1] = 0.25j * (pos - neg - 2j * np.imag(cross))
    out[..., 1, 0] = np.conj(out[..., 0, 1])
    return out


def periodogram_matrix(win: BivariateWindow) -> np.ndarray:
    """The ``(u, v)`` periodogram matrix ``J J^H`` over the band, shape ``(n_freq, 2, 2)``."""
    return augmented_to_uv(win.i_pos, win.i_neg, win.i_cross)


def _component_rows(comp, theta_c, prep: PreparedWindow, context, jacobian: bool):
    """``E(k)`` of one component at all FFT indices (and its coordinate derivatives): ``(1 + q, N)`` real rows."""
    if jacobian:
        r, jac = comp.autocovariance_jacobian(theta_c, prep.lags_days, context)
        rows = np.vstack([r[None, :], jac])
    else:
        rows = np.asarray(comp.autocovariance(theta_c, prep.lags_days, context))[None, :]
    weights = prep.modulated_weights if comp.modulated else prep.lag_weights
    if comp.real_autocovariance and not comp.modulated:
        rows = np.real(rows) * weights
        spec = scipy.fft.rfft(rows, axis=-1).real
        spec = np.concatenate([spec, spec[:, 1:(prep.n + 1) // 2][:, ::-1]], axis=1)  # even in k
    else:
        rows = rows * weights
        spec = scipy.fft.fft(rows, axis=-1).real
    spec *= 2.0
    spec -= rows[:, :1].real
    spec *= prep.dt_days
    return spec


def expected_matrix(family: ModelFamily, theta, win: BivariateWindow, context: FitContext,
                    jacobian: bool = True) -> ExpectedMatrix:
    """The debiased expected augmented periodogram over the band (module docstring), with derivatives.

    ``family`` is an isotropic family (then ``cross`` is zero) or an
    :class:`~driftspec.analysis.models.anisotropic.Anisotropic` one; either may be (built on) a family seen through
    irregular fixes, whose operator must have been built for ``win``'s band.
    """
    theta = np.asarray(theta, float)
    prep = win.prep
    aniso = getattr(family, "anisotropic", False)
    base = family.base if aniso else family
    if isinstance(base, IrregularlyObserved):
        return _expected_irregular(family, base, aniso, theta, win, context, jacobian)
    nb = len(base.parameters)
    n_coords = nb + (2 if aniso else 0)
    nf = win.n_freq
    pos, neg = np.zeros(nf), np.zeros(nf)
    d_pos = np.zeros((n_coords, nf)) if jacobian else None
    d_neg = np.zeros((n_coords, nf)) if jacobian else None
    part = np.zeros(nf)
    d_part = None
    for i, (comp, sl) in enumerate(base.components()):
        spec = _component_rows(comp, theta[sl], prep, context, jacobian)
        sp, sn = spec[:, win.k_pos], spec[:, win.k_neg]
        pos += sp[0]
        neg += sn[0]
        if jacobian:
            d_pos[sl] = sp[1:]
            d_neg[sl] = sn[1:]
        if aniso and i == family.part_index:
            part = sp[0]
            d_part = (sl, sp[1:])
    cross = np.zeros(nf, complex)
    d_cross = np.zeros((n_coords, nf), complex) if jacobian else None
    if aniso:
        g = family.gamma(theta)
        cross = g * part
        if jacobian:
            sl, dp = d_part
            d_cross[sl] = g * dp
            d_cross[nb] = part
            d_cross[nb + 1] = 1j * part
    return ExpectedMatrix(pos, neg, cross, d_pos, d_neg, d_cross, part)


def _expected_irregular(family, base: IrregularlyObserved, aniso: bool, theta, win: BivariateWindow, context,
                        jacobian: bool) -> ExpectedMatrix:
    """:func:`expected_matrix` for a window of irregular fixes: ``E+-`` from the operator's kernel (noise included),
    ``X(k) = gamma E_M(k)`` with ``E_M`` the anisotropic component's own kernel integral at ``+f_k``, noise-free
    (:meth:`~driftspec.analysis.spectral.irregular.IrregularObservation.component_in_band`). ``win.prep`` must
    have the band the operator was built for."""
    op = base.operator
    order = np.argsort(op.band_index)
    at = np.searchsorted(op.band_index[order], np.concatenate([win.k_pos, win.k_neg]))
    at = np.clip(at, 0, order.size - 1)
    where = order[at]
    if not np.array_equal(op.band_index[where], np.concatenate([win.k_pos, win.k_neg])):
        raise ValueError("the bivariate band is not inside the band the irregular-fix operator was built for")
    nf = win.n_freq
    i_pos, i_neg = where[:nf], where[nf:]
    nb = len(base.parameters)
    n_coords = nb + (2 if aniso else 0)
    out = base.expected_in_band(theta[:nb], win.prep, context, jacobian=jacobian)
    e, de = out if jacobian else (out, None)
    pos, neg = e[i_pos], e[i_neg]
    d_pos = d_neg = d_cross = None
    if jacobian:
        d_pos, d_neg = np.zeros((n_coords, nf)), np.zeros((n_coords, nf))
        d_pos[:nb], d_neg[:nb] = de[:, i_pos], de[:, i_neg]
        d_cross = np.zeros((n_coords, nf), complex)
    part = np.zeros(nf)
    cross = np.zeros(nf, complex)
    if aniso:
        sl = family.part_slice  # the leading (ocean) parameters of the irregular family
        res = op.component_in_band(family.part, theta[sl], context, jacobian=jacobian)
        part = (res[0] if jacobian else res)[i_pos]
        g = family.gamma(theta)
        cross = g * part
        if jacobian:
            d_cross[sl] = g * res[1][:, i_pos]
            d_cross[nb] = part
            d_cross[nb + 1] = 1j * part
    return ExpectedMatrix(pos, neg, cross, d_pos, d_neg, d_cross, part)


@dataclass
class WhittleTerms:
    """The bivariate Whittle objective at one point: value, gradient and Fisher information (coordinates of
    :class:`ExpectedMatrix`), and the pieces the score of simulated periodograms needs."""

    value: float
    gradient: np.ndarray | None
    fisher: np.ndarray | None
    w_pos: np.ndarray | None = None  # E^-1 dE_j E^-1 entries: (coords, n_freq)
    w_neg: np.ndarray | None = None
    w_cross: np.ndarray | None = None  # the (2, 1) entry, complex
    trace: np.ndarray | None = None  # sum_k tr(E^-1 dE_j)


def whittle_terms(em: ExpectedMatrix, i_pos, i_neg, i_cross, derivatives: bool = True) -> WhittleTerms:
    """``sum_k log det E_k + tr(E_k^-1 I_k)`` and, with ``derivatives``, its gradient and Fisher information.

    ``i_pos``, ``i_neg``, ``i_cross`` are ``|J(f)|^2``, ``|J(-f)|^2`` and ``J(f) J(-f)`` over the band. Returns an
    infinite value where some ``E_k`` is not positive definite.
    """
    p, q, x = em.pos, em.neg, em.cross
    det = p * q - np.abs(x) ** 2
    if not (np.all(det > 0) and np.all(p > 0) and np.all(np.isfinite(det))):
        return WhittleTerms(np.inf, None, None)
    inv_det = 1.0 / det
    quad = (q * i_pos + p * i_neg - 2.0 * np.real(x * np.conj(i_cross))) * inv_det
    value = float(np.sum(np.log(det)) + np.sum(quad))
    if not derivatives:
        return WhittleTerms(value, None, None)
    # E^-1 = [[a, c], [conj c, b]] / 1:  a = q / det, b = p / det, c = -x / det
    a, b, c = q * inv_det, p * inv_det, -x * inv_det
    dp, dn, dx = em.d_pos, em.d_neg, em.d_cross
    # G_j = E^-1 dE_j (2 x 2 per frequency), dE_j = [[dp, dx], [conj dx, dn]]
    g11 = a * dp + c * np.conj(dx)
    g12 = a * dx + c * dn
    g21 = np.conj(c) * dp + b * np.conj(dx)
    g22 = np.conj(c) * dx + b * dn
    trace = np.real(g11 + g22)
    # W_j = G_j E^-1: the matrix whose trace against I is d tr(E^-1 I) / dx_j (with a minus sign)
    w11 = np.real(g11 * a + g12 * np.conj(c))
    w22 = np.real(g21 * c + g22 * b)
    w21 = g21 * a + g22 * np.conj(c)
    tr_wi = w11 * i_pos + w22 * i_neg + 2.0 * np.real(w21 * i_cross)
    gradient = trace.sum(axis=1) - tr_wi.sum(axis=1)
    # F_jl = sum_k tr(G_j G_l)
    fisher = np.real(g11 @ g11.T + g12 @ g21.T + g21 @ g12.T + g22 @ g22.T)
    return WhittleTerms(value, gradient, 0.5 * (fisher + fisher.T), w11, w22, w21, trace.sum(axis=1))


def simulated_scores(terms: WhittleTerms, i_pos, i_neg, i_cross) -> np.ndarray:
    """Scores ``dL/dx`` for periodograms of simulated series (rows of ``i_*``, shape ``(n_sim, n_freq)``):
    ``sum_k tr(E^-1 dE) - tr(E^-1 dE E^-1 I_k)``, shape ``(n_sim, n_coords)``."""
    tr_wi = i_pos @ terms.w_pos.T + i_neg @ terms.w_neg.T + 2.0 * np.real(i_cross @ terms.w_cross.T)
    return terms.trace[None, :] - tr_wi


def band_dfts(z, win: BivariateWindow) -> tuple[np.ndarray, np.ndarray]:
    """``J(+f_k)`` and ``J(-f_k)`` over the band of series ``z`` (rows; NaN = missing) prepared as the window was:
    the window's mask, each row's own mean removed, the window's taper."""
    prep = win.prep
    z = np.atleast_2d(z)
    valid = prep.valid & np.isfinite(z)
    zz = np.where(valid, z, 0.0)
    zz = np.where(valid, zz - zz.sum(axis=1, keepdims=True) / np.maximum(valid.sum(axis=1, keepdims=True), 1), 0.0)
    jz = np.sqrt(prep.dt_days) * scipy.fft.fft(prep.taper * zz, axis=-1)
    return jz[:, win.k_pos], jz[:, win.k_neg]


__all__ = ["BivariateWindow", "ExpectedMatrix", "WhittleTerms", "augmented_to_uv", "band_dfts", "expected_matrix",
           "periodogram_matrix", "prepare_bivariate", "simulated_scores", "whittle_terms"]
