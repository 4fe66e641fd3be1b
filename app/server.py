"""Serving the dashboard: ``driftspec serve`` and ``panel serve``.

Security: the server binds to 127.0.0.1 unless told otherwise; the page can open only files inside the
data directory given at start (by a name relative to it, chosen from a list); nothing from the page is
evaluated as code, and nothing is unpickled.
"""

from __future__ import annotations

import functools
import os
from pathlib import Path

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


@functools.lru_cache(maxsize=4)
def _fits(path: str):
    from driftspec.analysis.io.tables import read_table

    return read_table(path)


def data_files(data_dir: Path) -> list[str]:
    return sorted(str(p.relative_to(data_dir)) for p in data_dir.rglob("*")
                  if p.suffix.lower() in DATA_SUFFIXES and p.is_file() and "fits" not in p.stem)


def resolve_in(data_dir: Path, name: str) -> Path | None:
    """``data_dir / name`` if it stays inside ``data_dir`` and exists, else None."""
    try:
        p = (data_dir / name).resolve()
    except (OSError, ValueError):
        return None
    return p if p.is_file() and p.is_relative_to(data_dir.resolve()) else None


def make_app(input_path: Path, fits_path: Path | None = None):
    """A function building one session's page."""
    from .dashboard import Explorer
    from .state import ExplorerState

    data_dir = input_path.parent.resolve()

    def session():
        name = pn.state.session_args.get("data", [input_path.name.encode()])[0].decode() \
            if pn.state.session_args else input_path.name
        path = resolve_in(data_dir, name)
        if path is None:
            return pn.pane.Markdown(f"### Not available\n`{name}` is not a data file in the served folder.")
        from driftspec.analysis.errors import InputError

        try:
            vel, report = _velocities(str(path))
        except InputError as exc:
            return pn.pane.Markdown(f"### Cannot open `{name}`\n{exc}")
        fits = _fits(str(fits_path)) if fits_path else None
        theme = pn.state.session_args.get("theme", [b"light"])[0].decode() if pn.state.session_args else "light"
        state = ExplorerState(theme=theme if theme in ("light", "dark") else "light")
        ex = Explorer(vel, fits=fits, state=state, title=f"driftspec · {path.name}")
        tpl = ex.template()
        files = data_files(data_dir)
        if len(files) > 1:
            pick = pn.widgets.Select(name="Data file (in the served folder)", options=files, value=name)

            def go(event):
                if pn.state.location is not None:
                    pn.state.location.search = f"?data={event.new}"
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


def serve(input_path=None, fits=None, port=5006, address="127.0.0.1", show=False, extra_origins=()):
    """Start the dashboard server and block; prints the URL."""
    from driftspec.analysis.errors import InputError

    path = Path(input_path) if input_path else demo_path()
    if not path.exists():
        raise InputError(f"{path}: no such file")
    fits_path = Path(fits) if fits else None
    if fits_path is not None and not fits_path.exists():
        raise InputError(f"{fits_path}: no such file")
    print(f"driftspec: loading {path} ...", flush=True)
    _velocities(str(path.resolve()))
    from driftspec.analysis.models.matern import _tables

    _tables()  # build the Matérn table before the first click
    _warm_up()
    origins = [f"{address}:{port}", f"localhost:{port}", f"127.0.0.1:{port}", *extra_origins]
    url = f"http://{address}:{port}/driftspec"
    print(f"driftspec: dashboard at {url}  (Ctrl+C to stop)", flush=True)
    pn.serve({"driftspec": make_app(path.resolve(), fits_path)}, port=port, address=address,
             websocket_origin=origins, show=show, title="driftspec", threaded=False, start=True,
             print_url=False)
    return 0
