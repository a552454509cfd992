"""Speed and memory of the tally, as ratios against baselines measured in the same run.

Not collected by pytest (``--ignore=tests/benchmarks``); run it as a script::

    $ python tests/benchmarks/bench_tally.py                 # 10^7 rows, everything
    $ python tests/benchmarks/bench_tally.py --rows 2e6 --skip-memory --skip-dask

What it prints
--------------
1. RA/Dec → NEST pixel: healpy against cdshealpix (if installed), whole arrays and in the
   tally's blocks, one thread and the library's own threads.
2. Throughput on an N-row Parquet catalogue (a fictional field: an RA/Dec box with 500 circular
   holes, HEALPix order 16): the tally (local engine) against
   - a bare floor: pyarrow read of the mapped columns + pixel conversion + bincount, no
     validation, no footprint test, measured with the fastest pixel conversion found in 1;
   - a naive pandas approach: read everything with pandas, pixelise, test the footprint,
     ``pd.cut`` the magnitudes, ``groupby(...).size()``.
   Each figure is the best of ``--repeat`` runs on a file in the page cache.
3. Peak resident memory (ru_maxrss of a fresh process) for 10^6, 10^7 and 5x10^7 rows, with
   no per-source columns kept, and with the magnitude column kept.
4. The Dask engine on a LocalCluster of 1 and of 2 single-threaded worker processes.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import healpy as hp
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from countscale import tally as tally_module
from countscale.catalog import CatalogSource
from countscale.footprint import Footprint
from countscale.tally import tally

GRID_ROWS = 1_000_000  # rows per write and per Parquet row group


# --------------------------------------------------------------------------------------------
# Inputs
# --------------------------------------------------------------------------------------------


def footprint():
    """A fictional 900 deg² field: an RA/Dec box minus 500 holes of 30-120 arcsec."""
    rng = np.random.default_rng(0)
    field = Footprint.box((145.0, 175.0), (-15.0, 15.0), max_order=16)
    holes = Footprint.circles(rng.uniform(145, 175, 500), rng.uniform(-15, 15, 500),
                              rng.uniform(30, 120, 500), max_order=16)
    return field - holes


def write_catalogue(path, n_rows, with_ids=False):
    """Positions over a 40x40 degree patch around the field, magnitudes 16-27 (float32)."""
    rng = np.random.default_rng(1)
    schema = [("RA", pa.float64()), ("DEC", pa.float64()), ("MAG", pa.float32())]
    if with_ids:
        schema.append(("OBJID", pa.int64()))
    writer = pq.ParquetWriter(path, pa.schema(schema))
    lo, hi = np.sin(np.radians(-20.0)), np.sin(np.radians(20.0))
    try:
        for start in range(0, n_rows, GRID_ROWS):
            n = min(GRID_ROWS, n_rows - start)
            columns = {
                "RA": rng.uniform(140.0, 180.0, n),
                "DEC": np.degrees(np.arcsin(rng.uniform(lo, hi, n))),
                "MAG": (27.0 - rng.exponential(1.6, n)).clip(16.0, 27.0).astype(np.float32),
            }
            if with_ids:
                columns["OBJID"] = np.arange(start, start + n, dtype=np.int64)
            writer.write_table(pa.table(columns), row_group_size=GRID_ROWS)
    finally:
        writer.close()


def source(path, with_ids=False):
    extra = {"id": "OBJID"} if with_ids else {}
    return CatalogSource([str(path)], ra="RA", dec="DEC", mag="MAG", **extra)


def best_of(repeat, fn):
    times = []
    result = None
    for _ in range(repeat):
        start = time.perf_counter()
        result = fn()
        times.append(time.perf_counter() - start)
    return min(times), result


# --------------------------------------------------------------------------------------------
# 1. Pixel conversion
# --------------------------------------------------------------------------------------------


def cds_pixels(order, ra, dec, threads):
    import astropy.units as u
    from astropy.coordinates import Latitude, Longitude
    from cdshealpix import nested

    return nested.lonlat_to_healpix(Longitude(ra, u.deg, copy=False),
                                    Latitude(dec, u.deg, copy=False), order,
                                    num_threads=threads).astype(np.int64)


def bench_pixels(repeat):
    rng = np.random.default_rng(2)
    n = 2_000_000
    ra, dec = rng.uniform(0, 360, n), np.degrees(np.arcsin(rng.uniform(-1, 1, n)))
    rows = {}
    try:
        import cdshealpix  # noqa: F401
        have_cds = True
    except ImportError:
        have_cds = False
    blocks = [slice(a, a + tally_module.BLOCK_ROWS) for a in range(0, n, tally_module.BLOCK_ROWS)]
    for order in (10, 16):
        t_hp, ref = best_of(repeat, lambda o=order: hp.ang2pix(2**o, ra, dec, nest=True,
                                                               lonlat=True))
        rows[f"healpy, order {order}, whole array"] = t_hp
        rows[f"healpy, order {order}, blocks"] = best_of(repeat, lambda o=order: [
            hp.ang2pix(2**o, ra[s], dec[s], nest=True, lonlat=True) for s in blocks])[0]
        if have_cds:
            for threads, label in ((1, "1 thread"), (0, "own threads")):
                t, pix = best_of(repeat, lambda o=order, th=threads: cds_pixels(o, ra, dec, th))
                assert np.array_equal(pix, ref), "cdshealpix and healpy disagree"
                rows[f"cdshealpix, order {order}, whole array, {label}"] = t
            rows[f"cdshealpix, order {order}, blocks, 1 thread"] = best_of(
                repeat, lambda o=order: [cds_pixels(o, ra[s], dec[s], 1) for s in blocks])[0]
    print(f"\n1. RA/Dec -> NEST pixel, {n:,d} positions (ns per position, best of {repeat})")
    for label, t in rows.items():
        print(f"   {label:<48} {t / n * 1e9:7.1f}")
    return have_cds


# --------------------------------------------------------------------------------------------
# 2. Throughput
# --------------------------------------------------------------------------------------------


def floor(path, pixel, order):
    """pyarrow read of the mapped columns + pixel conversion + bincount. No validation."""
    pf = pq.ParquetFile(path)
    counts = np.zeros(12 * 4**7, dtype=np.int64)
    for batch in pf.iter_batches(batch_size=GRID_ROWS, columns=["RA", "DEC", "MAG"]):
        ra = batch.column("RA").to_numpy()
        dec = batch.column("DEC").to_numpy()
        pix = pixel(order, ra, dec)
        counts += np.bincount(pix >> (2 * (order - 7)), minlength=len(counts))
    return counts


def naive_pandas(path, fp, regions, edges):
    """Read everything with pandas, pixelise, test the footprint, cut, group."""
    df = pd.read_parquet(path)
    df = df[fp.contains(df.RA.to_numpy(), df.DEC.to_numpy())]
    df["cell"] = hp.ang2pix(2**regions.order, df.RA.to_numpy(), df.DEC.to_numpy(), nest=True,
                            lonlat=True)
    df["mag_bin"] = pd.cut(df.MAG, edges, right=False)
    return df.groupby(["cell", "mag_bin"], observed=True).size()


def bench_throughput(path, n_rows, fp, repeat, have_cds):
    regions = fp.split(24)
    tally(source(path), fp, regions=regions, columns=())  # warm: imports, tables, page cache
    plan_order = max(min(fp.max_order, tally_module._TABLE_ORDER), regions.order)

    def hp_pixel(order, ra, dec):
        return hp.ang2pix(2**order, ra, dec, nest=True, lonlat=True)

    floors = {"healpy": best_of(repeat, lambda: floor(path, hp_pixel, plan_order))[0]}
    if have_cds:
        floors["cdshealpix (own threads)"] = best_of(repeat, lambda: floor(
            path, lambda o, r, d: cds_pixels(o, r, d, 0), plan_order))[0]

    t_tally, result = best_of(repeat, lambda: tally(source(path), fp, regions=regions,
                                                    columns=()))
    t_one, _ = best_of(repeat, lambda: tally(source(path), fp, regions=regions, columns=(),
                                             threads=1))
    t_cols, _ = best_of(repeat, lambda: tally(source(path), fp, regions=regions,
                                              columns=("mag", "coverage", "region")))
    t_cds = None
    if have_cds:
        original = tally_module._pixels
        tally_module._pixels = lambda o, r, d: cds_pixels(o, r, d, 1)
        try:
            t_cds, other = best_of(repeat, lambda: tally(source(path), fp, regions=regions,
                                                         columns=()))
            assert np.array_equal(other.histogram, result.histogram)
        finally:
            tally_module._pixels = original
    t_naive, grouped = best_of(1, lambda: naive_pandas(path, fp, regions, result.mag_edges))
    assert int(grouped.sum()) == result.n_sources - result.n_brighter - result.n_fainter

    def rate(t):
        return f"{n_rows / t / 1e6:6.2f} M rows/s"

    print(f"\n2. Throughput on {n_rows:,d} rows ({result.ledger.rows_in_footprint:,d} in a "
          f"{fp.area_deg2:.0f} deg² footprint with holes; best of {repeat}; "
          f"{os.cpu_count()} cores)")
    for name, t in floors.items():
        print(f"   bare floor, {name:<32} {t:6.2f} s  {rate(t)}")
    print(f"   tally, local engine (default threads)        {t_tally:6.2f} s  {rate(t_tally)}")
    print(f"   tally, local engine, threads=1               {t_one:6.2f} s  {rate(t_one)}")
    print(f"   tally, keeping mag, coverage, region          {t_cols:6.2f} s  {rate(t_cols)}")
    if t_cds is not None:
        print(f"   tally with cdshealpix (1 thread per block)    {t_cds:6.2f} s  {rate(t_cds)}")
    print(f"   naive pandas (read all, cut, groupby)         {t_naive:6.2f} s  {rate(t_naive)}")
    for name, t in floors.items():
        print(f"   ratio tally / bare floor with {name}: {t / t_tally:.2f} "
              f"(tally with threads=1: {t / t_one:.2f}; target >= 0.8)")
    print(f"   ratio tally / naive pandas: {t_naive / t_tally:.1f}  (target >= 10)")


# --------------------------------------------------------------------------------------------
# 3. Memory
# --------------------------------------------------------------------------------------------


def _status_mb(field):
    """A memory figure of this process from /proc/self/status (Linux), in MB."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1]) / 1024
    raise RuntimeError(f"{field} not in /proc/self/status")


def child_memory(path, keep):
    """In a fresh process: resident memory before a tally and its peak during the tally.

    The peak is VmHWM after resetting it (``5`` to /proc/self/clear_refs) once the inputs are
    built: ru_maxrss would report the parent's size at fork, which Linux carries over exec.
    """
    fp = footprint()
    regions = fp.split(24)
    source(path).check()
    before = _status_mb("VmRSS")
    Path("/proc/self/clear_refs").write_text("5")
    columns = () if keep == "none" else ("mag",)
    result = tally(source(path), fp, regions=regions, columns=columns)
    print(json.dumps({"before_mb": before, "peak_mb": _status_mb("VmHWM"),
                      "rows_in_footprint": result.ledger.rows_in_footprint}))


def bench_memory(workdir, sizes):
    print("\n3. Resident memory of a fresh process (MB): before the tally (imports, footprint, "
          "regions), and its peak during the tally")
    print(f"   {'rows':>12} {'before':>8} {'peak, no columns':>18} {'peak, mag kept':>16}")
    for n in sizes:
        path = workdir / f"mem_{n}.parquet"
        write_catalogue(path, n)
        figures = {}
        for keep in ("none", "mag"):
            out = subprocess.run([sys.executable, __file__, "--child-memory", str(path), keep],
                                 check=True, capture_output=True, text=True).stdout
            figures[keep] = json.loads(out.strip().splitlines()[-1])
        print(f"   {n:>12,d} {figures['none']['before_mb']:8.0f} "
              f"{figures['none']['peak_mb']:18.0f} {figures['mag']['peak_mb']:16.0f}")
        path.unlink()


# --------------------------------------------------------------------------------------------
# 4. Dask
# --------------------------------------------------------------------------------------------


def bench_dask(path, n_rows, fp, repeat, with_ids):
    import dask
    import distributed

    regions = fp.split(24)
    src = source(path, with_ids)
    times = {}
    reference = tally(src, fp, regions=regions, columns=())
    for n_workers in (1, 2):
        with (dask.config.set({tally_module._MMAP_KEY: tally_module._MMAP_THRESHOLD_BYTES}),
              distributed.LocalCluster(n_workers=n_workers, threads_per_worker=1,
                                       processes=True, host="127.0.0.1",
                                       dashboard_address="127.0.0.1:0") as cluster,
              distributed.Client(cluster) as client):
            tally(src, fp, regions=regions, columns=(), engine="dask", scheduler=client)
            times[n_workers], result = best_of(repeat, lambda c=client: tally(
                src, fp, regions=regions, columns=(), engine="dask", scheduler=c))
            assert np.array_equal(result.histogram, reference.histogram)
            assert result.ledger == reference.ledger
    label = "with ids (duplicate check)" if with_ids else "no ids"
    print(f"   {label:<28} 1 worker {times[1]:6.2f} s, 2 workers {times[2]:6.2f} s: "
          f"ratio {times[1] / times[2]:.2f} (target >= 1.6)")


# --------------------------------------------------------------------------------------------


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=float, default=1e7)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--workdir", help="where to write the catalogues (default: a temp dir)")
    parser.add_argument("--skip-memory", action="store_true")
    parser.add_argument("--skip-dask", action="store_true")
    parser.add_argument("--memory-sizes", default="1e6,1e7,5e7")
    parser.add_argument("--dask-rows", type=float, help="rows for section 4 (default --rows)")
    parser.add_argument("--child-memory", nargs=2, metavar=("PATH", "KEEP"),
                        help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child_memory:
        child_memory(*args.child_memory)
        return
    warnings.simplefilter("ignore", ResourceWarning)
    workdir = Path(args.workdir or tempfile.mkdtemp(prefix="countscale-bench-"))
    workdir.mkdir(parents=True, exist_ok=True)
    n_rows = int(args.rows)
    try:
        have_cds = bench_pixels(args.repeat)
        fp = footprint()
        path = workdir / "catalogue.parquet"
        write_catalogue(path, n_rows)
        bench_throughput(path, n_rows, fp, args.repeat, have_cds)
        if not args.skip_memory:
            bench_memory(workdir, [int(float(s)) for s in args.memory_sizes.split(",")])
        if not args.skip_dask:
            dask_rows = int(args.dask_rows or n_rows)
            if dask_rows != n_rows:
                path.unlink()
                path = workdir / "catalogue_dask.parquet"
                write_catalogue(path, dask_rows)
            print(f"\n4. Dask engine, LocalCluster of single-threaded worker processes, "
                  f"{dask_rows:,d} rows in {dask_rows // GRID_ROWS} row groups (best of 2)")
            bench_dask(path, dask_rows, fp, 2, with_ids=False)
            path.unlink()
            ids_path = workdir / "catalogue_ids.parquet"
            write_catalogue(ids_path, dask_rows, with_ids=True)
            bench_dask(ids_path, dask_rows, fp, 2, with_ids=True)
    finally:
        if not args.workdir:
            shutil.rmtree(workdir, ignore_errors=True)


if __name__ == "__main__":
    main()
