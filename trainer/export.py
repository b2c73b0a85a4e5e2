"""The export format: ``weights.parquet`` + ``model.json``, written, read and verified.

An export folder (``EXPORT_DIR``) holds ``weights.parquet`` (columns ``bucket`` int64, ``weight``
float64, non-zero weights only, sorted by bucket) and ``model.json`` (the self-describing document of
``schemas/model.schema.json``: hashing contract, intercept, link, calibration, training options,
holdout metrics, the SHA-256 of ``weights.parquet`` and ``scoring_sha256``). Anything that implements the hashing
contract can score with these two files alone (``reference/score_reference.py`` is the executable
form). A training model folder's ``model.json`` (``trainer.model``) shares the file name, the format
version and the checks of this module.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from trainer import __version__
from trainer.atomic import fsync_dir, fsync_file
from trainer.canonical import canonical_json
from trainer.errors import UserError
from trainer.json_values import jsonable
from trainer.spec import Spec, parse_spec

EXPORT_FORMAT = "hashcurve-export"
FORMAT_VERSION = 2
META_FILE = "model.json"
WEIGHTS_FILE = "weights.parquet"
EXPORT_FILES = (META_FILE, WEIGHTS_FILE)
LINKS = {"logistic": "logistic", "squared-hinge": "identity-margin"}
#: The keys of an export's model.json that decide a score; ``scoring_sha256`` covers exactly these.
EXPORT_SCORING_KEYS = ("format", "version", "loss", "link", "score", "calibration", "intercept", "hashing",
                       "spec", "n_buckets", "weights_file", "weights_columns", "absent_bucket_weight",
                       "weights_sha256")
#: The same for a training folder's model.json, plus ``info.calibration`` (the intercept and weights
#: live in model.npz, covered by ``arrays_sha256``).
TRAINING_SCORING_KEYS = ("format", "version", "spec", "loss", "arrays_file", "arrays_sha256")


def sha256_file(path: Path) -> str:
    """The SHA-256 digest of a file, read in 1 MiB blocks.

    Parameters
    ----------
    path : Path
        The file.

    Returns
    -------
    str
        The 64-character lowercase hex digest.

    Raises
    ------
    OSError
        When the file cannot be read.

    References
    ----------
    "Secure Hash Standard (SHS)", FIPS PUB 180-4, NIST, 2015.
    """
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def scoring_fields(meta: dict) -> dict:
    """The fields of a ``model.json`` document that decide a score.

    Parameters
    ----------
    meta : dict
        A ``model.json`` document, export or training form.

    Returns
    -------
    dict
        The export's :data:`EXPORT_SCORING_KEYS`, or a training folder's :data:`TRAINING_SCORING_KEYS`
        plus ``calibration`` taken from ``info``; an absent key counts as null.
    """
    if meta.get("format") != EXPORT_FORMAT:
        info = meta.get("info")
        return {**{k: meta.get(k) for k in TRAINING_SCORING_KEYS},
                "calibration": info.get("calibration") if isinstance(info, dict) else None}
    return {k: meta.get(k) for k in EXPORT_SCORING_KEYS}


def scoring_sha256(meta: dict) -> str:
    """The SHA-256 of the canonical JSON of a document's scoring fields.

    Parameters
    ----------
    meta : dict
        A ``model.json`` document, export or training form (see :func:`scoring_fields`).

    Returns
    -------
    str
        The hex SHA-256 of the RFC 8785 canonical JSON of :func:`scoring_fields` of ``meta``.

    Raises
    ------
    ValueError
        When a field has no canonical form (NaN, infinity, an integer beyond 2^53).

    References
    ----------
    "JSON Canonicalization Scheme (JCS)", RFC 8785, IETF, 2020.
    "Secure Hash Standard (SHS)", FIPS PUB 180-4, NIST, 2015.
    """
    return hashlib.sha256(canonical_json(scoring_fields(meta))).hexdigest()


def require_key(meta: dict, key: str, types, path: Path):
    """A key of a ``model.json`` document, checked for its type.

    Parameters
    ----------
    meta : dict
        The document.
    key : str
        The key.
    types : type or tuple of types
        The accepted types (a bool never counts as a number).
    path : Path
        The document's file, named in the error.

    Returns
    -------
    object
        ``meta[key]``.

    Raises
    ------
    UserError
        When the key is missing or its value has another type.
    """
    value = meta.get(key)
    if isinstance(value, bool) or not isinstance(value, types):
        raise UserError(f"{path}: key '{key}' is missing or has the wrong type")
    return value


def _stored_calibration(cal):
    """An export's calibration without the formula text export_document adds for readers."""
    if isinstance(cal, dict):
        return {k: v for k, v in cal.items() if k != "probability"}
    return cal


def read_export(folder: Path, meta: dict) -> tuple[Spec, np.ndarray, float, str, dict]:
    """Read and verify an export folder's model.

    Parameters
    ----------
    folder : Path
        The export folder.
    meta : dict
        Its ``model.json`` document (format and version already checked).

    Returns
    -------
    tuple
        ``(spec, weights, intercept, loss, info)`` for :class:`trainer.model.Model`: the Spec, float64
        weights of length 2^bits (zero where ``weights.parquet`` has no row), the intercept, the loss
        and the info dict (options, summary, negative keep rate, holdout, calibration, examples).

    Raises
    ------
    UserError
        When the hashing contract disagrees with the spec, or ``weights.parquet`` is missing, does not
        match its recorded SHA-256, is not Parquet, lacks exactly the columns bucket (int64) and
        weight (float64), holds nulls, or has buckets that are not strictly increasing in range; the
        message names the file.
    """
    meta_path = folder / META_FILE
    spec = parse_spec(require_key(meta, "spec", dict, meta_path), f"{meta_path}: spec")
    hashing = require_key(meta, "hashing", dict, meta_path)
    if (hashing.get("algorithm"), hashing.get("bits"), hashing.get("seed")) != ("murmur3_x86_32", spec.bits, spec.seed):
        raise UserError(f"{meta_path}: key 'hashing' disagrees with key 'spec' (algorithm, bits or seed)")
    loss = require_key(meta, "loss", str, meta_path)
    intercept = require_key(meta, "intercept", (int, float), meta_path)
    digest = require_key(meta, "weights_sha256", str, meta_path)
    training = require_key(meta, "training", dict, meta_path)
    wpath = folder / WEIGHTS_FILE
    try:
        data = wpath.read_bytes()
    except OSError:
        raise UserError(f"{wpath}: missing or unreadable; the export is incomplete") from None
    if hashlib.sha256(data).hexdigest() != digest:
        raise UserError(f"{wpath}: checksum does not match {META_FILE}; the file was changed or damaged")
    try:
        table = pq.read_table(pa.BufferReader(data))
    except pa.ArrowException as exc:
        raise UserError(f"{wpath}: not a readable Parquet file ({str(exc).splitlines()[0]})") from None
    if table.schema.names != ["bucket", "weight"] or table.schema.types != [pa.int64(), pa.float64()]:
        raise UserError(f"{wpath}: expected exactly the columns bucket (int64) and weight (float64)")
    buckets = table.column("bucket").to_numpy()
    values = table.column("weight").to_numpy()
    if table.column("bucket").null_count or table.column("weight").null_count:
        raise UserError(f"{wpath}: columns bucket and weight must hold no nulls")
    if buckets.size and (buckets[0] < 0 or buckets[-1] >= spec.n_buckets or np.any(np.diff(buckets) <= 0)):
        raise UserError(f"{wpath}: column bucket must be strictly increasing within [0, {spec.n_buckets})")
    weights = np.zeros(spec.n_buckets, dtype=np.float64)
    weights[buckets] = values
    info = {"options": training.get("options") or {}, "summary": training.get("summary") or {},
            "negative_keep_rate": training.get("negative_keep_rate", 1.0), "holdout": meta.get("holdout"),
            "calibration": _stored_calibration(meta.get("calibration")), "examples": meta.get("examples") or {}}
    return spec, weights, intercept, loss, info


def _utc_now() -> str:
    return dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def export_document(model, weights_sha256: str, nonzero: int) -> dict:
    """The export's ``model.json`` document (see ``schemas/model.schema.json``).

    Parameters
    ----------
    model : trainer.model.Model
        The model exported.
    weights_sha256 : str
        The SHA-256 hex digest of the written ``weights.parquet``.
    nonzero : int
        Its row count (the non-zero weights).

    Returns
    -------
    dict
        A JSON-ready document: format, version, generator, creation time, loss, link and score
        formula, calibration, intercept, hashing contract, spec, sizes, weights file and checksum,
        training options and summary, holdout metrics and example tokens.
    """
    link = LINKS[model.loss]
    cal = model.calibration
    doc = jsonable({
        "format": EXPORT_FORMAT,
        "version": FORMAT_VERSION,
        "generator": f"hashcurve {__version__}",
        "created": _utc_now(),
        "loss": model.loss,
        "link": link,
        "score": ("probability = 1 / (1 + exp(-margin))" if link == "logistic" else "margin"),
        "calibration": (None if cal is None else
                        {**cal, "probability": "1 / (1 + exp(-(a * margin + b)))"}),
        "intercept": model.intercept,
        "hashing": model.spec.contract(),
        "spec": model.spec.raw,
        "n_buckets": model.spec.n_buckets,
        "nonzero": nonzero,
        "weights_file": WEIGHTS_FILE,
        "weights_sha256": weights_sha256,
        "weights_columns": {"bucket": "int64", "weight": "float64"},
        "absent_bucket_weight": 0.0,
        "training": {"options": model.info["options"], "summary": model.info["summary"],
                     "negative_keep_rate": model.info["negative_keep_rate"]},
        "holdout": model.info["holdout"],
        "examples": model.info["examples"],
    })
    doc["scoring_sha256"] = scoring_sha256(doc)
    return doc


def _write_files(model, folder: Path) -> None:
    nz = np.flatnonzero(model.weights).astype(np.int64)
    table = pa.table({"bucket": pa.array(nz, pa.int64()), "weight": pa.array(model.weights[nz], pa.float64())})
    wpath = folder / WEIGHTS_FILE
    pq.write_table(table, wpath, compression="snappy")
    fsync_file(wpath)
    doc = export_document(model, sha256_file(wpath), int(nz.size))
    (folder / META_FILE).write_bytes(json.dumps(doc, indent=1, allow_nan=False).encode("utf-8"))
    fsync_file(folder / META_FILE)
    fsync_dir(folder)


def write_export(model, out_dir: str | Path, *, source: Path, force: bool = False) -> Path:
    """Write an export folder atomically.

    ``out_dir/weights.parquet`` (bucket int64, weight float64; non-zero weights only, sorted by bucket)
    and ``out_dir/model.json`` (:func:`export_document`) are written into a temporary sibling folder,
    which is then renamed into place, so ``out_dir`` holds either nothing new or a complete export.

    Parameters
    ----------
    model : trainer.model.Model
        The model to export.
    out_dir : str or Path
        The export folder: new, empty, or (with ``force``) a previous export.
    source : Path
        The model folder ``model`` was read from (an export never replaces it).
    force : bool
        Replace a previous export (model.json and weights.parquet alone).

    Returns
    -------
    Path
        ``out_dir``.

    Raises
    ------
    UserError
        For an ``out_dir`` that is a file or the model's own folder, a non-empty folder without
        ``force``, a folder holding other files, or a folder that cannot be written.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise UserError(f"{out}: export destination is a file; give a folder path")
    if out.resolve() == source.resolve():
        raise UserError(f"{out}: export destination is the model folder itself; choose another folder")
    existing = sorted(p.name for p in out.iterdir()) if out.is_dir() else []
    if existing and not force:
        raise UserError(f"{out}: export folder is not empty ({len(existing)} entries); use --force to "
                        "replace a previous export")
    if existing and not set(existing) <= set(EXPORT_FILES):
        raise UserError(f"{out}: holds files other than an export's ({', '.join(existing[:5])}); --force "
                        "only replaces a previous export, choose an empty or new folder")
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.", suffix=".tmp", dir=out.parent))
    except OSError as exc:
        raise UserError(f"{out}: cannot create the export folder ({exc.strerror or exc})") from None
    old = None
    try:
        _write_files(model, tmp)
        if out.is_dir():
            old = Path(tempfile.mkdtemp(prefix=f".{out.name}.", suffix=".old", dir=out.parent))
            os.replace(out, old)
        try:
            os.replace(tmp, out)
        except OSError:
            if old is not None:
                os.replace(old, out)
                old = None
            raise
        fsync_dir(out.parent)
    except OSError as exc:
        raise UserError(f"{out}: cannot write the export ({exc.strerror or exc})") from None
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    return out
