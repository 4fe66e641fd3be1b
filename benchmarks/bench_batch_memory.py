"""Peak memory and throughput of `driftspec fit` on a large synthetic deployment (default 20,000 tracks).

    python benchmarks/bench_batch_memory.py [--tracks 20000] [--days 60] [--workers 2]

The deployment is the demo generator's, made on demand; the fit runs as a separate process. Reported: its
exact peak resident memory (getrusage), and from sampling the process tree every 0.2 s (psutil) the
largest worker and the largest sum over the fit process and all its workers.
"""

import argparse
import os
import subprocess
import sys
import tempfile
import time

import psutil


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
        # the fit runs in a wrapper process that reports its own exact peak; its workers (children of a
        # forkserver, so not reaped by it) are sampled from here
        wrapper = ("import resource, sys; from driftspec.app.cli import main; rc = main(sys.argv[1:]); "
                   "print('PEAK', resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024); sys.exit(rc)")
        cmd = [sys.executable, "-c", wrapper, "fit", os.path.join(d, "fixes.parquet"), "--out",
               os.path.join(d, "fits.parquet"), "--window-days", "30", "--workers", str(a.workers), "--no-progress"]
        proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        top = psutil.Process(proc.pid)
        worker_peak = tree_peak = 0.0
        while proc.poll() is None:
            try:
                here, children = top.memory_info().rss, top.children(recursive=True)
            except psutil.Error:
                break
            kids = []
            for k in children:  # workers come and go
                try:
                    kids.append(k.memory_info().rss)
                except psutil.Error:
                    pass
            worker_peak = max([worker_peak, *kids])
            tree_peak = max(tree_peak, here + sum(kids))
            time.sleep(0.2)
        stdout, stderr = proc.communicate()
        if proc.returncode:
            raise SystemExit(f"driftspec fit failed: {stderr.strip().splitlines()[-1]}")
        t_fit = time.perf_counter() - t0
    lines = stdout.strip().splitlines()
    peak_main = float(lines[-1].split()[1])
    print(f"{a.tracks} tracks x {a.days:g} days: demo generated in {t_demo:.0f} s ({size:.0f} MB Parquet)")
    print(f"  driftspec fit (30-day windows, {a.workers} workers): {t_fit:.0f} s; {lines[0]}")
    print(f"  peak memory: fit process {peak_main:.0f} MB; sampled: largest worker {worker_peak / 2**20:.0f} MB, "
          f"fit process and workers together {tree_peak / 2**20:.0f} MB")


if __name__ == "__main__":
    main()
