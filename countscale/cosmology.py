"""Distances, volumes and the observable universe: a thin layer over ``astropy.cosmology``.

Every distance and volume here is astropy's; this module only chooses the cosmology, checks
inputs, strips units at the boundary (the unit lives in the function's name) and adds the few
quantities astropy does not give directly: the particle horizon (the comoving radius of the
observable universe), its volume, and K-corrections.

Topics
------
Choosing a cosmology
    :func:`get_cosmology`, :func:`available_cosmologies`, :func:`hubble_h`.
Distances [Mpc] and the distance modulus [mag]
    :func:`distance_modulus`, :func:`comoving_distance_mpc`, :func:`luminosity_distance_mpc`,
    :func:`angular_diameter_distance_mpc`.
Volumes [Mpc^3]
    :func:`differential_comoving_volume_mpc3_sr`, :func:`comoving_volume_mpc3`.
Times [Gyr]
    :func:`age_gyr`, :func:`lookback_time_gyr`.
The observable universe
    :func:`particle_horizon_mpc`, :func:`observable_universe_volume_mpc3`, :func:`horizon`,
    :class:`Horizon`.
Magnitudes and K-corrections
    :func:`kcorrection_power_law`, :class:`PowerLawKCorrection`, :class:`TabulatedKCorrection`,
    :class:`PolynomialKCorrection`, :func:`as_kcorrection`, :func:`apparent_magnitude`,
    :func:`absolute_magnitude`.
Published values quoted in h units
    :func:`phi_star_from_h_units`, :func:`m_star_from_h_units`.

Conventions: redshifts are plain floats or arrays (``z >= 0``, finite); a scalar in gives a
Python float out, an array in gives an ndarray of the same shape out. The ``cosmo`` argument of
every function accepts an astropy FLRW instance, the name of one of astropy's realizations
(``"Planck18"``, ...), or ``None`` for Planck 2018 (Planck Collaboration 2020, A&A 641, A6).
Magnitudes follow m = M + DM(z) + K(z).

Examples
--------
>>> from countscale import cosmology
>>> round(cosmology.comoving_distance_mpc(1.0, cosmology.get_cosmology(H0=70, Om0=1.0)), 4)
2508.7765
>>> round(cosmology.horizon().radius_gly, 1)
46.2
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import astropy.units as u
import numpy as np
from astropy import cosmology as _astropy_cosmology
from astropy.cosmology import FLRW, FlatLambdaCDM, LambdaCDM
from scipy import integrate

from countscale._checks import as_output as _out
from countscale._checks import finite_scalar as _finite_scalar
from countscale._checks import first_bad as _first_bad
from countscale._checks import real_array as _real_array
from countscale.errors import InputError, InputTypeError

__all__ = [
    "Horizon",
    "PolynomialKCorrection",
    "PowerLawKCorrection",
    "TabulatedKCorrection",
    "absolute_magnitude",
    "age_gyr",
    "angular_diameter_distance_mpc",
    "apparent_magnitude",
    "as_kcorrection",
    "available_cosmologies",
    "comoving_distance_mpc",
    "comoving_volume_mpc3",
    "differential_comoving_volume_mpc3_sr",
    "distance_modulus",
    "get_cosmology",
    "horizon",
    "hubble_h",
    "kcorrection_power_law",
    "lookback_time_gyr",
    "luminosity_distance_mpc",
    "m_star_from_h_units",
    "observable_universe_volume_mpc3",
    "particle_horizon_mpc",
    "phi_star_from_h_units",
]

DEFAULT_COSMOLOGY = "Planck18"
FULL_SKY_SR = 4.0 * math.pi

# Mpc -> light years, from astropy's constants (IAU 2012 au, Julian year): 3.2616e6 ly per Mpc.
_LY_PER_MPC = float((1.0 * u.Mpc).to(u.lyr).value)

_EXPLICIT_PARAMETERS = ("H0", "Om0", "Ode0", "Tcmb0", "Ob0")


# --------------------------------------------------------------------------------------------
# Input checks shared by the entry points
# --------------------------------------------------------------------------------------------
def _redshift(value: Any, name: str = "z", *, positive: bool = False) -> np.ndarray:
    """Check redshifts: finite and >= 0 (or > 0 where z = 0 has no meaning)."""
    z = _real_array(name, value)
    bad = ~np.isfinite(z) | ((z <= 0) if positive else (z < 0))
    if bad.any():
        rule = "finite and > 0" if positive else "finite and >= 0"
        raise InputError(f"`{name}` must be {rule}; got {_first_bad(z, bad)}")
    return z


def _resolve(cosmo: Any) -> FLRW:
    """``None`` -> Planck18; a name -> that realization; an FLRW instance passes through."""
    if cosmo is None:
        return get_cosmology()
    if isinstance(cosmo, str):
        return get_cosmology(cosmo)
    if isinstance(cosmo, FLRW):
        return cosmo
    raise InputTypeError(
        "`cosmo` must be an astropy FLRW cosmology, a realization name or None; "
        f"got {type(cosmo).__name__}"
    )


# --------------------------------------------------------------------------------------------
# Choosing a cosmology
# --------------------------------------------------------------------------------------------
def available_cosmologies() -> tuple[str, ...]:
    """Names of astropy's built-in realizations (``"Planck18"``, ``"WMAP9"``, ...)."""
    return tuple(_astropy_cosmology.realizations.available)


def get_cosmology(name: str | None = None, **params: float) -> FLRW:
    """A named astropy realization or a Lambda-CDM cosmology from explicit parameters.

    Parameters
    ----------
    name : str, optional
        One of :func:`available_cosmologies` (case-insensitive). ``None`` with no parameters
        gives ``"Planck18"`` (Planck Collaboration 2020, A&A 641, A6, Table 2).
    **params : float
        Explicit parameters instead of a name: ``H0`` [km/s/Mpc] and ``Om0`` (required),
        ``Ode0`` (given: a possibly curved ``LambdaCDM``; omitted: ``FlatLambdaCDM``),
        ``Tcmb0`` [K] (default 0, astropy's default: no radiation), ``Ob0`` (default 0).

    Returns
    -------
    astropy.cosmology.FLRW

    Raises
    ------
    InputError
        Unknown name (with a suggestion), unknown or missing parameter, a value outside its
        range, both a name and parameters, or parameters with no big bang (H(z)^2 <= 0).
    InputTypeError
        A name or parameter of the wrong kind.

    Examples
    --------
    >>> get_cosmology("WMAP9").name
    'WMAP9'
    >>> round(float(get_cosmology(H0=70, Om0=0.3).Ode0), 6)
    0.7
    """
    if params:
        if name is not None:
            raise InputError(
                f"give either `name` or explicit parameters, not both; got name={name!r} "
                f"and {', '.join(sorted(params))}"
            )
        return _cosmology_from_parameters(params)
    if name is None:
        name = DEFAULT_COSMOLOGY
    if not isinstance(name, str):
        raise InputTypeError(f"`name` must be a string naming a cosmology; got {name!r}")
    available = available_cosmologies()
    by_lower = {n.lower(): n for n in available}
    if name.lower() not in by_lower:
        close = difflib.get_close_matches(name.lower(), list(by_lower), n=1, cutoff=0.6)
        hint = f" (did you mean {by_lower[close[0]]!r}?)" if close else ""
        raise InputError(f"`name` must be one of {', '.join(available)}; got {name!r}{hint}")
    return getattr(_astropy_cosmology, by_lower[name.lower()])


def _cosmology_from_parameters(params: Mapping[str, Any]) -> FLRW:
    for key in params:
        if key not in _EXPLICIT_PARAMETERS:
            close = difflib.get_close_matches(key, _EXPLICIT_PARAMETERS, n=1, cutoff=0.5)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise InputError(
                f"unknown cosmology parameter {key!r}; allowed: "
                f"{', '.join(_EXPLICIT_PARAMETERS)}{hint}"
            )
    for key in ("H0", "Om0"):
        if key not in params:
            raise InputError(
                f"`{key}` is required with explicit parameters; got only "
                f"{', '.join(sorted(params))}"
            )
    values = {key: _finite_scalar(key, value) for key, value in params.items()}
    h0, om0 = values["H0"], values["Om0"]
    tcmb0 = values.get("Tcmb0", 0.0)
    ob0 = values.get("Ob0", 0.0)
    if h0 <= 0:
        raise InputError(f"`H0` must be > 0 km/s/Mpc; got {h0!r}")
    if om0 < 0:
        raise InputError(f"`Om0` must be >= 0; got {om0!r}")
    if tcmb0 < 0:
        raise InputError(f"`Tcmb0` must be >= 0 K; got {tcmb0!r}")
    if not 0 <= ob0 <= om0:
        raise InputError(f"`Ob0` must be in [0, Om0 = {om0!r}]; got {ob0!r}")

    label = ", ".join(f"{key}={values[key]:g}" for key in _EXPLICIT_PARAMETERS if key in values)
    if "Ode0" in values:
        cosmo = LambdaCDM(
            H0=h0,
            Om0=om0,
            Ode0=values["Ode0"],
            Tcmb0=tcmb0,
            Ob0=ob0,
            name=f"LambdaCDM({label})",
        )
    else:
        if om0 > 1:
            # Flat with Om0 > 1 means a negative cosmological constant; say so instead.
            raise InputError(
                f"`Om0` must be <= 1 for a flat cosmology (give `Ode0` for a curved one); "
                f"got {om0!r}"
            )
        cosmo = FlatLambdaCDM(H0=h0, Om0=om0, Tcmb0=tcmb0, Ob0=ob0, name=f"FlatLambdaCDM({label})")
    _require_big_bang(cosmo)
    return cosmo


def _require_big_bang(cosmo: FLRW) -> None:
    """Reject parameters for which H(z)^2 <= 0 somewhere (a bounce: no big bang to z = 0)."""
    # Dense in 0 <= z <= 10 where a bounce would first show, then logarithmic to 1e8.
    z = np.concatenate([np.linspace(0.0, 10.0, 4001), np.logspace(1.0, 8.0, 701)])
    with np.errstate(invalid="ignore"):
        e = np.asarray(cosmo.efunc(z), dtype=float)
    bad = ~(np.isfinite(e) & (e > 0))
    if bad.any():
        z_bad = float(z[np.argmax(bad)])
        raise InputError(
            f"`Ode0` = {float(cosmo.Ode0)!r} with `Om0` = {float(cosmo.Om0)!r} gives "
            f"H(z)^2 <= 0 at z = {z_bad:.3g} (no big bang); lower `Ode0`"
        )


def hubble_h(cosmo: Any = None) -> float:
    """h = H0 / (100 km/s/Mpc) of a cosmology (default Planck18: 0.6766)."""
    return float(_resolve(cosmo).H0.to_value(u.km / u.s / u.Mpc)) / 100.0


# --------------------------------------------------------------------------------------------
# Distances, volumes, times (all astropy's)
# --------------------------------------------------------------------------------------------
def distance_modulus(z: Any, cosmo: Any = None) -> float | np.ndarray:
    """Distance modulus DM = 5 log10(D_L / 10 pc) [mag], with m = M + DM + K.

    Parameters
    ----------
    z : float or array_like, shape (...)
        Redshift, finite and > 0 (DM diverges at z = 0).
    cosmo : FLRW, str or None
        Cosmology (default Planck18).

    Returns
    -------
    float or ndarray, shape (...)
    """
    zz = _redshift(z, positive=True)
    return _out(_resolve(cosmo).distmod(zz).to_value(u.mag), zz.ndim == 0)


def comoving_distance_mpc(z: Any, cosmo: Any = None) -> float | np.ndarray:
    """Line-of-sight comoving distance D_C [Mpc] (Hogg 1999, arXiv:astro-ph/9905116, eq. 15)."""
    zz = _redshift(z)
    return _out(_resolve(cosmo).comoving_distance(zz).to_value(u.Mpc), zz.ndim == 0)


def luminosity_distance_mpc(z: Any, cosmo: Any = None) -> float | np.ndarray:
    """Luminosity distance D_L = (1 + z) D_M [Mpc] (Hogg 1999, eq. 21)."""
    zz = _redshift(z)
    return _out(_resolve(cosmo).luminosity_distance(zz).to_value(u.Mpc), zz.ndim == 0)


def angular_diameter_distance_mpc(z: Any, cosmo: Any = None) -> float | np.ndarray:
    """Angular diameter distance D_A = D_M / (1 + z) [Mpc] (Hogg 1999, eq. 18)."""
    zz = _redshift(z)
    return _out(_resolve(cosmo).angular_diameter_distance(zz).to_value(u.Mpc), zz.ndim == 0)


def differential_comoving_volume_mpc3_sr(z: Any, cosmo: Any = None) -> float | np.ndarray:
    """Comoving volume element dV_C / dz / dOmega [Mpc^3 sr^-1].

    Notes
    -----
    dV_C/dz/dOmega = D_H (1 + z)^2 D_A^2 / E(z) (Hogg 1999, arXiv:astro-ph/9905116, eq. 28).
    """
    zz = _redshift(z)
    values = _resolve(cosmo).differential_comoving_volume(zz).to_value(u.Mpc**3 / u.sr)
    return _out(values, zz.ndim == 0)


def comoving_volume_mpc3(
    z_lo: Any, z_hi: Any, area_sr: float = FULL_SKY_SR, cosmo: Any = None
) -> float | np.ndarray:
    """Comoving volume of the shell z_lo < z < z_hi inside a solid angle [Mpc^3].

    Parameters
    ----------
    z_lo, z_hi : float or array_like
        Shell edges (broadcast together), finite, 0 <= z_lo <= z_hi.
    area_sr : float
        Solid angle in (0, 4 pi] sr (default: the whole sky).
    cosmo : FLRW, str or None
        Cosmology (default Planck18).

    Returns
    -------
    float or ndarray
        (area_sr / 4 pi) [V_C(z_hi) - V_C(z_lo)], V_C being astropy's all-sky comoving volume.
    """
    lo = _redshift(z_lo, "z_lo")
    hi = _redshift(z_hi, "z_hi")
    try:
        lo_b, hi_b = np.broadcast_arrays(lo, hi)
    except ValueError:
        raise InputError(
            f"`z_lo` and `z_hi` must broadcast together; got shapes {lo.shape} and {hi.shape}"
        ) from None
    bad = lo_b > hi_b
    if bad.any():
        index = np.argwhere(bad)[0] if bad.ndim else ()
        raise InputError(
            f"`z_lo` must be <= `z_hi`; got z_lo = {float(lo_b[tuple(index)])!r} > "
            f"z_hi = {float(hi_b[tuple(index)])!r}"
        )
    area = _finite_scalar("area_sr", area_sr)
    if not 0 < area <= FULL_SKY_SR * (1 + 1e-12):
        raise InputError(f"`area_sr` must be in (0, 4 pi] sr; got {area!r}")
    c = _resolve(cosmo)
    volume = c.comoving_volume(hi_b).to_value(u.Mpc**3) - c.comoving_volume(lo_b).to_value(u.Mpc**3)
    return _out(volume * (area / FULL_SKY_SR), lo_b.ndim == 0)


def age_gyr(z: Any = 0.0, cosmo: Any = None) -> float | np.ndarray:
    """Age of the universe at redshift z [Gyr] (astropy's ``age``, radiation included)."""
    zz = _redshift(z)
    return _out(_resolve(cosmo).age(zz).to_value(u.Gyr), zz.ndim == 0)


def lookback_time_gyr(z: Any, cosmo: Any = None) -> float | np.ndarray:
    """Lookback time to redshift z [Gyr]."""
    zz = _redshift(z)
    return _out(_resolve(cosmo).lookback_time(zz).to_value(u.Gyr), zz.ndim == 0)


# --------------------------------------------------------------------------------------------
# The observable universe
# --------------------------------------------------------------------------------------------
def _hubble_distance_mpc(c: FLRW) -> float:
    return float(c.hubble_distance.to_value(u.Mpc))


def particle_horizon_mpc(cosmo: Any = None) -> float:
    """Comoving distance to the particle horizon, the radius of the observable universe [Mpc].

    Parameters
    ----------
    cosmo : FLRW, str or None
        Cosmology (default Planck18). Radiation (photons and neutrinos, as astropy models them
        from ``Tcmb0``, ``Neff`` and ``m_nu``) is included when the cosmology has it.

    Returns
    -------
    float
        D_P [Mpc]; for Planck18 about 14.17 Gpc (46.2 Gly).

    Notes
    -----
    D_P = integral_0^1 c da / (a^2 H(a)) = D_H integral_0^1 da / (a^2 E(a)), with E = H/H0
    from astropy (Hogg 1999, arXiv:astro-ph/9905116, eq. 15 taken to z -> infinity). With the
    substitution a = s^2 the integrand becomes 2 / (s^3 E(s^2)), which is finite on [0, 1]
    both with radiation (E ~ sqrt(Or) a^-2: integrand ~ 2 s / sqrt(Or)) and without it
    (E ~ sqrt(Om) a^-3/2: integrand -> 2 / sqrt(Om)), so ordinary quadrature converges to
    machine precision either way. Einstein-de Sitter check: D_P = 2 D_H.
    """
    c = _resolve(cosmo)

    def integrand(s: float) -> float:
        if s <= 0.0:
            return 0.0  # a single point has no weight; the limit is finite (see Notes)
        z = 1.0 / (s * s) - 1.0
        return 2.0 * float(c.inv_efunc(z)) / (s * s * s)

    # Break points where the integrand changes character: radiation-matter equality is near
    # a ~ 3e-4 (s ~ 0.017), matter-Lambda equality near a ~ 0.7 (s ~ 0.85).
    value, _ = integrate.quad(
        integrand, 0.0, 1.0, points=(1e-3, 1e-2, 0.1, 0.5), epsabs=0.0, epsrel=1e-12, limit=500
    )
    if not (math.isfinite(value) and value > 0):
        raise InputError(f"`cosmo` {c.name!r} has no finite particle horizon; got {value!r}")
    return value * _hubble_distance_mpc(c)


def _comoving_volume_within(d_c_mpc: float, c: FLRW) -> float:
    """All-sky comoving volume inside line-of-sight comoving distance D_C [Mpc^3].

    Hogg 1999 eq. 16 (D_M from D_C for curvature Ok0) and eq. 29 (V_C); flat: 4/3 pi D_C^3.
    """
    d_h = _hubble_distance_mpc(c)
    ok = float(c.Ok0)
    if abs(ok) < 1e-12:
        return 4.0 / 3.0 * math.pi * d_c_mpc**3
    sq = math.sqrt(abs(ok))
    x = sq * d_c_mpc / d_h
    d_m = d_h / sq * (math.sinh(x) if ok > 0 else math.sin(x))
    r = d_m / d_h
    if ok > 0:
        shape = r * math.sqrt(1 + ok * r * r) - math.asinh(sq * r) / sq
    else:
        shape = r * math.sqrt(1 + ok * r * r) - math.asin(sq * r) / sq
    return 4.0 * math.pi * d_h**3 / (2.0 * ok) * shape


def observable_universe_volume_mpc3(cosmo: Any = None) -> float:
    """Comoving volume inside the particle horizon [Mpc^3] (4/3 pi D_P^3 when flat).

    Notes
    -----
    For a curved cosmology the volume follows Hogg 1999 (arXiv:astro-ph/9905116) eq. 29 with
    D_M from eq. 16 evaluated at D_C = D_P. A closed universe whose horizon reaches past the
    antipode (sqrt(-Ok0) D_P / D_H > pi / 2) is rejected: its "volume inside" is not a ball.
    """
    c = _resolve(cosmo)
    d_p = particle_horizon_mpc(c)
    ok = float(c.Ok0)
    if ok < -1e-12 and math.sqrt(-ok) * d_p / _hubble_distance_mpc(c) > math.pi / 2:
        raise InputError(
            f"`cosmo` {c.name!r} is closed with Ok0 = {ok!r} and its horizon passes the "
            "equator of the 3-sphere; the volume inside it is not defined here"
        )
    return _comoving_volume_within(d_p, c)


@dataclass(frozen=True)
class Horizon:
    """The observable universe in one cosmology.

    Attributes
    ----------
    radius_mpc : float
        Comoving particle-horizon distance [Mpc].
    radius_gly : float
        The same in billions of light years [Gly].
    volume_mpc3 : float
        Comoving volume inside the horizon [Mpc^3].
    age_gyr : float
        Age of the universe today [Gyr].
    cosmology : str
        Name of the cosmology.
    """

    radius_mpc: float
    radius_gly: float
    volume_mpc3: float
    age_gyr: float
    cosmology: str

    def summary(self) -> str:
        """Three readable lines."""
        return (
            f"observable universe ({self.cosmology}):\n"
            f"  radius {self.radius_mpc / 1e3:.2f} Gpc = {self.radius_gly:.1f} Gly, "
            f"volume {self.volume_mpc3:.3e} Mpc^3\n"
            f"  age {self.age_gyr:.3f} Gyr"
        )


def horizon(cosmo: Any = None) -> Horizon:
    """Radius, volume and age of the observable universe (see :func:`particle_horizon_mpc`)."""
    c = _resolve(cosmo)
    radius = particle_horizon_mpc(c)
    return Horizon(
        radius_mpc=radius,
        radius_gly=radius * _LY_PER_MPC / 1e9,
        volume_mpc3=observable_universe_volume_mpc3(c),
        age_gyr=float(c.age(0).to_value(u.Gyr)),
        cosmology=str(c.name) if c.name else repr(c),
    )


# --------------------------------------------------------------------------------------------
# K-corrections and magnitudes
# --------------------------------------------------------------------------------------------
def kcorrection_power_law(z: Any, beta: float) -> float | np.ndarray:
    """K-correction [mag] of a source with f_nu proportional to nu^beta, same band in and out.

    Parameters
    ----------
    z : float or array_like
        Redshift, finite and >= 0.
    beta : float
        Spectral index of f_nu (beta = 0: flat in f_nu, constant AB colour).

    Returns
    -------
    float or ndarray
        K(z) = -2.5 (1 + beta) log10(1 + z), for m = M + DM + K.

    Notes
    -----
    Hogg et al. 2002 (arXiv:astro-ph/0210394), eq. 13 with L_nu proportional to nu^beta:
    the ratio L_nu((1+z) nu) / L_nu(nu) = (1+z)^beta, times the bandwidth factor (1+z).
    A source flat in f_nu looks brighter than its distance modulus alone says (K < 0).
    """
    b = _finite_scalar("beta", beta)
    zz = _redshift(z)
    return _out(-2.5 * (1.0 + b) * np.log10(1.0 + zz), zz.ndim == 0)


@dataclass(frozen=True)
class PowerLawKCorrection:
    """K(z) for f_nu proportional to nu^beta; call it with z. See :func:`kcorrection_power_law`."""

    beta: float

    def __post_init__(self) -> None:
        object.__setattr__(self, "beta", _finite_scalar("beta", self.beta))

    def __call__(self, z: Any) -> float | np.ndarray:
        return kcorrection_power_law(z, self.beta)


@dataclass(frozen=True, eq=False)
class TabulatedKCorrection:
    """K(z) interpolated linearly in a table; call it with z. No extrapolation.

    Parameters
    ----------
    z : array_like, shape (n,)
        Strictly increasing redshifts, finite, >= 0, n >= 2.
    k : array_like, shape (n,)
        K-correction at each redshift [mag], finite.
    """

    z: np.ndarray
    k: np.ndarray

    def __post_init__(self) -> None:
        z = _real_array("z", self.z)
        k = _real_array("k", self.k)
        if z.ndim != 1 or z.size < 2:
            raise InputError(f"`z` of a K-correction table must be 1-D with >= 2 rows; got {z!r}")
        if k.shape != z.shape:
            raise InputError(
                f"`k` must have the same length as `z` ({z.size}); got shape {k.shape}"
            )
        _redshift(z, "z")
        if not np.all(np.diff(z) > 0):
            i = int(np.argmax(np.diff(z) <= 0))
            raise InputError(
                f"`z` of a K-correction table must be strictly increasing; got {float(z[i])!r} "
                f"then {float(z[i + 1])!r} (at index {i + 1})"
            )
        bad = ~np.isfinite(k)
        if bad.any():
            raise InputError(f"`k` must be finite; got {_first_bad(k, bad)}")
        z.setflags(write=False)
        k.setflags(write=False)
        object.__setattr__(self, "z", z)
        object.__setattr__(self, "k", k)

    def __call__(self, z: Any) -> float | np.ndarray:
        zz = _redshift(z)
        lo, hi = float(self.z[0]), float(self.z[-1])
        outside = (zz < lo) | (zz > hi)
        if outside.any():
            raise InputError(
                f"`z` must be inside the K-correction table's range [{lo!r}, {hi!r}] (no "
                f"extrapolation); got {_first_bad(zz, outside)}"
            )
        return _out(np.interp(zz, self.z, self.k), zz.ndim == 0)

    def __repr__(self) -> str:
        return (
            f"TabulatedKCorrection(n={self.z.size}, z=[{self.z[0]:g}, {self.z[-1]:g}], "
            f"k=[{self.k.min():g}, {self.k.max():g}])"
        )


@dataclass(frozen=True)
class PolynomialKCorrection:
    """K(z) = c0 + c1 z + c2 z^2 + ... [mag]; call it with z.

    Parameters
    ----------
    coefficients : sequence of float
        c0, c1, ... (lowest order first), 1 to 10 finite values. K(0) = c0 is allowed to be
        non-zero (a K-correction to a band shifted to z0 > 0 is not zero at z = 0).

    Notes
    -----
    A low-order polynomial is the usual compact fit to K-corrections of a galaxy population
    over a limited redshift range; outside the range it was fitted over it means nothing,
    which is the caller's to respect (a fitter checks the redshift range it is given).
    """

    coefficients: tuple[float, ...]

    def __post_init__(self) -> None:
        raw = self.coefficients
        if isinstance(raw, str | bytes) or not hasattr(raw, "__len__"):
            raise InputTypeError(
                f"`coefficients` must be a list of numbers (c0, c1, ...); got {raw!r}"
            )
        values = _real_array("coefficients", list(raw))
        if values.ndim != 1 or not 1 <= values.size <= 10:
            raise InputError(
                f"`coefficients` must hold 1 to 10 numbers (c0, c1, ...); got {len(raw)}"
            )
        bad = ~np.isfinite(values)
        if bad.any():
            raise InputError(f"`coefficients` must be finite; got {_first_bad(values, bad)}")
        object.__setattr__(self, "coefficients", tuple(float(c) for c in values))

    def __call__(self, z: Any) -> float | np.ndarray:
        zz = _redshift(z)
        return _out(np.polynomial.polynomial.polyval(zz, self.coefficients), zz.ndim == 0)


class _CallableKCorrection:
    """A user's function K(z), checked for shape and finiteness on every call."""

    def __init__(self, func: Callable[[np.ndarray], Any]) -> None:
        self.func = func

    def __call__(self, z: Any) -> float | np.ndarray:
        zz = _redshift(z)
        values = np.array(self.func(zz.copy()), dtype=float)
        try:
            values = np.broadcast_to(values, zz.shape).astype(float)
        except ValueError:
            raise InputError(
                f"`kcorrection` must return one value per redshift (shape {zz.shape}); got "
                f"shape {values.shape}"
            ) from None
        bad = ~np.isfinite(values)
        if bad.any():
            raise InputError(
                f"`kcorrection` must return finite values; got {_first_bad(values, bad)}"
            )
        return _out(values, zz.ndim == 0)

    def __repr__(self) -> str:
        return f"CallableKCorrection({getattr(self.func, '__name__', repr(self.func))})"


def _zero_kcorrection(z: Any) -> float | np.ndarray:
    zz = _redshift(z)
    return _out(np.zeros_like(zz), zz.ndim == 0)


_KCORRECTION_FORMS = {
    "power_law": ("beta",),
    "table": ("z", "k"),
    "polynomial": ("coefficients",),
}


def _kcorrection_from_form(spec: Mapping[str, Any]) -> Callable[[Any], float | np.ndarray]:
    form = spec["form"]
    if form not in _KCORRECTION_FORMS:
        close = difflib.get_close_matches(str(form), list(_KCORRECTION_FORMS), n=1, cutoff=0.5)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        raise InputError(
            f"`kcorrection` form must be one of {', '.join(_KCORRECTION_FORMS)}; "
            f"got {form!r}{hint}"
        )
    wanted = set(_KCORRECTION_FORMS[form])
    keys = set(spec) - {"form"}
    if keys != wanted:
        raise InputError(
            f"`kcorrection` with form {form!r} must have the keys {sorted(wanted)} besides "
            f"'form'; got {sorted(keys)}"
        )
    if form == "power_law":
        return PowerLawKCorrection(spec["beta"])
    if form == "table":
        return TabulatedKCorrection(spec["z"], spec["k"])
    return PolynomialKCorrection(spec["coefficients"])


def as_kcorrection(spec: Any) -> Callable[[Any], float | np.ndarray]:
    """Turn a K-correction specification into a function K(z) [mag].

    Parameters
    ----------
    spec : None, callable, mapping, or one of the K-correction classes
        ``None``: no K-correction (K = 0). A callable: used as K(z) (its output is checked).
        A mapping: ``{"beta": b}`` (power law, :func:`kcorrection_power_law`),
        ``{"z": [...], "k": [...]}`` (a table interpolated linearly, no extrapolation), or
        the same with an explicit ``"form"``: ``{"form": "power_law", "beta": b}``,
        ``{"form": "table", "z": [...], "k": [...]}``, ``{"form": "polynomial",
        "coefficients": [c0, c1, ...]}`` (:class:`PolynomialKCorrection`).

    Returns
    -------
    callable
        K(z) taking a scalar or array of redshifts.

    Examples
    --------
    >>> k = as_kcorrection({"form": "polynomial", "coefficients": [0.0, 1.2, -0.3]})
    >>> round(k(0.5), 6)
    0.525
    """
    if spec is None:
        return _zero_kcorrection
    if isinstance(spec, (PowerLawKCorrection, TabulatedKCorrection, PolynomialKCorrection,
                         _CallableKCorrection)):
        return spec
    if isinstance(spec, Mapping):
        keys = set(spec)
        if "form" in keys:
            return _kcorrection_from_form(spec)
        if keys == {"beta"}:
            return PowerLawKCorrection(spec["beta"])
        if keys == {"z", "k"}:
            return TabulatedKCorrection(spec["z"], spec["k"])
        allowed = ["beta", "z", "k", "form", "coefficients"]
        unknown = sorted(keys - set(allowed))
        if unknown:
            close = difflib.get_close_matches(unknown[0], allowed, n=1, cutoff=0.5)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise InputError(
                f"`kcorrection` has unknown key {unknown[0]!r}; give {{'beta'}} or "
                f"{{'z', 'k'}} or {{'form', ...}}{hint}"
            )
        raise InputError(
            f"`kcorrection` must have the keys {{'beta'}} or {{'z', 'k'}} or {{'form', ...}}; "
            f"got {sorted(keys)}"
        )
    if callable(spec):
        return _CallableKCorrection(spec)
    raise InputTypeError(
        f"`kcorrection` must be None, a callable, or a mapping with 'beta', 'z' and 'k', or "
        f"'form'; got {type(spec).__name__}"
    )


def _magnitude_and_redshift(name: str, mag: Any, z: Any) -> tuple[np.ndarray, np.ndarray]:
    m = _real_array(name, mag)
    bad = ~np.isfinite(m)
    if bad.any():
        raise InputError(f"`{name}` must be finite; got {_first_bad(m, bad)}")
    zz = _redshift(z, positive=True)
    try:
        np.broadcast_shapes(m.shape, zz.shape)
    except ValueError:
        raise InputError(
            f"`{name}` and `z` must broadcast together; got shapes {m.shape} and {zz.shape}"
        ) from None
    return m, zz


def apparent_magnitude(
    absolute_mag: Any, z: Any, cosmo: Any = None, kcorrection: Any = None
) -> float | np.ndarray:
    """Apparent magnitude m = M + DM(z) + K(z) [mag].

    Parameters
    ----------
    absolute_mag : float or array_like
        Absolute magnitude M [mag], finite; broadcast against ``z``.
    z : float or array_like
        Redshift, finite and > 0.
    cosmo : FLRW, str or None
        Cosmology (default Planck18).
    kcorrection : see :func:`as_kcorrection`
        ``None`` for K = 0.
    """
    m_abs, zz = _magnitude_and_redshift("absolute_mag", absolute_mag, z)
    k = np.asarray(as_kcorrection(kcorrection)(zz))
    result = m_abs + np.asarray(distance_modulus(zz, cosmo)) + k
    return _out(result, np.ndim(result) == 0)


def absolute_magnitude(
    apparent_mag: Any, z: Any, cosmo: Any = None, kcorrection: Any = None
) -> float | np.ndarray:
    """Absolute magnitude M = m - DM(z) - K(z) [mag]; arguments as :func:`apparent_magnitude`."""
    m_app, zz = _magnitude_and_redshift("apparent_mag", apparent_mag, z)
    k = np.asarray(as_kcorrection(kcorrection)(zz))
    result = m_app - np.asarray(distance_modulus(zz, cosmo)) - k
    return _out(result, np.ndim(result) == 0)


# --------------------------------------------------------------------------------------------
# Published values in h units
# --------------------------------------------------------------------------------------------
def _little_h(h: Any) -> float:
    value = _finite_scalar("h", h)
    # h = H0 / 100 km/s/Mpc; a value like 70 is an H0 passed by mistake: refuse, never guess.
    if not 0 < value <= 2:
        raise InputError(f"`h` = H0 / (100 km/s/Mpc) must be in (0, 2]; got {value!r}")
    return value


def phi_star_from_h_units(phi_star_h3: float, h: float) -> float:
    """Convert a normalisation quoted in h^3 Mpc^-3 to Mpc^-3: phi* = phi*_h3 h^3.

    Parameters
    ----------
    phi_star_h3 : float
        Published phi* [h^3 Mpc^-3], > 0.
    h : float
        H0 / (100 km/s/Mpc) of the cosmology you work in, in (0, 2].
    """
    phi = _finite_scalar("phi_star_h3", phi_star_h3)
    if phi <= 0:
        raise InputError(f"`phi_star_h3` must be > 0 h^3 Mpc^-3; got {phi!r}")
    return phi * _little_h(h) ** 3


def m_star_from_h_units(m_star_minus_5logh: float, h: float) -> float:
    """Convert a characteristic magnitude quoted as M* - 5 log10 h to M*: add 5 log10 h.

    Parameters
    ----------
    m_star_minus_5logh : float
        Published M* - 5 log10 h [mag].
    h : float
        H0 / (100 km/s/Mpc) of the cosmology you work in, in (0, 2].
    """
    m = _finite_scalar("m_star_minus_5logh", m_star_minus_5logh)
    return m + 5.0 * math.log10(_little_h(h))
