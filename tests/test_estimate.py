"""Tests for countscale.estimate: the Estimate result, its JSON form, budgets and formatting.

References: the JSON keys are the Estimate contract of docs/reference.md; percentiles of
normal and lognormal distributions come from scipy.stats (reference library, independent of
our code).
"""

import dataclasses
import json
import math
import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from countscale.errors import InputError, InputTypeError
from countscale.estimate import (
    BudgetWarning,
    Estimate,
    budget_from_draws,
    variance_budget,
)

JSON_KEYS = {"median", "interval_68", "interval_95", "unit", "budget"}  # docs/reference.md


# ------------------------------------------------------------------------- JSON contract
def test_to_json_has_exactly_the_design_keys_and_plain_types():
    est = Estimate.from_draws(
        np.random.default_rng(0).normal(10.0, 1.0, 1000),
        "deg^-2",
        budget={"poisson": 0.3, "cosmic_variance": 0.7},
    )
    obj = est.to_json()
    assert set(obj) == JSON_KEYS
    assert type(obj["median"]) is float
    assert all(type(x) is float for x in obj["interval_68"] + obj["interval_95"])
    assert len(obj["interval_68"]) == len(obj["interval_95"]) == 2
    assert obj["unit"] == "deg^-2"
    assert obj["budget"] == {"poisson": 0.3, "cosmic_variance": 0.7}
    assert all(type(v) is float for v in obj["budget"].values())
    # Serialises with the standard library (no numpy scalars hiding inside).
    assert json.loads(json.dumps(obj)) == obj


def test_json_round_trip_keeps_summary():
    est = Estimate.from_normal(24.1, 0.05, "mag", budget={"injections": 1.0})
    back = Estimate.from_json(json.loads(json.dumps(est.to_json())))
    assert back.to_json() == est.to_json()
    assert back.draws is None


def test_from_json_rejects_wrong_keys():
    obj = Estimate.from_normal(1.0, 0.1, "").to_json()
    obj["sigma"] = 0.1
    message = r"`obj` must have exactly the keys .*unexpected \['sigma'\]"
    with pytest.raises(InputError, match=message):
        Estimate.from_json(obj)


# ------------------------------------------------------------------------- intervals
def test_draws_of_a_normal_match_scipy_percentiles_within_monte_carlo_error():
    # Reference: scipy.stats.norm.ppf. Monte Carlo standard error of the p-quantile of n draws is
    # sqrt(p (1 - p) / n) / pdf(x_p) (asymptotic order-statistic variance, standard result).
    mean, sigma, n = 3.0, 2.0, 200_000
    est = Estimate.from_draws(np.random.default_rng(42).normal(mean, sigma, n), "mag")
    dist = stats.norm(mean, sigma)
    for p, value in [
        (0.5, est.median),
        (0.16, est.interval_68[0]),
        (0.84, est.interval_68[1]),
        (0.025, est.interval_95[0]),
        (0.975, est.interval_95[1]),
    ]:
        standard_error = math.sqrt(p * (1 - p) / n) / dist.pdf(dist.ppf(p))
        assert abs(value - dist.ppf(p)) < 5 * standard_error, p
    assert est.n_draws == n


def test_from_normal_uses_the_exact_16_84_and_2p5_97p5_percentiles():
    est = Estimate.from_normal(10.0, 2.0, "x")
    assert est.median == 10.0
    # scipy.stats.norm.interval(0.68) is the central 68 % = 16th to 84th percentile.
    np.testing.assert_allclose(est.interval_68, stats.norm(10.0, 2.0).interval(0.68), rtol=1e-12)
    np.testing.assert_allclose(est.interval_95, stats.norm(10.0, 2.0).interval(0.95), rtol=1e-12)
    assert est.draws is None


def test_from_lognormal_matches_scipy_lognorm():
    # log10 Q ~ N(log10 median, s^2)  <=>  ln Q ~ N(ln median, (s ln 10)^2): scipy.stats.lognorm.
    median, s = 2.0e12, 0.15
    est = Estimate.from_lognormal(median, s, "galaxies")
    ref = stats.lognorm(s=s * math.log(10.0), scale=median)
    np.testing.assert_allclose(est.interval_68, ref.ppf([0.16, 0.84]), rtol=1e-10)
    np.testing.assert_allclose(est.interval_95, ref.ppf([0.025, 0.975]), rtol=1e-10)


def test_point_value_is_allowed():
    est = Estimate.from_normal(5.0, 0.0, "")
    assert est.interval_68 == (5.0, 5.0) == est.interval_95


# ------------------------------------------------------------------------- budgets
def test_variance_budget_normalises_and_sums_to_one():
    budget = variance_budget({"poisson": 0.01, "cosmic_variance": 0.03, "area": 0.0})
    assert budget == pytest.approx({"poisson": 0.25, "cosmic_variance": 0.75, "area": 0.0})
    assert sum(budget.values()) == pytest.approx(1.0, abs=1e-12)


def test_budget_from_draws_recovers_shares_of_independent_log_terms():
    # log10 Q = a + b with independent normal a, b: var(log10 Q) = var a + var b exactly
    # (closed form), so the shares are 0.01 / 0.04 and 0.03 / 0.04.
    rng = np.random.default_rng(7)
    n = 20_000
    a = rng.normal(0.0, 0.1, n)
    b = rng.normal(0.0, math.sqrt(0.03), n)
    total = 10.0 ** (5.0 + a + b)
    budget = budget_from_draws(
        total,
        {"poisson": 10.0 ** (5.0 + a), "cosmic_variance": 10.0 ** (5.0 + b)},
    )
    # Monte Carlo scatter of a variance ratio from 2e4 draws is ~1 %.
    assert budget["poisson"] == pytest.approx(0.25, abs=0.02)
    assert budget["cosmic_variance"] == pytest.approx(0.75, abs=0.02)
    assert sum(budget.values()) == pytest.approx(1.0, abs=1e-12)
    est = Estimate.from_draws(total, "", budget=budget)
    assert sum(est.to_json()["budget"].values()) == pytest.approx(1.0, abs=0.01)


def test_budget_from_draws_warns_when_components_do_not_add_up():
    rng = np.random.default_rng(8)
    a = rng.normal(0.0, 0.1, 5000)
    # The "total" has twice the spread of the only component: the components miss 3/4 of it.
    with pytest.warns(BudgetWarning, match=r"one-at-a-time variances of log10 sum to"):
        budget_from_draws(10.0 ** (2 * a), {"poisson": 10.0**a})


@pytest.mark.parametrize(
    ("budget", "error", "message"),
    [
        ({"poisson": 0.5, "cosmic_variance": 0.4}, InputError, r"`budget` fractions must sum to 1"),
        ({"poisson": 1.1, "cosmic_variance": -0.1}, InputError, r"`budget\['cosmic_variance'\]`"),
        ({"poisson": float("nan")}, InputError, r"must be a finite fraction >= 0; got nan"),
        ({"poisson": "1"}, InputTypeError, r"`budget\['poisson'\]` must be a real number"),
        ({1: 1.0}, InputTypeError, r"`budget` keys must be strings; got 1"),
        ([("poisson", 1.0)], InputTypeError, r"`budget` must be a mapping"),
    ],
)
def test_bad_budgets_are_rejected(budget, error, message):
    with pytest.raises(error, match=message):
        Estimate.from_normal(1.0, 0.1, "", budget=budget)


def test_budget_sum_tolerance_is_one_percent():
    Estimate.from_normal(1.0, 0.1, "", budget={"a": 0.5, "b": 0.505})  # within 0.01: accepted
    with pytest.raises(InputError, match=r"must sum to 1 \(within 0.01\); got 1.02"):
        Estimate.from_normal(1.0, 0.1, "", budget={"a": 0.5, "b": 0.52})


@pytest.mark.parametrize(
    ("components", "error", "message"),
    [
        ({}, InputError, r"`components` must name at least one source"),
        ({"a": 0.0, "b": 0.0}, InputError, r"`components` variances must not all be zero"),
        ({"a": -1.0}, InputError, r"`components\['a'\]` must be a finite variance >= 0; got -1"),
        ({"a": None}, InputTypeError, r"`components\['a'\]` must be a real number"),
        (0.1, InputTypeError, r"`components` must be a mapping"),
    ],
)
def test_bad_variance_components_are_rejected(components, error, message):
    with pytest.raises(error, match=message):
        variance_budget(components)


def test_budget_from_draws_needs_positive_draws():
    with pytest.raises(InputError, match=r"`component_draws\['a'\]` must be > 0 to take log10; "):
        budget_from_draws([1.0, 2.0, 3.0], {"a": [1.0, -2.0, 3.0]})
    with pytest.raises(InputError, match=r"`total_draws` must hold at least 2 draws"):
        budget_from_draws([1.0], {"a": [1.0, 2.0]})
    with pytest.raises(InputTypeError, match=r"`component_draws` must be a mapping"):
        budget_from_draws([1.0, 2.0], [1.0, 2.0])


# ------------------------------------------------------------------------- bad draws and fields
def test_non_finite_draws_are_counted_in_the_message():
    draws = np.arange(10.0)
    draws[[2, 5]] = np.nan
    draws[7] = np.inf
    with pytest.raises(InputError, match=r"`draws` must all be finite; got 3 non-finite of 10"):
        Estimate.from_draws(draws, "")


@pytest.mark.parametrize(
    ("draws", "error", "message"),
    [
        ([], InputError, r"`draws` must hold at least one draw; got 0"),
        ([[1.0, 2.0]], InputError, r"`draws` must be one-dimensional; got shape \(1, 2\)"),
        (["a", "b"], InputTypeError, r"`draws` must be numeric"),
    ],
)
def test_bad_draws_are_rejected(draws, error, message):
    with pytest.raises(error, match=message):
        Estimate.from_draws(draws, "")


@pytest.mark.parametrize(
    ("kwargs", "error", "message"),
    [
        (
            {"median": 1.0, "interval_68": (2.0, 3.0), "interval_95": (0.0, 4.0)},
            InputError,
            r"must be nested \(lo95 <= lo68 <= median <= hi68 <= hi95\); got 0.0, 2.0, 1.0",
        ),
        (
            {"median": 1.0, "interval_68": (0.5, 1.5), "interval_95": (2.0, 0.0)},
            InputError,
            r"`interval_95` must have lo <= hi; got \(2.0, 0.0\)",
        ),
        (
            {"median": float("inf"), "interval_68": (0.5, 1.5), "interval_95": (0.0, 2.0)},
            InputError,
            r"`median` must be finite; got inf",
        ),
        (
            {"median": 1.0, "interval_68": 0.5, "interval_95": (0.0, 2.0)},
            InputTypeError,
            r"`interval_68` must be a pair \(lo, hi\); got 0.5",
        ),
        (
            {"median": 1.0, "interval_68": (0.5, 1.5), "interval_95": (0.0, 2.0), "unit": 3},
            InputTypeError,
            r"`unit` must be a string; got int",
        ),
    ],
)
def test_direct_construction_is_validated(kwargs, error, message):
    with pytest.raises(error, match=message):
        Estimate(**kwargs)


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda: Estimate.from_normal(1.0, -0.1, ""), r"`sigma` must be >= 0; got -0.1"),
        (lambda: Estimate.from_lognormal(0.0, 0.1, ""), r"`median` of a lognormal .* got 0.0"),
        (lambda: Estimate.from_lognormal(1.0, -1, ""), r"`sigma_log10` must be >= 0; got -1.0"),
    ],
)
def test_bad_analytic_parameters_are_rejected(call, message):
    with pytest.raises(InputError, match=message):
        call()


def test_estimate_is_immutable_and_does_not_alias_caller_draws():
    draws = np.random.default_rng(1).normal(0.0, 1.0, 100)
    before = draws.copy()
    est = Estimate.from_draws(draws, "")
    draws[0] = 1e9  # the caller changing their array must not change the estimate
    assert est.draws[0] == before[0]
    with pytest.raises(ValueError, match="read-only"):
        est.draws[0] = 0.0
    with pytest.raises(dataclasses.FrozenInstanceError):
        est.median = 3.0


# ------------------------------------------------------------------------- scale
def test_scale_multiplies_everything_and_sets_the_unit():
    draws = np.random.default_rng(3).lognormal(0.0, 0.2, 500)
    est = Estimate.from_draws(draws, "deg^-2", budget={"poisson": 1.0})
    # Any positive factor; this one is the whole sky in deg^2, 4 pi (180/pi)^2 = 41252.96.
    total = est.scale(41252.96, "galaxies")
    assert total.unit == "galaxies"
    assert total.median == pytest.approx(est.median * 41252.96, rel=1e-14)
    np.testing.assert_allclose(total.interval_68, np.array(est.interval_68) * 41252.96)
    np.testing.assert_allclose(total.draws, est.draws * 41252.96)
    assert total.budget == est.budget
    # Scaling commutes with taking percentiles of the draws (positive factor).
    np.testing.assert_allclose(
        total.interval_95, Estimate.from_draws(draws * 41252.96, "x").interval_95, rtol=1e-12
    )
    assert est.unit == "deg^-2"  # the original is untouched


@pytest.mark.parametrize(
    ("factor", "error", "message"),
    [
        (0.0, InputError, r"`factor` must be > 0; got 0.0"),
        (-2.0, InputError, r"`factor` must be > 0; got -2.0"),
        (float("nan"), InputError, r"`factor` must be finite; got nan"),
        ("2", InputTypeError, r"`factor` must be a real number; got str"),
    ],
)
def test_scale_rejects_bad_factors(factor, error, message):
    with pytest.raises(error, match=message):
        Estimate.from_normal(1.0, 0.1, "").scale(factor, "x")


# ------------------------------------------------------------------------- formatting
def test_format_matches_the_documented_example():
    est = Estimate(12300.0, (11000.0, 13700.0), (9000.0, 15000.0), "deg^-2")
    assert str(est) == "1.23e+04 (68 %: 1.10e+04–1.37e+04) deg^-2"
    assert est.format() == str(est)


@pytest.mark.parametrize(
    ("median", "interval", "unit", "sig", "expected"),
    [
        # Uncertainty 0.051 -> two digits at 1e-3: value to three decimals.
        (24.5312, (24.4801, 24.5823), "mag", 2, "24.531 (68 %: 24.480–24.582) mag"),
        (24.5312, (24.4801, 24.5823), "mag", 1, "24.53 (68 %: 24.48–24.58) mag"),
        # Negative values: "to" instead of a dash next to a minus sign.
        (-20.44, (-20.45, -20.43), "mag", 2, "-20.440 (68 %: -20.450 to -20.430) mag"),
        # Rounding the uncertainty up a decade (0.0996 -> 0.10) keeps two digits.
        (1.0, (0.9004, 1.0996), "", 2, "1.00 (68 %: 0.90–1.10)"),
        # Small numbers switch to scientific notation.
        (3.0e-5, (2.88e-5, 3.12e-5), "Mpc^-3", 2, "3.00e-05 (68 %: 2.88e-05–3.12e-05) Mpc^-3"),
        # Uncertainty coarser than 1: round to tens.
        (1234.0, (1190.0, 1290.0), "", 2, "1234 (68 %: 1190–1290)"),
        (2345.0, (1000.0, 3700.0), "", 2, "2300 (68 %: 1000–3700)"),
    ],
)
def test_format_examples(median, interval, unit, sig, expected):
    est = Estimate(median, interval, (interval[0] - 1.0, interval[1] + 1.0), unit)
    assert est.format(sig=sig) == expected


def test_format_rejects_bad_sig():
    with pytest.raises(InputError, match=r"`sig` must be an integer >= 1; got 0"):
        Estimate.from_normal(1.0, 0.1, "").format(sig=0)


@settings(max_examples=200, deadline=None)
@given(
    median=st.floats(-1e8, 1e8, allow_nan=False).filter(lambda x: abs(x) > 1e-8 or x == 0.0),
    relative=st.floats(1e-6, 10.0),
)
def test_formatted_numbers_are_within_half_a_shown_digit(median, relative):
    # Property: with two significant digits in the uncertainty u, every printed number is the
    # true one rounded at a decimal place no coarser than u / 10, so it is off by <= u / 20.
    sigma = relative * max(abs(median), 1e-3)
    est = Estimate.from_normal(median, sigma, "")
    text = str(est).replace("(68 %:", "")
    numbers_shown = [float(x) for x in re.findall(r"-?\d+(?:\.\d+)?(?:e[+-]\d+)?", text)]
    assert len(numbers_shown) == 3
    u = min(est.median - est.interval_68[0], est.interval_68[1] - est.median)
    for shown, true in zip(numbers_shown, (est.median, *est.interval_68), strict=True):
        assert abs(shown - true) <= u / 20 * (1 + 1e-9) + 1e-12 * abs(true)


def test_repr_is_short_and_names_the_draw_count():
    est = Estimate.from_draws(np.arange(1000.0), "x")
    text = repr(est)
    assert "n_draws=1000" in text
    assert len(text) < 300
