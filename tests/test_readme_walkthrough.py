"""Every command of README's walkthrough runs as written (with a private store, a report folder
under a temporary directory and a smaller budget, so the test stays fast)."""

from __future__ import annotations

import json
import shlex
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PREFIX = ".venv/bin/infercost "


def walkthrough_commands() -> list[list[str]]:
    text = (ROOT / "README.md").read_text()
    section = text.split("## Walkthrough", 1)[1].split("\n## ", 1)[0]
    return [shlex.split(line[len(PREFIX):]) for line in section.splitlines()
            if line.startswith(PREFIX)]


def test_the_walkthrough_covers_run_report_plan_check():
    verbs = [cmd[0] for cmd in walkthrough_commands()]
    for verb in ("run", "report", "plan", "check", "audit", "fit"):
        assert verb in verbs, verb


@pytest.fixture(scope="module")
def sandbox(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("walkthrough")


def _adapt(cmd: list[str], tmp: Path) -> list[str]:
    """Same command, but the store, the report folder and the budget are the test's own."""
    out = []
    for word in cmd:
        out.append(str(tmp / word) if word.startswith("reports/") else word)
    verb = cmd[0]
    if verb in ("run", "report", "plan", "check"):
        out += ["--store", str(tmp / "store.sqlite")]
    if verb == "run":
        out += ["--budget", "25", "--quiet", "--out", str(tmp / "reports" / "northvale-nightly")]
    if verb == "report":
        out += ["--out", str(tmp / "reports" / "northvale-nightly")]
    if verb == "check":
        out += ["--no-run-missing"]
    return out


def test_every_walkthrough_command_runs(sandbox):
    """run -> report -> plan -> check -> audit -> fit, in README order, each exits as documented."""
    for cmd in walkthrough_commands():
        proc = subprocess.run([sys.executable, "-m", "profiler.cli", *_adapt(cmd, sandbox)],
                              cwd=ROOT, capture_output=True, text=True, timeout=300)
        allowed = (0, 1) if cmd[0] == "check" else (0,)
        assert proc.returncode in allowed, (cmd, proc.returncode, proc.stderr[-2000:])
        assert "Traceback" not in proc.stderr, (cmd, proc.stderr[-2000:])
        if cmd[0] == "run":
            out = sandbox / "reports" / "northvale-nightly"
            for name in ("index.html", "summary.md", "results.json", "points.csv"):
                assert (out / name).is_file(), name
            assert json.loads((out / "results.json").read_text())["curves"]
        if cmd[0] == "plan":
            assert "60" in proc.stdout  # the target size is discussed
        if cmd[0] == "audit" and "--query" in cmd:
            assert "0.1483" in proc.stdout  # Lauritzen & Spiegelhalter 1988 (REFERENCES.md)
