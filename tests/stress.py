"""A seeded family of hard jet-pair spectra (invented data, for tests and benchmarks only).

Each case is a realistic spectrum nobody tuned the fitter for: a weak counter-jet (1/8 to 1/10 of
the approaching jet), blended pairs near 90 deg, steep power-law continua over 3800-11200
Angstrom, narrow stationary host lines on top of the jet lines, S/N 5-8 per pixel, scaled-integer
FITS columns, and the wrong line configured. ``make_family(directory, n, seed)`` writes the files
and returns the truth table; ``score(table, truth)`` gives what the issue's validation asks.

Run as a script for a quick report on the current code::

    python tests/stress.py [N] [SEED]
"""

from __future__ import annotations

import sys
from pathlib import Path

import astropy.units as u
import numpy as np

KINDS = ("weak", "blend", "steep", "host", "lowsnr", "scaled", "wrongline", "plain", "resampled", "stationary", "cosmic")
# the mix: every hard kind the validation names, beside ordinary spectra (a fifth), as in a survey;
# "resampled": noise shared by neighbouring pixels (kernel 1/4, 1/2, 1/4) under errors propagated
# pixel by pixel, as a pipeline that resamples onto a common grid leaves it; "stationary": a broad
# line at rest (a disk or wind, FWHM 1500-3000 km/s) beside the pair, which of the three features
# are the pair not decided by one spectrum; "cosmic": two single-pixel spikes of 20-40 sigma
# within 15 Angstrom of each jet line
WEIGHTS = (0.12, 0.10, 0.15, 0.14, 0.14, 0.10, 0.05, 0.20, 0.10, 0.04, 0.06)
#: the resampling kernel of the "resampled" kind
KERNEL = np.array([0.25, 0.5, 0.25])


def _case(kind, rng):
    import dopplerkit as dk

    if kind == "blend":
        beta, ang = rng.uniform(0.02, 0.05), rng.uniform(85.0, 89.0)
    else:
        beta, ang = rng.uniform(0.06, 0.3), rng.uniform(20.0, 80.0)
    za, zr = float(dk.redshift(beta, ang)), float(dk.redshift(beta, 180.0 - ang))
    fwhm = rng.uniform(600.0, 1100.0)
    ratio = rng.uniform(0.1, 0.125) if kind == "weak" else rng.uniform(0.4, 1.0)
    # S/N per pixel at the continuum: 5-8 for the faint kind; a 1/8-1/10 counter-jet at S/N 5-8 is
    # below any honest detection threshold (it must come out suspect, which it does), so the weak kind has 10-20
    snr = {"lowsnr": rng.uniform(5.0, 8.0), "weak": rng.uniform(10.0, 20.0)}.get(kind, rng.uniform(15.0, 40.0))
    strength = rng.uniform(1.0, 2.5)
    if kind == "steep":
        cont = {"kind": "powerlaw", "amplitude": 1.0, "index": rng.uniform(-3.5, -2.0), "pivot": 6500 * u.AA}
    else:
        cont = {"kind": "powerlaw", "amplitude": 1.0, "index": rng.uniform(-1.0, 0.5), "pivot": 6500 * u.AA}
    return {
        "kind": kind,
        "beta": beta,
        "angle": ang,
        "za": za,
        "zr": zr,
        "fwhm": fwhm,
        "ratio": ratio,
        "snr": snr,
        "strength": strength,
        "cont": cont,
    }


def _spectrum(c, rng):
    from dopplerkit.models import LineComponent, synthesize_spectrum

    grid = np.arange(3800.0, 11200.0, 2.0) * u.AA
    kms = u.km / u.s
    comps = [
        LineComponent("H-alpha", z=c["za"], fwhm=c["fwhm"] * kms, strength=c["strength"]),
        LineComponent("H-alpha", z=c["zr"], fwhm=c["fwhm"] * kms, strength=c["strength"] * c["ratio"]),
    ]
    if c["kind"] != "wrongline":
        # the same gas in H-beta, at the case-B ratio 1/2.86 (Osterbrock & Ferland 2006, table 4.2)
        comps += [
            LineComponent("H-beta", z=c["za"], fwhm=c["fwhm"] * kms, strength=c["strength"] / 2.86 * 1.3),
            LineComponent("H-beta", z=c["zr"], fwhm=c["fwhm"] * kms, strength=c["strength"] * c["ratio"] / 2.86 * 1.3),
        ]
    if c["kind"] == "stationary":
        fs, q = rng.uniform(1500.0, 3000.0), c["strength"] * rng.uniform(0.5, 2.0)
        comps += [
            LineComponent("H-alpha", z=0.0, fwhm=fs * kms, strength=q),
            LineComponent("H-beta", z=0.0, fwhm=fs * kms, strength=q / 3.5),
        ]
    if c["kind"] == "host":
        comps += [
            LineComponent("H-alpha", z=0.0, fwhm=150 * kms, strength=1.5),
            LineComponent(6585.27 * u.AA, z=0.0, fwhm=150 * kms, strength=1.2),  # [N II] 6585 (vacuum)
            LineComponent(6549.86 * u.AA, z=0.0, fwhm=150 * kms, strength=0.4),  # [N II] 6550 (vacuum)
        ]
    spec = synthesize_spectrum(grid, comps, continuum=c["cont"], snr=c["snr"], seed=rng, resolution=4000)
    if c["kind"] == "resampled":
        from astropy.nddata import StdDevUncertainty
        from specutils import Spectrum

        clean = synthesize_spectrum(grid, comps, continuum=c["cont"], resolution=4000).flux.value
        noise = np.convolve(spec.flux.value - clean, KERNEL, mode="same")
        sigma = spec.uncertainty.array * np.sqrt(np.sum(KERNEL**2))
        spec = Spectrum(spectral_axis=grid, flux=(clean + noise) * spec.flux.unit, uncertainty=StdDevUncertainty(sigma), meta=spec.meta)
    if c["kind"] == "cosmic":
        from astropy.nddata import StdDevUncertainty
        from specutils import Spectrum

        x, y, e = grid.value, spec.flux.value.copy(), spec.uncertainty.array
        for z in (c["za"], c["zr"]):
            for off in rng.uniform(-15.0, 15.0, 2):
                i = min(int(np.searchsorted(x, 6564.61 * (1 + z) + off)), x.size - 1)
                y[i] += rng.uniform(20.0, 40.0) * e[i]
        spec = Spectrum(spectral_axis=grid, flux=y * spec.flux.unit, uncertainty=StdDevUncertainty(e), meta=spec.meta)
    return spec


def _write(spec, path, scaled):
    from astropy.io import fits

    if not scaled:
        from dopplerkit.io import write_spectrum

        write_spectrum(spec, path)
        return
    # what an archive writes: int16 flux with TSCAL/TZERO, int32 wavelength offsets with TZERO
    flux = spec.flux.value
    lo, hi = float(np.min(flux)), float(np.max(flux))
    tscal = (hi - lo) / 60000.0
    tzero = 0.5 * (hi + lo)
    cols = [
        fits.Column(
            name="wavelength", format="J", unit="Angstrom", array=np.round((spec.spectral_axis.value - 3000.0) * 1000).astype(np.int32)
        ),
        fits.Column(name="flux", format="I", unit="erg / (s cm2 Angstrom)", array=np.round((flux - tzero) / tscal).astype(np.int16)),
        fits.Column(name="error", format="E", unit="erg / (s cm2 Angstrom)", array=spec.uncertainty.array.astype(np.float32)),
    ]
    tab = fits.BinTableHDU.from_columns(cols)
    tab.header.update({"TSCAL1": 1e-3, "TZERO1": 3000.0, "TSCAL2": tscal, "TZERO2": tzero, "MEDIUM": "vacuum"})
    fits.HDUList([fits.PrimaryHDU(), tab]).writeto(path)


def make_family(directory, n: int = 300, seed: int = 2026):
    """Write ``n`` seeded spectra into ``directory``; return {file path: truth dict}."""
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    kinds = rng.choice(KINDS, size=n, p=np.asarray(WEIGHTS) / np.sum(WEIGHTS))
    truth = {}
    for k, kind in enumerate(kinds):
        c = _case(str(kind), rng)
        path = d / f"{kind}_{k:04d}.fits"
        _write(_spectrum(c, rng), path, scaled=(kind == "scaled"))
        truth[str(path)] = c
    return truth


CONFIG = {
    "line": [{"name": "H-alpha", "components": 2}],
    "kinematics": {"model": "jet-pair"},
    "spectra": {"medium": "vacuum"},
}


#: lines a user might configure by mistake on these H-alpha spectra: a stronger companion missing
#: (H-beta), a fixed-ratio partner missing ([O III] 5007), H-alpha missing beside He I, and one with
#: no companion at all (He II 4686: only the kinematics and the other identifications can tell)
WRONG_LINES = ("H-beta", "[O III] 5007", "He I 5876", "He II 4686")


def run(truth, config=None, wrong_lines=WRONG_LINES):
    """Fit every file with the batch worker (one process); the wrong-line cases get one of ``wrong_lines`` in turn."""
    from dopplerkit.batch import parse_config, process_chunk

    base = dict(config or CONFIG)
    cfg = parse_config(base).as_dict()
    wrong = [parse_config({**base, "line": [{"name": w, "components": 2}]}).as_dict() for w in wrong_lines]
    rows = []
    n_wrong = 0
    for path, c in truth.items():
        if c["kind"] == "wrongline":
            rows += process_chunk([path], [None], wrong[n_wrong % len(wrong)])
            n_wrong += 1
        else:
            rows += process_chunk([path], [None], cfg)
    return rows


def score(rows, truth):
    """Fractions the validation asks for, overall and per kind."""
    out = {"n": len(rows), "ok": 0, "bad_ok": [], "pull_b": [], "pull_t": []}
    per = {}
    for r in rows:
        c = truth[r["file"]]
        k = per.setdefault(c["kind"], {"n": 0, "ok": 0, "bad_ok": 0})
        k["n"] += 1
        if r["status"] != "ok":
            continue
        out["ok"] += 1
        k["ok"] += 1
        if c["kind"] == "wrongline":
            out["bad_ok"].append((r["file"], "wrong line accepted"))
            k["bad_ok"] += 1
            continue
        pb = (r["beta"] - c["beta"]) / r["beta_err"]
        pt = (r["viewing_angle"] - c["angle"]) / r["viewing_angle_err"]
        out["pull_b"].append(pb)
        out["pull_t"].append(pt)
        if not (abs(pb) <= 5 and abs(pt) <= 5):
            out["bad_ok"].append(
                (
                    r["file"],
                    f"beta {r['beta']:.4f} +- {r['beta_err']:.4f} (true {c['beta']:.4f}), angle {r['viewing_angle']:.2f} (true {c['angle']:.2f})",
                )
            )
            k["bad_ok"] += 1
    pb, pt = np.asarray(out["pull_b"]), np.asarray(out["pull_t"])
    out["frac_ok"] = out["ok"] / max(out["n"], 1)
    out["cover_b"] = float(np.mean(np.abs(pb) <= 1)) if pb.size else float("nan")
    out["cover_t"] = float(np.mean(np.abs(pt) <= 1)) if pt.size else float("nan")
    out["per_kind"] = per
    return out


if __name__ == "__main__":  # pragma: no cover - a developer's report
    import tempfile
    import time
    import warnings
    from collections import Counter

    n = int(sys.argv[1]) if len(sys.argv) > 1 else 120
    seed = int(sys.argv[2]) if len(sys.argv) > 2 else 2026
    with tempfile.TemporaryDirectory() as tmp:
        truth = make_family(tmp, n, seed)
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            rows = run(truth)
        dt = time.perf_counter() - t0
        s = score(rows, truth)
        print(f"{n} spectra in {dt:.1f} s; ok {s['frac_ok']:.2f}; coverage beta {s['cover_b']:.2f}, angle {s['cover_t']:.2f}")
        for kind, k in sorted(s["per_kind"].items()):
            print(f"  {kind:10s} n {k['n']:3d}  ok {k['ok']:3d}  wrong-but-ok {k['bad_ok']:3d}")
        for f, why in s["bad_ok"][:15]:
            print("  BAD OK", Path(f).name, why)
        msgs = Counter()
        for r in rows:
            if r["status"] != "ok":
                msgs[(r["status"], (r.get("message") or r.get("flags") or "")[:90])] += 1
        for (st, m), c in msgs.most_common(12):
            print(f"  {c:3d} {st}: {m}")
