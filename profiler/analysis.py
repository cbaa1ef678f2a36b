"""Turn a stored curve into verdicts: by work, by time, by the engine's own prediction.

This is the one place where points become fitter input. The rules are:

* ``ok`` points are fitted as measured; censored points (``timeout``, ``memory``) enter as
  censored observations whose value is a lower bound (the fitter handles them by Tobit
  likelihood); ``error`` points are left out and flagged;
* a single ``wrong`` point voids the curve's measured verdicts: a fast wrong answer is not a
  result, so ``work`` and ``time`` are None and a flag says why;
* by time, each point's cost is one statistic of its repeats in the curve's interleaved sweep
  (its contiguous repeats when it had none), the same statistic for every point of a curve:
  the fastest, the lower quartile or the median, whichever varies least between random
  halves of each point's repeats (:func:`time_statistic`; chosen without looking at any
  growth fit).
  Interference on a shared machine only adds time; on a quiet machine the fastest repeat sits
  on a sharp floor and is the steadiest, on a busy one the slow spells are dense and a middle
  quantile is. Every size's sweep repeats share the same spells, so any fixed quantile scales
  all sizes alike. No repeats are passed to the fitter (the statistic already summarises
  them), so intervals come from the profile likelihood. :attr:`CurveAnalysis.typical_factor`
  (median over points of the contiguous median / the fitted cost) says how much slower a
  typical repeat was, for planners;
  by work, the mean work per query is used (work is deterministic);
* a decided time verdict whose class differs from a decided work verdict is downgraded to
  ``inconclusive`` (leaning its own way): over a limited range, fixed overheads and the memory
  hierarchy bend a time curve (seconds per unit of work changing a few-fold with size) enough
  to pass for the other class, while time is work times the cost of a unit; the reason names
  the spread of seconds per unit of work so a reviewer can judge (a large one says the work
  count misses a cost);
* the *predicted* verdict is the same fit on the family's ``predicted_work`` at the measured
  sizes (censored points included: a formula needs no run), and the theory-vs-measurement
  agreement comes from :func:`profiler.audit.compare_with_theory`.

It imports only the fitter, the audit comparison, the records and the seeded random generator
of `model_zoo.base`; no model is ever built here.
"""

from __future__ import annotations

import math
import statistics
from dataclasses import dataclass, replace
from typing import Iterable, Sequence

from profiler.errors import FitError
from profiler.records import CurveResult, Point, StudyResult

__all__ = ["CurveAnalysis", "analyse_curve", "analyse_study", "MIN_POINTS", "fit_series",
           "time_statistic", "time_cost", "TIME_STATISTICS",
           "CAUTION", "competing_laws", "format_growth", "format_law", "format_confidence",
           "format_range"]

#: The sentence every report, plan and claim check carries about what a growth class means.
CAUTION = ("Growth classes are empirical evidence on the measured range of sizes, not proofs; "
           "extrapolation beyond the largest measured size is uncertain, and more so the "
           "farther it goes.")

#: Fewer distinct sizes than this and no verdict is attempted (two laws with two parameters
#: each need at least one spare point to be told apart).
MIN_POINTS = 3


@dataclass(frozen=True)
class CurveAnalysis:
    """What the analysis says about one curve.

    Attributes
    ----------
    curve
        The stored curve analysed.
    work, time
        The fitter's :class:`~profiler.fitter.Verdict` on work per query and on seconds per
        query; None when the curve has a wrong point or too few usable points.
    predicted
        The verdict on the family's predicted work at the measured sizes (None when the family
        gave no prediction at enough sizes).
    theory
        The family's ``expected_growth`` for the curve (None when theory is silent).
    agreement, agreement_note
        ``"agrees" | "disagrees" | "undecided" | "no theory"`` and a sentence for the report.
    flags
        Plain phrases about the points: censored counts, wrong answers, errors, budget cuts.
    typical_factor
        Median over the ``ok`` points of ``seconds_median`` over the cost the time verdict was
        fitted on: how much slower a typical contiguous repeat ran. None without timed points.
    time_statistic
        Which statistic of each point's repeats the time verdict was fitted on:
        ``"fastest"``, ``"lower quartile"`` or ``"median"`` (:func:`time_statistic`).
    """

    curve: CurveResult
    work: object | None
    time: object | None
    predicted: object | None
    theory: str | None
    agreement: str
    agreement_note: str
    flags: tuple[str, ...]
    typical_factor: float | None = None
    time_statistic: str = "fastest"

    @property
    def key(self) -> str:
        """The curve's readable key, ``family/level/method/axis/topology@fixed``."""
        return self.curve.spec.key()


def _finite_positive(value: float | None) -> bool:
    return value is not None and math.isfinite(value) and value > 0


def fit_series(sizes: Sequence[float], costs: Sequence[float], censored: Sequence[bool],
               *, repeats: Sequence[Sequence[float]] | None = None, seed: int = 0):
    """Fit one (size, cost, censored) series, or return None with the reason.

    Parameters
    ----------
    sizes, costs, censored
        Aligned sequences; censored costs are lower bounds.
    repeats
        Per-point repeat costs (same order), or None.
    seed
        Seed for the fitter's interval resampling.

    Returns
    -------
    tuple
        ``(verdict | None, reason | None)``; the reason says why no verdict was attempted.

    Notes
    -----
    Cost is that of :func:`profiler.fitter.fit_growth`, a few maximum-likelihood fits over
    ``len(sizes)`` points; the series itself is O(n).
    """
    from profiler.fitter import fit_growth

    n_uncensored_sizes = len({s for s, c in zip(sizes, censored) if not c})
    if len(set(sizes)) < MIN_POINTS or n_uncensored_sizes < 2:
        return None, f"too few points for a fit ({n_uncensored_sizes} measured, need {MIN_POINTS})"
    kwargs = {"censored": list(censored), "seed": seed}
    if repeats is not None:
        kwargs["repeats"] = [tuple(r) for r in repeats]
    try:
        return fit_growth(list(sizes), list(costs), **kwargs), None
    except FitError as exc:
        return None, f"no fit: {exc}"


def _work_series(points: Iterable[Point]):
    sizes, costs, cens = [], [], []
    n_dropped = 0
    for p in points:
        if p.status == "ok" and _finite_positive(p.work):
            sizes.append(p.size); costs.append(float(p.work)); cens.append(False)
        elif p.is_censored:
            # A killed point may carry the work counted so far, a valid lower bound; without it
            # nothing is known about its work and it cannot enter the work fit.
            if _finite_positive(p.work):
                sizes.append(p.size); costs.append(float(p.work)); cens.append(True)
            else:
                n_dropped += 1
    return sizes, costs, cens, n_dropped


#: Candidate statistics of a point's repeats for the time fit, in order of preference on ties.
TIME_STATISTICS = ("fastest", "lower quartile", "median")
_QUANTILE = {"fastest": 0.0, "lower quartile": 0.25, "median": 0.5}
#: A point's sweep repeats are used when it has at least this many.
_MIN_SWEEP = 3


def _repeats_of(p: Point) -> tuple[float, ...]:
    """The repeats a point's time cost is taken from: its sweep's, else its contiguous ones."""
    pool = p.interleaved_seconds if len(p.interleaved_seconds) >= _MIN_SWEEP else \
        p.repeat_seconds
    return tuple(float(r) for r in pool if _finite_positive(r))


def _statistic(values: Sequence[float], name: str) -> float:
    import numpy as np

    return float(np.quantile(np.asarray(values, dtype=float), _QUANTILE[name]))


def time_statistic(points: Iterable[Point], *, seed: int = 0, n_splits: int = 64) -> str:
    """The statistic of each point's repeats that is steadiest between halves of them.

    For every candidate (:data:`TIME_STATISTICS`) and every ``ok`` point with at least six
    repeats: ``n_splits`` random splits of the point's repeats into two halves, and the mean of
    (ln stat(half 1) - ln stat(half 2))^2 / 2, an estimate of the statistic's variance at half
    the repeats; the candidate with the smallest sum over points wins. Subsampling without
    replacement, unlike the bootstrap, stays valid for an extreme such as the fastest
    (Politis, Romano & Wolf 1999). The choice reads only each point's repeats, never the sizes
    or a fitted law, so it cannot favour a growth class. Without enough repeats: ``"fastest"``.

    Notes
    -----
    O(points * n_splits * repeats log repeats).
    """
    import numpy as np

    from model_zoo.base import make_rng

    samples = [np.log(np.asarray(r)) for r in (_repeats_of(p) for p in points
                                               if p.status == "ok") if len(r) >= 6]
    if not samples:
        return "fastest"
    rng = make_rng(seed, 0x5EED)
    score = {name: 0.0 for name in TIME_STATISTICS}
    for s in samples:
        half = s.size // 2
        order = np.argsort(rng.random((n_splits, s.size)), axis=1)
        a, b = s[order[:, :half]], s[order[:, half:2 * half]]
        for name in TIME_STATISTICS:
            q = _QUANTILE[name]
            d = np.quantile(a, q, axis=1) - np.quantile(b, q, axis=1)
            score[name] += 0.5 * float(np.mean(d * d))
    return min(TIME_STATISTICS, key=lambda name: score[name])


def time_cost(p: Point, statistic: str) -> float | None:
    """Seconds per query of one point as the time fit takes it (a lower bound if censored)."""
    if p.is_censored:
        return p.seconds_median if _finite_positive(p.seconds_median) else None
    if p.status != "ok":
        return None
    pool = _repeats_of(p)
    if pool:
        return _statistic(pool, statistic)
    return p.seconds_median if _finite_positive(p.seconds_median) else None


def _time_series(points: Sequence[Point], costs: Sequence[float | None]):
    sizes, out, cens = [], [], []
    for p, cost in zip(points, costs):
        if _finite_positive(cost):
            sizes.append(p.size); out.append(float(cost)); cens.append(p.is_censored)
    return sizes, out, cens


_DECIDED = ("polynomial", "exponential")


def _check_against_work(time, work, points: Sequence[Point], costs: Sequence[float | None]):
    """The time verdict, downgraded to inconclusive when its class contradicts the work's."""
    if (time is None or work is None or time.growth not in _DECIDED
            or work.growth not in _DECIDED or time.growth == work.growth):
        return time
    per_unit = [float(c) / float(p.work) for p, c in zip(points, costs)
                if p.status == "ok" and _finite_positive(c) and _finite_positive(p.work)]
    spread = (f"; seconds per unit of work range over {max(per_unit) / min(per_unit):.1f}x "
              "across the sizes" if per_unit else "")
    reason = (f"time says {time.growth} but work says {work.growth}: over a limited range fixed "
              f"overheads and the memory hierarchy bend a time curve{spread}; the work verdict is "
              "the machine-independent one (a large spread would mean the work count misses a "
              "cost)")
    return replace(time, growth="inconclusive", leaning=time.growth,
                   reasons=tuple(time.reasons) + (reason,))


def _typical_factor(points: Sequence[Point], costs: Sequence[float | None]) -> float | None:
    ratios = [float(p.seconds_median) / float(c) for p, c in zip(points, costs)
              if p.status == "ok" and _finite_positive(p.seconds_median)
              and _finite_positive(c)]
    return statistics.median(ratios) if ratios else None


def _predicted_series(points: Iterable[Point]):
    sizes, costs = [], []
    for p in points:
        if p.status in ("ok", "timeout", "memory") and _finite_positive(p.predicted_work):
            sizes.append(p.size); costs.append(float(p.predicted_work))
    return sizes, costs, [False] * len(sizes)


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" + ("" if n == 1 else "s")


def analyse_curve(curve: CurveResult, *, seed: int = 0) -> CurveAnalysis:
    """Verdicts by work, by time and by prediction for one curve, with flags and agreement.

    Parameters
    ----------
    curve
        A stored curve (its points in any order; they are sorted by size here).
    seed
        Seed for the fitter's interval resampling.

    Returns
    -------
    CurveAnalysis

    Examples
    --------
    >>> from profiler.records import CurveSpec, CurveResult, Point
    >>> spec = CurveSpec("bayesnet", "associational", "exact", "graph", "chain", 2)
    >>> pts = tuple(Point("s", 0, "bayesnet", "associational", "exact", "graph", "chain", 2, n,
    ...                   "ok", seconds_median=1e-4 * n, work=8.0 * n, predicted_work=8.0 * n)
    ...             for n in (4, 6, 8, 12, 16, 24, 32, 48, 64))
    >>> analyse_curve(CurveResult(0, spec, pts, theory="polynomial")).work.growth
    'polynomial'

    Notes
    -----
    Three fits of O(n) points each (see :func:`profiler.fitter.fit_growth`).
    """
    from profiler.audit import compare_with_theory

    points = tuple(sorted(curve.points, key=lambda p: p.size))
    flags: list[str] = []
    n_wrong = sum(p.status == "wrong" for p in points)
    n_error = sum(p.status == "error" for p in points)
    n_timeout = sum(p.status == "timeout" for p in points)
    n_memory = sum(p.status == "memory" for p in points)
    if n_wrong:
        flags.append(f"wrong answers at {_plural(n_wrong, 'point')}: no verdict")
    if n_timeout or n_memory:
        parts = []
        if n_timeout:
            parts.append(f"{n_timeout} at the time cap")
        if n_memory:
            parts.append(f"{n_memory} at the memory cap")
        flags.append(f"{_plural(n_timeout + n_memory, 'censored point')} ({', '.join(parts)})")
    if n_error:
        flags.append(f"{_plural(n_error, 'error point')} left out")
    if curve.cut_by_budget:
        flags.append("cut short by budget")

    work = time = None
    statistic = time_statistic(points, seed=seed)
    time_costs = [time_cost(p, statistic) for p in points]
    if not n_wrong:
        sizes, costs, cens, n_dropped = _work_series(points)
        work, why = fit_series(sizes, costs, cens, seed=seed)
        if n_dropped:
            flags.append(f"{_plural(n_dropped, 'censored point')} without a work count "
                         "left out of the work fit")
        if why:
            flags.append(f"work: {why}")
        sizes, costs, cens = _time_series(points, time_costs)
        time, why = fit_series(sizes, costs, cens, seed=seed)
        if why:
            flags.append(f"time: {why}")
        time = _check_against_work(time, work, points, time_costs)
    sizes, costs, cens = _predicted_series(points)
    predicted, _ = fit_series(sizes, costs, cens, seed=seed)

    measured = work if work is not None else time
    agreement, note = compare_with_theory(measured, predicted, curve.theory)
    return CurveAnalysis(curve=curve, work=work, time=time, predicted=predicted,
                         theory=curve.theory, agreement=agreement, agreement_note=note,
                         flags=tuple(flags), typical_factor=_typical_factor(points, time_costs),
                         time_statistic=statistic)


#: The last few studies analysed. Records are frozen and the fits seeded, so a study with the
#: same points always gets the same analyses; `infercost run` writes the report and prints the
#: terminal table from one result, and this keeps it from fitting every curve twice.
_RECENT: dict[tuple, list[CurveAnalysis]] = {}
_RECENT_MAX = 4


def _study_key(result: StudyResult, seed: int) -> tuple:
    # What a fit reads of each point (profiles hold dicts, so points themselves do not hash).
    return (result.study_id, seed, tuple(
        (c.index, c.spec, c.theory, c.cut_by_budget, tuple(
            (p.size, p.status, p.seconds_median, p.work, p.predicted_work, p.finished_at,
             p.repeat_seconds, p.interleaved_seconds) for p in c.points)) for c in result.curves))


def analyse_study(result: StudyResult, *, seed: int = 0) -> list[CurveAnalysis]:
    """:func:`analyse_curve` for every curve of a study, in curve order.

    Notes
    -----
    O(number of curves) fits; a study analysed moments ago (same id and the very same points)
    is answered from a small cache of the last few.
    """
    try:
        key = _study_key(result, seed)
        hash(key)
    except TypeError:          # a point with an unhashable profile value: no caching
        key = None
    if key is not None and key in _RECENT:
        return list(_RECENT[key])
    out = [analyse_curve(_on_one_time_scale(c, result), seed=seed)
           for c in sorted(result.curves, key=lambda c: c.index)]
    if key is not None:
        while len(_RECENT) >= _RECENT_MAX:
            _RECENT.pop(next(iter(_RECENT)))
        _RECENT[key] = out
    return list(out)


def _on_one_time_scale(curve: CurveResult, result: StudyResult) -> CurveResult:
    """The curve with times from several machines put on the study machine's scale (a curve
    measured on one machine, the usual case, is returned as it is)."""
    from profiler.machines import normalise_times

    calibration = (result.environment.get("calibration") or {}) if result.environment else {}
    reference = calibration.get("seconds") if isinstance(calibration, dict) else None
    points = normalise_times(curve.points, result.workers or {}, reference_seconds=reference)
    return curve if list(points) == list(curve.points) else replace(curve, points=tuple(points))


def competing_laws(verdict) -> list[str]:
    """The names of the two competing laws of a verdict: the best polynomial, the best exponential.

    The favoured class is represented by the verdict's own ``law``; the other class by its best
    fitting law (``power``/``exponential`` or their ``_bare`` variants when those fit better).
    Used for figures and for the envelope of inconclusive extrapolations.
    """
    if verdict is None:
        return []
    names = []
    for cls, stem in (("polynomial", "power"), ("exponential", "exponential")):
        chosen = verdict.law_fit(verdict.law) if verdict.law else None
        if chosen is not None and chosen.family == cls:
            names.append(chosen.name)
            continue
        same = [lf for lf in verdict.laws
                if lf.family == cls and lf.name in (stem, stem + "_bare")] \
            or [lf for lf in verdict.laws if lf.family == cls]
        if same:
            names.append(max(same, key=lambda lf: lf.loglik).name)
    return names


# -- words and symbols ------------------------------------------------------------------------

def _num(x: float, digits: int = 3) -> str:
    """A short number: 3 significant digits, no exponent for ordinary magnitudes."""
    if x is None or not math.isfinite(x):
        return "?"
    return f"{x:.{digits}g}" if abs(x) >= 1e-3 or x == 0 else f"{x:.2e}"


def _fixed(x: float, places: int = 2) -> str:
    return "?" if x is None or not math.isfinite(x) else f"{x:.{places}f}"


def _ci(ci, places: int = 2) -> str:
    if not ci:
        return ""
    lo, hi = ci
    return f" [{_fixed(lo, places)}, {_fixed(hi, places)}]"


def format_law(verdict) -> str:
    """The fitted law in symbols with its CI, e.g. ``n^1.02 [0.98, 1.06]`` or ``1.98^n [...]``.

    A stretched exponential exp(beta * n^gamma) is written with its exponent gamma:
    ``exp(β·n^0.51) [0.45, 0.57]``. Empty string when the verdict carries no parameter.
    """
    if verdict is None:
        return ""
    growth = verdict.growth
    cls = growth if growth != "inconclusive" else (verdict.leaning or "")
    gamma = getattr(verdict, "gamma", None)
    if cls == "exponential" and gamma is not None and verdict.base is None:
        return f"exp(β·n^{_fixed(gamma)}){_ci(verdict.gamma_ci)}"
    if cls == "exponential" and verdict.base is not None:
        return f"{_fixed(verdict.base)}^n{_ci(verdict.base_ci)}"
    if cls == "polynomial" and verdict.degree is not None:
        return f"n^{_fixed(verdict.degree)}{_ci(verdict.degree_ci)}"
    return ""


def format_growth(verdict, *, next_sizes: bool = True) -> str:
    """The growth class in words and symbols: ``polynomial, n^1.02 [0.98, 1.06]``.

    ``inconclusive`` verdicts say which way they lean and (with ``next_sizes``) which sizes
    would settle them; a missing verdict reads ``no verdict``.
    """
    if verdict is None:
        return "no verdict"
    law = format_law(verdict)
    if verdict.growth == "inconclusive":
        text = "inconclusive"
        if verdict.leaning:
            text += f" (leans {verdict.leaning}{', ' + law if law else ''})"
        elif verdict.degree is not None and verdict.base is not None:
            text += (f" (n^{_fixed(verdict.degree)}{_ci(verdict.degree_ci)} or "
                     f"{_fixed(verdict.base)}^n{_ci(verdict.base_ci)})")
        if verdict.next_sizes and next_sizes:
            text += "; measure next: " + ", ".join(str(int(s)) for s in verdict.next_sizes)
        return text
    return f"{verdict.growth}, {law}" if law else verdict.growth


def format_confidence(verdict) -> str:
    """``0.98 (Λ = 24.1)``: the class's posterior weight and the likelihood-ratio statistic."""
    if verdict is None:
        return "—"
    return f"{verdict.confidence:.2f} (Λ = {verdict.lambda_:.1f})"


def format_range(verdict) -> str:
    """``sizes 2–14`` for the measured range a verdict rests on."""
    if verdict is None:
        return ""
    return f"sizes {_num(verdict.size_min, 4)}–{_num(verdict.size_max, 4)}"
