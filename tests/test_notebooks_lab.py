"""The shipped notebooks in JupyterLab: Debian's Chromium, driven by Playwright, runs each top to bottom.

JupyterLab serves a temporary copy of ``notebooks/`` (the repository's copies keep their outputs stripped), the
kernel reads the small demo set through ``DRIFTSPEC_DEMO``, and JupyterLab's news feed, update check and
extension index are off. Each notebook is run with JupyterLab's own "Run All Cells" command; then every code cell
must have its execution count, no output may be an error or go to stderr (where Python's warnings go), each
matplotlib figure must be drawn, and the quickstart's inline dashboard must show the track and model the
notebook's code chose (read from the page's Bokeh models and widgets), and its fit table the parameters of the fit
the notebook computed itself. Every request the page makes must stay on this machine (Panel's style sheets too).

Outside CI these tests skip when no browser is installed; with DRIFTSPEC_REQUIRE_BROWSER=1 (set by
.ci/run) a missing browser is a failure.
"""

import ast
import json
import os
import re
import secrets
import shutil
import subprocess
import sys
import time
import urllib.request
from pathlib import Path
from urllib.parse import urlsplit

import pytest
from test_dashboard_browser import _browser_or_skip, _free_port, browser  # noqa: F401 - the shared browser fixture

pytestmark = pytest.mark.browser
NOTEBOOKS = Path(__file__).resolve().parent.parent / "notebooks"
SHIPPED = sorted(p.name for p in NOTEBOOKS.glob("*.ipynb"))
SCREENSHOTS = Path("/tmp")
LOCAL_HOSTS = {"127.0.0.1", "localhost"}
#: JupyterLab user settings: no news feed, no update check, every cell rendered (no windowing) so that the
#: outputs of all cells are in the page to be read
LAB_SETTINGS = {
    "@jupyterlab/apputils-extension/notification.jupyterlab-settings": {"fetchNews": "false",
                                                                         "checkForUpdates": False},
    "@jupyterlab/notebook-extension/tracker.jupyterlab-settings": {"windowingMode": "none"},
}


@pytest.fixture(scope="module")
def lab(demo_dir, tmp_path_factory):
    """`jupyter lab` on 127.0.0.1 serving a copy of the notebooks: (base URL, token)."""
    _browser_or_skip()
    pytest.importorskip("jupyterlab")
    top = tmp_path_factory.mktemp("lab")
    root = top / "notebooks"
    shutil.copytree(NOTEBOOKS, root)
    for rel, values in LAB_SETTINGS.items():
        path = top / "settings" / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(values))
    (top / "workspaces").mkdir()
    env = dict(os.environ, DRIFTSPEC_DEMO=str(demo_dir / "fixes.parquet"),
               JUPYTERLAB_SETTINGS_DIR=str(top / "settings"), JUPYTERLAB_WORKSPACES_DIR=str(top / "workspaces"),
               JUPYTER_RUNTIME_DIR=str(top / "runtime"))
    token = secrets.token_hex(16)
    port = _free_port()
    log = open(top / "lab.log", "w")  # noqa: SIM115 - closed below
    proc = subprocess.Popen(
        [sys.executable, "-m", "jupyterlab", "--no-browser", "--ip=127.0.0.1", f"--port={port}", "--port-retries=0",
         f"--IdentityProvider.token={token}", f"--ServerApp.root_dir={root}",
         "--LabApp.news_url=None", "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate",
         "--LabApp.extension_manager=readonly", "--LabApp.expose_app_in_browser=True", "--allow-root"],
        env=env, stdout=log, stderr=subprocess.STDOUT, cwd=top)
    url = f"http://127.0.0.1:{port}"
    deadline = time.time() + 120
    while True:
        try:
            with urllib.request.urlopen(f"{url}/api/status?token={token}", timeout=2) as r:
                if r.status == 200:
                    break
        except OSError:
            pass
        if proc.poll() is not None or time.time() > deadline:
            proc.kill()
            log.close()
            pytest.fail("jupyter lab did not start:\n" + (top / "lab.log").read_text()[-3000:])
        time.sleep(0.3)
    yield url, token
    proc.terminate()
    try:
        proc.wait(30)
    except subprocess.TimeoutExpired:
        proc.kill()
    log.close()


def _outside(url):
    """Whether a request leaves the machine (data:, blob: and about: URLs never do)."""
    parts = urlsplit(url)
    if parts.scheme in ("data", "blob", "about"):
        return False
    return parts.hostname not in LOCAL_HOSTS


#: the open notebook's state, read from JupyterLab's own models
STATE_JS = """() => {
    const app = window.jupyterapp;
    const nb = app && app.shell.currentWidget;
    if (!nb || !nb.content || !nb.sessionContext) return null;
    const kernel = nb.sessionContext.session && nb.sessionContext.session.kernel;
    const cells = [];
    for (const cell of nb.content.widgets) {
        if (cell.model.type !== 'code') continue;
        cells.push({count: cell.model.executionCount, source: cell.model.sharedModel.getSource(),
                    outputs: cell.model.toJSON().outputs});
    }
    return {path: nb.context.path, ready: nb.sessionContext.isReady, kernel: kernel ? kernel.status : null, cells};
}"""


def _state(page):
    return page.evaluate(STATE_JS)


def _run_notebook(page, lab, name, timeout=180.0):
    """Open ``name`` in JupyterLab, run all its cells and wait until every code cell has run: the last state."""
    url, token = lab
    # a workspace of its own, so that the notebooks opened before are not reopened (with kernels) beside it
    page.goto(f"{url}/lab/workspaces/{Path(name).stem}/tree/{name}?token={token}", timeout=120_000)
    page.wait_for_function("() => window.jupyterapp && window.jupyterapp.shell.currentWidget", timeout=120_000)
    deadline = time.time() + 120
    st = _state(page)
    while not (st and st["path"] == name and st["ready"] and st["kernel"] == "idle") and time.time() < deadline:
        time.sleep(0.3)
        st = _state(page)
    assert st and st["ready"] and st["kernel"] == "idle", f"{name}: kernel not ready: {st}"
    page.evaluate("() => window.jupyterapp.commands.execute('notebook:run-all-cells')")
    deadline = time.time() + timeout
    while time.time() < deadline:
        time.sleep(1.0)
        st = _state(page) or st
        if st["kernel"] == "idle" and all(c["count"] is not None for c in st["cells"]):
            return st
        if any(o.get("output_type") == "error" for c in st["cells"] for o in c["outputs"]):
            return st
    pytest.fail(f"{name}: not every cell ran within {timeout:.0f} s: "
                f"{[c['count'] for c in st['cells']]}, kernel {st['kernel']}")


def _complaints(st):
    """Errors and anything written to stderr (warnings, tracebacks) in a notebook's outputs."""
    out = []
    for k, cell in enumerate(st["cells"]):
        for o in cell["outputs"]:
            if o.get("output_type") == "error":
                out.append(f"cell {k}: {o.get('ename')}: {o.get('evalue')}")
            elif o.get("output_type") == "stream" and o.get("name") == "stderr":
                text = o.get("text")
                out.append(f"cell {k}: stderr: {''.join(text) if isinstance(text, list) else text}")
    return out


def _bokeh_models(page):
    """Titles of the plots and (title, value) of the widgets with a title among the page's BokehJS models."""
    return page.evaluate("""() => {
        const titles = [], widgets = [];
        for (const doc of (window.Bokeh ? window.Bokeh.documents : []))
            for (const m of doc.all_models) {
                if (m.type === 'Title' && m.text) titles.push(m.text);
                else if (typeof m.title === 'string' && typeof m.value === 'string') widgets.push([m.title, m.value]);
            }
        return {titles, widgets};
    }""")


def _text(page, css, ok, timeout=60.0):
    """Text of a Markdown pane in the outputs (its div lives in the pane's shadow root), waiting up to
    ``timeout`` seconds for ``ok(text)``: the last text read."""
    deadline = time.time() + timeout
    text = ""
    while True:
        loc = page.locator(f".jp-OutputArea-output {css} >> div")
        if loc.count():
            text = loc.first.inner_text(timeout=30_000)
            if ok(text):
                return text
        if time.time() > deadline:
            return text
        time.sleep(0.5)


def _printed(st, cell):
    """Text printed to stdout by one code cell."""
    return "".join("".join(o["text"]) if isinstance(o["text"], list) else o["text"]
                   for o in st["cells"][cell]["outputs"] if o.get("output_type") == "stream")


@pytest.fixture
def page(browser):  # noqa: F811 - the fixture imported above
    ctx = browser.new_context(viewport={"width": 1500, "height": 1100})
    pg = ctx.new_page()
    pg.requests = []
    pg.on("request", lambda r: pg.requests.append(r.url))
    yield pg
    ctx.close()


def _shutdown(page):
    """Stop the notebook's kernel (and the dashboard's background fits with it)."""
    page.evaluate("() => window.jupyterapp.shell.currentWidget.sessionContext.shutdown()")


@pytest.mark.parametrize("name", SHIPPED)
def test_notebook_runs_in_jupyterlab(name, lab, page):
    try:
        st = _run_notebook(page, lab, name)
        assert _complaints(st) == [], _complaints(st)
        outside = [u for u in page.requests if _outside(u)]
        assert outside == [], outside  # nothing fetched from outside the machine so far
        # JupyterLab draws errors and stderr streams with the stderr MIME type
        shown = page.locator('.jp-OutputArea-output[data-mime-type="application/vnd.jupyter.stderr"]')
        assert shown.count() == 0, shown.all_inner_texts()
        # every matplotlib figure a cell makes is drawn inline
        drawn = ["image/png" in o.get("data", {}) for c in st["cells"] if "plt.subplots(" in c["source"]
                 for o in c["outputs"]]
        assert sum(drawn) == sum("plt.subplots(" in c["source"] for c in st["cells"])
        if name == "quickstart.ipynb":
            _check_dashboard(page, st)
    finally:
        if page.url.startswith(lab[0]):
            shown_cell = page.locator(".jp-CodeCell", has_text="explore(")  # the quickstart's dashboard, if any
            if shown_cell.count():
                shown_cell.first.scroll_into_view_if_needed(timeout=10_000)
            page.screenshot(path=str(SCREENSHOTS / f"lab_{Path(name).stem}.png"))
            _shutdown(page)
    assert any(u.startswith(lab[0] + "/api/kernels") for u in page.requests)  # the requests were recorded
    outside = [u for u in page.requests if _outside(u)]
    assert outside == [], outside  # nor while the dashboard was looked at


def _check_dashboard(page, st):
    """The dashboard drawn inline: map, rotary spectra and controls showing what the notebook's code chose."""
    # the window the notebook printed (second code cell: "<track id> <start> <end> coverage ...") is the
    # dashboard's track; the last cell set the model from code and printed "<track> matern <status> [...]"
    track = _printed(st, 1).split()[0]
    assert _printed(st, -1).split()[:2] == [track, "matern"]
    page.locator(".jp-OutputArea-output .ds-summary").first.scroll_into_view_if_needed(timeout=60_000)
    expected = re.compile(rf"Track {re.escape(track)} · window 1 of \d+ .* windows of 30 days · model matern ·")
    summary = _text(page, ".ds-summary", expected.search)
    assert expected.search(summary), summary  # the state set from code reached the page
    deadline = time.time() + 60
    models = _bokeh_models(page)
    while not {"All tracks", "clockwise", "counterclockwise"} <= set(models["titles"]) and time.time() < deadline:
        time.sleep(0.5)
        models = _bokeh_models(page)
    assert {"All tracks", "clockwise", "counterclockwise"} <= set(models["titles"]), models["titles"]
    assert ["Track", track] in models["widgets"], models["widgets"]  # the track control follows the state
    assert page.locator(".jp-OutputArea-output canvas").count() >= 3  # map and the two spectra drawn
    # the fit of the model set from code, which arrives from a background fit after the last cell ran: the fit
    # table lists the parameters of the fit the notebook computed itself (ex.fit_current(), printed), and no
    # other model's (the table adds the diffusivity derived from them)
    fitted = set(ast.literal_eval(re.search(r"\[.*\]", _printed(st, -1)).group(0)))
    cells = page.locator('.jp-OutputArea-output .tabulator-cell[tabulator-field="parameter"]')
    info = page.locator(".jp-OutputArea-output .ds-fitinfo")  # the table is under the spectra: scroll to it, as a
    deadline = time.time() + 60                                # reader would (JupyterLab draws what is in view)

    def read():
        if info.count():
            info.first.scroll_into_view_if_needed(timeout=10_000)
        return set(cells.all_inner_texts())

    shown = read()
    while (not fitted <= shown or shown - fitted - {"diffusivity"}) and time.time() < deadline:
        time.sleep(0.5)
        shown = read()
    assert fitted and fitted <= shown and not shown - fitted - {"diffusivity"}, (sorted(fitted), sorted(shown))
