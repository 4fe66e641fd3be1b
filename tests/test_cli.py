"""The command line as a user runs it: real subprocesses, real files, exit codes."""

import json
import shutil
import subprocess
import sys

import pandas as pd
import pytest


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "driftspec.app.cli", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd, timeout=600)


def test_help_lists_subcommands():
    r = run("--help")
    assert r.returncode == 0
    for cmd in ("demo", "qc", "fit", "map", "serve"):
        assert cmd in r.stdout
    for cmd in ("demo", "qc", "fit", "map", "serve"):
        assert run(cmd, "--help").returncode == 0


def test_demo_is_deterministic(tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    assert run("demo", a, "--tracks", 3, "--days", 20, "--seed", 5).returncode == 0
    assert run("demo", b, "--tracks", 3, "--days", 20, "--seed", 5).returncode == 0
    pd.testing.assert_frame_equal(pd.read_parquet(a / "fixes.parquet"), pd.read_parquet(b / "fixes.parquet"))
    assert (a / "truth.csv").read_text() == (b / "truth.csv").read_text()


def test_qc_accounts_for_every_row(tmp_path, demo_dir):
    clean, report = tmp_path / "clean.nc", tmp_path / "qc.json"
    r = run("qc", demo_dir / "fixes.parquet", "--out", clean, "--report", report)
    assert r.returncode == 0, r.stderr
    doc = json.loads(report.read_text())
    assert doc["kept_rows"] + sum(doc["dropped"].values()) == doc["input_rows"] == len(
        pd.read_parquet(demo_dir / "fixes.parquet"))
    assert doc["dropped"]["duplicate_time"] > 0 and doc["dropped"]["speed_spike"] > 0
    assert "rows in" in r.stdout


@pytest.mark.parametrize("content,needle", [
    ("id,time,lat\nA,2030-01-01,1\n", "missing column"),
    ('id,time,lat,lon\nA,2030-01-01,1,2\nB,"2030,1,2\n', "bad.csv"),
])
def test_bad_input_is_one_line_exit_2(tmp_path, content, needle):
    bad = tmp_path / "bad.csv"
    bad.write_text(content)
    r = run("qc", bad, "--out", tmp_path / "o.parquet")
    assert r.returncode == 2
    assert needle in r.stderr and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "o.parquet").exists()


def test_damaged_parquet_is_one_line_exit_2(tmp_path, demo_dir):
    # a file whose footer is intact but whose data pages are damaged (zstd frames overwritten) fails when
    # its rows are decoded, in the middle of a streamed read: still one line and exit status 2
    fixes = pd.read_parquet(demo_dir / "fixes.parquet")
    path = tmp_path / "damaged.parquet"
    fixes.to_parquet(path, compression="zstd", row_group_size=20_000)
    data = bytearray(path.read_bytes())
    mid = len(data) // 2
    data[mid:mid + 4096] = bytes(4096)
    path.write_bytes(bytes(data))
    r = run("fit", path, "--out", tmp_path / "f.parquet", "--workers", 1, "--no-progress")
    assert r.returncode == 2, r.stderr[-2000:]
    assert "damaged.parquet" in r.stderr and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "f.parquet").exists()


def test_missing_file_exit_2(tmp_path):
    r = run("fit", tmp_path / "nope.parquet", "--out", tmp_path / "f.parquet")
    assert r.returncode == 2 and "no such file" in r.stderr


def test_fit_command_end_to_end(tmp_path, demo_dir):
    # the command's rows equal fits of the same windows made independently through the Python API (read, clean,
    # grid, window, fit_window under the same FitSpec), to within a hundredth of a standard error (another process
    # may sum a matrix product in another order, and the optimiser stops within 0.003 standard errors)
    from driftspec.analysis import FitSpec, fit_window
    from driftspec.analysis.tracks.pipeline import load_velocities
    from driftspec.analysis.tracks.windows import iter_windows

    out = tmp_path / "fits.csv"
    r = run("fit", demo_dir / "fixes.parquet", "--out", out, "--window-days", 30, "--model", "matern",
            "--workers", 1, "--no-progress")
    assert r.returncode == 0, r.stderr
    df = pd.read_csv(out, parse_dates=["window_start"])
    vel, _, _ = load_velocities(str(demo_dir / "fixes.parquet"))
    windows = list(iter_windows(vel, window_days=30))
    assert len(df) == len(windows)
    spec = FitSpec(models=("matern",))
    for w in windows[:: max(1, len(windows) // 6)]:
        row = df[(df["track_id"] == w.track_id) & (df["window_start"].dt.tz_localize(None) == w.start)].iloc[0]
        res = fit_window(w, spec)[0]
        assert row["status"] == res.status and bool(row["selected"])
        for name, value in res.params.items():
            assert row[name] == pytest.approx(value, rel=1e-12, abs=0.01 * res.stderr[name]), name
    assert f"{len(df)} fits:" in r.stdout
    # the track segments too short for one window are accounted for, counted independently from the gridded samples
    # (a 30-day window is 720 hourly samples)
    short = int((vel.groupby(["id", "segment"], observed=True).size() < 720).sum())
    said = f"{short} segments are" if short != 1 else "1 segment is"
    assert short > 0 and f"{said} shorter than one 30-day window, so not fitted" in r.stderr, r.stderr
    assert f"windows: {len(df)} of {len(df)} candidate windows kept" in r.stderr
    bad = run("fit", demo_dir / "fixes.parquet", "--out", out, "--model", "nonsense")
    assert bad.returncode == 2 and "unknown model" in bad.stderr


def test_killed_fit_resumes_to_the_same_table(tmp_path, demo_dir):
    # a real interruption: SIGKILL once the first parts are on disk, then --resume
    import signal
    import time

    args = [sys.executable, "-m", "driftspec.app.cli", "fit", str(demo_dir / "fixes.parquet"), "--window-days", "30",
            "--model", "matern", "--workers", "1", "--chunk-size", "4", "--no-progress"]
    ref = tmp_path / "ref.parquet"
    assert subprocess.run([*args, "--out", str(ref)], capture_output=True, timeout=600).returncode == 0
    out = tmp_path / "fits.parquet"
    proc = subprocess.Popen([*args, "--out", str(out)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    parts = tmp_path / "fits.parquet.partial"
    deadline = time.time() + 300
    while time.time() < deadline and len(list(parts.glob("part-*.parquet"))) < 2:
        time.sleep(0.05)
    proc.send_signal(signal.SIGKILL)
    proc.wait(30)
    assert not out.exists() and len(list(parts.glob("part-*.parquet"))) >= 2
    r = subprocess.run([*args, "--out", str(out), "--resume"], capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr
    pd.testing.assert_frame_equal(pd.read_parquet(out), pd.read_parquet(ref))


@pytest.mark.parametrize("extra, needle", [
    (["--window-days", "0"], "--window-days must be positive"),
    (["--window-days", "-10"], "--window-days must be positive"),
    (["--chunk-size", "0"], "--chunk-size must be at least 1"),
    (["--workers", "0"], "--workers must be at least 1"),
    (["--workers", "-3"], "--workers must be at least 1"),
    (["--min-coverage", "0"], "--min-coverage"),
    (["--max-freq", "-1"], "band"),
    (["--max-freq", "50"], "above the grid's Nyquist frequency (12 cpd for --step 1h)"),
    (["--step", "soon"], "--step must be a positive duration"),
    (["--bootstrap", "-2"], "bootstrap"),
    (["--position-noise", "30", "--observation", "none"], "position noise value"),
    (["--window-days", "abc"], "--window-days: invalid float value"),  # argparse's own checks: one line too
    (["--estimator", "mle"], "--estimator: invalid choice"),
    (["--max-speed", "-1"], "--max-speed: must be a positive number"),
    (["--dask", "tcp://127.0.0.1:1"], "cannot reach the Dask scheduler"),  # a port nothing listens on
])
def test_invalid_fit_options_are_one_line_exit_2_and_write_nothing(tmp_path, demo_dir, extra, needle):
    out = tmp_path / "fits.parquet"
    r = run("fit", demo_dir / "fixes.parquet", "--out", out, "--no-progress", *extra)
    assert r.returncode == 2, r.stderr[-1500:]
    assert needle in r.stderr and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert list(tmp_path.iterdir()) == []  # neither the table nor a .partial folder


@pytest.mark.parametrize("args, needle", [
    (["map", "F", "--bin-deg", "0", "--out", "m.png"], "--bin-deg: must be a positive number"),
    (["qc", "F", "--max-speed", "-1", "--out", "q.parquet"], "--max-speed: must be a positive number"),
    (["serve", "F", "--port", "99999"], "--port: a port number is 0 to 65535"),
    (["nosuchcommand"], "invalid choice"),
])
def test_invalid_options_of_other_commands_are_one_line_exit_2(tmp_path, demo_dir, args, needle):
    r = run(*[str(demo_dir / "fixes.parquet") if a == "F" else a for a in args], cwd=tmp_path)
    assert r.returncode == 2 and needle in r.stderr and "Traceback" not in r.stderr, r.stderr[-1500:]
    assert len(r.stderr.strip().splitlines()) == 1
    assert list(tmp_path.iterdir()) == []


def test_unwritable_output_folder_is_one_line_exit_2(tmp_path, demo_dir):
    # (a missing folder: the tests run as root in CI, for whom permission bits do not stop a write)
    r = run("fit", demo_dir / "fixes.parquet", "--out", tmp_path / "no" / "such" / "fits.parquet", "--no-progress")
    assert r.returncode == 2 and "not a writable folder" in r.stderr and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1


def test_resume_under_other_settings_is_refused(tmp_path, demo_dir):
    # the settings are stored beside the results: a resume that would mix two kinds of rows exits 2 and names
    # what differs, and the table already written is left as it was
    out = tmp_path / "fits.parquet"
    base = ["fit", demo_dir / "fixes.parquet", "--out", out, "--model", "matern", "--workers", 1, "--no-progress"]
    assert run(*base, "--window-days", 30).returncode == 0
    before = pd.read_parquet(out)
    for extra, needle in ((["--window-days", 60], "windows.window_days"),
                          (["--window-days", 30, "--estimator", "whittle"], "fit.estimator")):
        r = run(*base, *extra, "--resume")
        assert r.returncode == 2 and needle in r.stderr and "Traceback" not in r.stderr, r.stderr[-1500:]
    pd.testing.assert_frame_equal(pd.read_parquet(out), before)
    same = run(*base, "--window-days", 30, "--resume")
    assert same.returncode == 0, same.stderr
    pd.testing.assert_frame_equal(pd.read_parquet(out), before)
    # other fixes under the same settings are refused too; the same fixes copied elsewhere resume
    other = tmp_path / "other.parquet"
    fixes = pd.read_parquet(demo_dir / "fixes.parquet")
    fixes[fixes["id"].astype(str) != "TB31-0001"].to_parquet(other)
    r = run("fit", other, *base[2:], "--window-days", 30, "--resume")
    assert r.returncode == 2 and "windows.input_sha256" in r.stderr, r.stderr[-1500:]
    copy = tmp_path / "copy.parquet"
    shutil.copy(demo_dir / "fixes.parquet", copy)
    moved = run("fit", copy, *base[2:], "--window-days", 30, "--resume")
    assert moved.returncode == 0, moved.stderr
    pd.testing.assert_frame_equal(pd.read_parquet(out), before)


def test_no_windows_says_why_with_numbers(tmp_path, demo_dir):
    # fixes a day or two apart leave almost every hourly grid sample further than a 3 h mask distance from a fix:
    # every candidate window is below the coverage limit, and the run says so with the coverage it saw and what to
    # try (the default mask for such sparse tracks bridges a day; the test asks for 3 h). Nothing is fitted, so
    # nothing is written: the table already at --out (from an earlier run) stays byte for byte, no parts are left,
    # and the exit status is 2 with one line saying so
    fixes = pd.read_parquet(demo_dir / "fixes.parquet")
    sparse = fixes.groupby("id", observed=True).nth(slice(None, None, 30)).reset_index(drop=True)
    path = tmp_path / "sparse.csv"
    sparse.to_csv(path, index=False)
    out = tmp_path / "f.parquet"
    earlier = fixes[fixes["id"] == fixes["id"].iloc[0]]
    earlier.to_csv(tmp_path / "one.csv", index=False)
    first = run("fit", tmp_path / "one.csv", "--out", out, "--window-days", 30, "--workers", 1, "--no-progress")
    assert first.returncode == 0, first.stderr
    before = out.read_bytes()
    r = run("fit", path, "--out", out, "--window-days", 30, "--workers", 1, "--no-progress", "--mask-distance", "3h")
    assert r.returncode == 2, r.stderr
    assert r.stderr.strip().splitlines()[-1] == f"driftspec: no windows to fit; {out} is left as it was"
    assert "below --min-coverage 0.8" in r.stderr and "--mask-distance" in r.stderr
    assert out.read_bytes() == before and not list(tmp_path.glob("*.partial"))
    # the same with --resume to a new table: nothing written, and no parts left that would refuse a later resume
    # under other settings
    fresh = tmp_path / "g.parquet"
    r = run("fit", path, "--out", fresh, "--window-days", 30, "--workers", 1, "--no-progress", "--mask-distance", "3h",
            "--resume")
    assert r.returncode == 2 and r.stderr.strip().endswith(f"no windows to fit; {fresh} not written"), r.stderr
    assert not fresh.exists() and not list(tmp_path.glob("*.partial"))


def test_a_table_of_the_other_kind_is_named_as_such(tmp_path, demo_dir):
    # a fits table (rows of a real fit of one demo window) given where fixes are expected, and fixes given where a
    # fits table is expected (also to the dashboard server, before it starts): one line naming the file and saying
    # what it is, exit status 2, nothing written
    from driftspec.analysis import FitSpec
    from driftspec.analysis.fitting.batch import window_rows
    from driftspec.analysis.tracks.pipeline import load_velocities
    from driftspec.analysis.tracks.windows import iter_windows

    vel, _, _ = load_velocities(str(demo_dir / "fixes.parquet"))
    window = next(iter_windows(vel, window_days=30))
    fits = tmp_path / "fits.parquet"
    pd.DataFrame(window_rows(window, FitSpec(models=("matern",)))).to_parquet(fits)
    for args, needle in ((("fit", fits, "--out", tmp_path / "out.parquet"), "this is a fits table"),
                         (("map", demo_dir / "fixes.parquet", "--out", tmp_path / "map.nc"),
                          "this is a table of position fixes"),
                         (("serve", demo_dir / "fixes.parquet", "--fits", demo_dir / "fixes.parquet", "--port", 5199),
                          "not a fits table")):
        r = run(*args)
        assert r.returncode == 2, r.stderr
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and needle in lines[0] and str(args[1]) in lines[0], r.stderr
    assert not (tmp_path / "out.parquet").exists() and not (tmp_path / "map.nc").exists()


def test_a_header_only_file_is_bad_input_and_replaces_nothing(tmp_path, demo_dir):
    # a CSV with its header and no rows: one line naming it, exit status 2, for qc, fit and pool; a fits table
    # already at --out is left exactly as it was (a run that can fit nothing must not replace earlier results)
    empty = tmp_path / "empty.csv"
    empty.write_text("id,time,lat,lon\n")
    table = tmp_path / "fits.parquet"
    fixes = pd.read_parquet(demo_dir / "fixes.parquet")
    one = tmp_path / "one.csv"
    fixes[fixes["id"].astype(str) == "TB31-0001"].to_csv(one, index=False)
    first = run("fit", one, "--out", table, "--no-progress")
    assert first.returncode == 0, first.stderr
    before = table.read_bytes()
    for args in (("qc", empty, "--out", tmp_path / "clean.csv"), ("fit", empty, "--out", table),
                 ("pool", empty, "--out", tmp_path / "pooled.nc", "--window-days", 30, "--bin-deg", 5)):
        r = run(*args)
        lines = [x for x in r.stderr.splitlines() if x.strip()]
        assert r.returncode == 2 and len(lines) == 1, (args[0], r.returncode, r.stderr)
        assert "empty.csv" in lines[0] and "no data rows" in lines[0], lines
    assert table.read_bytes() == before and not (tmp_path / "clean.csv").exists()
