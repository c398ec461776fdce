"""Speed of the exact Doppler factor against the bare textbook numpy expression, in the same run.

Prints the time ratio (ours / textbook) on 1e7 (beta, theta) pairs; the target is <= 1.3x.
The textbook form 1/(Gamma (1 - beta cos theta)) is not exact near c; ours is.
Run:  .venv/bin/python benchmarks/bench_kinematics.py
"""

from __future__ import annotations

import numpy as np
from _timing import best_of

from dopplerkit import doppler_factor, redshift

N = 10_000_000


def main():
    rng = np.random.default_rng(1)
    beta = rng.uniform(0.0, 0.999, N)
    theta = rng.uniform(0.0, np.pi, N)

    def textbook():
        return 1.0 / (1.0 / np.sqrt(1.0 - beta**2) * (1.0 - beta * np.cos(theta)))

    base = best_of(textbook)
    ours = best_of(lambda: doppler_factor(beta, theta))
    z = best_of(lambda: redshift(beta, theta))
    print(f"textbook delta, 1e7 pairs : {base * 1e3:8.1f} ms (baseline)")
    print(f"doppler_factor            : {ours * 1e3:8.1f} ms  ratio {ours / base:5.2f}x  (target <= 1.3x)")
    print(f"redshift                  : {z * 1e3:8.1f} ms  ratio {z / base:5.2f}x")


if __name__ == "__main__":
    main()
