"""Fixtures for the bayesnet tests: the family, hand-built textbook networks, and bundled
networks loaded once per session (pgmpy's BIF reader costs about a second per file)."""

from __future__ import annotations

import numpy as np
import pytest

from model_zoo.discrete import DiscreteNetwork


def _network(name, parents, states, tables):
    """A DiscreteNetwork from ``tables[v]`` given as P(v = state 0 | parent states), or full
    tables; parents' axes in the order listed."""
    cpts = {}
    for v, table in tables.items():
        arr = np.asarray(table, dtype=float)
        if len(states[v]) == 2 and arr.shape == tuple(len(states[p]) for p in parents[v]):
            arr = np.stack([arr, 1.0 - arr])  # binary: the table gives P(v = first state | ...)
        cpts[v] = arr
    return DiscreteNetwork(variables=tuple(tables), states=states, parents=parents, cpts=cpts,
                           name=name).validate()


@pytest.fixture(scope="session")
def bn_family():
    from model_zoo.bayesnet import BayesNetFamily

    return BayesNetFamily()


@pytest.fixture(scope="session")
def burglary(bn_family):
    """Russell & Norvig, AIMA 3rd ed., Fig. 14.2 (state 0 = true)."""
    tf = ("true", "false")
    parents = {"B": (), "E": (), "A": ("B", "E"), "J": ("A",), "M": ("A",)}
    tables = {
        "B": np.array(0.001), "E": np.array(0.002),
        "A": [[0.95, 0.94], [0.29, 0.001]],          # A[b, e]
        "J": [0.90, 0.05], "M": [0.70, 0.01],
    }
    tables = {v: (np.array([t, 1 - t]) if np.ndim(t) == 0 else t) for v, t in tables.items()}
    net = _network("burglary", parents, {v: tf for v in parents}, tables)
    return bn_family.from_network(net)


@pytest.fixture(scope="session")
def confounded(bn_family):
    """Z -> X, Z -> Y, X -> Y (REFERENCES.md, Pearl 2009 §3.3 back-door example; state 0 = true)."""
    tf = ("true", "false")
    parents = {"Z": (), "X": ("Z",), "Y": ("X", "Z")}
    tables = {
        "Z": np.array([0.5, 0.5]),
        "X": [0.8, 0.2],                              # X[z]
        "Y": [[0.9, 0.5], [0.7, 0.1]],                # Y[x, z]
    }
    net = _network("confounded", parents, {v: tf for v in parents}, tables)
    return bn_family.from_network(net)


_LOADED: dict = {}


@pytest.fixture(scope="session")
def load_bundled(bn_family):
    """``load_bundled(name)`` -> instance, each bundled network read once per session."""
    def load(name):
        if name not in _LOADED:
            _LOADED[name] = bn_family.load(name)
        return _LOADED[name]

    return load
