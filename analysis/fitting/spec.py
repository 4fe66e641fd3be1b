"""The fit specification: everything a window's fit depends on, validated once, resolved for a window in one place.

:class:`FitSpec` is what the command line (``driftspec fit``), the batch runner, the dashboard and the Python API
(:func:`~driftspec.analysis.fitting.core.fit_series`) build; each then calls the one window-fit function,
:func:`~driftspec.analysis.fitting.core.fit_window`. The same window and the same specification therefore give
identical numbers wherever they are fitted.

What is resolved per window (:meth:`FitSpec.resolve`):

* **The fitted band** ``0 < |f| <= max_freq`` (cpd). With ``band="auto"`` the top is a fraction of the Nyquist
  frequency ``f_N = 1 / (2 dt)`` that depends on how the velocities were made (see
  :mod:`driftspec.analysis.models.observation` for why):

  ====================  ===========================  ==================
  velocities            observation model            top of the band
  ====================  ===========================  ==================
  measured              none                         ``f_N``
  central difference    differenced(+noise)          ``0.75 f_N``
  forward difference    differenced(+noise)          ``f_N``
  either difference     none                         ``0.25 f_N``
  ====================  ===========================  ==================

  and, for samples interpolated between fixes further apart than the grid step, at most ``0.75`` of the Nyquist
  frequency of the window's mean fix interval: frequencies the fixes cannot resolve are not fitted. Windows fitted
  through the irregular-fix operator stop at half that Nyquist frequency, or 0.3 cpd beyond the local inertial
  frequency when that is higher (still at most 0.75 of it): measured on simulated satellite fixes, the top of a
  wider band pulls the Matérn slope down.
* **The observation model**: ``"auto"`` is ``differenced+noise`` for differenced velocities and ``none`` for
  measured ones.
* **The latitude**: the mean latitude, or every sample's latitude for the latitude-following inertial model.
* **The position noise**: fitted, fixed at a value in metres, or the window's median ``position_error_m``.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field, fields

import numpy as np

from ..conventions import inertial_frequency_cpd
from ..models import FAMILIES, ModelFamily, get_family
from ..models.observation import OBSERVATIONS, observed
from ..spectral.periodogram import TAPERS

ESTIMATOR_NAMES = ("debiased", "whittle", "exact")
VELOCITIES = ("central", "forward", "measured")
STDERR_METHODS = ("auto", "fisher", "sandwich")
INERTIAL_FREQUENCIES = ("auto", "free", "follow-latitude")
#: the candidates fitted to every window when ``models="auto"`` (one of them is selected per window)
AUTO_CANDIDATES = ("matern", "matern+inertial")
#: fraction of the Nyquist frequency fitted by default (see the module docstring)
BAND_FRACTION_OBSERVED = {"central": 0.75, "forward": 1.0, "measured": 1.0}
BAND_FRACTION_UNMODELLED_DIFFERENCE = 0.25
#: fraction of the fix interval's Nyquist frequency fitted at most
FIX_BAND_FRACTION = 0.75
#: ... and, for windows fitted through the irregular-fix operator, the fraction fitted by default: on simulated
#: satellite fixes (benchmarks/bench_recovery.py) 3/4 left the Matérn slope 0.13 too flat, 1/2 0.04; the band
#: still reaches INERTIAL_MARGIN_CPD beyond the local inertial frequency when that is higher (up to 3/4)
IRREGULAR_BAND_FRACTION = 0.5
INERTIAL_MARGIN_CPD = 0.3


@dataclass(frozen=True)
class WindowPlan:
    """A :class:`FitSpec` resolved for one window: what :func:`~.core.fit_window` actually fits."""

    dt_days: float
    max_freq: float  # cpd
    observation: str
    operator: str  # the difference operator of the observation model ("central" or "forward")
    latitude: float | None  # mean latitude, degrees north
    latitude_series: np.ndarray | None  # per sample, for the latitude-following model
    position_noise: float | None  # metres, held fixed; None = fitted (or no noise model)
    follow_latitude: bool = False  # the inertial part follows the local inertial frequency
    fix_times_days: np.ndarray | None = None  # irregular observation: the fixes behind the window
    fix_error_m: np.ndarray | None = None  # irregular observation: per-fix errors held fixed (None: noise fitted)
    candidates: tuple = ()  # model names to fit
    n_samples: int = 0

    @property
    def inertial_frequency_cpd(self) -> float | None:
        return None if self.latitude is None else float(inertial_frequency_cpd(self.latitude))


@dataclass(frozen=True)
class FitSpec:
    """Everything a window's fit depends on. Invalid values raise a one-line ``ValueError`` at construction.

    Parameters
    ----------
    models : "auto" or tuple of str
        Candidate model families (registered names, see :data:`driftspec.analysis.models.FAMILIES`). ``"auto"``
        (default) fits :data:`AUTO_CANDIDATES` to every window and keeps the selected one (see
        :mod:`.selection`); an explicit tuple keeps a row for every candidate, the selected one marked.
    estimator : {"debiased", "whittle", "exact"}
        Debiased Whittle (default), standard Whittle, or exact Gaussian likelihood.
    band : "auto" or float
        Top of the fitted band in cpd, or ``"auto"`` for the rule in the module docstring.
    velocity : {"central", "forward", "measured"}
        How the velocities were made: central or forward differences of positions, or measured.
    observation : {"auto", "none", "differenced", "differenced+noise", "irregular"}
        Observation model. ``"irregular"``: the window's velocities are interpolated between irregular fixes and
        differenced, and the expected periodogram models that linear map exactly
        (:mod:`driftspec.analysis.spectral.irregular`). ``"auto"`` (default): ``irregular`` for windows whose fixes
        are sparser than the grid, ``differenced+noise`` for other differenced velocities, ``none`` for measured.
    position_noise : "auto", "fit", "input" or float
        ``"auto"`` (default): each fix's own ``position_error_m`` where the input gives it and the fixes are
        irregular, a fitted white noise otherwise; ``"fit"``: always fitted; ``"input"``: the input's errors (per
        fix for irregular windows, the window's median otherwise); a number: held at that value (m).
    inertial_frequency : {"auto", "free", "follow-latitude"}
        The inertial part at a fitted constant frequency, or following ``-2 Omega sin(latitude(t))`` with a fitted
        offset; ``"auto"`` (default) follows the latitude where the window's latitude span moves the inertial
        frequency by more than the frequency resolution ``1/T``.
    taper : {"none", "hann", "dpss"}
    exclude : tuple of (low, high)
        Frequency-magnitude bands (cpd) left out of the fit, e.g. around tidal lines.
    fixed : tuple of (name, value)
        Parameters held at given values (a dict is accepted).
    stderr : {"auto", "fisher", "sandwich"}
        Debiased-Whittle standard errors (see :func:`~.core.fit_series`).
    bootstrap : int
        Parametric-bootstrap replicates per window (0: none).
    anisotropic : bool
        Also fit the anisotropic (improper) version of the selected model, test isotropy and give the diffusivity
        tensor (:mod:`.anisotropy`); it is selected where isotropy is rejected at the 1 % level. Windows of
        irregular fixes are fitted through their fixes' operator.
    """

    models: tuple = "auto"
    estimator: str = "debiased"
    band: str | float = "auto"
    velocity: str = "central"
    observation: str = "auto"
    position_noise: str | float = "auto"
    inertial_frequency: str = "auto"
    taper: str = "none"
    exclude: tuple = ()
    fixed: tuple = field(default=())
    stderr: str = "auto"
    bootstrap: int = 0
    anisotropic: bool = False

    def __post_init__(self):
        def put(name, value):
            object.__setattr__(self, name, value)

        models = (self.models,) if isinstance(self.models, (str, ModelFamily)) else tuple(self.models)
        if not models:
            raise ValueError("at least one model is needed")
        if "auto" in models:
            if len(models) > 1:
                raise ValueError("'auto' stands alone: it means the candidates " + ", ".join(AUTO_CANDIDATES))
            models = "auto"
        for m in models if models != "auto" else AUTO_CANDIDATES:
            if isinstance(m, str) and m not in FAMILIES:
                raise ValueError(f"unknown model {m!r}; choose from {', '.join(FAMILIES)}")
        put("models", models)
        _choice("estimator", self.estimator, ESTIMATOR_NAMES)
        _choice("velocity", self.velocity, VELOCITIES)
        _choice("observation", self.observation, ("auto", *OBSERVATIONS, "irregular"))
        _choice("inertial_frequency", self.inertial_frequency, INERTIAL_FREQUENCIES)
        _choice("stderr", self.stderr, STDERR_METHODS)
        put("taper", "none" if self.taper is None else self.taper)
        _choice("taper", self.taper, TAPERS)
        if self.velocity == "measured" and self.observation not in ("auto", "none"):
            raise ValueError("measured velocities take observation 'none'")
        if self.band != "auto":
            put("band", _positive("band (top of the fitted band, cpd)", self.band))
        if self.position_noise not in ("auto", "fit", "input"):
            put("position_noise", _positive("position_noise (m)", self.position_noise))
            if self.resolved_observation not in ("differenced+noise", "irregular"):
                raise ValueError("a position noise value needs observation 'differenced+noise' or 'irregular'")
        exclude = []
        for pair in self.exclude or ():
            lo, hi = (float(v) for v in pair)
            if not (0 <= lo < hi):
                raise ValueError(f"an excluded band needs 0 <= low < high (cpd), got {lo:g}:{hi:g}")
            exclude.append((lo, hi))
        put("exclude", tuple(exclude))
        fixed = self.fixed.items() if isinstance(self.fixed, dict) else (self.fixed or ())
        put("fixed", tuple(sorted((str(k), float(v)) for k, v in fixed)))
        if int(self.bootstrap) != self.bootstrap or self.bootstrap < 0:
            raise ValueError(f"bootstrap must be a whole number >= 0, got {self.bootstrap!r}")
        put("bootstrap", int(self.bootstrap))
        put("anisotropic", bool(self.anisotropic))
        if self.anisotropic and self.estimator != "debiased":
            raise ValueError("anisotropic fits use the debiased estimator")
        names = set().union(*(self.family(m, follow).names for m in self.candidate_models for follow in (False, True)))
        unknown = {k for k, _ in self.fixed} - names
        if unknown:
            raise ValueError(f"fixed names {sorted(unknown)} are not parameters of {', '.join(self.candidate_models)}")

    # ------------------------------------------------------------------ derived settings
    @property
    def resolved_observation(self) -> str:
        if self.observation != "auto":
            return self.observation
        return "none" if self.velocity == "measured" else "differenced+noise"

    @property
    def operator(self) -> str:
        """The difference operator named in the observation model (central for measured velocities, unused)."""
        return "central" if self.velocity == "measured" else self.velocity

    @property
    def candidate_models(self) -> tuple:
        """The models fitted to every window."""
        return AUTO_CANDIDATES if self.models == "auto" else self.models

    @property
    def keep_all(self) -> bool:
        """Whether a fits table keeps every candidate's row (explicit models) or only the selected one (auto)."""
        return self.models != "auto"

    def family(self, model, follow_latitude: bool | None = None, observation: str | None = None) -> ModelFamily:
        """The model family of candidate ``model`` seen through the observation model (default: the
        specification's; for ``irregular`` the plain ocean family, which the window's operator observes), its
        inertial part following the latitude when ``follow_latitude`` (default: when the spec says always)."""
        follow = self.inertial_frequency == "follow-latitude" if follow_latitude is None else follow_latitude
        observation = observation or self.resolved_observation
        base = get_family(model, "follow-latitude" if follow else "free")
        return base if observation == "irregular" else observed(base, observation, self.operator)

    def model_name(self, model) -> str:
        return model if isinstance(model, str) else model.name

    def max_freq(self, dt_days: float, fix_interval_days: float | None = None, observation: str | None = None,
                 inertial_frequency_cpd: float | None = None) -> float:
        """Top of the fitted band (cpd) for a window sampled every ``dt_days`` (the rule of the module docstring)."""
        if self.band != "auto":
            return float(self.band)
        observation = observation or self.resolved_observation
        nyquist = 0.5 / dt_days
        if self.velocity != "measured" and observation == "none":
            top = BAND_FRACTION_UNMODELLED_DIFFERENCE * nyquist
        else:
            top = BAND_FRACTION_OBSERVED[self.velocity] * nyquist
        if fix_interval_days is not None and fix_interval_days > dt_days:
            fix_nyquist = 0.5 / fix_interval_days
            fix_top = FIX_BAND_FRACTION * fix_nyquist
            if observation == "irregular":
                reach = abs(inertial_frequency_cpd) + INERTIAL_MARGIN_CPD if inertial_frequency_cpd is not None else 0
                fix_top = min(fix_top, max(IRREGULAR_BAND_FRACTION * fix_nyquist, reach))
            top = min(top, fix_top)
        return float(top)

    def resolve(self, dt_days: float, latitude=None, fix_interval_days: float | None = None,
                position_error_m: float | None = None, irregular: bool = False, fix_times_days=None,
                fix_error_m=None) -> WindowPlan:
        """The plan for one window: band, observation model, latitude handling and position noise.

        ``latitude`` is a scalar or one value per sample (degrees north), or None when unknown; ``irregular``
        says the window's fixes are sparser than its grid, ``fix_times_days`` and ``fix_error_m`` are those fixes
        (see :class:`~driftspec.analysis.tracks.windows.Window`).
        """
        observation = self.resolved_observation
        if self.observation == "auto" and irregular and fix_times_days is not None and self.velocity != "measured":
            observation = "irregular"
        lat_series = lat_mean = None
        follow = self.inertial_frequency == "follow-latitude"
        n = 0
        if latitude is not None:
            lat = np.asarray(latitude, float)
            lat_mean = float(lat) if lat.ndim == 0 else float(np.nanmean(lat))
            if lat.ndim:
                n = lat.size
                if self.inertial_frequency == "auto":
                    follow = _latitude_moves_the_inertial_frequency(lat, dt_days)
                lat_series = lat if follow else None
        noise = per_fix = None
        if observation == "differenced+noise":
            if self.position_noise == "input":
                if position_error_m is not None and np.isfinite(position_error_m) and position_error_m > 0:
                    noise = float(position_error_m)
            elif self.position_noise not in ("auto", "fit"):
                noise = float(self.position_noise)
        elif observation == "irregular":
            given = fix_error_m is not None and np.all(np.isfinite(fix_error_m)) and np.all(np.asarray(fix_error_m) > 0)
            if self.position_noise in ("auto", "input") and given:
                per_fix = np.asarray(fix_error_m, float)
            elif self.position_noise not in ("auto", "fit", "input"):
                per_fix = np.full(np.size(fix_times_days), float(self.position_noise))
        fc = float(inertial_frequency_cpd(lat_mean)) if lat_mean is not None and np.isfinite(lat_mean) else None
        return WindowPlan(dt_days=float(dt_days), max_freq=self.max_freq(dt_days, fix_interval_days, observation, fc),
                          observation=observation, operator=self.operator, latitude=lat_mean,
                          latitude_series=lat_series, position_noise=noise, follow_latitude=follow,
                          fix_times_days=fix_times_days if observation == "irregular" else None,
                          fix_error_m=per_fix, candidates=tuple(self.model_name(m) for m in self.candidate_models),
                          n_samples=n)

    # ------------------------------------------------------------------ identity
    def to_dict(self) -> dict:
        d = asdict(self)
        d["models"] = "auto" if self.models == "auto" else [self.model_name(m) for m in self.models]
        d["exclude"] = [list(p) for p in self.exclude]
        d["fixed"] = dict(self.fixed)
        return d

    def to_json(self) -> str:
        """A canonical JSON text: equal specifications give equal texts (stored beside resumable results)."""
        return json.dumps(self.to_dict(), sort_keys=True)

    @classmethod
    def from_dict(cls, d: dict) -> FitSpec:
        known = {f.name for f in fields(cls)}
        unknown = set(d) - known
        if unknown:
            raise ValueError(f"unknown fit settings {sorted(unknown)}")
        d = dict(d)
        if "models" in d and d["models"] != "auto":
            d["models"] = tuple(d["models"])
        if "exclude" in d:
            d["exclude"] = tuple(tuple(p) for p in d["exclude"])
        return cls(**d)

    def replace(self, **changes) -> FitSpec:
        return FitSpec.from_dict({**self.to_dict(), **changes})

    def differences(self, other: FitSpec) -> list[str]:
        """Names of the settings in which ``other`` differs (for a message that says what changed)."""
        a, b = self.to_dict(), other.to_dict()
        return [k for k in a if a[k] != b.get(k)]


def _latitude_moves_the_inertial_frequency(latitude, dt_days) -> bool:
    """Whether the local inertial frequency changes across the window by more than its frequency resolution
    ``1 / T`` (``T`` the window length): then a constant-frequency oscillation cannot describe it."""
    lat = latitude[np.isfinite(latitude)]
    if lat.size < 2:
        return False
    f = inertial_frequency_cpd(np.array([lat.min(), lat.max()]))
    return bool(abs(f[1] - f[0]) > 1.0 / (latitude.size * dt_days))


def _choice(name, value, allowed):
    if value not in allowed:
        raise ValueError(f"{name} must be one of {', '.join(map(str, allowed))}; got {value!r}")


def _positive(name, value, allow_zero=False) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number; got {value!r}") from None
    if not np.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        raise ValueError(f"{name} must be {'non-negative' if allow_zero else 'positive'}; got {value!r}")
    return v


__all__ = ["FitSpec", "WindowPlan"]
