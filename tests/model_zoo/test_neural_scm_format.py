"""The neural_scm JSON format: round trips and one-line errors naming the file and the field."""

from __future__ import annotations

import copy
import json

import numpy as np
import pytest

from model_zoo.base import Level, Size
from model_zoo.errors import InputError
from model_zoo.neural_scm import NeuralSCMFamily, to_dict


@pytest.fixture(scope="module")
def family():
    return NeuralSCMFamily(n_states=3, depth=2)


@pytest.fixture(scope="module")
def scm(family):
    return family.build(Size(5, 4), topology="random", seed=3)


@pytest.mark.parametrize("weights_file", [None, "weights.npz"])
def test_round_trip_preserves_the_model(tmp_path, family, scm, weights_file):
    """dump then load gives the same weights, probabilities and answers (nested lists or .npz)."""
    path = tmp_path / "model.json"
    family.dump(scm, path, weights_file=weights_file)
    back = family.load(path)
    assert back.variables == scm.variables and back.parents == scm.parents
    assert back.exogenous == scm.exogenous and back.exogenous_inputs == scm.exogenous_inputs
    for m1, m2 in zip(scm.mechanisms, back.mechanisms):
        for a, b in zip(m1.weights + m1.biases, m2.weights + m2.biases):
            assert np.array_equal(a, b)
    for level in Level:
        for q in family.queries(scm, level, n=5, seed=1):
            assert family.answer(back, q, method="exact").value == family.answer(scm, q, method="exact").value
    if weights_file:
        doc = json.loads(path.read_text())
        assert doc["weights_file"] == weights_file
        assert isinstance(doc["variables"][0]["mechanism"]["layers"][0]["weights"], str)


def _write(tmp_path, doc, name="bad.json"):
    path = tmp_path / name
    path.write_text(json.dumps(doc) if not isinstance(doc, str) else doc)
    return path


def _mutations():
    def drop(key):
        def f(d):
            del d[key]
        return f

    def set_var(field, value):
        def f(d):
            d["variables"][1][field] = value
        return f

    def set_layer(k, field, value):
        def f(d):
            d["variables"][1]["mechanism"]["layers"][k][field] = value
        return f

    def set_exo(value):
        def f(d):
            d["variables"][0]["exogenous"]["probabilities"] = value
        return f

    return [
        ("family", lambda d: d.update(family="circuit")),
        ("format_version", lambda d: d.update(format_version=7)),
        ("variables", drop("variables")),
        ("parents", set_var("parents", ["nope"])),
        ("states", set_var("states", ["only"])),
        ("exogenous.probabilities", set_exo([0.5, 0.6, 0.1])),
        ("exogenous.probabilities", set_exo(["a", "b"])),
        ("exogenous", set_var("exogenous", None)),
        ("shared_exogenous", set_var("shared_exogenous", ["C99"])),
        ("layers[0].weights", set_layer(0, "weights", [[1.0, 2.0]])),
        ("layers[0].bias", set_layer(0, "bias", [1.0])),
        ("layers[0].weights", set_layer(0, "weights", "name-without-weights-file")),
        ("layers[0].weights", set_layer(0, "weights", [[float("nan")] * 4] * 11)),
    ]


@pytest.mark.parametrize("field,mutate", _mutations())
def test_bad_documents_name_file_and_field(tmp_path, scm, family, field, mutate):
    """Each broken field raises one InputError line naming the file and that field."""
    doc = copy.deepcopy(to_dict(scm))
    mutate(doc)
    path = _write(tmp_path, doc)
    with pytest.raises(InputError) as info:
        family.load(path)
    message = str(info.value)
    assert "\n" not in message
    assert str(path) in message and field in message, message


def test_not_json_and_missing_npz_array(tmp_path, scm, family):
    """Invalid JSON names the line; a weights entry naming no array of the .npz names the field."""
    with pytest.raises(InputError, match="line 1: not valid JSON"):
        family.load(_write(tmp_path, "{oops"))
    family.dump(scm, tmp_path / "m.json", weights_file="w.npz")
    doc = json.loads((tmp_path / "m.json").read_text())
    doc["variables"][0]["mechanism"]["layers"][0]["bias"] = "missing"
    with pytest.raises(InputError, match=r"layers\[0\]\.bias"):
        family.load(_write(tmp_path, doc, "m2.json"))
    doc["weights_file"] = "absent.npz"
    with pytest.raises(InputError, match="weights_file"):
        family.load(_write(tmp_path, doc, "m3.json"))


def test_random_corruptions_load_or_raise_input_error(scm):
    """Replacing any field of a valid document by junk (300 seeded cases) either loads or raises
    InputError — never another exception."""
    import random

    from model_zoo.neural_scm import from_dict

    base = to_dict(scm)

    def paths(o, pre=()):
        yield pre
        items = o.items() if isinstance(o, dict) else enumerate(o) if isinstance(o, list) else ()
        for k, v in items:
            yield from paths(v, pre + (k,))

    places = [p for p in paths(base) if p]
    junk = [None, 0, -1, 2.5, "x", [], {}, [1], [[1]], True, {"a": 1}, [None], ["C0"], 1e308]
    rnd = random.Random(0)
    outcomes = {"loaded": 0, "rejected": 0}
    for _ in range(300):
        doc = copy.deepcopy(base)
        place = rnd.choice(places)
        holder = doc
        for k in place[:-1]:
            holder = holder[k]
        if isinstance(holder, dict) and rnd.random() < 0.2:
            del holder[place[-1]]
        else:
            holder[place[-1]] = rnd.choice(junk)
        try:
            from_dict(doc, where="fuzz.json")
            outcomes["loaded"] += 1
        except InputError as exc:
            assert "\n" not in str(exc) and str(exc).startswith("fuzz.json")
            outcomes["rejected"] += 1
    assert outcomes["rejected"] > 100
