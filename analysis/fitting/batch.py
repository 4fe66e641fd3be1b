"""Fits for every window of a data set: serial, a process pool, or a Dask cluster, resumable.

Results stream to ``<out>.partial/part-NNNNN.parquet`` (each part written atomically) as chunks of windows
finish; at the end the parts are combined into ``<out>`` (Parquet or CSV, written atomically) and the
folder is removed. ``resume=True`` skips windows already present in ``<out>`` or in its parts, so an
interrupted run loses at most the chunks in flight. Rows are sorted by (track_id, window_start, model), so
the table does not depend on how the work was distributed.
"""

from __future__ import annotations

import itertools
import json
import os
import shutil
import zlib
from collections.abc import Iterable
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import pandas as pd
from threadpoolctl import threadpool_limits

from ..io.tables import naive_utc, read_table, write_table
from ..tracks.ellipse import ELLIPSE_UNITS, variance_ellipse
from ..tracks.windows import Window
from ..wording import counted
from .anisotropy import isotropic_tensor_columns
from .core import fit_window
from .spec import FitSpec

KEY = ["track_id", "window_start", "model"]
#: where a run keeps its settings: a file in the parts folder, a key in the Parquet metadata
SETTINGS_FILE = "settings.json"
#: how long ``--dask ADDRESS`` waits for the scheduler before giving up with a one-line message
DASK_CONNECT_TIMEOUT_S = 10.0
#: marks parts that replace the table at ``out`` (a run without resume): the old rows are not merged into them
REPLACES_FILE = "replaces-output"
SETTINGS_KEY = "driftspec_run_settings"
WINDOW_COLUMNS = ["track_id", "window_start", "window_end", "lat", "lon", "n_samples", "coverage",
                  "inertial_frequency_local", "max_freq"]

#: units of the fixed columns of a fits table (parameters add their own from the families)
COLUMN_UNITS = {
    "lat": "degrees_north", "lon": "degrees_east", "n_samples": "1", "coverage": "1",
    "inertial_frequency_local": "day-1", "max_freq": "day-1", "position_noise": "m", "position_error_scale": "1",
    "loglik": "1", "aic": "1", "grid_step_s": "s", "fix_interval_s": "s", "mask_distance_s": "s",
    "anisotropy": "1", "anisotropy_angle_deg": "degree", "isotropy_pvalue": "1", "diffusivity_major": "m2 s-1",
    "diffusivity_minor": "m2 s-1", "diffusivity_angle_deg": "degree", "diffusivity_major_se": "m2 s-1",
    "diffusivity_minor_se": "m2 s-1", "diffusivity_angle_deg_se": "degree",
    "gof_pvalue": "1", "n_valid": "1", "n_freq": "1", "position_error_scale_se": "1", "position_noise_se": "m",
    "diffusivity": "m2 s-1", "diffusivity_se": "m2 s-1", "matern_timescale_days": "day",
    "inertial_efold_days": "day", "window_start": "UTC", "window_end": "UTC",
}


def column_units(spec: FitSpec) -> dict:
    """Units of every column a fits table made under ``spec`` can have."""
    units = {**COLUMN_UNITS, **ELLIPSE_UNITS}
    for m, follow in itertools.product(spec.candidate_models, (False, True)):
        for p in spec.family(m, follow).parameters:
            units[p.name] = p.unit
            units[p.name + "_se"] = p.unit
    return units


def window_rows(w: Window, spec: FitSpec) -> list[dict]:
    """The fits-table rows of one window: one per candidate model (:func:`~.core.fit_window`), with the window's
    identity, position and variance ellipse; a failure is a row with a status, never an exception."""
    base = {"track_id": w.track_id, "window_start": w.start, "window_end": w.end, "lat": w.lat, "lon": w.lon,
            "n_samples": w.n_samples, "coverage": w.coverage, "inertial_frequency_local": w.inertial_frequency_cpd,
            "grid_step_s": w.dt_seconds, "fix_interval_s": w.fix_interval_s, "mask_distance_s": w.mask_distance_s,
            **variance_ellipse(w.z)}
    try:
        results = fit_window(w, spec)
    except Exception as exc:  # noqa: BLE001 - a failed fit is a row, not a crash
        models = spec.candidate_models if spec.keep_all else spec.candidate_models[:1]
        return [{**base, "model": spec.model_name(m), "estimator": spec.estimator, "status": "failed",
                 "message": f"{type(exc).__name__}: {exc}", "selected": k == 0, "selection": "fit raised"}
                for k, m in enumerate(models)]
    rows = []
    for r in results if spec.keep_all else [r for r in results if r.selected]:
        row = r.to_row()
        if spec.anisotropic:
            row.update({"selected": r.selected, "selection": r.selection, "observation": r.observation,
                        "isotropy_pvalue": r.isotropy_pvalue})
            if "diffusivity_major" not in row:  # an isotropic fit: equal principal values, no direction
                row.update(isotropic_tensor_columns(r.diffusivity, r.diffusivity_se))
        if spec.bootstrap and r.ok:
            seed = zlib.crc32(f"{w.track_id}|{w.start.value}|{r.model}".encode())  # same in every process
            row.update({f"{k}_se_boot": v for k, v in r.bootstrap_stderr(spec.bootstrap, seed).items()})
        rows.append({**base, **row})
    return rows


def fit_chunk(windows: list[Window], spec: FitSpec) -> pd.DataFrame:
    """The rows of a chunk of windows, with BLAS and OpenMP on one thread: a window's matrices are small, so
    library threads only contend with the other worker processes (measured: the same 378 windows in one process
    took 24.4 s wall and 40.9 s of CPU with two BLAS threads, 20.8 s and 19.3 s with one)."""
    with threadpool_limits(limits=1):
        return pd.DataFrame([row for w in windows for row in window_rows(w, spec)])


def _parts_dir(out: Path) -> Path:
    return out.with_name(out.name + ".partial")


def done_keys(out: Path, include_out: bool = True) -> set:
    """Keys (track_id, window_start, model) already fitted in ``out`` (unless not ``include_out``) or its parts."""
    frames = []
    if include_out and out.exists():
        frames.append(read_table(out)[KEY])
    parts = _parts_dir(out)
    if parts.exists():
        frames += [pd.read_parquet(p, columns=KEY) for p in sorted(parts.glob("part-*.parquet"))]
    if not frames:
        return set()
    df = pd.concat(frames)
    return set(zip(df["track_id"].astype(str), pd.to_datetime(df["window_start"]), df["model"]))


def _chunks(items, size: int):
    it = iter(items)
    while chunk := list(itertools.islice(it, size)):
        yield chunk


def run_settings(spec: FitSpec, windowing: dict | None = None) -> dict:
    """What decides a run's rows: the fit specification and the windowing/preparation settings (stored beside
    the results, so that a resume under other settings is refused instead of mixing two kinds of rows)."""
    from ..tracks.resample import GRID_PHASE

    return {"fit": spec.to_dict(), "windows": {**(windowing or {}), "grid_phase": GRID_PHASE}}


def stored_settings(out) -> dict | None:
    """The settings a (partial or finished) run at ``out`` was made with, or None when none were stored."""
    out = Path(out)
    for path in (_parts_dir(out) / SETTINGS_FILE, _sidecar(out)):
        if path.exists():
            return json.loads(path.read_text())
    if out.exists() and out.suffix.lower() != ".csv":
        import pyarrow.parquet as pq

        meta = pq.read_schema(out).metadata or {}
        if SETTINGS_KEY.encode() in meta:
            return json.loads(meta[SETTINGS_KEY.encode()])
    return None


class Tally:
    """An iterable passed through once, lazily, counting the items that went by (``n``)."""

    def __init__(self, items: Iterable):
        self._items, self.n = items, 0

    def __iter__(self):
        for item in self._items:
            self.n += 1
            yield item


class NoWindows(ValueError):
    """A run given no windows at all (every track too short or too sparse): nothing is written."""


def run_fits(windows: Iterable[Window], out, spec: FitSpec, *, workers: int = 1, dask_address=None,
             resume: bool = False, chunk_size: int = 64, progress: bool = True, stop_after_chunks=None,
             total: int | None = None, windowing: dict | None = None):
    """Fit every window and write the table to ``out``; returns the table.

    Parameters
    ----------
    windows : iterable of Window
    out : path
        ``.parquet`` or ``.csv``.
    spec : FitSpec
    workers : int
        Processes for a local pool (1 = serial in this process).
    dask_address : str, optional
        Address of a Dask scheduler, or ``"local"`` to start a ``LocalCluster``.
    resume : bool
        Skip windows already fitted in ``out`` or its parts.
    chunk_size : int
        Windows per unit of work (and per written part).
    stop_after_chunks : int, optional
        Stop after this many chunks without combining (simulates an interrupted run; for tests).
    total : int, optional
        Number of windows expected (for the progress bar's ETA).
    windowing : dict, optional
        Window length, overlap and preparation settings, stored with the specification (see :func:`run_settings`).

    Raises
    ------
    NoWindows
        When ``windows`` holds none: the table at ``out`` is left as it was (the caller says why, e.g. from a
        :class:`~driftspec.analysis.tracks.windows.WindowCensus`).
    ValueError
        For invalid run options, an output folder that cannot be written, or a resume whose stored settings differ
        from these (the message names the settings that differ).
    """
    if progress:  # tqdm.auto warns on import in a notebook without ipywidgets, even for a disabled bar
        from tqdm.auto import tqdm
    else:
        from tqdm import tqdm

    if int(workers) != workers or workers < 1:
        raise ValueError(f"workers must be a whole number >= 1; got {workers!r}")
    if int(chunk_size) != chunk_size or chunk_size < 1:
        raise ValueError(f"chunk size must be a whole number >= 1; got {chunk_size!r}")
    out = Path(out)
    if out.suffix.lower() not in (".parquet", ".pq", ".csv"):
        raise ValueError(f"{out}: the fits table must be .parquet or .csv")
    if not out.parent.is_dir() or not os.access(out.parent, os.W_OK):
        raise ValueError(f"{out.parent}: not a writable folder")
    settings = run_settings(spec, windowing)
    parts = _parts_dir(out)
    if resume:
        before = stored_settings(out)
        if before is not None and before != settings:
            changed = [f"{group}.{k}" for group in ("fit", "windows")
                       for k in sorted(set(before.get(group, {})) | set(settings[group]))
                       if before.get(group, {}).get(k) != settings[group].get(k)]
            raise ValueError(f"cannot resume {out}: it was fitted with other settings ({', '.join(changed)}); "
                             "rerun without --resume, or with the same settings")
    # a run without resume replaces the table at `out` (its rows are never merged in); so does the resume of such a
    # run that was interrupted
    replace = not resume or (parts / REPLACES_FILE).exists()
    skip = done_keys(out, include_out=not replace) if resume else set()
    if not resume and parts.exists():
        shutil.rmtree(parts)
    had_parts = parts.exists()  # an interrupted run's, kept for this resume
    parts.mkdir(parents=True, exist_ok=True)
    if replace:
        (parts / REPLACES_FILE).write_text("")
    (parts / SETTINGS_FILE).write_text(json.dumps(settings, sort_keys=True))
    existing = sorted(parts.glob("part-*.parquet"))
    next_part = 1 + max((int(p.stem.split("-")[1]) for p in existing), default=0)
    units = column_units(spec)
    bar = tqdm(total=total, unit="window", disable=not progress, desc="fitting", smoothing=0.05)
    written = 0

    def save(df):
        nonlocal next_part, written
        if len(df):
            df = df[~df.apply(lambda r: (r["track_id"], r["window_start"], r["model"]) in skip, axis=1)] \
                if skip else df
            write_table(df, parts / f"part-{next_part:05d}.parquet", units)
            next_part += 1
        written += 1

    # windows are consumed lazily and at most a few chunks are in flight, so memory stays bounded
    windows = Tally(windows)
    if spec.keep_all:
        names = [spec.model_name(m) for m in spec.candidate_models]
        todo = (w for w in windows if not all((w.track_id, w.start, m) in skip for m in names))
    else:  # one selected row per window, whichever model it is
        done = {(t, s) for t, s, _ in skip}
        todo = (w for w in windows if (w.track_id, w.start) not in done)
    chunks = _chunks(todo, chunk_size)
    stopped = False
    try:
        if dask_address:
            stopped = _run_dask(chunks, spec, dask_address, save, bar, stop_after_chunks, lambda: written)
        elif workers > 1:
            stopped = _run_pool(chunks, spec, workers, save, bar, stop_after_chunks, lambda: written)
        else:
            for c in chunks:
                save(fit_chunk(c, spec))
                bar.update(len(c))
                if stop_after_chunks and written >= stop_after_chunks:
                    stopped = True
                    break
    except ValueError:  # nothing to resume from a run that wrote nothing (an unreachable scheduler)
        if written == 0 and not resume:
            shutil.rmtree(parts, ignore_errors=True)
        raise
    finally:
        if not stopped and bar.total is not None and bar.n != bar.total:
            bar.total = bar.n  # the total was an estimate
            bar.refresh()
        bar.close()
    if stopped:
        return None
    if windows.n == 0:  # nothing to fit: the table at `out` stays as it is, and no parts are left behind
        if not had_parts:  # (an interrupted run's parts stay for a resume with its settings)
            shutil.rmtree(parts, ignore_errors=True)
        raise NoWindows(f"no windows to fit; {out} is left as it was" if out.exists()
                        else f"no windows to fit; {out} not written")
    return combine(out, units, settings, include_out=not replace)


def _run_pool(chunks, spec, workers, save, bar, stop_after_chunks, written) -> bool:
    import multiprocessing
    from concurrent.futures import FIRST_COMPLETED, wait

    in_flight = {}
    # forkserver: workers start from a small process, not a copy of this one (which may hold a whole data
    # set), and no threads are forked
    ctx = multiprocessing.get_context("forkserver") if "forkserver" in multiprocessing.get_all_start_methods() \
        else None
    with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
        for c in itertools.chain(chunks, [None]):
            if c is not None:
                in_flight[pool.submit(fit_chunk, c, spec)] = len(c)
            while in_flight and (c is None or len(in_flight) >= 2 * workers):
                done, _ = wait(in_flight, return_when=FIRST_COMPLETED)
                for fut in done:
                    save(fut.result())
                    bar.update(in_flight.pop(fut))
                if stop_after_chunks and written() >= stop_after_chunks:
                    for f in in_flight:
                        f.cancel()
                    return True
    return False


def _run_dask(chunks, spec, address, save, bar, stop_after_chunks, written) -> bool:
    from dask.distributed import Client, LocalCluster
    from dask.distributed import as_completed as dask_completed

    cluster = None
    if address == "local":
        cluster = LocalCluster(n_workers=min(2, os.cpu_count() or 1), threads_per_worker=1,
                               processes=True, dashboard_address=None)
        client = Client(cluster)
    else:
        try:
            client = Client(address, timeout=DASK_CONNECT_TIMEOUT_S)
        except (OSError, TimeoutError) as exc:
            raise ValueError(f"cannot reach the Dask scheduler at {address} within {DASK_CONNECT_TIMEOUT_S:g} s "
                             f"({type(exc).__name__})") from None
    try:
        n_workers = max(1, len(client.scheduler_info().get("workers", {})))
        sizes = {}
        queue = dask_completed()
        iterator = iter(chunks)

        def submit_next():
            c = next(iterator, None)
            if c is None:
                return False
            fut = client.submit(fit_chunk, c, spec, pure=False)
            sizes[fut.key] = len(c)
            queue.add(fut)
            return True

        for _ in range(2 * n_workers):
            if not submit_next():
                break
        for fut in queue:
            save(fut.result())
            bar.update(sizes.pop(fut.key))
            if stop_after_chunks and written() >= stop_after_chunks:
                return True
            submit_next()
        return False
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def combine(out: Path, units: dict | None = None, settings: dict | None = None,
            include_out: bool = True) -> pd.DataFrame:
    """Merge ``out`` (unless not ``include_out``: the parts then replace it) and its parts into one sorted table at
    ``out`` (with ``settings`` in its metadata, or beside a CSV); remove the parts."""
    parts = _parts_dir(out)
    frames = [read_table(out)] if include_out and out.exists() else []
    frames += [pd.read_parquet(p) for p in sorted(parts.glob("part-*.parquet"))] if parts.exists() else []
    frames = [f for f in frames if len(f)]
    df = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=KEY)
    if len(df):
        df["window_start"] = naive_utc(df["window_start"])
        df["window_end"] = naive_utc(df["window_end"])
        df = df.drop_duplicates(KEY, keep="last").sort_values(KEY, kind="stable").reset_index(drop=True)
    front = [c for c in WINDOW_COLUMNS + ["model", "estimator", "status", "message", "loglik", "aic",
                                          "gof_pvalue"] if c in df]
    df = df[front + [c for c in df.columns if c not in front]]
    if settings is not None:
        text = json.dumps(settings, sort_keys=True)
        if out.suffix.lower() == ".csv":
            _sidecar(out).write_text(text)
        write_table(df, out, units, metadata={SETTINGS_KEY: text})
    else:
        write_table(df, out, units)
    if parts.exists():
        shutil.rmtree(parts)
    return df


def _sidecar(out: Path) -> Path:
    return out.with_name(out.name + ".settings.json")


def summarise(df: pd.DataFrame) -> str:
    if len(df) == 0:
        return "no windows fitted"  # the caller explains why (see the command line's window census)
    counts = df["status"].value_counts()
    ok = int(counts.get("ok", 0))
    other = ", ".join(f"{k} {v}" for k, v in counts.items() if k != "ok") or "none"
    return f"{len(df)} fits: {ok} ok; other: {other}"


def describe_choices(df: pd.DataFrame) -> str:
    """What the run chose per window from the data (observation model, mask, band, latitude handling, model),
    one line each, from a fits table."""
    if len(df) == 0 or "observation" not in df:
        return ""
    rows = df[df["selected"].astype(bool)] if "selected" in df else df
    lines = []
    for obs, g in rows.groupby("observation", sort=True):
        interval = g["fix_interval_s"].median() / 3600 if "fix_interval_s" in g else float("nan")
        mask = g["mask_distance_s"].median() / 3600 if "mask_distance_s" in g else float("nan")
        lines.append(f"  {obs}: {counted(len(g), 'window')} (median fix interval {interval:.1f} h, mask distance "
                     f"{mask:.0f} h, band to {g['max_freq'].median():.2f} cpd)")
    if "inertial_frequency_offset" in rows:
        lines.append(f"  inertial part following the latitude: {int(rows['inertial_frequency_offset'].notna().sum())} "
                     "windows")
    lines.append("  selected models: " + ", ".join(f"{k} {v}" for k, v in rows["model"].value_counts().items()))
    return "chosen from the data:\n" + "\n".join(lines)


__all__ = ["NoWindows", "Tally", "column_units", "combine", "describe_choices", "fit_chunk", "run_fits", "run_settings",
           "stored_settings", "summarise", "window_rows"]
