"""Figures: the population in the beta-viewing angle plane, constraint bands, spectra.

Every function takes keyword-only options, draws onto ``ax=``/``fig=`` when given, and
returns the Figure. matplotlib is imported here only.
"""

from __future__ import annotations

import numpy as np

__all__ = ["PALETTE", "plot_constraint_plane", "plot_kinematic_fit", "plot_line_fit", "plot_population", "plot_precession_fit"]

#: chi-square above the minimum that bounds the joint 68.3% and 95.4% regions of two parameters
#: (Press et al. 2007, Numerical Recipes 3rd ed., sec. 15.6.5, table of delta chi-square; from memory)
DELTA_CHI2_2D = (2.30, 6.18)

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


def plot_constraint_plane(bands, *, solution=None, fig=None, ax=None, n_theta=361, speed_axis: str = "beta", theta_max: float = 180.0):
    """Draw measurement bands in the beta-viewing angle plane.

    Parameters
    ----------
    bands : list of dict
        Each ``{"label": str, "chi2": callable(beta_grid, theta_grid_deg) -> chi-square}``;
        the band is chi-square <= 1 (1 sigma) shaded, <= 4 outlined; a constraint narrower than the
        grid is marked at its best grid point.
    solution : KinematicFit, optional
        Marked with its error bars.
    speed_axis : {"beta", "gamma"}
        The vertical axis: beta from 0 to 1, or the Lorentz factor from 1 to 100 on a log scale
        (for jets of active galaxies, where every band crowds under beta = 1).
    theta_max : float
        Largest viewing angle shown (deg).
    """
    from matplotlib.figure import Figure

    if speed_axis not in ("beta", "gamma"):
        raise ValueError(f"speed_axis must be 'beta' or 'gamma', got {speed_axis!r}")
    if ax is None:
        fig = fig or Figure(figsize=(5.5, 4.2), layout="constrained")
        ax = fig.subplots()
    else:
        fig = ax.figure
    th = np.linspace(0, theta_max, n_theta)
    if speed_axis == "gamma":
        gam = np.geomspace(1.0001, 100.0, 400)
        be = np.sqrt((gam - 1) * (gam + 1)) / gam
    else:
        be = np.linspace(0.0, 0.999, 400)
    T, B = np.meshgrid(th, be)
    Y = np.meshgrid(th, gam)[1] if speed_axis == "gamma" else B  # what the vertical axis shows
    colours = [PALETTE["approaching"], PALETTE["receding"], PALETTE["highlight"], PALETTE["band"], PALETTE["neutral"]]
    for k, band in enumerate(bands):
        c2 = band["chi2"](B, T)
        col = colours[k % len(colours)]
        # bands above the solution's marker (zorder), so a narrow band is never hidden under it
        inside = int(np.sum(c2 <= 1))
        if inside:
            ax.contourf(T, Y, c2, levels=[-1, 1], colors=[col], alpha=0.35, zorder=3)
            ax.contour(T, Y, c2, levels=[4], colors=[col], linewidths=0.8, zorder=3)
        if inside < 20:  # (nearly) narrower than the grid, e.g. an exactly determined pair: mark its best point too
            i = np.unravel_index(np.nanargmin(c2), c2.shape)
            ax.plot(T[i], Y[i], "D", ms=7, mew=1.5, mfc="none", mec=col, zorder=4)
        ax.plot([], [], color=col, lw=6, alpha=0.5, label=band.get("label", f"measurement {k + 1}"))
    if solution is not None:
        from ._format import with_error

        r = solution.result
        tension = f"chi2 {r.chisqr:.3g} for {r.nfree} dof" + (f", p = {solution.p_value:.2g}" if r.nfree > 0 else " (exactly determined)")
        speed = (
            f"beta {with_error(solution.beta, solution.beta_err)}"
            if speed_axis == "beta"
            else f"Gamma {with_error(solution.value('gamma'), solution.error('gamma'))}"
        )
        label = f"joint: {speed},\nangle {with_error(solution.value('viewing_angle'), solution.error('viewing_angle'))} deg; {tension}"
        ax.errorbar(
            solution.value("viewing_angle"),
            solution.beta if speed_axis == "beta" else solution.value("gamma"),
            xerr=solution.error("viewing_angle"),
            yerr=solution.beta_err if speed_axis == "beta" else solution.error("gamma"),
            fmt="o",
            ms=9,
            mfc="none",
            mec="k",
            color="k",
            zorder=2,
            label=label,
        )
    ax.set_xlabel("viewing angle (deg, 0 = towards us)")
    ax.set_xlim(0, theta_max)
    if speed_axis == "gamma":
        ax.set_yscale("log")
        ax.set_ylabel(r"Lorentz factor $\Gamma$")
        ax.set_ylim(1, 100)
    else:
        ax.set_ylabel(r"speed $\beta = v/c$")
        ax.set_ylim(0, 1)
    if bands or solution is not None:  # above the plane, never over a band
        ax.legend(frameon=False, fontsize=7, loc="lower left", bbox_to_anchor=(0.0, 1.0), borderaxespad=0.3)
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


def plot_kinematic_fit(fit, *, fig=None, path=None, n_grid: int = 121):
    """A kinematic fit drawn: where it lies in the speed-angle plane, a close view, and its residuals.

    Left: the whole plane (speed 0-1, viewing angle 0-180 deg) with the joint 68.3% and 95.4%
    regions (chi-square within 2.30 and 6.18 of the minimum, two parameters). Middle: the same
    around the best fit (+-5 sigma), where the regions are visible however small. Right: each
    measurement's residual (data - model) / error at the best fit. A precessing-jet fit is drawn
    by :func:`plot_precession_fit` instead (redshift curves against time).

    Parameters
    ----------
    fit : KinematicFit
        From :func:`~dopplerkit.fitting.fit_jet_pair`, :func:`~dopplerkit.fitting.fit_constraints`
        or :func:`~dopplerkit.fitting.fit_precessing_jet`.
    fig : matplotlib Figure, optional
        Drawn into (cleared); a new one otherwise.
    path : str, optional
        Also written there (format from the extension).
    n_grid : int
        Grid points per axis of the whole-plane view.

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Viewing angle in the observer's frame, 0 deg = the approaching jet moving straight at us.
    With proper motions the distance is held at its best value on the grids (a conditional,
    not a profiled, chi-square: the regions are a little too small when the distance matters).
    """
    from matplotlib.figure import Figure

    from ._format import with_error

    if "t" in fit.data:
        return plot_precession_fit(fit, fig=fig, path=path)
    if fit._residual is None or "viewing_angle" not in fit.params:
        raise ValueError("plot_kinematic_fit needs a fit from fit_jet_pair, fit_constraints or fit_precessing_jet")
    p = fit.params.copy()

    def residuals(b, th):
        """Every residual on a grid: shape (number of residuals, *grid shape)."""
        out = None
        for i, (bb, tt) in enumerate(zip(np.ravel(b), np.ravel(th), strict=True)):
            p["eta"].set(value=float(np.arctanh(bb)))
            p["viewing_angle"].set(value=float(tt))
            r = np.asarray(fit._residual(p), float)
            if out is None:
                out = np.empty((r.size, np.size(b)))
            out[:, i] = r
        return out.reshape((-1, *np.shape(b)))

    def chi2(b, th):
        return np.sum(residuals(b, th) ** 2, axis=0)

    b0, t0 = fit.beta, float(fit.value("viewing_angle"))
    be, te = fit.beta_err, fit.error("viewing_angle")
    c0 = float(fit.result.chisqr)
    # fast jets (active galaxies) crowd under beta = 1: their planes show the Lorentz factor on a log axis
    use_gamma = b0 > 0.9
    g0, ge = float(fit.value("gamma")), fit.error("gamma")

    def speed(y):  # the vertical axis -> beta
        return np.sqrt((y - 1.0) * (y + 1.0)) / y if use_gamma else y

    fig = fig or Figure(figsize=(10.0, 3.9), layout="constrained")
    fig.clear()
    ax, axz, axr = fig.subplots(1, 3, width_ratios=[1.15, 1.0, 1.0])
    levels = [c0 + d for d in DELTA_CHI2_2D]
    col = PALETTE["approaching"]
    # whole plane
    t_hi = min(180.0, max(45.0, 3.0 * t0)) if use_gamma else 180.0
    ys = np.geomspace(1.0001, 100.0, n_grid) if use_gamma else np.linspace(0.0, 0.995, n_grid)
    T, B = np.meshgrid(np.linspace(0.0, t_hi, n_grid), ys)
    R = residuals(speed(B), T)
    labels = list(fit.data.get("labels", [])) or [f"measurement {i + 1}" for i in range(R.shape[0])]
    # each measurement alone: where it is met within 1 sigma (priors and the distance are not drawn)
    colours = [PALETTE["receding"], PALETTE["highlight"], PALETTE["neutral"], PALETTE["band"], "#7a5195", "#2f8f5b"]
    drawn = 0
    for rk, name in zip(R, labels, strict=False):
        if name.startswith(("prior", "distance")) or not (np.nanmin(rk) < 0 < np.nanmax(rk)):
            continue
        c = colours[drawn % len(colours)]
        ax.contourf(T, B, np.abs(rk), levels=[0, 1], colors=[c], alpha=0.3)  # the band, where the grid resolves it
        ax.contour(T, B, rk, levels=[0], colors=[c], linewidths=1.0)  # where it is met exactly: visible however narrow
        ax.plot([], [], color=c, lw=1.5, label=name)
        drawn += 1
        if drawn == 6:
            break
    C = np.sum(R**2, axis=0)
    ax.contourf(T, B, C, levels=[-np.inf, levels[0]], colors=[col], alpha=0.8)
    ax.plot(t0, g0 if use_gamma else b0, "+", ms=10, mew=1.5, color="k", label="joint best fit")
    ax.legend(fontsize=6.5, frameon=True, framealpha=0.85, loc="upper right")
    ax.set_xlim(0, t_hi)
    ax.set_xlabel("viewing angle (deg; 0 = towards us)")
    if use_gamma:
        ax.set_yscale("log")
        ax.set_ylim(1, 100)
        ax.set_ylabel(r"Lorentz factor $\Gamma$")
    else:
        ax.set_ylim(0, 1)
        ax.set_ylabel(r"speed $\beta = v/c$")
    ax.set_title("the whole plane: each measurement alone (1 sigma)", fontsize=8, loc="left")
    # close view: +-5 sigma (or a small box when the errors are not finite)
    dt = 5 * te if np.isfinite(te) and te > 0 else 2.0
    tl, th = max(t0 - dt, 0.0), min(t0 + dt, 180.0)
    if use_gamma:
        dg = 5 * ge if np.isfinite(ge) and ge > 0 else 0.2 * g0
        yl, yh, y0, ye = max(g0 - dg, 1.0001), g0 + dg, g0, ge
    else:
        db = 5 * be if np.isfinite(be) and be > 0 else 0.02
        yl, yh, y0, ye = max(b0 - db, 0.0), min(b0 + db, 0.9999999), b0, be
    Tz, Bz = np.meshgrid(np.linspace(tl, th, 61), np.linspace(yl, yh, 61))
    Cz = chi2(speed(Bz), Tz)
    axz.contourf(Tz, Bz, Cz, levels=[-np.inf, levels[0], levels[1]], colors=[col, PALETTE["band"]], alpha=0.55)
    axz.contour(Tz, Bz, Cz, levels=levels, colors=["k", "0.4"], linewidths=0.7)
    axz.errorbar(t0, y0, xerr=te, yerr=ye, fmt="o", ms=4, color="k", label="best fit +- 1 sigma (each alone)")
    axz.plot([], [], color=col, lw=6, alpha=0.55, label="joint 68.3%")
    axz.plot([], [], color=PALETTE["band"], lw=6, alpha=0.55, label="joint 95.4%")
    axz.set_xlabel("viewing angle (deg)")
    axz.set_ylabel(r"Lorentz factor $\Gamma$" if use_gamma else r"speed $\beta$")
    axz.ticklabel_format(useOffset=True, style="plain")
    axz.legend(fontsize=6.5, frameon=True, framealpha=0.85, loc="lower left", bbox_to_anchor=(0.0, 1.0), borderaxespad=0.2)
    # residuals
    p2 = fit.params.copy()
    res = np.asarray(fit._residual(p2), float)
    y = np.arange(res.size)[::-1]
    axr.axvspan(-1, 1, color="0.9")
    axr.axvline(0, color="0.6", lw=0.6)
    axr.plot(res, y, "o", color=PALETTE["receding"])
    axr.set_yticks(y, labels[: res.size], fontsize=7)
    lim = max(3.0, float(np.nanmax(np.abs(res))) * 1.2 if res.size else 3.0)
    axr.set_xlim(-lim, lim)
    axr.set_ylim(-0.7, res.size - 0.3)
    axr.set_xlabel("residual (data - model) / error")
    r = fit.result
    stat = f"chi2 {r.chisqr:.3g} for {r.nfree} dof" + (f", p = {fit.p_value:.2g}" if r.nfree > 0 else " (exactly determined)")
    fig.suptitle(
        f"{fit.model}: {f'Gamma {with_error(g0, ge)}' if use_gamma else f'beta {with_error(b0, be)}'}, viewing angle {with_error(t0, te)} deg; {stat}",
        fontsize=9,
    )
    if path:
        fig.savefig(path, dpi=150)
    return fig
