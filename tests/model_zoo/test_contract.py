"""The one contract every registered family meets (DESIGN.md, "The Family protocol").

Parametrized over every family in the registry: it builds at two sizes on both axes, the
structural profile grows, the same seed gives the same instance, and every exact answer equals
the family's independent reference (1e-9) while every sampling answer lies within 4 standard
errors of it, on 20 random queries per level the family expresses.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import model_zoo
from model_zoo.base import Family, Level, Size

FAMILIES = model_zoo.names()
SMALL = {"graph": (3, 6), "mechanism": (2, 3)}
FIXED = {"graph": 2, "mechanism": 4}  # the other axis, kept small so references stay cheap


def _family(name: str):
    return model_zoo.get(name)()


def _topology(family) -> str:
    tops = tuple(getattr(family, "topologies", model_zoo.TOPOLOGIES))
    return "chain" if "chain" in tops else tops[0]


def _size(axis: str, n: int) -> Size:
    return model_zoo.size_along(axis, n, FIXED[axis])


@pytest.mark.parametrize("name", FAMILIES)
def test_declares_capabilities_as_data(name):
    """A family states its levels, methods, knob and topologies as data and meets the protocol."""
    cls = model_zoo.get(name)
    assert cls.name == name
    assert cls.levels and all(isinstance(lv, Level) for lv in cls.levels)
    assert cls.methods and set(cls.methods) <= {"exact", "sampling"}
    assert isinstance(cls.mechanism_knob, str) and cls.mechanism_knob
    assert isinstance(cls(), Family)


@pytest.mark.parametrize("name", FAMILIES)
@pytest.mark.parametrize("axis", ["graph", "mechanism"])
def test_profile_grows_along_each_axis(name, axis):
    """Building a larger instance along an axis gives a structural profile that is larger."""
    family = _family(name)
    topology = _topology(family)
    small, large = (family.build(family.realizable(_size(axis, n), topology=topology),
                                 topology=topology, seed=3) for n in SMALL[axis])
    p_small, p_large = family.profile(small), family.profile(large)
    assert all(isinstance(v, (int, float, np.integer, np.floating)) for v in p_small.values()), \
        "profile values must be numbers"
    grew = [k for k in p_small if k in p_large and float(p_large[k]) > float(p_small[k])]
    shrank = [k for k in ("n_parameters", "n_edges") if k in p_small and
              float(p_large[k]) < float(p_small[k])]
    assert grew, f"nothing in the profile of {name} grew along the {axis} axis: {p_small}"
    assert not shrank, f"{shrank} shrank along the {axis} axis"
    if axis == "graph":
        assert p_large["n_variables"] > p_small["n_variables"]
    else:
        assert p_large["n_parameters"] > p_small["n_parameters"]


@pytest.mark.parametrize("name", FAMILIES)
def test_same_seed_same_instance(name):
    """The same size, topology and seed give the same instance: same profile, same answers."""
    family = _family(name)
    topology = _topology(family)
    size = family.realizable(Size(4, 2), topology=topology)
    a, b = (family.build(size, topology=topology, seed=11) for _ in range(2))
    assert family.profile(a) == family.profile(b)
    level = sorted(family.levels, key=lambda lv: lv.value)[0]
    qa = family.queries(a, level, n=5, seed=2)
    qb = family.queries(b, level, n=5, seed=2)
    assert qa == qb
    for q in qa:
        assert family.answer(a, q, method="exact").value == family.answer(b, q, method="exact").value
    c = family.build(size, topology=topology, seed=12)
    answers_c = [family.answer(c, q, method="exact").value for q in family.queries(c, level, n=5, seed=2)]
    answers_a = [family.answer(a, q, method="exact").value for q in qa]
    assert answers_a != answers_c or family.profile(a) != family.profile(c), \
        "a different seed should give a different instance"


def _cases():
    for name in FAMILIES:
        cls = model_zoo.get(name)
        for level in sorted(cls.levels, key=lambda lv: lv.value):
            for method in sorted(cls.methods):
                yield name, level, method


@pytest.mark.parametrize("name,level,method", list(_cases()))
def test_answers_match_the_independent_reference(name, level, method):
    """On 20 random queries at small sizes, exact answers equal the reference to 1e-9 and sampling
    answers lie within 4 standard errors of it."""
    family = _family(name)
    topology = _topology(family)
    size = family.realizable(Size(4, 2), topology=topology)
    instance = family.build(size, topology=topology, seed=5)
    queries = family.queries(instance, level, n=20, seed=9)
    assert len(queries) == 20
    checked = 0
    for q in queries:
        assert q.level is level
        ref = family.reference(instance, q)
        ans = family.answer(instance, q, method=method)
        assert math.isfinite(ans.value) and ans.work > 0
        if ref is None:
            continue
        checked += 1
        if method == "exact":
            tol = 1e-9 * max(1.0, abs(ref))
            assert abs(ans.value - ref) <= tol, (q.describe(), ans.value, ref)
        else:
            assert ans.stderr is not None and ans.stderr >= 0
            assert abs(ans.value - ref) <= 4 * ans.stderr + 1e-9, (q.describe(), ans.value, ref, ans.stderr)
    assert checked >= 10, f"only {checked} of 20 queries had a reference at a small size"


@pytest.mark.parametrize("name", FAMILIES)
def test_predicted_work_is_positive_and_grows(name):
    """The engine's own cost formula is positive and grows with the graph."""
    family = _family(name)
    topology = _topology(family)
    level = sorted(family.levels, key=lambda lv: lv.value)[0]
    works = []
    for n in (3, 8):
        inst = family.build(family.realizable(Size(n, 2), topology=topology), topology=topology, seed=1)
        qs = family.queries(inst, level, n=5, seed=1)
        works.append(np.mean([family.predicted_work(inst, q, method="exact") for q in qs]))
    assert works[0] > 0 and works[1] > works[0]
