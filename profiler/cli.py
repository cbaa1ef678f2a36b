"""The ``infercost`` command line: parses, calls the library, renders. The only user of rich.

Every command does what a notebook user can do with ``import profiler``; this module only turns
options into library calls and results into tables or JSON. Errors the user can fix
(:class:`~profiler.errors.InfercostError`) become one line on stderr and exit code 2; a claim or
check that fails exits 1; unexpected errors keep their traceback.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any, Callable, Optional

import typer

from profiler.errors import InfercostError, InputError

app = typer.Typer(
    name="infercost",
    help="Measure how the cost of inference grows, and say whether it is polynomial or exponential.",
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)

DEFAULT_STORE = Path("reports") / "infercost.sqlite"


def _console(stderr: bool = False):
    from rich.console import Console

    return Console(stderr=stderr, highlight=False)


def _fail(message: str, code: int = 2) -> None:
    """One line on stderr, then exit: the contract for bad input."""
    line = " ".join(str(message).split())
    sys.stderr.write(f"infercost: {line}\n")
    raise typer.Exit(code)


def _guarded(fn: Callable[[], Any]) -> Any:
    try:
        return fn()
    except InfercostError as exc:
        _fail(str(exc))
    except KeyboardInterrupt:
        _fail("interrupted; finished points are stored (use --resume to continue)", code=130)


def _emit_json(obj: Any) -> None:
    sys.stdout.write(json.dumps(obj, indent=2, default=_json_default) + "\n")


def _json_default(obj: Any) -> Any:
    try:
        import numpy as np

        if isinstance(obj, np.generic):
            return obj.item()
        if isinstance(obj, np.ndarray):
            return obj.tolist()
    except ImportError:  # pragma: no cover
        pass
    if isinstance(obj, Path):
        return str(obj)
    if isinstance(obj, (set, frozenset, tuple)):
        return list(obj)
    return str(obj)


def _table(title: str, columns: list[str], rows: list[list[Any]]):
    from rich.table import Table

    table = Table(title=title, title_justify="left", header_style="bold", show_lines=False)
    for col in columns:
        table.add_column(col, overflow="fold")
    for row in rows:
        table.add_row(*["" if v is None else str(v) for v in row])
    return table


# ---------------------------------------------------------------------------------------- run
@app.command()
def run(
    study_file: Optional[Path] = typer.Argument(
        None, help="Study file (TOML). Without one: the built-in default study."),
    out: Optional[Path] = typer.Option(None, "--out", help="Report folder (default reports/<study>)."),
    budget: Optional[float] = typer.Option(None, "--budget", help="Whole-study time budget, seconds."),
    quick: bool = typer.Option(False, "--quick", help="Shrink the study to finish in about 30 s."),
    resume: bool = typer.Option(False, "--resume", help="Measure only the points not yet stored."),
    point_timeout: Optional[float] = typer.Option(
        None, "--point-timeout", help="Per-point time cap, seconds (censored 'timeout' past it)."),
    memory_mb: Optional[int] = typer.Option(
        None, "--memory-mb", help="Per-point memory cap, MiB (censored 'memory' past it)."),
    threads: Optional[int] = typer.Option(None, "--threads", help="BLAS/OpenMP threads per worker."),
    dask: Optional[str] = typer.Option(
        None, "--dask", help="Dask scheduler address tcp://HOST:PORT, or local:N for a loopback cluster."),
    store: Path = typer.Option(DEFAULT_STORE, "--store", help="SQLite results store."),
    quiet: bool = typer.Option(False, "--quiet", help="No progress display."),
    as_json: bool = typer.Option(False, "--json", help="Machine-readable progress events and summary on stdout."),
) -> None:
    """Run a study: measure, fit, audit, and write the report."""

    def go() -> None:
        from dataclasses import replace

        from profiler import study as study_mod

        spec = (study_mod.load_study_file(study_file) if study_file is not None
                else study_mod.default_study(quick=quick))
        if study_file is not None and quick:
            spec = study_mod.quick_version(spec)
        changes: dict[str, Any] = {}
        for key, option, value in (("budget_s", "--budget", budget),
                                   ("point_timeout_s", "--point-timeout", point_timeout),
                                   ("memory_mb", "--memory-mb", memory_mb),
                                   ("threads", "--threads", threads)):
            if value is not None:
                if value <= 0:
                    raise InputError.at("command line", option, "a number > 0", value)
                changes[key] = value
        if changes:
            spec = replace(spec, **changes)
        if dask is not None:
            from profiler.cluster import parse_address

            parse_address(dask)  # a bad address is refused before anything is stored
        out_dir = out if out is not None else Path("reports") / spec.name
        _run_with_progress(spec, store=store, out=out_dir, resume=resume, dask=dask,
                           quiet=quiet, as_json=as_json)

    _guarded(go)


def _run_with_progress(spec, *, store: Path, out: Path, resume: bool, dask: Optional[str],
                       quiet: bool, as_json: bool) -> None:
    from profiler.runner import run_study

    if as_json:
        def on_event(event: dict) -> None:
            sys.stdout.write(json.dumps(event, default=_json_default) + "\n")
            sys.stdout.flush()

        result = run_study(spec, store=store, out=out, resume=resume, on_event=on_event, dask=dask)
        rows = _verdict_rows(result)
        _emit_json({"event": "summary", "study": result.study_id, "out": str(out), "verdicts": rows})
        return

    if quiet:
        result = run_study(spec, store=store, out=out, resume=resume, on_event=None, dask=dask)
    else:
        result = _run_live(spec, store=store, out=out, resume=resume, dask=dask)
    console = _console()
    rows = _verdict_rows(result)
    if rows:
        headings = {"curve": "curve", "growth": "by work", "growth_time": "by time",
                    "confidence": "confidence", "agreement": "vs theory", "points": "points",
                    "flags": "flags"}
        columns = [c for c in headings if c != "flags" or any(r.get("flags") for r in rows)]
        console.print(_table(f"Verdicts — study {spec.name}", [headings[c] for c in columns],
                             [[r.get(c) for c in columns] for r in rows]))
    console.print(f"Report: {out / 'index.html'}  (also summary.md, results.json, points.csv)")
    console.print("Growth classes are empirical evidence on the measured range, not proofs; "
                  "extrapolation beyond it is uncertain.")


def _run_live(spec, *, store: Path, out: Path, resume: bool, dask: Optional[str]):
    """Run with one progress line per running curve and an ETA for the study."""
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    from profiler.runner import run_study

    progress = Progress(
        TextColumn("{task.description}"),
        BarColumn(bar_width=20),
        TextColumn("{task.fields[status]}"),
        TimeElapsedColumn(),
        console=_console(stderr=True),
        transient=False,
    )
    tasks: dict[Any, Any] = {}
    overall = progress.add_task(f"study {spec.name}", total=max(len(spec.curves), 1),
                                status="starting")

    def on_event(event: dict) -> None:
        kind = event.get("event")
        idx = event.get("curve")
        key = event.get("key", f"curve {idx}")
        if kind == "curve_start":
            tasks[idx] = progress.add_task(str(key), total=None, status="started")
        elif kind == "point" and idx in tasks:
            secs = event.get("seconds")
            cap = event.get("cap")
            text = f"size {event.get('size')}: {event.get('status')}"
            if secs is not None:
                text += f", {secs:.3g} s/query"
            if cap is not None:
                text += f" (cap {cap:g} s)"
            progress.update(tasks[idx], status=text, advance=1)
        elif kind == "curve_done":
            if idx in tasks:
                progress.update(tasks[idx], status=f"done: {event.get('reason', '')}", total=1,
                                completed=1)
            progress.update(overall, advance=1)
        eta = event.get("eta_s")
        if eta is not None:
            progress.update(overall, status=f"ETA {eta:.0f} s")

    with progress:
        return run_study(spec, store=store, out=out, resume=resume, on_event=on_event, dask=dask)


def _verdict_rows(result) -> list[dict]:
    from profiler.analysis import analyse_study
    from profiler.report import verdict_rows

    return verdict_rows(analyse_study(result))


# ---------------------------------------------------------------------------------------- fit
@app.command()
def fit(
    csv_file: Path = typer.Argument(..., help="CSV with columns size,cost[,censored][,curve]."),
    as_json: bool = typer.Option(False, "--json", help="A JSON list of verdicts on stdout."),
    size: str = typer.Option("size", "--size", help="Column holding the size."),
    cost: str = typer.Option("cost", "--cost", help="Column holding the cost (time or work)."),
    censored: str = typer.Option("censored", "--censored", help="Column flagging lower bounds (0/1)."),
    curve: str = typer.Option("curve", "--curve", help="Column labelling curves (one verdict each)."),
) -> None:
    """Classify the growth of measurements made elsewhere (e.g. a paper's runtime table)."""

    def go() -> None:
        from profiler.fitcsv import fit_csv

        verdicts = fit_csv(csv_file, size=size, cost=cost, censored=censored, curve=curve)
        if as_json:
            _emit_json(verdicts)
            return
        from profiler.fitcsv import format_fit_rows

        columns, rows = format_fit_rows(verdicts)
        _console().print(_table(f"Growth of {csv_file.name}", columns, rows))

    _guarded(go)


# -------------------------------------------------------------------------------------- audit
@app.command()
def audit(
    model: str = typer.Argument(..., help="Model file (.bif .xmlbif .uai .json) or a bundled network name."),
    query: list[str] = typer.Option([], "--query", help="A query, e.g. 'P(Y=1 | do(X=0), Z=1)' (repeatable)."),
    queries: int = typer.Option(10, "--queries", help="Random queries per level."),
    method: str = typer.Option("exact", "--method", help="exact or sampling."),
    memory_mb: int = typer.Option(2048, "--memory-mb", help="Refuse to run what is predicted to exceed this."),
    point_timeout: float = typer.Option(20.0, "--point-timeout", help="Time cap for measuring, seconds."),
    seed: int = typer.Option(7, "--seed", help="Seed for random queries."),
    as_json: bool = typer.Option(False, "--json", help="The audit as JSON on stdout."),
) -> None:
    """Structural profile, predicted cost and measured latency of one model."""

    def go() -> None:
        from profiler.audit import audit_model, format_audit

        if method not in ("exact", "sampling"):
            raise InputError.at("command line", "--method", "'exact' or 'sampling'", method)
        if queries < 0:
            raise InputError.at("command line", "--queries", "an integer >= 0", queries)
        result = audit_model(model, queries=list(query), n_queries=queries, method=method,
                             memory_mb=memory_mb, point_timeout_s=point_timeout, seed=seed)
        if as_json:
            _emit_json(result)
        else:
            sys.stdout.write(format_audit(result) + "\n")

    _guarded(go)


# --------------------------------------------------------------------------------------- plan
@app.command()
def plan(
    workload_file: Optional[Path] = typer.Argument(None, help="Workload file (TOML); or give the options."),
    study: Optional[str] = typer.Option(None, "--study", help="Stored study to plan from (default: the latest)."),
    store: Path = typer.Option(DEFAULT_STORE, "--store", help="SQLite results store."),
    family: Optional[str] = typer.Option(None, "--family"),
    level: Optional[str] = typer.Option(None, "--level"),
    method: Optional[str] = typer.Option(None, "--method"),
    topology: Optional[str] = typer.Option(None, "--topology"),
    graph_size: Optional[int] = typer.Option(None, "--graph-size", help="Target number of variables."),
    mechanism_size: Optional[int] = typer.Option(None, "--mechanism-size", help="Target mechanism size."),
    n_queries: Optional[float] = typer.Option(None, "--queries", help="Number of queries in the workload."),
    budget: Optional[float] = typer.Option(None, "--budget", help="Budget in seconds."),
    core_hours: Optional[float] = typer.Option(None, "--core-hours", help="Budget in core-hours."),
    cores: Optional[int] = typer.Option(None, "--cores", help="Cores the budget buys."),
    as_json: bool = typer.Option(False, "--json"),
) -> None:
    """Extrapolate stored curves to a workload: cost, feasibility, largest size, ranking."""

    def go() -> None:
        from profiler import plan as plan_mod
        from profiler.store import Store

        overrides = {k: v for k, v in dict(
            family=family, level=level, method=method, topology=topology, graph_size=graph_size,
            mechanism_size=mechanism_size, n_queries=n_queries, budget_s=budget,
            core_hours=core_hours, cores=cores).items() if v is not None}
        workload = plan_mod.make_workload(workload_file, **overrides)
        result = Store(store, create=False).load_study(study) if study else \
            Store(store, create=False).load_latest()
        the_plan = plan_mod.plan_workload(result, workload)
        if as_json:
            _emit_json(the_plan.to_dict())
        else:
            sys.stdout.write(plan_mod.format_plan(the_plan) + "\n")

    _guarded(go)


# -------------------------------------------------------------------------------------- check
@app.command()
def check(
    claims_file: Path = typer.Argument(..., help="Claims file (TOML, [[claim]] tables)."),
    study: Optional[str] = typer.Option(None, "--study", help="Stored study holding the curves."),
    store: Path = typer.Option(DEFAULT_STORE, "--store", help="SQLite results store."),
    run_missing: bool = typer.Option(True, "--run-missing/--no-run-missing",
                                     help="Measure curves the claims need that are not stored."),
    budget: float = typer.Option(60.0, "--budget", help="Budget for measuring missing curves, seconds."),
    as_json: bool = typer.Option(False, "--json"),
) -> None:
    """Judge each claim from stored curves: exit 0 all hold, 1 any fails, 2 a malformed file."""

    def go() -> int:
        from profiler import claims as claims_mod

        verdicts = claims_mod.check_claims_file(claims_file, store=store, study=study,
                                                run_missing=run_missing, budget_s=budget)
        if as_json:
            _emit_json([v.to_dict() for v in verdicts])
        else:
            sys.stdout.write(claims_mod.format_claims(verdicts) + "\n")
        return claims_mod.exit_code(verdicts)

    code = _guarded(go)
    if code:
        raise typer.Exit(code)


# ------------------------------------------------------------------------------------- report
@app.command()
def report(
    study: str = typer.Argument(..., help="Study name (latest of that name) or id."),
    out: Optional[Path] = typer.Option(None, "--out", help="Report folder (default reports/<study>)."),
    store: Path = typer.Option(DEFAULT_STORE, "--store", help="SQLite results store."),
) -> None:
    """Re-render a stored study's report without measuring anything."""

    def go() -> None:
        from profiler.report import write_report
        from profiler.store import Store

        result = Store(store, create=False).load_study(study)
        out_dir = out if out is not None else Path("reports") / result.spec.name
        files = write_report(result, out_dir)
        _console().print(f"Report: {files.get('index.html', out_dir / 'index.html')}")

    _guarded(go)


# ---------------------------------------------------------------------------------------- zoo
@app.command()
def zoo(as_json: bool = typer.Option(False, "--json", help="As JSON on stdout.")) -> None:
    """List families, levels, methods, knobs, topologies and bundled networks."""

    def go() -> None:
        from profiler.zoo import zoo_listing

        listing = zoo_listing()
        if as_json:
            _emit_json(listing)
            return
        # The table keeps the unit's name; its definition is in `zoo --json` and the docs.
        rows = [[f["name"], ", ".join(f["levels"]), ", ".join(f["methods"]), f["mechanism_knob"],
                 ", ".join(f["topologies"]), f["work_unit"].split(" (")[0]]
                for f in listing["families"]]
        console = _console()
        console.print(_table("Families", ["family", "levels", "methods", "mechanism knob",
                                          "topologies", "work unit"], rows))
        console.print("Bundled networks (load offline by name): " +
                      ", ".join(listing["bundled_networks"]))

    _guarded(go)


def main() -> None:  # console-script entry point
    app()


if __name__ == "__main__":  # pragma: no cover
    main()
