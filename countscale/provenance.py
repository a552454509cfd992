"""What made a result: versions, input files and their SHA-256, the run file, the seed, times.

A run records this under ``"provenance"`` in ``results.json`` so that anyone holding the report
can tell which inputs and which software produced it, and repeat it. Everything here except
the two times is a function of the inputs and the installed software: the same seed and
inputs on the same installation give the same ``results.json`` apart from ``started_utc`` and
``finished_utc``.

Topics
------
file_digest
    SHA-256 of one file (of its size and first and last MiB when it is over 1 GiB).
input_files
    Every file a run file names (globs expanded), with the key that names it.
package_versions
    Versions of countscale's dependencies as installed.
run_provenance
    The ``provenance`` block of ``results.json``.

Large files
-----------
Reading a catalogue of hundreds of GB twice (once to hash it, once to count it) would double
the cost of a run, so a file over :data:`LARGE_FILE_BYTES` (1 GiB) is hashed by its size
and its first and last :data:`EDGE_BYTES` (1 MiB) only; its entry says so (``"hashed"``).
Such a digest catches a file that was replaced, truncated or appended to, but not a change
in its middle that keeps its size.
"""

from __future__ import annotations

import glob
import hashlib
import os
import platform
import sys
from collections.abc import Mapping
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path
from typing import Any

__all__ = ["EDGE_BYTES", "LARGE_FILE_BYTES", "PACKAGES", "file_digest", "input_files",
           "package_versions", "run_provenance", "utc_now"]

#: Files larger than this are hashed by size and their first and last EDGE_BYTES (1 GiB).
LARGE_FILE_BYTES = 1 << 30
#: How much of each end of a large file is hashed (1 MiB).
EDGE_BYTES = 1 << 20
#: The packages whose installed versions a run records (countscale's dependencies).
PACKAGES = ("numpy", "scipy", "pandas", "healpy", "astropy", "matplotlib", "pyarrow", "tqdm",
            "dask", "distributed")

_WHOLE = "whole file"
_EDGES = "size and first and last MiB (file over 1 GiB)"
_BLOCK = 1 << 22


def utc_now() -> str:
    """The current time in UTC, ISO 8601 to the second (``2026-01-31T12:00:00Z``)."""
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def file_digest(path: str | os.PathLike, large_bytes: int = LARGE_FILE_BYTES) -> dict[str, Any]:
    """SHA-256 of a file: ``{"bytes", "sha256", "hashed"}``.

    Files up to `large_bytes` are hashed whole; larger ones by their size (as decimal text)
    followed by their first and last :data:`EDGE_BYTES` (see the module docstring), and
    ``hashed`` says which.
    """
    path = Path(path)
    size = path.stat().st_size
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        if size <= large_bytes:
            while block := fh.read(_BLOCK):
                digest.update(block)
            method = _WHOLE
        else:
            digest.update(str(size).encode("ascii"))
            digest.update(fh.read(EDGE_BYTES))
            fh.seek(size - EDGE_BYTES)
            digest.update(fh.read(EDGE_BYTES))
            method = _EDGES
    return {"bytes": size, "sha256": digest.hexdigest(), "hashed": method}


def _paths_in(value: Any, key: str) -> list[tuple[str, Path]]:
    """(key, path) for every path held by a run-file value (tables, lists, footprint items)."""
    if isinstance(value, Path):
        return [(key, value)]
    if isinstance(value, Mapping):
        return [pair for k, v in value.items() for pair in _paths_in(v, f"{key}.{k}")]
    if isinstance(value, list | tuple):
        return [pair for i, v in enumerate(value) for pair in _paths_in(v, f"{key}[{i}]")]
    params = getattr(value, "params", None)  # a footprint item
    if isinstance(params, Mapping):
        return _paths_in(params, f"{key}.{value.kind}")
    return []


def input_files(runfile: Any) -> list[tuple[str, Path]]:
    """Every input file a run file names, as ``(key, path)`` in the file's order.

    ``key`` is the section and key path (``"catalog.paths[0]"``); glob patterns are expanded
    (sorted), a pattern or path that matches no file is left out (the stage that reads it
    says so). ``[output]`` names no input and is skipped.
    """
    out: list[tuple[str, Path]] = []
    seen: set[Path] = set()
    for name in runfile.sections:
        if name == "output" or name not in runfile.present:
            continue
        for key, path in _paths_in(runfile.sections[name], name):
            text = os.fspath(path)
            matched = (sorted(glob.glob(text, recursive=True)) if glob.has_magic(text)
                       else [text])
            for item in matched:
                item = Path(item)
                if item.is_file() and item not in seen:
                    seen.add(item)
                    out.append((key, item))
    return out


def package_versions(names: tuple[str, ...] = PACKAGES) -> dict[str, str | None]:
    """Installed versions of `names` (None for a package that is not installed)."""
    out: dict[str, str | None] = {}
    for name in names:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    return out


def _shown_path(path: Path, base_dir: Path) -> str:
    """The path relative to the run file's folder when inside it (portable), else absolute."""
    try:
        return path.relative_to(base_dir).as_posix()
    except ValueError:
        return os.fspath(path)


def run_provenance(runfile: Any, seed: int, engine: str, scheduler: str | None,
                   started_utc: str, finished_utc: str) -> dict[str, Any]:
    """The ``provenance`` block of ``results.json`` for one run.

    Parameters
    ----------
    runfile : countscale.runfile.RunFile
    seed : int
        The seed of the run's generator.
    engine : str
        ``"local"`` or ``"dask"``.
    scheduler : str or None
        The Dask scheduler address, if any.
    started_utc, finished_utc : str
        From :func:`utc_now`; the only entries that differ between repeats of a run.

    Returns
    -------
    dict
        ``countscale_version``, ``python``, ``platform``, ``packages``, ``runfile``
        (``path``, ``sha256``, ``text``), ``inputs`` (``key``, ``path``, ``bytes``,
        ``sha256``, ``hashed``), ``large_file_rule``, ``seed``, ``engine``, ``scheduler``,
        ``started_utc``, ``finished_utc``.
    """
    from countscale import __version__

    path = Path(runfile.path)
    text = None
    runfile_entry: dict[str, Any] = {"path": os.fspath(path)}
    if path.is_file():
        data = path.read_bytes()
        runfile_entry["sha256"] = hashlib.sha256(data).hexdigest()
        text = data.decode("utf-8-sig", errors="replace")
    runfile_entry["text"] = text
    inputs = [{"key": key, "path": _shown_path(item, runfile.base_dir), **file_digest(item)}
              for key, item in input_files(runfile)]
    return {
        "countscale_version": __version__,
        "python": platform.python_version(),
        "platform": f"{platform.system()} {platform.machine()}",
        "executable_bits": 64 if sys.maxsize > 2**32 else 32,
        "packages": package_versions(),
        "runfile": runfile_entry,
        "inputs": inputs,
        "large_file_rule": (f"files over {LARGE_FILE_BYTES // 2**30} GiB are hashed by their "
                            f"size and first and last {EDGE_BYTES // 2**20} MiB, not whole"),
        "seed": int(seed),
        "engine": engine,
        "scheduler": scheduler,
        "started_utc": started_utc,
        "finished_utc": finished_utc,
    }
