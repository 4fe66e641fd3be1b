"""Velocities from positions, checked against pyproj's geodesic on the WGS84 ellipsoid."""

import numpy as np
import pandas as pd
import pytest
from pyproj import Geod

from driftspec.analysis.io import read_fixes
from driftspec.analysis.tracks.geodesy import PointFrames, displacement_east_north_m, great_circle_distance_m
from driftspec.analysis.tracks.qc import clean_fixes
from driftspec.analysis.tracks.resample import regular_grid
from driftspec.analysis.tracks.velocity import add_velocity

GEOD = Geod(ellps="WGS84")
# sphere versus ellipsoid: distances differ by up to ~0.5 % (flattening 1/298)
SPHERE_TOL = 6e-3


@pytest.mark.parametrize("lat0,lon0,lat1,lon1", [
    (10.0, 20.0, 10.3, 20.4),
    (-45.0, 179.8, -45.1, -179.7),   # across the antimeridian
    (84.0, 30.0, 84.2, 60.0),        # high latitude
    (-89.0, 0.0, -88.9, 90.0),       # near the south pole
])
def test_distance_and_azimuth_against_pyproj(lat0, lon0, lat1, lon1):
    az, _, dist = GEOD.inv(lon0, lat0, lon1, lat1)
    ours = great_circle_distance_m(lat0, lon0, lat1, lon1)
    assert ours == pytest.approx(dist, rel=SPHERE_TOL)
    e, n = displacement_east_north_m(lat0, lon0, lat1, lon1, lat_ref=lat0, lon_ref=lon0)
    assert np.hypot(e, n) == pytest.approx(dist, rel=SPHERE_TOL)
    # azimuth at the start point, clockwise from north
    assert np.degrees(np.arctan2(e, n)) % 360 == pytest.approx(az % 360, abs=0.5)
    # the precomputed-frame form used on grids (chord-based length) gives the same displacement
    frames = PointFrames(np.array([lat0, lat1]), np.array([lon0, lon1]))
    e2, n2 = frames.displacement_east_north_m(np.array([0]), np.array([1]), np.array([0]))
    assert (e2[0], n2[0]) == (pytest.approx(float(e), abs=1e-6), pytest.approx(float(n), abs=1e-6))


def _track_along_geodesic(lat0, lon0, azimuth, speed, hours, tid="T1"):
    """Fixes of a float moving at constant speed along a geodesic, made with pyproj.Geod.fwd."""
    t = np.arange(hours) * 3600.0
    lon, lat, _ = GEOD.fwd(np.full(t.size, lon0), np.full(t.size, lat0), np.full(t.size, azimuth), speed * t)
    return pd.DataFrame({"id": tid, "time": pd.Timestamp("2030-01-01") + pd.to_timedelta(t, unit="s"),
                         "lat": lat, "lon": lon})


@pytest.mark.parametrize("lat0,lon0,az", [(0.0, 179.0, 90.0), (-30.0, -179.5, 270.0), (80.0, 10.0, 45.0)])
def test_constant_velocity_track(lat0, lon0, az):
    fixes, _ = clean_fixes(read_fixes(_track_along_geodesic(lat0, lon0, az, 0.5, 72)))
    vel = add_velocity(regular_grid(fixes))
    ok = vel["valid_velocity"].to_numpy()
    speed = np.hypot(vel["u"], vel["v"])[ok]
    assert ok.sum() == 70  # 72 samples, the two ends have no central difference
    assert np.allclose(speed, 0.5, rtol=SPHERE_TOL)
    assert ((vel["lon"] >= -180) & (vel["lon"] < 180)).all()
    # azimuth at each sample from pyproj (forward azimuth to the next fix) against ours
    lat, lon = vel["lat"].to_numpy()[ok], vel["lon"].to_numpy()[ok]
    az_ref = np.array([GEOD.inv(lon[i], lat[i], lon[i + 1], lat[i + 1])[0] for i in range(len(lat) - 1)])
    az_ours = np.degrees(np.arctan2(vel["u"].to_numpy()[ok], vel["v"].to_numpy()[ok]))[:-1]
    assert np.allclose((az_ours - az_ref + 180) % 360 - 180, 0, atol=1.0)


def test_forward_difference_reports_midpoints():
    fixes, _ = clean_fixes(read_fixes(_track_along_geodesic(5.0, 10.0, 0.0, 1.0, 10)))
    vel = add_velocity(regular_grid(fixes), method="forward")
    assert vel["valid_velocity"].sum() == 9
    first = vel.loc[vel["valid_velocity"]].iloc[0]
    assert first["time"] == pd.Timestamp("2030-01-01 00:30")
    assert first["v"] == pytest.approx(1.0, rel=SPHERE_TOL)
