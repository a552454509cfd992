"""Check a quoted total ("two trillion galaxies", "10^22 stars"): which definition decides it.

Topics
------
Parsing
    :func:`parse_number` (digits with separators, decimals, scientific notation, number words in
    short scale and compound forms, "hundreds of billions", "a few x 10^22"), :func:`parse_claim`
    (value or range, hedges and bounds, quantity, scope, mass and magnitude limits) returning a
    :class:`ParsedClaim`.
Formatting
    :func:`format_count` in three styles that :func:`parse_number` reads back.
Built-in scenarios (published inputs, each an Estimate with its error budget and sources)
    :func:`galaxies_light_cone`, :func:`galaxies_present_day`, :func:`stars_observable_universe`,
    :func:`stars_milky_way`.
Verdicts
    :func:`verdict`, :func:`check_claim` -> :class:`ClaimCheck` (``to_json``, ``summary``).

Parsing rules (no locale guessing)
----------------------------------
- A comma is always a thousands separator and must separate groups of exactly three digits
  ("2,000,000"); "1,5" is refused (write "1.5"). A space (or thin space) between digit groups is
  a separator when every later group has three digits ("30 000", "2 000 000"). The decimal mark
  is the point.
- Scale words are the short scale: billion = 10^9, trillion = 10^12. Words multiply when stacked
  ("a hundred thousand million" = 10^11, "million million" = 10^12, "thirty thousand million
  million million" = 3 x 10^22) and add when a smaller group follows ("two million three hundred
  thousand"); "and" between number words is ignored.
- Powers: "10^22", "10**22", "10²²", "1e22", "3 x 10^22" (x, ×, *, "times").
- Ranges: "A to B", "A-B", "between A and B", "from A to B". A bare first number takes the scale
  of the second ("200 to 300 billion"). The quoted value of a range is its middle in log (the
  geometric mean), since ranges of counts span factors.
- Hedges ("about", "roughly", "some", ...) are recorded and change nothing; bounds ("at least",
  "over", "more than" / "at most", "fewer than", "up to") turn the verdict into a bound check.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy import special

from countscale import cosmology as _cosmology
from countscale.errors import InputError, InputTypeError
from countscale.estimate import Estimate
from countscale.extrapolation import (
    MASS_FACTOR_FROM_CHABRIER,
    CosmologyDraws,
    Mixture,
    MultivariateNormal,
    Normal,
    get_imf,
    propagate,
    schechter_number_density_above,
)

__all__ = [
    "QUANTITIES",
    "SCOPES",
    "ClaimCheck",
    "ParsedClaim",
    "check_claim",
    "format_count",
    "galaxies_light_cone",
    "galaxies_present_day",
    "parse_claim",
    "parse_number",
    "stars_milky_way",
    "stars_observable_universe",
    "verdict",
]

QUANTITIES = ("galaxies", "stars")
SCOPES = ("observable_universe", "milky_way", "sky")

#: Ratio within which a quoted value is "the same order" as the estimate's 95 % interval.
SAME_ORDER_FACTOR = 3.0

# --------------------------------------------------------------------------------------------
# Number words
# --------------------------------------------------------------------------------------------
_UNITS = {
    "zero": 0,
    "one": 1,
    "two": 2,
    "three": 3,
    "four": 4,
    "five": 5,
    "six": 6,
    "seven": 7,
    "eight": 8,
    "nine": 9,
    "ten": 10,
    "eleven": 11,
    "twelve": 12,
    "thirteen": 13,
    "fourteen": 14,
    "fifteen": 15,
    "sixteen": 16,
    "seventeen": 17,
    "eighteen": 18,
    "nineteen": 19,
    "twenty": 20,
    "thirty": 30,
    "forty": 40,
    "fifty": 50,
    "sixty": 60,
    "seventy": 70,
    "eighty": 80,
    "ninety": 90,
}
_SCALES = {
    "thousand": 1e3,
    "million": 1e6,
    "billion": 1e9,
    "trillion": 1e12,
    "quadrillion": 1e15,
    "quintillion": 1e18,
    "sextillion": 1e21,
    "septillion": 1e24,
    "octillion": 1e27,
}
# "hundreds of", "billions of": [low, high) multipliers of the plural word.
_PLURALS = {"tens": (20.0, 100.0), "dozens": (24.0, 144.0), "hundreds": (200.0, 1000.0)}
_PLURALS.update({f"{k}s": (2 * v, 1000 * v) for k, v in _SCALES.items()})

_HEDGES = (
    "about",
    "around",
    "roughly",
    "approximately",
    "some",
    "nearly",
    "almost",
    "close to",
    "of order",
    "on the order of",
    "order of",
    "circa",
    "an estimated",
    "estimated",
    "something like",
    "perhaps",
    "maybe",
    "as many as",
    "~",
    "≈",
)
_LOWER_BOUNDS = (
    "at least",
    "more than",
    "over",
    "above",
    "in excess of",
    "upwards of",
    "no fewer than",
    "no less than",
    "greater than",
    ">",
)
_UPPER_BOUNDS = (
    "at most",
    "fewer than",
    "less than",
    "under",
    "up to",
    "no more than",
    "below",
    "<",
)

_SUPERSCRIPTS = str.maketrans("⁰¹²³⁴⁵⁶⁷⁸⁹⁻⁺", "0123456789-+")
_SUPERSCRIPT_RUN = re.compile(r"[⁰¹²³⁴⁵⁶⁷⁸⁹⁻⁺]+")


def _normalise(text: str) -> str:
    """Lower case; unicode signs to ASCII; superscript exponents to ^; separators removed."""
    out = text.lower()
    out = _SUPERSCRIPT_RUN.sub(lambda m: "^" + m.group(0).translate(_SUPERSCRIPTS), out)
    for a, b in (
        ("\u2212", "-"),
        ("\u2013", " - "),
        ("\u2014", " - "),
        ("×", " x "),
        ("\u00a0", " "),
        ("\u2009", " "),
        ("\u202f", " "),
        ("⊙", "sun"),
        ("\u2248", " ≈ "),
        ("**", "^"),
    ):
        out = out.replace(a, b)
    out = re.sub(r"\s*\^\s*", "^", out)
    out = re.sub(
        r"\b(?:ten|10) to the (?:power of )?(?P<e>\d+|[a-z]+(?:-[a-z]+)?)(?:th|st|nd|rd)?\b",
        _power_words,
        out,
    )
    # Spaces between digit groups: "30 000" -> "30000" when later groups have three digits.
    out = re.sub(r"\b\d{1,3}(?: \d{3})+\b(?!\.\d)", lambda m: m.group(0).replace(" ", ""), out)

    # Commas: only as thousands separators between groups of three digits.
    def commas(match: re.Match[str]) -> str:
        token = match.group(0)
        if not re.fullmatch(r"\d{1,3}(?:,\d{3})+(?:\.\d+)?", token):
            raise InputError(
                f"the number {token!r} has a comma that is not a thousands separator (commas "
                "must separate groups of three digits; the decimal mark is a point)"
            )
        return token.replace(",", "")

    out = re.sub(
        r"\d[\d,]*\d(?:\.\d+)?", lambda m: commas(m) if "," in m.group(0) else m.group(0), out
    )
    return out


def _power_words(match: re.Match[str]) -> str:
    """'ten to the power of twelve' -> '10^12' (the exponent in digits or words)."""
    exponent = match.group("e")
    if not exponent.isdigit():
        parts = exponent.split("-")
        if not all(p in _UNITS for p in parts):
            return match.group(0)
        exponent = str(sum(_UNITS[p] for p in parts))
    return f"10^{exponent}"


_TOKEN = re.compile(
    r"\d+(?:\.\d+)?(?:e[+-]?\d+)?(?:\^[+-]?\d+(?:\.\d+)?)?|\.\d+|[a-z]+(?:-[a-z]+)*|[~≈<>*+\-]|\S"
)


def _tokens(text: str) -> list[str]:
    return _TOKEN.findall(text)


def _is_digit_token(token: str) -> bool:
    return bool(re.match(r"\d|\.\d", token))


def _digit_value(token: str) -> float:
    if "^" in token:
        base, exponent = token.split("^")
        return float(base) ** float(exponent)
    return float(token)


def _word_parts(token: str) -> list[str]:
    """'twenty-five' -> ['twenty', 'five']; other hyphenated words stay whole."""
    parts = token.split("-")
    if len(parts) > 1 and all(p in _UNITS or p in _SCALES or p == "hundred" for p in parts):
        return parts
    return [token]


def _is_number_word(word: str) -> bool:
    return word in _UNITS or word in _SCALES or word == "hundred"


@dataclass
class _Span:
    """A number found in the token list: value or [low, high), its token range, its scale."""

    value: float
    low: float
    high: float
    start: int
    stop: int
    has_scale: bool
    bare: bool  # only digits, no scale word or power


def _scan_number(tokens: list[str], i: int) -> _Span | None:
    """Read the number starting at token i, or None if none starts there."""
    n = len(tokens)
    start = i
    words: list[str] = []
    first_value: float | None = None
    has_scale = False
    bare = True
    low_high: tuple[float, float] | None = None
    # "a few", "a hundred", "an estimated" (hedge handled elsewhere)
    if tokens[i] in ("a", "an") and i + 1 < n:
        nxt = tokens[i + 1]
        if nxt == "few":
            low_high = (2.0, 5.0)
            i += 2
        elif nxt in _SCALES or nxt == "hundred" or nxt == "dozen":
            words.append("one")
            i += 1
        else:
            return None
    elif tokens[i] in ("few", "several") and i > 0 and tokens[i - 1] != "a":
        return None
    elif tokens[i] in _PLURALS and i + 1 < n and tokens[i + 1] == "of":
        # "hundreds of billions", "billions of stars"
        lo, hi = _PLURALS[tokens[i]]
        j = i + 2
        mult = 1.0
        while j < n and (tokens[j] in _PLURALS or tokens[j] in _SCALES):
            if (
                j + 2 < n
                and tokens[j + 1] == "of"
                and tokens[j] in _PLURALS
                and (tokens[j + 2] in _PLURALS or tokens[j + 2] in _SCALES)
            ):
                plo, phi = _PLURALS[tokens[j]]
                lo, hi = lo * plo, hi * phi
                j += 2
            elif tokens[j] in _SCALES or tokens[j][:-1] in _SCALES:
                # "hundreds of billions": the last word names the unit, plural or not
                mult *= (
                    _SCALES[tokens[j].rstrip("s")]
                    if tokens[j] not in _SCALES
                    else _SCALES[tokens[j]]
                )
                j += 1
            else:
                break
        low, high = lo * mult, hi * mult
        value = math.sqrt(low * high)
        return _Span(value, low, high, start, j, True, False)
    if low_high is None and i < n and _is_digit_token(tokens[i]):
        first_value = _digit_value(tokens[i])
        bare = "^" not in tokens[i] and "e" not in tokens[i]
        i += 1
    # The stack of groups: (value, scale of the group).
    groups: list[tuple[float, float]] = []
    current = (
        first_value if first_value is not None else (0.0 if words or low_high is None else 1.0)
    )
    if low_high is not None:
        current = 1.0
    seen_word = bool(words)
    pending = list(words)
    while True:
        if tokens[i : i + 3] == ["and", "a", "half"] and (seen_word or first_value is not None):
            # "one and a half trillion", "2 and a half billion"
            current += 0.5
            i += 3
            continue
        if pending:
            word = pending.pop(0)
        elif (
            i < n
            and tokens[i] == "and"
            and (seen_word or first_value is not None)
            and i + 1 < n
            and any(_is_number_word(p) for p in _word_parts(tokens[i + 1]))
            and tokens[i + 1] not in _SCALES
        ):
            # "three hundred and fifty" (never "A and B" of a range: a range word follows digits)
            if first_value is not None and not seen_word:
                break
            i += 1
            continue
        elif (
            i < n
            and any(_is_number_word(p) for p in _word_parts(tokens[i]))
            and (
                seen_word
                or first_value is not None
                or low_high is not None
                or tokens[i] in _UNITS
                or tokens[i].split("-")[0] in _UNITS
                or tokens[i] in _SCALES
                or tokens[i] == "hundred"
            )
        ):
            parts = _word_parts(tokens[i])
            if first_value is not None and parts[0] in _UNITS:
                break  # "3 five" is not one number
            i += 1
            pending.extend(parts)
            continue
        elif (
            i + 1 < n
            and tokens[i] in ("x", "*", "times")
            and re.fullmatch(r"10\^[+-]?\d+(?:\.\d+)?", tokens[i + 1])
            and (first_value is not None or seen_word or low_high is not None)
        ):
            power = _digit_value(tokens[i + 1])
            current *= power
            for k, (value, scale) in enumerate(groups):
                groups[k] = (value * power, scale)
            bare = False
            has_scale = True
            i += 2
            continue
        else:
            break
        seen_word = True
        if word in _UNITS:
            if first_value is not None and current != 0 and not groups and word != "zero":
                break
            current += _UNITS[word]
        elif word == "hundred":
            current = (current or 1.0) * 100.0
            bare = False
        elif word in _SCALES:
            scale = _SCALES[word]
            value = current
            while groups and groups[-1][1] <= scale:
                value += groups.pop()[0]
            groups.append(((value or 1.0) * scale, scale))
            current = 0.0
            has_scale = True
            bare = False
    if not seen_word and first_value is None and low_high is None:
        return None
    total = sum(v for v, _ in groups) + current
    if low_high is not None:
        low, high = low_high[0] * total, low_high[1] * total
        return _Span(math.sqrt(low * high), low, high, start, i, True, False)
    return _Span(total, total, total, start, i, has_scale, bare and not seen_word)


def parse_number(text: str) -> float:
    """The number a short text states (its middle, for a range or "a few").

    Parameters
    ----------
    text : str
        E.g. ``"2,000,000,000,000"``, ``"1.5e11"``, ``"10^22"``, ``"3 × 10²²"``,
        ``"three hundred and fifty billion"``, ``"a hundred thousand million"``.

    Returns
    -------
    float

    Examples
    --------
    >>> parse_number("two trillion")
    2000000000000.0
    >>> parse_number("a hundred thousand million")
    100000000000.0
    >>> parse_number("30 000 million million million")
    3e+22
    """
    if not isinstance(text, str):
        raise InputTypeError(f"`text` must be a string; got {type(text).__name__}")
    tokens = _tokens(_normalise(text))
    for i in range(len(tokens)):
        span = _scan_number(tokens, i)
        if span is not None:
            return span.value
    raise InputError(f"no number found in {text!r}")


# --------------------------------------------------------------------------------------------
# Formatting (read back by parse_number)
# --------------------------------------------------------------------------------------------
def format_count(value: float, sig: int = 2, style: str = "scientific") -> str:
    """A count written for people, in a form :func:`parse_number` reads back exactly.

    Parameters
    ----------
    value : float
        > 0.
    sig : int
        Significant digits (>= 1).
    style : {"scientific", "words", "digits"}
        ``"7.1 × 10^11"``, ``"710 billion"``, ``"710,000,000,000"``.
    """
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating)):
        raise InputTypeError(f"`value` must be a number; got {type(value).__name__}")
    value = float(value)
    if not (math.isfinite(value) and value > 0):
        raise InputError(f"`value` must be finite and > 0; got {value!r}")
    if isinstance(sig, bool) or not isinstance(sig, int) or sig < 1:
        raise InputError(f"`sig` must be an integer >= 1; got {sig!r}")
    mantissa_text = f"{value:.{sig - 1}e}"
    mantissa, exponent = mantissa_text.split("e")
    exponent = int(exponent)
    if style == "scientific":
        if -3 <= exponent <= 3:
            return f"{float(mantissa_text):.{max(0, sig - 1 - exponent)}f}"
        return f"{mantissa} × 10^{exponent}"
    if style == "words":
        scales = sorted(((v, k) for k, v in _SCALES.items()), reverse=True)
        rounded = float(mantissa_text)
        for scale, word in scales:
            if rounded >= scale:
                in_scale = rounded / scale
                decimals = max(0, sig - 1 - math.floor(math.log10(in_scale) + 1e-12))
                text = f"{in_scale:.{decimals}f}"
                return f"{text} {word}"
        decimals = max(0, sig - 1 - exponent)
        return f"{rounded:.{decimals}f}"
    if style == "digits":
        rounded = float(mantissa_text)
        if exponent >= sig - 1:
            return f"{round(rounded):,}"
        return f"{rounded:,.{sig - 1 - exponent}f}"
    raise InputError(f"`style` must be one of scientific, words, digits; got {style!r}")


# --------------------------------------------------------------------------------------------
# Parsing a claim
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class ParsedClaim:
    """What a claim states, with everything it leaves open marked as assumed.

    Attributes
    ----------
    text : str
        The claim as given.
    value, low, high : float
        The quoted number (the middle of a range in log) and the range's ends (equal to
        ``value`` for a single number).
    quantity : {"galaxies", "stars"}
    scope : {"observable_universe", "milky_way", "sky"}
    hedges : tuple of str
        Hedging words found ("about", ...).
    bound : {"lower", "upper"} or None
        "at least"/"over" make the quote a lower bound, "at most"/"fewer than" an upper bound.
    log10_mass_min, log10_mass_max : float or None
        Galaxy stellar-mass cut stated in the text (or by option) [log10 Msun].
    mag_limit : float or None
        "brighter than magnitude m".
    z_max : float or None
        A redshift depth stated ("to z = 8").
    assumed : tuple of (str, str)
        (name, note) for each thing the text left open that a default filled.
    """

    text: str
    value: float
    low: float
    high: float
    quantity: str
    scope: str
    hedges: tuple[str, ...] = ()
    bound: str | None = None
    log10_mass_min: float | None = None
    log10_mass_max: float | None = None
    mag_limit: float | None = None
    z_max: float | None = None
    size_word: str | None = None
    assumed: tuple[tuple[str, str], ...] = ()

    def to_json(self) -> dict[str, Any]:
        return {
            "value": self.value,
            "low": self.low,
            "high": self.high,
            "quantity": self.quantity,
            "scope": self.scope,
            "hedges": list(self.hedges),
            "bound": self.bound,
            "log10_mass_min": self.log10_mass_min,
            "log10_mass_max": self.log10_mass_max,
            "mag_limit": self.mag_limit,
            "z_max": self.z_max,
        }


_MASS_UNIT = r"(?:solar[ -]masses|solar[ -]mass|msun|m_sun|m_solar|msol|m sun|suns)"
_NUM = r"(?:\d+(?:\.\d+)?(?:e[+-]?\d+)?(?:\^[+-]?\d+)?(?:\s*(?:x|\*|times)\s*10\^[+-]?\d+)?)"
_MASS_PHRASE = re.compile(
    rf"(?P<word>above|over|more massive than|heavier than|greater than|more than|at least|"
    rf"down to|larger than|>|below|under|less massive than|lighter than|less than|up to|<)?"
    rf"\s*(?:a (?:stellar )?mass of\s*)?(?P<num>{_NUM}(?:\s*(?:million|billion|thousand))*)\s*"
    rf"{_MASS_UNIT}"
)
_MAG_PHRASE = re.compile(
    r"(?:brighter than|to|down to|at|below)\s*(?:an? )?(?:apparent )?(?:magnitude|mag)\s*"
    r"(?:of\s*)?(?P<mag>\d+(?:\.\d+)?)|(?:[a-z]\s*<\s*|m\s*=\s*)(?P<mag2>\d+(?:\.\d+)?)\s*mag"
)
_Z_PHRASE = re.compile(
    r"(?:to|out to|up to|within|beyond|at)?\s*(?:a )?(?:redshift|z)\s*(?:of|=|<|~|≈)?\s*"
    r"(?P<z>\d+(?:\.\d+)?)\b"
)
_GALAXY_WORDS = re.compile(r"\bgalax(?:y|ies)\b")
_STAR_WORDS = re.compile(r"\b(?:stars?|suns)\b")
_NOUN_AFTER = re.compile(r"\s*(?:[a-z-]+\s+){0,3}?(?P<noun>[a-z]+)")

_MILKY_WAY = re.compile(
    r"milky way|our (?:own )?galaxy|galaxy like ours|galaxy like our own|galaxy such as ours|"
    r"\bper galaxy\b|\b(?:a|each|every|one|typical|the average|an average|a single|a large|"
    r"a big|a typical large|a typical) (?:large |big |typical |spiral |giant |)galaxy\b|"
    r"\bthe galaxy\b|\bin a galaxy\b"
)
_SKY = re.compile(r"\bsky\b|naked eye|brighter than|visible to the eye")
_UNIVERSE = re.compile(r"universe|cosmos|in existence|observable")

#: Galaxy size words -> (log10 mass min, log10 mass max) [Msun] (common figures, no source:
#: "dwarf" below ~10^9 Msun, "large"/"massive" above ~10^10 Msun).
_SIZE_WORDS = {
    "dwarf": (None, 9.0),
    "small": (None, 9.0),
    "faint": (None, 9.0),
    "large": (10.0, None),
    "massive": (10.0, None),
    "big": (10.0, None),
    "giant": (10.0, None),
    "bright": (10.0, None),
}


def _find_hedges(before: str) -> tuple[tuple[str, ...], str | None]:
    tail = before[-40:]
    hedges = []
    bound = None
    for phrase in sorted(_LOWER_BOUNDS + _UPPER_BOUNDS + _HEDGES, key=len, reverse=True):
        pattern = (
            re.escape(phrase)
            if not phrase.isalpha() and " " not in phrase
            else rf"\b{re.escape(phrase)}\b"
        )
        if re.search(rf"{pattern}\s*(?:an? estimated\s*)?(?:of\s*)?$", tail) or re.search(
            rf"{pattern}\s+(?:\w+\s+){{0,2}}$", tail
        ):
            if phrase in _LOWER_BOUNDS and bound is None:
                bound = "lower"
            elif phrase in _UPPER_BOUNDS and bound is None:
                bound = "upper"
            if phrase not in hedges and not any(phrase in h for h in hedges):
                hedges.append(phrase)
    return tuple(hedges), bound


def parse_claim(
    text: str,
    scope: str | None = None,
    log10_mass_min: float | None = None,
    log10_mass_max: float | None = None,
) -> ParsedClaim:
    """Read a quoted total: number or range, hedges, quantity, scope, limits.

    Parameters
    ----------
    text : str
        The claim, e.g. ``"about two trillion galaxies in the observable universe"``.
    scope : str, optional
        Overrides the scope read from the text (one of :data:`SCOPES`).
    log10_mass_min, log10_mass_max : float, optional
        Galaxy stellar-mass cut [log10 Msun], overriding words such as "dwarf" or "large".

    Raises
    ------
    InputError
        No number, a zero or negative count, an unknown quantity, an unknown scope, or a
        combination that means nothing (galaxies inside a galaxy).
    """
    if not isinstance(text, str):
        raise InputTypeError(f"`text` must be a string; got {type(text).__name__}")
    if not text.strip():
        raise InputError("claim text is empty; give a quoted number, e.g. '2 trillion galaxies'")
    norm = _normalise(text)
    assumed: list[tuple[str, str]] = []

    # Limits first, so their numbers are not taken for the count.
    mass_min = mass_max = None
    for match in list(_MASS_PHRASE.finditer(norm)):
        mass = parse_number(match.group("num"))
        if mass <= 0:
            raise InputError(f"a stellar mass must be > 0; got {match.group(0).strip()!r}")
        word = match.group("word") or ""
        if word in (
            "below",
            "under",
            "less massive than",
            "lighter than",
            "less than",
            "up to",
            "<",
        ):
            mass_max = math.log10(mass)
        else:
            mass_min = math.log10(mass)
        norm = norm[: match.start()] + " " * (match.end() - match.start()) + norm[match.end() :]
    mag_limit = None
    for match in list(_MAG_PHRASE.finditer(norm)):
        mag_limit = float(match.group("mag") or match.group("mag2"))
        norm = (
            norm[: match.start()]
            + " brighter than "
            + " " * max(0, match.end() - match.start() - 15)
            + norm[match.end() :]
        )
    z_max = None
    for match in list(_Z_PHRASE.finditer(norm)):
        if re.search(r"(?:redshift|z)", match.group(0)):
            z_max = float(match.group("z"))
            norm = norm[: match.start()] + " " * (match.end() - match.start()) + norm[match.end() :]

    tokens = _tokens(norm)
    spans: list[_Span] = []
    i = 0
    while i < len(tokens):
        span = _scan_number(tokens, i)
        if span is None:
            i += 1
            continue
        spans.append(span)
        i = max(span.stop, i + 1)
    if not spans:
        raise InputError(
            f"no number found in the claim {text!r}; quote a count, e.g. '2 trillion galaxies'"
        )
    first = spans[0]
    # Negative: a minus sign right before the number that is not a range dash.
    if (
        first.start > 0
        and tokens[first.start - 1] in ("-", "minus")
        and (first.start < 2 or not _is_digit_token(tokens[first.start - 2]))
    ):
        raise InputError(f"a count must be > 0; got a negative number in {text!r}")
    low, high, value = first.low, first.high, first.value
    stop = first.stop
    # Ranges.
    if len(spans) > 1:
        second = spans[1]
        between = tokens[first.stop : second.start]
        before = tokens[max(0, first.start - 2) : first.start]
        is_range = (
            between in (["to"], ["-"], ["and"], ["–"], ["or"])
            and (between != ["and"] or "between" in before)
            and (between != ["or"])
        )
        if is_range:
            lo_v, hi_v = first.value, second.value
            if (
                first.bare
                and second.has_scale
                and lo_v < hi_v / 1e3
                and lo_v * _scale_of(tokens, second) <= hi_v * 1.000001
            ):
                lo_v *= _scale_of(tokens, second)
            if lo_v <= 0 or hi_v <= 0:
                raise InputError(
                    f"a count must be > 0; got a range with {min(lo_v, hi_v)!r} in {text!r}"
                )
            low, high = min(lo_v, hi_v), max(lo_v, hi_v)
            value = math.sqrt(low * high)
            stop = second.stop
    if value <= 0 or low <= 0:
        raise InputError(f"a count must be > 0; got {value!r} in {text!r}")

    before_text = " ".join(tokens[: first.start])
    hedges, bound = _find_hedges(before_text)

    # Quantity: the first galaxy/star noun after the number, else anywhere.
    after_text = " ".join(tokens[stop:])
    quantity = _quantity(after_text) or _quantity(" ".join(tokens))
    if quantity is None:
        noun = _NOUN_AFTER.match(" " + after_text)
        found = noun.group("noun") if noun and after_text.strip() else "nothing"
        raise InputError(
            f"unknown quantity {found!r} in the claim {text!r}; known quantities: "
            f"{', '.join(QUANTITIES)}"
        )

    size_word = None
    for word, (lo_cut, hi_cut) in _SIZE_WORDS.items():
        if quantity == "galaxies" and re.search(rf"\b{word}\s+(?:\w+\s+)?galax", norm):
            size_word = word
            if mass_min is None and lo_cut is not None:
                mass_min = lo_cut
            if mass_max is None and hi_cut is not None:
                mass_max = hi_cut
            assumed.append(
                (
                    "size_word",
                    f"'{word}' read as stellar mass "
                    f"{f'above 10^{lo_cut:g}' if lo_cut else f'below 10^{hi_cut:g}'} "
                    "Msun (common figure, no source)",
                )
            )
            break
    if log10_mass_min is not None:
        mass_min = float(log10_mass_min)
    if log10_mass_max is not None:
        mass_max = float(log10_mass_max)
    if mass_min is not None and mass_max is not None and mass_min >= mass_max:
        raise InputError(
            f"the galaxy mass cut is empty: log10 mass min {mass_min:g} >= max {mass_max:g}"
        )

    # Scope.
    if scope is not None:
        if scope not in SCOPES:
            raise InputError(f"`--scope` must be one of {', '.join(SCOPES)}; got {scope!r}")
        the_scope = scope
    elif _MILKY_WAY.search(norm) and quantity == "stars":
        the_scope = "milky_way"
    elif _SKY.search(norm) or mag_limit is not None:
        the_scope = "sky"
    else:
        the_scope = "observable_universe"
        if not _UNIVERSE.search(norm):
            assumed.append(("scope", "no scope stated: the observable universe is assumed"))
    if the_scope == "milky_way" and quantity == "galaxies":
        raise InputError(
            f"scope milky_way applies to stars, not galaxies; got {text!r} (use --scope "
            "observable_universe)"
        )
    if (
        the_scope == "milky_way"
        and re.search(r"\bper galaxy\b|\btypical\b|\ba galaxy\b|\beach galaxy\b", norm)
        and not re.search(r"milky way|our (?:own )?galaxy|like ours|like our own", norm)
    ):
        assumed.append(("galaxy", "'a galaxy' read as one of the Milky Way's stellar mass"))
    return ParsedClaim(
        text=text,
        value=float(value),
        low=float(low),
        high=float(high),
        quantity=quantity,
        scope=the_scope,
        hedges=hedges,
        bound=bound,
        log10_mass_min=mass_min,
        log10_mass_max=mass_max,
        mag_limit=mag_limit,
        z_max=z_max,
        size_word=size_word,
        assumed=tuple(assumed),
    )


def _scale_of(tokens: list[str], span: _Span) -> float:
    """The product of the scale words and powers in a span (what a bare first number borrows)."""
    scale = 1.0
    for k in range(span.start, span.stop):
        token = tokens[k]
        for part in _word_parts(token):
            if part in _SCALES:
                scale *= _SCALES[part]
            elif part == "hundred":
                scale *= 100.0
        if k > span.start and re.fullmatch(r"10\^[+-]?\d+", token):
            scale *= _digit_value(token)
    return scale


def _quantity(text: str) -> str | None:
    g = _GALAXY_WORDS.search(text)
    s = _STAR_WORDS.search(text)
    if g and s:
        return "galaxies" if g.start() < s.start() else "stars"
    if g:
        return "galaxies"
    if s:
        return "stars"
    return None


# --------------------------------------------------------------------------------------------
# Published inputs
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Source:
    """A published input: what it is, the citation, and whether its numbers were checked."""

    key: str
    citation: str
    used_for: str
    status: str  # "published" (read in the paper or a faithful copy) or "from memory"

    def to_json(self) -> dict[str, str]:
        return {
            "key": self.key,
            "citation": self.citation,
            "used_for": self.used_for,
            "status": self.status,
        }


SOURCES = {
    "baldry2012": Source(
        "baldry2012",
        "Baldry et al. 2012, MNRAS 421, 621 (abstract; Table 1 errors)",
        "z < 0.06 stellar mass function (double Schechter, Chabrier IMF, H0 = 70)",
        "published (parameters); from memory (their errors)",
    ),
    "leja2020": Source(
        "leja2020",
        "Leja et al. 2020, ApJ 893, 111 (continuity model, appendix)",
        "stellar mass function evolution 0.2 < z < 3 (double Schechter, quadratic in z)",
        "published (as distributed with the paper's example code); H0 from memory",
    ),
    "song2016": Source(
        "song2016",
        "Song et al. 2016, ApJ 825, 5 (Table 3; abstract for slope errors)",
        "stellar mass functions at z = 4, 5, 6",
        "published (Table 3 read in a public copy)",
    ),
    "conselice2016": Source(
        "conselice2016",
        "Conselice et al. 2016, ApJ 830, 83",
        "comparison: 2.0 (+0.7/-0.6) x 10^12 galaxies above 10^6 Msun at z < 8",
        "published",
    ),
    "licquia2015": Source(
        "licquia2015",
        "Licquia & Newman 2015, ApJ 806, 96",
        "Milky Way stellar mass (6.08 +- 1.14) x 10^10 Msun",
        "published",
    ),
    "planck2018": Source(
        "planck2018",
        "Planck Collaboration 2020, A&A 641, A6 (Table 2)",
        "cosmology (astropy Planck18); H0 +- 0.42, Omega_m +- 0.0056",
        "published (central); from memory (errors)",
    ),
    "madau2014": Source(
        "madau2014",
        "Madau & Dickinson 2014, ARA&A 52, 415",
        "IMF conversion of stellar masses (Salpeter x 0.61 = Chabrier, x 0.66 = Kroupa)",
        "from memory",
    ),
    "kroupa2001": Source("kroupa2001", "Kroupa 2001, MNRAS 322, 231", "IMF", "published"),
    "chabrier2003": Source("chabrier2003", "Chabrier 2003, PASP 115, 763", "IMF", "published"),
    "salpeter1955": Source("salpeter1955", "Salpeter 1955, ApJ 121, 161", "IMF", "published"),
    "renzini1993": Source(
        "renzini1993",
        "Renzini & Ciotti 1993, ApJ 416, L49",
        "remnant masses (for the living-stars variant)",
        "from memory",
    ),
}

# Baldry et al. 2012 (MNRAS 421, 621), abstract: M* = 10^10.66, phi1 = 3.96e-3, alpha1 = -0.35,
# phi2 = 0.79e-3, alpha2 = -1.47 (Mpc^-3, H0 = 70). Their 1-sigma errors (Table 1; from memory):
# 0.05 dex, 0.34e-3, 0.18, 0.23e-3, 0.05; correlations not used (not at hand).
_BALDRY_MEAN = np.array([10.66, 3.96e-3, -0.35, 0.79e-3, -1.47])
_BALDRY_SIGMA = np.array([0.05, 0.34e-3, 0.18, 0.23e-3, 0.05])
_BALDRY_H = 0.70

# Leja et al. 2020 (ApJ 893, 111), continuity model: log phi1, log phi2, log M* at the anchor
# redshifts 0.2, 1.6, 3.0 (quadratic in z between them), alpha1, alpha2 constant; independent
# 1-sigma errors as the paper's appendix distributes them. Cosmology: WMAP9, h = 0.6932 (from
# memory).
_LEJA_Z = (0.2, 1.6, 3.0)
_LEJA_MEAN = np.array([-2.44, -3.08, -4.14, -2.89, -3.29, -3.51, 10.79, 10.88, 10.84, -0.28, -1.48])
_LEJA_SIGMA = np.array([0.02, 0.03, 0.1, 0.04, 0.03, 0.03, 0.02, 0.02, 0.04, 0.07, 0.1])
_LEJA_H = 0.6932

# Song et al. 2016 (ApJ 825, 5), Table 3: z, log M*, alpha, phi* [1e-5 Mpc^-3] (H0 = 70, from
# memory). Slope errors: the abstract gives +0.07/-0.06 at z = 4 and +0.34/-0.29 at z = 8; at
# z = 5, 6 they are interpolated linearly in z between those ends (0.13, 0.19).
_SONG = ((4.0, 10.50, -1.55, 25.68e-5), (5.0, 10.97, -1.70, 5.16e-5), (6.0, 10.72, -1.91, 1.35e-5))
_SONG_ALPHA_SIGMA = np.array([0.065, 0.125, 0.19])
_SONG_H = 0.70

#: The deepest redshift with a published anchor here; beyond it the z = 6 form is held fixed.
_LAST_ANCHOR_Z = 6.0

# Licquia & Newman 2015 (ApJ 806, 96): Milky Way stellar mass (6.08 +- 1.14) x 10^10 Msun.
_MILKY_WAY_MASS = (6.08e10, 1.14e10)

DEFAULT_GALAXY_LOG10_MASS_MIN = 6.0  # Conselice et al. 2016's limit, so the two compare
DEFAULT_LIGHT_CONE_Z_MAX = 8.0
DEFAULT_IMFS = {"kroupa": 0.5, "chabrier": 0.5}
DEFAULT_N_DRAWS = 10_000


def _quadratic_through(y: np.ndarray, z: np.ndarray) -> np.ndarray:
    """Quadratic in z through (z_i, y_i) at the three Leja anchors; y shape (n, 3) -> (n, nz)."""
    z1, z2, z3 = _LEJA_Z
    l1 = (z - z2) * (z - z3) / ((z1 - z2) * (z1 - z3))
    l2 = (z - z1) * (z - z3) / ((z2 - z1) * (z2 - z3))
    l3 = (z - z1) * (z - z2) / ((z3 - z1) * (z3 - z2))
    return y[:, :1] * l1 + y[:, 1:2] * l2 + y[:, 2:3] * l3


def _h_of(cosmo_draws: Mapping[str, np.ndarray]) -> np.ndarray:
    return np.asarray(cosmo_draws["H0"]) / 100.0


def _tail(limit_lo, limit_hi, log_mstar, terms):
    """n(> lo) - n(> hi) (hi None: no upper cut), arrays broadcast."""
    n = schechter_number_density_above(limit_lo, log_mstar, terms)
    if limit_hi is not None:
        n = n - schechter_number_density_above(limit_hi, log_mstar, terms)
    return n


def _baldry_density(params: np.ndarray, h: np.ndarray, lo: float, hi: float | None) -> np.ndarray:
    ratio = h / _BALDRY_H
    log_mstar = params[:, 0] - 2.0 * np.log10(ratio)
    terms = [(params[:, 1] * ratio**3, params[:, 2]), (params[:, 3] * ratio**3, params[:, 4])]
    return _tail(lo, hi, log_mstar, terms)


@dataclass(frozen=True)
class Scenario:
    """A built-in estimate: the total, what it means, where its inputs come from."""

    name: str
    definition: str
    estimate: Estimate
    sources: tuple[str, ...]
    effects: tuple[tuple[str, float | None, str], ...] = ()
    warnings: tuple[str, ...] = ()


def _cosmology_draws(cosmo: Any) -> CosmologyDraws:
    return _cached_cosmology_draws(None if cosmo is None else cosmo)


_COSMO_CACHE: dict[Any, CosmologyDraws] = {}


def _cached_cosmology_draws(cosmo: Any) -> CosmologyDraws:
    key = cosmo if isinstance(cosmo, (str, type(None))) else id(cosmo)
    if key not in _COSMO_CACHE:
        _COSMO_CACHE[key] = CosmologyDraws(cosmo)
    return _COSMO_CACHE[key]


def _light_cone_grid(z_max: float) -> tuple[np.ndarray, np.ndarray]:
    """Simpson nodes and weights on [0, z_max] (z = 0 replaced by a tiny z for dV/dz)."""
    n = 161
    z = np.linspace(0.0, z_max, n)
    w = np.ones(n)
    w[1:-1:2] = 4.0
    w[2:-1:2] = 2.0
    w *= (z[1] - z[0]) / 3.0
    return z, w


def _light_cone_density(
    values: Mapping[str, Any], z: np.ndarray, lo: float, hi: float | None
) -> np.ndarray:
    """n(> lo [, < hi], z) for each draw: shape (n_draws, len(z)) [Mpc^-3]."""
    h = _h_of(values["cosmology"])[:, None]
    leja = np.asarray(values["mass_function_z<3"])
    song_alpha = np.asarray(values["mass_function_z>3"])
    n_draws = leja.shape[0]
    # z <= 3: Leja et al. 2020 (held at its z = 0.2 form below 0.2, where it was not fitted).
    z_low = np.clip(z[z <= 3.0], _LEJA_Z[0], None)
    log_phi1 = _quadratic_through(leja[:, 0:3], z_low)
    log_phi2 = _quadratic_through(leja[:, 3:6], z_low)
    log_mstar = _quadratic_through(leja[:, 6:9], z_low)
    ratio = h / _LEJA_H
    terms = [
        (10.0**log_phi1 * ratio**3, leja[:, 9:10]),
        (10.0**log_phi2 * ratio**3, leja[:, 10:11]),
    ]
    n_low = _tail(lo, hi, log_mstar - 2.0 * np.log10(ratio), terms)
    # z = 4, 5, 6: Song et al. 2016; z = 3 -> 4 and beyond 6: see _interpolate_high.
    ratio_s = h / _SONG_H
    anchors_z = np.array([3.0] + [s[0] for s in _SONG] + [max(_LAST_ANCHOR_Z + 1e-9, z[-1])])
    n_anchor = np.empty((n_draws, anchors_z.size))
    n_anchor[:, 0] = (
        n_low[:, -1]
        if z[z <= 3.0][-1] == 3.0
        else _tail(
            lo,
            hi,
            _quadratic_through(leja[:, 6:9], np.array([3.0])) - 2.0 * np.log10(ratio),
            [
                (
                    10.0 ** _quadratic_through(leja[:, 0:3], np.array([3.0])) * ratio**3,
                    leja[:, 9:10],
                ),
                (
                    10.0 ** _quadratic_through(leja[:, 3:6], np.array([3.0])) * ratio**3,
                    leja[:, 10:11],
                ),
            ],
        )[:, 0]
    )
    for k, (_, log_ms, _alpha, phi) in enumerate(_SONG):
        a = song_alpha[:, k : k + 1]
        n_anchor[:, k + 1] = _tail(
            lo, hi, log_ms - 2.0 * np.log10(ratio_s), [(phi * ratio_s**3, a)]
        )[:, 0]
    n_anchor[:, -1] = n_anchor[:, -2]  # the z = 6 form held fixed beyond the last anchor
    z_high = z[z > 3.0]
    idx = np.clip(np.searchsorted(anchors_z, z_high, side="right") - 1, 0, anchors_z.size - 2)
    t = (z_high - anchors_z[idx]) / (anchors_z[idx + 1] - anchors_z[idx])
    log_n = np.log10(n_anchor)
    n_high = 10.0 ** (log_n[:, idx] * (1.0 - t) + log_n[:, idx + 1] * t)
    return np.concatenate([n_low, n_high], axis=1)


def _mass_window(
    log10_mass_min: float | None, log10_mass_max: float | None
) -> tuple[float, float | None]:
    lo = DEFAULT_GALAXY_LOG10_MASS_MIN if log10_mass_min is None else float(log10_mass_min)
    hi = None if log10_mass_max is None else float(log10_mass_max)
    if hi is not None and hi <= lo:
        raise InputError(f"galaxy mass cut must have min < max; got 10^{lo:g} to 10^{hi:g} Msun")
    return lo, hi


def _window_text(lo: float, hi: float | None) -> str:
    return f"10^{lo:g}-10^{hi:g} Msun" if hi is not None else f"above 10^{lo:g} Msun"


def _light_cone_inputs(cosmo: Any) -> dict[str, Any]:
    return {
        "mass_function_z<3": MultivariateNormal(_LEJA_MEAN, np.diag(_LEJA_SIGMA**2)),
        "mass_function_z>3": MultivariateNormal(
            np.array([s[2] for s in _SONG]), np.diag(_SONG_ALPHA_SIGMA**2)
        ),
        "cosmology": _cosmology_draws(cosmo),
    }


def _light_cone_function(lo: float, hi: float | None, z_max: float, cosmo: Any):
    z, w = _light_cone_grid(z_max)
    z_eval = np.where(z == 0, 1e-6, z)
    draws = _cosmology_draws(cosmo)

    def total(values: Mapping[str, Any]) -> np.ndarray:
        n = _light_cone_density(values, z, lo, hi)
        dv = draws.differential_volume_mpc3(z_eval, values["cosmology"])
        return (n * dv) @ w

    return total


def _central(inputs: Mapping[str, Any]) -> dict[str, Any]:
    return {k: v.central(1) for k, v in inputs.items()}


def galaxies_light_cone(
    log10_mass_min: float | None = None,
    log10_mass_max: float | None = None,
    z_max: float = DEFAULT_LIGHT_CONE_Z_MAX,
    n_draws: int = DEFAULT_N_DRAWS,
    rng: Any = 0,
    cosmo: Any = None,
) -> Scenario:
    """Galaxies above a stellar mass along our past light cone to ``z_max`` (whole sky).

    integral n(> M, z) dV/dz dz with the published evolution of the mass function: Leja et al.
    2020 (continuity model) for z <= 3, Song et al. 2016 at z = 4, 5, 6, log n interpolated
    linearly in z between z = 3 and the Song anchors and the z = 6 form held fixed beyond
    (no published anchor is used past z = 6; flagged). Faint limits below the data (~10^8 Msun
    at z < 3, ~10^7.3 at z = 4-6) extrapolate the Schechter forms.
    """
    lo, hi = _mass_window(log10_mass_min, log10_mass_max)
    z_top = float(z_max)
    if not 0 < z_top <= 10:
        raise InputError(f"`z_max` must be in (0, 10]; got {z_top!r}")
    inputs = _light_cone_inputs(cosmo)
    func = _light_cone_function(lo, hi, z_top, cosmo)
    estimate = propagate(func, inputs, "galaxies", n_draws=n_draws, rng=rng)
    warnings = [
        f"the mass functions are extrapolated below their data (~10^8 Msun at z < 3, ~10^7.3 "
        f"Msun at z = 4-6) down to 10^{lo:g} Msun",
    ]
    if z_top > _LAST_ANCHOR_Z:
        warnings.append(
            f"no published mass function is used beyond z = {_LAST_ANCHOR_Z:g}: the z = 6 form "
            f"is held fixed to z = {z_top:g}"
        )
    return Scenario(
        name="light_cone",
        definition=f"galaxies {_window_text(lo, hi)} along our past light cone to z = {z_top:g}",
        estimate=estimate,
        sources=("leja2020", "song2016", "planck2018", "conselice2016"),
        warnings=tuple(warnings),
    )


def _light_cone_central(lo, hi, z_max, cosmo) -> float:
    inputs = _light_cone_inputs(cosmo)
    return float(_light_cone_function(lo, hi, z_max, cosmo)(_central(inputs))[0])


def galaxies_present_day(
    log10_mass_min: float | None = None,
    log10_mass_max: float | None = None,
    z_max: float | None = None,
    n_draws: int = DEFAULT_N_DRAWS,
    rng: Any = 0,
    cosmo: Any = None,
) -> Scenario:
    """Today's galaxies above a stellar mass times a comoving volume ("present-day x volume").

    The z < 0.06 mass function of Baldry et al. 2012 times the volume of the observable
    universe (``z_max=None``) or of the shell z < ``z_max``. Below 10^8 Msun (the fit's lower
    limit) the double Schechter form is extrapolated.
    """
    lo, hi = _mass_window(log10_mass_min, log10_mass_max)
    draws = _cosmology_draws(cosmo)
    inputs = {
        "mass_function": MultivariateNormal(_BALDRY_MEAN, np.diag(_BALDRY_SIGMA**2)),
        "cosmology": draws,
    }

    def total(values):
        params = np.asarray(values["mass_function"])
        # Negative draws of a normalisation are unphysical: reflect them (rare at these errors).
        params = params.copy()
        params[:, 1] = np.abs(params[:, 1])
        params[:, 3] = np.abs(params[:, 3])
        n = _baldry_density(params, _h_of(values["cosmology"]), lo, hi)
        if z_max is None:
            volume = draws.horizon_volume_mpc3(values["cosmology"])
        else:
            volume = draws.comoving_volume_mpc3(0.0, z_max, values["cosmology"])
        return n * volume

    estimate = propagate(total, inputs, "galaxies", n_draws=n_draws, rng=rng)
    where = "the observable universe" if z_max is None else f"the volume to z = {z_max:g}"
    warnings = []
    if lo < 8.0:
        warnings.append(
            f"the z < 0.06 mass function is fitted above 10^8 Msun; it is extrapolated to 10^{lo:g}"
        )
    return Scenario(
        name="present_day",
        definition=f"today's galaxies {_window_text(lo, hi)} filling {where} "
        "(present-day density x volume)",
        estimate=estimate,
        sources=("baldry2012", "planck2018"),
        warnings=tuple(warnings),
    )


def _present_day_central(lo, hi, z_max, cosmo) -> float:
    h = np.array([_cosmology.hubble_h(cosmo)])
    n = float(_baldry_density(_BALDRY_MEAN[None, :], h, lo, hi)[0])
    if z_max is None:
        return n * _cosmology.observable_universe_volume_mpc3(cosmo)
    return n * _cosmology.comoving_volume_mpc3(0.0, z_max, cosmo=cosmo)


def _stars_per_msun(imf_name: str, turnoff: float | None = None, count_lo: float = 0.08) -> float:
    """Stars per Msun of a Chabrier-IMF stellar mass, counted with ``imf_name``."""
    imf = get_imf(imf_name)
    factor = MASS_FACTOR_FROM_CHABRIER[imf.name]
    return factor * imf.stars_per_solar_mass((count_lo, 100.0), (0.1, 100.0), turnoff)


def _imf_mixture(imfs: Mapping[str, float]) -> Mixture:
    return Mixture({name: _stars_per_msun(name) for name in imfs}, dict(imfs))


def stars_observable_universe(
    imfs: Mapping[str, float] | None = None,
    n_draws: int = DEFAULT_N_DRAWS,
    rng: Any = 0,
    cosmo: Any = None,
) -> Scenario:
    """Stars in the observable universe: rho* x horizon volume x stars per solar mass.

    rho* = integral of M Phi dM of the Baldry et al. 2012 mass function (Chabrier IMF),
    converted to each IMF of the mixture (Madau & Dickinson 2014) and divided by its mean
    mass (stars counted from 0.08 Msun, mass normalised over 0.1-100 Msun). A present-day
    density x volume total: it fills the horizon volume with today's stars.
    """
    imfs = dict(DEFAULT_IMFS if imfs is None else imfs)
    draws = _cosmology_draws(cosmo)
    inputs = {
        "mass_function": MultivariateNormal(_BALDRY_MEAN, np.diag(_BALDRY_SIGMA**2)),
        "imf": _imf_mixture(imfs),
        "cosmology": draws,
    }

    def total(values):
        p = np.abs(np.asarray(values["mass_function"]))
        p[:, 0] = np.asarray(values["mass_function"])[:, 0]
        p[:, 2] = np.asarray(values["mass_function"])[:, 2]
        p[:, 4] = np.asarray(values["mass_function"])[:, 4]
        rho = _baldry_rho(p, _h_of(values["cosmology"]))
        return rho * draws.horizon_volume_mpc3(values["cosmology"]) * np.asarray(values["imf"])

    estimate = propagate(total, inputs, "stars", n_draws=n_draws, rng=rng)
    return Scenario(
        name="stars_universe",
        definition="stars in the observable universe: today's stellar mass density x horizon "
        "volume / mean stellar mass (IMF " + " or ".join(imfs) + ")",
        estimate=estimate,
        sources=("baldry2012", "planck2018", "madau2014", "kroupa2001", "chabrier2003"),
        warnings=(
            "a present-day density x volume total: the horizon volume is filled with "
            "today's stellar mass density",
        ),
    )


def _baldry_rho(params: np.ndarray, h: np.ndarray) -> np.ndarray:
    """rho* = M* [phi1 Gamma(alpha1 + 2) + phi2 Gamma(alpha2 + 2)] [Msun Mpc^-3], in h."""
    ratio = h / _BALDRY_H
    mstar = 10.0 ** params[:, 0] / ratio**2
    return (
        mstar
        * ratio**3
        * (
            params[:, 1] * special.gamma(params[:, 2] + 2.0)
            + params[:, 3] * special.gamma(params[:, 4] + 2.0)
        )
    )


def _stars_universe_central(cosmo, imf="kroupa", turnoff=None, count_lo=0.08) -> float:
    h = np.array([_cosmology.hubble_h(cosmo)])
    rho = float(_baldry_rho(_BALDRY_MEAN[None, :], h)[0])
    return (
        rho
        * _cosmology.observable_universe_volume_mpc3(cosmo)
        * _stars_per_msun(imf, turnoff, count_lo)
    )


def stars_milky_way(
    imfs: Mapping[str, float] | None = None,
    n_draws: int = DEFAULT_N_DRAWS,
    rng: Any = 0,
) -> Scenario:
    """Stars in the Milky Way: its stellar mass (Licquia & Newman 2015) x stars per Msun."""
    imfs = dict(DEFAULT_IMFS if imfs is None else imfs)
    inputs = {"milky_way_mass": Normal(*_MILKY_WAY_MASS), "imf": _imf_mixture(imfs)}

    def total(values):
        return np.abs(np.asarray(values["milky_way_mass"])) * np.asarray(values["imf"])

    estimate = propagate(total, inputs, "stars", n_draws=n_draws, rng=rng)
    return Scenario(
        name="milky_way",
        definition="stars in a galaxy of the Milky Way's stellar mass (6.1 x 10^10 Msun) / mean "
        "stellar mass (IMF " + " or ".join(imfs) + ")",
        estimate=estimate,
        sources=("licquia2015", "madau2014", "kroupa2001", "chabrier2003"),
    )


# --------------------------------------------------------------------------------------------
# Verdicts
# --------------------------------------------------------------------------------------------
def verdict(value: float, estimate: Estimate, bound: str | None = None) -> str:
    """``consistent`` inside the 95 % interval, ``same_order`` within a factor 3 of it, else
    ``too_high``/``too_low``. A lower bound ("at least X") is consistent when X is at most the
    interval's top; an upper bound ("at most X") when X is at least its bottom."""
    lo, hi = estimate.interval_95
    if bound == "lower":
        if value <= hi:
            return "consistent"
        return "same_order" if value <= hi * SAME_ORDER_FACTOR else "too_high"
    if bound == "upper":
        if value >= lo:
            return "consistent"
        return "same_order" if value * SAME_ORDER_FACTOR >= lo else "too_low"
    if lo <= value <= hi:
        return "consistent"
    if value > hi:
        return "same_order" if value <= hi * SAME_ORDER_FACTOR else "too_high"
    return "same_order" if value * SAME_ORDER_FACTOR >= lo else "too_low"


@dataclass(frozen=True)
class Judgement:
    """One definition's estimate and what it says about the claim."""

    name: str
    definition: str
    estimate: Estimate
    verdict: str
    log10_ratio: float
    warnings: tuple[str, ...] = ()

    def to_json(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "definition": self.definition,
            "estimate": self.estimate.to_json(),
            "verdict": self.verdict,
            "log10_ratio": self.log10_ratio,
            "warnings": list(self.warnings),
        }


@dataclass(frozen=True)
class ClaimCheck:
    """The answer to a claim: the primary judgement, alternatives, assumptions, sources."""

    parsed: ParsedClaim
    primary: Judgement
    alternatives: tuple[Judgement, ...]
    assumptions: tuple[dict[str, Any], ...]
    sources: tuple[dict[str, str], ...]
    from_results: str | None = None
    extra: dict[str, Any] = field(default_factory=dict)

    def to_json(self) -> dict[str, Any]:
        """The object of the claim contract (extended with definitions and alternatives)."""
        parsed = self.parsed.to_json()
        return {
            "claim": self.parsed.text,
            "parsed": parsed,
            "estimate": self.primary.estimate.to_json(),
            "verdict": self.primary.verdict,
            "log10_ratio": self.primary.log10_ratio,
            "assumptions": [dict(a) for a in self.assumptions],
            "sources": [dict(s) for s in self.sources],
            "definition": self.primary.definition,
            "warnings": list(self.primary.warnings),
            "alternatives": [j.to_json() for j in self.alternatives],
            "results_file": self.from_results,
        }

    def summary(self) -> str:
        """One paragraph a non-specialist can read."""
        p = self.parsed
        quoted = _quoted_text(p)
        words = {
            "consistent": "is consistent with",
            "same_order": "is within a factor of 3 of (the same order as)",
            "too_high": "is too high for",
            "too_low": "is too low for",
        }
        est = self.primary.estimate
        sentences = [
            f"The claim quotes {quoted} {p.quantity}.",
            f"It {words[self.primary.verdict]} {self.primary.definition}: "
            f"{format_count(est.median)} (95 % range {format_count(est.interval_95[0])} to "
            f"{format_count(est.interval_95[1])}){_ratio_text(self.primary.log10_ratio)}.",
        ]
        for alt in self.alternatives:
            sentences.append(
                f"Under another definition, {alt.definition}, the estimate is "
                f"{format_count(alt.estimate.median)} and the claim {words[alt.verdict]} it"
                f"{_ratio_text(alt.log10_ratio)}."
            )
        moving = [a for a in self.assumptions if a.get("effect_log10") is not None]
        if moving:
            top = moving[0]
            sentences.append(
                f"The assumption that moves the answer most: {top['note']} "
                f"({top['effect_log10']:+.2f} dex)."
            )
        for a in self.assumptions:
            if a["effect_log10"] is None:
                sentences.append(a["note"][0].upper() + a["note"][1:] + ".")
        for w in self.primary.warnings:
            sentences.append("Note: " + w + ".")
        if self.from_results:
            sentences.append(f"The estimate comes from the run results in {self.from_results}.")
        return " ".join(sentences)

    def table_rows(self) -> list[tuple[str, str, str, str, str]]:
        rows = []
        for j in (self.primary, *self.alternatives):
            e = j.estimate
            rows.append(
                (
                    j.name,
                    f"{format_count(e.median)} ({format_count(e.interval_68[0])}–"
                    f"{format_count(e.interval_68[1])})",
                    f"{format_count(e.interval_95[0])}–{format_count(e.interval_95[1])}",
                    j.verdict,
                    f"{j.log10_ratio:+.2f}",
                )
            )
        return rows


def _quoted_text(p: ParsedClaim) -> str:
    bound = {"lower": "at least ", "upper": "at most "}.get(p.bound or "", "")
    if p.low != p.high:
        return f"{bound}{format_count(p.low)} to {format_count(p.high)}"
    return f"{bound}{format_count(p.value)}"


def _ratio_text(log10_ratio: float) -> str:
    if abs(log10_ratio) < 0.005:
        return ""
    direction = "above" if log10_ratio > 0 else "below"
    factor = 10 ** abs(log10_ratio)
    size = abs(log10_ratio)
    return f"; the quoted value is {size:.2f} dex (a factor {factor:.2g}) {direction} it"


def _judge(scenario: Scenario, parsed: ParsedClaim) -> Judgement:
    est = scenario.estimate
    return Judgement(
        name=scenario.name,
        definition=scenario.definition,
        estimate=est,
        verdict=verdict(parsed.value, est, parsed.bound),
        log10_ratio=math.log10(parsed.value / est.median),
        warnings=scenario.warnings,
    )


def _effect(name: str, changed: float, base: float, note: str) -> dict[str, Any]:
    return {"name": name, "effect_log10": math.log10(changed / base), "note": note}


def _sort_assumptions(items: list[dict[str, Any]]) -> tuple[dict[str, Any], ...]:
    quantified = sorted(
        (a for a in items if a["effect_log10"] is not None), key=lambda a: -abs(a["effect_log10"])
    )
    return tuple(quantified + [a for a in items if a["effect_log10"] is None])


def check_claim(
    text: str,
    scope: str | None = None,
    log10_mass_min: float | None = None,
    log10_mass_max: float | None = None,
    results: str | Path | Mapping[str, Any] | None = None,
    n_draws: int = DEFAULT_N_DRAWS,
    rng: Any = 0,
    cosmo: Any = None,
) -> ClaimCheck:
    """Parse a claim, compute the matching scenarios, and judge it under each definition.

    Parameters
    ----------
    text : str
        The quoted claim.
    scope : str, optional
        Overrides the scope read from the text (one of :data:`SCOPES`).
    log10_mass_min, log10_mass_max : float, optional
        Galaxy stellar-mass cut [log10 Msun] (default: from the text, else above 10^6 Msun).
    results : path or mapping, optional
        A run's ``results.json`` (or its parsed content): its ``"totals"`` Estimates replace
        the built-in scenarios.
    n_draws : int
        Monte Carlo draws per pass.
    rng : int or Generator
        Seed (the same seed gives identical answers).
    cosmo : FLRW, str or None
        Cosmology (default Planck18).
    """
    parsed = parse_claim(text, scope, log10_mass_min, log10_mass_max)
    assumptions = [
        {"name": name, "effect_log10": None, "note": note} for name, note in parsed.assumed
    ]
    if parsed.hedges:
        assumptions.append(
            {
                "name": "hedge",
                "effect_log10": None,
                "note": "hedged as "
                + ", ".join(repr(h) for h in parsed.hedges)
                + ("; checked as a bound" if parsed.bound else ""),
            }
        )
    if results is not None:
        return _check_against_results(parsed, results, assumptions)
    if parsed.scope == "sky":
        raise InputError(
            "scope sky (sources brighter than a magnitude) has no built-in scenario; give a "
            "run's results with --results RESULTS_JSON (its totals.sky_total)"
        )
    source_keys: list[str] = []
    if parsed.quantity == "galaxies":
        lo, hi = _mass_window(parsed.log10_mass_min, parsed.log10_mass_max)
        z_top = parsed.z_max if parsed.z_max is not None else DEFAULT_LIGHT_CONE_Z_MAX
        if parsed.log10_mass_min is None:
            assumptions.append(
                {
                    "name": "faint_mass_limit_default",
                    "effect_log10": None,
                    "note": f"no mass limit stated: galaxies above 10^{lo:g} Msun "
                    "are counted (the limit of Conselice et al. 2016)",
                }
            )
        light = galaxies_light_cone(lo, hi, z_top, n_draws, rng, cosmo)
        present = galaxies_present_day(lo, hi, None, n_draws, rng, cosmo)
        primary, alternatives = _judge(light, parsed), (_judge(present, parsed),)
        source_keys += list(light.sources) + list(present.sources)
        base = _light_cone_central(lo, hi, z_top, cosmo)
        present_base = _present_day_central(lo, hi, None, cosmo)
        assumptions.append(
            _effect(
                "definition",
                present_base,
                base,
                f"filling the observable universe with today's galaxies instead of counting along "
                f"the past light cone to z = {z_top:g}",
            )
        )
        alt_lo = 8.0 if lo < 8.0 else 6.0
        if hi is None or alt_lo < hi:
            assumptions.append(
                _effect(
                    "faint_mass_limit",
                    _light_cone_central(alt_lo, hi, z_top, cosmo),
                    base,
                    f"counting galaxies above 10^{alt_lo:g} instead of 10^{lo:g} Msun",
                )
            )
        if z_top > 4.0:
            assumptions.append(
                _effect(
                    "light_cone_depth",
                    _light_cone_central(lo, hi, 4.0, cosmo),
                    base,
                    f"stopping the light cone at z = 4 instead of z = {z_top:g}",
                )
            )
        assumptions.append(
            _effect(
                "present_day_volume",
                _present_day_central(lo, hi, z_top, cosmo),
                present_base,
                f"present-day density in the volume to z = {z_top:g} instead of the whole "
                "observable "
                "universe",
            )
        )
    elif parsed.scope == "observable_universe":
        scen = stars_observable_universe(None, n_draws, rng, cosmo)
        primary, alternatives = _judge(scen, parsed), ()
        source_keys += list(scen.sources)
        base = float(np.mean([_stars_universe_central(cosmo, i) for i in DEFAULT_IMFS]))
        assumptions += _star_effects(lambda **kw: _stars_universe_central(cosmo, **kw), base)
        assumptions.append(
            {
                "name": "definition",
                "effect_log10": None,
                "note": "stars are counted as today's stellar mass density filling the "
                "observable universe; no light-cone count of stars is built in",
            }
        )
        source_keys += ["salpeter1955", "renzini1993"]
    else:
        scen = stars_milky_way(None, n_draws, rng)
        primary, alternatives = _judge(scen, parsed), ()
        source_keys += list(scen.sources)
        base = float(np.mean([_MILKY_WAY_MASS[0] * _stars_per_msun(i) for i in DEFAULT_IMFS]))
        assumptions += _star_effects(
            lambda imf="kroupa", turnoff=None, count_lo=0.08: (
                _MILKY_WAY_MASS[0] * _stars_per_msun(imf, turnoff, count_lo)
            ),
            base,
        )
        source_keys += ["salpeter1955", "renzini1993"]
    sources = tuple(SOURCES[k].to_json() for k in dict.fromkeys(source_keys))
    return ClaimCheck(parsed, primary, alternatives, _sort_assumptions(assumptions), sources)


def _star_effects(central, base: float) -> list[dict[str, Any]]:
    return [
        _effect(
            "imf",
            central(imf="salpeter"),
            base,
            "a Salpeter IMF instead of Kroupa/Chabrier (many more low-mass stars)",
        ),
        _effect(
            "remnants",
            central(turnoff=1.0),
            base,
            "counting only stars alive in an old population (turnoff 1 Msun), with the "
            "stellar mass partly in remnants",
        ),
        _effect(
            "lower_mass_limit",
            central(count_lo=0.1),
            base,
            "counting stars from 0.1 instead of 0.08 Msun (the hydrogen-burning limit)",
        ),
    ]


_RESULTS_KEYS = {
    ("galaxies", "observable_universe"): ("light_cone_total", "present_day_volume_total"),
    ("galaxies", "sky"): ("sky_total",),
    ("stars", "sky"): ("sky_total",),
    ("stars", "observable_universe"): ("stars_total",),
}


def _check_against_results(parsed: ParsedClaim, results: Any, assumptions: list) -> ClaimCheck:
    label = "results"
    if isinstance(results, (str, Path)):
        path = Path(results)
        label = str(path)
        if not path.is_file():
            raise InputError(f"{path}: results file not found")
        try:
            data = json.loads(path.read_text())
        except (OSError, ValueError) as error:
            raise InputError(f"{path}: not a readable JSON file ({error})") from None
    elif isinstance(results, Mapping):
        data = results
    else:
        raise InputTypeError(f"`results` must be a path or a mapping; got {type(results).__name__}")
    totals = data.get("totals") if isinstance(data, Mapping) else None
    if not isinstance(totals, Mapping):
        raise InputError(f"{label}: key 'totals' missing or not an object (run the [totals] stage)")
    keys = _RESULTS_KEYS.get((parsed.quantity, parsed.scope))
    if keys is None:
        raise InputError(
            f"{label}: a run's totals hold no {parsed.quantity} in scope {parsed.scope}; "
            "use the built-in scenarios (no --results)"
        )
    judgements = []
    for key in keys:
        if key not in totals:
            if judgements:
                continue
            raise InputError(
                f"{label}: key 'totals.{key}' missing (needed for {parsed.quantity} "
                f"in scope {parsed.scope})"
            )
        try:
            est = Estimate.from_json(totals[key])
        except (InputError, InputTypeError) as error:
            raise InputError(f"{label}: key 'totals.{key}' is not an Estimate: {error}") from None
        if est.median <= 0:
            raise InputError(f"{label}: key 'totals.{key}' median must be > 0; got {est.median!r}")
        definition = {
            "light_cone_total": "the run's light-cone total",
            "present_day_volume_total": "the run's present-day density x volume total",
            "sky_total": "the run's whole-sky total",
            "stars_total": "the run's stars total",
        }[key]
        judgements.append(
            Judgement(
                name=key,
                definition=definition,
                estimate=est,
                verdict=verdict(parsed.value, est, parsed.bound),
                log10_ratio=math.log10(parsed.value / est.median),
            )
        )
    assumptions.append(
        {
            "name": "results",
            "effect_log10": None,
            "note": "the estimate is the run's own total; the run's report lists its assumptions",
        }
    )
    return ClaimCheck(
        parsed,
        judgements[0],
        tuple(judgements[1:]),
        _sort_assumptions(assumptions),
        (),
        from_results=label,
    )
