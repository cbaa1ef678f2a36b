"""Run a study: open the store, run its curves in parallel isolated workers, store every point.

:func:`run_study` is what ``infercost run`` and ``profiler.run_study`` do. On one machine the
curves run at most one per core (points are never timed side by side on a busy core); each
curve's worker streams points back, and this process alone writes the store, one transaction per
point, as each point arrives. The budget is shared fairly between curves (:class:`BudgetPool`).

``python -m profiler.runner STUDY.toml --store PATH [--resume] [--budget S] [--json]`` runs a
study without the command line's rendering (used by tests that need a real ``kill -9``).
"""

from __future__ import annotations

import os
import queue
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import replace
from pathlib import Path
from typing import Any, Callable

from profiler.records import Point, StudyResult, StudySpec

__all__ = ["run_study", "BudgetPool", "study_context"]

Event = dict[str, Any]


class BudgetPool:
    """Shares a whole-study wall-time budget fairly between curves run on ``n_slots`` workers.

    A curve starting gets ``remaining slot-seconds / curves not yet started`` (slot-seconds:
    wall seconds times parallel slots, minus what running curves still hold), never more than the
    study's remaining wall time. Curves that finish early leave their unused share to the curves
    that start after them; once every curve has started, running curves may use all the time
    left. Thread-safe.

    >>> pool = BudgetPool(100.0, n_curves=4, n_slots=2, clock=lambda: 0.0)
    >>> pool.begin(0); round(pool.seconds_left(0), 1)
    50.0
    """

    def __init__(self, budget_s: float, *, n_curves: int, n_slots: int,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.budget_s = float(budget_s)
        self.n_slots = max(1, int(n_slots))
        self._clock = clock
        self._t0 = clock()
        self._pending = int(n_curves)
        self._running: dict[int, tuple[float, float]] = {}
        self._lock = threading.Lock()

    def wall_left(self) -> float:
        return max(0.0, self.budget_s - (self._clock() - self._t0))

    def begin(self, curve: int) -> None:
        with self._lock:
            now = self._clock()
            self._pending = max(0, self._pending - 1)
            held = sum(max(0.0, a - (now - t)) for t, a in self._running.values())
            free = max(0.0, self.wall_left() * self.n_slots - held)
            share = free / (self._pending + 1)
            self._running[curve] = (now, min(share, self.wall_left()))

    def seconds_left(self, curve: int) -> float:
        with self._lock:
            wall = self.wall_left()
            if curve not in self._running:
                return 0.0
            if self._pending == 0:
                return wall
            t, allowance = self._running[curve]
            return max(0.0, min(wall, allowance - (self._clock() - t)))

    def end(self, curve: int) -> None:
        with self._lock:
            self._running.pop(curve, None)

    @property
    def pending(self) -> int:
        return self._pending


def study_context(spec: StudySpec, study_id: str, *, quick: bool = False):
    """The :class:`~profiler.harness.StudyContext` of a study (lighter repeats when ``quick``)."""
    from profiler.harness import StudyContext

    extra = ({"min_repeats": 3, "max_repeats": 7, "interleave_rounds": 5} if quick else {})
    return StudyContext.from_spec(spec, study_id, **extra)


def _n_slots(n_curves: int, workers: int | None) -> int:
    cores = workers if workers is not None else (os.cpu_count() or 1)
    return max(1, min(int(cores), max(1, n_curves)))


def run_study(spec: StudySpec, *, store: str | Path = "reports/infercost.sqlite",
              out: str | Path | None = None, resume: bool = False,
              on_event: Callable[[Event], None] | None = None, dask: str | None = None,
              quick: bool = False, workers: int | None = None) -> StudyResult:
    """Run a study and return what the store holds for it.

    Parameters
    ----------
    spec
        The study (:func:`profiler.study.load_study_file` or :func:`~profiler.study.default_study`).
    store
        SQLite results store (created when missing).
    out
        Report folder; when given, :func:`profiler.report.write_report` writes it at the end.
    resume
        Continue the latest study of the same name and spec hash, measuring only missing points.
    on_event
        Progress callback, called in this thread with dicts (see Notes).
    dask
        Scheduler address for scale-out (not implemented yet: raises NotImplementedError).
    quick
        Lighter timing (3-7 repeats) and a budget of at most 30 s
        (:func:`profiler.study.quick_version`).
    workers
        Curves run in parallel at most (default: the number of cores, at most one per curve).

    Returns
    -------
    StudyResult
        ``Store.load_study(study_id)`` after the run, with ``out_dir`` set when ``out`` is.

    Raises
    ------
    StoreError
        The store is foreign or corrupt (nothing written).

    Notes
    -----
    Events carry ``event`` and, as they apply, ``study_id, curve, key, size, status, seconds``
    (seconds per query of the point), ``point_seconds`` (wall seconds of the point), ``cap``
    (the point time cap), ``eta_s`` (seconds the study will probably still take), ``reason`` and
    ``cut_by_budget`` (curve_done), ``n_points``. Kinds: ``study_start``, ``curve_start``,
    ``point_start``, ``point``, ``curve_done``, ``study_done``.
    """
    from profiler.environment import capture_environment
    from profiler.harness import kill_all_workers, prepare_launcher, run_curve
    from profiler.store import Store
    from profiler.zygote import launcher_scope

    if quick:
        from profiler.study import quick_version

        spec = quick_version(spec)
    t0 = time.monotonic()
    st = Store(store)
    # One preloaded worker launcher for the whole study, closed when it ends (profiler.zygote).
    scope = launcher_scope()
    scope.__enter__()
    try:
        environment = capture_environment(seed=spec.seed, threads=spec.threads)
        study_id = st.open_study(spec, environment, resume=resume)
        ctx = study_context(spec, study_id, quick=quick)
        if dask is None:
            # The launcher's one-off imports happen before the budget clock starts.
            prepare_launcher(ctx, spec.curves)
        stored: dict[int, list[Point]] = {}
        for p in st.points(study_id):
            stored.setdefault(p.curve, []).append(p)
        n_dask = (_run_curves_dask(dask, ctx, spec, stored, st, study_id, on_event)
                  if dask is not None else 0)
        n = len(spec.curves)
        slots = _n_slots(n, workers)
        pool = BudgetPool(spec.budget_s, n_curves=n, n_slots=slots)
        inbox: "queue.Queue[tuple[str, Any]]" = queue.Queue()
        stop = threading.Event()
        progress = _Progress(pool, n, slots)

        def emit(event: Event) -> None:
            if on_event is not None:
                on_event({"study_id": study_id, "eta_s": progress.eta(), **event})

        def task(i: int) -> None:
            cspec = spec.curves[i]
            history = stored.get(i, [])
            pool.begin(i)
            inbox.put(("event", {"event": "curve_start", "curve": i, "key": cspec.key(),
                                 "size": None, "status": None, "seconds": None,
                                 "cap": spec.point_timeout_s, "n_points": len(history)}))
            try:
                if stop.is_set():
                    return
                outcome = run_curve(ctx, i, cspec, {p.size for p in history},
                                    on_point=lambda p: None if stop.is_set()
                                    else inbox.put(("point", p)),
                                    on_event=lambda e: inbox.put(("event", e)),
                                    history=history, budget=lambda: pool.seconds_left(i),
                                    stop=stop,
                                    on_revised=lambda p: inbox.put(("revised", p)))
                inbox.put(("outcome", outcome))
            except BaseException as exc:  # surface in the main thread, never lost in a thread
                inbox.put(("crash", (i, exc)))
            finally:
                pool.end(i)

        emit({"event": "study_start", "name": spec.name, "n_curves": n, "n_parallel": slots,
              "budget_s": spec.budget_s, "cap": spec.point_timeout_s, "resumed": resume})
        executor = ThreadPoolExecutor(max_workers=slots, thread_name_prefix="infercost-curve")
        futures = [executor.submit(task, i) for i in range(n) if dask is None]
        n_new = n_dask
        try:
            while True:
                try:
                    kind, item = inbox.get(timeout=0.2)
                except queue.Empty:
                    if all(f.done() for f in futures) and inbox.empty():
                        break
                    continue
                if kind == "point":
                    st.add_point(item)
                    n_new += 1
                elif kind == "revised":
                    st.add_sweep(item)
                elif kind == "event":
                    if item.get("event") == "curve_start":
                        progress.started(item["curve"])
                    emit(item)
                elif kind == "outcome":
                    _store_outcome(st, study_id, spec, item)
                    progress.finished(item.index, item.seconds)
                    emit({"event": "curve_done", "curve": item.index, "key": item.key,
                          "size": None, "status": item.reason, "reason": item.reason,
                          "cut_by_budget": item.cut_by_budget, "seconds": item.seconds,
                          "cap": spec.point_timeout_s,
                          "n_points": len(stored.get(item.index, [])) + len(item.points)})
                elif kind == "crash":
                    i, exc = item
                    raise exc
        except BaseException:
            stop.set()
            for f in futures:
                f.cancel()
            kill_all_workers()
            executor.shutdown(wait=True, cancel_futures=True)
            _drain(inbox, st)
            raise
        executor.shutdown(wait=True)
        st.finish_study(study_id, out_dir=out)
        result = st.load_study(study_id)
    finally:
        st.close()
        scope.__exit__(None, None, None)
    if out is not None:
        result = _write_report(result, out)
    if on_event is not None:
        on_event({"event": "study_done", "study_id": result.study_id, "eta_s": 0.0,
                  "seconds": time.monotonic() - t0, "n_points": n_new,
                  "out": None if out is None else str(out)})
    return result


def _drain(inbox: "queue.Queue", st: Any) -> None:
    """Store whatever points reached the queue before an interruption (nothing measured is lost)."""
    while True:
        try:
            kind, item = inbox.get_nowait()
        except queue.Empty:
            return
        if kind in ("point", "revised"):
            try:
                (st.add_point if kind == "point" else st.add_sweep)(item)
            except Exception:
                pass


def _store_outcome(st: Any, study_id: str, spec: StudySpec, outcome: Any) -> None:
    facts = {"theory": outcome.theory, "work_unit": outcome.work_unit,
             "mechanism_knob": outcome.mechanism_knob}
    if not outcome.workers:
        facts = _curve_facts(spec.curves[outcome.index]) or facts
    st.set_curve(study_id, outcome.index, key=outcome.key, cut_by_budget=outcome.cut_by_budget,
                 reason=outcome.reason, **facts)
    for wid, env in outcome.workers.items():
        st.add_worker(study_id, wid, env)


def _curve_facts(cspec: Any) -> dict[str, Any] | None:
    """Theory, work unit and knob of a curve that started no worker (read from the class only)."""
    try:
        from model_zoo.base import Level, resolve

        cls = resolve(cspec.family)
        fam = cls(**dict(cspec.params))
        theory = None
        if hasattr(fam, "expected_growth"):
            theory = fam.expected_growth(axis=cspec.axis, topology=cspec.topology,
                                         level=Level(cspec.level), method=cspec.method)
        return {"theory": theory, "work_unit": str(getattr(cls, "work_unit", "") or ""),
                "mechanism_knob": str(getattr(cls, "mechanism_knob", "") or "")}
    except Exception:
        return None


def _write_report(result: StudyResult, out: str | Path) -> StudyResult:
    from profiler.report import write_report

    result = replace(result, out_dir=str(out))
    write_report(result, out)
    return result


class _Progress:
    """ETA for the study from the curves finished so far (never beyond the budget left)."""

    def __init__(self, pool: BudgetPool, n_curves: int, n_slots: int) -> None:
        self.pool, self.n, self.slots = pool, n_curves, n_slots
        self.durations: list[float] = []
        self.running: set[int] = set()

    def started(self, i: int) -> None:
        self.running.add(i)

    def finished(self, i: int, seconds: float) -> None:
        self.running.discard(i)
        self.durations.append(float(seconds))

    def eta(self) -> float:
        left = self.pool.wall_left()
        if not self.durations:
            return left
        mean = sum(self.durations) / len(self.durations)
        todo = self.n - len(self.durations) - len(self.running) + 0.5 * len(self.running)
        return float(min(left, max(0.0, mean * todo / self.slots)))


def _run_curves_dask(address: str, ctx: Any, spec: StudySpec, stored: dict, st: Any,
                     study_id: str, on_event: Callable[[Event], None] | None = None) -> int:
    """The Dask scale-out (issue 8): :func:`profiler.cluster.store_curves_dask` runs one task per
    curve (the harness's :func:`~profiler.harness.run_curve` inside a Dask worker) and stores
    each point here as it arrives; returns the number of new points."""
    from profiler.cluster import store_curves_dask

    def emit(event: Event) -> None:
        if on_event is not None:
            on_event({"study_id": study_id, "eta_s": None, **event})

    return store_curves_dask(address, ctx, spec, stored, store=st, study_id=study_id,
                             emit=emit).n_new_points


# ============================================================================ python -m
def _main(argv: list[str] | None = None) -> int:
    import argparse
    import json
    import sys

    from profiler.errors import InfercostError
    from profiler.study import default_study, load_study_file

    parser = argparse.ArgumentParser(prog="python -m profiler.runner",
                                     description="Run a study without the command line's display.")
    parser.add_argument("study", nargs="?", help="study file (TOML); none: the default study")
    parser.add_argument("--store", default="reports/infercost.sqlite")
    parser.add_argument("--out", default=None)
    parser.add_argument("--resume", action="store_true")
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--budget", type=float, default=None)
    parser.add_argument("--json", action="store_true", help="progress events as JSON lines")
    args = parser.parse_args(argv)
    try:
        spec = load_study_file(args.study) if args.study else default_study(quick=args.quick)
        if args.budget is not None:
            spec = replace(spec, budget_s=args.budget)

        def on_event(e: Event) -> None:
            if args.json:
                sys.stdout.write(json.dumps(e, default=str) + "\n")
                sys.stdout.flush()

        result = run_study(spec, store=args.store, out=args.out, resume=args.resume,
                           on_event=on_event, quick=args.quick and bool(args.study))
    except InfercostError as exc:
        sys.stderr.write(f"infercost: {' '.join(str(exc).split())}\n")
        return 2
    if not args.json:
        n = sum(len(c.points) for c in result.curves)
        sys.stdout.write(f"{result.study_id}: {n} points\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(_main())
