"""The run folder: written whole or not at all, and checked before it is read.

This stage owns atomic writes (a temporary sibling renamed when complete), the
manifest (inputs with hashes, settings, seeds, versions) and loading a run back.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path

from planner.errors import RunFolderError


@contextlib.contextmanager
def atomic_output(path):
    """Yield a temporary path beside ``path``; rename it into place only on success."""
    path = Path(path)
    parent = path.parent if str(path.parent) else Path(".")
    if not parent.is_dir():
        raise RunFolderError(f"{path}: folder {parent} does not exist")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=path.suffix, dir=parent)
    os.close(fd)
    try:
        yield Path(tmp)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
