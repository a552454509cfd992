"""Calibration figure of sky_total over truth-known mocks (a script, not collected by pytest).

    python tests/benchmarks/totals_calibration.py --out totals_calibration [--mocks 200]

For three ensembles of mocks from tests/test_totals.py (a 3 x 3 deg field with 25 holes,
logistic completeness with m50 = 21.5, sky-limited photometric scatter, 3000 injections; the
count models, completeness linearisation and mixture exactly as the run stage builds them):

- clustered galaxies (C_l = 3e-6 (l / 100)^-1.2), N(< 21.0) over the whole sky;
- unclustered galaxies, N(< 21.0);
- unclustered galaxies, N(< 21.8): 0.3 mag fainter than m50, a depth extrapolation;

it writes ``sky_total_calibration.png`` (the pulls log10(median / truth) / half-width of the
68 % interval against a unit normal, and the coverage of the 68 % and 95 % intervals) and
prints the numbers. The same ensembles, smaller, run in the default tests; the full ones are
the slow tests.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import test_totals as tt_tests  # the tests' own mock helpers

SCENARIOS = (("clustered, m < 21.0", 21.0, True), ("Poisson, m < 21.0", 21.0, False),
             ("Poisson, m < 21.8 (depth extrapolation)", 21.8, False))


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default="totals_calibration")
    parser.add_argument("--mocks", type=int, default=200)
    parser.add_argument("--first-seed", type=int, default=1000)
    args = parser.parse_args(argv)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    from countscale.variance import footprint_mask_spectrum

    footprint = tt_tests.mock_footprint()
    sigma_cv = footprint_mask_spectrum(footprint).sigma(tt_tests.MOCK_CL)
    seeds = range(args.first_seed, args.first_seed + args.mocks)
    results = []
    for name, m_limit, clustered in SCENARIOS:
        start = time.perf_counter()
        inside68, inside95, pulls = tt_tests.mock_pulls(footprint, sigma_cv, m_limit,
                                                        clustered, seeds)
        n = inside68.size
        se = np.sqrt(0.68 * 0.32 / n)
        print(f"{name:42s} {n} mocks: 68 % covers {inside68.mean():.3f} (binomial sd {se:.3f}),"
              f" 95 % covers {inside95.mean():.3f}; pulls mean {pulls.mean():+.3f} sd "
              f"{pulls.std(ddof=1):.3f}  ({time.perf_counter() - start:.0f} s)", flush=True)
        results.append((name, inside68, inside95, pulls))

    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from scipy import stats

    fig, axes = plt.subplots(1, len(results), figsize=(4.6 * len(results), 4.0), sharey=True)
    grid = np.linspace(-4, 4, 200)
    for ax, (name, inside68, inside95, pulls) in zip(axes, results, strict=True):
        ax.hist(np.clip(pulls, -4, 4), bins=np.linspace(-4, 4, 25), density=True,
                color="tab:blue", alpha=0.6, label=f"{pulls.size} mocks")
        ax.plot(grid, stats.norm.pdf(grid), color="k", lw=1.2, label="unit normal")
        ax.set_title(f"{name}\n68 %: {inside68.mean():.0%} covered, 95 %: "
                     f"{inside95.mean():.0%}", fontsize=9.5)
        ax.set_xlabel("pull: log10(median / truth) / 68 % half-width")
        ax.grid(alpha=0.3)
    axes[0].set_ylabel("density")
    axes[0].legend(fontsize=8)
    fig.suptitle(f"sky_total over truth-known mocks (sigma_cv = {sigma_cv:.3f} for the "
                 "clustered ones)", fontsize=11)
    fig.tight_layout()
    path = out / "sky_total_calibration.png"
    fig.savefig(path, dpi=110)
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
