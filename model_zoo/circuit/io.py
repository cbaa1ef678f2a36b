"""The circuit JSON format of our own (docs/formats/circuit.md): read with validation, write.

::

    {"family": "circuit", "format_version": 1, "normalised": true,
     "variables": [{"name": "X1", "states": ["0", "1"]}, ...],
     "nodes": [{"id": "a", "type": "leaf", "variable": "X1", "probabilities": [0.1, 0.9]},
               {"id": "p", "type": "product", "children": ["a", "b"]},
               {"id": "s", "type": "sum", "children": ["p", "q"], "weights": [0.4, 0.6]}],
     "root": "s"}

Every problem raises :class:`~model_zoo.errors.InputError` with one line naming the file, the
node (its index and id) and the field.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from model_zoo.circuit.core import LEAF, PRODUCT, SUM, Circuit, CircuitBuilder
from model_zoo.errors import InputError

__all__ = ["FORMAT_VERSION", "load_circuit", "parse_circuit", "circuit_to_dict", "dump_circuit"]

FORMAT_VERSION = 1
TOLERANCE = 1e-6
_KINDS = {"leaf": LEAF, "product": PRODUCT, "sum": SUM}


def _is_number(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def load_circuit(source: str | Path) -> Circuit:
    """Read and validate a circuit file. Raises InputError naming the file and field."""
    path = Path(source)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise InputError(f"{path}: cannot read the circuit file ({exc.strerror or exc})") from exc
    except UnicodeDecodeError as exc:
        raise InputError(f"{path}: not UTF-8 text ({exc.reason})") from exc
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"{path}: not valid JSON (line {exc.lineno} column {exc.colno}: "
                         f"{exc.msg})") from exc
    except RecursionError as exc:
        raise InputError(f"{path}: JSON nested too deeply") from exc
    return parse_circuit(data, where=str(path))


def parse_circuit(data: Any, *, where: str = "circuit") -> Circuit:
    """Validate a decoded JSON object and build the :class:`Circuit`."""
    if not isinstance(data, dict):
        raise InputError.at(where, None, "a JSON object at the top level", type(data).__name__)
    if data.get("family") != "circuit":
        raise InputError.at(where, "family", "'circuit'", data.get("family"))
    if data.get("format_version") != FORMAT_VERSION:
        raise InputError.at(where, "format_version", str(FORMAT_VERSION),
                            data.get("format_version"))
    normalised = data.get("normalised", True)
    if not isinstance(normalised, bool):
        raise InputError.at(where, "normalised", "true or false", normalised)

    variables = data.get("variables")
    if not isinstance(variables, list) or not variables:
        raise InputError.at(where, "variables", "a non-empty list", variables)
    names: list[str] = []
    states: list[tuple[str, ...]] = []
    for i, v in enumerate(variables):
        place = f"variables[{i}]"
        if not isinstance(v, dict):
            raise InputError.at(where, place, "an object with 'name' and 'states'", v)
        name = v.get("name")
        if not isinstance(name, str) or not name:
            raise InputError.at(where, f"{place}.name", "a non-empty string", name)
        if name in names:
            raise InputError.at(where, f"{place}.name", "a name not used before", name)
        st = v.get("states")
        if (not isinstance(st, list) or not st or not all(isinstance(s, str) for s in st)
                or len(set(st)) != len(st)):
            raise InputError.at(where, f"{place}.states", "a non-empty list of distinct strings",
                                st)
        names.append(name)
        states.append(tuple(st))
    var_index = {n: i for i, n in enumerate(names)}

    nodes = data.get("nodes")
    if not isinstance(nodes, list) or not nodes:
        raise InputError.at(where, "nodes", "a non-empty list", nodes)
    by_id: dict[Any, int] = {}
    for i, node in enumerate(nodes):
        if not isinstance(node, dict):
            raise InputError.at(where, f"nodes[{i}]", "an object", node)
        nid = node.get("id")
        if not (isinstance(nid, str) or (isinstance(nid, int) and not isinstance(nid, bool))):
            raise InputError.at(where, f"nodes[{i}].id", "a string or an integer", nid)
        if nid in by_id:
            raise InputError.at(where, f"nodes[{i}].id", "an id not used before", nid)
        by_id[nid] = i

    def node_place(i: int) -> str:
        return f"nodes[{i}] (id {nodes[i]['id']!r})"

    kinds: list[int] = []
    kids: list[list[int]] = []
    weights: list[list[float]] = []
    leaf_info: dict[int, tuple[int, list[float]]] = {}
    for i, node in enumerate(nodes):
        place = node_place(i)
        kind_name = node.get("type")
        kind = _KINDS.get(kind_name) if isinstance(kind_name, str) else None
        if kind is None:
            raise InputError.at(where, f"{place}.type", "'sum', 'product' or 'leaf'",
                                node.get("type"))
        kinds.append(kind)
        if kind == LEAF:
            var = node.get("variable")
            if not isinstance(var, str) or var not in var_index:
                raise InputError.at(where, f"{place}.variable", "a name from 'variables'", var)
            v = var_index[var]
            p = node.get("probabilities")
            if not isinstance(p, list) or len(p) != len(states[v]):
                raise InputError.at(where, f"{place}.probabilities",
                                    f"a list of {len(states[v])} numbers (one per state of "
                                    f"{var!r})", p)
            if not all(_is_number(x) and 0 <= x <= 1 for x in p):
                raise InputError.at(where, f"{place}.probabilities", "numbers in [0, 1]", p)
            if normalised and abs(sum(p) - 1.0) > TOLERANCE:
                raise InputError(f"{where}: {place}.probabilities: sum to {sum(p):.6g}, expected 1 "
                                 f"(tolerance {TOLERANCE:g}; set \"normalised\": false for an "
                                 "arithmetic circuit)")
            leaf_info[i] = (v, [float(x) for x in p])
            kids.append([])
            weights.append([])
            continue
        ch = node.get("children")
        if not isinstance(ch, list) or not ch:
            raise InputError.at(where, f"{place}.children", "a non-empty list of node ids", ch)
        idx = []
        for c in ch:
            if isinstance(c, bool) or not isinstance(c, (str, int)) or c not in by_id:
                raise InputError.at(where, f"{place}.children", "ids of nodes in 'nodes'", c)
            idx.append(by_id[c])
        kids.append(idx)
        if kind == SUM:
            w = node.get("weights")
            if not isinstance(w, list) or len(w) != len(ch):
                raise InputError.at(where, f"{place}.weights",
                                    f"a list of {len(ch)} numbers (one per child)", w)
            if not all(_is_number(x) for x in w):
                raise InputError.at(where, f"{place}.weights", "finite numbers", w)
            if any(x < 0 for x in w):
                raise InputError.at(where, f"{place}.weights", "non-negative numbers", w)
            if normalised and abs(sum(w) - 1.0) > TOLERANCE:
                raise InputError(f"{where}: {place}.weights: sum to {sum(w):.6g}, expected 1 "
                                 f"(tolerance {TOLERANCE:g}; set \"normalised\": false for an "
                                 "arithmetic circuit)")
            weights.append([float(x) for x in w])
        else:
            if "weights" in node:
                raise InputError.at(where, f"{place}.weights", "no weights on a product node",
                                    node["weights"])
            weights.append([1.0] * len(idx))

    root = data.get("root")
    if isinstance(root, bool) or not isinstance(root, (str, int)) or root not in by_id:
        raise InputError.at(where, "root", "the id of a node in 'nodes'", root)

    order = _topological(kinds, kids, by_id[root], where, node_place)
    return _assemble(names, states, kinds, kids, weights, leaf_info, order, by_id[root],
                     normalised=normalised, where=where)


def _topological(kinds, kids, root: int, where: str, node_place) -> list[int]:
    """Children-first order of the nodes reachable from ``root``; a cycle raises InputError."""
    state = {}  # 1 = on the current path, 2 = done
    order: list[int] = []
    stack: list[tuple[int, int]] = [(root, 0)]
    state[root] = 1
    while stack:
        node, pos = stack[-1]
        if pos < len(kids[node]):
            stack[-1] = (node, pos + 1)
            c = kids[node][pos]
            s = state.get(c)
            if s == 1:
                raise InputError(f"{where}: {node_place(c)}: children: the graph has a cycle "
                                 f"through this node (a circuit must be acyclic)")
            if s is None:
                state[c] = 1
                stack.append((c, 0))
        else:
            stack.pop()
            state[node] = 2
            order.append(node)
    return order


def _assemble(names, states, kinds, kids, weights, leaf_info, order, root, *, normalised,
              where) -> Circuit:
    b = CircuitBuilder(names, states)
    new_id: dict[int, int] = {}
    # Group into runs of the same kind whose children are already placed, so the builder's
    # bulk calls (and the engine's layering) stay vectorised.
    depth: dict[int, int] = {}
    for i in order:
        depth[i] = 0 if kinds[i] == LEAF else 1 + max(depth[c] for c in kids[i])
    by_depth: dict[int, list[int]] = {}
    for i in order:
        by_depth.setdefault(depth[i], []).append(i)
    for d in sorted(by_depth):
        group = by_depth[d]
        leaves = [i for i in group if kinds[i] == LEAF]
        if leaves:
            ids = b.leaves([leaf_info[i][0] for i in leaves],
                           _pad([leaf_info[i][1] for i in leaves]))
            new_id.update(zip(leaves, ids.tolist()))
        for kind in (PRODUCT, SUM):
            sel = [i for i in group if kinds[i] == kind]
            if not sel:
                continue
            merged_children, merged_weights = [], []
            for i in sel:
                acc: dict[int, float] = {}
                for c, w in zip(kids[i], weights[i]):
                    if kind == PRODUCT and new_id[c] in acc:
                        raise InputError(f"{where}: nodes[{i}]: children: a product lists child "
                                         f"{c!r} twice (not decomposable)")
                    acc[new_id[c]] = acc.get(new_id[c], 0.0) + w   # a repeated sum child adds
                merged_children.append(list(acc))
                merged_weights.append(list(acc.values()))
            ids = b.ragged(kind, merged_children, merged_weights)
            new_id.update(zip(sel, ids.tolist()))
    return b.build(new_id[root], normalised=normalised, name=where)


def _pad(rows: list[list[float]]) -> np.ndarray:
    width = max(len(r) for r in rows)
    out = np.zeros((len(rows), width))
    for j, r in enumerate(rows):
        out[j, :len(r)] = r
    return out


def circuit_to_dict(circuit: Circuit) -> dict[str, Any]:
    """The JSON object of :func:`dump_circuit` (ids are the node numbers)."""
    nodes = []
    cards = circuit.cards
    for i in range(circuit.n_nodes):
        t = int(circuit.node_type[i])
        if t == LEAF:
            v = int(circuit.leaf_var[i])
            nodes.append({"id": i, "type": "leaf", "variable": circuit.variables[v],
                          "probabilities": circuit.leaf_probs[i][:cards[v]].tolist()})
        elif t == PRODUCT:
            nodes.append({"id": i, "type": "product", "children": circuit.children(i).tolist()})
        else:
            nodes.append({"id": i, "type": "sum", "children": circuit.children(i).tolist(),
                          "weights": circuit.weights(i).tolist()})
    return {"family": "circuit", "format_version": FORMAT_VERSION,
            "normalised": bool(circuit.normalised),
            "variables": [{"name": v, "states": list(s)}
                          for v, s in zip(circuit.variables, circuit.states)],
            "nodes": nodes, "root": int(circuit.root)}


def dump_circuit(circuit: Circuit, path: str | Path) -> None:
    """Write ``circuit`` as JSON (floats round-trip exactly)."""
    Path(path).write_text(json.dumps(circuit_to_dict(circuit)), encoding="utf-8")
