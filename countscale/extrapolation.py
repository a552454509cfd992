"""From densities to totals: stars from stellar mass, volumes, the light cone, Monte Carlo budgets.

This module holds the science of totals that does not need a survey run: initial mass functions
(how many stars a solar mass of stars holds), number densities times comoving volumes, counts
along the past light cone with an evolving mass function, and a generic Monte Carlo propagation
that turns named uncertain inputs into an :class:`~countscale.estimate.Estimate` with an error
budget. The run stage that applies it to a survey's own fits is built on top of it.

Topics
------
Initial mass functions
    :class:`IMF` with :class:`Salpeter`, :class:`Kroupa`, :class:`Chabrier`; :func:`get_imf`;
    ``mean_mass``, ``stars_per_solar_mass``; :func:`remnant_mass_msun`;
    :data:`MASS_FACTOR_FROM_CHABRIER` (published IMF conversions of stellar masses).
Stars
    :func:`stars_from_stellar_mass`, :func:`stars_in_volume`, :func:`stars_per_galaxy`.
Mass functions in another cosmology
    :func:`mass_function_in_h`.
Two definitions of a volume total (keep them apart)
    :func:`present_day_volume_total`: today's number density above a limit times a comoving
    volume ("present-day density x volume"); :func:`light_cone_total`: the integral of the
    number density *at each redshift* over the volume element along our past light cone
    (``integral n(>limit, z) dV/dz dz``), with a :class:`MassFunctionEvolution` such as
    :class:`AnchoredEvolution`. For faint limits the two differ by large factors, because
    distant shells are seen as they were when the mass function was different.
Vectorised Schechter tails
    :func:`schechter_number_density_above` (arrays of parameters, for Monte Carlo draws).
Monte Carlo propagation
    Samplers :class:`Fixed`, :class:`Normal`, :class:`LogNormal`, :class:`MultivariateNormal`,
    :class:`Mixture`, :class:`Poisson`, :class:`Empirical` (existing draws resampled),
    :class:`Joint` (several samplers as one budget entry); :func:`propagate`; cosmology draws
    :class:`CosmologyDraws`.

Examples
--------
>>> round(Salpeter().mean_mass(0.1, 100.0), 5)
0.35137
>>> from countscale.lumfunc import DoubleSchechterMass
>>> mf = DoubleSchechterMass(10.66, 3.96e-3, -0.35, 0.79e-3, -1.47)
>>> total = present_day_volume_total(mf, 8.0, z_max=1.0)
>>> 1e8 < total < 1e10
True
"""

from __future__ import annotations

import itertools
import math
import numbers
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
from scipy import integrate, special

from countscale import cosmology as _cosmology
from countscale._checks import as_generator as _generator
from countscale._checks import finite_scalar as _finite_scalar
from countscale.errors import InputError, InputTypeError
from countscale.estimate import Estimate, budget_from_draws
from countscale.lumfunc import DoubleSchechterMass, NumberDensityForm, SchechterMass

__all__ = [
    "HYDROGEN_BURNING_LIMIT_MSUN",
    "IMF",
    "MASS_FACTOR_FROM_CHABRIER",
    "PLANCK18_SIGMA",
    "AnchoredEvolution",
    "Chabrier",
    "CosmologyDraws",
    "Empirical",
    "Fixed",
    "Joint",
    "Kroupa",
    "LogNormal",
    "MassFunctionEvolution",
    "Mixture",
    "MultivariateNormal",
    "Normal",
    "Poisson",
    "Salpeter",
    "Sampler",
    "get_imf",
    "light_cone_total",
    "mass_function_in_h",
    "present_day_volume_total",
    "propagate",
    "remnant_mass_msun",
    "schechter_number_density_above",
    "stars_from_stellar_mass",
    "stars_in_volume",
    "stars_per_galaxy",
]

_LN10 = math.log(10.0)

#: Lowest mass that burns hydrogen, the usual lower limit of "a star" [Msun]; about 0.075-0.08
#: (common figure, no single source). Objects below it are brown dwarfs and are not counted.
HYDROGEN_BURNING_LIMIT_MSUN = 0.08

#: Mass range [Msun] over which stellar-population models normalise the IMF when they turn light
#: into stellar mass (0.1-100 Msun, the usual choice; common figure, no single source).
STELLAR_MASS_RANGE_MSUN = (0.1, 100.0)

#: Multiply a stellar mass derived with a Chabrier (2003) IMF by this to get the mass the same
#: light implies for another IMF. From Madau & Dickinson 2014, ARA&A 52, 415, section 1:
#: Salpeter masses times 0.61 give Chabrier masses and times 0.66 give Kroupa masses (from
#: memory; a ~0.03 dex effect between Kroupa and Chabrier, ~0.2 dex to Salpeter).
MASS_FACTOR_FROM_CHABRIER = {
    "chabrier": 1.0,
    "kroupa": 0.66 / 0.61,
    "salpeter": 1.0 / 0.61,
}

#: Published 1-sigma uncertainties of Planck 2018 (TT,TE,EE+lowE+lensing+BAO): H0 +- 0.42
#: km/s/Mpc and Omega_m +- 0.0056 (Planck Collaboration 2020, A&A 641, A6, Table 2; from
#: memory). Their correlation is ignored here (stated where used).
PLANCK18_SIGMA = {"H0": 0.42, "Om0": 0.0056}


# --------------------------------------------------------------------------------------------
# Input checks
# --------------------------------------------------------------------------------------------
def _positive(name: str, value: Any) -> float:
    x = _finite_scalar(name, value)
    if x <= 0:
        raise InputError(f"`{name}` must be > 0; got {x!r}")
    return x


def _mass_range(lo: Any, hi: Any, lo_name: str = "m_lo", hi_name: str = "m_hi"):
    lo_f = _positive(lo_name, lo)
    hi_f = _positive(hi_name, hi)
    if lo_f >= hi_f:
        raise InputError(
            f"`{lo_name}` must be < `{hi_name}` (an IMF mass range); got {lo_f!r} >= {hi_f!r}"
        )
    return lo_f, hi_f


def _redshift_range(z_min: Any, z_max: Any) -> tuple[float, float]:
    lo = _finite_scalar("z_min", z_min)
    hi = _finite_scalar("z_max", z_max)
    if lo < 0:
        raise InputError(f"`z_min` must be >= 0; got {lo!r}")
    if hi <= lo:
        raise InputError(f"`z_max` must be > `z_min`; got z_max = {hi!r} <= z_min = {lo!r}")
    return lo, hi


# --------------------------------------------------------------------------------------------
# Initial mass functions
# --------------------------------------------------------------------------------------------
def remnant_mass_msun(initial_mass_msun: Any) -> np.ndarray | float:
    """Mass of the remnant a star of a given initial mass leaves [Msun].

    White dwarfs 0.077 m + 0.48 below 8 Msun, neutron stars 1.4 Msun for 8-40 Msun, black holes
    0.5 m above 40 Msun (Renzini & Ciotti 1993, ApJ 416, L49; from memory). A coarse relation:
    it moves the number of living stars per unit stellar mass by a few per cent.
    """
    m = np.asarray(initial_mass_msun, dtype=float)
    value = np.where(m < 8.0, 0.077 * m + 0.48, np.where(m < 40.0, 1.4, 0.5 * m))
    return float(value) if value.ndim == 0 else value


class IMF:
    """Base class of the initial mass functions: dN/dm up to a constant, m in Msun.

    Members implement ``_dn_dm(m)`` (any positive normalisation) and list the masses where the
    form changes (``_breaks``) so quadrature splits there. The public methods are generic:
    ``number(lo, hi)`` and ``mass(lo, hi)`` (integrals of dN/dm and m dN/dm in the same
    arbitrary normalisation), ``mean_mass``, and ``stars_per_solar_mass``.
    """

    name: ClassVar[str] = ""
    reference: ClassVar[str] = ""
    _breaks: ClassVar[tuple[float, ...]] = ()

    def _dn_dm(self, m: np.ndarray) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def dn_dm(self, m: Any) -> np.ndarray | float:
        """dN/dm at masses ``m`` [Msun] (arbitrary normalisation, continuous in m)."""
        mm = np.asarray(m, dtype=float)
        if not np.all(np.isfinite(mm) & (mm > 0)):
            raise InputError(f"`m` must be finite and > 0 Msun; got {m!r}")
        value = self._dn_dm(mm)
        return float(value) if value.ndim == 0 else value

    def _moment(self, k: int, lo: float, hi: float) -> float:
        points = [p for p in self._breaks if lo < p < hi]
        edges = [lo, *points, hi]
        total = 0.0
        for a, b in itertools.pairwise(edges):
            # In ln m the integrand m^(k+1) dN/dm is smooth and spans few decades per piece.
            value, _ = integrate.quad(
                lambda u: math.exp((k + 1) * u) * float(self._dn_dm(np.array(math.exp(u)))),
                math.log(a),
                math.log(b),
                epsabs=0.0,
                epsrel=1e-12,
                limit=200,
            )
            total += value
        return total

    def number(self, m_lo: float, m_hi: float) -> float:
        """Integral of dN/dm over [m_lo, m_hi] (same arbitrary normalisation as ``dn_dm``)."""
        lo, hi = _mass_range(m_lo, m_hi)
        return self._moment(0, lo, hi)

    def mass(self, m_lo: float, m_hi: float) -> float:
        """Integral of m dN/dm over [m_lo, m_hi] [Msun, same normalisation as ``dn_dm``]."""
        lo, hi = _mass_range(m_lo, m_hi)
        return self._moment(1, lo, hi)

    def mean_mass(self, m_lo: float = 0.1, m_hi: float = 100.0) -> float:
        """Mean stellar mass over [m_lo, m_hi] [Msun], by quadrature.

        The answer depends on the range: most stars are near the lower limit, so moving it
        from 0.1 to 0.08 Msun lowers the mean by ~10 % (see the class's Notes).
        """
        lo, hi = _mass_range(m_lo, m_hi)
        return self._moment(1, lo, hi) / self._moment(0, lo, hi)

    def stars_per_solar_mass(
        self,
        count_range: tuple[float, float] = (HYDROGEN_BURNING_LIMIT_MSUN, 100.0),
        mass_range: tuple[float, float] = STELLAR_MASS_RANGE_MSUN,
        turnoff_mass: float | None = None,
    ) -> float:
        """Number of stars per solar mass of stellar mass [Msun^-1].

        Parameters
        ----------
        count_range : (float, float)
            Masses of the objects counted as stars [Msun]; default from the hydrogen-burning
            limit (0.08 Msun) to 100 Msun.
        mass_range : (float, float)
            Mass range over which the stellar mass was normalised [Msun] (population models
            usually use 0.1-100 Msun): the mass measured is taken to be the IMF's mass in
            this range.
        turnoff_mass : float, optional
            ``None`` (default): every star ever formed is counted at its birth mass, so the
            answer is N(count_range) / M(mass_range) -- "stellar mass / mean stellar mass".
            A mass (e.g. 1 Msun for an old population): only stars below it are alive; stars
            above it have left remnants (:func:`remnant_mass_msun`) that still count in the
            stellar mass, and the gas they returned does not. Then the answer is
            N(living) / [M(living) + M(remnants)] per star born, with living stars in
            ``count_range`` below the turnoff.

        Notes
        -----
        Stellar masses from population synthesis include remnants but not the returned gas,
        so the turnoff form is the closer one for an old population; it gives ~1.5x more
        living stars than the plain division for a Kroupa or Chabrier IMF (computed here).
        """
        c_lo, c_hi = _mass_range(
            *_pair("count_range", count_range), "count_range[0]", "count_range[1]"
        )
        m_lo, m_hi = _mass_range(*_pair("mass_range", mass_range), "mass_range[0]", "mass_range[1]")
        if turnoff_mass is None:
            return self._moment(0, c_lo, c_hi) / self._moment(1, m_lo, m_hi)
        turnoff = _positive("turnoff_mass", turnoff_mass)
        if not c_lo < turnoff <= m_hi:
            raise InputError(
                f"`turnoff_mass` must be in (count_range[0] = {c_lo!r}, mass_range[1] = "
                f"{m_hi!r}]; got {turnoff!r}"
            )
        live_hi = min(turnoff, c_hi)
        n_living = self._moment(0, c_lo, live_hi)
        # The measured mass covers mass_range: living stars there, remnants of the dead.
        m_living = self._moment(1, m_lo, min(turnoff, m_hi)) if m_lo < turnoff else 0.0
        m_remnants = self._remnant_mass(max(turnoff, m_lo), m_hi)
        return n_living / (m_living + m_remnants)

    def _remnant_mass(self, lo: float, hi: float) -> float:
        if lo >= hi:
            return 0.0
        points = [p for p in (*self._breaks, 8.0, 40.0) if lo < p < hi]
        edges = [lo, *sorted(points), hi]
        total = 0.0
        for a, b in itertools.pairwise(edges):
            value, _ = integrate.quad(
                lambda m: float(remnant_mass_msun(m)) * float(self._dn_dm(np.array(m))),
                a,
                b,
                epsabs=0.0,
                epsrel=1e-10,
                limit=200,
            )
            total += value
        return total

    def __repr__(self) -> str:
        return f"{type(self).__name__}()"


def _pair(name: str, value: Any) -> tuple[Any, Any]:
    try:
        lo, hi = value
    except (TypeError, ValueError):
        raise InputTypeError(f"`{name}` must be a pair (lo, hi) in Msun; got {value!r}") from None
    return lo, hi


@dataclass(frozen=True, repr=False)
class Salpeter(IMF):
    """Salpeter (1955, ApJ 121, 161) IMF: dN/dm proportional to m^-2.35.

    Notes
    -----
    Mean mass over [a, b] in closed form: (1.35 / 0.35) (a^-0.35 - b^-0.35) /
    (a^-1.35 - b^-1.35); 0.35137 Msun over 0.1-100 Msun.
    """

    slope: float = 2.35
    name: ClassVar[str] = "salpeter"
    reference: ClassVar[str] = "Salpeter 1955, ApJ 121, 161"

    def _dn_dm(self, m: np.ndarray) -> np.ndarray:
        return m ** (-self.slope)


@dataclass(frozen=True, repr=False)
class Kroupa(IMF):
    """Kroupa (2001, MNRAS 322, 231) IMF: a broken power law, continuous at the breaks.

    dN/dm proportional to m^-0.3 (0.01-0.08 Msun), m^-1.3 (0.08-0.5 Msun), m^-2.3 (> 0.5 Msun)
    (Kroupa 2001, eq. 2, the "present-day" multi-part form).
    """

    name: ClassVar[str] = "kroupa"
    reference: ClassVar[str] = "Kroupa 2001, MNRAS 322, 231, eq. 2"
    _breaks: ClassVar[tuple[float, ...]] = (0.08, 0.5)

    def _dn_dm(self, m: np.ndarray) -> np.ndarray:
        low = (m / 0.08) ** -0.3
        mid = (m / 0.08) ** -1.3
        high = (0.5 / 0.08) ** -1.3 * (m / 0.5) ** -2.3
        return np.where(m < 0.08, low, np.where(m < 0.5, mid, high))


@dataclass(frozen=True, repr=False)
class Chabrier(IMF):
    """Chabrier (2003, PASP 115, 763) single-star IMF (Table 1).

    Per unit log10 m: 0.158 exp[-(log m - log 0.079)^2 / (2 x 0.69^2)] for m <= 1 Msun and
    0.0443 m^-1.3 above (the published coefficients, which join to within 0.5 % at 1 Msun).
    """

    name: ClassVar[str] = "chabrier"
    reference: ClassVar[str] = "Chabrier 2003, PASP 115, 763, Table 1 (single objects)"
    _breaks: ClassVar[tuple[float, ...]] = (1.0,)

    def _dn_dm(self, m: np.ndarray) -> np.ndarray:
        log_m = np.log10(m)
        lognormal = 0.158 * np.exp(-((log_m - math.log10(0.079)) ** 2) / (2 * 0.69**2))
        power = 0.0443 * m**-1.3
        per_log_m = np.where(m <= 1.0, lognormal, power)
        return per_log_m / (m * _LN10)


_IMFS = {"salpeter": Salpeter, "kroupa": Kroupa, "chabrier": Chabrier}


def get_imf(imf: Any) -> IMF:
    """An IMF from a name (``"salpeter"``, ``"kroupa"``, ``"chabrier"``) or an IMF instance."""
    if isinstance(imf, IMF):
        return imf
    if not isinstance(imf, str):
        raise InputTypeError(f"`imf` must be an IMF or one of {sorted(_IMFS)}; got {imf!r}")
    key = imf.strip().lower()
    if key not in _IMFS:
        raise InputError(f"`imf` must be one of {', '.join(sorted(_IMFS))}; got {imf!r}")
    return _IMFS[key]()


# --------------------------------------------------------------------------------------------
# Stars
# --------------------------------------------------------------------------------------------
def _imf_mass_factor(imf: IMF, mass_imf: str) -> float:
    """Factor turning a stellar mass derived with ``mass_imf`` into one for ``imf``."""
    source = get_imf(mass_imf).name
    target = imf.name
    if source not in MASS_FACTOR_FROM_CHABRIER or target not in MASS_FACTOR_FROM_CHABRIER:
        raise InputError(
            f"`mass_imf` conversion known only between {sorted(MASS_FACTOR_FROM_CHABRIER)}; "
            f"got {source!r} -> {target!r}"
        )
    return MASS_FACTOR_FROM_CHABRIER[target] / MASS_FACTOR_FROM_CHABRIER[source]


def stars_from_stellar_mass(
    mass_msun: Any,
    imf: Any = "kroupa",
    mass_imf: str | None = None,
    count_range: tuple[float, float] = (HYDROGEN_BURNING_LIMIT_MSUN, 100.0),
    mass_range: tuple[float, float] = STELLAR_MASS_RANGE_MSUN,
    turnoff_mass: float | None = None,
) -> np.ndarray | float:
    """Number of stars in a stellar mass: mass x (stars per solar mass of the IMF).

    Parameters
    ----------
    mass_msun : float or array_like
        Stellar mass [Msun], > 0.
    imf : str or IMF
        The IMF whose stars are counted.
    mass_imf : str, optional
        The IMF the mass was derived with (e.g. ``"chabrier"`` for most modern catalogues).
        When it differs from ``imf`` the mass is first converted with
        :data:`MASS_FACTOR_FROM_CHABRIER` (the same light means more mass for a bottom-heavy
        IMF). ``None``: the mass is taken to be for ``imf`` already.
    count_range, mass_range, turnoff_mass
        See :meth:`IMF.stars_per_solar_mass`.
    """
    the_imf = get_imf(imf)
    mass = np.asarray(mass_msun, dtype=float)
    if not np.all(np.isfinite(mass) & (mass > 0)):
        raise InputError(f"`mass_msun` must be finite and > 0; got {mass_msun!r}")
    factor = 1.0 if mass_imf is None else _imf_mass_factor(the_imf, mass_imf)
    per_msun = the_imf.stars_per_solar_mass(count_range, mass_range, turnoff_mass)
    value = mass * factor * per_msun
    return float(value) if value.ndim == 0 else value


def stars_per_galaxy(log10_mass_msun: float, imf: Any = "kroupa", **kwargs: Any) -> float:
    """Number of stars in one galaxy of stellar mass 10^log10_mass_msun Msun.

    Keyword arguments are those of :func:`stars_from_stellar_mass`.

    Examples
    --------
    >>> 0.9e11 < stars_per_galaxy(10.78, "kroupa") < 1.2e11
    True
    """
    log_mass = _finite_scalar("log10_mass_msun", log10_mass_msun)
    return float(stars_from_stellar_mass(10.0**log_mass, imf, **kwargs))


def stars_in_volume(
    stellar_mass_density_msun_mpc3: float, volume_mpc3: float, imf: Any = "kroupa", **kwargs: Any
) -> float:
    """Stars in a comoving volume: rho* [Msun Mpc^-3] x volume [Mpc^3] x stars per Msun.

    ``rho*`` is a given stellar mass density, or the integral of M Phi dM of a mass function
    (``form.mass_density_msun_mpc3()`` of :class:`~countscale.lumfunc.DoubleSchechterMass`).
    This is a *present-day density x volume* total. Keyword arguments are those of
    :func:`stars_from_stellar_mass`.
    """
    rho = _positive("stellar_mass_density_msun_mpc3", stellar_mass_density_msun_mpc3)
    volume = _positive("volume_mpc3", volume_mpc3)
    return float(stars_from_stellar_mass(rho * volume, imf, **kwargs))


# --------------------------------------------------------------------------------------------
# Mass functions: h conversion and vectorised tails
# --------------------------------------------------------------------------------------------
def mass_function_in_h(form: NumberDensityForm, h_published: float, h: float):
    """A published stellar-mass function converted to another Hubble constant.

    Stellar masses come from luminosities, proportional to distance^2, so M* scales as h^-2;
    number densities scale as h^3 (Hogg 1999, arXiv:astro-ph/9905116, on h-scaled units).

    Parameters
    ----------
    form : SchechterMass or DoubleSchechterMass
        As published, for ``h_published``.
    h_published, h : float
        H0 / (100 km/s/Mpc) of the publication and of the target cosmology, in (0, 2].
    """
    h_pub = _positive("h_published", h_published)
    h_new = _positive("h", h)
    for name, value in (("h_published", h_pub), ("h", h_new)):
        if value > 2:
            raise InputError(f"`{name}` = H0 / 100 km/s/Mpc must be in (0, 2]; got {value!r}")
    ratio = h_new / h_pub
    shift = -2.0 * math.log10(ratio)
    if isinstance(form, DoubleSchechterMass):
        return DoubleSchechterMass(
            form.log10_mass_star + shift,
            form.phi_star_1 * ratio**3,
            form.alpha_1,
            form.phi_star_2 * ratio**3,
            form.alpha_2,
        )
    if isinstance(form, SchechterMass):
        return SchechterMass(form.log10_mass_star + shift, form.alpha, form.phi_star * ratio**3)
    raise InputTypeError(
        f"`form` must be a SchechterMass or DoubleSchechterMass; got {type(form).__name__}"
    )


def _upper_gamma(a: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Gamma(a, x) for arrays of orders a (any real, a > -20) and x >= 0.

    :func:`countscale.lumfunc.upper_incomplete_gamma` takes one order at a time; Monte Carlo
    draws of a faint-end slope need many. For a > 0 this is scipy's Gamma(a) Q(a, x); for
    a <= 0 the recurrence Gamma(c - 1, x) = (Gamma(c, x) - x^(c-1) e^-x) / (c - 1) (DLMF 8.8.2)
    is applied downwards from b = a + ceil(-a) in [0, 1) (E1 at b = 0, DLMF 8.4.4). The
    relative error grows as 1e-16 / |a| for a just below 0 (the last divisor is a itself):
    ~1e-13 for |a| >= 1e-3, tested against mpmath.
    """
    a, x = np.broadcast_arrays(np.asarray(a, dtype=float), np.asarray(x, dtype=float))
    out = np.empty(a.shape)
    positive = a > 0
    if positive.any():
        out[positive] = special.gammaincc(a[positive], x[positive]) * special.gamma(a[positive])
    rest = ~positive
    if rest.any():
        ar, xr = a[rest], x[rest]
        k = np.ceil(-ar)
        b = ar + k
        with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
            value = np.where(
                b > 0,
                special.gammaincc(np.where(b > 0, b, 1.0), xr)
                * special.gamma(np.where(b > 0, b, 1.0)),
                special.exp1(xr),
            )
            log_x = np.log(xr)
            order = b.copy()
            for step in range(int(k.max()) if k.size else 0):
                active = step < k
                order_new = order - 1.0
                term = np.exp(order_new * log_x - xr)
                value = np.where(active, (value - term) / order_new, value)
                order = np.where(active, order_new, order)
        value = np.where(xr == 0, np.inf, value)
        value = np.where(np.isinf(xr), 0.0, value)
        out[rest] = value
    return out


def schechter_number_density_above(
    log10_mass_limit: Any, log10_mass_star: Any, terms: Sequence[tuple[Any, Any]]
) -> np.ndarray:
    """Number density above a mass of a (multi-term) Schechter mass function, vectorised.

    n(> M) = sum_i phi_i Gamma(alpha_i + 1, M / M*) (Baldry et al. 2012, MNRAS 421, 621,
    eq. 6 integrated), with every parameter an array broadcast against the others -- e.g.
    Monte Carlo draws along one axis and redshifts along another.

    Parameters
    ----------
    log10_mass_limit, log10_mass_star : array_like
        log10 of the limit and of M* [Msun].
    terms : sequence of (phi_star, alpha) pairs of array_like
        Normalisations [Mpc^-3] and slopes.

    Returns
    -------
    ndarray
        [Mpc^-3].
    """
    t = 10.0 ** (np.asarray(log10_mass_limit, dtype=float) - np.asarray(log10_mass_star, float))
    total = 0.0
    for phi, alpha in terms:
        total = total + np.asarray(phi, dtype=float) * _upper_gamma(np.asarray(alpha) + 1.0, t)
    return np.asarray(total, dtype=float)


# --------------------------------------------------------------------------------------------
# Volume totals: present-day density x volume
# --------------------------------------------------------------------------------------------
def present_day_volume_total(
    form: NumberDensityForm,
    limit: float,
    z_min: float = 0.0,
    z_max: float | None = None,
    area_sr: float = _cosmology.FULL_SKY_SR,
    cosmo: Any = None,
) -> float:
    """Today's number density above a limit times a comoving volume: "present-day x volume".

    Parameters
    ----------
    form : NumberDensityForm
        A luminosity or mass function (e.g. :class:`~countscale.lumfunc.DoubleSchechterMass`),
        with densities per Mpc^3 in the cosmology's H0 (see :func:`mass_function_in_h`).
    limit : float
        Absolute magnitude (sources brighter are counted) or log10 stellar mass (more massive).
    z_min, z_max : float
        The redshift shell. ``z_max=None``: the whole observable universe (the comoving volume
        inside the particle horizon, :func:`countscale.cosmology.observable_universe_volume_mpc3`);
        then ``z_min`` must be 0.
    area_sr : float
        Solid angle (default the whole sky).
    cosmo : FLRW, str or None
        Cosmology (default Planck18).

    Notes
    -----
    This counts galaxies as if the whole volume were filled with today's population. It is not
    what a telescope sees (that is :func:`light_cone_total`), and for faint limits the two
    differ by large factors.
    """
    n = float(form.number_density_above(limit))
    if z_max is None:
        if _finite_scalar("z_min", z_min) != 0.0:
            raise InputError(f"`z_min` must be 0 when `z_max` is None (the horizon); got {z_min!r}")
        area = _finite_scalar("area_sr", area_sr)
        if not 0 < area <= _cosmology.FULL_SKY_SR * (1 + 1e-12):
            raise InputError(f"`area_sr` must be in (0, 4 pi] sr; got {area!r}")
        volume = _cosmology.observable_universe_volume_mpc3(cosmo) * area / _cosmology.FULL_SKY_SR
    else:
        lo, hi = _redshift_range(z_min, z_max)
        volume = _cosmology.comoving_volume_mpc3(lo, hi, area_sr, cosmo)
    return n * volume


# --------------------------------------------------------------------------------------------
# Light-cone totals
# --------------------------------------------------------------------------------------------
class MassFunctionEvolution:
    """Number density above a limit as a function of redshift: the input of a light-cone count.

    Members implement ``_number_density_above(limit, z)`` for an array ``z`` inside
    ``z_range`` and set ``z_range`` (the redshifts where the published evolution holds).
    """

    z_range: tuple[float, float] = (0.0, 0.0)

    def _number_density_above(self, limit: float, z: np.ndarray) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError

    def number_density_above(self, limit: float, z: Any) -> np.ndarray | float:
        """n(> limit, z) [Mpc^-3] at redshifts ``z`` inside ``z_range``."""
        lim = _finite_scalar("limit", limit)
        zz = np.asarray(z, dtype=float)
        lo, hi = self.z_range
        bad = ~np.isfinite(zz) | (zz < lo) | (zz > hi)
        if bad.any():
            raise InputError(
                f"`z` must be inside the evolution's range [{lo:g}, {hi:g}] (no "
                f"extrapolation); got {float(zz[bad].flat[0])!r}"
            )
        value = self._number_density_above(lim, np.atleast_1d(zz))
        return float(value[0]) if zz.ndim == 0 else value.reshape(zz.shape)


@dataclass(frozen=True, eq=False)
class AnchoredEvolution(MassFunctionEvolution):
    """Published forms at anchor redshifts; log10 n(> limit) interpolated linearly in z between.

    Parameters
    ----------
    anchors : sequence of (z, NumberDensityForm)
        Strictly increasing redshifts (>= 0) and the form published there (per Mpc^3 in the
        cosmology used, see :func:`mass_function_in_h`). At least two.
    label : str
        What the anchors are (shown in reports).

    Notes
    -----
    Between anchors the number density above the limit changes exponentially in z: the
    simplest interpolation that keeps densities positive. Outside the anchors nothing is
    assumed: a light-cone integral beyond them is refused.
    """

    anchors: tuple[tuple[float, NumberDensityForm], ...]
    label: str = ""
    z_range: tuple[float, float] = field(init=False)

    def __post_init__(self) -> None:
        anchors = tuple(self.anchors)
        if len(anchors) < 2:
            raise InputError(f"`anchors` must hold at least 2 (z, form) pairs; got {len(anchors)}")
        checked = []
        for i, item in enumerate(anchors):
            try:
                z, form = item
            except (TypeError, ValueError):
                raise InputTypeError(
                    f"`anchors[{i}]` must be a (z, form) pair; got {item!r}"
                ) from None
            z = _finite_scalar(f"anchors[{i}] z", z)
            if not isinstance(form, NumberDensityForm):
                raise InputTypeError(
                    f"`anchors[{i}]` form must be a NumberDensityForm; got {type(form).__name__}"
                )
            checked.append((z, form))
        zs = [z for z, _ in checked]
        if zs[0] < 0 or any(b <= a for a, b in itertools.pairwise(zs)):
            raise InputError(f"`anchors` redshifts must be >= 0 and strictly increasing; got {zs}")
        object.__setattr__(self, "anchors", tuple(checked))
        object.__setattr__(self, "z_range", (zs[0], zs[-1]))

    def _number_density_above(self, limit: float, z: np.ndarray) -> np.ndarray:
        zs = np.array([a for a, _ in self.anchors])
        log_n = np.log10([float(form.number_density_above(limit)) for _, form in self.anchors])
        return 10.0 ** np.interp(z, zs, log_n)


def light_cone_total(
    evolution: MassFunctionEvolution,
    limit: float,
    z_min: float = 0.0,
    z_max: float = 8.0,
    area_sr: float = _cosmology.FULL_SKY_SR,
    cosmo: Any = None,
    n_z: int = 401,
) -> float:
    """Sources above a limit along our past light cone: integral n(> limit, z) dV/dz dz.

    Parameters
    ----------
    evolution : MassFunctionEvolution
        Number density above the limit at each redshift (a published evolution).
    limit : float
        Magnitude or log10 mass limit, as the evolution's forms take it.
    z_min, z_max : float
        Redshift range, ``z_max > z_min >= 0``, inside ``evolution.z_range``.
    area_sr : float
        Solid angle (default the whole sky).
    cosmo : FLRW, str or None
        Cosmology (default Planck18).
    n_z : int
        Nodes of the composite Simpson rule in z (odd, >= 3).

    Notes
    -----
    Every shell is counted as it was when its light left it: this is the number of sources a
    complete survey of the sky to ``z_max`` would catalogue. Compare
    :func:`present_day_volume_total`, which fills the same volume with today's population.
    """
    lo, hi = _redshift_range(z_min, z_max)
    if isinstance(n_z, bool) or not isinstance(n_z, numbers.Integral) or n_z < 3 or n_z % 2 == 0:
        raise InputError(f"`n_z` must be an odd integer >= 3; got {n_z!r}")
    if not isinstance(evolution, MassFunctionEvolution):
        raise InputTypeError(
            f"`evolution` must be a MassFunctionEvolution; got {type(evolution).__name__}"
        )
    e_lo, e_hi = evolution.z_range
    if lo < e_lo or hi > e_hi:
        raise InputError(
            f"`z_min`, `z_max` = ({lo:g}, {hi:g}) must lie inside the evolution's range "
            f"[{e_lo:g}, {e_hi:g}]"
        )
    z = np.linspace(lo, hi, int(n_z))
    n = evolution.number_density_above(limit, z)
    dv_dz = _cosmology.differential_comoving_volume_mpc3_sr(z, cosmo) * area_sr
    return float(integrate.simpson(n * dv_dz, x=z))


# --------------------------------------------------------------------------------------------
# Cosmology within its published uncertainties
# --------------------------------------------------------------------------------------------
class CosmologyDraws:
    """Volumes for cosmologies drawn within Planck 2018's published uncertainties, quickly.

    H0 and Omega_m are drawn as independent normals with :data:`PLANCK18_SIGMA` (their
    anti-correlation is ignored, which slightly overstates the spread of volumes; either way it
    is ~0.01 dex). A volume for each draw comes from astropy on a 3 x 3 grid of Planck18
    clones at (H0, Omega_m) = centre + (-2, 0, 2) sigma, interpolated quadratically in both
    (Lagrange), in log: accurate to ~1e-5 within 3 sigma (tested against astropy).

    Parameters
    ----------
    cosmo : FLRW, str or None
        The central cosmology (default Planck18).
    sigma : mapping, optional
        ``{"H0": km/s/Mpc, "Om0": ...}`` 1-sigma widths (default :data:`PLANCK18_SIGMA`).
    """

    _STEPS = (-2.0, 0.0, 2.0)

    def __init__(self, cosmo: Any = None, sigma: Mapping[str, float] | None = None) -> None:
        self.cosmo = _cosmology._resolve(cosmo)
        sig = dict(PLANCK18_SIGMA if sigma is None else sigma)
        if set(sig) != {"H0", "Om0"}:
            raise InputError(f"`sigma` must have the keys H0 and Om0; got {sorted(sig)}")
        self.sigma = {k: float(_finite_scalar(f"sigma[{k!r}]", v)) for k, v in sig.items()}
        if any(v < 0 for v in self.sigma.values()):
            raise InputError(f"`sigma` widths must be >= 0; got {self.sigma}")
        self.h0 = float(self.cosmo.H0.value)
        self.om0 = float(self.cosmo.Om0)
        self._grid = [
            [
                self.cosmo.clone(
                    H0=self.h0 + i * self.sigma["H0"], Om0=self.om0 + j * self.sigma["Om0"]
                )
                if (i, j) != (0.0, 0.0)
                else self.cosmo
                for j in self._STEPS
            ]
            for i in self._STEPS
        ]

    def sample(self, n: int, rng: Any) -> dict[str, np.ndarray]:
        """``{"H0": draws, "Om0": draws}`` (normal, independent)."""
        gen = _generator(rng)
        return {
            "H0": self.h0 + self.sigma["H0"] * gen.standard_normal(n),
            "Om0": self.om0 + self.sigma["Om0"] * gen.standard_normal(n),
        }

    def central(self, n: int) -> dict[str, np.ndarray]:
        return {"H0": np.full(n, self.h0), "Om0": np.full(n, self.om0)}

    @staticmethod
    def _lagrange(u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Quadratic Lagrange weights for nodes at -1, 0, 1 (u in units of the step)."""
        return 0.5 * u * (u - 1.0), (1.0 - u) * (1.0 + u), 0.5 * u * (u + 1.0)

    def _interpolate(self, log_values: np.ndarray, h0: np.ndarray, om0: np.ndarray) -> np.ndarray:
        """log_values: shape (3, 3, ...) on the grid -> shape (n_draws, ...)."""
        step_h = self._STEPS[-1] * self.sigma["H0"]
        step_o = self._STEPS[-1] * self.sigma["Om0"]
        u = (h0 - self.h0) / step_h if step_h > 0 else np.zeros_like(h0)
        v = (om0 - self.om0) / step_o if step_o > 0 else np.zeros_like(om0)
        wu = self._lagrange(u)
        wv = self._lagrange(v)
        out = 0.0
        extra = (None,) * (log_values.ndim - 2)
        for i in range(3):
            for j in range(3):
                out = out + (wu[i] * wv[j])[(slice(None), *extra)] * log_values[i, j]
        return np.exp(out)

    def _on_grid(self, func: Callable[[Any], Any]) -> np.ndarray:
        return np.log(
            np.array([[np.asarray(func(c), dtype=float) for c in row] for row in self._grid])
        )

    def horizon_volume_mpc3(self, draws: Mapping[str, np.ndarray]) -> np.ndarray:
        """Comoving volume of the observable universe for each draw [Mpc^3]."""
        values = self._on_grid(_cosmology.observable_universe_volume_mpc3)
        return self._interpolate(values, draws["H0"], draws["Om0"])

    def comoving_volume_mpc3(
        self, z_min: float, z_max: float, draws: Mapping[str, np.ndarray]
    ) -> np.ndarray:
        """All-sky comoving volume of a shell for each draw [Mpc^3]."""
        lo, hi = _redshift_range(z_min, z_max)
        values = self._on_grid(lambda c: _cosmology.comoving_volume_mpc3(lo, hi, cosmo=c))
        return self._interpolate(values, draws["H0"], draws["Om0"])

    def differential_volume_mpc3(
        self, z: np.ndarray, draws: Mapping[str, np.ndarray]
    ) -> np.ndarray:
        """All-sky dV/dz at redshifts ``z`` (> 0) for each draw: shape (n_draws, len(z))."""
        zz = np.asarray(z, dtype=float)
        values = self._on_grid(
            lambda c: 4 * math.pi * _cosmology.differential_comoving_volume_mpc3_sr(zz, cosmo=c)
        )
        return self._interpolate(values, draws["H0"], draws["Om0"])


# --------------------------------------------------------------------------------------------
# Monte Carlo propagation
# --------------------------------------------------------------------------------------------
class Sampler:
    """An uncertain input: ``sample(n, rng)`` draws, ``central(n)`` the value held fixed.

    The value may be a float array of shape (n,), or (n, k) for a joint input.
    """

    def sample(self, n: int, rng: np.random.Generator) -> Any:  # pragma: no cover - abstract
        raise NotImplementedError

    def central(self, n: int) -> Any:  # pragma: no cover - abstract
        raise NotImplementedError

    @property
    def zero_width(self) -> bool:
        return False


@dataclass(frozen=True)
class Fixed(Sampler):
    """A known value (no uncertainty): always ``value``."""

    value: float

    def __post_init__(self) -> None:
        object.__setattr__(self, "value", _finite_scalar("value", self.value))

    def sample(self, n, rng):
        return np.full(n, self.value)

    def central(self, n):
        return np.full(n, self.value)

    @property
    def zero_width(self) -> bool:
        return True


@dataclass(frozen=True)
class Normal(Sampler):
    """Normal with ``mean`` and ``sigma`` (>= 0); central value the mean."""

    mean: float
    sigma: float

    def __post_init__(self) -> None:
        object.__setattr__(self, "mean", _finite_scalar("mean", self.mean))
        sigma = _finite_scalar("sigma", self.sigma)
        if sigma < 0:
            raise InputError(f"`sigma` must be >= 0; got {sigma!r}")
        object.__setattr__(self, "sigma", sigma)

    def sample(self, n, rng):
        return self.mean + self.sigma * rng.standard_normal(n)

    def central(self, n):
        return np.full(n, self.mean)

    @property
    def zero_width(self) -> bool:
        return self.sigma == 0.0


@dataclass(frozen=True)
class LogNormal(Sampler):
    """log10 of the value normal: ``median`` (> 0) and ``sigma_dex`` (>= 0); central the median."""

    median: float
    sigma_dex: float

    def __post_init__(self) -> None:
        object.__setattr__(self, "median", _positive("median", self.median))
        sigma = _finite_scalar("sigma_dex", self.sigma_dex)
        if sigma < 0:
            raise InputError(f"`sigma_dex` must be >= 0; got {sigma!r}")
        object.__setattr__(self, "sigma_dex", sigma)

    def sample(self, n, rng):
        return self.median * 10.0 ** (self.sigma_dex * rng.standard_normal(n))

    def central(self, n):
        return np.full(n, self.median)

    @property
    def zero_width(self) -> bool:
        return self.sigma_dex == 0.0


@dataclass(frozen=True, eq=False)
class MultivariateNormal(Sampler):
    """Correlated normal parameters from a mean vector and a covariance matrix.

    Draws have shape (n, k). The covariance must be symmetric positive semi-definite (a
    fitted covariance, e.g. of Schechter parameters); it is factorised once.
    """

    mean: Any
    covariance: Any

    def __post_init__(self) -> None:
        mean = np.array(self.mean, dtype=float)
        cov = np.array(self.covariance, dtype=float)
        if mean.ndim != 1 or mean.size == 0 or not np.all(np.isfinite(mean)):
            raise InputError(f"`mean` must be a finite 1-D vector; got {self.mean!r}")
        if cov.shape != (mean.size, mean.size) or not np.all(np.isfinite(cov)):
            raise InputError(
                f"`covariance` must be a finite {mean.size}x{mean.size} matrix; "
                f"got shape {cov.shape}"
            )
        if not np.allclose(cov, cov.T, rtol=1e-10, atol=1e-300):
            raise InputError("`covariance` must be symmetric")
        values, vectors = np.linalg.eigh(cov)
        scale = max(1.0, float(np.max(np.abs(values))))
        if values.min() < -1e-10 * scale:
            raise InputError(
                f"`covariance` must be positive semi-definite; got eigenvalue {values.min():.3g}"
            )
        factor = vectors * np.sqrt(np.clip(values, 0.0, None))
        for name, arr in (("mean", mean), ("covariance", cov), ("_factor", factor)):
            arr.flags.writeable = False
            object.__setattr__(self, name, arr)

    def sample(self, n, rng):
        return self.mean + rng.standard_normal((n, self.mean.size)) @ self._factor.T

    def central(self, n):
        return np.tile(self.mean, (n, 1))

    @property
    def zero_width(self) -> bool:
        return not np.any(self.covariance)


@dataclass(frozen=True, eq=False)
class Mixture(Sampler):
    """A discrete systematic: one of several options (e.g. IMFs, models) with weights.

    Parameters
    ----------
    options : mapping of str to float
        ``{label: value}`` (the value each option gives the input).
    weights : mapping of str to float, optional
        Non-negative, not all zero (normalised); default equal weights.
    central_option : str, optional
        The option held fixed when other inputs vary (default the heaviest, first on ties).
    """

    options: Mapping[str, float]
    weights: Mapping[str, float] | None = None
    central_option: str | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.options, Mapping) or not self.options:
            raise InputError(f"`options` must be a non-empty mapping; got {self.options!r}")
        options = {str(k): _finite_scalar(f"options[{k!r}]", v) for k, v in self.options.items()}
        weights = {k: 1.0 for k in options} if self.weights is None else dict(self.weights)
        if set(weights) != set(options):
            raise InputError(
                f"`weights` must name the same options as `options`; got {sorted(weights)}"
            )
        weights = {k: _finite_scalar(f"weights[{k!r}]", weights[k]) for k in options}
        if any(w < 0 for w in weights.values()) or sum(weights.values()) <= 0:
            raise InputError(f"`weights` must be >= 0 and not all zero; got {weights}")
        total = sum(weights.values())
        weights = {k: w / total for k, w in weights.items()}
        central = self.central_option
        if central is None:
            central = max(options, key=lambda k: (weights[k], -list(options).index(k)))
        elif central not in options:
            raise InputError(f"`central_option` must be one of {list(options)}; got {central!r}")
        object.__setattr__(self, "options", options)
        object.__setattr__(self, "weights", weights)
        object.__setattr__(self, "central_option", central)

    def sample(self, n, rng):
        labels = list(self.options)
        values = np.array([self.options[k] for k in labels])
        p = np.array([self.weights[k] for k in labels])
        return values[rng.choice(len(labels), size=n, p=p)]

    def central(self, n):
        return np.full(n, self.options[self.central_option])

    @property
    def zero_width(self) -> bool:
        used = {self.options[k] for k, w in self.weights.items() if w > 0}
        return len(used) == 1


@dataclass(frozen=True)
class Poisson(Sampler):
    """A Poisson count of mean ``mean`` (>= 0); central value the mean."""

    mean: float

    def __post_init__(self) -> None:
        mean = _finite_scalar("mean", self.mean)
        if mean < 0:
            raise InputError(f"`mean` must be >= 0; got {mean!r}")
        object.__setattr__(self, "mean", mean)

    def sample(self, n, rng):
        return rng.poisson(self.mean, size=n).astype(float)

    def central(self, n):
        return np.full(n, self.mean)

    @property
    def zero_width(self) -> bool:
        return self.mean == 0.0


@dataclass(frozen=True, eq=False)
class Empirical(Sampler):
    """Draws that already exist (another Monte Carlo's), resampled with replacement.

    For carrying a total computed elsewhere (e.g. a sky model's draws) into a product with
    further inputs. Central value: the median of the draws.
    """

    draws: Any

    def __post_init__(self) -> None:
        values = np.array(self.draws, dtype=float)
        if values.ndim != 1 or values.size < 2 or not np.all(np.isfinite(values)):
            raise InputError(
                f"`draws` must be a finite 1-D array of at least 2 values; got shape "
                f"{values.shape}"
            )
        values.flags.writeable = False
        object.__setattr__(self, "draws", values)

    def sample(self, n, rng):
        return self.draws[rng.integers(0, self.draws.size, size=n)]

    def central(self, n):
        return np.full(n, float(np.median(self.draws)))

    @property
    def zero_width(self) -> bool:
        return bool(np.all(self.draws == self.draws[0]))


@dataclass(frozen=True, eq=False)
class Joint(Sampler):
    """Several samplers drawn together as the columns of one input (one budget entry).

    ``parts`` are samplers of scalar draws or of (n, k) blocks; a draw is their columns side
    by side, shape (n, total columns). Use it when one source of uncertainty has pieces of
    different kinds (e.g. a fit's normal parameters and a Poisson count of the sources the
    fit does not cover).
    """

    parts: tuple

    def __post_init__(self) -> None:
        parts = tuple(self.parts)
        if not parts or not all(isinstance(p, Sampler) for p in parts):
            raise InputTypeError(f"`parts` must be a non-empty sequence of samplers; got {parts!r}")
        object.__setattr__(self, "parts", parts)

    @staticmethod
    def _stack(blocks):
        return np.column_stack([np.asarray(b, dtype=float).reshape(len(b), -1) for b in blocks])

    def sample(self, n, rng):
        return self._stack([p.sample(n, rng) for p in self.parts])

    def central(self, n):
        return self._stack([p.central(n) for p in self.parts])

    @property
    def zero_width(self) -> bool:
        return all(p.zero_width for p in self.parts)


def _check_n_draws(n_draws: Any) -> int:
    if isinstance(n_draws, bool) or not isinstance(n_draws, numbers.Integral) or n_draws < 2:
        raise InputError(f"`n_draws` must be an integer >= 2; got {n_draws!r}")
    return int(n_draws)


def propagate(
    function: Callable[[Mapping[str, Any]], Any],
    inputs: Mapping[str, Sampler],
    unit: str,
    n_draws: int = 10_000,
    rng: Any = None,
) -> Estimate:
    """Monte Carlo propagation of named uncertain inputs to a total, with an error budget.

    Parameters
    ----------
    function : callable
        ``function(values) -> array of shape (n,)``: the total for each draw, vectorised;
        ``values`` maps each input's name to its draws (shape (n,), or (n, k) for a
        :class:`MultivariateNormal`). Totals must be finite and > 0.
    inputs : mapping of str to Sampler
        The uncertain inputs, named as they should appear in the budget (e.g.
        ``"mass_function"``, ``"imf"``, ``"cosmology"``). A cosmology input is a
        :class:`CosmologyDraws` passed through as ``{"H0", "Om0"}`` draws.
    unit : str
        Unit of the total.
    n_draws : int
        Draws per pass (>= 2).
    rng : int, numpy Generator or None
        Seed or generator; the same seed gives identical results.

    Returns
    -------
    Estimate
        From the draws with every input varying; its budget gives each input's share of the
        variance of log10 of the total from passes in which that input alone varies (others
        at their central values; :func:`countscale.estimate.budget_from_draws`). An input of
        zero width gets a share of exactly 0; if every input has zero width the budget is
        empty (a point value).
    """
    if not callable(function):
        raise InputTypeError(f"`function` must be callable; got {type(function).__name__}")
    if not isinstance(inputs, Mapping) or not inputs:
        raise InputError(f"`inputs` must be a non-empty mapping of name to sampler; got {inputs!r}")
    for name, sampler in inputs.items():
        if not isinstance(sampler, (Sampler, CosmologyDraws)):
            raise InputTypeError(
                f"`inputs[{name!r}]` must be a sampler (Normal, LogNormal, MultivariateNormal, "
                f"Mixture, Poisson, Empirical, Joint, Fixed or CosmologyDraws); got "
                f"{type(sampler).__name__}"
            )
    n = _check_n_draws(n_draws)
    gen = _generator(rng)
    names = list(inputs)
    # One child generator per input and pass, so adding an input does not reshuffle the others.
    children = gen.spawn(2 * len(names))
    varied = {name: inputs[name].sample(n, children[i]) for i, name in enumerate(names)}
    central = {name: inputs[name].central(n) for name in names}

    def evaluate(values, label):
        total = np.asarray(function(values), dtype=float)
        if total.shape != (n,):
            raise InputError(
                f"`function` must return one total per draw (shape ({n},)); got {total.shape} "
                f"({label})"
            )
        bad = ~(np.isfinite(total) & (total > 0))
        if bad.any():
            raise InputError(
                f"`function` must return finite totals > 0; got {total[bad][0]!r} ({label})"
            )
        return total

    totals = evaluate(varied, "all inputs varying")
    widths = {name: not _is_zero_width(inputs[name]) for name in names}
    components = {}
    for i, name in enumerate(names):
        if not widths[name]:
            continue
        values = dict(central)
        values[name] = inputs[name].sample(n, children[len(names) + i])
        components[name] = evaluate(values, f"only {name!r} varying")
    budget: dict[str, float] = {}
    if components and np.var(np.log10(totals)) > 0:
        shares = budget_from_draws(totals, components)
        budget = {name: shares.get(name, 0.0) for name in names}
    return Estimate.from_draws(totals, unit, budget=budget)


def _is_zero_width(sampler: Any) -> bool:
    if isinstance(sampler, CosmologyDraws):
        return all(v == 0 for v in sampler.sigma.values())
    return sampler.zero_width
