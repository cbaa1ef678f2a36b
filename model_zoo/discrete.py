"""A plain discrete Bayesian network: the representation shared by the ``bayesnet`` engine, the
circuit compiler and the SCM-to-network converters (no pgmpy objects cross module boundaries).

CPT layout follows pgmpy's ``TabularCPD.values``: ``cpts[v]`` has shape
``(card(v), card(p1), ..., card(pk))`` for ``parents[v] == (p1, ..., pk)`` and sums to one over
axis 0.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from model_zoo.errors import InputError

__all__ = ["DiscreteNetwork"]


@dataclass(frozen=True, eq=False)
class DiscreteNetwork:
    """A DAG of discrete variables with conditional probability tables.

    Attributes
    ----------
    variables
        Names in a topological order (parents before children).
    states
        State names of each variable (indices are positions in this tuple).
    parents
        Parents of each variable, in the order of the CPT's axes 1..k.
    cpts
        ``cpts[v][x, u1, ..., uk] = P(v = x | parents = u)``.
    name
        Where it came from (file or generator), for messages.
    """

    variables: tuple[str, ...]
    states: dict[str, tuple[str, ...]]
    parents: dict[str, tuple[str, ...]]
    cpts: dict[str, np.ndarray]
    name: str = "network"
    meta: dict = field(default_factory=dict)

    def card(self, v: str) -> int:
        return len(self.states[v])

    @property
    def n_edges(self) -> int:
        return sum(len(p) for p in self.parents.values())

    def children(self) -> dict[str, tuple[str, ...]]:
        out: dict[str, list[str]] = {v: [] for v in self.variables}
        for v in self.variables:
            for p in self.parents[v]:
                out[p].append(v)
        return {v: tuple(c) for v, c in out.items()}

    def n_free_parameters(self) -> int:
        """Free parameters: (card - 1) x product of parent cards, summed (common practice)."""
        return int(sum((self.card(v) - 1) * int(np.prod([self.card(p) for p in self.parents[v]],
                                                          dtype=np.int64))
                       for v in self.variables))

    def validate(self, *, tolerance: float = 1e-6) -> "DiscreteNetwork":
        """Check shapes, acyclicity (topological order) and normalisation; raise InputError."""
        seen: set[str] = set()
        for v in self.variables:
            for p in self.parents[v]:
                if p not in self.states:
                    raise InputError(f"{self.name}: variable {v!r}: unknown parent {p!r}")
                if p not in seen:
                    raise InputError(
                        f"{self.name}: variable {v!r}: parent {p!r} does not come before it "
                        "(the graph has a cycle or the order is not topological)")
            seen.add(v)
            table = np.asarray(self.cpts[v])
            want = (self.card(v),) + tuple(self.card(p) for p in self.parents[v])
            if table.shape != want:
                raise InputError.at(self.name, f"CPT of {v!r}", f"shape {want}", table.shape)
            if not np.all(np.isfinite(table)) or np.any(table < 0):
                raise InputError(f"{self.name}: CPT of {v!r}: entries must be finite and >= 0")
            sums = table.sum(axis=0)
            worst = float(np.max(np.abs(sums - 1.0))) if sums.size else 0.0
            if worst > tolerance:
                bad = float(sums.flat[int(np.argmax(np.abs(sums - 1.0)))])
                raise InputError(f"{self.name}: CPT of {v!r} sums to {bad:.6g}, expected 1 "
                                 f"(tolerance {tolerance:g})")
        return self
