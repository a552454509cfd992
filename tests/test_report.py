"""The report's summary, its number words, and the Markdown → HTML page.

Checks by construction on small results dicts (the numbers are chosen here, so what the
summary must say is known); the HTML is read back with the standard library's
``html.parser``.
"""

from __future__ import annotations

import base64
from html.parser import HTMLParser

import pytest

from countscale import report
from countscale._markdown_html import anchor, markdown_to_html


def _estimate(median, budget, unit="galaxies"):
    return {"median": median, "interval_68": [0.9 * median, 1.1 * median],
            "interval_95": [0.8 * median, 1.2 * median], "unit": unit, "budget": budget}


def _results(**extra):
    return {
        "survey": {"name": "Test field"},
        "run": {"runfile": "/x/survey.toml", "engine": "local", "seed": 1,
                "population": "galaxies", "sections_not_run": []},
        "ledger": {"rows_read": 110, "rows_in_footprint": 100, "rows_outside_footprint": 6,
                   "rows_rejected": {"mag_missing": 4}},
        "footprint": {"area_deg2": 2.0, "area_uncertainty_deg2": 0.01, "area_sr": 6.1e-4,
                      "sky_fraction": 4.8e-5, "max_order": 12, "n_cells": 10},
        **extra,
    }


TOTALS = {
    "sky_total": _estimate(4.3e8, {"poisson": 0.2, "cosmic_variance": 0.8}),
    "sky_total_naive": _estimate(4.1e8, {"poisson": 1.0}),
    "present_day_volume_total": _estimate(2.2e11, {"cosmic_variance": 0.7, "poisson": 0.3}),
    "stars_total": _estimate(4.7e21, {"mass_to_light": 0.9, "imf": 0.1}, unit="stars"),
    "warnings": ["a warning"],
    "definitions": {"sky_total": "galaxies brighter than 22 over the whole sky"},
    "cautions": {"sky_total": ["the total extrapolates the count models 0.2 mag beyond the "
                               "fitted range"]},
    "details": {"sky": {"m_limit": 22.0, "target_area_deg2": 41252.96,
                        "target_sky": "whole sky"},
                "volume": {"limit_text": "brighter than M = -17",
                           "volume": "the observable universe (the comoving volume inside "
                                     "the particle horizon)",
                           "fit_redshift_range": [0.01, 0.3]}},
}


def test_summary_leads_with_totals_their_errors_and_cautions():
    summary = report.summarise(_results(totals=TOTALS))
    assert summary["area"]["area_deg2"] == 2.0
    assert summary["sources"] == {"in_footprint": 100, "rows_read": 110, "rejected": 4}
    keys = [item["key"] for item in summary["headlines"]]
    # Plain area scaling is a comparison in the totals section, not a headline.
    assert keys == ["totals.sky_total", "totals.present_day_volume_total",
                    "totals.stars_total"]
    sky, volume, stars = summary["headlines"]
    assert sky["label"] == "Galaxies brighter than m = 22 over the whole sky"
    assert sky["dominant_error"] == {"name": "cosmic_variance", "label": "cosmic variance",
                                     "share": 0.8}
    # Beside an extrapolation beyond the surveyed sky and depth: a caution in words.
    assert sky["cautions"][0].startswith("extrapolation beyond the surveyed sky: 2 deg² "
                                         "observed (0.0048 % of it), scaled to 41,253 deg²")
    assert "0.2 mag beyond the fitted range" in sky["cautions"][1]
    assert volume["label"] == ("Galaxies brighter than M = -17 in the observable universe "
                               "(today's density × its volume)")
    assert "measured at 0.01 < z < 0.3" in volume["cautions"][0]
    assert stars["label"] == "Stars in the observable universe"
    assert stars["dominant_error"]["name"] == "mass_to_light"
    # In the table, beside the number: the extrapolation in a few words.
    table = "\n".join(report.summary_markdown(summary))
    assert ("| Galaxies brighter than m = 22 over the whole sky — ⚠ extrapolation beyond the "
            "surveyed sky | **430 million** galaxies | 387–473 million | 344–516 million | "
            "cosmic variance, 80 % |") in table
    # A small field without a [variance] section: the cosmic-variance caveat.
    assert any(c.startswith("Cosmic variance: this field covers 2 deg²")
               for c in summary["cautions"])


def test_summary_of_a_run_without_totals_and_a_failed_fit():
    counts = {"fit": {"model": "power_law", "p_value": 1 / 201, "p_value_is_bound": True,
                      "n_bootstrap": 200},
              "integral_counts": {"m_limit": 21.8, "note": "n",
                                  "per_deg2": _estimate(8490.0, {"poisson": 1.0}, "deg^-2")},
              "preferred": {"model": "double_power_law"}}
    variance = {"poisson_fraction": 0.0017, "analytic": {"sigma_cv": 0.023}}
    summary = report.summarise(_results(counts=counts, variance=variance))
    [only] = summary["headlines"]
    assert only["key"] == "counts.integral_counts.per_deg2" and only["cautions"] == []
    assert summary["cautions"][0].startswith("Cosmic variance: galaxies cluster, so the mean "
                                             "density of a field of 2 deg² differs from the "
                                             "mean over the whole sky by about 2.3 % (1σ, "
                                             "linear theory, 14 times its Poisson error)")
    assert "`power_law` does not describe the counts" in summary["cautions"][1]
    assert "(p < 0.005)" in summary["cautions"][1] and "`double_power_law`" in summary[
        "cautions"][1]
    text = "\n".join(report.summary_markdown(summary))
    assert "| Sources per deg² brighter than m = 21.8" in text and "**8,490** per deg²" in text
    assert "> ⚠ The count model" in text


@pytest.mark.parametrize("value, words", [
    (4.33e8, "433 million"), (9.62e10, "96.2 billion"), (2.0e12, "2.00 trillion"),
    (8490.0, "8,490"), (8496.0, "8,500"), (42.0, "42.0"), (4.68e21, "4.68 × 10²¹"),
    (0.00471, "0.00471"), (-21.285, "-21.3"), (3.2e-5, "3.20 × 10⁻⁵"),
])
def test_numbers_in_words(value, words):
    assert report._words(value) == words


def test_ranges_share_their_scale_word():
    assert report._range_words([4.24e8, 4.42e8]) == "424–442 million"
    assert report._range_words([9.0e8, 1.1e9]) == "900 million–1.10 billion"
    assert report._range_words([-21.3, -21.2]) == "-21.3 to -21.2"
    assert report._range_words([3.29e21, 6.62e21]) == "3.29–6.62 × 10²¹"


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.text = [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def test_markdown_to_html_subset():
    png = b"\x89PNG\r\n\x1a\nfake"
    markdown = "\n".join([
        "# Title <b>", "", "## Number counts", "", "Text with **bold**, `code <x>` and a "
        "[link](#number-counts); [counts] stays text; <script>alert(1)</script>.", "",
        "| a | b |", "|---|---:|", "| x \\| y | 1 |", "", "<details>", "<summary>Folded "
        "`table`</summary>", "", "- item one", "  continued", "- item two", "", "</details>",
        "", "> ⚠ **Caution:** beyond the data.", "", "![counts](counts.png)", "",
        "![gone](missing.png)", "", "```toml", "[a]", "b = \"<c>\"", "```",
    ])
    page = markdown_to_html(markdown, "T & T", lambda src: png if src == "counts.png" else None)
    parsed = _Collect()
    parsed.feed(page)
    tags = [t for t, _ in parsed.tags]
    assert "script" in tags  # the page's own print script only, in the head:
    assert tags.count("script") == 1 and "alert(1)" in "".join(parsed.text)
    assert ("h2", {"id": "number-counts"}) in parsed.tags
    assert ("a", {"href": "#number-counts"}) in parsed.tags
    cells = [a for t, a in parsed.tags if t == "td"]
    assert cells[0] == {"data-label": "a"} and cells[1] == {"class": "num", "data-label": "b"}
    assert "x | y" in parsed.text
    assert tags.count("details") == 1 and tags.count("li") == 2
    assert "item one continued" in parsed.text
    assert tags.count("blockquote") == 1 and tags.count("pre") == 1
    [img] = [a for t, a in parsed.tags if t == "img"]
    assert img["src"] == "data:image/png;base64," + base64.b64encode(png).decode()
    assert any("missing.png" in t for t in parsed.text)
    assert '"<c>"' in "".join(parsed.text) and "<title>T &amp; T</title>" in page


def test_anchors_are_githubs():
    assert anchor("Footprint and catalogue") == "footprint-and-catalogue"
    assert anchor("Sky model: a population that changes across the sky") == (
        "sky-model-a-population-that-changes-across-the-sky")
    assert anchor("Stars among the sources") == "stars-among-the-sources"
