"""Shared timing helpers for the benchmark scripts (in seconds): best of several runs, or their median and range."""

from __future__ import annotations

import time


def best_of(fn, repeat: int = 5) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def median_of(fn, repeat: int = 3) -> tuple[float, float, float]:
    """(median, fastest, slowest) of ``repeat`` runs of ``fn``: the median for the figure, the range for its noise."""
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    times.sort()
    return times[len(times) // 2], times[0], times[-1]
