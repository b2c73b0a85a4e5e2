"""Atomic, checksummed checkpoints of the complete training state.

File layout (little-endian): the 8-byte magic ``HCCKPT01``; an 8-byte header length; the header,
UTF-8 JSON with ``version``, the caller's ``meta`` and, for each array, its name, dtype, shape, byte
offset and length in the payload; the payload, the arrays' raw bytes in order; last, the 32-byte
SHA-256 of everything before it. Writing goes to a temporary file beside the target, is flushed and
fsynced, then renamed over the target and the folder fsynced, so a crash at any moment leaves either
the old checkpoint or the new one, never a mix. A file that fails any check is refused and left as it is.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np

from trainer.atomic import write_atomic
from trainer.errors import UserError

MAGIC = b"HCCKPT01"
VERSION = 4


def save_checkpoint(path: Path, arrays: dict[str, np.ndarray], meta: dict) -> None:
    """Write a checkpoint atomically (layout in the module docstring).

    Parameters
    ----------
    path : Path
        The checkpoint file.
    arrays : dict of str to numpy.ndarray
        The arrays, by name (stored C-contiguous with dtype and shape).
    meta : dict
        JSON-able values stored in the header.

    Raises
    ------
    OSError
        When the file cannot be written (the previous checkpoint stays as it was).
    TypeError
        When ``meta`` is not JSON-able.
    """
    entries, offset = [], 0
    arrays = {k: np.array(v, order="C", copy=None) for k, v in arrays.items()}
    for name, a in arrays.items():
        entries.append({"name": name, "dtype": a.dtype.str, "shape": list(a.shape), "offset": offset,
                        "nbytes": a.nbytes})
        offset += a.nbytes
    header = json.dumps({"version": VERSION, "meta": meta, "arrays": entries}).encode("utf-8")
    digest = hashlib.sha256()

    def chunks():
        for part in (MAGIC, len(header).to_bytes(8, "little"), header):
            digest.update(part)
            yield part
        for a in arrays.values():
            view = memoryview(a.reshape(-1).view(np.uint8))
            digest.update(view)
            yield view
        yield digest.digest()

    write_atomic(path, chunks())


def load_checkpoint(path: Path) -> tuple[dict[str, np.ndarray], dict]:
    """Read and verify a checkpoint.

    The file is read once into one buffer; the arrays are writable views of it (no second copy of the
    curvature memory while resuming).

    Parameters
    ----------
    path : Path
        The checkpoint file.

    Returns
    -------
    tuple of (dict of str to numpy.ndarray, dict)
        ``(arrays, meta)``.

    Raises
    ------
    UserError
        Naming the file, leaving it untouched, when it is missing, truncated, fails its checksum or has
        another format version.
    """
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            blob = bytearray(path.stat().st_size)
            size = fh.readinto(blob)
    except FileNotFoundError:
        raise UserError(f"{path}: no checkpoint to resume from") from None
    view = memoryview(blob)[:size]
    if size < 48 or view[:8] != MAGIC:
        raise UserError(f"{path}: not a hashcurve checkpoint (bad magic or too short); left untouched")
    if hashlib.sha256(view[:-32]).digest() != view[-32:]:
        raise UserError(f"{path}: checkpoint is truncated or corrupt (checksum mismatch); left untouched")
    hlen = int.from_bytes(view[8:16], "little")
    header = json.loads(bytes(view[16:16 + hlen]).decode("utf-8"))
    if header.get("version") != VERSION:
        raise UserError(f"{path}: checkpoint format version {header.get('version')} is not {VERSION}; "
                        "it was written by another version of hashcurve")
    base = 16 + hlen
    arrays = {}
    for e in header["arrays"]:
        dtype = np.dtype(e["dtype"])
        arrays[e["name"]] = np.frombuffer(blob, dtype=dtype, count=e["nbytes"] // dtype.itemsize,
                                          offset=base + e["offset"]).reshape(e["shape"])
    return arrays, header["meta"]
