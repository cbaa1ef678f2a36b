"""Our JSON format for linear SCMs: the Primer model in a file, round trips, and clear errors."""

from __future__ import annotations

import json
import pathlib

import pytest

from model_zoo.base import Level, Query
from model_zoo.errors import InputError
from model_zoo.linear_scm import LinearSCMFamily, dump_linear_scm, load_linear_scm

#: Primer §4.2.3 (Pearl, Glymour & Jewell 2016), written out of topological order on purpose.
PRIMER = {
    "family": "linear_scm",
    "format_version": 1,
    "variables": [
        {"name": "Y", "parents": {"X": 0.7, "H": 0.4}, "noise_mean": 0.0, "noise_variance": 1.0},
        {"name": "X", "parents": {}, "noise_mean": 0.0, "noise_variance": 1.0},
        {"name": "H", "parents": {"X": 0.5}},
    ],
}


def write(tmp_path: pathlib.Path, doc, name: str = "model.json") -> pathlib.Path:
    path = tmp_path / name
    path.write_text(doc if isinstance(doc, str) else json.dumps(doc), encoding="utf-8")
    return path


def test_primer_file_loads_sorted_and_answers_1_90(tmp_path: pathlib.Path) -> None:
    """The Primer §4.2.3 model read from a file answers Y_{H=2} = 1.90 given X=.5, H=1, Y=1.5."""
    fam = LinearSCMFamily()
    scm = fam.load(write(tmp_path, PRIMER, "primer.json"))
    assert scm.names == ("X", "H", "Y")
    assert scm.name == "primer" and scm.topology == "file"
    assert scm.noise_variance.tolist() == [1.0, 1.0, 1.0]   # the default where omitted
    q = Query(level=Level.COUNTERFACTUAL, target=(("Y", 0.0),),
              evidence=(("X", 0.5), ("H", 1.0), ("Y", 1.5)), intervention=(("H", 2.0),),
              kind="expectation")
    assert fam.answer(scm, q).value == pytest.approx(1.90, abs=1e-12)


def test_dump_then_load_gives_the_same_answers(tmp_path: pathlib.Path) -> None:
    """A built instance written and read back answers every query identically."""
    fam = LinearSCMFamily()
    scm = fam.build(fam.realizable(__import__("model_zoo").Size(graph=9, mechanism=3),
                                   topology="random"), topology="random", seed=6)
    path = tmp_path / "round.json"
    fam.dump(scm, path)
    back = fam.load(path)
    assert back.names == scm.names
    for level in (Level.ASSOCIATIONAL, Level.INTERVENTIONAL, Level.COUNTERFACTUAL):
        for q in fam.queries(scm, level, n=5, seed=1):
            assert fam.answer(back, q).value == fam.answer(scm, q).value


@pytest.mark.parametrize("mutate,field", [
    (lambda d: d["variables"][2].update(parents={"X": 0.5, "Y": 1.0}), "cycle"),
    (lambda d: d["variables"][0].update(noise_variance=-1.0), "variables[0].noise_variance"),
    (lambda d: d["variables"][0].update(noise_variance=0.0), "variables[0].noise_variance"),
    (lambda d: d["variables"][0]["parents"].update(Z=0.1), "variables[0].parents"),
    (lambda d: d["variables"][0]["parents"].update(X="big"), "variables[0].parents.X"),
    (lambda d: d["variables"][0]["parents"].update(X=True), "variables[0].parents.X"),
    (lambda d: d["variables"][1].update(noise_mean=None), "variables[1].noise_mean"),
    (lambda d: d["variables"][1].update(name="Y"), "variables[1].name"),
    (lambda d: d["variables"][1].update(noise_varaince=1.0), "variables[1]"),
    (lambda d: d["variables"][1].pop("name"), "variables[1].name"),
    (lambda d: d.update(family="circuit"), "family"),
    (lambda d: d.update(format_version=2), "format_version"),
    (lambda d: d.update(variables=[]), "variables"),
])
def test_bad_files_name_the_file_and_the_field(tmp_path: pathlib.Path, mutate, field: str) -> None:
    """Each defect is one InputError line naming the file and the offending field."""
    doc = json.loads(json.dumps(PRIMER))
    mutate(doc)
    path = write(tmp_path, doc, "bad.json")
    with pytest.raises(InputError) as info:
        load_linear_scm(path)
    message = str(info.value)
    assert str(path) in message and field in message and "\n" not in message


def test_unreadable_and_non_json_files(tmp_path: pathlib.Path) -> None:
    """A missing file or broken JSON is an InputError naming the file, not a traceback."""
    with pytest.raises(InputError, match="missing.json"):
        load_linear_scm(tmp_path / "missing.json")
    with pytest.raises(InputError, match="broken.json: expected JSON"):
        load_linear_scm(write(tmp_path, "{not json", "broken.json"))
    with pytest.raises(InputError, match="list.json"):
        load_linear_scm(write(tmp_path, "[1, 2]", "list.json"))


def test_dump_writes_our_documented_keys(tmp_path: pathlib.Path) -> None:
    """The written file carries family, format_version and per-variable keys of the format."""
    scm = load_linear_scm(write(tmp_path, PRIMER))
    dump_linear_scm(scm, tmp_path / "out.json")
    doc = json.loads((tmp_path / "out.json").read_text())
    assert doc["family"] == "linear_scm" and doc["format_version"] == 1
    assert [v["name"] for v in doc["variables"]] == ["X", "H", "Y"]
    assert doc["variables"][2]["parents"] == {"X": 0.7, "H": 0.4}
    assert set(doc["variables"][0]) == {"name", "parents", "noise_mean", "noise_variance"}
