"""Entry point for ``panel serve``: ``panel serve app/main.py --args [INPUT] [FITS]``.

Without arguments it opens the bundled demo data.
"""

import sys
from pathlib import Path

from driftspec.app.server import demo_path, make_app

_args = [a for a in sys.argv[1:] if not a.startswith("-")]
_input = Path(_args[0]).resolve() if _args else demo_path()
_fits = Path(_args[1]).resolve() if len(_args) > 1 else None
make_app(_input, _fits)().servable()
