"""Streaming tally: catalogue chunks in, integer histograms and a row ledger out.

The tally is the one pass over the catalogue. Every row is read once, validated by
:func:`countscale.catalog.validate_chunk`, tested against the footprint and counted in an
integer histogram over (jackknife region × magnitude bin [× redshift bin]); the ledger says
where every row went. Memory is bounded by a chunk, whatever the catalogue's length, except
for the per-source columns a caller asks to keep (4 bytes per column per in-footprint source).

Topics
------
tally
    The entry point: a :class:`~countscale.catalog.CatalogSource` and a
    :class:`~countscale.footprint.Footprint` in, a :class:`Tally` out.
Tally
    The result: ``ledger``, ``mag_edges``, ``counts``, ``region_counts``, ``region_area_deg2``,
    ``columns`` (compact per-source arrays), the footprint's area. Tallies over the same bins
    and regions add (``a + b``): the tallies of two parts of a catalogue sum to the tally of
    the whole, provided no id repeats across the parts (the Dask engine sums its tasks'
    partial tallies the same way, after resolving such repeats).
Engines
    ``"local"`` (default): in-process; the main thread reads, blocks of rows are tallied by a
    small thread pool (numpy and healpy release the GIL). ``"dask"``: one task per file or per
    group of Parquet row groups on a ``distributed`` cluster; the driver sums the tasks'
    tallies and resolves duplicate ids across tasks so the ledger equals the local one.
Bins
    :data:`DEFAULT_MAG_GRID`, used when no bins are given, then trimmed to the occupied range.

Counting rules
--------------
* Magnitude bins are half-open, ``[e_i, e_i+1)``, the last one too: a source exactly at the
  last edge, or fainter, is counted in ``n_fainter``; brighter than the first edge in
  ``n_brighter``. So ``counts.sum() + n_brighter + n_fainter == ledger.rows_in_footprint``.
* A source is in the footprint when ``Footprint.contains`` says so (exact for shapes, the
  half-coverage rule for map-based parts); it is then in the region of its HEALPix cell at
  ``regions.order``.
* Redshift bins (optional) are half-open too; sources without a finite redshift, or outside the
  edges, are in every other histogram and counted in ``n_redshift_unbinned``.

Extinction and star/galaxy classification (optional)
----------------------------------------------------
* With an ``extinction`` map, every in-footprint source is counted (and its ``mag`` column
  kept) at its dereddened magnitude m − A, A = R · E(B−V) at the source's map pixel.
* With a ``classifier`` column in the source, in-footprint sources of the other class (stars,
  classifier >= ``classifier_threshold``, in a galaxy catalogue; galaxies in a star catalogue)
  are left out of every histogram and counted in the ledger as rejected for
  ``star_by_classifier`` (or ``galaxy_by_classifier``), and per region and magnitude in
  ``excluded_histogram``, so the contamination they would have caused is known bin by bin.
  Sources with a NaN classifier are kept (they cannot be classified) and counted in the note
  ``classifier_missing``; a classifier value outside [0, 1] is an error.

Coverage weights
----------------
The footprint's coverage fractions travel with the counts in two forms: ``region_area_deg2``
(each region's area, the sum of its cells' covered fractions, so ``region_counts /
region_area_deg2`` is a density per deg² whose denominator knows about holes and partial
cells) and, per source, the ``coverage`` column: the covered fraction of the source's finest
cell (``Footprint.weight_at``), 1 in the interior. The regions' areas sum to the footprint's
area, ``area_deg2``.

How the hot loop stays cheap
----------------------------
One HEALPix pixel per source (``healpy.ang2pix``, NEST) at the order of a precomputed table
that says, per cell of order ≤ 10, whether the cell is wholly inside, wholly outside or crossed
by the footprint's boundary; only sources in crossed cells go through the exact
``Footprint.contains`` (in pixel order, which keeps the footprint's lookups close together).
The region follows from the same pixel (NEST parents are bit shifts), as the histogram offset
of its region in one table lookup. Blocks of :data:`BLOCK_ROWS` rows keep numpy's temporaries
in the CPU cache; the local engine also reads in blocks (Parquet batches of that size are
faster to read and convert than large ones), and validation does not copy the columns of
blocks whose rows all pass (``validate_chunk(copy=False)``). The footprint's summary, needed
only for the result, is worked out on a thread beside the counting.

Where the time goes (cProfile of a one-thread tally of the benchmark's 10^7 rows, 0.89 s):
``healpy.ang2pix`` 41 %, reading the Parquet file 21 %, ``Footprint.contains`` on the rows of
boundary cells 8 %, the footprint's summary 7 %, validation 4 %, binning and counting the rest.

Examples
--------
>>> from countscale.catalog import CatalogSource                        # doctest: +SKIP
>>> from countscale.footprint import Footprint                          # doctest: +SKIP
>>> source = CatalogSource(["tiles/*.parquet"], ra="RA", dec="DEC", mag="MAG_R")  # doctest: +SKIP
>>> field = Footprint.box((150.0, 160.0), (0.0, 10.0), max_order=14)   # doctest: +SKIP
>>> result = tally(source, field, n_regions=24)                         # doctest: +SKIP
>>> print(result.summary())                                             # doctest: +SKIP
"""

from __future__ import annotations

import bisect
import contextlib
import os
import sys
import warnings
from collections import deque
from collections.abc import Iterator, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import healpy as hp
import numpy as np
import pyarrow.parquet as pq

from countscale import catalog as _catalog
from countscale.catalog import (
    NOTE_RA_WRAPPED,
    CatalogChunk,
    CatalogSource,
    Ledger,
    SeenIds,
    ValidationRules,
    ValidChunk,
    validate_chunk,
)
from countscale.errors import InputError, InputTypeError
from countscale.footprint import Footprint, Regions

__all__ = [
    "BLOCK_ROWS",
    "CELL_ORDER",
    "CLASSIFIER_REASONS",
    "COLUMNS",
    "DEFAULT_MAG_GRID",
    "ENGINES",
    "Tally",
    "TallyWarning",
    "tally",
]

#: Rows tallied together. 2**17 rows make 1 MB per float64 column, so the ~30 temporaries of
#: validation and binning stay near a CPU's L2 cache (measured here: validation of 10^6 rows
#: 3x faster in blocks of 65 536 than in one piece; 65 536 to 262 144 within noise end to end).
BLOCK_ROWS = 131_072

#: Default magnitude grid (start, stop, width) in AB magnitudes, used when no bins are given:
#: wide enough for bright stars and the deepest imaging, fixed so it is known before the
#: catalogue is read (one pass), and trimmed to the occupied bins at the end. 0.1 mag is finer
#: than any count analysis bins and keeps the grid at 450 bins. Choice of this project.
DEFAULT_MAG_GRID = (-5.0, 40.0, 0.1)

#: Per-source columns a tally can keep for in-footprint sources, with their dtypes.
#: ``coverage`` is the footprint's covered fraction at the source; ``region`` its region.
COLUMNS = {
    "mag": np.float32,
    "redshift": np.float32,
    "mag_error": np.float32,
    "stellar_mass": np.float32,
    "weight": np.float32,
    "coverage": np.float32,
    "region": np.int32,
    "cell": np.int32,
    "redshift_error": np.float32,
    # Positions, for per-source completeness from a depth map (float32: 0.1 arcsec).
    "ra": np.float32,
    "dec": np.float32,
}

#: HEALPix order of the ``cell`` column (NEST index of each source's cell): 3.4 arcmin cells,
#: fine enough to place a source within a small field and to evaluate sky covariates there,
#: and 12 * 4**10 < 2**31 fits int32.
CELL_ORDER = 10

#: Ledger reasons for in-footprint sources of the other class than the catalogue's population.
CLASSIFIER_REASONS = {"galaxies": "star_by_classifier", "stars": "galaxy_by_classifier"}
NOTE_CLASSIFIER_MISSING = "classifier_missing"

ENGINES = ("local", "dask")

#: Finest order of the inside/outside/boundary table: 12 * 4**10 cells of 3.4 arcmin, one
#: int8 each (12.6 MB). Only sources in cells the boundary crosses need the exact test.
_TABLE_ORDER = 10
_OUT, _MIXED, _FULL = 0, 1, 2

#: Rows per Dask task when Parquet row groups are small: consecutive row groups of one file are
#: grouped up to this many rows so a task's fixed cost (~1 ms) stays negligible.
_TASK_ROWS = 1_000_000


class TallyWarning(UserWarning):
    """A tally finished but something deserves a look (sources in no region, ...)."""


# --------------------------------------------------------------------------------------------
# Bins
# --------------------------------------------------------------------------------------------


def _uniform_edges(start: float, stop: float, width: float, name: str) -> np.ndarray:
    for key, value in (("start", start), ("stop", stop), ("width", width)):
        if isinstance(value, bool) or not isinstance(value, int | float | np.number):
            raise InputTypeError(f"`{name}` {key} must be a number; got {value!r}")
        if not np.isfinite(value):
            raise InputError(f"`{name}` {key} must be finite; got {value!r}")
    if width <= 0:
        raise InputError(f"`{name}` width must be > 0; got {width!r}")
    if stop <= start:
        raise InputError(f"`{name}` stop must be greater than start ({start!r}); got {stop!r}")
    n_bins = round((stop - start) / width)
    if n_bins < 1 or abs(n_bins * width - (stop - start)) > 1e-9 * max(1.0, abs(stop - start)):
        raise InputError(
            f"`{name}` width must divide stop - start ({stop - start!r}) into a whole number "
            f"of bins; got {width!r}"
        )
    return float(start) + float(width) * np.arange(n_bins + 1, dtype=np.float64)


def _edges_iv(bins: Any, name: str) -> np.ndarray:
    """Bins as {start, stop, width}, (start, stop, width) or increasing edges → edges."""
    if isinstance(bins, Mapping):
        missing = [k for k in ("start", "stop", "width") if k not in bins]
        if missing:
            raise InputError(
                f"`{name}` must have keys start, stop and width; missing {', '.join(missing)}"
            )
        return _uniform_edges(bins["start"], bins["stop"], bins["width"], name)
    if isinstance(bins, str | bytes):
        raise InputTypeError(f"`{name}` must be bin edges or {{start, stop, width}}; got {bins!r}")
    try:
        edges = np.array(bins, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputTypeError(
            f"`{name}` must be bin edges or {{start, stop, width}}; got {bins!r}"
        ) from exc
    if edges.ndim != 1 or edges.size < 2:
        raise InputError(f"`{name}` must be at least two bin edges; got shape {edges.shape}")
    if not np.all(np.isfinite(edges)):
        raise InputError(f"`{name}` edges must be finite; got {edges.tolist()}")
    if not np.all(np.diff(edges) > 0):
        raise InputError(f"`{name}` edges must increase strictly; got {edges.tolist()}")
    return edges


class _Binner:
    """Index of the half-open bin of each value: slot 0 below, i + 1 for bin i, n + 1 above."""

    def __init__(self, edges: np.ndarray):
        self.edges = edges
        self.n = len(edges) - 1
        widths = np.diff(edges)
        self.uniform = bool(np.allclose(widths, widths[0], rtol=1e-12, atol=0.0))
        # Slot s covers [ext[s], ext[s + 1]).
        self.ext = np.concatenate(([-np.inf], edges, [np.inf]))
        self.start = float(edges[0])
        self.inv_width = float(self.n / (edges[-1] - edges[0]))

    def slots(self, values: np.ndarray) -> np.ndarray:
        """Slots of finite values (NaN is not expected: magnitudes are validated)."""
        if not self.uniform:
            return np.searchsorted(self.edges, values, side="right")
        # Arithmetic guess of the slot (bin + 1), clipped in float before the integer cast
        # (huge values), then one correction step each way against the stored edges, as
        # numpy.histogram does: the guess is off by at most one slot through rounding. After
        # the clip the guess is >= 0, where the cast's truncation is the floor. In place: one
        # temporary.
        guess = values - self.start
        guess *= self.inv_width
        guess += 1.0
        np.maximum(guess, 0.0, out=guess)
        np.minimum(guess, float(self.n + 1), out=guess)
        slot = guess.astype(np.intp)
        del guess
        slot -= values < self.ext.take(slot)
        slot += values >= self.ext.take(slot + 1)
        return slot


# --------------------------------------------------------------------------------------------
# The result
# --------------------------------------------------------------------------------------------


def _readonly(array: np.ndarray) -> np.ndarray:
    view = np.asarray(array).view()  # a read-only view leaves the caller's array writable
    view.setflags(write=False)
    return view


def _add_optional(a: np.ndarray | None, b: np.ndarray | None) -> np.ndarray | None:
    if a is None:
        return b
    return a if b is None else a + b


@dataclass(frozen=True, eq=False)
class Tally:
    """Counts and kept columns of the in-footprint sources, and the row ledger.

    Attributes
    ----------
    ledger : countscale.catalog.Ledger
        Where every input row went.
    mag_edges : float64 ndarray, shape (n_mag + 1,)
        Magnitude bin edges (AB); bins are half-open ``[e_i, e_i+1)``.
    histogram : int64 ndarray, shape (n_regions + 1, n_mag + 2, n_z + 1)
        The full count cube. Axis 0: slot 0 counts in-footprint sources in no region (0 unless
        ``regions`` came from another footprint), slot r + 1 region r. Axis 1: slot 0 brighter
        than ``mag_edges[0]``, slot i + 1 bin i, slot n_mag + 1 at or fainter than
        ``mag_edges[-1]``. Axis 2: redshift bin, the last slot for sources in no redshift bin
        (length 1 without redshift bins). The properties below are views of it.
    regions : countscale.footprint.Regions
        The jackknife regions (cells of ``regions.order``, their labels and areas).
    region_area_deg2 : float64 ndarray, shape (n_regions,)
        Covered area of each region (sum of coverage fractions × cell area).
    area_deg2, area_uncertainty_deg2 : float
        The footprint's covered area and its standard error.
    footprint_summary : dict
        ``Footprint.summary()`` (the keys of ``countscale area --json``).
    columns : dict of str to ndarray
        Per in-footprint source, in catalogue order (files in order, rows in file order): any
        of ``COLUMNS`` that were asked for; float32 (``region`` int32).
    redshift_edges : float64 ndarray or None
        Redshift bin edges, when redshift bins were asked for.
    mag_grid : str
        ``"given"`` (bins from the caller) or ``"default"`` (:data:`DEFAULT_MAG_GRID`, trimmed
        to the occupied bins).
    excluded_histogram : int64 ndarray, shape (n_regions + 1, n_mag + 2), or None
        With a classifier: the in-footprint sources of the other class (left out of
        ``histogram``), by region slot and magnitude slot as in ``histogram``.
    excluded_reason : str or None
        The ledger reason those sources are counted under (:data:`CLASSIFIER_REASONS`).
    extinction : dict or None
        With an extinction map: its description (path, nside, R, band); magnitudes are
        dereddened.
    """

    ledger: Ledger
    mag_edges: np.ndarray
    histogram: np.ndarray
    regions: Regions
    region_area_deg2: np.ndarray
    area_deg2: float
    area_uncertainty_deg2: float
    footprint_summary: Mapping[str, Any]
    columns: Mapping[str, np.ndarray] = field(default_factory=dict)
    redshift_edges: np.ndarray | None = None
    mag_grid: str = "given"
    excluded_histogram: np.ndarray | None = None
    excluded_reason: str | None = None
    extinction: Mapping[str, Any] | None = None

    def __post_init__(self) -> None:
        n_mag = len(self.mag_edges) - 1
        n_z = 0 if self.redshift_edges is None else len(self.redshift_edges) - 1
        shape = (self.regions.n_regions + 1, n_mag + 2, n_z + 1)
        if self.histogram.shape != shape or self.histogram.dtype != np.int64:
            raise InputError(
                f"`histogram` must be int64 of shape {shape}; got {self.histogram.dtype} "
                f"of shape {self.histogram.shape}"
            )
        if self.excluded_histogram is not None and self.excluded_histogram.shape != shape[:2]:
            raise InputError(
                f"`excluded_histogram` must have shape {shape[:2]}; got "
                f"{self.excluded_histogram.shape}"
            )
        for name in ("mag_edges", "histogram", "region_area_deg2", "redshift_edges",
                     "excluded_histogram"):
            value = getattr(self, name)
            if value is not None:
                object.__setattr__(self, name, _readonly(value))
        object.__setattr__(self, "columns",
                           {k: _readonly(v) for k, v in dict(self.columns).items()})
        object.__setattr__(self, "footprint_summary", dict(self.footprint_summary))

    # -- views ------------------------------------------------------------------------------

    @property
    def n_mag(self) -> int:
        return len(self.mag_edges) - 1

    @property
    def n_regions(self) -> int:
        return self.regions.n_regions

    @property
    def region_counts(self) -> np.ndarray:
        """int64 (n_regions, n_mag): sources per region and magnitude bin."""
        return self.histogram[1:, 1:-1, :].sum(axis=2)

    @property
    def counts(self) -> np.ndarray:
        """int64 (n_mag,): in-footprint sources per magnitude bin (all regions)."""
        return self.histogram[:, 1:-1, :].sum(axis=(0, 2))

    @property
    def n_brighter(self) -> int:
        """In-footprint sources brighter than ``mag_edges[0]``."""
        return int(self.histogram[:, 0, :].sum())

    @property
    def n_fainter(self) -> int:
        """In-footprint sources at or fainter than ``mag_edges[-1]``."""
        return int(self.histogram[:, -1, :].sum())

    @property
    def n_unassigned(self) -> int:
        """In-footprint sources in no region's cell (0 when regions split this footprint)."""
        return int(self.histogram[0].sum())

    @property
    def redshift_counts(self) -> np.ndarray | None:
        """int64 (n_regions, n_mag, n_z) or None without redshift bins."""
        if self.redshift_edges is None:
            return None
        return self.histogram[1:, 1:-1, :-1]

    @property
    def excluded_counts(self) -> np.ndarray | None:
        """int64 (n_mag,): in-footprint sources the classifier left out, per magnitude bin."""
        if self.excluded_histogram is None:
            return None
        return self.excluded_histogram[:, 1:-1].sum(axis=0)

    @property
    def n_redshift_unbinned(self) -> int:
        """In-footprint sources in no redshift bin (no finite redshift, or outside the edges)."""
        if self.redshift_edges is None:
            return 0
        return int(self.histogram[:, :, -1].sum())

    @property
    def n_sources(self) -> int:
        """In-footprint sources (all bins, regions and overflows)."""
        return int(self.histogram.sum())

    # -- checks and algebra -----------------------------------------------------------------

    def check(self) -> Tally:
        """Check the ledger balances and matches the histogram; return self.

        Raises
        ------
        countscale.catalog.LedgerError
            Rows lost or counted twice (a bug, not bad input).
        """
        self.ledger.check()
        if self.n_sources != self.ledger.rows_in_footprint:
            raise _catalog.LedgerError(
                f"histogram holds {self.n_sources} sources but the ledger has "
                f"{self.ledger.rows_in_footprint} rows in the footprint"
            )
        for name, values in self.columns.items():
            if len(values) != self.ledger.rows_in_footprint:
                raise _catalog.LedgerError(
                    f"column {name!r} has {len(values)} rows but the ledger has "
                    f"{self.ledger.rows_in_footprint} rows in the footprint"
                )
        return self

    def _same_layout(self, other: Tally) -> None:
        if not isinstance(other, Tally):
            raise InputTypeError(f"`other` must be a Tally; got {type(other).__name__}")
        same_z = (self.redshift_edges is None and other.redshift_edges is None) or (
            self.redshift_edges is not None and other.redshift_edges is not None
            and np.array_equal(self.redshift_edges, other.redshift_edges))
        if not (np.array_equal(self.mag_edges, other.mag_edges) and same_z
                and self.regions.order == other.regions.order
                and np.array_equal(self.regions.cells, other.regions.cells)
                and np.array_equal(self.regions.labels, other.regions.labels)):
            raise InputError(
                "tallies must have the same magnitude and redshift bins and the same regions "
                "to be added"
            )
        if sorted(self.columns) != sorted(other.columns):
            raise InputError(
                f"tallies must keep the same columns to be added; got {sorted(self.columns)} "
                f"and {sorted(other.columns)}"
            )

    def merge(self, other: Tally) -> Tally:
        """Sum of two tallies of parts of one catalogue (``self``'s rows first in columns)."""
        self._same_layout(other)
        return Tally(
            ledger=self.ledger + other.ledger,
            mag_edges=self.mag_edges,
            histogram=self.histogram + other.histogram,
            regions=self.regions,
            region_area_deg2=self.region_area_deg2,
            area_deg2=self.area_deg2,
            area_uncertainty_deg2=self.area_uncertainty_deg2,
            footprint_summary=self.footprint_summary,
            columns={k: np.concatenate([v, other.columns[k]]) for k, v in self.columns.items()},
            redshift_edges=self.redshift_edges,
            mag_grid=self.mag_grid,
            excluded_histogram=_add_optional(self.excluded_histogram, other.excluded_histogram),
            excluded_reason=self.excluded_reason or other.excluded_reason,
            extinction=self.extinction,
        )

    def __add__(self, other: object) -> Tally:
        if not isinstance(other, Tally):
            return NotImplemented
        return self.merge(other)

    def trimmed(self) -> Tally:
        """The same tally with empty magnitude bins at both ends removed (at least one kept)."""
        occupied = np.flatnonzero(self.counts)
        if occupied.size == 0:
            return self
        lo, hi = int(occupied[0]), int(occupied[-1]) + 1
        if lo == 0 and hi == self.n_mag:
            return self
        cube = np.concatenate([self.histogram[:, :1], self.histogram[:, lo + 1:hi + 1],
                               self.histogram[:, -1:]], axis=1)
        excluded = self.excluded_histogram
        if excluded is not None:
            # Excluded sources in trimmed bins join the brighter/fainter overflow slots.
            excluded = np.concatenate([excluded[:, :lo + 1].sum(axis=1, keepdims=True),
                                       excluded[:, lo + 1:hi + 1],
                                       excluded[:, hi + 1:].sum(axis=1, keepdims=True)], axis=1)
        return Tally(
            ledger=self.ledger, mag_edges=self.mag_edges[lo:hi + 1], histogram=cube,
            regions=self.regions, region_area_deg2=self.region_area_deg2,
            area_deg2=self.area_deg2, area_uncertainty_deg2=self.area_uncertainty_deg2,
            footprint_summary=self.footprint_summary, columns=self.columns,
            redshift_edges=self.redshift_edges, mag_grid=self.mag_grid,
            excluded_histogram=excluded, excluded_reason=self.excluded_reason,
            extinction=self.extinction,
        )

    # -- output -----------------------------------------------------------------------------

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict: ledger, footprint, magnitude bins and counts, regions.

        Per-source columns are not included (they can be large).
        """
        out: dict[str, Any] = {
            "ledger": self.ledger.to_dict(),
            "footprint": dict(self.footprint_summary),
            "mag_bins": {
                "edges": [float(e) for e in self.mag_edges],
                "grid": self.mag_grid,
            },
            "counts": [int(c) for c in self.counts],
            "n_brighter": self.n_brighter,
            "n_fainter": self.n_fainter,
            "regions": {
                "n_regions": self.n_regions,
                "order": int(self.regions.order),
                "area_deg2": [float(a) for a in self.region_area_deg2],
                "counts": [[int(c) for c in row] for row in self.region_counts],
                "n_unassigned": self.n_unassigned,
            },
        }
        if self.excluded_histogram is not None:
            out["classifier"] = {
                "reason": self.excluded_reason,
                "excluded_counts": [int(c) for c in self.excluded_counts],
                "excluded_brighter": int(self.excluded_histogram[:, 0].sum()),
                "excluded_fainter": int(self.excluded_histogram[:, -1].sum()),
            }
        if self.extinction is not None:
            out["extinction"] = dict(self.extinction)
        if self.redshift_edges is not None:
            out["redshift_bins"] = {
                "edges": [float(e) for e in self.redshift_edges],
                "counts": self.redshift_counts.sum(axis=0).tolist(),
                "n_unbinned": self.n_redshift_unbinned,
            }
        return out

    def summary(self) -> str:
        """A few readable lines: area, sources, the non-empty magnitude bins."""
        lines = [
            f"footprint area         {self.area_deg2:,.4f} deg² "
            f"(± {self.area_uncertainty_deg2:.2g})",
            f"sources in footprint   {self.n_sources:>14,d} in {self.n_regions} regions "
            f"(order {self.regions.order})",
            f"magnitude bins         {self.n_mag} from {self.mag_edges[0]:g} to "
            f"{self.mag_edges[-1]:g} ({self.mag_grid} grid); brighter {self.n_brighter:,d}, "
            f"fainter {self.n_fainter:,d}",
        ]
        return "\n".join(lines)

    def __repr__(self) -> str:
        return (f"Tally(n_sources={self.n_sources}, n_mag={self.n_mag}, "
                f"n_regions={self.n_regions}, area_deg2={self.area_deg2:.6g}, "
                f"columns={sorted(self.columns)})")


# --------------------------------------------------------------------------------------------
# The plan: everything a block needs, shipped once to each worker
# --------------------------------------------------------------------------------------------


def _state_table(edges: np.ndarray, weight: np.ndarray, max_order: int, order: int
                 ) -> np.ndarray:
    """Per cell of ``order``: _FULL (all finest cells weight 1), _OUT (all 0), else _MIXED.

    The footprint is a step function over NEST indices at ``max_order``: segment i is
    ``[edges[i], edges[i+1])`` with weight ``weight[i]``, weight 0 outside ``edges``. A coarse
    cell takes the class of the segment holding its first finest cell, i.e. of the last edge
    at or before its start: edge j governs the coarse cells from ``ceil(edges[j] / size)`` up
    to the next edge's, so the table is one ``np.repeat`` of the classes (measured 8 ms at
    order 10 against 60 ms for a cumulative sum over the cells). A cell that an edge cuts
    (an edge not on a coarse-cell boundary) is mixed.
    """
    n_cells = 12 * 4**order
    if len(weight) == 0:
        return np.zeros(n_cells, dtype=np.int8)
    size = np.int64(4) ** (max_order - order)
    codes = np.where(weight >= 1.0, _FULL, np.where(weight > 0.0, _MIXED, _OUT))
    # Class before the first edge, of each segment, and after the last edge.
    classes = np.concatenate(([_OUT], codes, [_OUT])).astype(np.int8)
    first_cell = np.minimum(-(-edges // size), n_cells)  # first coarse cell at or after edge
    lengths = np.diff(first_cell, prepend=0, append=n_cells)
    table = np.repeat(classes, lengths)
    cut = edges % size != 0
    table[edges[cut] // size] = _MIXED
    return table


class _Plan:
    """Footprint, regions, bins and rules for tallying blocks (picklable; tables lazy)."""

    def __init__(self, footprint: Footprint, regions: Regions, mag_edges: np.ndarray,
                 redshift_edges: np.ndarray | None, columns: tuple[str, ...],
                 rules: ValidationRules, track_ids: bool, extinction: Any = None,
                 classifier: tuple[float, str, str] | None = None):
        self.footprint = footprint
        self.extinction = extinction
        # (threshold, population kept, ledger reason) when the source has a classifier column
        self.classifier = classifier
        self.regions = regions
        self.mag = _Binner(mag_edges)
        self.redshift_edges = redshift_edges
        self.columns = columns
        self.rules = rules
        self.track_ids = track_ids
        self.table_order = min(footprint.max_order, _TABLE_ORDER)
        self.pix_order = max(self.table_order, int(regions.order))
        self.state_shift = 2 * (self.pix_order - self.table_order)
        self.region_shift = 2 * (self.pix_order - int(regions.order))
        self.n_mag_slots = self.mag.n + 2
        self.n_z_slots = 1 if redshift_edges is None else len(redshift_edges)
        self.n_slots = (regions.n_regions + 1) * self.n_mag_slots * self.n_z_slots
        self._tables: tuple[np.ndarray, np.ndarray | None] | None = None

    def __getstate__(self) -> dict[str, Any]:
        state = dict(self.__dict__)
        state["_tables"] = None  # rebuilt where used; cheaper than shipping 12.6 MB
        return state

    @property
    def tables(self) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
        """(state per cell of ``table_order``, region label per cell of ``regions.order``
        or None when that order is finer than the table's, the histogram offset of each such
        cell's region: ``(label + 1) * n_mag_slots``)."""
        if self._tables is None:
            fp = self.footprint
            state = _state_table(fp.edges, fp.weight, fp.max_order, self.table_order)
            region_table = offset_table = None
            if self.regions.order <= _TABLE_ORDER:
                dtype = np.int16 if self.regions.n_regions < 2**15 else np.int32
                region_table = np.full(12 * 4**int(self.regions.order), -1, dtype=dtype)
                region_table[self.regions.cells] = self.regions.labels
                offset_type = np.int32 if self.n_slots < 2**31 else np.int64
                offset_table = (region_table.astype(offset_type) + 1) * self.n_mag_slots
            self._tables = (state, region_table, offset_table)
        return self._tables

    def region_of(self, pix: np.ndarray) -> np.ndarray:
        """Region label (-1 for none) of each pixel of ``pix_order``, int64."""
        cells = pix >> self.region_shift
        region_table = self.tables[1]
        if region_table is not None:
            return region_table[cells].astype(np.int64)
        known = self.regions.cells
        pos = np.minimum(np.searchsorted(known, cells), len(known) - 1)
        return np.where(known[pos] == cells, self.regions.labels[pos], -1).astype(np.int64)


@dataclass
class _BlockResult:
    """Partial tally of consecutive rows; id arrays only when the plan tracks ids."""

    histogram: np.ndarray
    ledger: Ledger
    columns: dict[str, np.ndarray]
    ids: np.ndarray | None = None
    # histogram index; -1 outside the footprint; -2 - k for a source the classifier left out,
    # k its index in the excluded histogram
    id_slot: np.ndarray | None = None
    id_wrapped: np.ndarray | None = None   # RA was normalised from [-180, 0)
    id_colpos: np.ndarray | None = None    # row in `columns`, -1 outside the footprint
    excluded: np.ndarray | None = None     # flat excluded histogram (with a classifier)


def _pixels(order: int, ra: np.ndarray, dec: np.ndarray) -> np.ndarray:
    """NEST pixel of each position at ``order`` (int64).

    healpy rather than cdshealpix (pixels identical): measured here on 2 cores, cdshealpix is
    faster on one thread (26-28 against 35-39 ns per position in blocks of 2**17) but holds
    the GIL, so the block pool cannot run it on two cores at once, and the whole tally of
    10^7 rows took 0.71-0.78 s with it against 0.57-0.62 s with healpy, which releases the
    GIL. tests/benchmarks/bench_tally.py re-measures both.
    """
    return hp.ang2pix(2**order, ra, dec, nest=True, lonlat=True)


def _in_pixel_order(mixed: np.ndarray, pix: np.ndarray) -> np.ndarray:
    """``mixed`` (row numbers) sorted by pixel.

    The footprint looks each position up by a binary search in its segment list (472 189
    segments, 3.8 MB for the benchmark's field with 500 holes); in pixel order consecutive
    searches touch nearby memory (measured: 5.1 to 4.1 ns per block row for ``contains``).
    """
    return mixed[np.argsort(pix[mixed])]  # ties in any order: results go back by row number


def _classify(plan: _Plan, valid: ValidChunk, inside: np.ndarray
              ) -> tuple[np.ndarray, int, int]:
    """Sources of the other class among those inside: (mask, how many, unclassified kept)."""
    threshold, population, _ = plan.classifier
    values = valid.classifier
    with np.errstate(invalid="ignore"):
        bad = (values < 0.0) | (values > 1.0) | np.isinf(values)
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"`classifier` values must be in [0, 1] (probability of being a star, or a 0/1 "
            f"flag; NaN for unclassified); got {float(values[row])!r} in '{valid.source}' at row "
            f"{int(valid.row_in_file[row])}"
        )
    with np.errstate(invalid="ignore"):
        star = values >= threshold
        other = star if population == "galaxies" else values < threshold  # NaN: kept
    other &= inside
    missing = int(np.count_nonzero(np.isnan(values) & inside))
    return other, int(np.count_nonzero(other)), missing


def _dereddened(plan: _Plan, valid: ValidChunk, rows: np.ndarray) -> np.ndarray:
    """Magnitudes of ``rows`` minus the extinction at their positions."""
    mag = valid.mag[rows]
    if plan.extinction is None or rows.size == 0:
        return mag
    extinction = plan.extinction.extinction_at(valid.ra[rows], valid.dec[rows])
    if np.isnan(extinction).any():
        row = int(rows[np.flatnonzero(np.isnan(extinction))[0]])
        raise InputError(
            f"`extinction` map has no E(B-V) at the source in '{valid.source}' row "
            f"{int(valid.row_in_file[row])} (RA {valid.ra[row]:.6f}, Dec {valid.dec[row]:.6f})"
        )
    return mag - extinction


def _region_offsets(plan: _Plan, pix: np.ndarray, offset_table: np.ndarray | None
                    ) -> tuple[np.ndarray, np.ndarray | None]:
    """(region + 1) * n_mag_slots of each pixel, and the region labels when looked up."""
    if offset_table is not None:
        return offset_table[pix >> plan.region_shift if plan.region_shift else pix], None
    region = plan.region_of(pix)
    return (region + 1) * plan.n_mag_slots, region


def _tally_block(plan: _Plan, chunk: CatalogChunk, valid: ValidChunk,
                 rejected: Mapping[str, int], notes: Mapping[str, int]) -> _BlockResult:
    """Footprint test, binning and histogram of one validated block."""
    n = valid.n_rows
    state_table, _, offset_table = plan.tables
    if n:
        pix = _pixels(plan.pix_order, valid.ra, valid.dec)
        state = state_table[pix >> plan.state_shift if plan.state_shift else pix]
        inside = state == _FULL
        mixed = np.flatnonzero(state == _MIXED)
        if mixed.size:
            mixed = _in_pixel_order(mixed, pix)
            inside[mixed] = plan.footprint.contains(valid.ra[mixed], valid.dec[mixed])
    else:
        pix = np.zeros(0, dtype=np.int64)
        state = np.zeros(0, dtype=np.int8)
        inside = np.zeros(0, dtype=bool)
        mixed = np.zeros(0, dtype=np.int64)
    n_inside = int(np.count_nonzero(inside))
    excluded_histogram = excluded_slot = None
    other_rows = np.zeros(0, dtype=np.int64)
    n_other = n_missing = 0
    if plan.classifier is not None and n:
        other, n_other, n_missing = _classify(plan, valid, inside)
        if n_other:
            inside = inside & ~other
            other_rows = np.flatnonzero(other)
    sel = np.flatnonzero(inside)
    pix_in = pix[sel]
    mag_in = _dereddened(plan, valid, sel)
    slot = plan.mag.slots(mag_in)
    offset, region = _region_offsets(plan, pix_in, offset_table)
    slot += offset
    if plan.redshift_edges is not None:
        z = valid.redshift[sel]
        z_slot = np.searchsorted(plan.redshift_edges, z, side="right") - 1
        z_slot[(z_slot < 0) | (z_slot >= plan.n_z_slots - 1)] = plan.n_z_slots - 1
        slot = slot * plan.n_z_slots + z_slot
    histogram = np.bincount(slot, minlength=plan.n_slots).astype(np.int64, copy=False)
    if plan.classifier is not None:
        n_excluded_slots = (plan.regions.n_regions + 1) * plan.n_mag_slots
        excluded_slot = plan.mag.slots(_dereddened(plan, valid, other_rows))
        excluded_slot += _region_offsets(plan, pix[other_rows], offset_table)[0]
        excluded_histogram = np.bincount(excluded_slot, minlength=n_excluded_slots).astype(
            np.int64, copy=False)

    columns: dict[str, np.ndarray] = {}
    for name in plan.columns:
        if name == "region":
            if region is None:
                region = plan.region_of(pix_in)
            columns[name] = region.astype(np.int32)
        elif name == "coverage":
            coverage = (state == _FULL).astype(np.float32)
            if mixed.size:
                coverage[mixed] = plan.footprint.weight_at(valid.ra[mixed], valid.dec[mixed])
            columns[name] = coverage[sel]
        elif name == "cell":
            columns[name] = _cells(plan, pix_in, valid, sel)
        elif name == "mag":
            columns[name] = mag_in.astype(np.float32)
        else:
            columns[name] = getattr(valid, name)[sel].astype(np.float32)

    ledger = Ledger.from_chunk(valid, rejected, notes, inside)
    if plan.classifier is not None:
        reason = plan.classifier[2]
        ledger = Ledger(
            rows_read=ledger.rows_read,
            rows_in_footprint=ledger.rows_in_footprint,
            rows_outside_footprint=n - n_inside,
            rows_rejected={**ledger.rows_rejected,
                           reason: ledger.rows_rejected.get(reason, 0) + n_other},
            notes={**ledger.notes,
                   NOTE_CLASSIFIER_MISSING: ledger.notes.get(NOTE_CLASSIFIER_MISSING, 0)
                   + n_missing},
        )
    result = _BlockResult(histogram, ledger, columns, excluded=excluded_histogram)
    if plan.track_ids and valid.id is not None:
        # int32 halves what every task sends back per id (slots and block rows fit easily).
        index_type = np.int32 if plan.n_slots < 2**31 else np.int64
        full_slot = np.full(n, -1, dtype=index_type)
        full_slot[sel] = slot
        if other_rows.size:
            full_slot[other_rows] = -2 - excluded_slot
        colpos = np.full(n, -1, dtype=np.int64)
        colpos[sel] = np.arange(sel.size)
        ra, missing = chunk.ra, chunk.id_missing
        if n != chunk.n_rows:  # some rows rejected: the kept rows' positions in the chunk
            kept = valid.row_in_file - chunk.row_offset
            ra = ra[kept]
            missing = None if missing is None else missing[kept]
        if missing is not None and missing.any():
            where = np.flatnonzero(~missing)
            result.ids = valid.id[where]
            result.id_slot = full_slot[where]
            result.id_wrapped = ra[where] < 0.0
            result.id_colpos = colpos[where]
        else:  # every kept row has an id (the usual case): no gathers
            result.ids = np.array(valid.id)  # a copy: a view would hold Arrow's whole batch
            result.id_slot = full_slot
            result.id_wrapped = ra < 0.0
            result.id_colpos = colpos
    return result


def _cells(plan: _Plan, pix_in: np.ndarray, valid: ValidChunk, sel: np.ndarray) -> np.ndarray:
    """NEST cell of :data:`CELL_ORDER` of each kept source (int32)."""
    if plan.pix_order >= CELL_ORDER:
        return (pix_in >> (2 * (plan.pix_order - CELL_ORDER))).astype(np.int32)
    return _pixels(CELL_ORDER, valid.ra[sel], valid.dec[sel]).astype(np.int32)


def _validate_and_tally(plan: _Plan, chunk: CatalogChunk) -> _BlockResult:
    valid, rejected, notes = validate_chunk(chunk, plan.rules, copy=False)
    return _tally_block(plan, chunk, valid, rejected, notes)


class _Accumulator:
    """Sums block results in order: histogram, ledger, columns (and ids for the driver)."""

    def __init__(self, plan: _Plan):
        self.plan = plan
        self.histogram = np.zeros(plan.n_slots, dtype=np.int64)
        self.ledger = Ledger()
        self.columns: dict[str, list[np.ndarray]] = {k: [] for k in plan.columns}
        self.excluded: np.ndarray | None = None
        self.n_kept_columns = 0
        self.id_parts: list[tuple[np.ndarray, ...]] = []

    def add(self, block: _BlockResult) -> None:
        self.histogram += block.histogram
        self.excluded = _add_optional(self.excluded, block.excluded)
        self.ledger = self.ledger + block.ledger
        n_in = block.ledger.rows_in_footprint
        for name, values in block.columns.items():
            self.columns[name].append(values)
        if block.ids is not None:
            colpos = np.where(block.id_colpos >= 0, block.id_colpos + self.n_kept_columns, -1)
            if self.n_kept_columns + n_in < 2**31:
                colpos = colpos.astype(np.int32)
            self.id_parts.append((block.ids, block.id_slot, block.id_wrapped, colpos))
        self.n_kept_columns += n_in

    def result(self) -> _BlockResult:
        columns = {k: _concat(v, COLUMNS[k]) for k, v in self.columns.items()}
        out = _BlockResult(self.histogram, self.ledger, columns, excluded=self.excluded)
        if self.plan.track_ids:
            if self.id_parts:
                ids, slot, wrapped, colpos = (np.concatenate(p) for p in zip(*self.id_parts,
                                                                            strict=True))
            else:
                ids = np.zeros(0, dtype=np.int64)
                slot = colpos = np.zeros(0, dtype=np.int64)
                wrapped = np.zeros(0, dtype=bool)
            out.ids, out.id_slot, out.id_wrapped, out.id_colpos = ids, slot, wrapped, colpos
        return out


def _concat(parts: list[np.ndarray], dtype: Any) -> np.ndarray:
    return np.concatenate(parts) if parts else np.zeros(0, dtype=dtype)


def _blocks(chunk: CatalogChunk, block_rows: int) -> Iterator[CatalogChunk]:
    """Consecutive slices (views) of a chunk of at most ``block_rows`` rows."""
    n = chunk.n_rows
    if n <= block_rows:
        yield chunk
        return
    names = ("ra", "dec", "mag", "redshift", "mag_error", "stellar_mass", "id", "id_missing",
             "weight", "classifier", "redshift_error")
    for start in range(0, n, block_rows):
        stop = start + block_rows
        arrays = {k: (None if getattr(chunk, k) is None else getattr(chunk, k)[start:stop])
                  for k in names}
        yield CatalogChunk(source=chunk.source, row_offset=chunk.row_offset + start, **arrays)


# --------------------------------------------------------------------------------------------
# Progress
# --------------------------------------------------------------------------------------------


def _progress_bar(progress: bool | None, total: int | None, desc: str) -> Any:
    from tqdm import tqdm

    enabled = sys.stderr.isatty() if progress is None else bool(progress)
    return tqdm(total=total, unit="rows", unit_scale=True, desc=desc, file=sys.stderr,
                disable=not enabled, dynamic_ncols=True, leave=False)


# --------------------------------------------------------------------------------------------
# Local engine
# --------------------------------------------------------------------------------------------


def _run_local(summary: _catalog.CatalogSummary, plan: _Plan, chunk_rows: int, threads: int,
               bar: Any) -> _BlockResult:
    """Read in order on this thread; tally blocks on a thread pool; sum in order.

    ``summary`` is the catalogue's fresh check (its files, formats and column mappings).
    With ids, validation (which keeps the shared registry of seen ids) stays on this thread
    in catalogue order; without, it runs on the pool with the rest of the block's work.
    """
    acc = _Accumulator(plan)
    has_ids = any("id" in dict(info.mapping) for info in summary.files)
    seen = SeenIds() if has_ids else None
    _ = plan.tables  # built once here, before any thread needs them
    # Chunks no larger than a block: Parquet is then read in batches of BLOCK_ROWS, which is
    # both faster and smaller than large batches (measured, 10^7 rows in row groups of 10^6:
    # read + conversion 0.13-0.16 s and Arrow's peak 20 MB in batches of 131 072 rows, against
    # 0.22-0.28 s and 127-151 MB in batches of 2x10^6, whose buffers are fresh memory each
    # time).
    read_rows = min(chunk_rows, BLOCK_ROWS)

    def chunks(use_threads: bool) -> Iterator[CatalogChunk]:
        for info in summary.files:
            yield from _catalog.iter_file_chunks(info, read_rows, use_threads=use_threads)

    def consume(block: _BlockResult) -> None:
        acc.add(block)
        bar.update(block.ledger.rows_read)

    if threads <= 1:
        for chunk in chunks(use_threads=True):
            for block in _blocks(chunk, BLOCK_ROWS):
                valid, rejected, notes = validate_chunk(block, plan.rules, seen, copy=False)
                consume(_tally_block(plan, block, valid, rejected, notes))
        return acc.result()

    pending: deque[Any] = deque()
    pool = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="countscale-tally")
    try:
        # The pool keeps the cores busy; pyarrow's own decoding threads would only compete.
        for chunk in chunks(use_threads=False):
            for block in _blocks(chunk, BLOCK_ROWS):
                if has_ids:
                    valid, rejected, notes = validate_chunk(block, plan.rules, seen,
                                                            copy=False)
                    pending.append(pool.submit(_tally_block, plan, block, valid, rejected,
                                               notes))
                else:
                    pending.append(pool.submit(_validate_and_tally, plan, block))
                # A short queue bounds memory to a few blocks and keeps columns in order.
                while len(pending) > 2 * threads:
                    consume(pending.popleft().result())
        while pending:
            consume(pending.popleft().result())
    finally:
        for future in pending:
            future.cancel()
        pool.shutdown(wait=True, cancel_futures=True)
    return acc.result()


# --------------------------------------------------------------------------------------------
# Dask engine
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Unit:
    """One Dask task's rows: a file, or consecutive row groups of a Parquet file."""

    index: int
    info: _catalog.FileSummary
    row_groups: tuple[int, ...] | None
    n_rows: int | None


def _plan_units(summary: _catalog.CatalogSummary) -> list[_Unit]:
    units: list[_Unit] = []
    for info in summary.files:
        if info.format != "parquet":
            units.append(_Unit(len(units), info, None, info.n_rows))
            continue
        pf = pq.ParquetFile(info.path)
        try:
            sizes = [pf.metadata.row_group(i).num_rows for i in range(pf.num_row_groups)]
        finally:
            pf.close()
        group: list[int] = []
        offset = start = 0
        for i, size in enumerate(sizes):
            group.append(i)
            offset += size
            if offset - start >= _TASK_ROWS or i == len(sizes) - 1:
                units.append(_Unit(len(units), info, tuple(group), offset - start))
                group, start = [], offset
        if not sizes:
            units.append(_Unit(len(units), info, (), 0))
    return units


def _run_unit(plan: _Plan, unit: _Unit) -> _BlockResult:
    """A Dask task: read, validate (ids against this task's rows only), tally."""
    acc = _Accumulator(plan)
    seen = SeenIds() if plan.track_ids else None
    # A worker is one thread by design: pyarrow decodes on it too.
    for chunk in _catalog.iter_file_chunks(unit.info, BLOCK_ROWS, unit.row_groups,
                                           use_threads=False):
        valid, rejected, notes = validate_chunk(chunk, plan.rules, seen, copy=False)
        acc.add(_tally_block(plan, chunk, valid, rejected, notes))
    return acc.result()


class _TaskIds:
    """Ids kept by earlier Dask tasks, for the driver: which of a task's ids are new.

    Every task's ids are unique within the task. Catalogues usually give each file or row
    group its own id range; a task whose [min, max] overlaps no earlier task's range cannot
    repeat an earlier id, so only its range is recorded, with a way to fetch its ids later
    (they stay on the worker). Tasks that do overlap go, with the earlier tasks they overlap,
    into one :class:`~countscale.catalog.SeenIds`, which finds the repeats exactly. Text ids
    always take that path.

    Invariant: the ranges of the ``fast`` tasks are disjoint from each other and from every
    range in ``slow_ranges``.
    """

    def __init__(self) -> None:
        self.fast_lo: list[Any] = []                        # sorted starts of fast ranges
        self.fast: list[tuple[Any, Any, Any]] = []          # (lo, hi, fetch ids), same order
        self.slow = SeenIds()
        self.slow_ranges: list[tuple[Any, Any]] = []        # sorted, disjoint (merged)

    @staticmethod
    def _overlapping(ranges: Sequence[tuple[Any, ...]], lo: Any, hi: Any) -> list[int]:
        # Sorted disjoint ranges: only those starting at or before hi can overlap, and of
        # those, the last ones whose end reaches lo.
        i = bisect.bisect_right([r[0] for r in ranges], hi)
        out = []
        while i > 0 and ranges[i - 1][1] >= lo:
            out.append(i - 1)
            i -= 1
        return out

    def _add_slow_range(self, lo: Any, hi: Any) -> None:
        hit = self._overlapping(self.slow_ranges, lo, hi)
        for i in hit:
            lo, hi = min(lo, self.slow_ranges[i][0]), max(hi, self.slow_ranges[i][1])
        for i in sorted(hit, reverse=True):
            del self.slow_ranges[i]
        bisect.insort(self.slow_ranges, (lo, hi), key=lambda r: r[0])

    def keep_first(self, id_range: tuple[Any, Any] | None, fetch: Any) -> np.ndarray | None:
        """First-occurrence mask of a task's ids, or None when all are new.

        Parameters
        ----------
        id_range : (min, max) or None
            None for text ids (no ranges).
        fetch : callable
            Returns the task's ids; called now only when the range overlaps an earlier one,
            later when a later task overlaps this one.
        """
        if id_range is None:
            return self.slow.keep_first(fetch())
        lo, hi = id_range
        fast_hits = self._overlapping(self.fast, lo, hi)
        if not fast_hits and not self._overlapping(self.slow_ranges, lo, hi):
            i = bisect.bisect_left(self.fast_lo, lo)
            self.fast_lo.insert(i, lo)
            self.fast.insert(i, (lo, hi, fetch))
            return None
        for i in sorted(fast_hits, reverse=True):
            run_lo, run_hi, run_fetch = self.fast.pop(i)
            del self.fast_lo[i]
            self.slow.keep_first(run_fetch())  # disjoint from everything slow: all new
            self._add_slow_range(run_lo, run_hi)
        first = self.slow.keep_first(fetch())
        self._add_slow_range(lo, hi)
        return first


def _summary_part(part: _BlockResult) -> tuple[_BlockResult, Any]:
    """On the worker: what the driver always needs (counts, ledger, columns, the id range)."""
    small = _BlockResult(part.histogram, part.ledger, part.columns, excluded=part.excluded)
    if part.ids is None or part.ids.size == 0:
        return small, "none"
    if part.ids.dtype == object:
        return small, None
    return small, (part.ids.min(), part.ids.max())


def _ids_part(part: _BlockResult) -> np.ndarray:
    return part.ids


def _duplicate_details(part: _BlockResult, dup: np.ndarray) -> tuple[np.ndarray, ...]:
    """On the worker: histogram slot, wrapped flag and column row of the rejected rows."""
    return part.id_slot[dup], part.id_wrapped[dup], part.id_colpos[dup]


def _reject_duplicates(part: _BlockResult, slot: np.ndarray, wrapped: np.ndarray,
                       colpos: np.ndarray) -> _BlockResult:
    """Move rows that repeat an id kept by an earlier task to ``duplicate_id``.

    Each task found duplicates among its own rows; the first kept row of an id in the whole
    catalogue is the first kept row of the first task that has it, so passing the tasks' kept
    ids through one registry in task order gives exactly the sequential ledger.
    """
    n_dup = len(slot)
    inside = slot >= 0
    n_in = int(np.count_nonzero(inside))
    histogram = part.histogram - np.bincount(slot[inside], minlength=len(part.histogram))
    rejected = dict(part.ledger.rows_rejected)
    rejected["duplicate_id"] = rejected.get("duplicate_id", 0) + n_dup
    # Sources the classifier had left out: the duplicate rule comes first (as when tallied
    # in one pass), so they move from the classifier's reason to duplicate_id.
    other = slot <= -2
    n_other = int(np.count_nonzero(other))
    excluded = part.excluded
    if n_other:
        excluded = excluded - np.bincount(-2 - slot[other], minlength=len(excluded))
        reason = next(r for r in CLASSIFIER_REASONS.values() if r in rejected)
        rejected[reason] -= n_other
    notes = dict(part.ledger.notes)
    n_wrapped = int(np.count_nonzero(wrapped))
    if n_wrapped:
        notes[NOTE_RA_WRAPPED] = notes.get(NOTE_RA_WRAPPED, 0) - n_wrapped
    ledger = Ledger(
        rows_read=part.ledger.rows_read,
        rows_in_footprint=part.ledger.rows_in_footprint - n_in,
        rows_outside_footprint=part.ledger.rows_outside_footprint - (n_dup - n_in - n_other),
        rows_rejected=rejected,
        notes=notes,
    )
    keep = np.ones(part.ledger.rows_in_footprint, dtype=bool)
    keep[colpos[inside]] = False
    columns = {k: v[keep] for k, v in part.columns.items()}
    return _BlockResult(histogram, ledger, columns, excluded=excluded)


#: How long to try reaching a scheduler before giving up.
_CONNECT_TIMEOUT = "10s"

#: Dask's nanny starts workers with MALLOC_TRIM_THRESHOLD_=65536, which also pins glibc's
#: mmap threshold at its 128 kB default, so every block-sized numpy temporary is mapped and
#: unmapped again (page faults): measured here, a task ran 1.9x slower than in the driver.
#: Raising the mmap threshold to 64 MiB restores the driver's speed (the trim threshold, which
#: returns freed memory to the OS, is kept). Set for the local cluster this module starts; see
#: the README for a cluster of one's own.
_MMAP_KEY = "distributed.nanny.pre-spawn-environ.MALLOC_MMAP_THRESHOLD_"
_MMAP_THRESHOLD_BYTES = 64 * 2**20


def _cluster_error(scheduler: str, exc: BaseException) -> InputError:
    first_line = (str(exc).strip() or type(exc).__name__).splitlines()[0]
    return InputError(
        f"`scheduler`: cannot connect to the Dask scheduler at '{scheduler}' ({first_line})"
    )


@contextlib.contextmanager
def _dask_client(scheduler: Any) -> Iterator[Any]:
    try:
        import distributed
    except ImportError as exc:
        raise InputError(
            "`engine` 'dask' needs the optional packages dask and distributed "
            "(pip install 'countscale[cluster]')"
        ) from exc
    if isinstance(scheduler, distributed.Client):
        yield scheduler
        return
    if scheduler is None:
        import dask

        # One single-threaded worker process per core, on loopback only (no network needed;
        # the dashboard, when bokeh is installed, on a free loopback port).
        n_workers = max(1, os.cpu_count() or 1)
        with (dask.config.set({_MMAP_KEY: _MMAP_THRESHOLD_BYTES}),
              distributed.LocalCluster(n_workers=n_workers, threads_per_worker=1,
                                       processes=True, host="127.0.0.1",
                                       dashboard_address="127.0.0.1:0") as cluster,
              distributed.Client(cluster) as client):
            yield client
        return
    try:
        client = distributed.Client(scheduler, timeout=_CONNECT_TIMEOUT)
    except (OSError, TimeoutError, ValueError) as exc:
        raise _cluster_error(scheduler, exc) from exc
    try:
        yield client
    finally:
        client.close()


def _run_dask(summary: _catalog.CatalogSummary, plan: _Plan, scheduler: Any, bar: Any
              ) -> _BlockResult:
    """One task per unit; the driver sums the tasks' tallies in catalogue order.

    A task's full result stays on its worker; the driver fetches the counts, ledger and
    columns, and an id range. Ids cross the network only when ranges overlap (see
    :class:`_TaskIds`), and the rows of repeated ids only when there are some.
    """
    units = _plan_units(summary)
    acc = _Accumulator(plan)
    registry = _TaskIds()
    with _dask_client(scheduler) as client:
        n_workers = max(1, len(client.scheduler_info().get("workers", {})))
        # The footprint (a few MB) goes to every worker once, not once per task.
        plan_future = client.scatter(plan, broadcast=True, hash=False)
        pending: deque[Any] = deque()
        queue = deque(units)
        # Results wait on the workers until the driver takes them in order; a window of a few
        # tasks per worker keeps every worker busy and bounds what waits.
        window = 4 * n_workers + 2
        try:
            while queue or pending:
                while queue and len(pending) < window:
                    full = client.submit(_run_unit, plan_future, queue.popleft(), pure=False)
                    # Without ids the whole result is small enough to fetch at once.
                    small = (client.submit(_summary_part, full, pure=False) if plan.track_ids
                             else full)
                    pending.append((full, small))
                full, small = pending.popleft()
                if plan.track_ids:
                    part, id_range = small.result()
                    small.release()
                else:
                    part, id_range = small.result(), "none"
                if id_range != "none":
                    # The ids stay on the worker in their own future, which the registry
                    # holds (its `result` method) as long as a later task might overlap them.
                    ids_future = client.submit(_ids_part, full, pure=False)
                    first = registry.keep_first(id_range, ids_future.result)
                    if first is not None and not first.all():
                        details = client.submit(_duplicate_details, full, ~first,
                                                pure=False).result()
                        part = _reject_duplicates(part, *details)
                    del ids_future
                full.release()
                acc.add(part)
                bar.update(part.ledger.rows_read)
        finally:
            for full, small in pending:
                client.cancel(list({full, small}))
    return acc.result()


# --------------------------------------------------------------------------------------------
# Entry point
# --------------------------------------------------------------------------------------------


def _columns_iv(columns: Any, source: CatalogSource) -> tuple[str, ...]:
    available = [c for c in COLUMNS if c in ("coverage", "region", "cell")
                 or getattr(source, c, None) is not None]
    if columns is None:
        # ``cell`` only on request: it serves the sky model, not every caller; positions
        # likewise (8 bytes per source, for completeness from a depth map).
        return tuple(c for c in available if c not in ("cell", "ra", "dec"))
    if isinstance(columns, str) or not isinstance(columns, Sequence | set | frozenset):
        raise InputTypeError(f"`columns` must be a list of column names; got {columns!r}")
    out = []
    for name in columns:
        if name not in COLUMNS:
            raise InputError(
                f"`columns` entries must be among {', '.join(COLUMNS)}; got {name!r}"
            )
        if name not in available:
            raise InputError(
                f"`columns`: {name!r} needs a `{name}` column mapped in the catalogue source"
            )
        if name not in out:
            out.append(name)
    return tuple(out)


def tally(source: CatalogSource, footprint: Footprint, *, regions: Regions | None = None,
          n_regions: int = 24, mag_bins: Any = None, redshift_bins: Any = None,
          columns: Sequence[str] | None = None, engine: str = "local", scheduler: Any = None,
          chunk_rows: int = 2_000_000, threads: int | None = None,
          progress: bool | None = None, extinction: Any = None) -> Tally:
    """Count the catalogue's sources in the footprint per region and magnitude bin.

    Parameters
    ----------
    source : countscale.catalog.CatalogSource
        The catalogue files and column mapping. Every file is checked before any row is read.
    footprint : countscale.footprint.Footprint
    regions : countscale.footprint.Regions, optional
        Jackknife regions; default ``footprint.split(n_regions)``.
    n_regions : int
        Number of regions when ``regions`` is not given (default 24, the run file's
        ``[variance].regions`` default).
    mag_bins : mapping {start, stop, width}, or sequence of increasing edges, optional
        Magnitude bins (AB). Default: :data:`DEFAULT_MAG_GRID`, trimmed to the occupied bins.
    redshift_bins : mapping {start, stop, width}, or sequence of increasing edges, optional
        Adds a redshift axis to the histogram (needs a ``redshift`` column).
    columns : sequence of str, optional
        Per-source columns to keep for in-footprint sources (names from :data:`COLUMNS`);
        default every one the source can give except ``cell`` (the NEST cell of
        :data:`CELL_ORDER`) and the positions ``ra``, ``dec``, kept only when asked for.
        ``()`` keeps none, so memory does not grow with the catalogue; each kept column costs
        4 bytes per in-footprint source (8 while the blocks are joined at the end).
    engine : {"local", "dask"}
        ``"local"``: this process. ``"dask"``: a ``distributed`` cluster (see ``scheduler``);
        integer counts, ledger and columns are identical to the local engine's.
    scheduler : str or distributed.Client, optional
        For ``engine="dask"``: a scheduler address (``"tcp://host:8786"``), a connected
        client, or None for a ``LocalCluster`` of one single-threaded worker process per core.
    chunk_rows : int
        Most rows read at a time by the local engine (memory bound). It reads at most
        :data:`BLOCK_ROWS` at a time in any case, so only a smaller value changes anything.
    threads : int, optional
        Threads tallying blocks in the local engine; default ``min(4, os.cpu_count())``;
        1 runs everything on the calling thread.
    progress : bool, optional
        Show a tqdm bar on stderr; default only when stderr is a terminal.
    extinction : countscale.extinction.ExtinctionMap, optional
        Deredden every in-footprint source (see "Extinction and star/galaxy classification" in
        the module docstring). The map must have a value at every pixel of the footprint.

    Returns
    -------
    Tally
        Checked: the ledger balances and the histogram holds exactly the in-footprint rows.

    Raises
    ------
    InputError, InputTypeError
        Bad arguments; catalogue problems as raised by :mod:`countscale.catalog`
        (missing file or column, text in a numeric column, ...); no row left in the footprint
        (:func:`countscale.catalog.require_rows`); an unreachable Dask scheduler.

    Warns
    -----
    TallyWarning
        In-footprint sources fall in no region (``regions`` from another footprint).
    countscale.catalog.CatalogWarning
        From the catalogue check (files with different columns, empty files).
    """
    if not isinstance(source, CatalogSource):
        raise InputTypeError(f"`source` must be a CatalogSource; got {type(source).__name__}")
    if not isinstance(footprint, Footprint):
        raise InputTypeError(f"`footprint` must be a Footprint; got {type(footprint).__name__}")
    if footprint.area_sr <= 0:
        raise InputError("`footprint` is empty (area 0); nothing can be counted in it")
    if engine not in ENGINES:
        raise InputError(f"`engine` must be one of {', '.join(ENGINES)}; got {engine!r}")
    if scheduler is not None and engine != "dask":
        raise InputError(f"`scheduler` is only used with engine 'dask'; got engine {engine!r}")
    chunk_rows = _catalog.check_chunk_rows(chunk_rows)
    if threads is None:
        threads = min(4, os.cpu_count() or 1)
    if isinstance(threads, bool) or not isinstance(threads, int | np.integer) or threads < 1:
        raise InputError(f"`threads` must be an integer >= 1; got {threads!r}")
    if regions is None:
        regions = footprint.split(n_regions)
    elif not isinstance(regions, Regions):
        raise InputTypeError(f"`regions` must be Regions; got {type(regions).__name__}")
    if mag_bins is None:
        mag_edges = _uniform_edges(*DEFAULT_MAG_GRID, "mag_bins")
        grid = "default"
    else:
        mag_edges = _edges_iv(mag_bins, "mag_bins")
        grid = "given"
    redshift_edges = None
    if redshift_bins is not None:
        if source.redshift is None:
            raise InputError("`redshift_bins` needs a `redshift` column in the catalogue source")
        redshift_edges = _edges_iv(redshift_bins, "redshift_bins")
    kept = _columns_iv(columns, source)
    extinction_summary = None
    if extinction is not None:
        from countscale.extinction import ExtinctionMap

        if not isinstance(extinction, ExtinctionMap):
            raise InputTypeError(
                f"`extinction` must be an ExtinctionMap; got {type(extinction).__name__}")
        extinction.check_covers(footprint, where="`extinction`")
        extinction_summary = extinction.summary(footprint)
    classifier = None
    if getattr(source, "classifier", None) is not None:
        classifier = (source.classifier_threshold, source.population,
                      CLASSIFIER_REASONS[source.population])

    plan = _Plan(footprint, regions, mag_edges, redshift_edges, kept, source.rules(),
                 track_ids=engine == "dask" and source.id is not None, extinction=extinction,
                 classifier=classifier)
    summary = source.check()
    with contextlib.ExitStack() as stack:
        pending_summary = None
        if engine == "dask" or threads > 1:
            # The footprint's summary (0.1-0.2 s for a footprint with many holes: it counts
            # the MOC cells) is needed only at the end; work it out beside the counting.
            helper = stack.enter_context(
                ThreadPoolExecutor(max_workers=1, thread_name_prefix="countscale-summary"))
            pending_summary = helper.submit(footprint.summary)
        with _progress_bar(progress, summary.n_rows_known, "tally") as bar:
            if engine == "local":
                part = _run_local(summary, plan, chunk_rows, int(threads), bar)
            else:
                part = _run_dask(summary, plan, scheduler, bar)
        footprint_summary = (footprint.summary() if pending_summary is None
                             else pending_summary.result())

    n_mag, n_z = len(mag_edges) - 1, plan.n_z_slots - 1
    excluded = None
    if classifier is not None:
        excluded = (np.zeros((regions.n_regions + 1) * plan.n_mag_slots, dtype=np.int64)
                    if part.excluded is None else part.excluded)
        excluded = excluded.reshape(regions.n_regions + 1, n_mag + 2)
    # The summary holds the footprint's area and its uncertainty (the same properties).
    area_deg2 = footprint_summary.get("area_deg2")
    area_uncertainty_deg2 = footprint_summary.get("area_uncertainty_deg2")
    result = Tally(
        ledger=part.ledger,
        mag_edges=mag_edges,
        histogram=part.histogram.reshape(regions.n_regions + 1, n_mag + 2, n_z + 1),
        regions=regions,
        region_area_deg2=np.asarray(regions.area_deg2, dtype=np.float64),
        area_deg2=footprint.area_deg2 if area_deg2 is None else area_deg2,
        area_uncertainty_deg2=(footprint.area_uncertainty_deg2 if area_uncertainty_deg2 is None
                               else area_uncertainty_deg2),
        footprint_summary=footprint_summary,
        columns=part.columns,
        redshift_edges=redshift_edges,
        mag_grid=grid,
        excluded_histogram=excluded,
        excluded_reason=None if classifier is None else classifier[2],
        extinction=extinction_summary,
    ).check()
    _catalog.require_rows(result.ledger)
    if result.n_unassigned:
        warnings.warn(
            f"{result.n_unassigned} in-footprint sources fall in no region's cell; were the "
            "regions split from this footprint?", TallyWarning, stacklevel=2)
    return result.trimmed() if grid == "default" else result
