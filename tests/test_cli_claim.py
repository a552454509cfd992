"""`countscale claim` driven through main([...]): JSON contract, human output, exit codes."""

import json

import pytest

from countscale.cli import main
from countscale.estimate import Estimate

# The claim object's keys and its parsed keys (the claim contract; extended, never renamed).
CLAIM_KEYS = {"claim", "parsed", "estimate", "verdict", "log10_ratio", "assumptions", "sources"}
PARSED_KEYS = {"value", "low", "high", "quantity", "scope"}
ESTIMATE_KEYS = {"median", "interval_68", "interval_95", "unit", "budget"}


def run(argv, capsys):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def test_json_object(capsys):
    code, out, err = run(["claim", "two trillion galaxies", "--json", "--draws", "1000"], capsys)
    assert code == 0, err
    obj = json.loads(out)  # one JSON object and nothing else on stdout
    assert CLAIM_KEYS <= set(obj)
    assert PARSED_KEYS <= set(obj["parsed"])
    assert set(obj["estimate"]) == ESTIMATE_KEYS
    assert obj["parsed"]["value"] == 2e12
    assert obj["parsed"]["quantity"] == "galaxies"
    assert obj["parsed"]["scope"] == "observable_universe"
    assert obj["verdict"] in {"consistent", "same_order", "too_high", "too_low"}
    assert sum(obj["estimate"]["budget"].values()) == pytest.approx(1.0, abs=0.01)
    for item in obj["assumptions"]:
        assert set(item) == {"name", "effect_log10", "note"}
    assert obj["sources"] and all("citation" in s for s in obj["sources"])


def test_same_seed_same_json(capsys):
    argv = ["claim", "a hundred billion stars in a galaxy like ours", "--json", "--draws", "500"]
    _, first, _ = run(argv, capsys)
    _, second, _ = run(argv, capsys)
    assert first == second
    _, third, _ = run([*argv, "--seed", "5"], capsys)
    assert third != first


def test_human_output_paragraph_then_table(capsys):
    code, out, err = run(["claim", "10^22 stars", "--draws", "500"], capsys)
    assert code == 0, err
    paragraph, rest = out.split("\n\n", 1)
    assert paragraph.startswith("The claim quotes 1.0 × 10^22 stars.")
    assert "observable universe" in paragraph
    lines = rest.splitlines()
    assert lines[0].split()[0] == "definition" and "verdict" in lines[0]
    assert lines[2].startswith("stars_universe")
    assert "assumptions (effect on the estimate, dex):" in out
    assert "Baldry et al. 2012" in out


def test_results_file(tmp_path, capsys):
    totals = {
        "sky_total": Estimate.from_lognormal(4.0e7, 0.05, "galaxies").to_json(),
        "sky_total_naive": Estimate.from_lognormal(3.0e7, 0.05, "galaxies").to_json(),
        "light_cone_total": Estimate.from_lognormal(1.2e12, 0.3, "galaxies").to_json(),
        "present_day_volume_total": Estimate.from_lognormal(3e12, 0.3, "galaxies").to_json(),
        "stars_total": Estimate.from_lognormal(5e21, 0.1, "stars").to_json(),
        "warnings": [],
    }
    path = tmp_path / "results.json"
    path.write_text(json.dumps({"totals": totals}))
    code, out, err = run(["claim", "40 million galaxies brighter than magnitude 24",
                          "--results", str(path), "--json"], capsys)
    assert code == 0, err
    obj = json.loads(out)
    assert obj["verdict"] == "consistent"
    assert obj["estimate"]["median"] == pytest.approx(4.0e7)
    assert obj["parsed"]["scope"] == "sky"
    code, out, _ = run(["claim", "10^22 stars", "--results", str(path)], capsys)
    assert code == 0
    # 10^22 against a 95 % top of 5 x 10^21 x 10^0.196 = 7.9 x 10^21: within a factor 3.
    assert "stars_total" in out and "same_order" in out


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["claim", "there are lots of galaxies"], r"no number found in the claim"),
        (["claim", "-2 trillion galaxies"], r"a count must be > 0"),
        (["claim", "0 stars"], r"a count must be > 0"),
        (["claim", "2 trillion planets"], r"unknown quantity 'planets'"),
        (["claim", "2 trillion galaxies", "--results", "missing.json"],
         r"missing.json: results file not found"),
        (["claim", "2 trillion galaxies", "--seed", "-1"], r"--seed must be a non-negative"),
        (["claim", "2 trillion galaxies", "--draws", "5"], r"--draws must be >= 100"),
        (["claim", "40 million galaxies brighter than magnitude 24"], r"needs|--results"),
    ],
)
def test_bad_input_exit_2_one_line(argv, message, capsys):
    import re

    code, out, err = run(argv, capsys)
    assert code == 2
    assert out == ""
    assert len(err.strip().splitlines()) == 1
    assert re.search(message, err)


def test_results_file_missing_key(tmp_path, capsys):
    path = tmp_path / "results.json"
    sky = Estimate.from_normal(1.0, 0.1, "").to_json()
    path.write_text(json.dumps({"totals": {"sky_total": sky}}))
    code, _, err = run(["claim", "2 trillion galaxies", "--results", str(path)], capsys)
    assert code == 2
    assert "key 'totals.light_cone_total' missing" in err and "results.json" in err


def test_unknown_scope_is_a_usage_error(capsys):
    code, _, err = run(["claim", "2 trillion galaxies", "--scope", "galaxy"], capsys)
    assert code == 2
    assert "invalid choice" in err
