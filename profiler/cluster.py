"""Scale-out: run a study's curves as tasks on a Dask cluster; the client alone writes the store.

``infercost run STUDY.toml --dask tcp://HOST:8786`` connects to an existing ``distributed``
scheduler; ``--dask local:N`` starts a :class:`distributed.LocalCluster` of ``N`` single-threaded
worker processes on the loopback interface (scheduler, nannies, workers and their HTTP status
servers all bind 127.0.0.1 on free ports), so nothing listens on another address unless the user points at a cluster of
their own.

How a curve runs
----------------
Each curve is one Dask task, :func:`_curve_task`. Inside the Dask worker the task calls the
harness's :func:`profiler.harness.run_curve` unchanged, so the curve still measures in its own
isolated process with the same time, memory and thread caps as on one machine. Every point the
harness produces is put on a ``distributed.Queue`` held by the scheduler the moment it is
measured; the client drains that queue and writes each point to the store in its own
transaction (:func:`run_curves_dask`). The store therefore has one writer, on the client's
machine, and ``--resume`` works across runs and across clusters.

Workers
-------
Every task first records its Dask worker's environment (:func:`profiler.environment.capture_environment`,
calibration figure included; measured once per worker process) under the id ``dask:ADDRESS``;
the harness's own measuring process records its environment (with its own calibration figure)
as usual. Point ids are made unique across machines: ``HOST:PID@ADDRESS``. Times from different
machines are put on one scale by :func:`normalise_times` before a time fit; work counts are
machine-independent and mix freely.

Worker loss
-----------
A curve whose Dask worker dies is resubmitted (at most ``max_retries`` times) with the sizes the
client has stored by then, so a finished point is never measured again. On the local cluster
the scheduler is told not to retry on its own (``allowed-failures = 0``): a silent retry would
re-run the task with its original, stale list of finished sizes. On an existing cluster, where
that setting belongs to its owner, each task also reads the current list of stored sizes from a
``distributed.Variable`` when it starts, and the client drops any point it already holds (so a
point is never stored twice, whatever the scheduler does).

Cost notes: one scheduler round trip per point (queue put) and per stored point (variable
update), O(1) each and small next to any point's measurement; the client polls every
``poll_s`` seconds (default 0.1 s).
"""

from __future__ import annotations

import math
import os
import threading
import time
import uuid
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from typing import Any, Callable, Iterator, Mapping, Sequence

from profiler.errors import InputError, WorkerError
from profiler.machines import calibration_seconds, machine_of, normalise_times  # noqa: F401 (re-exported)
from profiler.records import Point, StudySpec

__all__ = ["parse_address", "open_client", "run_curves_dask", "store_curves_dask", "DaskRunSummary",
           "normalise_times", "machine_of", "calibration_seconds", "DEFAULT_MAX_RETRIES"]

#: Resubmissions of one curve after its worker died, before the curve is given up for this run.
DEFAULT_MAX_RETRIES = 2
#: Upper bound on ``local:N`` (more single-threaded workers than this is a typo, not a plan).
_MAX_LOCAL_WORKERS = 256


# ============================================================================ addresses, clients
def parse_address(address: str) -> tuple[str, Any]:
    """Read a ``--dask`` value: ``("local", n_workers)`` or ``("remote", "tcp://HOST:PORT")``.

    Raises
    ------
    InputError
        Anything else (one line naming ``--dask``, what was expected and what arrived).

    Examples
    --------
    >>> parse_address("local:2")
    ('local', 2)
    >>> parse_address("tcp://10.0.0.5:8786")
    ('remote', 'tcp://10.0.0.5:8786')
    """
    text = str(address).strip()
    expected = "'local:N' (N workers on 127.0.0.1) or a scheduler address 'tcp://HOST:PORT'"
    if text.startswith("local:"):
        n = text[len("local:"):]
        if not n.isdigit() or not 1 <= int(n) <= _MAX_LOCAL_WORKERS:
            raise InputError.at("command line", "--dask",
                                f"'local:N' with N an integer from 1 to {_MAX_LOCAL_WORKERS}", text)
        return "local", int(n)
    for scheme in ("tcp://", "tls://"):
        if text.startswith(scheme):
            host, sep, port = text[len(scheme):].rpartition(":")
            if sep and host and port.isdigit() and 0 < int(port) < 65536:
                return "remote", text
    raise InputError.at("command line", "--dask", expected, text)


@contextmanager
def open_client(address: str, *, timeout_s: float = 30.0) -> Iterator[Any]:
    """A ``distributed.Client`` for a ``--dask`` value, closed (with its local cluster) on exit.

    ``local:N`` starts ``LocalCluster(n_workers=N, threads_per_worker=1, processes=True)`` bound
    to 127.0.0.1 (its small HTTP status servers too, on free ports) and no worker memory limit (the harness enforces the caps;
    a nanny restarting a worker for its children's memory would only lose a curve). The
    scheduler is told not to retry a task whose worker died (see the module docstring).

    Raises
    ------
    InputError
        Bad address, or the scheduler cannot be reached within ``timeout_s``.
    """
    import logging

    import dask
    from distributed import Client, LocalCluster

    kind, where = parse_address(address)
    cluster = None
    try:
        if kind == "local":
            with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
                cluster = LocalCluster(n_workers=int(where), threads_per_worker=1,
                                       processes=True, host="127.0.0.1", scheduler_port=0,
                                       dashboard_address="127.0.0.1:0",
                                       worker_dashboard_address="127.0.0.1:0", memory_limit=0,
                                       silence_logs=logging.ERROR)
                client = Client(cluster, timeout=timeout_s)
        else:
            client = Client(where, timeout=timeout_s)
    except InputError:
        raise
    except (OSError, TimeoutError, ValueError) as exc:
        if cluster is not None:
            cluster.close()
        raise InputError(f"command line: --dask: cannot reach the Dask scheduler at {where!r} "
                         f"({type(exc).__name__}: {' '.join(str(exc).split())})") from exc
    try:
        yield client
    finally:
        try:
            client.close()
        finally:
            if cluster is not None:
                cluster.close()


# ============================================================================ the task (in a worker)
_WORKER_ENV: dict[str, Any] = {}
_WORKER_ENV_LOCK = threading.Lock()


def _dask_worker_environment(address: str, name: Any) -> dict[str, Any]:
    """This Dask worker process's environment and calibration figure (measured once per process)."""
    with _WORKER_ENV_LOCK:
        if address not in _WORKER_ENV:
            from profiler.environment import capture_environment

            env = capture_environment()
            env.update(dask_worker=address, dask_name=str(name), pid=os.getpid())
            _WORKER_ENV[address] = env
        return dict(_WORKER_ENV[address])


_HELD_LAUNCHER: list[Any] = []


def _hold_launcher() -> None:
    """Keep the harness's preloaded worker launcher alive for this Dask worker's life, so the
    curves it runs fork their measuring processes instead of starting interpreters
    (:func:`profiler.zygote.launcher_scope`; without it the harness spawns, as it always can)."""
    with _WORKER_ENV_LOCK:
        if _HELD_LAUNCHER:
            return
        try:
            from profiler.zygote import launcher_scope

            scope = launcher_scope()
            scope.__enter__()
            _HELD_LAUNCHER.append(scope)
        except Exception:  # an optional speed-up: the harness falls back to spawning
            _HELD_LAUNCHER.append(None)


def _local_context(ctx_dict: dict[str, Any]) -> Any:
    """The study context as this machine must use it: its own interpreter, the client's paths
    that exist here first (a user's ``package.module:Class`` imports as on the client)."""
    import sys

    from profiler.harness import StudyContext

    d = dict(ctx_dict)
    d["python"] = sys.executable
    client_paths = [p for p in d.get("sys_path") or () if p and os.path.isdir(p)]
    d["sys_path"] = tuple(dict.fromkeys(client_paths + [p for p in sys.path if p]))
    known = set(StudyContext.__dataclass_fields__)
    return StudyContext(**{k: v for k, v in d.items() if k in known})


def _curve_task(job: dict[str, Any]) -> dict[str, Any]:
    """Run one curve inside a Dask worker; stream its points to the client's queue.

    ``job`` is plain data: ``ctx`` (StudyContext as a dict), ``index``, ``spec`` (CurveSpec as a
    dict), ``history`` (stored points as dicts), ``channel`` (queue name), ``done_var``
    (variable with the stored sizes), ``stop_event``, ``share_s``, ``wall_deadline``,
    ``attempt``. Returns the curve's outcome as plain data (points are also streamed).
    """
    from distributed import Event, Queue, Variable, get_worker

    from profiler.harness import run_curve
    from profiler.records import CurveSpec

    worker = get_worker()
    address = str(worker.address)
    index, attempt = int(job["index"]), int(job["attempt"])
    queue = Queue(job["channel"])

    def put(kind: str, **payload: Any) -> None:
        queue.put({"kind": kind, "curve": index, "attempt": attempt, **payload})

    put("worker", worker=f"dask:{address}",
        environment=_dask_worker_environment(address, getattr(worker, "name", address)))
    done = {int(s) for s in job.get("sizes_done") or ()}
    try:  # sizes stored since submission (a scheduler's own retry carries a stale list)
        done |= {int(s) for s in Variable(job["done_var"]).get(timeout=5) or ()}
    except Exception:
        pass
    history = [Point.from_dict(d) for d in job.get("history") or ()]
    spec = CurveSpec.from_dict(job["spec"])
    ctx = _local_context(job["ctx"])
    _hold_launcher()

    stop = threading.Event()
    finished = threading.Event()
    stop_event = Event(job["stop_event"])

    def watch() -> None:
        while not finished.is_set():
            try:
                if stop_event.wait(timeout=0.5):
                    stop.set()
                    return
            except Exception:  # the client went away: finish the point in flight, then stop
                stop.set()
                return

    try:
        if stop_event.is_set():  # the study's time ran out while this task waited
            stop.set()
    except Exception:
        stop.set()
    threading.Thread(target=watch, name="infercost-stop-watch", daemon=True).start()
    t0 = time.monotonic()
    share_s, wall_deadline = float(job["share_s"]), float(job["wall_deadline"])

    def budget() -> float:
        return max(0.0, min(share_s - (time.monotonic() - t0), wall_deadline - time.time()))

    def rename(p: Point) -> Point:
        return replace(p, worker=_point_worker_id(p.worker, address))

    put("event", event={"event": "curve_start", "curve": index, "key": spec.key(), "size": None,
                        "status": None, "seconds": None, "cap": ctx.point_timeout_s,
                        "n_points": len(history), "dask_worker": address, "attempt": attempt})
    try:
        outcome = run_curve(ctx, index, spec, done,
                            on_point=lambda p: put("point", point=rename(p).to_dict()),
                            on_event=lambda e: put("event", event={**e, "dask_worker": address}),
                            history=history, budget=budget, stop=stop,
                            on_revised=lambda p: put("revised", point=p.to_dict()))
    finally:
        finished.set()
    reason, cut = outcome.reason, outcome.cut_by_budget
    if reason == "stopped" and stop.is_set():
        reason, cut = "budget", True  # the client stops tasks only when the study's time is up
    workers = {_point_worker_id(w, address): {**env, "dask_worker": address}
               for w, env in outcome.workers.items()}
    return {"index": outcome.index, "key": outcome.key, "reason": reason, "cut_by_budget": cut,
            "theory": outcome.theory, "work_unit": outcome.work_unit,
            "mechanism_knob": outcome.mechanism_knob, "workers": workers,
            "points": [rename(p).to_dict() for p in outcome.points],
            "point_seconds": {int(k): list(v) for k, v in outcome.point_seconds.items()},
            "seconds": outcome.seconds, "dask_worker": address, "attempt": attempt}


def _point_worker_id(harness_id: str, address: str) -> str:
    """``HOST:PID@ADDRESS``: unique across machines even when hosts share a name."""
    return f"{harness_id}@{address}" if harness_id else f"dask:{address}"


# ============================================================================ the client
@dataclass(frozen=True)
class DaskRunSummary:
    """What a Dask run did: new points stored, retries, curves given up, duplicates dropped.

    ``lost_curves`` are curves whose worker died more than ``max_retries`` times (their stored
    points stay; ``--resume`` continues them). ``dask_workers`` are the addresses that ran tasks.
    """

    n_new_points: int
    n_retries: int
    lost_curves: tuple[int, ...]
    n_duplicates_dropped: int
    dask_workers: tuple[str, ...]
    seconds: float
    retried: dict[int, int] = field(default_factory=dict)


def _is_worker_loss(exc: BaseException | None) -> bool:
    from distributed import KilledWorker

    try:
        from distributed.comm.core import CommClosedError
    except ImportError:  # pragma: no cover - layout of older releases
        CommClosedError = OSError  # type: ignore[assignment,misc]
    return isinstance(exc, (KilledWorker, CommClosedError))


def _outcome_from(d: dict[str, Any]) -> Any:
    from profiler.harness import CurveOutcome

    return CurveOutcome(index=int(d["index"]), key=str(d["key"]),
                        points=tuple(Point.from_dict(p) for p in d.get("points") or ()),
                        reason=str(d.get("reason") or ""),
                        cut_by_budget=bool(d.get("cut_by_budget")), theory=d.get("theory"),
                        work_unit=str(d.get("work_unit") or ""),
                        mechanism_knob=str(d.get("mechanism_knob") or ""),
                        workers=dict(d.get("workers") or {}),
                        point_seconds={int(k): tuple(v) for k, v in
                                       (d.get("point_seconds") or {}).items()},
                        seconds=float(d.get("seconds") or 0.0))


def run_curves_dask(address: str | None, ctx: Any, spec: StudySpec,
                    stored: Mapping[int, Sequence[Point]], *,
                    on_point: Callable[[Point], None],
                    on_outcome: Callable[[Any], None],
                    on_worker: Callable[[str, dict], None] | None = None,
                    on_event: Callable[[dict], None] | None = None,
                    on_revised: Callable[[Point], None] | None = None,
                    client: Any = None, max_retries: int = DEFAULT_MAX_RETRIES,
                    curves: Sequence[int] | None = None, poll_s: float = 0.1,
                    on_poll: Callable[[Any], None] | None = None) -> DaskRunSummary:
    """Run the curves of ``spec`` as Dask tasks; hand each point to ``on_point`` in this thread.

    Parameters
    ----------
    address
        A ``--dask`` value (:func:`parse_address`); ignored when ``client`` is given.
    ctx
        The study's :class:`~profiler.harness.StudyContext` (caps, seed, timing settings).
    spec
        The study.
    stored
        Points already stored, by curve index (resume: never measured again).
    on_point
        Called once per new point, in the calling thread, in arrival order — the caller stores
        it (one transaction per point). A point whose (curve, size) was already handed over or
        stored is dropped, never passed twice.
    on_outcome
        Called once per curve with its :class:`~profiler.harness.CurveOutcome` (points renamed
        to cluster-wide worker ids) after all its points went to ``on_point``; a curve given up
        after ``max_retries`` worker losses gets an outcome with reason ``"worker lost"``.
    on_worker
        Called with ``(worker id, environment)`` for every Dask worker that ran a task.
    on_revised
        Called with each point the curve's interleaved sweep re-issued (the caller stores its
        ``interleaved_seconds``); only points already handed to ``on_point`` are passed.
    on_event
        Progress events (the runner's kinds: ``curve_start``, ``point_start``, ``point``,
        ``curve_done``), in this thread.
    client
        An existing ``distributed.Client`` to use (tests); otherwise :func:`open_client`.
    max_retries
        Resubmissions of one curve after its worker died.
    curves
        Which curve indices to run (default all).
    poll_s
        How often the client drains the point queue.
    on_poll
        Test hook called with ``client`` on every poll (e.g. to kill a worker at a chosen moment).

    Returns
    -------
    DaskRunSummary

    Raises
    ------
    InputError
        Bad address or unreachable scheduler.
    WorkerError
        The scheduler went away in the middle of the study (stored points stay; resume).
    """
    if client is None:
        with open_client(str(address)) as own:
            return run_curves_dask(address, ctx, spec, stored, on_point=on_point,
                                   on_outcome=on_outcome, on_worker=on_worker,
                                   on_event=on_event, on_revised=on_revised, client=own,
                                   max_retries=max_retries,
                                   curves=curves, poll_s=poll_s, on_poll=on_poll)
    from distributed import Event, Queue, Variable

    t0 = time.monotonic()
    indices = list(range(len(spec.curves))) if curves is None else [int(i) for i in curves]
    token = uuid.uuid4().hex[:12]
    channel = f"infercost-{token}-points"
    queue = Queue(channel, client=client)
    stop_event = Event(f"infercost-{token}-stop", client=client)
    held: dict[int, dict[int, Point]] = {i: {int(p.size): p for p in stored.get(i, ())}
                                         for i in indices}
    done_vars = {i: Variable(f"infercost-{token}-done-{i}", client=client) for i in indices}
    for i in indices:
        done_vars[i].set(sorted(held[i]))
    n_threads = sum(int(w.get("nthreads", 1) or 1)
                    for w in client.scheduler_info().get("workers", {}).values()) or 1
    n_slots = max(1, min(n_threads, len(indices) or 1))
    share_s = float(spec.budget_s) * n_slots / max(1, len(indices))
    wall_deadline = time.time() + float(spec.budget_s)
    attempts = {i: 0 for i in indices}
    retried: dict[int, int] = {}
    lost: list[int] = []
    dask_workers: set[str] = set()
    announced: set[str] = set()
    counts = {"new": 0, "dup": 0}

    def emit(event: dict) -> None:
        if on_event is not None:
            on_event(event)

    def submit(i: int) -> Any:
        attempts[i] += 1
        job = {"ctx": ctx.to_dict(), "index": i, "spec": spec.curves[i].to_dict(),
               "sizes_done": sorted(held[i]),
               "history": [p.to_dict() for _, p in sorted(held[i].items())],
               "channel": channel, "done_var": done_vars[i].name,
               "stop_event": stop_event.name, "share_s": share_s,
               "wall_deadline": wall_deadline, "attempt": attempts[i]}
        return client.submit(_curve_task, job, key=f"infercost-curve-{token}-{i}-{attempts[i]}",
                             pure=False, retries=0)

    def take(point: Point, *, streamed: bool = True) -> None:
        i, size = int(point.curve), int(point.size)
        if i not in held or size in held[i]:
            counts["dup"] += streamed  # a re-measured point (a scheduler's own retry)
            return
        on_point(point)  # stored first: only then is the size "done" for a retry
        held[i][size] = point
        counts["new"] += 1
        done_vars[i].set(sorted(held[i]))

    def revise(point: Point) -> None:
        i, size = int(point.curve), int(point.size)
        if on_revised is None or i not in held or size not in held[i]:
            return  # only a stored point can be revised
        # Keep the stored point's cluster-wide worker id (a retried task's history carries it).
        point = replace(point, worker=held[i][size].worker)
        on_revised(point)
        held[i][size] = point

    def handle(msg: dict) -> None:
        kind = msg.get("kind")
        if kind == "point":
            take(Point.from_dict(msg["point"]))
        elif kind == "revised":
            revise(Point.from_dict(msg["point"]))
        elif kind == "event":
            emit(dict(msg["event"]))
        elif kind == "worker":
            wid = str(msg["worker"])
            dask_workers.add(wid[len("dask:"):])
            if wid not in announced:
                announced.add(wid)
                if on_worker is not None:
                    on_worker(wid, dict(msg.get("environment") or {}))

    def drain() -> int:
        items = queue.get(batch=True) or []
        for msg in items:
            handle(msg)
        return len(items)

    def finish(i: int, outcome: Any) -> None:
        for p in outcome.points:  # belt and braces: a point the queue did not deliver
            take(p, streamed=False)
        on_outcome(outcome)
        emit({"event": "curve_done", "curve": i, "key": outcome.key, "size": None,
              "status": outcome.reason, "reason": outcome.reason,
              "cut_by_budget": outcome.cut_by_budget, "seconds": outcome.seconds,
              "cap": ctx.point_timeout_s, "n_points": len(held[i])})

    pending = {i: submit(i) for i in indices}
    budget_over = False
    try:
        while pending:
            if on_poll is not None:
                on_poll(client)
            got = drain()
            if not budget_over and time.time() > wall_deadline:
                budget_over = True
                stop_event.set()  # each task ends after its point in flight
            for i, fut in list(pending.items()):
                status = fut.status
                if status == "pending":
                    continue
                drain()  # a finished task's puts all precede its result
                exc = None
                if status == "finished":
                    try:
                        data = fut.result(timeout=60)
                    except Exception as err:  # its result was on a worker that died since
                        exc, status = err, "lost"
                    else:
                        del pending[i]
                        finish(i, _outcome_from(data))
                        continue
                elif status == "error":
                    exc = fut.exception()
                if status in ("cancelled", "lost") or _is_worker_loss(exc):
                    if attempts[i] <= max_retries:
                        retried[i] = retried.get(i, 0) + 1
                        pending[i] = submit(i)
                        emit({"event": "curve_retry", "curve": i, "key": spec.curves[i].key(),
                              "size": None, "status": "worker lost", "seconds": None,
                              "cap": ctx.point_timeout_s, "n_points": len(held[i]),
                              "attempt": attempts[i]})
                    else:
                        del pending[i]
                        lost.append(i)
                        finish(i, _outcome_from({"index": i, "key": spec.curves[i].key(),
                                                 "reason": "worker lost"}))
                    continue
                raise exc if exc is not None else WorkerError(f"curve {i}: task {status}")
            if not got:
                time.sleep(poll_s)
    except (OSError, TimeoutError) as exc:
        raise WorkerError(f"--dask: lost the Dask scheduler during the study "
                          f"({type(exc).__name__}: {exc}); stored points are kept, "
                          "use --resume") from exc
    finally:
        try:
            stop_event.set()
            for fut in pending.values():
                fut.cancel()
        except Exception:
            pass
    return DaskRunSummary(n_new_points=counts["new"], n_retries=sum(retried.values()),
                          lost_curves=tuple(lost), n_duplicates_dropped=counts["dup"],
                          dask_workers=tuple(sorted(dask_workers)),
                          seconds=time.monotonic() - t0, retried=retried)


def store_curves_dask(address: str | None, ctx: Any, spec: StudySpec,
                      stored: Mapping[int, Sequence[Point]], *, store: Any, study_id: str,
                      emit: Callable[[dict], None] | None = None, client: Any = None,
                      **options: Any) -> DaskRunSummary:
    """The runner's Dask path: :func:`run_curves_dask` writing into an open results store.

    Each point is stored (one transaction) the moment it reaches the client, each curve's end
    and each worker's environment as the runner's local path records them
    (:func:`profiler.runner._store_outcome`, :meth:`profiler.store.Store.add_worker`). ``emit``
    receives the progress events. ``options`` go to :func:`run_curves_dask`.
    """
    from profiler.runner import _store_outcome

    return run_curves_dask(address, ctx, spec, stored, on_point=store.add_point,
                           on_outcome=lambda o: _store_outcome(store, study_id, spec, o),
                           on_worker=lambda w, env: store.add_worker(study_id, w, env),
                           on_event=emit, on_revised=store.add_sweep, client=client,
                           **options)


# ============================================================================ times across machines
