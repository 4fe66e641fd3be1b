"""The dashboard's state: one Parameterized class. Every control is a parameter here; views depend on
them by name. It syncs to the page URL ("link to this view") and can be read and set from a notebook."""

from __future__ import annotations

import param

from driftspec.analysis.models import FAMILIES

#: parameters written to and read from the URL
URL_PARAMS = ("track", "window", "window_days", "overlap", "model", "estimator", "observation", "auto_band",
              "max_freq", "taper",
              "inertial", "color_by", "region", "map_param", "bin_deg", "presentation", "theme")


class ExplorerState(param.Parameterized):
    """What the user has chosen. Changing any analysis setting refits the current window."""

    track = param.String(default="", doc="Identifier of the selected track")
    window = param.Integer(default=0, bounds=(0, None), doc="Index of the current window along the track")
    window_days = param.Number(default=30.0, bounds=(5.0, 180.0), step=1.0, doc="Window length, days")
    overlap = param.Number(default=0.5, bounds=(0.0, 0.9), step=0.05, doc="Overlap of consecutive windows")
    model = param.Selector(default="matern+inertial", objects=list(FAMILIES), doc="Model family")
    estimator = param.Selector(default="debiased", objects=["debiased", "whittle", "exact"])
    observation = param.Selector(default="differenced+noise", objects=["differenced+noise", "differenced", "none"],
                                 doc="Observation model of the velocities (see the methods notes)")
    auto_band = param.Boolean(default=True, doc="Fit up to the window's default band (from its fix interval)")
    max_freq = param.Number(default=6.0, bounds=(0.25, 24.0), step=0.25,
                            doc="Highest fitted frequency magnitude, cpd (when the automatic band is off)")
    taper = param.Selector(default="none", objects=["none", "hann", "dpss"])
    inertial = param.Selector(default="free", objects=["free", "follow-latitude"],
                              doc="Inertial frequency: fitted constant, or following the latitude")
    color_by = param.Selector(default="speed", objects=["speed", "time"], doc="Colour of the track map")
    region = param.List(default=[], item_type=float, doc="Box [lon0, lat0, lon1, lat1]; empty = everywhere")
    map_param = param.Selector(default="matern_alpha", objects=["matern_alpha"], doc="Parameter to map")
    bin_deg = param.Number(default=2.0, bounds=(0.5, 10.0), step=0.5, doc="Bin size of the parameter map")
    presentation = param.Boolean(default=False, doc="Large fonts and thick lines for screen sharing")
    theme = param.Selector(default="light", objects=["light", "dark"], doc="Page theme")
