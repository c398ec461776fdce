"""boost_spectrum against the by-hand route, in the same run; ratios printed.

1. boost_spectrum on a 1e6-pixel spectrum with uncertainty (no resampling) vs building the
   shifted Spectrum directly by hand (target <= 1.5x while also boosting flux and uncertainty).
2. boost_arrays (plain arrays, for batch loops) vs one numpy multiply of the axis (target <= 3x).
Run:  .venv/bin/python benchmarks/bench_spectra.py
"""

from __future__ import annotations

import astropy.units as u
import numpy as np
from _timing import best_of
from astropy.nddata import StdDevUncertainty
from specutils import Spectrum

from dopplerkit.spectra import boost_arrays, boost_spectrum

N = 1_000_000


def main():
    x = np.linspace(3000.0, 10000.0, N)
    f = np.ones(N)
    s = Spectrum(
        flux=f * u.Unit("erg / (s cm2 Angstrom)"), spectral_axis=x * u.AA, uncertainty=StdDevUncertainty(0.1 * f), meta={"medium": "vacuum"}
    )
    factor = 1.2345

    def by_hand():
        return Spectrum(flux=s.flux, spectral_axis=s.spectral_axis / factor, uncertainty=s.uncertainty, meta=s.meta)

    base = best_of(by_hand)
    ours = best_of(lambda: boost_spectrum(s, 0.3, 0.4, beaming="blob"))
    print(f"by-hand shifted Spectrum, 1e6 px : {base * 1e3:7.2f} ms (baseline)")
    print(f"boost_spectrum (axis+flux+unc)   : {ours * 1e3:7.2f} ms  ratio {ours / base:5.2f}x  (target <= 1.5x)")

    mult = best_of(lambda: x * factor, repeat=20)
    arr = best_of(lambda: boost_arrays(x, None, "Angstrom", None, 0.3, 0.4), repeat=20)
    arr_f = best_of(lambda: boost_arrays(x, f, "Angstrom", "erg / (s cm2 Angstrom)", 0.3, 0.4, beaming="blob"), repeat=20)
    print(f"one numpy multiply of the axis   : {mult * 1e3:7.2f} ms (baseline)")
    print(f"boost_arrays (axis only)         : {arr * 1e3:7.2f} ms  ratio {arr / mult:5.2f}x  (target <= 3x)")
    print(f"boost_arrays (axis + beamed flux): {arr_f * 1e3:7.2f} ms  ratio {arr_f / mult:5.2f}x")


if __name__ == "__main__":
    main()
