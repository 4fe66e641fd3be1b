"""Entry point for ``panel serve``::

    panel serve app/main.py --address 127.0.0.1 --port 5006 --allow-websocket-origin 127.0.0.1:5006 \\
        --args [INPUT] [FITS]

Everything after ``--args`` belongs to this script (Panel passes it on unread), so the server's own options
(``--port``, ``--address``) go before ``--args``; put after it they are refused with a one-line message on the
page. Without arguments it opens the bundled demo data.
"""

import sys
from pathlib import Path

import panel as pn

from driftspec.app.server import configure_panel, demo_path, make_app

configure_panel()


def _page():
    args = sys.argv[1:]
    options = [a for a in args if a.startswith("-")]
    if options:
        return pn.pane.Markdown(f"### Cannot start\n`{' '.join(options)}` after `--args`: server options such as "
                                "`--port` and `--address` go before `--args` (`panel serve app/main.py "
                                "--address 127.0.0.1 --port 5006 --args INPUT [FITS]`).", css_classes=["ds-error"])
    if len(args) > 2:
        return pn.pane.Markdown("### Cannot start\nexpected at most two arguments after `--args`: INPUT [FITS].",
                                css_classes=["ds-error"])
    inp = Path(args[0]).resolve() if args else demo_path()
    fits = Path(args[1]).resolve() if len(args) > 1 else None
    for p in (inp, fits):
        if p is not None and not p.is_file():
            return pn.pane.Markdown(f"### Cannot start\n`{p.name}`: no such file.", css_classes=["ds-error"])
    return make_app(inp, fits)()


_view = _page()
_view.servable(title="driftspec" + (" · cannot start" if "ds-error" in getattr(_view, "css_classes", []) else ""))
