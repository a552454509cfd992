"""Truth-known mock surveys: a catalogue drawn from a model whose every number is known.

Every statistical claim the package makes (a fitted slope, a luminosity function, a whole-sky
total with its interval) is checked on mocks like these, where the answer is known in advance.

Topics
------
The truth specification (small frozen dataclasses, or a TOML file)
    :class:`MockSpec` gathers :class:`SchechterGalaxies` or :class:`MassFunctionGalaxies`,
    :class:`DiskStars`, :class:`LognormalClustering` (``None``: Poisson positions),
    :class:`Measurement` and :class:`Injections`; :func:`load_mock_spec` reads the same from
    TOML (keys listed there).
Making a mock
    :func:`make_mock` returns a :class:`MockSurvey` (catalogue DataFrame, footprint,
    injection-recovery table, depth map, :class:`MockTruth`); :func:`write_mock` streams the
    catalogue to a Parquet, FITS or CSV file chunk by chunk, so memory stays bounded.
The truth without a mock
    :func:`expected_counts`: the expected number of sources brighter than given magnitudes
    over a footprint and over the whole sky, by integrating the model (never by scaling a
    sample).
Clustering pieces
    :func:`power_law_cl`, :func:`gaussian_cl_for_lognormal`, :func:`lognormal_field`.

The model
---------
Galaxies
    A Schechter (1976, ApJ 203, 297) luminosity function with M*(z) = M*(0) - Q z and
    phi*(z) = phi*(0) 10^(0.4 P z), or a (double) Schechter stellar-mass function (Baldry et
    al. 2012, MNRAS 421, 621, eq. 6) with a power-law mass-to-light ratio and log-normal
    scatter. Redshifts follow phi x dV/dz (Hogg 1999, arXiv:astro-ph/9905116, eq. 28, from
    astropy); apparent magnitudes are m = M + DM(z) + K(z) with K = 0 or the power-law
    K-correction of Hogg et al. 2002 (arXiv:astro-ph/0210394, eq. 13).
Stars
    Classes of one absolute magnitude each, with midplane densities n_k, in an exponential
    disk of scale height h_z seen from the midplane; along galactic latitude b a class seen to
    distance R gives N(b) = n_k (h_z / sin|b|)^3 gamma(3, R sin|b| / h_z) per sr (the integral of
    r^2 exp(-r sin|b| / h_z); Bahcall & Soneira 1980, ApJS 44, 73 for disk models). An
    infinite scale height is a uniform (static Euclidean) population. A finite radial scale
    length L adds a gradient exp(X / L) toward the galactic centre: the same integral with
    sin|b| / h_z replaced by sin|b| / h_z - cos b cos l / L (any sign).
Dust
    An optional E(B-V) map dims every source by R E(B-V) before detection (a foreground
    screen); the truth stays in intrinsic magnitudes.
Positions
    Poisson-uniform over the footprint, or the galaxies modulated by one lognormal field
    1 + delta on HEALPix (Coles & Jones 1991, MNRAS 248, 1; from memory), the same at every
    redshift (a projected field whose spectrum is the input C_ell). Holes are respected exactly
    (:meth:`countscale.footprint.Footprint.contains`).
Measurement
    Detection with probability c(m_true) = 1 / (1 + exp((m_true - m50) / width)) with m50 from a
    per-region map (HEALPix pixels of ``depth_nside``); observed m = m_true + N(0, sigma(m_true))
    with the sky-limited sigma(m) = sigma_at_m50 10^(0.4 (m - m50)), capped at ``sigma_max``,
    plus an optional floor in quadrature. The reported error is sigma(m_observed).

How sources are drawn
---------------------
A Poisson process thinned to the target: proposals are drawn with an intensity that bounds
the target everywhere (per redshift interval for galaxies, per HEALPix cell for stars), each
kept with probability target / bound. Thinning a Poisson process gives a Poisson process with
the thinned intensity (Lewis & Shedler 1979, Naval Research Logistics Quarterly 26, 403;
reference from memory), so the catalogue is an exact draw from the model; the truth record
integrates the same model.
Sources fainter than the generation limit (where completeness is below
``Measurement.detection_floor``) are not drawn.

Examples
--------
>>> from countscale.footprint import Footprint
>>> from countscale.mock import MockSpec, SchechterGalaxies, Measurement, make_mock
>>> spec = MockSpec(
...     galaxies=SchechterGalaxies(m_star=-21.3, alpha=-1.05, phi_star=4.6e-3),
...     measurement=Measurement(m50=19.0, width=0.2), mag_limits=(18.0,),
... )
>>> mock = make_mock(spec, rng=1, footprint=Footprint.cap(30.0, 10.0, 0.5, max_order=12))
>>> int(mock.truth.n_true_footprint["galaxies"][0]) > 0
True
"""

from __future__ import annotations

import difflib
import math
import numbers
import os
import tomllib
from collections.abc import Sequence
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

import healpy as hp
import numpy as np
import pandas as pd
from scipy import interpolate, special

from countscale import _geometry as geo
from countscale import cosmology as cosmo_mod
from countscale._io import atomic_path
from countscale.completeness import DepthMap, LogisticCompleteness
from countscale.errors import InputError, InputTypeError
from countscale.footprint import Footprint
from countscale.lumfunc import DoubleSchechterMass, Evolution, Schechter, SchechterMass

__all__ = [
    "DiskStars",
    "Injections",
    "LognormalClustering",
    "MassFunctionGalaxies",
    "Measurement",
    "MockSpec",
    "MockSurvey",
    "MockTruth",
    "SchechterGalaxies",
    "expected_counts",
    "gaussian_cl_for_lognormal",
    "load_mock_spec",
    "lognormal_field",
    "make_mock",
    "power_law_cl",
    "write_mock",
]

_LN10 = math.log(10.0)
FULL_SKY_SR = 4.0 * math.pi

#: Photometric error of a source at signal-to-noise 5: 2.5 / ln 10 / 5 = 0.2171 mag
#: (magnitude error of a flux measured to 1/S/N; common figure, no source). A survey's m50
#: is usually close to its 5-sigma limit, hence the default sigma at m50.
SIGMA_AT_FIVE_SIGMA = 2.5 / _LN10 / 5.0

#: The Sun's absolute AB magnitude in the r band (Willmer 2018, ApJS 236, 47, Table 3;
#: value from memory, 4.65).
M_SUN_R_AB = 4.65

#: Redshift intervals of the galaxy sampler (log-spaced in z). Over 0.001 < z < 3 one interval
#: spans 1e-3 in ln z, so the linear interpolation of dV/dz inside it is good to ~1e-7 and
#: the distance modulus changes by < 0.005 mag across it: the proposal bound stays tight.
_N_Z_INTERVALS = 8192

#: Proposals handled at once; bounds memory (~200 bytes each in flight) and sets the chunks
#: of the catalogue. A module constant, so a seed always gives the same catalogue.
_CHUNK_PROPOSALS = 2**20

#: Scatter of the mass-to-light relation is a normal truncated at this many sigma (so that a
#: mass bound exists for the proposals); the lost probability is 5.7e-7.
_SCATTER_TRUNCATION = 5.0

#: HEALPix order of the cells that bound the star density (13.7 arcmin cells): the density
#: changes little across one, so few proposals are thinned away.
_STAR_CELL_ORDER = 8

#: HEALPix order of the cells used to integrate the star density over a footprint for the
#: truth record (3.4 arcmin cells; the density varies smoothly with latitude).
_STAR_TRUTH_ORDER = 10

_GALAXY, _STAR = "galaxy", "star"
_POPULATIONS = pd.CategoricalDtype([_GALAXY, _STAR])
_PLURAL = {_GALAXY: "galaxies", _STAR: "stars"}


# --------------------------------------------------------------------------------------------
# Input checks
# --------------------------------------------------------------------------------------------
def _real(name, value, lo=None, hi=None, lo_open=False, hi_open=False, allow_inf=False):
    """A real scalar as float within an optional interval; messages name `name`."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise InputTypeError(f"`{name}` must be a real number; got {value!r}")
    x = float(value)
    if math.isnan(x) or (math.isinf(x) and not allow_inf):
        raise InputError(f"`{name}` must be finite; got {x!r}")
    below = lo is not None and (x <= lo if lo_open else x < lo)
    above = hi is not None and (x >= hi if hi_open else x > hi)
    if below or above:
        left = "(" if lo_open or lo is None else "["
        right = ")" if hi_open or hi is None else "]"
        lo_text = "-inf" if lo is None else f"{lo:g}"
        hi_text = "inf" if hi is None else f"{hi:g}"
        raise InputError(f"`{name}` must be in {left}{lo_text}, {hi_text}{right}; got {x!r}")
    return x


def _integer(name, value, lo=None):
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise InputTypeError(f"`{name}` must be an integer; got {value!r}")
    if lo is not None and value < lo:
        raise InputError(f"`{name}` must be >= {lo}; got {int(value)}")
    return int(value)


def _nside(name, value):
    n = _integer(name, value, lo=1)
    if n & (n - 1) or n > 2**13:
        raise InputError(f"`{name}` must be a power of two in [1, 8192]; got {n}")
    return n


def _real_tuple(name, values, min_len=1):
    if isinstance(values, str | bytes) or not isinstance(values, Sequence | np.ndarray):
        raise InputTypeError(f"`{name}` must be a sequence of numbers; got {values!r}")
    out = tuple(_real(f"{name}[{i}]", v) for i, v in enumerate(values))
    if len(out) < min_len:
        raise InputError(f"`{name}` must have at least {min_len} value(s); got {len(out)}")
    return out


def _pair(name, value):
    pair = _real_tuple(name, value, min_len=2)
    if len(pair) != 2 or not pair[0] < pair[1]:
        raise InputError(f"`{name}` must be two increasing numbers; got {list(pair)!r}")
    return pair


def _as_cosmology(value):
    """A name (astropy realization) or an astropy FLRW instance; name for the record."""
    from astropy.cosmology import FLRW

    if isinstance(value, FLRW):
        return value
    if isinstance(value, str):
        try:
            return cosmo_mod.get_cosmology(value)
        except InputError:
            names = ", ".join(cosmo_mod.available_cosmologies())
            raise InputError(f"`cosmology` must be one of {names}; got {value!r}") from None
    raise InputTypeError(
        f"`cosmology` must be an astropy cosmology or a realization name; got {value!r}"
    )


def _cosmology_name(c):
    return str(c.name) if c.name else repr(c)


def _root_generator(rng, spec_seed):
    """(Generator, recorded seed) from `rng`, else from the spec's seed, else fresh entropy."""
    if isinstance(rng, np.random.Generator):
        return rng, None
    if rng is None:
        rng = spec_seed
    if rng is None:
        entropy = int(np.random.SeedSequence().entropy)
        return np.random.default_rng(entropy), entropy
    if isinstance(rng, bool) or not isinstance(rng, numbers.Integral):
        raise InputTypeError(
            f"`rng` must be an int seed, a numpy.random.Generator or None; got {rng!r}"
        )
    if rng < 0:
        raise InputError(f"`rng` seed must be >= 0; got {int(rng)}")
    return np.random.default_rng(int(rng)), int(rng)


# --------------------------------------------------------------------------------------------
# The truth specification
# --------------------------------------------------------------------------------------------
def _check_redshifts(obj):
    z_min = _real("z_min", obj.z_min, lo=0.0, lo_open=True)
    z_max = _real("z_max", obj.z_max, lo=0.0, lo_open=True)
    if not z_min < z_max:
        raise InputError(f"`z_min` must be < `z_max`; got z_min = {z_min!r}, z_max = {z_max!r}")
    object.__setattr__(obj, "z_min", z_min)
    object.__setattr__(obj, "z_max", z_max)
    if obj.kcorrection_beta is not None:
        object.__setattr__(
            obj, "kcorrection_beta", _real("kcorrection_beta", obj.kcorrection_beta)
        )


@dataclass(frozen=True)
class SchechterGalaxies:
    """Galaxies from a Schechter luminosity function with linear evolution.

    Parameters
    ----------
    m_star : float
        M*(z = 0) [absolute mag].
    alpha : float
        Faint-end slope.
    phi_star : float
        phi*(z = 0) [Mpc^-3] (convert h-scaled values with
        :func:`countscale.cosmology.phi_star_from_h_units`).
    evolution : countscale.lumfunc.Evolution
        M*(z) = M*(0) - Q z, phi*(z) = phi*(0) 10^(0.4 P z); default none.
    z_min, z_max : float
        Redshift range of the population, 0 < z_min < z_max.
    abs_mag_faint : float
        Galaxies fainter than this absolute magnitude are not part of the model (with
        alpha <= -1 their number diverges).
    kcorrection_beta : float or None
        Power-law K-correction for f_nu proportional to nu^beta; None for K = 0.
    """

    m_star: float
    alpha: float
    phi_star: float
    evolution: Evolution = field(default_factory=Evolution)
    z_min: float = 0.001
    z_max: float = 3.0
    abs_mag_faint: float = -12.0
    kcorrection_beta: float | None = None

    def __post_init__(self):
        # lumfunc's own checks give the messages for m_star, alpha and phi_star.
        lf = Schechter(m_star=self.m_star, alpha=self.alpha, phi_star=self.phi_star)
        for name in ("m_star", "alpha", "phi_star"):
            object.__setattr__(self, name, getattr(lf, name))
        if not isinstance(self.evolution, Evolution):
            raise InputTypeError(
                f"`evolution` must be a countscale.lumfunc.Evolution; got {self.evolution!r}"
            )
        object.__setattr__(self, "abs_mag_faint", _real("abs_mag_faint", self.abs_mag_faint))
        if not self.abs_mag_faint > self.m_star:
            raise InputError(
                f"`abs_mag_faint` must be fainter than `m_star` ({self.m_star!r}); "
                f"got {self.abs_mag_faint!r}"
            )
        _check_redshifts(self)

    def luminosity_function(self, z=0.0):
        """The :class:`countscale.lumfunc.Schechter` form at redshift `z`."""
        lf = Schechter(m_star=self.m_star, alpha=self.alpha, phi_star=self.phi_star)
        return lf.at(z, self.evolution)


@dataclass(frozen=True)
class MassFunctionGalaxies:
    """Galaxies from a stellar-mass function and a mass-to-light relation.

    Parameters
    ----------
    mass_function : SchechterMass or DoubleSchechterMass
        Number density per dex of stellar mass [Mpc^-3 dex^-1]; no evolution.
    log10_mass_min : float
        Galaxies below this log10 stellar mass [Msun] are not part of the model.
    log10_ml_ratio : float
        log10 of the stellar mass-to-light ratio [Msun / Lsun in the band] at 10^10 Msun.
    ml_slope : float
        d log10(M/L) / d log10 M, < 1 (so that light grows with mass).
    ml_scatter_dex : float
        Standard deviation of log10 L at fixed mass [dex], a normal truncated at 5 sigma.
    m_sun : float
        Absolute magnitude of the Sun in the band (default r AB, see :data:`M_SUN_R_AB`).
    z_min, z_max, kcorrection_beta
        As in :class:`SchechterGalaxies`.

    Notes
    -----
    log10 L = log10 M - [log10_ml_ratio + ml_slope (log10 M - 10)] + epsilon and
    M_abs = m_sun - 2.5 log10 L. The defaults are illustrative, not measurements.
    """

    mass_function: SchechterMass | DoubleSchechterMass
    log10_mass_min: float = 8.0
    log10_ml_ratio: float = 0.0
    ml_slope: float = 0.0
    ml_scatter_dex: float = 0.0
    m_sun: float = M_SUN_R_AB
    z_min: float = 0.001
    z_max: float = 3.0
    kcorrection_beta: float | None = None

    def __post_init__(self):
        if not isinstance(self.mass_function, SchechterMass | DoubleSchechterMass):
            raise InputTypeError(
                "`mass_function` must be a SchechterMass or DoubleSchechterMass; got "
                f"{type(self.mass_function).__name__}"
            )
        object.__setattr__(self, "log10_mass_min", _real("log10_mass_min", self.log10_mass_min))
        object.__setattr__(self, "log10_ml_ratio", _real("log10_ml_ratio", self.log10_ml_ratio))
        object.__setattr__(self, "ml_slope", _real("ml_slope", self.ml_slope, hi=1.0,
                                                   hi_open=True))
        object.__setattr__(
            self, "ml_scatter_dex", _real("ml_scatter_dex", self.ml_scatter_dex, lo=0.0)
        )
        object.__setattr__(self, "m_sun", _real("m_sun", self.m_sun))
        _check_redshifts(self)

    def mean_log10_luminosity(self, log10_mass):
        """Mean log10 L [Lsun] at log10 stellar mass (array in, array out)."""
        x = np.asarray(log10_mass, dtype=float)
        return (1.0 - self.ml_slope) * x - self.log10_ml_ratio + 10.0 * self.ml_slope


#: Illustrative star classes, loosely after the local luminosity function (absolute
#: magnitudes and midplane densities per class of one magnitude; values from memory, used
#: only to make a plausible mock, not as data).
_DEFAULT_STAR_ABS_MAG = (0.0, 2.0, 4.0, 6.0, 8.0, 10.0, 12.0, 14.0)
_DEFAULT_STAR_DENSITY = (1e-4, 5e-4, 3e-3, 5e-3, 6e-3, 8e-3, 1e-2, 8e-3)


@dataclass(frozen=True)
class DiskStars:
    """Stars in an exponential disk seen from its midplane.

    Parameters
    ----------
    abs_mag : sequence of float
        Absolute magnitude of each class [mag].
    density_pc3 : sequence of float
        Midplane number density of each class [pc^-3], > 0.
    scale_height_pc : float
        Exponential scale height h_z [pc], > 0; ``inf`` makes the population uniform in
        space (static Euclidean). Thin disk ~300 pc, thick disk ~900 pc (Juric et al. 2008,
        ApJ 673, 864; from memory).
    scale_length_pc : float
        Radial scale length L [pc], > 0: the density also grows as exp(X / L) toward the
        galactic centre (X = r cos b cos l), a planar approximation of a disk exponential in
        galactocentric radius, right where X is small against the Sun's distance from the
        centre. ``inf`` (default): no longitude dependence. Thin disk ~2.6 kpc (Juric et al.
        2008; from memory).

    Notes
    -----
    Density n_k exp(-|Z| / h_z) with Z = r sin b; the number per sr of class k closer than R is
    n_k integral_0^R r^2 exp(-r sin|b| / h_z) dr = n_k (h_z / sin|b|)^3 gamma(3, R sin|b| / h_z)
    (the exponential-disk star count; disk models: Bahcall & Soneira 1980, ApJS 44, 73). A class
    is seen to R = 10^((m - M_k) / 5 + 1) pc (no extinction). With a finite scale length the
    exponent is -r k with k = sin|b| / h_z - cos b cos l / L, and the same integral holds for
    any sign of k: integral_0^R r^2 exp(-k r) dr = R^3 integral_0^1 t^2 exp(-k R t) dt.
    """

    abs_mag: tuple[float, ...] = _DEFAULT_STAR_ABS_MAG
    density_pc3: tuple[float, ...] = _DEFAULT_STAR_DENSITY
    scale_height_pc: float = 300.0
    scale_length_pc: float = math.inf

    def __post_init__(self):
        abs_mag = _real_tuple("abs_mag", self.abs_mag)
        density = _real_tuple("density_pc3", self.density_pc3)
        if len(density) != len(abs_mag):
            raise InputError(
                f"`density_pc3` must have one value per `abs_mag` class ({len(abs_mag)}); "
                f"got {len(density)}"
            )
        for i, d in enumerate(density):
            if d <= 0:
                raise InputError(f"`density_pc3[{i}]` must be > 0 pc^-3; got {d!r}")
        object.__setattr__(self, "abs_mag", abs_mag)
        object.__setattr__(self, "density_pc3", density)
        object.__setattr__(
            self,
            "scale_height_pc",
            _real("scale_height_pc", self.scale_height_pc, lo=0.0, lo_open=True, allow_inf=True),
        )
        object.__setattr__(
            self,
            "scale_length_pc",
            _real("scale_length_pc", self.scale_length_pc, lo=0.0, lo_open=True, allow_inf=True),
        )

    # -- the model ------------------------------------------------------------------------
    def _radius_pc(self, mag):
        """Distance [pc] to which each class is brighter than `mag`: shape (..., K)."""
        m = np.asarray(mag, dtype=float)[..., None]
        return 10.0 ** ((m - np.asarray(self.abs_mag)) / 5.0 + 1.0)

    def _cone_integral(self, radius_pc, s):
        """integral_0^R r^2 exp(-r s / h) dr [pc^3] for each R (broadcast with s)."""
        radius_pc, s = np.broadcast_arrays(np.asarray(radius_pc, float), np.asarray(s, float))
        h = self.scale_height_pc
        if math.isinf(h):
            return radius_pc**3 / 3.0
        x = radius_pc * s / h
        out = np.empty(x.shape)
        small = x < 1e-4
        # gamma(3, x) / x^3 = 1/3 - x/4 + x^2/10 - ... (DLMF 8.7.1) where the closed form
        # would lose precision.
        out[small] = radius_pc[small] ** 3 * (1.0 / 3.0 - x[small] / 4.0 + x[small] ** 2 / 10.0)
        big = ~small
        out[big] = 2.0 * special.gammainc(3.0, x[big]) * (h / s[big]) ** 3
        return out

    def density_per_sr(self, sin_b, mag, cos_x=0.0):
        """Number of stars per sr brighter than apparent magnitude `mag` at |sin b|.

        Parameters
        ----------
        sin_b : float or array_like
            |sin b| of the direction (galactic latitude b).
        mag : float
            Apparent magnitude limit.
        cos_x : float or array_like
            cos b cos l, the direction cosine toward the galactic centre; used only with a
            finite ``scale_length_pc``.

        Returns
        -------
        float or ndarray
            sum_k n_k (h_z / sin|b|)^3 gamma(3, R_k sin|b| / h_z) [sr^-1].
        """
        s = np.abs(np.asarray(sin_b, dtype=float))
        if not math.isinf(self.scale_length_pc):
            k = self.inverse_length(s, cos_x)
            return self.density_at_inverse_length(k, mag)
        radius = self._radius_pc(_real("mag", mag))  # (K,)
        total = np.zeros(s.shape)
        for k, n_k in enumerate(self.density_pc3):
            total = total + n_k * self._cone_integral(radius[k], s)
        return float(total) if total.ndim == 0 else total

    def inverse_length(self, sin_b, cos_x=0.0):
        """k = |sin b| / h_z - cos b cos l / L [pc^-1]: the density falls as exp(-k r)."""
        s = np.abs(np.asarray(sin_b, dtype=float))
        return s / self.scale_height_pc - np.asarray(cos_x, dtype=float) / self.scale_length_pc

    def density_at_inverse_length(self, k, mag):
        """Stars per sr brighter than `mag` along a direction of inverse length ``k``."""
        k = np.asarray(k, dtype=float)
        radius = self._radius_pc(_real("mag", mag))  # (K,)
        total = np.zeros(k.shape)
        for j, n_j in enumerate(self.density_pc3):
            total = total + n_j * _exponential_cone(radius[j], k)
        return float(total) if total.ndim == 0 else total

    def whole_sky_count(self, mag):
        """Number of stars brighter than `mag` over the whole sky, in closed form.

        Notes
        -----
        integral over the sphere of N(b) = 4 pi integral_0^1 N(s) ds, and integral_0^1
        (h/s)^3 gamma(3, R s / h) ds = integral_0^R r^2 (h / r)(1 - e^{-r/h}) dr
        = h R^2 / 2 - h^3 gamma(2, R / h); for h -> inf, R^3 / 3.
        """
        radius = self._radius_pc(_real("mag", mag))
        h = self.scale_height_pc
        if not math.isinf(self.scale_length_pc):
            return float(sum(n * self._ball_integral(r) for n, r in
                             zip(self.density_pc3, radius, strict=True)))
        if math.isinf(h):
            per_class = radius**3 / 3.0
        else:
            per_class = h * radius**2 / 2.0 - h**3 * special.gammainc(2.0, radius / h)
        return float(FULL_SKY_SR * np.dot(self.density_pc3, per_class))

    def _ball_integral(self, radius_pc):
        """integral over the ball |r| < R of exp(-|Z| / h_z + X / L) [pc^3].

        Slices of constant Z are discs of radius rho = sqrt(R^2 - Z^2), over which
        integral exp(X / L) dA = 2 pi L rho I_1(rho / L) (the Bessel function I_1; DLMF 10.32);
        the Z integral is done by scipy's adaptive quadrature.
        """
        from scipy import integrate

        h, length = self.scale_height_pc, self.scale_length_pc

        def slab(z):
            rho = math.sqrt(max(radius_pc**2 - z**2, 0.0))
            vertical = 1.0 if math.isinf(h) else math.exp(-z / h)
            # ive(1, x) = I_1(x) e^-x keeps large arguments finite.
            return 2.0 * (2.0 * math.pi * length * rho * special.ive(1, rho / length)
                          * math.exp(rho / length) * vertical)

        points = [min(h, radius_pc / 2.0)] if not math.isinf(h) else None
        value, _ = integrate.quad(slab, 0.0, radius_pc, points=points, limit=200,
                                  epsrel=1e-10)
        return value


#: Terms of the power series of integral_0^1 t^2 exp(-x t) dt used where |x| < 1.
_CONE_SERIES_TERMS = 18


def _exponential_cone(radius_pc, k):
    """integral_0^R r^2 exp(-k r) dr [pc^3] for any sign of k (broadcast).

    With x = k R: R^3 sum_n (-x)^n / (n! (n + 3)) for |x| < 1 (18 terms: error below 1e-16);
    2 P(3, x) / k^3 (regularised lower incomplete gamma) for x >= 1; and
    R^3 (e^y (y^2 - 2 y + 2) - 2) / y^3 with y = -x for x <= -1.
    """
    radius_pc, k = np.broadcast_arrays(np.asarray(radius_pc, float), np.asarray(k, float))
    x = radius_pc * k
    out = np.empty(x.shape)
    small = np.abs(x) < 1.0
    if small.any():
        xs = x[small]
        series = np.zeros(xs.shape)
        term = np.ones(xs.shape)  # (-x)^n / n!
        for n in range(_CONE_SERIES_TERMS):
            series += term / (n + 3)
            term = term * (-xs) / (n + 1)
        out[small] = radius_pc[small] ** 3 * series
    pos = x >= 1.0
    if pos.any():
        out[pos] = 2.0 * special.gammainc(3.0, x[pos]) / k[pos] ** 3
    neg = x <= -1.0
    if neg.any():
        y = -x[neg]
        out[neg] = radius_pc[neg] ** 3 * (np.exp(y) * (y * y - 2.0 * y + 2.0) - 2.0) / y**3
    return out


def power_law_cl(lmax, cl_100=6e-7, slope=1.2):
    """Angular power spectrum C_ell = cl_100 (ell / 100)^-slope for ell >= 1, C_0 = 0.

    Parameters
    ----------
    lmax : int
        Largest multipole, >= 1.
    cl_100 : float
        C_ell at ell = 100 (dimensionless, for the density contrast), >= 0.
    slope : float
        Power-law index; 1.2 matches an angular correlation w(theta) proportional to
        theta^-0.8 (Peebles 1980, The Large-Scale Structure of the Universe, section 52;
        from memory).

    Returns
    -------
    ndarray, shape (lmax + 1,)
    """
    lmax = _integer("lmax", lmax, lo=1)
    cl_100 = _real("cl_100", cl_100, lo=0.0)
    slope = _real("slope", slope)
    ell = np.arange(lmax + 1, dtype=float)
    cl = np.zeros(lmax + 1)
    cl[1:] = cl_100 * (ell[1:] / 100.0) ** (-slope)
    return cl


def _check_cl(name, cl):
    try:
        arr = np.array(cl, dtype=float)
    except (TypeError, ValueError):
        raise InputTypeError(f"`{name}` must be an array of numbers; got {cl!r:.60}") from None
    if arr.ndim != 1 or arr.size < 2:
        raise InputError(f"`{name}` must be 1-D with C_0 and C_1 at least; got shape {arr.shape}")
    bad = ~np.isfinite(arr) | (arr < 0)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"`{name}` must be finite and >= 0; got {float(arr[i])!r} at ell = {i}"
        )
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True, eq=False)
class LognormalClustering:
    """A lognormal density field on HEALPix with a given angular power spectrum.

    Parameters
    ----------
    cl : array_like, optional
        Target C_ell of the density contrast delta, ell = 0, 1, ... (C_0 is ignored: the
        field's mean is fixed to 1). Default: :func:`power_law_cl` with `cl_100`, `slope`.
    cl_100, slope : float
        The default power law (used when `cl` is None).
    nside : int
        Resolution of the field (power of two); multipoles up to 3 nside - 1 are drawn.
    """

    cl: np.ndarray | None = None
    cl_100: float = 6e-7
    slope: float = 1.2
    nside: int = 256

    def __post_init__(self):
        object.__setattr__(self, "nside", _nside("nside", self.nside))
        object.__setattr__(self, "cl_100", _real("cl_100", self.cl_100, lo=0.0))
        object.__setattr__(self, "slope", _real("slope", self.slope))
        if self.cl is not None:
            object.__setattr__(self, "cl", _check_cl("cl", self.cl))

    @property
    def lmax(self):
        """Largest multipole of the field: 3 nside - 1, or fewer if `cl` is shorter."""
        top = 3 * self.nside - 1
        return top if self.cl is None else min(top, self.cl.size - 1)

    def target_cl(self):
        """The input C_ell, ell = 0 .. lmax (C_0 set to 0)."""
        if self.cl is None:
            cl = power_law_cl(self.lmax, self.cl_100, self.slope)
        else:
            cl = np.array(self.cl[: self.lmax + 1], dtype=float)
        cl[0] = 0.0
        return cl


@dataclass(frozen=True, eq=False)
class Measurement:
    """Photometric noise and detection, with depth varying across the footprint.

    Parameters
    ----------
    m50 : float
        Typical magnitude of 50 % completeness [mag].
    width : float
        Width of the logistic completeness curve [mag], > 0.
    m50_scatter : float
        Standard deviation of m50 between regions [mag] (regions are HEALPix pixels of
        `depth_nside`), >= 0.
    depth_nside : int
        Resolution of the depth map (power of two); 64 gives 0.84 deg^2 regions.
    m50_map : array_like, optional
        An explicit m50 map (RING, 12 depth_nside^2 values; NaN where there is no data)
        instead of the random one.
    sigma_at_m50 : float
        Magnitude error of a source at m50 [mag]; default: a 5-sigma detection (0.2171).
    sigma_max : float
        Cap of the sky-limited error [mag].
    sigma_floor : float
        Error added in quadrature at every magnitude (calibration) [mag].
    detection_floor : float
        Sources are drawn down to the magnitude where completeness in the deepest region
        falls to this value, in (0, 0.5); fainter ones are not simulated.
    """

    m50: float = 24.0
    width: float = 0.2
    m50_scatter: float = 0.0
    depth_nside: int = 64
    m50_map: np.ndarray | None = None
    sigma_at_m50: float = SIGMA_AT_FIVE_SIGMA
    sigma_max: float = 1.0
    sigma_floor: float = 0.0
    detection_floor: float = 1e-4

    def __post_init__(self):
        object.__setattr__(self, "m50", _real("m50", self.m50))
        object.__setattr__(self, "width", _real("width", self.width, lo=0.0, lo_open=True))
        object.__setattr__(self, "m50_scatter", _real("m50_scatter", self.m50_scatter, lo=0.0))
        object.__setattr__(self, "depth_nside", _nside("depth_nside", self.depth_nside))
        object.__setattr__(
            self, "sigma_at_m50", _real("sigma_at_m50", self.sigma_at_m50, lo=0.0)
        )
        object.__setattr__(self, "sigma_max", _real("sigma_max", self.sigma_max, lo=0.0))
        object.__setattr__(self, "sigma_floor", _real("sigma_floor", self.sigma_floor, lo=0.0))
        object.__setattr__(
            self,
            "detection_floor",
            _real("detection_floor", self.detection_floor, lo=0.0, hi=0.5, lo_open=True,
                  hi_open=True),
        )
        if self.m50_map is not None:
            try:
                values = np.array(self.m50_map, dtype=float)
            except (TypeError, ValueError):
                raise InputTypeError(
                    f"`m50_map` must be an array of magnitudes; got {self.m50_map!r:.60}"
                ) from None
            if values.shape != (12 * self.depth_nside**2,):
                raise InputError(
                    f"`m50_map` must have 12 depth_nside^2 = {12 * self.depth_nside**2} values "
                    f"(RING); got shape {values.shape}"
                )
            values[values == hp.UNSEEN] = np.nan
            if np.isinf(values).any() or np.isnan(values).all():
                raise InputError("`m50_map` must be finite or NaN, with at least one value")
            values.setflags(write=False)
            object.__setattr__(self, "m50_map", values)

    def completeness_shape(self):
        """The curve shape for a :class:`countscale.completeness.DepthMap` (m50 = 0)."""
        return LogisticCompleteness(m50=0.0, width=self.width)

    def sigma(self, mag, m50):
        """Magnitude error at `mag` where the local m50 is `m50` (arrays broadcast)."""
        sky = np.minimum(
            self.sigma_max, self.sigma_at_m50 * 10.0 ** (0.4 * (np.asarray(mag) - m50))
        )
        return np.sqrt(sky**2 + self.sigma_floor**2)


@dataclass(frozen=True)
class Injections:
    """Synthetic sources injected uniformly over the footprint and recovered or not.

    Parameters
    ----------
    n : int
        Number of injections, >= 0.
    mag_range : (float, float), optional
        Injected magnitudes are uniform in this range; default m50 - 3 to m50 + 2 (using the
        shallowest and deepest region).
    """

    n: int = 0
    mag_range: tuple[float, float] | None = None

    def __post_init__(self):
        object.__setattr__(self, "n", _integer("n", self.n, lo=0))
        if self.mag_range is not None:
            object.__setattr__(self, "mag_range", _pair("mag_range", self.mag_range))


@dataclass(frozen=True, eq=False)
class MockSpec:
    """The whole truth specification of a mock survey.

    Parameters
    ----------
    galaxies : SchechterGalaxies or MassFunctionGalaxies or None
    stars : DiskStars or None
    clustering : LognormalClustering or None
        Galaxy positions: None for Poisson-uniform over the footprint.
    measurement : Measurement
    injections : Injections
    mag_limits : sequence of float
        Apparent magnitudes for the truth counts (sources with m_true <= limit).
    cosmology : str or astropy FLRW
        Default Planck 2018 (Planck Collaboration 2020, A&A 641, A6).
    seed : int, optional
        Used when :func:`make_mock` gets no `rng`.
    footprint : Footprint, optional
        Used when :func:`make_mock` gets no `footprint`.
    generation_mag_limit : float, optional
        Draw sources down to this magnitude instead of the one set by
        ``measurement.detection_floor``.
    extinction : countscale.extinction.ExtinctionMap, optional
        Galactic dust in front of every source: each source is seen A = R E(B-V) mag fainter
        (at its map pixel) before detection and noise; the truth counts stay in intrinsic
        magnitudes. The catalogue then has a column ``extinction`` (A, mag).
    """

    galaxies: SchechterGalaxies | MassFunctionGalaxies | None = None
    stars: DiskStars | None = None
    clustering: LognormalClustering | None = None
    measurement: Measurement = field(default_factory=Measurement)
    injections: Injections = field(default_factory=Injections)
    mag_limits: tuple[float, ...] = (24.0,)
    cosmology: Any = "Planck18"
    seed: int | None = None
    footprint: Footprint | None = None
    generation_mag_limit: float | None = None
    extinction: Any = None

    def __post_init__(self):
        checks = (
            ("galaxies", SchechterGalaxies | MassFunctionGalaxies, True),
            ("stars", DiskStars, True),
            ("clustering", LognormalClustering, True),
            ("measurement", Measurement, False),
            ("injections", Injections, False),
            ("footprint", Footprint, True),
        )
        for name, kind, optional in checks:
            value = getattr(self, name)
            if (value is None and not optional) or (value is not None and not isinstance(
                    value, kind)):
                raise InputTypeError(
                    f"`{name}` must be {'None or ' if optional else ''}a {_kind_name(kind)}; "
                    f"got {type(value).__name__}"
                )
        if self.galaxies is None and self.stars is None:
            raise InputError("a mock needs `galaxies` or `stars`; got neither")
        if self.extinction is not None:
            from countscale.extinction import ExtinctionMap

            if not isinstance(self.extinction, ExtinctionMap):
                raise InputTypeError(f"`extinction` must be None or an ExtinctionMap; got "
                                     f"{type(self.extinction).__name__}")
        if self.clustering is not None and self.galaxies is None:
            raise InputError("`clustering` applies to galaxies; got clustering without galaxies")
        limits = _real_tuple("mag_limits", self.mag_limits)
        object.__setattr__(self, "mag_limits", limits)
        _as_cosmology(self.cosmology)
        if self.seed is not None:
            seed = _integer("seed", self.seed, lo=0)
            object.__setattr__(self, "seed", seed)
        if self.generation_mag_limit is not None:
            value = _real("generation_mag_limit", self.generation_mag_limit)
            if value < max(limits):
                raise InputError(
                    f"`generation_mag_limit` must be >= the faintest of `mag_limits` "
                    f"({max(limits)!r}); got {value!r}"
                )
            object.__setattr__(self, "generation_mag_limit", value)

    @classmethod
    def from_toml(cls, path):
        """Read a specification from TOML (see :func:`load_mock_spec`)."""
        return load_mock_spec(path)


def _kind_name(kind):
    args = getattr(kind, "__args__", None)
    if args:
        return " or ".join(a.__name__ for a in args)
    return kind.__name__


# --------------------------------------------------------------------------------------------
# Redshift and luminosity sampling of galaxies
# --------------------------------------------------------------------------------------------
class _GalaxyModel:
    """The galaxy model on a fine redshift grid, its proposal bounds and its integrals.

    dV/dz/dOmega x (density evolution) is tabulated at log-spaced nodes from astropy and taken
    as linear between them (the model the sampler draws from exactly); the distance modulus is
    a cubic spline in ln z through astropy's values (error far below 1e-6 mag).
    """

    def __init__(self, galaxies, cosmo, m_gen):
        self.galaxies = galaxies
        self.cosmo = cosmo
        self.m_gen = m_gen
        z = np.geomspace(galaxies.z_min, galaxies.z_max, _N_Z_INTERVALS + 1)
        self.z = z
        volume = cosmo_mod.differential_comoving_volume_mpc3_sr(z, cosmo)
        self.w = volume * self._density_factor(z)
        self.dz = np.diff(z)
        self._dm = interpolate.CubicSpline(np.log(z), cosmo_mod.distance_modulus(z, cosmo))
        # Proposal bound of every interval from the values at five points across it, widened
        # by the second difference (a smooth function exceeds its samples by about a quarter
        # of that) and by 0.01 mag, which covers the kink where the absolute-magnitude cut
        # meets the apparent one (the bounded quantity moves < 0.003 mag across an interval).
        samples = np.stack([
            self._bound_variable(z[:-1] + t * self.dz) for t in (0.0, 0.25, 0.5, 0.75, 1.0)
        ])
        curvature = np.abs(samples[0] + samples[4] - 2.0 * samples[2]) + 0.01
        lowest, highest = samples.min(axis=0), samples.max(axis=0)
        if self._is_mass:
            self.bound = lowest - curvature
            self.bound = np.maximum(self.bound, galaxies.log10_mass_min)
            self._x_edge = galaxies.log10_mass_min
            self._tail = self._mass_above
            tail_bound = self._tail(self.bound)
            self._tail_total = float(self._tail(np.array(self._x_edge)))
        else:
            self.bound = highest + curvature
            self._x_edge = float(self.bound.max())
            self._shape = Schechter(m_star=0.0, alpha=galaxies.alpha, phi_star=1.0)
            self._tail = self._shape.number_density_brighter
            tail_bound = self._tail(self.bound)
            self._tail_total = float(self._tail(np.array(self._x_edge)))
        self.tail_fraction = tail_bound / self._tail_total
        norm = 1.0 if self._is_mass else galaxies.phi_star
        self.proposal = norm * 0.5 * (self.w[:-1] + self.w[1:]) * self.dz * tail_bound
        self.proposal_per_sr = float(self.proposal.sum())
        # No galaxy can be brighter than the limit when every bound is empty.
        total = self.proposal_per_sr if self.proposal_per_sr > 0 else 1.0
        self._cumulative = np.cumsum(self.proposal) / total

    @property
    def _is_mass(self):
        return isinstance(self.galaxies, MassFunctionGalaxies)

    def _density_factor(self, z):
        if self._is_mass:
            return np.ones_like(z)
        return 10.0 ** (0.4 * self.galaxies.evolution.P * z)

    def distance_modulus(self, z):
        return self._dm(np.log(z))

    def kcorrection(self, z):
        beta = self.galaxies.kcorrection_beta
        if beta is None:
            return np.zeros_like(z)
        return -2.5 * (1.0 + beta) * np.log10(1.0 + z)

    def m_star(self, z):
        return self.galaxies.m_star - self.galaxies.evolution.Q * z

    def _x_limit(self, z, mag):
        """Schechter: the faintest x = M - M*(z) brighter than apparent `mag` at z."""
        faintest = np.minimum(
            self.galaxies.abs_mag_faint, mag - self.distance_modulus(z) - self.kcorrection(z)
        )
        return faintest - self.m_star(z)

    def _log_l_limit(self, z, mag):
        """Mass model: the least log10 L [Lsun] brighter than apparent `mag` at z."""
        g = self.galaxies
        return (g.m_sun - mag + self.distance_modulus(z) + self.kcorrection(z)) / 2.5

    def _mass_needed(self, z, mag, scatter):
        """Least log10 mass whose mean light plus `scatter` dex reaches the limit."""
        g = self.galaxies
        needed = self._log_l_limit(z, mag) - scatter
        return (needed + g.log10_ml_ratio - 10.0 * g.ml_slope) / (1.0 - g.ml_slope)

    def _bound_variable(self, z):
        if self._is_mass:
            g = self.galaxies
            return self._mass_needed(z, self.m_gen, _SCATTER_TRUNCATION * g.ml_scatter_dex)
        return self._x_limit(z, self.m_gen)

    def _mass_above(self, x):
        return self.galaxies.mass_function.number_density_above(np.asarray(x, dtype=float))

    # -- sampling -------------------------------------------------------------------------
    def propose(self, n, rng):
        """Draw `n` proposals; return (z, abs_mag, log10_mass or None, accepted mask)."""
        j = np.searchsorted(self._cumulative, rng.random(n), side="right")
        j = np.minimum(j, len(self.dz) - 1)
        w0, w1 = self.w[j], self.w[j + 1]
        u = rng.random(n)
        # Inverse CDF of the linear density (1 - t) w0 + t w1 on t in [0, 1], in the form
        # that does not cancel when w0 ~ w1.
        t = u * (w0 + w1) / (w0 + np.sqrt(w0 * w0 + (w1 - w0) * u * (w0 + w1)))
        z = self.z[j] + np.clip(t, 0.0, 1.0) * self.dz[j]
        v = rng.random(n) * self.tail_fraction[j]
        if self._is_mass:
            g = self.galaxies
            x = g.mass_function.quantile(1.0 - v, g.log10_mass_min, np.inf)
            sigma = g.ml_scatter_dex
            if sigma > 0:
                lo, hi = special.ndtr(-_SCATTER_TRUNCATION), special.ndtr(_SCATTER_TRUNCATION)
                eps = sigma * special.ndtri(lo + rng.random(n) * (hi - lo))
            else:
                eps = np.zeros(n)
            log_l = g.mean_log10_luminosity(x) + eps
            abs_mag = g.m_sun - 2.5 * log_l
            accepted = log_l >= self._log_l_limit(z, self.m_gen)
            return z, abs_mag, x, accepted
        x = self._shape.quantile(v, -np.inf, self._x_edge)
        accepted = x <= self._x_limit(z, self.m_gen)
        return z, self.m_star(z) + x, None, accepted

    def apparent(self, z, abs_mag):
        return abs_mag + self.distance_modulus(z) + self.kcorrection(z)

    # -- integrals ------------------------------------------------------------------------
    def count_per_sr(self, mag):
        """Expected galaxies per sr with m_true <= `mag` (integral of the same model)."""
        # Gauss-Legendre, 3 nodes per interval, on the piecewise-linear volume weight.
        nodes, weights = np.polynomial.legendre.leggauss(3)
        total = 0.0
        for node, weight in zip(nodes, weights, strict=True):
            t = 0.5 * (node + 1.0)
            z = self.z[:-1] + t * self.dz
            w = (1.0 - t) * self.w[:-1] + t * self.w[1:]
            total += 0.5 * weight * float(np.sum(w * self.dz * self._number_density(z, mag)))
        return total

    def _number_density(self, z, mag):
        """Galaxies per Mpc^3 (per unit density factor) brighter than `mag` at each z."""
        if not self._is_mass:
            return self.galaxies.phi_star * self._tail(self._x_limit(z, mag))
        g = self.galaxies
        sigma = g.ml_scatter_dex
        if sigma == 0:
            need = np.maximum(self._mass_needed(z, mag, 0.0), g.log10_mass_min)
            return self._mass_above(need)
        # E over the truncated normal scatter of n(> mass needed for that scatter).
        nodes, weights = np.polynomial.legendre.leggauss(48)
        eps = _SCATTER_TRUNCATION * nodes
        pdf = np.exp(-0.5 * eps**2) / math.sqrt(2 * math.pi)
        pdf *= weights * _SCATTER_TRUNCATION
        pdf /= pdf.sum()
        total = np.zeros_like(z)
        for e, p in zip(eps, pdf, strict=True):
            need = np.maximum(self._mass_needed(z, mag, e * sigma), g.log10_mass_min)
            total += p * self._mass_above(need)
        return total

    def truth(self):
        """Parameters and number densities for the truth record."""
        g = self.galaxies
        out = {"z_min": g.z_min, "z_max": g.z_max, "kcorrection_beta": g.kcorrection_beta}
        if self._is_mass:
            mf = g.mass_function
            params = {f.name: getattr(mf, f.name) for f in fields(mf)}
            out.update(
                kind=type(mf).__name__,
                **params,
                log10_mass_min=g.log10_mass_min,
                log10_ml_ratio=g.log10_ml_ratio,
                ml_slope=g.ml_slope,
                ml_scatter_dex=g.ml_scatter_dex,
                m_sun=g.m_sun,
                number_density_mpc3=float(mf.number_density_above(g.log10_mass_min)),
                mass_density_msun_mpc3=float(mf.mass_density_msun_mpc3(g.log10_mass_min)),
            )
            return out
        lf = g.luminosity_function(0.0)
        out.update(
            kind="Schechter",
            m_star=g.m_star,
            alpha=g.alpha,
            phi_star=g.phi_star,
            Q=g.evolution.Q,
            P=g.evolution.P,
            abs_mag_faint=g.abs_mag_faint,
            number_density_mpc3=float(lf.number_density_brighter(g.abs_mag_faint)),
            luminosity_density_mag=float(lf.luminosity_density_mag(g.abs_mag_faint)),
        )
        return out


# --------------------------------------------------------------------------------------------
# Lognormal fields
# --------------------------------------------------------------------------------------------
def _legendre_rows(mu, lmax):
    """Yield (ell, P_ell(mu)) for ell = 0..lmax by the three-term recurrence."""
    p_prev = np.ones_like(mu)
    yield 0, p_prev
    if lmax == 0:
        return
    p = mu.copy()
    yield 1, p
    for ell in range(2, lmax + 1):
        p_prev, p = p, ((2 * ell - 1) * mu * p - (ell - 1) * p_prev) / ell
        yield ell, p


def gaussian_cl_for_lognormal(cl):
    """C_ell of the Gaussian field g whose lognormal transform has the spectrum `cl`.

    Parameters
    ----------
    cl : array_like, shape (lmax + 1,)
        Target C_ell of the lognormal density contrast delta = exp(g - sigma_g^2 / 2) - 1.

    Returns
    -------
    cl_gauss : ndarray, shape (lmax + 1,)
        C_ell of g; negative values (a spectrum no lognormal field has exactly) set to 0.
    n_clipped : int
        How many multipoles were set to 0.

    Notes
    -----
    The correlation functions obey 1 + xi_delta = exp(xi_g) (Coles & Jones 1991, MNRAS 248,
    1), so xi_g = ln(1 + xi_delta). xi(mu) = sum_ell (2 ell + 1) / (4 pi) C_ell P_ell(mu) and
    C_ell = 2 pi integral_{-1}^{1} xi(mu) P_ell(mu) dmu, the latter by Gauss-Legendre
    quadrature on 2 (lmax + 1) nodes from scipy's ``roots_legendre`` (exact for the polynomial
    xi_delta; ln(1 + xi) is smooth).
    """
    cl = _check_cl("cl", cl)
    lmax = cl.size - 1
    mu, weights = special.roots_legendre(2 * (lmax + 1))  # O(n), unlike numpy's leggauss
    xi = np.zeros_like(mu)
    for ell, p in _legendre_rows(mu, lmax):
        if cl[ell]:
            xi += (2 * ell + 1) / (4 * math.pi) * cl[ell] * p
    if np.any(xi <= -1.0):
        raise InputError(
            f"`cl` gives a correlation function <= -1 (min {xi.min():.3g}); no lognormal "
            "field has it"
        )
    xi_g = np.log1p(xi) * weights
    out = np.empty(lmax + 1)
    for ell, p in _legendre_rows(mu, lmax):
        out[ell] = 2 * math.pi * float(np.dot(xi_g, p))
    out[0] = 0.0
    negative = out < 0
    out[negative] = 0.0
    return out, int(negative[1:].sum())


def _gaussian_alm(cl, rng):
    """Random alm with <|a_lm|^2> = C_ell (healpy's ordering), from `rng` only."""
    lmax = cl.size - 1
    ell, m = hp.Alm.getlm(lmax)
    amplitude = np.sqrt(cl[ell])
    real = rng.standard_normal(ell.size)
    imag = rng.standard_normal(ell.size)
    # m = 0 coefficients are real with variance C_ell; m > 0 split it between the parts.
    scale = np.where(m == 0, 1.0, math.sqrt(0.5))
    return amplitude * scale * (real + 1j * np.where(m == 0, 0.0, imag))


def lognormal_field(cl, nside, rng):
    """A lognormal field 1 + delta on HEALPix (RING) with angular power spectrum `cl`.

    Parameters
    ----------
    cl : array_like, shape (lmax + 1,)
        Target C_ell of delta (C_0 ignored).
    nside : int
        Resolution (power of two); lmax is cut at 3 nside - 1.
    rng : int or numpy.random.Generator

    Returns
    -------
    ndarray, shape (12 nside^2,)
        1 + delta >= 0 at pixel centres, scaled so that its mean over the sky is exactly 1.

    Notes
    -----
    g is drawn with the C_ell of :func:`gaussian_cl_for_lognormal` and evaluated at pixel
    centres (``healpy.alm2map``, no pixel window); 1 + delta = exp(g) / mean(exp(g)). Fixing
    the sky mean makes the whole-sky number of sources exactly the model's on average.
    """
    nside = _nside("nside", nside)
    cl = _check_cl("cl", cl)
    cl_g, _ = gaussian_cl_for_lognormal(cl[: 3 * nside])
    gen = np.random.default_rng(rng) if not isinstance(rng, np.random.Generator) else rng
    return _lognormal_from_gaussian_cl(cl_g, nside, gen)


def _lognormal_from_gaussian_cl(cl_g, nside, gen):
    g = hp.alm2map(_gaussian_alm(cl_g, gen), nside, lmax=cl_g.size - 1, pixwin=False)
    field_ = np.exp(g - g.max())  # the constant cancels in the normalisation
    return field_ / field_.mean()


# --------------------------------------------------------------------------------------------
# Positions
# --------------------------------------------------------------------------------------------
def _sin_galactic_latitude(ra, dec):
    """sin b of ICRS positions in degrees (astropy's rotation, applied as a matrix)."""
    row = geo.icrs_to_galactic_matrix()[2]
    ra_r, dec_r = np.radians(ra), np.radians(dec)
    cos_dec = np.cos(dec_r)
    return row[0] * cos_dec * np.cos(ra_r) + row[1] * cos_dec * np.sin(ra_r) + row[2] * np.sin(
        dec_r
    )


def _galactic_x(ra, dec):
    """cos b cos l (direction cosine toward the galactic centre) of ICRS positions in degrees."""
    row = geo.icrs_to_galactic_matrix()[0]
    ra_r, dec_r = np.radians(ra), np.radians(dec)
    cos_dec = np.cos(dec_r)
    return row[0] * cos_dec * np.cos(ra_r) + row[1] * cos_dec * np.sin(ra_r) + row[2] * np.sin(
        dec_r
    )


def _points_in_cells(cells, order, rng):
    """Uniform positions inside NEST cells of `order` (one per entry of `cells`)."""
    sub = geo.HEALPIX_MAX_ORDER - order
    fine = (cells << np.int64(2 * sub)) + rng.integers(0, 4**sub, size=cells.size)
    return hp.pix2ang(2**geo.HEALPIX_MAX_ORDER, fine, nest=True, lonlat=True)


class _CellProcess:
    """Poisson proposals per HEALPix cell (full cells; the footprint test thins them)."""

    def __init__(self, cells, order, expected, rng):
        self.cells, self.order = cells, order
        counts = rng.poisson(expected)
        self.counts = counts
        self.cumulative = np.cumsum(counts)
        self.total = int(self.cumulative[-1]) if counts.size else 0

    def chunk(self, start, stop, rng):
        index = np.searchsorted(self.cumulative, np.arange(start, stop), side="right")
        ra, dec = _points_in_cells(self.cells[index], self.order, rng)
        return ra, dec, index


# --------------------------------------------------------------------------------------------
# The generator
# --------------------------------------------------------------------------------------------
def _order_of(nside):
    return int(nside).bit_length() - 1


class _MockRun:
    """Everything one mock needs, and the chunked generation of its catalogue."""

    def __init__(self, spec, footprint, rng, include_undetected):
        self.spec = spec
        self.footprint = footprint
        self.include_undetected = include_undetected
        self.cosmo = _as_cosmology(spec.cosmology)
        root, self.seed = _root_generator(rng, spec.seed)
        streams = root.spawn(5)
        self._rng_depth, self._rng_field, self._rng_gal, self._rng_star, self._rng_inj = streams
        self.measurement = spec.measurement
        self.depth = self._depth_map()
        covered = self.depth.m50_mag[~np.isnan(self.depth.m50_mag)]
        self.m50_range = (float(covered.min()), float(covered.max()))
        if spec.generation_mag_limit is not None:
            self.m_gen = spec.generation_mag_limit
        else:
            floor = self.measurement.detection_floor
            detect_limit = self.m50_range[1] + self.measurement.width * math.log(1 / floor - 1)
            self.m_gen = max(detect_limit, max(spec.mag_limits))
        self.galaxy_model = (
            _GalaxyModel(spec.galaxies, self.cosmo, self.m_gen) if spec.galaxies else None
        )
        self.field = None
        self.cl = None
        self.cl_clipped = 0
        if spec.clustering is not None:
            self.cl = spec.clustering.target_cl()
            cl_g, self.cl_clipped = gaussian_cl_for_lognormal(self.cl)
            self.field = _lognormal_from_gaussian_cl(cl_g, spec.clustering.nside,
                                                     self._rng_field)
        self.limits = np.asarray(spec.mag_limits)
        self.n_true = {}
        self.n_generated = {}
        self.n_detected = {}
        self.n_rows = 0

    # -- depth ----------------------------------------------------------------------------
    def _depth_map(self):
        meas = self.measurement
        nside = meas.depth_nside
        cells, _ = self.footprint.coverage_cells(_order_of(nside))
        ring = hp.nest2ring(nside, cells)
        values = np.full(12 * nside * nside, np.nan)
        if meas.m50_map is not None:
            values[ring] = meas.m50_map[ring]
            if np.isnan(values[ring]).any():
                raise InputError(
                    "`m50_map` must have a value at every pixel the footprint touches; "
                    f"got NaN at {int(np.isnan(values[ring]).sum())} of {ring.size} pixels"
                )
        else:
            order = np.argsort(ring)  # draw in RING order: independent of the footprint's form
            offsets = meas.m50_scatter * self._rng_depth.standard_normal(ring.size)
            values[ring[order]] = meas.m50 + offsets
        return DepthMap(values, meas.completeness_shape(), nest=False)

    # -- chunks ---------------------------------------------------------------------------
    def iter_chunks(self):
        """Yield the catalogue in DataFrames of at most ~_CHUNK_PROPOSALS rows."""
        if self.galaxy_model is not None:
            yield from self._galaxy_chunks()
        if self.spec.stars is not None:
            yield from self._star_chunks()

    def _galaxy_chunks(self):
        model = self.galaxy_model
        rate = model.proposal_per_sr
        self.n_true[_GALAXY] = np.zeros(self.limits.size, dtype=np.int64)
        self.n_generated[_GALAXY] = 0
        self.n_detected[_GALAXY] = 0
        if self.field is None:
            total = int(self._rng_gal.poisson(rate * self.footprint.area_sr))
            for start in range(0, total, _CHUNK_PROPOSALS):
                n = min(_CHUNK_PROPOSALS, total - start)
                rng = self._rng_gal.spawn(1)[0]
                ra, dec = self.footprint.random_points(n, rng)
                yield self._galaxy_frame(ra, dec, rng)
            return
        order = _order_of(self.spec.clustering.nside)
        cells, _ = self.footprint.coverage_cells(order)
        nside = 2**order
        ring = hp.nest2ring(nside, cells)
        expected = rate * self.field[ring] * hp.nside2pixarea(nside)
        process = _CellProcess(cells, order, expected, self._rng_gal)
        for start in range(0, process.total, _CHUNK_PROPOSALS):
            rng = self._rng_gal.spawn(1)[0]
            ra, dec, _ = process.chunk(start, min(start + _CHUNK_PROPOSALS, process.total), rng)
            inside = self.footprint.contains(ra, dec)
            yield self._galaxy_frame(ra[inside], dec[inside], rng)

    def _galaxy_frame(self, ra, dec, rng):
        model = self.galaxy_model
        z, abs_mag, log_mass, accepted = model.propose(ra.size, rng)
        keep = np.flatnonzero(accepted)
        ra, dec, z, abs_mag = ra[keep], dec[keep], z[keep], abs_mag[keep]
        columns = {"z": z, "abs_mag": abs_mag}
        if log_mass is not None:
            columns["log10_mass"] = log_mass[keep]
        mag_true = model.apparent(z, abs_mag)
        return self._measure(_GALAXY, ra, dec, mag_true, columns, rng)

    def _star_chunks(self):
        stars = self.spec.stars
        self.n_true[_STAR] = np.zeros(self.limits.size, dtype=np.int64)
        self.n_generated[_STAR] = 0
        self.n_detected[_STAR] = 0
        order = _STAR_CELL_ORDER
        cells, _ = self.footprint.coverage_cells(order)
        nside = 2**order
        lon, lat = hp.pix2ang(nside, cells, nest=True, lonlat=True)
        abs_b = np.degrees(np.arcsin(np.abs(_sin_galactic_latitude(lon, lat))))
        # The density falls with |sin b|: its largest value in a cell is at the cell's lowest
        # |b|, at most one cell radius (healpy's max_pixrad, with 5 % to spare) below the
        # centre's.
        reach = 1.05 * np.degrees(hp.max_pixrad(nside))
        s_bound = np.sin(np.radians(np.maximum(abs_b - reach, 0.0)))
        radial = not math.isinf(stars.scale_length_pc)
        if radial:
            # With a radial gradient the density also grows toward the galactic centre: the
            # smallest inverse length k in a cell takes the lowest |b| and the direction
            # closest to the centre, each at most one cell radius from the centre's.
            to_centre = np.degrees(np.arccos(np.clip(_galactic_x(lon, lat), -1.0, 1.0)))
            cos_bound = np.cos(np.radians(np.maximum(to_centre - reach, 0.0)))
            bound = stars.density_at_inverse_length(
                stars.inverse_length(s_bound, cos_bound), self.m_gen)
        else:
            bound = stars.density_per_sr(s_bound, self.m_gen)
        process = _CellProcess(cells, order, bound * hp.nside2pixarea(nside), self._rng_star)
        for start in range(0, process.total, _CHUNK_PROPOSALS):
            rng = self._rng_star.spawn(1)[0]
            ra, dec, index = process.chunk(
                start, min(start + _CHUNK_PROPOSALS, process.total), rng
            )
            s = np.abs(_sin_galactic_latitude(ra, dec))
            keep = self.footprint.contains(ra, dec)
            if radial:
                k = stars.inverse_length(s, _galactic_x(ra, dec))
                keep &= rng.random(ra.size) * bound[index] <= stars.density_at_inverse_length(
                    k, self.m_gen)
                ra, dec, k = ra[keep], dec[keep], k[keep]
                abs_mag, distance = self._star_marks_radial(k, rng)
            else:
                keep &= rng.random(ra.size) * bound[index] <= stars.density_per_sr(s, self.m_gen)
                ra, dec, s = ra[keep], dec[keep], s[keep]
                abs_mag, distance = self._star_marks(s, rng)
            mag_true = abs_mag + 5.0 * np.log10(distance) - 5.0
            columns = {"z": np.full(ra.size, np.nan), "abs_mag": abs_mag, "distance_pc": distance}
            yield self._measure(_STAR, ra, dec, mag_true, columns, rng)

    def _star_marks(self, s, rng):
        """Class and distance of stars at |sin b| = s, drawn to the generation limit."""
        stars = self.spec.stars
        h = stars.scale_height_pc
        radius = stars._radius_pc(self.m_gen)  # (K,)
        weight = np.asarray(stars.density_pc3) * stars._cone_integral(radius[None, :],
                                                                       s[:, None])
        cumulative = np.cumsum(weight, axis=1)
        pick = (rng.random(s.size) * cumulative[:, -1])[:, None]
        k = np.minimum((cumulative < pick).sum(axis=1), len(radius) - 1)
        r_max = radius[k]
        distance = np.empty(s.size)
        x_max = np.zeros(s.size) if math.isinf(h) else r_max * s / h
        # Density r^2 exp(-r s / h) on [0, R]: where R s / h is small, draw r^3 uniform and keep
        # each with probability exp(-r s / h) (>= e^-0.5); elsewhere invert the incomplete
        # gamma function.
        todo = np.flatnonzero(x_max < 0.5)
        while todo.size:
            r = r_max[todo] * np.cbrt(rng.random(todo.size))
            ok = rng.random(todo.size) <= np.exp(-r * x_max[todo] / r_max[todo])
            distance[todo[ok]] = r[ok]
            todo = todo[~ok]
        far = np.flatnonzero(x_max >= 0.5)
        if far.size:
            p = rng.random(far.size) * special.gammainc(3.0, x_max[far])
            distance[far] = special.gammaincinv(3.0, p) * h / s[far]
        return np.asarray(stars.abs_mag)[k], distance

    def _star_marks_radial(self, k, rng):
        """Class and distance of stars along directions of inverse length ``k`` [pc^-1]."""
        stars = self.spec.stars
        radius = stars._radius_pc(self.m_gen)  # (K,)
        weight = np.asarray(stars.density_pc3) * _exponential_cone(radius[None, :], k[:, None])
        cumulative = np.cumsum(weight, axis=1)
        pick = (rng.random(k.size) * cumulative[:, -1])[:, None]
        cls = np.minimum((cumulative < pick).sum(axis=1), len(radius) - 1)
        r_max = radius[cls]
        x_max = r_max * k
        distance = np.empty(k.size)
        # Density r^2 exp(-k r) on [0, R]. 0 <= k R < 0.5: r^3 uniform, kept with probability
        # exp(-k r) >= e^-0.5; k R >= 0.5: the inverse incomplete gamma function; k < 0 (the
        # density grows outward): the cumulative distribution inverted by bisection.
        todo = np.flatnonzero((x_max >= 0.0) & (x_max < 0.5))
        while todo.size:
            r = r_max[todo] * np.cbrt(rng.random(todo.size))
            ok = rng.random(todo.size) <= np.exp(-r * k[todo])
            distance[todo[ok]] = r[ok]
            todo = todo[~ok]
        far = np.flatnonzero(x_max >= 0.5)
        if far.size:
            p = rng.random(far.size) * special.gammainc(3.0, x_max[far])
            distance[far] = special.gammaincinv(3.0, p) / k[far]
        grow = np.flatnonzero(x_max < 0.0)
        if grow.size:
            target = rng.random(grow.size) * _exponential_cone(r_max[grow], k[grow])
            lo, hi = np.zeros(grow.size), r_max[grow].copy()
            for _ in range(60):  # 2^-60 of R: far below float64's resolution of R
                mid = 0.5 * (lo + hi)
                below = _exponential_cone(mid, k[grow]) < target
                lo, hi = np.where(below, mid, lo), np.where(below, hi, mid)
            distance[grow] = 0.5 * (lo + hi)
        return np.asarray(stars.abs_mag)[cls], distance

    def _measure(self, population, ra, dec, mag_true, columns, rng):
        """Depth, detection and noise for one chunk; tally the truth; build the frame."""
        meas = self.measurement
        n = ra.size
        m50 = self.depth.m50_mag[hp.ang2pix(meas.depth_nside, ra, dec, lonlat=True)]
        seen = mag_true  # as it arrives at the telescope: behind the Galaxy's dust, if any
        if self.spec.extinction is not None:
            extinction = self.spec.extinction.extinction_at(ra, dec)
            columns = {**columns, "extinction": extinction}
            seen = mag_true + extinction
        completeness = self.depth.completeness_at(seen, ra, dec)
        detected = rng.random(n) < completeness
        mag = seen + meas.sigma(seen, m50) * rng.standard_normal(n)
        mag_err = meas.sigma(mag, m50)
        self.n_generated[population] += n
        self.n_detected[population] += int(detected.sum())
        self.n_true[population] += (mag_true[None, :] <= self.limits[:, None]).sum(axis=1)
        keep = slice(None) if self.include_undetected else detected
        frame = {
            "ra": ra[keep],
            "dec": dec[keep],
            "mag": mag[keep],
            "mag_err": mag_err[keep],
            "mag_true": mag_true[keep],
        }
        for name, values in columns.items():
            frame[name] = values[keep]
        if self.include_undetected:
            frame["detected"] = detected
        rows = len(frame["ra"])
        out = pd.DataFrame(
            {
                "id": np.arange(self.n_rows, self.n_rows + rows, dtype=np.int64),
                "population": pd.Categorical.from_codes(
                    np.full(rows, 0 if population == _GALAXY else 1, dtype=np.int8),
                    dtype=_POPULATIONS,
                ),
                **frame,
            }
        )
        self.n_rows += rows
        return self._with_all_columns(out)

    def _with_all_columns(self, frame):
        """Same columns in every chunk: NaN where a population has no such quantity."""
        wanted = ["id", "population", "ra", "dec", "mag", "mag_err", "mag_true", "z", "abs_mag"]
        if isinstance(self.spec.galaxies, MassFunctionGalaxies):
            wanted.append("log10_mass")
        if self.spec.stars is not None:
            wanted.append("distance_pc")
        if self.spec.extinction is not None:
            wanted.append("extinction")
        if self.include_undetected:
            wanted.append("detected")
        for name in wanted:
            if name == "population" and name not in frame:
                frame[name] = pd.Categorical([], dtype=_POPULATIONS)
            elif name not in frame:
                frame[name] = np.nan
        return frame[wanted]

    # -- injections and truth -------------------------------------------------------------
    def injections(self):
        spec = self.spec.injections
        rng = self._rng_inj
        lo, hi = spec.mag_range or (self.m50_range[0] - 3.0, self.m50_range[1] + 2.0)
        if spec.n == 0:
            ra = dec = mag = np.zeros(0)
            recovered = np.zeros(0, dtype=np.int8)
        else:
            ra, dec = self.footprint.random_points(spec.n, rng)
            mag = rng.uniform(lo, hi, spec.n)
            completeness = self.depth.completeness_at(mag, ra, dec)
            recovered = (rng.random(spec.n) < completeness).astype(np.int8)
        return pd.DataFrame({"mag": mag, "recovered": recovered, "ra": ra, "dec": dec})

    def truth(self, injections):
        counts = _expected(self.spec, self.footprint, self.limits, self.galaxy_model)
        meas = self.measurement
        return MockTruth(
            seed=self.seed,
            cosmology=_cosmology_name(self.cosmo),
            area_deg2=self.footprint.area_deg2,
            mag_limits=tuple(float(m) for m in self.limits),
            generation_mag_limit=float(self.m_gen),
            n_expected_sky=counts["sky"],
            n_expected_footprint=counts["footprint"],
            n_true_footprint={
                _PLURAL[k]: tuple(int(x) for x in v) for k, v in self.n_true.items()
            },
            n_generated={_PLURAL[k]: int(v) for k, v in self.n_generated.items()},
            n_detected={_PLURAL[k]: int(v) for k, v in self.n_detected.items()},
            galaxies=None if self.galaxy_model is None else self.galaxy_model.truth(),
            stars=None if self.spec.stars is None else _star_truth(self.spec.stars),
            measurement={
                "m50": meas.m50,
                "width": meas.width,
                "m50_min": self.m50_range[0],
                "m50_max": self.m50_range[1],
                "depth_nside": meas.depth_nside,
                "sigma_at_m50": meas.sigma_at_m50,
                "sigma_max": meas.sigma_max,
                "sigma_floor": meas.sigma_floor,
                "detection_floor": meas.detection_floor,
            },
            cl=self.cl,
            cl_gaussian_clipped=self.cl_clipped,
            n_injections=len(injections),
            n_recovered=int(injections["recovered"].sum()),
        )


def _star_truth(stars):
    return {
        "abs_mag": list(stars.abs_mag),
        "density_pc3": list(stars.density_pc3),
        "scale_height_pc": stars.scale_height_pc,
        **({} if math.isinf(stars.scale_length_pc) else
           {"scale_length_pc": stars.scale_length_pc}),
    }


def _expected(spec, footprint, limits, galaxy_model):
    """Expected counts per population and limit: whole sky and footprint."""
    sky, on_footprint = {}, {}
    if galaxy_model is not None:
        per_sr = np.array([galaxy_model.count_per_sr(m) for m in limits])
        sky["galaxies"] = tuple(float(x) for x in per_sr * FULL_SKY_SR)
        on_footprint["galaxies"] = tuple(float(x) for x in per_sr * footprint.area_sr)
    if spec.stars is not None:
        sky["stars"] = tuple(spec.stars.whole_sky_count(m) for m in limits)
        # Fine enough that the density is nearly constant over a cell, coarse enough that a
        # whole-sky footprint stays below ~2 million cells.
        order = _STAR_TRUTH_ORDER
        while order > 4 and footprint.area_sr / (4 * math.pi / (12 * 4**order)) > 2e6:
            order -= 1
        cells, fraction = footprint.coverage_cells(order)
        lon, lat = hp.pix2ang(2**order, cells, nest=True, lonlat=True)
        s = np.abs(_sin_galactic_latitude(lon, lat))
        area = fraction * hp.nside2pixarea(2**order)
        if math.isinf(spec.stars.scale_length_pc):
            on_footprint["stars"] = tuple(
                float(np.dot(area, spec.stars.density_per_sr(s, m))) for m in limits
            )
        else:
            cos_x = _galactic_x(lon, lat)
            on_footprint["stars"] = tuple(
                float(np.dot(area, spec.stars.density_per_sr(s, m, cos_x))) for m in limits
            )
    return {"sky": sky, "footprint": on_footprint}


# --------------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class MockTruth:
    """What is true in a mock, for checking estimates against.

    Attributes
    ----------
    seed : int or None
        The seed the mock was made from (None when a Generator was passed).
    cosmology : str
    area_deg2 : float
        Area of the footprint.
    mag_limits : tuple of float
        Apparent magnitudes of the counts below (m_true <= limit).
    generation_mag_limit : float
        Sources fainter than this were not drawn.
    n_expected_sky : dict
        Population (``"galaxies"``, ``"stars"``) -> expected number over the whole sky to each
        limit, by integrating the model (analytic for stars).
    n_expected_footprint : dict
        The same over the footprint (the ensemble mean: for a clustered mock the realised
        field makes the footprint's own expectation differ).
    n_true_footprint : dict
        Population -> number of sources drawn in the footprint to each limit (all of them,
        detected or not; true magnitudes).
    n_generated, n_detected : dict
        Population -> sources drawn in the footprint (to the generation limit); detected.
    galaxies, stars : dict or None
        The model's parameters and number densities.
    measurement : dict
        m50 (typical, min and max over regions), width and the noise parameters.
    cl : ndarray or None
        The input C_ell of the galaxy density contrast (None: Poisson positions).
    cl_gaussian_clipped : int
        Multipoles where the Gaussian field's C_ell came out negative and was set to 0.
    n_injections, n_recovered : int
    """

    seed: int | None
    cosmology: str
    area_deg2: float
    mag_limits: tuple[float, ...]
    generation_mag_limit: float
    n_expected_sky: dict
    n_expected_footprint: dict
    n_true_footprint: dict
    n_generated: dict
    n_detected: dict
    galaxies: dict | None
    stars: dict | None
    measurement: dict
    cl: np.ndarray | None
    cl_gaussian_clipped: int
    n_injections: int
    n_recovered: int

    def __post_init__(self):
        if self.cl is not None:
            self.cl.setflags(write=False)

    def to_dict(self):
        """JSON-ready copy (C_ell as a list)."""
        out = {}
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, np.ndarray):
                value = [float(x) for x in value]
            elif isinstance(value, dict):
                value = _plain(value)
            elif isinstance(value, tuple):
                value = list(value)
            out[f.name] = value
        return out

    def summary(self):
        """A few readable lines."""
        lines = [
            f"mock truth (seed {self.seed}, {self.cosmology}): footprint "
            f"{self.area_deg2:.4g} deg^2",
        ]
        for pop in self.n_expected_sky:
            for i, m in enumerate(self.mag_limits):
                lines.append(
                    f"  {pop} m <= {m:g}: drawn {self.n_true_footprint[pop][i]}, expected "
                    f"{self.n_expected_footprint[pop][i]:.6g} (footprint), "
                    f"{self.n_expected_sky[pop][i]:.6g} (whole sky)"
                )
        return "\n".join(lines)


def _plain(value):
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value)
    return value


@dataclass(frozen=True, eq=False)
class MockSurvey:
    """A mock survey: catalogue, footprint, injections, depth map and the truth.

    Attributes
    ----------
    catalogue : pandas.DataFrame or None
        One row per detected source (all drawn sources with ``include_undetected``, then with
        a boolean ``detected`` column): ``id``, ``population`` (``"galaxy"``/``"star"``),
        ``ra``, ``dec`` [deg], ``mag`` (observed), ``mag_err``, ``mag_true``, ``z`` (NaN for
        stars), ``abs_mag``, and ``log10_mass`` (mass-function galaxies) and ``distance_pc``
        (stars) when those populations are present. None when :func:`write_mock` streamed it
        to `catalogue_path`.
    footprint : Footprint
    injections : pandas.DataFrame
        ``mag``, ``recovered`` (0/1), ``ra``, ``dec``.
    depth : countscale.completeness.DepthMap
        The m50 map (RING; NaN outside the footprint's pixels) and the logistic shape.
    truth : MockTruth
    spec : MockSpec
    field : ndarray or None
        The realised 1 + delta (RING, nside of the clustering), or None.
    catalogue_path : pathlib.Path or None
    """

    catalogue: pd.DataFrame | None
    footprint: Footprint
    injections: pd.DataFrame
    depth: DepthMap
    truth: MockTruth
    spec: MockSpec
    field: np.ndarray | None = None
    catalogue_path: Path | None = None

    def write_catalogue(self, path, format=None):
        """Write the catalogue as Parquet, FITS or CSV (from the suffix, or `format`)."""
        if self.catalogue is None:
            raise InputError(
                f"this mock's catalogue was streamed to {self.catalogue_path}; nothing to write"
            )
        kind = _format_of(path, format)
        with _CatalogueWriter(path, kind) as writer:
            for start in range(0, len(self.catalogue), _CHUNK_PROPOSALS):
                writer.write(self.catalogue.iloc[start : start + _CHUNK_PROPOSALS])

    def summary(self):
        rows = "streamed" if self.catalogue is None else f"{len(self.catalogue)} rows"
        return f"MockSurvey({rows}, footprint {self.footprint.area_deg2:.4g} deg^2)\n" + (
            self.truth.summary()
        )


# --------------------------------------------------------------------------------------------
# Entry points
# --------------------------------------------------------------------------------------------
def _make_iv(spec, footprint):
    if not isinstance(spec, MockSpec):
        raise InputTypeError(f"`spec` must be a MockSpec; got {type(spec).__name__}")
    footprint = spec.footprint if footprint is None else footprint
    if footprint is None:
        raise InputError("a mock needs a footprint: pass `footprint` or set `spec.footprint`")
    if not isinstance(footprint, Footprint):
        raise InputTypeError(f"`footprint` must be a Footprint; got {type(footprint).__name__}")
    if footprint.area_sr <= 0:
        raise InputError("`footprint` must have area > 0; got an empty footprint")
    if spec.extinction is not None:
        spec.extinction.check_covers(footprint, where="`spec.extinction`")
    return footprint


def make_mock(spec, rng=None, footprint=None, include_undetected=False):
    """Draw a mock survey from a truth specification.

    Parameters
    ----------
    spec : MockSpec
    rng : int, numpy.random.Generator or None
        Seed or generator; None uses ``spec.seed`` (or, if that is None too, a fresh seed
        that is recorded in the truth). The same seed gives the same mock.
    footprint : Footprint, optional
        Overrides ``spec.footprint``.
    include_undetected : bool
        Keep every drawn source, with a ``detected`` column.

    Returns
    -------
    MockSurvey
    """
    footprint = _make_iv(spec, footprint)
    run = _MockRun(spec, footprint, rng, bool(include_undetected))
    frames = list(run.iter_chunks())
    catalogue = pd.concat(frames, ignore_index=True) if frames else None
    if catalogue is None or not len(catalogue):
        catalogue = run._with_all_columns(pd.DataFrame({"id": np.zeros(0, np.int64)}))
    injections = run.injections()
    return MockSurvey(
        catalogue=catalogue,
        footprint=footprint,
        injections=injections,
        depth=run.depth,
        truth=run.truth(injections),
        spec=spec,
        field=run.field,
    )


def write_mock(spec, path, rng=None, footprint=None, format=None, include_undetected=False):
    """Draw a mock and stream its catalogue to a file, chunk by chunk (bounded memory).

    Parameters
    ----------
    spec, rng, footprint, include_undetected
        As in :func:`make_mock`; the same seed gives the same rows.
    path : str or path-like
        Output file, written atomically.
    format : {"parquet", "fits", "csv"}, optional
        Default from the suffix (``.parquet``/``.pq``, ``.fits``/``.fit``, ``.csv``).

    Returns
    -------
    MockSurvey
        With ``catalogue=None`` and ``catalogue_path`` set.
    """
    footprint = _make_iv(spec, footprint)
    kind = _format_of(path, format)
    run = _MockRun(spec, footprint, rng, bool(include_undetected))
    with _CatalogueWriter(path, kind) as writer:
        for frame in run.iter_chunks():
            writer.write(frame)
        if writer.n_rows == 0:
            writer.write(run._with_all_columns(pd.DataFrame({"id": np.zeros(0, np.int64)})))
    injections = run.injections()
    return MockSurvey(
        catalogue=None,
        footprint=footprint,
        injections=injections,
        depth=run.depth,
        truth=run.truth(injections),
        spec=spec,
        field=run.field,
        catalogue_path=Path(path),
    )


def expected_counts(spec, mag_limits=None, footprint=None):
    """Expected numbers of sources brighter than magnitude limits, from the model alone.

    Parameters
    ----------
    spec : MockSpec
    mag_limits : sequence of float, optional
        Default ``spec.mag_limits``.
    footprint : Footprint, optional
        Default ``spec.footprint``; without either, only the whole-sky numbers are given.

    Returns
    -------
    dict
        ``{"sky": {population: (n, ...)}, "footprint": {population: (n, ...)}}`` with
        populations ``"galaxies"`` and/or ``"stars"``, one number per limit.
    """
    if not isinstance(spec, MockSpec):
        raise InputTypeError(f"`spec` must be a MockSpec; got {type(spec).__name__}")
    limits = np.asarray(_real_tuple("mag_limits", spec.mag_limits if mag_limits is None
                                    else mag_limits))
    footprint = spec.footprint if footprint is None else footprint
    whole = footprint is None
    if whole:
        footprint = Footprint.full_sky(0)
    elif not isinstance(footprint, Footprint):
        raise InputTypeError(f"`footprint` must be a Footprint; got {type(footprint).__name__}")
    model = None
    if spec.galaxies is not None:
        model = _GalaxyModel(spec.galaxies, _as_cosmology(spec.cosmology), float(limits.max()))
    out = _expected(spec, footprint, limits, model)
    if whole:
        out["footprint"] = {}
    return out


# --------------------------------------------------------------------------------------------
# Catalogue files
# --------------------------------------------------------------------------------------------
_FORMATS = {".parquet": "parquet", ".pq": "parquet", ".fits": "fits", ".fit": "fits",
            ".csv": "csv"}


def _format_of(path, format):
    if not isinstance(path, str | os.PathLike):
        raise InputTypeError(f"`path` must be a file path; got {type(path).__name__}")
    if format is not None:
        if format not in ("parquet", "fits", "csv"):
            raise InputError(f"`format` must be 'parquet', 'fits' or 'csv'; got {format!r}")
        return format
    suffix = Path(path).suffix.lower()
    if suffix not in _FORMATS:
        raise InputError(
            f"{os.fspath(path)}: catalogue suffix must be .parquet, .pq, .fits, .fit or .csv "
            f"(or pass `format`); got {suffix or 'none'}"
        )
    return _FORMATS[suffix]


class _CatalogueWriter:
    """Append DataFrame chunks to one Parquet, FITS or CSV file (atomic on success)."""

    def __init__(self, path, kind):
        self.path, self.kind = Path(path), kind
        self.n_rows = 0
        self._atomic = None
        self._state = None

    def __enter__(self):
        self._atomic = atomic_path(self.path)
        self._tmp = self._atomic.__enter__()
        return self

    def __exit__(self, exc_type, exc, tb):
        try:
            if exc_type is None:
                self._finish()
            else:
                self._abort()
        finally:
            self._atomic.__exit__(exc_type, exc, tb)
        return False

    def write(self, frame):
        frame = frame.copy()
        if "population" in frame:
            frame["population"] = frame["population"].astype(str)
        getattr(self, f"_write_{self.kind}")(frame)
        self.n_rows += len(frame)

    # -- parquet ----------------------------------------------------------------------------
    def _write_parquet(self, frame):
        import pyarrow as pa
        import pyarrow.parquet as pq

        table = pa.Table.from_pandas(frame, preserve_index=False).replace_schema_metadata(None)
        if self._state is None:
            self._state = pq.ParquetWriter(self._tmp, table.schema, compression="zstd")
        self._state.write_table(table)

    # -- csv ----------------------------------------------------------------------------------
    def _write_csv(self, frame):
        first = self._state is None
        frame.to_csv(self._tmp, mode="w" if first else "a", header=first, index=False,
                     float_format="%.10g")
        self._state = True

    # -- fits ---------------------------------------------------------------------------------
    def _write_fits(self, frame):
        from astropy.io import fits

        if self._state is None:
            columns, dtype = [], []
            for name in frame.columns:
                values = frame[name].to_numpy()
                if values.dtype.kind in "OUS":
                    width = 8
                    columns.append(fits.Column(name=name, format=f"{width}A"))
                    dtype.append((name, f"S{width}"))
                elif values.dtype.kind == "b":
                    columns.append(fits.Column(name=name, format="L"))
                    dtype.append((name, "i1"))
                elif values.dtype.kind in "iu":
                    columns.append(fits.Column(name=name, format="K"))
                    dtype.append((name, ">i8"))
                else:
                    columns.append(fits.Column(name=name, format="D"))
                    dtype.append((name, ">f8"))
            hdu = fits.BinTableHDU.from_columns(fits.ColDefs(columns), nrows=0)
            handle = open(self._tmp, "wb")  # closed in _finish or _abort
            fits.PrimaryHDU().writeto(handle)
            header_at = handle.tell()
            handle.write(hdu.header.tostring().encode("ascii"))
            self._state = (handle, header_at, hdu.header, np.dtype(dtype))
        handle, _, _, dtype = self._state
        record = np.empty(len(frame), dtype=dtype)
        for name in dtype.names:
            values = frame[name].to_numpy()
            if dtype[name].kind == "S":
                record[name] = np.char.encode(values.astype(str), "ascii")
            elif dtype[name] == np.dtype("i1"):
                record[name] = np.where(values.astype(bool), ord("T"), ord("F"))
            else:
                record[name] = values
        handle.write(record.tobytes())

    def _finish(self):
        if self.kind == "parquet" and self._state is not None:
            self._state.close()
        elif self.kind == "fits" and self._state is not None:
            handle, header_at, header, dtype = self._state
            size = self.n_rows * dtype.itemsize
            handle.write(b"\0" * ((-size) % 2880))
            header["NAXIS2"] = self.n_rows
            handle.seek(header_at)
            handle.write(header.tostring().encode("ascii"))
            handle.close()

    def _abort(self):
        if self.kind == "parquet" and self._state is not None:
            self._state.close()
        elif self.kind == "fits" and self._state is not None:
            self._state[0].close()


# --------------------------------------------------------------------------------------------
# TOML
# --------------------------------------------------------------------------------------------
_TOP_KEYS = ("seed", "cosmology", "mag_limits", "generation_mag_limit")
_SECTIONS = ("footprint", "galaxies", "stars", "clustering", "measurement", "injections")
_GALAXY_KINDS = ("schechter", "schechter_mass", "double_schechter_mass")
_GALAXY_KEYS = {
    "schechter": ("kind", "m_star", "alpha", "phi_star", "evolution", "z_range",
                  "abs_mag_faint", "kcorrection_beta"),
    "schechter_mass": ("kind", "log10_mass_star", "alpha", "phi_star", "log10_mass_min",
                       "mass_to_light", "m_sun", "z_range", "kcorrection_beta"),
    "double_schechter_mass": ("kind", "log10_mass_star", "phi_star_1", "alpha_1",
                              "phi_star_2", "alpha_2", "log10_mass_min", "mass_to_light",
                              "m_sun", "z_range", "kcorrection_beta"),
}
_SECTION_KEYS = {
    "stars": ("abs_mag", "density_pc3", "scale_height_pc", "scale_length_pc"),
    "clustering": ("kind", "nside", "cl_100", "slope", "cl_file"),
    "measurement": ("m50", "width", "m50_scatter", "depth_nside", "sigma_at_m50", "sigma_max",
                    "sigma_floor", "detection_floor"),
    "injections": ("n", "mag_range"),
}


def _unknown(label, where, key, allowed):
    close = difflib.get_close_matches(key, list(allowed), n=1)
    hint = f"; did you mean {close[0]!r}?" if close else f"; allowed: {', '.join(allowed)}"
    return InputError(f"{label}: {where}unknown key {key!r}{hint}")


def _check_keys(label, section, table, allowed):
    where = f"[{section}] " if section else ""
    for key in table:
        if key not in allowed:
            raise _unknown(label, where, key, allowed)


def _toml_value(value):
    """Write a TOML value (the subset run-file footprint sections use)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value) if not isinstance(value, float) or math.isfinite(value) else (
            "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf"))
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items()) + "}"
    raise InputTypeError(f"unsupported TOML value {value!r}")  # pragma: no cover


def _footprint_from_table(label, table):
    """Build a Footprint from a run-file-style [footprint] table (validated by runfile)."""
    from countscale.runfile import parse_runfile

    text = "[footprint]\n" + "".join(f"{k} = {_toml_value(v)}\n" for k, v in table.items())
    runfile = parse_runfile(text, label)
    return Footprint.from_runfile_section(runfile.footprint)


def _section_error(label, section, exc):
    cls = InputTypeError if isinstance(exc, TypeError) else InputError
    return cls(f"{label}: [{section}] {exc}")


def load_mock_spec(path):
    """Read a mock specification from a TOML file.

    The file holds top-level keys ``seed``, ``cosmology`` (a name), ``mag_limits`` and
    ``generation_mag_limit``, and sections:

    ``[footprint]``
        Exactly as in a run file (``max_order``, ``include``, ``exclude``); relative paths
        are relative to this file.
    ``[galaxies]``
        ``kind = "schechter"`` with ``m_star``, ``alpha``, ``phi_star``, ``evolution = {Q, P}``,
        ``abs_mag_faint``; or ``kind = "schechter_mass"`` (``log10_mass_star``, ``alpha``,
        ``phi_star``) or ``"double_schechter_mass"`` (``log10_mass_star``, ``phi_star_1``,
        ``alpha_1``, ``phi_star_2``, ``alpha_2``) with ``log10_mass_min``, ``m_sun`` and
        ``mass_to_light = {log10_ratio, slope, scatter_dex}``; both with ``z_range`` and
        ``kcorrection_beta``.
    ``[stars]``
        ``abs_mag``, ``density_pc3``, ``scale_height_pc`` (``inf`` allowed).
    ``[clustering]``
        ``kind = "lognormal"``, ``nside``, and ``cl_100`` and ``slope``, or ``cl_file`` (a
        text file of C_ell, one per line from ell = 0).
    ``[measurement]``
        The fields of :class:`Measurement` except ``m50_map``.
    ``[injections]``
        ``n``, ``mag_range``.

    Unknown keys are errors (with a suggestion). Messages name the file and section.
    """
    if not isinstance(path, str | os.PathLike):
        raise InputTypeError(f"`path` must be a file path; got {type(path).__name__}")
    label = os.fspath(path)
    file = Path(label)
    if not file.is_file():
        raise InputError(f"{label}: mock specification file not found")
    try:
        raw = tomllib.loads(file.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{label}: TOML syntax error: {exc}") from None
    except UnicodeDecodeError:
        raise InputError(f"{label}: mock specification must be UTF-8 text") from None
    for key, value in raw.items():
        if isinstance(value, dict):
            if key not in _SECTIONS:
                close = difflib.get_close_matches(key, _SECTIONS, n=1)
                hint = f"; did you mean [{close[0]}]?" if close else ""
                raise InputError(f"{label}: unknown section [{key}]{hint}")
        elif key not in _TOP_KEYS:
            raise _unknown(label, "", key, _TOP_KEYS + _SECTIONS)
    kwargs = {}
    try:
        for key in _TOP_KEYS:
            if key in raw:
                kwargs[key] = raw[key]
        if "mag_limits" in kwargs:
            kwargs["mag_limits"] = _real_tuple("mag_limits", kwargs["mag_limits"])
    except (InputError, InputTypeError) as exc:
        raise _section_error(label, "top level", exc) from None
    if "footprint" in raw:
        kwargs["footprint"] = _footprint_from_table(label, raw["footprint"])
    base = file.resolve().parent
    readers = {
        "galaxies": lambda t: _galaxies_from_table(label, t),
        "stars": lambda t: _from_table(label, "stars", DiskStars, t),
        "clustering": lambda t: _clustering_from_table(label, t, base),
        "measurement": lambda t: _from_table(label, "measurement", Measurement, t),
        "injections": lambda t: _from_table(label, "injections", Injections, t),
    }
    for section, reader in readers.items():
        if section in raw:
            kwargs[section] = reader(raw[section])
    try:
        return MockSpec(**kwargs)
    except (InputError, InputTypeError) as exc:
        raise _section_error(label, "top level", exc) from None


def _from_table(label, section, cls, table):
    _check_keys(label, section, table, _SECTION_KEYS[section])
    try:
        return cls(**{k: (tuple(v) if isinstance(v, list) else v) for k, v in table.items()})
    except (InputError, InputTypeError) as exc:
        raise _section_error(label, section, exc) from None


def _galaxies_from_table(label, table):
    kind = table.get("kind", "schechter")
    if kind not in _GALAXY_KINDS:
        raise InputError(
            f"{label}: [galaxies] 'kind' must be one of {', '.join(_GALAXY_KINDS)}; got {kind!r}"
        )
    _check_keys(label, "galaxies", table, _GALAXY_KEYS[kind])
    t = {k: v for k, v in table.items() if k != "kind"}
    try:
        common = {}
        if "z_range" in t:
            common["z_min"], common["z_max"] = _pair("z_range", t.pop("z_range"))
        if "kcorrection_beta" in t:
            common["kcorrection_beta"] = t.pop("kcorrection_beta")
        if kind == "schechter":
            evolution = t.pop("evolution", {})
            if not isinstance(evolution, dict) or set(evolution) - {"Q", "P"}:
                raise InputError(f"`evolution` must be a table {{Q = , P = }}; got {evolution!r}")
            return SchechterGalaxies(evolution=Evolution(**evolution), **t, **common)
        ml = t.pop("mass_to_light", {})
        if not isinstance(ml, dict) or set(ml) - {"log10_ratio", "slope", "scatter_dex"}:
            raise InputError(
                "`mass_to_light` must be a table {log10_ratio = , slope = , scatter_dex = }; "
                f"got {ml!r}"
            )
        extra = {k: t.pop(k) for k in ("log10_mass_min", "m_sun") if k in t}
        form = SchechterMass(**t) if kind == "schechter_mass" else DoubleSchechterMass(**t)
        return MassFunctionGalaxies(
            mass_function=form,
            log10_ml_ratio=ml.get("log10_ratio", 0.0),
            ml_slope=ml.get("slope", 0.0),
            ml_scatter_dex=ml.get("scatter_dex", 0.0),
            **extra,
            **common,
        )
    except TypeError as exc:
        if isinstance(exc, InputTypeError):
            raise _section_error(label, "galaxies", exc) from None
        raise InputError(f"{label}: [galaxies] missing or misnamed key ({exc})") from None
    except InputError as exc:
        raise _section_error(label, "galaxies", exc) from None


def _clustering_from_table(label, table, base):
    _check_keys(label, "clustering", table, _SECTION_KEYS["clustering"])
    t = dict(table)
    kind = t.pop("kind", "lognormal")
    if kind != "lognormal":
        raise InputError(f"{label}: [clustering] 'kind' must be 'lognormal'; got {kind!r}")
    if "cl_file" in t:
        cl_path = base / str(t.pop("cl_file"))
        try:
            t["cl"] = np.loadtxt(cl_path, ndmin=1)
        except (OSError, ValueError) as exc:
            raise InputError(
                f"{label}: [clustering] 'cl_file' {cl_path} cannot be read as numbers "
                f"({str(exc).splitlines()[0]})"
            ) from None
    try:
        return LognormalClustering(**t)
    except (InputError, InputTypeError) as exc:
        raise _section_error(label, "clustering", exc) from None
