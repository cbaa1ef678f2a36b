"""Measure points in isolated worker processes that survive exponential blow-ups.

Each curve runs in its own worker process (fresh interpreter, reused across the curve's points).
The parent never runs inference: it sends the worker one size at a time, watches the clock, and
turns whatever comes back — a measurement, a crash, silence past the cap — into a
:class:`~profiler.records.Point`. Points stream to a callback as they finish; writing them down
is the caller's job (the study runner writes the store; a Dask task would send them back to the
client).

What one point costs the worker (all inside the worker):

1. ``family.build(size)`` — not timed, its seconds recorded (``build_seconds``);
2. ``family.queries(instance, level, n, seed)``, the structural ``profile`` and the mean
   ``predicted_work``; a pre-flight check of ``predicted_bytes`` against the memory cap
   (a point predicted to pass the cap is stored ``memory`` without running);
3. :func:`time_queries`: a warm-up pass (its answers are the ones checked), loops calibrated so
   one repeat lasts at least ``min_repeat_seconds``, at least ``min_repeats`` repeats, more while
   the relative spread exceeds ``spread_limit`` (up to ``max_repeats``), the garbage collector
   off during a repeat, everything within the point's time cap; then one untimed pass under
   :mod:`tracemalloc` for the Python-level peak;
4. the correctness guard: each answer against ``family.reference`` (untimed).

Caps
----
*Time*: the parent kills the worker (SIGTERM, then SIGKILL after ``grace_s``) when a point passes
``point_timeout_s``; the point is stored ``timeout`` with a lower bound on seconds per query and a
fresh worker is started for the next point. The worker plans its own repeats to finish before
the cap, so only a point whose *first* pass is too slow is killed.
*Memory*: the worker sets ``RLIMIT_AS`` to its baseline address space (measured after its
imports, and again before each point) plus ``memory_mb``. The limit counts virtual memory, which numpy and BLAS reserve
generously, so the baseline is added rather than the cap taken alone; what the cap bounds is the
growth of the address space during a point. An allocation past it raises ``MemoryError`` in the
worker and the point is stored ``memory``; the machine never swaps.
*Crashes*: a worker that dies (segfault, abort) gives an ``error`` point carrying the signal and
the tail of its stderr (Python's :mod:`faulthandler` writes a traceback there).

Launchers
---------
Where the platform allows (Linux), workers are forked from a *zygote* started once per study that
has already imported numpy, scipy, networkx, pgmpy and the built-in families
(:mod:`profiler.zygote`); each child still sets its own limits and measures its own baseline, and
runs the same :func:`worker_main` loop. Elsewhere, or when the zygote cannot start, a fresh
interpreter is spawned per worker. Worker environments record which: ``launcher`` is
``"fork-preloaded"`` or ``"spawn"``.

Cost notes: a forked worker costs a fork plus its own initialisation (thread limits, environment,
calibration kernel: tens of milliseconds); a spawned one costs an interpreter start plus numpy
and the family's imports (0.3 s, and ~4 s of CPU when a reference check pulls in pgmpy); the
zygote itself costs one such start per study. Each point then costs one JSON message each way
(well under a millisecond) on top of the measurement itself.
"""

from __future__ import annotations

import gc
import json
import math
import os
import select
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass, field, replace
from typing import Any, Callable, Iterable, Sequence

from profiler.records import CurveSpec, Point

__all__ = ["Timing", "time_queries", "StudyContext", "CurveOutcome", "run_curve",
           "check_answers", "worker_main", "worker_env", "prepare_launcher"]

MIB = 1 << 20
#: Fraction of the point cap the worker plans to use itself (the rest is messaging headroom).
_SELF_DEADLINE = 0.85


# ============================================================================ timing (in-process)
@dataclass(frozen=True)
class Timing:
    """Per-query timing of a set of queries on one instance (all seconds are per query).

    ``seconds_spread`` is the relative interquartile range of the repeats (IQR / median), a
    spread measure a single outlier cannot inflate. ``repeat_seconds`` holds every timed repeat
    (per query). ``cold_only`` is True when the cap left time for nothing but the warm-up pass,
    whose time is then the only repeat. ``work`` is mean ``Answer.work`` per query;
    ``peak_bytes`` the larger of the tracemalloc peak of one untimed pass and the growth of the
    process's maximum resident set during the measurement (0 when neither was measured).
    """

    seconds_median: float
    seconds_min: float
    seconds_max: float
    seconds_spread: float
    repeats: int
    loops: int
    repeat_seconds: tuple[float, ...]
    work: float
    peak_bytes: int
    first_pass_seconds: float = 0.0
    cold_only: bool = False
    answers: tuple = field(default=(), repr=False, compare=False)


def _answerer(family: Any, instance: Any, queries: Sequence[Any], method: str,
              batched: bool) -> Callable[[], list]:
    batch = getattr(family, "answer_batch", None)
    if batched and callable(batch):
        return lambda: batch(instance, queries, method=method)
    return lambda: [family.answer(instance, q, method=method) for q in queries]


def _quantile(sorted_values: Sequence[float], q: float) -> float:
    """Linear-interpolated quantile of already sorted values (numpy's default rule)."""
    if not sorted_values:
        return math.nan
    pos = q * (len(sorted_values) - 1)
    lo = int(math.floor(pos))
    hi = min(lo + 1, len(sorted_values) - 1)
    return sorted_values[lo] + (sorted_values[hi] - sorted_values[lo]) * (pos - lo)


def _spread(values: Sequence[float]) -> float:
    s = sorted(values)
    med = _quantile(s, 0.5)
    if len(s) < 2 or not med > 0:
        return 0.0
    return (_quantile(s, 0.75) - _quantile(s, 0.25)) / med


def _maxrss_bytes() -> int:
    try:
        import resource

        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        return int(rss) if sys.platform == "darwin" else int(rss) * 1024  # Linux: KiB
    except (ImportError, OSError):
        return 0


def _timed(fn: Callable[[], Any], loops: int) -> float:
    """Seconds for ``loops`` calls of ``fn`` with the garbage collector off (restored after)."""
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        t0 = time.perf_counter_ns()
        for _ in range(loops):
            fn()
        return (time.perf_counter_ns() - t0) * 1e-9
    finally:
        if was_enabled:
            gc.enable()


def time_queries(family: Any, instance: Any, queries: Sequence[Any], *, method: str,
                 min_repeat_seconds: float = 0.01, min_repeats: int = 5, max_repeats: int = 20,
                 spread_limit: float = 0.1, deadline: float | None = None,
                 measure_memory: bool = True,
                 on_first_pass: Callable[[float], None] | None = None,
                 batched: bool = False) -> Timing:
    """Time answering ``queries`` on ``instance``: median, min, max and spread per query.

    Runs in the calling process (the harness calls it inside a worker; the audit calls it
    directly). One *loop* answers every query once; one *repeat* runs ``loops`` loops back to
    back. By default each query is answered alone (``answer``): the time is a per-query latency,
    the unit work is counted in. With ``batched`` the family's ``answer_batch`` answers them
    together; its throughput depends on how many queries share a shape, which varies from point
    to point with random queries and would blur a growth curve (batched throughput is what
    ``make bench`` measures).

    Parameters
    ----------
    family, instance, queries
        What to answer; ``queries`` must not be empty.
    method
        ``"exact"`` or ``"sampling"``.
    min_repeat_seconds
        Loops are calibrated so one repeat lasts at least this long (timer resolution and
        per-call jitter become negligible).
    min_repeats, max_repeats, spread_limit
        At least ``min_repeats`` repeats; more while the relative IQR exceeds ``spread_limit``,
        up to ``max_repeats``.
    deadline
        ``time.perf_counter()`` value by which measuring must end; repeats that would pass it
        are not started (at least the warm-up pass always runs).
    measure_memory
        Run one extra untimed pass under :mod:`tracemalloc` (when the deadline allows).
    on_first_pass
        Called with the warm-up pass's seconds as soon as it is known.

    Returns
    -------
    Timing
        With the warm-up pass's answers in ``answers``.

    Notes
    -----
    Cost: about ``(repeats + 2) * loops + 1`` passes over the queries, plus one tracemalloc pass
    (typically 2-5x slower than a plain one). The median of repeats is quoted because the
    distribution of times is skewed right (interrupts, cache misses only ever add time); the
    warm-up is discarded because the first pass also pays for caches and plans (common practice).
    """
    n = len(queries)
    if n == 0:
        raise ValueError("time_queries needs at least one query")
    fn = _answerer(family, instance, queries, method, batched)
    inf = math.inf if deadline is None else deadline
    rss0 = _maxrss_bytes()

    t0 = time.perf_counter_ns()
    answers = list(fn())
    first = (time.perf_counter_ns() - t0) * 1e-9
    if on_first_pass is not None:
        on_first_pass(first)
    if len(answers) != n:
        raise ValueError(f"the family answered {len(answers)} of {n} queries")
    works = [float(getattr(a, "work", math.nan)) for a in answers]
    work = sum(works) / n

    def room(seconds: float) -> bool:
        return time.perf_counter() + seconds <= inf

    # Calibrate: a repeat shorter than min_repeat_seconds is discarded and the loop count grown.
    loops = max(1, int(math.ceil(min_repeat_seconds / first))) if first > 0 else 1
    repeats: list[float] = []
    for _ in range(12):
        estimate = first * loops * 1.2
        if not room(estimate):
            break
        t = _timed(fn, loops)
        if t >= min_repeat_seconds or loops >= 1 << 24:
            repeats.append(t)
            break
        loops = max(loops * 2, int(math.ceil(loops * min_repeat_seconds / max(t, 1e-9) * 1.05)))
    if repeats:
        gc.collect()  # start the series from a clean heap, so no repeat pays for earlier garbage
        while len(repeats) < max_repeats:
            if len(repeats) >= min_repeats and _spread(repeats) <= spread_limit:
                break
            if not room(_quantile(sorted(repeats), 0.5) * 1.2):
                break
            repeats.append(_timed(fn, loops))
    cold_only = not repeats
    if cold_only:
        repeats, loops = [first], 1

    peak = 0
    if measure_memory and room(first * 4 + 0.01):
        import tracemalloc

        tracemalloc.start()
        try:
            fn()
            peak = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
    peak = max(peak, _maxrss_bytes() - rss0)

    per_query = tuple(r / (loops * n) for r in repeats)
    s = sorted(per_query)
    return Timing(seconds_median=_quantile(s, 0.5), seconds_min=s[0], seconds_max=s[-1],
                  seconds_spread=_spread(per_query), repeats=len(per_query), loops=loops,
                  repeat_seconds=per_query, work=work, peak_bytes=int(peak),
                  first_pass_seconds=first, cold_only=cold_only, answers=tuple(answers))


# ============================================================================ correctness guard
def check_answers(family: Any, instance: Any, queries: Sequence[Any], answers: Sequence[Any], *,
                  method: str, deadline: float | None = None) -> dict[str, Any]:
    """Compare answers with ``family.reference`` (untimed); the correctness guard of a point.

    Tolerances: an exact answer must satisfy ``|a - r| <= 1e-9 * max(1, |r|)`` (absolute on
    probabilities, relative for larger values such as expectations); a sampling answer
    ``|a - r| <= 4 * stderr + 1e-9``; when the family offers ``reference_stderr(instance, q)``
    (a reference that is itself estimated) four times that is added. A NaN answer never matches.

    Returns
    -------
    dict
        ``n_checked``, ``n_wrong``, ``max_error`` (None when nothing was checked),
        ``n_skipped_time`` (checks not started because the deadline passed) and ``detail`` (a
        sentence on the worst mismatch, or "").
    """
    ref_stderr = getattr(family, "reference_stderr", None)
    inf = math.inf if deadline is None else deadline
    started = time.perf_counter()
    first_call = True
    n_checked = n_wrong = n_skipped = 0
    max_error: float | None = None
    detail = ""
    worst = -1.0
    for q, a in zip(queries, answers):
        if time.perf_counter() > inf:
            n_skipped += 1
            continue
        r = family.reference(instance, q)
        if first_call:
            # The first call may pay one-off costs (importing a reference library); the time
            # allowance starts after it.
            first_call = False
            inf += time.perf_counter() - started
        if r is None:
            continue
        r = float(r)
        value = float(getattr(a, "value", math.nan))
        stderr = getattr(a, "stderr", None)
        if method == "exact" and stderr is None:
            tol = 1e-9 * max(1.0, abs(r))
        else:
            tol = 4.0 * float(stderr or 0.0) + 1e-9
        if callable(ref_stderr):
            extra = ref_stderr(instance, q)
            if extra is not None:
                tol += 4.0 * float(extra)
        err = abs(value - r)
        n_checked += 1
        if math.isnan(err):
            err = math.inf
        max_error = err if max_error is None else max(max_error, err)
        if not err <= tol:
            n_wrong += 1
            if err > worst:
                worst = err
                describe = getattr(q, "describe", None)
                text = describe() if callable(describe) else repr(q)
                detail = (f"{text}: answered {value:.12g}, reference {r:.12g} "
                          f"(error {err:.3g}, tolerance {tol:.3g})")
    return {"n_checked": n_checked, "n_wrong": n_wrong, "max_error": max_error,
            "n_skipped_time": n_skipped, "detail": detail}


# ============================================================================ study context
@dataclass(frozen=True)
class StudyContext:
    """Everything a curve's worker needs to know about the study (picklable, JSON-able).

    ``reference_s`` bounds the untimed reference checks of one point (default: the point cap);
    ``grace_s`` is the wait between SIGTERM and SIGKILL; ``sys_path`` entries are prepended in
    the worker so a user's ``package.module:Class`` imports there as it does here.
    ``interleave_rounds`` is how many rounds of the interleaved sweep follow a curve (0: none);
    points whose repeat lasts longer than ``interleave_repeat_s`` stay out of it, and the sweep
    may take at most ``interleave_share`` of the time the curve took (and never more than the
    budget left). ``launcher`` is ``"auto"`` (fork workers from a preloaded zygote where the
    platform allows, :mod:`profiler.zygote`, else spawn an interpreter) or ``"spawn"`` (always a
    fresh interpreter); the environment variable ``INFERCOST_LAUNCHER=spawn`` forces the latter
    too.
    """

    study_id: str
    seed: int = 7
    point_timeout_s: float = 5.0
    memory_mb: int = 2048
    threads: int = 1
    min_repeat_seconds: float = 0.01
    min_repeats: int = 5
    max_repeats: int = 12
    spread_limit: float = 0.1
    reference_s: float | None = None
    grace_s: float = 0.3
    measure_memory: bool = True
    interleave_rounds: int = 9
    interleave_repeat_s: float = 0.25
    interleave_share: float = 0.35
    python: str = field(default_factory=lambda: sys.executable)
    sys_path: tuple[str, ...] = field(default_factory=lambda: tuple(p for p in sys.path if p))
    launcher: str = "auto"

    @classmethod
    def from_spec(cls, spec: Any, study_id: str, **overrides: Any) -> "StudyContext":
        """The context for a :class:`~profiler.records.StudySpec` (caps, seed, threads)."""
        values = dict(study_id=study_id, seed=int(spec.seed),
                      point_timeout_s=float(spec.point_timeout_s),
                      memory_mb=int(spec.memory_mb), threads=int(spec.threads))
        values.update(overrides)
        return cls(**values)

    def to_dict(self) -> dict[str, Any]:
        return {k: (list(v) if isinstance(v, tuple) else v) for k, v in self.__dict__.items()}


def query_seed(seed: int, size: int) -> int:
    """Seed of the queries at one size: fixed by the study seed and the size alone."""
    return (int(seed) * 1_000_003 + int(size) * 7919) % (2 ** 31 - 1)


# ============================================================================ the worker process
def worker_env(threads: int) -> dict[str, str]:
    """The environment a worker starts with: thread pools pinned, hashing fixed, faulthandler on."""
    env = dict(os.environ)
    for var in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS",
                "NUMEXPR_NUM_THREADS", "VECLIB_MAXIMUM_THREADS", "BLIS_NUM_THREADS"):
        env[var] = str(int(threads))
    env["PYTHONHASHSEED"] = "0"  # set iteration order is part of what a family does
    env["PYTHONFAULTHANDLER"] = "1"
    env.pop("PYTHONSTARTUP", None)
    # A user's own family (``module:Class``) sits in the working directory; the console script
    # that runs a study does not have it on sys.path, so the workers get it explicitly.
    cwd = os.getcwd()
    parts = [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p]
    if cwd not in parts:
        parts.append(cwd)
    env["PYTHONPATH"] = os.pathsep.join(parts)
    return env


def _vm_bytes() -> int | None:
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmSize:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


def _set_parent_death_signal() -> None:
    """Linux: the kernel kills this worker when the thread that started it dies (kill -9 safe)."""
    if not sys.platform.startswith("linux"):
        return
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, int(signal.SIGKILL), 0, 0, 0)  # PR_SET_PDEATHSIG = 1
    except (OSError, AttributeError):
        pass


def _one_line(text: str, limit: int = 400) -> str:
    line = " ".join(str(text).split())
    return line if len(line) <= limit else line[: limit - 3] + "..."


def _error_text(exc: BaseException) -> str:
    return _one_line(f"{type(exc).__name__}: {exc}")


def _float_profile(profile: Any) -> dict[str, float]:
    out: dict[str, float] = {}
    if not isinstance(profile, dict):
        return out
    for k, v in profile.items():
        if isinstance(v, bool):
            out[str(k)] = float(v)
            continue
        try:
            f = float(v)
        except (TypeError, ValueError):
            continue
        if math.isfinite(f):
            out[str(k)] = f
    return out


class _WorkerState:
    """What a worker holds between points: its family and the curve it measures."""

    def __init__(self, msg: dict[str, Any], send: Callable[[dict], None]) -> None:
        from model_zoo.base import Level, resolve

        self.send = send
        self.ctx = msg["ctx"]
        self.spec = CurveSpec.from_dict(msg["spec"])
        self.level = Level(self.spec.level)
        cls = resolve(self.spec.family)
        self.family = cls(**dict(self.spec.params))
        self.memory_cap = int(self.ctx["memory_mb"]) * MIB

    def realize(self, size: int) -> int:
        from model_zoo.base import size_along

        spec = self.spec
        nominal = size_along(spec.axis, int(size), int(spec.fixed))
        realizable = getattr(self.family, "realizable", None)
        got = realizable(nominal, topology=spec.topology) if callable(realizable) else nominal
        return int(got.graph if spec.axis == "graph" else got.mechanism)

    def facts(self) -> dict[str, Any]:
        spec, family = self.spec, self.family
        theory = None
        expected = getattr(family, "expected_growth", None)
        if callable(expected):
            try:
                theory = expected(axis=spec.axis, topology=spec.topology, level=self.level,
                                  method=spec.method)
            except Exception:
                theory = None
        return {"theory": theory, "work_unit": str(getattr(family, "work_unit", "") or ""),
                "mechanism_knob": str(getattr(family, "mechanism_knob", "") or "")}

    def point(self, size: int, deadline_s: float, reference_s: float) -> dict[str, Any]:
        """Measure one point; every outcome becomes a dict of Point fields (never raises)."""
        from model_zoo.base import size_along
        from model_zoo.errors import InfercostError

        t_start = time.perf_counter()
        deadline = t_start + deadline_s
        out: dict[str, Any] = {"size": int(size)}
        state: dict[str, Any] = {}
        failure: tuple[str, str] | None = None
        answering_started: float | None = None
        try:
            spec, family = self.spec, self.family
            tb = time.perf_counter()
            instance = family.build(size_along(spec.axis, size, spec.fixed),
                                    topology=spec.topology, seed=int(self.ctx["seed"]))
            out["build_seconds"] = time.perf_counter() - tb
            state["instance"] = instance
            queries = list(family.queries(instance, self.level, n=int(spec.queries),
                                          seed=query_seed(self.ctx["seed"], size)))
            state["queries"] = queries
            out["n_queries"] = len(queries)
            out["profile"] = _float_profile(family.profile(instance))
            out["predicted_work"] = _mean_or_none(
                family.predicted_work(instance, q, method=spec.method) for q in queries)
            pb = _max_or_none(_predicted_bytes(family, instance, queries, spec.method))
            self.send({"phase": "built", "fields": dict(out)})
            if not queries:
                return {**out, "status": "error", "message": "the family returned no queries"}
            if pb is not None and pb > self.memory_cap:
                return {**out, "status": "memory",
                        "message": (f"predicted peak {pb / MIB:.1f} MiB exceeds the memory cap "
                                    f"{self.memory_cap / MIB:.0f} MiB; not run")}
            answering_started = time.perf_counter()
            self.send({"phase": "answering"})
            timing = time_queries(
                family, instance, queries, method=spec.method,
                min_repeat_seconds=float(self.ctx["min_repeat_seconds"]),
                min_repeats=int(self.ctx["min_repeats"]),
                max_repeats=int(self.ctx["max_repeats"]),
                spread_limit=float(self.ctx["spread_limit"]), deadline=deadline,
                measure_memory=bool(self.ctx["measure_memory"]),
                on_first_pass=lambda s: self.send({"phase": "first_pass", "seconds": s}))
            out.update(seconds_median=timing.seconds_median, seconds_min=timing.seconds_min,
                       seconds_max=timing.seconds_max, seconds_spread=timing.seconds_spread,
                       repeats=timing.repeats, loops=timing.loops,
                       repeat_seconds=list(timing.repeat_seconds), work=timing.work,
                       peak_bytes=timing.peak_bytes, status="ok")
            notes = []
            if timing.cold_only:
                notes.append("only the warm-up pass fitted within the time cap")
            elif timing.repeats < int(self.ctx["min_repeats"]):
                notes.append(f"{timing.repeats} repeats within the time cap")
            out["message"] = "; ".join(notes)
            self.send({"phase": "measured", "fields": dict(out)})
            check = check_answers(family, instance, queries, timing.answers, method=spec.method,
                                  deadline=time.perf_counter() + reference_s)
            out["max_error"] = check["max_error"]
            if check["n_wrong"]:
                out["status"] = "wrong"
                notes.insert(0, f"{check['n_wrong']} of {check['n_checked']} answers differ from "
                                f"the reference; worst {check['detail']}")
            if check["n_skipped_time"]:
                notes.append(f"{check['n_skipped_time']} reference checks skipped (time)")
            out["message"] = "; ".join(notes)
            return out
        except MemoryError:
            failure = ("memory", "MemoryError: allocation past the memory cap "
                                 f"({self.memory_cap / MIB:.0f} MiB above the worker's baseline)")
        except InfercostError as exc:
            failure = ("error", _error_text(exc))
        except RecursionError as exc:
            failure = ("error", _error_text(exc))
        except Exception as exc:
            failure = ("error", _error_text(exc))
        finally:
            state.clear()
        # Out of the except block: the traceback (and the big arrays its frames hold) is gone.
        gc.collect()
        status, message = failure
        out.update(status=status, message=message)
        if status == "memory" and answering_started is not None:
            n = max(int(out.get("n_queries") or 1), 1)
            out["seconds_median"] = (time.perf_counter() - answering_started) / n
        return out

    def interleave(self, plan: Sequence[tuple[int, int]], rounds: int, deadline_s: float,
                   seed: int) -> dict[str, Any]:
        """Repeats of measured points, taken round-robin in a fresh random order per round.

        ``plan`` holds (size, loops) of points already measured; each is rebuilt (same seeds,
        so the same instance and queries), warmed up once, then timed once per round with its
        own loop count. Rounds that would pass ``deadline_s`` are not started; a size whose
        rebuild fails is left out. Returns ``{"seconds": {size: [per-query seconds, ...]},
        "rounds": rounds done}``.

        Notes
        -----
        Cost: one build and one warm-up pass per size, then ``rounds`` repeats of each (the
        parent sizes ``rounds`` from the points' measured repeat lengths). All instances are
        alive at once; the parent leaves out points whose measured peak would crowd the cap.
        Randomising the order each round decorrelates slow spells of the machine from size
        (common practice in benchmarking: randomised, interleaved trials).
        """
        from model_zoo.base import make_rng, size_along

        t_end = time.perf_counter() + deadline_s
        spec, family = self.spec, self.family
        timed: list[tuple[int, Callable[[], Any], int, int]] = []
        for size, loops in plan:
            if time.perf_counter() >= t_end:
                break
            try:
                instance = family.build(size_along(spec.axis, int(size), spec.fixed),
                                        topology=spec.topology, seed=int(self.ctx["seed"]))
                queries = list(family.queries(instance, self.level, n=int(spec.queries),
                                              seed=query_seed(self.ctx["seed"], int(size))))
                if not queries:
                    continue
                fn = _answerer(family, instance, queries, spec.method, False)
                fn()  # warm-up: caches and plans, as before the point's own repeats
            except Exception:
                continue
            timed.append((int(size), fn, max(1, int(loops)), len(queries)))
        out: dict[int, list[float]] = {size: [] for size, *_ in timed}
        rng = make_rng(seed, 0x1E4)
        longest = {size: 0.0 for size in out}
        done = 0
        gc.collect()
        for _ in range(max(0, int(rounds))):
            need = sum(longest.values())
            if time.perf_counter() + need > t_end:
                break
            for i in rng.permutation(len(timed)):
                size, fn, loops, n = timed[int(i)]
                t = _timed(fn, loops)
                longest[size] = max(longest[size], t)
                out[size].append(t / (loops * n))
            done += 1
        return {"seconds": {str(k): v for k, v in out.items() if v}, "rounds": done}


def _predicted_bytes(family: Any, instance: Any, queries: Sequence[Any], method: str) -> Iterable:
    fn = getattr(family, "predicted_bytes", None)
    if not callable(fn):
        return ()
    return (fn(instance, q, method=method) for q in queries)


def _mean_or_none(values: Iterable[Any]) -> float | None:
    try:
        vals = [float(v) for v in values if v is not None]
    except Exception:
        return None
    return sum(vals) / len(vals) if vals else None


def _max_or_none(values: Iterable[Any]) -> float | None:
    try:
        vals = [float(v) for v in values if v is not None]
    except Exception:
        return None
    return max(vals) if vals else None


def _json_default(obj: Any) -> Any:
    for attr in ("item", "tolist"):
        fn = getattr(obj, attr, None)
        if callable(fn):
            return fn()
    return str(obj)


def worker_main() -> None:
    """Entry point of a measuring worker: JSON commands on stdin, JSON replies on the old stdout.

    The worker's own stdout is pointed at /dev/null first so that a family that prints cannot
    corrupt the channel. Commands: ``init`` (family, curve, limits), ``realize`` (size),
    ``point`` (size, deadline), ``interleave`` (measured sizes with their loop counts, rounds,
    deadline), ``quit``. The worker exits when stdin closes (parent gone).
    """
    chan = os.fdopen(os.dup(1), "w", buffering=1)
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, 1)
    sys.stdout = open(os.devnull, "w")
    _set_parent_death_signal()

    def send(msg: dict) -> None:
        try:
            chan.write(json.dumps(msg, default=_json_default) + "\n")
            chan.flush()
        except (BrokenPipeError, OSError):
            os._exit(0)  # the parent is gone: nothing to report to

    state: _WorkerState | None = None
    limits = None
    for line in sys.stdin:
        try:
            msg = json.loads(line)
        except ValueError:
            send({"phase": "failed", "error": "unreadable command"})
            continue
        op = msg.get("op")
        try:
            if op == "init":
                for p in reversed(msg["ctx"].get("sys_path") or ()):
                    if p not in sys.path:
                        sys.path.insert(0, p)
                import numpy  # noqa: F401  (loaded before the limits, so BLAS is limited)
                from threadpoolctl import threadpool_limits

                threads = int(msg["ctx"]["threads"])
                limits = threadpool_limits(limits=threads)  # kept alive for the worker's life
                state = _WorkerState(msg, send)
                facts = state.facts()
                limit, baseline = _limit_address_space(int(msg["ctx"]["memory_mb"]))
                from profiler.environment import worker_environment

                env = worker_environment(threads=threads, memory_limit_bytes=limit,
                                         baseline_vm_bytes=baseline)
                send({"phase": "ready", "worker": f"{socket.gethostname()}:{os.getpid()}",
                      "environment": env, **facts})
            elif op == "realize":
                if state is None:
                    raise RuntimeError("worker not initialised")
                send({"phase": "realized", "size": state.realize(int(msg["size"]))})
            elif op == "point":
                if state is None:
                    raise RuntimeError("worker not initialised")
                _limit_cpu(float(msg["deadline_s"]) + float(msg["reference_s"]))
                # Re-based per point: what earlier points imported lazily (a reference engine,
                # say) is part of the baseline, not of this point's allowance.
                _limit_address_space(int(state.ctx["memory_mb"]))
                t0 = time.perf_counter()
                fields = state.point(int(msg["size"]), float(msg["deadline_s"]),
                                     float(msg["reference_s"]))
                send({"phase": "done", "fields": fields,
                      "worker_seconds": time.perf_counter() - t0})
            elif op == "interleave":
                if state is None:
                    raise RuntimeError("worker not initialised")
                _limit_cpu(float(msg["deadline_s"]) + 5.0)
                _limit_address_space(int(state.ctx["memory_mb"]))
                plan = [(int(s), int(n)) for s, n in msg["plan"]]
                send({"phase": "interleaved",
                      **state.interleave(plan, int(msg["rounds"]), float(msg["deadline_s"]),
                                         int(msg.get("seed", 0)))})
            elif op == "quit":
                break
            else:
                send({"phase": "failed", "error": f"unknown command {op!r}"})
        except MemoryError:
            gc.collect()
            send({"phase": "failed", "error": "MemoryError", "memory": True})
        except Exception as exc:
            send({"phase": "failed", "error": _error_text(exc)})
    del limits


def _limit_address_space(memory_mb: int) -> tuple[int | None, int | None]:
    """Set RLIMIT_AS to the current address space plus ``memory_mb``; (limit, baseline) bytes."""
    gc.collect()
    baseline = _vm_bytes()
    try:
        import resource
    except ImportError:
        return None, baseline
    if baseline is None:
        return None, None
    soft, hard = resource.getrlimit(resource.RLIMIT_AS)
    limit = baseline + int(memory_mb) * MIB
    if hard != resource.RLIM_INFINITY:
        limit = min(limit, hard)
    try:
        resource.setrlimit(resource.RLIMIT_AS, (limit, hard))
    except (ValueError, OSError):
        return None, baseline
    return limit, baseline


def _limit_cpu(seconds: float) -> None:
    """A backstop should the parent fail to kill us: SIGXCPU after generous CPU time."""
    try:
        import resource

        used = resource.getrusage(resource.RUSAGE_SELF)
        spent = used.ru_utime + used.ru_stime
        soft = int(spent + 3 * seconds + 30)
        hard = resource.getrlimit(resource.RLIMIT_CPU)[1]
        if hard != resource.RLIM_INFINITY:
            soft = min(soft, hard)
        resource.setrlimit(resource.RLIMIT_CPU, (soft, hard))
    except (ImportError, ValueError, OSError):
        pass


# ============================================================================ the parent's handle
class _WorkerDied(Exception):
    def __init__(self, returncode: int | None, stderr_tail: str) -> None:
        super().__init__(returncode, stderr_tail)
        self.returncode = returncode
        self.stderr_tail = stderr_tail

    def describe(self) -> str:
        rc = self.returncode
        if rc is not None and rc < 0:
            try:
                what = f"signal {signal.Signals(-rc).name}"
            except ValueError:
                what = f"signal {-rc}"
        else:
            what = f"exit code {rc}"
        tail = f": {self.stderr_tail}" if self.stderr_tail else ""
        return _one_line(f"worker died ({what}){tail}")

    @property
    def is_memory(self) -> bool:
        t = self.stderr_tail
        return "MemoryError" in t or "bad_alloc" in t or "Cannot allocate memory" in t


class _Silent(Exception):
    """The worker said nothing before the deadline."""


#: Workers alive in this process, so an interrupted study can kill them all.
_LIVE: set["_Worker"] = set()
_LIVE_LOCK = threading.Lock()


def kill_all_workers() -> None:
    """Kill every worker this process started and that is still alive (used on interrupt)."""
    with _LIVE_LOCK:
        workers = list(_LIVE)
    for w in workers:
        w.kill()


class _Worker:
    """A worker process for one curve, driven over pipes with one JSON message per line."""

    def __init__(self, ctx: StudyContext, spec: CurveSpec, zygote: Any = None,
                 launcher_note: str = "") -> None:
        self.ctx = ctx
        self.stderr = tempfile.TemporaryFile()
        self.launcher = "spawn"
        self.launcher_note = launcher_note
        proc: Any = None
        if zygote is not None:
            from profiler.zygote import ZygoteUnavailable, is_builtin_family

            try:
                proc = zygote.spawn(stderr_fd=self.stderr.fileno(),
                                    families=is_builtin_family(spec.family))
                self.launcher = "fork-preloaded"
            except ZygoteUnavailable as exc:
                # Silently back to a fresh interpreter; the environment says why.
                self.launcher_note = str(exc)
        if proc is None:
            proc = subprocess.Popen(
                [ctx.python, "-c", "from profiler.harness import worker_main; worker_main()"],
                stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=self.stderr,
                env=worker_env(ctx.threads), close_fds=True, start_new_session=True)
        self.proc = proc
        with _LIVE_LOCK:
            _LIVE.add(self)
        self._buf = b""
        self.ready: dict[str, Any] = {}
        self.send({"op": "init", "ctx": ctx.to_dict(), "spec": spec.to_dict()})
        # Interpreter start and imports; generous, since a loaded machine is slow to start one.
        try:
            msg = self.read(timeout=max(60.0, ctx.point_timeout_s))
        except (_Silent, _WorkerDied):
            self.kill()
            raise
        if msg.get("phase") != "ready":
            err = msg.get("error", "worker failed to start")
            self.kill()
            raise _InitFailed(str(err))
        self.ready = msg
        env = msg.setdefault("environment", {})
        if isinstance(env, dict):
            env["launcher"] = self.launcher
            if self.launcher == "fork-preloaded" and zygote is not None:
                env["zygote_pid"] = zygote.pid
                env["zygote_import_seconds"] = (float(zygote.info.get("import_seconds") or 0.0)
                                                + sum(zygote.groups.values()))
            if self.launcher_note:
                env["launcher_note"] = _one_line(self.launcher_note)
        self.id = str(msg.get("worker", f"{socket.gethostname()}:{self.proc.pid}"))

    def send(self, msg: dict) -> None:
        try:
            assert self.proc.stdin is not None
            self.proc.stdin.write((json.dumps(msg) + "\n").encode())
            self.proc.stdin.flush()
        except (BrokenPipeError, OSError):
            raise _WorkerDied(self._wait_code(), self._stderr_tail()) from None

    def read(self, timeout: float) -> dict[str, Any]:
        """Next message, or _Silent after ``timeout`` seconds, or _WorkerDied on EOF."""
        end = time.monotonic() + max(timeout, 0.0)
        assert self.proc.stdout is not None
        fd = self.proc.stdout.fileno()
        while b"\n" not in self._buf:
            left = end - time.monotonic()
            if left <= 0:
                raise _Silent()
            ready, _, _ = select.select([fd], [], [], left)
            if not ready:
                continue
            chunk = os.read(fd, 1 << 16)
            if not chunk:
                raise _WorkerDied(self._wait_code(), self._stderr_tail())
            self._buf += chunk
        line, _, self._buf = self._buf.partition(b"\n")
        try:
            return json.loads(line)
        except ValueError:
            return {"phase": "failed", "error": "unreadable reply from worker"}

    def _wait_code(self) -> int | None:
        try:
            return self.proc.wait(timeout=2.0)
        except subprocess.TimeoutExpired:
            return None

    def _stderr_tail(self, n_lines: int = 6) -> str:
        try:
            self.stderr.seek(0, os.SEEK_END)
            size = self.stderr.tell()
            # faulthandler ends with the list of loaded extension modules, long in a worker
            # forked from the preloaded zygote; read far enough back to find the error line.
            self.stderr.seek(max(0, size - 65536))
            text = self.stderr.read().decode(errors="replace")
        except (OSError, ValueError):
            return ""
        lines = [ln.strip() for ln in text.splitlines()
                 if ln.strip() and not ln.startswith("Extension modules:")]
        fatal = [i for i, ln in enumerate(lines) if ln.startswith("Fatal Python error")]
        if fatal:
            # faulthandler: the error line, then the innermost frames (most recent call first).
            i = fatal[-1]
            frames = [ln for ln in lines[i + 1:] if ln.startswith("File ")]
            return " | ".join([lines[i]] + frames[:3])
        return " | ".join(lines[-n_lines:])

    def kill(self) -> None:
        """SIGTERM, then SIGKILL after the grace period; always reaps the process."""
        with _LIVE_LOCK:
            _LIVE.discard(self)
        proc = self.proc
        if proc.poll() is None:
            try:
                proc.terminate()
                proc.wait(timeout=self.ctx.grace_s)
            except subprocess.TimeoutExpired:
                proc.kill()
                try:
                    proc.wait(timeout=5.0)
                except subprocess.TimeoutExpired:
                    pass
            except OSError:
                pass
        self._close_pipes()

    def close(self) -> None:
        """Ask the worker to quit; kill it if it does not within a second."""
        if self.proc.poll() is None:
            try:
                self.send({"op": "quit"})
                self.proc.wait(timeout=1.0)
            except (subprocess.TimeoutExpired, _WorkerDied):
                pass
        self.kill()

    def _close_pipes(self) -> None:
        for pipe in (self.proc.stdin, self.proc.stdout):
            try:
                if pipe is not None:
                    pipe.close()
            except OSError:
                pass
        try:
            self.stderr.close()
        except OSError:
            pass


class _InitFailed(Exception):
    pass


# ============================================================================ curves
@dataclass(frozen=True)
class CurveOutcome:
    """What running one curve produced (the points were also streamed to ``on_point``).

    ``reason`` says why the curve stopped (``"max size"``, ``"censored"``, ``"budget"``,
    ``"stopped"``, ...); ``cut_by_budget`` is True when the budget stopped a curve whose schedule
    still had a size to measure. ``workers`` maps worker ids to their environments;
    ``point_seconds`` maps each measured size to (wall seconds seen by the parent, seconds
    inside the worker) — their difference is the isolation overhead. ``revised`` holds stored
    or new points re-issued with their ``interleaved_seconds`` after the interleaved sweep
    (also handed to ``on_revised``).
    """

    index: int
    key: str
    points: tuple[Point, ...]
    reason: str
    cut_by_budget: bool = False
    theory: str | None = None
    work_unit: str = ""
    mechanism_knob: str = ""
    workers: dict[str, dict[str, Any]] = field(default_factory=dict)
    point_seconds: dict[int, tuple[float, float | None]] = field(default_factory=dict)
    seconds: float = 0.0
    revised: tuple[Point, ...] = ()


def _make_point(ctx: StudyContext, index: int, spec: CurveSpec, size: int, status: str,
                worker: str, fields: dict[str, Any]) -> Point:
    allowed = set(Point.__dataclass_fields__) - {"study", "curve", "family", "level", "method",
                                                 "axis", "topology", "fixed", "size", "status",
                                                 "worker", "finished_at"}
    clean = {k: v for k, v in fields.items() if k in allowed}
    if "repeat_seconds" in clean:
        clean["repeat_seconds"] = tuple(float(x) for x in clean["repeat_seconds"] or ())
    return Point(study=ctx.study_id, curve=index, family=spec.family, level=spec.level,
                 method=spec.method, axis=spec.axis, topology=spec.topology,
                 fixed=int(spec.fixed), size=int(size), status=status, worker=worker,
                 finished_at=time.time(), **clean)


class _CurveDriver:
    """Runs the points of one curve through a (re)started worker."""

    def __init__(self, ctx: StudyContext, index: int, spec: CurveSpec) -> None:
        self.ctx, self.index, self.spec = ctx, index, spec
        self.worker: _Worker | None = None
        self.workers: dict[str, dict[str, Any]] = {}
        self.facts: dict[str, Any] = {}
        self.realized: dict[int, int] = {}
        #: Seconds the last point spent in its reference checks (after its timing was safe).
        self.last_reference_s = 0.0
        self.zygote: Any = None
        self.launcher_note = ""
        self._launcher_asked = False

    def _launcher(self) -> Any:
        """The study's zygote (started on first use), or None to spawn interpreters."""
        if self.zygote is not None and not self.zygote.alive:
            from profiler.zygote import release

            release(self.zygote)  # died under us: ask again (acquire restarts it, a few times)
            self.zygote, self._launcher_asked = None, False
        if not self._launcher_asked:
            self._launcher_asked = True
            from profiler import zygote

            if zygote.launcher_mode(self.ctx.launcher) == "spawn":
                self.launcher_note = "spawn requested"
            elif not zygote.is_supported():
                self.launcher_note = "the preloaded launcher needs Linux and socket.send_fds"
            else:
                self.zygote, self.launcher_note = zygote.acquire(
                    python=self.ctx.python, threads=self.ctx.threads,
                    sys_path=tuple(self.ctx.sys_path), env=worker_env(self.ctx.threads))
        return self.zygote

    def _ensure(self) -> _Worker:
        if self.worker is None or self.worker.proc.poll() is not None:
            if self.worker is not None:
                self.worker.kill()
            self.worker = _Worker(self.ctx, self.spec, self._launcher(), self.launcher_note)
            self.workers[self.worker.id] = self.worker.ready.get("environment", {})
            self.facts = {k: self.worker.ready.get(k) for k in
                          ("theory", "work_unit", "mechanism_knob")}
        return self.worker

    def realize(self, size: int) -> int:
        if size not in self.realized:
            w = self._ensure()
            w.send({"op": "realize", "size": int(size)})
            msg = w.read(timeout=max(30.0, self.ctx.point_timeout_s))
            if msg.get("phase") != "realized":
                raise _RealizeFailed(str(msg.get("error", "cannot realise the size")))
            self.realized[size] = int(msg["size"])
        return self.realized[size]

    def measure(self, size: int) -> tuple[Point, float, float | None]:
        """One point; returns (point, wall seconds, seconds inside the worker)."""
        ctx = self.ctx
        t0 = time.monotonic()
        try:
            w = self._ensure()
        except _InitFailed as exc:
            return self._point(size, "error", "", {"message": _one_line(f"family: {exc}")}), \
                time.monotonic() - t0, None
        except (_WorkerDied, _Silent) as exc:
            text = exc.describe() if isinstance(exc, _WorkerDied) else "worker did not start"
            return self._point(size, "error", "", {"message": text}), time.monotonic() - t0, None
        cap = float(ctx.point_timeout_s)
        reference_s = float(ctx.reference_s if ctx.reference_s is not None else cap)
        fields: dict[str, Any] = {}
        t_send = time.monotonic()
        deadline = t_send + cap
        phase = "building"
        answering_at: float | None = None
        first_pass: float | None = None
        measured_at: float | None = None
        self.last_reference_s = 0.0
        try:
            w.send({"op": "point", "size": int(size), "reference_s": reference_s,
                    "deadline_s": max(0.01, cap * _SELF_DEADLINE - 0.02)})
            while True:
                msg = w.read(timeout=deadline - time.monotonic())
                kind = msg.get("phase")
                if kind == "built":
                    fields.update(msg.get("fields", {}))
                elif kind == "answering":
                    phase, answering_at = "answering", time.monotonic()
                elif kind == "first_pass":
                    first_pass = float(msg.get("seconds", 0.0))
                elif kind == "measured":
                    # Timing is safe; the reference checks get their own window.
                    fields.update(msg.get("fields", {}))
                    phase = "reference"
                    measured_at = time.monotonic()
                    # The worker stops starting checks after reference_s (counted from its first
                    # check, which may import a reference library); one slow call gets slack.
                    deadline = measured_at + 2 * reference_s + 30.0
                elif kind == "done":
                    if measured_at is not None:
                        self.last_reference_s = time.monotonic() - measured_at
                    fields.update(msg.get("fields", {}))
                    status = str(fields.pop("status", "error"))
                    return (self._point(size, status, w.id, fields), time.monotonic() - t0,
                            msg.get("worker_seconds"))
                elif kind == "failed":
                    status = "memory" if msg.get("memory") else "error"
                    fields["message"] = _one_line(str(msg.get("error", "")))
                    return self._point(size, status, w.id, fields), time.monotonic() - t0, None
        except _Silent:
            w.kill()
            self.worker = None
            n = max(int(fields.get("n_queries") or self.spec.queries or 1), 1)
            if phase == "reference":
                if measured_at is not None:
                    self.last_reference_s = time.monotonic() - measured_at
                status = str(fields.pop("status", "ok"))
                note = f"reference checks did not finish within {reference_s:g} s; answers unchecked"
                fields["message"] = "; ".join(m for m in (fields.get("message"), note) if m)
                return self._point(size, status, w.id, fields), time.monotonic() - t0, None
            killed_at = time.monotonic()
            if phase == "answering" and first_pass is not None:
                # Killed after the warm-up pass (a single pass longer than the worker planned):
                # that pass is what one query is known to cost.
                lower = first_pass / n
                where = "timing repeats"
            elif phase == "answering" and answering_at is not None:
                # The first pass over the n queries had not finished: each query costs at least
                # this much on average (a lower bound, never the cost).
                lower = (killed_at - answering_at) / n
                where = "answering"
            else:
                lower = cap / n
                where = "building the instance"
            fields.update(seconds_median=lower, message=(
                f"killed at the {cap:g} s time cap while {where}; seconds_median is a lower bound"))
            for k in ("seconds_min", "seconds_max", "seconds_spread", "work", "repeat_seconds"):
                fields.pop(k, None)
            return self._point(size, "timeout", w.id, fields), killed_at - t0, None
        except _WorkerDied as exc:
            w.kill()
            self.worker = None
            status = "memory" if exc.is_memory else "error"
            fields["message"] = exc.describe()
            return self._point(size, status, w.id, fields), time.monotonic() - t0, None

    def _point(self, size: int, status: str, worker: str, fields: dict[str, Any]) -> Point:
        return _make_point(self.ctx, self.index, self.spec, size, status, worker, fields)

    def interleave(self, points: Sequence[Point], allowed_s: float) -> list[Point]:
        """The interleaved sweep over a finished curve's ``ok`` points (see :func:`run_curve`).

        Returns the points that got at least two interleaved repeats, with
        ``interleaved_seconds`` set; nothing when fewer than three sizes qualify, when fewer
        than three rounds fit in ``allowed_s``, or when the worker fails (the contiguous
        measurements stand).
        """
        ctx = self.ctx
        rounds = int(ctx.interleave_rounds)
        cap_bytes = int(ctx.memory_mb) * MIB
        chosen: list[tuple[Point, float]] = []
        held = 0
        for p in sorted(points, key=lambda q: q.size):
            repeat_s = _sweep_repeat_seconds(ctx, p)
            peak = int(p.peak_bytes or 0)
            if repeat_s is None or held + peak > cap_bytes // 2:
                continue
            held += peak
            chosen.append((p, repeat_s))
        round_s = sum(r for _, r in chosen)
        if len(chosen) < 3 or rounds < 3 or round_s <= 0:
            return []
        rounds = min(rounds, int(allowed_s / round_s))
        if rounds < 3:
            return []
        setup_s = sum(float(p.build_seconds or 0.0) + r / max(p.loops, 1) for p, r in chosen)
        # The whole allowance, not the predicted rounds: a machine slower now than while the
        # points ran still gets its rounds while they fit.
        deadline_s = max(float(allowed_s), rounds * round_s * 1.5) + setup_s * 1.5 + 0.5
        try:
            w = self._ensure()
            w.send({"op": "interleave", "rounds": rounds, "deadline_s": deadline_s,
                    "seed": int(ctx.seed) + 7919 * self.index,
                    "plan": [(int(p.size), int(p.loops)) for p, _ in chosen]})
            msg = w.read(timeout=deadline_s + 10.0)
        except (_InitFailed, _WorkerDied, _Silent):
            if self.worker is not None:
                self.worker.kill()
                self.worker = None
            return []
        if msg.get("phase") != "interleaved":
            return []
        got = {int(k): tuple(float(x) for x in v) for k, v in (msg.get("seconds") or {}).items()}
        return [replace(p, interleaved_seconds=got[p.size]) for p, _ in chosen
                if len(got.get(p.size, ())) >= 2]

    def close(self) -> None:
        if self.worker is not None:
            self.worker.close()
            self.worker = None
        if self.zygote is not None:
            from profiler.zygote import release

            release(self.zygote)
            self.zygote = None


class _RealizeFailed(Exception):
    pass


def prepare_launcher(study_ctx: StudyContext, curves: Sequence[CurveSpec] = ()) -> str:
    """Start the study's preloaded launcher now rather than on the first worker request.

    ``run_study`` calls this inside its launcher scope before the budget clock starts, so that
    the zygote's one-off imports (seconds of CPU) are not charged to the first curves' shares.
    Returns the launcher the workers will use (``"fork-preloaded"`` or ``"spawn"``); never
    raises (a zygote that cannot start means spawned workers, as always).
    """
    from profiler import zygote

    if zygote.launcher_mode(study_ctx.launcher) == "spawn" or not zygote.is_supported():
        return "spawn"
    z, _why = zygote.acquire(python=study_ctx.python, threads=study_ctx.threads,
                             sys_path=tuple(study_ctx.sys_path),
                             env=worker_env(study_ctx.threads))
    if z is None:
        return "spawn"
    try:
        if any(zygote.is_builtin_family(c.family) for c in curves):
            z.preload_families()
    finally:
        zygote.release(z)
    return "fork-preloaded"


def run_curve(study_ctx: StudyContext, curve_index: int, spec: CurveSpec,
              sizes_done: Iterable[int] = (), on_point: Callable[[Point], None] | None = None,
              on_event: Callable[[dict], None] | None = None, *,
              history: Sequence[Point] = (), budget: Callable[[], float] | None = None,
              stop: threading.Event | None = None, schedule: Any = None,
              on_revised: Callable[[Point], None] | None = None) -> CurveOutcome:
    """Run one curve in its own isolated worker process, streaming each point as it finishes.

    When the curve has stopped growing, an *interleaved sweep* re-times its ``ok`` points (new
    and stored): ``StudyContext.interleave_rounds`` rounds, each visiting every size once in a
    fresh random order, each visit one repeat of the point's calibrated loop count. Contiguous
    repeats all fall in whatever spell the machine is in while the point runs; spread over the
    whole sweep, a slow spell lands on random sizes instead of bending the curve. Points whose
    repeat is long (their own repeats already span a long window), or too big to hold together,
    stay out; the sweep fits in ``interleave_share`` of the curve's time and the budget left.

    Parameters
    ----------
    study_ctx
        Caps, seed, threads and timing settings (:class:`StudyContext`).
    curve_index, spec
        Which curve.
    sizes_done
        Sizes already stored for this curve (never measured again).
    on_point
        Called with each new :class:`~profiler.records.Point`, in the calling thread, as soon as
        it is measured. This function writes nothing itself.
    on_event
        Called with progress dicts: ``{"event": "point_start" | "point", "curve", "key", "size",
        "status", "seconds", "cap", "point_seconds"}``.
    history
        Stored points of this curve (the schedule continues from them on resume).
    budget
        ``budget() -> seconds`` this curve may still spend; a point predicted to take longer is
        not started and the outcome says ``cut_by_budget``. None: unlimited.
    stop
        When set, the curve ends after the point in flight.
    schedule
        Override the schedule (default :func:`profiler.schedule.make_schedule` of ``spec``).
    on_revised
        Called with each point re-issued by the interleaved sweep (same size, same
        measurements, ``interleaved_seconds`` filled in): the caller stores the new repeats
        beside the stored point (:meth:`profiler.store.Store.add_sweep`).

    Returns
    -------
    CurveOutcome
    """
    from profiler.schedule import make_schedule, point_seconds_estimate, predicted_point_seconds

    t_start = time.monotonic()
    history = list(history)
    done = {int(p.size) for p in history} | {int(s) for s in sizes_done}
    sched = schedule if schedule is not None else make_schedule(spec)
    driver = _CurveDriver(study_ctx, curve_index, spec)
    cap = float(study_ctx.point_timeout_s)
    # (size, wall seconds without reference checks) of measured points, for budget predictions;
    # reference checks are predicted apart: their first call may pay a one-off import.
    walls: list[tuple[int, float]] = [(p.size, w) for p in history
                                      if (w := point_seconds_estimate(p)) is not None]
    reference_times: list[float] = []
    new_points: list[Point] = []
    revised: list[Point] = []
    point_seconds: dict[int, tuple[float, float | None]] = {}
    reason, cut = "", False
    key = spec.key()

    def emit(event: dict) -> None:
        if on_event is not None:
            on_event({"curve": curve_index, "key": key, "cap": cap, **event})

    def known_history() -> list[Any]:
        # Sizes stored without a Point in hand still count as measured for the schedule.
        extra = [_Placeholder(s) for s in done - {int(p.size) for p in history}]
        return history + extra

    try:
        while True:
            if stop is not None and stop.is_set():
                reason = "stopped"
                break
            if budget is not None and driver.worker is None and budget() < max(0.5, 0.1 * cap):
                # Not even a worker start fits: stop before paying for one.
                reason, cut = "budget", True
                break
            try:
                size = sched.next_size(known_history(), realize=driver.realize)
            except _RealizeFailed as exc:
                size, reason = None, "error"
                point = driver._point(int(getattr(sched, "min_size", 1) or 1), "error", "",
                                      {"message": _one_line(f"realizable: {exc}")})
                if point.size not in done:
                    history.append(point); new_points.append(point); done.add(point.size)
                    if on_point is not None:
                        on_point(point)
                break
            except (_InitFailed, _WorkerDied, _Silent) as exc:
                size, reason = None, "error"
                text = (exc.describe() if isinstance(exc, _WorkerDied)
                        else f"family: {exc}" if isinstance(exc, _InitFailed)
                        else "worker did not answer")
                first = int(getattr(sched, "min_size", 0) or (spec.sizes or (1,))[0])
                if first not in done:
                    point = driver._point(first, "error", "", {"message": _one_line(text)})
                    history.append(point); new_points.append(point); done.add(point.size)
                    if on_point is not None:
                        on_point(point)
                break
            if size is None:
                reason = getattr(sched, "reason", "") or "schedule done"
                break
            if size in done:  # a schedule must not propose it; never measure a size twice
                reason = "schedule repeated a size"
                break
            if budget is not None:
                need = predicted_point_seconds(walls, size, cap_seconds=cap)
                if len(reference_times) >= 2:
                    need += min(reference_times[1:])
                # Room for the interleaved sweep over the points so far and this one (its
                # repeat is about a tenth of its point's time), so growth never crowds it out.
                need += _sweep_reserve(study_ctx, history, need)
                if need > budget():
                    reason, cut = "budget", True
                    break
            emit({"event": "point_start", "size": int(size), "status": None, "seconds": None})
            point, wall, inside = driver.measure(size)
            if stop is not None and stop.is_set():
                # Interrupted: the worker may have been killed under this point, so what came
                # back is not a measurement. Not reported; a resumed run measures it again.
                reason = "stopped"
                break
            done.add(point.size)
            history.append(point)
            new_points.append(point)
            point_seconds[point.size] = (wall, inside)
            walls.append((point.size, max(wall - driver.last_reference_s, 0.0)))
            reference_times.append(driver.last_reference_s)
            if on_point is not None:
                on_point(point)
            emit({"event": "point", "size": point.size, "status": point.status,
                  "seconds": point.seconds_median, "point_seconds": wall, "work": point.work,
                  "message": point.message})
        if reason not in ("stopped", "error") and study_ctx.interleave_rounds > 0:
            allowed = max(1.5, study_ctx.interleave_share * (time.monotonic() - t_start))
            if budget is not None:
                allowed = min(allowed, budget())
            revised = driver.interleave(history, allowed)
            if stop is not None and stop.is_set():
                revised = []
            for point in revised:
                if on_revised is not None:
                    on_revised(point)
    finally:
        driver.close()
    facts = driver.facts
    return CurveOutcome(index=curve_index, key=key, points=tuple(new_points), reason=reason,
                        cut_by_budget=cut, theory=facts.get("theory"),
                        work_unit=facts.get("work_unit") or "",
                        mechanism_knob=facts.get("mechanism_knob") or "",
                        workers=dict(driver.workers), point_seconds=point_seconds,
                        seconds=time.monotonic() - t_start, revised=tuple(revised))


def _sweep_repeat_seconds(ctx: StudyContext, p: Any) -> float | None:
    """Seconds of one sweep repeat of ``p`` (its calibrated loops over its queries), or None
    when it stays out of the sweep (not ok, not timed, or longer than the sweep takes)."""
    if getattr(p, "status", "") != "ok" or not getattr(p, "seconds_median", None) \
            or not getattr(p, "loops", 0) or not getattr(p, "n_queries", 0):
        return None
    repeat_s = float(p.seconds_median) * int(p.loops) * int(p.n_queries)
    return repeat_s if repeat_s <= ctx.interleave_repeat_s else None


def _sweep_reserve(ctx: StudyContext, points: Sequence[Any], next_point_s: float) -> float:
    """Seconds to keep for the interleaved sweep if one more point of ``next_point_s`` runs."""
    if ctx.interleave_rounds <= 0:
        return 0.0
    round_s = sum(r for p in points if (r := _sweep_repeat_seconds(ctx, p)) is not None)
    round_s += min(0.1 * next_point_s, ctx.interleave_repeat_s)
    return ctx.interleave_rounds * round_s * 1.2


@dataclass(frozen=True)
class _Placeholder:
    """A size known to be stored whose point was not handed over (status unknown: treated ok)."""

    size: int
    status: str = "ok"
    seconds_median: float | None = None
