"""Atomic output: write to a temporary file beside the target, then rename over it."""

from __future__ import annotations

import json
import os
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Any, Iterator

from .errors import AdfitError


@contextmanager
def atomic_write(path: str | Path, mode: str = "w", encoding: str | None = "utf-8") -> Iterator[Any]:
    """Open a temporary file next to ``path``; on success rename it to ``path``.

    On any exception the temporary file is removed and ``path`` is left as it was.
    """
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.exists():
        raise AdfitError(f"{p}: output folder {parent} does not exist; create it first")
    fd, tmp = tempfile.mkstemp(prefix=f".{p.name}.", suffix=".tmp", dir=parent)
    # mkstemp creates the file owner-only; give it the permissions an ordinary open() would
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o666 & ~umask)
    try:
        with os.fdopen(fd, mode, encoding=encoding if "b" not in mode else None) as fh:
            yield fh
        os.replace(tmp, p)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise


def write_json(path: str | Path, obj: Any) -> None:
    """Write ``obj`` as indented JSON, atomically."""
    with atomic_write(path) as fh:
        json.dump(obj, fh, indent=2, allow_nan=True)
        fh.write("\n")
