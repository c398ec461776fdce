"""End-to-end batch rate against a by-hand loop, measured in the same run.

Spectra: tabular FITS, 4000 pixels, one line (H-alpha) with two components, written to a
temporary directory. Printed:
* dopplerkit batch (read + measure + jet-pair fit + write), 1 and 2 local workers: spectra/s;
* the by-hand loop: specutils ``Spectrum.read`` without ``format=`` plus one lmfit Gaussian fit
  per component (a typical notebook loop): spectra/s, and the ratio;
* the same batch on ECSV files (bound by text parsing);
* 2 Dask workers (a LocalCluster this script starts) against 1.
Every timing is the median of REPEAT runs (default 3), with the range of the runs beside it: this
machine's noise, so a figure is read with its spread.
Run:  .venv/bin/python benchmarks/bench_batch.py [N] [REPEAT]
"""

from __future__ import annotations

import sys
import tempfile
import warnings
from pathlib import Path

import astropy.units as u
import numpy as np
from _timing import median_of  # the script's own directory is on sys.path

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


def rates(n, timing):
    """Spectra per second from (median, fastest, slowest) seconds: (median rate, its range as text)."""
    med, fast, slow = timing
    return n / med, f"(runs {n / slow:.0f}-{n / fast:.0f})"


def main():
    warnings.simplefilter("ignore")
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 400
    repeat = int(sys.argv[2]) if len(sys.argv) > 2 else 3
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
        hand, spread = rates(m, median_of(lambda: by_hand(files[:m]), repeat))
        print(f"median of {repeat} runs each; the range of the runs in brackets")
        print(f"by-hand loop (specutils read, lmfit per component): {hand:7.1f} spectra/s {spread} (baseline)")
        for w in (1, 2):
            r, spread = rates(n, median_of(lambda w=w: run_batch(tmp / "fits", cfg, tmp / f"out{w}.ecsv", workers=w, quiet=True), repeat))
            print(
                f"dopplerkit batch, FITS, {w} worker(s)            : {r:7.1f} spectra/s {spread} ratio {r / hand:5.1f}x "
                "(issue target >= 20x; >= 300/s on 2 workers)"
            )
        # reading alone: the direct reader for plain binary tables against astropy.io.fits for the same files
        from astropy.io import fits

        from dopplerkit.io import _read_simple_bintable

        def direct():
            for f in files:
                _read_simple_bintable(f)

        def general():
            for f in files:
                with fits.open(f, memmap=False) as hdul:
                    data = hdul[1].data
                    _ = [np.asarray(data[c.name], float) for c in hdul[1].columns]

        fast, _ = rates(n, median_of(direct, repeat))
        slow, _ = rates(n, median_of(general, repeat))
        print(f"reading FITS tables: direct reader {fast:8.0f} files/s, astropy.io.fits {slow:8.0f} files/s, ratio {fast / slow:5.1f}x")
        ne = len(list((tmp / "ecsv").glob("*.ecsv")))
        r, spread = rates(ne, median_of(lambda: run_batch(tmp / "ecsv", cfg, tmp / "oute.ecsv", workers=2, quiet=True), repeat))
        print(f"dopplerkit batch, ECSV, 2 workers               : {r:7.1f} spectra/s {spread} (text parsing bound)")
        try:
            import dask
            from distributed import LocalCluster
        except ImportError:
            print("dask not installed: skipping the Dask comparison")
            return
        dask_rates = {}
        with dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None}):
            for w in (1, 2):
                with LocalCluster(n_workers=w, threads_per_worker=1, processes=True, dashboard_address=None) as cl:
                    # warm EVERY worker (one chunk per file): a cold worker pays its imports inside the timed run
                    run_batch(
                        tmp / "fits", cfg, tmp / "warm.ecsv", scheduler=cl.scheduler_address, quiet=True, pattern="s000*.fits", chunk_size=1
                    )
                    dask_rates[w], spread = rates(
                        n,
                        median_of(
                            lambda w=w, cl=cl: run_batch(
                                tmp / "fits",
                                cfg,
                                tmp / f"dask{w}.ecsv",
                                scheduler=cl.scheduler_address,
                                quiet=True,
                                chunk_size=max(n // 8, 10),
                            ),
                            repeat,
                        ),
                    )
                print(f"Dask LocalCluster, {w} worker(s)                 : {dask_rates[w]:7.1f} spectra/s {spread}")
        print(f"2 Dask workers / 1 worker                      : {dask_rates[2] / dask_rates[1]:5.2f}x (target >= 1.7x)")


if __name__ == "__main__":
    main()
