"""The sky-model and contamination stages of a run, and the demo's star fields.

Outside references: the demo's truth (demo_data/truth.json, written by the mock generator from
the model in closed form, never read by the pipeline); the exponential-disk star count with a
radial gradient (integral of r^2 exp(-k r), k = sin|b| / h_z - cos b cos l / L; disk models:
Bahcall & Soneira 1980, ApJS 44, 73) through countscale.mock's truth; numpy.histogram of the
mock's own populations for the contamination counts.
"""

from __future__ import annotations

import json
import re
import textwrap
import warnings
from pathlib import Path

import healpy as hp
import numpy as np
import pandas as pd
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord

from countscale.cli import main
from countscale.errors import InputError
from countscale.mock import DiskStars, Measurement, MockSpec, make_mock
from countscale.pipeline import run_survey
from countscale.skymodel import SkyModelWarning

DEMO = Path(__file__).resolve().parents[1] / "demo_data"


# --------------------------------------------------------------------------------------------
# The demo's star fields
# --------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def stars_run(tmp_path_factory):
    if not (DEMO / "stars.toml").is_file():
        pytest.skip("demo_data not generated")
    out = tmp_path_factory.mktemp("stars")
    with warnings.catch_warnings():
        warnings.simplefilter("error", SkyModelWarning)  # the demo needs no extrapolation
        return run_survey(DEMO / "stars.toml", out_dir=out, seed=12)


def test_demo_star_total_holds_its_truth(stars_run):
    truth = json.loads((DEMO / "truth.json").read_text())["star_fields"]
    sky = stars_run.results["sky_model"]
    limit = sky["mag_limit"]
    assert limit == truth["sky_mag_limit"]
    expected = truth["n_expected_target"][truth["mag_limits"].index(limit)]
    total = sky["total"]
    lo, hi = total["interval_95"]
    # Issue 12: the 95 % interval holds the truth; the median is within 15 % of it.
    assert lo <= expected <= hi, (total, expected)
    assert abs(total["median"] / expected - 1) < 0.15
    assert sky["target_sky"]["area_deg2"] == pytest.approx(truth["target_sky"]["area_deg2"],
                                                           rel=1e-9)
    # Plain area scaling misses by far more than its interval.
    naive = sky["naive"]
    assert not naive["interval_95"][0] <= expected <= naive["interval_95"][1]
    assert abs(naive["median"] / expected - 1) > 0.2
    assert sky["fraction_outside_observed_range"] == {"area": 0.0, "total": 0.0}
    assert sky["warnings"] == []
    assert sum(total["budget"].values()) == pytest.approx(1.0, abs=0.01)
    assert sky["units"]["n_fields"] == truth["n_fields"]
    assert stars_run.results["ledger"]["rows_read"] == truth["rows"]


def test_demo_star_run_dereddens_and_reports(stars_run):
    results = stars_run.results
    assert "sky_model" in results["run"]["stages"]
    assert not {"sky_model", "extinction"} & set(results["run"]["sections_not_run"])
    ext = results["tally"]["extinction"]
    assert ext["band"] == "sdss_r" and ext["coefficient"] == pytest.approx(2.285)
    shift = results["completeness"]["extinction"]
    # The dereddened limits sit below the observed m50 by the extinction.
    assert shift["m50_dereddened_max"] < results["completeness"]["depth_map"]["m50_max"]
    out = stars_run.out_dir
    text = (out / "report.md").read_text()
    for needle in ("## Sky model", "plain area scaling", "Magnitudes are dereddened per source",
                   "![sky model](sky_model.png)", "complete to a limit moved brighter"):
        assert needle in text, needle
    assert (out / "sky_model.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    objects = stars_run.stage_results["sky_model"]
    # The live objects the totals stage reads.
    for name in ("model", "prediction", "draws", "naive", "target", "units", "mag_limit"):
        assert objects[name] is not None
    assert objects["draws"].size == stars_run.runfile.sky_model.draws


# --------------------------------------------------------------------------------------------
# A small star survey of our own
# --------------------------------------------------------------------------------------------

FIELDS_LB = ((0.0, 30.0), (180.0, -30.0), (90.0, 40.0), (270.0, -45.0), (45.0, 60.0),
             (200.0, -65.0), (300.0, 75.0), (120.0, -80.0), (0.0, 89.5), (0.0, -89.5))


def star_survey(tmp_path, target, extra=""):
    """Stars of a latitude-only disk in ten fields at |b| >= 30; a run file for them."""
    l_deg, b_deg = np.array(FIELDS_LB).T
    icrs = SkyCoord(l=l_deg * u.deg, b=b_deg * u.deg, frame="galactic").icrs
    caps = [(round(float(ra), 4), round(float(dec), 4), 0.4)
            for ra, dec in zip(icrs.ra.deg, icrs.dec.deg, strict=True)]
    from countscale.footprint import Footprint

    footprint = None
    for ra, dec, r in caps:
        cap = Footprint.cap(ra, dec, r, max_order=12)
        footprint = cap if footprint is None else footprint | cap
    spec = MockSpec(stars=DiskStars(), measurement=Measurement(m50=21.0, width=0.15),
                    mag_limits=(19.0,))
    cat = make_mock(spec, rng=5, footprint=footprint).catalogue
    cat[["ra", "dec", "mag"]].to_parquet(tmp_path / "stars.parquet")
    items = ", ".join(f"{{cap = {{ra = {ra}, dec = {dec}, radius = {r}}}}}" for ra, dec, r in caps)
    text = textwrap.dedent(f"""\
        [survey]
        name = "Test star fields (fictional)"

        [catalog]
        paths = ["stars.parquet"]
        ra = "ra"
        dec = "dec"
        mag = "mag"
        population = "stars"

        [footprint]
        max_order = 12
        include = [{items}]

        [totals]
        whole_sky_mag_limit = 19.0
        target_sky = [{target}]

        [sky_model]
        covariate_sets = [["log_sin_b"], ["log_sin_b", "sin_abs_b"]]
        nside = 32
        draws = 500

        [output]
        formats = ["json", "markdown"]
        """) + extra
    path = tmp_path / "stars.toml"
    path.write_text(text)
    return path


def test_a_target_beyond_the_observed_latitudes_is_flagged_beside_the_number(tmp_path):
    path = star_survey(tmp_path, "{galactic_latitude_above = 10}")
    result = run_survey(path, out_dir=tmp_path / "out", seed=1)
    # The run keeps the stage's warning, one line, in its results (and report).
    assert any(line.startswith("sky_model: ") and "outside the covariate range" in line
               for line in result.results["run"]["warnings"])
    sky = result.results["sky_model"]
    # Fields reach down to |b| = 29.6 deg: the band 10 < |b| < 29.6 is (sin 29.6 - sin 10) /
    # (1 - sin 10) of the target (closed form for latitude bands).
    band = (np.sin(np.radians(29.6)) - np.sin(np.radians(10))) / (1 - np.sin(np.radians(10)))
    assert sky["fraction_outside_observed_range"]["area"] == pytest.approx(band, abs=0.01)
    assert sky["warnings"] and "extrapolation" in sky["warnings"][0]
    assert sky["total"]["budget"]["sky_model_extrapolation"] > 0
    text = (tmp_path / "out" / "report.md").read_text()
    assert "**Warning:**" in text
    assert "lies outside the covariate range the survey observed: an extrapolation" in text


def test_a_target_inside_the_observed_latitudes_is_not_flagged(tmp_path):
    path = star_survey(tmp_path, "{galactic_latitude_above = 35}")
    with warnings.catch_warnings():
        warnings.simplefilter("error", SkyModelWarning)
        result = run_survey(path, out_dir=tmp_path / "out", seed=1)
    sky = result.results["sky_model"]
    assert sky["fraction_outside_observed_range"]["area"] == 0.0
    assert sky["warnings"] == []


def test_extinction_map_with_nan_inside_the_footprint_is_exit_2(tmp_path, capsys):
    ebv = np.full(hp.nside2npix(16), 0.02)
    icrs = SkyCoord(l=90.0 * u.deg, b=40.0 * u.deg, frame="galactic").icrs
    ebv[hp.ang2pix(16, icrs.ra.deg, icrs.dec.deg, lonlat=True)] = np.nan
    hp.write_map(tmp_path / "ebv.fits", ebv, overwrite=True)
    path = star_survey(tmp_path, "{galactic_latitude_above = 35}",
                       extra='\n[extinction]\nmap = "ebv.fits"\nband = "sdss_r"\n')
    assert main(["run", str(path), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1
    assert "[extinction] 'map': E(B-V) is missing (NaN) in 1 pixel(s) inside the footprint" \
        in err[0]


# --------------------------------------------------------------------------------------------
# Stars among galaxies
# --------------------------------------------------------------------------------------------


def mixed_survey(tmp_path, extra_catalog="", extra=""):
    from countscale.cosmology import hubble_h, m_star_from_h_units, phi_star_from_h_units
    from countscale.footprint import Footprint
    from countscale.mock import SchechterGalaxies

    h = hubble_h("Planck18")
    galaxies = SchechterGalaxies(m_star=m_star_from_h_units(-20.44, h), alpha=-1.05,
                                 phi_star=phi_star_from_h_units(1.49e-2, h))
    footprint = Footprint.box((200.0, 201.0), (20.0, 21.0), max_order=12)
    spec = MockSpec(galaxies=galaxies, stars=DiskStars(), measurement=Measurement(m50=22.0),
                    mag_limits=(21.0,))
    cat = make_mock(spec, rng=8, footprint=footprint).catalogue
    frame = pd.DataFrame({"ra": cat.ra, "dec": cat.dec, "mag": cat.mag,
                          "flag": (cat.population == "star").astype(float)})
    frame.to_parquet(tmp_path / "mixed.parquet")
    frame[frame.flag == 1].to_parquet(tmp_path / "stars.parquet")
    path = tmp_path / "mixed.toml"
    path.write_text(textwrap.dedent("""\
        [catalog]
        paths = ["mixed.parquet"]
        ra = "ra"
        dec = "dec"
        mag = "mag"
        """) + extra_catalog + textwrap.dedent("""
        [footprint]
        max_order = 12
        include = [{box = {ra = [200, 201], dec = [20, 21]}}]

        [output]
        formats = ["json", "markdown", "png"]
        """) + extra)
    return path, frame


def test_classifier_stage_reports_the_star_fraction_per_bin(tmp_path):
    path, frame = mixed_survey(tmp_path, extra_catalog='classifier = "flag"\n')
    result = run_survey(path, out_dir=tmp_path / "out", seed=2)
    cont = result.results["contamination"]
    edges = np.asarray(cont["mag_edges"])  # the tally's default grid, trimmed
    stars = np.histogram(frame.mag[frame.flag == 1], edges)[0]
    galaxies = np.histogram(frame.mag[frame.flag == 0], edges)[0]
    assert cont["method"] == "classifier"
    np.testing.assert_array_equal(cont["n_stars"], stars)
    np.testing.assert_array_equal(cont["n_galaxies"], galaxies)
    # The counts the fit used are the galaxies alone.
    np.testing.assert_array_equal(result.results["tally"]["counts"], galaxies)
    assert result.results["ledger"]["rows_rejected"]["star_by_classifier"] == int(
        (frame.flag == 1).sum())  # every star, in the bins or beyond them
    text = (tmp_path / "out" / "report.md").read_text()
    assert "## Stars among the sources" in text
    assert (tmp_path / "out" / "contamination.png").read_bytes()[:4] == b"\x89PNG"


def test_star_catalogue_stage_subtracts_bin_by_bin(tmp_path):
    path, frame = mixed_survey(tmp_path, extra='\n[contamination]\nstar_catalog = '
                                               '["stars.parquet"]\n')
    result = run_survey(path, out_dir=tmp_path / "out", seed=2)
    cont = result.results["contamination"]
    assert cont["method"] == "star_catalog"
    edges = np.asarray(cont["mag_edges"])
    galaxies = np.histogram(frame.mag[frame.flag == 0], edges)[0]
    # Here the star catalogue lists the very stars of the mixed one: exact subtraction.
    np.testing.assert_array_equal(cont["n_galaxies"], galaxies)
    assert cont["star_catalog_ledger"]["rows_read"] == int((frame.flag == 1).sum())
    assert "contamination" not in result.results["run"]["sections_not_run"]


def test_a_missing_star_catalogue_names_the_key(tmp_path):
    path, _ = mixed_survey(tmp_path, extra='\n[contamination]\nstar_catalog = '
                                           '["nowhere.parquet"]\n')
    with pytest.raises(InputError, match=r"\[contamination\] 'star_catalog': `paths`: file "
                                         r"'.*nowhere.parquet' does not exist"):
        run_survey(path, out_dir=tmp_path / "out", seed=2)


FULL_SKY_DEG2 = 41252.96124941928  # 4 pi sr in deg^2 (definition)
MIXED_CAP = (40.0, -30.0, 1.2)  # ra, dec, radius [deg]; galactic latitude about -63


@pytest.fixture(scope="module")
def mixed_with_completeness(tmp_path_factory):
    """Galaxies + disk stars (flatter counts) over a cap, with injections; the star catalogue
    lists the very stars of the mixed one. Returns (folder, write_runfile, spec)."""
    from countscale.footprint import Footprint
    from countscale.mock import Injections, SchechterGalaxies

    folder = tmp_path_factory.mktemp("mixed_completeness")
    footprint = Footprint.cap(*MIXED_CAP, max_order=12)
    galaxies = SchechterGalaxies(m_star=-21.3, alpha=-1.05, phi_star=4.6e-3)
    spec = MockSpec(galaxies=galaxies, stars=DiskStars(),
                    measurement=Measurement(m50=21.0, width=0.15),
                    injections=Injections(n=2000), mag_limits=(20.5,))
    mock = make_mock(spec, rng=3, footprint=footprint)
    cat = mock.catalogue
    star = (cat.population == "star").to_numpy()
    cat[["ra", "dec", "mag", "mag_err"]].to_parquet(folder / "cat.parquet")
    cat.loc[star, ["ra", "dec", "mag"]].to_parquet(folder / "stars.parquet")
    # A star catalogue with one star, inside the footprint but fainter than every bin.
    pd.DataFrame({"ra": [MIXED_CAP[0]], "dec": [MIXED_CAP[1]], "mag": [23.5]}).to_parquet(
        folder / "no_stars_in_bins.parquet")
    # Twice the catalogue's own rows: more "stars" than sources in every bin.
    pd.concat([cat[["ra", "dec", "mag"]]] * 2).to_parquet(folder / "too_many.parquet")
    mock.injections[["mag", "recovered", "ra", "dec"]].astype({"recovered": int}).to_csv(
        folder / "inj.csv", index=False)

    def write_runfile(name, star_catalog=None):
        ra, dec, radius = MIXED_CAP
        text = textwrap.dedent(f"""\
            [survey]
            name = "Fictional mixed field"

            [catalog]
            paths = ["cat.parquet"]
            ra = "ra"
            dec = "dec"
            mag = "mag"
            mag_error = "mag_err"

            [footprint]
            max_order = 12
            include = [{{cap = {{ra = {ra}, dec = {dec}, radius = {radius}}}}}]

            [completeness]
            injections = "inj.csv"

            [counts]
            bins = {{start = 15.0, stop = 22.4, width = 0.2}}
            fit_range = [16.0, 20.8]
            n_bootstrap = 0

            [variance]
            methods = ["jackknife"]
            regions = 8

            [output]
            formats = ["json", "markdown"]

            [totals]
            draws = 2000
            whole_sky_mag_limit = 20.5
            """)
        if star_catalog is not None:
            text += f'\n[contamination]\nstar_catalog = ["{star_catalog}"]\n'
        path = folder / f"{name}.toml"
        path.write_text(text)
        return path

    return folder, write_runfile, spec


def _galaxy_sky_truth(spec, limit):
    """Galaxies brighter than ``limit`` over the whole sky, from the mock's model alone."""
    galaxies_only = MockSpec(galaxies=spec.galaxies, measurement=spec.measurement,
                             mag_limits=(limit,))
    from countscale.mock import expected_counts

    return expected_counts(galaxies_only)["sky"]["galaxies"][0]


def test_stars_subtracted_before_the_count_fit_give_galaxy_totals(mixed_with_completeness):
    # Outside reference: the galaxy-only whole-sky count of the mock's model
    # (countscale.mock.expected_counts: the Schechter 1976 function over astropy's Planck18
    # volumes). Measured here: sky_total 7.3e7 (95 %: 7.1-7.5e7) against the truth 7.46e7;
    # without the subtraction 9.4e7 (+27 %), plain area scaling 9.6e7.
    folder, write_runfile, spec = mixed_with_completeness
    truth = _galaxy_sky_truth(spec, 20.5)
    result = run_survey(write_runfile("stars", "stars.parquet"), out_dir=folder / "out_stars",
                        seed=4)
    plain = run_survey(write_runfile("plain"), out_dir=folder / "out_plain", seed=4)
    stages = result.results["run"]["stages"]
    assert stages.index("contamination") < stages.index("counts")
    sky = result.results["totals"]["sky_total"]
    assert sky["unit"] == "galaxies"
    assert sky["interval_95"][0] <= truth <= sky["interval_95"][1], (sky, truth)
    biased = plain.results["totals"]["sky_total"]
    assert biased["interval_95"][0] > truth  # the stars, counted as galaxies
    # The budget names the stars, and the shares sum to 1.
    assert sky["budget"]["stars"] > 0.01
    assert sum(sky["budget"].values()) == pytest.approx(1.0, abs=0.01)
    # Plain area scaling keeps the stars, and says so.
    definitions = result.results["totals"]["definitions"]
    assert "stars included" in definitions["sky_total_naive"]
    assert "stars of the star catalogue" in definitions["sky_total"]
    # The counts section: how many stars, and N(<m) of galaxies (population: the model's
    # galaxies per deg^2 brighter than 20.8, the faint end of the fit range).
    counts = result.results["counts"]
    stars = pd.read_parquet(folder / "stars.parquet")
    assert counts["stars"]["n_stars_binned"] == int(((stars.mag >= 15.0)
                                                     & (stars.mag < 22.4)).sum())
    assert counts["stars"]["n_stars_brighter"] == int((stars.mag < 16.0).sum())
    per_deg2 = counts["integral_counts"]["per_deg2"]
    truth_deg2 = _galaxy_sky_truth(spec, 20.8) / FULL_SKY_DEG2
    assert per_deg2["interval_95"][0] <= truth_deg2 <= per_deg2["interval_95"][1]
    assert plain.results["counts"]["integral_counts"]["per_deg2"]["interval_95"][0] > truth_deg2
    assert counts["differential"]["n_stars"] is not None
    report = (folder / "out_stars" / "report.md").read_text()
    assert "**Stars subtracted:**" in report
    assert "It also holds the stars of the star catalogue" in report


def test_a_star_catalogue_with_no_star_in_the_bins_changes_nothing(mixed_with_completeness):
    # Self-consistency: the same fit as no subtraction, and a zero 'stars' share.
    folder, write_runfile, _ = mixed_with_completeness
    none = run_survey(write_runfile("plain0"), out_dir=folder / "out_plain0", seed=5)
    zero = run_survey(write_runfile("zero", "no_stars_in_bins.parquet"),
                      out_dir=folder / "out_zero", seed=5)
    fit_none, fit_zero = none.results["counts"]["fit"], zero.results["counts"]["fit"]
    for name in ("log10_norm", "slope"):
        assert fit_zero[name]["median"] == fit_none[name]["median"]
        assert fit_zero[name]["interval_95"] == fit_none[name]["interval_95"]
    sky_none = none.results["totals"]["sky_total"]
    sky_zero = zero.results["totals"]["sky_total"]
    assert sky_zero["median"] == sky_none["median"]
    assert sky_zero["budget"]["stars"] == 0.0
    assert zero.results["counts"]["stars"]["n_stars_binned"] == 0


def test_a_sky_model_total_says_it_keeps_the_stars(mixed_with_completeness):
    # The sky model fits the counts per field as they are: the caution says so beside the
    # number (the subtraction is done in the count fit only).
    folder, write_runfile, _ = mixed_with_completeness
    path = write_runfile("sky_model", "stars.parquet")
    path.write_text(path.read_text() + "\n[sky_model]\n")
    result = run_survey(path, out_dir=folder / "out_sky_model", seed=6)
    cautions = result.results["totals"]["cautions"]["sky_total"]
    assert any("stars of the [contamination] star catalogue are not subtracted" in c
               for c in cautions), cautions


def test_more_stars_than_sources_is_one_line_naming_the_star_catalogue(mixed_with_completeness,
                                                                      capsys):
    folder, write_runfile, _ = mixed_with_completeness
    path = write_runfile("too_many", "too_many.parquet")
    assert main(["run", str(path), "--out", str(folder / "out_too_many"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1
    assert re.search(r"too_many\.toml: \[contamination\] 'star_catalog': `star_counts` must "
                     r"leave more galaxies than the 2 parameters in the fit range \[16, 20\.8\] "
                     r"mag .*; got \d+ stars against \d+ sources", err[0]), err[0]


def test_demo_star_totals_carry_the_sky_model_and_hold_the_truth(stars_run):
    truth = json.loads((DEMO / "truth.json").read_text())["star_fields"]
    totals = stars_run.results["totals"]
    expected = truth["n_expected_target"][truth["mag_limits"].index(truth["sky_mag_limit"])]
    lo, hi = totals["sky_total"]["interval_95"]
    assert lo <= expected <= hi
    # With population = "stars", stars_total is sky_total (stars on the sky), said so.
    assert totals["stars_total"] == totals["sky_total"]
    assert totals["details"]["stars"]["quantity_counted"].startswith("stars on the sky")
    budget = totals["sky_total"]["budget"]
    assert {"sky_model_fit", "completeness"} <= set(budget)
    assert sum(budget.values()) == pytest.approx(1.0, abs=0.01)
    # Plain area scaling misses the Galaxy's structure: the fields are not typical.
    explained = totals["details"]["sky"]["naive_explained"]
    assert explained["structure_factor"] < 0.8
    assert set(totals["not_computed"]) == {"present_day_volume_total", "light_cone_total"}


def test_demo_star_summary_lists_each_total_once_in_the_words_of_stars(stars_run):
    # sky_total, stars_total (stars on the sky) and the sky model's total are one number for
    # a star run: the summary lists it once, and calls the fields' scatter what it is for
    # stars (the Galaxy's structure), not cosmic variance.
    from countscale.report import render_text, summarise

    summary = summarise(stars_run.results)
    keys = [h["key"] for h in summary["headlines"]]
    assert keys == ["counts.integral_counts.per_deg2", "totals.sky_total"]
    assert summary["headlines"][0]["dominant_error"]["label"] == "field-to-field scatter"
    assert summary["headlines"][0]["label"].endswith("(the mean over the observed fields)")
    text = render_text(stars_run.results)
    assert "field-to-field scatter" in text and "Stars in the volume" not in text
