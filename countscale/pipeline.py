"""The run orchestrator: a run file in, every stage it asks for, a report folder out.

``countscale run`` and ``countscale demo`` are thin layers over :func:`run_survey`. A run is a
list of stages (:data:`STAGES`); each declares the run-file sections it needs and runs only
when all of them are present (and its optional ``when`` condition holds: the contamination
stage runs with a classifier or ``[contamination]``, the sky model for stars or with
``[sky_model]``). The stages: tally, completeness, luminosity function, cosmic variance,
contamination, number counts, sky model, totals (the last turns the fits into totals over the
sky, a volume, the light cone and in stars, with their budgets). Contamination runs before
the counts: with a star catalogue (``[contamination]``) the count fit models the sources as
galaxies + the catalogue's stars per bin, so the counts, N(<m) and ``sky_total`` are of
galaxies (a classifier needs no such order: the tally already left its stars out). A section
the file has but no stage reads is listed in the results under ``run.sections_not_run``, not
ignored silently.

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

import math
import os
import tempfile
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from countscale.errors import InputError, InputTypeError

__all__ = ["STAGES", "RunContext", "RunResult", "Stage", "plan_population", "run_cosmology",
           "run_survey"]


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
    when : callable, optional
        ``when(runfile) -> bool``: a further condition for running (None: always).
    reads : tuple of str
        Optional sections the stage reads when present (so they are not reported as not run).
    """

    name: str
    sections: tuple[str, ...]
    run: Callable[[RunContext], Any]
    columns: tuple[str, ...] | Callable[[Any], tuple[str, ...]] = ()
    when: Callable[[Any], bool] | None = None
    reads: tuple[str, ...] = ()


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
    extinction : countscale.extinction.ExtinctionMap or None
        Read by the tally stage from ``[extinction]``; magnitudes are then dereddened.
    """

    runfile: Any
    engine: str
    scheduler: str | None
    rng: np.random.Generator
    progress: bool | None
    columns: tuple[str, ...] = ()
    results: dict[str, Any] = field(default_factory=dict)
    footprint: Any = None
    extinction: Any = None


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


def _progress_bar(ctx: RunContext, total: int, desc: str, unit: str) -> Any:
    """A tqdm bar on stderr for a stage's slow loop (off with ``progress=False`` and, by
    default, when stderr is not a terminal)."""
    import sys

    from tqdm import tqdm

    enabled = sys.stderr.isatty() if ctx.progress is None else bool(ctx.progress)
    return tqdm(total=total, desc=desc, unit=unit, file=sys.stderr, disable=not enabled,
                leave=False)


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
    ctx.extinction = _extinction_map(runfile, footprint)
    mag_bins = runfile.counts.bins if "counts" in runfile.present else None
    columns = tuple(c for c in ctx.columns if c in ("coverage", "region", "cell")
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
        extinction=ctx.extinction,
    )


def _extinction_map(runfile: Any, footprint: Any) -> Any:
    """The ``[extinction]`` map, checked to cover the footprint; None without the section."""
    if "extinction" not in runfile.present:
        return None
    from countscale.extinction import ExtinctionMap

    section = runfile.extinction
    where = runfile.location("extinction", "map")
    try:
        extinction = ExtinctionMap.read(section.map, coefficient=section.coefficient,
                                        band=section.band, nest=section.nest)
    except InputError as exc:
        raise InputError(f"{where}: {exc}") from None
    extinction.check_covers(footprint, where=where)
    return extinction


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


#: Largest fraction of the footprint a depth map may leave without data (completeness 0
#: there) before the run refuses it: pixel-edge slivers pass (with a note), a footprint that
#: reaches beyond the map does not. A choice of this project.
_MAX_AREA_WITHOUT_DEPTH = 1e-3


def _check_depth_map(runfile: Any, depth: Any, footprint: Any) -> tuple[float, float]:
    """Refuse depth-map values that are no magnitude, and a map that misses the footprint.

    Returns the footprint's area (deg²) and fraction in pixels without depth data (NaN or
    UNSEEN), when that fraction is small enough to go on with.
    """
    import healpy as hp

    where = runfile.location("completeness", "depth_map")
    label = f"depth map '{Path(runfile.completeness.depth_map).name}'"
    lo, hi = runfile.catalog.mag_range
    values = depth.m50_mag
    with np.errstate(invalid="ignore"):
        bad = np.flatnonzero((values < lo) | (values > hi))
    if bad.size:
        pixel = int(bad[0])
        raise InputError(
            f"{where}: {label} must hold m50 values in the plausible magnitude range "
            f"[{lo:g}, {hi:g}] ([catalog] 'mag_range') or NaN / healpy UNSEEN for no data; "
            f"got {values[pixel]:g} at pixel {pixel} ({bad.size} such pixels)"
        )
    cover = footprint.to_healpix(depth.nside, nest=depth.nest)
    pixel_area = hp.nside2pixarea(depth.nside, degrees=True)
    missing_deg2 = float(cover[np.isnan(values)].sum() * pixel_area)
    fraction = missing_deg2 / footprint.area_deg2
    if fraction > _MAX_AREA_WITHOUT_DEPTH:
        ordering = "NEST" if depth.nest else "RING"
        raise InputError(
            f"{where}: {label} must give a depth for the whole footprint; "
            f"got none for {_deg2(missing_deg2)} deg² ({100 * fraction:.3g} % of the "
            "footprint; "
            f"map read as nside {depth.nside}, {ordering}): extend the map, restrict "
            "[footprint] to it, or check the map's NSIDE and ORDERING keywords"
        )
    return missing_deg2, fraction


def _deg2(area: float) -> str:
    """An area for a message: 4 significant figures, or whole deg² with separators."""
    return f"{area:,.0f}" if area >= 1e4 else f"{area:.4g}"


def _extinction_shift(ctx: RunContext, regions: Any, depth: Any) -> dict:
    """How far the dust moves each region's completeness limit (for the report)."""
    import healpy as hp

    ext = ctx.extinction
    order = int(regions.order)
    x, y, z = hp.pix2vec(2**order, regions.cells, nest=True)
    ra, dec = hp.vec2ang(np.stack([x, y, z], axis=-1), lonlat=True)
    a_mag = ext.extinction_at(ra, dec)
    m50 = depth.m50_mag[hp.vec2pix(depth.nside, x, y, z, nest=depth.nest)]
    per_region = [float(np.nanmean(a_mag[regions.labels == k])) if np.any(
        regions.labels == k) else None for k in range(regions.n_regions)]
    return {
        **ext.summary(ctx.footprint),
        "region_mean_extinction_mag": per_region,
        "m50_dereddened_min": float(np.nanmin(m50)),
        "m50_dereddened_max": float(np.nanmax(m50)),
        "note": ("magnitudes are dereddened per source (m - R E(B-V) at its pixel), and the "
                 "completeness limit of each part of the footprint moved brighter by its "
                 "extinction"),
    }


def _depth_offsets(table: Any, depth: Any, footprint: Any) -> tuple[np.ndarray, float]:
    """Each injection's depth offset m50(position) - median m50 over the footprint."""
    import healpy as hp

    pixel = hp.ang2pix(depth.nside, table.ra_deg, table.dec_deg, nest=depth.nest, lonlat=True)
    cover = footprint.to_healpix(depth.nside, nest=depth.nest)
    reference = float(np.nanmedian(depth.m50_mag[cover > 0]))
    return depth.m50_mag[pixel] - reference, reference


def _injection_columns(section: Any) -> dict[str, str]:
    """The injection table's column mapping: only the roles the run file names.

    Unnamed ``ra``/``dec`` are optional: columns of those names are used when the table has
    them, and a table of magnitudes and recovered flags alone is fine.
    """
    return {role: name for role, name in section.columns.items() if name is not None}


def _stage_completeness(ctx: RunContext) -> StageResult:
    """Fit the injection table; effective area of the footprint and of each region.

    With a depth map and injection positions, each injection's magnitude is first moved by
    its tile's depth offset from the footprint's median m50, so the fit measures the curve's
    *shape* (a single curve fitted across tiles of different depth would come out too wide);
    the depth map then places that shape at each tile's m50. Without positions the curve is
    fitted to the injections as they are, and the report says that its width then includes
    the spread of depth between tiles.
    """
    from countscale import completeness as cm

    runfile, section = ctx.runfile, ctx.runfile.completeness
    tally_result = ctx.results["tally"]
    table = cm.InjectionTable.from_csv(section.injections, columns=_injection_columns(section))
    depth_info = None
    fit_table = table
    notes = []
    if section.depth_map is not None:
        placeholder = cm.LogisticCompleteness(0.0, 1.0)
        depth_raw = cm.DepthMap.from_fits(section.depth_map, shape=placeholder)
        missing_deg2, missing_fraction = _check_depth_map(runfile, depth_raw, ctx.footprint)
        if missing_deg2 > 0:
            notes.append(
                f"{missing_deg2:.3g} deg² ({100 * missing_fraction:.2g} % of the footprint) "
                "lies in depth-map pixels without data and counts as completeness 0"
            )
        if table.ra_deg is not None:
            offset, reference = _depth_offsets(table, depth_raw, ctx.footprint)
            usable = np.isfinite(offset)
            if not usable.any():
                raise InputError(
                    f"{runfile.location('completeness', 'depth_map')}: no injection lies in a "
                    f"depth-map pixel with data (of {len(table):,d} injections in "
                    f"'{Path(section.injections).name}'); check that the injections and the "
                    "map (its NSIDE and ORDERING keywords) describe the same field"
                )
            fit_table = cm.InjectionTable.from_arrays(
                table.mag[usable] - offset[usable], table.recovered[usable]
            )
            depth_info = {"reference_m50": reference,
                          "n_injections_outside_depth_map": int((~usable).sum())}
        else:
            cover = ctx.footprint.to_healpix(depth_raw.nside, nest=depth_raw.nest) > 0
            spread = float(np.nanstd(depth_raw.m50_mag[cover]))
            notes.append(
                "the injection table has no positions, so injections could not be moved to a "
                "common depth before the fit: the fitted curve spans every tile's depth, and "
                "the depth map then shifts it tile by tile, so the curve's width is "
                "overstated by the spread of depth between tiles "
                f"({spread:.3g} mag rms over the footprint"
                + (", so here by nothing)" if spread == 0 else ")")
            )
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
    extinction_info = None
    if ctx.extinction is not None:
        # Counts are in dereddened magnitudes: each part of the sky is complete to m50 - A.
        from countscale.extinction import dereddened_depth

        observed_depth = depth
        depth = dereddened_depth(observed_depth, fit, ctx.extinction, ctx.footprint)
        extinction_info = _extinction_shift(ctx, tally_result.regions, depth)
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
        "positions": table.ra_deg is not None,
        "injections": str(section.injections),
        "n_injections": len(table),
        "n_injections_fitted": len(fit_table),
        "m50": fit.m50.to_json(),
        "width": fit.width.to_json(),
        "m90": fit.m90.to_json(),
        "params": {k: float(v) for k, v in fit.params_.items()},
        "depth_map": depth_info,
        "extinction": extinction_info,
        "recovery": recovery.to_json(),
        "curve": {
            "mag": grid.tolist(),
            "completeness": np.asarray(fit(grid), dtype=float).tolist(),
            "band_lo": band_lo.tolist(),
            "band_hi": band_hi.tolist(),
            "effective_area_fraction": (np.asarray(total(grid)) / area).tolist(),
        },
        "notes": notes,
    }
    return StageResult(data, {"fit": fit, "depth": depth, "per_region": per_region,
                              "total": total})


def run_cosmology(runfile: Any) -> Any:
    """The run's cosmology from ``[cosmology]`` (a named realization or H0 and Om0)."""
    from countscale.cosmology import get_cosmology

    section = runfile.cosmology
    if section.H0 is not None:
        return get_cosmology(H0=section.H0, Om0=section.Om0)
    return get_cosmology(section.name)


#: Magnitude limits either side of the headline one at which the variance stage also reports
#: the analytic cosmic variance (mag), and the areas of its figure's curve (deg^2).
_VARIANCE_MAG_OFFSETS = np.arange(-3.0, 0.01, 0.5)
_CURVE_AREAS_DEG2 = np.geomspace(1e-3, 41252.96, 47)


def _variance_mag_limit(ctx: RunContext) -> tuple[float, str]:
    """The magnitude limit of the variance stage's headline values, and where it came from."""
    runfile = ctx.runfile
    section = runfile.variance
    tally_result = ctx.results["tally"]
    if section.mag_limit is not None:
        return float(section.mag_limit), "[variance] mag_limit"
    edges = tally_result.mag_edges
    if "counts" in runfile.present:
        if runfile.counts.fit_range is not None:
            return float(runfile.counts.fit_range[1]), "the faint end of [counts] fit_range"
        completeness = ctx.results.get("completeness")
        if completeness is not None:
            from countscale import counts as ct

            forward = ct.ForwardModel(edges, completeness["total"], None,
                                      area_deg2=float(tally_result.area_deg2))
            good = np.flatnonzero(forward.bin_completeness() >= 0.5)
            if good.size:
                return (float(edges[good[-1] + 1]),
                        "the faint edge of the last magnitude bin at least 50 % complete")
    return float(edges[-1]), "the faint edge of the magnitude bins"


def _region_counts_brighter(tally_result: Any, completeness: Any,
                            m_limit: float) -> tuple[np.ndarray, np.ndarray]:
    """Per region: sources brighter than m_limit, completeness-corrected and raw.

    Whole bins only (bins whose faint edge is at most m_limit), plus the sources brighter
    than the first edge. With a completeness stage each bin's count in region k is divided by
    the region's mean completeness over the bin, A_eff,k(m) / A_k.
    """
    edges = tally_result.mag_edges
    histogram = tally_result.histogram[1:].sum(axis=2)  # (K, n_mag + 2)
    used = np.flatnonzero(edges[1:] <= m_limit + 1e-9)
    raw = histogram[:, 0] + histogram[:, used + 1].sum(axis=1)
    if completeness is None:
        return raw.astype(float), raw.astype(float)
    areas = np.asarray(tally_result.region_area_deg2, dtype=float)
    corrected = histogram[:, 0].astype(float)
    for i in used:
        grid = np.linspace(edges[i], edges[i + 1], 5)
        for k, area_k in enumerate(completeness["per_region"]):
            fraction = float(np.mean(np.asarray(area_k(grid), dtype=float))) / areas[k]
            if fraction > 0:
                corrected[k] += histogram[k, i + 1] / fraction
    return corrected, raw.astype(float)


def _nz_provider(ctx: RunContext,
                 m_limit: float) -> tuple[Callable, str, list[str], list[str]]:
    """The n(z) for each magnitude limit, its source, notes and warnings.

    In order of preference: [variance] redshift_median (the user's explicit choice), the
    luminosity-function stage's ``nz(z, m_limit)``, the catalogue's redshifts.
    """
    from countscale.variance import RedshiftDistribution

    runfile, section = ctx.runfile, ctx.runfile.variance
    notes: list[str] = []
    cautions: list[str] = []
    if section.redshift_median is not None:
        fixed = RedshiftDistribution.from_median(section.redshift_median)
        notes.append(f"n(z) is the parametric form with median z = "
                     f"{section.redshift_median:g} from [variance] redshift_median, the same "
                     "at every magnitude limit")
        return (lambda m: fixed), fixed.source, notes, cautions
    lf = ctx.results.get("luminosity_function")
    lf_nz = None if lf is None else getattr(lf, "objects", {}).get("nz")
    if lf_nz is not None:
        def from_lf(m: float) -> Any:
            z_max = 3.0
            while True:
                probe = np.linspace(0.0, z_max, 301)[1:]
                values = np.asarray(lf_nz(probe, m), dtype=float)
                if z_max >= 12.0 or not values.max() > 0 or values[-1] < 1e-4 * values.max():
                    break
                z_max *= 2.0
            return RedshiftDistribution.from_function(
                lambda z: lf_nz(z, m), z_max,
                source=f"the luminosity function's n(z) for m < {m:g}")
        notes.append("n(z) from the luminosity-function fit, integrated to each magnitude limit")
        return from_lf, "the luminosity function's n(z)", notes, cautions
    columns = ctx.results["tally"].columns or {}
    if "redshift" in columns and "mag" in columns:
        z = np.asarray(columns["redshift"], dtype=float)
        mag = np.asarray(columns["mag"], dtype=float)
        has_z = np.isfinite(z) & (z >= 0)
        if has_z.any():
            z_limit = float(mag[has_z].max())
            if m_limit > z_limit + 0.05:
                message = (f"the catalogue's redshifts reach only m = {z_limit:.4g}: n(z) for "
                           f"sources brighter than {m_limit:g} is that of the sources brighter "
                           f"than {z_limit:.4g}, which sit nearer and are less diluted by "
                           "projection, so the cosmic variance is likely overestimated; give "
                           "[variance] redshift_median or a [luminosity_function] section")
                warnings.warn(message, UserWarning, stacklevel=3)
                cautions.append(message)

            def from_catalogue(m: float) -> Any:
                chosen = has_z & (mag < m)
                if chosen.sum() < 2:
                    raise InputError(
                        f"{runfile.location('catalog', 'redshift')}: fewer than 2 sources "
                        f"brighter than m = {m:g} have a redshift; no n(z) for the cosmic "
                        "variance")
                return RedshiftDistribution.from_redshifts(z[chosen])
            return from_catalogue, "the catalogue's redshifts", notes, cautions
    raise InputError(
        f"{runfile.location('variance')}: the analytic cosmic variance needs a redshift "
        "distribution: give 'redshift_median', a [catalog] 'redshift' column or a "
        "[luminosity_function] section")


def _stage_variance(ctx: RunContext) -> StageResult:
    """Cosmic variance of the footprint's mean density: jackknife and analytic, side by side.

    Live objects: ``"sigma_cv"``, a :class:`countscale.variance.CosmicVariance` whose call
    ``sigma_cv(m_limit)`` is the fractional cosmic variance of this footprint's mean surface
    density of sources brighter than ``m_limit`` (``sigma_cv.sigma(m, mask=...)`` for another
    footprint); absent when ``[variance].methods`` has no "analytic".
    """
    from countscale import variance as vr

    runfile, section = ctx.runfile, ctx.runfile.variance
    tally_result = ctx.results["tally"]
    completeness = ctx.results.get("completeness")
    area = float(tally_result.area_deg2)
    m_limit, m_limit_source = _variance_mag_limit(ctx)
    corrected, raw = _region_counts_brighter(tally_result, completeness, m_limit)
    n_raw = float(raw.sum())
    if n_raw <= 0:
        raise InputError(f"{runfile.location('variance')}: no source brighter than m = "
                         f"{m_limit:g} ({m_limit_source}); no density to estimate a variance for")
    poisson = 1.0 / math.sqrt(n_raw)
    density = float(corrected.sum()) / area
    data: dict[str, Any] = {
        "methods": list(section.methods),
        "m_limit": m_limit,
        "m_limit_source": m_limit_source,
        "area_deg2": area,
        "n_sources": int(n_raw),
        "density_per_deg2": density,
        "poisson_fraction": poisson,
        "jackknife": None,
        "analytic": None,
        "comparison": None,
        "warnings": [],
    }
    objects: dict[str, Any] = {}
    jackknife = None
    if "jackknife" in section.methods:
        if tally_result.n_regions >= 3:
            jackknife = vr.jackknife_density(corrected, tally_result.region_area_deg2, raw)
            data["jackknife"] = jackknife.to_json()
        else:
            data["warnings"].append(f"{tally_result.n_regions} regions: too few for a "
                                    "jackknife (at least 3)")
    analytic = "analytic" in section.methods
    if analytic and runfile.catalog.population == "stars":
        analytic = False
        data["warnings"].append(
            "no analytic cosmic variance for stars: it describes galaxies tracing the "
            "large-scale structure; stars' field-to-field scatter is the Galaxy's structure "
            "(galactic latitude), so the counts' errors use the jackknife")
    if analytic:
        cosmology = run_cosmology(runfile)
        power = vr.linear_power(cosmology, sigma8=section.sigma8, n_s=section.n_s,
                                wiggles=section.wiggles)
        mask = vr.footprint_mask_spectrum(ctx.footprint)
        provider, nz_source, nz_notes, nz_cautions = _nz_provider(ctx, m_limit)
        cv = vr.cosmic_variance(power, mask, provider, bias=section.bias, nz_source=nz_source)
        sigma = cv(m_limit)
        spectrum = cv.spectrum(m_limit)
        nz = spectrum.nz
        ell = np.unique(np.round(np.geomspace(1.0, mask.lmax, 60)))
        limits = m_limit + _VARIANCE_MAG_OFFSETS
        data["analytic"] = {
            "sigma_cv": sigma,
            "m_limit": m_limit,
            "nz": nz.to_json(),
            "bias": section.bias,
            "power_spectrum": {
                "model": "Eisenstein & Hu 1998, "
                         + ("with baryon wiggles" if section.wiggles else "no-wiggle"),
                "cosmology": str(cosmology.name),
                "sigma8": power.sigma8,
                "n_s": power.n_s,
                "nonlinear_correction": None,
            },
            "angular_spectrum": {
                "method": spectrum.method,
                "ell": [float(v) for v in ell],
                "cl": [float(v) for v in spectrum(ell)],
            },
            "mask": {"method": mask.method, "area_deg2": mask.area_deg2},
            "by_mag_limit": {
                "m_limit": [float(v) for v in limits],
                "sigma_cv": [float(cv(v)) for v in limits],
            },
            "notes": [*power.notes, *nz_notes,
                      "linear theory: no non-linear correction (an underestimate where "
                      "small scales matter: small fields, bright nearby samples)"],
        }
        data["poisson_over_cosmic_variance"] = poisson / sigma if sigma > 0 else None
        data["total_fraction"] = math.hypot(poisson, sigma)
        areas = _CURVE_AREAS_DEG2[_CURVE_AREAS_DEG2 * density >= 1.0]  # at least one source
        curve = vr.caps_curve(cv.spectrum(m_limit, lmax=2e5), areas, density_per_deg2=density)
        curve["layout"] = "one circular field of each area"
        curve["footprint"] = {"area_deg2": area, "cosmic_variance": sigma,
                              "poisson": poisson}
        data["area_curve"] = curve
        objects["sigma_cv"] = cv
        if jackknife is not None:
            comparison = vr.compare_methods(sigma, jackknife)
            data["comparison"] = comparison
            if comparison["warning"]:
                warnings.warn(comparison["warning"], UserWarning, stacklevel=2)
                data["warnings"].append(comparison["warning"])
        data["warnings"] += nz_cautions
    return StageResult(data, objects)


def _integral_with_bright_part(fit: Any, m_limit: float, n_bright: int, area_deg2: float,
                               rng: np.random.Generator, sigma_cv: float | None = None,
                               n_bright_stars: int | None = None) -> dict:
    """N(<m): sources observed brighter than the fit range + the model over the fit range.

    The survey is taken as complete brighter than the fit range, so those sources are counted
    as observed, with Poisson draws for their error; the model part keeps its own draws.
    With a star catalogue (``n_bright_stars``, the stars brighter than the fit range) the
    bright part is of galaxies: Poisson draws of the sources less Poisson draws of the stars
    (clipped at 0), the second a ``stars`` share of the budget, as in the fit.
    Two quantities, each an Estimate, labelled in the result:

    * this field's realised density (``per_deg2_this_field``): Poisson noise only (the fit's
      Poisson covariance), the number of sources this footprint actually holds per deg²;
    * the population's mean density (``per_deg2``): with ``sigma_cv`` (the analytic cosmic
      variance of this footprint's mean density) the realised draws are multiplied by
      lognormal factors of median 1 and rms ``sigma_cv`` (Poisson ⊕ cosmic variance; the
      analytic term includes the scales a jackknife sees and the larger ones, so the
      jackknife is not added as well). Without it, the fit's reported covariance (Poisson +
      the jackknife's clustering excess, which misses modes larger than the footprint).

    Budget shares are of the variance of log10 of each quantity.
    """
    from countscale.estimate import Estimate
    from countscale.variance import lognormal_factor_draws

    stars = n_bright_stars is not None

    def with_bright(integral: Any) -> tuple[np.ndarray, dict]:
        draws = np.asarray(integral.total.draws, dtype=float)
        bright = rng.poisson(max(n_bright, 0), size=draws.size).astype(float)
        if stars:
            bright = np.clip(bright - rng.poisson(max(n_bright_stars, 0), size=draws.size),
                             0.0, None)
        total = draws + bright
        var_model, var_bright = float(np.var(draws)), float(n_bright)
        shares = {k: v * var_model for k, v in integral.total.budget.items()}
        shares["poisson"] = shares.get("poisson", 0.0) + var_bright
        if stars:
            shares["stars"] = shares.get("stars", 0.0) + float(n_bright_stars)
        norm = sum(shares.values()) or 1.0
        return total, {k: v / norm for k, v in shares.items()}

    field_total, field_budget = with_bright(fit.integral_counts(
        m_limit, area_deg2=area_deg2, rng=rng, covariance="poisson"))
    if not stars:
        field_budget = {"poisson": 1.0}
    if sigma_cv is not None:
        factors = lognormal_factor_draws(sigma_cv, field_total.size, rng)
        population_total = field_total * factors
        var_poisson = float(np.var(np.log10(field_total)))
        var_cv = math.log1p(sigma_cv**2) / math.log(10.0) ** 2
        norm = (var_poisson + var_cv) or 1.0
        # This field's noise (Poisson, and the subtracted stars') by its own shares.
        population_budget = {k: v * var_poisson / norm for k, v in field_budget.items()}
        population_budget["cosmic_variance"] = var_cv / norm
        clustering = {
            "method": "analytic",
            "sigma_cv": float(sigma_cv),
            "note": ("analytic cosmic variance of this footprint's mean density (variance "
                     "stage): all scales, including those larger than the footprint"),
        }
    else:
        population_total, population_budget = with_bright(
            fit.integral_counts(m_limit, area_deg2=area_deg2, rng=rng))
        clustering = {
            "method": "jackknife" if fit.n_regions_ else "none",
            "sigma_cv": None,
            "note": ("jackknife over footprint regions: misses modes larger than the "
                     "footprint, so the interval is too narrow for the population's mean; "
                     "add a [variance] section for the analytic term"
                     if fit.n_regions_ else
                     "no clustering term: Poisson only (add a [variance] section)"),
        }
    population = Estimate.from_draws(population_total / area_deg2, "deg^-2",
                                     budget=population_budget)
    this_field = Estimate.from_draws(field_total / area_deg2, "deg^-2", budget=field_budget)
    return {
        "m_limit": float(m_limit),
        "area_deg2": float(area_deg2),
        "per_deg2": population.to_json(),
        "total": Estimate.from_draws(population_total, "sources",
                                     budget=population_budget).to_json(),
        "per_deg2_this_field": this_field.to_json(),
        "total_this_field": Estimate.from_draws(field_total, "sources",
                                                budget=field_budget).to_json(),
        "definitions": {
            "per_deg2": "the population's mean surface density (what extrapolation to other "
                        "areas needs): Poisson noise and cosmic variance",
            "total": "per_deg2 times this footprint's area: the expected number in a "
                     "footprint of this area",
            "per_deg2_this_field": "this footprint's realised surface density: Poisson noise "
                                   "only (clustering made it what it is)",
            "total_this_field": "the number of sources this footprint holds: Poisson noise "
                                "only",
        },
        "cosmic_variance": clustering,
        "n_observed_brighter": int(n_bright),
        **({"n_stars_brighter": int(n_bright_stars)} if stars else {}),
    }


def _normalisation(fit: Any, sigma_cv: float | None) -> dict | None:
    """log10_norm for the population's mean (Poisson ⊕ cosmic variance) and this field."""
    from countscale.estimate import Estimate

    names = fit.model_.param_names
    if sigma_cv is None or "log10_norm" not in names:
        return None
    i = names.index("log10_norm")
    value = float(fit.params_["log10_norm"])
    var_poisson = float(fit.cov_poisson_[i, i])
    # The subtracted stars' Poisson noise (zero without a star catalogue).
    var_stars = float(fit.cov_stars_[i, i])
    var_cv = math.log1p(sigma_cv**2) / math.log(10.0) ** 2
    total = var_poisson + var_stars + var_cv
    field_total = var_poisson + var_stars
    unit = fit.estimates_["log10_norm"].unit
    with_stars = fit.star_counts_ is not None
    budget = {"poisson": var_poisson / total, "cosmic_variance": var_cv / total}
    field_budget = {"poisson": 1.0}
    if with_stars:
        budget["stars"] = var_stars / total
        field_budget = {"poisson": var_poisson / field_total, "stars": var_stars / field_total}
    return {
        "reference_mag": float(fit.model_.reference_mag),
        "log10_norm": Estimate.from_normal(
            value, math.sqrt(total), unit, budget=budget).to_json(),
        "log10_norm_this_field": Estimate.from_normal(
            value, math.sqrt(field_total), unit, budget=field_budget).to_json(),
        "definitions": {
            "log10_norm": "the population's mean normalisation: Poisson noise and the "
                          "analytic cosmic variance",
            "log10_norm_this_field": "this footprint's realised normalisation: Poisson noise "
                                     "only",
        },
    }


#: Fewest sources in the footprint's magnitude bins for a count fit (the fit itself warns
#: below this many in its range). Common figure, no source.
_MIN_COUNT_SOURCES = 20

#: Lowest mean completeness of a fitted bin: below it the correction exceeds 100x and the
#: fitted counts are the completeness model's extrapolation rather than a measurement (bins
#: between this and 50 % complete are fitted with a warning). A choice of this project.
_MIN_FIT_COMPLETENESS = 0.01


def _ledger_story(tally_result: Any) -> str:
    """Where the catalogue's rows went, in one clause, for messages that blame the data."""
    ledger = tally_result.ledger
    parts = [f"{ledger.rows_read:,d} rows read", f"{ledger.rows_in_footprint:,d} in the "
             f"footprint ({tally_result.area_deg2:.3g} deg²)",
             f"{ledger.rows_outside_footprint:,d} outside"]
    parts += [f"{n:,d} rejected as {reason}" for reason, n in
              sorted(ledger.rows_rejected.items(), key=lambda item: -item[1]) if n]
    return "; ".join(parts)


#: Share of the catalogue's rows without a usable magnitude above which the counts say that
#: their densities leave those rows out (a few bad rows are the ledger's business alone).
_NOTABLE_MAGNITUDE_LOSS = 0.01


def _rows_without_magnitude_note(ledger: Any) -> str | None:
    """A note for the counts when many rows were rejected for their magnitude, else None.

    Such rows are rejected before the footprint test, so whether they lie in the footprint is
    not known; if they are real sources there, every density is low by up to their share.
    """
    reasons = ("mag_missing", "mag_implausible")
    lost = {r: int(ledger.rows_rejected.get(r, 0)) for r in reasons}
    n_lost = sum(lost.values())
    if not ledger.rows_read or n_lost / ledger.rows_read <= _NOTABLE_MAGNITUDE_LOSS:
        return None
    listed = ", ".join(f"{r} {n:,d}" for r, n in lost.items() if n)
    return (f"{100 * n_lost / ledger.rows_read:.2g} % of the catalogue's rows ({n_lost:,d}: "
            f"{listed}) have no usable magnitude and are not counted; if they are sources in "
            "the footprint, every density and N(<m) here is low by up to that share")


def _whole_bins(edges: np.ndarray, fit_range: tuple[float, float]) -> tuple[float, float] | None:
    """The bins lying wholly inside ``fit_range``, as (first edge, last edge); None if none."""
    lo, hi = fit_range
    slack = 1e-9 * max(1.0, abs(edges[0]), abs(edges[-1]))
    inside = np.flatnonzero((edges[:-1] >= lo - slack) & (edges[1:] <= hi + slack))
    if inside.size == 0:
        return None
    return float(edges[inside[0]]), float(edges[inside[-1] + 1])


def _check_count_inputs(ctx: RunContext, fit_range: tuple[float, float], model_name: str,
                        regions: np.ndarray | None, completeness: np.ndarray,
                        default: bool) -> None:
    """Refuse a fit the data cannot support, naming the run-file key that decides it.

    ``completeness`` is each bin's mean completeness; ``default`` says that the fit range is
    the default one (the bins at least half complete), not the run file's.
    """
    from countscale import counts as ct

    runfile, tally_result = ctx.runfile, ctx.results["tally"]
    edges, observed = tally_result.mag_edges, tally_result.counts
    used = (edges[:-1] >= fit_range[0] - 1e-9) & (edges[1:] <= fit_range[1] + 1e-9)
    n_params = len(_count_models()[model_name](reference_mag=fit_range[0]).param_names)
    n_bins, n_fit = int(used.sum()), int(observed[used].sum())
    where = runfile.location("counts", "fit_range")
    shown = f"[{fit_range[0]:g}, {fit_range[1]:g}]" + (
        " (the default: the bins at least 50 % complete)" if default else "")
    low = np.flatnonzero(used & (completeness < _MIN_FIT_COMPLETENESS))
    if low.size:
        i = int(low[np.argmin(completeness[low])])
        raise InputError(
            f"{where} must keep to bins where at least {100 * _MIN_FIT_COMPLETENESS:g} % of "
            f"sources are detected (below, the fit would be the completeness model's "
            f"extrapolation); got {shown}, where bin [{edges[i]:g}, {edges[i + 1]:g}] is "
            f"{completeness[i]:.2g} complete: narrow the fit range or check [completeness]"
        )
    if n_bins <= n_params:
        raise InputError(
            f"{where} must hold more bins than the {n_params} parameters of {model_name}; "
            f"got {shown}, {n_bins} bin(s) of {edges[1] - edges[0]:g} mag"
        )
    if n_fit < ct.MIN_SOURCES:
        raise InputError(
            f"{where}: a count fit needs at least {ct.MIN_SOURCES} sources in the fit range; "
            f"got {n_fit:,d} in {shown} ({_ledger_story(tally_result)})"
        )
    if regions is not None:
        left = n_fit - regions[:, used].sum(axis=1)
        worst = int(np.argmin(left))
        if left[worst] <= n_params:
            raise InputError(
                f"{runfile.location('variance', 'regions')} must leave enough sources for "
                f"each jackknife refit; got {tally_result.n_regions} regions, and leaving out "
                f"region {worst} leaves {int(left[worst])} of the {n_fit:,d} sources in "
                f"{shown} (use fewer, larger regions)"
            )


def _star_counts_for_fit(ctx: RunContext, region_counts: Any, notes: list) -> tuple:
    """The star catalogue's counts per bin (and per region) when ``[contamination]`` gave one.

    Returns ``(star_counts, region_star_counts, star_tally)``, all None without a star
    catalogue (and with a classifier, whose stars the tally already left out). The region
    counts are None when the fit has no jackknife; a star in no region (the star catalogue
    reaching cells the galaxy regions do not) leaves them None too, and the caller drops the
    jackknife, as it does for galaxies.
    """
    stage = ctx.results.get("contamination")
    star_tally = None if stage is None else stage.objects.get("star_tally")
    if star_tally is None:
        return None, None, None
    stars = np.asarray(star_tally.counts)
    if region_counts is None:
        return stars, None, star_tally
    region_stars = np.asarray(star_tally.region_counts)
    if star_tally.n_unassigned or not np.array_equal(region_stars.sum(axis=0), stars):
        notes.append("some stars of the star catalogue fall in no jackknife region: errors are "
                     "Poisson only")
        return stars, False, star_tally
    return stars, region_stars, star_tally


def _stage_counts(ctx: RunContext) -> StageResult:
    """Fit the number counts through the forward model; integral and differential counts.

    With ``[contamination]`` (a star catalogue of the same survey, tallied by the
    contamination stage, which runs first) the observed counts are modelled as galaxies +
    stars: the expected count per bin is the galaxy model through completeness and scatter
    plus the star catalogue's count in that bin, whose Poisson noise is propagated into the
    fit's covariance (a ``stars`` budget share; see :class:`countscale.counts.CountsFit`).
    The fitted model, the corrected differential counts and N(<m) (population and this
    field) are then of galaxies; ``data["stars"]`` says how many stars were subtracted.
    """
    from countscale import counts as ct

    runfile, section = ctx.runfile, ctx.runfile.counts
    tally_result = ctx.results["tally"]
    completeness = ctx.results.get("completeness")
    area = float(tally_result.area_deg2)
    edges = tally_result.mag_edges
    n_binned = int(tally_result.counts.sum())
    if n_binned < _MIN_COUNT_SOURCES:
        raise InputError(
            f"{runfile.location('counts', 'bins')}: a count fit needs at least "
            f"{_MIN_COUNT_SOURCES} sources in the footprint within the bins "
            f"[{edges[0]:g}, {edges[-1]:g}]; got {n_binned:,d} ({_ledger_story(tally_result)})"
        )
    notes = []
    no_magnitude = _rows_without_magnitude_note(tally_result.ledger)
    if no_magnitude:
        notes.append(no_magnitude)
    if completeness is not None:
        effective, per_region = completeness["total"], list(completeness["per_region"])
    else:
        effective, per_region = area, [float(a) for a in tally_result.region_area_deg2]
        notes.append("no [completeness] section: the survey is taken as complete at every "
                     "magnitude fitted")
    columns = tally_result.columns
    scatter = None
    if columns is not None and "mag_error" in columns and "mag" in columns:
        # Errors of sources within a magnitude of the bins: the scatter the fit needs, and
        # no say for a stray magnitude far away.
        try:
            scatter = ct.scatter_from_errors(columns["mag"], columns["mag_error"],
                                             mag_range=(edges[0] - 1.0, edges[-1] + 1.0))
        except InputError as exc:
            raise InputError(
                f"{runfile.location('catalog', 'mag_error')} column "
                f"'{runfile.catalog.mag_error}': {exc}"
            ) from exc
    else:
        notes.append("no magnitude errors in the catalogue: photometric scatter is ignored")
    forward = ct.ForwardModel(tally_result.mag_edges, effective, scatter, area_deg2=area)
    fit_range = section.fit_range
    if fit_range is None:
        # Default: the bins that are at least half complete (a fit leaning on completeness
        # below 50 % is doubtful; common figure, no source).
        good = np.flatnonzero(forward.bin_completeness() >= 0.5)
        if good.size == 0:
            raise InputError(
                f"{runfile.location('counts', 'fit_range')} is needed: no magnitude bin in "
                f"[{edges[0]:g}, {edges[-1]:g}] is at least 50 % complete, so there is no "
                "default; got none"
            )
        fit_range = (float(edges[good[0]]), float(edges[good[-1] + 1]))
        default_range = True
    else:
        default_range = False
        snapped = _whole_bins(edges, fit_range)
        if snapped is None:
            raise InputError(
                f"{runfile.location('counts', 'fit_range')} must contain at least one whole "
                f"bin of {edges[1] - edges[0]:g} mag from {edges[0]:g}; got "
                f"[{fit_range[0]:g}, {fit_range[1]:g}]"
            )
        if not np.allclose(snapped, fit_range, rtol=0, atol=1e-9):
            notes.append(
                f"fit_range [{fit_range[0]:g}, {fit_range[1]:g}] does not fall on bin edges "
                f"({edges[1] - edges[0]:g} mag from {edges[0]:g}): the fit uses the whole bins "
                f"inside it, [{snapped[0]:g}, {snapped[1]:g}]"
            )
        fit_range = snapped
    observed = tally_result.counts
    region_counts = tally_result.region_counts
    if tally_result.n_unassigned or not np.array_equal(region_counts.sum(axis=0), observed):
        notes.append("some sources fall in no jackknife region: errors are Poisson only")
        region_counts, per_region = None, None
    elif tally_result.n_regions < 3:
        region_counts, per_region = None, None
        notes.append("fewer than 3 regions: errors are Poisson only (no jackknife)")
    star_counts, region_star_counts, star_tally = _star_counts_for_fit(ctx, region_counts,
                                                                       notes)
    if region_star_counts is False:
        region_counts, per_region, region_star_counts = None, None, None
    _check_count_inputs(ctx, fit_range, section.model, region_counts,
                        forward.bin_completeness(), default_range)
    star_where = runfile.location("contamination", "star_catalog")

    fits = {}
    fit_lo = float(fit_range[0])
    reference = section.reference_mag
    if reference is None:  # the middle of the fit range, rounded to 0.5 mag
        reference = 0.5 * round(fit_range[0] + fit_range[1])
    models = _count_models()
    fitters = {}
    for name in (section.model, *[m for m in models if m != section.model]):
        # N(<m) is integrated from the bright edge of the fit range (m_bright); brighter
        # sources are taken as observed (see _integral_with_bright_part).
        settings = {"reference_mag": reference, "m_bright": fit_lo}
        if name != "power_law":
            settings["m_break"] = 0.5 * (fit_range[0] + fit_range[1])
        fitters[name] = ct.CountsFit(models[name](**settings), forward, fit_range_mag=fit_range,
                                     n_bootstrap=section.n_bootstrap)
    # One step per refit: each jackknife region and each bootstrap redraw, for every model.
    n_regions = 0 if region_counts is None else region_counts.shape[0]
    refits = {name: fitter.n_bootstrap + n_regions for name, fitter in fitters.items()}
    with _progress_bar(ctx, sum(refits.values()), "counts", "refits") as bar:
        for name, fitter in fitters.items():
            start = bar.n
            try:
                fits[name] = fitter.fit(
                    observed, rng=ctx.rng, region_counts=region_counts,
                    region_effective_area_deg2=per_region, progress=bar.update,
                    star_counts=star_counts, region_star_counts=region_star_counts,
                )
            except InputError as exc:
                if name == section.model:
                    where = (star_where if star_counts is not None and "star_counts" in str(exc)
                             else runfile.location("counts"))
                    raise InputError(f"{where}: {exc}") from exc
                notes.append(f"comparison model {name} not fitted: {exc}")
            except ct.CountsFitError as exc:
                if name == section.model:
                    raise
                notes.append(f"comparison model {name} not fitted: {exc}")
            bar.update(start + refits[name] - bar.n)  # a fit that stopped early
    main = fits[section.model]
    comparison = ct.compare_models(list(fits.values())) if len(fits) > 1 else None
    m_limit = float(main.fit_range_[1])
    edges = tally_result.mag_edges
    n_bright = int(tally_result.n_brighter + observed[edges[1:] <= fit_lo].sum())
    n_bright_stars = None
    if star_tally is not None:
        n_bright_stars = int(star_tally.n_brighter + star_counts[edges[1:] <= fit_lo].sum())
    variance = ctx.results.get("variance")
    cosmic = None if variance is None else getattr(variance, "objects", {}).get("sigma_cv")
    sigma_cv = None if cosmic is None else float(cosmic(m_limit))
    integral = _integral_with_bright_part(main, m_limit, n_bright, area, ctx.rng, sigma_cv,
                                          n_bright_stars)
    differential = main.differential_counts()
    preferred = None
    if comparison is not None:
        best = min(fits, key=lambda name: fits[name].bic_)
        if best != section.model:
            preferred = {
                "model": best,
                "criterion": "BIC",
                "integral_counts": _integral_with_bright_part(
                    fits[best], m_limit, n_bright, area, ctx.rng, sigma_cv, n_bright_stars),
            }
    grid = np.arange(tally_result.mag_edges[0], tally_result.mag_edges[-1] + 1e-9,
                     _CURVE_STEP_MAG)
    bright_text = f"the {n_bright:,d} observed brighter than {fit_lo:g} (taken as complete)"
    stars_block = None
    if star_tally is not None:
        bright_text = (f"the {n_bright - n_bright_stars:,d} galaxies observed brighter than "
                       f"{fit_lo:g} ({n_bright:,d} sources less {n_bright_stars:,d} stars of "
                       "the star catalogue; taken as complete)")
        stars_block = {
            "subtracted": True,
            "source": "[contamination] star_catalog",
            "n_stars_fit_range": int(main.n_stars_),
            "n_sources_fit_range": int(main.n_sources_),
            "n_stars_binned": int(star_counts.sum()),
            "n_stars_brighter": int(n_bright_stars),
            "method": ("the expected count per bin is the galaxy model through completeness "
                       "and scatter plus the star catalogue's count in that bin (a known "
                       "additive term of the Poisson likelihood); the stars' Poisson noise is "
                       "propagated into the fit's covariance (budget share 'stars')"),
        }
    data = {
        "model": section.model,
        "fit": main.to_json(),
        "alternatives": {name: fit.to_json() for name, fit in fits.items()
                         if name != section.model},
        "comparison": None if comparison is None else comparison.to_json(),
        "integral_counts": {
            **integral,
            "note": (f"{'galaxies' if star_tally is not None else 'sources'} brighter than "
                     f"m = {m_limit:g}, the faint end of the fit range: {bright_text} "
                     "plus the fitted model, corrected for completeness and scatter, over "
                     "the fit range"),
        },
        "preferred": preferred,
        "normalisation": _normalisation(main, sigma_cv),
        "differential": differential.to_json(),
        "expected_counts": np.asarray(main.expected_counts_, dtype=float).tolist(),
        "scatter": None if scatter is None else scatter.to_json(),
        "stars": stars_block,
        "model_curves": {
            "mag": grid.tolist(),
            **{name: np.asarray(fit.model_.density(grid), dtype=float).tolist()
               for name, fit in fits.items()},
        },
        "notes": notes,
    }
    return StageResult(data, {"fit": main, "fits": fits, "forward": forward,
                              "scatter": scatter})


def _count_models() -> dict[str, Any]:
    """The count models by their run-file names."""
    from countscale import counts as ct

    return {"power_law": ct.PowerLaw, "broken_power_law": ct.BrokenPowerLaw,
            "double_power_law": ct.DoublePowerLaw}


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
        if fit.normalisation_["jackknife_relative_variance"] is not None:
            notes.append("the normalisation's cosmic variance is the jackknife's over the "
                         "footprint's regions, which cannot see structure larger than the "
                         "footprint: an underestimate (the [variance] stage gives the analytic "
                         "value)")
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


def _wants_contamination(runfile: Any) -> bool:
    return runfile.catalog.classifier is not None or "contamination" in runfile.present


def _stage_contamination(ctx: RunContext) -> StageResult:
    """Stars among the sources per magnitude bin: from the classifier, or a star catalogue.

    With ``[catalog] classifier`` the tally already left the stars out of every count (and of
    the fits); this reports how many it left out per bin. With ``[contamination]`` a star
    catalogue of the same survey is tallied over the same footprint, regions, bins and
    extinction and subtracted bin by bin. The stage runs before ``counts``, which reads the
    star tally (live object ``star_tally``, with the stars' magnitudes for the totals) and
    fits galaxies + stars, so the fitted counts, N(<m) and ``sky_total`` are of galaxies.
    """
    from countscale import contamination as cn

    runfile = ctx.runfile
    tally_result = ctx.results["tally"]
    edges = tally_result.mag_edges
    if runfile.catalog.classifier is not None:
        result = cn.from_classifier(tally_result.counts, tally_result.excluded_counts, edges)
        notes = [f"sources with [catalog] classifier >= {_classifier_threshold(runfile):g} "
                 "are stars: the tally left them out of every count and fit "
                 f"(ledger reason {tally_result.excluded_reason})"]
        return StageResult({**result.to_json(), "notes": notes}, {"contamination": result})
    from countscale.catalog import CatalogSource
    from countscale.tally import tally

    section = runfile.contamination
    columns = {k: section.columns[k] or runfile.catalog[k] for k in ("ra", "dec", "mag")}
    where = runfile.location("contamination", "star_catalog")
    try:
        source = CatalogSource(list(section.star_catalog), population="stars", **columns)
        stars = tally(source, ctx.footprint, regions=tally_result.regions, mag_bins=edges,
                      columns=("mag",), engine=ctx.engine, scheduler=ctx.scheduler,
                      chunk_rows=runfile.engine.chunk_rows, progress=ctx.progress,
                      extinction=ctx.extinction)
    except InputError as exc:
        raise InputError(f"{where}: {exc}") from None
    result = cn.subtract_stars(tally_result.counts, stars.counts, edges)
    notes = [
        "stars from the star catalogue in each bin were subtracted from the catalogue's sources; "
        "their Poisson error is added to the galaxies' (conservative when the star catalogue "
        "lists the very stars of the galaxy catalogue)",
        ("the number-count fit models the sources as galaxies + these stars, so its counts, "
         "N(<m) and the totals' sky_total are of galaxies" if "counts" in runfile.present else
         "no [counts] section: these are the only galaxy counts corrected for stars"),
    ]
    data = {**result.to_json(), "star_catalog_ledger": stars.ledger.to_dict(), "notes": notes}
    return StageResult(data, {"contamination": result, "star_tally": stars})


def _classifier_threshold(runfile: Any) -> float:
    from countscale.catalog import DEFAULT_CLASSIFIER_THRESHOLD

    value = runfile.catalog.classifier_threshold
    return DEFAULT_CLASSIFIER_THRESHOLD if value is None else float(value)


def _sky_mag_limit(runfile: Any) -> float | None:
    if runfile.sky_model.mag_limit is not None:
        return float(runfile.sky_model.mag_limit)
    limit = runfile.totals.whole_sky_mag_limit
    return None if limit is None else float(limit)


def _wants_sky_model(runfile: Any) -> bool:
    asked = runfile.catalog.population == "stars" or "sky_model" in runfile.present
    return asked and _sky_mag_limit(runfile) is not None


def _covariate_maps(runfile: Any, ctx: RunContext) -> list:
    from countscale.skymodel import CovariateMap

    maps = []
    for i, item in enumerate(runfile.sky_model.maps or ()):
        try:
            maps.append(CovariateMap.read(item.name, item.path, nest=item.nest,
                                          transform=item.transform))
        except InputError as exc:
            raise InputError(f"{runfile.location('sky_model', f'maps[{i}]')}: {exc}") from None
    if ctx.extinction is not None:
        maps.append(CovariateMap("ebv", ctx.extinction.ebv, nest=ctx.extinction.nest,
                                 path=ctx.extinction.path))
    return maps


def _stage_sky_model(ctx: RunContext) -> StageResult:
    """Fit the counts per field/region on sky covariates; integrate over the target sky.

    Live objects for later stages (the totals stage reads these): ``model`` (the fitted
    :class:`countscale.skymodel.SkyModel`), ``prediction`` (its
    :class:`~countscale.skymodel.SkyPrediction` over the target: ``total`` Estimate with draws,
    ``fraction_outside_area``/``fraction_outside_total``, ``warnings``), ``draws`` (the total's
    Monte Carlo draws), ``naive`` (plain area scaling, an Estimate), ``target`` (the target
    Footprint), ``units`` (the fitted :class:`~countscale.skymodel.SkyUnits`) and ``mag_limit``.
    """
    from countscale import skymodel as sk
    from countscale.tally import CELL_ORDER

    runfile = ctx.runfile
    section = runfile.sky_model
    tally_result = ctx.results["tally"]
    mag_limit = _sky_mag_limit(runfile)
    columns = tally_result.columns
    brighter = columns["mag"] < mag_limit
    notes = []
    completeness = ctx.results.get("completeness")
    kappa = None
    if completeness is not None:
        counts = ctx.results.get("counts")
        density = None
        if counts is not None:
            model = counts["fit"].model_
            density = model.density
        kappa = sk.cell_completeness(mag_limit, completeness["fit"], completeness["depth"],
                                     density=density)
    else:
        notes.append("no [completeness] section: the counts brighter than the limit are taken "
                     "as complete")
    units = sk.SkyUnits.from_footprint(ctx.footprint, columns["cell"][brighter],
                                       source_order=CELL_ORDER, regions=tally_result.regions,
                                       completeness=kappa)
    low = units.completeness[units.area_deg2 > 0]
    if low.size and low.min() < 0.9:
        notes.append(f"completeness of the sources brighter than {mag_limit:g} falls to "
                     f"{low.min():.2f} in places: the total leans on the completeness model "
                     "there")
    maps = _covariate_maps(runfile, ctx)
    sets = section.covariate_sets
    if sets is None:
        if runfile.catalog.population == "stars":
            sets = sk.DEFAULT_STAR_SETS
        else:
            names = tuple(m.name for m in maps)
            sets = ((), names) if names else ((),)
    where = runfile.location("sky_model")
    try:
        model = sk.SkyModel(sets, section.likelihood).fit(units, maps)
        target = sk.target_sky_footprint(runfile.totals.target_sky)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", sk.SkyModelWarning)  # reported in results
            prediction = model.predict(target, nside=section.nside, n_draws=section.draws,
                                       rng=ctx.rng)
    except InputError as exc:
        raise InputError(f"{where}: {exc}") from None
    for text in prediction.warnings:
        warnings.warn(text, sk.SkyModelWarning, stacklevel=2)
    n_observed = int(units.counts.sum())
    naive = sk.naive_total(n_observed, tally_result.area_deg2, prediction.target_area_deg2,
                           n_draws=section.draws, rng=ctx.rng)
    l_deg, b_deg = units.unit_lb()
    best = model.best_
    fit_warnings = []
    for fit in model.fits_:
        if fit.likelihood_ == "poisson" and fit.dof_ > 0 and fit.pearson_chi2_ / fit.dof_ > 2:
            ratio = fit.pearson_chi2_ / fit.dof_
            fit_warnings.append(
                f"covariates {list(fit.names_)}: the counts scatter {ratio:.1f} times more than "
                "Poisson between units; the negative-binomial likelihood would widen the "
                "interval accordingly")
    naive_ratio = naive.median / prediction.total.median if prediction.total.median > 0 else None
    data = {
        "mag_limit": mag_limit,
        "population": runfile.catalog.population,
        "target_sky": {
            "items": ([item.to_dict() for item in runfile.totals.target_sky]
                      if runfile.totals.target_sky is not None else "whole sky"),
            "area_deg2": prediction.target_area_deg2,
            "nside": prediction.nside,
        },
        "total": prediction.total.to_json(),
        "naive": naive.to_json(),
        "naive_over_model": naive_ratio,
        "naive_note": ("plain area scaling: the sources observed brighter than the limit times "
                       "target area / surveyed area, as if the population were the same "
                       "everywhere and the survey complete"),
        "fraction_outside_observed_range": {
            "area": prediction.fraction_outside_area,
            "total": prediction.fraction_outside_total,
        },
        "model": model.to_json(),
        "prediction": prediction.to_json(),
        "units": {
            "n_units": units.n_units,
            "n_fields": units.n_fields,
            "order": units.order,
            "n_observed": n_observed,
            "l_deg": l_deg.tolist(),
            "b_deg": b_deg.tolist(),
            "counts": units.counts.tolist(),
            "area_deg2": units.unit_area_deg2.tolist(),
            "exposure_deg2": units.unit_exposure_deg2.tolist(),
            "expected_best": best.expected_.tolist(),
            "completeness_min": float(low.min()) if low.size else None,
        },
        "extinction": None if ctx.extinction is None else {
            "note": "counts are in dereddened magnitudes (see the tally and completeness)"},
        "warnings": [*prediction.warnings, *fit_warnings],
        "notes": notes + list(model.notes_),
    }
    objects = {"model": model, "prediction": prediction, "draws": prediction.draws,
               "naive": naive, "target": target, "units": units, "mag_limit": mag_limit}
    return StageResult(data, objects)


# --------------------------------------------------------------------------------------------
# Totals
# --------------------------------------------------------------------------------------------

#: Footprint-average completeness below which a limit is "fainter than the data" (the
#: counts' default fit range stops at the same 50 %).
_DATA_COMPLETENESS = 0.5
#: A completeness linearisation whose refit misses by more than this share of the effect,
#: on an effect of more than _LINEARISATION_MIN_DEX, is reported (judgement call).
_LINEARISATION_TOLERANCE = 0.25
_LINEARISATION_MIN_DEX = 1e-3


@dataclass
class _Totals:
    """What the totals stage collects: Estimates and the words that go beside them."""

    estimates: dict = field(default_factory=dict)
    definitions: dict = field(default_factory=dict)
    cautions: dict = field(default_factory=dict)
    warnings: list = field(default_factory=list)
    details: dict = field(default_factory=dict)
    not_computed: dict = field(default_factory=dict)

    def caution(self, key: str, text: str, warn: bool = True) -> None:
        """A caution beside one total; ``warn`` also lists it under ``warnings``."""
        self.cautions.setdefault(key, []).append(text)
        if warn and text not in self.warnings:
            self.warnings.append(text)

    def to_json(self, n_draws: int) -> dict:
        from countscale.totals import dominant_source

        order = ("sky_total", "sky_total_naive", "present_day_volume_total",
                 "light_cone_total", "stars_total", "stars_per_galaxy")
        data: dict[str, Any] = {k: self.estimates[k].to_json() for k in order
                                if k in self.estimates}
        data["warnings"] = list(self.warnings)
        data["definitions"] = {k: v for k, v in self.definitions.items() if k in data}
        data["cautions"] = {k: list(v) for k, v in self.cautions.items() if k in data}
        data["dominant_source"] = {k: dominant_source(self.estimates[k].budget)
                                   for k in order if k in self.estimates}
        data["details"] = self.details
        data["not_computed"] = self.not_computed
        data["n_draws"] = int(n_draws)
        return data


def _with_budget_check(out: _Totals, key: str, make: Callable[[], Any]) -> Any:
    """Run ``make()``; a BudgetWarning (sources interact) becomes a caution beside ``key``."""
    from countscale.estimate import BudgetWarning

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", BudgetWarning)
        result = make()
    for item in caught:
        if issubclass(item.category, BudgetWarning):
            out.caution(key, f"the budget is only indicative: {item.message}", warn=False)
        else:
            warnings.warn_explicit(item.message, item.category, item.filename, item.lineno)
    return result


def _completeness_perturbation(fit: Any) -> tuple[list[str], np.ndarray, np.ndarray,
                                                  Callable[[np.ndarray], Any]]:
    """The completeness parameters the totals draw, and the curve for each value.

    Parametric curves: all their parameters (``params_``, ``cov_``). The monotone curve has
    no parameters to move: it is shifted in magnitude by the uncertainty of its m50.
    """
    from countscale import completeness as cm

    names = list(fit.params_)
    p_hat = np.array([fit.params_[k] for k in names], dtype=float)
    cov = np.atleast_2d(np.asarray(fit.cov_, dtype=float))
    if fit.model == "monotone":
        base = fit.model_
        m50 = float(fit.params_["m50"])
        i = names.index("m50")

        class _Shifted:
            def __init__(self, shift: float) -> None:
                self.m50 = m50 + shift
                self.shift = shift

            def __call__(self, m: Any) -> Any:
                return base(np.asarray(m, dtype=float) - self.shift)

        return (["m50"], np.array([m50]), np.array([[cov[i, i]]]),
                lambda p: _Shifted(float(p[0]) - m50))

    def shape(p: np.ndarray) -> Any:
        values = dict(zip(names, (float(v) for v in p), strict=True))
        c_max = min(values.get("c_max", 1.0), 1.0)
        if fit.model == "logistic":
            return cm.LogisticCompleteness(values["m50"], max(values["width"], 1e-6), c_max)
        return cm.FlemingCompleteness(values["m_lim"], max(values["alpha"], 1e-6), c_max)

    return names, p_hat, cov, shape


def _magnitude_at_completeness(effective: Any, area_deg2: float, level: float,
                               lo: float, hi: float) -> float | None:
    """Faintest magnitude in [lo, hi] where the footprint-average completeness is >= level."""
    grid = np.arange(lo, hi + 1e-9, 0.01)
    c = np.asarray(effective(grid), dtype=float) / area_deg2
    above = np.flatnonzero(c >= level)
    return None if above.size == 0 else float(grid[above[-1]])


def _include_only_area(runfile: Any) -> float | None:
    """Area of the footprint's include items without its exclusions (None if not built)."""
    from types import SimpleNamespace

    from countscale.footprint import Footprint

    section = runfile.footprint
    if not section.exclude or any(i.kind in ("occupancy", "map", "moc") for i in
                                  section.include):
        return None
    shapes = SimpleNamespace(max_order=section.max_order, include=section.include, exclude=())
    return float(Footprint.from_runfile_section(shapes).area_deg2)


def _totals_sky(ctx: RunContext, out: _Totals, n_draws: int) -> Any:
    """sky_total and sky_total_naive; returns the SkyTotal for isotropic populations."""
    from countscale import skymodel as sk

    runfile, section = ctx.runfile, ctx.runfile.totals
    m_limit = float(section.whole_sky_mag_limit)
    where = runfile.location("totals", "whole_sky_mag_limit")
    tally_result = ctx.results["tally"]
    mags = np.asarray((tally_result.columns or {}).get("mag", ()), dtype=float)
    n_observed = int(np.count_nonzero(mags < m_limit))
    if n_observed == 0:
        brightest = f"m = {mags.min():.4g}" if mags.size else "none"
        raise InputError(f"{where}: no source is brighter than {m_limit:g} (the brightest is "
                         f"{brightest}); there is nothing to scale to the sky")
    sky_stage = ctx.results.get("sky_model")
    if sky_stage is not None:
        target = sky_stage["target"]
    else:
        try:
            target = sk.target_sky_footprint(section.target_sky)
        except InputError as exc:
            raise InputError(f"{runfile.location('totals', 'target_sky')}: {exc}") from None
    target_area = float(target.area_deg2)
    area = float(tally_result.area_deg2)
    target_text = ("the whole sky" if section.target_sky is None else
                   "the target sky ([totals] target_sky)") + f", {target_area:,.0f} deg²"
    population = runfile.catalog.population
    unit = "stars" if population == "stars" else "galaxies"
    out.details["sky"] = {"m_limit": m_limit, "target_area_deg2": target_area,
                          "footprint_area_deg2": area, "n_observed_brighter": n_observed,
                          "target_sky": ([item.to_dict() for item in section.target_sky]
                                         if section.target_sky is not None else "whole sky")}
    naive = sk.naive_total(n_observed, area, target_area, n_draws=n_draws, rng=ctx.rng,
                           unit=unit)
    out.estimates["sky_total_naive"] = naive
    star_tally = _subtracted_star_tally(ctx)
    stars_text = ""
    if star_tally is not None and sky_stage is None:
        n_stars = int(np.count_nonzero(np.asarray(star_tally.columns["mag"]) < m_limit))
        stars_text = (f"; stars included: {n_stars:,d} of these sources are stars of the "
                      "star catalogue ([contamination]), which sky_total subtracts")
    out.definitions["sky_total_naive"] = (
        f"plain area scaling: the {n_observed:,d} sources observed brighter than "
        f"{m_limit:g} in the {area:.4g} deg² footprint × {target_text.split(', ')[-1]} / "
        f"{area:.4g} deg² (the raw count divided by the footprint's share of the target"
        f"{stars_text})")
    if sky_stage is not None:
        _sky_total_from_model(ctx, out, sky_stage, m_limit, n_draws, target_text, unit)
        contamination = ctx.results.get("contamination")
        if contamination is not None and "star_tally" in contamination.objects:
            # Not done (yet): the sky model fits the counts per field as they are.
            out.caution("sky_total", "the sky model counts every source: the stars of the "
                        "[contamination] star catalogue are not subtracted from this total")
        return None
    return _sky_total_isotropic(ctx, out, m_limit, target_area, n_observed, n_draws,
                                target_text, unit)


def _subtracted_star_tally(ctx: RunContext) -> Any:
    """The star catalogue's tally when the count fit subtracted its stars, else None."""
    counts = ctx.results.get("counts")
    stage = ctx.results.get("contamination")
    if counts is None or stage is None or counts["fit"].star_counts_ is None:
        return None
    return stage.objects.get("star_tally")


def _sky_total_isotropic(ctx: RunContext, out: _Totals, m_limit: float, target_area: float,
                         n_observed: int, n_draws: int, target_text: str, unit: str) -> Any:
    from countscale import completeness as cm
    from countscale import counts as ct
    from countscale import totals as tt

    counts = ctx.results.get("counts")
    if counts is None:
        out.not_computed["sky_total"] = ("needs a [counts] section: the total comes from the "
                                         "counts fitted through completeness and scatter")
        return None
    tally_result = ctx.results["tally"]
    area = float(tally_result.area_deg2)
    fits = counts["fits"]
    main = counts["fit"]
    forward = counts["forward"]
    fit_lo, fit_hi = (float(v) for v in main.fit_range_)
    edges = tally_result.mag_edges
    if m_limit > fit_lo:
        n_bright = int(tally_result.n_brighter
                       + main.observed_counts_[edges[1:] <= fit_lo + 1e-9].sum())
    else:
        n_bright = n_observed
    # Stars of the star catalogue among the sources: subtracted (the fits did the same).
    star_tally = _subtracted_star_tally(ctx)
    n_bright_stars = 0
    if star_tally is not None:
        if m_limit > fit_lo:
            n_bright_stars = int(star_tally.n_brighter
                                 + main.star_counts_[edges[1:] <= fit_lo + 1e-9].sum())
        else:
            n_bright_stars = int(np.count_nonzero(np.asarray(star_tally.columns["mag"])
                                                  < m_limit))
    weights, choice = tt.count_model_weights(fits)
    completeness = ctx.results.get("completeness")
    jacobians = cov = p_hat = refit = None
    if completeness is not None and m_limit > fit_lo:
        _, p_hat, cov, shape_of = _completeness_perturbation(completeness["fit"])
        effective = completeness["total"]
        scatter = counts["scatter"]

        def refit(p: np.ndarray) -> dict[str, np.ndarray]:
            curve = cm.ShiftedCompleteness(shape_of(p), effective.shifts, effective.weights_deg2)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", ct.CountsWarning)
                moved = ct.ForwardModel(forward.bin_edges_mag, curve, scatter,
                                        area_deg2=forward.area_deg2)
                return {name: fit.refit(moved) for name, fit in fits.items()}

        jacobians = tt.completeness_jacobians(refit, p_hat, cov)
    models = [tt.CountModelDraws(name, fit.model_, fit.cov_poisson_,
                                 None if jacobians is None else jacobians[name],
                                 None if star_tally is None else fit.star_jacobian_)
              for name, fit in fits.items()]
    sigma_cv, cv_note = _sky_cosmic_variance(ctx, models, fits, weights,
                                             n_bright - n_bright_stars, area, fit_lo, m_limit)
    if sigma_cv is None:
        out.caution("sky_total", cv_note)
    sky = tt.SkyTotal(m_limit, target_area, area, float(ctx.footprint.area_uncertainty_deg2),
                      n_bright, fit_lo, models, weights, cov, sigma_cv, unit=unit,
                      m_fitted=fit_hi,
                      star_counts=None if star_tally is None else main.star_counts_,
                      n_bright_stars=n_bright_stars)
    estimate = _with_budget_check(out, "sky_total", lambda: sky.estimate(n_draws, ctx.rng))
    out.estimates["sky_total"] = estimate
    central = max(weights, key=lambda k: weights[k])
    observed_text = f"the {n_bright:,d} observed"
    if star_tally is not None:
        observed_text = (f"the {n_bright - n_bright_stars:,d} galaxies observed ({n_bright:,d} "
                         f"sources less {n_bright_stars:,d} stars of the star catalogue)")
    out.definitions["sky_total"] = (
        f"{unit} brighter than {m_limit:g} over {target_text}: the population's mean surface "
        f"density ({observed_text} brighter than {min(fit_lo, m_limit):g}, taken as "
        "complete, plus the fitted counts corrected for completeness and photometric scatter"
        + (", of galaxies: the star catalogue's stars subtracted bin by bin, their Poisson "
           "noise in the budget (stars)" if star_tally is not None else "")
        + (f", a mixture of the count models weighted by evidence, mostly {central}"
           if len(models) > 1 and m_limit > fit_lo else "")
        + ") times the target's area: the expected number for a population the same "
        "everywhere, not a census")
    # Depth: how far beyond the data and the fit the limit reaches.
    c_limit = 1.0
    m_half = None
    if completeness is not None:
        c_limit = float(completeness["total"](m_limit)) / area
        m_half = _magnitude_at_completeness(completeness["total"], area, _DATA_COMPLETENESS,
                                            float(edges[0]), float(edges[-1]) + 3.0)
    if c_limit < _DATA_COMPLETENESS:
        out.caution("sky_total",
                    f"depth extrapolation: at m = {m_limit:g} the survey is {100 * c_limit:.0f} % "
                    "complete" + (f" (50 % at m = {m_half:.2f})" if m_half is not None else "")
                    + "; the sources fainter than the data are the count models' extrapolation, "
                    "and the spread between the models is in the budget (count_model)")
    if m_limit > fit_hi + 1e-9:
        out.caution("sky_total",
                    f"the counts were fitted over {fit_lo:g}–{fit_hi:g}; the total extrapolates "
                    f"the count models {m_limit - fit_hi:.2g} mag beyond the fitted range"
                    + (" (where the data are still complete)"
                       if c_limit >= _DATA_COMPLETENESS else ""))
    details = out.details["sky"]
    details.update({
        "method": "isotropic: fitted counts × target area",
        "m_bright": fit_lo,
        "n_bright": n_bright,
        "fit_range": [fit_lo, fit_hi],
        "completeness_at_limit": c_limit,
        "m50_footprint": m_half,
        "count_models": {"weights": weights, **choice,
                         "density_per_deg2": {m.name: sky.density_per_deg2(m.name)
                                              for m in models} if m_limit > fit_lo else {}},
        "cosmic_variance": {"sigma": sigma_cv, "note": cv_note},
        "area_uncertainty_deg2": float(ctx.footprint.area_uncertainty_deg2),
        "completeness": None,
    })
    if star_tally is not None:
        details["stars_subtracted"] = {
            "n_stars_fit_bins": int(np.asarray(main.star_counts_).sum()),
            "n_stars_brighter": n_bright_stars,
            "n_galaxies_brighter": n_bright - n_bright_stars,
            "budget_name": "stars",
            "note": "stars of the [contamination] star catalogue, drawn Poisson per bin and "
                    "propagated through the count fits (d parameters / d stars per bin); "
                    "sky_total_naive keeps them",
        }
    if jacobians is not None:
        check = tt.check_linearisation(sky, refit, p_hat, cov)
        details["completeness"] = {
            "method": "checked linearisation: each count model refitted with the completeness "
                      "parameters moved by ±1σ (central differences give d parameters / d "
                      "completeness), then checked by a refit 2σ along the widest axis",
            "parameters": list(completeness["fit"].params_),
            "check": check,
        }
        if (check["relative_error"] > _LINEARISATION_TOLERANCE
                and check["max_effect_dex"] > _LINEARISATION_MIN_DEX):
            out.caution("sky_total",
                        f"the completeness term is linearised; a refit 2σ away moves the total "
                        f"by {check['max_effect_dex']:.3g} dex where the linear form says "
                        f"{check['max_effect_dex'] - check['max_error_dex']:.3g}: the "
                        "completeness share of the budget is approximate")
    elif completeness is None:
        out.caution("sky_total", "no [completeness] section: the survey is taken as complete "
                    "(no completeness correction, no completeness term in the budget)", False)
    details["naive_explained"] = _naive_explained(ctx, sky, counts, completeness, estimate,
                                                  out.estimates["sky_total_naive"], m_limit,
                                                  sigma_cv)
    return sky


def _sky_cosmic_variance(ctx: RunContext, models: list, fits: Mapping, weights: Mapping,
                         n_bright: int, area: float, fit_lo: float, m_limit: float
                         ) -> tuple[float | None, str]:
    """Cosmic variance of the population's mean density: analytic, else jackknife, labelled."""
    from countscale import totals as tt

    variance = ctx.results.get("variance")
    cosmic = None if variance is None else getattr(variance, "objects", {}).get("sigma_cv")
    if cosmic is not None:
        try:
            sigma = float(cosmic(m_limit))
            return sigma, (f"analytic: {sigma:.3g} (fractional rms of this footprint's mean "
                           f"density of sources brighter than {m_limit:g}, variance stage)")
        except InputError as exc:
            fallback = f"the analytic cosmic variance failed at m = {m_limit:g} ({exc}); "
    else:
        fallback = ""
    central = max(weights, key=lambda k: weights[k])
    fit = fits[central]
    if fit.cov_jackknife_ is not None and m_limit > fit_lo:
        model = next(m for m in models if m.name == central)
        # The jackknife's excess over the Poisson floor, the subtracted stars' noise removed.
        sigma = tt.jackknife_sigma(model, fit.cov_ - fit.cov_stars_, n_bright, area, fit_lo,
                                   m_limit)
        return sigma, (fallback + f"jackknife over {fit.n_regions_} regions: {sigma:.3g}; it "
                       "misses modes larger than the footprint, so the interval is too narrow "
                       "(add [variance] methods = [\"analytic\"])")
    return None, (fallback + "no cosmic variance: the interval holds Poisson noise and the "
                  "fits only, too narrow for a clustered population (add a [variance] section)")


def _naive_explained(ctx: RunContext, sky: Any, counts: Any, completeness: Any,
                     estimate: Any, naive: Any, m_limit: float, sigma_cv: float | None) -> dict:
    """Why plain area scaling differs from sky_total, factor by factor."""
    from scipy import stats

    area = sky.area_deg2
    bright = sky.n_bright_galaxies / area
    ratio = naive.median / estimate.median
    out: dict[str, Any] = {"naive_over_sky_total": float(ratio)}
    if sky.models:
        model = sky.models[sky._central_index].model
        scatter = counts["scatter"]
        sigma_max = 0.0 if scatter is None else float(np.max(scatter(np.array([m_limit]))))
        grid = np.arange(sky.m_bright, m_limit + max(5.0 * sigma_max, 0.0) + 0.05, 0.002)
        step = 0.002
        n = np.asarray(model.density(grid), dtype=float)
        c = (np.ones_like(grid) if completeness is None
             else np.asarray(completeness["total"](grid), dtype=float) / area)
        below = grid < m_limit
        intrinsic = bright + float(np.sum(n[below])) * step
        detected = bright + float(np.sum((n * c)[below])) * step
        if scatter is None:
            observed = detected
        else:
            sigma = np.maximum(np.asarray(scatter(grid), dtype=float), 1e-9)
            observed = bright + float(np.sum(n * c * stats.norm.cdf((m_limit - grid) / sigma))
                                      ) * step
        stars_factor = 1.0
        star_tally = _subtracted_star_tally(ctx)
        if star_tally is not None:
            # The raw count holds the star catalogue's stars; sky_total does not.
            mags = np.asarray(ctx.results["tally"].columns["mag"], dtype=float)
            n_sources = int(np.count_nonzero(mags < m_limit))
            n_stars = int(np.count_nonzero(np.asarray(star_tally.columns["mag"]) < m_limit))
            stars_factor = n_sources / max(n_sources - n_stars, 1)
        field_ratio = ratio / (observed / intrinsic) / stars_factor
        out.update({
            "completeness_factor": detected / intrinsic,
            "scatter_factor": observed / detected,
            "expected_naive_over_sky_total": observed / intrinsic,
            "this_field_over_model": float(field_ratio),
            "cosmic_variance_sigma": sigma_cv,
        })
        if star_tally is not None:
            out["stars_factor"] = float(stars_factor)
    outer = _include_only_area(ctx.runfile)
    if outer is not None and outer > 0:
        out["holes"] = {"area_without_holes_deg2": outer,
                        "naive_if_holes_ignored_factor": area / outer}
    return out


def _sky_total_from_model(ctx: RunContext, out: _Totals, stage: Any, m_limit: float,
                          n_draws: int, target_text: str, unit: str) -> None:
    """sky_total from the sky model's draws, with the completeness uncertainty multiplied in."""
    from countscale import completeness as cm
    from countscale import skymodel as sk
    from countscale import totals as tt

    prediction = stage["prediction"]
    units = stage["units"]
    model = stage["model"]
    completeness = ctx.results.get("completeness")
    gradient = cov = None
    check = None
    if completeness is not None:
        _, p_hat, cov, shape_of = _completeness_perturbation(completeness["fit"])
        depth = completeness["depth"]
        counts = ctx.results.get("counts")
        density = None if counts is None else counts["fit"].model_.density
        centre_m50 = float(shape_of(p_hat).m50)

        def kappa(p: np.ndarray) -> np.ndarray:
            shape = shape_of(p)
            moved = None if depth is None else cm.DepthMap(
                depth.m50_mag + (float(shape.m50) - centre_m50), shape, nest=depth.nest)
            return sk.cell_completeness(m_limit, shape, moved, density)(units.order, units.cells)

        def log_exposure(p: np.ndarray) -> float:
            return math.log(float(np.sum(units.area_deg2 * kappa(p))))

        sigma = np.sqrt(np.clip(np.diag(cov), 0.0, None))
        gradient = np.zeros(p_hat.size)
        for j, h in enumerate(sigma):
            if h > 0:
                up, down = p_hat.copy(), p_hat.copy()
                up[j] += h
                down[j] -= h
                # The density scales as 1 / (exposure): d ln total = -d ln exposure.
                gradient[j] = -(log_exposure(up) - log_exposure(down)) / (2 * h)
        check = _sky_model_check(ctx, stage, kappa, gradient, p_hat, cov)
    estimate = _with_budget_check(out, "sky_total", lambda: tt.sky_model_total(
        prediction.total, gradient, cov, n_draws=n_draws, rng=ctx.rng, unit=unit))
    out.estimates["sky_total"] = estimate
    sets = " or ".join("(" + (", ".join(f.names_) or "constant") + ")" for f in model.fits_)
    out.definitions["sky_total"] = (
        f"{unit} brighter than {m_limit:g} over {target_text}: the sky model (counts per field "
        f"regressed on sky covariates {sets}, weighted by AIC) integrated over the target, "
        "completeness-corrected")
    for text in prediction.warnings:
        out.caution("sky_total", text)
    units_exposure = float(np.sum(units.weight_deg2))
    units_area = float(np.sum(units.area_deg2))
    naive = out.estimates["sky_total_naive"]
    ratio = naive.median / estimate.median
    out.details["sky"].update({
        "method": "sky model: counts per field regressed on sky covariates, integrated over "
                  "the target",
        "fraction_outside_observed_range": {"area": prediction.fraction_outside_area,
                                            "total": prediction.fraction_outside_total},
        "completeness": None if check is None else {
            "method": "checked linearisation: the total scales as 1 / (area-weighted "
                      "completeness of the counted sources), differentiated at ±1σ of each "
                      "completeness parameter; checked by refitting the sky model 2σ along "
                      "the widest axis",
            "gradient_ln_total": gradient.tolist(),
            "check": check,
        },
        "naive_explained": {
            "naive_over_sky_total": float(ratio),
            "completeness_factor": units_exposure / units_area,
            "structure_factor": float(ratio / (units_exposure / units_area)),
            "note": ("plain scaling takes the fields' mean density as the target's; for a "
                     "population that changes across the sky (stars: the Galaxy's disk and "
                     "bulge) the fields are not typical of the target"),
        },
    })


def _sky_model_check(ctx: RunContext, stage: Any, kappa: Callable, gradient: np.ndarray,
                     p_hat: np.ndarray, cov: np.ndarray) -> dict:
    """Refit the sky model's heaviest set with the completeness 2σ away; compare."""
    import dataclasses

    from countscale import skymodel as sk

    model, units, prediction = stage["model"], stage["units"], stage["prediction"]
    values, vectors = np.linalg.eigh(0.5 * (cov + cov.T))
    widest = int(np.argmax(values))
    delta = 2.0 * math.sqrt(max(values[widest], 0.0)) * vectors[:, widest]
    best = int(np.argmax(model.weights_))
    names = model.fits_[best].names_
    moved = dataclasses.replace(units, completeness=kappa(p_hat + delta))
    section = ctx.runfile.sky_model
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", sk.SkyModelWarning)
        refit = sk.SkyModel([names], model.likelihood).fit(moved, model.maps_).predict(
            stage["target"], nside=section.nside, n_draws=100, rng=0)
    before = prediction.per_set[best]["best_fit_total"]
    after = refit.per_set[0]["best_fit_total"]
    refit_dex = math.log10(after / before)
    linear_dex = float(delta @ gradient) / math.log(10.0)
    return {"n_sigma": 2.0, "refit_dex": refit_dex, "linear_dex": linear_dex,
            "max_error_dex": abs(refit_dex - linear_dex),
            "relative_error": abs(refit_dex - linear_dex) / abs(refit_dex)
            if refit_dex else 0.0}


def _volume_of(section: Any) -> tuple[tuple[float, float] | None, tuple[float, float], str]:
    """(present-day shell or None for the horizon, light-cone redshifts, words)."""
    if section.volume.kind == "observable_universe":
        return (None, (0.0, float(section.light_cone_z_max)),
                "the observable universe (the comoving volume inside the particle horizon)")
    z_lo, z_hi = (float(v) for v in section.volume.redshift)
    return (z_lo, z_hi), (z_lo, z_hi), f"the comoving shell {z_lo:g} < z < {z_hi:g}"


def _normalisation_sigma(ctx: RunContext, fit: Any) -> tuple[float | None, str]:
    """Cosmic variance of the fitted normalisation beyond what its draws already hold."""
    variance = ctx.results.get("variance")
    cosmic = None if variance is None else getattr(variance, "objects", {}).get("sigma_cv")
    info = fit.normalisation_
    jackknife = info["jackknife_relative_variance"]
    held = 0.0 if jackknife is None else max(jackknife - info["poisson_relative_variance"], 0.0)
    m_lf = float(ctx.runfile.luminosity_function.mag_limits[1])
    if cosmic is not None:
        try:
            sigma = float(cosmic(m_lf))
        except InputError as exc:
            return None, f"no analytic cosmic variance for the normalisation ({exc})"
        top = math.sqrt(max(sigma**2 - held, 0.0))
        return top, (f"the normalisation's cosmic variance is the analytic {sigma:.3g} for "
                     f"sources brighter than m = {m_lf:g} over the footprint (variance stage); "
                     f"the fit's jackknife already held {math.sqrt(held):.3g} of it, the rest "
                     f"({top:.3g}) is the budget's cosmic_variance")
    if jackknife is not None:
        return None, ("the normalisation's cosmic variance is the jackknife's (inside the "
                      "fit's draws): it misses modes larger than the footprint")
    return None, "no cosmic variance in the normalisation (add a [variance] section)"


def _totals_volume(ctx: RunContext, out: _Totals, n_draws: int) -> None:
    """present_day_volume_total, light_cone_total and, for galaxies, stars_total."""
    from countscale import cosmology as cs
    from countscale import totals as tt
    from countscale.extrapolation import CosmologyDraws, LogNormal

    runfile, section = ctx.runfile, ctx.runfile.totals
    lf = ctx.results.get("luminosity_function")
    fit = None if lf is None else lf["fit"]
    keys = ["present_day_volume_total", "light_cone_total"] + (
        ["stars_total"] if section.stars else [])
    if fit is None:
        for key in keys:
            out.not_computed[key] = "the luminosity-function stage has no STY fit"
        return
    cosmo = run_cosmology(runfile)
    quantity = fit.sample_.quantity
    function = tt.FittedFunction(quantity, runfile.luminosity_function.model,
                                 dict(fit.params_), cs.hubble_h(cosmo))
    sampler = tt.FunctionDraws(function, fit.draw_params)
    cosmology = CosmologyDraws(cosmo)
    shell, cone, volume_text = _volume_of(section)
    limit = float(section.faint_limit)
    top_up, cv_note = _normalisation_sigma(ctx, fit)
    if quantity == "luminosity":
        limit_text = f"brighter than M = {limit:g}"
        x = fit.sample_.x(fit.evolution_.Q)
        data_edge = float(np.max(x))
        beyond = limit > data_edge
        edge_text = f"the faintest galaxy in the fit has M = {data_edge:.3g}"
    else:
        limit_text = f"above 10^{limit:g} Msun"
        x = fit.sample_.x(0.0)
        data_edge = float(np.min(x))
        beyond = limit < data_edge
        edge_text = f"the least massive galaxy in the fit has 10^{data_edge:.3g} Msun"
    z_fit = tuple(float(v) for v in lf["fit_redshift_range"])
    evolution = fit.evolution_
    fitted = fit.fitted_evolution_
    evo_text = (f"Q = {evolution.Q:g}, P = {evolution.P:g}"
                + ("" if fitted else ", from the run file, not fitted"))
    common = {"faint_limit": limit, "limit_text": limit_text, "volume": volume_text,
              "fit_redshift_range": list(z_fit), "evolution": evo_text,
              "normalisation_cosmic_variance": {"sigma": top_up, "note": cv_note}}
    present = _with_budget_check(out, "present_day_volume_total", lambda: tt.present_day_total(
        function, sampler, limit, cosmology, shell, n_draws, ctx.rng,
        normalisation_sigma=top_up))
    cone_total = _with_budget_check(out, "light_cone_total", lambda: tt.light_cone_total(
        function, sampler, limit, cosmology, cone, n_draws, ctx.rng,
        normalisation_sigma=top_up))
    out.estimates["present_day_volume_total"] = present
    out.estimates["light_cone_total"] = cone_total
    out.definitions["present_day_volume_total"] = (
        f"present-day density × volume: today's number density of galaxies {limit_text} "
        f"(the fitted function at z = 0) times the comoving volume of {volume_text}; the "
        "volume filled with galaxies as they are now, not as we see them")
    out.definitions["light_cone_total"] = (
        f"along our past light cone: galaxies {limit_text} counted in each redshift shell as "
        f"it was when its light left it (∫ n(z) dV/dz dz, {cone[0]:g} < z < {cone[1]:g}, "
        f"fitted function with its evolution, {evo_text}); what a complete survey of the "
        "whole sky would catalogue")
    for key in ("present_day_volume_total", "light_cone_total"):
        if beyond:
            out.caution(key, f"faint-end extrapolation: the limit ({limit_text}) lies beyond "
                        f"the data ({edge_text}); the fitted form's faint end is assumed to "
                        "continue")
    if cone[1] > z_fit[1] + 1e-9 or cone[0] < z_fit[0] - 1e-9:
        out.caution("light_cone_total",
                    f"evolution extrapolation: the function was fitted at {z_fit[0]:g} < z < "
                    f"{z_fit[1]:g}; the light cone to z = {cone[1]:g} carries its evolution "
                    f"({evo_text}) beyond the data, an assumption not a measurement, and its "
                    "error is not in the budget")
    if shell is not None and (shell[1] > z_fit[1] + 1e-9 or shell[0] < z_fit[0] - 1e-9):
        out.caution("present_day_volume_total",
                    f"the shell {shell[0]:g} < z < {shell[1]:g} reaches beyond the redshifts of "
                    f"the fit ({z_fit[0]:g}–{z_fit[1]:g}); it is filled with the z = 0 density",
                    False)
    out.details["volume"] = {**common, "present_over_light_cone":
                             present.median / cone_total.median}
    if section.stars and runfile.catalog.population == "galaxies":
        _totals_stars(ctx, out, function, sampler, cosmology, shell, volume_text, top_up,
                      n_draws, LogNormal)


def _totals_stars(ctx: RunContext, out: _Totals, function: Any, sampler: Any, cosmology: Any,
                  shell: Any, volume_text: str, top_up: float | None, n_draws: int,
                  lognormal: Any) -> None:
    from countscale import totals as tt

    section = ctx.runfile.totals
    imfs = [section.imf] if isinstance(section.imf, str) else list(section.imf)
    per_msun = tt.stars_per_msun_sampler(imfs, section.mass_imf)
    m2l = section.mass_to_light
    mass_to_light = None if m2l is None else lognormal(m2l.value, m2l.sigma_dex)
    try:
        estimate = _with_budget_check(out, "stars_total", lambda: tt.stars_total(
            function, sampler, cosmology, per_msun, shell, mass_to_light,
            None if m2l is None else m2l.sun_abs_mag, n_draws, ctx.rng,
            normalisation_sigma=top_up))
    except InputError as exc:
        out.not_computed["stars_total"] = f"the stellar mass density cannot be formed ({exc})"
        return
    out.estimates["stars_total"] = estimate
    if function.quantity == "luminosity":
        mass_text = (f"the luminosity density × a mass-to-light ratio of {m2l.value:g} "
                     f"(± {m2l.sigma_dex:g} dex; {m2l.source}; Sun at M = {m2l.sun_abs_mag:g})")
    else:
        mass_text = "the fitted mass function's ∫ M Φ dM"
    imf_text = " or ".join(imfs)
    out.definitions["stars_total"] = (
        f"stars in {volume_text} today (present-day density × volume): the stellar mass "
        f"density ({mass_text}, masses for a {section.mass_imf} IMF) × the comoving volume ÷ "
        f"the mean stellar mass of the {imf_text} IMF (every star ever formed, counted at birth "
        "mass from 0.08 to 100 Msun; remnants not counted)")
    # Stated systematics: the IMFs not drawn, and counting only living stars.
    base = tt.stars_per_msun_sampler(imfs[0], section.mass_imf)
    centre = float(np.asarray(base.central(1))[0])
    systematics = []
    for name in ("chabrier", "kroupa", "salpeter"):
        if name not in imfs:
            other = float(np.asarray(tt.stars_per_msun_sampler(name, section.mass_imf)
                                     .central(1))[0])
            systematics.append({"name": f"imf_{name}", "effect_log10": math.log10(other / centre),
                                "note": f"with the {name} IMF instead of {imfs[0]}"})
    living = float(np.asarray(tt.stars_per_msun_sampler(imfs[0], section.mass_imf,
                                                         turnoff_mass=1.0).central(1))[0])
    systematics.append({"name": "living_stars", "effect_log10": math.log10(living / centre),
                        "note": "counting only stars alive in an old population (turnoff 1 "
                                "Msun; the mass of remnants kept in the stellar mass)"})
    out.details["stars"] = {"imf": imfs, "mass_imf": section.mass_imf,
                            "quantity_counted": "stars in the volume",
                            "systematics": systematics}
    for item in systematics:
        out.caution("stars_total", f"{item['note']}: {item['effect_log10']:+.2f} dex", False)
    if m2l is not None and m2l.source.strip().lower() in ("assumed", "assumption", "guess"):
        out.caution("stars_total", f"the mass-to-light ratio ({m2l.value:g}) is assumed, not "
                    "measured")
    if section.galaxy_log10_mass is not None:
        galaxy = tt.stars_per_galaxy(section.galaxy_log10_mass, per_msun, n_draws, ctx.rng)
        out.estimates["stars_per_galaxy"] = galaxy
        mass = 10.0 ** section.galaxy_log10_mass
        out.details["stars"]["stars_per_galaxy_by_imf"] = {
            name: mass * float(np.asarray(tt.stars_per_msun_sampler(name, section.mass_imf)
                                          .central(1))[0]) for name in imfs}
        out.definitions["stars_per_galaxy"] = (
            f"stars in one galaxy of stellar mass 10^{section.galaxy_log10_mass:g} Msun "
            f"({section.mass_imf} IMF masses) ÷ the mean stellar mass of the {imf_text} IMF")


def _totals_columns(runfile: Any) -> tuple[str, ...]:
    """The magnitudes, for counting the sources brighter than the sky totals' limit."""
    return ("mag",) if runfile.totals.whole_sky_mag_limit is not None else ()


def _stage_totals(ctx: RunContext) -> StageResult:
    """Totals over the target sky, a volume and the light cone, and in stars (``[totals]``).

    ``results["totals"]``: the Estimates ``sky_total`` (sources brighter than
    ``whole_sky_mag_limit`` over ``target_sky``), ``sky_total_naive`` (plain area scaling),
    ``present_day_volume_total``, ``light_cone_total``, ``stars_total`` (and
    ``stars_per_galaxy`` with ``galaxy_log10_mass``), each with its budget; ``warnings``
    (extrapolations beyond the data); ``definitions`` and ``cautions`` per total (what the
    number means and what to say beside it); ``dominant_source`` per total; ``details`` (how
    each was made: the count-model weights, the completeness linearisation and its check,
    why plain scaling differs, the volume, the IMF systematics); ``not_computed`` (totals the
    run cannot give, and why); ``n_draws``.

    Which route gives ``sky_total``: with a sky model (stars, or ``[sky_model]``), the sky
    model's draws with the completeness uncertainty multiplied in; otherwise (galaxies, a
    population the same everywhere) the fitted counts times the target's area
    (:class:`countscale.totals.SkyTotal`). For ``population = "stars"``, ``stars_total`` is
    ``sky_total`` (stars on the sky brighter than the limit); for galaxies it is the stars in
    ``[totals] volume``.
    """
    section = ctx.runfile.totals
    out = _Totals()
    n_draws = int(section.draws)
    sky = None
    if section.whole_sky_mag_limit is None:
        for key in ("sky_total", "sky_total_naive"):
            out.not_computed[key] = "no [totals] whole_sky_mag_limit"
    else:
        sky = _totals_sky(ctx, out, n_draws)
    population = ctx.runfile.catalog.population
    if section.volume is None:
        for key in ("present_day_volume_total", "light_cone_total"):
            out.not_computed[key] = ("no [totals] volume" if population == "galaxies" else
                                     "volume totals apply to galaxies")
    else:
        _totals_volume(ctx, out, n_draws)
    if section.stars and population == "stars":
        if "sky_total" in out.estimates:
            out.estimates["stars_total"] = out.estimates["sky_total"]
            out.definitions["stars_total"] = ("stars on the sky: the same number as sky_total ("
                                              + out.definitions["sky_total"] + ")")
            if out.cautions.get("sky_total"):
                out.cautions["stars_total"] = list(out.cautions["sky_total"])
            out.details["stars"] = {"quantity_counted": "stars on the sky brighter than the "
                                                        "limit (sky_total)"}
        else:
            out.not_computed["stars_total"] = "stars on the sky need sky_total"
    elif not section.stars:
        out.not_computed["stars_total"] = "[totals] stars = false"
    return StageResult(out.to_json(n_draws), {"estimates": dict(out.estimates), "sky": sky})


#: The stages, in order.
STAGES: list[Stage] = [
    Stage("tally", ("catalog", "footprint"), _stage_tally, reads=("extinction",)),
    Stage("completeness", ("completeness",), _stage_completeness),
    Stage("luminosity_function", ("luminosity_function",), _stage_luminosity_function,
          columns=_lf_columns, reads=("cosmology",)),
    Stage("variance", ("variance",), _stage_variance, columns=("mag", "redshift"),
          reads=("cosmology",)),
    # Before counts: with a star catalogue the count fit models galaxies + its stars.
    Stage("contamination", ("catalog",), _stage_contamination, when=_wants_contamination,
          reads=("contamination",)),
    Stage("counts", ("counts",), _stage_counts, columns=("mag", "mag_error")),
    Stage("sky_model", ("catalog", "footprint"), _stage_sky_model, columns=("mag", "cell"),
          when=_wants_sky_model, reads=("sky_model",)),
    Stage("totals", ("totals",), _stage_totals, columns=_totals_columns, reads=("cosmology",)),
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


def _check_out_dir(out_dir: Path, label: str) -> None:
    """Make sure the report folder can be written before any work starts (it is created).

    A run can take minutes; a folder that cannot be written should stop it at once, not
    after the computation.
    """
    try:
        existing = out_dir
        while not existing.exists() and existing != existing.parent:
            existing = existing.parent
        if existing.exists() and not existing.is_dir():
            what = "exists and is" if existing == out_dir else f"is inside '{existing}', which is"
            raise InputError(f"{label} '{out_dir}' {what} not a folder")
        out_dir.mkdir(parents=True, exist_ok=True)
        handle, probe = tempfile.mkstemp(prefix=".countscale-probe-", dir=out_dir)
        os.close(handle)
        os.unlink(probe)
    except OSError as exc:
        reason = exc.strerror or type(exc).__name__
        raise InputError(f"{label} '{out_dir}' must be a folder that can be written; got: "
                         f"{reason}") from exc


def _warning_lines(stage: str, caught: list[warnings.WarningMessage]) -> list[str]:
    """One line per distinct warning of a stage, ``"<stage>: <message>"``, in sorted order
    (warnings from the tally's threads arrive in no fixed order)."""
    lines = set()
    for item in caught:
        text = str(item.message).strip().splitlines()
        lines.add(f"{stage}: {text[0] if text else item.category.__name__}")
    return sorted(lines)


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
    from countscale.provenance import run_provenance, utc_now
    from countscale.runfile import RunFile, load_runfile

    started_utc = utc_now()

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
        out_dir, out_label = runfile.output.dir, runfile.location("output", "dir")
    elif not isinstance(out_dir, str | os.PathLike):
        raise InputTypeError(f"`out_dir` must be a folder path; got {type(out_dir).__name__}")
    else:
        out_label = "`out_dir` (--out)"
    out_dir = Path(out_dir)
    _check_out_dir(out_dir, out_label)

    to_run = [s for s in STAGES if all(name in runfile.present for name in s.sections)
              and (s.when is None or s.when(runfile))]
    read = _RUN_SECTIONS.union(*(s.sections for s in STAGES), *(s.reads for s in STAGES))
    not_run = tuple(sorted(name for name in runfile.present if name not in read))
    columns = tuple(dict.fromkeys(c for s in to_run for c in _stage_columns(s, runfile)))
    ctx = RunContext(runfile=runfile, engine=engine, scheduler=scheduler,
                     rng=np.random.default_rng(seed), progress=progress, columns=columns)
    run_warnings: list[str] = []
    # One bar for the run's stages (and the report, last); slow stages add their own below it.
    with _progress_bar(ctx, len(to_run) + 1, "run", "stage") as stages_bar:
        for stage in to_run:
            stages_bar.set_description(f"run: {stage.name}")
            # Warnings (ours, astropy's, healpy's) go into the results and the report, one line
            # each, instead of onto stderr with source lines.
            with warnings.catch_warnings(record=True) as caught:
                ctx.results[stage.name] = stage.run(ctx)
            run_warnings += _warning_lines(stage.name, caught)
            stages_bar.update(1)
        stages_bar.set_description("run: report")

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
                "population": runfile.catalog.population,
                "stages": [s.name for s in to_run],
                "sections_not_run": list(not_run),
                "warnings": run_warnings,
            },
            "ledger": content.pop("ledger"),
            "footprint": content.pop("footprint"),
            "tally": content,
        }
        for stage in to_run:
            if stage.name != "tally":
                results[stage.name] = ctx.results[stage.name].to_dict()
        results["provenance"] = run_provenance(runfile, seed, engine, scheduler, started_utc,
                                               utc_now())
        completeness = ctx.results.get("completeness")
        files, results = report.write_report(
            results, out_dir, formats=runfile.output.formats, footprint=ctx.footprint,
            depth=completeness["depth"] if completeness else None)
        stages_bar.update(1)
    return RunResult(
        runfile=runfile, out_dir=out_dir, files=files, engine=engine, seed=seed,
        stages=tuple(s.name for s in to_run), sections_not_run=not_run,
        stage_results=dict(ctx.results), results=results,
    )


# --------------------------------------------------------------------------------------------
# A survey's population, for planning
# --------------------------------------------------------------------------------------------


def plan_population(runfile: Any, seed: int | None = 0, progress: bool | None = None) -> Any:
    """The population a run file's survey measures, for :mod:`countscale.planning`.

    Runs the tally, completeness, variance and counts stages in memory (no report is
    written; the variance stage runs with ``[variance]``'s defaults when the file has no such
    section) and returns a :class:`countscale.planning.Population`: the population's mean
    N(<m) per deg² at the counts' faint limit, the integral-count slope d log10 N(<m) / dm
    there (from the fitted model), the n(z) and bias of the analytic cosmic variance, and its
    power spectrum.

    Raises
    ------
    InputError
        The run file has no [counts] section, or the variance stage has no n(z).
    """
    from countscale.planning import population
    from countscale.runfile import RunFile, load_runfile

    if not isinstance(runfile, RunFile):
        if not isinstance(runfile, str | os.PathLike):
            raise InputTypeError(
                f"`runfile` must be a path or a RunFile; got {type(runfile).__name__}")
        runfile = load_runfile(runfile)
    runfile.require("catalog", "footprint", "counts", needed_by="countscale plan")
    engine, scheduler = _engine_iv(runfile, None, None)
    forced = ("variance",)
    to_run = [s for s in STAGES if s.name in forced
              or all(name in runfile.present for name in s.sections)]
    to_run = [s for s in to_run if s.name in ("tally", "completeness", "luminosity_function",
                                               "variance", "counts")]
    columns = tuple(dict.fromkeys(c for s in to_run for c in _stage_columns(s, runfile)))
    ctx = RunContext(runfile=runfile, engine=engine, scheduler=scheduler,
                     rng=np.random.default_rng(_seed_iv(seed)), progress=progress,
                     columns=columns)
    if "analytic" not in runfile.variance.methods:
        raise InputError(f"{runfile.location('variance', 'methods')}: planning needs the "
                         "\"analytic\" method")
    for stage in to_run:
        ctx.results[stage.name] = stage.run(ctx)
    counts = ctx.results["counts"]
    cosmic = ctx.results["variance"]["sigma_cv"]
    integral = counts.data["integral_counts"]
    m_limit = float(integral["m_limit"])
    density = float(integral["per_deg2"]["median"])
    model = counts["fit"].model_
    slope = float(model.density(m_limit)) / (density * math.log(10.0))
    return population(
        surface_density_per_deg2=density, nz=cosmic.nz(m_limit), bias=runfile.variance.bias,
        slope=slope, mag_limit=m_limit, power=cosmic.power,
        source=f"measured by the run file {runfile.label}")
