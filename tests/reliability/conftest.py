"""Shared pieces of the reliability suite: a case counter, a hard time limit, a loopback cluster.

The fuzz tests count every input they feed (``count_case``); the counts are printed at the end
of the session (``pytest_terminal_summary``), so a run says how many cases it actually tried.
"""

from __future__ import annotations

import collections
import contextlib
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
FAM = "tests.families_for_tests:"
CASES: "collections.Counter[str]" = collections.Counter()
OUTCOMES: "collections.Counter[str]" = collections.Counter()


def count_case(target: str, outcome: str) -> None:
    """Record one fuzz case of ``target`` that ended in ``outcome`` ("loaded" or "InputError")."""
    CASES[target] += 1
    OUTCOMES[f"{target}:{outcome}"] += 1


def pytest_terminal_summary(terminalreporter, exitstatus, config):  # noqa: ARG001
    if not CASES:
        return
    terminalreporter.section("reliability: fuzz cases run")
    for target in sorted(CASES):
        loaded = OUTCOMES.get(f"{target}:loaded", 0)
        rejected = OUTCOMES.get(f"{target}:InputError", 0)
        terminalreporter.write_line(f"{target:>16}: {CASES[target]:6d} cases "
                                    f"({loaded} loaded, {rejected} rejected with InputError)")
    terminalreporter.write_line(f"{'total':>16}: {sum(CASES.values()):6d} cases")


class HardTimeout(Exception):
    """A call ran past the reliability suite's bound (a hang, as far as the suite is concerned)."""


@contextlib.contextmanager
def time_limit(seconds: float):
    """Raise HardTimeout in the main thread after ``seconds`` (SIGALRM; POSIX only)."""
    def on_alarm(signum, frame):  # noqa: ARG001
        raise HardTimeout(f"no answer within {seconds:g} s")

    old = signal.signal(signal.SIGALRM, on_alarm)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)


def cli(*args: str, timeout: float = 120, cwd: Path | None = None) -> subprocess.CompletedProcess:
    """Run ``python -m profiler.cli ARGS`` as the user would, and wait for it."""
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-m", "profiler.cli", *args], cwd=cwd or ROOT,
                          env=env, capture_output=True, text=True, timeout=timeout)


@pytest.fixture(scope="session")
def dask_client():
    """One LocalCluster of two single-threaded worker processes on 127.0.0.1 for the session."""
    pytest.importorskip("distributed")
    from profiler.cluster import open_client

    with open_client("local:2") as client:
        yield client


def _exp_work_family():
    from model_zoo.base import Answer
    from tests.families_for_tests import LinearFamily

    class ExpWorkFamily(LinearFamily):
        """Honest answers whose counted work doubles per size unit (cheap to run: the work is
        counted, not spent), for tests that need an exponential curve by work."""

        name = "test_expwork"

        def answer(self, instance, query, *, method):
            a = super().answer(instance, query, method=method)
            return Answer(value=a.value, work=float(2.0 ** instance.size.graph))

        def predicted_work(self, instance, query, *, method):
            return float(2.0 ** instance.size.graph)

        def expected_growth(self, *, axis, topology, level, method):
            return "exponential"

    return ExpWorkFamily


ExpWorkFamily = _exp_work_family()
