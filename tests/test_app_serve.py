"""`panel serve app/main.py` as the README documents it: bound to 127.0.0.1, the page served; server options put
after `--args` give a one-line message on the page instead of a misread argument."""

import re
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

MAIN = Path(__file__).resolve().parent.parent / "app" / "main.py"


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _listening_addresses(port):
    """Local addresses listening on ``port``, read from the kernel's socket tables (/proc/net/tcp, tcp6)."""
    out = set()
    for table in ("/proc/net/tcp", "/proc/net/tcp6"):
        try:
            lines = Path(table).read_text().splitlines()[1:]
        except OSError:
            continue
        for line in lines:
            local, state = line.split()[1], line.split()[3]
            addr, p = local.split(":")
            if int(p, 16) == port and state == "0A":  # 0A: LISTEN
                out.add(addr)
    return out


@pytest.fixture
def panel_serve(demo_dir):
    procs = []

    def start(*script_args):
        port = _free_port()
        cmd = [sys.executable, "-m", "panel", "serve", str(MAIN), "--address", "127.0.0.1", "--port", str(port),
               "--allow-websocket-origin", f"127.0.0.1:{port}", "--args", *script_args]
        procs.append(subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        for _ in range(300):
            if _listening_addresses(port):
                return port
            time.sleep(0.2)
        pytest.fail("panel serve did not start")

    yield start
    for p in procs:
        p.terminate()
        try:
            p.wait(20)
        except subprocess.TimeoutExpired:
            p.kill()


def _get(port):
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/main", timeout=300) as r:
        return r.status, r.read().decode()


def test_documented_panel_serve_binds_localhost_and_serves(panel_serve, demo_dir):
    port = panel_serve(str(demo_dir / "fixes.parquet"))
    # 0100007F is 127.0.0.1 in the kernel's little-endian hex; 00000000 would be every interface
    assert _listening_addresses(port) == {"0100007F"}
    status, html = _get(port)
    assert status == 200 and "driftspec" in html and "cannot start" not in html
    # the page loads BokehJS itself from this server, without the WebGL and MathJax bundles it never uses
    # (app/server.py::UNUSED_BUNDLES; the browser tests check that such pages draw with no console error)
    scripts = re.findall(r'src="([^"]+\.js)[^"]*"', html)
    assert any("static/js/bokeh.min.js" in src for src in scripts), scripts
    assert not [src for src in scripts if "bokeh-gl" in src or "mathjax" in src], scripts


def test_server_options_after_args_are_refused_on_the_page(panel_serve, demo_dir):
    port = panel_serve(str(demo_dir / "fixes.parquet"), "--port", "5999")
    status, html = _get(port)
    assert status == 200 and "<title>driftspec · cannot start</title>" in html


def test_the_file_selector_offers_only_tables_of_fixes(tmp_path, demo_dir):
    # a demo folder holds its truth table beside the fixes: listed, it only led to a "Cannot open" page
    import shutil

    import pandas as pd

    from driftspec.app.server import data_files

    shutil.copy(demo_dir / "fixes.parquet", tmp_path / "fixes.parquet")
    pd.DataFrame({"id": ["a"], "release_lat": [10.0], "release_lon": [-140.0]}).to_csv(tmp_path / "truth.csv")
    pd.DataFrame({"track": ["a"], "time": ["2031-01-01"], "latitude": [1.0], "longitude": [2.0]}).to_csv(
        tmp_path / "few.csv", index=False)
    (tmp_path / "damaged.parquet").write_bytes(b"not parquet")  # listed: the page says what is wrong with it
    assert data_files(tmp_path) == ["damaged.parquet", "few.csv", "fixes.parquet"]
