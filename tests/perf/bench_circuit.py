"""Benchmark of the circuit engine (issue 9): one batched bottom-up pass against a memory floor.

Rows (``run() -> list[dict]``, the ``make bench`` table), one per (vtree topology, K, batch,
circuit size):

* ``ours``: edges x batch per second of :func:`model_zoo.circuit.core.forward` (sum mode, the
  engine the family uses: region ops, chains contracted by a tree of batched matrix products).
* ``peer_or_floor``: edges x batch per second of a memory-bound numpy floor on the same number of
  elements — gather ``n_edges`` random rows of an ``(n_nodes, batch)`` table and sum them (in
  chunks, so the floor never allocates more than ~32 MB at once). Any edge-by-edge evaluation
  has to move at least this much data.
* ``ratio`` = ours / floor; goal >= 0.25.

Timing: median of repeats of ``time.perf_counter_ns``, ours and the floor interleaved; BLAS
threads set to 1 (threadpoolctl). Every timed answer is first checked against the layered engine
(``engine="layers"``), which the unit tests check against brute-force enumeration.

Not collected by pytest; asserts nothing. Run alone: ``python -m tests.perf.bench_circuit``.
"""

from __future__ import annotations

import statistics
import sys
import time
from typing import Callable

import numpy as np

GOAL_RATIO = 0.25
_FLOOR_CHUNK = 1 << 22

#: (topology, K, approximate edges); right-linear K = 1 stops at 10^4 and K = 2 at 10^5 edges: building
#: a 60,000-variable right-linear circuit (plan construction, not the pass) takes minutes.
CASES = [
    ("balanced", 1, 10**4), ("balanced", 1, 10**5), ("balanced", 1, 10**6),
    ("balanced", 2, 10**4), ("balanced", 2, 10**5), ("balanced", 2, 10**6),
    ("balanced", 4, 10**4), ("balanced", 4, 10**5), ("balanced", 4, 10**6),
    ("balanced", 8, 10**4), ("balanced", 8, 10**6),
    ("right_linear", 1, 10**4),
    ("right_linear", 2, 10**4), ("right_linear", 2, 10**5),
    ("right_linear", 4, 10**4), ("right_linear", 4, 10**5), ("right_linear", 4, 10**6),
    ("right_linear", 8, 10**4), ("right_linear", 8, 10**6),
]
BATCHES = (1, 64, 512)
#: Skip (edges x batch) above this: the floor's table and the timing would take too long.
MAX_ELEMENTS = 1.5e8


def _median_seconds(fns: list[Callable[[], object]], *, min_seconds: float = 0.2,
                    min_repeats: int = 5, max_repeats: int = 15) -> list[float]:
    """Median seconds of each function, repeats interleaved so drifts hit all alike."""
    for fn in fns:
        fn()  # warm-up: first touches of the arrays, plan caches
    times: list[list[float]] = [[] for _ in fns]
    start = time.perf_counter_ns()
    while True:
        for t, fn in zip(times, fns):
            t0 = time.perf_counter_ns()
            fn()
            t.append((time.perf_counter_ns() - t0) * 1e-9)
        n = len(times[0])
        spent = (time.perf_counter_ns() - start) * 1e-9
        if n >= max_repeats or (n >= min_repeats and spent >= min_seconds):
            break
    return [statistics.median(t) for t in times]


def _floor_fn(n_nodes: int, n_edges: int, batch: int, seed: int) -> Callable[[], np.ndarray]:
    rng = np.random.default_rng(seed)
    table = rng.random((n_nodes, batch))
    idx = rng.integers(0, n_nodes, size=n_edges)
    step = max(1, _FLOOR_CHUNK // batch)
    buf = np.empty((min(step, n_edges), batch))

    def floor() -> np.ndarray:
        acc = np.zeros(batch)
        for lo in range(0, n_edges, step):
            part = idx[lo:lo + step]
            out = buf[:part.shape[0]]
            np.take(table, part, axis=0, out=out)
            acc += out.sum(axis=0)
        return acc

    return floor


def pass_throughput(n_variables: int, k: int, batch: int, *, topology: str = "balanced",
                    seed: int = 0, circuit=None) -> dict[str, float]:
    """Edges x batch per second of one sum pass and of the floor on the same element count.

    Returns ``n_edges``, ``batch``, ``ours_per_second``, ``floor_per_second``, ``ratio``
    (ours / floor) and ``max_abs_diff`` against the layered engine.
    """
    from model_zoo.base import make_rng
    from model_zoo.circuit.core import forward
    from model_zoo.circuit.vtree import vtree_circuit

    c = circuit if circuit is not None else vtree_circuit(n_variables, k, topology=topology,
                                                         seed=seed)
    rng = make_rng(seed, "bench")
    states = rng.integers(0, 2, size=(c.n_variables, batch))
    states[rng.random((c.n_variables, batch)) < 0.3] = -1          # some marginalised
    diff = float(np.max(np.abs(forward(c, states) - forward(c, states, engine="layers"))))
    floor = _floor_fn(c.n_nodes, c.n_edges, batch, seed)
    ours_s, floor_s = _median_seconds([lambda: forward(c, states), floor])
    elements = float(c.n_edges) * batch
    return {"n_edges": float(c.n_edges), "batch": float(batch),
            "ours_per_second": elements / ours_s, "floor_per_second": elements / floor_s,
            "ratio": floor_s / ours_s, "max_abs_diff": diff}


def run(cases=CASES, batches=BATCHES) -> list[dict]:
    from threadpoolctl import threadpool_limits

    from model_zoo.circuit.vtree import vtree_circuit

    rows = []
    with threadpool_limits(1):
        for topology, k, edges in cases:
            per_node = k ** 3 + 2 * k ** 2
            n = max(2, int(round((edges - k) / per_node)) + 1)
            t0 = time.perf_counter()
            c = vtree_circuit(n, k, topology=topology, seed=0)
            build_s = time.perf_counter() - t0
            for batch in batches:
                if c.n_edges * batch > MAX_ELEMENTS:
                    continue
                r = pass_throughput(n, k, batch, topology=topology, circuit=c)
                ok = r["max_abs_diff"] <= 1e-9 * max(1.0, n)
                rows.append({
                    "engine": "circuit",
                    "workload": (f"{topology} K={k} n={n} edges={c.n_edges} batch={batch} "
                                 f"(build {build_s:.1f}s)"),
                    "ours": r["ours_per_second"], "peer_or_floor": r["floor_per_second"],
                    "ratio": r["ratio"],
                    "goal": ("ours/floor >= 0.25 (edges x batch / s)" if ok else
                             f"WRONG: differs from layered engine by {r['max_abs_diff']:.2g}"),
                    "met": bool(ok and r["ratio"] >= GOAL_RATIO)})
                print(f"  {rows[-1]['workload']}: ratio {r['ratio']:.3g}", file=sys.stderr,
                      flush=True)
    return rows


if __name__ == "__main__":
    for row in run():
        print(row)
