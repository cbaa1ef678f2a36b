"""infercost's profiler: measure, fit, audit, plan and report how inference cost grows.

Importing this package is fast and has no side effects; the heavy parts load on first use::

    import profiler
    result = profiler.run_study(profiler.default_study(quick=True))
    frame = profiler.load_points("reports/infercost.sqlite")
"""

from __future__ import annotations

import importlib
from typing import Any

__all__ = ["run_study", "load_points", "default_study", "load_study_file", "fit_growth",
           "__version__"]
__version__ = "0.1.0"

_LAZY = {
    "run_study": "profiler.runner",
    "load_points": "profiler.store",
    "default_study": "profiler.study",
    "load_study_file": "profiler.study",
    "fit_growth": "profiler.fitter",
}


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'profiler' has no attribute {name!r}")
