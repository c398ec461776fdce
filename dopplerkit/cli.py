"""The ``dopplerkit`` command line.

``main(argv)`` is the whole program; it returns the exit code and is tested by calling it
directly. Subcommands:

``calc``   every derived quantity for a speed and viewing angle, or the solutions for a
           measured redshift or redshift pair;
``batch``  fit a directory of spectra (see :mod:`dopplerkit.batch`);
``demo``   run the main job on the bundled demo data.

Exit codes: 0 success (in a batch: every spectrum ``ok``); 1 some spectra failed or are
``suspect`` (results still written); 2 nothing could run (bad arguments, bad configuration,
missing directory, an output that would destroy data, a locked output); 3 the Dask cluster
was lost or had no worker (journal kept); 130 interrupted (journal kept).
"""

from __future__ import annotations

import argparse
import sys
import warnings
from collections.abc import Sequence

from ._version import __version__

EXIT_OK = 0
EXIT_SOME_FAILED = 1
EXIT_USAGE = 2


class _Parser(argparse.ArgumentParser):
    """ArgumentParser that raises instead of exiting, so ``main`` returns a code."""

    def error(self, message):  # pragma: no cover - exercised through main
        self.print_usage(sys.stderr)
        raise _UsageError(f"{self.prog}: error: {message}")


class _UsageError(Exception):
    pass


def _finite(text: str) -> float:
    """argparse type: a finite number (NaN and inf are refused, not propagated)."""
    try:
        x = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if x != x or x in (float("inf"), float("-inf")):
        raise argparse.ArgumentTypeError(f"must be a finite number, got {text!r}")
    return x


def _viewing_angle(text: str) -> float:
    """argparse type: a viewing angle in degrees, 0 to 180."""
    x = _finite(text)
    if not 0.0 <= x <= 180.0:
        raise argparse.ArgumentTypeError(f"must be a viewing angle in [0, 180] deg (0 = straight at us), got {text!r}")
    return x


def _build_parser() -> argparse.ArgumentParser:
    p = _Parser(
        prog="dopplerkit",
        description="Relativistic kinematics of jets and outflows from their spectra.",
        epilog="Conventions: theta is the observer-frame viewing angle (0 deg = moving straight at us); "
        "z < 0 is a blueshift; S_nu is proportional to nu**-alpha.",
    )
    p.add_argument("--version", action="version", version=f"dopplerkit {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    c = sub.add_parser(
        "calc",
        help="derived quantities for a speed and angle, or solutions for measured redshifts",
        description="Print Gamma, the Doppler factor, z, apparent speed, aberration and boosts for a speed and "
        "viewing angle; or solve a measured redshift pair (--pair) or a single redshift (--z).",
    )
    speed = c.add_mutually_exclusive_group()
    speed.add_argument("--beta", type=_finite, help="speed v/c in [0, 1)")
    speed.add_argument("--gamma", type=_finite, help="Lorentz factor (>= 1), exact for speeds very close to c")
    c.add_argument(
        "--angle", type=_viewing_angle, default=None, help="observer-frame viewing angle in degrees (0 = straight at us; default 90)"
    )
    c.add_argument("--alpha", type=_finite, default=0.7, help="spectral index, S_nu ~ nu**-alpha (default 0.7)")
    c.add_argument("--pair", nargs=2, type=_finite, metavar=("Z_APPROACHING", "Z_RECEDING"), help="solve a jet/counter-jet redshift pair")
    c.add_argument("--z", type=_finite, default=None, help="read a single redshift as velocities (linear vs relativistic)")
    c.add_argument(
        "--proper-motion",
        type=_finite,
        default=None,
        metavar="MAS_PER_YR",
        help="apparent motion of a jet feature in mas/yr: with --host-z, the apparent speed and every limit it sets",
    )
    c.add_argument("--host-z", type=_finite, default=None, metavar="Z", help="cosmological redshift of the host (> 0; Planck18 distances)")
    c.add_argument(
        "--doppler",
        type=_finite,
        default=None,
        metavar="DELTA",
        help="with --proper-motion: a Doppler factor, to solve for Gamma and theta",
    )

    b = sub.add_parser(
        "batch",
        help="fit every spectrum in a directory",
        description="Fit line centres (and, if asked, speed and viewing angle) in every spectrum of a directory. "
        "Exit code 0: all ok; 1: some failed or suspect (results written); 2: nothing could run (nothing written); "
        "3: Dask cluster lost or without workers (journal kept, use --resume); 130: interrupted (journal kept).",
    )
    b.add_argument("spectra_dir", metavar="SPECTRA_DIR", help="directory of spectra (searched recursively)")
    b.add_argument("--config", required=True, metavar="CONFIG.toml", help="fit configuration (TOML)")
    b.add_argument(
        "--output", required=True, metavar="RESULTS.ecsv", help="result table; format from the extension (.ecsv, .csv, .fits, .parquet)"
    )
    b.add_argument("--workers", type=int, default=None, metavar="N", help="local worker processes (default: all cores)")
    b.add_argument("--scheduler", default=None, metavar="ADDRESS", help="address of a running Dask scheduler, e.g. tcp://127.0.0.1:8786")
    b.add_argument(
        "--resume", action="store_true", help="keep results of an earlier run on the same output (same configuration, unchanged inputs)"
    )
    b.add_argument("--overwrite", action="store_true", help="replace an existing output file that dopplerkit did not write")
    b.add_argument(
        "--cluster-timeout",
        type=_finite,
        default=60.0,
        metavar="SECONDS",
        help="wait this long for the Dask scheduler and a worker (default 60; exit code 3 after)",
    )
    b.add_argument("--pattern", default=None, metavar="GLOB", help="only files matching this glob (default: every readable spectrum)")
    b.add_argument("--chunk-size", type=int, default=100, metavar="K", help="spectra per task (default 100)")
    b.add_argument("--plot", default=None, metavar="SUMMARY.png", help="also write the population figure (speed against viewing angle)")
    b.add_argument(
        "--plot-fits",
        default=None,
        metavar="DIR",
        help="also draw every suspect row's spectrum with its fit and residuals, one PNG per spectrum in DIR",
    )
    b.add_argument("--quiet", action="store_true", help="no progress bar or summary line")

    d = sub.add_parser(
        "demo", help="run the main job on the bundled demo data", description="Fit the bundled demo spectra and print the results."
    )
    d.add_argument("--output-dir", default="results", help="where to write the results (default ./results)")
    d.add_argument("--workers", type=int, default=None, metavar="N", help="local worker processes (default: all cores)")
    return p


def _fmt(x, spec=".6g"):
    try:
        return format(float(x), spec)
    except (TypeError, ValueError):
        return str(x)


def _calc(args, out) -> int:
    import numpy as np

    from . import kinematics as k

    did = False
    if args.beta is not None or args.gamma is not None:
        did = True
        speed = {"gamma": args.gamma} if args.gamma is not None else {"beta": args.beta}
        angle = 90.0 if args.angle is None else args.angle
        import astropy.units as u

        th = angle * u.deg
        g = k.lorentz_factor(**speed)
        gb = np.sqrt((g - 1) * (g + 1))
        b = gb / g
        rows = [
            ("beta (v/c)", _fmt(b, ".12g")),
            ("Lorentz factor Gamma", _fmt(g, ".12g")),
            ("Gamma * beta", _fmt(gb)),
            ("viewing angle theta (deg)", _fmt(angle)),
            ("Doppler factor delta", _fmt(k.doppler_factor(theta=th, **speed), ".10g")),
            ("redshift z", _fmt(k.redshift(theta=th, **speed), ".10g")),
            ("counter-jet redshift z (180 deg - theta)", _fmt(k.redshift(theta=180 * u.deg - th, **speed), ".10g")),
            ("apparent speed beta_app", _fmt(k.apparent_speed(theta=th, **speed))),
            ("max apparent speed (Gamma beta, at cos theta = beta)", _fmt(gb)),
            ("source-frame angle of this direction (deg)", _fmt(k.deaberrate(th, **speed).value)),
            (
                f"boost, blob  delta**(3+alpha), alpha={args.alpha:g}",
                _fmt(k.beaming_factor(theta=th, alpha=args.alpha, geometry="blob", **speed)),
            ),
            (
                f"boost, jet   delta**(2+alpha), alpha={args.alpha:g}",
                _fmt(k.beaming_factor(theta=th, alpha=args.alpha, geometry="jet", **speed)),
            ),
            ("jet/counter-jet ratio (blob)", _fmt(k.jet_counterjet_ratio(theta=th, alpha=args.alpha, geometry="blob", **speed))),
            ("jet/counter-jet ratio (jet)", _fmt(k.jet_counterjet_ratio(theta=th, alpha=args.alpha, geometry="jet", **speed))),
        ]
        _table("speed and viewing angle", rows, out)
    if args.pair is not None:
        did = True
        za, zr = args.pair
        b, th = k.solve_jet_pair(za, zr)
        g = k.lorentz_factor(b)
        rows = [
            ("z approaching, z receding", f"{za:.6g}, {zr:.6g}"),
            ("mean z = Gamma - 1 (transverse Doppler)", _fmt(0.5 * (za + zr))),
            ("beta", _fmt(b, ".8g")),
            ("Lorentz factor Gamma", _fmt(g, ".8g")),
            ("viewing angle of the approaching jet (deg)", _fmt(th.value, ".6g")),
            ("Galilean reading: beta cos theta = (z_r - z_a)/2", _fmt(0.5 * (zr - za))),
        ]
        _table("jet pair", rows, out)
    if args.z is not None:
        did = True
        t = k.velocity_readings(args.z)[0]
        rows = [
            ("z", _fmt(t["z"])),
            ("cz (optical, linear) km/s", _fmt(t["cz"].value, ".8g")),
            ("radio convention cz/(1+z) km/s", _fmt(t["v_radio"].value, ".8g")),
            ("relativistic radial speed km/s", _fmt(t["v_relativistic"].value, ".8g")),
            ("relativistic radial beta", _fmt(t["beta_radial"], ".8g")),
            ("beta if the shift were all transverse Doppler (theta = 90 deg)", _fmt(t["beta_if_transverse"], ".8g")),
            ("cz off the relativistic reading by", f"{100 * float(t['cz_error']):+.3g} %"),
            ("radio reading off by", f"{100 * float(t['radio_error']):+.3g} %"),
        ]
        _table("single redshift", rows, out)
    if args.proper_motion is not None or args.host_z is not None:
        did = True
        if args.proper_motion is None or args.host_z is None:
            raise _UsageError("dopplerkit calc: --proper-motion and --host-z go together")
        if not args.proper_motion > 0:
            raise _UsageError(f"dopplerkit calc: --proper-motion must be > 0 mas/yr, got {args.proper_motion:g}")
        if not args.host_z > 0:
            raise _UsageError(f"dopplerkit calc: --host-z must be a cosmological redshift > 0, got {args.host_z:g}")
        import astropy.units as u

        b_app = k.apparent_speed_from_proper_motion(args.proper_motion * u.mas / u.yr, args.host_z)
        lim = k.apparent_speed_limits(b_app)
        rows = [
            ("proper motion (mas/yr), host z", f"{args.proper_motion:g}, {args.host_z:g}"),
            ("apparent speed beta_app (Planck18 distances)", _fmt(b_app)),
            ("smallest speed beta_min = beta_app/sqrt(1 + beta_app^2)", _fmt(lim["beta_min"], ".8g")),
            ("smallest Lorentz factor Gamma_min = sqrt(1 + beta_app^2)", _fmt(lim["gamma_min"])),
            ("viewing angle at Gamma_min (deg), cot theta = beta_app", _fmt(lim["theta_critical"].value)),
            ("largest viewing angle for any speed (deg), 2 arctan(1/beta_app)", _fmt(lim["theta_max"].value)),
        ]
        if args.doppler is not None:
            if not args.doppler > 0:
                raise _UsageError(f"dopplerkit calc: --doppler must be > 0, got {args.doppler:g}")
            g, th = k.solve_apparent_and_doppler(b_app, args.doppler)
            rows += [
                ("with the Doppler factor: Lorentz factor Gamma", _fmt(g)),
                ("with the Doppler factor: viewing angle (deg)", _fmt(th.value)),
            ]
        _table("apparent motion at the host's distance", rows, out)
    if not did:
        raise _UsageError(
            "dopplerkit calc: give a speed (--beta or --gamma, with --angle), a pair (--pair ZA ZR), a redshift (--z), "
            "or a proper motion with its host redshift (--proper-motion MAS_PER_YR --host-z Z)"
        )
    return EXIT_OK


def _table(title, rows, out):
    width = max(len(r[0]) for r in rows)
    print(f"# {title}", file=out)
    for name, val in rows:
        print(f"  {name:<{width}}  {val}", file=out)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code (0 ok, 1 some spectra failed, 2 nothing could run)."""
    parser = _build_parser()
    try:
        args = parser.parse_args(argv)
    except _UsageError as exc:
        print(exc, file=sys.stderr)
        return EXIT_USAGE
    except SystemExit as exc:  # --help / --version
        return int(exc.code or 0)
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("default")
            if args.command == "calc":
                return _calc(args, sys.stdout)
            if args.command == "batch":
                from .batch import run_batch_cli

                return run_batch_cli(args)
            if args.command == "demo":
                from .demo import run_demo

                return run_demo(output_dir=args.output_dir, workers=args.workers)
    except _UsageError as exc:
        print(exc, file=sys.stderr)
        return EXIT_USAGE
    except (ValueError, TypeError, OSError) as exc:
        print(f"dopplerkit {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    return EXIT_USAGE  # pragma: no cover


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
