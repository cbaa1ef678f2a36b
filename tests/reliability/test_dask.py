"""Scale-out on a Dask cluster (a LocalCluster on 127.0.0.1): streaming, worker loss, equal verdicts.

* a curve whose Dask worker is killed with SIGKILL mid-curve is redone elsewhere; the study
  completes; no point is stored twice and no finished point is measured again;
* a study of 12 curves gives, on ``local:2``, the same verdicts by work as the local runner
  (work counts are deterministic, so the fitted work verdicts must be identical);
* the local cluster listens on loopback only;
* :func:`profiler.cluster.normalise_times` puts times from two machines on one scale.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import time
from pathlib import Path

import pytest

from profiler.cluster import (calibration_seconds, machine_of, normalise_times, parse_address,
                              store_curves_dask)
from profiler.environment import capture_environment
from profiler.errors import InputError
from profiler.records import CurveSpec, Point, StudySpec
from profiler.runner import run_study, study_context
from profiler.store import Store
from tests.reliability.conftest import FAM

pytest.importorskip("distributed")


def toy(fixed: int, sizes, level: str = "associational", family: str = "LinearFamily",
        **params) -> CurveSpec:
    return CurveSpec(family=FAM + family, level=level, method="exact", axis="graph",
                     topology="chain", fixed=fixed, sizes=tuple(sizes), queries=2,
                     params=tuple(sorted(params.items())))


def run_on_dask(client, spec: StudySpec, path: Path, *, resume: bool = False, **options):
    """What ``run_study(..., dask=...)`` does, on the session's cluster: store, run, load."""
    with Store(path) as st:
        sid = st.open_study(spec, capture_environment(calibrate=False), resume=resume)
        stored: dict[int, list[Point]] = {}
        for p in st.points(sid):
            stored.setdefault(p.curve, []).append(p)
        summary = store_curves_dask(None, study_context(spec, sid), spec, stored, store=st,
                                    study_id=sid, client=client, **options)
        st.finish_study(sid)
        return summary, st.load_study(sid)


# ---------------------------------------------------------------------------- addresses
@pytest.mark.parametrize("text, expected", [
    ("local:2", ("local", 2)),
    ("tcp://127.0.0.1:8786", ("remote", "tcp://127.0.0.1:8786")),
    ("tls://scheduler.example:8786", ("remote", "tls://scheduler.example:8786")),
])
def test_parse_address_accepts_the_documented_forms(text, expected):
    assert parse_address(text) == expected


@pytest.mark.parametrize("text", ["local:0", "local:x", "local:", "8786", "tcp://host",
                                  "tcp://:8786", "http://host:8786", "tcp://host:99999", ""])
def test_parse_address_rejects_anything_else_with_one_line(text):
    with pytest.raises(InputError) as info:
        parse_address(text)
    assert "--dask" in str(info.value) and "\n" not in str(info.value)


def test_unreachable_scheduler_is_an_input_error():
    """A scheduler nobody runs: one InputError line (exit 2 at the CLI), not a traceback."""
    from profiler.cluster import open_client

    with pytest.raises(InputError, match="cannot reach the Dask scheduler"):
        with open_client("tcp://127.0.0.1:9", timeout_s=2):
            pass


def _listening_addresses(pids) -> list[str]:
    """Local addresses of the TCP sockets in LISTEN state owned by ``pids`` (Linux /proc)."""
    inodes = set()
    for pid in pids:
        fd_dir = Path(f"/proc/{pid}/fd")
        for fd in fd_dir.iterdir():
            try:
                target = os.readlink(fd)
            except OSError:
                continue
            if target.startswith("socket:["):
                inodes.add(target[len("socket:["):-1])
    found = []
    for table in ("/proc/net/tcp", "/proc/net/tcp6"):
        try:
            lines = Path(table).read_text().splitlines()[1:]
        except OSError:
            continue
        for line in lines:
            cols = line.split()
            if cols[3] == "0A" and cols[9] in inodes:  # 0A: TCP_LISTEN
                found.append(cols[1].split(":")[0])
    return found


def test_local_cluster_listens_on_loopback_only(dask_client):
    """Every socket the ``local:N`` cluster listens on (scheduler and nannies in this process,
    the worker processes) is bound to 127.0.0.1: nothing is reachable from the network unless
    the user asks for it (common practice for a tool's private services)."""
    info = dask_client.scheduler_info()
    assert info["address"].startswith("tcp://127.0.0.1:")
    assert info["workers"], "no workers"
    for address, w in info["workers"].items():
        assert address.startswith("tcp://127.0.0.1:"), address
        assert (w.get("nanny") or "tcp://127.0.0.1:").startswith("tcp://127.0.0.1:")
    if not Path("/proc/net/tcp").exists():
        pytest.skip("needs Linux /proc to list listening sockets")
    pids = [os.getpid(), *dask_client.run(os.getpid).values()]
    found = _listening_addresses(pids)
    assert found, "found no listening socket at all (the check would be vacuous)"
    loopback = {"0100007F", "00000000000000000000000001000000"}  # 127.0.0.1, ::1 (little-endian)
    assert set(found) <= loopback, found


# ---------------------------------------------------------------------------- streaming, workers
def test_points_stream_back_and_every_worker_records_its_environment(dask_client, tmp_path):
    """Each curve is one task; points carry their worker and their interleaved repeats; the
    store records the Dask workers' and the measuring processes' environments, each with a
    calibration figure."""
    spec = StudySpec(name="dask-stream", curves=(toy(1, [1, 2, 3]), toy(2, [1, 2, 3])),
                     budget_s=120, point_timeout_s=10)
    summary, result = run_on_dask(dask_client, spec, tmp_path / "s.sqlite")
    assert summary.n_new_points == 6 and summary.n_duplicates_dropped == 0
    sizes = {c.index: sorted(p.size for p in c.points) for c in result.curves}
    assert sizes == {0: [1, 2, 3], 1: [1, 2, 3]}
    for c in result.curves:
        for p in c.points:
            assert "@tcp://127.0.0.1:" in p.worker
            assert calibration_seconds(p, result.workers) is not None
            # The curve's interleaved sweep ran on the Dask worker and reached the store.
            assert len(p.interleaved_seconds) >= 3
    dask_ids = [w for w in result.workers if w.startswith("dask:")]
    assert dask_ids and all(result.workers[w]["calibration"]["seconds"] > 0 for w in dask_ids)


def test_killed_worker_loses_nothing_and_its_curve_is_redone(dask_client, tmp_path):
    """SIGKILL of the Dask worker running curve 0 after its first stored point: the study
    completes, curve 0's remaining sizes are measured on a worker again, the sizes stored before
    the kill are not measured again, and no (curve, size) is stored twice."""
    spec = StudySpec(name="dask-kill", budget_s=300, point_timeout_s=10, curves=(
        toy(1, [1, 2, 3, 4, 5, 6], family="DoublingFamily", base_seconds=0.004),
        toy(2, [1, 2, 3, 4]), toy(3, [1, 2, 3, 4])))
    killed: dict[str, object] = {}
    path = tmp_path / "s.sqlite"

    def on_event(event):
        if (event.get("event") == "point" and event.get("curve") == 0 and not killed
                and event.get("size") == 2):
            address = event["dask_worker"]
            pid = dask_client.run(os.getpid, workers=[address])[address]
            os.kill(pid, signal.SIGKILL)
            killed.update(address=address, pid=pid, at=time.monotonic())

    with Store(path) as st:
        sid = st.open_study(spec, {}, resume=False)
        summary = store_curves_dask(None, study_context(spec, sid), spec, {}, store=st,
                                    study_id=sid, client=dask_client, emit=on_event)
        st.finish_study(sid)
        result = st.load_study(sid)
    assert killed, "the test never killed a worker"
    assert summary.retried.get(0, 0) >= 1 and not summary.lost_curves
    assert summary.n_duplicates_dropped == 0
    by_curve = {c.index: sorted(p.size for p in c.points) for c in result.curves}
    assert by_curve == {0: [1, 2, 3, 4, 5, 6], 1: [1, 2, 3, 4], 2: [1, 2, 3, 4]}
    curve0 = {p.size: p for p in result.curves[0].points}
    # Sizes 1 and 2 reached the client before the kill: measured by the dead worker, kept.
    for size in (1, 2):
        assert curve0[size].worker.endswith("@" + killed["address"])
    # The rest was measured after the kill, by a live worker.
    assert not curve0[6].worker.endswith("@" + killed["address"])
    assert all(p.status == "ok" for c in result.curves for p in c.points)
    con = sqlite3.connect(str(path))
    try:
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        n, distinct = con.execute("SELECT COUNT(*), COUNT(DISTINCT curve || ':' || size) "
                                  "FROM points").fetchone()
    finally:
        con.close()
    assert n == distinct == 14


def test_resume_after_a_local_run_continues_on_dask(dask_client, tmp_path):
    """A study stopped by its budget locally is resumed on the cluster: only missing points run
    (the client alone writes the store, so resume works across runs and clusters)."""
    path = tmp_path / "s.sqlite"
    spec = StudySpec(name="dask-resume", curves=(toy(1, [1, 2, 3, 4]),), budget_s=120,
                     point_timeout_s=10)
    with Store(path) as st:
        sid = st.open_study(spec, {}, resume=False)
        first = Point(study=sid, curve=0, family=spec.curves[0].family, level="associational",
                      method="exact", axis="graph", topology="chain", fixed=1, size=2,
                      status="ok", seconds_median=1.0, work=2.0, worker="elsewhere:1",
                      finished_at=1.0)
        st.add_point(first)
    summary, result = run_on_dask(dask_client, spec, path, resume=True)
    assert result.study_id == sid and summary.n_new_points == 3
    points = {p.size: p for p in result.curves[0].points}
    assert sorted(points) == [1, 2, 3, 4]
    assert points[2].worker == "elsewhere:1" and points[2].seconds_median == 1.0


# ---------------------------------------------------------------------------- acceptance
#: 12 quick curves: cheap worker start-up (no pgmpy); polynomial work (test LinearFamily,
#: linear_scm) and exponential work (ExpWorkFamily in conftest, whose counted work doubles).
FAST_CURVES = tuple(
    [toy(f, [1, 2, 3, 4, 6, 8], level=lv) for f in (1, 2, 3) for lv in ("associational", "interventional")]
    + [CurveSpec("tests.reliability.conftest:ExpWorkFamily", lv, "exact", "graph", "chain", 1,
                 sizes=(1, 2, 3, 4, 6, 8, 10), queries=2)
       for lv in ("associational", "interventional")]
    + [CurveSpec("linear_scm", lv, "exact", "graph", "chain", 2, sizes=(4, 8, 16, 32, 64), queries=3)
       for lv in ("associational", "interventional", "counterfactual")]
    + [CurveSpec("linear_scm", "counterfactual", "exact", "mechanism", "random", 12,
                 sizes=(1, 2, 3, 4, 6), queries=3)])

#: 12 curves over the four built-in families (slow: each worker imports its family's stack).
ACCEPTANCE_CURVES = tuple(CurveSpec(f, lv, "exact", ax, topo, fx, sizes=sz, queries=3) for f, lv, ax, topo, fx, sz in (
    ("bayesnet", "associational", "graph", "chain", 2, (4, 8, 16, 32, 64, 128, 256)),
    ("bayesnet", "interventional", "graph", "chain", 2, (4, 8, 16, 32, 64, 128, 256)),
    ("bayesnet", "associational", "mechanism", "chain", 8, (2, 3, 4, 6, 8, 10, 12)),
    ("circuit", "associational", "graph", "balanced", 4, (4, 8, 16, 32, 64, 128, 256)),
    ("circuit", "associational", "mechanism", "balanced", 8, (2, 4, 8, 16, 32, 48, 64)),
    ("neural_scm", "associational", "graph", "chain", 4, (2, 3, 4, 5, 6, 7, 8)),
    ("neural_scm", "counterfactual", "graph", "chain", 4, (2, 3, 4, 5, 6, 7, 8)),
    ("neural_scm", "associational", "mechanism", "chain", 4, (2, 4, 8, 16, 32, 64, 128)),
    ("linear_scm", "associational", "graph", "chain", 2, (4, 8, 16, 32, 64, 128, 256)),
    ("linear_scm", "interventional", "graph", "chain", 2, (4, 8, 16, 32, 64, 128, 256)),
    ("linear_scm", "counterfactual", "graph", "chain", 2, (4, 8, 16, 32, 64, 128, 256)),
    ("linear_scm", "counterfactual", "mechanism", "random", 12, (1, 2, 3, 4, 6, 8, 10)),
))


def work_verdicts(result) -> dict[int, dict]:
    """Each curve's verdict by work, as the analysis computes it (its work series and fit; the
    time fit is left out: times differ between runs by nature)."""
    from profiler.analysis import _work_series, fit_series

    out = {}
    for c in result.curves:
        assert c.points, f"curve {c.index} has no points"
        sizes, costs, cens, _ = _work_series(sorted(c.points, key=lambda p: p.size))
        verdict, _ = fit_series(sizes, costs, cens, seed=0)
        out[c.index] = None if verdict is None else verdict.to_dict()
    return out


@pytest.mark.parametrize("curves, both_classes", [
    pytest.param(FAST_CURVES, True, id="fast-12"),
    pytest.param(ACCEPTANCE_CURVES, False, id="families-12", marks=pytest.mark.slow),
])
def test_dask_local2_gives_the_local_verdicts_by_work(dask_client, tmp_path, curves,
                                                      both_classes):
    """Acceptance (issue 8): 12 curves on a two-worker loopback cluster give exactly the work
    verdicts of the local runner — every curve's points, work counts and fitted work law."""
    spec = StudySpec(name="dask-acceptance", curves=curves, budget_s=900,
                     point_timeout_s=30, seed=5)
    local = run_study(spec, store=tmp_path / "local.sqlite", workers=2)
    summary, remote = run_on_dask(dask_client, spec, tmp_path / "dask.sqlite")
    assert not summary.lost_curves and len(remote.curves) == 12
    for lc, rc in zip(local.curves, remote.curves):
        assert [(p.size, p.status, p.work) for p in lc.points] == \
               [(p.size, p.status, p.work) for p in rc.points], lc.spec.key()
    lv, rv = work_verdicts(local), work_verdicts(remote)
    assert sum(v is not None for v in lv.values()) >= 10
    if both_classes:  # the comparison covers conclusive verdicts of both classes
        assert {"polynomial", "exponential"} <= {v["growth"] for v in lv.values() if v}
    assert lv == rv


# ---------------------------------------------------------------------------- budget
def test_the_study_budget_stops_dask_tasks(dask_client, tmp_path):
    """A budget far below what the curves want: the tasks stop after their point in flight and
    the curves say they were cut short by the budget."""
    spec = StudySpec(name="dask-budget", budget_s=3.0, point_timeout_s=4.0, curves=(
        toy(1, list(range(1, 15)), family="DoublingFamily", base_seconds=0.001),
        toy(2, list(range(1, 15)), family="DoublingFamily", base_seconds=0.001),
        toy(3, list(range(1, 15)), family="DoublingFamily", base_seconds=0.001)))
    t0 = time.monotonic()
    summary, result = run_on_dask(dask_client, spec, tmp_path / "s.sqlite")
    wall = time.monotonic() - t0
    assert wall < spec.budget_s + 2 * spec.point_timeout_s + 30, wall
    assert any(c.cut_by_budget for c in result.curves)
    assert all(len(c.points) < 14 for c in result.curves)


# ---------------------------------------------------------------------------- normalising times
def _pt(size: int, seconds: float, worker: str, work: float = 10.0) -> Point:
    return Point(study="s", curve=0, family="f", level="associational", method="exact",
                 axis="graph", topology="chain", fixed=1, size=size, status="ok",
                 seconds_median=seconds, seconds_min=seconds * 0.9, seconds_max=seconds * 1.1,
                 repeat_seconds=(seconds, seconds), work=work, worker=worker)


def _env(host: str, seconds: float | None) -> dict:
    return {"host": host, "cpu_model": "cpu", "calibration": {"seconds": seconds}}


def test_times_from_one_machine_are_left_alone():
    points = [_pt(1, 1.0, "a:1@tcp://1"), _pt(2, 2.0, "a:2@tcp://1")]
    workers = {"a:1@tcp://1": _env("a", 0.01), "a:2@tcp://1": _env("a", 0.02)}
    assert normalise_times(points, workers) == points


def test_times_from_two_machines_are_put_on_one_scale():
    """Machine b runs the calibration kernel twice as slowly, and the same work twice as slowly:
    normalised, equal work costs equal time; work and status are untouched."""
    points = [_pt(1, 1.0, "a:1@tcp://1"), _pt(1, 2.0, "b:7@tcp://2")]
    workers = {"a:1@tcp://1": _env("a", 0.01), "b:7@tcp://2": _env("b", 0.02)}
    assert machine_of(points[0], workers) != machine_of(points[1], workers)
    out = normalise_times(points, workers, reference_seconds=0.01)
    assert out[0].seconds_median == pytest.approx(1.0)
    assert out[1].seconds_median == pytest.approx(1.0)
    assert out[1].repeat_seconds == pytest.approx((1.0, 1.0))
    assert out[1].seconds_max == pytest.approx(1.1)
    assert [p.work for p in out] == [10.0, 10.0] and [p.status for p in out] == ["ok", "ok"]
    default = normalise_times(points, workers)  # median of the two figures: 0.015
    assert default[0].seconds_median == pytest.approx(1.5)
    assert default[1].seconds_median == pytest.approx(1.5)


def test_a_machine_without_calibration_loses_its_times_not_its_work():
    points = [_pt(1, 1.0, "a:1@tcp://1"), _pt(2, 2.0, "b:7@tcp://2")]
    workers = {"a:1@tcp://1": _env("a", 0.01), "b:7@tcp://2": _env("b", None)}
    out = normalise_times(points, workers)
    assert out[0].seconds_median == pytest.approx(1.0)
    assert out[1].seconds_median is None and out[1].work == 10.0
    assert "calibration" in out[1].message


def test_a_point_whose_process_was_never_recorded_uses_its_dask_workers_figure():
    """A task killed mid-curve never reports its measuring process's environment; its points
    fall back to the Dask worker's own environment and calibration figure."""
    p = _pt(1, 2.0, "b:7@tcp://10.0.0.2:4000")
    workers = {"dask:tcp://10.0.0.2:4000": _env("b", 0.02)}
    assert calibration_seconds(p, workers) == 0.02
    assert machine_of(p, workers) == "b|cpu"


# ---------------------------------------------------------------------------- through run_study
def test_run_study_with_dask_local_2(tmp_path):
    """``run_study(spec, dask="local:2")`` (what ``infercost run --dask local:2`` calls): every
    point stored once, the Dask workers recorded, a resume measures nothing more."""
    spec = StudySpec(name="dask-run-study", budget_s=120, point_timeout_s=10,
                     curves=(toy(1, [1, 2, 3]), toy(2, [1, 2, 3])))
    store = tmp_path / "s.sqlite"
    result = run_study(spec, store=store, dask="local:2")
    assert {c.index: sorted(p.size for p in c.points) for c in result.curves} == \
        {0: [1, 2, 3], 1: [1, 2, 3]}
    assert any(w.startswith("dask:tcp://127.0.0.1:") for w in result.workers)
    events = []
    again = run_study(spec, store=store, dask="local:2", resume=True, on_event=events.append)
    assert again.study_id == result.study_id
    assert not [e for e in events if e.get("event") == "point"]
