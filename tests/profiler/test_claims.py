"""Claim checks: reading claims files, and holds / fails / undecided from the intervals.

Curves are synthetic with known laws (tests/profiler/synthetic_study.py), so which claims are
true is known: ``100 * n`` is polynomial of degree 1, ``100 * 2**n`` exponential with base 2.
"""

from __future__ import annotations

import json
import re
from dataclasses import replace

import pytest

from tests.profiler.synthetic_study import make_curve, make_study

from profiler import claims as claims_mod
from profiler.claims import (check_claims, check_claims_file, claims_from_list, exit_code,
                             format_claims, judge_claims, load_claims, missing_curves)
from profiler.errors import InputError
from profiler.fitter import LawFit, Verdict

SIZES = (4, 6, 8, 12, 16, 24, 32, 48, 64)
EXP_SIZES = (2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14)
BN = dict(family="bayesnet", level="associational", method="exact", axis="graph",
          topology="chain")
NS = dict(family="neural_scm", level="counterfactual", method="exact", axis="graph",
          topology="chain")


@pytest.fixture(scope="module")
def study():
    return make_study([
        make_curve(0, law="power", param=1.0, sizes=SIZES, noise=0.01),
        make_curve(1, family="neural_scm", level="counterfactual", law="exp", param=2.0,
                   sizes=EXP_SIZES, noise=0.01),
    ])


@pytest.fixture(scope="module")
def judged(study):
    claims = claims_from_list([
        {**BN, "growth": "polynomial", "max_degree": 1.2, "note": "linear in the chain"},  # 1
        {**NS, "growth": "polynomial", "note": "our engine is polynomial"},  # 2 (false)
        {**BN, "max_degree": 0.5},                                            # 3 fails
        {**BN, "max_degree": 1.0},                                            # 4 straddles
        {**NS, "min_base": 1.5},                                              # 5 holds
        {**NS, "min_base": 3.0},                                              # 6 fails
        {**BN, "min_base": 1.5},                                              # 7 polynomial
        {**BN, "max_seconds_at": {"size": 32, "seconds": 1e-2}},              # 8 holds
        {**BN, "max_seconds_at": {"size": 32, "seconds": 1e-5}},              # 9 fails
        {**BN, "max_seconds_at": {"size": 32, "seconds": 3.2e-4}},            # 10 straddles
        {**BN, "topology": "grid", "growth": "exponential"},                  # 11 no curve
    ], source="test")
    return judge_claims(claims, study)


@pytest.mark.parametrize("number, status", [
    (1, "holds"), (2, "fails"), (3, "fails"), (4, "undecided"), (5, "holds"), (6, "fails"),
    (7, "fails"), (8, "holds"), (9, "fails"), (10, "undecided"), (11, "undecided"),
])
def test_status_of_each_claim(judged, number, status):
    """Each statement is judged from the 95% interval of the verdict (module docstring rules)."""
    assert judged[number - 1].status == status, judged[number - 1].sentence


def test_false_claim_sentence_quotes_the_evidence_and_note(judged):
    """The pasteable sentence names the curve, the claim, the fit with CI, the range and Λ."""
    s = judged[1].sentence
    assert re.match(
        r"Claim 2 fails: neural_scm counterfactual exact on the graph axis \(chain\) was "
        r"claimed polynomial; measured exponential, .*\[\d\.\d\d, \d\.\d\d\] over sizes 2–14 "
        r"\(Λ = -\d+\.\d\) by work\.", s), s
    assert s.endswith('Note: "our engine is polynomial"')


def test_evidence_carries_the_fit_and_points(judged):
    v = judged[0]
    assert v.evidence["verdict"]["growth"] == "polynomial"
    assert v.evidence["sizes_ok"] == list(SIZES)
    assert v.curve == "bayesnet/associational/exact/graph/chain@2"
    doc = json.loads(json.dumps([x.to_dict() for x in judged]))
    assert doc[0]["status"] == "holds" and doc[0]["statement"]["max_degree"] == 1.2
    assert doc[8]["checks"][0]["prediction"]["upper"] > doc[8]["checks"][0]["prediction"]["lower"]


def test_exit_codes(judged):
    """0 when nothing fails (undecided alone exits 0 unless strict), 1 when any fails."""
    holds, fails, undecided = judged[0], judged[1], judged[3]
    assert exit_code([holds]) == 0
    assert exit_code([holds, fails]) == 1
    assert exit_code([holds, undecided]) == 0
    assert exit_code([holds, undecided], strict=True) == 1
    assert "hold" in format_claims(judged).splitlines()[-2]


def _verdict(**kw) -> Verdict:
    d = dict(growth="exponential", leaning=None, degree=None, degree_ci=None, base=None,
             base_ci=None, gamma=0.5, gamma_ci=(0.45, 0.55), confidence=0.99, lambda_=-30.0,
             local_degree=None, local_base=1.3, next_sizes=(), n_points=8, n_censored=0,
             size_min=4.0, size_max=64.0, noise=0.02, reasons=(),
             laws=(LawFit("stretched", (0.0, 1.0, 0.5), ("log_a", "beta", "gamma"), 0.0, 3,
                          0.1, None),))
    d.update(kw)
    return Verdict(**d)


def test_stretched_exponential_has_no_base_to_bound():
    """exp(β·n^γ) has no constant base: a min_base claim is undecided, not held or failed."""
    status, reason = claims_mod._judge_base(1.5, _verdict())
    assert status == "undecided" and "stretched" in reason


def test_inconclusive_growth_is_undecided():
    status, _ = claims_mod._judge_growth("polynomial", _verdict(growth="inconclusive"))
    assert status == "undecided"


def test_wrong_points_leave_a_claim_undecided():
    bad = make_curve(0, sizes=SIZES, statuses={16: "wrong"})
    [v] = judge_claims(claims_from_list([{**BN, "growth": "polynomial"}]), make_study([bad]))
    assert v.status == "undecided" and "wrong" in v.checks[0]["reason"]


def test_claims_file_round_trip(tmp_path):
    path = tmp_path / "c.toml"
    path.write_text('[[claim]]\nfamily = "bayesnet"\nlevel = "associational"\n'
                    'method = "exact"\naxis = "graph"\ntopology = "chain"\nfixed = 2\n'
                    'growth = "polynomial"\nmax_seconds_at = { size = 200, seconds = 0.01 }\n'
                    'note = "from the paper"\n')
    [c] = load_claims(path)
    assert (c.fixed, c.growth, c.max_seconds_at, c.note) == (2, "polynomial", (200.0, 0.01),
                                                            "from the paper")


CLAIM = ('[[claim]]\nfamily = "bayesnet"\nlevel = "associational"\nmethod = "exact"\n'
         'axis = "graph"\ntopology = "chain"\n')


@pytest.mark.parametrize("text, needle", [
    (CLAIM, "at least one of growth"),
    (CLAIM + 'growth = "linear"\n', "growth"),
    (CLAIM + 'max_degree = "low"\n', "max_degree"),
    (CLAIM + "min_base = 0.5\n", "min_base"),
    (CLAIM + "max_seconds_at = { size = 10 }\n", "max_seconds_at"),
    (CLAIM + 'growth = "polynomial"\nspeed = 3\n', "speed"),
    (CLAIM.replace('axis = "graph"\n', "") + 'growth = "polynomial"\n', "axis"),
    (CLAIM.replace('"chain"', '"a ring"') + 'growth = "polynomial"\n', "topology"),
    ('title = "x"\n', "claim"),
    ("[[claim]\n", "TOML"),
])
def test_malformed_claims_name_file_and_field(tmp_path, text, needle):
    path = tmp_path / "bad-claims.toml"
    path.write_text(text)
    with pytest.raises(InputError) as err:
        load_claims(path)
    msg = str(err.value)
    assert "bad-claims.toml" in msg and needle in msg and "\n" not in msg.strip()


def test_missing_claims_file_is_input_error(tmp_path):
    with pytest.raises(InputError, match="not found"):
        load_claims(tmp_path / "none.toml")


def test_missing_curves_are_listed_and_run(study, monkeypatch):
    """Claims without a stored curve become curve specs, which check_claims measures."""
    claims = claims_from_list([{**BN, "growth": "polynomial"},
                               {**BN, "topology": "tree", "growth": "polynomial"},
                               {**BN, "topology": "tree", "max_degree": 2.0}])
    todo = missing_curves(claims, study)
    assert [s.key() for s in todo] == ["bayesnet/associational/exact/graph/tree@2"]

    ran = []

    def fake_run_study(spec, **kw):
        ran.append(spec)
        curve = make_curve(0, topology="tree", sizes=SIZES, noise=0.01)
        return make_study([curve], name=spec.name)

    import profiler.runner
    monkeypatch.setattr(profiler.runner, "run_study", fake_run_study)
    verdicts, extra = check_claims(claims, study, run_missing=True, store="unused.sqlite")
    assert [c.key() for c in ran[0].curves] == [todo[0].key()]
    assert extra is not None
    assert [v.status for v in verdicts] == ["holds", "holds", "holds"]


def test_check_claims_file_reads_the_store(tmp_path, study):
    """Curves stored in a real SQLite store are found by check_claims_file without running."""
    from profiler.store import Store

    with Store(tmp_path / "s.sqlite") as store:
        sid = store.open_study(study.spec, {}, resume=False)
        for c in study.curves:
            for p in c.points:
                store.add_point(replace(p, study=sid))
    path = tmp_path / "c.toml"
    path.write_text(CLAIM + 'growth = "polynomial"\n')
    [v] = check_claims_file(path, store=tmp_path / "s.sqlite", run_missing=False)
    assert v.status == "holds"
