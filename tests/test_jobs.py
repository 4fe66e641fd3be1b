"""The dashboard's job runner and its on-disk cache of fits tables (app/jobs.py, app/fitcache.py), with the real
worker processes. Reference: the rows of each window computed here directly by ``window_rows`` (what
``driftspec fit`` writes), not through a job."""

import os

import pandas as pd
import pytest


@pytest.fixture(scope="module", autouse=True)
def _worker_pools():
    """The jobs' worker processes, stopped when this module's tests are done."""
    from driftspec.app.jobs import stop_pools

    yield
    stop_pools()


@pytest.fixture(scope="module")
def windows_and_spec(demo_dir):
    from driftspec.analysis.tracks.pipeline import load_velocities
    from driftspec.analysis.tracks.windows import iter_windows
    from driftspec.app.dashboard import MIN_COVERAGE, spec_of
    from driftspec.app.state import ExplorerState

    vel, _, _ = load_velocities(str(demo_dir / "fixes.parquet"))
    tid = sorted(vel["id"].unique())[0]
    windows = list(iter_windows(vel[vel["id"] == tid], 30, 0.5, MIN_COVERAGE))[:3]
    return windows, spec_of(ExplorerState())


def _run(windows, spec):
    from driftspec.app.jobs import Job

    job = Job(windows, spec.to_json(), "rows", background=True, cached=True, label="test").start()
    assert job.wait(300)
    assert job.status == "done", job.message
    return job


def _table(job):
    return pd.DataFrame([r for rows in job.result for r in rows])


def test_cached_rows_equal_a_direct_fit_and_are_reused(windows_and_spec, tmp_path, monkeypatch):
    from driftspec.analysis.fitting.batch import window_rows
    from driftspec.app import fitcache

    monkeypatch.setenv(fitcache.CACHE_ENV, str(tmp_path))
    windows, spec = windows_and_spec
    direct = pd.DataFrame([r for w in windows for r in window_rows(w, spec)])

    first = _run(windows, spec)
    assert not first.from_cache
    pd.testing.assert_frame_equal(_table(first), direct)
    assert len(list(tmp_path.glob("rows-*.parquet"))) == 1

    again = _run(windows, spec)
    assert again.from_cache
    pd.testing.assert_frame_equal(_table(again), direct)
    assert [len(rows) for rows in again.result] == [len(rows) for rows in first.result]


def test_other_windows_or_settings_miss_the_cache(windows_and_spec, tmp_path, monkeypatch):
    import dataclasses

    import numpy as np

    from driftspec.app import fitcache

    monkeypatch.setenv(fitcache.CACHE_ENV, str(tmp_path))
    windows, spec = windows_and_spec
    key = fitcache.table_key(windows, spec.to_json())
    other_spec = dataclasses.replace(spec, taper="hann")
    assert fitcache.table_key(windows, other_spec.to_json()) != key
    z = np.array(windows[1].z)
    z[5] += 1e-9  # one sample of one window
    changed = [windows[0], dataclasses.replace(windows[1], z=z), windows[2]]
    assert fitcache.table_key(changed, spec.to_json()) != key
    assert fitcache.table_key(list(windows), spec.to_json()) == key  # the same windows rebuilt: the same key


def test_a_damaged_cache_file_is_refitted_and_no_cache_dir_turns_it_off(windows_and_spec, tmp_path, monkeypatch):
    from driftspec.app import fitcache

    windows, spec = windows_and_spec
    monkeypatch.setenv(fitcache.CACHE_ENV, str(tmp_path))
    key = fitcache.table_key(windows[:1], spec.to_json())
    (tmp_path / f"rows-{key}.parquet").write_bytes(b"not parquet")
    job = _run(windows[:1], spec)
    assert not job.from_cache and len(job.result) == 1
    assert fitcache.load(key, 1) is not None  # rewritten by the refit

    monkeypatch.setenv(fitcache.CACHE_ENV, "")
    assert fitcache.cache_dir() is None and fitcache.store(key, job.result) is None
    assert not _run(windows[:1], spec).from_cache
    assert os.environ[fitcache.CACHE_ENV] == ""


def test_the_cache_keeps_the_most_recent_tables_and_clears_stale_temporary_files(tmp_path, monkeypatch):
    import time

    from driftspec.app import fitcache

    monkeypatch.setenv(fitcache.CACHE_ENV, str(tmp_path))
    rows = [[{"track_id": "A", "matern_alpha": 1.2}]]
    paths = []
    for k in range(4):
        paths.append(fitcache.store(f"{k:064x}", rows))
        past = time.time() - 100 + k  # later keys used more recently
        os.utime(paths[-1], (past, past))
    stale = tmp_path / ".rows-x.parquet.abc.tmp"
    stale.write_bytes(b"")
    os.utime(stale, (time.time() - 7200, time.time() - 7200))
    fresh = tmp_path / ".rows-y.parquet.def.tmp"  # another process writing now
    fresh.write_bytes(b"")
    fitcache._prune(tmp_path, keep=2)
    assert sorted(p.name for p in tmp_path.glob("rows-*.parquet")) == sorted(p.name for p in paths[2:])
    assert not stale.exists() and fresh.exists()
    assert fitcache.load(f"{3:064x}", 1) == rows


def test_an_unreadable_cache_is_a_miss_and_the_job_still_fits(windows_and_spec, tmp_path, monkeypatch):
    # EACCES cannot be produced for the root user of a test machine: Path.exists raises as it would
    from pathlib import Path

    from driftspec.app import fitcache

    windows, spec = windows_and_spec
    monkeypatch.setenv(fitcache.CACHE_ENV, str(tmp_path))

    def denied(self, *args, **kwargs):
        raise PermissionError(13, "Permission denied", str(self))

    monkeypatch.setattr(Path, "exists", denied)
    job = _run(windows[:1], spec)
    assert not job.from_cache and len(job.result) == 1 and job.result[0]
