"""`make bench`: run every benchmark in tests/perf/ and print one table of measured ratios.

Each ``bench_*.py`` module exposes ``run() -> list[dict]`` with rows
``{engine, workload, ours, peer_or_floor, ratio, goal, met}`` measured side by side in one run.
Benchmarks never assert absolute times; the table and a JSON copy under ``reports/bench/`` are
the output. Absolute figures vary by machine; the ratios are what the goals are about.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import importlib
import json
import platform
import sys
import traceback
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]


def _modules(only: list[str]) -> list[str]:
    names = sorted(p.stem for p in HERE.glob("bench_*.py"))
    return [n for n in names if not only or any(o in n for o in only)]


def _fmt(value) -> str:
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "NO"
    if isinstance(value, float):
        return f"{value:.4g}"
    return str(value)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("only", nargs="*", help="run only benchmarks whose module name contains this")
    parser.add_argument("--out", default=str(ROOT / "reports" / "bench"))
    args = parser.parse_args(argv)
    rows: list[dict] = []
    for name in _modules(args.only):
        module = importlib.import_module(f"tests.perf.{name}")
        print(f"running {name} ...", file=sys.stderr, flush=True)
        try:
            rows.extend(module.run())
        except Exception as exc:  # one broken benchmark must not hide the others
            traceback.print_exc()
            rows.append({"engine": name, "workload": "crashed", "ours": None, "peer_or_floor": None,
                         "ratio": None, "goal": str(exc).splitlines()[0] if str(exc) else type(exc).__name__,
                         "met": False})
    columns = ["engine", "workload", "ours", "peer_or_floor", "ratio", "goal", "met"]
    table = [[_fmt(r.get(c)) for c in columns] for r in rows]
    widths = [max(len(c), *(len(row[i]) for row in table)) if table else len(c)
              for i, c in enumerate(columns)]
    print("  ".join(c.ljust(w) for c, w in zip(columns, widths)))
    for row in table:
        print("  ".join(v.ljust(w) for v, w in zip(row, widths)))
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    stamp = _dt.datetime.now(_dt.timezone.utc)
    record = {"date": stamp.isoformat(timespec="seconds"), "machine": platform.platform(),
              "processor": platform.processor(), "rows": rows}
    path = out / f"bench-{stamp.strftime('%Y%m%dT%H%M%SZ')}.json"
    path.write_text(json.dumps(record, indent=2, default=str))
    (out / "latest.json").write_text(json.dumps(record, indent=2, default=str))
    print(f"written: {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
