"""The run's [totals] stage on small truth-known surveys: flags, bad input, reproducibility.

Outside references: the expected counts of the mock's model (countscale.mock.expected_counts
integrates the Schechter 1976 function over astropy's Planck18 volumes), and closed-form sky
areas (a cap of radius r covers 2 pi (1 - cos r) sr). The demo's totals are tested in
test_stages.py (galaxies) and test_stages_sky.py (stars).
"""

from __future__ import annotations

import json
import math
import textwrap

import healpy as hp
import numpy as np
import pytest

from countscale.cli import main
from countscale.errors import InputError
from countscale.footprint import Footprint
from countscale.mock import (
    Injections,
    Measurement,
    MockSpec,
    SchechterGalaxies,
    expected_counts,
    make_mock,
)
from countscale.pipeline import run_survey

FULL_SKY_DEG2 = 41252.96124941928  # 4 pi sr in deg^2 (definition)

CAP = (40.0, -30.0, 1.2)  # ra, dec, radius [deg]: an ordinary patch of sky
COUNTS = """
[counts]
bins = {start = 15.0, stop = 22.4, width = 0.2}
fit_range = [16.0, 20.8]
"""


def galaxy_survey(tmp_path, totals, extra="", counts=True):
    """Galaxies over a 1.2-degree cap (m50 = 21), injections, and a run file with [totals].

    ``counts=False`` leaves out [counts] (for input errors the totals stage finds before it
    needs the fits; the counts stage's bootstrap takes most of a run's time).
    """
    footprint = Footprint.cap(*CAP, max_order=12)
    spec = MockSpec(galaxies=SchechterGalaxies(m_star=-21.3, alpha=-1.05, phi_star=4.6e-3),
                    measurement=Measurement(m50=21.0, width=0.15), injections=Injections(n=2000),
                    mag_limits=(20.5, 21.3))
    mock = make_mock(spec, rng=3, footprint=footprint)
    mock.catalogue[["ra", "dec", "mag", "mag_err"]].to_parquet(tmp_path / "cat.parquet")
    inj = mock.injections[["mag", "recovered", "ra", "dec"]].astype({"recovered": int})
    inj.to_csv(tmp_path / "inj.csv", index=False)
    text = textwrap.dedent(f"""\
        [survey]
        name = "Fictional totals field"

        [catalog]
        paths = ["cat.parquet"]
        ra = "ra"
        dec = "dec"
        mag = "mag"
        mag_error = "mag_err"

        [footprint]
        max_order = 12
        include = [{{cap = {{ra = {CAP[0]}, dec = {CAP[1]}, radius = {CAP[2]}}}}}]

        [completeness]
        injections = "inj.csv"
        {COUNTS if counts else ""}
        [variance]
        methods = ["jackknife"]
        regions = 8

        [output]
        formats = ["json", "markdown"]

        [totals]
        draws = 2000
        """) + totals + extra
    path = tmp_path / "survey.toml"
    path.write_text(text)
    return path, spec, footprint


TARGET_RADIUS = 30.0  # a cap of the sky the totals are for


@pytest.fixture(scope="module")
def within_the_data(tmp_path_factory):
    """Two runs with the same seed: galaxies brighter than 20.5 over a 30-degree cap."""
    tmp = tmp_path_factory.mktemp("within")
    path, spec, footprint = galaxy_survey(
        tmp, f"whole_sky_mag_limit = 20.5\ntarget_sky = [{{cap = {{ra = 10, dec = 10, "
        f"radius = {TARGET_RADIUS}}}}}]\n")
    runs = [run_survey(path, out_dir=tmp / name, seed=4) for name in ("a", "b")]
    return runs, spec, footprint, tmp


def test_total_within_the_data_holds_the_truth_and_is_reproducible(within_the_data):
    (first, second), spec, _, tmp = within_the_data
    totals = first.results["totals"]
    assert totals == second.results["totals"]  # same seed, same numbers
    cap_deg2 = 2 * np.pi * (1 - np.cos(np.radians(TARGET_RADIUS))) * (180 / np.pi) ** 2
    sky = totals["details"]["sky"]
    assert sky["target_area_deg2"] == pytest.approx(cap_deg2, rel=1e-3)
    # The truth: the model's whole-sky expectation per deg^2 times the cap's area.
    per_deg2 = expected_counts(spec, mag_limits=[20.5])["sky"]["galaxies"][0] / FULL_SKY_DEG2
    truth = per_deg2 * sky["target_area_deg2"]
    lo, hi = totals["sky_total"]["interval_95"]
    assert lo <= truth <= hi
    for key in ("sky_total", "sky_total_naive"):
        assert sum(totals[key]["budget"].values()) == pytest.approx(1.0, abs=0.01)
    # No [variance] analytic term: the jackknife stands in, and says it is too narrow.
    assert "jackknife over" in sky["cosmic_variance"]["note"]
    assert not any("depth extrapolation" in w for w in totals["warnings"])
    assert set(totals["not_computed"]) == {"present_day_volume_total", "light_cone_total",
                                           "stars_total"}
    report = (tmp / "a" / "report.md").read_text()
    assert "## Totals" in report and "| `sky_total` (over the sky) |" in report
    assert (tmp / "a" / "results.json").is_file()


def test_results_are_plain_json_estimates(within_the_data):
    # Every total is an Estimate JSON with exactly the contract's keys, readable by claims.
    from countscale.claims import check_claim

    (first, _), _, _, tmp = within_the_data
    totals = json.loads((tmp / "a" / "results.json").read_text())["totals"]
    assert set(totals["sky_total"]) == {"median", "interval_68", "interval_95", "unit", "budget"}
    claim = check_claim("3 million galaxies brighter than magnitude 20.5",
                        results=tmp / "a" / "results.json")
    assert claim.primary.name == "sky_total"
    assert first.stage_results["totals"]["estimates"]["sky_total"].n_draws == 2000


def test_a_limit_fainter_than_the_data_is_flagged_beside_the_number(tmp_path):
    path, spec, _ = galaxy_survey(tmp_path, "whole_sky_mag_limit = 21.3\n")
    totals = run_survey(path, out_dir=tmp_path / "out", seed=5).results["totals"]
    flags = [w for w in totals["warnings"] if w.startswith("depth extrapolation")]
    assert len(flags) == 1 and "% complete (50 % at m = 21.0" in flags[0]
    assert flags[0] in totals["cautions"]["sky_total"]
    assert totals["sky_total"]["budget"]["completeness"] > 0
    truth = expected_counts(spec, mag_limits=[21.3])["sky"]["galaxies"][0]
    lo, hi = totals["sky_total"]["interval_95"]
    assert lo <= truth <= hi
    report = (tmp_path / "out" / "report.md").read_text()
    row = next(line for line in report.splitlines() if line.startswith("| `sky_total` "))
    assert "**Caution: depth extrapolation" in row


def test_a_limit_brighter_than_every_source_is_exit_2(tmp_path, capsys):
    path, _, _ = galaxy_survey(tmp_path, "whole_sky_mag_limit = 5.0\n", counts=False)
    assert main(["run", str(path), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert "[totals] 'whole_sky_mag_limit': no source is brighter than 5 (the brightest is m =" \
        in err


def test_an_empty_target_sky_is_an_error_naming_the_key(tmp_path):
    hp.write_map(tmp_path / "none.fits", np.zeros(hp.nside2npix(8)), dtype=np.float32)
    path, _, _ = galaxy_survey(tmp_path, 'whole_sky_mag_limit = 20.5\n'
                               'target_sky = [{map = "none.fits", threshold = 0.5}]\n',
                               counts=False)
    with pytest.raises(InputError, match=r"\[totals\] 'target_sky': `target_sky` is empty "
                                         r"\(area 0\)$"):
        run_survey(path, out_dir=tmp_path / "out", seed=1)


def test_a_volume_whose_redshifts_do_not_increase_is_exit_2(tmp_path, capsys):
    path, _, _ = galaxy_survey(tmp_path, "volume = {redshift = [1.0, 0.5]}\n")
    assert main(["run", str(path), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert "[totals] 'volume.redshift' must be two increasing redshifts" in err


def test_a_mass_function_gives_volume_and_star_totals_without_a_mass_to_light(tmp_path):
    # A Schechter stellar-mass function (a mock, no clustering) fitted at 0.02 < z < 0.2:
    # galaxies above 10^9.5 Msun in the shell z < 0.2 today, and the stars in it. The truth
    # is computed here: n(>M) = phi* Gamma(alpha + 1, M / M*) (mpmath) times astropy's
    # Planck18 comoving volume; rho* = phi* M* Gamma(alpha + 2).
    import mpmath
    from astropy.cosmology import Planck18

    from countscale.extrapolation import stars_from_stellar_mass
    from countscale.lumfunc import SchechterMass
    from countscale.mock import MassFunctionGalaxies

    form = SchechterMass(log10_mass_star=10.8, alpha=-1.2, phi_star=3e-3)
    footprint = Footprint.cap(150.0, 20.0, 4.0, max_order=10)
    spec = MockSpec(galaxies=MassFunctionGalaxies(mass_function=form, log10_mass_min=6.0,
                                                  z_max=0.3),
                    measurement=Measurement(m50=30.0, width=0.1), mag_limits=(18.5,),
                    generation_mag_limit=18.5)
    cat = make_mock(spec, rng=12, footprint=footprint).catalogue
    frame = cat[["ra", "dec", "mag_true", "z", "log10_mass"]].rename(
        columns={"mag_true": "mag"})
    frame.to_parquet(tmp_path / "cat.parquet")
    (tmp_path / "run.toml").write_text(textwrap.dedent("""\
        [survey]
        name = "Mass totals (a mock)"

        [catalog]
        paths = ["cat.parquet"]
        ra = "ra"
        dec = "dec"
        mag = "mag"
        redshift = "z"
        stellar_mass = "log10_mass"

        [footprint]
        max_order = 10
        include = [{cap = {ra = 150.0, dec = 20.0, radius = 4.0}}]

        [luminosity_function]
        quantity = "stellar_mass"
        redshift_range = [0.02, 0.2]
        mag_limits = [10.0, 18.5]

        [totals]
        volume = {redshift = [0.0, 0.2]}
        faint_limit = 9.5
        stars = true
        imf = "kroupa"
        draws = 2000

        [output]
        formats = ["json"]
        """))
    totals = run_survey(tmp_path / "run.toml", out_dir=tmp_path / "out",
                        seed=3).results["totals"]
    # The mock's mass function is in the units of its cosmology, Planck18, the run's too.
    n_above = 3e-3 * float(mpmath.gammainc(-0.2, 10 ** (9.5 - 10.8)))
    volume = Planck18.comoving_volume(0.2).value
    lo, hi = totals["present_day_volume_total"]["interval_95"]
    assert lo <= n_above * volume <= hi
    rho = 3e-3 * 10**10.8 * math.gamma(0.8)
    stars = rho * volume * float(stars_from_stellar_mass(1.0, "kroupa", mass_imf="chabrier"))
    lo, hi = totals["stars_total"]["interval_95"]
    assert lo <= stars <= hi
    assert "mass_to_light" not in totals["stars_total"]["budget"]
    assert totals["stars_total"]["budget"]["imf"] == 0.0  # one IMF: a fixed value
    # The shell reaches beyond the fit's redshifts (0.02-0.2 against 0-0.2): said beside it.
    assert totals["cautions"]["present_day_volume_total"]
    assert totals["not_computed"] == {"sky_total": "no [totals] whole_sky_mag_limit",
                                      "sky_total_naive": "no [totals] whole_sky_mag_limit"}
