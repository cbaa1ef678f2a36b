"""The invented Northvale demo files load, agree with each other, and say they are invented."""

from __future__ import annotations

import json
from importlib.resources import files
from pathlib import Path

import pytest

import model_zoo
from profiler.claims import load_claims
from profiler.plan import load_workload
from profiler.study import load_study_file

EXAMPLES = Path(str(files("model_zoo") / "examples"))
MODELS = {"bayesnet": "northvale_maintenance.bif",
          "linear_scm": "northvale_maintenance_linear.json",
          "neural_scm": "northvale_maintenance_neural.json"}


@pytest.mark.parametrize("name", sorted(p.name for p in EXAMPLES.iterdir()
                                        if p.suffix in (".bif", ".json", ".toml")))
def test_every_demo_file_is_marked_invented(name):
    assert "INVENTED DATA" in (EXAMPLES / name).read_text(encoding="utf-8")


def test_the_three_models_share_one_graph():
    """The network and the two SCMs describe the same variables and edges."""
    graphs = {}
    for family, file in MODELS.items():
        fam = model_zoo.get(family)()
        inst = fam.load(EXAMPLES / file)
        profile = fam.profile(inst)
        graphs[family] = (profile["n_variables"], profile["n_edges"])
    assert set(graphs.values()) == {(10.0, 13.0)}
    doc = json.loads((EXAMPLES / MODELS["linear_scm"]).read_text(encoding="utf-8"))
    assert "ServiceDelay" in {v["name"] for v in doc["variables"]}


def test_study_workload_and_claims_parse():
    study = load_study_file(EXAMPLES / "northvale_study.toml")
    assert study.name == "northvale-nightly"
    workload = load_workload(EXAMPLES / "northvale_workload.toml")
    assert (workload.n_queries, workload.graph_size, workload.level) == \
        (2_000_000, 60, "counterfactual")
    claims = load_claims(EXAMPLES / "northvale_claims.toml")
    assert len(claims) >= 2
    # Every claim can be judged from a curve the demo study measures.
    keys = {(c.family, c.level, c.method, c.axis, c.topology) for c in study.curves}
    assert all((c.family, c.level, c.method, c.axis, c.topology) in keys for c in claims)
