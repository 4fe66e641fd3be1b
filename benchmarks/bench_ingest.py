"""From Parquet fixes to analysis windows: fixes per second and peak memory, reading the file whole and in
track-aligned chunks (as `driftspec fit` does), side by side.

    python benchmarks/bench_ingest.py [--fixes 10_000_000] [--tracks 2000]

The input is made here (random-walk tracks at irregular times); the timed part runs in a fresh process so
that its peak memory is its own.
"""

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np
import pandas as pd

CHILD = r"""
import json, resource, sys, time
from driftspec.analysis.io import FixReader, read_fixes
from driftspec.analysis.tracks.pipeline import iter_velocity_batches
from driftspec.analysis.tracks.qc import clean_fixes, clean_fixes_in_batches
from driftspec.analysis.tracks.windows import iter_windows
t = {}
n = samples = kept = 0
if sys.argv[2] == "whole":  # read and clean in one piece, then grid a few hundred tracks at a time
    t0 = time.perf_counter(); raw = read_fixes(sys.argv[1]); t["read"] = time.perf_counter() - t0
    t0 = time.perf_counter(); fixes, rep = clean_fixes(raw); del raw; t["qc"] = time.perf_counter() - t0
    kept = rep.kept_rows
    t0 = time.perf_counter()
    for vel in iter_velocity_batches(fixes):
        samples += len(vel)
        n += sum(1 for _ in iter_windows(vel, 60, 0.5))
    t["grid+velocity+windows"] = time.perf_counter() - t0
else:  # the path `driftspec fit` takes: chunks of whole tracks from the file, all stages per chunk
    t0 = time.perf_counter()
    for raw in FixReader(sys.argv[1]):
        for fixes, rep in clean_fixes_in_batches(raw):
            kept += rep.kept_rows
            for vel in iter_velocity_batches(fixes):
                samples += len(vel)
                n += sum(1 for _ in iter_windows(vel, 60, 0.5))
    t["read+qc+grid+velocity+windows"] = time.perf_counter() - t0
print(json.dumps({"times": t, "windows": n, "kept": kept, "samples": samples,
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def make_input(path, n_fixes, n_tracks, seed=0):
    rng = np.random.default_rng(seed)
    per = n_fixes // n_tracks
    dt = rng.exponential(1.0, (n_tracks, per)) * 3600  # about one fix an hour, irregular
    t = np.cumsum(dt, axis=1)
    steps = rng.normal(0, 0.25 * 1e-5, (n_tracks, per, 2)) * dt[..., None]  # ~0.25 m/s random walk, degrees
    lat = np.clip(rng.uniform(-60, 60, (n_tracks, 1)) + np.cumsum(steps[..., 0], axis=1), -89, 89)
    lon = rng.uniform(-180, 180, (n_tracks, 1)) + np.cumsum(steps[..., 1], axis=1)
    df = pd.DataFrame({
        "id": np.repeat(np.array([f"B{k:05d}" for k in range(n_tracks)]), per),
        "time": pd.Timestamp("2030-01-01") + pd.to_timedelta(t.ravel(), unit="s"),
        "lat": lat.ravel(), "lon": ((lon.ravel() + 180) % 360) - 180,
    })
    df.to_parquet(path, index=False)
    return len(df)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--fixes", type=int, default=10_000_000)
    ap.add_argument("--tracks", type=int, default=2000)
    a = ap.parse_args()
    with tempfile.TemporaryDirectory() as d:
        path = os.path.join(d, "fixes.parquet")
        n = make_input(path, a.fixes, a.tracks)
        results = {}
        for mode in ("whole", "streamed", "whole", "streamed"):  # interleaved, best of two each
            t0 = time.perf_counter()
            out = subprocess.run([sys.executable, "-c", CHILD, path, mode], capture_output=True, text=True,
                                 check=True)
            r = json.loads(out.stdout.strip().splitlines()[-1])
            r["wall"] = time.perf_counter() - t0
            if mode not in results or sum(r["times"].values()) < sum(results[mode]["times"].values()):
                results[mode] = r
    first = results["whole"]
    print(f"{n:,} fixes, {a.tracks} tracks -> {first['samples']:,} hourly samples, "
          f"{first['windows']:,} windows of 60 days")
    for mode, r in results.items():
        assert (r["windows"], r["kept"]) == (first["windows"], first["kept"])  # same work either way
        total = sum(r["times"].values())
        print(f"  {mode}:")
        for k, v in r["times"].items():
            print(f"    {k:30s} {v:7.2f} s  ({n / v / 1e6:6.2f} M fixes/s)")
        print(f"    {'total':30s} {total:7.2f} s  ({n / total / 1e6:6.2f} M fixes/s; "
              f"process wall {r['wall']:.1f} s with start-up)")
        print(f"    peak memory {r['peak_mb']:.0f} MB")

if __name__ == "__main__":
    main()
