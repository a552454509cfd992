"""Figures of the cosmic-variance simulation checks (a script, not collected by pytest).

    python tests/benchmarks/variance_checks.py --out variance_checks [--skies 2000] [--mocks 400]

Writes two PNGs and prints their numbers:

- ``masked_mean_gaussian.png``: the means over a 140 deg² field with 40 holes of Gaussian
  skies with C_l = 6e-7 (l / 100)^-1.2 (synthesised by healpy), against the normal
  distribution of the analytic variance sum (2l + 1) C_l W_l / Omega^2;
- ``population_mean_coverage.png``: over lognormal mocks (countscale.mock) counted through
  the counts stage's interval code, the pulls (truth - median) / half-width of the 68 %
  interval of N(<21) for the population's mean, and the coverage.

The same checks run, reduced, in tests/test_variance.py.
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import test_variance as tv  # the tests' own simulation helpers


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default="variance_checks")
    parser.add_argument("--skies", type=int, default=2000)
    parser.add_argument("--mocks", type=int, default=400)
    args = parser.parse_args(argv)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    means, analytic = tv._simulated_variance(args.skies, seed=5)
    sigma = math.sqrt(analytic)
    ratio = np.var(means) / analytic
    error = math.sqrt(2.0 / means.size)
    print(f"Gaussian skies: {means.size}; variance of the masked mean / analytic = "
          f"{ratio:.4f} ± {error:.4f} (sample-variance error)")
    fig, ax = plt.subplots(figsize=(7, 4.5))
    ax.hist(means / sigma, bins=40, density=True, color="tab:blue", alpha=0.6,
            label=f"{means.size} Gaussian skies")
    x = np.linspace(-4, 4, 200)
    ax.plot(x, np.exp(-0.5 * x * x) / math.sqrt(2 * math.pi), "k-",
            label="normal with the analytic variance")
    ax.set_xlabel("mean contrast over the field / analytic σ")
    ax.set_ylabel("density")
    ax.set_title(f"Masked mean over a field with 40 holes: var / analytic = {ratio:.3f} "
                 f"± {error:.3f}", fontsize=10)
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(out / "masked_mean_gaussian.png", dpi=110)
    plt.close(fig)

    pulls, coverage, sigma_cv = _pulls(args.mocks)
    binomial = math.sqrt(0.68 * 0.32 / pulls.size)
    print(f"lognormal mocks: {pulls.size}; 68 % coverage of the population mean = "
          f"{coverage:.3f} (binomial error {binomial:.3f}); sigma_cv = {sigma_cv:.4f}")
    fig, ax = plt.subplots(figsize=(7, 4.5))
    ax.hist(pulls, bins=30, density=True, color="tab:orange", alpha=0.6,
            label=f"{pulls.size} lognormal mocks")
    ax.plot(x, np.exp(-0.5 * x * x) / math.sqrt(2 * math.pi), "k-", label="unit normal")
    ax.axvspan(-1, 1, color="grey", alpha=0.1)
    ax.set_xlabel("(true mean N(<21) − median) / half-width of the 68 % interval")
    ax.set_ylabel("density")
    ax.set_title(f"Population mean inside the 68 % interval: {coverage:.1%} "
                 f"(σ_cv = {sigma_cv:.3f})", fontsize=10)
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(out / "population_mean_coverage.png", dpi=110)
    plt.close(fig)
    return 0


def _pulls(n_mocks):
    """The calibration mocks of tests/test_variance.py, keeping each pull."""
    import healpy as hp

    from countscale import variance as vr
    from countscale.counts import CountsFit, ForwardModel, PowerLaw
    from countscale.footprint import Footprint
    from countscale.mock import lognormal_field, power_law_cl
    from countscale.pipeline import _integral_with_bright_part

    rng = np.random.default_rng(22)
    field = (Footprint.box((30.0, 34.0), (-2.0, 2.0), max_order=10)
             - Footprint.circles([31.0, 33.2], [0.5, -1.1], [1500.0, 2400.0], max_order=10))
    nside = 256
    cells, fraction = field.coverage_cells(8)
    ring = hp.nest2ring(nside, cells)
    cell_deg2 = hp.nside2pixarea(nside, degrees=True)
    cl = power_law_cl(3 * nside - 1)
    sigma_cv = vr.footprint_mask_spectrum(field).sigma(cl)
    edges = np.arange(17.0, 21.01, 0.25)
    slope, m_ref = 0.4, 20.0
    lo, hi = 10 ** (slope * (17.0 - m_ref)), 10 ** (slope * (21.0 - m_ref))
    truth = (hi - lo) / (slope * math.log(10))
    forward = ForwardModel(edges, field.area_deg2)
    pulls = []
    for _ in range(n_mocks):
        sky = lognormal_field(cl, nside, rng)
        n_cell = rng.poisson(truth * cell_deg2 * fraction * sky[ring])
        mags = m_ref + np.log10(lo + rng.random(int(n_cell.sum())) * (hi - lo)) / slope
        counts, _ = np.histogram(mags, bins=edges)
        fit = CountsFit(PowerLaw(reference_mag=20.0, m_bright=17.0), forward,
                        n_bootstrap=0).fit(counts, rng=rng)
        block = _integral_with_bright_part(fit, 21.0, 0, field.area_deg2, rng, sigma_cv)
        estimate = block["per_deg2"]
        lo68, hi68 = estimate["interval_68"]
        median = estimate["median"]
        half = (hi68 - median) if truth > median else (median - lo68)
        pulls.append((truth - median) / half)
    pulls = np.array(pulls)
    return pulls, float(np.mean(np.abs(pulls) <= 1.0)), sigma_cv


if __name__ == "__main__":
    sys.exit(main())
