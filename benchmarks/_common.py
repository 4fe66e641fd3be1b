"""Helpers shared by the benchmarks: timing medians and a peak-memory probe."""

import resource
import statistics
import time


def median_time(fn, repeat=5):
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def peak_rss_mb():
    """Peak resident memory of this process so far, MB (Linux ru_maxrss is in kB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
