"""Figures: the population in the beta-viewing angle plane, constraint bands, spectra.

Every function takes keyword-only options, draws onto ``ax=``/``fig=`` when given, and
returns the Figure. matplotlib is imported here only.
"""

from __future__ import annotations

import numpy as np

__all__ = ["PALETTE", "plot_constraint_plane", "plot_population"]

#: dopplerkit's own colours: approaching (blue-shifted) and receding (red-shifted) jets, neutral, highlight.
PALETTE = {"approaching": "#2b6f9e", "receding": "#b5473a", "neutral": "#4d4d4d", "highlight": "#d9a21b", "band": "#8fb8a8"}


def plot_population(table, *, path=None, fig=None, truth=None):
    """Beta against viewing angle with error bars, and histograms of both, from a batch result table.

    Parameters
    ----------
    table : astropy Table
        Output of ``dopplerkit batch`` (columns beta, beta_err, viewing_angle, viewing_angle_err, status).
    path : str, optional
        Write the figure there (PNG by extension).
    truth : Table, optional
        With columns beta and viewing_angle, drawn as open markers for comparison.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure

    fig = fig or Figure(figsize=(9, 4.2), layout="constrained")
    status = np.asarray(table["status"])
    ok = status == "ok"
    sus = status == "suspect"
    n_err = int(np.sum(status == "error"))

    def col(name, mask):
        return np.asarray(table[name], float)[mask] if name in table.colnames else np.full(int(mask.sum()), np.nan)

    b, be, th, te = (col(n, ok) for n in ("beta", "beta_err", "viewing_angle", "viewing_angle_err"))
    ax, axb, axt = fig.subplots(1, 3, width_ratios=[2.2, 1, 1])
    ax.errorbar(
        th, b, xerr=te, yerr=be, fmt="o", ms=3, color=PALETTE["approaching"], ecolor="0.7", elinewidth=0.8, label=f"ok ({ok.sum()})"
    )
    if sus.any():
        ax.plot(col("viewing_angle", sus), col("beta", sus), "x", ms=4, color="0.45", label=f"suspect ({sus.sum()})")
    if truth is not None:
        ax.plot(
            np.asarray(truth["viewing_angle"], float),
            np.asarray(truth["beta"], float),
            "o",
            mfc="none",
            mec=PALETTE["receding"],
            ms=4,
            label="true (demo)",
        )
    ax.set_xlabel("viewing angle (deg, 0 = towards us)")
    ax.set_ylabel(r"speed $\beta = v/c$")
    ax.set_xlim(0, 90 if np.nanmax(np.concatenate([th, col("viewing_angle", sus)]), initial=0) <= 90 else 180)
    ax.legend(frameon=False, fontsize=8, loc="lower left", bbox_to_anchor=(0.0, 1.0), ncol=3, borderaxespad=0.2)
    fig.suptitle(f"{ok.sum()} ok, {sus.sum()} suspect (not in the histograms), {n_err} failed", fontsize=9)
    axb.hist(b[np.isfinite(b)], bins=20, color=PALETTE["band"])
    axb.set_xlabel(r"speed $\beta$")
    axb.set_ylabel("number of ok sources")
    axt.hist(th[np.isfinite(th)], bins=20, color=PALETTE["band"])
    axt.set_xlabel("viewing angle (deg)")
    axt.set_ylabel("number of ok sources")
    if path is not None:
        fig.savefig(path, dpi=110)
    return fig


def plot_constraint_plane(bands, *, solution=None, fig=None, ax=None, n_theta=361):
    """Draw measurement bands in the beta-viewing angle plane.

    Parameters
    ----------
    bands : list of dict
        Each ``{"label": str, "chi2": callable(beta_grid, theta_grid_deg) -> chi-square}``;
        the band is chi-square <= 1 (1 sigma) shaded, <= 4 outlined; a constraint narrower than the
        grid is marked at its best grid point.
    solution : KinematicFit, optional
        Marked with its error bars.
    """
    from matplotlib.figure import Figure

    if ax is None:
        fig = fig or Figure(figsize=(5.5, 4.2), layout="constrained")
        ax = fig.subplots()
    else:
        fig = ax.figure
    th = np.linspace(0, 180, n_theta)
    be = np.linspace(0.0, 0.999, 400)
    T, B = np.meshgrid(th, be)
    colours = [PALETTE["approaching"], PALETTE["receding"], PALETTE["highlight"], PALETTE["band"], PALETTE["neutral"]]
    for k, band in enumerate(bands):
        c2 = band["chi2"](B, T)
        col = colours[k % len(colours)]
        if np.nanmin(c2) <= 1:
            ax.contourf(T, B, c2, levels=[-1, 1], colors=[col], alpha=0.35)
            ax.contour(T, B, c2, levels=[4], colors=[col], linewidths=0.8)
        else:  # narrower than the grid (an exactly determined pair): mark its best point instead
            i = np.unravel_index(np.nanargmin(c2), c2.shape)
            ax.plot(T[i], B[i], "D", ms=6, mfc="none", mec=col)
        ax.plot([], [], color=col, lw=6, alpha=0.5, label=band.get("label", f"measurement {k + 1}"))
    if solution is not None:
        ax.errorbar(
            solution.value("viewing_angle"),
            solution.beta,
            xerr=solution.error("viewing_angle"),
            yerr=solution.beta_err,
            fmt="*",
            ms=10,
            color="k",
            label="joint solution",
        )
    ax.set_xlabel("viewing angle (deg, 0 = towards us)")
    ax.set_ylabel(r"$\beta = v/c$")
    ax.set_xlim(0, 180)
    ax.set_ylim(0, 1)
    if bands or solution is not None:
        ax.legend(frameon=False, fontsize=8, loc="upper right")
    return fig
