"""kill -9 of the command line at random moments of a study, then ``--resume``.

After any number of kills the store holds every point of the study exactly once, none is lost,
the points stored before a kill are never measured again (their rows are unchanged), and SQLite's
``PRAGMA integrity_check`` passes. The moment of each kill is drawn from a seeded generator: after
a random number of stored points plus a random delay, so kills land in worker start-up, in the
middle of a point, and between the store's transactions.
"""

from __future__ import annotations

import os
import random
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.reliability.conftest import ROOT, cli

STUDY = """
name = "kill-resume"
budget_s = 300
point_timeout_s = 10
seed = 3

[[curve]]
family = "tests.families_for_tests:LinearFamily"
level = "associational"
sizes = [1, 2, 3, 4, 5]
fixed = 1
queries = 1

[[curve]]
family = "linear_scm"
level = "interventional"
sizes = [2, 3, 4, 5, 6]
fixed = 1
queries = 1
"""
EXPECTED = {(0, s) for s in (1, 2, 3, 4, 5)} | {(1, s) for s in (2, 3, 4, 5, 6)}


def stored_rows(store: Path) -> list[tuple]:
    """(curve, size, run, finished_at, point_json) of every stored point (read-only)."""
    if not store.exists() or store.stat().st_size == 0:
        return []
    con = sqlite3.connect(f"file:{store}?mode=ro", uri=True, timeout=30)
    try:
        return con.execute("SELECT curve, size, run, finished_at, point_json FROM points "
                           "ORDER BY curve, size").fetchall()
    except sqlite3.OperationalError:  # not yet created: the kill came before the schema
        return []
    finally:
        con.close()


def run_and_kill(study: Path, store: Path, out: Path, *, after_points: int, delay_s: float,
                 resume: bool, limit_s: float = 120.0) -> bool:
    """Start the CLI; SIGKILL it once ``after_points`` points are stored plus ``delay_s``.

    Returns True if it was killed, False if it finished first.
    """
    args = [sys.executable, "-m", "profiler.cli", "run", str(study), "--store", str(store),
            "--out", str(out), "--quiet"] + (["--resume"] if resume else [])
    proc = subprocess.Popen(args, cwd=ROOT, env=dict(os.environ, PYTHONPATH=str(ROOT)),
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    end = time.monotonic() + limit_s
    try:
        while len(stored_rows(store)) < after_points:
            if proc.poll() is not None:
                return False
            if time.monotonic() > end:
                raise AssertionError("the study did not progress within the limit")
            time.sleep(0.05)
        time.sleep(delay_s)
        if proc.poll() is not None:
            return False
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
        return True
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        if proc.stderr is not None:
            proc.stderr.close()


def check_store(store: Path) -> list[tuple]:
    con = sqlite3.connect(str(store))
    try:
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        rows = con.execute("SELECT curve, size FROM points").fetchall()
    finally:
        con.close()
    return rows


def kill_then_resume(tmp_path: Path, seed: int, n_kills: int) -> None:
    rng = random.Random(seed)
    study = tmp_path / "study.toml"
    study.write_text(STUDY)
    store, out = tmp_path / "store.sqlite", tmp_path / "out"
    before: list[tuple] = []
    for k in range(n_kills):
        if len(before) >= len(EXPECTED):
            break
        after = rng.randrange(len(before), len(EXPECTED))  # a kill with points still to come
        killed = run_and_kill(study, store, out, after_points=after,
                              delay_s=rng.uniform(0.0, 0.6), resume=k > 0)
        rows = stored_rows(store)
        # Nothing stored before a kill changes afterwards (never re-measured, never rewritten).
        assert set(before) <= set(rows)
        before = rows
        if not killed:
            break
    done = cli("run", str(study), "--store", str(store), "--out", str(out), "--quiet",
               "--resume", timeout=300)
    assert done.returncode == 0, done.stderr
    final = check_store(store)
    assert len(final) == len(set(final)), "a point is stored twice"
    assert set(final) == EXPECTED, f"missing {EXPECTED - set(final)}, extra {set(final) - EXPECTED}"
    assert set(before) <= set(stored_rows(store)), "a point stored before a kill was re-measured"
    assert (out / "index.html").exists()


@pytest.mark.parametrize("seed", [11, 12])
def test_kill9_at_random_moments_then_resume_keeps_every_point_once(tmp_path, seed):
    """Two kills at seeded random moments, then --resume: each point exactly once, none lost."""
    kill_then_resume(tmp_path, seed, n_kills=2)


@pytest.mark.slow
@pytest.mark.parametrize("seed", range(20, 26))
def test_kill9_many_seeds(tmp_path, seed):
    """The same, over more seeds and up to four kills per study."""
    kill_then_resume(tmp_path, seed, n_kills=4)
