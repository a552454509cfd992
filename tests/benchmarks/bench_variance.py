"""Cosmic-variance benchmark: the analytic value for the demo footprint and for ~1000 deg^2
with 10^5 holes.

Run as a script (not collected by pytest):

    python tests/benchmarks/bench_variance.py [--holes 100000]

Each case runs in its own child process so its peak RSS is its own. Timed, for each
footprint (built first, its time printed apart): the analytic cosmic variance from scratch —
the linear power spectrum, the mask spectrum at the default resolution, the Limber C_ell of a
parametric n(z) and the sum — and, as the baseline in the same process, one bare
``healpy.anafast`` of the same coverage map (the floor of any harmonic-space method). Also
printed: the variance at a four times finer mask map and the relative change, which shows
what the coarse default map gives away (the 30 s target applies to the default).
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

RA_RANGE = (150.0, 181.6)
DEC_RANGE = (-15.8, 15.8)
DEMO = Path(__file__).resolve().parents[2] / "demo_data" / "survey.toml"


def peak_rss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def build(case, n_holes):
    from countscale.footprint import Footprint

    if case == "demo":
        from countscale.runfile import load_runfile

        return Footprint.from_runfile_section(load_runfile(DEMO).footprint)
    rng = np.random.default_rng(5)
    ra = rng.uniform(*RA_RANGE, n_holes)
    s_lo, s_hi = np.sin(np.radians(DEC_RANGE))
    dec = np.degrees(np.arcsin(rng.uniform(s_lo, s_hi, n_holes)))
    radius = np.exp(rng.uniform(np.log(5.0), np.log(120.0), n_holes))  # arcsec
    return (Footprint.box(RA_RANGE, DEC_RANGE, max_order=16)
            - Footprint.circles(ra, dec, radius, max_order=16))


def run_case(case, n_holes):
    import healpy as hp

    from countscale import variance as vr

    t0 = time.perf_counter()
    footprint = build(case, n_holes)
    build_s = time.perf_counter() - t0

    t0 = time.perf_counter()
    power = vr.linear_power("Planck18")
    mask = vr.footprint_mask_spectrum(footprint)
    cv = vr.cosmic_variance(power, mask, vr.RedshiftDistribution.from_median(0.45), bias=1.0)
    sigma = cv(21.8)
    analytic_s = time.perf_counter() - t0
    nside = int(mask.method.split("nside ")[1].split(" ")[0])

    t0 = time.perf_counter()
    hp.anafast(footprint.to_healpix(nside), lmax=2 * nside, iter=0)
    baseline_s = time.perf_counter() - t0

    t0 = time.perf_counter()
    fine = vr.footprint_mask_spectrum(footprint, nside=4 * nside, lmax=8 * nside)
    fine_sigma = cv.sigma(21.8, mask=fine)
    fine_s = time.perf_counter() - t0
    return {
        "case": case,
        "area_deg2": footprint.area_deg2,
        "build_s": build_s,
        "analytic_s": analytic_s,
        "baseline_anafast_s": baseline_s,
        "ratio": analytic_s / baseline_s,
        "nside": nside,
        "sigma_cv": sigma,
        "sigma_cv_fine": fine_sigma,
        "fine_nside": 4 * nside,
        "fine_s": fine_s,
        "relative_change": fine_sigma / sigma - 1.0,
        "peak_rss_mb": peak_rss_mb(),
    }


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--holes", type=int, default=100_000)
    parser.add_argument("--child", choices=("demo", "holes"))
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(run_case(args.child, args.holes)))
        return 0
    rows = []
    for case in ("demo", "holes"):
        out = subprocess.run([sys.executable, __file__, "--child", case, "--holes",
                              str(args.holes)], capture_output=True, text=True, check=True)
        rows.append(json.loads(out.stdout.strip().splitlines()[-1]))
    for row in rows:
        name = "demo footprint" if row["case"] == "demo" else f"{args.holes:,d} holes"
        print(f"{name}: {row['area_deg2']:.2f} deg² (footprint built in {row['build_s']:.2f} s)")
        print(f"  analytic sigma_cv = {row['sigma_cv']:.5f} in {row['analytic_s']:.2f} s "
              f"(mask map nside {row['nside']}); bare anafast {row['baseline_anafast_s']:.2f} s;"
              f" ratio {row['ratio']:.2f}")
        print(f"  at nside {row['fine_nside']}: {row['sigma_cv_fine']:.5f} "
              f"({row['relative_change']:+.3%}) in {row['fine_s']:.2f} s; "
              f"peak RSS {row['peak_rss_mb']:.0f} MB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
