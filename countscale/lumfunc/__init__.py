"""Luminosity and stellar-mass functions: the Schechter family of forms.

The package holds one file per idea: ``gamma`` (the special function), ``forms`` (the shared
interface and sampling), ``schechter`` (the family); this ``__init__`` re-exports the public
names, so ``from countscale.lumfunc import Schechter`` works as before.

A *form* is a number density of sources per Mpc^3 per unit of an abscissa ``x``: absolute
magnitude [mag] for luminosity functions, log10 of stellar mass in solar masses [dex] for mass
functions. Every form shares one public interface (:class:`NumberDensityForm`), so one test
battery checks them all; a member supplies two private hooks (the density and the number
density on the bright side of ``x``) and which way along ``x`` sources get brighter.

Topics
------
The shared interface
    :class:`NumberDensityForm`: ``density``, ``number_density_above``, ``integrate``,
    ``cumulative`` and ``quantile`` (of the form restricted to ``[lo, hi]``), ``sample``.
Luminosity functions (absolute magnitude)
    :class:`Schechter`, with :class:`Evolution` and :meth:`Schechter.at`.
Stellar-mass functions (log10 mass, per dex)
    :class:`SchechterMass`, :class:`DoubleSchechterMass`.
Special function
    :func:`upper_incomplete_gamma` for every real ``a`` (scipy's ``gammaincc`` needs a > 0).

The estimators that fit these forms to catalogues (1/Vmax, STY, SWML) are not in this module
yet. Published parameters quoted in h units are converted with
:func:`countscale.cosmology.phi_star_from_h_units` and
:func:`countscale.cosmology.m_star_from_h_units`; this module never rescales silently.

Examples
--------
>>> lf = Schechter(m_star=-20.44, alpha=-1.05, phi_star=1.49e-2)
>>> round(lf.luminosity_density_mag(), 3)
-15.907
>>> x = lf.sample(1000, lo=-24.0, hi=-17.0, rng=1)
>>> bool(((x >= -24.0) & (x <= -17.0)).all())
True
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
