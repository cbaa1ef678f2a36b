"""The study runner: budget sharing, events, stored results, and kill -9 followed by --resume."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from profiler.records import CurveSpec, StudySpec
from profiler.runner import BudgetPool, run_study
from profiler.store import Store

ROOT = Path(__file__).resolve().parents[2]
FAM = "tests.families_for_tests:"


def curve(family: str, **kw) -> CurveSpec:
    values = dict(family=FAM + family, level="associational", method="exact", axis="graph",
                  topology="chain", fixed=2, queries=2)
    values.update(kw)
    return CurveSpec(**values)


class Clock:
    def __init__(self) -> None:
        self.t = 0.0

    def __call__(self) -> float:
        return self.t


def test_budget_is_shared_fairly_and_rebalanced():
    """Four curves, two slots, 100 s: each starts with 50 slot-seconds; a curve finishing early
    leaves its share to the curves after it; the last ones may use what is left."""
    clock = Clock()
    pool = BudgetPool(100.0, n_curves=4, n_slots=2, clock=clock)
    pool.begin(0)
    pool.begin(1)
    assert pool.seconds_left(0) == pytest.approx(50.0)
    clock.t = 10.0
    pool.end(0)  # finished after 10 s of its 50
    pool.begin(2)
    # free slot-seconds: 90*2 - 40 (still held by curve 1) = 140, shared by 2 curves -> 70,
    # but never more than the 90 s of wall time left
    assert pool.seconds_left(2) == pytest.approx(70.0)
    assert pool.seconds_left(1) == pytest.approx(40.0)
    pool.begin(3)  # every curve has started: the running ones may use all the time left
    assert pool.seconds_left(1) == pytest.approx(90.0)
    clock.t = 200.0
    assert pool.seconds_left(3) == 0.0


def small_study(name="runner", budget_s=60.0, point_timeout_s=5.0, **kw) -> StudySpec:
    return StudySpec(name=name, budget_s=budget_s, point_timeout_s=point_timeout_s,
                     memory_mb=256, curves=(curve("LinearFamily", sizes=(2, 4, 8)),
                                            curve("WrongFamily", sizes=(2, 4))), **kw)


def test_run_study_stores_points_and_emits_events(tmp_path):
    events = []
    store = tmp_path / "s.sqlite"
    result = run_study(small_study(), store=store, on_event=events.append, quick=True)
    assert [p.size for p in result.curves[0].points] == [2, 4, 8]
    assert [p.status for p in result.curves[1].points] == ["ok", "wrong"]
    kinds = [e["event"] for e in events]
    assert kinds[0] == "study_start" and kinds[-1] == "study_done"
    assert kinds.count("curve_start") == 2 and kinds.count("curve_done") == 2
    assert kinds.count("point") == 5
    for e in events:
        assert "eta_s" in e
        if e["event"] == "point":
            assert {"curve", "key", "size", "status", "seconds", "cap"} <= set(e)
    assert result.environment["calibration"]["seconds"] > 0
    assert result.workers and all("calibration" in env for env in result.workers.values())
    assert result.curves[0].theory == "polynomial" and result.curves[0].work_unit == "additions"
    with Store(store, create=False) as s:
        assert s.load_study(result.study_id).curves == result.curves


def test_a_wrong_curve_gets_no_verdict(tmp_path):
    """Acceptance: the wrong-answer family is stored 'wrong' and the analysis gives no verdict."""
    analysis = pytest.importorskip("profiler.analysis")
    spec = StudySpec(name="wrong", budget_s=60, point_timeout_s=5, memory_mb=256,
                     curves=(curve("WrongFamily", sizes=(2, 4, 8, 16),
                                   params=(("wrong_from", 8),)),))
    result = run_study(spec, store=tmp_path / "s.sqlite", quick=True)
    statuses = [p.status for p in result.curves[0].points]
    assert "wrong" in statuses
    a = analysis.analyse_curve(result.curves[0])
    assert a.work is None and a.time is None


def test_timeouts_do_not_stop_the_study(tmp_path):
    """Acceptance: a doubling family under a 1 s cap is censored; the other curve still runs."""
    spec = StudySpec(name="runaway", budget_s=40, point_timeout_s=1.0, memory_mb=256,
                     curves=(curve("DoublingFamily", sizes=(8, 12, 22, 23)),
                             curve("LinearFamily", sizes=(2, 4))))
    result = run_study(spec, store=tmp_path / "s.sqlite", quick=True)
    doubling = {p.size: p.status for p in result.curves[0].points}
    assert doubling == {8: "ok", 12: "ok", 22: "timeout"}
    assert [p.status for p in result.curves[1].points] == ["ok", "ok"]
    assert result.finished_at is not None


def test_the_budget_cuts_curves_and_the_store_says_which(tmp_path):
    spec = StudySpec(name="tight", budget_s=0.5, point_timeout_s=2.0, memory_mb=256,
                     curves=(curve("LinearFamily", min_size=2, max_size=10 ** 6),))
    result = run_study(spec, store=tmp_path / "s.sqlite", quick=True)
    c = result.curves[0]
    assert c.cut_by_budget
    assert len(c.points) < 8


def write_study(tmp_path) -> Path:
    sizes = list(range(2, 12))
    path = tmp_path / "kill.toml"
    path.write_text(
        'name = "killme"\nbudget_s = 200\npoint_timeout_s = 5\nmemory_mb = 256\n'
        f'[[curve]]\nfamily = "{FAM}LinearFamily"\nlevel = "associational"\n'
        f'sizes = {sizes}\nqueries = 2\n'
        f'[[curve]]\nfamily = "{FAM}LinearFamily"\nlevel = "interventional"\n'
        f'sizes = {sizes}\nqueries = 2\n')
    return path


def count_points(store: Path) -> int:
    if not store.exists():
        return 0
    try:
        con = sqlite3.connect(f"file:{store}?mode=ro", uri=True, timeout=5)
        try:
            return con.execute("SELECT COUNT(*) FROM points").fetchone()[0]
        finally:
            con.close()
    except sqlite3.Error:
        return 0


def test_kill_minus_nine_then_resume_measures_only_the_missing_points(tmp_path):
    """Acceptance: SIGKILL of the running study, then --resume: every point exactly once, the
    resumed run measured only the missing ones, the file passes PRAGMA integrity_check."""
    study = write_study(tmp_path)
    store = tmp_path / "s.sqlite"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    cmd = [sys.executable, "-m", "profiler.runner", str(study), "--store", str(store), "--quick"]
    proc = subprocess.Popen(cmd, cwd=ROOT, env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE)
    deadline = time.monotonic() + 60
    workers_seen: set[int] = set()
    try:
        while count_points(store) < 5:
            assert proc.poll() is None, proc.stderr.read().decode()
            assert time.monotonic() < deadline, "the study never stored 5 points"
            workers_seen |= _children(proc.pid)
            time.sleep(0.05)
    finally:
        workers_seen |= _children(proc.pid)
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    # the workers die with the study (parent-death signal, or end of input for one still
    # starting), none is left measuring
    assert workers_seen
    give_up = time.monotonic() + 15
    while any(_alive(pid) for pid in workers_seen) and time.monotonic() < give_up:
        time.sleep(0.1)
    assert not any(_alive(pid) for pid in workers_seen)
    before = count_points(store)
    assert 5 <= before < 20
    resumed = subprocess.run(cmd + ["--resume"], cwd=ROOT, env=env, capture_output=True,
                             text=True, timeout=120)
    assert resumed.returncode == 0, resumed.stderr
    con = sqlite3.connect(store)
    try:
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        rows = con.execute("SELECT curve, size FROM points").fetchall()
    finally:
        con.close()
    assert sorted(rows) == sorted((c, s) for c in (0, 1) for s in range(2, 12))
    with Store(store, create=False) as s:
        (study_row,) = s.studies()
        runs = s.runs(study_row["study_id"])
    assert [r["run"] for r in runs] == [1, 2]
    assert runs[0]["n_points"] == before
    assert runs[1]["n_points"] == 20 - before


def _children(pid: int) -> set[int]:
    """Processes started by any thread of ``pid`` (Linux /proc)."""
    found: set[int] = set()
    for task in Path(f"/proc/{pid}/task").glob("*"):
        try:
            found |= {int(x) for x in (task / "children").read_text().split()}
        except OSError:
            continue
    return found


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().split()[2]
    except OSError:
        return False
    return state != "Z"

