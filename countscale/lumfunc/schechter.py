"""The Schechter family: luminosity functions in absolute magnitude, mass functions per dex.

:class:`Schechter` (with :class:`Evolution` and :meth:`Schechter.at`), :class:`SchechterMass`
and :class:`DoubleSchechterMass` (Baldry et al. 2012, MNRAS 421, 621, eq. 6), all sums of
phi_i t^(alpha_i + 1) e^-t terms in t = L/L* or M/M*, integrated in closed form with the upper
incomplete gamma function.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np
from scipy import special

from countscale._checks import as_output as _out
from countscale._checks import finite_scalar as _finite_scalar
from countscale.errors import InputError, InputTypeError
from countscale.lumfunc.forms import NumberDensityForm, _finite_array
from countscale.lumfunc.gamma import _upper_gamma

__all__ = ["DoubleSchechterMass", "Evolution", "Schechter", "SchechterMass"]

_LN10 = math.log(10.0)


class _SchechterTerms(NumberDensityForm):
    """Sums of phi_i t^(alpha_i + 1) e^-t terms in t = L/L* (or M/M*), t = exp(ln_t(x))."""

    _dlnt_dx: ClassVar[float] = 1.0

    def _terms(self) -> tuple[tuple[float, float], ...]:  # pragma: no cover - abstract
        raise NotImplementedError

    def _ln_t(self, x: np.ndarray) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def _density(self, x: np.ndarray) -> np.ndarray:
        ln_t = self._ln_t(x)
        with np.errstate(over="ignore"):
            t = np.exp(ln_t)
        total = np.zeros(np.shape(x))
        for phi, alpha in self._terms():
            # In logs: avoids inf * 0 far on the bright side, overflow far on the faint side.
            with np.errstate(over="ignore"):
                total = total + np.exp(math.log(phi) + (alpha + 1.0) * ln_t - t)
        return abs(self._dlnt_dx) * total

    def _bright_tail(self, x: np.ndarray) -> np.ndarray:
        with np.errstate(over="ignore", invalid="ignore"):
            t = np.exp(self._ln_t(np.asarray(x, dtype=float)))
        total = np.zeros(np.shape(t))
        for phi, alpha in self._terms():
            total = total + phi * _upper_gamma(alpha + 1.0, t)
        return total

    def _integral(self, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
        """Per term, phi [Gamma(a, t_faint) - Gamma(a, t_bright)], a = alpha + 1; or, where
        a > 0 and both ends lie in the lower half of the distribution, the same integral as
        phi [g(a, t_bright) - g(a, t_faint)] with the lower incomplete gamma g = Gamma(a) P(a, t),
        which avoids subtracting two numbers close to Gamma(a) far on the faint side."""
        bright, faint = (hi, lo) if self._brighter_at_larger_x else (lo, hi)
        with np.errstate(over="ignore", invalid="ignore"):
            t_bright = np.exp(self._ln_t(np.asarray(bright, dtype=float)))
            t_faint = np.exp(self._ln_t(np.asarray(faint, dtype=float)))
        total = np.zeros(np.broadcast(t_bright, t_faint).shape)
        for phi, alpha in self._terms():
            a = alpha + 1.0
            with np.errstate(invalid="ignore"):
                value = _upper_gamma(a, t_faint) - _upper_gamma(a, t_bright)
            if a > 0:
                p_bright = special.gammainc(a, t_bright)
                lower = p_bright < 0.5
                if np.any(lower):
                    from_lower = (p_bright - special.gammainc(a, t_faint)) * special.gamma(a)
                    value = np.where(lower, from_lower, value)
            total = total + phi * value
        return np.where(lo == hi, 0.0, np.maximum(total, 0.0))


def _check_phi_star(name: str, value: Any) -> float:
    phi = _finite_scalar(name, value)
    if phi <= 0:
        raise InputError(f"`{name}` must be > 0 Mpc^-3; got {phi!r}")
    return phi


@dataclass(frozen=True)
class Evolution:
    """Linear-in-redshift evolution of a Schechter luminosity function.

    M*(z) = M*(0) - Q z and phi*(z) = phi*(0) 10^(0.4 P z): the usual Q, P parametrisation
    (as in Lin et al. 1999, ApJ 518, 533; reference from memory). Q > 0: brighter in the
    past; P > 0: more numerous in the past.

    Parameters
    ----------
    Q : float
        Luminosity evolution [mag per unit redshift].
    P : float
        Density evolution [0.4 dex per unit redshift].
    """

    Q: float = 0.0
    P: float = 0.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "Q", _finite_scalar("Q", self.Q))
        object.__setattr__(self, "P", _finite_scalar("P", self.P))


@dataclass(frozen=True)
class Schechter(_SchechterTerms):
    """Schechter (1976, ApJ 203, 297) luminosity function in absolute magnitude.

    Parameters
    ----------
    m_star : float
        Characteristic absolute magnitude M* [mag].
    alpha : float
        Faint-end slope.
    phi_star : float
        Normalisation phi* [Mpc^-3], > 0 (convert h-scaled values with
        :func:`countscale.cosmology.phi_star_from_h_units`).

    Notes
    -----
    phi(M) dM = 0.4 ln10 phi* 10^(0.4 (alpha + 1)(M* - M)) exp(-10^(0.4 (M* - M))) dM
    (Schechter 1976, eq. 2 written per magnitude). With t = L/L* = 10^(0.4 (M* - M)), the
    number density brighter than M is phi* Gamma(alpha + 1, t) and the luminosity density
    brighter than M is phi* L* Gamma(alpha + 2, t).

    Examples
    --------
    >>> lf = Schechter(m_star=-20.5, alpha=-1.1, phi_star=5e-3)
    >>> round(lf.number_density_brighter(-20.5) * 1e3, 4)
    1.0497
    """

    m_star: float
    alpha: float
    phi_star: float

    x_unit: ClassVar[str] = "mag"
    _brighter_at_larger_x: ClassVar[bool] = False
    _dlnt_dx: ClassVar[float] = -0.4 * _LN10

    def __post_init__(self) -> None:
        object.__setattr__(self, "m_star", _finite_scalar("m_star", self.m_star))
        object.__setattr__(self, "alpha", _finite_scalar("alpha", self.alpha))
        object.__setattr__(self, "phi_star", _check_phi_star("phi_star", self.phi_star))

    def _terms(self) -> tuple[tuple[float, float], ...]:
        return ((self.phi_star, self.alpha),)

    def _ln_t(self, x: np.ndarray) -> np.ndarray:
        return 0.4 * _LN10 * (self.m_star - x)

    def number_density_brighter(self, m: Any) -> float | np.ndarray:
        """Number density [Mpc^-3] of sources brighter than absolute magnitude ``m``.

        phi* Gamma(alpha + 1, 10^(0.4 (M* - m))); the same as :meth:`number_density_above`.
        """
        xx = _finite_array("m", m)
        return _out(self._bright_tail(xx), xx.ndim == 0)

    def _luminosity_gamma(self, m_faint: Any) -> float:
        """Gamma(alpha + 2) (all sources) or Gamma(alpha + 2, t(m_faint)) (brighter only)."""
        if m_faint is None:
            if self.alpha <= -2:
                raise InputError(
                    f"`alpha` = {self.alpha!r} <= -2: the total luminosity density diverges; "
                    "give `m_faint`"
                )
            return math.gamma(self.alpha + 2.0)
        limit = _finite_scalar("m_faint", m_faint)
        t = np.exp(self._ln_t(np.array(limit)))
        return float(_upper_gamma(self.alpha + 2.0, t))

    def luminosity_density_lstar_mpc3(self, m_faint: float | None = None) -> float:
        """Luminosity density [L* Mpc^-3]: phi* Gamma(alpha + 2) (Schechter 1976).

        Parameters
        ----------
        m_faint : float, optional
            Count only sources brighter than this absolute magnitude (then phi* Gamma(alpha + 2,
            t), finite for every alpha). ``None``: all sources (needs alpha > -2).
        """
        return self.phi_star * self._luminosity_gamma(m_faint)

    def luminosity_density_lsun_mpc3(self, m_sun: float, m_faint: float | None = None) -> float:
        """Luminosity density [Lsun Mpc^-3] given the Sun's absolute magnitude in the band.

        j = phi* L* Gamma(alpha + 2) with L* / Lsun = 10^(0.4 (M_sun - M*)).
        """
        sun = _finite_scalar("m_sun", m_sun)
        return self.luminosity_density_lstar_mpc3(m_faint) * 10.0 ** (0.4 * (sun - self.m_star))

    def luminosity_density_mag(self, m_faint: float | None = None) -> float:
        """Luminosity density as a magnitude per Mpc^3: M* - 2.5 log10(phi* Gamma(alpha + 2)).

        The absolute magnitude of the light of one Mpc^3 (phi* in Mpc^-3; if phi* is in
        h^3 Mpc^-3 and M* is M* - 5 log h, the result is in mag Mpc^-3 h units as published,
        e.g. Blanton et al. 2003, ApJ 592, 819).
        """
        return self.m_star - 2.5 * math.log10(self.luminosity_density_lstar_mpc3(m_faint))

    def at(self, z: float, evolution: Evolution) -> Schechter:
        """The form at redshift ``z`` under ``evolution`` (M* - Q z, phi* 10^(0.4 P z))."""
        zz = _finite_scalar("z", z)
        if zz < 0:
            raise InputError(f"`z` must be >= 0; got {zz!r}")
        if not isinstance(evolution, Evolution):
            raise InputTypeError(
                f"`evolution` must be an Evolution; got {type(evolution).__name__}"
            )
        return Schechter(
            m_star=self.m_star - evolution.Q * zz,
            alpha=self.alpha,
            phi_star=self.phi_star * 10.0 ** (0.4 * evolution.P * zz),
        )


@dataclass(frozen=True)
class SchechterMass(_SchechterTerms):
    """Schechter stellar-mass function per dex of mass.

    Parameters
    ----------
    log10_mass_star : float
        log10 of the characteristic mass M* [Msun].
    alpha : float
        Low-mass slope.
    phi_star : float
        Normalisation [Mpc^-3], > 0.

    Notes
    -----
    Phi(log M) = ln10 phi* (M/M*)^(alpha + 1) exp(-M/M*) per dex (Baldry et al. 2012, MNRAS
    421, 621, eq. 6 with one term); number density above M: phi* Gamma(alpha + 1, M/M*); mass
    density: M* phi* Gamma(alpha + 2).
    """

    log10_mass_star: float
    alpha: float
    phi_star: float

    x_unit: ClassVar[str] = "dex"
    _brighter_at_larger_x: ClassVar[bool] = True
    _dlnt_dx: ClassVar[float] = _LN10

    def __post_init__(self) -> None:
        object.__setattr__(
            self, "log10_mass_star", _finite_scalar("log10_mass_star", self.log10_mass_star)
        )
        object.__setattr__(self, "alpha", _finite_scalar("alpha", self.alpha))
        object.__setattr__(self, "phi_star", _check_phi_star("phi_star", self.phi_star))

    def _terms(self) -> tuple[tuple[float, float], ...]:
        return ((self.phi_star, self.alpha),)

    def _ln_t(self, x: np.ndarray) -> np.ndarray:
        return _LN10 * (x - self.log10_mass_star)

    def mass_density_msun_mpc3(self, log10_mass_min: float | None = None) -> float:
        """Stellar mass density [Msun Mpc^-3], of all sources or of those above a mass."""
        return _mass_density(self, log10_mass_min)


@dataclass(frozen=True)
class DoubleSchechterMass(_SchechterTerms):
    """Double Schechter stellar-mass function per dex of mass (one M*, two slopes).

    Parameters
    ----------
    log10_mass_star : float
        log10 M* [Msun].
    phi_star_1, alpha_1 : float
        Normalisation [Mpc^-3] (> 0) and slope of the first term.
    phi_star_2, alpha_2 : float
        Normalisation [Mpc^-3] (> 0) and slope of the second term.

    Notes
    -----
    Phi(log M) = ln10 e^(-M/M*) [phi_1 (M/M*)^(alpha_1 + 1) + phi_2 (M/M*)^(alpha_2 + 1)]
    (Baldry et al. 2012, MNRAS 421, 621, eq. 6); mass density
    rho* = M* [phi_1 Gamma(alpha_1 + 2) + phi_2 Gamma(alpha_2 + 2)].
    """

    log10_mass_star: float
    phi_star_1: float
    alpha_1: float
    phi_star_2: float
    alpha_2: float

    x_unit: ClassVar[str] = "dex"
    _brighter_at_larger_x: ClassVar[bool] = True
    _dlnt_dx: ClassVar[float] = _LN10

    def __post_init__(self) -> None:
        object.__setattr__(
            self, "log10_mass_star", _finite_scalar("log10_mass_star", self.log10_mass_star)
        )
        object.__setattr__(self, "phi_star_1", _check_phi_star("phi_star_1", self.phi_star_1))
        object.__setattr__(self, "alpha_1", _finite_scalar("alpha_1", self.alpha_1))
        object.__setattr__(self, "phi_star_2", _check_phi_star("phi_star_2", self.phi_star_2))
        object.__setattr__(self, "alpha_2", _finite_scalar("alpha_2", self.alpha_2))

    def _terms(self) -> tuple[tuple[float, float], ...]:
        return ((self.phi_star_1, self.alpha_1), (self.phi_star_2, self.alpha_2))

    def _ln_t(self, x: np.ndarray) -> np.ndarray:
        return _LN10 * (x - self.log10_mass_star)

    def mass_density_msun_mpc3(self, log10_mass_min: float | None = None) -> float:
        """Stellar mass density [Msun Mpc^-3], of all sources or of those above a mass."""
        return _mass_density(self, log10_mass_min)


def _mass_density(form: _SchechterTerms, log10_mass_min: Any) -> float:
    """M* sum_i phi_i Gamma(alpha_i + 2[, M_min / M*])."""
    mass_star = 10.0**form.log10_mass_star  # type: ignore[attr-defined]
    if log10_mass_min is None:
        total = 0.0
        for phi, alpha in form._terms():
            if alpha <= -2:
                raise InputError(
                    f"`alpha` = {alpha!r} <= -2: the total mass density diverges; "
                    "give `log10_mass_min`"
                )
            total += phi * math.gamma(alpha + 2.0)
        return mass_star * total
    limit = _finite_scalar("log10_mass_min", log10_mass_min)
    t = np.exp(form._ln_t(np.array(limit)))
    return mass_star * sum(
        float(phi * _upper_gamma(alpha + 2.0, t)) for phi, alpha in form._terms()
    )
