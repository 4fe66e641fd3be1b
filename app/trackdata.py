"""One data set prepared for the dashboard, shared by every session that shows it: the velocity table sorted by
track, the map's projected samples with their search tree, the land and graticule of the map, and the
first-look fits of every window (computed once in the background).
"""

from __future__ import annotations

import functools
import threading
import traceback
import weakref

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from driftspec.analysis.runs import run_bounds

from .geo import (
    choose_projection,
    data_extent,
    degree_ticks,
    graticule,
    label_points,
    land_polygons,
    lonlat_ranges,
    position_labels,
    widen_to_ratio,
)
from .jobs import Job, call_in_session

#: width / height of the maps' frames
MAP_RATIO = 1.5


class TrackData:
    """The prepared data of one file (or table), read-only once built; one instance serves many sessions."""

    def __init__(self, velocities: pd.DataFrame):
        v = velocities.sort_values(["id", "segment", "time"], kind="stable").reset_index(drop=True)
        v["id"] = v["id"].astype(str)
        self.vel = v
        ok = v["valid_velocity"].to_numpy() if "valid_velocity" in v else np.isfinite(v["u"].to_numpy())
        lon, lat = v["lon"].to_numpy(float), v["lat"].to_numpy(float)
        self.proj = choose_projection(lon, lat)
        self.central_lon = self.proj.central_lon
        x, y = self.proj.forward(lon, lat)
        codes, ids = pd.factorize(v["id"], sort=True)
        self.track_ids = list(ids)
        t_ns = v["time"].to_numpy().astype("datetime64[ns]").astype(np.int64)
        self.t0 = int(t_ns.min()) if len(t_ns) else 0
        self.points = pd.DataFrame({
            "x": x, "y": y, "lon": lon, "lat": lat,
            "speed": np.hypot(v["u"].to_numpy(float), v["v"].to_numpy(float)),
            "time": (t_ns - self.t0) / 86400e9, "track_code": codes.astype(np.int32), "t_ns": t_ns,
        })[ok].reset_index(drop=True)
        self.tree = cKDTree(self.points[["x", "y"]].to_numpy()) if len(self.points) else None
        starts, stops = run_bounds(codes)
        self.slices = {self.track_ids[codes[s]]: (s, e) for s, e in zip(starts, stops)}
        self.time_range = (pd.Timestamp(t_ns.min()), pd.Timestamp(t_ns.max())) if len(t_ns) else None
        self.extent = widen_to_ratio(*data_extent(self.proj, self.points["x"], self.points["y"]), MAP_RATIO)
        self._lock = threading.Lock()
        self.first_look: Job | None = None
        self._first_look_table: pd.DataFrame | None = None
        self._subscribers: weakref.WeakSet = weakref.WeakSet()
        self._rasters: dict = {}

    def track_velocity(self, track_id: str) -> pd.DataFrame:
        s, e = self.slices.get(track_id, (0, 0))
        return self.vel.iloc[s:e]

    @functools.cached_property
    def geography(self):
        """Land rings, graticule paths and graticule labels for the map's extent (projected)."""
        (x0, x1), (y0, y1) = self.extent
        lon_r, lat_r = lonlat_ranges(self.proj, (x0, x1), (y0, y1))
        land = land_polygons(self.proj, lon_r, lat_r)
        lines, labels = graticule(self.proj, lon_r, lat_r)
        return land, lines, labels

    @functools.cached_property
    def geography_xy(self):
        """Land and graticule as two (n, 2) arrays of projected points, their parts separated by NaN rows (drawn
        as one glyph each: one multi-part geometry renders in a third of the time of one per island)."""
        land, lines, _ = self.geography
        gap = np.full((1, 2), np.nan)
        land_xy = np.concatenate([q for r in land for q in (r, gap)])[:-1] if land else np.zeros((0, 2))
        grid_xy = np.concatenate([a for p in lines for a in (p, gap)]) if lines else np.zeros((0, 2))
        return land_xy, grid_xy

    def map_labels(self, view):
        """Degree labels for the view ``(xlim, ylim)``: axis ticks ``{position: label}`` for x and y (cylindrical
        views), and for polar views (no axis ticks) the graticule labels ``[(x, y, text)]`` inside the view."""
        (x0, x1), (y0, y1) = view
        xt, yt = degree_ticks(self.proj, (x0, x1), (y0, y1))
        if xt:
            return xt, yt, []
        _, lines, labels = self.geography
        return xt, yt, label_points(lines, labels, (x0, x1), (y0, y1))

    @functools.cached_property
    def picker_columns(self) -> dict:
        """A thinned copy of the samples (at most about 5,000) carrying the map's hover and box selection:
        projected ``x``, ``y``, ``lon``, ``lat`` (degrees), ``position`` (their label) and ``track``."""
        p = self.points
        step = max(1, len(p) // 5000)
        lon, lat = p["lon"].to_numpy()[::step], p["lat"].to_numpy()[::step]
        return {"x": p["x"].to_numpy()[::step], "y": p["y"].to_numpy()[::step], "lon": lon, "lat": lat,
                "position": position_labels(lat, lon),
                "track": np.asarray(self.track_ids, dtype=object)[p["track_code"].to_numpy()[::step]]}

    def raster(self, value: str, x_range, y_range, width: int, height: int, dates=None) -> np.ndarray:
        """The mean of ``value`` (a column of :attr:`points`: ``speed`` or ``time``) over the samples in each of
        ``height`` x ``width`` pixels covering ``x_range`` x ``y_range`` (rows from south to north, NaN where
        empty), spread where the samples are sparse (datashader's ``mean`` and ``dynspread``); only samples
        between the two ``dates`` when given. The map's own extent (without dates) is computed once and shared."""
        import datashader as dsh
        import datashader.transfer_functions as tf

        key = (value, tuple(x_range), tuple(y_range), width, height)
        shared = dates is None and key[1:3] == tuple(tuple(r) for r in self.extent)
        if shared and key in self._rasters:
            return self._rasters[key]
        pts = self.points
        if dates is not None:
            lo, hi = (pd.Timestamp(d).value for d in dates)
            t = pts["t_ns"].to_numpy()
            pts = pts[(t >= lo) & (t <= hi)]
        col = value if value in pts else "speed"
        canvas = dsh.Canvas(plot_width=width, plot_height=height, x_range=tuple(x_range), y_range=tuple(y_range))
        agg = tf.dynspread(canvas.points(pts, "x", "y", dsh.mean(col)), threshold=0.6, max_px=2)
        image = agg.values.astype(np.float32)
        if shared:
            self._rasters[key] = image
        return image

    # ------------------------------------------------------------------ first look
    def start_first_look(self, windows_of, spec) -> Job | None:
        """Fit every window of every track under ``spec`` once, in the background, for the parameter map that
        every session shows on opening. ``windows_of(track_id)`` lists a track's windows."""
        with self._lock:
            if self.first_look is None:
                windows = [w for tid in self.track_ids for w in windows_of(tid)]
                job = Job(windows, spec.to_json(), "rows", doc=None, on_update=self._notify, background=True,
                          cached=True, label="first look", key=("first look", spec.to_json()))
                self.first_look = job.start()
            return self.first_look

    def first_look_table(self) -> pd.DataFrame | None:
        """The first look's fits table once it is done: built once, shared (read-only) by every session."""
        job = self.first_look
        if job is None or job.status != "done" or job.result is None:
            return None
        with self._lock:
            if getattr(self, "_first_look_table", None) is None:
                self._first_look_table = pd.DataFrame([r for rows in job.result for r in rows])
            return self._first_look_table

    def subscribe(self, explorer) -> None:
        self._subscribers.add(explorer)

    def _notify(self, job):
        for ex in list(self._subscribers):
            try:
                call_in_session(ex.doc, functools.partial(ex.on_first_look, job))
            except Exception:  # noqa: BLE001 - one closed page must not stop the news reaching the others
                traceback.print_exc()
