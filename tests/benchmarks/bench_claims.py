"""Claim scenarios benchmark: Monte Carlo totals with 10^4 draws and their error budgets.

Run as a script (not collected by pytest):

    python tests/benchmarks/bench_claims.py [--draws 10000]

For each built-in scenario, the wall time of `propagate` (all inputs varying plus one pass per
input for the budget) beside a baseline measured in the same run: the same number of passes of
bare numpy work per draw that any such total needs (lognormal draws, a product and a log10).
Printed: seconds, the ratio to the baseline, and the peak RSS. The target is <= 5 s per scenario
for 10^4 draws.
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np


def peak_rss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def baseline(n_draws, n_passes):
    rng = np.random.default_rng(0)
    start = time.perf_counter()
    for _ in range(n_passes):
        a = 10.0 ** (0.1 * rng.standard_normal(n_draws))
        b = 10.0 ** (0.2 * rng.standard_normal(n_draws))
        np.log10(a * b).var()
    return time.perf_counter() - start


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--draws", type=int, default=10_000)
    args = parser.parse_args()

    from countscale import claims

    # Warm the cosmology grid (astropy volumes on 3 x 3 cosmologies), once per process.
    claims.galaxies_present_day(n_draws=100, rng=0)
    n = args.draws
    cases = [
        ("light cone, > 10^6 Msun, z < 8", lambda: claims.galaxies_light_cone(n_draws=n), 4),
        ("present day x horizon volume", lambda: claims.galaxies_present_day(n_draws=n), 3),
        ("stars, observable universe", lambda: claims.stars_observable_universe(n_draws=n), 4),
        ("stars, Milky Way", lambda: claims.stars_milky_way(n_draws=n), 3),
    ]
    print(f"{'scenario':34s} {'seconds':>8s} {'baseline':>9s} {'ratio':>8s}")
    for name, run, passes in cases:
        start = time.perf_counter()
        scenario = run()
        elapsed = time.perf_counter() - start
        base = baseline(args.draws, passes)
        print(f"{name:34s} {elapsed:8.3f} {base:9.4f} {elapsed / base:8.0f}   "
              f"median {scenario.estimate.median:.3g}")
    print(f"peak RSS {peak_rss_mb():.0f} MB")


if __name__ == "__main__":
    main()
