"""Kinematic fits of bulk speed and viewing angle with lmfit, with honest uncertainties.

Speeds are fitted as the rapidity ``eta`` (beta = tanh(eta), Gamma = cosh(eta)), bounded
below by 0 only, so beta < 1 is natural and uncertainties near c stay sane; ``beta`` and
``gamma`` are derived parameters (lmfit expressions, their errors propagated). Angles are in
degrees. Uncertainties are absolute (``scale_covar=False``): the measurement errors are
trusted, and an exactly determined fit (two redshifts, two parameters) keeps its errors.

Every fit returns a :class:`KinematicFit`: ``.params`` (lmfit Parameters with ``.value`` and
``.stderr``), ``.result`` (the lmfit MinimizerResult), ``.notes`` (what needs care: a bound,
a degeneracy, label swaps), a printable report and an HTML view for notebooks.

Models (conventions of :mod:`dopplerkit.kinematics`; theta = 0 is straight at us):

* jet pair: 1 + z_a = Gamma (1 - beta cos theta), 1 + z_r = Gamma (1 + beta cos theta);
* precessing jets: :func:`dopplerkit.models.precessing_jet_redshifts`;
* Galilean readings for comparison: z = -/+ beta cos theta, no transverse term.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import astropy.units as u
import numpy as np

from ._format import with_error
from .exceptions import DegenerateGeometryWarning, FitAtBoundWarning, FitQualityWarning
from .kinematics import SPEED_OF_LIGHT_KMS, _counterjet_ratio, _dimensionless, _proper_motion_rates, solve_jet_pair

__all__ = [
    "KinematicFit",
    "KinematicFits",
    "ModelComparison",
    "compare_models",
    "fit_constraints",
    "fit_jet_pair",
    "fit_precessing_jet",
    "fits_table",
]

_DEG = np.pi / 180.0
_KPC_KM = (1 * u.kpc).to_value(u.km)


def _add_speed(params, beta0):
    b = float(np.clip(beta0, 1e-4, 1 - 1e-9))
    params.add("eta", value=float(np.arctanh(b)), min=0.0)
    params.add("beta", expr="tanh(eta)")
    params.add("gamma", expr="cosh(eta)")


# ---------------------------------------------------------------------------
# Result objects
# ---------------------------------------------------------------------------
@dataclass
class KinematicFit:
    """Result of a kinematic fit.

    Attributes
    ----------
    params : lmfit.Parameters
        Best-fit values and ``stderr``; ``beta`` and ``gamma`` derived from the rapidity ``eta``;
        angles in degrees.
    result : lmfit.minimizer.MinimizerResult
        The full lmfit result (``chisqr``, ``nfree``, ``aic``, ``bic``, covariance, ...).
    model : str
        "jet-pair", "precessing-jet" or "constraints"; with " (Galilean)" for the
        non-relativistic reading.
    notes : list of str
        What needs care: parameters at a bound, degeneracies, swapped jet labels.
    data : dict
        The data the fit used (redshifts, errors, epochs), for plots and checks.
    posterior : dict or None
        Filled by :meth:`sample`.
    """

    params: object
    result: object
    model: str
    notes: list = field(default_factory=list)
    data: dict = field(default_factory=dict)
    _residual: object = None
    posterior: dict | None = None

    @property
    def beta(self) -> float:
        """Bulk speed v/c (derived from the fitted rapidity eta = artanh(beta))."""
        return float(self.params["beta"].value)

    @property
    def beta_err(self) -> float:
        """1-sigma uncertainty of beta (NaN when the fit gives none)."""
        e = self.params["beta"].stderr
        return float("nan") if e is None else float(e)

    @property
    def viewing_angle(self) -> u.Quantity:
        """Observer-frame viewing angle of the approaching jet (deg; 0 = straight at us).

        A precessing-jet fit has none (it changes with phase): it has :attr:`inclination` and
        :attr:`cone_angle` instead, and this raises AttributeError saying so.
        """
        if "viewing_angle" not in self.params:
            raise AttributeError(
                f"a {self.model} fit has no single viewing angle (it changes with the precession phase): "
                "use .inclination (of the precession axis) and .cone_angle"
            )
        return self.params["viewing_angle"].value * u.deg

    def _angle_param(self, name):
        if name not in self.params:
            raise AttributeError(f"a {self.model} fit has no {name} (only precessing-jet fits have): use .viewing_angle")
        return self.params[name].value * u.deg

    @property
    def inclination(self) -> u.Quantity:
        """Precessing-jet fits: inclination of the precession axis to the line of sight (deg, 0 = along it)."""
        return self._angle_param("inclination")

    @property
    def cone_angle(self) -> u.Quantity:
        """Precessing-jet fits: half-opening angle of the precession cone (deg)."""
        return self._angle_param("cone_angle")

    @property
    def chi2(self) -> float:
        """Chi-square of the fit (lmfit's ``result.chisqr``)."""
        return float(self.result.chisqr)

    @property
    def dof(self) -> int:
        """Degrees of freedom: data minus free parameters."""
        return int(self.result.nfree)

    @property
    def p_value(self) -> float:
        """Chi-square probability of the fit for its degrees of freedom (NaN for an exactly determined fit)."""
        return _p_value(self.result)

    def value(self, name):
        """Best-fit value of a parameter by name (angles in deg, period and t0 in days)."""
        return self.params[name].value

    def error(self, name):
        """1-sigma uncertainty of a parameter by name (NaN when the fit gives none)."""
        e = self.params[name].stderr
        return float("nan") if e is None else float(e)

    def correlations(self, min_correl: float = 0.0) -> dict:
        """Correlation coefficients of the free parameters, {(name_1, name_2): r} with abs(r) >= ``min_correl``.

        The speed is fitted as the rapidity ``eta``; beta = tanh(eta) is monotonic in it, so
        (to first order) its correlations are those of ``eta``: they are listed under ``beta``.
        """
        out = {}
        names = [n for n, p in self.params.items() if p.vary]
        for i, a in enumerate(names):
            cor = self.params[a].correl or {}
            for b in names[i + 1 :]:
                r = cor.get(b)
                if r is not None and np.isfinite(r) and abs(r) >= min_correl:
                    out[("beta" if a == "eta" else a, "beta" if b == "eta" else b)] = float(r)
        return out

    def fit_report(self, min_correl: float = 0.1) -> str:
        """The report (:meth:`report`) with the correlations of the free parameters (abs(r) >= ``min_correl``)."""
        return self.report(min_correl=min_correl)

    def report(self, min_correl: float = 0.1) -> str:
        """A readable report: parameters with uncertainties, correlations, fit statistics and notes."""
        lines = [f"dopplerkit {self.model} fit", "-" * 40]
        for name, p in self.params.items():
            if name == "eta":
                continue
            unit = " deg" if name in ("viewing_angle", "inclination", "cone_angle") else (" d" if name in ("period", "t0") else "")
            tag = " (derived)" if p.expr else ("" if p.vary else " (fixed)")
            shown = f"{p.value:.6g}" if not p.vary and not p.expr else with_error(p.value, p.stderr)
            lines.append(f"  {name:<15} {shown}{unit}{tag}")
        r = self.result
        lines.append(f"  chi-square {r.chisqr:.4g} for {r.ndata} data, {r.nvarys} free parameters (dof {r.nfree})")
        if r.nfree > 0:
            lines.append(
                f"  reduced chi-square {r.redchi:.4g}; chi-square probability {self.p_value:.3g}; AIC {r.aic:.4g}; BIC {r.bic:.4g}"
            )
        else:
            lines.append("  exactly determined (no degrees of freedom): the fit cannot test the model")
        cor = self.correlations(min_correl)
        if cor:
            lines.append(f"  correlations (|r| >= {min_correl:g}):")
            for (a, b), r in sorted(cor.items(), key=lambda kv: -abs(kv[1])):
                lines.append(f"    {a} - {b}: {r:+.3f}")
        if self.posterior:
            lines.append("  posterior (emcee): median [16th, 84th percentile]")
            for k, v in self.posterior["summary"].items():
                lines.append(f"    {k:<13} {v[1]:.6g} [{v[0]:.6g}, {v[2]:.6g}]")
            lines.append(f"    autocorrelation time (steps): {self.posterior['autocorr']}")
        for n in self.notes:
            lines.append(f"  note: {n}")
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.report()

    def __repr__(self) -> str:
        angles = (
            f"viewing_angle={with_error(self.value('viewing_angle'), self.error('viewing_angle'), '+/-')} deg"
            if "viewing_angle" in self.params
            else f"inclination={self.value('inclination'):.4g} deg, cone_angle={self.value('cone_angle'):.4g} deg"
        )
        notes = f", {len(self.notes)} note{'s' if len(self.notes) != 1 else ''}" if self.notes else ""
        return f"<KinematicFit {self.model}: beta={with_error(self.beta, self.beta_err, '+/-')}, {angles}, chi2={self.chi2:.4g}, dof={self.dof}{notes}>"

    def table(self):
        """The result as a one-row QTable (the columns of :meth:`KinematicFits.table`)."""
        return fits_table([self])

    def plot(self, *, fig=None, path=None):
        """Draw the fit: data, model and residuals (see :func:`dopplerkit.plotting.plot_kinematic_fit`).

        Parameters
        ----------
        fig : matplotlib Figure, optional
            Drawn into (cleared); a new one otherwise.
        path : str, optional
            Also written there (format from the extension).

        Returns
        -------
        matplotlib.figure.Figure
        """
        # the one reference to a higher layer: a result draws itself, loading the plotting
        # module only when asked (as lmfit's ModelResult.plot does)
        from .plotting import plot_kinematic_fit

        return plot_kinematic_fit(self, fig=fig, path=path)

    def _repr_html_(self) -> str:
        import html

        rows = []
        for name, p in self.params.items():
            if name == "eta":
                continue
            err = "" if p.stderr is None else f"{p.stderr:.4g}"
            rows.append(f"<tr><td>{html.escape(name)}</td><td>{p.value:.6g}</td><td>{err}</td><td>{'derived' if p.expr else ''}</td></tr>")
        notes = "".join(f"<li>{html.escape(n)}</li>" for n in self.notes)
        r = self.result
        return (
            f"<div class='dopplerkit-fit'><b>dopplerkit {html.escape(self.model)} fit</b>"
            "<table><tr><th>parameter</th><th>value</th><th>uncertainty</th><th></th></tr>" + "".join(rows) + "</table>"
            f"<p>chi-square {r.chisqr:.4g}, dof {r.nfree}, probability {self.p_value:.3g}</p>"
            + (f"<ul>{notes}</ul>" if notes else "")
            + "</div>"
        )

    def sample(
        self,
        *,
        steps: int = 2000,
        walkers: int = 50,
        burn: int = 300,
        thin: int = 1,
        seed=None,
        progress: bool = False,
        chain_path=None,
        angle_prior: str = "uniform",
    ):
        """Posterior sampling with emcee through lmfit.

        Priors: uniform in the rapidity eta = artanh(beta) (so beta < 1 is a natural bound) and,
        for the viewing angle, ``angle_prior="uniform"`` (uniform in theta within its bounds, the
        default) or ``"isotropic"`` (uniform in cos theta: jets pointing in random directions,
        p(theta) proportional to sin theta). Walkers start in a small ball around the
        least-squares solution, inside the allowed region. Stores medians and 16/50/84th
        percentiles in ``self.posterior`` (and the integrated autocorrelation time, and the
        prior used); ``chain_path`` saves the flat chain as ECSV. Returns ``self``.

        Notes
        -----
        An isotropic prior describes jets in random directions, not a flux-limited sample: Doppler
        boosting makes the sources that enter such a sample point closer to us than random
        (Vermeulen & Cohen 1994, ApJ 430, 467; Lister & Marscher 1997, ApJ 476, 572; from
        memory), so the isotropic posterior angle is biased high for them; the notes say so.
        """
        import lmfit

        from ._optional import require

        require("emcee", "KinematicFit.sample (posterior sampling)")
        require("pandas", "KinematicFit.sample (lmfit's chain table)")
        if self._residual is None:
            raise ValueError("this fit has no residual function to sample")
        params = self.params.copy()
        names = [n for n, p in params.items() if p.vary]
        rng = np.random.default_rng(seed)
        start = []
        for n in names:
            p = params[n]
            width = p.stderr if (p.stderr and np.isfinite(p.stderr) and p.stderr > 0) else max(abs(p.value) * 1e-3, 1e-4)
            lo = p.min if np.isfinite(p.min) else -np.inf
            hi = p.max if np.isfinite(p.max) else np.inf
            v = p.value + 1e-2 * width * rng.standard_normal(walkers)
            margin = 1e-9 * max(1.0, abs(p.value))
            start.append(np.clip(v, lo + margin, hi - margin))
        pos = np.array(start).T
        if angle_prior not in ("uniform", "isotropic"):
            raise ValueError(f"angle_prior must be 'uniform' or 'isotropic', got {angle_prior!r}")
        angle_name = next((n for n in ("viewing_angle", "inclination") if n in params), None)
        residual = self._residual
        if angle_prior == "isotropic":
            if angle_name is None:
                raise ValueError("angle_prior='isotropic' needs a fit with a viewing angle or an inclination")
            base = self._residual

            def residual(p):
                # ln p(theta) = ln sin theta + const enters -chi2/2 as one more residual sqrt(-2 ln sin theta) >= 0
                s_ = np.sin(np.radians(p[angle_name].value))
                extra = np.sqrt(-2.0 * np.log(s_)) if s_ > 0 else np.inf
                return np.append(base(p), extra)

            note = (
                "posterior with an isotropic prior on the angle (uniform in cos theta): right for jets in random directions; "
                "for a flux-limited sample Doppler boosting favours small angles, so this posterior angle is biased high"
            )
            if note not in self.notes:
                self.notes.append(note)
        mini = lmfit.Minimizer(residual, params, nan_policy="propagate")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # emcee's own chain-length advice; we report tau ourselves
            res = mini.emcee(
                params=params,
                steps=steps,
                nwalkers=walkers,
                burn=burn,
                thin=thin,
                pos=pos,
                is_weighted=True,
                seed=int(rng.integers(2**31)),
                progress=progress,
            )
        flat = res.flatchain.copy()
        if "eta" in flat.columns:
            flat["beta"] = np.tanh(flat["eta"])
            flat["gamma"] = np.cosh(flat["eta"])
        summary = {c: tuple(np.percentile(flat[c], [15.87, 50.0, 84.13])) for c in flat.columns if not c.startswith("__")}
        tau = getattr(res, "acor", None)
        self.posterior = {
            "summary": summary,
            "autocorr": None if tau is None else dict(zip(names, np.round(tau, 1).tolist(), strict=False)),
            "flatchain": flat,
            "result": res,
            "angle_prior": angle_prior,
        }
        if tau is not None and np.any(np.asarray(tau) * 50 > steps):
            self.notes.append(
                f"emcee chain is shorter than 50 autocorrelation times (tau up to {np.max(tau):.0f} steps): run longer before trusting the percentiles"
            )
        if chain_path is not None:
            from astropy.table import Table

            from .io import write_table

            write_table(Table.from_pandas(flat), chain_path)
        return self


def _check_bounds(params, names, notes):
    for n in names:
        p = params[n]
        span = p.max - p.min if np.isfinite(p.max - p.min) else None
        for b, side in ((p.min, "lower"), (p.max, "upper")):
            tol = 1e-6 * span if span else 1e-6 * max(1.0, abs(b))
            if np.isfinite(b) and abs(p.value - b) <= tol:
                msg = f"{n} = {p.value:.6g} is at its {side} bound {b:g}: its uncertainty is not meaningful"
                notes.append(msg)
                warnings.warn(msg, FitAtBoundWarning, stacklevel=3)
    if any(params[n].stderr is None for n in names if params[n].vary):
        notes.append("uncertainties could not be estimated (singular covariance at the solution)")


#: A kinematic fit whose chi-square probability is below this gets a note (and, opt-in, scaled errors).
P_VALUE_MIN = 1e-3


def _p_value(res) -> float:
    from scipy.special import gammaincc

    if res.nfree <= 0 or not np.isfinite(res.chisqr):
        return float("nan")
    return float(gammaincc(0.5 * res.nfree, 0.5 * res.chisqr))


def _quality(res, notes, scale_errors: bool) -> None:
    """Judge the fit by its chi-square probability; opt-in: scale the errors by sqrt(reduced chi-square)."""
    p = _p_value(res)
    if not (p < P_VALUE_MIN):
        return
    msg = (
        f"poor fit: chi-square {res.chisqr:.4g} for {res.nfree} degrees of freedom (probability {p:.2g}): the model "
        "misses something in the data (e.g. a systemic velocity, nodding, a second period) or the errors are too small"
    )
    if scale_errors:
        f = float(np.sqrt(res.redchi))
        for par in res.params.values():
            if par.stderr is not None:
                par.stderr *= f
        msg += f"; uncertainties scaled by sqrt(reduced chi-square) = {f:.3g} (scale_errors=True)"
    else:
        msg += "; the uncertainties assume the model is right (pass scale_errors=True to scale them by sqrt(reduced chi-square))"
    notes.append(msg)
    warnings.warn(msg, FitQualityWarning, stacklevel=3)


def _measured(value, name, *, positive=False) -> float:
    """A finite float (an error: > 0) for a fit input; ValueError naming it otherwise."""
    if isinstance(value, bool):
        raise TypeError(f"{name} must be a number, got {value!r}")
    v = float(_dimensionless(value, name))
    if not np.isfinite(v):
        raise ValueError(f"{name} must be a finite number, got {v!r}")
    if positive and not v > 0:
        raise ValueError(f"{name} must be > 0 (a 1-sigma uncertainty), got {v!r}")
    return v


def _near_c(params, notes):
    b = params["beta"].value
    if b > 0.99:
        notes.append(
            f"beta = {b:.6f} is close to c: quote Gamma = {params['gamma'].value:.4g} and the rapidity; beta's error is asymmetric"
        )


def _minimize(residual, params, **kw):
    import lmfit

    return lmfit.Minimizer(residual, params, scale_covar=False, nan_policy="propagate", **kw).minimize(method="leastsq")


# ---------------------------------------------------------------------------
# Jet pair
# ---------------------------------------------------------------------------
def _pair_z(eta, cos_angle, relativistic=True):
    """Redshifts (approaching, receding) of two opposite jets at rapidity eta, cos of the approaching jet's angle.

    Relativistic: 1 + z = Gamma (1 -/+ beta cos), written with Gamma - 1 = (Gamma beta)^2/(Gamma + 1)
    so small z keep their digits. Galilean: z = -/+ beta cos (no transverse term).
    """
    if relativistic:
        g, gb = np.cosh(eta), np.sinh(eta)
        gm1 = gb * gb / (g + 1.0)
        return gm1 - gb * cos_angle, gm1 + gb * cos_angle
    b = np.tanh(eta)
    return -b * cos_angle, b * cos_angle


def _jet_pair_model(eta, theta_deg, relativistic=True):
    return _pair_z(eta, np.cos(theta_deg * _DEG), relativistic)


def fit_jet_pair(
    z_approaching, z_receding, z_approaching_err, z_receding_err, *, z_corr=0.0, relativistic: bool = True, scale_errors: bool = False
):
    """Fit beta and viewing angle to the redshifts of a jet/counter-jet pair.

    Parameters
    ----------
    z_approaching, z_receding : float or array
        Measured redshifts of the approaching and the receding jet (dimensionless).
    z_approaching_err, z_receding_err : float or array
        Their 1-sigma uncertainties (> 0).
    z_corr : float or array
        Correlation coefficient of the two redshifts' errors, in (-1, 1): both fitted in one
        spectrum, overlapping lines are correlated (``measure_lines`` gives it in
        ``meta["z_corr"]``). 0 (the default) treats them as independent.
    relativistic : bool
        False fits the Galilean reading z = -/+ beta cos theta instead (no transverse term).
    scale_errors : bool
        Scale the uncertainties by sqrt(reduced chi-square) when the fit is poor (only an
        unphysical pair can be: the fit is otherwise exactly determined).

    Returns
    -------
    KinematicFit or KinematicFits
        Params ``beta`` (derived from the rapidity ``eta``), ``gamma`` (derived) and
        ``viewing_angle`` (deg, 0 = approaching jet straight at us). For array input a
        :class:`KinematicFits`: one fit per pair, with the same accessors returning arrays of
        the input's shape; both have ``.table()``.

    Notes
    -----
    Two data and two parameters: the fit is exactly determined when the pair is physical
    ((1 + z_a)(1 + z_r) >= 1), and the errors are propagated through the model's Jacobian
    (``scale_covar=False``). An unphysical pair leaves a residual and puts beta at 0 or the
    angle at a bound; the notes say so. Model: Margon 1984, ARA&A 22, 507.
    """
    za, zr, ea, er, rho = np.broadcast_arrays(
        *(
            np.asarray(_dimensionless(v, n), float)
            for v, n in (
                (z_approaching, "z_approaching"),
                (z_receding, "z_receding"),
                (z_approaching_err, "z_approaching_err"),
                (z_receding_err, "z_receding_err"),
                (z_corr, "z_corr"),
            )
        )
    )
    bad = ~(np.abs(rho) < 1)
    if np.any(bad):
        raise ValueError(f"z_corr must be a correlation coefficient in (-1, 1), got {float(rho.ravel()[np.flatnonzero(bad)[0]])!r}")
    for name, arr in (("z_approaching_err", ea), ("z_receding_err", er)):
        if np.any(~(arr > 0)) or np.any(~np.isfinite(arr)):
            raise ValueError(
                f"{name} must be finite and > 0 (1-sigma uncertainties), got {float(arr.ravel()[np.flatnonzero(~((arr > 0) & np.isfinite(arr)))[0]])!r}"
            )
    for name, arr in (("z_approaching", za), ("z_receding", zr)):
        bad = ~np.isfinite(arr) | (arr <= -1)
        if np.any(bad):
            raise ValueError(f"{name} must be a finite redshift > -1, got {float(arr.ravel()[np.flatnonzero(bad)[0]])!r}")
    if za.ndim == 0:
        return _fit_one_pair(float(za), float(zr), float(ea), float(er), relativistic, scale_errors, float(rho))
    fits = KinematicFits(
        _fit_one_pair(float(a), float(r), float(e1), float(e2), relativistic, scale_errors, float(c))
        for a, r, e1, e2, c in zip(za.ravel(), zr.ravel(), ea.ravel(), er.ravel(), rho.ravel(), strict=True)
    )
    fits.shape = za.shape
    return fits


def _fit_one_pair(za, zr, ea, er, relativistic=True, scale_errors=False, rho=0.0):
    import lmfit

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegenerateGeometryWarning)
        if relativistic:
            b0, th0 = solve_jet_pair(za, zr, on_unphysical="nan")
            th0 = th0.to_value(u.deg)
        else:
            b0 = abs(zr - za) / 2
            th0 = 90.0 if b0 == 0 else np.degrees(np.arccos(np.clip((zr - za) / 2 / max(b0, 1e-12), -1, 1)))
    if not np.isfinite(b0):
        b0, th0 = max(abs(zr - za) / 2, 1e-3), (5.0 if zr > za else 175.0)
    if not np.isfinite(th0):
        th0 = 90.0
    params = lmfit.Parameters()
    _add_speed(params, max(b0, 1e-4))
    params.add("viewing_angle", value=float(np.clip(th0, 1e-6, 180 - 1e-6)), min=0.0, max=180.0)
    data = np.array([za, zr])
    err = np.array([ea, er])
    # whitened by the Cholesky factor of the errors' covariance (independent when rho = 0)
    chol = np.linalg.cholesky(np.array([[ea * ea, rho * ea * er], [rho * ea * er, er * er]]))

    def residual(p):
        m = _jet_pair_model(p["eta"].value, p["viewing_angle"].value, relativistic)
        return np.linalg.solve(chol, np.array(m) - data)

    res = _minimize(residual, params)
    notes = []
    _check_bounds(res.params, ["eta", "viewing_angle"], notes)
    if relativistic:
        _near_c(res.params, notes)
        if (1 + za) * (1 + zr) < 1:
            notes.append("the pair is unphysical for equal-speed opposite jets ((1+z_a)(1+z_r) < 1): the fit leaves a residual")
    _quality(res, notes, scale_errors)
    fit = KinematicFit(
        res.params,
        res,
        "jet-pair" if relativistic else "jet-pair (Galilean)",
        notes,
        {"z": data, "z_err": err, "labels": ["z approaching jet", "z receding jet"]},
        residual,
    )
    return fit


def fits_table(fits):
    """A QTable with one row per fit: beta, beta_err, gamma, the angles (deg), chi2, dof, p_value, notes.

    Jet-pair and constraint fits give ``viewing_angle`` and ``viewing_angle_err``; precessing-jet
    fits ``inclination``, ``cone_angle`` and their errors. Units are on the columns.

    Parameters
    ----------
    fits : iterable of KinematicFit

    Returns
    -------
    astropy.table.QTable
    """
    from astropy.table import QTable

    fits = list(fits)
    cols = {
        "model": [f.model for f in fits],
        "beta": [f.beta for f in fits],
        "beta_err": [f.beta_err for f in fits],
        "gamma": [f.value("gamma") for f in fits],
    }
    for name in ("viewing_angle", "inclination", "cone_angle"):
        if any(name in f.params for f in fits):
            cols[name] = [f.value(name) if name in f.params else np.nan for f in fits] * u.deg
            cols[f"{name}_err"] = [f.error(name) if name in f.params else np.nan for f in fits] * u.deg
    cols.update(
        {
            "chi2": [f.chi2 for f in fits],
            "dof": [f.dof for f in fits],
            "p_value": [f.p_value for f in fits],
            "notes": ["; ".join(f.notes) for f in fits],
        }
    )
    return QTable(cols)


class KinematicFits(list):
    """Fits of many measurements (a list of :class:`KinematicFit`), with the same accessors as one.

    ``beta``, ``beta_err``, ``value(name)``, ``error(name)``, ``p_value`` and ``chi2`` return
    arrays in the shape of the input; ``viewing_angle`` a Quantity array; :meth:`table` one row
    per fit.
    """

    shape: tuple = ()

    def _arr(self, get):
        return np.array([get(f) for f in self], float).reshape(self.shape or (len(self),))

    @property
    def beta(self) -> np.ndarray:
        """Speeds v/c, in the shape of the input."""
        return self._arr(lambda f: f.beta)

    @property
    def beta_err(self) -> np.ndarray:
        """Their 1-sigma uncertainties."""
        return self._arr(lambda f: f.beta_err)

    @property
    def viewing_angle(self) -> u.Quantity:
        """Viewing angles of the approaching jets (deg; 0 = straight at us)."""
        return self._arr(lambda f: f.viewing_angle.to_value(u.deg)) * u.deg

    @property
    def chi2(self) -> np.ndarray:
        """Chi-square of each fit."""
        return self._arr(lambda f: f.chi2)

    @property
    def p_value(self) -> np.ndarray:
        """Chi-square probability of each fit (NaN when exactly determined)."""
        return self._arr(lambda f: f.p_value)

    @property
    def notes(self) -> list:
        """The notes of each fit (a list of lists, in input order)."""
        return [f.notes for f in self]

    def value(self, name) -> np.ndarray:
        """Best-fit values of a parameter, in the shape of the input."""
        return self._arr(lambda f: f.value(name))

    def error(self, name) -> np.ndarray:
        """1-sigma uncertainties of a parameter, in the shape of the input."""
        return self._arr(lambda f: f.error(name))

    def table(self):
        """One row per fit (see :func:`fits_table`)."""
        return fits_table(self)

    def __repr__(self) -> str:
        n_notes = sum(1 for f in self if f.notes)
        return f"<KinematicFits: {len(self)} fits (shape {self.shape or (len(self),)}), {n_notes} with notes; .table() for all>"


def _precess_cos(t, incl, cone, period, t0):
    psi = 2 * np.pi * (t - t0) / period
    return np.sin(incl * _DEG) * np.sin(cone * _DEG) * np.cos(psi) + np.cos(incl * _DEG) * np.cos(cone * _DEG)


def _precess_model(p, t, relativistic=True):
    """Redshifts of both jets; a systemic redshift composes by product: 1 + z = (1 + z_sys)(1 + z_kin)."""
    z1, z2 = _pair_z(p["eta"], _precess_cos(t, p["inclination"], p["cone_angle"], p["period"], p["t0"]), relativistic)
    zs = p.get("z_systemic", 0.0)
    return z1 + zs * (1 + z1), z2 + zs * (1 + z2)


def _precess_start(t, z1, z2, e, period_range, relativistic=True):
    """Starting values: beta from the mean redshift, period from a periodogram, angles in closed form.

    The Galilean reading has no mean redshift to fix beta: it starts from the largest swing,
    beta = 1.05 (|m| + a).
    """
    from astropy.timeseries import LombScargle

    mean = np.median(0.5 * (z1 + z2))
    gm1 = max(mean, 1e-6)
    g = 1 + gm1
    gb = np.sqrt(gm1 * (g + 1))
    beta = gb / g
    d = 0.5 * (z2 - z1)  # = Gamma beta cos(angle_1)
    span = np.ptp(t)
    pmin, pmax = period_range if period_range is not None else (max(3 * np.median(np.diff(np.sort(t))), span / 1000), 2 * span)
    ls = LombScargle(t, d, e)
    freq = np.linspace(1 / pmax, 1 / pmin, 20000)
    power = ls.power(freq)
    f_best = freq[np.argmax(power)]
    # linear fit d = m + a cos(w t) + b sin(w t)
    w = 2 * np.pi * f_best
    X = np.column_stack([np.ones_like(t), np.cos(w * t), np.sin(w * t)])
    m, a, b = np.linalg.lstsq(X / e[:, None], d / e, rcond=None)[0]
    amp = np.hypot(a, b)
    t0 = (np.arctan2(b, a) / w) % (1 / f_best)
    if not relativistic:
        beta = gb = min(1.05 * (abs(m) + amp), 0.99)
    mp, ap = np.clip(m / gb, -1, 1), np.clip(amp / gb, 0, 1)
    # cos(i - c) = m' + a', cos(i + c) = m' - a'
    i_minus_c = np.degrees(np.arccos(np.clip(mp + ap, -1, 1)))
    i_plus_c = np.degrees(np.arccos(np.clip(mp - ap, -1, 1)))
    incl = 0.5 * (i_plus_c + i_minus_c)
    cone = 0.5 * (i_plus_c - i_minus_c)
    return {
        "beta": beta,
        "inclination": incl,
        "cone_angle": max(cone, 0.5),
        "period": 1 / f_best,
        "t0": t0 + np.min(t) - (np.min(t) % (1 / f_best)),
    }


def fit_precessing_jet(
    t,
    z_1,
    z_2,
    z_err,
    *,
    z_2_err=None,
    period_range=None,
    allow_label_swap: bool = True,
    relativistic: bool = True,
    start: dict | None = None,
    z_systemic=None,
    z_corr=0.0,
    scale_errors: bool = False,
):
    """Fit the kinematic model of two opposite precessing jets to a redshift time series.

    Parameters
    ----------
    t : array or Quantity (time)
        Epochs (plain numbers in days, or any time Quantity).
    z_1, z_2 : array
        Redshifts of the two moving lines at each epoch (NaN where a line was not measured).
    z_err : float or array
        1-sigma uncertainties of ``z_1`` (and of ``z_2`` unless ``z_2_err``).
    period_range : (float, float), optional
        Periods (days) searched by the periodogram for the starting value.
    allow_label_swap : bool
        If True, at each epoch the model may assign the two measured lines to the jets either
        way round (labels often swap where the curves cross); the number of swapped epochs is
        reported in the notes.
    relativistic : bool
        False fits the Galilean reading (no transverse term).
    start : dict, optional
        Starting values overriding the automatic ones (keys beta, inclination, cone_angle,
        period, t0).
    z_systemic : float or (float, float), optional
        The binary's systemic redshift (v_sys/c for small speeds), composed by product with
        the jets' kinematic redshifts. A number fixes it; ``(value, sd)`` fits it with that
        Gaussian prior. It cannot be fitted freely: in this model only Gamma (1 + z_sys) is
        fixed by the data, so a systemic velocity and beta are degenerate. When not given it
        is taken as 0 and the notes say how far beta would move per 100 km/s of it.
    z_corr : float or array
        Correlation coefficient of the errors of ``z_1`` and ``z_2`` at each epoch, in (-1, 1):
        both lines fitted in one spectrum, overlapping lines (near the crossings) are correlated
        (``measure_lines`` gives it in ``meta["z_corr"]``). Each epoch's pair enters the
        chi-square with its 2 x 2 covariance. 0 (the default) treats them as independent.
    scale_errors : bool
        Scale the uncertainties by sqrt(reduced chi-square) when the fit is poor.

    Returns
    -------
    KinematicFit
        Params ``beta``, ``inclination``, ``cone_angle`` (deg), ``period``, ``t0`` (days),
        ``gamma`` (derived), ``z_systemic``. Notes report the inclination <-> cone angle
        degeneracy (the model is symmetric under their swap: both solutions are listed), label
        swaps, a poor chi-square probability, and a period left in the residuals (nodding, a
        second period), with its false-alarm probability.

    Notes
    -----
    Model of Abell & Margon 1979 (Nature 279, 701) and Margon 1984 (ARA&A 22, 507); see
    :func:`dopplerkit.models.precessing_jet_redshifts`. Starting values come from the mean
    redshift (Gamma - 1), a Lomb-Scargle periodogram of (z_2 - z_1)/2 (astropy), and the
    closed-form angles cos(i -/+ c) = (m +/- a)/(Gamma beta) from its mean m and amplitude a.
    """
    import lmfit

    tt = np.asarray(t.to_value(u.d) if isinstance(t, u.Quantity) else t, float)
    z1 = np.asarray(z_1, float)
    z2 = np.asarray(z_2, float)
    if not np.all(np.isfinite(tt)):
        raise ValueError("t must be finite at every epoch")
    zsys_prior = None
    if z_systemic is None:
        zsys0 = 0.0
    elif np.ndim(z_systemic) == 0:
        zsys0 = _measured(z_systemic, "z_systemic")
    else:
        if len(z_systemic) != 2:
            raise ValueError(f"z_systemic must be a number or (value, sd), got {z_systemic!r}")
        zsys0 = _measured(z_systemic[0], "z_systemic value")
        zsys_prior = (zsys0, _measured(z_systemic[1], "z_systemic sd", positive=True))
    for name, v in (("z_err", z_err), ("z_2_err", z_2_err), ("z_1", z_1), ("z_2", z_2), ("t", t), ("z_corr", z_corr)):
        if v is not None and np.asarray(getattr(v, "value", v)).dtype.kind in "bUSO":
            raise TypeError(f"{name} must be numbers (an array or a number), got {np.asarray(v).dtype.kind!r}-type values {v!r:.60}")
    if period_range is not None:
        try:
            p_lo, p_hi = (float(_dimensionless(v.to_value(u.d) if isinstance(v, u.Quantity) else v, "period_range")) for v in period_range)
        except (TypeError, ValueError) as exc:
            raise ValueError(f"period_range must be (shortest, longest) period in days, got {period_range!r}") from exc
        if not (np.isfinite(p_lo) and np.isfinite(p_hi) and 0 < p_lo < p_hi):
            raise ValueError(f"period_range must be (shortest, longest) with 0 < shortest < longest, finite (days), got {period_range!r}")
        period_range = (p_lo, p_hi)
    e1 = np.broadcast_to(np.asarray(z_err, float), tt.shape).copy()
    e2 = np.broadcast_to(np.asarray(z_err if z_2_err is None else z_2_err, float), tt.shape).copy()
    if tt.ndim != 1 or z1.shape != tt.shape or z2.shape != tt.shape:
        raise ValueError(f"t, z_1 and z_2 must be 1-D of equal length, got shapes {tt.shape}, {z1.shape}, {z2.shape}")
    if np.any(~(e1 > 0)) or np.any(~(e2 > 0)) or not np.all(np.isfinite(e1)) or not np.all(np.isfinite(e2)):
        raise ValueError("z_err (and z_2_err) must be finite and > 0 at every epoch")
    try:
        rho = np.broadcast_to(np.asarray(_dimensionless(z_corr, "z_corr"), float), tt.shape).copy()
    except ValueError as exc:
        raise ValueError(f"z_corr must be a number or one per epoch ({tt.size}), got shape {np.shape(z_corr)}") from exc
    if np.any(~(np.abs(rho) < 1)):
        raise ValueError(f"z_corr must be a correlation coefficient in (-1, 1), got {float(rho[np.flatnonzero(~(np.abs(rho) < 1))[0]])!r}")
    both = np.isfinite(z1) & np.isfinite(z2)
    if both.sum() < 6:
        raise ValueError(f"need at least 6 epochs with both lines measured, got {int(both.sum())}")
    s = _precess_start(tt[both], z1[both], z2[both], np.hypot(e1[both], e2[both]) / 2, period_range, relativistic)
    if start:
        s.update(start)
    params = lmfit.Parameters()
    _add_speed(params, s["beta"])
    params.add("inclination", value=float(np.clip(s["inclination"], 0.1, 179.9)), min=0.0, max=180.0)
    params.add("cone_angle", value=float(np.clip(s["cone_angle"], 0.1, 89.9)), min=0.0, max=90.0)
    params.add("period", value=float(s["period"]), min=float(s["period"]) * 0.5, max=float(s["period"]) * 1.5)
    params.add("t0", value=float(s["t0"]), min=float(s["t0"]) - float(s["period"]), max=float(s["t0"]) + float(s["period"]))
    params.add("z_systemic", value=zsys0, vary=zsys_prior is not None)
    ok1, ok2 = np.isfinite(z1), np.isfinite(z2)
    rho = np.where(both, rho, 0.0)  # a lone line has no partner to correlate with
    whiten = _pair_whitening(rho)

    def residual(p):
        v = p.valuesdict()
        m1, m2 = _precess_model(v, tt, relativistic)
        r1, r2 = whiten(np.where(ok1, (m1 - np.nan_to_num(z1)) / e1, 0.0), np.where(ok2, (m2 - np.nan_to_num(z2)) / e2, 0.0))
        if allow_label_swap:
            # the other assignment: z_1 belongs to jet 2 and z_2 to jet 1 (the measured errors and their correlation stay)
            s1, s2 = whiten(np.where(ok1, (m2 - np.nan_to_num(z1)) / e1, 0.0), np.where(ok2, (m1 - np.nan_to_num(z2)) / e2, 0.0))
            swap = (s1 * s1 + s2 * s2) < (r1 * r1 + r2 * r2)
            r1, r2 = np.where(swap, s1, r1), np.where(swap, s2, r2)
        if zsys_prior is not None:
            return np.concatenate([r1, r2, [(v["z_systemic"] - zsys_prior[0]) / zsys_prior[1]]])
        return np.concatenate([r1, r2])

    # refine the phase: a coarse scan over t0 guards against a periodogram phase off by half a cycle
    best = None
    for dt0 in np.linspace(0, s["period"], 4, endpoint=False):
        trial = params.copy()
        trial["t0"].set(value=float(s["t0"] + dt0 - (s["period"] if dt0 > s["period"] / 2 else 0)))
        r = _minimize(residual, trial, max_nfev=200)
        if best is None or r.chisqr < best.chisqr:
            best = r
    res = _minimize(residual, best.params)
    p = res.params
    v = p.valuesdict()
    m1, m2 = _precess_model(v, tt, relativistic)
    swap_mask = _swapped(m1, m2, z1, z2, both, e1, e2, rho)
    swapped = int(np.sum(swap_mask))
    notes = []
    _check_bounds(p, ["eta", "inclination", "cone_angle", "period", "t0"], notes)
    notes.append(
        f"inclination and cone angle can be exchanged without changing the model: the solution (i, cone) = "
        f"({p['inclination'].value:.3f}, {p['cone_angle'].value:.3f}) deg fits exactly as well as "
        f"({p['cone_angle'].value:.3f}, {p['inclination'].value:.3f}) deg; other data (e.g. jet images) must choose"
    )
    if allow_label_swap and swapped:
        notes.append(
            f"{swapped} of {int(both.sum())} epochs fit better with the two lines' labels exchanged (the curves cross); the model assigned them"
        )
    if relativistic:
        _near_c(p, notes)
        if zsys_prior is None:
            g, b = p["gamma"].value, p["beta"].value
            shift = (100.0 / SPEED_OF_LIGHT_KMS) / (g**3 * max(b, 1e-12))
            notes.append(
                f"systemic velocity taken as {zsys0 * SPEED_OF_LIGHT_KMS:.4g} km/s: the data fix only Gamma (1 + z_sys), so each "
                f"100 km/s of systemic velocity not modelled moves beta by {shift:.2g} (give z_systemic= from other lines)"
            )
    _quality(res, notes, scale_errors)
    _residual_periodicity(tt, z1, z2, m1, m2, e1, e2, swap_mask, p["period"].value, notes)
    name = "precessing-jet" if relativistic else "precessing-jet (Galilean)"
    data = {"t": tt, "z_1": z1, "z_2": z2, "z_err": e1, "z_2_err": e2, "z_corr": rho, "swapped": swapped}
    return KinematicFit(p, res, name, notes, data, residual)


def _pair_whitening(rho):
    """Whitening of two normalised residuals whose errors correlate by ``rho`` (per epoch).

    (a, b) -> (a, (b - rho a) / sqrt(1 - rho**2)): the inverse Cholesky factor of the correlation
    matrix [[1, rho], [rho, 1]], so that the sum of squares is the chi-square of the pair with its
    covariance, (a**2 - 2 rho a b + b**2) / (1 - rho**2) (generalised least squares; common
    practice, no source).
    """
    if not np.any(rho):
        return lambda a, b: (a, b)
    k = 1.0 / np.sqrt(1.0 - rho * rho)
    return lambda a, b: (a, (b - rho * a) * k)


def _swapped(m1, m2, z1, z2, both, e1=1.0, e2=1.0, rho=0.0):
    """Epochs whose two measured lines fit better the other way round (chi-square of each assignment)."""

    def chi2(a, b):
        a, b = a / e1, b / e2
        return a * a - 2 * rho * a * b + b * b

    with np.errstate(invalid="ignore"):
        return both & (chi2(m2 - z1, m1 - z2) < chi2(m1 - z1, m2 - z2))


def _residual_periodicity(t, z1, z2, m1, m2, e1, e2, swap, period, notes, fap_max: float = 1e-3):
    """Note a period left in the residuals (Lomb-Scargle, astropy; false-alarm probability of Baluev 2008)."""
    from astropy.timeseries import LombScargle

    a1 = np.where(swap, z2, z1)
    a2 = np.where(swap, z1, z2)
    for name, resid, err in (
        ("mean of the two jets", 0.5 * ((a1 - m1) + (a2 - m2)), 0.5 * np.hypot(e1, e2)),
        ("half-difference of the two jets", 0.5 * ((a2 - m2) - (a1 - m1)), 0.5 * np.hypot(e1, e2)),
    ):
        ok = np.isfinite(resid)
        if ok.sum() < 20:
            return
        tt, rr, ee = t[ok], resid[ok], err[ok]
        span = np.ptp(tt)
        if span <= 0 or not np.sum((rr / ee) ** 2) > 1e-12 * rr.size:
            return  # noiseless or perfectly fitted data: nothing to search
        ls = LombScargle(tt, rr, ee)
        dt = np.median(np.diff(np.sort(tt)))
        fmin, fmax = 1.0 / span, 0.5 / max(dt, span / (10 * tt.size))
        freq, power = ls.autopower(minimum_frequency=fmin, maximum_frequency=fmax, samples_per_peak=10)
        k = int(np.argmax(power))
        fap = float(ls.false_alarm_probability(power[k], minimum_frequency=fmin, maximum_frequency=fmax))
        if fap < fap_max:
            notes.append(
                f"the residuals ({name}) keep a period of {1 / freq[k]:.4g} d (false-alarm probability {fap:.1g}; "
                f"precession period {period:.4g} d): nodding or a second period the model lacks"
            )


# ---------------------------------------------------------------------------
# Joint constraints
# ---------------------------------------------------------------------------
def _pairs(values, name, form):
    out = []
    for i, v in enumerate(values):
        if isinstance(v, (str, bytes)) or not hasattr(v, "__len__") or len(v) != 2:
            raise ValueError(f"{name}[{i}] must be {form}, got {v!r}")
        out.append(tuple(v))
    return out


LIMIT_QUANTITIES = ("beta_cos_theta", "beta_app", "doppler_factor", "flux_ratio", "beta", "viewing_angle")


def _limit(d, i):
    """A limit dict -> (quantity, side, bound, scale, boost exponent)."""
    from .kinematics import GEOMETRIES

    where = f"limits[{i}]"
    if not isinstance(d, dict):
        raise ValueError(f"{where} must be a dict such as {{'quantity': 'beta_cos_theta', 'lower': 0.8}}, got {d!r}")
    allowed = {"quantity", "lower", "upper", "scale", "alpha", "geometry"}
    extra = set(d) - allowed
    if extra:
        raise ValueError(f"{where}: unknown keys {sorted(extra)}; allowed {sorted(allowed)}")
    q = d.get("quantity")
    if q not in LIMIT_QUANTITIES:
        raise ValueError(f"{where} quantity must be one of {list(LIMIT_QUANTITIES)}, got {q!r}")
    sides = [k for k in ("lower", "upper") if k in d]
    if len(sides) != 1:
        raise ValueError(f"{where} needs exactly one of 'lower' or 'upper', got {sorted(d)}")
    side = sides[0]
    bound = _measured(d[side], f"{where} {side}")
    scale = d.get("scale", max(0.02 * abs(bound), 0.01))
    scale = _measured(scale, f"{where} scale", positive=True)
    pexp = 0.0
    if q == "flux_ratio":
        geometry = d.get("geometry", "jet")
        if geometry not in GEOMETRIES:
            raise ValueError(f"{where} geometry must be 'blob' or 'jet', got {geometry!r}")
        pexp = GEOMETRIES[geometry][0] + _measured(d.get("alpha", 0.7), f"{where} alpha")
    return q, side, bound, scale, pexp


def fit_constraints(
    *,
    z_pairs=(),
    single_z=(),
    proper_motions=(),
    distance=None,
    flux_ratios=(),
    apparent_speeds=(),
    doppler_factors=(),
    limits=(),
    priors=None,
    relativistic: bool = True,
    start=None,
    scale_errors: bool = False,
):
    """One beta-viewing angle inference from any mix of measurements.

    Parameters
    ----------
    z_pairs : sequence of (z_a, z_r, z_a_err, z_r_err) or (z_a, z_r, z_a_err, z_r_err, corr)
        Jet/counter-jet redshift pairs; ``corr`` is the correlation of the two errors, in (-1, 1)
        (fitted in one spectrum, overlapping lines are correlated; 0 if left out).
    single_z : sequence of (z, z_err, jet)
        Single-jet redshifts; ``jet`` is "approaching" (at theta) or "receding" (at 180 - theta).
    proper_motions : sequence of (mu_a, mu_a_err, mu_r, mu_r_err)
        Two-sided proper motions, Quantities of angular rate (needs ``distance``).
    distance : (Quantity, Quantity)
        Distance and its 1-sigma uncertainty; fitted as a nuisance parameter with a Gaussian
        prior, so its uncertainty propagates into beta and theta.
    flux_ratios : sequence of (R, R_err, alpha, geometry)
        Jet/counter-jet flux ratios with spectral index (S ~ nu**-alpha) and "blob"/"jet".
    apparent_speeds : sequence of (beta_app, beta_app_err)
        Apparent transverse speeds in units of c (e.g. from
        :func:`~dopplerkit.kinematics.apparent_speed_from_proper_motion`).
    doppler_factors : sequence of (delta, delta_err)
        Doppler factors (e.g. from :func:`~dopplerkit.kinematics.variability_doppler_factor`).
    limits : sequence of dict
        One-sided constraints: ``{"quantity": q, "lower": x}`` or ``{"quantity": q, "upper": x}``
        with q one of "beta_cos_theta" (e.g. :func:`~dopplerkit.kinematics.counterjet_limit`),
        "beta_app", "doppler_factor", "flux_ratio" (with "alpha" and "geometry"), "beta",
        "viewing_angle" (deg); optional "scale" (default 2% of the bound, at least 0.01): a limit
        adds nothing where it is met and ((bound - model)/scale)**2 beyond. Limits are not
        counted as data in the degrees of freedom.
    priors : dict, optional
        Gaussian priors {"beta": (mean, sd), "viewing_angle": (mean_deg, sd_deg)}.
    relativistic : bool
        False: the Galilean reading of the redshifts (no transverse term).
    start : dict, optional
        Starting beta and viewing_angle.
    scale_errors : bool
        Scale the uncertainties by sqrt(reduced chi-square) when the measurements disagree
        (chi-square probability below 1e-3).

    Returns
    -------
    KinematicFit
        Params ``beta``, ``gamma`` (derived), ``viewing_angle`` (deg, 0 = straight at us) and
        ``distance_kpc`` when proper motions are used.

    Raises
    ------
    ValueError
        A measurement that is not finite, an uncertainty or prior width that is not > 0, a
        distance or flux ratio that is not > 0, a redshift <= -1.
    TypeError
        A proper motion or distance without units.

    Notes
    -----
    Redshifts: Rybicki & Lightman 1979 sec. 4.1; proper motions: Mirabel & Rodriguez 1994,
    Nature 371, 46; flux ratios: Lind & Blandford 1985, ApJ 295, 358. The fit starts from a
    grid in (beta, theta) and refines with lmfit; a second minimum is reported if it exists.
    """
    import lmfit

    from .kinematics import GEOMETRIES

    def redshift_value(v, name):
        z = _measured(v, name)
        if z <= -1:
            raise ValueError(f"{name} must be a redshift > -1, got {z!r}")
        return z

    zp = []
    for i, pair in enumerate(z_pairs):
        if len(pair) not in (4, 5):
            raise ValueError(f"z_pairs[{i}] must be (z_a, z_r, z_a_err, z_r_err) or with the errors' correlation last, got {pair!r}")
        za, zr, ea, er = pair[:4]
        rho = _measured(pair[4], f"z_pairs[{i}] correlation") if len(pair) == 5 else 0.0
        if not abs(rho) < 1:
            raise ValueError(f"z_pairs[{i}] correlation must be in (-1, 1), got {rho!r}")
        zp.append(
            (
                redshift_value(za, f"z_pairs[{i}] z_a"),
                redshift_value(zr, f"z_pairs[{i}] z_r"),
                _measured(ea, f"z_pairs[{i}] z_a_err", positive=True),
                _measured(er, f"z_pairs[{i}] z_r_err", positive=True),
                rho,
            )
        )
    sz = []
    for i, (z, e, j) in enumerate(single_z):
        if j not in ("approaching", "receding"):
            raise ValueError(f"single_z[{i}] jet must be 'approaching' or 'receding', got {j!r}")
        sz.append((redshift_value(z, f"single_z[{i}] z"), _measured(e, f"single_z[{i}] z_err", positive=True), str(j)))
    pm = []
    conv = u.rad / u.s
    for i, row in enumerate(proper_motions):
        vals = []
        for q, name in zip(row, ("mu_a", "mu_a_err", "mu_r", "mu_r_err"), strict=True):
            if not isinstance(q, u.Quantity):
                raise TypeError(f"proper_motions[{i}] {name} must be an angular-rate Quantity (e.g. mas/d), got {q!r}")
            try:
                vals.append(_measured(q.to_value(conv), f"proper_motions[{i}] {name}", positive=True))
            except u.UnitConversionError:
                raise u.UnitsError(f"proper_motions[{i}] {name} must be an angular rate (e.g. mas/d), got unit {q.unit!r}") from None
        pm.append(tuple(vals))
    if pm and distance is None:
        raise ValueError("proper_motions need distance=(value, uncertainty) as length Quantities")
    fr = []
    for i, (R, Re, alpha, geometry) in enumerate(flux_ratios):
        if geometry not in GEOMETRIES:
            raise ValueError(f"flux_ratios[{i}] geometry must be 'blob' or 'jet', got {geometry!r}")
        fr.append(
            (
                _measured(R, f"flux_ratios[{i}] R", positive=True),
                _measured(Re, f"flux_ratios[{i}] R_err", positive=True),
                GEOMETRIES[geometry][0] + _measured(alpha, f"flux_ratios[{i}] alpha"),
            )
        )
    priors = dict(priors or {})
    bad = set(priors) - {"beta", "viewing_angle"}
    if bad:
        raise ValueError(f"priors may be given for 'beta' and 'viewing_angle', got {sorted(bad)}")
    for k, v in priors.items():
        if len(v) != 2:
            raise ValueError(f"priors[{k!r}] must be (mean, sd), got {v!r}")
        priors[k] = (_measured(v[0], f"priors[{k!r}] mean"), _measured(v[1], f"priors[{k!r}] sd", positive=True))
    ba = [
        (_measured(v, f"apparent_speeds[{i}] beta_app", positive=True), _measured(e, f"apparent_speeds[{i}] beta_app_err", positive=True))
        for i, (v, e) in enumerate(_pairs(apparent_speeds, "apparent_speeds", "(beta_app, beta_app_err)"))
    ]
    dl = [
        (_measured(v, f"doppler_factors[{i}] delta", positive=True), _measured(e, f"doppler_factors[{i}] delta_err", positive=True))
        for i, (v, e) in enumerate(_pairs(doppler_factors, "doppler_factors", "(delta, delta_err)"))
    ]
    lim = [_limit(d, i) for i, d in enumerate(limits)]
    if not (zp or sz or pm or fr or ba or dl):
        raise ValueError(
            "give at least one measurement (z_pairs, single_z, proper_motions, flux_ratios, apparent_speeds or doppler_factors); "
            "limits and priors alone do not make a fit"
        )
    d_km = d_err_km = None
    if pm:
        if len(distance) != 2 or not all(isinstance(q, u.Quantity) for q in distance):
            raise TypeError(f"distance must be (value, uncertainty) as length Quantities, got {distance!r}")
        try:
            d_km = _measured(distance[0].to_value(u.km), "distance", positive=True)
            d_err_km = _measured(distance[1].to_value(u.km), "distance uncertainty", positive=True)
        except u.UnitConversionError:
            raise u.UnitsError(f"distance must be lengths (e.g. kpc), got units {distance[0].unit!r}, {distance[1].unit!r}") from None

    def model_z(eta, th, cosfac):
        return _pair_z(eta, np.cos(th * _DEG) * cosfac, relativistic)[0]

    def residual(p):
        eta, th = p["eta"].value, p["viewing_angle"].value
        b = np.tanh(eta)
        omb = 2.0 / (np.exp(2.0 * eta) + 1.0)  # 1 - tanh(eta), exact near c
        r = []
        for za, zr, ea, er, rho in zp:
            # whitened by the Cholesky factor of the pair's error covariance
            wa = (model_z(eta, th, 1) - za) / ea
            r += [wa, ((model_z(eta, th, -1) - zr) / er - rho * wa) / np.sqrt(1.0 - rho * rho)]
        for z, e, j in sz:
            r.append((model_z(eta, th, 1 if j == "approaching" else -1) - z) / e)
        if pm:
            dist_km = p["distance_kpc"].value * _KPC_KM
            mu_a, mu_r = _proper_motion_rates(b, omb, th * _DEG, dist_km / SPEED_OF_LIGHT_KMS)
            for ma, ea, mr, er in pm:
                r += [(mu_a - ma) / ea, (mu_r - mr) / er]
            r.append((dist_km - d_km) / d_err_km)
        for R, Re, pexp in fr:
            r.append((_counterjet_ratio(b, omb, th * _DEG, pexp) - R) / Re)
        if ba or dl or lim:
            g = np.cosh(eta)
            one_minus = omb + 2.0 * b * np.sin(th * _DEG / 2.0) ** 2  # 1 - beta cos theta, exact near c
            model = {
                "beta_app": b * np.sin(th * _DEG) / one_minus,
                "doppler_factor": 1.0 / (g * one_minus),
                "beta_cos_theta": b * np.cos(th * _DEG),
                "beta": b,
                "viewing_angle": th,
            }
            for v, e in ba:
                r.append((model["beta_app"] - v) / e)
            for v, e in dl:
                r.append((model["doppler_factor"] - v) / e)
            for q, side, bound, scale, pexp in lim:
                m = _counterjet_ratio(b, omb, th * _DEG, pexp) if q == "flux_ratio" else model[q]
                miss = (bound - m) if side == "lower" else (m - bound)
                r.append(max(miss, 0.0) / scale)
        if "beta" in priors:
            r.append((b - priors["beta"][0]) / priors["beta"][1])
        if "viewing_angle" in priors:
            r.append((th - priors["viewing_angle"][0]) / priors["viewing_angle"][1])
        return np.asarray(r, float)

    params = lmfit.Parameters()
    _add_speed(params, 0.5)
    params.add("viewing_angle", value=45.0, min=0.0, max=180.0)
    if pm:
        params.add("distance_kpc", value=d_km / _KPC_KM, min=1e-6)
    # grid start, then refine the best two separated minima
    grid = []
    speeds = (0.05, 0.2, 0.4, 0.6, 0.8, 0.9, 0.97, 0.995) + ((0.999, 0.9999, 0.99999) if (ba or dl) else ())
    angles = np.linspace(2.5, 177.5, 36) if not (ba or dl) else np.concatenate([np.geomspace(0.05, 2.5, 12), np.linspace(2.5, 177.5, 36)])
    for b in speeds:
        for th in angles:
            params["eta"].set(value=np.arctanh(b))
            params["viewing_angle"].set(value=th)
            grid.append((float(np.sum(residual(params) ** 2)), b, th))
    grid.sort()
    if start:
        grid.insert(0, (0.0, start.get("beta", 0.5), start.get("viewing_angle", 45.0)))
    sols = []
    for _, b, th in grid[:6]:
        trial = params.copy()
        trial["eta"].set(value=np.arctanh(b))
        trial["viewing_angle"].set(value=th)
        res = _minimize(residual, trial)
        sols.append((res.chisqr, res))
    sols.sort(key=lambda s: s[0])
    chi, res = sols[0]
    notes = []
    for c2, r2 in sols[1:]:
        if abs(r2.params["viewing_angle"].value - res.params["viewing_angle"].value) > 5 and c2 - chi < 1.0:
            notes.append(
                f"a second solution fits almost as well (delta chi-square {c2 - chi:.2f}): beta = {r2.params['beta'].value:.4f}, "
                f"viewing angle = {r2.params['viewing_angle'].value:.2f} deg; the data do not separate them"
            )
            warnings.warn(notes[-1], DegenerateGeometryWarning, stacklevel=2)
            break
    names = ["eta", "viewing_angle"] + (["distance_kpc"] if pm else [])
    _check_bounds(res.params, names, notes)
    if relativistic:
        _near_c(res.params, notes)
    if lim:  # a limit is not a datum: take it out of the degrees of freedom (and say where one binds)
        res.ndata -= len(lim)
        res.nfree -= len(lim)
        res.redchi = res.chisqr / res.nfree if res.nfree > 0 else np.nan
        rr = np.asarray(residual(res.params), float)[-(len(lim) + len(priors)) :][: len(lim)]
        for (q, side, bound, _scale, _p), v in zip(lim, rr, strict=True):
            if v > 1.0:
                notes.append(
                    f"the {side} limit {q} {'>=' if side == 'lower' else '<='} {bound:g} is not met by the best fit: the data pull against it"
                )
    if res.ndata <= 1:
        notes.append("one measurement cannot fix two parameters: the result is one point of a degenerate curve (see redshift_locus)")
    _quality(res, notes, scale_errors)
    labels = []  # one per residual, in the residual's order (for figures)
    for i in range(len(zp)):
        labels += [f"z pair {i + 1}: approaching", f"z pair {i + 1}: receding"]
    labels += [f"single z {i + 1} ({j})" for i, (_z, _e, j) in enumerate(sz)]
    for i in range(len(pm)):
        labels += [f"proper motion {i + 1}: approaching", f"proper motion {i + 1}: receding"]
    if pm:
        labels.append("distance (its prior)")
    labels += [f"flux ratio {i + 1}" for i in range(len(fr))]
    labels += [f"apparent speed {i + 1}" for i in range(len(ba))]
    labels += [f"Doppler factor {i + 1}" for i in range(len(dl))]
    labels += [f"limit: {q} {'>=' if side == 'lower' else '<='} {bound:g}" for q, side, bound, _s, _p in lim]
    labels += [f"prior on {k.replace('_', ' ')}" for k in ("beta", "viewing_angle") if k in priors]
    model = "constraints" if relativistic else "constraints (Galilean)"
    return KinematicFit(res.params, res, model, notes, {"labels": labels}, residual)


# ---------------------------------------------------------------------------
# Relativistic vs Galilean
# ---------------------------------------------------------------------------
@dataclass
class ModelComparison:
    """Side-by-side relativistic and Galilean fits of the same data."""

    relativistic: KinematicFit
    galilean: KinematicFit

    def table(self):
        """Both fits side by side: the columns of :func:`fits_table` plus ``aic`` and ``bic``."""
        t = fits_table([self.relativistic, self.galilean])
        t.add_column([f.result.aic for f in (self.relativistic, self.galilean)], name="aic", index=t.colnames.index("p_value") + 1)
        t.add_column([f.result.bic for f in (self.relativistic, self.galilean)], name="bic", index=t.colnames.index("aic") + 1)
        return t

    @property
    def delta_chi2(self) -> float:
        """Chi-square of the Galilean fit minus that of the relativistic one (> 25: the data demand relativity)."""
        return float(self.galilean.result.chisqr - self.relativistic.result.chisqr)

    def report(self) -> str:
        """Both readings side by side, their difference and what delta chi-square says."""
        t = self.table()
        lines = ["relativistic vs Galilean reading of the same data", "-" * 50]
        angle = "viewing_angle" if "viewing_angle" in t.colnames else "inclination"
        lines += [
            f"  {row['model']:<28} chi2 {row['chi2']:.4g} (dof {row['dof']}), AIC {row['aic']:.4g}, BIC {row['bic']:.4g}, "
            f"beta {with_error(row['beta'], row['beta_err'])}, {angle.replace('_', ' ')} {row[angle].to_value(u.deg):.3f} deg"
            for row in t
        ]
        dbeta = self.galilean.beta - self.relativistic.beta
        da = (t[angle][1] - t[angle][0]).to_value(u.deg)
        lines.append(f"  Galilean minus relativistic: beta {dbeta:+.5f}, {angle.replace('_', ' ')} {da:+.3f} deg")
        shown = ("the Galilean reading is barely", "poor fit", "a second solution")
        lines += [f"  note (Galilean): {n}" for n in self.galilean.notes if n.startswith(shown)]
        lines.append(
            f"  delta chi-square (Galilean - relativistic) = {self.delta_chi2:.4g}: "
            + (
                "the data demand special relativity (the transverse-Doppler offset)"
                if self.delta_chi2 > 25
                else "the data do not clearly separate the two readings"
            )
        )
        return "\n".join(lines)

    def __str__(self):
        return self.report()

    def _repr_html_(self):
        import html

        return "<pre>" + html.escape(self.report()) + "</pre>"


def compare_models(kind: str, *args, **kwargs) -> ModelComparison:
    """Fit the same data with the relativistic and the Galilean model; report both.

    ``kind`` is "jet-pair" (arguments of :func:`fit_jet_pair`, scalars), "precessing-jet"
    (of :func:`fit_precessing_jet`) or "constraints" (of :func:`fit_constraints`).

    Parameters
    ----------
    kind : {"jet-pair", "precessing-jet", "constraints"}
    *args, **kwargs
        Passed to the fitting function of that kind (without ``relativistic``).

    Returns
    -------
    ModelComparison
        ``.relativistic`` and ``.galilean`` fits, ``.table()``, ``.delta_chi2``, ``.report()``.
    """
    funcs = {"jet-pair": fit_jet_pair, "precessing-jet": fit_precessing_jet, "constraints": fit_constraints}
    if kind not in funcs:
        raise ValueError(f"kind must be one of {sorted(funcs)}, got {kind!r}")
    f = funcs[kind]
    with warnings.catch_warnings():
        # the Galilean fit often ends at a bound, fits poorly or has two solutions (that is what the
        # comparison shows): its notes say so, and the report prints its chi-square and those notes
        for w in (FitAtBoundWarning, FitQualityWarning, DegenerateGeometryWarning):
            warnings.simplefilter("ignore", w)
        gal = f(*args, relativistic=False, **kwargs)
    rel = f(*args, relativistic=True, **kwargs)
    if gal.beta > 0.99 or not gal.beta_err < gal.beta:
        gal.notes.append(
            f"the Galilean reading is barely constrained (beta = {gal.beta:.4f} +/- {gal.beta_err:.2g}): with no transverse term "
            "it cannot produce the data's mean redshift, so compare chi-square, not parameters"
        )
    return ModelComparison(rel, gal)
