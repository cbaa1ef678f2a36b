"""The study file (TOML) and the built-in default study.

A study says what to measure: which curves (family, level, method, axis, topology, the fixed
size of the other axis, sizes or ``"auto"``, queries per point) under which caps (whole-study
budget, per-point time and memory, threads, seed). :func:`load_study_file` reads and validates a
study file into a :class:`~profiler.records.StudySpec`; every mistake becomes one
:class:`~profiler.errors.InputError` line naming the file and the field, e.g.
``nightly.toml: curve[2].level: expected one of associational, interventional (what family
'bayesnet' expresses), got 'counterfactual'``.

The keys (DESIGN.md, "Files people write")::

    name = "nightly-what-if"   # letters, digits, . _ - (it names the report folder)
    budget_s = 300             # the whole study, seconds of wall time
    point_timeout_s = 5        # per-point time cap -> censored "timeout"
    memory_mb = 2048           # per-point memory cap -> censored "memory"
    seed = 7
    threads = 1                # BLAS/OpenMP threads in each worker

    [[curve]]
    family = "neural_scm"      # registered name, or "package.module:Class"
    level = "counterfactual"   # associational | interventional | counterfactual
    method = "exact"           # exact | sampling            (default exact)
    axis = "graph"             # graph | mechanism            (default graph)
    topology = "chain"         # chain | tree | grid | random | layered, or a shape the family
                               # lists in its `topologies` (default chain)
    sizes = "auto"             # or a list of integers >= 1   (default auto)
    fixed = 16                 # size of the other axis       (default 2 / 8, see below)
    queries = 20               # random queries per point     (default 20)
    min_size = 2               # auto schedules: first size   (optional)
    max_size = 512             # auto schedules: largest size (optional)
    params = { n_samples = 500 }   # family constructor keywords (optional)

The built-in default study (:func:`default_study`) is a table, :data:`DEFAULT_CURVES`, so that
tuning it is editing data: each row names a curve and its size range; ``quick`` marks the rows
kept by ``--quick``.
"""

from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from model_zoo.base import AXES, METHODS, TOPOLOGIES, Level
from profiler.errors import InputError
from profiler.records import CurveSpec, StudySpec

__all__ = ["load_study_file", "read_toml", "study_from_dict", "default_study", "quick_version",
           "DEFAULT_CURVES", "DefaultCurve", "STUDY_KEYS", "CURVE_KEYS", "check_name"]

STUDY_KEYS = ("name", "description", "budget_s", "point_timeout_s", "memory_mb", "seed",
              "threads", "curve")
CURVE_KEYS = ("family", "level", "method", "axis", "topology", "sizes", "fixed", "queries",
              "params", "min_size", "max_size")
LEVELS = tuple(lv.value for lv in Level)
#: Defaults of ``fixed`` when a curve leaves it out: the other axis's size.
DEFAULT_FIXED = {"graph": 2, "mechanism": 8}
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,79}$")
_MAX_QUERIES = 100_000


# ============================================================================ validation helpers
def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _int(where: str, field: str, value: Any, *, low: int = 1, high: int | None = None) -> int:
    if not _is_int(value) or value < low or (high is not None and value > high):
        bound = f"an integer >= {low}" + (f" and <= {high}" if high is not None else "")
        raise InputError.at(where, field, bound, value)
    return int(value)


def _positive(where: str, field: str, value: Any) -> float:
    if not _is_number(value) or not value > 0 or value != value or value == float("inf"):
        raise InputError.at(where, field, "a finite number > 0", value)
    return float(value)


def _choice(where: str, field: str, value: Any, options: tuple[str, ...] | list[str],
            why: str = "") -> str:
    if not isinstance(value, str) or value not in options:
        raise InputError.at(where, field, "one of " + ", ".join(options) + why, value)
    return value


def check_name(where: str, value: Any) -> str:
    """A study name that is safe as a folder name: no separators, no '..', no leading dot."""
    if not isinstance(value, str) or not _NAME.match(value) or ".." in value:
        raise InputError.at(where, "name", "letters, digits, '.', '_' or '-' (at most 80, no "
                            "path separators or '..', not starting with '.')", value)
    return value


def _unknown_keys(where: str, table: dict, allowed: tuple[str, ...]) -> None:
    extra = [k for k in table if k not in allowed]
    if extra:
        raise InputError(f"{where}: unknown key {extra[0]!r} (expected one of "
                         f"{', '.join(allowed)})")


def _params(where: str, value: Any) -> tuple[tuple[str, Any], ...]:
    if not isinstance(value, dict):
        raise InputError.at(where, "params", "a table of keyword parameters", value)
    out = []
    for k, v in value.items():
        if not isinstance(v, (str, int, float, bool)):
            raise InputError.at(where, f"params.{k}", "a string, number or boolean", v)
        out.append((str(k), v))
    return tuple(sorted(out))


def _curve(where: str, i: int, table: Any) -> CurveSpec:
    here = f"{where}: curve[{i}]"
    if not isinstance(table, dict):
        raise InputError.at(where, f"curve[{i}]", "a [[curve]] table", table)
    _unknown_keys(here, table, CURVE_KEYS)
    if "family" not in table:
        raise InputError(f"{here}: family: missing (a registered family or 'package.module:Class')")
    if "level" not in table:
        raise InputError(f"{here}: level: missing (one of {', '.join(LEVELS)})")
    family = table["family"]
    if not isinstance(family, str) or not family:
        raise InputError.at(here, "family", "a registered family or 'package.module:Class'",
                            family)
    from model_zoo.base import resolve

    cls = resolve(family, where=here)
    level = _choice(here, "level", table["level"], LEVELS)
    can = sorted(lv.value if isinstance(lv, Level) else str(lv) for lv in cls.levels)
    _choice(here, "level", level, can, f" (what family {family!r} expresses)")
    method = _choice(here, "method", table.get("method", "exact"), METHODS)
    _choice(here, "method", method, sorted(cls.methods), f" (the engines family {family!r} has)")
    axis = _choice(here, "axis", table.get("axis", "graph"), AXES)
    topologies = tuple(getattr(cls, "topologies", TOPOLOGIES))
    topology = table.get("topology", "chain")
    if not isinstance(topology, str) or topology not in set(topologies) | set(TOPOLOGIES):
        _choice(here, "topology", topology, list(dict.fromkeys(topologies + TOPOLOGIES)))
    params = _params(here, table.get("params", {}))
    if topology not in topologies and not _accepts_topology(cls, params, topology):
        _choice(here, "topology", topology, topologies, f" (the shapes family {family!r} builds)")
    sizes_value = table.get("sizes", "auto")
    sizes: tuple[int, ...] | None
    if sizes_value == "auto":
        sizes = None
    elif isinstance(sizes_value, list) and sizes_value:
        for j, s in enumerate(sizes_value):
            _int(here, f"sizes[{j}]", s)
        sizes = tuple(sorted(set(int(s) for s in sizes_value)))
    else:
        raise InputError.at(here, "sizes", "\"auto\" or a non-empty list of integers >= 1",
                            sizes_value)
    fixed = _int(here, "fixed", table.get("fixed", DEFAULT_FIXED[axis]))
    queries = _int(here, "queries", table.get("queries", 20), high=_MAX_QUERIES)
    min_size = _int(here, "min_size", table["min_size"]) if "min_size" in table else None
    max_size = _int(here, "max_size", table["max_size"]) if "max_size" in table else None
    if min_size is not None and max_size is not None and min_size > max_size:
        raise InputError.at(here, "max_size", f"an integer >= min_size ({min_size})", max_size)
    return CurveSpec(family=family, level=level, method=method, axis=axis, topology=topology,
                     fixed=fixed, sizes=sizes, queries=queries, params=params,
                     max_size=max_size, min_size=min_size)


def _accepts_topology(cls: type, params: tuple, topology: str) -> bool:
    """Whether a family takes a shared topology name it does not list (an alias), asked through
    its own ``realizable`` (no inference runs). A family without its own ``realizable`` cannot
    say, so only its listed topologies count."""
    from model_zoo.base import FamilyBase, Size

    realizable = getattr(cls, "realizable", None)
    if realizable is None or realizable is FamilyBase.realizable:
        return False
    try:
        cls(**dict(params)).realizable(Size(graph=4, mechanism=2), topology=topology)
    except Exception:
        return False
    return True


def study_from_dict(doc: dict[str, Any], *, where: str = "study") -> StudySpec:
    """Validate a parsed study document into a :class:`StudySpec` (``where`` names it in errors).

    Raises
    ------
    InputError
        One line naming ``where`` and the field: unknown keys, wrong types, sizes below 1, an
        unknown family, level, method, axis or topology, or one the family cannot handle.
    """
    if not isinstance(doc, dict):
        raise InputError.at(where, None, "a TOML table", type(doc).__name__)
    _unknown_keys(where, doc, STUDY_KEYS)
    if "name" not in doc:
        raise InputError(f"{where}: name: missing (the study's name)")
    name = check_name(where, doc["name"])
    description = doc.get("description", "")
    if not isinstance(description, str):
        raise InputError.at(where, "description", "a string", description)
    budget = _positive(where, "budget_s", doc.get("budget_s", 300))
    timeout = _positive(where, "point_timeout_s", doc.get("point_timeout_s", 5))
    memory = _int(where, "memory_mb", doc.get("memory_mb", 2048), low=16)
    seed = _int(where, "seed", doc.get("seed", 7), low=0, high=2 ** 31 - 1)
    threads = _int(where, "threads", doc.get("threads", 1), high=1024)
    tables = doc.get("curve")
    if tables is None:
        raise InputError(f"{where}: curve: missing (at least one [[curve]] table)")
    if not isinstance(tables, list) or not tables:
        raise InputError.at(where, "curve", "one or more [[curve]] tables", tables)
    curves = tuple(_curve(where, i, t) for i, t in enumerate(tables))
    seen: dict[tuple, int] = {}
    for i, c in enumerate(curves):
        ident = (c.key(), c.sizes, c.params, c.min_size, c.max_size)
        if ident in seen:
            raise InputError(f"{where}: curve[{i}]: repeats curve[{seen[ident]}] ({c.key()})")
        seen[ident] = i
    return StudySpec(name=name, curves=curves, budget_s=budget, point_timeout_s=timeout,
                     memory_mb=memory, seed=seed, threads=threads, description=description)


def load_study_file(path: str | Path) -> StudySpec:
    """Read and validate a study file (TOML).

    Parameters
    ----------
    path
        The study file.

    Returns
    -------
    StudySpec

    Raises
    ------
    InputError
        Unreadable file, TOML syntax error (with its line), or any invalid field; the message
        is one line starting with the file's name.

    Examples
    --------
    >>> import tempfile, os
    >>> p = os.path.join(tempfile.mkdtemp(), "s.toml")
    >>> _ = open(p, "w").write('name = "x"\\n[[curve]]\\nfamily = "nope"\\nlevel = "associational"\\n')
    >>> load_study_file(p)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    profiler.errors.InputError: ...s.toml: curve[0]: family: expected one of ...
    """
    return study_from_dict(read_toml(path, "study file"), where=str(Path(path)))


def read_toml(path: str | Path, what: str) -> dict[str, Any]:
    """The table of a TOML file people write (study, claims, workload files).

    Raises
    ------
    InputError
        One line naming the file: missing or unreadable, not UTF-8, or a TOML syntax error.
    """
    p = Path(path)
    try:
        raw = p.read_bytes()
    except FileNotFoundError as exc:
        raise InputError(f"{p}: cannot read the {what} (not found)") from exc
    except OSError as exc:
        raise InputError(f"{p}: cannot read the {what} ({exc.strerror or exc})") from exc
    try:
        return tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise InputError(f"{p}: not UTF-8 text (byte {exc.start})") from exc
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{p}: TOML syntax error: {' '.join(str(exc).split())}") from exc


# ============================================================================ the default study
@dataclass(frozen=True)
class DefaultCurve:
    """One row of the default study's table (see :data:`DEFAULT_CURVES`).

    ``levels`` expands into one curve per level; ``max_size_quick`` replaces ``max_size`` under
    ``--quick``; ``quick`` False drops the row from the quick study, and ``quick_levels`` (when
    given) keeps only those of its levels there. ``seconds`` is a rough wall time of one of its
    curves on a quiet 2-core machine: curves run cheapest first, so that what cheap curves leave
    of their budget share passes to the dear ones (:class:`profiler.runner.BudgetPool` gives a
    starting curve an equal share of what is left, and the last ones all the time left).
    """

    family: str
    levels: tuple[str, ...]
    method: str
    axis: str
    topology: str
    fixed: int
    min_size: int
    max_size: int
    max_size_quick: int
    queries: int = 8
    params: tuple[tuple[str, Any], ...] = ()
    quick: bool = True
    quick_levels: tuple[str, ...] | None = None
    seconds: float = 4.0


_A, _I, _C = "associational", "interventional", "counterfactual"

#: The built-in default study: every family, every level it expresses, exact and sampling where
#: offered, both axes. Each row's size range is chosen so that its curve gets >= 6 uncensored
#: sizes spanning >= 8x (an auto schedule grows by 1.5x per point: 6 sizes span ~7.6x, 8 sizes
#: ~17x) and ends by its own schedule (maximum size, the time cap, or a verdict) well inside its
#: share of the budget on a quiet 2-core machine; points are cheap (8-20 queries, largest points
#: a few hundred milliseconds, reference checks included). Measured on a loaded 2-core machine
#: (load average 2-4): about 110 s of CPU for the whole study, 26 curves, every one with 7-14
#: uncensored sizes over 10-128x. Curves run cheapest first (the ``seconds`` column).
DEFAULT_CURVES: tuple[DefaultCurve, ...] = (
    # bayesnet: linear on chains (treewidth 1: degree ~1 in work and time), d**sqrt(n) on k x k
    # grids (stretched exponential in the number of variables), d**2 per factor on the
    # mechanism axis (states per variable). The chain runs to 2048 variables: a point there
    # costs ~0.1 s, and the 256x range lets the time curve tell a line from an exponential on
    # a noisy machine (at 512 it often only leaned polynomial).
    DefaultCurve("bayesnet", (_A, _I), "exact", "graph", "chain", 2, 8, 2048, 128,
                 queries=12, seconds=8, quick_levels=(_A,), params=(("target_choice", "last"),)),
    # Binary variables on the grid: 2**k per elimination step on a k x k grid, so the curve
    # reaches k = 12-13 inside the cap: 11-12 sizes over a 36x range. (With three states it
    # stopped at k = 9, and 7 sizes left the work curve's irregular elimination widths looking
    # like noise of 0.2-0.34 in ln work, at the fitter's noise limit.) Graph-axis curves ask
    # about the last variable (target_choice="last"): with random targets the work of a query
    # depends mostly on where its target sits (pruning keeps only its ancestors).
    DefaultCurve("bayesnet", (_A, _I), "exact", "graph", "grid", 2, 4, 169, 121,
                 queries=12, seconds=7, quick_levels=(_A,), params=(("target_choice", "last"),)),
    DefaultCurve("bayesnet", (_A, _I), "exact", "mechanism", "chain", 8, 2, 64, 24,
                 queries=12, seconds=2, quick=False),
    DefaultCurve("bayesnet", (_A, _I), "sampling", "graph", "chain", 2, 4, 128, 48,
                 seconds=4, params=(("n_samples", 500), ("target_choice", "last")), quick=False),
    # circuit: one pass, linear in edges, on both axes; and one compiled from a bayesnet chain
    # (the compiled circuit grows linearly with the chain).
    DefaultCurve("circuit", (_A,), "exact", "graph", "balanced", 4, 8, 512, 128, seconds=4),
    DefaultCurve("circuit", (_A,), "exact", "mechanism", "balanced", 8, 2, 20, 16, seconds=5,
                 quick=False),
    DefaultCurve("circuit", (_A,), "exact", "graph", "chain", 2, 8, 256, 96,
                 seconds=4.5, params=(("source", "bayesnet"),), quick=False),
    # neural_scm: exact enumeration is exponential in the variables (two exogenous states each,
    # so the base is ~2 and the curve reaches ~16 variables inside the cap), polynomial in the
    # hidden width; sampling is polynomial in the variables.
    DefaultCurve("neural_scm", (_A, _I, _C), "exact", "graph", "chain", 4, 1, 20, 14,
                 queries=10, seconds=4.5, params=(("n_exogenous", 2), ("target_choice", "last")),
                 quick_levels=(_C,)),
    DefaultCurve("neural_scm", (_A, _I, _C), "exact", "mechanism", "chain", 4, 2, 128, 32,
                 queries=12, seconds=3, quick_levels=(_C,)),
    DefaultCurve("neural_scm", (_A, _I, _C), "sampling", "graph", "chain", 4, 2, 64, 24,
                 seconds=3, params=(("n_samples", 300), ("target_choice", "last")), quick=False),
    # linear_scm: closed-form Gaussian algebra, at most cubic in the variables, linear in the
    # in-degree.
    DefaultCurve("linear_scm", (_A, _I, _C), "exact", "graph", "chain", 2, 8, 1024, 256,
                 seconds=4.5, quick_levels=(_C,)),
    DefaultCurve("linear_scm", (_A, _I, _C), "exact", "mechanism", "random", 48, 1, 24, 12,
                 seconds=2, quick_levels=(_C,)),
)

#: Study-level settings of the default study (full, quick). The budget is wall time of
#: measuring; starting the preloaded worker launcher comes before it (a few seconds) and the
#: report after it (~12 s). 80 s keeps `make demo` on a fresh 2-core machine (install ~80 s)
#: inside 3 minutes even when the machine is shared.
DEFAULT_SETTINGS = {
    False: {"name": "default", "budget_s": 80.0, "point_timeout_s": 2.0},
    True: {"name": "default-quick", "budget_s": 17.0, "point_timeout_s": 1.0},
}


def default_study(*, quick: bool = False) -> StudySpec:
    """The built-in study over every family, level, method and both axes.

    Parameters
    ----------
    quick
        A smaller study (rows marked ``quick``, their ``quick_levels``, smaller maximum sizes,
        a 17 s budget: with the launcher start and the report it ends inside 30 s).

    Returns
    -------
    StudySpec
        Named ``default`` (or ``default-quick``); curves from :data:`DEFAULT_CURVES`, each
        level of a row its own curve, all with ``sizes = "auto"``. Rows whose family is not
        importable are left out (the description says which).
    """
    settings = DEFAULT_SETTINGS[bool(quick)]
    curves: list[CurveSpec] = []
    missing: list[str] = []
    for row in sorted(DEFAULT_CURVES, key=lambda r: r.seconds):  # stable: table order on ties
        if quick and not row.quick:
            continue
        if not _family_available(row.family):
            if row.family not in missing:
                missing.append(row.family)
            continue
        levels = row.quick_levels if quick and row.quick_levels is not None else row.levels
        for level in levels:
            curves.append(CurveSpec(
                family=row.family, level=level, method=row.method, axis=row.axis,
                topology=row.topology, fixed=row.fixed, sizes=None, queries=row.queries,
                params=tuple(sorted(row.params)), min_size=row.min_size,
                max_size=row.max_size_quick if quick else row.max_size))
    description = ("The built-in default study: every family, level and method, both axes."
                   + (f" Left out (not importable): {', '.join(missing)}." if missing else ""))
    return StudySpec(name=settings["name"], curves=tuple(curves),
                     budget_s=settings["budget_s"], point_timeout_s=settings["point_timeout_s"],
                     memory_mb=2048, seed=7, threads=1, description=description)


def _family_available(name: str) -> bool:
    from model_zoo.base import resolve

    try:
        resolve(name)
    except InputError:
        return False
    return True


def quick_version(spec: StudySpec, *, budget_s: float = 30.0) -> StudySpec:
    """A user's study shrunk for ``--quick``: the budget is at most ``budget_s`` (curves share it).

    The spec hash does not include the budget, so a quick run and a full run of the same file
    are the same study (``--resume`` after a quick run measures the rest).
    """
    return replace(spec, budget_s=min(float(spec.budget_s), float(budget_s)))
