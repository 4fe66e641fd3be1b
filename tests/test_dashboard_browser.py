"""The dashboard in a real browser: Debian's Chromium driven by Playwright against `driftspec serve`.

The tests read values, not just existence: the fit table against `driftspec fit`'s row for the same window and
settings, the summaries against the settings last chosen, the axes' labels in degrees.

Outside CI these tests skip when no browser is installed; with DRIFTSPEC_REQUIRE_BROWSER=1 (set by
.ci/run) a missing browser is a failure.
"""

import os
import re
import shutil
import socket
import subprocess
import sys
import time
from urllib.parse import urlencode

import numpy as np
import pytest
from conftest import chromium_path

from driftspec.app.dashboard import TABLE_DIGITS

pytestmark = pytest.mark.browser
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic"]
#: the running server's log (set by the ``server`` fixture), quoted when a page does not show what it should
SERVER_LOG = None
#: settings of `driftspec fit` equal to the dashboard's defaults
CLI_DEFAULTS = ["--window-days", "30", "--model", "matern+inertial", "--estimator", "debiased", "--taper", "none",
                "--inertial-frequency", "free"]  # the observation model: both decide per window


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


def _moved(fixes, lon0, lat0, scale):
    """The demo's tracks moved (and shrunk) to centre on lon0, lat0, degrees."""
    out = fixes.copy()
    out["lon"] = lon0 + scale * (out["lon"] - out["lon"].mean())
    out["lat"] = lat0 + scale * (out["lat"] - out["lat"].mean())
    return out


@pytest.fixture(scope="module")
def served_dir(demo_dir, tmp_path_factory):
    """The served folder: the demo, one track alone, numeric track ids, tracks off a coast, polar tracks, and
    two CSV files with nothing to show."""
    from driftspec.analysis.io import read_fixes, write_fixes

    out = tmp_path_factory.mktemp("served")
    shutil.copy(demo_dir / "fixes.parquet", out / "fixes.parquet")
    fixes = read_fixes(str(demo_dir / "fixes.parquet")).drop(columns="row")
    ids = sorted(fixes["id"].astype(str).unique())
    write_fixes(fixes[fixes["id"].astype(str) == ids[0]], out / "one.parquet")
    numeric = fixes[fixes["id"].astype(str).isin(ids[:3])].copy()
    numeric["id"] = numeric["id"].astype(str).map({t: 101 + k for k, t in enumerate(ids[:3])})
    write_fixes(numeric, out / "numeric.parquet")
    few = fixes[fixes["id"].astype(str).isin(ids[:4])]
    write_fixes(_moved(few, -11.0, 40.0, 0.25), out / "coast.parquet")  # off Portugal
    write_fixes(_moved(few, 20.0, 74.0, 0.4), out / "polar.parquet")  # Barents Sea, south of Svalbard
    (out / "header.csv").write_text("id,time,lat,lon\n")
    (out / "allbad.csv").write_text("id,time,lat,lon\na,2020-01-01,95,10\na,2020-01-02,95,10\n")
    return out


@pytest.fixture(scope="module")
def server(served_dir, artifacts_dir):
    """`driftspec serve` on the served folder: its URL. Everything the server prints goes to
    ``dashboard-server.log`` among the test artifacts (a pipe nobody reads would fill and stop the server)."""
    _browser_or_skip()
    port = _free_port()
    global SERVER_LOG
    log_path = SERVER_LOG = artifacts_dir / "dashboard-server.log"
    log = open(log_path, "w")  # noqa: SIM115 - closed below
    proc = subprocess.Popen([sys.executable, "-m", "driftspec.app.cli", "serve", str(served_dir / "fixes.parquet"),
                             "--port", str(port)], stdout=log, stderr=subprocess.STDOUT, text=True)
    url = None
    deadline = time.time() + 180
    while time.time() < deadline:
        m = re.search(r"dashboard at (http://\S+)", log_path.read_text())
        if m:
            url = m.group(1)
            break
        if proc.poll() is not None:
            break
        time.sleep(0.2)
    if url is None:
        proc.kill()
        log.close()
        pytest.fail("server did not start:\n" + log_path.read_text())
    for _ in range(100):
        try:
            socket.create_connection(("127.0.0.1", port), timeout=0.5).close()
            break
        except OSError:
            time.sleep(0.2)
    yield url
    proc.terminate()
    try:
        proc.wait(20)
    except subprocess.TimeoutExpired:
        proc.kill()
    log.close()


@pytest.fixture(scope="module")
def browser():
    path = _browser_or_skip()
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=path, headless=True, args=CHROMIUM_ARGS)
        yield b
        b.close()


def _new_page(browser, width=1500, height=1250):
    ctx = browser.new_context(viewport={"width": width, "height": height})
    pg = ctx.new_page()
    pg.console_errors = []
    pg.outside = []
    pg.on("console", lambda m: pg.console_errors.append(m.text) if m.type == "error" else None)
    pg.on("pageerror", lambda e: pg.console_errors.append(str(e)))
    pg.on("request", lambda r: pg.outside.append(r.url)
          if not r.url.startswith(("http://127.0.0.1", "ws://127.0.0.1", "data:", "blob:", "about:")) else None)
    return ctx, pg


@pytest.fixture
def page(browser):
    ctx, pg = _new_page(browser)
    yield pg
    ctx.close()


def _open(page, url, table=True):
    page.goto(url, timeout=120_000)
    page.wait_for_selector("canvas", timeout=90_000)
    if table:
        try:
            # the fit table is on the page from the start, empty until the window's fit arrives
            page.locator(".tabulator").first.locator(".tabulator-row").first.wait_for(timeout=90_000)
        except Exception as exc:  # noqa: BLE001 - failed below, with what the page and the server said
            pytest.fail(f"the fit table was not filled within 90 s ({type(exc).__name__}).\n{_diagnosis(page)}")
    time.sleep(1.0)


def _diagnosis(page):
    """What a page shows of its fit and jobs, its console errors, and the end of the server's log: the message of
    a failed wait, so that a failure on another machine says where it stopped."""
    lines = []
    for css in (".ds-status", ".ds-message", ".ds-fitinfo"):
        try:
            text = page.locator(f"{css} >> div").first.inner_text(timeout=2_000)
        except Exception as exc:  # noqa: BLE001 - the page may be gone: say so and go on to the server's log
            text = f"(not read: {type(exc).__name__})"
        lines.append(f"{css}: {text!r}")
    lines.append(f"console errors: {getattr(page, 'console_errors', 'not recorded')}")
    log = SERVER_LOG.read_text().splitlines()[-40:] if SERVER_LOG is not None and SERVER_LOG.exists() else []
    return "\n".join([*lines, "server log (last 40 lines):", *log])


def _text(page, css, timeout=30.0):
    """Text of a Markdown pane (its div lives in the pane's shadow root), waiting while it is redrawn."""
    deadline = time.time() + timeout
    while time.time() < deadline:
        loc = page.locator(f"{css} >> div")
        if loc.count():
            text = loc.first.inner_text(timeout=30_000)
            if text.strip():
                return text
        time.sleep(0.25)
    return ""


def _summary(page):
    return _text(page, ".ds-summary")


def _wait_for(fn, ok, timeout=60.0):
    deadline = time.time() + timeout
    value = fn()
    while not ok(value) and time.time() < deadline:
        time.sleep(0.3)
        value = fn()
    return value


def _table_values(page):
    """{parameter: (value, std. error)} read from the fit table's cells."""
    out = {}
    try:
        rows = page.locator(".tabulator").first.locator(".tabulator-row").all()
        for row in rows:
            cells = [c.strip() for c in row.locator(".tabulator-cell").all_inner_texts()]
            if cells and cells[0].isdigit():  # the row index column
                cells = cells[1:]
            if len(cells) >= 3:  # "–" where there is no number
                out[cells[0]] = tuple(np.nan if c == "–" else float(c) for c in cells[1:3])
    except Exception:  # noqa: BLE001 - the table is being redrawn; the caller reads again
        return {}
    return out


def _axis_labels(page):
    """Tick labels given to the plots' axes (BokehJS models of the page)."""
    return page.evaluate("""() => {
        const out = [];
        for (const doc of window.Bokeh.documents)
            for (const m of doc.all_models)
                if (m.major_label_overrides && m.major_label_overrides.size)
                    out.push(...[...m.major_label_overrides.values()].map(String));
        return out;
    }""")


def _map_box(page):
    """Bounding box of the track map: the first plot of the page."""
    return page.locator("canvas").first.bounding_box()


def _assert_table_is_row(shown, row):
    """The fit table's values (``_table_values``) are the fits-table row's, to the digits the page shows."""
    digits = TABLE_DIGITS  # the page shows each number to this many significant digits
    # a parameter on a bound shows no standard error (the table's note names the bound)
    on_bound = {n.strip() for n in str(row["message"]).split("at bound: ")[-1].split(";")[0].split(",")} \
        if row["status"] == "at_bound" else set()
    for name, (value, se) in shown.items():
        if name in row:
            assert value == pytest.approx(float(f"{row[name]:.{digits}g}"), rel=1e-12), name
            want = np.nan if name in on_bound else float(f"{row[name + '_se']:.{digits}g}")
            assert se == pytest.approx(want, rel=1e-12, nan_ok=True), name
    assert {"matern_alpha", "matern_damping", "diffusivity"} <= set(shown)
    # the rows of the other candidate's parameters are not shown
    assert ("inertial_variance" in shown) == (row["model"] == "matern+inertial"), (sorted(shown), row["model"])


def test_model_auto_shows_the_candidate_the_command_line_selects(server, served_dir, page, tmp_path):
    # the command line's defaults (but 30-day windows) choose per window between matern and matern+inertial; the
    # page with model and inertial frequency auto fits the same window in its workers and shows the selected
    # candidate, its numbers and the reason (it showed the first candidate, whichever was selected)
    from driftspec.analysis.io import read_table
    from driftspec.app.cli import main

    out = tmp_path / "fits.parquet"
    assert main(["fit", str(served_dir / "one.parquet"), "--out", str(out), "--window-days", "30", "--workers", "1",
                 "--no-progress"]) == 0
    table = read_table(out).sort_values("window_start").reset_index(drop=True)
    rich = table.index[table["model"] == "matern+inertial"]
    assert len(rich), table[["model", "selection"]]  # the mid-latitude track keeps its oscillation somewhere
    plain = table.index[table["model"] == "matern"]
    for k in [rich[0], *plain[:1]]:
        row = table.loc[k]
        query = urlencode({"data": "one.parquet", "window": int(k), "model": "auto", "inertial": "auto"})
        _open(page, f"{server}?{query}")
        shown = _wait_for(lambda: _table_values(page), lambda v: "matern_alpha" in v)
        _assert_table_is_row(shown, row)
        info = _text(page, ".ds-fitinfo")
        assert row["selection"].split(";")[0] in info, (info, row["selection"])
    assert page.console_errors == [], (page.console_errors, page.outside)


def test_first_look_is_full_and_the_fit_equals_the_command_line(server, served_dir, page, tmp_path, artifacts_dir):
    from driftspec.analysis.io import read_table
    from driftspec.app.cli import main

    _open(page, f"{server}?{urlencode({'data': 'one.parquet', 'window': 1})}")
    summary = _summary(page)
    assert "window 2 of" in summary and "windows of 30 days" in summary
    shown = _wait_for(lambda: _table_values(page), lambda v: "matern_alpha" in v)
    # the independent path: the command line reads, cleans and fits the same file itself
    out = tmp_path / "fits.parquet"
    assert main(["fit", str(served_dir / "one.parquet"), "--out", str(out), *CLI_DEFAULTS, "--workers", "1",
                 "--no-progress"]) == 0
    row = read_table(out).sort_values("window_start").iloc[1]
    _assert_table_is_row(shown, row)
    # the first look: the track summary and the parameter map fill without pressing anything
    page.get_by_text("Track summary", exact=True).click()
    # (the first look fits every window in the background on two cores while the command line above ran too:
    # generous time, the values are what is checked)
    track = _wait_for(lambda: _text(page, ".ds-track-summary"), lambda t: "ok of" in t, timeout=240.0)
    n = int(re.search(r"(\d+) windows of 30 days", summary).group(1))
    assert re.search(rf"ok of {n} windows · 30-day windows · model matern\+inertial", track), track
    page.get_by_text("Parameter map", exact=True).click()
    page.wait_for_function("() => true")
    labels = _wait_for(lambda: _axis_labels(page), lambda v: sum("°" in x for x in v) >= 4)
    assert sum("°" in x for x in labels) >= 4
    page.screenshot(path=str(artifacts_dir / "dashboard-parameter-map.png"), full_page=True)
    assert page.console_errors == [], (page.console_errors, page.outside)
    assert page.outside == [], page.outside  # nothing is fetched from outside the machine


def test_clicking_a_track_selects_it(server, page, artifacts_dir):
    _open(page, server)
    before = _summary(page)
    box = _map_box(page)
    after = before
    for fx in (0.5, 0.3, 0.7, 0.4, 0.6, 0.2, 0.8):
        for fy in (0.5, 0.3, 0.7, 0.4, 0.6):
            page.mouse.click(box["x"] + fx * box["width"] * 0.9, box["y"] + fy * box["height"])
            after = _wait_for(lambda: _summary(page), lambda t: t != before, timeout=2.0)
            if after != before:
                break
        if after != before:
            break
    assert after != before, "no click on the map selected another track"
    track = re.search(r"Track (\S+)", after).group(1)
    fitinfo = _wait_for(lambda: _text(page, ".ds-fitinfo"), lambda t: "status" in t)
    assert "status" in fitinfo
    page.screenshot(path=str(artifacts_dir / "dashboard-after-click.png"), full_page=True)
    assert track in after and page.console_errors == [], page.console_errors


def test_box_select_sets_the_region_and_the_link_restores_it(server, browser, page, artifacts_dir):
    _open(page, server)
    before = _summary(page)
    assert "region" not in before
    box = _map_box(page)
    page.locator("[title='Box Select']").first.click()
    x, y = box["x"] + 0.2 * box["width"], box["y"] + 0.2 * box["height"]
    page.mouse.move(x, y)
    page.mouse.down()
    page.mouse.move(x + 0.5 * box["width"], y + 0.5 * box["height"], steps=10)
    page.mouse.up()
    after = _wait_for(lambda: _summary(page), lambda t: "region" in t, timeout=30)
    m = re.search(r"region ([\d.]+°[NS]?)\.\.([\d.]+°[NS]?), ([\d.]+°[EW]?)\.\.([\d.]+°[EW]?) "
                  r"\((\d+) tracks? pass(?:es)? through it\)", after)
    assert m, after
    page.get_by_text("Link to this view").click()
    link = _wait_for(lambda: page.locator(".ds-link input").first.input_value(), lambda v: "region=" in v)
    assert link.startswith(server) and "region=" in link
    ctx, other = _new_page(browser)
    try:
        _open(other, link)
        restored = _summary(other)
        again = re.search(r"region .*\((\d+) tracks? pass(?:es)? through it\)", restored)
        assert again.group(0) == m.group(0), (restored, after)
        assert _text(other, ".ds-message", timeout=2) == ""
    finally:
        ctx.close()
    page.screenshot(path=str(artifacts_dir / "dashboard-region.png"), full_page=True)
    assert page.console_errors == [], (page.console_errors, page.outside)


def test_rapid_changes_end_on_the_current_settings(server, page, artifacts_dir):
    _open(page, server)
    handle = page.locator(".noUi-handle").nth(1)  # sliders: window index, then window length
    handle.focus()
    for _ in range(3):  # three key presses 0.2 s apart, each a new window length and new jobs
        page.keyboard.press("ArrowLeft")
        time.sleep(0.2)
    page.locator("select").nth(2).select_option("matern")  # selects: data file, track, model family
    summary = _wait_for(lambda: _summary(page), lambda t: "windows of 27 days" in t and "model matern " in t)
    assert "windows of 27 days" in summary and "model matern " in summary, summary
    n = int(re.search(r"(\d+) windows of 27 days", summary).group(1))
    page.get_by_text("Track summary", exact=True).click()
    track = _wait_for(lambda: _text(page, ".ds-track-summary"), lambda t: "27-day" in t and "model matern" in t)
    assert re.search(rf"ok of {n} windows · 27-day windows · model matern$", track.strip()), track
    fits = _wait_for(lambda: _table_values(page), lambda v: "matern_alpha" in v)
    assert "inertial_variance" not in fits  # the table is the current model's
    page.screenshot(path=str(artifacts_dir / "dashboard-after-rapid-changes.png"), full_page=True)
    assert page.console_errors == [], (page.console_errors, page.outside)


def _overlap(a, b):
    """Whether two bounding boxes (Playwright's dicts) share any area."""
    return (a["x"] < b["x"] + b["width"] and b["x"] < a["x"] + a["width"]
            and a["y"] < b["y"] + b["height"] and b["y"] < a["y"] + a["height"])


def test_on_a_laptop_screen_the_fit_table_covers_no_spectrum(server, browser, artifacts_dir):
    # 1280 px: a common laptop width (common practice, no source); the two rotary spectra side by side and the fit
    # table must each be drawn whole, inside the window, neither over the other
    ctx, page = _new_page(browser, 1280, 900)
    try:
        _open(page, server)
        table = page.locator(".tabulator").first
        table.scroll_into_view_if_needed()
        spectra = page.locator(".ds-spectra canvas")
        assert spectra.count() >= 2
        boxes = [spectra.nth(k).bounding_box() for k in range(spectra.count())]
        boxes = [b for b in boxes if b and b["width"] > 50]  # the plots, not empty layers
        t = table.bounding_box()
        page.screenshot(path=str(artifacts_dir / "dashboard-1280.png"))
        assert len(boxes) >= 2 and t is not None
        assert not any(_overlap(t, b) for b in boxes), (t, boxes)
        assert all(b["x"] >= 0 and b["x"] + b["width"] <= 1280 for b in [*boxes, t]), (t, boxes)
        assert page.console_errors == [], page.console_errors
    finally:
        ctx.close()


@pytest.mark.xfail(reason="known shortfall (issue 15 stays open): long jobs now run at background priority, but "
                          "building a page still costs seconds of the server's one thread, so on two busy cores the "
                          "last of eight sessions can take longer than 30 s to show its track", strict=False)
def test_a_slow_exact_fit_blocks_no_other_session(server, browser, page):
    _open(page, f"{server}?{urlencode({'estimator': 'exact', 'window_days': 60})}", table=False)
    assert "exact" in _text(page, ".ds-fitinfo")  # fitting, in the background
    others = []  # (context, page, track, window length)
    try:
        t0 = time.time()
        for k, days in enumerate((20, 25, 35, 40, 45, 28, 32, 50)):  # eight sessions, as issue 15 asks
            ctx, pg = _new_page(browser)
            track = f"TB31-{k + 2:04d}"
            others.append((ctx, pg, track, days))
            pg.goto(f"{server}?{urlencode({'track': track, 'window_days': days})}", wait_until="commit")
        for _, pg, track, days in others:
            text = _wait_for(lambda pg=pg: _text(pg, ".ds-summary", timeout=5),
                             lambda t, track=track: f"Track {track}" in t, timeout=max(30 - (time.time() - t0), 1))
            assert f"Track {track}" in text and f"windows of {days} days" in text, text
        assert time.time() - t0 < 30
        pg = others[0][1]
        assert "matern_alpha" in _wait_for(lambda: _table_values(pg), lambda v: "matern_alpha" in v)
        assert "exact" in _text(page, ".ds-fitinfo")  # still running there
    finally:
        for ctx, *_ in others:
            ctx.close()


def test_bad_links_and_files_give_one_line_messages(server, page):
    q = urlencode({"track": "TB31-0003", "window_days": "abc", "model": "foo", "estimator": "bogus", "window": 1})
    _open(page, f"{server}?{q}")
    msg = _text(page, ".ds-message")
    assert all(f"{k}=" in msg for k in ("window_days", "model", "estimator")) and "\n" not in msg.strip(), msg
    summary = _summary(page)
    assert "Track TB31-0003 · window 2 of" in summary and "windows of 30 days" in summary, summary
    assert "model matern+inertial · debiased estimator" in summary
    _open(page, f"{server}?{urlencode({'track': 'nosuch'})}")
    assert "track=nosuch" in _text(page, ".ds-message")
    # numeric track ids restore
    _open(page, f"{server}?{urlencode({'data': 'numeric.parquet', 'track': 102})}")
    assert "Track 102 ·" in _summary(page)
    for name in ("header.csv", "allbad.csv"):
        page.goto(f"{server}?{urlencode({'data': name})}", timeout=60_000)
        text = _text(page, ".ds-error")
        assert name in text and "Traceback" not in page.content() and "/tmp" not in text, text
        assert len([x for x in text.splitlines() if x.strip()]) == 2, text  # a title and one line
    page.goto(f"{server}?data=../../../etc/passwd")
    assert "Not available" in _text(page, ".ds-error")
    assert "root:" not in page.content()


@pytest.mark.parametrize("name, hemisphere", [("coast.parquet", "N"), ("polar.parquet", "N")])
def test_maps_show_degrees_graticule_and_land(server, page, artifacts_dir, name, hemisphere):
    _open(page, f"{server}?{urlencode({'data': name})}")
    if name == "coast.parquet":  # Mercator: degrees on both axes
        # wait for the map's axes
        labels = _wait_for(lambda: _axis_labels(page), lambda v: len(v) > 0, timeout=90)
        assert any(re.fullmatch(r"\d+°W", x) for x in labels) and any(re.fullmatch(r"\d+°N", x) for x in labels)
    page.screenshot(path=str(artifacts_dir / f"dashboard-map-{name.split('.')[0]}.png"),
                    clip={**_map_box(page), "width": _map_box(page)["width"] + 80})
    page.get_by_text("Parameter map", exact=True).click()
    _wait_for(lambda: page.locator("canvas").count(), lambda c: c >= 5)
    time.sleep(2)
    page.screenshot(path=str(artifacts_dir / f"dashboard-parameter-map-{name.split('.')[0]}.png"), full_page=True)
    assert page.console_errors == [], (page.console_errors, page.outside)


def _map_x_range(page):
    """The track map's x range (BokehJS model of the page)."""
    return page.evaluate("""() => {
        for (const doc of window.Bokeh.documents)
            for (const m of doc.all_models)
                if (m.title && m.title.text === 'All tracks') return [m.x_range.start, m.x_range.end];
        return null;
    }""")


def _checkbox(page, label):
    """The checkbox whose label is ``label`` (each lives in its own shadow root, beside its text)."""
    boxes = page.locator("input[type=checkbox]")
    for i in range(boxes.count()):
        if boxes.nth(i).evaluate("e => e.getRootNode().textContent").endswith(label):
            return boxes.nth(i)
    raise AssertionError(f"no checkbox {label!r}")


def test_the_wheel_scrolls_the_page_and_ctrl_wheel_zooms_the_map(server, page):
    # a shared screen or a notebook: the wheel over the map must scroll the page, not zoom (Ctrl+wheel zooms)
    _open(page, server)
    before = _map_x_range(page)
    box = _map_box(page)
    page.mouse.move(box["x"] + box["width"] / 2, box["y"] + box["height"] / 2)
    page.mouse.wheel(0, 300)
    moved = _wait_for(lambda: _map_box(page)["y"], lambda y: y < box["y"] - 100, timeout=10)
    assert moved < box["y"] - 100 and _map_x_range(page) == before
    box = _map_box(page)
    page.mouse.move(box["x"] + box["width"] / 2, box["y"] + box["height"] / 2)
    page.keyboard.down("Control")
    page.mouse.wheel(0, -500)
    page.keyboard.up("Control")
    after = _wait_for(lambda: _map_x_range(page), lambda v: v != before, timeout=20)
    assert after[1] - after[0] < 0.9 * (before[1] - before[0])  # zoomed in


def test_the_fixed_band_slider_shows_only_without_the_automatic_band(server, page):
    _open(page, server)
    assert page.get_by_text("Max fitted frequency").count() == 0
    _checkbox(page, "Automatic fitted band").click()
    assert _wait_for(lambda: page.get_by_text("Max fitted frequency").count(), lambda c: c == 1, timeout=15) == 1
