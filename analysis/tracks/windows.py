"""Cut gridded velocity segments into analysis windows.

A window is a stretch of one track segment of fixed length, with its own mask of valid samples. Windows
overlap by a fraction of their length; a window is kept only when the fraction of valid samples
(``coverage``) reaches ``min_coverage``. Missing samples stay missing (NaN): the likelihoods handle them.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..conventions import inertial_frequency_cpd
from ..runs import circular_mean_lon, run_bounds, track_codes
from ..wording import counted
from .resample import IRREGULAR_INTERVAL_STEPS


@dataclass
class Window:
    """One analysis window of a track.

    Attributes
    ----------
    track_id : str
    segment, index : int
        Segment of the track and window number within the segment.
    start, end : pandas.Timestamp
        Times of the first and last sample.
    dt_seconds : float
        Sample interval.
    z : ndarray of complex
        Complex velocity ``u + i v`` in m/s, NaN where missing.
    latitude, longitude : ndarray
        Position of each sample, degrees.
    lat, lon : float
        Mean position (longitude averaged on the circle).
    coverage : float
        Fraction of valid samples.
    position_error_m : float or None
        Median position error of the window's fixes, when the input carried one.
    fix_interval_s : float or None
        Mean interval between the real fixes inside the window, s (at least the sample interval).
    fix_times_days : ndarray or None
        Times (days after ``start``) of the fixes the window's velocities are interpolated from, those just
        outside it included: what an exact model of the interpolation needs.
    fix_error_m : ndarray or None
        Those fixes' position errors (m, per component), when the input carried them.
    mask_distance_s : float or None
        The mask distance the track was gridded with, s.
    """

    track_id: str
    segment: int
    index: int
    start: pd.Timestamp
    end: pd.Timestamp
    dt_seconds: float
    z: np.ndarray
    latitude: np.ndarray
    longitude: np.ndarray
    position_error_m: float | None = None
    fix_interval_s: float | None = None
    fix_times_days: np.ndarray | None = None
    fix_error_m: np.ndarray | None = None
    mask_distance_s: float | None = None

    @property
    def irregular(self) -> bool:
        """Whether the fixes behind the window are sparser than its grid (mean interval above 1.5 steps), so
        that interpolation shapes its velocities and the fit should model it exactly."""
        return self.fix_times_days is not None and (self.fix_interval_s or 0.0) > IRREGULAR_INTERVAL_STEPS * \
            self.dt_seconds

    @property
    def mask(self) -> np.ndarray:
        return np.isfinite(self.z)

    @property
    def n_samples(self) -> int:
        return int(self.z.size)

    @property
    def coverage(self) -> float:
        return float(self.mask.mean()) if self.z.size else 0.0

    @property
    def lat(self) -> float:
        return float(np.nanmean(self.latitude))

    @property
    def lon(self) -> float:
        return circular_mean_lon(self.longitude)

    @property
    def inertial_frequency_cpd(self) -> float:
        """Local inertial frequency at the mean latitude, cpd (negative in the northern hemisphere)."""
        return inertial_frequency_cpd(self.lat)

    @property
    def key(self) -> tuple[str, str]:
        return (self.track_id, self.start.isoformat())


def window_bounds(n: int, length: int, overlap: float) -> list[tuple[int, int]]:
    """Start/stop indices of windows of ``length`` samples with fractional ``overlap`` in ``[0, 1)``."""
    if not 0 <= overlap < 1:
        raise ValueError(f"overlap must be in [0, 1), got {overlap}")
    if length < 2:
        raise ValueError("window length must be at least 2 samples")
    hop = max(1, int(round(length * (1 - overlap))))
    return [(s, s + length) for s in range(0, n - length + 1, hop)]


@dataclass
class WindowCensus:
    """What :func:`iter_windows` saw: segments, candidate windows and why candidates were not kept, so that an
    empty result can say why with numbers."""

    segments: int = 0
    short_segments: int = 0  # shorter than one window
    longest_segment_days: float = 0.0
    candidates: int = 0
    kept: int = 0
    low_coverage: list = field(default_factory=list)  # coverage of each candidate below the limit
    window_days: float = 0.0  # the window length asked for

    def explain(self, min_coverage: float) -> str:
        """One paragraph: why no (or few) windows were kept, with numbers, and what to try."""
        lines = [f"windows: {self.kept} of {counted(self.candidates, 'candidate window')} kept, from "
                 f"{counted(self.segments, 'track segment')}"]
        if self.short_segments:
            n = self.short_segments
            window = f"one {self.window_days:g}-day window" if self.window_days else "one window"
            longest = f"{self.longest_segment_days:.1f}"
            if self.longest_segment_days < self.window_days <= float(longest):  # a hair short: say by how much
                longest = f"{self.longest_segment_days:.3f}"
            lines.append(f"{counted(n, 'segment')} {'is' if n == 1 else 'are'} shorter than {window}, so not fitted "
                         f"(the longest segment of all: {longest} days): try a shorter --window-days or a longer "
                         "--split-gap")
        if self.low_coverage:
            cov = np.asarray(self.low_coverage)
            lines.append(f"{counted(cov.size, 'window')} had coverage below --min-coverage {min_coverage:g} (median "
                         f"{np.median(cov):.2f}, best {cov.max():.2f}): sparse or irregular fixes leave grid samples "
                         "missing; try a longer --mask-distance (e.g. 12h), a longer --step, or a lower --min-coverage")
        if self.segments == 0:
            lines.append("no track segment had two or more grid samples: check the input's times and --split-gap")
        return "; ".join(lines)


def iter_windows(vel: pd.DataFrame, window_days: float = 60.0, overlap: float = 0.5,
                 min_coverage: float = 0.8, use_measured: bool = False,
                 census: WindowCensus | None = None) -> Iterator[Window]:
    """Yield analysis windows from a velocity table made by :func:`~driftspec.analysis.velocity.add_velocity`.

    Parameters
    ----------
    vel : pandas.DataFrame
        Gridded table with ``u``, ``v`` (and ``u_meas``, ``v_meas`` when ``use_measured``).
    window_days : float
        Window length in days.
    overlap : float
        Fractional overlap of consecutive windows, in [0, 1).
    min_coverage : float
        Minimum fraction of valid samples for a window to be kept.
    use_measured : bool
        Use the measured velocities carried by the input instead of the differenced positions.
    census : WindowCensus, optional
        Filled in with counts of segments and candidate windows and the coverage of those not kept.
    """
    census = census if census is not None else WindowCensus()
    census.window_days = float(window_days)
    if window_days <= 0:
        raise ValueError("window_days must be positive")
    if len(vel) == 0:
        return
    ucol, vcol = ("u_meas", "v_meas") if use_measured else ("u", "v")
    if ucol not in vel:
        raise ValueError("the input carries no measured velocities (u, v)")
    ids, names = track_codes(vel["id"])
    seg = vel["segment"].to_numpy()
    t_ns = vel["time"].to_numpy().astype("datetime64[ns]").astype(np.int64)
    z = vel[ucol].to_numpy(float) + 1j * vel[vcol].to_numpy(float)
    if use_measured:
        z[~vel["valid"].to_numpy(bool)] = np.nan
    lat, lon = vel["lat"].to_numpy(float), vel["lon"].to_numpy(float)
    perr = vel["position_error_m"].to_numpy(float) if "position_error_m" in vel else None
    fixd = vel["fix_distance_s"].to_numpy(float) if "fix_distance_s" in vel else None
    fixes = _FixLookup(vel) if "fix_before" in vel else None
    maskd = vel["mask_distance_s"].to_numpy(float) if "mask_distance_s" in vel else None
    starts, stops = run_bounds(ids, seg)
    for a, b in zip(starts, stops):
        if b - a < 2:
            continue
        dt_ns = int(np.median(np.diff(t_ns[a:b])))
        length = int(round(window_days * 86400e9 / dt_ns))
        if length < 2:
            raise ValueError("window shorter than two samples")
        bounds = window_bounds(b - a, length, overlap)
        census.segments += 1
        census.longest_segment_days = max(census.longest_segment_days, (b - a) * dt_ns / 86400e9)
        census.short_segments += not bounds
        census.candidates += len(bounds)
        for k, (s, e) in enumerate(bounds):
            zz = z[a + s:a + e]
            coverage = np.isfinite(zz).mean()
            if coverage < min_coverage:
                census.low_coverage.append(float(coverage))
                continue
            census.kept += 1
            t_start = t_ns[a + s]
            fix_t = fix_e = None
            interval = (max(dt_ns / 1e9, 4.0 * float(np.mean(fixd[a + s:a + e]))) if fixd is not None else None)
            if fixes is not None:
                fix_t, fix_e, interval = fixes.window(max(a, a + s - 1), min(b, a + e + 1), t_start, t_ns[a + e - 1],
                                                      dt_ns)
            yield Window(
                track_id=str(names[ids[a]]), segment=int(seg[a]), index=k,
                start=pd.Timestamp(t_start), end=pd.Timestamp(t_ns[a + e - 1]),
                dt_seconds=dt_ns / 1e9, z=zz.copy(), latitude=lat[a + s:a + e].copy(),
                longitude=lon[a + s:a + e].copy(),
                position_error_m=(float(np.nanmedian(perr[a + s:a + e])) if perr is not None else None),
                fix_interval_s=interval, fix_times_days=fix_t, fix_error_m=fix_e,
                mask_distance_s=float(maskd[a]) if maskd is not None else None,
            )


class _FixLookup:
    """The fixes behind rows of a gridded table (its ``fix_before``/``fix_after`` columns)."""

    def __init__(self, vel: pd.DataFrame):
        self.before = vel["fix_before"].to_numpy().astype("datetime64[ns]").astype(np.int64)
        self.after = vel["fix_after"].to_numpy().astype("datetime64[ns]").astype(np.int64)
        self.err_before = vel["error_before_m"].to_numpy(float) if "error_before_m" in vel else None
        self.err_after = vel["error_after_m"].to_numpy(float) if "error_after_m" in vel else None

    def window(self, lo: int, hi: int, t_start: int, t_end: int, dt_ns: int):
        """Fix times (days after ``t_start``), their errors, and the mean fix interval inside the window (s)
        for the rows ``lo:hi`` (the window's samples and their neighbours)."""
        t = np.concatenate([self.before[lo:hi], self.after[lo:hi]])
        t, first = np.unique(t, return_index=True)
        err = None
        if self.err_before is not None:
            err = np.concatenate([self.err_before[lo:hi], self.err_after[lo:hi]])[first]
        inside = t[(t >= t_start) & (t <= t_end)]
        interval = float((inside[-1] - inside[0]) / (inside.size - 1) / 1e9) if inside.size > 1 else np.inf
        return (t - t_start) / 86400e9, err, max(interval, dt_ns / 1e9)
