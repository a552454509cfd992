"""The ``countscale run`` and ``countscale demo`` commands, driven through ``main([...])``.

Outside references used here: numpy.histogram for the printed and written counts, the json
module for ``--json`` output (exactly one object on stdout), and counts by construction for
the ledger. The survey is a small fictional one written into tmp_path (see test_pipeline).
"""

from __future__ import annotations

import io
import json
import re
import sys
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from countscale import cli
from countscale import tally as tally_module
from countscale.cli import main

FOOTPRINT = """[footprint]
max_order = 12
include = [ {box = {ra = [150, 160], dec = [0, 10]}} ]
"""


def make_survey(tmp_path, n=6000, footprint=FOOTPRINT):
    """Two Parquet files (10 sentinel magnitudes, 5 duplicate ids) and a run file."""
    rng = np.random.default_rng(2)
    df = pd.DataFrame({
        "RA": rng.uniform(148.0, 162.0, n),
        "DEC": rng.uniform(-2.0, 12.0, n),
        "MAG": rng.uniform(18.0, 24.0, n),
        "OBJID": np.arange(n, dtype=np.int64),
    })
    df.loc[0:9, "MAG"] = 99.0
    df.loc[20:24, "OBJID"] = df.loc[30:34, "OBJID"].to_numpy()
    (tmp_path / "cat").mkdir(exist_ok=True)
    for name, part in (("a", df.iloc[: n // 2]), ("b", df.iloc[n // 2:])):
        pq.write_table(pa.Table.from_pandas(part, preserve_index=False),
                       tmp_path / "cat" / f"{name}.parquet", row_group_size=1000)
    path = tmp_path / "survey.toml"
    path.write_text(textwrap.dedent("""\
        [survey]
        name = "Fictional test field"
        [catalog]
        paths = ["cat/*.parquet"]
        ra = "RA"
        dec = "DEC"
        mag = "MAG"
        id = "OBJID"
        """) + footprint)
    return path, df


def expected_inside(df):
    """Kept rows in the box [150, 160] x [0, 10] (closed form); rows 30..34 are duplicates."""
    ra, dec = df.RA.to_numpy(), df.DEC.to_numpy()
    keep = (df.MAG != 99.0).to_numpy().copy()
    keep[30:35] = False
    return keep & (ra >= 150) & (ra <= 160) & (dec >= 0) & (dec <= 10)


def _without_times(text):
    """results.json text with the run's start and end times blanked (all else must repeat)."""
    return re.sub(r'"(started|finished)_utc": "[^"]*"', r'"\1_utc": ""', text)


def run(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_run_prints_ledger_and_counts_and_writes_the_folder(tmp_path, capsys):
    runfile, df = make_survey(tmp_path)
    out_dir = tmp_path / "out"
    code, out, err = run(["run", runfile, "--out", out_dir, "--seed", 7], capsys)
    assert code == 0, err
    inside = expected_inside(df)
    lines = {line.split("  ")[1].strip() if line.startswith("  ") else line: line
             for line in out.splitlines()}
    assert "row ledger" in lines
    assert lines["in footprint"].split()[-1] == f"{inside.sum():,d}"
    assert lines["rejected: mag_missing"].split()[-1] == "10"
    assert lines["rejected: duplicate_id"].split()[-1] == "5"
    data = json.loads((out_dir / "results.json").read_text())
    edges = np.array(data["tally"]["mag_bins"]["edges"])
    counts, _ = np.histogram(df.MAG.to_numpy()[inside], bins=edges)
    # The terminal gives the total; report.md lists every bin (folded).
    assert f"{counts.sum():,d} sources in {len(counts)} bins" in out
    report_md = (out_dir / "report.md").read_text()
    for lo, hi, n in zip(edges[:-1], edges[1:], counts, strict=True):
        if n:
            assert f"| {lo:.4g}–{hi:.4g} | {n:,d} |" in report_md
    assert str(out_dir / "results.json") in out
    # It ends with the summary table.
    summary = out[out.rindex("\nsummary\n"):]
    assert "area" in summary and f"{inside.sum():,d} in the footprint" in summary
    assert err == ""  # stderr is not a terminal: no progress bar


def test_run_json_is_exactly_one_object(tmp_path, capsys):
    runfile, df = make_survey(tmp_path)
    code, out, err = run(["run", runfile, "--out", tmp_path / "o", "--json", "--seed", 1],
                         capsys)
    assert code == 0, err
    data = json.loads(out)  # the whole of stdout is one JSON object: the summary
    assert isinstance(data, dict)
    assert data["output"]["files"][-1].endswith("results.json")
    on_disk = json.loads((tmp_path / "o" / "results.json").read_text())
    assert {k: v for k, v in data.items() if k != "output"} == on_disk["summary"]
    assert on_disk["ledger"]["rows_read"] == len(df)
    assert on_disk["run"]["seed"] == 1


class _Terminal(io.StringIO):
    def isatty(self):
        return True


def test_counts_stage_shows_progress_on_a_terminal(tmp_path, capsys, monkeypatch):
    # The count fits' refits (jackknife regions, bootstrap redraws) take the most time of a
    # run after the tally; they get a bar of their own.
    runfile, _ = make_survey(tmp_path, footprint=FOOTPRINT + textwrap.dedent("""\
        [counts]
        bins = {start = 18, stop = 24, width = 0.5}
        fit_range = [18, 24]
        n_bootstrap = 10
        """))
    terminal = _Terminal()
    monkeypatch.setattr(sys, "stderr", terminal)
    assert main(["run", str(runfile), "--out", str(tmp_path / "a"), "--seed", "1"]) == 0
    assert re.search(r"counts: .*refits", terminal.getvalue())
    quiet = _Terminal()
    monkeypatch.setattr(sys, "stderr", quiet)
    assert main(["run", str(runfile), "--out", str(tmp_path / "b"), "--quiet"]) == 0
    assert quiet.getvalue() == ""


def test_progress_bar_on_a_terminal_unless_quiet(tmp_path, capsys, monkeypatch):
    runfile, _ = make_survey(tmp_path)
    terminal = _Terminal()
    monkeypatch.setattr(sys, "stderr", terminal)
    assert main(["run", str(runfile), "--out", str(tmp_path / "a"), "--json"]) == 0
    assert "rows" in terminal.getvalue()
    # A bar for the run's stages, naming each as it runs, then the report.
    assert "run: tally" in terminal.getvalue() and "run: report" in terminal.getvalue()
    json.loads(capsys.readouterr().out)  # the bar never touches stdout
    quiet = _Terminal()
    monkeypatch.setattr(sys, "stderr", quiet)
    assert main(["run", str(runfile), "--out", str(tmp_path / "b"), "--quiet"]) == 0
    assert quiet.getvalue() == ""


@pytest.mark.parametrize("break_it, message", [
    (lambda d: (d / "cat" / "a.parquet").write_bytes(b"PAR1 not really"),
     r"is not a readable Parquet file"),
    (lambda d: (d / "survey.toml").write_text(
        (d / "survey.toml").read_text().replace('mag = "MAG"', 'mag = "MAG_R"')),
     r"`mag` column 'MAG_R' not found in .*a.parquet.*did you mean 'MAG'"),
    (lambda d: [p.unlink() for p in (d / "cat").iterdir()],
     r"`paths` pattern '.*cat/\*.parquet' matches no file"),
    (lambda d: (d / "survey.toml").write_text(
        (d / "survey.toml").read_text().replace("[footprint]", "[footprnt]")),
     r"unknown section \[footprnt\]; did you mean \[footprint\]"),
])
def test_input_errors_exit_2_with_one_line(tmp_path, capsys, break_it, message):
    runfile, _ = make_survey(tmp_path)
    break_it(tmp_path)
    code, out, err = run(["run", runfile, "--out", tmp_path / "o"], capsys)
    assert code == 2
    assert out == ""
    assert len(err.strip().splitlines()) == 1
    assert err.startswith("countscale: error: ")
    assert re.search(message, err), err
    assert not (tmp_path / "o" / "results.json").exists()


def test_text_in_a_numeric_csv_column_exits_2(tmp_path, capsys):
    rows = ["RA,DEC,MAG"] + [f"{150 + i * 0.001},{5},{20.5}" for i in range(3000)]
    rows[2500] = "155.0,5.0,faint"
    (tmp_path / "cat.csv").write_text("\n".join(rows) + "\n")
    (tmp_path / "s.toml").write_text(textwrap.dedent("""\
        [catalog]
        paths = ["cat.csv"]
        ra = "RA"
        dec = "DEC"
        mag = "MAG"
        [footprint]
        max_order = 10
        include = [ {box = {ra = [150, 160], dec = [0, 10]}} ]
        [engine]
        chunk_rows = 1000
        """))
    code, _, err = run(["run", tmp_path / "s.toml", "--out", tmp_path / "o"], capsys)
    assert code == 2
    assert "`mag` column 'MAG'" in err and "must be numeric; got 'faint' at data row 2500" in err
    assert len(err.strip().splitlines()) == 1


def test_zero_rows_after_cuts_exits_2(tmp_path, capsys):
    runfile, _df = make_survey(tmp_path, footprint="""[footprint]
max_order = 10
include = [ {box = {ra = [10, 20], dec = [0, 10]}} ]
""")
    code, _, err = run(["run", runfile, "--out", tmp_path / "o"], capsys)
    assert code == 2
    assert "none of the" in err and "valid rows lies inside the footprint" in err


@pytest.mark.parametrize("argv, message", [
    (["--engine", "local", "--scheduler", "tcp://h:1"],
     "`scheduler` is only used with the dask engine"),
    (["--seed", "-3"], "--seed must be a non-negative integer; got -3"),
    (["--engine", "spark"], "argument --engine: invalid choice: 'spark'"),
    (["--seed", "x"], "argument --seed: invalid int value: 'x'"),
])
def test_usage_errors_exit_2(tmp_path, capsys, argv, message):
    runfile, _ = make_survey(tmp_path, n=500)
    code, out, err = run(["run", runfile, "--out", tmp_path / "o", *argv], capsys)
    assert code == 2
    assert message in err
    assert out == ""


def test_interrupted_run_exits_1_and_leaves_no_results(tmp_path, capsys, monkeypatch):
    runfile, _ = make_survey(tmp_path)

    def interrupt(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(tally_module, "validate_chunk", interrupt)
    code, _out, err = run(["run", runfile, "--out", tmp_path / "o"], capsys)
    assert code == 1
    assert "interrupted" in err
    assert not (tmp_path / "o" / "results.json").exists()


def test_missing_run_file_exits_2(tmp_path, capsys):
    code, _, err = run(["run", tmp_path / "none.toml"], capsys)
    assert code == 2
    assert "none.toml: run file does not exist" in err


# --------------------------------------------------------------------------------------------
# demo
# --------------------------------------------------------------------------------------------


def test_demo_missing_exits_2_with_a_clear_message(tmp_path, capsys, monkeypatch):
    monkeypatch.setattr(cli, "demo_runfile", lambda: tmp_path / "demo_data" / "survey.toml")
    code, out, err = run(["demo"], capsys)
    assert code == 2
    assert out == ""
    assert "demo run file not found at" in err and "survey.toml" in err
    assert len(err.strip().splitlines()) == 1


def test_demo_runs_the_demo_run_file_into_the_default_folder(tmp_path, capsys, monkeypatch):
    runfile, df = make_survey(tmp_path)
    monkeypatch.setattr(cli, "demo_runfile", lambda: runfile)
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    code, out, err = run(["demo"], capsys)
    assert code == 0, err
    assert (work / cli.DEMO_OUT / "results.json").is_file()
    assert "row ledger" in out
    code, out, _ = run(["demo", "--out", tmp_path / "elsewhere", "--json"], capsys)
    assert code == 0
    assert json.loads(out)["sources"] == json.loads(
        (tmp_path / "elsewhere" / "results.json").read_text())["summary"]["sources"]
    assert json.loads((tmp_path / "elsewhere" / "results.json").read_text())["ledger"][
        "rows_read"] == len(df)
    # --seed makes a demo run repeatable, byte for byte apart from the two times.
    for name in ("s1", "s2"):
        code, out, _ = run(["demo", "--out", tmp_path / name, "--seed", 11, "--json"], capsys)
        assert code == 0 and json.loads(out)["output"]["dir"] == str(tmp_path / name)
    texts = [_without_times((tmp_path / name / "results.json").read_text())
             for name in ("s1", "s2")]
    assert texts[0] == texts[1]
    assert json.loads(texts[0])["provenance"]["seed"] == 11
    # Without --seed the demo uses its fixed seed, so its report is the same everywhere.
    code, out, _ = run(["demo", "--out", tmp_path / "d1", "--json"], capsys)
    assert code == 0 and json.loads((tmp_path / "d1" / "results.json").read_text())["run"][
        "seed"] == cli.DEMO_SEED
    code, _, err = run(["demo", "--seed", -1], capsys)
    assert code == 2 and err.splitlines() == [
        "countscale: error: --seed must be a non-negative integer; got -1"]


def test_demo_path_is_at_the_repository_root():
    import countscale

    assert cli.demo_runfile() == (Path(countscale.__file__).resolve().parents[1]
                                  / "demo_data" / "survey.toml")
