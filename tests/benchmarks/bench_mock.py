"""Mock-survey benchmark: drawing ~10^7 sources on one core, in memory and streamed to Parquet.

Run as a script (not collected by pytest):

    python tests/benchmarks/bench_mock.py [--sources 10000000] [--clustered]

Each variant runs in its own child process so that its peak RSS is its own. The baseline is
the bare minimum any mock must do, measured in the same run: numpy draws of the same number of
uniform positions (RA, sin Dec) and uniform magnitudes. Printed: wall time, peak RSS, sources
drawn per second, and ratios (countscale / baseline). The target is < 60 s for 10^7 sources.

The survey: a 6 x 6 deg box with 200 bright-star holes (max_order 16), Blanton et al. 2003
galaxies (Planck18 units), disk stars, noise and uneven depth; the generation limit is set so
that about `--sources` sources (galaxies + stars, detected or not) are drawn.
"""

from __future__ import annotations

import argparse
import json
import math
import resource
import subprocess
import sys
import time

import numpy as np

RA_RANGE = (201.0, 207.0)
DEC_RANGE = (-3.0, 3.0)


def peak_rss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def survey(n_sources, clustered):
    from countscale.footprint import Footprint
    from countscale.mock import (
        DiskStars,
        LognormalClustering,
        Measurement,
        MockSpec,
        SchechterGalaxies,
        expected_counts,
    )

    rng = np.random.default_rng(5)
    holes = Footprint.circles(rng.uniform(*RA_RANGE, 200), rng.uniform(*DEC_RANGE, 200),
                              rng.uniform(10.0, 90.0, 200), max_order=16)
    footprint = Footprint.box(RA_RANGE, DEC_RANGE, max_order=16) - holes
    h = 0.6766  # Planck18; Blanton et al. 2003, ApJ 592, 819 parameters in h units
    base = MockSpec(
        galaxies=SchechterGalaxies(m_star=-20.44 + 5 * math.log10(h), alpha=-1.05,
                                   phi_star=1.49e-2 * h**3),
        stars=DiskStars(),
        clustering=LognormalClustering(nside=512) if clustered else None,
        measurement=Measurement(m50=24.0, width=0.2, m50_scatter=0.1),
        mag_limits=(24.0,),
    )
    # Find the generation limit that draws about n_sources (bisection on the expectation).
    lo, hi = 18.0, 30.0
    for _ in range(30):
        mid = 0.5 * (lo + hi)
        counts = expected_counts(base, (mid,), footprint)["footprint"]
        total = sum(v[0] for v in counts.values())
        lo, hi = (mid, hi) if total < n_sources else (lo, mid)
    limit = 0.5 * (lo + hi)
    return MockSpec(**{**base.__dict__, "mag_limits": (limit,), "generation_mag_limit": limit,
                       "footprint": footprint})


def run_variant(variant, n_sources, clustered):
    if variant == "baseline":
        t0 = time.perf_counter()
        rng = np.random.default_rng(1)
        ra = rng.uniform(*RA_RANGE, n_sources)
        s_lo, s_hi = np.sin(np.radians(DEC_RANGE))
        dec = np.degrees(np.arcsin(rng.uniform(s_lo, s_hi, n_sources)))
        mag = rng.uniform(18.0, 25.0, n_sources)
        elapsed = time.perf_counter() - t0
        return {"seconds": elapsed, "rows": int(ra.size + 0 * dec.size + 0 * mag.size)}
    from countscale.mock import make_mock, write_mock

    spec = survey(n_sources, clustered)
    t0 = time.perf_counter()
    if variant == "memory":
        mock = make_mock(spec, rng=3, include_undetected=True)
        rows = len(mock.catalogue)
    else:
        import tempfile
        from pathlib import Path

        with tempfile.TemporaryDirectory() as folder:
            mock = write_mock(spec, Path(folder) / "mock.parquet", rng=3,
                              include_undetected=True)
            rows = sum(mock.truth.n_generated.values())
    elapsed = time.perf_counter() - t0
    return {"seconds": elapsed, "rows": int(rows)}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sources", type=int, default=10_000_000)
    parser.add_argument("--clustered", action="store_true", help="lognormal galaxy positions")
    parser.add_argument("--variant", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.variant:
        result = run_variant(args.variant, args.sources, args.clustered)
        result["peak_rss_mb"] = peak_rss_mb()
        print(json.dumps(result))
        return 0
    results = {}
    for variant in ("baseline", "memory", "parquet"):
        command = [sys.executable, __file__, "--variant", variant, "--sources", str(args.sources)]
        if args.clustered:
            command.append("--clustered")
        out = subprocess.run(command, capture_output=True, text=True, check=True)
        results[variant] = json.loads(out.stdout.strip().splitlines()[-1])
    base = results["baseline"]
    print(f"{'variant':<10} {'rows':>11} {'seconds':>9} {'rows/s':>11} {'peak RSS':>10} "
          f"{'time / baseline':>16}")
    for name, r in results.items():
        print(f"{name:<10} {r['rows']:>11d} {r['seconds']:>9.2f} {r['rows'] / r['seconds']:>11.3g} "
              f"{r['peak_rss_mb']:>8.0f}MB {r['seconds'] / base['seconds']:>16.1f}")
    for name in ("memory", "parquet"):
        ok = results[name]["seconds"] < 60.0
        print(f"{name}: {'within' if ok else 'OVER'} the 60 s target for "
              f"{results[name]['rows']:.3g} sources")
    return 0


if __name__ == "__main__":
    sys.exit(main())
