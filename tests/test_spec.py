"""The fit specification: options checked once, the band rule in one place, and the same numbers for the same
window and settings from the command line, the batch runner, the dashboard's notebook object and fit_series."""

import json

import numpy as np
import pytest

from driftspec.analysis import FitSpec, fit_series, fit_window
from driftspec.analysis.io import read_fixes, read_table, write_fixes
from driftspec.analysis.tracks.pipeline import load_velocities
from driftspec.analysis.tracks.windows import iter_windows

#: settings under which every path must agree (model, observation, estimator, taper, band, inertial handling)
SETTINGS = [
    dict(model="matern+inertial", observation="differenced+noise", estimator="debiased", taper="none"),
    dict(model="matern", observation="none", estimator="debiased", taper="hann"),
    dict(model="matern+inertial", observation="differenced", estimator="whittle", taper="none",
         inertial="follow-latitude"),
    # the command line's defaults: two candidates per window and one selected, the latitude followed where it moves
    # the inertial frequency, the observation model per window
    dict(model="auto", observation="auto", estimator="debiased", taper="none", inertial="auto"),
]


@pytest.fixture(scope="module")
def three_tracks(demo_dir, tmp_path_factory):
    fixes = read_fixes(str(demo_dir / "fixes.parquet"))
    # three mid-latitude tracks, and the one nearest the equator (there the inertial part is often not resolved and
    # the command line's default selects the plain Matérn)
    lat = fixes.groupby(fixes["id"].astype(str))["lat"].mean()
    keep = [*sorted(lat.index)[:3], lat.abs().idxmin()]
    path = tmp_path_factory.mktemp("three") / "fixes.parquet"
    write_fixes(fixes[fixes["id"].astype(str).isin(keep)].drop(columns="row"), path)
    return path


@pytest.mark.parametrize("settings", SETTINGS, ids=["observed", "measured-like+hann", "whittle+follow", "defaults"])
def test_dashboard_and_command_line_give_identical_numbers(three_tracks, tmp_path, settings):
    # two independent paths through the code: the dashboard's notebook object fits window by window as a user
    # steps through them; the command line streams, cleans and grids the file itself and writes a table
    from driftspec.app import explore
    from driftspec.app.cli import main

    ex = explore(str(three_tracks), window_days=30.0, **settings)
    ex._cancel.set()  # no background jobs: only the windows fitted here
    dash = {}
    for track in ex.track_ids:
        ex.state.track = track
        for k in range(len(ex.windows())):
            ex.state.window = k
            w, r = ex.fit_current()
            dash[(track, w.start)] = r
    assert len(dash) >= 6

    out = tmp_path / "fits.parquet"
    args = ["fit", str(three_tracks), "--out", str(out), "--window-days", "30", "--model", settings["model"],
            "--observation", settings["observation"], "--estimator", settings["estimator"], "--taper",
            settings["taper"], "--inertial-frequency", settings.get("inertial", "free"), "--workers", "1",
            "--no-progress"]
    assert main(args) == 0
    table = read_table(out)
    assert len(table) == len(dash)
    if settings["model"] == "auto":  # both candidates are selected somewhere: the page shows the selected one
        assert set(table["model"]) == {"matern", "matern+inertial"}
    for _, row in table.iterrows():
        r = dash[(row["track_id"], row["window_start"])]
        assert row["status"] == r.status and row["model"] == r.model
        assert row["max_freq"] == r.max_freq
        for name, value in r.params.items():
            assert row[name] == pytest.approx(value, rel=1e-12, nan_ok=True), name
            assert row[name + "_se"] == pytest.approx(r.stderr[name], rel=1e-9, nan_ok=True), name
        assert row["loglik"] == pytest.approx(r.loglik, rel=1e-12)


def test_fit_series_and_fit_window_agree_under_one_spec(three_tracks):
    # the array API builds a FitSpec from its keywords and takes the same path as a Window
    vel, _, _ = load_velocities(str(three_tracks))
    w = next(iter_windows(vel, window_days=30))
    spec = FitSpec(models=("matern+inertial",), observation="differenced+noise", band=5.0, inertial_frequency="free")
    a = fit_window(w, spec)[0]
    b = fit_series(w.z, w.dt_seconds, model="matern+inertial", latitude=w.latitude,
                   observation="differenced+noise", velocity_operator="central", max_freq=5.0)
    assert a.params == b.params and a.loglik == b.loglik
    assert a.window_start == w.start


def test_band_rule():
    # the fractions of the Nyquist frequency documented in the module docstring of fitting/spec.py; the
    # fix-interval limit is 3/4 of that interval's Nyquist frequency. Hourly grid: Nyquist 12 cpd.
    dt = 1 / 24
    assert FitSpec(velocity="central").max_freq(dt) == pytest.approx(9.0)
    assert FitSpec(velocity="forward").max_freq(dt) == pytest.approx(12.0)
    assert FitSpec(velocity="measured").max_freq(dt) == pytest.approx(12.0)
    assert FitSpec(velocity="central", observation="none").max_freq(dt) == pytest.approx(3.0)
    # fixes every 4 h behind an hourly grid: at most 0.75 * 3 cpd
    assert FitSpec().max_freq(dt, fix_interval_days=4 / 24) == pytest.approx(2.25)
    assert FitSpec(band=2.0).max_freq(dt, fix_interval_days=4 / 24) == 2.0
    # fixes 3.4 h apart on average, fitted through the irregular operator: half their Nyquist frequency (1.76 cpd),
    # or 0.3 cpd beyond an inertial frequency of 1.74 cpd (60 N), never beyond 3/4 of their Nyquist (2.65 cpd)
    fix = 3.4 / 24
    assert FitSpec().max_freq(dt, fix, "irregular", -1.0) == pytest.approx(0.5 * 12 / 3.4)
    assert FitSpec().max_freq(dt, fix, "irregular", -1.74) == pytest.approx(2.04)
    assert FitSpec().max_freq(dt, fix, "irregular", -2.6) == pytest.approx(0.75 * 12 / 3.4)


@pytest.mark.parametrize("kwargs, message", [
    (dict(models=("nope",)), "unknown model"),
    (dict(estimator="bogus"), "estimator must be one of"),
    (dict(band=-1), "band"),
    (dict(band=0), "band"),
    (dict(velocity="measured", observation="differenced"), "measured velocities"),
    (dict(position_noise=30.0, observation="none"), "position noise value"),
    (dict(taper="triangle"), "taper"),
    (dict(exclude=((2.0, 1.0),)), "excluded band"),
    (dict(fixed={"not_a_parameter": 1.0}), "not parameters"),
    (dict(bootstrap=-3), "bootstrap"),
])
def test_invalid_settings_are_one_line_errors(kwargs, message):
    with pytest.raises(ValueError, match=message) as err:
        FitSpec(**kwargs)
    assert "\n" not in str(err.value)


def test_spec_round_trips_through_json_and_names_its_differences():
    a = FitSpec(models=("matern", "matern+inertial"), estimator="whittle", exclude=((1.8, 2.1),),
                fixed={"matern_alpha": 1.0})
    b = FitSpec.from_dict(json.loads(a.to_json()))
    assert a == b and a.to_json() == b.to_json()
    assert a.differences(a.replace(estimator="debiased", taper="hann")) == ["estimator", "taper"]


def test_model_family_checks_its_parameters():
    # the base class checks shape and bounds before a family computes anything (in the manner of scipy.stats)
    spec = FitSpec(models=("matern",), observation="none", velocity="measured")
    fam = spec.family("matern")
    lags = np.arange(5) / 24
    with pytest.raises(ValueError, match="expected 3 parameters"):
        fam.autocovariance([0.01, 1.2], lags)
    with pytest.raises(ValueError, match="matern_alpha"):
        fam.autocovariance([0.01, 99.0, 1.0], lags)
    with pytest.raises(ValueError, match="matern_variance"):
        fam.spectral_density([np.nan, 1.2, 1.0], lags)
