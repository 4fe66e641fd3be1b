"""One data set prepared for the dashboard, shared by every session that shows it: the velocity table sorted by
track, the map's projected samples with their search tree, the land and graticule of the map, and the
first-look fits of every window (computed once in the background).
"""

from __future__ import annotations

import functools
import threading
import weakref

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from driftspec.analysis.runs import run_bounds

from .geo import choose_projection, data_extent, graticule, land_polygons, lonlat_ranges, widen_to_ratio
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

    # ------------------------------------------------------------------ first look
    def start_first_look(self, windows_of, spec) -> Job | None:
        """Fit every window of every track under ``spec`` once, in the background, for the parameter map that
        every session shows on opening. ``windows_of(track_id)`` lists a track's windows."""
        with self._lock:
            if self.first_look is None:
                windows = [w for tid in self.track_ids for w in windows_of(tid)]
                job = Job(windows, spec.to_json(), "rows", doc=None, on_update=self._notify, background=True,
                          label="first look", key=("first look", spec.to_json()))
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
            call_in_session(ex.doc, functools.partial(ex.on_first_look, job))
