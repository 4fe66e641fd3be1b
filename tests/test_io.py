"""Readers and writers. The netCDF layouts follow the CF conventions (v1.11), appendix H.4:
H.4.1 multidimensional array of trajectories, H.4.3 contiguous ragged array, H.4.4 indexed ragged array."""

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from driftspec.analysis.errors import InputError
from driftspec.analysis.io import FixBackend, FixReader, find_backend, fixes_to_cf_dataset, read_fixes, write_fixes
from driftspec.analysis.tracks.qc import clean_fixes

T0 = np.datetime64("2030-05-01T00:00:00", "ns")


def _tracks():
    """Three tracks of 5, 3 and 4 fixes."""
    rows = []
    for k, n in enumerate([5, 3, 4]):
        for i in range(n):
            rows.append({"id": f"F{k}", "time": T0 + np.timedelta64(i * 3600 + k, "s"),
                         "lat": 10.0 + k + 0.01 * i, "lon": -150.0 + 0.02 * i})
    return pd.DataFrame(rows)


def _time_attrs():
    return {"standard_name": "time", "units": "seconds since 2030-05-01 00:00:00"}


def _contiguous(df):  # CF H.4.3
    counts = df.groupby("id").size()
    return xr.Dataset(
        {"trajectory": ("trajectory", counts.index.to_numpy().astype(str), {"cf_role": "trajectory_id"}),
         "fix_count": ("trajectory", counts.to_numpy().astype("i4"), {"sample_dimension": "obs"}),
         "time": ("obs", ((df["time"] - pd.Timestamp(T0)).dt.total_seconds()).to_numpy(), _time_attrs()),
         "lat": ("obs", df["lat"].to_numpy(), {"standard_name": "latitude", "units": "degrees_north"}),
         "lon": ("obs", df["lon"].to_numpy(), {"standard_name": "longitude", "units": "degrees_east"})},
        attrs={"featureType": "trajectory", "Conventions": "CF-1.11"})


def _indexed(df):  # CF H.4.4, observations interleaved in time order
    ids = np.array(sorted(df["id"].unique()))
    d = df.sort_values("time").reset_index(drop=True)
    return xr.Dataset(
        {"trajectory": ("trajectory", ids, {"cf_role": "trajectory_id"}),
         "trajectoryIndex": ("obs", np.searchsorted(ids, d["id"]).astype("i4"), {"instance_dimension": "trajectory"}),
         "time": ("obs", ((d["time"] - pd.Timestamp(T0)).dt.total_seconds()).to_numpy(), _time_attrs()),
         "lat": ("obs", d["lat"].to_numpy(), {"standard_name": "latitude"}),
         "lon": ("obs", d["lon"].to_numpy(), {"standard_name": "longitude"})},
        attrs={"featureType": "trajectory"})


def _multidim(df):  # CF H.4.1, padded with fill values
    ids = sorted(df["id"].unique())
    n = df.groupby("id").size().max()
    t = np.full((len(ids), n), np.nan)
    la = np.full((len(ids), n), np.nan)
    lo = np.full((len(ids), n), np.nan)
    for k, tid in enumerate(ids):
        g = df[df["id"] == tid]
        t[k, :len(g)] = (g["time"] - pd.Timestamp(T0)).dt.total_seconds()
        la[k, :len(g)] = g["lat"]
        lo[k, :len(g)] = g["lon"]
    return xr.Dataset(
        {"trajectory": ("trajectory", np.array(ids), {"cf_role": "trajectory_id"}),
         "time": (("trajectory", "obs"), t, _time_attrs()),
         "lat": (("trajectory", "obs"), la, {"standard_name": "latitude"}),
         "lon": (("trajectory", "obs"), lo, {"standard_name": "longitude"})},
        attrs={"featureType": "trajectory"})


def _same_fixes(a, b):
    key = ["id", "time"]
    a = a.sort_values(key).reset_index(drop=True)
    b = b.sort_values(key).reset_index(drop=True)
    assert list(a["id"]) == list(b["id"])
    assert (a["time"].to_numpy() == b["time"].to_numpy()).all()
    np.testing.assert_allclose(a["lat"], b["lat"])
    np.testing.assert_allclose(a["lon"], b["lon"])


@pytest.mark.parametrize("build", [_contiguous, _indexed, _multidim])
def test_cf_representations_round_trip(tmp_path, build):
    df = _tracks()
    path = tmp_path / "traj.nc"
    build(df).to_netcdf(path)
    got = read_fixes(path)
    assert len(got) == len(df)
    _same_fixes(got, df)
    # also as an in-memory Dataset
    _same_fixes(read_fixes(xr.open_dataset(path)), df)


def test_written_netcdf_is_cf_contiguous_ragged(tmp_path):
    df = _tracks()
    fixes, _ = clean_fixes(read_fixes(df))
    path = write_fixes(fixes, tmp_path / "clean.nc")
    ds = xr.open_dataset(path)
    assert ds.attrs["featureType"] == "trajectory"
    assert ds["fix_count"].attrs["sample_dimension"] == "obs"
    assert ds["trajectory"].attrs["cf_role"] == "trajectory_id"
    assert int(ds["fix_count"].sum()) == ds.sizes["obs"] == len(df)
    assert ds["lat"].attrs["standard_name"] == "latitude"
    _same_fixes(read_fixes(path), df)


@pytest.mark.parametrize("suffix", [".parquet", ".csv"])
def test_table_round_trip(tmp_path, suffix):
    fixes, _ = clean_fixes(read_fixes(_tracks()))
    path = write_fixes(fixes, tmp_path / f"fixes{suffix}")
    _same_fixes(read_fixes(path), fixes)


def test_column_aliases_case_insensitive(tmp_path):
    path = tmp_path / "a.csv"
    path.write_text("Platform,DateTime,Latitude,LONGITUDE\nA,2030-01-01T00:00:00Z,1.5,2.5\n")
    got = read_fixes(path)
    assert list(got[["id", "lat", "lon"]].iloc[0]) == ["A", 1.5, 2.5]
    assert got["time"].iloc[0] == pd.Timestamp("2030-01-01")


def test_missing_column_is_a_one_line_error(tmp_path):
    path = tmp_path / "b.csv"
    path.write_text("id,time,lat\nA,2030-01-01,1\n")
    with pytest.raises(InputError, match=r"b\.csv: missing column\(s\) lon") as exc:
        read_fixes(path)
    assert "\n" not in str(exc.value)


def test_unreadable_files(tmp_path):
    bad_nc = tmp_path / "x.nc"
    bad_nc.write_bytes(b"not a netcdf file")
    with pytest.raises(InputError, match="x.nc"):
        read_fixes(bad_nc)
    with pytest.raises(InputError, match="no such file"):
        read_fixes(tmp_path / "missing.csv")
    ragged = tmp_path / "r.csv"
    ragged.write_text('id,time,lat,lon\nA,2030-01-01,1,2\nB,"2030-01-01,1,2\n')
    with pytest.raises(InputError, match="r.csv"):
        read_fixes(ragged)


def test_round_trip_keeps_position_error_and_velocity(tmp_path):
    df = _tracks().assign(position_error_m=25.0, u=0.1, v=-0.2)
    fixes, _ = clean_fixes(read_fixes(df))
    ds = fixes_to_cf_dataset(fixes)
    assert ds["u"].attrs["standard_name"] == "eastward_sea_water_velocity"
    back = read_fixes(ds)
    assert np.allclose(back["position_error_m"], 25.0) and np.allclose(back["v"], -0.2)


# ---- the registry of readers -------------------------------------------------------------------------------------

class _WhitespaceBackend(FixBackend):
    """A tiny format made up for these tests: whitespace-separated columns under a header line."""

    name = "ws"
    description = "whitespace-separated columns"
    suffixes = (".ws",)

    def read_table(self, source):
        # pandas' own whitespace-delimited parser, independent of driftspec's CSV reader
        return pd.read_csv(source, sep=r"\s+", dtype=str, keep_default_na=False, na_values=[""])


@pytest.fixture
def registry(monkeypatch):
    """The registry module with a private copy of its table, so that test registrations do not leak."""
    from driftspec.analysis.io import registry as reg

    monkeypatch.setattr(reg, "BACKENDS", dict(reg.BACKENDS))
    return reg


def _write_ws(df, path):
    lines = ["Platform Time Latitude Longitude"]
    lines += [f"{r.id} {pd.Timestamp(r.time).isoformat()}Z {r.lat!r} {r.lon!r}" for r in df.itertuples()]
    path.write_text("\n".join(lines) + "\n")
    return path


@pytest.mark.parametrize("name, engine", [("f.csv", "csv"), ("f.CSV", "csv"), ("f.txt", "csv"),
                                          ("f.csv.gz", "csv"), ("f.parquet", "parquet"), ("f.pq", "parquet"),
                                          ("f.nc", "netcdf"), ("f.nc4", "netcdf")])
def test_registry_picks_the_reader_by_ending(tmp_path, name, engine):
    df = _tracks()
    path = tmp_path / name
    if engine == "csv":
        df.to_csv(path, index=False)  # pandas infers gzip from the ".gz" ending
    elif engine == "parquet":
        df.to_parquet(path)
    else:
        _contiguous(df).to_netcdf(path)
    assert find_backend(path).name == engine
    assert find_backend(str(path)).name == engine
    _same_fixes(read_fixes(path), df)  # the reader chosen reads the rows pandas/xarray wrote


def test_registry_picks_the_reader_for_objects_in_memory():
    df = _tracks()
    assert find_backend(df).name == "dataframe"
    assert find_backend(_contiguous(df)).name == "dataset"
    _same_fixes(read_fixes(_contiguous(df)), df)
    with pytest.raises(InputError, match=r"^list: no reader claims this object; known formats: .*dataframe"):
        read_fixes(df.to_dict("records"))


def test_registry_recognises_parquet_and_netcdf_by_content(tmp_path):
    # magic numbers from the Apache Parquet format specification ("PAR1") and the netCDF classic format
    # specification ("CDF\x01"/"CDF\x02"); scipy writes netCDF-3 classic files
    df = _tracks()
    pq_path, nc_path = tmp_path / "fixes.data", tmp_path / "traj.data"
    df.to_parquet(pq_path)
    _contiguous(df).to_netcdf(nc_path, engine="scipy")
    assert pq_path.read_bytes()[:4] == b"PAR1" and nc_path.read_bytes()[:3] == b"CDF"
    assert find_backend(pq_path).name == "parquet"
    assert find_backend(nc_path).name == "netcdf"
    _same_fixes(read_fixes(pq_path), df)
    _same_fixes(read_fixes(nc_path), df)
    reader = FixReader(pq_path, rows_per_chunk=4)  # tracks contiguous, times typed: streamed by the Parquet reader
    assert reader.streaming and reader.backend.name == "parquet"
    _same_fixes(pd.concat(list(reader), ignore_index=True), df)


def test_engine_overrides_a_misleading_ending(tmp_path):
    df = _tracks()
    reference = tmp_path / "fixes.csv"
    df.to_csv(reference, index=False)
    for name in ("fixes.nc", "fixes.parquet"):
        wrong = tmp_path / name
        wrong.write_bytes(reference.read_bytes())
        with pytest.raises(InputError, match=rf"{name}: cannot read"):
            read_fixes(wrong)
        # the same rows, numbered and flagged the same, as the correctly named file
        pd.testing.assert_frame_equal(read_fixes(wrong, engine="csv"), read_fixes(reference))
        pd.testing.assert_frame_equal(read_fixes(wrong, engine="CSV"), read_fixes(reference))
        assert list(FixReader(wrong, engine="csv"))[0].equals(read_fixes(reference))
    # and the other way round: a Parquet file named .csv read as Parquet
    pq_as_csv = tmp_path / "really_parquet.csv"
    df.to_parquet(pq_as_csv)
    _same_fixes(read_fixes(pq_as_csv, engine="parquet"), df)


def test_an_engine_that_does_not_fit_the_source_is_a_one_line_error(tmp_path):
    df = _tracks()
    path = tmp_path / "f.csv"
    df.to_csv(path, index=False)
    for source, engine, msg in ((path, "dataframe", "takes a pandas.DataFrame"),
                                (path, "dataset", "takes an xarray.Dataset"),
                                (df, "csv", r"^DataFrame: the csv reader takes a file path")):
        with pytest.raises(InputError, match=msg) as exc:
            read_fixes(source, engine=engine)
        assert "\n" not in str(exc.value)


def test_a_registered_reader_is_found_and_reads_like_csv(tmp_path, registry):
    df = _tracks()
    csv = tmp_path / "same.csv"
    df.to_csv(csv, index=False, date_format="%Y-%m-%dT%H:%M:%SZ")
    ws = _write_ws(df, tmp_path / "same.ws")
    with pytest.raises(InputError, match="no reader claims"):
        read_fixes(ws)  # not yet registered
    backend = registry.register_backend(_WhitespaceBackend())
    assert registry.BACKENDS["ws"] is backend
    assert find_backend(ws) is backend
    expected = read_fixes(csv)
    _same_fixes(expected, df)
    # every column, dtype, row number and flag as the CSV of the same rows gives
    pd.testing.assert_frame_equal(read_fixes(ws), expected)
    pd.testing.assert_frame_equal(read_fixes(ws, engine="ws"), expected)
    reader = FixReader(ws)  # no open_chunks: read whole, one chunk
    assert not reader.streaming
    chunks = list(reader)
    assert len(chunks) == 1
    pd.testing.assert_frame_equal(chunks[0], expected)
    # the shared column handling applies: a missing column is reported as for any format
    (tmp_path / "short.ws").write_text("id time lat\nA 2030-01-01 1\n")
    with pytest.raises(InputError, match=r"short\.ws: missing column\(s\) lon"):
        read_fixes(tmp_path / "short.ws")


def test_a_later_registration_takes_over_an_ending(tmp_path, registry):
    df = _tracks()

    class TxtWhitespace(_WhitespaceBackend):
        name = "ws-txt"
        suffixes = (".txt",)

    ws_txt = _write_ws(df, tmp_path / "rows.txt")
    csv_txt = tmp_path / "comma.txt"
    df.to_csv(csv_txt, index=False)
    assert find_backend(csv_txt).name == "csv"
    registry.register_backend(TxtWhitespace())
    assert find_backend(ws_txt).name == "ws-txt"
    _same_fixes(read_fixes(ws_txt), df)
    # a comma-separated file named .txt now needs engine= (read whole as one column otherwise)
    with pytest.raises(InputError, match="missing column"):
        read_fixes(csv_txt)
    _same_fixes(read_fixes(csv_txt, engine="csv"), df)


def test_unknown_engine_and_unclaimed_file_are_one_line_errors(tmp_path):
    path = tmp_path / "fixes.xyz"
    _tracks().to_csv(path, index=False)
    with pytest.raises(InputError, match=r"fixes\.xyz: unknown engine 'excel'; known formats: csv \(\.csv") as exc:
        read_fixes(path, engine="excel")
    assert "\n" not in str(exc.value)
    for name in ("csv", "parquet", "netcdf", "dataframe", "dataset"):
        assert name in str(exc.value)
    with pytest.raises(InputError, match=r"fixes\.xyz: no reader claims this file; known formats: .*netcdf") as exc:
        read_fixes(path)
    assert "\n" not in str(exc.value)
    with pytest.raises(InputError, match=r"fixes\.xyz: unknown engine"):
        FixReader(path, engine="excel")
    with pytest.raises(InputError, match="no such file"):
        read_fixes(tmp_path / "missing.xyz", engine="csv")


def test_register_backend_rejects_what_is_not_a_reader(registry):
    with pytest.raises(TypeError, match="FixBackend instance"):
        registry.register_backend(_WhitespaceBackend)  # the class, not an instance

    class Nameless(FixBackend):
        pass

    with pytest.raises(ValueError, match="Nameless has no name"):
        registry.register_backend(Nameless())
