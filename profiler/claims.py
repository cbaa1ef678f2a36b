"""Claim checks for reviewers: judge scalability statements against stored curves.

A claims file (TOML) lists ``[[claim]]`` tables, each naming a curve — ``family``, ``level``,
``method``, ``axis``, ``topology`` and optionally ``fixed`` (the other axis's size) — and one or
more statements about it:

``growth = "polynomial" | "exponential"``
    The growth class on the measured range.
``max_degree = 1.2``
    Polynomial with degree at most this.
``min_base = 1.5``
    Exponential with base per unit of size at least this.
``max_seconds_at = {size = 200, seconds = 0.01}``
    At most this many seconds per query at that size.

Optional keys: ``note`` (quoted in the verdict sentence), ``cost = "work" | "time"`` (what the
shape statements are judged on; default ``"work"``, the machine-independent count — ``time`` is
used whenever work has no verdict; ``max_seconds_at`` is always judged on time).

Each claim is ``holds``, ``fails`` or ``undecided``, judged from the 95% intervals:

* ``growth``: holds when the verdict is that class, fails when it is the other class, undecided
  when inconclusive;
* ``max_degree``: holds when the verdict is polynomial and the degree's upper bound is
  <= max_degree; fails when the degree's lower bound is > max_degree or the verdict is
  exponential; undecided otherwise;
* ``min_base``: holds when the verdict is exponential and the base's lower bound is >= min_base;
  fails when the base's upper bound is < min_base or the verdict is polynomial; undecided
  otherwise (a stretched exponential has no constant base: undecided);
* ``max_seconds_at``: holds when the upper prediction bound at that size is <= seconds, fails
  when the lower bound is > seconds, undecided otherwise;
* a claim with several statements fails when any fails, holds when all hold.

Exit codes (for the command line): 0 when every claim holds, 1 when any fails, 2 on a malformed
file. Undecided claims alone exit 0 (the evidence does not refute them) but are reported as
undecided; ``strict=True`` in :func:`exit_code` makes them exit 1 as well.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

from profiler.analysis import (CAUTION, CurveAnalysis, analyse_curve, format_growth,
                               format_range)
from profiler.errors import InputError
from profiler.records import CurveResult, CurveSpec, StudyResult

__all__ = ["Claim", "ClaimVerdict", "load_claims", "claims_from_list", "judge_claims",
           "missing_curves", "check_claims", "check_claims_file", "exit_code", "format_claims",
           "STATUSES"]

STATUSES = ("holds", "fails", "undecided")
_LEVELS = ("associational", "interventional", "counterfactual")
_METHODS = ("exact", "sampling")
_AXES = ("graph", "mechanism")
_TOPOLOGIES = ("chain", "tree", "grid", "random", "layered")
_KEYS = {"family", "level", "method", "axis", "topology", "fixed", "growth", "max_degree",
         "min_base", "max_seconds_at", "note", "cost", "queries", "sizes"}


@dataclass(frozen=True)
class Claim:
    """One statement about one curve (see the module docstring for the keys)."""

    number: int
    family: str
    level: str
    method: str
    axis: str
    topology: str
    fixed: int | None = None
    growth: str | None = None
    max_degree: float | None = None
    min_base: float | None = None
    max_seconds_at: tuple[float, float] | None = None     # (size, seconds)
    note: str = ""
    cost: str = "work"
    source: str = ""

    def curve_words(self) -> str:
        """``neural_scm counterfactual exact on the graph axis (chain)``."""
        fixed = f", other axis {self.fixed}" if self.fixed is not None else ""
        return (f"{self.family} {self.level} {self.method} on the {self.axis} axis "
                f"({self.topology}{fixed})")

    def matches(self, spec: CurveSpec) -> bool:
        return ((spec.family, spec.level, spec.method, spec.axis, spec.topology)
                == (self.family, self.level, self.method, self.axis, self.topology)
                and (self.fixed is None or spec.fixed == self.fixed))


@dataclass(frozen=True)
class ClaimVerdict:
    """How one claim fared, with the evidence and a sentence to paste into a review."""

    claim: Claim
    status: str                       # holds | fails | undecided
    checks: tuple[dict[str, Any], ...]   # one per statement: {statement, status, reason}
    curve: str | None                 # key of the curve used
    evidence: dict[str, Any]          # growth text, verdict dict, sizes, points used
    sentence: str

    def to_dict(self) -> dict[str, Any]:
        c = self.claim
        return {"claim": c.number, "status": self.status, "curve": self.curve,
                "statement": {k: v for k, v in (
                    ("family", c.family), ("level", c.level), ("method", c.method),
                    ("axis", c.axis), ("topology", c.topology), ("fixed", c.fixed),
                    ("growth", c.growth), ("max_degree", c.max_degree),
                    ("min_base", c.min_base),
                    ("max_seconds_at", None if c.max_seconds_at is None else
                     {"size": c.max_seconds_at[0], "seconds": c.max_seconds_at[1]}),
                    ("cost", c.cost), ("note", c.note)) if v not in (None, "")},
                "checks": [dict(x) for x in self.checks], "evidence": self.evidence,
                "sentence": self.sentence}


# -- reading ----------------------------------------------------------------------------------

def _num(where: str, key: str, v: Any, *, positive: bool = True) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) \
            or (positive and v <= 0):
        raise InputError.at(where, key, "a positive number", v)
    return float(v)


def _choice(where: str, key: str, v: Any, options: Sequence[str]) -> str:
    if v not in options:
        raise InputError.at(where, key, " | ".join(options), v)
    return v


def claims_from_list(items: Any, *, source: str = "claims") -> list[Claim]:
    """Validate a list of claim tables (the ``claim`` array of a claims file).

    Raises
    ------
    InputError
        Naming the source, the claim number and the field, with what was expected.
    """
    if not isinstance(items, list) or not items:
        raise InputError.at(source, "claim", "one or more [[claim]] tables", items)
    out = []
    for i, d in enumerate(items, start=1):
        where = f"{source}: claim {i}"
        if not isinstance(d, dict):
            raise InputError.at(where, None, "a table", d)
        unknown = sorted(set(d) - _KEYS)
        if unknown:
            raise InputError.at(where, unknown[0], f"one of {', '.join(sorted(_KEYS))}",
                                unknown[0])
        for key in ("family", "level", "method", "axis", "topology"):
            if not isinstance(d.get(key), str) or not d.get(key):
                raise InputError.at(where, key, "a non-empty string", d.get(key))
        _choice(where, "level", d["level"], _LEVELS)
        _choice(where, "method", d["method"], _METHODS)
        _choice(where, "axis", d["axis"], _AXES)
        if not re.fullmatch(r"[A-Za-z][A-Za-z0-9_-]*", d["topology"]):
            # Families may list their own shapes (a circuit's "balanced"), so only the spelling
            # is checked here; an unknown shape simply matches no stored curve.
            raise InputError.at(where, "topology", "a shape name such as "
                                + ", ".join(_TOPOLOGIES), d["topology"])
        fixed = d.get("fixed")
        if fixed is not None and (isinstance(fixed, bool) or not isinstance(fixed, int)
                                  or fixed < 1):
            raise InputError.at(where, "fixed", "an integer >= 1", fixed)
        growth = d.get("growth")
        if growth is not None:
            _choice(where, "growth", growth, ("polynomial", "exponential"))
        max_degree = None if d.get("max_degree") is None else \
            _num(where, "max_degree", d["max_degree"])
        min_base = None if d.get("min_base") is None else _num(where, "min_base", d["min_base"])
        if min_base is not None and min_base <= 1:
            raise InputError.at(where, "min_base", "a base > 1 (growth per unit of size)",
                                min_base)
        msa = d.get("max_seconds_at")
        if msa is not None:
            if not isinstance(msa, dict) or set(msa) != {"size", "seconds"}:
                raise InputError.at(where, "max_seconds_at",
                                    "a table {size = N, seconds = S}", msa)
            size = _num(where, "max_seconds_at.size", msa["size"])
            if size < 1:
                raise InputError.at(where, "max_seconds_at.size", "a size >= 1", msa["size"])
            msa = (size, _num(where, "max_seconds_at.seconds", msa["seconds"]))
        if growth is None and max_degree is None and min_base is None and msa is None:
            raise InputError.at(where, None, "at least one of growth, max_degree, min_base, "
                                "max_seconds_at", "none")
        note = d.get("note", "")
        if not isinstance(note, str):
            raise InputError.at(where, "note", "a string", note)
        cost = _choice(where, "cost", d.get("cost", "work"), ("work", "time"))
        out.append(Claim(number=i, family=d["family"], level=d["level"], method=d["method"],
                         axis=d["axis"], topology=d["topology"], fixed=fixed, growth=growth,
                         max_degree=max_degree, min_base=min_base, max_seconds_at=msa,
                         note=note, cost=cost, source=source))
    return out


def load_claims(path: str | Path) -> list[Claim]:
    """Read a claims TOML file (``[[claim]]`` tables; see the module docstring).

    Raises
    ------
    InputError
        Missing/unreadable file, bad TOML, or a bad field — one line naming file and field.
    """
    from profiler.study import read_toml

    p = Path(path)
    data = read_toml(p, "claims file")
    extra = sorted(set(data) - {"claim", "title", "note", "study"})
    if extra:
        raise InputError.at(str(p), extra[0], "only [[claim]] tables (and title/note/study)",
                            extra[0])
    return claims_from_list(data.get("claim"), source=str(p))


# -- judging ----------------------------------------------------------------------------------

def _results(result: StudyResult | Sequence[StudyResult] | None) -> list[StudyResult]:
    if result is None:
        return []
    if isinstance(result, StudyResult):
        return [result]
    return list(result)


def _find_curve(claim: Claim, results: Sequence[StudyResult]) -> CurveResult | None:
    """The best-covered matching curve (most ok points, then largest size); ties: latest study."""
    found = [c for r in reversed(results) for c in r.curves if claim.matches(c.spec)]
    if not found:
        return None

    def score(c: CurveResult):
        ok = [p.size for p in c.points if p.status == "ok"]
        return (len(ok), max(ok, default=0))
    return max(found, key=score)


def _ci_text(ci) -> str:
    return "" if not ci else f"[{ci[0]:.2f}, {ci[1]:.2f}]"


def _judge_growth(claimed: str, v) -> tuple[str, str]:
    if v.growth == claimed:
        return "holds", f"measured {v.growth}"
    if v.growth == "inconclusive":
        lean = f", leaning {v.leaning}" if v.leaning else ""
        return "undecided", f"measured inconclusive{lean}"
    return "fails", f"measured {v.growth}"


def _judge_degree(max_degree: float, v) -> tuple[str, str]:
    if v.growth == "exponential":
        return "fails", "measured exponential: no polynomial degree bounds it on this range"
    if v.degree_ci is None:
        return "undecided", "no degree interval"
    lo, hi = v.degree_ci
    if lo > max_degree:
        return "fails", f"degree interval {_ci_text(v.degree_ci)} lies above {max_degree:g}"
    if v.growth == "polynomial" and hi <= max_degree:
        return "holds", f"degree interval {_ci_text(v.degree_ci)} lies at or below {max_degree:g}"
    if v.growth != "polynomial":
        return "undecided", f"growth class inconclusive (degree interval {_ci_text(v.degree_ci)})"
    return "undecided", f"degree interval {_ci_text(v.degree_ci)} straddles {max_degree:g}"


def _judge_base(min_base: float, v) -> tuple[str, str]:
    if v.growth == "polynomial":
        return "fails", "measured polynomial: slower than any exponential base > 1"
    if v.base_ci is None:
        why = "stretched exponential: no constant base" if v.gamma is not None else \
            "no base interval"
        return "undecided", why
    lo, hi = v.base_ci
    if hi < min_base:
        return "fails", f"base interval {_ci_text(v.base_ci)} lies below {min_base:g}"
    if v.growth == "exponential" and lo >= min_base:
        return "holds", f"base interval {_ci_text(v.base_ci)} lies at or above {min_base:g}"
    if v.growth != "exponential":
        return "undecided", f"growth class inconclusive (base interval {_ci_text(v.base_ci)})"
    return "undecided", f"base interval {_ci_text(v.base_ci)} straddles {min_base:g}"


def _judge_seconds(size: float, seconds: float, v) -> tuple[str, str, dict[str, Any]]:
    from profiler.fitter import predict

    p = predict(v, [size])
    med, lo, hi = float(p.median[0]), float(p.lower[0]), float(p.upper[0])
    info = {"size": size, "median": med, "lower": lo, "upper": hi, "law": p.law}
    where = "" if size <= v.size_max else (f"; {size / v.size_max:.1f}x beyond the largest "
                                           f"measured size {v.size_max:g}")
    band = f"predicted {med:.3g} s [{lo:.3g}, {hi:.3g}] per query at size {size:g}{where}"
    if hi <= seconds:
        return "holds", band, info
    if lo > seconds:
        return "fails", band, info
    return "undecided", band + f", straddling {seconds:g} s", info


def _evidence_text(v, by: str) -> str:
    return (f"{format_growth(v, next_sizes=False)} over {format_range(v)} "
            f"(Λ = {v.lambda_:.1f}) by {by}")


def _claimed_words(c: Claim) -> str:
    parts = []
    if c.growth:
        parts.append(c.growth)
    if c.max_degree is not None:
        parts.append(("" if c.growth else "polynomial ") + f"of degree at most {c.max_degree:g}")
    if c.min_base is not None:
        parts.append(f"exponential with base at least {c.min_base:g}")
    if c.max_seconds_at is not None:
        parts.append(f"at most {c.max_seconds_at[1]:g} s per query at size "
                     f"{c.max_seconds_at[0]:g}")
    return ", ".join(parts)


def _judge_one(claim: Claim, results: Sequence[StudyResult],
               cache: dict[int, CurveAnalysis]) -> ClaimVerdict:
    curve = _find_curve(claim, results)
    head = f"Claim {claim.number}"
    quote = f' Note: "{claim.note}"' if claim.note else ""
    if curve is None:
        sentence = (f"{head} is undecided: no stored curve for {claim.curve_words()}; "
                    f"it was claimed {_claimed_words(claim)}.{quote}")
        return ClaimVerdict(claim, "undecided", (), None, {"reason": "no matching curve"},
                            sentence)
    a = cache.get(id(curve))
    if a is None:
        a = cache[id(curve)] = analyse_curve(curve)
    key = curve.spec.key()
    ok_sizes = sorted(p.size for p in curve.points if p.status == "ok")
    shape_v, shape_by = (a.work, "work") if claim.cost == "work" else (a.time, "time")
    if shape_v is None:
        shape_v, shape_by = (a.time, "time") if claim.cost == "work" else (a.work, "work")
    checks: list[dict[str, Any]] = []

    def add(statement: str, status: str, reason: str, **extra: Any) -> None:
        checks.append({"statement": statement, "status": status, "reason": reason, **extra})

    shape_statements = [(n, x) for n, x in (("growth", claim.growth),
                                            ("max_degree", claim.max_degree),
                                            ("min_base", claim.min_base)) if x is not None]
    for name, value in shape_statements:
        text = f"{name} = {value!r}" if name == "growth" else f"{name} = {value:g}"
        if shape_v is None:
            add(text, "undecided", "no verdict: " + ("; ".join(a.flags) or "too few points"))
            continue
        judge = {"growth": _judge_growth, "max_degree": _judge_degree,
                 "min_base": _judge_base}[name]
        status, reason = judge(value, shape_v)
        add(text, status, reason, by=shape_by)
    if claim.max_seconds_at is not None:
        size, seconds = claim.max_seconds_at
        text = f"max_seconds_at = {{size = {size:g}, seconds = {seconds:g}}}"
        if a.time is None:
            add(text, "undecided", "no time verdict: " + ("; ".join(a.flags) or "too few points"))
        else:
            status, reason, info = _judge_seconds(size, seconds, a.time)
            add(text, status, reason, by="time", prediction=info)

    statuses = [c["status"] for c in checks]
    status = "fails" if "fails" in statuses else "holds" if statuses and all(
        s == "holds" for s in statuses) else "undecided"
    main = shape_v if shape_statements else a.time
    evidence: dict[str, Any] = {
        "curve": key, "by": shape_by if shape_statements else "time",
        "growth": format_growth(main), "verdict": None if main is None else main.to_dict(),
        "sizes_ok": ok_sizes, "n_points": len(curve.points),
        "flags": list(a.flags), "theory": a.theory, "agreement": a.agreement,
    }
    if main is not None:
        measured = f"measured {_evidence_text(main, evidence['by'])}"
    else:
        measured = "no verdict could be fitted (" + ("; ".join(a.flags) or "too few points") + ")"
    decisive = [c for c in checks if c["status"] == status] or checks
    why = "; ".join(c["reason"] for c in decisive)
    settle = ""
    if main is not None and main.growth == "inconclusive" and main.next_sizes:
        settle = (" Sizes that would settle the class: "
                  + ", ".join(str(int(n)) for n in main.next_sizes) + ".")
    sentence = (f"{head} {status}: {claim.curve_words()} was claimed {_claimed_words(claim)}; "
                f"{measured}" + (f" — {why}" if why and not why.startswith("measured") else "")
                + f".{settle}{quote}")
    return ClaimVerdict(claim, status, tuple(checks), key, evidence, sentence)


def judge_claims(claims: Sequence[Claim],
                 result: StudyResult | Sequence[StudyResult] | None) -> list[ClaimVerdict]:
    """Judge every claim against stored curves (never runs anything).

    Parameters
    ----------
    claims
        From :func:`load_claims`.
    result
        A stored study, several (the latest matching curve wins ties), or None (every claim
        is then undecided: no curve).

    Returns
    -------
    list of ClaimVerdict
        In claim order.

    Notes
    -----
    One analysis (three fits) per distinct curve used.
    """
    results = _results(result)
    cache: dict[int, CurveAnalysis] = {}
    return [_judge_one(c, results, cache) for c in claims]


def missing_curves(claims: Sequence[Claim],
                   result: StudyResult | Sequence[StudyResult] | None, *,
                   default_fixed: dict[str, int] | None = None,
                   queries: int = 10) -> list[CurveSpec]:
    """Curve specs that would have to be measured for claims with no stored curve.

    ``fixed`` comes from the claim, else ``default_fixed[axis]`` (default: 2 on both axes — the
    smallest non-trivial size of the other axis); sizes are left to the schedule (``auto``),
    but a ``max_seconds_at`` size bounds the schedule from above when on the same axis.
    Duplicates are merged.
    """
    results = _results(result)
    fixed_for = {"graph": 2, "mechanism": 2, **(default_fixed or {})}
    specs: dict[str, CurveSpec] = {}
    for c in claims:
        if _find_curve(c, results) is not None:
            continue
        fixed = c.fixed if c.fixed is not None else fixed_for[c.axis]
        spec = CurveSpec(family=c.family, level=c.level, method=c.method, axis=c.axis,
                         topology=c.topology, fixed=fixed, queries=queries)
        specs.setdefault(spec.key(), spec)
    return list(specs.values())


def check_claims(claims: Sequence[Claim],
                 result: StudyResult | Sequence[StudyResult] | None, *,
                 run_missing: bool = True, store: str | Path = "reports/infercost.sqlite",
                 quick: bool = True, budget_s: float = 120.0, on_event=None,
                 name: str = "claims-check") -> tuple[list[ClaimVerdict], StudyResult | None]:
    """Judge claims, first measuring the curves no stored study has (when ``run_missing``).

    Returns the verdicts and the study that was run for the missing curves (None if none ran).
    Measuring goes through :func:`profiler.runner.run_study`, so the new points are stored.
    """
    results = _results(result)
    extra = None
    todo = missing_curves(claims, results) if run_missing else []
    if todo:
        from profiler.records import StudySpec
        from profiler.runner import run_study

        spec = StudySpec(name=name, curves=tuple(todo), budget_s=budget_s,
                         description="curves measured by `infercost check` for claims that "
                                     "no stored study covered")
        extra = run_study(spec, store=store, quick=quick, on_event=on_event)
        results.append(extra)
    return judge_claims(claims, results), extra


def check_claims_file(path: str | Path, *, store: str | Path = "reports/infercost.sqlite",
                      study: str | None = None, run_missing: bool = True,
                      budget_s: float = 120.0, quick: bool = True,
                      on_event=None) -> list[ClaimVerdict]:
    """What ``infercost check CLAIMS.toml`` does: read, find the stored curves, judge.

    Parameters
    ----------
    path
        The claims file.
    store
        The results store. When it does not exist yet and ``run_missing`` is set, the missing
        curves are measured into it.
    study
        A stored study name or id; None uses every study in the store (latest first).
    run_missing
        Measure (quick schedule, ``budget_s`` seconds) the curves no stored study has.

    Raises
    ------
    InputError
        Malformed claims file, unknown study, or a corrupt store.
    """
    from profiler.store import Store

    claims = load_claims(path)
    results: list[StudyResult] = []
    store_path = Path(store)
    if study is not None or store_path.exists():
        with Store(store_path, create=False) as st:
            if study is not None:
                results = [st.load_study(study)]
            else:
                results = [st.load_study(s["study_id"]) for s in st.studies()]
    verdicts, _ = check_claims(claims, results, run_missing=run_missing, store=store_path,
                               quick=quick, budget_s=budget_s, on_event=on_event)
    return verdicts


def exit_code(verdicts: Sequence[ClaimVerdict], *, strict: bool = False) -> int:
    """0 when nothing fails (claims hold, or unless ``strict`` are undecided), else 1."""
    if any(v.status == "fails" for v in verdicts):
        return 1
    if strict and any(v.status != "holds" for v in verdicts):
        return 1
    return 0


def format_claims(verdicts: Sequence[ClaimVerdict]) -> str:
    """Terminal text: one pasteable sentence per claim, a tally and the caution line."""
    lines = [v.sentence for v in verdicts]
    tally = {s: sum(v.status == s for v in verdicts) for s in STATUSES}
    lines.append(f"{tally['holds']} hold, {tally['fails']} fail, {tally['undecided']} undecided.")
    lines.append(f"Caution: {CAUTION}")
    return "\n".join(lines)
