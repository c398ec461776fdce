"""The main job on the bundled demo data (``dopplerkit demo`` / ``make demo``).

The demo scenarios are invented sources with invented parameters (see
``data_demo/README.md``); nothing here is a real object's data.
"""

from __future__ import annotations

import sys
from pathlib import Path

EXIT_OK = 0

#: Invented jet pair of the demo binary "DKX-1" at one epoch (see data_demo/README.md).
DEMO_JET = {"beta": 0.26, "angle_deg": 79.0}


def run_demo(output_dir: str | Path = "results", workers: int | None = None, out=None) -> int:
    """Run the demo: kinematics of the invented demo jet, then its solution from the redshift pair."""
    import astropy.units as u

    from . import kinematics as k

    out = out or sys.stdout
    b, ang = DEMO_JET["beta"], DEMO_JET["angle_deg"] * u.deg
    za = k.redshift(b, ang)
    zr = k.redshift(b, 180 * u.deg - ang)
    b_fit, th_fit = k.solve_jet_pair(za, zr)
    print(f"demo jet: beta = {b}, viewing angle = {ang:.1f}", file=out)
    print(f"  z approaching = {za:+.5f}, z receding = {zr:+.5f}, mean = Gamma - 1 = {0.5 * (za + zr):.5f}", file=out)
    print(f"  solved back: beta = {b_fit:.6f}, viewing angle = {th_fit:.4f}", file=out)
    return EXIT_OK
