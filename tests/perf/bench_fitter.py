"""Benchmark of the growth fitter (not collected by pytest: run `python -m tests.perf.bench_fitter`).

Workloads: 100 curves of 12 points with intervals; the same with raw repeats per size and 200
bootstrap replicates. Goal (issue 5 / issue 9): each under 10 s. ``run()`` returns rows for the
`make bench` collector: {engine, workload, ours, peer_or_floor, ratio, goal, met}; there is no peer
program, so ``peer_or_floor`` is the goal and ``ratio`` is ours / goal.
"""

from __future__ import annotations

import time

import numpy as np

from model_zoo.base import make_rng
from profiler.fitter import fit_growth

GOAL_SECONDS = 10.0


def _curves(n_curves: int = 100, n_points: int = 12, n_repeats: int = 0, seed: int = 1):
    out = []
    for i in range(n_curves):
        rng = make_rng(seed, i)
        n = np.unique(np.round(np.geomspace(4, 64, n_points)))
        mu = 2.0 * np.log(n) if i % 2 == 0 else 0.3 * n
        reps = None
        if n_repeats:
            reps = [np.exp(m + rng.normal(0, 0.1, n_repeats)) for m in mu]
            y = np.array([np.median(r) for r in reps])
        else:
            y = np.exp(mu + rng.normal(0, 0.1, n.size))
        out.append((n, y, reps))
    return out


def _time(curves, **kw) -> tuple[float, float]:
    """(wall seconds, process CPU seconds): on a shared machine the CPU figure is the fair one."""
    t, c = time.perf_counter(), time.process_time()
    for n, y, reps in curves:
        fit_growth(n, y, repeats=reps, **kw)
    return time.perf_counter() - t, time.process_time() - c


def run() -> list[dict]:
    rows = []
    for workload, curves, kw in (
        ("100 curves x 12 points, intervals", _curves(), {}),
        ("100 curves x 12 points, 200 bootstrap replicates", _curves(n_repeats=7),
         {"n_boot": 200}),
    ):
        ours, cpu = _time(curves, **kw)
        rows.append({"engine": "fitter", "workload": workload, "ours": round(ours, 3),
                     "cpu_seconds": round(cpu, 3),
                     "peer_or_floor": GOAL_SECONDS, "ratio": round(ours / GOAL_SECONDS, 3),
                     "goal": f"< {GOAL_SECONDS:g} s", "met": ours < GOAL_SECONDS})
    return rows


if __name__ == "__main__":
    for row in run():
        print(f"{row['workload']}: {row['ours']:.2f} s wall, {row['cpu_seconds']:.2f} s CPU "
              f"(goal {row['goal']}) "
              f"{'met' if row['met'] else 'NOT met'}")
