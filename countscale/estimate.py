"""Uncertain numbers: a median, 68 % and 95 % intervals, a unit and an error budget.

Every uncertain number countscale reports is an :class:`Estimate`. It keeps the Monte Carlo or
bootstrap draws it was made from (so a user can recompute anything), or, for a purely analytic
estimate, just the median and intervals.

Contents
--------
Estimate
    Frozen result: ``median``, ``interval_68``, ``interval_95``, ``unit``, ``budget``, ``draws``.
    Constructors ``from_draws``, ``from_normal``, ``from_lognormal``, ``from_json``;
    ``to_json``, ``format``, ``scale``.
variance_budget
    {source: variance of log10 from that source alone} -> normalised fractions.
budget_from_draws
    The same, from Monte Carlo draws with one source varying at a time.
BudgetWarning
    Warns when the one-at-a-time variances do not add up to the total variance.

Conventions
-----------
``interval_68`` is the 16th-84th percentile range and ``interval_95`` the 2.5th-97.5th, of the
draws or of the analytic distribution. The error budget gives each source's share of the variance
of log10 of the quantity; the shares are non-negative and sum to 1 (within 0.01). An empty budget
means "not broken down".
"""

from __future__ import annotations

import math
import numbers
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from countscale.errors import InputError, InputTypeError

__all__ = [
    "PERCENTILES_68",
    "PERCENTILES_95",
    "BudgetWarning",
    "Estimate",
    "budget_from_draws",
    "variance_budget",
]

#: Percentiles bounding the 68 % interval. 16/84 (not 15.87/84.13) is the usual rounded choice
#: for "1 sigma" intervals from draws (common figure, no source).
PERCENTILES_68 = (16.0, 84.0)
#: Percentiles bounding the 95 % interval.
PERCENTILES_95 = (2.5, 97.5)

#: How far the budget fractions may stray from summing to 1 (the Estimate JSON contract,
#: docs/reference.md).
BUDGET_SUM_TOLERANCE = 0.01

#: Values whose decimal exponent lies in this range print in fixed notation, others in
#: scientific notation (readability choice, no source).
_FIXED_NOTATION_EXPONENTS = (-3, 3)


class BudgetWarning(UserWarning):
    """The one-source-at-a-time variances do not add up to the total variance."""


def _check_finite_number(value, name):
    """Return ``value`` as a float, or raise naming ``name``."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise InputTypeError(f"`{name}` must be a real number; got {type(value).__name__}")
    value = float(value)
    if not math.isfinite(value):
        raise InputError(f"`{name}` must be finite; got {value}")
    return value


def _check_unit(unit):
    if not isinstance(unit, str):
        raise InputTypeError(f"`unit` must be a string; got {type(unit).__name__}")
    return unit


def _check_budget(budget):
    """Validate a budget mapping and return a plain ``dict`` of floats."""
    if budget is None:
        return {}
    if not isinstance(budget, Mapping):
        raise InputTypeError(
            f"`budget` must be a mapping of source name to fraction; got {type(budget).__name__}"
        )
    checked = {}
    for name, fraction in budget.items():
        if not isinstance(name, str):
            raise InputTypeError(f"`budget` keys must be strings; got {name!r}")
        if isinstance(fraction, bool) or not isinstance(fraction, numbers.Real):
            raise InputTypeError(
                f"`budget[{name!r}]` must be a real number; got {type(fraction).__name__}"
            )
        fraction = float(fraction)
        if not (math.isfinite(fraction) and fraction >= 0.0):
            raise InputError(f"`budget[{name!r}]` must be a finite fraction >= 0; got {fraction}")
        checked[name] = fraction
    if checked:
        total = sum(checked.values())
        if abs(total - 1.0) > BUDGET_SUM_TOLERANCE:
            raise InputError(
                f"`budget` fractions must sum to 1 (within {BUDGET_SUM_TOLERANCE}); "
                f"got {total:.6g} from {checked}"
            )
    return checked


def _check_draws(draws, name="draws"):
    """Return a read-only 1-D float copy of ``draws``, or raise naming ``name``."""
    try:
        array = np.array(draws, dtype=float, copy=True)
    except (TypeError, ValueError) as error:
        raise InputTypeError(f"`{name}` must be numeric; got {type(draws).__name__}") from error
    if array.ndim != 1:
        raise InputError(f"`{name}` must be one-dimensional; got shape {array.shape}")
    if array.size == 0:
        raise InputError(f"`{name}` must hold at least one draw; got 0")
    n_bad = int(np.count_nonzero(~np.isfinite(array)))
    if n_bad:
        raise InputError(f"`{name}` must all be finite; got {n_bad} non-finite of {array.size}")
    array.flags.writeable = False
    return array


def _check_interval(interval, name):
    try:
        lo, hi = interval
    except (TypeError, ValueError) as error:
        raise InputTypeError(f"`{name}` must be a pair (lo, hi); got {interval!r}") from error
    lo = _check_finite_number(lo, f"{name}[0]")
    hi = _check_finite_number(hi, f"{name}[1]")
    if lo > hi:
        raise InputError(f"`{name}` must have lo <= hi; got ({lo}, {hi})")
    return (lo, hi)


def _decimal_exponent(value):
    """floor(log10(|value|)), or None for zero."""
    if value == 0.0:
        return None
    return math.floor(math.log10(abs(value)))


def _format_at_resolution(value, quantum, scientific):
    """Format ``value`` rounded to the decimal place 10**quantum."""
    if scientific:
        exponent = _decimal_exponent(value)
        if exponent is None:
            exponent = quantum
        decimals = max(0, exponent - quantum)
        return f"{value:.{decimals}e}"
    if quantum > 0:
        return f"{round(value, -quantum):.0f}"
    return f"{value:.{-quantum}f}"


def _join_range(lo_text, hi_text):
    """'lo–hi' with an en dash, or 'lo to hi' when a minus sign would sit beside the dash."""
    if lo_text.startswith("-") or hi_text.startswith("-"):
        return f"{lo_text} to {hi_text}"
    return f"{lo_text}–{hi_text}"


@dataclass(frozen=True, eq=False)
class Estimate:
    """An uncertain number: median, 68 % and 95 % intervals, unit and error budget.

    Build it with :meth:`from_draws`, :meth:`from_normal` or :meth:`from_lognormal` rather than
    directly. Direct construction checks that the numbers are finite and ordered
    (``interval_95[0] <= interval_68[0] <= median <= interval_68[1] <= interval_95[1]``).

    Parameters
    ----------
    median : float
        Median of the distribution, in ``unit``.
    interval_68 : tuple of float, (lo, hi)
        16th and 84th percentiles, in ``unit``.
    interval_95 : tuple of float, (lo, hi)
        2.5th and 97.5th percentiles, in ``unit``.
    unit : str
        Unit of the quantity, e.g. ``"deg^-2"``, ``"mag"``; ``""`` for dimensionless.
    budget : dict of str to float, optional
        Each source's share of the variance of log10 of the quantity; non-negative, summing to
        1 within 0.01. Empty when the error is not broken down.
    draws : ndarray of float, shape (n_draws,), optional
        The Monte Carlo or bootstrap draws the summary came from, in ``unit`` (read-only);
        ``None`` for an analytic estimate.

    Examples
    --------
    >>> est = Estimate.from_normal(12300.0, 1300.0, "deg^-2")
    >>> print(est)
    1.23e+04 (68 %: 1.10e+04–1.36e+04) deg^-2
    >>> sorted(est.to_json())
    ['budget', 'interval_68', 'interval_95', 'median', 'unit']
    """

    median: float
    interval_68: tuple[float, float]
    interval_95: tuple[float, float]
    unit: str = ""
    budget: dict[str, float] = field(default_factory=dict)
    draws: np.ndarray | None = None

    def __post_init__(self):
        median = _check_finite_number(self.median, "median")
        interval_68 = _check_interval(self.interval_68, "interval_68")
        interval_95 = _check_interval(self.interval_95, "interval_95")
        # A small relative slack: percentiles of draws are computed independently and may cross
        # the median by a rounding error when many draws are equal.
        slack = 1e-12 * max(1.0, abs(median), abs(interval_95[0]), abs(interval_95[1]))
        if not (
            interval_95[0] <= interval_68[0] + slack
            and interval_68[0] <= median + slack
            and median <= interval_68[1] + slack
            and interval_68[1] <= interval_95[1] + slack
        ):
            raise InputError(
                "`interval_95`, `interval_68` and `median` must be nested "
                f"(lo95 <= lo68 <= median <= hi68 <= hi95); got {interval_95[0]}, "
                f"{interval_68[0]}, {median}, {interval_68[1]}, {interval_95[1]}"
            )
        draws = None if self.draws is None else _check_draws(self.draws)
        object.__setattr__(self, "median", median)
        object.__setattr__(self, "interval_68", interval_68)
        object.__setattr__(self, "interval_95", interval_95)
        object.__setattr__(self, "unit", _check_unit(self.unit))
        object.__setattr__(self, "budget", _check_budget(self.budget))
        object.__setattr__(self, "draws", draws)

    # ----------------------------------------------------------------- constructors
    @classmethod
    def from_draws(cls, draws, unit, budget=None):
        """Summarise Monte Carlo or bootstrap draws.

        Parameters
        ----------
        draws : array_like of float, shape (n_draws,)
            Draws of the quantity, in ``unit``; all finite. Copied, never modified.
        unit : str
            Unit of the quantity.
        budget : dict of str to float, optional
            Error budget (fractions of the variance of log10 of the quantity).

        Returns
        -------
        Estimate
            With the median and 16-84, 2.5-97.5 percentile intervals of the draws (linear
            interpolation between order statistics, numpy's default), keeping the draws.
        """
        array = _check_draws(draws)
        lo68, hi68 = np.percentile(array, PERCENTILES_68)
        lo95, hi95 = np.percentile(array, PERCENTILES_95)
        return cls(
            median=float(np.median(array)),
            interval_68=(float(lo68), float(hi68)),
            interval_95=(float(lo95), float(hi95)),
            unit=unit,
            budget=budget,
            draws=array,
        )

    @classmethod
    def from_normal(cls, mean, sigma, unit, budget=None):
        """An analytic estimate with a normal distribution (no draws kept).

        Parameters
        ----------
        mean : float
            Mean (= median) in ``unit``.
        sigma : float
            Standard deviation in ``unit``; >= 0 (0 gives a point value).
        unit : str
            Unit of the quantity.
        budget : dict of str to float, optional
            Error budget.

        Notes
        -----
        The intervals are the normal distribution's exact 16/84 and 2.5/97.5 percentiles,
        ``mean + sigma * Phi^-1(p)``, so ``interval_68`` is ``mean +/- 0.9945 sigma``: the same
        definition as for draws.
        """
        mean = _check_finite_number(mean, "mean")
        sigma = _check_finite_number(sigma, "sigma")
        if sigma < 0.0:
            raise InputError(f"`sigma` must be >= 0; got {sigma}")
        z68 = stats.norm.ppf(np.array(PERCENTILES_68) / 100.0)
        z95 = stats.norm.ppf(np.array(PERCENTILES_95) / 100.0)
        return cls(
            median=mean,
            interval_68=tuple(float(mean + sigma * z) for z in z68),
            interval_95=tuple(float(mean + sigma * z) for z in z95),
            unit=unit,
            budget=budget,
        )

    @classmethod
    def from_lognormal(cls, median, sigma_log10, unit, budget=None):
        """An analytic estimate whose log10 is normally distributed (no draws kept).

        Parameters
        ----------
        median : float
            Median in ``unit``; > 0.
        sigma_log10 : float
            Standard deviation of log10 of the quantity (dex); >= 0.
        unit : str
            Unit of the quantity.
        budget : dict of str to float, optional
            Error budget.

        Notes
        -----
        Interval ends are ``median * 10**(sigma_log10 * Phi^-1(p))`` for the percentiles p of
        :data:`PERCENTILES_68` and :data:`PERCENTILES_95`.
        """
        median = _check_finite_number(median, "median")
        if median <= 0.0:
            raise InputError(f"`median` of a lognormal estimate must be > 0; got {median}")
        sigma_log10 = _check_finite_number(sigma_log10, "sigma_log10")
        if sigma_log10 < 0.0:
            raise InputError(f"`sigma_log10` must be >= 0; got {sigma_log10}")
        z68 = stats.norm.ppf(np.array(PERCENTILES_68) / 100.0)
        z95 = stats.norm.ppf(np.array(PERCENTILES_95) / 100.0)
        return cls(
            median=median,
            interval_68=tuple(float(median * 10.0 ** (sigma_log10 * z)) for z in z68),
            interval_95=tuple(float(median * 10.0 ** (sigma_log10 * z)) for z in z95),
            unit=unit,
            budget=budget,
        )

    @classmethod
    def from_json(cls, obj):
        """Rebuild an (analytic, draw-less) Estimate from :meth:`to_json` output.

        Parameters
        ----------
        obj : mapping
            With exactly the keys ``median``, ``interval_68``, ``interval_95``, ``unit``,
            ``budget``.
        """
        if not isinstance(obj, Mapping):
            raise InputTypeError(f"`obj` must be a mapping; got {type(obj).__name__}")
        expected = {"median", "interval_68", "interval_95", "unit", "budget"}
        missing = expected - set(obj)
        extra = set(obj) - expected
        if missing or extra:
            raise InputError(
                f"`obj` must have exactly the keys {sorted(expected)}; "
                f"missing {sorted(missing)}, unexpected {sorted(extra)}"
            )
        return cls(
            median=obj["median"],
            interval_68=tuple(obj["interval_68"]),
            interval_95=tuple(obj["interval_95"]),
            unit=obj["unit"],
            budget=obj["budget"],
        )

    # ----------------------------------------------------------------- views
    @property
    def n_draws(self):
        """Number of draws kept (0 for an analytic estimate)."""
        return 0 if self.draws is None else int(self.draws.size)

    def to_json(self):
        """The Estimate JSON of docs/reference.md, with plain Python floats.

        Returns
        -------
        dict
            ``{"median": x, "interval_68": [lo, hi], "interval_95": [lo, hi], "unit": str,
            "budget": {name: fraction}}``.
        """
        return {
            "median": float(self.median),
            "interval_68": [float(self.interval_68[0]), float(self.interval_68[1])],
            "interval_95": [float(self.interval_95[0]), float(self.interval_95[1])],
            "unit": str(self.unit),
            "budget": {str(k): float(v) for k, v in self.budget.items()},
        }

    def scale(self, factor, unit):
        """Multiply by a positive constant and give the result's unit.

        Parameters
        ----------
        factor : float
            Positive, finite multiplier (e.g. an area in deg^2 turning a density per deg^2 into
            a count).
        unit : str
            Unit of the scaled quantity (required, so a unit never changes silently).

        Returns
        -------
        Estimate
            Median, intervals and draws multiplied by ``factor``; the budget is unchanged
            (a constant factor adds nothing to the variance of log10).
        """
        factor = _check_finite_number(factor, "factor")
        if factor <= 0.0:
            raise InputError(f"`factor` must be > 0; got {factor}")
        return Estimate(
            median=self.median * factor,
            interval_68=(self.interval_68[0] * factor, self.interval_68[1] * factor),
            interval_95=(self.interval_95[0] * factor, self.interval_95[1] * factor),
            unit=unit,
            budget=dict(self.budget),
            draws=None if self.draws is None else self.draws * factor,
        )

    def format(self, sig=2):
        """A readable one-line summary with sensible significant figures.

        The uncertainty (the smaller of the two half-widths of the 68 % interval) is shown to
        ``sig`` significant digits; the median and the interval ends are rounded to the same
        decimal place. Values of order 1e-3 to 1e3 print in fixed notation, others in
        scientific notation.

        Parameters
        ----------
        sig : int
            Significant digits in the uncertainty; >= 1.

        Returns
        -------
        str
            E.g. ``"1.23e+04 (68 %: 1.10e+04–1.37e+04) deg^-2"`` or
            ``"24.53 (68 %: 24.48–24.58) mag"``.
        """
        if isinstance(sig, bool) or not isinstance(sig, numbers.Integral) or sig < 1:
            raise InputError(f"`sig` must be an integer >= 1; got {sig!r}")
        lo, hi = self.interval_68
        median = self.median
        half_widths = [w for w in (median - lo, hi - median) if w > 0.0]
        suffix = f" {self.unit}" if self.unit else ""
        if not half_widths:
            # A point value: no uncertainty to set the precision, show six significant digits.
            return f"{median:.6g} (68 %: {_join_range(f'{lo:.6g}', f'{hi:.6g}')}){suffix}"
        uncertainty = min(half_widths)
        u_exponent = _decimal_exponent(uncertainty)
        quantum = u_exponent - (sig - 1)
        # Rounding can carry into the next decade (0.0996 at 2 digits is 0.10): keep `sig` digits.
        if round(uncertainty, -quantum) >= 10.0 ** (u_exponent + 1):
            quantum += 1
        v_exponent = _decimal_exponent(median)
        if v_exponent is None:
            v_exponent = u_exponent
        low, high = _FIXED_NOTATION_EXPONENTS
        scientific = not (low <= v_exponent <= high)
        text = [_format_at_resolution(x, quantum, scientific) for x in (median, lo, hi)]
        return f"{text[0]} (68 %: {_join_range(text[1], text[2])}){suffix}"

    def __str__(self):
        return self.format()

    def __repr__(self):
        return (
            f"Estimate(median={self.median!r}, interval_68={self.interval_68!r}, "
            f"interval_95={self.interval_95!r}, unit={self.unit!r}, budget={self.budget!r}, "
            f"n_draws={self.n_draws})"
        )


# --------------------------------------------------------------------- budgets
def variance_budget(components):
    """Turn per-source variances of log10 into budget fractions.

    Parameters
    ----------
    components : mapping of str to float
        ``{source name: variance of log10 of the quantity from that source alone}`` (dex^2);
        each finite and >= 0, not all zero.

    Returns
    -------
    dict of str to float
        ``{source name: variance / sum of variances}``; the fractions sum to 1.

    Examples
    --------
    >>> variance_budget({"poisson": 0.01, "cosmic_variance": 0.03})
    {'poisson': 0.25, 'cosmic_variance': 0.75}
    """
    if not isinstance(components, Mapping):
        raise InputTypeError(
            f"`components` must be a mapping of source name to variance; "
            f"got {type(components).__name__}"
        )
    if not components:
        raise InputError("`components` must name at least one source; got an empty mapping")
    variances = {}
    for name, variance in components.items():
        if not isinstance(name, str):
            raise InputTypeError(f"`components` keys must be strings; got {name!r}")
        if isinstance(variance, bool) or not isinstance(variance, numbers.Real):
            raise InputTypeError(
                f"`components[{name!r}]` must be a real number; got {type(variance).__name__}"
            )
        variance = float(variance)
        if not (math.isfinite(variance) and variance >= 0.0):
            raise InputError(
                f"`components[{name!r}]` must be a finite variance >= 0; got {variance}"
            )
        variances[name] = variance
    total = sum(variances.values())
    if total <= 0.0:
        raise InputError(f"`components` variances must not all be zero; got {variances}")
    return {name: variance / total for name, variance in variances.items()}


#: Relative mismatch between the summed one-at-a-time variances and the total variance beyond
#: which :func:`budget_from_draws` warns (judgement call: several times the ~5 % Monte Carlo
#: scatter of a variance from ~1000 draws).
_BUDGET_MISMATCH_WARN = 0.25


def _log10_variance(draws, name):
    array = _check_draws(draws, name)
    if array.size < 2:
        raise InputError(f"`{name}` must hold at least 2 draws to form a variance; got 1")
    n_nonpositive = int(np.count_nonzero(array <= 0.0))
    if n_nonpositive:
        raise InputError(
            f"`{name}` must be > 0 to take log10; got {n_nonpositive} draws <= 0 of {array.size}"
        )
    return float(np.var(np.log10(array), ddof=1))


def budget_from_draws(total_draws, component_draws):
    """Error budget from Monte Carlo draws with one source varying at a time.

    Parameters
    ----------
    total_draws : array_like of float, shape (n_draws,)
        Draws of the quantity with every source varying; > 0. Used only to check that the
        one-at-a-time variances add up (see Warns).
    component_draws : mapping of str to array_like of float
        ``{source name: draws of the quantity with only that source varying}``; each > 0.

    Returns
    -------
    dict of str to float
        Each source's variance of log10 divided by the sum of the sources' variances.

    Warns
    -----
    BudgetWarning
        When the summed one-at-a-time variances differ from the variance of log10 of
        ``total_draws`` by more than 25 %: the sources interact or are correlated, and the
        budget is only indicative.

    Notes
    -----
    Interactions between sources are ignored: the budget assumes the variance of log10 of the
    quantity is the sum of the one-at-a-time variances, which holds when log10 of the quantity
    is (close to) a sum of independent terms, one per source.
    """
    if not isinstance(component_draws, Mapping):
        raise InputTypeError(
            "`component_draws` must be a mapping of source name to draws; "
            f"got {type(component_draws).__name__}"
        )
    total_variance = _log10_variance(total_draws, "total_draws")
    variances = {
        name: _log10_variance(draws, f"component_draws[{name!r}]")
        for name, draws in component_draws.items()
    }
    budget = variance_budget(variances)
    summed = sum(variances.values())
    if total_variance > 0.0 and abs(summed / total_variance - 1.0) > _BUDGET_MISMATCH_WARN:
        warnings.warn(
            f"one-at-a-time variances of log10 sum to {summed:.3g} but the total is "
            f"{total_variance:.3g}; sources interact, so the budget is only indicative",
            BudgetWarning,
            stacklevel=2,
        )
    return budget
