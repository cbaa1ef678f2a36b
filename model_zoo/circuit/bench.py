"""Throughput of one batched bottom-up pass against a memory-bound numpy floor, side by side.

For the benchmark suite (``make bench``): it reports ratios only, never asserts times.
"""

from __future__ import annotations

import time
from typing import Callable

import numpy as np

from model_zoo.base import make_rng
from model_zoo.circuit.core import forward
from model_zoo.circuit.vtree import vtree_circuit

__all__ = ["pass_throughput"]


def _best_seconds(fn: Callable[[], object], repeats: int) -> float:
    fn()  # warm-up: first touches of the arrays
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def pass_throughput(n_variables: int, k: int, batch: int, *, topology: str = "balanced",
                    mode: str = "sum", seed: int = 0, repeats: int = 5) -> dict[str, float]:
    """Edges x batch per second of one pass, and of the floor on the same element count.

    The floor gathers ``n_edges`` random rows of a ``(n_nodes, batch)`` array and sums them —
    the memory traffic any edge-by-edge evaluation must at least pay. Best of ``repeats``.

    Returns
    -------
    dict
        ``n_edges``, ``batch``, ``ours_per_second``, ``floor_per_second``, ``ratio``
        (ours / floor; the goal is >= 0.25).
    """
    circuit = vtree_circuit(n_variables, k, topology=topology, seed=seed)
    rng = make_rng(seed, "bench")
    states = rng.integers(0, 2, size=(n_variables, batch))
    states[rng.random((n_variables, batch)) < 0.3] = -1          # some marginalised
    elements = float(circuit.n_edges) * batch
    ours = _best_seconds(lambda: forward(circuit, states, mode=mode), repeats)
    table = rng.random((circuit.n_nodes, batch))
    idx = rng.integers(0, circuit.n_nodes, size=circuit.n_edges)
    floor = _best_seconds(lambda: table[idx].sum(axis=0), repeats)
    return {"n_edges": float(circuit.n_edges), "batch": float(batch),
            "ours_per_second": elements / ours, "floor_per_second": elements / floor,
            "ratio": floor / ours}
