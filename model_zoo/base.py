"""The contract every model family meets, and the registry that finds families by name.

A *family* is a kind of model with its inference engines (``bayesnet``, ``circuit``,
``neural_scm``, ``linear_scm``). The profiler never imports a family by name: it asks the
registry (:func:`get`) or imports a user's ``package.module:Class`` that the user named. This
module imports nothing of :mod:`profiler`.

The contract is modelled on a scikit-learn estimator: the constructor stores keyword parameters
and does nothing else; :meth:`Family.build` validates and builds; capabilities are data
(``levels``, ``methods``).
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass, field
from enum import Enum
from typing import Any, ClassVar, Literal, Protocol, Sequence, runtime_checkable

import numpy as np

from model_zoo.errors import InputError, UnsupportedQuery

__all__ = [
    "Level",
    "Method",
    "Axis",
    "TOPOLOGIES",
    "METHODS",
    "AXES",
    "Size",
    "Query",
    "Answer",
    "Family",
    "FamilyBase",
    "register",
    "get",
    "names",
    "resolve",
    "make_rng",
    "size_along",
]


class Level(str, Enum):
    """The rung of the causal hierarchy a query sits on (Pearl 2009, *Causality*, ch. 1)."""

    ASSOCIATIONAL = "associational"
    INTERVENTIONAL = "interventional"
    COUNTERFACTUAL = "counterfactual"

    def __str__(self) -> str:  # "associational", not "Level.ASSOCIATIONAL"
        return self.value


Method = Literal["exact", "sampling"]
Axis = Literal["graph", "mechanism"]
METHODS: tuple[str, ...] = ("exact", "sampling")
AXES: tuple[str, ...] = ("graph", "mechanism")
TOPOLOGIES: tuple[str, ...] = ("chain", "tree", "grid", "random", "layered")

#: A partial assignment ``((variable, value), ...)``; values are state indices for discrete
#: variables and floats for continuous ones. Tuples, so a Query is hashable and comparable.
Assignment = tuple[tuple[str, Any], ...]


@dataclass(frozen=True)
class Size:
    """The two sizes of an instance.

    ``graph`` is the number of endogenous variables; ``mechanism`` the size of each local model,
    in the family's own knob (``Family.mechanism_knob``: states per variable, components per
    scope, hidden width, in-degree).
    """

    graph: int
    mechanism: int

    def __post_init__(self) -> None:
        for name in ("graph", "mechanism"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
                raise InputError.at("Size", name, "an integer >= 1", value)


def size_along(axis: str, size: int, fixed: int) -> Size:
    """The :class:`Size` of a point that is ``size`` along ``axis`` with the other axis ``fixed``."""
    if axis == "graph":
        return Size(graph=int(size), mechanism=int(fixed))
    if axis == "mechanism":
        return Size(graph=int(fixed), mechanism=int(size))
    raise InputError.at("axis", None, "'graph' or 'mechanism'", axis)


@dataclass(frozen=True)
class Query:
    """One question asked of an instance.

    Attributes
    ----------
    level
        Where it sits on the causal hierarchy.
    target
        The event asked about, e.g. ``(("Y", 1),)`` for P(Y=1). For ``kind="expectation"`` the
        value is ignored (E[Y | ...]); for ``kind="exceedance"`` it is the threshold t of P(Y > t).
        For ``kind="mpe"`` it is empty (the most probable completion of the evidence is sought).
    evidence
        Observed values. For counterfactual queries this is the *factual* world.
    intervention
        ``do(X=x)``. For interventional queries it acts in the same world as the evidence; for
        counterfactual queries it defines the hypothetical world in which ``target`` is asked
        (P(Y_{x}=y | evidence)).
    kind
        ``probability`` (default), ``expectation``, ``exceedance`` (continuous families),
        ``likelihood`` (complete evidence; circuits) or ``mpe`` (max-product; circuits).
    """

    level: Level
    target: Assignment
    evidence: Assignment = ()
    intervention: Assignment = ()
    kind: str = "probability"

    def __post_init__(self) -> None:
        object.__setattr__(self, "level", Level(self.level))
        if self.level is Level.ASSOCIATIONAL and self.intervention:
            raise InputError.at("query", "intervention", "none for an associational query",
                                dict(self.intervention))
        if self.level is not Level.ASSOCIATIONAL and not self.intervention:
            raise InputError.at("query", "intervention",
                                f"at least one do(...) for a {self.level.value} query", "none")

    def variables(self) -> set[str]:
        """Every variable the query mentions."""
        return {v for part in (self.target, self.evidence, self.intervention) for v, _ in part}

    def describe(self) -> str:
        """Probability notation: ``P(Y=1 | do(X=0), Z=1)``, ``P(Y_{X=1}=1 | X=0)``, ``E(Y | X=1)``."""
        def fmt(pairs: Assignment) -> str:
            return ", ".join(f"{v}={x}" for v, x in pairs)

        sub = "{" + fmt(self.intervention) + "}"
        name = (lambda v: f"{v}_{sub}") if self.level is Level.COUNTERFACTUAL else (lambda v: v)
        if self.kind == "expectation":
            head = ", ".join(name(v) for v, _ in self.target)
        else:
            rel = ">" if self.kind == "exceedance" else "="
            head = ", ".join(f"{name(v)}{rel}{x}" for v, x in self.target)
        parts = []
        if self.intervention and self.level is not Level.COUNTERFACTUAL:
            parts.append(f"do({fmt(self.intervention)})")
        if self.evidence:
            parts.append(fmt(self.evidence))
        tail = ", ".join(parts)
        op = {"expectation": "E", "mpe": "MPE"}.get(self.kind, "P")
        return f"{op}({head} | {tail})" if tail else f"{op}({head})"


@dataclass(frozen=True)
class Answer:
    """What an engine returns for one query.

    ``value`` is the probability (or expectation); ``work`` the machine-independent count of
    elementary operations, in the unit the family documents; ``stderr`` the Monte Carlo standard
    error (None for exact engines); ``is_exact`` False when the engine knows its answer is only
    approximate (e.g. max-product on a non-deterministic circuit); ``n_accepted`` the samples
    that survived rejection; ``note`` a short remark for reports.
    """

    value: float
    work: float
    stderr: float | None = None
    is_exact: bool = True
    n_accepted: int | None = None
    note: str = ""


@runtime_checkable
class Family(Protocol):
    """What a model family provides (DESIGN.md, "The Family protocol")."""

    name: ClassVar[str]
    levels: ClassVar[frozenset[Level]]
    methods: ClassVar[frozenset[str]]
    mechanism_knob: ClassVar[str]

    def build(self, size: Size, *, topology: str, seed: int) -> Any: ...

    def queries(self, instance: Any, level: Level, *, n: int, seed: int) -> list[Query]: ...

    def answer(self, instance: Any, query: Query, *, method: str) -> Answer: ...

    def reference(self, instance: Any, query: Query) -> float | None: ...

    def profile(self, instance: Any) -> dict[str, float]: ...

    def predicted_work(self, instance: Any, query: Query, *, method: str) -> float: ...


class FamilyBase:
    """Defaults and checks shared by the built-in families; a user's family need not inherit it.

    Subclasses set the class variables and implement the protocol methods. The constructor
    stores keyword parameters (scikit-learn style) and does nothing else.
    """

    name: ClassVar[str] = ""
    levels: ClassVar[frozenset[Level]] = frozenset()
    methods: ClassVar[frozenset[str]] = frozenset({"exact"})
    mechanism_knob: ClassVar[str] = ""
    topologies: ClassVar[tuple[str, ...]] = TOPOLOGIES
    #: Unit of ``Answer.work``, stated in reports.
    work_unit: ClassVar[str] = "operations"

    def __init__(self, **params: Any) -> None:
        self.params = dict(params)

    def get_params(self) -> dict[str, Any]:
        """The keyword parameters the family was constructed with."""
        return dict(self.params)

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in sorted(self.params.items()))
        return f"{type(self).__name__}({args})"

    # -- optional parts of the protocol, with defaults --------------------------------------
    def realizable(self, size: Size, *, topology: str) -> Size:
        """The nearest size this family can build (e.g. a k x k grid for ``topology='grid'``)."""
        return size

    def answer_batch(self, instance: Any, queries: Sequence[Query], *, method: str) -> list[Answer]:
        """Answer many queries; families override this to reuse plans and vectorise."""
        return [self.answer(instance, q, method=method) for q in queries]

    def reference(self, instance: Any, query: Query) -> float | None:
        """An independent answer (other engine or brute force) where one is affordable."""
        return None

    def predicted_bytes(self, instance: Any, query: Query, *, method: str) -> float | None:
        """Peak memory the engine's cost formula predicts, or None if the family cannot say."""
        return None

    def expected_growth(self, *, axis: str, topology: str, level: Level, method: str) -> str | None:
        """What theory says: ``'polynomial'``, ``'exponential'`` or None when it is silent."""
        return None

    # -- checks shared by families ------------------------------------------------------------
    def check_level(self, level: Level | str) -> Level:
        level = Level(level)
        if level not in self.levels:
            can = ", ".join(sorted(lv.value for lv in self.levels))
            raise UnsupportedQuery(
                f"family {self.name!r} cannot express {level.value} queries (it expresses: {can})")
        return level

    def check_method(self, method: str) -> str:
        if method not in self.methods:
            raise UnsupportedQuery(
                f"family {self.name!r} has no {method!r} engine (it has: {', '.join(sorted(self.methods))})")
        return method

    def check_topology(self, topology: str) -> str:
        if topology not in self.topologies:
            raise InputError.at(f"family {self.name!r}", "topology",
                                "one of " + ", ".join(self.topologies), topology)
        return topology


def make_rng(seed: int | np.random.Generator | None, *salt: int | str) -> np.random.Generator:
    """The one place a random generator is made. ``salt`` derives independent streams.

    >>> make_rng(7, "queries").integers(10) == make_rng(7, "queries").integers(10)
    True
    """
    if isinstance(seed, np.random.Generator):
        return seed
    words = [0 if seed is None else int(seed)]
    for s in salt:
        if isinstance(s, str):
            words.append(int.from_bytes(s.encode()[:8].ljust(8, b"\0"), "little"))
        else:
            words.append(int(s))
    return np.random.default_rng(np.random.SeedSequence(words))


# -- registry ---------------------------------------------------------------------------------
#: Built-in families by name -> "module:Class", imported on first use so `import model_zoo`
#: stays fast and pgmpy is not loaded unless a family needs it.
_BUILTIN: dict[str, str] = {
    "bayesnet": "model_zoo.bayesnet:BayesNetFamily",
    "circuit": "model_zoo.circuit:CircuitFamily",
    "neural_scm": "model_zoo.neural_scm:NeuralSCMFamily",
    "linear_scm": "model_zoo.linear_scm:LinearSCMFamily",
}
_REGISTERED: dict[str, type] = {}


def register(cls: type) -> type:
    """Class decorator: make a family findable by its ``name``."""
    if not getattr(cls, "name", ""):
        raise TypeError(f"{cls.__name__} has no 'name'")
    _REGISTERED[cls.name] = cls
    return cls


def names() -> list[str]:
    """Names of every registered family, built-in first."""
    return list(_BUILTIN) + [n for n in _REGISTERED if n not in _BUILTIN]


def _import(spec: str, *, where: str) -> type:
    module_name, _, attr = spec.partition(":")
    if not module_name or not attr:
        raise InputError.at(where, "family", "a registered name or 'package.module:Class'", spec)
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise InputError(f"{where}: family: cannot import module {module_name!r} ({exc})") from exc
    try:
        return getattr(module, attr)
    except AttributeError as exc:
        raise InputError(f"{where}: family: module {module_name!r} has no {attr!r}") from exc


def get(name: str) -> type:
    """The family class registered as ``name`` (``'circuit'``), or a user's ``'pkg.mod:Class'``."""
    return resolve(name)


def resolve(spec: str, *, where: str = "family") -> type:
    """Find a family class by registered name or explicit ``module:Class`` (the only way a user's
    code is imported: when the user names it)."""
    if spec in _REGISTERED:
        return _REGISTERED[spec]
    if spec in _BUILTIN:
        cls = _import(_BUILTIN[spec], where=where)
        _REGISTERED.setdefault(spec, cls)
        return cls
    if ":" not in spec:
        raise InputError.at(where, "family", "one of " + ", ".join(names()) +
                            " or 'package.module:Class'", spec)
    cls = _import(spec, where=where)
    missing = [m for m in ("name", "levels", "methods", "mechanism_knob", "build", "queries",
                           "answer", "reference", "profile", "predicted_work")
               if not hasattr(cls, m)]
    if missing:
        raise InputError(f"{where}: family {spec!r} does not satisfy the Family protocol "
                         f"(missing: {', '.join(missing)})")
    return cls
