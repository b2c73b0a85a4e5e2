"""Stream a labelled log through a model into metric accumulators, overall and by segment."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from trainer.metrics import BinaryMetrics, MarginMetrics
from trainer.reader.stream import Reader

MAX_TRACKED_SEGMENTS = 100_000
OTHER = "(other values)"
NULL = "(null)"


class EvaluationResult(dict):
    """The metrics of one evaluation, in the manner of ``scipy.optimize.OptimizeResult``.

    A dict whose keys are those of the ``evaluate --json`` document (see :func:`evaluate`) and also
    read as attributes (``result.log_loss``).

    Raises
    ------
    AttributeError
        When read as an attribute that is not one of its keys.
    """

    def __getattr__(self, name):
        try:
            return self[name]
        except KeyError:
            raise AttributeError(name) from None


class SegmentSums:
    """Per-value running sums of one column: rows, weight, weighted labels, predictions and log-loss.

    Tracks up to ``MAX_TRACKED_SEGMENTS`` distinct values; later new values pool into one row.

    Attributes
    ----------
    ids : dict of str to int
        Row of ``sums`` for each value seen (``"(null)"`` for nulls, ``"(other values)"`` for the pool).
    sums : numpy.ndarray
        Shape (values, 5): rows, weight, weighted labels, weighted predictions, weighted log-loss.
    """

    def __init__(self):
        self.ids: dict[str, int] = {}
        self.sums = np.zeros((0, 5))

    def update(self, values: pa.Array, labels: np.ndarray, probs: np.ndarray, weights: np.ndarray) -> None:
        """Add a chunk of scored rows.

        Parameters
        ----------
        values : pyarrow.Array
            The segment column's values for the chunk (any type, cast to string; nulls form one segment).
        labels : numpy.ndarray
            0/1 labels.
        probs : numpy.ndarray
            Predicted probabilities (clipped to [1e-15, 1 - 1e-15] for the log-loss).
        weights : numpy.ndarray
            Row weights.
        """
        enc = pc.dictionary_encode(pc.cast(values, pa.string()) if not pa.types.is_dictionary(values.type)
                                   else values.cast(pa.string()))
        codes = enc.indices.fill_null(-1).to_numpy(zero_copy_only=False)
        names = enc.dictionary.to_pylist() + [NULL]
        codes = np.where(codes < 0, len(names) - 1, codes)
        local_to_global = np.empty(len(names), dtype=np.int64)
        for i, name in enumerate(names):
            if name not in self.ids:
                self.ids.setdefault(name if len(self.ids) < MAX_TRACKED_SEGMENTS else OTHER, len(self.ids))
            local_to_global[i] = self.ids.get(name, self.ids.get(OTHER))
        g = local_to_global[codes]
        size = len(self.ids)
        if self.sums.shape[0] < size:
            self.sums = np.vstack([self.sums, np.zeros((size - self.sums.shape[0], 5))])
        p = np.clip(probs, 1e-15, 1 - 1e-15)
        loss = -(labels * np.log(p) + (1 - labels) * np.log1p(-p))
        for j, v in enumerate((np.ones_like(weights), weights, weights * labels, weights * probs, weights * loss)):
            self.sums[:, j] += np.bincount(g, weights=v, minlength=size)

    def table(self, limit: int) -> list[dict]:
        """The largest segments by rows, then the rest pooled as one row.

        Parameters
        ----------
        limit : int
            How many segments to list (ties by rows are ordered by value).

        Returns
        -------
        list of dict
            One row per segment: ``value``, ``rows``, ``observed_rate``, ``mean_prediction``,
            ``calibration_ratio``, ``log_loss``; values that no row had (an empty null segment) are left out.
        """
        names = sorted(self.ids, key=self.ids.get)
        order = np.lexsort((np.array(names, dtype=object), -self.sums[:, 0]))
        order = order[self.sums[order, 0] > 0]
        top, rest = order[:limit], order[limit:]
        rows = [self._row(names[i], self.sums[i]) for i in top]
        if rest.size:
            rows.append(self._row(OTHER, self.sums[rest].sum(axis=0)))
        return rows

    @staticmethod
    def _row(name: str, s: np.ndarray) -> dict:
        n, w, wy, wp, wl = s
        return {"value": name, "rows": int(n), "observed_rate": wy / w if w else float("nan"),
                "mean_prediction": wp / w if w else float("nan"),
                "calibration_ratio": wp / wy if wy else float("nan"),
                "log_loss": wl / w if w else float("nan")}

    def merge(self, other: "SegmentSums") -> "SegmentSums":
        """Add another accumulator's sums into this one.

        Parameters
        ----------
        other : SegmentSums
            Values new to this one join in ``other``'s order, and pool into one row past
            ``MAX_TRACKED_SEGMENTS``.

        Returns
        -------
        SegmentSums
            self.
        """
        names = sorted(other.ids, key=other.ids.get)
        for name in names:
            if name not in self.ids:
                self.ids.setdefault(name if len(self.ids) < MAX_TRACKED_SEGMENTS else OTHER, len(self.ids))
        size = len(self.ids)
        if self.sums.shape[0] < size:
            self.sums = np.vstack([self.sums, np.zeros((size - self.sums.shape[0], 5))])
        target = np.array([self.ids.get(n, self.ids.get(OTHER)) for n in names], dtype=np.int64)
        np.add.at(self.sums, target, other.sums[: len(names)])
        return self


@dataclass
class EvalState:
    """The mergeable state of an evaluation: the metric accumulators of one slice of rows.

    Attributes
    ----------
    probs : BinaryMetrics or None
        Probability metrics (models with a probability: logistic, or calibrated squared-hinge).
    margins : MarginMetrics or None
        Margin metrics (squared-hinge models).
    segments : SegmentSums or None
        Per-value sums of the ``by`` column.
    hinge : numpy.ndarray
        Weighted sum of squared hinge losses and the total weight.
    """

    probs: BinaryMetrics | None
    margins: MarginMetrics | None
    segments: SegmentSums | None
    hinge: np.ndarray

    def merge(self, other: "EvalState") -> "EvalState":
        """The state of both slices together (exact: counts, sums and rank histograms add up).

        Parameters
        ----------
        other : EvalState
            The other slice's state, made for the same model and ``by``.

        Returns
        -------
        EvalState
            A new state (``segments`` is this one's, merged in place).
        """
        seg = self.segments.merge(other.segments) if self.segments is not None else None
        return EvalState(self.probs.merge(other.probs) if self.probs is not None else None,
                         self.margins.merge(other.margins) if self.margins is not None else None,
                         seg, self.hinge + other.hinge)


def accumulate(model, batches, *, by: str | None = None) -> EvalState:
    """Score batches with a model into a new evaluation state.

    Parameters
    ----------
    model : trainer.model.Model
        The model to score with.
    batches : iterable of trainer.reader.stream.Batch
        The rows to score; with ``by``, each batch must carry that column.
    by : str, optional
        The column to split the metrics by.

    Returns
    -------
    EvalState
        The accumulators over every batch.
    """
    state = _new_state(model, by)
    for batch in batches:
        _add(state, model, batch, by)
    return state


def _new_state(model, by: str | None) -> EvalState:
    """Empty accumulators for a model's scores (probabilities, margins, segments as they apply)."""
    return EvalState(BinaryMetrics() if model.has_probability else None,
                     MarginMetrics() if model.loss == "squared-hinge" else None,
                     SegmentSums() if by else None, np.zeros(2))


def _add(state: EvalState, model, batch, by: str | None) -> None:
    """Score one batch with a model into its accumulators."""
    margins = model.margin(batch)
    if state.margins is not None:
        state.margins.update(batch.labels, margins, batch.weights)
        slack = np.maximum(0.0, 1.0 - (2.0 * batch.labels - 1.0) * margins)
        state.hinge += (float(batch.weights @ slack**2), float(batch.weights.sum()))
    if state.probs is not None:
        probs = model.probability_from_margin(margins)
        state.probs.update(batch.labels, probs, batch.weights,
                           margins=margins if model.loss == "logistic" else None)
        if state.segments is not None:
            column = batch.columns.column(by).combine_chunks()
            state.segments.update(column, batch.labels, probs, batch.weights)


def summarize(state: EvalState, segments: int = 20) -> EvaluationResult:
    """The metrics summary of an evaluation state.

    Parameters
    ----------
    state : EvalState
        The accumulators (from :func:`accumulate`, possibly merged).
    segments : int, default 20
        How many segments to list when the state has segment sums.

    Returns
    -------
    EvaluationResult
        See :func:`evaluate` for its keys.
    """
    out = EvaluationResult(state.probs.summary() if state.probs is not None else {})
    if state.margins is not None:
        hinge = state.hinge
        out["margin"] = state.margins.summary()
        out["squared_hinge_loss"] = hinge[0] / hinge[1] if hinge[1] else float("nan")
        out.setdefault("rows", out["margin"]["rows"])
        out.setdefault("positives", out["margin"]["positives"])
    if state.segments is not None:
        out["segments"] = state.segments.table(segments)
    return out


def evaluate(model, reader: Reader, *, by: str | None = None, segments: int = 20) -> EvaluationResult:
    """Score every row of a reader with a model and return the metrics summary.

    For logistic models (and squared-hinge models with a probability calibration) the summary is
    ``BinaryMetrics.summary()``; squared-hinge models add ``margin`` (``MarginMetrics.summary()``:
    AUC and error rate on margins) and ``squared_hinge_loss`` (weighted mean of
    max(0, 1 - s m)^2, s = 2y - 1), and report only those when uncalibrated.

    Parameters
    ----------
    model : trainer.model.Model
        The model to score with.
    reader : trainer.reader.stream.Reader
        The labelled rows; with ``by``, the reader must keep that column.
    by : str, optional
        A column to split the metrics by.
    segments : int, default 20
        With ``by``, how many of the largest values to list (rows, observed rate, mean prediction,
        calibration ratio, log-loss); the rest are pooled into one row.

    Returns
    -------
    EvaluationResult
        The metrics summary.
    """
    return summarize(accumulate(model, reader.batches(), by=by), segments)


def evaluate_many(models, reader: Reader) -> list[EvaluationResult]:
    """Score every row of a reader with several models, reading and hashing the rows once.

    Each model's summary equals :func:`evaluate` of that model on the same reader, bit for bit: its
    accumulators see the same batches in the same order.

    Parameters
    ----------
    models : sequence of trainer.model.Model
        The models to score with.
    reader : trainer.reader.stream.Reader
        The labelled rows.

    Returns
    -------
    list of EvaluationResult
        One summary per model, in order.
    """
    states = [_new_state(model, None) for model in models]
    for batch in reader.batches():
        for model, state in zip(models, states):
            _add(state, model, batch, None)
    return [summarize(state) for state in states]
