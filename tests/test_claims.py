"""Tests for countscale.claims: parsing quoted totals, the built-in scenarios, verdicts.

The phrasings below are written for these tests. Word numbers are checked against a reference
parser written here independently (a recursive split on the largest scale word). Scenario values
are checked against their published sources, named beside each check.
"""

import math
import re

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from countscale.claims import (
    check_claim,
    format_count,
    galaxies_light_cone,
    galaxies_present_day,
    parse_claim,
    parse_number,
    stars_milky_way,
    stars_observable_universe,
    verdict,
)
from countscale.errors import InputError, InputTypeError
from countscale.estimate import Estimate

N_DRAWS = 4000


@pytest.fixture(scope="module")
def scenarios():
    return {
        "light_cone": galaxies_light_cone(n_draws=N_DRAWS, rng=0),
        "present_day": galaxies_present_day(n_draws=N_DRAWS, rng=0),
        "present_day_z8": galaxies_present_day(z_max=8.0, n_draws=N_DRAWS, rng=0),
        "stars_universe": stars_observable_universe(n_draws=N_DRAWS, rng=0),
        "milky_way": stars_milky_way(n_draws=N_DRAWS, rng=0),
        "dwarf_light_cone": galaxies_light_cone(6.0, 9.0, n_draws=N_DRAWS, rng=0),
        # (dwarfs dominate: 10^6-10^9 Msun holds nearly all of the light-cone count)
        "large_light_cone": galaxies_light_cone(10.0, n_draws=N_DRAWS, rng=0),
    }


# ----------------------------------------------------------------------------- phrasings
U, MW = "observable_universe", "milky_way"
G, S = "galaxies", "stars"
# text, value, low, high, quantity, scope, bound, scenario for the verdict, expected verdict
PHRASINGS = [
    ("two trillion galaxies", 2e12, 2e12, 2e12, G, U, None, "light_cone", "consistent"),
    ("About 2,000,000,000,000 galaxies exist.", 2e12, 2e12, 2e12, G, U, None, "light_cone",
     "consistent"),
    ("roughly 10^12 galaxies in the observable universe", 1e12, 1e12, 1e12, G, U, None,
     "light_cone", "consistent"),
    ("There may be 200 billion to 2 trillion galaxies out there", math.sqrt(4e23), 2e11, 2e12,
     G, U, None, "light_cone", "consistent"),
    ("between 10^11 and 10^12 galaxies", math.sqrt(1e23), 1e11, 1e12, G, U, None, "light_cone",
     "consistent"),
    ("some 100 billion galaxies fill the cosmos", 1e11, 1e11, 1e11, G, U, None, "light_cone",
     "same_order"),
    ("at least 10 billion galaxies", 1e10, 1e10, 1e10, G, U, "lower", "light_cone",
     "consistent"),
    ("more than 50 trillion galaxies", 5e13, 5e13, 5e13, G, U, "lower", "light_cone",
     "too_high"),
    ("fewer than a billion galaxies", 1e9, 1e9, 1e9, G, U, "upper", "light_cone", "too_low"),
    ("up to a hundred trillion galaxies", 1e14, 1e14, 1e14, G, U, "upper", "light_cone",
     "consistent"),
    ("a hundred thousand million galaxies", 1e11, 1e11, 1e11, G, U, None, "light_cone",
     "same_order"),
    ("one and a half trillion galaxies", 1.5e12, 1.5e12, 1.5e12, G, U, None, "light_cone",
     "consistent"),
    ("1.5e12 galaxies in the universe", 1.5e12, 1.5e12, 1.5e12, G, U, None, "light_cone",
     "consistent"),
    ("3 × 10^12 galaxies", 3e12, 3e12, 3e12, G, U, None, "light_cone", "consistent"),
    ("an estimated 2.5 trillion galaxies", 2.5e12, 2.5e12, 2.5e12, G, U, None, "light_cone",
     "consistent"),
    ("nearly 10¹² galaxies", 1e12, 1e12, 1e12, G, U, None, "light_cone", "consistent"),
    ("hundreds of billions of galaxies", math.sqrt(2e11 * 1e12), 2e11, 1e12, G, U, None,
     "light_cone", "consistent"),
    ("2 000 000 000 000 galaxies", 2e12, 2e12, 2e12, G, U, None, "light_cone", "consistent"),
    ("a million million galaxies", 1e12, 1e12, 1e12, G, U, None, "light_cone", "consistent"),
    ("200 to 300 billion galaxies", math.sqrt(6e22), 2e11, 3e11, G, U, None, "light_cone",
     "same_order"),
    ("ten to the power of twelve galaxies", 1e12, 1e12, 1e12, G, U, None, "light_cone",
     "consistent"),
    ("10**13 galaxies in the universe", 1e13, 1e13, 1e13, G, U, None, "light_cone",
     "consistent"),
    ("about 100 billion dwarf galaxies", 1e11, 1e11, 1e11, G, U, None, "dwarf_light_cone",
     "same_order"),
    ("60 billion large galaxies", 6e10, 6e10, 6e10, G, U, None, "large_light_cone", "too_high"),
    ("10^22 stars", 1e22, 1e22, 1e22, S, U, None, "stars_universe", "same_order"),
    ("ten sextillion stars in the universe", 1e22, 1e22, 1e22, S, U, None, "stars_universe",
     "same_order"),
    ("30 000 million million million stars", 3e22, 3e22, 3e22, S, U, None, "stars_universe",
     "too_high"),
    ("a few × 10^22 stars in the observable universe", math.sqrt(10) * 1e22, 2e22, 5e22, S, U,
     None, "stars_universe", "too_high"),
    ("between 10²² and 10²³ stars", math.sqrt(1e45), 1e22, 1e23, S, U, None, "stars_universe",
     "too_high"),
    ("roughly 5 × 10^21 stars", 5e21, 5e21, 5e21, S, U, None, "stars_universe", "consistent"),
    ("1,000,000,000,000,000,000,000 stars", 1e21, 1e21, 1e21, S, U, None, "stars_universe",
     "too_low"),
    ("at least 10^21 stars in the cosmos", 1e21, 1e21, 1e21, S, U, "lower", "stars_universe",
     "consistent"),
    ("a hundred billion stars in a galaxy like ours", 1e11, 1e11, 1e11, S, MW, None,
     "milky_way", "consistent"),
    ("The Milky Way holds about 100,000,000,000 stars", 1e11, 1e11, 1e11, S, MW, None,
     "milky_way", "consistent"),
    ("our galaxy has between 100 and 400 billion stars", math.sqrt(4e22), 1e11, 4e11, S, MW,
     None, "milky_way", "same_order"),
    ("three hundred and fifty billion stars in the Milky Way", 3.5e11, 3.5e11, 3.5e11, S, MW,
     None, "milky_way", "same_order"),
    ("1.5e11 stars per galaxy", 1.5e11, 1.5e11, 1.5e11, S, MW, None, "milky_way",
     "consistent"),
    ("over a trillion stars in our own galaxy", 1e12, 1e12, 1e12, S, MW, "lower", "milky_way",
     "too_high"),
    ("a typical large galaxy contains a hundred billion stars", 1e11, 1e11, 1e11, S, MW, None,
     "milky_way", "consistent"),
    ("no more than 10 billion stars in the Milky Way", 1e10, 1e10, 1e10, S, MW, "upper",
     "milky_way", "too_low"),
    ("around 2.5 x 10^11 stars in our galaxy", 2.5e11, 2.5e11, 2.5e11, S, MW, None, "milky_way",
     "same_order"),
    ("twenty-five billion stars in the Milky Way", 2.5e10, 2.5e10, 2.5e10, S, MW, None,
     "milky_way", "same_order"),
    ("two hundred thousand million stars in our galaxy", 2e11, 2e11, 2e11, S, MW, None,
     "milky_way", "same_order"),
]


@pytest.mark.parametrize(("text", "value", "low", "high", "quantity", "scope", "bound",
                          "scenario", "expected"), [p for p in PHRASINGS if p[1] is not None])
def test_phrasings(scenarios, text, value, low, high, quantity, scope, bound, scenario,
                   expected):
    parsed = parse_claim(text)
    assert parsed.value == pytest.approx(value, rel=1e-12)
    assert parsed.low == pytest.approx(low, rel=1e-12)
    assert parsed.high == pytest.approx(high, rel=1e-12)
    assert parsed.quantity == quantity
    assert parsed.scope == scope
    assert parsed.bound == bound
    assert verdict(parsed.value, scenarios[scenario].estimate, parsed.bound) == expected


def test_at_least_forty_phrasings():
    assert len([p for p in PHRASINGS if p[1] is not None]) >= 40




def test_hedges_are_recorded():
    assert parse_claim("roughly 2 trillion galaxies").hedges == ("roughly",)
    assert parse_claim("at least 2 trillion galaxies").bound == "lower"
    assert parse_claim("2 trillion galaxies").hedges == ()


def test_mass_magnitude_and_redshift_phrases():
    p = parse_claim("2 trillion galaxies above 10^6 solar masses out to z = 8")
    assert (p.value, p.log10_mass_min, p.z_max) == (2e12, 6.0, 8.0)
    p = parse_claim("5 billion galaxies more massive than 10^9 Msun")
    assert p.log10_mass_min == pytest.approx(9.0)
    p = parse_claim("40 million galaxies brighter than magnitude 24")
    assert (p.scope, p.mag_limit, p.value) == ("sky", 24.0, 4e7)
    p = parse_claim("100 billion galaxies", log10_mass_min=8.0)
    assert p.log10_mass_min == 8.0


def test_scope_option_and_default_assumption():
    p = parse_claim("two trillion galaxies")
    assert ("scope", "no scope stated: the observable universe is assumed") in p.assumed
    assert parse_claim("two trillion galaxies in the universe").assumed == ()
    assert parse_claim("10^11 stars", scope="milky_way").scope == "milky_way"


# ----------------------------------------------------------------------------- word numbers
_REF_SMALL = {w: i for i, w in enumerate(
    "zero one two three four five six seven eight nine ten eleven twelve thirteen fourteen "
    "fifteen sixteen seventeen eighteen nineteen".split())}
_REF_TENS = {w: 10 * (i + 2) for i, w in enumerate(
    "twenty thirty forty fifty sixty seventy eighty ninety".split())}
_REF_SCALES = [("trillion", 10**12), ("billion", 10**9), ("million", 10**6),
               ("thousand", 10**3)]


def _reference_words(words):
    """Independent reference: split at the LAST occurrence of the largest scale word present.

    left-of-split (a number, default 1) x scale + right-of-split. Exact integer arithmetic.
    Stacked scales ("thousand million") multiply because the left part keeps its own scales.
    """
    words = [w for w in words if w != "and"]
    if not words:
        return 0
    for name, value in _REF_SCALES:
        if name in words:
            k = len(words) - 1 - words[::-1].index(name)
            left = _reference_words(words[:k]) or 1
            right = _reference_words(words[k + 1:])
            # a smaller number on the right ("... million three") adds; a larger never occurs
            return left * value + right
    if "hundred" in words:
        k = words.index("hundred")
        left = _reference_words(words[:k]) or 1
        return left * 100 + _reference_words(words[k + 1:])
    total = 0
    for w in words:
        if w == "a":
            total += 1
        elif w in _REF_TENS:
            total += _REF_TENS[w]
        else:
            total += _REF_SMALL[w]
    return total


WORD_CASES = [
    "two trillion", "a hundred billion", "three hundred and fifty billion",
    "a hundred thousand million", "million million", "thirty thousand million million million",
    "two million three hundred thousand", "nine hundred and ninety nine thousand",
    "one thousand two hundred million", "seventy two billion", "eleven thousand million",
    "four hundred and four", "a thousand", "sixty five million four hundred and twelve",
    "two hundred thousand million", "fifteen trillion", "a million million million",
]


@pytest.mark.parametrize("words", WORD_CASES)
def test_word_numbers_against_independent_reference(words):
    expected = _reference_words(re.split(r"[\s-]+", words))
    assert parse_number(words) == pytest.approx(float(expected), rel=1e-15)


@given(st.integers(min_value=1, max_value=999), st.sampled_from(_REF_SCALES[::-1]))
def test_random_word_numbers_against_reference(n, scale):
    hundreds, rest = divmod(n, 100)
    words = []
    if hundreds:
        words += [list(_REF_SMALL)[hundreds], "hundred"]
        if rest:
            words.append("and")
    if rest >= 20:
        words.append(next(w for w, v in _REF_TENS.items() if v == rest // 10 * 10))
        if rest % 10:
            words.append(list(_REF_SMALL)[rest % 10])
    elif rest:
        words.append(list(_REF_SMALL)[rest])
    words.append(scale[0])
    assert parse_number(" ".join(words)) == float(_reference_words(words))


# ----------------------------------------------------------------------------- round trip
@given(
    st.floats(min_value=1.0, max_value=1e27, allow_nan=False, allow_infinity=False),
    st.integers(min_value=1, max_value=4),
    st.sampled_from(["scientific", "words", "digits"]),
)
def test_format_then_parse_round_trip(value, sig, style):
    text = format_count(value, sig=sig, style=style)
    rounded = float(f"{value:.{sig - 1}e}")
    assert parse_number(text) == pytest.approx(rounded, rel=1e-12)


def test_format_examples():
    assert format_count(7.1234e11) == "7.1 × 10^11"
    assert format_count(7.1234e11, style="words") == "710 billion"
    assert format_count(7.1234e11, style="digits") == "710,000,000,000"


# ----------------------------------------------------------------------------- scenarios
def test_stars_in_the_universe_near_ten_to_the_22(scenarios):
    # Common figure, no single source: ~10^22 stars. Built from Baldry et al. 2012 (MNRAS 421,
    # 621) rho* x Planck 2018 horizon volume / mean stellar mass: within a factor 3.
    est = scenarios["stars_universe"].estimate
    assert 1e22 / 3 < est.median < 1e22 * 3
    assert sum(est.budget.values()) == pytest.approx(1.0, abs=0.01)
    assert set(est.budget) == {"mass_function", "imf", "cosmology"}


def test_milky_way_stars(scenarios):
    # Licquia & Newman 2015 (ApJ 806, 96): (6.08 +- 1.14) x 10^10 Msun -> 1-2 x 10^11 stars.
    est = scenarios["milky_way"].estimate
    assert 1e11 <= est.median <= 2e11
    # The 68 % width follows the published 19 % mass error (plus the IMF mixture).
    width = math.log10(est.interval_68[1] / est.interval_68[0]) / 2
    assert 0.07 < width < 0.12
    assert est.budget["milky_way_mass"] > est.budget["imf"]


def test_light_cone_same_order_as_conselice(scenarios):
    # Conselice et al. 2016 (ApJ 830, 83): 2.0 (+0.7/-0.6) x 10^12 galaxies above 10^6 Msun to
    # z = 8. With Leja et al. 2020 + Song et al. 2016 the light cone is lower but the same order:
    # within a factor 3 of their value, and their interval overlaps our 95 % interval.
    est = scenarios["light_cone"].estimate
    assert 2e12 / 3 < est.median < 2e12 * 3
    assert est.interval_95[0] < 2.7e12 and est.interval_95[1] > 1.4e12
    assert sum(est.budget.values()) == pytest.approx(1.0, abs=0.01)


def test_present_day_density_times_volume_to_z8(scenarios):
    # ~8 x 10^11 with the Baldry et al. 2012 local mass function above 10^6 Msun and the Planck
    # 2018 comoving volume to z = 8 (a check computed outside the project; approximate).
    est = scenarios["present_day_z8"].estimate
    assert est.median == pytest.approx(8e11, rel=0.25)
    # Both definitions in the same volume, and their ratio (reported; no expected sign).
    ratio = scenarios["light_cone"].estimate.median / est.median
    assert 0.3 < ratio < 3.0


def test_budgets_and_reproducibility():
    a = stars_milky_way(n_draws=500, rng=11)
    b = stars_milky_way(n_draws=500, rng=11)
    assert a.estimate.to_json() == b.estimate.to_json()
    np.testing.assert_array_equal(a.estimate.draws, b.estimate.draws)
    # One IMF only: a zero-width systematic gets a zero share.
    c = stars_milky_way(imfs={"kroupa": 1.0}, n_draws=500, rng=11)
    assert c.estimate.budget["imf"] == 0.0


# ----------------------------------------------------------------------------- check_claim
def test_check_claim_two_definitions_and_assumptions():
    result = check_claim("two trillion galaxies", n_draws=1000)
    obj = result.to_json()
    assert set(obj) >= {"claim", "parsed", "estimate", "verdict", "log10_ratio", "assumptions",
                        "sources"}
    assert set(obj["parsed"]) >= {"value", "low", "high", "quantity", "scope"}
    assert obj["verdict"] in {"consistent", "same_order", "too_high", "too_low"}
    assert [a["name"] for a in obj["alternatives"]] == ["present_day"]
    effects = [a["effect_log10"] for a in obj["assumptions"] if a["effect_log10"] is not None]
    assert effects == sorted(effects, key=lambda e: -abs(e))
    names = [a["name"] for a in obj["assumptions"]]
    assert "faint_mass_limit" in names and "definition" in names and "scope" in names
    citations = " ".join(s["citation"] for s in obj["sources"])
    assert "Leja et al. 2020" in citations and "Conselice et al. 2016" in citations
    assert "light cone" in result.summary() and "present-day" in result.summary()


def test_check_claim_verdict_says_which_definition():
    # 3 x 10^11 above 10^8 Msun: compare with both definitions; each verdict is its own.
    result = check_claim("3 x 10^11 galaxies above 10^8 solar masses", n_draws=1000)
    assert result.primary.name == "light_cone"
    assert result.alternatives[0].name == "present_day"
    assert result.primary.verdict != result.alternatives[0].verdict or (
        result.primary.log10_ratio != result.alternatives[0].log10_ratio
    )


def test_results_file(tmp_path):
    totals = {
        "light_cone_total": Estimate.from_lognormal(1e12, 0.2, "galaxies").to_json(),
        "present_day_volume_total": Estimate.from_lognormal(3e12, 0.2, "galaxies").to_json(),
        "sky_total": Estimate.from_lognormal(4e7, 0.05, "galaxies").to_json(),
        "stars_total": Estimate.from_lognormal(5e21, 0.1, "stars").to_json(),
    }
    result = check_claim("two trillion galaxies", results={"totals": totals})
    assert result.primary.name == "light_cone_total"
    assert result.primary.verdict == "consistent"
    assert result.alternatives[0].name == "present_day_volume_total"
    # 3 x 10^8 against a 95 % top of 5.0 x 10^7: a factor 6 too high.
    sky = check_claim("300 million galaxies brighter than magnitude 24",
                      results={"totals": totals})
    assert sky.primary.name == "sky_total" and sky.primary.verdict == "too_high"


@pytest.mark.parametrize(
    ("text", "kwargs", "error", "message"),
    [
        ("no numbers at all", {}, InputError, r"no number found in the claim"),
        ("", {}, InputError, r"claim text is empty"),
        ("-3 trillion galaxies", {}, InputError, r"a count must be > 0"),
        ("zero stars in the sky", {}, InputError, r"a count must be > 0"),
        ("0 galaxies", {}, InputError, r"a count must be > 0"),
        ("2 trillion planets", {}, InputError, r"unknown quantity 'planets'.*galaxies, stars"),
        ("10^80 atoms in the universe", {}, InputError, r"unknown quantity 'atoms'"),
        ("1,5 billion stars", {}, InputError, r"'1,5' has a comma that is not a thousands"),
        ("2 trillion galaxies", {"scope": "galaxy"}, InputError, r"`--scope` must be one of"),
        ("2 trillion galaxies in the milky way", {"scope": "milky_way"}, InputError,
         r"scope milky_way applies to stars"),
        ("2 galaxies", {"log10_mass_min": 9.0, "log10_mass_max": 8.0}, InputError,
         r"mass cut is empty"),
        ("40 million galaxies brighter than magnitude 24", {}, InputError,
         r"scope sky .* has no built-in scenario; give a run's results with --results"),
        ("2 trillion galaxies", {"results": {"nototals": 1}}, InputError,
         r"results: key 'totals' missing"),
        ("2 trillion galaxies", {"results": {"totals": {}}}, InputError,
         r"results: key 'totals.light_cone_total' missing"),
        ("10^11 stars in our galaxy", {"results": {"totals": {}}}, InputError,
         r"hold no stars in scope milky_way"),
        ("2 trillion galaxies", {"results": 5}, InputTypeError, r"`results` must be a path"),
    ],
)
def test_bad_claims(text, kwargs, error, message):
    with pytest.raises(error, match=message):
        check_claim(text, n_draws=200, **kwargs)


def test_parse_number_bad_input():
    with pytest.raises(InputTypeError, match=r"`text` must be a string"):
        parse_number(12)
    with pytest.raises(InputError, match=r"no number found in 'galaxies'"):
        parse_number("galaxies")
    with pytest.raises(InputError, match=r"`value` must be finite and > 0"):
        format_count(0.0)
    with pytest.raises(InputError, match=r"`style` must be one of"):
        format_count(5.0, style="roman")
