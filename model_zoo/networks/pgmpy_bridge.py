"""Conversion between :class:`model_zoo.discrete.DiscreteNetwork` and pgmpy's
``DiscreteBayesianNetwork`` (pgmpy is imported inside the functions).

Both sides order CPT columns with the last parent varying fastest, so ``cpts[v]`` of shape
``(card(v), card(p1), ..., card(pk))`` reshapes in C order to pgmpy's ``(card(v), prod cards)``.
"""

from __future__ import annotations

import numpy as np
import networkx as nx

from model_zoo.discrete import DiscreteNetwork
from model_zoo.errors import InputError

__all__ = ["to_pgmpy", "from_pgmpy", "topological_order"]


def to_pgmpy(net: DiscreteNetwork):
    """A pgmpy ``DiscreteBayesianNetwork`` with the same graph, states and tables. O(parameters)."""
    from pgmpy.factors.discrete import TabularCPD
    from pgmpy.models import DiscreteBayesianNetwork

    model = DiscreteBayesianNetwork()
    model.add_nodes_from(net.variables)
    model.add_edges_from((p, v) for v in net.variables for p in net.parents[v])
    model.name = net.name
    cpds = []
    for v in net.variables:
        ps = list(net.parents[v])
        table = np.asarray(net.cpts[v], dtype=float).reshape(net.card(v), -1)
        names = {u: list(net.states[u]) for u in [v, *ps]}
        cpds.append(TabularCPD(v, net.card(v), table, evidence=ps or None,
                               evidence_card=[net.card(p) for p in ps] or None,
                               state_names=names))
    model.add_cpds(*cpds)
    return model


def topological_order(variables: list[str], parents: dict[str, tuple[str, ...]],
                      where: str) -> tuple[str, ...]:
    """Variables in a topological order that keeps the given order where it can; a cycle raises
    :class:`InputError` naming ``where`` and the cycle."""
    rank = {v: i for i, v in enumerate(variables)}
    g = nx.DiGraph()
    g.add_nodes_from(variables)
    g.add_edges_from((p, v) for v in variables for p in parents[v])
    try:
        return tuple(nx.lexicographical_topological_sort(g, key=rank.__getitem__))
    except nx.NetworkXUnfeasible:
        cycle = [u for u, _ in nx.find_cycle(g)]
        raise InputError(f"{where}: the graph has a cycle: {' -> '.join(cycle + cycle[:1])}; "
                         "expected a DAG") from None


def from_pgmpy(model, *, name: str) -> DiscreteNetwork:
    """A :class:`DiscreteNetwork` from a pgmpy ``DiscreteBayesianNetwork`` (not validated)."""
    variables = [str(v) for v in model.nodes()]
    states: dict[str, tuple[str, ...]] = {}
    parents: dict[str, tuple[str, ...]] = {}
    cpts: dict[str, np.ndarray] = {}
    for v in model.nodes():
        cpd = model.get_cpds(v)
        if cpd is None:
            raise InputError(f"{name}: variable {v!r} has no probability table")
        scope = [str(u) for u in cpd.variables]
        parents[str(v)] = tuple(scope[1:])
        names = getattr(cpd, "state_names", None) or {}
        for u, card in zip(cpd.variables, cpd.cardinality):
            if str(u) not in states:
                got = names.get(u)
                states[str(u)] = (tuple(str(s) for s in got) if got is not None
                                  else tuple(str(i) for i in range(int(card))))
        cpts[str(v)] = np.asarray(cpd.values, dtype=float).reshape(
            tuple(int(c) for c in cpd.cardinality))
    order = topological_order(variables, parents, name)
    return DiscreteNetwork(variables=order, states=states, parents=parents, cpts=cpts, name=name)
