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
    columns : tuple of str
        Per-source tally columns the stage reads.
    """

    name: str
    sections: tuple[str, ...]
    run: Callable[[RunContext], Any]
    columns: tuple[str, ...] = ()


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


def _catalog_positions(runfile: Any) -> Callable[[], tuple[np.ndarray, np.ndarray]]:
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
    positions = _catalog_positions(runfile)
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


#: The stages, in order. Later issues append counts, luminosity_function, variance, totals.
STAGES: list[Stage] = [
    Stage("tally", ("catalog", "footprint"), _stage_tally),
]

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
    read = _RUN_SECTIONS.union(*(s.sections for s in STAGES))
    not_run = tuple(sorted(name for name in runfile.present if name not in read))
    columns = tuple(dict.fromkeys(c for s in to_run for c in s.columns))
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
    files = report.write_report(results, out_dir, formats=runfile.output.formats)
    return RunResult(
        runfile=runfile, out_dir=out_dir, files=files, engine=engine, seed=seed,
        stages=tuple(s.name for s in to_run), sections_not_run=not_run,
        stage_results=dict(ctx.results), results=results,
    )
