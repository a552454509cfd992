"""Survey footprints: multi-order HEALPix coverage with exact-to-the-boundary area.

A `Footprint` is the part of the sky a survey saw, as a coverage fraction over HEALPix NEST
cells (IVOA MOC semantics): whole cells wherever the coverage is complete or empty, and
fractional cells of the finest order (`max_order`) only along boundaries, so memory grows
with the length of the boundary, not with the area. Areas sum those fractions, so partial
cells count for the part they cover, not all-or-nothing by their centre.

Topics
------
Building
    `Footprint.full_sky`, `empty`, `cap`, `box`, `polygon`, `galactic_latitude`, `circles`,
    `read_circles` (bright-star holes), `from_healpix`, `read_healpix_map`, `read_moc`,
    `from_positions` (occupancy), `from_runfile_section`.
Set algebra
    ``a | b`` union, ``a & b`` intersection, ``a - b`` difference.
Measuring
    `area_deg2`, `area_sr`, `sky_fraction`, `area_uncertainty_deg2`, `n_cells`.
Asking about positions
    `contains`, `weight_at`, `random_points`.
Dividing and mapping
    `split` (contiguous near-equal-area regions, for jackknife errors), `coverage_cells`,
    `to_healpix`, `mask_power_spectrum`.
Writing
    `write_moc`, `write_healpix`.

Representation
--------------
A step function over NEST indices at `max_order`: sorted `edges` and, for each segment
``[edges[i], edges[i+1])``, a coverage `weight` in [0, 1] and a `sigma` such that the area
variance is sum(length * (cell_area * sigma)**2). Sigma records how well a boundary is known:
zero for shapes measured in closed form, about 1/sqrt(12) of a map pixel along the edge of a
thresholded map (the true edge can be anywhere in the pixel).

Examples
--------
>>> from countscale.footprint import Footprint
>>> field = Footprint.box((200.0, 202.0), (31.0, 33.0), max_order=14)
>>> holes = Footprint.circles([201.0], [32.0], [60.0], max_order=14)
>>> round((field - holes).area_deg2, 4)
3.3911
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path

import numpy as np

from countscale import _geometry as geo
from countscale._io import atomic_path
from countscale.errors import InputError, InputTypeError

#: Default finest HEALPix order: nside 65536, cells of 3.2 arcsec.
DEFAULT_MAX_ORDER = 16

#: 4 pi steradians in square degrees.
FULL_SKY_DEG2 = 4.0 * np.pi * (180.0 / np.pi) ** 2

_SR_TO_DEG2 = (180.0 / np.pi) ** 2

#: Standard deviation of the covered fraction of a pixel on the edge of a thresholded map:
#: the true edge is anywhere in the pixel, a uniform error of +-1/2 pixel (sd 1/sqrt(12)).
_THRESHOLD_EDGE_SIGMA = 1.0 / np.sqrt(12.0)


def cell_area_sr(order):
    """Area of one HEALPix cell of `order`: 4 pi / (12 * 4**order) sr (Gorski et al. 2005)."""
    return 4.0 * np.pi / (12.0 * 4.0**order)


# ----------------------------------------------------------------------------------------
# validation
# ----------------------------------------------------------------------------------------
def _check_order(name, order):
    if isinstance(order, bool) or not isinstance(order, int | np.integer):
        raise InputTypeError(f"`{name}` must be an integer HEALPix order; got {order!r}")
    if not 0 <= order <= geo.HEALPIX_MAX_ORDER:
        raise InputError(f"`{name}` must be in [0, {geo.HEALPIX_MAX_ORDER}]; got {order}")
    return int(order)


def _as_float_array(name, values):
    try:
        arr = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise InputTypeError(f"`{name}` must be numeric; got {values!r:.60}") from None
    return arr


def _check_positions(ra, dec, ra_name="ra", dec_name="dec"):
    ra = np.atleast_1d(_as_float_array(ra_name, ra))
    dec = np.atleast_1d(_as_float_array(dec_name, dec))
    if ra.shape != dec.shape:
        raise InputError(
            f"`{ra_name}` and `{dec_name}` must have the same shape; got {ra.shape} and {dec.shape}"
        )
    bad = ~np.isfinite(ra)
    if np.any(bad):
        raise InputError(f"`{ra_name}` must be finite; got {ra[bad][0]}")
    bad = ~np.isfinite(dec) | (dec < -90.0) | (dec > 90.0)
    if np.any(bad):
        raise InputError(f"`{dec_name}` must be in [-90, 90] degrees; got {dec[bad][0]}")
    return ra % 360.0, dec


def _check_radius_deg(name, radius):
    radius = np.atleast_1d(_as_float_array(name, radius))
    bad = ~np.isfinite(radius) | (radius <= 0.0) | (radius > 180.0)
    if np.any(bad):
        raise InputError(f"`{name}` must be in (0, 180] degrees; got {radius[bad][0]}")
    return radius


def _nside_to_order(name, nside):
    if isinstance(nside, bool) or not isinstance(nside, int | np.integer) or nside < 1:
        raise InputError(f"`{name}` must be a positive power of two; got {nside!r}")
    order = int(nside).bit_length() - 1
    if 2**order != nside:
        raise InputError(f"`{name}` must be a power of two for NEST ordering; got {nside}")
    return _check_order(name, order)


# ----------------------------------------------------------------------------------------
# step-function helpers
# ----------------------------------------------------------------------------------------
_EMPTY_EDGES = np.zeros(0, dtype=np.int64)
_EMPTY_W = np.zeros(0, dtype=np.float32)


def _canonical(edges, weight, sigma):
    """Drop empty segments, merge equal neighbours, trim zero-weight ends.

    Written to copy each array once at most: footprints with 10^5 holes hold ~10^7
    segments, and these copies set the peak memory of building them.
    """
    if len(weight) == 0:
        return _EMPTY_EDGES, _EMPTY_W, None
    edges = np.asarray(edges, dtype=np.int64)
    weight = np.asarray(weight, dtype=np.float32)
    sigma = None if sigma is None else np.asarray(sigma, np.float32)
    if sigma is not None and not np.any(sigma):
        sigma = None
    # A segment starts a new run unless it is empty or continues its neighbour's values.
    # Boolean masks, not index arrays: a mask costs 1 byte per segment, an index 8.
    keep = np.diff(edges) > 0
    if not keep.all():
        starts = edges[:-1][keep]
        weight = weight[keep]
        sigma = None if sigma is None else sigma[keep]
        if len(weight) == 0:
            return _EMPTY_EDGES, _EMPTY_W, None
    else:
        starts = edges[:-1]
    del keep
    # Compared after dropping empty segments, so an empty segment between two equal ones
    # does not split them.
    new = np.ones(len(weight), dtype=bool)
    np.not_equal(weight[1:], weight[:-1], out=new[1:])
    if sigma is not None:
        new[1:] |= sigma[1:] != sigma[:-1]
    if not new.all():
        starts = starts[new]
        weight = weight[new]
        sigma = None if sigma is None else sigma[new]
    del new
    positive = weight > 0
    if not positive.any():
        return _EMPTY_EDGES, _EMPTY_W, None
    first = int(np.argmax(positive))
    last = len(positive) - 1 - int(np.argmax(positive[::-1]))
    del positive
    out = np.empty(last - first + 2, dtype=np.int64)
    out[:-1] = starts[first : last + 1]
    out[-1] = starts[last + 1] if last + 1 < len(starts) else edges[-1]
    weight = weight[first : last + 1]
    sigma = None if sigma is None else sigma[first : last + 1]
    if sigma is not None and not np.any(sigma):
        sigma = None
    return out, weight, sigma


def _from_disjoint(starts, ends, weight, sigma, order):
    """Step function from disjoint intervals (any order), weight 0 in the gaps."""
    return _from_interval_list([starts, ends, weight, sigma])


def _from_interval_list(buffers):
    """`_from_disjoint` taking [starts, ends, weight, sigma] in a list it empties.

    A caller that hands over its only references lets each input be freed as soon as it has
    been copied into the segments (the peak memory of building 10^7-segment footprints).
    """
    starts, ends, weight, sigma = buffers
    buffers.clear()
    if len(starts) == 0:
        return _EMPTY_EDGES, _EMPTY_W, None
    weight = np.asarray(weight, dtype=np.float32)
    sigma = None if sigma is None else np.asarray(sigma, dtype=np.float32)
    if np.any(starts[1:] < starts[:-1]):
        idx = np.argsort(starts, kind="stable")
        starts, ends, weight = starts[idx], ends[idx], weight[idx]
        sigma = None if sigma is None else sigma[idx]
        del idx
    # Segments: each interval, plus a zero-weight one wherever the next interval does not
    # start where this one ends.
    gap = ends[:-1] < starts[1:]
    position = np.arange(len(starts), dtype=np.int64)
    position[1:] += np.cumsum(gap)
    n_segments = len(starts) + int(position[-1] - (len(starts) - 1))
    edges = np.empty(n_segments + 1, dtype=np.int64)
    edges[position] = starts
    del starts
    edges[position[:-1][gap] + 1] = ends[:-1][gap]
    edges[-1] = ends[-1]
    del ends, gap
    w = np.zeros(n_segments, dtype=np.float32)
    w[position] = weight
    del weight
    s = None
    if sigma is not None:
        s = np.zeros(n_segments, dtype=np.float32)
        s[position] = sigma
        del sigma
    del position
    return _canonical(edges, w, s)


def _length_weighted_sum(edges, values, square):
    """sum(length * values) (or values**2) in float64, a block at a time (no big copies)."""
    total = 0.0
    block = 1 << 20
    for lo in range(0, len(values), block):
        lengths = np.diff(edges[lo : lo + block + 1]).astype(float)
        v = values[lo : lo + block].astype(float)
        total += float(np.dot(lengths, v * v if square else v))
    return total


def _tidy(edges, weight, sigma):
    """Canonical form of a step function we own (in place: no copy of the big arrays)."""
    from countscale import _discs

    n = _discs.compact(edges, weight, np.zeros(0, np.float32) if sigma is None else sigma)
    if n == 0:
        return _EMPTY_EDGES, _EMPTY_W, None
    edges, weight = edges[: n + 1], weight[:n]
    if sigma is not None:
        sigma = sigma[:n]
        if not np.any(sigma):
            sigma = None
    return edges, weight, sigma


def _merge_sorted(first, second):
    """Positions that interleave two sorted key arrays into one sorted array (a merge)."""
    at_second = np.searchsorted(first, second, side="right") + np.arange(len(second))
    at_first = np.ones(len(first) + len(second), dtype=bool)
    at_first[at_second] = False
    return np.flatnonzero(at_first), at_second


_merge_intervals = geo.merge_intervals


def _sorted_union(a, b):
    """Sorted unique values of two sorted unique arrays, in one new array.

    The shorter array's new values are inserted into the longer one (np.union1d hashes and
    a concatenate-sort-deduplicate copies the data three times; this sets the peak memory
    when a small footprint is combined with one of 10^7 segments).
    """
    if len(a) < len(b):
        a, b = b, a
    if len(b) == 0:
        return a.copy()
    pos = np.searchsorted(a, b)
    present = (pos < len(a)) & (a[np.minimum(pos, len(a) - 1)] == b)
    return np.insert(a, pos[~present], b[~present])


def _segment_index(edges, cells):
    """Index of the segment holding each cell (searchsorted, fast for unsorted queries).

    numpy's searchsorted is several times faster on sorted queries; sort (cell, position)
    packed into one int64 when the bits allow it, which is cheaper than an argsort.
    """
    cells = np.asarray(cells, dtype=np.int64)
    if len(cells) < 4096 or len(edges) < 4096:
        return np.searchsorted(edges, cells, side="right") - 1
    top = int(max(edges[-1], cells.max(initial=0))).bit_length()
    index_bits = 63 - top
    if index_bits < 20 or cells.min() < 0:
        order = np.argsort(cells)
        out = np.empty(len(cells), dtype=np.int64)
        out[order] = np.searchsorted(edges, cells[order], side="right") - 1
        return out
    out = np.empty(len(cells), dtype=np.int64)
    chunk = 1 << index_bits
    mask = np.int64(chunk - 1)
    for lo in range(0, len(cells), chunk):
        part = cells[lo : lo + chunk]
        key = (part << np.int64(index_bits)) | np.arange(len(part), dtype=np.int64)
        key.sort()
        found = np.searchsorted(edges, key >> np.int64(index_bits), side="right") - 1
        out[lo + (key & mask)] = found
    return out


def _operand(edges, weight, sigma, starts, flag_boundary):
    """Weight, sigma and (optionally) boundary flag of one operand at sorted `starts`.

    A boundary cell is partly covered, or was measured before (sigma > 0) even if it came
    out 0 or 1.
    """
    idx = np.searchsorted(edges, starts, side="right") - 1  # sorted queries: fast
    w = _take(weight, idx)
    sig = None if sigma is None else _take(sigma, idx)
    on = None
    if flag_boundary:
        on = (w > 0) & (w < 1)
        if sig is not None:
            on |= sig > 0
    return w, sig, on


def _take(values, idx):
    """values[idx], with 0 where idx is outside the array (before or after every segment)."""
    if len(values) == 0:
        return np.zeros(len(idx), dtype=np.float32)
    out = values[np.clip(idx, 0, len(values) - 1)]
    out[(idx < 0) | (idx >= len(values))] = 0
    return out


def _remeasure(edges, weight, sigma, shared, order, exact):
    """Replace the `shared` segments by per-cell fractions measured with `exact`."""
    lengths = np.diff(edges)
    count = lengths[shared]
    cells = np.repeat(edges[:-1][shared], count) + _ranks(count)
    frac, frac_sigma = geo.point_test_fraction(exact, cells, order)
    sig = np.zeros(len(weight), dtype=np.float32) if sigma is None else sigma.copy()
    if np.all(count == 1):
        # The usual case (boundaries of shapes are single cells): change weights in place.
        weight = weight.copy()
        weight[shared], sig[shared] = frac, frac_sigma
        return edges, weight, sig
    keep = ~shared & (weight > 0)
    starts = np.concatenate([edges[:-1][keep], cells])
    ends = np.concatenate([edges[1:][keep], cells + 1])
    new_weight = np.concatenate([weight[keep], frac])
    new_sigma = np.concatenate([sig[keep], frac_sigma])
    return _from_disjoint(starts, ends, new_weight, new_sigma, order)


def _intervals_to_uniq(starts, ends, order):
    """Decompose intervals at `order` into the fewest aligned cells, as NUNIQ numbers.

    At block size 4**depth the aligned blocks inside [s, e) span R = [ceil(s/B) B,
    floor(e/B) B); the blocks emitted at that depth are R minus the region already covered by
    larger blocks (one run on each side).
    """
    uniq = []
    inner_lo = np.zeros(len(starts), dtype=np.int64)
    inner_hi = np.zeros(len(starts), dtype=np.int64)
    for depth in range(order, -1, -1):
        size = np.int64(4) ** depth
        lo = -(-starts // size) * size
        hi = (ends // size) * size
        fits = lo < hi
        had = inner_lo < inner_hi
        runs = (
            (np.where(fits, lo, 0), np.where(fits, np.where(had, inner_lo, hi), 0)),
            (np.where(fits & had, inner_hi, 0), np.where(fits & had, hi, 0)),
        )
        for a, b in runs:
            count = (b - a) // size
            if count.sum() == 0:
                continue
            first = np.repeat(a // size, count) + _ranks(count)
            uniq.append(4 * np.int64(4) ** (order - depth) + first)
        inner_lo = np.where(fits, lo, inner_lo)
        inner_hi = np.where(fits, hi, inner_hi)
    if not uniq:
        return np.zeros(0, dtype=np.int64)
    return np.sort(np.concatenate(uniq))


def _uniq_to_intervals(uniq, order):
    """NUNIQ numbers → intervals at `order` (which must be at least every cell's order)."""
    uniq = np.asarray(uniq, dtype=np.int64)
    cell_order = (np.floor(np.log2(uniq / 4.0) / 2.0)).astype(np.int64)
    # Guard against rounding in log2 for large numbers.
    cell_order -= (4 * np.int64(4) ** cell_order > uniq).astype(np.int64)
    cell_order += (4 * np.int64(4) ** (cell_order + 1) <= uniq).astype(np.int64)
    ipix = uniq - 4 * np.int64(4) ** cell_order
    shift = 2 * (order - cell_order)
    return ipix << shift, (ipix + 1) << shift, cell_order


# ----------------------------------------------------------------------------------------
# exact point tests of combined shapes
# ----------------------------------------------------------------------------------------
class _Exact:
    """Point test of a set-algebra expression over shapes and rasters."""

    def __init__(self, op, left, right=None):
        self.op, self.left, self.right = op, left, right

    def contains_vec(self, xyz):
        a = self.left.contains_vec(xyz)
        if self.op == "leaf":
            return a
        b = self.right.contains_vec(xyz)
        if self.op == "|":
            return a | b
        if self.op == "&":
            return a & b
        return a & ~b


class _RasterTest:
    """Point test of a footprint without a shape: its finest cell is at least half covered."""

    def __init__(self, footprint):
        self.footprint = footprint

    def contains_vec(self, xyz):
        ra, dec = geo.vec_to_radec(xyz)
        return self.footprint.weight_at(ra, dec) >= 0.5


# ----------------------------------------------------------------------------------------
# the footprint
# ----------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False, repr=False)
class Footprint:
    """Sky coverage as a step function over HEALPix NEST cells at `max_order`.

    Build footprints with the class methods (`cap`, `box`, `read_healpix_map`, ...) rather
    than this constructor. See the module docstring for the representation. The arrays are
    read-only, so measures (area, cells) are computed once and cached.
    """

    max_order: int
    edges: np.ndarray
    weight: np.ndarray
    sigma: np.ndarray | None = None
    _exact: object | None = None

    def __post_init__(self):
        for arr in (self.edges, self.weight, self.sigma):
            if arr is not None:
                arr.setflags(write=False)

    # -- construction helpers ---------------------------------------------------------
    @classmethod
    def _make(cls, order, parts, exact=None):
        edges, weight, sigma = parts
        return cls(order, edges, weight, sigma, exact)

    @classmethod
    def _from_shape(cls, shape, max_order):
        max_order = _check_order("max_order", max_order)
        if isinstance(shape, geo.Circles):
            return cls._from_circles(shape, max_order)
        raster = geo.rasterise(shape, max_order)
        # Unpack and drop the raster so that each array can be freed once consumed.
        starts, ends = raster.starts, raster.ends
        cells, frac, sigma, parts = raster.cells, raster.fraction, raster.sigma, raster.parts
        del raster
        full_s, full_e = _merge_intervals(starts, ends)
        del starts, ends
        if len(cells):
            # Cells on the boundary of several parts (overlapping holes): their fractions
            # cannot be combined without knowing where each lies in the cell, so measure the
            # union there with the shape's exact point test.
            idx = np.argsort(cells, kind="stable")
            cells, frac, sigma, parts = cells[idx], frac[idx], sigma[idx], parts[idx]
            del idx
            repeat = cells[1:] == cells[:-1]
            new = np.ones(len(cells), dtype=bool)
            new[1:] = ~repeat
            # Entries of cells listed more than once, and each such cell's number among
            # the shared cells (for pairing it with the parts whose boundary crosses it).
            in_shared = np.zeros(len(cells), dtype=bool)
            in_shared[1:] = repeat
            in_shared[:-1] |= repeat
            del repeat
            pair_cell = np.cumsum(new & in_shared, dtype=np.int32)[in_shared] - 1
            pair_part = parts[in_shared]
            del parts
            shared = in_shared[new]
            del in_shared
            if not new.all():
                cells, frac, sigma = cells[new], frac[new], sigma[new]
            del new
            if np.any(shared):
                frac[shared], sigma[shared] = geo.point_test_fraction(
                    shape, cells[shared], max_order, pairs=(pair_cell, pair_part)
                )
            del shared, pair_cell, pair_part
            # Fractional cells inside a whole interval of another part are whole.
            if len(full_s):
                pos = np.searchsorted(full_s, cells, side="right") - 1
                outside = (pos < 0) | (cells >= full_e[np.clip(pos, 0, None)])
                del pos
                if not outside.all():
                    cells, frac, sigma = cells[outside], frac[outside], sigma[outside]
                del outside
        # Both lists are sorted: interleave them by a merge rather than a sort.
        at_full, at_cell = _merge_sorted(full_s, cells)
        n = len(full_s) + len(cells)
        starts = np.empty(n, dtype=np.int64)
        starts[at_full], starts[at_cell] = full_s, cells
        del full_s
        ends = np.empty(n, dtype=np.int64)
        ends[at_full], ends[at_cell] = full_e, cells + 1
        del full_e, cells
        weight = np.ones(n, dtype=np.float32)
        weight[at_cell] = frac
        del frac
        sig = None
        if np.any(sigma):
            sig = np.zeros(n, dtype=np.float32)
            sig[at_cell] = sigma
        del sigma, at_full, at_cell
        buffers = [starts, ends, weight, sig]
        del starts, ends, weight, sig
        parts = _from_interval_list(buffers)
        return cls._make(max_order, parts, _Exact("leaf", shape))

    @classmethod
    def _from_circles(cls, shape, max_order):
        """The union of a `geo.Circles` shape's discs (one compiled walk, `_discs`)."""
        if max_order == 0:
            # The walk measures the children of cells; measure at order 1 and add up.
            fine = cls._from_circles(shape, 1)
            children = np.arange(48, dtype=np.int64)
            weight = fine._weight_of_cells(children).astype(float).reshape(12, 4).mean(axis=1)
            sigma = None
            if fine.sigma is not None:
                # An order-0 cell's area variance is the sum of its 4 children's, and its
                # sigma is in units of its own area (4 children).
                child_sigma = _take(fine.sigma, _segment_index(fine.edges, children))
                sigma = np.sqrt((child_sigma.astype(float) ** 2).reshape(12, 4).sum(axis=1)) / 4
            cells = np.arange(12, dtype=np.int64)
            parts = _from_disjoint(cells, cells + 1, weight, sigma, 0)
            return cls._make(0, parts, _Exact("leaf", shape))
        from countscale import _discs

        edges, weight, sigma, _, _ = _discs.rasterise(shape.centres, shape.radius_rad,
                                                      max_order)
        return cls._make(max_order, _tidy(edges, weight, sigma), _Exact("leaf", shape))

    def _subtract_circles(self, shape, order):
        """``self - discs`` in one walk, at `order` (>= self.max_order), never storing the
        discs on their own: see `_discs.rasterise`.

        Cells where a disc edge meets one of ``self``'s boundaries are measured, as in
        `_combine`, by point tests of both: ``self``'s exact test and the discs whose edges
        cross that cell.
        """
        from countscale import _discs

        if order == 0:
            return self._combine(Footprint._from_circles(shape, 0), "-")
        base = self._at_order(order)
        edges, weight, sigma, flagged, (pair_seg, pair_disc) = _discs.rasterise(
            shape.centres, shape.radius_rad, order, base=base
        )
        exact = _Exact("-", self._point_test(), _Exact("leaf", shape))
        if len(flagged):
            # The flagged segments are single cells (see `_discs._emit`); weights are ours
            # to change in place.
            frac, frac_sigma = geo.point_test_fraction(
                self._point_test(), edges[flagged], order,
                minus=(shape, np.searchsorted(flagged, pair_seg), pair_disc),
            )
            weight[flagged] = frac
            if sigma is None:
                sigma = np.zeros(len(weight), dtype=np.float32)
            sigma[flagged] = frac_sigma
        return Footprint._make(order, _tidy(edges, weight, sigma), exact)

    def _circles_shape(self):
        """The `geo.Circles` this footprint is the plain union of, or None."""
        exact = self._exact
        if isinstance(exact, _Exact) and exact.op == "leaf" and isinstance(exact.left,
                                                                           geo.Circles):
            return exact.left
        return None

    @classmethod
    def full_sky(cls, max_order=DEFAULT_MAX_ORDER):
        """The whole sky."""
        max_order = _check_order("max_order", max_order)
        edges = np.array([0, 12 * 4**max_order], dtype=np.int64)
        return cls(max_order, edges, np.ones(1, dtype=np.float32))

    @classmethod
    def empty(cls, max_order=DEFAULT_MAX_ORDER):
        """No sky at all."""
        return cls(_check_order("max_order", max_order), _EMPTY_EDGES, _EMPTY_W)

    @classmethod
    def cap(cls, ra, dec, radius, max_order=DEFAULT_MAX_ORDER):
        """Spherical cap: all points within `radius` degrees of (`ra`, `dec`).

        Parameters
        ----------
        ra, dec : float
            Centre in degrees.
        radius : float
            Angular radius in degrees, in (0, 180].
        max_order : int
            Finest HEALPix order of the boundary cells.
        """
        ra_arr, dec_arr = _check_positions(ra, dec)
        radius_arr = _check_radius_deg("radius", radius)
        if ra_arr.size != 1 or radius_arr.size != 1:
            raise InputError("`cap` takes one centre and one radius; use `circles` for many")
        shape = geo.Circles(ra_arr, dec_arr, np.radians(radius_arr))
        return cls._from_shape(shape, max_order)

    @classmethod
    def circles(cls, ra, dec, radius_arcsec, max_order=DEFAULT_MAX_ORDER):
        """Union of discs, typically bright-star holes to subtract from a footprint.

        Parameters
        ----------
        ra, dec : array_like, shape (n,)
            Centres in degrees.
        radius_arcsec : array_like, shape (n,) or scalar
            Radii in arcseconds (at most 180 degrees).
        """
        shape = _circles_shape(ra, dec, radius_arcsec)
        max_order = _check_order("max_order", max_order)
        if shape.n_parts == 0:
            return cls.empty(max_order)
        return cls._from_shape(shape, max_order)

    @classmethod
    def read_circles(cls, path, columns=None, max_order=DEFAULT_MAX_ORDER):
        """Holes from a CSV or Parquet table with columns ``ra``, ``dec``, ``radius_arcsec``.

        `columns` maps those names to the file's own, e.g. ``{"radius_arcsec": "r_mask"}``.
        """
        ra, dec, radius_arcsec = _read_circle_table(path, columns)
        return cls.circles(ra, dec, radius_arcsec, max_order)

    @classmethod
    def box(cls, ra_range, dec_range, max_order=DEFAULT_MAX_ORDER):
        """RA/Dec box with constant-declination edges and meridian sides.

        Parameters
        ----------
        ra_range : (float, float)
            RA limits in degrees. ``(350, 20)`` runs through 0; ``(0, 360)`` is all RA.
        dec_range : (float, float)
            Increasing declination limits in degrees within [-90, 90].
        """
        ra_lo, ra_hi = _pair("ra_range", ra_range)
        dec_lo, dec_hi = _pair("dec_range", dec_range)
        for name, value in (("ra_range", ra_lo), ("ra_range", ra_hi)):
            if not 0.0 <= value <= 360.0:
                raise InputError(f"`{name}` values must be in [0, 360] degrees; got {value}")
        if ra_lo == ra_hi:
            raise InputError(f"`ra_range` must have two different values; got {ra_range!r}")
        for value in (dec_lo, dec_hi):
            if not -90.0 <= value <= 90.0:
                raise InputError(f"`dec_range` values must be in [-90, 90] degrees; got {value}")
        if dec_lo >= dec_hi:
            raise InputError(f"`dec_range` must be increasing; got {dec_range!r}")
        shape = geo.Box(ra_lo % 360.0 if ra_lo != 360.0 else 0.0, ra_hi, dec_lo, dec_hi)
        if (ra_lo, ra_hi) in ((0.0, 360.0), (360.0, 0.0)):
            shape = geo.Box(0.0, 360.0, dec_lo, dec_hi)
        return cls._from_shape(shape, max_order)

    @classmethod
    def polygon(cls, vertices, max_order=DEFAULT_MAX_ORDER):
        """Spherical polygon with great-circle edges (convex or not, either winding).

        Parameters
        ----------
        vertices : array_like, shape (n, 2)
            (ra, dec) in degrees, n >= 3 distinct vertices, not self-intersecting, the whole
            polygon within a hemisphere. The interior is the smaller enclosed region.
        """
        verts = _as_float_array("vertices", vertices)
        if verts.ndim != 2 or verts.shape[1] != 2:
            raise InputError(
                f"`vertices` must be a list of [ra, dec] pairs; got an array of shape {verts.shape}"
            )
        ra, dec = _check_positions(verts[:, 0], verts[:, 1], "vertices ra", "vertices dec")
        xyz = geo.radec_to_vec(ra, dec)
        # Drop repeated consecutive vertices (including a closing copy of the first).
        distinct = np.ones(len(xyz), dtype=bool)
        distinct[1:] = np.linalg.norm(np.diff(xyz, axis=0), axis=1) > 1e-12
        xyz = xyz[distinct]
        if len(xyz) > 1 and np.linalg.norm(xyz[0] - xyz[-1]) <= 1e-12:
            xyz = xyz[:-1]
        if len(xyz) < 3:
            raise InputError(
                f"`vertices` must have at least 3 distinct points; got {len(xyz)}"
            )
        return cls._from_shape(geo.Polygon(xyz), max_order)

    @classmethod
    def galactic_latitude(cls, above=None, below=None, max_order=DEFAULT_MAX_ORDER):
        """Sky with |b| >= `above` and/or |b| < `below` (galactic latitude, degrees)."""
        if above is None and below is None:
            raise InputError("`galactic_latitude` needs `above` or `below`; got neither")
        result = None
        for name, value, is_above in (("above", above, True), ("below", below, False)):
            if value is None:
                continue
            value = float(_as_float_array(name, value))
            if not 0.0 <= value <= 90.0:
                raise InputError(f"`{name}` must be in [0, 90] degrees; got {value}")
            if is_above and value == 0.0:
                part = cls.full_sky(max_order)
            elif not is_above and value == 0.0:
                part = cls.empty(max_order)
            elif not is_above and value == 90.0:
                part = cls.full_sky(max_order)
            else:
                part = cls._from_shape(geo.LatitudeBand(value, is_above), max_order)
            result = part if result is None else result & part
        return result

    @classmethod
    def from_healpix(cls, values, nest=False, threshold=None, pixels=None, nside=None):
        """Footprint from HEALPix map values.

        Parameters
        ----------
        values : array_like
            Full-sky map of length 12 nside**2 or, with `pixels`, values at those pixels.
            NaN and `healpy.UNSEEN` are outside.
        nest : bool
            NEST ordering if True, RING if False.
        threshold : float, optional
            Cells with value >= threshold are in (for hit counts or weights). Without a
            threshold, values must lie in [0, 1] and are coverage fractions (booleans are 0/1).
        pixels : array_like of int, optional
            Explicit pixel indices (a partial-sky map); then `nside` is required.
        """
        import healpy as hp

        values = np.asarray(values)
        if values.dtype == bool:
            values = values.astype(np.float32)
        values = _as_float_array("values", values).ravel()
        if pixels is None:
            n = len(values)
            side = round(np.sqrt(n / 12.0))
            if n == 0 or 12 * side * side != n:
                raise InputError(f"HEALPix map length must be 12 * nside**2; got {n}")
            nside = side
            pixels = np.arange(n, dtype=np.int64)
        else:
            pixels = np.asarray(pixels).ravel()
            if nside is None:
                raise InputError("`nside` is required with explicit `pixels`; got None")
            if len(pixels) != len(values):
                raise InputError(
                    f"`pixels` and `values` must have the same length; got {len(pixels)} "
                    f"and {len(values)}"
                )
        order = _nside_to_order("nside", nside)
        npix = 12 * 4**order
        if len(pixels) and (pixels.min() < 0 or pixels.max() >= npix):
            bad = pixels[(pixels < 0) | (pixels >= npix)][0]
            raise InputError(f"pixel index must be in [0, {npix}) for nside {nside}; got {bad}")
        # UNSEEN written to a float32 map reads back a little off healpy's float64 constant:
        # healpy's own tolerant test (mask_bad, relative 1e-5) catches both.
        good = np.isfinite(values) & ~hp.mask_bad(np.nan_to_num(values, nan=0.0))
        pixels, values = pixels[good].astype(np.int64), values[good]
        if threshold is None:
            outside = (values < 0) | (values > 1)
            if np.any(outside):
                raise InputError(
                    "HEALPix map values must be coverage fractions in [0, 1] unless a "
                    f"`threshold` is given; got {values[outside][0]}"
                )
            weight = values
            binary = bool(np.all((values == 0) | (values == 1)))
        else:
            threshold = float(threshold)
            if not np.isfinite(threshold):
                raise InputError(f"`threshold` must be finite; got {threshold}")
            weight = (values >= threshold).astype(float)
            binary = True
        keep = weight > 0
        pixels, weight = pixels[keep], weight[keep]
        if not nest:
            pixels = hp.ring2nest(nside, pixels)
        sigma = None
        if binary and len(pixels):
            sigma = np.where(_edge_cells(pixels, order), _THRESHOLD_EDGE_SIGMA, 0.0)
        parts = _from_disjoint(pixels, pixels + 1, weight, sigma, order)
        return cls._make(order, parts)

    @classmethod
    def read_healpix_map(cls, path, threshold=None, nest=None):
        """Footprint from a HEALPix FITS map (implicit full-sky or explicit partial-sky).

        `nest` overrides the file's ORDERING keyword; `threshold` as in `from_healpix`.
        """
        path = Path(path)
        values, pixels, nside, is_nest = _read_healpix_fits(path, nest)
        try:
            return cls.from_healpix(values, nest=is_nest, threshold=threshold, pixels=pixels,
                                    nside=nside)
        except InputError as exc:
            raise InputError(f"{path}: {exc}") from None

    @classmethod
    def read_moc(cls, path):
        """Footprint from an IVOA MOC FITS file (NUNIQ column)."""
        path = Path(path)
        hdul = _open_fits(path)
        with hdul:
            hdu = next((h for h in hdul[1:] if hasattr(h, "columns")), None)
            if hdu is None:
                raise InputError(f"{path}: MOC file has no binary table extension")
            names = [c.upper() for c in hdu.columns.names]
            header_order = hdu.header.get("MOCORD_S", hdu.header.get("MOCORDER"))
            if "RANGE" in names:
                # MOC 2.0 range serialisation: [start, end) pairs of order-29 indices.
                ranges = np.asarray(hdu.data.field(names.index("RANGE")), dtype=np.int64)
                return cls._from_moc_ranges(path, ranges.reshape(-1, 2), header_order)
            col = "UNIQ" if "UNIQ" in names else ("NUNIQ" if "NUNIQ" in names else None)
            if col is None:
                raise InputError(
                    f"{path}: MOC table must have a UNIQ or RANGE column; columns are "
                    f"{hdu.columns.names}"
                )
            uniq = np.asarray(hdu.data.field(names.index(col)), dtype=np.int64)
        if len(uniq) == 0:
            return cls.empty(int(header_order) if header_order is not None else 0)
        if uniq.min() < 4:
            raise InputError(f"{path}: UNIQ values must be >= 4; got {uniq.min()}")
        _, _, orders = _uniq_to_intervals(uniq, geo.HEALPIX_MAX_ORDER)
        order = int(orders.max())
        if header_order is not None:
            order = max(order, int(header_order))
        order = _check_order(f"{path}: MOC order", order)
        starts, ends, _ = _uniq_to_intervals(uniq, order)
        starts, ends = _merge_intervals(starts, ends)
        parts = _from_disjoint(starts, ends, np.ones(len(starts)), None, order)
        return cls._make(order, parts)

    @classmethod
    def _from_moc_ranges(cls, path, ranges, header_order):
        order = geo.HEALPIX_MAX_ORDER if header_order is None else int(header_order)
        order = _check_order(f"{path}: MOC order", order)
        shift = 2 * (geo.HEALPIX_MAX_ORDER - order)
        starts, ends = ranges[:, 0], ranges[:, 1]
        if np.any(ends <= starts):
            raise InputError(f"{path}: MOC ranges must be increasing [start, end) pairs")
        if np.any((starts >> shift) << shift != starts) or np.any((ends >> shift) << shift != ends):
            raise InputError(f"{path}: MOC ranges are finer than its MOCORD_S {order}")
        starts, ends = _merge_intervals(starts >> shift, ends >> shift)
        parts = _from_disjoint(starts, ends, np.ones(len(starts)), None, order)
        return cls._make(order, parts)

    @classmethod
    def from_positions(cls, ra, dec, order, min_count=1):
        """Occupancy footprint: cells of `order` holding at least `min_count` positions."""
        import healpy as hp

        order = _check_order("order", order)
        if isinstance(min_count, bool) or not isinstance(min_count, int | np.integer) or (
            min_count < 1
        ):
            raise InputError(f"`min_count` must be an integer >= 1; got {min_count!r}")
        ra, dec = _check_positions(ra, dec)
        cells = hp.ang2pix(2**order, ra, dec, nest=True, lonlat=True)
        cells, counts = np.unique(cells, return_counts=True)
        cells = cells[counts >= min_count]
        sigma = np.where(_edge_cells(cells, order), _THRESHOLD_EDGE_SIGMA, 0.0)
        parts = _from_disjoint(cells, cells + 1, np.ones(len(cells)), sigma, order)
        return cls._make(order, parts)

    @classmethod
    def from_runfile_section(cls, footprint, catalog_positions=None):
        """Build the footprint a run file's validated ``[footprint]`` section describes.

        The section has `max_order`, `include` (united) and `exclude` (united, then
        subtracted); see `countscale.runfile`. `catalog_positions` is a callable returning
        (ra, dec) arrays, needed only by ``occupancy`` items.
        """
        max_order = footprint.max_order
        included = None
        for item in footprint.include:
            part = _build_item(cls, item, max_order, catalog_positions)
            included = part if included is None else included | part
        excluded = None
        holes = []
        for item in footprint.exclude:
            if item.kind == "circles":
                # Subtracted in one walk each, below, never built on their own:
                # A - (B | C) is (A - B) - C.
                holes.append(_item_circles(item))
                continue
            part = _build_item(cls, item, max_order, catalog_positions)
            excluded = part if excluded is None else excluded | part
        if excluded is not None:
            included = included - excluded
        for shape in holes:
            if shape.n_parts:
                included = included._subtract_circles(shape, max(max_order,
                                                                 included.max_order))
        return included

    # -- set algebra ------------------------------------------------------------------
    def _at_order(self, order):
        d = order - self.max_order
        if d == 0:
            return self.edges, self.weight, self.sigma
        sigma = None if self.sigma is None else self.sigma * np.float32(2.0**d)
        return self.edges << (2 * d), self.weight, sigma

    def _combine(self, other, op):
        if not isinstance(other, Footprint):
            return NotImplemented
        order = max(self.max_order, other.max_order)
        ea, wa, sa = self._at_order(order)
        eb, wb, sb = other._at_order(order)
        if len(ea) == 0 and len(eb) == 0:
            return Footprint.empty(order)
        edges = _sorted_union(ea, eb)
        both_exact = self._exact is not None and other._exact is not None
        # Each operand's weight, sigma and boundary flag on the merged segments; the index
        # arrays are dropped as soon as they are used (this sets the peak memory).
        a, sig_a, on_a = _operand(ea, wa, sa, edges[:-1], both_exact)
        b, sig_b, on_b = _operand(eb, wb, sb, edges[:-1], both_exact)
        if op == "|":
            weight = a + b - a * b
        elif op == "&":
            weight = a * b
        else:
            weight = a * (1 - b)
        np.clip(weight, 0, 1, out=weight)
        sigma = None
        if sig_a is not None or sig_b is not None:
            # First-order propagation of each operand's boundary uncertainty:
            # d(weight)/da and d(weight)/db times each operand's sigma, in quadrature.
            if op == "|":
                da, db = 1 - b, 1 - a
            elif op == "&":
                da, db = b, a
            else:
                da, db = 1 - b, a
            terms = [d * s for d, s in ((da, sig_a), (db, sig_b)) if s is not None]
            del da, db
            sigma = terms[0] if len(terms) == 1 else np.hypot(*terms)
            np.abs(sigma, out=sigma)
            del terms
        del a, b, sig_a, sig_b
        exact = _Exact(op, self._point_test(), other._point_test())
        if both_exact:
            # Where both boundaries pass through a cell, treating the two fractions as
            # independent would be wrong (A - B and B share an edge exactly): measure the
            # combination with the exact point tests of both shapes instead.
            shared = on_a & on_b
            del on_a, on_b
            if np.any(shared):
                edges, weight, sigma = _remeasure(edges, weight, sigma, shared, order, exact)
        return Footprint._make(order, _canonical(edges, weight, sigma), exact)

    def _point_test(self):
        return self._exact if self._exact is not None else _RasterTest(self)

    def __or__(self, other):
        return self._combine(other, "|")

    def __and__(self, other):
        return self._combine(other, "&")

    def __sub__(self, other):
        if isinstance(other, Footprint):
            shape = other._circles_shape()
            if shape is not None and other.max_order >= self.max_order:
                # Holes: walk them again, subtracting as we go, rather than merge two step
                # functions of 10^7 segments (the same numbers, less time and memory).
                return self._subtract_circles(shape, other.max_order)
        return self._combine(other, "-")

    # -- measures ---------------------------------------------------------------------
    @property
    def _lengths(self):
        return np.diff(self.edges).astype(float)

    @cached_property
    def area_sr(self):
        """Covered area in steradians (partial cells count for their covered fraction)."""
        if len(self.weight) == 0:
            return 0.0
        return _length_weighted_sum(self.edges, self.weight, square=False) * cell_area_sr(
            self.max_order
        )

    @property
    def area_deg2(self):
        """Covered area in square degrees."""
        return self.area_sr * _SR_TO_DEG2

    @property
    def sky_fraction(self):
        """Covered fraction of the whole sky."""
        return self.area_sr / (4.0 * np.pi)

    @cached_property
    def area_uncertainty_deg2(self):
        """Standard error of the area from how well the boundary cells are known."""
        if self.sigma is None:
            return 0.0
        var = _length_weighted_sum(self.edges, self.sigma, square=True)
        return np.sqrt(var) * cell_area_sr(self.max_order) * _SR_TO_DEG2

    @cached_property
    def n_cells(self):
        """Number of cells of the multi-order (MOC) decomposition of the covered sky."""
        from countscale import _discs

        if len(self.weight) == 0:
            return 0
        return int(_discs.count_moc_cells(self.edges, self.weight, self.max_order))

    @property
    def n_segments(self):
        """Number of stored segments (memory grows with this)."""
        return len(self.weight)

    def _intervals(self, min_weight=None):
        """Merged intervals with weight > 0 (or >= `min_weight`)."""
        if len(self.weight) == 0:
            return _EMPTY_EDGES, _EMPTY_EDGES
        keep = self.weight > 0 if min_weight is None else self.weight >= min_weight
        starts, ends = self.edges[:-1][keep], self.edges[1:][keep]
        return _merge_intervals(starts, ends)

    def summary(self):
        """The numbers `countscale area --json` prints."""
        return {
            "area_deg2": self.area_deg2,
            "area_sr": self.area_sr,
            "sky_fraction": self.sky_fraction,
            "area_uncertainty_deg2": self.area_uncertainty_deg2,
            "max_order": self.max_order,
            "n_cells": self.n_cells,
        }

    def __repr__(self):
        return (
            f"Footprint(area_deg2={self.area_deg2:.6g}, max_order={self.max_order}, "
            f"segments={self.n_segments})"
        )

    # -- positions --------------------------------------------------------------------
    def _weight_of_cells(self, cells):
        return _take(self.weight, _segment_index(self.edges, cells))

    def weight_at(self, ra, dec):
        """Coverage fraction of the finest cell at each position (float ndarray)."""
        import healpy as hp

        ra, dec = _check_positions(ra, dec)
        cells = hp.ang2pix(2**self.max_order, ra, dec, nest=True, lonlat=True)
        return self._weight_of_cells(cells).astype(float)

    def contains(self, ra, dec):
        """Whether each position is inside (bool ndarray).

        Exact for footprints built from shapes (caps, boxes, polygons, holes, latitude
        cuts): points in partially covered cells are tested against the shapes themselves.
        Map-, MOC- and occupancy-based parts are known only to their pixels: there a point
        is inside when its finest cell is at least half covered.
        """
        import healpy as hp

        ra, dec = _check_positions(ra, dec)
        cells = hp.ang2pix(2**self.max_order, ra, dec, nest=True, lonlat=True)
        weight = self._weight_of_cells(cells)
        inside = weight >= 1.0
        partial = np.flatnonzero((weight > 0) & (weight < 1))
        if len(partial):
            if self._exact is not None:
                xyz = geo.radec_to_vec(ra[partial], dec[partial])
                inside[partial] = self._exact.contains_vec(xyz)
            else:
                inside[partial] = weight[partial] >= 0.5
        return inside

    def random_points(self, n, rng=None):
        """`n` positions uniform over the covered sky (holes respected).

        Returns
        -------
        ra, dec : ndarray, shape (n,)
            Degrees.
        """
        import healpy as hp

        if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 0:
            raise InputError(f"`n` must be a non-negative integer; got {n!r}")
        if self.area_sr <= 0:
            raise InputError("cannot draw random points from an empty footprint (area 0)")
        rng = np.random.default_rng(rng)
        lengths = self._lengths
        weight = self.weight.astype(float)
        partial = (weight > 0) & (weight < 1)
        exact = self._exact is not None
        # Proposal: whole-cell area where an exact test will decide, coverage otherwise.
        proposal = lengths * np.where(partial & exact, 1.0, weight)
        cumulative = np.cumsum(proposal)
        sub = geo.HEALPIX_MAX_ORDER - self.max_order
        out_ra, out_dec, have = [], [], 0
        while have < n:
            m = int(1.1 * (n - have)) + 16
            seg = np.searchsorted(cumulative, rng.random(m) * cumulative[-1], side="right")
            seg = np.minimum(seg, len(cumulative) - 1)
            cell = self.edges[seg] + rng.integers(0, self.edges[seg + 1] - self.edges[seg])
            fine = (cell << (2 * sub)) + rng.integers(0, 4**sub, size=m)
            ra, dec = hp.pix2ang(2**geo.HEALPIX_MAX_ORDER, fine, nest=True, lonlat=True)
            if exact and np.any(partial[seg]):
                check = np.flatnonzero(partial[seg])
                ok = np.ones(m, dtype=bool)
                ok[check] = self._exact.contains_vec(geo.radec_to_vec(ra[check], dec[check]))
                ra, dec = ra[ok], dec[ok]
            out_ra.append(ra)
            out_dec.append(dec)
            have += len(ra)
        return np.concatenate(out_ra)[:n] % 360.0, np.concatenate(out_dec)[:n]

    # -- coarse views -----------------------------------------------------------------
    def coverage_cells(self, order):
        """Covered cells of `order` and their coverage fraction (sparse form of a map).

        Returns
        -------
        cells : int64 ndarray
            Sorted NEST indices at `order` with coverage > 0.
        fraction : float64 ndarray
            Covered fraction of each cell.
        """
        order = _check_order("order", order)
        if len(self.weight) == 0:
            return np.zeros(0, dtype=np.int64), np.zeros(0)
        keep = self.weight > 0
        s, e = self.edges[:-1][keep], self.edges[1:][keep]
        w = self.weight[keep].astype(float)
        if order >= self.max_order:
            d = order - self.max_order
            s, e = s << (2 * d), e << (2 * d)
            count = e - s
            cells = np.repeat(s, count) + _ranks(count)
            return cells, np.repeat(w, count)
        size = np.int64(4) ** (self.max_order - order)
        first, last = s // size, (e - 1) // size
        count = last - first + 1
        cells = np.repeat(first, count) + _ranks(count)
        lo = np.maximum(np.repeat(s, count), cells * size)
        hi = np.minimum(np.repeat(e, count), (cells + 1) * size)
        contribution = (hi - lo) * np.repeat(w, count) / float(size)
        new = np.empty(len(cells), dtype=bool)
        new[0] = True
        new[1:] = cells[1:] != cells[:-1]
        at = np.flatnonzero(new)
        return cells[at], np.minimum(np.add.reduceat(contribution, at), 1.0)

    def to_healpix(self, nside, nest=False):
        """Dense coverage-fraction map (float64, length 12 nside**2), RING unless `nest`."""
        import healpy as hp

        order = _nside_to_order("nside", nside)
        cells, fraction = self.coverage_cells(order)
        dense = np.zeros(12 * 4**order)
        dense[cells] = fraction
        return dense if nest else hp.reorder(dense, n2r=True)

    def mask_power_spectrum(self, nside=256, lmax=None):
        """Angular power spectrum W_l of the coverage map at `nside` (healpy.anafast).

        Returns
        -------
        ell : ndarray of int
        w_ell : ndarray
            Pseudo-C_l of the coverage-fraction map, for cosmic-variance integrals
            sigma^2 = sum_l (2l+1) C_l W_l / Omega^2.
        """
        import healpy as hp

        dense = self.to_healpix(nside, nest=False)
        w_ell = hp.anafast(dense, lmax=lmax)
        return np.arange(len(w_ell)), w_ell

    def split(self, n_regions, order=None):
        """Divide into `n_regions` contiguous regions of near-equal area (for jackknife).

        Regions are made of whole cells of `order` (chosen, if not given, so that every region
        holds at least ~50 of them) by recursive bisection along the longer axis of the
        cells' spread, cutting at the area-weighted quantile.
        """
        import healpy as hp

        if isinstance(n_regions, bool) or not isinstance(n_regions, int | np.integer):
            raise InputError(f"`n_regions` must be an integer >= 1; got {n_regions!r}")
        if n_regions < 1:
            raise InputError(f"`n_regions` must be an integer >= 1; got {n_regions}")
        if self.area_sr <= 0:
            raise InputError("cannot split an empty footprint (area 0) into regions")
        if order is None:
            order = min(self.max_order, 4)
            while order < self.max_order:
                if len(self.coverage_cells(order)[0]) >= 50 * n_regions:
                    break
                order += 1
        order = _check_order("order", order)
        cells, fraction = self.coverage_cells(order)
        if len(cells) < n_regions:
            raise InputError(
                f"cannot split a footprint covering {len(cells)} cells of order {order} into "
                f"{n_regions} regions; use a finer `order`"
            )
        xyz = np.stack(hp.pix2vec(2**order, cells, nest=True), axis=-1)
        labels = np.zeros(len(cells), dtype=np.int32)
        _bisect(xyz, fraction, np.arange(len(cells)), n_regions, 0, labels)
        area = np.bincount(labels, weights=fraction, minlength=n_regions) * cell_area_sr(order)
        return Regions(order, cells, labels, area * _SR_TO_DEG2)

    def fields(self, order=None):
        """The footprint's connected parts ("fields"), as regions of whole cells of `order`.

        Cells of `order` holding coverage are joined when they touch (any of their 8 HEALPix
        neighbours); each connected group is a field. Fields are numbered in the order of
        their first cell (NEST), so the labels do not depend on anything but the footprint.

        Parameters
        ----------
        order : int, optional
            Cell order; default ``min(max_order, 10)`` (3.4 arcmin cells). Fields closer than
            about a cell of this order count as one.

        Returns
        -------
        Regions
            ``n_regions`` is the number of fields; ``area_deg2`` each field's covered area.
        """
        import healpy as hp
        from scipy.sparse import coo_matrix
        from scipy.sparse.csgraph import connected_components

        if self.area_sr <= 0:
            raise InputError("cannot find the fields of an empty footprint (area 0)")
        order = min(self.max_order, 10) if order is None else _check_order("order", order)
        cells, fraction = self.coverage_cells(order)
        neighbours = hp.get_all_neighbours(2**order, cells, nest=True)  # (8, n), -1 if none
        pos = np.minimum(np.searchsorted(cells, neighbours), len(cells) - 1)
        present = (cells[pos] == neighbours) & (neighbours >= 0)
        rows = np.broadcast_to(np.arange(len(cells)), neighbours.shape)[present]
        graph = coo_matrix((np.ones(rows.size, dtype=np.int8), (rows, pos[present])),
                           shape=(len(cells), len(cells)))
        _, raw = connected_components(graph, directed=False)
        # Renumber by first appearance so that labels follow the cells' NEST order.
        _, first = np.unique(raw, return_index=True)
        rank = np.empty(first.size, dtype=np.int32)
        rank[np.argsort(first)] = np.arange(first.size, dtype=np.int32)
        labels = rank[raw]
        area = np.bincount(labels, weights=fraction) * cell_area_sr(order) * _SR_TO_DEG2
        return Regions(order, cells, labels, area)

    # -- writing ----------------------------------------------------------------------
    def write_moc(self, path, min_weight=0.5):
        """Write an IVOA MOC FITS file (NUNIQ) of the cells covered at least `min_weight`.

        A MOC holds a set, not fractions: cells at least half covered are in by default,
        which keeps the MOC's area unbiased along boundaries.
        """
        from astropy.io import fits

        if not 0.0 < min_weight <= 1.0:
            raise InputError(f"`min_weight` must be in (0, 1]; got {min_weight}")
        starts, ends = self._intervals(min_weight=min_weight)
        uniq = _intervals_to_uniq(starts, ends, self.max_order)
        column = fits.Column(name="UNIQ", format="K", array=uniq)
        hdu = fits.BinTableHDU.from_columns([column])
        header = hdu.header
        header["PIXTYPE"] = "HEALPIX"
        header["ORDERING"] = "NUNIQ"
        header["COORDSYS"] = "C"
        header["MOCDIM"] = "SPACE"
        header["MOCVERS"] = "2.0"
        header["MOCORD_S"] = self.max_order
        header["MOCORDER"] = self.max_order
        header["MOCTOOL"] = "countscale"
        with atomic_path(path) as tmp:
            fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(tmp)

    def write_healpix(self, path, nside, nest=False, partial=False):
        """Write the coverage-fraction map at `nside` as a HEALPix FITS file.

        With `partial`, only covered pixels are written with their indices (explicit
        indexing), which keeps high-resolution maps of small footprints small.
        """
        import healpy as hp
        from astropy.io import fits

        order = _nside_to_order("nside", nside)
        if partial:
            cells, fraction = self.coverage_cells(order)
            if not nest:
                cells = hp.nest2ring(2**order, cells)
                idx = np.argsort(cells)
                cells, fraction = cells[idx], fraction[idx]
            cols = [
                fits.Column(name="PIXEL", format="K", array=cells),
                fits.Column(name="COVERAGE", format="E", array=fraction.astype(np.float32)),
            ]
            hdu = fits.BinTableHDU.from_columns(cols)
            hdu.header["INDXSCHM"] = "EXPLICIT"
            hdu.header["OBJECT"] = "PARTIAL"
        else:
            dense = self.to_healpix(nside, nest=nest).astype(np.float32)
            hdu = fits.BinTableHDU.from_columns(
                [fits.Column(name="COVERAGE", format="E", array=dense)]
            )
            hdu.header["INDXSCHM"] = "IMPLICIT"
            hdu.header["OBJECT"] = "FULLSKY"
        hdu.header["PIXTYPE"] = "HEALPIX"
        hdu.header["ORDERING"] = "NESTED" if nest else "RING"
        hdu.header["NSIDE"] = 2**order
        hdu.header["COORDSYS"] = "C"
        hdu.header["FIRSTPIX"] = 0
        hdu.header["LASTPIX"] = 12 * 4**order - 1
        with atomic_path(path) as tmp:
            fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(tmp)


@dataclass(frozen=True, eq=False)
class Regions:
    """A footprint divided into contiguous regions of whole cells of `order`.

    Attributes
    ----------
    order : int
    cells : ndarray of int64
        Sorted NEST cells at `order` that hold coverage.
    labels : ndarray of int32
        Region of each cell, 0 .. n_regions - 1.
    area_deg2 : ndarray
        Covered area of each region.
    """

    order: int
    cells: np.ndarray
    labels: np.ndarray
    area_deg2: np.ndarray

    @property
    def n_regions(self):
        return len(self.area_deg2)

    def label(self, ra, dec):
        """Region of each position, -1 where the position is in no region's cell."""
        import healpy as hp

        ra, dec = _check_positions(ra, dec)
        cells = hp.ang2pix(2**self.order, ra, dec, nest=True, lonlat=True)
        pos = np.searchsorted(self.cells, cells)
        pos = np.minimum(pos, len(self.cells) - 1)
        found = self.cells[pos] == cells
        return np.where(found, self.labels[pos], -1)


# ----------------------------------------------------------------------------------------
# private helpers
# ----------------------------------------------------------------------------------------
def _ranks(count):
    """0..count_i-1 for each group, concatenated."""
    total = int(count.sum())
    return np.arange(total, dtype=np.int64) - np.repeat(np.cumsum(count) - count, count)


def _bisect(xyz, weight, idx, k, label0, labels):
    if k == 1:
        labels[idx] = label0
        return
    k_left = k // 2
    pts, w = xyz[idx], weight[idx]
    centre = np.average(pts, axis=0, weights=w)
    centre /= np.linalg.norm(centre)
    e1, e2 = geo._orthonormal_basis(centre[None, :])
    plane = np.stack([pts @ e1[0], pts @ e2[0]], axis=-1)
    cov = np.cov(plane.T, aweights=w) if len(pts) > 1 else np.eye(2)
    axis = np.linalg.eigh(np.atleast_2d(cov))[1][:, -1]
    coord = plane @ axis
    order = np.argsort(coord, kind="stable")
    cum = np.cumsum(w[order])
    # Cut next to the cell where the running area passes the target, on whichever side
    # lands nearer (always after it biased every left part up by up to one cell).
    target = cum[-1] * k_left / k
    cut = int(np.searchsorted(cum, target)) + 1
    if cut > 1 and target - cum[cut - 2] < cum[min(cut - 1, len(cum) - 1)] - target:
        cut -= 1
    cut = int(np.clip(cut, k_left, len(order) - (k - k_left)))
    _bisect(xyz, weight, idx[order[:cut]], k_left, label0, labels)
    _bisect(xyz, weight, idx[order[cut:]], k - k_left, label0 + k_left, labels)


def _edge_cells(cells, order):
    """Which of the sorted unique `cells` have a neighbour (of 8) outside the set."""
    import healpy as hp

    if len(cells) == 0:
        return np.zeros(0, dtype=bool)
    if order == 0:
        return np.ones(len(cells), dtype=bool) if len(cells) < 12 else np.zeros(12, dtype=bool)
    sorted_cells = np.sort(cells)
    neighbours = hp.get_all_neighbours(2**order, cells, nest=True)  # (8, n), -1 if none
    pos = np.searchsorted(sorted_cells, neighbours)
    pos = np.minimum(pos, len(sorted_cells) - 1)
    present = (sorted_cells[pos] == neighbours) | (neighbours < 0)
    return ~np.all(present, axis=0)


def _pair(name, value):
    try:
        a, b = value
        return float(a), float(b)
    except (TypeError, ValueError):
        raise InputError(f"`{name}` must be two numbers; got {value!r}") from None


def _did_you_mean(name, options):
    close = difflib.get_close_matches(str(name), [str(o) for o in options], n=1)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _open_fits(path):
    import warnings

    from astropy.io import fits
    from astropy.io.fits.verify import VerifyWarning
    from astropy.utils.exceptions import AstropyUserWarning

    if not path.exists():
        raise InputError(f"{path}: file not found")
    try:
        with warnings.catch_warnings():
            # astropy only warns about a truncated header or data; here that is an error.
            warnings.simplefilter("error", VerifyWarning)
            warnings.simplefilter("error", AstropyUserWarning)
            hdul = fits.open(path, memmap=False)
            hdul.verify("exception")
            for hdu in hdul:
                _ = hdu.data  # force reading: truncated data fails here
    except (OSError, ValueError, TypeError, IndexError, VerifyWarning,
            AstropyUserWarning) as exc:
        raise InputError(f"{path}: not a readable FITS file ({_first_line(exc)})") from None
    return hdul


def _first_line(exc):
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _read_healpix_fits(path, nest_override):
    """Values, pixels (or None), nside and ordering of a HEALPix FITS map."""
    hdul = _open_fits(path)
    with hdul:
        hdu = next((h for h in hdul[1:] if hasattr(h, "columns")), None)
        if hdu is None:
            raise InputError(f"{path}: HEALPix map must be a binary table extension; found none")
        header = hdu.header
        names = [c.upper() for c in hdu.columns.names]
        if header.get("ORDERING", "").upper() == "NUNIQ" or "UNIQ" in names:
            raise InputError(f"{path}: this is a MOC (NUNIQ), not a HEALPix map; read it as a MOC")
        explicit = str(header.get("INDXSCHM", "")).upper() == "EXPLICIT" or (
            str(header.get("OBJECT", "")).upper() == "PARTIAL" and "PIXEL" in names
        )
        if explicit:
            if "PIXEL" not in names or len(names) < 2:
                raise InputError(
                    f"{path}: explicit HEALPix map needs a PIXEL column and a value column"
                )
            ipix = names.index("PIXEL")
            ival = next(i for i in range(len(names)) if i != ipix)
            pixels = np.asarray(hdu.data.field(ipix), dtype=np.int64).ravel()
            values = np.asarray(hdu.data.field(ival), dtype=float).ravel()
        else:
            pixels = None
            values = np.asarray(hdu.data.field(0), dtype=float).ravel()
        nside = header.get("NSIDE")
        if nside is None:
            if explicit:
                raise InputError(f"{path}: explicit HEALPix map needs an NSIDE keyword")
            n = len(values)
            side = round(np.sqrt(n / 12.0))
            if 12 * side * side != n:
                raise InputError(f"{path}: HEALPix map length must be 12 * nside**2; got {n}")
            nside = side
        nside = int(nside)
        if not explicit and len(values) != 12 * nside * nside:
            raise InputError(
                f"{path}: HEALPix map length must be 12 * nside**2 = {12 * nside * nside} for "
                f"NSIDE {nside}; got {len(values)}"
            )
        if nest_override is not None:
            is_nest = bool(nest_override)
        else:
            ordering = str(header.get("ORDERING", "")).upper()
            if ordering not in ("RING", "NESTED", "NEST"):
                raise InputError(
                    f"{path}: ORDERING keyword must be RING or NESTED; got {ordering or 'none'} "
                    "(pass `nest` to say which)"
                )
            is_nest = ordering != "RING"
        _nside_to_order(f"{path}: NSIDE", nside)
    return values, pixels, nside, is_nest


def _read_table(path):
    import pandas as pd

    if not path.exists():
        raise InputError(f"{path}: file not found")
    suffix = "".join(path.suffixes).lower()
    try:
        if suffix.endswith((".parquet", ".pq")):
            return pd.read_parquet(path)
        if suffix.endswith((".csv", ".csv.gz")):
            return pd.read_csv(path)
    except Exception as exc:  # any parser failure becomes one line naming the file
        raise InputError(f"{path}: cannot read table ({_first_line(exc)})") from None
    raise InputError(f"{path}: table format must be .csv or .parquet; got {suffix or 'none'}")


def _read_circle_table(path, columns=None):
    """(ra, dec, radius_arcsec) arrays of a circle list, validated (see `read_circles`)."""
    path = Path(path)
    names = {"ra": "ra", "dec": "dec", "radius_arcsec": "radius_arcsec"}
    for key, value in (columns or {}).items():
        if key not in names:
            raise InputError(
                f"{path}: circle list `columns` key must be one of {sorted(names)}; got {key!r}"
            )
        names[key] = value
    table = _read_table(path)
    missing = [c for c in names.values() if c not in table.columns]
    if missing:
        raise InputError(
            f"{path}: circle list has no column {missing[0]!r}"
            f"{_did_you_mean(missing[0], table.columns)}; columns are {list(table.columns)}"
        )
    values = {}
    for key, col in names.items():
        try:
            arr = np.asarray(table[col], dtype=float)
        except (TypeError, ValueError):
            raise InputError(f"{path}: column {col!r} must be numeric") from None
        bad = ~np.isfinite(arr)
        if np.any(bad):
            row = int(np.flatnonzero(bad)[0])
            raise InputError(f"{path}: column {col!r} must be finite; row {row} is {arr[row]}")
        values[key] = arr
    dec_bad = np.abs(values["dec"]) > 90.0
    if np.any(dec_bad):
        row = int(np.flatnonzero(dec_bad)[0])
        raise InputError(
            f"{path}: column {names['dec']!r} must be in [-90, 90]; row {row} is "
            f"{values['dec'][row]}"
        )
    r_bad = values["radius_arcsec"] <= 0
    if np.any(r_bad):
        row = int(np.flatnonzero(r_bad)[0])
        raise InputError(
            f"{path}: column {names['radius_arcsec']!r} must be > 0; row {row} is "
            f"{values['radius_arcsec'][row]}"
        )
    return values["ra"], values["dec"], values["radius_arcsec"]


def _circles_shape(ra, dec, radius_arcsec):
    """A validated `geo.Circles` from centres in degrees and radii in arcseconds."""
    ra_arr, dec_arr = _check_positions(ra, dec)
    radius = np.broadcast_to(
        np.atleast_1d(_as_float_array("radius_arcsec", radius_arcsec)), ra_arr.shape
    )
    bad = ~np.isfinite(radius) | (radius <= 0.0) | (radius > 180.0 * 3600.0)
    if np.any(bad):
        raise InputError(f"`radius_arcsec` must be in (0, 648000]; got {radius[bad][0]}")
    return geo.Circles(ra_arr.ravel(), dec_arr.ravel(), np.radians(radius.ravel() / 3600.0))


def _item_circles(item):
    """The `geo.Circles` of a run file's ``circles`` item (errors name the item)."""
    p = item.params
    try:
        ra, dec, radius_arcsec = _read_circle_table(p["path"], p.get("columns"))
        return _circles_shape(ra, dec, radius_arcsec)
    except InputError as exc:
        message = str(exc)
        if item.where.split(":")[0] not in message:
            message = f"{item.where}: {message}"
        raise InputError(message) from None


def _build_item(cls, item, max_order, catalog_positions):
    """One include/exclude item of a run file's footprint section (see `countscale.runfile`)."""
    kind, p = item.kind, item.params
    try:
        if kind == "cap":
            return cls.cap(p["ra_deg"], p["dec_deg"], p["radius_deg"], max_order)
        if kind == "box":
            return cls.box(p["ra_deg"], p["dec_deg"], max_order)
        if kind == "polygon":
            return cls.polygon(p["vertices_deg"], max_order)
        if kind == "map":
            return cls.read_healpix_map(p["path"], threshold=p.get("threshold"),
                                        nest=p.get("nest"))
        if kind == "moc":
            return cls.read_moc(p["path"])
        if kind == "circles":
            return cls.read_circles(p["path"], columns=p.get("columns"), max_order=max_order)
        if kind == "galactic_latitude_below":
            return cls.galactic_latitude(below=p["b_deg"], max_order=max_order)
        if kind == "galactic_latitude_above":
            return cls.galactic_latitude(above=p["b_deg"], max_order=max_order)
        if kind == "occupancy":
            if catalog_positions is None:
                raise InputError("`occupancy` needs a [catalog] section to count sources in")
            ra, dec = catalog_positions()
            return cls.from_positions(ra, dec, p["order"], p.get("min_count", 1))
    except InputError as exc:
        message = str(exc)
        if item.where.split(":")[0] not in message:
            message = f"{item.where}: {message}"
        raise InputError(message) from None
    raise InputError(f"{item.where}: unknown footprint item kind {kind!r}")
