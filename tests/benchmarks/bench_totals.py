"""Totals benchmark: each total of the [totals] stage with 10^4 Monte Carlo draws.

Run as a script (not collected by pytest):

    python tests/benchmarks/bench_totals.py [--draws 10000]

The demo survey's stages up to the counts and the luminosity function run once (not timed);
then each total is timed from its fitted inputs: ``sky_total`` (three count models with the
completeness linearised, cosmic variance, area: six passes of ``propagate``), the present-day
and light-cone volume totals, the stars total, and the whole totals stage (with its refits and
checks). The baseline, measured in the same process: bare numpy draws of the same size and
passes (lognormal draws, a product, log10 and a variance). Printed: seconds, the ratio to the
baseline, and the peak RSS. The target is <= 5 s per total for 10^4 draws.
"""

from __future__ import annotations

import argparse
import resource
import time
import warnings
from pathlib import Path

import numpy as np

DEMO = Path(__file__).resolve().parents[2] / "demo_data" / "survey.toml"


def peak_rss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def numpy_baseline(n_draws, n_passes):
    rng = np.random.default_rng(0)
    start = time.perf_counter()
    for _ in range(n_passes):
        a = 10.0 ** (0.1 * rng.standard_normal(n_draws))
        b = 10.0 ** (0.2 * rng.standard_normal(n_draws))
        np.log10(a * b).var()
    return time.perf_counter() - start


def demo_context():
    from countscale import pipeline
    from countscale.runfile import load_runfile

    runfile = load_runfile(DEMO)
    stages = [s for s in pipeline.STAGES if s.name != "totals"
              and all(n in runfile.present for n in s.sections)
              and (s.when is None or s.when(runfile))]
    columns = tuple(dict.fromkeys(c for s in [*stages, pipeline.STAGES[-1]]
                                  for c in pipeline._stage_columns(s, runfile)))
    ctx = pipeline.RunContext(runfile=runfile, engine="local", scheduler=None,
                              rng=np.random.default_rng(1), progress=False, columns=columns)
    for stage in stages:
        ctx.results[stage.name] = stage.run(ctx)
    return ctx


def timed(run):
    start = time.perf_counter()
    value = run()
    return time.perf_counter() - start, value


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--draws", type=int, default=10_000)
    args = parser.parse_args()
    n = args.draws
    warnings.simplefilter("ignore")

    from countscale import pipeline
    from countscale import totals as tt
    from countscale.cosmology import get_cosmology, hubble_h
    from countscale.extrapolation import CosmologyDraws, LogNormal

    print("preparing the demo's fits (not timed) ... ", end="", flush=True)
    ctx = demo_context()
    print(f"done; peak RSS {peak_rss_mb():.0f} MB")
    stage = pipeline._stage_totals(ctx)  # warm astropy and the cosmology grid
    sky = stage["sky"]
    lf = ctx.results["luminosity_function"]["fit"]
    cosmo = get_cosmology("Planck18")
    function = tt.FittedFunction("luminosity", "schechter", dict(lf.params_), hubble_h(cosmo))
    sampler = tt.FunctionDraws(function, lf.draw_params)
    cosmology = CosmologyDraws(cosmo)
    per_msun = tt.stars_per_msun_sampler(["chabrier", "kroupa"])

    cases = [
        ("sky_total (6 passes)", lambda: sky.estimate(n, 1), 6),
        ("present_day_volume_total (4)", lambda: tt.present_day_total(
            function, sampler, -17.0, cosmology, None, n, 1, normalisation_sigma=0.05), 4),
        ("light_cone_total to z = 8 (4)", lambda: tt.light_cone_total(
            function, sampler, -17.0, cosmology, (0.0, 8.0), n, 1,
            normalisation_sigma=0.05), 4),
        ("stars_total (6)", lambda: tt.stars_total(
            function, sampler, cosmology, per_msun, None, LogNormal(1.7, 0.15), 4.76, n, 1,
            normalisation_sigma=0.05), 6),
    ]
    print(f"\n{n:,d} draws per pass")
    print(f"{'total':34s} {'seconds':>8s} {'numpy':>8s} {'ratio':>7s}   median")
    for name, run, passes in cases:
        elapsed, est = timed(run)
        base = numpy_baseline(n, passes)
        print(f"{name:34s} {elapsed:8.3f} {base:8.4f} {elapsed / base:7.0f}   {est.median:.4g}")
    ctx.rng = np.random.default_rng(2)
    whole, _ = timed(lambda: pipeline._stage_totals(ctx))
    print(f"the whole totals stage on the demo (refits, checks, five totals and stars per "
          f"galaxy, {ctx.runfile.totals.draws:,d} draws): {whole:.2f} s")
    print(f"peak RSS {peak_rss_mb():.0f} MB")


if __name__ == "__main__":
    main()
