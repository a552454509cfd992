"""The luminosity_function stage of a run: the demo recovers its truth, the results keys, the
figure, the objects later stages read, a stellar-mass run, and bad input through the run file.

The truth is demo_data/truth.json (written by the mock generator, never read by the pipeline)
and countscale.mock for the small runs built here.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from countscale import cli
from countscale.footprint import Footprint
from countscale.lumfunc import Schechter, SchechterMass
from countscale.mock import MassFunctionGalaxies, Measurement, MockSpec, make_mock

DEMO = Path(__file__).resolve().parents[1] / "demo_data"
ESTIMATE_KEYS = {"median", "interval_68", "interval_95", "unit", "budget"}


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    if not (DEMO / "survey.toml").is_file():
        pytest.skip("demo_data not generated")
    from countscale.pipeline import run_survey

    return run_survey(DEMO / "survey.toml", out_dir=tmp_path_factory.mktemp("demo_lf"), seed=3)


def _half_width(estimate):
    return 0.5 * (estimate["interval_68"][1] - estimate["interval_68"][0])


def test_demo_recovers_its_luminosity_function(demo_run):
    truth = json.loads((DEMO / "truth.json").read_text())["mock"]["galaxies"]
    lf = demo_run.results["luminosity_function"]
    sty = lf["sty"]
    for name in ("m_star", "alpha", "phi_star"):
        assert abs(sty[name]["median"] - truth[name]) < 3 * _half_width(sty[name]), name
    # The run file's evolution and K-correction are the mock's (Q = 0.5, beta = -1.2).
    assert sty["evolution"] == {"Q": truth["Q"], "P": truth["P"], "fitted": []}
    assert lf["kcorrection"] == {"beta": truth["kcorrection_beta"]}
    # Binned estimates against the true function averaged over each bin (complete bins with
    # at least 5 galaxies): chi^2 per bin about 1.
    form = Schechter(truth["m_star"], truth["alpha"], truth["phi_star"])
    for key in ("vmax", "swml"):
        block = lf[key]
        lower, upper = np.array(block["bin_lower"]), np.array(block["bin_upper"])
        phi, err = np.array(block["phi"]), np.array(block["phi_err"])
        good = np.array(block["complete"]) & (np.array(block["n"]) >= 5)
        true = np.array([form.integrate(a, b) / (b - a) for a, b in zip(lower, upper,
                                                                        strict=True)])
        chi2 = float((((phi - true) / err)[good] ** 2).sum())
        assert chi2 / good.sum() < 2.0, (key, chi2, good.sum())


def test_demo_evolution_recovered_when_fitted(demo_run):
    # The run file fixes Q = 0.5 (the mock's); fitted on the demo's galaxies (0.01 < z < 0.3)
    # Q comes back within 3 sigma, and P (fitted from the redshift distribution, which feels
    # the demo's projected clustering only as a common factor) near the mock's 0.
    from countscale.lumfunc import STYFit

    truth = json.loads((DEMO / "truth.json").read_text())["mock"]["galaxies"]
    sample = demo_run.stage_results["luminosity_function"]["sample"]
    fit = STYFit(fit_evolution=("Q", "P")).fit(sample)
    for name in ("Q", "P", "m_star", "alpha"):
        sigma = math.sqrt(fit.cov_[fit.cov_names_.index(name), fit.cov_names_.index(name)])
        assert abs(fit.params_[name] - truth[name]) < 3 * sigma, name


def test_results_keys_report_and_figure(demo_run):
    results = demo_run.results
    assert "luminosity_function" in results["run"]["stages"]
    assert "luminosity_function" not in results["run"]["sections_not_run"]
    assert "cosmology" not in results["run"]["sections_not_run"]  # the stage read it
    lf = results["luminosity_function"]
    assert lf["quantity"] == "luminosity" and lf["x_name"] == "mag"
    for name in ("m_star", "alpha", "phi_star", "luminosity_density_mag",
                 "number_density_mpc3"):
        assert set(lf["sty"][name]) == ESTIMATE_KEYS, name
        assert sum(lf["sty"][name]["budget"].values()) == pytest.approx(1.0, abs=0.01)
    cov = lf["sty"]["covariance"]
    assert cov["names"] == ["m_star", "alpha", "phi_star"]
    matrix = np.array(cov["matrix"])
    assert matrix.shape == (3, 3) and np.all(np.linalg.eigvalsh(matrix) > 0)
    for key in ("vmax", "swml"):
        block = lf[key]
        assert {"mag", "phi", "phi_err", "n"} <= set(block)
        assert len({len(block[k]) for k in ("mag", "phi", "phi_err", "n")}) == 1
    sample = lf["sample"]
    assert sample["n_input"] == (sample["n_outside_mag_limits"] + sample["n_no_redshift"]
                                 + sample["n_outside_redshift_range"]
                                 + sample["n_no_stellar_mass"]
                                 + sample["n_outside_mass_limits"] + sample["n_used"])
    assert sample["n_input"] == results["ledger"]["rows_in_footprint"]
    out = demo_run.out_dir
    assert results["figures"]["luminosity_function"] == "luminosity_function.png"
    assert (out / "luminosity_function.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    report = (out / "report.md").read_text()
    assert "## Luminosity function" in report
    assert "![luminosity function](luminosity_function.png)" in report
    saved = json.loads((out / "results.json").read_text())
    assert saved["luminosity_function"]["sty"]["m_star"] == lf["sty"]["m_star"]


def test_objects_for_the_stages_after_it(demo_run):
    objects = demo_run.stage_results["luminosity_function"]
    fit = objects["fit"]
    assert objects["model"] is fit.form_
    assert fit.cov_.shape == (3, 3) and fit.cov_names_[-1] == "phi_star"
    draws = objects["draw_params"](5, rng=1)
    assert set(draws) == {"m_star", "alpha", "phi_star", "Q", "P"}
    assert all(v.shape == (5,) for v in draws.values())
    assert objects["draws"]["m_star"].shape == (1000,)
    assert objects["fit_redshift_range"] == (0.01, 0.3)
    # The counts' depth, far beyond the redshift sample (r <= 19.8): the fitted n(z) of
    # galaxies with r <= 22 over the footprint, integrated over 0.001 < z < 3, against the
    # number the mock drew there (truth.json; the same projected field at every redshift, so
    # the field's excess over the ensemble is in both). An extrapolation in depth: within
    # 10 %.
    truth = json.loads((DEMO / "truth.json").read_text())["mock"]
    drawn = truth["n_true_footprint"]["galaxies"][truth["mag_limits"].index(22.0)]
    z = np.geomspace(1e-3, 3.0, 3000)
    area = demo_run.results["footprint"]["area_sr"]
    predicted = float(np.trapezoid(objects["nz"](z, 22.0, area_sr=area), z))
    assert predicted == pytest.approx(drawn, rel=0.10)


@pytest.fixture(scope="module")
def mass_run(tmp_path_factory):
    """A stellar-mass run: a mock with a Schechter mass function and photometric redshifts."""
    from countscale.pipeline import run_survey

    tmp = tmp_path_factory.mktemp("mass_run")
    form = SchechterMass(log10_mass_star=10.8, alpha=-1.2, phi_star=3e-3)
    footprint = Footprint.cap(150.0, 20.0, 4.0, max_order=10)
    spec = MockSpec(
        galaxies=MassFunctionGalaxies(mass_function=form, log10_mass_min=6.0, z_max=0.3),
        measurement=Measurement(m50=30.0, width=0.1), mag_limits=(18.5,),
        generation_mag_limit=18.5,
    )
    cat = make_mock(spec, rng=12, footprint=footprint).catalogue
    frame = cat[["ra", "dec", "mag_true", "z", "log10_mass"]].rename(columns={"mag_true": "mag"})
    frame["z_err"] = 0.002 * (1 + frame["z"])
    frame.to_parquet(tmp / "cat.parquet")
    (tmp / "run.toml").write_text(
        '[survey]\nname = "Mass test (a mock)"\n\n'
        '[catalog]\npaths = ["cat.parquet"]\nra = "ra"\ndec = "dec"\nmag = "mag"\n'
        'redshift = "z"\nstellar_mass = "log10_mass"\nredshift_error = "z_err"\n\n'
        "[footprint]\nmax_order = 10\ninclude = [{cap = {ra = 150.0, dec = 20.0, radius = 4.0}}]"
        "\n\n[luminosity_function]\nquantity = \"stellar_mass\"\nredshift_range = [0.02, 0.2]\n"
        "mag_limits = [10.0, 18.5]\n\n[output]\nformats = [\"json\", \"markdown\", \"png\"]\n"
    )
    return form, run_survey(tmp / "run.toml", out_dir=tmp / "out", seed=4)


def test_a_stellar_mass_run(mass_run):
    form, run = mass_run
    lf = run.results["luminosity_function"]
    assert lf["quantity"] == "stellar_mass" and lf["x_name"] == "log10_mass"
    sty = lf["sty"]
    for name in ("log10_mass_star", "alpha", "phi_star"):
        assert set(sty[name]) == ESTIMATE_KEYS
        assert abs(sty[name]["median"] - getattr(form, name)) < 3 * _half_width(sty[name]), name
    assert "mass_density_msun_mpc3" in sty
    assert {"log10_mass", "phi", "phi_err", "n"} <= set(lf["vmax"])
    assert "log10_mass" in lf["swml"]
    assert lf["sample"]["photometric_redshifts"] is True
    assert lf["sample"]["mass_limit"]["quantile"] == 0.95
    assert any("photometric redshifts" in note for note in lf["notes"])
    assert run.stage_results["luminosity_function"]["nz"] is None
    report = (run.out_dir / "report.md").read_text()
    assert "## Stellar-mass function" in report
    assert (run.out_dir / "luminosity_function.png").is_file()


def test_a_kcorrection_table_short_of_the_redshift_range_exits_2(tmp_path, capsys):
    # One line on stderr naming the file and section, exit code 2.
    footprint = Footprint.cap(150.0, 20.0, 1.0, max_order=8)
    ra, dec = footprint.random_points(50, np.random.default_rng(1))
    pd.DataFrame({"ra": ra, "dec": dec, "mag": np.linspace(15.0, 19.0, 50),
                  "z": np.linspace(0.05, 0.25, 50)}).to_csv(tmp_path / "cat.csv", index=False)
    run = tmp_path / "run.toml"
    run.write_text(
        '[survey]\nname = "K test"\n\n[catalog]\npaths = ["cat.csv"]\nra = "ra"\ndec = "dec"\n'
        'mag = "mag"\nredshift = "z"\n\n'
        "[footprint]\nmax_order = 8\ninclude = [{cap = {ra = 150.0, dec = 20.0, radius = 1.0}}]"
        "\n\n[luminosity_function]\nredshift_range = [0.01, 0.3]\nmag_limits = [12.0, 19.5]\n"
        "kcorrection = {z = [0.0, 0.1, 0.2], k = [0.0, 0.05, 0.1]}\n"
    )
    code = cli.main(["run", str(run), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert len(err.splitlines()) == 1
    assert "run.toml: [luminosity_function]: `kcorrection` must be defined over the redshift " \
           "range [0.01, 0.3]" in err
    assert not (tmp_path / "out" / "results.json").exists()


def test_a_missing_density_is_explained(demo_run):
    # When alpha <= -2 in some draws the total density diverges and is left out; the notes say
    # why (checked on the demo's objects with the density removed).
    from countscale.pipeline import _lf_notes

    objects = demo_run.stage_results["luminosity_function"]
    notes = _lf_notes(objects["sample"], objects["fit"], None, None, {})
    assert any(note.startswith("no luminosity density: alpha <= -2") for note in notes)
    full = _lf_notes(objects["sample"], objects["fit"], None, None, objects["estimates"])
    assert not any(note.startswith("no luminosity density") for note in full)


def test_binned_methods_only(tmp_path):
    # methods without "sty": no "sty" block in the results (the fit still serves the stages
    # after it), the figure shows the binned estimates alone.
    from countscale.lumfunc import Evolution
    from countscale.mock import SchechterGalaxies
    from countscale.pipeline import run_survey

    spec = MockSpec(galaxies=SchechterGalaxies(m_star=-21.3, alpha=-1.1, phi_star=4.6e-3,
                                               evolution=Evolution()),
                    measurement=Measurement(m50=30.0, width=0.1), mag_limits=(18.5,),
                    generation_mag_limit=18.5)
    cat = make_mock(spec, rng=2, footprint=Footprint.cap(150.0, 20.0, 1.5, max_order=10)
                    ).catalogue
    cat[["ra", "dec", "mag_true", "z"]].rename(columns={"mag_true": "mag"}).to_csv(
        tmp_path / "cat.csv", index=False)
    run = tmp_path / "run.toml"
    run.write_text(
        '[survey]\nname = "Binned only"\n\n[catalog]\npaths = ["cat.csv"]\nra = "ra"\n'
        'dec = "dec"\nmag = "mag"\nredshift = "z"\n\n[footprint]\nmax_order = 10\n'
        "include = [{cap = {ra = 150.0, dec = 20.0, radius = 1.5}}]\n\n"
        '[luminosity_function]\nmethods = ["vmax", "swml"]\nredshift_range = [0.01, 0.3]\n'
        'mag_limits = [10.0, 18.5]\nbin_width = 0.5\n\n[output]\nformats = ["json", "png"]\n'
    )
    result = run_survey(run, out_dir=tmp_path / "out", seed=1)
    lf = result.results["luminosity_function"]
    assert "sty" not in lf and {"vmax", "swml"} <= set(lf)
    steps = np.diff(lf["vmax"]["bin_lower"]) / 0.5  # bin_width = 0.5 (empty bins left out)
    assert np.allclose(steps, np.round(steps), atol=1e-9)
    assert result.stage_results["luminosity_function"]["fit"] is not None
    assert (tmp_path / "out" / "luminosity_function.png").is_file()
