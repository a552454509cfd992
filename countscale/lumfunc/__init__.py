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

=========  ===========================  ==========  ========  =====  =====================
true       fitted alpha                 scatter of  median    pull   phi* fitted / true:
alpha      median (mean)                alpha       quoted    std    median (mean), scatter,
                                                    error            pull std
=========  ===========================  ==========  ========  =====  =====================
-1.2       -1.207 (-1.201)              0.142       0.140     1.00   0.98 (1.01), 0.23, 0.97
-1.5       -1.513 (-1.508)              0.125       0.126     0.98   0.98 (1.02), 0.29, 1.09
-1.8       -1.791 (-1.796)              0.122       0.118     1.04   1.06 (1.07), 0.40, 1.10
=========  ===========================  ==========  ========  =====  =====================

(The pull is (fitted - true) / quoted error; 1 means the errors are right.) So with this
selection the fitted slope is unbiased at N = 300 to 0.01 and its errors are right; we do not
reproduce Willmer's bias, most likely because a sample reaching z = 0.01 at r <= 19 spans
nine magnitudes, the faint end included. phi* is the weak point: its error is 23-40 % at
N = 300, its distribution is skewed (mean above median), at alpha = -1.8 it comes out 6 % high
and its quoted error is 10 % small (an earlier ensemble of 100 samples gave pull widths of
1.16 for alpha and 1.36 for phi* at alpha = -1.8, so read these widths as 1.0-1.3). Quote the
68 % interval rather than a symmetric error, and expect a narrower luminosity range (a shallow
or high-redshift sample) to do worse, as Willmer found.

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
