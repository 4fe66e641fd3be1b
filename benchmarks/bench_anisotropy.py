"""The anisotropic fit against the isotropic fit of the same windows: cost (medians side by side, target <= 3x),
and the isotropy test's size and power.

    python benchmarks/bench_anisotropy.py [--windows 40] [--size-windows 200] [--power-windows 60]

Windows: 60 days hourly, Matérn alpha 1.2, lambda 1/day, variance 0.04 m^2/s^2, fitted to 6 cpd without a taper
(the field notes' setting); anisotropic ones 3:1 at 30 degrees from east, made as two independent real Matérn
series scaled and rotated.
"""

import argparse
import os
import statistics
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(__file__))

import pandas as pd  # noqa: E402

from driftspec.analysis import FitSpec, Window, fit_series, fit_window, simulate  # noqa: E402
from driftspec.analysis.fitting.anisotropy import fit_anisotropic  # noqa: E402

HOUR = 3600.0
DT = 1 / 24
MATERN = [0.04, 1.2, 1.0]


def anisotropic_series(n, rho, angle_deg, rng):
    x = simulate("matern", MATERN, n=n, dt=HOUR, seed=rng, real=True, size=2)
    a, b = np.sqrt((1 + rho) / 2) * x[0], np.sqrt((1 - rho) / 2) * x[1]
    c, s = np.cos(np.radians(angle_deg)), np.sin(np.radians(angle_deg))
    return (c * a - s * b) + 1j * (s * a + c * b)


def per_window_times(fn, zs):
    out = []
    for z in zs:
        t = time.perf_counter()
        fn(z)
        out.append(time.perf_counter() - t)
    return out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--windows", type=int, default=40)
    ap.add_argument("--size-windows", type=int, default=200)
    ap.add_argument("--power-windows", type=int, default=60)
    ap.add_argument("--taper", default="none")
    a = ap.parse_args()
    rng = np.random.default_rng(0)
    zs = [anisotropic_series(1440, 0.5, 30.0, rng) for _ in range(a.windows)]
    fit_series(zs[0], HOUR, model="matern", max_freq=6.0)  # warm the Matérn table
    fit_anisotropic(zs[0], DT, max_freq=6.0)

    iso = {}

    def fit_iso(z):
        iso[id(z)] = fit_series(z, HOUR, model="matern", max_freq=6.0, taper=a.taper)

    t_iso = per_window_times(fit_iso, zs)
    t_aniso = per_window_times(lambda z: fit_anisotropic(z, DT, max_freq=6.0, taper=a.taper), zs)
    t_base = per_window_times(lambda z: fit_anisotropic(z, DT, base_fit=iso[id(z)], taper=a.taper), zs)
    t_chi2 = per_window_times(lambda z: fit_anisotropic(z, DT, max_freq=6.0, taper=a.taper, calibration="chi2"), zs)
    m_iso, m_aniso = statistics.median(t_iso), statistics.median(t_aniso)
    m_base, m_chi2 = statistics.median(t_base), statistics.median(t_chi2)
    # what `driftspec fit` does per window: the default candidates, without and with --anisotropic (velocities
    # as measured, so both see the same series; latitude 30 N)
    t0 = pd.Timestamp("2030-01-01")
    wins = {id(z): Window("A", 0, 0, t0, t0 + pd.Timedelta(hours=1439), HOUR, z, np.full(1440, 30.0),
                          np.full(1440, -30.0)) for z in zs}
    plain = FitSpec(velocity="measured", observation="none", band=6.0)
    aniso = FitSpec(velocity="measured", observation="none", band=6.0, anisotropic=True)
    m_win = statistics.median(per_window_times(lambda z: fit_window(wins[id(z)], plain), zs))
    m_win_a = statistics.median(per_window_times(lambda z: fit_window(wins[id(z)], aniso), zs))
    print(f"cost per 60-day hourly window ({a.windows} windows, taper {a.taper}), medians:")
    print(f"  isotropic fit_series              {1e3 * m_iso:8.1f} ms   1.00x")
    print(f"  fit_anisotropic (self-contained)  {1e3 * m_aniso:8.1f} ms   {m_aniso / m_iso:.2f}x   (target <= 3x)")
    print(f"  fit_anisotropic(base_fit=...)     {1e3 * m_base:8.1f} ms   {m_base / m_iso:.2f}x   (extra cost of "
          f"--anisotropic beside the isotropic candidate)")
    print(f"  fit_anisotropic, chi2 reference   {1e3 * m_chi2:8.1f} ms   {m_chi2 / m_iso:.2f}x   (no simulation)")
    print("a window as `driftspec fit` fits it (candidates matern and matern+inertial, selection):")
    print(f"  default                           {1e3 * m_win:8.1f} ms   1.00x")
    print(f"  --anisotropic                     {1e3 * m_win_a:8.1f} ms   {m_win_a / m_win:.2f}x   (target <= 3x)")

    fits = [fit_anisotropic(z, DT, max_freq=6.0, taper=a.taper) for z in zs]
    ratio = np.median([f.diffusivity_major / f.diffusivity_minor for f in fits])
    angle = np.median([f.diffusivity_angle_deg for f in fits])
    t_int = np.sqrt(np.pi) * 0.918169 / 1.298055 * 86400  # Matérn integral time scale, s (alpha 1.2, lambda 1)
    print(f"recovery on 3:1 at 30 deg: median ratio {ratio:.2f} (2.2-4), median angle {angle:.1f} deg, "
          f"median major {np.median([f.diffusivity_major for f in fits]):.0f} m2/s "
          f"(closed form {MATERN[0] * 0.75 * t_int:.0f}), minor {np.median([f.diffusivity_minor for f in fits]):.0f}"
          f" (closed form {MATERN[0] * 0.25 * t_int:.0f})")

    rng = np.random.default_rng(1)
    rows = []
    for _ in range(a.size_windows):
        z = simulate("matern", MATERN, n=1440, dt=HOUR, seed=rng)
        ps = [fit_anisotropic(z, DT, max_freq=6.0, taper=a.taper, calibration=c).isotropy_pvalue
              for c in ("simulated", "scaled", "chi2")]
        rows.append(ps)
    p = np.array(rows).reshape(-1, 3)
    print(f"size on {a.size_windows} isotropic windows (rejections at 5 % / 1 %):")
    for j, name in enumerate(("simulated (default)", "scaled chi2_2", "plain chi2_2")):
        print(f"  {name:22s} {100 * np.mean(p[:, j] < 0.05):5.1f} % / {100 * np.mean(p[:, j] < 0.01):4.1f} %")
    q = np.array([fit_anisotropic(anisotropic_series(1440, 0.5, 30.0, rng), DT, max_freq=6.0,
                                  taper=a.taper).isotropy_pvalue for _ in range(a.power_windows)])
    if a.power_windows:
        print(f"power on {a.power_windows} windows 3:1 at 30 deg: rejects at 1 % in {100 * np.mean(q < 0.01):.1f} %"
              " (target >= 90 %)")


if __name__ == "__main__":
    main()
