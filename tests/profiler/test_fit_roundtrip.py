"""`infercost fit` on the points.csv that `infercost run` wrote gives the study's own verdicts."""

from __future__ import annotations

from pathlib import Path

import pytest

from profiler.analysis import analyse_study
from profiler.fitcsv import fit_csv
from profiler.records import CurveSpec, StudySpec
from profiler.runner import run_study


@pytest.fixture(scope="module")
def measured(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("roundtrip")
    curves = (
        CurveSpec(family="linear_scm", level="counterfactual", method="exact", axis="graph",
                  topology="chain", fixed=2, sizes=(4, 8, 12, 16, 24, 32, 48, 64), queries=4),
        CurveSpec(family="bayesnet", level="associational", method="exact", axis="graph",
                  topology="chain", fixed=2, sizes=(4, 8, 12, 16, 24, 32, 48, 64), queries=4),
    )
    spec = StudySpec(name="roundtrip", curves=curves, budget_s=120, point_timeout_s=10, seed=3)
    result = run_study(spec, store=tmp / "s.sqlite", out=tmp / "out")
    return result, Path(result.out_dir) / "points.csv"


def test_points_csv_marks_censored_points(measured):
    _, csv_path = measured
    header = csv_path.read_text().splitlines()[0].split(",")
    assert "censored" in header and "curve_key" in header


@pytest.mark.parametrize("cost,kind", [("work", "work"), ("seconds_fitted", "time")])
def test_fit_on_points_csv_reproduces_the_run_verdicts(measured, cost, kind):
    """Same growth class and degree from the CLI's CSV path as from the study's own analysis
    (time verdicts are fitted on ``seconds_fitted``, the column points.csv carries for it)."""
    result, csv_path = measured
    from_csv = {v["curve"]: v for v in fit_csv(csv_path, cost=cost, curve="curve_key")}
    for analysis in analyse_study(result):
        ours = getattr(analysis, kind)
        assert ours is not None, analysis.flags
        theirs = from_csv[analysis.curve.spec.key()]
        assert theirs["growth"] == ours.growth, (analysis.curve.spec.key(), theirs, ours.growth)
        if ours.degree is not None:
            assert theirs["degree"] == pytest.approx(ours.degree, rel=1e-6)


def test_points_carry_their_interleaved_repeats_into_points_csv(measured):
    """Every ok point got the interleaved sweep's repeats; seconds_fitted is the curve's
    time_statistic of them (seconds_fastest their least)."""
    import csv

    import numpy as np

    result, csv_path = measured
    rows = list(csv.DictReader(open(csv_path)))
    assert rows and all(r["interleaved_seconds"] for r in rows if r["status"] == "ok")
    q = {"fastest": 0.0, "lower quartile": 0.25, "median": 0.5}
    for r in rows:
        if r["status"] != "ok":
            continue
        seen = [float(x) for x in r["interleaved_seconds"].split(";")]
        assert float(r["seconds_fastest"]) == pytest.approx(min(seen), rel=1e-6)
        assert float(r["seconds_fitted"]) == pytest.approx(
            float(np.quantile(seen, q[r["time_statistic"]])), rel=1e-6)
