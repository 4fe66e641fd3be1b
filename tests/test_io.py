"""Readers and writers. The netCDF layouts follow the CF conventions (v1.11), appendix H.4:
H.4.1 multidimensional array of trajectories, H.4.3 contiguous ragged array, H.4.4 indexed ragged array."""

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from driftspec.analysis.errors import InputError
from driftspec.analysis.io import fixes_to_cf_dataset, read_fixes, write_fixes
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
