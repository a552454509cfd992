"""Tests for countscale.planning and the ``countscale plan`` command.

Outside references: the Poisson error 1 / sqrt(N) (closed form); the sky-limited depth gain
1.25 log10 of the exposure-time ratio (textbook relation for background-limited photometry,
no source); the json module for ``--json`` (one object on stdout). The rest are invariants
that any correct plan must satisfy (Poisson-dominated errors fall as 1 / sqrt(area), cosmic
variance sets a floor, uncorrelated fields beat one field of the same area where C_l falls
with l).
"""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest

from countscale import planning
from countscale.cli import main
from countscale.errors import InputError, InputTypeError

CONTRACT_KEYS = {"quantity", "target_precision", "required_area_deg2", "reachable",
                 "floor_precision", "curve", "layout", "assumptions"}


@pytest.fixture(scope="module")
def dense():
    """A dense faint population (cosmic variance dominates from small areas)."""
    return planning.population(surface_density_per_deg2=8000.0, redshift_median=0.45,
                               bias=1.2, slope=0.45, mag_limit=21.8)


@pytest.fixture(scope="module")
def sparse():
    """A sparse population (Poisson noise dominates up to large areas)."""
    return planning.population(surface_density_per_deg2=0.05, redshift_median=1.0, bias=2.0)


def test_poisson_term_is_exactly_one_over_root_n(dense):
    for area in (0.3, 12.0, 900.0):
        point = planning.precision(dense, area)
        assert point["poisson"] == pytest.approx(1.0 / math.sqrt(8000.0 * area), rel=1e-12)
        assert point["total"] == pytest.approx(math.hypot(point["poisson"],
                                                          point["cosmic_variance"]), rel=1e-12)


def test_errors_fall_as_one_over_root_area_while_poisson_dominates(sparse):
    small, large = planning.precision(sparse, 10.0), planning.precision(sparse, 40.0)
    assert small["poisson"] > 10 * small["cosmic_variance"]
    assert large["total"] / small["total"] == pytest.approx(0.5, rel=0.01)


def test_errors_flatten_at_the_cosmic_variance_floor(dense):
    small, large = planning.precision(dense, 10.0), planning.precision(dense, 40.0)
    assert small["cosmic_variance"] > 5 * small["poisson"]
    # Four times the area buys much less than the Poisson factor of 2.
    assert large["total"] / small["total"] > 0.6


def test_separated_fields_beat_one_field_of_the_same_area(dense):
    for area in (1.0, 10.0, 100.0):
        one = planning.precision(dense, area, "contiguous")
        four = planning.precision(dense, area, "fields", n_fields=4)
        assert four["cosmic_variance"] < one["cosmic_variance"]
        assert four["poisson"] == pytest.approx(one["poisson"], rel=1e-12)


def test_required_area_gives_the_target(dense):
    plan = planning.plan_survey(dense, target=0.02)
    assert plan.reachable
    point = planning.precision(dense, plan.required_area_deg2)
    # The curve is interpolated on 41 areas: the target to 2 %.
    assert point["total"] == pytest.approx(0.02, rel=0.02)
    result = plan.to_json()
    assert set(result) >= CONTRACT_KEYS
    assert all(set(p) == {"area_deg2", "poisson", "cosmic_variance", "total"}
               for p in result["curve"])
    assert result["crossover_area_deg2"] < result["required_area_deg2"]
    assert set(result["layouts"]) == {"contiguous", "strip", "fields"}


def test_unreachable_target_reports_the_floor(dense):
    plan = planning.plan_survey(dense, target=1e-5)
    assert plan.reachable is False
    assert plan.required_area_deg2 is None
    assert plan.floor_precision == pytest.approx(min(p["total"] for p in plan.curve))
    assert plan.floor_precision > 1e-5
    # Separated fields are capped at half the sky, so their floor is higher.
    assert plan.layouts["fields"]["floor_precision"] > plan.floor_precision
    assert plan.layouts["fields"]["reachable"] is False


def test_depth_trade_off():
    # Background-limited imaging: 1.25 log10(t) magnitudes (textbook relation).
    assert planning.limiting_magnitude_gain(10.0) == pytest.approx(1.25)
    assert planning.limiting_magnitude_gain(4.0) == pytest.approx(1.25 * math.log10(4.0))
    pop = planning.population(surface_density_per_deg2=50.0, redshift_median=0.3, slope=0.6,
                              mag_limit=20.0)
    plan = planning.plan_survey(pop, target=0.05)
    rows = {row["exposure_factor"]: row for row in plan.depth}
    assert rows[1.0]["time_factor"] == pytest.approx(1.0)
    assert rows[4.0]["surface_density_per_deg2"] == pytest.approx(
        50.0 * 10 ** (0.6 * 1.25 * math.log10(4.0)))
    assert rows[4.0]["mag_limit"] == pytest.approx(20.0 + 1.25 * math.log10(4.0))
    # Deeper means more sources per area: never more area for the same target.
    areas = [rows[f]["required_area_deg2"] for f in sorted(rows)]
    assert all(a >= b for a, b in itertools.pairwise(areas))


def test_strip_layout_is_continuous_at_the_flat_sky_switch(dense):
    # Strips up to 20 degrees long are flat-sky rectangles, longer ones healpy boxes: at the
    # switch (20 x 2 degrees) the two give the same cosmic variance within 2 %.
    from countscale.variance import box_mask_spectrum, rectangle_mask_spectrum

    spectrum = dense.spectrum(30000)
    flat = rectangle_mask_spectrum(20.0, 2.0).sigma(spectrum)
    sphere = box_mask_spectrum(20.0, 2.0).sigma(spectrum)
    assert flat == pytest.approx(sphere, rel=0.02)


BAD = [
    (lambda: planning.population(surface_density_per_deg2=-5.0, redshift_median=0.3),
     InputError, r"`surface_density` must be a number > 0; got -5.0"),
    (lambda: planning.population(surface_density_per_deg2=10.0, redshift_median=0.3,
                                 bias=0.0), InputError, r"`bias` must be a number > 0; got 0.0"),
    (lambda: planning.population(surface_density_per_deg2=10.0), InputError,
     r"give exactly one of `redshift_median` and `nz`"),
    (lambda: planning.population(surface_density_per_deg2="many", redshift_median=0.3),
     InputTypeError, r"`surface_density` must be a number > 0; got 'many'"),
    (lambda: planning.Layout("spiral"), InputError,
     r"`layout` must be one of contiguous, fields, strip; got 'spiral'"),
    (lambda: planning.Layout("fields", 1), InputError,
     r"`n_fields` must be at least 2 for separated fields; got 1"),
]


@pytest.mark.parametrize("call, error, message", BAD)
def test_bad_input(call, error, message):
    with pytest.raises(error, match=message):
        call()


def test_bad_target_and_area(dense):
    with pytest.raises(InputError, match=r"`target` must be in \(0, 1\); got 1.5"):
        planning.plan_survey(dense, target=1.5)
    with pytest.raises(InputError, match=r"`area_deg2` must be at most 20626.5"):
        planning.precision(dense, 30000.0, "fields", n_fields=3)


# --------------------------------------------------------------------------------------------
# The command line
# --------------------------------------------------------------------------------------------
def run(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_plan_json_is_one_object_with_the_contract_keys(capsys):
    code, out, err = run(["plan", "--surface-density", 2000, "--redshift-median", 0.5,
                          "--bias", 1.1, "--target", 0.03, "--fields", 3, "--json"], capsys)
    assert code == 0, err
    result = json.loads(out)
    assert set(result) >= CONTRACT_KEYS
    assert result["layout"]["kind"] == "fields" and result["layout"]["n_fields"] == 3
    assert result["reachable"] is True
    assert result["target_precision"] == 0.03
    area = np.array([p["area_deg2"] for p in result["curve"]])
    poisson = np.array([p["poisson"] for p in result["curve"]])
    np.testing.assert_allclose(poisson, 1 / np.sqrt(2000.0 * area), rtol=1e-12)


def test_plan_table_and_plot(tmp_path, capsys):
    png = tmp_path / "plan.png"
    code, out, err = run(["plan", "--surface-density", 2000, "--redshift-median", 0.5,
                          "--target", 1e-6, "--slope", 0.5, "--plot", png], capsys)
    assert code == 0, err
    assert "NOT reachable" in out and "floor" in out
    assert "depth trade-off" in out and "assumptions" in out
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


@pytest.mark.parametrize("argv, message", [
    (["--surface-density", -3, "--redshift-median", 0.5],
     "countscale: error: `surface_density` must be a number > 0; got -3.0"),
    (["--surface-density", 100],
     "countscale: error: countscale plan needs --redshift-median (or a RUNFILE whose survey "
     "measures them)"),
    (["--surface-density", 100, "--redshift-median", 0.5, "--target", 2],
     "countscale: error: --target must be a fraction in (0, 1); got 2.0"),
    (["--surface-density", 100, "--redshift-median", 0.5, "--bias", 0],
     "countscale: error: `bias` must be a number > 0; got 0.0"),
    (["--surface-density", 100, "--redshift-median", 0.5, "--fields", 0],
     "countscale: error: --fields must be an integer >= 1; got 0"),
])
def test_plan_bad_input_exits_2_with_one_line(argv, message, capsys):
    code, out, err = run(["plan", *argv], capsys)
    assert code == 2
    assert out == ""
    assert err.strip() == message


def test_plan_from_the_demo_run_file(capsys):
    from pathlib import Path

    runfile = Path(__file__).resolve().parents[1] / "demo_data" / "survey.toml"
    if not runfile.is_file():
        pytest.skip("demo_data not generated")
    code, out, err = run(["plan", runfile, "--target", 0.05, "--bias", 1.3, "--json"], capsys)
    assert code == 0, err
    # The stage's warnings come out on stderr, one line each, after the output.
    assert err and all(line.startswith("countscale: warning: ") for line in err.splitlines())
    result = json.loads(out)
    pop = result["population"]
    # The population measured by the run: N(<21.8) of the counts (the demo's model has 8290
    # per deg^2; its field is 2.4 % above), the fitted slope near the faint galaxies' range.
    assert pop["mag_limit"] == 21.8
    assert pop["surface_density_per_deg2"] == pytest.approx(8290.0, rel=0.05)
    assert 0.3 < pop["slope"] < 0.6
    assert pop["bias"] == 1.3
    assert "bias from the command line" in pop["source"]
    assert result["reachable"] is True
