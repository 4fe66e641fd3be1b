"""Fits off the server's event loop: worker processes shared by all sessions, jobs that report progress, can be
cancelled, and carry the settings they were computed for.

The model is Panel's guidance on long-running work ("Set Up Manual Threading" in the Panel how-to guides): the work
runs elsewhere, the job's status, progress and result are read-only (``constant``) parameters, and every change to
them is applied on the session's own event loop (``pn.state.execute(..., schedule=True)`` under the session's
document), so views redraw as if a user had changed them.

Why processes: a window fit is mostly Python and numpy in small pieces, so threads would hold the GIL and slow
down the server's loop for everyone. Fits go to a small shared pool of spawned worker processes, a few windows in
flight per job so that a short job of one session never waits behind a long job of another. The exact estimator's
windows run in a process of their own per job, which is terminated when the job is cancelled or superseded.

Two kinds of work share two cores: what a user is waiting for (the current window, the selected track) and long
background work (the first look at every window, *Fit every window*, the pooled map, an exact fit). Background jobs
(``background=True``) run in a second pool whose processes, like an exact fit's own process, lower their
scheduling priority (``os.nice``), so the operating system gives the cores to the interactive workers and the
server first, and an opening page is never queued behind a long job: idle cores still go to the long job.
"""

from __future__ import annotations

import multiprocessing
import os
import threading
import time
import traceback
from collections.abc import Callable

import param

_POOL = None
_BACKGROUND_POOL = None
_POOL_LOCK = threading.Lock()
#: ``os.nice`` increment of the processes that run background jobs and exact fits
BACKGROUND_NICENESS = 10
#: seconds between progress reports of a job (four times as long for a background job, whose progress every open
#: page shows: each report is work on every session's event loop)
PROGRESS_EVERY_S = 0.5
#: windows in flight per job in the shared pool (the rest wait in the job, where cancelling is free)
IN_FLIGHT = 2


def _warm():
    """Initializer of every fit worker: BLAS and OpenMP on one thread (a window's matrices are small; library threads
    only contend with the other workers and the server, as in ``driftspec fit``), then the Matérn tables."""
    from threadpoolctl import threadpool_limits

    from driftspec.analysis.models.matern import _tables

    threadpool_limits(limits=1)
    _tables()


def _warm_background():
    """Initializer of background workers: a lower scheduling priority, then the tables."""
    try:
        os.nice(BACKGROUND_NICENESS)
    except OSError:  # not permitted here: run at normal priority
        pass
    _warm()


def _fit_one(window, spec_json):
    """Worker: every candidate's FitResult of one window, the selected one marked (the page shows that one)."""
    import json

    from driftspec.analysis.fitting import FitSpec, fit_window

    return fit_window(window, FitSpec.from_dict(json.loads(spec_json)))


def _fit_rows(window, spec_json):
    """Worker: the fits-table rows of one window (``driftspec fit``'s rows)."""
    import json

    from driftspec.analysis.fitting import FitSpec
    from driftspec.analysis.fitting.batch import window_rows

    return window_rows(window, FitSpec.from_dict(json.loads(spec_json)))


def worker_count() -> int:
    return max(2, min(4, os.cpu_count() or 2))


def shared_pool():
    """The worker processes shared by every session of this server (started on first use)."""
    global _POOL
    with _POOL_LOCK:
        if _POOL is None:
            _POOL = multiprocessing.get_context("spawn").Pool(worker_count(), initializer=_warm)
        return _POOL


def background_pool():
    """The lower-priority worker processes for long jobs, shared by every session (started on first use)."""
    global _BACKGROUND_POOL
    with _POOL_LOCK:
        if _BACKGROUND_POOL is None:
            _BACKGROUND_POOL = multiprocessing.get_context("spawn").Pool(worker_count(),
                                                                          initializer=_warm_background)
        return _BACKGROUND_POOL


def stop_pools() -> None:
    """Stop the shared worker processes (started again on next use): for scripts and tests that end before the
    interpreter does, so no pool is left to be collected during its shutdown."""
    global _POOL, _BACKGROUND_POOL
    with _POOL_LOCK:
        pools, _POOL, _BACKGROUND_POOL = (_POOL, _BACKGROUND_POOL), None, None
    for pool in pools:
        if pool is not None:
            pool.terminate()
            pool.join()


def start_pool() -> None:
    """Start the shared workers now (the server calls this before the first page asks for a fit)."""
    shared_pool()
    background_pool()


def call_in_session(doc, fn: Callable[[], None]) -> None:
    """Run ``fn`` on the event loop of the session that owns ``doc`` (thread-safe); directly when there is no
    server session (a notebook or a script)."""
    if doc is None or getattr(doc, "session_context", None) is None:
        fn()
        return
    import panel as pn
    from panel.io.state import set_curdoc

    with set_curdoc(doc):
        pn.state.execute(fn, schedule=True)


class Job(param.Parameterized):
    """One background computation over a list of windows.

    Parameters
    ----------
    key : object
        The settings the job computes for (a tuple holding ``FitSpec.to_json()``, the track and the window
        lengths); the owner compares it with the current key and drops a result that is no longer current.
    own_process : bool
        Run in a process of its own, terminated on cancel (the exact estimator), at background priority.
    background : bool
        Run in the lower-priority pool (long jobs nobody is waiting on window by window).
    cached : bool
        Read the rows from the on-disk cache when the same windows were fitted under the same settings by the
        same code before, and write them there when done (:mod:`.fitcache`; ``"rows"`` jobs only).
    """

    label = param.String(default="", constant=True)
    key = param.Parameter(default=None, constant=True)
    status = param.Selector(default="queued", objects=["queued", "running", "done", "cancelled", "failed"],
                            constant=True)
    n_total = param.Integer(default=0, constant=True)
    n_done = param.Integer(default=0, constant=True)
    rate = param.Number(default=float("nan"), constant=True, doc="Windows fitted per second")
    eta_s = param.Number(default=float("nan"), constant=True, doc="Estimated time left, s")
    message = param.String(default="", constant=True)
    result = param.Parameter(default=None, constant=True, doc="List of per-window outputs, in window order")
    from_cache = param.Boolean(default=False, constant=True, doc="The result was read from the on-disk cache")

    def __init__(self, windows, spec_json: str, kind: str, doc=None, on_update=None, own_process=False,
                 background=False, cached=False, **params):
        super().__init__(**params)
        self._windows = list(windows)
        self._spec_json = spec_json
        self._func = _fit_one if kind == "one" else _fit_rows
        self._doc = doc
        self._on_update = on_update
        self._own_process = own_process
        self._background = background
        self._cached = cached and kind == "rows"
        self._cancelled = threading.Event()
        self._private_pool = None
        self._final = False  # the job's end (done, cancelled, failed) has been published
        self._thread = threading.Thread(target=self._run, daemon=True, name=f"job-{self.label}")
        with param.edit_constant(self):
            self.n_total = len(self._windows)

    # ------------------------------------------------------------------ control
    def start(self) -> Job:
        self._thread.start()
        return self

    def cancel(self) -> None:
        """Stop: windows not yet started are not fitted; an exact fit in progress is terminated."""
        self._cancelled.set()
        pool = self._private_pool
        if pool is not None:
            pool.terminate()

    @property
    def cancelled(self) -> bool:
        return self._cancelled.is_set()

    def wait(self, timeout: float | None = None) -> bool:
        self._thread.join(timeout)
        return not self._thread.is_alive()

    # ------------------------------------------------------------------ worker thread
    def _publish(self, **values):
        if values.get("status") in ("done", "cancelled", "failed"):
            self._final = True

        def apply():
            with param.edit_constant(self):
                self.param.update(**values)
            if self._on_update is not None:
                self._on_update(self)
        call_in_session(self._doc, apply)

    def _run(self):
        """The job's thread. Whatever goes wrong is reported: a job never stays "running" without a word (the page
        would wait for it for ever) and the traceback goes to the server's log."""
        try:
            self._work()
        except Exception as exc:  # noqa: BLE001 - reported below, on the page and in the log
            traceback.print_exc()
            if self._final:  # the job's end was already reported (what failed came after): not a second end
                return
            try:
                self._publish(status="failed", message=f"{type(exc).__name__}: {exc}")
            except Exception:  # noqa: BLE001 - the session is gone: nobody is waiting
                traceback.print_exc()

    def _work(self):
        t0 = time.perf_counter()
        out = [None] * len(self._windows)
        self._publish(status="running")
        key = rows = None
        if self._cached:
            from . import fitcache

            try:
                key = fitcache.table_key(self._windows, self._spec_json)
                rows = fitcache.load(key, len(self._windows))
            except Exception:  # noqa: BLE001 - an unreadable cache is a miss: the windows are fitted
                key = rows = None
            if rows is not None and not self.cancelled:
                self._publish(status="done", n_done=len(rows), result=rows, eta_s=0.0, from_cache=True)
                return
        try:
            if self._own_process:
                self._private_pool = multiprocessing.get_context("spawn").Pool(1, initializer=_warm_background)
                pool = self._private_pool
            else:
                pool = background_pool() if self._background else shared_pool()
            pending = {}
            queue = list(range(len(self._windows)))
            done = 0
            last = 0.0
            while (queue or pending) and not self.cancelled:
                while queue and len(pending) < IN_FLIGHT:
                    k = queue.pop(0)
                    pending[k] = pool.apply_async(self._func, (self._windows[k], self._spec_json))
                for k in [k for k, r in pending.items() if r.ready()]:
                    out[k] = pending.pop(k).get()
                    done += 1
                if not pending:
                    continue
                now = time.perf_counter()
                if done and now - last > (PROGRESS_EVERY_S * (4 if self._background else 1)):
                    last = now
                    rate = done / (now - t0)
                    self._publish(n_done=done, rate=rate, eta_s=(len(self._windows) - done) / rate)
                time.sleep(0.02)
        except Exception as exc:  # noqa: BLE001 - a failed job says so on the page and in the log; the server goes on
            traceback.print_exc()
            if not self.cancelled:
                self._publish(status="failed", message=f"{type(exc).__name__}: {exc}")
            return
        finally:
            if self._private_pool is not None:
                self._private_pool.terminate()
        if self.cancelled:
            self._publish(status="cancelled")
            return
        elapsed = time.perf_counter() - t0
        if key is not None:
            from . import fitcache

            fitcache.store(key, out)
        self._publish(status="done", n_done=len(out), result=out, eta_s=0.0,
                      rate=len(out) / elapsed if elapsed > 0 else float("nan"))
