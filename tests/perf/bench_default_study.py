"""Benchmark of the default study (issue 9): ``make demo`` under 2 minutes, every curve decided.

One row (``run() -> list[dict]``, the ``make bench`` table): the wall seconds of
``python -m profiler.cli run --quiet --json --store TMP/store.sqlite --out TMP/report`` (the
built-in default study, the command behind ``make demo``) against the 120 s goal, and how many of
its curves got a decided verdict (``polynomial`` or ``exponential`` on work or time) as read from
``TMP/report/results.json``. ``met`` needs both: under 120 s and every curve decided.

The study runs in a subprocess with a hard limit of ``TIMEOUT_S``; a CLI that is missing, fails
or overruns gives a row that says so. Not collected by pytest; asserts nothing.
Run alone: ``python -m tests.perf.bench_default_study``.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

GOAL_S = 120.0
TIMEOUT_S = 600.0
DECIDED = ("polynomial", "exponential")


def _decided(curve: dict) -> bool:
    verdict = curve.get("verdict") or {}
    for key in ("work", "time"):
        v = verdict.get(key) or {}
        if isinstance(v, dict) and v.get("growth") in DECIDED:
            return True
    return False


def run() -> list[dict]:
    root = Path(__file__).resolve().parents[2]
    row = {"engine": "default study", "workload": "infercost run (make demo), wall seconds",
           "ours": None, "peer_or_floor": GOAL_S, "ratio": None,
           "goal": "< 120 s on 2 cores, every curve a decided verdict", "met": False}
    with tempfile.TemporaryDirectory(prefix="infercost-bench-") as tmp:
        out = Path(tmp) / "report"
        cmd = [sys.executable, "-m", "profiler.cli", "run", "--quiet", "--json",
               "--store", str(Path(tmp) / "store.sqlite"), "--out", str(out)]
        env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1")
        t0 = time.perf_counter_ns()
        try:
            proc = subprocess.run(cmd, cwd=root, env=env, capture_output=True, text=True,
                                  timeout=TIMEOUT_S)
        except subprocess.TimeoutExpired:
            row["ours"] = TIMEOUT_S
            row["goal"] += f" (NOT RUNNABLE: still running after {TIMEOUT_S:.0f} s, killed)"
            return [row]
        wall = (time.perf_counter_ns() - t0) * 1e-9
        row["ours"] = wall
        row["ratio"] = wall / GOAL_S
        if proc.returncode != 0:
            last = (proc.stderr.strip().splitlines() or ["no message"])[-1]
            row["goal"] += f" (NOT RUNNABLE: exit {proc.returncode}: {last[:160]})"
            return [row]
        results = out / "results.json"
        if not results.exists():
            row["goal"] += " (no results.json written)"
            return [row]
        curves = json.loads(results.read_text()).get("curves", [])
        n_decided = sum(_decided(c) for c in curves)
        row["workload"] += f"; {n_decided} of {len(curves)} curves decided"
        row["met"] = bool(wall < GOAL_S and curves and n_decided == len(curves))
    return [row]


if __name__ == "__main__":
    for r in run():
        print(r)
