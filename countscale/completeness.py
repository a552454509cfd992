"""Detection completeness from injection-recovery tables, depth maps and effective area.

Completeness c(m) is the probability that a source of magnitude m inside the footprint is
detected. It is measured by injecting artificial sources and recording which are recovered.

Contents
--------
Models (vectorised callables m -> completeness in [0, 1], non-increasing in m)
    :class:`LogisticCompleteness` (``m50``, ``width``, optional plateau ``c_max``),
    :class:`FlemingCompleteness` (``m_lim``, ``alpha``; Fleming et al. 1995),
    :class:`MonotoneCompleteness` (non-parametric, pool-adjacent-violators).
    Each has ``m50``, ``m90``, ``width`` and ``magnitude_at(fraction)``.
Injection tables
    :class:`InjectionTable` (from a DataFrame, a CSV file or arrays; validated).
Fitting
    :func:`fit_completeness` / :class:`CompletenessFit` (Bernoulli maximum likelihood, or the
    monotone curve with a bootstrap), :func:`fit_completeness_by_region`.
Helpers
    :func:`pool_adjacent_violators`, :func:`clopper_pearson`, :func:`check_usable`.
Spatially varying depth
    :class:`DepthMap` (per-HEALPix-pixel m50 with a common curve shape),
    :func:`effective_area_deg2` (A_eff(m) over a footprint),
    :func:`region_effective_areas` (A_eff(m) of each jackknife region).
Summaries
    :func:`binned_recovery` (recovered fraction per bin), :func:`completeness_band`.
Warnings and errors
    :class:`CompletenessWarning`, :class:`NotFittedError`, :class:`CompletenessFitError`.

Conventions
-----------
Magnitudes are AB; fainter means larger m, so completeness falls with m. ``m50`` and ``m90`` are
where completeness has fallen to 50 % and 90 % of its bright-end plateau ``c_max`` (``c_max``
is 1 unless a plateau is fitted, so then they are plain 50 % and 90 % points). ``width`` is the
logistic-equivalent width ``(m50 - m90) / ln 9``: the logistic's own width parameter, and a
comparable number for every other model.
"""

from __future__ import annotations

import math
import numbers
import os
import warnings
from collections.abc import Mapping
from dataclasses import dataclass

import healpy as hp
import numpy as np
import pandas as pd
from scipy import optimize, special, stats

from countscale._checks import as_generator as _as_generator
from countscale._checks import as_magnitudes as _as_magnitudes
from countscale._checks import check_real as _check_real
from countscale._checks import numerical_gradient as _numerical_gradient
from countscale._checks import numerical_hessian as _numerical_hessian
from countscale._checks import read_only as _read_only
from countscale.errors import InputError, InputTypeError
from countscale.estimate import Estimate

__all__ = [
    "MIN_INJECTIONS",
    "CompletenessFit",
    "CompletenessFitError",
    "CompletenessModel",
    "CompletenessWarning",
    "DepthMap",
    "FlemingCompleteness",
    "InjectionTable",
    "LogisticCompleteness",
    "MonotoneCompleteness",
    "NotFittedError",
    "RecoveryBins",
    "ShiftedCompleteness",
    "binned_recovery",
    "check_usable",
    "clopper_pearson",
    "completeness_band",
    "effective_area_deg2",
    "fit_completeness",
    "fit_completeness_by_region",
    "pool_adjacent_violators",
    "region_effective_areas",
]

#: Fewest injections a completeness fit accepts: fits to fewer than 20 sources are doubtful
#: (common figure, no source).
MIN_INJECTIONS = 20

#: ln 9: a logistic falls from 90 % to 50 % of its plateau over width * ln 9 (closed form).
LN9 = math.log(9.0)

#: Budget label for uncertainties that come only from the finite number of injections.
_INJECTION_BUDGET = {"injections": 1.0}


class CompletenessWarning(UserWarning):
    """Completeness is low (below 50 %) or undefined where a caller uses it."""


class NotFittedError(InputError, AttributeError):
    """A fit result was read before :meth:`CompletenessFit.fit` was called."""


class CompletenessFitError(RuntimeError):
    """The likelihood fit did not converge or its curvature is not usable."""


# ============================================================================ input helpers
def _log_plateau(log_shape, log_one_minus_shape, c_max):
    """(log c, log(1 - c)) for c = c_max * s, computed without cancellation."""
    if c_max == 1.0:
        return log_shape, log_one_minus_shape
    log_c_max = math.log(c_max)
    # 1 - c_max s = (1 - c_max) + c_max (1 - s): a sum of two non-negative terms.
    return log_c_max + log_shape, np.logaddexp(math.log1p(-c_max), log_c_max + log_one_minus_shape)


# ============================================================================ models
class CompletenessModel:
    """Base class: a non-increasing completeness curve c(m) in [0, 1].

    Subclasses implement ``_completeness(m)`` on a float ndarray and provide ``c_max`` (the
    bright-end plateau), ``m50``, ``m90`` and ``width``; parametric models also implement
    ``_log_shape(m)`` returning ``(log s, log(1 - s))`` with ``s = c / c_max``, which the
    likelihood fit uses for numerical stability far from m50.
    """

    def __call__(self, m):
        """Completeness at magnitudes ``m``.

        Parameters
        ----------
        m : float or array_like of float, any shape
            Magnitudes (AB). Not modified.

        Returns
        -------
        float or ndarray
            Completeness in [0, 1], same shape as ``m``; NaN where ``m`` is NaN.
        """
        array, scalar = _as_magnitudes(m)
        values = np.clip(self._completeness(array), 0.0, 1.0)
        return float(values) if scalar else values

    def log_completeness(self, m):
        """``(log c(m), log(1 - c(m)))``, accurate in both tails.

        Parameters
        ----------
        m : array_like of float
            Magnitudes.

        Returns
        -------
        tuple of ndarray
            Natural logs, same shape as ``m``.
        """
        array, _ = _as_magnitudes(m)
        log_shape, log_one_minus_shape = self._log_shape(array)
        return _log_plateau(log_shape, log_one_minus_shape, self.c_max)

    def _completeness(self, m):
        log_shape, _ = self._log_shape(m)
        return self.c_max * np.exp(log_shape)

    def _log_shape(self, m):
        values = self._completeness(m) / self.c_max
        with np.errstate(divide="ignore"):
            return np.log(values), np.log1p(-values)

    def magnitude_at(self, fraction):
        """Magnitude where completeness has fallen to ``fraction * c_max``.

        The generic version solves c(m) = fraction * c_max with Brent's method on
        [-100, 100] mag; subclasses override it with closed forms where they exist.

        Parameters
        ----------
        fraction : float
            In (0, 1).

        Returns
        -------
        float
            Magnitude (AB).
        """
        fraction = _check_real(fraction, "fraction", 0.0, 1.0, high_open=True)
        target = fraction * self.c_max
        lo, hi = -100.0, 100.0
        f_lo = float(self._completeness(np.array(lo))) - target
        f_hi = float(self._completeness(np.array(hi))) - target
        if not (f_lo > 0.0 > f_hi):
            raise CompletenessFitError(
                f"completeness does not cross {fraction:g} of its plateau between "
                f"{lo:g} and {hi:g} mag"
            )
        return float(
            optimize.brentq(
                lambda x: float(self._completeness(np.array(x))) - target, lo, hi, xtol=1e-12
            )
        )


@dataclass(frozen=True)
class LogisticCompleteness(CompletenessModel):
    """Logistic completeness ``c_max / (1 + exp((m - m50) / width))``.

    Parameters
    ----------
    m50 : float
        Magnitude (AB) where completeness is half the plateau.
    width : float
        Logistic width in magnitudes; > 0.
    c_max : float
        Bright-end plateau, in (0, 1]; 1 unless blending or masking caps recovery.

    Notes
    -----
    The 90 % point has the closed form ``m90 = m50 - width * ln 9`` (solve
    1 / (1 + e^x) = 0.9 for x = -ln 9).

    Examples
    --------
    >>> model = LogisticCompleteness(m50=24.0, width=0.25)
    >>> round(model(24.0), 6)
    0.5
    >>> round(model.m90, 4)
    23.4507
    """

    m50: float
    width: float
    c_max: float = 1.0

    def __post_init__(self):
        object.__setattr__(self, "m50", _check_real(self.m50, "m50"))
        object.__setattr__(self, "width", _check_real(self.width, "width", 0.0))
        object.__setattr__(self, "c_max", _check_real(self.c_max, "c_max", 0.0, 1.0))

    def _log_shape(self, m):
        u = (m - self.m50) / self.width
        return -np.logaddexp(0.0, u), -np.logaddexp(0.0, -u)

    def _completeness(self, m):
        return self.c_max * special.expit(-(m - self.m50) / self.width)

    @property
    def m90(self):
        """Magnitude where completeness is 90 % of the plateau: ``m50 - width ln 9``."""
        return self.m50 - self.width * LN9

    def magnitude_at(self, fraction):
        """Closed form ``m50 + width * ln(1/fraction - 1)``."""
        fraction = _check_real(fraction, "fraction", 0.0, 1.0, high_open=True)
        return self.m50 + self.width * math.log(1.0 / fraction - 1.0)


@dataclass(frozen=True)
class FlemingCompleteness(CompletenessModel):
    """Completeness of Fleming et al. (1995, AJ 109, 1044).

    ``f(m) = c_max / 2 * [1 - alpha (m - m_lim) / sqrt(1 + alpha^2 (m - m_lim)^2)]``.

    Parameters
    ----------
    m_lim : float
        Magnitude (AB) where completeness is half the plateau (so ``m50 == m_lim``).
    alpha : float
        Steepness of the fall-off, per magnitude; > 0.
    c_max : float
        Bright-end plateau in (0, 1]; 1 in the published form.

    Notes
    -----
    Fleming, Kron, Koo, Holland & Schmidt 1995, AJ 109, 1044 (published form with c_max = 1).
    Inverting f = fraction * c_max with y = 1 - 2 fraction gives
    ``m = m_lim + y / (alpha sqrt(1 - y^2))``; in particular ``m90 = m_lim - 4 / (3 alpha)``.
    With alpha = 2, m_lim = 24: f(23) = (1 + 2 / sqrt 5) / 2 = 0.947214, f(25) = 0.052786
    (computed by hand from the form).
    """

    m_lim: float
    alpha: float
    c_max: float = 1.0

    def __post_init__(self):
        object.__setattr__(self, "m_lim", _check_real(self.m_lim, "m_lim"))
        object.__setattr__(self, "alpha", _check_real(self.alpha, "alpha", 0.0))
        object.__setattr__(self, "c_max", _check_real(self.c_max, "c_max", 0.0, 1.0))

    def _log_shape(self, m):
        x = self.alpha * (m - self.m_lim)
        r = np.hypot(1.0, x)
        # s = (r - x) / 2r and 1 - s = (r + x) / 2r; r - x = 1 / (r + x) avoids cancellation
        # for x > 0 (and symmetrically for x < 0).
        with np.errstate(divide="ignore", invalid="ignore"):
            shape = np.where(x >= 0.0, 1.0 / (2.0 * r * (r + np.abs(x))), (r - x) / (2.0 * r))
            one_minus = np.where(x <= 0.0, 1.0 / (2.0 * r * (r + np.abs(x))), (r + x) / (2.0 * r))
            return np.log(shape), np.log(one_minus)

    @property
    def m50(self):
        """Magnitude of half completeness: ``m_lim``."""
        return self.m_lim

    @property
    def m90(self):
        """Magnitude of 90 % of the plateau: ``m_lim - 4 / (3 alpha)``."""
        return self.magnitude_at(0.9)

    @property
    def width(self):
        """Logistic-equivalent width ``(m50 - m90) / ln 9 = 4 / (3 alpha ln 9)``, in mag."""
        return (self.m50 - self.m90) / LN9

    def magnitude_at(self, fraction):
        """Closed form ``m_lim + y / (alpha sqrt(1 - y^2))`` with ``y = 1 - 2 fraction``."""
        fraction = _check_real(fraction, "fraction", 0.0, 1.0, high_open=True)
        y = 1.0 - 2.0 * fraction
        return self.m_lim + y / (self.alpha * math.sqrt(1.0 - y * y))


def pool_adjacent_violators(values, weights=None):
    """Weighted least-squares non-increasing fit (isotonic regression, decreasing).

    Parameters
    ----------
    values : array_like of float, shape (n,)
        Observations in order (here: recovery fractions in order of increasing magnitude).
    weights : array_like of float, shape (n,), optional
        Positive weights (here: numbers of injections); default all 1.

    Returns
    -------
    ndarray of float, shape (n,)
        The non-increasing sequence minimising ``sum(weights * (fit - values)**2)``.

    Notes
    -----
    Pool-adjacent-violators algorithm (Ayer, Brunk, Ewing, Reid & Silverman 1955, Ann. Math.
    Statist. 26, 641; from memory): scan left to right, merging a block into its predecessor
    while the predecessor's weighted mean is below it. Each block's value is its weighted mean.
    """
    y = np.array(values, dtype=float, copy=True)
    if y.ndim != 1 or y.size == 0:
        raise InputError(f"`values` must be a non-empty 1-D array; got shape {y.shape}")
    w = np.ones_like(y) if weights is None else np.array(weights, dtype=float, copy=True)
    if w.shape != y.shape:
        raise InputError(f"`weights` must have the shape of `values` {y.shape}; got {w.shape}")
    if not (np.all(np.isfinite(y)) and np.all(np.isfinite(w)) and np.all(w > 0)):
        raise InputError("`values` must be finite and `weights` finite and > 0")
    # Blocks as parallel stacks: weighted sum, weight, number of elements.
    sums, totals, sizes = [], [], []
    for value, weight in zip(y, w, strict=True):
        sums.append(value * weight)
        totals.append(weight)
        sizes.append(1)
        while len(sums) > 1 and sums[-2] / totals[-2] < sums[-1] / totals[-1]:
            s, t, k = sums.pop(), totals.pop(), sizes.pop()
            sums[-1] += s
            totals[-1] += t
            sizes[-1] += k
    return np.repeat(np.array(sums) / np.array(totals), sizes)


def clopper_pearson(n_recovered, n_injected, confidence=0.68):
    """Exact (Clopper-Pearson) binomial confidence interval for a recovery fraction.

    Parameters
    ----------
    n_recovered : int or array_like of int
        Successes k, 0 <= k <= n.
    n_injected : int or array_like of int
        Trials n >= 1 (broadcast against ``n_recovered``).
    confidence : float
        Confidence level in (0, 1); 0.68 by default (a "1 sigma" interval).

    Returns
    -------
    tuple of ndarray
        ``(lo, hi)`` bounds on the fraction.

    Notes
    -----
    Clopper & Pearson 1934, Biometrika 26, 404: ``lo = B^-1(a/2; k, n - k + 1)`` (0 when
    k = 0) and ``hi = B^-1(1 - a/2; k + 1, n - k)`` (1 when k = n), with a = 1 - confidence and
    B^-1 the beta quantile function.
    """
    confidence = _check_real(confidence, "confidence", 0.0, 1.0, high_open=True)
    k = np.asarray(n_recovered)
    n = np.asarray(n_injected)
    if not (np.issubdtype(k.dtype, np.integer) and np.issubdtype(n.dtype, np.integer)):
        raise InputTypeError("`n_recovered` and `n_injected` must be integers")
    k, n = np.broadcast_arrays(k, n)
    if np.any(n < 1) or np.any(k < 0) or np.any(k > n):
        raise InputError("counts must satisfy 0 <= `n_recovered` <= `n_injected` and n >= 1")
    tail = (1.0 - confidence) / 2.0
    kf, nf = k.astype(float), n.astype(float)
    lo = np.zeros(k.shape)
    hi = np.ones(k.shape)
    has_k = k > 0
    below_n = k < n
    lo[has_k] = stats.beta.ppf(tail, kf[has_k], nf[has_k] - kf[has_k] + 1.0)
    hi[below_n] = stats.beta.ppf(1.0 - tail, kf[below_n] + 1.0, nf[below_n] - kf[below_n])
    return lo, hi


@dataclass(frozen=True, eq=False)
class MonotoneCompleteness(CompletenessModel):
    """Non-parametric non-increasing completeness from pooled injection blocks.

    Build it with :meth:`from_injections`. The curve is linear between block centres and
    constant beyond the first and last blocks.

    Parameters
    ----------
    mag : ndarray of float, shape (n_blocks,)
        Block centres: mean injected magnitude of each pooled block; strictly increasing.
    completeness : ndarray of float, shape (n_blocks,)
        Recovered fraction of each block, in [0, 1]; non-increasing.
    n_injected, n_recovered : ndarray of int, shape (n_blocks,)
        Injections and recoveries in each block.
    mag_lo, mag_hi : ndarray of float, shape (n_blocks,)
        Smallest and largest injected magnitude in each block.
    confidence : float
        Level of the per-block Clopper-Pearson intervals ``interval_lo``, ``interval_hi``.

    Notes
    -----
    ``m50`` and ``m90`` are found by inverse linear interpolation of the curve at 50 % and 90 %
    of the plateau ``c_max`` (the brightest block's fraction).
    """

    mag: np.ndarray
    completeness: np.ndarray
    n_injected: np.ndarray
    n_recovered: np.ndarray
    mag_lo: np.ndarray
    mag_hi: np.ndarray
    confidence: float = 0.68

    def __post_init__(self):
        mag = _read_only(self.mag)
        values = _read_only(self.completeness)
        n_injected = _read_only(self.n_injected, dtype=np.int64)
        n_recovered = _read_only(self.n_recovered, dtype=np.int64)
        mag_lo = _read_only(self.mag_lo)
        mag_hi = _read_only(self.mag_hi)
        shapes = {a.shape for a in (mag, values, n_injected, n_recovered, mag_lo, mag_hi)}
        if len(shapes) != 1 or mag.ndim != 1 or mag.size == 0:
            raise InputError(
                f"monotone curve arrays must be 1-D, non-empty and of one length; got {shapes}"
            )
        if not np.all(np.isfinite(mag)) or np.any(np.diff(mag) <= 0):
            raise InputError("`mag` block centres must be finite and strictly increasing")
        if np.any(values < 0) or np.any(values > 1) or np.any(np.diff(values) > 0):
            raise InputError("`completeness` must lie in [0, 1] and be non-increasing")
        if np.any(n_injected < 1) or np.any(n_recovered < 0) or np.any(n_recovered > n_injected):
            raise InputError("block counts must satisfy 0 <= n_recovered <= n_injected, n >= 1")
        confidence = _check_real(self.confidence, "confidence", 0.0, 1.0, high_open=True)
        for name, value in (
            ("mag", mag),
            ("completeness", values),
            ("n_injected", n_injected),
            ("n_recovered", n_recovered),
            ("mag_lo", mag_lo),
            ("mag_hi", mag_hi),
            ("confidence", confidence),
        ):
            object.__setattr__(self, name, value)

    @classmethod
    def from_injections(cls, mag, recovered, bin_width=None, confidence=0.68):
        """Pool injections into the non-increasing curve that best fits them.

        Parameters
        ----------
        mag : array_like of float, shape (n,)
            Injected magnitudes (AB), finite.
        recovered : array_like of bool or {0, 1}, shape (n,)
            Whether each injection was recovered.
        bin_width : float, optional
            Group injections into bins this wide (mag) before pooling; by default injections
            at identical magnitudes are grouped and nothing else.
        confidence : float
            Level of the per-block Clopper-Pearson intervals.

        Returns
        -------
        MonotoneCompleteness

        Notes
        -----
        Pool-adjacent-violators on the grouped recovery fractions with the group sizes as
        weights (the least-squares isotonic fit, which is also the Bernoulli maximum-likelihood
        non-increasing curve; Ayer et al. 1955, Ann. Math. Statist. 26, 641, from memory).
        """
        mag = np.array(mag, dtype=float, copy=True)
        hit = np.array(recovered, dtype=float, copy=True)
        if mag.ndim != 1 or mag.shape != hit.shape or mag.size == 0:
            raise InputError(
                f"`mag` and `recovered` must be non-empty 1-D arrays of one length; "
                f"got shapes {mag.shape} and {hit.shape}"
            )
        if not np.all(np.isfinite(mag)):
            raise InputError("`mag` must be finite")
        if not np.all((hit == 0) | (hit == 1)):
            raise InputError("`recovered` must be 0 or 1")
        if bin_width is None:
            keys = mag
        else:
            bin_width = _check_real(bin_width, "bin_width", 0.0)
            keys = np.floor((mag - mag.min()) / bin_width)
        order = np.argsort(keys, kind="stable")
        keys, mag, hit = keys[order], mag[order], hit[order]
        _, starts, counts = np.unique(keys, return_index=True, return_counts=True)
        group_n = counts
        group_k = np.add.reduceat(hit, starts)
        group_mag_sum = np.add.reduceat(mag, starts)
        fitted = pool_adjacent_violators(group_k / group_n, group_n)
        # Blocks are runs of equal fitted value (merged groups share their pooled mean exactly).
        block_starts = np.flatnonzero(np.r_[True, fitted[1:] != fitted[:-1]])
        n_block = np.add.reduceat(group_n, block_starts)
        k_block = np.rint(np.add.reduceat(group_k, block_starts)).astype(np.int64)
        mag_block = np.add.reduceat(group_mag_sum, block_starts) / n_block
        ends = np.r_[block_starts[1:], group_n.size] - 1
        injection_starts = starts[block_starts]
        injection_ends = starts[ends] + counts[ends] - 1
        return cls(
            mag=mag_block,
            completeness=k_block / n_block,
            n_injected=n_block,
            n_recovered=k_block,
            mag_lo=mag[injection_starts],
            mag_hi=mag[injection_ends],
            confidence=confidence,
        )

    @property
    def c_max(self):
        """Plateau: the brightest block's recovered fraction."""
        return float(self.completeness[0])

    @property
    def interval_lo(self):
        """Lower Clopper-Pearson bound of each block's fraction at ``confidence``."""
        return clopper_pearson(self.n_recovered, self.n_injected, self.confidence)[0]

    @property
    def interval_hi(self):
        """Upper Clopper-Pearson bound of each block's fraction at ``confidence``."""
        return clopper_pearson(self.n_recovered, self.n_injected, self.confidence)[1]

    def _completeness(self, m):
        return np.interp(m, self.mag, self.completeness)

    def magnitude_at(self, fraction):
        """Inverse linear interpolation of the curve at ``fraction * c_max``.

        Raises
        ------
        InputError
            When the curve stays above that level over all injected magnitudes.
        """
        fraction = _check_real(fraction, "fraction", 0.0, 1.0, high_open=True)
        target = fraction * self.c_max
        above = np.flatnonzero(self.completeness >= target)
        last = int(above[-1])
        if last == self.completeness.size - 1:
            raise InputError(
                f"completeness never falls to {fraction:g} of its plateau ({target:.3g}) within "
                f"the injections (faintest block at {self.mag[-1]:.3f} mag has "
                f"{self.completeness[-1]:.3g}); inject fainter sources"
            )
        c0, c1 = self.completeness[last], self.completeness[last + 1]
        m0, m1 = self.mag[last], self.mag[last + 1]
        return float(m0 + (c0 - target) / (c0 - c1) * (m1 - m0))

    @property
    def m50(self):
        """Magnitude where the curve reaches 50 % of the plateau."""
        return self.magnitude_at(0.5)

    @property
    def m90(self):
        """Magnitude where the curve reaches 90 % of the plateau."""
        return self.magnitude_at(0.9)

    @property
    def width(self):
        """Logistic-equivalent width ``(m50 - m90) / ln 9``, in mag."""
        return (self.m50 - self.m90) / LN9

    def loglike(self):
        """Bernoulli log-likelihood of the injections under the block fractions."""
        k, n, p = self.n_recovered, self.n_injected, self.completeness
        return float(np.sum(special.xlogy(k, p) + special.xlogy(n - k, 1.0 - p)))


# ============================================================================ injection tables
_ROLES = ("mag", "recovered", "ra", "dec", "region")
_REQUIRED_ROLES = ("mag", "recovered")


def _where(position, csv):
    """Human location of a data row: a file line (header is line 1) or a frame row."""
    return f"line {position + 2}" if csv else f"row {position}"


def _numeric_column(frame, column, label, csv):
    series = frame[column]
    if pd.api.types.is_bool_dtype(series.dtype):
        return series.to_numpy(dtype=float)
    try:
        numeric = pd.to_numeric(series, errors="coerce")
    except (TypeError, ValueError):
        numeric = pd.Series(np.nan, index=series.index)
    bad = numeric.isna().to_numpy() & series.notna().to_numpy()
    if bad.any():
        position = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"{label}: column `{column}` must be numeric; got "
            f"{series.iloc[position]!r} at {_where(position, csv)}"
        )
    return numeric.to_numpy(dtype=float, na_value=np.nan)


def _check_finite_column(values, column, label, csv):
    bad = ~np.isfinite(values)
    if bad.any():
        position = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"{label}: column `{column}` must be finite; got {values[position]} at "
            f"{_where(position, csv)} ({int(bad.sum())} non-finite values)"
        )


def _check_curve_constrained(mag, recovered, label):
    """The rules every table (and every region's sub-table) must meet to fit a curve."""
    n = mag.size
    if n < MIN_INJECTIONS:
        raise InputError(
            f"{label} has {n} rows; need at least {MIN_INJECTIONS} to fit a completeness curve"
        )
    n_recovered = int(np.count_nonzero(recovered))
    if n_recovered == 0:
        raise InputError(
            f"{label}: no recovered sources in {n} rows (`recovered` all 0); "
            "the completeness curve is unconstrained"
        )
    if n_recovered == n:
        raise InputError(
            f"{label}: no missed sources in {n} rows (`recovered` all 1); "
            "the completeness curve is unconstrained (inject fainter sources)"
        )


@dataclass(frozen=True, eq=False)
class InjectionTable:
    """A validated injection-recovery table.

    Build it with :meth:`from_dataframe`, :meth:`from_csv` or :meth:`from_arrays`. Every
    construction checks that the magnitudes are numeric and finite, the recovered flags are 0 or
    1, there are at least :data:`MIN_INJECTIONS` rows, and both recovered and missed sources are
    present (otherwise the curve is unconstrained).

    Parameters
    ----------
    mag : ndarray of float, shape (n,)
        Injected magnitudes (AB).
    recovered : ndarray of bool, shape (n,)
        Whether each injection was recovered.
    ra_deg, dec_deg : ndarray of float, shape (n,), optional
        Injection positions in degrees.
    region : ndarray, shape (n,), optional
        Region label of each injection, for per-region fits.
    label : str
        How error messages name this table, e.g. ``"injection table 'inj.csv'"``.
    """

    mag: np.ndarray
    recovered: np.ndarray
    ra_deg: np.ndarray | None = None
    dec_deg: np.ndarray | None = None
    region: np.ndarray | None = None
    label: str = "injection table"

    def __post_init__(self):
        mag = _read_only(self.mag)
        recovered = _read_only(self.recovered, dtype=bool)
        for name in ("recovered", "ra_deg", "dec_deg", "region"):
            value = getattr(self, name)
            if value is not None and np.shape(value) != mag.shape:
                raise InputError(
                    f"{self.label}: `{name}` must have the shape of `mag` {mag.shape}; "
                    f"got {np.shape(value)}"
                )
        _check_curve_constrained(mag, recovered, self.label)
        object.__setattr__(self, "mag", mag)
        object.__setattr__(self, "recovered", recovered)
        for name in ("ra_deg", "dec_deg"):
            value = getattr(self, name)
            if value is not None:
                object.__setattr__(self, name, _read_only(value))
        if self.region is not None:
            region = np.array(self.region, dtype=object, copy=True)
            region.flags.writeable = False
            object.__setattr__(self, "region", region)

    def __len__(self):
        return int(self.mag.size)

    @classmethod
    def from_dataframe(cls, frame, columns=None, label="injection table <DataFrame>"):
        """Validate a DataFrame of injections.

        Parameters
        ----------
        frame : pandas.DataFrame
            One row per injection. Not modified.
        columns : mapping of str to str, optional
            Role to column name for non-default names, roles among ``mag``, ``recovered``,
            ``ra``, ``dec``, ``region``; e.g. ``{"mag": "MAG_IN", "recovered": "FOUND"}``.
            By default the columns are named after the roles; ``ra``, ``dec`` and ``region``
            are optional unless named in ``columns``.
        label : str
            How error messages name the table.

        Returns
        -------
        InjectionTable
        """
        return _table_from_frame(frame, columns, label, csv=False)

    @classmethod
    def from_csv(cls, path, columns=None):
        """Read and validate an injection table from a CSV file (header line required).

        Parameters
        ----------
        path : str or os.PathLike
            CSV file; errors name it and give the file line of an offending value.
        columns : mapping of str to str, optional
            Role to column name, as in :meth:`from_dataframe`.
        """
        if not isinstance(path, (str, os.PathLike)):
            raise InputTypeError(f"`path` must be a file path; got {type(path).__name__}")
        label = f"injection table {os.fspath(path)!r}"
        if not os.path.isfile(path):
            raise InputError(f"{label}: file not found")
        try:
            frame = pd.read_csv(path)
        except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as error:
            first_line = str(error).strip().splitlines()[0] if str(error).strip() else ""
            raise InputError(f"{label}: cannot be read as CSV ({first_line})") from error
        return _table_from_frame(frame, columns, label, csv=True)

    @classmethod
    def from_arrays(cls, mag, recovered, ra_deg=None, dec_deg=None, region=None):
        """Validate injections given as arrays (messages call them "injection arrays").

        Parameters
        ----------
        mag : array_like of float, shape (n,)
            Injected magnitudes.
        recovered : array_like of bool or {0, 1}, shape (n,)
            Recovered flags.
        ra_deg, dec_deg : array_like of float, shape (n,), optional
            Positions in degrees.
        region : array_like, shape (n,), optional
            Region labels.
        """
        data = {"mag": mag, "recovered": recovered}
        for role, value in (("ra", ra_deg), ("dec", dec_deg), ("region", region)):
            if value is not None:
                data[role] = value
        lengths = {}
        for role, value in data.items():
            shape = np.shape(value)
            if len(shape) != 1:
                raise InputError(f"`{role}` must be one-dimensional; got shape {shape}")
            lengths[role] = shape[0]
        if len(set(lengths.values())) > 1:
            raise InputError(f"injection arrays must have one length; got {lengths}")
        frame = pd.DataFrame({role: np.asarray(value) for role, value in data.items()})
        return _table_from_frame(frame, None, "injection arrays", csv=False)

    def region_labels(self):
        """Sorted distinct region labels (sorted by their text)."""
        if self.region is None:
            raise InputError(f"{self.label} has no `region` column; per-region fits need one")
        return sorted(set(self.region.tolist()), key=str)

    def select_region(self, region_label):
        """The sub-table of one region, validated on its own (messages name the region)."""
        labels = self.region_labels()
        if region_label not in labels:
            raise InputError(
                f"{self.label}: region {region_label!r} not found; regions are {labels}"
            )
        keep = self.region == region_label
        return InjectionTable(
            mag=self.mag[keep],
            recovered=self.recovered[keep],
            ra_deg=None if self.ra_deg is None else self.ra_deg[keep],
            dec_deg=None if self.dec_deg is None else self.dec_deg[keep],
            region=self.region[keep],
            label=f"{self.label} region {region_label!r}",
        )


def _table_from_frame(frame, columns, label, csv):
    """Validate a frame's columns and build the table (``csv``: locate rows as file lines)."""
    if not isinstance(frame, pd.DataFrame):
        raise InputTypeError(f"`frame` must be a pandas DataFrame; got {type(frame).__name__}")
    if columns is None:
        columns = {}
    if not isinstance(columns, Mapping):
        raise InputTypeError(f"`columns` must be a mapping; got {type(columns).__name__}")
    for role, name in columns.items():
        if role not in _ROLES:
            raise InputError(f"`columns` key {role!r} is not a role; roles are {', '.join(_ROLES)}")
        if not isinstance(name, str):
            raise InputTypeError(f"`columns[{role!r}]` must be a column name; got {name!r}")
    names = {role: columns.get(role, role) for role in _ROLES}
    present = [str(c) for c in frame.columns]
    for role in _ROLES:
        required = role in _REQUIRED_ROLES or role in columns
        if required and names[role] not in frame.columns:
            raise InputError(
                f"{label}: missing column `{names[role]}` ({role}); columns present: "
                f"{', '.join(present) or 'none'} (map other names with columns={{...}})"
            )
    mag = _numeric_column(frame, names["mag"], label, csv)
    _check_finite_column(mag, names["mag"], label, csv)
    flags = _numeric_column(frame, names["recovered"], label, csv)
    bad = ~((flags == 0.0) | (flags == 1.0))
    if bad.any():
        position = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"{label}: column `{names['recovered']}` must be 0 or 1; got "
            f"{flags[position]:g} at {_where(position, csv)}"
        )
    positions = {}
    for role in ("ra", "dec"):
        if names[role] in frame.columns:
            values = _numeric_column(frame, names[role], label, csv)
            _check_finite_column(values, names[role], label, csv)
            positions[role] = values
    if "dec" in positions:
        out = np.abs(positions["dec"]) > 90.0
        if out.any():
            position = int(np.flatnonzero(out)[0])
            raise InputError(
                f"{label}: column `{names['dec']}` must be in [-90, 90] degrees; got "
                f"{positions['dec'][position]:g} at {_where(position, csv)}"
            )
    if ("ra" in positions) != ("dec" in positions):
        have = "ra" if "ra" in positions else "dec"
        lack = "dec" if have == "ra" else "ra"
        raise InputError(
            f"{label}: column `{names[have]}` ({have}) needs a `{names[lack]}` ({lack}) column"
        )
    region = None
    if names["region"] in frame.columns:
        series = frame[names["region"]]
        missing = series.isna().to_numpy()
        if missing.any():
            position = int(np.flatnonzero(missing)[0])
            raise InputError(
                f"{label}: column `{names['region']}` has {int(missing.sum())} missing "
                f"labels; first at {_where(position, csv)}"
            )
        region = series.to_numpy(dtype=object)
    return InjectionTable(
        mag=mag,
        recovered=flags == 1.0,
        ra_deg=positions.get("ra"),
        dec_deg=positions.get("dec"),
        region=region,
        label=label,
    )


def _as_injection_table(injections):
    if isinstance(injections, InjectionTable):
        return injections
    if isinstance(injections, pd.DataFrame):
        return InjectionTable.from_dataframe(injections)
    if isinstance(injections, (str, os.PathLike)):
        return InjectionTable.from_csv(injections)
    if isinstance(injections, tuple) and len(injections) == 2:
        return InjectionTable.from_arrays(*injections)
    raise InputTypeError(
        "`injections` must be an InjectionTable, a DataFrame, a CSV path or a (mag, recovered) "
        f"pair of arrays; got {type(injections).__name__}"
    )


# ============================================================================ fitting
_MODEL_NAMES = ("logistic", "fleming", "monotone")

#: Internal logit(c_max) range for plateau fits; the upper end is c_max = 1 - 3e-7, beyond which
#: the plateau is treated as 1 (and refitted without it).
_LOGIT_C_MAX_TOP = 15.0


def _build_parametric(kind, theta, plateau):
    """Model from internal parameters (location, log scale[, logit c_max])."""
    c_max = float(special.expit(theta[2])) if plateau else 1.0
    scale = math.exp(min(max(theta[1], -30.0), 30.0))
    if kind == "logistic":
        return LogisticCompleteness(m50=theta[0], width=scale, c_max=c_max)
    return FlemingCompleteness(m_lim=theta[0], alpha=scale, c_max=c_max)


def _negative_loglike(kind, theta, plateau, mag, hit):
    log_c, log_one_minus = _build_parametric(kind, theta, plateau).log_completeness(mag)
    return -float(np.sum(np.where(hit, log_c, log_one_minus)))


class CompletenessFit:
    """Fit a completeness curve to an injection-recovery table (scikit-learn style).

    Parameters
    ----------
    model : {"logistic", "fleming", "monotone"}
        Curve family.
    plateau : bool
        Fit a bright-end plateau ``c_max`` in (0, 1] (parametric models only).
    n_bootstrap : int
        Bootstrap resamples for the monotone model's uncertainties.
    bin_width : float, optional
        Monotone model only: group injections into bins this wide (mag) before pooling.

    Attributes
    ----------
    model_ : CompletenessModel
        The fitted curve (callable).
    params_ : dict of str to float
        Fitted natural parameters: ``m50, width[, c_max]`` (logistic), ``m_lim, alpha
        [, c_max]`` (fleming), ``m50, width, m90, c_max`` (monotone).
    cov_ : ndarray, shape (n_params, n_params)
        Covariance of ``params_`` in its key order (inverse Hessian of the negative
        log-likelihood mapped by the delta method; bootstrap covariance for monotone).
    n_sources_ : int
        Number of injections fitted.
    loglike_ : float
        Bernoulli log-likelihood at the fit.
    m50_, width_, m90_ : Estimate
        Also available as the properties ``m50``, ``width``, ``m90``.

    Notes
    -----
    Parametric models maximise the Bernoulli likelihood
    ``L = prod_i c(m_i)^{r_i} (1 - c(m_i))^{1 - r_i}`` (r_i = 1 if recovered) over
    (location, log scale[, logit c_max]) with Nelder-Mead; the covariance is the inverse of the
    central-difference Hessian of -ln L there. ``m50``, ``width`` and ``m90`` are normal
    Estimates whose sigmas follow from that covariance by the delta method (numerical
    gradients). The monotone model's Estimates come from ``n_bootstrap`` resamples of the
    injections (their medians are bootstrap medians; ``params_`` holds the point values of the
    curve fitted to all injections).
    """

    def __init__(self, model="logistic", plateau=False, n_bootstrap=200, bin_width=None):
        self.model = model
        self.plateau = plateau
        self.n_bootstrap = n_bootstrap
        self.bin_width = bin_width

    # -------------------------------------------------------------- validation
    def _fit_iv(self):
        if self.model not in _MODEL_NAMES:
            raise InputError(
                f"`model` must be one of {', '.join(map(repr, _MODEL_NAMES))}; got {self.model!r}"
            )
        if not isinstance(self.plateau, (bool, np.bool_)):
            raise InputTypeError(f"`plateau` must be True or False; got {self.plateau!r}")
        if self.plateau and self.model == "monotone":
            raise InputError(
                "`plateau` applies to parametric models only; the monotone curve has its own"
            )
        if (
            isinstance(self.n_bootstrap, bool)
            or not isinstance(self.n_bootstrap, numbers.Integral)
            or self.n_bootstrap < 10
        ):
            raise InputError(f"`n_bootstrap` must be an integer >= 10; got {self.n_bootstrap!r}")
        if self.bin_width is not None:
            if self.model != "monotone":
                raise InputError("`bin_width` applies to the monotone model only")
            _check_real(self.bin_width, "bin_width", 0.0)

    # -------------------------------------------------------------- fit
    def fit(self, injections, rng=None):
        """Fit the curve.

        Parameters
        ----------
        injections : InjectionTable, DataFrame, path or (mag, recovered) pair
            The injection-recovery data (validated as by :class:`InjectionTable`).
        rng : int or numpy.random.Generator, optional
            Used by the monotone model's bootstrap only.

        Returns
        -------
        CompletenessFit
            ``self``, fitted.
        """
        self._fit_iv()
        table = _as_injection_table(injections)
        generator = _as_generator(rng)
        if self.model == "monotone":
            self._fit_monotone(table, generator)
        else:
            self._fit_parametric(table)
        self.n_sources_ = len(table)
        return self

    def _fit_parametric(self, table):
        mag, hit = table.mag, table.recovered
        brightest_missed = float(mag[~hit].min())
        faintest_recovered = float(mag[hit].max())
        if faintest_recovered < brightest_missed:
            raise InputError(
                f"{table.label}: recovered and missed sources do not overlap in magnitude "
                f"(all recovered at <= {faintest_recovered:g}, all missed at >= "
                f"{brightest_missed:g}); the curve's width is unconstrained"
            )
        kind = self.model
        span = float(np.ptp(mag))
        # Start from the monotone curve's m50 and width (fallbacks when it does not cross).
        start_curve = MonotoneCompleteness.from_injections(mag, hit)
        try:
            m50_start = start_curve.m50
            width_start = start_curve.width
        except InputError:
            m50_start, width_start = float(np.median(mag)), 0.1 * span
        width_start = min(max(width_start, 1e-3 * span), span)
        if kind == "logistic":
            theta0 = [m50_start, math.log(width_start)]
        else:
            # Fleming width = 4 / (3 alpha ln 9): match the logistic-equivalent width.
            theta0 = [m50_start, math.log(4.0 / (3.0 * LN9 * width_start))]
        plateau = bool(self.plateau)
        if plateau:
            c_start = min(max(start_curve.c_max, 0.05), 0.99)
            theta0.append(math.log(c_start / (1.0 - c_start)))
        theta, plateau = self._minimise(kind, np.array(theta0), plateau, mag, hit, width_start)
        self._finish_parametric(kind, theta, plateau, mag, hit)

    def _minimise(self, kind, theta0, plateau, mag, hit, width_start):
        def objective(theta, plateau=plateau):
            return _negative_loglike(kind, theta, plateau, mag, hit)

        simplex_steps = np.array([width_start, 0.3, 0.5][: theta0.size])
        simplex = np.vstack(
            [theta0] + [theta0 + np.diag(simplex_steps)[i] for i in range(theta0.size)]
        )
        result = optimize.minimize(
            objective,
            theta0,
            method="Nelder-Mead",
            options={
                "initial_simplex": simplex,
                "xatol": 1e-9,
                "fatol": 1e-10,
                "maxiter": 20000,
                "maxfev": 40000,
            },
        )
        if not result.success:
            raise CompletenessFitError(
                f"{kind} completeness fit did not converge: {result.message}"
            )
        theta = result.x
        if plateau and theta[2] > _LOGIT_C_MAX_TOP:
            warnings.warn(
                f"the fitted plateau is c_max = {special.expit(theta[2]):.7f}, "
                "indistinguishable from 1; refitting without a plateau",
                CompletenessWarning,
                stacklevel=2,
            )
            return self._minimise(kind, theta[:2], False, mag, hit, width_start)
        return theta, plateau

    def _finish_parametric(self, kind, theta, plateau, mag, hit):
        def objective(t):
            return _negative_loglike(kind, t, plateau, mag, hit)

        model = _build_parametric(kind, theta, plateau)
        # Steps: a thousandth of the curve's width for the location, 1e-3 in the log/logit
        # parameters (well inside the curvature scale; see tests for the analytic check).
        steps = np.array([1e-3 * model.width, 1e-3, 1e-3][: theta.size])
        hessian = _numerical_hessian(objective, theta, steps)
        try:
            np.linalg.cholesky(hessian)
        except np.linalg.LinAlgError as error:
            raise CompletenessFitError(
                f"{kind} completeness fit: the likelihood's curvature is not positive definite "
                "at the optimum; the injections do not constrain the curve"
            ) from error
        cov_internal = np.linalg.inv(hessian)
        cov_internal = 0.5 * (cov_internal + cov_internal.T)

        # Natural parameters and the Jacobian d(natural)/d(internal) (diagonal).
        scale = math.exp(theta[1])
        if kind == "logistic":
            names = ["m50", "width"]
        else:
            names = ["m_lim", "alpha"]
        values = [float(theta[0]), scale]
        jacobian = [1.0, scale]
        if plateau:
            c_max = float(special.expit(theta[2]))
            names.append("c_max")
            values.append(c_max)
            jacobian.append(c_max * (1.0 - c_max))
        jac = np.diag(jacobian)

        def derived(t, attribute):
            return float(getattr(_build_parametric(kind, t, plateau), attribute))

        estimates = {}
        for attribute in ("m50", "width", "m90"):
            gradient = _numerical_gradient(lambda t, a=attribute: derived(t, a), theta, steps)
            sigma = math.sqrt(max(float(gradient @ cov_internal @ gradient), 0.0))
            estimates[attribute] = Estimate.from_normal(
                derived(theta, attribute), sigma, "mag", budget=_INJECTION_BUDGET
            )
        self.model_ = model
        self.params_ = dict(zip(names, values, strict=True))
        self.cov_ = jac @ cov_internal @ jac.T
        self.loglike_ = -float(objective(theta))
        self.m50_ = estimates["m50"]
        self.width_ = estimates["width"]
        self.m90_ = estimates["m90"]

    def _fit_monotone(self, table, generator):
        mag, hit = table.mag, table.recovered
        model = MonotoneCompleteness.from_injections(mag, hit, bin_width=self.bin_width)
        point = {"m50": model.m50, "width": model.width, "m90": model.m90, "c_max": model.c_max}
        draws = {name: [] for name in point}
        n_failed = 0
        n = mag.size
        for _ in range(self.n_bootstrap):
            pick = generator.integers(0, n, size=n)
            resample = MonotoneCompleteness.from_injections(
                mag[pick], hit[pick], bin_width=self.bin_width
            )
            try:
                values = {
                    "m50": resample.m50,
                    "width": resample.width,
                    "m90": resample.m90,
                    "c_max": resample.c_max,
                }
            except InputError:
                n_failed += 1
                continue
            for name, value in values.items():
                draws[name].append(value)
        n_ok = self.n_bootstrap - n_failed
        if n_ok < 10:
            raise CompletenessFitError(
                f"{table.label}: only {n_ok} of {self.n_bootstrap} bootstrap resamples reach "
                "50 % of the plateau; inject fainter sources"
            )
        if n_failed > 0.05 * self.n_bootstrap:
            warnings.warn(
                f"{n_failed} of {self.n_bootstrap} bootstrap resamples never reach 50 % of the "
                "plateau; the monotone m50 interval is biased bright",
                CompletenessWarning,
                stacklevel=3,
            )
        matrix = np.array([draws[name] for name in point])
        self.model_ = model
        self.params_ = {name: float(value) for name, value in point.items()}
        self.cov_ = np.cov(matrix)
        self.loglike_ = model.loglike()
        self.m50_ = Estimate.from_draws(draws["m50"], "mag", budget=_INJECTION_BUDGET)
        self.width_ = Estimate.from_draws(draws["width"], "mag", budget=_INJECTION_BUDGET)
        self.m90_ = Estimate.from_draws(draws["m90"], "mag", budget=_INJECTION_BUDGET)

    # -------------------------------------------------------------- results
    def _fitted(self, name):
        try:
            return self.__dict__[name]
        except KeyError:
            raise NotFittedError(
                f"this CompletenessFit is not fitted yet; call fit() before reading `{name}`"
            ) from None

    @property
    def m50(self):
        """Estimate of m50 (mag)."""
        return self._fitted("m50_")

    @property
    def width(self):
        """Estimate of the logistic-equivalent width (mag)."""
        return self._fitted("width_")

    @property
    def m90(self):
        """Estimate of m90 (mag)."""
        return self._fitted("m90_")

    def __call__(self, m):
        """The fitted completeness at ``m`` (see :meth:`CompletenessModel.__call__`)."""
        return self._fitted("model_")(m)

    def to_json(self):
        """``{"model", "n_sources", "m50", "width", "m90"}`` with Estimate JSON values."""
        return {
            "model": self.model,
            "n_sources": int(self._fitted("n_sources_")),
            "m50": self.m50.to_json(),
            "width": self.width.to_json(),
            "m90": self.m90.to_json(),
        }

    def __repr__(self):
        state = "fitted" if "model_" in self.__dict__ else "not fitted"
        return f"CompletenessFit(model={self.model!r}, plateau={self.plateau!r}) [{state}]"


def fit_completeness(injections, model="logistic", plateau=False, rng=None, **options):
    """Fit a completeness curve to injections; shorthand for ``CompletenessFit(...).fit(...)``.

    Parameters
    ----------
    injections : InjectionTable, DataFrame, path or (mag, recovered) pair
        Injection-recovery data.
    model : {"logistic", "fleming", "monotone"}
        Curve family.
    plateau : bool
        Fit a bright-end plateau (parametric models).
    rng : int or numpy.random.Generator, optional
        For the monotone model's bootstrap.
    **options
        ``n_bootstrap``, ``bin_width`` (see :class:`CompletenessFit`).

    Returns
    -------
    CompletenessFit

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> mag = rng.uniform(22.0, 26.0, 2000)
    >>> found = rng.random(2000) < LogisticCompleteness(24.0, 0.3)(mag)
    >>> fit = fit_completeness((mag, found))
    >>> abs(fit.m50.median - 24.0) < 0.1
    True
    """
    return CompletenessFit(model=model, plateau=plateau, **options).fit(injections, rng=rng)


def fit_completeness_by_region(injections, model="logistic", plateau=False, rng=None, **options):
    """Fit one curve per region label.

    Parameters
    ----------
    injections : InjectionTable, DataFrame or path
        Must have a ``region`` column; each region's rows are validated on their own.
    model, plateau, **options
        As for :func:`fit_completeness`.
    rng : int or numpy.random.Generator, optional
        Split into one independent stream per region (in sorted label order).

    Returns
    -------
    dict
        Region label -> fitted :class:`CompletenessFit` (its ``model_`` is the curve).
    """
    table = _as_injection_table(injections)
    labels = table.region_labels()
    streams = _as_generator(rng).spawn(len(labels))
    return {
        label: CompletenessFit(model=model, plateau=plateau, **options).fit(
            table.select_region(label), rng=stream
        )
        for label, stream in zip(labels, streams, strict=True)
    }


def check_usable(model, mags, threshold=0.5):
    """Flag magnitudes where completeness is too low to correct for, and warn.

    Parameters
    ----------
    model : callable
        A completeness model or fit (m -> completeness).
    mags : array_like of float
        Magnitudes at which the caller will use the curve.
    threshold : float
        Lowest usable completeness, in (0, 1]; 0.5 by default (below half complete, a result
        leans on the completeness model; common figure, no source).

    Returns
    -------
    ndarray of bool
        True where completeness >= threshold; same shape as ``mags``.

    Warns
    -----
    CompletenessWarning
        When completeness is below ``threshold`` at any of ``mags``.
    """
    if not callable(model):
        raise InputTypeError(f"`model` must be a completeness model; got {type(model).__name__}")
    threshold = _check_real(threshold, "threshold", 0.0, 1.0)
    array, _ = _as_magnitudes(mags, "mags")
    values = np.asarray(model(array), dtype=float)
    usable = values >= threshold
    if not np.all(usable):
        low = ~usable
        brightest = int(np.flatnonzero(low)[np.argmin(array[low])])
        warnings.warn(
            f"completeness is below {threshold:g} at {int(low.sum())} of {usable.size} "
            f"magnitudes (from {array.flat[brightest]:.3f} mag, where it is "
            f"{values.flat[brightest]:.3g}); corrections there are unreliable",
            CompletenessWarning,
            stacklevel=2,
        )
    return usable


# ============================================================================ depth maps
def _as_shape_model(shape):
    if isinstance(shape, CompletenessFit):
        return shape._fitted("model_")
    if not isinstance(shape, CompletenessModel):
        raise InputTypeError(
            f"`shape` must be a completeness model or fit; got {type(shape).__name__}"
        )
    return shape


@dataclass(frozen=True, eq=False)
class DepthMap:
    """Per-HEALPix-pixel m50 with one completeness shape shifted to each pixel's depth.

    Parameters
    ----------
    m50_mag : ndarray of float, shape (12 nside^2,)
        m50 of each pixel (AB mag); NaN or ``healpy.UNSEEN`` where there is no depth data
        (stored as NaN).
    shape : CompletenessModel or CompletenessFit
        The curve shape. Pixel p's completeness is ``shape(m - (m50_mag[p] - shape.m50))``:
        for a global-width logistic pass ``LogisticCompleteness(m50=0, width=w)`` (its m50 is
        irrelevant); a fitted model keeps its fitted form, moved to each pixel's depth.
    nest : bool
        Pixel ordering of ``m50_mag``: NEST if True, RING if False.

    Examples
    --------
    >>> depth = DepthMap(np.full(12, 24.0), LogisticCompleteness(m50=0.0, width=0.3))
    >>> depth.nside
    1
    """

    m50_mag: np.ndarray
    shape: CompletenessModel
    nest: bool = False

    def __post_init__(self):
        try:
            values = np.array(self.m50_mag, dtype=float, copy=True)
        except (TypeError, ValueError) as error:
            raise InputTypeError(
                f"`m50_mag` must be a numeric HEALPix map; got {type(self.m50_mag).__name__}"
            ) from error
        if values.ndim != 1 or not hp.isnpixok(values.size):
            raise InputError(
                f"`m50_mag` must be a HEALPix map of 12 nside^2 pixels; got shape {values.shape}"
            )
        values[hp.mask_bad(values)] = np.nan
        bad = np.isinf(values)
        if bad.any():
            position = int(np.flatnonzero(bad)[0])
            raise InputError(
                f"`m50_mag` must be finite or NaN (no data); got {values[position]} at pixel "
                f"{position}"
            )
        if np.all(np.isnan(values)):
            raise InputError("`m50_mag` has no pixel with depth data (all NaN or UNSEEN)")
        if not isinstance(self.nest, (bool, np.bool_)):
            raise InputTypeError(f"`nest` must be True or False; got {self.nest!r}")
        values.flags.writeable = False
        object.__setattr__(self, "m50_mag", values)
        object.__setattr__(self, "shape", _as_shape_model(self.shape))
        object.__setattr__(self, "nest", bool(self.nest))

    @classmethod
    def from_fits(cls, path, shape, nest=False, field=0):
        """Read a HEALPix m50 map from a FITS file (any ordering; healpy converts).

        Parameters
        ----------
        path : str or os.PathLike
            FITS file holding a HEALPix map of m50 values (AB mag).
        shape : CompletenessModel or CompletenessFit
            Curve shape (see the class docstring).
        nest : bool
            Ordering to hold the map in (healpy reorders from the file's ORDERING).
        field : int
            Column of the map in the FITS table.
        """
        if not isinstance(path, (str, os.PathLike)):
            raise InputTypeError(f"`path` must be a file path; got {type(path).__name__}")
        label = f"depth map {os.fspath(path)!r}"
        if not os.path.isfile(path):
            raise InputError(f"{label}: file not found")
        try:
            values = hp.read_map(path, field=field, nest=bool(nest))
        except (OSError, ValueError, KeyError, IndexError, TypeError) as error:
            text = str(error).strip().splitlines()
            raise InputError(
                f"{label}: cannot be read as a HEALPix map ({text[0] if text else error!r})"
            ) from error
        return cls(m50_mag=np.asarray(values, dtype=float), shape=shape, nest=bool(nest))

    @property
    def nside(self):
        """HEALPix resolution parameter."""
        return int(hp.npix2nside(self.m50_mag.size))

    @property
    def pixel_area_deg2(self):
        """Area of one pixel in deg^2 (Gorski et al. 2005, ApJ 622, 759: pi / (3 nside^2) sr)."""
        return float(hp.nside2pixarea(self.nside, degrees=True))

    def _pixel_completeness(self, m, pixels):
        """Completeness of magnitudes ``m`` at pixels (broadcast); NaN-depth pixels give 0."""
        m50 = self.m50_mag[pixels]
        shifted = m - (m50 - self.shape.m50)
        values = self.shape(np.where(np.isnan(shifted), np.inf, shifted))
        return np.where(np.isnan(m50), 0.0, values)

    def completeness_at(self, m, ra_deg, dec_deg):
        """Completeness of sources of magnitude ``m`` at positions (e.g. one per source).

        Parameters
        ----------
        m : array_like of float
            Magnitudes (AB), broadcast against the positions.
        ra_deg, dec_deg : array_like of float
            Positions in degrees.

        Returns
        -------
        ndarray of float
            Completeness; 0 where the map has no depth data.
        """
        m_array, _ = _as_magnitudes(m)
        ra, _ = _as_magnitudes(ra_deg, "ra_deg")
        dec, _ = _as_magnitudes(dec_deg, "dec_deg")
        if np.any(~np.isfinite(dec)) or np.any(np.abs(dec) > 90.0):
            raise InputError("`dec_deg` must be finite and in [-90, 90] degrees")
        if np.any(~np.isfinite(ra)):
            raise InputError("`ra_deg` must be finite")
        pixels = hp.ang2pix(self.nside, ra, dec, nest=self.nest, lonlat=True)
        return self._pixel_completeness(m_array, pixels)


def _coverage_iv(coverage, depth):
    if hasattr(coverage, "to_healpix"):
        coverage = coverage.to_healpix(depth.nside, nest=depth.nest)
    try:
        values = np.array(coverage, dtype=float, copy=True)
    except (TypeError, ValueError) as error:
        raise InputTypeError(
            f"`coverage` must be a coverage map or a Footprint; got {type(coverage).__name__}"
        ) from error
    if values.shape != depth.m50_mag.shape:
        raise InputError(
            f"`coverage` must have the depth map's {depth.m50_mag.size} pixels (nside "
            f"{depth.nside}); got shape {values.shape}"
        )
    bad = ~np.isfinite(values) | (values < 0.0) | (values > 1.0)
    if bad.any():
        position = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"`coverage` must be fractions in [0, 1]; got {values[position]} at pixel {position}"
        )
    return values


#: Largest (magnitudes x distinct depths) block evaluated at once (memory bound, ~64 MB).
_EFFECTIVE_AREA_BLOCK = 8_000_000


def effective_area_deg2(m, coverage, depth):
    """Effective area A_eff(m) = sum over pixels of area x coverage x completeness.

    Parameters
    ----------
    m : float or array_like of float
        Magnitudes (AB).
    coverage : ndarray of float, shape (12 nside^2,), or Footprint
        Fractional coverage of each pixel of the depth map (same nside and ordering), or a
        Footprint, which is turned into that map with ``to_healpix(depth.nside,
        nest=depth.nest)``.
    depth : DepthMap
        Per-pixel m50 and the curve shape.

    Returns
    -------
    float or ndarray of float
        A_eff in deg^2, same shape as ``m``.

    Warns
    -----
    CompletenessWarning
        When covered pixels have no depth data (they count as completeness 0).

    Notes
    -----
    ``A_eff(m) = sum_p Omega_pix f_p c(m - m50_p + m50_shape)`` with Omega_pix the pixel area
    (Gorski et al. 2005, ApJ 622, 759), f_p the coverage and c the shape. Pixels are grouped by
    distinct m50 first, so piecewise-constant depth maps cost little. A uniform map gives
    ``area x c(m)``.
    """
    if not isinstance(depth, DepthMap):
        raise InputTypeError(f"`depth` must be a DepthMap; got {type(depth).__name__}")
    m_array, scalar = _as_magnitudes(m)
    weights_map = _coverage_iv(coverage, depth)
    has_depth = ~np.isnan(depth.m50_mag)
    lost = (weights_map > 0.0) & ~has_depth
    if lost.any():
        lost_deg2 = float(weights_map[lost].sum()) * depth.pixel_area_deg2
        total_deg2 = float(weights_map.sum()) * depth.pixel_area_deg2
        warnings.warn(
            f"{lost_deg2:.4g} deg^2 of {total_deg2:.4g} deg^2 covered lies in pixels with no "
            "depth data; counted as zero completeness",
            CompletenessWarning,
            stacklevel=2,
        )
    use = (weights_map > 0.0) & has_depth
    shifts, inverse = np.unique(depth.m50_mag[use] - depth.shape.m50, return_inverse=True)
    weights = np.bincount(inverse, weights=weights_map[use], minlength=shifts.size)
    weights *= depth.pixel_area_deg2
    flat_m = m_array.reshape(-1)
    area = np.zeros(flat_m.size)
    if shifts.size:
        chunk = max(1, _EFFECTIVE_AREA_BLOCK // max(1, flat_m.size))
        for start in range(0, shifts.size, chunk):
            part = slice(start, start + chunk)
            values = depth.shape(flat_m[:, None] - shifts[None, part])
            area += values @ weights[part]
    area = area.reshape(m_array.shape)
    return float(area) if scalar else area


# ------------------------------------------------------------------------------------------
# Summaries for reports and per-region effective areas
# ------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class RecoveryBins:
    """Recovered fraction of injections in magnitude bins (for tables and figures).

    Attributes
    ----------
    mag_lo, mag_hi : ndarray
        Bin edges (injected magnitude).
    n_injected, n_recovered : ndarray of int
    fraction : ndarray
        n_recovered / n_injected (NaN for empty bins).
    interval_lo, interval_hi : ndarray
        Clopper-Pearson interval at `confidence`.
    confidence : float
    """

    mag_lo: np.ndarray
    mag_hi: np.ndarray
    n_injected: np.ndarray
    n_recovered: np.ndarray
    fraction: np.ndarray
    interval_lo: np.ndarray
    interval_hi: np.ndarray
    confidence: float

    def to_json(self):
        keep = self.n_injected > 0
        return {
            "mag_lo": self.mag_lo[keep].tolist(),
            "mag_hi": self.mag_hi[keep].tolist(),
            "n_injected": self.n_injected[keep].tolist(),
            "n_recovered": self.n_recovered[keep].tolist(),
            "fraction": self.fraction[keep].tolist(),
            "interval_lo": self.interval_lo[keep].tolist(),
            "interval_hi": self.interval_hi[keep].tolist(),
            "confidence": self.confidence,
        }


def binned_recovery(injections, bin_width=0.25, confidence=0.68):
    """Recovered fraction of injections per magnitude bin with Clopper-Pearson intervals.

    Parameters
    ----------
    injections : InjectionTable, DataFrame, path or (mag, recovered) pair
    bin_width : float
        Bin width in mag; bins start at a multiple of the width.
    confidence : float
        Level of the binomial intervals.
    """
    table = _as_injection_table(injections)
    bin_width = _check_real(bin_width, "bin_width", 0.0)
    lo = math.floor(float(table.mag.min()) / bin_width) * bin_width
    n_bins = max(1, math.ceil((float(table.mag.max()) - lo) / bin_width + 1e-9))
    edges = lo + bin_width * np.arange(n_bins + 1)
    index = np.clip(np.searchsorted(edges, table.mag, side="right") - 1, 0, n_bins - 1)
    n_injected = np.bincount(index, minlength=n_bins)
    n_recovered = np.bincount(index, weights=table.recovered.astype(float), minlength=n_bins)
    n_recovered = n_recovered.astype(np.int64)
    with np.errstate(invalid="ignore", divide="ignore"):
        fraction = np.where(n_injected > 0, n_recovered / np.maximum(n_injected, 1), np.nan)
    interval_lo = np.full(n_bins, np.nan)
    interval_hi = np.full(n_bins, np.nan)
    has = n_injected > 0
    if has.any():
        interval_lo[has], interval_hi[has] = clopper_pearson(
            n_recovered[has], n_injected[has], confidence
        )
    return RecoveryBins(edges[:-1], edges[1:], n_injected, n_recovered, fraction, interval_lo,
                        interval_hi, float(confidence))


def completeness_band(fit, m, level=0.68, n_draws=400, rng=None):
    """Pointwise band of a fitted completeness curve.

    Parametric fits: the `level` quantiles over `n_draws` curves whose parameters are drawn from
    the fit's Gaussian approximation (``params_``, ``cov_``). Monotone fits: the per-block
    Clopper-Pearson intervals, interpolated like the curve.

    Returns
    -------
    lo, hi : ndarray, shape of `m`
    """
    if not isinstance(fit, CompletenessFit):
        raise InputTypeError(f"`fit` must be a CompletenessFit; got {type(fit).__name__}")
    model = fit._fitted("model_")
    m_array, _ = _as_magnitudes(m)
    if isinstance(model, MonotoneCompleteness):
        lo = np.interp(m_array, model.mag, model.interval_lo)
        hi = np.interp(m_array, model.mag, model.interval_hi)
        return lo, hi
    generator = _as_generator(rng)
    names = list(fit.params_)
    mean = np.array([fit.params_[name] for name in names])
    draws = generator.multivariate_normal(mean, fit.cov_, size=int(n_draws))
    curves = []
    for row in draws:
        p = dict(zip(names, row, strict=True))
        c_max = float(np.clip(p.get("c_max", 1.0), 1e-6, 1.0))
        if fit.model == "logistic":
            if p["width"] <= 0:
                continue
            curve = LogisticCompleteness(p["m50"], p["width"], c_max)
        else:
            if p["alpha"] <= 0:
                continue
            curve = FlemingCompleteness(p["m_lim"], p["alpha"], c_max)
        curves.append(curve(m_array))
    tail = (1.0 - float(level)) / 2.0
    lo, hi = np.quantile(np.array(curves), [tail, 1.0 - tail], axis=0)
    return lo, hi


@dataclass(frozen=True, eq=False)
class ShiftedCompleteness:
    """A_eff(m) = sum_j weight_j * shape(m - shift_j): one region's effective area (deg^2)."""

    shape: object
    shifts: np.ndarray
    weights_deg2: np.ndarray

    def __call__(self, m):
        m_array = np.asarray(m, dtype=float)
        flat = m_array.reshape(-1)
        area = np.zeros(flat.size)
        for start in range(0, self.shifts.size, 256):
            part = slice(start, start + 256)
            area += self.shape(flat[:, None] - self.shifts[None, part]) @ self.weights_deg2[part]
        return area.reshape(m_array.shape) if m_array.ndim else float(area[0])


def region_effective_areas(footprint, regions, shape, depth=None):
    """Effective area A_eff_k(m) of each jackknife region, and of the whole footprint.

    Parameters
    ----------
    footprint : countscale.footprint.Footprint
    regions : countscale.footprint.Regions
        Regions made of whole cells of ``regions.order`` (``Footprint.split``).
    shape : CompletenessModel or CompletenessFit
        The completeness curve; with a depth map it is shifted to each cell's m50.
    depth : DepthMap, optional
        Per-pixel m50. Cells finer than the depth map take their pixel's m50; cells in pixels
        without depth data count as completeness 0 (with a warning).

    Returns
    -------
    per_region : list of ShiftedCompleteness, length ``regions.n_regions``
    total : ShiftedCompleteness
        Their sum (it adds up exactly to the regions' total by construction).
    """
    if isinstance(shape, CompletenessFit):
        shape = shape._fitted("model_")
    if not isinstance(shape, CompletenessModel):
        raise InputTypeError(f"`shape` must be a completeness model; got {type(shape).__name__}")
    cells, fraction = footprint.coverage_cells(regions.order)
    position = np.clip(np.searchsorted(regions.cells, cells), 0, len(regions.cells) - 1)
    label = np.where(regions.cells[position] == cells, regions.labels[position], -1)
    area_deg2 = fraction * hp.nside2pixarea(2**regions.order, degrees=True)
    if depth is None:
        shift = np.zeros(len(cells))
    else:
        if not isinstance(depth, DepthMap):
            raise InputTypeError(f"`depth` must be a DepthMap; got {type(depth).__name__}")
        x, y, z = hp.pix2vec(2**regions.order, cells, nest=True)
        pixel = hp.vec2pix(depth.nside, x, y, z, nest=depth.nest)
        shift = depth.m50_mag[pixel] - depth.shape.m50
        missing = np.isnan(shift)
        if missing.any():
            warnings.warn(
                f"{area_deg2[missing].sum():.4g} deg^2 of the footprint lies in depth-map pixels "
                "with no data; counted as zero completeness",
                CompletenessWarning,
                stacklevel=2,
            )
            area_deg2 = np.where(missing, 0.0, area_deg2)
            shift = np.where(missing, 0.0, shift)
    per_region = []
    for k in range(regions.n_regions):
        mine = label == k
        shifts, inverse = np.unique(shift[mine], return_inverse=True)
        weights = np.bincount(inverse, weights=area_deg2[mine], minlength=shifts.size)
        per_region.append(ShiftedCompleteness(shape, shifts, weights))
    shifts, inverse = np.unique(shift[label >= 0], return_inverse=True)
    weights = np.bincount(inverse, weights=area_deg2[label >= 0], minlength=shifts.size)
    return per_region, ShiftedCompleteness(shape, shifts, weights)
