"""End-to-end batch rate against a by-hand loop, measured in the same run.

Spectra: tabular FITS, 4000 pixels, one line (H-alpha) with two components, written to a
temporary directory. Printed:
* dopplerkit batch (read + measure + jet-pair fit + write), 1 and 2 local workers: spectra/s;
* the by-hand loop: specutils ``Spectrum.read`` without ``format=`` plus one lmfit Gaussian fit
  per component (a typical notebook loop): spectra/s, and the ratio;
* the same batch on ECSV files (bound by text parsing);
* 2 Dask workers (a LocalCluster this script starts) against 1.
Run:  .venv/bin/python benchmarks/bench_batch.py [N]
"""

from __future__ import annotations

import sys
import tempfile
import time
import warnings
from pathlib import Path

import astropy.units as u
import numpy as np

import dopplerkit as dk
from dopplerkit.batch import run_batch
from dopplerkit.io import write_spectrum
from dopplerkit.models import LineComponent, synthesize_spectrum

CONFIG = '[[line]]\nname = "H-alpha"\ncomponents = 2\n[kinematics]\nmodel = "jet-pair"\n[spectra]\nmedium = "vacuum"\n'


def make(d: Path, n: int, ext: str):
    rng = np.random.default_rng(1)
    grid = np.linspace(5000.0, 9000.0, 4000) * u.AA
    for k in range(n):
        b, a = rng.uniform(0.08, 0.25), rng.uniform(25, 80)
        comps = [
            LineComponent("H-alpha", z=dk.redshift(b, a * u.deg), fwhm=700 * u.km / u.s, strength=2.0),
            LineComponent("H-alpha", z=dk.redshift(b, (180 - a) * u.deg), fwhm=700 * u.km / u.s, strength=1.5),
        ]
        write_spectrum(synthesize_spectrum(grid, comps, snr=30, seed=rng, resolution=3000), d / f"s{k:04d}{ext}")


def by_hand(files):
    from lmfit.models import GaussianModel, LinearModel
    from specutils import Spectrum

    for f in files:
        s = Spectrum.read(f)
        x, y = s.spectral_axis.value, s.flux.value
        w = 1 / s.uncertainty.array
        base = np.median(y)
        for _ in range(2):
            i = int(np.argmax(y - base))
            sel = np.abs(x - x[i]) < 60
            m = GaussianModel() + LinearModel()
            p = m.make_params(amplitude=(y[i] - base) * 15, center=x[i], sigma=6, slope=0, intercept=base)
            m.fit(y[sel], p, x=x[sel], weights=w[sel])
            y = np.where(sel, base, y)


def rate(n, seconds):
    return n / seconds


def main():
    warnings.simplefilter("ignore")
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 400
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        (tmp / "fits").mkdir()
        (tmp / "ecsv").mkdir()
        make(tmp / "fits", n, ".fits")
        make(tmp / "ecsv", max(n // 4, 20), ".ecsv")
        cfg = tmp / "c.toml"
        cfg.write_text(CONFIG)
        files = sorted((tmp / "fits").glob("*.fits"))
        m = min(60, n)
        by_hand(files[:1])  # imports (specutils, lmfit) outside the timing: a notebook has them loaded already
        t0 = time.perf_counter()
        by_hand(files[:m])
        hand = rate(m, time.perf_counter() - t0)
        print(f"by-hand loop (specutils read, lmfit per component): {hand:7.1f} spectra/s (baseline)")
        for w in (1, 2):
            t0 = time.perf_counter()
            run_batch(tmp / "fits", cfg, tmp / f"out{w}.ecsv", workers=w, quiet=True)
            r = rate(n, time.perf_counter() - t0)
            print(
                f"dopplerkit batch, FITS, {w} worker(s)            : {r:7.1f} spectra/s  ratio {r / hand:5.1f}x (issue target >= 20x; >= 300/s on 2 workers)"
            )
        # reading alone: the direct reader for plain binary tables against astropy.io.fits for the same files
        from astropy.io import fits

        from dopplerkit.io import _read_simple_bintable

        t0 = time.perf_counter()
        for f in files:
            _read_simple_bintable(f)
        fast = rate(n, time.perf_counter() - t0)
        t0 = time.perf_counter()
        for f in files:
            with fits.open(f, memmap=False) as hdul:
                data = hdul[1].data
                _ = [np.asarray(data[c.name], float) for c in hdul[1].columns]
        slow = rate(n, time.perf_counter() - t0)
        print(f"reading FITS tables: direct reader {fast:8.0f} files/s, astropy.io.fits {slow:8.0f} files/s, ratio {fast / slow:5.1f}x")
        ne = len(list((tmp / "ecsv").glob("*.ecsv")))
        t0 = time.perf_counter()
        run_batch(tmp / "ecsv", cfg, tmp / "oute.ecsv", workers=2, quiet=True)
        print(f"dopplerkit batch, ECSV, 2 workers               : {rate(ne, time.perf_counter() - t0):7.1f} spectra/s (text parsing bound)")
        try:
            import dask
            from distributed import LocalCluster
        except ImportError:
            print("dask not installed: skipping the Dask comparison")
            return
        rates = {}
        with dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None}):
            for w in (1, 2):
                with LocalCluster(n_workers=w, threads_per_worker=1, processes=True, dashboard_address=None) as cl:
                    # warm EVERY worker (one chunk per file): a cold worker pays its imports inside the timed run
                    run_batch(
                        tmp / "fits", cfg, tmp / "warm.ecsv", scheduler=cl.scheduler_address, quiet=True, pattern="s000*.fits", chunk_size=1
                    )
                    t0 = time.perf_counter()
                    run_batch(
                        tmp / "fits", cfg, tmp / f"dask{w}.ecsv", scheduler=cl.scheduler_address, quiet=True, chunk_size=max(n // 8, 10)
                    )
                    rates[w] = rate(n, time.perf_counter() - t0)
                print(f"Dask LocalCluster, {w} worker(s)                 : {rates[w]:7.1f} spectra/s")
        print(f"2 Dask workers / 1 worker                      : {rates[2] / rates[1]:5.2f}x (target >= 1.7x)")


if __name__ == "__main__":
    main()
