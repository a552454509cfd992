"""Small file helpers shared by the modules that write files (private)."""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path


@contextlib.contextmanager
def atomic_path(path, suffix=None):
    """Yield a temporary path beside `path`; rename it onto `path` only if the block succeeds.

    A failed write never leaves a half-written file under the final name.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    suffix = suffix if suffix is not None else "".join(path.suffixes)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.part-", suffix=suffix, dir=path.parent)
    os.close(fd)
    os.unlink(tmp)  # writers such as astropy refuse to overwrite without being told
    tmp = Path(tmp)
    try:
        yield tmp
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
