"""Map geometry for the dashboard and the static figures: a projection suited to the data's extent, degree
ticks, a graticule, land polygons from the shipped shoreline, and the parameter map's bins in lon/lat.

Pure geometry on arrays (cartopy/shapely do the projecting and clipping); the views only draw what it returns.

Projection rule: data mostly poleward of 60° get a polar stereographic view centred on that pole (meridians
radiate from it; degree labels sit on the graticule); everything else gets a Mercator view centred on the data's
mean longitude, on a sphere, where x depends on longitude only and y on latitude only, so the axes carry degree
ticks directly. Snyder, *Map Projections: A Working Manual*, USGS Professional Paper 1395 (1987), chapters 7
(Mercator) and 21 (stereographic), doi:10.3133/pp1395.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from driftspec.analysis.runs import circular_mean_lon

#: radius of the spherical Earth the maps are drawn on, m
EARTH_RADIUS_M = 6_371_000.0
#: data whose median |latitude| exceeds this get a polar view
POLAR_LAT = 60.0
NICE_STEPS = (1, 2, 5, 10, 15, 20, 30, 45, 60)


@dataclass(frozen=True)
class MapProjection:
    """A map projection chosen for one data set.

    Attributes
    ----------
    kind : {"mercator", "north_polar", "south_polar"}
    central_lon : float
        Central meridian, degrees east.
    """

    kind: str
    central_lon: float

    @functools.cached_property
    def crs(self):
        import cartopy.crs as ccrs

        globe = ccrs.Globe(ellipse=None, semimajor_axis=EARTH_RADIUS_M, semiminor_axis=EARTH_RADIUS_M)
        if self.kind == "north_polar":
            return ccrs.NorthPolarStereo(central_longitude=self.central_lon, globe=globe)
        if self.kind == "south_polar":
            return ccrs.SouthPolarStereo(central_longitude=self.central_lon, globe=globe)
        return ccrs.Mercator(central_longitude=self.central_lon, globe=globe)

    @property
    def cylindrical(self) -> bool:
        return self.kind == "mercator"

    @property
    def max_abs_lat(self) -> float:
        return 85.0 if self.cylindrical else 89.9

    def forward(self, lon, lat):
        """Projected x, y (m) of longitudes and latitudes (degrees)."""
        import cartopy.crs as ccrs

        lon = np.asarray(lon, float)
        lat = np.clip(np.asarray(lat, float), -self.max_abs_lat, self.max_abs_lat)
        if self.kind == "north_polar":
            lat = np.maximum(lat, -60.0)
        elif self.kind == "south_polar":
            lat = np.minimum(lat, 60.0)
        xy = self.crs.transform_points(ccrs.PlateCarree(), lon.ravel(), lat.ravel())
        return xy[:, 0].reshape(lon.shape), xy[:, 1].reshape(lon.shape)

    def inverse(self, x, y):
        """Longitude and latitude (degrees) of projected points."""
        import cartopy.crs as ccrs

        x, y = np.asarray(x, float), np.asarray(y, float)
        ll = ccrs.PlateCarree().transform_points(self.crs, x.ravel(), y.ravel())
        return ll[:, 0].reshape(x.shape), ll[:, 1].reshape(x.shape)


def choose_projection(lon, lat) -> MapProjection:
    """The projection for data at these positions (degrees): polar beyond |60°|, Mercator otherwise."""
    lon, lat = np.asarray(lon, float), np.asarray(lat, float)
    ok = np.isfinite(lon) & np.isfinite(lat)
    if not ok.any():
        return MapProjection("mercator", 0.0)
    central = float(circular_mean_lon(lon[ok]))
    med = float(np.median(lat[ok]))
    if abs(med) > POLAR_LAT:
        return MapProjection("north_polar" if med > 0 else "south_polar", round(central))
    return MapProjection("mercator", central)


def _step(span_deg: float, n: int = 6) -> float:
    for s in NICE_STEPS:
        if span_deg / s <= n:
            return float(s)
    return 60.0


def lon_label(lon: float) -> str:
    lon = ((lon + 180) % 360) - 180
    return f"{abs(lon):g}°{'E' if lon > 0 else 'W' if lon < 0 else ''}"


def lat_label(lat: float) -> str:
    return f"{abs(lat):g}°{'N' if lat > 0 else 'S' if lat < 0 else ''}"


def position_labels(lat, lon, digits: int = 2) -> list[str]:
    """``"24.50°N 134.01°W"`` for each position (hemisphere letters, no signs), as the hovers show them."""
    lat = np.round(np.asarray(lat, float), digits)
    lon = np.round(((np.asarray(lon, float) + 180) % 360) - 180, digits)
    ns = np.where(lat > 0, "N", np.where(lat < 0, "S", ""))
    ew = np.where(lon > 0, "E", np.where(lon < 0, "W", ""))
    return [f"{abs(a):.{digits}f}°{h} {abs(o):.{digits}f}°{v}" for a, h, o, v in zip(lat, ns, lon, ew)]


def box_label(region, digits: int = 1) -> str:
    """``(lon0, lat0, lon1, lat1)`` as ``"16.9°N..25.0°N, 150.3°W..140.0°W"`` (hemisphere letters, no signs)."""
    def one(v, pos, neg):
        v = round(float(v), digits)
        return f"{abs(v):.{digits}f}°{pos if v > 0 else neg if v < 0 else ''}"

    lon0, lat0, lon1, lat1 = (((v + 180) % 360) - 180 if k % 2 == 0 else v for k, v in enumerate(map(float, region)))
    return f"{one(lat0, 'N', 'S')}..{one(lat1, 'N', 'S')}, {one(lon0, 'E', 'W')}..{one(lon1, 'E', 'W')}"


def parse_degrees(text: str) -> float:
    """``"150.3°W"`` -> -150.3 (the inverse of :func:`lon_label` and :func:`lat_label`)."""
    value = float(text.rstrip("NSEW").rstrip("°"))
    return -value if text.endswith(("S", "W")) else value


def degree_ticks(proj: MapProjection, xlim, ylim, reach: float = 1.0) -> tuple[dict, dict]:
    """Axis ticks of a cylindrical view: ``{x_position: "150°W", ...}`` and ``{y_position: "30°N", ...}``
    at round degree values, spaced for the view ``xlim`` x ``ylim`` and extending ``reach`` view widths beyond
    it (for panning). Empty for polar views (their labels sit on the graticule)."""
    if not proj.cylindrical:
        return {}, {}
    lon, lat = proj.inverse(np.array([xlim[0], xlim[1]]), np.array([ylim[0], ylim[1]]))
    deg = np.pi * EARTH_RADIUS_M / 180  # metres of x per degree of longitude
    span_lon = (xlim[1] - xlim[0]) / deg
    lon0 = proj.central_lon + xlim[0] / deg
    step = _step(span_lon)
    lons = np.arange(np.ceil((lon0 - reach * span_lon) / step) * step, lon0 + (1 + reach) * span_lon, step)
    lat_step = _step(lat[1] - lat[0])
    la0 = max(lat[0] - reach * (lat[1] - lat[0]), -proj.max_abs_lat)
    la1 = min(lat[1] + reach * (lat[1] - lat[0]), proj.max_abs_lat)
    lats = np.arange(np.ceil(la0 / lat_step) * lat_step, la1 + 1e-9, lat_step)
    xs, _ = proj.forward(lons, np.zeros_like(lons))
    _, ys = proj.forward(np.full_like(lats, proj.central_lon), lats)
    return ({float(x): lon_label(v) for x, v in zip(xs, lons)}, {float(y): lat_label(v) for y, v in zip(ys, lats)})


def graticule(proj: MapProjection, lon_range, lat_range, n: int = 6, reach: float = 1.0):
    """Meridians and parallels spaced for the given extent (degrees) and reaching ``reach`` extents beyond it,
    as projected (m, 2) paths, with a label text for each line."""
    lon_step, lat_step = _step(lon_range[1] - lon_range[0], n), _step(lat_range[1] - lat_range[0], n)
    dlo, dla = reach * (lon_range[1] - lon_range[0]), reach * (lat_range[1] - lat_range[0])
    lo0, lo1 = lon_range[0] - dlo, lon_range[1] + dlo
    la0, la1 = max(lat_range[0] - dla, -proj.max_abs_lat), min(lat_range[1] + dla, proj.max_abs_lat)
    if not proj.cylindrical:
        lo0, lo1 = proj.central_lon - 180, proj.central_lon + 180
    paths, labels = [], []
    dense_lat = np.linspace(la0, la1, 90)
    for lon in np.arange(np.floor(lo0 / lon_step) * lon_step, lo1 + 1e-9, lon_step):
        x, y = proj.forward(np.full_like(dense_lat, lon), dense_lat)
        paths.append(np.column_stack([x, y]))
        labels.append(lon_label(lon))
    dense_lon = np.linspace(lo0, lo1, 180)
    for lat in np.arange(np.ceil(la0 / lat_step) * lat_step, la1 + 1e-9, lat_step):
        x, y = proj.forward(dense_lon, np.full_like(dense_lon, lat))
        paths.append(np.column_stack([x, y]))
        labels.append(lat_label(lat))
    return paths, labels


def land_polygons(proj: MapProjection, lon_range, lat_range, margin_deg: float = 10.0) -> list[np.ndarray]:
    """Land from the shipped shoreline inside the extent (plus a margin), clipped in lon/lat and projected:
    a list of (n, 2) exterior rings ready to fill."""
    from shapely import affinity
    from shapely.geometry import box

    from .coastline import shoreline_polygons

    la0, la1 = max(lat_range[0] - margin_deg, -proj.max_abs_lat), min(lat_range[1] + margin_deg, proj.max_abs_lat)
    if proj.cylindrical:
        lo0, lo1 = lon_range[0] - margin_deg, lon_range[1] + margin_deg
        lo0, lo1 = max(lo0, proj.central_lon - 179.9), min(lo1, proj.central_lon + 179.9)
    else:
        lo0, lo1 = proj.central_lon - 180, proj.central_lon + 180
    clip = box(lo0, la0, lo1, la1)
    out = []
    for shift in (-360.0, 0.0, 360.0):
        for poly in shoreline_polygons():
            minx, miny, maxx, maxy = poly.bounds
            if maxy < la0 or miny > la1 or maxx + shift < lo0 or minx + shift > lo1:
                continue
            part = affinity.translate(poly, xoff=shift).intersection(clip)
            for g in getattr(part, "geoms", [part]):
                if g.is_empty or g.geom_type != "Polygon":
                    continue
                xy = np.asarray(g.exterior.coords)
                x, y = proj.forward(xy[:, 0], xy[:, 1])
                out.append(np.column_stack([x, y]))
    return out


def widen_to_ratio(xlim, ylim, ratio: float):
    """Grow the shorter side of a box about its centre so that width / height == ratio."""
    (x0, x1), (y0, y1) = xlim, ylim
    w, h = x1 - x0, y1 - y0
    if w / h < ratio:
        c, w = 0.5 * (x0 + x1), h * ratio
        return (c - w / 2, c + w / 2), (y0, y1)
    c, h = 0.5 * (y0 + y1), w / ratio
    return (x0, x1), (c - h / 2, c + h / 2)


def label_points(paths, texts, xlim, ylim):
    """Where to write each graticule line's label: its first point inside the view box."""
    out = []
    for p, t in zip(paths, texts):
        inside = np.flatnonzero((p[:, 0] >= xlim[0]) & (p[:, 0] <= xlim[1]) & (p[:, 1] >= ylim[0])
                                & (p[:, 1] <= ylim[1]))
        if inside.size:
            k = inside[0]
            out.append((float(p[k, 0]), float(p[k, 1]), t))
    return out


def data_extent(proj: MapProjection, x, y, pad: float = 0.08, min_size_m: float = 2e5):
    """Projected x and y ranges of the data with a margin (a square-ish box for polar views)."""
    x, y = np.asarray(x, float), np.asarray(y, float)
    if not x.size:
        return (-1e6, 1e6), (-1e6, 1e6)
    dx = max(np.ptp(x), min_size_m) * pad
    dy = max(np.ptp(y), min_size_m) * pad
    return (float(x.min() - dx), float(x.max() + dx)), (float(y.min() - dy), float(y.max() + dy))


def lonlat_ranges(proj: MapProjection, xlim, ylim) -> tuple[tuple, tuple]:
    """Longitude (around the central meridian) and latitude ranges covered by a projected box."""
    gx, gy = np.meshgrid(np.linspace(*xlim, 25), np.linspace(*ylim, 25))
    lon, lat = proj.inverse(gx, gy)
    ok = np.isfinite(lon) & np.isfinite(lat)
    rel = ((lon[ok] - proj.central_lon + 180) % 360) - 180
    return ((proj.central_lon + float(rel.min()), proj.central_lon + float(rel.max())),
            (float(lat[ok].min()), float(lat[ok].max())))


def bin_quads(proj: MapProjection, lon_edges, lat_edges, n_side: int = 6):
    """Projected outlines of lon/lat bins: ``quads[i][j]`` is an (m, 2) ring of bin (lat i, lon j), with each
    side densified so bins stay faithful in curved (polar) projections."""
    quads = []
    t = np.linspace(0, 1, n_side)
    for i in range(len(lat_edges) - 1):
        row = []
        for j in range(len(lon_edges) - 1):
            a, b = lon_edges[j], lon_edges[j + 1]
            c, d = lat_edges[i], lat_edges[i + 1]
            lon = np.r_[a + (b - a) * t, np.full(n_side, b), b - (b - a) * t, np.full(n_side, a)]
            lat = np.r_[np.full(n_side, c), c + (d - c) * t, np.full(n_side, d), d - (d - c) * t]
            x, y = proj.forward(lon, lat)
            row.append(np.column_stack([x, y]))
        quads.append(row)
    return quads


def map_bin_edges(lon, lat, central_lon: float, bin_deg: float):
    """Edges (degrees) of ``bin_deg`` bins covering the positions: longitudes counted from ``central_lon`` so that
    the bins of data around the date line are not split; returns ``(lon_edges, lat_edges)``."""
    lon, lat, b = np.asarray(lon, float), np.asarray(lat, float), float(bin_deg)
    rel = ((lon - central_lon + 180) % 360) - 180
    lo0 = np.floor(np.nanmin(rel) / b) * b + central_lon
    lo1 = np.ceil(np.nanmax(rel) / b) * b + central_lon + b
    la0, la1 = max(np.floor(np.nanmin(lat) / b) * b, -90.0), min(np.ceil(np.nanmax(lat) / b) * b + b, 90.0)
    return np.arange(lo0, lo1 + b / 2, b), np.arange(la0, la1 + b / 2, b)


def bin_cells(lon, lat, lon_edges, lat_edges):
    """Row and column ``(iy, ix)`` of each position's bin (-1 for both outside the grid); a bin holds its lower
    edges, not its upper ones."""
    lon, lat = np.asarray(lon, float), np.asarray(lat, float)
    lon = (lon - lon_edges[0]) % 360.0 + lon_edges[0]
    iy = np.searchsorted(lat_edges, lat, side="right") - 1
    ix = np.searchsorted(lon_edges, lon, side="right") - 1
    inside = (iy >= 0) & (iy < len(lat_edges) - 1) & (ix >= 0) & (ix < len(lon_edges) - 1) & np.isfinite(lat)
    return np.where(inside, iy, -1), np.where(inside, ix, -1)


def local_frame(proj: MapProjection, lon: float, lat: float, step_deg: float = 1e-3):
    """Projected unit vectors pointing east and north at a position, and the map's scale there (projected metres
    per metre on the ground), from finite differences of :meth:`MapProjection.forward`."""
    x, y = proj.forward(np.array([lon, lon + step_deg, lon]), np.array([lat, lat, lat + step_deg]))
    east = np.array([x[1] - x[0], y[1] - y[0]])
    north = np.array([x[2] - x[0], y[2] - y[0]])
    ground = np.deg2rad(step_deg) * EARTH_RADIUS_M
    scale = np.linalg.norm(north) / ground
    return east / np.linalg.norm(east), north / np.linalg.norm(north), scale


def ellipse_ring(proj: MapProjection, lon: float, lat: float, semi_major: float, semi_minor: float,
                 angle_deg: float, n: int = 73) -> np.ndarray:
    """An ellipse drawn on the map at a position: semi-axes in projected metres, the major axis ``angle_deg``
    counterclockwise from the local east (so it points the same way on the ground in a polar view); an
    ``(n, 2)`` closed ring."""
    east, north, _ = local_frame(proj, lon, lat)
    x0, y0 = proj.forward(np.array([lon]), np.array([lat]))
    t = np.linspace(0.0, 2 * np.pi, n)
    a = np.deg2rad(angle_deg)
    along = np.cos(a) * east + np.sin(a) * north
    across = -np.sin(a) * east + np.cos(a) * north
    pts = (semi_major * np.cos(t))[:, None] * along + (semi_minor * np.sin(t))[:, None] * across
    return pts + np.array([x0[0], y0[0]])
