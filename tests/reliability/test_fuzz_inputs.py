"""Hypothesis fuzzing of every input infercost reads: it loads, or it raises InputError.

Targets: BIF, XMLBIF and UAI network files, our JSON model formats (circuit, neural_scm,
linear_scm), study and claims TOML, the fit CSV, and the query syntax. Each case is a valid
document mutated (characters deleted, inserted, duplicated, numbers replaced by extreme values,
JSON/TOML values replaced by values of the wrong type or range) or random text or bytes. Every
case must either load or raise :class:`~model_zoo.errors.InputError` with a one-line message —
no other exception (no traceback at the command line), no hang (each case runs under a hard time
limit and a Hypothesis deadline). The number of cases is printed at the end of the session.

The default run is small and seeded (``derandomize``); ``make fuzz`` (``-m slow``) runs the long
randomised version of the same targets.
"""

from __future__ import annotations

import json
import math
from datetime import timedelta
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from model_zoo.errors import InputError
from tests.reliability.conftest import count_case, time_limit

N_DEFAULT = 60
N_SLOW = 1500
CASE_LIMIT_S = 30.0

FAST = settings(max_examples=N_DEFAULT, deadline=timedelta(seconds=15), derandomize=True,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture,
                                       HealthCheck.data_too_large, HealthCheck.filter_too_much],
                database=None)
SLOW = settings(FAST, max_examples=N_SLOW, derandomize=False)

EXTREME_NUMBERS = ["0", "-1", "1e308", "-1e308", "1e-320", "nan", "inf", "-inf", "NaN",
                   "99999999999999999999", "2", "0.5", "-0.0", "1e9", "007", "1.", ".5", "1e"]
WEIRD_VALUES = [None, True, False, 0, -1, 1, 2, 10 ** 9, 10 ** 30, 2 ** 63, 1e308, -1e308,
                float("nan"), float("inf"), -0.0, 1e-320, "", "x", "0", "nan", "../../etc",
                [], [1, 2], [[]], {}, {"a": 1}, "\u202e\u0000", 0.5]


# ============================================================================ seeds (valid inputs)
def _seed_files(folder: Path) -> dict[str, str]:
    """Valid documents of every model format, written by the families' own ``dump``."""
    from model_zoo.base import Size, resolve

    out: dict[str, str] = {}
    for fam, topo, size, ext in (("bayesnet", "chain", Size(4, 2), ".bif"),
                                 ("bayesnet", "chain", Size(3, 3), ".xmlbif"),
                                 ("circuit", "balanced", Size(4, 2), ".json"),
                                 ("neural_scm", "chain", Size(3, 2), ".json"),
                                 ("linear_scm", "chain", Size(4, 2), ".json")):
        family = resolve(fam)()
        path = folder / f"seed-{fam}{ext}"
        family.dump(family.build(size, topology=topo, seed=1), path)
        out[f"{fam}{ext}"] = path.read_text(encoding="utf-8")
    # UAI (BAYES preamble, then one table per variable, child last in each scope): doubly
    # stochastic tables, so the file is valid whichever way a reader orders a table's entries.
    out["uai"] = ("BAYES\n3\n2 2 2\n3\n1 0\n2 0 1\n2 1 2\n\n2\n 0.4 0.6\n\n4\n 0.1 0.9\n 0.9 0.1\n"
                  "\n4\n 0.3 0.7\n 0.7 0.3\n")
    return out


@pytest.fixture(scope="module")
def seeds(tmp_path_factory) -> dict[str, str]:
    return _seed_files(tmp_path_factory.mktemp("seeds"))


STUDY = """name = "fuzzed"
budget_s = 30
point_timeout_s = 5
memory_mb = 512
seed = 7
threads = 1

[[curve]]
family = "linear_scm"
level = "counterfactual"
method = "exact"
axis = "graph"
topology = "chain"
sizes = [2, 4, 8]
fixed = 2
queries = 3
params = { }

[[curve]]
family = "bayesnet"
level = "associational"
axis = "mechanism"
sizes = "auto"
max_size = 12
"""

CLAIMS = """[[claim]]
family = "bayesnet"
level = "associational"
method = "exact"
axis = "graph"
topology = "chain"
fixed = 2
growth = "polynomial"
max_degree = 1.5
note = "linear in the chain length"

[[claim]]
family = "neural_scm"
level = "counterfactual"
method = "exact"
axis = "graph"
topology = "chain"
min_base = 1.5
max_seconds_at = { size = 20, seconds = 0.5 }
cost = "time"
"""

FIT_CSV = "size,cost,censored,curve\n2,4.1,0,a\n4,16.3,0,a\n8,63.9,0,a\n16,250,1,a\n" \
          "1,2,0,b\n2,4,0,b\n3,8,0,b\n4,16,0,b\n5,32.5,0,b\n"

QUERIES = ["P(Y=1)", "P(Y=1 | Z=0)", "P(Y=1 | do(X=0), Z=1)", "P(Y_{X=1}=1 | X=0, Y=0)",
           "E(Y | do(X=1))", "P(Y > 0.5 | X=1)", "MPE(Y, Z | X=1)", "P(X=0, Y=1 | do(Z=1))"]
QUERY_STATES = {"X": ["0", "1"], "Y": ["0", "1", "2"], "Z": ["lo", "hi"]}


# ============================================================================ mutations
@st.composite
def mutated_text(draw, base: str) -> str:
    """``base`` with 1-5 random edits (or, rarely, replaced by random text)."""
    if draw(st.integers(0, 19)) == 0:
        return draw(st.text(max_size=300))
    text = base
    for _ in range(draw(st.integers(1, 5))):
        op = draw(st.sampled_from(["delete", "insert", "duplicate", "number", "swap", "truncate"]))
        i = draw(st.integers(0, len(text)))
        j = draw(st.integers(i, min(len(text), i + 60)))
        if op == "delete":
            text = text[:i] + text[j:]
        elif op == "insert":
            junk = draw(st.one_of(st.text(max_size=12),
                                  st.sampled_from(["{", "}", "[", "]", ";", ",", "|", "(", ")",
                                                  '"', "=", "\n", "\x00", "<", ">", "</", "#"])))
            text = text[:i] + junk + text[i:]
        elif op == "duplicate":
            text = text[:j] + text[i:j] + text[j:]
        elif op == "number":
            import re

            numbers = list(re.finditer(r"-?\d+(\.\d+)?([eE][-+]?\d+)?", text))
            if numbers:
                m = numbers[draw(st.integers(0, len(numbers) - 1))]
                text = text[:m.start()] + draw(st.sampled_from(EXTREME_NUMBERS)) + text[m.end():]
        elif op == "swap" and j > i:
            k = draw(st.integers(j, len(text)))
            text = text[:i] + text[j:k] + text[i:j] + text[k:]
        elif op == "truncate":
            text = text[:i]
    return text


def _paths(obj, prefix=()):
    yield prefix
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield from _paths(v, prefix + (k,))
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            yield from _paths(v, prefix + (i,))


def _replace(obj, path, value, *, delete=False):
    if not path:
        return value
    head, rest = path[0], path[1:]
    if isinstance(obj, dict):
        out = dict(obj)
        if delete and not rest:
            out.pop(head, None)
        else:
            out[head] = _replace(obj[head], rest, value, delete=delete)
        return out
    out = list(obj)
    if delete and not rest:
        del out[head]
    else:
        out[head] = _replace(obj[head], rest, value, delete=delete)
    return out


@st.composite
def mutated_tree(draw, base):
    """A JSON-like tree with 1-3 values replaced by wrong types/extremes, or keys removed."""
    tree = base
    for _ in range(draw(st.integers(1, 3))):
        paths = list(_paths(tree))
        path = paths[draw(st.integers(0, len(paths) - 1))]
        if path and draw(st.integers(0, 3)) == 0:
            tree = _replace(tree, path, None, delete=True)
        else:
            tree = _replace(tree, path, draw(st.sampled_from(WEIRD_VALUES)))
    return tree


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        if isinstance(v, float) and math.isnan(v):
            return "nan"
        if isinstance(v, float) and math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v if x is not None) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{json.dumps(str(k))} = {_toml_value(x)}"
                                for k, x in v.items() if x is not None) + " }"
    return '""'


def to_toml(doc: dict, table: str) -> str:
    """A tiny TOML writer for study/claims-shaped documents (top-level keys + [[table]] list)."""
    if not isinstance(doc, dict):
        return f"{table} = {_toml_value(doc)}\n"
    lines = [f"{json.dumps(str(k))} = {_toml_value(v)}" for k, v in doc.items()
             if k != table and v is not None and not (isinstance(v, list) and k == table)]
    rows = doc.get(table)
    if isinstance(rows, list):
        for row in rows:
            lines.append(f"\n[[{table}]]")
            if isinstance(row, dict):
                lines += [f"{json.dumps(str(k))} = {_toml_value(v)}" for k, v in row.items()
                          if v is not None]
    elif rows is not None:
        lines.append(f"{table} = {_toml_value(rows)}")
    return "\n".join(lines) + "\n"


# ============================================================================ the check
def expect_load_or_input_error(target: str, fn, *args, **kwargs):
    """Call ``fn``: it may return or raise InputError (one line); anything else fails the test."""
    with time_limit(CASE_LIMIT_S):
        try:
            result = fn(*args, **kwargs)
        except InputError as exc:
            message = str(exc)
            assert message.strip(), f"{target}: InputError without a message"
            assert len(" ".join(message.split())) <= 2000, f"{target}: message is a wall of text"
            count_case(target, "InputError")
            return None
    count_case(target, "loaded")
    return result


def load_model_text(tmp_path: Path, suffix: str, data: str | bytes):
    from profiler.audit import load_model

    path = tmp_path / f"case{suffix}"
    if isinstance(data, bytes):
        path.write_bytes(data)
    else:
        path.write_text(data, encoding="utf-8", errors="surrogatepass")
    return load_model(path)


def _safe(text: str) -> str:
    return text.encode("utf-8", errors="replace").decode("utf-8")


# ---------------------------------------------------------------------------- model files
MODEL_TARGETS = [("bif", "bayesnet.bif", ".bif"), ("xmlbif", "bayesnet.xmlbif", ".xmlbif"),
                 ("uai", "uai", ".uai"), ("circuit", "circuit.json", ".json"),
                 ("neural_scm", "neural_scm.json", ".json"),
                 ("linear_scm", "linear_scm.json", ".json")]


def _model_text_case(tmp_path, seeds, data, target, key, suffix):
    text = data.draw(mutated_text(seeds[key]))
    expect_load_or_input_error(target, load_model_text, tmp_path, suffix, _safe(text))


def _model_tree_case(tmp_path, seeds, data, target, key):
    tree = data.draw(mutated_tree(json.loads(seeds[key])))
    text = json.dumps(tree, allow_nan=True)
    expect_load_or_input_error(target, load_model_text, tmp_path, ".json", text)


@pytest.mark.parametrize("target, key, suffix", MODEL_TARGETS)
@FAST
@given(data=st.data())
def test_model_files_load_or_raise_input_error(tmp_path, seeds, data, target, key, suffix):
    """Mutated model files of every format: load, or InputError — nothing else."""
    _model_text_case(tmp_path, seeds, data, target, key, suffix)


@pytest.mark.parametrize("target, key", [t[:2] for t in MODEL_TARGETS if t[2] == ".json"])
@FAST
@given(data=st.data())
def test_json_models_with_wrong_values_raise_input_error(tmp_path, seeds, data, target, key):
    """Our JSON formats with values of the wrong type or range: load, or InputError."""
    _model_tree_case(tmp_path, seeds, data, target + "-tree", key)


@FAST
@given(blob=st.binary(max_size=400), suffix=st.sampled_from([".bif", ".xmlbif", ".uai",
                                                             ".json", ".bif.gz"]))
def test_random_bytes_as_model_files_raise_input_error(tmp_path, blob, suffix):
    """Random bytes (not UTF-8, not gzip) under every model suffix: InputError."""
    expect_load_or_input_error("model-bytes", load_model_text, tmp_path, suffix, blob)


# ---------------------------------------------------------------------------- study, claims
def _load_study(tmp_path: Path, text: str):
    from profiler.study import load_study_file

    path = tmp_path / "study.toml"
    path.write_text(text, encoding="utf-8")
    return load_study_file(path)


def _load_claims(tmp_path: Path, text: str):
    from profiler.claims import load_claims

    path = tmp_path / "claims.toml"
    path.write_text(text, encoding="utf-8")
    return load_claims(path)


def _toml_case(tmp_path, data, base: str, table: str, label: str, load) -> None:
    """A mutation of ``base``: its text garbled, or its parsed tree altered and re-written."""
    import tomllib

    if data.draw(st.booleans()):
        text = data.draw(mutated_text(base))
    else:
        text = to_toml(data.draw(mutated_tree(tomllib.loads(base))), table)
    expect_load_or_input_error(label, load, tmp_path, _safe(text))


def _study_case(tmp_path, data):
    _toml_case(tmp_path, data, STUDY, "curve", "study-toml", _load_study)


def _claims_case(tmp_path, data):
    _toml_case(tmp_path, data, CLAIMS, "claim", "claims-toml", _load_claims)


@FAST
@given(data=st.data())
def test_study_files_load_or_raise_input_error(tmp_path, data):
    """Mutated study files: a StudySpec, or InputError naming the file and field."""
    _study_case(tmp_path, data)


@FAST
@given(data=st.data())
def test_claims_files_load_or_raise_input_error(tmp_path, data):
    """Mutated claims files: a list of claims, or InputError."""
    _claims_case(tmp_path, data)


# ---------------------------------------------------------------------------- fit CSV
def _read_csv(tmp_path: Path, text: str):
    from profiler.fitcsv import read_fit_csv

    path = tmp_path / "fit.csv"
    path.write_text(text, encoding="utf-8")
    return read_fit_csv(path)


cells = st.one_of(st.sampled_from(EXTREME_NUMBERS + ["", "true", "x", '"1,2"', "1;2", " 3 "]),
                  st.floats(allow_nan=True, allow_infinity=True).map(repr),
                  st.integers(-10 ** 6, 10 ** 20).map(str))


@st.composite
def fit_csvs(draw) -> str:
    if draw(st.booleans()):
        return draw(mutated_text(FIT_CSV))
    header = draw(st.lists(st.sampled_from(["size", "cost", "censored", "curve", "other", ""]),
                           min_size=1, max_size=5))
    rows = draw(st.lists(st.lists(cells, min_size=0, max_size=6), max_size=12))
    return "\n".join([",".join(header)] + [",".join(r) for r in rows]) + "\n"


@FAST
@given(text=fit_csvs())
def test_fit_csv_loads_or_raises_input_error(tmp_path, text):
    """Mutated and generated fit CSVs: curves of finite numbers, or InputError naming the row."""
    result = expect_load_or_input_error("fit-csv", _read_csv, tmp_path, _safe(text))
    if result is not None:
        import numpy as np

        for sizes, costs, censored in result.values():
            assert np.all(np.isfinite(sizes)) and np.all(np.isfinite(costs))


# ---------------------------------------------------------------------------- query syntax
@st.composite
def query_texts(draw) -> str:
    if draw(st.integers(0, 4)) == 0:
        return draw(st.text(alphabet=st.sampled_from(list("PEMXYZ_{}()|=,<>.0123 do-+e")),
                            max_size=40))
    return draw(mutated_text(draw(st.sampled_from(QUERIES))))


def _parse(text: str, continuous: bool):
    from model_zoo.query_syntax import parse_query

    if continuous:
        return parse_query(text, continuous=True, variables=list(QUERY_STATES))
    return parse_query(text, states=QUERY_STATES)


@FAST
@given(text=query_texts(), continuous=st.booleans())
def test_query_syntax_parses_or_raises_input_error(text, continuous):
    """Mutated query notation, discrete and continuous: a Query, or InputError with a position."""
    expect_load_or_input_error("query", _parse, text, continuous)


# ---------------------------------------------------------------------------- long runs
@pytest.mark.slow
@pytest.mark.parametrize("target, key, suffix", MODEL_TARGETS)
@SLOW
@given(data=st.data())
def test_model_files_long_fuzz(tmp_path, seeds, data, target, key, suffix):
    _model_text_case(tmp_path, seeds, data, target, key, suffix)
    if suffix == ".json":
        _model_tree_case(tmp_path, seeds, data, target + "-tree", key)


@pytest.mark.slow
@SLOW
@given(data=st.data())
def test_study_and_claims_long_fuzz(tmp_path, data):
    _study_case(tmp_path, data)
    _claims_case(tmp_path, data)


@pytest.mark.slow
@SLOW
@given(text=fit_csvs(), query=query_texts(), continuous=st.booleans())
def test_csv_and_query_long_fuzz(tmp_path, text, query, continuous):
    expect_load_or_input_error("fit-csv", _read_csv, tmp_path, _safe(text))
    expect_load_or_input_error("query", _parse, query, continuous)


# ---------------------------------------------------------------------------- at the command line
CLI_CASES = [
    ("audit", "bad.bif", "network x {\nvariable A { type discrete [ 2 ] { a, b }; }\n"
                         "probability ( A ) { table 0.2, 0.9 ; }\n"),
    ("audit", "bad.uai", "BAYES\n2\n2\n"),
    ("audit", "bad.xmlbif", "<BIF><NETWORK><VARIABLE>"),
    ("audit", "bad.json", '{"family": "circuit", "format_version": 1, "nodes": 3}'),
    ("audit", "bad2.json", '{"family": "linear_scm", "format_version": 1, "variables": '
                           '[{"name": "X", "parents": {}, "noise_variance": -1}]}'),
    ("fit", "bad.csv", "size,cost\n1,2\n2,abc\n"),
    ("check", "bad.toml", "[[claim]]\nfamily = 3\n"),
    ("run", "bad.toml", 'name = "x"\n[[curve]]\nfamily = "circuit"\nlevel = "sideways"\n'),
]


@pytest.mark.parametrize("command, name, text", CLI_CASES, ids=[c[1] + "-" + c[0] for c in CLI_CASES])
def test_rejected_inputs_exit_2_with_one_line(tmp_path, command, name, text):
    """What the loaders reject, the command line reports as exit 2 and one line on stderr."""
    from typer.testing import CliRunner

    from profiler.cli import app

    path = tmp_path / name
    path.write_text(text)
    extra = {"check": ["--no-run-missing", "--store", str(tmp_path / "s.sqlite")],
             "run": ["--store", str(tmp_path / "s.sqlite"), "--quiet"]}.get(command, [])
    result = CliRunner().invoke(app, [command, str(path), *extra])
    assert result.exit_code == 2, (result.stdout, result.stderr)
    lines = [ln for ln in result.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "Traceback" not in result.stderr, result.stderr
    assert name in lines[0]


def test_bad_query_at_the_command_line_exits_2(tmp_path):
    """A malformed --query for audit: exit 2, one line naming the query."""
    from typer.testing import CliRunner

    from profiler.cli import app

    path = tmp_path / "m.json"
    from model_zoo.base import Size

    family = resolve_family("linear_scm")
    family.dump(family.build(Size(3, 1), topology="chain", seed=0), path)
    result = CliRunner().invoke(app, ["audit", str(path), "--query", "P(X0 = | do(", "--json"])
    assert result.exit_code == 2, (result.stdout, result.stderr)
    lines = [ln for ln in result.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "Traceback" not in result.stderr, result.stderr


def resolve_family(name: str):
    from model_zoo.base import resolve

    return resolve(name)()


# ---------------------------------------------------------------------------- found by fuzzing
@pytest.mark.parametrize("field", ["type", "variable"])
def test_circuit_node_fields_of_the_wrong_type_are_input_errors(tmp_path, seeds, field):
    """Found by ``make fuzz``: a circuit node whose ``type`` or ``variable`` is a list."""
    doc = json.loads(seeds["circuit.json"])
    leaf = next(n for n in doc["nodes"] if n["type"] == "leaf")
    leaf[field] = []
    expect_load_or_input_error("circuit-regression", load_model_text, tmp_path, ".json",
                               json.dumps(doc))
