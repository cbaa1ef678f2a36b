"""Benchmark of the neural_scm exact engine (issue 9): mechanism evaluation vs ``np.matmul``.

Rows (``run() -> list[dict]``, the ``make bench`` table), one per (topology, graph size, hidden
width, level): the exact engine enumerates the exogenous worlds a query needs and pushes them
through the MLP mechanisms as dense matrix products.
:func:`model_zoo.neural_scm.enumeration_shapes` lists those products — ``n_chunks`` times a list
of ``(rows, k, n)`` shapes — and the floor multiplies random float64 matrices of exactly those
shapes with ``np.matmul`` (operands allocated beforehand, so the floor is pure BLAS).

* ``ours``: FLOP/s of ``NeuralSCMFamily.answer(method="exact")`` counting ``2 rows k n`` per
  product (the same count for both sides, so the ratio is a time ratio).
* ``peer_or_floor``: FLOP/s of the bare ``np.matmul`` calls.
* ``ratio`` = ours / floor; goal >= 0.5.

Timing: median of repeats of ``time.perf_counter_ns``, interleaved; BLAS threads set to 1.
The exact answers are checked against the family's reference (pgmpy) where it exists.

Not collected by pytest; asserts nothing. Run alone: ``python -m tests.perf.bench_neural_scm``.
"""

from __future__ import annotations

import statistics
import time

import numpy as np

GOAL = 0.5
#: (topology, n variables, hidden width, level)
CASES = [
    ("chain", 8, 16, "associational"), ("chain", 8, 64, "associational"),
    ("chain", 8, 256, "associational"), ("chain", 10, 64, "counterfactual"),
    ("random", 10, 64, "interventional"), ("tree", 12, 32, "associational"),
]


def _median_pair(f, g, repeats: int = 5) -> tuple[float, float]:
    f(), g()
    tf, tg = [], []
    for _ in range(repeats):
        t0 = time.perf_counter_ns()
        f()
        tf.append((time.perf_counter_ns() - t0) * 1e-9)
        t0 = time.perf_counter_ns()
        g()
        tg.append((time.perf_counter_ns() - t0) * 1e-9)
    return statistics.median(tf), statistics.median(tg)


def run(cases=CASES) -> list[dict]:
    from threadpoolctl import threadpool_limits

    import model_zoo
    from model_zoo.base import Level, Size
    from model_zoo.neural_scm import enumeration_shapes

    fam = model_zoo.get("neural_scm")()
    rows = []
    with threadpool_limits(1):
        for topology, n, width, level in cases:
            inst = fam.build(Size(graph=n, mechanism=width), topology=topology, seed=0)
            qs = fam.queries(inst, Level(level), n=3, seed=0)
            # the query with the most worlds among a few (the heaviest enumeration)
            q = max(qs, key=lambda q: fam.predicted_work(inst, q, method="exact"))
            n_chunks, shapes = enumeration_shapes(inst, q)
            rng = np.random.default_rng(0)
            operands = [(rng.random((r, k)), rng.random((k, m))) for r, k, m in shapes]
            outs = [np.empty((r, m)) for r, _, m in shapes]

            def floor():
                for _ in range(n_chunks):
                    for (a, b), o in zip(operands, outs):
                        np.matmul(a, b, out=o)

            flops = 2.0 * n_chunks * sum(r * k * m for r, k, m in shapes)
            t_ours, t_floor = _median_pair(lambda: fam.answer(inst, q, method="exact"), floor)
            ref = fam.reference(inst, q)
            value = fam.answer(inst, q, method="exact").value
            ok = ref is None or abs(value - ref) <= 1e-9
            ratio = t_floor / t_ours
            worlds = int(round(flops / max(1.0, 2.0 * sum(k * m for _, k, m in shapes))))
            rows.append({
                "engine": "neural_scm",
                "workload": (f"{topology} n={n} width={width} {level}: {worlds} worlds, "
                             f"{len(shapes)} products x {n_chunks} chunks"
                             + ("" if ref is not None else " (no reference at this size)")),
                "ours": flops / t_ours, "peer_or_floor": flops / t_floor, "ratio": ratio,
                "goal": ("ours/matmul >= 0.5 (FLOP/s)" if ok else
                         f"WRONG: |exact - reference| = {abs(value - ref):.2g}"),
                "met": bool(ok and ratio >= GOAL)})
    return rows


if __name__ == "__main__":
    for row in run():
        print(row)
