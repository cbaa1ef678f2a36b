"""Monte Carlo outside the Gaussian algebra agrees with the closed-form engine.

The Monte Carlo path samples the noise, simulates the mechanisms one variable at a time, and
handles continuous evidence by least squares (regression residuals as posterior draws); for
counterfactuals it regresses the noise on the factual evidence (abduction) and simulates the
mutilated mechanisms (Pearl, Glymour & Jewell 2016, §4.2.4). Tolerance: 4 standard errors
(the harness's rule for sampling answers).
"""

from __future__ import annotations

import pytest

from model_zoo.base import Level, Query, Size
from model_zoo.linear_scm import LinearSCMFamily, monte_carlo_reference, make_linear_scm

LEVELS = (Level.ASSOCIATIONAL, Level.INTERVENTIONAL, Level.COUNTERFACTUAL)


@pytest.mark.parametrize("level", LEVELS, ids=str)
def test_monte_carlo_agrees_within_four_standard_errors(level: Level) -> None:
    """20 random queries per level on a 7-variable random SCM, 60,000 samples each."""
    fam = LinearSCMFamily(n_samples=60_000, seed=3)
    scm = fam.build(Size(graph=7, mechanism=2), topology="random", seed=9)
    n_checked = 0
    for i, q in enumerate(fam.queries(scm, level, n=20, seed=21)):
        answer = fam.answer(scm, q)
        exact = answer.value
        value, stderr = fam.monte_carlo_reference(scm, q, seed=i)
        # a point mass (evidence determines the target) is exact in Monte Carlo too
        assert stderr > 0 or "point mass" in answer.note
        assert abs(value - exact) <= 4 * stderr + 1e-9, (q.describe(), value, exact, stderr)
        n_checked += 1
    assert n_checked == 20


def test_monte_carlo_catches_a_wrong_coefficient() -> None:
    """The check has teeth: a model whose coefficient differs by 0.05 is told apart."""
    right = make_linear_scm(["X", "Y"], [{}, {"X": 0.7}], [0.0, 0.0], [1.0, 1.0])
    wrong = make_linear_scm(["X", "Y"], [{}, {"X": 0.75}], [0.0, 0.0], [1.0, 1.0])
    q = Query(level=Level.COUNTERFACTUAL, target=(("Y", 0.0),), evidence=(("Y", 1.0),),
              intervention=(("X", 2.0),), kind="expectation")
    fam = LinearSCMFamily()
    value, stderr = monte_carlo_reference(right, q, n_samples=200_000, seed=1)
    assert abs(value - fam.answer(right, q).value) <= 4 * stderr
    assert abs(value - fam.answer(wrong, q).value) > 4 * stderr


def test_monte_carlo_point_mass_counterfactual() -> None:
    """Fully observed (Primer §4.2.3): the Monte Carlo abduction is exact too, Y_{H=2} = 1.90."""
    scm = make_linear_scm(["X", "H", "Y"], [{}, {"X": 0.5}, {"X": 0.7, "H": 0.4}],
                          [0.0, 0.0, 0.0], [1.0, 1.0, 1.0])
    q = Query(level=Level.COUNTERFACTUAL, target=(("Y", 0.0),),
              evidence=(("X", 0.5), ("H", 1.0), ("Y", 1.5)), intervention=(("H", 2.0),),
              kind="expectation")
    value, stderr = monte_carlo_reference(scm, q, n_samples=20_000, seed=0)
    assert value == pytest.approx(1.90, abs=1e-9)
    assert stderr < 1e-9
