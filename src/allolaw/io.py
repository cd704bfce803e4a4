"""Atomic file writes: a killed job never leaves a partial output under the final name."""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

__all__ = ["atomic_path", "file_sha256", "write_json", "write_text"]


@contextlib.contextmanager
def atomic_path(path: str | Path) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it to ``path`` only on success."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".partial", dir=path.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        # mkstemp makes the file private (0600); give it the mode a plain open() would.
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp_path, 0o666 & ~umask)
        os.replace(tmp_path, path)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


def write_text(path: str | Path, text: str) -> None:
    """Write ``text`` to ``path`` atomically (UTF-8)."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")


def write_json(path: str | Path, obj: Any) -> None:
    """Write ``obj`` as stable, sorted, indented JSON, atomically."""
    write_text(path, json.dumps(obj, indent=2, sort_keys=True, default=_jsonable) + "\n")


def _jsonable(obj: Any) -> Any:
    # numpy scalars and arrays, Paths: the only non-JSON types our results carry.
    if hasattr(obj, "tolist"):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    msg = f"cannot write {type(obj).__name__} as JSON"
    raise TypeError(msg)


def file_sha256(path: str | Path) -> str:
    """SHA-256 of a file's bytes, read in blocks of 1 MiB (hex digest)."""
    digest = hashlib.sha256()
    with Path(path).open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()
