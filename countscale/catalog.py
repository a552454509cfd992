"""Catalogue files in, validated chunks and a row ledger out.

A survey catalogue is one or many files (10^6–10^9 rows) with missing values and sentinel
magnitudes. This module reads them in chunks of bounded size, checks every row, and counts
every row exactly once: kept (then split by the caller into inside / outside the footprint)
or rejected with a named reason.

Topics
------
Sources
    :class:`CatalogSource` — the files (paths or globs) and the column mapping;
    :meth:`CatalogSource.from_config` builds one from a run file's ``[catalog]`` table.
Checking before reading
    :meth:`CatalogSource.check` — files exist, are readable, are really of their format, have
    the mapped columns (with a did-you-mean), those columns are numeric, and the files agree.
Reading
    :meth:`CatalogSource.iter_chunks` yields :class:`CatalogChunk` objects: plain numpy arrays
    per logical column (``ra``, ``dec``, ``mag``, ...), the file name and the row offset.
    :func:`iter_file_chunks` reads one checked file, or some row groups of a Parquet file
    (for engines that share files out among workers); :func:`check_chunk_rows` is the chunk
    size check every reader applies.
Validation
    :func:`validate_chunk` with :class:`ValidationRules` and, when ids are mapped, a
    :class:`SeenIds` registry; :func:`iter_valid_chunks` does both for a whole source.
Ledger
    :class:`Ledger` — rows read, in / outside the footprint, rejected per reason, notes;
    mergeable across workers, JSON as ``results.json`` holds it (see docs/reference.md).
    :func:`split_by_footprint` gives the
    inside mask; :func:`require_rows` fails clearly when no row is left.

Formats
-------
Told apart by the file name's extension:

=================  ===============================================================
``.parquet .pq``   ``pyarrow.parquet.ParquetFile.iter_batches`` with column projection;
                   memory is bounded by one row group of the mapped columns. Page
                   checksums (CRC), where the file has them, are verified.
``.fits .fit``     first table extension, memory-mapped, read in row slices.
``.fits.gz``       as above, but a gzipped FITS file cannot be memory-mapped: astropy
``.fit.gz``        decompresses it into memory, so memory grows with that file's size.
``.csv .csv.gz``   ``pandas.read_csv(chunksize=...)``, comma-separated with one header line.
=================  ===============================================================

Rejection reasons (first failing rule wins, in this order)
----------------------------------------------------------
1. ``ra_dec_not_finite`` — RA or Dec is NaN or infinite.
2. ``dec_out_of_range`` — Dec outside [−90, 90] degrees.
3. ``ra_out_of_range`` — RA outside [0, 360) degrees after normalising the common [−180, 180)
   convention: RA in [−180, 0) gets +360, is kept, and is counted in the note
   ``ra_wrapped_from_negative``.
4. ``mag_missing`` — magnitude NaN, infinite, or equal to a sentinel (default 99, −99, 99.99).
5. ``mag_implausible`` — a finite magnitude outside the plausible range ``mag_range`` (default
   [−30, 40] AB; see :data:`DEFAULT_MAG_RANGE`): a placeholder such as −999 or 1e30 that is
   not in the sentinel list, or a unit mix-up. Such a row would otherwise land in a count bin
   or, worse, in the photometric-scatter relation.
6. ``redshift_invalid`` — redshift negative, or missing (NaN / inf) when ``require_redshift``.
7. ``duplicate_id`` — (only with an ``id`` column) the id of an earlier *kept* row, in this or
   any earlier chunk or file. Duplicates are looked for only among rows that passed rules 1–6,
   so a bad first measurement of a source does not throw away a good later one.

Rows whose id is missing are kept (they cannot be matched) and counted in the note
``id_missing``.

Examples
--------
>>> source = CatalogSource(["tiles/*.parquet"], ra="RA", dec="DEC", mag="MAG_R")  # doctest: +SKIP
>>> ledger = Ledger()                                                           # doctest: +SKIP
>>> for valid, rejected, notes in iter_valid_chunks(source, chunk_rows=1_000_000):  # doctest: +SKIP
...     inside = split_by_footprint(valid, footprint)
...     ledger = ledger + Ledger.from_chunk(valid, rejected, notes, inside)
>>> ledger.check(); require_rows(ledger)                                         # doctest: +SKIP
"""

from __future__ import annotations

import difflib
import glob
import itertools
import json
import os
import re
import warnings
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
from astropy.io import fits

from countscale.errors import InputError, InputTypeError

__all__ = [
    "DEFAULT_MAG_RANGE",
    "DEFAULT_SENTINELS",
    "LOGICAL_COLUMNS",
    "NOTE_ID_MISSING",
    "NOTE_RA_WRAPPED",
    "REJECTION_REASONS",
    "CatalogChunk",
    "CatalogSource",
    "CatalogSummary",
    "CatalogWarning",
    "FileSummary",
    "Ledger",
    "LedgerError",
    "SeenIds",
    "ValidChunk",
    "ValidationRules",
    "check_chunk_rows",
    "iter_file_chunks",
    "iter_valid_chunks",
    "require_rows",
    "split_by_footprint",
    "validate_chunk",
]

# --------------------------------------------------------------------------------------------
# Names
# --------------------------------------------------------------------------------------------

#: Logical columns, required ones first. ``id`` may be integer, float or text; the others
#: must be numeric.
REQUIRED_COLUMNS = ("ra", "dec", "mag")
OPTIONAL_COLUMNS = ("redshift", "mag_error", "stellar_mass", "id", "weight", "classifier",
                    "redshift_error")
LOGICAL_COLUMNS = REQUIRED_COLUMNS + OPTIONAL_COLUMNS

#: Rejection reasons in precedence order (the first failing rule wins).
REJECTION_REASONS = (
    "ra_dec_not_finite",
    "dec_out_of_range",
    "ra_out_of_range",
    "mag_missing",
    "mag_implausible",
    "redshift_invalid",
    "duplicate_id",
)
NOTE_RA_WRAPPED = "ra_wrapped_from_negative"
NOTE_ID_MISSING = "id_missing"

#: Magnitudes that mean "no measurement" in many photometric catalogues, besides NaN.
#: Common figure, no source (conventional placeholder values, not a standard).
DEFAULT_SENTINELS = (99.0, -99.0, 99.99)

#: Plausible AB magnitudes: rows outside are rejected as ``mag_implausible``. Wide on purpose:
#: from brighter than the Sun (V = -26.7; common figure, no source) to well beyond the deepest
#: images taken (about 30-31 AB; common figure, no source). A choice of this project.
DEFAULT_MAG_RANGE = (-30.0, 40.0)

#: Relative tolerance when matching a sentinel: 99.99 stored as float32 reads back as
#: 99.98999786 in float64 (float32 has a 2**-24 ≈ 6e-8 relative step), so exact equality would
#: miss it; 1e-6 is 16 float32 steps and far below any real magnitude difference.
_SENTINEL_RTOL = 1e-6

#: CSV rows read by ``check()`` to infer the column kinds. Text further down is caught while
#: reading, with the same one-line message.
CSV_SAMPLE_ROWS = 1000

POPULATIONS = ("galaxies", "stars")

#: A source is a star when its classifier value (probability of being a star) is at least this.
#: Choice of this project: the value at which both classes are equally likely.
DEFAULT_CLASSIFIER_THRESHOLD = 0.5

_FORMAT_SUFFIXES = (
    (".parquet", "parquet"),
    (".pq", "parquet"),
    (".fits.gz", "fits"),
    (".fit.gz", "fits"),
    (".fits", "fits"),
    (".fit", "fits"),
    (".csv.gz", "csv"),
    (".csv", "csv"),
)
_KNOWN_SUFFIXES = ", ".join(s for s, _ in _FORMAT_SUFFIXES)

_INT_TEXT = re.compile(r"\s*[+-]?\d+\s*")

# Column kinds. Numeric logical columns need "integer" or "float"; ``id`` may also be "text".
_NUMBER_KINDS = ("integer", "float")


class CatalogWarning(UserWarning):
    """A catalogue is readable but something deserves a look (empty file, extra columns)."""


class LedgerError(RuntimeError):
    """The ledger does not balance: rows were lost or counted twice (a bug, not bad input)."""


# --------------------------------------------------------------------------------------------
# Small helpers
# --------------------------------------------------------------------------------------------


def _format_of(path: Path) -> str:
    name = path.name.lower()
    for suffix, fmt in _FORMAT_SUFFIXES:
        if name.endswith(suffix):
            return fmt
    raise InputError(
        f"`paths`: cannot tell the format of '{path}' from its extension; "
        f"expected one of {_KNOWN_SUFFIXES}"
    )


def _did_you_mean(name: str, available: Sequence[str]) -> str:
    folded = {a.casefold(): a for a in available}
    if name.casefold() in folded:
        return f"; did you mean '{folded[name.casefold()]}'?"
    close = difflib.get_close_matches(name, list(available), n=1, cutoff=0.6)
    return f"; did you mean '{close[0]}'?" if close else ""


def _list_columns(available: Sequence[str], limit: int = 20) -> str:
    shown = ", ".join(available[:limit])
    if len(available) > limit:
        shown += f", ... ({len(available) - limit} more)"
    return shown


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip() or type(exc).__name__
    return text.splitlines()[0]


def _mag_range_iv(mag_range: Any) -> tuple[float, float]:
    """``mag_range`` as two increasing finite floats, or a one-line error."""
    rule = "`mag_range` must be two finite magnitudes [lo, hi] with lo < hi"
    if isinstance(mag_range, str | bytes) or not isinstance(mag_range, Sequence):
        raise InputTypeError(f"{rule}; got {mag_range!r}")
    if len(mag_range) != 2 or any(isinstance(v, bool) or not isinstance(v, int | float | np.number)
                                  for v in mag_range):
        raise InputTypeError(f"{rule}; got {mag_range!r}")
    lo, hi = float(mag_range[0]), float(mag_range[1])
    if not (np.isfinite(lo) and np.isfinite(hi) and lo < hi):
        raise InputError(f"{rule}; got [{lo:g}, {hi:g}]")
    return (lo, hi)


def check_chunk_rows(chunk_rows: Any) -> int:
    """``chunk_rows`` as an int, or a one-line error (integer >= 1 required).

    For readers of a catalogue outside this module (the tally's engines), so every entry
    point refuses a bad chunk size with the same message.
    """
    if isinstance(chunk_rows, bool) or not isinstance(chunk_rows, int | np.integer):
        raise InputTypeError(f"`chunk_rows` must be an integer; got {chunk_rows!r}")
    if chunk_rows < 1:
        raise InputError(f"`chunk_rows` must be >= 1; got {chunk_rows}")
    return int(chunk_rows)


# --------------------------------------------------------------------------------------------
# Per-format readers (private): open + schema, and chunked reading of mapped columns
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class FileSummary:
    """What ``check()`` learnt about one file without reading its rows.

    Attributes
    ----------
    path : str
    format : str
        ``"parquet"``, ``"fits"`` or ``"csv"``.
    n_rows : int or None
        Row count from the file's metadata; for CSV only known when the file is shorter than
        the sample (``CSV_SAMPLE_ROWS``), else None.
    columns : tuple of (str, str)
        Every column of the file and its kind (``integer``, ``float``, ``text``, ``other``;
        ``unknown`` for a CSV file with a header and no rows).
    mapping : tuple of (str, str)
        Logical column → the file's column name (FITS names match case-insensitively).
    """

    path: str
    format: str
    n_rows: int | None
    columns: tuple[tuple[str, str], ...]
    mapping: tuple[tuple[str, str], ...]

    def kind_of(self, logical: str) -> str:
        """Kind of the file column mapped to ``logical``."""
        name = dict(self.mapping)[logical]
        return dict(self.columns)[name]


@dataclass(frozen=True)
class CatalogSummary:
    """Result of :meth:`CatalogSource.check`: one :class:`FileSummary` per file.

    ``n_rows_known`` is the sum of the known row counts (None if any file's count is unknown,
    as for long CSV files); a progress bar can use it as its total.
    """

    files: tuple[FileSummary, ...]

    @property
    def n_rows_known(self) -> int | None:
        counts = [f.n_rows for f in self.files]
        return None if any(c is None for c in counts) else int(sum(counts))


def _arrow_kind(dtype: pa.DataType) -> str:
    if pa.types.is_dictionary(dtype):
        return _arrow_kind(dtype.value_type)
    if pa.types.is_integer(dtype):
        return "integer"
    if pa.types.is_floating(dtype) or pa.types.is_decimal(dtype) or pa.types.is_null(dtype):
        # An all-null column is written with the null type; it reads back as all-NaN.
        return "float"
    if pa.types.is_string(dtype) or pa.types.is_large_string(dtype):
        return "text"
    return "other"


def _fits_kind(hdu: Any, col: Any) -> str:
    if isinstance(hdu, fits.BinTableHDU):
        letter = col.format.format
        if col.format.repeat != 1 and letter != "A":
            return "other"  # array (vector) column: one row holds several values
        return {"B": "integer", "I": "integer", "J": "integer", "K": "integer",
                "E": "float", "D": "float", "A": "text"}.get(letter, "other")
    letter = str(col.format)[:1].upper()  # ASCII table: Aw, Iw, Fw.d, Ew.d, Dw.d
    return {"I": "integer", "F": "float", "E": "float", "D": "float", "A": "text"}.get(
        letter, "other")


def _numpy_kind(dtype: Any) -> str:
    if pd.api.types.is_bool_dtype(dtype):
        return "other"
    if pd.api.types.is_integer_dtype(dtype):
        return "integer"
    if pd.api.types.is_float_dtype(dtype):
        return "float"
    if pd.api.types.is_string_dtype(dtype) or pd.api.types.is_object_dtype(dtype):
        return "text"
    return "other"


def _open_parquet(path: Path) -> tuple[int, dict[str, str]]:
    try:
        pf = pq.ParquetFile(path)
    except (pa.ArrowException, OSError) as exc:
        raise InputError(
            f"`paths`: '{path}' is not a readable Parquet file ({_first_line(exc)})"
        ) from exc
    try:
        schema = pf.schema_arrow
        return pf.metadata.num_rows, {f.name: _arrow_kind(f.type) for f in schema}
    finally:
        pf.close()


def _fits_table(hdul: Any, path: Path) -> Any:
    for hdu in hdul[1:]:
        if isinstance(hdu, fits.BinTableHDU | fits.TableHDU):
            return hdu
    raise InputError(f"`paths`: '{path}' has no table extension (a FITS table is expected)")


def _open_fits(path: Path) -> tuple[int, dict[str, str]]:
    gz = path.name.lower().endswith(".gz")
    try:
        with warnings.catch_warnings():
            # astropy warns about a short file; the InputError below says it in one line.
            warnings.filterwarnings("ignore", message="File may have been truncated")
            with fits.open(path, memmap=not gz) as hdul:
                hdu = _fits_table(hdul, path)
                header = hdu.header
                n_rows = int(header["NAXIS2"])
                columns = {c.name: _fits_kind(hdu, c) for c in hdu.columns}
                # Where the table's bytes end (data + heap), from the headers alone.
                data_end = (hdu.fileinfo()["datLoc"] + int(header["NAXIS1"]) * n_rows
                            + int(header.get("PCOUNT", 0)))
    except InputError:
        raise
    except (OSError, ValueError, KeyError, IndexError, fits.VerifyError) as exc:
        raise InputError(
            f"`paths`: '{path}' is not a readable FITS file ({_first_line(exc)})"
        ) from exc
    # A truncated file opens fine (its headers are intact) and fails only when rows are
    # read; compare the declared size with the bytes on disk now. (A gzipped file's size on
    # disk says nothing; astropy's decompression fails on a truncated one while reading.)
    size = path.stat().st_size
    if not gz and data_end > size:
        raise InputError(
            f"`paths`: '{path}' is truncated: its table needs {data_end} bytes, "
            f"the file has {size}"
        )
    return n_rows, columns


def _csv_error(path: Path, exc: BaseException) -> InputError:
    return InputError(f"`paths`: '{path}' is not a readable CSV file ({_first_line(exc)})")


_CSV_ERRORS = (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError,
               OSError, EOFError)


def _read_csv_sample(path: Path) -> pd.DataFrame:
    try:
        return pd.read_csv(path, nrows=CSV_SAMPLE_ROWS, low_memory=False)
    except _CSV_ERRORS as exc:
        raise _csv_error(path, exc) from exc


# --------------------------------------------------------------------------------------------
# Conversions to plain numpy, one logical column at a time
# --------------------------------------------------------------------------------------------


def _not_numeric(logical: str, column: str, path: Path, value: Any, row: int | None,
                 csv: bool) -> InputError:
    where = ""
    if row is not None:
        where = f" at data row {row}" + (f" (line {row + 1})" if csv else "")
    return InputError(
        f"`{logical}` column '{column}' in '{path}' must be numeric; got {value!r}{where}"
    )


def _series_to_float(series: pd.Series, logical: str, column: str, path: Path,
                     row_offset: int) -> np.ndarray:
    """A CSV column (as pandas read it) → float64, or a one-line error at the first bad cell."""
    if pd.api.types.is_bool_dtype(series.dtype):
        raise _not_numeric(logical, column, path, bool(series.iloc[0]), row_offset + 1, True)
    if pd.api.types.is_numeric_dtype(series.dtype):
        # copy=True: a view would keep pandas' whole block (every column of the chunk) alive
        # for as long as the caller holds this one array.
        return series.to_numpy(dtype=np.float64, na_value=np.nan, copy=True)
    coerced = pd.to_numeric(series, errors="coerce")
    bad = np.flatnonzero(series.notna().to_numpy() & coerced.isna().to_numpy())
    if bad.size:
        i = int(bad[0])
        raise _not_numeric(logical, column, path, series.iloc[i], row_offset + i + 1, True)
    return coerced.to_numpy(dtype=np.float64, na_value=np.nan)


def _series_to_id(series: pd.Series, kind: str, column: str, path: Path,
                  row_offset: int) -> tuple[np.ndarray, np.ndarray]:
    """A CSV id column read as text → (ids, missing mask) of the file's id kind."""
    missing = series.isna().to_numpy()
    if kind == "text":
        values = series.to_numpy(dtype=object)
        values[missing] = None
        return values, missing
    if kind == "float":
        return _series_to_float(series, "id", column, path, row_offset), missing
    present = series[~missing]
    ids = np.zeros(len(series), dtype=np.int64)
    try:
        # numpy parses decimal integer text exactly (no detour through float64, which would
        # merge ids above 2**53) and refuses anything else.
        ids[~missing] = present.to_numpy(dtype=str).astype(np.int64)
    except (ValueError, OverflowError) as exc:
        ok = present.str.fullmatch(_INT_TEXT.pattern).to_numpy(dtype=bool)
        if ok.all():
            raise InputError(
                f"`id` column '{column}' in '{path}' has an integer outside the int64 range "
                f"between data rows {row_offset + 1} and {row_offset + len(series)}"
            ) from exc
        i = int(np.flatnonzero(~missing)[np.flatnonzero(~ok)[0]])
        raise InputError(
            f"`id` column '{column}' in '{path}' holds integers in its first rows but got "
            f"{series.iloc[i]!r} at data row {row_offset + i + 1} (line {row_offset + i + 2})"
        ) from exc
    return ids, missing


def _arrow_to_float(array: pa.Array) -> np.ndarray:
    if pa.types.is_dictionary(array.type):
        array = array.dictionary_decode()
    # safe=False: int64 ids above 2**53 lose their last bits as floats, which is fine for
    # coordinates and magnitudes (ids never go through here).
    return array.cast(pa.float64(), safe=False).to_numpy(zero_copy_only=False)


def _int_ids(values: np.ndarray, copy: bool = True) -> np.ndarray:
    # Unsigned 64-bit ids above 2**63 do not fit int64; viewing the bits keeps every id
    # distinct, which is all duplicate detection needs.
    if values.dtype == np.uint64:
        ids = values.view(np.int64)
        return ids.copy() if copy else ids
    return values.astype(np.int64, copy=copy)


def _arrow_to_id(array: pa.Array, kind: str) -> tuple[np.ndarray, np.ndarray]:
    if pa.types.is_dictionary(array.type):
        array = array.dictionary_decode()
    if kind == "integer" and array.null_count == 0:
        # No nulls: Arrow's buffer as it is (a read-only view, like the float columns).
        return (_int_ids(array.to_numpy(zero_copy_only=False), copy=False),
                np.zeros(len(array), dtype=bool))
    missing = array.is_null().to_numpy(zero_copy_only=False)
    if kind == "integer":
        return _int_ids(array.fill_null(0).to_numpy(zero_copy_only=False)), missing
    if kind == "float":
        values = _arrow_to_float(array)
        return values, missing | np.isnan(values)
    return np.asarray(array.to_numpy(zero_copy_only=False), dtype=object), missing


def _fits_to_id(values: np.ndarray, kind: str, null: Any) -> tuple[np.ndarray, np.ndarray]:
    if kind == "integer":
        ids = _int_ids(np.asarray(values))
        missing = ids == int(null) if null is not None else np.zeros(len(ids), dtype=bool)
        return ids, missing
    if kind == "float":
        ids = np.asarray(values, dtype=np.float64).copy()
        return ids, np.isnan(ids)
    text = np.char.strip(np.asarray(values).astype(str)).astype(object)
    missing = text == ""
    text[missing] = None
    return text, missing


# --------------------------------------------------------------------------------------------
# Chunks
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class CatalogChunk:
    """A slice of consecutive rows of one file, as plain numpy arrays per logical column.

    Attributes
    ----------
    source : str
        The file the rows come from.
    row_offset : int
        0-based position in that file of the chunk's first row.
    ra, dec : float64 ndarray, shape (n,)
        Degrees, as stored (not yet validated or normalised).
    mag : float64 ndarray, shape (n,)
        AB magnitudes as stored; sentinels not yet removed.
    redshift, mag_error, stellar_mass, weight : float64 ndarray, shape (n,), or None
        None when the column is not mapped. ``stellar_mass`` is in the file's own unit.
    classifier : float64 ndarray, shape (n,), or None
        Star/galaxy classifier (probability of being a star, or a 0/1 flag), as stored.
    redshift_error : float64 ndarray, shape (n,), or None
        The 1-sigma error of a (photometric) redshift.
    id : ndarray, shape (n,), or None
        int64, float64 or object (str) ids; None when no id column is mapped.
    id_missing : bool ndarray, shape (n,), or None
        True where the id is null.

    Notes
    -----
    Arrays from Parquet may be read-only views of Arrow's buffers (no copy is made); copy one
    before changing it in place.
    """

    source: str
    row_offset: int
    ra: np.ndarray
    dec: np.ndarray
    mag: np.ndarray
    redshift: np.ndarray | None = None
    mag_error: np.ndarray | None = None
    stellar_mass: np.ndarray | None = None
    id: np.ndarray | None = None
    id_missing: np.ndarray | None = None
    weight: np.ndarray | None = None
    classifier: np.ndarray | None = None
    redshift_error: np.ndarray | None = None

    def __post_init__(self) -> None:
        n = np.shape(self.ra)[0] if np.ndim(self.ra) == 1 else None
        for name in (*LOGICAL_COLUMNS, "id_missing"):
            values = getattr(self, name)
            if values is not None and (np.ndim(values) != 1 or np.shape(values)[0] != n):
                raise InputError(
                    f"`CatalogChunk.{name}` must be 1-d with as many rows as `ra` ({n}); "
                    f"got shape {np.shape(values)}"
                )

    @property
    def n_rows(self) -> int:
        return int(self.ra.shape[0])

    def __len__(self) -> int:
        return self.n_rows

    def __repr__(self) -> str:
        mapped = [c for c in LOGICAL_COLUMNS if getattr(self, c) is not None]
        return (f"CatalogChunk(source={self.source!r}, row_offset={self.row_offset}, "
                f"n_rows={self.n_rows}, columns={mapped})")


@dataclass(frozen=True, eq=False)
class ValidChunk:
    """The kept rows of a :class:`CatalogChunk`.

    Same columns as the chunk, restricted to kept rows, with ``ra`` normalised to [0, 360)
    degrees; ``row_in_file`` (int64, shape (n,)) gives each kept row's 0-based position in
    ``source``.
    """

    source: str
    row_in_file: np.ndarray
    ra: np.ndarray
    dec: np.ndarray
    mag: np.ndarray
    redshift: np.ndarray | None = None
    mag_error: np.ndarray | None = None
    stellar_mass: np.ndarray | None = None
    id: np.ndarray | None = None
    weight: np.ndarray | None = None
    classifier: np.ndarray | None = None
    redshift_error: np.ndarray | None = None

    @property
    def n_rows(self) -> int:
        return int(self.ra.shape[0])

    def __len__(self) -> int:
        return self.n_rows

    def __repr__(self) -> str:
        return f"ValidChunk(source={self.source!r}, n_rows={self.n_rows})"


# --------------------------------------------------------------------------------------------
# The source
# --------------------------------------------------------------------------------------------


def _expand_paths(paths: Any) -> tuple[tuple[str, ...], tuple[Path, ...]]:
    if isinstance(paths, str | os.PathLike):
        patterns = [paths]
    elif isinstance(paths, Sequence) and not isinstance(paths, bytes):
        patterns = list(paths)
    else:
        raise InputTypeError(
            f"`paths` must be a path, a glob or a list of them; got {type(paths).__name__}"
        )
    if not patterns:
        raise InputError("`paths` must name at least one file; got an empty list")
    files: list[Path] = []
    where: dict[Path, str] = {}
    for pattern in patterns:
        if not isinstance(pattern, str | os.PathLike):
            raise InputTypeError(f"`paths` entries must be paths or globs; got {pattern!r}")
        text = os.fspath(pattern)
        if glob.has_magic(text):
            matched = [Path(p) for p in sorted(glob.glob(text, recursive=True))]
            if not matched:
                raise InputError(f"`paths` pattern '{text}' matches no file")
        else:
            matched = [Path(text)]
        for path in matched:
            key = Path(os.path.abspath(path))
            if key in where:
                raise InputError(
                    f"`paths`: '{path}' is listed twice (by '{where[key]}' and '{text}'); "
                    "its rows would be counted twice"
                )
            where[key] = text
            files.append(path)
    return tuple(os.fspath(p) for p in patterns), tuple(files)


@dataclass(frozen=True)
class CatalogSource:
    """Catalogue files and the mapping from logical columns to the files' column names.

    Parameters
    ----------
    paths : path, glob, or sequence of them
        Files to read, in order. Globs are expanded (sorted; ``**`` recurses) at construction;
        a glob matching nothing is an error. Plain paths are checked by :meth:`check`.
    ra, dec, mag : str
        Names of the right ascension (deg), declination (deg) and magnitude (AB) columns.
    redshift, mag_error, stellar_mass, id, weight : str, optional
        Optional columns. With ``id``, later rows repeating a kept id are rejected as
        ``duplicate_id``.
    classifier : str, optional
        Star/galaxy classifier column: the probability that a source is a star (a 0/1 flag
        works too), in [0, 1]; NaN for unclassified. The tally keeps the sources of the
        catalogue's ``population`` (see :func:`countscale.tally.tally`).
    classifier_threshold : float, optional
        A source is a star when its classifier is >= this value, in (0, 1]; default 0.5.
    redshift_error : str, optional
        1-sigma errors of photometric redshifts (the luminosity-function fit convolves its
        model with them).
    population : {"galaxies", "stars"}
    sentinels : sequence of float
        Magnitudes meaning "no measurement", besides NaN/inf. Default ``DEFAULT_SENTINELS``.
    require_redshift : bool
        Reject rows without a finite redshift (needs a ``redshift`` column).
    mag_range : (float, float)
        Plausible magnitudes ``[lo, hi]`` (AB, inclusive); finite magnitudes outside are
        rejected as ``mag_implausible``. Default ``DEFAULT_MAG_RANGE``.

    Attributes
    ----------
    files : tuple of pathlib.Path
        The expanded file list.
    """

    paths: tuple[str, ...] | Sequence[Any] | str | os.PathLike
    ra: str
    dec: str
    mag: str
    redshift: str | None = None
    mag_error: str | None = None
    stellar_mass: str | None = None
    id: str | None = None
    weight: str | None = None
    classifier: str | None = None
    population: str = "galaxies"
    sentinels: tuple[float, ...] = DEFAULT_SENTINELS
    require_redshift: bool = False
    mag_range: tuple[float, float] = DEFAULT_MAG_RANGE
    classifier_threshold: float | None = None
    redshift_error: str | None = None
    files: tuple[Path, ...] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        patterns, files = _expand_paths(self.paths)
        object.__setattr__(self, "paths", patterns)
        object.__setattr__(self, "files", files)
        used: dict[str, str] = {}
        for logical in LOGICAL_COLUMNS:
            name = getattr(self, logical)
            if name is None and logical not in REQUIRED_COLUMNS:
                continue
            if not isinstance(name, str) or not name:
                raise InputTypeError(
                    f"`{logical}` must be a column name (non-empty str); got {name!r}"
                )
            if name in used:
                raise InputError(
                    f"`{used[name]}` and `{logical}` both map to column '{name}'; "
                    "each logical column needs its own file column"
                )
            used[name] = logical
        if self.population not in POPULATIONS:
            raise InputError(
                f"`population` must be one of {', '.join(POPULATIONS)}; got {self.population!r}"
            )
        if isinstance(self.sentinels, str | bytes) or not isinstance(self.sentinels, Sequence):
            raise InputTypeError(
                f"`sentinels` must be a list of numbers; got {self.sentinels!r}"
            )
        values = []
        for s in self.sentinels:
            if isinstance(s, bool) or not isinstance(s, int | float | np.number):
                raise InputTypeError(f"`sentinels` must hold numbers; got {s!r}")
            if not np.isfinite(s):
                raise InputError(
                    f"`sentinels` must be finite (NaN and inf are always missing); got {s!r}"
                )
            values.append(float(s))
        object.__setattr__(self, "sentinels", tuple(values))
        if not isinstance(self.require_redshift, bool):
            raise InputTypeError(
                f"`require_redshift` must be true or false; got {self.require_redshift!r}"
            )
        if self.require_redshift and self.redshift is None:
            raise InputError(
                "`require_redshift` is true but no `redshift` column is mapped"
            )
        object.__setattr__(self, "mag_range", _mag_range_iv(self.mag_range))
        threshold = self.classifier_threshold
        if threshold is None:
            threshold = DEFAULT_CLASSIFIER_THRESHOLD
        elif self.classifier is None:
            raise InputError(
                f"`classifier_threshold` ({threshold!r}) needs a `classifier` column"
            )
        if isinstance(threshold, bool) or not isinstance(threshold, int | float | np.number):
            raise InputTypeError(
                f"`classifier_threshold` must be a number in (0, 1]; got {threshold!r}"
            )
        if not 0.0 < float(threshold) <= 1.0:
            raise InputError(f"`classifier_threshold` must be in (0, 1]; got {threshold!r}")
        object.__setattr__(self, "classifier_threshold", float(threshold))

    # -- construction from a run file -------------------------------------------------------

    @classmethod
    def from_config(cls, section: Mapping[str, Any], base_dir: str | os.PathLike | None = None,
                    *, where: str = "[catalog]") -> CatalogSource:
        """Build from a run file's ``[catalog]`` table.

        Parameters
        ----------
        section : mapping
            Keys: ``paths`` and the constructor's keyword names. Unknown keys are errors.
        base_dir : path, optional
            Relative paths and globs are taken relative to this folder (the run file's).
        where : str
            How messages name the table, e.g. ``"run.toml [catalog]"``.
        """
        if not isinstance(section, Mapping):
            raise InputTypeError(f"`{where}` must be a table; got {type(section).__name__}")
        allowed = ("paths", *LOGICAL_COLUMNS, "population", "sentinels", "require_redshift",
                   "mag_range", "classifier_threshold")
        for key in section:
            if key not in allowed:
                raise InputError(
                    f"`{where}` has unknown key '{key}'{_did_you_mean(str(key), allowed)}"
                )
        for key in ("paths", *REQUIRED_COLUMNS):
            if key not in section:
                raise InputError(f"`{where}` needs the key '{key}'")
        kwargs = dict(section)
        paths = kwargs.pop("paths")
        if base_dir is not None:
            items = [paths] if isinstance(paths, str | os.PathLike) else paths
            if isinstance(items, Sequence):
                paths = [
                    p if not isinstance(p, str | os.PathLike) or os.path.isabs(p)
                    else os.path.join(base_dir, p)
                    for p in items
                ]
        if "sentinels" in kwargs and isinstance(kwargs["sentinels"], list):
            kwargs["sentinels"] = tuple(kwargs["sentinels"])
        return cls(paths, **kwargs)

    # -- derived ---------------------------------------------------------------------------

    @property
    def columns(self) -> dict[str, str]:
        """Mapped logical columns → file column names."""
        return {c: getattr(self, c) for c in LOGICAL_COLUMNS if getattr(self, c) is not None}

    def rules(self) -> ValidationRules:
        """The validation rules this source asks for."""
        return ValidationRules(sentinels=self.sentinels,
                               require_redshift=self.require_redshift,
                               mag_range=self.mag_range)

    # -- checking --------------------------------------------------------------------------

    def _summarise(self, path: Path) -> FileSummary:
        fmt = _format_of(path)
        if not path.exists():
            raise InputError(f"`paths`: file '{path}' does not exist")
        if not path.is_file():
            raise InputError(f"`paths`: '{path}' is not a file")
        try:
            with open(path, "rb") as handle:
                handle.read(1)
        except OSError as exc:
            raise InputError(
                f"`paths`: cannot read '{path}' ({exc.strerror or _first_line(exc)})"
            ) from exc
        if path.stat().st_size == 0:
            raise InputError(f"`paths`: '{path}' is empty (0 bytes); expected a {fmt} file")
        sample = None
        if fmt == "parquet":
            n_rows, columns = _open_parquet(path)
        elif fmt == "fits":
            n_rows, columns = _open_fits(path)
        else:
            sample = _read_csv_sample(path)
            if len(sample):
                columns = {str(c): _numpy_kind(sample[c].dtype) for c in sample.columns}
            else:
                # A header without rows says nothing about the kinds; nothing will be read.
                columns = {str(c): "unknown" for c in sample.columns}
            n_rows = len(sample) if len(sample) < CSV_SAMPLE_ROWS else None

        available = list(columns)
        folded = {c.casefold(): c for c in available}
        mapping: list[tuple[str, str]] = []
        for logical, name in self.columns.items():
            if name in columns:
                actual = name
            elif fmt == "fits" and name.casefold() in folded:
                actual = folded[name.casefold()]  # FITS column names are case-insensitive
            else:
                raise InputError(
                    f"`{logical}` column '{name}' not found in '{path}'"
                    f"{_did_you_mean(name, available)} Available: {_list_columns(available)}"
                )
            mapping.append((logical, actual))

        for logical, actual in mapping:
            kind = columns[actual]
            if logical == "id" and kind in (*_NUMBER_KINDS, "text", "unknown"):
                continue
            if kind == "unknown":
                continue
            if kind in _NUMBER_KINDS:
                continue
            if sample is not None and kind == "text":
                # Finds the first cell that is not a number and raises naming it.
                _series_to_float(sample[actual], logical, actual, path, 0)
                columns[actual] = "float"  # text only because of NA spellings pandas kept
                continue
            if sample is not None:
                raise _not_numeric(logical, actual, path, sample[actual].iloc[0], 1, True)
            raise InputError(
                f"`{logical}` column '{actual}' in '{path}' must be numeric; "
                f"its type is {kind}"
            )
        if sample is not None and "id" in self.columns:
            actual = dict(mapping)["id"]
            if columns[actual] == "float":
                # pandas reads integer ids with blank cells as float; treat them as integers.
                values = sample[actual].to_numpy(dtype=np.float64, na_value=np.nan)
                finite = values[np.isfinite(values)]
                if np.all(finite == np.round(finite)):
                    columns[actual] = "integer"
        return FileSummary(path=os.fspath(path), format=fmt, n_rows=n_rows,
                           columns=tuple(columns.items()), mapping=tuple(mapping))

    def check(self) -> CatalogSummary:
        """Check every file before any row is read.

        In order, for each file: the extension is a known format; the file exists, is
        readable and is not empty; it opens as that format (a truncated Parquet or FITS file
        fails here); the mapped columns exist (message names the file and the column, suggests
        a close name and lists the available ones); they are numeric (for CSV from the header
        and the first ``CSV_SAMPLE_ROWS`` rows, naming the first bad value and its row).
        Then across files: the ``id`` column has the same kind (integer / float / text) in
        every file; different column sets give a :class:`CatalogWarning`; files with zero
        rows give a warning, and a catalogue with no rows at all is an error.

        Returns
        -------
        CatalogSummary

        Raises
        ------
        InputError
            One line naming the file (and column, value, row where they apply).
        """
        summaries = [self._summarise(path) for path in self.files]
        if "id" in self.columns:
            known = [s for s in summaries if s.kind_of("id") != "unknown"]
            for other in known[1:]:
                if known[0].kind_of("id") != other.kind_of("id"):
                    raise InputError(
                        f"files' schemas differ: `id` column '{dict(other.mapping)['id']}' is "
                        f"{other.kind_of('id')} in '{other.path}' but {known[0].kind_of('id')} "
                        f"in '{known[0].path}'; ids could not be compared across files"
                    )
        first = summaries[0]
        for other in summaries[1:]:
            names_first = dict(first.columns)
            names_other = dict(other.columns)
            extra = [c for c in names_other if c not in names_first]
            lacking = [c for c in names_first if c not in names_other]
            if extra or lacking:
                warnings.warn(
                    f"catalogue files have different columns: '{other.path}' "
                    + (f"adds {extra[:5]} " if extra else "")
                    + (f"lacks {lacking[:5]} " if lacking else "")
                    + f"compared with '{first.path}'; is every file part of the same catalogue?",
                    CatalogWarning, stacklevel=2,
                )
        empty = [s.path for s in summaries if s.n_rows == 0]
        if len(empty) == len(summaries):
            raise InputError(
                f"`paths`: the catalogue has no rows: {len(empty)} file(s) with a header but "
                f"zero rows, e.g. '{empty[0]}'"
            )
        if empty:
            warnings.warn(
                f"{len(empty)} catalogue file(s) have zero rows, e.g. '{empty[0]}'",
                CatalogWarning, stacklevel=2,
            )
        return CatalogSummary(files=tuple(summaries))

    # -- reading ---------------------------------------------------------------------------

    def iter_chunks(self, chunk_rows: int = 1_000_000, *, check: bool = True
                    ) -> Iterator[CatalogChunk]:
        """Yield the catalogue as chunks of at most ``chunk_rows`` rows, file by file.

        Parameters
        ----------
        chunk_rows : int
            Largest chunk. Memory use is a few chunks (plus, for Parquet, one row group of the
            mapped columns), whatever the catalogue's length.
        check : bool
            Run :meth:`check` first (default). Pass False only with a fresh check's result in
            hand.

        Yields
        ------
        CatalogChunk
            Chunks never span two files.

        Raises
        ------
        InputError
            From :meth:`check`, or while reading: a CSV cell that is not a number (naming file,
            column, value and row), a file that turns out corrupt part-way.
        """
        chunk_rows = check_chunk_rows(chunk_rows)
        summary = self.check() if check else None
        for i, path in enumerate(self.files):
            info = summary.files[i] if summary is not None else self._summarise(path)
            yield from _READERS[info.format](path, info, chunk_rows, None, True)


def iter_file_chunks(info: FileSummary, chunk_rows: int = 1_000_000,
                     row_groups: Sequence[int] | None = None, *,
                     use_threads: bool = True) -> Iterator[CatalogChunk]:
    """Read one checked file (or some row groups of a Parquet file) in chunks.

    The building block of :meth:`CatalogSource.iter_chunks`, for callers that share a
    catalogue's files out among workers (the tally's Dask engine).

    Parameters
    ----------
    info : FileSummary
        The file's entry in :meth:`CatalogSource.check`'s result: its path, format and column
        mapping.
    chunk_rows : int
        Largest chunk.
    row_groups : sequence of int, optional
        Parquet only: read just these row groups, given in increasing order. Chunks never
        span two row groups that are not adjacent, and each chunk's ``row_offset`` is still
        its first row's position in the whole file.
    use_threads : bool
        Parquet: let pyarrow decode on its own thread pool (default; read alone, 10^7 rows of
        three columns took 0.12 s against 0.16 s without). False decodes on the calling
        thread, which is faster when the caller's threads already keep every core busy (the
        tally of 10^7 rows on 2 cores: 0.50 against 0.55 s). Other formats ignore it.

    Returns
    -------
    iterator of CatalogChunk
        The arguments are checked when this is called; the file is opened and read as the
        iterator is consumed.

    Raises
    ------
    InputError, InputTypeError
        Bad arguments (at the call; a row group the file does not have when reading starts),
        and everything reading raises (see :meth:`CatalogSource.iter_chunks`).
    """
    if not isinstance(info, FileSummary):
        raise InputTypeError(
            f"`info` must be a FileSummary (from CatalogSource.check()); got "
            f"{type(info).__name__}"
        )
    chunk_rows = check_chunk_rows(chunk_rows)
    if not isinstance(use_threads, bool | np.bool_):
        raise InputTypeError(f"`use_threads` must be true or false; got {use_threads!r}")
    groups = None
    if row_groups is not None:
        if isinstance(row_groups, str | bytes) or not isinstance(row_groups, Sequence) or any(
                isinstance(g, bool) or not isinstance(g, int | np.integer) for g in row_groups):
            raise InputTypeError(f"`row_groups` must be a sequence of integers; got {row_groups!r}")
        if info.format != "parquet":
            raise InputError(
                f"`row_groups` applies to Parquet files only; '{info.path}' is a {info.format} "
                "file"
            )
        groups = [int(g) for g in row_groups]
        if any(b <= a for a, b in itertools.pairwise(groups)):
            raise InputError(f"`row_groups` must increase strictly; got {groups}")
    return _READERS[info.format](Path(info.path), info, chunk_rows, groups, bool(use_threads))


def _make_chunk(path: Path, offset: int, arrays: dict[str, np.ndarray]) -> CatalogChunk:
    return CatalogChunk(source=os.fspath(path), row_offset=offset, **arrays)


#: Read buffer of a Parquet column chunk. Without one (pyarrow's default, 0) each column
#: chunk of a row group is read whole before it is decoded; with 1 MiB it is streamed.
#: Measured with pyarrow 26, 10^7 rows in row groups of 10^6 (three columns), batches of
#: 131 072 rows: Arrow's peak 51 → 20 MB, resident memory +145 → +110 MB, read time unchanged
#: (0.13-0.16 s); 4 MiB gave 35 MB.
_PARQUET_BUFFER_BYTES = 1 << 20


def _row_group_runs(pf: pq.ParquetFile, path: Path, groups: list[int] | None
                    ) -> list[tuple[list[int] | None, int]]:
    """(row groups to read together, offset of their first row) for each run of adjacent
    groups; one run of the whole file (None, 0) without ``groups``."""
    if groups is None:
        return [(None, 0)]
    n_groups = pf.num_row_groups
    bad = [g for g in groups if not 0 <= g < n_groups]
    if bad:
        raise InputError(
            f"`row_groups` entries must be in [0, {n_groups}) for '{path}' ({n_groups} row "
            f"groups); got {bad[0]}"
        )
    starts = np.concatenate(([0], np.cumsum(
        [pf.metadata.row_group(i).num_rows for i in range(n_groups)], dtype=np.int64)))
    runs: list[tuple[list[int] | None, int]] = []
    for g in groups:
        if runs and runs[-1][0][-1] == g - 1:
            runs[-1][0].append(g)
        else:
            runs.append(([g], int(starts[g])))
    return runs


def _read_parquet(path: Path, info: FileSummary, chunk_rows: int,
                  row_groups: list[int] | None, use_threads: bool) -> Iterator[CatalogChunk]:
    mapping = dict(info.mapping)
    kinds = dict(info.columns)
    # pre_buffer=False: with pyarrow's default (True) iter_batches reads ahead through the
    # whole file, and Arrow memory grows with the file (measured with pyarrow 26: 4.2 MB for
    # 10^5 rows, 11.9 MB for 3x10^5, four float64 columns, row groups of 5000); without it
    # memory stays at about one row group (0.53 MB for both).
    # page_checksum_verification: pages written with a CRC are checked as they are read, so
    # a damaged file fails with a one-line error instead of giving wrong numbers (pages
    # without a CRC are read as before).
    pf = pq.ParquetFile(path, pre_buffer=False, buffer_size=_PARQUET_BUFFER_BYTES,
                        page_checksum_verification=True)
    try:
        for groups, offset in _row_group_runs(pf, path, row_groups):
            batches = pf.iter_batches(batch_size=chunk_rows, row_groups=groups,
                                      columns=list(mapping.values()), use_threads=use_threads)
            while True:
                try:
                    batch = next(batches)
                except StopIteration:
                    break
                except (pa.ArrowException, OSError) as exc:
                    raise InputError(
                        f"`paths`: '{path}' could not be read after row {offset} "
                        f"({_first_line(exc)})"
                    ) from exc
                arrays: dict[str, np.ndarray] = {}
                for logical, name in mapping.items():
                    column = batch.column(name)
                    if logical == "id":
                        arrays["id"], arrays["id_missing"] = _arrow_to_id(column, kinds[name])
                    else:
                        arrays[logical] = _arrow_to_float(column)
                yield _make_chunk(path, offset, arrays)
                offset += batch.num_rows
    finally:
        pf.close()


def _read_fits(path: Path, info: FileSummary, chunk_rows: int, row_groups: None = None,
               use_threads: bool = True) -> Iterator[CatalogChunk]:
    mapping = dict(info.mapping)
    kinds = dict(info.columns)
    gz = path.name.lower().endswith(".gz")
    with fits.open(path, memmap=not gz) as hdul:
        hdu = _fits_table(hdul, path)
        n_rows = int(hdu.header["NAXIS2"])
        nulls = {c.name: c.null for c in hdu.columns}
        data = hdu.data
        for start in range(0, n_rows, chunk_rows):
            # Slice the record array first: field() on the slice converts only these rows
            # (field() on the whole table would allocate the whole column).
            rows = data[start:start + chunk_rows]
            arrays: dict[str, np.ndarray] = {}
            for logical, name in mapping.items():
                values = rows.field(name)
                if logical == "id":
                    arrays["id"], arrays["id_missing"] = _fits_to_id(
                        values, kinds[name], nulls[name])
                else:
                    floats = np.array(values, dtype=np.float64)  # native byte order, a copy
                    if kinds[name] == "integer" and nulls[name] is not None:
                        floats[np.asarray(values) == int(nulls[name])] = np.nan
                    arrays[logical] = floats
            del rows, values  # no view into the memory map may outlive the file
            yield _make_chunk(path, start, arrays)
        del data


def _read_csv(path: Path, info: FileSummary, chunk_rows: int, row_groups: None = None,
              use_threads: bool = True) -> Iterator[CatalogChunk]:
    mapping = dict(info.mapping)
    kinds = dict(info.columns)
    dtype = {mapping["id"]: str} if "id" in mapping else None
    offset = 0
    try:
        reader = pd.read_csv(path, usecols=list(mapping.values()), dtype=dtype,
                             chunksize=chunk_rows, low_memory=False)
    except _CSV_ERRORS as exc:
        raise _csv_error(path, exc) from exc
    with reader:
        while True:
            try:
                frame = next(reader)
            except StopIteration:
                break
            except _CSV_ERRORS as exc:
                raise _csv_error(path, exc) from exc
            arrays: dict[str, np.ndarray] = {}
            for logical, name in mapping.items():
                if logical == "id":
                    arrays["id"], arrays["id_missing"] = _series_to_id(
                        frame[name], kinds[name], name, path, offset)
                else:
                    arrays[logical] = _series_to_float(frame[name], logical, name, path,
                                                       offset)
            yield _make_chunk(path, offset, arrays)
            offset += len(frame)


_READERS = {"parquet": _read_parquet, "fits": _read_fits, "csv": _read_csv}


# --------------------------------------------------------------------------------------------
# Validation
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ValidationRules:
    """What makes a row unusable (see the module docstring for the reasons' order).

    Parameters
    ----------
    sentinels : tuple of float
        Magnitudes meaning "missing", besides NaN/inf; matched with a relative tolerance of
        1e-6 so float32-stored values match.
    require_redshift : bool
        Reject rows whose redshift is NaN/inf (negative redshifts are always rejected).
    mag_range : (float, float)
        Plausible magnitudes, inclusive; finite magnitudes outside are ``mag_implausible``.
    """

    sentinels: tuple[float, ...] = DEFAULT_SENTINELS
    require_redshift: bool = False
    mag_range: tuple[float, float] = DEFAULT_MAG_RANGE

    def __post_init__(self) -> None:
        object.__setattr__(self, "mag_range", _mag_range_iv(self.mag_range))


class SeenIds:
    """Ids of rows kept so far, for ``duplicate_id`` across chunks and files.

    Integer and float ids are kept as a few sorted numpy arrays ("runs"); a new chunk's ids
    become a run, and runs of similar size are merged, so the total work is O(N log N) and a
    lookup is a binary search in each of O(log N) runs. Ids that increase through the file
    (the usual case) need no sort and no search: runs whose range misses the chunk's are
    skipped, and runs in order are joined without sorting. Measured in chunks of 131 072 ids,
    10^7 ids: 12 ns per id increasing, 19 ns shuffled within chunks, 190 ns shuffled across the
    whole catalogue.

    Memory, per distinct kept id: numeric ids 8 bytes (8 GB for 10^9 sources) plus a transient
    buffer while the largest runs merge (measured peak ≈ 15 bytes per id over 2×10^5 ids in
    chunks of 2000). Text ids go into a Python set: measured ≈ 42 bytes per id for the set,
    plus the strings it keeps alive (CPython: about 50 bytes + 1 per character each).
    """

    def __init__(self) -> None:
        self._runs: list[np.ndarray] = []
        self._text: set[Any] | None = None
        self._dtype: np.dtype | None = None

    def __len__(self) -> int:
        if self._text is not None:
            return len(self._text)
        return int(sum(r.size for r in self._runs))

    @property
    def nbytes(self) -> int:
        """Bytes held by numeric runs (text sets are not measured)."""
        return int(sum(r.nbytes for r in self._runs))

    def _contains(self, values: np.ndarray) -> np.ndarray:
        """Which of ``values`` (sorted, distinct) are in a run.

        Sorted queries make ``searchsorted`` walk each run in order rather than jump about
        it (with the sort below, ``keep_first`` of 10^7 ids shuffled across the catalogue
        went from 1.2 to 0.19 µs per id); runs whose range misses ``values``' range are
        skipped (ids that grow through the file then cost no search at all).
        """
        found = np.zeros(values.shape, dtype=bool)
        lo, hi = values[0], values[-1]
        for run in self._runs:
            # NaN ends (float ids) fail both tests, so such a run is searched: never wrong.
            if run[-1] < lo or run[0] > hi:
                continue
            idx = np.searchsorted(run, values)
            idx[idx == run.size] = run.size - 1
            found |= run[idx] == values
        return found

    def keep_first(self, ids: np.ndarray) -> np.ndarray:
        """Mark first occurrences and remember them.

        Parameters
        ----------
        ids : ndarray, shape (n,)
            Non-missing ids of candidate rows, in file order.

        Returns
        -------
        bool ndarray, shape (n,)
            True where the id was not seen before (earlier in ``ids`` or in earlier calls).
        """
        if ids.size == 0:
            return np.zeros(0, dtype=bool)
        text = ids.dtype == object
        if self._text is None and not self._runs:
            self._text = set() if text else None
            self._dtype = None if text else ids.dtype
        if text != (self._text is not None) or (not text and ids.dtype != self._dtype):
            raise InputError(
                f"`id` values changed kind between chunks ({self._dtype or 'text'} then "
                f"{'text' if text else ids.dtype}); ids must have one kind in every file"
            )
        if text:
            seen = self._text
            # set.add returns None: `not seen.add(v)` adds v and is True (a first occurrence).
            return np.array([v not in seen and not seen.add(v) for v in ids.tolist()],
                            dtype=bool)
        # Three cases, cheapest first. np.unique(return_index=True) needs a stable argsort
        # (measured 95 ns per id in chunks of 131 072) where a plain sort takes 6.
        increasing = ids.size == 1 or bool(np.all(ids[1:] > ids[:-1]))
        first_index = None
        if increasing:
            # The usual order of ids in a file: distinct and already sorted.
            unique = ids.copy()
        else:
            unique = np.sort(ids)
            # Repeats within the chunk, or NaN (which np.unique counts once): the general way.
            if bool(np.any(unique[1:] == unique[:-1])) or (
                    unique.dtype.kind == "f" and np.isnan(unique[-1])):
                unique, first_index = np.unique(ids, return_index=True)
        if first_index is None:
            first = np.ones(ids.size, dtype=bool)
        else:
            first = np.zeros(ids.size, dtype=bool)
            first[first_index] = True
        if self._runs:
            found = self._contains(unique)
            if found.any():
                if first_index is not None:
                    first[first_index[found]] = False
                elif increasing:
                    first = ~found
                else:  # distinct ids: each one found is not a first occurrence
                    first = ~np.isin(ids, unique[found])
                unique = unique[~found]
        if unique.size:
            self._runs.append(unique)
            # Merge runs of comparable size (a binary-counter schedule): O(log N) runs.
            while len(self._runs) > 1 and self._runs[-2].size <= 2 * self._runs[-1].size:
                b = self._runs.pop()
                a = self._runs.pop()
                in_order = bool(a[-1] < b[0])
                merged = np.concatenate([a, b])
                del a, b  # the two runs are freed before sorting, not after
                if not in_order:
                    # numpy's stable sort is timsort: two sorted runs merge in linear time,
                    # in place with a buffer of half the array.
                    merged.sort(kind="stable")
                self._runs.append(merged)
        return first


def _empty_counts() -> dict[str, int]:
    return dict.fromkeys(REJECTION_REASONS, 0)


def _clean_limit(sentinels: Sequence[Any]) -> float:
    """A bound below which ``|mag|`` is finite and matches no sentinel.

    A value flagged by the exact test has ``|mag - s| <= 1e-6 |s|``, so ``|mag| >= (1 - 1e-6)
    |s|``; below ``(1 - 3e-6) min |s|`` nothing can match, with a factor-of-three margin that
    covers float64 rounding (2**-53) and a float32 tolerance (``_SENTINEL_RTOL * abs(s)`` for a
    numpy float32 sentinel rounds to float32, relative error 2**-24). NaN compares false, so
    the same test rejects NaN and inf. Unusual sentinels (0, non-finite, not numbers) return 0,
    which sends every row to the exact test: slower, never different.
    """
    try:
        values = [abs(float(s)) for s in sentinels]
    except (TypeError, ValueError):
        return 0.0
    if not values:
        return float("inf")
    if not all(np.isfinite(values)):
        return 0.0
    return min(values) * (1.0 - 3.0 * _SENTINEL_RTOL)


def _rule_reasons(ra: np.ndarray, dec: np.ndarray, mag: np.ndarray, z: np.ndarray | None,
                  rules: ValidationRules) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rules 1-6 row by row: (reason index or -1, normalised RA, wrapped), exactly as documented.

    Run only on the rows the quick test in :func:`_kept_by_rules` could not clear.
    """
    reason = np.full(ra.shape[0], -1, dtype=np.int8)  # index into REJECTION_REASONS

    def reject(code: int, failing: np.ndarray) -> None:
        reason[(reason < 0) & failing] = code

    with np.errstate(invalid="ignore"):
        finite = np.isfinite(ra) & np.isfinite(dec)
        reject(0, ~finite)
        reject(1, finite & ((dec < -90.0) | (dec > 90.0)))
        wrapped = finite & (ra >= -180.0) & (ra < 0.0)
        ra_norm = np.where(wrapped, ra + 360.0, ra)
        # A tiny negative RA (-1e-14) + 360 rounds to exactly 360.0 in float64: that is RA 0.
        ra_norm[wrapped & (ra_norm >= 360.0)] = 0.0
        reject(2, finite & ((ra_norm < 0.0) | (ra_norm >= 360.0)))
        bad_mag = ~np.isfinite(mag)
        for s in rules.sentinels:
            bad_mag |= np.abs(mag - s) <= _SENTINEL_RTOL * abs(s)
        reject(3, bad_mag)
        lo, hi = rules.mag_range
        reject(4, (mag < lo) | (mag > hi))
        if z is not None:
            bad_z = z < 0.0
            if rules.require_redshift:
                bad_z |= ~np.isfinite(z)
            reject(5, bad_z)
    return reason, ra_norm, wrapped


def _kept_by_rules(chunk: CatalogChunk, rules: ValidationRules
                   ) -> tuple[np.ndarray | None, np.ndarray, np.ndarray, Any]:
    """Rules 1-6 for a whole chunk: (keep mask or None when every row passes, normalised RA,
    rows rejected per reason, and None or (wrapped, where): the wrapped flags of the rows
    ``where`` selects, the only rows that can be wrapped).

    A quick test in a few passes clears the rows that certainly pass (Dec within ±90, RA in
    [0, 360), ``mag`` strictly inside both the plausible range and ``±``:func:`_clean_limit`,
    redshift not negative); comparisons with NaN are false, so it also clears only finite
    values. The rest (usually few) go through :func:`_rule_reasons`, which decides every row
    exactly as the documented rules do.
    """
    ra, dec, mag, z = chunk.ra, chunk.dec, chunk.mag, chunk.redshift
    n = chunk.n_rows
    with np.errstate(invalid="ignore"):
        scratch = np.abs(dec)
        ok = np.less_equal(scratch, 90.0)
        test = np.greater_equal(ra, 0.0)
        ok &= test
        ok &= np.less(ra, 360.0, out=test)
        # Strictly inside the plausible range and clear of every sentinel (|mag| < limit).
        limit = _clean_limit(rules.sentinels)
        ok &= np.greater(mag, max(rules.mag_range[0], -limit), out=test)
        ok &= np.less(mag, min(rules.mag_range[1], limit), out=test)
        if z is not None:
            if rules.require_redshift:
                ok &= np.greater_equal(z, 0.0, out=test)
                ok &= np.less(z, np.inf, out=test)
            else:
                np.less(z, 0.0, out=test)
                ok &= np.logical_not(test, out=test)
    del scratch, test
    # RA keeps the dtype the rules give it (an integer RA becomes float, as `ra + 360.0` does).
    norm_type = np.result_type(ra.dtype, 360.0)
    ra_norm = ra if ra.dtype == norm_type else ra.astype(norm_type)
    counts = np.zeros(len(REJECTION_REASONS), dtype=np.int64)
    suspect = np.flatnonzero(~ok)
    if suspect.size == 0:
        return None, ra_norm, counts, None
    # Many suspects: decide every row exactly (the cleared ones pass again) without gathers.
    where: np.ndarray | slice = suspect if 2 * suspect.size <= n else slice(None)

    def part(values: np.ndarray | None) -> np.ndarray | None:
        return None if values is None else values[where]

    reason, ra_part, wrapped = _rule_reasons(part(ra), part(dec), part(mag), part(z), rules)
    kept = reason < 0
    ok[where] = kept
    if wrapped.any():
        ra_norm = ra_norm.copy()
        ra_norm[where] = ra_part
    counts += np.bincount(reason[~kept], minlength=len(REJECTION_REASONS))
    return ok, ra_norm, counts, (wrapped, where)


def _validate(chunk: CatalogChunk, rules: ValidationRules, seen_ids: SeenIds | None
              ) -> tuple[np.ndarray | None, np.ndarray, dict[str, int], dict[str, int]]:
    """Every rule for one chunk: (keep mask or None when every row is kept, normalised RA
    (every row; meaningful where kept), rows rejected per reason, notes)."""
    keep, ra_norm, counts, wrap_info = _kept_by_rules(chunk, rules)
    notes = {NOTE_RA_WRAPPED: 0}
    if chunk.id is not None:
        missing = chunk.id_missing
        if missing is not None and not missing.any():
            missing = None
        if keep is None and missing is None:
            candidates = None  # every row: no gather
            first = seen_ids.keep_first(chunk.id)
        else:
            mask = np.ones(chunk.n_rows, dtype=bool) if keep is None else keep
            candidates = np.flatnonzero(mask if missing is None else mask & ~missing)
            first = seen_ids.keep_first(chunk.id[candidates])
        n_duplicates = first.size - int(np.count_nonzero(first))
        if n_duplicates:
            if keep is None:
                keep = np.ones(chunk.n_rows, dtype=bool)
            repeated = ~first
            keep[repeated if candidates is None else candidates[repeated]] = False
            counts[REJECTION_REASONS.index("duplicate_id")] += n_duplicates
        n_missing = 0
        if missing is not None:
            n_missing = int(np.count_nonzero(missing if keep is None else keep & missing))
        notes[NOTE_ID_MISSING] = n_missing
    if wrap_info is not None:
        wrapped, where = wrap_info
        # Kept by rules 1-6 and not a duplicate: `keep` at those rows after the id check.
        notes[NOTE_RA_WRAPPED] = int(np.count_nonzero(wrapped & keep[where]))
    rejected = {r: int(c) for r, c in zip(REJECTION_REASONS, counts, strict=True)}
    return keep, ra_norm, rejected, notes


def validate_chunk(chunk: CatalogChunk, rules: ValidationRules,
                   seen_ids: SeenIds | None = None, *, copy: bool = True
                   ) -> tuple[ValidChunk, dict[str, int], dict[str, int]]:
    """Keep or reject every row of a chunk, with a named reason.

    Parameters
    ----------
    chunk : CatalogChunk
    rules : ValidationRules
    seen_ids : SeenIds, optional
        Required when the chunk carries ids: the same registry must be passed for every chunk
        of the catalogue so duplicates are found across chunks and files (it is updated).
    copy : bool
        True (default): the kept rows' arrays are new arrays. False: when every row of the
        chunk is kept and its RA needs no normalising, they may be the chunk's own arrays
        (views, read-only if those are), which saves a copy per column; for callers that
        only read them, like the tally.

    Returns
    -------
    valid : ValidChunk
        Kept rows, RA normalised to [0, 360) degrees.
    rejected : dict of str to int
        Rows rejected per reason; every reason in ``REJECTION_REASONS`` is a key.
    notes : dict of str to int
        ``ra_wrapped_from_negative`` (kept rows whose RA was in [−180, 0)) and
        ``id_missing`` (kept rows without an id).

    Notes
    -----
    ``len(valid) + sum(rejected.values()) == len(chunk)`` always. The caller's arrays are not
    modified.

    Most rows pass every rule; a quick test (Dec within ±90, RA in [0, 360), ``|mag|``
    clear of every sentinel, redshift not negative: about ten passes over the columns) clears
    them, and only the others are taken through the rules one by one, in the documented order.
    The result is the same as applying the rules to every row.
    """
    if not isinstance(chunk, CatalogChunk):
        raise InputTypeError(f"`chunk` must be a CatalogChunk; got {type(chunk).__name__}")
    if not isinstance(rules, ValidationRules):
        raise InputTypeError(f"`rules` must be ValidationRules; got {type(rules).__name__}")
    if chunk.id is not None and not isinstance(seen_ids, SeenIds):
        raise InputTypeError(
            "`seen_ids` must be a SeenIds shared by every chunk when the chunk has ids; "
            f"got {type(seen_ids).__name__}"
        )
    if rules.require_redshift and chunk.redshift is None:
        raise InputError("`rules.require_redshift` is true but the chunk has no redshift")
    if not isinstance(copy, bool | np.bool_):
        raise InputTypeError(f"`copy` must be true or false; got {copy!r}")

    keep, ra_norm, rejected, notes = _validate(chunk, rules, seen_ids)
    if keep is None:
        def pick(values: np.ndarray | None) -> np.ndarray | None:
            if values is None:
                return None
            return values.copy() if copy else values

        row_in_file = np.arange(chunk.row_offset, chunk.row_offset + chunk.n_rows,
                                dtype=np.int64)
        ra = ra_norm.copy() if copy and ra_norm is chunk.ra else ra_norm
    else:
        def pick(values: np.ndarray | None) -> np.ndarray | None:
            return None if values is None else values[keep]

        row_in_file = chunk.row_offset + np.flatnonzero(keep).astype(np.int64)
        ra = ra_norm[keep]
    valid = ValidChunk(
        source=chunk.source, row_in_file=row_in_file, ra=ra, dec=pick(chunk.dec),
        mag=pick(chunk.mag), redshift=pick(chunk.redshift), mag_error=pick(chunk.mag_error),
        stellar_mass=pick(chunk.stellar_mass), id=pick(chunk.id), weight=pick(chunk.weight),
        classifier=pick(chunk.classifier),
        redshift_error=pick(chunk.redshift_error),
    )
    return valid, rejected, notes


def iter_valid_chunks(source: CatalogSource, chunk_rows: int = 1_000_000
                      ) -> Iterator[tuple[ValidChunk, dict[str, int], dict[str, int]]]:
    """Read and validate a whole source, sharing one :class:`SeenIds` across all chunks.

    Yields
    ------
    (ValidChunk, rejected, notes)
        As from :func:`validate_chunk`, one per chunk of :meth:`CatalogSource.iter_chunks`.
    """
    if not isinstance(source, CatalogSource):
        raise InputTypeError(f"`source` must be a CatalogSource; got {type(source).__name__}")
    rules = source.rules()
    seen = SeenIds()
    for chunk in source.iter_chunks(chunk_rows):
        yield validate_chunk(chunk, rules, seen)


# --------------------------------------------------------------------------------------------
# Footprint split and the ledger
# --------------------------------------------------------------------------------------------


def split_by_footprint(valid: ValidChunk, footprint: Any) -> np.ndarray:
    """Mask of kept rows inside a footprint.

    Parameters
    ----------
    valid : ValidChunk
    footprint : object with ``contains(ra_deg, dec_deg) -> bool ndarray``
        Usually a :class:`countscale.footprint.Footprint`.

    Returns
    -------
    bool ndarray, shape (len(valid),)
    """
    if not isinstance(valid, ValidChunk):
        raise InputTypeError(f"`valid` must be a ValidChunk; got {type(valid).__name__}")
    contains = getattr(footprint, "contains", None)
    if not callable(contains):
        raise InputTypeError(
            f"`footprint` must have a contains(ra_deg, dec_deg) method; got "
            f"{type(footprint).__name__}"
        )
    inside = np.asarray(contains(valid.ra, valid.dec))
    if inside.shape != (valid.n_rows,) or inside.dtype != bool:
        raise InputTypeError(
            f"`footprint.contains` must return a bool array of shape ({valid.n_rows},); "
            f"got {inside.dtype} of shape {inside.shape}"
        )
    return inside


def _check_count(name: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer):
        raise InputTypeError(f"`{name}` must be an integer; got {value!r}")
    if value < 0:
        raise InputError(f"`{name}` must be >= 0; got {value}")
    return int(value)


@dataclass(frozen=True)
class Ledger:
    """Where every input row went.

    Attributes
    ----------
    rows_read : int
    rows_in_footprint, rows_outside_footprint : int
        Kept rows, split by the footprint.
    rows_rejected : dict of str to int
        Rows rejected per reason (see ``REJECTION_REASONS``).
    notes : dict of str to int
        Counts that are not a fate of their own (e.g. ``ra_wrapped_from_negative``).

    Notes
    -----
    The invariant ``rows_read == rows_in_footprint + rows_outside_footprint +
    sum(rows_rejected.values())`` is checked by :meth:`check`. Ledgers add (``a + b``,
    ``sum(ledgers)``) so workers can tally separately.
    """

    rows_read: int = 0
    rows_in_footprint: int = 0
    rows_outside_footprint: int = 0
    rows_rejected: Mapping[str, int] = field(default_factory=dict)
    notes: Mapping[str, int] = field(default_factory=dict)

    def __post_init__(self) -> None:
        for name in ("rows_read", "rows_in_footprint", "rows_outside_footprint"):
            object.__setattr__(self, name, _check_count(name, getattr(self, name)))
        for name in ("rows_rejected", "notes"):
            table = getattr(self, name)
            if not isinstance(table, Mapping):
                raise InputTypeError(f"`{name}` must be a mapping; got {type(table).__name__}")
            clean = {str(k): _check_count(f"{name}[{k!r}]", v) for k, v in table.items()}
            object.__setattr__(self, name, clean)

    @classmethod
    def from_chunk(cls, valid: ValidChunk, rejected: Mapping[str, int],
                   notes: Mapping[str, int], inside: np.ndarray) -> Ledger:
        """The ledger of one validated chunk and its footprint mask."""
        inside = np.asarray(inside, dtype=bool)
        if inside.shape != (valid.n_rows,):
            raise InputError(
                f"`inside` must have one entry per kept row ({valid.n_rows}); "
                f"got shape {inside.shape}"
            )
        n_in = int(np.count_nonzero(inside))
        return cls(rows_read=valid.n_rows + int(sum(rejected.values())),
                   rows_in_footprint=n_in, rows_outside_footprint=valid.n_rows - n_in,
                   rows_rejected=dict(rejected), notes=dict(notes))

    @property
    def n_rejected(self) -> int:
        return int(sum(self.rows_rejected.values()))

    def merge(self, other: Ledger) -> Ledger:
        """Sum of two ledgers (e.g. from two workers)."""
        if not isinstance(other, Ledger):
            raise InputTypeError(f"`other` must be a Ledger; got {type(other).__name__}")

        def add(a: Mapping[str, int], b: Mapping[str, int]) -> dict[str, int]:
            out = dict(a)
            for k, v in b.items():
                out[k] = out.get(k, 0) + v
            return out

        return Ledger(
            rows_read=self.rows_read + other.rows_read,
            rows_in_footprint=self.rows_in_footprint + other.rows_in_footprint,
            rows_outside_footprint=self.rows_outside_footprint + other.rows_outside_footprint,
            rows_rejected=add(self.rows_rejected, other.rows_rejected),
            notes=add(self.notes, other.notes),
        )

    def __add__(self, other: object) -> Ledger:
        if not isinstance(other, Ledger):
            return NotImplemented
        return self.merge(other)

    def __radd__(self, other: object) -> Ledger:
        if other == 0:  # lets sum(ledgers) start from 0
            return self
        return NotImplemented

    def check(self) -> Ledger:
        """Raise :class:`LedgerError` unless every row is accounted for once; return self."""
        total = self.rows_in_footprint + self.rows_outside_footprint + self.n_rejected
        if total != self.rows_read:
            raise LedgerError(
                f"row ledger does not balance: rows_read={self.rows_read} but in footprint "
                f"{self.rows_in_footprint} + outside {self.rows_outside_footprint} + rejected "
                f"{self.n_rejected} = {total}"
            )
        return self

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict: the ledger keys of ``results.json`` plus ``notes``.

        Every reason of ``REJECTION_REASONS`` appears (0 when nothing was rejected for it),
        in precedence order, followed by any other reason present.
        """
        rejected = {r: int(self.rows_rejected.get(r, 0)) for r in REJECTION_REASONS}
        rejected.update({k: v for k, v in self.rows_rejected.items() if k not in rejected})
        return {
            "rows_read": self.rows_read,
            "rows_in_footprint": self.rows_in_footprint,
            "rows_outside_footprint": self.rows_outside_footprint,
            "rows_rejected": rejected,
            "notes": dict(sorted(self.notes.items())),
        }

    def to_json(self, indent: int | None = None) -> str:
        """The :meth:`to_dict` object as a JSON string."""
        return json.dumps(self.to_dict(), indent=indent)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Ledger:
        """Inverse of :meth:`to_dict` (unknown keys are errors)."""
        keys = ("rows_read", "rows_in_footprint", "rows_outside_footprint", "rows_rejected",
                "notes")
        for key in data:
            if key not in keys:
                raise InputError(f"`ledger` has unknown key '{key}'{_did_you_mean(key, keys)}")
        return cls(**dict(data))

    def summary(self) -> str:
        """A few readable lines for the command line."""
        lines = [
            f"rows read              {self.rows_read:>14,d}",
            f"  in footprint         {self.rows_in_footprint:>14,d}",
            f"  outside footprint    {self.rows_outside_footprint:>14,d}",
            f"  rejected             {self.n_rejected:>14,d}",
        ]
        lines += [f"    {k:<20} {v:>14,d}" for k, v in self.rows_rejected.items() if v]
        lines += [f"  note: {k} {v:,d}" for k, v in sorted(self.notes.items()) if v]
        return "\n".join(lines)


def require_rows(ledger: Ledger) -> None:
    """Raise :class:`InputError` if no row is left in the footprint, naming what removed them.

    Raises
    ------
    InputError
        "no rows read", "all N rows rejected (largest cut first ...)", or "no valid row inside
        the footprint".
    """
    if not isinstance(ledger, Ledger):
        raise InputTypeError(f"`ledger` must be a Ledger; got {type(ledger).__name__}")
    ledger.check()
    if ledger.rows_in_footprint > 0:
        return
    if ledger.rows_read == 0:
        raise InputError("`catalog`: no rows were read; every catalogue file is empty")
    cuts = sorted(((n, r) for r, n in ledger.rows_rejected.items() if n), reverse=True)
    listed = ", ".join(f"`{r}` {n}" for n, r in cuts)
    n_valid = ledger.rows_outside_footprint
    if n_valid == 0:
        raise InputError(
            f"`catalog`: all {ledger.rows_read} rows were rejected, mostly by `{cuts[0][1]}` "
            f"({listed})"
        )
    raise InputError(
        f"`footprint`: none of the {n_valid} valid rows lies inside the footprint "
        f"(rejected before that: {listed or 'none'}); check the footprint and the RA/Dec "
        "columns"
    )
