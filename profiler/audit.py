"""Audit one model: its structure, what its engine's cost formula predicts, what it costs when
measured, what would make it cheaper — and, for study curves, whether measurement agrees with
what the structure predicts.

Two jobs live here because they are one judgement made at two scales:

* :func:`audit_model` — a user's own model file (or a bundled network's name): structural
  profile (counts, moral-graph treewidth as an interval), predicted work and peak memory per
  level *before anything runs*, measured latency of random or given queries, and the options that
  would make it cheaper (compile once into a circuit; sample to a target standard error).
* :func:`compare_with_theory` — a measured verdict against the verdict on predicted work at the
  same sizes and against the family's stated theory; pure, used by :mod:`profiler.analysis` for
  every curve of a study.

Measuring
---------
Measurement runs in a forked child process per level (on platforms with ``fork``; in-process
elsewhere). The child caps its address space at what it already uses plus ``memory_mb`` and the
parent stops it after ``point_timeout_s``; results stream back query by query, so a level cut
short still reports the queries that finished. Nothing is run at all for a level whose
*predicted* peak memory exceeds ``memory_mb``. Each query is answered once (its value and work,
and a warm-up), then timed by :func:`profiler.harness.time_queries` on that query alone, so the
median and 90th percentile are over queries, not over repeats.

Families are found through :func:`model_zoo.resolve`; none is imported by name.
"""

from __future__ import annotations

import json
import math
import os
import pathlib
import time
from typing import Any, Iterable, Sequence

import model_zoo
from model_zoo.base import Level, Query
from model_zoo.errors import InfercostError, InputError, UnsupportedQuery

__all__ = ["audit_model", "audit_instance", "load_model", "structural_summary", "compare_with_theory",
           "format_audit", "AGREEMENTS", "NETWORK_SUFFIXES"]

#: Outcomes of :func:`compare_with_theory`.
AGREEMENTS = ("agrees", "disagrees", "undecided", "no theory")
#: File endings read by the ``bayesnet`` family's loader.
NETWORK_SUFFIXES = (".bif", ".bif.gz", ".xmlbif", ".xml", ".uai")
#: Target standard error for the sampling option (absolute, on probabilities).
TARGET_STDERR = 0.01
#: A query whose first two answers each take longer than this is timed from the second alone.
_SLOW_QUERY_SECONDS = 1.0
#: Queries answered by the sampling engine to price the sampling option, per level.
_N_SAMPLING_PROBES = 3
_MIB = 1024.0 * 1024.0


# ----------------------------------------------------------------------------------------------
# loading
# ----------------------------------------------------------------------------------------------
def _suffix(path: pathlib.Path) -> str:
    name = path.name.lower()
    for s in NETWORK_SUFFIXES + (".json",):
        if name.endswith(s):
            return s
    return path.suffix.lower()


def _bundled_names() -> list[str]:
    try:
        from model_zoo.networks import bundled_networks
    except ImportError:
        return []
    try:
        return list(bundled_networks())
    except InfercostError:
        return []


def load_model(source: str | os.PathLike) -> tuple[Any, Any, str]:
    """Find the family of ``source`` and load it.

    Parameters
    ----------
    source
        A model file — ``.bif``, ``.bif.gz``, ``.xmlbif``, ``.uai`` (the ``bayesnet`` family's
        loader) or our own ``.json`` (its top-level ``"family"`` key names the family) — or the
        name of a network bundled with pgmpy (``"asia"``).

    Returns
    -------
    (family, instance, name)
        A family object constructed with default parameters, the loaded instance, and the name
        used in messages.

    Raises
    ------
    InputError
        Missing file, unknown ending, unreadable JSON, no ``"family"`` key, or whatever the
        family's loader rejects (naming the file and the field).
    """
    text = os.fspath(source)
    path = pathlib.Path(text)
    if path.is_file():
        kind = _suffix(path)
        if kind == ".json":
            try:
                doc = json.loads(path.read_text(encoding="utf-8"))
            except (OSError, UnicodeDecodeError) as exc:
                raise InputError(f"{path}: cannot read the file ({exc})") from exc
            except json.JSONDecodeError as exc:
                raise InputError(f"{path} line {exc.lineno}: not valid JSON ({exc.msg})") from exc
            if not isinstance(doc, dict) or "family" not in doc:
                raise InputError.at(str(path), "family",
                                    "a top-level key naming the family (e.g. \"circuit\")",
                                    None if not isinstance(doc, dict) else "no such key")
            family_name = doc["family"]
            # A data file names a registered family only: importing 'module:Class' is for code
            # the user names on the command line, never for what a file asks for.
            if not isinstance(family_name, str) or family_name not in model_zoo.names():
                raise InputError.at(str(path), "family",
                                    "a registered family (" + ", ".join(model_zoo.names()) + ")",
                                    family_name)
            family = model_zoo.resolve(family_name, where=f"{path}: family")()
        elif kind in NETWORK_SUFFIXES:
            family = model_zoo.resolve("bayesnet")()
        else:
            raise InputError.at(str(path), "file ending",
                                "one of " + ", ".join(NETWORK_SUFFIXES + (".json",)), path.suffix)
        _require_loader(family, str(path))
        return family, family.load(path), path.name
    if any(text.lower().endswith(s) for s in NETWORK_SUFFIXES + (".json",)) or os.sep in text:
        raise InputError(f"{text}: no such file")
    family = model_zoo.resolve("bayesnet")()
    _require_loader(family, text)
    names = _bundled_names()
    if names and text not in names:
        raise InputError.at("model", None, "a model file or a bundled network ("
                            + ", ".join(names[:12]) + (", ..." if len(names) > 12 else "") + ")",
                            text)
    return family, family.load(text), text


def _require_loader(family: Any, where: str) -> None:
    if not callable(getattr(family, "load", None)):
        raise InputError(f"{where}: family {getattr(family, 'name', family)!r} cannot load files")


# ----------------------------------------------------------------------------------------------
# structure
# ----------------------------------------------------------------------------------------------
def _network(instance: Any) -> Any | None:
    """The :class:`~model_zoo.discrete.DiscreteNetwork` inside ``instance``, if there is one."""
    from model_zoo.discrete import DiscreteNetwork

    if getattr(instance, "circuit", None) is not None:
        return None  # a circuit (perhaps compiled from a network) is audited as a circuit
    if isinstance(instance, DiscreteNetwork):
        return instance
    for attr in ("network", "net", "bn"):
        inner = getattr(instance, attr, None)
        if isinstance(inner, DiscreteNetwork):
            return inner
    return None


def _dag_parents(instance: Any) -> dict[str, tuple[str, ...]] | None:
    """``{variable: parents}`` of the instance's graph, read from the usual attribute shapes."""
    net = _network(instance)
    if net is not None:
        return {v: tuple(net.parents[v]) for v in net.variables}
    parents = getattr(instance, "parents", None)
    names = getattr(instance, "names", None) or getattr(instance, "variables", None)
    if isinstance(parents, dict):
        return {str(v): tuple(str(p) for p in ps) for v, ps in parents.items()}
    if parents is not None and names is not None:
        try:
            names = list(names)
            return {str(names[i]): tuple(str(names[int(j)]) for j in list(ps))
                    for i, ps in enumerate(parents)}
        except (TypeError, ValueError, IndexError):
            return None
    return None


#: Profile keys of other families copied into the structure section under a stable name.
_PROFILE_ALIASES: dict[str, tuple[str, ...]] = {
    "n_nodes": ("n_nodes", "n_circuit_nodes", "circuit_nodes"),
    "depth": ("depth", "circuit_depth", "n_layers"),
    "smooth": ("smooth", "is_smooth"),
    "decomposable": ("decomposable", "is_decomposable"),
    "deterministic": ("deterministic", "is_deterministic"),
    "exogenous_space_size": ("exogenous_space_size", "n_exogenous_worlds",
                             "n_exogenous_configurations",
                             "exogenous_configurations", "n_exogenous_states", "exogenous_states"),
    "mechanism_multiply_adds": ("mechanism_multiply_adds", "mechanism_macs", "n_mechanism_macs",
                                "mechanism_flops", "multiply_adds"),
}


def _number(x: Any) -> Any:
    if isinstance(x, bool) or x is None:
        return x
    try:
        f = float(x)
    except (TypeError, ValueError):
        return x
    if math.isfinite(f) and f == int(f) and abs(f) < 2 ** 53:
        return int(f)
    return f


def structural_summary(family: Any, instance: Any) -> dict[str, Any]:
    """The structure section of an audit: counts, treewidth interval, family-specific measures.

    Returns
    -------
    dict
        ``nodes, edges, max_in_degree, parameters`` always; ``states, max_states`` for discrete
        networks; ``treewidth_lower, treewidth_upper, treewidth_exact, treewidth_method`` of the
        moral graph when the instance has a DAG (None otherwise); circuit and SCM measures when
        the family's profile carries them; ``levels_expressible``, ``methods``, ``work_unit`` and
        the family's whole ``profile``.

    Notes
    -----
    Treewidth bounds cost ``O(n**3)`` for the heuristics plus an exact subset programme on
    components of at most 16 nodes (:func:`model_zoo.treewidth.treewidth_bounds`).
    """
    from model_zoo.treewidth import moral_graph, treewidth_bounds

    profile = {str(k): _number(v) for k, v in dict(family.profile(instance)).items()}
    out: dict[str, Any] = {
        "nodes": profile.get("n_variables"),
        "edges": profile.get("n_edges"),
        "max_in_degree": profile.get("max_in_degree"),
        "parameters": profile.get("n_parameters"),
    }
    net = _network(instance)
    if net is not None:
        cards = [net.card(v) for v in net.variables]
        out.update(nodes=len(net.variables), edges=int(net.n_edges),
                   max_in_degree=max((len(net.parents[v]) for v in net.variables), default=0),
                   parameters=int(net.n_free_parameters()),
                   states=int(sum(cards)), max_states=max(cards, default=0))
    parents = _dag_parents(instance)
    if parents is not None:
        if out["max_in_degree"] is None:
            out["max_in_degree"] = max((len(p) for p in parents.values()), default=0)
        if out["nodes"] is None:
            out["nodes"] = len(parents)
        if out["edges"] is None:
            out["edges"] = sum(len(p) for p in parents.values())
        tw = treewidth_bounds(moral_graph(parents))
        out.update(treewidth_lower=tw.lower, treewidth_upper=tw.upper,
                   treewidth_exact=tw.is_exact, treewidth_method=tw.method)
    else:
        out.update(treewidth_lower=None, treewidth_upper=None, treewidth_exact=None,
                   treewidth_method="no variable graph in this family")
    for key, candidates in _PROFILE_ALIASES.items():
        for c in candidates:
            if c in profile:
                value = profile[c]
                out[key] = bool(value) if key in ("smooth", "decomposable", "deterministic") \
                    else value
                break
    if any(k in out for k in ("smooth", "decomposable", "deterministic")):
        hook = getattr(family, "tractable_queries", None)
        out["tractable_queries"] = list(hook(instance)) if callable(hook) else _tractable(out)
    out["levels_expressible"] = [lv.value for lv in Level if lv in family.levels]
    out["methods"] = sorted(family.methods)
    out["work_unit"] = getattr(family, "work_unit", "operations")
    units = getattr(family, "work_units", None)
    if isinstance(units, dict):
        out["work_units"] = {str(k): str(v) for k, v in units.items()}
    out["profile"] = profile
    return out


def _tractable(s: dict[str, Any]) -> list[str]:
    """Query kinds a circuit answers in one linear pass, from its properties.

    Smooth and decomposable: marginals and conditionals; plus deterministic: MPE/MAP
    (Choi, Vergari & Van den Broeck 2020; Poon & Domingos 2011).
    """
    kinds: list[str] = []
    if s.get("decomposable"):
        kinds.append("likelihood")
        if s.get("smooth"):
            kinds += ["marginal", "conditional"]
            if s.get("deterministic"):
                kinds.append("mpe")
    return kinds


# ----------------------------------------------------------------------------------------------
# queries
# ----------------------------------------------------------------------------------------------
def _query_context(family: Any, instance: Any) -> dict[str, Any]:
    """Keyword arguments for :func:`~model_zoo.query_syntax.parse_query` on this instance."""
    hook = getattr(family, "query_context", None)
    if callable(hook):
        return dict(hook(instance))
    net = _network(instance)
    if net is not None:
        return {"states": {v: tuple(net.states[v]) for v in net.variables}}
    inner = getattr(instance, "circuit", None)
    if inner is not None:
        instance = inner
    states = getattr(instance, "states", None)
    names = getattr(instance, "names", None) or getattr(instance, "variables", None)
    if isinstance(states, dict):
        return {"states": {str(v): tuple(str(s) for s in ss) for v, ss in states.items()}}
    if states is not None and names is not None:
        try:  # states aligned with the variables (circuits, neural SCMs)
            states = list(states)
            names = list(names)
            if len(states) == len(names) and all(not isinstance(ss, str) for ss in states):
                return {"states": {str(v): tuple(str(x) for x in ss)
                                   for v, ss in zip(names, states)}}
        except TypeError:
            pass
    if names is not None:
        return {"variables": [str(v) for v in names], "continuous": True}
    return {}


def _parse_given(family: Any, instance: Any, texts: Sequence[str], where: str) -> list[tuple[str, Query]]:
    from model_zoo.query_syntax import parse_query

    ctx = _query_context(family, instance)
    out = []
    for text in texts:
        try:
            q = parse_query(text, **ctx)
        except InputError as exc:
            raise InputError(f"{where}: {exc}") from exc
        if q.level not in family.levels:
            can = ", ".join(lv.value for lv in Level if lv in family.levels)
            raise UnsupportedQuery(
                f"{where}: query {text!r} is {q.level.value}, but family {family.name!r} "
                f"cannot express {q.level.value} queries (it expresses: {can})")
        out.append((text, q))
    return out


def _describe(family: Any, instance: Any, q: Query) -> str:
    from model_zoo.query_syntax import format_query

    ctx = _query_context(family, instance)
    try:
        return format_query(q, ctx.get("states"))
    except Exception:  # a family's own query shape we cannot print: fall back to plain notation
        return q.describe()


# ----------------------------------------------------------------------------------------------
# measuring
# ----------------------------------------------------------------------------------------------
def _time_one(family: Any, instance: Any, q: Query, method: str, first_seconds: float
              ) -> tuple[float, float | None, float | None]:
    """(seconds, work, peak_bytes) of one query, by the harness when it is there."""
    if first_seconds >= _SLOW_QUERY_SECONDS:
        # a slow first answer may be paying for imports and plans: look at a second one
        t0 = time.perf_counter()
        family.answer(instance, q, method=method)
        second = time.perf_counter() - t0
        if second >= _SLOW_QUERY_SECONDS:
            return second, None, None
    try:
        from profiler.harness import time_queries
    except ImportError:  # the harness not yet present: a plain best-of-repeats clock
        best = math.inf
        for _ in range(3):
            t0 = time.perf_counter()
            family.answer(instance, q, method=method)
            best = min(best, time.perf_counter() - t0)
        return best, None, None
    # short series per query (the audit is interactive); the median is over queries anyway
    t = time_queries(family, instance, [q], method=method, min_repeat_seconds=0.005,
                     min_repeats=3, max_repeats=7)
    return float(t.seconds_median), float(t.work), float(t.peak_bytes)


def _measure_stream(family: Any, instance: Any, queries: Sequence[Query], method: str,
                    n_sampling_probes: int) -> Iterable[tuple]:
    """Yield one message per finished query: ("q", i, value, stderr, work, seconds, peak_bytes),
    then ("s", i, value, stderr, work, seconds) for the sampling probes."""
    for i, q in enumerate(queries):
        t0 = time.perf_counter()
        ans = family.answer(instance, q, method=method)
        first = time.perf_counter() - t0
        seconds, work, peak = _time_one(family, instance, q, method, first)
        yield ("q", i, float(ans.value), ans.stderr, float(ans.work if work is None else work),
               seconds, peak)
    for i, q in enumerate(queries[:n_sampling_probes]):
        family.answer(instance, q, method="sampling")  # warm-up: plans and imports
        t0 = time.perf_counter()
        ans = family.answer(instance, q, method="sampling")
        yield ("s", i, float(ans.value), ans.stderr, float(ans.work), time.perf_counter() - t0,
               ans.n_accepted)


def _vm_bytes() -> int | None:
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("VmSize:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        return None
    return None


def _thread_limit(threads: int | None):
    """A context fixing BLAS/OpenMP threads (threadpoolctl), or a no-op for None."""
    import contextlib

    if threads is None:
        return contextlib.nullcontext()
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return contextlib.nullcontext()
    return threadpool_limits(limits=int(threads))


def _child(conn, stream_fn, args, memory_bytes, threads) -> None:
    try:
        import resource

        vm = _vm_bytes()
        if vm is not None and memory_bytes:
            limit = vm + int(memory_bytes)
            resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
    except (ImportError, ValueError, OSError):
        pass  # no cap available: the predicted-bytes pre-flight check still applies
    import gc

    # Everything inherited from the parent moves to the permanent generation: the harness's
    # gc.collect() between series then scans only what measuring allocates (and does not touch,
    # hence copy, the parent's pages).
    gc.freeze()
    try:
        with _thread_limit(threads):
            for msg in stream_fn(*args):
                conn.send(msg)
        conn.send(("done",))
    except MemoryError:
        conn.send(("memory",))
    except BaseException as exc:  # sent back so the parent raises it (exit 2 for ours)
        try:
            conn.send(("raise", exc))
        except Exception:
            import traceback

            conn.send(("raise", RuntimeError(traceback.format_exc())))
    finally:
        conn.close()


def _run_stream(stream_fn, args: tuple, *, memory_mb: float, timeout_s: float, isolate: bool,
                threads: int | None = 1) -> tuple[list[tuple], str | None]:
    """Run the generator ``stream_fn(*args)`` and collect its messages, stopping at the caps.

    Returns ``(messages, stop)`` where ``stop`` is None or why it stopped early. With
    ``isolate`` (and fork available) the generator runs in a forked child whose address space
    is capped at its starting size plus ``memory_mb``, killed at ``timeout_s``; an exception in
    the child is raised again here. BLAS threads are fixed at ``threads`` while it runs (one
    by default: small kernels on many threads spend their time waking threads up).
    """
    import multiprocessing as mp

    msgs: list[tuple] = []
    if isolate and "fork" in mp.get_all_start_methods():
        ctx = mp.get_context("fork")
        parent, child = ctx.Pipe(duplex=False)
        proc = ctx.Process(target=_child, args=(child, stream_fn, args, memory_mb * _MIB,
                                                           threads),
                           daemon=True)
        proc.start()
        child.close()
        deadline = time.monotonic() + timeout_s
        try:
            while True:
                left = deadline - time.monotonic()
                if left <= 0 or not parent.poll(left):
                    return msgs, f"time cap of {timeout_s:g} s reached"
                try:
                    msg = parent.recv()
                except EOFError:
                    proc.join(5)
                    return msgs, f"the measuring process died (exit code {proc.exitcode})"
                if msg[0] == "memory":
                    return msgs, f"memory cap of {memory_mb:g} MiB reached"
                if msg[0] == "raise":
                    raise msg[1]
                if msg[0] == "done":
                    return msgs, None
                msgs.append(msg)
        finally:
            if proc.is_alive():
                proc.kill()
            proc.join(5)
            parent.close()
    # in-process: the time cap is checked between messages only
    import gc

    deadline = time.monotonic() + timeout_s
    gc.freeze()
    try:
        with _thread_limit(threads):
            for msg in stream_fn(*args):
                msgs.append(msg)
                if time.monotonic() > deadline:
                    return msgs, f"time cap of {timeout_s:g} s reached"
    except MemoryError:
        return msgs, "out of memory"
    finally:
        gc.unfreeze()
    return msgs, None


def _measure(family: Any, instance: Any, queries: Sequence[Query], *, method: str,
             n_probes: int, memory_mb: float, timeout_s: float, isolate: bool,
             threads: int | None = 1) -> dict:
    """Answer and time ``queries``; returns {"rows": [...], "probes": [...], "stop": reason|None}."""
    msgs, stop = _run_stream(_measure_stream, (family, instance, list(queries), method, n_probes),
                             memory_mb=memory_mb, timeout_s=timeout_s, isolate=isolate,
                             threads=threads)
    return {"rows": [m for m in msgs if m[0] == "q"], "probes": [m for m in msgs if m[0] == "s"],
            "stop": stop}


def _quantile(xs: Sequence[float], q: float) -> float | None:
    import numpy as np

    xs = [x for x in xs if x is not None]
    return float(np.quantile(np.asarray(xs, dtype=float), q)) if xs else None


def _mean(xs: Iterable[float | None]) -> float | None:
    vals = [float(x) for x in xs if x is not None]
    return sum(vals) / len(vals) if vals else None


# ----------------------------------------------------------------------------------------------
# options
# ----------------------------------------------------------------------------------------------
def _sampling_option(probes: Sequence[tuple], n_samples: int, target: float) -> dict | None:
    """Samples, work and seconds for standard error ``target``, scaled from measured probes.

    A Monte Carlo standard error falls as ``1/sqrt(n)``, so ``n`` samples giving error ``s``
    become ``n * (s / target)**2`` for ``target``; work and time scale with ``n`` (common
    practice). The median over probes is reported.
    """
    import numpy as np

    factors, works, secs, errs = [], [], [], []
    for _, _, _, stderr, work, seconds, _ in probes:
        if stderr is None or not math.isfinite(stderr) or stderr <= 0:
            continue
        f = (float(stderr) / target) ** 2
        factors.append(f)
        works.append(work * f)
        secs.append(seconds * f)
        errs.append(float(stderr))
    if not factors:
        return None
    return {"target_stderr": target, "measured_n_samples": int(n_samples),
            "measured_stderr": float(np.median(errs)),
            "n_samples": int(math.ceil(n_samples * float(np.median(factors)))),
            "work": float(np.median(works)), "seconds": float(np.median(secs)),
            "n_probes": len(factors)}


def _compiler(circuit_family: Any) -> tuple[Any, Any] | None:
    """``(compile_network, CircuitInstance)`` of the circuit family, from its own module.

    The family object is found through the registry; its compiler and instance type are read
    from the module that defines it (no family module is imported by name here).
    """
    import importlib

    module = importlib.import_module(type(circuit_family).__module__)
    fn = getattr(circuit_family, "compile_network", None) or getattr(module, "compile_network",
                                                                      None)
    wrap = getattr(module, "CircuitInstance", None)
    if not callable(fn) or wrap is None:
        return None
    return fn, wrap


def _compile_stream(circuit_family: Any, net: Any, queries: Sequence[Query]) -> Iterable[tuple]:
    from model_zoo.base import Size

    fn, wrap = _compiler(circuit_family)
    t0 = time.perf_counter()
    compiled = fn(net)
    compile_seconds = time.perf_counter() - t0
    circuit = getattr(compiled, "circuit", compiled)
    n_params = getattr(circuit, "n_parameters", None)
    yield ("c", float(getattr(compiled, "compile_seconds", compile_seconds)),
           getattr(circuit, "n_nodes", None), getattr(circuit, "n_edges", None),
           n_params() if callable(n_params) else None, getattr(compiled, "width", None))
    inst = wrap(size=Size(graph=max(1, len(net.variables)), mechanism=1), topology="file",
                seed=0, name=f"compiled {net.name}", circuit=circuit, source="bayesnet",
                compiled=compiled)
    for q in queries:
        circuit_family.answer(inst, q, method="exact")        # warm-up: plans are cached
        best = math.inf
        for _ in range(3):
            t1 = time.perf_counter()
            circuit_family.answer(inst, q, method="exact")
            best = min(best, time.perf_counter() - t1)
        yield ("t", best)


def _compile_option(instance: Any, kept: dict, levels: dict, *, memory_mb: float,
                    timeout_s: float, isolate: bool, threads: int | None = 1) -> dict:
    """Compiling a network into an arithmetic circuit: size, compile time, break-even count.

    Uses the circuit family's ``compile_network(network)`` (Darwiche 2003) when it offers one, in
    the same capped child process as the measurements. Compiling pays off after
    ``k = compile_seconds / (seconds_per_query_now - seconds_per_query_compiled)`` queries
    (never when the compiled circuit is not faster); query times are medians over up to three
    associational queries, best of three runs each.
    """
    net = _network(instance)
    if net is None:
        return {"skipped": "only discrete networks compile to circuits"}
    assoc = levels.get(Level.ASSOCIATIONAL.value, {})
    if assoc.get("skipped", "") and "predicted peak memory" in (assoc.get("skipped") or ""):
        return {"skipped": "not tried: exact inference itself is predicted over the memory cap"}
    try:
        circuit_family = model_zoo.resolve("circuit")()
    except InfercostError as exc:
        return {"skipped": f"no circuit family ({exc})"}
    if _compiler(circuit_family) is None:
        return {"skipped": "the circuit family offers no network compiler"}
    rows = kept.get(Level.ASSOCIATIONAL.value)
    queries = list(rows["queries"][:3]) if rows else []
    msgs, stop = _run_stream(_compile_stream, (circuit_family, net, queries),
                             memory_mb=memory_mb, timeout_s=timeout_s, isolate=isolate,
                             threads=threads)
    head = [m for m in msgs if m[0] == "c"]
    if not head:
        return {"skipped": f"compiling stopped: {stop}" if stop else "compiling gave nothing"}
    _, compile_seconds, n_nodes, n_edges, n_params, width = head[0]
    out: dict[str, Any] = {"compile_seconds": float(compile_seconds), "elimination_width": width,
                           "circuit_nodes": _number(n_nodes), "circuit_edges": _number(n_edges),
                           "circuit_parameters": _number(n_params),
                           "seconds_per_query": None, "break_even_queries": None,
                           "skipped": None}
    times = [m[1] for m in msgs if m[0] == "t"]
    secs_now = _quantile(rows["seconds"], 0.5) if rows else None
    if times and secs_now is not None:
        per_query = _quantile(times, 0.5)
        out["seconds_per_query"] = per_query
        out["seconds_per_query_now"] = secs_now
        gain = secs_now - per_query
        out["break_even_queries"] = int(math.ceil(compile_seconds / gain)) if gain > 0 else None
        out["pays_off"] = gain > 0
    if stop:
        out["note"] = f"stopped early: {stop}"
    return out


# ----------------------------------------------------------------------------------------------
# the audit
# ----------------------------------------------------------------------------------------------
def audit_model(source: str | os.PathLike, *, queries: Sequence[str] = (), n_queries: int = 10,
                method: str = "exact", memory_mb: float = 2048, point_timeout_s: float = 20,
                seed: int = 7, target_stderr: float = TARGET_STDERR, isolate: bool = True,
                options: bool = True, threads: int | None = 1) -> dict[str, Any]:
    """Audit one model: structure, predicted and measured cost per level, cheaper options.

    Parameters
    ----------
    source
        A model file (``.bif .bif.gz .xmlbif .uai`` or our ``.json``) or a bundled network name.
    queries
        Queries in probability notation (:mod:`model_zoo.query_syntax`); when given, only these
        are measured and their answers reported. Otherwise ``n_queries`` random queries per
        level the family expresses.
    method
        ``"exact"`` or ``"sampling"``.
    memory_mb
        A level whose predicted peak memory exceeds this is not run (``skipped`` says so); the
        measuring process is capped at this much beyond what it starts with.
    point_timeout_s
        Time cap for measuring one level; finished queries are kept.
    seed
        Seed of the random queries.
    target_stderr
        Standard error the sampling option is priced for.
    isolate
        Measure in a forked child process (default; in-process where fork is unavailable).
    options
        Compute the options section (compiling, sampling); False skips that work.
    threads
        BLAS/OpenMP threads while measuring (threadpoolctl); None leaves them alone.

    Returns
    -------
    dict
        ``{"model", "family", "source", "method", "structure": {...}, "levels": {LEVEL:
        {"predicted_work", "predicted_bytes", "median_seconds", "p90_seconds", "work",
        "peak_bytes", "n_queries", "skipped", ...}}, "queries": [{"query", "level", "value",
        "stderr", "seconds", "work", "given"}], "options": {...}}`` — JSON-ready.

    Raises
    ------
    InputError
        Bad file, bad query (syntax, unknown variable or state), bad option.
    UnsupportedQuery
        A query the family cannot express (a counterfactual on a Bayesian network).

    Notes
    -----
    Cost: the structural profile (see :func:`structural_summary`), one ``predicted_work`` per
    query, then per query one answer plus a few timed repeats; capped by ``point_timeout_s`` per
    level.
    """
    if method not in ("exact", "sampling"):
        raise InputError.at("audit", "method", "'exact' or 'sampling'", method)
    if isinstance(n_queries, bool) or not isinstance(n_queries, int) or n_queries < 0:
        raise InputError.at("audit", "n_queries", "an integer >= 0", n_queries)
    if not (isinstance(memory_mb, (int, float)) and memory_mb > 0):
        raise InputError.at("audit", "memory_mb", "a number > 0", memory_mb)
    if not (isinstance(point_timeout_s, (int, float)) and point_timeout_s > 0):
        raise InputError.at("audit", "point_timeout_s", "a number > 0", point_timeout_s)
    family, instance, model_name = load_model(source)
    return audit_instance(family, instance, name=model_name, source=os.fspath(source),
                          queries=queries, n_queries=n_queries, method=method,
                          memory_mb=memory_mb, point_timeout_s=point_timeout_s, seed=seed,
                          target_stderr=target_stderr, isolate=isolate, options=options,
                          threads=threads)


def audit_instance(family: Any, instance: Any, *, name: str | None = None,
                   source: str | None = None, queries: Sequence[str] = (), n_queries: int = 10,
                   method: str = "exact", memory_mb: float = 2048, point_timeout_s: float = 20,
                   seed: int = 7, target_stderr: float = TARGET_STDERR, isolate: bool = True,
                   options: bool = True, threads: int | None = 1) -> dict[str, Any]:
    """:func:`audit_model` on an instance already in hand (e.g. built in a notebook).

    ``family`` is a family object and ``instance`` one of its instances; the other parameters
    and the result are those of :func:`audit_model`.
    """
    if method not in ("exact", "sampling"):
        raise InputError.at("audit", "method", "'exact' or 'sampling'", method)
    if isinstance(n_queries, bool) or not isinstance(n_queries, int) or n_queries < 0:
        raise InputError.at("audit", "n_queries", "an integer >= 0", n_queries)
    if isinstance(queries, str):
        queries = [queries]
    model_name = name or str(getattr(instance, "name", "model"))
    if method not in family.methods:
        raise UnsupportedQuery(f"family {family.name!r} has no {method!r} engine "
                               f"(it has: {', '.join(sorted(family.methods))})")
    given = _parse_given(family, instance, list(queries), model_name)
    structure = structural_summary(family, instance)

    by_level: dict[Level, list[tuple[str | None, Query]]] = {}
    if given:
        for text, q in given:
            by_level.setdefault(q.level, []).append((text, q))
    else:
        for lv in Level:
            if lv in family.levels and n_queries > 0:
                qs = family.queries(instance, lv, n=n_queries, seed=seed)
                by_level[lv] = [(None, q) for q in qs]

    want_sampling = options and method == "exact" and "sampling" in family.methods
    n_samples = int(getattr(family, "params", {}).get("n_samples", 2000))
    levels: dict[str, dict[str, Any]] = {}
    rows_out: list[dict[str, Any]] = []
    kept: dict[str, dict] = {}
    sampling: dict[str, Any] = {}
    cap_bytes = float(memory_mb) * _MIB
    for lv, items in by_level.items():
        qs = [q for _, q in items]
        pw = [float(family.predicted_work(instance, q, method=method)) for q in qs]
        pb_fn = getattr(family, "predicted_bytes", None)
        pb = [pb_fn(instance, q, method=method) if callable(pb_fn) else None for q in qs]
        pb_known = [float(b) for b in pb if b is not None]
        entry: dict[str, Any] = {
            "predicted_work": _mean(pw), "predicted_work_max": max(pw) if pw else None,
            "predicted_bytes": max(pb_known) if pb_known else None,
            "median_seconds": None, "p90_seconds": None, "work": None, "peak_bytes": None,
            "n_queries": 0, "n_asked": len(qs), "skipped": None, "method": method,
        }
        for other in sorted(family.methods):
            # the other engine's formula too: it costs nothing and answers "would it be cheaper"
            if other != method:
                try:
                    entry.setdefault("predicted_work_other", {})[other] = _mean(
                        float(family.predicted_work(instance, q, method=other)) for q in qs)
                except InfercostError:
                    pass
        levels[lv.value] = entry
        if pb_known and max(pb_known) > cap_bytes:
            entry["skipped"] = (f"predicted peak memory {_fmt_bytes(max(pb_known))} exceeds "
                                f"the cap of {memory_mb:g} MiB; not run")
            for text, q in items:
                rows_out.append(_row(family, instance, text, q, None))
            continue
        result = _measure(family, instance, qs, method=method,
                          n_probes=_N_SAMPLING_PROBES if want_sampling else 0,
                          memory_mb=memory_mb, timeout_s=point_timeout_s, isolate=isolate,
                          threads=threads)
        done = {m[1]: m for m in result["rows"]}
        secs = [m[5] for m in result["rows"]]
        entry.update(n_queries=len(done), median_seconds=_quantile(secs, 0.5),
                     p90_seconds=_quantile(secs, 0.9),
                     work=_mean(m[4] for m in result["rows"]),
                     peak_bytes=max((m[6] for m in result["rows"] if m[6] is not None),
                                    default=None))
        if result["stop"]:
            entry["skipped"] = (f"{result['stop']} after {len(done)} of {len(qs)} queries")
        for i, (text, q) in enumerate(items):
            rows_out.append(_row(family, instance, text, q, done.get(i)))
        kept[lv.value] = {"queries": qs, "seconds": secs}
        if want_sampling:
            sampling[lv.value] = (_sampling_option(result["probes"], n_samples, target_stderr)
                                  or {"skipped": "no sampling standard error measured"})
        if method == "sampling":
            probes = [("s", m[1], m[2], m[3], m[4], m[5], None) for m in result["rows"]]
            sampling[lv.value] = (_sampling_option(probes, n_samples, target_stderr)
                                  or {"skipped": "no sampling standard error measured"})

    opts: dict[str, Any] = {}
    if options:
        if sampling:
            opts["sampling"] = sampling
        elif "sampling" not in family.methods:
            opts["sampling"] = {"skipped": f"family {family.name!r} has no sampling engine"}
        else:
            opts["sampling"] = {"skipped": "not priced: no level was measured"}
        if _network(instance) is not None:
            opts["compile"] = _compile_option(instance, kept, levels, memory_mb=memory_mb,
                                              timeout_s=point_timeout_s, isolate=isolate,
                                              threads=threads)
    return _json_safe({
        "model": model_name,
        "family": family.name,
        "source": source if source is not None else model_name,
        "method": method,
        "memory_mb": memory_mb,
        "point_timeout_s": point_timeout_s,
        "seed": seed,
        "threads": threads,
        "structure": structure,
        "levels": levels,
        "queries": rows_out,
        "options": opts,
    })


def _json_safe(obj: Any) -> Any:
    """Plain JSON types: numpy scalars to Python, non-finite floats to None (JSON has none)."""
    if isinstance(obj, dict):
        return {str(k): _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_safe(v) for v in obj]
    if isinstance(obj, bool) or obj is None or isinstance(obj, str):
        return obj
    if hasattr(obj, "item") and not isinstance(obj, (int, float)):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def _row(family: Any, instance: Any, text: str | None, q: Query, msg: tuple | None) -> dict:
    return {
        "query": text if text is not None else _describe(family, instance, q),
        "level": q.level.value,
        "given": text is not None,
        "value": None if msg is None else msg[2],
        "stderr": None if msg is None else msg[3],
        "seconds": None if msg is None else msg[5],
        "work": None if msg is None else msg[4],
    }


# ----------------------------------------------------------------------------------------------
# theory versus measurement
# ----------------------------------------------------------------------------------------------
_DECISIVE = ("polynomial", "exponential")


def _klass(verdict: Any) -> str | None:
    growth = getattr(verdict, "growth", None) if verdict is not None else None
    return growth if growth in _DECISIVE else None


def _shape(verdict: Any) -> str:
    """``polynomial (degree 2.1)`` / ``exponential (base 1.9 per unit)`` / ``inconclusive``."""
    growth = getattr(verdict, "growth", "inconclusive")
    if growth == "polynomial" and getattr(verdict, "degree", None) is not None:
        return f"polynomial (degree {verdict.degree:.2g})"
    if growth == "exponential" and getattr(verdict, "base", None) is not None:
        return f"exponential (base {verdict.base:.3g} per unit of size)"
    return str(growth)


def _why(measured: str, expected: str) -> str:
    if measured == "exponential" and expected == "polynomial":
        return "the engine is doing more than its algorithm needs"
    return ("the sizes measured may be too small to show the exponential, or the engine exploits "
            "structure the formula ignores")


def compare_with_theory(measured: Any | None, predicted: Any | None,
                        theory: str | None) -> tuple[str, str]:
    """Compare a measured verdict with the structure's prediction and the family's theory.

    Parameters
    ----------
    measured
        The fitter's :class:`~profiler.fitter.Verdict` on measured work (or time); None when
        there is none (wrong answers, too few points).
    predicted
        The verdict on the family's ``predicted_work`` at the measured sizes; None when absent.
    theory
        The family's ``expected_growth`` for the curve: ``"polynomial"``, ``"exponential"`` or
        None when theory is silent.

    Returns
    -------
    (agreement, note)
        ``agreement`` is one of :data:`AGREEMENTS`: ``"agrees"`` when the measured class matches
        every decisive expectation (the predicted verdict's class, the theory), ``"disagrees"``
        when it contradicts one, ``"undecided"`` when there is an expectation but no decisive
        measured class, ``"no theory"`` when there is nothing decisive to compare with. ``note``
        is one sentence for the report.

    Notes
    -----
    Pure and O(1). Only the growth *class* decides agreement; a measured degree whose interval
    excludes the predicted degree is mentioned in the note without changing the outcome.

    Examples
    --------
    >>> from types import SimpleNamespace as V
    >>> compare_with_theory(V(growth="exponential", base=2.0), V(growth="polynomial", degree=1.0),
    ...                     "polynomial")[0]
    'disagrees'
    """
    m = _klass(measured)
    p = _klass(predicted)
    t = theory if theory in _DECISIVE else None
    if p is None and t is None:
        if predicted is not None and getattr(predicted, "growth", None) == "inconclusive":
            return ("no theory", "theory is silent on this curve and the cost formula's curve is "
                                 "inconclusive at the measured sizes")
        return "no theory", "theory is silent on this curve and no predicted cost was given"
    expectation = []
    if p is not None:
        expectation.append(f"structure predicts {p}")
    if t is not None and t != p:
        expectation.append(f"theory expects {t}")
    if p is not None and t is not None and p == t:
        expectation = [f"structure and theory predict {p}"]
    said = "; ".join(expectation)
    if m is None:
        if measured is None:
            return "undecided", f"no measured verdict; {said}"
        lean = getattr(measured, "leaning", None)
        lean_txt = f" (leans {lean})" if lean in _DECISIVE else ""
        return "undecided", f"measured growth is inconclusive{lean_txt}; {said}"
    if p is not None and m != p:
        note = f"measured {_shape(measured)}, structure predicts {p}: {_why(m, p)}"
        if t is not None and t != p:
            note += f" (theory expects {t}, as measured)" if t == m else f" (theory expects {t})"
        return "disagrees", note
    if t is not None and m != t:
        if p is not None:
            return ("disagrees", f"measured {_shape(measured)} as the cost formula predicts, but "
                                 f"theory expects {t}: the formula or the theory's assumptions "
                                 "do not fit this curve")
        return "disagrees", f"measured {_shape(measured)}, theory expects {t}: {_why(m, t)}"
    note = f"measured {_shape(measured)}; {said}"
    extra = _degree_gap(measured, predicted)
    return "agrees", note + (f"; {extra}" if extra else "")


def _degree_gap(measured: Any, predicted: Any) -> str:
    """A remark when both are polynomial and the measured degree's interval misses the predicted."""
    if _klass(measured) != "polynomial" or _klass(predicted) != "polynomial":
        return ""
    ci = getattr(measured, "degree_ci", None)
    d = getattr(predicted, "degree", None)
    if ci is None or d is None or ci[0] is None or ci[1] is None:
        return ""
    if ci[0] <= d <= ci[1]:
        return ""
    return (f"but the measured degree interval [{ci[0]:.2g}, {ci[1]:.2g}] excludes the "
            f"predicted degree {d:.2g}")


# ----------------------------------------------------------------------------------------------
# terminal form
# ----------------------------------------------------------------------------------------------
def _fmt_seconds(s: float | None) -> str:
    if s is None:
        return "-"
    if s < 1e-3:
        return f"{s * 1e6:.0f} us"
    if s < 1:
        return f"{s * 1e3:.2f} ms"
    return f"{s:.2f} s"


def _fmt_bytes(b: float | None) -> str:
    if b is None:
        return "-"
    for unit, scale in (("GiB", 1024 ** 3), ("MiB", 1024 ** 2), ("KiB", 1024)):
        if b >= scale:
            return f"{b / scale:.1f} {unit}"
    return f"{b:.0f} B"


def _fmt_num(x: float | None) -> str:
    if x is None:
        return "-"
    if abs(x) >= 1e6:
        return f"{x:.3g}"
    if float(x) == int(x):
        return f"{int(x):,}"
    return f"{x:,.1f}"


def format_audit(result: dict[str, Any]) -> str:
    """The audit as plain text for a terminal (the command line prints it).

    Notes
    -----
    O(size of the result). Returns a string; never prints.
    """
    s = result.get("structure", {})
    lines = [f"{result.get('model')}  (family {result.get('family')}, method {result.get('method')})",
             "", "structure"]
    tw = "-"
    if s.get("treewidth_upper") is not None:
        lo, hi = s["treewidth_lower"], s["treewidth_upper"]
        tw = f"{hi} (exact)" if s.get("treewidth_exact") else f"between {lo} and {hi}"
    is_circuit = "n_nodes" in s
    pairs = [("variables" if is_circuit else "nodes", _fmt_num(s.get("nodes"))),
             ("circuit edges" if is_circuit else "edges", _fmt_num(s.get("edges"))),
             ("max in-degree", _fmt_num(s.get("max_in_degree"))),
             ("free parameters", _fmt_num(s.get("parameters")))]
    if "states" in s:
        pairs.append(("states", f"{s['states']} in all, at most {s.get('max_states')} per variable"))
    if s.get("treewidth_upper") is not None:
        pairs.append(("moral-graph treewidth", tw))
    for key, label in (("n_nodes", "circuit nodes"), ("depth", "depth"),
                       ("exogenous_space_size", "exogenous configurations"),
                       ("mechanism_multiply_adds", "mechanism multiply-adds")):
        if s.get(key) is not None:
            pairs.append((label, _fmt_num(s[key])))
    props = [k for k in ("smooth", "decomposable", "deterministic") if k in s]
    if props:
        pairs.append(("properties", ", ".join(k if s[k] else f"not {k}" for k in props)))
        pairs.append(("tractable in one pass", ", ".join(s.get("tractable_queries") or ["-"])))
    pairs.append(("levels", ", ".join(s.get("levels_expressible", []))))
    width = max(len(k) for k, _ in pairs)
    lines += [f"  {k.ljust(width)}  {v}" for k, v in pairs]
    unit = (s.get("work_units") or {}).get(result.get("method"), s.get("work_unit", "operations"))
    lines += ["", f"cost per query (work in {unit})"]
    head = ("level", "predicted work", "predicted peak", "median", "p90", "work", "peak", "n")
    table = [head]
    notes = []
    for lv, e in result.get("levels", {}).items():
        table.append((lv, _fmt_num(e.get("predicted_work")), _fmt_bytes(e.get("predicted_bytes")),
                      _fmt_seconds(e.get("median_seconds")), _fmt_seconds(e.get("p90_seconds")),
                      _fmt_num(e.get("work")), _fmt_bytes(e.get("peak_bytes")),
                      str(e.get("n_queries", 0))))
        if e.get("skipped"):
            notes.append(f"  {lv}: {e['skipped']}")
    widths = [max(len(r[i]) for r in table) for i in range(len(head))]
    for r in table:
        lines.append("  " + "  ".join(c.ljust(w) if i == 0 else c.rjust(w)
                                      for i, (c, w) in enumerate(zip(r, widths))))
    lines += notes
    given = [r for r in result.get("queries", []) if r.get("given")]
    if given:
        lines += ["", "answers"]
        for r in given:
            val = "-" if r["value"] is None else f"{r['value']:.4f}"
            if r.get("stderr") is not None:
                val += f" +/- {r['stderr']:.4f}"
            lines.append(f"  {r['query']}  = {val}   [{r['level']}, {_fmt_seconds(r['seconds'])},"
                         f" work {_fmt_num(r['work'])}]")
    opts = result.get("options", {})
    if opts:
        lines += ["", "options"]
        comp = opts.get("compile")
        if comp is not None:
            if comp.get("skipped"):
                lines.append(f"  compile to a circuit: {comp['skipped']}")
            else:
                be = comp.get("break_even_queries")
                be_txt = ("pays off after " + f"{be:,} queries" if be is not None
                          else "does not pay off (the compiled circuit is not faster)")
                if "seconds_per_query" not in comp:
                    be_txt = "break-even not measured"
                lines.append(f"  compile to a circuit: {_fmt_num(comp.get('circuit_edges'))} edges, "
                             f"{_fmt_seconds(comp.get('compile_seconds'))} to compile, "
                             f"{_fmt_seconds(comp.get('seconds_per_query'))} per query; {be_txt}")
        samp = opts.get("sampling")
        if isinstance(samp, dict) and samp.get("skipped"):
            lines.append(f"  sampling: {samp['skipped']}")
        elif isinstance(samp, dict):
            for lv, o in samp.items():
                if o.get("skipped"):
                    lines.append(f"  sampling, {lv}: {o['skipped']}")
                else:
                    lines.append(f"  sampling, {lv}: {o['n_samples']:,} samples for standard error "
                                 f"{o['target_stderr']:g} (~{_fmt_seconds(o['seconds'])}, work "
                                 f"{_fmt_num(o['work'])} per query)")
    return "\n".join(lines)
