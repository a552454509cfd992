"""The README works as written: its first commands, its command lines, its Python API.

Self-consistency checks of the documentation against the code: the README's first block
is the two commands a newcomer runs (and CI runs the second word for word); every
``$ countscale ...`` example parses with the command line's own parser; the ten-line Python
example runs on the demo survey.
"""

from __future__ import annotations

import contextlib
import io
import re
import shlex
from pathlib import Path

import pytest

from countscale import cli

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")


def _blocks(language):
    return re.findall(rf"```{language}\n(.*?)```", README, flags=re.S)


def test_the_readme_opens_with_the_job_and_exactly_two_commands():
    lines = README.splitlines()
    assert lines[0] == "# countscale"
    first_code = README.index("```")
    paragraph = README[len(lines[0]):first_code].strip()
    assert "\n\n" not in paragraph  # one paragraph: the job
    commands = _blocks("bash")[0].strip().splitlines()
    assert len(commands) == 2
    assert commands[0].endswith("countscale demo --out demo_out")
    assert commands[1].endswith("python -m pytest")
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert commands[1] in ci.splitlines()  # CI runs the README's test command, word for word


def test_every_command_line_example_parses():
    parser = cli.build_parser()
    examples = [line[2:] for block in _blocks("console") for line in block.splitlines()
                if line.startswith("$ countscale ")]
    assert len(examples) >= 5
    for line in examples:
        argv = shlex.split(line)[1:]
        with contextlib.redirect_stderr(io.StringIO()) as err:
            try:
                args = parser.parse_args(argv)
            except SystemExit:
                pytest.fail(f"README example does not parse: {line}: {err.getvalue()}")
        assert callable(args.handler)


@pytest.mark.skipif(not (ROOT / "demo_data" / "survey.toml").is_file(),
                    reason="demo_data not generated")
def test_the_ten_line_python_example_runs(tmp_path, monkeypatch, capsys):
    block = next(b for b in _blocks("python") if "run_survey" in b)
    assert len(block.strip().splitlines()) <= 10
    monkeypatch.chdir(tmp_path)
    code = block.replace('"demo_data/survey.toml"', repr(str(ROOT / "demo_data" / "survey.toml")))
    code = code.replace('check_claim("two trillion galaxies")',
                        'check_claim("two trillion galaxies", n_draws=1000)')
    exec(compile(code, "README.md", "exec"), {})  # our own README example
    out = capsys.readouterr().out
    assert "in footprint" in out and "dex mag^-1" in out and "2.0 × 10^12" in out
    assert (tmp_path / "demo_out" / "report.html").is_file()
