"""Hand-built stored studies with known laws, for the analysis/report/plan/claims tests.

The points are drawn from a stated law (power n^k or exponential b^n) with small seeded
log-normal noise, so a test knows the true answer the fitter should recover. These numbers are
synthetic on purpose: they check our arithmetic against a law we chose, not the world.
"""

from __future__ import annotations

import math

import numpy as np

from profiler.records import CurveResult, CurveSpec, Point, StudyResult, StudySpec


def law_cost(law: str, n: float, param: float, scale: float) -> float:
    """Cost of a known law: ``scale * n**param`` (power) or ``scale * param**n`` (exponential)."""
    return scale * (n ** param if law == "power" else param ** n)


def make_curve(index: int, *, family: str = "bayesnet", level: str = "associational",
               method: str = "exact", axis: str = "graph", topology: str = "chain",
               fixed: int = 2, law: str = "power", param: float = 1.0,
               sizes=(4, 8, 16, 32, 64, 128), work_scale: float = 100.0,
               seconds_per_work: float = 1e-7, noise: float = 0.02, seed: int = 0,
               statuses: dict[int, str] | None = None, theory: str | None = None,
               params=(), build_seconds_scale: float | None = None,
               mechanism_knob: str = "states per variable", work_unit: str = "table entries",
               study: str = "synthetic", cut_by_budget: bool = False) -> CurveResult:
    """One curve of points following ``law`` (statuses override per size, e.g. {64: "timeout"})."""
    rng = np.random.default_rng(seed)
    statuses = statuses or {}
    spec = CurveSpec(family, level, method, axis, topology, fixed, sizes=tuple(sizes),
                     params=tuple(params))
    points = []
    for n in sizes:
        work = law_cost(law, n, param, work_scale)
        seconds = work * seconds_per_work
        status = statuses.get(n, "ok")
        reps = tuple(seconds * math.exp(noise * z) for z in rng.standard_normal(5))
        if status in ("timeout", "memory"):
            # Censored: the cap per query, a lower bound well under the true cost.
            cap = seconds / 3
            points.append(Point(study, index, family, level, method, axis, topology, fixed, n,
                                status, seconds_median=cap, predicted_work=work,
                                message="time cap reached"))
            continue
        med = float(np.median(reps))
        points.append(Point(
            study, index, family, level, method, axis, topology, fixed, n, status,
            seconds_median=med, seconds_min=min(reps), seconds_max=max(reps),
            seconds_spread=(max(reps) - min(reps)) / med, repeats=5, loops=1, n_queries=10,
            work=work * math.exp(noise * rng.standard_normal()), predicted_work=work,
            peak_bytes=int(1000 + 8 * work), profile={"n_variables": float(n)},
            build_seconds=None if build_seconds_scale is None else build_seconds_scale * work,
            repeat_seconds=reps))
    return CurveResult(index=index, spec=spec, points=tuple(points), theory=theory,
                       work_unit=work_unit, mechanism_knob=mechanism_knob,
                       cut_by_budget=cut_by_budget)


def make_study(curves, *, name: str = "synthetic") -> StudyResult:
    """A StudyResult around hand-built curves."""
    spec = StudySpec(name=name, curves=tuple(c.spec for c in curves), description="synthetic")
    env = {"python": "3.11", "cores": 2, "cpu": "test cpu", "numpy": "x"}
    return StudyResult(study_id="s-test", spec=spec, environment=env, curves=tuple(curves),
                       workers={"w1": {"host": "localhost", "cores": 2}}, started_at=1.7e9,
                       finished_at=1.7e9 + 60)
