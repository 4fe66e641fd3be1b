"""Fits tables kept on disk between server runs: the first look at a data set (and *Fit every window*) is read back
when the same windows are fitted under the same settings by the same code, so a restarted server shows its maps at
once instead of refitting every window (about 30 s of both cores for the demo).

The key is a SHA-256 of everything the rows depend on: the pickled windows (samples, times, fixes, positions), the
fit specification's JSON, the source of the analysis package and the versions of the numerical libraries. Anything
else misses the cache and is fitted as before. The cache lives in ``$DRIFTSPEC_CACHE_DIR`` if set (an empty value
turns it off), else ``$XDG_CACHE_HOME/driftspec`` or ``~/.cache/driftspec``; deleting the folder is always safe.
Tables are Parquet files, written to a temporary name of their own and renamed, so a reader never sees half a file;
the :data:`KEEP_TABLES` most recently used are kept.
"""

from __future__ import annotations

import contextlib
import functools
import hashlib
import os
import pickle
import tempfile
import time
from pathlib import Path

import pandas as pd

#: environment variable naming the cache folder ("" turns the cache off)
CACHE_ENV = "DRIFTSPEC_CACHE_DIR"
#: the column that keeps each row's window (its position in the job's list of windows)
WINDOW_COLUMN = "_window"
#: tables kept (the most recently used; a table of the demo's 576 windows is about 0.2 MB)
KEEP_TABLES = 32


def cache_dir() -> Path | None:
    """The folder of cached tables, or None when the cache is off."""
    if CACHE_ENV in os.environ:
        value = os.environ[CACHE_ENV].strip()
        return Path(value).expanduser() if value else None
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "driftspec"


@functools.lru_cache(maxsize=1)
def code_fingerprint() -> str:
    """SHA-256 of the analysis package's source and the numerical libraries' versions: a change to either makes
    every cached table stale."""
    import numpy
    import scipy

    import driftspec.analysis as analysis

    h = hashlib.sha256()
    root = Path(analysis.__file__).resolve().parent
    for path in sorted(root.rglob("*.py")):
        h.update(str(path.relative_to(root)).encode())
        h.update(path.read_bytes())
    h.update(f"numpy {numpy.__version__} scipy {scipy.__version__} pandas {pd.__version__}".encode())
    return h.hexdigest()


def table_key(windows, spec_json: str) -> str:
    """The cache key of the fits-table rows of ``windows`` under the specification ``spec_json``."""
    h = hashlib.sha256()
    h.update(code_fingerprint().encode())
    h.update(spec_json.encode())
    h.update(pickle.dumps(list(windows), protocol=5))
    return h.hexdigest()


def _path(key: str) -> Path | None:
    folder = cache_dir()
    return None if folder is None else folder / f"rows-{key}.parquet"


def load(key: str, n_windows: int) -> list[list[dict]] | None:
    """The cached rows of ``n_windows`` windows, grouped by window as a job returns them, or None (no cache, not
    cached, or unreadable)."""
    path = _path(key)
    try:
        if path is None or not path.exists():
            return None
        df = pd.read_parquet(path)
        os.utime(path)  # recently used: kept longest (see store)
    except Exception:  # noqa: BLE001 - a damaged or unreadable cache file is refitted, never shown
        return None
    if WINDOW_COLUMN not in df:
        return None
    out: list[list[dict]] = [[] for _ in range(n_windows)]
    index = df.pop(WINDOW_COLUMN).to_numpy()
    if len(index) and (index.min() < 0 or index.max() >= n_windows):
        return None
    for k, row in zip(index, df.to_dict("records")):
        out[int(k)].append(row)
    return out


def store(key: str, rows_by_window: list[list[dict]]) -> Path | None:
    """Write the rows (grouped by window) under ``key``; returns the file, or None when the cache is off or the
    folder cannot be written (the fits are still shown; only the next run refits)."""
    path = _path(key)
    if path is None:
        return None
    rows = [{**row, WINDOW_COLUMN: k} for k, group in enumerate(rows_by_window) for row in (group or [])]
    tmp = None
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
        os.close(fd)
        pd.DataFrame(rows).to_parquet(tmp, index=False)
        os.replace(tmp, path)
    except (OSError, ValueError, TypeError):
        if tmp is not None:
            with contextlib.suppress(OSError):
                os.remove(tmp)
        return None
    _prune(path.parent)
    return path


def _prune(folder: Path, keep: int = KEEP_TABLES, stale_s: float = 3600.0) -> None:
    """Keep the ``keep`` most recently used tables (every change to the analysis code or the settings makes a new
    one) and remove temporary files older than ``stale_s`` (left by a process that stopped while writing)."""
    now = time.time()
    with contextlib.suppress(OSError):
        tables = sorted(folder.glob("rows-*.parquet"), key=lambda f: f.stat().st_mtime, reverse=True)
        for f in tables[keep:]:
            with contextlib.suppress(OSError):
                f.unlink()
        for f in folder.glob(".rows-*.tmp"):
            with contextlib.suppress(OSError):
                if now - f.stat().st_mtime > stale_s:
                    f.unlink()
