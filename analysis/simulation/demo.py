"""A synthetic, deterministic demo deployment: the fictional "Tern Basin" release.

Drifters are released across an open-ocean box of the eastern tropical and subtropical North Pacific
(5 S to 40 N, 150 W to 128 W; the box the floats stay in, 7 S to 42 N and 152 W to 127 W, holds no
land in the coarse shoreline, which the tests check) and carried by

* a smooth mean circulation of our own: a subtropical gyre with a westward-intensified boundary current
  (the classical Stommel-type streamfunction ``sin(pi y) (1 - x - exp(-x / delta))``), and a band of
  zonal currents near the equator (westward at the equator, eastward near 7 N);
* a Matérn background velocity and an inertial oscillation that follows the local inertial frequency,
  simulated by circulant embedding from the same model families the fitting code uses, with
  parameters that vary smoothly with the release position.

Fixes come at irregular, satellite-like times (passes clustered twice a day, random gaps of days) for
"irregular" drifters, or hourly for "hourly" drifters, with white position noise (300 m and 20 m per
component) and a few duplicate and wild records for quality control to find. Every name is invented.
The generator returns the fixes and the ground-truth parameters of each track.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..conventions import EARTH_RADIUS_M, inertial_frequency_cpd
from ..models import Inertial, Matern
from ..models.inertial import modulation_sequence
from .simulate import circulant_sample, embedding_autocovariance

DOMAIN = {"lat": (-5.0, 40.0), "lon": (-150.0, -128.0)}
SCENARIO = "Tern Basin release (synthetic demo data)"


def truth_fields(lat, lon):
    """Generating parameters as smooth functions of position (the demo's ground truth)."""
    lat, lon = np.asarray(lat, float), np.asarray(lon, float)
    x = (lon - DOMAIN["lon"][0]) / (DOMAIN["lon"][1] - DOMAIN["lon"][0])
    western = np.exp(-x / 0.2)
    equatorial = np.exp(-((lat - 2.0) / 8.0) ** 2)
    return {
        "matern_variance": 0.008 + 0.02 * western + 0.025 * equatorial,
        "matern_alpha": 1.15 + 0.4 * np.clip((lat + 5) / 45, 0, 1),
        "matern_damping": 0.4 + 0.8 * np.clip((lat + 5) / 45, 0, 1),
        "inertial_variance": 0.002 + 0.008 * np.clip((lat - 10) / 30, 0, 1),
        "inertial_damping": 0.25 + 0.0 * lat,
    }


def mean_velocity(lat, lon):
    """Mean eastward/northward velocity (m/s) of the demo circulation."""
    lat, lon = np.asarray(lat, float), np.asarray(lon, float)
    x = np.clip((lon - DOMAIN["lon"][0]) / 25.0, 0, 1)
    y = np.clip((lat - 12.0) / 28.0, 0, 1)
    delta = 0.08
    amp = 0.08  # m/s scale of the gyre interior
    # psi = sin(pi y) (1 - x - exp(-x/delta)); u = -dpsi/dy, v = dpsi/dx (scaled)
    psi_x = 1 - x - np.exp(-x / delta)
    dpsi_dx = -1 + np.exp(-x / delta) / delta
    gyre = (lat > 12.0) & (lat < 40.0)
    u = np.where(gyre, -amp * np.pi * np.cos(np.pi * y) * psi_x * 2.0, 0.0)
    v = np.where(gyre, amp * np.sin(np.pi * y) * dpsi_dx * 0.35, 0.0)
    u += -0.25 * np.exp(-(lat / 3.0) ** 2) + 0.15 * np.exp(-((lat - 7.0) / 2.0) ** 2)
    return u, v


def _sample_times(rng, days, kind):
    if kind == "hourly":
        t = np.arange(0, days * 24) / 24.0
    else:
        # passes cluster loosely around two times of day; about 12 fixes per day
        n = int(days * 16)
        base = np.sort(rng.uniform(0, days, n))
        phase = (base * 2) % 1.0
        keep = rng.uniform(size=n) < 0.75 + 0.25 * np.cos(2 * np.pi * (phase - 0.3))
        t = base[keep]
        t = np.round(t * 1440) / 1440  # whole minutes
    # gaps: a few outages of 1-4 days
    for _ in range(rng.poisson(days / 120)):
        g0 = rng.uniform(0, days)
        t = t[(t < g0) | (t > g0 + rng.uniform(1, 4))]
    return t


def generate_demo(n_tracks: int = 60, days: float = 180.0, seed: int = 2031, start="2031-03-01",
                  faults: bool = True):
    """Generate the demo deployment.

    Parameters
    ----------
    n_tracks : int
        Number of drifters.
    days : float
        Length of every track, days.
    seed : int
        Seed; the output is a deterministic function of the arguments.
    start : str
        Release date (UTC) of the first drifter; later releases follow within 30 days.
    faults : bool
        Insert a few duplicate and wild records (for quality control to catch).

    Returns
    -------
    fixes : pandas.DataFrame
        Columns ``id, time, lat, lon, position_error_m``.
    truth : pandas.DataFrame
        One row per track with the generating parameters and sampling kind.
    """
    rng = np.random.default_rng(seed)
    dt_h = 1.0
    n = int(round(days * 24 / dt_h))
    dt_s = dt_h * 3600.0
    dt_days = dt_h / 24.0
    lat0 = rng.uniform(0.0, 36.0, n_tracks)
    lon0 = rng.uniform(-147.0, -130.0, n_tracks)
    truth = truth_fields(lat0, lon0)
    matern, inertial = Matern(), Inertial()
    z_bg = np.empty((n_tracks, n), complex)
    z_in = np.empty((n_tracks, n), complex)
    for k in range(n_tracks):
        th = [truth["matern_variance"][k], truth["matern_alpha"][k], truth["matern_damping"][k]]
        th_i = [truth["inertial_variance"][k], 0.0, truth["inertial_damping"][k]]
        for out, fam, theta in ((z_bg, matern, th), (z_in, inertial, th_i)):
            acov = embedding_autocovariance(lambda lag, f=fam, t=theta: f.autocovariance(t, lag), n, dt_days)
            out[k] = circulant_sample(acov, n, rng)[0]
    lat = np.empty((n_tracks, n))
    lon = np.empty((n_tracks, n))
    mod = np.zeros((n_tracks, n), complex)
    # first pass: mean flow + background; the inertial part follows the latitude of that path
    for pass_ in range(2):
        la, lo = lat0.copy(), lon0.copy()
        for i in range(n):
            lat[:, i], lon[:, i] = la, lo
            um, vm = mean_velocity(la, lo)
            zi = z_in[:, i] * mod[:, i]
            u = um + z_bg[:, i].real + zi.real
            v = vm + z_bg[:, i].imag + zi.imag
            la = la + np.rad2deg(v * dt_s / EARTH_RADIUS_M)
            lo = lo + np.rad2deg(u * dt_s / (EARTH_RADIUS_M * np.cos(np.deg2rad(la))))
            # reflect at the edges of the open-ocean box
            la = np.where(la > 42, 84 - la, np.where(la < -7, -14 - la, la))
            lo = np.where(lo > -127, -254 - lo, np.where(lo < -152, -304 - lo, lo))
        if pass_ == 0:
            mod = np.stack([modulation_sequence(lat[k], dt_days) for k in range(n_tracks)])
    t0 = pd.Timestamp(start)
    offsets = np.sort(rng.uniform(0, 30, n_tracks))
    kinds = np.where(rng.uniform(size=n_tracks) < 0.35, "hourly", "irregular")
    noise = np.where(kinds == "hourly", 20.0, 300.0)
    rows = []
    for k in range(n_tracks):
        t = _sample_times(rng, days - dt_days, kinds[k])
        tt = np.arange(n) * dt_days
        la_k = np.interp(t, tt, lat[k])
        lo_k = np.interp(t, tt, lon[k])
        la_k = la_k + np.rad2deg(rng.normal(0, noise[k], t.size) / EARTH_RADIUS_M)
        lo_k = lo_k + np.rad2deg(rng.normal(0, noise[k], t.size) / (EARTH_RADIUS_M * np.cos(np.deg2rad(la_k))))
        times = t0 + pd.to_timedelta((offsets[k] + t) * 86400.0, unit="s").round("s")
        rows.append(pd.DataFrame({"id": f"TB31-{k + 1:04d}", "time": times, "lat": la_k, "lon": lo_k,
                                  "position_error_m": noise[k]}))
    fixes = pd.concat(rows, ignore_index=True)
    if faults and len(fixes) > 100:
        m = max(1, len(fixes) // 2000)
        dup = rng.choice(len(fixes), m, replace=False)
        wild = rng.choice(len(fixes), m, replace=False)
        fixes.loc[wild, "lat"] += rng.choice([-1, 1], m) * rng.uniform(1.0, 3.0, m)
        fixes = pd.concat([fixes, fixes.iloc[dup]], ignore_index=True)
        fixes = fixes.sort_values(["id", "time"], kind="stable").reset_index(drop=True)
    truth_df = pd.DataFrame({
        "id": [f"TB31-{k + 1:04d}" for k in range(n_tracks)],
        "release_lat": lat0, "release_lon": lon0, "sampling": kinds, "position_noise_m": noise,
        **{k: v for k, v in truth.items()},
        "inertial_frequency_at_release": inertial_frequency_cpd(lat0),
    })
    return fixes, truth_df


def write_demo(outdir, n_tracks=60, days=180.0, seed=2031) -> dict:
    """Write ``fixes.parquet`` and ``truth.csv`` into ``outdir``; returns the paths."""
    from pathlib import Path

    from ..io import write_fixes

    out = Path(outdir)
    out.mkdir(parents=True, exist_ok=True)
    fixes, truth = generate_demo(n_tracks, days, seed)
    p = write_fixes(fixes, out / "fixes.parquet")
    truth.to_csv(out / "truth.csv", index=False, float_format="%.6g")
    return {"fixes": p, "truth": out / "truth.csv", "n_fixes": len(fixes), "n_tracks": n_tracks}
