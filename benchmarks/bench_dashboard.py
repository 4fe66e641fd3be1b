"""Dashboard speed: first render of the demo page in Chromium, map re-render after pan/zoom for 10 and 50
million points, and slider-to-refit latency for one window.

    python benchmarks/bench_dashboard.py [--sizes 10000000 50000000]
"""

import argparse
import os
import re
import socket
import statistics
import subprocess
import sys
import time

import numpy as np


def first_render(chromium="/usr/bin/chromium"):
    from playwright.sync_api import sync_playwright

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    proc = subprocess.Popen([sys.executable, "-m", "driftspec.app.cli", "serve", "--port", str(port)],
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    try:
        url = None
        while url is None:
            line = proc.stdout.readline()
            m = re.search(r"dashboard at (http://\S+)", line)
            url = m.group(1) if m else None
            if not line and proc.poll() is not None:
                raise RuntimeError("server did not start")
        time.sleep(1.0)
        times = []
        with sync_playwright() as p:
            b = p.chromium.launch(executable_path=chromium, headless=True,
                                  args=["--no-sandbox", "--disable-gpu", "--disable-background-networking",
                                        "--disable-component-update", "--disable-sync", "--no-first-run"])
            for _ in range(3):
                page = b.new_page(viewport={"width": 1500, "height": 1200})
                t0 = time.perf_counter()
                page.goto(url)
                page.wait_for_selector("canvas", timeout=120_000)
                page.locator(".tabulator").first.wait_for(timeout=120_000)
                times.append(time.perf_counter() - t0)
                page.close()
            b.close()
        return times
    finally:
        proc.terminate()
        proc.wait(10)


def rerender(n, repeats=5):
    import datashader as dsh
    import holoviews as hv
    from holoviews.operation.datashader import rasterize

    hv.extension("bokeh")
    rng = np.random.default_rng(0)
    x = rng.normal(0, 2e6, n)
    y = rng.normal(2e6, 1e6, n)
    v = rng.uniform(0, 1, n)
    pts = hv.Points((x, y, v), kdims=["x", "y"], vdims=["value"])
    times = []
    for k in range(repeats):
        half = 4e6 / (1.5 ** k)  # zooming in
        t0 = time.perf_counter()
        rasterize(pts, aggregator=dsh.mean("value"), dynamic=False, width=900, height=560,
                  x_range=(-half, half), y_range=(2e6 - half / 2, 2e6 + half / 2))
        times.append(time.perf_counter() - t0)
    return times


def refit_latency():
    from driftspec.app.dashboard import explore
    from driftspec.app.server import demo_path

    ex = explore(str(demo_path()))
    ex.fit_current()
    times = []
    for days in (20, 25, 35, 40, 45, 50, 55):
        ex.state.window_days = days
        t0 = time.perf_counter()
        ex.fit_current()
        ex.spectrum_view()
        times.append(time.perf_counter() - t0)
    return times


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", type=int, nargs="*", default=[10_000_000, 50_000_000])
    a = ap.parse_args()
    lat = refit_latency()
    print(f"refit + spectrum for a new window length: median {1e3 * statistics.median(lat):.0f} ms "
          f"(max {1e3 * max(lat):.0f} ms)  target < 300 ms")
    for n in a.sizes:
        t = rerender(n)
        print(f"map re-render (rasterize) at {n / 1e6:.0f} M points: median {statistics.median(t):.2f} s "
              f"(first {t[0]:.2f} s)  target < 1.5 s")
    if os.path.exists("/usr/bin/chromium"):
        fr = first_render()
        print(f"first render of the demo page in Chromium: median {statistics.median(fr):.1f} s "
              f"(runs {', '.join(f'{x:.1f}' for x in fr)})  target < 5 s")


if __name__ == "__main__":
    main()
