"""Quality control of position fixes, with every input row accounted for.

Each dropped row gets exactly one reason, checked in this order:

``missing_value``       id, time, latitude or longitude is empty
``unparseable_time``    the time is present but cannot be read
``unparseable_value``   latitude or longitude is present but not a number
``latitude_range``      latitude outside [-90, 90]
``longitude_range``     longitude outside [-180, 360)
``duplicate_time``      a second fix of the same track at the same time (the first is kept)
``speed_spike``         the fix implies a speed above ``max_speed`` to both neighbours (or to its only
                        neighbour at a track end); the offending fix is dropped, not its neighbours

Out-of-order times are sorted, not dropped; ``reordered_rows`` counts the fixes earlier than a fix listed before
them in their own track (tracks may come in any order).
The report satisfies ``kept_rows + sum(dropped.values()) == input_rows``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..runs import run_bounds, track_codes, wrap_lon
from ..wording import counted
from .geodesy import great_circle_distance_m

REASONS = ("missing_value", "unparseable_time", "unparseable_value", "latitude_range",
           "longitude_range", "duplicate_time", "speed_spike")

#: Default speed ceiling, m/s. Common practice for surface drifters (no single published source).
DEFAULT_MAX_SPEED = 3.0
#: the per-track table's line for rows without a track id
MISSING_ID = "<missing id>"


@dataclass
class QCReport:
    """Accounting of a quality-control pass."""

    input_rows: int
    kept_rows: int
    dropped: dict[str, int]
    reordered_rows: int
    max_speed_m_s: float
    per_track: pd.DataFrame = field(repr=False)
    source: str = ""

    def to_dict(self) -> dict:
        return {
            "source": self.source,
            "input_rows": self.input_rows,
            "kept_rows": self.kept_rows,
            "dropped": dict(self.dropped),
            "reordered_rows": self.reordered_rows,
            "max_speed_m_s": self.max_speed_m_s,
            "tracks": self.per_track.assign(
                first_time=self.per_track["first_time"].astype(str),
                last_time=self.per_track["last_time"].astype(str),
            ).to_dict(orient="records"),
        }

    def summary(self) -> str:
        lost = ", ".join(f"{k} {v}" for k, v in self.dropped.items() if v) or "none"
        tracks = counted(len(self.per_track), "track")
        return (f"{counted(self.input_rows, 'row')} in, {self.kept_rows} kept in {tracks}; "
                f"dropped: {lost}; {counted(self.reordered_rows, 'row')} re-sorted")


def _spike_flags(ids, t_s, lat, lon, max_speed):
    """One vectorised pass: flag fixes whose speed to every neighbour exceeds ``max_speed``."""
    n = len(t_s)
    same_prev = np.zeros(n, dtype=bool)
    same_prev[1:] = ids[1:] == ids[:-1]
    dist = great_circle_distance_m(lat[:-1], lon[:-1], lat[1:], lon[1:])
    dt = t_s[1:] - t_s[:-1]
    with np.errstate(divide="ignore", invalid="ignore"):
        speed = np.where(dt > 0, dist / dt, np.inf)
    fast_prev = np.zeros(n, dtype=bool)
    fast_prev[1:] = speed > max_speed
    fast_next = np.zeros(n, dtype=bool)
    fast_next[:-1] = speed > max_speed
    has_prev = same_prev
    has_next = np.zeros(n, dtype=bool)
    has_next[:-1] = same_prev[1:]
    both = has_prev & has_next & fast_prev & fast_next
    # At a track end only one speed is known. If the neighbour is itself an interior spike, it goes first;
    # in a two-fix track whose fixes disagree, the later one goes.
    spike_next, spike_prev = np.zeros(n, dtype=bool), np.zeros(n, dtype=bool)
    spike_next[:-1], spike_prev[1:] = both[1:], both[:-1]
    first = ~has_prev & has_next & fast_next & ~spike_next
    last = has_prev & ~has_next & fast_prev & ~spike_prev
    pair = np.zeros(n, dtype=bool)
    pair[:-1] = first[:-1] & last[1:]
    ends = (first & ~pair) | last
    return both | ends


def clean_fixes(raw: pd.DataFrame, max_speed: float = DEFAULT_MAX_SPEED, source: str = ""):
    """Quality-control fixes read by :func:`~driftspec.analysis.io.read_fixes`.

    Parameters
    ----------
    raw : pandas.DataFrame
        Output of ``read_fixes`` (one row per input row).
    max_speed : float
        Speed ceiling in m/s for the spike test (default 3 m/s, common practice for surface drifters).
    source : str
        Name of the input, recorded in the report.

    Returns
    -------
    fixes : pandas.DataFrame
        Kept fixes sorted by (id, time), longitudes wrapped to [-180, 180), private flags removed.
    report : QCReport
        Accounting of every input row.
    """
    if not np.isfinite(max_speed) or max_speed <= 0:
        raise ValueError(f"max_speed must be positive, got {max_speed}")
    n_in = len(raw)
    code = {name: k + 1 for k, name in enumerate(REASONS)}  # 0 = kept
    reason = np.zeros(n_in, dtype=np.int8)

    def mark(mask, name):
        reason[mask & (reason == 0)] = code[name]

    missing = (raw["id"].isna().to_numpy() | (raw["time"].isna().to_numpy() & ~raw["time_unparseable"])
               | (raw["lat"].isna().to_numpy() & ~raw["value_unparseable"])
               | (raw["lon"].isna().to_numpy() & ~raw["value_unparseable"]))
    mark(missing, "missing_value")
    mark(raw["time_unparseable"].to_numpy(), "unparseable_time")
    mark(raw["value_unparseable"].to_numpy(), "unparseable_value")
    lat, lon = raw["lat"].to_numpy(float), raw["lon"].to_numpy(float)
    with np.errstate(invalid="ignore"):
        mark(~((lat >= -90) & (lat <= 90)) & ~np.isnan(lat), "latitude_range")
        mark(~((lon >= -180) & (lon < 360)) & ~np.isnan(lon), "longitude_range")
    # any NaN left in lat/lon at this point was counted above; guard anyway
    mark(np.isnan(lat) | np.isnan(lon), "missing_value")

    # work on index arrays into the input and copy the table once at the end (memory: one copy)
    if isinstance(raw["id"].dtype, pd.CategoricalDtype) and raw["id"].cat.categories.is_monotonic_increasing:
        all_codes = raw["id"].cat.codes.to_numpy().astype(np.int64)  # small int types overflow in arithmetic
        uniques = np.asarray(raw["id"].cat.categories, dtype=object)
    else:  # sorted: code order is name order
        all_codes, uniques = pd.factorize(raw["id"].to_numpy(), sort=True)
    rows = np.flatnonzero(reason == 0)
    codes = all_codes[rows]
    t_ns = raw["time"].to_numpy().astype("datetime64[ns]").view(np.int64)[rows]
    same = codes[1:] == codes[:-1]
    if np.all(codes[1:] >= codes[:-1]) and np.all(t_ns[1:][same] >= t_ns[:-1][same]):
        reordered = 0  # already in (id, time) order, as written files usually are: no sort needed
    else:
        order = np.lexsort((t_ns, codes))
        # fixes out of time order: those earlier than a fix listed before them in their own track (one fix listed
        # late counts once, however long its track; tracks may come in any order)
        by_track = np.argsort(codes, kind="stable")
        t_g = pd.Series(t_ns[by_track])
        latest_before = t_g.groupby(codes[by_track]).cummax().groupby(codes[by_track]).shift()
        reordered = int((t_g < latest_before).sum())
        rows, codes, t_ns = rows[order], codes[order], t_ns[order]
    dup = np.zeros(len(rows), dtype=bool)
    dup[1:] = (codes[1:] == codes[:-1]) & (t_ns[1:] == t_ns[:-1])
    reason[rows[dup]] = code["duplicate_time"]
    rows, codes, t_ns = rows[~dup], codes[~dup], t_ns[~dup]

    t_s = t_ns / 1e9
    la = lat[rows]
    lo = wrap_lon(lon[rows])
    keep = np.ones(len(rows), dtype=bool)
    for _ in range(20):  # each pass removes isolated spikes; clusters take a few passes
        idx = np.flatnonzero(keep)
        if len(idx) < 2:
            break
        flags = _spike_flags(codes[idx], t_s[idx], la[idx], lo[idx], max_speed)
        if not flags.any():
            break
        keep[idx[flags]] = False
    reason[rows[~keep]] = code["speed_spike"]
    rows = rows[keep]
    cols = [c for c in raw.columns if c not in ("id", "lon", "time_unparseable", "value_unparseable")]
    fixes = raw[cols].take(rows).reset_index(drop=True)
    fixes.insert(0, "id", pd.Categorical.from_codes(codes[keep], categories=pd.Index(uniques, dtype=object)))
    fixes["lon"] = lo[keep]
    fixes = fixes[["id", "time", "lat", "lon", *[c for c in cols if c not in ("time", "lat")]]]

    counts = np.bincount(reason, minlength=len(REASONS) + 1)
    dropped = {r: int(counts[code[r]]) for r in REASONS}
    per_track = _per_track(all_codes, uniques, reason, fixes)
    report = QCReport(n_in, len(fixes), dropped, reordered, float(max_speed), per_track, source)
    assert report.kept_rows + sum(dropped.values()) == n_in
    return fixes, report


def _per_track(codes, uniques, reason, fixes) -> pd.DataFrame:
    """Rows in, kept and dropped by reason for every track (rows without an id form their own line)."""
    names = ["", *REASONS]
    ntr = len(uniques) + 1  # last line: rows without an id
    codes = np.where(codes < 0, ntr - 1, codes).astype(np.int64)
    counts = np.bincount(codes * len(names) + reason.astype(np.int64),
                         minlength=ntr * len(names)).reshape(-1, len(names))
    table = pd.DataFrame(counts, columns=["kept_rows", *REASONS])
    table.insert(0, "input_rows", counts.sum(axis=1))
    table.insert(0, "id", [*map(str, uniques), MISSING_ID])
    table = table[table["input_rows"] > 0].reset_index(drop=True)
    span = fixes.groupby("id", observed=True)["time"].agg(first_time="min", last_time="max")
    span.index = span.index.astype(str)
    return table.merge(span, left_on="id", right_index=True, how="left")


def clean_fixes_in_batches(raw: pd.DataFrame, max_speed: float = DEFAULT_MAX_SPEED, source: str = "",
                           tracks_per_batch: int = 500):
    """:func:`clean_fixes` a few hundred tracks at a time, for inputs too large to clean in one piece.

    Quality control is per track, so the result is the same as one pass. Yields ``(fixes, report)`` for
    each batch (rows without a track id go with the first); :func:`merge_reports` combines the reports.
    """
    codes, _ = track_codes(raw["id"]) if isinstance(raw["id"].dtype, pd.CategoricalDtype) else \
        (pd.factorize(raw["id"].to_numpy(), sort=True)[0].astype(np.int64), None)
    order = np.argsort(codes, kind="stable")
    sorted_codes = codes[order]
    starts, _ = run_bounds(sorted_codes)
    first_real = int(np.searchsorted(sorted_codes[starts], 0))  # skip the block of missing ids (-1)
    bounds = np.r_[0, starts[first_real:][tracks_per_batch::tracks_per_batch], len(order)]
    for a, b in zip(bounds[:-1], bounds[1:]):
        rows = np.sort(order[a:b])
        yield clean_fixes(raw.take(rows).reset_index(drop=True), max_speed=max_speed, source=source)


def merge_reports(reports, source: str = "") -> QCReport:
    """One report for several batches of the same input."""
    reports = list(reports)
    if not reports:
        return QCReport(0, 0, {r: 0 for r in REASONS}, 0, DEFAULT_MAX_SPEED, pd.DataFrame(), source)
    dropped = {r: sum(rep.dropped[r] for rep in reports) for r in REASONS}
    per_track = pd.concat([rep.per_track for rep in reports], ignore_index=True)
    missing = (per_track["id"] == MISSING_ID).to_numpy()
    lines = [per_track.loc[~missing].sort_values("id", kind="stable")]
    if missing.any():  # rows without an id, met in one batch or several: one line, last
        counts = per_track.loc[missing].drop(columns=["id", "first_time", "last_time"]).sum()
        lines.append(pd.DataFrame([{"id": MISSING_ID, **counts.to_dict()}]))
    per_track = pd.concat(lines, ignore_index=True)
    return QCReport(sum(r.input_rows for r in reports), sum(r.kept_rows for r in reports), dropped,
                    sum(r.reordered_rows for r in reports), reports[0].max_speed_m_s,
                    per_track.reset_index(drop=True), source or reports[0].source)
