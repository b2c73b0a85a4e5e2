"""Never a half-written file: write beside the target, flush and fsync, rename, fsync the folder."""

from __future__ import annotations

import os
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Iterable, Iterator


def fsync_dir(folder: Path) -> None:
    """Flush a folder's entries (a rename) to disk."""
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def fsync_file(path: Path) -> None:
    """Flush a closed file's contents to disk."""
    with open(path, "rb+") as fh:
        os.fsync(fh.fileno())


@contextmanager
def atomic_path(path: str | Path) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; when the block ends without error the file written
    there is fsynced and renamed over ``path``, else it is removed and ``path`` stays as it was."""
    path = Path(path)
    fd, name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    tmp = Path(name)
    try:
        yield tmp
        fsync_file(tmp)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    fsync_dir(path.parent)


def write_atomic(path: str | Path, chunks: Iterable[bytes]) -> None:
    """Write the byte chunks to ``path`` atomically (see :func:`atomic_path`)."""
    with atomic_path(path) as tmp, open(tmp, "wb") as fh:
        for chunk in chunks:
            fh.write(chunk)
