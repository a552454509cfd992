"""Tests for countscale.extinction and dereddening in the tally.

Outside references:
- Euclidean counts: sources uniform in static Euclidean space brighter than m number
  n R^3 / 3 per sr with R = 10^((m - M) / 5 + 1) pc, so N(<m) grows as 10^(0.6 m) and dust of
  A magnitudes in front of them removes all but 10^(-0.6 A) (textbook result; the slope 0.6 of
  d log N / dm);
- healpy's ``ang2pix`` and map I/O (Gorski et al. 2005, ApJ 622, 759) for pixel lookups;
- the band coefficients' source, Schlafly & Finkbeiner 2011, ApJ 737, 103, Table 6 (values from
  memory; only their lookup is tested, not their digits).
"""

from __future__ import annotations

import math

import healpy as hp
import numpy as np
import pytest

from countscale.catalog import CatalogSource
from countscale.completeness import DepthMap, LogisticCompleteness
from countscale.errors import InputError, InputTypeError
from countscale.extinction import (
    COEFFICIENTS,
    ExtinctionMap,
    coefficient,
    dereddened_depth,
)
from countscale.footprint import Footprint
from countscale.mock import DiskStars, Measurement, MockSpec, make_mock
from countscale.tally import tally

BOX = ((150.0, 152.0), (10.0, 12.0))
NSIDE = 256
R_SDSS_R = COEFFICIENTS["sdss_r"]


def gradient_map(nside=NSIDE, nest=False):
    """E(B-V) = 0.03 + 0.12 (RA - 150) / 2 across the box: A_r from 0.07 to 0.62 mag."""
    ra, _ = hp.pix2ang(nside, np.arange(hp.nside2npix(nside)), nest=nest, lonlat=True)
    return 0.03 + 0.12 * np.clip((ra - 150.0) / 2.0, 0.0, 1.0)


def test_coefficients_are_looked_up_by_band_name():
    assert coefficient("SDSS_R") == coefficient("sdss_r") == R_SDSS_R
    assert all(value > 0 for value in COEFFICIENTS.values())
    with pytest.raises(InputError, match=r"`band` must be one of sdss_u, .*; got 'vega_q'"):
        coefficient("vega_q")
    with pytest.raises(InputTypeError, match=r"`band` must be a band name"):
        coefficient(2.2)


def test_map_lookups_follow_healpy_in_both_orderings(tmp_path):
    rng = np.random.default_rng(1)
    ra, dec = rng.uniform(0, 360, 500), rng.uniform(-80, 80, 500)
    for nest in (False, True):
        ebv = gradient_map(64, nest=nest) + rng.uniform(0, 0.01, hp.nside2npix(64))
        path = tmp_path / f"ebv_{nest}.fits"
        hp.write_map(path, ebv, nest=nest, overwrite=True)
        ext = ExtinctionMap.read(path, band="sdss_g")
        assert ext.nest is nest and ext.nside == 64
        expected = ebv[hp.ang2pix(64, ra, dec, nest=nest, lonlat=True)]
        np.testing.assert_allclose(ext.ebv_at(ra, dec), expected, rtol=1e-6)
        np.testing.assert_allclose(ext.extinction_at(ra, dec), COEFFICIENTS["sdss_g"] * expected,
                                   rtol=1e-6)


def test_dereddened_depth_moves_m50_by_the_extinction():
    footprint = Footprint.box(*BOX, max_order=12)
    ext = ExtinctionMap(gradient_map(), R_SDSS_R)
    m50 = np.full(hp.nside2npix(64), np.nan)
    m50[footprint.to_healpix(64) > 0] = 22.0
    shape = LogisticCompleteness(22.0, 0.2)
    depth = DepthMap(m50, shape)
    dered = dereddened_depth(depth, shape, ext, footprint)
    cells, _ = footprint.coverage_cells(8)
    ra, dec = hp.pix2ang(dered.nside, cells, nest=True, lonlat=True)
    shifted = dered.m50_mag[cells]
    np.testing.assert_allclose(shifted, 22.0 - ext.extinction_at(ra, dec), atol=1e-12)
    # A source of dereddened magnitude m is detected as m + A: completeness c(m + A).
    m = np.full(cells.size, 21.8)
    np.testing.assert_allclose(dered.completeness_at(m, ra, dec),
                               shape(m + ext.extinction_at(ra, dec)), atol=1e-12)


def test_dereddened_counts_recover_the_unextincted_truth(tmp_path):
    # A uniform (Euclidean) star population behind a dust screen with a known gradient: the
    # counts brighter than m in dereddened magnitudes recover n R^3 / 3 per sr; without
    # dereddening they fall short by the area-weighted mean of 10^(-0.6 A).
    footprint = Footprint.box(*BOX, max_order=12)
    ext = ExtinctionMap(gradient_map(), R_SDSS_R)
    stars = DiskStars(abs_mag=(10.0,), density_pc3=(0.8,), scale_height_pc=math.inf)
    spec = MockSpec(stars=stars, measurement=Measurement(m50=30.0), mag_limits=(18.0,),
                    generation_mag_limit=18.5, extinction=ext)
    mock = make_mock(spec, rng=12, footprint=footprint)
    path = tmp_path / "stars.parquet"
    mock.catalogue[["ra", "dec", "mag"]].to_parquet(path)
    source = CatalogSource([path], ra="ra", dec="dec", mag="mag")
    bins = {"start": 12.0, "stop": 20.0, "width": 0.5}
    dered = tally(source, footprint, n_regions=4, mag_bins=bins, extinction=ext)
    raw = tally(source, footprint, n_regions=4, mag_bins=bins)
    edges = dered.mag_edges
    n_dered = int(dered.counts[edges[1:] <= 18.0].sum() + dered.n_brighter)
    n_raw = int(raw.counts[edges[1:] <= 18.0].sum() + raw.n_brighter)
    radius = 10 ** ((18.0 - 10.0) / 5 + 1)
    expected = 0.8 * radius**3 / 3 * footprint.area_sr
    assert expected > 5000
    assert abs(n_dered - expected) < 3 * math.sqrt(expected)
    cells, fraction = footprint.coverage_cells(10)
    ra, dec = hp.pix2ang(1024, cells, nest=True, lonlat=True)
    dimmed = expected * np.average(10 ** (-0.6 * ext.extinction_at(ra, dec)), weights=fraction)
    assert abs(n_raw - dimmed) < 3 * math.sqrt(dimmed)
    assert n_raw < expected - 10 * math.sqrt(expected)  # the dust's effect is plain
    assert dered.extinction["coefficient"] == R_SDSS_R
    # The mock's own truth (true magnitudes) agrees with the dereddened count up to the
    # photometric noise (5e-6 mag here) moving sources across the limit.
    assert abs(n_dered - mock.truth.n_true_footprint["stars"][0]) <= 2


def test_bad_extinction_inputs(tmp_path):
    footprint = Footprint.box(*BOX, max_order=10)
    with pytest.raises(InputError, match=r"`ebv` must be a HEALPix map of 12 nside\*\*2 pixels; "
                                         r"got 1000 values"):
        ExtinctionMap(np.zeros(1000), 2.0)
    with pytest.raises(InputError, match=r"`coefficient` R must be a finite number > 0; "
                                         r"got -1.0"):
        ExtinctionMap(np.zeros(12), -1.0)
    with pytest.raises(InputError, match=r"`coefficient` R must be a finite number > 0; got 0.0"):
        ExtinctionMap(np.zeros(12), 0.0)
    with pytest.raises(InputError, match=r"E\(B-V\) must be >= 0; got -0.1"):
        ExtinctionMap(np.full(12, -0.1), 2.0)
    holed = gradient_map(64)
    holed[hp.ang2pix(64, 151.0, 11.0, lonlat=True)] = hp.UNSEEN
    with pytest.raises(InputError, match=r"dust: E\(B-V\) is missing \(NaN\) in 1 pixel\(s\) "
                                         r"inside the footprint, e.g. pixel \d+ "
                                         r"\(nside 64, RING\)"):
        ExtinctionMap(holed, 2.0).check_covers(footprint, where="dust")
    short = tmp_path / "short.fits"
    from astropy.io import fits

    fits.BinTableHDU.from_columns([fits.Column(name="EBV", format="E", array=np.zeros(100))]
                                  ).writeto(short)
    with pytest.raises(InputError, match=r"short.fits: HEALPix map length must be "
                                         r"12 \* nside\*\*2; got 100"):
        ExtinctionMap.read(short, band="sdss_r")
    with pytest.raises(InputError, match=r"`coefficient` or `band` is needed"):
        ExtinctionMap.read(short)
