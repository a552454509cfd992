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
import os
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any, NamedTuple

from countscale._io import atomic_path
from countscale.errors import InputError, InputTypeError

__all__ = [
    "REPORT_NAME",
    "RESULTS_NAME",
    "WrittenReport",
    "render_markdown",
    "render_text",
    "results_json",
    "write_report",
]

RESULTS_NAME = "results.json"
REPORT_NAME = "report.md"


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


def render_markdown(results: Mapping[str, Any]) -> str:
    """The ``report.md`` text: ledger, footprint, counts per magnitude bin, regions."""
    run, ledger, fp, tally = (results["run"], results["ledger"], results["footprint"],
                              results["tally"])
    out = [
        f"# {_title(results)}",
        "",
        f"Run file `{run['runfile']}`; engine `{run['engine']}`; seed {run['seed']}; "
        f"countscale {results.get('countscale_version', '?')}.",
        "",
        "## Row ledger",
        "",
        "Every row of the catalogue, counted once.",
        "",
        "| rows | count |",
        "|---|---:|",
    ]
    out += [f"| {name} | {n:,d} |" for name, n in _ledger_rows(ledger)]
    notes = {k: v for k, v in ledger.get("notes", {}).items() if v}
    if notes:
        out += ["", "Notes: " + "; ".join(f"{k} {v:,d}" for k, v in notes.items()) + "."]
    out += [
        "",
        "## Footprint",
        "",
        f"Area {fp['area_deg2']:.6g} ± {fp['area_uncertainty_deg2']:.2g} deg² "
        f"({fp['area_sr']:.6g} sr, sky fraction {fp['sky_fraction']:.4g}); finest HEALPix "
        f"order {fp['max_order']}, {fp['n_cells']:,d} cells.",
        "",
        "## Counts per magnitude bin",
        "",
        f"Bins: {tally['mag_bins']['grid']} grid. Density is per deg² per magnitude over the "
        "footprint's covered area (no completeness correction).",
        "",
        "| magnitude | sources | per deg² per mag |",
        "|---|---:|---:|",
    ]
    out += [f"| {lo:.4g}–{hi:.4g} | {n:,d} | {d:.4g} |" for lo, hi, n, d in _bin_rows(results)]
    if tally.get("extinction"):
        out += ["", _extinction_line(tally["extinction"])]
    out += [
        "",
        f"Brighter than the first edge: {tally['n_brighter']:,d}; at or fainter than the last "
        f"edge: {tally['n_fainter']:,d}.",
        "",
        "## Regions (for jackknife errors)",
        "",
        _regions_line(tally["regions"]) + ".",
    ]
    out += _figure_markdown(results, "footprint", "footprint")
    if "completeness" in results:
        out += ["", *_completeness_markdown(results["completeness"])]
        out += _figure_markdown(results, "completeness", "completeness")
    if "luminosity_function" in results:
        out += ["", *_luminosity_function_markdown(results["luminosity_function"])]
        out += _figure_markdown(results, "luminosity_function", "luminosity function")
    if "variance" in results:
        out += ["", *_variance_markdown(results["variance"])]
        out += _figure_markdown(results, "variance", "cosmic variance against area")
    if "counts" in results:
        out += ["", *_counts_markdown(results["counts"])]
        out += _figure_markdown(results, "counts", "number counts")
    if "contamination" in results:
        out += ["", *_contamination_markdown(results["contamination"])]
        out += _figure_markdown(results, "contamination", "stars among the sources")
    if "sky_model" in results:
        out += ["", *_sky_model_markdown(results["sky_model"])]
        out += _figure_markdown(results, "sky_model", "sky model")
    if "totals" in results:
        out += ["", *_totals_markdown(results["totals"])]
        out += _figure_markdown(results, "totals", "totals with their intervals")
        out += _figure_markdown(results, "totals_budget", "error budgets of the totals")
    other = _other_warnings(results)
    if other:
        out += ["", "## Warnings", "", "Raised while the stages ran (stage: message):", ""]
        out += [f"- {line}" for line in other]
    if run.get("sections_not_run"):
        listed = ", ".join(f"[{s}]" for s in run["sections_not_run"])
        out += ["", "## Not run", "", f"The run file has {listed}; this version of countscale "
                "has no stage that fits or reports them yet (the tally used `[counts].bins` "
                "and `[variance].regions` where given)."]
    return "\n".join(out) + "\n"


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
        "| parameter | value | budget |",
        "|---|---|---|",
    ]
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
        f"Integral counts N(<{m:g}), sources per deg² ({integral['note']}):",
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
                f"× {explained['expected_naive_over_sky_total']:.4g}. The rest, × "
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
        "",
        f"counts per magnitude bin ({tally['mag_bins']['grid']} grid)",
        f"  {'magnitude':<15} {'sources':>12} {'per deg² mag':>14}",
    ]
    lines += [f"  {lo:>6.4g} – {hi:<6.4g} {n:>12,d} {d:>14.4g}"
              for lo, hi, n, d in _bin_rows(results)]
    lines.append(f"  brighter {tally['n_brighter']:,d}; fainter {tally['n_fainter']:,d}")
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
    return "\n".join(lines)


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
                 footprint: Any = None) -> WrittenReport:
    """Write the report folder; ``results.json`` last (see the module docstring).

    Parameters
    ----------
    results : mapping
        JSON-ready results of a run.
    out_dir : path
        The folder (created if needed).
    formats : iterable of str
        ``"markdown"`` adds ``report.md``; ``"png"`` adds the figures (footprint, when
        `footprint` is given; completeness and number counts when the results have them),
        which the Markdown report shows. ``results.json`` is always written: it marks a
        complete report. ``"html"`` is accepted and not produced yet.
    footprint : countscale.footprint.Footprint, optional
        For the footprint figure.

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
            "footprint": lambda p: plots.footprint_figure(footprint, p, title=title),
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
    results = dict(results)
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
    if "markdown" in formats:
        contents.append((REPORT_NAME, render_markdown(results)))
    contents.append((RESULTS_NAME, results_json(results)))
    for name, text in contents:
        path = out_dir / name
        with atomic_path(path) as tmp:
            tmp.write_text(text, encoding="utf-8")
        written.append(path)
    return WrittenReport(tuple(written), results)
