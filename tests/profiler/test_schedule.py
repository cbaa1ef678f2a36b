"""Schedules: which size comes next, from the history alone."""

from __future__ import annotations

from dataclasses import dataclass
from types import SimpleNamespace

import pytest

from profiler.records import CurveSpec
from profiler.schedule import (ExplicitSchedule, GeometricSchedule, make_schedule,
                               point_seconds_estimate, predicted_point_seconds)


@dataclass(frozen=True)
class P:
    size: int
    status: str = "ok"
    seconds_median: float | None = 1e-3


def run_out(schedule, realize=lambda n: n, status=lambda n: "ok", limit=100):
    """Drive a schedule to its end, as the harness would, returning the sizes in order."""
    history: list[P] = []
    for _ in range(limit):
        n = schedule.next_size(history, realize=realize)
        if n is None:
            return [p.size for p in history]
        history.append(P(n, status(n), 1e-6 * n))
    raise AssertionError("schedule did not end")


def test_geometric_growth_is_unique_increasing_and_bounded():
    """Auto sizes start at min_size, grow by about the factor, never repeat, never pass max_size."""
    sizes = run_out(GeometricSchedule(min_size=2, max_size=300, factor=1.5, fit=None))
    assert sizes[0] == 2
    assert sizes == sorted(set(sizes))
    assert max(sizes) <= 300
    ratios = [b / a for a, b in zip(sizes, sizes[1:])]
    assert all(1.0 < r <= 2.0 for r in ratios)
    assert len(sizes) >= 6 and sizes[-1] / sizes[0] >= 8


def test_grid_rounding_never_repeats_a_size():
    """A family realising only squares (k x k grids) still gets distinct, growing squares."""
    def square(n):
        k = max(1, round(n ** 0.5))
        return k * k

    sizes = run_out(GeometricSchedule(min_size=4, max_size=150, fit=None), realize=square)
    assert sizes == sorted(set(sizes))
    assert all(round(s ** 0.5) ** 2 == s for s in sizes)
    assert sizes[:4] == [4, 9, 16, 25]


def test_growth_stops_at_first_censored_point_and_fill_in_stays_below_it():
    """After a timeout the curve stops growing; later sizes lie strictly below the censored one."""
    sizes = run_out(GeometricSchedule(min_size=2, max_size=10_000, fit=None),
                    status=lambda n: "timeout" if n >= 30 else "ok")
    first_censored = next(s for s in sizes if s >= 30)
    after = sizes[sizes.index(first_censored) + 1:]
    assert all(s < first_censored for s in after)
    assert sum(s >= 30 for s in sizes) == 1


def test_growth_stops_after_an_error_without_fill_in():
    sizes = run_out(GeometricSchedule(min_size=2, max_size=10_000, fit=None),
                    status=lambda n: "error" if n >= 6 else "ok")
    assert sizes[-1] >= 6 and sum(s >= 6 for s in sizes) == 1


def test_fill_in_uses_the_fitters_next_sizes():
    """With an inconclusive verdict, the fitter's next_sizes inside the measured range come next."""
    calls = []

    def fit(sizes, costs, censored):
        calls.append(list(sizes))
        return SimpleNamespace(growth="inconclusive", next_sizes=(5, 7, 100_000))

    s = GeometricSchedule(min_size=2, max_size=20, fit=fit)
    history = [P(n) for n in (2, 3, 4, 6, 9, 14, 20)]
    assert s.next_size(history, realize=lambda n: n) == 5
    history.append(P(5))
    assert s.next_size(history, realize=lambda n: n) == 7
    assert calls, "the fitter was consulted"


def test_fill_in_stops_on_a_conclusive_verdict_with_enough_points():
    s = GeometricSchedule(min_size=2, max_size=20,
                          fit=lambda *a: SimpleNamespace(growth="polynomial", next_sizes=(5,)))
    history = [P(n) for n in (2, 3, 4, 6, 9, 14, 20)]
    assert s.next_size(history, realize=lambda n: n) is None
    assert s.reason == "verdict reached"


def test_few_points_are_bisected_even_without_a_fitter():
    """A curve cut short by a cap at 3 points gets geometric midpoints until it has enough."""
    s = GeometricSchedule(min_size=2, max_size=1000, fit=None)
    history = [P(2), P(8), P(32), P(128, "timeout")]
    n = s.next_size(history, realize=lambda n: n)
    assert n is not None and 2 < n < 128 and n not in (8, 32)


def test_schedule_is_a_function_of_history():
    """Resuming with the first k points gives the same next size as the uninterrupted run."""
    full = run_out(GeometricSchedule(min_size=3, max_size=500, fit=None))
    for k in range(1, len(full)):
        fresh = GeometricSchedule(min_size=3, max_size=500, fit=None)
        assert fresh.next_size([P(n) for n in full[:k]], realize=lambda n: n) == full[k]


def test_point_limit_bounds_a_curve():
    sizes = run_out(GeometricSchedule(min_size=1, max_size=10 ** 9, max_points=5, fit=None))
    assert len(sizes) == 5


def test_explicit_sizes_in_order_and_not_beyond_a_censored_one():
    s = ExplicitSchedule((16, 2, 8, 4))
    assert run_out(s) == [2, 4, 8, 16]
    s = ExplicitSchedule((2, 4, 8, 16))
    assert run_out(s, status=lambda n: "memory" if n == 8 else "ok") == [2, 4, 8]
    # an error is not a cap: the listed sizes after it are still measured
    assert run_out(ExplicitSchedule((2, 4, 8)), status=lambda n: "error" if n == 4 else "ok") \
        == [2, 4, 8]


def test_explicit_sizes_are_deduplicated_after_realisation():
    assert run_out(ExplicitSchedule((9, 10, 16)),
                   realize=lambda n: round(n ** 0.5) ** 2) == [9, 16]


def test_make_schedule_picks_by_spec():
    base = dict(family="x", level="associational", method="exact", axis="graph",
                topology="chain", fixed=2)
    assert isinstance(make_schedule(CurveSpec(**base, sizes=(1, 2))), ExplicitSchedule)
    auto = make_schedule(CurveSpec(**base, min_size=4, max_size=64), fit=None)
    assert isinstance(auto, GeometricSchedule) and auto.min_size == 4 and auto.max_size == 64


def test_predicted_point_seconds_extrapolates_and_respects_the_cap():
    assert predicted_point_seconds([], 10, cap_seconds=5.0) == pytest.approx(0.5)
    # doubling time per doubling size: slope 1
    assert predicted_point_seconds([(10, 1.0), (20, 2.0)], 40, cap_seconds=100) == pytest.approx(4.0)
    assert predicted_point_seconds([(10, 1.0), (20, 2.0)], 400, cap_seconds=5.0) == 5.0
    assert predicted_point_seconds([(10, 1.0)], 5, cap_seconds=5.0) == 1.0


def test_point_seconds_estimate_counts_build_and_passes():
    p = SimpleNamespace(seconds_median=0.01, n_queries=10, repeats=5, loops=1, build_seconds=0.5)
    assert point_seconds_estimate(p) == pytest.approx(0.5 + 0.01 * 10 * 7)
    assert point_seconds_estimate(SimpleNamespace(seconds_median=None)) is None


def test_factor_must_grow():
    with pytest.raises(ValueError):
        GeometricSchedule(factor=1.0)
