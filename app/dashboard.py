"""The drifting-float explorer: a datashaded track map linked to the rotary spectrum and live fit of the
selected track.

Reading guide: :class:`~driftspec.app.state.ExplorerState` holds every choice the user makes. The
:class:`Explorer` holds the data and draws small views, each depending on the state parameters it
needs (``@param.depends``). Clicking the map sets ``state.track``; a box selection sets
``state.region``; moving a control changes a state parameter, and the views that depend on it redraw.
"""

from __future__ import annotations

import threading
import time

import cartopy.crs as ccrs
import datashader as dsh
import holoviews as hv
import numpy as np
import pandas as pd
import panel as pn
import param
from holoviews.operation.datashader import dynspread, rasterize
from scipy.spatial import cKDTree

from driftspec.analysis.conventions import tidal_frequencies_cpd
from driftspec.analysis.fitting import FitSpec, fit_window
from driftspec.analysis.fitting.batch import window_rows
from driftspec.analysis.models import get_family
from driftspec.analysis.regional import default_params, grid_fits
from driftspec.analysis.runs import circular_mean_lon, run_bounds
from driftspec.analysis.spectral.periodogram import multitaper_spectrum, rotary_periodogram
from driftspec.analysis.tracks.pipeline import load_velocities
from driftspec.analysis.tracks.windows import iter_windows

from .coastline import shoreline_paths
from .state import URL_PARAMS, ExplorerState

hv.extension("bokeh", logo=False)

CAUTION = (
    "**A statistical description of observed currents, not a drift forecast.** The fits describe how "
    "past currents varied; they do not say where an object will drift. Do not use this tool for search "
    "and rescue or navigation: defer to the responsible authorities."
)
#: colours of our own: clockwise rust, counterclockwise teal, model ink
COLOURS = {"cw": "#b5522b", "ccw": "#1f7a7a", "model": "#20203a", "band": "#9aa0b4", "track": "#ff2d7a",
           "tide": "#7a6a00", "inertial": "#6a2fb5"}
MIN_COVERAGE = 0.5
#: the state parameters a window fit depends on
FIT_SETTINGS = ("state.track", "state.window", "state.window_days", "state.overlap", "state.model", "state.estimator",
                "state.max_freq", "state.auto_band", "state.observation", "state.taper", "state.inertial")


class Explorer(param.Parameterized):
    """The dashboard for one data set.

    Parameters
    ----------
    velocities : pandas.DataFrame
        Gridded velocities (``load_velocities`` output).
    fits : pandas.DataFrame, optional
        A fits table for the parameter map and for colouring the tracks.
    state : ExplorerState, optional
    title : str
    """

    progress = param.Integer(default=0, bounds=(0, 100))
    status_text = param.String(default="")
    track_fits = param.DataFrame(default=None, allow_None=True)
    all_fits = param.DataFrame(default=None, allow_None=True)
    refit_ms = param.Number(default=np.nan)
    dispersion = param.Parameter(default=None, doc="Observed dispersion in the region (DispersionResult)")

    def __init__(self, velocities: pd.DataFrame, fits: pd.DataFrame | None = None,
                 state: ExplorerState | None = None, title: str = "driftspec", **params):
        super().__init__(**params)
        self.state = state or ExplorerState()
        self.title = title
        vel = velocities.sort_values(["id", "segment", "time"], kind="stable").reset_index(drop=True)
        self.vel = vel
        self._prepare_points()
        self._window_cache: dict = {}
        self._fit_cache: dict = {}
        self._job = None
        self._cancel = threading.Event()
        if fits is not None and len(fits):
            self.all_fits = fits
        self._refresh_param_choices()
        if not self.state.track or self.state.track not in self.track_ids:
            self.state.track = self.track_ids[0] if len(self.track_ids) else ""
        self.tap = self.bounds = None  # made with the map (map_view)
        self.pointer = hv.streams.PointerXY(x=np.nan, y=np.nan)
        self.state.param.watch(self._on_settings, ["window_days", "overlap", "model", "estimator", "observation",
                                                    "auto_band", "max_freq", "taper", "inertial", "track"])

    # ------------------------------------------------------------------ data
    def _prepare_points(self):
        v = self.vel
        ok = v["valid_velocity"].to_numpy() if "valid_velocity" in v else np.isfinite(v["u"].to_numpy())
        lon, lat = v["lon"].to_numpy(float), v["lat"].to_numpy(float)
        self.central_lon = circular_mean_lon(lon) if len(lon) else 0.0
        self.crs = ccrs.Mercator(central_longitude=self.central_lon)
        xy = self.crs.transform_points(ccrs.PlateCarree(), lon, np.clip(lat, -85, 85))[:, :2]
        codes, ids = pd.factorize(v["id"].astype(str), sort=True)
        self.track_ids = list(ids)
        t_ns = v["time"].to_numpy().astype("datetime64[ns]").astype(np.int64)
        self.t0 = int(t_ns.min()) if len(t_ns) else 0
        self.points = pd.DataFrame({
            "x": xy[:, 0], "y": xy[:, 1],
            "speed": np.hypot(v["u"].to_numpy(float), v["v"].to_numpy(float)),
            "time": (t_ns - self.t0) / 86400e9, "track_code": codes.astype(np.int32), "t_ns": t_ns,
        })[ok].reset_index(drop=True)
        self.tree = cKDTree(self.points[["x", "y"]].to_numpy()) if len(self.points) else None
        starts, stops = run_bounds(codes)
        self.slices = {self.track_ids[codes[s]]: (s, e) for s, e in zip(starts, stops)}
        self.time_range = (pd.Timestamp(t_ns.min()), pd.Timestamp(t_ns.max())) if len(t_ns) else None
        self.date_range = pn.widgets.DatetimeRangeSlider(
            name="Dates shown on the map", start=self.time_range[0], end=self.time_range[1],
            value=self.time_range, step=86400000) if self.time_range else None

    def _refresh_param_choices(self):
        fits = self.all_fits
        params = ["matern_alpha"]
        if fits is not None and len(fits):
            params = default_params(fits)
            self._attach_fit_colours(fits)
        self.state.param.map_param.objects = params
        if self.state.map_param not in params:
            self.state.map_param = params[0]
        self.state.param.color_by.objects = ["speed", "time", *[p for p in params if p in self.points]]

    def _attach_fit_colours(self, fits):
        """Colour each map sample by the fitted value of the window that holds it (latest window wins)."""
        ok = fits[fits["status"] == "ok"]
        code = {tid: k for k, tid in enumerate(self.track_ids)}
        tc = self.points["track_code"].to_numpy()
        tt = self.points["t_ns"].to_numpy()
        for p in default_params(fits):
            col = np.full(len(self.points), np.nan)
            for row in ok[["track_id", "window_start", "window_end", p]].itertuples(index=False):
                k = code.get(str(row[0]))
                if k is None:
                    continue
                s, e = np.searchsorted(tc, [k, k + 1])
                a, b = np.searchsorted(tt[s:e], [pd.Timestamp(row[1]).value, pd.Timestamp(row[2]).value + 1])
                col[s + a:s + b] = row[3]
            self.points[p] = col

    def track_velocity(self, track_id: str) -> pd.DataFrame:
        """Rows of the velocity table for one track (the table is sorted by track)."""
        s, e = self.slices.get(track_id, (0, 0))
        return self.vel.iloc[s:e]

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
        st = self.state
        return FitSpec(models=(st.model,), estimator=st.estimator, band="auto" if st.auto_band else st.max_freq,
                       observation=st.observation, taper=st.taper, inertial_frequency=st.inertial)

    def current_window(self):
        ws = self.windows()
        if not ws:
            return None
        return ws[min(self.state.window, len(ws) - 1)]

    def fit_current(self):
        """Fit (or fetch from cache) the current window with the current settings."""
        w = self.current_window()
        if w is None:
            return None, None
        spec = self.fit_spec()
        key = (w.track_id, w.start, w.n_samples, spec.to_json())
        if key not in self._fit_cache:
            t0 = time.perf_counter()
            self._fit_cache[key] = fit_window(w, spec)[0]
            self.refit_ms = 1e3 * (time.perf_counter() - t0)
        return w, self._fit_cache[key]

    # ------------------------------------------------------------------ events
    def _on_tap(self, x=None, y=None, **_):
        if self.tree is None or x is None or not np.isfinite(x):
            return
        dist, i = self.tree.query([x, y])
        xr = self._view_width()
        if dist > 0.03 * xr:
            return
        tid = self.track_ids[int(self.points["track_code"].iat[i])]
        if tid != self.state.track:
            self.state.param.update(track=tid, window=0)

    def _view_width(self):
        x = self.points["x"]
        return float(x.max() - x.min()) if len(x) else 1.0

    def _on_bounds(self, bounds=None, **_):
        if not bounds or bounds[0] == bounds[2] or bounds[1] == bounds[3]:
            return
        x0, y0, x1, y1 = bounds
        ll = ccrs.PlateCarree().transform_points(self.crs, np.array([x0, x1]), np.array([y0, y1]))
        self.state.region = [float(ll[0, 0]), float(ll[0, 1]), float(ll[1, 0]), float(ll[1, 1])]

    def _on_settings(self, *events):
        self._start_track_job()

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

    # ------------------------------------------------------------------ background fits
    def _run_job(self, windows, target, cancel):
        rows = []
        spec = self.fit_spec()
        for k, w in enumerate(windows):
            if cancel.is_set():
                break
            rows.extend(window_rows(w, spec))
            self._job_progress = int(100 * (k + 1) / max(len(windows), 1))
        self._job_result = (target, pd.DataFrame(rows), cancel.is_set())

    def _launch(self, windows, target, label):
        self._cancel.set()
        self._cancel = threading.Event()
        self._job_progress = 0
        self._job_result = None
        self.status_text = f"{label}: {len(windows)} windows"
        self._job = threading.Thread(target=self._run_job, args=(windows, target, self._cancel), daemon=True)
        self._job.start()

    def _start_track_job(self):
        ws = self.windows()
        if ws:
            self._launch(ws, "track", "fitting the whole track")

    def fit_all(self, *_):
        ws = [w for tid in self.tracks_in_region() for w in self.windows(tid)]
        self._launch(ws, "all", "fitting all windows in the region")

    def cancel(self, *_):
        self._cancel.set()
        self.status_text = "cancelled"

    def poll(self):
        """Copy progress and results of the background job into parameters (runs on the server's loop)."""
        if self._job is None:
            return
        self.progress = getattr(self, "_job_progress", 0)
        res = getattr(self, "_job_result", None)
        if res is None:
            return
        target, df, cancelled = res
        self._job_result = None
        self._job = None
        if target == "track":
            self.track_fits = df
            self.status_text = f"track fitted: {int((df['status'] == 'ok').sum()) if len(df) else 0}/{len(df)} ok"
        else:
            if len(df):
                self.all_fits = df
                self._refresh_param_choices()
            self.status_text = ("cancelled after " if cancelled else "done: ") + f"{len(df)} fits"
        self.progress = 100

    def wait(self, timeout=60.0):
        """Block until the background job finishes (for notebooks and scripts)."""
        if self._job is not None:
            self._job.join(timeout)
        self.poll()

    # ------------------------------------------------------------------ views
    def _ink(self):
        """Colour of model lines: dark on the light theme, light on the dark one."""
        return "#e6e6f0" if self.state.theme == "dark" else COLOURS["model"]

    def _fontscale(self):
        return 1.8 if self.state.presentation else 1.0

    def _map_points(self, color_by, date_range):
        pts = self.points
        if date_range is not None and self.time_range is not None:
            lo, hi = (pd.Timestamp(d).value for d in date_range)
            sel = (pts["t_ns"].to_numpy() >= lo) & (pts["t_ns"].to_numpy() <= hi)
            pts = pts[sel]
        col = color_by if color_by in pts else "speed"
        return hv.Points((pts["x"].to_numpy(), pts["y"].to_numpy(), pts[col].to_numpy()), kdims=["x", "y"],
                         vdims=[hv.Dimension("value", label=col)])

    def map_view(self):
        """The datashaded track map with shoreline, selected track and region."""
        dr = self.date_range.param.value if self.date_range is not None else None
        pts = hv.DynamicMap(pn.bind(self._map_points, self.state.param.color_by, dr))
        shaded = dynspread(rasterize(pts, aggregator=dsh.mean("value"), width=900, height=560),
                           threshold=0.6, max_px=2)
        shaded = shaded.apply.opts(cmap=pn.bind(self._cmap, self.state.param.color_by), colorbar=True,
                                   data_aspect=1,
                                   cnorm="eq_hist", tools=["tap", "box_select"], active_tools=["wheel_zoom"],
                                   default_tools=["pan", "wheel_zoom", "reset", "save"], xaxis=None, yaxis=None,
                                   responsive=True, min_height=420, clabel=pn.bind(self._clabel,
                                                                                   self.state.param.color_by),
                                   bgcolor="#eef2f5")
        # the streams are bound to the plot they listen to when it is made
        self.tap = hv.streams.Tap(source=shaded, x=np.nan, y=np.nan)
        self.tap.add_subscriber(self._on_tap)
        # box select acts on glyphs that support selection: an invisible, thinned copy of the samples
        step = max(1, len(self.points) // 5000)
        picker = hv.Points((self.points["x"].to_numpy()[::step], self.points["y"].to_numpy()[::step]),
                           kdims=["x", "y"]).opts(alpha=0, nonselection_alpha=0, selection_alpha=0, size=1,
                                                  tools=["box_select"])
        self.bounds = hv.streams.BoundsXY(source=picker, bounds=(0, 0, 0, 0))
        self.bounds.add_subscriber(self._on_bounds)
        self.pointer.source = shaded
        sel = hv.DynamicMap(pn.bind(self._selected_path, self.state.param.track))
        box = hv.DynamicMap(pn.bind(self._region_box, self.state.param.region))
        (x0, x1), (y0, y1) = self.extent
        return (shaded * picker * self._coast() * sel * box).opts(hv.opts.Overlay(
            responsive=True, min_height=420, title="All tracks", xlim=(x0, x1), ylim=(y0, y1),
            data_aspect=1))

    @property
    def extent(self):
        """Projected x and y ranges of the data with a margin."""
        if not len(self.points):
            return (-1e6, 1e6), (-1e6, 1e6)
        x, y = self.points["x"].to_numpy(), self.points["y"].to_numpy()
        dx = max(np.ptp(x), 2e5) * 0.08
        dy = max(np.ptp(y), 2e5) * 0.08
        return (x.min() - dx, x.max() + dx), (y.min() - dy, y.max() + dy)

    def _coast(self):
        """Shoreline rings near the data (projected), so the map opens on the data, not the globe."""
        (x0, x1), (y0, y1) = self.extent
        w, h = x1 - x0, y1 - y0
        if getattr(self, "_coast_xy", None) is None:
            keep = [p for p in shoreline_paths(self.crs)
                    if p[:, 0].max() > x0 - w and p[:, 0].min() < x1 + w and p[:, 1].max() > y0 - h
                    and p[:, 1].min() < y1 + h]
            # one NaN-separated path draws as fast as one line; hundreds of separate paths do not
            gap = np.full((1, 2), np.nan)
            self._coast_xy = np.concatenate([a for p in keep for a in (p, gap)]) if keep else np.zeros((0, 2))
        return hv.Path([self._coast_xy], kdims=["x", "y"]).opts(color="#5b5b5b", line_width=0.8)

    @staticmethod
    def _cmap(color_by):
        return "viridis" if color_by == "time" else ("fire" if color_by == "speed" else "cividis")

    @staticmethod
    def _clabel(color_by):
        return {"speed": "speed (m/s)", "time": "days since first fix"}.get(color_by, color_by)

    def _selected_path(self, track):
        s, e = self.slices.get(track, (0, 0))
        v = self.vel.iloc[s:e]
        if not len(v):
            return hv.Path([]).opts(color=COLOURS["track"])
        xy = self.crs.transform_points(ccrs.PlateCarree(), v["lon"].to_numpy(), v["lat"].to_numpy().clip(-85, 85))
        return hv.Path([xy[:, :2]], kdims=["x", "y"]).opts(color=COLOURS["track"], line_width=2.5)

    def _region_box(self, region):
        if not region:
            return hv.Bounds((np.nan,) * 4).opts(color="#2b5fd9", line_width=2)  # same style: only data change
        lon0, lat0, lon1, lat1 = region
        xy = self.crs.transform_points(ccrs.PlateCarree(), np.array([lon0, lon1]), np.array([lat0, lat1]))
        return hv.Bounds((xy[0, 0], xy[0, 1], xy[1, 0], xy[1, 1])).opts(color="#2b5fd9", line_width=2)

    @param.depends("pointer.x", "pointer.y")
    def readout(self):
        x, y = self.pointer.x, self.pointer.y
        if self.tree is None or x is None or not np.isfinite(x):
            return pn.pane.Markdown("Hover over the map for track, time and value; click a track to select it.",
                                    css_classes=["ds-readout"], margin=(10, 10, 4, 10))
        dist, i = self.tree.query([x, y])
        p = self.points.iloc[int(i)]
        col = self.state.color_by if self.state.color_by in self.points else "speed"
        when = pd.Timestamp(int(p["t_ns"])).strftime("%Y-%m-%d %H:%M")
        lonlat = ccrs.PlateCarree().transform_point(x, y, self.crs)
        return pn.pane.Markdown(
            f"**{self.track_ids[int(p['track_code'])]}** · {when} UTC · {col} = {p[col]:.4g} · "
            f"{lonlat[1]:.2f}°N {lonlat[0]:.2f}°E", css_classes=["ds-readout"], margin=(10, 10, 4, 10))

    @param.depends("state.track", "state.window", "state.window_days", "state.overlap", "state.model",
                   "state.estimator", "state.region")
    def summary_view(self):
        """One line saying what is selected (also what a browser test reads)."""
        ws = self.windows()
        st = self.state
        cur = self.current_window()
        when = f" ({cur.start:%Y-%m-%d} to {cur.end:%Y-%m-%d})" if cur is not None else ""
        return pn.pane.Markdown(
            f"**Track {st.track}** · window {min(st.window, max(len(ws) - 1, 0)) + 1} of {len(ws)}{when} · "
            f"{len(ws)} windows of {st.window_days:g} days · model {st.model} · {st.estimator} estimator"
            + (f" · region {st.region[1]:.1f}..{st.region[3]:.1f}°N, {st.region[0]:.1f}..{st.region[2]:.1f}°E "
               f"({len(self.tracks_in_region())} tracks)" if st.region else ""),
            css_classes=["ds-summary"], sizing_mode="stretch_width")

    @param.depends("state.track", "state.window", "state.window_days", "state.overlap", "state.presentation")
    def series_view(self):
        v = self.track_velocity(self.state.track)
        fs = self._fontscale()
        if not len(v):
            return hv.Curve([]).opts(responsive=True, height=230)
        t = v["time"]
        u = hv.Curve((t, v["u"]), "time", hv.Dimension("vel", label="velocity (m/s)"), label="u (east)")
        w = hv.Curve((t, v["v"]), "time", hv.Dimension("vel", label="velocity (m/s)"), label="v (north)")
        ws = self.windows()
        spans = [hv.VSpan(x.start, x.end).opts(color="#c9d3e6", alpha=0.25) for x in ws]
        cur = self.current_window()
        layers = spans + ([hv.VSpan(cur.start, cur.end).opts(color="#f2c14e", alpha=0.45)] if cur else [])
        overlay = hv.Overlay([*layers, u.opts(color="#33658a"), w.opts(color="#b5522b")])
        return overlay.opts(hv.opts.Curve(line_width=1.2 * fs), hv.opts.Overlay(
            responsive=True, height=int(230 * min(fs, 1.4)), fontscale=fs, legend_position="top_left",
            xlabel="time (UTC)", ylabel="velocity (m/s)",
            title=f"{self.state.track}: velocity; {len(ws)} windows of {self.state.window_days:g} days"))

    @param.depends(*FIT_SETTINGS, "state.presentation")
    def spectrum_view(self):
        w, res = self.fit_current()
        fs = self._fontscale()
        if w is None:
            return pn.pane.Markdown("No window of this length with enough valid samples on this track.")
        mt = multitaper_spectrum(w.z, w.dt_seconds, time_bandwidth=3)
        pg = rotary_periodogram(w.z, w.dt_seconds)
        panels = []
        for side, sign in (("cw", -1), ("ccw", 1)):
            sel = np.sign(mt.freq_cpd) == sign
            f = np.abs(mt.freq_cpd[sel])
            o = np.argsort(f)
            f = f[o]
            kd = hv.Dimension("freq", label=f"{'clockwise' if side == 'cw' else 'counterclockwise'} frequency (cpd)")
            vd = hv.Dimension("power", label="(m/s)²/cpd")
            band = hv.Area((f, mt.lower[sel][o], mt.upper[sel][o]), kd, [vd, "power2"]).opts(
                color=COLOURS[side], alpha=0.18, line_alpha=0)
            pgs = np.sign(pg.freq_cpd) == sign
            fp = np.abs(pg.freq_cpd[pgs])
            op = np.argsort(fp)
            raw = hv.Curve((fp[op], pg.power[pgs][op]), kd, vd, label="periodogram").opts(
                color="#b8b8b8", line_width=0.6)
            est = hv.Curve((f, mt.power[sel][o]), kd, vd, label="multitaper").opts(color=COLOURS[side],
                                                                                   line_width=1.6 * fs)
            layers = [band, raw, est]
            if res is not None and res.family is not None and np.all(np.isfinite(res.theta)):
                ff, ee, inb = res.expected_spectrum()
                side_sel = np.sign(ff) == sign
                fa = np.abs(ff[side_sel])
                om = np.argsort(fa)
                e_side, in_side = ee[side_sel][om], inb[side_sel][om]
                layers.append(hv.Curve((fa[om], np.where(in_side, e_side, np.nan)), kd, vd,
                                       label="fitted model").opts(color=self._ink(), line_width=2.2 * fs,
                                                                  line_dash="dashed"))
                layers.append(hv.Curve((fa[om], np.where(in_side, np.nan, e_side)), kd, vd,
                                       label="model beyond fitted band").opts(color=self._ink(),
                                                                              line_width=1.2 * fs,
                                                                              line_dash="dotted"))
                floor = res.noise_floor(fa[om] * sign)
                if np.any(floor > 0):
                    layers.append(hv.Curve((fa[om][floor > 0], floor[floor > 0]), kd, vd,
                                           label="position-noise floor").opts(color="#8a8a8a", line_width=1.5,
                                                                              line_dash="dashdot"))
            fc = w.inertial_frequency_cpd
            if np.sign(fc) == sign and abs(fc) > 0:
                layers.append(hv.VLine(abs(fc)).opts(color=COLOURS["inertial"], line_width=1.5, line_dash="dotdash"))
                layers.append(hv.Text(abs(fc), float(np.nanmax(mt.upper)), " f", halign="left", valign="top")
                              .opts(color=COLOURS["inertial"], text_font_size=f"{int(10 * fs)}pt"))
            for name, ft in tidal_frequencies_cpd().items():
                layers.append(hv.VLine(ft).opts(color=COLOURS["tide"], line_width=0.8, line_dash="dotted"))
                layers.append(hv.Text(ft, float(np.nanmin(mt.lower[mt.lower > 0])), name, halign="center",
                                      valign="bottom").opts(color=COLOURS["tide"],
                                                            text_font_size=f"{int(8 * fs)}pt"))
            top = hv.VLine(res.prepared.freq_cpd[res.prepared.band].max() if res is not None and res.prepared
                           is not None else 0).opts(color="#888", line_width=1)
            layers.append(top)
            title = "clockwise" if side == "cw" else "counterclockwise"
            pos = mt.lower[mt.lower > 0]
            ylim = (float(pos.min()) / 5 if pos.size else 1e-8, float(np.nanmax(mt.upper)) * 3)
            ov = hv.Overlay(layers).opts(
                hv.opts.Overlay(logx=True, logy=True, responsive=True, height=int(330 * min(fs, 1.3)), ylim=ylim,
                                title=title, fontscale=fs, legend_position="bottom_left",
                                legend_opts={"background_fill_alpha": 0.55},
                                show_legend=side == "ccw", invert_xaxis=side == "cw"))
            panels.append(pn.pane.HoloViews(ov, sizing_mode="stretch_width", min_width=300))
        return pn.Row(*panels, sizing_mode="stretch_width")

    @param.depends(*FIT_SETTINGS, "refit_ms")
    def table_view(self):
        w, res = self.fit_current()
        if res is None:
            return pn.pane.Markdown("No fit.")
        fam = res.family
        rows = [{"parameter": p.name, "value": res.params[p.name], "std. error": res.stderr[p.name],
                 "unit": p.unit} for p in fam.parameters]
        rows.append({"parameter": "diffusivity", "value": res.diffusivity, "std. error": res.diffusivity_se,
                     "unit": "m2 s-1"})
        table = pn.widgets.Tabulator(pd.DataFrame(rows), show_index=False, disabled=True, layout="fit_data_fill",
                                     formatters={"value": {"type": "money", "precision": 5},
                                                 "std. error": {"type": "money", "precision": 5}},
                                     sizing_mode="stretch_width", name="fit-table")
        colour = "#1f7a4a" if res.ok else "#b5522b"
        info = pn.pane.Markdown(
            f"<span style='color:{colour}'>&#9679;</span> **status** `{res.status}` {res.message}  \n"
            f"**goodness of fit** p = {res.gof_pvalue:.3f} · log L = {res.loglik:.1f} · AIC = {res.aic:.1f}  \n"
            f"window {w.start:%Y-%m-%d} → {w.end:%Y-%m-%d} · {res.n_valid}/{res.n_samples} valid · "
            f"{res.n_freq} frequencies fitted · local f = {w.inertial_frequency_cpd:.3f} cpd · "
            f"{res.stderr_method or 'no'} standard errors · refit {self.refit_ms:.0f} ms",
            css_classes=["ds-fitinfo"])
        return pn.Column(info, table, sizing_mode="stretch_width")

    @param.depends("track_fits", "state.presentation")
    def track_fits_view(self):
        df = self.track_fits
        if df is None or not len(df):
            return pn.pane.Markdown("The whole track is fitted in the background after each change.")
        ok = df[df["status"] == "ok"]
        fs = self._fontscale()
        fam = get_family(self.state.model, self.state.inertial)
        plots = []
        for p in [n for n in fam.names if n in ok][:3] + ["diffusivity"]:
            if p not in ok:
                continue
            mid = ok["window_start"] + (ok["window_end"] - ok["window_start"]) / 2
            pts = hv.ErrorBars((mid, ok[p], ok[p + "_se"]), "time", p) * hv.Scatter((mid, ok[p]), "time", p)
            plots.append(pts.opts(hv.opts.Scatter(size=6, color=COLOURS["ccw"]),
                                  hv.opts.Overlay(responsive=True, height=170, fontscale=fs, title=p)))
        return hv.Layout(plots).cols(2) if plots else pn.pane.Markdown("No ok fits on this track.")

    @param.depends("all_fits", "state.map_param", "state.bin_deg", "state.presentation")
    def param_map_view(self):
        fits = self.all_fits
        if fits is None or not len(fits) or self.state.map_param not in fits:
            return pn.pane.Markdown("No fits yet: press **Fit every window** (or start with `--fits`).")
        p = self.state.map_param
        lon = fits["lon"].to_numpy(float)
        lat = fits["lat"].to_numpy(float)
        b = self.state.bin_deg
        lon_rel = ((lon - self.central_lon + 180) % 360) - 180
        lo0 = np.floor(np.nanmin(lon_rel) / b) * b + self.central_lon
        lo1 = np.ceil(np.nanmax(lon_rel) / b) * b + self.central_lon + b
        la0, la1 = np.floor(np.nanmin(lat) / b) * b, np.ceil(np.nanmax(lat) / b) * b + b
        shifted = fits.assign(lon=((lon - lo0) % 360) + lo0 - 360 * (lo0 > 180))
        ds = grid_fits(shifted, [p], b, "median", lat_range=(max(la0, -90), min(la1, 90)),
                       lon_range=(lo0, lo1))
        xe = self.crs.transform_points(ccrs.PlateCarree(), np.r_[ds["lon_bnds"][:, 0], ds["lon_bnds"][-1, 1]],
                                       np.zeros(ds.sizes["lon"] + 1))[:, 0]
        ye = self.crs.transform_points(ccrs.PlateCarree(), np.zeros(ds.sizes["lat"] + 1),
                                       np.clip(np.r_[ds["lat_bnds"][:, 0], ds["lat_bnds"][-1, 1]], -85, 85))[:, 1]
        val = ds[p].values
        mesh = hv.QuadMesh((xe, ye, val), ["x", "y"], hv.Dimension(p, label=f"median {p}")).opts(
            cmap="cividis", colorbar=True, tools=["hover"], xaxis=None, yaxis=None, responsive=True,
            min_height=380, title=f"median {p} in {b:g}° bins ({int(ds['count'].sum())} ok fits)",
            fontscale=self._fontscale())
        coast = self._coast()
        cnt = hv.QuadMesh((xe, ye, np.where(ds["count"].values > 0, ds["count"].values, np.nan)), ["x", "y"],
                          "count").opts(cmap="Blues", colorbar=True, tools=["hover"], xaxis=None, yaxis=None,
                                        responsive=True, min_height=380, title="ok fits per bin")
        xr_ = (xe.min(), xe.max())
        yr_ = (ye.min(), ye.max())
        left = mesh * coast
        if {"cov_uu", "cov_vv", "cov_uv"} <= set(fits.columns):
            left = left * self._ellipses(shifted, b, (la0, la1), (lo0, lo1), xe, ye)
        return pn.Row(left.opts(xlim=xr_, ylim=yr_), (cnt * coast).opts(xlim=xr_, ylim=yr_),
                      sizing_mode="stretch_width")

    def _ellipses(self, fits, b, lat_range, lon_range, xe, ye):
        """Variance ellipses of each bin (mean covariance of its windows), scaled so the largest fills a bin."""
        from driftspec.analysis.tracks.ellipse import ellipse_from_covariance

        cov = grid_fits(fits, ["cov_uu", "cov_vv", "cov_uv"], b, "mean", lat_range=(max(lat_range[0], -90),
                        min(lat_range[1], 90)), lon_range=lon_range)
        e = ellipse_from_covariance(cov["cov_uu"].values, cov["cov_vv"].values, cov["cov_uv"].values)
        major = np.sqrt(e["var_major"])
        if not np.isfinite(major).any():
            return hv.Overlay([])
        cell = min(np.min(np.diff(xe)), np.min(np.abs(np.diff(ye))))
        scale = 0.9 * cell / np.nanmax(major)
        shapes = []
        for i in range(major.shape[0]):
            for j in range(major.shape[1]):
                if cov["count"].values[i, j] == 0 or not np.isfinite(major[i, j]):
                    continue
                cx, cy = 0.5 * (xe[j] + xe[j + 1]), 0.5 * (ye[i] + ye[i + 1])
                shapes.append(hv.Ellipse(cx, cy, (scale * major[i, j], scale * np.sqrt(e["var_minor"][i, j])),
                                         orientation=np.deg2rad(e["ellipse_angle_deg"][i, j])))
        return hv.Overlay(shapes).opts(hv.opts.Ellipse(color="#ff2d7a", line_width=1.5))

    def compute_dispersion(self, *_):
        from driftspec.analysis.regional.dispersion import single_particle_dispersion

        region = self.state.region or None
        try:
            self.dispersion = single_particle_dispersion(self.vel, region, max_lag_days=20, plateau_lags=(8, 16),
                                                         n_boot=100)
            self.status_text = f"dispersion: {self.dispersion.n_tracks} track segments"
        except ValueError as exc:
            self.dispersion = None
            self.status_text = f"dispersion: {exc}"

    @param.depends("dispersion", "all_fits", "state.presentation")
    def dispersion_view(self):
        res = self.dispersion
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
                           label=f"plateau {res.plateau:.0f} m²/s").opts(color=self._ink(), line_width=4)
        layers = [band, curve, plateau]
        text = (f"observed plateau ({a:g}-{b:g} days) **{res.plateau:.0f} m²/s** "
                f"[{res.plateau_lower:.0f}, {res.plateau_upper:.0f}], {res.n_tracks} track segments")
        if self.all_fits is not None and "diffusivity" in self.all_fits:
            k, n = model_diffusivity(self.all_fits, self.state.region or None)
            if np.isfinite(k):
                layers.append(hv.HLine(k).opts(color=COLOURS["cw"], line_dash="dashed", line_width=2))
                text += f"; model-based (median of {n} ok fits) **{k:.0f} m²/s**"
        plot = hv.Overlay(layers).opts(responsive=True, height=360, legend_position="bottom_right",
                                       ylabel="diffusivity per component (m²/s)", xlabel="lag τ (days)",
                                       fontscale=self._fontscale(), title="single-particle diffusivity")
        return pn.Column(pn.pane.Markdown(text, css_classes=["ds-dispersion"]), plot, sizing_mode="stretch_width")

    # ------------------------------------------------------------------ layout
    def controls(self):
        st = self.state
        w = pn.Param(st, parameters=["window_days", "overlap", "model", "estimator", "observation", "auto_band",
                                     "max_freq", "taper", "inertial"],
                     widgets={"window_days": {"type": pn.widgets.FloatSlider, "name": "Window length (days)",
                                              "throttled": True},
                              "overlap": {"type": pn.widgets.FloatSlider, "name": "Overlap", "throttled": True},
                              "model": {"type": pn.widgets.Select, "name": "Model family"},
                              "estimator": {"type": pn.widgets.RadioButtonGroup, "name": "Estimator"},
                              "observation": {"type": pn.widgets.Select, "name": "Observation model"},
                              "auto_band": {"type": pn.widgets.Checkbox, "name": "Automatic fitted band"},
                              "max_freq": {"type": pn.widgets.FloatSlider, "name": "Max fitted frequency (cpd)",
                                           "throttled": True},
                              "taper": {"type": pn.widgets.RadioButtonGroup, "name": "Taper"},
                              "inertial": {"type": pn.widgets.Select, "name": "Inertial frequency"}},
                     show_name=False, width=285)
        track = pn.widgets.Select(name="Track", options=self.track_ids, value=st.track or None)
        track.link(st, value="track", bidirectional=True)
        win = pn.widgets.IntSlider(name="Window along the track", start=0, end=max(len(self.windows()) - 1, 0),
                                   value=st.window)
        win.link(st, value_throttled="window")
        st.param.watch(lambda e: setattr(win, "value", e.new), "window")

        def update_window_slider(*_):
            win.end = max(len(self.windows()) - 1, 0)
            win.value = min(st.window, win.end)
        st.param.watch(update_window_slider, ["track", "window_days", "overlap"])
        look = pn.Param(st, parameters=["color_by", "presentation", "theme"], show_name=False,
                        widgets={"color_by": {"type": pn.widgets.Select, "name": "Colour tracks by"},
                                 "presentation": {"type": pn.widgets.Toggle, "name": "Presentation mode"},
                                 "theme": {"type": pn.widgets.RadioButtonGroup, "name": "Theme"}},
                        sizing_mode="stretch_width")

        def reload_for_theme(event):  # the page theme is chosen when the page is built
            if pn.state.location is not None:
                pn.state.location.search = "?" + self.url_query()
                pn.state.location.reload = True
        st.param.watch(reload_for_theme, "theme")
        items = [pn.pane.Markdown("### Selection"), track, win, pn.pane.Markdown("### Analysis"), w,
                 pn.pane.Markdown("### Map"), look]
        if self.date_range is not None:
            items.append(self.date_range)
        clear = pn.widgets.Button(name="Clear region", button_type="light")
        clear.on_click(lambda *_: setattr(st, "region", []))
        items += [clear, pn.pane.Markdown("### Share"), self._share_widgets()]
        return pn.Column(*items, sizing_mode="stretch_width")

    def _share_widgets(self):
        link = pn.widgets.Button(name="Link to this view", button_type="primary")
        out = pn.widgets.TextInput(name="Copy this address", value="", disabled=False)

        def make_link(*_):
            loc = pn.state.location
            base = f"{loc.protocol}//{loc.host}{loc.pathname}" if loc is not None and loc.host else ""
            out.value = base + "?" + self.url_query()
        link.on_click(make_link)
        dl_csv = pn.widgets.FileDownload(callback=lambda: self._fits_bytes("csv"), filename="fits.csv",
                                         label="Download fits (CSV)", button_type="light")
        dl_pq = pn.widgets.FileDownload(callback=lambda: self._fits_bytes("parquet"), filename="fits.parquet",
                                        label="Download fits (Parquet)", button_type="light")
        note = pn.pane.Markdown("Each plot's toolbar saves it as PNG.", styles={"font-size": "0.85em"})
        return pn.Column(link, out, dl_csv, dl_pq, note, sizing_mode="stretch_width")

    def url_query(self) -> str:
        from urllib.parse import urlencode

        st = self.state
        vals = {}
        for p in URL_PARAMS:
            v = getattr(st, p)
            vals[p] = ",".join(f"{x:.4f}" for x in v) if isinstance(v, list) else str(v)
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

    def about(self):
        return pn.pane.Markdown(
            "### About\n" + CAUTION + "\n\n"
            "Rotary spectra of complex velocity *u + iv*: positive frequencies turn counterclockwise, negative "
            "clockwise; frequencies in cycles per day. Fits use the debiased Whittle likelihood "
            "(*The debiased Whittle likelihood*, Biometrika 106, 251-266, 2019) unless another estimator is "
            "chosen. Shoreline: GSHHG coarse "
            "(LGPL-3), shipped with the package.", sizing_mode="stretch_width")

    def main_area(self):
        bar = pn.indicators.Progress(value=self.param.progress, max=100, sizing_mode="stretch_width", height=14,
                                     name="progress")
        status = pn.pane.Markdown(self.param.status_text, css_classes=["ds-status"])
        fit_all = pn.widgets.Button(name="Fit every window", button_type="success")
        fit_all.on_click(self.fit_all)
        cancel = pn.widgets.Button(name="Cancel", button_type="warning")
        cancel.on_click(self.cancel)
        binsz = pn.widgets.FloatSlider.from_param(self.state.param.bin_deg, name="Bin size (degrees)")
        mp = pn.widgets.Select.from_param(self.state.param.map_param, name="Parameter")
        explore = pn.Column(
            pn.Row(pn.Column(self.map_view(), self.readout, sizing_mode="stretch_width"),
                   sizing_mode="stretch_width"),
            self.summary_view,
            self.series_view,
            pn.Row(pn.Column(self.spectrum_view, sizing_mode="stretch_width"),
                   pn.Column(self.table_view, width=470), sizing_mode="stretch_width"),
            sizing_mode="stretch_width", name="Explore")
        track_tab = pn.Column(self.track_fits_view, sizing_mode="stretch_width", name="Track summary")
        map_tab = pn.Column(pn.Row(mp, binsz, fit_all, cancel), self.param_map_view,
                            sizing_mode="stretch_width", name="Parameter map")
        disp_button = pn.widgets.Button(name="Compute dispersion", button_type="primary")
        disp_button.on_click(self.compute_dispersion)
        disp_tab = pn.Column(disp_button, self.dispersion_view, sizing_mode="stretch_width", name="Dispersion")
        tabs = pn.Tabs(explore, track_tab, map_tab, disp_tab, ("About", self.about()), dynamic=True,
                       sizing_mode="stretch_width")
        return pn.Column(pn.Row(bar, status, sizing_mode="stretch_width"), tabs, sizing_mode="stretch_width")

    def panel(self):
        """The whole dashboard as one Panel layout (for notebooks)."""
        self._start_poller()
        return pn.Row(pn.Column(self.controls(), width=300), self.main_area(), sizing_mode="stretch_width")

    def template(self):
        """The dashboard in a page template (for ``panel serve`` and ``driftspec serve``)."""
        self._start_poller()
        dark = self.state.theme == "dark"
        tpl = OfflineTemplate(
            title=self.title, sidebar=[self.controls()], main=[self.main_area()],
            header_background="#0d1620" if dark else "#1d2b3a", sidebar_width=320,
            theme="dark" if dark else "default", raw_css=[PRESENTATION_CSS])
        self._sync_url()
        return tpl

    def _sync_url(self):
        if pn.state.location is not None:
            pn.state.location.sync(self.state, {p: p for p in URL_PARAMS})

    def _start_poller(self):
        if getattr(self, "_poller", None) is None:
            try:
                self._poller = pn.state.add_periodic_callback(self.poll, period=250)
            except Exception:  # noqa: BLE001 - no event loop (plain script): poll on demand via wait()
                self._poller = None

    def servable(self, title=None):
        return self.template().servable(title=title or self.title)

    def _repr_mimebundle_(self, include=None, exclude=None):
        return self.panel()._repr_mimebundle_(include, exclude)


class OfflineTemplate(pn.template.VanillaTemplate):
    """The plain page template without its web-font link: the page must work with no network."""

    _resources = {"css": {}}


PRESENTATION_CSS = """
:root { --bokeh-base-font: 'DejaVu Sans', Helvetica, Arial, sans-serif; }
body { font-family: 'DejaVu Sans', Helvetica, Arial, sans-serif; }
.ds-readout, .ds-status { font-size: 0.95em; }
"""


def explore(source, fits=None, title="driftspec", **state) -> Explorer:
    """Build the dashboard for a path, DataFrame or Dataset of fixes (or a velocities table).

    In a notebook, the returned object displays the whole dashboard inline; its ``state`` attribute
    (selected track, window, model, ...) can be read and set from code.

    Examples
    --------
    >>> ex = explore("demo_data/fixes.parquet")            # doctest: +SKIP
    >>> ex.state.window_days = 20; ex.state.model = "matern"  # doctest: +SKIP
    """
    if isinstance(source, pd.DataFrame) and {"u", "v", "segment", "valid"} <= set(source.columns):
        vel = source
    else:
        vel, _, _ = load_velocities(source)
    if isinstance(fits, str):
        from driftspec.analysis.io.tables import read_table

        fits = read_table(fits)
    return Explorer(vel, fits=fits, state=ExplorerState(**state), title=title)
