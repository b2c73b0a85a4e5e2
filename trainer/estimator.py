"""The scikit-learn estimator over the command line's verbs: :class:`HashedLogisticClassifier`.

It never trains by itself: ``fit`` is :func:`trainer.api.train`, ``partial_fit`` is one more pass of
``api.train(..., resume=True)`` from the previous call's checkpoint, predictions are
:meth:`trainer.model.Model.margin` over the rows the reader hashes, and ``save`` is
:func:`trainer.api.export`. So a model fitted here is the one ``hashcurve train`` gives on the same
rows and options, and ``hashcurve score`` scores its export identically.

Rows in memory (a pandas DataFrame, a pyarrow Table, or an array) are written to a temporary
Parquet file, because the reader, like the command line, streams from files: it finds and checks
files by path, and its resume positions and the run's fingerprint name the file. A Parquet path is
read where it lies, without a copy.

``partial_fit`` is a resume: a fit on rows in memory keeps the run's checkpoint (the solver's whole
state, about 56 bytes per bucket with the default history of 10: 15 MB at 2^18 buckets) in memory,
and each ``partial_fit`` writes its chunk to the same temporary path (the run's fingerprint names
the data file), puts the checkpoint back beside it and calls ``api.train(..., resume=True)`` with
one more epoch. The temporary folder exists only during the call.

scikit-learn is needed at run time here (``BaseEstimator`` gives ``get_params`` / ``set_params`` /
``clone``, ``ClassifierMixin`` the accuracy ``score``, ``validate_data`` the array checks), and
only here: install it with ``pip install "hashcurve[sklearn]"``. ``import trainer`` and the command
line never import this module.
"""

from __future__ import annotations

import copy
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

try:
    from sklearn.base import BaseEstimator, ClassifierMixin
    from sklearn.utils.metaestimators import available_if
    from sklearn.utils.multiclass import check_classification_targets, type_of_target
    from sklearn.utils.validation import check_is_fitted, column_or_1d, validate_data
except ImportError as exc:  # pragma: no cover - exercised by a subprocess test without scikit-learn
    raise ImportError("trainer.HashedLogisticClassifier needs scikit-learn: "
                      "pip install \"hashcurve[sklearn]\"") from exc

from trainer import api
from trainer.errors import UserError
from trainer.model import Model, load_model
from trainer.reader import Reader
from trainer.run_folder import RunFolder
from trainer.spec import Spec, load_spec, parse_spec

#: Hash bits of a spec inferred from the columns when neither ``spec`` nor ``bits`` says (2^18 buckets).
DEFAULT_BITS = 18
#: Column names the estimator gives ``y`` and ``sample_weight`` in the Parquet file it writes.
LABEL_COLUMN = "y"
WEIGHT_COLUMN = "sample_weight"
_SCORE_ROWS = 65536
_PARAMS_KEY = "estimator"


def infer_spec(schema: pa.Schema, label: str, weight: str | None = None, bits: int = DEFAULT_BITS) -> dict:
    """A feature spec (as a JSON object) inferred from a table's column types.

    Strings, booleans and dates are ``categorical``, lists of those or of integers ``multi``, integers
    and floats ``numeric`` with the ``log1p`` transform sign(x) ln(1 + |x|), dictionary columns by their
    values. Hashing seed 0, no crosses. log1p because the numbers of response logs are mostly
    heavy-tailed counts and amounts, whose raw outliers dominate a margin: on the demo's first two days
    (train on one, score the other, 2 epochs) it gave holdout log-loss 0.16612 / 0.17631 against
    0.16627 / 0.17902 for identity. Integer codes are numbers here: cast them to strings, or pass a
    spec, to hash them as categories.

    Parameters
    ----------
    schema : pyarrow.Schema
        The columns.
    label : str
        The label column (not a feature).
    weight : str, optional
        The row-weight column (not a feature).
    bits : int, default DEFAULT_BITS
        Hash bits.

    Returns
    -------
    dict
        The spec.

    Raises
    ------
    ValueError
        Naming a column of any other type (timestamps, binary, nested structs), or when no feature
        column is left.
    """
    features = []
    for field in schema:
        if field.name in (label, weight):
            continue
        kind = _kind(field.type)
        if kind is None:
            raise ValueError(f"column '{field.name}' is {field.type}; a spec is inferred from strings, booleans "
                             "and dates (categorical), lists of those (multi) and numbers (numeric): cast "
                             "the column or pass spec=")
        features.append({"column": field.name, "kind": kind, **({"transform": "log1p"} if kind == "numeric" else {})})
    if not features:
        raise ValueError("X holds no feature column")
    spec = {"label": {"column": label}, "hashing": {"bits": bits, "seed": 0}, "features": features, "crosses": []}
    if weight is not None:
        spec["weight"] = {"column": weight}
    return spec


def _kind(t: pa.DataType) -> str | None:
    if pa.types.is_dictionary(t):
        t = t.value_type
    if pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_boolean(t) or pa.types.is_date(t):
        return "categorical"
    if pa.types.is_integer(t) or pa.types.is_floating(t):
        return "numeric"
    if (pa.types.is_list(t) or pa.types.is_large_list(t)) and _kind(t.value_type) == "categorical":
        return "multi"
    if (pa.types.is_list(t) or pa.types.is_large_list(t)) and pa.types.is_integer(t.value_type):
        return "multi"
    return None


def _is_path(X) -> bool:
    return isinstance(X, (str, os.PathLike))


def _is_frame(X) -> bool:
    return type(X).__module__.split(".")[0] == "pandas" and hasattr(X, "columns")


def _probability_available(est) -> bool:
    if est.loss == "logistic" or est.holdout_start is not None or est.holdout_end is not None:
        return True
    raise AttributeError("predict_proba: a squared-hinge model gives probabilities only through Platt "
                         "scaling fitted on a holdout; set holdout_start/holdout_end (days of the spec's time "
                         "column), or use decision_function")


class HashedLogisticClassifier(ClassifierMixin, BaseEstimator):
    """An L2-regularized linear classifier over hashed features, trained by ``hashcurve train``.

    X is a pandas DataFrame or pyarrow Table (columns named by the spec), a 2-d array (columns ``x0``,
    ``x1``, ... , all numeric), or the path of a Parquet file or folder (then ``y`` is None and the
    label is the spec's label column). With ``y`` given, class ``classes_[1]`` is the positive label;
    with the label read through the spec, ``classes_`` is [0, 1] as the spec's label rule defines them.

    Parameters
    ----------
    spec : dict, Spec, str or Path, optional
        A spec dict, :class:`trainer.spec.Spec` or spec file; None infers one from the column types
        (:func:`infer_spec`), kept in ``spec_``.
    bits : int, optional
        Hash bits, overriding the spec's (None: the spec's, 18 for an inferred spec).
    epochs, loss, solver, l2_strength, history, batch_rows, step0, seed
        Training options (README, ``hashcurve train``; :class:`trainer.training.TrainOptions`),
        stored unchanged: ``loss`` "logistic" or "squared-hinge", ``solver`` "olbfgs", "res", "sgd" or
        "adagrad", ``l2_strength`` lambda of the per-row-average objective.
    shuffle_buffer, negative_keep_rate, patience, skip_bad_labels
        Training options as well.
    start, end : str or datetime.date, optional
        The days of the spec's time column trained on, inclusive.
    holdout_start, holdout_end : str or datetime.date, optional
        The days evaluated after every pass: the best pass is kept, early stop, and the Platt
        calibration that gives a squared-hinge model its ``predict_proba``; as with ``hashcurve train``,
        set ``end`` before them to keep them out of training.
    verbose : bool
        Print the per-pass table.

    Attributes
    ----------
    model_ : trainer.model.Model
        The fitted model.
    spec_ : dict
        The spec used, a JSON object: ``json.dump`` it to train the same features with the command line.
    classes_ : numpy.ndarray
        The two labels.
    coef_ : numpy.ndarray
        Shape (1, 2^bits): one weight per bucket, not per column.
    intercept_ : numpy.ndarray
        The intercept.
    n_iter_ : int
        Passes trained.
    n_features_in_ : int
        Input columns.
    feature_names_in_ : numpy.ndarray
        The input columns' names.
    """

    def __init__(self, spec=None, *, bits=None, epochs=3, loss="logistic", solver="olbfgs", l2_strength=1e-4,
                 history=10, batch_rows=4096, step0=None, seed=0, shuffle_buffer=0, negative_keep_rate=1.0,
                 patience=1, start=None, end=None, holdout_start=None, holdout_end=None, skip_bad_labels=False,
                 verbose=False):
        self.spec = spec
        self.bits = bits
        self.epochs = epochs
        self.loss = loss
        self.solver = solver
        self.l2_strength = l2_strength
        self.history = history
        self.batch_rows = batch_rows
        self.step0 = step0
        self.seed = seed
        self.shuffle_buffer = shuffle_buffer
        self.negative_keep_rate = negative_keep_rate
        self.patience = patience
        self.start = start
        self.end = end
        self.holdout_start = holdout_start
        self.holdout_end = holdout_end
        self.skip_bad_labels = skip_bad_labels
        self.verbose = verbose

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.classifier_tags.multi_class = False
        return tags

    # -- fitting ------------------------------------------------------------------------------------

    def fit(self, X, y=None, sample_weight=None):
        """Train ``epochs`` passes over the rows of X (see the class docstring).

        Parameters
        ----------
        X : DataFrame, pyarrow.Table, array_like, str or Path
            The rows, or a Parquet path.
        y : array_like, optional
            Labels (two classes); None with a Parquet path.
        sample_weight : array_like, optional
            Row weights (>= 0; rows weighing 0 are dropped).

        Returns
        -------
        HashedLogisticClassifier
            self.

        Raises
        ------
        ValueError
            For unusable X, y or weights.
        UserError
            For what ``hashcurve train`` refuses (options, data).
        """
        for attr in ("model_", "_state", "_stream"):
            self.__dict__.pop(attr, None)
        return self._run(X, y, sample_weight, classes=None, partial=False)

    def partial_fit(self, X, y, classes=None, sample_weight=None):
        """One more pass, over the rows of X only, continuing from the state the previous fit left.

        The state (weights, solver memory, step counter) is that of the previous ``fit`` or ``partial_fit``:
        the run's checkpoint is resumed with one more epoch while its data file holds the new rows. So
        ``partial_fit`` on chunks whose sizes are multiples of ``batch_rows`` gives the weights of one pass of
        ``hashcurve train`` over the chunks as the files of one folder, bit for bit. Rows must be in memory
        (a Parquet path has no next chunk), and no holdout days may be set.

        Parameters
        ----------
        X : DataFrame, pyarrow.Table or array_like
            The chunk's rows.
        y : array_like
            Their labels.
        classes : array_like, optional
            Both labels; required on the first call unless ``y`` holds both.
        sample_weight : array_like, optional
            Row weights (>= 0).

        Returns
        -------
        HashedLogisticClassifier
            self.

        Raises
        ------
        ValueError
            Like :meth:`fit`, and for a Parquet path, holdout days, classes that differ from the first
            call's, or an estimator fitted on a path or loaded from an export.
        """
        if _is_path(X):
            raise ValueError("partial_fit takes rows in memory (a DataFrame, Table or array); train on a "
                             "Parquet path with fit")
        if self.holdout_start is not None or self.holdout_end is not None:
            raise ValueError("partial_fit keeps no holdout: set holdout_start and holdout_end to None")
        more = hasattr(self, "model_")
        if more and getattr(self, "_state", None) is None:
            raise ValueError("partial_fit continues a fit on rows in memory in this session; this estimator "
                             "was fitted on a Parquet path or loaded from an export, so fit it again")
        if classes is not None:
            classes = np.unique(np.asarray(classes))
            if more and not np.array_equal(classes, self.classes_):
                raise ValueError(f"classes {classes.tolist()} differ from the first call's {self.classes_.tolist()}")
        return self._run(X, y, sample_weight, classes=classes, partial=True)

    def _run(self, X, y, sample_weight, classes, partial: bool):
        more = partial and hasattr(self, "model_")
        if _is_path(X):
            if y is not None or sample_weight is not None:
                raise ValueError("with a Parquet path, the labels and row weights are the spec's columns; "
                                 "pass y=None and sample_weight=None")
            return self._fit_path(Path(X))
        table = self._table(X, reset=not more)
        n = table.num_rows
        table, spec_label, spec_weight = self._attach(table, y, sample_weight, classes, more, partial)
        if table.num_rows == 0:
            raise ValueError(f"sample_weight: all {n} weights are zero; no rows to train on")
        if more:
            stream = Path(self._stream)
            try:
                stream.mkdir(parents=True)
            except FileExistsError:
                raise RuntimeError(f"{stream}: in use by another partial_fit of this estimator (or of a copy "
                                   "of it)") from None
        else:
            self.spec_ = self._resolve_spec(table.schema, spec_label, spec_weight)
            stream = Path(tempfile.mkdtemp(prefix="hashcurve-estimator-"))
            self._stream = str(stream)
        try:
            data, out = stream / "rows.parquet", stream / "model"
            pq.write_table(table, data)
            if more:
                out.mkdir()
                RunFolder(out).checkpoint.write_bytes(self._state)
            epochs = self.n_iter_ + 1 if more else (1 if partial else self.epochs)
            self._set_model(self._train(data, out, epochs, resume=more, allow_one_class=partial))
            self._state = RunFolder(out).checkpoint.read_bytes()
        finally:
            shutil.rmtree(stream, ignore_errors=True)
        return self

    def _fit_path(self, path: Path):
        spec = self._given_spec()
        if spec is None:
            raise ValueError(f"{path}: fitting on a Parquet path needs spec= (its label column and features)")
        self.spec_ = self._override_bits(spec.raw)
        self.classes_ = np.array([0, 1])
        names = [f.column for f in parse_spec(self.spec_).features]
        self.n_features_in_ = len(names)
        self.feature_names_in_ = np.array(names, dtype=object)
        with tempfile.TemporaryDirectory(prefix="hashcurve-estimator-") as tmp:
            self._set_model(self._train(path, Path(tmp) / "model", self.epochs, resume=False,
                                        allow_one_class=False))
        self._state = None
        return self

    def _train(self, data: Path, out: Path, epochs: int, resume: bool, allow_one_class: bool) -> Model:
        options = {"epochs": epochs, "loss": self.loss, "solver": self.solver, "l2_strength": self.l2_strength,
                   "history": self.history, "batch_rows": self.batch_rows, "step0": self.step0, "seed": self.seed,
                   "shuffle_buffer": self.shuffle_buffer, "negative_keep_rate": self.negative_keep_rate,
                   "patience": self.patience, "skip_bad_labels": self.skip_bad_labels,
                   "allow_one_class": allow_one_class,
                   # partial_fit continues one run chunk by chunk, so fit and partial_fit train plain
                   # online passes (no full-batch phase, no averaging) whatever the log's size
                   "full_batch_memory": 0}
        days = {k: getattr(self, k) for k in ("start", "end", "holdout_start", "holdout_end")
                if getattr(self, k) is not None}
        if days and parse_spec(self.spec_).time_column is None:
            raise ValueError(f"{', '.join(days)} need a spec with a time column (key 'time')")
        options.update(days)
        return api.train(parse_spec(self.spec_, "spec_"), data, out, resume=resume, quiet=not self.verbose,
                         **options).model

    def _set_model(self, model: Model) -> None:
        self.model_ = model
        self.coef_ = model.weights[np.newaxis, :]
        self.intercept_ = np.array([model.intercept])
        self.n_iter_ = int(model.info["summary"].get("passes", 0))

    # -- inputs -------------------------------------------------------------------------------------

    def _table(self, X, reset: bool) -> pa.Table:
        """X as a pyarrow Table; sets (``reset``) or checks the input columns."""
        if isinstance(X, pa.Table) or _is_frame(X):
            table = X if isinstance(X, pa.Table) else pa.Table.from_pandas(X, preserve_index=False)
            if reset:
                self.n_features_in_ = table.num_columns
                self.feature_names_in_ = np.array(table.column_names, dtype=object)
            return table
        arr = validate_data(self, X, reset=reset, dtype="numeric", ensure_min_samples=1)
        names = (list(self.feature_names_in_) if hasattr(self, "feature_names_in_")
                 else [f"x{j}" for j in range(arr.shape[1])])
        return pa.table({name: pa.array(arr[:, j]) for j, name in enumerate(names)})

    def _attach(self, table: pa.Table, y, sample_weight, classes, more: bool, partial: bool):
        """The table the trainer reads: ``y`` as 0/1 and the non-zero weights appended. Returns it
        and the label and weight columns the spec must name (None: the spec's own). A fit needs
        both classes among the rows of positive weight; a partial_fit chunk may hold one."""
        given = self._given_spec() if not more else parse_spec(self.spec_)
        if y is None:
            if given is None:
                raise ValueError("HashedLogisticClassifier requires y to be passed, but the target y is None; "
                                 "pass the labels, or a spec whose label column is in X")
            if not more:
                self.classes_ = np.array([0, 1])
                names = [c for c in table.column_names if c not in (given.label_column, given.weight_column)]
                self.n_features_in_ = len(names)
                self.feature_names_in_ = np.array(names, dtype=object)
            if sample_weight is not None:
                raise ValueError("sample_weight needs y; with the label in X, name a weight column in the spec")
            return table, None, None
        label = given.label_column if given is not None else LABEL_COLUMN
        weight = (given.weight_column or WEIGHT_COLUMN) if given is not None else WEIGHT_COLUMN
        y = column_or_1d(y, warn=True)
        check_classification_targets(y)
        y_type = type_of_target(y, input_name="y", raise_unknown=True)
        if y_type != "binary":
            raise ValueError(f"Only binary classification is supported. The type of the target is {y_type}.")
        if y.shape[0] != table.num_rows:
            raise ValueError(f"y has {y.shape[0]} labels for {table.num_rows} rows of X")
        if not more:
            self.classes_ = classes if classes is not None else np.unique(y)
            if self.classes_.size != 2:
                raise ValueError(f"HashedLogisticClassifier needs exactly two classes in y; got "
                                 f"{self.classes_.size} class(es): {self.classes_.tolist()[:5]}")
        unknown = ~np.isin(y, self.classes_)
        if unknown.any():
            raise ValueError(f"y holds {int(unknown.sum())} labels outside classes {self.classes_.tolist()}, "
                             f"e.g. {y[unknown][0]!r}")
        for name in (label, weight if sample_weight is not None else None):
            if name is not None and name in table.column_names:
                raise ValueError(f"X has a column '{name}', the name the estimator gives y or sample_weight; "
                                 "rename it, or leave the label and weights in X and name them in the spec")
        table = table.append_column(label, pa.array((y == self.classes_[1]).astype(np.int8)))
        if sample_weight is None:
            return table, label, None
        w = np.asarray(sample_weight, dtype=np.float64)
        if w.ndim == 0:
            w = np.full(table.num_rows, float(w))
        if w.shape != (table.num_rows,):
            raise ValueError(f"sample_weight has shape {w.shape}; expected ({table.num_rows},)")
        if not np.all(np.isfinite(w)) or np.any(w < 0):
            raise ValueError("sample_weight must be finite and >= 0")
        keep = w > 0
        if not partial and keep.any() and np.unique(y[keep]).size < 2:
            raise ValueError("sample_weight leaves rows of one class only; the classifier needs both classes "
                             "among the rows of positive weight")
        table = table.append_column(weight, pa.array(w))
        return (table if keep.all() else table.filter(pa.array(keep))), label, weight

    def _given_spec(self) -> Spec | None:
        if self.spec is None:
            return None
        if isinstance(self.spec, Spec):
            return self.spec
        if isinstance(self.spec, dict):
            return parse_spec(copy.deepcopy(self.spec), "spec=")
        if _is_path(self.spec):
            return load_spec(self.spec)
        raise ValueError(f"spec must be a dict, a trainer.spec.Spec or a path; got {type(self.spec).__name__}")

    def _resolve_spec(self, schema: pa.Schema, label: str | None, weight: str | None) -> dict:
        given = self._given_spec()
        if given is None:
            return infer_spec(schema, label, weight, DEFAULT_BITS if self.bits is None else self.bits)
        raw = copy.deepcopy(given.raw)
        if label is not None:
            raw["label"] = {"column": label}
        if weight is not None:
            raw["weight"] = {"column": weight}
        return self._override_bits(raw)

    def _override_bits(self, raw: dict) -> dict:
        raw = copy.deepcopy(raw)
        if self.bits is not None:
            raw["hashing"]["bits"] = self.bits
        parse_spec(raw, "spec")
        return raw

    # -- predicting ---------------------------------------------------------------------------------

    def decision_function(self, X) -> np.ndarray:
        """Margins z = intercept + sum(value x weight[bucket]) of the rows of X (the hashing contract).

        Parameters
        ----------
        X : DataFrame, pyarrow.Table, array_like, str or Path
            The rows, or a Parquet path.

        Returns
        -------
        numpy.ndarray
            float64 of shape (n_rows,); positive margins predict ``classes_[1]``.
        """
        check_is_fitted(self)
        if _is_path(X):
            return self._margins(Path(X))
        table = self._table(X, reset=False)
        with tempfile.TemporaryDirectory(prefix="hashcurve-estimator-") as tmp:
            path = Path(tmp) / "rows.parquet"
            pq.write_table(table, path)
            return self._margins(path)

    def _margins(self, path: Path) -> np.ndarray:
        reader = Reader(self.model_.spec, path, batch_rows=_SCORE_ROWS, with_labels=False)
        parts = [self.model_.margin(batch) for batch in reader.batches()]
        return np.concatenate(parts)

    @available_if(_probability_available)
    def predict_proba(self, X) -> np.ndarray:
        """Probabilities of (``classes_[0]``, ``classes_[1]``) per row.

        The logistic sigmoid of the margin, or the Platt calibration of a squared-hinge model (the
        ``probability`` column of ``hashcurve score``).

        Parameters
        ----------
        X : DataFrame, pyarrow.Table, array_like, str or Path
            The rows, or a Parquet path.

        Returns
        -------
        numpy.ndarray
            Shape (n_rows, 2).

        Raises
        ------
        UserError
            For a squared-hinge model left uncalibrated.
        """
        z = self.decision_function(X)
        if not self.model_.has_probability:
            raise UserError("predict_proba: this squared-hinge model has no Platt calibration (the holdout "
                            "days selected no rows?); use decision_function")
        p = self.model_.probability_from_margin(z)
        return np.column_stack([1.0 - p, p])

    def predict(self, X) -> np.ndarray:
        """``classes_[1]`` where the margin is positive, else ``classes_[0]``.

        Parameters
        ----------
        X : DataFrame, pyarrow.Table, array_like, str or Path
            The rows, or a Parquet path.

        Returns
        -------
        numpy.ndarray
            One label per row.
        """
        positive = self.decision_function(X) > 0
        return self.classes_[positive.astype(np.intp)]

    # -- shipping -----------------------------------------------------------------------------------

    def save(self, path: str | Path, *, force: bool = False) -> Path:
        """Write the fitted model as an export folder.

        ``weights.parquet`` + ``model.json``, the format ``hashcurve score`` and
        ``reference/score_reference.py`` read (no pickle), with the estimator's parameters, classes and
        input columns under ``model.json``'s ``training.summary.estimator``.

        Parameters
        ----------
        path : str or Path
            The export folder.
        force : bool
            Replace a previous export (a non-empty folder is refused otherwise, like ``hashcurve export``).

        Returns
        -------
        Path
            The folder.

        Raises
        ------
        UserError
            For a bad destination.
        """
        check_is_fitted(self)
        params = {k: v for k, v in self.get_params(deep=False).items() if k != "spec"}
        extra = {"params": params, "classes": self.classes_.tolist(),
                 "feature_names": list(getattr(self, "feature_names_in_", [])) or None,
                 "n_features": self.n_features_in_, "spec_given": self.spec is not None}
        model = self.model_
        summary = {**model.info["summary"], _PARAMS_KEY: extra}
        tagged = Model(model.spec, model.weights, model.intercept, model.loss, {**model.info, "summary": summary})
        with tempfile.TemporaryDirectory(prefix="hashcurve-estimator-") as tmp:
            tagged.save(tmp)
            return api.export(tmp, path, force=force)

    @classmethod
    def load(cls, path: str | Path) -> "HashedLogisticClassifier":
        """An estimator from an export folder written by :meth:`save`.

        Any export loads: then its training options become the parameters and ``classes_`` is [0, 1]. It
        predicts exactly as the saved one; ``partial_fit`` cannot continue it (an export keeps no solver
        state).

        Parameters
        ----------
        path : str or Path
            The export folder.

        Returns
        -------
        HashedLogisticClassifier

        Raises
        ------
        UserError
            Like :func:`trainer.model.load_model`.
        """
        model = load_model(path)
        extra = model.info["summary"].get(_PARAMS_KEY)
        if extra is None:
            opts = model.info["options"]
            params = {k: opts[k] for k in cls._get_param_names() if k in opts}
            extra = {"params": params, "classes": [0, 1], "feature_names": None,
                     "n_features": len(model.spec.features), "spec_given": True}
        est = cls(spec=model.spec.raw if extra["spec_given"] else None, **extra["params"])
        est.spec_ = model.spec.raw
        est.classes_ = np.array(extra["classes"])
        est.n_features_in_ = extra["n_features"]
        if extra["feature_names"] is not None:
            est.feature_names_in_ = np.array(extra["feature_names"], dtype=object)
        est._set_model(model)
        est._state = None
        return est
