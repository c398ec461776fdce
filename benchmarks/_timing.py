"""Shared timing helper for the benchmark scripts (best of several runs, in seconds)."""

from __future__ import annotations

import time


def best_of(fn, repeat: int = 5) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best
