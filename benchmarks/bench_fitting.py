"""Line measurement and kinematic fits: ratios against baselines measured in the same run.

1. measure_lines fast engine vs an lmfit-per-spectrum loop on the same spectra (4000 pixels,
   two components): ratio printed (target >= 20x), centres compared in units of sigma.
2. fit_precessing_jet on 120 epochs, and emcee with 50 walkers x 2000 steps, each as a ratio
   to one plain numpy evaluation loop of the model (a machine-speed yardstick), plus seconds.
Run:  .venv/bin/python benchmarks/bench_fitting.py
"""

from __future__ import annotations

import time
import warnings

import astropy.units as u
import numpy as np

import dopplerkit as dk
from dopplerkit.fitting import fit_jet_pair, fit_precessing_jet
from dopplerkit.measure import LineFitter, measure_lines
from dopplerkit.models import LineComponent, precessing_jet_redshifts, synthesize_spectrum


def main():
    warnings.simplefilter("ignore")
    rng = np.random.default_rng(0)
    grid = np.linspace(5000.0, 9000.0, 4000) * u.AA
    spectra = []
    for k in range(10):
        b, a = rng.uniform(0.1, 0.25), rng.uniform(20, 80)
        comps = [
            LineComponent("H-alpha", z=dk.redshift(b, a * u.deg), fwhm=700 * u.km / u.s, strength=2.0),
            LineComponent("H-alpha", z=dk.redshift(b, (180 - a) * u.deg), fwhm=700 * u.km / u.s, strength=1.5),
        ]
        spectra.append(synthesize_spectrum(grid, comps, snr=30, seed=k, resolution=3000))

    t0 = time.perf_counter()
    ref = [measure_lines(s, "H-alpha", components=2, method="lmfit", window=None) for s in spectra]
    t_lmfit = time.perf_counter() - t0
    t0 = time.perf_counter()
    fast = [measure_lines(s, "H-alpha", components=2, method="fast") for s in spectra]
    t_fast = time.perf_counter() - t0
    fitter = LineFitter.for_lines("H-alpha", "Angstrom", medium="vacuum", components=2)
    arrays = [(s.spectral_axis.value, s.flux.value, s.uncertainty.array) for s in spectra]
    t0 = time.perf_counter()
    raw = [fitter.measure(*a) for a in arrays]
    t_raw = time.perf_counter() - t0
    dev_raw = max(
        abs(r[k]["centre"] - a["centre"][k].value) / a["centre_err"][k].value for (r, _), a in zip(raw, ref, strict=True) for k in range(2)
    )
    dev = max(float(np.max(np.abs((a["centre"] - b["centre"]) / a["centre_err"]))) for a, b in zip(ref, fast, strict=True))
    print(f"lmfit per spectrum (whole 4000 px) : {1e3 * t_lmfit / len(spectra):8.1f} ms/spectrum (baseline)")
    print(
        f"fast engine (windows, analytic J)  : {1e3 * t_fast / len(spectra):8.1f} ms/spectrum  speed-up {t_lmfit / t_fast:5.1f}x (target >= 20x)"
    )
    print(
        f"LineFitter.measure (set up once)    : {1e3 * t_raw / len(spectra):8.1f} ms/spectrum  speed-up {t_lmfit / t_raw:5.1f}x (target >= 20x)"
    )
    print(f"largest centre difference          : {dev:.4f} / {dev_raw:.4f} sigma (windows vs whole spectrum)")

    # yardstick: 1e5 evaluations of the precession model on 120 epochs in plain numpy
    t = np.sort(rng.uniform(0, 400, 120))
    t0 = time.perf_counter()
    for _ in range(2000):
        precessing_jet_redshifts(t, 0.24, 1.2, 0.4, 121.7, 12.0)
    yard = time.perf_counter() - t0
    z1, z2 = precessing_jet_redshifts(t, 0.24, 68 * u.deg, 23 * u.deg, 121.7, 12.0)
    z1 = z1 + rng.normal(0, 1e-3, t.size)
    z2 = z2 + rng.normal(0, 1e-3, t.size)
    t0 = time.perf_counter()
    fit_precessing_jet(t, z1, z2, 1e-3)
    t_prec = time.perf_counter() - t0
    print(f"2000 model evaluations (yardstick) : {yard * 1e3:8.1f} ms (baseline)")
    print(f"fit_precessing_jet, 120 epochs     : {t_prec * 1e3:8.1f} ms  ratio {t_prec / yard:5.2f}x  (target < 0.3 s)")
    f = fit_jet_pair(z1[0], z2[0], 1e-3, 1e-3)
    t0 = time.perf_counter()
    f.sample(steps=2000, walkers=50, burn=200, seed=1)
    t_mc = time.perf_counter() - t0
    print(f"emcee 50 walkers x 2000 steps      : {t_mc:8.2f} s   ratio {t_mc / yard:5.1f}x  (target < 20 s)")


if __name__ == "__main__":
    main()
