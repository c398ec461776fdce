"""
An outflow speed, relativistic and linear
=========================================

The invented quasar DKQ-7 (host z = 0.871) shows Fe XXVI Ly-alpha absorption at 5.10 keV: the
speed along the line of sight, with its error, beside the linear reading c|z|.
"""

import matplotlib.pyplot as plt

import dopplerkit as dk
from dopplerkit.widgets import OutflowState

state = OutflowState(line="Fe XXVI Ly-alpha", observed=5.10, observed_err=0.02, unit="keV", z_host=0.871)
print(state.sentence())

r = state.reading()
theta, branches = dk.redshift_locus(r["z"], num=361)
fig = plt.figure(figsize=(6, 3.4), layout="constrained")
ax = fig.subplots()
for b in branches:
    ax.plot(theta, b, color="#2b6f9e")
ax.axhline(abs(r["linear"]), color="#b5473a", ls="--", label="linear reading c|z|")
ax.set_xlabel("viewing angle (deg; 0 = moving straight at us)")
ax.set_ylabel("speed beta = v/c")
ax.legend(frameon=False)
plt.show()
