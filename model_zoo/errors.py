"""The root of infercost's exception tree.

It lives in ``model_zoo`` because families must raise these errors at their edge and
``model_zoo`` imports nothing of ``profiler``; :mod:`profiler.errors` re-exports them and adds the
profiler's own. The command line catches :class:`InfercostError` once and prints one line.
"""

from __future__ import annotations


class InfercostError(Exception):
    """Base of every error infercost raises on purpose."""


class InputError(InfercostError, ValueError):
    """Bad input from a person: a malformed file, an impossible option, a bad query.

    The message names where (file, line or field), what was expected and what arrived, e.g.
    ``alarm.bif line 41: CPT of 'HR' sums to 0.97, expected 1 (tolerance 1e-6)``.
    """

    @classmethod
    def at(cls, where: str, field: str | None, expected: str, got: object) -> "InputError":
        """Build the standard one-line message ``WHERE: FIELD: expected ..., got ...``."""
        place = f"{where}: {field}" if field else where
        return cls(f"{place}: expected {expected}, got {got!r}")


class ModelError(InfercostError):
    """A model that cannot be built or answered (for example an unsupported query)."""


class UnsupportedQuery(ModelError, InputError):
    """A query the family cannot express (a counterfactual on a Bayesian network)."""
