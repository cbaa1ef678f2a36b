"""The one timing helper the benchmarks share: median wall seconds of repeated calls."""

from __future__ import annotations

import statistics
import time
from typing import Callable


def median_seconds(fn: Callable[[], object], repeats: int = 5, *, warmup: bool = False) -> float:
    """Median of ``repeats`` timed calls of ``fn`` (perf_counter_ns), after one untimed call when
    ``warmup``."""
    if warmup:
        fn()
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter_ns()
        fn()
        times.append((time.perf_counter_ns() - t0) * 1e-9)
    return statistics.median(times)
