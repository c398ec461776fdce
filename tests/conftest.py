"""Shared synthetic spectra (invented data, for tests only), named by their units."""

from __future__ import annotations

import astropy.units as u
import numpy as np
import pytest
from astropy.nddata import StdDevUncertainty
from hypothesis import settings

# property tests check values, not speed: no per-example time limit on shared, noisy machines
settings.register_profile("dopplerkit", deadline=None)
settings.load_profile("dopplerkit")


@pytest.fixture
def spectrum_angstrom():
    """Source-frame spectrum in Angstrom, F_lambda, one Gaussian emission line at 6000 Angstrom (vacuum)."""
    from specutils import Spectrum

    x = np.linspace(5000.0, 7000.0, 4001)
    flux = 1.0 + 5.0 * np.exp(-0.5 * ((x - 6000.0) / 3.0) ** 2)
    return Spectrum(
        flux=flux * u.Unit("erg / (s cm2 Angstrom)"),
        spectral_axis=x * u.AA,
        uncertainty=StdDevUncertainty(0.05 * np.ones_like(x)),
        meta={"medium": "vacuum"},
    )


@pytest.fixture
def spectrum_ghz():
    """Source-frame spectrum in GHz, F_nu in Jy, descending axis, one line at 115 GHz."""
    from specutils import Spectrum

    x = np.linspace(130.0, 100.0, 3001)
    flux = 0.1 + 2.0 * np.exp(-0.5 * ((x - 115.0) / 0.05) ** 2)
    return Spectrum(flux=flux * u.Jy, spectral_axis=x * u.GHz, uncertainty=StdDevUncertainty(0.01 * np.ones_like(x)))
