"""Static figures and map geometry of the app: projections against cartopy's own transforms, degree ticks at
the projected positions of their degrees, and the quick-look PNG in a mid-latitude and a polar extent."""

import re

import numpy as np
import pandas as pd
import pytest

from driftspec.app.geo import EARTH_RADIUS_M, choose_projection, degree_ticks, graticule, land_polygons


def test_projection_is_chosen_by_latitude():
    assert choose_projection([-20, -10], [35, 45]).kind == "mercator"
    assert choose_projection([0, 40], [70, 80]).kind == "north_polar"
    assert choose_projection([100, 140], [-75, -65]).kind == "south_polar"


def test_mercator_matches_the_spherical_formula():
    # Snyder (1987), USGS PP 1395, eq. 7-1 and 7-2: x = R (lon - lon0), y = R ln tan(pi/4 + lat/2)
    proj = choose_projection([-150, -130], [0, 30])
    lon, lat = np.array([-150.0, -140.0, -128.0]), np.array([-5.0, 20.0, 60.0])
    x, y = proj.forward(lon, lat)
    np.testing.assert_allclose(x, EARTH_RADIUS_M * np.deg2rad(lon - proj.central_lon), rtol=1e-9, atol=1e-6)
    np.testing.assert_allclose(y, EARTH_RADIUS_M * np.log(np.tan(np.pi / 4 + np.deg2rad(lat) / 2)), rtol=1e-9)
    back = proj.inverse(x, y)
    np.testing.assert_allclose(back[0], lon, atol=1e-9)
    np.testing.assert_allclose(back[1], lat, atol=1e-9)


def test_polar_stereographic_matches_the_spherical_formula():
    # Snyder (1987) eq. 21-5..21-9, north polar aspect, k0 = 1: rho = 2 R tan(pi/4 - lat/2)
    proj = choose_projection([10, 30], [70, 80])
    lon, lat = np.array([0.0, 25.0, 50.0]), np.array([70.0, 80.0, 88.0])
    x, y = proj.forward(lon, lat)
    rho = 2 * EARTH_RADIUS_M * np.tan(np.pi / 4 - np.deg2rad(lat) / 2)
    dl = np.deg2rad(lon - proj.central_lon)
    np.testing.assert_allclose(x, rho * np.sin(dl), rtol=1e-9, atol=1e-6)
    np.testing.assert_allclose(y, -rho * np.cos(dl), rtol=1e-9, atol=1e-6)


def test_degree_ticks_sit_at_their_degrees():
    proj = choose_projection([-20, -5], [35, 45])
    x, y = proj.forward(np.array([-20.0, -5.0]), np.array([35.0, 45.0]))
    xt, yt = degree_ticks(proj, (x[0], x[1]), (y[0], y[1]))
    assert len(xt) >= 3 and len(yt) >= 3
    for pos, label in xt.items():
        lon = -float(label.rstrip("°W")) if label.endswith("W") else float(label.rstrip("°E"))
        assert pos == pytest.approx(proj.forward(np.array([lon]), np.array([0.0]))[0][0], abs=1e-3)
    for pos, label in yt.items():
        lat = float(label.rstrip("°N")) if label.endswith("N") else -float(label.rstrip("°S"))
        assert pos == pytest.approx(proj.forward(np.array([proj.central_lon]), np.array([lat]))[1][0], abs=1e-3)


def test_position_labels_use_hemisphere_letters_and_wrap_longitude(rng):
    from driftspec.app.geo import parse_degrees, position_labels

    # hover labels: no signs, longitudes east of 180°E wrap to the west (the ISO 6709 sign convention spelled with
    # hemisphere letters)
    assert position_labels([-24.5, 0.0, 10.0], [-134.014, 190.0, 0.0]) == [
        "24.50°S 134.01°W", "0.00° 170.00°W", "10.00°N 0.00°"]
    lat, lon = rng.uniform(-89, 89, 200), rng.uniform(-540, 540, 200)
    for text, a, o in zip(position_labels(lat, lon, 4), lat, lon):
        la, lo = text.split()
        assert parse_degrees(la) == pytest.approx(a, abs=5e-5)
        assert parse_degrees(lo) == pytest.approx((o + 180) % 360 - 180, abs=5e-5)


def test_land_and_graticule_near_a_coast():
    # off Portugal: the shipped shoreline must give land east of 9.5 W at 40 N (outside knowledge: Iberia)
    from shapely.geometry import Point, Polygon

    proj = choose_projection([-20, -5], [35, 45])
    land = land_polygons(proj, (-20, -5), (35, 45))
    assert land
    px, py = proj.forward(np.array([-8.0, -14.0]), np.array([40.0, 40.0]))
    polys = [Polygon(r) for r in land]
    assert any(p.contains(Point(px[0], py[0])) for p in polys)  # inland Portugal
    assert not any(p.contains(Point(px[1], py[1])) for p in polys)  # open Atlantic
    paths, labels = graticule(proj, (-20, -5), (35, 45))
    assert len(paths) == len(labels) and any(t.endswith("°N") for t in labels) and any(t.endswith("°W") for t in labels)


@pytest.mark.parametrize("name, lon0, lat0, kind", [("coast", -13.0, 40.0, "mercator"),
                                                     ("polar", 20.0, 75.0, "north_polar")])
def test_quicklook_png_is_drawn_in_the_chosen_projection(tmp_path, name, lon0, lat0, kind):
    import matplotlib

    matplotlib.use("Agg")
    from driftspec.analysis.regional import grid_fits
    from driftspec.app.figures import quicklook_map

    rng = np.random.default_rng(1)
    fits = pd.DataFrame({"lon": lon0 + rng.uniform(-6, 6, 200), "lat": lat0 + rng.uniform(-4, 4, 200),
                         "status": "ok", "matern_alpha": rng.uniform(0.8, 1.6, 200)})
    ds = grid_fits(fits, ["matern_alpha"], 2.0)
    png, proj = quicklook_map(ds, tmp_path / f"quicklook-{name}.png", return_projection=True)
    assert proj.kind == kind
    from matplotlib.image import imread

    img = imread(png)
    assert img.shape[0] > 300 and img.shape[1] > 300
    # the land colour (#d9d4c7) is on the figure: the shoreline was drawn and filled
    land = np.all(np.abs(img[..., :3] - np.array([0xd9, 0xd4, 0xc7]) / 255) < 0.02, axis=-1)
    assert land.mean() > 0.001


# ---------------------------------------------------------------------------------------------- dashboard values
# The values the dashboard draws, against independent computations: pooled fits run directly on windows selected
# here by plain comparisons, eigen-decompositions by numpy.linalg.eigh, periodograms by scipy.signal.
@pytest.fixture(scope="module")
def explorer(demo_dir):
    from driftspec.analysis.tracks.pipeline import load_velocities
    from driftspec.app.dashboard import Explorer
    from driftspec.app.state import ExplorerState

    vel, _, _ = load_velocities(str(demo_dir / "fixes.parquet"))
    ex = Explorer(vel, state=ExplorerState(window_days=30, overlap=0.5))
    ex._cancel.set()  # no background work: the blocking methods compute here
    return ex


def _all_windows(ex):
    """Every window of every track, made here with the windowing functions (not through the dashboard)."""
    from driftspec.analysis.tracks.windows import iter_windows
    from driftspec.app.dashboard import MIN_COVERAGE

    st = ex.state
    return [w for tid, v in ex.vel.groupby("id", sort=True)
            for w in iter_windows(v, st.window_days, st.overlap, MIN_COVERAGE)]


def _rows(fig, name):
    """The rows of the data source of the glyph ``name`` of a Bokeh figure, as dicts (what the page receives)."""
    data = fig.select_one({"name": name}).data_source.data
    return [dict(zip(data, values)) for values in zip(*data.values())]


def _cli_spec(**extra):
    """The dashboard's default settings as `driftspec fit` options would give them."""
    from driftspec.analysis.fitting import FitSpec

    return FitSpec(models=("matern+inertial",), estimator="debiased", band="auto", observation="auto",
                   taper="none", inertial_frequency="free", **extra)


def test_pooled_parameter_map_shows_pool_fit_of_each_bins_windows(explorer):
    from driftspec.analysis.regional.pooled import pool_fit
    from driftspec.app.dashboard import ParameterMap

    ex = explorer
    ex.state.param.update(bin_deg=10.0, map_values="pooled fit", map_param="matern_alpha", ellipses=False)
    pm = ex.fit_pooled_map()
    polys = _rows(ParameterMap(ex=ex).plot(), "bins")  # the bins drawn, with their hover values
    assert len(polys) == len(pm["cells"]) >= 3
    lon_e, lat_e = pm["lon_edges"], pm["lat_edges"]
    assert np.allclose(np.diff(lon_e), 10.0) and np.allclose(np.diff(lat_e), 10.0)
    windows = _all_windows(ex)
    checked = 0
    for poly in polys:
        # the bin's windows, chosen here: mean position inside the bin (lower edges in, upper edges out)
        j = int(np.argmin(np.abs(0.5 * (lon_e[:-1] + lon_e[1:]) - poly["lon"])))
        i = int(np.argmin(np.abs(0.5 * (lat_e[:-1] + lat_e[1:]) - poly["lat"])))
        mine = [w for w in windows if lat_e[i] <= w.lat < lat_e[i + 1] and lon_e[j] <= w.lon < lon_e[j + 1]]
        assert poly["n_windows"] <= len(mine)
        direct = pool_fit(mine, _cli_spec(), min_windows=2)
        assert poly["status"] == direct.status
        assert poly["n_windows"] == direct.n_windows and poly["n_tracks"] == direct.n_tracks
        if direct.status in ("ok", "at_bound"):
            assert poly["matern_alpha"] == pytest.approx(direct.params["matern_alpha"], rel=1e-9)
            assert poly["se"] == pytest.approx(direct.stderr["matern_alpha"], rel=1e-9)
            assert poly["het_p"] == pytest.approx(direct.heterogeneity_pvalue, rel=1e-9, nan_ok=True)
            assert poly["het_stat"] == pytest.approx(direct.heterogeneity_statistic, rel=1e-9, nan_ok=True)
            checked += 1
    assert checked >= 2
    # every window with two or more in its bin is in one pooled bin (nothing lost, nothing counted twice)
    assert sum(p["n_windows"] for p in polys) <= len(windows)


def test_region_fit_is_pool_fit_of_the_windows_inside_the_box(explorer):
    from driftspec.analysis.regional.pooled import pool_fit
    from driftspec.app.dashboard import RegionFit

    ex = explorer
    windows = _all_windows(ex)
    lat = np.array([w.lat for w in windows])
    lon = np.array([w.lon for w in windows])
    box = [float(np.quantile(lon, 0.2)), float(np.quantile(lat, 0.2)), float(np.quantile(lon, 0.8)),
           float(np.quantile(lat, 0.8))]
    ex.state.region = box
    res = ex.fit_region()
    mine = [w for w in windows if box[0] <= w.lon <= box[2] and box[1] <= w.lat <= box[3]]
    assert len(mine) >= 4
    direct = pool_fit(mine, _cli_spec())
    assert res.n_windows == direct.n_windows and res.n_tracks == direct.n_tracks
    shown = RegionFit(ex=ex).table()[1].value.set_index("parameter")  # the Tabulator on the page
    assert set(shown.index) == set(direct.params)
    for name, value in direct.params.items():
        assert shown.loc[name, "value"] == pytest.approx(value, rel=1e-9), name
        assert shown.loc[name, "std. error"] == pytest.approx(direct.stderr[name], rel=1e-9), name
    assert res.heterogeneity_statistic == pytest.approx(direct.heterogeneity_statistic, rel=1e-9)
    assert res.heterogeneity_df == direct.heterogeneity_df
    ex.state.region = []


@pytest.fixture(scope="module")
def anisotropic_fit(explorer):
    ex = explorer
    ex.state.param.update(anisotropic=True, window=1)
    w, _ = ex.fit_current()
    a = ex.current_anisotropic
    assert a is not None and a.status in ("ok", "at_bound"), a
    yield w, a
    ex.state.param.update(anisotropic=False, window=0)


def test_anisotropy_ellipse_axes_are_the_eigenvectors_of_the_model_covariance(explorer, anisotropic_fit):
    from driftspec.app.dashboard import TrackMap

    ex = explorer
    w, a = anisotropic_fit
    view = TrackMap(ex=ex)
    view._fig.show_ellipse(*view._anisotropy_ellipse(a, w))
    drawn = {k: np.asarray(v) for k, v in view._fig.ellipse.data.items()}  # the columns the map's glyph draws
    assert len(set(drawn["sd_major"])) == 1 and len(drawn["sd_major"]) == len(drawn["x"])
    drawn.update({k: drawn[k][0] for k in ("sd_major", "sd_minor", "angle")})
    # the covariance of (u, v) implied by the fit, from the published form (Schreier & Scharf 2010, ch. 2): the
    # Matern part sigma^2/2 [[1 + rho cos 2t, rho sin 2t], [rho sin 2t, 1 - rho cos 2t]], the inertial part
    # circular (sigma_I^2 / 2 on the diagonal)
    p = a.params
    rho, t = p["anisotropy"], np.deg2rad(p["anisotropy_angle_deg"])
    cov = 0.5 * p["matern_variance"] * np.array([[1 + rho * np.cos(2 * t), rho * np.sin(2 * t)],
                                                 [rho * np.sin(2 * t), 1 - rho * np.cos(2 * t)]])
    cov += 0.5 * p["inertial_variance"] * np.eye(2)
    vals, vecs = np.linalg.eigh(cov)
    assert drawn["sd_major"] == pytest.approx(np.sqrt(vals[1]), rel=1e-6)
    assert drawn["sd_minor"] == pytest.approx(np.sqrt(vals[0]), rel=1e-6)
    axis = np.degrees(np.arctan2(vecs[1, 1], vecs[0, 1]))
    assert (drawn["angle"] - axis + 90) % 180 - 90 == pytest.approx(0, abs=1e-6)
    # the ring on the (Mercator, conformal) map: its longest radius along the axis, radii in the ratio of the axes
    proj = ex.data.proj
    cx, cy = proj.forward(np.array([w.lon]), np.array([w.lat]))
    d = np.column_stack([drawn["x"] - cx[0], drawn["y"] - cy[0]])
    r = np.hypot(d[:, 0], d[:, 1])
    far = d[np.argmax(r)]
    assert (np.degrees(np.arctan2(far[1], far[0])) - axis + 90) % 180 - 90 == pytest.approx(0, abs=3.0)
    assert r.max() / r.min() == pytest.approx(np.sqrt(vals[1] / vals[0]), rel=2e-3)
    (x0, x1), _ = ex.data.extent
    assert r.max() == pytest.approx(0.06 * (x1 - x0), rel=1e-3)  # visible: an eighth of the map across


def test_anisotropic_fit_table_shows_the_test_and_the_tensor(explorer, anisotropic_fit):
    from driftspec.analysis.fitting.anisotropy import fit_anisotropic
    from driftspec.app.dashboard import FitTable

    ex = explorer
    w, a = anisotropic_fit
    shown = FitTable(ex=ex).anisotropic_table.value.set_index("quantity")  # the Tabulator on the page
    # the same window fitted here directly, from the isotropic fit the dashboard shows
    direct = fit_anisotropic(w.z, w.dt_seconds / 86400, base_fit=ex.current_fit)
    assert shown.loc["isotropy p-value", "value"] == pytest.approx(direct.isotropy_pvalue, rel=1e-9)
    assert shown.loc["anisotropy", "value"] == pytest.approx(direct.params["anisotropy"], rel=1e-6)
    assert shown.loc["anisotropy_angle_deg", "value"] == pytest.approx(direct.params["anisotropy_angle_deg"],
                                                                       abs=1e-4)
    k = np.array([[shown.loc["diffusivity K_uu", "value"], shown.loc["diffusivity K_uv", "value"]],
                  [shown.loc["diffusivity K_uv", "value"], shown.loc["diffusivity K_vv", "value"]]])
    vals, vecs = np.linalg.eigh(k)  # the principal values shown are the tensor's eigenvalues
    assert shown.loc["diffusivity_major", "value"] == pytest.approx(vals[1], rel=1e-9)
    assert shown.loc["diffusivity_minor", "value"] == pytest.approx(vals[0], rel=1e-9)
    axis = np.degrees(np.arctan2(vecs[1, 1], vecs[0, 1]))
    assert (shown.loc["diffusivity_angle_deg", "value"] - axis + 90) % 180 - 90 == pytest.approx(0, abs=1e-6)
    # Taylor (1921): K = S(0)/2 of (u, v), so trace(K)/2 = S(0)/4 with S the fitted rotary density in (m/s)^2/Hz
    s0 = float(np.real(a.family.spectral_density(a.theta, np.array([0.0]), a.context))[0]) * 86400.0
    assert 0.5 * np.trace(k) == pytest.approx(s0 / 4, rel=1e-6)


def test_complementary_spectrum_against_scipy_and_the_direct_sum():
    import scipy.signal

    from driftspec.analysis import simulate
    from driftspec.analysis.fitting.anisotropy import fit_anisotropic
    from driftspec.app.dashboard import complementary_curves

    # a 3:1 flow along 30 degrees from two independent Matern series (hourly, 60 days, no gaps, no taper)
    x = simulate("matern", [0.04, 1.2, 1.0], n=1440, dt=3600.0, seed=np.random.default_rng(3), real=True, size=2)
    c, s = np.cos(np.radians(30)), np.sin(np.radians(30))
    u = (np.sqrt(1.5) * c * x[0] - np.sqrt(0.5) * s * x[1]) / np.sqrt(2)
    v = (np.sqrt(1.5) * s * x[0] + np.sqrt(0.5) * c * x[1]) / np.sqrt(2)
    dt_days = 1 / 24
    a = fit_anisotropic(u + 1j * v, dt_days, max_freq=6.0)
    f, observed, model = complementary_curves(a)
    # scipy.signal: J(f) J(-f) = P_uu - P_vv + 2i Re P_uv for real u, v (two-sided densities, per cpd)
    kw = dict(fs=1 / dt_days, window="boxcar", nperseg=u.size, detrend="constant", return_onesided=False,
              scaling="density")
    fq, puu = scipy.signal.csd(u, u, **kw)
    _, pvv = scipy.signal.csd(v, v, **kw)
    _, puv = scipy.signal.csd(u, v, **kw)
    idx = np.array([np.argmin(np.abs(fq - fk)) for fk in f])
    assert np.allclose(fq[idx], f)
    ref = np.abs(puu.real[idx] - pvv.real[idx] + 2j * puv.real[idx])
    np.testing.assert_allclose(observed, ref, rtol=1e-8, atol=1e-12 * ref.max())
    # the model curve: the expected complementary periodogram by the direct sum over lags,
    # X(f) = dt sum_tau (1 - |tau|/N) C(tau dt) exp(-2 pi i f tau dt) ("The debiased Whittle likelihood", eq. 2.4)
    n = u.size
    tau = np.arange(-(n - 1), n)
    cc = a.family.complementary_autocovariance(a.theta, tau * dt_days, a.context)
    weights = (1 - np.abs(tau) / n) * cc
    direct = np.array([abs(dt_days * np.sum(weights * np.exp(-2j * np.pi * fk * tau * dt_days))) for fk in f])
    np.testing.assert_allclose(model, direct, rtol=1e-6, atol=1e-9 * direct.max())
    assert a.params["anisotropy"] == pytest.approx(0.5, abs=0.15)  # 3:1 is rho = 1/2


def test_parameter_map_variance_ellipses_are_the_bins_sample_covariance(explorer):
    from driftspec.app.dashboard import ParameterMap, bin_variance_ellipses

    ex = explorer
    ex.state.param.update(bin_deg=5.0, map_values="median of windows", ellipses=True)
    fits = pd.DataFrame([{"lat": w.lat, "lon": w.lon, "status": "ok", "matern_alpha": 1.2}
                         for w in _all_windows(ex)])
    ex._set(all_fits=fits)
    plot = ParameterMap(ex=ex).plot()
    paths = [{**r, "x": r["xs"], "y": r["ys"]} for r in _rows(plot, "ellipses")]
    assert len(paths) >= 3 and _rows(plot, "bins")
    vel = ex.vel
    ok = vel["valid_velocity"].to_numpy(bool) & np.isfinite(vel["u"].to_numpy()) & np.isfinite(vel["v"].to_numpy())
    v = vel[ok]
    from driftspec.app.geo import map_bin_edges

    lon_e, lat_e = map_bin_edges(fits["lon"], fits["lat"], ex.data.central_lon, 5.0)
    table = bin_variance_ellipses(vel, lon_e, lat_e)
    assert len(table) == len(paths)
    for row, path in zip(table.itertuples(), paths):
        inside = v[(v["lat"] >= lat_e[row.iy]) & (v["lat"] < lat_e[row.iy + 1]) & (v["lon"] >= lon_e[row.ix])
                   & (v["lon"] < lon_e[row.ix + 1])]
        assert len(inside) == row.n == path["n"]
        cov = np.cov(inside["u"], inside["v"], bias=True)  # about the bin's mean velocity
        vals, vecs = np.linalg.eigh(cov)
        assert path["sd_major"] == pytest.approx(np.sqrt(vals[1]), rel=1e-6)
        assert path["sd_minor"] == pytest.approx(np.sqrt(vals[0]), rel=1e-6)
        axis = np.degrees(np.arctan2(vecs[1, 1], vecs[0, 1]))
        assert (path["angle"] - axis + 90) % 180 - 90 == pytest.approx(0, abs=1e-4)
    # drawn to scale: each ring's longest over shortest radius is the ratio of its axes
    for path in paths:
        r = np.hypot(path["x"] - path["x"][:-1].mean(), path["y"] - path["y"][:-1].mean())
        assert r.max() / r.min() == pytest.approx(path["sd_major"] / path["sd_minor"], rel=1e-2)
    ex._set(all_fits=None)


def test_map_readout_names_the_fix_nearest_the_pointer(explorer):
    """The readout under the map: the fix nearest the pointer (found here by brute force over every plotted fix, not
    the map's k-d tree), its track, time and position; the same pane is given the new text."""
    from driftspec.app.dashboard import TrackMap

    view = TrackMap(ex=explorer)
    pane = view._readout
    pts = explorer.data.points
    k = len(pts) // 3
    x, y = float(pts["x"].iloc[k]) + 1.0, float(pts["y"].iloc[k]) - 1.0  # a metre off a plotted fix
    view.param.update(pointer_x=x, pointer_y=y)
    nearest = int(np.argmin(np.hypot(pts["x"].to_numpy() - x, pts["y"].to_numpy() - y)))
    p = pts.iloc[nearest]
    text = pane.object
    assert view._readout is pane
    assert f"**{explorer.track_ids[int(p['track_code'])]}**" in text
    assert pd.Timestamp(int(p["t_ns"])).strftime("%Y-%m-%d %H:%M") in text
    lat = re.search(r"(\d+\.\d+)°([NS])", text)
    assert float(lat.group(1)) * (1 if lat.group(2) == "N" else -1) == pytest.approx(p["lat"], abs=0.006)


def test_a_fits_table_given_at_start_is_the_explorers(demo_dir):
    # `driftspec serve FIXES --fits FITS`: the table's rows, made here by the batch module's window_rows on windows
    # cut here, are the explorer's fits of every window (this constructor raised AttributeError before)
    from driftspec.analysis.fitting.batch import window_rows
    from driftspec.analysis.tracks.pipeline import load_velocities
    from driftspec.analysis.tracks.windows import iter_windows
    from driftspec.app.dashboard import MIN_COVERAGE, Explorer
    from driftspec.app.state import ExplorerState

    vel, _, _ = load_velocities(str(demo_dir / "fixes.parquet"))
    first = vel[vel["id"] == sorted(vel["id"].unique())[0]]
    spec = _cli_spec()
    windows = list(iter_windows(first, 30.0, 0.5, MIN_COVERAGE))[:2]
    fits = pd.DataFrame([r for w in windows for r in window_rows(w, spec)])
    ex = Explorer(vel, fits=fits, state=ExplorerState(window_days=30, overlap=0.5))
    ex._cancel.set()
    assert len(ex.all_fits) == len(fits) >= 2
    np.testing.assert_array_equal(ex.all_fits["matern_alpha"].to_numpy(), fits["matern_alpha"].to_numpy())


def test_fit_table_notes_name_each_parameter_a_fit_ended_on_and_its_bound():
    # an oscillation fitted to a simulated Matérn series without one (seed 1) runs its variance, frequency and damping
    # onto bounds. Which parameters sit on a bound is decided here from the fitted values and the family's bounds
    # (within 1e-4 of the range, in log space for the positive parameters the optimiser works in log): the table's
    # notes name exactly those, each with that bound's value; the background's parameters carry none
    from driftspec.analysis import fit_series, simulate
    from driftspec.app.dashboard import bound_notes, readable_unit

    z = simulate("matern", [0.02, 1.2, 1.0], n=1440, dt=3600.0, seed=1)
    res = fit_series(z, 3600.0, model="matern+inertial", latitude=30.0)
    assert res.status == "at_bound"
    expected = {}
    for p, (lo, hi) in zip(res.family.parameters, res.family.bounds(res.context)):
        v = res.params[p.name]
        f = np.log if p.scale == "log" else (lambda x: x)
        span = f(hi) - f(lo)
        if abs(f(v) - f(lo)) < 1e-4 * span:
            expected[p.name] = f"at lower bound ({lo:g})"
        elif abs(f(hi) - f(v)) < 1e-4 * span:
            expected[p.name] = f"at upper bound ({hi:g})"
    assert {"inertial_variance", "inertial_damping"} <= set(expected)
    assert bound_notes(res) == expected
    # units as the README's data dictionary writes them
    assert [readable_unit(n, u) for n, u in (("inertial_frequency", "day-1"), ("inertial_damping", "day-1"),
                                              ("diffusivity", "m2 s-1"), ("matern_variance", "m2 s-2"))] == \
        ["cpd", "1/day", "m²/s", "m²/s²"]
