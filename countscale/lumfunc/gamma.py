"""The upper incomplete gamma function Gamma(a, x) for every real order a.

scipy's ``gammaincc`` needs a > 0; Schechter faint-end slopes alpha <= -1 need a = alpha + 1
<= 0. :func:`upper_incomplete_gamma` is the checked public entry; ``_upper_gamma`` is the
unchecked kernel the forms and fitters call in their inner loops.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import special

from countscale._checks import as_output as _out
from countscale._checks import finite_scalar as _finite_scalar
from countscale._checks import first_bad as _first_bad
from countscale._checks import real_array as _real_array
from countscale.errors import InputError

__all__ = ["upper_incomplete_gamma"]


def upper_incomplete_gamma(a: float, x: Any) -> float | np.ndarray:
    """Upper incomplete gamma function Gamma(a, x) = integral_x^inf s^(a-1) e^-s ds, x >= 0.

    Parameters
    ----------
    a : float
        Any real (finite) order; ``a <= 0`` is allowed (it is needed for Schechter faint-end
        slopes alpha <= -1, where a = alpha + 1).
    x : float or array_like
        Lower limit, >= 0 (``inf`` allowed: Gamma(a, inf) = 0).

    Returns
    -------
    float or ndarray
        Gamma(a, x); ``inf`` at x = 0 when a <= 0.

    Notes
    -----
    For a > 0: Gamma(a) Q(a, x) with scipy's regularised ``gammaincc``. For a <= 0 (where
    scipy has no routine): for x >= 1.5, Legendre's continued fraction (DLMF 8.9.2) by the
    modified Lentz method; for x < 1.5, the recurrence Gamma(a, x) = (Gamma(a + 1, x) -
    x^a e^-x) / a (DLMF section 8.8) applied downwards from an order b in (-1/2, 1/2], with
    Gamma(b, x) from scipy (b > 0), E1 (b = 0, DLMF section 8.4) or a power series that stays
    accurate as b -> 0 (b < 0). Starting the recurrence in (-1/2, 1/2] instead of (0, 1]
    keeps every divisor away from zero, so orders at or near 0, -1, -2, ... are as accurate
    as the others (about 1e-13 relative against mpmath).
    """
    order = _finite_scalar("a", a)
    xx = _real_array("x", x)
    bad = np.isnan(xx) | (xx < 0)
    if bad.any():
        raise InputError(f"`x` must be >= 0; got {_first_bad(xx, bad)}")
    return _out(_upper_gamma(order, xx), xx.ndim == 0)


def _upper_gamma(a: float, x: np.ndarray) -> np.ndarray:
    """Gamma(a, x) for validated a (finite) and x (>= 0, may be inf); no checks."""
    x = np.asarray(x, dtype=float)
    if a > 0:
        return special.gammaincc(a, x) * special.gamma(a)
    value = np.empty(x.shape)
    value[x == 0] = np.inf
    value[np.isinf(x)] = 0.0
    large = np.isfinite(x) & (x >= _CF_MIN_X)
    small = (x > 0) & (x < _CF_MIN_X)
    if large.any():
        value[large] = _upper_gamma_continued_fraction(a, x[large])
    if small.any():
        value[small] = _upper_gamma_small_x(a, x[small])
    return value


# For a <= 0: Legendre's continued fraction above this x (it converges for x > a + 1, within
# ~100 terms at x = 1.5), the power series below it (~30 terms suffice for x < 1.5).
_CF_MIN_X = 1.5


def _upper_gamma_small_x(a: float, x: np.ndarray) -> np.ndarray:
    """Gamma(a, x) for a <= 0 and 0 < x < 1.5.

    Write a = b - k with k a non-negative integer and b in (-1/2, 1/2]; get Gamma(b, x) from
    scipy (b > 0), E1 (b = 0) or the series below (b < 0), then apply the recurrence
    Gamma(c - 1, x) = (Gamma(c, x) - x^(c-1) e^-x) / (c - 1) (DLMF section 8.8) k times. Every
    divisor c - 1 has |c - 1| >= 1/2, so orders near 0, -1, -2, ... lose no precision (the
    plain recurrence from an order in (0, 1) would divide by a itself).
    """
    k = max(0, math.ceil(-a - 0.5))
    b = a + k
    if b > 0:
        value = special.gammaincc(b, x) * special.gamma(b)
    elif b == 0:
        value = special.exp1(x)
    else:
        value = _upper_gamma_near_zero_order(b, x)
    log_x = np.log(x)
    order = b
    for _ in range(k):
        order -= 1.0
        value = (value - np.exp(order * log_x - x)) / order
    return value


def _upper_gamma_near_zero_order(b: float, x: np.ndarray) -> np.ndarray:
    """Gamma(b, x) for -1/2 < b < 0 and 0 < x < 1.5, uniformly accurate as b -> 0.

    Gamma(b, x) = Gamma(b) - gamma(b, x) with gamma(b, x) = x^b sum_n (-x)^n / (n! (b + n))
    (DLMF section 8.7). The poles of Gamma(b) and of the n = 0 term cancel; grouped as
    [(Gamma(1 + b) - 1) - (x^b - 1)] / b, each part is computed without cancellation:
    ln Gamma(1 + b) = -gamma_E b + sum_{j>=2} (-1)^j zeta(j) b^j / j (DLMF 5.7.3) and
    x^b - 1 = expm1(b ln x).
    """
    # (Gamma(1 + b) - 1) / b = expm1(L) / b with L = ln Gamma(1 + b); 60 terms: 0.5^60 / 60.
    j = np.arange(2, 62)
    l_over_b = -np.euler_gamma + float(
        np.sum((-1.0) ** j * special.zeta(j.astype(float), 1.0) * b ** (j - 1) / j)
    )
    big_l = b * l_over_b
    gamma_part = math.expm1(big_l) / big_l * l_over_b if big_l != 0 else l_over_b
    log_x = np.log(x)
    power_part = np.expm1(b * log_x) / b
    # sum_{n>=1} (-x)^n / (n! (b + n)); terms fall below 1e-17 of the first by n = 30.
    total = np.zeros_like(x)
    term = np.ones_like(x)
    for n in range(1, 31):
        term = term * (-x) / n
        total += term / (b + n)
    return (gamma_part - power_part) - np.exp(b * log_x) * total


def _upper_gamma_continued_fraction(a: float, x: np.ndarray) -> np.ndarray:
    """Gamma(a, x) = e^-x x^a / (x + 1 - a - 1 (1 - a) / (x + 3 - a - ...)), x > a + 1.

    Legendre's continued fraction (DLMF 8.9.2) evaluated by the modified Lentz method
    (Press et al. 2007, Numerical Recipes 3rd ed., section 6.2), vectorised over x.
    """
    tiny = 1e-300
    b = x + 1.0 - a
    c = np.full_like(x, 1.0 / tiny)
    d = 1.0 / b
    h = d.copy()
    active = np.ones(x.shape, dtype=bool)
    for i in range(1, 500):
        an = -i * (i - a)
        b = b + 2.0
        d = an * d + b
        d = np.where(np.abs(d) < tiny, tiny, d)
        c = b + an / c
        c = np.where(np.abs(c) < tiny, tiny, c)
        d = 1.0 / d
        delta = d * c
        h = np.where(active, h * delta, h)
        active &= np.abs(delta - 1.0) > 1e-16
        if not active.any():
            break
    with np.errstate(under="ignore"):
        return np.exp(a * np.log(x) - x) * h

