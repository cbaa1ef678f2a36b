"""The command-line contract (DESIGN.md): command names, JSON on stdout, exit codes, one-line errors."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]


def infercost(*args: str, cwd: Path | None = None, timeout: float = 120) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "profiler.cli", *args], capture_output=True,
                          text=True, cwd=cwd or ROOT, timeout=timeout)


def assert_one_line_error(proc: subprocess.CompletedProcess, *needles: str) -> None:
    assert proc.returncode == 2, (proc.returncode, proc.stdout, proc.stderr)
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, proc.stderr
    assert "Traceback" not in proc.stderr
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])


def test_zoo_json_lists_four_families_and_bundled_networks():
    """`infercost zoo --json` lists each family with levels, methods, knob and topologies."""
    proc = infercost("zoo", "--json")
    assert proc.returncode == 0, proc.stderr
    listing = json.loads(proc.stdout)
    names = {f["name"] for f in listing["families"]}
    assert {"bayesnet", "circuit", "neural_scm", "linear_scm"} <= names
    for fam in listing["families"]:
        assert fam["levels"] and fam["methods"] and fam["mechanism_knob"] and fam["topologies"]
    by_name = {f["name"]: f for f in listing["families"]}
    assert set(by_name["neural_scm"]["levels"]) == {"associational", "interventional", "counterfactual"}
    assert by_name["circuit"]["levels"] == ["associational"]
    assert {"asia", "alarm", "child", "insurance"} <= set(listing["bundled_networks"])


def test_zoo_table_renders():
    proc = infercost("zoo")
    assert proc.returncode == 0, proc.stderr
    assert "bayesnet" in proc.stdout and "asia" in proc.stdout


def test_unknown_command_is_a_usage_error():
    proc = infercost("measure-everything")
    assert proc.returncode == 2


def test_corrupt_bif_exits_2_with_one_line_naming_the_file(tmp_path):
    """A malformed model file gives exit 2 and one line naming the file, no traceback."""
    bad = tmp_path / "broken.bif"
    bad.write_text("network unknown {\n}\nvariable A {\n  type discrete [ 2 ] { a0, a1 \n")
    proc = infercost("audit", str(bad), "--queries", "1")
    assert_one_line_error(proc, "broken.bif")


def test_missing_study_file_exits_2(tmp_path):
    proc = infercost("run", str(tmp_path / "absent.toml"), "--store", str(tmp_path / "s.sqlite"))
    assert_one_line_error(proc, "absent.toml")


def test_study_with_unknown_family_names_the_field(tmp_path):
    study = tmp_path / "s.toml"
    study.write_text('name = "x"\n[[curve]]\nfamily = "nosuch"\nlevel = "associational"\n'
                     'method = "exact"\naxis = "graph"\ntopology = "chain"\nfixed = 2\n')
    proc = infercost("run", str(study), "--store", str(tmp_path / "s.sqlite"))
    assert_one_line_error(proc, "s.toml", "family")


def test_impossible_option_exits_2(tmp_path):
    proc = infercost("run", "--budget", "-5", "--store", str(tmp_path / "s.sqlite"))
    assert_one_line_error(proc, "--budget")


def test_fit_json_contract(tmp_path):
    """`infercost fit --json` returns one verdict per curve label with the contract's keys."""
    rows = ["size,cost,curve"]
    for n in (4, 6, 8, 12, 16, 24, 32, 48, 64):
        rows.append(f"{n},{2.0 * n ** 2:.6g},square")
        rows.append(f"{n},{1e-3 * 2.0 ** n:.6g},doubling")
    csv = tmp_path / "m.csv"
    csv.write_text("\n".join(rows) + "\n")
    proc = infercost("fit", str(csv), "--json")
    assert proc.returncode == 0, proc.stderr
    verdicts = {v["curve"]: v for v in json.loads(proc.stdout)}
    for key in ("curve", "growth", "degree", "degree_ci", "base", "base_ci", "gamma", "gamma_ci",
                "confidence", "lambda", "local_degree", "local_base", "next_sizes", "n_points"):
        assert key in verdicts["square"], key
    assert verdicts["square"]["growth"] == "polynomial"
    assert abs(verdicts["square"]["degree"] - 2.0) < 0.05
    assert verdicts["doubling"]["growth"] == "exponential"
    assert abs(verdicts["doubling"]["base"] - 2.0) < 0.05


def test_fit_bad_csv_names_row_and_column(tmp_path):
    csv = tmp_path / "bad.csv"
    csv.write_text("size,cost\n1,2\n2,abc\n")
    proc = infercost("fit", str(csv))
    assert_one_line_error(proc, "bad.csv", "cost")


def test_report_of_unknown_study_exits_2(tmp_path):
    proc = infercost("report", "nosuch", "--store", str(tmp_path / "none.sqlite"))
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr


def test_corrupt_store_is_refused_and_left_untouched(tmp_path):
    """A corrupt or foreign file given as the store exits 2 and keeps its bytes."""
    store = tmp_path / "foreign.sqlite"
    store.write_bytes(b"this is not a database at all" * 10)
    before = store.read_bytes()
    proc = infercost("report", "x", "--store", str(store))
    assert_one_line_error(proc, "foreign.sqlite")
    assert store.read_bytes() == before
