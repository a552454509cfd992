"""Tests for countscale.pipeline (run_survey) and countscale.report (the report folder).

Outside references used here:
- closed-form sky geometry: a point is in the run file's RA/Dec box minus a
  cap when its RA/Dec are within the box and its great-circle distance from the cap's centre
  (astropy.coordinates.SkyCoord.separation) exceeds the radius;
- numpy.histogram for the counts per magnitude bin;
- the json module for what a reader of results.json gets back;
- counts by construction for the ledger (faults injected a known number of times).
"""

from __future__ import annotations

import json
import re
import textwrap

import astropy.units as u
import dask
import distributed
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from astropy.coordinates import SkyCoord

from countscale import pipeline, report
from countscale import tally as tally_module
from countscale.errors import InputError, InputTypeError
from countscale.pipeline import STAGES, RunResult, run_survey

BOX = """[footprint]
max_order = 12
include = [ {box = {ra = [150, 160], dec = [0, 10]}} ]
exclude = [ {cap = {ra = 155, dec = 5, radius = 1.5}} ]
"""


def make_survey(tmp_path, n=6000, extra="", seed=1, footprint=BOX):
    """A small catalogue in two Parquet files and a run file; returns (runfile, frame)."""
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({
        "RA": rng.uniform(148.0, 162.0, n),
        "DEC": rng.uniform(-2.0, 12.0, n),
        "MAG": rng.uniform(18.0, 24.0, n),
        "Z": rng.uniform(0.0, 2.0, n),
        "OBJID": np.arange(n, dtype=np.int64),
    })
    df.loc[0:9, "MAG"] = 99.0                                   # 10 mag_missing
    df.loc[20:24, "OBJID"] = df.loc[30:34, "OBJID"].to_numpy()  # 5 duplicate_id
    cat = tmp_path / "cat"
    cat.mkdir(exist_ok=True)
    half = n // 2
    for name, part in (("a", df.iloc[:half]), ("b", df.iloc[half:])):
        pq.write_table(pa.Table.from_pandas(part, preserve_index=False),
                       cat / f"{name}.parquet", row_group_size=1000)
    text = textwrap.dedent("""\
        [survey]
        name = "Fictional test field"

        [catalog]
        paths = ["cat/*.parquet"]
        ra = "RA"
        dec = "DEC"
        mag = "MAG"
        redshift = "Z"
        id = "OBJID"

        """) + footprint + extra
    path = tmp_path / "survey.toml"
    path.write_text(text)
    return path, df


def expected_inside(df):
    """Box [150, 160] x [0, 10] minus a 1.5-degree cap at (155, 5), from closed forms."""
    ra, dec = df.RA.to_numpy(), df.DEC.to_numpy()
    in_box = (ra >= 150) & (ra <= 160) & (dec >= 0) & (dec <= 10)
    sep = SkyCoord(ra * u.deg, dec * u.deg).separation(SkyCoord(155 * u.deg, 5 * u.deg)).deg
    return in_box & (sep > 1.5)


def valid_rows(df):
    """Rows 0..9 have a sentinel magnitude; rows 20..24 carry the ids of rows 30..34 and come
    first in the file, so rows 30..34 are the duplicates."""
    keep = (df.MAG != 99.0).to_numpy().copy()  # pandas 3 gives a read-only view
    keep[30:35] = False
    return keep


# --------------------------------------------------------------------------------------------
# A whole run
# --------------------------------------------------------------------------------------------


def test_run_writes_results_with_ledger_footprint_and_counts(tmp_path):
    runfile, df = make_survey(tmp_path)
    out = tmp_path / "out"
    result = run_survey(runfile, out_dir=out, seed=5, progress=False)
    assert isinstance(result, RunResult)
    # Default formats: figures (only the footprint: no completeness or counts section here),
    # then the Markdown report, then results.json last.
    assert [p.name for p in result.files] == ["footprint.png", "report.md", "report.html",
                                              "results.json"]
    data = json.loads((out / "results.json").read_text())
    assert data == json.loads(json.dumps(result.results))

    keep = valid_rows(df)
    inside = expected_inside(df) & keep
    ledger = data["ledger"]
    assert ledger["rows_read"] == len(df)
    assert ledger["rows_rejected"]["mag_missing"] == 10
    assert ledger["rows_rejected"]["duplicate_id"] == 5
    assert ledger["rows_in_footprint"] == inside.sum()
    assert ledger["rows_outside_footprint"] == (keep & ~inside).sum()

    edges = np.array(data["tally"]["mag_bins"]["edges"])
    counts, _ = np.histogram(df.MAG.to_numpy()[inside], bins=edges)
    np.testing.assert_array_equal(data["tally"]["counts"], counts)
    regions = data["tally"]["regions"]
    assert regions["n_regions"] == 24  # [variance].regions default without the section
    assert np.sum(regions["counts"]) == inside.sum()
    assert sum(regions["area_deg2"]) == pytest.approx(data["footprint"]["area_deg2"], rel=1e-12)
    assert data["footprint"]["area_deg2"] == pytest.approx(result.tally.area_deg2)
    assert data["run"] == {"runfile": str(runfile.resolve()), "engine": "local", "seed": 5,
                           "population": "galaxies", "stages": ["tally"],
                           "sections_not_run": [], "warnings": []}
    assert data["survey"] == {"name": "Fictional test field"}
    markdown = (out / "report.md").read_text()
    assert "## Footprint and catalogue" in markdown
    assert f"| in footprint | {inside.sum():,d} |" in markdown
    assert result.tally.columns == {}  # no stage needs per-source columns yet


def test_counts_bins_and_variance_regions_from_the_run_file(tmp_path):
    extra = textwrap.dedent("""
        [counts]
        bins = {start = 18.0, stop = 24.0, width = 0.5}

        [variance]
        regions = 6
        """)
    runfile, _df = make_survey(tmp_path, extra=extra)
    # The catalogue is unclustered: the jackknife finds no clustering excess, and the
    # variance stage says so beside the analytic value (a warning the run keeps in its
    # results and report, one line).
    result = run_survey(runfile, out_dir=tmp_path / "out", seed=1, progress=False)
    assert any(line.startswith("variance: ") and "the jackknife finds no clustering excess"
               in line for line in result.results["run"]["warnings"])
    tally_part = result.results["tally"]
    np.testing.assert_allclose(tally_part["mag_bins"]["edges"], 18.0 + 0.5 * np.arange(13))
    assert tally_part["mag_bins"]["grid"] == "given"
    assert tally_part["regions"]["n_regions"] == 6
    # The counts stage ran on these bins, after the variance stage (its jackknife over the
    # 6 regions, and the analytic value from the catalogue's redshifts).
    assert result.stages == ("tally", "variance", "counts")
    assert result.results["variance"]["jackknife"]["n_regions"] == 6
    assert result.results["counts"]["differential"]["mag_lo"][0] == 18.0
    assert result.results["run"]["sections_not_run"] == []
    assert "## Not run" not in (tmp_path / "out" / "report.md").read_text()


def test_same_seed_same_results_json(tmp_path):
    runfile, _ = make_survey(tmp_path)
    run_survey(runfile, out_dir=tmp_path / "one", seed=42, progress=False)
    run_survey(runfile, out_dir=tmp_path / "two", seed=42, progress=False)
    # Byte for byte, apart from the run's start and end times (its provenance).
    one, two = (re.sub(rb'"(started|finished)_utc": "[^"]*"', b"",
                       (tmp_path / name / "results.json").read_bytes()) for name in ("one", "two"))
    assert one == two


def test_seed_is_drawn_and_recorded_when_not_given(tmp_path):
    runfile, _ = make_survey(tmp_path, n=2000)
    a = run_survey(runfile, out_dir=tmp_path / "a", progress=False)
    b = run_survey(runfile, out_dir=tmp_path / "b", progress=False)
    assert isinstance(a.seed, int) and a.seed >= 0
    assert a.seed != b.seed
    assert a.results["run"]["seed"] == a.seed


def test_output_dir_defaults_to_the_run_file_output_section(tmp_path):
    runfile, _ = make_survey(tmp_path, n=2000, extra='\n[output]\ndir = "reports/run1"\n'
                                                      'formats = ["json"]\n')
    result = run_survey(runfile, seed=1, progress=False)
    assert result.out_dir == tmp_path / "reports" / "run1"
    assert [p.name for p in result.files] == ["results.json"]  # no markdown asked for
    assert (tmp_path / "reports" / "run1" / "results.json").is_file()


def test_stage_list_runs_stages_only_when_their_sections_are_present(tmp_path, monkeypatch):
    calls = []

    class Fake:
        def to_dict(self):
            return {"seen_tally_sources": calls[-1]}

    def fake_stage(ctx):
        calls.append(ctx.results["tally"].n_sources)
        assert set(ctx.columns) == {"mag", "redshift"}
        return Fake()

    # Only the tally and a fake stage, so the test is about the stage mechanism.
    stages = [STAGES[0], pipeline.Stage("fake", ("catalog", "counts"), fake_stage,
                                        columns=("mag", "redshift"))]
    monkeypatch.setattr(pipeline, "STAGES", stages)
    runfile, _ = make_survey(tmp_path, n=2000)
    without = run_survey(runfile, out_dir=tmp_path / "a", seed=1, progress=False)
    assert without.stages == ("tally",) and calls == []
    runfile, _ = make_survey(tmp_path, n=2000,
                             extra="\n[counts]\nbins = {start = 18, stop = 24, width = 1}\n")
    with_counts = run_survey(runfile, out_dir=tmp_path / "b", seed=1, progress=False)
    assert with_counts.stages == ("tally", "fake")
    assert with_counts.results["fake"] == {"seen_tally_sources": with_counts.tally.n_sources}
    assert with_counts.results["run"]["sections_not_run"] == []
    assert set(with_counts.tally.columns) == {"mag", "redshift"}


# --------------------------------------------------------------------------------------------
# Failed and interrupted runs leave no results.json that looks whole
# --------------------------------------------------------------------------------------------


def leftovers(folder):
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def test_interrupted_tally_leaves_no_results(tmp_path, monkeypatch):
    runfile, _ = make_survey(tmp_path)
    out = tmp_path / "out"
    real = tally_module.validate_chunk
    calls = {"n": 0}

    def interrupted(*args, **kwargs):
        # Ctrl-C arrives on the main thread, which reads and validates (the catalogue has ids)
        # while blocks already handed over are being tallied.
        calls["n"] += 1
        if calls["n"] == 2:
            raise KeyboardInterrupt
        return real(*args, **kwargs)

    monkeypatch.setattr(tally_module, "validate_chunk", interrupted)
    with pytest.raises(KeyboardInterrupt):
        run_survey(runfile, out_dir=out, seed=1, progress=False)
    assert not (out / "results.json").exists()


def test_failure_while_writing_leaves_no_results_json(tmp_path, monkeypatch):
    runfile, _ = make_survey(tmp_path, n=2000)
    out = tmp_path / "out"
    run_survey(runfile, out_dir=out, seed=1, progress=False)   # a complete earlier report
    assert (out / "results.json").exists()

    real_write_text = type(out).write_text

    def fail_on_results(self, text, *args, **kwargs):
        if "results" in self.name:
            real_write_text(self, text[: len(text) // 2], *args, **kwargs)  # half written
            raise OSError(28, "No space left on device")
        return real_write_text(self, text, *args, **kwargs)

    monkeypatch.setattr(type(out), "write_text", fail_on_results)
    with pytest.raises(OSError, match="No space left"):
        run_survey(runfile, out_dir=out, seed=2, progress=False)
    assert not (out / "results.json").exists()   # neither half a new one nor the stale one
    assert leftovers(out) == []                  # no temporary files left behind


def test_failed_run_keeps_the_previous_complete_report(tmp_path):
    runfile, _ = make_survey(tmp_path, n=2000)
    out = tmp_path / "out"
    run_survey(runfile, out_dir=out, seed=1, progress=False)
    before = (out / "results.json").read_bytes()
    for path in (tmp_path / "cat").iterdir():
        path.write_bytes(path.read_bytes()[:100])  # corrupt the catalogue
    with pytest.raises(InputError, match="is not a readable Parquet file"):
        run_survey(runfile, out_dir=out, seed=1, progress=False)
    assert (out / "results.json").read_bytes() == before  # untouched: it is whole, and old
    assert json.loads(before)["run"]["seed"] == 1


def test_report_refuses_nan():
    with pytest.raises(ValueError, match="Out of range float values are not JSON compliant"):
        report.results_json({"x": float("nan")})
    with pytest.raises(InputTypeError, match="`results` must be a mapping; got list"):
        report.results_json([1, 2])


# --------------------------------------------------------------------------------------------
# Bad input
# --------------------------------------------------------------------------------------------


def test_missing_sections_and_bad_arguments(tmp_path):
    runfile, _ = make_survey(tmp_path, n=500, footprint="")
    with pytest.raises(InputError,
                       match=r"survey.toml: missing required section \[footprint\] "
                             r"\(needed by countscale run\)"):
        run_survey(runfile, out_dir=tmp_path / "out")
    runfile, _ = make_survey(tmp_path, n=500)
    bad = [
        (dict(engine="spark"), InputError, r"`engine` must be one of local, dask; got 'spark'"),
        (dict(scheduler="tcp://h:1"), InputError,
         r"`scheduler` is only used with the dask engine; got 'tcp://h:1' with engine 'local'"),
        (dict(engine="dask", scheduler=8786), InputTypeError,
         r"`scheduler` must be an address string; got 8786"),
        (dict(seed=-1), InputError, r"`seed` must be a non-negative integer; got -1"),
        (dict(seed=1.5), InputTypeError, r"`seed` must be a non-negative integer; got 1.5"),
        (dict(out_dir=3), InputTypeError, r"`out_dir` must be a folder path; got int"),
    ]
    for kwargs, error, message in bad:
        kwargs.setdefault("out_dir", tmp_path / "out")
        with pytest.raises(error, match=message):
            run_survey(runfile, **kwargs)
    (tmp_path / "afile").write_text("x")
    with pytest.raises(InputError,
                       match=r"`out_dir` \(--out\) '.*afile' exists and is not a folder"):
        run_survey(runfile, out_dir=tmp_path / "afile")
    with pytest.raises(InputTypeError, match=r"`runfile` must be a path or a RunFile; got int"):
        run_survey(7)
    with pytest.raises(InputError, match=r"nope.toml: run file does not exist"):
        run_survey(tmp_path / "nope.toml")


def test_footprint_too_small_for_the_regions(tmp_path):
    tiny = """[footprint]
max_order = 8
include = [ {cap = {ra = 155, dec = 5, radius = 0.3}} ]
"""
    runfile, _ = make_survey(tmp_path, n=20_000, footprint=tiny)
    # The warning goes into the results (and the report), one line, not onto stderr.
    result = run_survey(runfile, out_dir=tmp_path / "a", seed=1, progress=False)
    assert result.results["tally"]["regions"]["n_regions"] == 1
    [line] = result.results["run"]["warnings"]
    assert line.startswith("tally: footprint too small for 24 regions")
    assert "footprint too small for 24 regions" in (tmp_path / "a" / "report.md").read_text()
    runfile, _ = make_survey(tmp_path, n=20_000, footprint=tiny,
                             extra="\n[variance]\nregions = 24\n")
    with pytest.raises(InputError, match=r"survey.toml: \[variance\] 'regions': cannot split"):
        run_survey(runfile, out_dir=tmp_path / "b", seed=1, progress=False)


# --------------------------------------------------------------------------------------------
# Dask through the pipeline
# --------------------------------------------------------------------------------------------


def test_dask_run_gives_the_same_results_json_apart_from_the_engine(tmp_path):
    runfile, _ = make_survey(tmp_path, n=8000)
    run_survey(runfile, out_dir=tmp_path / "local", seed=3, progress=False)
    with (dask.config.set({tally_module._MMAP_KEY: tally_module._MMAP_THRESHOLD_BYTES}),
          distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                   host="127.0.0.1", dashboard_address="127.0.0.1:0") as cluster):
        remote = run_survey(runfile, out_dir=tmp_path / "dask", engine="dask",
                            scheduler=cluster.scheduler_address, seed=3, progress=False)
    a = json.loads((tmp_path / "local" / "results.json").read_text())
    b = json.loads((tmp_path / "dask" / "results.json").read_text())
    assert a["run"].pop("engine") == "local" and b["run"].pop("engine") == "dask"
    assert a["provenance"].pop("engine") == "local" and b["provenance"].pop("engine") == "dask"
    assert b["provenance"].pop("scheduler") == cluster.scheduler_address
    assert a["provenance"].pop("scheduler") is None
    for block in (a["provenance"], b["provenance"]):
        del block["started_utc"], block["finished_utc"]
    assert a == b
    assert remote.tally.ledger.rows_rejected["duplicate_id"] == 5


# --------------------------------------------------------------------------------------------
# The variance stage's n(z) and populations
# --------------------------------------------------------------------------------------------


def _with_catalog_lines(runfile, lines):
    text = runfile.read_text().replace('id = "OBJID"\n', 'id = "OBJID"\n' + lines)
    runfile.write_text(text)
    return runfile


def test_variance_stage_uses_a_median_redshift_when_given(tmp_path):
    extra = "\n[counts]\nbins = {start = 18.0, stop = 24.0, width = 0.5}\n" \
            "\n[variance]\nregions = 6\nredshift_median = 0.7\nbias = 1.5\nmag_limit = 23.0\n"
    runfile, _ = make_survey(tmp_path, extra=extra)
    result = run_survey(runfile, out_dir=tmp_path / "out", seed=2, progress=False)
    assert any("jackknife finds no clustering excess" in line
               for line in result.results["run"]["warnings"])
    analytic = result.results["variance"]["analytic"]
    assert analytic["nz"]["median"] == pytest.approx(0.7, rel=2e-3)
    assert analytic["bias"] == 1.5
    assert result.results["variance"]["m_limit"] == 23.0
    assert result.results["variance"]["m_limit_source"] == "[variance] mag_limit"
    # The counts' population interval carries it; the this-field one is Poisson only.
    integral = result.results["counts"]["integral_counts"]
    assert integral["cosmic_variance"]["method"] == "analytic"
    assert integral["per_deg2_this_field"]["budget"] == {"poisson": 1.0}


def test_variance_stage_without_any_redshift_is_a_clear_error(tmp_path):
    runfile, _ = make_survey(tmp_path, extra="\n[variance]\nregions = 6\n")
    text = runfile.read_text().replace('redshift = "Z"\n', "")
    runfile.write_text(text)
    with pytest.raises(InputError, match=r"survey.toml: \[variance\]: the analytic cosmic "
                                         r"variance needs a redshift distribution: give "
                                         r"'redshift_median'"):
        run_survey(runfile, out_dir=tmp_path / "out", seed=2, progress=False)


def test_variance_stage_for_stars_keeps_the_jackknife_only(tmp_path):
    extra = "\n[counts]\nbins = {start = 18.0, stop = 24.0, width = 0.5}\n" \
            "\n[variance]\nregions = 6\n"
    runfile, _ = make_survey(tmp_path, extra=extra)
    _with_catalog_lines(runfile, 'population = "stars"\n')
    result = run_survey(runfile, out_dir=tmp_path / "out", seed=2, progress=False)
    variance = result.results["variance"]
    assert variance["analytic"] is None
    assert variance["jackknife"]["n_regions"] == 6
    assert "no analytic cosmic variance for stars" in variance["warnings"][0]
    assert result.results["counts"]["integral_counts"]["cosmic_variance"]["method"] == \
        "jackknife"
    assert "variance" not in result.results.get("figures", {})
