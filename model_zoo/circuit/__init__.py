"""Probabilistic circuits (smooth, decomposable sum-product networks) and compilation of a
Bayesian network into an arithmetic circuit.

Modules: :mod:`~model_zoo.circuit.core` (representation and the layered log-space pass),
:mod:`~model_zoo.circuit.vtree` (scaled instances over random vtrees),
:mod:`~model_zoo.circuit.compile` (variable elimination traced into a circuit),
:mod:`~model_zoo.circuit.checks` (smooth / decomposable / deterministic, brute-force reference),
:mod:`~model_zoo.circuit.io` (our JSON format), :mod:`~model_zoo.circuit.family` (the family).
"""

from model_zoo.circuit.checks import (determinism, is_decomposable, is_deterministic,
                                      is_smooth, tractable_kinds)
from model_zoo.circuit.compile import CompiledCircuit, compile_network, mutilate
from model_zoo.circuit.core import Circuit, CircuitBuilder, forward, log_values, mpe_assignment
from model_zoo.circuit.family import CircuitFamily, CircuitInstance, ZeroProbabilityEvidence
from model_zoo.circuit.io import circuit_to_dict, dump_circuit, load_circuit, parse_circuit
from model_zoo.circuit.vtree import make_vtree, vtree_circuit, vtree_edges

__all__ = [
    "Circuit", "CircuitBuilder", "CircuitFamily", "CircuitInstance", "CompiledCircuit",
    "ZeroProbabilityEvidence", "circuit_to_dict", "compile_network", "determinism",
    "dump_circuit", "forward", "is_decomposable", "is_deterministic", "is_smooth",
    "load_circuit", "log_values", "make_vtree", "mpe_assignment", "mutilate", "parse_circuit",
    "tractable_kinds", "vtree_circuit", "vtree_edges",
]
