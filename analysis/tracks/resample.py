"""Split tracks at long gaps and interpolate positions onto a regular time grid, with a validity mask.

The gridded table has one row per grid sample:

``id``, ``segment`` (0-based within the track), ``time``, ``lat``, ``lon`` (interpolated),
``valid`` (the sample lies within ``mask_distance`` of a real fix), ``fix_distance_s`` (time to the
nearest fix, s), ``mask_distance_s`` (the mask distance used for the track, s), ``fix_before`` and ``fix_after``
(times of the two fixes the sample is interpolated between), ``u_meas``/``v_meas`` (interpolated measured
velocity, when the input had it), and ``position_error_m`` (interpolated) with ``error_before_m`` and
``error_after_m`` (the two fixes' own errors) when the input had it.

Interpolation never crosses a segment boundary and never crosses the antimeridian the long way round:
longitudes are unwrapped along each track before interpolation and wrapped back afterwards.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..runs import run_bounds, track_codes, wrap_lon

DEFAULT_STEP = pd.Timedelta(hours=1)
#: Split a track where consecutive fixes are further apart than this.
DEFAULT_SPLIT_GAP = pd.Timedelta(days=3)
#: A grid sample further than this from every real fix is marked invalid (common practice, no source) ...
REGULAR_MASK_DISTANCE = pd.Timedelta(hours=3)
#: ... for tracks with regular fixes; for tracks whose fixes are irregular (a mean interval over 1.5 grid steps,
#: as satellite fixes are) gaps of up to two days are bridged: the fit then models the interpolation exactly
#: (:mod:`driftspec.analysis.spectral.irregular`), so a bridged sample is information, not invention.
IRREGULAR_MASK_DISTANCE = pd.Timedelta(hours=24)
#: ``mask_distance="auto"`` chooses per track between the two
DEFAULT_MASK_DISTANCE = "auto"
#: a track is irregular when its mean fix interval exceeds this many grid steps
IRREGULAR_INTERVAL_STEPS = 1.5
#: a regular segment's grid follows its fixes' own phase within the step when they keep one: the mean resultant
#: length of their phases (as angles, 2 pi per step) is at least this, i.e. phases spread (normally) by up to about
#: a fifth of a step (11 minutes for hourly fixes); more spread phases have no phase worth following (a rule of
#: thumb chosen here, no source)
PHASE_COHERENCE = 0.5
#: a phase within this fraction of a step of the whole step is the whole step (one minute for hourly fixes: the
#: weights of the two fixes a sample is interpolated between move by at most 1/60; a rule of thumb chosen here)
PHASE_SNAP = 1 / 60
#: the rule the grid's phase follows, stored with a run's settings (``driftspec fit --resume`` refuses to mix rows
#: gridded under two rules): "fixes" = a regular segment keeps its fixes' phase
GRID_PHASE = "fixes"


def _segment_starts(ids: np.ndarray, t_ns: np.ndarray, split_gap_ns: int) -> np.ndarray:
    new = np.ones(len(ids), dtype=bool)
    new[1:] = (ids[1:] != ids[:-1]) | (np.diff(t_ns) > split_gap_ns)
    return new


def _segment_phase(t_ns: np.ndarray, seg_index: np.ndarray, n_seg: int, step_ns: int) -> np.ndarray:
    """Per segment, the phase (ns, in ``[0, step)``) its fixes keep within the grid step: the median of their
    phases taken about their circular mean, in whole nanoseconds (fixes that all keep one phase get exactly that
    phase, and the grid holds them exactly); 0 where they keep none (mean resultant length below
    ``PHASE_COHERENCE``) or one within ``PHASE_SNAP`` of the whole step."""
    angle = 2 * np.pi * (t_ns % step_ns).astype(float) / step_ns
    n = np.bincount(seg_index, minlength=n_seg)
    c = np.bincount(seg_index, np.cos(angle), minlength=n_seg) / n
    s = np.bincount(seg_index, np.sin(angle), minlength=n_seg) / n
    mean = np.round(np.arctan2(s, c) / (2 * np.pi) * step_ns).astype(np.int64)
    half = step_ns // 2
    about_mean = (t_ns - mean[seg_index] + half) % step_ns - half  # each fix's phase, from its segment's mean
    phase = (mean + np.round(pd.Series(about_mean).groupby(seg_index).median().to_numpy()).astype(np.int64)) % step_ns
    from_whole = np.minimum(phase, step_ns - phase)
    keep = (np.hypot(c, s) >= PHASE_COHERENCE) & (from_whole > PHASE_SNAP * step_ns)
    return np.where(keep, phase, 0)


def regular_grid(fixes: pd.DataFrame, step=DEFAULT_STEP, split_gap=DEFAULT_SPLIT_GAP,
                 mask_distance=DEFAULT_MASK_DISTANCE) -> pd.DataFrame:
    """Interpolate cleaned fixes onto a regular time grid, segment by segment.

    Parameters
    ----------
    fixes : pandas.DataFrame
        Cleaned fixes sorted by (id, time), as returned by :func:`~driftspec.analysis.qc.clean_fixes`.
    step : pandas.Timedelta or str
        Grid step (default 1 hour). Grid times are whole multiples of ``step`` since the Unix epoch, plus, for a
        segment with regular fixes (mean interval up to 1.5 steps) that keep one phase within the step,
        that phase: hourly fixes at 17 minutes past each hour are gridded at 17 minutes past, so the grid holds the
        fixes themselves and their errors stay white, as the fitted observation model assumes (interpolating
        between two fixes halves the noise variance at mid-interval and correlates neighbours). The phase is the
        median of the fixes' times modulo ``step`` about their circular mean, used when their mean resultant length is
        at least ``PHASE_COHERENCE`` and the phase is more than ``PHASE_SNAP`` of a step from the whole step
        (fixes jittering around the whole hour keep the whole hour).
    split_gap : pandas.Timedelta or str
        Tracks are split into segments where consecutive fixes are further apart than this.
    mask_distance : pandas.Timedelta, str or "auto"
        Samples further than this from the nearest real fix are kept but marked ``valid = False``. ``"auto"``
        (default): 3 hours for tracks with regular fixes, 24 hours for tracks whose mean fix interval exceeds 1.5
        grid steps (the column ``mask_distance_s`` says which).

    Returns
    -------
    pandas.DataFrame
        The gridded table described in the module docstring, sorted by (id, segment, time).
    """
    step_ns = pd.Timedelta(step).value
    split_ns = pd.Timedelta(split_gap).value
    auto_mask = isinstance(mask_distance, str) and mask_distance == "auto"
    mask_ns = 0 if auto_mask else pd.Timedelta(mask_distance).value
    if step_ns <= 0 or split_ns <= 0 or mask_ns < 0:
        raise ValueError("step and split_gap must be positive, mask_distance non-negative")
    if len(fixes) == 0:
        return pd.DataFrame(columns=["id", "segment", "time", "lat", "lon", "valid", "fix_distance_s"])
    ids, names = track_codes(fixes["id"])
    t_ns = fixes["time"].to_numpy().astype("datetime64[ns]").astype(np.int64)
    lat = fixes["lat"].to_numpy(float)
    # unwrap longitude along each track so that interpolation goes the short way across 180 degrees
    lon = fixes["lon"].to_numpy(float)
    dlon = np.diff(lon)
    dlon = (dlon + 180.0) % 360.0 - 180.0
    same = ids[1:] == ids[:-1]
    steps = np.concatenate([[0.0], np.where(same, dlon, 0.0)])
    starts_track, stops_track = run_bounds(ids)
    cum = np.cumsum(steps)
    cum -= np.repeat(cum[starts_track], stops_track - starts_track)
    lon_unwrapped = np.repeat(lon[starts_track], stops_track - starts_track) + cum

    seg_new = _segment_starts(ids, t_ns, split_ns)
    seg_index = np.cumsum(seg_new) - 1  # global segment number per fix
    seg_first = np.flatnonzero(seg_new)
    seg_last = np.append(seg_first[1:], len(ids)) - 1
    track_of_fix = np.cumsum(np.concatenate([[True], ~same])) - 1
    # the phase is a segment's own (a track's gaps longer than split_gap make it irregular as a whole, not its runs)
    seg_interval = (t_ns[seg_last] - t_ns[seg_first]) / np.maximum(seg_last - seg_first, 1)
    phase = _segment_phase(t_ns, seg_index, len(seg_first), step_ns)
    phase[seg_interval > IRREGULAR_INTERVAL_STEPS * step_ns] = 0
    g0 = -(-(t_ns[seg_first] - phase) // step_ns)  # ceil to the segment's grid
    g1 = (t_ns[seg_last] - phase) // step_ns
    n_grid = np.maximum(g1 - g0 + 1, 0)
    total = int(n_grid.sum())
    grid_seg = np.repeat(np.arange(len(seg_first)), n_grid)
    offsets = np.arange(total) - np.repeat(np.cumsum(n_grid) - n_grid, n_grid)
    grid_t = (np.repeat(g0, n_grid) + offsets) * step_ns + np.repeat(phase, n_grid)

    # one np.interp over all segments: shift each segment onto its own stretch of a common axis
    t0 = t_ns[seg_first]
    span = 1e9 * 4e8  # 400 million seconds (12.7 years) per segment slot, in ns, as float
    x_fix = (t_ns - t0[seg_index]).astype(float) + seg_index * span
    x_grid = (grid_t - t0[grid_seg]).astype(float) + grid_seg * span
    if (t_ns[seg_last] - t0).max(initial=0) >= span:
        raise ValueError("a track segment is longer than 12 years; split it with a smaller split_gap")
    seg_in_track = seg_index[seg_first] - seg_index[starts_track][track_of_fix[seg_first]]
    out = {
        "id": pd.Categorical.from_codes(ids[seg_first][grid_seg], categories=pd.Index(names)),
        "segment": seg_in_track[grid_seg],
        "time": grid_t.astype("datetime64[ns]"),
        "lat": np.interp(x_grid, x_fix, lat),
        "lon": wrap_lon(np.interp(x_grid, x_fix, lon_unwrapped)),
    }
    # distance in time to the nearest real fix of the same segment
    pos = np.searchsorted(x_fix, x_grid, side="left")
    nxt = np.clip(pos, 0, len(x_fix) - 1)
    prv = np.clip(pos - 1, 0, len(x_fix) - 1)
    d_next = np.where(seg_index[nxt] == grid_seg, np.abs(x_fix[nxt] - x_grid), np.inf)
    d_prev = np.where(seg_index[prv] == grid_seg, np.abs(x_grid - x_fix[prv]), np.inf)
    nearest = np.minimum(d_next, d_prev)
    if auto_mask:  # per track, from its mean fix interval
        counts = stops_track - starts_track
        mean_interval = (t_ns[stops_track - 1] - t_ns[starts_track]) / np.maximum(counts - 1, 1)
        irregular = mean_interval > IRREGULAR_INTERVAL_STEPS * step_ns
        per_track = np.where(irregular, IRREGULAR_MASK_DISTANCE.value, REGULAR_MASK_DISTANCE.value)
        mask_of_sample = per_track[track_of_fix[seg_first]][grid_seg]
    else:
        mask_of_sample = np.full(total, mask_ns)
    out["valid"] = nearest <= mask_of_sample
    out["mask_distance_s"] = mask_of_sample / 1e9
    out["fix_distance_s"] = nearest / 1e9
    # the two fixes each sample is interpolated between (what an exact model of the interpolation needs)
    same_before = seg_index[prv] == grid_seg
    out["fix_before"] = np.where(same_before, t_ns[prv], t_ns[nxt]).astype("datetime64[ns]")
    out["fix_after"] = np.where(seg_index[nxt] == grid_seg, t_ns[nxt], t_ns[prv]).astype("datetime64[ns]")
    if "position_error_m" in fixes:
        err = fixes["position_error_m"].to_numpy(float)
        out["error_before_m"] = np.where(same_before, err[prv], err[nxt])
        out["error_after_m"] = np.where(seg_index[nxt] == grid_seg, err[nxt], err[prv])
    for col, name in (("u", "u_meas"), ("v", "v_meas"), ("position_error_m", "position_error_m")):
        if col in fixes:
            vals = fixes[col].to_numpy(float)
            good = np.isfinite(vals)
            if good.any():
                out[name] = np.interp(x_grid, x_fix[good], vals[good])
    return pd.DataFrame(out)
