"""The dashboard's state: one Parameterized class. Every control is a parameter here; views depend on
them by name. ``SETTINGS`` is the one list of user settings: the sidebar widgets, the page URL ("link to this
view") and the key of a fit all derive from it.

What happens when the window slider moves: ``ExplorerState.window_days`` changes; the Explorer (one watcher,
``Explorer._on_settings``) computes the new fit key, shows a cached fit or starts a background job
(:mod:`driftspec.app.jobs`), and the views that depend on ``window_days`` or on the fit redraw.
"""

from __future__ import annotations

from dataclasses import dataclass

import param

from driftspec.analysis.models import FAMILIES

#: what the parameter map shows per bin
MAP_VALUES = ("median of windows", "pooled fit")


class ExplorerState(param.Parameterized):
    """What the user has chosen. Changing any analysis setting refits the current window."""

    track = param.String(default="", doc="Identifier of the selected track")
    window = param.Integer(default=0, bounds=(0, None), doc="Index of the current window along the track")
    window_days = param.Number(default=30.0, bounds=(5.0, 180.0), step=1.0, doc="Window length, days")
    overlap = param.Number(default=0.5, bounds=(0.0, 0.9), step=0.05, doc="Overlap of consecutive windows")
    model = param.Selector(default="matern+inertial", objects=[*FAMILIES, "auto"],
                           doc="Model family; auto, as `driftspec fit` by default: matern and matern+inertial fitted "
                               "to every window and one selected (the fit table says which, and why)")
    estimator = param.Selector(default="debiased", objects=["debiased", "whittle", "exact"])
    observation = param.Selector(default="auto", objects=["auto", "irregular", "differenced+noise", "differenced",
                                                          "none"],
                                 doc="Observation model of the velocities (see the methods notes); auto, as "
                                     "`driftspec fit` decides per window: the irregular fixes modelled exactly where "
                                     "they are sparser than the grid, differenced+noise elsewhere")
    auto_band = param.Boolean(default=True, doc="Fit up to the window's default band (from its fix interval)")
    max_freq = param.Number(default=6.0, bounds=(0.25, 24.0), step=0.25,
                            doc="Highest fitted frequency magnitude, cpd (when the automatic band is off)")
    taper = param.Selector(default="none", objects=["none", "hann", "dpss"])
    inertial = param.Selector(default="free", objects=["free", "follow-latitude", "auto"],
                              doc="Inertial frequency: fitted constant, or following the latitude; auto, as "
                                  "`driftspec fit` by default: following it where the window's latitude span moves "
                                  "the local inertial frequency by more than the frequency resolution 1/T")
    anisotropic = param.Boolean(default=False, doc="Also fit the anisotropic version of the model, test isotropy "
                                                   "and give the diffusivity tensor (debiased estimator only)")
    color_by = param.Selector(default="speed", objects=["speed", "time"], doc="Colour of the track map")
    region = param.List(default=[], item_type=float, doc="Box [lon0, lat0, lon1, lat1]; empty = everywhere")
    map_param = param.Selector(default="matern_alpha", objects=["matern_alpha"], doc="Parameter to map")
    bin_deg = param.Number(default=2.0, bounds=(0.5, 10.0), step=0.5, doc="Bin size of the parameter map")
    map_values = param.Selector(default=MAP_VALUES[0], objects=list(MAP_VALUES),
                                doc="Per bin: the median of the windows' fits, or one fit pooled over the bin's "
                                    "windows (composite likelihood, current settings)")
    ellipses = param.Boolean(default=True, doc="Velocity variance ellipses of each bin on the parameter map")
    presentation = param.Boolean(default=False, doc="Large fonts and thick lines for screen sharing")
    theme = param.Selector(default="light", objects=["light", "dark"], doc="Page theme")


@dataclass(frozen=True)
class Setting:
    """One user setting: its state parameter, its control, and whether the window fit depends on it."""

    name: str
    label: str
    widget: str  # name of a panel.widgets class
    fit: bool = False  # part of FitSpec (so of the fit's key)
    windows: bool = False  # changes the windows of a track
    group: str = "analysis"


#: the one list of settings: widgets, URL parameters and fit keys derive from it
SETTINGS = (
    Setting("window_days", "Window length (days)", "FloatSlider", windows=True),
    Setting("overlap", "Overlap", "FloatSlider", windows=True),
    Setting("model", "Model family", "Select", fit=True),
    Setting("estimator", "Estimator", "RadioButtonGroup", fit=True),
    Setting("observation", "Observation model", "Select", fit=True),
    Setting("auto_band", "Automatic fitted band", "Checkbox", fit=True),
    Setting("max_freq", "Max fitted frequency (cpd)", "FloatSlider", fit=True),
    Setting("taper", "Taper", "RadioButtonGroup", fit=True),
    Setting("inertial", "Inertial frequency", "Select", fit=True),
    Setting("anisotropic", "Anisotropic fit (test isotropy)", "Checkbox", fit=True),
    Setting("color_by", "Colour tracks by", "Select", group="map"),
    Setting("presentation", "Presentation mode", "Toggle", group="map"),
    Setting("theme", "Theme", "RadioButtonGroup", group="map"),
    Setting("map_param", "Parameter", "Select", group="parameter map"),
    Setting("bin_deg", "Bin size (degrees)", "FloatSlider", group="parameter map"),
    Setting("map_values", "Values per bin", "RadioButtonGroup", group="parameter map"),
    Setting("ellipses", "Variance ellipses", "Checkbox", group="parameter map"),
)
ANALYSIS = tuple(s.name for s in SETTINGS if s.group == "analysis")
#: parameters a window's fit depends on (besides the window itself)
FIT_PARAMS = tuple(s.name for s in SETTINGS if s.fit or s.windows)
#: parameters written to and read from the URL
URL_PARAMS = ("track", "window", *(s.name for s in SETTINGS), "region")


def widgets_for(group: str) -> dict:
    """``pn.Param`` widget specifications of one group of settings."""
    import panel as pn

    out = {}
    for s in SETTINGS:
        if s.group == group:
            spec = {"type": getattr(pn.widgets, s.widget), "name": s.label}
            if s.widget == "FloatSlider":
                spec["throttled"] = True
            out[s.name] = spec
    return out


def _convert(p, text: str):
    if isinstance(p, param.Boolean):
        low = text.strip().lower()
        if low not in ("true", "false", "1", "0"):
            raise ValueError
        return low in ("true", "1")
    if isinstance(p, param.Integer):
        return int(text)
    if isinstance(p, param.Number):
        v = float(text)
        if v != v:
            raise ValueError
        return v
    if isinstance(p, param.List):
        if not text.strip():
            return []
        v = [float(x) for x in text.split(",")]
        if len(v) != 4 or not (-90 <= v[1] <= 90 and -90 <= v[3] <= 90):
            raise ValueError
        return v
    return text


def parse_query(state: ExplorerState, args: dict) -> tuple[dict, list[str]]:
    """Validate URL values (strings) against the state's parameters.

    Returns the values to apply (all valid ones, typed) and one message per rejected value; nothing is applied,
    so a bad value never leaves half a state.
    """
    good, bad = {}, []
    probe = ExplorerState(map_param=state.map_param)
    probe.param.map_param.objects = list(state.param.map_param.objects)
    probe.param.color_by.objects = list(state.param.color_by.objects)
    for name in URL_PARAMS:
        if name not in args:
            continue
        text = args[name]
        try:
            value = _convert(state.param[name], text)
            setattr(probe, name, value)  # param checks bounds and choices
        except (ValueError, TypeError):
            bad.append(f"{name}={text[:40]!s}")
            continue
        good[name] = value
    return good, bad
