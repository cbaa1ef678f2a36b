"""The auditor: known answers through the whole audit path, malformed input, theory vs measurement."""

from __future__ import annotations

import json
import time
from dataclasses import fields

import pytest

from model_zoo.errors import InputError, UnsupportedQuery
from profiler.audit import (audit_instance, audit_model, compare_with_theory, format_audit,
                            load_model)

# -- files written by the tests ------------------------------------------------------------------
# Burglary network: Russell & Norvig, AIMA 3rd ed., Fig. 14.2 (REFERENCES.md).
BURGLARY_BIF = """network burglary {
}
variable Burglary {
  type discrete [ 2 ] { true, false };
}
variable Earthquake {
  type discrete [ 2 ] { true, false };
}
variable Alarm {
  type discrete [ 2 ] { true, false };
}
variable JohnCalls {
  type discrete [ 2 ] { true, false };
}
variable MaryCalls {
  type discrete [ 2 ] { true, false };
}
probability ( Burglary ) {
  table 0.001, 0.999;
}
probability ( Earthquake ) {
  table 0.002, 0.998;
}
probability ( Alarm | Burglary, Earthquake ) {
  (true, true) 0.95, 0.05;
  (true, false) 0.94, 0.06;
  (false, true) 0.29, 0.71;
  (false, false) 0.001, 0.999;
}
probability ( JohnCalls | Alarm ) {
  (true) 0.90, 0.10;
  (false) 0.05, 0.95;
}
probability ( MaryCalls | Alarm ) {
  (true) 0.70, 0.30;
  (false) 0.01, 0.99;
}
"""

# Confounded example Z -> X, Z -> Y, X -> Y (REFERENCES.md; back-door adjustment, Pearl 2009 §3.3).
CONFOUNDED_BIF = """network confounded {
}
variable Z {
  type discrete [ 2 ] { yes, no };
}
variable X {
  type discrete [ 2 ] { yes, no };
}
variable Y {
  type discrete [ 2 ] { yes, no };
}
probability ( Z ) {
  table 0.5, 0.5;
}
probability ( X | Z ) {
  (yes) 0.8, 0.2;
  (no) 0.2, 0.8;
}
probability ( Y | X, Z ) {
  (yes, yes) 0.9, 0.1;
  (yes, no) 0.5, 0.5;
  (no, yes) 0.7, 0.3;
  (no, no) 0.1, 0.9;
}
"""



@pytest.fixture(scope="module")
def asia():
    """asia loaded once (pgmpy's BIF reader takes seconds to build its grammar)."""
    family, instance, _ = load_model("asia")
    return family, instance


def _audit_asia(asia, **kwargs):
    family, instance = asia
    return audit_instance(family, instance, name="asia", **kwargs)


def _write(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(text)
    return path


def _given(result):
    return [r for r in result["queries"] if r["given"]]


# -- known answers ---------------------------------------------------------------------------------
def test_asia_query_value():
    """P(lung | dysp, smoke) = 0.148334 on asia (Lauritzen & Spiegelhalter 1988)."""
    result = audit_model("asia", queries=["P(lung=yes | dysp=yes, smoke=yes)"], options=False)
    (row,) = _given(result)
    assert row["level"] == "associational"
    assert row["value"] == pytest.approx(0.148334, abs=1e-4)
    assert row["seconds"] > 0 and row["work"] > 0
    assert "0.1483" in format_audit(result)


def test_asia_structure_counts(asia):
    """asia: 8 nodes, 8 arcs, 18 free parameters, max in-degree 2, min-fill width 2
    (REFERENCES.md, counts recomputed from pgmpy's file)."""
    s = _audit_asia(asia, n_queries=0, options=False)["structure"]
    assert (s["nodes"], s["edges"], s["parameters"], s["max_in_degree"]) == (8, 8, 18, 2)
    assert (s["treewidth_lower"], s["treewidth_upper"], s["treewidth_exact"]) == (2, 2, True)
    assert s["states"] == 16 and s["max_states"] == 2


def test_burglary_bif_file(tmp_path):
    """P(B | j, m) = 0.284172 (Russell & Norvig, AIMA 3rd ed., Fig. 14.2; REFERENCES.md)."""
    path = _write(tmp_path, "burglary.bif", BURGLARY_BIF)
    result = audit_model(path, queries=["P(Burglary=true | JohnCalls=true, MaryCalls=true)",
                                        "P(JohnCalls=0 | Burglary=0)"], options=False)
    rows = _given(result)
    assert rows[0]["value"] == pytest.approx(0.284172, abs=1e-4)
    assert rows[1]["value"] == pytest.approx(0.849017, abs=1e-4)  # P(J | b), REFERENCES.md
    assert result["family"] == "bayesnet" and result["model"] == "burglary.bif"
    assert result["structure"]["treewidth_upper"] == 2 and result["structure"]["treewidth_exact"]


def test_confounded_do_query(tmp_path):
    """P(y | x) = 0.82 but P(y | do(x)) = 0.70 (back-door adjustment, Pearl 2009 §3.3)."""
    path = _write(tmp_path, "confounded.bif", CONFOUNDED_BIF)
    result = audit_model(path, queries=["P(Y=yes | X=yes)", "P(Y=yes | do(X=yes))",
                                        "P(Y=yes | do(X=no))"], options=False)
    values = [r["value"] for r in _given(result)]
    assert values == pytest.approx([0.82, 0.70, 0.40], abs=1e-4)
    assert [r["level"] for r in _given(result)] == ["associational", "interventional",
                                                   "interventional"]
    assert set(result["levels"]) == {"associational", "interventional"}


def test_random_queries_fill_every_level_the_family_expresses(asia):
    """Without --query: N random queries per level, with latency and work per level."""
    result = _audit_asia(asia, n_queries=4, options=False)
    assert set(result["levels"]) == {"associational", "interventional"}
    for lv, entry in result["levels"].items():
        assert entry["skipped"] is None, entry
        assert entry["n_queries"] == 4
        assert 0 < entry["median_seconds"] <= entry["p90_seconds"]
        assert entry["work"] > 0 and entry["predicted_work"] > 0
    assert len(result["queries"]) == 8 and not any(r["given"] for r in result["queries"])
    json.dumps(result)  # plain JSON, no numpy scalars or NaN


def test_predicted_memory_over_the_cap_is_not_run(asia):
    """A level predicted to need more memory than the cap is reported, not run."""
    result = _audit_asia(asia, n_queries=2, memory_mb=1e-6, options=False)
    for entry in result["levels"].values():
        if entry["predicted_bytes"] is not None:
            assert "exceeds the cap" in entry["skipped"]
            assert entry["n_queries"] == 0 and entry["median_seconds"] is None
    assert any(e["predicted_bytes"] is not None for e in result["levels"].values())


def test_options_are_computed(asia):
    """Compile option (circuit size, time, break-even) and sampling for a target stderr."""
    result = _audit_asia(asia, n_queries=3)
    opts = result["options"]
    comp = opts["compile"]
    if comp.get("skipped") is None:
        assert comp["circuit_edges"] > 0 and comp["compile_seconds"] >= 0
    samp = opts["sampling"]
    assert "associational" in samp
    a = samp["associational"]
    if a.get("skipped") is None:
        # stderr falls as 1/sqrt(n): the scaled sample count hits the target (common practice)
        assert a["n_samples"] >= 1
        ratio = a["measured_stderr"] / a["target_stderr"]
        assert a["n_samples"] == pytest.approx(a["measured_n_samples"] * ratio ** 2, rel=0.5)
    text = format_audit(result)
    assert "options" in text and "structure" in text


# -- what cannot be asked ----------------------------------------------------------------------------
def test_counterfactual_on_a_network_is_unsupported(asia):
    with pytest.raises(UnsupportedQuery, match="counterfactual"):
        _audit_asia(asia, queries=["P(lung_{smoke=yes}=yes | smoke=no)"], options=False)


def test_unknown_state_in_query(asia):
    with pytest.raises(InputError, match="maybe"):
        _audit_asia(asia, queries=["P(lung=maybe)"], options=False)


def test_syntax_error_in_query(asia):
    with pytest.raises(InputError, match="position"):
        _audit_asia(asia, queries=["P(lung=yes | smoke=yes"], options=False)


def test_bad_options_are_input_errors(asia):
    with pytest.raises(InputError, match="method"):
        _audit_asia(asia, method="guess")
    with pytest.raises(InputError, match="n_queries"):
        _audit_asia(asia, n_queries=-1)


def test_time_cap_keeps_finished_queries(asia):
    """A tiny time cap stops measuring but reports what finished, not an error."""
    result = _audit_asia(asia, n_queries=5, point_timeout_s=1e-3, options=False)
    for entry in result["levels"].values():
        assert "time cap" in entry["skipped"]
        assert entry["n_queries"] < 5


def test_unknown_model_name_lists_bundled_networks():
    with pytest.raises(InputError, match="alarm"):
        load_model("no_such_network_xyz")


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        load_model(tmp_path / "missing.bif")


# -- malformed files -------------------------------------------------------------------------------
def test_truncated_bif(tmp_path):
    path = _write(tmp_path, "cut.bif", BURGLARY_BIF[: len(BURGLARY_BIF) // 2])
    with pytest.raises(InputError) as info:
        load_model(path)
    assert "cut.bif" in str(info.value)


def test_cpt_not_summing_to_one(tmp_path):
    text = BURGLARY_BIF.replace("(true) 0.90, 0.10;", "(true) 0.90, 0.20;")
    path = _write(tmp_path, "badcpt.bif", text)
    with pytest.raises(InputError) as info:
        load_model(path)
    msg = str(info.value)
    assert "badcpt.bif" in msg and "JohnCalls" in msg


def test_cycle(tmp_path):
    text = CONFOUNDED_BIF.replace("probability ( Z ) {\n  table 0.5, 0.5;\n}",
                                  "probability ( Z | Y ) {\n  (yes) 0.5, 0.5;\n  (no) 0.5, 0.5;\n}")
    path = _write(tmp_path, "cycle.bif", text)
    with pytest.raises(InputError) as info:
        load_model(path)
    assert "cycle.bif" in str(info.value)


def test_json_without_family_key(tmp_path):
    path = _write(tmp_path, "model.json", json.dumps({"format_version": 1}))
    with pytest.raises(InputError, match="family"):
        load_model(path)


def test_json_that_is_not_json(tmp_path):
    path = _write(tmp_path, "model.json", "{ not json")
    with pytest.raises(InputError, match="model.json line 1"):
        load_model(path)


def test_unknown_ending(tmp_path):
    path = _write(tmp_path, "model.txt", "hello")
    with pytest.raises(InputError, match="file ending"):
        load_model(path)


# -- other families through their JSON files ---------------------------------------------------------
def test_linear_scm_json_counterfactual(tmp_path):
    """Y_{H=2} = 1.90 given X=0.5, H=1, Y=1.5 (Pearl, Glymour & Jewell 2016, §4.2.3)."""
    doc = {"family": "linear_scm", "format_version": 1, "variables": [
        {"name": "X", "parents": {}},
        {"name": "H", "parents": {"X": 0.5}},
        {"name": "Y", "parents": {"X": 0.7, "H": 0.4}}]}
    path = _write(tmp_path, "primer.json", json.dumps(doc))
    result = audit_model(path, queries=["E(Y_{H=2} | X=0.5, H=1, Y=1.5)", "E(Y | do(X=1))"],
                         options=False)
    rows = _given(result)
    assert rows[0]["level"] == "counterfactual"
    assert rows[0]["value"] == pytest.approx(1.90, abs=1e-9)
    assert rows[1]["value"] == pytest.approx(0.90, abs=1e-9)  # total effect of X on Y
    s = result["structure"]
    assert s["levels_expressible"] == ["associational", "interventional", "counterfactual"]
    assert s["nodes"] == 3 and s["edges"] == 3


# -- theory versus measurement -------------------------------------------------------------------
def _verdict(growth, *, degree=None, degree_ci=None, base=None, leaning=None):
    """A hand-made fitter Verdict (all other fields neutral)."""
    from profiler.fitter import Verdict

    values = dict(growth=growth, leaning=leaning, degree=degree, degree_ci=degree_ci, base=base,
                  base_ci=None, gamma=None, gamma_ci=None, confidence=0.9, lambda_=0.0,
                  local_degree=None, local_base=None, next_sizes=(), n_points=6, n_censored=0,
                  size_min=4.0, size_max=64.0, noise=0.1, reasons=(), laws=())
    return Verdict(**{f.name: values[f.name] for f in fields(Verdict) if f.name in values})


POLY = _verdict("polynomial", degree=2.0, degree_ci=(1.8, 2.2))
EXP = _verdict("exponential", base=1.9)
UNSURE = _verdict("inconclusive", leaning="exponential")


@pytest.mark.parametrize("measured,predicted,theory,want", [
    (POLY, POLY, "polynomial", "agrees"),
    (EXP, EXP, "exponential", "agrees"),
    (POLY, None, "polynomial", "agrees"),
    (POLY, POLY, None, "agrees"),
    (EXP, POLY, "polynomial", "disagrees"),
    (POLY, EXP, "exponential", "disagrees"),
    (EXP, EXP, "polynomial", "disagrees"),
    (EXP, None, "polynomial", "disagrees"),
    (UNSURE, POLY, "polynomial", "undecided"),
    (None, POLY, "polynomial", "undecided"),
    (POLY, None, None, "no theory"),
    (EXP, UNSURE, None, "no theory"),
    (None, None, None, "no theory"),
])
def test_compare_with_theory_outcomes(measured, predicted, theory, want):
    agreement, note = compare_with_theory(measured, predicted, theory)
    assert agreement == want
    assert isinstance(note, str) and note and "\n" not in note


def test_disagreement_note_says_what_is_wrong():
    """The issue's wording: measured exponential, structure predicts polynomial."""
    _, note = compare_with_theory(EXP, POLY, "polynomial")
    assert note.startswith("measured exponential")
    assert "structure predicts polynomial" in note
    assert "the engine is doing more than its algorithm needs" in note


def test_inconclusive_note_mentions_the_leaning():
    _, note = compare_with_theory(UNSURE, POLY, None)
    assert "leans exponential" in note


def test_degree_gap_is_noted_without_changing_the_class():
    measured = _verdict("polynomial", degree=3.0, degree_ci=(2.8, 3.2))
    predicted = _verdict("polynomial", degree=2.0, degree_ci=(1.9, 2.1))
    agreement, note = compare_with_theory(measured, predicted, "polynomial")
    assert agreement == "agrees" and "excludes the predicted degree 2" in note


# -- every bundled network -------------------------------------------------------------------------
FAST_NETWORKS = ["child"]


def _check_finished(result):
    for lv, entry in result["levels"].items():
        assert entry["predicted_work"] is not None, (lv, entry)
        if entry["skipped"] is None:
            assert entry["n_queries"] == entry["n_asked"] > 0, (lv, entry)
        else:
            # a cap was met: said in words, never an out-of-memory crash
            assert "cap" in entry["skipped"], (lv, entry)


@pytest.mark.parametrize("name", FAST_NETWORKS)
def test_fast_bundled_networks_audit(name):
    """Small shipped networks audit end to end with 10 queries per level."""
    result = audit_model(name, n_queries=10, point_timeout_s=20, options=False)
    _check_finished(result)
    assert all(e["skipped"] is None for e in result["levels"].values())


@pytest.mark.slow
def test_every_bundled_network_finishes_or_reports_the_cap():
    """Every shipped network that loads in under 2 s (CPU time, so a busy machine does not
    change the set) audits with 10 queries per level within the caps: measured, or a predicted
    cost over the cap reported instead of running out of memory."""
    from model_zoo.networks import bundled_networks

    load_model("cancer")  # untimed: the first load pays for importing pgmpy's reader
    audited = []
    for name in bundled_networks():
        t0 = time.process_time()
        family, instance, _ = load_model(name)
        if time.process_time() - t0 >= 2.0:
            continue
        result = audit_instance(family, instance, name=name, n_queries=10, point_timeout_s=20,
                                memory_mb=2048)
        _check_finished(result)
        audited.append(name)
    assert {"asia", "alarm", "child", "insurance"} <= set(audited)


def test_json_family_must_be_registered(tmp_path):
    """A data file cannot make the auditor import code: 'module:Class' is refused."""
    path = _write(tmp_path, "model.json", json.dumps({"family": "os:system", "format_version": 1}))
    with pytest.raises(InputError, match="registered family"):
        load_model(path)
