"""Luminosity-function benchmark: STY and SWML (40 bins) on ~10^6 mock galaxies, on one core.

Run as a script (not collected by pytest):

    python tests/benchmarks/bench_lumfunc.py [--galaxies 1000000] [--bins 40]

One mock (countscale.mock: Blanton et al. 2003 ^0.1r parameters in Planck18 units, Q = 0.5,
a power-law K-correction with beta = -1.2, r <= 19, a cap of the size that gives about
``--galaxies`` galaxies) is drawn once and saved; each variant then runs in its own child
process pinned to one core with one BLAS/OpenMP thread, so its time and peak RSS are its own.

Variants:

- ``sty``: countscale's STY (Selection, select, STYFit.fit with its Hessian errors);
- ``sty_q``: the same with the luminosity evolution Q fitted jointly;
- ``swml``: countscale's SWML in ``--bins`` bins (Newton steps, information-matrix errors);
- ``vmax``: countscale's 1/Vmax in the same bins;
- ``plain_sty``: the baseline, STY written the simple way: every galaxy's absolute magnitude
  and visible range from astropy's distance modulus, the Schechter integral per galaxy from
  scipy's ``gammaincc`` (with the one-step recurrence for -1 < alpha + 1 <= 0), and
  ``scipy.optimize.minimize`` (BFGS, numerical gradient) on -ln L / n (on -ln L itself BFGS
  stops at the start with "precision loss" at 10^6 galaxies); errors from BFGS's inverse
  Hessian.

Printed: wall time of the fit (and of the setup, reading the arrays and building the
selection), peak RSS, the fitted M* and alpha of both STYs, and the ratios baseline /
countscale. The target: STY and SWML each <= 10 s for 10^6 galaxies.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

# One core, one thread: set before numpy is imported (here and in the children).
for _name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_name] = "1"

import numpy as np  # noqa: E402

H = 0.6766  # Planck18's h; Blanton et al. 2003, ApJ 592, 819 (^0.1r) in h units below
M_STAR = -20.44 + 5 * math.log10(H)
ALPHA = -1.05
PHI_STAR = 1.49e-2 * H**3
Q = 0.5
BETA = -1.2
MAG_LIMITS = (10.0, 19.0)
Z_RANGE = (0.01, 0.45)


def peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def make_sample(n_galaxies: int, path: Path) -> dict:
    from countscale.footprint import Footprint
    from countscale.lumfunc import Evolution
    from countscale.mock import Measurement, MockSpec, SchechterGalaxies, make_mock

    # ~1.0e4 galaxies per 28.3 deg^2 (a 3 deg cap) at r <= 19 for this model.
    area_deg2 = n_galaxies / 10_000 * 28.27
    radius = math.degrees(math.acos(1 - area_deg2 / (2 * math.pi * (180 / math.pi) ** 2)))
    footprint = Footprint.cap(150.0, 20.0, radius, max_order=10)
    spec = MockSpec(
        galaxies=SchechterGalaxies(m_star=M_STAR, alpha=ALPHA, phi_star=PHI_STAR,
                                   evolution=Evolution(Q=Q), kcorrection_beta=BETA),
        measurement=Measurement(m50=30.0, width=0.1),
        mag_limits=(MAG_LIMITS[1],), generation_mag_limit=MAG_LIMITS[1],
    )
    t0 = time.perf_counter()
    mock = make_mock(spec, rng=2024, footprint=footprint)
    cat = mock.catalogue
    np.savez(path, mag=cat.mag_true.to_numpy(), z=cat.z.to_numpy(),
             area_sr=footprint.area_sr)
    return {"n_catalogue": len(cat), "mock_seconds": time.perf_counter() - t0,
            "radius_deg": radius}


def _selection(data):
    from countscale.lumfunc import Evolution, Selection

    selection = Selection(MAG_LIMITS, Z_RANGE, float(data["area_sr"]),
                          kcorrection={"beta": BETA}, evolution=Evolution(Q=Q))
    return selection.select(data["mag"], data["z"])


def _edges(sample, n_bins):
    x = sample.x()
    return np.linspace(float(x.min()), float(x.max()) + 1e-9, n_bins + 1)


def run_variant(variant: str, path: str, n_bins: int) -> dict:
    os.sched_setaffinity(0, {sorted(os.sched_getaffinity(0))[0]})
    data = np.load(path)
    out: dict = {"variant": variant}
    if variant == "plain_sty":
        return {**out, **plain_sty(data)}
    from countscale.lumfunc import STYFit, swml_estimate, vmax_estimate

    t0 = time.perf_counter()
    sample = _selection(data)
    out["setup_seconds"] = time.perf_counter() - t0
    out["n_galaxies"] = sample.n
    t0 = time.perf_counter()
    if variant in ("sty", "sty_q"):
        fit = STYFit(fit_evolution=("Q",) if variant == "sty_q" else ()).fit(sample)
        errors = np.sqrt(np.diag(fit.cov_))
        out.update(m_star=fit.params_["m_star"], alpha=fit.params_["alpha"],
                   m_star_err=float(errors[0]), alpha_err=float(errors[1]),
                   Q=fit.params_["Q"])
    elif variant == "swml":
        result = swml_estimate(sample, edges=_edges(sample, n_bins))
        out.update(bins=int(result.phi.size), iterations=result.extra["iterations"])
    elif variant == "vmax":
        result = vmax_estimate(sample, edges=_edges(sample, n_bins))
        out.update(bins=int(result.phi.size))
    out["fit_seconds"] = time.perf_counter() - t0
    out["peak_rss_mb"] = peak_rss_mb()
    return out


def plain_sty(data) -> dict:
    """STY the simple way: per-galaxy closed forms and scipy.optimize.minimize."""
    from astropy.cosmology import Planck18
    from scipy import optimize, special

    t0 = time.perf_counter()
    mag, z = data["mag"], data["z"]
    keep = (mag >= MAG_LIMITS[0]) & (mag <= MAG_LIMITS[1]) & (z >= Z_RANGE[0]) & (z <= Z_RANGE[1])
    mag, z = mag[keep], z[keep]
    kcorr = -2.5 * (1.0 + BETA) * np.log10(1.0 + z)
    distance = Planck18.distmod(z).value + kcorr
    x = mag - distance + Q * z
    lo = MAG_LIMITS[0] - distance + Q * z
    hi = MAG_LIMITS[1] - distance + Q * z
    setup = time.perf_counter() - t0
    c = 0.4 * math.log(10.0)

    def upper_gamma(a, t):
        if a > 0:
            return special.gammaincc(a, t) * special.gamma(a)
        # Gamma(a, t) = (Gamma(a + 1, t) - t^a e^-t) / a for -1 < a < 0
        return (special.gammaincc(a + 1, t) * special.gamma(a + 1) - t**a * np.exp(-t)) / a

    def nll(theta):
        m_star, alpha = theta
        if not -1.99 < alpha < 5:
            return np.inf
        t = 10 ** (0.4 * (m_star - x))
        log_phi = np.log(c) + (alpha + 1) * np.log(t) - t
        a = alpha + 1
        norm = upper_gamma(a, 10 ** (0.4 * (m_star - hi))) - upper_gamma(
            a, 10 ** (0.4 * (m_star - lo)))
        # The mean, not the sum: BFGS's finite-difference gradient loses the sum's
        # precision at 10^6 galaxies (it stops at the start, "precision loss").
        return -np.mean(log_phi - np.log(norm))

    t0 = time.perf_counter()
    # Start at alpha = -1.2: the one-step recurrence divides by alpha + 1, NaN at alpha = -1
    # exactly (countscale's upper_incomplete_gamma has no such point).
    result = optimize.minimize(nll, x0=[float(np.quantile(x, 0.05)) + 1.0, -1.2])
    fit = time.perf_counter() - t0
    errors = np.sqrt(np.diag(result.hess_inv) / x.size)
    return {"setup_seconds": setup, "fit_seconds": fit, "n_galaxies": int(x.size),
            "m_star": float(result.x[0]), "alpha": float(result.x[1]),
            "m_star_err": float(errors[0]), "alpha_err": float(errors[1]),
            "evaluations": int(result.nfev), "converged": bool(result.success),
            "message": str(result.message), "peak_rss_mb": peak_rss_mb()}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--galaxies", type=int, default=1_000_000)
    parser.add_argument("--bins", type=int, default=40)
    parser.add_argument("--variant", help=argparse.SUPPRESS)
    parser.add_argument("--data", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.variant == "make":
        print(json.dumps(make_sample(args.galaxies, Path(args.data))))
        return 0
    if args.variant:
        print(json.dumps(run_variant(args.variant, args.data, args.bins)))
        return 0
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "sample.npz"
        # Every step in a child: Linux keeps a process's peak RSS across exec, so a parent that
        # held the mock would lend its peak to every child.
        proc = subprocess.run([sys.executable, __file__, "--variant", "make", "--data",
                               str(path), "--galaxies", str(args.galaxies)],
                              capture_output=True, text=True, check=True)
        info = json.loads(proc.stdout.strip().splitlines()[-1])
        print(f"mock: {info['n_catalogue']:,d} galaxies in a {info['radius_deg']:.1f} deg cap "
              f"({info['mock_seconds']:.1f} s)")
        results = {}
        for variant in ("sty", "sty_q", "swml", "vmax", "plain_sty"):
            proc = subprocess.run(
                [sys.executable, __file__, "--variant", variant, "--data", str(path),
                 "--bins", str(args.bins)], capture_output=True, text=True, check=True)
            results[variant] = json.loads(proc.stdout.strip().splitlines()[-1])
    print(f"\n{'variant':<11} {'galaxies':>10} {'setup s':>8} {'fit s':>8} {'peak RSS MB':>12}")
    for name, r in results.items():
        print(f"{name:<11} {r['n_galaxies']:>10,d} {r['setup_seconds']:>8.2f} "
              f"{r['fit_seconds']:>8.2f} {r['peak_rss_mb']:>12.0f}")
    base = results["plain_sty"]
    print("\nratios (plain scipy STY / countscale):")
    for name in ("sty", "sty_q", "swml"):
        r = results[name]
        print(f"  fit time  plain_sty / {name:<6} {base['fit_seconds'] / r['fit_seconds']:8.1f}x")
    for name in ("sty",):
        r = results[name]
        total = r["setup_seconds"] + r["fit_seconds"]
        base_total = base["setup_seconds"] + base["fit_seconds"]
        print(f"  with setup plain_sty / {name:<5} {base_total / total:8.1f}x")
    print(f"\nparameters (truth M* = {M_STAR:.4f}, alpha = {ALPHA:.3f}, Q = {Q:.2f}):")
    for name in ("sty", "sty_q", "plain_sty"):
        r = results[name]
        print(f"  {name:<10} M* = {r['m_star']:.4f} +- {r['m_star_err']:.4f}   "
              f"alpha = {r['alpha']:.4f} +- {r['alpha_err']:.4f}"
              + (f"   Q = {r['Q']:.3f}" if name == "sty_q" else ""))
    print(f"  plain_sty: {base['evaluations']} evaluations; {base['message']}")
    print(f"  SWML: {results['swml']['bins']} bins, {results['swml']['iterations']} Newton steps")
    ok = all(results[n]["fit_seconds"] <= 10.0 for n in ("sty", "swml"))
    print("\ntarget (STY and SWML each <= 10 s on one core):", "met" if ok else "NOT met")
    return 0


if __name__ == "__main__":
    sys.exit(main())
