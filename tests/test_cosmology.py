"""Tests for countscale.cosmology.

References:
- Hogg 1999, arXiv:astro-ph/9905116 ("Distance measures in cosmology"): closed forms.
- Hogg, Baldry, Blanton & Eisenstein 2002, arXiv:astro-ph/0210394: K-correction definition.
- Planck Collaboration 2020, A&A 641, A6 (astropy's Planck18).
- astropy.cosmology (independent reference library for the quantities we do not delegate),
  mpmath.quad (independent quadrature).
"""

from __future__ import annotations

import math

import astropy.units as u
import mpmath
import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM, LambdaCDM, Planck18
from scipy import integrate

from countscale import cosmology as cs
from countscale.errors import InputError, InputTypeError

C_KM_S = 299792.458  # speed of light [km/s], exact by the SI definition


@pytest.fixture(scope="module")
def eds():
    """Einstein-de Sitter, H0 = 70, no radiation."""
    return cs.get_cosmology(H0=70.0, Om0=1.0)


@pytest.fixture(scope="module")
def lcdm():
    """Flat Lambda-CDM, H0 = 70, Om0 = 0.3, no radiation."""
    return cs.get_cosmology(H0=70.0, Om0=0.3)


# ---------------------------------------------------------------------------------------------
# get_cosmology
# ---------------------------------------------------------------------------------------------
def test_default_is_planck18():
    assert cs.get_cosmology() is Planck18
    assert cs.get_cosmology("planck18") is Planck18  # case-insensitive


@pytest.mark.parametrize("name", ["Planck15", "WMAP9", "WMAP1"])
def test_named_realizations_are_astropys(name):
    import astropy.cosmology as ac

    assert cs.get_cosmology(name) is getattr(ac, name)


def test_explicit_parameters_match_astropy():
    flat = cs.get_cosmology(H0=70, Om0=0.3, Tcmb0=2.7255, Ob0=0.05)
    ref = FlatLambdaCDM(H0=70, Om0=0.3, Tcmb0=2.7255, Ob0=0.05)
    z = np.array([0.1, 1.0, 5.0])
    np.testing.assert_allclose(
        flat.comoving_distance(z).value, ref.comoving_distance(z).value, rtol=1e-13
    )
    curved = cs.get_cosmology(H0=70, Om0=0.3, Ode0=0.6)
    assert isinstance(curved, LambdaCDM)
    assert math.isclose(float(curved.Ok0), 0.1, rel_tol=1e-12)


def test_bad_names_and_parameters_are_refused():
    with pytest.raises(
        InputError, match=r"`name` must be one of .*got 'Plank18' \(did you mean 'Planck18'\?\)"
    ):
        cs.get_cosmology("Plank18")
    with pytest.raises(InputError, match=r"`name` must be one of .*got 'nonsense'$"):
        cs.get_cosmology("nonsense")
    with pytest.raises(InputTypeError, match=r"`name` must be a string naming a cosmology; got 3"):
        cs.get_cosmology(3)
    with pytest.raises(InputError, match=r"give either `name` or explicit parameters, not both"):
        cs.get_cosmology("Planck18", H0=70, Om0=0.3)
    with pytest.raises(
        InputError,
        match=r"unknown cosmology parameter 'h0'; allowed: H0, .* \(did you mean 'H0'\?\)",
    ):
        cs.get_cosmology(h0=70, Om0=0.3)
    with pytest.raises(
        InputError, match=r"`Om0` is required with explicit parameters; got only H0"
    ):
        cs.get_cosmology(H0=70)
    with pytest.raises(InputError, match=r"`H0` must be > 0 km/s/Mpc; got -70.0"):
        cs.get_cosmology(H0=-70, Om0=0.3)
    with pytest.raises(InputError, match=r"`H0` must be finite; got nan"):
        cs.get_cosmology(H0=float("nan"), Om0=0.3)
    with pytest.raises(InputTypeError, match=r"`Om0` must be a real number; got '0.3'"):
        cs.get_cosmology(H0=70, Om0="0.3")
    with pytest.raises(InputError, match=r"`Om0` must be >= 0; got -0.1"):
        cs.get_cosmology(H0=70, Om0=-0.1)
    with pytest.raises(InputError, match=r"`Tcmb0` must be >= 0 K; got -1.0"):
        cs.get_cosmology(H0=70, Om0=0.3, Tcmb0=-1.0)
    with pytest.raises(InputError, match=r"`Ob0` must be in \[0, Om0 = 0.3\]; got 0.4"):
        cs.get_cosmology(H0=70, Om0=0.3, Ob0=0.4)
    with pytest.raises(InputError, match=r"`Om0` must be <= 1 for a flat cosmology .*got 1.5"):
        cs.get_cosmology(H0=70, Om0=1.5)


def test_no_big_bang_is_refused():
    # E^2(x = 1+z) = 0.3 x^3 - 1.3 x^2 + 2 (Hogg 1999 eq. 14 with Ok = 1 - Om - OL = -1.3)
    # first reaches zero at the smallest root x > 1 of the cubic (numpy.roots): a bounce.
    roots = np.roots([0.3, -1.3, 0.0, 2.0])
    x0 = min(r.real for r in roots if abs(r.imag) < 1e-12 and r.real > 1)
    with pytest.raises(
        InputError, match=r"`Ode0` = 2.0 with `Om0` = 0.3 gives H\(z\)\^2 <= 0"
    ) as err:
        cs.get_cosmology(H0=70, Om0=0.3, Ode0=2.0)
    z_reported = float(str(err.value).split("at z = ")[1].split()[0])
    assert z_reported == pytest.approx(x0 - 1, abs=2e-3)  # grid step 2.5e-3 in z


def test_cosmo_argument_kinds():
    assert cs.comoving_distance_mpc(1.0, "WMAP9") == cs.comoving_distance_mpc(
        1.0, cs.get_cosmology("WMAP9")
    )
    assert cs.comoving_distance_mpc(1.0) == cs.comoving_distance_mpc(1.0, Planck18)
    with pytest.raises(
        InputTypeError, match=r"`cosmo` must be an astropy FLRW cosmology, .*got int"
    ):
        cs.comoving_distance_mpc(1.0, 5)


def test_hubble_h():
    assert cs.hubble_h() == pytest.approx(0.6766, rel=1e-12)  # Planck 2020 Table 2 H0 = 67.66


# ---------------------------------------------------------------------------------------------
# Distances and times against closed forms (Hogg 1999)
# ---------------------------------------------------------------------------------------------
def test_einstein_de_sitter_closed_forms(eds):
    d_h = C_KM_S / 70.0  # Hubble distance [Mpc], Hogg 1999 eq. 4
    # Hogg 1999 (eq. 15 integrated for Om = 1): D_C = 2 D_H (1 - (1 + z)^-1/2)
    assert cs.comoving_distance_mpc(1.0, eds) == pytest.approx(2508.7765, abs=5e-5)
    assert cs.comoving_distance_mpc(3.0, eds) == pytest.approx(d_h, rel=1e-12)
    z = np.array([0.0, 0.5, 2.0, 10.0, 1000.0])
    np.testing.assert_allclose(
        cs.comoving_distance_mpc(z, eds), 2 * d_h * (1 - 1 / np.sqrt(1 + z)), rtol=1e-12, atol=1e-9
    )
    # Particle horizon = 2 D_H (the z -> infinity limit of the same closed form).
    assert cs.particle_horizon_mpc(eds) == pytest.approx(2 * d_h, rel=1e-11)
    # Age (2/3) t_H with t_H = 1/H0 = 13.96846 Gyr: 9.31231 Gyr (the Einstein-de Sitter age;
    # closed form, computed by hand).
    assert cs.age_gyr(cosmo=eds) == pytest.approx(9.31231, abs=5e-6)
    t_h = float((1 / (70 * u.km / u.s / u.Mpc)).to_value(u.Gyr))
    # Age at z and lookback time: t(z) = (2/3) t_H (1 + z)^-3/2.
    assert cs.age_gyr(3.0, eds) == pytest.approx(2 / 3 * t_h / 8, rel=1e-9)
    assert cs.lookback_time_gyr(3.0, eds) == pytest.approx(2 / 3 * t_h * (1 - 1 / 8), rel=1e-9)
    # Observable volume: 4/3 pi (2 D_H)^3 for a flat universe.
    assert cs.observable_universe_volume_mpc3(eds) == pytest.approx(
        4 / 3 * math.pi * (2 * d_h) ** 3, rel=1e-10
    )


def test_flat_lcdm_distance_and_age(lcdm):
    # D_C(1) = 3303.8288 Mpc (Hogg 1999, eq. 15, computed with mpmath.quad for H0 = 70,
    # Om0 = 0.3, no radiation) and an independent quadrature.
    assert cs.comoving_distance_mpc(1.0, lcdm) == pytest.approx(3303.8288, abs=5e-5)
    quad, _ = integrate.quad(lambda z: 1 / math.sqrt(0.3 * (1 + z) ** 3 + 0.7), 0, 1, epsrel=1e-13)
    assert cs.comoving_distance_mpc(1.0, lcdm) == pytest.approx(C_KM_S / 70 * quad, rel=1e-10)
    # Age, closed form (2 / (3 H0 sqrt(OL))) asinh(sqrt(OL / Om)) = 13.46698 Gyr.
    t_h = float((1 / (70 * u.km / u.s / u.Mpc)).to_value(u.Gyr))
    closed = 2 / (3 * math.sqrt(0.7)) * math.asinh(math.sqrt(0.7 / 0.3)) * t_h
    assert cs.age_gyr(cosmo=lcdm) == pytest.approx(closed, rel=1e-8)
    assert cs.age_gyr(cosmo=lcdm) == pytest.approx(13.46698, abs=5e-6)
    # Lookback time + age at z = age today (definition).
    z = np.array([0.5, 2.0])
    np.testing.assert_allclose(
        cs.lookback_time_gyr(z, lcdm) + cs.age_gyr(z, lcdm), cs.age_gyr(0.0, lcdm), rtol=1e-9
    )


def test_luminosity_distance_and_distance_modulus():
    z = np.array([0.01, 0.3, 2.0])
    d_a = Planck18.angular_diameter_distance(z).to_value(u.Mpc)
    # Etherington reciprocity D_L = (1 + z)^2 D_A (Hogg 1999 eq. 20-21).
    np.testing.assert_allclose(cs.luminosity_distance_mpc(z), (1 + z) ** 2 * d_a, rtol=1e-12)
    np.testing.assert_allclose(cs.angular_diameter_distance_mpc(z), d_a, rtol=1e-12)
    # DM = 5 log10(D_L / 10 pc) (Hogg 1999 eq. 25).
    np.testing.assert_allclose(
        cs.distance_modulus(z), 5 * np.log10((1 + z) ** 2 * d_a * 1e5), rtol=1e-12
    )


def test_scalar_in_scalar_out_and_shapes_kept():
    assert isinstance(cs.comoving_distance_mpc(1.0), float)
    assert isinstance(cs.distance_modulus(np.float64(0.1)), float)
    z = np.array([[0.1, 0.2], [0.3, 0.4]])
    before = z.copy()
    out = cs.comoving_distance_mpc(z)
    assert out.shape == (2, 2)
    np.testing.assert_array_equal(z, before)  # caller's array untouched
    assert cs.comoving_distance_mpc([0.5, 1.0]).shape == (2,)


@pytest.mark.parametrize(
    ("z", "message"),
    [
        (-0.5, r"`z` must be finite and >= 0; got -0.5"),
        (float("nan"), r"`z` must be finite and >= 0; got nan"),
        ([0.1, float("inf")], r"`z` must be finite and >= 0; got inf \(at index 1\)"),
    ],
)
def test_bad_redshifts(z, message):
    with pytest.raises(InputError, match=message):
        cs.comoving_distance_mpc(z)


def test_bad_redshift_kinds_and_zero_distance_modulus():
    with pytest.raises(
        InputTypeError, match=r"`z` must be a real number or an array of them; got 'one'"
    ):
        cs.luminosity_distance_mpc("one")
    with pytest.raises(
        InputTypeError, match=r"`z` must be a real number or an array of them; got True"
    ):
        cs.age_gyr(True)
    with pytest.raises(InputError, match=r"`z` must be finite and > 0; got 0.0"):
        cs.distance_modulus(0.0)


# ---------------------------------------------------------------------------------------------
# Volumes
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("cosmo", [Planck18, LambdaCDM(H0=70, Om0=0.3, Ode0=0.6, Tcmb0=2.7255)])
def test_differential_volume_is_hogg_eq28(cosmo):
    # dV_C/dz/dOmega = D_H (1 + z)^2 D_A^2 / E(z)  (Hogg 1999 eq. 28).
    z = np.array([0.05, 0.5, 1.0, 3.0, 8.0])
    d_h = cosmo.hubble_distance.to_value(u.Mpc)
    d_a = cosmo.angular_diameter_distance(z).to_value(u.Mpc)
    expected = d_h * (1 + z) ** 2 * d_a**2 / cosmo.efunc(z)
    np.testing.assert_allclose(
        cs.differential_comoving_volume_mpc3_sr(z, cosmo), expected, rtol=1e-10
    )


def test_shell_volume_is_difference_of_astropy_volumes():
    v = Planck18.comoving_volume([0.2, 0.5]).to_value(u.Mpc**3)
    assert cs.comoving_volume_mpc3(0.2, 0.5) == pytest.approx(v[1] - v[0], rel=1e-12)
    area_sr = 100 * (math.pi / 180) ** 2  # 100 deg^2
    assert cs.comoving_volume_mpc3(0.2, 0.5, area_sr) == pytest.approx(
        (v[1] - v[0]) * area_sr / (4 * math.pi), rel=1e-12
    )
    # Arrays broadcast; the shells add up (astropy's V_C is additive along z).
    edges = np.array([0.0, 0.1, 0.3, 0.7, 1.5])
    shells = cs.comoving_volume_mpc3(edges[:-1], edges[1:])
    assert shells.shape == (4,)
    assert shells.sum() == pytest.approx(
        Planck18.comoving_volume(1.5).to_value(u.Mpc**3), rel=1e-12
    )
    # And equal the integral of dV/dz over the sphere (Hogg 1999 eq. 28-29), by quadrature.
    quad, _ = integrate.quad(lambda z: cs.differential_comoving_volume_mpc3_sr(z), 0.3, 0.7)
    assert shells[2] == pytest.approx(4 * math.pi * quad, rel=1e-8)


def test_shell_volume_errors():
    with pytest.raises(InputError, match=r"`z_lo` must be <= `z_hi`; got z_lo = 0.5 > z_hi = 0.2"):
        cs.comoving_volume_mpc3(0.5, 0.2)
    with pytest.raises(InputError, match=r"`z_lo` must be <= `z_hi`; got z_lo = 0.9 > z_hi = 0.8"):
        cs.comoving_volume_mpc3([0.1, 0.9], [0.2, 0.8])
    with pytest.raises(InputError, match=r"`area_sr` must be in \(0, 4 pi\] sr; got 13.0"):
        cs.comoving_volume_mpc3(0.1, 0.2, area_sr=13.0)
    with pytest.raises(InputError, match=r"`area_sr` must be in \(0, 4 pi\] sr; got 0.0"):
        cs.comoving_volume_mpc3(0.1, 0.2, area_sr=0.0)
    with pytest.raises(InputError, match=r"`z_hi` must be finite and >= 0; got -1.0"):
        cs.comoving_volume_mpc3(0.1, -1.0)
    with pytest.raises(InputError, match=r"`z_lo` and `z_hi` must broadcast together"):
        cs.comoving_volume_mpc3([0.1, 0.2, 0.3], [0.4, 0.5])


# ---------------------------------------------------------------------------------------------
# The observable universe
# ---------------------------------------------------------------------------------------------
def test_particle_horizon_planck18_published_figure():
    # The integral of c dz / H(z) from 0 to infinity for astropy's Planck18 (with radiation),
    # computed with mpmath.quad: 14 165 Mpc = 46.2 Gly; tolerance ~0.3 %.
    h = cs.horizon()
    assert h.radius_mpc == pytest.approx(14170.0, rel=3e-3)
    assert h.radius_gly == pytest.approx(46.2, rel=3e-3)
    # "about 46 billion light years" and age 13.787 Gyr (Planck 2020 Table 2).
    assert h.age_gyr == pytest.approx(13.787, abs=1e-3)
    assert h.cosmology == "Planck18"
    assert h.radius_gly == pytest.approx((h.radius_mpc * u.Mpc).to_value(u.lyr) / 1e9, rel=1e-12)
    assert h.volume_mpc3 == pytest.approx(4 / 3 * math.pi * h.radius_mpc**3, rel=1e-12)
    assert "46.2 Gly" in h.summary()
    with pytest.raises(AttributeError):
        h.radius_mpc = 1.0  # frozen


def test_particle_horizon_matches_astropy_at_high_z_plus_radiation_tail():
    # astropy's comoving distance to z = 1e6 plus the analytic remainder beyond it: for
    # a1 = 1/(1+z) << 1, E^2 = Or a^-4 (1 + (Om/Or) a) and D_H * integral_0^a1 da/(a^2 E)
    # = D_H [a1 / sqrt(Or) - Om a1^2 / (4 Or^1.5)] + O(a1^3). Or counts photons and the
    # (then relativistic) neutrinos: Ogamma0 (1 + rho_nu/rho_gamma), from astropy.
    z1 = 1e6
    a1 = 1 / (1 + z1)
    o_r = Planck18.Ogamma0 * (1 + Planck18.nu_relative_density(z1))
    o_m = Planck18.Om0
    d_h = Planck18.hubble_distance.to_value(u.Mpc)
    tail = d_h * (a1 / math.sqrt(o_r) - o_m * a1**2 / (4 * o_r**1.5))
    expected = Planck18.comoving_distance(z1).to_value(u.Mpc) + tail
    assert tail == pytest.approx(0.463, abs=0.01)  # not negligible: 3e-5 of the radius
    assert cs.particle_horizon_mpc(Planck18) == pytest.approx(expected, rel=1e-10)


def test_particle_horizon_matter_lambda_by_mpmath(lcdm):
    # Flat, no radiation: D_P = D_H int_0^1 da / sqrt(Om a + OL a^4), by mpmath (independent).
    with mpmath.workdps(30):
        ref = mpmath.quad(lambda a: 1 / mpmath.sqrt(0.3 * a + 0.7 * a**4), [0, 1e-6, 1e-2, 1])
    assert cs.particle_horizon_mpc(lcdm) == pytest.approx(C_KM_S / 70 * float(ref), rel=1e-10)


def test_particle_horizon_matter_plus_radiation_closed_form():
    # Flat matter + radiation, no Lambda: int_0^1 da / sqrt(Or + Om a) = 2 (sqrt(Or + Om) -
    # sqrt(Or)) / Om, so D_P = 2 D_H (1 - sqrt(Or)) / Om when Om + Or = 1. Or from astropy
    # (photons + massless neutrinos at Tcmb0 = 2.7255 K, Neff = 3.04).
    probe = FlatLambdaCDM(H0=70, Om0=0.3, Tcmb0=2.7255)
    o_r = probe.Ogamma0 + probe.Onu0
    cosmo = cs.get_cosmology(H0=70, Om0=1 - o_r, Tcmb0=2.7255)
    assert abs(float(cosmo.Ode0)) < 1e-12
    d_h = C_KM_S / 70
    closed = 2 * d_h * (1 - math.sqrt(o_r)) / (1 - o_r)
    assert cs.particle_horizon_mpc(cosmo) == pytest.approx(closed, rel=1e-10)
    # Radiation shortens the horizon relative to Einstein-de Sitter's 2 D_H.
    assert cs.particle_horizon_mpc(cosmo) < 2 * d_h


@pytest.mark.parametrize(("om0", "ode0"), [(0.3, 0.6), (0.3, 0.8)])
def test_observable_volume_curved_matches_astropy(om0, ode0):
    # Open (Ok = +0.1) and closed (Ok = -0.1) models: our horizon volume against astropy's
    # comoving_volume at z = 1e6 (Hogg 1999 eq. 29 inside astropy), which misses only the
    # 3e-5 fractional radiation tail of the radius (see the test above) -> ~1e-4 in volume.
    cosmo = cs.get_cosmology(H0=70, Om0=om0, Ode0=ode0, Tcmb0=2.7255)
    astropy_volume = cosmo.comoving_volume(1e6).to_value(u.Mpc**3)
    ours = cs.observable_universe_volume_mpc3(cosmo)
    assert ours == pytest.approx(astropy_volume, rel=2e-4)
    assert ours > astropy_volume
    # The same formula at a finite distance reproduces astropy exactly.
    d_c = cosmo.comoving_distance(3.0).to_value(u.Mpc)
    assert cs._comoving_volume_within(d_c, cosmo) == pytest.approx(
        cosmo.comoving_volume(3.0).to_value(u.Mpc**3), rel=1e-10
    )


def test_closed_universe_past_the_equator_is_refused():
    # Om0 = 3, no Lambda: D_P / D_H = int_0^1 da / sqrt(3a - 2a^2) = (asin(1/3) + pi/2)/sqrt(2)
    # = 1.351, so sqrt(2) D_P / D_H = 1.91 > pi/2.
    cosmo = cs.get_cosmology(H0=70, Om0=3.0, Ode0=0.0)
    ratio = cs.particle_horizon_mpc(cosmo) / (C_KM_S / 70)
    assert ratio == pytest.approx((math.asin(1 / 3) + math.pi / 2) / math.sqrt(2), rel=1e-10)
    with pytest.raises(InputError, match=r"`cosmo` .* is closed with Ok0 = -2.0 and its horizon"):
        cs.observable_universe_volume_mpc3(cosmo)


def test_every_realization_has_a_horizon_near_46_gly():
    # Common figure, no source: "about 46 billion light years" across the CMB-era fits.
    for name in cs.available_cosmologies():
        assert 44.0 < cs.horizon(name).radius_gly < 48.5, name


# ---------------------------------------------------------------------------------------------
# K-corrections and magnitudes
# ---------------------------------------------------------------------------------------------
def _kcorrection_by_quadrature(z, beta, band_hz=(4.0e14, 6.0e14)):
    """Hogg et al. 2002 eq. 8 (same band in and out, AB standard g_nu = const), top-hat band.

    K = -2.5 log10[(1+z) int dnu_o/nu_o L_nu((1+z) nu_o) R / int dnu_e/nu_e L_nu(nu_e) R].
    """
    lo, hi = band_hz
    lum = lambda nu: (nu / 5e14) ** beta  # noqa: E731
    num, _ = integrate.quad(lambda nu: lum((1 + z) * nu) / nu, lo, hi, epsrel=1e-12)
    den, _ = integrate.quad(lambda nu: lum(nu) / nu, lo, hi, epsrel=1e-12)
    return -2.5 * math.log10((1 + z) * num / den)


@pytest.mark.parametrize("beta", [-2.0, -1.0, -0.5, 0.0, 1.0])
@pytest.mark.parametrize("z", [0.1, 1.0, 3.0])
def test_power_law_kcorrection_against_band_integrals(z, beta):
    assert cs.kcorrection_power_law(z, beta) == pytest.approx(
        _kcorrection_by_quadrature(z, beta), abs=1e-9
    )


def test_kcorrection_sign_convention_m_equals_M_plus_DM_plus_K():
    # A source with f_nu proportional to nu^beta: observed f_nu(nu) = (1+z) L_nu((1+z) nu) /
    # (4 pi D_L^2) (Hogg et al. 2002 eq. 4-5); at 10 pc, f_nu = L_nu(nu) / (4 pi (10 pc)^2).
    # AB magnitudes of the two: m - M = 5 log10(D_L / 10 pc) - 2.5 log10((1+z)^(1+beta)).
    z, beta, m_abs = 0.8, -0.5, -21.0
    d_l_pc = Planck18.luminosity_distance(z).to_value(u.pc)
    expected = m_abs + 5 * math.log10(d_l_pc / 10) - 2.5 * math.log10((1 + z) ** (1 + beta))
    got = cs.apparent_magnitude(m_abs, z, kcorrection={"beta": beta})
    assert got == pytest.approx(expected, abs=1e-9)
    assert cs.absolute_magnitude(got, z, kcorrection={"beta": beta}) == pytest.approx(
        m_abs, abs=1e-9
    )
    # No K-correction: m - M is the distance modulus alone.
    assert cs.apparent_magnitude(m_abs, z) - m_abs == pytest.approx(
        cs.distance_modulus(z), abs=1e-12
    )
    # Flat f_nu (beta = 0) at z > 0 appears brighter than the distance modulus says: K < 0.
    assert cs.kcorrection_power_law(1.0, 0.0) < 0


def test_magnitude_errors():
    with pytest.raises(InputError, match=r"`absolute_mag` must be finite; got nan"):
        cs.apparent_magnitude(float("nan"), 0.5)
    with pytest.raises(InputError, match=r"`z` must be finite and > 0; got 0.0 \(at index 0\)"):
        cs.absolute_magnitude(20.0, [0.0, 0.5])
    with pytest.raises(
        InputError,
        match=r"`apparent_mag` and `z` must broadcast together; got shapes \(3,\) and \(2,\)",
    ):
        cs.absolute_magnitude([20.0, 21.0, 22.0], [0.1, 0.5])
    # Arrays broadcast: one magnitude at several redshifts.
    got = cs.apparent_magnitude(-20.0, np.array([0.1, 0.5]))
    np.testing.assert_allclose(got, -20.0 + cs.distance_modulus(np.array([0.1, 0.5])))


def test_kcorrection_specifications():
    z = np.linspace(0.0, 2.0, 2001)
    table = cs.as_kcorrection({"z": z, "k": cs.kcorrection_power_law(z, -0.7)})
    probe = np.array([0.013, 0.77, 1.999])
    # Linear interpolation on a 1e-3 grid of a smooth curve: error < h^2 max|K''| / 8 ~ 1e-7.
    np.testing.assert_allclose(table(probe), cs.kcorrection_power_law(probe, -0.7), atol=1e-6)
    power = cs.as_kcorrection({"beta": -0.7})
    assert power(1.0) == cs.kcorrection_power_law(1.0, -0.7)
    own = cs.as_kcorrection(lambda zz: 0.5 * zz)
    np.testing.assert_allclose(own(probe), 0.5 * probe)
    assert isinstance(own(0.3), float)
    assert cs.as_kcorrection(None)(np.array([0.5, 1.0])).tolist() == [0.0, 0.0]
    assert cs.as_kcorrection(table) is table


def test_polynomial_kcorrection_is_the_polynomial_and_every_form_is_accepted():
    # K(z) = sum c_n z^n, checked against numpy's own polynomial evaluation (Horner by hand).
    coefficients = [0.02, 1.2, -0.3, 0.05]
    k = cs.as_kcorrection({"form": "polynomial", "coefficients": coefficients})
    z = np.array([0.0, 0.1, 0.55, 1.3])
    expected = ((0.05 * z - 0.3) * z + 1.2) * z + 0.02
    np.testing.assert_allclose(k(z), expected, rtol=1e-14)
    assert isinstance(k(0.3), float)
    assert k(0.0) == 0.02
    # Explicit forms give the same functions as the short ones.
    assert cs.as_kcorrection({"form": "power_law", "beta": -0.7})(0.8) == (
        cs.kcorrection_power_law(0.8, -0.7))
    table = cs.as_kcorrection({"form": "table", "z": [0.0, 1.0], "k": [0.0, 0.4]})
    assert table(0.25) == pytest.approx(0.1, abs=1e-15)
    # The run file's tables hold tuples (frozen): accepted too.
    assert cs.PolynomialKCorrection((0.0, 1.0))(0.5) == 0.5
    assert cs.as_kcorrection(k) is k


def test_polynomial_kcorrection_errors():
    with pytest.raises(
        InputError, match=r"`coefficients` must hold 1 to 10 numbers \(c0, c1, ...\); got 0"
    ):
        cs.PolynomialKCorrection(())
    with pytest.raises(InputError, match=r"`coefficients` must be finite; got nan \(at index 1\)"):
        cs.PolynomialKCorrection([0.0, float("nan")])
    with pytest.raises(InputTypeError, match=r"`coefficients` must be a list of numbers"):
        cs.PolynomialKCorrection(1.5)
    with pytest.raises(
        InputError,
        match=r"`kcorrection` form must be one of power_law, table, polynomial; got "
        r"'polynomal' \(did you mean 'polynomial'\?\)",
    ):
        cs.as_kcorrection({"form": "polynomal", "coefficients": [0.0]})
    with pytest.raises(
        InputError,
        match=r"`kcorrection` with form 'polynomial' must have the keys \['coefficients'\] "
        r"besides 'form'; got \['beta'\]",
    ):
        cs.as_kcorrection({"form": "polynomial", "beta": 1.0})
    with pytest.raises(InputError, match=r"`z` must be finite and >= 0; got -0.1"):
        cs.PolynomialKCorrection([0.0, 1.0])(-0.1)


def test_kcorrection_errors():
    with pytest.raises(InputError, match=r"`beta` must be finite; got inf"):
        cs.kcorrection_power_law(0.5, float("inf"))
    table = cs.TabulatedKCorrection([0.0, 0.5, 1.0], [0.0, -0.1, -0.3])
    with pytest.raises(
        InputError,
        match=r"`z` must be inside the K-correction table's range \[0.0, 1.0\] "
        r"\(no extrapolation\); got 1.5",
    ):
        table(1.5)
    with pytest.raises(
        InputError,
        match=r"`z` of a K-correction table must be strictly increasing; "
        r"got 0.5 then 0.5 \(at index 2\)",
    ):
        cs.TabulatedKCorrection([0.0, 0.5, 0.5], [0.0, 0.1, 0.2])
    with pytest.raises(
        InputError, match=r"`k` must have the same length as `z` \(3\); got shape \(2,\)"
    ):
        cs.TabulatedKCorrection([0.0, 0.5, 1.0], [0.0, 0.1])
    with pytest.raises(InputError, match=r"`k` must be finite; got nan \(at index 1\)"):
        cs.TabulatedKCorrection([0.0, 0.5], [0.0, float("nan")])
    with pytest.raises(InputError, match=r"`z` of a K-correction table must be 1-D with >= 2 rows"):
        cs.TabulatedKCorrection([0.5], [0.1])
    with pytest.raises(
        InputError, match=r"`kcorrection` has unknown key 'bta'; .*\(did you mean 'beta'\?\)"
    ):
        cs.as_kcorrection({"bta": 1.0})
    with pytest.raises(
        InputError,
        match=r"`kcorrection` must have the keys \{'beta'\} or \{'z', 'k'\} or "
        r"\{'form', ...\}; got \['z'\]",
    ):
        cs.as_kcorrection({"z": [0, 1]})
    with pytest.raises(
        InputTypeError, match=r"`kcorrection` must be None, a callable, or a mapping .*got float"
    ):
        cs.as_kcorrection(0.3)
    bad_shape = cs.as_kcorrection(lambda zz: np.zeros(3))
    with pytest.raises(
        InputError,
        match=r"`kcorrection` must return one value per redshift \(shape \(2,\)\); "
        r"got shape \(3,\)",
    ):
        bad_shape(np.array([0.1, 0.2]))
    not_finite = cs.as_kcorrection(lambda zz: np.where(zz > 0.15, 0.0, np.nan))
    with pytest.raises(
        InputError, match=r"`kcorrection` must return finite values; got nan \(at index 0\)"
    ):
        not_finite(np.array([0.1, 0.2]))


# ---------------------------------------------------------------------------------------------
# Values quoted in h units
# ---------------------------------------------------------------------------------------------
def test_phi_star_from_h_units_keeps_counts_physical():
    # A count in a fixed region is h-independent: phi* [h^3 Mpc^-3] x V [h^-3 Mpc^3] equals
    # phi* [Mpc^-3] x V [Mpc^3]. V [h^-3 Mpc^3] is astropy's volume for H0 = 100 (same Om0).
    phi_h3 = 1.49e-2  # Blanton et al. 2003, ApJ 592, 819 (^0.1r phi*, h^3 Mpc^-3)
    v_h = cs.comoving_volume_mpc3(0.02, 0.1, cosmo=FlatLambdaCDM(H0=100, Om0=0.3))
    v = cs.comoving_volume_mpc3(0.02, 0.1, cosmo=FlatLambdaCDM(H0=70, Om0=0.3))
    assert cs.phi_star_from_h_units(phi_h3, 0.7) * v == pytest.approx(phi_h3 * v_h, rel=1e-10)


def test_m_star_from_h_units_matches_distance_modulus():
    # M - 5 log h is what a distance modulus with H0 = 100 gives; M itself, with H0 = 70.
    m_app, z = 17.0, 0.1
    m_h = m_app - cs.distance_modulus(z, FlatLambdaCDM(H0=100, Om0=0.3))
    m_70 = m_app - cs.distance_modulus(z, FlatLambdaCDM(H0=70, Om0=0.3))
    assert cs.m_star_from_h_units(m_h, 0.7) == pytest.approx(m_70, abs=1e-10)


def test_h_unit_errors():
    with pytest.raises(
        InputError, match=r"`h` = H0 / \(100 km/s/Mpc\) must be in \(0, 2\]; got 70.0"
    ):
        cs.phi_star_from_h_units(1e-2, 70.0)
    with pytest.raises(
        InputError, match=r"`h` = H0 / \(100 km/s/Mpc\) must be in \(0, 2\]; got 0.0"
    ):
        cs.m_star_from_h_units(-20.44, 0.0)
    with pytest.raises(InputError, match=r"`phi_star_h3` must be > 0 h\^3 Mpc\^-3; got -0.01"):
        cs.phi_star_from_h_units(-0.01, 0.7)
    with pytest.raises(InputError, match=r"`m_star_minus_5logh` must be finite; got nan"):
        cs.m_star_from_h_units(float("nan"), 0.7)
    with pytest.raises(InputTypeError, match=r"`h` must be a real number; got '0.7'"):
        cs.m_star_from_h_units(-20.44, "0.7")
