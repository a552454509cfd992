"""Luminosity- and stellar-mass-function estimators: STY, 1/Vmax, SWML.

Outside references, named beside each check:
- truth-known mocks from countscale.mock (its own tests check it against closed forms): the
  recovery checks use 3 sigma for one seed, pull distributions over seeds otherwise;
- astropy (distance modulus, comoving volume) for V_max, by root finding independent of the
  package's tables;
- published parameters and densities: Blanton et al. 2003, ApJ 592, 819 (^0.1r); Norberg et
  al. 2002, MNRAS 336, 907 (b_J); Baldry et al. 2012, MNRAS 421, 621 (double Schechter, H0 =
  70);
- the estimators' own papers for the behaviour checked: Schmidt 1968 (1/Vmax), Sandage,
  Tammann & Yahil 1979 (STY), Efstathiou, Ellis & Peterson 1988 (SWML: insensitive to density
  inhomogeneities, 1/Vmax is not), Willmer 1997, AJ 114, 898 (small samples).
Checks that compare the package with itself are labelled self-consistency.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from astropy.cosmology import Planck18
from scipy import optimize

from countscale import cosmology
from countscale.errors import InputError, InputTypeError
from countscale.footprint import Footprint
from countscale.lumfunc import (
    DoubleSchechterMass,
    Evolution,
    LuminosityFunctionFitError,
    Schechter,
    Selection,
    STYFit,
    bin_edges,
    swml_estimate,
    vmax_estimate,
)
from countscale.lumfunc import sty as sty_module
from countscale.lumfunc.sty import _COARSE, node_weights
from countscale.mock import (
    MassFunctionGalaxies,
    Measurement,
    MockSpec,
    SchechterGalaxies,
    make_mock,
)

H = cosmology.hubble_h("Planck18")
# Blanton et al. 2003, ApJ 592, 819 (^0.1r): phi* = 1.49e-2 h^3 Mpc^-3, M* - 5 log h = -20.44,
# alpha = -1.05, in Planck18's h with the project's conversion helpers.
BLANTON = Schechter(m_star=cosmology.m_star_from_h_units(-20.44, H), alpha=-1.05,
                    phi_star=cosmology.phi_star_from_h_units(1.49e-2, H))
FAINT = 19.0
Z_RANGE = (0.01, 0.4)
DEMO_EVOLUTION = Evolution(Q=0.5)


def schechter_catalogue(seed, radius_deg, lf=BLANTON, evolution=DEMO_EVOLUTION,
                        beta=-1.2, faint=FAINT):
    """A complete flux-limited catalogue (m_true <= faint) over a cap, and the cap."""
    footprint = Footprint.cap(150.0, 20.0, radius_deg, max_order=10)
    galaxies = SchechterGalaxies(m_star=lf.m_star, alpha=lf.alpha, phi_star=lf.phi_star,
                                 evolution=evolution, kcorrection_beta=beta)
    spec = MockSpec(galaxies=galaxies, measurement=Measurement(m50=30.0, width=0.1),
                    mag_limits=(faint,), generation_mag_limit=faint)
    return make_mock(spec, rng=seed, footprint=footprint).catalogue, footprint


def selection_for(footprint, evolution=DEMO_EVOLUTION, beta=-1.2, z_range=Z_RANGE,
                  faint=FAINT):
    return Selection((10.0, faint), z_range, footprint.area_sr,
                     kcorrection=None if beta is None else {"beta": beta},
                     evolution=evolution)


def sigma(fit, name):
    return math.sqrt(fit.cov_[fit.cov_names_.index(name), fit.cov_names_.index(name)])


def bin_truth(form, lower, upper):
    """The true function averaged over each bin."""
    return np.array([form.integrate(a, b) / (b - a) for a, b in zip(lower, upper, strict=True)])


@pytest.fixture(scope="module")
def big():
    """~18 000 galaxies: Blanton et al. 2003 parameters, Q = 0.5, P = 0, beta = -1.2."""
    catalogue, footprint = schechter_catalogue(11, 4.0)
    sample = selection_for(footprint).select(catalogue.mag_true.to_numpy(),
                                             catalogue.z.to_numpy())
    return catalogue, footprint, sample


# --------------------------------------------------------------------------------------------
# Recovery on truth-known mocks
# --------------------------------------------------------------------------------------------
def test_sty_recovers_the_mock_within_3_sigma(big):
    _, _, sample = big
    fit = STYFit().fit(sample)
    for name, truth in (("m_star", BLANTON.m_star), ("alpha", BLANTON.alpha),
                        ("phi_star", BLANTON.phi_star)):
        assert abs(fit.params_[name] - truth) < 3 * sigma(fit, name), name
    # Errors of the expected size for ~18 000 galaxies (a loose sanity range, not a reference).
    assert 0.005 < sigma(fit, "m_star") < 0.05
    assert fit.n_sources_ == sample.n
    assert fit.evolution_ == Evolution(Q=0.5, P=0.0)


def _pulls(seeds, radius_deg):
    rows = []
    truth = {"m_star": BLANTON.m_star, "alpha": BLANTON.alpha, "phi_star": BLANTON.phi_star,
             "Q": 0.5, "P": 0.8}
    for seed in seeds:
        catalogue, footprint = schechter_catalogue(seed, radius_deg,
                                                   evolution=Evolution(Q=0.5, P=0.8))
        sample = selection_for(footprint, evolution=Evolution(Q=0.0, P=0.0)).select(
            catalogue.mag_true.to_numpy(), catalogue.z.to_numpy())
        fit = STYFit(fit_evolution=("Q", "P")).fit(sample)
        rows.append([(fit.params_[n] - t) / sigma(fit, n) for n, t in truth.items()])
    return np.array(rows)


def test_pulls_of_sty_with_fitted_evolution_over_seeds():
    # Q and P fitted (Lin et al. 1999 form) from wrong starting values (0, 0): every pull of
    # M*, alpha, phi*, Q, P within 3 sigma, their scatter about 1. Reduced ensemble; the
    # full one is test_pull_distribution_full.
    pulls = _pulls(range(100, 104), 2.0)
    assert np.all(np.abs(pulls) < 3.0)
    rms = np.sqrt((pulls**2).mean(axis=0))
    assert np.all((rms > 0.3) & (rms < 1.8)), rms


@pytest.mark.slow
def test_pull_distribution_full():
    pulls = _pulls(range(200, 240), 2.0)
    mean, std = pulls.mean(axis=0), pulls.std(axis=0)
    assert np.all(np.abs(mean) < 0.45), mean  # 3 sigma of a mean of 40 unit pulls is 0.47
    assert np.all((std > 0.75) & (std < 1.3)), std
    coverage = (np.abs(pulls) < 1.0).mean(axis=0)
    assert np.all((coverage > 0.5) & (coverage < 0.85)), coverage


def test_vmax_and_swml_follow_the_true_function(big):
    _, _, sample = big
    edges = bin_edges(sample.x(), 0.25)
    vmax = vmax_estimate(sample, edges=edges)
    swml = swml_estimate(sample, edges=edges)
    # chi^2 against the true function averaged over each bin, bins every x of which is
    # observable and holding >= 5 galaxies: 1/Vmax errors are independent (Poisson), SWML's
    # are correlated (its full covariance is used).
    for result in (vmax, swml):
        good = result.complete & (result.n >= 5)
        assert good.sum() >= 25
        truth = bin_truth(BLANTON, result.lower, result.upper)
        resid = (result.phi - truth)[good]
        if result.method == "vmax":
            chi2 = float(((resid / result.phi_err[good]) ** 2).sum())
        else:
            cov = result.extra["covariance"][np.ix_(good, good)]
            chi2 = float(resid @ np.linalg.solve(cov, resid))
        assert 0.4 < chi2 / good.sum() < 1.8, (result.method, chi2, good.sum())


def test_the_three_estimators_agree(big):
    _, _, sample = big
    fit = STYFit().fit(sample)
    edges = bin_edges(sample.x(), 0.25)
    vmax = vmax_estimate(sample, edges=edges)
    swml = swml_estimate(sample, edges=edges)
    assert np.array_equal(vmax.centre, swml.centre)
    # Same galaxies, no density gradient: the two binned estimates agree within their errors
    # (self-consistency of two estimators on one sample).
    good = vmax.n >= 10
    both = np.hypot(vmax.phi_err, swml.phi_err)
    assert np.all(np.abs(vmax.phi - swml.phi)[good] < 2.0 * both[good])
    # STY's curve (bin-averaged) against SWML: chi^2 per bin about 1.
    good = swml.complete & (swml.n >= 5)
    resid = (swml.phi - bin_truth(fit.form_, swml.lower, swml.upper))[good]
    cov = swml.extra["covariance"][np.ix_(good, good)]
    assert float(resid @ np.linalg.solve(cov, resid)) / good.sum() < 1.8


def test_a_wall_in_redshift_biases_vmax_and_not_sty_or_swml(big):
    # Efstathiou, Ellis & Peterson 1988 (MNRAS 232, 431, section 2): estimators conditional on
    # redshift are insensitive to density inhomogeneities; 1/Vmax is not. Keep a third of the
    # galaxies outside 0.10 < z < 0.14 (a wall 3 times as dense as its surroundings): the
    # luminosity distribution at each redshift is unchanged.
    catalogue, footprint, _ = big
    z = catalogue.z.to_numpy()
    keep = ((z > 0.10) & (z < 0.14)) | (np.random.default_rng(4).random(z.size) < 1 / 3)
    sample = selection_for(footprint).select(catalogue.mag_true.to_numpy()[keep], z[keep])
    fit = STYFit().fit(sample)
    for name in ("m_star", "alpha"):
        assert abs(fit.params_[name] - getattr(BLANTON, name)) < 3 * sigma(fit, name), name
    edges = bin_edges(sample.x(), 0.5)
    vmax = vmax_estimate(sample, edges=edges)
    swml = swml_estimate(sample, edges=edges)
    truth = bin_truth(BLANTON, vmax.lower, vmax.upper)
    # Shapes (each divided by its value in the bin around M* - 1, where both are precise):
    # SWML follows the truth; 1/Vmax's faint end, seen only in front of the wall, falls away.
    ref = int(np.argmin(np.abs(vmax.centre - (BLANTON.m_star + 1.0))))
    faint = (vmax.centre > -18.5) & (vmax.centre < -17.0) & vmax.complete
    assert faint.sum() >= 2
    for result, biased in ((vmax, True), (swml, False)):
        ratio = (result.phi / result.phi[ref]) / (truth / truth[ref])
        rel_err = result.phi_err / result.phi
        combined = float(((ratio[faint] - 1.0) / rel_err[faint]).sum()) / math.sqrt(faint.sum())
        if biased:
            assert combined < -3.0, combined
        else:
            assert abs(combined) < 3.0, combined


def test_vmax_flags_bins_no_galaxy_can_fill_and_averages_over_the_visible_part(big):
    # A bin straddling the faintest observable x: 1/Vmax estimates the integral over the part
    # some galaxy can occupy (Schmidt 1968), which is what it is flagged for.
    _, _, sample = big
    _, hi = sample.x_range()
    edges = np.array([hi - 4.0, hi - 2.0, hi + 2.0])
    result = vmax_estimate(sample, edges=edges)
    assert result.complete.tolist() == [True, False]
    visible = BLANTON.integrate(hi - 2.0, hi) / 4.0
    whole = BLANTON.integrate(hi - 2.0, hi + 2.0) / 4.0
    assert abs(result.phi[1] - visible) < 3 * result.phi_err[1]
    assert result.phi[1] < whole


def test_vmax_against_astropy_root_finding(big):
    # V_max of a few galaxies: z_max from scipy's brentq on astropy's distance modulus plus the
    # K-correction minus Q z (independent of the package's tables), volume from astropy.
    _, footprint, sample = big
    vmax = sample.vmax()
    x = sample.x()
    rng = np.random.default_rng(0)
    for i in rng.choice(sample.n, 5, replace=False):
        def apparent(z, i=i):
            return (x[i] + Planck18.distmod(z).value - 2.5 * (1 - 1.2) * math.log10(1 + z)
                    - 0.5 * z)
        z_max = min(Z_RANGE[1], optimize.brentq(lambda z, i=i: apparent(z) - FAINT, 1e-4, 5))
        z_min = Z_RANGE[0]
        if apparent(Z_RANGE[0]) < 10.0:
            z_min = optimize.brentq(lambda z, i=i: apparent(z) - 10.0, 1e-4, 5)
        volume = ((Planck18.comoving_volume(z_max) - Planck18.comoving_volume(z_min)).value
                  * footprint.area_sr / (4 * math.pi))
        assert vmax[i] == pytest.approx(volume, rel=2e-5)


def test_node_interpolation_and_coarse_volume_match_direct_sums(big):
    # Self-consistency: the likelihood's sum over galaxies of ln S(z_i) through the redshift
    # nodes equals the direct per-galaxy sum; the normalisation's coarse Simpson volume equals
    # the full-grid one.
    _, _, sample = big
    fit = STYFit().fit(sample)
    shape, theta = fit.shape_, fit.theta_
    lo, hi = sample.limits(sample.z)
    direct = float(sample.weight @ np.log(shape.integral(theta, lo, hi)))
    g_lo, g_hi = sample.limits_from_g(sample.g_nodes())
    nodes = float(node_weights(sample) @ np.log(shape.integral(theta, g_lo, g_hi)))
    assert nodes == pytest.approx(direct, rel=1e-9)
    coarse = fit._volume_term(sample, shape, theta, 0.5, 0.0, coarse=True)
    full = fit._volume_term(sample, shape, theta, 0.5, 0.0, coarse=False)
    assert coarse == pytest.approx(full, rel=1e-9)
    assert _COARSE == 8


def test_weights_are_handled_by_the_sandwich_covariance(big):
    # Every weight 2 is "every galaxy counted twice": the weighted likelihood doubles its
    # curvature, the sandwich restores the errors of the unweighted sample (self-consistency;
    # equal to ~5 % as J ~ H only on average).
    _, _, sample = big
    plain = STYFit().fit(sample)
    doubled = STYFit().fit(dataclasses.replace(sample, weight=np.full(sample.n, 2.0)))
    for name in ("m_star", "alpha"):
        assert doubled.params_[name] == pytest.approx(plain.params_[name], abs=1e-4)
        assert sigma(doubled, name) == pytest.approx(sigma(plain, name), rel=0.05)
    assert doubled.params_["phi_star"] == pytest.approx(2 * plain.params_["phi_star"], rel=1e-4)


def test_photometric_redshifts_are_convolved(big):
    # Gaussian redshift errors of 0.01 at 0.1 < z < 0.4, two realisations of the errors on the
    # same galaxies: ignoring them makes M* brighter; STY with the convolution gives back, on
    # average, the fit to the true redshifts (self-consistency between fits of one sample).
    # alpha keeps an offset of -0.2 to -0.6 sigma: the approximation (a Gaussian in
    # luminosity at the photometric redshift) corrects M*, not the faint end; see the STY
    # module's notes.
    catalogue, footprint, _ = big
    cut = catalogue[catalogue.z > 0.09].iloc[::3]
    z = cut.z.to_numpy()
    z_err = np.full(z.size, 0.01)
    selection = selection_for(footprint, z_range=(0.1, 0.4))
    mag = cut.mag_true.to_numpy()
    exact = STYFit().fit(selection.select(mag, z))
    shifts = {"ignored": [], "convolved": []}
    for seed in (0, 1):
        z_phot = z + z_err * np.random.default_rng(seed).standard_normal(z.size)
        ignored = STYFit().fit(selection.select(mag, z_phot))
        convolved = STYFit().fit(selection.select(mag, z_phot, redshift_error=z_err))
        for label, fit in (("ignored", ignored), ("convolved", convolved)):
            shifts[label].append([(fit.params_[n] - exact.params_[n]) / sigma(exact, n)
                                  for n in ("m_star", "alpha")])
    ignored, convolved = (np.mean(shifts[k], axis=0) for k in ("ignored", "convolved"))
    assert ignored[0] < -0.4
    assert abs(convolved[0]) < 0.4
    assert abs(convolved[1]) < 0.8


# --------------------------------------------------------------------------------------------
# Published densities reproduced from published parameters
# --------------------------------------------------------------------------------------------
def test_blanton03_luminosity_density_from_a_fit_to_its_parameters(big):
    # Blanton et al. 2003: j = -15.90 +- 0.03 mag Mpc^-3 h (^0.1r, their Table). The STY fit
    # to a mock of their parameters (Planck18 h) gives j in Mpc^-3; in h units j_h = j +
    # 2.5 log10 h (phi* ~ h^3, L* ~ h^-2).
    _, _, sample = big
    estimates = STYFit().fit(sample).estimates(300, rng=1)
    j = estimates["luminosity_density_mag"]
    j_h = j.median + 2.5 * math.log10(H)
    half_width = 0.5 * (j.interval_68[1] - j.interval_68[0])
    assert abs(j_h - (-15.90)) < 3 * math.hypot(half_width, 0.03)


def test_norberg02_luminosity_density_from_a_fit_to_its_parameters():
    # Norberg et al. 2002: M* - 5 log h = -19.66, alpha = -1.21, phi* = 1.61e-2 h^3 Mpc^-3
    # (b_J, z = 0), rho_L = (1.82 +- 0.17)e8 h Lsun Mpc^-3. Sun's M(b_J) = 5.33 from memory
    # (unchecked; the tolerance is the published error plus ours, and 5.33 vs 5.3 moves rho_L
    # by 3 %). No evolution, no K-correction in this mock.
    norberg = Schechter(m_star=cosmology.m_star_from_h_units(-19.66, H), alpha=-1.21,
                        phi_star=cosmology.phi_star_from_h_units(1.61e-2, H))
    catalogue, footprint = schechter_catalogue(21, 3.0, lf=norberg, evolution=Evolution(),
                                               beta=None)
    sample = selection_for(footprint, evolution=Evolution(), beta=None).select(
        catalogue.mag_true.to_numpy(), catalogue.z.to_numpy())
    fit = STYFit().fit(sample)
    draws = fit.draw_params(300, rng=2)
    rho_h = np.array([Schechter(m, a, p).luminosity_density_lsun_mpc3(5.33) / H
                      for m, a, p in zip(draws["m_star"], draws["alpha"], draws["phi_star"],
                                         strict=True)])
    assert abs(np.median(rho_h) - 1.82e8) < 3 * math.hypot(rho_h.std(), 0.17e8)


@pytest.fixture(scope="module")
def baldry_sample():
    # Baldry et al. 2012 (H0 = 70): M* = 10^10.66, phi_1 = 3.96e-3, alpha_1 = -0.35,
    # phi_2 = 0.79e-3, alpha_2 = -1.47 (Mpc^-3 dex^-1), in Planck18's h: phi ~ h^3, M ~ h^-2.
    to_planck = (H / 0.7) ** 3
    form = DoubleSchechterMass(10.66 + 2 * math.log10(0.7 / H), 3.96e-3 * to_planck, -0.35,
                               0.79e-3 * to_planck, -1.47)
    footprint = Footprint.cap(150.0, 20.0, 8.0, max_order=10)
    galaxies = MassFunctionGalaxies(mass_function=form, log10_mass_min=5.5, z_min=0.002,
                                    z_max=0.1)
    spec = MockSpec(galaxies=galaxies, measurement=Measurement(m50=30.0, width=0.1),
                    mag_limits=(19.8,), generation_mag_limit=19.8)
    catalogue = make_mock(spec, rng=3, footprint=footprint).catalogue
    selection = Selection((10.0, 19.8), (0.002, 0.06), footprint.area_sr)
    sample = selection.select(catalogue.mag_true.to_numpy(), catalogue.z.to_numpy(),
                              log10_mass=catalogue.log10_mass.to_numpy())
    return form, sample


def test_baldry12_double_schechter_recovered_with_its_mass_density(baldry_sample):
    # GAMA-like: z < 0.06, r <= 19.8, ~7000 galaxies. The double-Schechter STY fit recovers
    # the parameters within 3 sigma; its rho* and n(> 10^8 Msun), back in H0 = 70 units, match
    # Baldry et al. 2012's rho* = 2.234e8 Msun Mpc^-3 and n(> 10^8) = 0.0325173 Mpc^-3
    # (computed from their parameters, a closed form checked in test_lumfunc_forms.py).
    form, sample = baldry_sample
    fit = STYFit(model="double_schechter").fit(sample)
    for name in ("log10_mass_star", "alpha_1", "alpha_2", "phi_star_1"):
        assert abs(fit.params_[name] - getattr(form, name)) < 3 * sigma(fit, name), name
    draws = fit.draw_params(300, rng=5)
    names = ("log10_mass_star", "phi_star_1", "alpha_1", "phi_star_2", "alpha_2")
    forms = [DoubleSchechterMass(*(draws[n][i] for n in names)) for i in range(300)]
    to_70 = 0.7 / H
    rho = np.array([f.mass_density_msun_mpc3() for f in forms]) * to_70  # rho ~ h
    n8 = np.array([f.number_density_above(8.0 + 2 * math.log10(to_70)) for f in forms]
                  ) * to_70**3
    for values, published in ((rho, 2.234e8), (n8, 0.0325173)):
        lo, hi = np.percentile(values, [0.15, 99.85])
        assert lo < published < hi, (published, lo, hi)


def test_mass_function_binned_estimates_and_limits(baldry_sample):
    form, sample = baldry_sample
    info = sample.describe()["mass_limit"]
    # The stated limit: a galaxy with the 95th-percentile mass-to-light ratio at r = 19.8.
    assert info["quantile"] == 0.95 and "95th percentile" in info["assumption"]
    assert np.all(np.diff(info["log10_mass"]) > 0)
    swml = swml_estimate(sample)
    vmax = vmax_estimate(sample)
    assert swml.x_name == "log10_mass" and "log10_mass" in swml.to_json()
    for result in (swml, vmax):
        good = result.n >= 10
        truth = bin_truth(form, result.lower, result.upper)
        chi2 = float((((result.phi - truth) / result.phi_err)[good] ** 2).sum())
        assert chi2 / good.sum() < 1.8


# --------------------------------------------------------------------------------------------
# Small samples (Willmer 1997, AJ 114, 898)
# --------------------------------------------------------------------------------------------
def _small_samples(alpha, n_samples, size, seed):
    """Disjoint random subsamples of `size` galaxies from one mock (independent Poisson
    samples of the same survey shrunk to a share of the area)."""
    lf = Schechter(m_star=BLANTON.m_star, alpha=alpha, phi_star=BLANTON.phi_star)
    # ~1e4 galaxies per 28 deg^2 at r <= 19 for these parameters; 30 % to spare.
    area_deg2 = 1.3 * n_samples * size / 1.0e4 * 28.3
    radius = math.degrees(math.acos(1 - 2 * area_deg2 / 41252.96))
    catalogue, footprint = schechter_catalogue(seed, radius, lf=lf, evolution=Evolution(),
                                               beta=None)
    mag, z = catalogue.mag_true.to_numpy(), catalogue.z.to_numpy()
    assert mag.size >= n_samples * size
    order = np.random.default_rng(seed).permutation(mag.size)
    share = footprint.area_sr * size / mag.size
    selection = Selection((10.0, FAINT), Z_RANGE, share)
    rows = []
    for k in range(n_samples):
        idx = order[k * size:(k + 1) * size]
        fit = STYFit().fit(selection.select(mag[idx], z[idx]))
        rows.append([fit.params_["alpha"], sigma(fit, "alpha"), fit.params_["phi_star"],
                     sigma(fit, "phi_star")])
    return lf, np.array(rows)


def test_sty_errors_at_300_galaxies_reduced():
    # 30 samples of 300 galaxies, alpha = -1.5: alpha unbiased within its error of the mean
    # and the quoted errors of the right size (see the docs, "Small samples").
    lf, rows = _small_samples(-1.5, 30, 300, 31)
    pull = (rows[:, 0] - lf.alpha) / rows[:, 1]
    assert abs(pull.mean()) < 0.5
    assert 0.6 < pull.std() < 1.5


@pytest.mark.slow
def test_sty_small_sample_behaviour_full():
    # The numbers in the docs (countscale.lumfunc, "Small samples"): 300 samples of 300.
    # Measured: alpha's median within 0.013 of the truth, pull widths 0.98-1.04 (alpha) and
    # 0.97-1.10 (phi*); phi*'s mean above its median (skewed) at alpha = -1.8.
    for alpha in (-1.2, -1.5, -1.8):
        lf, rows = _small_samples(alpha, 300, 300, 41)
        pull = (rows[:, 0] - lf.alpha) / rows[:, 1]
        pull_phi = (rows[:, 2] - lf.phi_star) / rows[:, 3]
        assert abs(np.median(rows[:, 0]) - alpha) < 0.04
        assert 0.85 < pull.std() < 1.3, (alpha, pull.std())
        assert 0.85 < pull_phi.std() < 1.4, (alpha, pull_phi.std())
        if alpha == -1.8:
            assert rows[:, 2].mean() > np.median(rows[:, 2])


# --------------------------------------------------------------------------------------------
# Using a fit
# --------------------------------------------------------------------------------------------
def test_nz_integrates_to_the_number_of_galaxies(big):
    # The fitted n(z) over the sample's redshift range, for its faint limit, predicts the
    # (weighted) number of galaxies the normalisation was fitted to: self-consistency of nz
    # with phi* (up to the bright limit, which takes out a negligible few).
    _, footprint, sample = big
    fit = STYFit().fit(sample)
    z = np.linspace(*Z_RANGE, 4001)
    predicted = np.trapezoid(fit.nz(z, FAINT, area_sr=footprint.area_sr), z)
    assert predicted == pytest.approx(sample.n, rel=2e-3)
    per_sr = fit.nz(np.array([0.1, 0.2]), FAINT)
    assert np.allclose(per_sr * footprint.area_sr, fit.nz(np.array([0.1, 0.2]), FAINT,
                                                          area_sr=footprint.area_sr))


def test_draw_params_are_reproducible_and_correlated(big, monkeypatch):
    _, _, sample = big
    fit = STYFit().fit(sample)
    a = fit.draw_params(400, rng=9)
    b = fit.draw_params(400, rng=np.random.default_rng(9))
    assert set(a) == {"m_star", "alpha", "phi_star", "Q", "P"}
    for name in a:
        np.testing.assert_array_equal(a[name], b[name])
    # M* and alpha are correlated positively in magnitudes (brighter M* with steeper alpha);
    # phi* anticorrelates with alpha. Draws follow the covariance.
    corr = np.corrcoef(a["m_star"], a["alpha"])[0, 1]
    i, j = fit.cov_names_.index("m_star"), fit.cov_names_.index("alpha")
    expected = fit.cov_[i, j] / math.sqrt(fit.cov_[i, i] * fit.cov_[j, j])
    assert corr == pytest.approx(expected, abs=0.15)
    assert a["phi_star"].std() == pytest.approx(sigma(fit, "phi_star"), rel=0.2)
    # Self-consistency: the draws' normalisations from the quadratic expansion of the
    # selection volume equal the exact ones (forced by a negative tolerance) to a small
    # fraction of phi*'s error.
    monkeypatch.setattr(sty_module, "_EXPANSION_TOLERANCE", -1.0)
    exact = fit.draw_params(400, rng=9)
    rel = math.sqrt(fit.normalisation_["count_relative_variance"])
    assert np.max(np.abs(a["phi_star"] / exact["phi_star"] - 1.0)) < 0.05 * rel
    np.testing.assert_array_equal(a["alpha"], exact["alpha"])


# --------------------------------------------------------------------------------------------
# Bad input: one line each, naming the argument, the rule and the value
# --------------------------------------------------------------------------------------------
def test_selection_errors():
    with pytest.raises(InputError, match=r"`mag_limits` must be a pair of apparent magnitudes "
                                         r"\[bright, faint\] with the first < the second; "
                                         r"got \[20.0, 14.0\]"):
        Selection((20.0, 14.0), (0.1, 0.3), 0.01)
    with pytest.raises(InputError, match=r"`redshift_range` must start at z >= 0; got "
                                         r"\[-0.1, 0.3\]"):
        Selection((14.0, 20.0), (-0.1, 0.3), 0.01)
    with pytest.raises(InputError, match=r"`area_sr` must be in \(0, 4 pi\] sr; got 13.0"):
        Selection((14.0, 20.0), (0.1, 0.3), 13.0)
    with pytest.raises(InputTypeError, match=r"`evolution` must be a countscale.lumfunc."
                                             r"Evolution; got dict"):
        Selection((14.0, 20.0), (0.1, 0.3), 0.01, evolution={"Q": 1})
    with pytest.raises(
        InputError,
        match=r"`kcorrection` must be defined over the redshift range \[0.1, 0.9\]: `z` must "
              r"be inside the K-correction table's range \[0.0, 0.5\] \(no extrapolation\); "
              r"got 0.50",
    ):
        Selection((14.0, 20.0), (0.1, 0.9), 0.01,
                  kcorrection={"z": [0.0, 0.25, 0.5], "k": [0.0, 0.1, 0.3]})


def test_sample_errors():
    sel = Selection((14.0, 20.0), (0.1, 0.3), 0.01)
    mag = np.linspace(14.5, 19.5, 40)
    z = np.full(40, 0.2)
    with pytest.raises(InputError, match=r"no redshift lies inside `redshift_range` "
                                         r"\[0.1, 0.3\] \(40 in the footprint, 40 outside "
                                         r"the redshift range\)"):
        sel.select(mag, np.full(40, 0.5))
    with pytest.raises(InputError, match=r"no source lies inside the apparent limits "
                                         r"\[14.0, 20.0\]; got 40 sources, all outside"):
        sel.select(mag + 10, z)
    with pytest.raises(InputError, match=r"no source inside the apparent limits has a finite "
                                         r"redshift \(40 in the footprint, 40 without a "
                                         r"redshift\)"):
        sel.select(mag, np.full(40, np.nan))
    with pytest.raises(InputError, match=r"a luminosity function needs at least 20 galaxies "
                                         r"inside the selection; got 19 \(40 in the "
                                         r"footprint, 21 outside the redshift range\)"):
        sel.select(mag, np.where(np.arange(40) < 19, 0.2, 0.6))
    with pytest.raises(InputError, match=r"`z` must be 1-d with 40 values \(one per source\); "
                                         r"got shape \(39,\)"):
        sel.select(mag, z[:39])
    with pytest.raises(InputError, match=r"`weight` must be finite and > 0; got 0.0 "
                                         r"\(at index 0\)"):
        sel.select(mag, z, weight=np.zeros(40))
    with pytest.raises(InputError, match=r"`region` needs `region_area_sr`"):
        sel.select(mag, z, region=np.zeros(40, dtype=int))
    with pytest.raises(InputError, match=r"`region` must be in \[0, 1\] \(one per "
                                         r"`region_area_sr`\); got 0..5"):
        sel.select(mag, z, region=np.arange(40) % 6, region_area_sr=[0.005, 0.005])
    with pytest.raises(InputError, match=r"`redshift_error` must be >= 0 where a redshift is "
                                         r"given; got -0.01 \(at index 0\)"):
        sel.select(mag, z, redshift_error=np.full(40, -0.01))
    with pytest.raises(InputError, match=r"`mass_limit_quantile` must be in \[0.5, 1\); "
                                         r"got 1.0"):
        sel.select(mag, z, log10_mass=np.full(40, 10.0), mass_limit_quantile=1.0)
    evolving = Selection((14.0, 20.0), (0.1, 0.3), 0.01, evolution=Evolution(Q=1.0))
    with pytest.raises(InputError, match=r"evolution `Q` = 1.0 applies to luminosity "
                                         r"functions; a stellar-mass function takes Q = 0"):
        evolving.select(mag, z, log10_mass=np.full(40, 10.0))
    # Not modified: the caller's arrays.
    before = mag.copy()
    sel.select(mag, z)
    np.testing.assert_array_equal(mag, before)


def test_fit_errors(big):
    _, _, sample = big
    with pytest.raises(InputError, match=r"`model` 'double_schechter' is a stellar-mass "
                                         r"function \(Baldry et al. 2012 form\); got a "
                                         r"luminosity sample"):
        STYFit(model="double_schechter").fit(sample)
    with pytest.raises(InputError, match=r"`model` must be one of schechter, double_schechter; "
                                         r"got 'gauss'"):
        STYFit(model="gauss").fit(sample)
    with pytest.raises(InputError, match=r"`fit_evolution` may hold 'Q' and 'P'; got 'R'"):
        STYFit(fit_evolution=["R"]).fit(sample)
    with pytest.raises(InputTypeError, match=r"`sample` must be a lumfunc Sample; got list"):
        STYFit().fit([1, 2])
    with pytest.raises(InputError, match=r"this STYFit is not fitted yet: call fit\(sample\) "
                                         r"first"):
        STYFit().draw_params(3)
    fit = STYFit().fit(sample)
    with pytest.raises(InputError, match=r"`n` must be a positive integer; got 0"):
        fit.draw_params(0)
    with pytest.raises(InputError, match=r"`z` must be finite and >= 0; got -0.1"):
        fit.nz([-0.1, 0.1], 20.0)
    assert fit.nz([0.0], 20.0)[0] == 0.0  # no volume at z = 0
    with pytest.raises(InputError, match=r"`area_sr` must be in \(0, 4 pi\] sr; got -1.0"):
        fit.nz([0.1], 20.0, area_sr=-1.0)
    with pytest.raises(InputTypeError, match=r"`sample` must be a lumfunc Sample; got str"):
        vmax_estimate("sample")
    with pytest.raises(InputError, match=r"`edges` must be finite and strictly increasing"):
        swml_estimate(sample, edges=[-20.0, -21.0, -22.0])


def test_a_divergent_density_needs_a_limit():
    # alpha <= -2: the total luminosity density diverges (Gamma(alpha + 2) has no value); the
    # fitted form says so instead of returning a number.
    steep = Schechter(m_star=-21.0, alpha=-2.2, phi_star=1e-3)
    with pytest.raises(InputError, match=r"`alpha` = -2.2 <= -2: the total luminosity density "
                                         r"diverges; give `m_faint`"):
        steep.luminosity_density_mag()
    assert math.isfinite(steep.luminosity_density_mag(m_faint=-14.0))


def test_a_kcorrection_that_outruns_the_distance_modulus_is_refused():
    # m = M + DM + K - Q z must grow with z for V_max to be an interval.
    sel = Selection((14.0, 20.0), (0.1, 0.3), 0.01,
                    kcorrection={"form": "polynomial", "coefficients": [0.0, -40.0]})
    sample = sel.select(np.linspace(14.5, 19.5, 40), np.full(40, 0.2))
    with pytest.raises(InputError, match=r"the apparent magnitude of a galaxy must grow with "
                                         r"redshift over the range"):
        sample.vmax()


def test_an_unconstrained_shape_is_a_fit_error():
    # 25 galaxies of one luminosity: the likelihood has no maximum in alpha.
    sel = Selection((14.0, 20.0), (0.1, 0.3), 0.01)
    z = np.linspace(0.11, 0.29, 25)
    mag = sel.distance_term(z) - 21.0
    with pytest.raises(LuminosityFunctionFitError, match=r"STY"):
        STYFit().fit(sel.select(mag, z))
