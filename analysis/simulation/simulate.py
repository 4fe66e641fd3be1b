"""Simulate Gaussian series from a model family by circulant embedding.

The autocovariance at lags ``0..N`` is embedded in a circulant of size ``2N``; its eigenvalues (one FFT)
are the variances of independent Fourier coefficients. Small negative eigenvalues (the embedding is not
always non-negative definite) are set to zero and reported.

References
----------
Davies, R. B., Harte, D. S. (1987). Tests for Hurst effect. Biometrika 74, 95-101.
doi:10.1093/biomet/74.1.95
Dietrich, C. R., Newsam, G. N. (1997). Fast and exact simulation of stationary Gaussian processes through
circulant embedding of the covariance matrix. SIAM J. Sci. Comput. 18, 1088-1107.
doi:10.1137/S1064827592240555
"""

from __future__ import annotations

import numpy as np
import scipy.fft

from ..conventions import SECONDS_PER_DAY, parse_timedelta_seconds
from ..models import FitContext, get_family
from ..models.inertial import modulation_sequence


def circulant_sample(acov: np.ndarray, n: int, rng: np.random.Generator, size: int = 1,
                     real: bool = False) -> np.ndarray:
    """Samples (size, n) of a stationary Gaussian series with autocovariance ``acov[0..m/2]``.

    The embedding has size ``m = 2 (len(acov) - 1)``, at least ``2 n``; pass the autocovariance to longer
    lags than ``n`` when it decays slowly (see :func:`embedding_autocovariance`). Complex series are
    proper (circular): ``E[z z^T] = 0``. Negative eigenvalues left in the embedding are set to zero.
    """
    acov = np.asarray(acov, complex)
    half = acov.size - 1
    if half < n:
        raise ValueError("need the autocovariance at lags 0..n")
    m = 2 * half
    row = np.concatenate([acov[: half + 1], np.conj(acov[1:half][::-1])])
    lam = np.clip(scipy.fft.fft(row).real, 0, None)
    if real:
        eps = rng.standard_normal((size, m)) + 1j * rng.standard_normal((size, m))
        out = m * scipy.fft.ifft(np.sqrt(lam / m) * eps, axis=-1)[:, :n]
        return out.real  # real and imaginary parts are two independent real series; keep one
    eps = (rng.standard_normal((size, m)) + 1j * rng.standard_normal((size, m))) / np.sqrt(2)
    # z_j = sum_k sqrt(lam_k / m) eps_k exp(+2 pi i j k / m) gives E[z_j conj z_l] = R(j - l)
    return m * scipy.fft.ifft(np.sqrt(lam / m) * eps, axis=-1)[:, :n]


def embedding_autocovariance(acov_fn, n: int, dt_days: float, max_factor: int = 64) -> np.ndarray:
    """Autocovariance at lags ``0..m/2`` for the smallest embedding ``m = 2^k * 2n`` that is non-negative
    definite (Dietrich & Newsam 1997); the largest tried when none is."""
    factor = 1
    while True:
        half = n * factor
        r = np.asarray(acov_fn(np.arange(half + 1) * dt_days), complex)
        row = np.concatenate([r, np.conj(r[1:half][::-1])])
        lam = scipy.fft.fft(row).real
        if lam.min() >= -1e-9 * max(lam.max(), 1e-300) or factor >= max_factor:
            return r
        factor *= 2


def simulate(model, theta, n: int, dt, *, seed=None, size: int | None = None, latitude=None,
             inertial_frequency: str = "free", real: bool = False) -> np.ndarray:
    """Simulate complex velocity (m/s) from a model family.

    Parameters
    ----------
    model : str or ModelFamily
    theta : sequence or dict
        Parameters in natural units (order of ``family.names``, or a dict by name).
    n : int
        Number of samples.
    dt : float (seconds) or timedelta
    seed : int or numpy.random.Generator, optional
    size : int, optional
        Number of independent series; ``None`` returns one 1-D series.
    latitude : float or array, optional
        Needed by the latitude-following inertial model.
    real : bool
        Simulate a real-valued series with autocovariance ``Re R`` instead.

    Examples
    --------
    >>> z = simulate("matern", [0.02, 1.2, 1.0], n=1440, dt=3600.0, seed=0)
    >>> z.shape, z.dtype.kind
    ((1440,), 'c')
    """
    family = get_family(model, inertial_frequency)
    if isinstance(theta, dict):
        theta = [theta[k] for k in family.names]
    theta = np.asarray(theta, float)
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    dt_days = parse_timedelta_seconds(dt) / SECONDS_PER_DAY
    k = 1 if size is None else size
    lat_series = None
    if latitude is not None:
        lat_series = np.broadcast_to(np.asarray(latitude, float), (n,)).copy()
    from ..conventions import inertial_frequency_cpd

    ctx = FitContext(dt_days=dt_days,
                     latitude=None if lat_series is None else float(np.mean(lat_series)),
                     inertial_frequency_cpd=None if lat_series is None else
                     float(inertial_frequency_cpd(np.mean(lat_series))),
                     latitude_series=lat_series)
    out = np.zeros((k, n), dtype=float if real else complex)
    for comp, sl in family.components():
        r = embedding_autocovariance(lambda lag, c=comp, s=sl: c.autocovariance(theta[s], lag, ctx), n, dt_days)
        x = circulant_sample(r.real if real else r, n, rng, k, real=real)
        if comp.modulated:
            if lat_series is None:
                raise ValueError("the latitude-following model needs latitude")
            x = x * modulation_sequence(lat_series, dt_days)
        out += x
    return out[0] if size is None else out
