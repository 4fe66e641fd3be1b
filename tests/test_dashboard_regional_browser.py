"""Pooled fits and anisotropy on the page: Debian's Chromium driven by Playwright against a real `driftspec serve`.

The values on the page are checked against the library run here directly on windows chosen here: the region's
pooled fit (its table) and the pooled parameter map (the values behind its hover) against ``pool_fit``. The server,
browser and page fixtures are those of ``test_dashboard_browser``; the served data are four demo tracks off a
coast, so that the background fits finish quickly on two cores.
"""

import re
import shutil
import time
from urllib.parse import urlencode

import numpy as np
import pytest
import test_dashboard_browser as base
from test_dashboard_browser import _map_box, _moved, _open, _text, _wait_for

from driftspec.app.dashboard import TABLE_DIGITS
from driftspec.app.geo import parse_degrees

# the browser tests' fixtures, found by name (``server`` starts `driftspec serve` on this module's ``served_dir``)
browser, page, server = base.browser, base.page, base.server

pytestmark = pytest.mark.browser
SCREENSHOTS = "/tmp/driftspec-regional"


@pytest.fixture(scope="module")
def served_dir(demo_dir, tmp_path_factory):
    """The served folder: four demo tracks moved off Portugal as ``fixes.parquet`` (the file the server opens)."""
    from driftspec.analysis.io import read_fixes, write_fixes

    out = tmp_path_factory.mktemp("served-regional")
    fixes = read_fixes(str(demo_dir / "fixes.parquet")).drop(columns="row")
    ids = sorted(fixes["id"].astype(str).unique())
    write_fixes(_moved(fixes[fixes["id"].astype(str).isin(ids[:4])], -14.0, 40.0, 0.25), out / "fixes.parquet")
    return out


@pytest.fixture(scope="module")
def windows(served_dir):
    """Every 30-day, half-overlapping window of the served file, made here from the file (not through the page)."""
    from driftspec.analysis.tracks.pipeline import load_velocities
    from driftspec.analysis.tracks.windows import iter_windows

    vel, _, _ = load_velocities(str(served_dir / "fixes.parquet"))
    return [w for _, v in vel.groupby("id", sort=True) for w in iter_windows(v, 30.0, 0.5, 0.5)]


def _spec():
    from driftspec.analysis.fitting import FitSpec

    # the page's default settings, as `driftspec fit` options would give them
    return FitSpec(models=("matern+inertial",), estimator="debiased", band="auto", observation="auto",
                   taper="none", inertial_frequency="free")


def _tables(pg):
    """Every Tabulator on the page as {first cell: [other cells]}."""
    out = []
    try:
        for tab in pg.locator(".tabulator").all():
            rows = {}
            for row in tab.locator(".tabulator-row").all():
                cells = [c.strip() for c in row.locator(".tabulator-cell").all_inner_texts()]
                if cells and cells[0].isdigit():  # the row index column
                    cells = cells[1:]
                if len(cells) >= 3:
                    rows[cells[0]] = cells[1:]
            out.append(rows)
    except Exception:  # noqa: BLE001 - a table is being redrawn; the caller reads again
        return []
    return out


def _number(cell: str) -> float:
    """A fit table's cell as a number ("–" where it shows none)."""
    return np.nan if cell == "–" else float(cell)


def _rounded(x) -> float:
    """``x`` to the significant digits the fit tables show."""
    return float(f"{x:.{TABLE_DIGITS}g}")


def _table_with(pg, name):
    return next((t for t in _tables(pg) if name in t), None)


def _bokeh_columns(pg, marker):
    """Columns of the page's Bokeh data sources that have a column ``marker`` (the values behind glyphs)."""
    return pg.evaluate("""(marker) => {
        const out = [];
        for (const doc of window.Bokeh.documents)
            for (const m of doc.all_models) {
                const d = m.data;
                if (!d || typeof d !== "object") continue;
                const get = (k) => d instanceof Map ? d.get(k) : d[k];
                if (get(marker) === undefined) continue;
                const keys = d instanceof Map ? [...d.keys()] : Object.keys(d);
                const row = {};
                for (const k of keys) {
                    const v = get(k);
                    if (v && typeof v.length === "number" && typeof v !== "string")
                        row[k] = Array.from(v, (x) => (x && typeof x === "object") ? null : x);
                }
                out.push(row);
            }
        return out;
    }""", marker)


def _titles(pg):
    return pg.evaluate("""() => {
        const out = [];
        for (const doc of window.Bokeh.documents)
            for (const m of doc.all_models) {
                if (typeof m.text === "string") out.push(m.text);
                if (m.label && typeof m.label.value === "string") out.push(m.label.value);
            }
        return out;
    }""")


def test_a_box_selected_region_gets_its_pooled_fit(server, page, windows):
    from driftspec.analysis.regional.pooled import pool_fit

    shutil.rmtree(SCREENSHOTS, ignore_errors=True)
    _open(page, server)
    for _ in range(3):  # on a busy machine the first drag can come before the map listens
        box = _map_box(page)
        page.locator("[title='Box Select']").first.click()
        x, y = box["x"] + 0.15 * box["width"], box["y"] + 0.1 * box["height"]
        page.mouse.move(x, y)
        page.mouse.down()
        page.mouse.move(x + 0.7 * box["width"], y + 0.8 * box["height"], steps=10)
        page.mouse.up()
        if "region" in _wait_for(lambda: _text(page, ".ds-summary"), lambda t: "region" in t, timeout=30):
            break
    table = _wait_for(lambda: _table_with(page, "inertial_frequency_offset"), lambda t: t is not None, timeout=150)
    assert table is not None, _text(page, ".ds-region-fit")
    text = _text(page, ".ds-region-fit")
    m = re.search(r"region ([\d.]+°[NS]?)\.\.([\d.]+°[NS]?), ([\d.]+°[EW]?)\.\.([\d.]+°[EW]?)", text)
    lat0, lat1, lon0, lon1 = (parse_degrees(g) for g in m.groups())  # hemisphere letters, as the page writes
    # the region's windows, chosen here: mean position inside the box
    mine = [w for w in windows if lat0 <= w.lat <= lat1 and lon0 <= w.lon <= lon1]
    direct = pool_fit(mine, _spec())
    assert direct.status in ("ok", "at_bound") and direct.n_windows >= 6, direct
    assert f"· {direct.status}" in text, text
    tracks = f"{direct.n_tracks} track" + ("s" if direct.n_tracks != 1 else "")
    assert f"{direct.n_windows} windows of {tracks}" in text, text
    het = re.search(r"statistic\s+([\d.]+),\s+df\s+([\d.]+),\s+p\s+=\s+([\d.e-]+)", text)
    assert het, text
    assert float(het.group(1)) == pytest.approx(direct.heterogeneity_statistic, abs=1e-3)
    assert float(het.group(2)) == pytest.approx(direct.heterogeneity_df, rel=1e-5)
    assert float(het.group(3)) == pytest.approx(direct.heterogeneity_pvalue, rel=1e-2)
    for name, value in direct.params.items():
        shown, se = (_number(c) for c in table[name][:2])
        assert shown == pytest.approx(_rounded(value), rel=1e-12, nan_ok=True), name
        assert se == pytest.approx(_rounded(direct.stderr[name]), rel=1e-12, nan_ok=True), name
    page.get_by_text("Pooled fit of the region").first.scroll_into_view_if_needed()
    page.screenshot(path=f"{SCREENSHOTS}/region-fit.png")
    assert page.console_errors == [], page.console_errors


def test_pooled_map_and_anisotropy_on_the_page(server, page, windows):
    from driftspec.analysis.regional.pooled import pool_fit

    b = 5.0
    q = {"anisotropic": "true", "map_values": "pooled fit", "bin_deg": b, "window": 1}
    _open(page, f"{server}?{urlencode(q)}", table=False)
    aniso = _wait_for(lambda: _table_with(page, "isotropy p-value"), lambda t: t is not None, timeout=120)
    assert aniso is not None and {"anisotropy", "anisotropy_angle_deg", "diffusivity K_uv"} <= set(aniso)
    p_shown = _number(aniso["isotropy p-value"][0])
    assert 0 <= p_shown <= 1
    titles = _wait_for(lambda: _titles(page), lambda t: any(x.startswith("complementary") for x in t))
    assert any(x.startswith("complementary") for x in titles), titles
    # the track map's ellipse: its numbers are those of the table
    drawn = _wait_for(lambda: [c for c in _bokeh_columns(page, "pvalue") if c.get("rho")], bool)
    assert drawn and _rounded(drawn[0]["rho"][0]) == pytest.approx(_number(aniso["anisotropy"][0]), rel=1e-12)
    assert _rounded(drawn[0]["pvalue"][0]) == pytest.approx(p_shown, rel=1e-12)
    page.screenshot(path=f"{SCREENSHOTS}/anisotropy-map.png")
    page.get_by_text("anisotropic fit", exact=True).first.scroll_into_view_if_needed()
    time.sleep(0.5)
    page.screenshot(path=f"{SCREENSHOTS}/anisotropy-spectra.png")
    page.get_by_text("Parameter map", exact=True).click()
    cols = _wait_for(lambda: _bokeh_columns(page, "het_p"), lambda c: bool(c), timeout=150)
    assert cols, _text(page, ".ds-param-map")
    shown = cols[0]
    assert len(shown["lon"]) >= 2
    checked = 0
    for k in range(len(shown["lon"])):
        lon, lat = shown["lon"][k], shown["lat"][k]
        mine = [w for w in windows if lat - b / 2 <= w.lat < lat + b / 2 and lon - b / 2 <= w.lon < lon + b / 2]
        direct = pool_fit(mine, _spec(), min_windows=2)
        assert shown["n_windows"][k] == direct.n_windows and shown["status"][k] == direct.status
        if direct.status == "ok":
            assert shown["matern_alpha"][k] == pytest.approx(direct.params["matern_alpha"], rel=1e-6)
            assert shown["se"][k] == pytest.approx(direct.stderr["matern_alpha"], rel=1e-6)
            assert shown["het_p"][k] == pytest.approx(direct.heterogeneity_pvalue, rel=1e-6)
            checked += 1
    assert checked >= 1
    ellipses = _bokeh_columns(page, "sd_minor")
    assert any(len(c.get("n", [])) >= 2 for c in ellipses)  # the bins' variance ellipses are drawn
    time.sleep(1.0)
    page.screenshot(path=f"{SCREENSHOTS}/pooled-map.png", full_page=True)
    assert page.console_errors == [], page.console_errors
