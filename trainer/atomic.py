"""Never a half-written file: write beside the target, flush and fsync, rename, fsync the folder."""

from __future__ import annotations

import os
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Iterable, Iterator


def fsync_dir(folder: Path) -> None:
    """Flush a folder's entries (a rename) to disk.

    Parameters
    ----------
    folder : Path
        The folder.

    Raises
    ------
    OSError
        When the folder cannot be opened or flushed.
    """
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def fsync_file(path: Path) -> None:
    """Flush a closed file's contents to disk.

    Parameters
    ----------
    path : Path
        The file.

    Raises
    ------
    OSError
        When the file cannot be opened or flushed.
    """
    with open(path, "rb+") as fh:
        os.fsync(fh.fileno())


@contextmanager
def atomic_path(path: str | Path) -> Iterator[Path]:
    """A temporary path beside a target, renamed over it when the block succeeds.

    When the block ends without error the file written at the temporary path is fsynced and renamed
    over ``path`` (and the folder fsynced), else it is removed and ``path`` stays as it was.

    Parameters
    ----------
    path : str or Path
        The target file.

    Yields
    ------
    Path
        The temporary path (``.NAME.XXXX.tmp`` in the same folder).

    Raises
    ------
    OSError
        When the temporary file cannot be made, flushed or renamed.
    """
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
    """Write byte chunks to a file atomically (see :func:`atomic_path`).

    Parameters
    ----------
    path : str or Path
        The target file.
    chunks : iterable of bytes
        The contents, in order (any bytes-like objects).

    Raises
    ------
    OSError
        When the file cannot be written.
    """
    with atomic_path(path) as tmp, open(tmp, "wb") as fh:
        for chunk in chunks:
            fh.write(chunk)
