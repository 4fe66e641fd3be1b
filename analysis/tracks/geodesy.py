"""Spherical geometry for velocities: unit vectors, local east/north frames, finite differences.

All computations are on a sphere of radius :data:`~driftspec.analysis.conventions.EARTH_RADIUS_M`.
Working with Cartesian unit vectors makes the antimeridian and the poles ordinary places.
"""

from __future__ import annotations

import numpy as np

from ..conventions import EARTH_RADIUS_M


def unit_vectors(lat_deg, lon_deg) -> np.ndarray:
    """Cartesian unit vectors (..., 3) of points given in degrees."""
    phi, lam = np.deg2rad(lat_deg), np.deg2rad(lon_deg)
    c = np.cos(phi)
    return np.stack([c * np.cos(lam), c * np.sin(lam), np.sin(phi)], axis=-1)


def east_north(lat_deg, lon_deg, vec) -> tuple[np.ndarray, np.ndarray]:
    """Components of Cartesian vectors ``vec`` along local east and north at the given points."""
    phi, lam = np.deg2rad(lat_deg), np.deg2rad(lon_deg)
    east = -np.sin(lam) * vec[..., 0] + np.cos(lam) * vec[..., 1]
    north = (-np.sin(phi) * np.cos(lam) * vec[..., 0] - np.sin(phi) * np.sin(lam) * vec[..., 1]
             + np.cos(phi) * vec[..., 2])
    return east, north


def great_circle_distance_m(lat1, lon1, lat2, lon2):
    """Great-circle distance in metres (haversine formula; exact on the sphere)."""
    p1, p2 = np.deg2rad(lat1), np.deg2rad(lat2)
    a = np.sin(0.5 * (p2 - p1)) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(0.5 * np.deg2rad(np.subtract(lon2, lon1))) ** 2
    return 2.0 * EARTH_RADIUS_M * np.arcsin(np.sqrt(np.clip(a, 0.0, 1.0)))


def displacement_east_north_m(lat0, lon0, lat1, lon1, lat_ref=None, lon_ref=None):
    """East and north components (m) of the displacement from point 0 to point 1.

    The displacement is the great-circle arc from 0 to 1, expressed in the local frame at the reference
    point (default: the arc's midpoint). Its length equals the great-circle distance.
    """
    p0, p1 = unit_vectors(lat0, lon0), unit_vectors(lat1, lon1)
    if lat_ref is None:
        mid = p0 + p1
        mid /= np.linalg.norm(mid, axis=-1, keepdims=True)
        lat_ref = np.rad2deg(np.arcsin(np.clip(mid[..., 2], -1, 1)))
        lon_ref = np.rad2deg(np.arctan2(mid[..., 1], mid[..., 0]))
    e, n = east_north(lat_ref, lon_ref, p1 - p0)
    chord = np.hypot(e, n)
    dist = great_circle_distance_m(lat0, lon0, lat1, lon1)
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where(chord > 0, dist / np.where(chord > 0, chord, 1.0), 0.0)
    return e * scale, n * scale


class PointFrames:
    """Unit vectors and local east/north frames of many points, computed once (four trigonometric calls per
    point) and shared by every displacement between them, as finite differences on a grid need."""

    def __init__(self, lat_deg, lon_deg):
        phi, lam = np.deg2rad(np.asarray(lat_deg, float)), np.deg2rad(np.asarray(lon_deg, float))
        self.sin_phi, self.cos_phi = np.sin(phi), np.cos(phi)
        self.sin_lam, self.cos_lam = np.sin(lam), np.cos(lam)
        self.xyz = np.stack([self.cos_phi * self.cos_lam, self.cos_phi * self.sin_lam, self.sin_phi])

    def displacement_east_north_m(self, i0, i1, iref):
        """As :func:`displacement_east_north_m` from point ``i0`` to ``i1`` in the frame of point ``iref``
        (index arrays). The great-circle length comes from the chord, ``2 R asin(|p1 - p0| / 2)``."""
        d = self.xyz[:, i1] - self.xyz[:, i0]
        sl, cl = self.sin_lam[iref], self.cos_lam[iref]
        sp, cp = self.sin_phi[iref], self.cos_phi[iref]
        east = -sl * d[0] + cl * d[1]
        north = -sp * (cl * d[0] + sl * d[1]) + cp * d[2]
        chord3 = np.sqrt(d[0] ** 2 + d[1] ** 2 + d[2] ** 2)
        dist = 2.0 * EARTH_RADIUS_M * np.arcsin(np.minimum(0.5 * chord3, 1.0))
        chord = np.hypot(east, north)
        with np.errstate(invalid="ignore", divide="ignore"):
            scale = np.where(chord > 0, dist / np.where(chord > 0, chord, 1.0), 0.0)
        return east * scale, north * scale
