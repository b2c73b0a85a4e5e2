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
    """The metrics of one evaluation, in the manner of ``scipy.optimize.OptimizeResult``: a dict (its
    keys are those of the ``evaluate --json`` document, see :func:`evaluate`) whose keys also read as
    attributes (``result.log_loss``)."""

    def __getattr__(self, name):
        try:
            return self[name]
        except KeyError:
            raise AttributeError(name) from None


class SegmentSums:
    """Per-value running sums of one column: rows, weight, weighted labels, predictions and log-loss.

    Tracks up to ``MAX_TRACKED_SEGMENTS`` distinct values; later new values pool into one row.
    """

    def __init__(self):
        self.ids: dict[str, int] = {}
        self.sums = np.zeros((0, 5))

    def update(self, values: pa.Array, labels: np.ndarray, probs: np.ndarray, weights: np.ndarray) -> None:
        """Add a chunk: ``values`` of the segment column, 0/1 ``labels``, ``probs`` and row ``weights``."""
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
        """The ``limit`` largest segments by rows (ties by value), then the rest pooled as one row;
        values that no row had (an empty null segment) are left out."""
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
        """Add ``other``'s sums into this one (values new to this one join in ``other``'s order, and
        pool into one row past ``MAX_TRACKED_SEGMENTS``); returns self."""
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
    """The mergeable state of an evaluation: the metric accumulators of one slice of rows."""

    probs: BinaryMetrics | None
    margins: MarginMetrics | None
    segments: SegmentSums | None
    hinge: np.ndarray

    def merge(self, other: "EvalState") -> "EvalState":
        """The state of both slices together (exact: counts, sums and rank histograms add up)."""
        seg = self.segments.merge(other.segments) if self.segments is not None else None
        return EvalState(self.probs.merge(other.probs) if self.probs is not None else None,
                         self.margins.merge(other.margins) if self.margins is not None else None,
                         seg, self.hinge + other.hinge)


def accumulate(model, batches, *, by: str | None = None) -> EvalState:
    """Score every batch of the iterable ``batches`` with ``model`` into a new EvalState (with
    ``by``, the batches must carry that column)."""
    state = EvalState(BinaryMetrics() if model.has_probability else None,
                      MarginMetrics() if model.loss == "squared-hinge" else None,
                      SegmentSums() if by else None, np.zeros(2))
    for batch in batches:
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
                state.segments.update(batch.columns.column(by).combine_chunks(), batch.labels, probs, batch.weights)
    return state


def summarize(state: EvalState, segments: int = 20) -> EvaluationResult:
    """The metrics summary of an EvalState (see :func:`evaluate` for its keys)."""
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
    """Score every row of ``reader`` with ``model`` and return the metrics summary (an
    :class:`EvaluationResult`).

    For logistic models (and squared-hinge models with a probability calibration) the summary is
    ``BinaryMetrics.summary()``; squared-hinge models add ``margin`` (``MarginMetrics.summary()``:
    AUC and error rate on margins) and ``squared_hinge_loss`` (weighted mean of
    max(0, 1 - s m)^2, s = 2y - 1), and report only those when uncalibrated. With ``by``, the reader
    must keep that column, and ``segments`` lists the largest ``segments`` values (rows, observed
    rate, mean prediction, calibration ratio, log-loss), the rest pooled.
    """
    return summarize(accumulate(model, reader.batches(), by=by), segments)
