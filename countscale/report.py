"""Results of a run → ``results.json``, ``report.md`` and the command line's summary.

Everything here reads the JSON-ready results dict that :func:`countscale.pipeline.run_survey`
builds; nothing computes science.

Topics
------
write_report
    Write the report folder; ``results.json`` last, atomically.
render_markdown, render_text
    The Markdown report and the plain-text summary ``countscale run`` prints.
results_json
    The dict as JSON text (finite numbers only).

How a report folder is written
------------------------------
The previous ``results.json`` (if any) is removed; the figures are drawn, each on its own: a
figure that fails is not drawn, and the report and ``results.json`` say why
(``figure_notes``), so a figure can never cost the run its numbers. Then ``report.md`` and
``results.json`` are written, ``results.json`` last, each to a temporary name in the folder
and renamed when complete (:func:`countscale._io.atomic_path`). So ``results.json`` exists
only when the whole report of one run is there; after an interrupted run the folder holds no
``results.json`` or the previous run's complete one, never a partial one.
"""

from __future__ import annotations

import json
import math
import os
import re
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any, NamedTuple

from countscale._io import atomic_path
from countscale._markdown_html import anchor
from countscale.errors import InputError, InputTypeError

__all__ = [
    "HTML_NAME",
    "REPORT_NAME",
    "RESULTS_NAME",
    "STAGE_SECTIONS",
    "StageSection",
    "WrittenReport",
    "render_html",
    "render_markdown",
    "render_text",
    "results_json",
    "summarise",
    "write_report",
]

RESULTS_NAME = "results.json"
REPORT_NAME = "report.md"
HTML_NAME = "report.html"


def results_json(results: Mapping[str, Any]) -> str:
    """JSON text of the results (indented; NaN or infinity is an error, not invalid JSON)."""
    if not isinstance(results, Mapping):
        raise InputTypeError(f"`results` must be a mapping; got {type(results).__name__}")
    return json.dumps(results, indent=2, allow_nan=False) + "\n"


# --------------------------------------------------------------------------------------------
# Rendering
# --------------------------------------------------------------------------------------------


def _ledger_rows(ledger: Mapping[str, Any]) -> list[tuple[str, int]]:
    rows = [
        ("read", ledger["rows_read"]),
        ("in footprint", ledger["rows_in_footprint"]),
        ("outside footprint", ledger["rows_outside_footprint"]),
        ("rejected", sum(ledger["rows_rejected"].values())),
    ]
    rows += [(f"rejected: {k}", v) for k, v in ledger["rows_rejected"].items() if v]
    return rows


def _bin_rows(results: Mapping[str, Any]) -> list[tuple[float, float, int, float]]:
    tally = results["tally"]
    edges = tally["mag_bins"]["edges"]
    area = results["footprint"]["area_deg2"]
    return [(edges[i], edges[i + 1], n, n / area / (edges[i + 1] - edges[i]))
            for i, n in enumerate(tally["counts"]) if n]


def _regions_line(regions: Mapping[str, Any]) -> str:
    per_region = [sum(row) for row in regions["counts"]]
    area = regions["area_deg2"]
    return (f"{regions['n_regions']} regions of HEALPix order {regions['order']}; "
            f"area {min(area):.4g}–{max(area):.4g} deg², sources {min(per_region):,d}–"
            f"{max(per_region):,d} per region")


def _title(results: Mapping[str, Any]) -> str:
    return results.get("survey", {}).get("name") or "countscale run"


# --------------------------------------------------------------------------------------------
# The summary: how many, how sure, and why
# --------------------------------------------------------------------------------------------

#: Readable names of error-budget entries (a name not listed is shown with its underscores
#: turned into spaces).
ERROR_SOURCES = {
    "poisson": "Poisson noise",
    "cosmic_variance": "cosmic variance",
    "completeness": "completeness correction",
    "count_model": "choice of count model",
    "area": "footprint area",
    "injections": "number of injections",
    "sky_model_fit": "sky-model fit",
    "sky_model_choice": "choice of sky covariates",
    "sky_model_extrapolation": "sky beyond the covariates observed",
    "cosmology": "cosmological parameters",
    "imf": "initial mass function",
    "luminosity_function": "luminosity-function fit",
    "mass_to_light": "mass-to-light ratio",
}

#: The totals a summary leads with, in order, when the run computed them.
_TOTAL_KEYS = ("sky_total", "present_day_volume_total", "light_cone_total", "stars_total",
               "stars_per_galaxy")

#: Below this area (deg²) a field's mean density is dominated by cosmic variance for most
#: galaxy samples: the summary then says so even without a [variance] section (common
#: figure, no source: cosmic variance of a few per cent at ~1-10 deg² for deep samples).
_SMALL_FIELD_DEG2 = 100.0


def _dominant(budget: Mapping[str, float], population: str | None = None
              ) -> dict[str, Any] | None:
    if not budget:
        return None
    name = max(budget, key=lambda k: (budget[k], k))
    label = ERROR_SOURCES.get(name, name.replace("_", " "))
    if name == "cosmic_variance" and population == "stars":
        label = "field-to-field scatter"  # the Galaxy's structure, not cosmic variance
    return {"name": name, "label": label, "share": float(budget[name])}


def _headline(key: str, label: str, estimate: Mapping[str, Any], cautions: Iterable[str] = (),
              definition: str | None = None, population: str | None = None) -> dict[str, Any]:
    return {
        "key": key,
        "label": label,
        "definition": definition,
        "median": estimate["median"],
        "interval_68": list(estimate["interval_68"]),
        "interval_95": list(estimate["interval_95"]),
        "unit": estimate.get("unit", ""),
        "dominant_error": _dominant(estimate.get("budget") or {}, population),
        "cautions": [c for c in cautions if c],
    }


def _sky_caution(area_deg2: float, target_deg2: float | None, modelled: bool = False) -> str:
    target = (f"{target_deg2:,.0f} deg²" if target_deg2 else "the target sky")
    share = (f" ({100 * area_deg2 / target_deg2:.2g} % of it)" if target_deg2 else "")
    if modelled:
        return (f"extrapolation beyond the surveyed sky: {area_deg2:.4g} deg² observed{share}; "
                f"a model of how the density changes across the sky carries it to {target}")
    return (f"extrapolation beyond the surveyed sky: {area_deg2:.4g} deg² observed{share}, "
            f"scaled to {target}; the rest of that sky is assumed to hold the same population")


def summarise(results: Mapping[str, Any]) -> dict[str, Any]:
    """The summary a report opens with (also ``results["summary"]``); reads results only.

    Returns
    -------
    dict
        ``survey``; ``population``; ``area`` (``area_deg2``, ``area_uncertainty_deg2``,
        ``sky_fraction``);
        ``sources`` (``in_footprint``, ``rows_read``, ``rejected``); ``m50`` (the footprint's
        median 50 % completeness magnitude, when known); ``headlines``: the run's headline
        numbers, each ``{key, label, definition, median, interval_68, interval_95, unit,
        dominant_error: {name, label, share}, cautions}`` (``key`` is where the number is in
        ``results.json``, ``cautions`` the plain-language cautions that go beside it: an
        extrapolation beyond the surveyed depth or sky says so there); ``cautions``: those
        about the whole run (the cosmic variance of a small field, a count model that fails
        its goodness-of-fit test).
    """
    fp, ledger = results["footprint"], results["ledger"]
    area = float(fp["area_deg2"])
    out: dict[str, Any] = {
        "survey": _title(results),
        "population": results["run"].get("population"),
        "area": {"area_deg2": area, "area_uncertainty_deg2": fp["area_uncertainty_deg2"],
                 "sky_fraction": fp["sky_fraction"]},
        "sources": {"in_footprint": ledger["rows_in_footprint"],
                    "rows_read": ledger["rows_read"],
                    "rejected": sum(ledger["rows_rejected"].values())},
        "m50": None,
        "headlines": [],
        "cautions": [],
    }
    comp = results.get("completeness")
    if comp:
        depth = comp.get("depth_map") or {}
        out["m50"] = depth.get("m50_median") or comp["m50"]["median"]
    population = results["run"].get("population")
    headlines = out["headlines"]
    counts = results.get("counts")
    if counts and "integral_counts" in counts:
        # What the survey measured first, then what it implies beyond its footprint.
        integral = counts["integral_counts"]
        m = integral["m_limit"]
        what = "stars" if population == "stars" else "sources"
        # Stars change across the sky: their mean is the observed fields', not the sky's.
        meaning = ("the mean over the observed fields" if population == "stars"
                   else "the population's mean density")
        headlines.append(_headline(
            "counts.integral_counts.per_deg2", f"{what.capitalize()} per deg² brighter than "
            f"m = {m:g} ({meaning})", integral["per_deg2"],
            definition=integral.get("note"), population=population))
    totals = results.get("totals") or {}
    definitions = totals.get("definitions") or {}
    cautions = totals.get("cautions") or {}
    details = totals.get("details") or {}
    stars_are_sky_total = "(sky_total)" in str(
        (details.get("stars") or {}).get("quantity_counted", ""))
    for key in _TOTAL_KEYS:
        if not isinstance(totals.get(key), Mapping):
            continue
        if key == "stars_total" and stars_are_sky_total:
            continue  # stars on the sky: the same number as sky_total, listed once
        extra = []
        if key == "sky_total" and not any("surveyed sky" in c for c in cautions.get(key, ())):
            sky_details = details.get("sky") or {}
            method = sky_details.get("method") or "isotropic"
            extra.append(_sky_caution(area, sky_details.get("target_area_deg2"),
                                      modelled=not method.startswith("isotropic")))
        if key in ("present_day_volume_total", "light_cone_total", "stars_total"):
            extra.append(_volume_caution(results, details.get("volume") or {},
                                         light_cone=key == "light_cone_total"))
        headlines.append(_headline(f"totals.{key}", _total_label(key, totals, details),
                                   totals[key], [*extra, *cautions.get(key, ())],
                                   definitions.get(key), population))
    sky = results.get("sky_model")
    sky_method = str((details.get("sky") or {}).get("method") or "")
    if sky and "total" in sky and not (isinstance(totals.get("sky_total"), Mapping)
                                       and sky_method.startswith("sky model")):
        # (When the totals' sky_total is the sky model's, it is listed once, above.)
        outside = sky.get("fraction_outside_observed_range") or {}
        caution = [_sky_caution(area, sky.get("target_sky", {}).get("area_deg2"),
                                modelled=True)]
        if outside.get("area", 0) > 0:
            caution.append(f"{100 * outside['area']:.3g} % of the target lies outside the "
                           "covariates the fields observed: the model is extrapolated there")
        what = "Stars" if population == "stars" else "Sources"
        headlines.append(_headline("sky_model.total", f"{what} brighter than "
                                   f"m = {sky['mag_limit']:g} over the target sky (sky model)",
                                   sky["total"], [*caution, *sky.get("warnings", ())],
                                   sky.get("naive_note"), population))
    out["cautions"] = _run_cautions(results, area)
    return out


def _short_volume(volume: Mapping[str, Any]) -> str:
    """``"the observable universe"`` from ``"the observable universe (the comoving ...)"``."""
    text = volume.get("volume") or "the volume"
    return text.split(" (")[0]


def _total_label(key: str, totals: Mapping[str, Any], details: Mapping[str, Any]) -> str:
    unit = (totals[key].get("unit") or "sources").strip()
    sky, volume = details.get("sky") or {}, details.get("volume") or {}
    limit = f" {volume['limit_text']}" if volume.get("limit_text") else ""
    if key == "sky_total":
        m = sky.get("m_limit")
        target = sky.get("target_sky")
        where = "the whole sky" if target in (None, "whole sky") else "the target sky"
        return (f"{unit.capitalize()} brighter than m = {m:g} over {where}" if m is not None
                else f"{unit.capitalize()} over {where}")
    if key == "present_day_volume_total":
        return (f"{unit.capitalize()}{limit} in {_short_volume(volume)} (today's density × "
                "its volume)")
    if key == "light_cone_total":
        return f"{unit.capitalize()}{limit} along our past light cone"
    if key == "stars_total":
        return f"Stars in {_short_volume(volume)}"
    if key == "stars_per_galaxy":
        mass = re.search(r"stellar mass (10\^[\d.]+ Msun)", totals.get("definitions", {})
                         .get(key, ""))
        return f"Stars in one galaxy of {mass[1]}" if mass else "Stars in one galaxy"
    return key.replace("_", " ").capitalize()


def _volume_caution(results: Mapping[str, Any], volume: Mapping[str, Any],
                    light_cone: bool = False) -> str:
    """An extrapolation beyond the surveyed volume, in words."""
    selection = (results.get("luminosity_function") or {}).get("selection") or {}
    z_range = volume.get("fit_redshift_range") or selection.get("redshift_range")
    measured = (f"measured at {z_range[0]:g} < z < {z_range[1]:g}" if z_range
                else "measured nearby")
    where = ("along our past light cone, far beyond that redshift" if light_cone
             else f"to {_short_volume(volume)}")
    return (f"extrapolation beyond the surveyed volume: the luminosity function was {measured} "
            f"over {results['footprint']['area_deg2']:.4g} deg²; this number carries it {where}")


def _run_cautions(results: Mapping[str, Any], area: float) -> list[str]:
    out = []
    variance = results.get("variance") or {}
    analytic = variance.get("analytic") or {}
    population = results["run"].get("population")
    if analytic.get("sigma_cv") is not None:
        sigma, poisson = analytic["sigma_cv"], variance.get("poisson_fraction")
        ratio = (f", {sigma / poisson:.2g} times its Poisson error" if poisson else "")
        out.append(
            f"Cosmic variance: galaxies cluster, so the mean density of a field of "
            f"{area:.4g} deg² differs from the mean over the whole sky by about "
            f"{100 * sigma:.2g} % (1σ, linear theory{ratio}). Densities and totals scaled from "
            "this field carry that error, and only more area or more separate fields shrink "
            "it; on scales smaller than linear theory handles it may be larger.")
    elif population != "stars" and area < _SMALL_FIELD_DEG2:
        out.append(
            f"Cosmic variance: this field covers {area:.4g} deg². Galaxies cluster, so the "
            "mean density of a field this small can differ from the sky's by several per cent "
            "or more; the run has no [variance] section, so its errors do not include this.")
    counts = results.get("counts") or {}
    fit = counts.get("fit") or {}
    p = fit.get("p_value")
    if p is not None and p < 0.05:
        out.append(f"The count model `{fit['model']}` does not describe the counts within their "
                   f"errors ({_p_value_text(fit).split(' (')[0]}); its parameters summarise a "
                   "curved relation" + (f"; `{counts['preferred']['model']}` is preferred"
                                        if counts.get("preferred") else "") + ".")
    return out


def _words(value: float, sig: int = 3) -> str:
    """A number for a general reader: ``420 million``, ``8,490``, ``3.1 × 10²²``."""
    if value == 0 or not math.isfinite(value):
        return f"{value:g}"
    magnitude = abs(value)
    if magnitude >= 1e15 or magnitude < 1e-3:
        exponent = math.floor(math.log10(magnitude))
        mantissa = f"{value / 10**exponent:.{sig - 1}f}"
        return f"{mantissa} × 10{str(exponent).translate(_SUPERSCRIPT)}"
    for scale, word in ((1e12, "trillion"), (1e9, "billion"), (1e6, "million")):
        if magnitude >= scale:
            return f"{_significant(value / scale, sig)} {word}"
    if magnitude >= 1000:
        return f"{round(value, sig - 1 - math.floor(math.log10(magnitude))):,.0f}"
    return _significant(value, sig)


_SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def _significant(value: float, sig: int) -> str:
    decimals = max(0, sig - 1 - math.floor(math.log10(abs(value))))
    return f"{value:.{decimals}f}"


def _range_words(pair: Iterable[float], sig: int = 3) -> str:
    lo, hi = (_words(v, sig) for v in pair)
    if " × 10" in lo and " × 10" in hi and lo.split(" × ")[1] == hi.split(" × ")[1]:
        return f"{lo.split(' × ')[0]}–{hi}"
    lo_parts, hi_parts = lo.rsplit(" ", 1), hi.rsplit(" ", 1)
    if (len(lo_parts) == 2 and len(hi_parts) == 2 and lo_parts[1] == hi_parts[1]
            and lo_parts[1] in ("million", "billion", "trillion")):
        return f"{lo_parts[0]}–{hi_parts[0]} {hi_parts[1]}"
    return f"{lo} to {hi}" if lo.startswith("-") or hi.startswith("-") else f"{lo}–{hi}"


def _unit_words(unit: str) -> str:
    return {"deg^-2": "per deg²", "Mpc^-3": "per Mpc³"}.get(unit, unit)


def _short_caution(cautions: Iterable[str]) -> str:
    """The extrapolations among a number's cautions, in a few words for its table cell:
    ``"extrapolation beyond the surveyed sky"``."""
    heads = [c.split(":")[0].strip() for c in cautions if ":" in c]
    heads = [h for h in heads if "extrapolation" in h and len(h) < 60]
    return "; ".join(dict.fromkeys(heads))


def _area_precision(area: Mapping[str, Any]) -> str:
    sigma = area["area_uncertainty_deg2"]
    if sigma < 1e-3:
        return "measured to better than 0.001 deg²"
    return f"measured to ±{sigma:.2g} deg²"


def summary_markdown(summary: Mapping[str, Any]) -> list[str]:
    """The report's opening section from :func:`summarise`'s object."""
    area = summary["area"]
    sources = summary["sources"]
    out = [
        "## Summary",
        "",
        f"The survey covers **{area['area_deg2']:.4g} deg²** ({100 * area['sky_fraction']:.2g} % "
        f"of the sky, holes removed; {_area_precision(area)}) and "
        f"holds **{sources['in_footprint']:,d} catalogued sources** inside it "
        f"({sources['rejected']:,d} of {sources['rows_read']:,d} rows rejected, each counted "
        "in the row ledger)"
        + (f"; it detects half of the sources at magnitude {summary['m50']:.2f}"
           if summary.get("m50") else "") + ".",
    ]
    headlines = summary["headlines"]
    if headlines:
        out += [
            "",
            "| quantity | value | 68 % interval | 95 % interval | largest source of error "
            "(share of the variance) |",
            "|---|---:|---:|---:|---|",
        ]
        for item in headlines:
            unit = _unit_words(item["unit"])
            dominant = item["dominant_error"]
            source = (f"{dominant['label']}, {100 * dominant['share']:.0f} %" if dominant
                      else "not broken down")
            note = _short_caution(item["cautions"])
            flag = f" — ⚠ {note}" if note else (" ⚠" if item["cautions"] else "")
            out.append(f"| {item['label']}{flag} | **{_words(item['median'])}** {unit} | "
                       f"{_range_words(item['interval_68'])} | "
                       f"{_range_words(item['interval_95'])} | {source} |")
        flagged = [item for item in headlines if item["cautions"]]
        for item in flagged:
            text = "; ".join(c.rstrip(".") for c in item["cautions"])
            out += ["", f"> ⚠ **{item['label']}:** {text[0].upper() + text[1:]}."]
        out += ["", "The intervals hold the true value with 68 % and 95 % probability if the "
                    "run's models hold. Poisson noise is the chance in counting a finite number "
                    "of sources; " + ("field-to-field scatter is how much the density of stars "
                    "differs between fields beyond that (the Galaxy's structure)"
                    if summary.get("population") == "stars" else "cosmic variance is how much "
                    "the density of a field this size differs from place to place because "
                    "galaxies cluster") + ". Each share is of the variance of log₁₀ of the "
                    "number; definitions and full error budgets are in the sections below."]
    else:
        out += ["", "This run computed no total: add `[counts]` (and `[totals]`) to the run "
                    "file for densities and totals with intervals."]
    for caution in summary["cautions"]:
        out += ["", f"> ⚠ {caution}"]
    return out


# --------------------------------------------------------------------------------------------
# One section per stage
# --------------------------------------------------------------------------------------------


class StageSection(NamedTuple):
    """How a stage's results appear in the report: its ``results.json`` key, the function
    of its block that renders its Markdown lines (from its ``## `` heading on), and its
    figures as ``(name in FIGURE_NAMES, words for the image)``, shown after the text."""

    key: str
    render: Any
    figures: tuple[tuple[str, str], ...] = ()


def _footprint_markdown(results: Mapping[str, Any]) -> list[str]:
    fp, ledger, tally = results["footprint"], results["ledger"], results["tally"]
    out = [
        "## Footprint and catalogue",
        "",
        f"Area {fp['area_deg2']:.6g} ± {fp['area_uncertainty_deg2']:.2g} deg² "
        f"({fp['area_sr']:.6g} sr, sky fraction {fp['sky_fraction']:.4g}); finest HEALPix "
        f"order {fp['max_order']}, {fp['n_cells']:,d} cells. "
        f"{_regions_line(tally['regions'])} (for jackknife errors).",
        "",
        "Every row of the catalogue, counted once:",
        "",
        "| rows | count |",
        "|---|---:|",
    ]
    out += [f"| {name} | {n:,d} |" for name, n in _ledger_rows(ledger)]
    notes = {k: v for k, v in ledger.get("notes", {}).items() if v}
    if notes:
        out += ["", "Notes: " + "; ".join(f"{k} {v:,d}" for k, v in notes.items()) + "."]
    out += _figure_markdown(results, "footprint", "footprint")
    rows = _bin_rows(results)
    out += [
        "",
        "<details>",
        f"<summary>Sources in each of the {len(rows)} magnitude bins (raw, before any "
        "correction)</summary>",
        "",
        f"Bins: {tally['mag_bins']['grid']} grid. Density is per deg² per magnitude over the "
        "footprint's covered area (no completeness correction). Brighter than the first edge: "
        f"{tally['n_brighter']:,d}; at or fainter than the last edge: {tally['n_fainter']:,d}.",
        "",
        "| magnitude | sources | per deg² per mag |",
        "|---|---:|---:|",
    ]
    out += [f"| {lo:.4g}–{hi:.4g} | {n:,d} | {d:.4g} |" for lo, hi, n, d in rows]
    out += ["", "</details>"]
    if tally.get("extinction"):
        out += ["", _extinction_line(tally["extinction"])]
    return out


def render_markdown(results: Mapping[str, Any]) -> str:
    """The ``report.md`` text: the summary, one section per stage, provenance.

    ``report.html`` is made from this text (:func:`render_html`), so both say the same.
    """
    run = results["run"]
    survey = results.get("survey") or {}
    summary = results.get("summary") or summarise(results)
    out = [f"# {_title(results)}", ""]
    if survey.get("description"):
        out += [survey["description"], ""]
    out += [f"A countscale {results.get('countscale_version', '?')} report: run file "
            f"`{Path(run['runfile']).name}`, seed {run['seed']}, engine `{run['engine']}` "
            "(see [Provenance](#provenance) to repeat it).", ""]
    out += summary_markdown(summary)
    sections: list[list[str]] = [_footprint_markdown(results)]
    for section in STAGE_SECTIONS:
        if section.key in results:
            lines = section.render(results[section.key])
            for name, alt in section.figures:
                lines += _figure_markdown(results, name, alt)
            sections.append(lines)
    other = _other_warnings(results)
    if other:
        sections.append(["## Warnings", "", "Raised while the stages ran (stage: message):",
                         "", *[f"- {line}" for line in other]])
    if run.get("sections_not_run"):
        listed = ", ".join(f"[{s}]" for s in run["sections_not_run"])
        sections.append(["## Not run", "", f"The run file has {listed}; this version of "
                         "countscale has no stage that fits or reports them yet (the tally "
                         "used `[counts].bins` and `[variance].regions` where given)."])
    if results.get("provenance"):
        sections.append(_provenance_markdown(results["provenance"]))
    headings = [lines[0][3:] for lines in sections]
    out += ["", "Contents: " + " · ".join(f"[{h}](#{anchor(h)})" for h in headings) + "."]
    for lines in sections:
        out += ["", *lines]
    return "\n".join(out) + "\n"


def _provenance_markdown(prov: Mapping[str, Any]) -> list[str]:
    packages = ", ".join(f"{k} {v}" for k, v in prov.get("packages", {}).items() if v)
    out = [
        "## Provenance",
        "",
        f"countscale {prov['countscale_version']}, Python {prov['python']} on "
        f"{prov['platform']}; {packages}. Seed {prov['seed']}, engine `{prov['engine']}`"
        + (f" (scheduler `{prov['scheduler']}`)" if prov.get("scheduler") else "")
        + f"; started {prov['started_utc']}, finished {prov['finished_utc']} (UTC). The same "
        "seed and inputs give the same `results.json` apart from these two times.",
        "",
        "| input | key | bytes | SHA-256 |",
        "|---|---|---:|---|",
    ]
    for item in prov.get("inputs", []):
        digest = item["sha256"] + (" (size + ends)" if item["hashed"] != "whole file" else "")
        out.append(f"| `{item['path']}` | {item['key']} | {item['bytes']:,d} | `{digest}` |")
    runfile = prov.get("runfile") or {}
    out += ["", f"SHA-256 digests are of whole files, except that {prov['large_file_rule']}."]
    if runfile.get("text") is not None:
        out += ["", "<details>", f"<summary>The run file, `{Path(runfile['path']).name}` "
                f"(SHA-256 {runfile['sha256'][:16]}…)</summary>", "", "```toml",
                runfile["text"].rstrip("\n"), "```", "", "</details>"]
    return out


def render_html(markdown: str, title: str, figures_dir: str | os.PathLike) -> str:
    """``report.html``: the Markdown report as one page, figures embedded (no network)."""
    from countscale._markdown_html import markdown_to_html

    folder = Path(figures_dir)

    def image(src: str) -> bytes | None:
        path = folder / src
        return path.read_bytes() if path.is_file() and path.parent == folder else None

    return markdown_to_html(markdown, title, image)


def _other_warnings(results: Mapping[str, Any]) -> list[str]:
    """The run's warnings (``"stage: message"``) that its stage's block does not already show
    among its own ``warnings`` or ``notes``."""
    out = []
    for line in results.get("run", {}).get("warnings", []):
        stage, _, message = line.partition(": ")
        block = results.get(stage)
        shown = ()
        if isinstance(block, Mapping):
            shown = (*block.get("warnings", ()), *block.get("notes", ()))
        if message not in shown:
            out.append(line)
    return out


def _figure_markdown(results: Mapping[str, Any], name: str, alt: str) -> list[str]:
    """The figure's image line, and a line for each part of it left empty (and why)."""
    out = []
    figure = results.get("figures", {}).get(name)
    if figure:
        out += ["", f"![{alt}]({figure})"]
    notes = results.get("figure_notes", {}).get(name, [])
    if notes:
        out += ["", f"About the {alt} figure: " + "; ".join(n.rstrip(".") for n in notes) + "."]
    return out


def _p_value_text(fit: Mapping[str, Any]) -> str:
    """``p = 0.31``, or ``p < 0.005`` when no bootstrap redraw was as extreme as the data."""
    from countscale.counts import format_p_bound

    p = fit.get("p_value")
    if p is None:
        return ""
    if fit.get("p_value_is_bound"):
        return (f"p < {format_p_bound(p)} (none of {fit.get('n_bootstrap', '?')} bootstrap "
                "redraws was as extreme)")
    return f"p = {p:.3g}"


def _estimate(obj: Mapping[str, Any]) -> str:
    from countscale.estimate import Estimate

    return Estimate.from_json(obj).format()


def _completeness_markdown(comp: Mapping[str, Any]) -> list[str]:
    out = [
        "## Completeness",
        "",
        f"{comp['model']} curve fitted to {comp['n_injections_fitted']:,d} of "
        f"{comp['n_injections']:,d} injections (`{comp['injections']}`).",
        "",
        f"- m50 = {_estimate(comp['m50'])}",
        f"- m90 = {_estimate(comp['m90'])}",
        f"- width = {_estimate(comp['width'])}",
    ]
    depth = comp.get("depth_map")
    if depth and depth.get("nside"):
        out += [
            f"- depth map `{depth['path']}` (nside {depth['nside']}): m50 from "
            f"{depth['m50_min']:.3f} to {depth['m50_max']:.3f}, median {depth['m50_median']:.3f}"
            + ("; injections were moved to the median depth before fitting, so the curve is "
               "the shape at one depth and the map places it tile by tile"
               if depth.get("shifted_injections") else ""),
        ]
    extinction = comp.get("extinction")
    if extinction:
        per_region = [a for a in extinction["region_mean_extinction_mag"] if a is not None]
        out += [
            f"- extinction: counts are in dereddened magnitudes, so each part of the footprint "
            f"is complete to a limit moved brighter by its extinction: m50 (dereddened) from "
            f"{extinction['m50_dereddened_min']:.3f} to {extinction['m50_dereddened_max']:.3f}; "
            f"mean extinction per region from {min(per_region):.3f} to "
            f"{max(per_region):.3f} mag",
        ]
    out += [f"- Note: {note.rstrip('.')}." for note in comp.get("notes", [])]
    out += ["", "Intervals are 68 %; they reflect the finite number of injections only."]
    return out


def _extinction_line(ext: Mapping[str, Any]) -> str:
    source = (f"band `{ext['band']}`, {ext['coefficient_source']}" if ext.get("band")
              else "given in the run file")
    return (f"Magnitudes are dereddened per source: m − R·E(B−V) at the source's pixel of "
            f"`{ext['path']}` (nside {ext['nside']}), R = {ext['coefficient']:g} ({source}). "
            f"Over the footprint E(B−V) runs from {ext['ebv_min']:.3g} to {ext['ebv_max']:.3g} "
            f"(extinction {ext['extinction_mean_mag']:.3g} mag on average, "
            f"{ext['extinction_max_mag']:.3g} at most).")


def _contamination_markdown(cont: Mapping[str, Any]) -> list[str]:
    method = ("a star/galaxy classifier column" if cont["method"] == "classifier"
              else "a star catalogue of the same footprint, subtracted bin by bin")
    out = [
        "## Stars among the sources",
        "",
        f"From {method}. The star fraction is stars / all sources in the bin, with its 68 % "
        "interval" + (" (Clopper-Pearson)." if cont["method"] == "classifier" else "."),
    ]
    fractions = [f for f in cont["fraction"] if f is not None]
    if fractions:
        out[-1] += (f" It runs from {min(fractions):.3f} to {max(fractions):.3f} over the "
                    "magnitude bins.")
    out += [
        "",
        "<details>",
        f"<summary>Stars and galaxies in each of the {sum(1 for n in cont['n_sources'] if n)} "
        "magnitude bins</summary>",
        "",
        "| magnitude | sources | stars | galaxies | star fraction |",
        "|---|---:|---:|---:|---:|",
    ]
    edges = cont["mag_edges"]
    for i, n in enumerate(cont["n_sources"]):
        if not n:
            continue
        stars, gal = cont["n_stars"][i], cont["n_galaxies"][i]
        frac, (lo, hi) = cont["fraction"][i], cont["fraction_interval_68"][i]
        star_text = f"{stars:,.0f}" + (f" ± {cont['n_stars_err'][i]:,.0f}"
                                       if cont["n_stars_err"][i] else "")
        out.append(f"| {edges[i]:.4g}–{edges[i + 1]:.4g} | {n:,.0f} | {star_text} | "
                   f"{gal:,.0f} ± {cont['n_galaxies_err'][i]:,.0f} | "
                   + ("–" if frac is None else f"{frac:.3f} ({lo:.3f}–{hi:.3f})") + " |")
    out += ["", "</details>"]
    for note in cont.get("notes", []):
        out += ["", f"Note: {note.rstrip('.')}."]
    return out


def _target_item_text(item: Mapping[str, Any]) -> str:
    kind = item["kind"]
    if kind == "galactic_latitude_above":
        return f"|b| ≥ {item['b_deg']:g}°"
    if kind == "galactic_latitude_below":
        return f"|b| < {item['b_deg']:g}°"
    params = ", ".join(f"{k} {v}" for k, v in item.items() if k != "kind")
    return f"{kind} ({params})"


def _sky_model_markdown(sky: Mapping[str, Any]) -> list[str]:
    target = sky["target_sky"]
    items = target["items"]
    target_text = items if isinstance(items, str) else " ∪ ".join(
        _target_item_text(item) for item in items)
    total, naive = sky["total"], sky["naive"]
    units = sky["units"]
    outside = sky["fraction_outside_observed_range"]
    out = [
        "## Sky model: a population that changes across the sky",
        "",
        f"Counts of {units['n_observed']:,d} sources brighter than {sky['mag_limit']:g} in "
        f"{units['n_units']} units ({units['n_fields']} separate fields, split along the "
        f"jackknife regions) fitted on sky covariates, then integrated over the target sky "
        f"({target_text}; {target['area_deg2']:,.1f} deg² at nside {target['nside']}).",
        "",
        f"- **sources brighter than {sky['mag_limit']:g} over the target sky: "
        f"{_estimate(total)}** (95 %: {total['interval_95'][0]:.3g}–"
        f"{total['interval_95'][1]:.3g})"
        + (f" — **{100 * outside['area']:.3g} % of the target ({100 * outside['total']:.3g} % "
           "of this total) lies outside the covariate range the survey observed: an "
           "extrapolation, with a widened interval**" if outside["area"] > 0 else
           "; every part of the target lies within the covariate range the fields observed"),
        f"- plain area scaling: {_estimate(naive)}"
        + (f", {sky['naive_over_model']:.3g} × the model" if sky.get("naive_over_model")
           else "") + f" ({sky['naive_note']})",
        "- budget (shares of the variance of log10 of the total): "
        + ", ".join(f"{k} {v:.0%}" for k, v in total.get("budget", {}).items()),
        "",
        "| covariates | weight (AIC) | dispersion α | χ²/dof | total (68 %) |",
        "|---|---:|---:|---:|---|",
    ]
    for fit, entry in zip(sky["model"]["sets"], sky["prediction"]["per_set"], strict=True):
        chi = fit["pearson_chi2"] / fit["dof"] if fit["dof"] > 0 else float("nan")
        out.append(f"| {', '.join(fit['covariates']) or '(constant)'} | {fit['weight']:.3f} | "
                   f"{fit['dispersion']:.3g} | {chi:.2f} | {_estimate(entry['total'])} |")
    out += [
        "",
        f"The model is log-linear in the covariates ({sky['model']['likelihood'].replace('_', ' ')}"
        " likelihood); the total's draws mix the sets by their Akaike weights, so the spread "
        "between sets is part of the interval. Completeness of the counted sources: at least "
        + (f"{units['completeness_min']:.3f}" if units.get("completeness_min") is not None
           else "1 (taken as complete)") + ".",
    ]
    for text in sky.get("warnings", []):
        out += ["", f"**Warning:** {text.rstrip('.')}."]
    for note in sky.get("notes", []):
        out += ["", f"Note: {note.rstrip('.')}."]
    return out


def _counts_markdown(counts: Mapping[str, Any]) -> list[str]:
    fit = counts["fit"]
    lo, hi = fit["fit_range"]
    out = [
        "## Number counts",
        "",
        f"Model `{fit['model']}` fitted by Poisson likelihood to {fit['n_sources']:,d} sources in "
        f"{fit['n_bins']} bins over {lo:g}–{hi:g} mag, through a forward model of completeness, "
        "effective area and photometric scatter. Intervals are 68 %; "
        + (f"errors include the jackknife over {fit['n_regions']} regions (clustering)."
           if fit.get("n_regions", 0) >= 3 else "errors are Poisson only."),
        "",
    ]
    stars = counts.get("stars")
    if stars:
        out += [
            f"**Stars subtracted:** {stars['n_stars_fit_range']:,d} of these sources are stars "
            f"of the star catalogue ([contamination]; {stars['n_stars_binned']:,d} in all bins, "
            f"{stars['n_stars_brighter']:,d} brighter than the bins fitted). The fit models "
            "each bin as galaxies + the catalogue's stars, so the model, the corrected counts "
            "and N(<m) below are of galaxies; the stars' Poisson noise is in their errors "
            "(budget share `stars`; conservative when the star catalogue lists the very stars "
            "of the catalogue).",
            "",
        ]
    out += ["| parameter | value | budget |", "|---|---|---|"]
    for name, value in fit.items():
        if isinstance(value, Mapping) and "median" in value:
            budget = ", ".join(f"{k} {v:.0%}" for k, v in value.get("budget", {}).items())
            out.append(f"| {name} | {_estimate(value)} | {budget} |")
    p = fit.get("p_value")
    out += [
        "",
        f"Goodness of fit: deviance {fit['deviance']:.1f} for {fit['dof']} degrees of freedom"
        + (f", parametric-bootstrap {_p_value_text(fit)}" if p is not None else "")
        + f"; AIC {fit['aic']:.1f}, BIC {fit['bic']:.1f}."
        + (" **The model does not describe these counts within their errors (p < 0.05): its "
           "parameters summarise a curved relation, compare the alternatives below.**"
           if p is not None and p < 0.05 else ""),
    ]
    alternatives = counts.get("alternatives") or {}
    if alternatives:
        out += ["", "| model | deviance | dof | AIC | BIC |", "|---|---:|---:|---:|---:|"]
        for name, alt in [(fit["model"], fit), *alternatives.items()]:
            out.append(f"| {name} | {alt['deviance']:.1f} | {alt['dof']} | {alt['aic']:.1f} | "
                       f"{alt['bic']:.1f} |")
    integral = counts["integral_counts"]
    out += ["", *_integral_markdown(integral)]
    normalisation = counts.get("normalisation")
    if normalisation:
        out += [
            "",
            f"Normalisation log10 n at m = {normalisation['reference_mag']:g}: population mean "
            f"{_estimate(normalisation['log10_norm'])} (Poisson ⊕ cosmic variance); this "
            f"field {_estimate(normalisation['log10_norm_this_field'])} (Poisson only).",
        ]
    preferred = counts.get("preferred")
    if preferred:
        out += [
            "",
            f"With `{preferred['model']}`, the model BIC prefers: N(<{integral['m_limit']:g}) = "
            f"{_estimate(preferred['integral_counts']['per_deg2'])}; over the footprint: "
            f"{_estimate(preferred['integral_counts']['total'])}.",
        ]
    for note in counts.get("notes", []):
        out += ["", f"Note: {note.rstrip('.')}."]
    return out


_LF_LABELS = {
    "m_star": "M* [mag]", "alpha": "α", "phi_star": "φ* [Mpc⁻³]",
    "log10_mass_star": "log10 M* [Msun]", "alpha_1": "α₁", "alpha_2": "α₂",
    "phi_star_1": "φ*₁ [Mpc⁻³ dex⁻¹]", "phi_star_2": "φ*₂ [Mpc⁻³ dex⁻¹]",
    "Q": "Q [mag per unit z]", "P": "P",
    "luminosity_density_mag": "luminosity density [mag Mpc⁻³]",
    "mass_density_msun_mpc3": "stellar mass density [Msun Mpc⁻³]",
    "number_density_mpc3": "number density [Mpc⁻³]",
}


def _luminosity_function_markdown(lf: Mapping[str, Any]) -> list[str]:
    sel, sample = lf["selection"], lf["sample"]
    what = "Luminosity function" if lf["quantity"] == "luminosity" else "Stellar-mass function"
    z_lo, z_hi = sel["redshift_range"]
    out = [
        f"## {what}",
        "",
        f"{sample['n_used']:,d} galaxies with {sel['mag_limits'][0]:g} ≤ m ≤ "
        f"{sel['mag_limits'][1]:g} and {z_lo:g} ≤ z ≤ {z_hi:g}, over "
        f"{sel['area_sr']:.5g} sr ({sel['volume_mpc3']:.4g} Mpc³ comoving), in "
        f"{sel['cosmology']} (H0 = {sel['H0']:g}; densities per Mpc³ with that H0). "
        f"Left out: {sample['n_outside_mag_limits']:,d} outside the apparent limits, "
        f"{sample['n_no_redshift']:,d} without a redshift, "
        f"{sample['n_outside_redshift_range']:,d} outside the redshift range"
        + (f", {sample['n_no_stellar_mass']:,d} without a stellar mass, "
           f"{sample['n_outside_mass_limits']:,d} outside the mass-completeness limits"
           if lf["quantity"] == "stellar_mass" else "") + ".",
    ]
    limit = sample.get("mass_limit")
    if limit is not None:
        pairs = ", ".join(f"{m:.2f} at z = {z:.3g}" for z, m in zip(limit["z"],
                                                                     limit["log10_mass"],
                                                                     strict=True))
        out += ["", f"Mass-completeness limit: {limit['assumption']}. log10 M_lim [Msun]: "
                    f"{pairs}."]
    sty = lf.get("sty")
    if sty is not None:
        evo = sty["evolution"]
        fitted = ", ".join(evo["fitted"]) or "none"
        evolution = (f"evolution Q = {evo['Q']:.3g}, P = {evo['P']:.3g}"
                     if lf["quantity"] == "luminosity" else f"density evolution P = {evo['P']:.3g}")
        count_error = ("jackknife over regions" if sty["normalisation"]["n_regions"] >= 3
                       else "Poisson")
        out += [
            "",
            f"STY maximum likelihood ({sty['model'].replace('_', ' ')}; {evolution}; fitted: "
            f"{fitted}). Intervals are 68 %; the "
            "shape's errors come from the likelihood's curvature, the normalisation's also "
            f"from the count ({count_error}) and the shape.",
            "",
            "| parameter | value | budget |",
            "|---|---|---|",
        ]
        for name, value in sty.items():
            if isinstance(value, Mapping) and "median" in value:
                budget = ", ".join(f"{k} {v:.0%}" for k, v in value.get("budget", {}).items())
                label = _LF_LABELS.get(name, name)
                if name == "number_density_mpc3":
                    label += f" (brighter than {sty['number_density_limit']:.4g})" \
                        if lf["quantity"] == "luminosity" else \
                        f" (above {sty['number_density_limit']:.4g} dex)"
                out.append(f"| {label} | {_estimate(value)} | {budget} |")
    for key, name in (("vmax", "1/Vmax"), ("swml", "SWML")):
        block = lf.get(key)
        if block is None:
            continue
        x = block[lf["x_name"]]
        out += ["", f"{name}: {len(x)} bins from {block['bin_lower'][0]:g} to "
                    f"{block['bin_upper'][-1]:g}; errors: {block['error_kind']}."]
    for note in lf.get("notes", []):
        out += ["", f"Note: {note.rstrip('.')}."]
    return out


def _integral_markdown(integral: Mapping[str, Any]) -> list[str]:
    m = integral["m_limit"]
    clustering = integral.get("cosmic_variance") or {}
    if "per_deg2_this_field" not in integral:  # results written before the two definitions
        return [f"Integral counts N(<{m:g}) = {_estimate(integral['per_deg2'])}."]
    kind = {"analytic": "Poisson ⊕ analytic cosmic variance",
            "jackknife": "Poisson + jackknife clustering (misses modes larger than the "
                         "footprint: too narrow)",
            "none": "Poisson only"}.get(clustering.get("method"), "")
    return [
        f"Integral counts N(<{m:g}), "
        f"{'galaxies' if 'n_stars_brighter' in integral else 'sources'} per deg² "
        f"({integral['note']}):",
        "",
        "| quantity | per deg² (68 %; 95 %) | over the footprint | errors |",
        "|---|---|---|---|",
        f"| population's mean density | {_estimate(integral['per_deg2'])}; 95 %: "
        f"{_interval(integral['per_deg2']['interval_95'])} | {_estimate(integral['total'])} | "
        f"{kind} |",
        f"| this field's realised density | {_estimate(integral['per_deg2_this_field'])}; "
        f"95 %: {_interval(integral['per_deg2_this_field']['interval_95'])} | "
        f"{_estimate(integral['total_this_field'])} | Poisson only |",
        "",
        "The population's mean density is what an extrapolation to other areas needs; this "
        "field's realised density is what this footprint holds (clustering made it what it "
        "is, so only Poisson noise blurs it)."
        + (f" Cosmic variance of this footprint's mean: σ = {clustering['sigma_cv']:.3g}."
           if clustering.get("sigma_cv") is not None else ""),
    ]


def _interval(pair: list[float]) -> str:
    return f"{pair[0]:.5g}–{pair[1]:.5g}"


def _variance_markdown(variance: Mapping[str, Any]) -> list[str]:
    m = variance["m_limit"]
    out = [
        "## Cosmic variance",
        "",
        f"Fractional (1σ) errors of the footprint's mean surface density of sources brighter "
        f"than m = {m:g} ({variance['m_limit_source']}; {variance['n_sources']:,d} sources "
        f"over {variance['area_deg2']:.4g} deg²):",
        "",
        "| error | fraction | what it is |",
        "|---|---:|---|",
        f"| Poisson | {variance['poisson_fraction']:.3g} | 1/√N |",
    ]
    jackknife = variance.get("jackknife")
    if jackknife:
        out.append(f"| jackknife clustering excess | {jackknife['clustering_fraction']:.3g} | "
                   f"{jackknife['n_regions']} regions; total jackknife "
                   f"{jackknife['sigma_fraction']:.3g}; sees scales smaller than the "
                   "footprint only |")
    analytic = variance.get("analytic")
    if analytic:
        out.append(f"| cosmic variance (analytic) | {analytic['sigma_cv']:.3g} | all scales, for "
                   "this footprint's shape |")
        out.append(f"| Poisson ⊕ cosmic variance | {variance['total_fraction']:.3g} | "
                   "the error of the population's mean density |")
        nz = analytic["nz"]
        power = analytic["power_spectrum"]
        ratio = variance.get("poisson_over_cosmic_variance")
        out += [
            "",
            f"Poisson / cosmic variance = {ratio:.3g}." if ratio is not None else "",
            "",
            f"Analytic: {analytic['angular_spectrum']['method']} ({power['model']}, "
            f"{power['cosmology']}, σ8 = {power['sigma8']:g}, n_s = {power['n_s']:g}), bias "
            f"{analytic['bias']:g}, n(z) from {nz['source']} (median z = {nz['median']:.3g}); "
            f"mask spectrum from the {analytic['mask']['method']}.",
        ]
        by_limit = analytic.get("by_mag_limit")
        if by_limit:
            pairs = ", ".join(f"{a:g}: {b:.3g}" for a, b in zip(by_limit["m_limit"],
                                                                by_limit["sigma_cv"],
                                                                strict=True))
            out += ["", f"Analytic cosmic variance by magnitude limit: {pairs}."]
        for note in analytic.get("notes", []):
            out += ["", f"Note: {note.rstrip('.')}."]
    comparison = variance.get("comparison")
    if comparison and comparison.get("analytic_over_jackknife") is not None:
        out += ["", f"Analytic / jackknife clustering excess = "
                    f"{comparison['analytic_over_jackknife']:.3g}."]
    for warning in variance.get("warnings", []):
        out += ["", f"**Warning:** {warning.rstrip('.')}."]
    return out


# --------------------------------------------------------------------------------------------
# Totals
# --------------------------------------------------------------------------------------------

#: The totals in the order reports list them, with a short label.
TOTALS_ORDER = (
    ("sky_total", "over the sky"),
    ("sky_total_naive", "plain area scaling"),
    ("present_day_volume_total", "present-day density × volume"),
    ("light_cone_total", "along our past light cone"),
    ("stars_total", "stars"),
    ("stars_per_galaxy", "stars per galaxy"),
)


def _sig(x: float, digits: int = 3) -> str:
    return f"{x:.{digits}g}" if 1e-3 <= abs(x) < 1e6 else f"{x:.{digits - 1}e}"


def _range(pair: list[float]) -> str:
    return f"{_sig(pair[0])} – {_sig(pair[1])}"


def _totals_markdown(totals: Mapping[str, Any]) -> list[str]:
    """The report's Totals section: the table, budgets, and why the definitions differ."""
    n_draws = totals.get("n_draws")
    definitions = totals.get("definitions", {})
    cautions = totals.get("cautions", {})
    out = [
        "## Totals",
        "",
        "What the survey implies beyond its footprint. Each total is a Monte Carlo estimate"
        + (f" ({n_draws:,d} draws of every uncertain input)" if n_draws else "")
        + "; its budget gives each input's share of the variance of log10 of the total. "
        "Read each number with its definition: they answer different questions.",
        "",
        "| total | median | 68 % | 95 % | dominant source | definition and caution |",
        "|---|---:|---|---|---|---|",
    ]
    for key, label in TOTALS_ORDER:
        est = totals.get(key)
        if not isinstance(est, Mapping):
            continue
        dominant = (totals.get("dominant_source") or {}).get(key)
        share = est.get("budget", {}).get(dominant) if dominant else None
        dominant_text = "—" if dominant is None else f"{dominant} ({share:.0%})"
        words = definitions.get(key, "")
        warn = "".join(f" **Caution: {c.rstrip('.')}.**" for c in cautions.get(key, []))
        out.append(f"| `{key}` ({label}) | {_sig(est['median'])} {est['unit']} | "
                   f"{_range(est['interval_68'])} | {_range(est['interval_95'])} | "
                   f"{dominant_text} | {words}.{warn} |")
    out += ["", "Budgets (shares of the variance of log10 of each total):", ""]
    for key, _ in TOTALS_ORDER:
        est = totals.get(key)
        if isinstance(est, Mapping) and est.get("budget"):
            out.append(f"- `{key}`: " + ", ".join(
                f"{k} {v:.1%}" for k, v in sorted(est["budget"].items(), key=lambda kv: -kv[1])))
    details = totals.get("details", {})
    sky = details.get("sky", {})
    explained = sky.get("naive_explained")
    if explained and "sky_total" in totals and "sky_total_naive" in totals:
        out += ["", "### Plain area scaling against `sky_total`", ""]
        ratio = explained["naive_over_sky_total"]
        if "scatter_factor" in explained:
            cv = explained.get("cosmic_variance_sigma")
            out.append(
                f"Plain area scaling gives {ratio:.4g} × `sky_total`. The raw count misses the "
                f"sources the survey did not detect (completeness: × "
                f"{explained['completeness_factor']:.4g}) and holds sources scattered across "
                f"the limit by photometric errors, more of them in than out on rising counts "
                f"(scatter, the Eddington bias: × {explained['scatter_factor']:.4g}); together "
                f"× {explained['expected_naive_over_sky_total']:.4g}."
                + (f" It also holds the stars of the star catalogue, which `sky_total` "
                   f"subtracts (× {explained['stars_factor']:.4g})."
                   if "stars_factor" in explained else "")
                + " The rest, × "
                f"{explained['this_field_over_model']:.4g}, is this field against the "
                "population's mean: large-scale structure made this footprint what it is"
                + (f" (cosmic variance σ = {cv:.3g}), and plain scaling carries it to the "
                   "whole target unchanged" if cv is not None else "")
                + ".")
        elif "structure_factor" in explained:
            out.append(
                f"Plain area scaling gives {ratio:.4g} × `sky_total`: completeness × "
                f"{explained['completeness_factor']:.4g}, and the population's change across "
                f"the sky × {explained['structure_factor']:.4g} ({explained['note']}).")
        holes = explained.get("holes")
        if holes:
            out.append("")
            out.append(
                f"Holes: the footprint's outline covers {holes['area_without_holes_deg2']:.5g} "
                "deg²; dividing the count by that area instead of the measured one would move "
                f"plain scaling by × {holes['naive_if_holes_ignored_factor']:.4g}.")
    count_models = sky.get("count_models")
    if count_models and count_models.get("weights"):
        out += ["", "Count models mixed in `sky_total` (" + count_models["criterion"]
                + f"; c_hat = {count_models['c_hat']:.3g}): "
                + ", ".join(f"{k} {w:.3g}" for k, w in count_models["weights"].items()) + "."]
    completeness = sky.get("completeness")
    if completeness:
        check = completeness["check"]
        out += ["", f"Completeness in the budget: {completeness['method']}; at "
                f"{check['n_sigma']:g}σ the refit moves the total by "
                f"{check.get('max_effect_dex', check.get('refit_dex', 0.0)):.2g} dex, the "
                f"linear form misses by {check['max_error_dex']:.2g} dex."]
    if sky.get("cosmic_variance"):
        out += ["", f"Cosmic variance in `sky_total`: {sky['cosmic_variance']['note']}."]
    volume = details.get("volume")
    if volume and "present_day_volume_total" in totals and "light_cone_total" in totals:
        out += ["", "### Present-day density × volume against the past light cone", "",
                f"Galaxies {volume['limit_text']}: filling {volume['volume']} with today's "
                f"density gives {volume['present_over_light_cone']:.3g} × the number along our "
                "past light cone. The light cone sees each shell as it was, when galaxies "
                "were different; the two are different questions, and quoted totals that "
                "disagree often answer different ones. "
                + volume["normalisation_cosmic_variance"]["note"].capitalize() + "."]
    stars = details.get("stars")
    if stars and "systematics" in stars:
        out += ["", "### Stars: stated systematics (not in the budget)", ""]
        out += [f"- {item['note']}: {item['effect_log10']:+.2f} dex"
                for item in stars["systematics"]]
        by_imf = stars.get("stars_per_galaxy_by_imf")
        if by_imf:
            out += ["", "Stars per galaxy, by IMF (`stars_per_galaxy` mixes them): "
                    + ", ".join(f"{name} {_sig(value)}" for name, value in by_imf.items())
                    + "."]
    elif stars:
        out += ["", f"`stars_total` counts {stars['quantity_counted']}."]
    for text in totals.get("warnings", []):
        out += ["", f"**Warning:** {text.rstrip('.')}."]
    not_computed = totals.get("not_computed", {})
    if not_computed:
        out += ["", "Not computed: " + "; ".join(f"`{k}` ({v})"
                                                 for k, v in not_computed.items()) + "."]
    return out


def _totals_text(totals: Mapping[str, Any]) -> list[str]:
    """The totals lines of the command line's summary."""
    lines = [""]
    head = "totals"
    for key, label in TOTALS_ORDER:
        est = totals.get(key)
        if not isinstance(est, Mapping):
            continue
        dominant = (totals.get("dominant_source") or {}).get(key)
        lines.append(f"{head:<16}{key} ({label}): {_sig(est['median'])} {est['unit']} "
                     f"(68 %: {_range(est['interval_68'])}; 95 %: "
                     f"{_range(est['interval_95'])})"
                     + (f"; dominant: {dominant}" if dominant else ""))
        head = ""
    lines += [f"                WARNING: {w}" for w in totals.get("warnings", [])]
    return lines


#: The report's sections after the summary and the footprint, in order. A stage adds its
#: entry here: its results key, a function of its block returning Markdown lines (from its
#: ``## `` heading on), and its figures (names in :data:`FIGURE_NAMES`, with their words).
STAGE_SECTIONS: list[StageSection] = [
    StageSection("completeness", _completeness_markdown, (("completeness", "completeness"),)),
    StageSection("counts", _counts_markdown, (("counts", "number counts"),)),
    StageSection("luminosity_function", _luminosity_function_markdown,
                 (("luminosity_function", "luminosity function"),)),
    StageSection("variance", _variance_markdown,
                 (("variance", "cosmic variance against area"),)),
    StageSection("contamination", _contamination_markdown,
                 (("contamination", "stars among the sources"),)),
    StageSection("sky_model", _sky_model_markdown, (("sky_model", "sky model"),)),
    StageSection("totals", _totals_markdown,
                 (("totals", "totals with their intervals"),
                  ("totals_budget", "error budgets of the totals"))),
]


def render_text(results: Mapping[str, Any], files: Iterable[os.PathLike | str] = ()) -> str:
    """The plain-text summary ``countscale run`` prints."""
    run, ledger, fp, tally = (results["run"], results["ledger"], results["footprint"],
                              results["tally"])
    lines = [
        f"survey          {_title(results)}",
        f"run file        {run['runfile']}",
        f"engine          {run['engine']} (seed {run['seed']})",
        "",
        "row ledger",
    ]
    lines += [f"  {name:<32} {n:>14,d}" for name, n in _ledger_rows(ledger)]
    lines += [f"  note: {k:<26} {v:>14,d}" for k, v in ledger.get("notes", {}).items() if v]
    lines += [
        "",
        f"footprint       {fp['area_deg2']:.6g} ± {fp['area_uncertainty_deg2']:.2g} deg² "
        f"(order {fp['max_order']})",
        f"regions         {_regions_line(tally['regions'])}",
        f"magnitudes      {sum(tally['counts']):,d} sources in {len(tally['counts'])} bins "
        f"from {tally['mag_bins']['edges'][0]:g} to {tally['mag_bins']['edges'][-1]:g} "
        f"(brighter {tally['n_brighter']:,d}; fainter {tally['n_fainter']:,d}; every bin in "
        "report.md and results.json)",
    ]
    if "completeness" in results:
        comp = results["completeness"]
        lines += ["", f"completeness    {comp['model']}: m50 {_estimate(comp['m50'])}, "
                      f"m90 {_estimate(comp['m90'])}"]
        lines += [f"                note: {note}" for note in comp.get("notes", [])]
    if "variance" in results:
        variance = results["variance"]
        parts = [f"Poisson {variance['poisson_fraction']:.3g}"]
        if variance.get("jackknife"):
            parts.append(f"jackknife clustering {variance['jackknife']['clustering_fraction']:.3g}")
        if variance.get("analytic"):
            parts.append(f"cosmic variance (analytic) {variance['analytic']['sigma_cv']:.3g}")
            parts.append(f"total {variance['total_fraction']:.3g}")
        lines += ["", f"cosmic variance m < {variance['m_limit']:g}, fractional 1σ: "
                      + "; ".join(parts)]
        lines += [f"                warning: {w}" for w in variance.get("warnings", [])]
    if "counts" in results:
        fit = results["counts"]["fit"]
        integral = results["counts"]["integral_counts"]
        params = [f"{k} {_estimate(v)}" for k, v in fit.items()
                  if isinstance(v, Mapping) and "median" in v]
        lines += [
            "",
            f"number counts   {fit['model']} over {fit['fit_range'][0]:g}–{fit['fit_range'][1]:g}"
            f" mag: " + "; ".join(params),
            f"                deviance {fit['deviance']:.1f} / {fit['dof']} dof; "
            f"N(<{integral['m_limit']:g}) population mean = {_estimate(integral['per_deg2'])}",
        ]
        if "per_deg2_this_field" in integral:
            lines.append(f"                N(<{integral['m_limit']:g}) this field = "
                         f"{_estimate(integral['per_deg2_this_field'])} (Poisson only)")
        lines += [f"                note: {note}" for note in results["counts"].get("notes", [])]
    if "luminosity_function" in results:
        lf = results["luminosity_function"]
        sty = lf.get("sty")
        head = "luminosity fn" if lf["quantity"] == "luminosity" else "mass function"
        line = f"{head:<16}{lf['sample']['n_used']:,d} galaxies"
        if sty is not None:
            params = [f"{k} {_estimate(v)}" for k, v in sty.items()
                      if isinstance(v, Mapping) and "median" in v
                      and not k.endswith(("density_mag", "_mpc3"))]
            line += ": STY " + "; ".join(params)
        lines += ["", line]
        shown = [name for key, name in (("vmax", "1/Vmax"), ("swml", "SWML")) if key in lf]
        if shown:
            lines.append(f"                {' and '.join(shown)} in "
                         f"{len(lf[('vmax' if 'vmax' in lf else 'swml')]['phi'])} bins")
    if "contamination" in results:
        cont = results["contamination"]
        fractions = [f for f in cont["fraction"] if f is not None]
        lines += ["", f"stars among     {cont['method']}: star fraction per bin from "
                      f"{min(fractions):.3f} to {max(fractions):.3f}" if fractions else
                  "stars among     no source"]
    if "sky_model" in results:
        sky = results["sky_model"]
        outside = sky["fraction_outside_observed_range"]
        lines += [
            "",
            f"sky model       N(<{sky['mag_limit']:g}) over the target sky "
            f"({sky['target_sky']['area_deg2']:,.0f} deg²): {_estimate(sky['total'])}",
            f"                plain area scaling: {_estimate(sky['naive'])}",
        ]
        if outside["area"] > 0:
            lines.append(f"                WARNING: {100 * outside['area']:.3g} % of the target "
                         "lies outside the covariate range observed (an extrapolation)")
    if "totals" in results:
        lines += _totals_text(results["totals"])
    for name, notes in results.get("figure_notes", {}).items():
        lines += [f"figure {name:<9}{note}" for note in notes]
    other = _other_warnings(results)
    if other:
        lines += ["", "warnings        " + "\n                ".join(other)]
    if run.get("sections_not_run"):
        listed = ", ".join(f"[{s}]" for s in run["sections_not_run"])
        lines += ["", f"not run yet     {listed}",
                  "                (no stage in this version; the tally used [counts].bins and "
                  "[variance].regions where given)"]
    files = [str(f) for f in files]
    if files:
        lines += ["", "written         " + "\n                ".join(files)]
    lines += ["", *summary_text(results.get("summary") or summarise(results))]
    return "\n".join(lines)


def summary_text(summary: Mapping[str, Any]) -> list[str]:
    """The summary table ``countscale run`` ends with (the terminal's form of the report's
    opening section)."""
    area = summary["area"]
    lines = [
        "summary",
        f"  area                {area['area_deg2']:.4g} deg² ({100 * area['sky_fraction']:.2g} % "
        "of the sky)",
        f"  sources             {summary['sources']['in_footprint']:,d} in the footprint",
    ]
    if summary.get("m50"):
        lines.append(f"  half detected at    m = {summary['m50']:.2f}")
    for item in summary["headlines"]:
        dominant = item["dominant_error"]
        source = (f"{dominant['label']} {100 * dominant['share']:.0f} %"
                  if dominant else "not broken down")
        lines += [
            f"  {item['label']}",
            f"      {_words(item['median'])} {_unit_words(item['unit'])}   68 %: "
            f"{_range_words(item['interval_68'])}   95 %: {_range_words(item['interval_95'])}"
            f"   largest error: {source}",
        ]
        lines += [f"      ! {caution}" for caution in item["cautions"]]
    lines += [f"  ! {caution}" for caution in summary["cautions"]]
    return lines


# --------------------------------------------------------------------------------------------
# Writing
# --------------------------------------------------------------------------------------------


FIGURE_NAMES = {"footprint": "footprint.png", "completeness": "completeness.png",
                "counts": "counts.png", "luminosity_function": "luminosity_function.png",
                "variance": "variance.png", "contamination": "contamination.png",
                "sky_model": "sky_model.png", "totals": "totals.png",
                "totals_budget": "totals_budget.png"}


def figure_names(results: Mapping[str, Any], formats: Iterable[str],
                 footprint: Any = None) -> dict[str, str]:
    """The figures a report will draw ({name: file name}); empty unless "png" is a format.

    :func:`write_report` draws these and lists under ``results["figures"]`` the ones drawn.
    """
    if "png" not in tuple(formats):
        return {}
    names = []
    if footprint is not None:
        names.append("footprint")
    names += [name for name in ("completeness", "counts", "luminosity_function")
              if name in results]
    if (results.get("variance") or {}).get("area_curve"):
        names.append("variance")
    names += [name for name in ("contamination", "sky_model") if name in results]
    totals = results.get("totals") or {}
    if any(isinstance(v, Mapping) and "median" in v for v in totals.values()):
        names += ["totals", "totals_budget"]
    return {name: FIGURE_NAMES[name] for name in names}


class WrittenReport(NamedTuple):
    """What :func:`write_report` wrote: the files, and the results as ``results.json`` holds
    them (with ``figures`` and ``figure_notes`` as drawn)."""

    files: tuple[Path, ...]
    results: dict[str, Any]


def write_report(results: Mapping[str, Any], out_dir: str | os.PathLike,
                 formats: Iterable[str] = ("json", "markdown"),
                 footprint: Any = None, depth: Any = None) -> WrittenReport:
    """Write the report folder; ``results.json`` last (see the module docstring).

    Parameters
    ----------
    results : mapping
        JSON-ready results of a run.
    out_dir : path
        The folder (created if needed).
    formats : iterable of str
        ``"markdown"`` adds ``report.md``; ``"html"`` adds ``report.html`` (the same text as
        one self-contained page, figures embedded); ``"png"`` adds the figures (footprint,
        when `footprint` is given; one per stage that has one), which both reports show.
        ``results.json`` is always written: it marks a complete report.
    footprint : countscale.footprint.Footprint, optional
        For the footprint figure.
    depth : countscale.completeness.DepthMap, optional
        The depth map, drawn in the footprint figure's zoom.

    Returns
    -------
    WrittenReport
        The files written (``results.json`` last) and the results written: a copy of
        `results` whose ``figures`` maps each figure drawn to its file name and whose
        ``figure_notes`` says, per figure, what is empty in it and why, or why it was not
        drawn. The caller's mapping is not modified.
    """
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise InputError(f"`out_dir` '{out_dir}' exists and is not a folder")
    formats = tuple(formats)
    figures: dict[str, Any] = {}
    if "png" in formats:
        from countscale import plots

        title = _title(results)
        drawers = {
            "footprint": lambda p: plots.footprint_figure(footprint, p, title=title,
                                                          depth=depth),
            "completeness": lambda p: plots.completeness_figure(
                results["completeness"], p, title=f"{title}: detection completeness"),
            "counts": lambda p: plots.counts_figure(
                results["counts"], p, title=f"{title}: differential number counts"),
            "luminosity_function": lambda p: plots.luminosity_function_figure(
                results["luminosity_function"], p, title=f"{title}: "
                + ("luminosity" if results["luminosity_function"]["quantity"] == "luminosity"
                   else "stellar-mass") + " function"),
            "variance": lambda p: plots.variance_figure(
                results["variance"], p, title=f"{title}: Poisson and cosmic variance"),
            "contamination": lambda p: plots.contamination_figure(results["contamination"], p),
            "sky_model": lambda p: plots.sky_model_figure(
                results["sky_model"], p, title=f"{title}: sky model"),
            "totals": lambda p: plots.totals_figure(
                results["totals"], p, title=f"{title}: totals"),
            "totals_budget": lambda p: plots.totals_budget_figure(
                results["totals"], p, title=f"{title}: error budgets of the totals"),
        }
        for name in figure_names(results, formats, footprint):
            figures[name] = drawers[name]
    summary = summarise(results)
    results = {**{k: results[k] for k in ("countscale_version", "survey") if k in results},
               "summary": summary, **results}
    results["summary"] = summary
    results_json(results)  # refuse a results dict that cannot be written before any file moves

    out_dir.mkdir(parents=True, exist_ok=True)
    (out_dir / RESULTS_NAME).unlink(missing_ok=True)
    written = []
    drawn: dict[str, str] = {}
    figure_notes: dict[str, list[str]] = {}
    for name, draw in figures.items():
        path = out_dir / FIGURE_NAMES[name]
        try:
            notes = draw(path)  # plots write through atomic_path themselves
        except Exception as exc:  # a figure never costs the run its numbers
            first = (str(exc).strip().splitlines() or [""])[0]
            figure_notes[name] = [f"not drawn: {type(exc).__name__}: {first}".rstrip(": ")]
            continue
        drawn[name] = FIGURE_NAMES[name]
        if notes:
            figure_notes[name] = list(notes)
        written.append(path)
    results.pop("figures", None)
    results.pop("figure_notes", None)
    if drawn:
        results["figures"] = drawn
    if figure_notes:
        results["figure_notes"] = figure_notes
    contents: list[tuple[str, str]] = []
    if "markdown" in formats or "html" in formats:
        markdown = render_markdown(results)
        if "markdown" in formats:
            contents.append((REPORT_NAME, markdown))
        if "html" in formats:
            contents.append((HTML_NAME, render_html(markdown, _title(results), out_dir)))
    contents.append((RESULTS_NAME, results_json(results)))
    for name, text in contents:
        path = out_dir / name
        with atomic_path(path) as tmp:
            tmp.write_text(text, encoding="utf-8")
        written.append(path)
    return WrittenReport(tuple(written), results)
