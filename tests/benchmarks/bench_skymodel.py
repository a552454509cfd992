"""Sky-model benchmark: fitting counts per field and integrating over the sky, as draws.

Run as a script (not collected by pytest):

    python tests/benchmarks/bench_skymodel.py [--draws 10000] [--nside 64]

The totals stage asks the fitted model for Monte Carlo draws of a total over a target sky;
the budget there is 10^4 draws in a few seconds. This prints, for the whole sky at `--nside`:
the time to fit the three default covariate sets to 40 fields, the time of
``SkyModel.predict`` for `--draws` draws, and, as the baseline measured in the same run, the
bare numpy work any such integral needs (one matrix product and ``scipy.special.logsumexp``
over cells x draws for each set); with ratios and the peak RSS.
"""

from __future__ import annotations

import argparse
import math
import resource
import time
import warnings

import healpy as hp
import numpy as np
from scipy import special


def peak_rss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--draws", type=int, default=10_000)
    parser.add_argument("--nside", type=int, default=64)
    args = parser.parse_args()

    from astropy import units as u
    from astropy.coordinates import SkyCoord

    from countscale import skymodel as sk
    from countscale.footprint import Footprint
    from countscale.mock import DiskStars

    stars = DiskStars(scale_length_pc=2600.0)
    rng = np.random.default_rng(1)
    l_deg = rng.uniform(0, 360, 40)
    b_deg = np.degrees(np.arcsin(rng.uniform(np.sin(np.radians(15)), 1, 40))) * rng.choice(
        [-1, 1], 40)
    icrs = SkyCoord(l=l_deg * u.deg, b=b_deg * u.deg, frame="galactic").icrs
    footprint = None
    for ra, dec in zip(icrs.ra.deg, icrs.dec.deg, strict=True):
        cap = Footprint.cap(float(ra), float(dec), 0.5, max_order=12)
        footprint = cap if footprint is None else footprint | cap
    cells, fraction = footprint.coverage_cells(10)
    gl, gb = sk.galactic_lb(10, cells)
    density = stars.density_per_sr(np.abs(np.sin(np.radians(gb))), 18.0, np.cos(
        np.radians(gb)) * np.cos(np.radians(gl))) / (180 / math.pi) ** 2
    sources = np.repeat(cells, rng.poisson(density * fraction * hp.nside2pixarea(
        1024, degrees=True)))
    units = sk.SkyUnits.from_footprint(footprint, sources)

    start = time.perf_counter()
    model = sk.SkyModel().fit(units)
    fit_s = time.perf_counter() - start
    target = Footprint.full_sky(8)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", sk.SkyModelWarning)
        start = time.perf_counter()
        model.predict(target, nside=args.nside, n_draws=args.draws, rng=2)
        predict_s = time.perf_counter() - start
    predict_rss = peak_rss_mb()

    # Baseline: per set, the covariates at every cell, one product with the draws and one
    # logsumexp over the cells (numpy and scipy, no countscale).
    order = round(math.log2(args.nside))
    tcells, tfrac = target.coverage_cells(order)
    log_area = np.log(tfrac * hp.nside2pixarea(args.nside, degrees=True))
    start = time.perf_counter()
    for fit, weight in zip(model.fits_, model.weights_, strict=True):
        x = sk.covariate_matrix(fit.names_, order, tcells)
        design = np.column_stack([np.ones(len(tcells)), x])
        betas = rng.standard_normal((max(int(weight * args.draws), 200), design.shape[1]))
        for block in range(0, betas.shape[0], 128):
            special.logsumexp(design @ betas[block:block + 128].T * 1e-3 + log_area[:, None],
                              axis=0)
    baseline_s = time.perf_counter() - start

    print(f"units {units.n_units}, sources {int(units.counts.sum())}, target cells "
          f"{len(tcells)} (nside {args.nside}), draws {args.draws}")
    print(f"fit (3 covariate sets)      {fit_s:8.3f} s")
    print(f"predict                     {predict_s:8.3f} s")
    print(f"baseline (numpy + logsumexp) {baseline_s:7.3f} s")
    print(f"ratio predict / baseline    {predict_s / baseline_s:8.2f}")
    print(f"peak RSS after predict      {predict_rss:8.0f} MB (after baseline "
          f"{peak_rss_mb():.0f} MB)")


if __name__ == "__main__":
    main()
