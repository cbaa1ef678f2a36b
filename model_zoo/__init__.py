"""Model families for infercost: build scaled instances, answer queries, count work, describe structure.

Families are found by name through the registry::

    >>> import model_zoo
    >>> "bayesnet" in model_zoo.names()
    True

Importing this package is fast: a family's module (and pgmpy) loads when it is first asked for.
"""

from model_zoo.base import (
    AXES,
    METHODS,
    TOPOLOGIES,
    Answer,
    Family,
    FamilyBase,
    Level,
    Query,
    Size,
    get,
    make_rng,
    names,
    register,
    resolve,
    size_along,
)

__all__ = [
    "AXES", "METHODS", "TOPOLOGIES", "Answer", "Family", "FamilyBase", "Level", "Query", "Size",
    "get", "make_rng", "names", "register", "resolve", "size_along",
]
