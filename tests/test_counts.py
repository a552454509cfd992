"""Tests for countscale.counts.

Outside references used here (each also named beside its check):
- Euclidean counts: uniform sources in static Euclidean space have d log10 N / dm = 0.6
  (textbook, from N(>S) ~ S^-3/2).
- Measured faint galaxy count slopes over 20-24 AB in B and I (McCracken et al. 2001, A&A 376,
  756; cited in tests/published.py), as a sanity range for counts of a Schechter population.
- Schechter 1976, ApJ 203, 297 (the form) with Blanton et al. 2003, ApJ 592, 819 parameters
  (^0.1r band at z = 0.1), in astropy's Planck18 cosmology (reference library).
- Eddington 1913, MNRAS 73, 359 (from memory): a Gaussian scatter sigma on exponential counts
  n ~ 10^(s m) multiplies them by exp((s sigma ln 10)^2 / 2) (closed form, two lines).
- Garwood 1936, Biometrika 28, 437 / Gehrels 1986, ApJ 303, 336 (from memory): Poisson
  intervals, checked against scipy.stats.poisson.
- Poisson likelihood and deviance: scipy.stats.poisson.logpmf; Fisher information
  I = sum (d mu / d theta)(d mu / d theta)^T / mu (Cramer-Rao for Poisson data; standard).
- Wilks 1938, Ann. Math. Statist. 9, 60 (from memory): profile-likelihood intervals approach
  the Hessian ones for large samples.
- Jackknife variance of a mean equals s^2 / K (Quenouille 1956, Tukey 1958; closed form).
- Fleming et al. 1995, AJ 109, 1044 / logistic completeness forms via countscale.completeness
  (inputs to the mocks); scipy.integrate.quad and mpmath.quad as integration references.
- The half-width of a normal 68 % interval in sigma: the standard normal's 84th percentile,
  scipy.stats.norm.ppf(0.84) = 0.99446.

The mocks here are generated in this file (truth known): sources drawn from a count model,
detected with a completeness curve of true magnitude, scattered with a Gaussian; binned mocks
drawn as Poisson counts; clustered mocks with lognormal density factors per region.
"""

import functools
import itertools
import math
import warnings
from dataclasses import dataclass
from typing import ClassVar

import healpy as hp
import mpmath
import numpy as np
import pytest
from astropy.cosmology import Planck18
from hypothesis import given, settings
from hypothesis import strategies as st
from published import FAINT_GALAXY_SLOPE_B_TO_I
from scipy import integrate, optimize, stats

from countscale.completeness import (
    DepthMap,
    LogisticCompleteness,
    effective_area_deg2,
    fit_completeness,
)
from countscale.counts import (
    BrokenPowerLaw,
    CountModel,
    CountsFit,
    CountsFitError,
    CountsWarning,
    DifferentialCounts,
    DoublePowerLaw,
    ForwardModel,
    IntegralCounts,
    NotFittedError,
    PowerLaw,
    combine_covariances,
    compare_models,
    differential_counts,
    fit_counts,
    format_p_bound,
    integral_counts,
    jackknife_covariance,
    poisson_interval,
)
from countscale.errors import InputError, InputTypeError
from countscale.estimate import Estimate

LN10 = math.log(10.0)


# ============================================================================ truth-known mocks
def draw_true_magnitudes(density, m_min, m_max, area_deg2, rng):
    """Poisson number of sources with true magnitudes distributed as ``density(m)`` per deg^2
    per mag on [m_min, m_max].

    The inverse CDF is tabulated with the trapezoid rule on a 0.5 mmag grid (independent of the
    module's own integrals).
    """
    grid = np.linspace(m_min, m_max, int((m_max - m_min) / 5e-4) + 1)
    values = density(grid)
    cdf = np.r_[0.0, np.cumsum(0.5 * (values[1:] + values[:-1]) * np.diff(grid))]
    n_sources = rng.poisson(area_deg2 * cdf[-1])
    return np.interp(rng.random(n_sources) * cdf[-1], cdf, grid)


def source_mock_counts(model, completeness, scatter, area_deg2, edges, rng, m_range=(14.0, 28.0)):
    """Binned observed magnitudes of detected sources.

    Detected sources are drawn directly from n(m) c(m): keeping each point of a Poisson process
    with probability c(m) gives a Poisson process of intensity n c (thinning; standard). Their
    observed magnitudes get Gaussian scatter(m_true).
    """
    true_mag = draw_true_magnitudes(lambda m: model.density(m) * completeness(m), *m_range,
                                    area_deg2, rng)
    observed = true_mag + scatter(true_mag) * rng.standard_normal(true_mag.size)
    return np.histogram(observed, edges)[0]


def clustered_region_counts(forward, model, n_regions, sigma_ln, rng):
    """Equal-area regions whose densities carry independent lognormal factors of mean 1."""
    mu = forward.expected_counts(model)
    factors = np.exp(rng.normal(0.0, sigma_ln, n_regions) - 0.5 * sigma_ln**2) / n_regions
    return rng.poisson(factors[:, None] * mu[None, :])


def complete(m):
    return np.ones_like(np.asarray(m, dtype=float))


def within_sigma(estimate, truth, k):
    # A 68 % interval spans +-0.99446 sigma of a normal: scipy.stats.norm.ppf(0.84).
    sigma = 0.5 * (estimate.interval_68[1] - estimate.interval_68[0]) / stats.norm.ppf(0.84)
    return abs(estimate.median - truth) <= k * sigma


# ============================================================================ count models
MODELS = {
    "power_law": PowerLaw(log10_norm=3.0, slope=0.45, reference_mag=22.0),
    "power_law_cut": PowerLaw(log10_norm=3.0, slope=-0.1, reference_mag=22.0, m_bright=15.0),
    "broken_flattening": BrokenPowerLaw(3.0, 0.6, 0.3, 21.0, reference_mag=22.0),
    "broken_steepening": BrokenPowerLaw(3.0, 0.3, 0.7, 23.0, reference_mag=22.0),
    "double": DoublePowerLaw(3.0, 0.6, 0.3, 21.0, transition_mag=0.4, reference_mag=22.0),
    "double_cut": DoublePowerLaw(
        3.0, 0.3, 0.6, 23.0, transition_mag=0.8, reference_mag=20.0, m_bright=16.0
    ),
}


def _breaks(model):
    return [model.m_break] if hasattr(model, "m_break") else []


@pytest.mark.parametrize("name", sorted(MODELS))
def test_every_model_is_normalised_at_its_reference_magnitude(name):
    model = MODELS[name]
    assert model.density(model.reference_mag) == pytest.approx(
        10.0**model.log10_norm, rel=1e-12
    )
    assert model.log10_density(model.reference_mag) == pytest.approx(model.log10_norm, abs=1e-12)


@pytest.mark.parametrize("name", sorted(MODELS))
def test_every_model_integral_matches_scipy_quad(name):
    model = MODELS[name]
    for lo, hi in [(17.0, 18.0), (19.3, 24.7), (21.0, 21.0), (22.9, 23.4)]:
        points = [b for b in _breaks(model) if lo < b < hi] or None
        reference, _ = integrate.quad(model.density, lo, hi, points=points, epsabs=0,
                                      epsrel=1e-12, limit=200)
        assert model.integral(lo, hi) == pytest.approx(reference, rel=1e-9, abs=1e-12)


@pytest.mark.parametrize("name", sorted(MODELS))
def test_every_model_cumulative_differences_and_derivative(name):
    model = MODELS[name]
    a = np.array([18.0, 20.5, 22.0])
    b = np.array([19.0, 23.5, 22.25])
    assert np.allclose(model.cumulative(b) - model.cumulative(a), model.integral(a, b),
                       rtol=1e-9)
    # dN(<m)/dm = n(m), by central differences away from sharp breaks.
    m = np.array([18.3, 20.1, 24.2])
    h = 1e-5
    derivative = (model.cumulative(m + h) - model.cumulative(m - h)) / (2 * h)
    assert np.allclose(derivative, model.density(m), rtol=1e-6)


@pytest.mark.parametrize("name", sorted(MODELS))
def test_every_model_cumulative_matches_mpmath_quad(name):
    model = MODELS[name]
    start = -mpmath.inf if model.m_bright is None else model.m_bright
    for m in (19.0, 23.0):
        points = [start, *[b for b in _breaks(model) if b < m], m]
        reference = mpmath.quad(lambda x: model.density(float(x)), points)
        assert model.cumulative(m) == pytest.approx(float(reference), rel=1e-8)


@pytest.mark.parametrize("name", sorted(MODELS))
def test_every_model_is_vectorised_and_leaves_input_alone(name):
    model = MODELS[name]
    m = np.linspace(18.0, 25.0, 12).reshape(3, 4)
    m.flags.writeable = False
    for method in (model.density, model.log10_density, model.cumulative, model.local_slope):
        values = method(m)
        assert values.shape == (3, 4)
        assert isinstance(method(21.0), float)
    assert model.integral(m, m + 0.5).shape == (3, 4)
    assert np.all(model.density(m) > 0)


@pytest.mark.parametrize("name", sorted(MODELS))
def test_every_model_with_params_round_trips(name):
    model = MODELS[name]
    again = model.with_params(model.params)
    assert again == model
    assert list(model.params_dict()) == list(model.param_names)
    shifted = model.with_params({"log10_norm": model.log10_norm + 1.0})
    assert shifted.density(20.0) == pytest.approx(10.0 * model.density(20.0), rel=1e-12)


def test_power_law_cumulative_is_density_over_slope_ln10():
    # Integrating 10^(s m) from -inf gives 10^(s m) / (s ln 10) (closed form).
    model = MODELS["power_law"]
    m = np.array([18.0, 22.0, 26.0])
    assert np.allclose(model.cumulative(m), model.density(m) / (0.45 * LN10), rtol=1e-13)


def test_two_slope_models_reach_their_asymptotic_slopes():
    broken = MODELS["broken_flattening"]
    double = MODELS["double"]
    for model in (broken, double):
        assert model.local_slope(15.0) == pytest.approx(0.6, abs=1e-9)
        assert model.local_slope(27.0) == pytest.approx(0.3, abs=1e-9)
    # The smooth join has the mean slope at its centre (softplus symmetry).
    assert double.local_slope(double.m_break) == pytest.approx(0.45, abs=1e-6)
    # The sharp one is continuous at the break.
    eps = 1e-9
    assert broken.log10_density(21.0 - eps) == pytest.approx(broken.log10_density(21.0 + eps))


def test_double_power_law_equals_the_classic_form_for_the_matched_width():
    # n = n_b / [10^(-a x) + 10^(-b x)] with a > b equals the softplus join with t = 1/(a - b)
    # (algebra in the DoublePowerLaw Notes); compare with the classic form written out here.
    a, b, m_b = 0.62, 0.28, 21.4
    model = DoublePowerLaw(0.0, a, b, m_b, transition_mag=1.0 / (a - b), reference_mag=m_b)
    m = np.linspace(15.0, 28.0, 27)
    x = m - m_b
    classic = 2.0 / (10.0 ** (-a * x) + 10.0 ** (-b * x))  # n_b chosen so n(m_b) = 1
    assert np.allclose(model.density(m), classic, rtol=1e-12)


def test_double_power_law_tends_to_the_broken_one():
    broken = MODELS["broken_flattening"]
    m = np.linspace(16.0, 26.0, 41)
    for width in (0.1, 0.01):
        double = DoublePowerLaw(3.0, 0.6, 0.3, 21.0, transition_mag=width, reference_mag=22.0)
        gap = np.max(np.abs(double.log10_density(m) - broken.log10_density(m)))
        # Bounded by (slope difference) * width * log10(2) twice (at m and at reference_mag).
        assert gap <= 2 * 0.3 * width * math.log10(2.0) + 1e-12


@settings(max_examples=40, deadline=None)
@given(
    norm=st.floats(-2.0, 6.0),
    slope=st.floats(0.05, 1.2),
    a=st.floats(15.0, 25.0),
    w1=st.floats(0.0, 3.0),
    w2=st.floats(0.0, 3.0),
)
def test_power_law_integral_is_additive_and_positive(norm, slope, a, w1, w2):
    model = PowerLaw(norm, slope, reference_mag=20.0)
    b, c = a + w1, a + w1 + w2
    whole = model.integral(a, c)
    assert whole >= 0
    assert model.integral(a, b) + model.integral(b, c) == pytest.approx(whole, rel=1e-12)


@settings(max_examples=40, deadline=None)
@given(
    kind=st.sampled_from([BrokenPowerLaw, DoublePowerLaw]),
    norm=st.floats(-1.0, 5.0),
    slope_bright=st.floats(0.1, 1.0),
    slope_faint=st.floats(-0.3, 1.0),
    m_break=st.floats(18.0, 24.0),
    lo=st.floats(16.0, 26.0),
    width=st.floats(0.0, 4.0),
)
def test_two_slope_models_integral_and_cumulative_agree(kind, norm, slope_bright, slope_faint,
                                                        m_break, lo, width):
    model = kind(norm, slope_bright, slope_faint, m_break, reference_mag=21.0)
    hi = lo + width
    whole = model.integral(lo, hi)
    assert whole >= 0.0
    difference = model.cumulative(hi) - model.cumulative(lo)
    assert difference == pytest.approx(whole, rel=1e-9, abs=1e-12 * model.cumulative(hi))
    assert model.local_slope(m_break - 30.0) == pytest.approx(slope_bright, abs=1e-6)


def test_cumulative_without_a_bright_cutoff_needs_a_positive_bright_slope():
    with pytest.raises(InputError, match=r"diverges at the bright end: `slope` must be > 0"):
        PowerLaw(3.0, -0.1, reference_mag=22.0).cumulative(20.0)
    with pytest.raises(InputError, match=r"`slope_bright` must be > 0 when `m_bright`"):
        BrokenPowerLaw(3.0, 0.0, 0.3, 21.0).cumulative(20.0)
    with pytest.raises(InputError, match=r"`slope_bright` must be > 0"):
        DoublePowerLaw(3.0, -0.2, 0.3, 21.0).cumulative(20.0)
    # With a cutoff the same model is fine and starts from zero there.
    cut = MODELS["power_law_cut"]
    assert cut.cumulative(15.0) == 0.0
    assert cut.cumulative(14.0) == 0.0


# The fit works on parameter vectors through private hooks (no model objects in its loop); their
# analytic gradients must be the derivatives of their values (central differences, standard).
@pytest.mark.parametrize("name", sorted(MODELS))
def test_every_model_gradient_hooks_match_central_differences(name):
    model = MODELS[name]
    values = model.params
    # Points and cells clear of a sharp break (its density has a kink there), plus, for the
    # cell means, one cell that straddles it.
    m = np.array([16.3, 18.07, 20.55, 22.21, 24.9])
    lo = np.r_[m, _breaks(model)[0] - 0.004 if _breaks(model) else 19.0]
    hi = lo + 0.01
    log10_n, gradient = model._log10_density_gradient(values, m)
    assert np.allclose(log10_n, model.log10_density(m), rtol=0, atol=1e-13)
    cell, cell_gradient = model._log10_cell_density(values, lo, hi, gradient=True)
    for i in range(values.size):
        step = np.zeros(values.size)
        step[i] = 1e-6
        numeric = (model._log10_density_at(values + step, m)
                   - model._log10_density_at(values - step, m)) / 2e-6
        assert np.allclose(gradient[i], numeric, rtol=0, atol=1e-7), model.param_names[i]
        numeric_cell = (model._log10_cell_density(values + step, lo, hi)[0]
                        - model._log10_cell_density(values - step, lo, hi)[0]) / 2e-6
        assert np.allclose(cell_gradient[i], numeric_cell, rtol=0, atol=1e-7), i
    if not isinstance(model, BrokenPowerLaw):
        # Smooth models: the midpoint value (the forward model's midpoint rule).
        assert np.allclose(cell, model.log10_density(0.5 * (lo + hi)), rtol=0, atol=1e-13)


def test_broken_power_law_cell_density_is_the_exact_cell_mean():
    # The sharp break is integrated exactly over each true-magnitude cell (scipy quad as the
    # reference), which keeps the likelihood smooth in m_break.
    model = MODELS["broken_flattening"]  # break at 21.0
    lo = np.array([20.95, 20.99, 20.996, 21.0, 21.003, 25.0])
    hi = lo + np.array([0.01, 0.01, 0.01, 0.01, 0.01, 0.5])
    cell, _ = model._log10_cell_density(model.params, lo, hi)
    for a, b, value in zip(lo, hi, cell, strict=True):
        points = [21.0] if a < 21.0 < b else None
        mean = integrate.quad(model.density, a, b, points=points, epsabs=0, epsrel=1e-13)[0] / (
            b - a)
        assert 10.0**value == pytest.approx(mean, rel=1e-12)


# ============================================================================ forward model
EDGES = np.arange(18.0, 25.01, 0.25)


def test_forward_without_scatter_is_area_times_bin_integral():
    model = MODELS["broken_flattening"]
    forward = ForwardModel(EDGES, 3.5)
    expected = 3.5 * model.integral(EDGES[:-1], EDGES[1:])
    # Midpoint rule on 0.01 mag cells: relative error ~ (0.01 ln10 s)^2 / 24 < 1e-5.
    assert np.allclose(forward.expected_counts(model), expected, rtol=1e-5)
    assert forward.grid_mag[0] > EDGES[0] and forward.grid_mag[-1] < EDGES[-1]


def test_forward_constant_scatter_gives_eddingtons_factor():
    # Eddington 1913 (from memory): convolving 10^(s m) with a Gaussian of width sigma
    # multiplies it by exp((s sigma ln10)^2 / 2) (closed form).
    model = MODELS["power_law"]
    sigma = 0.3
    forward = ForwardModel(EDGES, 2.0, scatter_mag=sigma)
    factor = math.exp((0.45 * sigma * LN10) ** 2 / 2.0)
    expected = 2.0 * factor * model.integral(EDGES[:-1], EDGES[1:])
    assert np.allclose(forward.expected_counts(model), expected, rtol=2e-5)
    # The grid reaches at least 5 sigma beyond the outer edges (sources scatter in).
    assert forward.grid_mag[0] < EDGES[0] - 5 * sigma
    assert forward.grid_mag[-1] > EDGES[-1] + 5 * sigma - 0.02


def test_forward_matches_nested_quadrature_with_varying_scatter_and_area():
    model = MODELS["double"]
    completeness = LogisticCompleteness(m50=24.0, width=0.2)

    def area(m):
        return 1.7 * completeness(m)

    def sigma(m):
        return 0.03 + 0.2 * 10.0 ** (0.4 * (np.asarray(m) - 24.0))

    forward = ForwardModel(EDGES, area, scatter_mag=sigma)
    mu = forward.expected_counts(model)
    for i in (0, 12, 22, 27):
        lo, hi = EDGES[i], EDGES[i + 1]

        def integrand(m, lo=lo, hi=hi):
            s = sigma(m)
            p = stats.norm.cdf((hi - m) / s) - stats.norm.cdf((lo - m) / s)
            return model.density(m) * area(m) * p

        reference, _ = integrate.quad(integrand, 14.0, 32.0, points=[lo, hi, 21.0], limit=400,
                                      epsabs=0, epsrel=1e-10)
        assert mu[i] == pytest.approx(reference, rel=1e-4)


def test_forward_is_linear_in_area_and_reports_bin_completeness():
    model = MODELS["power_law"]
    completeness = LogisticCompleteness(m50=23.0, width=0.2)
    one = ForwardModel(EDGES, lambda m: completeness(m), area_deg2=1.0)
    three = ForwardModel(EDGES, lambda m: 3.0 * completeness(m), area_deg2=3.0)
    assert np.allclose(three.expected_counts(model), 3.0 * one.expected_counts(model), rtol=1e-13)
    # Mean completeness over a bin: the logistic averaged over the bin (scipy quad reference).
    i = int(np.searchsorted(EDGES, 23.0))
    reference = integrate.quad(completeness, EDGES[i], EDGES[i + 1])[0] / 0.25
    assert one.bin_completeness()[i] == pytest.approx(reference, rel=1e-4)
    assert three.bin_completeness()[i] == pytest.approx(reference, rel=1e-4)


def test_forward_grid_stops_where_the_effective_area_vanishes():
    completeness = LogisticCompleteness(m50=24.5, width=0.2)

    def sigma(m):  # grows without bound, like a flux error in magnitudes
        return 0.02 + 0.3 * 10.0 ** (0.4 * (np.asarray(m) - 24.5))

    forward = ForwardModel(EDGES, lambda m: completeness(m), scatter_mag=sigma)
    # Completeness 1e-12 at m50 + w ln(1e12) = 30.03 (logistic closed form).
    assert forward.grid_mag[-1] == pytest.approx(24.5 + 0.2 * math.log(1e12), abs=0.05)
    with pytest.warns(CountsWarning, match="true-magnitude grid is cut"):
        ForwardModel(EDGES, 1.0, scatter_mag=sigma)


def test_complete_everywhere_changes_nothing():
    # A completeness of exactly 1 (logistic with m50 far beyond the data) must give the same
    # expected counts and fit as a constant area.
    model = MODELS["power_law"]
    far = LogisticCompleteness(m50=80.0, width=0.2)
    constant = ForwardModel(EDGES, 2.0, scatter_mag=0.05)
    curve = ForwardModel(EDGES, lambda m: 2.0 * far(m), scatter_mag=0.05)
    assert np.array_equal(curve.effective_area_grid_deg2, constant.effective_area_grid_deg2)
    assert np.allclose(curve.expected_counts(model), constant.expected_counts(model), rtol=1e-14)
    counts = np.random.default_rng(5).poisson(constant.expected_counts(model))
    fit_a = CountsFit(PowerLaw(reference_mag=22.0), constant, n_bootstrap=0).fit(counts)
    fit_b = CountsFit(PowerLaw(reference_mag=22.0), curve, n_bootstrap=0).fit(counts)
    assert fit_a.params_ == pytest.approx(fit_b.params_, abs=1e-9)
    assert np.allclose(fit_a.cov_, fit_b.cov_, rtol=1e-6)


def test_uniform_depth_map_equals_a_single_curve():
    nside = 4
    coverage = np.zeros(12 * nside**2)
    coverage[:10] = 1.0
    coverage[10:14] = 0.5
    depth = DepthMap(np.full(12 * nside**2, 24.2), LogisticCompleteness(m50=0.0, width=0.25))
    area = 12.0 * hp.nside2pixarea(nside, degrees=True)  # 10 + 4 * 0.5 pixels (Gorski 2005)
    single = LogisticCompleteness(m50=24.2, width=0.25)
    by_map = ForwardModel(EDGES, lambda m: effective_area_deg2(m, coverage, depth),
                          scatter_mag=0.1, area_deg2=area)
    by_curve = ForwardModel(EDGES, lambda m: area * single(m), scatter_mag=0.1, area_deg2=area)
    model = MODELS["power_law"]
    assert np.allclose(by_map.expected_counts(model), by_curve.expected_counts(model),
                       rtol=1e-12)
    counts = np.random.default_rng(9).poisson(by_curve.expected_counts(model))
    fits = [CountsFit(PowerLaw(reference_mag=22.0), fw, fit_range_mag=(18.0, 24.0),
                      n_bootstrap=0).fit(counts) for fw in (by_map, by_curve)]
    assert fits[0].params_ == pytest.approx(fits[1].params_, abs=1e-9)


def test_forward_counts_are_smooth_in_the_break_position():
    # With n taken at cell centres, d mu / d m_break would jump whenever the break crosses a
    # centre (there a node switches slope); with exact cell means it is continuous. At a cell
    # centre the gap between the one-sided difference quotients is then ~h mu'' and shrinks
    # tenfold with h (Taylor), whereas a jump would not shrink at all.
    forward = ForwardModel(EDGES, 2.0, scatter_mag=0.05)
    centre = float(forward.grid_mag[np.argmin(np.abs(forward.grid_mag - 21.0))])

    def mu(m_break):
        return forward.expected_counts(BrokenPowerLaw(3.0, 0.6, 0.3, m_break, reference_mag=22.0))

    def gap(h):
        return (mu(centre + h) - mu(centre)) / h - (mu(centre) - mu(centre - h)) / h

    coarse, fine = gap(1e-4), gap(1e-5)
    assert np.max(np.abs(coarse)) > 0.0
    assert np.all(np.abs(fine) <= 0.15 * np.abs(coarse) + 1e-6)


# ============================================================================ fits: references
def test_fit_equals_an_independent_poisson_regression_and_fisher_information():
    # Constant area, no scatter: mu_i = A * closed-form bin integral of 10^(L + s (m - 22)).
    area = 1.5
    edges = np.arange(19.0, 24.01, 0.25)

    def mu(theta):
        norm, slope = theta
        rate = slope * LN10
        lo = edges[:-1] - 22.0
        return area * 10.0**norm * (np.exp(rate * (edges[1:] - 22.0)) - np.exp(rate * lo)) / rate

    counts = np.random.default_rng(11).poisson(mu([3.0, 0.45]))

    def negative_loglike(theta):
        return -np.sum(stats.poisson.logpmf(counts, mu(theta)))

    reference = optimize.minimize(negative_loglike, [2.5, 0.5], method="Nelder-Mead",
                                  options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 5000})
    fit = CountsFit(PowerLaw(reference_mag=22.0), ForwardModel(edges, area), n_bootstrap=0)
    fit.fit(counts)
    assert fit.params_["log10_norm"] == pytest.approx(reference.x[0], abs=2e-5)
    assert fit.params_["slope"] == pytest.approx(reference.x[1], abs=2e-5)
    assert fit.loglike_ == pytest.approx(-reference.fun, abs=1e-3)
    # Fisher information sum_i (dmu/dtheta)(dmu/dtheta)^T / mu_i at the fit.
    theta = reference.x
    h = 1e-6
    jac = np.column_stack([(mu(theta + e) - mu(theta - e)) / (2 * h) for e in np.eye(2) * h])
    fisher = jac.T @ (jac / mu(theta)[:, None])
    assert np.allclose(fit.cov_poisson_, np.linalg.inv(fisher), rtol=0.02)


def test_loglike_deviance_aic_bic_follow_their_definitions():
    forward = ForwardModel(EDGES, 1.0, scatter_mag=0.1)
    counts = np.random.default_rng(12).poisson(forward.expected_counts(MODELS["double"]))
    fit = CountsFit(DoublePowerLaw(transition_mag=0.4, reference_mag=22.0), forward,
                    fit_range_mag=(18.0, 24.0), n_bootstrap=0).fit(counts)
    used = fit.used_bins_
    mu = forward.expected_counts(fit.model_)[used]
    n = counts[used]
    loglike = np.sum(stats.poisson.logpmf(n, mu))
    saturated = np.sum(stats.poisson.logpmf(n, np.maximum(n, 1e-300)))
    assert fit.loglike_ == pytest.approx(loglike, rel=1e-10)
    assert fit.deviance_ == pytest.approx(2.0 * (saturated - loglike), rel=1e-8)
    assert fit.aic_ == pytest.approx(2 * 4 - 2 * loglike, rel=1e-10)
    assert fit.bic_ == pytest.approx(4 * math.log(used.sum()) - 2 * loglike, rel=1e-10)
    assert fit.dof_ == used.sum() - 4
    assert np.array_equal(fit.expected_counts_[used], mu)


def test_profile_interval_approaches_the_hessian_interval():
    # Wilks 1938 (from memory): with many sources the profile-likelihood interval is the
    # Hessian one, value +/- sqrt(chi2_1(0.68)) sigma.
    truth = MODELS["power_law"]
    forward = ForwardModel(EDGES, 2.0)
    counts = np.random.default_rng(13).poisson(forward.expected_counts(truth))
    fit = CountsFit(PowerLaw(reference_mag=22.0), forward, n_bootstrap=0).fit(counts)
    z = math.sqrt(stats.chi2.ppf(0.68, 1))
    for index, name in enumerate(fit.model_.param_names):
        sigma = math.sqrt(fit.cov_poisson_[index, index])
        lo, hi = fit.profile_interval(name)
        value = fit.params_[name]
        assert lo == pytest.approx(value - z * sigma, abs=0.05 * sigma)
        assert hi == pytest.approx(value + z * sigma, abs=0.05 * sigma)
    lo, hi = fit.profile_interval("slope")
    lo95, hi95 = fit.profile_interval("slope", level=0.95)
    assert lo95 < lo and hi95 > hi


def test_profile_interval_of_a_break_model_brackets_the_estimate():
    truth = MODELS["broken_flattening"]
    forward = ForwardModel(EDGES, 3.0)
    counts = np.random.default_rng(14).poisson(forward.expected_counts(truth))
    fit = CountsFit(BrokenPowerLaw(reference_mag=22.0), forward, n_bootstrap=0).fit(counts)
    for name in ("slope_bright", "slope_faint", "m_break"):
        lo, hi = fit.profile_interval(name)
        assert lo < fit.params_[name] < hi
    lo, hi = fit.profile_interval("slope_faint")
    assert lo <= 0.3 + 0.02 and hi >= 0.3 - 0.02


# ============================================================================ fits: recovery
@pytest.mark.parametrize("seed", [21, 22])
def test_recovery_on_source_mocks_with_fitted_completeness_and_scatter(seed):
    rng = np.random.default_rng(seed)
    truth = PowerLaw(log10_norm=3.0, slope=0.45, reference_mag=22.0)
    true_completeness = LogisticCompleteness(m50=24.5, width=0.2)
    area = 2.0

    def sigma(m):
        return 0.02 + 0.25 * 10.0 ** (0.4 * (np.asarray(m) - 24.5))

    # Injection-recovery table: m50 and width within 3 sigma of the truth. The counts fit does
    # not propagate the completeness-fit error, so the table is large (10^4 injections) and
    # the fit stops 0.25 mag short of m50, where that error is negligible.
    injected = rng.uniform(22.5, 26.5, 10_000)
    recovered = rng.random(injected.size) < true_completeness(injected)
    completeness_fit = fit_completeness((injected, recovered))
    assert within_sigma(completeness_fit.m50, 24.5, 3)
    assert within_sigma(completeness_fit.width, 0.2, 3)

    edges = np.arange(18.0, 25.51, 0.25)
    counts = source_mock_counts(truth, true_completeness, sigma, area, edges, rng)
    fitted_curve = completeness_fit.model_
    forward = ForwardModel(edges, lambda m: area * fitted_curve(m), scatter_mag=sigma,
                           area_deg2=area)
    fit = CountsFit(PowerLaw(reference_mag=22.0), forward, fit_range_mag=(18.0, 24.25),
                    n_bootstrap=50).fit(counts, rng=seed)
    assert within_sigma(fit.estimate("slope"), 0.45, 3)
    assert within_sigma(fit.estimate("log10_norm"), 3.0, 3)
    # Meaningful precision: a few thousandths in slope and norm from ~2e4 sources.
    assert fit.estimate("slope").interval_68[1] - fit.params_["slope"] < 0.01
    assert fit.p_value_ > 0.01
    integral = fit.integral_counts(24.0, rng=seed)
    truth_total = truth.cumulative(24.0) * area
    lo95, hi95 = integral.total.interval_95
    assert lo95 <= truth_total <= hi95


@pytest.mark.parametrize("name", ["broken_flattening", "double"])
def test_recovery_of_two_slope_models_on_binned_mocks(name):
    truth = MODELS[name]
    template = type(truth)(reference_mag=22.0, **(
        {"transition_mag": truth.transition_mag} if hasattr(truth, "transition_mag") else {}))
    forward = ForwardModel(
        EDGES, 4.0, scatter_mag=lambda m: 0.02 + 0.02 * np.maximum(np.asarray(m) - 18.0, 0.0))
    counts = np.random.default_rng(31).poisson(forward.expected_counts(truth))
    fit = CountsFit(template, forward, n_bootstrap=0).fit(counts)
    for parameter in truth.param_names:
        assert within_sigma(fit.estimate(parameter), getattr(truth, parameter), 3), parameter


def test_eddington_bias_is_removed_by_the_forward_model():
    # A steep (Euclidean, slope 0.6) population with scatter reaching 0.3 mag near the limit:
    # a fit that ignores the scatter is biased beyond its error; the forward fit is not.
    rng = np.random.default_rng(41)
    truth = PowerLaw(log10_norm=4.3, slope=0.6, reference_mag=22.0)
    completeness = LogisticCompleteness(m50=24.9, width=0.15)

    def sigma(m):
        return np.maximum(0.3 * 10.0 ** (0.4 * (np.asarray(m) - 24.5)), 0.01)

    assert sigma(24.5) == pytest.approx(0.3)
    edges = np.arange(19.0, 25.01, 0.25)
    counts = source_mock_counts(truth, completeness, sigma, 1.0, edges, rng, m_range=(15.0, 27.0))

    def area(m):
        return completeness(m)

    fits = {}
    for label, scatter in (("naive", None), ("forward", sigma)):
        forward = ForwardModel(edges, area, scatter_mag=scatter, area_deg2=1.0)
        fits[label] = CountsFit(PowerLaw(reference_mag=22.0), forward,
                                fit_range_mag=(19.0, 24.5), n_bootstrap=0).fit(counts)
    naive, forward_fit = fits["naive"].estimate("slope"), fits["forward"].estimate("slope")
    assert not within_sigma(naive, 0.6, 3)
    assert naive.median > 0.6  # scatter growing with m steepens the observed counts
    assert within_sigma(forward_fit, 0.6, 3)
    assert within_sigma(fits["forward"].estimate("log10_norm"), 4.3, 3)


def test_euclidean_sources_give_slope_0_6():
    # Sources of one luminosity uniform in static Euclidean space: distances r^3-distributed,
    # so N(<m) ~ 10^(0.6 m) (textbook result, from N(>S) ~ S^-3/2).
    rng = np.random.default_rng(51)
    n_total, absolute_mag, r_max_pc = 400_000, 0.0, 1.0e6
    r_pc = r_max_pc * rng.random(n_total) ** (1.0 / 3.0)
    m = absolute_mag + 5.0 * np.log10(r_pc / 10.0)  # all sources brighter than m = 25
    edges = np.arange(17.0, 24.51, 0.25)
    counts = np.histogram(m, edges)[0]
    area = 1.0  # the cone's solid angle, in deg^2 (any value)
    fit = fit_counts(counts, ForwardModel(edges, area), PowerLaw(reference_mag=22.0),
                     n_bootstrap=0)
    slope = fit.estimate("slope")
    assert slope.median == pytest.approx(0.6, abs=0.01)
    assert within_sigma(slope, 0.6, 3)
    assert slope.interval_68[1] - slope.median < 0.005
    # Integral counts against the closed form N(<m) = n_total (r(m) / r_max)^3.
    integral = fit.integral_counts(24.0, area_deg2=area, rng=1)
    exact = n_total * 10.0 ** (0.6 * (24.0 - 25.0))
    lo, hi = integral.total.interval_95
    assert lo <= exact <= hi


def _schechter_counts_per_deg2_mag(m):
    """n(m) of a non-evolving Schechter population, no K-correction, Planck18 (astropy).

    Blanton et al. 2003, ApJ 592, 819 (^0.1r at z = 0.1): phi* = 1.49e-2 h^3 Mpc^-3,
    M* - 5 log h = -20.44, alpha = -1.05; Schechter 1976, ApJ 203, 297 form.
    """
    h = Planck18.H0.value / 100.0
    phi_star = 1.49e-2 * h**3
    m_star = -20.44 + 5.0 * math.log10(h)
    alpha = -1.05
    z = np.linspace(1e-4, 6.0, 20000)
    volume = Planck18.differential_comoving_volume(z).value  # Mpc^3 sr^-1
    modulus = Planck18.distmod(z).value
    sr_per_deg2 = (math.pi / 180.0) ** 2
    out = []
    for value in np.atleast_1d(m):
        x = 10.0 ** (0.4 * (m_star - (value - modulus)))
        phi = 0.4 * LN10 * phi_star * x ** (alpha + 1.0) * np.exp(-x)
        out.append(np.trapezoid(phi * volume, z) * sr_per_deg2)
    return np.array(out)


def test_schechter_population_counts_slope_lies_in_the_measured_range():
    # Sanity range: the published faint-galaxy slopes over 20-24 AB, from I to B
    # (tests/published.py). This population has no evolution and no K-correction, so it is
    # not the real sky; its slope (0.37) must still be a faint-galaxy slope.
    edges = np.arange(20.0, 24.01, 0.25)
    fine = np.linspace(20.0, 24.0, 161)
    density = _schechter_counts_per_deg2_mag(fine)
    per_bin = np.array([np.trapezoid(density[(fine >= lo - 1e-9) & (fine <= hi + 1e-9)],
                                     fine[(fine >= lo - 1e-9) & (fine <= hi + 1e-9)])
                        for lo, hi in itertools.pairwise(edges)])
    area = 0.05
    counts = np.random.default_rng(61).poisson(area * per_bin)
    fit = fit_counts(counts, ForwardModel(edges, area), "power_law", n_bootstrap=0)
    assert FAINT_GALAXY_SLOPE_B_TO_I[0] <= fit.params_["slope"] <= FAINT_GALAXY_SLOPE_B_TO_I[1]
    # And n(22) within a factor 3 of 10^4 deg^-2 mag^-1 (common figure, no source).
    assert 10**3.5 <= fit.model_.density(22.0) <= 10**4.5


# ============================================================================ fits: optimiser
def test_two_slope_fit_equals_an_independent_scipy_optimum():
    # The Newton fit (analytic gradients, profiled normalisation) against scipy's Nelder-Mead
    # on scipy.stats.poisson.logpmf of the same expected counts, started from the truth.
    truth = MODELS["double"]
    forward = ForwardModel(EDGES, 2.0, scatter_mag=0.05)
    counts = np.random.default_rng(201).poisson(forward.expected_counts(truth))
    template = DoublePowerLaw(transition_mag=0.4, reference_mag=22.0)
    fit = CountsFit(template, forward, n_bootstrap=0).fit(counts)

    def negative_loglike(theta):
        mu = forward.expected_counts(template.with_params(theta))
        return -np.sum(stats.poisson.logpmf(counts, mu))

    reference = optimize.minimize(negative_loglike, truth.params, method="Nelder-Mead",
                                  options={"xatol": 1e-9, "fatol": 1e-9, "maxfev": 20000})
    sigma = np.sqrt(np.diag(fit.cov_poisson_))
    assert np.all(np.abs(fit.model_.params - reference.x) < 1e-3 * sigma)
    assert fit.loglike_ >= -reference.fun - 1e-7


def test_user_model_with_only_a_density_fits_like_the_built_in():
    # A subclass that implements only the required hooks goes through the generic parameter-
    # vector path (model rebuilt per evaluation, gradient by central differences); the same
    # power law written that way must give the built-in's fit.
    @dataclass(frozen=True)
    class Exponential(CountModel):
        log10_norm: float = 0.0
        rate_per_mag: float = 1.0  # d ln n / dm = slope ln 10
        reference_mag: float = 22.0
        m_bright: float | None = None
        name: ClassVar[str] = "exponential"
        param_names: ClassVar[tuple[str, ...]] = ("log10_norm", "rate_per_mag")

        def _log10_density(self, m):
            return self.log10_norm + self.rate_per_mag * (m - self.reference_mag) / LN10

        def _initial_params(self, m, log10_n, m_lo, m_hi):
            return {"log10_norm": float(np.mean(log10_n)), "rate_per_mag": 1.0}

    forward = ForwardModel(EDGES, 2.0, scatter_mag=0.1)
    counts = np.random.default_rng(202).poisson(forward.expected_counts(MODELS["power_law"]))
    mine = CountsFit(Exponential(), forward, n_bootstrap=0).fit(counts)
    built_in = CountsFit(PowerLaw(reference_mag=22.0), forward, n_bootstrap=0).fit(counts)
    assert mine.params_["log10_norm"] == pytest.approx(built_in.params_["log10_norm"], abs=1e-7)
    assert mine.params_["rate_per_mag"] / LN10 == pytest.approx(built_in.params_["slope"],
                                                                abs=1e-7)
    assert mine.loglike_ == pytest.approx(built_in.loglike_, abs=1e-8)
    # Same curvature, in its own units (the rate is slope ln 10).
    assert mine.cov_poisson_[1, 1] / LN10**2 == pytest.approx(built_in.cov_poisson_[1, 1],
                                                              rel=1e-3)


def test_break_on_its_limit_warns():
    # A steepening inside the last bin (a pile-up of ~1e5 sources there): the fit keeps m_break
    # two bins inside the range (nearer, the short side's slope rests on one bin and trades off
    # with the break) and says so.
    forward = ForwardModel(EDGES, 3.0)
    truth = BrokenPowerLaw(3.0, 0.4, 2.0, 23.9, reference_mag=22.0)
    counts = np.random.default_rng(203).poisson(forward.expected_counts(truth))
    with pytest.warns(CountsWarning, match=r"`m_break` of broken_power_law sits on its faint "
                                           r"limit 23.5 mag \(two bins inside the fit range "
                                           r"\[18, 24\]\)"):
        fit = CountsFit(BrokenPowerLaw(reference_mag=22.0), forward, fit_range_mag=(18.0, 24.0),
                        n_bootstrap=0).fit(counts)
    assert fit.params_["m_break"] == 23.5


def test_a_p_value_no_redraw_reaches_is_reported_as_a_bound():
    # Strongly curved counts fitted by a straight power law: no parametric-bootstrap redraw is
    # as far from the model as the data, so the estimate (1 + 0) / (B + 1) is only an upper
    # bound on p (Davison & Hinkley 1997, sec. 4.2; from memory) and must read "p < ...".
    forward = ForwardModel(EDGES, 1.0)
    counts = np.random.default_rng(7).poisson(
        forward.expected_counts(BrokenPowerLaw(4.0, 0.7, 0.1, 21.5, reference_mag=22.0)))
    fit = CountsFit(PowerLaw(reference_mag=22.0), forward, n_bootstrap=50).fit(counts, rng=1)
    assert fit.p_value_is_bound_ is True
    assert fit.p_value_ == 1.0 / 51.0
    data = fit.to_json()
    assert (data["p_value_is_bound"], data["n_bootstrap"]) == (True, 50)
    assert "bootstrap p < 0.02, no redraw as extreme" in fit.summary()
    # An informative case is an estimate, not a bound.
    fair = CountsFit(PowerLaw(reference_mag=22.0), forward, n_bootstrap=50).fit(
        np.random.default_rng(8).poisson(forward.expected_counts(MODELS["power_law"])), rng=1)
    assert fair.p_value_is_bound_ is False
    assert CountsFit(PowerLaw(reference_mag=22.0), forward, n_bootstrap=0).fit(
        counts).to_json()["p_value_is_bound"] is None


@pytest.mark.parametrize(("bound", "text"), [
    (1 / 201, "0.005"), (1 / 51, "0.02"), (1 / 61, "0.017"), (1 / 1001, "0.001"), (0.5, "0.5"),
    (1.0, "1"),
])
def test_a_p_value_bound_is_rounded_up(bound, text):
    # The text never states a bound below the true one: "p < 0.0049" for 1/201 would claim
    # more than 200 redraws can show.
    assert format_p_bound(bound) == text
    assert float(text) >= bound


def test_a_p_value_bound_outside_0_1_is_refused():
    with pytest.raises(InputError, match=r"^`bound` must be in \(0, 1\]; got 0.0$"):
        format_p_bound(0.0)


def test_bootstrap_p_value_states_its_monte_carlo_error():
    # p_value_error_ is the binomial standard error sqrt(p (1 - p) / B) (closed form), and it
    # describes the seed-to-seed scatter of the p-value: 12 seeds' p-values scatter with a
    # standard deviation within a factor 2 of it (the sample sd of 12 values has a relative
    # spread ~ 1 / sqrt(22) ~ 0.2).
    forward = ForwardModel(EDGES, 1.0, scatter_mag=0.05)
    counts = np.random.default_rng(204).poisson(forward.expected_counts(MODELS["power_law"]))
    p_values, errors = [], []
    for seed in range(12):
        fit = CountsFit(PowerLaw(reference_mag=22.0), forward, n_bootstrap=60).fit(counts,
                                                                                   rng=seed)
        p = fit.p_value_
        assert fit.p_value_error_ == pytest.approx(math.sqrt(p * (1.0 - p) / 60), rel=1e-12)
        p_values.append(p)
        errors.append(fit.p_value_error_)
    assert 0.1 < np.mean(p_values) < 0.9  # an informative case, not p at its floor
    assert 0.5 < np.std(p_values, ddof=1) / np.mean(errors) < 2.0
    assert fit.to_json()["p_value_error"] == pytest.approx(fit.p_value_error_)
    assert "+/-" in fit.summary()
    assert CountsFit(PowerLaw(reference_mag=22.0), forward, n_bootstrap=0).fit(
        counts).p_value_error_ is None


# Counts of a Schechter population: they curve gently (d log10 n / dm falls from ~0.51 at
# m = 18 to ~0.39 at 21.8 for the parameters of _schechter_counts_per_deg2_mag), so over a wide
# range a power law misfits large samples and the two-slope models must converge and win.
CURVED_EDGES = np.arange(16.0, 23.01, 0.2)
CURVED_RANGE = (18.0, 21.8)
CURVED_MODELS = ("power_law", "broken_power_law", "double_power_law")


@functools.lru_cache(maxsize=1)
def _schechter_table():
    grid = np.arange(13.0, 29.01, 0.05)
    return grid, np.log10(_schechter_counts_per_deg2_mag(grid))


class _TabulatedCounts:
    """n(m) interpolated in log10 n from a table; all the mocks need is ``density``."""

    def __init__(self, grid, log10_n):
        self.grid, self.log10_n = grid, log10_n

    def density(self, m):
        return 10.0 ** np.interp(m, self.grid, self.log10_n)


def schechter_mock(area_deg2, rng):
    """Observed counts and forward model of a survey of the Schechter population (m50 = 22.8)."""
    completeness = LogisticCompleteness(m50=22.8, width=0.2)

    def sigma(m):
        return 0.01 + 0.1 * 10.0 ** (0.4 * (np.asarray(m) - 22.8))

    counts = source_mock_counts(_TabulatedCounts(*_schechter_table()), completeness, sigma,
                                area_deg2, CURVED_EDGES, rng, m_range=(13.0, 27.0))
    forward = ForwardModel(CURVED_EDGES, lambda m: area_deg2 * completeness(m),
                           scatter_mag=sigma, area_deg2=area_deg2)
    return counts, forward


def test_curved_counts_all_models_converge_and_the_curved_ones_win():
    # ~2.7e5 sources over 40 deg^2: the size of sample on which the earlier simplex optimiser
    # ran out of evaluations (the rounding noise of ln L reached its tolerance); with these
    # seeds it did so in a bootstrap refit of the double power law.
    counts, forward = schechter_mock(40.0, np.random.default_rng(1))
    fits = {name: CountsFit(name, forward, fit_range_mag=CURVED_RANGE, n_bootstrap=40).fit(
        counts, rng=1) for name in CURVED_MODELS}
    power = fits["power_law"]
    assert power.n_sources_ > 2e5
    # Deviance on 17 dof far in the chi-squared tail (scipy.stats.chi2); no redraw as bad.
    assert stats.chi2.sf(power.deviance_, power.dof_) < 1e-10
    assert power.p_value_ == pytest.approx(1.0 / 41.0)
    grid, log10_n = _schechter_table()
    true_slope = np.gradient(log10_n, grid)
    slope_at = {m: float(np.interp(m, grid, true_slope)) for m in CURVED_RANGE}
    for name in ("broken_power_law", "double_power_law"):
        fit = fits[name]
        assert stats.chi2.sf(fit.deviance_, fit.dof_) > 1e-3, name
        # The counts flatten: bright slope above the faint one by > 3 sigma, both between the
        # truth's local slopes at the ends of the range (loosely: a two-slope fit averages).
        cov = fit.cov_poisson_
        difference = fit.params_["slope_bright"] - fit.params_["slope_faint"]
        assert difference > 3.0 * math.sqrt(cov[1, 1] + cov[2, 2] - 2.0 * cov[1, 2]), name
        assert slope_at[21.8] - 0.02 < fit.params_["slope_faint"], name
        assert fit.params_["slope_bright"] < slope_at[18.0] + 0.02, name
        assert CURVED_RANGE[0] < fit.params_["m_break"] < CURVED_RANGE[1]
    comparison = compare_models([fits[name] for name in CURVED_MODELS])
    assert comparison.best_aic != "power_law" and comparison.best_bic != "power_law"
    # Delta BIC > 10: "very strong" evidence (Kass & Raftery 1995, JASA 90, 773; from memory).
    assert comparison.delta_bic[0] > 10.0


def test_curvature_below_significance_leaves_the_power_law_preferred():
    # The same population over 0.2 deg^2 (~1400 sources): the curvature (expected deviance
    # gain ~1) is within the noise, so BIC (penalty 2 ln 19 = 5.9 for the two extra
    # parameters) should keep the power law in most of 8 mocks. A break the data do not
    # constrain (on its limit, curvature not positive definite) is a CountsFitError, as
    # documented; such a model drops out of that mock's comparison.
    kept, compared = 0, 0
    for seed in range(8):
        counts, forward = schechter_mock(0.2, np.random.default_rng(seed))
        fits = []
        for name in CURVED_MODELS:
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", CountsWarning)  # a break on its limit
                    fits.append(CountsFit(name, forward, fit_range_mag=CURVED_RANGE,
                                          n_bootstrap=0).fit(counts))
            except CountsFitError as error:
                assert name != "power_law"
                assert "not positive definite" in str(error)
        assert stats.chi2.sf(fits[0].deviance_, fits[0].dof_) > 1e-3
        if len(fits) > 1:
            compared += 1
            kept += compare_models(fits).best_bic == "power_law"
    assert compared >= 6
    assert kept >= compared - 2


def test_jackknife_refits_are_the_delete_one_maxima():
    # Each jackknife vector must be the maximum-likelihood fit of the data without its region,
    # not a nearby local maximum: with sharp bins the likelihood in m_break has several. Here
    # the region shares drift with magnitude (clustering that depends on luminosity), which is
    # what moves the best break between neighbouring maxima; each delete-one sample is then
    # fitted afresh (full search from the data) and compared.
    rng = np.random.default_rng(3)
    area, k = 10.0, 16
    counts, forward = schechter_mock(area, rng)
    centres = 0.5 * (CURVED_EDGES[1:] + CURVED_EDGES[:-1])
    drift = np.exp(rng.normal(0.0, 0.1, (k, 1)) + rng.normal(0.0, 0.1, (k, 1)) * (centres - 20.0))
    shares = drift / drift.sum(axis=0)
    regions = np.array([rng.multinomial(n, shares[:, i]) for i, n in enumerate(counts)]).T
    fit = CountsFit("broken_power_law", forward, fit_range_mag=CURVED_RANGE, n_bootstrap=0).fit(
        counts, region_counts=regions, region_effective_area_deg2=[area / k] * k)
    sigma = np.sqrt(np.diag(fit.cov_poisson_))
    completeness = LogisticCompleteness(m50=22.8, width=0.2)
    for region in range(k):
        # Uniform region shares: without region k the effective area is (1 - 1/k) A_eff.
        fresh_forward = ForwardModel(CURVED_EDGES,
                                     lambda m: area * (1 - 1 / k) * completeness(m),
                                     scatter_mag=forward._scatter_fn,
                                     area_deg2=area * (1 - 1 / k))
        fresh = CountsFit("broken_power_law", fresh_forward, fit_range_mag=CURVED_RANGE,
                          n_bootstrap=0).fit(counts - regions[region])
        assert np.all(np.abs(fit.jackknife_params_[region] - fresh.model_.params)
                      < 1e-3 * sigma), region


# ============================================================================ goodness of fit
def test_misfit_model_is_flagged_and_the_right_one_preferred():
    truth = MODELS["broken_flattening"]
    forward = ForwardModel(EDGES, 4.0)
    counts = np.random.default_rng(71).poisson(forward.expected_counts(truth))
    power = CountsFit(PowerLaw(reference_mag=22.0), forward, n_bootstrap=40).fit(counts, rng=1)
    broken = CountsFit(BrokenPowerLaw(reference_mag=22.0), forward, n_bootstrap=40).fit(
        counts, rng=1)
    assert power.p_value_ == pytest.approx(1.0 / 41.0)  # no redraw is as bad as the data
    assert broken.p_value_ > 0.05
    comparison = compare_models([power, broken])
    assert comparison.best_aic == "broken_power_law"
    assert comparison.best_bic == "broken_power_law"
    assert comparison.delta_bic[0] > 10.0
    assert sum(comparison.akaike_weights) == pytest.approx(1.0)
    assert comparison.to_json()["models"]["power_law"]["aic"] == pytest.approx(power.aic_)


def test_well_specified_fit_deviance_is_near_its_degrees_of_freedom():
    forward = ForwardModel(EDGES, 1.0, scatter_mag=0.05)
    deviances, p_values = [], []
    for seed in range(8):
        counts = np.random.default_rng(100 + seed).poisson(
            forward.expected_counts(MODELS["power_law"]))
        fit = CountsFit(PowerLaw(reference_mag=22.0), forward, n_bootstrap=30).fit(counts,
                                                                                  rng=seed)
        deviances.append(fit.deviance_ / fit.dof_)
        p_values.append(fit.p_value_)
    # Mean of 8 chi2_26 / 26 draws: 1 +/- 0.1 (closed form); allow 3 sigma.
    assert abs(np.mean(deviances) - 1.0) < 0.3
    assert min(p_values) > 0.01


# ============================================================================ jackknife
def test_jackknife_covariance_of_a_mean_is_the_sample_variance_over_k():
    # Delete-one means of K values: the jackknife variance equals s^2 / K (closed form).
    values = np.random.default_rng(81).normal(size=(15, 3))
    delete_one = (values.sum(axis=0) - values) / 14.0
    expected = np.cov(values, rowvar=False) / 15.0
    assert np.allclose(jackknife_covariance(delete_one), expected, rtol=1e-12)
    assert jackknife_covariance(delete_one[:, 0]) == pytest.approx(expected[0, 0], rel=1e-12)


def test_combine_covariances_keeps_the_poisson_floor():
    poisson = np.diag([1.0, 4.0])
    # One dimension: the larger of the two variances.
    assert combine_covariances([[2.0]], [[5.0]])[0, 0] == pytest.approx(5.0)
    assert combine_covariances([[2.0]], [[1.0]])[0, 0] == pytest.approx(2.0)
    jack = np.array([[3.0, 0.5], [0.5, 2.0]])
    total = combine_covariances(poisson, jack)
    assert np.all(np.linalg.eigvalsh(total - poisson) >= -1e-12)
    assert total[0, 0] >= 3.0 - 1e-12 and total[1, 1] >= 4.0 - 1e-12


def test_clustering_widens_the_errors_and_the_budget_says_so():
    truth = MODELS["power_law"]
    edges = np.arange(18.0, 24.01, 0.25)
    area, k = 8.0, 16
    forward = ForwardModel(edges, area)
    clustered = clustered_region_counts(forward, truth, k, 0.25, np.random.default_rng(91))
    fit = CountsFit(PowerLaw(reference_mag=21.0), forward, n_bootstrap=0).fit(
        clustered.sum(axis=0), region_counts=clustered, region_effective_area_deg2=[area / k] * k)
    norm = fit.estimate("log10_norm")
    assert fit.cov_[0, 0] > 5.0 * fit.cov_poisson_[0, 0]
    assert norm.budget["cosmic_variance"] > 0.8
    assert sum(norm.budget.values()) == pytest.approx(1.0)
    integral = fit.integral_counts(23.0, rng=2)
    assert integral.per_deg2.budget["cosmic_variance"] > 0.8
    # The same counts without clustering: jackknife ~ Poisson (K = 16: the 99 % range of
    # chi2_15 / 15 is 0.31-2.19, scipy.stats.chi2).
    plain = clustered_region_counts(forward, truth, k, 1e-9, np.random.default_rng(92))
    fit_plain = CountsFit(PowerLaw(reference_mag=21.0), forward, n_bootstrap=0).fit(
        plain.sum(axis=0), region_counts=plain, region_effective_area_deg2=[area / k] * k)
    ratio = np.diag(fit_plain.cov_jackknife_) / np.diag(fit_plain.cov_poisson_)
    assert np.all((ratio > 0.3) & (ratio < 2.5))
    assert fit_plain.estimate("log10_norm").budget["poisson"] > 0.5


def test_region_effective_area_callables_equal_uniform_shares():
    truth = MODELS["power_law"]
    edges = np.arange(18.0, 24.01, 0.5)
    completeness = LogisticCompleteness(m50=24.3, width=0.2)
    shares = np.array([0.2, 0.3, 0.25, 0.25])
    forward = ForwardModel(edges, lambda m: 4.0 * completeness(m), area_deg2=4.0)
    regions = clustered_region_counts(forward, truth, 4, 0.1, np.random.default_rng(93))
    by_areas = CountsFit(PowerLaw(reference_mag=21.0), forward, n_bootstrap=0).fit(
        regions.sum(axis=0), region_counts=regions, region_effective_area_deg2=4.0 * shares)
    callables = [lambda m, s=s: 4.0 * s * completeness(m) for s in shares]
    by_curves = CountsFit(PowerLaw(reference_mag=21.0), forward, n_bootstrap=0).fit(
        regions.sum(axis=0), region_counts=regions, region_effective_area_deg2=callables)
    assert np.allclose(by_areas.cov_jackknife_, by_curves.cov_jackknife_, rtol=1e-8)


# ============================================================================ calibration
def clustered_coverage(n_mocks, seed, n_regions=16, sigma_ln=0.2):
    """Coverage of the 68 % intervals of N(<23) over the footprint and of the slope."""
    truth = MODELS["power_law"]
    edges = np.arange(18.0, 24.01, 0.25)
    area = 8.0
    forward = ForwardModel(edges, area)
    truth_total = truth.cumulative(23.0) * area
    rng = np.random.default_rng(seed)
    hits = {"total": 0, "total_poisson_only": 0, "slope": 0}
    for _ in range(n_mocks):
        regions = clustered_region_counts(forward, truth, n_regions, sigma_ln, rng)
        counts = regions.sum(axis=0)
        fit = CountsFit(PowerLaw(reference_mag=21.0), forward, n_bootstrap=0).fit(
            counts, region_counts=regions,
            region_effective_area_deg2=[area / n_regions] * n_regions)
        lo, hi = fit.integral_counts(23.0, n_draws=500, rng=rng).total.interval_68
        hits["total"] += lo <= truth_total <= hi
        lo, hi = fit.estimate("slope").interval_68
        hits["slope"] += lo <= 0.45 <= hi
        poisson_only = CountsFit(PowerLaw(reference_mag=21.0), forward, n_bootstrap=0).fit(counts)
        lo, hi = poisson_only.integral_counts(23.0, n_draws=500, rng=rng).total.interval_68
        hits["total_poisson_only"] += lo <= truth_total <= hi
    return {key: value / n_mocks for key, value in hits.items()}


def test_calibration_reduced_clustered_mocks():
    # 60 mocks: the binomial 99 % range around 0.68 is 0.53-0.83 (sd 0.06); the full version
    # below holds the 60-76 % band on 600 mocks.
    coverage = clustered_coverage(60, seed=2024)
    assert 0.53 <= coverage["total"] <= 0.83
    assert 0.53 <= coverage["slope"] <= 0.83
    # Poisson-only intervals ignore clustering (sigma_ln 0.2 over 16 regions is ~5 % on N,
    # against ~1 % Poisson) and must under-cover badly.
    assert coverage["total_poisson_only"] < 0.4


@pytest.mark.slow
def test_calibration_full_clustered_mocks():
    coverage = clustered_coverage(600, seed=7)
    assert 0.60 <= coverage["total"] <= 0.76
    # The slope is Poisson-dominated here (the lognormal factors do not depend on magnitude),
    # where keeping the larger of a noisy jackknife and the Poisson variance is conservative by
    # construction: ~0.55 x 68 % + 0.45 x ~82 % ~ 75 % expected (chi2_15 / 15 > 1 with
    # probability 0.45). So the slope's band is 60-80 %.
    assert 0.60 <= coverage["slope"] <= 0.80
    assert coverage["total_poisson_only"] < 0.4


def source_level_coverage(n_mocks, seed):
    """Unclustered source-level mocks with completeness and scatter: 68 % coverage."""
    truth = PowerLaw(log10_norm=2.5, slope=0.45, reference_mag=22.0)
    completeness = LogisticCompleteness(m50=24.5, width=0.2)
    area = 1.0

    def sigma(m):
        return 0.02 + 0.25 * 10.0 ** (0.4 * (np.asarray(m) - 24.5))

    edges = np.arange(19.0, 25.01, 0.25)
    forward = ForwardModel(edges, lambda m: area * completeness(m), scatter_mag=sigma)
    rng = np.random.default_rng(seed)
    truth_total = truth.cumulative(24.0) * area
    hits = {"slope": 0, "log10_norm": 0, "total": 0}
    for _ in range(n_mocks):
        counts = source_mock_counts(truth, completeness, sigma, area, edges, rng,
                                    m_range=(16.0, 27.0))
        fit = CountsFit(PowerLaw(reference_mag=22.0), forward, fit_range_mag=(19.0, 24.5),
                        n_bootstrap=0).fit(counts)
        for name in ("slope", "log10_norm"):
            lo, hi = fit.estimate(name).interval_68
            hits[name] += lo <= getattr(truth, name) <= hi
        lo, hi = fit.integral_counts(24.0, n_draws=500, rng=rng).total.interval_68
        hits["total"] += lo <= truth_total <= hi
    return {key: value / n_mocks for key, value in hits.items()}


def test_calibration_reduced_source_level_mocks():
    coverage = source_level_coverage(40, seed=3)
    # 40 mocks: binomial 99 % range around 0.68 is 0.49-0.87.
    for name, value in coverage.items():
        assert 0.49 <= value <= 0.87, (name, value)


@pytest.mark.slow
def test_calibration_full_source_level_mocks():
    coverage = source_level_coverage(500, seed=4)
    for name, value in coverage.items():
        assert 0.60 <= value <= 0.76, (name, value)


# ============================================================================ results
def test_integral_counts_estimates_and_json():
    truth = MODELS["power_law"]
    forward = ForwardModel(EDGES, 2.5)
    counts = np.random.default_rng(101).poisson(forward.expected_counts(truth))
    fit = CountsFit(PowerLaw(reference_mag=22.0), forward, n_bootstrap=0).fit(counts)
    result = integral_counts(fit, 23.0, rng=5)
    assert isinstance(result, IntegralCounts)
    assert result.total.median == pytest.approx(result.per_deg2.median * 2.5, rel=1e-12)
    assert result.per_deg2.unit == "deg^-2"
    assert result.per_deg2.n_draws == 4000
    assert result.per_deg2.median == pytest.approx(fit.model_.cumulative(23.0), rel=0.01)
    assert result.per_deg2.budget == {"poisson": 1.0}
    again = fit.integral_counts(23.0, rng=5)
    assert np.array_equal(again.per_deg2.draws, result.per_deg2.draws)
    payload = result.to_json()
    assert Estimate.from_json(payload["per_deg2"]).median == pytest.approx(
        result.per_deg2.median)
    assert payload["area_deg2"] == 2.5 and payload["m_limit"] == 23.0
    with pytest.warns(CountsWarning, match=r"`m_limit` 26 is 1 mag fainter than the fit range"):
        fit.integral_counts(26.0, rng=1)


def test_integral_counts_divergent_draws_are_an_error():
    # A bright slope consistent with zero (few sources, flat counts) makes N(<m) diverge for
    # some draws: a clear error rather than a silently infinite interval.
    edges = np.arange(20.0, 21.01, 0.25)
    forward = ForwardModel(edges, 1.0)
    counts = [26, 28, 30, 31]
    fit = CountsFit(PowerLaw(reference_mag=20.5), forward, n_bootstrap=0).fit(counts)
    assert 0.0 < fit.params_["slope"] < fit.estimate("slope").interval_68[1] - fit.params_["slope"]
    with pytest.raises(CountsFitError, match=r"diverges or vanishes for \d+ of 4000"):
        fit.integral_counts(21.0, rng=1)
    cut = CountsFit(PowerLaw(reference_mag=20.5, m_bright=15.0), forward, n_bootstrap=0)
    cut.fit(counts)
    assert cut.integral_counts(21.0, rng=1).per_deg2.median > 0


def test_integral_counts_of_a_fitted_slope_below_zero_is_a_fit_error():
    # Counts falling with magnitude give a fitted slope < 0, so N(<m) from -infinity diverges
    # at the fit itself (closed form: the integral of 10^(s m) needs s > 0): a fit outcome,
    # reported as CountsFitError (not as bad input).
    forward = ForwardModel(np.arange(20.0, 21.01, 0.25), 1.0)
    fit = CountsFit(PowerLaw(reference_mag=20.5), forward, n_bootstrap=0).fit([60, 55, 50, 45])
    assert fit.params_["slope"] < 0.0
    with pytest.raises(CountsFitError, match=r"N\(<21\) diverges at the fitted parameters \(.*"
                                             r"`slope` must be > 0.*\); set `m_bright`"):
        fit.integral_counts(21.0, rng=1)


def test_fit_json_has_design_names_and_estimates():
    forward = ForwardModel(EDGES, 3.0)
    truth = MODELS["broken_flattening"]
    counts = np.random.default_rng(102).poisson(forward.expected_counts(truth))
    fit = CountsFit("broken_power_law", forward, n_bootstrap=10).fit(counts, rng=3)
    payload = fit.to_json()
    assert payload["model"] == "broken_power_law"
    assert payload["reference_mag"] == 21.5  # middle of 18-25, rounded to 0.5 mag
    for name in ("log10_norm", "slope_bright", "slope_faint", "m_break"):
        assert set(payload[name]) == {"median", "interval_68", "interval_95", "unit", "budget"}
        Estimate.from_json(payload[name])
    assert payload["m_break"]["unit"] == "mag"
    assert payload["n_sources"] == int(counts.sum())
    assert 0 < payload["p_value"] <= 1
    assert "broken_power_law fit to" in fit.summary()


def test_differential_counts_raw_and_corrected():
    truth = MODELS["power_law"]
    completeness = LogisticCompleteness(m50=24.0, width=0.2)
    forward = ForwardModel(EDGES, lambda m: 2.0 * completeness(m), scatter_mag=0.05,
                           area_deg2=2.0)
    counts = np.random.default_rng(103).poisson(forward.expected_counts(truth))
    plain = differential_counts(counts, forward)
    assert isinstance(plain, DifferentialCounts)
    widths = np.diff(EDGES)
    assert np.allclose(plain.raw_density, counts / (2.0 * widths))
    assert plain.correction == "effective_area"
    # Garwood bounds: P(X >= n | lo) = P(X <= n | hi) = 0.16 (scipy.stats.poisson).
    n = counts[5]
    lo, hi = plain.raw_interval_68[5] * 2.0 * 0.25
    assert stats.poisson.sf(n - 1, lo) == pytest.approx(0.16, abs=1e-9)
    assert stats.poisson.cdf(n, hi) == pytest.approx(0.16, abs=1e-9)
    fit = CountsFit(PowerLaw(reference_mag=22.0), forward, fit_range_mag=(18.0, 24.0),
                    n_bootstrap=0).fit(counts)
    corrected = fit.differential_counts()
    assert corrected.correction == "forward_model"
    # Corrected counts scatter around the fitted model with Poisson-sized residuals.
    used = corrected.used_in_fit
    pulls = (corrected.corrected_density - corrected.model_density)[used] / (
        corrected.model_density[used] / np.sqrt(counts[used]))
    assert abs(np.mean(pulls)) < 1.0 and 0.5 < np.std(pulls) < 1.6
    payload = corrected.to_json()
    assert payload["unit"] == "deg^-2 mag^-1" and len(payload["n_observed"]) == EDGES.size - 1
    assert payload["corrected_interval_68_full"] is None


def test_differential_counts_complete_and_sharp_equals_raw():
    forward = ForwardModel(EDGES, 1.5)
    counts = np.random.default_rng(104).poisson(forward.expected_counts(MODELS["power_law"]))
    result = differential_counts(counts, forward)
    assert np.allclose(result.corrected_density, result.raw_density, rtol=1e-12)
    assert np.allclose(result.completeness, 1.0)


def test_differential_counts_full_intervals_contain_poisson_ones():
    truth = MODELS["power_law"]
    edges = np.arange(18.0, 24.01, 0.5)
    forward = ForwardModel(edges, 8.0)
    regions = clustered_region_counts(forward, truth, 12, 0.3, np.random.default_rng(105))
    fit = CountsFit(PowerLaw(reference_mag=21.0), forward, n_bootstrap=0).fit(
        regions.sum(axis=0), region_counts=regions, region_effective_area_deg2=[8.0 / 12] * 12)
    result = fit.differential_counts()
    full, poisson = result.corrected_interval_68_full, result.corrected_interval_68
    assert np.all(full[:, 0] <= poisson[:, 0] + 1e-12)
    assert np.all(full[:, 1] >= poisson[:, 1] - 1e-12)
    # With sigma_ln = 0.3 the clustering term dominates where counts are large.
    width_ratio = (full[:, 1] - full[:, 0]) / (poisson[:, 1] - poisson[:, 0])
    assert width_ratio[-1] > 3.0
    same = differential_counts(regions.sum(axis=0), forward, fit, regions, [8.0 / 12] * 12)
    assert np.allclose(same.corrected_interval_68_full, full)


def test_poisson_interval_matches_scipy_definition():
    for n in (0, 1, 7, 250):
        lo, hi = poisson_interval(n, level=0.9)
        assert stats.poisson.cdf(n, hi) == pytest.approx(0.05, abs=1e-9)
        if n:
            assert stats.poisson.sf(n - 1, lo) == pytest.approx(0.05, abs=1e-9)
        else:
            assert lo == 0.0
    lo, hi = poisson_interval([0, 3])
    assert lo.shape == (2,)


# ============================================================================ behaviour
def test_fit_is_deterministic_given_the_seed_and_leaves_inputs_alone():
    forward = ForwardModel(EDGES, 2.0, scatter_mag=0.1)
    counts = np.random.default_rng(111).poisson(forward.expected_counts(MODELS["power_law"]))
    counts.flags.writeable = False
    keep = counts.copy()
    first = CountsFit(PowerLaw(reference_mag=22.0), forward, n_bootstrap=20).fit(counts, rng=4)
    second = CountsFit(PowerLaw(reference_mag=22.0), forward, n_bootstrap=20).fit(
        counts, rng=np.random.default_rng(4))
    assert first.p_value_ == second.p_value_
    assert first.params_ == second.params_
    assert np.array_equal(counts, keep)


def test_unfitted_results_say_so():
    fit = CountsFit(PowerLaw(), ForwardModel(EDGES, 1.0))
    for action in (lambda: fit.params_, lambda: fit.estimate("slope"), fit.to_json,
                   lambda: fit.profile_interval("slope"), lambda: fit.integral_counts(22.0),
                   fit.differential_counts):
        with pytest.raises(NotFittedError, match="not fitted yet"):
            action()
    assert "not fitted" in repr(fit)


def test_few_sources_warn():
    forward = ForwardModel(np.arange(20.0, 22.01, 0.5), 1.0)
    with pytest.warns(CountsWarning, match=r"only 15 sources in the fit range \[20, 22\] mag"):
        CountsFit(PowerLaw(reference_mag=21.0), forward, n_bootstrap=0).fit([1, 2, 4, 8])


def test_low_completeness_bins_warn():
    completeness = LogisticCompleteness(m50=23.0, width=0.2)
    forward = ForwardModel(EDGES, lambda m: completeness(m), area_deg2=1.0)
    counts = np.random.default_rng(112).poisson(forward.expected_counts(MODELS["power_law"]))
    with pytest.warns(CountsWarning, match=r"fitted bins have mean completeness below 0.5 "
                                           r"\(from \[23, 23.25\] mag"):
        CountsFit(PowerLaw(reference_mag=22.0), forward, n_bootstrap=0).fit(counts)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        CountsFit(PowerLaw(reference_mag=22.0), forward, fit_range_mag=(18.0, 23.0),
                  n_bootstrap=0).fit(counts)


# ============================================================================ bad input
FORWARD = ForwardModel(np.arange(20.0, 22.01, 0.5), 1.0)
GOOD_COUNTS = [40, 60, 90, 130]


def _fit(counts=GOOD_COUNTS, **kwargs):
    options = {"n_bootstrap": 0}
    fit_kwargs = {}
    for key in ("region_counts", "region_effective_area_deg2", "rng"):
        if key in kwargs:
            fit_kwargs[key] = kwargs.pop(key)
    options.update(kwargs)
    model = options.pop("model", PowerLaw(reference_mag=21.0))
    forward = options.pop("forward", FORWARD)
    return CountsFit(model, forward, **options).fit(counts, **fit_kwargs)


REGIONS = [[10, 20, 30, 40], [10, 20, 30, 40], [20, 20, 30, 50]]

BAD_INPUTS = [
    # ---- bins and forward model
    (lambda: ForwardModel([20.0, 21.0, 20.5, 22.0], 1.0), InputError,
     r"`bin_edges_mag` must be strictly increasing; got 21 then 20.5 at index 1"),
    (lambda: ForwardModel([20.0], 1.0), InputError, r"`bin_edges_mag` must be a 1-D array of "
                                                     r"at least 2 edges"),
    (lambda: ForwardModel([20.0, np.nan], 1.0), InputError, r"`bin_edges_mag` must be finite"),
    (lambda: ForwardModel("20 21", 1.0), InputTypeError, r"`bin_edges_mag` must be numeric"),
    (lambda: ForwardModel([20.0, 21.0], -1.0), InputError,
     r"`effective_area_deg2` must be finite and >= 0; got -1.0"),
    (lambda: ForwardModel([20.0, 21.0], "big"), InputTypeError,
     r"`effective_area_deg2` must be a number or a callable"),
    (lambda: ForwardModel([20.0, 21.0], 0.0), InputError,
     r"`effective_area_deg2` must be > 0 somewhere in the bins"),
    (lambda: ForwardModel([20.0, 21.0], lambda m: np.where(m > 20.5, np.nan, 1.0)), InputError,
     r"`effective_area_deg2` must be finite and >= 0; got nan at"),
    (lambda: ForwardModel([20.0, 21.0], 1.0, scatter_mag=-0.1), InputError,
     r"`scatter_mag` must be finite and >= 0"),
    (lambda: ForwardModel([20.0, 21.0], 1.0, grid_step_mag=0.0), InputError,
     r"`grid_step_mag` must be in \(0, 0.5\]; got 0.0"),
    (lambda: ForwardModel([20.0, 21.0], 2.0, area_deg2=1.0), InputError,
     r"`effective_area_deg2` must not exceed `area_deg2` \(1 deg\^2\); got 2 deg\^2"),
    (lambda: ForwardModel([20.0, 21.0], 1.0, true_mag_limits=(20.5, 22.0)), InputError,
     r"`true_mag_limits` must contain the bins \[20, 21\]; got \(20.5, 22\)"),
    # ---- models
    (lambda: PowerLaw(slope=np.nan), InputError, r"`slope` must be finite; got nan"),
    (lambda: PowerLaw(slope="steep"), InputTypeError, r"`slope` must be a real number; got str"),
    (lambda: DoublePowerLaw(transition_mag=0.0), InputError, r"`transition_mag` must be > 0"),
    (lambda: PowerLaw().integral(22.0, 21.0), InputError,
     r"`m_hi` must be >= `m_lo`; got m_lo = 22.0, m_hi = 21.0"),
    (lambda: PowerLaw().with_params({"alpha": 1.0}), InputError,
     r"`values` names unknown parameters \['alpha'\]"),
    (lambda: PowerLaw().with_params([1.0, 2.0, 3.0]), InputError,
     r"`values` must hold 2 numbers \(log10_norm, slope\); got 3"),
    # ---- fit range and counts
    (lambda: _fit(fit_range_mag=(23.0, 25.0)), InputError,
     r"`fit_range_mag` must lie within the binned magnitudes \[20, 22\]; got \(23, 25\)"),
    (lambda: _fit(fit_range_mag=(19.0, 21.0)), InputError,
     r"`fit_range_mag` must lie within the binned magnitudes"),
    (lambda: _fit(fit_range_mag=(21.5, 20.5)), InputError,
     r"`fit_range_mag` must have bright < faint; got \(21.5, 20.5\)"),
    (lambda: _fit(fit_range_mag=(20.1, 20.4)), InputError,
     r"`fit_range_mag` \(20.1, 20.4\) contains no whole bin of `bin_edges_mag`"),
    (lambda: _fit(fit_range_mag=20.0), InputTypeError, r"`fit_range_mag` must be a pair"),
    (lambda: _fit([1, 2, 3]), InputError, r"`observed_counts` must have shape \(4,\); got \(3,\)"),
    (lambda: _fit([1, -2, 3, 4]), InputError,
     r"`observed_counts` must be whole numbers >= 0; got -2.0 at index 1"),
    (lambda: _fit([1, 2.5, 3, 4]), InputError, r"`observed_counts` must be whole numbers"),
    (lambda: _fit("many"), InputTypeError, r"`observed_counts` must be numeric counts"),
    (lambda: _fit([0, 1, 1, 0]), InputError,
     r"`observed_counts` has 2 sources in the fit range \[20, 22\] mag; too few to fit the 2 "
     r"parameters of power_law"),
    (lambda: _fit(fit_range_mag=(20.0, 21.0)), InputError,
     r"the fit range \[20, 21\] mag holds 2 bins; power_law needs more than 2"),
    (lambda: _fit(forward=ForwardModel(np.arange(20.0, 22.01, 0.5),
                                       lambda m: np.where(m < 21.5, 1.0, 0.0))),
     InputError, r"`observed_counts` has 130 sources in bin \[21.5, 22\] mag where the "
                 r"expected count is 0"),
    (lambda: _fit(model="schechter"), InputError,
     r"`model` must be one of 'power_law', 'broken_power_law', 'double_power_law'"),
    (lambda: _fit(model=3), InputTypeError, r"`model` must be a model name or a CountModel"),
    (lambda: _fit(forward="bins"), InputTypeError, r"`forward` must be a ForwardModel; got str"),
    (lambda: _fit(n_bootstrap=-1), InputError, r"`n_bootstrap` must be an integer >= 0"),
    (lambda: _fit(rng="seed"), InputTypeError,
     r"`rng` must be an int seed, a numpy.random.Generator or None; got 'seed'"),
    # ---- regions
    (lambda: _fit(region_counts=[[40, 60, 90, 130], [0, 0, 0, 0], [0, 0, 0, 1]],
                  region_effective_area_deg2=[1, 1, 1]), InputError,
     r"`region_counts` must add up to `observed_counts` in every bin; they differ in 1 bins"),
    (lambda: _fit(region_counts=[[40, 60, 90, 130]], region_effective_area_deg2=[1]),
     InputError, r"`region_counts` must have at least 3 regions for a jackknife; got 1"),
    (lambda: _fit(region_counts=[1, 2, 3, 4]), InputError,
     r"`region_counts` must have shape \(K, 4\); got \(4,\)"),
    (lambda: _fit(region_counts=REGIONS), InputError,
     r"`region_effective_area_deg2` is needed with `region_counts`"),
    (lambda: _fit(region_effective_area_deg2=[1, 1, 1]), InputError,
     r"`region_effective_area_deg2` was given without `region_counts`"),
    (lambda: _fit(region_counts=REGIONS, region_effective_area_deg2=[1, 1]), InputError,
     r"`region_effective_area_deg2` must have one entry per region \(3\); got 2"),
    (lambda: _fit(region_counts=REGIONS, region_effective_area_deg2=[lambda m: 0.3 + 0 * m] * 3),
     InputError, r"`region_effective_area_deg2` must add up to `effective_area_deg2`"),
    (lambda: _fit(region_counts=REGIONS, region_effective_area_deg2=[1, -1, 1]), InputError,
     r"`region_effective_area_deg2\[1\]` must be in \(0, inf\); got -1.0"),
    (lambda: _fit(region_counts=REGIONS, region_effective_area_deg2=5.0), InputTypeError,
     r"`region_effective_area_deg2` must be a sequence of areas or callables"),
    # ---- results and helpers
    (lambda: _fit().profile_interval("alpha"), InputError,
     r"`name` must be one of \['log10_norm', 'slope'\]; got 'alpha'"),
    (lambda: _fit().profile_interval("slope", level=1.5), InputError,
     r"`level` must be in \(0, 1\); got 1.5"),
    (lambda: _fit().estimate("m_star"), InputError, r"`name` must be one of"),
    (lambda: _fit().integral_counts(22.0, n_draws=10), InputError,
     r"`n_draws` must be an integer >= 100; got 10"),
    (lambda: _fit().integral_counts(22.0, area_deg2=-1.0), InputError,
     r"`area_deg2` must be in \(0, inf\); got -1.0"),
    (lambda: integral_counts("fit", 22.0), InputTypeError, r"`fit` must be a CountsFit; got str"),
    (lambda: poisson_interval(-1), InputError, r"`n_observed` must be whole numbers >= 0"),
    (lambda: poisson_interval(3, level=0.0), InputError, r"`level` must be in \(0, 1\)"),
    (lambda: jackknife_covariance([1.0]), InputError,
     r"`delete_one_values` must have shape \(K,\) or \(K, p\) with K >= 2; got \(1, 1\)"),
    (lambda: combine_covariances(np.eye(2), np.eye(3)), InputError,
     r"`cov_poisson` and `cov_jackknife` must be square and of one shape"),
    (lambda: compare_models([_fit()]), InputError, r"`fits` must hold at least 2 fits"),
    (lambda: compare_models(_fit()), InputTypeError, r"`fits` must be a sequence of CountsFit"),
    (lambda: compare_models([_fit(), _fit([41, 60, 90, 130])]), InputError,
     r"`fits\[1\]` was fitted to other bins or counts than `fits\[0\]`"),
    (lambda: differential_counts(GOOD_COUNTS, ForwardModel([20.0, 20.5, 21.0, 21.5, 22.0], 1.0),
                                 fit=_fit()), InputError,
     r"`fit` must have been fitted with this `forward` model"),
    (lambda: differential_counts(GOOD_COUNTS, "bins"), InputTypeError,
     r"`forward` must be a ForwardModel"),
    (lambda: FORWARD.expected_counts("power_law"), InputTypeError,
     r"`model` must be a CountModel; got str"),
]


@pytest.mark.parametrize(("call", "error", "message"), BAD_INPUTS)
def test_bad_input_is_rejected_with_a_clear_message(call, error, message):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CountsWarning)
        with pytest.raises(error, match=message):
            call()


def test_not_fitted_error_is_an_input_and_attribute_error():
    assert issubclass(NotFittedError, InputError)
    assert issubclass(NotFittedError, AttributeError)
