"""The dashboard in a real browser: Debian's Chromium driven by Playwright against `driftspec serve`.

Outside CI these tests skip when no browser is installed; with DRIFTSPEC_REQUIRE_BROWSER=1 (set by
.ci/run) a missing browser is a failure.
"""

import os
import re
import socket
import subprocess
import sys
import time
from urllib.parse import urlencode

import pytest
from conftest import chromium_path

pytestmark = pytest.mark.browser
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic"]


def _browser_or_skip():
    path = chromium_path()
    if path is None:
        if os.environ.get("DRIFTSPEC_REQUIRE_BROWSER") == "1":
            pytest.fail("DRIFTSPEC_REQUIRE_BROWSER=1 but no Chromium found (apt-get install chromium)")
        pytest.skip("no Chromium found: install Debian's chromium package to run the browser tests")
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        if os.environ.get("DRIFTSPEC_REQUIRE_BROWSER") == "1":
            pytest.fail("playwright is not installed")
        pytest.skip("playwright is not installed")
    return path


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def server(demo_dir):
    _browser_or_skip()
    port = _free_port()
    proc = subprocess.Popen([sys.executable, "-m", "driftspec.app.cli", "serve", str(demo_dir / "fixes.parquet"),
                             "--port", str(port)], stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    url = None
    deadline = time.time() + 120
    lines = []
    while time.time() < deadline:
        line = proc.stdout.readline()
        lines.append(line)
        m = re.search(r"dashboard at (http://\S+)", line)
        if m:
            url = m.group(1)
            break
        if proc.poll() is not None:
            break
    if url is None:
        proc.kill()
        pytest.fail("server did not start:\n" + "".join(lines))
    # wait until the port answers
    for _ in range(100):
        try:
            socket.create_connection(("127.0.0.1", port), timeout=0.5).close()
            break
        except OSError:
            time.sleep(0.2)
    yield url
    proc.terminate()
    try:
        proc.wait(10)
    except subprocess.TimeoutExpired:
        proc.kill()


@pytest.fixture(scope="module")
def browser():
    path = _browser_or_skip()
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=path, headless=True, args=CHROMIUM_ARGS)
        yield b
        b.close()


@pytest.fixture
def page(browser):
    ctx = browser.new_context(viewport={"width": 1500, "height": 1250})
    pg = ctx.new_page()
    pg.console_errors = []
    pg.on("console", lambda m: pg.console_errors.append(m.text) if m.type == "error" else None)
    pg.on("pageerror", lambda e: pg.console_errors.append(str(e)))
    yield pg
    ctx.close()


def _open(page, url):
    page.goto(url)
    page.wait_for_selector("canvas", timeout=60_000)
    page.locator(".tabulator").first.wait_for(timeout=60_000)
    time.sleep(1.5)


def _velocity_title(page):
    """The selection summary line above the velocity plot (plot titles are drawn on canvas)."""
    for _ in range(60):
        text = page.locator(".ds-summary >> div").first.inner_text(timeout=30_000)
        if text.strip():
            return text
        time.sleep(0.25)  # the pane is being redrawn
    return ""


def _table_text(page):
    return page.locator(".tabulator").first.inner_text(timeout=30_000)


def _map_box(page):
    """Bounding box of the map: the largest canvas on the page."""
    boxes = [c.bounding_box() for c in page.locator("canvas").all()]
    return max((b for b in boxes if b), key=lambda b: b["width"] * b["height"])


def _wait_change(fn, old, timeout=30.0):
    deadline = time.time() + timeout
    while time.time() < deadline:
        new = fn()
        if new != old:
            return new
        time.sleep(0.3)
    return fn()


def test_map_renders_with_spectrum_and_table(server, page, artifacts_dir):
    _open(page, server)
    assert page.locator("canvas").count() >= 4  # map, velocity, two spectrum panels
    text = _table_text(page)
    assert "matern_alpha" in text and "diffusivity" in text
    page.screenshot(path=str(artifacts_dir / "dashboard-first-render.png"), full_page=True)
    assert page.console_errors == [], page.console_errors


def test_clicking_a_track_selects_it(server, page, artifacts_dir):
    _open(page, server)
    before = _velocity_title(page)
    table_before = _table_text(page)
    # click points across the map until a different track is selected
    box = _map_box(page)
    after = before
    for fx in (0.5, 0.3, 0.7, 0.4, 0.6, 0.2, 0.8):
        for fy in (0.5, 0.3, 0.7, 0.4, 0.6):
            page.mouse.click(box["x"] + fx * box["width"] * 0.9, box["y"] + fy * box["height"])
            after = _wait_change(lambda: _velocity_title(page), before, timeout=2.0)
            if after != before:
                break
        if after != before:
            break
    assert after != before, "no click on the map selected another track"
    new_table = _wait_change(lambda: _table_text(page), table_before, timeout=30)
    assert new_table != table_before and "matern_alpha" in new_table
    page.screenshot(path=str(artifacts_dir / "dashboard-after-click.png"), full_page=True)
    assert page.console_errors == [], page.console_errors


def test_box_select_sets_the_region(server, page, artifacts_dir):
    _open(page, server)
    before = _velocity_title(page)
    assert "region" not in before
    box = _map_box(page)
    page.locator("[title='Box Select']").first.click()
    x, y = box["x"] + 0.25 * box["width"], box["y"] + 0.25 * box["height"]
    page.mouse.move(x, y)
    page.mouse.down()
    page.mouse.move(x + 0.3 * box["width"], y + 0.4 * box["height"], steps=10)
    page.mouse.up()
    after = _wait_change(lambda: _velocity_title(page), before, timeout=30)
    assert re.search(r"region .*°N.*\((\d+) tracks\)", after), after
    page.screenshot(path=str(artifacts_dir / "dashboard-region.png"), full_page=True)
    assert page.console_errors == [], page.console_errors


def test_window_length_control_changes_the_fit(server, page, artifacts_dir):
    _open(page, server)
    before = _table_text(page)
    title = _velocity_title(page)
    handle = page.locator(".noUi-handle").nth(1)  # sliders: window index, then window length
    handle.focus()
    for _ in range(10):
        page.keyboard.press("ArrowLeft")
    after = _wait_change(lambda: _table_text(page), before, timeout=30)
    assert after != before
    deadline = time.time() + 40  # key presses arrive one by one; wait for the last
    new_title = _velocity_title(page)
    while "windows of 20 days" not in new_title and time.time() < deadline:
        time.sleep(0.3)
        new_title = _velocity_title(page)
    assert "windows of 20 days" in new_title and new_title != title
    page.screenshot(path=str(artifacts_dir / "dashboard-window-20d.png"), full_page=True)
    assert page.console_errors == [], page.console_errors


def test_url_state_restores_the_view(server, page, artifacts_dir):
    q = urlencode({"track": "TB31-0005", "window_days": "20.0", "model": "matern", "window": "1"})
    _open(page, f"{server}?{q}")
    title = _velocity_title(page)
    assert "TB31-0005" in title and "windows of 20 days" in title
    text = _table_text(page)
    assert "matern_alpha" in text and "inertial_variance" not in text
    page.screenshot(path=str(artifacts_dir / "dashboard-from-url.png"), full_page=True)
    assert page.console_errors == [], page.console_errors


def test_paths_outside_the_data_folder_are_refused(server, page):
    page.goto(f"{server}?data=../../../etc/passwd")
    page.get_by_text("Not available").wait_for(timeout=30_000)
    assert "root:" not in page.content()
