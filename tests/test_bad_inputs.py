"""Bad inputs through the command line: each ends as a correct result or as exit code 2.

One table of cases, each a small change to the small demo survey (``make_demo.py --small``,
1.5 deg², 4 × 10^4 rows) or to a file next to it, driven through ``countscale.cli.main``. A
case expects either exit code 2 with exactly one line on stderr that names the file, key or
column, the rule and the value (pinned by a regular expression), or exit code 0 with a check
of the result. The references are outside the code under test: the unchanged survey's own
run (for "the bad rows must not move the result"), pyarrow's page checksums, healpy's UNSEEN
value and nside limit, and the operating system's limits on file names.

Cases that need a whole run (about 10 s each on 2 cores) are few; the rest stop before the
tally or just after it.
"""

from __future__ import annotations

import importlib.util
import json
import re
import shutil
from pathlib import Path

import healpy as hp
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from astropy.io import fits

from countscale import plots, report
from countscale.cli import main

DEMO = Path(__file__).resolve().parents[1] / "demo_data"

# The run file of every case: the small demo's catalogue, footprint, completeness and counts
# (no other sections, so that stages added later do not slow these cases down; no figures,
# which have tests of their own below).
RUNFILE = """\
[survey]
name = "Fernhollow (small) for bad-input cases"

[catalog]
paths = ["catalog.parquet"]
ra = "ra"
dec = "dec"
mag = "mag_r"
mag_error = "mag_r_err"
id = "id"

[footprint]
max_order = 15
include = [{box = {ra = [161.0, 162.7], dec = [42.6, 43.8]}}]
exclude = [{circles = "holes.csv"}]

[completeness]
injections = "injections.csv"
depth_map = "depth.fits"

[counts]
bins = {start = 14.0, stop = 24.0, width = 0.2}
fit_range = [18.0, 21.8]
n_bootstrap = 20

[output]
formats = ["json", "markdown"]
"""


@pytest.fixture(scope="module")
def small_demo(tmp_path_factory):
    """The small demo survey, built once, with the run file above."""
    spec = importlib.util.spec_from_file_location("make_demo", DEMO / "make_demo.py")
    make_demo = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(make_demo)
    folder = tmp_path_factory.mktemp("small_demo")
    make_demo.build(folder, small=True, plots=False)
    (folder / "survey.toml").write_text(RUNFILE, encoding="utf-8")
    return folder


@pytest.fixture(scope="module")
def baseline(small_demo, tmp_path_factory):
    """results.json of the unchanged small survey (seed 1)."""
    out = tmp_path_factory.mktemp("baseline")
    assert main(["run", str(small_demo / "survey.toml"), "--out", str(out), "--seed", "1",
                 "--quiet"]) == 0
    return json.loads((out / "results.json").read_text())


# --------------------------------------------------------------------------------------------
# How a case changes the survey
# --------------------------------------------------------------------------------------------


def edit_runfile(old, new):
    def change(folder):
        path = folder / "survey.toml"
        text = path.read_text(encoding="utf-8")
        assert old in text, old
        path.write_text(text.replace(old, new), encoding="utf-8")
    return change


def edit_depth(values=None, header=None):
    def change(folder):
        with fits.open(folder / "depth.fits", mode="update") as hdul:
            if values is not None:
                hdul[1].data["M50"][:] = values(hdul[1].data["M50"])
            for key, value in (header or {}).items():
                hdul[1].header[key] = value
    return change


def append_rows(rows):
    """Append rows (a dict of column -> values) to the catalogue, with fresh ids."""
    def change(folder):
        table = pq.read_table(folder / "catalog.parquet")
        frame = table.to_pandas()
        extra = pd.DataFrame(rows)
        extra["id"] = frame["id"].max() + 1 + np.arange(len(extra))
        for column in frame.columns:
            if column not in extra:
                extra[column] = frame[column].iloc[0]
        extra = extra[frame.columns].astype(frame.dtypes.to_dict())
        both = pd.concat([frame, extra], ignore_index=True)
        pq.write_table(pa.Table.from_pandas(both, schema=table.schema, preserve_index=False),
                       folder / "catalog.parquet")
    return change


def inside_rows(n, mag, mag_error):
    """n rows at the footprint's centre (inside it) with the given magnitude and error."""
    return {"ra": np.full(n, 161.85), "dec": np.full(n, 43.2), "mag_r": np.full(n, mag),
            "mag_r_err": np.full(n, mag_error)}


def both(*changes):
    def change(folder):
        for one in changes:
            one(folder)
    return change


def all_ids_equal(folder):
    table = pq.read_table(folder / "catalog.parquet")
    ids = pa.array(np.ones(table.num_rows, dtype=np.int64))
    table = table.set_column(table.schema.get_field_index("id"), "id", ids)
    pq.write_table(table, folder / "catalog.parquet")


def damaged_parquet_with_checksums(folder):
    """Rewrite the catalogue with page checksums (CRC), then flip one byte of a data page."""
    path = folder / "catalog.parquet"
    pq.write_table(pq.read_table(path), path, write_page_checksum=True, compression="none")
    data = bytearray(path.read_bytes())
    data[len(data) // 3] ^= 0xFF  # well inside the column data, far from the footer
    path.write_bytes(bytes(data))


def star_catalogue_of_every_source_twice(folder):
    """A [contamination] star catalogue listing each source of the catalogue twice."""
    frame = pq.read_table(folder / "catalog.parquet").to_pandas()
    pd.concat([frame, frame], ignore_index=True).to_parquet(folder / "stars.parquet")
    path = folder / "survey.toml"
    path.write_text(path.read_text(encoding="utf-8")
                    + '\n[contamination]\nstar_catalog = ["stars.parquet"]\n', encoding="utf-8")


def out_under_a_file(folder):
    (folder / "afile").write_text("x")
    return ["--out", str(folder / "afile" / "report")]


def out_name_too_long(folder):
    return ["--out", str(folder / ("x" * 300))]


# --------------------------------------------------------------------------------------------
# The cases: (name, change, expected)
#   change(folder) edits the survey; it may return extra command-line arguments.
#   expected is a regex for the single stderr line of an exit-2 case, or a callable
#   check(results, baseline, folder) for a case that must succeed.
# --------------------------------------------------------------------------------------------

F = r".*survey\.toml: "  # every run-file message starts with the file


def same_numbers_as_the_clean_survey(n_implausible):
    def check(results, baseline, folder):
        # The junk rows are rejected by name, and every number but the ledger is the clean
        # survey's to the last digit (the same rows are kept, the same seed draws).
        rejected = results["ledger"]["rows_rejected"]
        assert rejected["mag_implausible"] == n_implausible
        assert results["ledger"]["rows_read"] == baseline["ledger"]["rows_read"] + n_implausible
        for key in ("completeness", "counts", "tally", "footprint"):
            assert without_paths(results[key]) == without_paths(baseline[key]), key
    return check


def without_paths(block):
    """A results block without the file paths in it (the cases run on copies)."""
    if isinstance(block, dict):
        return {k: without_paths(v) for k, v in block.items() if k not in ("path", "injections")}
    return block


def every_20th_magnitude(value):
    def change(folder):
        table = pq.read_table(folder / "catalog.parquet")
        mag = table.column("mag_r").to_numpy().copy()
        mag[::20] = value
        table = table.set_column(table.schema.get_field_index("mag_r"), "mag_r",
                                 pa.array(mag, type=table.schema.field("mag_r").type))
        pq.write_table(table, folder / "catalog.parquet")
    return change


def rows_without_magnitude_are_named(share):
    def check(results, baseline, folder):
        ledger = results["ledger"]
        n_bad = ledger["rows_rejected"]["mag_implausible"]
        assert n_bad == pytest.approx(share * ledger["rows_read"], abs=1)
        [note] = [n for n in results["counts"]["notes"] if "no usable magnitude" in n]
        n_missing = ledger["rows_rejected"]["mag_missing"]  # the demo's own sentinel rows
        assert (f"({n_bad + n_missing:,d}: mag_missing {n_missing:,d}, mag_implausible "
                f"{n_bad:,d})") in note
        assert "low by up to that share" in note
        assert "no usable magnitude" in (folder / "out" / "report.md").read_text()
        # The clean survey carries no such note.
        assert not any("no usable magnitude" in n for n in baseline["counts"]["notes"])
    return check


def fit_range_snapped_and_warnings_reported(results, baseline, folder):
    counts = results["counts"]
    assert counts["fit"]["fit_range"] == [18.2, 23.0]
    assert any("does not fall on bin edges" in note and "[18.2, 23]" in note
               for note in counts["notes"])
    # Bins below 50 % completeness in the fit: a warning, kept in the results and the
    # report, one line each (no source lines).
    warned = [w for w in results["run"]["warnings"] if "completeness below 0.5" in w]
    assert warned and all("\n" not in w for w in warned)
    text = (folder / "out" / "report.md").read_text()
    assert "## Warnings" in text and warned[0] in text
    assert "does not fall on bin edges" in text


CASES = [
    # 1. Absurd magnitudes: 20 rows at 1e30 (error 0.8) and 30 at -999 must not move the
    #    headline result; they are rejected as mag_implausible.
    ("absurd-magnitudes",
     both(append_rows(inside_rows(20, 1e30, 0.8)), append_rows(inside_rows(30, -999.0, 0.8))),
     same_numbers_as_the_clean_survey(50)),
    #    5 % of the rows with the placeholder -999: rejected by name, and the counts say
    #    beside N(<m) that the densities leave those rows out.
    ("placeholder-magnitudes-5-percent", every_20th_magnitude(-999.0),
     rows_without_magnitude_are_named(0.05)),
    # 2. Depth-map values that are no magnitude.
    ("depth-map-minus-99", edit_depth(values=lambda v: np.where(np.arange(v.size) == 0, -99, v)),
     F + r"\[completeness\] 'depth_map': depth map 'depth\.fits' must hold m50 values in the "
         r"plausible magnitude range \[-30, 40\] \(\[catalog\] 'mag_range'\) or NaN / healpy "
         r"UNSEEN for no data; got -99 at pixel \d+ \(1 such pixels\)$"),
    ("depth-map-99", edit_depth(values=lambda v: np.where(np.arange(v.size) == 3, 99, v)),
     F + r"\[completeness\] 'depth_map': .* got 99 at pixel \d+ \(1 such pixels\)$"),
    ("depth-map-nside-header-disagrees", edit_depth(header={"NSIDE": 32}),
     F + r"\[completeness\] 'depth_map': depth map 'depth\.fits' must give a depth for the "
         r"whole footprint; got none for 1\.4\d+ deg² \(100 % of the footprint; map read as "
         r"nside 32, RING\): .*NSIDE and ORDERING keywords$"),
    # 3. A footprint larger than the depth map (a 10 deg cap, the whole sky).
    ("footprint-beyond-depth-map",
     edit_runfile("include = [{box = {ra = [161.0, 162.7], dec = [42.6, 43.8]}}]",
                  "include = [{cap = {ra = 161.85, dec = 43.2, radius = 10}}]"),
     F + r"\[completeness\] 'depth_map': .* got none for 3\d\d\.\d deg² \(9\d\.\d % of the "
         r"footprint; map read as nside 64, RING\)"),
    ("whole-sky-footprint",
     edit_runfile("include = [{box = {ra = [161.0, 162.7], dec = [42.6, 43.8]}}]",
                  "include = [{cap = {ra = 0, dec = 90, radius = 180}}]"),
     F + r"\[completeness\] 'depth_map': .* got none for 41,2\d\d deg² \(100 % of the "
         r"footprint"),
    # 3. No magnitude bin at least 50 % complete (every tile's m50 at 13, brighter than the
    #    bins): no default fit range, and a given one would be the completeness model's
    #    extrapolation.
    ("no-bin-half-complete-default-range",
     both(edit_depth(values=lambda v: np.full(v.size, 13.0)),
          edit_runfile("fit_range = [18.0, 21.8]\n", "")),
     F + r"\[counts\] 'fit_range' is needed: no magnitude bin in \[14, 24\] is at least 50 % "
         r"complete, so there is no default; got none$"),
    ("no-bin-half-complete-given-range", edit_depth(values=lambda v: np.full(v.size, 13.0)),
     F + r"\[counts\] 'fit_range' must keep to bins where at least 1 % of sources are "
         r"detected .*; got \[18, 21\.8\], where bin \[21\.6, 21\.8\] is [\d.e-]+ complete"),
    # 4. max_order 29: the MOC standard's deepest order, which the footprint cannot build.
    ("max-order-29", edit_runfile("max_order = 15", "max_order = 29"),
     F + r"\[footprint\] 'max_order' must be an integer in \[0, 28\]; got 29$"),
    # 5. Output folders that cannot be written, refused before the run starts.
    ("out-under-a-file", out_under_a_file,
     r"^countscale: error: `out_dir` \(--out\) '.*afile/report' is inside '.*afile', which "
     r"is not a folder$"),
    ("out-name-too-long", out_name_too_long,
     r"^countscale: error: `out_dir` \(--out\) '.*x{300}' must be a folder that can be "
     r"written; got: File name too long$"),
    # 6. A damaged Parquet file that carries page checksums.
    ("damaged-parquet-with-checksums", damaged_parquet_with_checksums,
     r"^countscale: error: `paths`: '.*catalog\.parquet' could not be read after row \d+ "
     r"\(.*(CRC|checksum).*\)$"),
    # 7. Limits on jackknife regions and on magnitude bins.
    ("regions-100000", edit_runfile("[counts]", "[variance]\nregions = 100000\n\n[counts]"),
     F + r"\[variance\] 'regions' must be an integer in \[2, 1000\]; got 100000$"),
    ("2e10-bins",
     edit_runfile("width = 0.2}", "width = 5e-10}"),
     F + r"\[counts\] 'bins\.width' must divide stop - start \(10\) into at most 1000 bins "
         r"\(it gives 2e\+10\); got 5e-10$"),
    # 8. Messages that name what is really wrong.
    ("all-duplicate-ids", all_ids_equal,
     F + r"\[counts\] 'bins': a count fit needs at least 20 sources in the footprint within "
         r"the bins \[14, 24\]; got 1 \(.*[\d,]+ rejected as duplicate_id.*\)$"),
    ("tiny-footprint",
     edit_runfile("include = [{box = {ra = [161.0, 162.7], dec = [42.6, 43.8]}}]",
                  "include = [{cap = {ra = 161.85, dec = 43.2, radius = 0.01}}]"),
     F + r"\[counts\] 'bins': a count fit needs at least 20 sources .*; got \d+ \(.* in the "
         r"footprint \(0\.000314 deg²\); .*\)$"),
    ("fit-range-one-bin", edit_runfile("fit_range = [18.0, 21.8]", "fit_range = [18.0, 18.2]"),
     F + r"\[counts\] 'fit_range' must hold more bins than the 2 parameters of power_law; "
         r"got \[18, 18\.2\], 1 bin\(s\) of 0\.2 mag$"),
    ("fit-range-no-whole-bin",
     edit_runfile("fit_range = [18.0, 21.8]", "fit_range = [18.05, 18.15]"),
     F + r"\[counts\] 'fit_range' must contain at least one whole bin of 0\.2 mag from 14; "
         r"got \[18\.05, 18\.15\]$"),
    ("star-catalogue-outnumbers-sources", star_catalogue_of_every_source_twice,
     F + r"\[contamination\] 'star_catalog': `star_counts` must leave more galaxies than the 2 "
         r"parameters in the fit range \[18, 21\.8\] mag \(stars are subtracted from the "
         r"sources\); got \d+ stars against \d+ sources$"),
    ("fit-range-off-grid",
     edit_runfile("fit_range = [18.0, 21.8]", "fit_range = [18.05, 23.05]"),
     fit_range_snapped_and_warnings_reported),
]


@pytest.mark.parametrize(("name", "change", "expected"), CASES, ids=[c[0] for c in CASES])
def test_bad_input(name, change, expected, small_demo, tmp_path, capsys, request):
    folder = tmp_path / "survey"
    shutil.copytree(small_demo, folder)
    extra = change(folder) or ["--out", str(folder / "out")]
    code = main(["run", str(folder / "survey.toml"), "--seed", "1", "--quiet", *extra])
    captured = capsys.readouterr()
    if callable(expected):
        assert code == 0, captured.err
        results = json.loads((folder / "out" / "results.json").read_text())
        expected(results, request.getfixturevalue("baseline"), folder)
        return
    assert code == 2, captured.err
    lines = captured.err.splitlines()
    assert len(lines) == 1, captured.err
    assert re.match(expected, lines[0]), lines[0]


def test_a_byte_order_mark_is_not_a_syntax_error(small_demo, tmp_path, capsys):
    folder = tmp_path / "survey"
    shutil.copytree(small_demo, folder)
    path = folder / "survey.toml"
    path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes())
    assert main(["area", str(path), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["area_deg2"] == pytest.approx(1.4858, abs=1e-4)


def test_unseen_in_a_float32_coverage_map_is_outside_like_nan(tmp_path, capsys):
    # healpy writes UNSEEN (-1.6375e30) into float32 maps; read back as float64 it is not
    # equal to healpy.UNSEEN, but it means "no data" exactly as NaN does.
    nside = 16
    values = np.zeros(hp.nside2npix(nside), dtype=np.float32)
    values[:10] = 1.0
    values[10:20] = np.nan
    values[20:30] = hp.UNSEEN
    hp.write_map(tmp_path / "cover.fits", values, dtype=np.float32)
    assert main(["area", str(tmp_path / "cover.fits"), "--json"]) == 0
    area = json.loads(capsys.readouterr().out)["area_deg2"]
    assert area == pytest.approx(10 * hp.nside2pixarea(nside, degrees=True), rel=1e-12)


# --------------------------------------------------------------------------------------------
# A figure never costs a run its numbers
# --------------------------------------------------------------------------------------------


def counts_block_without_complete_bins():
    """A ``counts`` results block whose bins are all below 50 % completeness."""
    edges = np.arange(20.0, 21.01, 0.2)
    n = len(edges) - 1
    return {
        "model": "power_law",
        "fit": {"fit_range": [20.0, 21.0],
                "slope": {"median": 0.5, "interval_68": [0.45, 0.55]}},
        "differential": {
            "mag_lo": edges[:-1].tolist(), "mag_hi": edges[1:].tolist(),
            "n_observed": [3] * n, "used_in_fit": [True] * n,
            "raw_density": [15.0] * n, "corrected_density": [60.0] * n,
            "corrected_interval_68": [[50.0, 70.0]] * n, "corrected_interval_68_full": None,
            "completeness": [0.3] * n,
        },
        "model_curves": {"mag": edges.tolist(), "power_law": (10 ** (0.5 * (edges - 19))).tolist()},
        "expected_counts": [3.0] * n,
    }


def test_an_empty_counts_figure_is_drawn_and_says_why(tmp_path):
    block = counts_block_without_complete_bins()
    notes = plots.counts_figure(block, tmp_path / "counts.png")
    assert (tmp_path / "counts.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert notes == ["no bin with sources is at least 50 % complete, so no corrected "
                     "densities are shown (only raw counts and the fitted model)"]
    empty = {**block, "differential": {**block["differential"], "n_observed": [0] * 5,
                                       "raw_density": [0.0] * 5}}
    assert plots.counts_figure(empty, tmp_path / "empty.png") == [
        "no bin holds a source: there are no counts to show"]


def test_a_failing_figure_is_reported_and_results_are_written(small_demo, baseline, tmp_path,
                                                              monkeypatch):
    def broken(*args, **kwargs):
        raise ValueError("zero-size array to reduction operation fmax which has no identity")

    monkeypatch.setattr(plots, "counts_figure", broken)
    results = {k: v for k, v in baseline.items() if k not in ("figures", "figure_notes")}
    files, written = report.write_report(results, tmp_path, formats=("json", "markdown", "png"))
    assert [p.name for p in files] == ["completeness.png", "report.md", "results.json"]
    saved = json.loads((tmp_path / "results.json").read_text())
    assert saved == written
    assert saved["counts"] == baseline["counts"]              # the numbers are all there
    assert saved["figures"] == {"completeness": "completeness.png"}
    assert saved["figure_notes"] == {"counts": [
        "not drawn: ValueError: zero-size array to reduction operation fmax which has no "
        "identity"]}
    text = (tmp_path / "report.md").read_text()
    assert "About the number counts figure: not drawn: ValueError" in text
    assert "![number counts]" not in text


def test_a_p_value_that_is_a_bound_is_printed_as_one(baseline):
    # No redraw as extreme as the data: p = 1 / (B + 1) bounds the p-value from above.
    results = json.loads(json.dumps(baseline))
    results["counts"]["fit"].update(p_value=1 / 201, p_value_is_bound=True, n_bootstrap=200)
    text = report.render_markdown(results)
    assert ("parametric-bootstrap p < 0.005 (none of 200 bootstrap redraws was as extreme)"
            in text)
    assert "p = 0.00498" not in text
    results["counts"]["fit"].update(p_value=0.31, p_value_is_bound=False)
    assert "parametric-bootstrap p = 0.31;" in report.render_markdown(results)


def test_report_lists_each_warning_once(baseline):
    # A warning a stage already shows in its own block (its warnings or notes) is not repeated
    # under "Warnings"; one it does not show is listed there, one line.
    results = json.loads(json.dumps(baseline))
    note = "comparison model double_power_law not fitted: the data do not constrain it"
    results["counts"]["notes"] = [note]
    results["run"]["warnings"] = ["tally: footprint too small for 24 regions; using one",
                                  f"counts: {note}"]
    text = report.render_markdown(results)
    assert text.count(note) == 1
    assert "## Warnings" in text
    assert "- tally: footprint too small for 24 regions; using one" in text
    assert f"- counts: {note}" not in text
    assert "tally: footprint too small" in report.render_text(results)
