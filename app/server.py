"""Serving the dashboard: ``driftspec serve`` and ``panel serve``.

Security: the server binds to 127.0.0.1 unless told otherwise; the page can open only files inside the
data directory given at start (by a name relative to it, chosen from a list); nothing from the page is
evaluated as code, and nothing is unpickled.
"""

from __future__ import annotations

import functools
import os
import signal
import sys
import threading
from pathlib import Path
from urllib.parse import urlencode

import panel as pn

DATA_SUFFIXES = (".parquet", ".csv", ".nc")


def demo_path() -> Path:
    """The bundled demo fixes; generated deterministically into a cache folder when not bundled."""
    here = Path(__file__).resolve().parent.parent / "demo_data" / "fixes.parquet"
    if here.exists():
        return here
    cache = Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "driftspec" / "demo"
    target = cache / "fixes.parquet"
    if not target.exists():
        from driftspec.analysis.simulation.demo import write_demo

        write_demo(cache)
    return target


@functools.lru_cache(maxsize=8)
def _velocities(path: str):
    from driftspec.analysis.tracks.pipeline import load_velocities

    vel, report, _ = load_velocities(path)
    return vel, report


_DATA: dict = {}
_DATA_LOCK = threading.Lock()


def track_data(path: str):
    """The prepared, shared data of one file (built once; every session showing the file uses it)."""
    from .trackdata import TrackData

    with _DATA_LOCK:
        if path not in _DATA:
            vel, report = _velocities(path)
            _DATA[path] = (TrackData(vel) if len(vel) else None, report)
        return _DATA[path]


@functools.lru_cache(maxsize=4)
def _fits(path: str):
    from driftspec.analysis.io.tables import read_table

    return read_table(path)


def _check_fits(path: Path) -> None:
    """A one-line error unless ``path`` reads as a fits table (checked before the server starts, not on a page)."""
    from driftspec.analysis.errors import InputError
    from driftspec.analysis.io.columns import FITS_TABLE_COLUMNS

    try:
        columns = set(_fits(str(path)).columns)
    except Exception as exc:  # noqa: BLE001 - any reading failure is the file's problem, said in one line
        raise InputError(f"{path}: cannot read a fits table ({str(exc).splitlines()[0] if str(exc) else exc})") \
            from None
    missing = [c for c in FITS_TABLE_COLUMNS if c not in columns]
    if missing:
        kind = " (it looks like position fixes)" if {"time", "lat", "lon"} <= columns else ""
        raise InputError(f"{path}: not a fits table{kind}: no column(s) {', '.join(missing)}; give the table "
                         "`driftspec fit` wrote")


def _may_hold_fixes(path: Path) -> bool:
    """False for a CSV or Parquet table whose header lacks a track, time, latitude or longitude column (a demo's
    truth table, a summary): the file selector does not offer what cannot open. Unreadable headers stay listed,
    so that the page can say what is wrong with them."""
    from driftspec.analysis.errors import InputError
    from driftspec.analysis.io.columns import column_map

    suffix = path.suffix.lower()
    try:
        if suffix == ".csv":
            import pandas as pd

            names = list(pd.read_csv(path, nrows=0).columns)
        elif suffix in (".parquet", ".pq"):
            import pyarrow.parquet as pq

            names = pq.read_schema(path).names
        else:
            return True
        column_map(names, path.name)
    except InputError:
        return False
    except Exception:  # noqa: BLE001 -- damaged or empty: listed, and the page says why
        return True
    return True


def data_files(data_dir: Path) -> list[str]:
    root = data_dir.resolve()
    return sorted(str(p.relative_to(data_dir)) for p in data_dir.rglob("*")
                  if p.suffix.lower() in DATA_SUFFIXES and p.is_file() and "fits" not in p.stem
                  and p.resolve().is_relative_to(root)  # no links that lead outside the folder
                  and _may_hold_fixes(p))


def resolve_in(data_dir: Path, name: str) -> Path | None:
    """``data_dir / name`` if it stays inside ``data_dir`` and exists, else None."""
    try:
        p = (data_dir / name).resolve()
    except (OSError, ValueError):
        return None
    return p if p.is_file() and p.is_relative_to(data_dir.resolve()) else None


def _one_line(exc: Exception, path: Path, name: str) -> str:
    """An error message for the page: one line, the file's name as the user gave it, no server path."""
    text = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    for p in (str(path), str(path.parent)):
        text = text.replace(p, name if p == str(path) else ".")
    return text


def _message(title: str, text: str):
    return pn.pane.Markdown(f"### {title}\n{text}", css_classes=["ds-error"])


def _query() -> dict:
    args = pn.state.session_args or {}
    return {k: v[0].decode(errors="replace") for k, v in args.items() if v}


def configure_panel() -> None:
    """Server settings: resources served inline, plots on canvases.

    Every change to a page's document runs on the server's event loop: fits run in worker processes
    (:mod:`driftspec.app.jobs`) and report there. Panel's automatic threading (``config.nthreads``) stays off:
    with it, a browser's changes were applied in threads while fit results were applied on the loop, and two
    updates of one pane at once could send a reference to a plot the browser was never sent ("reference ...
    isn't known" in the browser's console, after rapid changes of window length and model)."""
    pn.config.nthreads = 0
    pn.config.inline = True  # every resource from this server: the page works with no network
    # plots drawn on 2-D canvases, not WebGL: they are small (hundreds to thousands of points; the map is one
    # raster image), which a canvas draws at once, while WebGL on a machine without a usable GPU runs in software
    # emulation and cost the browser several CPU-seconds per opened page
    import holoviews as hv

    hv.renderer("bokeh").webgl = False
    _lean_page_resources()


#: BokehJS bundles a page never needs: WebGL (every plot is drawn on a canvas) and MathJax (no text holds TeX)
UNUSED_BUNDLES = ("bokeh-gl", "bokeh-mathjax")


def _lean_page_resources() -> None:
    """Leave :data:`UNUSED_BUNDLES` out of every served page. Panel adds MathJax to any page with a Markdown pane
    and always adds WebGL; evaluating the two (3 MB of script) cost Chromium about 0.4 of its 3.1-3.6 CPU-seconds
    per opened page here, with ten pages opening on two cores. Panel has no option for it, so its page bundler is
    wrapped to receive resources without those components; if Panel no longer has that function, pages keep the
    full bundle."""
    import panel.io.server as pn_server

    original = getattr(pn_server, "bundle_resources", None)
    if original is None or getattr(original, "_driftspec_lean", False):
        return

    def bundle_resources(roots, resources, *args, **kwargs):
        if resources is not None and hasattr(resources, "components") and hasattr(resources, "clone"):
            resources = resources.clone(components=[c for c in resources.components if c not in UNUSED_BUNDLES])
        return original(roots, resources, *args, **kwargs)

    bundle_resources._driftspec_lean = True
    pn_server.bundle_resources = bundle_resources


def make_app(input_path: Path, fits_path: Path | None = None, first_look: bool = True):
    """A function building one session's page."""
    from .dashboard import Explorer
    from .state import ExplorerState

    data_dir = input_path.parent.resolve()

    def session():
        query = _query()
        name = query.get("data", input_path.name)
        path = resolve_in(data_dir, name)
        if path is None:
            return _message("Not available", f"`{name}` is not a data file in the served folder.")
        from driftspec.analysis.errors import InputError

        try:
            data, report = track_data(str(path))
        except (InputError, ValueError, OSError) as exc:
            return _message(f"Cannot open `{name}`", _one_line(exc, path, name))
        if data is None:
            return _message(f"Nothing to show in `{name}`",
                            f"no fix passed quality control ({report.summary()}).")
        fits = _fits(str(fits_path)) if fits_path else None
        theme = query.get("theme", "light")
        state = ExplorerState(theme=theme if theme in ("light", "dark") else "light")
        ex = Explorer(data, fits=fits, state=state, title=f"driftspec · {path.name}", first_look=first_look)
        ex.apply_query(query)
        tpl = ex.template()
        ex.sync_url()
        files = data_files(data_dir)
        if len(files) > 1:
            pick = pn.widgets.Select(name="Data file (in the served folder)", options=files, value=name)

            def go(event):
                if pn.state.location is not None:
                    pn.state.location.search = "?" + urlencode({"data": event.new})
                    pn.state.location.reload = True
            pick.param.watch(go, "value")
            tpl.sidebar.insert(0, pick)
        tpl.sidebar.append(pn.pane.Markdown(f"QC: {report.summary()}", styles={"font-size": "0.8em"}))
        return tpl

    return session


def _warm_up():
    """Compile datashader's aggregation kernels (numba) before the first page asks for them."""
    import datashader as dsh
    import holoviews as hv
    import numpy as np
    from holoviews.operation.datashader import dynspread, rasterize

    hv.extension("bokeh", logo=False)
    pts = hv.Points((np.random.default_rng(0).random(100), np.random.default_rng(1).random(100), np.ones(100)),
                    vdims=["value"])
    hv.render(dynspread(rasterize(pts, aggregator=dsh.mean("value"), dynamic=False, width=50, height=50),
                        threshold=0.6, max_px=2))


def prepare(path: Path) -> None:
    """Work done once before the first page: read and prepare the data, start the fit workers, compile the
    map's kernels, and start fitting every window for the first look."""
    from driftspec.analysis.models.matern import _tables

    from .jobs import start_pool
    from .state import ExplorerState

    start_pool()
    _tables()
    data, _ = track_data(str(path))
    if data is not None:
        data.geography  # noqa: B018 - land and graticule, once
        from .dashboard import Explorer, spec_of

        data.start_first_look(Explorer(data).windows, spec_of(ExplorerState()))
    _warm_up()


def serve(input_path=None, fits=None, port=5006, address="127.0.0.1", show=False, extra_origins=()):
    """Start the dashboard server and block; prints the URL."""
    from driftspec.analysis.errors import InputError

    path = Path(input_path) if input_path else demo_path()
    if not path.exists():
        raise InputError(f"{path}: no such file")
    fits_path = Path(fits) if fits else None
    if fits_path is not None and not fits_path.exists():
        raise InputError(f"{fits_path}: no such file")
    if fits_path is not None:
        _check_fits(fits_path)
    # SIGTERM ends the server like Ctrl+C, so the fit workers are stopped with it (also while it is loading)
    signal.signal(signal.SIGTERM, lambda *_: sys.exit(0))
    print(f"driftspec: loading {path.name} ...", flush=True)
    prepare(path.resolve())
    origins = [f"{address}:{port}", f"localhost:{port}", f"127.0.0.1:{port}", *extra_origins]
    url = f"http://{address}:{port}/driftspec"
    print(f"driftspec: dashboard at {url}  (Ctrl+C to stop)", flush=True)
    configure_panel()
    pn.serve({"driftspec": make_app(path.resolve(), fits_path)}, port=port, address=address,
             websocket_origin=origins, show=show, title="driftspec", threaded=False, start=True,
             print_url=False)
    return 0
