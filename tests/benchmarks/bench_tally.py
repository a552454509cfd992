"""Speed and memory of the tally, as ratios against baselines measured in the same run.

Not collected by pytest (``--ignore=tests/benchmarks``); run it as a script::

    $ python tests/benchmarks/bench_tally.py                 # 10^7 rows, everything
    $ python tests/benchmarks/bench_tally.py --rows 2e6 --skip-memory --skip-dask

What it prints
--------------
1. RA/Dec → NEST pixel: healpy against cdshealpix (if installed), whole arrays and in the
   tally's blocks, one thread and the library's own threads.
2. Throughput on an N-row Parquet catalogue (a fictional field: an RA/Dec box with 500 circular
   holes, HEALPix order 16, three columns RA, DEC, MAG in row groups of 10^6): the tally (local
   engine) against two baselines that give the same counts or less:
   - a bare floor: the irreducible part, with nothing checked. pyarrow reads the three
     columns, RA/Dec become NEST pixels at the tally's table order, ``np.bincount`` counts
     them. No validation, no footprint test, no magnitudes. Measured with healpy and with
     cdshealpix on its own threads, each reading in batches of 10^6 and of ``BLOCK_ROWS`` rows;
     the faster batch size counts.
   - naive pandas: what a user fluent in pandas writes for the same table. Read the whole file
     into a DataFrame, apply the tally's validity rules as column expressions (finite RA/Dec,
     Dec in range, RA in [-180, 0) wrapped, magnitude finite and not a sentinel within the
     same tolerance), ``Footprint.contains`` on the valid rows, ``Regions.label``, ``pd.cut``
     of the magnitudes, ``groupby([region, bin]).size()``. Its counts are checked equal to the
     tally's.
   The variants run in turn, ``--repeat`` rounds (each variant once per round), so load from
   other processes falls on all of them alike; printed are the best wall time, the range over
   the rounds and the CPU time (all threads) of the best round, on a file in the page cache.
   On a shared machine, ``--quiet-wait 60`` waits (up to 60 s) before each round until other
   processes leave the CPUs idle.
3. Peak resident memory (VmHWM of a fresh process) for 10^6, 10^7 and 5x10^7 rows, with no
   per-source columns kept, and with the magnitude column kept.
4. The Dask engine on a LocalCluster of 1 and of 2 single-threaded worker processes, without
   and with ids (the duplicate check across tasks).
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
from countscale.catalog import DEFAULT_SENTINELS, CatalogSource
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


def rounds(repeat, variants):
    """Run every variant once per round, ``repeat`` rounds, in turn.

    Returns {name: (best wall s, worst wall s, CPU s of the best round)} and {name: result of
    the last run}.
    """
    walls = {name: [] for name in variants}
    cpus = {name: [] for name in variants}
    results = {}
    n_noisy = 0
    for _ in range(repeat):
        n_noisy += not wait_until_quiet(QUIET_WAIT_S)
        for name, fn in variants.items():
            cpu, wall = time.process_time(), time.perf_counter()
            results[name] = fn()
            walls[name].append(time.perf_counter() - wall)
            cpus[name].append(time.process_time() - cpu)
    figures = {}
    for name in variants:
        best = int(np.argmin(walls[name]))
        figures[name] = (walls[name][best], max(walls[name]), cpus[name][best])
    if QUIET_WAIT_S > 0 and n_noisy:
        print(f"   ({n_noisy} of {repeat} rounds started while other processes were busy)")
    return figures, results


def load():
    return "load average {:.2f} {:.2f} {:.2f}".format(*os.getloadavg())


def _cpu_ticks():
    """(busy, total) jiffies of all cores since boot, from /proc/stat (Linux)."""
    fields = [int(x) for x in Path("/proc/stat").read_text().split("\n", 1)[0].split()[1:]]
    idle = fields[3] + fields[4]  # idle + iowait
    return sum(fields) - idle, sum(fields)


def wait_until_quiet(max_wait_s, busy_below=0.1):
    """Wait (at most ``max_wait_s``) until other processes use under 10 % of the CPUs.

    The machine may be shared; a measurement taken while something else runs says little
    about the code. Returns whether it was quiet; prints nothing.
    """
    if max_wait_s <= 0 or not Path("/proc/stat").exists():
        return True
    deadline = time.monotonic() + max_wait_s
    while True:
        busy0, total0 = _cpu_ticks()
        time.sleep(1.0)
        busy1, total1 = _cpu_ticks()
        if (busy1 - busy0) <= busy_below * max(total1 - total0, 1):
            return True
        if time.monotonic() > deadline:
            return False


QUIET_WAIT_S = 0.0  # set from --quiet-wait


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
    print(f"\n1. RA/Dec -> NEST pixel, {n:,d} positions (ns per position, best of {repeat}; "
          f"{load()})")
    for label, t in rows.items():
        print(f"   {label:<48} {t / n * 1e9:7.1f}")
    return have_cds


# --------------------------------------------------------------------------------------------
# 2. Throughput
# --------------------------------------------------------------------------------------------


def floor(path, pixel, order, batch_rows):
    """pyarrow read of the three columns + pixel conversion + bincount. Nothing checked."""
    pf = pq.ParquetFile(path)
    counts = np.zeros(12 * 4**7, dtype=np.int64)
    for batch in pf.iter_batches(batch_size=batch_rows, columns=["RA", "DEC", "MAG"]):
        ra = batch.column("RA").to_numpy()
        dec = batch.column("DEC").to_numpy()
        pix = pixel(order, ra, dec)
        counts += np.bincount(pix >> (2 * (order - 7)), minlength=len(counts))
    return counts


def naive_pandas(path, fp, regions, edges, sentinels=DEFAULT_SENTINELS):
    """The same counts with pandas, written the straightforward way (see the module notes)."""
    df = pd.read_parquet(path)
    ra, dec, mag = df["RA"], df["DEC"], df["MAG"].astype("float64")
    ra = ra.where(~((ra >= -180.0) & (ra < 0.0)), ra + 360.0)
    valid = (np.isfinite(ra) & np.isfinite(dec) & dec.between(-90.0, 90.0)
             & (ra >= 0.0) & (ra < 360.0) & np.isfinite(mag))
    for s in sentinels:
        valid &= ~np.isclose(mag, s, rtol=1e-6, atol=0.0)
    df = pd.DataFrame({"RA": ra, "DEC": dec, "MAG": mag})[valid]
    df = df[fp.contains(df["RA"].to_numpy(), df["DEC"].to_numpy())]
    df["region"] = regions.label(df["RA"].to_numpy(), df["DEC"].to_numpy())
    df["mag_bin"] = pd.cut(df["MAG"], edges, right=False, labels=False)
    return df.groupby(["region", "mag_bin"]).size()


def bench_throughput(path, ids_path, n_rows, fp, repeat, have_cds):
    regions = fp.split(24)
    # Warms imports and the page cache; its counts are what every variant must give.
    reference = tally(source(path), fp, regions=regions, columns=())
    plan_order = max(min(fp.max_order, tally_module._TABLE_ORDER), regions.order)

    def hp_pixel(order, ra, dec):
        return hp.ang2pix(2**order, ra, dec, nest=True, lonlat=True)

    def cds_pixel(order, ra, dec):
        return cds_pixels(order, ra, dec, 0)

    def with_cdshealpix():
        original = tally_module._pixels
        tally_module._pixels = lambda o, r, d: cds_pixels(o, r, d, 1)
        try:
            return tally(source(path), fp, regions=regions, columns=())
        finally:
            tally_module._pixels = original

    pixel_libraries = {"healpy": hp_pixel}
    if have_cds:
        pixel_libraries["cdshealpix (own threads)"] = cds_pixel
    variants = {}
    for name, pixel in pixel_libraries.items():
        for batch in (GRID_ROWS, tally_module.BLOCK_ROWS):
            variants[f"floor|{name}|{batch}"] = (
                lambda p=pixel, b=batch: floor(path, p, plan_order, b))
    variants["tally"] = lambda: tally(source(path), fp, regions=regions, columns=())
    variants["tally threads=1"] = lambda: tally(source(path), fp, regions=regions, columns=(),
                                                threads=1)
    variants["tally columns"] = lambda: tally(source(path), fp, regions=regions,
                                              columns=("mag", "coverage", "region"))
    variants["tally ids"] = lambda: tally(source(ids_path, True), fp, regions=regions,
                                          columns=())
    if have_cds:
        variants["tally cdshealpix"] = with_cdshealpix
    variants["naive"] = lambda: naive_pandas(path, fp, regions, reference.mag_edges)
    print(f"\n2. Throughput on {n_rows:,d} rows ({reference.ledger.rows_in_footprint:,d} in a "
          f"{fp.area_deg2:.0f} deg² footprint with holes; {os.cpu_count()} cores; {repeat} "
          f"rounds; {load()})")
    figures, results = rounds(repeat, variants)
    for name, result in results.items():
        if name.startswith("tally"):
            assert np.array_equal(result.histogram, reference.histogram), name
    grouped = results["naive"]
    naive_counts = np.zeros_like(reference.region_counts)
    naive_counts[grouped.index.get_level_values(0).to_numpy(int),
                 grouped.index.get_level_values(1).to_numpy(int)] = grouped.to_numpy()
    assert np.array_equal(naive_counts, reference.region_counts), "naive counts differ"

    def line(label, name):
        best, worst, cpu = figures[name]
        print(f"   {label:<52} {best:6.2f} s (to {worst:5.2f})  CPU {cpu:5.2f} s  "
              f"{n_rows / best / 1e6:6.2f} M rows/s")

    floors = {}
    print("   bare floor: pyarrow read + pixels + bincount, nothing checked")
    for name in pixel_libraries:
        for batch in (GRID_ROWS, tally_module.BLOCK_ROWS):
            line(f"  {name}, batches of {batch:,d}", f"floor|{name}|{batch}")
        floors[name] = min(figures[f"floor|{name}|{b}"][0]
                           for b in (GRID_ROWS, tally_module.BLOCK_ROWS))
    line("tally, local engine (default threads)", "tally")
    line("tally, local engine, threads=1", "tally threads=1")
    line("tally, keeping mag, coverage, region", "tally columns")
    line("tally with ids (duplicate check), default threads", "tally ids")
    if have_cds:
        line("tally with cdshealpix (1 thread per block)", "tally cdshealpix")
    line("naive pandas: read, validate, contains, cut, groupby", "naive")
    t_tally, t_one = figures["tally"][0], figures["tally threads=1"][0]
    for name, t in floors.items():
        print(f"   ratio tally / bare floor with {name}: {t / t_tally:.2f} "
              f"(tally with threads=1: {t / t_one:.2f}; target >= 0.8)")
    print(f"   ratio tally / naive pandas: {figures['naive'][0] / t_tally:.1f}  (target >= 10)")
    print(f"   ({load()})")


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
            runs = []
            for _ in range(repeat):
                wait_until_quiet(QUIET_WAIT_S)
                start = time.perf_counter()
                result = tally(src, fp, regions=regions, columns=(), engine="dask",
                               scheduler=client)
                runs.append(time.perf_counter() - start)
            times[n_workers] = (min(runs), max(runs))
            assert np.array_equal(result.histogram, reference.histogram)
            assert result.ledger == reference.ledger
    label = "with ids (duplicate check)" if with_ids else "no ids"
    (one, one_worst), (two, two_worst) = times[1], times[2]
    print(f"   {label:<28} 1 worker {one:5.2f} s (to {one_worst:5.2f}), 2 workers {two:5.2f} s "
          f"(to {two_worst:5.2f}): ratio {one / two:.2f} (target >= 1.6; {load()})")


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
    parser.add_argument("--quiet-wait", type=float, default=0.0, metavar="SECONDS",
                        help="before each round, wait up to this long for other processes to "
                             "leave the CPUs idle (for shared machines; default: no wait)")
    parser.add_argument("--child-memory", nargs=2, metavar=("PATH", "KEEP"),
                        help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child_memory:
        child_memory(*args.child_memory)
        return
    warnings.simplefilter("ignore", ResourceWarning)
    global QUIET_WAIT_S
    QUIET_WAIT_S = args.quiet_wait
    workdir = Path(args.workdir or tempfile.mkdtemp(prefix="countscale-bench-"))
    workdir.mkdir(parents=True, exist_ok=True)
    n_rows = int(args.rows)
    try:
        have_cds = bench_pixels(args.repeat)
        fp = footprint()
        path = workdir / "catalogue.parquet"
        ids_path = workdir / "catalogue_ids.parquet"
        write_catalogue(path, n_rows)
        write_catalogue(ids_path, n_rows, with_ids=True)
        bench_throughput(path, ids_path, n_rows, fp, args.repeat, have_cds)
        if not args.skip_memory:
            bench_memory(workdir, [int(float(s)) for s in args.memory_sizes.split(",")])
        if not args.skip_dask:
            dask_rows = int(args.dask_rows or n_rows)
            if dask_rows != n_rows:
                path.unlink()
                ids_path.unlink()
                path = workdir / "catalogue_dask.parquet"
                ids_path = workdir / "catalogue_dask_ids.parquet"
                write_catalogue(path, dask_rows)
                write_catalogue(ids_path, dask_rows, with_ids=True)
            print(f"\n4. Dask engine, LocalCluster of single-threaded worker processes, "
                  f"{dask_rows:,d} rows in {dask_rows // GRID_ROWS} row groups "
                  f"(best of {args.repeat})")
            bench_dask(path, dask_rows, fp, args.repeat, with_ids=False)
            bench_dask(ids_path, dask_rows, fp, args.repeat, with_ids=True)
    finally:
        if not args.workdir:
            shutil.rmtree(workdir, ignore_errors=True)


if __name__ == "__main__":
    main()
