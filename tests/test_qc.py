"""Quality control: every reason exercised, and every input row accounted for."""

import io
import json

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from driftspec.analysis.io import read_fixes
from driftspec.analysis.tracks.qc import REASONS, clean_fixes

CSV = """id,time,lat,lon
A,2030-01-01T00:00:00Z,10.00,20.00
A,2030-01-01T01:00:00Z,10.01,20.00
A,2030-01-01T02:00:00Z,10.02,20.00
A,2030-01-01T03:00:00Z,12.50,20.00
A,2030-01-01T04:00:00Z,10.04,20.00
A,2030-01-01T05:00:00Z,10.05,20.00
A,2030-01-01T05:00:00Z,10.05,20.00
A,2030-01-01T07:00:00Z,10.07,20.00
A,2030-01-01T06:00:00Z,10.06,20.00
A,not a time,10.08,20.00
A,2030-01-01T09:00:00Z,,20.00
A,2030-01-01T10:00:00Z,95.0,20.00
A,2030-01-01T11:00:00Z,10.1,400.0
A,2030-01-01T12:00:00Z,north,20.00
,2030-01-01T13:00:00Z,10.1,20.0
B,2030-01-01T00:00:00Z,-10.0,359.99
B,2030-01-01T01:00:00Z,-10.0,0.01
"""


def test_every_reason_is_counted(tmp_path):
    path = tmp_path / "fixes.csv"
    path.write_text(CSV)
    fixes, report = clean_fixes(read_fixes(path))
    d = report.dropped
    assert d["speed_spike"] == 1           # the 12.50 fix, not its neighbours
    assert d["duplicate_time"] == 1
    assert d["unparseable_time"] == 1
    assert d["missing_value"] == 2         # empty latitude, empty id
    assert d["latitude_range"] == 1
    assert d["longitude_range"] == 1
    assert d["unparseable_value"] == 1
    assert report.reordered_rows == 1      # 07:00 before 06:00 is sorted, not dropped: one fix out of order
    assert report.input_rows == 17
    assert report.kept_rows + sum(d.values()) == report.input_rows
    a = fixes[fixes["id"] == "A"]
    assert list(a["time"].dt.hour) == [0, 1, 2, 4, 5, 6, 7]
    # longitudes wrapped to [-180, 180): 359.99 becomes -0.01
    b = fixes[fixes["id"] == "B"]
    assert np.allclose(b["lon"], [-0.01, 0.01])
    doc = json.loads(json.dumps(report.to_dict(), default=str))
    assert set(doc["dropped"]) == set(REASONS)
    per = pd.DataFrame(doc["tracks"]).set_index("id")
    assert per.loc["A", "speed_spike"] == 1 and per.loc["A", "kept_rows"] == 7
    assert per["input_rows"].sum() == 17


def test_speed_limit_is_configurable():
    df = pd.read_csv(io.StringIO(CSV), dtype=str, keep_default_na=False)
    _, loose = clean_fixes(read_fixes(df), max_speed=200.0)
    assert loose.dropped["speed_spike"] == 0


def test_antimeridian_track_is_not_a_spike():
    t = pd.date_range("2030-01-01", periods=6, freq="h")
    df = pd.DataFrame({"id": "X", "time": t, "lat": 0.0, "lon": [179.97, 179.99, -179.99, -179.97, -179.95, -179.93]})
    _, report = clean_fixes(read_fixes(df))
    assert report.dropped["speed_spike"] == 0


cell = st.one_of(st.text(max_size=8), st.floats(allow_nan=True, allow_infinity=True).map(str),
                 st.sampled_from(["", "NaN", "2030-01-01", "2030-13-45T99:00", "1e400", "-91", "12.5"]))
row = st.tuples(st.sampled_from(["A", "B", "", "C"]), cell, cell, cell)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(row, min_size=0, max_size=40))
def test_random_malformed_rows_never_crash_or_vanish(rows):
    df = pd.DataFrame(rows, columns=["id", "time", "lat", "lon"], dtype=object)
    raw = read_fixes(df)
    fixes, report = clean_fixes(raw)
    assert report.input_rows == len(rows)
    assert report.kept_rows == len(fixes)
    assert report.kept_rows + sum(report.dropped.values()) == len(rows)
    if len(fixes):
        assert fixes["lat"].between(-90, 90).all()
        assert ((fixes["lon"] >= -180) & (fixes["lon"] < 180)).all()


def test_accounting_with_many_tracks(rng):
    # 60 tracks: categorical codes are int8, and code * 8 reasons overflows int8 unless widened
    n_tracks, per = 60, 6
    ids = np.repeat([f"K{k:04d}" for k in range(n_tracks)], per)
    t = np.tile(pd.date_range("2030-01-01", periods=per, freq="h").to_numpy(), n_tracks)
    df = pd.DataFrame({"id": ids, "time": t, "lat": 10 + rng.normal(0, 1e-3, ids.size),
                       "lon": 20 + rng.normal(0, 1e-3, ids.size)})
    df.loc[::50, "lat"] = 120.0
    fixes, report = clean_fixes(read_fixes(df))
    assert len(report.per_track) == n_tracks
    assert report.per_track["input_rows"].sum() == ids.size
    assert report.per_track["latitude_range"].sum() == report.dropped["latitude_range"] == len(df.loc[::50])
    assert report.kept_rows + sum(report.dropped.values()) == ids.size


def test_batched_cleaning_equals_one_pass(tmp_path, rng):
    # quality control is per track: cleaning a few tracks at a time gives the same fixes and accounting
    from driftspec.analysis.tracks.qc import clean_fixes_in_batches, merge_reports

    path = tmp_path / "fixes.csv"
    path.write_text(CSV)
    many = pd.DataFrame({"id": np.repeat([f"K{k:03d}" for k in range(40)], 5),
                         "time": np.tile(pd.date_range("2030-01-01", periods=5, freq="h").to_numpy(), 40),
                         "lat": 10 + rng.normal(0, 1e-3, 200), "lon": 20 + rng.normal(0, 1e-3, 200)})
    many.loc[::17, "lat"] = 12.0  # some spikes
    for source in (read_fixes(path), read_fixes(many)):
        ref_fixes, ref = clean_fixes(source)
        parts = list(clean_fixes_in_batches(source, tracks_per_batch=3))
        merged = merge_reports(r for _, r in parts)
        got = pd.concat([f for f, _ in parts], ignore_index=True)
        assert merged.dropped == ref.dropped and merged.kept_rows == ref.kept_rows
        assert merged.input_rows == ref.input_rows
        pd.testing.assert_frame_equal(got.assign(id=got["id"].astype(str)).reset_index(drop=True),
                                      ref_fixes.assign(id=ref_fixes["id"].astype(str)))
        assert merged.per_track["input_rows"].sum() == ref.per_track["input_rows"].sum()


def test_chunked_parquet_reading_loses_nothing(tmp_path, rng):
    # `driftspec fit` reads a track-contiguous Parquet file a chunk at a time: the chunks hold whole tracks,
    # together every source row once with its source row number, and cleaning them chunk by chunk gives the
    # fixes and the accounting of one pass over the whole file; other layouts are read whole
    from driftspec.analysis.io import FixReader
    from driftspec.analysis.tracks.qc import MISSING_ID, clean_fixes_in_batches, merge_reports

    n_tracks, per = 30, 23
    df = pd.DataFrame({"Platform": np.repeat([f"K{k:03d}" for k in range(n_tracks)], per),
                       "time": np.tile(pd.date_range("2030-01-01", periods=per, freq="h").to_numpy(), n_tracks),
                       "lat": 10 + rng.normal(0, 1e-3, n_tracks * per),
                       "lon": 20 + rng.normal(0, 1e-3, n_tracks * per)})
    df.loc[::19, "lat"] = 12.0  # spikes
    df.loc[5::41, "lat"] = 95.0  # out of range
    df.loc[7::53, "Platform"] = None  # rows without an id, scattered
    df.loc[11::61, "time"] = pd.NaT
    path = tmp_path / "contiguous.parquet"
    df.to_parquet(path, row_group_size=50)
    whole = read_fixes(path)
    ref_fixes, ref = clean_fixes(whole)

    reader = FixReader(path, rows_per_chunk=37)
    assert reader.streaming
    chunks = list(reader)
    assert len(chunks) > 5
    ids = [set(c["id"].dropna().astype(str)) for c in chunks]
    assert all(a.isdisjoint(b) for i, a in enumerate(ids) for b in ids[i + 1:])  # whole tracks per chunk
    got = pd.concat([c.assign(id=c["id"].astype(str)) for c in chunks], ignore_index=True)
    pd.testing.assert_frame_equal(got, whole.assign(id=whole["id"].astype(str)))
    assert len(reader.spans()) == n_tracks

    parts = [p for c in chunks for p in clean_fixes_in_batches(c, tracks_per_batch=4)]
    merged = merge_reports(r for _, r in parts)
    cleaned = pd.concat([f.assign(id=f["id"].astype(str)) for f, _ in parts], ignore_index=True)
    pd.testing.assert_frame_equal(cleaned, ref_fixes.assign(id=ref_fixes["id"].astype(str)))
    assert merged.dropped == ref.dropped and merged.kept_rows == ref.kept_rows == len(ref_fixes)
    assert merged.input_rows == len(df)
    assert (merged.per_track["id"] == MISSING_ID).sum() == 1
    pd.testing.assert_frame_equal(merged.per_track.drop(columns=["first_time", "last_time"]).reset_index(drop=True),
                                  ref.per_track.drop(columns=["first_time", "last_time"]).reset_index(drop=True),
                                  check_dtype=False)

    # a track split across the file, and times stored as text: read whole, same rows
    for name, frame in (("split", pd.concat([df.iloc[100:], df.iloc[:100]])),
                        ("text_times", df.assign(time=df["time"].astype(str)))):
        other = tmp_path / f"{name}.parquet"
        frame.to_parquet(other, row_group_size=50)
        r = FixReader(other, rows_per_chunk=37)
        assert not r.streaming
        assert sum(len(c) for c in r) == len(df)


def test_tracks_listed_out_of_order_are_not_counted_as_resorted():
    # every fix in time order within its track, the tracks listed B, A, C interleaved by time (as a merge of several
    # receivers' files can be): nothing is out of order in time, so no fix is counted as re-sorted
    t = pd.date_range("2030-01-01", periods=4, freq="h")
    rows = [(k, tt, 10.0 + 0.01 * i, -140.0) for i, tt in enumerate(t) for k in ("B", "A", "C")]
    fixes, report = clean_fixes(read_fixes(pd.DataFrame(rows, columns=["id", "time", "lat", "lon"])))
    assert report.reordered_rows == 0 and report.kept_rows == 12
    # B's first fix moved to the end of the file: B reads 01:00, 02:00, 03:00, 00:00, one fix out of order however
    # long the track (a 1000-fix track counted 1000 before)
    late = rows[1:] + rows[:1]
    fixes, report = clean_fixes(read_fixes(pd.DataFrame(late, columns=["id", "time", "lat", "lon"])))
    assert report.reordered_rows == 1
    assert list(fixes.loc[fixes["id"] == "B", "time"]) == list(t)
    long = pd.DataFrame({"id": "D", "time": pd.date_range("2030-01-01", periods=1000, freq="h"),
                         "lat": 10.0, "lon": -140.0})
    _, report = clean_fixes(read_fixes(pd.concat([long.iloc[1:], long.iloc[:1]], ignore_index=True)))
    assert report.reordered_rows == 1 and report.kept_rows == 1000
