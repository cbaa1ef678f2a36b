"""The exception tree of infercost.

``InfercostError``, ``InputError`` and ``ModelError`` are defined in :mod:`model_zoo.errors` (the
families raise them and may not import ``profiler``) and re-exported here; the rest belong to the
profiler. Soft problems (few points, a poor fit, a censored point) are flags on results, never
exceptions.
"""

from __future__ import annotations

from model_zoo.errors import InfercostError, InputError, ModelError, UnsupportedQuery

__all__ = [
    "InfercostError",
    "InputError",
    "ModelError",
    "UnsupportedQuery",
    "FitError",
    "StoreError",
    "BudgetExceeded",
    "WorkerError",
]


class FitError(InfercostError):
    """The fitter was asked something it cannot answer (not raised for merely poor data)."""


class StoreError(InputError):
    """The results store is missing, corrupt or foreign (bad input: exit 2, file left untouched)."""


class BudgetExceeded(InfercostError):
    """The whole-study time budget ran out before the work asked of it."""


class WorkerError(InfercostError):
    """A measuring worker process failed in a way that is not a property of the point."""
