"""
Doppler factor and redshift against viewing angle
=================================================

How the Doppler factor and the redshift of a jet change with the viewing angle for a few speeds,
and where the transverse Doppler effect leaves a redshift at 90 degrees.
"""

import matplotlib.pyplot as plt
import numpy as np

import dopplerkit as dk

theta = np.linspace(0.0, 180.0, 361)
fig = plt.figure(figsize=(8, 3.4), layout="constrained")
ax1, ax2 = fig.subplots(1, 2)
for beta in (0.1, 0.26, 0.5, 0.9):
    ax1.semilogy(theta, dk.doppler_factor(beta, theta), label=f"beta = {beta}")
    ax2.plot(theta, dk.redshift(beta, theta), label=f"beta = {beta}")
ax1.set_xlabel("viewing angle (deg; 0 = towards us)")
ax1.set_ylabel("Doppler factor delta")
ax2.axvline(90, color="0.6", lw=0.8, ls=":")
ax2.set_xlabel("viewing angle (deg; 0 = towards us)")
ax2.set_ylabel("redshift z")
ax2.legend(fontsize=8, frameon=False)
plt.show()
