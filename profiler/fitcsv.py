"""Growth verdicts for measurements made elsewhere: the CSV behind ``infercost fit FILE.csv``.

The file has a header row and columns ``size`` and ``cost`` (names configurable), optionally
``censored`` (0/1, or true/false: the cost is only a lower bound) and ``curve`` (a label; one
verdict per label, in order of first appearance; label ``"all"`` when the column is absent).
A ``status`` column, as in the ``points.csv`` that ``infercost run`` writes, is understood:
``error`` and ``wrong`` rows are skipped, ``timeout`` and ``memory`` rows are censored (and
skipped when they hold no cost), so ``infercost fit points.csv --cost work --curve curve_key``
gives the study's own verdicts.
Every bad cell is an :class:`~profiler.errors.InputError` naming the file, the row number (the
header is row 1, as a spreadsheet shows it) and the column.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path
from typing import Any

import numpy as np

from profiler.errors import InputError

__all__ = ["read_fit_csv", "fit_csv", "format_fit_rows", "JSON_KEYS"]

#: Keys of each object in the ``infercost fit --json`` list, in order.
JSON_KEYS = ("curve", "growth", "degree", "degree_ci", "base", "base_ci", "gamma", "gamma_ci",
             "confidence", "lambda", "local_degree", "local_base", "next_sizes", "n_points")

_TRUE = {"1", "true", "yes", "y", "t"}
_FALSE = {"0", "false", "no", "n", "f", ""}


_SKIPPED_STATUSES = frozenset({"error", "wrong"})
_CENSORED_STATUSES = frozenset({"timeout", "memory"})


def _number(text: str, where: str, column: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise InputError(f"{where}: column {column!r}: expected a number, got {text!r}") from None
    if not math.isfinite(value):
        raise InputError(f"{where}: column {column!r}: expected a finite number, got {text!r}")
    return value


def read_fit_csv(path: str | Path, *, size: str = "size", cost: str = "cost",
                 censored: str = "censored", curve: str = "curve"
                 ) -> dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Read a fit CSV into ``{curve label: (sizes, costs, censored flags)}`` in file order.

    Parameters
    ----------
    path : str or Path
        The CSV file (header row first; comma separated).
    size, cost, censored, curve : str
        Column names. ``size`` and ``cost`` are required; ``censored`` and ``curve`` are used
        when present.

    Returns
    -------
    dict
        Label -> (sizes float array, costs float array, censored bool array).

    Raises
    ------
    InputError
        Unreadable file, missing column, empty file, or a bad cell (non-numeric, NaN/inf,
        size < 1, cost <= 0, censored flag not 0/1), naming the file, row and column.

    Notes
    -----
    O(rows) time and memory.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{p}: expected a readable UTF-8 CSV file, got {exc}") from exc
    try:
        rows = list(csv.reader(text.splitlines()))
    except csv.Error as exc:
        raise InputError(f"{p}: expected CSV text, got a malformed file ({exc})") from exc
    if not rows:
        raise InputError(f"{p}: expected a header row with columns {size!r} and {cost!r}, "
                         f"got an empty file")
    header = [h.strip() for h in rows[0]]
    reader = iter(rows[1:])
    for col in (size, cost):
        if col not in header:
            raise InputError(f"{p}: row 1: column {col!r}: expected a column of that name, got "
                             f"columns {header!r}")
    i_size, i_cost = header.index(size), header.index(cost)
    i_cens = header.index(censored) if censored in header else None
    i_curve = header.index(curve) if curve in header else None
    # A points.csv written by `infercost run` has a status column: failed and wrong points carry
    # no cost to fit, and censored points without a count of their own are skipped, as the
    # study's own analysis does.
    i_status = header.index("status") if "status" in header else None
    groups: dict[str, tuple[list[float], list[float], list[bool]]] = {}
    n_rows = 0
    for row_no, row in enumerate(reader, start=2):
        if not row or all(not cell.strip() for cell in row):
            continue
        where = f"{p}: row {row_no}"
        if len(row) < len(header):
            missing = header[len(row)]
            raise InputError(f"{where}: column {missing!r}: expected {len(header)} cells, got "
                             f"{len(row)}")
        status = row[i_status].strip() if i_status is not None else "ok"
        if status in _SKIPPED_STATUSES or (status in _CENSORED_STATUSES and not row[i_cost].strip()):
            continue
        s = _number(row[i_size].strip(), where, size)
        if s < 1:
            raise InputError(f"{where}: column {size!r}: expected a size >= 1, got {row[i_size]!r}")
        c = _number(row[i_cost].strip(), where, cost)
        if c <= 0:
            raise InputError(f"{where}: column {cost!r}: expected a cost > 0, got {row[i_cost]!r}")
        flag = status in _CENSORED_STATUSES
        if i_cens is not None:
            word = row[i_cens].strip().lower()
            if word in _TRUE:
                flag = True
            elif word not in _FALSE:
                raise InputError(f"{where}: column {censored!r}: expected 0 or 1, got "
                                 f"{row[i_cens]!r}")
        label = row[i_curve].strip() if i_curve is not None else "all"
        g = groups.setdefault(label, ([], [], []))
        g[0].append(s)
        g[1].append(c)
        g[2].append(flag)
        n_rows += 1
    if n_rows == 0:
        raise InputError(f"{p}: expected at least one data row, got none")
    return {k: (np.array(v[0]), np.array(v[1]), np.array(v[2], dtype=bool))
            for k, v in groups.items()}


def fit_csv(path: str | Path, *, size: str = "size", cost: str = "cost",
            censored: str = "censored", curve: str = "curve", **fit_options: Any) -> list[dict]:
    """Verdicts for every curve in a fit CSV, as the JSON list of ``infercost fit --json``.

    Each object has the keys :data:`JSON_KEYS` (``curve`` holds the label) followed by the rest of
    :meth:`profiler.fitter.Verdict.to_dict` (``leaning``, ``reasons``, ``noise`` ...). Extra
    keyword arguments go to :func:`profiler.fitter.fit_growth`.

    Raises
    ------
    InputError
        As :func:`read_fit_csv`.

    Notes
    -----
    O(curves * fit_growth); about 50 ms per curve of 12 points.
    """
    from profiler.fitter import fit_growth

    out = []
    for label, (n, y, c) in read_fit_csv(path, size=size, cost=cost, censored=censored,
                                         curve=curve).items():
        d = fit_growth(n, y, c, **fit_options).to_dict()
        d["curve"] = label
        out.append(d)
    return out


def _ci(lo_hi) -> str:
    return "" if lo_hi is None else f"[{lo_hi[0]:.3g}, {lo_hi[1]:.3g}]"


def format_fit_rows(verdicts: list[dict]) -> tuple[list[str], list[list[str]]]:
    """Columns and string rows of the terminal table of ``infercost fit`` (the CLI renders them).

    One row per curve: label, growth (with the leaning in brackets), degree or base or gamma with
    its interval, confidence, Lambda, local degree/base at the largest size, points (censored),
    suggested next sizes, and the first reason.
    """
    columns = ["curve", "growth", "estimate", "95% interval", "confidence", "lambda",
               "local degree", "local base", "points", "next sizes", "note"]
    rows = []
    for d in verdicts:
        growth = d["growth"] + (f" (leaning {d['leaning']})" if d.get("leaning") else "")
        if d.get("gamma") is not None and d["growth"] != "polynomial":
            est, ci = f"gamma {d['gamma']:.3g}", _ci(d.get("gamma_ci"))
        elif d["growth"] == "exponential" or (d.get("degree") is None and d.get("base")):
            est = "" if d.get("base") is None else f"base {d['base']:.4g}"
            ci = _ci(d.get("base_ci"))
        elif d.get("degree") is not None:
            est, ci = f"degree {d['degree']:.3g}", _ci(d.get("degree_ci"))
        else:
            est, ci = "", ""
        pts = str(d.get("n_points", ""))
        if d.get("n_censored"):
            pts += f" ({d['n_censored']} censored)"
        rows.append([
            str(d.get("curve")), growth, est, ci, f"{d['confidence']:.3f}",
            f"{d['lambda']:.1f}" if d.get("lambda") is not None else "",
            "" if d.get("local_degree") is None else f"{d['local_degree']:.3g}",
            "" if d.get("local_base") is None else f"{d['local_base']:.4g}",
            pts, ", ".join(str(x) for x in d.get("next_sizes") or ()),
            (d.get("reasons") or [""])[0],
        ])
    return columns, rows
