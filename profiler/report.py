"""Reports people read, from stored results: HTML, Markdown, JSON, CSV and figures.

:func:`write_report` renders a :class:`~profiler.records.StudyResult` (as loaded from the store)
into a folder; it never runs the harness, so a report can be regenerated at any time with
``infercost report STUDY``. Files written:

``index.html``
    One self-contained page (figures embedded as base64 PNG, one inline stylesheet, no script),
    readable offline. Every string that comes from a study, a model or the environment is passed
    through :func:`html.escape`.
``summary.md``
    The verdict table in Markdown, for a pull request or a review, with the caution line.
``results.json``
    The documented, versioned schema below.
``points.csv``
    One row per point; the contract columns first (:data:`POINT_COLUMNS`), then the rest.
``points.parquet``
    The same table, only when ``pyarrow`` is importable.
``figures/curve_NN.png``, ``figures/compare_LEVEL_AXIS.png``
    One figure per curve and one comparison figure per (level, axis).

results.json, schema 1
----------------------
``schema``
    1 (an integer that grows when a key changes meaning or goes away; keys may be added).
``study``
    ``id``, ``name``, ``description``, ``budget_s``, ``point_timeout_s``, ``memory_mb``,
    ``seed``, ``threads``, ``started_at``, ``finished_at`` (Unix seconds or null), and ``spec``:
    the full study spec (:meth:`StudySpec.to_dict`).
``environment``
    The environment recorded with the study, plus ``workers``: each worker's own environment.
``curves``
    A list, in curve order, of objects with ``index``, ``key``, ``label``, ``family``,
    ``level``, ``method``, ``axis``, ``topology``, ``fixed``, ``params``, ``mechanism_knob``,
    ``work_unit``, ``theory``, ``cut_by_budget``, ``agreement``, ``agreement_note``, ``flags``
    (list of strings), ``points`` (each point's :meth:`Point.to_dict`) and ``verdict``:
    ``{"work": V, "time": V, "predicted": V}`` where each V is null or the keys of
    ``infercost fit --json`` (:meth:`Verdict.to_dict`: ``curve``, ``growth``, ``degree``,
    ``degree_ci``, ``base``, ``base_ci``, ``gamma``, ``gamma_ci``, ``confidence``, ``lambda``,
    ``local_degree``, ``local_base``, ``next_sizes``, ``n_points`` and the rest), plus
    ``"text"``: the growth in words and symbols as the tables print it.
``caution``
    The sentence every report carries about what a growth class means.
"""

from __future__ import annotations

import base64
import csv
import html
import json
import math
import re
from collections import defaultdict
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable, Sequence

from profiler.analysis import (CAUTION, CurveAnalysis, analyse_study, competing_laws,
                               format_confidence, format_growth, format_law, format_range,
                               time_cost)
from profiler.errors import InputError
from profiler.records import CurveResult, StudyResult, curve_label
from profiler import report_style as style

__all__ = ["write_report", "results_json", "verdict_rows", "summary_markdown", "render_html",
           "format_growth", "CAUTION", "POINT_COLUMNS", "SCHEMA"]

#: Version of the results.json layout (see the module docstring).
SCHEMA = 1

#: The contract columns of points.csv, in order (DESIGN.md, "Files the tool writes").
POINT_COLUMNS = ("study", "family", "level", "method", "axis", "topology", "fixed", "size",
                 "status", "seconds_median", "seconds_min", "seconds_max", "repeats", "work",
                 "peak_bytes")


def _e(value: Any) -> str:
    """Escape anything for HTML text or attribute context."""
    return html.escape("" if value is None else str(value), quote=True)


def _slug(text: str) -> str:
    """A file-name-safe fragment: model-derived names never reach the file system raw."""
    return re.sub(r"[^a-z0-9]+", "-", str(text).lower()).strip("-")[:40] or "x"


# -- rows shared by the terminal, Markdown and HTML tables ------------------------------------

def _axis_grew(curve: CurveResult) -> str:
    if curve.spec.axis == "graph":
        return "number of variables"
    return curve.mechanism_knob or "mechanism size"


def _point_counts(curve: CurveResult) -> dict[str, int]:
    counts = {s: 0 for s in ("ok", "timeout", "memory", "error", "wrong")}
    for p in curve.points:
        counts[p.status] = counts.get(p.status, 0) + 1
    return counts


def _points_text(curve: CurveResult) -> str:
    c = _point_counts(curve)
    parts = [f"{c['ok']} ok"]
    censored = c["timeout"] + c["memory"]
    if censored:
        parts.append(f"{censored} censored")
    if c["wrong"]:
        parts.append(f"{c['wrong']} wrong")
    if c["error"]:
        parts.append(f"{c['error']} error")
    return ", ".join(parts)


def verdict_rows(analyses: Sequence[CurveAnalysis]) -> list[dict[str, str]]:
    """Rows for the terminal verdict table (the CLI renders them with rich).

    Parameters
    ----------
    analyses
        From :func:`profiler.analysis.analyse_study`.

    Returns
    -------
    list of dict
        Keys ``curve`` (the curve key), ``growth`` (by work, in words and symbols),
        ``growth_time``, ``confidence`` (of the work verdict, else the time verdict),
        ``theory``, ``agreement``, ``points`` and ``flags`` (phrases joined by ``"; "``); all
        values are plain strings.
    """
    rows = []
    for a in analyses:
        main = a.work if a.work is not None else a.time
        rows.append({
            "curve": a.key,
            "growth": format_growth(a.work, next_sizes=False),
            "growth_time": format_growth(a.time, next_sizes=False),
            "confidence": format_confidence(main),
            "theory": a.theory or "—",
            "agreement": a.agreement,
            "points": _points_text(a.curve),
            "flags": "; ".join(a.flags),
        })
    return rows


# -- results.json -----------------------------------------------------------------------------

def _verdict_dict(verdict, key: str) -> dict | None:
    if verdict is None:
        return None
    d = verdict.to_dict()
    d["curve"] = key
    d["text"] = format_growth(verdict)
    return d


def _jsonable(value: Any) -> Any:
    """Plain JSON values: tuples to lists, non-finite floats to null (JSON has no NaN)."""
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if hasattr(value, "item") and callable(value.item):  # numpy scalars
        return _jsonable(value.item())
    if isinstance(value, (str, int, float, bool)) or value is None:
        return value
    return str(value)


def results_json(result: StudyResult, analyses: Sequence[CurveAnalysis]) -> dict[str, Any]:
    """The results.json document (schema :data:`SCHEMA`, keys in the module docstring).

    Notes
    -----
    O(total points).
    """
    spec = result.spec
    curves = []
    for a in analyses:
        c, s = a.curve, a.curve.spec
        curves.append({
            "index": c.index, "key": s.key(), "label": curve_label(s),
            "family": s.family, "level": s.level, "method": s.method, "axis": s.axis,
            "topology": s.topology, "fixed": s.fixed, "params": dict(s.params),
            "mechanism_knob": c.mechanism_knob, "work_unit": c.work_unit, "theory": c.theory,
            "cut_by_budget": c.cut_by_budget, "agreement": a.agreement,
            "agreement_note": a.agreement_note, "flags": list(a.flags),
            "time_statistic": a.time_statistic, "typical_over_fitted": a.typical_factor,
            "points": [{**p.to_dict(), "seconds_fitted": time_cost(p, a.time_statistic)}
                       for p in sorted(c.points, key=lambda p: p.size)],
            "verdict": {"work": _verdict_dict(a.work, s.key()),
                        "time": _verdict_dict(a.time, s.key()),
                        "predicted": _verdict_dict(a.predicted, s.key())},
        })
    environment = dict(result.environment)
    environment["workers"] = dict(result.workers)
    doc = {
        "schema": SCHEMA,
        "study": {"id": result.study_id, "name": spec.name, "description": spec.description,
                  "budget_s": spec.budget_s, "point_timeout_s": spec.point_timeout_s,
                  "memory_mb": spec.memory_mb, "seed": spec.seed, "threads": spec.threads,
                  "started_at": result.started_at, "finished_at": result.finished_at,
                  "spec": spec.to_dict()},
        "environment": environment,
        "curves": curves,
        "caution": CAUTION,
    }
    return _jsonable(doc)


# -- points.csv / parquet ---------------------------------------------------------------------

def _point_rows(result: StudyResult, statistics: dict[int, str] | None = None
                ) -> tuple[list[str], list[dict[str, Any]]]:
    """Columns and rows of points.csv: the store's export, contract columns first.

    The values come from :func:`profiler.store.points_csv_rows` (``study`` is the study's name,
    ``profile_<name>`` one column per structural-profile entry), so points.csv and
    :func:`profiler.store.load_points` agree; ``repeat_seconds`` and ``interleaved_seconds``
    are added, ``;``-separated, and with ``statistics`` (curve index -> the analysis's
    ``time_statistic``) ``time_statistic`` and ``seconds_fitted``, the per-query seconds the
    time verdict was fitted on (:func:`profiler.analysis.time_cost`).
    """
    from profiler.store import points_csv_rows

    rows = points_csv_rows(result)
    seen: list[str] = []
    for row in rows:
        for k in row:
            if k not in seen:
                seen.append(k)
    columns = list(POINT_COLUMNS) + [k for k in seen if k not in POINT_COLUMNS]
    columns += ["repeat_seconds", "interleaved_seconds"]
    if statistics is not None:
        columns += ["time_statistic", "seconds_fitted"]
    points = [p for c in result.curves for p in c.points]   # the export's own order
    for row, p in zip(rows, points):
        row["repeat_seconds"] = ";".join(f"{r:.9g}" for r in p.repeat_seconds)
        row["interleaved_seconds"] = ";".join(f"{r:.9g}" for r in p.interleaved_seconds)
        if statistics is not None and p.curve in statistics:
            row["time_statistic"] = statistics[p.curve]
            row["seconds_fitted"] = time_cost(p, statistics[p.curve])
    return columns, rows


def _write_points(result: StudyResult, out: Path,
                  statistics: dict[int, str] | None = None) -> dict[str, Path]:
    columns, rows = _point_rows(result, statistics)
    paths = {"points.csv": out / "points.csv"}
    with open(paths["points.csv"], "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=columns, extrasaction="ignore")
        writer.writeheader()
        for row in rows:
            writer.writerow({k: ("" if v is None else v) for k, v in row.items()})
    try:
        import pyarrow  # noqa: F401  (only to learn whether Parquet can be written)
    except ImportError:
        return paths
    import pandas as pd

    frame = pd.DataFrame(rows, columns=columns)
    paths["points.parquet"] = out / "points.parquet"
    frame.to_parquet(paths["points.parquet"], index=False)
    return paths


# -- figures ----------------------------------------------------------------------------------

def _size_label(curve: CurveResult) -> str:
    if curve.spec.axis == "graph":
        return "graph size n (endogenous variables)"
    return f"mechanism size n ({curve.mechanism_knob or 'family knob'})"


def _short_unit(unit: str, method: str = "") -> str:
    """The unit's short name, for this curve's method when the family states one per method
    ("table entries multiplied (exact); CPT entries read ... (sampling: ...)")."""
    parts = [p.strip() for p in (unit or "operations").split(";") if p.strip()]
    chosen = next((p for p in parts if f"({method}" in p), parts[0]) if parts else "operations"
    return chosen.split(" (")[0]


def _work_label(unit: str, method: str = "") -> str:
    return f"work per query ({_short_unit(unit, method)})"


def _series(curve: CurveResult, kind: str, statistic: str = "fastest"):
    """Measured marks for one cost kind: (ok, censored, wrong) lists of tuples (by time, the
    curve's fitted ``statistic`` of each point's repeats)."""
    ok, cens, wrong = [], [], []
    for p in sorted(curve.points, key=lambda p: p.size):
        if kind == "work":
            v = p.work
            lo = hi = v
        else:
            # The fitted statistic, with a bar from the fastest repeat to the typical one.
            v = time_cost(p, statistic)
            lo, hi = p.seconds_fastest, p.seconds_median
            if v is not None and lo is not None and hi is not None:
                lo, hi = min(lo, v), max(hi, v)
        if v is None or not math.isfinite(v) or v <= 0:
            continue
        lo = v if lo is None or not math.isfinite(lo) or lo <= 0 else lo
        hi = v if hi is None or not math.isfinite(hi) or hi <= 0 else hi
        if p.status == "ok":
            ok.append((p.size, v, lo, hi))
        elif p.is_censored:
            cens.append((p.size, v))
        elif p.status == "wrong":
            wrong.append((p.size, v))
    return ok, cens, wrong


_LAW_WORDS = {"power": "power law a·n^k", "nlogn": "n log n", "powerlog": "n^k·(log n)^m",
              "exponential": "exponential a·b^n", "stretched": "stretched exp(β·n^γ)"}


def _law_words(name: str) -> str:
    """Legend text of a fitted law; ``_bare`` variants lack the constant overhead c₀."""
    stem = name.removesuffix("_bare")
    words = _LAW_WORDS.get(stem, stem)
    return words + ("" if name.endswith("_bare") else " + c₀") + " (95% band)"


_SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def _decade_label(value: float, _pos=None) -> str:
    """``10³``-style labels for log axes (plain text: no mathtext parsing per tick)."""
    if value <= 0 or not math.isfinite(value):
        return ""
    exponent = math.log10(value)
    if abs(exponent - round(exponent)) > 1e-6:
        return ""
    return "10" + str(int(round(exponent))).translate(_SUPERSCRIPT)


def _log_y(ax) -> None:
    from matplotlib.ticker import FuncFormatter, LogLocator, NullLocator

    ax.set_yscale("log")
    ax.yaxis.set_major_locator(LogLocator(base=10.0, numticks=8))
    ax.yaxis.set_major_formatter(FuncFormatter(_decade_label))
    # No minor ticks: decades are enough to read a growth law, and they cost most of the draw.
    ax.yaxis.set_minor_locator(NullLocator())


def _wrap(text: str, width: int = 72) -> str:
    import textwrap

    return "\n".join(textwrap.wrap(text, width)) or text


def _draw_cost_panel(ax, rax, curve: CurveResult, verdict, kind: str,
                     statistic: str = "fastest") -> None:
    import numpy as np

    from profiler.fitter import predict

    ok, cens, wrong = _series(curve, kind, statistic)
    ink = style.PALETTE["black"]
    if ok:
        xs = np.array([o[0] for o in ok], float)
        ys = np.array([o[1] for o in ok], float)
        lo = np.array([o[2] for o in ok], float)
        hi = np.array([o[3] for o in ok], float)
        ax.errorbar(xs, ys, yerr=[np.maximum(ys - lo, 0), np.maximum(hi - ys, 0)], fmt="o",
                    color=ink, ms=5, capsize=3, lw=1, zorder=5,
                    label=(f"measured ({statistic} sweep repeat; bar: fastest to median)"
                           if kind == "time" else "measured"))
    if cens:
        cx = [c[0] for c in cens]
        cy = [c[1] for c in cens]
        ax.scatter(cx, cy, marker="^", s=70, facecolors="white", edgecolors=ink, zorder=6,
                   label="censored: at least this")
        for x, y in zip(cx, cy):
            ax.annotate("", xy=(x, y * 2.2), xytext=(x, y),
                        arrowprops=dict(arrowstyle="->", color=ink, lw=1.2))
    if wrong:
        ax.scatter([w[0] for w in wrong], [w[1] for w in wrong], marker="X", s=70,
                   color=style.PALETTE["vermillion"], zorder=6, label="wrong answer")
    if verdict is not None:
        top = verdict.size_max
        grid = np.linspace(max(verdict.size_min, 1e-9), top, 80)
        for name in competing_laws(verdict):
            try:
                pred = predict(verdict, grid, law=name)
            except ValueError:  # InputError: a law the verdict lacks
                continue
            stem = name.removesuffix("_bare")
            colour = style.LAW_COLOURS.get(stem, style.PALETTE["sky"])
            ls = style.LAW_STYLES.get(stem, "-")
            ax.plot(pred.sizes, pred.median, ls, color=colour, lw=1.6, label=_law_words(name))
            ax.fill_between(pred.sizes, pred.lower, pred.upper, color=colour, alpha=0.14,
                            lw=0)
            if ok:
                try:
                    at = predict(verdict, xs, law=name)
                except ValueError:  # InputError: a law the verdict lacks
                    continue
                resid = np.log(ys) - np.log(np.maximum(at.median, 1e-300))
                marker = "o" if stem in ("power", "nlogn", "powerlog") else "s"
                rax.plot(xs, resid, ls="none", marker=marker, ms=4, color=colour, label=name)
        rax.axhline(0.0, color=ink, lw=0.8)
    else:
        ax.text(0.5, 0.5, "no verdict", transform=ax.transAxes, ha="center", va="center",
                color=style.PALETTE["vermillion"], fontsize=11)
    if not (ok or cens or wrong):
        ax.text(0.5, 0.35, "no measured points", transform=ax.transAxes, ha="center",
                color="#5d6d7e")
    _log_y(ax)
    ax.grid(True, which="major", color="#e3e3e3", lw=0.6)
    ax.spines[["top", "right"]].set_visible(False)
    rax.spines[["top", "right"]].set_visible(False)
    rax.grid(True, color="#ececec", lw=0.5)
    rax.set_ylabel("ln(measured / law)", fontsize=8)
    rax.set_xlabel(_size_label(curve))
    if kind == "work":
        ax.set_ylabel(_work_label(curve.work_unit, curve.spec.method))
        ax.set_title(_wrap(f"by work — {format_growth(verdict, next_sizes=False)}"),
                     fontsize=10, loc="left")
    else:
        ax.set_ylabel("seconds per query")
        ax.set_title(_wrap(f"by time — {format_growth(verdict, next_sizes=False)}"),
                     fontsize=10, loc="left")
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        ax.legend(fontsize=7, frameon=False, loc="upper left")


def _curve_figure(a: CurveAnalysis, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    fig = plt.figure(figsize=(12, 5.4), dpi=90)
    # Fixed margins instead of a tight bounding box: one draw per figure instead of two.
    grid = fig.add_gridspec(2, 2, height_ratios=(3.2, 1), hspace=0.08, wspace=0.2,
                            left=0.07, right=0.99, top=0.85, bottom=0.1)
    for col, (kind, verdict) in enumerate((("work", a.work), ("time", a.time))):
        ax = fig.add_subplot(grid[0, col])
        rax = fig.add_subplot(grid[1, col], sharex=ax)
        plt.setp(ax.get_xticklabels(), visible=False)
        _draw_cost_panel(ax, rax, a.curve, verdict, kind, a.time_statistic)
    fig.suptitle(curve_label(a.curve.spec), fontsize=11, x=0.01, y=0.98, ha="left",
                 fontweight="bold")
    fig.savefig(path, facecolor="white")
    plt.close(fig)


def _comparison_figure(level: str, axis: str, group: Sequence[CurveAnalysis],
                       path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    families = sorted({a.curve.spec.family for a in group})
    topologies = sorted({a.curve.spec.topology for a in group})
    n_rows = math.ceil(len(group) / 3)
    height = 4.4 + 0.2 * n_rows
    fig, axes = plt.subplots(1, 2, figsize=(12, height), dpi=90)
    # Fixed margins (one draw, no tight bounding box); the legend gets its own band below.
    fig.subplots_adjust(left=0.07, right=0.99, top=1 - 0.7 / height, wspace=0.2,
                        bottom=(0.75 + 0.2 * n_rows) / height)
    for ax, kind in zip(axes, ("work", "time")):
        for a in group:
            s = a.curve.spec
            ok, cens, _ = _series(a.curve, kind, a.time_statistic)
            colour = style.family_colour(families.index(s.family))
            marker = style.MARKERS[topologies.index(s.topology) % len(style.MARKERS)]
            ls = style.LINESTYLES.get(s.method, ":")
            extra = "".join(f" [{k}={v}]" for k, v in s.params if k != "n_samples")
            label = f"{s.family}{extra} · {s.method} · {s.topology} @{s.fixed}"
            if ok:
                ax.plot([o[0] for o in ok], [o[1] for o in ok], ls=ls, marker=marker, ms=4,
                        color=colour, lw=1.3, label=label if kind == "work" else None)
            if cens:
                ax.scatter([c[0] for c in cens], [c[1] for c in cens], marker="^", s=45,
                           facecolors="white", edgecolors=colour, zorder=5)
        _log_y(ax)
        sizes = [p.size for a in group for p in a.curve.points if p.size > 0]
        if sizes and max(sizes) / min(sizes) >= 20:
            ax.set_xscale("log")   # curves of very different ranges share the axis
        ax.grid(True, color="#e3e3e3", lw=0.6)
        ax.spines[["top", "right"]].set_visible(False)
        ax.set_xlabel("graph size n (endogenous variables)" if axis == "graph"
                      else "mechanism size n (each family's knob)")
        ax.set_ylabel("work per query (each family's own unit)" if kind == "work"
                      else "seconds per query")
        ax.set_title(f"by {kind}", fontsize=10, loc="left")
    handles, labels = axes[0].get_legend_handles_labels()
    if handles:
        fig.legend(handles, labels, fontsize=8, frameon=False, loc="lower center",
                   ncol=min(3, len(labels)), bbox_to_anchor=(0.5, 0.0))
    fig.suptitle(f"{level} queries, {axis} axis — every family on one axis "
                 "(open triangles: censored, at least this)", fontsize=11, x=0.01,
                 y=1 - 0.1 / height, ha="left", fontweight="bold")
    fig.savefig(path, facecolor="white")
    plt.close(fig)


#: Figures are drawn in this many forked processes when there are at least ``_PARALLEL_MIN``
#: (matplotlib's drawing is pure CPU, ~0.5 s a figure; a default study has ~30).
_FIGURE_PROCESSES = 2
_PARALLEL_MIN = 8


def _draw_job(job: tuple) -> None:
    kind, args, path = job
    if kind == "curve":
        _curve_figure(args[0], path)
    else:
        _comparison_figure(*args, path)


def _write_figures(analyses: Sequence[CurveAnalysis], out: Path) -> dict[str, Path]:
    """Every curve's figure and one comparison per (level, axis); independent files, drawn in
    parallel where forking is available (same pixels either way)."""
    fig_dir = out / "figures"
    fig_dir.mkdir(parents=True, exist_ok=True)
    paths: dict[str, Path] = {}
    jobs: list[tuple] = []
    for a in analyses:
        name = f"curve_{a.curve.index:02d}.png"
        jobs.append(("curve", (a,), fig_dir / name))
        paths[f"figures/{name}"] = fig_dir / name
    groups: dict[tuple[str, str], list[CurveAnalysis]] = defaultdict(list)
    for a in analyses:
        groups[(a.curve.spec.level, a.curve.spec.axis)].append(a)
    for (level, axis), group in sorted(groups.items()):
        name = f"compare_{_slug(level)}_{_slug(axis)}.png"
        jobs.append(("compare", (level, axis, group), fig_dir / name))
        paths[f"figures/{name}"] = fig_dir / name
    if not _draw_in_parallel(jobs):
        for job in jobs:
            _draw_job(job)
    return paths


def _draw_in_parallel(jobs: list[tuple]) -> bool:
    """Draw ``jobs`` in forked processes; False (nothing promised drawn) where that is not
    possible, and the caller draws them here."""
    import multiprocessing as mp
    import os

    if len(jobs) < _PARALLEL_MIN or (os.cpu_count() or 1) < 2 \
            or "fork" not in mp.get_all_start_methods():
        return False
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot  # noqa: F401  (imported once here, inherited by the children)

    try:
        with mp.get_context("fork").Pool(_FIGURE_PROCESSES) as pool:
            pool.map(_draw_job, jobs, chunksize=1)
    except Exception:
        return False
    return True


# -- Markdown ---------------------------------------------------------------------------------

def _md(text: Any) -> str:
    """Markdown-table-safe text: no raw HTML, no cell breaks."""
    s = "" if text is None else str(text)
    s = s.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    return s.replace("|", "\\|").replace("\n", " ")


def _question(result: StudyResult) -> str:
    spec = result.spec
    fams = sorted({c.family for c in spec.curves})
    levels = sorted({c.level for c in spec.curves})
    methods = sorted({c.method for c in spec.curves})
    axes = sorted({c.axis for c in spec.curves})
    topo = sorted({c.topology for c in spec.curves})
    axis_words = " and ".join({"graph": "the number of variables",
                               "mechanism": "the size of each mechanism"}.get(a, a)
                              for a in axes)
    return (f"How does the cost of answering {', '.join(levels)} queries grow with "
            f"{axis_words}, for {', '.join(fams)} ({' and '.join(methods)} inference, on "
            f"{', '.join(topo)} graphs)? Each curve below is classified as polynomial or "
            "exponential from its measured points, by machine-independent work and by time.")


def summary_markdown(result: StudyResult, analyses: Sequence[CurveAnalysis]) -> str:
    """summary.md: the question, the verdict table, the mechanism knobs, the caution."""
    spec = result.spec
    lines = [f"# infercost study `{_md(spec.name)}`", "",
             f"Study id `{_md(result.study_id)}`; {len(analyses)} curves.", "",
             _md(_question(result)), ""]
    if spec.description:
        lines += [_md(spec.description), ""]
    lines += [f"> **Caution.** {CAUTION}", "",
              "| curve | grows | by work | by time | confidence | theory | agreement | points "
              "| flags |",
              "| --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
    for a in analyses:
        main = a.work if a.work is not None else a.time
        lines.append("| " + " | ".join(_md(x) for x in (
            a.key, _axis_grew(a.curve), format_growth(a.work), format_growth(a.time),
            format_confidence(main), a.theory or "—", a.agreement, _points_text(a.curve),
            "; ".join(a.flags) or "—")) + " |")
    knobs = sorted({(a.curve.spec.family, a.curve.mechanism_knob or "mechanism size")
                    for a in analyses if a.curve.spec.axis == "mechanism"})
    if knobs:
        lines += ["", "The mechanism axis grew: " +
                  "; ".join(f"{_md(k)} ({_md(f)})" for f, k in knobs) + "."]
    units = sorted({(a.curve.spec.family, a.curve.work_unit or "operations") for a in analyses})
    if units:
        lines += ["", "Work units: " + "; ".join(f"{_md(f)}: {_md(u)}" for f, u in units) + "."]
    factors = sorted(a.typical_factor for a in analyses if a.typical_factor is not None)
    if factors:
        chosen = sorted({a.time_statistic for a in analyses})
        lines += ["", "By time, each point is one statistic of its repeats in an interleaved "
                  "sweep over the curve's sizes in random order — per curve the fastest, the "
                  "lower quartile or the median, whichever differs least between random halves of "
                  "the repeats "
                  f"(here: {', '.join(chosen)}; `time_statistic` in results.json and "
                  "points.csv). A typical contiguous repeat was "
                  f"{factors[len(factors) // 2]:.2f}x the fitted cost on this machine (range "
                  f"{factors[0]:.2f}-{factors[-1]:.2f}x over curves)."]
    notes = [a for a in analyses if a.agreement == "disagrees"]
    if notes:
        lines += ["", "## Disagreements with theory", ""]
        lines += [f"- `{_md(a.key)}`: {_md(a.agreement_note)}" for a in notes]
    env = result.environment
    lines += ["", "## Environment", ""]
    for key in ("host", "os", "cpu", "cores", "memory_bytes", "python", "blas", "git",
                "threads", "seed", "calibration"):
        if key in env:
            lines.append(f"- {key}: {_md(_compact(env[key]))}")
    packages = env.get("packages")
    if isinstance(packages, dict):
        listed = ", ".join(f"{k} {v}" for k, v in sorted(packages.items()))
        lines.append("- packages: " + _md(listed))
    if result.workers:
        lines.append(f"- workers ({len(result.workers)}): "
                     f"{_md(', '.join(sorted(result.workers)))}")
    lines += ["", f"_{CAUTION}_", ""]
    return "\n".join(lines)


def _compact(value: Any) -> str:
    if isinstance(value, (dict, list, tuple)):
        return json.dumps(_jsonable(value), sort_keys=True)
    return str(value)


# -- HTML -------------------------------------------------------------------------------------

def _chip(verdict, *, detail: bool = True) -> str:
    """A growth class chip (the class always in words), its law, and optionally the evidence."""
    cls = "none" if verdict is None else verdict.growth
    cls = cls if cls in ("polynomial", "exponential", "inconclusive") else "none"
    word = "no verdict" if verdict is None else verdict.growth
    law = format_law(verdict)
    extra = ""
    if verdict is not None and verdict.growth == "inconclusive":
        if verdict.leaning:
            extra += f"<br><span class=\"muted\">leans {_e(verdict.leaning)}</span>"
        if verdict.next_sizes:
            extra += ("<br><span class=\"muted\">measure next: "
                      f"{_e(', '.join(str(int(s)) for s in verdict.next_sizes))}</span>")
    law_html = f"<br><span class=\"law\">{_e(law)}</span>" if law else ""
    conf = ""
    if verdict is not None and detail:
        conf = (f"<br><span class=\"muted\">confidence {_e(format_confidence(verdict))}<br>"
                f"{_e(format_range(verdict))}</span>")
    return f"<span class=\"chip {cls}\">{_e(word)}</span>{law_html}{extra}{conf}"


def _img(path: Path, alt: str) -> str:
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f"<img src=\"data:image/png;base64,{data}\" alt=\"{_e(alt)}\">"


def _kv_table(items: Iterable[tuple[str, Any]]) -> str:
    rows = "".join(f"<tr><td>{_e(k)}</td><td><code>{_e(_compact(v))}</code></td></tr>"
                   for k, v in items)
    return f"<table class=\"kv\"><tbody>{rows}</tbody></table>"


def _verdict_table(analyses: Sequence[CurveAnalysis]) -> str:
    head = ("<tr><th>family</th><th>level</th><th>method</th><th>axis (grew)</th>"
            "<th>topology</th><th>by work</th><th>by time</th><th>cost formula</th>"
            "<th>theory</th><th>agreement</th><th>points</th><th>work unit</th></tr>")
    body = []
    for a in analyses:
        s = a.curve.spec
        agree_cls = "agree-" + _slug(a.agreement)
        flags = "".join(f"<span class=\"flag\">{_e(f)}</span>" for f in a.flags)
        body.append(
            f"<tr id=\"row-{a.curve.index}\">"
            f"<td class=\"curve\"><a href=\"#curve-{a.curve.index}\">{_e(s.family)}</a></td>"
            f"<td>{_e(s.level)}</td><td>{_e(s.method)}</td>"
            f"<td>{_e(s.axis)}<br><span class=\"muted\">{_e(_axis_grew(a.curve))}; other "
            f"axis {_e(s.fixed)}</span></td><td>{_e(s.topology)}</td>"
            f"<td>{_chip(a.work)}</td><td>{_chip(a.time)}</td>"
            f"<td>{_chip(a.predicted, detail=False)}</td>"
            f"<td>{_e(a.theory or '—')}</td>"
            f"<td class=\"note\"><span class=\"{agree_cls}\">{_e(a.agreement)}</span>"
            f"<br><span class=\"muted\">{_e(a.agreement_note)}</span></td>"
            f"<td class=\"note\">{_e(_points_text(a.curve))}{flags}</td>"
            f"<td>{_e(_short_unit(a.curve.work_unit, a.curve.spec.method))}</td></tr>")
    return (f"<div class=\"scroll\"><table class=\"verdicts\" id=\"verdict-table\">"
            f"<thead>{head}</thead><tbody>{''.join(body)}</tbody></table></div>")


def _spec_table(result: StudyResult) -> str:
    head = ("<tr><th>#</th><th>family</th><th>level</th><th>method</th><th>axis</th>"
            "<th>topology</th><th>fixed</th><th>sizes</th><th>queries</th><th>params</th></tr>")
    rows = []
    for i, c in enumerate(result.spec.curves):
        sizes = "auto" if c.sizes is None else ", ".join(str(s) for s in c.sizes)
        rows.append(f"<tr><td>{i}</td><td>{_e(c.family)}</td><td>{_e(c.level)}</td>"
                    f"<td>{_e(c.method)}</td><td>{_e(c.axis)}</td><td>{_e(c.topology)}</td>"
                    f"<td>{_e(c.fixed)}</td><td>{_e(sizes)}</td><td>{_e(c.queries)}</td>"
                    f"<td><code>{_e(_compact(dict(c.params)))}</code></td></tr>")
    return f"<table><thead>{head}</thead><tbody>{''.join(rows)}</tbody></table>"


def _when(ts: float | None) -> str:
    if not ts:
        return "—"
    return datetime.fromtimestamp(ts, tz=timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


def render_html(result: StudyResult, analyses: Sequence[CurveAnalysis],
                figures: dict[str, Path]) -> str:
    """The index.html text: one self-contained page; every outside string escaped.

    Parameters
    ----------
    result, analyses
        The study and its analyses.
    figures
        Relative name -> path of the PNGs written by :func:`write_report` (embedded as base64).
    """
    spec = result.spec
    sections = []
    question = (f"<section id=\"question\"><h2>The question</h2>"
                f"<p class=\"lead\">{_e(_question(result))}</p>")
    if spec.description:
        question += f"<p>{_e(spec.description)}</p>"
    question += f"<p class=\"caution\"><strong>Caution.</strong> {_e(CAUTION)}</p></section>"
    sections.append(question)
    sections.append("<section id=\"verdicts\"><h2>Verdicts</h2>"
                    "<p class=\"muted\">Growth per unit of size n along the curve's axis, with "
                    "95% intervals in brackets. Confidence is the chosen class's weight from the "
                    "likelihood-ratio statistic Λ = 2·(log L<sub>poly</sub> − "
                    "log L<sub>exp</sub>). Censored points are lower bounds.</p>"
                    f"{_verdict_table(analyses)}</section>")
    figs = []
    for a in analyses:
        name = f"figures/curve_{a.curve.index:02d}.png"
        if name not in figures:
            continue
        note = f" {_e(a.agreement_note)}" if a.agreement_note else ""
        flags = f" <span class=\"muted\">{_e('; '.join(a.flags))}</span>" if a.flags else ""
        figs.append(
            f"<figure class=\"curve\" id=\"curve-{a.curve.index}\">"
            f"{_img(figures[name], 'cost against size for ' + a.key)}"
            f"<figcaption><strong>{_e(curve_label(a.curve.spec))}</strong>. By work: "
            f"{_e(format_growth(a.work))}. By time: {_e(format_growth(a.time))}. "
            f"Theory: {_e(a.theory or 'silent')} ({_e(a.agreement)}).{note}{flags} "
            "Bands: 95% prediction intervals of each fitted law; lower panels: residuals on "
            "the log scale.</figcaption></figure>")
    sections.append("<section id=\"curves\"><h2>Curves</h2>" + "".join(figs) + "</section>")
    comps = []
    for name, path in sorted(figures.items()):
        if name.startswith("figures/compare_"):
            comps.append(f"<figure class=\"compare\">{_img(path, 'comparison ' + name)}"
                         f"<figcaption>{_e(name)}: every family's measured points (by time, "
                         "the statistic each curve was fitted on) on one axis. Work units "
                         "differ between "
                         "families (see the verdict table); "
                         "compare slopes, not heights.</figcaption></figure>")
    sections.append("<section id=\"compare\"><h2>Comparisons</h2>" + "".join(comps) +
                    "</section>")
    env = dict(result.environment)
    env_html = _kv_table(sorted(env.items()))
    if result.workers:
        env_html += "<h3>Workers</h3>" + "".join(
            f"<h3>{_e(w)}</h3>{_kv_table(sorted(dict(info).items()))}"
            for w, info in sorted(result.workers.items()))
    sections.append(f"<section id=\"environment\"><h2>Environment</h2>{env_html}</section>")
    settings = [("name", spec.name), ("study id", result.study_id), ("budget_s", spec.budget_s),
                ("point_timeout_s", spec.point_timeout_s), ("memory_mb", spec.memory_mb),
                ("seed", spec.seed), ("threads", spec.threads),
                ("started", _when(result.started_at)), ("finished", _when(result.finished_at))]
    sections.append(
        f"<section id=\"spec\"><h2>The study spec</h2>{_kv_table(settings)}"
        f"<h3>Curves asked for</h3>{_spec_table(result)}"
        f"<h3>As JSON</h3><pre>{_e(json.dumps(_jsonable(spec.to_dict()), indent=2))}</pre>"
        "<p>Files beside this page: <a href=\"summary.md\">summary.md</a>, "
        "<a href=\"results.json\">results.json</a>, <a href=\"points.csv\">points.csv</a>."
        "</p></section>")
    toc = "".join(f"<a href=\"#{k}\">{v}</a>" for k, v in (
        ("question", "Question"), ("verdicts", "Verdicts"), ("curves", "Curves"),
        ("compare", "Comparisons"), ("environment", "Environment"), ("spec", "Study spec")))
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
        f"<title>infercost · {_e(spec.name)}</title><style>{style.CSS}</style></head><body>"
        f"<header class=\"masthead\"><h1>How inference cost grows · {_e(spec.name)}</h1>"
        f"<div class=\"sub\">study {_e(result.study_id)} · {len(analyses)} curves · "
        f"started {_e(_when(result.started_at))}</div></header>"
        f"<nav class=\"toc\">{toc}</nav><main>{''.join(sections)}</main>"
        f"<footer>{_e(CAUTION)}</footer></body></html>\n")


def write_report(result: StudyResult, out_dir: str | Path, *,
                 analyses: Sequence[CurveAnalysis] | None = None) -> dict[str, Path]:
    """Write index.html, summary.md, results.json, points.csv (+ Parquet) and figures.

    Parameters
    ----------
    result
        A stored study (:meth:`profiler.store.Store.load_study`); nothing is measured.
    out_dir
        Folder to write into (created if needed; files in it are overwritten).
    analyses
        Precomputed :func:`profiler.analysis.analyse_study` output, to avoid fitting twice.

    Returns
    -------
    dict
        Relative file name -> path of every file written.

    Raises
    ------
    InputError
        When ``out_dir`` exists and is not a folder, or cannot be written.

    Notes
    -----
    O(curves) fits and figures; the page embeds every PNG, so its size is the sum of theirs.
    """
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except (FileExistsError, NotADirectoryError, PermissionError) as exc:
        raise InputError(f"{out}: expected a writable folder for the report, got "
                         f"{type(exc).__name__}: {exc}") from exc
    if analyses is None:
        analyses = analyse_study(result)
    analyses = list(analyses)
    paths: dict[str, Path] = {}
    paths.update(_write_figures(analyses, out))
    paths.update(_write_points(result, out, {a.curve.index: a.time_statistic
                                             for a in analyses}))
    doc = results_json(result, analyses)
    paths["results.json"] = out / "results.json"
    paths["results.json"].write_text(json.dumps(doc, indent=2, sort_keys=False) + "\n",
                                     encoding="utf-8")
    paths["summary.md"] = out / "summary.md"
    paths["summary.md"].write_text(summary_markdown(result, analyses), encoding="utf-8")
    paths["index.html"] = out / "index.html"
    paths["index.html"].write_text(render_html(result, analyses, paths), encoding="utf-8")
    return paths
