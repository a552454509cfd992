"""Cosmic variance: how much a footprint's mean surface density scatters because galaxies cluster.

Counts in one patch of sky scatter far more than Poisson statistics say, because the patch sits
on a particular piece of the large-scale structure. This package computes that scatter from
first principles for the footprint's real shape, and empirically from the data.

Files (one idea each)
---------------------
power
    The linear matter power spectrum: Eisenstein & Hu (1998) transfer functions with and
    without baryon wiggles, sigma8 normalisation, the linear growth factor
    (:func:`linear_power`, :class:`LinearPower`, :func:`eisenstein_hu_transfer`,
    :func:`growth_factor`, :func:`sound_horizon_mpc`).
redshifts
    Redshift distributions n(z) (:class:`RedshiftDistribution`: from a catalogue's
    redshifts, a median redshift, or any dN/dz function such as a luminosity function's).
angular
    Limber angular power spectra C_ell for an n(z) and a bias (:func:`limber_cl`,
    :class:`AngularSpectrum`).
mask
    Mask power spectra W_ell and the variance of the masked mean,
    sigma^2 = sum (2 ell + 1) C_ell W_ell / Omega^2 (:class:`MaskSpectrum`,
    :func:`footprint_mask_spectrum`, :func:`cap_mask_spectrum`,
    :func:`rectangle_mask_spectrum`, :func:`box_mask_spectrum`).
cosmic
    The analytic cosmic variance of a footprint against magnitude limit
    (:func:`cosmic_variance`, :class:`CosmicVariance`), the jackknife over regions
    (:func:`jackknife_density`), their comparison (:func:`compare_methods`), and
    :func:`caps_curve` (errors against area).

For later stages
----------------
A run's ``variance`` stage exposes, among its live objects, ``"sigma_cv"``: a
:class:`CosmicVariance` of the run's footprint. ``sigma_cv(m_limit)`` is the fractional
(1 sigma) cosmic variance of the footprint's mean surface density of sources brighter than
``m_limit``; ``sigma_cv.sigma(m_limit, mask=footprint_mask_spectrum(other_footprint))`` gives
it for any other footprint with the same population (n(z), bias, cosmology), and
``sigma_cv.spectrum(m_limit)`` the C_ell behind it.

Examples
--------
>>> from countscale.variance import (linear_power, RedshiftDistribution, cap_mask_spectrum,
...                                  AngularSpectrum)
>>> power = linear_power("Planck18")
>>> cl = AngularSpectrum.limber(power, RedshiftDistribution.from_median(0.4), bias=1.0)
>>> sigma = cap_mask_spectrum(area_deg2=40.0).sigma(cl)
>>> 0.005 < sigma < 0.05
True
"""

from countscale.variance.angular import AngularSpectrum, limber_cl
from countscale.variance.cosmic import (
    DISAGREEMENT_FACTOR,
    CosmicVariance,
    JackknifeDensity,
    caps_curve,
    compare_methods,
    cosmic_variance,
    crossover_area,
    jackknife_density,
    lognormal_factor_draws,
)
from countscale.variance.mask import (
    MaskSpectrum,
    box_mask_spectrum,
    cap_mask_spectrum,
    choose_nside,
    footprint_mask_spectrum,
    rectangle_mask_spectrum,
)
from countscale.variance.power import (
    LinearPower,
    eisenstein_hu_transfer,
    growth_factor,
    linear_power,
    sound_horizon_mpc,
)
from countscale.variance.redshifts import RedshiftDistribution

__all__ = [
    "DISAGREEMENT_FACTOR",
    "AngularSpectrum",
    "CosmicVariance",
    "JackknifeDensity",
    "LinearPower",
    "MaskSpectrum",
    "RedshiftDistribution",
    "box_mask_spectrum",
    "cap_mask_spectrum",
    "caps_curve",
    "choose_nside",
    "compare_methods",
    "cosmic_variance",
    "crossover_area",
    "eisenstein_hu_transfer",
    "footprint_mask_spectrum",
    "growth_factor",
    "jackknife_density",
    "limber_cl",
    "linear_power",
    "lognormal_factor_draws",
    "rectangle_mask_spectrum",
    "sound_horizon_mpc",
]
