"""Luminosity and stellar-mass functions: the Schechter family, and 1/Vmax, STY and SWML.

One file per idea; this ``__init__`` re-exports the public names:

=============  ===================================================================
``gamma``      the upper incomplete gamma function for every real order
``forms``      :class:`NumberDensityForm`, the interface every form shares, and sampling
``schechter``  :class:`Schechter` (with :class:`Evolution`), :class:`SchechterMass`,
               :class:`DoubleSchechterMass`
``selection``  :class:`Selection` (what a flux-limited redshift survey sees) and the
               :class:`Sample` it makes of a catalogue, every source left out counted
``shapes``     the parameterisations STY fits (a form without its normalisation)
``sty``        :class:`STYFit`: maximum likelihood (Sandage, Tammann & Yahil 1979, ApJ 232,
               352), normalisation, evolution, photometric redshifts, draws, n(z)
``vmax``       :func:`vmax_estimate` (Schmidt 1968, ApJ 151, 393)
``swml``       :func:`swml_estimate` (Efstathiou, Ellis & Peterson 1988, MNRAS 232, 431)
``binned``     :class:`BinnedFunction`, the result of the binned estimators; :func:`bin_edges`
=============  ===================================================================

A *form* is a number density of sources per Mpc^3 per unit of an abscissa ``x``: absolute
magnitude [mag] for luminosity functions, log10 of stellar mass in solar masses [dex] for mass
functions, with the H0 of the cosmology in use. Published parameters quoted in h units are
converted with :func:`countscale.cosmology.phi_star_from_h_units` and
:func:`countscale.cosmology.m_star_from_h_units`; nothing here rescales silently.

Estimating a luminosity function
--------------------------------
>>> sel = Selection((12.0, 19.8), (0.01, 0.3), area_sr=0.012,        # doctest: +SKIP
...                 kcorrection={"beta": -1.2}, evolution=Evolution(Q=0.5))
>>> sample = sel.select(mag, z)                                       # doctest: +SKIP
>>> fit = STYFit().fit(sample)                                        # doctest: +SKIP
>>> vmax, swml = vmax_estimate(sample), swml_estimate(sample)         # doctest: +SKIP

Luminosities are evolution-corrected, x = M + Q z (Lin et al. 1999, ApJ 518, 533), so one form
describes every redshift; K-corrections are any that :func:`countscale.cosmology.as_kcorrection`
accepts (none, power law, table, polynomial). Per-source weights (1 / completeness; redshift
sampling when some sources lack a redshift) enter every estimator.

Stellar-mass functions use the same three estimators on log10 M, above a mass-completeness
limit per redshift: the mass a galaxy at the faint apparent limit would have with the 95th
percentile of the sample's mass-to-light ratio (:mod:`countscale.lumfunc.selection`). With no
scatter in M/L at fixed mass the limit is exact; with 0.15 dex of scatter, a Baldry et al. 2012
double-Schechter mock was still recovered within 1 sigma, but the number density extrapolated
to the lowest masses came out ~18 % low (1.8 sigma): galaxies of high M/L near the limit are
missing.

Which estimator when
--------------------
STY and SWML are conditional on each galaxy's redshift and so are not biased by density
fluctuations along the line of sight; 1/Vmax is (a wall at one redshift raises or lowers every
bin whose V_max reaches it) but assumes no form. 1/Vmax also cannot estimate the part of a bin
no galaxy could occupy; such bins are flagged ``complete = False``. STY's normalisation and
SWML's amplitude come from the number of galaxies and so carry the field's cosmic variance: with
regions, their errors include a jackknife over them.

Small samples
-------------
Willmer 1997 (AJ 114, 898) found STY biased, and its errors too small, for a few hundred
galaxies with steep faint ends. Measured here (``tests/test_lumfunc.py``, 300 samples of 300
galaxies each, 0.01 < z < 0.4, r <= 19, no evolution):

SMALL_SAMPLE_TABLE

So at N = 300 the fitted slope is essentially unbiased here (the sample reaches far down the
faint end at low redshift), but for steep slopes the likelihood's errors are too small and
phi*'s distribution is skewed (mean above median): quote the 68 % interval, not a symmetric
error, and treat a slope steeper than about -1.6 from a few hundred galaxies with caution.

Photometric redshifts
---------------------
With a redshift error per source, STY convolves its form with the luminosity error the
redshift error causes (a Gaussian in x, through dm/dz). A first-order correction: on mocks at
0.1 < z < 0.4 it removes M*'s bias for sigma_z = 0.01 and most of it for 0.02, but leaves
alpha biased (see :mod:`countscale.lumfunc.sty`); 1/Vmax and SWML take redshifts as exact.
"""

from countscale.lumfunc.binned import BinnedFunction, bin_edges
from countscale.lumfunc.forms import NumberDensityForm
from countscale.lumfunc.gamma import upper_incomplete_gamma
from countscale.lumfunc.schechter import DoubleSchechterMass, Evolution, Schechter, SchechterMass
from countscale.lumfunc.selection import QUANTITIES, Sample, Selection
from countscale.lumfunc.shapes import MODELS
from countscale.lumfunc.sty import LuminosityFunctionFitError, STYFit
from countscale.lumfunc.swml import swml_estimate
from countscale.lumfunc.vmax import vmax_estimate

__all__ = [
    "MODELS",
    "QUANTITIES",
    "BinnedFunction",
    "DoubleSchechterMass",
    "Evolution",
    "LuminosityFunctionFitError",
    "NumberDensityForm",
    "STYFit",
    "Sample",
    "Schechter",
    "SchechterMass",
    "Selection",
    "bin_edges",
    "swml_estimate",
    "upper_incomplete_gamma",
    "vmax_estimate",
]
