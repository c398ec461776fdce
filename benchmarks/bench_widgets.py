"""Callback latency of one slider move (state update + redraw of the moving artists + PNG), in process.

Baseline measured in the same run: a full redraw of the same figure (what re-creating or fully
redrawing per move would cost). Target: median < 30 ms.
Run:  .venv/bin/python benchmarks/bench_widgets.py
"""

from __future__ import annotations

import time

import numpy as np

from dopplerkit.widgets import SpectrumExplorer, _render


def main():
    e = SpectrumExplorer()
    moves = []
    for v in np.linspace(0.05, 0.95, 60):
        t0 = time.perf_counter()
        e.speed.value = float(v)
        moves.append(time.perf_counter() - t0)
    full = []
    for _ in range(10):
        t0 = time.perf_counter()
        _render(e.fig)
        full.append(time.perf_counter() - t0)
    m, f = np.median(moves) * 1e3, np.median(full) * 1e3
    print(f"full redraw of the figure (baseline)   : {f:6.1f} ms")
    print(f"one speed-slider move (median of 60)   : {m:6.1f} ms  ratio {m / f:4.2f}x  (target median < 30 ms)")
    print(f"slowest move                           : {np.max(moves) * 1e3:6.1f} ms (includes rescaling redraws)")


if __name__ == "__main__":
    main()
