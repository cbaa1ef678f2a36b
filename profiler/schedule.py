"""Which size of a curve to measure next.

A schedule is a small object the harness drives: given the points measured so far on a curve
(``history``) it proposes the next size along the curve's axis, or ``None`` when the curve is
done. It keeps no hidden state that matters — the proposal is a function of the history and the
curve's spec — so a resumed study, handed the stored points, continues exactly where it stopped.

Two schedules exist:

* :class:`GeometricSchedule` (``sizes = "auto"``): start at the curve's minimum size and grow
  geometrically (integer, unique, realizable sizes) until a point is censored or fails, or the
  maximum size is passed; then *fill in* the sizes the fitter says would best separate the
  candidate laws (``Verdict.next_sizes``), while the curve is still inconclusive and below its
  point limit.
* :class:`ExplicitSchedule` (a list in the study file): those sizes in ascending order, none
  beyond the first censored size.

The budget is not the schedule's business: the harness asks the schedule for a size and then
decides whether the curve's share of the budget can pay for it (see
:func:`predicted_point_seconds`).

Families whose sizes are not every integer (a k x k grid has k*k variables) are handled through
``realize``: a callable mapping a nominal size to the size the family can build. Proposals are
always realised sizes, never one already measured.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable, Protocol, Sequence

__all__ = ["Schedule", "GeometricSchedule", "ExplicitSchedule", "make_schedule",
           "predicted_point_seconds", "point_seconds_estimate", "DEFAULT_FACTOR",
           "DEFAULT_MIN_SIZE", "DEFAULT_MAX_SIZE", "DEFAULT_MAX_POINTS", "MIN_POINTS"]

DEFAULT_FACTOR = 1.5
DEFAULT_MIN_SIZE = 2
#: Ceiling for an auto schedule without ``max_size``: caps and budget normally stop a curve first.
DEFAULT_MAX_SIZE = 1 << 20
#: Points on one auto curve at most (growth plus fill-in).
DEFAULT_MAX_POINTS = 14
#: Points a curve needs before a verdict is worth having (the fill-in phase aims for this).
MIN_POINTS = 6

Realize = Callable[[int], int]
#: ``fit(sizes, costs, censored) -> verdict`` with ``.growth`` and ``.next_sizes`` (the fitter).
Fit = Callable[[Sequence[float], Sequence[float], Sequence[bool]], Any]


class Schedule(Protocol):
    """What the harness needs from a schedule."""

    #: Why the last :meth:`next_size` returned None (``"max size"``, ``"censored"`` ...).
    reason: str

    def next_size(self, history: Sequence[Any], *, realize: Realize) -> int | None: ...


def _identity(n: int) -> int:
    return n


def _measured(history: Sequence[Any]) -> dict[int, Any]:
    return {int(p.size): p for p in history}


@dataclass
class ExplicitSchedule:
    """The sizes a study file lists, ascending, stopping at the first censored one.

    Sizes after an ``error`` or ``wrong`` point are still measured (the user asked for them);
    sizes beyond a ``timeout`` or ``memory`` point are not (they would only hit the cap again).

    >>> from types import SimpleNamespace as P
    >>> s = ExplicitSchedule((4, 8, 16))
    >>> s.next_size([P(size=4, status="ok")], realize=lambda n: n)
    8
    >>> s.next_size([P(size=4, status="ok"), P(size=8, status="timeout")], realize=lambda n: n)
    """

    sizes: tuple[int, ...]
    reason: str = ""

    def next_size(self, history: Sequence[Any], *, realize: Realize = _identity) -> int | None:
        done = _measured(history)
        censored = [s for s, p in done.items() if p.status in ("timeout", "memory")]
        limit = min(censored) if censored else math.inf
        for nominal in sorted(set(self.sizes)):
            if nominal in done:
                continue  # skip the round trip to the worker: the size is its own realisation
            if nominal >= limit:
                self.reason = "censored"
                return None
            size = int(realize(nominal))
            if size in done or size >= limit:
                continue
            return size
        self.reason = "listed sizes done"
        return None


@dataclass
class GeometricSchedule:
    """Grow geometrically from ``min_size`` to ``max_size``, then fill in for the fitter.

    Parameters
    ----------
    min_size, max_size
        Bounds on the (realised) size along the axis.
    factor
        Ratio between successive nominal sizes (> 1); integer rounding never repeats a size.
    max_points
        Points on the curve at most, growth and fill-in together.
    min_points
        Fill-in continues (when the fitter is available) until the curve has this many
        uncensored points *and* a conclusive verdict, or the fitter proposes nothing new.
    fit
        ``fit(sizes, costs, censored) -> verdict`` (``profiler.fitter.fit_growth``); None
        disables the fill-in phase except for bisecting the widest gap while points are few.

    Notes
    -----
    Growth stops at the first point that is not ``ok``: a censored point says the next size is
    dearer still, and an error or a wrong answer makes larger sizes pointless. Each call costs
    O(len(history)) plus, in the fill-in phase, one fit.
    """

    min_size: int = DEFAULT_MIN_SIZE
    max_size: int = DEFAULT_MAX_SIZE
    factor: float = DEFAULT_FACTOR
    max_points: int = DEFAULT_MAX_POINTS
    min_points: int = MIN_POINTS
    fit: Fit | None = None
    reason: str = ""

    def __post_init__(self) -> None:
        if self.factor <= 1:
            raise ValueError(f"factor must be > 1, got {self.factor}")

    # -- growth ------------------------------------------------------------------------------
    def _grow(self, done: dict[int, Any], realize: Realize) -> int | None:
        if not done:
            size = int(realize(self.min_size))
            if size > self.max_size and size != self.min_size:
                self.reason = "max size"
                return None
            return size
        last = max(done)
        nominal = max(last + 1, int(round(last * self.factor)))
        # A family may round sizes (grids to squares): push the nominal size up until the
        # realisation moves past the last measured size, never past max_size.
        for _ in range(200):
            nominal = min(nominal, self.max_size)
            if nominal <= last:
                self.reason = "max size"
                return None
            size = int(realize(nominal))
            if size > self.max_size:
                self.reason = "max size"
                return None
            if size > last and size not in done:
                return size
            if nominal == self.max_size:
                self.reason = "max size"
                return None
            nominal = max(nominal + 1, int(math.ceil(nominal * 1.1)))
        self.reason = "no larger realizable size"
        return None

    # -- fill-in -----------------------------------------------------------------------------
    def _fill(self, done: dict[int, Any], realize: Realize) -> int | None:
        if len(done) >= self.max_points:
            self.reason = "point limit"
            return None
        ok = sorted(s for s, p in done.items() if p.status == "ok")
        censored = sorted(s for s, p in done.items() if p.status in ("timeout", "memory"))
        if any(p.status in ("error", "wrong") for p in done.values()) or len(ok) < 2:
            self.reason = "growth stopped"
            return None
        upper = censored[0] if censored else ok[-1] + 1  # never at or beyond a censored size
        lower = ok[0]
        few = len(ok) < self.min_points
        candidates: list[float] = []
        verdict = None
        if self.fit is not None:
            sizes, costs, cens = _series(done)
            try:
                verdict = self.fit(sizes, costs, cens)
            except Exception:  # a failed fit must not stop measuring; bisect instead
                verdict = None
        if verdict is not None:
            if getattr(verdict, "growth", "inconclusive") != "inconclusive" and not few:
                self.reason = "verdict reached"
                return None
            candidates = [float(s) for s in (getattr(verdict, "next_sizes", ()) or ())]
        elif not few:
            self.reason = "enough points"
            return None
        if few:
            candidates = candidates + _gap_midpoints(ok + censored[:1])
        for nominal in candidates:
            if not (lower <= nominal < upper):
                continue
            size = int(realize(max(1, int(round(nominal)))))
            if size in done or not (lower <= size < upper):
                continue
            return size
        self.reason = "nothing left to fill in"
        return None

    def next_size(self, history: Sequence[Any], *, realize: Realize = _identity) -> int | None:
        """The next realised size to measure, or None (then :attr:`reason` says why)."""
        done = _measured(history)
        growing = all(p.status == "ok" for p in done.values())
        if growing and len(done) < self.max_points:
            size = self._grow(done, realize)
            if size is not None:
                return size
        elif growing:
            self.reason = "point limit"
            return None
        return self._fill(done, realize)


def _series(done: dict[int, Any]) -> tuple[list[float], list[float], list[bool]]:
    """(sizes, seconds per query, censored) of the points usable by the fitter."""
    sizes, costs, cens = [], [], []
    for s in sorted(done):
        p = done[s]
        secs = getattr(p, "seconds_median", None)
        if secs is None or not secs > 0:
            continue
        if p.status == "ok":
            sizes.append(float(s)); costs.append(float(secs)); cens.append(False)
        elif p.status in ("timeout", "memory"):
            sizes.append(float(s)); costs.append(float(secs)); cens.append(True)
    return sizes, costs, cens


def _gap_midpoints(sizes: Sequence[int]) -> list[float]:
    """Geometric midpoints of successive sizes, widest ratio first."""
    s = sorted(set(sizes))
    gaps = [(b / a, math.sqrt(a * b)) for a, b in zip(s, s[1:]) if b - a >= 2]
    return [mid for _, mid in sorted(gaps, reverse=True)]


def _default_fit() -> Fit | None:
    """The fitter's ``fit_growth`` without intervals (fast), or None while it does not exist."""
    try:
        from profiler.fitter import fit_growth
    except ImportError:
        return None

    def fit(sizes, costs, censored):
        if len(sizes) < 3:
            return None
        return fit_growth(sizes, costs, censored, intervals=False)

    return fit


def make_schedule(spec: Any, *, fit: Fit | None | str = "default",
                  factor: float = DEFAULT_FACTOR,
                  max_points: int = DEFAULT_MAX_POINTS) -> Schedule:
    """The schedule for a :class:`~profiler.records.CurveSpec`.

    An explicit ``spec.sizes`` gives an :class:`ExplicitSchedule`; ``None`` ("auto") a
    :class:`GeometricSchedule` between ``spec.min_size`` (default 2) and ``spec.max_size``.
    ``fit="default"`` uses :func:`profiler.fitter.fit_growth` when it is importable.
    """
    if spec.sizes is not None:
        return ExplicitSchedule(tuple(int(s) for s in spec.sizes))
    fitter = _default_fit() if fit == "default" else fit
    return GeometricSchedule(min_size=int(spec.min_size or DEFAULT_MIN_SIZE),
                             max_size=int(spec.max_size or DEFAULT_MAX_SIZE),
                             factor=factor, max_points=max_points, fit=fitter)


def point_seconds_estimate(point: Any) -> float | None:
    """Wall seconds a stored point took, reconstructed from its fields (None if unknown).

    Build time, plus the warm-up, calibration and timed repeats: about ``(repeats + 2) * loops``
    passes over the queries. Reference checks are not counted (their time is not stored).
    """
    secs = getattr(point, "seconds_median", None)
    if secs is None:
        return None
    n = max(int(getattr(point, "n_queries", 0) or 0), 1)
    passes = (int(getattr(point, "repeats", 0) or 0) + 2) * max(int(getattr(point, "loops", 1) or 1), 1)
    return float(getattr(point, "build_seconds", 0.0) or 0.0) + secs * n * passes


def predicted_point_seconds(history: Sequence[tuple[int, float]], size: int, *,
                            cap_seconds: float) -> float:
    """Wall seconds the next point will probably take, for the budget check.

    Extrapolates the last two (size, wall seconds) pairs by the local log-log slope (clamped to
    [0, 4]); with one pair assumes linear growth; with none, a tenth of the cap. Never more than
    the cap (the point is cut there) and never less than 10 ms.
    """
    pairs = sorted((int(s), float(w)) for s, w in history if w is not None and w > 0)
    if not pairs:
        return min(cap_seconds, max(0.01, 0.1 * cap_seconds))
    s1, w1 = pairs[-1]
    slope = 1.0
    if len(pairs) >= 2:
        s0, w0 = pairs[-2]
        if s1 > s0 and w0 > 0:
            slope = min(max(math.log(w1 / w0) / math.log(s1 / s0), 0.0), 4.0)
    ratio = max(size, 1) / max(s1, 1)
    guess = w1 * ratio ** slope if ratio > 1 else w1
    return float(min(cap_seconds, max(0.01, guess)))
