"""A corrupt or foreign file given as the results store: exit 2, one line, the file untouched.

Also: bad input never leaves a partial write behind — a study file that fails to load creates no
store, and leaves an existing store byte for byte as it was.
"""

from __future__ import annotations

import hashlib
import os
import sqlite3
from pathlib import Path

import pytest
from typer.testing import CliRunner

from profiler.cli import app
from profiler.records import CurveSpec, StudySpec
from profiler.store import Store
from tests.reliability.conftest import cli

STUDY = """name = "store-check"
budget_s = 30
[[curve]]
family = "tests.families_for_tests:LinearFamily"
level = "associational"
sizes = [1, 2]
fixed = 1
queries = 1
"""


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def siblings(path: Path) -> set[str]:
    return {p.name for p in path.parent.iterdir()}


def random_bytes_file(path: Path) -> Path:
    path.write_bytes(os.urandom(8192))
    return path


def foreign_sqlite(path: Path) -> Path:
    """Another application's database: a valid SQLite file with its own tables."""
    con = sqlite3.connect(str(path))
    con.executescript("CREATE TABLE users (id INTEGER PRIMARY KEY, name TEXT);"
                      "INSERT INTO users(name) VALUES ('ada'), ('alan');"
                      "PRAGMA user_version = 3;")
    con.commit()
    con.close()
    return path


def impostor_sqlite(path: Path) -> Path:
    """An SQLite file carrying our application_id but none of our tables."""
    from profiler.store import APPLICATION_ID

    con = sqlite3.connect(str(path))
    con.execute(f"PRAGMA application_id = {APPLICATION_ID}")
    con.execute("CREATE TABLE notes (body TEXT)")
    con.commit()
    con.close()
    return path


def truncated_store(path: Path) -> Path:
    """A real infercost store cut in half (a disk that filled up, a bad copy)."""
    spec = StudySpec("cut", (CurveSpec("circuit", "associational", "exact", "graph", "balanced", 4),))
    with Store(path) as st:
        st.open_study(spec, {"host": "x" * 20000}, resume=False)
    data = path.read_bytes()
    for extra in (path.with_name(path.name + "-wal"), path.with_name(path.name + "-shm")):
        if extra.exists():
            extra.unlink()
    path.write_bytes(data[: len(data) // 2])
    return path


BAD_STORES = [random_bytes_file, foreign_sqlite, impostor_sqlite, truncated_store]


def one_line_exit_2(code: int, stderr: str) -> str:
    assert code == 2, stderr
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, stderr
    assert "Traceback" not in stderr
    return lines[0]


@pytest.mark.parametrize("make", BAD_STORES, ids=lambda f: f.__name__)
def test_run_with_a_bad_store_exits_2_and_leaves_it_untouched(tmp_path, make):
    """`infercost run` on a corrupt/foreign store: exit 2, one line naming the file, no byte
    changed, no -wal/-shm file created, no report written."""
    study = tmp_path / "study.toml"
    study.write_text(STUDY)
    store = make(tmp_path / "store.sqlite")
    before, names = digest(store), siblings(store)
    result = CliRunner().invoke(app, ["run", str(study), "--store", str(store), "--out",
                                      str(tmp_path / "out"), "--quiet"])
    line = one_line_exit_2(result.exit_code, result.stderr)
    assert "store.sqlite" in line
    assert digest(store) == before
    assert siblings(store) == names


@pytest.mark.parametrize("command", [["report", "anything"], ["plan", "--family", "circuit"],
                                     ["check", "CLAIMS"]])
@pytest.mark.parametrize("make", [random_bytes_file, foreign_sqlite], ids=lambda f: f.__name__)
def test_reading_commands_refuse_a_bad_store_untouched(tmp_path, make, command):
    """`report`, `plan` and `check` on a corrupt/foreign store: exit 2 and the file untouched."""
    claims = tmp_path / "claims.toml"
    claims.write_text('[[claim]]\nfamily = "circuit"\nlevel = "associational"\nmethod = "exact"\n'
                      'axis = "graph"\ntopology = "balanced"\ngrowth = "polynomial"\n')
    store = make(tmp_path / "store.sqlite")
    before, names = digest(store), siblings(store)
    args = [str(claims) if a == "CLAIMS" else a for a in command]
    extra = ["--no-run-missing"] if command[0] == "check" else []
    result = CliRunner().invoke(app, args + ["--store", str(store)] + extra)
    one_line_exit_2(result.exit_code, result.stderr)
    assert digest(store) == before and siblings(store) == names


def test_real_cli_process_on_a_foreign_store(tmp_path):
    """The same through a real process: exit status 2 and exactly one line on stderr."""
    study = tmp_path / "study.toml"
    study.write_text(STUDY)
    store = foreign_sqlite(tmp_path / "store.sqlite")
    before = digest(store)
    done = cli("run", str(study), "--store", str(store), "--out", str(tmp_path / "out"), "--quiet")
    one_line_exit_2(done.returncode, done.stderr)
    assert digest(store) == before and not (tmp_path / "out").exists()


@pytest.mark.parametrize("bad", [
    'name = "x"\n',                                       # no curves
    'name = "../escape"\n[[curve]]\nfamily = "circuit"\nlevel = "associational"\n',
    STUDY.replace("sizes = [1, 2]", "sizes = [0, -3]"),
    STUDY.replace('level = "associational"', 'level = "counterfactual"').replace(
        "tests.families_for_tests:LinearFamily", "circuit"),
    "name = \n",                                          # TOML syntax error
])
def test_bad_study_file_writes_nothing_to_the_store(tmp_path, bad):
    """A study file that fails validation: exit 2, and the store is neither created nor changed."""
    study = tmp_path / "study.toml"
    study.write_text(bad)
    fresh = tmp_path / "fresh.sqlite"
    result = CliRunner().invoke(app, ["run", str(study), "--store", str(fresh), "--quiet",
                                      "--out", str(tmp_path / "out")])
    one_line_exit_2(result.exit_code, result.stderr)
    assert not fresh.exists()
    existing = tmp_path / "existing.sqlite"
    with Store(existing):
        pass
    before = digest(existing)
    result = CliRunner().invoke(app, ["run", str(study), "--store", str(existing), "--quiet",
                                      "--out", str(tmp_path / "out")])
    one_line_exit_2(result.exit_code, result.stderr)
    assert digest(existing) == before
    assert not (tmp_path / "out").exists()
