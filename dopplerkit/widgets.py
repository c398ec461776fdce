"""Notebook widgets: a spectrum explorer, a beta-viewing angle constraint plane, a precessing-jet
explorer, an outflow explorer and a population explorer of batch results.

Each widget is a plain *state* object (no ipywidgets, testable without a browser) and a
*view* that binds ipywidgets controls to it. The matplotlib figure of a view is created once;
a control change updates the state, then only the changed artists (``set_data``), and the
figure is re-rendered into an ``ipywidgets.Image`` (PNG), which works the same in JupyterLab,
classic notebooks and Voila without a plotting extension. Fits run only on a button press.

CSS classes (stable hooks for tests and styling): ``dk-explorer``, ``dk-speed``,
``dk-speed-text``, ``dk-angle``, ``dk-readout``, ``dk-figure``, ``dk-fit``, ``dk-plane``,
``dk-precession``, ``dk-outflow``, ``dk-population``.
"""

from __future__ import annotations

import io
from dataclasses import dataclass, field
from typing import ClassVar

import astropy.units as u
import numpy as np

from .kinematics import SPEED_OF_LIGHT_KMS, apparent_speed, beaming_factor, doppler_factor, lorentz_factor, redshift

__all__ = [
    "ConstraintPlane",
    "ExplorerState",
    "OutflowExplorer",
    "OutflowState",
    "PlaneState",
    "PopulationExplorer",
    "PopulationState",
    "PrecessionExplorer",
    "PrecessionState",
    "SpectrumExplorer",
]

from .plotting import PALETTE

BEAMING_CHOICES = {"none": None, "blob": "blob", "continuous jet": "jet"}

#: Figures are rendered at this many device pixels per CSS pixel (crisp on high-density
#: screens) and shown at their nominal size (96 CSS px per inch).
PIXEL_RATIO = 2
_CSS_DPI = 96


def _widgets():
    """ipywidgets, or an ImportError naming the extra that installs it."""
    from ._optional import require

    return require("ipywidgets", "dopplerkit.widgets")


def _figure(width_in: float, height_in: float):
    """A figure rendered at PIXEL_RATIO x 96 dpi (shown at 96 css px per inch by :func:`_image`)."""
    from matplotlib.figure import Figure

    return Figure(figsize=(width_in, height_in), dpi=_CSS_DPI * PIXEL_RATIO, layout="constrained")


def _image(fig):
    """An image widget showing ``fig`` at its nominal size in CSS pixels, never wider than the page."""
    W = _widgets()

    w = int(fig.get_figwidth() * _CSS_DPI)
    img = W.Image(format="png", layout=W.Layout(width=f"{w}px", max_width="100%", height="auto"))
    img.add_class("dk-figure")
    return img


def _agg(fig):
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    if not isinstance(fig.canvas, FigureCanvasAgg):
        FigureCanvasAgg(fig)
        fig.canvas.draw()  # lay out once with the constrained engine, then freeze the layout:
        fig.set_layout_engine("none")  # re-solving it costs more than drawing, on every slider move
    return fig.canvas


def _png(canvas) -> bytes:
    from PIL import Image

    w, h = canvas.get_width_height(physical=True)
    img = Image.frombuffer("RGBA", (w, h), canvas.buffer_rgba(), "raw", "RGBA", 0, 1)
    buf = io.BytesIO()
    img.save(buf, format="png", compress_level=1)  # fast encode: this runs per slider move
    return buf.getvalue()


def _render(fig) -> bytes:
    """PNG bytes of a whole figure through an Agg canvas attached once (no pyplot, no global state)."""
    canvas = _agg(fig)
    canvas.draw()
    return _png(canvas)


class _Blitter:
    """Redraw only the artists that move: the static part (axes, ticks, labels) is drawn once.

    ``full()`` redraws everything (after a change of axis limits); ``frame()`` restores the
    static background and draws the moving artists on it. Both return PNG bytes.
    """

    def __init__(self, fig, artists):
        self.fig = fig
        self.artists = list(artists)
        for a in self.artists:
            a.set_animated(True)
        self.canvas = _agg(fig)
        self.background = None

    def full(self) -> bytes:
        self.canvas.draw()
        self.background = self.canvas.copy_from_bbox(self.fig.bbox)
        return self._draw_moving()

    def frame(self) -> bytes:
        if self.background is None:
            return self.full()
        self.canvas.restore_region(self.background)
        return self._draw_moving()

    def _draw_moving(self) -> bytes:
        for a in self.artists:
            a.axes.draw_artist(a)
        return _png(self.canvas)


# ---------------------------------------------------------------------------
# 1. Spectrum explorer
# ---------------------------------------------------------------------------
@dataclass
class ExplorerState:
    """What the spectrum explorer shows, as plain data.

    Attributes
    ----------
    axis, flux : ndarray
        Source-frame (comoving) spectrum; axis in ``axis_unit`` (vacuum if a wavelength).
    lines : dict
        Line label -> rest position in ``axis_unit``.
    beta : float
        Speed v/c; ``speed_mode`` "gamma" shows and edits the Lorentz factor instead.
    angle_deg : float
        Observer-frame viewing angle of the approaching jet (0 = straight at us).
    beaming : {None, "blob", "jet"}
    z_cosmo : float
        Host cosmological redshift, composed as (1 + z_cosmo)/delta.
    opening_deg : float
        Half-opening angle of the jet cone; > 0 averages the observed spectrum over the cone.
    """

    axis: np.ndarray
    flux: np.ndarray
    axis_unit: str = "Angstrom"
    flux_unit: str = "erg / (s cm2 Angstrom)"
    lines: dict = field(default_factory=dict)
    beta: float = 0.24  # the invented binary DKX-1 of data_demo/
    angle_deg: float = 57.0
    beaming: str | None = None
    z_cosmo: float = 0.0
    opening_deg: float = 0.0
    speed_mode: str = "beta"
    alpha: float = 0.7

    @classmethod
    def synthetic(cls, lines=("H-alpha", "He I 5876", "H-beta"), **kw):
        """A flat continuum with Gaussian emission lines (invented source spectrum)."""
        from .lines import rest_value

        axis = np.linspace(3500.0, 10500.0, 2400)
        rest = {name: rest_value(name, "Angstrom", medium="vacuum").value for name in lines}
        flux = np.ones_like(axis)
        for k, r in enumerate(rest.values()):
            sg = r * 400.0 / SPEED_OF_LIGHT_KMS / 2.3548
            flux += (2.5 / (k + 1)) * np.exp(-0.5 * ((axis - r) / sg) ** 2)
        return cls(axis=axis, flux=flux, lines=rest, **kw)

    @classmethod
    def from_spectrum(cls, spectrum, lines=("H-alpha",), medium="vacuum", **kw):
        """From a source-frame specutils Spectrum."""
        from .lines import rest_value

        unit = spectrum.spectral_axis.unit
        rest = {name: rest_value(name, unit, medium=medium).value for name in lines}
        order = np.argsort(spectrum.spectral_axis.value)
        return cls(
            axis=np.asarray(spectrum.spectral_axis.value)[order],
            flux=np.asarray(spectrum.flux.value)[order],
            axis_unit=unit.to_string(),
            flux_unit=spectrum.flux.unit.to_string(),
            lines=rest,
            **kw,
        )

    # -- physics, all from the kinematics core and dopplerkit.spectra -------------------
    @property
    def gamma(self) -> float:
        """Lorentz factor of the current speed."""
        return float(lorentz_factor(self.beta))

    def set_speed(self, value: float) -> None:
        """Set the speed in the current mode: beta in [0, 1) or the Lorentz factor >= 1."""
        if self.speed_mode == "gamma":
            g = float(value)
            self.beta = float(np.sqrt((g - 1) * (g + 1)) / g) if g >= 1 else 0.0
        else:
            self.beta = float(value)

    def parameters(self) -> dict:
        """The explored scenario as plain numbers (speed v/c, viewing angle in deg: 0 = towards us)."""
        return {
            "beta": float(self.beta),
            "gamma": float(self.gamma),
            "viewing_angle": float(self.angle_deg),
            "beaming": self.beaming,
            "alpha": float(self.alpha),
            "z_cosmo": float(self.z_cosmo),
            "opening_angle": float(self.opening_deg),
        }

    def snippet(self) -> str:
        """Python lines that reproduce this scenario with the library (to paste into a notebook or script)."""
        p = self.parameters()
        geometry = p["beaming"] or "blob"
        return "\n".join(
            [
                "import dopplerkit as dk",
                f"params = {p!r}  # angles in deg (0 = moving straight at us)",
                'delta = dk.doppler_factor(params["beta"], params["viewing_angle"])',
                'z_jet, z_counterjet = dk.redshift(params["beta"], params["viewing_angle"]), dk.redshift(params["beta"], 180 - params["viewing_angle"])',
                'z_total = dk.compose_redshift(params["z_cosmo"], z_jet)',
                f'boost = dk.beaming_factor(params["beta"], params["viewing_angle"], params["alpha"], geometry="{geometry}")',
            ]
        )

    def readouts(self) -> dict:
        """Gamma, delta, z (kinematic and total), apparent speed and boosts of the approaching jet."""
        th = self.angle_deg * u.deg
        d = float(doppler_factor(self.beta, th))
        z = float(redshift(self.beta, th))
        q = self.beaming or "blob"
        return {
            "gamma": self.gamma,
            "delta": d,
            "z": z,
            "z_total": (1 + self.z_cosmo) * (1 + z) - 1,
            "z_counterjet": float(redshift(self.beta, 180 * u.deg - th)),
            "apparent_speed": float(apparent_speed(self.beta, th)),
            "boost": float(beaming_factor(self.beta, th, self.alpha, q)) if self.beaming else 1.0,
            "boost_geometry": q if self.beaming else "none",
        }

    def observed(self, which: str = "approaching"):
        """Observed (axis, flux) of the approaching or receding jet, averaged over the cone if opening_deg > 0."""
        from .models import cone_directions
        from .spectra import boost_arrays

        th = self.angle_deg if which == "approaching" else 180.0 - self.angle_deg
        kw = {"beaming": self.beaming, "z_cosmo": self.z_cosmo}
        if self.opening_deg <= 0:
            return boost_arrays(self.axis, self.flux, self.axis_unit, self.flux_unit, self.beta, th * u.deg, **kw)
        cps, w = cone_directions(th * u.deg, self.opening_deg * u.deg, n_polar=6, n_azimuth=12)
        axes, fluxes = boost_arrays(
            self.axis, self.flux, self.axis_unit, self.flux_unit, self.beta, np.arccos(np.clip(cps, -1, 1)) * u.rad, **kw
        )
        grid = boost_arrays(self.axis, None, self.axis_unit, None, self.beta, th * u.deg, z_cosmo=self.z_cosmo)[0]
        total = np.zeros_like(grid)
        for ax, f, wi in zip(axes, fluxes, w, strict=True):
            order = np.argsort(ax)  # frequency-like axes come out in the input's order
            total += wi * np.interp(grid, ax[order], f[order], left=np.nan, right=np.nan)
        return grid, total

    def shifted_lines(self, which: str = "approaching") -> dict:
        """Observed positions of the lines (label -> position in axis unit)."""
        from .spectra import boost_arrays

        th = self.angle_deg if which == "approaching" else 180.0 - self.angle_deg
        pos, _ = boost_arrays(np.array(list(self.lines.values())), None, self.axis_unit, None, self.beta, th * u.deg, z_cosmo=self.z_cosmo)
        return dict(zip(self.lines, pos.tolist(), strict=True))


class SpectrumExplorer:
    """Interactive spectrum explorer (speed, angle, beaming, host redshift, cone opening).

    Parameters
    ----------
    spectrum : specutils.Spectrum, optional
        Source-frame spectrum; default a synthetic one with H-alpha, He I 5876 and H-beta.
    lines : sequence of str
        Lines to mark (catalogue names).
    observed : specutils.Spectrum, optional
        An observed spectrum to overlay; enables the fit button (a jet pair in ``lines[0]``).
    """

    def __init__(self, spectrum=None, lines=("H-alpha", "He I 5876", "H-beta"), observed=None, state: ExplorerState | None = None):
        W = _widgets()

        if state is None:
            state = ExplorerState.from_spectrum(spectrum, lines) if spectrum is not None else ExplorerState.synthetic(lines)
        self.state = state
        self.observed_spectrum = observed
        s = state
        # controls
        self.speed_mode = W.ToggleButtons(
            options=[("beta", "beta"), ("Lorentz factor", "gamma")], value=s.speed_mode, description="speed as"
        )
        self.speed = W.FloatSlider(
            value=s.beta, min=0.0, max=0.995, step=0.001, description="beta", readout_format=".3f", continuous_update=True
        )
        # exact entry: any value the mode allows; a refused or off-slider value is explained in speed_note
        self.speed_text = W.FloatText(value=s.beta, step=0.001, description="exact", layout=W.Layout(width="170px"))
        self.speed_note = W.HTML()
        self.angle = W.FloatSlider(value=s.angle_deg, min=0.0, max=180.0, step=0.5, description="angle (deg)", readout_format=".1f")
        self.beaming = W.ToggleButtons(options=list(BEAMING_CHOICES), value="none", description="beaming")
        self.z_cosmo = W.FloatSlider(value=s.z_cosmo, min=0.0, max=3.0, step=0.01, description="host z")
        self.opening = W.FloatSlider(value=s.opening_deg, min=0.0, max=30.0, step=0.5, description="cone (deg)")
        self.hold = W.Checkbox(value=False, description="hold range", indent=False, layout=W.Layout(width="110px"))
        self.flux_scale = W.ToggleButtons(options=["linear", "log"], value="linear", description="flux scale")
        self.range_note = W.HTML()
        self.readout = W.HTML()
        self.fit_button = W.Button(
            description="fit observed",
            icon="crosshairs",
            tooltip=f"measure a jet pair of {next(iter(s.lines))} in the observed spectrum and fit speed and angle",
        )
        if observed is None:  # nothing to fit: no button (rather than a grey one)
            self.fit_button.layout.display = "none"
        self.fit_result = W.HTML()
        self.reset_button = W.Button(description="reset", icon="undo", tooltip="back to the starting scenario")
        self.copy_button = W.Button(description="copy parameters", icon="clipboard", tooltip="show Python lines for this scenario")
        self.snippet = W.Textarea(layout=W.Layout(width="100%", height="8em", display="none"))
        self._initial = {k: getattr(s, k) for k in ("beta", "angle_deg", "beaming", "z_cosmo", "opening_deg", "speed_mode")}
        # figure, created once, and the image that shows it
        self.fig = _figure(8.0, 4.2)
        self.image = _image(self.fig)
        for w, cls in (
            (self.speed, "dk-speed"),
            (self.speed_text, "dk-speed-text"),
            (self.angle, "dk-angle"),
            (self.readout, "dk-readout"),
            (self.fit_button, "dk-fit"),
            (self.speed_note, "dk-speed-note"),
            (self.range_note, "dk-range-note"),
            (self.hold, "dk-hold"),
            (self.flux_scale, "dk-flux-scale"),
        ):
            w.add_class(cls)
        ax0, ax1 = self.fig.subplots(2, 1, sharex=False)
        self.ax_src, self.ax_obs = ax0, ax1
        unit = u.Unit(s.axis_unit)
        ax0.plot(s.axis, s.flux, color=PALETTE["neutral"], lw=1)
        for name, r in s.lines.items():
            ax0.axvline(r, color=PALETTE["highlight"], lw=0.8, ls=":")
            ax0.text(r, 1.02, name, transform=ax0.get_xaxis_transform(), fontsize=7, ha="center", color=PALETTE["neutral"])
        ax0.set_title("source frame", fontsize=9, loc="right")
        ax0.set_ylabel("flux density\n(relative)", fontsize=8)
        ax1.set_ylabel("flux density\n(relative)", fontsize=8)
        (self.l_app,) = ax1.plot([], [], color=PALETTE["approaching"], lw=1, label="approaching jet")
        (self.l_rec,) = ax1.plot([], [], color=PALETTE["receding"], lw=1, ls="--", label="receding jet")
        self.l_obs = None
        if observed is not None:
            (self.l_obs,) = ax1.plot(
                observed.spectral_axis.to_value(unit, equivalencies=u.spectral()),
                observed.flux.value / np.nanmedian(observed.flux.value),
                color="0.55",
                lw=0.7,
                label="observed",
            )
        self.markers = {n: ax1.axvline(np.nan, color=PALETTE["approaching"], lw=0.6, ls=":") for n in s.lines}
        self.marker_labels = {
            n: ax1.text(0, 1.02, n, transform=ax1.get_xaxis_transform(), fontsize=7, ha="center", color=PALETTE["approaching"])
            for n in s.lines
        }
        ax1.set_xlim(s.axis.min() * 0.6, s.axis.max() * 1.4)
        kind = "wavelength" if unit.is_equivalent(u.m) else ("energy" if unit.is_equivalent(u.J) else "frequency")
        ax0.set_xlabel(f"{kind} in the gas's frame ({unit.to_string()})", fontsize=8)
        ax1.set_xlabel(f"observed {kind} ({unit.to_string()})")
        ax1.set_title("observer frame", fontsize=9, loc="right")
        ax1.legend(fontsize=7, frameon=False, loc="upper right")
        self._busy = False
        self._top = None
        self.blit = _Blitter(self.fig, [self.l_app, self.l_rec, *self.markers.values(), *self.marker_labels.values()])
        # wiring
        self.speed_mode.observe(self._on_mode, "value")
        self.speed.observe(self._on_speed, "value")
        self.speed_text.observe(self._on_speed_text, "value")
        self.angle.observe(self._on_change, "value")
        self.beaming.observe(self._on_change, "value")
        self.z_cosmo.observe(self._on_change, "value")
        self.opening.observe(self._on_change, "value")
        self.hold.observe(self._on_change, "value")
        self.flux_scale.observe(self._on_scale, "value")
        self.fit_button.on_click(self._on_fit)
        self.reset_button.on_click(self._on_reset)
        self.copy_button.on_click(self._on_copy)
        self.widget = W.VBox(
            [
                W.HBox([self.speed_mode]),
                W.HBox([self.speed, self.speed_text, self.speed_note]),
                W.HBox([self.angle, self.beaming]),
                W.HBox([self.z_cosmo, self.opening]),
                W.HBox([self.flux_scale, self.hold]),
                self.readout,
                self.image,
                self.range_note,
                W.HBox([self.fit_button, self.reset_button, self.copy_button, self.fit_result]),
                self.snippet,
            ]
        )
        self.widget.add_class("dk-explorer")
        self.update()

    # -- callbacks --------------------------------------------------------------------
    def _sync_state(self):
        s = self.state
        s.angle_deg = float(self.angle.value)
        s.beaming = BEAMING_CHOICES[self.beaming.value]
        s.z_cosmo = float(self.z_cosmo.value)
        s.opening_deg = float(self.opening.value)

    def _on_reset(self, _button=None):
        """Every control back to the starting scenario."""
        init = self._initial
        self.speed_mode.value = "beta"
        self.hold.value = False
        self.flux_scale.value = "linear"
        self.beaming.value = next(k for k, v in BEAMING_CHOICES.items() if v == init["beaming"])
        self.z_cosmo.value = init["z_cosmo"]
        self.opening.value = init["opening_deg"]
        self.angle.value = init["angle_deg"]
        self.speed.value = init["beta"]
        self.update()

    def _on_copy(self, _button=None):
        """Show the scenario as Python lines, selected, ready to copy."""
        self.snippet.value = self.state.snippet()
        self.snippet.layout.display = None

    def _on_mode(self, change):
        s = self.state
        s.speed_mode = change["new"]
        self._busy = True
        try:
            # widen before narrowing, so min never exceeds max on the way
            if s.speed_mode == "gamma":
                self.speed.description = "Lorentz factor"
                self.speed.max, self.speed.min, self.speed.step = 10.0, 1.0, 0.001
                v = s.gamma
            else:
                self.speed.description = "beta"
                self.speed.min, self.speed.max, self.speed.step = 0.0, 0.995, 0.001
                v = s.beta
            self.speed.value = min(max(v, self.speed.min), self.speed.max)
            self.speed_text.value = v
        finally:
            self._busy = False
        self.update()

    def _on_speed(self, change):
        if self._busy:
            return
        self.state.set_speed(change["new"])
        self._busy = True
        self.speed_text.value = change["new"]
        self._busy = False
        self.speed_note.value = ""
        self.update()

    def speed_limits(self) -> tuple[float, float, str]:
        """(lowest, highest allowed, rule) for an exact speed in the current mode."""
        if self.state.speed_mode == "gamma":
            return 1.0, np.inf, "a Lorentz factor must be >= 1"
        return 0.0, 1.0, "beta must be in [0, 1)"

    def _on_speed_text(self, change):
        if self._busy:
            return
        v = change["new"]
        lo, hi, rule = self.speed_limits()
        mode = "Lorentz factor" if self.state.speed_mode == "gamma" else "beta"
        current = self.state.gamma if self.state.speed_mode == "gamma" else self.state.beta
        if not (np.isfinite(v) and lo <= v < hi):
            # refused, said so, and the box shows the value in use again
            self.speed_note.value = f"<span style='color:{PALETTE['receding']}'>{rule}: {v:g} not used; still {current:.6g}</span>"
            self._busy = True
            self.speed_text.value = current
            self._busy = False
            return
        self.state.set_speed(v)
        self._busy = True
        self.speed.value = min(max(v, self.speed.min), self.speed.max)
        self._busy = False
        if not (self.speed.min <= v <= self.speed.max):
            self.speed_note.value = f"{mode} {v:.6g} is beyond the slider (up to {self.speed.max:g}): the slider rests at its end; the figure and read-out use {v:.6g}"
        else:
            self.speed_note.value = ""
        self.update()

    def _on_scale(self, change):
        self.ax_obs.set_yscale("log" if change["new"] == "log" else "linear")
        self._top = None  # new limits and a full redraw
        self.update()

    def _on_change(self, _change=None):
        self.update()

    def update(self):
        """State -> artists (set_data) -> one re-render of the figure."""
        self._sync_state()
        s = self.state
        r = s.readouts()
        cells = [
            ("Lorentz factor", f"{r['gamma']:.5f}"),
            ("Doppler factor", f"<b class='dk-delta'>{r['delta']:.5f}</b>"),
            ("z jet / counter-jet", f"{r['z']:+.5f} / {r['z_counterjet']:+.5f}"),
            ("z with host", f"{r['z_total']:+.5f}"),
            ("apparent speed", f"{r['apparent_speed']:.4f} c"),
            (f"boost ({r['boost_geometry']}, alpha {s.alpha:g})", f"{r['boost']:.4g}"),
        ]
        head = "".join(f"<th style='padding:0 12px 0 0;font-weight:normal;color:#666'>{k}</th>" for k, _ in cells)
        body = "".join(f"<td style='padding:0 12px 0 0'>{v}</td>" for _, v in cells)
        self.readout.value = f"<table class='dk-readout-text'><tr>{head}</tr><tr>{body}</tr></table>"
        x, f = s.observed("approaching")
        self.l_app.set_data(x, f)
        xr, fr = s.observed("receding")
        self.l_rec.set_data(xr, fr)
        # the observed panel follows the shifted spectra (a full redraw only when they leave it or fill a
        # small part), unless "hold range" keeps the limits the user is looking at
        lo, hi = float(np.nanmin([np.nanmin(x), np.nanmin(xr)])), float(np.nanmax([np.nanmax(x), np.nanmax(xr)]))
        x0, x1 = self.ax_obs.get_xlim()
        refit = not self.hold.value and not (x0 <= lo and hi <= x1 and (hi - lo) > 0.5 * (x1 - x0))
        if refit:
            pad = 0.03 * (hi - lo)
            self.ax_obs.set_xlim(lo - pad, hi + pad)
            x0, x1 = lo - pad, hi + pad
        # line labels: staggered in height where they would overlap
        placed = []
        outside = []
        unit = u.Unit(s.axis_unit).to_string()
        for n, pos in sorted(s.shifted_lines("approaching").items(), key=lambda kv: kv[1]):
            self.markers[n].set_xdata([pos, pos])
            if not x0 <= pos <= x1:
                outside.append(f"{n} at {pos:.6g} {unit}")
            frac = (pos - x0) / (x1 - x0)
            level = 0
            while any(abs(frac - f0) < 0.09 and lv == level for f0, lv in placed):
                level += 1
            placed.append((frac, level))
            self.marker_labels[n].set_position((pos, 1.02 + 0.09 * level))
        self.range_note.value = (
            f"<span class='dk-outside' style='color:{PALETTE['receding']}'>outside the shown range (hold range is on): "
            + ", ".join(outside)
            + f"; shown {x0:.6g} to {x1:.6g} {unit}</span>"
            if outside
            else ""
        )
        top = float(np.nanmax([np.nanmax(f), np.nanmax(fr), 2.0]))
        log = self.flux_scale.value == "log"
        if refit or self._top is None or not (0.3 * self._top < top < self._top):
            # rescale (a full redraw) only when the curves leave the frame or shrink a lot
            self._top = 1.5 * top
            if log:
                positive = np.concatenate([f[np.isfinite(f) & (f > 0)], fr[np.isfinite(fr) & (fr > 0)]])
                bottom = 0.5 * float(positive.min()) if positive.size else 1e-3 * self._top
                self.ax_obs.set_ylim(max(bottom, 1e-6 * self._top), 2.0 * self._top)
            else:
                self.ax_obs.set_ylim(0, self._top)
            self.image.value = self.blit.full()
        else:
            self.image.value = self.blit.frame()

    def _on_fit(self, _button=None):
        from .fitting import fit_jet_pair
        from .measure import measure_lines

        obs = self.observed_spectrum
        name = next(iter(self.state.lines))
        try:
            t = measure_lines(obs, name, components=2, method="fast", medium="vacuum")
            f = fit_jet_pair(t["z"][0], t["z"][1], t["z_err"][0], t["z_err"][1])
        except Exception as exc:  # show the reason in the widget, never a silent failure
            self.fit_result.value = f"<span style='color:{PALETTE['receding']}'>fit failed: {exc}</span>"
            return None
        self.speed_mode.value = "beta"
        self.speed_text.value = f.beta
        self.angle.value = float(f.value("viewing_angle"))
        from ._format import with_error

        warn = [
            f"{t['label'][i] if 'label' in t.colnames else name} {t['status'][i]}: {t['message'][i]}"
            for i in range(len(t))
            if t["status"][i] != "ok"
        ]
        notes = list(f.notes) + warn
        text = (
            f"best fit: beta = {with_error(f.beta, f.beta_err)}, "
            f"viewing angle = {with_error(f.value('viewing_angle'), f.error('viewing_angle'))} deg"
        )
        if notes:
            text += f"<br><span style='color:{PALETTE['receding']}'>" + "; ".join(notes) + "</span>"
        self.fit_result.value = text
        return f

    def _ipython_display_(self):
        from IPython.display import display

        display(self.widget)


# ---------------------------------------------------------------------------
# 2. Constraint plane
# ---------------------------------------------------------------------------
@dataclass
class PlaneState:
    """Measurements constraining (beta, viewing angle), and their joint solution."""

    measurements: list = field(default_factory=list)
    solution: object = None

    KINDS: ClassVar[dict] = {
        "z pair": "z_approaching, z_receding, error",
        "single z": "z, error (approaching jet)",
        "proper motions": "mu_a, mu_r (mas/d), error, distance (kpc), distance error",
        "flux ratio": "R, error, alpha (continuous jet)",
        "apparent speed": "beta_app, error (units of c)",
        "Doppler factor": "delta, error",
        "counter-jet limit": "jet flux, counter-jet upper limit (same unit), alpha (continuous jet)",
    }

    def add(self, kind: str, values):
        """Add a measurement of a kind in ``KINDS`` from its values (numbers or text); ValueError names a bad one."""
        if kind not in self.KINDS:
            raise ValueError(f"kind must be one of {list(self.KINDS)}, got {kind!r}")
        need = {
            "z pair": 3,
            "single z": 2,
            "proper motions": 5,
            "flux ratio": 3,
            "apparent speed": 2,
            "Doppler factor": 2,
            "counter-jet limit": 3,
        }[kind]
        vals = [float(v) for v in values]
        if len(vals) != need:
            raise ValueError(f"{kind} needs {need} numbers ({self.KINDS[kind]}), got {len(vals)}")
        self.measurements.append((kind, tuple(vals)))
        self.solution = None

    def remove(self, index: int):
        """Remove the measurement at this position."""
        del self.measurements[index]
        self.solution = None

    def label(self, m) -> str:
        """Text that names a measurement in the list and the legend."""
        kind, v = m
        return f"{kind}: " + ", ".join(f"{x:g}" for x in v)

    def chi2(self, m):
        """A function (beta, theta_deg) -> chi-square of one measurement, for the bands (models from dopplerkit.kinematics)."""
        from .kinematics import jet_counterjet_ratio, proper_motions

        kind, v = m
        if kind == "z pair":
            za, zr, e = v
            return lambda b, th: ((redshift(b, th * u.deg) - za) / e) ** 2 + ((redshift(b, (180 - th) * u.deg) - zr) / e) ** 2
        if kind == "single z":
            z, e = v
            return lambda b, th: ((redshift(b, th * u.deg) - z) / e) ** 2
        if kind == "proper motions":
            ma, mr, e, dist, _de = v

            def f(b, th):
                mu_a, mu_r = proper_motions(b, th * u.deg, dist * u.kpc)
                return ((mu_a.value - ma) / e) ** 2 + ((mu_r.value - mr) / e) ** 2

            return f
        if kind == "apparent speed":
            ba, e = v
            return lambda b, th: ((apparent_speed(b, th * u.deg) - ba) / e) ** 2
        if kind == "Doppler factor":
            d, e = v
            return lambda b, th: ((doppler_factor(b, th * u.deg) - d) / e) ** 2
        if kind == "counter-jet limit":  # the allowed side: chi-square 0 there, large beyond (drawn as a region)
            from .kinematics import counterjet_limit

            low = float(counterjet_limit(v[0], v[1], v[2], "jet"))
            return lambda b, th: np.where(b * np.cos(np.radians(th)) >= low, 0.0, 100.0)
        R, e, alpha = v
        return lambda b, th: ((jet_counterjet_ratio(b, th * u.deg, alpha, "jet") - R) / e) ** 2

    def solve(self):
        """The joint solution of every measurement (:func:`dopplerkit.fitting.fit_constraints`)."""
        from .fitting import fit_constraints
        from .kinematics import counterjet_limit

        kw = {
            "z_pairs": [],
            "single_z": [],
            "proper_motions": [],
            "flux_ratios": [],
            "apparent_speeds": [],
            "doppler_factors": [],
            "limits": [],
        }
        distance = None
        for kind, v in self.measurements:
            if kind == "z pair":
                kw["z_pairs"].append((v[0], v[1], v[2], v[2]))
            elif kind == "single z":
                kw["single_z"].append((v[0], v[1], "approaching"))
            elif kind == "proper motions":
                mpd = u.mas / u.d
                kw["proper_motions"].append((v[0] * mpd, v[2] * mpd, v[1] * mpd, v[2] * mpd))
                distance = (v[3] * u.kpc, v[4] * u.kpc)
            elif kind == "apparent speed":
                kw["apparent_speeds"].append(v)
            elif kind == "Doppler factor":
                kw["doppler_factors"].append(v)
            elif kind == "counter-jet limit":
                kw["limits"].append({"quantity": "beta_cos_theta", "lower": float(counterjet_limit(v[0], v[1], v[2], "jet"))})
            else:
                kw["flux_ratios"].append((v[0], v[1], v[2], "jet"))
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            self.solution = fit_constraints(distance=distance, **kw)
        return self.solution


class ConstraintPlane:
    """The beta-viewing angle plane: measurement bands (1 sigma shaded, 2 sigma outlined) and the joint solution."""

    def __init__(self, state: PlaneState | None = None):
        W = _widgets()

        self.state = state or PlaneState()
        wide = {"description_width": "initial"}  # labels in full ("measurement", not "measure...")
        self.kind = W.Dropdown(options=list(PlaneState.KINDS), description="measurement", style=wide)
        self.values = W.Text(
            placeholder=PlaneState.KINDS[self.kind.value], description="values", style=wide, layout=W.Layout(width="420px")
        )
        self.add_button = W.Button(description="add", icon="plus")
        self.listing = W.Select(options=[], rows=5, description="using", style=wide, layout=W.Layout(width="520px"))
        self.remove_button = W.Button(description="remove", icon="minus")
        self.solve_button = W.Button(description="joint solution", icon="crosshairs")
        self.message = W.HTML()
        self.fig = _figure(6.0, 4.2)
        self.image = _image(self.fig)
        self.ax = self.fig.subplots()
        self.kind.observe(lambda c: setattr(self.values, "placeholder", PlaneState.KINDS[c["new"]]), "value")
        self.add_button.on_click(self._on_add)
        self.remove_button.on_click(self._on_remove)
        self.solve_button.on_click(self._on_solve)
        self.widget = W.VBox(
            [
                W.HBox([self.kind, self.values, self.add_button]),
                W.HBox([self.listing, W.VBox([self.remove_button, self.solve_button])]),
                self.message,
                self.image,
            ]
        )
        self.widget.add_class("dk-plane")
        self.redraw()

    def _on_add(self, _b=None):
        try:
            self.state.add(self.kind.value, [v for v in self.values.value.replace(",", " ").split()])
        except ValueError as exc:
            self.message.value = f"<span style='color:{PALETTE['receding']}'>{exc}</span>"
            return
        self.message.value = ""
        self.values.value = ""
        self.redraw()

    def _on_remove(self, _b=None):
        if self.listing.index is not None:
            self.state.remove(self.listing.index)
            self.redraw()

    def _on_solve(self, _b=None):
        if not self.state.measurements:
            self.message.value = "add a measurement first"
            return
        f = self.state.solve()
        notes = ("<br>" + "<br>".join(f.notes)) if f.notes else ""
        self.message.value = f"joint solution: beta = {f.beta:.4f} &plusmn; {f.beta_err:.2g}, angle = {f.value('viewing_angle'):.2f} &plusmn; {f.error('viewing_angle'):.2g} deg{notes}"
        self.redraw()

    def redraw(self):
        """Draw every band and the joint solution again (after a change of the state)."""
        from .plotting import plot_constraint_plane

        self.listing.options = [self.state.label(m) for m in self.state.measurements]
        self.ax.clear()
        bands = [{"label": self.state.label(m), "chi2": self.state.chi2(m)} for m in self.state.measurements]
        # jets of active galaxies crowd under beta = 1: their measurements switch to a Lorentz-factor axis and small angles
        agn = any(kind in ("apparent speed", "Doppler factor", "counter-jet limit") for kind, _v in self.state.measurements)
        plot_constraint_plane(
            bands,
            solution=self.state.solution,
            ax=self.ax,
            n_theta=181,
            speed_axis="gamma" if agn else "beta",
            theta_max=45.0 if agn else 180.0,
        )
        self.image.value = _render_fresh(self.fig)  # the legend above the plane changes size

    def _ipython_display_(self):
        from IPython.display import display

        display(self.widget)


# ---------------------------------------------------------------------------
# 3. Precessing-jet explorer
# ---------------------------------------------------------------------------
@dataclass
class PrecessionState:
    """Time series of the two moving lines and the five model parameters."""

    t: np.ndarray
    z_1: np.ndarray
    z_2: np.ndarray
    z_err: np.ndarray
    beta: float = 0.25
    inclination: float = 70.0
    cone_angle: float = 20.0
    period: float = 120.0
    t0: float = 0.0

    def model(self, t=None):
        """Model redshifts of both jets at times ``t`` (default the data's), from the current parameters."""
        from .models import precessing_jet_redshifts

        t = self.t if t is None else t
        return precessing_jet_redshifts(t, self.beta, self.inclination * u.deg, self.cone_angle * u.deg, self.period, self.t0)

    def residuals(self):
        """Residuals of each measured line from the nearer model curve, in units of z."""
        m1, m2 = self.model()
        out = []
        for z in (self.z_1, self.z_2):
            d1, d2 = z - m1, z - m2
            out.append(np.where(np.abs(d1) < np.abs(d2), d1, d2))
        return out

    def fit(self):
        """Fit the precessing-jet model to the data from the current parameters; the state takes the fitted values."""
        from .fitting import fit_precessing_jet

        f = fit_precessing_jet(self.t, self.z_1, self.z_2, self.z_err)
        for k in ("beta", "inclination", "cone_angle", "period", "t0"):
            setattr(self, k, float(f.value(k)))
        return f


class PrecessionExplorer:
    """Model curves of two precessing jets over time-series data, five sliders, a fit button, residuals."""

    def __init__(self, state: PrecessionState):
        W = _widgets()

        self.state = s = state
        span = float(np.ptp(s.t)) or 1.0
        self.sliders = {
            "beta": W.FloatSlider(value=s.beta, min=0.0, max=0.99, step=0.001, description="beta", readout_format=".3f"),
            "inclination": W.FloatSlider(value=s.inclination, min=0.0, max=180.0, step=0.1, description="inclination"),
            "cone_angle": W.FloatSlider(value=s.cone_angle, min=0.0, max=90.0, step=0.1, description="cone (deg)"),
            "period": W.FloatSlider(value=s.period, min=span / 50, max=2 * span, step=0.1, description="period (d)"),
            "t0": W.FloatSlider(value=s.t0, min=float(s.t.min()) - span, max=float(s.t.max()), step=0.1, description="t0 (d)"),
        }
        self.fit_button = W.Button(description="fit model", icon="crosshairs")
        self.fit_button.add_class("dk-fit")
        self.message = W.HTML()
        self.fig = _figure(8.0, 5.0)
        self.image = _image(self.fig)
        ax, axr = self.fig.subplots(2, 1, height_ratios=[3, 1], sharex=True)
        ax.errorbar(s.t, s.z_1, yerr=s.z_err, fmt="o", ms=3, color=PALETTE["approaching"], label="jet 1 (measured)")
        ax.errorbar(s.t, s.z_2, yerr=s.z_err, fmt="o", ms=3, color=PALETTE["receding"], label="jet 2 (measured)")
        self.tt = np.linspace(s.t.min(), s.t.max(), 800)
        (self.c1,) = ax.plot([], [], color=PALETTE["approaching"], lw=1, label="jet 1 (model)")
        (self.c2,) = ax.plot([], [], color=PALETTE["receding"], lw=1, label="jet 2 (model)")
        (self.mean,) = ax.plot([], [], color=PALETTE["neutral"], lw=0.8, ls="--", label="mean = Gamma - 1 (transverse Doppler)")
        ax.axhline(0, color="0.8", lw=0.6)
        ax.set_ylabel("redshift z")
        ax.legend(fontsize=7, frameon=False, loc="lower left", bbox_to_anchor=(0.0, 1.0), ncols=3)  # above the data
        (self.r1,) = axr.plot([], [], "o", ms=2.5, color=PALETTE["approaching"])
        (self.r2,) = axr.plot([], [], "o", ms=2.5, color=PALETTE["receding"])
        axr.axhline(0, color="0.6", lw=0.6)
        axr.set_ylabel("residual in z")
        # a power-of-ten offset keeps the tick labels one width whatever the residuals (the layout is solved once)
        axr.ticklabel_format(axis="y", style="sci", scilimits=(-2, 2), useMathText=True)
        # modified Julian dates say so; other times are days from the user's own zero
        axr.set_xlabel("time (MJD)" if float(np.nanmin(s.t)) > 30000 else "time (d)")
        ax.tick_params(labelbottom=True)
        self.ax, self.axr = ax, axr
        for k, w in self.sliders.items():
            w.observe(lambda c, key=k: self._on_slider(key, c["new"]), "value")
        self.fit_button.on_click(self._on_fit)
        self._lim = None
        self._moving = False
        self._fitted: dict = {}
        self.blit = _Blitter(self.fig, [self.c1, self.c2, self.mean, self.r1, self.r2])
        self.widget = W.VBox(
            [W.HBox(list(self.sliders.values())[:3]), W.HBox([*list(self.sliders.values())[3:], self.fit_button]), self.message, self.image]
        )
        self.widget.add_class("dk-precession")
        self.update()

    def _on_slider(self, key, value):
        if self._moving:  # the fit is moving the sliders: one redraw at the end, not five
            return
        exact = self._fitted.get(key)
        if exact is not None and abs(float(value) - exact) <= 0.5 * self.sliders[key].step * (1 + 1e-9):
            return  # the slider showing a fitted value on its step grid: the model keeps the exact value
        self._fitted.pop(key, None)
        setattr(self.state, key, float(value))
        self.update()

    def update(self):
        """State -> model curves and residuals -> one re-render of the figure."""
        s = self.state
        m1, m2 = s.model(self.tt)
        self.c1.set_data(self.tt, m1)
        self.c2.set_data(self.tt, m2)
        self.mean.set_data(self.tt, 0.5 * (m1 + m2))
        r1, r2 = s.residuals()
        self.r1.set_data(s.t, r1)
        self.r2.set_data(s.t, r2)
        lim = float(np.nanmax(np.abs(np.concatenate([r1, r2])))) or 1e-3
        if self._lim is None or not (0.2 * self._lim < lim < self._lim):
            self._lim = 1.5 * lim
            self.axr.set_ylim(-self._lim, self._lim)
            self.image.value = self.blit.full()
        else:
            self.image.value = self.blit.frame()

    def _on_fit(self, _b=None):
        try:
            f = self.state.fit()
        except Exception as exc:
            self.message.value = f"<span style='color:{PALETTE['receding']}'>fit failed: {exc}</span>"
            return None
        from ._format import with_error

        self._fitted = {k: float(getattr(self.state, k)) for k in self.sliders}
        self._moving = True
        try:
            for k, w in self.sliders.items():
                w.value = getattr(self.state, k)
        finally:
            self._moving = False
        self.update()  # the figure first, then the message: a reader (or a test) seeing the message sees the fitted curves
        pm = " &plusmn; "
        self.message.value = "<br>".join(
            [
                f"fitted (curves drawn with these exact values): beta {with_error(f.beta, f.beta_err, pm)}; "
                f"inclination {with_error(f.value('inclination'), f.error('inclination'), pm)} deg; "
                f"cone {with_error(f.value('cone_angle'), f.error('cone_angle'), pm)} deg; "
                f"period {with_error(f.value('period'), f.error('period'), pm)} d; t0 {with_error(f.value('t0'), f.error('t0'), pm)}",
                *f.notes,
            ]
        )
        return f

    def _ipython_display_(self):
        from IPython.display import display

        display(self.widget)


# ---------------------------------------------------------------------------
# 4. Outflow explorer: one line's observed position -> line-of-sight speed
# ---------------------------------------------------------------------------
@dataclass
class OutflowState:
    """One absorption or emission line of an outflow, read as a speed.

    Attributes
    ----------
    line : str
        Catalogue name of the line's identity.
    observed, observed_err : float
        Observed line position and its 1-sigma error, in ``unit`` (keV, Angstrom, Hz, ...;
        wavelengths in vacuum).
    unit : str
    z_host, z_host_err : float
        The host's cosmological redshift and its error (0 = exact), composed as
        (1 + z_obs) = (1 + z_host)(1 + z_outflow).
    """

    line: str = "Fe XXVI Ly-alpha"
    observed: float = 4.4
    observed_err: float = 0.01
    unit: str = "keV"
    z_host: float = 0.0
    z_host_err: float = 0.0

    def check(self) -> None:
        """ValueError naming the first value that cannot be read (nothing is clamped)."""
        for name, v, ok, rule in (
            ("observed", self.observed, lambda x: x > 0, "> 0"),
            ("observed_err", self.observed_err, lambda x: x >= 0, ">= 0"),
            ("z_host", self.z_host, lambda x: x > -1, "> -1"),
            ("z_host_err", self.z_host_err, lambda x: x >= 0, ">= 0"),
        ):
            if not (isinstance(v, (int, float)) and np.isfinite(v) and ok(v)):
                raise ValueError(f"{name} must be finite and {rule}, got {v!r}")

    def reading(self) -> dict:
        """z_obs, z_outflow and its error, the relativistic line-of-sight speed (positive towards
        us) and its error, the linear reading c|z| and how far it is off (signed fraction)."""
        from .kinematics import beta_from_redshift, beta_from_redshift_error
        from .lines import rest_value

        self.check()
        unit = u.Unit(self.unit)
        rest = rest_value(self.line, unit, medium="vacuum")
        obs = self.observed * unit
        # 1 + z = lambda_obs / lambda_rest, whatever the axis
        lam_o = obs.to_value(u.AA, equivalencies=u.spectral())
        lam_r = rest.to_value(u.AA, equivalencies=u.spectral())
        w_obs = lam_o / lam_r
        w = w_obs / (1.0 + self.z_host)
        rel = self.observed_err / self.observed  # the fractional error is the same on every axis kind
        w_err = w * np.hypot(rel, self.z_host_err / (1.0 + self.z_host))
        z = w - 1.0
        beta = -float(beta_from_redshift(z))  # towards us positive
        beta_err = beta_from_redshift_error(z, w_err)
        linear = -z  # c z as a speed towards us
        return {
            "rest": float(rest.value),
            "z_obs": w_obs - 1.0,
            "z": z,
            "z_err": w_err,
            "beta": beta,
            "beta_err": beta_err,
            "linear": linear,
            "linear_off": (linear - beta) / abs(beta) if beta != 0 else 0.0,
        }

    def sentence(self) -> str:
        """The reading in words, numbers rounded to their errors."""
        from ._format import with_error

        r = self.reading()
        way = "towards us" if r["beta"] >= 0 else "away from us"
        off = r["linear_off"]
        word = "lower" if abs(r["linear"]) < abs(r["beta"]) else "higher"
        return (
            f"{self.line} (rest {r['rest']:.6g} {self.unit}) at {with_error(self.observed, self.observed_err)} {self.unit}: "
            f"z = {with_error(r['z'], r['z_err'])} in the host's frame; "
            f"line-of-sight speed {with_error(abs(r['beta']), r['beta_err'])} c {way} (relativistic); "
            f"the linear reading c|z| = {abs(r['linear']):.4f} c is {100 * abs(off):.1f}% {word}"
        )


class OutflowExplorer:
    """Line identity, observed position and host redshift in; the outflow speed with its error,
    the relativistic and linear readings, and the locus of (speed, viewing angle) out."""

    def __init__(self, state: OutflowState | None = None, lines=None):
        W = _widgets()

        from .lines import catalogue

        self.state = s = state or OutflowState()
        unit = u.Unit(s.unit)
        if lines is None:  # the catalogue lines on the same kind of axis
            names = [str(r["name"]) for r in catalogue() if u.Unit(str(r["unit"])).physical_type == unit.physical_type]
            lines = names if s.line in names else [s.line, *names]
        self.line = W.Dropdown(options=list(lines), value=s.line, description="line")
        self.observed = W.FloatText(value=s.observed, description=f"observed ({s.unit})", step=0.001)
        self.observed_err = W.FloatText(value=s.observed_err, description="its error", step=0.001)
        self.z_host = W.FloatText(value=s.z_host, description="host z", step=0.001)
        self.z_host_err = W.FloatText(value=s.z_host_err, description="host z error", step=0.0001)
        for w, cls in (
            (self.observed, "dk-outflow-observed"),
            (self.observed_err, "dk-outflow-error"),
            (self.z_host, "dk-outflow-zhost"),
            (self.z_host_err, "dk-outflow-zhost-error"),
        ):
            w.style = {"description_width": "110px"}
            w.add_class(cls)
        self.readout = W.HTML()
        self.readout.add_class("dk-outflow-readout")
        self.fig = _figure(6.4, 3.6)
        self.image = _image(self.fig)
        self.ax = self.fig.subplots()
        for w in (self.line, self.observed, self.observed_err, self.z_host, self.z_host_err):
            w.observe(self._on_change, "value")
        self.widget = W.VBox(
            [
                W.HBox([self.line, self.observed, self.observed_err]),
                W.HBox([self.z_host, self.z_host_err]),
                self.readout,
                self.image,
            ]
        )
        self.widget.add_class("dk-outflow")
        self.update()

    def _on_change(self, _change=None):
        self.update()

    def update(self):
        """Controls -> state -> read-out and figure (a refused value is named, nothing is clamped)."""
        from .kinematics import redshift_locus

        s = self.state
        s.line, s.observed, s.observed_err = self.line.value, float(self.observed.value), float(self.observed_err.value)
        s.z_host, s.z_host_err = float(self.z_host.value), float(self.z_host_err.value)
        try:
            r = s.reading()
        except ValueError as exc:
            self.readout.value = f"<span style='color:{PALETTE['receding']}'>{exc}; the figure shows the last valid reading</span>"
            return
        self.readout.value = f"<span class='dk-outflow-text'>{s.sentence()}</span>"
        ax = self.ax
        ax.clear()
        theta, mid = redshift_locus(r["z"], num=361)
        th = theta.to_value(u.deg)
        band = [redshift_locus(r["z"] + k * r["z_err"], num=361)[1] for k in (-1, 1)] if r["z_err"] > 0 else None
        for i in range(2):
            if band is not None:
                lo, hi = np.fmin(band[0][i], band[1][i]), np.fmax(band[0][i], band[1][i])
                ax.fill_between(th, lo, hi, color=PALETTE["band"], alpha=0.5, lw=0, label="1 sigma" if i == 0 else None)
            ax.plot(th, mid[i], color=PALETTE["approaching"], lw=1.2, label="speed and angle giving this z" if i == 0 else None)
        ax.axhline(abs(r["beta"]), color=PALETTE["neutral"], ls=":", lw=0.9, label=f"along the line of sight: {abs(r['beta']):.4f} c")
        ax.axhline(abs(r["linear"]), color=PALETTE["receding"], ls="--", lw=0.9, label=f"linear reading c|z| = {abs(r['linear']):.4f} c")
        ax.set_xlim(0, 180)
        ax.set_ylim(0, 1)
        ax.set_xlabel("viewing angle (deg; 0 = moving straight at us)")
        ax.set_ylabel(r"speed $\beta = v/c$")
        ax.set_title(f"{s.line}: z = {r['z']:+.4f} in the host's frame", fontsize=9, loc="right")
        ax.legend(fontsize=7, frameon=False, loc="upper right")
        self.image.value = _render_fresh(self.fig)

    def _ipython_display_(self):
        from IPython.display import display

        display(self.widget)


# ---------------------------------------------------------------------------
# 5. Population explorer: a batch result table, filtered, with one row's spectrum and fit
# ---------------------------------------------------------------------------
@dataclass
class PopulationState:
    """A batch result table and what is shown of it.

    Attributes
    ----------
    table : astropy Table
        The batch output (columns file, status, flags, message, beta, beta_err, viewing_angle,
        viewing_angle_err).
    status : str
        "all" or one status to keep ("ok", "suspect", "error").
    flag : str
        "any" (no filter), "none" (rows without flags) or one flag name.
    alpha : float
        Spectral index of the beaming curves (S proportional to nu^-alpha; continuous jet).
    """

    table: object
    status: str = "all"
    flag: str = "any"
    alpha: float = 0.7

    def flags(self) -> list[str]:
        """Every flag that occurs in the table, sorted."""
        out = set()
        for f in self.table["flags"] if "flags" in self.table.colnames else []:
            out.update(x for x in str(f).split(",") if x and x != "--")
        return sorted(out)

    def rows(self) -> np.ndarray:
        """Indices of the rows the filters keep."""
        t = self.table
        keep = np.ones(len(t), bool)
        if self.status != "all":
            keep &= np.asarray(t["status"]) == self.status
        if self.flag != "any" and "flags" in t.colnames:
            sets = [set(str(f).split(",")) - {"", "--"} for f in t["flags"]]
            keep &= np.array([not s_ if self.flag == "none" else self.flag in s_ for s_ in sets], bool)
        return np.flatnonzero(keep)


class PopulationExplorer:
    """Filter a batch result table by status and flag; see the speed-angle plane with the
    beaming selection drawn; choose a row to see its spectrum, fit and residuals.

    Parameters
    ----------
    table : astropy Table
        Output of ``dopplerkit batch`` / :func:`dopplerkit.batch.run_batch`.
    config : str, Path, dict or BatchConfig, optional
        The run's configuration: the chosen row's spectrum is measured again as the batch did
        (:func:`dopplerkit.batch.measure_file`) and drawn with its fit. Without it, no spectrum panel.
    truth : Table, optional
        Columns file, beta, viewing_angle (invented data only): drawn as open circles.
    """

    #: jet/counter-jet flux ratios drawn: beyond them a counter-jet falls below that dynamic range
    RATIOS = (10.0, 100.0)

    def __init__(self, table, config=None, truth=None):
        W = _widgets()

        self.state = PopulationState(table)
        self.config = config
        self.truth = truth
        self.status = W.ToggleButtons(options=["all", "ok", "suspect", "error"], value="all", description="status")
        self.status.add_class("dk-status")
        self.flag = W.Dropdown(options=["any", "none", *self.state.flags()], value="any", description="flag")
        self.row = W.Dropdown(options=[], description="spectrum", layout=W.Layout(width="460px"))
        self.detail = W.HTML()
        self.detail.add_class("dk-population-detail")
        self.fig = _figure(6.4, 4.0)
        self.image = _image(self.fig)
        self.ax = self.fig.subplots()
        self.spec_fig = _figure(8.0, 4.4)
        self.spec_image = _image(self.spec_fig)
        self.spec_image.add_class("dk-population-spectrum")
        self.status.observe(self._on_filter, "value")
        self.flag.observe(self._on_filter, "value")
        self.row.observe(self._on_row, "value")
        self.widget = W.VBox([W.HBox([self.status, self.flag]), self.image, self.row, self.detail, self.spec_image])
        if config is None:
            self.spec_image.layout.display = "none"
        self.widget.add_class("dk-population")
        self._on_filter()

    # -- callbacks --------------------------------------------------------------------
    def _on_filter(self, _change=None):
        self.state.status, self.state.flag = self.status.value, self.flag.value
        idx = self.state.rows()
        t = self.state.table
        from pathlib import Path

        options = [(f"{Path(str(t['file'][i])).name} ({t['status'][i]})", int(i)) for i in idx]
        current = self.row.value
        self.row.options = options
        if options:
            status = np.asarray(t["status"])[idx]
            first = int(idx[np.argmax(status != "error")]) if (status != "error").any() else options[0][1]  # a row with a fit, if any
            self.row.value = current if current in idx else first
        self.redraw()
        if not options:
            self.detail.value = "no rows pass these filters"

    def _on_row(self, _change=None):
        self.redraw()
        self.show_row()

    def redraw(self):
        """The speed-angle plane of the filtered rows, the selected one marked."""
        from .kinematics import jet_counterjet_ratio

        t, ax = self.state.table, self.ax
        ax.clear()
        th = np.linspace(0.5, 90.0, 180)
        bb = np.linspace(0.0, 0.99, 160)
        TT, BB = np.meshgrid(th, bb)
        R = jet_counterjet_ratio(BB, TT * u.deg, self.state.alpha, "jet")
        cs = ax.contour(TT, BB, R, levels=list(self.RATIOS), colors=PALETTE["neutral"], linewidths=0.7, linestyles="--")
        ax.clabel(cs, fmt={r: f"jet/counter-jet {r:g}" for r in self.RATIOS}, fontsize=6)
        ax.contourf(TT, BB, R, levels=[self.RATIOS[-1], np.inf], colors=["0.85"], alpha=0.6)
        idx = self.state.rows()
        status = np.asarray(t["status"])[idx]

        def col(name):
            return np.asarray(t[name], float)[idx] if name in t.colnames else np.full(idx.size, np.nan)

        b, be, a, ae = col("beta"), col("beta_err"), col("viewing_angle"), col("viewing_angle_err")
        ok = status == "ok"
        if ok.any():
            ax.errorbar(
                a[ok],
                b[ok],
                xerr=ae[ok],
                yerr=be[ok],
                fmt="o",
                ms=3,
                color=PALETTE["approaching"],
                ecolor="0.7",
                elinewidth=0.7,
                label=f"ok ({ok.sum()})",
            )
        sus = status == "suspect"
        if sus.any():
            ax.plot(a[sus], b[sus], "o", ms=4, mfc="none", mec="0.45", label=f"suspect ({sus.sum()})")
        if self.truth is not None:  # the true values of the rows shown (matched by file name)
            from pathlib import Path

            shown = {Path(str(t["file"][i])).name for i in idx}
            tm = np.array([Path(str(f)).name in shown for f in self.truth["file"]], bool)
            if tm.any():
                ax.plot(
                    np.asarray(self.truth["viewing_angle"], float)[tm],
                    np.asarray(self.truth["beta"], float)[tm],
                    ".",
                    ms=3,
                    color=PALETTE["receding"],
                    label=f"true (invented; {tm.sum()})",
                )
        i = self.row.value
        if i is not None and i in idx and "beta" in t.colnames and np.isfinite(float(np.ma.filled(t["beta"][i], np.nan))):
            ax.plot(
                [float(t["viewing_angle"][i])],
                [float(t["beta"][i])],
                "s",
                ms=9,
                mfc="none",
                mec=PALETTE["highlight"],
                mew=2,
                label="chosen",
            )
        n_err = int(np.sum(status == "error"))
        ax.set_xlim(0, 90)
        ax.set_ylim(0, 1)
        ax.set_xlabel("viewing angle (deg; 0 = approaching jet towards us)")
        ax.set_ylabel(r"speed $\beta = v/c$")
        ax.set_title(
            f"{idx.size} rows shown ({n_err} failed, not plotted); shaded: counter-jet > {self.RATIOS[-1]:g}x fainter "
            f"(continuous jet, alpha {self.state.alpha:g}), missing from pair samples",
            fontsize=7,
            loc="left",
            wrap=True,
        )
        if ax.get_legend_handles_labels()[1]:
            ax.legend(fontsize=7, frameon=False, loc="upper right")
        self.image.value = _render_fresh(self.fig)

    def path_of(self, i: int) -> str:
        """The file of row ``i``: batch tables give paths relative to ``meta["spectra_dir"]``."""
        import os

        from .io import table_meta

        f = str(self.state.table["file"][i])
        root = table_meta(self.state.table, "spectra_dir")
        return f if os.path.isabs(f) or not root else os.path.join(str(root), f)

    def show_row(self):
        """The chosen row in words and, with a configuration, its spectrum with the fit and residuals."""
        from ._format import with_error

        i = self.row.value
        if i is None:
            return
        t = self.state.table
        r = t[i]
        text = f"<b>{r['file']}</b>: <b>{r['status']}</b>"
        if "beta" in t.colnames and np.isfinite(float(np.ma.filled(r["beta"], np.nan))):
            text += (
                f"; beta = {with_error(float(r['beta']), float(r['beta_err']))}, "
                f"viewing angle = {with_error(float(r['viewing_angle']), float(r['viewing_angle_err']))} deg"
            )
        msg = str(r["message"]) if "message" in t.colnames and str(r["message"]) not in ("", "--") else ""
        if msg:
            text += f"<br><span style='color:{PALETTE['receding']}'>{msg}</span>"
        self.detail.value = text
        if self.config is None:
            return
        if str(r["status"]) == "error":
            self.spec_fig.clear()
            self.spec_fig.text(0.5, 0.5, "no fit for a failed row (see its message above)", ha="center", fontsize=10)
            self.spec_image.value = _render_fresh(self.spec_fig)
            return
        import warnings

        from .batch import measure_file
        from .plotting import plot_line_fit

        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                spec, m = measure_file(self.path_of(i), self.config)
        except Exception as exc:  # the file moved or cannot be read: say so in the panel
            self.detail.value = text + f"<br><span style='color:{PALETTE['receding']}'>cannot draw the spectrum: {exc}</span>"
            return
        plot_line_fit(spec, m, fig=self.spec_fig)
        from pathlib import Path

        self.spec_fig.suptitle(Path(str(r["file"])).name, fontsize=9)
        self.spec_image.value = _render_fresh(self.spec_fig)

    def _ipython_display_(self):
        from IPython.display import display

        display(self.widget)


def _render_fresh(fig) -> bytes:
    """PNG bytes of a figure whose layout changes each time (legends, titles): constrained layout
    solved on every draw (the slider views freeze theirs instead, see :func:`_agg`)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    fig.set_layout_engine("constrained")
    canvas = fig.canvas if isinstance(fig.canvas, FigureCanvasAgg) else FigureCanvasAgg(fig)
    canvas.draw()
    return _png(canvas)
