"""Populations that change across the sky: counts per field regressed on sky covariates.

Scaling a patch's count by its share of the sky assumes the population is the same
everywhere. Stars are not: their surface density rises steeply toward the galactic plane and
toward the galactic centre, so a few high-latitude fields scaled by area miss the whole-sky
number by large factors. This module fits the counts of many fields (or regions of one large
footprint) with a log-linear model in covariates that follow the sky — galactic latitude and
longitude, and any HEALPix map the user gives (extinction, depth, a stellar-density map) — and
integrates the fitted surface density over a target part of the sky, with its uncertainty,
the spread between covariate sets, and a warning (and a wider interval) where the target
reaches covariate values the survey never saw.

Topics
------
BASIS, CovariateMap, covariate_matrix
    The covariates: a small documented basis in galactic coordinates and user maps.
SkyUnits
    The data: source counts brighter than a magnitude limit per unit (connected field ×
    jackknife region), with each HEALPix cell's area and completeness.
CovariateFit
    One covariate set: Poisson or negative-binomial likelihood, fitted with its covariance.
SkyModel, SkyPrediction
    Several covariate sets weighted by AIC; their integral over a target footprint as Monte
    Carlo draws with an error budget, and the part of the target outside the observed
    covariate range.
target_sky_footprint, naive_total, cell_completeness
    The run file's ``[totals] target_sky``, plain area scaling, and the completeness of the
    counts per cell.

The model
---------
The expected count of unit i is ``mu_i = sum_{c in i} w_c exp(beta_0 + sum_j beta_j x_j(c))``
over the unit's HEALPix cells c, with ``w_c`` the cell's covered area [deg^2] times the
completeness of sources brighter than the limit there, and ``x_j(c)`` the covariates at the
cell's centre; so ``exp(beta . x)`` is the surface density per deg^2 of all sources (detected
or not). Counts are Poisson, or negative binomial with variance ``mu + alpha mu^2`` (the
"NB2" form, Cameron & Trivedi 1998, Regression Analysis of Count Data, ch. 3; from memory):
clustering, and any structure the covariates do not describe, make counts of fields scatter
more than Poisson, and ``alpha`` measures how much. The coefficients are found by Fisher
scoring at each ``alpha``, ``alpha`` by maximising the profile likelihood; their covariance is
the inverse Fisher information (the standard errors of a generalised linear model).

Model choice: every covariate set is fitted, and sets are weighted by their Akaike weights
``w_k ∝ exp(-ΔAIC_k / 2)`` (Burnham & Anderson 2002, Model Selection and Multimodel
Inference, 2nd ed., section 2.9; from memory). The total's draws are a mixture: a set chosen
with its weight, then coefficients from that set's normal approximation.

Beyond the data: a target cell is "outside the observed range" when any of its covariates lies
outside the range that covariate takes over the footprint. The part of the total from such
cells is an extrapolation; its draws are multiplied by ``exp(s z)``, z standard normal, with
``s = |ln(T_out / T_out_clamped)|``, the log ratio of that part as the model extrapolates it
and as it would be with every covariate held at the edge of the observed range. So the wider
the model's extrapolation moves the answer from what the data saw, the wider the interval
(a choice of this project, stated beside the number in reports).

Examples
--------
>>> from countscale.footprint import Footprint
>>> sky = target_sky_footprint(None, max_order=6)   # absent target_sky: the whole sky
>>> round(sky.area_deg2, 3)
41252.961
"""

from __future__ import annotations

import math
import os
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from types import SimpleNamespace
from typing import Any

import healpy as hp
import numpy as np
from scipy import linalg, optimize, special

from countscale._checks import as_generator
from countscale.errors import InputError, InputTypeError
from countscale.estimate import Estimate, variance_budget

__all__ = [
    "BASIS",
    "DEFAULT_STAR_SETS",
    "TARGET_MAX_ORDER",
    "CovariateFit",
    "CovariateMap",
    "SkyModel",
    "SkyModelWarning",
    "SkyPrediction",
    "SkyUnits",
    "cell_completeness",
    "covariate_matrix",
    "galactic_lb",
    "naive_total",
    "target_sky_footprint",
]


class SkyModelWarning(UserWarning):
    """A sky total that leans on an extrapolation, a poor fit, or low completeness."""


# --------------------------------------------------------------------------------------------
# Covariates
# --------------------------------------------------------------------------------------------

#: |sin b| is floored at sin(0.1 deg) so that log and cot terms stay finite in the plane.
SIN_B_FLOOR = math.sin(math.radians(0.1))


def _sin_abs_b(l_deg: np.ndarray, b_deg: np.ndarray) -> np.ndarray:
    return np.maximum(np.abs(np.sin(np.radians(b_deg))), SIN_B_FLOOR)


@dataclass(frozen=True)
class BasisFunction:
    """One covariate of galactic longitude l and latitude b (degrees)."""

    name: str
    formula: str
    function: Callable[[np.ndarray, np.ndarray], np.ndarray] = field(repr=False)
    why: str = ""


def _log_sin_b(l_deg, b_deg):
    return np.log(_sin_abs_b(l_deg, b_deg))


def _cos_l_cot_b(l_deg, b_deg):
    return np.cos(np.radians(l_deg)) * np.cos(np.radians(b_deg)) / _sin_abs_b(l_deg, b_deg)


#: The galactic basis. Disk stars give the shapes: an exponential disk of scale height h_z
#: seen to distance R has N(b) = n0 (h_z / sin|b|)^3 gamma(3, R sin|b| / h_z) per sr (the
#: integral of r^2 exp(-r sin|b| / h_z); disk models: Bahcall & Soneira 1980, ApJS 44, 73),
#: which goes as sin|b|^-3 where R sin|b| >> h_z and is flat where it is << h_z; a density that
#: also falls outward along the plane (exp(X / L), X toward the galactic centre) adds, to first
#: order in h_z / L, a term 3 (h_z / L) cos l cot|b| to ln N.
BASIS: dict[str, BasisFunction] = {
    b.name: b for b in (
        BasisFunction("log_sin_b", "ln max(|sin b|, sin 0.1°)", _log_sin_b,
                      "power law in sin|b| (disk seen deep: exponent -3; isotropic: 0)"),
        BasisFunction("sin_abs_b", "|sin b|", lambda l_deg, b_deg: _sin_abs_b(l_deg, b_deg),
                      "curvature between the shallow and the deep disk regimes"),
        BasisFunction("sin_b", "sin b", lambda l_deg, b_deg: np.sin(np.radians(b_deg)),
                      "north-south asymmetry (the Sun above the plane, warps)"),
        BasisFunction("cos_l_cos_b", "cos l cos b",
                      lambda l_deg, b_deg: np.cos(np.radians(l_deg)) * np.cos(np.radians(b_deg)),
                      "direction cosine toward the galactic centre"),
        BasisFunction("sin_l_cos_b", "sin l cos b",
                      lambda l_deg, b_deg: np.sin(np.radians(l_deg)) * np.cos(np.radians(b_deg)),
                      "direction cosine along galactic rotation"),
        BasisFunction("cos_l_cot_b", "cos l cos b / max(|sin b|, sin 0.1°)", _cos_l_cot_b,
                      "first-order effect of a density falling outward along the plane"),
    )
}

#: Covariate sets fitted for stars when the run file names none (each also gets an intercept).
DEFAULT_STAR_SETS: tuple[tuple[str, ...], ...] = (
    ("log_sin_b", "cos_l_cot_b"),
    ("log_sin_b", "sin_abs_b", "cos_l_cot_b"),
    ("log_sin_b", "cos_l_cos_b"),
)

#: Transforms a covariate map may be given with.
MAP_TRANSFORMS = ("linear", "log")


def galactic_lb(order: int, cells: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Galactic longitude and latitude (degrees) of the centres of NEST cells of ``order``."""
    from countscale._geometry import icrs_to_galactic_matrix

    xyz = np.stack(hp.pix2vec(2**order, np.asarray(cells, dtype=np.int64), nest=True), axis=-1)
    gal = xyz @ np.asarray(icrs_to_galactic_matrix()).T
    l_deg = np.degrees(np.arctan2(gal[:, 1], gal[:, 0])) % 360.0
    b_deg = np.degrees(np.arcsin(np.clip(gal[:, 2], -1.0, 1.0)))
    return l_deg, b_deg


@dataclass(frozen=True, eq=False)
class CovariateMap:
    """A HEALPix map used as a covariate (extinction, depth, stellar density, ...).

    Parameters
    ----------
    name : str
        How covariate sets refer to it.
    values : array_like of float, shape (12 nside²,)
        NaN or ``healpy.UNSEEN`` where there is no data.
    nest : bool
    transform : {"linear", "log"}
        ``"log"`` uses ln(value) (values must then be > 0 where used).
    path : str, optional
        For messages.
    """

    name: str
    values: np.ndarray
    nest: bool = False
    transform: str = "linear"
    path: str | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name.strip():
            raise InputTypeError(f"`name` of a covariate map must be a non-empty string; "
                                 f"got {self.name!r}")
        if self.name in BASIS:
            raise InputError(f"covariate map name {self.name!r} is taken by the galactic "
                             f"basis ({', '.join(BASIS)}); choose another")
        if self.transform not in MAP_TRANSFORMS:
            raise InputError(f"`transform` of covariate map {self.name!r} must be one of "
                             f"{', '.join(MAP_TRANSFORMS)}; got {self.transform!r}")
        label = f"covariate map {self.name!r}" + (f" ('{self.path}')" if self.path else "")
        try:
            values = np.array(self.values, dtype=float, copy=True)
        except (TypeError, ValueError) as exc:
            raise InputTypeError(f"{label} must be numeric; got "
                                 f"{type(self.values).__name__}") from exc
        if values.ndim != 1 or not hp.isnpixok(values.size):
            raise InputError(f"{label} must be a HEALPix map of 12 nside**2 pixels; got "
                             f"{values.size} values (shape {values.shape})")
        values[hp.mask_bad(values)] = np.nan
        if np.isinf(values).any():
            raise InputError(f"{label} values must be finite or NaN (no data); got inf")
        values.setflags(write=False)
        object.__setattr__(self, "values", values)
        object.__setattr__(self, "nest", bool(self.nest))

    @classmethod
    def read(cls, name: str, path: str | os.PathLike, *, nest: bool | None = None,
             transform: str = "linear") -> CovariateMap:
        """Read the first column of a HEALPix FITS map (full-sky or partial)."""
        from pathlib import Path

        from countscale.footprint import _read_healpix_fits

        values, pixels, nside, is_nest = _read_healpix_fits(Path(path), nest)
        if pixels is not None:
            full = np.full(12 * nside * nside, np.nan)
            if pixels.size and (pixels.min() < 0 or pixels.max() >= full.size):
                raise InputError(f"{path}: PIXEL values must be in [0, {full.size}); got "
                                 f"{int(pixels.min())}..{int(pixels.max())}")
            full[pixels] = values
            values = full
        return cls(name, values, nest=is_nest, transform=transform, path=os.fspath(path))

    @property
    def nside(self) -> int:
        return int(hp.npix2nside(self.values.size))

    def at_cells(self, order: int, cells: np.ndarray) -> np.ndarray:
        """The covariate at the centres of NEST ``cells`` of ``order`` (NaN: no data)."""
        x, y, z = hp.pix2vec(2**order, np.asarray(cells, dtype=np.int64), nest=True)
        values = self.values[hp.vec2pix(self.nside, x, y, z, nest=self.nest)]
        if self.transform == "log":
            with np.errstate(divide="ignore", invalid="ignore"):
                values = np.where(values > 0, np.log(np.where(values > 0, values, 1.0)), np.nan)
        return values


def _maps_by_name(maps: Any) -> dict[str, CovariateMap]:
    if maps is None:
        return {}
    if isinstance(maps, Mapping):
        maps = list(maps.values())
    out: dict[str, CovariateMap] = {}
    for item in maps:
        if not isinstance(item, CovariateMap):
            raise InputTypeError(f"`maps` must hold CovariateMap objects; got "
                                 f"{type(item).__name__}")
        if item.name in out:
            raise InputError(f"`maps`: two covariate maps are named {item.name!r}")
        out[item.name] = item
    return out


def covariate_matrix(names: Sequence[str], order: int, cells: np.ndarray, maps: Any = None,
                     where: str = "the footprint") -> np.ndarray:
    """Covariates (columns, in ``names`` order) at the centres of NEST ``cells``.

    Raises
    ------
    InputError
        An unknown name, or a map with no value (NaN) at one of the cells, naming the map, how
        many cells and where the first one is.
    """
    by_name = _maps_by_name(maps)
    cells = np.asarray(cells, dtype=np.int64)
    columns = []
    l_deg = b_deg = None
    for name in names:
        if name in BASIS:
            if l_deg is None:
                l_deg, b_deg = galactic_lb(order, cells)
            columns.append(BASIS[name].function(l_deg, b_deg))
        elif name in by_name:
            values = by_name[name].at_cells(order, cells)
            bad = np.flatnonzero(np.isnan(values))
            if bad.size:
                ra, dec = hp.pix2ang(2**order, int(cells[bad[0]]), nest=True, lonlat=True)
                rule = (" (or <= 0, with transform = \"log\")"
                        if by_name[name].transform == "log" else "")
                raise InputError(
                    f"covariate map {name!r}"
                    + (f" ('{by_name[name].path}')" if by_name[name].path else "")
                    + f" has no value (NaN{rule}) in {bad.size} cell(s) of {where}, e.g. at "
                    f"RA {float(ra):.4f}, Dec {float(dec):.4f}"
                )
            columns.append(values)
        else:
            known = [*BASIS, *by_name]
            raise InputError(f"covariate {name!r} is not known; expected one of "
                             f"{', '.join(known)}")
    if not columns:
        return np.zeros((cells.size, 0))
    return np.column_stack(columns).astype(float)


# --------------------------------------------------------------------------------------------
# The data: counts per unit, area and completeness per cell
# --------------------------------------------------------------------------------------------

#: Most cells a unit table holds: order 10 is lowered until the footprint has fewer cells.
_MAX_UNIT_CELLS = 2_000_000


@dataclass(frozen=True, eq=False)
class SkyUnits:
    """Counts per unit and the cells that make each unit.

    A unit is one connected field of the footprint, or one jackknife region within it when
    regions are given (so a single large footprint still gives many units, and separated
    fields are never mixed).

    Attributes
    ----------
    order : int
        HEALPix order of the cells.
    cells : int64 ndarray, shape (n_cells,)
        NEST cells holding coverage (sorted).
    area_deg2 : ndarray, shape (n_cells,)
        Covered area of each cell.
    completeness : ndarray, shape (n_cells,)
        Fraction of the sources brighter than the limit detected in each cell (1 if not given).
    unit : int ndarray, shape (n_cells,)
        Unit of each cell, 0 .. n_units - 1.
    counts : int64 ndarray, shape (n_units,)
        Sources per unit.
    field, region : int ndarray, shape (n_units,)
        The field and the region (-1: none given) each unit is.
    """

    order: int
    cells: np.ndarray
    area_deg2: np.ndarray
    completeness: np.ndarray
    unit: np.ndarray
    counts: np.ndarray
    field: np.ndarray
    region: np.ndarray

    @property
    def n_units(self) -> int:
        return int(self.counts.size)

    @property
    def n_fields(self) -> int:
        return int(np.unique(self.field).size)

    @property
    def weight_deg2(self) -> np.ndarray:
        """Area × completeness of each cell [deg^2]: what a density is multiplied by."""
        return self.area_deg2 * self.completeness

    @property
    def unit_area_deg2(self) -> np.ndarray:
        return np.bincount(self.unit, weights=self.area_deg2, minlength=self.n_units)

    @property
    def unit_exposure_deg2(self) -> np.ndarray:
        return np.bincount(self.unit, weights=self.weight_deg2, minlength=self.n_units)

    def unit_lb(self) -> tuple[np.ndarray, np.ndarray]:
        """Area-weighted mean direction of each unit in galactic (l, b), degrees."""
        l_deg, b_deg = galactic_lb(self.order, self.cells)
        lr, br = np.radians(l_deg), np.radians(b_deg)
        xyz = np.stack([np.cos(br) * np.cos(lr), np.cos(br) * np.sin(lr), np.sin(br)], axis=-1)
        mean = np.stack([np.bincount(self.unit, weights=self.area_deg2 * xyz[:, k],
                                     minlength=self.n_units) for k in range(3)], axis=-1)
        mean /= np.linalg.norm(mean, axis=1, keepdims=True)
        return (np.degrees(np.arctan2(mean[:, 1], mean[:, 0])) % 360.0,
                np.degrees(np.arcsin(np.clip(mean[:, 2], -1, 1))))

    @classmethod
    def from_footprint(cls, footprint: Any, source_cells: Any, *, source_order: int = 10,
                       regions: Any = None, order: int | None = None,
                       completeness: Callable[[int, np.ndarray], np.ndarray] | None = None
                       ) -> SkyUnits:
        """Units of a footprint and the number of sources in each.

        Parameters
        ----------
        footprint : countscale.footprint.Footprint
        source_cells : int array_like
            NEST cell of ``source_order`` of every counted source (all inside the footprint).
        source_order : int
            Order of ``source_cells`` (the tally's ``cell`` column: 10).
        regions : countscale.footprint.Regions, optional
            Jackknife regions; each field is split along them.
        order : int, optional
            Cell order of the units; default ``source_order``, lowered while the footprint has
            more than 2 million cells of that order.
        completeness : callable, optional
            ``completeness(order, cells) -> fraction`` of the counted sources detected in
            each cell; default 1.
        """
        if order is None:
            order = source_order
            while order > 0 and footprint.area_deg2 / (
                    hp.nside2pixarea(2**order, degrees=True)) > _MAX_UNIT_CELLS:
                order -= 1
        if order > source_order:
            raise InputError(f"`order` ({order}) must be <= `source_order` ({source_order})")
        fields = footprint.fields(order)
        cells, area_fraction = footprint.coverage_cells(order)
        if not np.array_equal(cells, fields.cells):
            raise RuntimeError("fields and coverage cells disagree")  # pragma: no cover - bug
        field_label = fields.labels.astype(np.int64)
        if regions is not None:
            x, y, z = hp.pix2vec(2**order, cells, nest=True)
            ra, dec = hp.vec2ang(np.stack([x, y, z], axis=-1), lonlat=True)
            region_label = regions.label(ra, dec).astype(np.int64)
        else:
            region_label = np.full(cells.size, -1, dtype=np.int64)
        pairs = field_label * (int(region_label.max()) + 2) + (region_label + 1)
        unique_pairs, unit = np.unique(pairs, return_inverse=True)
        n_regions_plus = int(region_label.max()) + 2
        unit_field = unique_pairs // n_regions_plus
        unit_region = unique_pairs % n_regions_plus - 1
        source_cells = np.asarray(source_cells, dtype=np.int64)
        coarse = source_cells >> (2 * (source_order - order))
        pos = np.searchsorted(cells, coarse)
        pos = np.minimum(pos, max(cells.size - 1, 0))
        found = cells[pos] == coarse if cells.size else np.zeros(coarse.size, bool)
        if not found.all():
            raise InputError(
                f"`source_cells`: {int((~found).sum())} source(s) lie in no covered cell of the "
                "footprint; were they counted in another footprint?"
            )
        counts = np.bincount(unit[pos], minlength=unique_pairs.size).astype(np.int64)
        area = area_fraction * hp.nside2pixarea(2**order, degrees=True)
        comp = np.ones(cells.size) if completeness is None else np.asarray(
            completeness(order, cells), dtype=float)
        if comp.shape != cells.shape or not np.all(np.isfinite(comp)) or comp.min() < 0:
            raise InputError("`completeness` must give a finite fraction >= 0 for every cell")
        return cls(order, cells, area, comp, unit.astype(np.int64), counts,
                   unit_field.astype(np.int64), unit_region.astype(np.int64))


def cell_completeness(mag_limit: float, completeness: Any, depth: Any = None,
                      density: Callable[[np.ndarray], np.ndarray] | None = None,
                      span_mag: float = 3.0, slope: float = 0.3
                      ) -> Callable[[int, np.ndarray], np.ndarray]:
    """Fraction of the sources brighter than ``mag_limit`` that a cell's completeness keeps.

    ``kappa = int w(m) c(m) dm / int w(m) dm`` over ``[mag_limit - span_mag, mag_limit]``, with
    w the intrinsic counts (``density``, e.g. a fitted count model; default a power law of
    ``slope`` dex per mag, about the slope of faint star counts) and c the completeness at the
    cell (``depth`` map, shifted per pixel, or one curve).

    Returns
    -------
    callable
        ``kappa(order, cells) -> ndarray`` for :meth:`SkyUnits.from_footprint`.
    """
    grid = np.linspace(mag_limit - span_mag, mag_limit, 301)
    weights = (np.asarray(density(grid), dtype=float) if density is not None
               else 10.0 ** (slope * (grid - mag_limit)))
    if not (np.all(np.isfinite(weights)) and np.all(weights >= 0) and weights.sum() > 0):
        raise InputError("`density` must be finite, >= 0 and not all 0 over the magnitudes "
                         "brighter than the limit")
    weights = weights / weights.sum()

    def kappa(order: int, cells: np.ndarray) -> np.ndarray:
        if depth is None:
            value = float(weights @ np.asarray(completeness(grid), dtype=float))
            return np.full(np.shape(cells), value)
        x, y, z = hp.pix2vec(2**order, np.asarray(cells, dtype=np.int64), nest=True)
        pixels = hp.vec2pix(depth.nside, x, y, z, nest=depth.nest)
        unique, inverse = np.unique(pixels, return_inverse=True)
        ra, dec = hp.pix2ang(depth.nside, unique, nest=depth.nest, lonlat=True)
        table = weights @ depth.completeness_at(grid[:, None], ra[None, :], dec[None, :])
        return np.asarray(table, dtype=float)[inverse]

    return kappa


# --------------------------------------------------------------------------------------------
# One covariate set
# --------------------------------------------------------------------------------------------

#: Likelihoods a covariate set can be fitted with.
LIKELIHOODS = ("negative_binomial", "poisson")

#: Search range of the negative-binomial dispersion alpha (variance mu + alpha mu^2): below
#: 1e-8 the counts of any survey are Poisson for practical purposes; above 10 a field's count
#: says almost nothing. Choice of this project.
_ALPHA_RANGE = (1e-8, 10.0)


def _unit_matrix(unit: np.ndarray, n_units: int) -> Any:
    from scipy.sparse import csr_matrix

    return csr_matrix((np.ones(unit.size), (unit, np.arange(unit.size))),
                      shape=(n_units, unit.size))


class CovariateFit:
    """Counts per unit ~ Poisson or negative binomial with a log-linear surface density.

    Parameters
    ----------
    covariates : sequence of str
        Names from :data:`BASIS` or of covariate maps; empty for a constant density
        (isotropic).
    likelihood : {"negative_binomial", "poisson"}

    Attributes (after :meth:`fit`)
    ------------------------------
    params_ : dict
        ``intercept`` (ln of the density per deg^2 at all covariates 0) and one coefficient per
        covariate, in the covariates' own units.
    cov_ : ndarray
        Their covariance (same order).
    dispersion_ : float
        alpha (0 for Poisson).
    scale_ : float
        max(1, Pearson chi^2 / dof): the factor the covariance was widened by for scatter the
        likelihood does not explain.
    loglike_, aic_, bic_ : float
    n_units_, n_params_ : int
        ``n_params_`` counts alpha for the negative binomial.
    pearson_chi2_, dof_ : float, int
        Sum of (N - mu)^2 / Var over units, and n_units - n_params.
    observed_range_ : dict of str to (float, float)
        Range of each covariate over the footprint's cells.
    expected_ : ndarray
        Fitted mu per unit.
    """

    def __init__(self, covariates: Sequence[str] = (), likelihood: str = "negative_binomial"):
        self.covariates = covariates
        self.likelihood = likelihood

    def _iv(self) -> tuple[tuple[str, ...], str]:
        if isinstance(self.covariates, str) or not isinstance(self.covariates, Sequence):
            raise InputTypeError(f"`covariates` must be a list of names; got "
                                 f"{self.covariates!r}")
        names = tuple(self.covariates)
        if len(set(names)) != len(names):
            raise InputError(f"`covariates` must not repeat a name; got {list(names)}")
        if self.likelihood not in LIKELIHOODS:
            raise InputError(f"`likelihood` must be one of {', '.join(LIKELIHOODS)}; got "
                             f"{self.likelihood!r}")
        return names, self.likelihood

    # -- fitting ------------------------------------------------------------------------------

    def fit(self, units: SkyUnits, maps: Any = None) -> CovariateFit:
        """Fit the counts of ``units``; return self.

        Raises
        ------
        InputError
            Too few units for the parameters, a covariate constant over the footprint, a map
            without data in the footprint.
        """
        names, likelihood = self._iv()
        if not isinstance(units, SkyUnits):
            raise InputTypeError(f"`units` must be SkyUnits; got {type(units).__name__}")
        keep = units.weight_deg2 > 0
        x = covariate_matrix(names, units.order, units.cells[keep], maps, "the footprint")
        weight = units.weight_deg2[keep]
        unit = units.unit[keep]
        used = np.unique(unit)
        n_units = used.size
        n_params = len(names) + 1 + (likelihood == "negative_binomial")
        if n_units <= n_params:
            raise InputError(
                f"{n_units} unit(s) with data cannot fit {n_params} parameters "
                f"(covariates {list(names) or 'none'}, intercept"
                + (", dispersion)" if likelihood == "negative_binomial" else ")")
                + "; more separate fields or regions are needed"
            )
        # Renumber units that have data 0..n-1.
        remap = np.full(units.n_units, -1)
        remap[used] = np.arange(n_units)
        unit = remap[unit]
        counts = units.counts[used].astype(float)
        mean = np.average(x, axis=0, weights=weight) if names else np.zeros(0)
        scale = np.sqrt(np.average((x - mean) ** 2, axis=0, weights=weight)) if names else \
            np.zeros(0)
        flat = [n for n, s in zip(names, scale, strict=True)
                if not s > 1e-12 * max(1.0, abs(float(np.max(np.abs(x[:, names.index(n)])))))]
        if flat:
            raise InputError(f"covariate(s) {', '.join(flat)} take one value over the footprint "
                             "and cannot be fitted; observe fields where they differ")
        z = np.column_stack([np.ones(x.shape[0]), (x - mean) / scale]) if names else \
            np.ones((x.shape[0], 1))
        matrix = _unit_matrix(unit, n_units)
        total = counts.sum()
        if total <= 0:
            raise InputError("no source brighter than the limit in any unit: nothing to fit")
        beta0 = np.zeros(z.shape[1])
        beta0[0] = math.log(total / weight.sum())

        def solve(alpha: float, start: np.ndarray) -> tuple[np.ndarray, float, np.ndarray]:
            return _fisher_scoring(z, weight, matrix, counts, alpha, start)

        if likelihood == "poisson":
            beta, loglike, info = solve(0.0, beta0)
            alpha = 0.0
        else:
            poisson_beta, _, _ = solve(0.0, beta0)
            cache: dict[float, tuple[np.ndarray, float, np.ndarray]] = {}

            def negative_profile(log_alpha: float) -> float:
                result = solve(math.exp(log_alpha), poisson_beta)
                cache[log_alpha] = result
                return -result[1]

            lo, hi = (math.log(a) for a in _ALPHA_RANGE)
            opt = optimize.minimize_scalar(negative_profile, bounds=(lo, hi), method="bounded",
                                           options={"xatol": 1e-4})
            best = min(cache, key=lambda k: -cache[k][1])
            alpha = math.exp(best)
            beta, loglike, info = cache[best]
            del opt
        try:
            cov_z = linalg.inv(info)
        except linalg.LinAlgError as exc:
            raise InputError(f"covariates {list(names)} are degenerate over these units "
                             "(singular information matrix)") from exc
        cov_z = 0.5 * (cov_z + cov_z.T)
        # Back to the covariates' own units: beta_j = bz_j / s_j, intercept = bz_0 - sum ...
        transform = np.eye(z.shape[1])
        if names:
            transform[1:, 1:] = np.diag(1.0 / scale)
            transform[0, 1:] = -mean / scale
        self.names_ = names
        self.likelihood_ = likelihood
        self._mean, self._scale = mean, scale
        self._beta_z, self._cov_z = beta, cov_z
        values = transform @ beta
        self.params_ = {"intercept": float(values[0]),
                        **{n: float(v) for n, v in zip(names, values[1:], strict=True)}}
        self.cov_ = transform @ cov_z @ transform.T
        self.dispersion_ = float(alpha)
        self.loglike_ = float(loglike)
        self.n_units_ = int(n_units)
        self.n_params_ = int(n_params)
        self.aic_ = float(-2.0 * loglike + 2.0 * n_params)
        self.bic_ = float(-2.0 * loglike + n_params * math.log(n_units))
        mu = matrix @ (weight * np.exp(z @ beta))
        self.expected_ = np.zeros(units.n_units)
        self.expected_[used] = mu
        variance = mu + alpha * mu**2
        self.pearson_chi2_ = float(np.sum((counts - mu) ** 2 / variance))
        self.dof_ = int(n_units - n_params)
        # Scatter the likelihood does not explain (a poor basis, or too few units to pin
        # alpha down) widens the errors by the Pearson ratio, as in quasi-likelihood
        # (McCullagh & Nelder 1989, Generalized Linear Models, 2nd ed., section 4.5; from
        # memory); never narrows them.
        self.scale_ = max(1.0, self.pearson_chi2_ / self.dof_) if self.dof_ > 0 else 1.0
        cov_z = cov_z * self.scale_
        self._cov_z = cov_z
        self.cov_ = transform @ cov_z @ transform.T
        self.observed_range_ = {n: (float(x[:, i].min()), float(x[:, i].max()))
                                for i, n in enumerate(names)}
        return self

    def _fitted(self) -> None:
        if not hasattr(self, "params_"):
            raise InputError("this CovariateFit is not fitted yet; call fit(units) first")

    # -- prediction ---------------------------------------------------------------------------

    def _design(self, x: np.ndarray) -> np.ndarray:
        if not self.names_:
            return np.ones((x.shape[0], 1))
        return np.column_stack([np.ones(x.shape[0]), (x - self._mean) / self._scale])

    def log_density(self, x: np.ndarray) -> np.ndarray:
        """ln of the fitted surface density per deg^2 at covariate rows ``x`` (n, p)."""
        self._fitted()
        return self._design(np.asarray(x, dtype=float).reshape(-1, len(self.names_))) \
            @ self._beta_z

    def outside(self, x: np.ndarray) -> np.ndarray:
        """Rows of ``x`` with any covariate outside its observed range (bool)."""
        self._fitted()
        out = np.zeros(x.shape[0], dtype=bool)
        for i, name in enumerate(self.names_):
            lo, hi = self.observed_range_[name]
            tol = 1e-9 * max(1.0, hi - lo)
            out |= (x[:, i] < lo - tol) | (x[:, i] > hi + tol)
        return out

    def clamped(self, x: np.ndarray) -> np.ndarray:
        """``x`` with every covariate held within its observed range."""
        self._fitted()
        out = np.array(x, dtype=float, copy=True)
        for i, name in enumerate(self.names_):
            out[:, i] = np.clip(out[:, i], *self.observed_range_[name])
        return out

    def beta_draws(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """Coefficient draws (standardised covariates) from the fit's normal approximation."""
        self._fitted()
        values, vectors = np.linalg.eigh(self._cov_z)
        root = vectors * np.sqrt(np.clip(values, 0.0, None))
        return self._beta_z + rng.standard_normal((n, self._beta_z.size)) @ root.T

    def to_json(self) -> dict:
        self._fitted()
        errors = np.sqrt(np.clip(np.diag(self.cov_), 0.0, None))
        keys = list(self.params_)
        return {
            "covariates": list(self.names_),
            "likelihood": self.likelihood_,
            "params": self.params_,
            "errors": {k: float(e) for k, e in zip(keys, errors, strict=True)},
            "covariance": np.asarray(self.cov_).tolist(),
            "dispersion": self.dispersion_,
            "scale": self.scale_,
            "loglike": self.loglike_,
            "aic": self.aic_,
            "bic": self.bic_,
            "n_units": self.n_units_,
            "n_params": self.n_params_,
            "pearson_chi2": self.pearson_chi2_,
            "dof": self.dof_,
            "observed_range": {k: list(v) for k, v in self.observed_range_.items()},
        }


def _loglike(counts: np.ndarray, mu: np.ndarray, alpha: float) -> float:
    if alpha <= 0.0:
        return float(np.sum(special.xlogy(counts, mu) - mu - special.gammaln(counts + 1.0)))
    r = 1.0 / alpha
    return float(np.sum(special.gammaln(counts + r) - special.gammaln(r)
                        - special.gammaln(counts + 1.0) + r * np.log(r / (r + mu))
                        + special.xlogy(counts, mu / (r + mu))))


def _fisher_scoring(z: np.ndarray, weight: np.ndarray, matrix: Any, counts: np.ndarray,
                    alpha: float, start: np.ndarray, max_iter: int = 100
                    ) -> tuple[np.ndarray, float, np.ndarray]:
    """Coefficients maximising the likelihood at fixed alpha: (beta, ln L, Fisher information).

    Fisher scoring with step halving: each step solves ``F d = J' W (N - mu)`` with
    ``J = d mu / d beta`` and ``W = 1 / Var(N)``.
    """
    beta = np.array(start, dtype=float)

    def evaluate(b: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        with np.errstate(over="ignore"):
            e = weight * np.exp(np.clip(z @ b, -700.0, 700.0))
        mu = matrix @ e
        return _loglike(counts, np.maximum(mu, 1e-300), alpha), mu, e

    loglike, mu, e = evaluate(beta)
    info = None
    for _ in range(max_iter):
        jac = matrix @ (e[:, None] * z)
        w = 1.0 / (np.maximum(mu, 1e-300) * (1.0 + alpha * mu))
        info = jac.T @ (w[:, None] * jac)
        score = jac.T @ (w * (counts - mu))
        try:
            step = linalg.solve(info, score, assume_a="pos")
        except (linalg.LinAlgError, ValueError):
            step = linalg.lstsq(info, score)[0]
        for _ in range(40):
            trial = beta + step
            new_loglike, new_mu, new_e = evaluate(trial)
            if math.isfinite(new_loglike) and new_loglike >= loglike - 1e-12 * abs(loglike):
                break
            step = step / 2.0
        else:
            break
        improvement = new_loglike - loglike
        beta, loglike, mu, e = trial, new_loglike, new_mu, new_e
        if np.max(np.abs(step)) < 1e-10 or improvement < 1e-12 * max(1.0, abs(loglike)):
            break
    jac = matrix @ (e[:, None] * z)
    w = 1.0 / (np.maximum(mu, 1e-300) * (1.0 + alpha * mu))
    info = jac.T @ (w[:, None] * jac)
    return beta, loglike, info


# --------------------------------------------------------------------------------------------
# Several sets, and the integral over a target
# --------------------------------------------------------------------------------------------

#: Draws of the integral evaluated together (memory: target cells × this × 8 bytes).
_DRAW_BLOCK = 128


def _log_integral(design: np.ndarray, log_area: np.ndarray, betas: np.ndarray) -> np.ndarray:
    """ln sum_c exp(design_c . beta + ln a_c) for each row of ``betas`` (n_draws,).

    One row (a best fit) is summed in float64; many rows (Monte Carlo draws) in float32, 1.5x
    faster here and accurate to about 1e-6 in ln, far below the spread of any draws.
    """
    if design.shape[0] == 0:
        return np.full(betas.shape[0], -np.inf)
    dtype = np.float64 if betas.shape[0] == 1 else np.float32
    columns = np.ascontiguousarray(design.T, dtype=dtype)
    log_area = log_area.astype(dtype)
    out = np.empty(betas.shape[0])
    for start in range(0, betas.shape[0], _DRAW_BLOCK):
        block = betas[start:start + _DRAW_BLOCK].astype(dtype)
        # A log-sum-exp in three passes over a (draws x cells) block, rows contiguous
        # (measured 2x faster than scipy.special.logsumexp over cells x draws).
        terms = block @ columns
        terms += log_area
        peak = terms.max(axis=1, keepdims=True)
        terms -= peak
        np.exp(terms, out=terms)
        out[start:start + block.shape[0]] = (np.log(terms.sum(axis=1, dtype=np.float64))
                                             + peak[:, 0])
    return out


#: log10 of the largest total reported; beyond it a draw means "the model cannot say".
_LOG10_TOTAL_CAP = 300.0


@dataclass(frozen=True, eq=False)
class SkyPrediction:
    """The fitted model integrated over a target footprint.

    Attributes
    ----------
    total : Estimate
        Sources brighter than the limit over the target (all of them: the model's density is
        of detected and undetected sources alike); draws are the mixture over covariate sets.
    per_set : list of dict
        Per covariate set: ``covariates``, ``weight`` (Akaike), ``total`` (its own Estimate),
        ``fraction_outside_area``, ``fraction_outside_total``, ``widening`` (s, dex-free: the
        standard deviation in ln of the out-of-range part).
    fraction_outside_area, fraction_outside_total : float
        Weighted over sets: the share of the target's area, and of the predicted total, in
        cells with a covariate outside its observed range.
    target_area_deg2 : float
    nside : int
        Resolution of the integration.
    warnings : list of str
    """

    total: Estimate
    per_set: list
    fraction_outside_area: float
    fraction_outside_total: float
    target_area_deg2: float
    nside: int
    warnings: list

    @property
    def draws(self) -> np.ndarray:
        return self.total.draws

    def to_json(self) -> dict:
        return {
            "total": self.total.to_json(),
            "per_set": [{**{k: v for k, v in s.items() if k != "total"},
                         "total": s["total"].to_json()} for s in self.per_set],
            "fraction_outside_area": self.fraction_outside_area,
            "fraction_outside_total": self.fraction_outside_total,
            "target_area_deg2": self.target_area_deg2,
            "nside": self.nside,
            "warnings": list(self.warnings),
        }


class SkyModel:
    """Several covariate sets fitted to the same units, weighted by AIC.

    Parameters
    ----------
    covariate_sets : sequence of sequence of str
        Each a list of covariate names (an empty list: isotropic).
    likelihood : {"negative_binomial", "poisson"}

    Attributes (after :meth:`fit`)
    ------------------------------
    fits_ : list of CovariateFit
        The sets that could be fitted.
    weights_ : ndarray
        Their Akaike weights.
    notes_ : list of str
        Sets that could not be fitted, and why.
    """

    def __init__(self, covariate_sets: Sequence[Sequence[str]] = DEFAULT_STAR_SETS,
                 likelihood: str = "negative_binomial"):
        self.covariate_sets = covariate_sets
        self.likelihood = likelihood

    def fit(self, units: SkyUnits, maps: Any = None) -> SkyModel:
        """Fit every set; raise :class:`InputError` if none can be fitted."""
        sets = self.covariate_sets
        if isinstance(sets, str) or not isinstance(sets, Sequence) or not sets:
            raise InputTypeError(f"`covariate_sets` must be a non-empty list of lists of "
                                 f"names; got {sets!r}")
        self.maps_ = _maps_by_name(maps)
        self.fits_, self.notes_ = [], []
        messages = []
        for names in sets:
            try:
                self.fits_.append(CovariateFit(names, self.likelihood).fit(units, self.maps_))
            except InputError as exc:
                self.notes_.append(f"covariates {list(names)}: not fitted ({exc})")
                messages.append(str(exc))
        if not self.fits_:
            raise InputError("no covariate set could be fitted: " + "; ".join(messages))
        aic = np.array([f.aic_ for f in self.fits_])
        weights = np.exp(-0.5 * (aic - aic.min()))
        self.weights_ = weights / weights.sum()
        self.units_ = units
        return self

    @property
    def best_(self) -> CovariateFit:
        return self.fits_[int(np.argmax(self.weights_))]

    def predict(self, target: Any, nside: int = 64, n_draws: int = 4000, rng: Any = None,
                unit: str = "sources") -> SkyPrediction:
        """Integrate the fitted density over ``target`` (a Footprint) at ``nside``.

        Draws are split among the sets in proportion to their weights (largest remainder);
        each set draws its coefficients from its normal approximation and, where the target
        leaves the observed covariate range, the extrapolated part's factor (module docstring).
        The budget gives the shares of the variance of log10 of the total from the fits'
        covariance (``sky_model_fit``), the extrapolation (``sky_model_extrapolation``) and the
        choice between sets (``sky_model_choice``), one at a time.
        """
        if not hasattr(self, "fits_"):
            raise InputError("this SkyModel is not fitted yet; call fit(units) first")
        if isinstance(nside, bool) or not isinstance(nside, int | np.integer) or nside < 1 or \
                nside & (nside - 1):
            raise InputError(f"`nside` must be a power of 2 >= 1; got {nside!r}")
        if isinstance(n_draws, bool) or not isinstance(n_draws, int | np.integer) or n_draws < 100:
            raise InputError(f"`n_draws` must be an integer >= 100; got {n_draws!r}")
        rng = as_generator(rng)
        order = round(math.log2(nside))
        cells, fraction = target.coverage_cells(order)
        if cells.size == 0:
            raise InputError("`target` is empty (area 0): there is nothing to integrate over")
        area = fraction * hp.nside2pixarea(nside, degrees=True)
        log_area = np.log(area)
        target_area = float(area.sum())

        # Allocation of draws among sets by their weights (largest remainder).
        exact = self.weights_ * n_draws
        alloc = np.floor(exact).astype(int)
        alloc[np.argsort(-(exact - alloc), kind="stable")[: n_draws - alloc.sum()]] += 1

        all_draws, per_set, warn = [], [], []
        var_fit = var_extrap = 0.0
        means = []
        frac_area = frac_total = 0.0
        for fit, weight, n_k in zip(self.fits_, self.weights_, alloc, strict=True):
            x = covariate_matrix(fit.names_, order, cells, self.maps_, "the target sky")
            design = fit._design(x)
            out = fit.outside(x)
            log_in = _log_integral(design[~out], log_area[~out], fit._beta_z[None, :])[0]
            log_out = _log_integral(design[out], log_area[out], fit._beta_z[None, :])[0]
            log_best = np.logaddexp(log_in, log_out)
            widening = 0.0
            if out.any():
                clamped = fit._design(fit.clamped(x[out]))
                log_clamped = _log_integral(clamped, log_area[out], fit._beta_z[None, :])[0]
                widening = abs(log_out - log_clamped)
            share_area = float(area[out].sum() / target_area)
            share_total = float(np.exp(log_out - log_best)) if out.any() else 0.0
            frac_area += weight * share_area
            frac_total += weight * share_total
            n_set = max(int(n_k), 200)  # each set's own summary needs draws of its own
            betas = fit.beta_draws(n_set, rng)
            zeta = rng.standard_normal(n_set)
            d_in = _log_integral(design[~out], log_area[~out], betas)
            d_out = _log_integral(design[out], log_area[out], betas)
            both = np.logaddexp(d_in, d_out + widening * zeta)
            fit_only = np.logaddexp(d_in, d_out)
            extrap_only = np.logaddexp(log_in, log_out + widening * zeta)
            log10 = np.minimum(both / math.log(10.0), _LOG10_TOTAL_CAP)
            if np.any(both / math.log(10.0) > _LOG10_TOTAL_CAP):
                warn.append(f"covariates {list(fit.names_)}: some draws exceed 10^"
                            f"{_LOG10_TOTAL_CAP:g} and were capped; this set cannot bound the "
                            "total")
            set_estimate = Estimate.from_draws(10.0**log10, unit)
            per_set.append({
                "covariates": list(fit.names_),
                "weight": float(weight),
                "aic": fit.aic_,
                "best_fit_total": float(math.exp(min(log_best, _LOG10_TOTAL_CAP * math.log(10)))),
                "total": set_estimate,
                "fraction_outside_area": share_area,
                "fraction_outside_total": share_total,
                "widening": float(widening),
            })
            all_draws.append(10.0 ** log10[: int(n_k)])
            var_fit += weight * float(np.var(fit_only / math.log(10.0)))
            if widening > 0:
                var_extrap += weight * float(np.var(extrap_only / math.log(10.0)))
            means.append(float(np.mean(log10)))
            if share_area > 0 and weight >= 0.01:
                ranges = "; ".join(
                    f"{n} observed {lo:.3g}..{hi:.3g}, target {x[:, i].min():.3g}.."
                    f"{x[:, i].max():.3g}" for i, (n, (lo, hi)) in
                    enumerate(fit.observed_range_.items())
                    if x[:, i].min() < lo or x[:, i].max() > hi)
                warn.append(
                    f"covariates {list(fit.names_)} (weight {weight:.2f}): "
                    f"{100 * share_area:.3g} % of the target sky ({100 * share_total:.3g} % of "
                    f"its predicted total) lies outside the covariate range the survey observed "
                    f"({ranges}); that part is an extrapolation, and its uncertainty was widened "
                    f"(standard deviation {widening:.3g} in ln)")
        means_arr = np.array(means)
        var_choice = float(np.sum(self.weights_ * (means_arr - np.sum(self.weights_ * means_arr))
                                  ** 2))
        draws = rng.permutation(np.concatenate(all_draws))
        components = {"sky_model_fit": var_fit, "sky_model_extrapolation": var_extrap,
                      "sky_model_choice": var_choice}
        components = {k: v for k, v in components.items() if v > 0}
        budget = variance_budget(components) if components else {}
        total = Estimate.from_draws(draws, unit, budget=budget)
        for text in warn:
            warnings.warn(text, SkyModelWarning, stacklevel=2)
        return SkyPrediction(total, per_set, float(frac_area), float(frac_total), target_area,
                             int(nside), warn)

    def to_json(self) -> dict:
        return {
            "likelihood": self.likelihood,
            "sets": [{**f.to_json(), "weight": float(w)}
                     for f, w in zip(self.fits_, self.weights_, strict=True)],
            "notes": list(self.notes_),
        }


# --------------------------------------------------------------------------------------------
# Helpers for a run
# --------------------------------------------------------------------------------------------

#: Finest order of a target footprint built from run-file items: 0.86 arcmin cells, finer than
#: any integration nside a sky model uses and cheap for latitude cuts and caps.
TARGET_MAX_ORDER = 12

#: Footprint item kinds a target sky may use (``occupancy`` needs a catalogue and describes the
#: survey, not a target).
TARGET_KINDS = ("map", "moc", "cap", "box", "polygon", "circles", "galactic_latitude_below",
                "galactic_latitude_above")


def target_sky_footprint(items: Any, max_order: int = TARGET_MAX_ORDER) -> Any:
    """The Footprint a run file's ``[totals] target_sky`` describes (their union).

    Parameters
    ----------
    items : sequence of countscale.runfile.FootprintItem, or None
        None (the key is absent): the whole sky.
    max_order : int
        Finest order of the shapes.
    """
    from countscale.footprint import Footprint

    if items is None:
        return Footprint.full_sky(max_order)
    items = tuple(items)
    if not items:
        raise InputError("`target_sky` must list at least one footprint item; got none")
    for item in items:
        if getattr(item, "kind", None) not in TARGET_KINDS:
            raise InputError(f"{getattr(item, 'where', 'target_sky')}: a target sky item must "
                             f"be one of {', '.join(TARGET_KINDS)}; got "
                             f"{getattr(item, 'kind', item)!r}")
    section = SimpleNamespace(max_order=max_order, include=items, exclude=())
    target = Footprint.from_runfile_section(section)
    if target.area_sr <= 0:
        raise InputError("`target_sky` is empty (area 0)")
    return target


def naive_total(n_observed: int, footprint_area_deg2: float, target_area_deg2: float,
                n_draws: int = 4000, rng: Any = None, unit: str = "sources") -> Estimate:
    """Plain area scaling: the raw count times target area / surveyed area, Poisson draws.

    What a user reaches for first; it assumes the population is the same everywhere and that
    the survey is complete. Budget: Poisson only.
    """
    rng = as_generator(rng)
    if footprint_area_deg2 <= 0:
        raise InputError(f"`footprint_area_deg2` must be > 0; got {footprint_area_deg2}")
    ratio = target_area_deg2 / footprint_area_deg2
    draws = rng.poisson(max(int(n_observed), 0), size=n_draws).astype(float) * ratio
    if not np.any(draws > 0):
        return Estimate.from_draws(draws, unit)
    return Estimate.from_draws(draws, unit, budget={"poisson": 1.0} if n_observed > 0 else None)
