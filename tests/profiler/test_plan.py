"""The capacity planner on curves drawn from known laws: the arithmetic must come back out.

Synthetic curves (tests/profiler/synthetic_study.py): time per query is
``seconds_per_work * 100 * law(n)``, so the feasible size under a budget is known in closed form.
"""

from __future__ import annotations

import json
import math

import pytest

from tests.profiler.synthetic_study import make_curve, make_study

from profiler.analysis import analyse_study
from profiler.errors import InputError
from profiler.plan import (Workload, format_plan, load_workload, make_workload, plan_workload)

SIZES = (4, 6, 8, 12, 16, 24, 32, 48, 64, 96, 128)
EXP_SIZES = (2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12)


@pytest.fixture(scope="module")
def study():
    curves = [
        # bayesnet: t = 1e-5 * n on the graph axis (mechanism fixed at 2) ...
        make_curve(0, law="power", param=1.0, sizes=SIZES, noise=0.01),
        # ... and t = 1e-7 * 100 * m^2 on the mechanism axis (graph fixed at 16).
        make_curve(1, axis="mechanism", fixed=16, law="power", param=2.0,
                   sizes=(2, 3, 4, 5, 6, 8, 10, 12, 16), noise=0.01),
        # neural_scm: t = 1e-5 * 2^n, far slower at any useful size.
        make_curve(2, family="neural_scm", law="exp", param=2.0, sizes=EXP_SIZES, noise=0.01),
        # circuit compiled from the network: t = 2e-6 * n per query, compile 1e-3 * n seconds.
        make_curve(3, family="circuit", law="power", param=1.0, sizes=SIZES, noise=0.01,
                   seconds_per_work=2e-8, params=(("source", "bayesnet"),),
                   build_seconds_scale=1e-5),
    ]
    result = make_study(curves)
    return result, analyse_study(result)


def plan(study, **kw):
    result, analyses = study
    return plan_workload(result, Workload(**kw), analyses=analyses)


def test_largest_feasible_size_of_a_known_power_law(study):
    """t = 1e-5 n s; 10 s for 1000 queries allows 1e-2 s each, so n = 1000 at the median.

    The plan uses the upper 95% band, so the answer is a little below 1000, never above.
    """
    p = plan(study, family="bayesnet", level="associational", graph_size=64, n_queries=1000,
             budget_seconds=10.0)
    size = p.largest_feasible["graph"]["size"]
    assert 900 <= size <= 1000
    assert "beyond the largest measured size 128" in p.largest_feasible["graph"]["note"]


def test_largest_feasible_size_of_a_known_exponential(study):
    """t = 1e-5 * 2^n; a 1e-2 s limit allows n = log2(1000) = 9.97 -> 9."""
    p = plan(study, family="neural_scm", level="associational", graph_size=8, n_queries=1000,
             budget_seconds=10.0)
    assert p.largest_feasible["graph"]["size"] == 9


def test_per_query_interval_brackets_the_law(study):
    """At n = 100 the law gives 1e-3 s; the prediction interval holds it and is narrow."""
    p = plan(study, family="bayesnet", level="associational", graph_size=100, n_queries=10)
    s = p.estimate.seconds
    assert s.lower <= 1e-3 <= s.upper
    assert s.upper / s.lower < 1.3
    assert p.estimate.work.lower <= 100 * 100 <= p.estimate.work.upper
    assert p.fits == "no budget"


def test_budget_yes_and_no(study):
    """2e6 queries at ~1e-3 s are ~2000 core-s: 8 h on 1 core fits; 100 s does not."""
    yes = plan(study, family="bayesnet", level="associational", graph_size=100,
               n_queries=2_000_000, budget_seconds=8 * 3600)
    no = plan(study, family="bayesnet", level="associational", graph_size=100,
              n_queries=2_000_000, budget_seconds=100)
    assert yes.fits == "yes" and no.fits == "no"
    assert yes.total_core_seconds.lower <= 2000 <= yes.total_core_seconds.upper
    hours = plan(study, family="bayesnet", level="associational", graph_size=100,
                 n_queries=2_000_000, core_hours=1.0, cores=4)
    assert hours.capacity_core_seconds == 3600
    assert hours.fits == "yes"
    assert hours.wall_seconds.median == pytest.approx(hours.total_core_seconds.median / 4)


def test_far_target_is_warned_with_the_factor(study):
    p = plan(study, family="bayesnet", level="associational", graph_size=512, n_queries=1)
    assert any("target 512 is 4.0x beyond the largest measured size 128" in w
               for w in p.warnings)


def test_other_axis_is_combined_multiplicatively(study):
    """Graph 64 at mechanism 8: 1e-5*64 at mechanism 2, times (8/2)^2 = 16 from the mechanism curve."""
    p = plan(study, family="bayesnet", level="associational", graph_size=64, mechanism_size=8,
             n_queries=1)
    expected = 1e-5 * 64 * 16
    assert p.estimate.seconds.median == pytest.approx(expected, rel=0.1)
    assert len(p.estimate.curves) == 2
    assert any("separable-axes approximation" in n for n in p.notes)


def test_ranking_follows_predicted_time(study):
    """At n = 12: circuit 2.4e-5 s < bayesnet 1.2e-4 s < neural_scm 4e-2 s."""
    p = plan(study, level="associational", graph_size=12, n_queries=1)
    ranked = [r["family"] for r in p.ranking if r["rank"] is not None]
    assert ranked == ["circuit", "bayesnet", "neural_scm"]
    assert p.family == "circuit"


def test_compile_once_break_even(study):
    """Compile 1e-3*n s, saving (1e-5 - 2e-6)*n s per query: break-even at 125 queries."""
    p = plan(study, family="bayesnet", level="associational", graph_size=100,
             n_queries=2_000_000)
    be = p.break_even
    assert be["status"] == "measured"
    assert be["queries_to_break_even"] == pytest.approx(125, rel=0.15)
    assert be["advice"] == "compile once"


def test_break_even_not_measured_without_a_compiled_circuit():
    result = make_study([make_curve(0, sizes=SIZES)])
    p = plan_workload(result, Workload("associational", family="bayesnet", graph_size=10))
    assert p.break_even["status"] == "not measured"


def test_plan_json_and_text(study):
    p = plan(study, family="bayesnet", level="associational", graph_size=60, n_queries=10**6,
             budget_seconds=3600, cores=2)
    doc = json.loads(json.dumps(p.to_dict()))
    assert doc["fits"] in ("yes", "no", "uncertain")
    assert doc["estimate"]["seconds"]["lower"] <= doc["estimate"]["seconds"]["upper"]
    assert doc["workload"]["capacity_core_seconds"] == 7200
    text = format_plan(p)
    assert "Largest feasible graph size" in text and "Caution:" in text


def test_workload_file_and_options(tmp_path):
    path = tmp_path / "w.toml"
    path.write_text('level = "counterfactual"\nfamily = "neural_scm"\n'
                    'target = { graph = 60, mechanism = 8 }\nn_queries = 2_000_000\n'
                    'budget_seconds = 28800\ncores = 16\n')
    w = load_workload(path)
    assert (w.graph_size, w.mechanism_size, w.n_queries, w.cores) == (60, 8, 2_000_000, 16)
    w2 = make_workload(path, graph_size=30, n_queries=2e6, budget_s=100.0)
    assert (w2.graph_size, w2.mechanism_size, w2.budget_seconds) == (30, 8, 100.0)
    assert isinstance(w2.n_queries, int)
    w3 = make_workload(None, level="associational", graph_size=5)
    assert w3.method == "exact"


@pytest.mark.parametrize("text, field", [
    ('level = "causal"\ngraph_size = 4\n', "level"),
    ('level = "associational"\ngraph_size = 0\n', "graph_size"),
    ('level = "associational"\n', "graph_size"),
    ('level = "associational"\ngraph_size = 4\ncolour = "red"\n', "colour"),
    ('level = "associational"\ngraph_size = 4\nbudget_seconds = 1\ncore_hours = 1\n',
     "core_hours"),
    ('level = "associational"\ngraph_size = 4\nn_queries = -3\n', "n_queries"),
    ('level = [\n', "TOML"),
])
def test_bad_workload_names_file_and_field(tmp_path, text, field):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(InputError) as err:
        load_workload(path)
    assert "bad.toml" in str(err.value) and field in str(err.value)
    assert "\n" not in str(err.value).strip()


def test_unmeasured_family_gets_a_reason_not_an_estimate(study):
    p = plan(study, family="linear_scm", level="associational", graph_size=10, n_queries=1,
             budget_seconds=1)
    assert p.estimate.seconds is None and p.fits == "unknown"
    assert "no associational exact curve of linear_scm" in p.fits_note
    assert math.isfinite(p.ranking[0]["seconds_per_query"]["median"])


def test_time_estimates_are_scaled_from_fastest_to_typical_repeats():
    """Time laws are fitted on a low statistic of each point's repeats; when typical repeats
    run 1.5x slower (a loaded machine), the planner's central value and upper bound carry the
    1.5x, the lower bound stays at the fitted law. t_fitted = 1e-5 * n: at n = 100, 1e-3 s."""
    from dataclasses import replace

    base = make_curve(0, law="power", param=1.0, sizes=SIZES, noise=0.0)
    # Every statistic of these repeats is t; the contiguous median (a loaded spell) is 1.5 t.
    points = tuple(replace(p, repeat_seconds=(p.seconds_min,) * 5,
                           seconds_median=1.5 * p.seconds_min) for p in base.points)
    result = make_study([replace(base, points=points)])
    analyses = analyse_study(result)
    assert analyses[0].typical_factor == pytest.approx(1.5)
    p = plan_workload(result, Workload(family="bayesnet", level="associational", graph_size=100,
                                       n_queries=10), analyses=analyses)
    s = p.estimate.seconds
    assert s.median == pytest.approx(1.5e-3, rel=0.05)
    assert s.lower <= 1e-3 * 1.02 and s.upper >= 1.5e-3
    assert any("ratio of a typical contiguous repeat" in n for n in p.estimate.notes)
