"""`target_choice = "last"`: growth curves ask about the downstream-most variable and intervene
upstream-most, and the answers are still those of the independent reference."""

from __future__ import annotations

import pytest

import model_zoo
from model_zoo.base import Level, Size
from model_zoo.errors import InputError


@pytest.mark.parametrize("name", ["bayesnet", "neural_scm"])
@pytest.mark.parametrize("level", [Level.ASSOCIATIONAL, Level.INTERVENTIONAL])
def test_last_targets_the_last_variable_and_answers_match_the_reference(name, level):
    family = model_zoo.get(name)(target_choice="last")
    inst = family.build(Size(5, 2), topology="chain", seed=4)
    queries = family.queries(inst, level, n=8, seed=1)
    names = [f"X{i}" for i in range(5)]
    for q in queries:
        assert [v for v, _ in q.target] == [names[-1]]
        if level is Level.INTERVENTIONAL:
            assert [v for v, _ in q.intervention] == [names[0]]
        ref = family.reference(inst, q)
        assert ref is not None
        assert family.answer(inst, q, method="exact").value == pytest.approx(ref, abs=1e-9)


@pytest.mark.parametrize("name", ["bayesnet", "neural_scm"])
def test_unknown_target_choice_is_an_input_error(name):
    family = model_zoo.get(name)(target_choice="middle")
    inst = family.build(Size(4, 2), topology="chain", seed=1)
    with pytest.raises(InputError, match="target_choice"):
        family.queries(inst, Level.ASSOCIATIONAL, n=2, seed=1)
