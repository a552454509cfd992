"""Tests for countscale.completeness.

Outside references used here:
- Fleming, Kron, Koo, Holland & Schmidt 1995, AJ 109, 1044: the completeness form; worked values
  with alpha = 2, m_lim = 24 computed from that form by hand: f(23) = (1 + 2/sqrt 5) / 2.
- Logistic closed forms (m90 = m50 - w ln 9) and the logistic-regression Fisher information
  I = sum p(1 - p) [1, m; m, m^2] (McCullagh & Nelder 1989, Generalized Linear Models, 2nd ed.,
  section 4.4; from memory, but it is also re-derivable in two lines).
- Clopper & Pearson 1934, Biometrika 26, 404, as implemented by scipy.stats.binomtest.
- mpmath for tail logarithms; healpy for HEALPix pixel areas and map I/O
  (Gorski et al. 2005, ApJ 622, 759); the full sky is 4 pi sr = 41252.96124941928 deg^2.
"""

import itertools
import math
import warnings

import healpy as hp
import mpmath
import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from countscale.completeness import (
    LN9,
    CompletenessFit,
    CompletenessFitError,
    CompletenessModel,
    CompletenessWarning,
    DepthMap,
    FlemingCompleteness,
    InjectionTable,
    LogisticCompleteness,
    MonotoneCompleteness,
    NotFittedError,
    check_usable,
    clopper_pearson,
    effective_area_deg2,
    fit_completeness,
    fit_completeness_by_region,
    pool_adjacent_violators,
)
from countscale.errors import InputError, InputTypeError
from countscale.estimate import Estimate

FULL_SKY_DEG2 = 4 * math.pi * (180 / math.pi) ** 2  # 4 pi sr in deg^2 (definition): 41252.96


def simulate(model, n, seed, lo=22.0, hi=26.0):
    """Injections uniform in [lo, hi] mag, recovered with probability model(m)."""
    rng = np.random.default_rng(seed)
    mag = rng.uniform(lo, hi, n)
    return mag, rng.random(n) < model(mag)


# ============================================================================ reference values
def test_fleming_1995_worked_values():
    # Fleming et al. 1995, AJ 109, 1044, with alpha = 2, m_lim = 24: at m = 23 the form gives
    # (1 + 2 / sqrt 5) / 2 = 0.947214 and at 25 its complement 0.052786 (computed by hand).
    model = FlemingCompleteness(m_lim=24.0, alpha=2.0)
    assert model(23.0) == pytest.approx(0.947214, abs=1e-6)
    assert model(25.0) == pytest.approx(0.052786, abs=1e-6)
    assert model(24.0) == pytest.approx(0.5, abs=1e-15)


def test_fleming_m90_closed_form_and_generic_solver_agree():
    # Solving 1/2 [1 - x / sqrt(1 + x^2)] = 0.9 gives x = -4/3, so m90 = m_lim - 4 / (3 alpha).
    model = FlemingCompleteness(m_lim=24.0, alpha=2.0)
    assert model.m90 == pytest.approx(24.0 - 4.0 / 6.0, abs=1e-12)
    assert CompletenessModel.magnitude_at(model, 0.9) == pytest.approx(model.m90, abs=1e-9)
    assert model.width == pytest.approx(4.0 / (3.0 * 2.0 * LN9), abs=1e-12)


def test_logistic_m90_closed_form():
    # 1 / (1 + e^x) = 0.9  <=>  x = -ln 9 (closed form): m90 = m50 - w ln 9.
    model = LogisticCompleteness(m50=24.3, width=0.27, c_max=0.93)
    assert model.m90 == pytest.approx(24.3 - 0.27 * math.log(9.0), abs=1e-12)
    assert model(model.m90) == pytest.approx(0.9 * 0.93, abs=1e-12)
    assert CompletenessModel.magnitude_at(model, 0.9) == pytest.approx(model.m90, abs=1e-9)
    assert model.magnitude_at(0.25) == pytest.approx(24.3 + 0.27 * math.log(3.0), abs=1e-12)


@pytest.mark.parametrize(
    "model",
    [LogisticCompleteness(24.0, 0.2), FlemingCompleteness(24.0, 3.0)],
    ids=["logistic", "fleming"],
)
# +-5000 mag is unphysical but probes cancellation in the far tails (the fit may visit it).
@pytest.mark.parametrize("m", [-5000.0, 14.0, 19.5, 24.7, 31.0, 37.0, 5000.0])
def test_tail_logarithms_match_mpmath(model, m):
    # Far from m50 one of c, 1 - c underflows in double precision; the fit needs their logs.
    log_c, log_one_minus = model.log_completeness(np.array([m]))
    with mpmath.workdps(50):
        if isinstance(model, LogisticCompleteness):
            u = (mpmath.mpf(m) - model.m50) / model.width
            c, one_minus = 1 / (1 + mpmath.exp(u)), 1 / (1 + mpmath.exp(-u))
        else:
            x = model.alpha * (mpmath.mpf(m) - model.m_lim)
            c = (1 - x / mpmath.sqrt(1 + x * x)) / 2
            one_minus = (1 + x / mpmath.sqrt(1 + x * x)) / 2
        log_c_ref, log_one_minus_ref = float(mpmath.log(c)), float(mpmath.log(one_minus))
    assert log_c[0] == pytest.approx(log_c_ref, rel=1e-10, abs=1e-12)
    assert log_one_minus[0] == pytest.approx(log_one_minus_ref, rel=1e-10, abs=1e-12)


# ============================================================================ generic battery
def _monotone_model():
    mag, found = simulate(LogisticCompleteness(24.0, 0.3), 3000, seed=11)
    return MonotoneCompleteness.from_injections(mag, found)


MODELS = {
    "logistic": lambda: LogisticCompleteness(24.0, 0.3),
    "logistic_plateau": lambda: LogisticCompleteness(23.5, 0.15, c_max=0.8),
    "fleming": lambda: FlemingCompleteness(24.0, 2.0),
    "fleming_plateau": lambda: FlemingCompleteness(22.0, 5.0, c_max=0.9),
    "monotone": _monotone_model,
}


@pytest.mark.parametrize("name", sorted(MODELS))
def test_every_model_is_a_non_increasing_curve_in_unit_interval(name):
    model = MODELS[name]()
    grid = np.linspace(10.0, 40.0, 3001)
    values = model(grid)
    assert values.shape == grid.shape
    assert np.all((values >= 0.0) & (values <= 1.0))
    assert np.all(np.diff(values) <= 1e-15)
    assert isinstance(model(24.0), float)
    assert model(np.zeros((2, 3)) + 24.0).shape == (2, 3)


@pytest.mark.parametrize("name", sorted(MODELS))
def test_every_model_has_consistent_m50_m90_width(name):
    model = MODELS[name]()
    assert model(model.m50) == pytest.approx(0.5 * model.c_max, abs=1e-9)
    assert model(model.m90) == pytest.approx(0.9 * model.c_max, abs=1e-9)
    assert model.m90 < model.m50
    assert model.width == pytest.approx((model.m50 - model.m90) / LN9, rel=1e-12)
    # The generic numerical solver of the base class agrees with each model's own inverse.
    for fraction in (0.1, 0.5, 0.9):
        generic = CompletenessModel.magnitude_at(model, fraction)
        assert generic == pytest.approx(model.magnitude_at(fraction), abs=1e-8)


@pytest.mark.parametrize("name", sorted(MODELS))
def test_every_model_leaves_input_alone_and_logs_agree(name):
    model = MODELS[name]()
    m = np.linspace(22.0, 26.0, 41)
    before = m.copy()
    values = model(m)
    np.testing.assert_array_equal(m, before)
    log_c, log_one_minus = model.log_completeness(m)
    with np.errstate(divide="ignore"):
        np.testing.assert_allclose(np.exp(log_c), values, rtol=1e-12, atol=1e-300)
        np.testing.assert_allclose(np.exp(log_one_minus), 1.0 - values, rtol=1e-9, atol=1e-15)


@settings(max_examples=100, deadline=None)
@given(
    m50=st.floats(15.0, 30.0),
    width=st.floats(0.01, 2.0),
    c_max=st.floats(0.05, 1.0),
    m=st.floats(0.0, 50.0),
)
def test_logistic_property_probabilities_add_to_one(m50, width, c_max, m):
    log_c, log_one_minus = LogisticCompleteness(m50, width, c_max).log_completeness(np.array([m]))
    assert math.exp(log_c[0]) + math.exp(log_one_minus[0]) == pytest.approx(1.0, abs=1e-12)
    assert np.isfinite(log_c[0]) and np.isfinite(log_one_minus[0])


@settings(max_examples=100, deadline=None)
@given(m_lim=st.floats(15.0, 30.0), alpha=st.floats(0.1, 20.0), m=st.floats(0.0, 50.0))
def test_fleming_property_symmetric_about_m_lim(m_lim, alpha, m):
    # f(m_lim + d) + f(m_lim - d) = 1 for the Fleming et al. (1995) form (odd in m - m_lim).
    model = FlemingCompleteness(m_lim, alpha)
    d = m - m_lim
    assert model(m_lim + d) + model(m_lim - d) == pytest.approx(1.0, abs=1e-12)


def test_generic_solver_reports_a_curve_that_never_crosses():
    # m50 = 150 mag: the curve is still ~1 at the solver's faint bracket end (100 mag).
    with pytest.raises(CompletenessFitError, match=r"does not cross 0.5 of its plateau between"):
        CompletenessModel.magnitude_at(LogisticCompleteness(150.0, 0.3), 0.5)


@pytest.mark.parametrize(
    ("call", "error", "message"),
    [
        (lambda: LogisticCompleteness(24.0, -0.1), InputError, r"`width` must be in \(0, inf\); "),
        (lambda: LogisticCompleteness(24.0, 0.3, 1.5), InputError, r"`c_max` must be in \(0, 1\]"),
        (lambda: LogisticCompleteness("24", 0.3), InputTypeError, r"`m50` must be a real number"),
        (lambda: LogisticCompleteness(np.nan, 0.3), InputError, r"`m50` must be finite; got nan"),
        (lambda: FlemingCompleteness(24.0, 0.0), InputError, r"`alpha` must be in \(0, inf\); "),
        (
            lambda: LogisticCompleteness(24.0, 0.3).magnitude_at(1.0),
            InputError,
            r"`fraction` must be in \(0, 1\); got 1.0",
        ),
        (
            lambda: LogisticCompleteness(24.0, 0.3)("faint"),
            InputTypeError,
            r"`m` must be numeric magnitudes; got str",
        ),
    ],
)
def test_bad_model_parameters(call, error, message):
    with pytest.raises(error, match=message):
        call()


# ============================================================================ PAV and intervals
def brute_force_non_increasing(values, weights):
    """Weighted least-squares non-increasing fit by enumerating every partition into runs.

    The isotonic solution is constant on runs of consecutive points with the run's weighted
    mean as value; among partitions whose run means do not increase, take the smallest error.
    """
    n = len(values)
    best, best_error = None, np.inf
    for cuts in itertools.product([False, True], repeat=n - 1):
        edges = [0] + [i + 1 for i, cut in enumerate(cuts) if cut] + [n]
        fit = np.empty(n)
        means = []
        for a, b in itertools.pairwise(edges):
            mean = np.sum(weights[a:b] * values[a:b]) / np.sum(weights[a:b])
            means.append(mean)
            fit[a:b] = mean
        if np.all(np.diff(means) <= 0):
            error = np.sum(weights * (fit - values) ** 2)
            if error < best_error - 1e-15:
                best, best_error = fit, error
    return best


@pytest.mark.parametrize("seed", range(6))
def test_pav_equals_brute_force_on_small_examples(seed):
    rng = np.random.default_rng(seed)
    n = 8
    values = rng.random(n) + np.linspace(0.5, -0.5, n) * rng.random()
    weights = rng.integers(1, 6, n).astype(float)
    fit = pool_adjacent_violators(values, weights)
    np.testing.assert_allclose(fit, brute_force_non_increasing(values, weights), atol=1e-12)
    assert np.all(np.diff(fit) <= 0)


def test_pav_hand_example():
    # [1, 3, 2] with unit weights: 1 < 3 violates, pool to 2, then [2, 2, 2].
    np.testing.assert_allclose(pool_adjacent_violators([1.0, 3.0, 2.0]), [2.0, 2.0, 2.0])
    np.testing.assert_allclose(pool_adjacent_violators([3.0, 1.0, 2.0]), [3.0, 1.5, 1.5])


def test_monotone_from_injections_is_non_increasing_and_keeps_every_injection():
    mag, found = simulate(LogisticCompleteness(24.0, 0.3), 4000, seed=3)
    model = MonotoneCompleteness.from_injections(mag, found)
    assert np.all(np.diff(model.completeness) <= 0)
    assert model.n_injected.sum() == 4000
    assert model.n_recovered.sum() == found.sum()
    np.testing.assert_allclose(model.completeness, model.n_recovered / model.n_injected)
    assert np.all(model.mag_lo <= model.mag) and np.all(model.mag <= model.mag_hi)
    assert np.all(model.mag_hi[:-1] < model.mag_lo[1:])
    # Grouped-by-bin version is also monotone and close to the truth at m50 (within 0.1 mag:
    # statistical scatter of a 4000-injection curve, judgement call).
    binned = MonotoneCompleteness.from_injections(mag, found, bin_width=0.05)
    assert np.all(np.diff(binned.completeness) <= 0)
    assert abs(binned.m50 - 24.0) < 0.1


def test_monotone_groups_tied_magnitudes():
    mag = np.repeat([20.0, 21.0, 22.0], [4, 4, 4])
    found = np.array([1, 1, 1, 1, 1, 0, 1, 1, 0, 0, 1, 0], dtype=bool)
    model = MonotoneCompleteness.from_injections(mag, found)
    np.testing.assert_allclose(model.mag, [20.0, 21.0, 22.0])
    np.testing.assert_allclose(model.completeness, [1.0, 0.75, 0.25])


@pytest.mark.parametrize(("k", "n"), [(0, 10), (3, 10), (10, 10), (57, 120), (1, 1)])
@pytest.mark.parametrize("confidence", [0.68, 0.95])
def test_clopper_pearson_matches_scipy_binomtest(k, n, confidence):
    # Reference: scipy.stats.binomtest(...).proportion_ci(method="exact") (Clopper & Pearson 1934).
    ref = stats.binomtest(k, n).proportion_ci(confidence_level=confidence, method="exact")
    lo, hi = clopper_pearson(k, n, confidence)
    assert float(lo) == pytest.approx(ref.low, abs=1e-10)
    assert float(hi) == pytest.approx(ref.high, abs=1e-10)


def test_monotone_block_intervals_are_clopper_pearson():
    model = _monotone_model()
    for i in range(model.mag.size):
        ref = stats.binomtest(int(model.n_recovered[i]), int(model.n_injected[i])).proportion_ci(
            confidence_level=0.68, method="exact"
        )
        assert model.interval_lo[i] == pytest.approx(ref.low, abs=1e-10)
        assert model.interval_hi[i] == pytest.approx(ref.high, abs=1e-10)


def test_clopper_pearson_rejects_bad_counts():
    with pytest.raises(InputError, match=r"counts must satisfy 0 <= `n_recovered` <= `n_inj"):
        clopper_pearson(5, 3)
    with pytest.raises(InputTypeError, match=r"`n_recovered` and `n_injected` must be integers"):
        clopper_pearson(2.5, 3)


# ============================================================================ fitting
@pytest.mark.parametrize("seed", [1, 2])
def test_logistic_fit_recovers_truth_within_three_sigma(seed):
    truth = LogisticCompleteness(24.0, 0.3)
    fit = fit_completeness(simulate(truth, 5000, seed))
    for name, true in (("m50", 24.0), ("width", 0.3), ("m90", truth.m90)):
        est = getattr(fit, name)
        assert isinstance(est, Estimate)
        sigma = (est.interval_68[1] - est.interval_68[0]) / 2
        assert abs(est.median - true) < 3 * sigma, name
    assert fit.n_sources_ == 5000
    assert set(fit.params_) == {"m50", "width"}
    assert fit.cov_.shape == (2, 2)
    assert fit.m50.unit == "mag" and fit.m50.budget == {"injections": 1.0}
    assert fit(24.0) == pytest.approx(0.5, abs=0.05)


def test_fleming_fit_recovers_truth_within_three_sigma():
    truth = FlemingCompleteness(24.0, 3.0)
    fit = fit_completeness(simulate(truth, 5000, 5), model="fleming")
    sigma = np.sqrt(np.diag(fit.cov_))
    assert abs(fit.params_["m_lim"] - 24.0) < 3 * sigma[0]
    assert abs(fit.params_["alpha"] - 3.0) < 3 * sigma[1]
    assert abs(fit.width.median - truth.width) < 3 * (fit.width.interval_68[1] - fit.width.median)


def test_plateau_fit_recovers_c_max_within_three_sigma():
    truth = LogisticCompleteness(24.0, 0.3, c_max=0.9)
    fit = fit_completeness(simulate(truth, 5000, 6), plateau=True)
    sigma = np.sqrt(np.diag(fit.cov_))
    for i, (name, true) in enumerate((("m50", 24.0), ("width", 0.3), ("c_max", 0.9))):
        assert abs(fit.params_[name] - true) < 3 * sigma[i], name


def test_plateau_indistinguishable_from_one_warns_and_refits():
    # Many bright injections, all recovered: the plateau likelihood rises towards c_max = 1.
    rng = np.random.default_rng(5)
    mag = np.r_[rng.uniform(22.5, 25.5, 2000), rng.uniform(15.0, 20.0, 3000)]
    found = rng.random(mag.size) < LogisticCompleteness(24.0, 0.3)(mag)
    with pytest.warns(CompletenessWarning, match=r"indistinguishable from 1; refitting"):
        fit = fit_completeness((mag, found), plateau=True)
    assert set(fit.params_) == {"m50", "width"}


def test_hessian_covariance_matches_analytic_logistic_fisher_information():
    # For p = expit(a + b m) the observed information is sum p(1-p) [1, m; m, m^2] (canonical
    # link; McCullagh & Nelder 1989, section 4.4). Our curve is a = m50 / w, b = -1 / w; map the
    # inverse information to (m50, w) with the Jacobian of m50 = -a / b, w = -1 / b.
    fit = fit_completeness(simulate(LogisticCompleteness(24.0, 0.3), 5000, 9))
    m50, w = fit.params_["m50"], fit.params_["width"]
    mag, _ = simulate(LogisticCompleteness(24.0, 0.3), 5000, 9)
    a, b = m50 / w, -1.0 / w
    p = 1.0 / (1.0 + np.exp(-(a + b * mag)))
    weight = p * (1.0 - p)
    information = np.array(
        [[weight.sum(), (weight * mag).sum()], [(weight * mag).sum(), (weight * mag**2).sum()]]
    )
    jacobian = np.array([[-1.0 / b, a / b**2], [0.0, 1.0 / b**2]])
    expected = jacobian @ np.linalg.inv(information) @ jacobian.T
    np.testing.assert_allclose(fit.cov_, expected, rtol=2e-3)
    # And the m50 Estimate's 68 % interval is its normal 16-84 % range with that sigma.
    sigma = math.sqrt(expected[0, 0])
    np.testing.assert_allclose(
        fit.m50.interval_68, stats.norm(m50, sigma).ppf([0.16, 0.84]), rtol=0, atol=2e-3 * sigma
    )


def test_loglike_is_the_bernoulli_log_likelihood():
    mag, found = simulate(LogisticCompleteness(24.0, 0.3), 2000, 4)
    fit = fit_completeness((mag, found))
    c = fit(mag)
    direct = np.sum(np.where(found, np.log(c), np.log1p(-c)))
    assert fit.loglike_ == pytest.approx(direct, rel=1e-10)
    # The optimum beats a nearby curve (maximum of the likelihood).
    nearby = LogisticCompleteness(fit.params_["m50"] + 0.02, fit.params_["width"])(mag)
    assert fit.loglike_ > np.sum(np.where(found, np.log(nearby), np.log1p(-nearby)))


def _interval_coverage(seeds, n_injections=5000):
    truth = LogisticCompleteness(24.0, 0.3)
    covered = {"m50": 0, "width": 0}
    for seed in seeds:
        fit = fit_completeness(simulate(truth, n_injections, seed))
        for name, true in (("m50", truth.m50), ("width", truth.width)):
            lo, hi = getattr(fit, name).interval_68
            covered[name] += lo <= true <= hi
    return {name: count / len(seeds) for name, count in covered.items()}


def test_calibration_reduced_68_percent_intervals_cover_truth():
    # 50 mocks: a binomial(50, 0.68) fraction lies in 55-80 % with probability ~0.97.
    coverage = _interval_coverage(range(1000, 1050))
    for name, fraction in coverage.items():
        assert 0.55 <= fraction <= 0.80, (name, fraction)


@pytest.mark.slow
def test_calibration_full_68_percent_intervals_cover_truth():
    # 500 mocks: binomial scatter 2.1 %, so 60-76 % is a ~3.8 sigma band around 68 % (the
    # calibration rule of this project's tests).
    coverage = _interval_coverage(range(2000, 2500))
    for name, fraction in coverage.items():
        assert 0.60 <= fraction <= 0.76, (name, fraction)


def test_monotone_fit_bootstrap_estimates():
    mag, found = simulate(LogisticCompleteness(24.0, 0.3), 5000, 12)
    fit = fit_completeness((mag, found), model="monotone", rng=3, n_bootstrap=100)
    assert fit.m50.n_draws == 100
    # The non-parametric m50 is unbiased to within its bootstrap scatter (3 sigma, loose).
    sigma = (fit.m50.interval_68[1] - fit.m50.interval_68[0]) / 2
    assert abs(fit.m50.median - 24.0) < 3 * sigma
    assert set(fit.params_) == {"m50", "width", "m90", "c_max"}
    assert fit.cov_.shape == (4, 4)
    assert np.isfinite(fit.loglike_) and fit.loglike_ < 0
    # Same seed, same answer; different seed, different draws.
    again = fit_completeness((mag, found), model="monotone", rng=3, n_bootstrap=100)
    np.testing.assert_array_equal(again.m50.draws, fit.m50.draws)
    other = fit_completeness((mag, found), model="monotone", rng=4, n_bootstrap=100)
    assert not np.array_equal(other.m50.draws, fit.m50.draws)


def test_monotone_fit_beats_the_logistic_in_likelihood():
    # The monotone curve maximises the Bernoulli likelihood over all non-increasing curves,
    # so it can never do worse than the logistic, a member of that family.
    data = simulate(LogisticCompleteness(24.0, 0.3), 3000, 13)
    monotone = fit_completeness(data, model="monotone", rng=0, n_bootstrap=20)
    logistic = fit_completeness(data)
    assert monotone.loglike_ >= logistic.loglike_


def test_monotone_curve_that_never_reaches_half_is_an_error():
    mag, found = simulate(LogisticCompleteness(24.0, 0.3), 2000, 14, lo=20.0, hi=23.4)
    with pytest.raises(InputError, match=r"completeness never falls to 0.5 of its plateau"):
        fit_completeness((mag, found), model="monotone", rng=0)


def test_per_region_fits():
    north = simulate(LogisticCompleteness(23.5, 0.25), 3000, 21)
    south = simulate(LogisticCompleteness(24.5, 0.25), 3000, 22)
    table = InjectionTable.from_arrays(
        np.r_[north[0], south[0]],
        np.r_[north[1], south[1]],
        region=np.array(["north"] * 3000 + ["south"] * 3000, dtype=object),
    )
    fits = fit_completeness_by_region(table)
    assert sorted(fits) == ["north", "south"]
    for label, true in (("north", 23.5), ("south", 24.5)):
        est = fits[label].m50
        assert abs(est.median - true) < 3 * (est.interval_68[1] - est.median)
        assert isinstance(fits[label].model_, LogisticCompleteness)


def test_per_region_fit_names_the_region_with_too_few_rows():
    mag, found = simulate(LogisticCompleteness(24.0, 0.3), 110, 23)
    region = np.array(["wide"] * 100 + ["tiny"] * 10, dtype=object)
    table = InjectionTable.from_arrays(mag, found, region=region)
    with pytest.raises(InputError, match=r"injection arrays region 'tiny' has 10 rows; need at"):
        fit_completeness_by_region(table)
    with pytest.raises(InputError, match=r"injection arrays has no `region` column"):
        fit_completeness_by_region(InjectionTable.from_arrays(mag, found))


@pytest.mark.parametrize(
    ("kwargs", "error", "message"),
    [
        ({"model": "erf"}, InputError, r"`model` must be one of 'logistic', 'fleming', 'mono"),
        ({"model": "monotone", "plateau": True}, InputError, r"`plateau` applies to parametric"),
        ({"plateau": "yes"}, InputTypeError, r"`plateau` must be True or False; got 'yes'"),
        ({"n_bootstrap": 3}, InputError, r"`n_bootstrap` must be an integer >= 10; got 3"),
        ({"bin_width": 0.1}, InputError, r"`bin_width` applies to the monotone model only"),
        ({"rng": "seed"}, InputTypeError,
         r"`rng` must be an int seed, a numpy.random.Generator or None; got 'seed'"),
        ({"rng": -1}, InputError, r"`rng` seed must be >= 0; got -1"),
    ],
)
def test_bad_fit_options(kwargs, error, message):
    data = simulate(LogisticCompleteness(24.0, 0.3), 500, 0)
    with pytest.raises(error, match=message):
        fit_completeness(data, **kwargs)


def test_perfectly_separated_injections_are_rejected_for_parametric_fits():
    mag = np.linspace(22.0, 26.0, 100)
    found = mag < 24.0
    with pytest.raises(InputError, match=r"recovered and missed sources do not overlap in mag"):
        fit_completeness((mag, found))


def test_unfitted_results_say_so():
    fit = CompletenessFit()
    with pytest.raises(NotFittedError, match=r"not fitted yet; call fit\(\) before reading `m50_`"):
        _ = fit.m50
    assert not hasattr(fit, "m50")  # NotFittedError is also an AttributeError
    assert "not fitted" in repr(fit)


def test_fit_rejects_unknown_input_kinds():
    with pytest.raises(InputTypeError, match=r"`injections` must be an InjectionTable, a Data"):
        fit_completeness(42)


def test_fit_to_json_has_estimates():
    fit = fit_completeness(simulate(LogisticCompleteness(24.0, 0.3), 1000, 30))
    obj = fit.to_json()
    assert set(obj) == {"model", "n_sources", "m50", "width", "m90"}
    assert set(obj["m50"]) == {"median", "interval_68", "interval_95", "unit", "budget"}


# ============================================================================ injection tables
def _frame(n=30, seed=0):
    mag, found = simulate(LogisticCompleteness(24.0, 0.5), n, seed)
    found[0], found[1] = True, False  # both kinds present whatever the draw
    return pd.DataFrame({"mag": mag, "recovered": found.astype(int)})


def _write(tmp_path, frame, name="inj.csv"):
    path = tmp_path / name
    frame.to_csv(path, index=False)
    return path


def test_table_from_dataframe_does_not_mutate_and_copies():
    frame = _frame()
    before = frame.copy()
    table = InjectionTable.from_dataframe(frame)
    pd.testing.assert_frame_equal(frame, before)
    frame.loc[0, "mag"] = 99.0
    assert table.mag[0] != 99.0
    assert len(table) == 30 and table.recovered.dtype == bool


def test_table_column_mapping(tmp_path):
    frame = _frame().rename(columns={"mag": "MAG_IN", "recovered": "FOUND"})
    frame["RA"] = 10.0
    frame["DEC"] = -5.0
    path = _write(tmp_path, frame)
    table = InjectionTable.from_csv(
        path, columns={"mag": "MAG_IN", "recovered": "FOUND", "ra": "RA", "dec": "DEC"}
    )
    np.testing.assert_allclose(table.mag, frame["MAG_IN"])
    np.testing.assert_allclose(table.dec_deg, -5.0)


def test_table_accepts_boolean_flags():
    frame = _frame()
    frame["recovered"] = frame["recovered"].astype(bool)
    assert InjectionTable.from_dataframe(frame).recovered.sum() == frame["recovered"].sum()


def _csv_case(tmp_path, change):
    frame = _frame()
    frame = change(frame)
    return _write(tmp_path, frame)


def _set(column, row, value):
    def change(frame):
        frame = frame.astype({column: object})
        frame.loc[row, column] = value
        return frame

    return change


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (
            lambda f: f.rename(columns={"mag": "m"}),
            r"injection table '.*inj.csv': missing column `mag` \(mag\); columns present: m, "
            r"recovered \(map other names with columns=\{\.\.\.\}\)",
        ),
        (
            _set("mag", 2, "faint"),
            r"injection table '.*inj.csv': column `mag` must be numeric; got 'faint' at line 4",
        ),
        (
            _set("mag", 4, np.nan),
            r"injection table '.*inj.csv': column `mag` must be finite; got nan at line 6 "
            r"\(1 non-finite values\)",
        ),
        (
            _set("mag", 5, np.inf),
            r"column `mag` must be finite; got inf at line 7",
        ),
        (
            _set("recovered", 3, 2),
            r"injection table '.*inj.csv': column `recovered` must be 0 or 1; got 2 at line 5",
        ),
        (
            _set("recovered", 3, 0.5),
            r"column `recovered` must be 0 or 1; got 0.5 at line 5",
        ),
        (
            lambda f: f.assign(recovered=1),
            r"injection table '.*inj.csv': no missed sources in 30 rows \(`recovered` all 1\); "
            r"the completeness curve is unconstrained",
        ),
        (
            lambda f: f.assign(recovered=0),
            r"no recovered sources in 30 rows \(`recovered` all 0\); the completeness curve",
        ),
        (
            lambda f: f.iloc[:12],
            r"injection table '.*inj.csv' has 12 rows; need at least 20 to fit a completeness",
        ),
        (
            lambda f: f.assign(ra=1.0, dec=[95.0] + [0.0] * 29),
            r"column `dec` must be in \[-90, 90\] degrees; got 95 at line 2",
        ),
        (
            lambda f: f.assign(ra=1.0),
            r"column `ra` \(ra\) needs a `dec` \(dec\) column",
        ),
        (
            lambda f: f.assign(region=["a"] * 29 + [None]),
            r"column `region` has 1 missing labels; first at line 31",
        ),
    ],
    ids=[
        "missing",
        "non-numeric",
        "nan",
        "inf",
        "flag-2",
        "flag-half",
        "all-recovered",
        "none-recovered",
        "few-rows",
        "dec-range",
        "ra-only",
        "region-missing",
    ],
)
def test_bad_csv_tables(tmp_path, change, message):
    path = _csv_case(tmp_path, change)
    with pytest.raises(InputError, match=message):
        InjectionTable.from_csv(path)


def test_bad_dataframe_rows_are_located_by_row_number():
    frame = _frame().astype({"mag": object})
    frame.loc[7, "mag"] = "x"
    with pytest.raises(InputError, match=r"injection table <DataFrame>: .* got 'x' at row 7"):
        InjectionTable.from_dataframe(frame)


def test_bad_column_mappings(tmp_path):
    path = _write(tmp_path, _frame())
    with pytest.raises(
        InputError, match=r"`columns` key 'magnitude' is not a role; roles are mag,"
    ):
        InjectionTable.from_csv(path, columns={"magnitude": "mag"})
    with pytest.raises(InputError, match=r"missing column `RA` \(ra\); columns present: mag, rec"):
        InjectionTable.from_csv(path, columns={"ra": "RA", "dec": "DEC"})


def test_bad_files(tmp_path):
    with pytest.raises(InputError, match=r"injection table '.*nothere.csv': file not found"):
        InjectionTable.from_csv(tmp_path / "nothere.csv")
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    with pytest.raises(InputError, match=r"injection table '.*empty.csv': cannot be read as CSV"):
        InjectionTable.from_csv(empty)
    with pytest.raises(InputTypeError, match=r"`frame` must be a pandas DataFrame; got dict"):
        InjectionTable.from_dataframe({"mag": [1.0]})


def test_bad_arrays():
    with pytest.raises(InputError, match=r"injection arrays must have one length; got \{'mag': 3"):
        InjectionTable.from_arrays([1.0, 2.0, 3.0], [1, 0])
    with pytest.raises(InputError, match=r"`mag` must be one-dimensional; got shape \(2, 2\)"):
        InjectionTable.from_arrays([[1.0, 2.0], [3.0, 4.0]], [1, 0])


# ============================================================================ usability warning
def test_check_usable_warns_below_half():
    model = LogisticCompleteness(24.0, 0.3)
    mags = np.array([22.0, 23.0, 24.5, 25.0])
    with pytest.warns(
        CompletenessWarning, match=r"completeness is below 0.5 at 2 of 4 mag.*24.500"
    ):
        usable = check_usable(model, mags)
    np.testing.assert_array_equal(usable, [True, True, False, False])


def test_check_usable_is_quiet_when_complete_enough():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        usable = check_usable(LogisticCompleteness(24.0, 0.3), [20.0, 23.9])
    assert usable.all()
    with pytest.raises(InputError, match=r"`threshold` must be in \(0, 1\]; got 1.5"):
        check_usable(LogisticCompleteness(24.0, 0.3), [20.0], threshold=1.5)
    with pytest.raises(InputTypeError, match=r"`model` must be a completeness model; got float"):
        check_usable(0.5, [20.0])


# ============================================================================ depth and area
def _shape():
    return LogisticCompleteness(m50=0.0, width=0.3)


def test_complete_everywhere_gives_the_full_sky_area():
    # Completeness == 1 in every pixel (m50 = 40 at m = 20: 1/(1 + e^-66.7) rounds to 1.0),
    # full coverage: A_eff = 4 pi sr (definition of the steradian).
    nside = 8
    depth = DepthMap(np.full(hp.nside2npix(nside), 40.0), _shape())
    assert effective_area_deg2(20.0, np.ones(hp.nside2npix(nside)), depth) == pytest.approx(
        FULL_SKY_DEG2, rel=1e-13
    )


def test_complete_everywhere_gives_the_footprint_area():
    from countscale.footprint import Footprint

    footprint = Footprint.cap(30.0, 10.0, 10.0, max_order=10)
    depth = DepthMap(np.full(hp.nside2npix(64), 40.0), _shape(), nest=True)
    area = effective_area_deg2(20.0, footprint, depth)
    assert area == pytest.approx(footprint.area_deg2, rel=1e-12)
    # And close to the exact cap 2 pi (1 - cos 10 deg) = 313.36259 deg^2 (closed form),
    # within the boundary-pixel allowance: perimeter ~62.5 deg x order-10 cell ~0.057 deg / 2.
    assert area == pytest.approx(313.36259, abs=2.0)


def test_uniform_depth_map_equals_single_curve_times_area():
    nside = 16
    npix = hp.nside2npix(nside)
    rng = np.random.default_rng(0)
    coverage = np.where(rng.random(npix) < 0.3, rng.random(npix), 0.0)
    area_deg2 = coverage.sum() * hp.nside2pixarea(nside, degrees=True)
    m = np.linspace(20.0, 28.0, 33)
    for curve in (LogisticCompleteness(24.2, 0.25, c_max=0.95), _monotone_model()):
        depth = DepthMap(np.full(npix, 24.2), curve)
        expected = area_deg2 * LogisticCompleteness(24.2, 0.25, 0.95)(m)
        if isinstance(curve, MonotoneCompleteness):
            # The shape is moved so its own m50 sits at 24.2.
            expected = area_deg2 * curve(m - 24.2 + curve.m50)
        np.testing.assert_allclose(effective_area_deg2(m, coverage, depth), expected, rtol=1e-12)


def test_two_depth_zones_add_up():
    nside = 8
    npix = hp.nside2npix(nside)
    m50 = np.where(np.arange(npix) < npix // 3, 23.0, 24.5)
    depth = DepthMap(m50, _shape())
    pixel = hp.nside2pixarea(nside, degrees=True)
    m = np.array([22.0, 23.5, 24.5, 26.0])
    expected = (npix // 3) * pixel * LogisticCompleteness(23.0, 0.3)(m) + (
        npix - npix // 3
    ) * pixel * LogisticCompleteness(24.5, 0.3)(m)
    np.testing.assert_allclose(effective_area_deg2(m, np.ones(npix), depth), expected, rtol=1e-12)


def test_ring_and_nest_give_the_same_effective_area():
    nside = 16
    rng = np.random.default_rng(2)
    m50_ring = rng.normal(24.0, 0.3, hp.nside2npix(nside))
    coverage_ring = rng.random(hp.nside2npix(nside))
    m50_nest = hp.reorder(m50_ring, r2n=True)
    coverage_nest = hp.reorder(coverage_ring, r2n=True)
    m = np.array([23.0, 24.0, 25.0])
    ring = effective_area_deg2(m, coverage_ring, DepthMap(m50_ring, _shape()))
    nest = effective_area_deg2(m, coverage_nest, DepthMap(m50_nest, _shape(), nest=True))
    np.testing.assert_allclose(ring, nest, rtol=1e-12)


def test_pixels_without_depth_count_as_zero_and_warn():
    npix = hp.nside2npix(4)
    m50 = np.full(npix, 24.0)
    m50[:10] = hp.UNSEEN
    m50[10:12] = np.nan
    depth = DepthMap(m50, _shape())
    assert np.isnan(depth.m50_mag[:12]).all()
    pixel = hp.nside2pixarea(4, degrees=True)
    with pytest.warns(CompletenessWarning, match=r"lies in pixels with no depth data; counted as"):
        area = effective_area_deg2(10.0, np.ones(npix), depth)
    assert area == pytest.approx((npix - 12) * pixel, rel=1e-12)


def test_completeness_at_positions():
    nside = 8
    npix = hp.nside2npix(nside)
    m50 = np.full(npix, 24.0)
    ra, dec = np.array([10.0, 200.0]), np.array([-30.0, 45.0])
    empty_pixel = hp.ang2pix(nside, ra[1], dec[1], lonlat=True)
    m50[empty_pixel] = np.nan
    depth = DepthMap(m50, _shape())
    values = depth.completeness_at(np.array([24.3, 24.3]), ra, dec)
    assert values[0] == pytest.approx(LogisticCompleteness(24.0, 0.3)(24.3), rel=1e-12)
    assert values[1] == 0.0
    with pytest.raises(InputError, match=r"`dec_deg` must be finite and in \[-90, 90\] degrees"):
        depth.completeness_at(24.0, 0.0, 91.0)


def test_depth_map_from_fits_reorders_and_reads_unseen(tmp_path):
    nside = 4
    rng = np.random.default_rng(4)
    m50_nest = rng.normal(24.0, 0.2, hp.nside2npix(nside))
    m50_nest[5] = hp.UNSEEN
    path = tmp_path / "m50.fits"
    hp.write_map(path, m50_nest, nest=True, dtype=np.float64)
    depth = DepthMap.from_fits(path, _shape(), nest=False)
    expected = hp.reorder(m50_nest, n2r=True)
    expected[hp.mask_bad(expected)] = np.nan
    np.testing.assert_allclose(depth.m50_mag, expected, equal_nan=True)
    assert depth.nside == nside and not depth.nest


def test_depth_map_accepts_a_fitted_shape():
    fit = fit_completeness(simulate(LogisticCompleteness(24.0, 0.3), 2000, 40))
    depth = DepthMap(np.full(12, 23.0), fit)
    # The fitted curve is moved so its m50 is 23.0 in every pixel.
    assert effective_area_deg2(23.0, np.ones(12), depth) == pytest.approx(
        FULL_SKY_DEG2 * 0.5, rel=1e-9
    )


@pytest.mark.parametrize(
    ("call", "error", "message"),
    [
        (
            lambda: DepthMap(np.full(100, 24.0), _shape()),
            InputError,
            r"`m50_mag` must be a HEALPix map of 12 nside\^2 pixels; got shape \(100,\)",
        ),
        (
            lambda: DepthMap(np.r_[np.inf, np.full(11, 24.0)], _shape()),
            InputError,
            r"`m50_mag` must be finite or NaN \(no data\); got inf at pixel 0",
        ),
        (
            lambda: DepthMap(np.full(12, np.nan), _shape()),
            InputError,
            r"`m50_mag` has no pixel with depth data",
        ),
        (
            lambda: DepthMap(np.full(12, 24.0), 0.3),
            InputTypeError,
            r"`shape` must be a completeness model or fit; got float",
        ),
        (
            lambda: effective_area_deg2(24.0, np.ones(48), DepthMap(np.full(12, 24.0), _shape())),
            InputError,
            r"`coverage` must have the depth map's 12 pixels \(nside 1\); got shape \(48,\)",
        ),
        (
            lambda: effective_area_deg2(
                24.0, np.r_[1.5, np.ones(11)], DepthMap(np.full(12, 24.0), _shape())
            ),
            InputError,
            r"`coverage` must be fractions in \[0, 1\]; got 1.5 at pixel 0",
        ),
        (
            lambda: effective_area_deg2(24.0, np.ones(12), np.full(12, 24.0)),
            InputTypeError,
            r"`depth` must be a DepthMap; got ndarray",
        ),
        (
            lambda: DepthMap.from_fits("/nonexistent/m50.fits", _shape()),
            InputError,
            r"depth map '/nonexistent/m50.fits': file not found",
        ),
    ],
)
def test_bad_depth_inputs(call, error, message):
    with pytest.raises(error, match=message):
        call()


def test_unreadable_depth_file(tmp_path):
    path = tmp_path / "notamap.fits"
    path.write_text("this is not FITS")
    with pytest.raises(
        InputError, match=r"depth map '.*notamap.fits': cannot be read as a HEALPix"
    ):
        DepthMap.from_fits(path, _shape())


def test_effective_area_shape_follows_input():
    depth = DepthMap(np.full(12, 24.0), _shape())
    assert isinstance(effective_area_deg2(24.0, np.ones(12), depth), float)
    assert effective_area_deg2(np.full((2, 3), 24.0), np.ones(12), depth).shape == (2, 3)
