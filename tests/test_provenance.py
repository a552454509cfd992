"""Provenance of a run: file digests, the input files a run file names, versions, repeats.

Outside references: Python's hashlib (SHA-256 of the bytes, computed here independently of
the module's block-by-block reading), numpy's own ``__version__``, and the files written by
the test itself.
"""

from __future__ import annotations

import hashlib
import json
import re
import textwrap

import numpy as np
from test_cli_run import make_survey

from countscale.pipeline import run_survey
from countscale.provenance import (
    EDGE_BYTES,
    file_digest,
    input_files,
    package_versions,
    run_provenance,
    utc_now,
)
from countscale.runfile import load_runfile


def test_small_file_digest_is_the_sha256_of_its_bytes(tmp_path):
    data = np.random.default_rng(1).bytes(5_000_003)  # more than one read block
    path = tmp_path / "a.bin"
    path.write_bytes(data)
    digest = file_digest(path)
    assert digest == {"bytes": len(data), "sha256": hashlib.sha256(data).hexdigest(),
                      "hashed": "whole file"}


def test_large_file_digest_reads_size_and_both_ends_only(tmp_path):
    # The rule for files over the limit (1 GiB by default; lowered here to keep the test
    # small): SHA-256 of the size as decimal text, then the first and last MiB.
    data = bytearray(np.random.default_rng(2).bytes(3 * EDGE_BYTES + 17))
    path = tmp_path / "big.bin"
    path.write_bytes(bytes(data))
    digest = file_digest(path, large_bytes=EDGE_BYTES)
    expected = hashlib.sha256(str(len(data)).encode() + bytes(data[:EDGE_BYTES])
                              + bytes(data[-EDGE_BYTES:])).hexdigest()
    assert digest["sha256"] == expected and digest["hashed"].startswith("size and first")
    # What the rule can and cannot see: a changed middle byte keeps the digest (the
    # documented limitation); a changed last byte, or one more byte, changes it.
    middle = bytearray(data)
    middle[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(middle))
    assert file_digest(path, large_bytes=EDGE_BYTES)["sha256"] == expected
    end = bytearray(data)
    end[-1] ^= 0xFF
    path.write_bytes(bytes(end))
    assert file_digest(path, large_bytes=EDGE_BYTES)["sha256"] != expected
    path.write_bytes(bytes(data) + b"\0")
    assert file_digest(path, large_bytes=EDGE_BYTES)["sha256"] != expected


def test_input_files_expands_globs_and_names_the_key(tmp_path):
    runfile, _ = make_survey(tmp_path)
    (tmp_path / "holes.csv").write_text("ra,dec,radius_arcsec\n155,5,30\n")
    with open(runfile, "a") as fh:
        fh.write('exclude = [{circles = "holes.csv"}]\n')
    files = input_files(load_runfile(runfile))
    assert [(key, path.name) for key, path in files] == [
        ("catalog.paths[0]", "a.parquet"), ("catalog.paths[0]", "b.parquet"),
        ("footprint.exclude[0].circles.path", "holes.csv")]


def test_package_versions_are_the_installed_ones():
    versions = package_versions(("numpy", "surely-not-a-package-name"))
    assert versions == {"numpy": np.__version__, "surely-not-a-package-name": None}


def test_run_provenance_holds_the_run_file_text_and_input_digests(tmp_path):
    runfile, _ = make_survey(tmp_path)
    block = run_provenance(load_runfile(runfile), seed=3, engine="local", scheduler=None,
                           started_utc="a", finished_utc="b")
    assert block["runfile"]["text"] == runfile.read_text()
    assert block["runfile"]["sha256"] == hashlib.sha256(runfile.read_bytes()).hexdigest()
    assert [item["path"] for item in block["inputs"]] == ["cat/a.parquet", "cat/b.parquet"]
    part = (tmp_path / "cat" / "a.parquet").read_bytes()
    assert block["inputs"][0]["sha256"] == hashlib.sha256(part).hexdigest()
    assert block["seed"] == 3 and block["engine"] == "local"
    assert block["packages"]["numpy"] == np.__version__
    assert "1 GiB" in block["large_file_rule"]
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ", utc_now())


def test_same_seed_and_inputs_give_the_same_results_apart_from_the_times(tmp_path):
    runfile, _ = make_survey(tmp_path, footprint=textwrap.dedent("""\
        [footprint]
        max_order = 12
        include = [ {box = {ra = [150, 160], dec = [0, 10]}} ]
        [counts]
        bins = {start = 18, stop = 24, width = 0.5}
        fit_range = [18, 23]
        n_bootstrap = 20
        [variance]
        methods = ["jackknife", "analytic"]
        regions = 6
        redshift_median = 0.5
        [output]
        formats = ["json"]
        """))
    texts = []
    for name in ("a", "b"):
        result = run_survey(runfile, out_dir=tmp_path / name, seed=5, progress=False)
        assert result.results["provenance"]["seed"] == 5
        text = (tmp_path / name / "results.json").read_text()
        texts.append(re.sub(r'"(started|finished)_utc": "[^"]*"', r'"\1_utc": ""', text))
    assert texts[0] == texts[1]
    other = run_survey(runfile, out_dir=tmp_path / "c", seed=6, progress=False)
    assert json.loads(texts[0])["counts"] != other.results["counts"]  # the seed matters
