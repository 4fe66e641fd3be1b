"""Pooled fits: the cost of one pooled fit of 100 windows against 100 single-window fits (medians side by side,
ratio), then a coverage study over replicates (95 % intervals from the cluster sandwich covering the simulated
truth) with the heterogeneity check's rejection rate under a shared truth (its size).

Simulation: 60-day hourly drifters at random latitudes 20-40 N with their own amplitudes and a shared spectral shape
(Matérn slope 1.2, damping 1/day; inertial damping 0.15/day, offset +0.02 cpd from the local inertial frequency),
measured velocities (observation "none"), 30-day windows overlapping by half (3 per drifter).

Then the same study for drifters of satellite-like irregular fixes (``generate_scenario("satellite")``: clustered
passes, per-fix errors of 250-1500 m, a latitude-following inertial oscillation), every drifter with the shape
SATELLITE_SHAPE and its own amplitudes, read through the whole pipeline (QC, gridding, windows) and pooled with the
default observation model (each window through the interpolation of its own fixes); beside it the same windows pooled
as regular differences with position noise, the approximation used before.

    python benchmarks/bench_pooled.py [--replicates 200] [--drifters 20] [--satellite-replicates 40]
                                      [--satellite-drifters 12]      (--replicates 0: the cost only)
"""

import argparse

import numpy as np
import pandas as pd
from _common import median_time

from driftspec.analysis import FitSpec, Window, fit_window, inertial_frequency_cpd, simulate
from driftspec.analysis.regional.pooled import OFFSET, n_simulations, pool_fit
from driftspec.analysis.simulation.scenarios import generate_scenario
from driftspec.analysis.tracks.pipeline import load_velocities
from driftspec.analysis.tracks.windows import iter_windows

HOUR = 3600.0
T0 = pd.Timestamp("2030-01-01")
TRUTH = {"matern_alpha": 1.2, "matern_damping": 1.0, "inertial_damping": 0.15, OFFSET: 0.02}
SPEC = FitSpec(models=("matern+inertial",), velocity="measured", observation="none", inertial_frequency="free")


def drifters(n_tracks, seed, days=60, window_days=30, overlap=0.5):
    rng = np.random.default_rng(seed)
    n, length = int(days * 24), int(window_days * 24)
    hop = int(length * (1 - overlap))
    out = []
    for t in range(n_tracks):
        lat = rng.uniform(20, 40)
        theta = [rng.uniform(0.01, 0.04), TRUTH["matern_alpha"], TRUTH["matern_damping"], rng.uniform(0.005, 0.02),
                 inertial_frequency_cpd(lat) + TRUTH[OFFSET], TRUTH["inertial_damping"]]
        z = simulate("matern+inertial", theta, n=n, dt=HOUR, seed=rng)
        for k, s in enumerate(range(0, n - length + 1, hop)):
            out.append(Window(f"D{t}", 0, k, T0 + pd.Timedelta(hours=s), T0 + pd.Timedelta(hours=s + length - 1),
                              HOUR, z[s:s + length].copy(), np.full(length, lat), np.full(length, -30.0)))
    return out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--replicates", type=int, default=200)
    ap.add_argument("--drifters", type=int, default=20)
    ap.add_argument("--satellite-replicates", type=int, default=40)
    ap.add_argument("--satellite-drifters", type=int, default=12)
    args = ap.parse_args()
    if args.replicates < 0 or args.drifters < 2:
        ap.error("--replicates must be >= 0 and --drifters >= 2")

    windows = drifters(34, seed=1)[:100]
    t_pool = median_time(lambda: pool_fit(windows, SPEC), repeat=3)
    t_single = median_time(lambda: [fit_window(w, SPEC) for w in windows], repeat=3)
    res = pool_fit(windows, SPEC)
    print(f"cost, {len(windows)} windows of 720 hourly samples (matern+inertial), median of 3:")
    print(f"  pooled fit (incl. cluster sandwich and heterogeneity check) {t_pool:7.2f} s   "
          f"{len(windows)} single-window fits {t_single:7.2f} s   ratio pooled/single {t_pool / t_single:.2f}")
    n_sim = n_simulations(len(windows), len({w.track_id for w in windows}))
    print(f"  pooled: {res.n_iterations} scoring iterations, {res.n_evaluations / len(windows):.1f} likelihood "
          f"evaluations per window, {n_sim} simulated drifters per drifter "
          f"(heterogeneity: statistic {res.heterogeneity_statistic:.1f} on {res.heterogeneity_df:.1f} effective df, "
          f"p = {res.heterogeneity_pvalue:.2f})")

    n = args.replicates
    if n == 0:
        return
    if args.satellite_replicates:
        satellite_study(args.satellite_replicates, args.satellite_drifters)
    z = {k: [] for k in TRUTH}
    pvals = []
    for r in range(n):
        fit = pool_fit(drifters(args.drifters, seed=1000 + r), SPEC)
        if fit.status != "ok":
            continue
        for k, v in TRUTH.items():
            z[k].append((fit.params[k] - v) / fit.stderr[k])
        pvals.append(fit.heterogeneity_pvalue)
    print(f"coverage, {len(pvals)} ok of {n} replicates of {args.drifters} drifters x 3 windows "
          "(target 0.90-0.97 for 95 % intervals):")
    for k in TRUTH:
        zz = np.array(z[k])
        print(f"  {k:26s} cover {np.mean(np.abs(zz) < 1.96):.3f}   bias {zz.mean():+.2f} se   sd(z) {zz.std():.2f}")
    p = np.array(pvals)
    print(f"heterogeneity check under a shared truth: rejects {np.mean(p < 0.05):.3f} at the 5 % level, "
          f"{np.mean(p < 0.10):.3f} at 10 %")


#: the spectral shape every simulated satellite-tracked drifter shares (amplitudes drawn per drifter)
SATELLITE_SHAPE = {"matern_alpha": 1.35, "matern_damping": 0.8, "inertial_damping": 0.2}


def satellite_windows(n_drifters, seed, sampling="satellite"):
    fixes, _ = generate_scenario("satellite", n_tracks=n_drifters, days=60, seed=seed, shape=SATELLITE_SHAPE,
                                 sampling=sampling)
    vel, _, _ = load_velocities(fixes)
    return [w for _, v in vel.groupby("id", sort=True) for w in iter_windows(v, 30.0, 0.5, 0.5)]


def satellite_study(n, n_drifters):
    spec = FitSpec(models=("matern+inertial",))
    rows = {obs: {k: [] for k in SATELLITE_SHAPE} for obs in ("auto", "differenced+noise")}
    pvals, kinds, methods = [], [], set()
    for r in range(n):
        windows = satellite_windows(n_drifters, seed=5000 + r)
        kinds.append(np.mean([w.irregular for w in windows]))
        for obs in rows:
            fit = pool_fit(windows, spec.replace(observation=obs))
            if fit.status != "ok":
                continue
            for k, v in SATELLITE_SHAPE.items():
                rows[obs][k].append((fit.params[k], fit.stderr[k], v))
            if obs == "auto":
                pvals.append(fit.heterogeneity_pvalue)
                methods.add(fit.stderr_method)
    print(f"satellite-tracked drifters: {n} replicates of {n_drifters} drifters x 60 days, 30-day windows "
          f"({np.mean(kinds):.0%} of windows of irregular fixes), standard errors: {', '.join(sorted(methods))}")
    for obs, label in (("auto", "through each window's fixes"), ("differenced+noise", "as regular differences")):
        for k in SATELLITE_SHAPE:
            est = np.array(rows[obs][k])
            if not len(est):
                continue
            zz = (est[:, 0] - est[:, 2]) / est[:, 1]
            print(f"  {label:28s} {k:17s} mean {est[:, 0].mean():.3f} (truth {est[0, 2]:.3f})   "
                  f"cover {np.mean(np.abs(zz) < 1.96):.3f}   bias {zz.mean():+.2f} se   sd(z) {zz.std():.2f}   "
                  f"({len(est)} ok)")
    p = np.array(pvals)
    print(f"  heterogeneity check (through the fixes) under a shared shape: rejects {np.mean(p < 0.05):.3f} at 5 %, "
          f"{np.mean(p < 0.10):.3f} at 10 %")
    # control: the same drifters fixed every hour (regular windows), to tell the check's own size on these drifters
    # (an inertial oscillation that follows each drifter's latitude) from anything the irregular fixes add
    hourly = [pool_fit(satellite_windows(n_drifters, seed=5000 + r, sampling="hourly"), spec) for r in range(n)]
    ph = np.array([f.heterogeneity_pvalue for f in hourly if f.status == "ok"])
    print(f"  control, the same drifters fixed hourly: heterogeneity check rejects {np.mean(ph < 0.05):.3f} at 5 %, "
          f"{np.mean(ph < 0.10):.3f} at 10 % ({len(ph)} ok)")


if __name__ == "__main__":
    main()
