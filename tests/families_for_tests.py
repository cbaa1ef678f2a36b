"""Test-only families that misbehave on purpose, for the harness, runner and store tests.

They satisfy the Family protocol without being registered (they must not appear in
``model_zoo.names()`` or the contract test); studies name them as
``"tests.families_for_tests:DoublingFamily"`` and so on. Every answer is a probability computed
in two ways (engine and reference) unless the family exists to get it wrong.

* :class:`LinearFamily` — honest and fast; cost grows linearly in the size.
* :class:`DoublingFamily` — cost doubles per size unit (spins ``base_seconds * 2**size``).
* :class:`AllocatingFamily` — from ``alloc_from`` on, allocates without bound.
* :class:`WrongFamily` — from ``wrong_from`` on, answers 0.1 off the reference.
* :class:`CrashingFamily` — from ``crash_from`` on, dereferences a null pointer (SIGSEGV).
* :class:`RaisingFamily` — from ``raise_from`` on, raises ModelError.
* :class:`HugeFamily` — from ``huge_from`` on, predicts a peak far past any memory cap.
* :class:`SamplingFamily` — a sampling engine with a stated standard error.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from model_zoo.base import Answer, FamilyBase, Level, Query, Size, make_rng
from model_zoo.errors import ModelError


@dataclass(frozen=True, eq=False)
class ToyInstance:
    size: Size
    topology: str
    seed: int
    name: str
    weights: np.ndarray


class LinearFamily(FamilyBase):
    """P(target) = mean of a seeded weight vector of ``graph * mechanism`` entries in (0, 1)."""

    name: ClassVar[str] = "test_linear"
    levels: ClassVar[frozenset[Level]] = frozenset({Level.ASSOCIATIONAL, Level.INTERVENTIONAL})
    methods: ClassVar[frozenset[str]] = frozenset({"exact"})
    mechanism_knob: ClassVar[str] = "entries per variable"
    topologies: ClassVar[tuple[str, ...]] = ("chain", "grid")
    work_unit: ClassVar[str] = "additions"

    def realizable(self, size: Size, *, topology: str) -> Size:
        self.check_topology(topology)
        if topology == "grid":
            k = max(1, round(size.graph ** 0.5))
            return Size(graph=k * k, mechanism=size.mechanism)
        return size

    def build(self, size: Size, *, topology: str, seed: int) -> ToyInstance:
        self.check_topology(topology)
        n = size.graph * size.mechanism * int(self.params.get("scale", 1))
        w = make_rng(seed, "toy", n).uniform(0.05, 0.95, size=n)
        return ToyInstance(size=size, topology=topology, seed=seed, name=f"toy{n}", weights=w)

    def queries(self, instance: ToyInstance, level: Level, *, n: int, seed: int) -> list[Query]:
        level = self.check_level(level)
        rng = make_rng(seed, "toyq")
        out = []
        for _ in range(n):
            v = int(rng.integers(len(instance.weights)))
            do = (("X0", 1),) if level is not Level.ASSOCIATIONAL else ()
            out.append(Query(level=level, target=((f"X{v}", 1),), intervention=do))
        return out

    def _cost(self, instance: ToyInstance) -> None:
        """Hook for subclasses: extra cost (time or memory) of one answer."""

    def answer(self, instance: ToyInstance, query: Query, *, method: str) -> Answer:
        self.check_method(method)
        self._cost(instance)
        v = int(query.target[0][0][1:])
        w = instance.weights
        value = float(np.sum(w) / len(w)) * 0.5 + 0.5 * float(w[v])
        return Answer(value=value, work=float(len(w)))

    def reference(self, instance: ToyInstance, query: Query) -> float | None:
        v = int(query.target[0][0][1:])
        w = instance.weights
        return float(0.5 * np.mean(w) + 0.5 * w[v])

    def profile(self, instance: ToyInstance) -> dict[str, float]:
        n = float(instance.size.graph)
        return {"n_variables": n, "n_edges": max(0.0, n - 1), "n_parameters": float(len(instance.weights)),
                "label": "not a number"}  # the harness must drop non-numbers

    def predicted_work(self, instance: ToyInstance, query: Query, *, method: str) -> float:
        return float(len(instance.weights))

    def expected_growth(self, *, axis: str, topology: str, level: Level, method: str) -> str | None:
        return "polynomial"


class DoublingFamily(LinearFamily):
    """Each answer spins for ``base_seconds * 2**size`` seconds: cost doubles per size unit."""

    name: ClassVar[str] = "test_doubling"

    def _cost(self, instance: ToyInstance) -> None:
        seconds = float(self.params.get("base_seconds", 1e-5)) * 2.0 ** instance.size.graph
        end = time.perf_counter() + seconds
        while time.perf_counter() < end:  # busy: holds the GIL and a core, like real work
            pass

    def predicted_work(self, instance: ToyInstance, query: Query, *, method: str) -> float:
        return 2.0 ** instance.size.graph

    def expected_growth(self, *, axis: str, topology: str, level: Level, method: str) -> str | None:
        return "exponential"


class AllocatingFamily(LinearFamily):
    """From ``alloc_from`` (size) on, each answer allocates 32 MiB blocks until it fails."""

    name: ClassVar[str] = "test_allocating"

    def _cost(self, instance: ToyInstance) -> None:
        if instance.size.graph >= int(self.params.get("alloc_from", 4)):
            hoard = []
            while True:
                hoard.append(np.ones(4 << 20))  # 32 MiB, touched so it is really resident


class WrongFamily(LinearFamily):
    """From ``wrong_from`` (size) on, every answer is 0.1 away from the reference."""

    name: ClassVar[str] = "test_wrong"

    def answer(self, instance: ToyInstance, query: Query, *, method: str) -> Answer:
        a = super().answer(instance, query, method=method)
        if instance.size.graph >= int(self.params.get("wrong_from", 4)):
            return Answer(value=a.value + 0.1, work=a.work)
        return a


class CrashingFamily(LinearFamily):
    """From ``crash_from`` (size) on, answering dereferences a null pointer (SIGSEGV)."""

    name: ClassVar[str] = "test_crashing"

    def _cost(self, instance: ToyInstance) -> None:
        if instance.size.graph >= int(self.params.get("crash_from", 4)):
            import ctypes

            ctypes.string_at(0)


class RaisingFamily(LinearFamily):
    """From ``raise_from`` (size) on, answering raises ModelError."""

    name: ClassVar[str] = "test_raising"

    def _cost(self, instance: ToyInstance) -> None:
        if instance.size.graph >= int(self.params.get("raise_from", 4)):
            raise ModelError(f"toy engine refuses size {instance.size.graph}")


class HugeFamily(LinearFamily):
    """From ``huge_from`` on, ``predicted_bytes`` says 1 TiB: the pre-flight check must refuse."""

    name: ClassVar[str] = "test_huge"

    def predicted_bytes(self, instance: ToyInstance, query: Query, *, method: str) -> float | None:
        if instance.size.graph >= int(self.params.get("huge_from", 4)):
            return float(1 << 40)
        return 1e3

    def _cost(self, instance: ToyInstance) -> None:
        if instance.size.graph >= int(self.params.get("huge_from", 4)):
            raise AssertionError("a point refused by the pre-flight check must not run")


class SamplingFamily(LinearFamily):
    """A sampling engine: the exact value plus seeded noise of stated standard error."""

    name: ClassVar[str] = "test_sampling"
    methods: ClassVar[frozenset[str]] = frozenset({"exact", "sampling"})

    def answer(self, instance: ToyInstance, query: Query, *, method: str) -> Answer:
        a = super().answer(instance, query, method="exact")
        if method == "exact":
            return a
        stderr = 0.01
        noise = float(make_rng(instance.seed, "noise", int(query.target[0][0][1:])).normal()) * stderr
        bias = float(self.params.get("bias", 0.0))
        return Answer(value=a.value + noise + bias, work=a.work, stderr=stderr, is_exact=False)


class SlowInitFamily(LinearFamily):
    """A constructor that rejects its parameters (built in the worker: the curve gets an error)."""

    name: ClassVar[str] = "test_badparams"

    def __init__(self, **params: Any) -> None:
        if "bad" in params:
            raise ModelError("parameter 'bad' is not allowed")
        super().__init__(**params)
