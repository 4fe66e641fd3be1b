"""The exact Gaussian likelihood of a window in O(N^2): value, analytic gradient and observed information.

The valid samples ``x`` of a window are a zero-mean Gaussian vector with covariance ``Sigma``; for a
complex velocity series ``z = u + i v`` (m/s) the proper complex Gaussian, for a real series the real one::

    L(theta) = m log(pi) + log det Sigma + x^H Sigma^-1 x                    (complex)
    L(theta) = 1/2 (m log(2 pi) + log det Sigma + x^T Sigma^-1 x)            (real)

with ``Sigma_ij = R((i - j) dt)`` summed over the family's components, ``R(tau) = E[z(t + tau) conj z(t)]``,
``R(-tau) = conj R(tau)``. A component that follows the local inertial frequency (``comp.modulated``) is
``diag(w) T diag(w)^H`` with the window's unit-modulus modulation ``w``. As in the dense factorisation this
module replaced (same value), a relative nugget ``1e-10 R(0)`` is added to the diagonal.

Complete windows without a modulated component (the fast path)
---------------------------------------------------------------
``Sigma`` is Hermitian Toeplitz with first column ``c_k = R(k dt)``. One Levinson recursion (scipy's compiled
``scipy.linalg._solve_toeplitz.levinson``, O(N^2)) on the Yule-Walker system ``Sigma_(N-1) phi = c_(1:N)``
gives the one-step predictor ``phi`` of order ``N - 1`` and the reflection coefficients (partial
autocorrelations) ``kappa_k``, so the prediction-error variances and the log-determinant are::

    v_0 = c_0,   v_k = v_(k-1) (1 - |kappa_k|^2),   log det Sigma = sum_(k=0)^(N-1) log v_k

(Durbin-Levinson). The first column of ``Sigma^-1`` is ``u = (1, -phi_1, ..., -phi_(N-1)) / v_(N-1)`` (its rows
``1..N-1`` of ``Sigma u = e_0`` are the same Yule-Walker system), and the
Gohberg-Semencul formula writes the whole inverse through it::

    Sigma^-1 = (1 / u_0) [ L(u) L(u)^H - L(s) L(s)^H ],   s = (0, conj u_(N-1), ..., conj u_1)

with ``L(a)`` the lower-triangular Toeplitz matrix of first column ``a``. So ``alpha = Sigma^-1 x`` is four
triangular Toeplitz products (FFT convolutions, O(N log N)), the quadratic form is ``x^H alpha``, and the sums
of ``Sigma^-1`` along its diagonals, ``d_k = sum_i (Sigma^-1)_(i+k, i)``, are weighted autocorrelations of
``u`` and ``s`` (``d_k = [(N - k) A_k(u) - B_k(u) - (N - k) A_k(s) + B_k(s)] / u_0`` with
``A_k(a) = sum_l a_(l+k) conj a_l`` and ``B_k(a) = sum_l l a_(l+k) conj a_l``), again by FFT.

Gradient
--------
With ``dSigma_j`` the derivative with respect to the optimiser coordinate ``x_j`` (``log theta_j`` for
log-scale parameters, ``theta_j`` for linear ones, as ``family.autocovariance_jacobian``)::

    dL/dx_j = tr(Sigma^-1 dSigma_j) - alpha^H dSigma_j alpha        (times 1/2 for a real series)

For Toeplitz ``dSigma_j`` both terms are sums over lags::

    dL/dx_j = Re[ sum_k w_k dR_j(k dt) conj(d_k - a_k) ],   w_0 = 1, w_k = 2 (k > 0),
    a_k = sum_t alpha_(t+k) conj alpha_t                     (one FFT)

so the analytic gradient costs the value plus a few FFTs and one matrix-vector product with the Jacobian.

Gaps and modulated components (the dense fallback)
--------------------------------------------------
With missing samples (``Sigma`` restricted to the valid samples is not Toeplitz) or a modulated component
(not Toeplitz either) the value comes from a dense Cholesky factorisation of ``Sigma`` on the valid samples
(O(m^3)). The gradient then uses ``W = Sigma^-1 - alpha alpha^H`` (one more triangular solve) embedded in
the full window: ``dL/dx_j = Re sum_ab conj(W_ab) dSigma_j,ab`` is again a sum over lags of the diagonal sums of
``W`` (for a modulated component, of ``diag(conj w) W diag(w)``). ``Sigma^-1`` comes from the Cholesky factor
(LAPACK ``potri``), so a fallback gradient costs about three fallback values.

Observed information
--------------------
:func:`exact_observed_information` is the Hessian of ``L`` in the optimiser coordinates by central differences
of the analytic gradient (``2 p`` gradient evaluations), symmetrised.

References
----------
"The Wiener RMS (root mean square) error criterion in filter design and prediction". Journal of Mathematics
and Physics 25, 261-278 (1946). doi:10.1002/sapm1946251261 (the Levinson recursion)

"The fitting of time-series models". Revue de l'Institut International de Statistique 28, 233-244 (1960).
doi:10.2307/1401322 (the Durbin-Levinson recursion and prediction-error variances)

"On the inversion of finite Toeplitz matrices and their continuous analogs". Matematicheskie Issledovaniya
7(2), 201-223 (1972) (the Gohberg-Semencul formula).

"An algorithm for the inversion of finite Toeplitz matrices". Journal of the Society for Industrial and
Applied Mathematics 12, 515-522 (1964). doi:10.1137/0112045

"The numerical stability of the Levinson-Durbin algorithm for Toeplitz systems of equations". SIAM Journal on
Scientific and Statistical Computing 1, 303-319 (1980). doi:10.1137/0901021

"Time Series: Theory and Methods", 2nd ed., Springer (1991), sections 5.2 and 8.7 (Durbin-Levinson
algorithm; exact Gaussian likelihood through one-step predictions).

"Maximum likelihood estimation of models for residual covariance in spatial regression". Biometrika 71,
135-146 (1984). doi:10.1093/biomet/71.1.135 (the score ``tr(Sigma^-1 dSigma) - alpha^T dSigma alpha``).

"Second-order complex random vectors and normal distributions". IEEE Transactions on Signal Processing 44,
2637-2640 (1996). doi:10.1109/78.539051 (the proper complex Gaussian density).
"""

from __future__ import annotations

import numpy as np
import scipy.fft
import scipy.linalg

try:  # scipy's compiled Levinson recursion (private module, present since scipy 0.17)
    from scipy.linalg._solve_toeplitz import levinson
except ImportError:  # pragma: no cover - then every window takes the dense path
    levinson = None

from ..models.base import FitContext, ModelFamily
from .likelihood import PreparedWindow

__all__ = ["exact_negloglik", "exact_negloglik_grad", "exact_observed_information"]

#: relative nugget on the diagonal (keeps very smooth models numerically positive definite)
NUGGET = 1e-10


# ----------------------------------------------------------------------------------------------------
# checks and autocovariances


def _check(family: ModelFamily, theta, prep: PreparedWindow) -> np.ndarray:
    theta = np.asarray(theta, float)
    if theta.ndim != 1 or theta.size != len(family.parameters):
        raise ValueError(f"theta has {theta.size} values; {family.name} has {len(family.parameters)} parameters")
    if not np.all(np.isfinite(theta)):
        raise ValueError("theta must be finite")
    if any(c.modulated for c, _ in family.components()) and prep.modulation is None:
        raise ValueError("a latitude-following model needs a window prepared with modulated=True")
    return theta


def _fast_path(family: ModelFamily, prep: PreparedWindow) -> bool:
    return levinson is not None and bool(prep.valid.all()) and not any(c.modulated for c, _ in family.components())


def _component_acv(comp, theta_c, prep, context, jacobian):
    if jacobian:
        r, jac = comp.autocovariance_jacobian(theta_c, prep.lags_days, context)
        jac = np.asarray(jac)
    else:
        r, jac = comp.autocovariance(theta_c, prep.lags_days, context), None
    r = np.asarray(r)
    if prep.real_valued:
        r = np.real(r)
        jac = None if jac is None else np.real(jac)
    else:
        r = r.astype(complex, copy=False)
        jac = None if jac is None else jac.astype(complex, copy=False)
    return r, jac


# ----------------------------------------------------------------------------------------------------
# the Toeplitz (fast) path


def _levinson_factor(c: np.ndarray):
    """Log-determinant and first column of the inverse of the Hermitian Toeplitz matrix with first column ``c``.

    Returns ``(logdet, u)``, or ``None`` when the matrix is not numerically positive definite.
    """
    n = c.size
    c0 = float(np.real(c[0]))
    if not np.isfinite(c0) or c0 <= 0 or not np.all(np.isfinite(c)):
        return None
    if n == 1:
        return np.log(c0), np.array([1.0 / c0], dtype=c.dtype)
    cm = c[: n - 1]
    vals = np.concatenate((np.conj(cm[:0:-1]), cm))  # scipy's layout: reversed first row, then first column
    try:
        phi, refl = levinson(np.ascontiguousarray(vals), np.ascontiguousarray(c[1:]))
    except (np.linalg.LinAlgError, ZeroDivisionError):
        return None
    one_minus = 1.0 - np.abs(refl[1:]) ** 2
    if not np.all(one_minus > 0) or not np.all(np.isfinite(phi)):
        return None
    log_steps = np.log(one_minus)
    # log v_k = log c0 + sum_{j<=k} log(1 - |kappa_j|^2); the sum over k = 0..n-1 weights kappa_j by (n - j)
    logdet = n * np.log(c0) + float(np.dot(np.arange(n - 1, 0, -1), log_steps))
    v_last = c0 * np.exp(np.sum(log_steps))
    u = np.empty(n, dtype=c.dtype)
    u[0] = 1.0
    u[1:] = -phi
    u /= v_last
    return logdet, u


class _GohbergSemencul:
    """``Sigma^-1`` through its first column ``u``: products with vectors and diagonal sums by FFT."""

    def __init__(self, u: np.ndarray):
        n = u.size
        self.n, self.real = n, np.isrealobj(u)
        self.u0 = float(np.real(u[0]))
        s = np.zeros_like(u)
        s[1:] = np.conj(u[:0:-1])
        self.m = scipy.fft.next_fast_len(2 * n)
        self.gen = np.vstack([u, s])
        self.f = scipy.fft.fft(self.gen, self.m, axis=-1)  # spectra of u and s

    def solve(self, y: np.ndarray) -> np.ndarray:
        """``Sigma^-1 y``: ``(1/u0) [L(u) L(u)^H y - L(s) L(s)^H y]`` with four FFT convolutions."""
        n, m = self.n, self.m
        fy = scipy.fft.fft(y, m)
        # L(a)^H y at index i is sum_{j >= i} conj(a_{j-i}) y_j: a correlation (no wrap for i < n, m >= 2n)
        t = scipy.fft.ifft(np.conj(self.f) * fy, axis=-1)[:, :n]
        out = scipy.fft.ifft(np.sum(self.f * scipy.fft.fft(t, m, axis=-1) * np.array([[1.0], [-1.0]]), axis=0))[:n]
        out /= self.u0
        return out.real if self.real and np.isrealobj(y) else out

    def diagonal_sums(self) -> np.ndarray:
        """``d_k = sum_i (Sigma^-1)_(i+k, i)``, k = 0..n-1 (the lower diagonals; the upper are their conjugates)."""
        n, m = self.n, self.m
        ell = np.arange(n)
        fl = scipy.fft.fft(self.gen * ell, m, axis=-1)
        a = scipy.fft.ifft(np.abs(self.f) ** 2, axis=-1)[:, :n]  # A_k = sum_l g_{l+k} conj g_l
        b = scipy.fft.ifft(self.f * np.conj(fl), axis=-1)[:, :n]  # B_k = sum_l l g_{l+k} conj g_l
        w = (n - ell) * a - b
        d = (w[0] - w[1]) / self.u0
        return d.real if self.real else d


def _lag_contraction(jac: np.ndarray, d: np.ndarray) -> np.ndarray:
    """``Re sum_k w_k dR_j(k) conj(d_k)``, ``w_0 = 1``, ``w_k = 2``: the Hermitian-Toeplitz trace per row of ``jac``."""
    weights = np.conj(d) * 2.0
    weights[0] *= 0.5
    return np.real(np.sum(jac * weights, axis=-1))  # elementwise: a p x N BLAS call thrashes on a shared machine


def _autocorrelation(x: np.ndarray) -> np.ndarray:
    """``a_k = sum_t x_(t+k) conj x_t`` for k = 0..n-1 by zero-padded FFT."""
    n = x.size
    m = scipy.fft.next_fast_len(2 * n)
    f = scipy.fft.fft(x, m)
    a = scipy.fft.ifft(np.abs(f) ** 2)[:n]
    return a.real if np.isrealobj(x) else a


def _toeplitz_path(family, theta, prep, context, gradient):
    n = prep.n
    dtype = float if prep.real_valued else complex
    c = np.zeros(n, dtype=dtype)
    jac = np.zeros((len(theta), n), dtype=dtype) if gradient else None
    for comp, sl in family.components():
        r, jc = _component_acv(comp, theta[sl], prep, context, gradient)
        c += r
        if gradient:
            jac[sl] = jc
    scale0 = 1.0 + NUGGET
    c[0] = np.real(c[0]) * scale0
    fac = _levinson_factor(c)
    if fac is None:
        return np.inf, (np.full(len(theta), np.nan) if gradient else None)
    logdet, u = fac
    x = prep.z.real if prep.real_valued else prep.z.astype(complex, copy=False)
    gs = _GohbergSemencul(u)
    alpha = gs.solve(x)
    quad = float(np.real(np.vdot(x, alpha)))
    value = _assemble(logdet, quad, n, prep.real_valued)
    if not gradient:
        return value, None
    jac[:, 0] = np.real(jac[:, 0]) * scale0  # the nugget follows R(0)
    g = _lag_contraction(jac, gs.diagonal_sums() - _autocorrelation(alpha))
    return value, (0.5 * g if prep.real_valued else g)


def _assemble(logdet: float, quad: float, m: int, real: bool) -> float:
    if real:
        return float(0.5 * (m * np.log(2 * np.pi) + logdet + quad))
    return float(m * np.log(np.pi) + logdet + quad)


# ----------------------------------------------------------------------------------------------------
# the dense fallback


def _diagonal_sums_dense(mat: np.ndarray) -> np.ndarray:
    """``d_k = sum_i M_(i+k, i)`` for k = 0..n-1."""
    return np.array([np.trace(mat, offset=-k) for k in range(mat.shape[0])])


def _dense_path(family, theta, prep, context, gradient):
    idx = np.flatnonzero(prep.valid)
    x = prep.z[idx]
    full = idx.size == prep.n
    comps = []
    cov = None
    for comp, sl in family.components():
        r, jc = _component_acv(comp, theta[sl], prep, context, gradient)
        comps.append((comp, sl, jc))
        block = scipy.linalg.toeplitz(r, np.conj(r))  # Sigma_ij = R(i - j)
        if not full:
            block = block[np.ix_(idx, idx)]
        if comp.modulated:
            w = prep.modulation[idx]
            block = block * np.outer(w, np.conj(w))
        cov = block if cov is None else cov + block
    if prep.real_valued:
        cov = np.real(cov)
        x = np.real(x)
    r00 = float(np.real(cov[0, 0]))
    cov[np.diag_indices_from(cov)] += NUGGET * r00
    try:
        chol = scipy.linalg.cho_factor(cov, lower=True, check_finite=False)
    except (np.linalg.LinAlgError, ValueError):
        return np.inf, (np.full(len(theta), np.nan) if gradient else None)
    diag = np.real(np.diag(chol[0]))
    if not np.all(np.isfinite(diag)) or np.any(diag <= 0):
        return np.inf, (np.full(len(theta), np.nan) if gradient else None)
    logdet = 2 * float(np.sum(np.log(diag)))
    alpha = scipy.linalg.cho_solve(chol, x, check_finite=False)
    quad = float(np.real(np.vdot(x, alpha)))
    m = idx.size
    value = _assemble(logdet, quad, m, prep.real_valued)
    if not gradient:
        return value, None
    potri = scipy.linalg.get_lapack_funcs("potri", (chol[0],))
    inv, info = potri(chol[0], lower=True)  # Sigma^-1 from the Cholesky factor (lower triangle)
    if info != 0:
        return value, np.full(len(theta), np.nan)
    inv = np.tril(inv)
    inv += np.conj(np.tril(inv, -1).T)
    wmat = inv - np.outer(alpha, np.conj(alpha))  # W = Sigma^-1 - alpha alpha^H (Hermitian)
    emb = np.zeros((prep.n, prep.n), dtype=wmat.dtype)
    emb[np.ix_(idx, idx)] = wmat
    d_plain = None
    g = np.zeros(len(theta))
    for comp, sl, jc in comps:
        jc = jc.copy()
        jc[:, 0] = np.real(jc[:, 0]) * (1.0 + NUGGET)  # the nugget follows R(0) of every component
        if comp.modulated:
            wfull = prep.modulation
            d = _diagonal_sums_dense(emb * np.outer(np.conj(wfull), wfull))
        else:
            if d_plain is None:
                d_plain = _diagonal_sums_dense(emb)
            d = d_plain
        g[sl] = _lag_contraction(jc, d)
    return value, (0.5 * g if prep.real_valued else g)


# ----------------------------------------------------------------------------------------------------
# public functions


def exact_negloglik(family: ModelFamily, theta, prep: PreparedWindow, context: FitContext) -> float:
    """Negative exact Gaussian log-likelihood of a window's valid samples.

    The same value as a dense Cholesky factorisation, in O(N^2) for complete windows without a
    latitude-following component.

    Parameters
    ----------
    family : ModelFamily
        The model; its ``components()`` add up to the covariance.
    theta : array_like of float
        Parameters in natural units, in the order of ``family.parameters``.
    prep : PreparedWindow
        From :func:`~driftspec.analysis.spectral.likelihood.prepare_window`: ``z`` (complex velocity
        ``u + i v`` in m/s, demeaned, zero where missing), ``valid``, ``lags_days`` and, for a
        latitude-following model, ``modulation``.
    context : FitContext
        Passed to the family's autocovariance (sample interval in days, latitude).

    Returns
    -------
    float
        ``m log(pi) + log det Sigma + x^H Sigma^-1 x`` for a complex series, ``1/2 (m log(2 pi) + log det Sigma
        + x^T Sigma^-1 x)`` for a real one (``m`` valid samples, ``Sigma`` in m^2/s^2 with a relative nugget
        ``1e-10 R(0)``); ``inf`` when ``Sigma`` is not numerically positive definite.

    Notes
    -----
    Method (see the module docstring): for a complete window whose components are all stationary,
    ``Sigma`` is Hermitian Toeplitz and one compiled Levinson recursion on the Yule-Walker system gives the
    reflection coefficients (hence ``log det Sigma = sum log v_k`` from the prediction-error variances) and
    the predictor, whose Gohberg-Semencul form of ``Sigma^-1`` gives ``x^H Sigma^-1 x`` by FFT: O(N^2) in all.
    With missing samples or a latitude-following (modulated) component this falls back to the dense
    Cholesky factorisation of ``Sigma`` on the valid samples: correct, but O(m^3).

    References
    ----------
    "The fitting of time-series models". Revue de l'Institut International de Statistique 28, 233-244
    (1960). doi:10.2307/1401322. "On the inversion of finite Toeplitz matrices and their continuous
    analogs". Matematicheskie Issledovaniya 7(2), 201-223 (1972). "Time Series: Theory and Methods",
    Springer (1991), sections 5.2 and 8.7.
    """
    theta = _check(family, theta, prep)
    path = _toeplitz_path if _fast_path(family, prep) else _dense_path
    return path(family, theta, prep, context, False)[0]


def exact_negloglik_grad(family: ModelFamily, theta, prep: PreparedWindow, context: FitContext):
    """Negative exact Gaussian log-likelihood and its analytic gradient in the optimiser coordinates.

    Parameters
    ----------
    family, theta, prep, context
        As for :func:`exact_negloglik`.

    Returns
    -------
    value : float
        As :func:`exact_negloglik` (``inf`` when ``Sigma`` is not positive definite).
    grad : ndarray of float, shape (p,)
        ``dL/dx_j`` with ``x_j = log theta_j`` for log-scale parameters and ``x_j = theta_j`` for linear ones
        (the coordinates of ``family.autocovariance_jacobian``); NaN when ``value`` is ``inf``.

    Notes
    -----
    Analytic: ``dL/dx_j = tr(Sigma^-1 dSigma_j) - alpha^H dSigma_j alpha`` with ``alpha = Sigma^-1 x`` (half of it
    for a real series). On the Toeplitz path both terms are sums over lags of ``dR_j`` against the diagonal
    sums of ``Sigma^-1`` (Gohberg-Semencul, by FFT) and the autocorrelation of ``alpha`` (one FFT): the gradient
    costs little more than the value. On the dense fallback (gaps or a modulated component) the same sums come
    from the diagonals of ``Sigma^-1 - alpha alpha^H``, O(m^3).

    References
    ----------
    "Maximum likelihood estimation of models for residual covariance in spatial regression". Biometrika 71,
    135-146 (1984). doi:10.1093/biomet/71.1.135. "On the inversion of finite Toeplitz matrices and their
    continuous analogs". Matematicheskie Issledovaniya 7(2), 201-223 (1972).
    """
    theta = _check(family, theta, prep)
    path = _toeplitz_path if _fast_path(family, prep) else _dense_path
    return path(family, theta, prep, context, True)


def exact_observed_information(family: ModelFamily, theta, prep: PreparedWindow, context: FitContext,
                               step: float = 1e-4) -> np.ndarray:
    """Observed information (Hessian of :func:`exact_negloglik`) in the optimiser coordinates.

    Parameters
    ----------
    family, theta, prep, context
        As for :func:`exact_negloglik`.
    step : float
        Central-difference step in the optimiser coordinates (relative for log-scale parameters; times
        ``max(1, |theta_j|)`` for linear ones).

    Returns
    -------
    ndarray of float, shape (p, p)
        ``d^2 L / dx_i dx_j`` with ``x`` as in :func:`exact_negloglik_grad`, symmetrised; its inverse is the
        covariance of the maximum-likelihood estimate of ``x``. NaN where a gradient could not be evaluated.

    Notes
    -----
    Central differences of the analytic gradient :func:`exact_negloglik_grad`: ``2 p`` gradient evaluations
    (error ``O(step^2)``), not the ``O(p^2)`` likelihood evaluations of a finite-difference Hessian. A parameter
    within a step of its bound is differenced one-sidedly, into the bounds.
    """
    theta = _check(family, theta, prep)
    if not step > 0:
        raise ValueError("step must be positive")
    p = theta.size
    hess = np.empty((p, p))
    g0 = None
    for j, par in enumerate(family.parameters):
        tp, tm = theta.copy(), theta.copy()
        if par.scale == "log":
            h = step
            tp[j] *= np.exp(h)
            tm[j] *= np.exp(-h)
        else:
            h = step * max(1.0, abs(theta[j]))
            tp[j] += h
            tm[j] -= h
        # at a bound the difference is one-sided, into the parameter space (error O(step))
        below, above = tm[j] < par.lower, tp[j] > par.upper
        if below or above:
            if g0 is None:
                g0 = exact_negloglik_grad(family, theta, prep, context)[1]
            if below:
                hess[:, j] = (exact_negloglik_grad(family, tp, prep, context)[1] - g0) / h
            else:
                hess[:, j] = (g0 - exact_negloglik_grad(family, tm, prep, context)[1]) / h
            continue
        gp = exact_negloglik_grad(family, tp, prep, context)[1]
        gm = exact_negloglik_grad(family, tm, prep, context)[1]
        hess[:, j] = (gp - gm) / (2 * h)
    return 0.5 * (hess + hess.T)
