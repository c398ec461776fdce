"""
A jet pair measured and fitted
==============================

One epoch of the invented binary DKX-1: both jets measured in H-alpha and He I 5876 together,
then the speed and viewing angle fitted, drawn with the joint regions and the residuals.
"""

import warnings

import matplotlib.pyplot as plt

from dopplerkit.demo import default_data_dir
from dopplerkit.fitting import fit_jet_pair
from dopplerkit.io import read_spectrum
from dopplerkit.measure import measure_lines

warnings.simplefilter("ignore")
spectrum = read_spectrum(default_data_dir() / "binary_dkx1" / "fits" / "dkx1_005.fits")
t = measure_lines(spectrum, ["H-alpha", "He I 5876"], components=2, tie=True, method="fast")
print(t["line", "component", "z", "z_err", "status"])
t.plot(fig=plt.figure(figsize=(8, 4.6), layout="constrained"))  # the library draws into the figure it is given
plt.show()

# %%
# The fit of the pair: the whole speed-angle plane, a close view, and the residuals.
fit = fit_jet_pair(t["z"][0], t["z"][2], t["z_err"][0], t["z_err"][2])
print(fit.fit_report())
fit.plot(fig=plt.figure(figsize=(8, 4.6), layout="constrained"))  # the library draws into the figure it is given
plt.show()
