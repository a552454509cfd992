"""Tests for countscale.extrapolation: IMFs, stars, volume and light-cone totals, Monte Carlo.

Outside references: closed forms (Salpeter mean mass; products of lognormals), mpmath quadrature
written here independently of our code (Kroupa, Chabrier, incomplete gamma, Schechter tails),
astropy (comoving volumes). Published-input scenarios live in tests/test_claims.py.
"""

import math

import mpmath
import numpy as np
import pytest
from astropy.cosmology import Planck18

from countscale.errors import InputError, InputTypeError
from countscale.extrapolation import (
    AnchoredEvolution,
    Chabrier,
    CosmologyDraws,
    Fixed,
    Kroupa,
    LogNormal,
    Mixture,
    MultivariateNormal,
    Normal,
    Salpeter,
    _upper_gamma,
    get_imf,
    light_cone_total,
    mass_function_in_h,
    present_day_volume_total,
    propagate,
    schechter_number_density_above,
    stars_from_stellar_mass,
    stars_in_volume,
    stars_per_galaxy,
)
from countscale.lumfunc import DoubleSchechterMass, SchechterMass

mpmath.mp.dps = 30


# ----------------------------------------------------------------------------- IMFs
def _salpeter_mean(a, b, x=2.35):
    # Closed form: int m^(1-x) / int m^(-x) over [a, b].
    return ((x - 1) / (x - 2)) * (a ** (2 - x) - b ** (2 - x)) / (a ** (1 - x) - b ** (1 - x))


@pytest.mark.parametrize(("lo", "hi"), [(0.1, 100.0), (0.08, 100.0), (0.1, 1.0), (0.5, 120.0)])
def test_salpeter_mean_mass_closed_form(lo, hi):
    assert Salpeter().mean_mass(lo, hi) == pytest.approx(_salpeter_mean(lo, hi), rel=1e-10)


def test_salpeter_mean_mass_reference_value():
    # 0.35137 Msun over 0.1-100 Msun: the closed form above (Salpeter 1955, ApJ 121, 161 slope).
    assert Salpeter().mean_mass() == pytest.approx(0.35137, abs=5e-6)


def _kroupa_mp(m):
    # Kroupa 2001, MNRAS 322, 231, eq. 2: slopes 0.3, 1.3, 2.3, breaks 0.08 and 0.5 Msun,
    # written here with mpmath and its own continuity constants.
    m = mpmath.mpf(m)
    if m < mpmath.mpf("0.08"):
        return (m / mpmath.mpf("0.08")) ** mpmath.mpf("-0.3")
    if m < mpmath.mpf("0.5"):
        return (m / mpmath.mpf("0.08")) ** mpmath.mpf("-1.3")
    c = (mpmath.mpf("0.5") / mpmath.mpf("0.08")) ** mpmath.mpf("-1.3")
    return c * (m / mpmath.mpf("0.5")) ** mpmath.mpf("-2.3")


def _chabrier_mp(m):
    # Chabrier 2003, PASP 115, 763, Table 1 (single objects), per log10 m, then / (m ln 10).
    m = mpmath.mpf(m)
    if m <= 1:
        x = mpmath.log10(m) - mpmath.log10(mpmath.mpf("0.079"))
        per_log = mpmath.mpf("0.158") * mpmath.exp(-(x**2) / (2 * mpmath.mpf("0.69") ** 2))
    else:
        per_log = mpmath.mpf("0.0443") * m ** mpmath.mpf("-1.3")
    return per_log / (m * mpmath.log(10))


def _mp_mean(f, lo, hi, breaks):
    pts = [lo, *[b for b in breaks if lo < b < hi], hi]
    num = mpmath.quad(lambda m: m * f(m), pts)
    den = mpmath.quad(f, pts)
    return float(num / den)


@pytest.mark.parametrize(("lo", "hi"), [(0.1, 100.0), (0.08, 100.0), (0.01, 1.0), (0.2, 50.0)])
def test_kroupa_and_chabrier_mean_mass_against_mpmath(lo, hi):
    assert Kroupa().mean_mass(lo, hi) == pytest.approx(
        _mp_mean(_kroupa_mp, lo, hi, (0.08, 0.5)), rel=1e-9
    )
    assert Chabrier().mean_mass(lo, hi) == pytest.approx(
        _mp_mean(_chabrier_mp, lo, hi, (1.0,)), rel=1e-9
    )


def test_mean_masses_over_standard_range():
    # Computed with mpmath above (0.1-100 Msun): Kroupa 0.6377, Chabrier 0.6713.
    assert Kroupa().mean_mass() == pytest.approx(0.6377, abs=1e-4)
    assert Chabrier().mean_mass() == pytest.approx(0.6713, abs=1e-4)


def test_mass_limits_and_remnants_move_the_answer():
    for imf in (Salpeter(), Kroupa(), Chabrier()):
        # A lower bottom end lowers the mean mass; a lower top end too.
        assert imf.mean_mass(0.08, 100) < imf.mean_mass(0.1, 100)
        assert imf.mean_mass(0.1, 1.0) < imf.mean_mass(0.1, 100)
        plain = imf.stars_per_solar_mass()
        living = imf.stars_per_solar_mass(turnoff_mass=1.0)
        # Dead massive stars left remnants (in the mass) but no stars (in the count): the
        # mass per living star is lower, so more stars per Msun than the plain division.
        assert living > plain
    # The plain division counts N(0.08-100) per M(0.1-100): against mpmath directly.
    pts = [0.08, 0.5, 100]
    n = mpmath.quad(_kroupa_mp, pts)
    m = mpmath.quad(lambda x: x * _kroupa_mp(x), [0.1, 0.5, 100])
    assert Kroupa().stars_per_solar_mass() == pytest.approx(float(n / m), rel=1e-9)


def test_chabrier_pieces_nearly_join_at_one_solar_mass():
    # The published coefficients join within 0.5 % at 1 Msun (Chabrier 2003, Table 1).
    below = Chabrier().dn_dm(1.0 - 1e-9)
    above = Chabrier().dn_dm(1.0 + 1e-9)
    assert above == pytest.approx(below, rel=5e-3)


def test_stars_from_mass_and_per_galaxy():
    kroupa = Kroupa().stars_per_solar_mass()
    assert stars_from_stellar_mass(1e10, "kroupa") == pytest.approx(1e10 * kroupa)
    assert stars_per_galaxy(10.0, "kroupa") == pytest.approx(1e10 * kroupa)
    # A Chabrier-derived mass counted with Salpeter is first converted (x 1/0.61).
    converted = stars_from_stellar_mass(1e10, "salpeter", mass_imf="chabrier")
    assert converted == pytest.approx(1e10 / 0.61 * Salpeter().stars_per_solar_mass())
    assert stars_in_volume(2e8, 1e3, "chabrier") == pytest.approx(
        2e11 * Chabrier().stars_per_solar_mass()
    )


@pytest.mark.parametrize(
    ("call", "error", "message"),
    [
        (lambda: Kroupa().mean_mass(1.0, 1.0), InputError, r"`m_lo` must be < `m_hi`"),
        (lambda: Salpeter().mean_mass(5.0, 0.1), InputError, r"must be < `m_hi`.*5.0 >= 0.1"),
        (lambda: Chabrier().mean_mass(-1.0, 1.0), InputError, r"`m_lo` must be > 0"),
        (lambda: get_imf("kroupa2"), InputError, r"`imf` must be one of chabrier, kroupa"),
        (lambda: get_imf(3), InputTypeError, r"`imf` must be an IMF"),
        (lambda: Kroupa().stars_per_solar_mass(turnoff_mass=200.0), InputError,
         r"`turnoff_mass` must be in"),
        (lambda: Kroupa().stars_per_solar_mass(count_range=(1.0, 0.5)), InputError,
         r"`count_range\[0\]` must be < `count_range\[1\]`"),
        (lambda: Kroupa().stars_per_solar_mass(count_range=5), InputTypeError,
         r"`count_range` must be a pair"),
        (lambda: stars_from_stellar_mass(-1.0), InputError, r"`mass_msun` must be finite and > 0"),
        (lambda: Kroupa().dn_dm(0.0), InputError, r"`m` must be finite and > 0"),
    ],
)
def test_bad_imf_inputs(call, error, message):
    with pytest.raises(error, match=message):
        call()


# ----------------------------------------------------------------------------- gamma, tails
@pytest.mark.parametrize("a", [-2.45, -1.91, -1.2, -1.0, -0.47, -0.05, 0.0, 0.65, 1.5])
def test_vectorised_upper_gamma_against_mpmath(a):
    x = np.array([1e-9, 1e-5, 0.01, 0.3, 1.0, 4.0, 30.0])
    ours = _upper_gamma(np.full(x.size, a), x)
    ref = np.array([float(mpmath.gammainc(a, xi)) for xi in x])
    np.testing.assert_allclose(ours, ref, rtol=1e-10)


def test_vectorised_upper_gamma_limits():
    assert np.isinf(_upper_gamma(np.array([-0.5]), np.array([0.0])))[0]
    assert _upper_gamma(np.array([-0.5]), np.array([np.inf]))[0] == 0.0


def test_schechter_tail_against_mpmath_quadrature():
    # Baldry et al. 2012 parameters (MNRAS 421, 621, abstract); integral of Phi d log M by mpmath.
    lms, p1, a1, p2, a2 = 10.66, 3.96e-3, -0.35, 0.79e-3, -1.47
    def phi(x):
        t = mpmath.mpf(10) ** (x - lms)
        return mpmath.log(10) * mpmath.exp(-t) * (p1 * t ** (a1 + 1) + p2 * t ** (a2 + 1))
    for limit in (6.0, 8.0, 10.0, 11.5):
        ref = float(mpmath.quad(phi, [limit, lms, lms + 1.5, lms + 3]))
        ours = schechter_number_density_above(limit, lms, [(p1, a1), (p2, a2)])
        assert float(ours) == pytest.approx(ref, rel=1e-9)
    # n(> 10^8) = 0.0325173 Mpc^-3 (computed with the closed form; matches the value above).
    assert float(schechter_number_density_above(8.0, lms, [(p1, a1), (p2, a2)])) == pytest.approx(
        0.0325173, rel=1e-5
    )


def test_schechter_tail_broadcasts_over_draws_and_redshifts():
    alphas = np.array([[-1.3], [-1.6], [-1.9]])
    limits = np.array([6.0, 7.0, 8.0])
    out = schechter_number_density_above(limits, 10.5, [(1e-3, alphas)])
    assert out.shape == (3, 3)
    # self-consistency with lumfunc's scalar form (not an outside reference)
    ref = SchechterMass(10.5, -1.6, 1e-3).number_density_above(7.0)
    assert out[1, 1] == pytest.approx(ref, rel=1e-12)


def test_mass_function_in_h():
    mf = DoubleSchechterMass(10.66, 3.96e-3, -0.35, 0.79e-3, -1.47)
    converted = mass_function_in_h(mf, 0.7, 0.7 * 0.9)
    # M* ~ h^-2 and phi ~ h^3: rho* ~ h (Hogg 1999 on h-scaled units).
    assert converted.mass_density_msun_mpc3() == pytest.approx(0.9 * mf.mass_density_msun_mpc3())
    with pytest.raises(InputError, match=r"`h` = H0 / 100 km/s/Mpc must be in \(0, 2\]"):
        mass_function_in_h(mf, 0.7, 67.7)
    with pytest.raises(InputTypeError, match=r"`form` must be a SchechterMass"):
        mass_function_in_h("baldry", 0.7, 0.68)


# ----------------------------------------------------------------------------- volume totals
def test_present_day_volume_total_against_astropy():
    mf = DoubleSchechterMass(10.66, 3.96e-3, -0.35, 0.79e-3, -1.47)
    volume = Planck18.comoving_volume(8.0).value - Planck18.comoving_volume(0.5).value
    expected = float(mf.number_density_above(8.0)) * volume
    assert present_day_volume_total(mf, 8.0, 0.5, 8.0) == pytest.approx(expected, rel=1e-10)
    # Observable universe: 4/3 pi D_P^3 with D_P = 14.17 Gpc for Planck18 (computed; C).
    horizon = present_day_volume_total(mf, 8.0)
    assert horizon / float(mf.number_density_above(8.0)) == pytest.approx(
        4 / 3 * math.pi * 14170.0**3, rel=2e-3
    )


def test_light_cone_of_a_constant_population_is_the_present_day_total():
    # A non-evolving mass function: both definitions must agree (self-consistency), and the
    # integral must match scipy quadrature of n x astropy's dV/dz (outside reference).
    from scipy import integrate

    mf = SchechterMass(10.6, -1.4, 1e-3)
    flat = AnchoredEvolution(((0.0, mf), (10.0, mf)))
    total = light_cone_total(flat, 8.0, 0.1, 3.0)
    n = float(mf.number_density_above(8.0))
    ref, _ = integrate.quad(
        lambda z: n * 4 * math.pi * Planck18.differential_comoving_volume(z).value, 0.1, 3.0,
        epsrel=1e-10,
    )
    assert total == pytest.approx(ref, rel=1e-7)
    assert total == pytest.approx(present_day_volume_total(mf, 8.0, 0.1, 3.0), rel=1e-7)


def test_light_cone_interpolates_log_density():
    a = SchechterMass(10.6, -1.4, 1e-3)
    b = SchechterMass(10.6, -1.4, 1e-2)
    evo = AnchoredEvolution(((0.0, a), (2.0, b)))
    # Halfway in z the density is the geometric mean of the anchors.
    mid = evo.number_density_above(8.0, 1.0)
    ends = a.number_density_above(8.0) * b.number_density_above(8.0)
    assert mid == pytest.approx(math.sqrt(ends))


@pytest.mark.parametrize(
    ("call", "error", "message"),
    [
        (lambda e: light_cone_total(e, 8.0, 2.0, 2.0), InputError,
         r"`z_max` must be > `z_min`; got z_max = 2.0 <= z_min = 2.0"),
        (lambda e: light_cone_total(e, 8.0, 0.0, 5.0), InputError,
         r"must lie inside the evolution's range \[0, 3\]"),
        (lambda e: light_cone_total(e, 8.0, 0.0, 1.0, n_z=10), InputError, r"`n_z` must be an odd"),
        (lambda e: light_cone_total("evo", 8.0), InputTypeError, r"`evolution` must be"),
        (lambda e: e.number_density_above(8.0, 4.0), InputError, r"no extrapolation"),
        (lambda e: present_day_volume_total(SchechterMass(10, -1, 1e-3), 8.0, 1.0, 0.5),
         InputError, r"`z_max` must be > `z_min`"),
        (lambda e: present_day_volume_total(SchechterMass(10, -1, 1e-3), 8.0, 1.0, None),
         InputError, r"`z_min` must be 0 when `z_max` is None"),
        (lambda e: AnchoredEvolution(((1.0, SchechterMass(10, -1, 1e-3)),)), InputError,
         r"at least 2"),
        (lambda e: AnchoredEvolution(((1.0, SchechterMass(10, -1, 1e-3)),
                                      (0.5, SchechterMass(10, -1, 1e-3)))), InputError,
         r"strictly increasing"),
    ],
)
def test_bad_volume_inputs(call, error, message):
    mf = SchechterMass(10.6, -1.4, 1e-3)
    evo = AnchoredEvolution(((0.0, mf), (3.0, mf)))
    with pytest.raises(error, match=message):
        call(evo)


# ----------------------------------------------------------------------------- cosmology draws
def test_cosmology_draws_match_astropy():
    draws = CosmologyDraws()
    sample = draws.sample(6, rng=3)
    z = np.array([0.5, 2.0, 7.0])
    dv = draws.differential_volume_mpc3(z, sample)
    shell = draws.comoving_volume_mpc3(0.0, 8.0, sample)
    for k in range(6):
        c = Planck18.clone(H0=sample["H0"][k], Om0=sample["Om0"][k])
        np.testing.assert_allclose(
            dv[k], 4 * math.pi * c.differential_comoving_volume(z).value, rtol=1e-4
        )
        assert shell[k] == pytest.approx(c.comoving_volume(8.0).value, rel=1e-4)


# ----------------------------------------------------------------------------- propagate
def _product(values):
    return values["a"] * values["b"] * values["c"]


def test_budget_of_a_product_of_lognormals_is_the_share_of_variances():
    # log10 of the product is a sum of independent normals: shares = sigma_i^2 / sum (closed form).
    inputs = {"a": LogNormal(2.0, 0.1), "b": LogNormal(5.0, 0.2), "c": Fixed(3.0)}
    est = propagate(_product, inputs, "things", n_draws=20_000, rng=1)
    assert est.budget["a"] == pytest.approx(0.2, abs=0.03)
    assert est.budget["b"] == pytest.approx(0.8, abs=0.03)
    assert est.budget["c"] == 0.0  # a zero-width input gets a zero share
    assert sum(est.budget.values()) == pytest.approx(1.0, abs=0.01)
    assert est.median == pytest.approx(30.0, rel=0.01)
    assert est.unit == "things"


def test_same_seed_same_result_and_zero_width_normal():
    inputs = {"a": Normal(10.0, 1.0), "b": Normal(3.0, 0.0), "c": Mixture({"x": 1.0, "y": 2.0})}
    one = propagate(_product, inputs, "", n_draws=2000, rng=7)
    two = propagate(_product, inputs, "", n_draws=2000, rng=7)
    np.testing.assert_array_equal(one.draws, two.draws)
    assert one.budget == two.budget
    assert one.budget["b"] == 0.0
    assert sum(one.budget.values()) == pytest.approx(1.0, abs=0.01)
    three = propagate(_product, inputs, "", n_draws=2000, rng=8)
    assert not np.array_equal(one.draws, three.draws)


def test_all_inputs_zero_width_gives_point_value():
    est = propagate(_product, {"a": Fixed(2.0), "b": Fixed(3.0), "c": Normal(1.0, 0.0)}, "",
                    n_draws=10, rng=0)
    assert est.median == 6.0
    assert est.budget == {}


def test_multivariate_normal_and_mixture_samplers():
    mvn = MultivariateNormal([1.0, 2.0], [[1.0, 0.9], [0.9, 1.0]])
    draws = mvn.sample(50_000, np.random.default_rng(0))
    assert np.corrcoef(draws.T)[0, 1] == pytest.approx(0.9, abs=0.01)
    mix = Mixture({"kroupa": 1.0, "salpeter": 2.0}, {"kroupa": 3.0, "salpeter": 1.0})
    values = mix.sample(40_000, np.random.default_rng(0))
    assert np.mean(values == 1.0) == pytest.approx(0.75, abs=0.01)
    assert mix.central_option == "kroupa"


@pytest.mark.parametrize(
    ("call", "error", "message"),
    [
        (lambda: Normal(0.0, -1.0), InputError, r"`sigma` must be >= 0"),
        (lambda: LogNormal(-1.0, 0.1), InputError, r"`median` must be > 0"),
        (lambda: MultivariateNormal([0.0, 1.0], [[1.0, 2.0], [2.0, 1.0]]), InputError,
         r"positive semi-definite"),
        (lambda: MultivariateNormal([0.0, 1.0], [[1.0]]), InputError, r"2x2 matrix"),
        (lambda: Mixture({}), InputError, r"`options` must be a non-empty mapping"),
        (lambda: Mixture({"a": 1.0}, {"b": 1.0}), InputError, r"same options"),
        (lambda: propagate(_product, {"a": 3.0}, ""), InputTypeError,
         r"`inputs\['a'\]` must be a sampler"),
        (lambda: propagate(_product, {"a": Fixed(1.0)}, "", n_draws=1), InputError,
         r"`n_draws` must be an integer >= 2"),
        (lambda: propagate(lambda v: -v["a"], {"a": Normal(1.0, 0.1)}, "", n_draws=10),
         InputError, r"finite totals > 0"),
        (lambda: propagate(lambda v: v["a"][:3], {"a": Normal(1.0, 0.1)}, "", n_draws=10),
         InputError, r"one total per draw"),
    ],
)
def test_bad_monte_carlo_inputs(call, error, message):
    with pytest.raises(error, match=message):
        call()
