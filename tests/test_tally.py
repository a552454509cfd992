"""Tests for countscale.tally: the streaming count engine (local and Dask).

Outside references used here:
- closed-form sky geometry: a point is in an RA/Dec box when its RA and Dec are within the
  box's ranges; the box's area is (pi/180) dRA (sin dec_hi - sin dec_lo) sr (standard
  spherical geometry);
- healpy (Górski et al. 2005, ApJ 622, 759): ``ang2pix`` NEST pixels at the regions' order for
  region membership (which also checks the tally's use of the NEST hierarchy, a cell's parent
  being its index shifted right by two bits per order);
- numpy ``searchsorted`` on the bin edges as the definition of half-open bins, and
  ``numpy.histogram``;
- self-consistency, labelled as such: the footprint's public API (``Footprint.contains``,
  ``weight_at``) as the definition of "inside", which the tally's shortcut table must
  reproduce exactly (the footprint itself is tested against closed forms in
  test_footprint.py);
- an independent row-by-row oracle (a plain Python loop written from the documented rules of
  countscale.catalog) for the ledger with duplicate ids across files;
- counts by construction: every corruption is injected a known number of times.
"""

from __future__ import annotations

import io
import math
import sys
import warnings

import dask
import distributed
import healpy as hp
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from astropy.table import Table
from hypothesis import given, settings
from hypothesis import strategies as st

from countscale import tally as tally_module
from countscale.catalog import CatalogSource, CatalogWarning, Ledger
from countscale.errors import InputError, InputTypeError
from countscale.footprint import Footprint
from countscale.tally import DEFAULT_MAG_GRID, Tally, TallyWarning, tally

BOX_RA, BOX_DEC = (150.0, 160.0), (0.0, 10.0)
SR_TO_DEG2 = (180.0 / math.pi) ** 2


# --------------------------------------------------------------------------------------------
# Helpers
# --------------------------------------------------------------------------------------------


def frame(n, rng, id_start=0, ra=(148.0, 162.0), dec=(-2.0, 12.0)):
    """n clean rows around the test box: mag 17-25, z 0-2, unique integer ids."""
    rng = np.random.default_rng(rng)
    return pd.DataFrame({
        "RA": rng.uniform(*ra, n),
        "DEC": rng.uniform(*dec, n),
        "MAG": rng.uniform(17.0, 25.0, n),
        "Z": rng.uniform(0.0, 2.0, n),
        "OBJID": np.arange(id_start, id_start + n, dtype=np.int64),
    })


def write(df, path, row_group_size=None):
    path = str(path)
    if path.endswith(".parquet"):
        pq.write_table(pa.Table.from_pandas(df, preserve_index=False), path,
                       row_group_size=row_group_size)
    elif path.endswith(".fits"):
        Table.from_pandas(df).write(path, overwrite=True)
    else:
        df.to_csv(path, index=False)
    return path


def source(paths, **extra):
    cols = {"ra": "RA", "dec": "DEC", "mag": "MAG"}
    cols.update(extra)
    return CatalogSource(paths, **cols)


def box(max_order=12):
    return Footprint.box(BOX_RA, BOX_DEC, max_order=max_order)


def in_box(ra, dec):
    """Closed form: RA within [150, 160] and Dec within [0, 10] degrees."""
    return (ra >= BOX_RA[0]) & (ra <= BOX_RA[1]) & (dec >= BOX_DEC[0]) & (dec <= BOX_DEC[1])


def oracle_histogram(ra, dec, mag, regions, edges):
    """(n_regions, n_mag) counts from healpy pixels and searchsorted bins, written apart."""
    cells = hp.ang2pix(2**regions.order, ra, dec, nest=True, lonlat=True)
    label = dict(zip(regions.cells.tolist(), regions.labels.tolist(), strict=True))
    region = np.array([label[c] for c in cells.tolist()], dtype=np.int64)
    bins = np.searchsorted(edges, mag, side="right") - 1
    ok = (bins >= 0) & (bins < len(edges) - 1)
    out = np.zeros((regions.n_regions, len(edges) - 1), dtype=np.int64)
    np.add.at(out, (region[ok], bins[ok]), 1)
    return out


def assert_same_tally(a, b):
    assert a.ledger.to_dict() == b.ledger.to_dict()
    np.testing.assert_array_equal(a.mag_edges, b.mag_edges)
    np.testing.assert_array_equal(a.histogram, b.histogram)
    assert sorted(a.columns) == sorted(b.columns)
    for name in a.columns:
        assert a.columns[name].dtype == b.columns[name].dtype
        np.testing.assert_array_equal(a.columns[name], b.columns[name])


# --------------------------------------------------------------------------------------------
# Counts against closed forms and healpy
# --------------------------------------------------------------------------------------------


def test_counts_per_region_and_bin_match_an_independent_oracle(tmp_path):
    df = frame(20_000, 1)
    path = write(df, tmp_path / "cat.parquet", row_group_size=3000)
    fp = box()
    result = tally(source(path), fp, n_regions=12, mag_bins={"start": 18, "stop": 24,
                                                             "width": 0.5}, columns=())
    ra, dec, mag = df.RA.to_numpy(), df.DEC.to_numpy(), df.MAG.to_numpy()
    inside = in_box(ra, dec)
    edges = 18.0 + 0.5 * np.arange(13)
    expected = oracle_histogram(ra[inside], dec[inside], mag[inside], result.regions, edges)
    np.testing.assert_array_equal(result.region_counts, expected)
    np.testing.assert_array_equal(result.counts, expected.sum(axis=0))
    np.testing.assert_array_equal(result.counts,
                                  np.histogram(mag[inside], bins=edges)[0])
    assert result.n_brighter == np.count_nonzero(mag[inside] < 18)
    assert result.n_fainter == np.count_nonzero(mag[inside] >= 24)
    assert result.ledger.rows_in_footprint == np.count_nonzero(inside)
    assert result.ledger.rows_outside_footprint == np.count_nonzero(~inside)
    assert result.counts.sum() + result.n_brighter + result.n_fainter == inside.sum()
    assert result.mag_grid == "given" and result.n_mag == 12  # given bins are never trimmed


def test_region_areas_sum_to_the_closed_form_box_area(tmp_path):
    path = write(frame(2000, 2), tmp_path / "cat.parquet")
    result = tally(source(path), box(max_order=14), n_regions=8, columns=())
    # (pi/180) * dRA * (sin dec_hi - sin dec_lo) sr: standard spherical geometry. The
    # footprint stores boundary-cell fractions as float32 (relative step 6e-8), hence 1e-7.
    exact_sr = math.radians(10.0) * (math.sin(math.radians(10.0)) - 0.0)
    assert result.region_area_deg2.sum() == pytest.approx(exact_sr * SR_TO_DEG2, rel=1e-7)
    assert result.region_area_deg2.sum() == pytest.approx(result.area_deg2, rel=1e-12)
    assert result.region_area_deg2.shape == (8,)
    assert result.footprint_summary["area_deg2"] == result.area_deg2


def test_regions_finer_than_the_shortcut_table(tmp_path):
    # Regions of order 12, finer than the inside/outside table (order 10): the region comes
    # from the pixel at order 12. Reference: healpy pixels and searchsorted bins
    # (oracle_histogram), and Regions.label for the per-source column.
    df = frame(20_000, 26)
    path = write(df, tmp_path / "cat.parquet")
    fp = box(max_order=13)
    regions = fp.split(6, order=12)
    edges = [18.0, 19.5, 21.0, 22.5, 24.0]
    result = tally(source(path), fp, regions=regions, mag_bins=edges, columns=("region",))
    ra, dec, mag = df.RA.to_numpy(), df.DEC.to_numpy(), df.MAG.to_numpy()
    inside = fp.contains(ra, dec)
    np.testing.assert_array_equal(
        result.region_counts,
        oracle_histogram(ra[inside], dec[inside], mag[inside], regions, np.array(edges)))
    np.testing.assert_array_equal(result.columns["region"], regions.label(ra[inside],
                                                                          dec[inside]))


@pytest.mark.parametrize("threads", [1, 2])
def test_footprint_summary_and_area_are_the_footprints_own(tmp_path, threads):
    # With threads > 1 the summary is worked out beside the counting; it must be the very
    # dict (and area) the footprint gives.
    path = write(frame(3000, 27), tmp_path / "cat.parquet")
    fp = box(max_order=14) - Footprint.circles([155.0], [5.0], [1800.0], max_order=14)
    result = tally(source(path), fp, n_regions=3, threads=threads)
    assert result.footprint_summary == fp.summary()
    assert result.area_deg2 == fp.area_deg2
    assert result.area_uncertainty_deg2 == fp.area_uncertainty_deg2 > 0


def _footprints():
    holes = Footprint.circles([152.0, 155.5, 158.0], [2.0, 5.0, 8.5], [900.0, 1500.0, 400.0],
                              max_order=13)
    cap = Footprint.cap(155.0, 5.0, 4.0, max_order=13)
    rng = np.random.default_rng(7)
    nside = 64
    values = np.zeros(12 * nside**2)
    pixels = hp.query_disc(nside, hp.ang2vec(155.0, 5.0, lonlat=True), math.radians(6.0))
    values[pixels] = rng.uniform(0.2, 1.0, len(pixels))  # fractional coverage (map-based)
    return {
        "box": box(max_order=13),
        "box minus holes": box(max_order=13) - holes,
        "cap": cap,
        "polygon": Footprint.polygon([(151, 1), (159, 2), (157, 9), (152, 8)], max_order=13),
        "fractional map": Footprint.from_healpix(values, nest=False),
        "full sky": Footprint.full_sky(max_order=6),
    }


@pytest.mark.parametrize("name", list(_footprints()))
def test_inside_and_coverage_equal_the_footprint_api(tmp_path, name):
    # Self-consistency: the tally's shortcut table must give exactly the footprint's own
    # answers (contains, weight_at, Regions.label), whatever the footprint's kind.
    fp = _footprints()[name]
    rng = np.random.default_rng(11)
    df = frame(30_000, rng, ra=(146.0, 164.0), dec=(-4.0, 14.0))
    # Points on cell boundaries of the shortcut table's order (10) and near the box's edges.
    edge_ra = np.repeat([150.0, 160.0, 150.0 + 1e-9, 160.0 - 1e-9], 50)
    edge_dec = np.tile(np.linspace(-1, 11, 50), 4)
    df = pd.concat([df, pd.DataFrame({"RA": edge_ra, "DEC": edge_dec, "MAG": 20.0, "Z": 1.0,
                                      "OBJID": -1})], ignore_index=True)
    path = write(df, tmp_path / "cat.parquet")
    result = tally(source(path), fp, n_regions=4, columns=("coverage", "region", "mag"))
    ra, dec = df.RA.to_numpy(), df.DEC.to_numpy()
    inside = fp.contains(ra, dec)
    assert result.ledger.rows_in_footprint == inside.sum()
    np.testing.assert_array_equal(result.columns["coverage"],
                                  fp.weight_at(ra[inside], dec[inside]).astype(np.float32))
    np.testing.assert_array_equal(result.columns["region"],
                                  result.regions.label(ra[inside], dec[inside]))
    np.testing.assert_array_equal(result.columns["mag"],
                                  df.MAG.to_numpy()[inside].astype(np.float32))


@pytest.mark.parametrize("name", ["box minus holes", "cap", "fractional map"])
def test_shortcut_table_against_brute_force(name):
    fp = _footprints()[name]
    order = min(7, fp.max_order)  # the tally never builds the table finer than max_order
    table = tally_module._state_table(fp.edges, fp.weight, fp.max_order, order)
    cells, fraction = fp.coverage_cells(fp.max_order)
    per_coarse = 4 ** (fp.max_order - order)
    parent = cells // per_coarse
    n_full = np.bincount(parent[fraction >= 1.0], minlength=12 * 4**order)
    n_any = np.bincount(parent, minlength=12 * 4**order)
    expected = np.where(n_full == per_coarse, 2, np.where(n_any > 0, 1, 0))
    np.testing.assert_array_equal(table, expected)


# --------------------------------------------------------------------------------------------
# Bins
# --------------------------------------------------------------------------------------------


@settings(max_examples=60, deadline=None)
@given(start=st.floats(-10, 30), width=st.sampled_from([0.01, 0.05, 0.1, 0.25, 0.3, 1.0]),
       n_bins=st.integers(1, 300), seed=st.integers(0, 2**32 - 1))
def test_uniform_binning_equals_searchsorted_on_the_edges(start, width, n_bins, seed):
    edges = tally_module._uniform_edges(start, start + n_bins * width, width, "bins")
    rng = np.random.default_rng(seed)
    values = np.concatenate([
        rng.uniform(start - 2, start + n_bins * width + 2, 500),
        edges,                                         # exactly on every edge
        np.nextafter(edges, -np.inf), np.nextafter(edges, np.inf),
        [-1e300, 1e300],
    ])
    binner = tally_module._Binner(edges)
    assert binner.uniform
    np.testing.assert_array_equal(binner.slots(values),
                                  np.searchsorted(edges, values, side="right"))


def test_uneven_edges_use_the_general_path():
    edges = np.array([18.0, 19.0, 21.5, 22.0])
    binner = tally_module._Binner(edges)
    assert not binner.uniform
    values = np.array([17.0, 18.0, 20.0, 21.5, 21.99, 22.0, 30.0])
    np.testing.assert_array_equal(binner.slots(values), [0, 1, 2, 3, 3, 4, 4])


def test_default_grid_is_trimmed_to_the_occupied_bins(tmp_path):
    df = frame(5000, 4)
    path = write(df, tmp_path / "cat.parquet")
    result = tally(source(path), box(), columns=())
    inside = in_box(df.RA.to_numpy(), df.DEC.to_numpy())
    mag = df.MAG.to_numpy()[inside]
    assert result.mag_grid == "default"
    assert np.allclose(np.diff(result.mag_edges), DEFAULT_MAG_GRID[2])
    assert result.mag_edges[0] <= mag.min() < result.mag_edges[1]
    assert result.mag_edges[-2] <= mag.max() < result.mag_edges[-1]
    assert result.counts[0] > 0 and result.counts[-1] > 0
    assert result.n_brighter == result.n_fainter == 0
    np.testing.assert_array_equal(result.counts, np.histogram(mag, result.mag_edges)[0])


def test_redshift_axis(tmp_path):
    df = frame(8000, 5)
    df.loc[::7, "Z"] = np.nan     # no redshift: still counted, in no redshift bin
    df.loc[::11, "Z"] = 5.0       # beyond the last edge
    path = write(df, tmp_path / "cat.parquet")
    z_edges = [0.0, 0.5, 1.0, 2.0]
    mag_edges = [17.0, 19.0, 21.0, 23.0, 25.0]
    result = tally(source(path, redshift="Z"), box(), n_regions=3, mag_bins=mag_edges,
                   redshift_bins=z_edges, columns=("redshift",))
    inside = in_box(df.RA.to_numpy(), df.DEC.to_numpy())
    z, mag = df.Z.to_numpy()[inside], df.MAG.to_numpy()[inside]
    expected, _, _ = np.histogram2d(mag, z, bins=[mag_edges, z_edges])
    np.testing.assert_array_equal(result.redshift_counts.sum(axis=0), expected.astype(int))
    assert result.n_redshift_unbinned == np.count_nonzero(~((z >= 0) & (z < 2.0)))
    np.testing.assert_array_equal(result.columns["redshift"], z.astype(np.float32))
    assert result.to_dict()["redshift_bins"]["n_unbinned"] == result.n_redshift_unbinned


# --------------------------------------------------------------------------------------------
# Ledger, chunking, threads, merging
# --------------------------------------------------------------------------------------------


def corrupted(tmp_path):
    """A catalogue with a known number of each fault; returns (paths, expected rejections)."""
    df = frame(6000, 6)
    df.loc[0:29, "RA"] = np.nan                  # 30 ra_dec_not_finite
    df.loc[30:49, "DEC"] = 95.0                  # 20 dec_out_of_range
    df.loc[50:59, "RA"] = 400.0                  # 10 ra_out_of_range
    df.loc[60:99, "MAG"] = 99.0                  # 40 mag_missing (sentinel)
    df.loc[100:104, "Z"] = -0.5                  # 5 redshift_invalid
    df.loc[110:117, "MAG"] = -999.0              # 8 mag_implausible
    df.loc[118:119, "MAG"] = 1e30                # 2 mag_implausible
    df.loc[200:224, "OBJID"] = df.loc[300:324, "OBJID"].to_numpy()  # 25 duplicate_id later
    df.loc[400:414, "RA"] = -10.0                # 15 wrapped to RA 350 and kept
    a = write(df.iloc[:3500], tmp_path / "a.parquet", row_group_size=1000)
    b = write(df.iloc[3500:], tmp_path / "b.fits")
    expected = {"ra_dec_not_finite": 30, "dec_out_of_range": 20, "ra_out_of_range": 10,
                "mag_missing": 40, "mag_implausible": 10, "redshift_invalid": 5,
                "duplicate_id": 25}
    return [a, b], expected, df


def test_ledger_counts_every_injected_fault(tmp_path):
    paths, expected, _df = corrupted(tmp_path)
    result = tally(source(paths, redshift="Z", id="OBJID"), box(), columns=())
    assert dict(result.ledger.rows_rejected) == expected
    assert result.ledger.notes["ra_wrapped_from_negative"] == 15
    assert result.ledger.rows_read == 6000
    result.check()
    assert result.n_sources == result.ledger.rows_in_footprint


def test_results_do_not_depend_on_chunk_size_or_threads(tmp_path):
    paths, _, _ = corrupted(tmp_path)
    src = source(paths, redshift="Z", id="OBJID")
    fp = box()
    regions = fp.split(6)
    reference = tally(src, fp, regions=regions, chunk_rows=1_000_000, threads=1)
    for chunk_rows, threads in [(777, 1), (777, 3), (50, 2)]:
        other = tally(src, fp, regions=regions, chunk_rows=chunk_rows, threads=threads)
        assert_same_tally(reference, other)


def test_blocks_inside_a_chunk(tmp_path, monkeypatch):
    # Blocks smaller than a chunk take the block-slicing path; the result must not change.
    paths, _, _ = corrupted(tmp_path)
    src = source(paths, redshift="Z", id="OBJID")
    fp = box()
    regions = fp.split(6)
    whole = tally(src, fp, regions=regions, threads=1)
    monkeypatch.setattr(tally_module, "BLOCK_ROWS", 333)
    assert_same_tally(whole, tally(src, fp, regions=regions, threads=1))
    assert_same_tally(whole, tally(src, fp, regions=regions, threads=2))


def test_two_halves_merge_into_the_whole(tmp_path):
    df = frame(4000, 8)
    a = write(df.iloc[:1500], tmp_path / "a.parquet")
    b = write(df.iloc[1500:], tmp_path / "b.csv")
    fp = box()
    regions = fp.split(5)
    bins = {"start": 17, "stop": 25, "width": 0.25}
    whole = tally(source([a, b]), fp, regions=regions, mag_bins=bins)
    merged = (tally(source(a), fp, regions=regions, mag_bins=bins)
              + tally(source(b), fp, regions=regions, mag_bins=bins))
    assert_same_tally(whole, merged)
    merged.check()


def test_merge_refuses_different_layouts(tmp_path):
    path = write(frame(1000, 9), tmp_path / "a.parquet")
    fp = box()
    a = tally(source(path), fp, n_regions=4, mag_bins=[17, 21, 25])
    b = tally(source(path), fp, n_regions=4, mag_bins=[17, 20, 25])
    with pytest.raises(InputError, match="same magnitude and redshift bins and the same regions"):
        a.merge(b)
    c = tally(source(path), fp, n_regions=4, mag_bins=[17, 21, 25], columns=())
    with pytest.raises(InputError, match="same columns to be added"):
        a.merge(c)
    with pytest.raises(InputTypeError, match="`other` must be a Tally; got int"):
        a.merge(3)


def test_tally_is_frozen_and_its_arrays_read_only(tmp_path):
    path = write(frame(1000, 10), tmp_path / "a.parquet")
    result = tally(source(path), box(), n_regions=2)
    with pytest.raises(AttributeError):
        result.ledger = Ledger()
    with pytest.raises(ValueError, match="read-only"):
        result.histogram[0, 0, 0] = 5
    with pytest.raises(ValueError, match="read-only"):
        result.columns["mag"][0] = 1.0
    assert "Tally(n_sources=" in repr(result)
    assert "sources in footprint" in result.summary()


def test_check_catches_a_histogram_that_disagrees_with_the_ledger(tmp_path):
    path = write(frame(1000, 12), tmp_path / "a.parquet")
    good = tally(source(path), box(), n_regions=2, columns=())
    cube = good.histogram.copy()
    cube[1, 1, 0] += 1
    bad = Tally(ledger=good.ledger, mag_edges=good.mag_edges, histogram=cube,
                regions=good.regions, region_area_deg2=good.region_area_deg2,
                area_deg2=good.area_deg2, area_uncertainty_deg2=0.0,
                footprint_summary=good.footprint_summary)
    with pytest.raises(RuntimeError, match=r"histogram holds .* sources but the ledger has"):
        bad.check()
    with pytest.raises(InputError, match="`histogram` must be int64 of shape"):
        Tally(ledger=good.ledger, mag_edges=good.mag_edges, histogram=cube[:, :-1],
              regions=good.regions, region_area_deg2=good.region_area_deg2, area_deg2=1.0,
              area_uncertainty_deg2=0.0, footprint_summary={})


def test_regions_of_another_footprint_warn(tmp_path):
    path = write(frame(3000, 13), tmp_path / "a.parquet")
    other = Footprint.box((150.0, 155.0), (0.0, 10.0), max_order=12).split(3)
    with pytest.warns(TallyWarning, match="in-footprint sources fall in no region's cell"):
        result = tally(source(path), box(), regions=other)
    assert result.n_unassigned > 0
    assert result.n_sources == result.ledger.rows_in_footprint


def test_memory_of_kept_columns_is_compact(tmp_path):
    path = write(frame(5000, 14), tmp_path / "a.parquet")
    result = tally(source(path, redshift="Z"), box(), n_regions=2)
    assert set(result.columns) == {"mag", "redshift", "coverage", "region"}
    for name, values in result.columns.items():
        assert values.dtype == tally_module.COLUMNS[name]
        assert values.itemsize == 4
    none_kept = tally(source(path, redshift="Z"), box(), n_regions=2, columns=())
    assert none_kept.columns == {}


# --------------------------------------------------------------------------------------------
# Progress bar
# --------------------------------------------------------------------------------------------


class _FakeTerminal(io.StringIO):
    def isatty(self):
        return True


def test_progress_bar_only_on_a_terminal_or_when_asked(tmp_path, monkeypatch):
    path = write(frame(2000, 15), tmp_path / "a.parquet")
    fp = box()
    regions = fp.split(2)
    captured = io.StringIO()
    monkeypatch.setattr(sys, "stderr", captured)
    tally(source(path), fp, regions=regions)                  # not a terminal: silent
    tally(source(path), fp, regions=regions, progress=False)
    assert captured.getvalue() == ""
    terminal = _FakeTerminal()
    monkeypatch.setattr(sys, "stderr", terminal)
    tally(source(path), fp, regions=regions)                  # a terminal: a bar with rows/s
    assert "rows" in terminal.getvalue()
    quiet = _FakeTerminal()
    monkeypatch.setattr(sys, "stderr", quiet)
    tally(source(path), fp, regions=regions, progress=False)  # --quiet on a terminal
    assert quiet.getvalue() == ""


# --------------------------------------------------------------------------------------------
# Bad input (arguments)
# --------------------------------------------------------------------------------------------


@pytest.fixture
def small(tmp_path):
    return source(write(frame(500, 16), tmp_path / "a.parquet"), redshift="Z")


@pytest.mark.parametrize("kwargs, error, message", [
    ({"engine": "spark"}, InputError, r"`engine` must be one of local, dask; got 'spark'"),
    ({"scheduler": "tcp://x:1"}, InputError,
     r"`scheduler` is only used with engine 'dask'; got engine 'local'"),
    ({"threads": 0}, InputError, r"`threads` must be an integer >= 1; got 0"),
    ({"chunk_rows": 0}, InputError, r"`chunk_rows` must be >= 1; got 0"),
    ({"regions": "all"}, InputTypeError, r"`regions` must be Regions; got str"),
    ({"mag_bins": {"start": 20, "stop": 18, "width": 0.5}}, InputError,
     r"`mag_bins` stop must be greater than start \(20\); got 18"),
    ({"mag_bins": {"start": 18, "stop": 20, "width": 0.3}}, InputError,
     r"`mag_bins` width must divide stop - start \(2\) into a whole number of bins; got 0.3"),
    ({"mag_bins": {"start": 18, "stop": 20, "width": -1}}, InputError,
     r"`mag_bins` width must be > 0; got -1"),
    ({"mag_bins": {"start": 18, "stop": 20}}, InputError,
     r"`mag_bins` must have keys start, stop and width; missing width"),
    ({"mag_bins": {"start": "a", "stop": 20, "width": 1}}, InputTypeError,
     r"`mag_bins` start must be a number; got 'a'"),
    ({"mag_bins": [20, 19, 21]}, InputError, r"`mag_bins` edges must increase strictly"),
    ({"mag_bins": [20]}, InputError, r"`mag_bins` must be at least two bin edges"),
    ({"mag_bins": [20, np.nan]}, InputError, r"`mag_bins` edges must be finite"),
    ({"mag_bins": "20-25"}, InputTypeError, r"`mag_bins` must be bin edges or"),
    ({"redshift_bins": [0, np.inf]}, InputError, r"`redshift_bins` edges must be finite"),
    ({"columns": ["mag", "colour"]}, InputError,
     r"`columns` entries must be among mag, redshift, .*; got 'colour'"),
    ({"columns": ["stellar_mass"]}, InputError,
     r"`columns`: 'stellar_mass' needs a `stellar_mass` column mapped"),
    ({"columns": "mag"}, InputTypeError, r"`columns` must be a list of column names; got 'mag'"),
])
def test_bad_arguments(small, kwargs, error, message):
    with pytest.raises(error, match=message):
        tally(small, box(), **kwargs)


def test_bad_source_footprint_and_redshift_bins(tmp_path, small):
    with pytest.raises(InputTypeError, match="`source` must be a CatalogSource; got str"):
        tally("cat.parquet", box())
    with pytest.raises(InputTypeError, match="`footprint` must be a Footprint; got tuple"):
        tally(small, (150, 160))
    with pytest.raises(InputError, match="`footprint` is empty"):
        tally(small, Footprint.empty(max_order=8))
    no_z = source(write(frame(100, 17), tmp_path / "b.parquet"))
    with pytest.raises(InputError, match="`redshift_bins` needs a `redshift` column"):
        tally(no_z, box(), redshift_bins=[0, 1])


# --------------------------------------------------------------------------------------------
# Bad input (files), through the tally
# --------------------------------------------------------------------------------------------


def test_truncated_parquet(tmp_path):
    path = write(frame(3000, 18), tmp_path / "a.parquet")
    data = open(path, "rb").read()
    open(path, "wb").write(data[: len(data) // 2])
    with pytest.raises(InputError, match="is not a readable Parquet file"):
        tally(source(path), box())


def test_fits_without_the_column(tmp_path):
    path = write(frame(100, 19).drop(columns="MAG"), tmp_path / "a.fits")
    with pytest.raises(InputError, match=r"`mag` column 'MAG' not found in .*a.fits"):
        tally(source(path), box())


def test_csv_with_text_in_a_numeric_column_far_down(tmp_path):
    df = frame(5000, 20)
    df["MAG"] = df["MAG"].astype(object)
    df.loc[4321, "MAG"] = "bright"
    path = write(df, tmp_path / "a.csv")
    with pytest.raises(InputError,
                       match=r"`mag` column 'MAG' in .*a.csv.* must be numeric; got 'bright' "
                             r"at data row 4322"):
        tally(source(path), box(), chunk_rows=1000)


def test_empty_file(tmp_path):
    path = tmp_path / "a.parquet"
    path.write_bytes(b"")
    with pytest.raises(InputError, match=r"is empty \(0 bytes\)"):
        tally(source(str(path)), box())


def test_zero_rows_after_cuts(tmp_path):
    df = frame(50, 21)
    df["MAG"] = 99.0
    path = write(df, tmp_path / "a.parquet")
    with pytest.raises(InputError,
                       match=r"all 50 rows were rejected, mostly by `mag_missing`"):
        tally(source(path), box())


def test_no_valid_row_inside_the_footprint(tmp_path):
    path = write(frame(50, 22, ra=(10.0, 20.0)), tmp_path / "a.parquet")
    with pytest.raises(InputError, match=r"none of the 50 valid rows lies inside the footprint"):
        tally(source(path), box())


def test_glob_matching_nothing(tmp_path):
    with pytest.raises(InputError, match=r"`paths` pattern '.*\*.parquet' matches no file"):
        tally(source(str(tmp_path / "*.parquet")), box())


def test_mix_of_schemas(tmp_path):
    a = write(frame(100, 23), tmp_path / "a.parquet")
    df = frame(100, 24)
    df["OBJID"] = df["OBJID"].astype(str) + "x"
    b = write(df, tmp_path / "b.parquet")
    with pytest.raises(InputError, match=r"files' schemas differ: `id` column 'OBJID' is text"):
        tally(source([a, b], id="OBJID"), box())
    # Different column sets but the mapped columns present: a warning, and a correct tally.
    c = write(frame(100, 25).drop(columns="Z"), tmp_path / "c.parquet")
    with pytest.warns(CatalogWarning, match="catalogue files have different columns"):
        result = tally(source([a, c]), box(), n_regions=2)
    assert result.ledger.rows_read == 200


# --------------------------------------------------------------------------------------------
# Dask engine: identical to the local engine, bit for bit
# --------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def dask_client():
    with (dask.config.set({tally_module._MMAP_KEY: tally_module._MMAP_THRESHOLD_BYTES}),
          distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                   host="127.0.0.1", dashboard_address="127.0.0.1:0") as cluster,
          distributed.Client(cluster) as client):
        yield client


def duplicate_catalogue(tmp_path):
    """Three files in three formats with duplicate ids within and across files.

    Returns the paths and the rows in catalogue order (for the oracle).
    """
    rng = np.random.default_rng(30)
    a = frame(3000, rng, id_start=0)
    a.loc[5:14, "RA"] = np.nan                         # invalid first occurrences of 5..14
    a.loc[20:39, "RA"] = -np.linspace(1.0, 9.0, 20)     # wrapped RA, some duplicated later
    b = frame(2000, rng, id_start=10_000)
    b.loc[0:99, "OBJID"] = a.loc[20:119, "OBJID"].to_numpy()     # ids kept in a: duplicates
    b.loc[100:109, "OBJID"] = np.arange(5, 15)                   # first valid here: kept
    b.loc[200:249, "OBJID"] = b.loc[300:349, "OBJID"].to_numpy()  # duplicates within b
    b.loc[0:9, "RA"] = -5.0                                       # wrapped duplicates
    b.loc[50:54, "MAG"] = 99.0                                    # invalid duplicates
    b.loc[55:57, "MAG"] = -999.0                                  # implausible duplicates
    c = frame(1500, rng, id_start=20_000)
    c.loc[0:49, "OBJID"] = b.loc[500:549, "OBJID"].to_numpy()     # duplicates of b
    c.loc[50:59, "OBJID"] = a.loc[2990:2999, "OBJID"].to_numpy()  # duplicates of a's last group
    a_table = pa.Table.from_pandas(a, preserve_index=False)
    ids = a_table.column("OBJID").to_pylist()
    for i in range(2500, 2520):
        ids[i] = None                                              # missing ids: kept, noted
    a_table = a_table.set_column(a_table.schema.get_field_index("OBJID"), "OBJID",
                                 pa.array(ids, pa.int64()))
    pq.write_table(a_table, tmp_path / "a.parquet", row_group_size=700)
    write(b, tmp_path / "b.fits")
    write(c, tmp_path / "c.csv")
    a_ids = pd.array(ids, dtype="Int64")
    rows = pd.concat([a.assign(OBJID=a_ids), b.assign(OBJID=pd.array(b.OBJID, "Int64")),
                      c.assign(OBJID=pd.array(c.OBJID, "Int64"))], ignore_index=True)
    paths = [str(tmp_path / n) for n in ("a.parquet", "b.fits", "c.csv")]
    return paths, rows


def oracle_ledger(rows, footprint):
    """Row by row, in catalogue order, from the documented rules of countscale.catalog."""
    rejected = dict.fromkeys(["ra_dec_not_finite", "dec_out_of_range", "ra_out_of_range",
                              "mag_missing", "mag_implausible", "redshift_invalid",
                              "duplicate_id"], 0)
    seen, n_in, n_out, wrapped, missing = set(), 0, 0, 0, 0
    for ra, dec, mag, z, objid in rows[["RA", "DEC", "MAG", "Z", "OBJID"]].itertuples(
            index=False):
        if not (math.isfinite(ra) and math.isfinite(dec)):
            rejected["ra_dec_not_finite"] += 1
            continue
        if not -90 <= dec <= 90:
            rejected["dec_out_of_range"] += 1
            continue
        ra_norm = ra + 360.0 if -180.0 <= ra < 0.0 else ra
        if not 0.0 <= ra_norm < 360.0:
            rejected["ra_out_of_range"] += 1
            continue
        if not math.isfinite(mag) or mag in (99.0, -99.0, 99.99):
            rejected["mag_missing"] += 1
            continue
        if not -30.0 <= mag <= 40.0:  # the documented default plausible range
            rejected["mag_implausible"] += 1
            continue
        if z < 0:
            rejected["redshift_invalid"] += 1
            continue
        if pd.isna(objid):
            missing += 1
        elif objid in seen:
            rejected["duplicate_id"] += 1
            continue
        else:
            seen.add(objid)
        wrapped += ra < 0
        if footprint.contains(np.array([ra_norm]), np.array([dec]))[0]:
            n_in += 1
        else:
            n_out += 1
    return {"rows_read": len(rows), "rows_in_footprint": n_in, "rows_outside_footprint": n_out,
            "rows_rejected": rejected,
            "notes": {"id_missing": missing, "ra_wrapped_from_negative": int(wrapped)}}


def test_dask_equals_local_bit_for_bit_with_duplicates_across_files(tmp_path, monkeypatch,
                                                                   dask_client):
    paths, rows = duplicate_catalogue(tmp_path)
    # Parquet row groups of 700 rows in tasks of >= 1000 rows: a.parquet is three tasks, so
    # duplicates cross task boundaries inside one file as well as between files.
    monkeypatch.setattr(tally_module, "_TASK_ROWS", 1000)
    src = source(paths, redshift="Z", id="OBJID")
    fp = box(max_order=13) - Footprint.circles([155.0], [5.0], [3600.0], max_order=13)
    regions = fp.split(6)
    kw = dict(regions=regions, redshift_bins=[0, 1, 2], columns=None)
    local = tally(src, fp, **kw)
    assert local.ledger.to_dict() == oracle_ledger(rows, fp)
    assert local.ledger.rows_rejected["duplicate_id"] > 150      # the scenario is exercised
    assert local.ledger.notes["ra_wrapped_from_negative"] > 0
    units = tally_module._plan_units(src.check())
    assert len(units) == 5                                       # 3 Parquet tasks + FITS + CSV
    remote = tally(src, fp, engine="dask", scheduler=dask_client, **kw)
    assert_same_tally(local, remote)
    assert set(remote.columns) == {"mag", "redshift", "coverage", "region"}


@settings(max_examples=80, deadline=None)
@given(tasks=st.lists(st.tuples(st.integers(-50, 50), st.integers(0, 30),
                                st.integers(0, 2**32 - 1)), min_size=1, max_size=12))
def test_driver_id_registry_equals_the_sequential_one(tasks):
    # The driver's range-indexed registry must answer exactly as catalog.SeenIds fed the same
    # tasks in order (each task's ids unique within the task, as the tasks guarantee).
    from countscale.catalog import SeenIds

    fast, reference = tally_module._TaskIds(), SeenIds()
    for start, width, seed in tasks:
        rng = np.random.default_rng(seed)
        ids = rng.permutation(np.arange(start, start + width + 1, dtype=np.int64))
        ids = ids[: rng.integers(1, len(ids) + 1)]
        first = fast.keep_first((ids.min(), ids.max()), lambda ids=ids: ids)
        expected = reference.keep_first(ids)
        if first is None:  # a new range: every id is new
            assert expected.all()
        else:
            np.testing.assert_array_equal(first, expected)


def test_dask_by_address_and_errors_from_workers(tmp_path, dask_client):
    df = frame(3000, 31)
    a = write(df, tmp_path / "a.parquet", row_group_size=500)
    fp = box()
    regions = fp.split(4)
    address = dask_client.scheduler.address
    local = tally(source(a), fp, regions=regions, columns=())
    remote = tally(source(a), fp, regions=regions, columns=(), engine="dask",
                   scheduler=address)
    assert_same_tally(local, remote)
    bad = frame(3000, 32)
    bad["MAG"] = bad["MAG"].astype(object)
    bad.loc[2500, "MAG"] = "n/a?"
    b = write(bad, tmp_path / "b.csv")
    with pytest.raises(InputError, match=r"must be numeric; got 'n/a\?' at data row 2501"):
        tally(source([a, b]), fp, regions=regions, engine="dask", scheduler=dask_client)


def test_dask_text_ids_duplicated_across_files(tmp_path, dask_client):
    a, b = frame(1500, 35), frame(1500, 36)
    a["OBJID"] = "src-" + a["OBJID"].astype(str)
    b["OBJID"] = "src-" + (b["OBJID"] + 1000).astype(str)   # ids 1000..1499 repeat a's
    paths = [write(a, tmp_path / "a.parquet", row_group_size=400),
             write(b, tmp_path / "b.csv")]
    src = source(paths, id="OBJID")
    fp = box()
    regions = fp.split(3)
    local = tally(src, fp, regions=regions)
    assert local.ledger.rows_rejected["duplicate_id"] == 500  # by construction
    assert_same_tally(local, tally(src, fp, regions=regions, engine="dask",
                                   scheduler=dask_client))


def _classified(df, rng):
    """Add a star probability column P (some NaN: unclassified) to a frame."""
    out = df.copy()
    p = np.random.default_rng(rng).random(len(out))
    p[::97] = np.nan
    out["P"] = p
    return out


def _dust(nside=32):
    """An E(B-V) map rising with RA over the test box (NEST ordering)."""
    from countscale.extinction import ExtinctionMap

    ra, _ = hp.pix2ang(nside, np.arange(hp.nside2npix(nside)), nest=True, lonlat=True)
    return ExtinctionMap(0.01 + 0.02 * ((ra - 148.0) % 360.0) / 14.0, 2.285, nest=True)


def test_classifier_and_extinction_match_a_row_by_row_oracle(tmp_path):
    df = _classified(frame(8000, 40), 41)
    path = write(df, tmp_path / "cat.parquet", row_group_size=1500)
    fp = box()
    ext = _dust()
    src = source(path, classifier="P", classifier_threshold=0.6)
    result = tally(src, fp, n_regions=5, mag_bins={"start": 17, "stop": 25, "width": 0.5},
                   columns=("mag", "cell", "region"), extinction=ext)
    # Oracle: inside by the footprint's own test; stars P >= 0.6 (NaN: kept); dereddened
    # magnitudes m - 2.285 E(B-V) at the source's pixel (healpy ang2pix, NEST).
    inside = fp.contains(df.RA.to_numpy(), df.DEC.to_numpy())
    star = (df.P >= 0.6).to_numpy()
    pixel = hp.ang2pix(32, df.RA.to_numpy(), df.DEC.to_numpy(), nest=True, lonlat=True)
    dered = df.MAG.to_numpy() - 2.285 * ext.ebv[pixel]
    edges = np.arange(17.0, 25.01, 0.5)
    kept = inside & ~star
    np.testing.assert_array_equal(result.counts, np.histogram(dered[kept], edges)[0])
    np.testing.assert_array_equal(result.excluded_counts,
                                  np.histogram(dered[inside & star], edges)[0])
    ledger = result.ledger
    assert ledger.rows_in_footprint == int(kept.sum())
    assert ledger.rows_rejected["star_by_classifier"] == int((inside & star).sum())
    assert ledger.rows_outside_footprint == int((~inside).sum())
    assert ledger.notes["classifier_missing"] == int((inside & df.P.isna()).sum())
    np.testing.assert_allclose(result.columns["mag"], dered[kept].astype(np.float32))
    # The cell column: each kept source's NEST cell of order 10 (healpy ang2pix).
    np.testing.assert_array_equal(result.columns["cell"], hp.ang2pix(
        1024, df.RA.to_numpy()[kept], df.DEC.to_numpy()[kept], nest=True, lonlat=True))
    # Trimming the default grid keeps every excluded source (in bins or overflow slots).
    default = tally(src, fp, n_regions=5, extinction=ext)
    assert int(default.excluded_histogram.sum()) == int((inside & star).sum())


def test_dask_equals_local_with_classifier_extinction_and_duplicates(tmp_path, monkeypatch,
                                                                    dask_client):
    paths, _ = duplicate_catalogue(tmp_path)
    monkeypatch.setattr(tally_module, "_TASK_ROWS", 1000)
    # Add a classifier to each file (rewritten in the same formats, same ids).
    rng = np.random.default_rng(42)
    rewritten = []
    for path in paths:
        if path.endswith(".parquet"):
            table = pq.read_table(path)
            p = rng.random(table.num_rows)
            pq.write_table(table.append_column("P", pa.array(p)), path, row_group_size=700)
        elif path.endswith(".fits"):
            data = Table.read(path)
            data["P"] = rng.random(len(data))
            data.write(path, overwrite=True)
        else:
            data = pd.read_csv(path)
            data["P"] = rng.random(len(data))
            data.to_csv(path, index=False)
        rewritten.append(path)
    src = source(rewritten, redshift="Z", id="OBJID", classifier="P")
    fp = box(max_order=13)
    regions = fp.split(6)
    kw = dict(regions=regions, columns=("mag", "cell"), extinction=_dust())
    local = tally(src, fp, **kw)
    assert local.ledger.rows_rejected["star_by_classifier"] > 1000
    assert local.ledger.rows_rejected["duplicate_id"] > 150
    # Count the repeated rows the classifier had left out in their own task (the driver
    # moves them to duplicate_id): the scenario must exercise that path.
    seen = []
    reject = tally_module._reject_duplicates

    def spy(part, slot, wrapped, colpos):
        seen.append(int(np.count_nonzero(slot <= -2)))
        return reject(part, slot, wrapped, colpos)

    monkeypatch.setattr(tally_module, "_reject_duplicates", spy)
    remote = tally(src, fp, engine="dask", scheduler=dask_client, **kw)
    assert sum(seen) > 10
    assert_same_tally(local, remote)
    np.testing.assert_array_equal(local.excluded_histogram, remote.excluded_histogram)


def test_dask_unreachable_scheduler(tmp_path, monkeypatch):
    path = write(frame(100, 33), tmp_path / "a.parquet")
    monkeypatch.setattr(tally_module, "_CONNECT_TIMEOUT", "1s")
    with pytest.raises(InputError,
                       match=r"`scheduler`: cannot connect to the Dask scheduler at "
                             r"'tcp://127.0.0.1:9'"):
        tally(source(path), box(), engine="dask", scheduler="tcp://127.0.0.1:9")


def test_dask_local_cluster_when_no_address(tmp_path):
    df = frame(2000, 34)
    path = write(df, tmp_path / "a.parquet")
    fp = box()
    regions = fp.split(3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResourceWarning)
        remote = tally(source(path), fp, regions=regions, engine="dask")
    assert_same_tally(tally(source(path), fp, regions=regions), remote)
