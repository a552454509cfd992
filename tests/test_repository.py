"""The repository stands alone: no tracked file points to a file outside it.

A user who clones the repository has only what is in it. Every tracked text file (code, tests,
docs, the notebook, the demo's README) is searched for references to design notes that are not
part of the repository and for absolute paths of a development machine. Sources of values are
cited as the published papers themselves, and the user-visible contracts are described in
docs/reference.md.

The patterns are assembled from pieces, so that this file does not match itself. The check
needs git (``git ls-files``) and is skipped, with the reason, when git or the repository's
history is not there (an unpacked source archive).
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]

_NOTES = "|".join(("DESIGN", "REFERENCES", "STYLE"))
OUTSIDE = [
    # Design notes kept beside the repository, by file name or by section.
    (re.compile(rf"\b(?:{_NOTES})\.md\b"), "a design note outside the repository"),
    (re.compile(rf"\b(?:{_NOTES}) ?(?:§|section\b)"), "a section of a design note"),
    (re.compile(r"\.\./" + "shared"), "a folder beside the repository"),
    # Absolute paths of a development machine.
    (re.compile(r"(?<![\w.~-])/(?:" + "|".join(("work", "root", "home", "Users")) + r")/"),
     "an absolute path of a machine"),
]


def tracked_files():
    if shutil.which("git") is None:
        pytest.skip("git is not installed: cannot list the tracked files")
    result = subprocess.run(["git", "ls-files", "-z"], cwd=REPO, capture_output=True,
                            check=False)
    if result.returncode != 0:
        pytest.skip("not a git checkout: cannot list the tracked files")
    return [REPO / name for name in result.stdout.decode().split("\0") if name]


def text_of(path):
    """The file as text, or None for a binary file (NUL bytes or not UTF-8)."""
    data = path.read_bytes()
    if b"\0" in data:
        return None
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError:
        return None


def test_no_tracked_file_points_outside_the_repository():
    files = tracked_files()
    assert any(p.name == "README.md" for p in files)  # the listing is the repository's
    found = []
    for path in files:
        if not path.is_file():
            continue  # deleted in the working tree but not yet in the index
        text = text_of(path)
        if text is None:
            continue
        for number, line in enumerate(text.splitlines(), start=1):
            for pattern, what in OUTSIDE:
                match = pattern.search(line)
                if match:
                    found.append(f"{path.relative_to(REPO)}:{number}: {what}: {match.group(0)!r}")
    assert not found, "\n".join(found)


@pytest.mark.parametrize(("line", "flagged"), [
    ("see " + "DESIGN" + ".md section 4", True),
    ("(" + "REFERENCES" + " §1)", True),
    ("../" + "shared/notes", True),
    ("/" + "home/someone/countscale", True),
    ("path = '/" + "work/repo/x'", True),
    ("Blanton et al. 2003, ApJ 592, 819", False),
    ("python demo_data/make_demo.py --out /tmp/demo", False),
    ("docs/reference.md", False),
    ("~/work/data.csv", False),
])
def test_the_patterns_catch_what_they_should(line, flagged):
    assert any(p.search(line) for p, _ in OUTSIDE) is flagged


def test_every_subpackage_is_installed():
    # A plain `pip install .` ships only the packages pyproject.toml lists: a subpackage left
    # out imports in an editable checkout and fails for everyone else.
    import tomllib

    listed = set(tomllib.loads((REPO / "pyproject.toml").read_text())["tool"]["setuptools"][
        "packages"])
    found = {".".join(p.parent.relative_to(REPO).parts)
             for p in (REPO / "countscale").rglob("__init__.py")}
    assert found == listed
