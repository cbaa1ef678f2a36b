"""Analysis of stored curves: which points enter the fits, flags, and the words of a verdict.

The curves are synthetic, drawn from laws chosen here (tests/profiler/synthetic_study.py), so the
right answer is known: a curve built from a known power law gives back its degree.
"""

from __future__ import annotations

import re

import pytest

from tests.profiler.synthetic_study import make_curve, make_study

from profiler import analysis
from profiler.analysis import analyse_curve, analyse_study, format_growth
from profiler.fitter import LawFit, Verdict

SIZES = (4, 6, 8, 12, 16, 24, 32, 48, 64)
EXP_SIZES = (2, 3, 4, 5, 6, 7, 8, 9, 10, 11)


@pytest.fixture(scope="module")
def linear():
    return analyse_curve(make_curve(0, law="power", param=1.0, sizes=SIZES,
                                    theory="polynomial"))


@pytest.fixture(scope="module")
def doubling():
    return analyse_curve(make_curve(1, law="exp", param=2.0, sizes=EXP_SIZES,
                                    theory="polynomial"))


def test_power_law_curve_gives_back_its_degree(linear):
    """Work and time drawn from 100*n^1 are polynomial with an interval holding degree 1."""
    for v in (linear.work, linear.time):
        assert v.growth == "polynomial"
        lo, hi = v.degree_ci
        assert abs(v.degree - 1.0) < 0.05 and lo <= v.degree <= hi and hi - lo < 0.2
    assert linear.predicted.growth == "polynomial"


def test_exponential_curve_gives_back_its_base(doubling):
    """Work and time drawn from 100*2^n are exponential with a base near 2 at the largest size.

    (The fitter may prefer a stretched exponential, which has no constant base; its local base
    at the largest size is then the quantity to compare.)
    """
    for v in (doubling.work, doubling.time):
        assert v.growth == "exponential"
        assert abs(v.local_base - 2.0) < 0.15
        if v.base_ci is not None:
            assert v.base_ci[0] - 0.01 <= 2.0 <= v.base_ci[1] + 0.01


def test_agreement_comes_from_the_audit_comparison(linear, doubling):
    """Theory 'polynomial' agrees with linear data and disagrees with doubling data."""
    assert linear.agreement == "agrees"
    assert doubling.agreement == "disagrees"
    assert doubling.agreement_note


def test_wrong_point_voids_the_measured_verdicts():
    """A single wrong answer: no work or time verdict, and a flag that says so."""
    a = analyse_curve(make_curve(2, sizes=SIZES, statuses={16: "wrong"}))
    assert a.work is None and a.time is None
    assert any("wrong" in f for f in a.flags)


def test_censored_points_enter_time_fit_as_lower_bounds():
    """Timeouts are counted, enter the time fit as censored, and stay out of the work fit."""
    a = analyse_curve(make_curve(3, law="exp", param=2.0, sizes=EXP_SIZES + (12, 13),
                                 statuses={12: "timeout", 13: "timeout"}))
    assert a.time.n_censored == 2
    assert a.work.n_censored == 0 and a.work.size_max == 11
    assert any("2 censored points" in f for f in a.flags)


def test_error_points_and_budget_cut_are_flagged():
    """Error points are left out of the fits; a budget cut is said."""
    a = analyse_curve(make_curve(4, sizes=SIZES + (96,), statuses={96: "error"},
                                 cut_by_budget=True))
    assert a.work.size_max == 64
    assert "cut short by budget" in a.flags
    assert any("1 error point" in f for f in a.flags)


def test_too_few_points_give_no_verdict_and_a_reason():
    """Two sizes cannot tell two laws apart: no verdict, a flag with the reason."""
    a = analyse_curve(make_curve(5, sizes=(4, 8)))
    assert a.work is None and a.time is None
    assert any("too few points" in f for f in a.flags)


def test_time_fit_takes_one_statistic_of_each_points_sweep_repeats(monkeypatch):
    """The time fit gets, for every point, the curve's chosen statistic of its sweep repeats
    (contiguous repeats only without a sweep) and no repeats; a slow spell over one point's
    contiguous repeats is undone by its sweep repeats."""
    from dataclasses import replace

    seen = []
    real = analysis.fit_series

    def spy(sizes, costs, censored, *, repeats=None, seed=0):
        seen.append((list(costs), repeats))
        return real(sizes, costs, censored, repeats=repeats, seed=seed)

    monkeypatch.setattr(analysis, "fit_series", spy)
    curve = make_curve(6, sizes=SIZES)
    slow = curve.points[3]
    t = slow.seconds_min
    spelled = replace(slow, repeat_seconds=tuple(2.0 * r for r in slow.repeat_seconds),
                      seconds_median=2.0 * slow.seconds_median, seconds_min=2.0 * t,
                      interleaved_seconds=(1.5 * t, 0.99 * t, 1.0 * t))
    points = curve.points[:3] + (spelled,) + curve.points[4:]
    a = analyse_curve(replace(curve, points=points))
    expected = [analysis.time_cost(p, a.time_statistic) for p in points]
    assert [c for c, _ in seen].count(expected) == 1
    assert all(r is None for _, r in seen)
    assert expected[3] <= 1.0 * t + 1e-15                    # from the sweep, not the spell
    assert expected[2] == pytest.approx(analysis._statistic(points[2].repeat_seconds,
                                                            a.time_statistic))
    ratios = sorted(p.seconds_median / c for p, c in zip(points, expected))
    assert a.typical_factor == pytest.approx(ratios[len(ratios) // 2])


def test_time_statistic_is_the_steadiest_under_resampling():
    """Repeats on a sharp floor (a quiet machine: most repeats at the floor, a few slow) make
    the fastest the steadiest statistic; repeats spread without a floor (a busy machine:
    lognormal) make the median steadier. The choice never looks at the sizes."""
    import numpy as np

    from tests.profiler.synthetic_study import make_curve as mk

    base = mk(8, sizes=SIZES)
    floor = (1.0, 1.0, 1.0, 1.0, 1.6, 1.0, 1.8, 1.0, 1.3)
    quiet = [replace_repeats(p, tuple(p.seconds_min * f for f in floor)) for p in base.points]
    assert analysis.time_statistic(quiet) == "fastest"
    rng = np.random.default_rng(4)
    busy = [replace_repeats(p, tuple(p.seconds_min * np.exp(0.3 * rng.standard_normal(9))))
            for p in base.points]
    assert analysis.time_statistic(busy) == "median"
    assert analysis.time_statistic([]) == "fastest"


def replace_repeats(p, sweep):
    from dataclasses import replace

    return replace(p, interleaved_seconds=tuple(float(x) for x in sweep))


def test_analyse_study_keeps_curve_order():
    study = make_study([make_curve(1, sizes=(4, 8)), make_curve(0, sizes=(4, 8))])
    assert [a.curve.index for a in analyse_study(study)] == [0, 1]


def _verdict(**kw) -> Verdict:
    base = dict(growth="polynomial", leaning=None, degree=None, degree_ci=None, base=None,
                base_ci=None, gamma=None, gamma_ci=None, confidence=0.99, lambda_=20.0,
                local_degree=None, local_base=None, next_sizes=(), n_points=8, n_censored=0,
                size_min=2.0, size_max=14.0, noise=0.02, reasons=(),
                laws=(LawFit("power", (0.0, 1.0), ("log_a", "k"), 0.0, 2, 0.1, None),))
    base.update(kw)
    return Verdict(**base)


@pytest.mark.parametrize("kw, expected", [
    (dict(degree=1.02, degree_ci=(0.98, 1.06)), "polynomial, n^1.02 [0.98, 1.06]"),
    (dict(growth="exponential", base=1.98, base_ci=(1.93, 2.04), lambda_=-30.0),
     "exponential, 1.98^n [1.93, 2.04]"),
    (dict(growth="exponential", gamma=0.51, gamma_ci=(0.45, 0.57), lambda_=-30.0),
     "exponential, exp(β·n^0.51) [0.45, 0.57]"),
    (dict(growth="inconclusive", leaning="exponential", base=1.5, base_ci=(1.2, 1.9),
          lambda_=-6.0), "inconclusive (leans exponential, 1.50^n [1.20, 1.90])"),
    (dict(growth="inconclusive", degree=2.0, degree_ci=(1.5, 2.5), base=1.3,
          base_ci=(1.1, 1.5), lambda_=1.0, next_sizes=(20, 24)),
     "inconclusive (n^2.00 [1.50, 2.50] or 1.30^n [1.10, 1.50]); measure next: 20, 24"),
])
def test_format_growth_words_and_symbols(kw, expected):
    """The verdict table's spelling of each kind of verdict (issue 7's examples)."""
    assert format_growth(_verdict(**kw)) == expected


def test_format_growth_of_no_verdict():
    assert format_growth(None) == "no verdict"


def test_format_growth_of_a_real_fit(linear):
    assert re.fullmatch(r"polynomial, n\^\d\.\d\d \[\d\.\d\d, \d\.\d\d\]",
                        format_growth(linear.work))


def test_same_study_is_not_fitted_twice(monkeypatch):
    """`run` writes the report and prints the table from one result: one set of fits."""
    calls = []
    real = analysis.analyse_curve
    monkeypatch.setattr(analysis, "analyse_curve",
                        lambda c, seed=0: calls.append(c.index) or real(c, seed=seed))
    study = make_study([make_curve(0, sizes=(4, 8)), make_curve(1, sizes=(4, 8))],
                       name="cache-check")
    first = analyse_study(study)
    again = analyse_study(study)
    assert calls == [0, 1]
    assert [a.key for a in again] == [a.key for a in first]


def test_a_time_class_that_contradicts_the_work_class_is_downgraded():
    """Work linear, time doubling per size: the time verdict is not allowed to stand as
    'exponential' beside a polynomial work verdict; it leans that way, with the reason."""
    from dataclasses import replace

    base = make_curve(7, law="power", param=1.0, sizes=EXP_SIZES, noise=0.0)
    points = tuple(replace(p, seconds_median=1e-6 * 2.0 ** p.size,
                           seconds_min=1e-6 * 2.0 ** p.size,
                           repeat_seconds=(1e-6 * 2.0 ** p.size,) * 5) for p in base.points)
    a = analyse_curve(replace(base, points=points))
    assert a.work.growth == "polynomial"
    assert a.time.growth == "inconclusive" and a.time.leaning == "exponential"
    assert any("time says exponential but work says polynomial" in r for r in a.time.reasons)
    # Agreeing classes are left alone.
    linear = analyse_curve(make_curve(0, law="power", param=1.0, sizes=SIZES))
    assert linear.time.growth == "polynomial"
