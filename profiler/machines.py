"""Which machine measured a point, and how to put times from several machines on one scale.

Work counts are machine-independent and mix freely; times do not. The fitter never sees times
from different machines in one curve unless :func:`normalise_times` has put them on one scale
with each machine's calibration figure (:func:`profiler.environment.calibration_figure`).
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Any, Mapping, Sequence

from profiler.records import Point

__all__ = ["machine_of", "calibration_seconds", "normalise_times"]


def _environment_of(worker: str, workers: Mapping[str, Mapping[str, Any]]) -> Mapping[str, Any]:
    """The environment recorded for a point's worker id, else its Dask worker's, else {}."""
    if worker in workers:
        return workers[worker]
    _, at, address = worker.partition("@")
    if at and f"dask:{address}" in workers:
        return workers[f"dask:{address}"]
    return {}


def machine_of(point: Point, workers: Mapping[str, Mapping[str, Any]]) -> str:
    """A label for the machine a point was measured on: recorded host and CPU model.

    Falls back to the host part of the worker id (``HOST:PID[@ADDRESS]``); ``""`` when the point
    names no worker (measured by the local runner before worker ids existed).
    """
    env = _environment_of(point.worker, workers)
    host = env.get("host")
    if host:
        cpu = env.get("cpu_model") or (env.get("cpu") or {}).get("model") or ""
        return f"{host}|{cpu}"
    base = point.worker.partition("@")[0]
    return base.rpartition(":")[0] if ":" in base else base


def calibration_seconds(point: Point, workers: Mapping[str, Mapping[str, Any]]) -> float | None:
    """The calibration figure (seconds of the fixed kernel) of the machine a point ran on."""
    env = _environment_of(point.worker, workers)
    cal = env.get("calibration") or {}
    seconds = cal.get("seconds") if isinstance(cal, Mapping) else None
    if seconds is None:
        _, at, address = point.worker.partition("@")
        cal = (workers.get(f"dask:{address}") or {}).get("calibration") or {} if at else {}
        seconds = cal.get("seconds")
    try:
        seconds = float(seconds)
    except (TypeError, ValueError):
        return None
    return seconds if math.isfinite(seconds) and seconds > 0 else None


def normalise_times(points: Sequence[Point], workers: Mapping[str, Mapping[str, Any]], *,
                    reference_seconds: float | None = None) -> list[Point]:
    """Put the times of points measured on different machines on one machine's scale.

    Each point's ``seconds_median/min/max``, ``repeat_seconds`` and ``interleaved_seconds`` are
    multiplied by ``reference_seconds / c``, where ``c`` is the calibration figure of the machine
    that measured it (:func:`profiler.environment.calibration_figure`: a fixed matrix-product kernel). Points
    from one machine only are returned unchanged (no normalisation needed, none applied). Work,
    status and every other field are left alone: work counts are machine-independent.

    Parameters
    ----------
    points
        The points of one curve (or any set).
    workers
        ``StudyResult.workers``: worker id -> environment with ``calibration.seconds``.
    reference_seconds
        The scale to put times on (e.g. the client's ``environment["calibration"]["seconds"]``).
        Default: the median calibration figure of the machines involved.

    Returns
    -------
    list[Point]
        In input order. When machines differ, a point whose machine has no calibration figure
        gets its seconds set to None (its time is not comparable; its work still is) and a note
        in ``message``.

    Notes
    -----
    O(len(points)). The ratio of kernel times is a first-order model of machine speed (one
    number per machine); it is exact for compute-bound work resembling the kernel and an
    approximation for memory-bound or branchy engines — the work verdict does not depend on it.
    """
    timed = [p for p in points if p.seconds_median is not None]
    if len({machine_of(p, workers) for p in timed}) <= 1:
        return list(points)
    figures = {machine_of(p, workers): calibration_seconds(p, workers) for p in timed}
    known = sorted(f for f in figures.values() if f is not None)
    if reference_seconds is None:
        if not known:
            reference_seconds = None
        else:
            mid = len(known) // 2
            reference_seconds = known[mid] if len(known) % 2 else 0.5 * (known[mid - 1] + known[mid])
    out = []
    for p in points:
        if p.seconds_median is None:
            out.append(p)
            continue
        c = calibration_seconds(p, workers)
        if c is None or reference_seconds is None:
            note = "time not comparable across machines: its worker has no calibration figure"
            out.append(replace(p, seconds_median=None, seconds_min=None, seconds_max=None,
                               repeat_seconds=(), interleaved_seconds=(),
                               message="; ".join(m for m in (p.message, note) if m)))
            continue
        k = float(reference_seconds) / c

        def scaled(v: float | None) -> float | None:
            return None if v is None else float(v) * k

        out.append(replace(p, seconds_median=scaled(p.seconds_median),
                           seconds_min=scaled(p.seconds_min), seconds_max=scaled(p.seconds_max),
                           repeat_seconds=tuple(float(r) * k for r in p.repeat_seconds),
                           interleaved_seconds=tuple(float(r) * k
                                                     for r in p.interleaved_seconds)))
    return out
