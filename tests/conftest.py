import os
import shutil
from pathlib import Path

import numpy as np
import pytest

ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"


@pytest.fixture(scope="session", autouse=True)
def fits_cache_dir(tmp_path_factory):
    """The dashboard's on-disk cache of fits tables in a fresh folder for this test run (servers started by the
    tests inherit it), so that no test reads fits left by an earlier run."""
    from driftspec.app.fitcache import CACHE_ENV

    folder = tmp_path_factory.mktemp("fits-cache")
    old = os.environ.get(CACHE_ENV)
    os.environ[CACHE_ENV] = str(folder)
    yield folder
    if old is None:
        os.environ.pop(CACHE_ENV, None)
    else:
        os.environ[CACHE_ENV] = old


@pytest.fixture(scope="session")
def artifacts_dir():
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS


@pytest.fixture
def rng():
    return np.random.default_rng(12345)


@pytest.fixture(scope="session")
def demo_dir(tmp_path_factory):
    """A small demo deployment written by the demo generator (fixes.parquet, truth.csv)."""
    from driftspec.analysis.simulation.demo import write_demo

    out = tmp_path_factory.mktemp("demo")
    write_demo(out, n_tracks=12, days=130, seed=7)
    return out


def chromium_path():
    for p in (os.environ.get("DRIFTSPEC_CHROMIUM"), "/usr/bin/chromium", shutil.which("chromium")):
        if p and Path(p).exists():
            return p
    return None
