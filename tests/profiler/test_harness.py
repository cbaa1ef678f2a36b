"""The harness: timing rules in-process, and curves in isolated workers that survive blow-ups.

The misbehaving families live in tests/families_for_tests.py. Caps are tiny so each test is
fast; no test asserts an absolute time except the acceptance bound "killed within cap + 1 s".
"""

from __future__ import annotations

import math
import os
import time

import pytest

from model_zoo.base import Answer, Level, Size
from profiler.harness import (StudyContext, check_answers, run_curve, time_queries,
                              worker_env)
from profiler.records import CurveSpec
from tests.families_for_tests import LinearFamily, SamplingFamily

FAST = dict(min_repeat_seconds=0.002, min_repeats=3, max_repeats=6)


def ctx(**kw) -> StudyContext:
    values = dict(study_id="t", point_timeout_s=5.0, memory_mb=512, **FAST)
    values.update(kw)
    return StudyContext(**values)


def curve(family: str, **kw) -> CurveSpec:
    values = dict(family=f"tests.families_for_tests:{family}", level="associational",
                  method="exact", axis="graph", topology="chain", fixed=2, queries=2)
    values.update(kw)
    return CurveSpec(**values)


# ------------------------------------------------------------------ time_queries (in-process)
def test_time_queries_follows_the_timing_rules():
    """>= min_repeats repeats of a calibrated loop count, median within [min, max]."""
    fam = LinearFamily()
    inst = fam.build(Size(64, 2), topology="chain", seed=1)
    qs = fam.queries(inst, Level.ASSOCIATIONAL, n=5, seed=2)
    t = time_queries(fam, inst, qs, method="exact", min_repeat_seconds=0.005, min_repeats=5,
                     max_repeats=8)
    assert 5 <= t.repeats <= 8 and len(t.repeat_seconds) == t.repeats
    # the calibrating repeat (the first kept) lasted at least min_repeat_seconds
    assert t.repeat_seconds[0] * t.loops * len(qs) >= 0.005
    assert t.seconds_min <= t.seconds_median <= t.seconds_max
    assert t.work == 128.0  # mean Answer.work = entries summed
    assert len(t.answers) == 5 and not t.cold_only
    assert t.seconds_spread >= 0


def test_time_queries_keeps_to_its_deadline():
    """With no time left after the warm-up, the warm-up is the only repeat and it says so."""
    fam = LinearFamily()
    inst = fam.build(Size(8, 2), topology="chain", seed=1)
    qs = fam.queries(inst, Level.ASSOCIATIONAL, n=3, seed=2)
    t = time_queries(fam, inst, qs, method="exact", deadline=time.perf_counter() - 1)
    assert t.cold_only and t.repeats == 1 and t.loops == 1
    assert t.seconds_median == pytest.approx(t.first_pass_seconds / 3)


def test_time_queries_answers_one_at_a_time_unless_batched():
    """Per-query latency by default (the unit work counts in); answer_batch only when asked."""
    class Batch(LinearFamily):
        calls = 0

        def answer_batch(self, instance, queries, *, method):
            Batch.calls += 1
            return [Answer(value=0.5, work=1.0) for _ in queries]

    fam = Batch()
    inst = fam.build(Size(4, 2), topology="chain", seed=1)
    qs = fam.queries(inst, Level.ASSOCIATIONAL, n=4, seed=2)
    time_queries(fam, inst, qs, method="exact", min_repeat_seconds=0.001, min_repeats=3,
                 max_repeats=3)
    assert Batch.calls == 0
    t = time_queries(fam, inst, qs, method="exact", min_repeat_seconds=0.001, min_repeats=3,
                     max_repeats=3, batched=True)
    assert Batch.calls >= 1 + t.repeats * t.loops


# ------------------------------------------------------------------ correctness guard
class _Ref:
    def __init__(self, ref, ref_stderr=None):
        self.ref = ref
        if ref_stderr is not None:
            self.reference_stderr = lambda inst, q: ref_stderr

    def reference(self, instance, query):
        return self.ref


@pytest.mark.parametrize("value,ref,stderr,method,extra,ok", [
    (0.3, 0.3 + 5e-10, None, "exact", None, True),       # within 1e-9 absolute
    (0.3, 0.3 + 5e-9, None, "exact", None, False),       # beyond it
    (1000.0, 1000.0 + 5e-7, None, "exact", None, True),  # relative 1e-9 for large values
    (0.30, 0.33, 0.01, "sampling", None, True),          # 3 stderr: inside 4 stderr
    (0.30, 0.35, 0.01, "sampling", None, False),         # 5 stderr: outside
    (0.30, 0.35, 0.01, "sampling", 0.01, True),          # estimated reference widens it
    (math.nan, 0.3, None, "exact", None, False),         # NaN never matches
])
def test_check_answers_tolerances(value, ref, stderr, method, extra, ok):
    """Tolerances of the correctness guard (the lead's interface: 1e-9 exact, 4*stderr sampling)."""
    fam = _Ref(ref, extra)
    res = check_answers(fam, None, [object()], [Answer(value=value, work=1, stderr=stderr)],
                        method=method)
    assert res["n_checked"] == 1
    assert (res["n_wrong"] == 0) is ok


def test_check_answers_skips_missing_references():
    res = check_answers(_Ref(None), None, [object()], [Answer(0.1, 1)], method="exact")
    assert res["n_checked"] == 0 and res["max_error"] is None


# ------------------------------------------------------------------ isolated curves
def test_doubling_family_is_killed_at_the_cap_and_the_curve_stops_growing():
    """Acceptance: a cost that doubles per size unit, 1 s cap: the runaway point is killed within
    cap + 1 s, stored as timeout with a lower bound, and nothing larger is tried."""
    points = []
    out = run_curve(ctx(point_timeout_s=1.0), 0,
                    curve("DoublingFamily", min_size=12, max_size=40, params=(("base_seconds", 1e-5),)),
                    set(), on_point=points.append)
    timeouts = [p for p in out.points if p.status == "timeout"]
    assert len(timeouts) == 1
    t = timeouts[0]
    wall, _ = out.point_seconds[t.size]
    assert wall <= 1.0 + 1.0
    assert t.seconds_median is not None and t.seconds_median > 0  # a lower bound per query
    assert t.is_censored and "lower bound" in t.message
    assert all(p.size < t.size for p in out.points if p is not t)
    assert [p.size for p in points] == [p.size for p in out.points]
    assert any(p.status == "ok" for p in out.points)
    assert out.theory == "exponential" and out.reason


def test_allocating_family_is_stopped_by_the_memory_cap():
    """Acceptance: unbounded allocation ends as a 'memory' point; the worker's address-space
    limit is its baseline plus the cap, and this process is unharmed."""
    out = run_curve(ctx(point_timeout_s=20.0, memory_mb=96), 0,
                    curve("AllocatingFamily", sizes=(2, 4, 8), params=(("alloc_from", 4),)),
                    set())
    by_size = {p.size: p for p in out.points}
    assert by_size[2].status == "ok"
    assert by_size[4].status == "memory", by_size[4].message
    assert 8 not in by_size  # beyond a censored size
    env = next(iter(out.workers.values()))
    assert env["memory_limit_bytes"] == env["baseline_vm_bytes"] + 96 * 2 ** 20
    assert by_size[4].worker and by_size[4].worker.split(":")[-1] != str(os.getpid())


def test_preflight_refuses_a_point_predicted_past_the_memory_cap():
    out = run_curve(ctx(memory_mb=64), 0, curve("HugeFamily", sizes=(2, 4)), set())
    p = {p.size: p for p in out.points}[4]
    assert p.status == "memory" and "not run" in p.message  # the family asserts it never ran


def test_segfault_becomes_an_error_point_and_a_fresh_worker_continues():
    """A crash is an 'error' with the signal; the next listed size runs in a new worker."""
    out = run_curve(ctx(), 0, curve("CrashingFamily", sizes=(2, 4, 5),
                                    params=(("crash_from", 4),)), set())
    by_size = {p.size: p for p in out.points}
    assert by_size[2].status == "ok"
    assert by_size[4].status == "error" and "SIGSEGV" in by_size[4].message
    assert by_size[5].status == "error"
    assert len(out.workers) >= 2  # one per crash, plus the first


def test_model_error_becomes_an_error_point():
    out = run_curve(ctx(), 0, curve("RaisingFamily", sizes=(2, 4)), set())
    p = {p.size: p for p in out.points}[4]
    assert p.status == "error" and "ModelError" in p.message and "refuses size 4" in p.message


def test_wrong_answers_are_marked_wrong_with_the_error():
    out = run_curve(ctx(), 0, curve("WrongFamily", sizes=(2, 4)), set())
    by_size = {p.size: p for p in out.points}
    assert by_size[2].status == "ok" and by_size[2].max_error is not None
    assert by_size[2].max_error <= 1e-9
    assert by_size[4].status == "wrong" and by_size[4].max_error == pytest.approx(0.1)
    assert "differ from the reference" in by_size[4].message


def test_sampling_answers_are_judged_by_their_stderr():
    ok = run_curve(ctx(), 0, curve("SamplingFamily", method="sampling", sizes=(8,), queries=4),
                   set())
    assert ok.points[0].status == "ok"
    biased = run_curve(ctx(), 0, curve("SamplingFamily", method="sampling", sizes=(8,),
                                       params=(("bias", 0.2),)), set())
    assert biased.points[0].status == "wrong"


def test_a_family_that_cannot_be_constructed_gives_one_error_point():
    out = run_curve(ctx(), 0, curve("SlowInitFamily", sizes=(2, 4), params=(("bad", 1),)), set())
    assert len(out.points) == 1 and out.points[0].status == "error"
    assert "not allowed" in out.points[0].message


def test_points_carry_work_profile_prediction_and_build_time():
    out = run_curve(ctx(), 3, curve("LinearFamily", sizes=(4, 16), queries=3), {4})
    assert [p.size for p in out.points] == [16]  # 4 was already stored
    p = out.points[0]
    assert p.status == "ok" and p.curve == 3 and p.study == "t"
    assert p.work == 32.0 and p.predicted_work == 32.0 and p.n_queries == 3
    assert p.profile == {"n_variables": 16.0, "n_edges": 15.0, "n_parameters": 32.0}
    assert p.build_seconds is not None and p.build_seconds >= 0
    assert p.repeats >= 3 and len(p.repeat_seconds) == p.repeats
    assert p.peak_bytes is not None and p.peak_bytes >= 0


def test_grid_sizes_are_realised_by_the_family():
    out = run_curve(ctx(), 0, curve("LinearFamily", topology="grid", sizes=(4, 10, 16)), set())
    assert [p.size for p in out.points] == [4, 9, 16]


def test_threads_are_pinned_in_the_worker_and_recorded():
    out = run_curve(ctx(threads=2), 0, curve("LinearFamily", sizes=(2,)), set())
    env = next(iter(out.workers.values()))
    assert env["threads"] == 2
    assert env["thread_variables"]["OMP_NUM_THREADS"] == "2"
    assert all(lib.get("num_threads", 2) <= 2 for lib in env["blas"])
    assert env["calibration"]["seconds"] > 0
    assert worker_env(3)["OPENBLAS_NUM_THREADS"] == "3"


def test_budget_stops_a_curve_and_says_so():
    out = run_curve(ctx(), 0, curve("LinearFamily", sizes=(2, 3, 4)), set(), budget=lambda: 0.0)
    assert out.points == () and out.cut_by_budget and out.reason == "budget"


def test_interleaved_sweep_retimes_the_points_of_a_finished_curve():
    """After the curve, each small ok point gets one repeat per round of the sweep; its own
    measurements are kept and seconds_fastest is the least of the sweep's repeats."""
    revised = []
    out = run_curve(ctx(interleave_rounds=4), 0, curve("LinearFamily", sizes=(2, 4, 8, 16)),
                    set(), on_revised=revised.append)
    assert out.revised == tuple(revised)
    assert [p.size for p in revised] == [2, 4, 8, 16]
    for new, old in zip(revised, out.points):
        assert len(new.interleaved_seconds) == 4 and all(s > 0 for s in new.interleaved_seconds)
        assert new.repeat_seconds == old.repeat_seconds and new.work == old.work
        # Only the sweep's repeats count once there are any (they share the other sizes' spells).
        assert new.seconds_fastest == min(new.interleaved_seconds)


def test_no_sweep_when_switched_off_or_when_points_are_long():
    for settings in ({"interleave_rounds": 0}, {"interleave_repeat_s": 0.0}):
        revised = []
        out = run_curve(ctx(**settings), 0, curve("LinearFamily", sizes=(2, 4, 8)), set(),
                        on_revised=revised.append)
        assert revised == [] and out.revised == ()
        assert all(p.interleaved_seconds == () for p in out.points)


def test_events_report_each_point():
    events = []
    run_curve(ctx(), 1, curve("LinearFamily", sizes=(2, 3)), set(), on_event=events.append)
    kinds = [e["event"] for e in events]
    assert kinds == ["point_start", "point", "point_start", "point"]
    assert all({"curve", "key", "size", "cap"} <= set(e) for e in events)
    assert events[1]["status"] == "ok" and events[1]["seconds"] > 0


# ------------------------------------------------------------------ launchers (profiler.zygote)
LAUNCHERS = ["auto", "spawn"]


def _running(pid: int) -> bool:
    """Whether a process exists and is not a zombie (os.kill(pid, 0), then its /proc state)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


def _wait_gone(pids, seconds: float = 10.0) -> bool:
    end = time.monotonic() + seconds
    while any(_running(p) for p in pids) and time.monotonic() < end:
        time.sleep(0.05)
    return not any(_running(p) for p in pids)


zygote_only = pytest.mark.skipif(not __import__("profiler.zygote").zygote.is_supported(),
                                 reason="the preloaded launcher needs Linux and send_fds")


@zygote_only
def test_workers_are_forked_from_the_zygote_and_answer_correctly():
    """On Linux a worker is a fork of the preloaded zygote (not of this process, not a fresh
    interpreter); it answers as a spawned worker does (exact answers checked against the
    reference), measures its own memory baseline, and the environment says how it started."""
    from profiler import zygote

    forked = run_curve(ctx(), 0, curve("LinearFamily", sizes=(4, 16), queries=3), set())
    spawned = run_curve(ctx(launcher="spawn"), 0, curve("LinearFamily", sizes=(4, 16), queries=3),
                        set())
    (env,) = forked.workers.values()
    assert env["launcher"] == "fork-preloaded"
    assert env["zygote_pid"] not in (None, os.getpid()) and env["pid"] != env["zygote_pid"]
    assert env["memory_limit_bytes"] == env["baseline_vm_bytes"] + 512 * 2 ** 20
    assert [p.status for p in forked.points] == ["ok", "ok"]
    assert [(p.size, p.work, p.max_error) for p in forked.points] == \
        [(p.size, p.work, p.max_error) for p in spawned.points]
    assert next(iter(spawned.workers.values()))["launcher"] == "spawn"
    # outside a study the zygote lingers briefly for the next curve, then goes
    assert any(z.pid == env["zygote_pid"] for z in zygote.live_zygotes())
    assert _wait_gone([env["zygote_pid"], env["pid"]], zygote.LINGER_S + 10)


@pytest.mark.parametrize("launcher", LAUNCHERS)
def test_timeout_kill_holds_on_both_launchers(launcher):
    """The runaway point is killed within cap + 1 s whichever way the worker was started."""
    out = run_curve(ctx(point_timeout_s=1.0, launcher=launcher), 0,
                    curve("DoublingFamily", sizes=(10, 30), params=(("base_seconds", 1e-5),)),
                    set())
    by_size = {p.size: p for p in out.points}
    assert by_size[10].status == "ok" and by_size[30].status == "timeout"
    assert out.point_seconds[30][0] <= 1.0 + 1.0
    envs = list(out.workers.values())
    assert envs[0]["launcher"] == ("spawn" if launcher == "spawn" else "fork-preloaded")
    assert _wait_gone([e["pid"] for e in envs], 5)  # the killed worker is gone, not a zombie


@pytest.mark.parametrize("launcher", LAUNCHERS)
def test_segfault_and_memory_cap_on_both_launchers(launcher):
    """A segfault in a (forked) worker is an 'error' naming SIGSEGV; the next worker still
    starts; an unbounded allocation is a 'memory' point under the child's own RLIMIT_AS."""
    crash = run_curve(ctx(launcher=launcher), 0,
                      curve("CrashingFamily", sizes=(2, 4), params=(("crash_from", 4),)), set())
    by_size = {p.size: p for p in crash.points}
    assert by_size[2].status == "ok"
    assert by_size[4].status == "error" and "SIGSEGV" in by_size[4].message
    assert "Segmentation fault" in by_size[4].message  # faulthandler's line, from the child
    mem = run_curve(ctx(point_timeout_s=20.0, memory_mb=96, launcher=launcher), 0,
                    curve("AllocatingFamily", sizes=(2, 4), params=(("alloc_from", 4),)), set())
    assert [p.status for p in mem.points] == ["ok", "memory"]
    env = next(iter(mem.workers.values()))
    assert env["memory_limit_bytes"] == env["baseline_vm_bytes"] + 96 * 2 ** 20


def test_fallback_to_spawn_when_the_zygote_cannot_start(monkeypatch):
    """A zygote that fails to start is not an error: workers are spawned, and the environment
    records 'spawn' with the reason; INFERCOST_LAUNCHER=spawn forces the same path."""
    from profiler import zygote

    monkeypatch.setattr(zygote, "acquire", lambda **kw: (None, "no zygote today"))
    monkeypatch.setattr(zygote, "is_supported", lambda: True)
    out = run_curve(ctx(), 0, curve("LinearFamily", sizes=(2, 3)), set())
    assert [p.status for p in out.points] == ["ok", "ok"]
    (env,) = out.workers.values()
    assert env["launcher"] == "spawn" and env["launcher_note"] == "no zygote today"
    monkeypatch.undo()
    monkeypatch.setenv("INFERCOST_LAUNCHER", "spawn")
    out = run_curve(ctx(), 0, curve("LinearFamily", sizes=(2,)), set())
    assert next(iter(out.workers.values()))["launcher"] == "spawn"


@zygote_only
def test_a_zygote_that_fails_its_start_falls_back(monkeypatch):
    """A zygote process that dies during its imports (here: an interpreter that exits at once)
    leaves the curve measuring through spawned workers."""
    from profiler import zygote

    monkeypatch.setattr(zygote, "_key", lambda *a: ("broken-zygote-test",))
    real_init = zygote.Zygote.__init__

    def broken(self, **kw):
        real_init(self, **kw)
        self.python = "/bin/false"  # exits 1 before saying "ready"

    monkeypatch.setattr(zygote.Zygote, "__init__", broken)
    out = run_curve(ctx(), 0, curve("LinearFamily", sizes=(2,)), set())
    (env,) = out.workers.values()
    assert out.points[0].status == "ok"
    assert env["launcher"] == "spawn" and "zygote" in env["launcher_note"]
    monkeypatch.undo()
    zygote._STARTS.pop(("broken-zygote-test",), None)


@zygote_only
def test_the_zygote_exits_when_the_study_ends(tmp_path):
    """No leaked processes: after run_study returns, the zygote and every worker it forked are
    gone (checked with os.kill(pid, 0))."""
    from profiler.records import StudySpec
    from profiler.runner import run_study

    spec = StudySpec(name="zygote-end", budget_s=60, point_timeout_s=5, memory_mb=256,
                     curves=(curve("LinearFamily", sizes=(2, 4)),
                             curve("CrashingFamily", sizes=(2, 4), params=(("crash_from", 4),))))
    result = run_study(spec, store=tmp_path / "s.sqlite", quick=True)
    envs = list(result.workers.values())
    assert envs and all(e["launcher"] == "fork-preloaded" for e in envs)
    pids = {e["zygote_pid"] for e in envs} | {e["pid"] for e in envs}
    assert len({e["zygote_pid"] for e in envs}) == 1  # one zygote for the whole study
    for pid in pids:
        with pytest.raises(ProcessLookupError):
            os.kill(pid, 0)


@zygote_only
def test_zygote_and_workers_die_with_a_killed_parent(tmp_path):
    """kill -9 of the process that started the zygote takes the zygote and its forked worker
    with it (parent-death signal and end-of-file on the socket)."""
    import signal
    import subprocess
    import sys

    script = (
        "import sys, time\n"
        "from profiler import zygote\n"
        "from profiler.harness import worker_env\n"
        "z, why = zygote.acquire(python=sys.executable, threads=1, sys_path=tuple(sys.path),\n"
        "                        env=worker_env(1))\n"
        "err = open(sys.argv[1], 'wb')\n"
        "p = z.spawn(stderr_fd=err.fileno(), families=False)\n"
        "print(z.pid, p.pid, flush=True)\n"
        "time.sleep(60)\n")
    root = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    proc = subprocess.Popen([sys.executable, "-c", script, str(tmp_path / "err")],
                            stdout=subprocess.PIPE, cwd=root, text=True,
                            env=dict(os.environ, PYTHONPATH=root))
    try:
        line = proc.stdout.readline()
        zpid, wpid = (int(x) for x in line.split())
        assert _running(zpid) and _running(wpid)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    assert _wait_gone([zpid, wpid], 10)


def test_workers_import_a_family_from_the_working_directory(tmp_path, monkeypatch):
    """A user's family module in the current directory imports in the workers even when the
    study's import path does not list that directory (as under the console script)."""
    (tmp_path / "my_family_here.py").write_text(
        "from tests.families_for_tests import LinearFamily\n"
        "class Mine(LinearFamily):\n    name = 'mine'\n")
    root = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    monkeypatch.setenv("PYTHONPATH", root)
    path = tuple(p for p in __import__("sys").path if p and os.path.abspath(p) != str(tmp_path))
    # A zygote started from another directory first (it is then reused: same settings).
    run_curve(ctx(sys_path=path), 0, curve("LinearFamily", sizes=(2,)), set())
    monkeypatch.chdir(tmp_path)
    for launcher in LAUNCHERS:
        spec = curve("LinearFamily", sizes=(2,))
        spec = CurveSpec(**{**spec.__dict__, "family": "my_family_here:Mine"})
        out = run_curve(ctx(sys_path=path, launcher=launcher), 0, spec, set())
        assert [p.status for p in out.points] == ["ok"], (launcher, out.points[0].message)
