"""The README's first command, timed: ``countscale demo`` must finish in under 2 minutes.

Run as a script (not collected by pytest), on the machine being measured (2 cores is the
target):

    python tests/benchmarks/bench_demo.py [--repeat 2] [--cores 2]

Each repeat runs ``countscale demo --out TMP --quiet`` in a fresh process (so import time
counts, as for a user), pinned to ``--cores`` cores where the system allows it. The baseline,
measured in the same run: a fresh Python process that only reads the demo catalogue's
columns with pyarrow and histograms its magnitudes with numpy (the least any run must do).
Printed: wall seconds of each stage of the run (from a second, in-process run), the demo's
wall time against the 120 s target and as a ratio to the baseline, and the peak RSS of the
demo's process.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
TARGET_S = 120.0

BASELINE = """
import numpy as np, pyarrow.parquet as pq
table = pq.read_table({path!r}, columns=["ra", "dec", "mag_r"])
mag = table.column("mag_r").to_numpy()
np.histogram(mag[mag < 90], bins=np.arange(14, 24.01, 0.2))
"""


def _child(argv, cores):
    def pin():
        if cores and hasattr(os, "sched_setaffinity"):
            available = sorted(os.sched_getaffinity(0))
            os.sched_setaffinity(0, available[:cores])

    start = time.perf_counter()
    proc = subprocess.run(argv, preexec_fn=pin, capture_output=True, text=True, check=False)
    elapsed = time.perf_counter() - start
    if proc.returncode != 0:
        raise SystemExit(f"{argv[:3]} failed ({proc.returncode}): {proc.stderr.strip()}")
    return elapsed


def _stage_times():
    """Seconds per stage of one in-process demo run (the stages' own share of the time)."""
    from countscale import pipeline

    times = {}
    stages = []
    for stage in pipeline.STAGES:
        def timed(ctx, _run=stage.run, _name=stage.name):
            start = time.perf_counter()
            try:
                return _run(ctx)
            finally:
                times[_name] = time.perf_counter() - start
        stages.append(type(stage)(**{**stage.__dict__, "run": timed}))
    pipeline.STAGES[:] = stages
    with tempfile.TemporaryDirectory() as out:
        start = time.perf_counter()
        pipeline.run_survey(ROOT / "demo_data" / "survey.toml", out_dir=out, seed=1,
                            progress=False)
        total = time.perf_counter() - start
    times["report (figures, report.md, report.html)"] = total - sum(times.values())
    return times, total


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=2)
    parser.add_argument("--cores", type=int, default=2)
    args = parser.parse_args()
    countscale = [sys.executable, "-m", "countscale.cli"]
    catalogue = ROOT / "demo_data" / "catalog.parquet"
    base = min(_child([sys.executable, "-c", BASELINE.format(path=str(catalogue))], args.cores)
               for _ in range(args.repeat))
    runs = []
    for _ in range(args.repeat):
        with tempfile.TemporaryDirectory() as out:
            runs.append(_child([*countscale, "demo", "--out", out, "--quiet"], args.cores))
    peak_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0
    times, total = _stage_times()
    print(f"cores: {args.cores} (of {os.cpu_count()})")
    print(f"{'stage (in-process run)':44s} {'seconds':>8s}")
    for name, seconds in times.items():
        print(f"{name:44s} {seconds:8.2f}")
    print(f"{'total':44s} {total:8.2f}")
    print()
    best = min(runs)
    print(f"baseline: read the catalogue + histogram   {base:8.2f} s")
    print(f"countscale demo (best of {args.repeat})               {best:8.2f} s   "
          f"ratio to baseline {best / base:6.1f}   target < {TARGET_S:.0f} s: "
          + ("PASS" if best < TARGET_S else "FAIL"))
    print(f"peak RSS of a child process                {peak_mb:8.0f} MB")
    return 0 if best < TARGET_S else 1


if __name__ == "__main__":
    raise SystemExit(main())
