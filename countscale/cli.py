"""The ``countscale`` command line: thin sub-commands over the library.

Examples
--------
The bundled demo survey, then a survey of your own described by a run file::

    $ countscale demo --out demo_out --seed 7
    $ countscale run survey.toml --out results/ --seed 1
    $ countscale run survey.toml --engine dask --scheduler tcp://10.0.0.5:8786 --json

Area of a footprint given as a HEALPix map, a MOC, or a run file's ``[footprint]``::

    $ countscale area demo_data/survey.toml
    $ countscale area mask.fits --threshold 3 --json
    $ countscale area footprint_moc.fits --plot footprint.png

Radius, volume and age of the observable universe::

    $ countscale horizon --cosmology Planck18

Survey planning: the precision of a surface density against area, the area for a target,
from a population given on the command line or measured by a run file::

    $ countscale plan --surface-density 8000 --redshift-median 0.45 --bias 1.2 --target 0.02
    $ countscale plan demo_data/survey.toml --target 0.01 --fields 4 --plot plan.png --json

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
import warnings
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
    run.set_defaults(handler=_cmd_run)

    demo = sub.add_parser(
        "demo",
        help="run the bundled demo survey",
        description="Run demo_data/survey.toml from the countscale source repository.",
    )
    _add_run_options(demo, default_out=DEMO_OUT, default_seed=DEMO_SEED)
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

    plan = sub.add_parser(
        "plan",
        help="precision against area and depth; the area for a target precision",
        description="Fractional error of a surface density against survey area (Poisson and "
        "cosmic variance) for one contiguous field, N separated fields and a long strip; the "
        "area needed for --target; the depth trade-off. The population comes from RUNFILE "
        "(its counts, n(z) and bias, measured by running it) and/or the options.",
    )
    plan.add_argument("runfile", metavar="RUNFILE", nargs="?",
                      help="a run file whose survey measures the population (optional)")
    plan.add_argument("--surface-density", type=float, metavar="PER_DEG2",
                      help="sources per deg² brighter than the magnitude limit")
    plan.add_argument("--slope", type=float, metavar="DEX_PER_MAG",
                      help="d log10 N(<m) / dm at the limit, for the depth trade-off")
    plan.add_argument("--redshift-median", type=float, metavar="Z",
                      help="median redshift of the population (parametric n(z))")
    plan.add_argument("--bias", type=float, metavar="B", help="linear bias (default 1)")
    plan.add_argument("--mag-limit", type=float, metavar="M",
                      help="the magnitude limit the density refers to (a label)")
    plan.add_argument("--fields", type=int, metavar="N", default=1,
                      help="N separated fields of equal total area (default 1: one "
                      "contiguous field)")
    plan.add_argument("--target", type=float, metavar="FRACTION",
                      help="target fractional (1σ) precision of the surface density")
    plan.add_argument("--cosmology", default=None,
                      help="astropy realization name (default: the run file's, else Planck18)")
    plan.add_argument("--plot", metavar="PNG", help="draw the precision curves into this PNG")
    plan.add_argument("--json", action="store_true", help="print one JSON object")
    plan.set_defaults(handler=_cmd_plan)

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
        # Warnings become one line each on stderr, after the command's output (a run puts
        # its own into results.json and its report); a failed command shows only its error.
        with warnings.catch_warnings(record=True) as caught:
            code = args.handler(args)
        for line in dict.fromkeys(_one_line_warning(w) for w in caught):
            print(f"countscale: warning: {line}", file=sys.stderr)
        return code
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


def _one_line_warning(item):
    text = str(item.message).strip().splitlines()
    return text[0] if text else item.category.__name__


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
#: The seed ``countscale demo`` uses unless told, so that its report is the same everywhere.
DEMO_SEED = 1


def _add_run_options(parser, default_out=None, default_seed=None):
    where = f"default {default_out}" if default_out else "default: the run file's [output].dir"
    seed_help = (f"default {default_seed}, so the demo's report is the same on every machine"
                 if default_seed is not None else "default: drawn and recorded")
    parser.add_argument("--out", metavar="DIR", default=default_out,
                        help=f"report folder ({where})")
    parser.add_argument("--json", action="store_true",
                        help="print the results as one JSON object")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    parser.add_argument("--seed", type=int, metavar="N", default=default_seed,
                        help=f"seed of the run's random generator ({seed_help})")


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
        # The summary object only (the whole record is results.json, listed under output).
        output = {"dir": str(result.out_dir), "files": [str(f) for f in result.files]}
        print(json.dumps({**result.results["summary"], "output": output}))
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
    return _run_and_print(args, path, seed=args.seed)


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
# plan
# ----------------------------------------------------------------------------------------
def _plan_population(args):
    from countscale import planning

    if args.runfile is None:
        missing = [flag for flag, value in (("--surface-density", args.surface_density),
                                            ("--redshift-median", args.redshift_median))
                   if value is None]
        if missing:
            raise InputError(f"countscale plan needs {' and '.join(missing)} (or a RUNFILE "
                             "whose survey measures them)")
        power = None
        if args.cosmology is not None:
            from countscale.cosmology import get_cosmology
            from countscale.variance import linear_power

            power = linear_power(get_cosmology(args.cosmology))
        return planning.population(
            surface_density_per_deg2=args.surface_density,
            redshift_median=args.redshift_median,
            bias=1.0 if args.bias is None else args.bias,
            slope=args.slope, mag_limit=args.mag_limit, power=power,
            source="given on the command line")
    from countscale.pipeline import plan_population

    measured = plan_population(args.runfile, progress=False)
    changed = []
    nz, redshift_median = measured.nz, None
    if args.redshift_median is not None:
        nz, redshift_median = None, args.redshift_median
        changed.append("n(z)")
    values = {"surface_density_per_deg2": measured.surface_density_per_deg2,
              "bias": measured.bias, "slope": measured.slope,
              "mag_limit": measured.mag_limit}
    for key, flag, value in (("surface_density_per_deg2", "surface density",
                              args.surface_density), ("bias", "bias", args.bias),
                             ("slope", "slope", args.slope),
                             ("mag_limit", "magnitude limit", args.mag_limit)):
        if value is not None:
            values[key] = value
            changed.append(flag)
    power = measured.power
    if args.cosmology is not None:
        from countscale.cosmology import get_cosmology
        from countscale.variance import linear_power

        power = linear_power(get_cosmology(args.cosmology))
        changed.append("cosmology")
    source = measured.source + (f"; {', '.join(changed)} from the command line"
                                if changed else "")
    return planning.population(nz=nz, redshift_median=redshift_median, power=power,
                               source=source, **values)


def _cmd_plan(args):
    from countscale import planning

    if args.fields < 1:
        raise InputError(f"--fields must be an integer >= 1; got {args.fields}")
    if args.target is not None and not 0.0 < args.target < 1.0:
        raise InputError(f"--target must be a fraction in (0, 1); got {args.target}")
    pop = _plan_population(args)
    layout = "fields" if args.fields > 1 else "contiguous"
    plan = planning.plan_survey(pop, target=args.target, layout=layout, n_fields=args.fields)
    result = plan.to_json()
    if args.plot:
        from countscale import plots

        plots.plan_figure(result, args.plot)
    if args.json:
        print(json.dumps(result))
        return EXIT_OK
    print(_plan_text(result, args.plot))
    return EXIT_OK


def _plan_text(result, plot=None):
    pop = result["population"]
    layout = result["layout"]
    rows = [
        ("quantity", result["quantity"]),
        ("population", f"{pop['surface_density_per_deg2']:.4g} per deg²; n(z) median "
                       f"{pop['redshift_median']:.3g}; bias {pop['bias']:g}"
                       + (f"; slope {pop['slope']:.3g} dex/mag" if pop["slope"] else "")),
        ("", f"({pop['source']})"),
        ("layout", layout["description"]),
    ]
    target = result["target_precision"]
    if target is not None:
        if result["reachable"]:
            rows.append(("target", f"{target:g} (1σ) needs {result['required_area_deg2']:.4g} "
                                   "deg²"))
        else:
            rows.append(("target", f"{target:g} (1σ) is NOT reachable with this layout: the "
                                   f"best it gets is {result['floor_precision']:.3g} (at "
                                   f"{layout['max_area_deg2']:.6g} deg²)"))
    rows.append(("floor", f"{result['floor_precision']:.3g} at {layout['max_area_deg2']:.6g} "
                          "deg² (the layout's largest area)"))
    cross = result["crossover_area_deg2"]
    rows.append(("crossover", "cosmic variance exceeds Poisson noise above "
                 f"{cross:.3g} deg²" if cross else "cosmic variance stays below Poisson noise"
                 if result["curve"][-1]["cosmic_variance"] < result["curve"][-1]["poisson"]
                 else "cosmic variance exceeds Poisson noise at every area shown"))
    width = max(len(key) for key, _ in rows)
    lines = [f"{key:<{width}}  {value}" for key, value in rows]
    lines += ["", f"  {'area [deg²]':>12} {'Poisson':>10} {'cosmic var.':>12} {'total':>10}"]
    for point in result["curve"][::4]:
        lines.append(f"  {point['area_deg2']:>12.4g} {point['poisson']:>10.3g} "
                     f"{point['cosmic_variance']:>12.3g} {point['total']:>10.3g}")
    lines += ["", "layouts compared" + (f" (target {target:g})" if target else ""),
              f"  {'layout':<34} {'required deg²':>14} {'floor':>10} {'crossover deg²':>15}"]
    for entry in result["layouts"].values():
        required = entry["required_area_deg2"]
        req = ("—" if target is None else "unreachable" if required is None
               else f"{required:.4g}")
        crossover = entry["crossover_area_deg2"]
        name = {"contiguous": "one contiguous field",
                "strip": f"one strip ({entry.get('aspect_ratio', 10):g}:1)",
                "fields": f"{entry['n_fields']} separated fields"}[entry["kind"]]
        lines.append(f"  {name:<34} {req:>14} {entry['floor_precision']:>10.3g} "
                     f"{'—' if crossover is None else f'{crossover:.3g}':>15}")
    if result["depth"]:
        lines += ["", "depth trade-off (background-limited: Δm = 1.25 log10 of the exposure "
                      "ratio; same n(z))",
                  f"  {'exposure ×':>10} {'Δm':>7} {'per deg²':>10} {'required deg²':>14} "
                  f"{'time ×':>8}"]
        for row in result["depth"]:
            required = row["required_area_deg2"]
            req = ("—" if target is None else "unreachable" if required is None
                   else f"{required:.4g}")
            time_factor = "—" if row["time_factor"] is None else f"{row['time_factor']:.3g}"
            lines.append(f"  {row['exposure_factor']:>10g} {row['delta_mag']:>+7.3f} "
                         f"{row['surface_density_per_deg2']:>10.4g} {req:>14} "
                         f"{time_factor:>8}")
    lines += ["", "assumptions"] + [f"  - {a}" for a in result["assumptions"]]
    if plot:
        lines += ["", f"figure  {plot}"]
    return "\n".join(lines)


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
