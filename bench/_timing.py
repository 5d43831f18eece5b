"""Shared helpers of the benchmark scripts: JSON-line output and median wall-clock timing."""

from __future__ import annotations

import json
import statistics
import time
from collections.abc import Callable

__all__ = ["emit", "median_ms"]


def emit(record: dict) -> None:
    """Print one benchmark record as a JSON line."""
    print(json.dumps(record), flush=True)


def median_ms(func: Callable[[], object], repeats: int) -> float:
    """Median wall-clock time of ``func`` over ``repeats`` calls after one warm-up call, ms."""
    func()  # warm caches and compiled kernels
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        func()
        times.append(time.perf_counter() - start)
    return 1000.0 * statistics.median(times)
