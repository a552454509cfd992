"""Luminosity and stellar-mass functions: the Schechter family of forms.

A *form* is a number density of sources per Mpc^3 per unit of an abscissa ``x``: absolute
magnitude [mag] for luminosity functions, log10 of stellar mass in solar masses [dex] for mass
functions. Every form shares one public interface (:class:`NumberDensityForm`), so one test
battery checks them all; a member supplies two private hooks (the density and the number
density on the bright side of ``x``) and which way along ``x`` sources get brighter.

Topics
------
The shared interface
    :class:`NumberDensityForm`: ``density``, ``number_density_above``, ``integrate``,
    ``cumulative`` and ``quantile`` (of the form restricted to ``[lo, hi]``), ``sample``.
Luminosity functions (absolute magnitude)
    :class:`Schechter`, with :class:`Evolution` and :meth:`Schechter.at`.
Stellar-mass functions (log10 mass, per dex)
    :class:`SchechterMass`, :class:`DoubleSchechterMass`.
Special function
    :func:`upper_incomplete_gamma` for every real ``a`` (scipy's ``gammaincc`` needs a > 0).

The estimators that fit these forms to catalogues (1/Vmax, STY, SWML) are not in this module
yet. Published parameters quoted in h units are converted with
:func:`countscale.cosmology.phi_star_from_h_units` and
:func:`countscale.cosmology.m_star_from_h_units`; this module never rescales silently.

Examples
--------
>>> lf = Schechter(m_star=-20.44, alpha=-1.05, phi_star=1.49e-2)
>>> round(lf.luminosity_density_mag(), 3)
-15.907
>>> x = lf.sample(1000, lo=-24.0, hi=-17.0, rng=1)
>>> bool(((x >= -24.0) & (x <= -17.0)).all())
True
"""

from __future__ import annotations

import functools
import math
import numbers
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np
from scipy import special

from countscale._checks import as_generator as _generator
from countscale._checks import as_output as _out
from countscale._checks import finite_scalar as _finite_scalar
from countscale._checks import first_bad as _first_bad
from countscale._checks import real_array as _real_array
from countscale._checks import real_scalar as _real_scalar
from countscale.errors import InputError, InputTypeError

__all__ = [
    "DoubleSchechterMass",
    "Evolution",
    "NumberDensityForm",
    "Schechter",
    "SchechterMass",
    "upper_incomplete_gamma",
]

_LN10 = math.log(10.0)

# Sampling tables: nodes on a uniform grid in x and a guide table in the probability u.
# 2**14 bins keep the cubic-Hermite error of the tabulated CDF near 1e-14 for Schechter forms
# over tens of magnitudes; 2**18 guide cells leave at most 2**14 / 2**18 = 6 % of the draws
# needing a binary search. A table takes ~2 MB; the last 16 are cached.
_N_NODES = 2**14 + 1
_N_GUIDE = 2**18
_CHUNK = 2**20
# Probability below which a tail of the range is cut from the sampling table: far below the
# 2**-53 resolution of a uniform double, so no draw can land there.
_TAIL_EPS = 1e-18


# --------------------------------------------------------------------------------------------
# Input checks
# --------------------------------------------------------------------------------------------
def _finite_array(name: str, value: Any) -> np.ndarray:
    arr = _real_array(name, value)
    bad = ~np.isfinite(arr)
    if bad.any():
        raise InputError(f"`{name}` must be finite; got {_first_bad(arr, bad)}")
    return arr


# --------------------------------------------------------------------------------------------
# The upper incomplete gamma function for every real a
# --------------------------------------------------------------------------------------------
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


# --------------------------------------------------------------------------------------------
# The shared interface
# --------------------------------------------------------------------------------------------
class NumberDensityForm:
    """Base class of the luminosity- and mass-function forms.

    A form is a number density per Mpc^3 per unit of ``x`` (``x_unit``: ``"mag"`` for absolute
    magnitude, ``"dex"`` for log10 stellar mass in Msun). Members implement two hooks:

    ``_density(x)``
        Number density per Mpc^3 per unit x at finite ``x`` (ndarray in, ndarray out).
    ``_bright_tail(x)``
        Number density per Mpc^3 of sources brighter (magnitude forms) or more massive (mass
        forms) than ``x``; ``x`` may be +-inf; finite for finite ``x``.

    and set ``_brighter_at_larger_x`` (False for magnitudes, True for log mass). Everything else
    (integrals, the restricted CDF, its inverse and sampling) is generic; a member may also
    override ``_integral(lo, hi)`` where a closed form is more precise than a difference of
    tails (the Schechter family does, far on the faint side).
    """

    x_unit: ClassVar[str] = ""
    _brighter_at_larger_x: ClassVar[bool] = False

    # ---- hooks --------------------------------------------------------------------------
    def _density(self, x: np.ndarray) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def _bright_tail(self, x: np.ndarray) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    # ---- public -------------------------------------------------------------------------
    def density(self, x: Any) -> float | np.ndarray:
        """Differential number density [Mpc^-3 per unit x].

        Parameters
        ----------
        x : float or array_like, shape (...)
            Absolute magnitude [mag] or log10 stellar mass [dex]; finite.

        Returns
        -------
        float or ndarray, shape (...)
        """
        xx = _finite_array("x", x)
        return _out(self._density(xx), xx.ndim == 0)

    def number_density_above(self, limit: Any) -> float | np.ndarray:
        """Number density [Mpc^-3] of sources above a luminosity or mass limit.

        Parameters
        ----------
        limit : float or array_like
            For magnitude forms the sources counted are *brighter* than ``limit`` (M < limit);
            for mass forms, *more massive* (log10 M > limit). Finite.

        Returns
        -------
        float or ndarray
        """
        xx = _finite_array("limit", limit)
        return _out(self._bright_tail(xx), xx.ndim == 0)

    def integrate(self, lo: Any, hi: Any) -> float | np.ndarray:
        """Number density [Mpc^-3] with lo < x < hi (arrays broadcast).

        ``lo``/``hi`` may be infinite; the result is ``inf`` when the faint end diverges.
        """
        lo_a, hi_a = self._bounds(lo, hi)
        return _out(self._integral(lo_a, hi_a), lo_a.ndim == 0)

    def cumulative(self, x: Any, lo: float, hi: float) -> float | np.ndarray:
        """CDF of x for the form restricted to [lo, hi]: the fraction of sources with x' <= x.

        Parameters
        ----------
        x : float or array_like
            Points (values outside [lo, hi] give 0 or 1).
        lo, hi : float
            The range, lo < hi; the faint side must be finite, the bright side may be infinite.

        Returns
        -------
        float or ndarray in [0, 1]
        """
        lo_f, hi_f, norm = self._restricted(lo, hi)
        xx = _real_array("x", x)
        if np.isnan(xx).any():
            raise InputError(f"`x` must not be NaN; got {_first_bad(xx, np.isnan(xx))}")
        clipped = np.clip(xx, lo_f, hi_f)
        fraction = self._integral(np.full_like(clipped, lo_f), clipped) / norm
        return _out(np.clip(fraction, 0.0, 1.0), xx.ndim == 0)

    def quantile(self, u: Any, lo: float, hi: float) -> float | np.ndarray:
        """Inverse of :meth:`cumulative`: x with cumulative(x, lo, hi) = u.

        Parameters
        ----------
        u : float or array_like
            Probabilities in [0, 1].
        lo, hi : float
            As for :meth:`cumulative`.

        Notes
        -----
        The CDF is tabulated from the closed-form tails on 2^14 uniform bins in x (after
        trimming bright and faint ends holding less than 1e-18 of the probability) and, in each
        bin, represented by the cubic Hermite polynomial through the exact CDF values and
        densities at its ends; u is located through a guide table and the cubic is inverted by
        Newton's method. The result agrees with the exact CDF to about 1e-12 in u.
        """
        lo_f, hi_f, _ = self._restricted(lo, hi)
        uu = _real_array("u", u)
        bad = np.isnan(uu) | (uu < 0) | (uu > 1)
        if bad.any():
            raise InputError(f"`u` must be in [0, 1]; got {_first_bad(uu, bad)}")
        table = _inverse_table(self, lo_f, hi_f)
        flat = uu.ravel()
        result = np.empty_like(flat)
        for start in range(0, flat.size, _CHUNK):
            stop = start + _CHUNK
            result[start:stop] = table.invert(flat[start:stop])
        return _out(result.reshape(uu.shape), uu.ndim == 0)

    def sample(self, n: int, lo: float, hi: float, rng: Any) -> np.ndarray:
        """Draw ``n`` values of x from the form restricted to [lo, hi] (inverse CDF).

        Parameters
        ----------
        n : int
            Number of draws, >= 0.
        lo, hi : float
            Range (as for :meth:`cumulative`).
        rng : int, numpy.random.Generator or None
            Seed or generator.

        Returns
        -------
        ndarray, shape (n,)
        """
        if isinstance(n, bool) or not isinstance(n, numbers.Integral):
            raise InputTypeError(f"`n` must be an integer; got {n!r}")
        if n < 0:
            raise InputError(f"`n` must be >= 0; got {int(n)!r}")
        gen = _generator(rng)
        lo_f, hi_f, _ = self._restricted(lo, hi)
        table = _inverse_table(self, lo_f, hi_f)
        u = gen.random(int(n))
        out = np.empty(int(n))
        for start in range(0, out.size, _CHUNK):
            stop = start + _CHUNK
            out[start:stop] = table.invert(u[start:stop])
        return out

    # ---- generic machinery --------------------------------------------------------------
    def _integral(self, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
        """Integral of the density over (lo, hi) from the closed-form bright tails."""
        with np.errstate(invalid="ignore"):
            if self._brighter_at_larger_x:
                value = self._bright_tail(lo) - self._bright_tail(hi)
            else:
                value = self._bright_tail(hi) - self._bright_tail(lo)
        return np.where(lo == hi, 0.0, np.maximum(value, 0.0))

    def _bounds(self, lo: Any, hi: Any) -> tuple[np.ndarray, np.ndarray]:
        lo_a = _real_array("lo", lo)
        hi_a = _real_array("hi", hi)
        for name, arr in (("lo", lo_a), ("hi", hi_a)):
            if np.isnan(arr).any():
                raise InputError(f"`{name}` must not be NaN; got {_first_bad(arr, np.isnan(arr))}")
        try:
            lo_b, hi_b = np.broadcast_arrays(lo_a, hi_a)
        except ValueError:
            raise InputError(
                f"`lo` and `hi` must broadcast together; got shapes {lo_a.shape} and {hi_a.shape}"
            ) from None
        bad = ~(lo_b < hi_b)
        if bad.any():
            index = tuple(np.argwhere(bad)[0]) if bad.ndim else ()
            raise InputError(
                f"`lo` must be < `hi`; got lo = {float(lo_b[index])!r}, hi = {float(hi_b[index])!r}"
            )
        return lo_b, hi_b

    def _restricted(self, lo: Any, hi: Any) -> tuple[float, float, float]:
        """Check a sampling range: scalars, lo < hi, faint side finite, non-empty."""
        lo_f = _real_scalar("lo", lo)
        hi_f = _real_scalar("hi", hi)
        self._bounds(lo_f, hi_f)
        faint_name, faint = ("lo", lo_f) if self._brighter_at_larger_x else ("hi", hi_f)
        if not math.isfinite(faint):
            raise InputError(
                f"`{faint_name}` is the faint side of the range and must be finite; got {faint!r}"
            )
        norm = float(self._integral(np.array(lo_f), np.array(hi_f)))
        if not math.isfinite(norm):
            raise InputError(
                f"the number density in [lo, hi] = [{lo_f!r}, {hi_f!r}] is not finite; got {norm!r}"
            )
        if norm <= 0:
            raise InputError(
                f"the range [lo, hi] = [{lo_f!r}, {hi_f!r}] holds no sources (the number "
                f"density underflows to 0)"
            )
        return lo_f, hi_f, norm


class _InverseTable:
    """Tabulated CDF of a form on [lo, hi] and its fast inverse (see NumberDensityForm.quantile)."""

    def __init__(self, form: NumberDensityForm, lo: float, hi: float) -> None:
        norm = float(form._integral(np.array(lo), np.array(hi)))

        def below(x: float) -> float:  # probability of x' < x within [lo, hi]
            return float(form._integral(np.array(lo), np.array(x))) / norm if x > lo else 0.0

        def above(x: float) -> float:  # probability of x' > x within [lo, hi]
            return float(form._integral(np.array(x), np.array(hi))) / norm if x < hi else 0.0

        x_lo, x_hi = lo, hi
        # Make an infinite (bright) side finite: step out from the other end until the
        # probability beyond is negligible.
        if not math.isfinite(x_lo):
            step = 1.0
            x_lo = x_hi - step
            while below(x_lo) >= _TAIL_EPS:
                step *= 2.0
                x_lo = x_hi - step
        if not math.isfinite(x_hi):
            step = 1.0
            x_hi = x_lo + step
            while above(x_hi) >= _TAIL_EPS:
                step *= 2.0
                x_hi = x_lo + step
        # Trim ends that hold (almost) nothing, so the nodes sit where the probability is.
        x_lo = _bisect_last(lambda x: below(x) < _TAIL_EPS, x_lo, x_hi)
        x_hi = _bisect_first(lambda x: above(x) < _TAIL_EPS, x_lo, x_hi)

        nodes = np.linspace(x_lo, x_hi, _N_NODES)
        lows = np.full_like(nodes, lo)
        cdf = form._integral(lows, nodes) / norm
        cdf[0] = 0.0 if x_lo == lo else below(x_lo)
        cdf = np.clip(np.maximum.accumulate(cdf), 0.0, 1.0)
        cdf[-1] = 1.0  # the trimmed tail (< 1e-18) is below what a uniform double resolves
        pdf = form._density(nodes) / norm
        h = float(nodes[1] - nodes[0])
        d_cdf = np.diff(cdf)
        m0 = pdf[:-1] * h
        m1 = pdf[1:] * h
        # Cubic Hermite P(s) = F0 + c1 s + c2 s^2 + c3 s^3 on s in [0, 1] per bin; kept as
        # separate contiguous arrays because gathering them is the hot path of sampling.
        self._f0 = np.ascontiguousarray(cdf[:-1])
        self._c1 = m0
        self._c2 = 3.0 * d_cdf - 2.0 * m0 - m1
        self._c3 = m0 + m1 - 2.0 * d_cdf
        # 1 / (F1 - F0) for the linear first guess; d_cdf > 0 in every bin a draw can reach.
        with np.errstate(divide="ignore"):
            self._inv_d_cdf = np.where(d_cdf > 0, 1.0 / d_cdf, 0.0)
        self._nodes = nodes
        self._h = h
        self._cdf = cdf
        guide_u = np.arange(_N_GUIDE + 1) / _N_GUIDE
        self._guide = np.clip(
            np.searchsorted(cdf, guide_u, side="right") - 1, 0, _N_NODES - 2
        ).astype(np.int32)

    def invert(self, u: np.ndarray) -> np.ndarray:
        cell = np.minimum((u * _N_GUIDE).astype(np.int64), _N_GUIDE - 1)
        index = self._guide[cell]
        ambiguous = self._guide[cell + 1] != index
        if ambiguous.any():
            index[ambiguous] = np.clip(
                np.searchsorted(self._cdf, u[ambiguous], side="right") - 1, 0, _N_NODES - 2
            )
        f0 = self._f0[index]
        c1 = self._c1[index]
        c2 = self._c2[index]
        c3 = self._c3[index]
        r = u - f0
        s = r * self._inv_d_cdf[index]  # linear first guess
        # Newton on the cubic: the linear guess is within ~1e-9 in u for Schechter forms and
        # one step reaches the CDF's own precision; the second is a margin.
        for _ in range(2):
            value = s * (c1 + s * (c2 + s * c3)) - r
            slope = c1 + s * (2.0 * c2 + 3.0 * c3 * s)
            np.maximum(slope, 1e-300, out=slope)
            s -= value / slope
        np.clip(s, 0.0, 1.0, out=s)
        x = self._nodes[index] + s * self._h
        # Rounding in node + s h may step an ulp past the last node (the range's edge).
        return np.clip(x, self._nodes[0], self._nodes[-1], out=x)


def _bisect_last(predicate: Any, lo: float, hi: float) -> float:
    """Largest x in [lo, hi] (to ~1e-12 relative) with predicate(x) True, given a monotone
    predicate that is True at the low end; returns lo when predicate(lo) is False."""
    if not predicate(lo):
        return lo
    if predicate(hi):
        return hi
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if mid in (lo, hi):
            break
        if predicate(mid):
            lo = mid
        else:
            hi = mid
    return lo


def _bisect_first(predicate: Any, lo: float, hi: float) -> float:
    """Smallest x in [lo, hi] with predicate(x) True, for a predicate True at the high end."""
    if not predicate(hi):
        return hi
    if predicate(lo):
        return lo
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if mid in (lo, hi):
            break
        if predicate(mid):
            hi = mid
        else:
            lo = mid
    return hi


@functools.lru_cache(maxsize=16)
def _inverse_table(form: NumberDensityForm, lo: float, hi: float) -> _InverseTable:
    return _InverseTable(form, lo, hi)


# --------------------------------------------------------------------------------------------
# The Schechter family
# --------------------------------------------------------------------------------------------
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
