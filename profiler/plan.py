"""Capacity planning from stored curves: what a workload will cost, and whether it fits.

A :class:`Workload` names what will be asked (family, level, method, topology, the target size on
each axis, the number of queries) and the budget (wall seconds on some cores, or core-hours).
:func:`plan_workload` extrapolates the fitted laws of the matching stored curves to the target
and returns a :class:`Plan`: per-query cost with a prediction interval (work and time), totals,
whether it fits, the largest size on each axis that fits, a ranking of the families that can
express the level, the compile-once break-even for networks, and warnings when the target lies
far outside the measured range. Nothing is measured here.

Approximations, stated in every plan that uses them:

* queries are independent and each runs on one core, so ``cores`` cores finish
  ``n_queries`` in ``n_queries * seconds_per_query / cores`` of wall time;
* a curve varies one axis with the other fixed. When the target differs from a curve's fixed
  size on the other axis, the other axis's fitted *ratio* is applied multiplicatively:
  ``cost(G, M) ~ cost_graph(G | M0) * cost_mech(M | G0) / cost_mech(M0 | G0)`` (separable
  axes; interactions between the axes are ignored);
* an ``inconclusive`` verdict is extrapolated with the envelope of both competing laws;
* memory is one worker's fitted peak, times the cores running at once.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields
from pathlib import Path
from typing import Any, Sequence

from profiler.analysis import (CAUTION, CurveAnalysis, analyse_study, competing_laws, fit_series,
                               format_growth)
from profiler.errors import InputError
from profiler.records import StudyResult

__all__ = ["Workload", "Interval", "Estimate", "Plan", "plan_workload", "load_workload",
           "workload_from_dict", "make_workload", "format_plan", "CAUTION", "FAR_FACTOR"]

#: A target more than this many times the largest measured size gets a warning.
FAR_FACTOR = 1.5
_LEVELS = ("associational", "interventional", "counterfactual")
_METHODS = ("exact", "sampling")


@dataclass(frozen=True)
class Workload:
    """What will be asked, how often, and with what budget.

    Attributes
    ----------
    level, method
        Query level and inference method.
    family
        The family to plan for; None plans for the best-ranked family that can express the level.
    topology
        Graph shape of the stored curves to use; None accepts any (the best-covered one).
    graph_size, mechanism_size
        Target size on each axis (None: the fixed size of the curve used).
    n_queries
        Queries in the workload.
    budget_seconds, cores
        Wall-clock budget on ``cores`` cores, or
    core_hours
        a budget in core-hours (``cores`` then only sets the wall time and memory).
    memory_mb
        Memory available to each worker (None: not checked).
    name, note
        Labels for the plan (``note`` is quoted).
    """

    level: str
    method: str = "exact"
    family: str | None = None
    topology: str | None = None
    graph_size: int | None = None
    mechanism_size: int | None = None
    n_queries: int = 1
    budget_seconds: float | None = None
    core_hours: float | None = None
    cores: int = 1
    memory_mb: float | None = None
    name: str = ""
    note: str = ""

    @property
    def capacity_core_seconds(self) -> float | None:
        """Core-seconds the budget buys (None without a budget)."""
        if self.core_hours is not None:
            return self.core_hours * 3600.0
        if self.budget_seconds is not None:
            return self.budget_seconds * self.cores
        return None

    def target(self, axis: str) -> int | None:
        return self.graph_size if axis == "graph" else self.mechanism_size


def _check(where: str, field_: str, ok: bool, expected: str, got: Any) -> None:
    if not ok:
        raise InputError.at(where, field_, expected, got)


def _is_num(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def workload_from_dict(d: dict[str, Any], *, where: str = "workload") -> Workload:
    """Validate a workload given as a dict (a TOML file's content or CLI options).

    Accepts the :class:`Workload` field names, and ``target = {graph = 60, mechanism = 8}`` as
    a spelling of ``graph_size``/``mechanism_size``.

    Raises
    ------
    InputError
        Naming ``where`` and the field, what was expected and what arrived.
    """
    d = {k: v for k, v in dict(d).items() if v is not None}   # CLI options not given are None
    target = d.pop("target", None)
    if target is not None:
        _check(where, "target", isinstance(target, dict),
               "a table like {graph = 60, mechanism = 8}", target)
        unknown = set(target) - {"graph", "mechanism"}
        _check(where, "target", not unknown, "only the keys graph and mechanism", sorted(unknown))
        d.setdefault("graph_size", target.get("graph"))
        d.setdefault("mechanism_size", target.get("mechanism"))
    names = {f.name for f in fields(Workload)}
    unknown = sorted(set(d) - names)
    _check(where, unknown[0] if unknown else None, not unknown,
           f"one of {', '.join(sorted(names | {'target'}))}", unknown[0] if unknown else None)
    _check(where, "level", d.get("level") in _LEVELS, " | ".join(_LEVELS), d.get("level"))
    d.setdefault("method", "exact")
    _check(where, "method", d["method"] in _METHODS, " | ".join(_METHODS), d["method"])
    for key in ("family", "topology", "name", "note"):
        if d.get(key) is not None:
            _check(where, key, isinstance(d[key], str) and (d[key] or key in ("name", "note")),
                   "a non-empty string", d[key])
    for key in ("graph_size", "mechanism_size"):
        v = d.get(key)
        if v is not None:
            _check(where, key, isinstance(v, int) and not isinstance(v, bool) and v >= 1,
                   "an integer >= 1", v)
    _check(where, "graph_size", d.get("graph_size") is not None
           or d.get("mechanism_size") is not None,
           "a target size on at least one axis (graph_size or mechanism_size)", None)
    n = d.get("n_queries", 1)
    _check(where, "n_queries", isinstance(n, int) and not isinstance(n, bool) and n >= 1,
           "an integer >= 1", n)
    cores = d.get("cores", 1)
    _check(where, "cores", isinstance(cores, int) and not isinstance(cores, bool) and cores >= 1,
           "an integer >= 1", cores)
    for key in ("budget_seconds", "core_hours", "memory_mb"):
        v = d.get(key)
        if v is not None:
            _check(where, key, _is_num(v) and v > 0, "a positive number", v)
    _check(where, "core_hours", not (d.get("core_hours") is not None
                                     and d.get("budget_seconds") is not None),
           "either budget_seconds or core_hours, not both", "both")
    return Workload(**d)


def load_workload(path: str | Path) -> Workload:
    """Read a workload TOML file (keys of :class:`Workload`; see model_zoo/examples/).

    Raises
    ------
    InputError
        Missing or unreadable file, bad TOML, or a bad field (named with the file).
    """
    return make_workload(Path(path))


def make_workload(path: str | Path | None = None, **overrides: Any) -> Workload:
    """A workload from a TOML file, command-line options, or both (options win).

    ``overrides`` use the :class:`Workload` field names; ``budget_s`` is accepted for
    ``budget_seconds``; a whole-number float ``n_queries`` (``2e6`` on a command line) is taken
    as an integer. None values are ignored (options not given).

    Raises
    ------
    InputError
        As :func:`workload_from_dict`, naming the file or ``command line``.
    """
    data: dict[str, Any] = {}
    where = "command line"
    if path is not None:
        from profiler.study import read_toml

        p = Path(path)
        where = str(p)
        data = read_toml(p, "workload file")
        if isinstance(data.get("workload"), dict):
            data = data["workload"]
    opts = {k: v for k, v in overrides.items() if v is not None}
    if "budget_s" in opts:
        opts["budget_seconds"] = opts.pop("budget_s")
    if isinstance(opts.get("n_queries"), float) and opts["n_queries"].is_integer():
        opts["n_queries"] = int(opts["n_queries"])
    if opts:
        if "budget_seconds" in opts:
            data.pop("core_hours", None)
        if "core_hours" in opts:
            data.pop("budget_seconds", None)
        if "graph_size" in opts or "mechanism_size" in opts:
            target = dict(data.pop("target", None) or {})
            data.setdefault("graph_size", target.get("graph"))
            data.setdefault("mechanism_size", target.get("mechanism"))
        where = f"{where} (with command-line options)" if path is not None else where
    data.update(opts)
    return workload_from_dict(data, where=where)


@dataclass(frozen=True)
class Interval:
    """A central value with a (95%) prediction interval."""

    median: float
    lower: float
    upper: float

    def scaled(self, factor: float) -> "Interval":
        return Interval(self.median * factor, self.lower * factor, self.upper * factor)


@dataclass(frozen=True)
class Estimate:
    """Per-query cost of one family at the workload's target."""

    family: str
    seconds: Interval | None
    work: Interval | None
    peak_bytes: Interval | None
    curves: tuple[str, ...]
    growth: str                  # the time verdict of the main curve, in words and symbols
    work_unit: str
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    reason: str = ""             # why there is no estimate, when seconds is None


@dataclass(frozen=True)
class Plan:
    """What :func:`plan_workload` found (see the module docstring for its approximations)."""

    workload: Workload
    family: str | None
    estimate: Estimate | None
    total_core_seconds: Interval | None
    wall_seconds: Interval | None
    total_work: Interval | None
    memory_bytes: Interval | None
    capacity_core_seconds: float | None
    fits: str                    # "yes" | "no" | "uncertain" | "no budget" | "unknown"
    fits_note: str
    largest_feasible: dict[str, dict[str, Any]]
    ranking: tuple[dict[str, Any], ...]
    break_even: dict[str, Any]
    warnings: tuple[str, ...]
    notes: tuple[str, ...]
    caution: str = CAUTION

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict (for ``infercost plan --json``)."""
        def plain(v: Any) -> Any:
            if isinstance(v, float) and not math.isfinite(v):
                return None
            if isinstance(v, dict):
                return {k: plain(x) for k, x in v.items()}
            if isinstance(v, (list, tuple)):
                return [plain(x) for x in v]
            return v
        d = asdict(self)
        d["workload"]["capacity_core_seconds"] = self.capacity_core_seconds
        return plain(d)


# -- fitted cost at a size -------------------------------------------------------------------

def _interval_at(verdict, size: float) -> Interval:
    """Prediction interval at one size; the envelope of both laws when inconclusive."""
    from profiler.fitter import predict

    if verdict.growth == "inconclusive":
        preds = []
        for law in competing_laws(verdict):
            preds.append(predict(verdict, [size], law=law))
        if preds:
            meds = [float(p.median[0]) for p in preds]
            return Interval(math.sqrt(meds[0] * meds[-1]), min(float(p.lower[0]) for p in preds),
                            max(float(p.upper[0]) for p in preds))
    p = predict(verdict, [size])
    return Interval(float(p.median[0]), float(p.lower[0]), float(p.upper[0]))


def _largest(verdict, limit: float) -> float | None:
    from profiler.fitter import largest_feasible_size

    if verdict.growth == "inconclusive":
        found = []
        for law in competing_laws(verdict):
            found.append(largest_feasible_size(verdict, limit, law=law, upper=True))
        if found:
            return None if any(f is None for f in found) else min(found)
    return largest_feasible_size(verdict, limit, upper=True)


class _Curves:
    """The analyses of a study, indexed for matching, with memory fits made on demand."""

    def __init__(self, analyses: Sequence[CurveAnalysis]):
        self.analyses = list(analyses)
        self._memory: dict[int, Any] = {}
        self._build: dict[int, Any] = {}

    def matching(self, *, family: str, level: str, method: str, axis: str,
                 topology: str | None, source: str | None = None) -> list[CurveAnalysis]:
        out = []
        for a in self.analyses:
            s = a.curve.spec
            if (s.family, s.level, s.method, s.axis) != (family, level, method, axis):
                continue
            if topology is not None and s.topology != topology:
                continue
            if source is not None and dict(s.params).get("source") != source:
                continue
            out.append(a)
        return out

    def verdict(self, a: CurveAnalysis, kind: str):
        if kind == "time":
            return a.time
        if kind == "work":
            return a.work
        cache, attr = (self._memory, "peak_bytes") if kind == "memory" else (self._build,
                                                                             "build_seconds")
        if a.curve.index not in cache:
            def value(p):
                # A compiled circuit's own compile time when the family reports it; else the
                # whole build, which for source="bayesnet" is building the network + compiling.
                if kind == "build" and p.profile.get("compile_seconds"):
                    return float(p.profile["compile_seconds"])
                v = getattr(p, attr)
                return None if v is None else float(v)
            pts = [(p.size, value(p)) for p in a.curve.points if p.status == "ok"]
            pts = [(n, v) for n, v in pts if v is not None and v > 0]
            v, _ = fit_series([n for n, _ in pts], [v for _, v in pts], [False] * len(pts))
            cache[a.curve.index] = v
        return cache[a.curve.index]


def _pick(cands: list[CurveAnalysis], other_target: int | None) -> CurveAnalysis | None:
    """The curve whose fixed size is nearest the other axis's target; more points break ties."""
    usable = [a for a in cands if a.time is not None] or cands
    if not usable:
        return None

    def score(a: CurveAnalysis):
        gap = 0.0 if other_target is None else abs(math.log(a.curve.spec.fixed / other_target))
        return (gap, -len(a.curve.points))
    return min(usable, key=score)


def _far(axis: str, target: int, verdict, key: str) -> str | None:
    top, bottom = verdict.size_max, verdict.size_min
    if target > FAR_FACTOR * top:
        return (f"target {target} is {target / top:.1f}x beyond the largest measured size "
                f"{top:g} on the {axis} axis ({key})")
    if target < bottom:
        return f"target {target} is below the smallest measured size {bottom:g} ({key})"
    return None


def _estimate(curves: _Curves, family: str, w: Workload) -> Estimate:
    """Per-query cost of ``family`` at the workload's target (see the module approximations)."""
    common = dict(family=family, level=w.level, method=w.method, topology=w.topology)
    g = _pick(curves.matching(axis="graph", **common), w.mechanism_size)
    m = _pick(curves.matching(axis="mechanism", **common), w.graph_size)
    if w.topology is None and g is not None and m is not None \
            and g.curve.spec.topology != m.curve.spec.topology:
        same = curves.matching(axis="mechanism", **{**common, "topology": g.curve.spec.topology})
        m = _pick(same, w.graph_size)
    # The primary curve is the one along an axis with a target; graph first.
    if w.graph_size is not None and g is not None:
        primary, p_axis, other, o_axis = g, "graph", m, "mechanism"
    elif w.mechanism_size is not None and m is not None:
        primary, p_axis, other, o_axis = m, "mechanism", g, "graph"
    else:
        missing = "graph" if w.graph_size is not None else "mechanism"
        return Estimate(family, None, None, None, (), "no verdict", "",
                        reason=f"no stored {missing}-axis curve for {family} {w.level} "
                               f"{w.method}" + (f" on {w.topology}" if w.topology else ""))
    key = primary.curve.spec.key()
    p_target = w.target(p_axis)
    o_target = w.target(o_axis)
    o_fixed = primary.curve.spec.fixed      # the other axis's size along the primary curve
    notes, warnings, used = [], [], [key]

    ratio_needed = o_target is not None and o_target != o_fixed
    if ratio_needed and other is None:
        notes.append(f"the {o_axis} target {o_target} differs from the fixed {o_axis} size "
                     f"{o_fixed} of {key}, and no {o_axis}-axis curve was measured: the "
                     f"estimate is at {o_axis} size {o_fixed}")
        ratio_needed = False
    if ratio_needed:
        used.append(other.curve.spec.key())
        notes.append(f"separable-axes approximation: cost({p_axis} {p_target}, {o_axis} "
                     f"{o_target}) ≈ cost along {key} at {p_target} × the ratio of "
                     f"{other.curve.spec.key()} between {o_axis} sizes {o_target} and {o_fixed}")

    def at(kind: str) -> Interval | None:
        v = curves.verdict(primary, kind)
        if v is None:
            return None
        base = _interval_at(v, p_target)
        if not ratio_needed:
            return base
        ov = curves.verdict(other, kind)
        if ov is None:
            return base
        hi = _interval_at(ov, o_target)
        lo = _interval_at(ov, o_fixed)
        # Ratio bands: the target's band over the reference median (the reference point lies
        # inside the measured range, where the fit is tight).
        return Interval(base.median * hi.median / lo.median, base.lower * hi.lower / lo.median,
                        base.upper * hi.upper / lo.median)

    seconds, work, peak = at("time"), at("work"), at("memory")
    factor = primary.typical_factor
    if seconds is not None and factor is not None and factor > 1.0:
        # The time law is fitted on a low statistic of the sweep's repeats; a planner pays
        # for typical ones.
        seconds = Interval(seconds.median * factor, seconds.lower, seconds.upper * factor)
        notes.append(f"{key}: time is fitted on the {primary.time_statistic} of each point's "
                     f"sweep repeats; the central value and upper bound are scaled by "
                     f"{factor:.2f}, the ratio of a typical contiguous repeat to it on the "
                     "machine that measured it (the lower bound is left as fitted)")
    for a, axis, target in ((primary, p_axis, p_target),
                            (other if ratio_needed else None, o_axis, o_target)):
        if a is None or target is None:
            continue
        v = a.time or a.work
        if v is not None:
            far = _far(axis, target, v, a.curve.spec.key())
            if far:
                warnings.append(far)
    if primary.time is not None and primary.time.growth == "inconclusive":
        notes.append(f"{key} is inconclusive by time: the interval is the envelope of the "
                     "power and exponential laws")
    if primary.flags:
        notes.append(f"{key}: " + "; ".join(primary.flags))
    return Estimate(family, seconds, work, peak, tuple(used), format_growth(primary.time),
                    primary.curve.work_unit, tuple(notes), tuple(warnings),
                    reason="" if seconds is not None else f"{key} has no time verdict")


def _families_for_level(level: str, measured: set[str]) -> list[str]:
    """Registered families that can express ``level``, for the 'not measured' list."""
    import model_zoo

    out = []
    for name in model_zoo.names():
        if name in measured:
            continue
        try:
            levels = {str(lv) for lv in model_zoo.get(name).levels}
        except (InputError, ImportError, AttributeError):
            continue
        if level in levels:
            out.append(name)
    return out


def _break_even(curves: _Curves, w: Workload) -> dict[str, Any]:
    """Compile-once circuit vs per-query elimination on a network, at the graph target."""
    if w.level != "associational" or (w.family not in (None, "bayesnet", "circuit")):
        return {"status": "not applicable",
                "note": "compiling a network into a circuit answers associational queries "
                        "of a Bayesian network only"}
    size = w.graph_size
    topo = w.topology
    circ = _pick([a for a in curves.matching(family="circuit", level="associational",
                                             method="exact", axis="graph", topology=topo,
                                             source="bayesnet")], w.mechanism_size)
    ve = None
    if circ is not None:
        ve = _pick(curves.matching(family="bayesnet", level="associational", method="exact",
                                   axis="graph", topology=circ.curve.spec.topology),
                   w.mechanism_size)
    if circ is None or ve is None or size is None:
        return {"status": "not measured",
                "note": "the study has no circuit curve compiled from a Bayesian network "
                        "(circuit with params source='bayesnet') beside a bayesnet exact "
                        "graph-axis curve on the same topology" if size is not None else
                        "no graph target given"}
    compile_v = curves.verdict(circ, "build")
    if compile_v is None or circ.time is None or ve.time is None:
        return {"status": "not measured",
                "note": "the compiled-circuit curve lacks compile times or a time verdict"}
    c = _interval_at(compile_v, size)
    t_c = _interval_at(circ.time, size)
    t_ve = _interval_at(ve.time, size)
    gain = t_ve.median - t_c.median
    out = {"status": "measured", "size": size, "curves": [circ.curve.spec.key(),
                                                          ve.curve.spec.key()],
           "compile_seconds": asdict(c), "circuit_seconds_per_query": asdict(t_c),
           "elimination_seconds_per_query": asdict(t_ve)}
    if gain <= 0:
        out.update(queries_to_break_even=None,
                   note=f"at graph size {size} a compiled circuit is not faster per query than "
                        "elimination: compiling never pays back")
        return out
    n_star = c.median / gain
    best_gain = t_ve.upper - t_c.lower
    worst_gain = t_ve.lower - t_c.upper
    out["queries_to_break_even"] = n_star
    out["queries_to_break_even_range"] = [c.lower / best_gain if best_gain > 0 else None,
                                          c.upper / worst_gain if worst_gain > 0 else None]
    verdict = "compile once" if w.n_queries > n_star else "eliminate per query"
    out["advice"] = verdict
    out["note"] = (f"compiling takes about {c.median:.3g} s at graph size {size} and saves "
                   f"{gain:.3g} s per query: it pays back after about {n_star:,.0f} queries; "
                   f"the workload has {w.n_queries:,} -> {verdict}")
    return out


def plan_workload(result: StudyResult, workload: Workload, *,
                  analyses: Sequence[CurveAnalysis] | None = None) -> Plan:
    """Extrapolate the stored curves to a workload's target and judge its budget.

    Parameters
    ----------
    result
        A stored study.
    workload
        What will be asked and with what budget.
    analyses
        Precomputed :func:`profiler.analysis.analyse_study` output (optional).

    Returns
    -------
    Plan

    Notes
    -----
    O(curves) fits (done once by the analysis) plus a few predictions per family.
    """
    w = workload
    curves = _Curves(analyses if analyses is not None else analyse_study(result))
    measured = sorted({a.curve.spec.family for a in curves.analyses
                       if (a.curve.spec.level, a.curve.spec.method) == (w.level, w.method)
                       and (w.topology is None or a.curve.spec.topology == w.topology)})
    estimates = {f: _estimate(curves, f, w) for f in measured}
    if w.family is not None and w.family not in estimates:
        estimates[w.family] = Estimate(
            w.family, None, None, None, (), "no verdict", "",
            reason=f"the study has no {w.level} {w.method} curve of {w.family}"
                   + (f" on {w.topology}" if w.topology else ""))
    ranked = sorted((e for e in estimates.values() if e.seconds is not None),
                    key=lambda e: e.seconds.median)
    ranking = [{"rank": i + 1, "family": e.family, "seconds_per_query": asdict(e.seconds),
                "growth": e.growth, "curves": list(e.curves), "note": "; ".join(e.warnings)}
               for i, e in enumerate(ranked)]
    ranking += [{"rank": None, "family": e.family, "seconds_per_query": None,
                 "growth": e.growth, "curves": list(e.curves), "note": e.reason}
                for e in estimates.values() if e.seconds is None]
    ranking += [{"rank": None, "family": f, "seconds_per_query": None, "growth": "",
                 "curves": [], "note": "can express this level; not measured in this study"}
                for f in _families_for_level(w.level, set(estimates))]

    family = w.family if w.family is not None else (ranked[0].family if ranked else None)
    est = estimates.get(family) if family is not None else None
    cap = w.capacity_core_seconds
    notes: list[str] = ["queries are taken as independent, one core each; memory is one "
                        "worker's peak times the cores running at once"]
    if w.family is None and family is not None:
        notes.append(f"no family named: planning for the best-ranked, {family}")
    warnings = list(est.warnings) if est else []
    total = wall = total_work = memory = None
    fits, fits_note = "unknown", "no estimate"
    if est is not None and est.seconds is not None:
        total = est.seconds.scaled(w.n_queries)
        wall = total.scaled(1.0 / w.cores)
        total_work = est.work.scaled(w.n_queries) if est.work else None
        memory = est.peak_bytes.scaled(w.cores) if est.peak_bytes else None
        notes.extend(est.notes)
        if cap is None:
            fits, fits_note = "no budget", "no budget given"
        elif total.upper <= cap:
            fits, fits_note = "yes", (f"even the upper bound {total.upper:.3g} core-s is within "
                                      f"the {cap:.3g} core-s budget")
        elif total.lower > cap:
            fits, fits_note = "no", (f"even the lower bound {total.lower:.3g} core-s exceeds "
                                     f"the {cap:.3g} core-s budget")
        else:
            fits, fits_note = "uncertain", (f"the budget {cap:.3g} core-s lies inside the "
                                            f"interval [{total.lower:.3g}, {total.upper:.3g}] "
                                            "core-s")
        if w.memory_mb is not None and est.peak_bytes is not None:
            need_mb = est.peak_bytes.upper / 2**20
            if need_mb > w.memory_mb:
                warnings.append(f"a worker may need up to {need_mb:.0f} MB, more than the "
                                f"{w.memory_mb:g} MB available")
                if fits == "yes":
                    fits, fits_note = "uncertain", fits_note + "; memory may not suffice"
    elif est is not None:
        fits_note = est.reason

    largest: dict[str, dict[str, Any]] = {}
    if cap is not None and family is not None:
        limit = cap / w.n_queries
        for axis, other_axis in (("graph", "mechanism"), ("mechanism", "graph")):
            cands = curves.matching(family=family, level=w.level, method=w.method, axis=axis,
                                    topology=w.topology)
            a = _pick(cands, w.target(other_axis))
            if a is None or a.time is None:
                largest[axis] = {"size": None,
                                 "note": f"no {axis}-axis curve with a time verdict"}
                continue
            axis_limit, at_other = limit, f"{other_axis} size {a.curve.spec.fixed}"
            o_target = w.target(other_axis)
            o = _pick(curves.matching(family=family, level=w.level, method=w.method,
                                      axis=other_axis, topology=a.curve.spec.topology),
                      w.target(axis))
            if o_target is not None and o_target != a.curve.spec.fixed and o is not None \
                    and o.time is not None:
                # Same separable-axes approximation as the estimate: the other axis's ratio.
                ratio = (_interval_at(o.time, o_target).median
                         / _interval_at(o.time, a.curve.spec.fixed).median)
                axis_limit = limit / ratio
                at_other = (f"{other_axis} size {o_target} (x{ratio:.3g} from "
                            f"{o.curve.spec.key()})")
            size = _largest(a.time, axis_limit)
            if size is not None and math.isinf(size):
                largest[axis] = {"size": None, "unbounded": True, "curve": a.curve.spec.key(),
                                 "fixed": a.curve.spec.fixed, "seconds_per_query_limit": limit,
                                 "note": "the fitted per-query time stays within the limit at "
                                         "every size the fitter searched (up to 1e12)"}
                continue
            note = (f"largest {axis} size whose upper 95% per-query time fits {limit:.3g} s, "
                    f"at {at_other}, from {a.curve.spec.key()}")
            if size is not None and size > FAR_FACTOR * a.time.size_max:
                note += (f"; {size / a.time.size_max:.1f}x beyond the largest measured size "
                         f"{a.time.size_max:g}")
            largest[axis] = {"size": None if size is None else int(math.floor(size)),
                             "curve": a.curve.spec.key(), "fixed": a.curve.spec.fixed,
                             "seconds_per_query_limit": limit, "note": note if size is not None
                             else note + ": not even the smallest size fits"}
    return Plan(workload=w, family=family, estimate=est, total_core_seconds=total,
                wall_seconds=wall, total_work=total_work, memory_bytes=memory,
                capacity_core_seconds=cap, fits=fits, fits_note=fits_note,
                largest_feasible=largest, ranking=tuple(ranking),
                break_even=_break_even(curves, w), warnings=tuple(warnings),
                notes=tuple(notes))


# -- text -------------------------------------------------------------------------------------

def _iv(i: Interval | None, unit: str = "", fmt: str = ".3g") -> str:
    if i is None:
        return "not available"
    return f"{i.median:{fmt}}{unit} [{i.lower:{fmt}}, {i.upper:{fmt}}]"


def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.3g} s"
    if seconds < 7200:
        return f"{seconds / 60:.3g} min"
    if seconds < 2 * 86400:
        return f"{seconds / 3600:.3g} h"
    return f"{seconds / 86400:.3g} days"


def format_plan(plan: Plan) -> str:
    """The plan as terminal text (the CLI prints it as is)."""
    w = plan.workload
    tgt = ", ".join(f"{a} {w.target(a)}" for a in ("graph", "mechanism")
                    if w.target(a) is not None)
    lines = [f"Workload{(' ' + w.name) if w.name else ''}: {w.n_queries:,} {w.level} "
             f"{w.method} queries at {tgt}"
             + (f" on {w.topology}" if w.topology else "")
             + f", family {plan.family or 'none measured'}"]
    if w.note:
        lines.append(f'  note: "{w.note}"')
    e = plan.estimate
    if e is None or e.seconds is None:
        lines.append(f"No estimate: {plan.fits_note}")
    else:
        lines += [f"Per query (95% prediction interval): {_iv(e.seconds, ' s')}; work "
                  f"{_iv(e.work)} {e.work_unit}; peak memory "
                  f"{_iv(e.peak_bytes and e.peak_bytes.scaled(2**-20), ' MB')}",
                  f"  growth by time: {e.growth}; curves: {', '.join(e.curves)}",
                  f"Total: {_iv(plan.total_core_seconds, ' core-s')}; wall on {w.cores} "
                  f"core(s): {_duration(plan.wall_seconds.median)} "
                  f"[{_duration(plan.wall_seconds.lower)}, {_duration(plan.wall_seconds.upper)}]"]
        if plan.memory_bytes is not None:
            lines.append(f"Memory with {w.cores} worker(s) at once: "
                         f"{_iv(plan.memory_bytes.scaled(2**-20), ' MB')}")
    cap = plan.capacity_core_seconds
    lines.append(f"Fits the budget: {plan.fits}"
                 + (f" (budget {cap:.3g} core-s)" if cap is not None else "")
                 + f" — {plan.fits_note}")
    for axis, info in plan.largest_feasible.items():
        size = info.get("size")
        lines.append(f"Largest feasible {axis} size: {size if size is not None else 'none'}"
                     f" — {info['note']}")
    if plan.ranking:
        lines.append("Families for this level, fastest first (median seconds per query at the "
                     "target):")
        for r in plan.ranking:
            s = r["seconds_per_query"]
            cost = "—" if s is None else \
                f"{s['median']:.3g} s [{s['lower']:.3g}, {s['upper']:.3g}]"
            rank = f"{r['rank']}." if r["rank"] else "-"
            lines.append(f"  {rank} {r['family']}: {cost}  {r['growth']}"
                         + (f"  ({r['note']})" if r["note"] else ""))
    lines.append(f"Compile-once break-even: {plan.break_even.get('status')} — "
                 f"{plan.break_even.get('note', '')}")
    for wmsg in plan.warnings:
        lines.append(f"WARNING: {wmsg}")
    for n in plan.notes:
        lines.append(f"note: {n}")
    lines.append(f"Caution: {plan.caution}")
    return "\n".join(lines)
