"""The trained model: bucket weights, intercept, spec and metadata; prediction, saving, loading, inspection.

Two on-disk forms exist:

* a training model folder (``MODEL_DIR``): ``model.npz`` (arrays ``weights``, ``intercept``) and
  ``model.json`` (format tag, spec, loss, info, the SHA-256 of ``model.npz`` and ``scoring_sha256``),
  written by :meth:`Model.save`;
* an export folder (``EXPORT_DIR``), the portable form of ``trainer.export``.

:func:`load_model` reads either form and refuses a folder whose checksums do not match.
``scoring_sha256`` is the SHA-256 of the RFC 8785 canonical JSON (:mod:`trainer.canonical`) of the
fields of ``model.json`` that decide a score (:func:`trainer.export.scoring_fields`), so an edited intercept,
calibration, link, loss, hashing section or spec is refused like a changed weights file.
"""

from __future__ import annotations

import json
import math
import zipfile
from pathlib import Path

import numpy as np

from trainer import __version__
from trainer.atomic import atomic_path, write_atomic
from trainer.errors import UserError
from trainer.export import (EXPORT_FILES, EXPORT_FORMAT, FORMAT_VERSION, META_FILE, read_export, require_key,
                            scoring_sha256, sha256_file)
from trainer.json_values import jsonable
from trainer.kernels import predict_margin
from trainer.losses import expit
from trainer.spec import Spec, parse_spec

LOSSES = ("logistic", "squared-hinge")
TRAINING_FORMAT = "hashcurve-training-model"
ARRAYS_FILE = "model.npz"

_INFO_DEFAULTS = {"options": {}, "negative_keep_rate": 1.0, "summary": {}, "holdout": None,
                  "calibration": None, "examples": {}}


#: Where :meth:`Model.save` puts the examples' cached JSON text into model.json's.
_EXAMPLES_SLOT = "\x00examples\x00"


class ExampleTexts(dict):
    """Bucket examples as a model holds them: ``{str(bucket): [token text, ...]}``, checked once and not
    changed afterwards, so models of one run share one (a run keeps up to 100,000 values, which took
    0.16 s to check and copy for each model) and its JSON text is made once (:meth:`json_text`).

    Parameters
    ----------
    examples : dict, optional
        Bucket numbers (or their text) to lists of token strings; copied.

    Raises
    ------
    ValueError
        When ``examples`` is not a dict of lists.
    """

    def __init__(self, examples: dict | None = None):
        examples = examples or {}
        if not isinstance(examples, dict) or not all(isinstance(v, list) for v in examples.values()):
            raise ValueError("info['examples'] must map bucket numbers to lists of token strings")
        super().__init__((str(k), [str(t) for t in v]) for k, v in examples.items())
        self._json: str | None = None

    def json_text(self) -> str:
        """The JSON text of the examples (made on the first call).

        Returns
        -------
        str
        """
        if self._json is None:
            self._json = json.dumps(self)
        return self._json


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

    The margin of a row is z = intercept + sum(value * weight[bucket]) (hashing contract). A logistic
    model's probability is 1 / (1 + exp(-z)); training on negatives kept with rate Q and adding ln Q to
    the intercept gives the recalibrated p = p' / (p' + (1 - p') / Q) of the ADKDD 2014 paper below. A
    squared-hinge model gives probabilities only through Platt scaling sigmoid(a z + b).

    Parameters
    ----------
    spec : Spec
        The feature spec.
    weights : numpy.ndarray
        float64, length 2^bits, finite; kept without copying.
    intercept : float
        Finite, already holding any negative-downsampling correction ln Q.
    loss : {"logistic", "squared-hinge"}
        The loss trained.
    info : dict, optional
        Missing keys take defaults: ``options`` (training options), ``negative_keep_rate`` Q in (0, 1],
        ``summary`` (rows, passes, optionally ``distinct_tokens``, ...), ``holdout`` (last holdout metrics
        or None), ``calibration`` (None or ``{"method": "platt", "a", "b", ...}``, squared-hinge only;
        extra keys such as the slice it was fitted on are kept), ``examples``
        (``{str(bucket): [token strings]}``, checked and copied into an :class:`ExampleTexts`; one
        given is kept as it is).

    Raises
    ------
    ValueError
        For inconsistent arguments.

    References
    ----------
    "Practical Lessons from Predicting Clicks on Ads at Facebook", ADKDD, 2014.
    "A Dual Coordinate Descent Method for Large-scale Linear SVM", ICML, 2008.
    "Probabilistic Outputs for Support Vector Machines and Comparisons to Regularized Likelihood
    Methods", Advances in Large Margin Classifiers, MIT Press, 1999.
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
        if not isinstance(merged["examples"], ExampleTexts):
            merged["examples"] = ExampleTexts(merged["examples"])
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
        """Margins z = intercept + X w of every row of a batch (the hashing contract).

        Parameters
        ----------
        batch : trainer.reader.stream.Batch
            The rows.

        Returns
        -------
        numpy.ndarray
            float64, length ``batch.n_rows``.

        Raises
        ------
        ValueError
            When the batch holds a bucket outside [0, 2^bits) (a batch hashed for another spec).
        """
        if batch.indices.size and (int(batch.indices.max()) >= self.spec.n_buckets or int(batch.indices.min()) < 0):
            raise ValueError(f"batch holds a bucket outside [0, {self.spec.n_buckets}); it was hashed "
                             "for another spec")
        return predict_margin(batch, self.weights, self.intercept)

    def probability_from_margin(self, margins) -> np.ndarray:
        """Probabilities of an array of margins: logistic sigmoid(z), or Platt sigmoid(a z + b).

        Overflow-safe (:func:`trainer.losses.expit`). Sources: see the class docstring.

        Parameters
        ----------
        margins : array_like
            The margins.

        Returns
        -------
        numpy.ndarray
            float64 probabilities.

        Raises
        ------
        UserError
            For a squared-hinge model without calibration.
        """
        z = np.asarray(margins, dtype=np.float64)
        if self.loss == "logistic":
            return expit(z)
        cal = self.info["calibration"]
        if cal is None:
            raise _no_calibration()
        return expit(cal["a"] * z + cal["b"])

    def predict(self, batch) -> np.ndarray:
        """Probabilities of every row of a batch: :meth:`margin` followed by :meth:`probability_from_margin`.

        Parameters
        ----------
        batch : trainer.reader.stream.Batch
            The rows.

        Returns
        -------
        numpy.ndarray
            float64, length ``batch.n_rows``.

        Raises
        ------
        UserError
            When the model has no probability (an uncalibrated squared-hinge model).
        ValueError
            Like :meth:`margin`.
        """
        if not self.has_probability:
            raise _no_calibration()
        return self.probability_from_margin(self.margin(batch))

    def top_weights(self, k: int = 10, sign: int = 1) -> list[dict]:
        """The strongest non-zero weights of one sign, strongest first.

        Parameters
        ----------
        k : int, default 10
            How many (>= 0).
        sign : {1, -1}
            The largest (1) or the most negative (-1).

        Returns
        -------
        list of dict
            ``{"bucket": int, "weight": float, "examples": [str, ...]}`` with the token strings recorded in
            ``info["examples"]`` for that bucket (possibly empty).

        Raises
        ------
        ValueError
            For ``sign`` other than 1 or -1 or a negative ``k``.
        """
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
        """Write a training model folder.

        Writes ``model_dir/model.npz`` (weights, intercept) and ``model_dir/model.json`` (format, version,
        spec, loss, info, SHA-256 of model.npz; JSON on one line), each atomically (temporary file in
        the same folder, fsync, os.replace). Creates the folder.

        Parameters
        ----------
        model_dir : str or Path
            The folder.

        Returns
        -------
        Path
            The folder's path.

        Raises
        ------
        UserError
            When the folder cannot be created or written.
        """
        folder = Path(model_dir)
        try:
            folder.mkdir(parents=True, exist_ok=True)
            with atomic_path(folder / ARRAYS_FILE) as tmp, open(tmp, "wb") as f:
                np.savez(f, weights=self.weights, intercept=np.float64(self.intercept))
            digest = sha256_file(folder / ARRAYS_FILE)
            examples = self.info.get("examples")
            info = jsonable({k: v for k, v in self.info.items() if k != "examples"})
            # last in info, and JSON as they are: too many (up to 100,000) to copy value by value
            info["examples"] = _EXAMPLES_SLOT if isinstance(examples, ExampleTexts) else examples
            meta = {"format": TRAINING_FORMAT, "version": FORMAT_VERSION, "generator": f"hashcurve {__version__}",
                    "spec": self.spec.raw, "loss": self.loss, "info": info,
                    "arrays_file": ARRAYS_FILE, "arrays_sha256": digest}
            meta["scoring_sha256"] = scoring_sha256(meta)
            # one line: an indent would take json's pure-Python encoder, 5x slower on 100,000 examples
            text = json.dumps(meta, allow_nan=False)
            if isinstance(examples, ExampleTexts):  # the slot's last occurrence: only digests follow it
                head, _, tail = text.rpartition(json.dumps(_EXAMPLES_SLOT))
                text = head + examples.json_text() + tail
            write_atomic(folder / META_FILE, [text.encode("utf-8")])
        except OSError as exc:
            raise UserError(f"{folder}: cannot write the model folder ({exc.strerror or exc})") from None
        return folder


def _no_calibration() -> UserError:
    return UserError("model: this squared-hinge model has no probability calibration (Platt); use its "
                     "margins, or retrain with a calibration slice")


# ----------------------------------------------------------------------------------------------
# loading


def model_folder(path: str | Path) -> Path:
    """The model folder that a path names.

    Parameters
    ----------
    path : str or Path
        The folder, or the ``model.json`` in it.

    Returns
    -------
    Path

    Raises
    ------
    UserError
        When it is missing, a file, or holds no ``model.json``.
    """
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


def _build(path: Path, spec: Spec, weights: np.ndarray, intercept, loss, info) -> Model:
    try:
        return Model(spec, weights, intercept, loss, info)
    except ValueError as exc:
        raise UserError(f"{path}: {exc}") from None


def _load_training(folder: Path, meta: dict) -> Model:
    meta_path = folder / META_FILE
    spec = parse_spec(require_key(meta, "spec", dict, meta_path), f"{meta_path}: spec")
    loss = require_key(meta, "loss", str, meta_path)
    info = require_key(meta, "info", dict, meta_path)
    digest = require_key(meta, "arrays_sha256", str, meta_path)
    arrays = folder / ARRAYS_FILE
    if not arrays.is_file():
        raise UserError(f"{arrays}: missing; the model folder is incomplete")
    if sha256_file(arrays) != digest:
        raise UserError(f"{arrays}: checksum does not match {META_FILE}; the file was changed or damaged")
    try:
        with np.load(arrays, allow_pickle=False) as z:
            weights = z["weights"]
            intercept = float(z["intercept"])
    except (OSError, KeyError, ValueError, zipfile.BadZipFile) as exc:
        raise UserError(f"{arrays}: unreadable model arrays ({exc})") from None
    return _build(folder, spec, weights, intercept, loss, info)


def load_model(path: str | Path) -> Model:
    """Load a model from a training model folder or an export folder.

    A training folder holds model.npz + model.json, an export weights.parquet + model.json. The SHA-256
    recorded in model.json is checked against the weights file.

    Parameters
    ----------
    path : str or Path
        Either folder, or the ``model.json`` inside it.

    Returns
    -------
    Model

    Raises
    ------
    UserError
        Naming the file when the folder is missing, incomplete, corrupt, tampered with (checksum
        mismatch) or of an unsupported format version.
    """
    folder = model_folder(path)
    meta = _read_meta(folder)
    if meta["format"] == TRAINING_FORMAT:
        return _load_training(folder, meta)
    return _build(folder, *read_export(folder, meta))


# ----------------------------------------------------------------------------------------------
# inspect


def shared_bucket_share(distinct_tokens: int, n_buckets: int) -> float:
    """Expected share of the occupied buckets that hold two or more tokens.

    D tokens hashed uniformly into m buckets (balls in bins, common practice): one minus the expected
    number of buckets with exactly one token, D (1 - 1/m)^(D-1), over the expected number of occupied
    buckets, m (1 - (1 - 1/m)^D).

    Parameters
    ----------
    distinct_tokens : int
        D.
    n_buckets : int
        m.

    Returns
    -------
    float
        0.0 for D <= 1.

    Raises
    ------
    ValueError
        For m < 1.
    """
    if n_buckets < 1:
        raise ValueError("n_buckets must be >= 1")
    if distinct_tokens <= 1:
        return 0.0
    if n_buckets == 1:
        return 1.0
    d, m, q = distinct_tokens, n_buckets, math.log1p(-1.0 / n_buckets)
    return float(1.0 - d * math.exp((d - 1) * q) / (-m * math.expm1(d * q)))


def inspect_model(path: str | Path, top: int = 10) -> dict:
    """Describe a model.

    Parameters
    ----------
    path : str or Path
        A training model folder or an export folder.
    top : int, default 10
        Strongest weights listed of each sign.

    Returns
    -------
    dict
        JSON-ready: ``path``, ``form`` ("training" or "export"), ``loss``, ``has_probability``,
        ``intercept``, ``bits``, ``buckets`` (2^bits), ``bytes`` (size on disk of the folder's model
        files), ``nonzero`` and ``nonzero_share``, ``distinct_tokens`` (from ``info["summary"]`` when
        training recorded it, else None), ``collision`` (None without ``distinct_tokens``, else
        ``tokens``, ``buckets`` and ``shared_bucket_share``, the expected share of the occupied buckets
        that hold two or more tokens, :func:`shared_bucket_share`), ``top_positive`` and ``top_negative``
        (``top`` strongest weights with example token strings, :meth:`Model.top_weights`),
        ``calibration``, ``negative_keep_rate``, ``options``, ``summary`` and ``holdout``.

    Raises
    ------
    UserError
        Like :func:`load_model`.
    """
    folder = model_folder(path)
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
