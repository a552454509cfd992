"""Cosmic variance of a footprint's mean surface density: analytic and empirical (jackknife).

Topics
------
CosmicVariance, cosmic_variance
    The analytic fractional cosmic variance sigma_cv of a footprint's mean surface density,
    as a function of the magnitude limit (each limit has its own n(z)), for this footprint or
    any other mask: ``cv(m_limit)``, ``cv.sigma(m_limit, mask=...)``.
caps_curve
    Poisson and cosmic-variance fractional errors against area for circular fields.
JackknifeDensity, jackknife_density
    The delete-one jackknife error of the mean surface density over footprint regions, split
    into its Poisson floor and the clustering excess.
compare_methods
    Analytic against jackknife, with a warning when they differ by more than a factor of 2.
lognormal_factor_draws
    Multiplicative draws that carry a fractional cosmic variance into Monte Carlo draws.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from countscale._checks import as_generator, check_real
from countscale._checks import real_array as _real_array
from countscale.errors import InputError, InputTypeError
from countscale.variance.angular import AngularSpectrum, check_bias
from countscale.variance.mask import FULL_SKY_DEG2, MaskSpectrum, cap_mask_spectrum
from countscale.variance.power import LinearPower
from countscale.variance.redshifts import RedshiftDistribution

__all__ = [
    "DISAGREEMENT_FACTOR",
    "CosmicVariance",
    "JackknifeDensity",
    "caps_curve",
    "compare_methods",
    "cosmic_variance",
    "crossover_area",
    "jackknife_density",
    "lognormal_factor_draws",
]

#: Analytic and jackknife clustering errors that differ by more than this factor are flagged.
DISAGREEMENT_FACTOR = 2.0

_DEG2_PER_SR = (180.0 / math.pi) ** 2


@dataclass(frozen=True, eq=False)
class CosmicVariance:
    """Analytic cosmic variance of a footprint's mean surface density.

    Build with :func:`cosmic_variance`. Calling it, ``cv(m_limit)``, gives the fractional
    rms (1 sigma) of this footprint's mean surface density of sources brighter than
    ``m_limit`` about the population's mean, from clustering alone (Poisson noise apart).

    Attributes
    ----------
    power : LinearPower
    bias : str
        The bias, in words.
    mask : MaskSpectrum
        This footprint's mask spectrum.
    nz_source : str
        Where each limit's n(z) comes from.
    """

    power: LinearPower
    bias: str
    mask: MaskSpectrum
    nz_source: str
    _bias_function: Callable = field(repr=False)
    _redshifts: Callable = field(repr=False)
    _spectra: dict = field(default_factory=dict, repr=False)

    def nz(self, m_limit):
        """The redshift distribution of sources brighter than ``m_limit``."""
        m_limit = check_real(m_limit, "m_limit")
        return self.spectrum(m_limit).nz

    def spectrum(self, m_limit, lmax=None):
        """Limber C_ell of sources brighter than ``m_limit`` (cached per limit)."""
        m_limit = check_real(m_limit, "m_limit")
        top = max(self.mask.lmax if lmax is None else float(lmax), 3000.0)
        key = round(m_limit, 9)
        cached = self._spectra.get(key)
        if cached is None or cached.lmax < top:
            nz = self._redshifts(m_limit)
            if not isinstance(nz, RedshiftDistribution):
                raise InputTypeError("the n(z) provider must return a RedshiftDistribution; got "
                                     f"{type(nz).__name__}")
            cached = AngularSpectrum.limber(self.power, nz, self._bias_function, lmax=top)
            self._spectra[key] = cached
        return cached

    def sigma(self, m_limit, mask=None):
        """Fractional cosmic variance (1 sigma) of the mean density over ``mask``.

        Parameters
        ----------
        m_limit : float
            Sources brighter than this (AB).
        mask : MaskSpectrum, optional
            Another footprint's (or layout's) mask spectrum; default this footprint's.
        """
        if mask is None:
            mask = self.mask
        elif not isinstance(mask, MaskSpectrum):
            raise InputTypeError(f"`mask` must be a MaskSpectrum; got {type(mask).__name__}")
        return mask.sigma(self.spectrum(m_limit, lmax=mask.lmax))

    def __call__(self, m_limit):
        return self.sigma(m_limit)

    def summary(self, m_limit):
        nz = self.nz(m_limit)
        return (f"sigma_cv = {self.sigma(m_limit):.4g} for m < {m_limit:g} over "
                f"{self.mask.area_deg2:.4g} deg² (n(z) median {nz.median:.3g}, bias "
                f"{self.bias}; {self.power.summary()})")


def cosmic_variance(power, mask, redshifts, bias=1.0, nz_source=None):
    """Build the analytic cosmic variance of a footprint.

    Parameters
    ----------
    power : LinearPower
    mask : MaskSpectrum
        The footprint's mask spectrum (:func:`~countscale.variance.mask.
        footprint_mask_spectrum`).
    redshifts : RedshiftDistribution or callable
        One n(z) for every magnitude limit, or ``redshifts(m_limit) -> RedshiftDistribution``.
    bias : float or callable
        Linear bias, a constant > 0 or b(z).
    nz_source : str, optional
        Description of the n(z) (default: the distribution's own).

    Returns
    -------
    CosmicVariance

    Examples
    --------
    >>> from countscale.variance import linear_power, cap_mask_spectrum, RedshiftDistribution
    >>> cv = cosmic_variance(linear_power(), cap_mask_spectrum(area_deg2=10.0),
    ...                      RedshiftDistribution.from_median(0.5), bias=1.2)
    >>> 0.01 < cv(22.0) < 0.1
    True
    """
    if not isinstance(power, LinearPower):
        raise InputTypeError(f"`power` must be a LinearPower; got {type(power).__name__}")
    if not isinstance(mask, MaskSpectrum):
        raise InputTypeError(f"`mask` must be a MaskSpectrum; got {type(mask).__name__}")
    bias_function, bias_text = check_bias(bias)
    if isinstance(redshifts, RedshiftDistribution):
        fixed = redshifts
        provider = lambda m_limit: fixed  # noqa: E731 - one n(z) for every limit
        nz_source = nz_source or fixed.source
    elif callable(redshifts):
        provider = redshifts
        nz_source = nz_source or "an n(z) function of the magnitude limit"
    else:
        raise InputTypeError("`redshifts` must be a RedshiftDistribution or a callable "
                             f"m_limit -> RedshiftDistribution; got {type(redshifts).__name__}")
    return CosmicVariance(power, bias_text, mask, nz_source, bias_function, provider)


def caps_curve(spectrum, areas_deg2, density_per_deg2=None):
    """Fractional errors of the mean density of circular fields of given areas.

    Parameters
    ----------
    spectrum : AngularSpectrum or callable
        C_ell of the population.
    areas_deg2 : array_like
        Field areas, in (0, full sky].
    density_per_deg2 : float, optional
        Surface density for the Poisson term 1 / sqrt(density x area).

    Returns
    -------
    dict
        ``{"area_deg2", "cosmic_variance", "poisson", "total", "crossover_area_deg2"}``:
        lists (Poisson and total None without a density) and the area where cosmic variance
        overtakes Poisson noise (log-interpolated; None if it does not within the areas).
    """
    areas = _real_array("areas_deg2", areas_deg2)
    if areas.ndim != 1 or areas.size == 0 or not np.all((areas > 0) & (areas <= FULL_SKY_DEG2
                                                                        * (1 + 1e-12))):
        raise InputError(f"`areas_deg2` must be areas in (0, {FULL_SKY_DEG2:.6g}] deg²")
    cv = np.array([cap_mask_spectrum(area_deg2=min(a, FULL_SKY_DEG2)).sigma(spectrum)
                   for a in areas])
    out = {"area_deg2": areas.tolist(), "cosmic_variance": cv.tolist(), "poisson": None,
           "total": None, "crossover_area_deg2": None}
    if density_per_deg2 is not None:
        density = check_real(density_per_deg2, "density_per_deg2", 0.0)
        poisson = 1.0 / np.sqrt(density * areas)
        out["poisson"] = poisson.tolist()
        out["total"] = np.hypot(poisson, cv).tolist()
        out["crossover_area_deg2"] = crossover_area(areas, poisson, cv)
    return out


def crossover_area(areas_deg2, poisson, cosmic):
    """Area where the cosmic-variance curve first rises above the Poisson curve (log-interpolated).

    None when the two do not cross within the areas given.
    """
    areas = np.asarray(areas_deg2, dtype=float)
    diff = np.log(np.asarray(cosmic, dtype=float)) - np.log(np.asarray(poisson, dtype=float))
    above = np.flatnonzero((diff[:-1] < 0) & (diff[1:] >= 0))
    if above.size == 0:
        return None
    i = int(above[0])
    t = -diff[i] / (diff[i + 1] - diff[i])
    return float(np.exp(np.log(areas[i]) + t * (np.log(areas[i + 1]) - np.log(areas[i]))))


# --------------------------------------------------------------------------------------------
# Jackknife
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class JackknifeDensity:
    """Delete-one jackknife error of the mean surface density over K regions.

    Attributes
    ----------
    n_regions : int
    n_sources : float
        Sources counted (completeness-weighted when weights were given).
    density_per_deg2 : float
    sigma_fraction : float
        Jackknife fractional error (Poisson and clustering together).
    poisson_fraction : float
        Poisson floor, 1 / sqrt(N) (for weighted counts, sqrt(sum w^2) / sum w).
    clustering_fraction : float
        sqrt(max(sigma^2 - poisson^2, 0)): the clustering excess on scales the regions see.
    """

    n_regions: int
    n_sources: float
    density_per_deg2: float
    sigma_fraction: float
    poisson_fraction: float
    clustering_fraction: float

    def to_json(self):
        return {
            "n_regions": self.n_regions,
            "n_sources": float(self.n_sources),
            "density_per_deg2": self.density_per_deg2,
            "sigma_fraction": self.sigma_fraction,
            "poisson_fraction": self.poisson_fraction,
            "clustering_fraction": self.clustering_fraction,
            "note": ("delete-one jackknife over footprint regions: it sees clustering on scales "
                     "smaller than the footprint only"),
        }


def jackknife_density(region_counts, region_area_deg2, poisson_counts=None):
    """Delete-one jackknife of the mean surface density over footprint regions.

    Parameters
    ----------
    region_counts : array_like, shape (K,)
        Sources per region (completeness-corrected counts are fine).
    region_area_deg2 : array_like, shape (K,)
        Region areas.
    poisson_counts : array_like, shape (K,), optional
        Raw counts for the Poisson floor when ``region_counts`` are corrected; default the
        counts themselves.

    Notes
    -----
    With d_k the density without region k, var = (K - 1) / K sum (d_k - mean d)^2 (Quenouille
    1956, Biometrika 43, 353; Tukey 1958; from memory).
    """
    counts = _real_array("region_counts", region_counts)
    areas = _real_array("region_area_deg2", region_area_deg2)
    if counts.ndim != 1 or counts.shape != areas.shape:
        raise InputError(f"`region_counts` and `region_area_deg2` must be 1-D of one length; "
                         f"got shapes {counts.shape} and {areas.shape}")
    k = counts.size
    if k < 3:
        raise InputError(f"`region_counts` must have at least 3 regions for a jackknife; got {k}")
    if not (np.all(np.isfinite(counts) & (counts >= 0)) and np.all(np.isfinite(areas) &
                                                                   (areas > 0))):
        raise InputError("`region_counts` must be finite and >= 0 and `region_area_deg2` > 0")
    raw = counts if poisson_counts is None else _real_array("poisson_counts", poisson_counts)
    total, area = float(counts.sum()), float(areas.sum())
    if total <= 0:
        raise InputError("`region_counts` are all zero: no density to jackknife")
    density = total / area
    delete_one = (total - counts) / (area - areas)
    var = (k - 1.0) / k * float(np.sum((delete_one - delete_one.mean()) ** 2))
    sigma = math.sqrt(var) / density
    n_raw = float(raw.sum())
    # Weighted counts: Poisson variance of sum w_i N_i over the total.
    weights = np.divide(counts, raw, out=np.ones_like(counts), where=raw > 0)
    poisson = math.sqrt(float(np.sum(weights**2 * raw))) / total if n_raw > 0 else math.inf
    clustering = math.sqrt(max(sigma**2 - poisson**2, 0.0))
    return JackknifeDensity(k, total, density, sigma, poisson, clustering)


def compare_methods(sigma_analytic, jackknife, factor=DISAGREEMENT_FACTOR):
    """Analytic cosmic variance against the jackknife's clustering excess.

    Returns
    -------
    dict
        ``{"analytic_over_jackknife", "factor", "agree", "warning"}``; ``warning`` is a
        sentence when the two differ by more than ``factor`` (None otherwise).
    """
    sigma_analytic = check_real(sigma_analytic, "sigma_analytic", 0.0, low_open=False)
    if not isinstance(jackknife, JackknifeDensity):
        raise InputTypeError(f"`jackknife` must be a JackknifeDensity; got "
                             f"{type(jackknife).__name__}")
    excess = jackknife.clustering_fraction
    ratio = sigma_analytic / excess if excess > 0 else math.inf
    agree = (1.0 / factor) <= ratio <= factor
    warning = None
    if not agree:
        if excess == 0:
            detail = ("the jackknife finds no clustering excess over the Poisson floor "
                      f"({jackknife.poisson_fraction:.3g}), while the analytic value is "
                      f"{sigma_analytic:.3g}")
        else:
            detail = (f"the analytic cosmic variance ({sigma_analytic:.3g}) is {ratio:.3g} "
                      f"times the jackknife's clustering excess ({excess:.3g})")
        warning = (f"{detail}: they differ by more than a factor of {factor:g}. The jackknife "
                   "cannot see modes larger than the footprint (it underestimates when "
                   "those dominate) and is noisy with few regions; the analytic value "
                   "depends on the n(z), the bias and linear theory. Check the bias and n(z).")
    return {"analytic_over_jackknife": None if math.isinf(ratio) else ratio,
            "factor": factor, "agree": bool(agree), "warning": warning}


def lognormal_factor_draws(sigma_fraction, n, rng=None):
    """Draws of a multiplicative factor with median 1 and fractional rms ``sigma_fraction``.

    exp(s eps) with eps ~ N(0, 1) and s^2 = ln(1 + sigma^2): a lognormal of median 1 whose
    mean-relative rms is ``sigma_fraction`` exactly (lognormal moments; common figure, no
    source). Used to move a realised density's draws to the population's mean density.
    """
    sigma = check_real(sigma_fraction, "sigma_fraction", 0.0, low_open=False)
    if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 1:
        raise InputError(f"`n` must be an integer >= 1; got {n!r}")
    generator = as_generator(rng)
    s = math.sqrt(math.log1p(sigma * sigma))
    return np.exp(s * generator.standard_normal(int(n)))
