"""Sky shapes and their rasterisation onto HEALPix NEST cells (private to `footprint`).

Topics
------
Vectors
    `radec_to_vec`, `vec_to_radec`, `icrs_to_galactic_matrix`.
Shapes
    `Circles` (one cap, or a list of discs such as bright-star holes), `Box` (constant-
    declination and constant-RA edges), `Polygon` (great-circle edges), `LatitudeBand`
    (galactic-latitude cuts). Each gives an exact point test (`contains_vec`) and a
    classification of cells as inside, outside or crossing its boundary.
Rasterisation
    `rasterise(shape, max_order)` refines cells from order 0 to `max_order`, keeping only
    cells that touch the boundary, and returns the fully covered cells at every order plus the
    boundary cells at `max_order` with their covered fraction.

How the covered fraction of a boundary cell is computed
-------------------------------------------------------
Discs (caps, holes): see `countscale._discs`, which rasterises any number of discs in one
compiled walk with exact fractions (disc ∩ cell in the equal-area projection about the disc).
Other shapes: the cell is refined ``SUB_ORDERS`` more orders with the same classification and
the finest sub-cells are counted by their centres; the fraction's standard error
(sqrt(n_crossing/12) / 4**SUB_ORDERS) is carried as the cell's `sigma`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np

from countscale.errors import InputError

#: Extra orders used to measure the covered fraction of a boundary cell of a shape that has
#: no closed-form cell intersection (boxes, polygons, latitude bands). 4 orders = 256
#: sub-cells per cell; fraction error about 0.005 of a cell (see module docstring).
SUB_ORDERS = 4

#: Deepest HEALPix order healpy supports (nside = 2**29).
HEALPIX_MAX_ORDER = 29

#: Safety factor on healpy's `max_pixrad`, which is measured to the cell corners; the curved
#: cell edges can bulge beyond the centre-to-corner distance by a small amount. Over-estimating
#: only costs a little refinement work; under-estimating would misclassify cells.
_PIXRAD_SAFETY = 1.05

#: Covered fractions closer than this to 0 or 1 are treated as 0 or 1 (see `_refine`): the
#: closed forms carry ~1e-10 of rounding, and weights are stored as float32, which cannot
#: tell 1 - 3e-8 from 1 (a sliver that small would then be counted twice in set algebra).
_FRACTION_TOLERANCE = 1e-6

#: Pairs (part, cell) handled at once in the refinement loop, to bound memory.
_BATCH_PAIRS = 2_000_000


# ----------------------------------------------------------------------------------------
# vectors
# ----------------------------------------------------------------------------------------
def radec_to_vec(ra_deg, dec_deg):
    """Unit vectors (N, 3) from right ascension and declination in degrees."""
    ra = np.radians(np.asarray(ra_deg, dtype=float))
    dec = np.radians(np.asarray(dec_deg, dtype=float))
    cos_dec = np.cos(dec)
    return np.stack([cos_dec * np.cos(ra), cos_dec * np.sin(ra), np.sin(dec)], axis=-1)


def vec_to_radec(xyz):
    """Right ascension in [0, 360) and declination in degrees from vectors (N, 3)."""
    xyz = np.asarray(xyz, dtype=float)
    ra = np.degrees(np.arctan2(xyz[..., 1], xyz[..., 0])) % 360.0
    dec = np.degrees(np.arctan2(xyz[..., 2], np.hypot(xyz[..., 0], xyz[..., 1])))
    return ra, dec


@lru_cache(maxsize=1)
def icrs_to_galactic_matrix():
    """Rotation matrix R with v_galactic = R @ v_icrs (from astropy's frame definitions)."""
    from astropy.coordinates import ICRS, Galactic, SkyCoord

    basis = SkyCoord(
        x=[1.0, 0.0, 0.0],
        y=[0.0, 1.0, 0.0],
        z=[0.0, 0.0, 1.0],
        representation_type="cartesian",
        frame=ICRS(),
    )
    gal = basis.transform_to(Galactic()).cartesian
    # Columns are the images of the ICRS basis vectors.
    matrix = np.stack([gal.x.value, gal.y.value, gal.z.value], axis=0)
    matrix.setflags(write=False)
    return matrix


def _angle_between(u, v):
    """Angle in radians between vectors (broadcast over leading axes), accurate when tiny."""
    cross = np.cross(u, v)
    return np.arctan2(np.linalg.norm(cross, axis=-1), np.einsum("...i,...i->...", u, v))


def _pixrad(order):
    from countscale._discs import max_pixrad

    return max_pixrad(order) * _PIXRAD_SAFETY


def _pix2vec(order, cells):
    """Unit vectors (N, 3) of the centres of NEST `cells` at `order` (healpy's `pix2vec`,
    to the bit, without importing healpy)."""
    from countscale._discs import pix2vec_nest

    return pix2vec_nest(order, cells)


def _orthonormal_basis(centre):
    """Two unit vectors (N, 3) spanning the tangent plane at each `centre` (N, 3)."""
    ref = np.zeros_like(centre)
    near_pole = np.abs(centre[:, 2]) > 0.9
    ref[~near_pole, 2] = 1.0
    ref[near_pole, 0] = 1.0
    e1 = np.cross(ref, centre)
    e1 /= np.linalg.norm(e1, axis=1)[:, None]
    e2 = np.cross(centre, e1)
    return e1, e2


# ----------------------------------------------------------------------------------------
# shapes
# ----------------------------------------------------------------------------------------
class Shape:
    """A region of the sky with an exact point test and a cell classification.

    A shape has `n_parts` parts rasterised independently and then united (one part for a
    cap, box or polygon; one per disc for a list of holes).
    """

    n_parts: int = 1

    def contains_vec(self, xyz):  # pragma: no cover - abstract
        raise NotImplementedError

    def classify_cells(self, part, cells, order):
        """State of NEST `cells` of `order`: +1 all inside, -1 all outside, 0 crossing."""
        xyz = _pix2vec(order, cells)
        return self.classify(part, xyz, _pixrad(order))

    def classify(self, part, xyz, radius_rad):
        """State of cells given by their centres: +1 all inside, -1 all outside, 0 crossing.

        `radius_rad` bounds the distance from a cell centre to any point of the cell.
        """
        inside = self._part_contains(part, xyz)
        clear = self._boundary_distance(part, xyz) > radius_rad
        state = np.zeros(len(xyz), dtype=np.int8)
        state[clear & inside] = 1
        state[clear & ~inside] = -1
        return state

    def _part_contains(self, part, xyz):
        return self.contains_vec(xyz)

    def _boundary_distance(self, part, xyz):  # pragma: no cover - abstract
        raise NotImplementedError

    def _local_boundary(self, part, xyz, radius_rad):
        """The boundary near each cell as a half-plane of the gnomonic plane at the centre.

        Returns coefficients (a, b, c) with the inside where a x + b y + c >= 0, in the
        coordinates of `_tangent_basis`, and `ok`, False where more than one edge or a
        corner comes within `radius_rad` (those cells are measured by sub-cells instead).
        """
        return None

    def _fraction(self, part, cells, order):
        """Covered fraction and its standard error for boundary cells at `order`."""
        xyz = _pix2vec(order, cells)
        local = self._local_boundary(part, xyz, _pixrad(order))
        if local is None:
            return _subsampled_fraction(self, part, cells, order)
        a, b, c, ok = local
        frac = np.empty(len(cells))
        sigma = np.zeros(len(cells))
        frac[ok] = _halfplane_cell_fraction(xyz[ok], a[ok], b[ok], c[ok], cells[ok], order)
        if np.any(~ok):
            frac[~ok], sigma[~ok] = _subsampled_fraction(self, part[~ok], cells[~ok], order)
        return frac, sigma


@dataclass(eq=False)
class Circles(Shape):
    """A union of discs ("caps"): centres in degrees, radii in radians.

    One disc is a spherical cap; many are a hole list. Point tests use a k-d tree on the unit
    vectors when there are many discs. Discs are rasterised by `countscale._discs` (one walk
    for all of them), not by `rasterise`.
    """

    ra_deg: np.ndarray
    dec_deg: np.ndarray
    radius_rad: np.ndarray
    centres: np.ndarray = field(init=False, repr=False)
    _tree: object = field(init=False, default=None, repr=False)

    def __post_init__(self):
        self.centres = radec_to_vec(self.ra_deg, self.dec_deg).reshape(-1, 3)
        self.radius_rad = np.asarray(self.radius_rad, dtype=float).reshape(-1)

    @property
    def n_parts(self):
        return len(self.radius_rad)

    def contains_vec(self, xyz):
        xyz = np.asarray(xyz, dtype=float).reshape(-1, 3)
        out = np.zeros(len(xyz), dtype=bool)
        if self.n_parts == 0 or len(xyz) == 0:
            return out
        if self.n_parts <= 8:
            for centre, radius in zip(self.centres, self.radius_rad, strict=True):
                out |= _angle_between(xyz, centre) <= radius
            return out
        # Many discs: test the k nearest centres, doubling k for the points whose k-th
        # neighbour is still close enough to hold them (so no disc is ever missed).
        if self._tree is None:
            from scipy.spatial import cKDTree

            self._tree = cKDTree(self.centres)
        max_chord = 2.0 * np.sin(min(np.pi, self.radius_rad.max()) / 2.0) * (1 + 1e-9)
        todo = np.arange(len(xyz))
        k = 8
        while len(todo):
            k = min(k, self.n_parts)
            dist, idx = self._tree.query(xyz[todo], k=k, distance_upper_bound=max_chord)
            found = idx < self.n_parts
            safe = np.where(found, idx, 0)
            chord_limit = 2.0 * np.sin(np.minimum(self.radius_rad[safe], np.pi) / 2.0)
            out[todo] |= np.any(found & (dist <= chord_limit), axis=1)
            more = found[:, -1] & ~out[todo] if k < self.n_parts else np.zeros(len(todo), bool)
            todo = todo[more]
            k *= 4
        return out

    def _part_contains(self, part, xyz):
        # chord <= 2 sin(r/2) is the same test as angle <= r, without a cross product.
        diff = xyz - self.centres[part]
        chord2 = np.einsum("ij,ij->i", diff, diff)
        return chord2 <= (2.0 * np.sin(np.minimum(self.radius_rad[part], np.pi) / 2.0)) ** 2


@dataclass(eq=False)
class Box(Shape):
    """RA/Dec box with constant-declination edges; RA range may wrap through 0.

    `ra_lo > ra_hi` means the box runs from ra_lo through 360/0 to ra_hi. A full RA range is
    given as (0, 360).
    """

    ra_lo: float
    ra_hi: float
    dec_lo: float
    dec_hi: float

    def __post_init__(self):
        # (0, 360) is the whole RA circle; equal limits are rejected by the caller.
        self.full_ra = (self.ra_hi - self.ra_lo) % 360.0 == 0.0
        self._lo = np.radians(self.ra_lo)
        self._hi = np.radians(self.ra_hi)
        self._dlo = np.radians(self.dec_lo)
        self._dhi = np.radians(self.dec_hi)
        self._corners = radec_to_vec(
            [self.ra_lo, self.ra_hi, self.ra_lo, self.ra_hi],
            [self.dec_lo, self.dec_lo, self.dec_hi, self.dec_hi],
        )

    def _ra_in(self, ra_rad):
        if self.full_ra:
            return np.ones(ra_rad.shape, dtype=bool)
        width = (self._hi - self._lo) % (2 * np.pi)
        return ((ra_rad - self._lo) % (2 * np.pi)) <= width

    def _radec(self, xyz):
        ra = np.arctan2(xyz[:, 1], xyz[:, 0]) % (2 * np.pi)
        dec = np.arctan2(xyz[:, 2], np.hypot(xyz[:, 0], xyz[:, 1]))
        return ra, dec

    def contains_vec(self, xyz):
        xyz = np.asarray(xyz, dtype=float).reshape(-1, 3)
        ra, dec = self._radec(xyz)
        return (dec >= self._dlo) & (dec <= self._dhi) & self._ra_in(ra)

    def _boundary_distance(self, part, xyz):
        ra, dec = self._radec(xyz)
        ra_in = self._ra_in(ra)
        corner_dist = np.min(
            np.stack([_angle_between(xyz, c) for c in self._corners]), axis=0
        )
        dist = np.full(len(xyz), np.inf)
        # Constant-declination edges: within the RA range the nearest point is on the same
        # meridian; outside it, an end point (distance grows with the RA difference).
        for dec_edge in (self._dlo, self._dhi):
            if abs(dec_edge) >= np.pi / 2:
                continue
            edge = np.where(ra_in, np.abs(dec - dec_edge), corner_dist)
            dist = np.minimum(dist, edge)
        if not self.full_ra:
            for ra_edge in (self._lo, self._hi):
                dra = ra - ra_edge
                # Declination of the nearest point of the great circle through the meridian.
                dec_star = np.arctan2(np.sin(dec), np.cos(dec) * np.cos(dra))
                on_arc = (dec_star >= self._dlo) & (dec_star <= self._dhi)
                edge = np.where(
                    on_arc, np.arcsin(np.clip(np.abs(np.cos(dec) * np.sin(dra)), 0, 1)), corner_dist
                )
                dist = np.minimum(dist, edge)
        return dist


    def _local_boundary(self, part, xyz, radius_rad):
        ra, dec = self._radec(xyz)
        ra_in = self._ra_in(ra)
        e1, e2 = _orthonormal_basis(xyz)
        n_near = np.zeros(len(xyz), dtype=np.int8)
        corner_near = np.zeros(len(xyz), dtype=bool)
        best = np.full(len(xyz), np.inf)
        coef = np.zeros((3, len(xyz)))
        z_hat = np.array([0.0, 0.0, 1.0])

        def consider(dist, on_edge, a, b, c):
            nonlocal best
            near = dist <= radius_rad
            n_near[near] += 1
            corner_near[near & ~on_edge] = True
            closer = dist < best
            coef[:, closer] = np.stack([a, b, c])[:, closer]
            best = np.minimum(best, dist)

        for dec_edge, sign in ((self._dlo, 1.0), (self._dhi, -1.0)):
            if abs(dec_edge) >= np.pi / 2:
                continue
            # sin(dec) - sin(dec_edge) >= 0 inside (times sign), linear in the tangent plane;
            # the neglected curvature moves the line by ~(cell size)^2 tan(dec) / 8.
            dist = np.abs(dec - dec_edge)
            consider(
                np.where(ra_in, dist, np.inf),
                ra_in,
                sign * (e1 @ z_hat),
                sign * (e2 @ z_hat),
                sign * (xyz[:, 2] - np.sin(dec_edge)),
            )
        if not self.full_ra:
            for ra_edge, sign in ((self._lo, 1.0), (self._hi, -1.0)):
                pole = np.array([-np.sin(ra_edge), np.cos(ra_edge), 0.0])
                dra = ra - ra_edge
                dec_star = np.arctan2(np.sin(dec), np.cos(dec) * np.cos(dra))
                on_arc = (dec_star >= self._dlo) & (dec_star <= self._dhi)
                dist = np.where(on_arc, np.arcsin(np.clip(np.abs(xyz @ pole), 0, 1)), np.inf)
                # A meridian is a great circle: a straight line in the gnomonic plane.
                consider(dist, on_arc, sign * (e1 @ pole), sign * (e2 @ pole), sign * (xyz @ pole))
        if not self.full_ra:
            # A box over all RA has no corners: its "corners" at RA 0 are points of its
            # declination edges (treating them as corners sent those cells to sub-cell
            # counting for nothing).
            corner_dist = np.min(np.stack([_angle_between(xyz, c) for c in self._corners]),
                                 axis=0)
            corner_near |= corner_dist <= 2 * radius_rad
        ok = (n_near == 1) & ~corner_near
        return coef[0], coef[1], coef[2], ok


@dataclass(eq=False)
class LatitudeBand(Shape):
    """Galactic-latitude cut: |b| >= `b_deg` (``above=True``) or |b| < `b_deg`."""

    b_deg: float
    above: bool

    def _abs_b(self, xyz):
        gal = np.asarray(xyz, dtype=float).reshape(-1, 3) @ icrs_to_galactic_matrix().T
        return np.abs(np.arctan2(gal[:, 2], np.hypot(gal[:, 0], gal[:, 1])))

    def contains_vec(self, xyz):
        abs_b = self._abs_b(xyz)
        b0 = np.radians(self.b_deg)
        return abs_b >= b0 if self.above else abs_b < b0

    def _boundary_distance(self, part, xyz):
        return np.abs(self._abs_b(xyz) - np.radians(self.b_deg))

    def _local_boundary(self, part, xyz, radius_rad):
        pole = icrs_to_galactic_matrix()[2]  # galactic north pole in ICRS
        sin_b = xyz @ pole
        hemisphere = np.where(sin_b >= 0, 1.0, -1.0)
        sign = 1.0 if self.above else -1.0
        e1, e2 = _orthonormal_basis(xyz)
        # |sin b| - sin b0 >= 0 inside (for `above`), linear in the tangent plane.
        a = sign * hemisphere * (e1 @ pole)
        b = sign * hemisphere * (e2 @ pole)
        c = sign * (hemisphere * sin_b - np.sin(np.radians(self.b_deg)))
        ok = np.abs(np.arcsin(np.clip(sin_b, -1, 1))) > 2 * radius_rad
        return a, b, c, ok


@dataclass(eq=False)
class Polygon(Shape):
    """Spherical polygon with great-circle edges, smaller than a hemisphere.

    The interior is the smaller of the two regions the boundary encloses, whatever the
    winding. Point tests project onto the plane tangent at the polygon's centre (gnomonic),
    where great circles are straight lines, so the planar crossing test is exact.
    """

    vertices: np.ndarray  # (n, 3) unit vectors, validated by the caller

    def __post_init__(self):
        v = self.vertices
        centre = v.sum(axis=0)
        norm = np.linalg.norm(centre)
        if norm < 1e-12:
            raise InputError(
                "`polygon` must fit within a hemisphere; its vertices surround the sphere"
            )
        self.centre = centre / norm
        cos_to_vertices = v @ self.centre
        if np.any(cos_to_vertices <= np.cos(np.radians(89.0))):
            raise InputError(
                "`polygon` must fit within a hemisphere (all vertices within 89 degrees of "
                "their mean direction); got a vertex "
                f"{np.degrees(np.arccos(cos_to_vertices.min())):.2f} degrees away"
            )
        self.cos_bound = cos_to_vertices.min()
        e1, e2 = _orthonormal_basis(self.centre[None, :])
        self._e1, self._e2 = e1[0], e2[0]
        self.plane = self._project(v)
        _check_simple(self.plane)
        nxt = np.roll(v, -1, axis=0)
        normals = np.cross(v, nxt)
        self._normals = normals / np.linalg.norm(normals, axis=1)[:, None]
        self._next = nxt
        # Counter-clockwise seen from outside (positive area in the (e1, e2) plane, whose
        # normal is the centre) puts the interior on the side where p . (a x b) > 0.
        x, y = self.plane[:, 0], self.plane[:, 1]
        signed_area = 0.5 * np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y)
        self._inside_sign = 1.0 if signed_area > 0 else -1.0

    def _project(self, xyz):
        dot = xyz @ self.centre
        return np.stack([(xyz @ self._e1) / dot, (xyz @ self._e2) / dot], axis=-1)

    def contains_vec(self, xyz):
        xyz = np.asarray(xyz, dtype=float).reshape(-1, 3)
        out = np.zeros(len(xyz), dtype=bool)
        near = (xyz @ self.centre) >= self.cos_bound - 1e-12
        if not np.any(near):
            return out
        p = self._project(xyz[near])
        x, y = p[:, 0], p[:, 1]
        inside = np.zeros(len(p), dtype=bool)
        a = self.plane
        b = np.roll(a, -1, axis=0)
        for (ax, ay), (bx, by) in zip(a, b, strict=True):
            crosses = (ay > y) != (by > y)
            with np.errstate(divide="ignore", invalid="ignore"):
                x_cross = ax + (y - ay) * (bx - ax) / (by - ay)
            inside ^= crosses & (x < x_cross)
        out[near] = inside
        return out

    def _boundary_distance(self, part, xyz):
        dist = np.full(len(xyz), np.inf)
        for a, b, n in zip(self.vertices, self._next, self._normals, strict=True):
            s = xyz @ n
            foot = xyz - s[:, None] * n
            # The foot of the perpendicular lies on the arc a->b when it is between a and b
            # going the short way round (both cross products point along the edge normal).
            on_arc = (np.cross(a, foot) @ n >= 0) & (np.cross(foot, b) @ n >= 0)
            to_line = np.arcsin(np.clip(np.abs(s), 0, 1))
            to_ends = np.minimum(_angle_between(xyz, a), _angle_between(xyz, b))
            dist = np.minimum(dist, np.where(on_arc, to_line, to_ends))
        return dist

    def _local_boundary(self, part, xyz, radius_rad):
        e1, e2 = _orthonormal_basis(xyz)
        n_near = np.zeros(len(xyz), dtype=np.int16)
        vertex_near = np.zeros(len(xyz), dtype=bool)
        best = np.full(len(xyz), np.inf)
        coef = np.zeros((3, len(xyz)))
        for a, b, n in zip(self.vertices, self._next, self._normals, strict=True):
            s = xyz @ n
            foot = xyz - s[:, None] * n
            on_arc = (np.cross(a, foot) @ n >= 0) & (np.cross(foot, b) @ n >= 0)
            to_line = np.arcsin(np.clip(np.abs(s), 0, 1))
            dist = np.where(on_arc, to_line, np.inf)
            n_near += dist <= radius_rad
            closer = dist < best
            # A great-circle edge is a straight line in the gnomonic plane: exact.
            sign = self._inside_sign
            coef[:, closer] = (sign * np.stack([e1 @ n, e2 @ n, s]))[:, closer]
            best = np.minimum(best, dist)
            vertex_near |= _angle_between(xyz, a) <= 2 * radius_rad
        ok = (n_near == 1) & ~vertex_near
        return coef[0], coef[1], coef[2], ok


def _check_simple(plane):
    """Reject self-intersecting polygons (non-adjacent edges that cross)."""
    n = len(plane)
    a = plane
    b = np.roll(plane, -1, axis=0)
    for i in range(n):
        for j in range(i + 1, n):
            if j == i + 1 or (i == 0 and j == n - 1):
                continue
            if _segments_cross(a[i], b[i], a[j], b[j]):
                raise InputError(
                    f"`polygon` must not intersect itself; edge {i} crosses edge {j}"
                )


def _segments_cross(p1, p2, q1, q2):
    def orient(a, b, c):
        return (b[0] - a[0]) * (c[1] - a[1]) - (b[1] - a[1]) * (c[0] - a[0])

    d1, d2 = orient(q1, q2, p1), orient(q1, q2, p2)
    d3, d4 = orient(p1, p2, q1), orient(p1, p2, q2)
    if ((d1 > 0) != (d2 > 0)) and ((d3 > 0) != (d4 > 0)) and d1 * d2 != 0 and d3 * d4 != 0:
        return True
    # Touching or collinear overlap also makes the boundary non-simple.
    scale = max(np.abs([*p1, *p2, *q1, *q2]).max(), 1e-300)
    eps = 1e-14 * scale * scale

    def on_segment(a, b, c):
        return (
            min(a[0], b[0]) - eps <= c[0] <= max(a[0], b[0]) + eps
            and min(a[1], b[1]) - eps <= c[1] <= max(a[1], b[1]) + eps
        )

    return (
        (abs(d1) <= eps and on_segment(q1, q2, p1))
        or (abs(d2) <= eps and on_segment(q1, q2, p2))
        or (abs(d3) <= eps and on_segment(p1, p2, q1))
        or (abs(d4) <= eps and on_segment(p1, p2, q2))
    )


# ----------------------------------------------------------------------------------------
# covered fraction of boundary cells
# ----------------------------------------------------------------------------------------
def _cell_vertices(cells, order):
    """Corners (4, N, 3) of NEST cells, from the centres of their four children.

    At the orders where boundaries are measured the cell is a parallelogram to high accuracy:
    c(u, v) = P + u A + v B with the children at u, v in {1/4, 3/4}.
    """
    base = 4 * cells
    c00, c10, c01, c11 = (_pix2vec(order + 1, base + k) for k in range(4))
    mid = 0.25 * (c00 + c10 + c01 + c11)
    half_a = 0.5 * ((c10 - c00) + (c11 - c01))
    half_b = 0.5 * ((c01 - c00) + (c11 - c10))
    return np.stack(
        [mid - half_a - half_b, mid + half_a - half_b, mid + half_a + half_b, mid - half_a + half_b]
    )


def _halfplane_cell_fraction(centres, a, b, c, cells, order):
    """Exact fraction of each cell where a x + b y + c >= 0 (gnomonic plane at `centres`).

    The cell (a parallelogram in that plane) is clipped by the line; the clipped polygon's
    area comes from the shoelace sum over the kept edge pieces plus the cutting chord.
    """
    corners = _cell_vertices(cells, order)
    e1, e2 = _orthonormal_basis(centres)
    dot = np.einsum("kij,ij->ki", corners, centres)
    x = np.einsum("kij,ij->ki", corners, e1) / dot
    y = np.einsum("kij,ij->ki", corners, e2) / dot
    f = a * x + b * y + c
    total = np.zeros(len(cells))
    kept = np.zeros(len(cells))
    exit_x = np.zeros(len(cells))
    exit_y = np.zeros(len(cells))
    entry_x = np.zeros(len(cells))
    entry_y = np.zeros(len(cells))
    for k in range(4):
        j = (k + 1) % 4
        px, py, qx, qy, fp, fq = x[k], y[k], x[j], y[j], f[k], f[j]
        total += px * qy - py * qx
        p_in, q_in = fp >= 0, fq >= 0
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.where(p_in != q_in, fp / (fp - fq), 0.0)
        cx, cy = px + t * (qx - px), py + t * (qy - py)
        kept += np.where(p_in & q_in, px * qy - py * qx, 0.0)
        leaving = p_in & ~q_in
        entering = ~p_in & q_in
        kept += np.where(leaving, px * cy - py * cx, 0.0)
        kept += np.where(entering, cx * qy - cy * qx, 0.0)
        exit_x, exit_y = np.where(leaving, cx, exit_x), np.where(leaving, cy, exit_y)
        entry_x, entry_y = np.where(entering, cx, entry_x), np.where(entering, cy, entry_y)
    kept += exit_x * entry_y - exit_y * entry_x
    return np.clip(kept / total, 0.0, 1.0)


def _subsampled_fraction(shape, part, cells, order):
    """Covered fraction by refining `SUB_ORDERS` more orders and testing the sub-cells.

    Sub-cells that the shape's boundary may cross are tested at one point uniform inside
    each (stratified sampling, seeded by the cells). Their centres would not do: HEALPix
    centres lie on iso-latitude rows, so along a declination edge the errors of the
    crossed sub-cells all have the same sign and add up (about 8 of the 256 sub-cells
    of a corner cell), while the standard error below assumes they are independent,
    which they are for random points: variance 1/6 per crossed sub-cell (a covered part
    u of a sub-cell, u uniform, gives Bernoulli variance u (1 - u), 1/6 on average), and
    about half of the sub-cells tested are crossed (the others lie in the band the
    classification cannot clear), so 1/12 per tested sub-cell.
    """
    depth = min(SUB_ORDERS, HEALPIX_MAX_ORDER - order)
    rng = np.random.default_rng([order, len(cells), int(cells[:1].sum()) if len(cells) else 0])
    units = np.zeros(len(cells))
    crossing = np.zeros(len(cells))
    idx = np.arange(len(cells))
    sub_cells, sub_idx = cells, idx
    for level in range(1, depth + 1):
        sub_cells = (sub_cells[:, None] * 4 + np.arange(4)).reshape(-1)
        sub_idx = np.repeat(sub_idx, 4)
        if level < depth:
            xyz = _pix2vec(order + level, sub_cells)
            state = shape.classify(part[sub_idx], xyz, _pixrad(order + level))
            full = state == 1
            np.add.at(units, sub_idx[full], 4 ** (depth - level))
            keep = state == 0
            sub_cells, sub_idx = sub_cells[keep], sub_idx[keep]
        else:
            jitter = HEALPIX_MAX_ORDER - order - depth
            fine = (sub_cells << (2 * jitter)) + rng.integers(0, 4**jitter, len(sub_cells))
            xyz = _pix2vec(HEALPIX_MAX_ORDER, fine)
            inside = shape._part_contains(part[sub_idx], xyz)
            np.add.at(units, sub_idx[inside], 1.0)
            np.add.at(crossing, sub_idx, 1.0)
    if depth == 0:
        xyz = _pix2vec(order, cells)
        return shape._part_contains(part, xyz).astype(float), np.full(len(cells), 0.5)
    scale = 4.0**depth
    return units / scale, np.sqrt(crossing / 12.0) / scale


def point_test_fraction(test, cells, order, depth=SUB_ORDERS, pairs=None, minus=None):
    """Covered fraction of `cells` from a point test at one jittered point per sub-cell.

    Used where two boundaries meet in one cell (overlapping holes, a shape minus a shape that
    shares its edge): the fractions of the two cannot be combined without knowing where in
    the cell each lies, but the combined exact point test can be sampled. Each of the
    4**depth sub-cells gets one point uniform inside it (stratified sampling): sub-cell
    centres would alias with the iso-latitude rows of HEALPix centres and bias long edges.
    The generator is seeded from the cells, so the result is reproducible.

    `test` has ``contains_vec(xyz)``; or, with `pairs` = (cell_index, part) arrays, `test` is
    a multi-part shape and a point is inside when one of its cell's listed parts holds it
    (``test._part_contains``), which avoids searching all parts. With `minus` = (shape,
    cell_index, part), a point is inside when `test` holds it and none of its cell's listed
    parts of `shape` does (a footprint minus the discs whose edges cross the cell).

    Returns the fraction and its standard error: sqrt(n_crossed / 6) / 4**depth, with about
    2 x 1.3 x 2**depth sub-cells crossed by two boundaries and variance 1/6 in each.
    """
    depth = min(depth, HEALPIX_MAX_ORDER - order)
    per_cell = 4**depth
    jitter_levels = HEALPIX_MAX_ORDER - order - depth
    rng = np.random.default_rng([order, len(cells), int(cells[:1].sum()) if len(cells) else 0])
    frac = np.empty(len(cells))
    step = max(1, 2_000_000 // per_cell)
    offsets = np.arange(per_cell, dtype=np.int64)
    listed = None
    if pairs is not None:
        listed = (test, *pairs)
    elif minus is not None:
        listed = minus
    if listed is not None:
        shape, pair_cell, pair_part = listed
        order_pairs = np.argsort(pair_cell, kind="stable")
        pair_cell, pair_part = pair_cell[order_pairs], pair_part[order_pairs]
    for lo in range(0, len(cells), step):
        block = cells[lo : lo + step]
        sub = ((block[:, None] << (2 * depth)) + offsets).reshape(-1)
        fine = (sub << (2 * jitter_levels)) + rng.integers(0, 4**jitter_levels, size=len(sub))
        xyz = _pix2vec(HEALPIX_MAX_ORDER, fine)
        if pairs is None:
            inside = test.contains_vec(xyz).reshape(len(block), per_cell)
        if listed is not None:
            first, last = np.searchsorted(pair_cell, [lo, lo + len(block)])
            local = pair_cell[first:last] - lo
            points = xyz.reshape(len(block), per_cell, 3)[local].reshape(-1, 3)
            parts = np.repeat(pair_part[first:last], per_cell)
            hit = shape._part_contains(parts, points).reshape(len(local), per_cell)
            in_listed = np.zeros((len(block), per_cell), dtype=bool)
            np.logical_or.at(in_listed, local, hit)
            inside = in_listed if pairs is not None else inside & ~in_listed
        frac[lo : lo + step] = inside.mean(axis=1)
    sigma = np.full(len(cells), np.sqrt(2 * 1.3 * 2**depth / 6.0) / per_cell)
    return frac, sigma


# ----------------------------------------------------------------------------------------
# rasterisation
# ----------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Raster:
    """Cells of one shape at `max_order`: full intervals and fractional boundary cells.

    `starts`, `ends` are half-open intervals of NEST indices at `max_order`, possibly
    overlapping (parts of a union); `cells`, `fraction`, `sigma` are boundary cells (possibly
    repeated across parts), `parts` the part each boundary cell belongs to.
    """

    max_order: int
    starts: np.ndarray
    ends: np.ndarray
    cells: np.ndarray
    fraction: np.ndarray
    sigma: np.ndarray
    parts: np.ndarray


def rasterise(shape, max_order):
    """Cells covered by `shape` down to `max_order` (see `Raster`)."""
    parts_per_batch = max(1, _BATCH_PAIRS // 200)
    starts, ends, cells_out, frac_out, sigma_out, parts_out = [], [], [], [], [], []
    for lo in range(0, max(shape.n_parts, 1), parts_per_batch):
        part_ids = np.arange(lo, min(lo + parts_per_batch, shape.n_parts))
        _refine(shape, part_ids, max_order, starts, ends, cells_out, frac_out, sigma_out,
                parts_out)
        # Merge each batch's whole cells at once: interior cells of a disc run together in
        # NEST order, so this keeps memory near the size of the final footprint.
        if len(starts) > 1:
            merged = merge_intervals(np.concatenate(starts), np.concatenate(ends))
            starts[:], ends[:] = [merged[0]], [merged[1]]
    cat = np.concatenate
    empty_i = np.zeros(0, dtype=np.int64)
    empty_f = np.zeros(0, dtype=np.float32)
    return Raster(
        max_order,
        cat(starts) if starts else empty_i,
        cat(ends) if ends else empty_i,
        cat(cells_out) if cells_out else empty_i,
        cat(frac_out) if frac_out else empty_f,
        cat(sigma_out) if sigma_out else empty_f,
        cat(parts_out) if parts_out else np.zeros(0, dtype=np.int32),
    )


def merge_intervals(starts, ends):
    """Union of possibly overlapping half-open intervals, as sorted disjoint intervals."""
    if len(starts) == 0:
        return starts, ends
    idx = np.argsort(starts, kind="stable")
    starts, ends = starts[idx], ends[idx]
    reach = np.maximum.accumulate(ends)
    new = np.empty(len(starts), dtype=bool)
    new[0] = True
    new[1:] = starts[1:] > reach[:-1]
    group = np.cumsum(new) - 1
    out_starts = starts[new]
    out_ends = np.zeros(len(out_starts), dtype=np.int64)
    np.maximum.at(out_ends, group, ends)
    return out_starts, out_ends


#: Most boundary cells a shape may put at `max_order` (each costs ~50 bytes while it is
#: measured): beyond this the build would need several GB (order 29 on a 40 deg^2 box asks for
#: ~5e8). A readability and memory choice, no source.
MAX_BOUNDARY_CELLS = 50_000_000


def _check_boundary_budget(n_cells, order, max_order):
    """Refuse early when the boundary, which doubles in cells per order, will not fit."""
    if order < 8 or n_cells < 1000:
        return
    projected = n_cells * 2.0 ** (max_order - order)
    if projected > MAX_BOUNDARY_CELLS:
        fits = order + math.floor(math.log2(MAX_BOUNDARY_CELLS / n_cells))
        raise InputError(
            f"`max_order` {max_order} would put about {projected:.1e} cells on the footprint's "
            f"boundary (at most {MAX_BOUNDARY_CELLS:.0e} fit in memory); use max_order <= "
            f"{fits}"
        )


def _refine(shape, part_ids, max_order, starts, ends, cells_out, frac_out, sigma_out,
            parts_out):
    cells = np.tile(np.arange(12, dtype=np.int64), len(part_ids))
    part = np.repeat(part_ids, 12)
    order = 0
    while True:
        state = np.empty(len(cells), dtype=np.int8)
        for lo in range(0, len(cells), _BATCH_PAIRS):
            sl = slice(lo, lo + _BATCH_PAIRS)
            state[sl] = shape.classify_cells(part[sl], cells[sl], order)
        full = cells[state == 1]
        if len(full):
            shift = 2 * (max_order - order)
            starts.append(full << shift)
            ends.append((full + 1) << shift)
        keep = state == 0
        cells, part = cells[keep], part[keep]
        if order == max_order or len(cells) == 0:
            break
        _check_boundary_budget(len(cells), order, max_order)
        cells = (cells[:, None] * 4 + np.arange(4, dtype=np.int64)).reshape(-1)
        part = np.repeat(part, 4)
        order += 1
    if len(cells) == 0:
        return
    frac, sigma = shape._fraction(part, cells, max_order)
    # A cell touched by less than `_FRACTION_TOLERANCE` of its area is untouched, and one
    # covered to within it is whole.
    frac = np.where(frac < _FRACTION_TOLERANCE, 0.0, frac)
    frac = np.where(frac > 1.0 - _FRACTION_TOLERANCE, 1.0, frac)
    whole = frac >= 1.0
    if np.any(whole):
        starts.append(cells[whole])
        ends.append(cells[whole] + 1)
    some = (frac > 0.0) & ~whole
    cells_out.append(cells[some])
    parts_out.append(part[some].astype(np.int32))
    frac_out.append(frac[some].astype(np.float32))
    sigma_out.append(sigma[some].astype(np.float32))
