"""Variable elimination against pgmpy on the networks bundled with pgmpy.

Issue 2 asks for every bundled network that loads in under 2 s. Measured on an idle 2-core
machine with pgmpy 1.1.2 (BIFReader, first load per process): alarm, asia, cancer, child,
earthquake, hailfinder, hepar2, insurance, sachs, survey, water and win95pts load in 1.0-2.0 s;
andes (2.7 s), munin1 (3.6 s), pigs (3.6 s) and the rest (5-20 s) do not, and are left out. The
list is fixed rather than timed so the test is deterministic.
"""

from __future__ import annotations

import pytest

from model_zoo.base import Level

FAST_LOADING = ["alarm", "asia", "cancer", "child", "earthquake", "hailfinder", "hepar2",
                "insurance", "sachs", "survey", "water", "win95pts"]


@pytest.mark.parametrize("name", FAST_LOADING)
def test_variable_elimination_equals_pgmpy_on_bundled_networks(bn_family, load_bundled, name):
    """20 random associational and 10 interventional queries per network: our VE equals pgmpy's
    VariableElimination (default order; interventions via model.do) to 1e-9, single and batched."""
    inst = load_bundled(name)
    queries = (bn_family.queries(inst, Level.ASSOCIATIONAL, n=20, seed=11)
               + bn_family.queries(inst, Level.INTERVENTIONAL, n=10, seed=12))
    batched = bn_family.answer_batch(inst, queries, method="exact")
    checked = 0
    for q, together in zip(queries, batched):
        ref = bn_family.reference(inst, q)
        if ref is None:
            continue
        checked += 1
        alone = bn_family.answer(inst, q, method="exact")
        assert abs(alone.value - ref) <= 1e-9, (q.describe(), alone.value, ref)
        assert abs(together.value - alone.value) <= 1e-12
    assert checked == len(queries)
