"""Figures: the population in the beta-viewing angle plane, constraint bands, spectra.

Every function takes keyword-only options, draws onto ``ax=``/``fig=`` when given, and
returns the Figure. matplotlib is imported here only.
"""

from __future__ import annotations

import numpy as np

__all__ = ["PALETTE", "plot_constraint_plane", "plot_line_fit", "plot_population", "plot_precession_fit"]

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
        # bands above the solution's marker (zorder), so a narrow band is never hidden under it
        inside = int(np.sum(c2 <= 1))
        if inside:
            ax.contourf(T, B, c2, levels=[-1, 1], colors=[col], alpha=0.35, zorder=3)
            ax.contour(T, B, c2, levels=[4], colors=[col], linewidths=0.8, zorder=3)
        if inside < 20:  # (nearly) narrower than the grid, e.g. an exactly determined pair: mark its best point too
            i = np.unravel_index(np.nanargmin(c2), c2.shape)
            ax.plot(T[i], B[i], "D", ms=7, mew=1.5, mfc="none", mec=col, zorder=4)
        ax.plot([], [], color=col, lw=6, alpha=0.5, label=band.get("label", f"measurement {k + 1}"))
    if solution is not None:
        from ._format import with_error

        r = solution.result
        tension = f"chi2 {r.chisqr:.3g} for {r.nfree} dof" + (f", p = {solution.p_value:.2g}" if r.nfree > 0 else " (exactly determined)")
        label = (
            f"joint: beta {with_error(solution.beta, solution.beta_err)},\n"
            f"angle {with_error(solution.value('viewing_angle'), solution.error('viewing_angle'))} deg; {tension}"
        )
        ax.errorbar(
            solution.value("viewing_angle"),
            solution.beta,
            xerr=solution.error("viewing_angle"),
            yerr=solution.beta_err,
            fmt="o",
            ms=9,
            mfc="none",
            mec="k",
            color="k",
            zorder=2,
            label=label,
        )
    ax.set_xlabel("viewing angle (deg, 0 = towards us)")
    ax.set_ylabel(r"$\beta = v/c$")
    ax.set_xlim(0, 180)
    ax.set_ylim(0, 1)
    if bands or solution is not None:
        ax.legend(frameon=True, framealpha=0.85, fontsize=7, loc="best")
    return fig


def plot_precession_fit(fit, *, fig=None, path=None, time_label=None):
    """A precessing-jet fit drawn: both lines' redshifts with the model curves, and the residuals.

    Parameters
    ----------
    fit : KinematicFit
        From :func:`dopplerkit.fitting.fit_precessing_jet`.
    fig : matplotlib Figure, optional
        Drawn into (cleared); a new one otherwise.
    path : str, optional
        Also written there (format from the extension).
    time_label : str, optional
        Axis label for the times; "time (MJD)" for modified Julian dates, else "time (d)".

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure

    from .models import precessing_jet_redshifts

    d = fit.data
    if "t" not in d:
        raise ValueError("plot_precession_fit needs a fit from fit_precessing_jet (its data carry the times)")
    t, z1, z2, e1, e2 = (np.asarray(d[k], float) for k in ("t", "z_1", "z_2", "z_err", "z_2_err"))
    fig = fig or Figure(figsize=(8.0, 5.0), layout="constrained")
    fig.clear()
    ax, axr = fig.subplots(2, 1, height_ratios=[3, 1], sharex=True)
    v = {k: fit.value(k) for k in ("beta", "inclination", "cone_angle", "period", "t0")}
    zs = fit.value("z_systemic") if "z_systemic" in fit.params else 0.0

    def model(tt):
        m1, m2 = precessing_jet_redshifts(tt, v["beta"], v["inclination"], v["cone_angle"], v["period"], v["t0"])
        return (1 + zs) * (1 + m1) - 1, (1 + zs) * (1 + m2) - 1

    tt = np.linspace(t.min(), t.max(), 1500)
    c1, c2 = model(tt)
    ax.errorbar(t, z1, yerr=e1, fmt="o", ms=3, color=PALETTE["approaching"], label="jet 1 (measured)")
    ax.errorbar(t, z2, yerr=e2, fmt="o", ms=3, color=PALETTE["receding"], label="jet 2 (measured)")
    ax.plot(tt, c1, color=PALETTE["approaching"], lw=1, label="jet 1 (model)")
    ax.plot(tt, c2, color=PALETTE["receding"], lw=1, label="jet 2 (model)")
    ax.axhline(0, color="0.8", lw=0.6)
    ax.set_ylabel("redshift z")
    ax.tick_params(labelbottom=True)
    ax.legend(fontsize=7, frameon=False, loc="lower left", bbox_to_anchor=(0.0, 1.0), ncols=4)
    m1, m2 = model(t)
    swapped = (m1 - z2) ** 2 + (m2 - z1) ** 2 < (m1 - z1) ** 2 + (m2 - z2) ** 2
    r1 = np.where(swapped, z1 - m2, z1 - m1)
    r2 = np.where(swapped, z2 - m1, z2 - m2)
    axr.errorbar(t, r1 / e1, fmt="o", ms=2.5, color=PALETTE["approaching"])
    axr.errorbar(t, r2 / e2, fmt="o", ms=2.5, color=PALETTE["receding"])
    axr.axhline(0, color="0.6", lw=0.6)
    axr.set_ylabel("residual / error")
    axr.set_xlabel(time_label or ("time (MJD)" if float(np.nanmin(t)) > 30000 else "time (d)"))
    if path:
        fig.savefig(path, dpi=150)
    return fig


def plot_line_fit(spectrum, table, *, fig=None, path=None, pad_kms: float = 4000.0):
    """A ``measure_lines`` result drawn over its spectrum: data, fitted lines, residuals.

    The model shown is rebuilt from the table (each component a Gaussian of the fitted centre,
    FWHM and flux) on a local cubic continuum fitted to the data around the lines: the picture of
    the fit, not a refit of it.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        The spectrum that was measured (with its uncertainty).
    table : astropy QTable
        Its :func:`dopplerkit.measure.measure_lines` table.
    fig, path
        As in :func:`plot_precession_fit`.
    pad_kms : float
        Shown range beyond the outermost components, in km/s.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure

    from .kinematics import SPEED_OF_LIGHT_KMS as c_kms

    x = np.asarray(spectrum.spectral_axis.value, float)
    y = np.asarray(spectrum.flux.value, float)
    from .measure import spectrum_sigma

    sig = spectrum_sigma(spectrum)  # any uncertainty type (standard deviation, variance, inverse variance)
    sig = np.ones_like(y) if sig is None else np.asarray(sig, float)
    mu = np.asarray([getattr(v, "value", v) for v in table["centre"]], float)
    fw = np.asarray([getattr(v, "value", v) for v in table["fwhm"]], float) * np.abs(mu) / c_kms
    area = np.asarray([getattr(v, "value", v) for v in table["flux"]], float)
    lo, hi = np.nanmin(mu) * (1 - pad_kms / c_kms), np.nanmax(mu) * (1 + pad_kms / c_kms)
    m = (x >= min(lo, hi)) & (x <= max(lo, hi)) & np.isfinite(y) & np.isfinite(sig) & (sig > 0)
    xs, ys, ss = x[m], y[m], sig[m]
    g = np.zeros_like(xs)
    comps = []
    for c, w, a in zip(mu, fw, area, strict=True):
        s_ = w / 2.3548200450309493
        prof = a * np.exp(-0.5 * ((xs - c) / s_) ** 2) / (s_ * np.sqrt(2 * np.pi))
        comps.append(prof)
        g += prof
    tx = (xs - xs.mean()) / (np.ptp(xs) / 2 or 1.0)
    A = np.vander(tx, 4) / ss[:, None]
    coef = np.linalg.lstsq(A, (ys - g) / ss, rcond=None)[0]
    cont = np.vander(tx, 4) @ coef
    fig = fig or Figure(figsize=(8.0, 4.6), layout="constrained")
    fig.clear()
    ax, axr = fig.subplots(2, 1, height_ratios=[3, 1], sharex=True)
    ax.plot(xs, ys, color=PALETTE["neutral"], lw=0.8, label="data")
    ax.plot(xs, cont + g, color="k", lw=1.2, label="fitted lines + local continuum")
    for prof, (line, comp, st) in zip(comps, zip(table["line"], table["component"], table["status"], strict=True), strict=True):
        colour = PALETTE["receding"] if str(comp) == "receding" else PALETTE["approaching"]
        ax.plot(xs, cont + prof, color=colour, lw=0.9, ls="-" if st == "ok" else ":", label=f"{line} {comp} ({st})")
    unit = spectrum.spectral_axis.unit
    funit = spectrum.flux.unit
    ax.set_ylabel(f"flux density\n({funit.to_string()})" if funit.to_string() else "flux density")
    ax.tick_params(labelbottom=True)
    ax.legend(fontsize=7, frameon=False, loc="lower left", bbox_to_anchor=(0.1, 1.0), ncols=2)  # clear of the offset text
    axr.plot(xs, (ys - cont - g) / ss, ".", ms=2, color=PALETTE["neutral"])
    axr.axhline(0, color="0.6", lw=0.6)
    axr.set_ylabel("residual / error")
    kind = "wavelength" if unit.physical_type == "length" else ("energy" if unit.physical_type == "energy" else "frequency")
    axr.set_xlabel(f"{kind} ({unit.to_string()})")
    if path:
        fig.savefig(path, dpi=150)
    return fig
