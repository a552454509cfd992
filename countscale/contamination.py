"""Stars among galaxies: how many of the sources in each magnitude bin are stars.

Faint stars that look like galaxies leak into galaxy counts, most at bright magnitudes where
stars outnumber galaxies. Two ways to handle them:

* a star/galaxy classifier column in the catalogue: the tally leaves the stars out of the
  counts (``[catalog] classifier``) and counts them per bin, so the contamination they would
  have caused is known exactly (:func:`from_classifier`);
* a star catalogue of the same survey over the same footprint: its counts per bin are
  subtracted from the galaxy catalogue's, with their Poisson uncertainty
  (:func:`subtract_stars`).

Either way the result is a :class:`Contamination`: per magnitude bin the sources observed, the
stars among them, the galaxies left and the contamination fraction, with uncertainties.

Conventions
-----------
Counts are of the tally's sources in the footprint, per observed (dereddened, when the run
dereddens) magnitude bin. The fraction is stars / all sources; its uncertainty is binomial for
a classifier (the split of a bin's sources is known exactly; the error is that of the fraction
as an estimate of the population's) and propagated Poisson for a subtraction.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from countscale.errors import InputError, InputTypeError

__all__ = ["Contamination", "from_classifier", "subtract_stars"]


def _counts(name: str, values, n_bins: int | None = None) -> np.ndarray:
    try:
        array = np.asarray(values, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputTypeError(f"`{name}` must be counts per bin; got {type(values).__name__}") \
            from exc
    if array.ndim != 1 or (n_bins is not None and array.size != n_bins):
        raise InputError(f"`{name}` must hold one count per magnitude bin ({n_bins}); got shape "
                         f"{array.shape}")
    if not np.all(np.isfinite(array)) or np.any(array < 0):
        raise InputError(f"`{name}` must be finite counts >= 0; got {array.tolist()[:5]}...")
    return array


@dataclass(frozen=True, eq=False)
class Contamination:
    """Stars among the sources of each magnitude bin.

    Attributes
    ----------
    method : {"classifier", "star_catalog"}
    mag_edges : ndarray, shape (n + 1,)
    n_sources : ndarray, shape (n,)
        All sources per bin (galaxies and stars).
    n_stars, n_stars_err : ndarray
        Stars per bin and their standard error (0 for a classifier: it counted them).
    n_galaxies, n_galaxies_err : ndarray
        Galaxies per bin (sources − stars) and their standard error (Poisson).
    fraction, fraction_err : ndarray
        Stars / sources and its standard error; NaN in empty bins.
    fraction_interval_68 : ndarray, shape (n, 2)
        A 68 % interval of the fraction: Clopper-Pearson (exact binomial; Clopper & Pearson
        1934, Biometrika 26, 404) for a classifier, so a bin of 4 stars out of 4 sources is
        not "1 ± 0"; fraction ± error clipped to [0, 1] for a subtraction.
    """

    method: str
    mag_edges: np.ndarray
    n_sources: np.ndarray
    n_stars: np.ndarray
    n_stars_err: np.ndarray
    n_galaxies: np.ndarray
    n_galaxies_err: np.ndarray
    fraction: np.ndarray
    fraction_err: np.ndarray
    fraction_interval_68: np.ndarray

    def to_json(self) -> dict:
        def listed(values: np.ndarray) -> list:
            return [None if not np.isfinite(v) else float(v) for v in values]

        return {
            "method": self.method,
            "mag_edges": [float(e) for e in self.mag_edges],
            "n_sources": listed(self.n_sources),
            "n_stars": listed(self.n_stars),
            "n_stars_err": listed(self.n_stars_err),
            "n_galaxies": listed(self.n_galaxies),
            "n_galaxies_err": listed(self.n_galaxies_err),
            "fraction": listed(self.fraction),
            "fraction_err": listed(self.fraction_err),
            "fraction_interval_68": [listed(row) for row in self.fraction_interval_68],
        }


def _edges(mag_edges) -> np.ndarray:
    edges = np.asarray(mag_edges, dtype=float)
    if edges.ndim != 1 or edges.size < 2 or not np.all(np.diff(edges) > 0):
        raise InputError(f"`mag_edges` must be increasing bin edges; got {edges.tolist()[:5]}")
    return edges


def from_classifier(galaxy_counts, star_counts, mag_edges) -> Contamination:
    """Contamination when a classifier split every source: the stars were counted.

    Parameters
    ----------
    galaxy_counts, star_counts : array_like, shape (n,)
        Sources kept and sources the classifier left out, per bin.
    mag_edges : array_like, shape (n + 1,)
    """
    edges = _edges(mag_edges)
    kept = _counts("galaxy_counts", galaxy_counts, edges.size - 1)
    stars = _counts("star_counts", star_counts, edges.size - 1)
    total = kept + stars
    with np.errstate(invalid="ignore", divide="ignore"):
        fraction = np.where(total > 0, stars / total, np.nan)
        error = np.where(total > 0, np.sqrt(fraction * (1 - fraction) / total), np.nan)
    # Clopper-Pearson bounds from the beta distribution's quantiles (scipy.stats.beta).
    tail = 0.5 * (1.0 - 0.6826894921370859)  # 68.27 %: the normal one-sigma probability
    with np.errstate(invalid="ignore"):
        lo = np.where(stars > 0, stats.beta.ppf(tail, stars, kept + 1), 0.0)
        hi = np.where(kept > 0, stats.beta.ppf(1 - tail, stars + 1, kept), 1.0)
    interval = np.where((total > 0)[:, None], np.stack([lo, hi], axis=1), np.nan)
    return Contamination("classifier", edges, total, stars, np.zeros_like(stars), kept,
                         np.sqrt(kept), fraction, error, interval)


def subtract_stars(observed_counts, star_counts, mag_edges) -> Contamination:
    """Galaxies = sources − stars per bin, stars from a star catalogue of the same footprint.

    Both catalogues are observed by the same survey over the same footprint, so the star
    catalogue's count per observed-magnitude bin is the number of stars among the sources
    (no completeness correction between them). Uncertainties are Poisson for both counts.

    Parameters
    ----------
    observed_counts : array_like, shape (n,)
        Sources per bin in the (galaxy) catalogue, stars included.
    star_counts : array_like, shape (n,)
        Stars per bin in the star catalogue.
    mag_edges : array_like, shape (n + 1,)
    """
    edges = _edges(mag_edges)
    observed = _counts("observed_counts", observed_counts, edges.size - 1)
    stars = _counts("star_counts", star_counts, edges.size - 1)
    galaxies = observed - stars
    with np.errstate(invalid="ignore", divide="ignore"):
        fraction = np.where(observed > 0, stars / observed, np.nan)
        # Var(S/N) for independent Poisson S and N (delta method): f^2 (1/S + 1/N).
        error = np.where((observed > 0) & (stars > 0),
                         fraction * np.sqrt(1.0 / np.maximum(stars, 1) + 1.0 / observed),
                         np.where(observed > 0, 1.0 / observed, np.nan))
    interval = np.clip(np.stack([fraction - error, fraction + error], axis=1), 0.0, 1.0)
    return Contamination("star_catalog", edges, observed, stars, np.sqrt(stars), galaxies,
                         np.sqrt(observed + stars), fraction, error, interval)
