"""The frozen records that cross module boundaries: what a study asks for and what it measured.

Dicts exist only at the JSON/SQLite edge (:meth:`to_dict` / :meth:`from_dict`). This module
imports nothing heavy and nothing of ``model_zoo`` beyond plain names.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, dataclass, field, fields
from typing import Any, Literal

__all__ = ["CurveSpec", "StudySpec", "Point", "CurveResult", "StudyResult", "STATUSES",
           "curve_label"]

#: Point statuses. ``timeout`` and ``memory`` are censored: the cost is at least the cap.
STATUSES = ("ok", "timeout", "memory", "error", "wrong")
Status = Literal["ok", "timeout", "memory", "error", "wrong"]
CENSORED = ("timeout", "memory")


def _plain(value: Any) -> Any:
    if isinstance(value, tuple):
        return [_plain(v) for v in value]
    return value


@dataclass(frozen=True)
class CurveSpec:
    """One curve of a study: (family, level, method, axis, topology, fixed size of the other axis).

    ``sizes`` is None for ``"auto"`` (the schedule chooses); ``params`` are keyword parameters for
    the family's constructor (e.g. ``(("n_samples", 2000),)``); ``max_size`` bounds an auto schedule.
    """

    family: str
    level: str
    method: str
    axis: str
    topology: str
    fixed: int
    sizes: tuple[int, ...] | None = None
    queries: int = 20
    params: tuple[tuple[str, Any], ...] = ()
    max_size: int | None = None
    min_size: int | None = None

    def key(self) -> str:
        """A readable identifier: ``bayesnet/associational/exact/graph/chain@2``."""
        return f"{self.family}/{self.level}/{self.method}/{self.axis}/{self.topology}@{self.fixed}"

    def to_dict(self) -> dict[str, Any]:
        d = {f.name: _plain(getattr(self, f.name)) for f in fields(self)}
        d["params"] = dict(self.params)
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "CurveSpec":
        d = dict(d)
        sizes = d.get("sizes")
        d["sizes"] = None if sizes in (None, "auto") else tuple(int(s) for s in sizes)
        d["params"] = tuple(sorted((d.get("params") or {}).items()))
        return cls(**{f.name: d[f.name] for f in fields(cls) if f.name in d})


def curve_label(spec: CurveSpec) -> str:
    """Human label for tables and figures."""
    return (f"{spec.family} · {spec.level} · {spec.method} · {spec.axis} axis · "
            f"{spec.topology} (other axis {spec.fixed})")


@dataclass(frozen=True)
class StudySpec:
    """A whole study (the study file, or the built-in default)."""

    name: str
    curves: tuple[CurveSpec, ...]
    budget_s: float = 300.0
    point_timeout_s: float = 5.0
    memory_mb: int = 2048
    seed: int = 7
    threads: int = 1
    description: str = ""

    def to_dict(self) -> dict[str, Any]:
        d = {f.name: getattr(self, f.name) for f in fields(self) if f.name != "curves"}
        d["curves"] = [c.to_dict() for c in self.curves]
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "StudySpec":
        d = dict(d)
        d["curves"] = tuple(CurveSpec.from_dict(c) for c in d.get("curves", ()))
        return cls(**{f.name: d[f.name] for f in fields(cls) if f.name in d})

    def spec_hash(self) -> str:
        """Hash of everything that changes what is measured (not the description).

        The budget is excluded: a resumed run may be given more time without becoming a new study.
        """
        d = self.to_dict()
        d.pop("description", None)
        d.pop("budget_s", None)
        text = json.dumps(d, sort_keys=True, default=str)
        return hashlib.sha256(text.encode()).hexdigest()[:16]


@dataclass(frozen=True)
class Point:
    """One measurement: an instance of one size, a set of queries answered on it.

    ``size`` is the position along the curve's axis (the realised size: for a k x k grid,
    ``k*k``); ``seconds_*`` are per query; ``work`` is mean work per query in the family's unit;
    ``predicted_work`` the family's own formula for the same queries (mean per query);
    ``peak_bytes`` the larger of tracemalloc's peak and the process's RSS growth during the point.
    For censored points (``timeout``, ``memory``) ``seconds_median`` holds the cap per query:
    a lower bound, never the cost.

    ``repeat_seconds`` are the point's contiguous repeats (per query); ``interleaved_seconds``
    are repeats taken after the curve finished, one per round of a sweep that visits the
    curve's sizes in a fresh random order each round (:func:`profiler.harness.run_curve`), so
    that a slow spell of a shared machine falls on random sizes rather than on one point.
    The time verdict is fitted on one statistic of these (:func:`profiler.analysis.time_cost`);
    :attr:`seconds_fastest` is their least.
    """

    study: str
    curve: int
    family: str
    level: str
    method: str
    axis: str
    topology: str
    fixed: int
    size: int
    status: str
    seconds_median: float | None = None
    seconds_min: float | None = None
    seconds_max: float | None = None
    seconds_spread: float | None = None
    repeats: int = 0
    loops: int = 0
    n_queries: int = 0
    work: float | None = None
    predicted_work: float | None = None
    peak_bytes: int | None = None
    build_seconds: float | None = None
    max_error: float | None = None
    message: str = ""
    worker: str = ""
    finished_at: float = 0.0
    profile: dict[str, float] = field(default_factory=dict)
    repeat_seconds: tuple[float, ...] = ()
    interleaved_seconds: tuple[float, ...] = ()

    @property
    def is_censored(self) -> bool:
        return self.status in CENSORED

    @property
    def seconds_fastest(self) -> float | None:
        """Fastest per-query seconds (one candidate statistic for the time fit).

        Interference on a shared machine (another process, the hypervisor, frequency changes)
        only ever adds time to a repeat of fixed work, and it comes in spells that outlast a
        point, so the fastest repeat is the steadiest estimate of what the work itself costs.
        When the point took part in its curve's interleaved sweep, only the sweep's repeats
        count: they were taken under the same spells as every other size's, whereas the
        point's own contiguous repeats may have caught a fast spell the other sizes never saw
        (seen here: contiguous minima 1.6x below every later repeat). Otherwise the fastest
        contiguous repeat. For a censored point it is the lower bound in ``seconds_median``;
        None when nothing was timed.

        References
        ----------
        Chen, J. and Revels, J. (2016). Robust benchmarking in noisy environments.
        arXiv:1608.04295 (cited from memory): the minimum as the estimator of choice when
        noise is additive and non-negative.
        """
        if self.status != "ok":
            return self.seconds_median if self.is_censored else None
        pool = self.interleaved_seconds or (*self.repeat_seconds, self.seconds_min,
                                            self.seconds_median)
        seen = [float(s) for s in pool if s is not None and s == s and s > 0]
        return min(seen) if seen else None

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["repeat_seconds"] = list(self.repeat_seconds)
        d["interleaved_seconds"] = list(self.interleaved_seconds)
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "Point":
        d = dict(d)
        d["repeat_seconds"] = tuple(d.get("repeat_seconds") or ())
        d["interleaved_seconds"] = tuple(d.get("interleaved_seconds") or ())
        d["profile"] = dict(d.get("profile") or {})
        return cls(**{f.name: d[f.name] for f in fields(cls) if f.name in d})


@dataclass(frozen=True)
class CurveResult:
    """A curve's spec and every point stored for it, in size order.

    ``cut_by_budget`` says the study budget, not a cap or the schedule, stopped it growing;
    ``theory`` is the family's ``expected_growth`` for this curve (None when theory is silent).
    """

    index: int
    spec: CurveSpec
    points: tuple[Point, ...]
    cut_by_budget: bool = False
    theory: str | None = None
    work_unit: str = ""
    mechanism_knob: str = ""


@dataclass(frozen=True)
class StudyResult:
    """A stored study: its spec, environment, workers and curves."""

    study_id: str
    spec: StudySpec
    environment: dict[str, Any]
    curves: tuple[CurveResult, ...]
    workers: dict[str, dict[str, Any]] = field(default_factory=dict)
    started_at: float = 0.0
    finished_at: float | None = None
    out_dir: str | None = None
