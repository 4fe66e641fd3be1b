"""Velocity variance ellipses: how one-directional the variability of a window is.

For the velocity minus its window mean, the 2x2 covariance ``C = [[<u'u'>, <u'v'>], [<u'v'>, <v'v'>]]``
has eigenvalues ``var_major >= var_minor`` (m^2/s^2); the major axis points at ``ellipse_angle_deg``
(degrees counterclockwise from east, in (-90, 90]); ``anisotropy_ratio = var_major / var_minor``
(1 = isotropic). Ellipses are averaged by averaging their covariances, never their axes.

Reference: Emery, W. J., Thomson, R. E. (2014). Data Analysis Methods in Physical Oceanography, 3rd ed.,
Elsevier, section 4.3 (principal axes of velocity variance).
"""

from __future__ import annotations

import numpy as np

ELLIPSE_COLUMNS = ("cov_uu", "cov_vv", "cov_uv", "var_major", "var_minor", "ellipse_angle_deg", "anisotropy_ratio")
ELLIPSE_UNITS = {"cov_uu": "m2 s-2", "cov_vv": "m2 s-2", "cov_uv": "m2 s-2", "var_major": "m2 s-2",
                 "var_minor": "m2 s-2", "ellipse_angle_deg": "degree", "anisotropy_ratio": "1"}


def ellipse_from_covariance(cuu, cvv, cuv) -> dict:
    """Principal axes of a velocity covariance (closed form of the 2x2 symmetric eigenproblem)."""
    cuu, cvv, cuv = (np.asarray(a, float) for a in (cuu, cvv, cuv))
    mean = 0.5 * (cuu + cvv)
    half = np.sqrt(0.25 * (cuu - cvv) ** 2 + cuv**2)
    major, minor = mean + half, np.maximum(mean - half, 0.0)
    angle = np.degrees(0.5 * np.arctan2(2 * cuv, cuu - cvv))
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(minor > 0, major / np.where(minor > 0, minor, 1), np.inf)
    return {"var_major": major, "var_minor": minor, "ellipse_angle_deg": angle, "anisotropy_ratio": ratio}


def variance_ellipse(z) -> dict:
    """Variance ellipse of complex velocity ``z`` (NaN = missing) about its mean; floats (NaN if < 3 samples)."""
    z = np.asarray(z, complex)
    z = z[np.isfinite(z)]
    if z.size < 3:
        return {k: np.nan for k in ELLIPSE_COLUMNS}
    d = z - z.mean()
    u, v = d.real, d.imag
    cuu, cvv, cuv = np.mean(u * u), np.mean(v * v), np.mean(u * v)
    out = {"cov_uu": float(cuu), "cov_vv": float(cvv), "cov_uv": float(cuv)}
    out.update({k: float(v) for k, v in ellipse_from_covariance(cuu, cvv, cuv).items()})
    return out
