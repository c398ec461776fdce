"""Memory against the number of spectra, and against the size of one big file, measured in the same run.

1. A batch (one worker, in-process) over N small FITS spectra for growing N: the peak resident
   memory of the process, and its ratio to the smallest run. Rows stream through the journal
   into the result table, written in blocks (of 1000 rows here; STREAM_ROWS in dopplerkit.batch),
   so memory should stay nearly flat (the list of file names is what still grows).
2. One FITS table of ~200 MB (8.3 million pixels) read and fitted: the peak resident memory
   above the interpreter's own (imports done), as a multiple of the file size (target < 3x).

Each measurement runs in a fresh Python process and reads its own high-water mark (VmHWM in
/proc/self/status: getrusage's ru_maxrss would include the parent's memory at the fork).
The small spectra are a pool of at most 2000 distinct files; larger counts link to them in turn
(each link is fitted as a file of its own), so 100,000 inputs need no 100,000 writes.
With --workers 2 the fitting runs in two worker processes and the peak is the parent's (the
workers handle one chunk at a time and do not grow with the count).
Run:  .venv/bin/python benchmarks/bench_memory.py [--workers N] [N1 N2 ...]
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
import textwrap
from pathlib import Path

CHILD_BATCH = textwrap.dedent(
    """
    import sys, warnings
    warnings.simplefilter("ignore")
    import dopplerkit.batch as batch
    from dopplerkit.batch import run_batch
    batch.STREAM_ROWS = 1000  # blocks of 1000 rows here, so small counts show what 100,000 would do
    cfg = {"line": [{"name": "H-alpha", "components": 2}], "kinematics": {"model": "jet-pair"}, "spectra": {"medium": "vacuum"}}
    code, _ = run_batch(sys.argv[1], cfg, sys.argv[2], workers=int(sys.argv[4]), quiet=True, pattern=sys.argv[3])
    print(next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM")) / 1024)
    """
)

CHILD_BASE = textwrap.dedent(
    """
    import warnings
    warnings.simplefilter("ignore")
    import dopplerkit.batch, dopplerkit.measure, dopplerkit.io, astropy.io.fits, astropy.table, scipy.ndimage, scipy.optimize
    print(next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM")) / 1024)
    """
)

CHILD_BIG = textwrap.dedent(
    """
    import sys, warnings
    warnings.simplefilter("ignore")
    from dopplerkit.batch import parse_config, process_chunk
    cfg = parse_config({"line": [{"name": "H-alpha", "components": 2}], "kinematics": {"model": "jet-pair"}, "spectra": {"medium": "vacuum"}}).as_dict()
    row = process_chunk([sys.argv[1]], [None], cfg)[0]
    assert row["status"] != "error", row["message"]
    print(next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM")) / 1024)
    """
)


def _child(code: str, *args) -> float:
    out = subprocess.run([sys.executable, "-c", code, *map(str, args)], capture_output=True, text=True, check=True)
    return float(out.stdout.strip().splitlines()[-1])


def make_small(d: Path, n: int):
    import astropy.units as u
    import numpy as np

    import dopplerkit as dk
    from dopplerkit.io import write_spectrum
    from dopplerkit.models import LineComponent, synthesize_spectrum

    rng = np.random.default_rng(3)
    grid = np.linspace(5600.0, 7600.0, 800) * u.AA
    for k in range(n):
        b, a = rng.uniform(0.08, 0.2), rng.uniform(30, 80)
        comps = [
            LineComponent("H-alpha", z=dk.redshift(b, a), fwhm=900 * u.km / u.s, strength=2.0),
            LineComponent("H-alpha", z=dk.redshift(b, 180 - a), fwhm=900 * u.km / u.s, strength=1.5),
        ]
        write_spectrum(synthesize_spectrum(grid, comps, snr=30, seed=rng, resolution=2000), d / f"s{k:06d}.fits")


def make_big(path: Path):
    import numpy as np
    from astropy.io import fits

    n = 200_000_000 // 24
    w = np.linspace(5000.0, 9000.0, n)
    rng = np.random.default_rng(0)
    f = 1.0 + 2.0 * np.exp(-0.5 * ((w - 6000) / 8) ** 2) + 1.4 * np.exp(-0.5 * ((w - 7300) / 9) ** 2) + rng.normal(0, 0.05, n)
    unit = "erg / (s cm2 Angstrom)"
    cols = [
        fits.Column(name="wavelength", format="D", array=w, unit="Angstrom"),
        fits.Column(name="flux", format="D", array=f, unit=unit),
        fits.Column(name="error", format="D", array=np.full(n, 0.05), unit=unit),
    ]
    fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols)]).writeto(path)


def main():
    args = sys.argv[1:]
    workers = 1
    if "--workers" in args:
        i = args.index("--workers")
        workers = int(args[i + 1])
        del args[i : i + 2]
    counts = [int(a) for a in args] or [500, 2000, 8000]
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        d = tmp / "spectra"
        d.mkdir()
        make_small(d, min(max(counts), 2000))
        pool = sorted(d.glob("*.fits"))
        base = _child(CHILD_BASE)
        print(f"interpreter with dopplerkit's batch imports: {base:8.0f} MB")
        first = None
        for n in counts:
            # n links to the pool, in turn: every input a file name of its own
            sub = tmp / f"n{n}"
            sub.mkdir()
            for k in range(n):
                (sub / f"s{k:06d}.fits").symlink_to(pool[k % len(pool)])
            peak = _child(CHILD_BATCH, sub, tmp / f"out{n}.ecsv", "*.fits", workers)
            if first is None:
                first = (n, peak)
                print(f"batch over {n:6d} spectra: peak {peak:8.0f} MB")
            else:
                per = (peak - first[1]) * 2**20 / (n - first[0])
                print(
                    f"batch over {n:6d} spectra: peak {peak:8.0f} MB  ratio to the smallest run {peak / first[1]:5.2f}x  ({per:.0f} bytes per extra spectrum)"
                )
        big = tmp / "big.fits"
        make_big(big)
        size = big.stat().st_size / 2**20
        peak = _child(CHILD_BIG, big)
        print(
            f"one {size:.0f} MB FITS table: peak {peak:.0f} MB, {peak - base:.0f} MB above the interpreter = {(peak - base) / size:.2f}x the file (target < 3x)"
        )


if __name__ == "__main__":
    main()
