"""The ``countscale`` command line: thin sub-commands over the library.

Examples
--------
The bundled demo survey, then a survey of your own described by a run file::

    $ countscale demo --out demo_out
    $ countscale run survey.toml --out results/ --seed 1
    $ countscale run survey.toml --engine dask --scheduler tcp://10.0.0.5:8786 --json

Area of a footprint given as a HEALPix map, a MOC, or a run file's ``[footprint]``::

    $ countscale area demo_data/survey.toml
    $ countscale area mask.fits --threshold 3 --json
    $ countscale area footprint_moc.fits --plot footprint.png

Radius, volume and age of the observable universe::

    $ countscale horizon --cosmology Planck18

Check a quoted total against published-input scenarios, or against a run's own totals::

    $ countscale claim "two trillion galaxies"
    $ countscale claim "a hundred billion stars in a galaxy like ours" --json
    $ countscale claim "10^22 stars" --results results/results.json

Exit codes: 0 ok; 1 the computation failed; 2 a usage or input error (one line on stderr
naming the file, key or column, the rule and the value; a traceback only with ``--debug``).
With ``--json`` a command prints one JSON object on stdout and nothing else there.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
import sys
from pathlib import Path

from countscale.errors import InputError, InputTypeError

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    def error(self, message):
        self.print_usage(sys.stderr)
        print(f"countscale: error: {message}", file=sys.stderr)
        raise SystemExit(EXIT_USAGE)


def build_parser():
    parser = _Parser(
        prog="countscale",
        description="From a partial galaxy or star survey to statements about the whole.",
    )
    parser.add_argument("--debug", action="store_true", help="show tracebacks on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    area = sub.add_parser(
        "area",
        help="area of a footprint (HEALPix map, MOC, or a run file's [footprint])",
        description="Area of a footprint given as a HEALPix FITS map, a MOC FITS file, or a "
        "TOML run file with a [footprint] section.",
    )
    area.add_argument("footprint", metavar="FOOTPRINT", help="map .fits, MOC .fits or run .toml")
    area.add_argument("--json", action="store_true", help="print one JSON object")
    area.add_argument("--plot", metavar="PNG", help="also draw the footprint into this PNG")
    area.add_argument(
        "--threshold",
        type=float,
        help="for a HEALPix map of hit counts or weights: pixels >= this value are in",
    )
    ordering = area.add_mutually_exclusive_group()
    ordering.add_argument("--nest", dest="nest", action="store_const", const=True,
                          help="the map is NEST-ordered (overrides its header)")
    ordering.add_argument("--ring", dest="nest", action="store_const", const=False,
                          help="the map is RING-ordered (overrides its header)")
    area.set_defaults(handler=_cmd_area)

    run = sub.add_parser(
        "run",
        help="the whole job a run file describes (tally, ...) into a report folder",
        description="Run every stage a TOML run file asks for and write results.json and "
        "report.md into the output folder.",
    )
    run.add_argument("runfile", metavar="RUNFILE", help="the TOML run file")
    _add_run_options(run)
    run.add_argument("--engine", choices=("local", "dask"),
                     help="where to tally: this process (local) or a Dask cluster "
                     "(default: the run file's [engine].kind)")
    run.add_argument("--scheduler", metavar="ADDR",
                     help="Dask scheduler address, e.g. tcp://host:8786 (default: the run "
                     "file's, else a local cluster)")
    run.add_argument("--seed", type=int, metavar="N",
                     help="seed of the run's random generator (default: drawn and recorded)")
    run.set_defaults(handler=_cmd_run)

    demo = sub.add_parser(
        "demo",
        help="run the bundled demo survey",
        description="Run demo_data/survey.toml from the countscale source repository.",
    )
    _add_run_options(demo, default_out=DEMO_OUT)
    demo.set_defaults(handler=_cmd_demo)

    horizon = sub.add_parser(
        "horizon",
        help="radius, volume and age of the observable universe",
        description="Comoving particle horizon (radius of the observable universe), its "
        "volume and the age of the universe, for a cosmology.",
    )
    horizon.add_argument("--cosmology", default="Planck18",
                         help="astropy realization name (default Planck18)")
    horizon.add_argument("--json", action="store_true", help="print one JSON object")
    horizon.set_defaults(handler=_cmd_horizon)

    claim = sub.add_parser(
        "claim",
        help="check a quoted total (\"two trillion galaxies\") against published inputs",
        description="Parse a quoted number of galaxies or stars, compare it with the built-in "
        "published-input scenarios (or a run's totals), and say which definition decides it.",
    )
    claim.add_argument("text", metavar="TEXT", help="the claim, e.g. \"two trillion galaxies\"")
    claim.add_argument("--scope", choices=("observable_universe", "milky_way", "sky"),
                       help="what the number counts (default: read from the text, else the "
                       "observable universe)")
    claim.add_argument("--results", metavar="RESULTS_JSON",
                       help="compare with this run's results.json totals instead")
    claim.add_argument("--min-mass", type=float, metavar="LOG10_MSUN",
                       help="count galaxies above this stellar mass (log10 Msun; default 6)")
    claim.add_argument("--max-mass", type=float, metavar="LOG10_MSUN",
                       help="count galaxies below this stellar mass (log10 Msun)")
    claim.add_argument("--seed", type=int, default=0, metavar="N",
                       help="seed of the Monte Carlo draws (default 0)")
    claim.add_argument("--draws", type=int, default=10_000, metavar="N",
                       help="Monte Carlo draws per pass (default 10000)")
    claim.add_argument("--json", action="store_true", help="print one JSON object")
    claim.set_defaults(handler=_cmd_claim)
    return parser


def main(argv=None):
    """Run the command line; returns the exit code."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse: --help (0) or usage errors (2)
        return int(exc.code or 0)
    try:
        return args.handler(args)
    except (InputError, InputTypeError, FileNotFoundError, IsADirectoryError,
            PermissionError) as exc:
        if args.debug:
            raise
        print(f"countscale: error: {_one_line(exc)}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print("countscale: interrupted", file=sys.stderr)
        return EXIT_FAILED
    except Exception as exc:
        if args.debug:
            raise
        print(f"countscale: computation failed: {type(exc).__name__}: {_one_line(exc)}",
              file=sys.stderr)
        return EXIT_FAILED


def _one_line(exc):
    text = str(exc).strip()
    if isinstance(exc, OSError) and exc.filename:
        text = f"{exc.filename}: {exc.strerror or text}"
    return text.splitlines()[0] if text else type(exc).__name__


# ----------------------------------------------------------------------------------------
# area
# ----------------------------------------------------------------------------------------
def load_footprint(spec, threshold=None, nest=None):
    """Footprint and a description from a path: HEALPix map, MOC, or run file."""
    from countscale.footprint import Footprint

    path = Path(spec)
    if not path.exists():
        raise InputError(f"{path}: file not found")
    if path.is_dir():
        raise InputError(f"{path}: is a folder; FOOTPRINT must be a .fits or .toml file")
    suffix = "".join(path.suffixes).lower()
    if suffix.endswith(".toml"):
        from countscale.runfile import load_runfile

        runfile = load_runfile(path).require("footprint", needed_by="countscale area")
        section = runfile.footprint
        from countscale.pipeline import catalog_positions

        positions = catalog_positions(runfile) if "catalog" in runfile.present else None
        footprint = Footprint.from_runfile_section(section, catalog_positions=positions)
        kind = (f"run file [footprint]: {len(section.include)} include, "
                f"{len(section.exclude)} exclude")
        return footprint, kind
    if suffix.endswith((".fits", ".fit", ".fits.gz", ".fit.gz")):
        if _is_moc(path):
            return Footprint.read_moc(path), "MOC"
        footprint = Footprint.read_healpix_map(path, threshold=threshold, nest=nest)
        return footprint, f"HEALPix map (nside {2 ** footprint.max_order})"
    raise InputError(
        f"{path}: FOOTPRINT must be a HEALPix or MOC .fits file or a .toml run file; "
        f"got {suffix or 'no extension'}"
    )


def _is_moc(path):
    from astropy.io import fits

    try:
        with fits.open(path) as hdul:
            for hdu in hdul[1:]:
                if str(hdu.header.get("ORDERING", "")).upper() == "NUNIQ":
                    return True
                if hasattr(hdu, "columns") and "UNIQ" in [c.upper() for c in hdu.columns.names]:
                    return True
    except OSError:
        return False  # let the map reader give its one-line message
    return False


def _cmd_area(args):
    footprint, kind = load_footprint(args.footprint, args.threshold, args.nest)
    if args.plot:
        from countscale import plots

        plots.footprint_figure(footprint, args.plot, title=Path(args.footprint).name)
    summary = footprint.summary()
    if args.json:
        print(json.dumps(summary))
        return EXIT_OK
    cell_arcsec = math.degrees(math.sqrt(4 * math.pi / (12 * 4**footprint.max_order))) * 3600
    rows = [
        ("footprint", f"{args.footprint}  ({kind})"),
        ("area", f"{summary['area_deg2']:.6f} ± {summary['area_uncertainty_deg2']:.2g} deg²"),
        ("", f"{summary['area_sr']:.6g} sr; sky fraction {summary['sky_fraction']:.4g}"),
        ("finest order", f"{footprint.max_order} (nside {2 ** footprint.max_order}, "
                         f"cells {cell_arcsec:.3g}″)"),
        ("cells", f"{summary['n_cells']} (multi-order)"),
    ]
    if args.plot:
        rows.append(("figure", args.plot))
    _print_table(rows)
    return EXIT_OK


# ----------------------------------------------------------------------------------------
# run, demo
# ----------------------------------------------------------------------------------------
#: Where ``countscale demo`` writes unless told (relative to the working folder).
DEMO_OUT = "countscale_demo"


def _add_run_options(parser, default_out=None):
    where = f"default {default_out}" if default_out else "default: the run file's [output].dir"
    parser.add_argument("--out", metavar="DIR", default=default_out,
                        help=f"report folder ({where})")
    parser.add_argument("--json", action="store_true",
                        help="print the results as one JSON object")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")


def demo_runfile():
    """Path of the demo run file: ``demo_data/survey.toml`` at the repository's root."""
    import countscale

    return Path(countscale.__file__).resolve().parents[1] / "demo_data" / "survey.toml"


def _run_and_print(args, runfile, engine=None, scheduler=None, seed=None):
    from countscale import report
    from countscale.pipeline import run_survey

    if seed is not None and seed < 0:
        raise InputError(f"--seed must be a non-negative integer; got {seed}")
    result = run_survey(runfile, out_dir=args.out, engine=engine, scheduler=scheduler,
                        seed=seed, progress=False if args.quiet else None)
    if args.json:
        output = {"dir": str(result.out_dir), "files": [str(f) for f in result.files]}
        print(json.dumps({**result.results, "output": output}))
    else:
        print(report.render_text(result.results, result.files))
    return EXIT_OK


def _cmd_run(args):
    return _run_and_print(args, args.runfile, args.engine, args.scheduler, args.seed)


def _cmd_demo(args):
    path = demo_runfile()
    if not path.is_file():
        raise InputError(
            f"demo run file not found at '{path}'; the demo data ships with the countscale "
            "source repository (or run `countscale run YOUR_RUNFILE.toml`)"
        )
    return _run_and_print(args, path)


# ----------------------------------------------------------------------------------------
# horizon
# ----------------------------------------------------------------------------------------
def _cmd_horizon(args):
    from countscale.cosmology import get_cosmology, horizon

    result = horizon(get_cosmology(args.cosmology))
    if args.json:
        print(json.dumps(dataclasses.asdict(result)))
        return EXIT_OK
    _print_table([
        ("cosmology", result.cosmology),
        ("radius", f"{result.radius_mpc:.5g} Mpc = {result.radius_gly:.4g} billion light years "
                   "(comoving particle horizon)"),
        ("volume", f"{result.volume_mpc3:.4g} Mpc³ (comoving)"),
        ("age", f"{result.age_gyr:.4g} Gyr"),
    ])
    return EXIT_OK


# ----------------------------------------------------------------------------------------
# claim
# ----------------------------------------------------------------------------------------
def _cmd_claim(args):
    import textwrap

    from countscale.claims import check_claim

    if args.seed < 0:
        raise InputError(f"--seed must be a non-negative integer; got {args.seed}")
    if args.draws < 100:
        raise InputError(f"--draws must be >= 100; got {args.draws}")
    result = check_claim(args.text, scope=args.scope, log10_mass_min=args.min_mass,
                         log10_mass_max=args.max_mass, results=args.results,
                         n_draws=args.draws, rng=args.seed)
    if args.json:
        print(json.dumps(result.to_json()))
        return EXIT_OK
    print(textwrap.fill(result.summary(), width=100))
    print()
    header = ("definition", "estimate (68 %)", "95 %", "verdict", "quoted/estimate [dex]")
    rows = [header, *result.table_rows()]
    widths = [max(len(row[i]) for row in rows) for i in range(len(header))]
    for k, row in enumerate(rows):
        print("  ".join(cell.ljust(w) for cell, w in zip(row, widths, strict=True)).rstrip())
        if k == 0:
            print("  ".join("-" * w for w in widths))
    if result.assumptions:
        print()
        print("assumptions (effect on the estimate, dex):")
        for item in result.assumptions:
            effect = item["effect_log10"]
            text = "   n/a" if effect is None else f"{effect:+6.2f}"
            print(f"  {text}  {item['name']}: {item['note']}")
    if result.sources:
        print()
        print("sources: " + "; ".join(s["citation"] for s in result.sources))
    return EXIT_OK


def _print_table(rows):
    width = max(len(key) for key, _ in rows)
    for key, value in rows:
        print(f"{key:<{width}}  {value}")


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
