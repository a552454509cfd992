"""Survey planning: the precision of a surface density against area, layout and depth.

The fractional error of a survey's mean surface density has two parts: Poisson noise,
1 / sqrt(N), which falls as one over the square root of the area, and cosmic variance, which
falls much more slowly and sets a floor: past some area, more area of the same layout hardly
helps. This module turns the cosmic-variance machinery of :mod:`countscale.variance` around to
answer the planner's questions.

Topics
------
Population, population
    What is being counted: surface density (per deg^2, brighter than a magnitude limit), the
    count slope, the redshift distribution and the bias, and the power spectrum.
Layout
    One contiguous field (``"contiguous"``), N separated fields of equal total area
    (``"fields"``), or a long strip (``"strip"``, aspect ratio 10 by default).
precision
    Poisson, cosmic-variance and total fractional errors for one area and layout.
plan_survey, SurveyPlan
    The curve against area, where cosmic variance overtakes Poisson noise, the area needed for
    a target precision (or the floor when it cannot be reached), the layouts compared, and the
    depth trade-off.

Assumptions (each plan lists the ones it used): linear clustering (Eisenstein & Hu 1998
power spectrum, Limber's approximation); the contiguous field is a circular field of the same
area; separated fields are far enough apart to be uncorrelated; a deeper survey keeps the same
n(z) (only the surface density changes with depth).

Examples
--------
>>> pop = population(surface_density_per_deg2=1000.0, redshift_median=0.3, bias=1.2)
>>> plan = plan_survey(pop, target=0.02)
>>> plan.reachable, round(plan.required_area_deg2, -1) > 0
(True, True)
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from countscale._checks import check_real
from countscale.errors import InputError, InputTypeError
from countscale.variance import (
    AngularSpectrum,
    LinearPower,
    RedshiftDistribution,
    box_mask_spectrum,
    cap_mask_spectrum,
    crossover_area,
    linear_power,
    rectangle_mask_spectrum,
)
from countscale.variance.mask import FULL_SKY_DEG2

__all__ = [
    "LAYOUTS",
    "Layout",
    "Population",
    "SurveyPlan",
    "limiting_magnitude_gain",
    "plan_survey",
    "population",
    "precision",
]

LAYOUTS = ("contiguous", "fields", "strip")

#: A long strip's length over its width (a choice for the comparison; no source).
STRIP_ASPECT_RATIO = 10.0

#: Strips up to this long side are computed in the flat-sky limit, longer ones on the sphere
#: (the two agree within 1 % for a 20 x 2 degree strip; tests).
_FLAT_STRIP_MAX_DEG = 20.0

#: Separated fields together cover at most this fraction of the sky, so that they can lie
#: about a field's size apart (a choice that keeps "uncorrelated" plausible; no source).
_FIELDS_MAX_SKY_FRACTION = 0.5

#: Areas of the curve: 41 log-spaced points per layout between the smallest useful area and
#: the layout's largest.
_N_CURVE = 41
_MIN_AREA_DEG2 = 1e-3

#: Exposure-time factors of the depth trade-off table.
_EXPOSURE_FACTORS = (0.25, 0.5, 1.0, 2.0, 4.0)


def limiting_magnitude_gain(exposure_factor):
    """Depth gained by a longer exposure when the sky background limits detection [mag].

    For background-limited imaging, signal-to-noise grows as sqrt(t), so the limiting flux
    falls as t^(-1/2) and the limiting magnitude deepens by 2.5 log10(sqrt(t)) =
    1.25 log10(t) (textbook relation for sky-limited photometry; common figure, no source).
    """
    factor = check_real(exposure_factor, "exposure_factor", 0.0)
    return 1.25 * math.log10(factor)


@dataclass(frozen=True, eq=False)
class Population:
    """What a survey counts. Build with :func:`population`.

    Attributes
    ----------
    surface_density_per_deg2 : float
    mag_limit : float or None
        The magnitude limit the density refers to (a label; None if not given).
    slope : float or None
        d log10 N(<m) / dm at the limit [dex per mag], for the depth trade-off.
    nz : RedshiftDistribution
    bias : float
    power : LinearPower
    source : str
        Where these values came from.
    """

    surface_density_per_deg2: float
    mag_limit: float | None
    slope: float | None
    nz: RedshiftDistribution
    bias: float
    power: LinearPower
    source: str
    _spectrum: dict = field(default_factory=dict, repr=False)

    def spectrum(self, lmax):
        """Limber C_ell of the population up to ``lmax`` (cached)."""
        cached = self._spectrum.get("cl")
        if cached is None or cached.lmax < lmax:
            cached = AngularSpectrum.limber(self.power, self.nz, self.bias, lmax=max(lmax, 3000))
            self._spectrum["cl"] = cached
        return cached

    def to_json(self):
        return {
            "surface_density_per_deg2": self.surface_density_per_deg2,
            "mag_limit": self.mag_limit,
            "slope": self.slope,
            "redshift_median": self.nz.median,
            "nz_source": self.nz.source,
            "bias": self.bias,
            "power_spectrum": self.power.summary(),
            "source": self.source,
        }


def population(surface_density_per_deg2, redshift_median=None, nz=None, bias=1.0, slope=None,
               mag_limit=None, power=None, source="given values"):
    """Validate and build a :class:`Population`.

    Parameters
    ----------
    surface_density_per_deg2 : float
        Sources per deg^2, > 0.
    redshift_median : float, optional
        Median redshift of a parametric n(z) (see
        :meth:`~countscale.variance.RedshiftDistribution.from_median`); or give ``nz``.
    nz : RedshiftDistribution, optional
    bias : float
        Linear bias, > 0.
    slope : float, optional
        d log10 N(<m) / dm [dex per mag], > 0, for the depth trade-off.
    mag_limit : float, optional
    power : LinearPower, optional
        Default Planck 2018 with baryon wiggles.
    """
    density = _positive(surface_density_per_deg2, "surface_density")
    if (redshift_median is None) == (nz is None):
        raise InputError("give exactly one of `redshift_median` and `nz` (the population's "
                         "redshift distribution)")
    if nz is None:
        z_median = _positive(redshift_median, "redshift_median")
        nz = RedshiftDistribution.from_median(z_median)
    elif not isinstance(nz, RedshiftDistribution):
        raise InputTypeError(f"`nz` must be a RedshiftDistribution; got {type(nz).__name__}")
    bias = _positive(bias, "bias")
    if slope is not None:
        slope = _positive(slope, "slope")
    if mag_limit is not None:
        mag_limit = check_real(mag_limit, "mag_limit")
    if power is None:
        power = linear_power()
    elif not isinstance(power, LinearPower):
        raise InputTypeError(f"`power` must be a LinearPower; got {type(power).__name__}")
    return Population(density, mag_limit, slope, nz, bias, power, source)


def _positive(value, name):
    if isinstance(value, bool) or not isinstance(value, int | float | np.integer | np.floating):
        raise InputTypeError(f"`{name}` must be a number > 0; got {value!r}")
    value = float(value)
    if not (math.isfinite(value) and value > 0):
        raise InputError(f"`{name}` must be a number > 0; got {value!r}")
    return value


@dataclass(frozen=True)
class Layout:
    """How the area is laid out on the sky.

    Attributes
    ----------
    kind : {"contiguous", "fields", "strip"}
    n_fields : int
        Separated fields (1 unless ``kind == "fields"``).
    aspect_ratio : float
        Length over width of a strip.
    """

    kind: str = "contiguous"
    n_fields: int = 1
    aspect_ratio: float = STRIP_ASPECT_RATIO

    def __post_init__(self):
        if self.kind not in LAYOUTS:
            raise InputError(f"`layout` must be one of {', '.join(LAYOUTS)}; got {self.kind!r}")
        if isinstance(self.n_fields, bool) or not isinstance(self.n_fields, int | np.integer) \
                or self.n_fields < 1:
            raise InputError(f"`n_fields` must be an integer >= 1; got {self.n_fields!r}")
        if self.kind == "fields" and self.n_fields < 2:
            raise InputError(f"`n_fields` must be at least 2 for separated fields; got "
                             f"{self.n_fields}")
        if self.kind != "fields" and self.n_fields != 1:
            raise InputError(f"`n_fields` is for the 'fields' layout; got {self.n_fields} with "
                             f"{self.kind!r}")
        ratio = check_real(self.aspect_ratio, "aspect_ratio", 0.0)
        if ratio < 1:
            raise InputError(f"`aspect_ratio` must be >= 1; got {ratio}")

    @property
    def max_area_deg2(self):
        if self.kind == "fields":
            return _FIELDS_MAX_SKY_FRACTION * FULL_SKY_DEG2
        return FULL_SKY_DEG2

    def describe(self):
        if self.kind == "contiguous":
            return "one contiguous field (computed as a circular field of the same area)"
        if self.kind == "fields":
            return (f"{self.n_fields} separated fields of equal area, uncorrelated (each "
                    "computed as a circular field)")
        return f"one strip of length {self.aspect_ratio:g} times its width"

    def to_json(self):
        out = {"kind": self.kind, "n_fields": self.n_fields, "description": self.describe(),
               "max_area_deg2": self.max_area_deg2}
        if self.kind == "strip":
            out["aspect_ratio"] = self.aspect_ratio
        return out

    def _strip_sides(self, area_deg2):
        """(RA span, Dec span) in degrees of an equatorial strip of this area."""
        length = min(math.sqrt(self.aspect_ratio * area_deg2), 360.0)
        # Area of an equatorial box: length [deg] * (180 / pi) * 2 sin(half height).
        sin_half = min(area_deg2 / (length * 2.0 * 180.0 / math.pi), 1.0)
        return length, 2.0 * math.degrees(math.asin(sin_half))

    def cosmic_variance(self, pop, area_deg2):
        """Fractional cosmic variance of the mean density over ``area_deg2`` of this layout."""
        if self.kind == "contiguous":
            mask = cap_mask_spectrum(area_deg2=min(area_deg2, FULL_SKY_DEG2))
            return mask.sigma(pop.spectrum(mask.lmax))
        if self.kind == "fields":
            mask = cap_mask_spectrum(area_deg2=area_deg2 / self.n_fields)
            return mask.sigma(pop.spectrum(mask.lmax)) / math.sqrt(self.n_fields)
        length, height = self._strip_sides(area_deg2)
        if length <= _FLAT_STRIP_MAX_DEG:
            mask = rectangle_mask_spectrum(length, height)
        else:
            mask = box_mask_spectrum(length, height)
        return mask.sigma(pop.spectrum(mask.lmax))


def _layout_iv(layout, n_fields):
    if isinstance(layout, Layout):
        return layout
    if not isinstance(layout, str):
        raise InputTypeError(f"`layout` must be a Layout or one of {', '.join(LAYOUTS)}; got "
                             f"{layout!r}")
    return Layout(layout, n_fields)


def precision(pop, area_deg2, layout="contiguous", n_fields=1):
    """Fractional (1 sigma) errors of the mean surface density over an area.

    Returns
    -------
    dict
        ``{"area_deg2", "poisson", "cosmic_variance", "total"}`` with Poisson exactly
        1 / sqrt(density x area) and total = Poisson ⊕ cosmic variance.
    """
    if not isinstance(pop, Population):
        raise InputTypeError(f"`pop` must be a Population; got {type(pop).__name__}")
    layout = _layout_iv(layout, n_fields)
    area = check_real(area_deg2, "area_deg2", 0.0)
    if area > layout.max_area_deg2 * (1 + 1e-12):
        raise InputError(f"`area_deg2` must be at most {layout.max_area_deg2:.6g} for "
                         f"{layout.describe()}; got {area:g}")
    poisson = 1.0 / math.sqrt(pop.surface_density_per_deg2 * area)
    cv = layout.cosmic_variance(pop, area)
    return {"area_deg2": area, "poisson": poisson, "cosmic_variance": cv,
            "total": math.hypot(poisson, cv)}


@dataclass(frozen=True)
class SurveyPlan:
    """A survey plan; ``to_json`` gives the contract's keys.

    Attributes
    ----------
    quantity : str
    target_precision : float or None
    required_area_deg2 : float or None
        Area giving ``target_precision`` with the main layout; None when it cannot be
        reached (``reachable`` False) or without a target.
    reachable : bool or None
    floor_precision : float
        The best precision the main layout reaches (at its largest area).
    curve : list of dict
        ``{"area_deg2", "poisson", "cosmic_variance", "total"}`` for the main layout.
    layout : Layout
    layouts : dict
        For each layout: its curve's floor, crossover and required area.
    crossover_area_deg2 : float or None
        Where cosmic variance overtakes Poisson noise (main layout).
    depth : list of dict or None
        The depth trade-off table (with a slope).
    population : Population
    assumptions : list of str
    """

    quantity: str
    target_precision: float | None
    required_area_deg2: float | None
    reachable: bool | None
    floor_precision: float
    curve: list
    layout: Layout
    layouts: dict
    crossover_area_deg2: float | None
    depth: list | None
    population: Population
    assumptions: list

    def to_json(self):
        return {
            "quantity": self.quantity,
            "target_precision": self.target_precision,
            "required_area_deg2": self.required_area_deg2,
            "reachable": self.reachable,
            "floor_precision": self.floor_precision,
            "curve": self.curve,
            "layout": self.layout.to_json(),
            "assumptions": list(self.assumptions),
            "crossover_area_deg2": self.crossover_area_deg2,
            "layouts": self.layouts,
            "depth": self.depth,
            "population": self.population.to_json(),
        }


def _curve_areas(pop, layout, n_points=_N_CURVE):
    lo = max(_MIN_AREA_DEG2, 1.0 / pop.surface_density_per_deg2)
    return np.geomspace(min(lo, 0.1 * layout.max_area_deg2), layout.max_area_deg2, n_points)


def _curve(pop, layout, n_points=_N_CURVE):
    return [precision(pop, a, layout) for a in _curve_areas(pop, layout, n_points)]


def _with_density(curve, density):
    """The same cosmic variance with the Poisson term of another surface density."""
    out = []
    for point in curve:
        poisson = 1.0 / math.sqrt(density * point["area_deg2"])
        out.append({**point, "poisson": poisson,
                    "total": math.hypot(poisson, point["cosmic_variance"])})
    return out


def _required_area(curve, target):
    """Smallest area whose total error is <= target (log-log interpolation of the curve)."""
    areas = np.array([p["area_deg2"] for p in curve])
    total = np.array([p["total"] for p in curve])
    below = np.flatnonzero(total <= target)
    if below.size == 0:
        return None
    i = int(below[0])
    if i == 0:
        return float(areas[0])
    x0, x1 = math.log(areas[i - 1]), math.log(areas[i])
    y0, y1 = math.log(total[i - 1]), math.log(total[i])
    t = (math.log(target) - y0) / (y1 - y0)
    return float(math.exp(x0 + t * (x1 - x0)))


def _summary(curve, target):
    areas = [p["area_deg2"] for p in curve]
    floor = float(min(p["total"] for p in curve))
    required = None if target is None else _required_area(curve, target)
    return {
        "floor_precision": floor,
        "crossover_area_deg2": crossover_area(areas, [p["poisson"] for p in curve],
                                              [p["cosmic_variance"] for p in curve]),
        "required_area_deg2": required,
        "reachable": None if target is None else required is not None,
    }


def plan_survey(pop, target=None, layout="contiguous", n_fields=1):
    """Precision against area for a population and layout; the area for a target precision.

    Parameters
    ----------
    pop : Population
    target : float, optional
        Target fractional (1 sigma) precision of the surface density, in (0, 1).
    layout : str or Layout
        The main layout (``"fields"`` needs ``n_fields`` >= 2).
    n_fields : int

    Returns
    -------
    SurveyPlan

    Notes
    -----
    Poisson: 1 / sqrt(density x area). Cosmic variance: sigma^2 = sum (2 ell + 1) C_ell W_ell /
    Omega^2 with Limber C_ell of the population and the layout's mask spectrum (closed form
    for circular fields; flat-sky rectangles for strips up to 20 degrees long, healpy on the
    sphere beyond). N uncorrelated fields of area A / N: sigma^2 = sigma_1^2(A / N) / N.
    The required area is interpolated (log-log) on 41 areas per layout; when even the largest
    area of the layout misses the target, ``reachable`` is False, ``required_area_deg2``
    None, and ``floor_precision`` says how close it gets.
    """
    if not isinstance(pop, Population):
        raise InputTypeError(f"`pop` must be a Population; got {type(pop).__name__}")
    main = _layout_iv(layout, n_fields)
    if target is not None:
        target = check_real(target, "target", 0.0, 1.0, high_open=True)
    curves = {main.kind: _curve(pop, main)}
    layouts = {}
    others = [Layout("contiguous"), Layout("strip"),
              Layout("fields", main.n_fields if main.kind == "fields" else 10)]
    for other in others:
        if other.kind not in curves:
            curves[other.kind] = _curve(pop, other)
        layouts[other.kind] = {**other.to_json(), **_summary(curves[other.kind], target),
                               "curve": curves[other.kind]}
    summary = _summary(curves[main.kind], target)
    quantity = "surface density" + (f" of sources brighter than m = {pop.mag_limit:g}"
                                    if pop.mag_limit is not None else "")
    assumptions = [
        f"population: {pop.surface_density_per_deg2:.4g} per deg², n(z) {pop.nz.source} "
        f"(median z = {pop.nz.median:.3g}), bias {pop.bias:g} ({pop.source})",
        f"clustering: {pop.power.summary()}, Limber's approximation; linear theory (no "
        "non-linear correction): an underestimate for small fields",
        f"layout: {main.describe()}",
        "separated fields are far enough apart to be uncorrelated, and cover at most half "
        "the sky",
        "a full-sky floor rests on the lowest multipoles, where Limber's approximation is "
        "least accurate",
    ]
    depth = None
    if pop.slope is not None:
        depth = _depth_table(pop, curves[main.kind], target)
        assumptions.append(
            "depth trade-off: background-limited imaging, the limiting magnitude deepens by "
            "1.25 log10 of the exposure-time ratio (textbook relation), the surface density "
            f"follows the count slope {pop.slope:g} dex/mag, and n(z) is kept the same")
    return SurveyPlan(
        quantity=quantity,
        target_precision=target,
        required_area_deg2=summary["required_area_deg2"],
        reachable=summary["reachable"],
        floor_precision=summary["floor_precision"],
        curve=curves[main.kind],
        layout=main,
        layouts=layouts,
        crossover_area_deg2=summary["crossover_area_deg2"],
        depth=depth,
        population=pop,
        assumptions=assumptions,
    )


def _depth_table(pop, curve, target):
    """Required area and floor at other exposure times, for the same layout and n(z).

    Only the surface density changes with depth (n(z) kept), so the cosmic-variance curve is
    reused and the Poisson term rescaled. ``time_factor`` is exposure time x area relative to
    the present depth (None when the target cannot be reached).
    """
    rows = []
    for factor in _EXPOSURE_FACTORS:
        gain = limiting_magnitude_gain(factor)
        density = pop.surface_density_per_deg2 * 10.0 ** (pop.slope * gain)
        summary = _summary(_with_density(curve, density), target)
        area = summary["required_area_deg2"]
        rows.append({
            "exposure_factor": factor,
            "delta_mag": gain,
            "mag_limit": None if pop.mag_limit is None else pop.mag_limit + gain,
            "surface_density_per_deg2": density,
            "required_area_deg2": area,
            "floor_precision": summary["floor_precision"],
            "time_factor": None if area is None else factor * area,
        })
    reference = next(r["time_factor"] for r in rows if r["exposure_factor"] == 1.0)
    for row in rows:
        if row["time_factor"] is not None:
            row["time_factor"] = row["time_factor"] / reference if reference else None
    return rows
