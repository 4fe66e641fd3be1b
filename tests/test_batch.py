"""Batch fits: the same table serially, on a process pool, on a Dask LocalCluster, and after a resume."""

import pandas as pd
import pytest

from driftspec.analysis.fitting.batch import run_fits
from driftspec.analysis.fitting.spec import FitSpec
from driftspec.analysis.io.tables import read_table
from driftspec.analysis.tracks.pipeline import load_velocities
from driftspec.analysis.tracks.windows import iter_windows

OPTS = FitSpec(models=("matern", "matern+inertial"), band=6.0)


@pytest.fixture(scope="module")
def windows(demo_dir):
    vel, _, _ = load_velocities(str(demo_dir / "fixes.parquet"))
    ws = list(iter_windows(vel, window_days=30, overlap=0.5))
    assert len(ws) >= 20
    return ws[:24]


@pytest.fixture(scope="module")
def serial(windows, tmp_path_factory):
    out = tmp_path_factory.mktemp("serial") / "fits.parquet"
    return run_fits(windows, out, OPTS, workers=1, chunk_size=5, progress=False)


def _same(a, b):
    pd.testing.assert_frame_equal(a.reset_index(drop=True), b.reset_index(drop=True), check_exact=False,
                                  rtol=1e-9)


def test_table_layout(serial, windows):
    assert len(serial) == 2 * len(windows)  # one row per window and model
    for col in ["track_id", "window_start", "window_end", "lat", "lon", "n_samples", "coverage", "model",
                "estimator", "status", "message", "loglik", "aic", "gof_pvalue", "matern_alpha",
                "matern_alpha_se", "diffusivity", "diffusivity_se"]:
        assert col in serial.columns, col
    assert set(serial["status"]) <= {"ok", "at_bound", "no_convergence", "too_few_samples", "failed"}


def test_units_in_parquet_metadata(serial, tmp_path):
    import pyarrow.parquet as pq

    from driftspec.analysis.io.tables import write_table

    path = write_table(serial, tmp_path / "f.parquet", {"diffusivity": "m2 s-1"})
    field = pq.read_schema(path).field("diffusivity")
    assert field.metadata[b"units"] == b"m2 s-1"


def test_process_pool_gives_same_table(windows, serial, tmp_path):
    got = run_fits(windows, tmp_path / "fits.parquet", OPTS, workers=2, chunk_size=5, progress=False)
    _same(got, serial)


def test_dask_local_cluster_gives_same_table(windows, serial, tmp_path):
    pytest.importorskip("dask.distributed")
    got = run_fits(windows, tmp_path / "fits.parquet", OPTS, dask_address="local", chunk_size=5,
                   progress=False)
    _same(got, serial)


@pytest.mark.parametrize("suffix", [".parquet", ".csv"])
def test_a_run_without_resume_replaces_the_old_table(windows, serial, tmp_path, suffix):
    # an old table from other windows and settings at the same path: a fresh run writes exactly its own rows (the
    # serial fixture's, made in another folder), also when it was interrupted and then resumed
    out = tmp_path / f"fits{suffix}"
    cols = ["track_id", "window_start", "model", "status", "loglik", "matern_alpha", "diffusivity"]
    mine = serial.iloc[:24][cols]  # the first 12 windows' two candidates
    run_fits(windows[12:], out, FitSpec(models=("matern",), band=3.0), workers=1, progress=False)
    got = run_fits(windows[:12], out, OPTS, workers=1, chunk_size=5, progress=False)
    _same(got[cols], mine)
    _same(read_table(out)[cols], mine)
    run_fits(windows[12:], out, FitSpec(models=("matern",), band=3.0), workers=1, progress=False)
    assert run_fits(windows[:12], out, OPTS, workers=1, chunk_size=5, progress=False, stop_after_chunks=1) is None
    got = run_fits(windows[:12], out, OPTS, workers=1, chunk_size=5, progress=False, resume=True)
    _same(got[cols], mine)


def test_interrupted_run_resumes_to_same_table(windows, serial, tmp_path):
    out = tmp_path / "fits.csv"
    assert run_fits(windows, out, OPTS, workers=1, chunk_size=5, progress=False, stop_after_chunks=2) is None
    assert not out.exists() and len(list((tmp_path / "fits.csv.partial").glob("part-*"))) == 2
    got = run_fits(windows, out, OPTS, workers=1, chunk_size=5, progress=False, resume=True)
    back = read_table(out)
    assert len(back) == len(serial)
    _same(got, serial)
    cols = ["track_id", "window_start", "model", "status", "matern_alpha"]
    _same(back[cols], serial[cols])


def test_every_numeric_column_of_the_table_has_units(serial, windows, tmp_path):
    # the CF conventions ask for a units attribute on every dimensional variable; the table's numbers all carry one
    # (a count or a ratio has units "1"), also for a run whose windows are fitted through irregular fixes
    import pyarrow.parquet as pq

    from driftspec.analysis.fitting.batch import column_units

    spec = FitSpec()  # the command line's defaults: every candidate, the observation model per window
    table = run_fits(windows[:6], tmp_path / "f.parquet", spec, workers=1, progress=False)
    schema = pq.read_schema(tmp_path / "f.parquet")
    numeric = [c for c in table.columns if pd.api.types.is_numeric_dtype(table[c]) and table[c].dtype != bool]
    missing = [c for c in numeric if not (schema.field(c).metadata or {}).get(b"units")]
    assert missing == [], missing
    assert set(numeric) <= set(column_units(spec))
