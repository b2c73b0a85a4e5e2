"""The trained model: bucket weights, intercept, spec and metadata; prediction, saving, export, inspect.

Two on-disk forms exist:

* a training model folder (``MODEL_DIR``): ``model.npz`` (arrays ``weights``, ``intercept``) and
  ``model.json`` (format tag, spec, loss, info, the SHA-256 of ``model.npz`` and ``scoring_sha256``),
  written by :meth:`Model.save`;
* an export folder (``EXPORT_DIR``): ``weights.parquet`` (columns ``bucket`` int64, ``weight``
  float64, non-zero weights only, sorted by bucket) and ``model.json`` (the self-describing document
  of ``schemas/model.schema.json``: hashing contract, intercept, link, calibration, training options,
  holdout metrics, the SHA-256 of ``weights.parquet`` and ``scoring_sha256``), written by
  :func:`export_model`. Anything
  that implements the hashing contract can score with these two files alone
  (``reference/score_reference.py`` is the executable form).

:func:`load_model` reads either form and refuses a folder whose checksums do not match.
``scoring_sha256`` is the SHA-256 of the RFC 8785 canonical JSON (:mod:`trainer.canonical`) of the
fields of ``model.json`` that decide a score (:func:`scoring_fields`), so an edited intercept,
calibration, link, loss, hashing section or spec is refused like a changed weights file.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import math
import os
import shutil
import tempfile
import zipfile
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from scipy.special import expit

from trainer import __version__
from trainer.atomic import atomic_path, fsync_dir, fsync_file, write_atomic
from trainer.canonical import canonical_json
from trainer.errors import UserError
from trainer.kernels import predict_margin
from trainer.spec import Spec, parse_spec

LOSSES = ("logistic", "squared-hinge")
TRAINING_FORMAT = "hashcurve-training-model"
EXPORT_FORMAT = "hashcurve-export"
FORMAT_VERSION = 2
META_FILE = "model.json"
ARRAYS_FILE = "model.npz"
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

_INFO_DEFAULTS = {"options": {}, "negative_keep_rate": 1.0, "summary": {}, "holdout": None,
                  "calibration": None, "examples": {}}


def jsonable(obj):
    """A copy of ``obj`` that strict JSON can hold: numpy scalars and arrays become Python numbers
    and lists, tuples become lists, paths and dates become text, non-finite floats (undefined
    metrics) become None."""
    if isinstance(obj, str):
        return obj
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [jsonable(v) for v in obj.tolist()]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    if isinstance(obj, dt.date):
        return obj.isoformat()
    return obj


def _check_calibration(cal, loss: str) -> dict | None:
    if cal is None:
        return None
    if loss != "squared-hinge":
        raise ValueError("info['calibration'] applies to squared-hinge models only; a logistic model "
                         "already gives probabilities")
    ok = (isinstance(cal, dict) and cal.get("method") == "platt"
          and all(isinstance(cal.get(k), (int, float)) and not isinstance(cal.get(k), bool)
                  and math.isfinite(cal[k]) for k in ("a", "b")))
    if not ok:
        raise ValueError("info['calibration'] must be null or {'method': 'platt', 'a': finite, 'b': finite, ...}")
    return {**cal, "a": float(cal["a"]), "b": float(cal["b"])}


class Model:
    """A linear model over the hashed feature space of a spec.

    Takes ``spec`` (a :class:`trainer.spec.Spec`), ``weights`` (float64, length 2^bits, finite; kept
    without copying), ``intercept`` (finite float, already holding any negative-downsampling
    correction ln Q, see below), ``loss`` ("logistic" or "squared-hinge") and ``info`` (a dict; missing
    keys take defaults): ``options`` (training options), ``negative_keep_rate`` Q in (0, 1],
    ``summary`` (rows, passes, optionally ``distinct_tokens``, ...), ``holdout`` (last holdout metrics or
    None), ``calibration`` (None or ``{"method": "platt", "a", "b", ...}``, squared-hinge only; extra
    keys such as the slice it was fitted on are kept), ``examples`` (``{str(bucket): [token strings]}``).
    Raises ValueError for inconsistent arguments.

    The margin of a row is z = intercept + sum(value * weight[bucket]) (hashing contract). A logistic
    model's probability is 1 / (1 + exp(-z)); training on negatives kept with rate Q and adding ln Q to
    the intercept gives the recalibrated p = p' / (p' + (1 - p') / Q) of "Practical Lessons from
    Predicting Clicks on Ads at Facebook" (ADKDD 2014). A squared-hinge model ("A Dual Coordinate
    Descent Method for Large-scale Linear SVM", ICML 2008) gives probabilities only through Platt
    scaling sigmoid(a z + b) ("Probabilistic Outputs for Support Vector Machines and Comparisons to
    Regularized Likelihood Methods", Advances in Large Margin Classifiers, MIT Press, 1999).
    """

    def __init__(self, spec: Spec, weights: np.ndarray, intercept: float, loss: str, info: dict | None = None):
        if not isinstance(spec, Spec):
            raise ValueError(f"spec must be a trainer.spec.Spec, got {type(spec).__name__}")
        w = np.asarray(weights)
        if w.dtype != np.float64 or w.shape != (spec.n_buckets,):
            raise ValueError(f"weights must be float64 of shape ({spec.n_buckets},) for hashing bits "
                             f"{spec.bits}; got {w.dtype} of shape {w.shape}")
        if not np.all(np.isfinite(w)):
            raise ValueError("weights must all be finite")
        if isinstance(intercept, bool) or not isinstance(intercept, (int, float, np.floating, np.integer)) \
                or not math.isfinite(intercept):
            raise ValueError(f"intercept must be a finite number, got {intercept!r}")
        if loss not in LOSSES:
            raise ValueError(f"loss must be one of {', '.join(LOSSES)}, got {loss!r}")
        if info is not None and not isinstance(info, dict):
            raise ValueError(f"info must be a dict, got {type(info).__name__}")
        merged = {**_INFO_DEFAULTS, **(info or {})}
        q = merged["negative_keep_rate"]
        if isinstance(q, bool) or not isinstance(q, (int, float)) or not 0.0 < q <= 1.0:
            raise ValueError(f"info['negative_keep_rate'] must be in (0, 1], got {q!r}")
        merged["negative_keep_rate"] = float(q)
        merged["calibration"] = _check_calibration(merged["calibration"], loss)
        examples = merged["examples"] or {}
        if not isinstance(examples, dict) or not all(isinstance(v, list) for v in examples.values()):
            raise ValueError("info['examples'] must map bucket numbers to lists of token strings")
        merged["examples"] = {str(k): [str(t) for t in v] for k, v in examples.items()}
        for key in ("options", "summary"):
            if not isinstance(merged[key] or {}, dict):
                raise ValueError(f"info['{key}'] must be a dict")
            merged[key] = dict(merged[key] or {})
        self.spec = spec
        self.weights = np.ascontiguousarray(w)
        self.intercept = float(intercept)
        self.loss = loss
        self.info = merged

    @property
    def has_probability(self) -> bool:
        """True when :meth:`predict` gives probabilities: logistic models, or calibrated squared-hinge ones."""
        return self.loss == "logistic" or self.info["calibration"] is not None

    @property
    def calibration(self) -> dict | None:
        """The Platt calibration ``{"method": "platt", "a", "b"}`` of a squared-hinge model, or None."""
        return self.info["calibration"]

    def margin(self, batch) -> np.ndarray:
        """Margins z = intercept + X w of every row of ``batch`` (a :class:`trainer.reader.Batch`).

        Returns a float64 array of length ``batch.n_rows``. Raises ValueError when the batch holds a
        bucket outside [0, 2^bits) (a batch hashed for another spec). Source: the hashing contract.
        """
        if batch.indices.size and (int(batch.indices.max()) >= self.spec.n_buckets or int(batch.indices.min()) < 0):
            raise ValueError(f"batch holds a bucket outside [0, {self.spec.n_buckets}); it was hashed "
                             "for another spec")
        return predict_margin(batch, self.weights, self.intercept)

    def probability_from_margin(self, margins) -> np.ndarray:
        """Probabilities of an array of margins: logistic sigmoid(z), or Platt sigmoid(a z + b).

        Overflow-safe (``scipy.special.expit``). Returns float64. Raises UserError for a squared-hinge
        model without calibration. Sources: see the class docstring.
        """
        z = np.asarray(margins, dtype=np.float64)
        if self.loss == "logistic":
            return expit(z)
        cal = self.info["calibration"]
        if cal is None:
            raise _no_calibration()
        return expit(cal["a"] * z + cal["b"])

    def predict(self, batch) -> np.ndarray:
        """Probabilities of every row of ``batch``: :meth:`margin` followed by
        :meth:`probability_from_margin`. Raises UserError when the model has no probability (an
        uncalibrated squared-hinge model) and ValueError like :meth:`margin`."""
        if not self.has_probability:
            raise _no_calibration()
        return self.probability_from_margin(self.margin(batch))

    def top_weights(self, k: int = 10, sign: int = 1) -> list[dict]:
        """The ``k`` largest (``sign`` 1) or most negative (``sign`` -1) non-zero weights, strongest
        first, as ``{"bucket": int, "weight": float, "examples": [str, ...]}`` with the token strings
        recorded in ``info["examples"]`` for that bucket (possibly empty). Raises ValueError for
        ``sign`` other than 1 or -1 or a negative ``k``."""
        if sign not in (1, -1) or k < 0:
            raise ValueError("top_weights: sign must be 1 or -1 and k >= 0")
        s = sign * self.weights
        cand = np.flatnonzero(s > 0)
        if cand.size > k:
            cand = cand[np.argpartition(-s[cand], k - 1)[:k]] if k else cand[:0]
        cand = cand[np.lexsort((cand, -s[cand]))]
        ex = self.info["examples"]
        return [{"bucket": int(b), "weight": float(self.weights[b]), "examples": list(ex.get(str(int(b)), []))}
                for b in cand]

    def save(self, model_dir: str | Path) -> Path:
        """Write ``model_dir/model.npz`` (weights, intercept) and ``model_dir/model.json`` (format,
        version, spec, loss, info, SHA-256 of model.npz), each atomically (temporary file in the same
        folder, fsync, os.replace). Creates the folder. Returns its path. Raises UserError when the
        folder cannot be created or written."""
        folder = Path(model_dir)
        try:
            folder.mkdir(parents=True, exist_ok=True)
            with atomic_path(folder / ARRAYS_FILE) as tmp, open(tmp, "wb") as f:
                np.savez(f, weights=self.weights, intercept=np.float64(self.intercept))
            digest = _sha256(folder / ARRAYS_FILE)
            meta = {"format": TRAINING_FORMAT, "version": FORMAT_VERSION, "generator": f"hashcurve {__version__}",
                    "spec": self.spec.raw, "loss": self.loss, "info": jsonable(self.info),
                    "arrays_file": ARRAYS_FILE, "arrays_sha256": digest}
            meta["scoring_sha256"] = scoring_sha256(meta)
            write_atomic(folder / META_FILE, [json.dumps(meta, indent=1, allow_nan=False).encode("utf-8")])
        except OSError as exc:
            raise UserError(f"{folder}: cannot write the model folder ({exc.strerror or exc})") from None
        return folder


def scoring_fields(meta: dict) -> dict:
    """The fields of a ``model.json`` document (export or training form) that decide a score: the
    export's :data:`EXPORT_SCORING_KEYS`, or a training folder's :data:`TRAINING_SCORING_KEYS` plus
    ``calibration`` taken from ``info``. An absent key counts as null. Raises nothing."""
    if meta.get("format") == TRAINING_FORMAT:
        info = meta.get("info")
        return {**{k: meta.get(k) for k in TRAINING_SCORING_KEYS},
                "calibration": info.get("calibration") if isinstance(info, dict) else None}
    return {k: meta.get(k) for k in EXPORT_SCORING_KEYS}


def scoring_sha256(meta: dict) -> str:
    """Hex SHA-256 of the RFC 8785 canonical JSON ("JSON Canonicalization Scheme (JCS)", 2020) of
    :func:`scoring_fields` of ``meta``. Raises ValueError when a field has no canonical form (NaN,
    infinity, an integer beyond 2^53)."""
    return hashlib.sha256(canonical_json(scoring_fields(meta))).hexdigest()


def _no_calibration() -> UserError:
    return UserError("model: this squared-hinge model has no probability calibration (Platt); use its "
                     "margins, or retrain with a calibration slice")


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


# ----------------------------------------------------------------------------------------------
# loading


def _model_folder(path: str | Path) -> Path:
    p = Path(path)
    if p.is_file() and p.name == META_FILE:
        p = p.parent
    if not p.exists():
        raise UserError(f"{p}: no such model folder")
    if not p.is_dir():
        raise UserError(f"{p}: expected a model folder (holding model.json), got a file")
    if not (p / META_FILE).is_file():
        raise UserError(f"{p}: not a model folder (no {META_FILE}); pass a training model folder or an export folder")
    return p


def _read_meta(folder: Path) -> dict:
    path = folder / META_FILE
    try:
        meta = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise UserError(f"{path}: unreadable or corrupt model metadata ({exc})") from None
    if not isinstance(meta, dict) or meta.get("format") not in (TRAINING_FORMAT, EXPORT_FORMAT):
        raise UserError(f"{path}: not a hashcurve model file (key 'format' must be "
                        f"'{TRAINING_FORMAT}' or '{EXPORT_FORMAT}')")
    version = meta.get("version")
    if version != FORMAT_VERSION:
        raise UserError(f"{path}: model format version {version!r} is not supported (this hashcurve "
                        f"reads version {FORMAT_VERSION})")
    try:
        ok = scoring_sha256(meta) == meta.get("scoring_sha256")
    except ValueError:
        ok = False
    if not ok:
        raise UserError(f"{path}: the fields that decide a score (intercept, calibration, link, loss, hashing, "
                        "spec, weights checksum) do not match key 'scoring_sha256'; the file was edited or damaged")
    return meta


def _require(meta: dict, key: str, types, path: Path):
    value = meta.get(key)
    if isinstance(value, bool) or not isinstance(value, types):
        raise UserError(f"{path}: key '{key}' is missing or has the wrong type")
    return value


def _build(path: Path, spec: Spec, weights: np.ndarray, intercept, loss, info) -> Model:
    try:
        return Model(spec, weights, intercept, loss, info)
    except ValueError as exc:
        raise UserError(f"{path}: {exc}") from None


def _load_training(folder: Path, meta: dict) -> Model:
    meta_path = folder / META_FILE
    spec = parse_spec(_require(meta, "spec", dict, meta_path), f"{meta_path}: spec")
    loss = _require(meta, "loss", str, meta_path)
    info = _require(meta, "info", dict, meta_path)
    digest = _require(meta, "arrays_sha256", str, meta_path)
    arrays = folder / ARRAYS_FILE
    if not arrays.is_file():
        raise UserError(f"{arrays}: missing; the model folder is incomplete")
    if _sha256(arrays) != digest:
        raise UserError(f"{arrays}: checksum does not match {META_FILE}; the file was changed or damaged")
    try:
        with np.load(arrays, allow_pickle=False) as z:
            weights = z["weights"]
            intercept = float(z["intercept"])
    except (OSError, KeyError, ValueError, zipfile.BadZipFile) as exc:
        raise UserError(f"{arrays}: unreadable model arrays ({exc})") from None
    return _build(folder, spec, weights, intercept, loss, info)


def _stored_calibration(cal):
    """An export's calibration without the formula text export_document adds for readers."""
    if isinstance(cal, dict):
        return {k: v for k, v in cal.items() if k != "probability"}
    return cal


def _load_export(folder: Path, meta: dict) -> Model:
    meta_path = folder / META_FILE
    spec = parse_spec(_require(meta, "spec", dict, meta_path), f"{meta_path}: spec")
    hashing = _require(meta, "hashing", dict, meta_path)
    if (hashing.get("algorithm"), hashing.get("bits"), hashing.get("seed")) != ("murmur3_x86_32", spec.bits, spec.seed):
        raise UserError(f"{meta_path}: key 'hashing' disagrees with key 'spec' (algorithm, bits or seed)")
    loss = _require(meta, "loss", str, meta_path)
    intercept = _require(meta, "intercept", (int, float), meta_path)
    digest = _require(meta, "weights_sha256", str, meta_path)
    training = _require(meta, "training", dict, meta_path)
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
    return _build(folder, spec, weights, intercept, loss, info)


def load_model(path: str | Path) -> Model:
    """Load a model from a training model folder (model.npz + model.json) or an export folder
    (weights.parquet + model.json); ``path`` may also name the ``model.json`` inside either.

    The SHA-256 recorded in model.json is checked against the weights file. Returns a :class:`Model`.
    Raises UserError naming the file when the folder is missing, incomplete, corrupt, tampered with
    (checksum mismatch) or of an unsupported format version.
    """
    folder = _model_folder(path)
    meta = _read_meta(folder)
    if meta["format"] == TRAINING_FORMAT:
        return _load_training(folder, meta)
    return _load_export(folder, meta)


# ----------------------------------------------------------------------------------------------
# export


def _utc_now() -> str:
    return dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def export_document(model: Model, weights_sha256: str, nonzero: int) -> dict:
    """The export's ``model.json`` document for ``model`` (see ``schemas/model.schema.json``), given the
    SHA-256 of the written ``weights.parquet`` and its row count. Returns a JSON-ready dict; raises
    nothing."""
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


def _write_export(model: Model, folder: Path) -> None:
    nz = np.flatnonzero(model.weights).astype(np.int64)
    table = pa.table({"bucket": pa.array(nz, pa.int64()), "weight": pa.array(model.weights[nz], pa.float64())})
    wpath = folder / WEIGHTS_FILE
    pq.write_table(table, wpath, compression="snappy")
    fsync_file(wpath)
    doc = export_document(model, _sha256(wpath), int(nz.size))
    (folder / META_FILE).write_bytes(json.dumps(doc, indent=1, allow_nan=False).encode("utf-8"))
    fsync_file(folder / META_FILE)
    fsync_dir(folder)


def export_model(model_path: str | Path, out_dir: str | Path, force: bool = False) -> Path:
    """Export the model at ``model_path`` (training model folder or export folder) to ``out_dir``.

    Writes ``out_dir/weights.parquet`` (bucket int64, weight float64; non-zero weights only, sorted by
    bucket) and ``out_dir/model.json`` (:func:`export_document`) into a temporary sibling folder, then
    renames it into place, so ``out_dir`` holds either nothing new or a complete export. An existing
    non-empty ``out_dir`` is refused unless ``force``; even then only a previous export (model.json
    and weights.parquet alone) is replaced. Returns ``out_dir`` as a Path. Raises UserError for a
    bad model, an ``out_dir`` that is a file, the model's own folder, a non-empty folder without
    ``force``, or a folder that cannot be written.
    """
    src = _model_folder(model_path)
    model = load_model(src)
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise UserError(f"{out}: export destination is a file; give a folder path")
    if out.resolve() == src.resolve():
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
        _write_export(model, tmp)
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


# ----------------------------------------------------------------------------------------------
# inspect


def shared_bucket_share(distinct_tokens: int, n_buckets: int) -> float:
    """Expected share of the occupied buckets that hold two or more of ``distinct_tokens`` tokens
    hashed uniformly into ``n_buckets`` buckets (balls in bins, common practice): one minus the
    expected number of buckets with exactly one token, D (1 - 1/m)^(D-1), over the expected number of
    occupied buckets, m (1 - (1 - 1/m)^D). Returns 0.0 for D <= 1; raises ValueError for m < 1."""
    if n_buckets < 1:
        raise ValueError("n_buckets must be >= 1")
    if distinct_tokens <= 1:
        return 0.0
    if n_buckets == 1:
        return 1.0
    d, m, q = distinct_tokens, n_buckets, math.log1p(-1.0 / n_buckets)
    return float(1.0 - d * math.exp((d - 1) * q) / (-m * math.expm1(d * q)))


def inspect_model(path: str | Path, top: int = 10) -> dict:
    """Describe the model at ``path`` (training model folder or export folder).

    Returns a JSON-ready dict: ``path``, ``form`` ("training" or "export"), ``loss``,
    ``has_probability``, ``intercept``, ``bits``, ``buckets`` (2^bits), ``bytes`` (size on disk of
    the folder's model files), ``nonzero`` and ``nonzero_share``, ``distinct_tokens`` (from
    ``info["summary"]`` when training recorded it, else None), ``collision`` (None without
    ``distinct_tokens``, else ``tokens``, ``buckets`` and ``shared_bucket_share``, the expected share of
    the occupied buckets that hold two or more tokens, :func:`shared_bucket_share`), ``top_positive`` and
    ``top_negative`` (``top`` strongest weights with example token strings, :meth:`Model.top_weights`),
    ``calibration``, ``negative_keep_rate``, ``options``, ``summary`` and ``holdout``.
    Raises UserError like :func:`load_model`.
    """
    folder = _model_folder(path)
    model = load_model(folder)
    form = "training" if _read_meta(folder)["format"] == TRAINING_FORMAT else "export"
    files = (META_FILE, ARRAYS_FILE) if form == "training" else EXPORT_FILES
    m = model.spec.n_buckets
    nonzero = int(np.count_nonzero(model.weights))
    d = model.info["summary"].get("distinct_tokens")
    collision = None
    if isinstance(d, int) and not isinstance(d, bool) and d >= 0:
        collision = {"tokens": d, "buckets": m, "shared_bucket_share": shared_bucket_share(d, m)}
    else:
        d = None
    return jsonable({
        "path": str(folder),
        "form": form,
        "loss": model.loss,
        "has_probability": model.has_probability,
        "intercept": model.intercept,
        "bits": model.spec.bits,
        "buckets": m,
        "bytes": sum((folder / f).stat().st_size for f in files),
        "nonzero": nonzero,
        "nonzero_share": nonzero / m,
        "distinct_tokens": d,
        "collision": collision,
        "top_positive": model.top_weights(top, 1),
        "top_negative": model.top_weights(top, -1),
        "calibration": model.calibration,
        "negative_keep_rate": model.info["negative_keep_rate"],
        "options": model.info["options"],
        "summary": model.info["summary"],
        "holdout": model.info["holdout"],
    })


def _fmt(v) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)


def format_inspect(d: dict) -> str:
    """Render an :func:`inspect_model` dict as compact plain text (one fact per line, weights as a
    small table with up to three example tokens each, as the reader recorded them).
    Returns the text (ending in a newline); raises KeyError when ``d`` lacks a key of inspect_model."""
    lines = [f"model      {d['path']} ({d['form']} form, {d['bytes']:,} bytes on disk)",
             f"loss       {d['loss']}; probabilities: "
             + ("yes" if d["has_probability"] else "no (margins only)")
             + (f"; Platt a={d['calibration']['a']:.6g} b={d['calibration']['b']:.6g}" if d["calibration"] else ""),
             f"intercept  {d['intercept']:.6g} (negative keep rate {d['negative_keep_rate']:g})",
             f"buckets    {d['buckets']:,} (2^{d['bits']}), non-zero {d['nonzero']:,} ({100 * d['nonzero_share']:.2f}%)"]
    c = d["collision"]
    if c is None:
        lines.append("tokens     distinct count not recorded; collision rate unknown")
    else:
        lines.append(f"tokens     ~{c['tokens']:,} distinct (estimated from the non-zero buckets); expected "
                     f"{100 * c['shared_bucket_share']:.2f}% of the occupied buckets hold two or more")
    for title, rows in (("largest positive weights", d["top_positive"]), ("largest negative weights", d["top_negative"])):
        lines.append(f"{title}:")
        if not rows:
            lines.append("  (none)")
        for r in rows:
            ex = ", ".join(r["examples"][:3]) or "(no example recorded)"
            lines.append(f"  {r['weight']:+11.5f}  bucket {r['bucket']:>10}  {ex}")
    if d["options"]:
        lines.append("options    " + ", ".join(f"{k}={_fmt(v)}" for k, v in sorted(d["options"].items())))
    if d["summary"]:
        lines.append("training   " + ", ".join(f"{k}={_fmt(v)}" for k, v in sorted(d["summary"].items())
                                               if not isinstance(v, (dict, list))))
    h = d["holdout"]
    if h:
        keys = [k for k in ("rows", "log_loss", "normalized_entropy", "auc", "calibration_ratio", "error_rate")
                if k in h]
        lines.append("holdout    " + ", ".join(f"{k}={_fmt(h[k])}" for k in keys))
    return "\n".join(lines) + "\n"
