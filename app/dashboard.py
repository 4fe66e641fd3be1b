"""The drifting-float explorer: a datashaded track map linked to the rotary spectrum and the fit of the
selected track's windows.

Reading guide
-------------
* :class:`~driftspec.app.state.ExplorerState` holds every choice the user makes; ``state.SETTINGS`` is the one
  list of settings from which the sidebar widgets, the URL and the fit key derive.
* :class:`Explorer` holds the job state: the current window's fit (``current_fit``, and ``current_anisotropic``
  with the anisotropic setting), the track's fits (``track_fits``), the fits of every window (``all_fits``), the
  pooled fits of the box-selected region (``region_fit``) and of each bin of the parameter map (``pooled_map``),
  status and progress. One watcher (``_on_settings``) reacts to a changed setting: it computes the new fit key,
  shows a cached fit or starts a background job (:mod:`driftspec.app.jobs`; :class:`TaskJob` runs a library
  function such as ``pool_fit`` there), and drops whatever an older job returns; ``_on_pooling`` does the same
  for the region and the parameter map's bins.
* One :class:`panel.viewable.Viewer` per panel (track map, velocity, spectrum, fit table, track summary,
  parameter map, dispersion), each depending by name on the parameters it draws.
* Map geometry (projection, degree ticks, graticule, land, bins) lives in :mod:`driftspec.app.geo`; the shared,
  read-only data of a file in :class:`~driftspec.app.trackdata.TrackData`.
"""

from __future__ import annotations

import functools
import threading
import time

import holoviews as hv
import numpy as np
import pandas as pd
import panel as pn
import param
from bokeh.models.widgets.tables import HTMLTemplateFormatter

from driftspec.analysis.conventions import tidal_frequencies_cpd
from driftspec.analysis.fitting import FitSpec, fit_window
from driftspec.analysis.fitting.anisotropy import AnisotropicFit
from driftspec.analysis.models import get_family
from driftspec.analysis.regional import default_params, grid_fits
from driftspec.analysis.regional.pooled import pool_fit
from driftspec.analysis.tracks.pipeline import load_velocities
from driftspec.analysis.tracks.windows import iter_windows
from driftspec.analysis.wording import counted

from .geo import (
    bin_cells,
    bin_quads,
    box_label,
    ellipse_ring,
    lat_label,
    lon_label,
    map_bin_edges,
    position_labels,
    widen_to_ratio,
)
from .jobs import Job
from .plots import (
    ComplementaryFigure,
    RotarySpectrumFigure,
    TrackMapFigure,
    VelocityFigure,
    on_page,
    parameter_map_figure,
)
from .state import ANALYSIS, FIT_PARAMS, URL_PARAMS, ExplorerState, parse_query, widgets_for
from .trackdata import MAP_RATIO, TrackData

hv.extension("bokeh", logo=False, inline=True)  # BokehJS from the package, not a CDN: works offline
pn.extension("tabulator", inline=True)

CAUTION = (
    "**A statistical description of observed currents, not a drift forecast.** The fits describe how "
    "past currents varied; they do not say where an object will drift. Do not use this tool for search "
    "and rescue or navigation: defer to the responsible authorities."
)
#: colours of our own: clockwise rust, counterclockwise teal, model ink
COLOURS = {"cw": "#b5522b", "ccw": "#1f7a7a", "model": "#20203a", "band": "#9aa0b4", "track": "#ff2d7a",
           "tide": "#7a6a00", "inertial": "#6a2fb5", "land": "#d9d4c7", "coast": "#6b6b6b", "grid": "#8c96a0"}
MIN_COVERAGE = 0.5
#: the controls' column, in the page's sidebar and beside the dashboard in a notebook (its settings are 285 px wide
#: with their margins inside)
SIDEBAR_WIDTH = 320
#: the track map's frame, screen pixels
MAP_HEIGHT = 480
MAP_WIDTH = int(MAP_HEIGHT * MAP_RATIO)


def spec_of(st: ExplorerState) -> FitSpec:
    """The fit specification of a state's settings (anisotropic fits need the debiased estimator: with another
    estimator the anisotropic setting waits, and the fit table says so)."""
    return FitSpec(models="auto" if st.model == "auto" else (st.model,), estimator=st.estimator,
                   band="auto" if st.auto_band else st.max_freq,
                   observation=st.observation, taper=st.taper, inertial_frequency=st.inertial,
                   anisotropic=st.anisotropic and st.estimator == "debiased")


#: fewest windows of a bin for its pooled fit (as ``pool_map``)
POOL_MIN_WINDOWS = 2


class TaskJob(Job):
    """A :class:`~driftspec.app.jobs.Job` whose tasks run ``func(item, spec)`` in the shared workers: ``func`` a
    picklable function of :mod:`driftspec.analysis` (``fit_window``, ``pool_fit``), ``spec`` a FitSpec."""

    def __init__(self, items, spec: FitSpec, func, **params):
        super().__init__(items, spec, "rows", **params)
        self._func = func


class Explorer(param.Parameterized):
    """The dashboard for one data set: state, jobs and results.

    Parameters
    ----------
    velocities : pandas.DataFrame or TrackData
        Gridded velocities (``load_velocities`` output), or a prepared, shared :class:`TrackData`.
    fits : pandas.DataFrame, optional
        A fits table for the parameter map and for colouring the tracks.
    state : ExplorerState, optional
    title : str
    """

    current_window = param.Parameter(default=None, constant=True, doc="The current Window")
    current_fit = param.Parameter(default=None, constant=True,
                                  doc="FitResult of the current window under the current settings (None while "
                                      "it is being fitted); ``current_fit.window_start`` names the window")
    track_fits = param.DataFrame(default=None, allow_None=True, constant=True,
                                 doc="Fits-table rows of every window of the selected track, current settings")
    all_fits = param.DataFrame(default=None, allow_None=True, constant=True,
                               doc="Fits of every window (first look, --fits, or Fit every window)")
    progress = param.Integer(default=0, bounds=(0, 100), constant=True)
    busy = param.Boolean(default=False, constant=True, doc="A job is queued or running (progress bar and Cancel shown)")
    status_text = param.String(default="", constant=True)
    message = param.String(default="", constant=True, doc="One-line notice (e.g. rejected URL values)")
    refit_ms = param.Number(default=np.nan, constant=True, doc="Time from a change to its fit on screen, ms")
    dispersion = param.Parameter(default=None, doc="Observed dispersion in the region (DispersionResult)")
    current_anisotropic = param.Parameter(
        default=None, constant=True, doc="AnisotropicFit of the current window (with the anisotropic setting on)")
    region_fit = param.Parameter(
        default=None, constant=True, doc="PooledResult: one fit pooled over the box-selected region's windows under "
                                         "the current settings (None while it runs or with no region)")
    pooled_map = param.Parameter(
        default=None, constant=True, doc="The pooled fit of each bin of the parameter map: a dict with the key it "
                                         "was computed for, the bin edges, cells (iy, ix) and their PooledResults")

    def __init__(self, velocities, fits: pd.DataFrame | None = None, state: ExplorerState | None = None,
                 title: str = "driftspec", first_look: bool = False, **params):
        super().__init__(**params)
        self.closed = False  # the page was closed: nothing is drawn any more
        self.state = state or ExplorerState()
        self.title = title
        self.data = velocities if isinstance(velocities, TrackData) else TrackData(velocities)
        self.vel = self.data.vel
        self.track_ids = self.data.track_ids
        self.doc = pn.state.curdoc if pn.state.curdoc is not None and pn.state.curdoc.session_context else None
        self._window_cache: dict = {}
        self._fit_cache: dict = {}
        self._jobs: dict[str, Job | None] = {"current": None, "track": None, "all": None, "region": None, "map": None}
        self._aniso_cache: dict = {}
        self._region_fit_key = None  # the settings the shown region_fit was computed for
        self._map_layout = None  # bin edges and cells of the running pooled-map job
        self._job_started: dict[str, float] = {}
        self._cancel = threading.Event()  # set: this explorer starts no background work (scripts, tests)
        # user events may run in Panel's threads while job reports run on the loop: one at a time
        self._lock = threading.RLock()
        self._user_fits = False
        self._first_look = first_look
        if fits is not None and len(fits):
            self._set(all_fits=fits)
            self._user_fits = True
        self._refresh_param_choices()
        if not self.state.track or self.state.track not in self.track_ids:
            self.state.track = self.track_ids[0] if len(self.track_ids) else ""
        self.state.param.watch(self._on_settings, ["track", "window", *FIT_PARAMS])
        self.state.param.watch(self._on_pooling, ["region", "map_values", "bin_deg"])
        self._started = False

    def _set(self, **values):
        if self.closed:
            return
        with param.edit_constant(self):
            self.param.update(**values)

    def close(self, *_):
        """The page was closed: stop its jobs and draw nothing more. (A closed page's panes redrawn after its
        session ended rewrote style sheets that Panel shares between pages to Panel's CDN address, which the open
        pages then asked for.)"""
        self.closed = True
        self._cancel.set()
        for slot, job in self._jobs.items():
            if job is not None:
                job.cancel()
                self._jobs[slot] = None

    # ------------------------------------------------------------------ data
    def _refresh_param_choices(self):
        fits = self.all_fits
        params = default_params(fits) if fits is not None and len(fits) else ["matern_alpha"]
        self.state.param.map_param.objects = params
        if self.state.map_param not in params:
            self.state.map_param = params[0]

    def track_velocity(self, track_id: str) -> pd.DataFrame:
        """Rows of the velocity table for one track (the table is sorted by track)."""
        return self.data.track_velocity(track_id)

    def windows(self, track_id=None):
        st = self.state
        key = (track_id or st.track, st.window_days, st.overlap)
        if key not in self._window_cache:
            v = self.track_velocity(key[0])
            self._window_cache[key] = list(iter_windows(v, st.window_days, st.overlap, MIN_COVERAGE))
        return self._window_cache[key]

    def fit_spec(self):
        """The :class:`~driftspec.analysis.fitting.spec.FitSpec` of the current settings: the same object the
        command line builds, so a window fitted here and by ``driftspec fit`` gives the same numbers."""
        return spec_of(self.state)

    def current(self):
        ws = self.windows()
        return ws[min(self.state.window, len(ws) - 1)] if ws else None

    def fit_key(self, w, spec=None):
        """What a window's fit depends on: the window (track, start, length) and the fit specification."""
        return (w.track_id, w.start, w.n_samples, (spec or self.fit_spec()).to_json())

    def track_key(self):
        st = self.state
        return (st.track, st.window_days, st.overlap, self.fit_spec().to_json())

    def fit_current(self):
        """Fit (or fetch from cache) the current window with the current settings, here and now (blocking;
        for scripts and tests: the page fits in the background)."""
        w = self.current()
        if w is None:
            return None, None
        key = self.fit_key(w)
        if key not in self._fit_cache:
            self._store_fit(key, fit_window(w, self.fit_spec()))
        res = self._fit_cache[key]
        self._set(current_window=w, current_fit=res, current_anisotropic=self._aniso_cache.get(key))
        return w, res

    def _store_fit(self, key, results):
        """Cache a window's fit: the model's FitResult (with model ``auto`` the selected candidate's, or the one the
        selected anisotropic fit was made from), and its anisotropic fit when there is one."""
        results = results if isinstance(results, list) else [results]
        aniso = next((r for r in results if isinstance(r, AnisotropicFit)), None)
        iso = [r for r in results if not isinstance(r, AnisotropicFit)]
        base = aniso.model.removeprefix("anisotropic_") if aniso is not None and aniso.selected else None
        self._fit_cache[key] = next((r for r in iso if r.selected or r.model == base), iso[0])
        self._aniso_cache[key] = aniso

    # ------------------------------------------------------------------ pooled fits
    def pooled_spec(self) -> FitSpec:
        """The specification of the pooled fits: the current one, with the debiased Whittle likelihood (the one a
        pooled fit uses) and without the anisotropic candidate."""
        return self.fit_spec().replace(estimator="debiased", anisotropic=False)

    def region_windows(self) -> list:
        """Windows (current length and overlap) whose mean position is inside the box-selected region."""
        r = self.state.region
        if not r:
            return []
        lon0, lat0, lon1, lat1 = r
        out = []
        for tid in self.tracks_in_region():
            for w in self.windows(tid):
                lon = ((float(w.lon) - lon0 + 180) % 360) - 180 + lon0
                if min(lat0, lat1) <= float(w.lat) <= max(lat0, lat1) and min(lon0, lon1) <= lon <= max(lon0, lon1):
                    out.append(w)
        return out

    def region_key(self):
        st = self.state
        return ("region", tuple(st.region), st.window_days, st.overlap, self.pooled_spec().to_json())

    def map_bins(self):
        """The parameter map's bins and the windows of each: ``(lon_edges, lat_edges, {(iy, ix): [Window]})``, the
        windows (current length and overlap) of every track binned by their mean position; only bins with
        :data:`POOL_MIN_WINDOWS` or more windows (the others have no pooled fit)."""
        ws = [w for tid in self.track_ids for w in self.windows(tid)]
        if not ws:
            return None, None, {}
        lon = np.array([w.lon for w in ws], float)
        lat = np.array([w.lat for w in ws], float)
        lon_e, lat_e = map_bin_edges(lon, lat, self.data.central_lon, self.state.bin_deg)
        iy, ix = bin_cells(lon, lat, lon_e, lat_e)
        bins: dict = {}
        for w, i, j in zip(ws, iy, ix):
            if i >= 0:
                bins.setdefault((int(i), int(j)), []).append(w)
        return lon_e, lat_e, {k: bins[k] for k in sorted(bins) if len(bins[k]) >= POOL_MIN_WINDOWS}

    def map_key(self):
        st = self.state
        return ("map", st.bin_deg, st.window_days, st.overlap, self.pooled_spec().to_json())

    def fit_region(self):
        """Pool the region's windows here and now (blocking; for scripts and tests: the page pools in the
        background)."""
        ws = self.region_windows()
        res = pool_fit(ws, self.pooled_spec()) if ws else None
        self._region_fit_key = self.region_key()
        self._set(region_fit=res)
        return res

    def fit_pooled_map(self):
        """The pooled fit of every bin here and now (blocking; for scripts and tests)."""
        lon_e, lat_e, bins = self.map_bins()
        spec = self.pooled_spec()
        results = [pool_fit(ws, spec, min_windows=POOL_MIN_WINDOWS) for ws in bins.values()]
        self._set(pooled_map=self._pooled_map_of(self.map_key(), lon_e, lat_e, list(bins), results))
        return self.pooled_map

    @staticmethod
    def _pooled_map_of(key, lon_e, lat_e, cells, results):
        return {"key": key, "lon_edges": lon_e, "lat_edges": lat_e, "cells": list(cells), "results": list(results)}

    def _on_pooling(self, *events):
        if not self._started:
            return
        with self._lock:
            self._start_pooling()
            self._update_status()

    def _start_pooling(self):
        """Start the pooled fits the current settings ask for (the region's, the map's) unless known or running."""
        st = self.state
        if not st.region:
            if self._jobs["region"] is not None:
                self._jobs["region"].cancel()
                self._jobs["region"] = None
            self._set(region_fit=None)
        else:
            key = self.region_key()
            job = self._jobs["region"]
            known = self.region_fit is not None and self._region_fit_key == key
            if not known and (job is None or job.key != key):
                self._set(region_fit=None)
                ws = self.region_windows()
                self._launch_tasks("region", [ws] if ws else [], pool_fit, key, "region")
        if st.map_values == "pooled fit":
            key = self.map_key()
            job = self._jobs["map"]
            pm = self.pooled_map
            if (pm is None or pm["key"] != key) and (job is None or job.key != key):
                lon_e, lat_e, bins = self.map_bins()
                self._map_layout = (lon_e, lat_e, list(bins))
                job = self._launch_tasks("map", list(bins.values()),
                                         functools.partial(pool_fit, min_windows=POOL_MIN_WINDOWS), key, "pooled map")
                if not bins:  # nothing to pool: an empty map that says why
                    self._set(pooled_map=self._pooled_map_of(key, lon_e, lat_e, [], []))

    def _launch_tasks(self, slot, items, func, key, label, spec=None):
        old = self._jobs.get(slot)
        if old is not None:
            old.cancel()
        if self._cancel.is_set() or not items:
            self._jobs[slot] = None
            return None
        job = TaskJob(items, spec or self.pooled_spec(), func, doc=self.doc, on_update=self._on_job, label=label,
                      key=key, background=slot == "map")
        self._jobs[slot] = job
        self._job_started[slot] = time.perf_counter()
        return job.start()

    # ------------------------------------------------------------------ jobs
    def start(self):
        """Begin background work (first fit, track fits, the first look); called when the page is built."""
        if self._started:
            return
        self._started = True
        self.data.subscribe(self)
        if self._first_look and not self._cancel.is_set():
            job = self.data.start_first_look(self.windows, spec_of(ExplorerState()))
            if job is not None:
                self.on_first_look(job)
        self._on_settings()

    def _launch(self, slot, windows, kind, key, label):
        old = self._jobs.get(slot)
        if old is not None:
            old.cancel()
        if self._cancel.is_set() or not windows:
            self._jobs[slot] = None
            return None
        job = Job(windows, key[-1], kind, doc=self.doc, on_update=self._on_job, label=label, key=key,
                  own_process=self.state.estimator == "exact", background=slot == "all", cached=slot == "all")
        self._jobs[slot] = job
        self._job_started[slot] = time.perf_counter()
        return job.start()

    def _on_settings(self, *events):
        """A setting changed: show what is known for the new settings at once, fit the rest in the background."""
        if not self._started and not events:
            return
        with self._lock:
            self._settings_changed({e.name for e in events})

    def _settings_changed(self, names):
        w = self.current()
        if w is None:
            self._set(current_window=None, current_fit=None)
        else:
            key = self.fit_key(w)
            cached = self._fit_cache.get(key)
            self._set(current_window=w, current_fit=cached, current_anisotropic=self._aniso_cache.get(key))
            job = self._jobs["current"]
            if cached is None and (job is None or job.key != key or job.status in ("cancelled", "failed")):
                if self.fit_spec().anisotropic:  # every candidate, the anisotropic one included
                    self._launch_tasks("current", [w], fit_window, key, "current window", self.fit_spec())
                else:
                    self._launch("current", [w], "one", key, "current window")
            elif cached is not None and job is not None:
                job.cancel()
        if names != {"window"}:
            key = self.track_key()
            job = self._jobs["track"]
            if job is None or job.key != key:
                self._set(track_fits=None)
                self._launch("track", self.windows(), "rows", key, "whole track")
        if not names or names - {"track", "window"}:
            self._start_pooling()
        self._update_status()

    def _on_job(self, job):
        """A job reported (on this session's loop). Results of a job that is no longer current are dropped."""
        if self.closed:
            return
        with self._lock:
            self._job_reported(job)

    def _job_reported(self, job):
        slot = next((s for s, j in self._jobs.items() if j is job), None)
        if slot is None:
            return  # superseded: stale
        if job.status == "done" and job.result is not None:
            if slot == "current":
                self._store_fit(job.key, job.result[0])
                if self.current() is not None and self.fit_key(self.current()) == job.key:
                    self._set(current_fit=self._fit_cache[job.key], current_anisotropic=self._aniso_cache[job.key],
                              refit_ms=1e3 * (time.perf_counter() - self._job_started[slot]))
            elif slot == "region" and job.key == self.region_key():
                self._region_fit_key = job.key
                self._set(region_fit=job.result[0])
            elif slot == "map" and job.key == self.map_key():
                self._set(pooled_map=self._pooled_map_of(job.key, *self._map_layout, job.result))
            elif slot == "track" and job.key == self.track_key():
                self._set(track_fits=pd.DataFrame([r for rows in job.result for r in rows]))
            elif slot == "all":
                df = pd.DataFrame([r for rows in job.result for r in rows])
                if len(df):
                    self._user_fits = True
                    self._set(all_fits=df)
                    self._refresh_param_choices()
            self._jobs[slot] = None
        elif job.status in ("cancelled", "failed"):
            self._jobs[slot] = None
            if job.status == "failed":
                self._set(message=f"{job.label}: {job.message}")
        self._update_status(job)

    def on_first_look(self, job):
        """The shared first-look job reported: show its progress, and its fits when no others were chosen."""
        if self.closed:
            return
        if job.status == "done" and job.result is not None and not self._user_fits:
            df = self.data.first_look_table()
            if len(df):
                self._set(all_fits=df)
                self._refresh_param_choices()
        self._update_status(job if job.status == "running" else None)

    def _update_status(self, job=None):
        parts = []
        for slot, label in (("current", "fitting this window"), ("track", "fitting the whole track"),
                            ("all", "fitting every window")):
            j = self._jobs.get(slot)
            if j is not None:
                parts.append(f"{label}{' (exact: minutes)' if self.state.estimator == 'exact' else ''}: "
                             f"{j.n_done}/{j.n_total}" + _rate(j))
        j = self._jobs.get("region")
        if j is not None:
            parts.append(f"pooling the region's windows: {j.status}")
        j = self._jobs.get("map")
        if j is not None:
            parts.append(f"pooled map: {j.n_done}/{j.n_total} bins")
        fl = self.data.first_look
        if fl is not None and fl.status in ("queued", "running") and not self._user_fits:
            parts.append(f"first look, every window: {fl.n_done}/{fl.n_total}" + _rate(fl))
        if not parts and self.track_fits is not None and len(self.track_fits):
            tf = self.track_fits
            tf = model_rows(tf, self.state.model)
            parts.append(f"track fitted: {int((tf['status'] == 'ok').sum())}/{len(tf)} ok")
        lead = next((j for j in (self._jobs["all"], fl if not self._user_fits else None, self._jobs["map"],
                                 self._jobs["track"])
                     if j is not None and j.n_total), None)
        pct = int(100 * lead.n_done / lead.n_total) if lead is not None and lead.status != "done" else 100
        running = [j for j in (*self._jobs.values(), fl if not self._user_fits else None)
                   if j is not None and j.status in ("queued", "running")]
        self._set(status_text=" · ".join(parts), progress=pct, busy=bool(running))

    def fit_all(self, *_):
        ws = [w for tid in self.tracks_in_region() for w in self.windows(tid)]
        self._launch("all", ws, "rows", ("all", self.fit_spec().to_json()), "every window")
        self._update_status()

    def cancel(self, *_):
        for slot, job in self._jobs.items():
            if job is not None:
                job.cancel()
                self._jobs[slot] = None
        self._set(status_text="cancelled")

    def wait(self, timeout=120.0):
        """Block until the background jobs finish (for notebooks and scripts)."""
        deadline = time.time() + timeout
        for job in list(self._jobs.values()):
            if job is not None:
                job.wait(max(deadline - time.time(), 0))
        time.sleep(0.05)

    # ------------------------------------------------------------------ selection
    def select_at(self, x, y, tolerance=0.03):
        """Select the track nearest to a projected map position (a click)."""
        tree = self.data.tree
        if tree is None or x is None or not np.isfinite(x):
            return
        dist, i = tree.query([x, y])
        (x0, x1), _ = self.data.extent
        if dist > tolerance * (x1 - x0):
            return
        tid = self.track_ids[int(self.data.points["track_code"].iat[i])]
        if tid != self.state.track:
            self.state.param.update(track=tid, window=0)

    def select_box(self, bounds):
        if not bounds or bounds[0] == bounds[2] or bounds[1] == bounds[3]:
            return
        x0, y0, x1, y1 = bounds
        lon, lat = self.data.proj.inverse(np.array([x0, x1]), np.array([y0, y1]))
        self.state.region = [float(lon[0]), float(lat[0]), float(lon[1]), float(lat[1])]

    def tracks_in_region(self):
        r = self.state.region
        if not r:
            return self.track_ids
        lon0, lat0, lon1, lat1 = r
        v = self.vel
        lon = ((v["lon"].to_numpy() - lon0 + 180) % 360) - 180 + lon0
        inside = (v["lat"].between(min(lat0, lat1), max(lat0, lat1)).to_numpy()
                  & (lon >= min(lon0, lon1)) & (lon <= max(lon0, lon1)))
        return sorted(set(v.loc[inside, "id"].astype(str)))

    # ------------------------------------------------------------------ URL
    def apply_query(self, args: dict) -> None:
        """Apply URL values (strings); invalid ones are named in ``message`` and none of them is applied."""
        good, bad = parse_query(self.state, args)
        track = good.get("track")
        if track is not None and track not in self.track_ids:
            bad.append(f"track={track[:40]} (no such track)")
            good.pop("track")
        if good:
            self.state.param.update(**good)
        ws = self.windows()
        if "window" in good and ws and self.state.window >= len(ws):
            bad.append(f"window={good['window']} (this track has {counted(len(ws), 'window')})")
            self.state.window = len(ws) - 1
        if bad:
            self._set(message="Ignored invalid link values: " + ", ".join(bad))

    def url_query(self) -> str:
        from urllib.parse import urlencode

        vals = {}
        for p in URL_PARAMS:
            v = getattr(self.state, p)
            if isinstance(v, list):
                v = ",".join(f"{x:.4f}" for x in v)
            elif isinstance(v, bool):
                v = "true" if v else "false"
            vals[p] = str(v)
        return urlencode(vals)

    def _fits_bytes(self, fmt):
        import io

        df = self.all_fits if self.all_fits is not None else self.track_fits
        df = df if df is not None else pd.DataFrame()
        buf = io.BytesIO()
        if fmt == "csv":
            buf.write(df.to_csv(index=False).encode())
        else:
            df.to_parquet(buf, index=False)
        buf.seek(0)
        return buf

    def compute_dispersion(self, *_):
        from driftspec.analysis.regional.dispersion import single_particle_dispersion

        try:
            self.dispersion = single_particle_dispersion(self.vel, self.state.region or None, max_lag_days=20,
                                                         plateau_lags=(8, 16), n_boot=100)
            self._set(status_text=f"dispersion: {self.dispersion.n_tracks} track segments")
        except ValueError as exc:
            self.dispersion = None
            self._set(status_text=f"dispersion: {exc}")

    # ------------------------------------------------------------------ page
    def panel(self):
        """The whole dashboard as one Panel layout (for notebooks)."""
        self.start()
        return pn.Row(pn.Column(Controls(ex=self), width=SIDEBAR_WIDTH), self.main_area(), sizing_mode="stretch_width")

    def main_area(self):
        bar = pn.indicators.Progress(value=self.param.progress, max=100, sizing_mode="stretch_width", height=14,
                                     name="progress", visible=self.param.busy)
        status = pn.pane.Markdown(self.param.status_text, css_classes=["ds-status"])
        notice = pn.pane.Markdown(self.param.message, css_classes=["ds-message"], styles={"color": "#b5522b"})
        cancel = pn.widgets.Button(name="Cancel", button_type="warning", width=90, visible=self.param.busy)
        cancel.on_click(self.cancel)
        explore = pn.Column(TrackMap(ex=self), Summary(ex=self), VelocityView(ex=self),
                            # the fit under the spectra, not beside them: two spectra need about 660 px side by
                            # side, and beside them the table covered the counterclockwise one on a laptop screen or
                            # in a notebook's output
                            SpectrumView(ex=self), pn.Column(FitTable(ex=self), RegionFit(ex=self), max_width=900,
                                                             sizing_mode="stretch_width"),
                            sizing_mode="stretch_width", name="Explore")
        tabs = pn.Tabs(explore, ("Track summary", TrackSummary(ex=self)), ("Parameter map", ParameterMap(ex=self)),
                       ("Dispersion", DispersionView(ex=self)), ("About", about()), dynamic=True,
                       sizing_mode="stretch_width")
        return pn.Column(pn.Row(bar, cancel, sizing_mode="stretch_width"), status, notice, tabs,
                         sizing_mode="stretch_width")

    def template(self):
        """The dashboard in a page template (for ``panel serve`` and ``driftspec serve``)."""
        dark = self.state.theme == "dark"
        tpl = OfflineTemplate(
            title=self.title, sidebar=[Controls(ex=self)], main=[self.main_area()],
            header_background="#0d1620" if dark else "#1d2b3a", sidebar_width=SIDEBAR_WIDTH,
            theme="dark" if dark else "default", raw_css=[PRESENTATION_CSS],
            # no header busy spinner: Panel's busy state is one for the whole server, so every open page's spinner
            # turned (an animation redrawn by the browser many times a second) and was switched on and off whenever
            # any other session was handling an event; each page shows its own jobs' progress and status instead
            busy_indicator=None)
        self.start()
        if self.doc is not None:
            pn.state.on_session_destroyed(self.close)  # a closed page stops its jobs
        return tpl

    def sync_url(self):
        """Write the state to the page URL on every change (reading it is :meth:`apply_query`)."""
        loc = pn.state.location
        if loc is None:
            return

        def write(*_):
            loc.search = "?" + self.url_query()
        self.state.param.watch(write, list(URL_PARAMS))
        if any(k in loc.search for k in URL_PARAMS):
            write()  # the link now shows the state actually applied

    def servable(self, title=None):
        return self.template().servable(title=title or self.title)

    def _repr_mimebundle_(self, include=None, exclude=None):
        layout = self.panel()
        bundle = layout._repr_mimebundle_(include, exclude)
        from .notebook import NotebookOutput

        NotebookOutput.attach(layout, bundle)
        return bundle


def _rate(job) -> str:
    if job.n_done and np.isfinite(job.rate):
        return f" · {job.rate:.1f} windows/s · {job.eta_s:.0f} s left"
    return ""


# ====================================================================== what the views draw (arrays)
def model_rows(df: pd.DataFrame, model: str) -> pd.DataFrame:
    """The rows of a fits table that the model setting shows: the model's own (not those of its anisotropic version);
    with model ``auto`` every row (a table made with it holds each window's selected fit only, whichever it is)."""
    if not len(df) or "model" not in df or model == "auto":
        return df
    return df[df["model"] == model] if (df["model"] == model).any() else df


def model_velocity_covariance(aniso: AnisotropicFit, model: str, inertial: str) -> np.ndarray:
    """The 2 x 2 covariance of the ocean velocity ``(u, v)`` (m^2/s^2) under an anisotropic fit: the fitted
    parameters of the model (observation noise left out) in its anisotropic version, at lag zero."""
    from driftspec.analysis.models.anisotropic import anisotropic

    ocean = anisotropic(get_family(model, inertial))
    theta = np.array([aniso.params[n] for n in ocean.names], float)
    return ocean.uv_autocovariance(theta, [0.0], aniso.context)[0]


def variance_ellipse_axes(cov) -> tuple[float, float, float]:
    """Standard deviations along and across the major axis (m/s) and the axis's angle (degrees counterclockwise
    from east) of a velocity covariance."""
    from driftspec.analysis.fitting.anisotropy import principal_axes

    major, minor, angle = principal_axes(cov)
    return float(np.sqrt(max(major, 0.0))), float(np.sqrt(max(minor, 0.0))), float(angle)


def complementary_curves(aniso: AnisotropicFit):
    """The complementary (relation) spectrum of an anisotropic fit's window over its band: frequencies ``f > 0``
    (cpd), the observed ``|J(f) J(-f)|`` and the fitted model's expected ``|E[J(f) J(-f)]|`` ((m/s)^2/cpd)."""
    from driftspec.analysis.spectral.bivariate import expected_matrix

    win = aniso.window
    em = expected_matrix(aniso.family, aniso.theta, win, aniso.context, jacobian=False)
    o = np.argsort(win.freq_cpd)
    return win.freq_cpd[o], np.abs(win.i_cross[o]), np.abs(em.cross[o])


def bin_variance_ellipses(vel: pd.DataFrame, lon_edges, lat_edges) -> pd.DataFrame:
    """Velocity variance ellipse of each bin from its samples: the covariance of ``(u, v)`` about the bin's mean
    velocity (``cov_uu``, ``cov_vv``, ``cov_uv``, m^2/s^2, normalised by the count ``n``) and its principal axes
    (:func:`driftspec.analysis.tracks.ellipse.ellipse_from_covariance`); one row per bin with 3 or more samples."""
    from driftspec.analysis.tracks.ellipse import ellipse_from_covariance

    u, v = vel["u"].to_numpy(float), vel["v"].to_numpy(float)
    ok = np.isfinite(u) & np.isfinite(v)
    if "valid_velocity" in vel:
        ok &= vel["valid_velocity"].to_numpy(bool)
    iy, ix = bin_cells(vel["lon"].to_numpy(float)[ok], vel["lat"].to_numpy(float)[ok], lon_edges, lat_edges)
    inside = iy >= 0
    frame = pd.DataFrame({"iy": iy[inside], "ix": ix[inside], "u": u[ok][inside], "v": v[ok][inside]})
    if not len(frame):
        return pd.DataFrame(columns=["iy", "ix", "n", "cov_uu", "cov_vv", "cov_uv"])
    frame["uu"], frame["vv"], frame["uv"] = frame["u"] ** 2, frame["v"] ** 2, frame["u"] * frame["v"]
    g = frame.groupby(["iy", "ix"])
    m = g.mean()
    out = pd.DataFrame({"n": g.size(), "cov_uu": m["uu"] - m["u"] ** 2, "cov_vv": m["vv"] - m["v"] ** 2,
                        "cov_uv": m["uv"] - m["u"] * m["v"]}).reset_index()
    out = out[out["n"] >= 3].reset_index(drop=True)
    e = ellipse_from_covariance(out["cov_uu"], out["cov_vv"], out["cov_uv"])
    for k, val in e.items():
        out[k] = np.asarray(val, float)
    return out


# ====================================================================== views
class View(pn.viewable.Viewer):
    """A panel of the page drawing from one Explorer."""

    ex = param.ClassSelector(class_=Explorer)
    state = param.ClassSelector(class_=ExplorerState)

    def __init__(self, **params):
        super().__init__(**params)
        if self.state is None:
            self.state = self.ex.state

    def ink(self):
        return "#e6e6f0" if self.state.theme == "dark" else COLOURS["model"]

    def fontscale(self):
        return 1.8 if self.state.presentation else 1.0


class LiveView(View):
    """A view whose Bokeh plot is built once per page and then updated in place (:mod:`driftspec.app.plots`):
    ``_build`` makes the plot, ``_draw`` puts the current data into it; changes of the parameters named in
    ``_watch`` redraw, presentation mode and theme rebuild."""

    def __init__(self, **params):
        super().__init__(**params)
        self._pending = False
        self._pane = pn.pane.Bokeh(**self._pane_sizing)
        self._rebuild()
        for owner, names in self._watch():
            owner.param.watch(self._redraw, names)
        self.state.param.watch(self._rebuild, ["presentation", "theme"])

    #: how the plot's pane is sized (the plots stretch to the page's width; the map keeps its frame)
    _pane_sizing = {"sizing_mode": "stretch_width"}

    def _watch(self):
        return []

    def _rebuild(self, *_):
        self._pane.object = self._build()
        self._draw()

    def _redraw(self, *_):
        """Redraw once for a burst of changes, on the page's session (see :func:`driftspec.app.plots.on_page`)."""
        if self._pending or self.ex.closed:
            return
        self._pending = True

        def apply():
            self._pending = False
            self._draw()
            doc = self._pane.object.document
            if doc is not None and getattr(doc, "session_context", None) is None:
                pn.io.push_notebook(self._pane, *self._extra_panes())  # a notebook: send the change
        on_page(self._pane.object, apply)

    def _extra_panes(self):
        return []

    def __panel__(self):
        return self._pane


#: the colour bar's title for each value the track map can show
MAP_VALUE_LABELS = {"speed": "speed (m/s)", "time": "days since first fix"}


class TrackMap(LiveView):
    """All tracks as a raster of a value per pixel (datashader), over land and graticule; a click selects a track,
    box select sets the region, zooming redraws the raster for the new view."""

    pointer_x = param.Number(default=np.nan, doc="Projected x of the pointer over the map (for the readout)")
    pointer_y = param.Number(default=np.nan)
    _pane_sizing = {}

    def __init__(self, **params):
        data = params["ex"].data
        self.date_range = pn.widgets.DatetimeRangeSlider(
            name="Dates shown on the map", start=data.time_range[0], end=data.time_range[1],
            value=data.time_range, step=86400000) if data.time_range else None
        self._view = data.extent  # the (x, y) ranges the raster covers
        self._raster_key = None
        self._last_move = 0.0
        super().__init__(**params)
        if self.date_range is not None:
            self.date_range.param.watch(self._redraw, "value")
        # the readout under the map: one text pane given new text as the pointer moves
        self._readout = pn.pane.Markdown(self.readout_text(), css_classes=["ds-readout"], margin=(10, 10, 4, 10))
        self.param.watch(self._update_readout, ["pointer_x", "pointer_y"])

    def _watch(self):
        return [(self.state, ["track", "region", "color_by", "anisotropic"]),
                (self.ex, ["current_anisotropic", "current_window"])]

    def _build(self):
        from bokeh.events import MouseMove, RangesUpdate, SelectionGeometry, Tap

        data = self.ex.data
        land_xy, grid_xy = data.geography_xy
        xt, yt, labels = data.map_labels(data.extent)
        self._fig = TrackMapFigure(extent=data.extent, frame_width=MAP_WIDTH, frame_height=MAP_HEIGHT,
                                   colours=COLOURS, land_xy=land_xy, grid_xy=grid_xy, grid_labels=labels,
                                   ticks=(xt, yt), picker=data.picker_columns, clabel=self._clabel())
        self._raster_key = None
        fig = self._fig.figure
        for event, handler in ((Tap, lambda e: self.ex.select_at(e.x, e.y)), (SelectionGeometry, self._on_box),
                               (RangesUpdate, self._on_ranges), (MouseMove, self._on_move)):
            fig.on_event(event, self._in_session(handler))
        return fig

    def _in_session(self, handler):
        """``handler`` of a Bokeh event run as Panel runs its own callbacks, with the page's document current (the
        panes it redraws then resolve their style sheets for this page: without it, those of the status and
        summary panes pointed to Panel's CDN)."""
        from panel.io.state import set_curdoc

        def run(event):
            doc = self._fig.figure.document
            if self.ex.closed:
                return
            if doc is None:
                handler(event)
                return
            with set_curdoc(doc):
                handler(event)
        return run

    def _clabel(self):
        return MAP_VALUE_LABELS.get(self.state.color_by, self.state.color_by)

    def _draw(self):
        ex, st, data, fig = self.ex, self.state, self.ex.data, self._fig
        dates = tuple(self.date_range.value) if self.date_range is not None else None
        key = (st.color_by, dates, self._view)
        if key != self._raster_key:
            # the map's own extent over every date is the same on every page: computed once, shared
            full = dates is None or dates == tuple(data.time_range)
            image = data.raster(st.color_by, *self._view, MAP_WIDTH, MAP_HEIGHT, None if full else dates)
            fig.show_raster(image, *self._view, self._clabel())
            self._raster_key = key
        v = ex.track_velocity(st.track)
        fig.show_track(*data.proj.forward(v["lon"].to_numpy(), v["lat"].to_numpy()))
        if st.region:
            lon0, lat0, lon1, lat1 = st.region
            x, y = data.proj.forward(np.array([lon0, lon1]), np.array([lat0, lat1]))
            fig.show_region((x[0], y[0], x[1], y[1]))
        else:
            fig.show_region(None)
        fig.show_ellipse(*self._anisotropy_ellipse(ex.current_anisotropic, ex.current_window))

    def _anisotropy_ellipse(self, aniso, window):
        """The fitted model's velocity variance ellipse at the window's mean position (an anisotropic fit), with
        its numbers for the hover and the text beside it: ``(ring, values, text, solid)``, or ``(None,)``."""
        st = self.state
        if (aniso is None or window is None or aniso.family is None or not st.anisotropic
                or not np.all(np.isfinite(list(aniso.params.values())))):
            return (None,)
        model = aniso.model.removeprefix("anisotropic_")  # with model auto, the selected candidate's version
        inertial = "follow-latitude" if "inertial_frequency_offset" in aniso.params else "free"  # as fitted (auto)
        sd_major, sd_minor, angle = variance_ellipse_axes(model_velocity_covariance(aniso, model, inertial))
        (x0, x1), _ = self.ex.data.extent
        scale = 0.06 * (x1 - x0) / max(sd_major, 1e-12)  # the major axis spans an eighth of the map
        ring = ellipse_ring(self.ex.data.proj, float(window.lon), float(window.lat), scale * sd_major,
                            scale * sd_minor, angle)
        rho, p = aniso.params["anisotropy"], aniso.isotropy_pvalue
        chosen = getattr(aniso, "selected", False)
        text = (f"ρ {rho:.2f} · {sd_major:.3f}/{sd_minor:.3f} m/s along {angle:.0f}° · isotropy p {p:.2g}"
                + ("" if chosen else " (not rejected)"))
        values = {"sd_major": sd_major, "sd_minor": sd_minor, "angle": angle, "rho": rho, "pvalue": p}
        return ring, values, text, bool(chosen)

    def _on_box(self, event):
        g = event.geometry
        if event.final and g.get("type") == "rect":
            self.ex.select_box((g["x0"], g["y0"], g["x1"], g["y1"]))

    def _on_ranges(self, event):
        if None in (event.x0, event.x1, event.y0, event.y1):
            return
        self._view = ((float(event.x0), float(event.x1)), (float(event.y0), float(event.y1)))
        self._redraw()

    def _on_move(self, event):
        now = time.monotonic()  # the readout follows the pointer at most ten times a second
        if now - self._last_move >= 0.1:
            self._last_move = now
            self.param.update(pointer_x=event.x, pointer_y=event.y)

    def readout_text(self) -> str:
        """What the map's readout line says about the point nearest the pointer."""
        x, y = self.pointer_x, self.pointer_y
        data = self.ex.data
        if data.tree is None or x is None or not np.isfinite(x):
            return "Hover over the map for track, time and value; click a track to select it."
        _, i = data.tree.query([x, y])
        p = data.points.iloc[int(i)]
        col = self.state.color_by if self.state.color_by in data.points else "speed"
        when = pd.Timestamp(int(p["t_ns"])).strftime("%Y-%m-%d %H:%M")
        lon, lat = data.proj.inverse(np.array([x]), np.array([y]))
        return (f"**{self.ex.track_ids[int(p['track_code'])]}** · {when} UTC · {col} = {p[col]:.4g} · "
                f"{lat_label(round(float(lat[0]), 2))} {lon_label(round(float(lon[0]), 2))}")

    def _update_readout(self, *_):
        self._readout.object = self.readout_text()

    def __panel__(self):
        return pn.Column(self._pane, self._readout, sizing_mode="stretch_width")


class Summary(View):
    """One line saying what is selected (also what a browser test reads), its text updated in place."""

    def __init__(self, **params):
        super().__init__(**params)
        self._pane = pn.pane.Markdown(self.text(), css_classes=["ds-summary"], sizing_mode="stretch_width")
        self.state.param.watch(self._update, ["track", "window", "window_days", "overlap", "model", "estimator",
                                              "region"])

    def _update(self, *_):
        self._pane.object = self.text()

    def text(self) -> str:
        ex, st = self.ex, self.state
        ws = ex.windows()
        cur = ex.current()
        when = f" ({cur.start:%Y-%m-%d} to {cur.end:%Y-%m-%d})" if cur is not None else ""
        region = ""
        if st.region:
            passing = counted(len(ex.tracks_in_region()), "track")
            region = f" · region {box_label(st.region)} ({passing} pass{'es' if passing.startswith('1 ') else ''} " \
                     "through it)"
        return (f"**Track {st.track}** · window {min(st.window, max(len(ws) - 1, 0)) + 1} of {len(ws)}{when} · "
                f"{counted(len(ws), 'window')} of {st.window_days:g} days · model {st.model} · {st.estimator} "
                "estimator" + region)

    def __panel__(self):
        return self._pane


class VelocityView(LiveView):
    """The selected track's velocity, its windows shaded and the current one marked."""

    def _watch(self):
        return [(self.state, ["track", "window", "window_days", "overlap"])]

    def _build(self):
        self._fig = VelocityFigure(COLOURS, self.fontscale())
        return self._fig.figure

    def _draw(self):
        ex, st = self.ex, self.state
        ws = ex.windows()
        self._fig.show(f"{st.track}: velocity; {counted(len(ws), 'window')} of {st.window_days:g} days",
                       ex.track_velocity(st.track), ws, ex.current())


class SpectrumView(LiveView):
    """Rotary spectra of the current window (clockwise and counterclockwise), with the fitted model; under them,
    with the anisotropic setting, the complementary spectrum of the anisotropic fit."""

    def __init__(self, **params):
        self._note = pn.pane.Markdown("No window of this length with enough valid samples on this track.",
                                      visible=False)
        self._comp_pane = pn.pane.Bokeh(sizing_mode="stretch_width")
        # the plots are shown and hidden through plain columns around them: setting ``visible`` on a Bokeh pane
        # makes Panel copy the plot's properties back into the pane, which fails on the style sheets the page gave
        # the plot (a TypeError that stopped the redraw half way, once per page)
        self._box = pn.Column(sizing_mode="stretch_width")
        self._comp_box = pn.Column(self._comp_pane, sizing_mode="stretch_width", visible=False)
        self._comp = None
        self._spectra_of = None  # the window whose spectra the plot shows
        super().__init__(**params)
        self._box.append(self._pane)

    def _watch(self):
        return [(self.ex, ["current_window", "current_fit", "current_anisotropic"]), (self.state, ["anisotropic"])]

    def _build(self):
        self._fig = RotarySpectrumFigure(COLOURS, self.ink(), tidal_frequencies_cpd(), self.fontscale())
        self._comp = None
        self._comp_pane.object = None
        return self._fig.layout

    def _draw(self):
        w, res = self.ex.current_window, self.ex.current_fit
        self._note.visible = w is None
        self._box.visible = w is not None
        if w is not None:
            self._fig.show(w, res)
        a = self.ex.current_anisotropic
        shown = (w is not None and self.state.anisotropic and a is not None and a.window is not None
                 and a.family is not None and np.all(np.isfinite(list(a.params.values()))))
        if shown:
            if self._comp is None:
                self._comp = ComplementaryFigure(COLOURS, self.fontscale())
                self._comp.show(*complementary_curves(a), a.params["anisotropy"], a.isotropy_pvalue)
                self._comp_pane.object = self._comp.figure
            else:
                self._comp.show(*complementary_curves(a), a.params["anisotropy"], a.isotropy_pvalue)
        self._comp_box.visible = bool(shown)

    def _extra_panes(self):
        return [self._comp_pane]

    def __panel__(self):
        return pn.Column(self._note, self._box, self._comp_box, sizing_mode="stretch_width",
                         css_classes=["ds-spectra"])


#: significant digits of the numbers in the fit tables (readable on a shared screen; the table keeps every digit,
#: the browser rounds them for display)
TABLE_DIGITS = 5
_ROUNDED = HTMLTemplateFormatter(
    template=f"<%= (value === null || value === undefined || !isFinite(value)) ? '–' : "
             f"Number(Number(value).toPrecision({TABLE_DIGITS})) %>")
#: how the fit tables show numbers: to ``TABLE_DIGITS`` significant digits, "–" where there is none
PLAIN_NUMBERS = {"value": _ROUNDED, "std. error": _ROUNDED}


#: the fit table while there is no fit to show: its header only
_EMPTY_FIT_TABLE = pd.DataFrame(columns=["parameter", "value", "std. error", "unit", "note"])
#: units as the README's data dictionary writes them (the files keep UDUNITS strings, in which a frequency in cycles
#: per day and a damping rate per day are both "day-1")
_READABLE_UNITS = {"m2 s-2": "m²/s²", "m2 s-1": "m²/s", "day-1": "1/day", "degree": "degrees"}


def bound_notes(res) -> dict:
    """``{parameter: note}`` for the parameters a fit (window, anisotropic or pooled) ended on: which bound and its
    value where the fit knows its family's bounds (a standard error there is no standard error), and a position
    noise below what the band detects."""
    notes = {}
    if "position noise below detection" in (res.message or ""):
        notes["position_noise"] = "below detection"
    if res.status != "at_bound" or "at bound: " not in (res.message or ""):
        return notes
    on = {n.strip() for n in res.message.split("at bound: ", 1)[1].split(";")[0].split(",")}
    family = getattr(res, "family", None)
    bounds = dict(zip(family.names, family.bounds(getattr(res, "context", None)))) if family is not None else {}
    for name in on & set(res.params):
        if name not in bounds:
            notes[name] = "at a bound"
            continue
        lo, hi = bounds[name]
        v = res.params[name]
        lower = abs(v - lo) <= abs(hi - v)
        notes[name] = f"at {'lower' if lower else 'upper'} bound ({lo if lower else hi:g})"
    return notes


def _se_shown(res, name, notes):
    """A parameter's standard error for a table, blank (NaN) where the fit ended on a bound."""
    return np.nan if "bound" in notes.get(name, "") else res.stderr.get(name, np.nan)


def p_text(p: float) -> str:
    """A p-value as people read it: ``p = 0.042``, ``p < 0.001``, or ``p –`` when there is none."""
    if not np.isfinite(p):
        return "p –"
    return "p < 0.001" if p < 0.001 else f"p = {p:.3f}"


def readable_unit(name: str, unit: str) -> str:
    """The unit of column ``name`` for people: ``cpd`` for frequencies, ``1/day`` for damping rates, ``m²/s``..."""
    if unit == "day-1" and "frequency" in name:
        return "cpd"
    return _READABLE_UNITS.get(unit, unit)


class FitTable(View):
    """Parameters of the current window's fit, with status, goodness of fit and timing; under them, with the
    anisotropic setting, the anisotropic fit's test and diffusivity tensor.

    The page holds one status text and one table of each kind, and a new fit puts new text and rows into them:
    no new panes for the browser to build and lay out at every change."""

    def __init__(self, **params):
        super().__init__(**params)
        self.info = pn.pane.Markdown("", css_classes=["ds-fitinfo"], sizing_mode="stretch_width")
        # the fit table is always shown, empty (its header only) while the window is being fitted: hidden until
        # its fit arrived, it once stayed hidden for 90 s in a CI run (cause not found: the fit never reported, or
        # the table built hidden was never drawn), and showing and hiding it made the page below jump at every refit
        self.params_table = pn.widgets.Tabulator(
            _EMPTY_FIT_TABLE, show_index=False, disabled=True, layout="fit_data_fill", formatters=PLAIN_NUMBERS,
            sizing_mode="stretch_width", name="fit-table")
        self._table_filled = False
        self.anisotropic_info = pn.pane.Markdown("", css_classes=["ds-aniso-info"], sizing_mode="stretch_width",
                                                 visible=False)
        self.anisotropic_table = pn.widgets.Tabulator(
            pd.DataFrame(columns=["quantity", "value", "std. error", "unit", "note"]), show_index=False, disabled=True,
            layout="fit_data_fill", formatters=PLAIN_NUMBERS, sizing_mode="stretch_width",
            name="anisotropic-fit-table", visible=False)
        self.ex.param.watch(self._update, ["current_fit", "current_window", "current_anisotropic"])
        self.state.param.watch(self._update, ["anisotropic", "estimator"])
        self._update()

    def _update(self, *_):
        ex = self.ex
        w, res = ex.current_window, ex.current_fit
        if (w is None or res is None) and self._table_filled:
            self.params_table.value = _EMPTY_FIT_TABLE
            self._table_filled = False
        if w is None:
            self.info.object = "No window to fit."
        elif res is None:
            slow = " (the exact estimator takes minutes; *Cancel* stops it)" if self.state.estimator == "exact" \
                else ""
            self.info.object = f"Fitting window {w.start:%Y-%m-%d} → {w.end:%Y-%m-%d}{slow} …"
        else:
            notes = bound_notes(res)
            # a curvature at a bound is no standard error: the note says which bound instead (downloads keep the number)
            rows = [{"parameter": p.name, "value": res.params[p.name], "std. error": _se_shown(res, p.name, notes),
                     "unit": readable_unit(p.name, p.unit), "note": notes.get(p.name, "")}
                    for p in res.family.parameters] if res.family is not None else []
            rows.append({"parameter": "diffusivity", "value": res.diffusivity, "std. error": res.diffusivity_se,
                         "unit": readable_unit("diffusivity", "m2 s-1"), "note": ""})
            self.params_table.value = pd.DataFrame(rows)
            self._table_filled = True
            colour = "#1f7a4a" if res.ok else "#b5522b"
            chosen = f"**model** {res.selection}  \n" if self.state.model == "auto" and res.selection else ""
            self.info.object = (
                chosen + f"<span style='color:{colour}'>&#9679;</span> **status** {res.status} {res.message}  \n"
                f"**goodness of fit** {p_text(res.gof_pvalue)} · log L = {res.loglik:.1f} · AIC = {res.aic:.1f}  \n"
                f"window {w.start:%Y-%m-%d} → {w.end:%Y-%m-%d} · {res.n_valid}/{res.n_samples} valid · "
                f"{res.n_freq} frequencies fitted · local f = {w.inertial_frequency_cpd:.3f} cpd · "
                f"{res.stderr_method or 'no'} standard errors · refit {ex.refit_ms:.0f} ms")
        text, rows = self._anisotropic() if w is not None and res is not None else (None, None)
        self.anisotropic_info.visible = text is not None
        if text is not None:
            self.anisotropic_info.object = text
        self.anisotropic_table.visible = rows is not None
        if rows is not None:
            self.anisotropic_table.value = pd.DataFrame(rows)

    def _anisotropic(self):
        """The anisotropic fit's status text and rows (anisotropy and angle, the isotropy test, the diffusivity
        tensor): ``(text or None, rows or None)``."""
        st, a = self.state, self.ex.current_anisotropic
        if st.anisotropic and st.estimator != "debiased":
            return "Anisotropic fits use the debiased estimator: choose it to fit one.", None
        if not st.anisotropic or a is None:
            return None, None
        if a.family is None or not a.params or not np.all(np.isfinite(list(a.params.values()))):
            return f"**anisotropic fit** `{a.status}` {a.message}", None
        k = a.tensor
        notes = bound_notes(a)
        rows = [{"quantity": n, "value": a.params[n], "std. error": _se_shown(a, n, notes),
                 "unit": readable_unit(n, a.units.get(n, "")), "note": notes.get(n, "")}
                for n in ("anisotropy", "anisotropy_angle_deg")]
        rows += [{"quantity": "isotropy p-value", "value": a.isotropy_pvalue, "std. error": np.nan, "unit": "1"},
                 {"quantity": "diffusivity K_uu", "value": k[0, 0], "std. error": np.nan, "unit": "m²/s"},
                 {"quantity": "diffusivity K_vv", "value": k[1, 1], "std. error": np.nan, "unit": "m²/s"},
                 {"quantity": "diffusivity K_uv", "value": k[0, 1], "std. error": np.nan, "unit": "m²/s"},
                 {"quantity": "diffusivity_major", "value": a.diffusivity_major, "std. error": a.diffusivity_major_se,
                  "unit": "m²/s"},
                 {"quantity": "diffusivity_minor", "value": a.diffusivity_minor, "std. error": a.diffusivity_minor_se,
                  "unit": "m²/s"},
                 {"quantity": "diffusivity_angle_deg", "value": a.diffusivity_angle_deg,
                  "std. error": a.diffusivity_angle_deg_se, "unit": "degrees"}]
        for row in rows:
            row.setdefault("note", "")
        chosen = getattr(a, "selected", False)
        text = (f"**anisotropic fit** `{a.status}` · isotropy p = {a.isotropy_pvalue:.3g} "
                f"({'rejected at 1 %: the anisotropic model is selected' if chosen else 'not rejected at 1 %'}) · "
                f"ρ = {a.params['anisotropy']:.3f} along {a.params['anisotropy_angle_deg']:.1f}° · AIC {a.aic:.1f} "
                f"(isotropic {a.aic_isotropic:.1f})")
        return text, rows

    def __panel__(self):
        return pn.Column(self.info, self.params_table, self.anisotropic_info, self.anisotropic_table,
                         sizing_mode="stretch_width")


class RegionFit(View):
    """One fit pooled over the box-selected region's windows: shared estimates with standard errors, counts and
    the heterogeneity test (:func:`driftspec.analysis.regional.pooled.pool_fit`)."""

    @param.depends("ex.region_fit", "state.region")
    def table(self):
        ex, st = self.ex, self.state
        if not st.region:
            return pn.pane.Markdown("Box-select a region on the map for one fit pooled over its windows.",
                                    css_classes=["ds-region-fit"])
        r = ex.region_fit
        box = box_label(st.region, digits=4)
        if r is None:
            n = len(ex.region_windows())
            text = (f"Pooling the {counted(n, 'window')} of the region {box} …" if n else
                    f"No window of {st.window_days:g} days has its mean position in the region {box}.")
            return pn.pane.Markdown(text, css_classes=["ds-region-fit"])
        head = (f"**Pooled fit of the region** {box} · `{r.status}` {r.message}  \n"
                f"{counted(r.n_windows, 'window')} of {counted(r.n_tracks, 'track')} ({r.n_skipped} not fittable) · "
                f"model {r.model}, "
                f"shared shape, amplitudes per window · {r.stderr_method or 'no'} standard errors  \n"
                f"heterogeneity between {r.heterogeneity_groups or 'groups'}: statistic "
                f"{r.heterogeneity_statistic:.3f}, df {r.heterogeneity_df:g}, p = {r.heterogeneity_pvalue:.3g}")
        if st.estimator != "debiased":
            head += "  \n(pooled fits use the debiased Whittle likelihood whatever the estimator setting)"
        info = pn.pane.Markdown(head, css_classes=["ds-region-fit"])
        if not r.params:
            return info
        notes = bound_notes(r)
        rows = [{"parameter": k, "value": v, "std. error": _se_shown(r, k, notes),
                 "unit": readable_unit(k, r.units.get(k, "")), "note": notes.get(k, "")}
                for k, v in r.params.items()]
        table = pn.widgets.Tabulator(pd.DataFrame(rows), show_index=False, disabled=True, layout="fit_data_fill",
                                     formatters=PLAIN_NUMBERS, sizing_mode="stretch_width", name="region-fit-table",
                                     css_classes=["ds-region-table"])
        return pn.Column(info, table, sizing_mode="stretch_width")

    def __panel__(self):
        return pn.Column(self.table, sizing_mode="stretch_width")


class TrackSummary(View):
    """Fitted parameters of every window of the selected track against time, with standard errors."""

    @param.depends("ex.track_fits", "state.presentation")
    def plot(self):
        df = self.ex.track_fits
        if df is None:
            return pn.pane.Markdown("Fitting the whole track in the background …", css_classes=["ds-track-summary"])
        df = model_rows(df, self.state.model)
        ok = df[df["status"] == "ok"] if len(df) else df
        if not len(ok):
            return pn.pane.Markdown("No ok fits on this track.", css_classes=["ds-track-summary"])
        fs = self.fontscale()
        # with model auto the windows' selected candidates differ: the richer family's parameters, where fitted
        # (and with inertial auto the parameters of either version: those present are plotted)
        inertial = "follow-latitude" if "inertial_frequency_offset" in ok and "inertial_frequency" not in ok else "free"
        fam = get_family("matern+inertial" if self.state.model == "auto" else self.state.model,
                         inertial if self.state.inertial == "auto" else self.state.inertial)
        mid = ok["window_start"] + (ok["window_end"] - ok["window_start"]) / 2
        plots = []
        for p in [n for n in fam.names if n in ok][:3] + ["diffusivity"]:
            if p not in ok:
                continue
            se = ok[p + "_se"] if p + "_se" in ok else np.zeros(len(ok))
            bars = hv.ErrorBars((mid, ok[p], se), "time", [p, p + "_se"])
            pts = hv.Scatter((mid, ok[p]), "time", p)
            plots.append((bars * pts).opts(hv.opts.Scatter(size=6, color=COLOURS["ccw"]),
                                           hv.opts.Overlay(responsive=True, height=190, fontscale=fs, title=p)))
        text = (f"{len(ok)} ok of {counted(len(df), 'window')} · {self.state.window_days:g}-day windows · "
                f"model {self.state.model}")
        if self.state.model == "auto" and "model" in df:  # which candidate each window kept
            text += " (" + ", ".join(f"{m} selected in {counted(c, 'window')}"
                                     for m, c in df["model"].astype(str).value_counts().items()) + ")"
        return pn.Column(pn.pane.Markdown(text, css_classes=["ds-track-summary"]),
                         pn.pane.HoloViews(hv.Layout(plots).cols(2), sizing_mode="stretch_width"),
                         sizing_mode="stretch_width")

    def __panel__(self):
        # drawn when its tab is first shown (not on every new track fit of a page that never shows it)
        return pn.Column(pn.panel(self.plot, lazy=True), sizing_mode="stretch_width")


def _bin_columns(quads, lon_e, lat_e, i, j) -> dict:
    """Outline (projected ``xs``, ``ys``), centre (``lon``, ``lat`` in degrees, longitude in -180..180) and its
    label (``centre``) of the map bins at rows ``i`` and columns ``j``."""
    lon = (0.5 * (lon_e[j] + lon_e[j + 1]) + 180) % 360 - 180
    lat = 0.5 * (lat_e[i] + lat_e[i + 1])
    return {"xs": [quads[a][c][:, 0] for a, c in zip(i, j)], "ys": [quads[a][c][:, 1] for a, c in zip(i, j)],
            "lon": np.asarray(lon, float), "lat": np.asarray(lat, float), "centre": position_labels(lat, lon, 1)}


class ParameterMap(View):
    """A fitted parameter in lon/lat bins over land and graticule: per bin the median of the windows' fits, or one
    fit pooled over the bin's windows (with its standard error and heterogeneity test in the hover); velocity
    variance ellipses of each bin's samples on top."""

    def __init__(self, **params):
        super().__init__(**params)
        self.fit_all = pn.widgets.Button(name="Fit every window", button_type="success")
        self.fit_all.on_click(self.ex.fit_all)

    def _median_layer(self, p, b):
        ex, data = self.ex, self.ex.data
        fits = ex.all_fits
        if fits is None or not len(fits) or p not in fits:
            return pn.pane.Markdown("Fitting every window for the first look … (progress above)",
                                    css_classes=["ds-param-map"])
        lon = fits["lon"].to_numpy(float)
        lon_e, lat_e = map_bin_edges(lon, fits["lat"].to_numpy(float), data.central_lon, b)
        lo0, lo1, la0, la1 = lon_e[0], lon_e[-1], lat_e[0], lat_e[-1]
        shifted = fits.assign(lon=((lon - lo0) % 360) + lo0)
        ds = grid_fits(shifted, [p], b, "median", lat_range=(la0, la1), lon_range=(lo0, lo1))
        lon_e = np.r_[ds["lon_bnds"].values[:, 0], ds["lon_bnds"].values[-1, 1]]
        lat_e = np.r_[ds["lat_bnds"].values[:, 0], ds["lat_bnds"].values[-1, 1]]
        quads = bin_quads(data.proj, lon_e, lat_e)
        val, cnt = ds[p].values, ds["count"].values
        i, j = np.nonzero(cnt > 0)
        bins = _bin_columns(quads, lon_e, lat_e, i, j)
        bins.update({p: val[i, j].astype(float), "count": cnt[i, j].astype(int)})
        tooltips = [("bin centre", "@centre"), (f"median {p}", f"@{{{p}}}{{0.000}}"), ("ok fits", "@count")]
        title = f"median {p} in {b:g}° bins ({int(cnt.sum())} ok fits)"
        return bins, f"median {p}", tooltips, lon_e, lat_e, quads, title

    def _pooled_layer(self, p, b):
        ex, st = self.ex, self.state
        pm = ex.pooled_map
        if pm is None or pm["key"] != ex.map_key():
            return pn.pane.Markdown("Pooling the windows of every bin under the current settings … (progress above)",
                                    css_classes=["ds-param-map"])
        if not pm["cells"]:
            return pn.pane.Markdown(
                f"No {b:g}° bin holds {POOL_MIN_WINDOWS} or more windows of {st.window_days:g} days: nothing to pool. "
                "Larger bins or shorter windows put more windows in a bin.", css_classes=["ds-param-map"])
        shared = next((list(r.params) for r in pm["results"] if r.params), [])
        if p not in shared:
            return pn.pane.Markdown(
                f"The pooled fit shares {', '.join(shared) or 'no parameter (no bin could be fitted)'}; "
                f"`{p}` is fitted per window. Choose a shared parameter to map.", css_classes=["ds-param-map"])
        lon_e, lat_e = pm["lon_edges"], pm["lat_edges"]
        quads = bin_quads(self.ex.data.proj, lon_e, lat_e)
        results = pm["results"]
        i, j = (np.array([c[k] for c in pm["cells"]], int) for k in (0, 1))
        fitted = np.array([r.status in ("ok", "at_bound") for r in results], bool)
        bins = _bin_columns(quads, lon_e, lat_e, i, j)
        bins.update({
            p: np.where(fitted, [float(r.params.get(p, np.nan)) for r in results], np.nan),
            "se": np.where(fitted, [float(r.stderr.get(p, np.nan)) for r in results], np.nan),
            "n_windows": np.array([int(r.n_windows) for r in results]),
            "n_tracks": np.array([int(r.n_tracks) for r in results]),
            "het_stat": np.array([float(r.heterogeneity_statistic) for r in results]),
            "het_df": np.array([float(r.heterogeneity_df) for r in results]),
            "het_p": np.array([float(r.heterogeneity_pvalue) for r in results]),
            "status": [r.status for r in results]})
        tooltips = [("bin centre", "@centre"), (f"pooled {p}", f"@{{{p}}}{{0.0000}}"), ("std. error", "@se{0.0000}"),
                    ("windows / tracks", "@n_windows / @n_tracks"),
                    ("heterogeneity", "statistic @het_stat{0.00}, df @het_df, p = @het_p{0.000}"),
                    ("status", "@status")]
        n_ok = sum(r.status == "ok" for r in results)
        return bins, f"pooled {p}", tooltips, lon_e, lat_e, quads, (
            f"pooled {p} in {b:g}° bins: {int(fitted.sum())} of {counted(len(pm['cells']), 'bin')} fitted ({n_ok} ok), "
            f"{st.window_days:g}-day windows")

    def _ellipses(self, lon_e, lat_e, quads) -> dict | None:
        """Velocity variance ellipses of the bins' samples, the largest spanning most of a bin: columns ``xs``,
        ``ys`` (one projected ring per bin), ``sd_major``, ``sd_minor`` (m/s), ``angle`` (degrees from east), ``n``."""
        data = self.ex.data
        e = bin_variance_ellipses(data.vel, lon_e, lat_e)
        if not len(e) or not np.isfinite(e["var_major"]).any():
            return None
        sd_major, sd_minor = np.sqrt(e["var_major"].to_numpy()), np.sqrt(e["var_minor"].to_numpy())
        cell = min(min(np.ptp(q[:, 0]), np.ptp(q[:, 1])) for row in quads for q in row)
        scale = 0.45 * cell / np.nanmax(sd_major)  # projected m per (m/s)
        iy, ix, angle = e["iy"].to_numpy(int), e["ix"].to_numpy(int), e["ellipse_angle_deg"].to_numpy(float)
        rings = [ellipse_ring(data.proj, 0.5 * (lon_e[j] + lon_e[j + 1]), 0.5 * (lat_e[i] + lat_e[i + 1]),
                              scale * a, scale * c, float(t))
                 for i, j, a, c, t in zip(iy, ix, sd_major, sd_minor, angle)]
        return {"xs": [r[:, 0] for r in rings], "ys": [r[:, 1] for r in rings], "sd_major": sd_major,
                "sd_minor": sd_minor, "angle": angle, "n": e["n"].to_numpy(int)}

    @param.depends("ex.all_fits", "ex.pooled_map", "state.map_param", "state.bin_deg", "state.map_values",
                   "state.ellipses", "state.presentation")
    def plot(self):
        """The map (a Bokeh figure: bins in the source named ``bins``, ellipses in ``ellipses``), or a message."""
        st, data = self.state, self.ex.data
        p, b = st.map_param, st.bin_deg
        layer = self._pooled_layer(p, b) if st.map_values == "pooled fit" else self._median_layer(p, b)
        if not isinstance(layer, tuple):
            return layer
        bins, value_label, tooltips, lon_e, lat_e, quads, title = layer
        ellipses = self._ellipses(lon_e, lat_e, quads) if st.ellipses else None
        qx = np.concatenate([q[:, 0] for row in quads for q in row])
        qy = np.concatenate([q[:, 1] for row in quads for q in row])
        pad = 0.05 * max(np.ptp(qx), np.ptp(qy))
        (dx0, dx1), (dy0, dy1) = data.extent
        xlim, ylim = widen_to_ratio((min(qx.min() - pad, dx0), max(qx.max() + pad, dx1)),
                                    (min(qy.min() - pad, dy0), max(qy.max() + pad, dy1)), MAP_RATIO)
        land_xy, grid_xy = data.geography_xy
        xt, yt, grid_labels = data.map_labels((xlim, ylim))
        return parameter_map_figure(
            xlim=xlim, ylim=ylim, frame_width=int(480 * MAP_RATIO), frame_height=480, colours=COLOURS,
            land_xy=land_xy, grid_xy=grid_xy, grid_labels=grid_labels, ticks=(xt, yt), bins=bins, value=p,
            value_label=value_label, tooltips=tooltips, ellipses=ellipses, title=title, fontscale=self.fontscale())

    def __panel__(self):
        mp = pn.widgets.Select.from_param(self.state.param.map_param, name="Parameter")
        binsz = pn.widgets.FloatSlider.from_param(self.state.param.bin_deg, name="Bin size (degrees)")
        values = pn.widgets.RadioButtonGroup.from_param(self.state.param.map_values, name="Values per bin")
        ell = pn.widgets.Checkbox.from_param(self.state.param.ellipses, name="Variance ellipses")
        # drawn when its tab is first shown: every open page redrew its hidden map when the first look finished
        return pn.Column(pn.Row(mp, binsz, pn.Column(values, ell), self.fit_all), pn.panel(self.plot, lazy=True),
                         sizing_mode="stretch_width")


class DispersionView(View):
    @param.depends("ex.dispersion", "ex.all_fits", "state.presentation")
    def plot(self):
        ex = self.ex
        res = ex.dispersion
        if res is None:
            return pn.pane.Markdown("Select a region with the box tool on the map (or use everything), then "
                                    "press **Compute dispersion**.")
        from driftspec.analysis.regional.dispersion import model_diffusivity

        band = hv.Area((res.lag_days, res.kappa_lower, res.kappa_upper), "lag (days)",
                       ["kappa", "kappa2"]).opts(color=COLOURS["ccw"], alpha=0.2, line_alpha=0)
        curve = hv.Curve((res.lag_days, res.kappa), "lag (days)",
                         hv.Dimension("kappa", label="diffusivity per component (m²/s)"),
                         label="observed κ(τ)").opts(color=COLOURS["ccw"], line_width=2)
        a, b = res.plateau_lags
        plateau = hv.Curve(([a, b], [res.plateau, res.plateau]), "lag (days)", "kappa",
                           label=f"plateau {res.plateau:.0f} m²/s").opts(color=self.ink(), line_width=4)
        layers = [band, curve, plateau]
        text = (f"observed plateau ({a:g}-{b:g} days) **{res.plateau:.0f} m²/s** "
                f"[{res.plateau_lower:.0f}, {res.plateau_upper:.0f}], {res.n_tracks} track segments")
        if note := res.plateau_note():
            text += f"  \n**Not a plateau:** {note}"
        if ex.all_fits is not None and "diffusivity" in ex.all_fits:
            k, n = model_diffusivity(ex.all_fits, self.state.region or None)
            if np.isfinite(k):
                layers.append(hv.HLine(k).opts(color=COLOURS["cw"], line_dash="dashed", line_width=2))
                text += f"; model-based (median of {n} ok fits) **{k:.0f} m²/s**"
        plot = hv.Overlay(layers).opts(responsive=True, height=360, legend_position="bottom_right",
                                       ylabel="diffusivity per component (m²/s)", xlabel="lag τ (days)",
                                       fontscale=self.fontscale(), title="single-particle diffusivity")
        return pn.Column(pn.pane.Markdown(text, css_classes=["ds-dispersion"]), plot, sizing_mode="stretch_width")

    def __panel__(self):
        button = pn.widgets.Button(name="Compute dispersion", button_type="primary")
        button.on_click(self.ex.compute_dispersion)
        return pn.Column(button, pn.panel(self.plot, lazy=True), sizing_mode="stretch_width")


class Controls(View):
    """The sidebar: selection, analysis settings (from ``state.SETTINGS``), map look and sharing."""

    def __panel__(self):
        ex, st = self.ex, self.state
        shown = st.param.max_freq.precedence

        def band_slider(*_):  # the fixed band's slider only while the automatic band is off
            st.param.max_freq.precedence = -1 if st.auto_band else shown
        band_slider()
        st.param.watch(band_slider, ["auto_band"])
        analysis = pn.Param(st, parameters=list(ANALYSIS), widgets=widgets_for("analysis"), show_name=False,
                            width=285)
        track = pn.widgets.Select(name="Track", options=ex.track_ids, value=st.track or None)
        track.link(st, value="track", bidirectional=True)
        win = pn.widgets.IntSlider(name="Window along the track", start=0, end=max(len(ex.windows()) - 1, 0),
                                   value=st.window)
        win.link(st, value_throttled="window")

        def follow(*_):
            end = max(len(ex.windows()) - 1, 0)
            win.param.update(end=end, value=min(st.window, end))
        st.param.watch(follow, ["track", "window", "window_days", "overlap"])
        look = pn.Param(st, parameters=["color_by", "presentation", "theme"], widgets=widgets_for("map"),
                        show_name=False, sizing_mode="stretch_width")

        def reload_for_theme(event):  # the page theme is chosen when the page is built
            if pn.state.location is not None:
                pn.state.location.search = "?" + ex.url_query()
                pn.state.location.reload = True
        st.param.watch(reload_for_theme, "theme")
        clear = pn.widgets.Button(name="Clear region", button_type="light")
        clear.on_click(lambda *_: setattr(st, "region", []))
        return pn.Column(pn.pane.Markdown("### Selection"), track, win, pn.pane.Markdown("### Analysis"), analysis,
                         pn.pane.Markdown("### Map"), look, clear, pn.pane.Markdown("### Share"), self._share(),
                         sizing_mode="stretch_width")

    def _share(self):
        ex = self.ex
        link = pn.widgets.Button(name="Link to this view", button_type="primary")
        out = pn.widgets.TextInput(name="Copy this address", value="", css_classes=["ds-link"])

        def make_link(*_):
            loc = pn.state.location
            base = ""
            if loc is not None and loc.href:
                base = loc.href.split("?")[0].split("#")[0]
            out.value = base + "?" + ex.url_query()
        link.on_click(make_link)
        dl_csv = pn.widgets.FileDownload(callback=lambda: ex._fits_bytes("csv"), filename="fits.csv",
                                         label="Download fits (CSV)", button_type="light")
        dl_pq = pn.widgets.FileDownload(callback=lambda: ex._fits_bytes("parquet"), filename="fits.parquet",
                                        label="Download fits (Parquet)", button_type="light")
        note = pn.pane.Markdown("Each plot's toolbar saves it as PNG.", styles={"font-size": "0.85em"})
        return pn.Column(link, out, dl_csv, dl_pq, note, sizing_mode="stretch_width")


def about():
    return pn.pane.Markdown(
        "### About\n" + CAUTION + "\n\n"
        "Rotary spectra of complex velocity *u + iv*: positive frequencies turn counterclockwise, negative "
        "clockwise; frequencies in cycles per day. Fits use the debiased Whittle likelihood "
        "(*The debiased Whittle likelihood*, Biometrika 106, 251-266, 2019) unless another estimator is "
        "chosen. Shoreline: GSHHG coarse (LGPL-3), shipped with the package. Maps: Mercator on a sphere, or a "
        "polar stereographic view for data beyond 60° of latitude.", sizing_mode="stretch_width")


class OfflineTemplate(pn.template.VanillaTemplate):
    """The plain page template without its web-font link: the page must work with no network."""

    _resources = {"css": {}}

    def _init_doc(self, doc=None, comm=None, title=None, notebook=False, location=True):
        # Bokeh recomputes the set of a document's models each time a root is added (the template adds one per
        # area): adding them all under one freeze recomputes it once (0.4 CPU-s less per opened page)
        target = doc if doc is not None else pn.state.curdoc
        if target is None:
            return super()._init_doc(doc, comm, title, notebook, location)
        with target.models.freeze():
            return super()._init_doc(doc, comm, title, notebook, location)


PRESENTATION_CSS = """
:root { --bokeh-base-font: 'DejaVu Sans', Helvetica, Arial, sans-serif; }
body { font-family: 'DejaVu Sans', Helvetica, Arial, sans-serif; }
.ds-readout, .ds-status { font-size: 0.95em; }
"""


def explore(source, fits=None, title="driftspec", **state) -> Explorer:
    """Build the dashboard for a path, DataFrame or Dataset of fixes (or a velocities table).

    In a notebook, the returned object displays the whole dashboard inline; its ``state`` attribute
    (selected track, window, model, ...) can be read and set from code, and ``current_fit`` (the current
    window's FitResult) and ``track_fits`` (the track's fits table) follow it; ``region_fit`` is the pooled fit of
    the box-selected region (``state.region``) and ``pooled_map`` the pooled fit of each parameter-map bin (with
    ``state.map_values = "pooled fit"``); ``fit_region()`` and ``fit_pooled_map()`` compute them here and now.

    Examples
    --------
    >>> ex = explore("demo_data/fixes.parquet")            # doctest: +SKIP
    >>> ex.state.window_days = 20; ex.state.model = "matern"  # doctest: +SKIP
    >>> ex.wait(); ex.current_fit.params                    # doctest: +SKIP
    """
    if isinstance(source, pd.DataFrame) and {"u", "v", "segment", "valid"} <= set(source.columns):
        vel = source
    else:
        vel, _, _ = load_velocities(source)
    if isinstance(fits, str):
        from driftspec.analysis.io.tables import read_table

        fits = read_table(fits)
    return Explorer(vel, fits=fits, state=ExplorerState(**state), title=title)
