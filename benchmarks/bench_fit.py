"""Window fits per second: debiased Whittle on one core and on all cores, against the exact likelihood on
the same windows in the same run, and the cost of the observation model; then, in the same run, ``driftspec fit``
end to end with default options on a demo deployment (the issue's: 2,000 tracks of 60 days, seed 7, 30-day
windows), split into windows of regular and of irregular (satellite-like) fixes.

    python benchmarks/bench_fit.py [--windows 200] [--exact 8] [--demo-tracks 2000] [--workers 2]
"""

import argparse
import contextlib
import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np

sys.path.insert(0, os.path.dirname(__file__))
from _common import median_time  # noqa: E402

from driftspec.analysis import fit_series, simulate  # noqa: E402

HOUR = 3600.0
THETA = [0.02, 1.2, 1.0, 0.01, -1.0027, 0.2]


def windows(n, seed=0):
    rng = np.random.default_rng(seed)
    return [simulate("matern+inertial", THETA, n=1440, dt=HOUR, seed=rng) for _ in range(n)]


def differenced_windows(n, seed=1, noise_m=50.0, sub=8):
    """Velocities as the batch path makes them: central differences of hourly positions (with white
    position noise) of floats whose velocity is simulated every dt/sub and integrated."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        v = simulate("matern+inertial", THETA, n=1442 * sub + 1, dt=HOUR / sub, seed=rng, latitude=30.0)
        x = np.concatenate([[0], np.cumsum(0.5 * (v[1:] + v[:-1]) * HOUR / sub)])[::sub][:1442]
        x = x + noise_m * (rng.standard_normal(x.size) + 1j * rng.standard_normal(x.size))
        out.append((x[2:] - x[:-2]) / (2 * HOUR))
    return out


def fit_all(zs, **kw):
    return [fit_series(z, HOUR, latitude=30.0, **kw) for z in zs]


def _chunk(args):
    zs, kw = args
    return len(fit_all(zs, **kw))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--windows", type=int, default=200)
    ap.add_argument("--exact", type=int, default=8)
    ap.add_argument("--demo-tracks", type=int, default=2000, help="0 skips the end-to-end run")
    ap.add_argument("--workers", type=int, default=os.cpu_count() or 1)
    a = ap.parse_args()
    zs = windows(a.windows)
    fit_all(zs[:3])  # warm the Matérn table
    t_plain = median_time(lambda: fit_all(zs), repeat=3)
    # the observation model's cost: the same differenced windows, the same band, with and without it
    dz = differenced_windows(a.windows)
    t_dplain = median_time(lambda: fit_all(dz, max_freq=9.0), repeat=3)
    t_obs = median_time(lambda: fit_all(dz, observation="differenced+noise", max_freq=9.0), repeat=3)
    cores = os.cpu_count() or 1
    parts = [(zs[i::cores], {}) for i in range(cores)]
    with ProcessPoolExecutor(cores) as pool:
        list(pool.map(_chunk, parts))  # start the workers and build their tables
        t0 = time.perf_counter()
        list(pool.map(_chunk, parts))
        t_all = time.perf_counter() - t0
    sub = zs[: a.exact]
    t_deb_sub = median_time(lambda: fit_all(sub), repeat=3)
    t0 = time.perf_counter()
    ex = fit_all(sub, estimator="exact")
    t_exact = time.perf_counter() - t0
    deb = fit_all(sub)
    diffs = [abs(e.params["matern_alpha"] - d.params["matern_alpha"]) / e.stderr["matern_alpha"]
             for e, d in zip(ex, deb) if e.ok and d.ok]
    ok = sum(r.ok for r in fit_all(zs))
    print(f"matern+inertial, 1440-sample windows, {a.windows} windows ({ok} ok)")
    ms = 1e3 * t_plain / a.windows
    print(f"  debiased, one core:           {a.windows / t_plain:8.1f} fits/s  ({ms:.1f} ms/fit)")
    print(f"  debiased, {cores} cores (pool):     {a.windows / t_all:8.1f} fits/s")
    print(f"  differenced windows, plain:   {a.windows / t_dplain:8.1f} fits/s")
    print(f"  ... with observation model:   {a.windows / t_obs:8.1f} fits/s  (cost ratio {t_obs / t_dplain:.2f} x)")
    print(f"  exact, same {len(sub)} windows:       {len(sub) / t_exact:8.2f} fits/s")
    print(f"  speed ratio debiased/exact:   {t_exact / t_deb_sub:8.0f} x")
    print(f"  |alpha_exact - alpha_debiased| / se_exact: median {np.median(diffs):.2f}, max {np.max(diffs):.2f}")
    if a.demo_tracks:
        end_to_end(a.demo_tracks, a.workers, a.windows / t_plain)


def _tree_cpu_seconds(proc, every=0.2):
    """CPU seconds (user + system) of a running process and all its descendants, polled until it exits (worker
    processes of a pool need not be children the command waits for, so its own resource usage would miss them)."""
    import psutil

    seen = {}
    root = psutil.Process(proc.pid)
    while proc.poll() is None:
        try:
            for p in [root, *root.children(recursive=True)]:
                with contextlib.suppress(psutil.Error):
                    t = p.cpu_times()
                    seen[p.pid] = t.user + t.system
        except psutil.Error:
            pass
        time.sleep(every)
    return sum(seen.values())


def end_to_end(n_tracks, workers, single_rate):
    """``driftspec fit`` with default options on a fresh demo deployment, timed as a user runs it."""
    import subprocess
    import tempfile

    import pandas as pd

    with tempfile.TemporaryDirectory() as tmp:
        demo = os.path.join(tmp, "demo")
        subprocess.run([sys.executable, "-m", "driftspec.app.cli", "demo", demo, "--tracks", str(n_tracks), "--days",
                        "60", "--seed", "7"], check=True, capture_output=True)
        out = os.path.join(tmp, "fits.parquet")
        t0 = time.perf_counter()
        proc = subprocess.Popen([sys.executable, "-m", "driftspec.app.cli", "fit", os.path.join(demo, "fixes.parquet"),
                                 "--out", out, "--window-days", "30", "--workers", str(workers), "--no-progress"],
                                stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        cpu = _tree_cpu_seconds(proc)  # the command and its worker processes, sampled until it ends
        seconds = time.perf_counter() - t0
        if proc.returncode:
            raise RuntimeError(proc.stderr.read().decode())
        df = pd.read_parquet(out)
    kinds = df["observation"].value_counts().to_dict()
    print(f"driftspec fit, {n_tracks}-track demo (60 days, seed 7), 30-day windows, defaults, {workers} workers")
    print(f"  {len(df)} windows in {seconds:.1f} s: {len(df) / seconds:8.1f} windows/s end to end "
          f"(single-window rate above: {single_rate:.1f} fits/s on one core)")
    print(f"  CPU: {cpu:.1f} s in all processes (polled every 0.2 s), {1e3 * cpu / len(df):.1f} ms per window (less "
          f"sensitive to a busy machine than the wall time)")
    print(f"  windows by observation model: {kinds}; at a bound: {(df['status'] == 'at_bound').mean():.1%}")


if __name__ == "__main__":
    main()
