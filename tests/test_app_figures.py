"""Static figures and map geometry of the app: projections against cartopy's own transforms, degree ticks at
the projected positions of their degrees, and the quick-look PNG in a mid-latitude and a polar extent."""

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
