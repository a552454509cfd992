"""End to end: ``countscale demo`` writes a report a person can read and share.

The bundled demo survey runs once for the module (about 15 s). Outside references: the
``json`` module (results.json loads), the standard library's ``html.parser`` (the page
parses and its tags balance), ``hashlib`` (the recorded digests), Pillow (each PNG decodes
and is not blank), a headless Chromium driven by selenium (the page loads without errors and
without the network, every image decodes, the summary table is there, the page fits a
phone's width, it prints), and the demo's truth (``demo_data/truth.json``, written by the mock
that drew the catalogue).

Set ``COUNTSCALE_SCREENSHOTS=DIR`` to keep desktop and phone screenshots of the page.
"""

from __future__ import annotations

import base64
import contextlib
import dataclasses
import hashlib
import io
import json
import os
import re
from html.parser import HTMLParser
from pathlib import Path

import browser  # tests/browser.py: the headless Chromium helper
import numpy as np
import pytest
from test_cli_run import make_survey

from countscale import cli, pipeline
from countscale.cli import main

DEMO = Path(__file__).resolve().parents[1] / "demo_data"
pytestmark = pytest.mark.skipif(not (DEMO / "survey.toml").is_file(),
                                reason="demo_data not generated")


def _run(argv):
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main([str(a) for a in argv])
    return code, out.getvalue(), err.getvalue()


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo run with its default seed: (folder, exit code, stdout, stderr, results)."""
    folder = tmp_path_factory.mktemp("demo") / "out"
    code, out, err = _run(["demo", "--out", folder, "--quiet"])
    results = json.loads((folder / "results.json").read_text()) if code == 0 else None
    return folder, code, out, err, results


def _without_times(text):
    return re.sub(r'"(started|finished)_utc": "[^"]*"', r'"\1_utc": ""', text)


# --------------------------------------------------------------------------------------------
# The run and its files
# --------------------------------------------------------------------------------------------


def test_demo_exits_0_and_ends_with_the_summary(demo):
    folder, code, out, err, results = demo
    assert code == 0, err
    assert results["run"]["seed"] == cli.DEMO_SEED
    tail = out[out.rindex("\nsummary\n"):]
    assert "39.58 deg²" in tail and "966,928 in the footprint" in tail
    for item in results["summary"]["headlines"]:
        assert item["label"] in tail
    files = {Path(line.strip()).name for line in out.splitlines() if str(folder) in line}
    assert {"report.md", "report.html", "results.json"} <= files


def test_results_json_holds_the_summary_and_the_provenance(demo):
    results = demo[4]
    summary = results["summary"]
    assert summary["area"]["area_deg2"] == pytest.approx(39.58006, rel=1e-6)  # truth.json
    assert summary["sources"]["in_footprint"] == 966_928  # demo_data/README.md
    for item in summary["headlines"]:
        lo95, hi95 = item["interval_95"]
        lo68, hi68 = item["interval_68"]
        assert lo95 <= lo68 <= item["median"] <= hi68 <= hi95
        assert item["dominant_error"] is None or 0 < item["dominant_error"]["share"] <= 1
    ledger = results["ledger"]  # every row counted once
    assert ledger["rows_read"] == (ledger["rows_in_footprint"] + ledger["rows_outside_footprint"]
                                   + sum(ledger["rows_rejected"].values()))
    prov = results["provenance"]
    assert prov["seed"] == cli.DEMO_SEED and prov["engine"] == "local"
    assert prov["runfile"]["text"] == (DEMO / "survey.toml").read_text()
    by_path = {item["path"]: item for item in prov["inputs"]}
    assert set(by_path) == {"catalog.parquet", "holes.csv", "injections.csv", "depth.fits"}
    for name, item in by_path.items():
        data = (DEMO / name).read_bytes()
        assert item["bytes"] == len(data) and item["sha256"] == hashlib.sha256(data).hexdigest()


def test_the_same_seed_gives_the_same_results_json_apart_from_the_times(demo, tmp_path):
    folder = demo[0]
    code, _, err = _run(["demo", "--out", tmp_path / "again", "--quiet"])
    assert code == 0, err
    first = _without_times((folder / "results.json").read_text())
    again = _without_times((tmp_path / "again" / "results.json").read_text())
    assert first == again


def test_demo_truth_inside_the_95_intervals(demo):
    results = demo[4]
    truth = json.loads((DEMO / "truth.json").read_text())["mock"]
    counts = results["counts"]
    # The count model the run file names is the one the comparison prefers, and it passes
    # its goodness-of-fit test: the report does not open with a failed fit.
    assert counts["fit"]["model"] == counts["comparison"]["best_bic"]
    assert counts["fit"]["p_value"] > 0.05
    # N(< 21.8) per deg² of the population: the galaxy model's expected 8290 per deg²
    # (computed with countscale.mock.expected_counts from the demo's model; truth.json's
    # limits skip 21.8).
    lo, hi = counts["integral_counts"]["per_deg2"]["interval_95"]
    assert lo <= 8290.1 <= hi
    totals = results.get("totals")
    if totals is None:
        pytest.skip("this version computes no [totals]; only the counts were checked")
    limits = np.array(truth["mag_limits"])
    m_limit = totals["details"]["sky"]["m_limit"]
    assert m_limit in limits
    expected_sky = truth["n_expected_sky"]["galaxies"][int(np.flatnonzero(limits == m_limit)[0])]
    lo, hi = totals["sky_total"]["interval_95"]
    assert lo <= expected_sky <= hi
    for key, value in (truth.get("totals") or {}).items():  # volume totals, when recorded
        if key in totals:
            lo, hi = totals[key]["interval_95"]
            assert lo <= value <= hi, key


class _Balance(HTMLParser):
    """Every opened element is closed in order (void elements aside); records attributes."""

    VOID = frozenset({"meta", "img", "br", "hr", "link", "input"})

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack, self.errors, self.attrs, self.text = [], [], [], []

    def handle_starttag(self, tag, attrs):
        self.attrs.append((tag, dict(attrs)))
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
        else:
            self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)


def test_report_html_parses_is_self_contained_and_says_what_report_md_says(demo):
    folder, _, _, _, results = demo
    page = (folder / "report.html").read_text(encoding="utf-8")
    parser = _Balance()
    parser.feed(page)
    parser.close()
    assert not parser.errors and not parser.stack
    images = [attrs for tag, attrs in parser.attrs if tag == "img"]
    assert len(images) == len(results["figures"]) >= 5
    assert all(img["src"].startswith("data:image/png;base64,") for img in images)
    # Nothing is fetched: no external script, style, image or link target.
    for _, attrs in parser.attrs:
        for name in ("src", "href"):
            value = attrs.get(name, "")
            assert not re.match(r"(https?:)?//", value), value
    # The same sections and numbers as report.md.
    markdown = (folder / "report.md").read_text(encoding="utf-8")
    headings = re.findall(r"^## (.+)$", markdown, flags=re.M)
    ids = {attrs.get("id") for tag, attrs in parser.attrs if tag == "h2"}
    assert len(headings) == len(ids) >= 7 and "summary" in ids and "provenance" in ids
    text = " ".join(" ".join(parser.text).split())
    for item in results["summary"]["headlines"]:
        assert item["label"] in text
    summary = re.search(r"## Summary\n(.*?)\n## ", markdown, flags=re.S)[1]
    for number in re.findall(r"\*\*([\d,.]+)\*\*", summary):
        assert number in text


def test_figures_decode_and_are_not_blank(demo):
    from PIL import Image

    folder, _, _, _, results = demo
    assert set(results["figures"]) >= {"footprint", "completeness", "counts",
                                       "luminosity_function", "variance"}
    for name, file in results["figures"].items():
        with Image.open(folder / file) as image:
            image.verify()
        with Image.open(folder / file) as image:
            pixels = np.asarray(image.convert("L"), dtype=float)
        assert min(pixels.shape) > 200, name
        assert pixels.std() > 5, name  # not a blank canvas
        assert (pixels < 200).mean() > 0.01, name  # something is drawn on it


# --------------------------------------------------------------------------------------------
# Exit codes and --json (on a small survey: the codes do not depend on the data's size)
# --------------------------------------------------------------------------------------------


def test_exit_codes_0_1_2_and_json_is_one_object(tmp_path, monkeypatch):
    runfile, _ = make_survey(tmp_path)
    code, out, err = _run(["run", runfile, "--out", tmp_path / "ok", "--json", "--seed", 1])
    assert code == 0, err
    data = json.loads(out)  # the whole of stdout: one object, the summary
    assert isinstance(data, dict) and data["area"]["area_deg2"] > 0
    assert {k: v for k, v in data.items() if k != "output"} == json.loads(
        (tmp_path / "ok" / "results.json").read_text())["summary"]
    # A stage that fails: exit 1, one line, and no results.json that looks whole.
    def boom(ctx):
        raise RuntimeError("the fit did not converge")

    stages = [dataclasses.replace(s, run=boom) if s.name == "tally" else s
              for s in pipeline.STAGES]
    monkeypatch.setattr(pipeline, "STAGES", stages)
    code, out, err = _run(["run", runfile, "--out", tmp_path / "failed"])
    assert code == 1 and out == ""
    assert err.splitlines() == ["countscale: computation failed: RuntimeError: the fit did not "
                                "converge"]
    assert not (tmp_path / "failed" / "results.json").exists()
    monkeypatch.undo()
    # A bad run file: exit 2, one line naming the file and the key.
    runfile.write_text(runfile.read_text().replace("max_order = 12", "max_order = 40"))
    code, out, err = _run(["run", runfile, "--out", tmp_path / "bad"])
    assert code == 2 and out == ""
    assert len(err.splitlines()) == 1 and "survey.toml" in err and "max_order" in err


# --------------------------------------------------------------------------------------------
# In a real browser
# --------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def chromium():
    pytest.importorskip("selenium")
    if browser.chromium_paths() is None:
        pytest.skip("Debian's chromium and chromium-driver are not installed")
    driver = browser.open_chromium()
    yield driver
    browser.close_chromium(driver)


def test_report_html_in_a_headless_browser(demo, chromium):
    folder, _, _, _, results = demo
    url = (folder / "report.html").resolve().as_uri()
    chromium.set_window_size(*browser.DESKTOP)
    chromium.get(url)
    assert chromium.execute_script("return document.readyState") == "complete"
    assert chromium.title == results["survey"]["name"]
    errors = [entry for entry in chromium.get_log("browser") if entry["level"] == "SEVERE"]
    assert errors == []
    images = chromium.execute_script(
        "return Array.from(document.images).map(i => [i.complete, i.naturalWidth, "
        "i.naturalHeight, i.getBoundingClientRect().width]);")
    assert len(images) == len(results["figures"])
    assert all(done and w > 0 and h > 0 and shown > 0 for done, w, h, shown in images)
    resources = chromium.execute_script(
        "return performance.getEntriesByType('resource').map(e => e.name);")
    assert not [name for name in resources if not name.startswith(("data:", "file:"))]
    rows = chromium.execute_script(
        "const t = document.querySelector('#summary ~ .table-wrap table');"
        "return t ? Array.from(t.tBodies[0].rows).map(r => r.cells[0].innerText) : null;")
    assert rows and len(rows) == len(results["summary"]["headlines"])
    # On a phone's width nothing runs off the side: tables stack, figures shrink.
    chromium.set_window_size(*browser.PHONE)
    chromium.get(url)
    width = chromium.execute_script("return [document.documentElement.scrollWidth, "
                                    "window.innerWidth];")
    assert width[0] <= width[1] + 1, width
    # It prints (folded tables open for print).
    pdf = base64.b64decode(chromium.print_page())
    assert pdf.startswith(b"%PDF") and len(re.findall(rb"/Type\s*/Page\b", pdf)) >= 3
    keep = os.environ.get("COUNTSCALE_SCREENSHOTS")
    if keep:
        Path(keep).mkdir(parents=True, exist_ok=True)
        for name, size in (("desktop", browser.DESKTOP), ("phone", browser.PHONE)):
            browser.full_page_screenshot(chromium, url, Path(keep) / f"report_{name}.png",
                                         *size)
