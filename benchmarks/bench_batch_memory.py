"""Peak memory and throughput of `driftspec fit` on a large synthetic deployment (default 20,000 tracks).

    python benchmarks/bench_batch_memory.py [--tracks 20000] [--days 60] [--workers 2]

The deployment is the demo generator's, made on demand; the fit runs as a separate process, whose peak
resident memory (and that of its worker processes, largest one) is reported.
"""

import argparse
import os
import subprocess
import sys
import tempfile
import time


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--tracks", type=int, default=20_000)
    ap.add_argument("--days", type=float, default=60.0)
    ap.add_argument("--workers", type=int, default=os.cpu_count() or 1)
    a = ap.parse_args()
    with tempfile.TemporaryDirectory() as d:
        t0 = time.perf_counter()
        subprocess.run([sys.executable, "-m", "driftspec.app.cli", "demo", d, "--tracks", str(a.tracks),
                        "--days", str(a.days)], check=True, capture_output=True)
        t_demo = time.perf_counter() - t0
        size = os.path.getsize(os.path.join(d, "fixes.parquet")) / 1e6
        t0 = time.perf_counter()
        # the fit runs in a wrapper process that reports its own peak and its workers' (the demo
        # generator, a child of this process, must not be counted)
        wrapper = ("import resource, sys; from driftspec.app.cli import main; rc = main(sys.argv[1:]); "
                   "print('PEAK', resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, "
                   "resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024); sys.exit(rc)")
        r = subprocess.run([sys.executable, "-c", wrapper, "fit", os.path.join(d, "fixes.parquet"),
                            "--out", os.path.join(d, "fits.parquet"), "--window-days", "30", "--workers",
                            str(a.workers), "--no-progress"], capture_output=True, text=True, check=True)
        t_fit = time.perf_counter() - t0
    lines = r.stdout.strip().splitlines()
    peak_main, peak_worker = (float(x) for x in lines[-1].split()[1:])
    print(f"{a.tracks} tracks x {a.days:g} days: demo generated in {t_demo:.0f} s ({size:.0f} MB Parquet)")
    print(f"  driftspec fit (30-day windows, {a.workers} workers): {t_fit:.0f} s; {lines[0]}")
    print(f"  peak memory: main process {peak_main:.0f} MB, largest worker {peak_worker:.0f} MB")


if __name__ == "__main__":
    main()
