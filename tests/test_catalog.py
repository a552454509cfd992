"""Tests for countscale.catalog: readers, checks, validation and the row ledger.

Outside references used here:
- the files' own writers (pyarrow.parquet, astropy.io.fits / astropy.table, pandas.to_csv):
  what we read back must equal what they wrote;
- counts by construction: every corruption is injected a known number of times, so the
  expected number per rejection reason is known before the code runs;
- an independent row-by-row oracle (plain Python loop, written from the documented rules) for
  the hypothesis property test;
- astropy.coordinates angular separations for the footprint split with a real cap.
"""

from __future__ import annotations

import gzip
import json
import math
import os
import tracemalloc
import warnings

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from astropy.io import fits
from astropy.table import Table
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from countscale.catalog import (
    CSV_SAMPLE_ROWS,
    DEFAULT_MAG_RANGE,
    DEFAULT_SENTINELS,
    NOTE_ID_MISSING,
    NOTE_RA_WRAPPED,
    REJECTION_REASONS,
    CatalogChunk,
    CatalogSource,
    CatalogWarning,
    Ledger,
    LedgerError,
    SeenIds,
    ValidationRules,
    check_chunk_rows,
    iter_file_chunks,
    iter_valid_chunks,
    require_rows,
    split_by_footprint,
    validate_chunk,
)
from countscale.errors import InputError, InputTypeError

# --------------------------------------------------------------------------------------------
# Fixture helpers: clean tables and writers for each format
# --------------------------------------------------------------------------------------------

COLUMNS = {"ra": "RA", "dec": "DEC", "mag": "MAG_R", "redshift": "Z", "id": "OBJID"}


def clean_table(n, rng, id_start=0):
    """n clean rows: RA in [0, 360), Dec in (-89, 89), mag 18-25, z in (0.01, 3), unique ids."""
    rng = np.random.default_rng(rng)
    return pd.DataFrame({
        "RA": rng.uniform(0.0, 360.0, n),
        "DEC": rng.uniform(-89.0, 89.0, n),
        "MAG_R": rng.uniform(18.0, 25.0, n),
        "Z": rng.uniform(0.01, 3.0, n),
        "OBJID": np.arange(id_start, id_start + n, dtype=np.int64),
        "FLAGS": rng.integers(0, 4, n),
    })


def write(frame, path, row_group_size=None):
    """Write a DataFrame in the format given by the path's extension."""
    path = str(path)
    if path.endswith((".parquet", ".pq")):
        table = pa.Table.from_pandas(frame, preserve_index=False)
        pq.write_table(table, path, row_group_size=row_group_size)
    elif path.endswith((".fits", ".fit", ".fits.gz")):
        Table.from_pandas(frame).write(path, overwrite=True)
    elif path.endswith((".csv", ".csv.gz")):
        frame.to_csv(path, index=False)
    else:
        raise ValueError(path)
    return path


def source_for(paths, **kwargs):
    mapping = dict(COLUMNS)
    mapping.update(kwargs)
    return CatalogSource(paths, **mapping)


def read_everything(source, chunk_rows, footprint=None):
    """Concatenate all kept rows and sum the ledger."""
    kept = {k: [] for k in ("ra", "dec", "mag", "redshift", "id", "row_in_file", "source")}
    ledger = Ledger()
    for valid, rejected, notes in iter_valid_chunks(source, chunk_rows=chunk_rows):
        inside = (np.ones(len(valid), dtype=bool) if footprint is None
                  else split_by_footprint(valid, footprint))
        ledger = ledger + Ledger.from_chunk(valid, rejected, notes, inside)
        for key in kept:
            if key == "source":
                kept[key].append(np.full(len(valid), valid.source, dtype=object))
            else:
                value = getattr(valid, key)
                if value is not None:
                    kept[key].append(value)
    out = {k: np.concatenate(v) if v else None for k, v in kept.items()}
    return out, ledger.check()


class NorthOnly:
    """Duck-typed footprint stand-in: the northern hemisphere (Dec > 0)."""

    def contains(self, ra_deg, dec_deg):
        return np.asarray(dec_deg) > 0.0


# --------------------------------------------------------------------------------------------
# Round trips
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("name", ["cat.parquet", "cat.pq", "cat.fits", "cat.fits.gz",
                                  "cat.csv", "cat.csv.gz"])
def test_round_trip_each_format(tmp_path, name):
    frame = clean_table(523, rng=1)
    path = write(frame, tmp_path / name, row_group_size=100)
    source = source_for([path])
    chunks = list(source.iter_chunks(chunk_rows=64))
    assert all(len(c) <= 64 for c in chunks)
    offsets = [c.row_offset for c in chunks]
    assert offsets[0] == 0
    assert np.all(np.diff(offsets) == [len(c) for c in chunks[:-1]])  # contiguous rows
    assert {c.source for c in chunks} == {path}
    got = {k: np.concatenate([getattr(c, k) for c in chunks])
           for k in ("ra", "dec", "mag", "redshift", "id")}
    # Binary formats store the bits; CSV goes through decimal text (pandas writes 17
    # significant digits, its parser may differ in the last bit).
    rtol = 1e-15 if "csv" in name else 0.0
    for logical, column in COLUMNS.items():
        if logical == "id":
            np.testing.assert_array_equal(got["id"], frame[column].to_numpy())
            assert got["id"].dtype == np.int64
        else:
            np.testing.assert_allclose(got[logical], frame[column].to_numpy(), rtol=rtol,
                                       atol=0)
            assert got[logical].dtype == np.float64
    assert chunks[0].mag_error is None and chunks[0].weight is None


def test_parquet_several_row_groups_identical_for_any_chunk_size(tmp_path):
    frame = clean_table(1000, rng=2)
    path = write(frame, tmp_path / "cat.parquet", row_group_size=137)
    assert pq.ParquetFile(path).num_row_groups == 8
    results = [read_everything(source_for([path]), n) for n in (7, 1000, 10**6)]
    for kept, ledger in results[1:]:
        for key in ("ra", "dec", "mag", "id", "row_in_file"):
            np.testing.assert_array_equal(kept[key], results[0][0][key])
        assert ledger == results[0][1]
    assert results[0][1].rows_read == 1000


def test_fits_row_slices_are_native_float64_copies(tmp_path):
    frame = clean_table(50, rng=3)
    path = write(frame, tmp_path / "cat.fits")
    chunk = next(source_for([path]).iter_chunks(chunk_rows=20))
    assert chunk.ra.dtype == np.dtype("float64") and chunk.ra.dtype.isnative
    # The table is stored big-endian (FITS standard); the chunk must not be a view into the
    # memory map, which closes when the file is done.
    assert chunk.ra.flags.owndata and not isinstance(chunk.ra, np.memmap)
    np.testing.assert_array_equal(chunk.ra, frame["RA"].to_numpy()[:20])


@pytest.mark.parametrize("formats", [(".parquet", ".parquet"), (".fits", ".csv"),
                                     (".csv.gz", ".fits.gz")])
def test_results_identical_for_any_chunk_size(tmp_path, formats):
    paths, _ = corrupted_pair(tmp_path, *formats)
    results = [read_everything(source_for(paths), n, footprint=NorthOnly())
               for n in (7, 1000, 10**6)]
    for kept, ledger in results[1:]:
        for key in ("ra", "dec", "mag", "redshift", "id", "row_in_file", "source"):
            np.testing.assert_array_equal(kept[key], results[0][0][key])
        assert ledger == results[0][1]
    assert results[0][1].rows_read == 350


def test_glob_of_several_files_in_sorted_order(tmp_path):
    for i in (2, 0, 1):
        write(clean_table(30 + i, rng=i, id_start=1000 * i), tmp_path / f"tile_{i}.parquet")
    source = source_for([str(tmp_path / "tile_*.parquet")])
    assert [p.name for p in source.files] == ["tile_0.parquet", "tile_1.parquet",
                                              "tile_2.parquet"]
    kept, ledger = read_everything(source, 10)
    assert ledger.rows_read == 30 + 31 + 32
    assert [os.path.basename(s) for s in dict.fromkeys(kept["source"])] == [
        "tile_0.parquet", "tile_1.parquet", "tile_2.parquet"]


def test_mixed_formats_in_one_catalogue(tmp_path):
    paths = [write(clean_table(40, rng=4, id_start=0), tmp_path / "a.parquet"),
             write(clean_table(40, rng=5, id_start=40), tmp_path / "b.fits"),
             write(clean_table(40, rng=6, id_start=80), tmp_path / "c.csv.gz")]
    kept, ledger = read_everything(source_for(paths), 13)
    assert ledger.rows_read == 120 and ledger.rows_in_footprint == 120
    np.testing.assert_array_equal(kept["id"], np.arange(120))


def test_column_mapping_any_names_and_fits_case_insensitive(tmp_path):
    frame = clean_table(20, rng=7).rename(columns={"RA": "alpha_j2000", "MAG_R": "m_r"})
    frame["m_r_err"] = 0.05
    path = write(frame, tmp_path / "cat.fits")
    source = CatalogSource(path, ra="ALPHA_J2000", dec="dec", mag="m_r",
                           mag_error="m_r_err", weight="FLAGS")
    chunk = next(source.iter_chunks(chunk_rows=100))
    np.testing.assert_array_equal(chunk.ra, frame["alpha_j2000"].to_numpy())
    np.testing.assert_array_equal(chunk.mag_error, np.full(20, 0.05))
    np.testing.assert_array_equal(chunk.weight, frame["FLAGS"].to_numpy().astype(float))
    assert chunk.redshift is None and chunk.id is None
    assert source.columns == {"ra": "ALPHA_J2000", "dec": "dec", "mag": "m_r",
                              "mag_error": "m_r_err", "weight": "FLAGS"}


def test_from_config_with_relative_paths_and_runfile_table(tmp_path):
    (tmp_path / "cat").mkdir()
    write(clean_table(15, rng=8), tmp_path / "cat" / "a.parquet")
    section = {"paths": ["cat/*.parquet"], "ra": "RA", "dec": "DEC", "mag": "MAG_R",
               "redshift": None, "sentinels": [99, -99], "population": "stars"}
    source = CatalogSource.from_config(section, base_dir=tmp_path)
    assert source.files[0].name == "a.parquet"
    assert source.sentinels == (99.0, -99.0) and source.population == "stars"
    with pytest.raises(InputError, match=r"`\[catalog\]` has unknown key 'magg'; "
                                         r"did you mean 'mag'\?"):
        CatalogSource.from_config({**section, "magg": "x"}, base_dir=tmp_path)
    with pytest.raises(InputError, match=r"`\[catalog\]` needs the key 'dec'"):
        CatalogSource.from_config({"paths": ["x.csv"], "ra": "a", "mag": "m"})
    # The run-file reader's validated table (a Mapping with every key) is accepted as is.
    runfile = pytest.importorskip("countscale.runfile")
    text = (f'[catalog]\npaths = ["{tmp_path}/cat/*.parquet"]\nra = "RA"\ndec = "DEC"\n'
            'mag = "MAG_R"\n')
    rf = runfile.parse_runfile(text, str(tmp_path / "run.toml"))
    source = CatalogSource.from_config(rf.catalog)
    assert source.sentinels == DEFAULT_SENTINELS and len(source.files) == 1


# --------------------------------------------------------------------------------------------
# Corrupted data: exact counts per reason, by construction
# --------------------------------------------------------------------------------------------


def corrupted_pair(tmp_path, fmt_a=".parquet", fmt_b=".csv"):
    """Two files; every corruption injected a known number of times (see `expected`)."""
    a = clean_table(200, rng=10, id_start=0)
    b = clean_table(150, rng=11, id_start=200)
    a.loc[0, "RA"] = np.nan                 # ra_dec_not_finite
    a.loc[1, "DEC"] = np.inf                # ra_dec_not_finite
    a.loc[2, "DEC"] = 95.0                  # dec_out_of_range
    a.loc[3, "DEC"] = -90.5                 # dec_out_of_range
    a.loc[4, "RA"] = -30.0                  # wrapped to 330, kept
    a.loc[5, "RA"] = -180.0                 # wrapped to 180, kept
    a.loc[6, "RA"] = 400.0                  # ra_out_of_range
    a.loc[7, "RA"] = -180.5                 # ra_out_of_range (below the [-180, 180) range)
    a.loc[8, "RA"] = 360.0                  # ra_out_of_range ([0, 360) excludes 360)
    a.loc[9, "MAG_R"] = 99.0                # mag_missing
    a.loc[10, "MAG_R"] = -99.0              # mag_missing
    a.loc[11, "MAG_R"] = 99.99              # mag_missing
    a.loc[12, "MAG_R"] = np.nan             # mag_missing
    a.loc[13, "Z"] = -0.2                   # redshift_invalid
    a.loc[14, "RA"] = np.nan                # both RA and mag bad: the first rule wins
    a.loc[14, "MAG_R"] = 99.0
    a.loc[15, "DEC"] = 91.0                 # dec and mag bad: dec_out_of_range wins
    a.loc[15, "MAG_R"] = np.nan
    a.loc[16, "Z"] = np.nan                 # missing redshift: kept unless required
    a.loc[17, "MAG_R"] = -999.0             # mag_implausible (below -30, not a sentinel)
    a.loc[18, "MAG_R"] = 1e30               # mag_implausible
    a.loc[19, "MAG_R"] = 40.5               # mag_implausible
    a.loc[20, "MAG_R"] = 40.0               # the range's end is plausible: kept
    a.loc[21, "MAG_R"] = -999.0             # implausible magnitude *and* negative z: mag wins
    a.loc[21, "Z"] = -1.0
    b.loc[0:2, "OBJID"] = [5, 16, 199]      # duplicates of ids kept in file a
    b.loc[3, "OBJID"] = 9                   # id 9 was rejected (mag 99) in a: kept here
    b.loc[4, "OBJID"] = 210                 # first sight of 210: b row 10 becomes the duplicate
    b.loc[5, "RA"] = -10.0                  # wrapped, kept
    b.loc[6, "MAG_R"] = 99.99               # mag_missing
    b.loc[7, "OBJID"] = 6                   # id of a rejected row (RA 400): kept
    b.loc[8, "MAG_R"] = 99.0                # mag_missing *and* repeated id: mag wins
    b.loc[8, "OBJID"] = 20
    paths = [write(a, tmp_path / f"a{fmt_a}", row_group_size=64),
             write(b, tmp_path / f"b{fmt_b}", row_group_size=64)]
    expected = {
        "ra_dec_not_finite": 3, "dec_out_of_range": 3, "ra_out_of_range": 3,
        "mag_missing": 4 + 2, "mag_implausible": 4, "redshift_invalid": 1,
        # b rows 0-2 repeat ids kept from a; b row 10 repeats the id given to b row 4.
        "duplicate_id": 3 + 1,
    }
    return paths, expected


@pytest.mark.parametrize("formats", [(".parquet", ".csv"), (".fits", ".parquet"),
                                     (".csv.gz", ".fits")])
def test_corrupted_catalogue_exact_counts_per_reason(tmp_path, formats):
    paths, expected = corrupted_pair(tmp_path, *formats)
    kept, ledger = read_everything(source_for(paths), 50, footprint=NorthOnly())
    assert ledger.rows_read == 350
    assert dict(ledger.rows_rejected) == expected
    assert ledger.notes[NOTE_RA_WRAPPED] == 3
    assert ledger.notes[NOTE_ID_MISSING] == 0
    n_kept = 350 - sum(expected.values())
    assert ledger.rows_in_footprint + ledger.rows_outside_footprint == n_kept
    assert ledger.rows_in_footprint == int(np.count_nonzero(kept["dec"] > 0))
    # The wrapped rows are kept with RA + 360 (exact in binary floating point).
    assert np.all((kept["ra"] >= 0) & (kept["ra"] < 360))
    in_a = kept["source"] == paths[0]
    for row, ra in ((4, 330.0), (5, 180.0)):
        assert kept["ra"][in_a & (kept["row_in_file"] == row)].tolist() == [ra]
    assert kept["ra"][~in_a & (kept["row_in_file"] == 5)].tolist() == [350.0]
    # Each kept id appears once.
    assert len(np.unique(kept["id"])) == len(kept["id"])
    # Missing redshift is kept by default but rejected when required.
    _, ledger_strict = read_everything(source_for(paths, require_redshift=True), 50)
    assert ledger_strict.rows_rejected["redshift_invalid"] == expected["redshift_invalid"] + 1


def test_float32_sentinel_is_recognised(tmp_path):
    # 99.99 stored as float32 reads back as 99.98999786...: it must still count as missing.
    frame = clean_table(10, rng=12)[["RA", "DEC", "MAG_R"]]
    frame["MAG_R"] = frame["MAG_R"].astype(np.float32)
    frame.loc[[1, 2, 3], "MAG_R"] = np.float32(99.99), np.float32(-99.0), np.float32(24.99)
    path = write(frame, tmp_path / "f32.fits")
    assert np.float64(np.float32(99.99)) != 99.99
    _, ledger = read_everything(CatalogSource(path, ra="RA", dec="DEC", mag="MAG_R"), 4)
    assert ledger.rows_rejected["mag_missing"] == 2


def test_user_sentinels_replace_the_defaults(tmp_path):
    frame = clean_table(10, rng=13)[["RA", "DEC", "MAG_R"]]
    frame.loc[[0, 1], "MAG_R"] = [-1.0, 99.0]
    path = write(frame, tmp_path / "c.parquet")
    source = CatalogSource(path, ra="RA", dec="DEC", mag="MAG_R", sentinels=[-1.0])
    _, ledger = read_everything(source, 100)
    assert ledger.rows_rejected["mag_missing"] == 1  # 99 is a (strange) magnitude here


def test_missing_ids_are_kept_and_noted(tmp_path):
    frame = clean_table(12, rng=14)
    frame["OBJID"] = frame["OBJID"].astype("Int64")
    frame.loc[[2, 3], "OBJID"] = pd.NA
    frame.loc[4, "OBJID"] = 0  # duplicate of row 0
    for name in ("m.parquet", "m.csv"):
        path = write(frame, tmp_path / name)
        _, ledger = read_everything(source_for([path]), 5)
        assert ledger.notes[NOTE_ID_MISSING] == 2, name
        assert ledger.rows_rejected["duplicate_id"] == 1, name
        assert ledger.rows_in_footprint == 11, name


def test_text_and_large_integer_ids(tmp_path):
    big = np.array([2**62 + 1, 2**62 + 2, 2**62 + 1, 2**53 + 1, 2**53], dtype=np.int64)
    frame = clean_table(5, rng=15)
    frame["OBJID"] = big  # 2**53 + 1 and 2**53 collide as floats; they must not here
    path = write(frame, tmp_path / "big.csv")
    kept, ledger = read_everything(source_for([path]), 2)
    assert ledger.rows_rejected["duplicate_id"] == 1
    np.testing.assert_array_equal(kept["id"], big[[0, 1, 3, 4]])
    frame["OBJID"] = ["g-1", "g-2", "g-1", "g-3", "g-2"]
    for name in ("text.parquet", "text.fits", "text.csv"):
        path = write(frame, tmp_path / name)
        kept, ledger = read_everything(source_for([path]), 2)
        assert ledger.rows_rejected["duplicate_id"] == 2, name
        assert list(kept["id"]) == ["g-1", "g-2", "g-3"], name


def test_validate_chunk_does_not_modify_the_chunk():
    ra = np.array([-30.0, 10.0, np.nan])
    chunk = CatalogChunk("mem", 0, ra=ra, dec=np.zeros(3), mag=np.full(3, 20.0))
    before = ra.copy()
    valid, rejected, notes = validate_chunk(chunk, ValidationRules())
    np.testing.assert_array_equal(ra, before)
    np.testing.assert_array_equal(valid.ra, [330.0, 10.0])
    np.testing.assert_array_equal(valid.row_in_file, [0, 1])
    assert rejected["ra_dec_not_finite"] == 1 and notes[NOTE_RA_WRAPPED] == 1


def test_chunk_columns_must_have_one_length():
    with pytest.raises(InputError, match=r"`CatalogChunk.dec` must be 1-d with as many rows as "
                                         r"`ra` \(2\); got shape \(3,\)"):
        CatalogChunk("mem", 0, ra=np.zeros(2), dec=np.zeros(3), mag=np.zeros(2))


def test_tiny_negative_ra_wraps_to_zero_not_360():
    # -1e-14 + 360 rounds to exactly 360.0 in float64; the row is RA 0, kept.
    chunk = CatalogChunk("mem", 0, ra=np.array([-1e-14]), dec=np.zeros(1), mag=np.ones(1))
    valid, rejected, _ = validate_chunk(chunk, ValidationRules())
    assert valid.ra.tolist() == [0.0] and sum(rejected.values()) == 0


# --------------------------------------------------------------------------------------------
# Property test: random corruptions against a row-by-row oracle
# --------------------------------------------------------------------------------------------

CORRUPTIONS = ["ra_nan", "ra_inf", "dec_nan", "dec_95", "dec_m91", "ra_m30", "ra_m180",
               "ra_m200", "ra_400", "ra_360", "mag_99", "mag_m99", "mag_9999", "mag_nan",
               "mag_inf", "mag_m999", "mag_1e30", "mag_40", "mag_m30", "mag_m31", "z_neg",
               "z_nan", "id_missing"]


def apply_corruption(row, code):
    field, _, value = code.partition("_")
    numbers = {"nan": math.nan, "inf": math.inf, "95": 95.0, "m91": -91.0, "m30": -30.0,
               "m180": -180.0, "m200": -200.0, "400": 400.0, "360": 360.0, "99": 99.0,
               "m99": -99.0, "9999": 99.99, "neg": -0.5, "m999": -999.0, "1e30": 1e30,
               "40": 40.0, "m31": -31.0}
    if field == "id":
        row["id"] = None
    else:
        row[field] = numbers[value]


def oracle(rows, require_redshift):
    """Expected fate of each row, from the documented rules, one row at a time."""
    counts = dict.fromkeys(REJECTION_REASONS, 0)
    wrapped = missing_ids = 0
    seen = set()
    for row in rows:
        ra, dec, mag, z, ident = row["ra"], row["dec"], row["mag"], row["z"], row["id"]
        if not (math.isfinite(ra) and math.isfinite(dec)):
            counts["ra_dec_not_finite"] += 1
            continue
        if dec < -90 or dec > 90:
            counts["dec_out_of_range"] += 1
            continue
        is_wrapped = -180 <= ra < 0
        ra_norm = ra + 360 if is_wrapped else ra
        if not 0 <= ra_norm < 360:
            counts["ra_out_of_range"] += 1
            continue
        if not math.isfinite(mag) or mag in DEFAULT_SENTINELS:
            counts["mag_missing"] += 1
            continue
        if not DEFAULT_MAG_RANGE[0] <= mag <= DEFAULT_MAG_RANGE[1]:
            counts["mag_implausible"] += 1
            continue
        if z < 0 or (require_redshift and not math.isfinite(z)):
            counts["redshift_invalid"] += 1
            continue
        if ident is not None:
            if ident in seen:
                counts["duplicate_id"] += 1
                continue
            seen.add(ident)
        else:
            missing_ids += 1
        wrapped += is_wrapped
    return counts, wrapped, missing_ids


rows_strategy = st.lists(
    st.tuples(st.integers(0, 25), st.lists(st.sampled_from(CORRUPTIONS), max_size=2)),
    min_size=0, max_size=80,
)


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(rows=rows_strategy, chunk_rows=st.integers(1, 30), require_redshift=st.booleans(),
       seed=st.integers(0, 2**32 - 1))
def test_ledger_matches_row_by_row_oracle(rows, chunk_rows, require_redshift, seed):
    rng = np.random.default_rng(seed)
    table = []
    for ident, codes in rows:
        row = {"ra": rng.uniform(0, 360), "dec": rng.uniform(-90, 90),
               "mag": rng.uniform(15, 30), "z": rng.uniform(0, 5), "id": ident}
        for code in codes:
            apply_corruption(row, code)
        table.append(row)
    expected, wrapped, missing_ids = oracle(table, require_redshift)

    def column(key):
        return np.array([r[key] for r in table], dtype=float)

    ids = np.array([-1 if r["id"] is None else r["id"] for r in table], dtype=np.int64)
    id_missing = np.array([r["id"] is None for r in table], dtype=bool)
    rules = ValidationRules(require_redshift=require_redshift)
    seen = SeenIds()
    footprint = NorthOnly()
    ledger = Ledger()
    for start in range(0, max(len(table), 1), chunk_rows):
        sl = slice(start, start + chunk_rows)
        chunk = CatalogChunk("mem", start, ra=column("ra")[sl], dec=column("dec")[sl],
                             mag=column("mag")[sl], redshift=column("z")[sl], id=ids[sl],
                             id_missing=id_missing[sl])
        valid, rejected, notes = validate_chunk(chunk, rules, seen)
        ledger = ledger + Ledger.from_chunk(valid, rejected, notes,
                                            split_by_footprint(valid, footprint))
    ledger.check()
    assert ledger.rows_read == len(table)
    assert dict(ledger.rows_rejected) == expected
    assert ledger.notes.get(NOTE_RA_WRAPPED, 0) == wrapped
    assert ledger.notes.get(NOTE_ID_MISSING, 0) == missing_ids


@settings(max_examples=40, deadline=None)
@given(chunks=st.lists(st.lists(st.integers(-50, 50), max_size=40), max_size=12))
def test_seen_ids_keeps_exactly_the_first_occurrences(chunks):
    seen = SeenIds()
    reference = set()
    for values in chunks:
        ids = np.array(values, dtype=np.int64)
        expected = []
        for v in values:
            expected.append(v not in reference)
            reference.add(v)
        np.testing.assert_array_equal(seen.keep_first(ids), np.array(expected, dtype=bool))
    assert len(seen) == len(reference)
    assert seen.nbytes == 8 * len(reference)  # the documented 8 bytes per distinct id


# --------------------------------------------------------------------------------------------
# Ledger, footprint split, zero rows
# --------------------------------------------------------------------------------------------


def test_ledger_json_has_exactly_the_design_keys_and_round_trips():
    ledger = Ledger(10, 4, 3, {"mag_missing": 2, "dec_out_of_range": 1}, {NOTE_RA_WRAPPED: 1})
    data = json.loads(ledger.to_json())
    assert list(data) == ["rows_read", "rows_in_footprint", "rows_outside_footprint",
                          "rows_rejected", "notes"]
    assert list(data["rows_rejected"]) == list(REJECTION_REASONS)
    assert data["rows_rejected"]["mag_missing"] == 2
    assert data["rows_read"] == (data["rows_in_footprint"] + data["rows_outside_footprint"]
                                 + sum(data["rows_rejected"].values()))
    assert Ledger.from_dict(data).check().to_dict() == data
    with pytest.raises(InputError, match=r"`ledger` has unknown key 'rows_red'; "
                                         r"did you mean 'rows_read'\?"):
        Ledger.from_dict({**data, "rows_red": 1})


def test_ledgers_add_like_workers():
    a = Ledger(5, 2, 1, {"mag_missing": 2}, {NOTE_RA_WRAPPED: 1})
    b = Ledger(7, 3, 3, {"mag_missing": 1}, {NOTE_ID_MISSING: 4})
    c = Ledger(0)
    total = sum([a, b, c])
    assert total == a.merge(b) == a + b + c
    assert total.rows_read == 12 and total.rows_rejected == {"mag_missing": 3}
    assert total.notes == {NOTE_RA_WRAPPED: 1, NOTE_ID_MISSING: 4}
    total.check()
    assert "rows read" in total.summary()


def test_unbalanced_ledger_fails_check():
    with pytest.raises(LedgerError, match=r"rows_read=10 but in footprint 4 \+ outside 3 \+ "
                                          r"rejected 2 = 9"):
        Ledger(10, 4, 3, {"mag_missing": 2}).check()
    with pytest.raises(InputError, match=r"`rows_read` must be >= 0; got -1"):
        Ledger(rows_read=-1)
    with pytest.raises(InputTypeError, match=r"`rows_rejected\['x'\]` must be an integer"):
        Ledger(1, 0, 0, {"x": 1.5})


def test_split_by_footprint_with_stand_in_and_bad_footprints():
    chunk = CatalogChunk("mem", 0, ra=np.array([10.0, 20.0, 30.0]),
                         dec=np.array([-5.0, 5.0, 50.0]), mag=np.full(3, 20.0))
    valid, rejected, notes = validate_chunk(chunk, ValidationRules())
    np.testing.assert_array_equal(split_by_footprint(valid, NorthOnly()), [False, True, True])
    with pytest.raises(InputTypeError, match=r"`footprint` must have a contains\(ra_deg, "
                                             r"dec_deg\) method; got str"):
        split_by_footprint(valid, "north")

    class Broken:
        def contains(self, ra, dec):
            return np.ones(2)

    with pytest.raises(InputTypeError, match=r"must return a bool array of shape \(3,\); "
                                             r"got float64 of shape \(2,\)"):
        split_by_footprint(valid, Broken())
    with pytest.raises(InputError, match=r"`inside` must have one entry per kept row \(3\)"):
        Ledger.from_chunk(valid, rejected, notes, np.ones(4, dtype=bool))


def test_split_by_footprint_with_a_real_cap(tmp_path):
    footprint = pytest.importorskip("countscale.footprint")
    if not hasattr(footprint.Footprint, "cap"):
        pytest.skip("Footprint.cap not available yet")
    from astropy import units as u
    from astropy.coordinates import SkyCoord

    rng = np.random.default_rng(20)
    frame = clean_table(3000, rng=rng)
    frame["RA"] = rng.uniform(140, 160, 3000)
    frame["DEC"] = rng.uniform(-10, 10, 3000)
    path = write(frame, tmp_path / "cap.parquet")
    cap = footprint.Footprint.cap(150.0, 0.0, 5.0, max_order=12)
    kept, ledger = read_everything(source_for([path]), 500, footprint=cap)
    # Reference: astropy's angular separation; points within 0.01 deg of the edge are left
    # out of the comparison (the boundary is where a pixelised set may legitimately differ).
    sep = SkyCoord(kept["ra"] * u.deg, kept["dec"] * u.deg).separation(
        SkyCoord(150 * u.deg, 0 * u.deg)).deg
    clear = np.abs(sep - 5.0) > 0.01
    inside = cap.contains(kept["ra"], kept["dec"])
    np.testing.assert_array_equal(inside[clear], sep[clear] < 5.0)
    assert ledger.rows_in_footprint == int(np.count_nonzero(inside))
    assert ledger.rows_in_footprint == pytest.approx(np.count_nonzero(sep < 5.0), abs=3)


def test_require_rows_names_the_cut():
    require_rows(Ledger(3, 1, 0, {"mag_missing": 2}))  # fine: one row left
    with pytest.raises(InputError, match=r"no rows were read"):
        require_rows(Ledger())
    with pytest.raises(InputError, match=r"all 5 rows were rejected, mostly by `mag_missing` "
                                         r"\(`mag_missing` 4, `dec_out_of_range` 1\)"):
        require_rows(Ledger(5, 0, 0, {"mag_missing": 4, "dec_out_of_range": 1}))
    with pytest.raises(InputError, match=r"none of the 7 valid rows lies inside the footprint"):
        require_rows(Ledger(9, 0, 7, {"ra_out_of_range": 2}))
    with pytest.raises(LedgerError, match="does not balance"):
        require_rows(Ledger(9, 0, 7))


# --------------------------------------------------------------------------------------------
# Streaming: bounded memory, errors found far down a file
# --------------------------------------------------------------------------------------------


def peak_bytes_while_reading(source, chunk_rows):
    """Peak Python/numpy heap (tracemalloc) plus the most Arrow memory seen between chunks.

    Arrow buffers (Parquet columns, zero-copy into numpy) live in Arrow's own pool, which
    tracemalloc does not see; ``pyarrow.total_allocated_bytes`` does.
    """
    arrow_base = pa.total_allocated_bytes()
    arrow_peak = 0
    tracemalloc.start()
    try:
        n = 0
        for valid, _, _ in iter_valid_chunks(source, chunk_rows=chunk_rows):
            n += len(valid)
            arrow_peak = max(arrow_peak, pa.total_allocated_bytes() - arrow_base)
        return tracemalloc.get_traced_memory()[1] + arrow_peak, n
    finally:
        tracemalloc.stop()


@pytest.mark.parametrize("suffix", [".parquet", ".csv", ".fits"])
def test_memory_does_not_grow_with_catalogue_length(tmp_path, suffix):
    small = write(clean_table(10_000, rng=30), tmp_path / f"small{suffix}", 5_000)
    large = write(clean_table(100_000, rng=31), tmp_path / f"large{suffix}", 5_000)
    # Without ids nothing may grow with the row count. Holding the catalogue's four mapped
    # float64 columns would add 32 bytes per extra row (2.9 MB here); allow 0.3 MB of noise.
    peak_small, n_small = peak_bytes_while_reading(source_for([small], id=None), 2_000)
    peak_large, n_large = peak_bytes_while_reading(source_for([large], id=None), 2_000)
    assert (n_small, n_large) == (10_000, 100_000)
    assert peak_large - peak_small < 300_000
    # With ids, the duplicate registry grows by 8 bytes per distinct id plus a merge buffer
    # (documented in SeenIds: about 15 bytes per id at the peak); bound it at 24.
    peak_small_ids, _ = peak_bytes_while_reading(source_for([small]), 2_000)
    peak_large_ids, _ = peak_bytes_while_reading(source_for([large]), 2_000)
    assert peak_large_ids - peak_small_ids < 24 * (n_large - n_small) + 300_000


def test_text_far_down_a_csv_is_caught_with_file_column_row(tmp_path):
    frame = clean_table(5000, rng=32)
    frame["MAG_R"] = frame["MAG_R"].astype(object)
    frame.loc[4321, "MAG_R"] = "n.d."
    path = write(frame, tmp_path / "late.csv")
    source = source_for([path])
    source.check()  # the sample (first CSV_SAMPLE_ROWS rows) is clean
    assert 4321 > CSV_SAMPLE_ROWS
    chunks = source.iter_chunks(chunk_rows=1000)
    first = [next(chunks) for _ in range(4)]  # rows before the bad one stream out
    assert first[-1].row_offset == 3000
    with pytest.raises(InputError, match=r"^`mag` column 'MAG_R' in '.*late\.csv' must be "
                                         r"numeric; got 'n\.d\.' at data row 4322 "
                                         r"\(line 4323\)$"):
        next(chunks)


def test_text_far_down_an_integer_id_column(tmp_path):
    frame = clean_table(3000, rng=33)
    frame["OBJID"] = frame["OBJID"].astype(object)
    frame.loc[2500, "OBJID"] = "x17"
    path = write(frame, tmp_path / "ids.csv")
    with pytest.raises(InputError, match=r"`id` column 'OBJID' in '.*ids\.csv' holds integers "
                                         r"in its first rows but got 'x17' at data row 2501"):
        list(source_for([path]).iter_chunks(chunk_rows=700))
    frame.loc[2500, "OBJID"] = str(2**63)  # one more than the largest int64
    path = write(frame, tmp_path / "ids.csv")
    with pytest.raises(InputError, match=r"`id` column 'OBJID' in '.*ids\.csv' has an integer "
                                         r"outside the int64 range between data rows 2101 "
                                         r"and 2800"):
        list(source_for([path]).iter_chunks(chunk_rows=700))


# --------------------------------------------------------------------------------------------
# Bad input: each message pinned
# --------------------------------------------------------------------------------------------


def test_truncated_parquet(tmp_path):
    path = write(clean_table(500, rng=40), tmp_path / "cut.parquet")
    data = open(path, "rb").read()
    with open(path, "wb") as handle:
        handle.write(data[: len(data) // 2])
    with pytest.raises(InputError, match=r"^`paths`: '.*cut\.parquet' is not a readable "
                                         r"Parquet file \(Parquet magic bytes not found"):
        source_for([path]).check()


def test_csv_content_under_a_parquet_name(tmp_path):
    path = tmp_path / "fake.parquet"
    clean_table(5, rng=41).to_csv(path, index=False)
    with pytest.raises(InputError, match=r"'.*fake\.parquet' is not a readable Parquet file"):
        source_for([str(path)]).check()


def test_truncated_fits(tmp_path):
    path = write(clean_table(2000, rng=42), tmp_path / "cut.fits")
    size = os.path.getsize(path)
    with open(path, "r+b") as handle:
        handle.truncate(size - 10_000)
    with pytest.raises(InputError, match=r"^`paths`: '.*cut\.fits' is truncated: its table "
                                         r"needs \d+ bytes, the file has \d+$"):
        source_for([path]).check()


def test_garbage_fits(tmp_path):
    path = tmp_path / "junk.fits"
    path.write_bytes(b"this is not a FITS file at all" * 200)
    with pytest.raises(InputError, match=r"'.*junk\.fits' is not a readable FITS file"):
        source_for([str(path)]).check()


def test_fits_without_the_column(tmp_path):
    frame = clean_table(10, rng=43).rename(columns={"MAG_R": "MAG_G"})
    path = write(frame, tmp_path / "nomag.fits")
    with pytest.raises(InputError, match=r"^`mag` column 'MAG_R' not found in '.*nomag\.fits'; "
                                         r"did you mean 'MAG_G'\? Available: RA, DEC, MAG_G, "
                                         r"Z, OBJID, FLAGS$"):
        source_for([path]).check()


def test_missing_column_in_the_second_file_names_that_file(tmp_path):
    a = write(clean_table(10, rng=44), tmp_path / "a.parquet")
    b = write(clean_table(10, rng=45).drop(columns="Z"), tmp_path / "b.parquet")
    with pytest.raises(InputError, match=r"`redshift` column 'Z' not found in '.*b\.parquet'"):
        source_for([a, b]).check()


def test_csv_text_in_the_sampled_head(tmp_path):
    frame = clean_table(50, rng=46)
    frame["DEC"] = frame["DEC"].astype(object)
    frame.loc[2, "DEC"] = "12:30:00"
    path = write(frame, tmp_path / "sexa.csv")
    with pytest.raises(InputError, match=r"^`dec` column 'DEC' in '.*sexa\.csv' must be "
                                         r"numeric; got '12:30:00' at data row 3 \(line 4\)$"):
        source_for([path]).check()


def test_parquet_text_column(tmp_path):
    frame = clean_table(10, rng=47)
    frame["MAG_R"] = frame["MAG_R"].map(lambda m: f"{m:.2f}")
    path = write(frame, tmp_path / "textmag.parquet")
    with pytest.raises(InputError, match=r"`mag` column 'MAG_R' in '.*textmag\.parquet' must "
                                         r"be numeric; its type is text"):
        source_for([path]).check()


def test_fits_boolean_and_vector_columns_are_not_numeric(tmp_path):
    cols = [fits.Column(name="RA", format="D", array=np.zeros(3)),
            fits.Column(name="DEC", format="D", array=np.zeros(3)),
            fits.Column(name="MAG", format="E", array=np.ones(3)),
            fits.Column(name="MAG_APER", format="3E", array=np.ones((3, 3))),
            fits.Column(name="OK", format="L", array=np.array([True, False, True]))]
    path = str(tmp_path / "vec.fits")
    fits.BinTableHDU.from_columns(cols).writeto(path)
    with pytest.raises(InputError, match=r"`mag` column 'MAG_APER' in '.*vec\.fits' must be "
                                         r"numeric; its type is other"):
        CatalogSource(path, ra="RA", dec="DEC", mag="MAG_APER").check()
    with pytest.raises(InputError, match=r"`weight` column 'OK' in '.*vec\.fits' must be "
                                         r"numeric; its type is other"):
        CatalogSource(path, ra="RA", dec="DEC", mag="MAG", weight="OK").check()


def test_empty_files(tmp_path):
    zero_bytes = tmp_path / "nothing.csv"
    zero_bytes.write_bytes(b"")
    with pytest.raises(InputError, match=r"^`paths`: '.*nothing\.csv' is empty \(0 bytes\); "
                                         r"expected a csv file$"):
        source_for([str(zero_bytes)]).check()
    header_only = write(clean_table(0, rng=50), tmp_path / "header.csv")
    no_rows = write(clean_table(0, rng=50), tmp_path / "norows.parquet")
    with pytest.raises(InputError, match=r"^`paths`: the catalogue has no rows: 2 file\(s\) "
                                         r"with a header but zero rows, e.g. '.*header\.csv'$"):
        source_for([header_only, no_rows]).check()
    full = write(clean_table(5, rng=51), tmp_path / "full.parquet")
    with pytest.warns(CatalogWarning, match=r"2 catalogue file\(s\) have zero rows, "
                                            r"e.g. '.*norows\.parquet'"):
        _, ledger = read_everything(source_for([no_rows, full, header_only]), 3)
    assert ledger.rows_read == 5


def test_glob_matching_nothing(tmp_path):
    pattern = str(tmp_path / "tiles" / "*.parquet")
    with pytest.raises(InputError, match=r"^`paths` pattern '.*tiles/\*\.parquet' matches "
                                         r"no file$"):
        source_for([pattern])


def test_mixed_schemas(tmp_path):
    a = write(clean_table(10, rng=52), tmp_path / "a.parquet")
    frame = clean_table(10, rng=53)
    frame["OBJID"] = [f"s{i}" for i in range(10)]
    b = write(frame, tmp_path / "b.parquet")
    with pytest.raises(InputError, match=r"^files' schemas differ: `id` column 'OBJID' is text "
                                         r"in '.*b\.parquet' but integer in '.*a\.parquet'"):
        source_for([a, b]).check()
    # Unmapped columns that differ only warn: the mapped ones are all that is read.
    c = write(clean_table(10, rng=54).drop(columns="FLAGS"), tmp_path / "c.parquet")
    with pytest.warns(CatalogWarning, match=r"catalogue files have different columns: "
                                            r"'.*c\.parquet' lacks \['FLAGS'\]"):
        source_for([a, c]).check()


def test_unknown_extension(tmp_path):
    path = tmp_path / "cat.txt"
    path.write_text("ra,dec,mag\n1,2,3\n")
    with pytest.raises(InputError, match=r"^`paths`: cannot tell the format of '.*cat\.txt' "
                                         r"from its extension; expected one of \.parquet, "):
        source_for([str(path)]).check()


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match=r"^`paths`: file '.*absent\.fits' does not exist$"):
        source_for([str(tmp_path / "absent.fits")]).check()


def test_unreadable_file(tmp_path):
    path = write(clean_table(5, rng=55), tmp_path / "locked.parquet")
    os.chmod(path, 0)
    try:
        try:
            with open(path, "rb"):
                pytest.skip("running as a user who can read mode-000 files (root)")
        except PermissionError:
            pass
        with pytest.raises(InputError, match=r"^`paths`: cannot read '.*locked\.parquet' "
                                             r"\(Permission denied\)$"):
            source_for([path]).check()
    finally:
        os.chmod(path, 0o644)


def test_unreadable_file_simulated(tmp_path, monkeypatch):
    # Same path as above for runs as root, where mode 000 does not stop reading: the module's
    # open() raises what the operating system would.
    import countscale.catalog as catalog

    path = write(clean_table(5, rng=55), tmp_path / "locked.parquet")

    def denied(file, *args, **kwargs):
        raise PermissionError(13, "Permission denied", str(file))

    monkeypatch.setattr(catalog, "open", denied, raising=False)
    with pytest.raises(InputError, match=r"^`paths`: cannot read '.*locked\.parquet' "
                                         r"\(Permission denied\)$"):
        source_for([path]).check()


def test_corrupt_gzip_csv_part_way(tmp_path):
    path = tmp_path / "cut.csv.gz"
    raw = gzip.compress(clean_table(20_000, rng=56).to_csv(index=False).encode())
    path.write_bytes(raw[: len(raw) // 2])
    with pytest.raises(InputError, match=r"'.*cut\.csv\.gz' is not a readable CSV file"):
        list(source_for([str(path)]).iter_chunks(chunk_rows=1000))


@pytest.mark.parametrize(("kwargs", "error", "message"), [
    ({"population": "quasars"}, InputError,
     r"`population` must be one of galaxies, stars; got 'quasars'"),
    ({"sentinels": [99, float("nan")]}, InputError, r"`sentinels` must be finite .*got nan"),
    ({"sentinels": "99"}, InputTypeError, r"`sentinels` must be a list of numbers; got '99'"),
    ({"require_redshift": True, "redshift": None}, InputError,
     r"`require_redshift` is true but no `redshift` column is mapped"),
    ({"require_redshift": "yes"}, InputTypeError,
     r"`require_redshift` must be true or false; got 'yes'"),
    ({"mag_error": "MAG_R"}, InputError,
     r"`mag` and `mag_error` both map to column 'MAG_R'"),
    ({"ra": 3}, InputTypeError, r"`ra` must be a column name \(non-empty str\); got 3"),
])
def test_bad_source_arguments(tmp_path, kwargs, error, message):
    path = write(clean_table(3, rng=57), tmp_path / "a.parquet")
    with pytest.raises(error, match=message):
        source_for([path], **kwargs)


def test_bad_paths_arguments(tmp_path):
    path = write(clean_table(3, rng=58), tmp_path / "a.parquet")
    with pytest.raises(InputError, match=r"`paths`: '.*a\.parquet' is listed twice \(by "
                                         r"'.*\*\.parquet' and '.*a\.parquet'\)"):
        source_for([str(tmp_path / "*.parquet"), path])
    with pytest.raises(InputError, match=r"`paths` must name at least one file; got an empty"):
        source_for([])
    with pytest.raises(InputTypeError, match=r"`paths` must be a path, a glob or a list of "
                                             r"them; got int"):
        source_for(3)


@pytest.mark.parametrize(("chunk_rows", "error", "message"), [
    (0, InputError, r"`chunk_rows` must be >= 1; got 0"),
    (2.5, InputTypeError, r"`chunk_rows` must be an integer; got 2.5"),
    (True, InputTypeError, r"`chunk_rows` must be an integer; got True"),
])
def test_bad_chunk_rows(tmp_path, chunk_rows, error, message):
    path = write(clean_table(3, rng=59), tmp_path / "a.parquet")
    with pytest.raises(error, match=message):
        next(source_for([path]).iter_chunks(chunk_rows=chunk_rows))


def test_validate_chunk_needs_a_shared_registry_when_ids_are_present():
    chunk = CatalogChunk("mem", 0, ra=np.zeros(2), dec=np.zeros(2), mag=np.ones(2),
                         id=np.array([1, 1]))
    with pytest.raises(InputTypeError, match=r"`seen_ids` must be a SeenIds shared by every "
                                             r"chunk .*got NoneType"):
        validate_chunk(chunk, ValidationRules())
    with pytest.raises(InputTypeError, match=r"`rules` must be ValidationRules; got dict"):
        validate_chunk(chunk, {}, SeenIds())
    seen = SeenIds()
    seen.keep_first(np.array([1, 2]))
    with pytest.raises(InputError, match=r"`id` values changed kind between chunks"):
        seen.keep_first(np.array(["a"], dtype=object))


def test_no_stray_warnings_on_clean_input(tmp_path):
    paths = [write(clean_table(30, rng=60 + i, id_start=100 * i), tmp_path / f"t{i}{ext}")
             for i, ext in enumerate([".parquet", ".fits", ".csv"])]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        _, ledger = read_everything(source_for(paths), 8)
    assert ledger.rows_read == 90


# --------------------------------------------------------------------------------------------
# One file at a time: iter_file_chunks and check_chunk_rows
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("name", ["cat.parquet", "cat.fits", "cat.csv"])
def test_iter_file_chunks_reads_what_the_writer_wrote(tmp_path, name):
    frame = clean_table(700, rng=71)
    path = write(frame, tmp_path / name, row_group_size=128)
    info = source_for([path]).check().files[0]
    for use_threads in (True, False):
        chunks = list(iter_file_chunks(info, 100, use_threads=use_threads))
        assert [c.row_offset for c in chunks] == list(range(0, 700, 100))
        assert all(c.source == path for c in chunks)
        np.testing.assert_array_equal(np.concatenate([c.ra for c in chunks]), frame.RA)
        np.testing.assert_array_equal(np.concatenate([c.mag for c in chunks]), frame.MAG_R)
        np.testing.assert_array_equal(np.concatenate([c.id for c in chunks]), frame.OBJID)


def test_iter_file_chunks_reads_chosen_row_groups_at_their_file_rows(tmp_path):
    frame = clean_table(1000, rng=72)
    path = write(frame, tmp_path / "cat.parquet", row_group_size=100)  # 10 row groups
    info = source_for([path]).check().files[0]
    chunks = list(iter_file_chunks(info, 64, row_groups=[1, 2, 5, 9]))
    rows = np.concatenate([c.row_offset + np.arange(c.n_rows) for c in chunks])
    expected = np.r_[100:300, 500:600, 900:1000]
    np.testing.assert_array_equal(rows, expected)
    np.testing.assert_array_equal(np.concatenate([c.ra for c in chunks]), frame.RA[expected])
    np.testing.assert_array_equal(np.concatenate([c.id for c in chunks]), expected)
    # A chunk never joins row groups that are not neighbours (its rows would not be
    # consecutive in the file).
    for c in chunks:
        last = c.row_offset + c.n_rows - 1
        assert (c.row_offset < 300) == (last < 300) and (c.row_offset < 600) == (last < 600)
    assert list(iter_file_chunks(info, 64, row_groups=[])) == []


@pytest.mark.parametrize(("target", "kwargs", "error", "message"), [
    ("parquet", {"info": "cat.parquet"}, InputTypeError,
     r"^`info` must be a FileSummary \(from CatalogSource.check\(\)\); got str$"),
    ("parquet", {"chunk_rows": 0}, InputError, r"^`chunk_rows` must be >= 1; got 0$"),
    ("parquet", {"use_threads": "yes"}, InputTypeError,
     r"^`use_threads` must be true or false; got 'yes'$"),
    ("parquet", {"row_groups": "12"}, InputTypeError,
     r"^`row_groups` must be a sequence of integers; got '12'$"),
    ("parquet", {"row_groups": [1.5]}, InputTypeError,
     r"^`row_groups` must be a sequence of integers; got \[1.5\]$"),
    ("parquet", {"row_groups": [True]}, InputTypeError,
     r"^`row_groups` must be a sequence of integers; got \[True\]$"),
    ("parquet", {"row_groups": [2, 1]}, InputError,
     r"^`row_groups` must increase strictly; got \[2, 1\]$"),
    ("parquet", {"row_groups": [0, 0]}, InputError,
     r"^`row_groups` must increase strictly; got \[0, 0\]$"),
    ("fits", {"row_groups": [0]}, InputError,
     r"^`row_groups` applies to Parquet files only; '.*cat\.fits' is a fits file$"),
])
def test_iter_file_chunks_bad_arguments(tmp_path, target, kwargs, error, message):
    path = write(clean_table(50, rng=73), tmp_path / f"cat.{target}", row_group_size=10)
    arguments = {"info": source_for([path]).check().files[0], "chunk_rows": 10}
    arguments.update(kwargs)
    with pytest.raises(error, match=message):
        iter_file_chunks(**arguments)  # refused at the call, before any reading


def test_iter_file_chunks_row_group_the_file_does_not_have(tmp_path):
    path = write(clean_table(50, rng=74), tmp_path / "cat.parquet", row_group_size=10)
    chunks = iter_file_chunks(source_for([path]).check().files[0], 10, row_groups=[3, 5])
    with pytest.raises(InputError, match=r"^`row_groups` entries must be in \[0, 5\) for "
                                         r"'.*cat\.parquet' \(5 row groups\); got 5$"):
        next(chunks)


@pytest.mark.parametrize(("chunk_rows", "error", "message"), [
    (0, InputError, r"^`chunk_rows` must be >= 1; got 0$"),
    (-3, InputError, r"^`chunk_rows` must be >= 1; got -3$"),
    (2.5, InputTypeError, r"^`chunk_rows` must be an integer; got 2.5$"),
    ("10", InputTypeError, r"^`chunk_rows` must be an integer; got '10'$"),
    (True, InputTypeError, r"^`chunk_rows` must be an integer; got True$"),
])
def test_check_chunk_rows(chunk_rows, error, message):
    value = check_chunk_rows(np.int64(7))
    assert value == 7 and type(value) is int
    with pytest.raises(error, match=message):
        check_chunk_rows(chunk_rows)


# --------------------------------------------------------------------------------------------
# validate_chunk: copies, and the quick test's boundaries against the documented rules
# --------------------------------------------------------------------------------------------


def _columns_of(valid):
    return {k: getattr(valid, k) for k in ("row_in_file", "ra", "dec", "mag", "redshift", "id")
            if getattr(valid, k) is not None}


def test_validate_chunk_copy_false_shares_memory_only_when_every_row_is_kept():
    rng = np.random.default_rng(75)
    ra, dec, mag, z = (rng.uniform(0, 360, 50), rng.uniform(-80, 80, 50),
                       rng.uniform(18, 25, 50), rng.uniform(0, 2, 50))
    clean = CatalogChunk("mem", 10, ra=ra, dec=dec, mag=mag, redshift=z)
    copied, rejected, _ = validate_chunk(clean, ValidationRules())
    shared, rejected_shared, _ = validate_chunk(clean, ValidationRules(), copy=False)
    assert rejected == rejected_shared and sum(rejected.values()) == 0
    for name, values in _columns_of(copied).items():
        np.testing.assert_array_equal(values, _columns_of(shared)[name])
    for name in ("ra", "dec", "mag", "redshift"):
        assert not np.shares_memory(getattr(copied, name), getattr(clean, name)), name
        assert np.shares_memory(getattr(shared, name), getattr(clean, name)), name
    np.testing.assert_array_equal(shared.row_in_file, np.arange(10, 60))
    # One rejected row, or one RA to wrap: the kept rows are new arrays either way.
    for bad in ({"mag": np.r_[mag[:-1], 99.0]}, {"ra": np.r_[-5.0, ra[1:]]}):
        chunk = CatalogChunk("mem", 0, **{"ra": ra, "dec": dec, "mag": mag, **bad})
        a, ra_, na = validate_chunk(chunk, ValidationRules())
        b, rb, nb = validate_chunk(chunk, ValidationRules(), copy=False)
        assert (ra_, na) == (rb, nb)
        for name, values in _columns_of(a).items():
            np.testing.assert_array_equal(values, _columns_of(b)[name])
        assert not np.shares_memory(b.ra, chunk.ra)
    with pytest.raises(InputTypeError, match=r"^`copy` must be true or false; got 'no'$"):
        validate_chunk(clean, ValidationRules(), copy="no")


def documented_fate(ra, dec, mag, z, sentinels, require_redshift, mag_range=DEFAULT_MAG_RANGE):
    """Rejection reason (or None) and normalised RA of one row, from the module docstring's
    rules, in plain Python floats (IEEE double, as numpy's float64)."""
    if not (math.isfinite(ra) and math.isfinite(dec)):
        return "ra_dec_not_finite", ra
    if dec < -90.0 or dec > 90.0:
        return "dec_out_of_range", ra
    ra_norm = ra + 360.0 if -180.0 <= ra < 0.0 else ra
    if -180.0 <= ra < 0.0 and ra_norm >= 360.0:
        ra_norm = 0.0  # the documented "tiny negative RA is RA 0"
    if not 0.0 <= ra_norm < 360.0:
        return "ra_out_of_range", ra_norm
    if not math.isfinite(mag) or any(abs(mag - s) <= 1e-6 * abs(s) for s in sentinels):
        return "mag_missing", ra_norm
    if not mag_range[0] <= mag <= mag_range[1]:
        return "mag_implausible", ra_norm
    if z is not None and (z < 0.0 or (require_redshift and not math.isfinite(z))):
        return "redshift_invalid", ra_norm
    return None, ra_norm


def _around(x):
    return [x, float(np.nextafter(x, -np.inf)), float(np.nextafter(x, np.inf))]


# Values on and just either side of every boundary of the rules and of the quick test
# (|mag| < (1 - 3e-6) min |sentinel|, the plausible range), plus the special floats.
RA_EDGES = [*_around(0.0), -0.0, *_around(360.0), *_around(-180.0), -1e-14, 400.0, 123.4,
            math.nan, math.inf, -math.inf]
DEC_EDGES = [*_around(90.0), *_around(-90.0), 0.0, -0.0, 45.0, math.nan, -math.inf]
MAG_EDGES = [x for s in (99.0, -99.0, 99.99, 30.0) for k in (1.0, 2.0, 3.0, 4.0)
             for x in (*_around(s * (1 - k * 1e-6)), *_around(s * (1 + k * 1e-6)))] + [
    99.0, -99.0, 99.99, float(np.float32(99.99)), 20.0, 0.0, -0.0, math.nan, math.inf,
    *_around(DEFAULT_MAG_RANGE[0]), *_around(DEFAULT_MAG_RANGE[1]), *_around(-150.0),
    *_around(150.0), -999.0, 1e30, -1e30]

# Plausible ranges: the default, and one wide enough that the sentinels' tolerance edges
# decide alone.
MAG_RANGES = [DEFAULT_MAG_RANGE, (-150.0, 150.0)]
Z_EDGES = [*_around(0.0), -0.0, 1.0, math.nan, math.inf, -math.inf]


# ValidationRules takes any floats (CatalogSource refuses non-finite ones): an infinite
# sentinel flags every finite magnitude (|mag - inf| <= 1e-6 * inf), a NaN one none.
SENTINEL_SETS = [DEFAULT_SENTINELS, (30.0,), (), (0.0,), (99.0, 1e-300), (math.inf,),
                 (math.nan, 99.0)]


@pytest.mark.parametrize("mag_range", MAG_RANGES)
@pytest.mark.parametrize("sentinels", SENTINEL_SETS)
@pytest.mark.parametrize("require_redshift", [False, True])
@pytest.mark.parametrize("n_clean", [0, 2000])
def test_every_boundary_value_follows_the_documented_rules(sentinels, require_redshift,
                                                           n_clean, mag_range):
    # Each boundary value of one column, the other columns clean, all in one chunk; with
    # n_clean clean rows too, the rows the quick test does not clear are few and go through
    # the rules on their own (without, most rows are suspect and all take the rules).
    clean = (123.4, 45.0, 20.0, 1.0)
    rows = [tuple(v if i == k else clean[i] for i in range(4))
            for k, values in enumerate((RA_EDGES, DEC_EDGES, MAG_EDGES, Z_EDGES))
            for v in values] + [clean] * n_clean
    ra, dec, mag, z = (np.array(c, dtype=np.float64) for c in zip(*rows, strict=True))
    chunk = CatalogChunk("mem", 0, ra=ra, dec=dec, mag=mag, redshift=z)
    rules = ValidationRules(sentinels=sentinels, require_redshift=require_redshift,
                            mag_range=mag_range)
    fates = [documented_fate(*row, sentinels, require_redshift, mag_range) for row in rows]
    for copy in (True, False):
        valid, rejected, _ = validate_chunk(chunk, rules, copy=copy)
        kept = [i for i, (reason, _) in enumerate(fates) if reason is None]
        np.testing.assert_array_equal(valid.row_in_file, kept)
        assert valid.ra.tolist() == [fates[i][1] for i in kept]
        for reason in REJECTION_REASONS:
            assert rejected[reason] == sum(1 for r, _ in fates if r == reason), reason


@settings(max_examples=150, deadline=None)
@given(rows=st.lists(st.tuples(st.sampled_from(RA_EDGES), st.sampled_from(DEC_EDGES),
                               st.sampled_from(MAG_EDGES), st.sampled_from(Z_EDGES)),
                     min_size=1, max_size=60).map(lambda r: r + [(1.0, 2.0, 20.0, 0.5)] * 80),
       sentinels=st.sampled_from(SENTINEL_SETS), mag_range=st.sampled_from(MAG_RANGES),
       require_redshift=st.booleans(), with_z=st.booleans())
def test_mixed_boundary_rows_follow_the_documented_rules(rows, sentinels, require_redshift,
                                                         with_z, mag_range):
    require_redshift = require_redshift and with_z
    ra, dec, mag, z = (np.array(c, dtype=np.float64) for c in zip(*rows, strict=True))
    chunk = CatalogChunk("mem", 0, ra=ra, dec=dec, mag=mag, redshift=z if with_z else None)
    rules = ValidationRules(sentinels=sentinels, require_redshift=require_redshift,
                            mag_range=mag_range)
    fates = [documented_fate(*row[:3], row[3] if with_z else None, sentinels,
                             require_redshift, mag_range) for row in rows]
    expected = dict.fromkeys(REJECTION_REASONS, 0)
    for reason, _ in fates:
        if reason is not None:
            expected[reason] += 1
    kept_ra = [r for reason, r in fates if reason is None]
    n_wrapped = sum(1 for (reason, _), row in zip(fates, rows, strict=True)
                    if reason is None and row[0] < 0.0)
    for copy in (True, False):
        valid, rejected, notes = validate_chunk(chunk, rules, copy=copy)
        assert rejected == expected
        assert valid.ra.tolist() == kept_ra
        assert notes[NOTE_RA_WRAPPED] == n_wrapped


@settings(max_examples=60, deadline=None)
@given(chunks=st.lists(st.one_of(
    st.lists(st.integers(-10**12, 10**12), unique=True).map(sorted),  # increasing (usual)
    st.lists(st.integers(-10**12, 10**12), unique=True),              # distinct, any order
    st.lists(st.integers(-30, 30)),                                   # repeats in a chunk
), max_size=10))
def test_seen_ids_every_path_keeps_exactly_the_first_occurrences(chunks):
    seen, reference = SeenIds(), set()
    for values in chunks:
        expected = []
        for v in values:
            expected.append(v not in reference)
            reference.add(v)
        got = seen.keep_first(np.array(values, dtype=np.int64))
        np.testing.assert_array_equal(got, np.array(expected, dtype=bool))
    assert len(seen) == len(reference)
    assert seen.nbytes == 8 * len(reference)


@settings(max_examples=40, deadline=None)
@given(chunks=st.lists(st.one_of(
    st.lists(st.sampled_from([0.0, -0.0, 1.5, -2.25, 1e300, 7.0])),
    st.lists(st.text(alphabet="ab", max_size=3)),
), max_size=8), text=st.booleans())
def test_seen_ids_float_and_text_ids_keep_first_occurrences(chunks, text):
    # Float ids compare as numbers (-0.0 is 0.0); text ids as strings.
    chunks = [c for c in chunks if all(isinstance(v, str) == text for v in c)]
    seen, reference = SeenIds(), set()
    for values in chunks:
        expected = []
        for v in values:
            expected.append(v not in reference)
            reference.add(v)
        ids = np.array(values, dtype=object if text else np.float64)
        np.testing.assert_array_equal(seen.keep_first(ids), np.array(expected, dtype=bool))
    assert len(seen) == len(reference)


def test_implausible_magnitudes_are_a_named_rejection_with_a_configurable_range(tmp_path):
    # -999 and 1e30 are placeholders no sentinel list names; they are not magnitudes of any
    # object (the default range runs from brighter than the Sun to beyond the deepest images).
    frame = clean_table(12, rng=21)[["RA", "DEC", "MAG_R"]]
    frame.loc[[0, 1, 2, 3], "MAG_R"] = [-999.0, 1e30, -30.0, 40.0]
    path = write(frame, tmp_path / "c.parquet")
    _, ledger = read_everything(CatalogSource(path, ra="RA", dec="DEC", mag="MAG_R"), 5)
    assert ledger.rows_rejected["mag_implausible"] == 2   # the range's ends are plausible
    narrow = CatalogSource(path, ra="RA", dec="DEC", mag="MAG_R", mag_range=(-30.0, 39.0))
    _, ledger = read_everything(narrow, 5)
    assert ledger.rows_rejected["mag_implausible"] == 3
    assert ledger.to_dict()["rows_rejected"]["mag_implausible"] == 3
    with pytest.raises(InputError, match=r"^`mag_range` must be two finite magnitudes \[lo, hi\] "
                                         r"with lo < hi; got \[40, -30\]$"):
        CatalogSource(path, ra="RA", dec="DEC", mag="MAG_R", mag_range=(40.0, -30.0))
    with pytest.raises(InputTypeError, match=r"^`mag_range` must be two finite magnitudes .*; "
                                             r"got 'wide'$"):
        CatalogSource(path, ra="RA", dec="DEC", mag="MAG_R", mag_range="wide")
    with pytest.raises(InputError, match=r"^`mag_range` must be .*; got \[-30, inf\]$"):
        ValidationRules(mag_range=(-30.0, math.inf))
