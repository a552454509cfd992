"""Stars among galaxies: the classifier in the tally, star-catalogue subtraction, fractions.

Outside references:
- numpy.histogram of the mock's galaxy-only and star-only magnitudes (the mock records each
  source's population) as the truth of the separated counts;
- the binomial standard error sqrt(f (1 - f) / n) of a fraction and Poisson errors of counts
  (textbook);
- a chi-square test (scipy.stats.chi2) of corrected counts against the galaxy-only truth.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from countscale import contamination as cn
from countscale.catalog import CatalogSource
from countscale.cosmology import hubble_h, m_star_from_h_units, phi_star_from_h_units
from countscale.errors import InputError
from countscale.footprint import Footprint
from countscale.mock import DiskStars, Measurement, MockSpec, SchechterGalaxies, make_mock
from countscale.tally import tally

BINS = {"start": 14.0, "stop": 22.0, "width": 0.5}
H = hubble_h("Planck18")
# Blanton et al. 2003, ApJ 592, 819 (^0.1r) Schechter parameters, as in the demo.
GALAXIES = SchechterGalaxies(m_star=m_star_from_h_units(-20.44, H), alpha=-1.05,
                             phi_star=phi_star_from_h_units(1.49e-2, H))


@pytest.fixture(scope="module")
def mixed(tmp_path_factory):
    """A mixed catalogue of galaxies and disk stars over a 2 deg^2 box (and its footprint)."""
    footprint = Footprint.box((200.0, 201.4), (20.0, 21.4), max_order=12)
    spec = MockSpec(galaxies=GALAXIES, stars=DiskStars(), measurement=Measurement(m50=22.5),
                    mag_limits=(22.0,))
    cat = make_mock(spec, rng=21, footprint=footprint).catalogue
    rng = np.random.default_rng(22)
    star = (cat.population == "star").to_numpy()
    frame = pd.DataFrame({
        "ra": cat.ra, "dec": cat.dec, "mag": cat.mag,
        "flag": star.astype(float),
        # A probabilistic classifier: stars mostly high, galaxies mostly low.
        "p_star": np.where(star, rng.beta(8, 2, len(cat)), rng.beta(2, 8, len(cat))),
        "star": star,
    })
    path = tmp_path_factory.mktemp("mixed") / "mixed.parquet"
    frame.drop(columns=["star"]).to_parquet(path)
    return footprint, frame, path


def _histogram(values):
    edges = np.arange(BINS["start"], BINS["stop"] + 1e-9, BINS["width"])
    return np.histogram(values, edges)[0], edges


def test_a_perfect_flag_gives_the_galaxy_only_counts_exactly(mixed):
    footprint, frame, path = mixed
    src = CatalogSource([path], ra="ra", dec="dec", mag="mag", classifier="flag")
    result = tally(src, footprint, n_regions=4, mag_bins=BINS)
    galaxies, _ = _histogram(frame.mag[~frame.star])
    stars, edges = _histogram(frame.mag[frame.star])
    np.testing.assert_array_equal(result.counts, galaxies)
    np.testing.assert_array_equal(result.excluded_counts, stars)
    ledger = result.ledger.to_dict()
    assert ledger["rows_rejected"]["star_by_classifier"] == int(frame.star.sum())
    assert ledger["rows_in_footprint"] == int((~frame.star).sum())
    result.ledger.check()
    cont = cn.from_classifier(result.counts, result.excluded_counts, edges)
    with np.errstate(invalid="ignore", divide="ignore"):
        truth = stars / (stars + galaxies)
    np.testing.assert_allclose(cont.fraction, truth, equal_nan=True)
    # Binomial standard error of a fraction.
    ok = (stars + galaxies) > 0
    np.testing.assert_allclose(cont.fraction_err[ok],
                               np.sqrt(truth * (1 - truth) / (stars + galaxies))[ok])
    # Its 68 % interval: Clopper-Pearson, as scipy.stats.binomtest gives it.
    for i in np.flatnonzero(ok)[::4]:
        ci = stats.binomtest(int(stars[i]), int(stars[i] + galaxies[i])).proportion_ci(
            confidence_level=0.6826894921370859, method="exact")
        np.testing.assert_allclose(cont.fraction_interval_68[i], [ci.low, ci.high], atol=1e-9)
    # Stars are most of the sources at bright magnitudes, few at the faint end.
    assert cont.fraction[0] > 0.8 and cont.fraction[-1] < 0.2


def test_a_probability_column_splits_at_the_threshold(mixed):
    footprint, frame, path = mixed
    for threshold in (0.5, 0.8):
        src = CatalogSource([path], ra="ra", dec="dec", mag="mag", classifier="p_star",
                            classifier_threshold=threshold)
        result = tally(src, footprint, n_regions=4, mag_bins=BINS)
        kept, _ = _histogram(frame.mag[frame.p_star < threshold])
        left_out, _ = _histogram(frame.mag[frame.p_star >= threshold])
        np.testing.assert_array_equal(result.counts, kept)
        np.testing.assert_array_equal(result.excluded_counts, left_out)
    # A star catalogue keeps the stars instead.
    src = CatalogSource([path], ra="ra", dec="dec", mag="mag", classifier="p_star",
                        population="stars")
    result = tally(src, footprint, n_regions=4, mag_bins=BINS)
    np.testing.assert_array_equal(result.counts, _histogram(frame.mag[frame.p_star >= 0.5])[0])
    assert result.ledger.rows_rejected["galaxy_by_classifier"] == int((frame.p_star < 0.5).sum())


def test_subtracting_an_independent_star_catalogue_recovers_the_galaxies(mixed, tmp_path):
    # The stars of another realisation of the same star model over the same footprint stand
    # for "a star catalogue of the same survey": corrected counts = sources - stars must agree
    # with the galaxy-only truth within their errors (chi-square, scipy.stats).
    footprint, frame, _ = mixed
    spec = MockSpec(stars=DiskStars(), measurement=Measurement(m50=22.5), mag_limits=(22.0,))
    other = make_mock(spec, rng=23, footprint=footprint).catalogue
    observed, edges = _histogram(frame.mag)
    stars, _ = _histogram(other.mag)
    cont = cn.subtract_stars(observed, stars, edges)
    galaxies, _ = _histogram(frame.mag[~frame.star])
    ok = observed > 0
    chi2 = float(np.sum(((cont.n_galaxies - galaxies) / cont.n_galaxies_err)[ok] ** 2))
    assert stats.chi2.sf(chi2, ok.sum()) > 1e-3
    np.testing.assert_allclose(cont.n_galaxies_err, np.sqrt(observed + stars))
    # The same star counts subtracted from the galaxies alone would over-correct: a check that
    # the comparison above can fail.
    wrong = cn.subtract_stars(galaxies, stars, edges).n_galaxies
    chi2_wrong = float(np.sum(((wrong - galaxies) / np.sqrt(galaxies + stars + 1))[ok] ** 2))
    assert stats.chi2.sf(chi2_wrong, ok.sum()) < 1e-6


def test_classifier_values_outside_zero_one_are_an_error(tmp_path):
    frame = pd.DataFrame({"ra": [200.1, 200.2, 200.3], "dec": [20.1, 20.2, 20.3],
                          "mag": [18.0, 19.0, 20.0], "p": [0.2, 1.7, np.nan]})
    path = tmp_path / "bad.parquet"
    frame.to_parquet(path)
    src = CatalogSource([path], ra="ra", dec="dec", mag="mag", classifier="p")
    footprint = Footprint.box((200.0, 201.0), (20.0, 21.0), max_order=10)
    with pytest.raises(InputError, match=r"`classifier` values must be in \[0, 1\] .*; got "
                                         r"1.7 in '.*bad.parquet' at row 1"):
        tally(src, footprint, n_regions=1)
    frame.loc[1, "p"] = 0.9
    frame.to_parquet(path)
    result = tally(src, footprint, n_regions=1)
    assert result.ledger.notes["classifier_missing"] == 1  # NaN: kept, unclassified
    assert result.ledger.rows_rejected["star_by_classifier"] == 1
    with pytest.raises(InputError, match=r"`classifier_threshold` \(0.3\) needs a `classifier` "
                                         r"column"):
        CatalogSource([path], ra="ra", dec="dec", mag="mag", classifier_threshold=0.3)
    with pytest.raises(InputError, match=r"`classifier_threshold` must be in \(0, 1\]; got 0"):
        CatalogSource([path], ra="ra", dec="dec", mag="mag", classifier="p",
                      classifier_threshold=0)


def test_contamination_inputs_are_checked():
    with pytest.raises(InputError, match=r"`star_counts` must hold one count per magnitude bin "
                                         r"\(2\); got shape \(3,\)"):
        cn.subtract_stars([1, 2], [1, 2, 3], [0, 1, 2])
    with pytest.raises(InputError, match=r"`observed_counts` must be finite counts >= 0"):
        cn.subtract_stars([1, -2], [1, 2], [0, 1, 2])
    with pytest.raises(InputError, match=r"`mag_edges` must be increasing bin edges"):
        cn.from_classifier([1, 2], [1, 2], [0, 2, 1])
    assert math.isnan(cn.from_classifier([0], [0], [0, 1]).fraction[0])
