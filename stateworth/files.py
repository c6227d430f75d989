"""Atomic writes: a reader sees the old file (or directory) whole or the new one whole, never half.

Every file stateworth writes goes through here: specs from ``init``, panels from ``simulate``,
model directories, stored solutions, reports, benchmark results. A file is written to a
temporary sibling in the same directory (same file system, so the final ``os.replace`` is one
atomic rename), flushed to disk, and renamed over the target. A failure at any point removes the
temporary and leaves the target as it was.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import tempfile
from pathlib import Path
from typing import Any, Callable, Iterator


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_path(path: str | Path) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; write it inside the ``with`` block, and it becomes
    ``path`` in one rename when the block ends without an exception (removed otherwise). Parent
    directories are created. The file gets the usual permissions (``0666`` less the umask),
    not ``mkstemp``'s private ``0600``."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, name = tempfile.mkstemp(prefix=f".{path.name}.tmp-", dir=path.parent)
    os.close(fd)
    tmp = Path(name)
    try:
        yield tmp
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o666 & ~_umask())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def write_bytes(path: str | Path, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically."""
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return Path(path)


def write_text(path: str | Path, text: str) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    return write_bytes(path, text.encode("utf-8"))


def write_json(path: str | Path, doc: Any, **dumps: Any) -> Path:
    """Write ``doc`` as JSON (``json.dumps(doc, **dumps)``, indent 1 by default) atomically."""
    dumps.setdefault("indent", 1)
    return write_text(path, json.dumps(doc, **dumps) + "\n")


def write_with(path: str | Path, write: Callable[[Path], None]) -> Path:
    """Call ``write(tmp)`` to fill a temporary file, then rename it to ``path`` atomically (for
    writers that want a file name: Parquet, npz, CSV through DuckDB)."""
    with atomic_path(path) as tmp:
        write(tmp)
    return Path(path)


@contextlib.contextmanager
def atomic_dir(path: str | Path) -> Iterator[Path]:
    """Yield a fresh temporary directory beside ``path``; fill it inside the ``with`` block, and it
    replaces ``path`` when the block ends without an exception (removed otherwise).

    Replacing an existing directory is two renames (the old one aside, the new one in), so a
    reader between them finds nothing at ``path``: for directories that a server reads while
    they are rewritten, publish versions with :mod:`stateworth.rules.artifact` instead."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.tmp-", dir=path.parent))
    try:
        tmp.chmod(0o777 & ~_umask())  # mkdtemp makes it private; outputs are meant to be shared
        yield tmp
        if path.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{path.name}.old-", dir=path.parent))
            os.rename(path, old / path.name)
            os.rename(tmp, path)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.rename(tmp, path)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
