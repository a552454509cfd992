"""Footprint benchmark: ~1000 deg^2 minus 10^5 holes of 5"-120" at order 16.

Run as a script (not collected by pytest):

    python tests/benchmarks/bench_footprint.py [--holes 100000] [--points 3000000]

Each variant runs in its own child process so its peak RSS is its own. The baseline is the
usual way: a dense boolean healpy map at nside 4096 (the finest whose whole-sky map fits in
memory comfortably), the box set with `query_polygon` and each hole cleared with a per-hole
`query_disc`. Printed: build time, peak RSS, area, `contains` throughput, and ratios
(countscale / baseline) from the same run.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time

import numpy as np

RA_RANGE = (150.0, 181.6)
DEC_RANGE = (-15.8, 15.8)
BASELINE_NSIDE = 4096


def holes(n, seed=5):
    rng = np.random.default_rng(seed)
    ra = rng.uniform(*RA_RANGE, n)
    s_lo, s_hi = np.sin(np.radians(DEC_RANGE))
    dec = np.degrees(np.arcsin(rng.uniform(s_lo, s_hi, n)))
    radius = np.exp(rng.uniform(np.log(5.0), np.log(120.0), n))  # log-uniform, arcsec
    return ra, dec, radius


def points(n, seed=9):
    rng = np.random.default_rng(seed)
    return rng.uniform(*RA_RANGE, n), rng.uniform(DEC_RANGE[0], DEC_RANGE[1], n)


def peak_rss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def run_countscale(n_holes, n_points):
    from countscale.footprint import Footprint

    ra, dec, radius = holes(n_holes)
    t0 = time.perf_counter()
    box = Footprint.box(RA_RANGE, DEC_RANGE, max_order=16)
    cut = Footprint.circles(ra, dec, radius, max_order=16)
    footprint = box - cut
    build = time.perf_counter() - t0
    pra, pdec = points(n_points)
    t0 = time.perf_counter()
    inside = footprint.contains(pra, pdec)
    contains = time.perf_counter() - t0
    return {
        "build_s": build,
        "area_deg2": footprint.area_deg2,
        "area_uncertainty_deg2": footprint.area_uncertainty_deg2,
        "segments": footprint.n_segments,
        "contains_per_s": n_points / contains,
        "inside_fraction": float(inside.mean()),
        "peak_rss_mb": peak_rss_mb(),
    }


def run_baseline(n_holes, n_points):
    import healpy as hp

    ra, dec, radius = holes(n_holes)
    t0 = time.perf_counter()
    nside = BASELINE_NSIDE
    mask = np.zeros(hp.nside2npix(nside), dtype=bool)
    corners = hp.ang2vec(
        [RA_RANGE[0], RA_RANGE[1], RA_RANGE[1], RA_RANGE[0]],
        [DEC_RANGE[0], DEC_RANGE[0], DEC_RANGE[1], DEC_RANGE[1]],
        lonlat=True,
    )
    # query_polygon takes great-circle edges; the box's declination edges are small circles,
    # a difference the baseline accepts (it is the usual quick approach).
    mask[hp.query_polygon(nside, corners)] = True
    vec = hp.ang2vec(ra, dec, lonlat=True)
    for v, r in zip(vec, np.radians(radius / 3600.0), strict=True):
        mask[hp.query_disc(nside, v, r)] = False
    build = time.perf_counter() - t0
    pra, pdec = points(n_points)
    t0 = time.perf_counter()
    inside = mask[hp.ang2pix(nside, pra, pdec, lonlat=True)]
    contains = time.perf_counter() - t0
    return {
        "build_s": build,
        "area_deg2": mask.sum() * hp.nside2pixarea(nside, degrees=True),
        "contains_per_s": n_points / contains,
        "inside_fraction": float(inside.mean()),
        "peak_rss_mb": peak_rss_mb(),
    }


def run_montecarlo(n_holes, n_points):
    """Independent check of the area: uniform points in the box, holes by a k-d tree."""
    from scipy.spatial import cKDTree

    ra, dec, radius = holes(n_holes)
    rng = np.random.default_rng(17)
    n = 20_000_000
    s_lo, s_hi = np.sin(np.radians(DEC_RANGE))
    box_area = (180 / np.pi) * (RA_RANGE[1] - RA_RANGE[0]) * (s_hi - s_lo)  # closed form

    def unit(r, d):
        r, d = np.radians(r), np.radians(d)
        return np.stack([np.cos(d) * np.cos(r), np.cos(d) * np.sin(r), np.sin(d)], axis=1)

    tree = cKDTree(unit(ra, dec))
    chord = 2 * np.sin(np.radians(radius / 3600.0) / 2)
    inside, done = 0, 0
    while done < n:
        m = min(2_000_000, n - done)
        p = unit(rng.uniform(*RA_RANGE, m), np.degrees(np.arcsin(rng.uniform(s_lo, s_hi, m))))
        dist, idx = tree.query(p, k=8, distance_upper_bound=chord.max())
        found = idx < len(chord)
        limit = chord[np.where(found, idx, 0)]
        inside += int(np.any(found & (dist <= limit), axis=1).sum())
        done += m
    frac = inside / n
    area = box_area * (1 - frac)
    return {"area_deg2": area, "sigma_deg2": box_area * np.sqrt(frac * (1 - frac) / n)}


def child(which, n_holes, n_points):
    cmd = [sys.executable, __file__, "--child", which, "--holes", str(n_holes),
           "--points", str(n_points)]
    out = subprocess.run(cmd, check=True, capture_output=True, text=True).stdout
    return json.loads(out.strip().splitlines()[-1])


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--holes", type=int, default=100_000)
    parser.add_argument("--points", type=int, default=3_000_000)
    parser.add_argument("--child", choices=["countscale", "baseline", "montecarlo"])
    args = parser.parse_args()
    if args.child:
        run = {"countscale": run_countscale, "baseline": run_baseline,
               "montecarlo": run_montecarlo}[args.child]
        print(json.dumps(run(args.holes, args.points)))
        return
    ours = child("countscale", args.holes, args.points)
    base = child("baseline", args.holes, args.points)
    mc = child("montecarlo", args.holes, args.points)
    print(f"footprint: box {RA_RANGE} x {DEC_RANGE} minus {args.holes} holes 5-120 arcsec, "
          f"order 16 (baseline: dense healpy map, nside {BASELINE_NSIDE})")
    print(f"{'':22}{'countscale':>14}{'baseline':>14}{'ratio':>10}")
    for key, label in [("build_s", "build [s]"), ("peak_rss_mb", "peak RSS [MB]"),
                       ("contains_per_s", "contains [points/s]"), ("area_deg2", "area [deg2]")]:
        print(f"{label:22}{ours[key]:14.6g}{base[key]:14.6g}{ours[key] / base[key]:10.3f}")
    print(f"area uncertainty (countscale): {ours['area_uncertainty_deg2']:.3g} deg2; "
          f"segments stored: {ours['segments']}")
    print(f"independent Monte Carlo area (2e7 points, k-d tree holes): {mc['area_deg2']:.4f} "
          f"+- {mc['sigma_deg2']:.4f} deg2; countscale - MC = "
          f"{ours['area_deg2'] - mc['area_deg2']:+.4f}, baseline - MC = "
          f"{base['area_deg2'] - mc['area_deg2']:+.4f}")
    print(f"targets: build <= 5 s ({ours['build_s']:.1f} s), peak <= 1024 MB "
          f"({ours['peak_rss_mb']:.0f} MB), contains >= 3e6/s "
          f"({ours['contains_per_s']:.3g}/s)")


if __name__ == "__main__":
    main()
