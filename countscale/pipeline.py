"""The run orchestrator: a run file in, every stage it asks for, a report folder out.

``countscale run`` and ``countscale demo`` are thin layers over :func:`run_survey`. A run is a
list of stages (:data:`STAGES`); each declares the run-file sections it needs and runs only
when all of them are present. Later stages (number counts, luminosity function, cosmic
variance, totals) are added to :data:`STAGES` by their modules' issues; a section the file has
but no stage reads yet is listed in the results under ``run.sections_not_run``, not ignored
silently.

Topics
------
run_survey
    Validate, run the stages, write ``results.json`` and ``report.md``; returns a
    :class:`RunResult`.
Stage, STAGES
    The stage list and how to extend it.
RunContext
    What a stage receives: the run file, the footprint, the random generator, earlier stages'
    results.

Adding a stage
--------------
Write ``_stage_<name>(ctx) -> object with to_dict()`` and append
``Stage("<name>", sections=("<section>", ...), run=_stage_<name>, columns=(...))`` to
:data:`STAGES` after the stages it reads (``ctx.results["tally"]`` etc.). ``columns`` names the
per-source columns the stage needs from the tally (see :data:`countscale.tally.COLUMNS`); the
tally keeps only columns some stage will use, so memory stays flat otherwise. Stochastic
stages draw from ``ctx.rng`` only.

Examples
--------
>>> result = run_survey("demo_data/survey.toml", out_dir="out")     # doctest: +SKIP
>>> print(result.tally.ledger.summary())                            # doctest: +SKIP
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from countscale.errors import InputError, InputTypeError

__all__ = ["STAGES", "RunContext", "RunResult", "Stage", "run_survey"]


@dataclass(frozen=True)
class Stage:
    """One step of a run.

    Attributes
    ----------
    name : str
        Key of the stage's result in ``RunResult.stage_results`` and in ``results.json``.
    sections : tuple of str
        Run-file sections that must all be present for the stage to run.
    run : callable
        ``run(ctx: RunContext) -> result``; the result has ``to_dict()`` (JSON-ready).
    columns : tuple of str, or callable
        Per-source tally columns the stage reads, or ``columns(runfile) -> tuple`` when they
        depend on the run file.
    also_reads : tuple of str
        Optional sections the stage reads when present (``[cosmology]``), so a run that
        used them does not list them as not run.
    """

    name: str
    sections: tuple[str, ...]
    run: Callable[[RunContext], Any]
    columns: tuple[str, ...] | Callable[[Any], tuple[str, ...]] = ()
    also_reads: tuple[str, ...] = ()


@dataclass
class RunContext:
    """What every stage receives (a scratch object for one run; stages add to ``results``).

    Attributes
    ----------
    runfile : countscale.runfile.RunFile
    engine : str
        ``"local"`` or ``"dask"``.
    scheduler : str or None
        Dask scheduler address (None: a local cluster).
    rng : numpy.random.Generator
        The only source of randomness for stages.
    progress : bool or None
        Progress bars on stderr (None: only on a terminal).
    columns : tuple of str
        Tally columns the stages of this run need.
    results : dict of str to object
        Results of the stages run so far, by stage name.
    footprint : countscale.footprint.Footprint or None
        Built by the tally stage.
    """

    runfile: Any
    engine: str
    scheduler: str | None
    rng: np.random.Generator
    progress: bool | None
    columns: tuple[str, ...] = ()
    results: dict[str, Any] = field(default_factory=dict)
    footprint: Any = None


@dataclass(frozen=True, eq=False)
class RunResult:
    """The outcome of :func:`run_survey`.

    Attributes
    ----------
    runfile : countscale.runfile.RunFile
    out_dir : pathlib.Path
        The report folder.
    files : tuple of pathlib.Path
        Files written (``results.json`` last).
    engine : str
    seed : int
        The seed of the run's generator (drawn from the OS and recorded when not given), so
        the run can be repeated exactly.
    stages : tuple of str
        Stages run, in order.
    sections_not_run : tuple of str
        Sections present in the run file that no stage of this version reads.
    stage_results : dict of str to object
        Each stage's result (``stage_results["tally"]`` is a :class:`countscale.tally.Tally`).
    results : dict
        The JSON-ready content of ``results.json``.
    """

    runfile: Any
    out_dir: Path
    files: tuple[Path, ...]
    engine: str
    seed: int
    stages: tuple[str, ...]
    sections_not_run: tuple[str, ...]
    stage_results: Mapping[str, Any]
    results: Mapping[str, Any]

    @property
    def tally(self) -> Any:
        """The tally stage's :class:`countscale.tally.Tally`."""
        return self.stage_results["tally"]


# --------------------------------------------------------------------------------------------
# Stages
# --------------------------------------------------------------------------------------------


def catalog_positions(runfile: Any) -> Callable[[], tuple[np.ndarray, np.ndarray]]:
    """Lazy (ra, dec) of every valid row, for ``occupancy`` footprint items only."""

    def positions() -> tuple[np.ndarray, np.ndarray]:
        from countscale.catalog import CatalogSource, iter_valid_chunks

        source = CatalogSource.from_config(runfile.catalog, runfile.base_dir)
        ra, dec = [], []
        for valid, _, _ in iter_valid_chunks(source, runfile.engine.chunk_rows):
            ra.append(valid.ra)
            dec.append(valid.dec)
        return np.concatenate(ra), np.concatenate(dec)

    return positions


def _regions(runfile: Any, footprint: Any) -> Any:
    """Jackknife regions: ``[variance].regions`` of them (its default, 24, when absent)."""
    n_regions = runfile.variance.regions
    try:
        return footprint.split(n_regions)
    except InputError as exc:
        if "variance" in runfile.present:
            raise InputError(f"{runfile.location('variance', 'regions')}: {exc}") from exc
        # No [variance] section: regions only describe the counts; fall back quietly to as
        # many as the footprint can hold, down to one.
        warnings.warn(f"footprint too small for {n_regions} regions ({exc}); using one region",
                      UserWarning, stacklevel=2)
        return footprint.split(1)


def _stage_tally(ctx: RunContext) -> Any:
    from countscale.catalog import CatalogSource
    from countscale.footprint import Footprint
    from countscale.tally import tally

    runfile = ctx.runfile
    source = CatalogSource.from_config(runfile.catalog,
                                       where=runfile.location("catalog"))
    positions = catalog_positions(runfile)
    footprint = Footprint.from_runfile_section(runfile.footprint, catalog_positions=positions)
    if footprint.area_sr <= 0:
        raise InputError(f"{runfile.location('footprint')}: the footprint is empty (area 0)")
    ctx.footprint = footprint
    mag_bins = runfile.counts.bins if "counts" in runfile.present else None
    columns = tuple(c for c in ctx.columns if c in ("coverage", "region")
                    or getattr(source, c, None) is not None)
    return tally(
        source, footprint,
        regions=_regions(runfile, footprint),
        mag_bins=mag_bins,
        columns=columns,
        engine=ctx.engine,
        scheduler=ctx.scheduler,
        chunk_rows=runfile.engine.chunk_rows,
        progress=ctx.progress,
    )


@dataclass(frozen=True, eq=False)
class StageResult:
    """A stage's JSON-ready summary plus the live objects later stages read."""

    data: dict
    objects: Mapping[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict:
        return self.data

    def __getitem__(self, name: str) -> Any:
        return self.objects[name]


#: Magnitude grid step of the curves stored for figures (mag).
_CURVE_STEP_MAG = 0.02


def _depth_offsets(table: Any, depth: Any, footprint: Any) -> tuple[np.ndarray, float]:
    """Each injection's depth offset m50(position) - median m50 over the footprint."""
    import healpy as hp

    pixel = hp.ang2pix(depth.nside, table.ra_deg, table.dec_deg, nest=depth.nest, lonlat=True)
    cover = footprint.to_healpix(depth.nside, nest=depth.nest)
    reference = float(np.nanmedian(depth.m50_mag[cover > 0]))
    return depth.m50_mag[pixel] - reference, reference


def _stage_completeness(ctx: RunContext) -> StageResult:
    """Fit the injection table; effective area of the footprint and of each region.

    With a depth map and injection positions, each injection's magnitude is first moved by
    its tile's depth offset from the footprint's median m50, so the fit measures the curve's
    *shape* (a single curve fitted across tiles of different depth would come out too wide);
    the depth map then places that shape at each tile's m50.
    """
    from countscale import completeness as cm

    runfile, section = ctx.runfile, ctx.runfile.completeness
    tally_result = ctx.results["tally"]
    table = cm.InjectionTable.from_csv(section.injections, columns=section.columns)
    depth_info = None
    fit_table = table
    if section.depth_map is not None:
        placeholder = cm.LogisticCompleteness(0.0, 1.0)
        depth_raw = cm.DepthMap.from_fits(section.depth_map, shape=placeholder)
        if table.ra_deg is not None:
            offset, reference = _depth_offsets(table, depth_raw, ctx.footprint)
            usable = np.isfinite(offset)
            if not usable.any():
                raise InputError(
                    f"{runfile.location('completeness', 'depth_map')}: no injection lies in a "
                    "depth-map pixel with data"
                )
            fit_table = cm.InjectionTable.from_arrays(
                table.mag[usable] - offset[usable], table.recovered[usable]
            )
            depth_info = {"reference_m50": reference,
                          "n_injections_outside_depth_map": int((~usable).sum())}
    fit = cm.fit_completeness(fit_table, model=section.model, plateau=section.plateau,
                              rng=ctx.rng)
    depth = None
    if section.depth_map is not None:
        depth = cm.DepthMap.from_fits(section.depth_map, shape=fit)
        cover = ctx.footprint.to_healpix(depth.nside, nest=depth.nest) > 0
        values = depth.m50_mag[cover & np.isfinite(depth.m50_mag)]
        depth_info = {
            **(depth_info or {}),
            "path": str(section.depth_map),
            "nside": int(depth.nside),
            "m50_min": float(values.min()) if values.size else None,
            "m50_median": float(np.median(values)) if values.size else None,
            "m50_max": float(values.max()) if values.size else None,
            "shifted_injections": table.ra_deg is not None,
        }
    per_region, total = cm.region_effective_areas(ctx.footprint, tally_result.regions, fit,
                                                  depth)
    recovery = cm.binned_recovery(fit_table, bin_width=0.1)
    lo_mag = float(np.floor(fit_table.mag.min() * 10) / 10)
    hi_mag = float(np.ceil(fit_table.mag.max() * 10) / 10)
    grid = np.arange(lo_mag, hi_mag + _CURVE_STEP_MAG / 2, _CURVE_STEP_MAG)
    band_lo, band_hi = cm.completeness_band(fit, grid, rng=ctx.rng)
    area = tally_result.area_deg2
    data = {
        "model": section.model,
        "plateau": bool(section.plateau),
        "injections": str(section.injections),
        "n_injections": len(table),
        "n_injections_fitted": len(fit_table),
        "m50": fit.m50.to_json(),
        "width": fit.width.to_json(),
        "m90": fit.m90.to_json(),
        "params": {k: float(v) for k, v in fit.params_.items()},
        "depth_map": depth_info,
        "recovery": recovery.to_json(),
        "curve": {
            "mag": grid.tolist(),
            "completeness": np.asarray(fit(grid), dtype=float).tolist(),
            "band_lo": band_lo.tolist(),
            "band_hi": band_hi.tolist(),
            "effective_area_fraction": (np.asarray(total(grid)) / area).tolist(),
        },
    }
    return StageResult(data, {"fit": fit, "depth": depth, "per_region": per_region,
                              "total": total})


def _integral_with_bright_part(integral: Any, n_bright: int, area_deg2: float,
                               rng: np.random.Generator) -> dict:
    """N(<m) = sources observed brighter than the fit range + the model over the fit range.

    The survey is taken as complete brighter than the fit range, so those sources are counted
    as observed, with Poisson draws for their error; the model part keeps its own draws
    (Poisson + clustering). Budget shares are of the variance of the total (for small
    relative errors, the same shares as of its log10).
    """
    from countscale.estimate import Estimate

    model_total = integral.total
    draws = np.asarray(model_total.draws, dtype=float)
    bright = rng.poisson(max(n_bright, 0), size=draws.size).astype(float)
    total = draws + bright
    var_model, var_bright = float(np.var(draws)), float(n_bright)
    shares = {k: v * var_model for k, v in model_total.budget.items()}
    shares["poisson"] = shares.get("poisson", 0.0) + var_bright
    norm = sum(shares.values()) or 1.0
    budget = {k: v / norm for k, v in shares.items()}
    total_estimate = Estimate.from_draws(total, "sources", budget=budget)
    per_deg2 = Estimate.from_draws(total / area_deg2, "deg^-2", budget=budget)
    return {
        "m_limit": float(integral.m_limit),
        "area_deg2": float(area_deg2),
        "per_deg2": per_deg2.to_json(),
        "total": total_estimate.to_json(),
        "n_observed_brighter": int(n_bright),
        "model_part": integral.to_json(),
    }


def _stage_counts(ctx: RunContext) -> StageResult:
    """Fit the number counts through the forward model; integral and differential counts."""
    from countscale import counts as ct

    runfile, section = ctx.runfile, ctx.runfile.counts
    tally_result = ctx.results["tally"]
    completeness = ctx.results.get("completeness")
    area = float(tally_result.area_deg2)
    notes = []
    if completeness is not None:
        effective, per_region = completeness["total"], list(completeness["per_region"])
    else:
        effective, per_region = area, [float(a) for a in tally_result.region_area_deg2]
        notes.append("no [completeness] section: the survey is taken as complete at every "
                     "magnitude fitted")
    columns = tally_result.columns
    scatter = None
    if columns is not None and "mag_error" in columns and "mag" in columns:
        scatter = ct.scatter_from_errors(columns["mag"], columns["mag_error"])
    else:
        notes.append("no magnitude errors in the catalogue: photometric scatter is ignored")
    forward = ct.ForwardModel(tally_result.mag_edges, effective, scatter, area_deg2=area)
    fit_range = section.fit_range
    if fit_range is None:
        # Default: the bins that are at least half complete (DESIGN.md section 5).
        good = np.flatnonzero(forward.bin_completeness() >= 0.5)
        if good.size == 0:
            raise InputError(f"{runfile.location('counts')}: no magnitude bin is at least 50 % "
                             "complete; give `fit_range`")
        edges = tally_result.mag_edges
        fit_range = (float(edges[good[0]]), float(edges[good[-1] + 1]))
    observed = tally_result.counts
    region_counts = tally_result.region_counts
    if tally_result.n_unassigned or not np.array_equal(region_counts.sum(axis=0), observed):
        notes.append("some sources fall in no jackknife region: errors are Poisson only")
        region_counts, per_region = None, None
    elif tally_result.n_regions < 3:
        region_counts, per_region = None, None
        notes.append("fewer than 3 regions: errors are Poisson only (no jackknife)")

    fits = {}
    fit_lo = float(fit_range[0])
    reference = 0.5 * round(fit_range[0] + fit_range[1])
    models = {"power_law": ct.PowerLaw, "broken_power_law": ct.BrokenPowerLaw,
              "double_power_law": ct.DoublePowerLaw}
    for name in (section.model, *[m for m in models if m != section.model]):
        # N(<m) is integrated from the bright edge of the fit range (m_bright); brighter
        # sources are taken as observed (see _integral_with_bright_part).
        settings = {"reference_mag": reference, "m_bright": fit_lo}
        if name != "power_law":
            settings["m_break"] = 0.5 * (fit_range[0] + fit_range[1])
        template = models[name](**settings)
        try:
            fits[name] = ct.CountsFit(template, forward, fit_range_mag=fit_range).fit(
                observed, rng=ctx.rng, region_counts=region_counts,
                region_effective_area_deg2=per_region,
            )
        except (ct.CountsFitError, InputError) as exc:
            if name == section.model:
                raise
            notes.append(f"comparison model {name} not fitted: {exc}")
    main = fits[section.model]
    comparison = ct.compare_models(list(fits.values())) if len(fits) > 1 else None
    m_limit = float(main.fit_range_[1])
    edges = tally_result.mag_edges
    n_bright = int(tally_result.n_brighter + observed[edges[1:] <= fit_lo].sum())
    integral = _integral_with_bright_part(
        main.integral_counts(m_limit, area_deg2=area, rng=ctx.rng), n_bright, area, ctx.rng)
    differential = main.differential_counts()
    preferred = None
    if comparison is not None:
        best = min(fits, key=lambda name: fits[name].bic_)
        if best != section.model:
            preferred = {
                "model": best,
                "criterion": "BIC",
                "integral_counts": _integral_with_bright_part(
                    fits[best].integral_counts(m_limit, area_deg2=area, rng=ctx.rng),
                    n_bright, area, ctx.rng),
            }
    grid = np.arange(tally_result.mag_edges[0], tally_result.mag_edges[-1] + 1e-9,
                     _CURVE_STEP_MAG)
    data = {
        "model": section.model,
        "fit": main.to_json(),
        "alternatives": {name: fit.to_json() for name, fit in fits.items()
                         if name != section.model},
        "comparison": None if comparison is None else comparison.to_json(),
        "integral_counts": {
            **integral,
            "note": (f"sources brighter than m = {m_limit:g}, the faint end of the fit range: "
                     f"the {n_bright:,d} observed brighter than {fit_lo:g} (taken as complete) "
                     "plus the fitted model, corrected for completeness and scatter, over "
                     "the fit range"),
        },
        "preferred": preferred,
        "differential": differential.to_json(),
        "expected_counts": np.asarray(main.expected_counts_, dtype=float).tolist(),
        "scatter": None if scatter is None else scatter.to_json(),
        "model_curves": {
            "mag": grid.tolist(),
            **{name: np.asarray(fit.model_.density(grid), dtype=float).tolist()
               for name, fit in fits.items()},
        },
        "notes": notes,
    }
    return StageResult(data, {"fit": main, "fits": fits, "forward": forward})


#: Parameter draws kept for the luminosity function's Estimates and the STY curve's band.
_LF_DRAWS = 1000
#: Points of the STY curve stored for the figure.
_LF_CURVE_POINTS = 200


def _run_cosmology(runfile: Any) -> Any:
    """The run's astropy cosmology from ``[cosmology]`` (Planck18 when absent)."""
    from countscale import cosmology

    section = runfile.cosmology
    if section.H0 is not None:
        return cosmology.get_cosmology(H0=section.H0, Om0=section.Om0)
    return cosmology.get_cosmology(section.name)


def _lf_columns(runfile: Any) -> tuple[str, ...]:
    """Tally columns the luminosity-function stage reads (positions only with a depth map)."""
    section = runfile.luminosity_function
    columns = ["mag", "redshift", "region"]
    if section.quantity == "stellar_mass":
        columns.append("stellar_mass")
    if runfile.catalog.redshift_error is not None:
        columns.append("redshift_error")
    if "completeness" in runfile.present and runfile.completeness.depth_map is not None:
        columns += ["ra", "dec"]
    return tuple(columns)


def _completeness_weights(ctx: RunContext, mag: np.ndarray, columns: Mapping[str, Any],
                          cap: float, mag_limits: tuple[float, float]
                          ) -> tuple[np.ndarray | None, dict | None]:
    """1 / completeness at each source's magnitude (and position, with a depth map), capped.

    The counts in the returned summary are of sources inside the apparent limits.
    """
    completeness = ctx.results.get("completeness")
    if completeness is None:
        return None, None
    depth = completeness["depth"]
    if depth is not None and "ra" in columns:
        value = np.asarray(depth.completeness_at(mag, columns["ra"], columns["dec"]), float)
        how = "at each source's magnitude and position (depth map)"
    else:
        value = np.asarray(completeness["fit"](mag), dtype=float)
        how = "at each source's magnitude (one curve for the footprint)"
    value = np.where(np.isfinite(value), value, 0.0)
    weight = 1.0 / np.maximum(value, 1.0 / cap)
    inside = (mag >= mag_limits[0]) & (mag <= mag_limits[1])
    return weight, {"how": how, "cap": cap,
                    "n_capped": int((inside & (value < 1.0 / cap)).sum()),
                    "n_below_half": int((inside & (value < 0.5)).sum()),
                    "min_completeness": float(value[inside].min()) if inside.any() else None}


def _ellipse(centre: np.ndarray, cov: np.ndarray, delta_chi2: float, n: int = 121
             ) -> np.ndarray:
    """Points of the ellipse (x - c)^T C^-1 (x - c) = delta_chi2, shape (2, n)."""
    t = np.linspace(0.0, 2.0 * np.pi, n)
    values, vectors = np.linalg.eigh(cov)
    circle = np.stack([np.cos(t), np.sin(t)])
    return centre[:, None] + vectors @ (np.sqrt(np.maximum(values, 0.0) * delta_chi2)[:, None]
                                        * circle)


def _stage_luminosity_function(ctx: RunContext) -> StageResult:
    """Luminosity (or stellar-mass) function: STY, 1/Vmax and SWML.

    Reads the tally's per-source magnitudes, redshifts (and stellar masses, redshift errors,
    positions), the footprint's measured solid angle and its regions, and the completeness
    stage when it ran (weights 1 / completeness, capped at ``weight_cap``).

    ``results["luminosity_function"]``: ``quantity``, ``selection``, ``sample`` (every source
    left out, counted by reason), ``sty`` (the fitted parameters as Estimates under their
    published names, ``covariance``, ``evolution``, densities, ``curve`` with its 68 % band,
    ``ellipse``), ``vmax`` and ``swml`` (``mag`` or ``log10_mass``, ``phi``, ``phi_err``,
    ``n`` per bin; phi per Mpc^3 per mag or dex with the run's H0), ``notes``.

    Live objects (``StageResult.objects``), for the stages after it:

    ``fit``
        The :class:`countscale.lumfunc.STYFit`: ``form_`` (the fitted form at z = 0,
        normalisation included), ``cov_`` with ``cov_names_`` (its parameter covariance),
        ``evolution_``, ``params_``. None if STY could not be fitted and was not asked for.
    ``model``
        ``fit.form_`` (a Schechter, SchechterMass or DoubleSchechterMass).
    ``evolution``
        ``fit.evolution_`` (Lin et al. 1999 Q and P).
    ``draw_params``
        ``draw_params(n, rng) -> dict of arrays``: parameter sets drawn from the fit's
        uncertainty (published names, ``Q``, ``P``; the normalisation correlated with the
        shape).
    ``draws``
        The draws the Estimates were made from (``_LF_DRAWS`` of them).
    ``nz``
        ``nz(z, m_limit, area_sr=None) -> ndarray``: the predicted redshift distribution
        dN/dz (per sr, or over ``area_sr``) of sources brighter than apparent magnitude
        ``m_limit``, from the STY fit with its evolution and K-correction in the run's
        cosmology; beyond the fitted redshift range the evolution and K-correction are
        extrapolated (``fit_redshift_range`` says where that starts). Luminosity functions
        only (None for a mass function).
    ``fit_redshift_range``
        The redshift range the fit used.
    ``estimates``
        Dict of :class:`countscale.estimate.Estimate` (with their draws).
    ``sample``, ``selection``, ``vmax``, ``swml``
        The :class:`countscale.lumfunc.Sample`, its Selection and the binned estimates.
    """
    from countscale import cosmology as cs
    from countscale import lumfunc as lf

    runfile, section = ctx.runfile, ctx.runfile.luminosity_function
    tally_result = ctx.results["tally"]
    columns = tally_result.columns
    where = runfile.location("luminosity_function")
    notes: list[str] = []
    try:
        kcorrection = cs.as_kcorrection(section.kcorrection)
    except (InputError, InputTypeError) as exc:
        raise InputError(f"{runfile.location('luminosity_function', 'kcorrection')}: {exc}"
                         ) from None
    evolution = lf.Evolution(Q=section.evolution.Q, P=section.evolution.P)
    try:
        selection = lf.Selection(section.mag_limits, section.redshift_range,
                                 float(ctx.footprint.area_sr), _run_cosmology(runfile),
                                 kcorrection, evolution)
    except InputError as exc:
        raise InputError(f"{where}: {exc}") from None
    mag = np.asarray(columns["mag"], dtype=float)
    weight, weight_info = _completeness_weights(ctx, mag, columns, section.weight_cap,
                                                section.mag_limits)
    region = columns.get("region")
    region_area_sr = np.asarray(tally_result.region_area_deg2, dtype=float) * (np.pi / 180) ** 2
    if region is not None and (np.asarray(region) < 0).any():
        notes.append("some sources fall in no jackknife region: errors of the normalisation "
                     "are Poisson only")
        region = None
    mass = columns.get("stellar_mass") if section.quantity == "stellar_mass" else None
    try:
        sample = selection.select(
            mag, np.asarray(columns["redshift"], dtype=float), weight=weight,
            region=None if region is None else np.asarray(region),
            region_area_sr=None if region is None else region_area_sr,
            log10_mass=None if mass is None else np.asarray(mass, dtype=float),
            redshift_error=(None if "redshift_error" not in columns
                            else np.asarray(columns["redshift_error"], dtype=float)),
            mass_limit_quantile=section.mass_limit_quantile,
        )
    except InputError as exc:
        raise InputError(f"{where}: {exc}") from None

    methods = section.methods
    fit = draws = estimates = None
    try:
        fit = lf.STYFit(model=section.model, fit_evolution=section.fit_evolution or ()
                        ).fit(sample)
    except lf.LuminosityFunctionFitError as exc:
        if "sty" in methods:
            raise
        notes.append(f"STY could not be fitted ({exc}); later stages have no model")
    q = fit.evolution_.Q if fit is not None else evolution.Q
    p = fit.evolution_.P if fit is not None else evolution.P
    width = section.bin_width or (0.25 if sample.quantity == "luminosity" else 0.1)
    edges = lf.bin_edges(sample.x(q), width)
    vmax = lf.vmax_estimate(sample, edges=edges, Q=q, P=p) if "vmax" in methods else None
    swml = lf.swml_estimate(sample, edges=edges, Q=q, P=p) if "swml" in methods else None

    x_name = sample.x_name
    data: dict[str, Any] = {
        "quantity": sample.quantity,
        "x_name": x_name,
        "x_unit": sample.x_unit,
        "methods": list(methods),
        "selection": selection.describe(),
        "kcorrection": (None if section.kcorrection is None
                        else _plain_table(section.kcorrection)),
        "sample": sample.describe(),
        "completeness_weights": weight_info,
    }
    if fit is not None:
        draws = fit.draw_params(_LF_DRAWS, ctx.rng)
        estimates = fit.estimates(draws=draws)
        sty = fit.to_json(estimates)
        lo_x, hi_x = float(edges[0]), float(edges[-1])
        grid = np.linspace(lo_x, hi_x, _LF_CURVE_POINTS)
        curves = np.array([fit.form_from_draws(draws, i).density(grid)
                           for i in range(_LF_DRAWS)])
        sty["curve"] = {
            x_name: grid.tolist(),
            "phi": np.asarray(fit.form_.density(grid), dtype=float).tolist(),
            "band_lo": np.percentile(curves, 16, axis=0).tolist(),
            "band_hi": np.percentile(curves, 84, axis=0).tolist(),
        }
        names = list(fit.cov_names_[:2])
        index = [fit.cov_names_.index(n) for n in names]
        centre = np.array([fit.params_[n] for n in names])
        sub = fit.cov_[np.ix_(index, index)]
        # Delta chi^2 = 2.30 and 6.18 enclose 68.3 % and 95.4 % for two parameters jointly
        # (Press et al. 2007, Numerical Recipes 3rd ed., section 15.6).
        sty["ellipse"] = {
            "names": names,
            "centre": centre.tolist(),
            "levels": [0.683, 0.954],
            "delta_chi2": [2.30, 6.18],
            "points": [_ellipse(centre, sub, d).tolist() for d in (2.30, 6.18)],
        }
        if "sty" in methods:
            data["sty"] = sty
    if vmax is not None:
        data["vmax"] = vmax.to_json()
    if swml is not None:
        swml_json = swml.to_json()
        data["swml"] = swml_json
    data["notes"] = notes + _lf_notes(sample, fit, vmax, weight_info, estimates)
    nz = None
    if fit is not None and sample.quantity == "luminosity":
        nz = fit.nz
    objects = {
        "fit": fit, "model": None if fit is None else fit.form_,
        "evolution": None if fit is None else fit.evolution_,
        "draw_params": None if fit is None else fit.draw_params,
        "draws": draws, "nz": nz, "fit_redshift_range": selection.redshift_range,
        "estimates": estimates or {}, "sample": sample, "selection": selection,
        "vmax": vmax, "swml": swml,
    }
    return StageResult(data, objects)


def _plain_table(value: Any) -> Any:
    if isinstance(value, Mapping):
        return {k: _plain_table(v) for k, v in value.items()}
    if isinstance(value, tuple | list):
        return [_plain_table(v) for v in value]
    return value


def _lf_notes(sample: Any, fit: Any, vmax: Any, weight_info: dict | None,
              estimates: dict | None = None) -> list[str]:
    notes = []
    if weight_info is not None:
        notes.append(
            f"each galaxy is weighted by 1 / completeness {weight_info['how']}, capped at "
            f"{weight_info['cap']:g}; of the sources inside the apparent limits, "
            f"{weight_info['n_below_half']:,d} are less than 50 % complete and "
            f"{weight_info['n_capped']:,d} less complete than the cap corrects (their weight is "
            "the cap)")
    else:
        notes.append("no [completeness] section: the catalogue is taken as complete inside "
                     "the apparent limits")
    if sample.redshift_sampling is not None:
        notes.append(sample.redshift_sampling["assumption"])
    if fit is not None:
        evo = fit.evolution_
        fitted = fit.fitted_evolution_
        names = ("Q", "P") if sample.quantity == "luminosity" else ("P",)
        fixed = [n for n in names if n not in fitted]
        if fixed:
            notes.append("evolution " + ", ".join(f"{n} = {getattr(evo, n):g}" for n in fixed)
                         + " taken from the run file, not fitted")
        if "P" in fitted:
            notes.append("P is fitted from the redshift distribution, which also feels "
                         "large-scale structure along the line of sight; its error does not "
                         "hold that")
        density = ("luminosity_density_mag" if sample.quantity == "luminosity"
                   else "mass_density_msun_mpc3")
        if estimates is not None and density not in estimates:
            notes.append(f"no {density.split('_density')[0]} density: alpha <= -2 in some "
                         "parameter draws, where the total diverges (the number density down "
                         "to the sample's faintest galaxy is given)")
        if sample.n < 1000:
            notes.append(f"STY on {sample.n} galaxies: with a few hundred galaxies the fitted "
                         "faint-end slope and normalisation are biased and their errors "
                         "underestimated for steep slopes (Willmer 1997, AJ 114, 898)")
    if vmax is not None and not np.all(vmax.complete):
        notes.append("1/Vmax bins marked incomplete hold luminosities no galaxy could have "
                     "everywhere in the bin; their 1/Vmax average covers only the visible part")
    if sample.redshift_error is not None:
        notes.append("photometric redshifts: STY convolves the form with each galaxy's "
                     "redshift error (Gaussian, through dm/dz); 1/Vmax and SWML take the "
                     "redshifts as exact")
    return notes


#: The stages, in order. Later issues append luminosity_function, variance, totals.
STAGES: list[Stage] = [
    Stage("tally", ("catalog", "footprint"), _stage_tally),
    Stage("completeness", ("completeness",), _stage_completeness),
    Stage("luminosity_function", ("luminosity_function",), _stage_luminosity_function,
          columns=_lf_columns, also_reads=("cosmology",)),
    Stage("counts", ("counts",), _stage_counts, columns=("mag", "mag_error")),
]

def _stage_columns(stage: Stage, runfile: Any) -> tuple[str, ...]:
    """A stage's tally columns: a tuple, or a function of the run file."""
    return tuple(stage.columns(runfile)) if callable(stage.columns) else stage.columns


#: Sections read by the run itself rather than by a stage.
_RUN_SECTIONS = frozenset({"survey", "catalog", "footprint", "output", "engine"})


# --------------------------------------------------------------------------------------------
# The run
# --------------------------------------------------------------------------------------------


def _seed_iv(seed: Any) -> int:
    if seed is None:
        # Recorded in results.json so the run can be repeated exactly.
        return int(np.random.SeedSequence().entropy % 2**63)
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer):
        raise InputTypeError(f"`seed` must be a non-negative integer; got {seed!r}")
    if seed < 0:
        raise InputError(f"`seed` must be a non-negative integer; got {seed}")
    return int(seed)


def _engine_iv(runfile: Any, engine: Any, scheduler: Any) -> tuple[str, str | None]:
    from countscale.tally import ENGINES

    if engine is None:
        engine = runfile.engine.kind
        if scheduler is None:
            scheduler = runfile.engine.scheduler
    elif engine not in ENGINES:
        raise InputError(f"`engine` must be one of {', '.join(ENGINES)}; got {engine!r}")
    elif engine == runfile.engine.kind and scheduler is None:
        scheduler = runfile.engine.scheduler
    if scheduler is not None and not isinstance(scheduler, str):
        raise InputTypeError(f"`scheduler` must be an address string; got {scheduler!r}")
    if scheduler is not None and engine != "dask":
        raise InputError(
            f"`scheduler` is only used with the dask engine; got {scheduler!r} with engine "
            f"{engine!r}"
        )
    return engine, scheduler


def run_survey(runfile: Any, out_dir: str | os.PathLike | None = None, engine: str | None = None,
               scheduler: str | None = None, seed: int | None = None,
               progress: bool | None = None) -> RunResult:
    """Run every stage a run file asks for and write the report folder.

    Parameters
    ----------
    runfile : path or countscale.runfile.RunFile
        The TOML run file (needs ``[catalog]`` and ``[footprint]``).
    out_dir : path, optional
        Report folder; default the run file's ``[output].dir``.
    engine : {"local", "dask"}, optional
        Default the run file's ``[engine].kind``.
    scheduler : str, optional
        Dask scheduler address; default the run file's ``[engine].scheduler``; None with the
        dask engine starts a local cluster.
    seed : int, optional
        Seed of the run's random generator; drawn from the OS (and recorded) when not given.
    progress : bool, optional
        Progress bars on stderr; default only when stderr is a terminal.

    Returns
    -------
    RunResult

    Raises
    ------
    InputError, InputTypeError
        A bad run file, catalogue or argument (one line naming the file, key or column).

    Notes
    -----
    ``results.json`` is written last, atomically, after everything else succeeded; a failed
    or interrupted run never leaves one that looks whole (see :func:`countscale.report.
    write_report`).
    """
    from countscale import __version__, report
    from countscale.runfile import RunFile, load_runfile

    if not isinstance(runfile, RunFile):
        if not isinstance(runfile, str | os.PathLike):
            raise InputTypeError(
                f"`runfile` must be a path or a RunFile; got {type(runfile).__name__}"
            )
        runfile = load_runfile(runfile)
    runfile.require("catalog", "footprint", needed_by="countscale run")
    engine, scheduler = _engine_iv(runfile, engine, scheduler)
    seed = _seed_iv(seed)
    if out_dir is None:
        out_dir = runfile.output.dir
    elif not isinstance(out_dir, str | os.PathLike):
        raise InputTypeError(f"`out_dir` must be a folder path; got {type(out_dir).__name__}")
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise InputError(f"`out_dir` '{out_dir}' exists and is not a folder")

    to_run = [s for s in STAGES if all(name in runfile.present for name in s.sections)]
    read = _RUN_SECTIONS.union(*(s.sections for s in STAGES), *(s.also_reads for s in to_run))
    not_run = tuple(sorted(name for name in runfile.present if name not in read))
    columns = tuple(dict.fromkeys(c for s in to_run for c in _stage_columns(s, runfile)))
    ctx = RunContext(runfile=runfile, engine=engine, scheduler=scheduler,
                     rng=np.random.default_rng(seed), progress=progress, columns=columns)
    for stage in to_run:
        ctx.results[stage.name] = stage.run(ctx)

    tally_result = ctx.results["tally"]
    survey = {k: v for k, v in runfile.survey.to_dict().items() if v is not None}
    content = tally_result.to_dict()
    results: dict[str, Any] = {
        "countscale_version": __version__,
        "survey": survey,
        "run": {
            "runfile": str(runfile.path),
            "engine": engine,
            "seed": seed,
            "stages": [s.name for s in to_run],
            "sections_not_run": list(not_run),
        },
        "ledger": content.pop("ledger"),
        "footprint": content.pop("footprint"),
        "tally": content,
    }
    for stage in to_run:
        if stage.name != "tally":
            results[stage.name] = ctx.results[stage.name].to_dict()
    figures = report.figure_names(results, runfile.output.formats, ctx.footprint)
    if figures:
        results["figures"] = figures
    files = report.write_report(results, out_dir, formats=runfile.output.formats,
                                footprint=ctx.footprint)
    return RunResult(
        runfile=runfile, out_dir=out_dir, files=files, engine=engine, seed=seed,
        stages=tuple(s.name for s in to_run), sections_not_run=not_run,
        stage_results=dict(ctx.results), results=results,
    )
