"""The shapes STY fits: a form's parameters without its normalisation.

STY's likelihood is conditional on each galaxy's redshift, so the normalisation phi* cancels
and only the *shape* is fitted; phi* follows from the number of galaxies (see
:mod:`countscale.lumfunc.sty`). A shape maps a free parameter vector ``theta`` to a form with
unit normalisation and back, and gives the log-density fast (in logs, so far tails neither
underflow nor overflow).

=====================  ==========================================  =========================
model                  theta                                       published names
=====================  ==========================================  =========================
``schechter`` (mag)    (m_star, alpha)                             m_star, alpha, phi_star
``schechter`` (mass)   (log10_mass_star, alpha)                    log10_mass_star, alpha,
                                                                   phi_star
``double_schechter``   (log10_mass_star, alpha_1, alpha_2,         log10_mass_star, alpha_1,
                       ln(phi_star_2 / phi_star_1))                phi_star_1, alpha_2,
                                                                   phi_star_2
=====================  ==========================================  =========================
"""

from __future__ import annotations

import math
from typing import Any, ClassVar

import numpy as np

from countscale.errors import InputError
from countscale.lumfunc.schechter import DoubleSchechterMass, Schechter, SchechterMass

__all__ = ["MODELS", "shape_for"]

_LN10 = math.log(10.0)
_C = 0.4 * _LN10  # d ln t / d M for magnitudes (t = L / L*)

MODELS = ("schechter", "double_schechter")


class Shape:
    """One family of forms with its normalisation taken out."""

    names: ClassVar[tuple[str, ...]] = ()
    #: Central-difference steps for the Hessian, one per parameter.
    steps: ClassVar[tuple[float, ...]] = ()
    quantity: ClassVar[str] = ""

    def start(self, x: np.ndarray, w: np.ndarray) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError

    def form(self, theta: np.ndarray, norm: float = 1.0) -> Any:  # pragma: no cover
        raise NotImplementedError

    def log_density(self, theta: np.ndarray, x: np.ndarray) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError

    def valid(self, theta: np.ndarray) -> bool:
        return bool(np.all(np.isfinite(theta)))

    def integral(self, theta: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
        """Integral of the unit-normalised form over [lo, hi] (arrays, lo < hi)."""
        return self.form(theta)._integral(lo, hi)

    def bright_tail(self, theta: np.ndarray, x: np.ndarray) -> np.ndarray:
        return self.form(theta)._bright_tail(x)

    def published(self, theta: np.ndarray, norm: float) -> dict[str, float]:
        """The parameters under their published names, normalisation included."""
        form = self.form(theta, norm)
        return {name: float(getattr(form, name)) for name in self.published_names}

    published_names: ClassVar[tuple[str, ...]] = ()
    #: Name of the normalisation among ``published_names`` (the one fitted by the count).
    norm_name: ClassVar[str] = "phi_star"


class SchechterLuminosity(Shape):
    names = ("m_star", "alpha")
    steps = (0.01, 0.01)
    quantity = "luminosity"
    published_names = ("m_star", "alpha", "phi_star")

    def start(self, x: np.ndarray, w: np.ndarray) -> np.ndarray:
        # The brightest few per cent of a Schechter sample sit about a magnitude above M*.
        return np.array([float(np.quantile(x, 0.05)) + 1.0, -1.0])

    def form(self, theta: np.ndarray, norm: float = 1.0) -> Schechter:
        return Schechter(m_star=float(theta[0]), alpha=float(theta[1]), phi_star=norm)

    def log_density(self, theta: np.ndarray, x: np.ndarray) -> np.ndarray:
        ln_t = _C * (theta[0] - x)
        with np.errstate(over="ignore"):
            return math.log(_C) + (theta[1] + 1.0) * ln_t - np.exp(ln_t)

    def valid(self, theta: np.ndarray) -> bool:
        return bool(np.all(np.isfinite(theta)) and -6.0 < theta[1] < 6.0)


class SchechterStellarMass(Shape):
    names = ("log10_mass_star", "alpha")
    steps = (0.005, 0.01)
    quantity = "stellar_mass"
    published_names = ("log10_mass_star", "alpha", "phi_star")

    def start(self, x: np.ndarray, w: np.ndarray) -> np.ndarray:
        return np.array([float(np.quantile(x, 0.95)) - 0.4, -1.0])

    def form(self, theta: np.ndarray, norm: float = 1.0) -> SchechterMass:
        return SchechterMass(log10_mass_star=float(theta[0]), alpha=float(theta[1]),
                             phi_star=norm)

    def log_density(self, theta: np.ndarray, x: np.ndarray) -> np.ndarray:
        ln_t = _LN10 * (x - theta[0])
        with np.errstate(over="ignore"):
            return math.log(_LN10) + (theta[1] + 1.0) * ln_t - np.exp(ln_t)

    def valid(self, theta: np.ndarray) -> bool:
        return bool(np.all(np.isfinite(theta)) and -6.0 < theta[1] < 6.0)


class DoubleSchechterStellarMass(Shape):
    """Baldry et al. 2012 (MNRAS 421, 621, eq. 6) form; alpha_1 is the shallower slope."""

    names = ("log10_mass_star", "alpha_1", "alpha_2", "ln_phi_ratio")
    steps = (0.005, 0.01, 0.01, 0.02)
    quantity = "stellar_mass"
    published_names = ("log10_mass_star", "alpha_1", "phi_star_1", "alpha_2", "phi_star_2")
    norm_name = "phi_star_1"

    def start(self, x: np.ndarray, w: np.ndarray) -> np.ndarray:
        return np.array([float(np.quantile(x, 0.95)) - 0.3, -0.5, -1.5, math.log(0.2)])

    def form(self, theta: np.ndarray, norm: float = 1.0) -> DoubleSchechterMass:
        return DoubleSchechterMass(
            log10_mass_star=float(theta[0]), phi_star_1=norm, alpha_1=float(theta[1]),
            phi_star_2=norm * math.exp(float(theta[3])), alpha_2=float(theta[2]),
        )

    def log_density(self, theta: np.ndarray, x: np.ndarray) -> np.ndarray:
        ln_t = _LN10 * (x - theta[0])
        a = (theta[1] + 1.0) * ln_t
        b = theta[3] + (theta[2] + 1.0) * ln_t
        with np.errstate(over="ignore"):
            return math.log(_LN10) + np.logaddexp(a, b) - np.exp(ln_t)

    def valid(self, theta: np.ndarray) -> bool:
        return bool(np.all(np.isfinite(theta)) and -6.0 < theta[2] < theta[1] < 6.0
                    and -30.0 < theta[3] < 30.0)


def shape_for(model: str, quantity: str) -> Shape:
    """The shape fitted for a model name and a sample's quantity."""
    if model not in MODELS:
        raise InputError(f"`model` must be one of {', '.join(MODELS)}; got {model!r}")
    if model == "double_schechter":
        if quantity != "stellar_mass":
            raise InputError(
                "`model` 'double_schechter' is a stellar-mass function (Baldry et al. 2012 "
                f"form); got a {quantity} sample"
            )
        return DoubleSchechterStellarMass()
    return SchechterLuminosity() if quantity == "luminosity" else SchechterStellarMass()
