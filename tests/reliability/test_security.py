"""Security: nothing read is unpickled or evaluated; user code runs only when named; output is
escaped and stays inside its folder.

* no module of ``profiler`` or ``model_zoo`` imports pickle-like modules, calls ``eval``/``exec``,
  runs a shell, or calls ``np.load`` without ``allow_pickle=False`` (read from the syntax tree,
  not a text search, so a docstring mentioning a word does not count and a call cannot hide);
* a user's family module is imported only when a study names it as ``module:Class`` — never by
  listing the zoo, loading the default study, or a bare unknown name; a model *file* cannot name
  code to import;
* every model-derived string in the HTML report is escaped;
* paths in study files cannot make the tool write outside the chosen output folder.
"""

from __future__ import annotations

import ast
import os
import subprocess
import sys
import textwrap
from dataclasses import replace
from pathlib import Path

import pytest

from tests.reliability.conftest import ROOT

PACKAGES = ("profiler", "model_zoo")
UNSAFE_MODULES = {"pickle", "cPickle", "_pickle", "dill", "cloudpickle", "marshal", "shelve",
                  "joblib"}
UNSAFE_CALLS = {"eval", "exec", "compile", "__import__"}


def sources() -> list[Path]:
    files = [p for pkg in PACKAGES for p in sorted((ROOT / pkg).rglob("*.py"))]
    assert len(files) > 20, "found too few modules: the scan would be vacuous"
    return files


def _dotted(node: ast.AST) -> str:
    if isinstance(node, ast.Name):
        return node.id
    if isinstance(node, ast.Attribute):
        return f"{_dotted(node.value)}.{node.attr}"
    return ""


def unsafe_uses(path: Path) -> list[str]:
    """Every unsafe construct in one module, as 'file:line: what'."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    found = []
    rel = path.relative_to(ROOT)
    for node in ast.walk(tree):
        if not isinstance(node, (ast.Import, ast.ImportFrom, ast.Call)):
            continue
        where = f"{rel}:{node.lineno}"
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] in UNSAFE_MODULES:
                    found.append(f"{where}: import {alias.name}")
        elif isinstance(node, ast.ImportFrom):
            if (node.module or "").split(".")[0] in UNSAFE_MODULES:
                found.append(f"{where}: from {node.module} import ...")
        elif isinstance(node, ast.Call):
            name = _dotted(node.func)
            keywords = {k.arg: k.value for k in node.keywords}
            if name in UNSAFE_CALLS or name.endswith(".read_pickle") or name in ("yaml.load",):
                found.append(f"{where}: {name}(...)")
            if name in ("np.load", "numpy.load"):
                flag = keywords.get("allow_pickle")
                if not (isinstance(flag, ast.Constant) and flag.value is False):
                    found.append(f"{where}: {name}(...) without allow_pickle=False")
            shell = keywords.get("shell")
            if isinstance(shell, ast.Constant) and shell.value is True:
                found.append(f"{where}: {name}(..., shell=True)")
            if name in ("os.system", "os.popen"):
                found.append(f"{where}: {name}(...)")
    return found


def test_no_module_unpickles_evaluates_or_shells_out():
    """No pickle (or look-alikes), eval, exec, compile, shell or pickling np.load anywhere."""
    problems = [p for path in sources() for p in unsafe_uses(path)]
    assert problems == []


def test_the_scanner_catches_what_it_looks_for(tmp_path):
    """The scanner itself: each forbidden construct in a sample module is reported."""
    sample = tmp_path / "sample.py"
    sample.write_text(textwrap.dedent("""
        import pickle
        from marshal import loads
        import numpy as np
        eval("1")
        exec("x = 1")
        np.load("a.npy")
        np.load("a.npy", allow_pickle=True)
        np.load("a.npy", allow_pickle=False)
        import subprocess
        subprocess.run("ls", shell=True)
    """))
    global ROOT
    old, ROOT = ROOT, tmp_path
    try:
        found = unsafe_uses(sample)
    finally:
        ROOT = old
    assert len(found) == 7, found


# ---------------------------------------------------------------------------- user code
MARKER_MODULE = """
import pathlib, os
pathlib.Path(os.environ["INFERCOST_MARKER"]).write_text("imported")
from tests.families_for_tests import LinearFamily as Fam
"""


def run_python(code: str, tmp_path: Path) -> tuple[subprocess.CompletedProcess, bool]:
    """Run ``code`` with a module ``evilfam`` importable; did anything import it?"""
    (tmp_path / "evilfam.py").write_text(MARKER_MODULE)
    marker = tmp_path / "marker.txt"
    if marker.exists():
        marker.unlink()
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(tmp_path), str(ROOT)]),
               INFERCOST_MARKER=str(marker))
    done = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, env=env,
                          capture_output=True, text=True, timeout=120)
    return done, marker.exists()


def test_user_family_is_not_imported_unless_named(tmp_path):
    """Listing the zoo, building the default study and a bare unknown family name import no
    user module."""
    code = textwrap.dedent("""
        import model_zoo
        from model_zoo.errors import InputError
        from profiler.study import default_study, study_from_dict
        model_zoo.names()
        default_study()
        try:
            study_from_dict({"name": "x", "curve": [{"family": "evilfam", "level": "associational"}]})
        except InputError:
            print("rejected")
    """)
    done, imported = run_python(code, tmp_path)
    assert done.returncode == 0, done.stderr
    assert "rejected" in done.stdout
    assert not imported


def test_user_family_named_explicitly_is_imported(tmp_path):
    """The control: naming ``evilfam:Fam`` in a study does import it (so the test above can fail)."""
    code = textwrap.dedent("""
        from profiler.study import study_from_dict
        spec = study_from_dict({"name": "x", "curve": [{"family": "evilfam:Fam",
                                                        "level": "associational"}]})
        print(spec.curves[0].family)
    """)
    done, imported = run_python(code, tmp_path)
    assert done.returncode == 0, done.stderr
    assert imported


def test_a_model_file_cannot_name_code_to_import(tmp_path):
    """A JSON model whose ``family`` key names ``module:Class``: InputError, nothing imported —
    a data file is not the user naming their code."""
    (tmp_path / "model.json").write_text('{"family": "evilfam:Fam", "format_version": 1}')
    code = textwrap.dedent("""
        from model_zoo.errors import InputError
        from profiler.audit import load_model
        try:
            load_model("model.json")
        except InputError as exc:
            print("rejected")
    """)
    done, imported = run_python(code, tmp_path)
    assert done.returncode == 0, done.stderr
    assert not imported


# ---------------------------------------------------------------------------- HTML escaping
PAYLOAD = '<script>alert("x")</script>"><img src=x onerror=alert(1)>'


def hostile_study():
    """A stored study whose every model-derived string carries an HTML payload."""
    from profiler.records import StudySpec
    from tests.profiler.synthetic_study import make_curve, make_study

    curves = []
    for i, (law, param) in enumerate((("power", 1.0), ("exponential", 1.5))):
        c = make_curve(i, law=law, param=param, family="bayesnet", theory="polynomial",
                       sizes=(4, 8, 16, 32, 64) if law == "power" else (2, 4, 6, 8, 10),
                       work_unit=PAYLOAD, mechanism_knob=PAYLOAD,
                       statuses={10: "wrong"} if law != "power" else None)
        spec = replace(c.spec, family=f"evil.mod:Fam{PAYLOAD}", topology=f"chain{PAYLOAD}")
        points = tuple(replace(p, family=spec.family, topology=spec.topology,
                               message=f"failed {PAYLOAD}", worker=f"host{PAYLOAD}:1")
                       for p in c.points)
        curves.append(replace(c, spec=spec, points=points))
    result = make_study(curves, name="hostile")
    spec = StudySpec(name="hostile", curves=tuple(c.spec for c in curves),
                     description=f"about {PAYLOAD}")
    return replace(result, spec=spec, environment={"host": PAYLOAD, "cpu": {"model": PAYLOAD}},
                   workers={f"w{PAYLOAD}": {"host": PAYLOAD, "cpu_model": PAYLOAD}})


def test_html_report_escapes_every_model_derived_string(tmp_path):
    """Family, topology, messages, worker ids, environment, units: escaped in index.html."""
    from profiler.report import write_report

    paths = write_report(hostile_study(), tmp_path / "out")
    page = Path(paths["index.html"]).read_text(encoding="utf-8")
    assert "<script" not in page.lower()  # the report has no script of its own
    assert "<img src=x" not in page and "onerror=alert" not in page.replace("onerror=alert(1)&gt;", "")
    assert "&lt;script&gt;alert(" in page  # the strings are shown, escaped (the test can fail)
    assert page.count("&lt;script&gt;alert(") >= 3


def test_report_files_stay_inside_the_output_folder(tmp_path):
    """Hostile curve keys (slashes, '..') never become paths: every file lands under out/."""
    from profiler.report import write_report

    result = hostile_study()
    curves = tuple(replace(c, spec=replace(c.spec, family="../../../escape/x:Y",
                                           topology="../../../../tmp/escape"))
                   for c in result.curves)
    result = replace(result, curves=curves)
    out = tmp_path / "deep" / "out"
    before = set(tmp_path.rglob("*"))
    write_report(result, out)
    created = set(tmp_path.rglob("*")) - before
    assert created, "the report wrote nothing"
    outside = [p for p in created if out not in p.parents and p != out and p != out.parent]
    assert outside == []


# ---------------------------------------------------------------------------- study paths
@pytest.mark.parametrize("name", ["../escape", "/etc/passwd", "a/b", "..", ".hidden", "a\\b",
                                  "~root", "x" * 200, "", "nul\x00"])
def test_study_names_cannot_point_outside_the_reports_folder(tmp_path, name):
    """The study name becomes ``reports/<name>``: path separators, '..', absolute paths and
    control characters are refused (InputError naming the field)."""
    from profiler.errors import InputError
    from profiler.study import study_from_dict

    with pytest.raises(InputError, match="name"):
        study_from_dict({"name": name, "curve": [{"family": "circuit",
                                                  "level": "associational"}]})


def test_run_with_an_escaping_name_writes_nothing(tmp_path):
    """Through the command line: exit 2, no store, no folder outside the working directory."""
    from typer.testing import CliRunner

    from profiler.cli import app

    work = tmp_path / "work"
    work.mkdir()
    study = work / "study.toml"
    study.write_text('name = "../../escaped"\n[[curve]]\nfamily = "circuit"\n'
                     'level = "associational"\n')
    before = set(tmp_path.rglob("*"))
    cwd = os.getcwd()
    os.chdir(work)
    try:
        result = CliRunner().invoke(app, ["run", str(study), "--quiet"])
    finally:
        os.chdir(cwd)
    assert result.exit_code == 2, result.stderr
    assert set(tmp_path.rglob("*")) == before
