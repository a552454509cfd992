"""A stand-in for the luminosity-function stage's ``nz(z, m_limit, area_sr=None)``.

dN/dz per steradian of galaxies brighter than apparent ``m_limit`` for the demo survey's model
(demo_data/README.md: a Schechter function with the ^0.1r parameters of Blanton et al. 2003,
ApJ 592, 819, at h = 0.6766, M* evolving by -0.5 z, a power-law K-correction for
f_nu ~ nu^-1.2, and M < -12), integrated with countscale.lumfunc and astropy's Planck18. It is
the interface the luminosity-function stage exposes, written here independently of it so the
variance stage can be tested before that stage exists.
"""

import numpy as np

from countscale import cosmology as cosmology_module
from countscale.lumfunc import Schechter

DEMO_LF = {"m_star": -21.28834003274019, "alpha": -1.05, "phi_star": 0.004615112040130399,
           "Q": 0.5, "beta": -1.2, "abs_mag_faint": -12.0}


def demo_nz(z, m_limit, area_sr=None):
    """dN/dz per sr (times ``area_sr`` when given) brighter than ``m_limit``."""
    z = np.asarray(z, dtype=float)
    out = np.zeros_like(z)
    ok = z > 1e-4
    zz = z[ok]
    dm = cosmology_module.distance_modulus(zz, "Planck18")
    kcorr = -2.5 * (1.0 + DEMO_LF["beta"]) * np.log10(1.0 + zz)
    faintest = np.minimum(DEMO_LF["abs_mag_faint"], m_limit - dm - kcorr)
    x = faintest - (DEMO_LF["m_star"] - DEMO_LF["Q"] * zz)
    shape = Schechter(m_star=0.0, alpha=DEMO_LF["alpha"], phi_star=1.0)
    volume = cosmology_module.differential_comoving_volume_mpc3_sr(zz, "Planck18")
    out[ok] = DEMO_LF["phi_star"] * shape.number_density_brighter(x) * volume
    return out if area_sr is None else out * area_sr
