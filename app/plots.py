"""The dashboard's plots drawn with Bokeh directly: the track map, the selected track's velocity, the current window's
rotary spectra with the fitted model, the complementary spectrum of an anisotropic fit, and the parameter map.

Each plot is built once per page and then updated in place: a new track, window or fit puts new arrays into the
plot's data sources, so the page receives a few arrays instead of a new plot to build and lay out. (Drawn through
HoloViews, every update rebuilt the plot on the server, about 70 ms per layer, and the browser built its views
and laid the page out again.) The parameter map is drawn here too (a new figure when its settings change), one
glyph per layer: through HoloViews, whose path elements build an object per geometry, 156 bins and 217 variance
ellipses took 20 s of the server's only thread. HoloViews still draws the track summary and the dispersion tab.

These classes only draw; the arrays come from :mod:`driftspec.analysis` (spectra, the fit's expected spectrum)
and from :mod:`driftspec.app.dashboard` (``complementary_curves``).
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pandas as pd
from bokeh.layouts import row
from bokeh.models import ColorBar, ColumnDataSource, DataRange1d, Label, Legend, LegendItem, Range1d

from .jobs import call_in_session

#: tools of every line plot (the toolbar's PNG button is how a plot is saved)
TOOLS = "pan,wheel_zoom,box_zoom,reset,save"


def on_page(model, fn) -> None:
    """Apply ``fn`` (which changes ``model`` and its sources) where it is safe: on a served page, on the page's
    session (a fit may report from another thread), through Panel as any other update of the page; in a notebook
    or before the plot is shown, here and now (the caller then pushes the change to a notebook)."""
    call_in_session(model.document, fn)


def scale_fonts(fig, fontscale: float) -> None:
    """Title, axis labels, tick labels and legend at ``fontscale`` times Bokeh's default sizes."""
    if fontscale == 1.0:
        return
    fig.title.text_font_size = f"{13 * fontscale:.0f}px"
    for ax in (*fig.xaxis, *fig.yaxis):
        ax.axis_label_text_font_size = f"{13 * fontscale:.0f}px"
        ax.major_label_text_font_size = f"{11 * fontscale:.0f}px"
    for lg in fig.legend:
        lg.label_text_font_size = f"{13 * fontscale:.0f}px"
    for bar in fig.select({"type": ColorBar}):
        bar.title_text_font_size = f"{13 * fontscale:.0f}px"
        bar.major_label_text_font_size = f"{11 * fontscale:.0f}px"


def drop_unused_glyphs(fig) -> None:
    """Leave out the models Bokeh makes for every glyph that these plots never use, before the page is sent.

    - the faded and muted copies of each glyph: no plot here selects points to fade the others (the map's box
      selection picks tracks through an invisible layer) and legends hide rather than mute;
    - one "all rows" filter and one selection policy per layer: both hold no state, so the figure's layers share one.

    Each is one more model the server builds, serialises and sends, and the browser builds: of a page's 533 models,
    117 were these. (For a glyph copy left out the browser still draws with a view of the glyph itself.)"""
    from bokeh.models import AllIndices, ColumnDataSource, GlyphRenderer, UnionRenderers

    every_row, union = AllIndices(), UnionRenderers()
    for r in fig.renderers:
        if isinstance(r, GlyphRenderer):
            r.nonselection_glyph = None
            r.muted_glyph = None
            if isinstance(r.view.filter, AllIndices):
                r.view.filter = every_row
            if isinstance(r.data_source, ColumnDataSource) and isinstance(r.data_source.selection_policy,
                                                                         UnionRenderers):
                r.data_source.selection_policy = union


def _log_positive(a) -> np.ndarray:
    """``a`` as floats with values a log axis cannot show (zero, negative) replaced by NaN."""
    a = np.asarray(a, float)
    return np.where(a > 0, a, np.nan)


class VelocityFigure:
    """Eastward and northward velocity of one track against time, its windows shaded and the current one marked."""

    def __init__(self, colours: dict, fontscale: float = 1.0):
        from bokeh.plotting import figure

        self.lines = ColumnDataSource({"time": [], "u": [], "v": []})
        self.windows = ColumnDataSource({"x0": [], "x1": []})
        self.current = ColumnDataSource({"x0": [], "x1": []})
        fig = figure(x_axis_type="datetime", height=int(230 * min(fontscale, 1.4)), sizing_mode="stretch_width",
                     tools=TOOLS, x_axis_label="time (UTC)", y_axis_label="velocity (m/s)",
                     x_range=DataRange1d(range_padding=0), y_range=DataRange1d())
        fig.vstrip(x0="x0", x1="x1", source=self.windows, color="#c9d3e6", alpha=0.25)
        fig.vstrip(x0="x0", x1="x1", source=self.current, color="#f2c14e", alpha=0.45)
        u = fig.line("time", "u", source=self.lines, color="#33658a", line_width=1.2 * fontscale)
        v = fig.line("time", "v", source=self.lines, color=colours["cw"], line_width=1.2 * fontscale)
        fig.x_range.renderers = fig.y_range.renderers = [u, v]  # the window shading does not widen the axes
        fig.add_layout(Legend(items=[LegendItem(label="u (east)", renderers=[u]),
                                     LegendItem(label="v (north)", renderers=[v])],
                              location="top_left", click_policy="hide", background_fill_alpha=0.7))
        scale_fonts(fig, fontscale)
        drop_unused_glyphs(fig)
        self.figure = fig

    def show(self, title: str, velocity: pd.DataFrame, windows: list, current) -> None:
        """Draw ``velocity`` (rows with ``time``, ``u``, ``v``), the spans of ``windows`` and the ``current`` one
        (Windows, or None)."""
        self.lines.data = {"time": velocity["time"].to_numpy(), "u": velocity["u"].to_numpy(float),
                           "v": velocity["v"].to_numpy(float)}
        self.windows.data = {"x0": np.array([w.start for w in windows], "datetime64[ns]"),
                             "x1": np.array([w.end for w in windows], "datetime64[ns]")}
        self.current.data = ({"x0": np.array([current.start], "datetime64[ns]"),
                              "x1": np.array([current.end], "datetime64[ns]")} if current is not None
                             else {"x0": [], "x1": []})
        self.figure.title.text = title


class RotarySpectrumFigure:
    """The rotary spectra of one window in two log-log panels, clockwise (frequency axis reversed, on the left)
    and counterclockwise: periodogram, multitaper estimate with its confidence band, the fitted model inside and
    beyond the fitted band, the position-noise floor, the edge of the fitted band, the local inertial frequency and
    the main tidal frequencies."""

    #: the legend's entries (counterclockwise panel), in order
    LEGEND = ("periodogram", "multitaper", "fitted model", "model beyond fitted band", "position-noise floor",
              "edge of fitted band")

    def __init__(self, colours: dict, ink: str, tides: dict, fontscale: float = 1.0):
        from bokeh.plotting import figure

        self.tides = tides
        self.y_range = Range1d(1e-8, 1.0)  # shared: the two panels compare powers
        self.sources: dict = {}
        self.legend_items: dict = {}
        self.inertial_labels: dict = {}
        figs = []
        for side in ("cw", "ccw"):
            name = "clockwise" if side == "cw" else "counterclockwise"
            fig = figure(x_axis_type="log", y_axis_type="log", height=int(330 * min(fontscale, 1.3)),
                         sizing_mode="stretch_width", min_width=300, tools=TOOLS, title=name,
                         x_axis_label=f"{name} frequency (cpd)", y_axis_label="(m/s)²/cpd",
                         x_range=Range1d(*((10.0, 1e-2) if side == "cw" else (1e-2, 10.0))),
                         y_range=self.y_range)
            src = {k: ColumnDataSource({"f": [], "y": []}) for k in ("pg", "mt", "model", "beyond", "floor")}
            src["band"] = ColumnDataSource({"f": [], "lo": [], "hi": []})
            src["edge"] = ColumnDataSource({"f": []})
            src["inertial"] = ColumnDataSource({"f": []})
            src["tides"] = ColumnDataSource({"f": [], "y": [], "name": []})
            fig.varea("f", "lo", "hi", source=src["band"], color=colours[side], alpha=0.18)
            r = {"periodogram": fig.line("f", "y", source=src["pg"], color="#b8b8b8", line_width=0.6),
                 "multitaper": fig.line("f", "y", source=src["mt"], color=colours[side], line_width=1.6 * fontscale),
                 "fitted model": fig.line("f", "y", source=src["model"], color=ink, line_width=2.2 * fontscale,
                                          line_dash="dashed"),
                 "model beyond fitted band": fig.line("f", "y", source=src["beyond"], color=ink,
                                                      line_width=1.2 * fontscale, line_dash="dotted"),
                 "position-noise floor": fig.line("f", "y", source=src["floor"], color="#8a8a8a", line_width=1.5,
                                                  line_dash="dashdot")}
            r["edge of fitted band"] = fig.vspan("f", source=src["edge"], color="#888888", line_width=1)
            fig.vspan("f", source=src["inertial"], color=colours["inertial"], line_width=1.5, line_dash="dotdash")
            fig.vspan("f", source=src["tides"], color=colours["tide"], line_width=0.8, line_dash="dotted")
            fig.text("f", "y", text="name", source=src["tides"], text_color=colours["tide"],
                     text_font_size=f"{int(8 * fontscale)}pt", text_baseline="bottom")
            label = Label(x=1.0, y=1.0, text=" f", text_align="left", text_baseline="top", visible=False,
                          text_color=colours["inertial"], text_font_size=f"{int(10 * fontscale)}pt")
            fig.add_layout(label)
            if side == "ccw":
                items = {k: LegendItem(label=k, renderers=[v]) for k, v in r.items()}
                fig.add_layout(Legend(items=list(items.values()), location="bottom_left", click_policy="hide",
                                      background_fill_alpha=0.55))
                self.legend_items = items
            scale_fonts(fig, fontscale)
            self.sources[side] = src
            self.inertial_labels[side] = label
            drop_unused_glyphs(fig)
            figs.append(fig)
        self.figures = figs
        self.layout = row(*figs, sizing_mode="stretch_width")

    def show(self, window, fit) -> None:
        """Draw the spectra of ``window`` (a Window) and, when ``fit`` (its FitResult) has finite estimates, the
        fitted model."""
        from driftspec.analysis.spectral.periodogram import multitaper_spectrum, rotary_periodogram

        mt = multitaper_spectrum(window.z, window.dt_seconds, time_bandwidth=3)
        has_fit = fit is not None and fit.family is not None and np.all(np.isfinite(fit.theta))
        # the periodogram the fit used (its taper, gaps and mean removed), so that model and floor compare with it
        pg = rotary_periodogram(window.z, window.dt_seconds) if not has_fit or fit.prepared is None else \
            SimpleNamespace(freq_cpd=fit.prepared.freq_cpd, power=fit.prepared.periodogram)
        if has_fit:
            ff, ee, inb = fit.expected_spectrum()
            edge = fit.prepared.freq_cpd[fit.prepared.band].max() if fit.prepared is not None else 0.0
        pos = mt.lower[mt.lower > 0]
        low = float(pos.min()) if pos.size else 1e-8
        top = float(np.nanmax(mt.upper))
        fc = window.inertial_frequency_cpd
        any_floor = False
        for (side, src), fig in zip(self.sources.items(), self.figures):
            sign = -1 if side == "cw" else 1
            sel = np.sign(mt.freq_cpd) == sign
            f = np.abs(mt.freq_cpd[sel])
            o = np.argsort(f)
            data = {"band": {"f": f[o], "lo": _log_positive(mt.lower[sel][o]), "hi": _log_positive(mt.upper[sel][o])},
                    "mt": {"f": f[o], "y": _log_positive(mt.power[sel][o])}}
            ps = np.sign(pg.freq_cpd) == sign
            fp = np.abs(pg.freq_cpd[ps])
            op = np.argsort(fp)
            data["pg"] = {"f": fp[op], "y": _log_positive(pg.power[ps][op])}
            empty = {"f": np.zeros(0), "y": np.zeros(0)}
            data["model"] = data["beyond"] = data["floor"] = empty
            data["edge"] = {"f": np.zeros(0)}
            if has_fit:
                s = np.sign(ff) == sign
                fa = np.abs(ff[s])
                om = np.argsort(fa)
                e_side, in_side = ee[s][om], inb[s][om]
                data["model"] = {"f": fa[om], "y": np.where(in_side, e_side, np.nan)}
                data["beyond"] = {"f": fa[om], "y": np.where(in_side, np.nan, e_side)}
                floor = fit.noise_floor(fa[om] * sign)
                if np.any(floor > 0):
                    any_floor = True
                    data["floor"] = {"f": fa[om][floor > 0], "y": floor[floor > 0]}
                data["edge"] = {"f": np.array([edge], float)}
            inertial_here = np.sign(fc) == sign and abs(fc) > 0
            data["inertial"] = {"f": np.array([abs(fc)] if inertial_here else [], float)}
            label = self.inertial_labels[side]
            label.update(x=abs(fc) if inertial_here else 1.0, y=top, visible=bool(inertial_here))
            # the labels of neighbouring lines (K1 and O1, M2 and S2 are 0.07 cpd apart) on alternate heights
            tf = np.array(list(self.tides.values()), float)
            rank = np.argsort(np.argsort(tf))
            data["tides"] = {"f": tf, "y": low * np.where(rank % 2 == 1, 4.0, 1.0), "name": list(self.tides)}
            for k, d in data.items():
                src[k].data = d
            positive = f[o][f[o] > 0]
            if positive.size:  # the clockwise axis runs from high to low frequency (start > end)
                lo, hi = float(positive.min()), float(positive.max())
                a, b = (hi, lo) if side == "cw" else (lo, hi)
                fig.x_range.update(start=a, end=b, reset_start=a, reset_end=b)
        ylim = (low / 5 if pos.size else 1e-8, top * 3)
        self.y_range.update(start=ylim[0], end=ylim[1], reset_start=ylim[0], reset_end=ylim[1])
        for k in ("fitted model", "edge of fitted band"):
            self.legend_items[k].visible = bool(has_fit)
        # (a window of irregular fixes has its model over the fitted band only: nothing beyond to name)
        self.legend_items["model beyond fitted band"].visible = bool(has_fit) and any(
            np.isfinite(src["beyond"].data["y"]).any() for src in self.sources.values())
        self.legend_items["position-noise floor"].visible = any_floor


class ComplementaryFigure:
    """The complementary (relation) spectrum of an anisotropic fit: observed and fitted ``|J(f) J(-f)|``."""

    def __init__(self, colours: dict, fontscale: float = 1.0):
        from bokeh.plotting import figure

        self.observed = ColumnDataSource({"f": [], "y": []})
        self.model = ColumnDataSource({"f": [], "y": []})
        fig = figure(x_axis_type="log", y_axis_type="log", height=int(280 * min(fontscale, 1.3)),
                     sizing_mode="stretch_width", min_width=260, tools=TOOLS, title="complementary",
                     x_axis_label="frequency |f| (cpd)", y_axis_label="(m/s)²/cpd")
        o = fig.line("f", "y", source=self.observed, color="#7d7d7d", line_width=0.8)
        m = fig.line("f", "y", source=self.model, color=colours["inertial"], line_width=2.2 * fontscale,
                     line_dash="dashed")
        fig.add_layout(Legend(items=[LegendItem(label="|J(f) J(−f)| observed", renderers=[o]),
                                     LegendItem(label="fitted model (expected)", renderers=[m])],
                              location="bottom_left", click_policy="hide", background_fill_alpha=0.55))
        scale_fonts(fig, fontscale)
        drop_unused_glyphs(fig)
        self.figure = fig

    def show(self, f, observed, model, anisotropy: float, pvalue: float) -> None:
        ok = observed > 0
        self.observed.data = {"f": f[ok], "y": observed[ok]}
        self.model.data = {"f": f, "y": _log_positive(model)}
        self.figure.title.text = f"complementary (ρ {anisotropy:.2f}, p {pvalue:.2g})"


def _land(fig, colours: dict, land_xy) -> None:
    """Filled land with its shoreline: every island one glyph (parts separated by NaN rows)."""
    if len(land_xy):
        fig.patch(land_xy[:, 0], land_xy[:, 1], fill_color=colours["land"], line_color=colours["coast"],
                  line_width=0.7)


def _graticule(fig, colours: dict, grid_xy, grid_labels) -> None:
    """Graticule lines (one glyph) and, in a polar view, their degree labels ``[(x, y, text)]``."""
    if len(grid_xy):
        fig.line(grid_xy[:, 0], grid_xy[:, 1], color=colours["grid"], line_width=0.6, line_dash="dashed", alpha=0.8)
    if grid_labels:
        lx, ly, lt = zip(*grid_labels)
        fig.text(list(lx), list(ly), text=list(lt), text_color="#3a4450", text_font_size="9pt", text_align="left",
                 text_baseline="bottom")


def _degree_axes(fig, ticks) -> None:
    """Longitude and latitude in degrees on the axes at ``ticks = ({x: label}, {y: label})``; none in a polar view
    (empty ticks: the labels sit on the graticule lines)."""
    from bokeh.models import FixedTicker

    xt, yt = ticks
    if xt:
        fig.xaxis.ticker = FixedTicker(ticks=list(xt))
        fig.xaxis.major_label_overrides = {float(k): v for k, v in xt.items()}
        fig.yaxis.ticker = FixedTicker(ticks=list(yt))
        fig.yaxis.major_label_overrides = {float(k): v for k, v in yt.items()}
        fig.xaxis.axis_label, fig.yaxis.axis_label = "longitude", "latitude"
    else:
        fig.xaxis.visible = fig.yaxis.visible = False


class TrackMapFigure:
    """All tracks as a raster (the mean of a value per screen pixel, computed with datashader), over filled land,
    shoreline and graticule, with degree labels; the selected track, the box-selected region and a model variance
    ellipse on top. An invisible, thinned copy of the samples carries the hover (track, longitude, latitude) and
    the box selection."""

    def __init__(self, *, extent, frame_width: int, frame_height: int, colours: dict, land_xy, grid_xy,
                 grid_labels, ticks, picker: dict, clabel: str):
        from bokeh.models import (
            BoxSelectTool,
            ColorBar,
            EqHistColorMapper,
            HoverTool,
            TapTool,
            WheelZoomTool,
        )
        from bokeh.plotting import figure
        from colorcet import fire

        (x0, x1), (y0, y1) = extent
        # the wheel zooms the map with Ctrl held; without it the wheel scrolls the page (a shared screen, a notebook)
        wheel = WheelZoomTool(modifiers={"ctrl": True})
        fig = figure(frame_width=frame_width, frame_height=frame_height, x_range=Range1d(x0, x1),
                     y_range=Range1d(y0, y1), title="All tracks", background_fill_color="#eef2f5",
                     tools=["pan", wheel, "box_zoom", TapTool(), "reset", "save"], active_scroll=wheel)
        fig.grid.visible = False  # the graticule is the grid
        _land(fig, colours, land_xy)
        self.raster = ColumnDataSource({"image": [], "x": [], "y": [], "dw": [], "dh": []})
        self.mapper = EqHistColorMapper(palette=list(fire), nan_color="rgba(0, 0, 0, 0)")
        fig.image("image", "x", "y", "dw", "dh", source=self.raster, color_mapper=self.mapper)
        self.colorbar = ColorBar(color_mapper=self.mapper, title=clabel, title_standoff=8, width=16)
        fig.add_layout(self.colorbar, "right")
        _graticule(fig, colours, grid_xy, grid_labels)
        pick = fig.scatter("x", "y", source=ColumnDataSource(picker), size=4, alpha=0, nonselection_alpha=0,
                           selection_alpha=0)
        fig.add_tools(HoverTool(renderers=[pick], tooltips=[("track", "@track"), ("position", "@position")]),
                      BoxSelectTool(renderers=[pick]))
        self.selected = ColumnDataSource({"x": [], "y": []})
        fig.line("x", "y", source=self.selected, color=colours["track"], line_width=2.5)
        self.region = ColumnDataSource({"left": [], "right": [], "bottom": [], "top": []})
        fig.quad("left", "right", "top", "bottom", source=self.region, fill_alpha=0, line_color="#2b5fd9",
                 line_width=2)
        self.ellipse = ColumnDataSource({k: [] for k in ("x", "y", "sd_major", "sd_minor", "angle", "rho",
                                                         "pvalue")})
        self.ellipse_line = fig.line("x", "y", source=self.ellipse, color=colours["inertial"], line_width=3)
        fig.add_tools(HoverTool(renderers=[self.ellipse_line], tooltips=[
            ("model std. dev. along the axis", "@sd_major{0.000} m/s"), ("across", "@sd_minor{0.000} m/s"),
            ("axis", "@angle{0.0}° from east"), ("anisotropy ρ", "@rho{0.000}"),
            ("isotropy p-value", "@pvalue{0.0000}")]))
        self.ellipse_text = ColumnDataSource({"x": [], "y": [], "text": []})
        fig.text("x", "y", text="text", source=self.ellipse_text, text_color=colours["inertial"],
                 text_font_size="10pt", text_align="left", text_baseline="bottom")
        self.ellipse_item = LegendItem(label="model variance ellipse", renderers=[self.ellipse_line],
                                       visible=False)
        fig.add_layout(Legend(items=[self.ellipse_item], location="bottom_left"))
        _degree_axes(fig, ticks)
        drop_unused_glyphs(fig)
        self.figure = fig

    def show_raster(self, image, x_range, y_range, clabel: str) -> None:
        """The raster (rows from south to north) covering ``x_range`` x ``y_range`` (projected metres)."""
        (x0, x1), (y0, y1) = x_range, y_range
        self.raster.data = {"image": [np.asarray(image, np.float32)], "x": [x0], "y": [y0], "dw": [x1 - x0],
                            "dh": [y1 - y0]}
        self.colorbar.title = clabel

    def show_track(self, x, y) -> None:
        self.selected.data = {"x": np.asarray(x, float), "y": np.asarray(y, float)}

    def show_region(self, box) -> None:
        """``box``: (x0, y0, x1, y1) projected, or None."""
        self.region.data = ({"left": [], "right": [], "bottom": [], "top": []} if box is None else
                            {"left": [min(box[0], box[2])], "right": [max(box[0], box[2])],
                             "bottom": [min(box[1], box[3])], "top": [max(box[1], box[3])]})

    def show_ellipse(self, ring=None, values=None, text="", solid=True) -> None:
        """A model variance ellipse (``ring``: (m, 2) projected) with its numbers (``values``: sd_major, sd_minor,
        angle, rho, pvalue) in its hover and ``text`` beside it; nothing when ``ring`` is None."""
        if ring is None:
            self.ellipse.data = {k: [] for k in self.ellipse.data}
            self.ellipse_text.data = {"x": [], "y": [], "text": []}
            self.ellipse_item.visible = False
            return
        n = len(ring)
        self.ellipse.data = {"x": ring[:, 0], "y": ring[:, 1], **{k: np.full(n, float(v)) for k, v in values.items()}}
        self.ellipse_line.glyph.line_dash = "solid" if solid else "dashed"
        self.ellipse_text.data = {"x": [float(ring[:, 0].max())], "y": [float(ring[:, 1].max())], "text": [text]}
        self.ellipse_item.visible = True


#: bins from which the parameter map's colours span the 2nd to 98th percentile of the values (beyond: the end colours)
ROBUST_COLOUR_BINS = 20


def parameter_map_figure(*, xlim, ylim, frame_width: int, frame_height: int, colours: dict, land_xy, grid_xy,
                         grid_labels, ticks, bins: dict, value: str, value_label: str, tooltips: list,
                         ellipses: dict | None, title: str, fontscale: float = 1.0):
    """A value per map bin over land and graticule, with degree labels, and the bins' velocity variance ellipses.

    ``bins``: columns of one row per bin, ``xs`` and ``ys`` its outline (projected), ``value`` the value coloured
    (NaN: grey), the rest shown by ``tooltips``. ``ellipses``: columns ``xs``, ``ys`` (one ring per bin),
    ``sd_major``, ``sd_minor``, ``angle``, ``n``; or None. One glyph per layer: drawn through HoloViews, a map of
    200 bins and their ellipses took 20 s on the server (a geometry object per bin), as one glyph 0.1 s."""
    from bokeh.models import ColorBar, HoverTool, LinearColorMapper, WheelZoomTool
    from bokeh.palettes import cividis
    from bokeh.plotting import figure

    (x0, x1), (y0, y1) = xlim, ylim
    wheel = WheelZoomTool(modifiers={"ctrl": True})
    fig = figure(frame_width=frame_width, frame_height=frame_height, x_range=Range1d(x0, x1), y_range=Range1d(y0, y1),
                 title=title, background_fill_color="#eef2f5", tools=["pan", wheel, "box_zoom", "reset", "save"],
                 active_scroll=wheel)
    fig.grid.visible = False
    _land(fig, colours, land_xy)
    values = np.asarray(bins[value], float)
    finite = values[np.isfinite(values)]
    low, high = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
    if finite.size >= ROBUST_COLOUR_BINS:  # one odd bin does not squeeze every other into one colour
        low, high = (float(v) for v in np.percentile(finite, [2, 98]))
        value_label += " (colours: 2-98 % of bins)" if (finite < low).any() or (finite > high).any() else ""
    if high <= low:
        low, high = low - 0.5, high + 0.5
    palette = cividis(256)
    mapper = LinearColorMapper(palette=palette, low=low, high=high, nan_color="#c8c8c8", low_color=palette[0],
                               high_color=palette[-1])
    cells = fig.patches("xs", "ys", source=ColumnDataSource(bins), fill_color={"field": value, "transform": mapper},
                        line_color="white", line_width=0.2, name="bins")
    fig.add_tools(HoverTool(renderers=[cells], tooltips=tooltips))
    fig.add_layout(ColorBar(color_mapper=mapper, title=value_label, title_standoff=8, width=16), "right")
    if ellipses is not None and len(ellipses["xs"]):
        rings = fig.multi_line("xs", "ys", source=ColumnDataSource(ellipses), color=colours["track"], line_width=1.4,
                               name="ellipses")
        fig.add_tools(HoverTool(renderers=[rings], tooltips=[
            ("std. dev. along the major axis", "@sd_major{0.000} m/s"), ("across", "@sd_minor{0.000} m/s"),
            ("major axis", "@angle{0.0}° from east"), ("samples", "@n")]))
        fig.add_layout(Legend(items=[LegendItem(label="velocity variance ellipses", renderers=[rings])],
                              location="bottom_left"))
    _graticule(fig, colours, grid_xy, grid_labels)
    _degree_axes(fig, ticks)
    scale_fonts(fig, fontscale)
    drop_unused_glyphs(fig)
    return fig
