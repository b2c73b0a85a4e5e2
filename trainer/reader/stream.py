"""The row stream: ``Reader`` yields ``Batch``es of hashed rows, in file order or shuffled in bounded
windows, with the ``Position`` from which reading resumes exactly.

Data flows one way: files are discovered and checked (footers only, ``trainer.reader.files``), days
outside the date filter are pruned by partition path and by row-group statistics, each chunk of rows
is filtered (dates, labels, negative sampling), hashed into the spec's feature space
(``trainer.reader.featurize``), optionally shuffled in bounded windows, and cut into ``Batch``
objects of a fixed row count. Memory is bounded by the chunk and window sizes, never by the log.

Every batch carries the ``Position`` from which reading resumes exactly: rows are hashed one by one,
so the stream of rows, and hence every batch, is the same whatever the chunking.
"""

from __future__ import annotations

import copy
import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from trainer.errors import UserError
from trainer.kernels import batch_support
from trainer.reader._kernels import keep_uniform, take_rows
from trainer.reader.buffers import index_array, valid_mask, values_of
from trainer.reader.featurize import Featurizer, accepted_labels, parse_labels, parse_weights
from trainer.reader.files import DataFile, column_days, discover, row_group_outside
from trainer.spec import Spec

CHUNK_ROWS = 32768


@dataclass(frozen=True)
class Position:
    """Where reading resumes.

    Attributes
    ----------
    file : int
        Re-read from file number ``file`` ...
    row : int
        ... at row ``row``,
    skip : int
        then drop the first ``skip`` rows of the rebuilt shuffle window (0 without shuffling).
    window : int
        The shuffle window's number (it seeds the window's permutation).
    """

    file: int = 0
    row: int = 0
    skip: int = 0
    window: int = 0


@dataclass
class Batch:
    """One minibatch in CSR form.

    Tokens that collide inside a row stay separate entries; their contributions add up.

    Attributes
    ----------
    indptr : numpy.ndarray
        int64, n_rows + 1 row offsets.
    indices : numpy.ndarray
        int32 bucket ids.
    data : numpy.ndarray
        float64 feature values.
    labels : numpy.ndarray
        float64 in {0, 1}; NaN when read without labels.
    weights : numpy.ndarray
        float64 row weights > 0.
    n_rows : int
        Rows in the batch.
    position : Position or None
        Where reading resumes after this batch.
    columns : pyarrow.Table or None
        The kept columns of these rows, when asked for.
    """

    indptr: np.ndarray
    indices: np.ndarray
    data: np.ndarray
    labels: np.ndarray
    weights: np.ndarray
    n_rows: int
    position: Position | None = None
    columns: pa.Table | None = None
    _support: tuple | None = field(default=None, repr=False, compare=False)

    def support(self, bits: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The batch's distinct buckets and each entry's slot among them
        (:func:`trainer.kernels.batch_support`), made on the first call and kept for the values of a sweep,
        which step on this batch one after another.

        Parameters
        ----------
        bits : numpy.ndarray
            A zero uint64 scratch bitmap of one bit per bucket (zero again on return).

        Returns
        -------
        tuple of numpy.ndarray
            ``(cols, slot)``: int32 distinct buckets, ascending, and int32 position in ``cols`` of each
            entry; shared by every caller, not to be changed.
        """
        if self._support is None:
            slot = np.empty(self.indices.shape[0], dtype=np.int32)
            self._support = (batch_support(self.indices, bits, slot), slot)
        return self._support


@dataclass(frozen=True)
class Part:
    """A slice of the input read on its own (one task of a cluster run).

    Attributes
    ----------
    file : int
        Number of the file in the reader's files.
    first_group, end_group : int
        Row groups ``first_group`` .. ``end_group - 1`` of that file.
    rows : int
        Rows in those row groups (from the footer).
    """

    file: int
    first_group: int
    end_group: int
    rows: int


@dataclass
class ReadCounts:
    """What the reader dropped on its way, for the user.

    Attributes
    ----------
    bad_labels : int
        Rows dropped for a null or unaccepted label (``skip_bad_labels``).
    sampled_out : int
        Negatives dropped by negative sampling.
    rows : int
        Rows read.
    """

    bad_labels: int = 0
    sampled_out: int = 0
    rows: int = 0


@dataclass
class _Rows:
    """Hashed rows on their way to a batch: CSR, labels, weights, origin (file, raw row), the position
    from which reading resumes after each row (n x 4: file, row, skip, window) and kept columns."""

    indptr: np.ndarray
    indices: np.ndarray
    data: np.ndarray
    labels: np.ndarray
    weights: np.ndarray
    file: np.ndarray
    raw: np.ndarray
    after: np.ndarray
    columns: pa.Table | None = None

    @property
    def n(self) -> int:
        return self.labels.size

    def take(self, rows: np.ndarray) -> "_Rows":
        ptr, idx, val = take_rows(self.indptr, self.indices, self.data, rows)
        cols = self.columns.take(index_array(rows)) if self.columns is not None else None
        return _Rows(ptr, idx, val, self.labels[rows], self.weights[rows], self.file[rows], self.raw[rows],
                     self.after[rows], cols)

    def slice(self, a: int, b: int) -> "_Rows":
        lo, hi = self.indptr[a], self.indptr[b]
        cols = self.columns.slice(a, b - a) if self.columns is not None else None
        return _Rows(self.indptr[a:b + 1] - lo, self.indices[lo:hi], self.data[lo:hi], self.labels[a:b],
                     self.weights[a:b], self.file[a:b], self.raw[a:b], self.after[a:b], cols)

    @staticmethod
    def concat(parts: list["_Rows"]) -> "_Rows":
        if len(parts) == 1:
            return parts[0]
        offsets = np.cumsum([0] + [p.indptr[-1] for p in parts[:-1]])
        indptr = np.concatenate([parts[0].indptr[:1]] + [p.indptr[1:] + o for p, o in zip(parts, offsets)])
        cols = pa.concat_tables([p.columns for p in parts]) if parts[0].columns is not None else None
        return _Rows(indptr, *(np.concatenate([getattr(p, k) for p in parts])
                               for k in ("indices", "data", "labels", "weights", "file", "raw", "after")), cols)


@dataclass
class Reader:
    """Streams a Parquet log as hashed minibatches.

    Observers of the hashed rows attach with :meth:`watch`; what was dropped is counted in
    ``counts`` (:class:`ReadCounts`).

    Parameters
    ----------
    spec : Spec
        The feature spec.
    path : str or Path
        A file, folder or hive-partitioned folder.
    start, end : datetime.date or None
        Inclusive day filter on the spec's time column (partition key or column).
    batch_rows : int
        Rows per batch (the last one of a pass may be shorter).
    shuffle_rows : int
        0 for file order, else rows are shuffled within consecutive windows of that many rows,
        seeded by (``seed``, pass, window).
    seed : int
        Seed of shuffling and negative sampling.
    negative_keep_rate : float
        Keep each negative row with this probability (seeded per row).
    with_labels : bool
        False reads no label (scoring).
    skip_bad_labels : bool
        Drop rows with null or unaccepted labels and count them instead of raising.
    keep : tuple of str
        Columns to carry along in ``Batch.columns``.
    keep_option : str
        The option that named ``keep`` (for error messages).
    missing_as_null : bool
        A feature column absent from a file reads as all null.
    dictionary : bool
        Read string columns dictionary-encoded (each distinct value hashed once per chunk); both ways
        give the same batches.
    chunk_rows : int
        Rows read from Parquet at a time (memory, not results).
    counts : ReadCounts
        What was dropped so far.
    part : Part, optional
        Read only this part of the input (set by :meth:`for_part`).

    Raises
    ------
    UserError
        For a start after the end, or from :func:`trainer.reader.files.discover`.

    References
    ----------
    The per-window permutations come from numpy's PCG64: "PCG: A Family of Simple Fast
    Space-Efficient Statistically Good Algorithms for Random Number Generation", Harvey Mudd
    College technical report HMC-CS-2014-0905, 2014.
    """

    spec: Spec
    path: str | Path
    start: dt.date | None = None
    end: dt.date | None = None
    batch_rows: int = 4096
    shuffle_rows: int = 0
    seed: int = 0
    negative_keep_rate: float = 1.0
    with_labels: bool = True
    skip_bad_labels: bool = False
    keep: tuple[str, ...] = ()
    keep_option: str = "--keep"
    missing_as_null: bool = False
    dictionary: bool = True
    chunk_rows: int = CHUNK_ROWS
    counts: ReadCounts = field(default_factory=ReadCounts)
    part: Part | None = None

    def __post_init__(self):
        if self.start and self.end and self.start > self.end:
            raise UserError(f"date filter: start {self.start} is after end {self.end}")
        need = [c for c in self.spec.data_columns() if self.with_labels or c not in
                (self.spec.label_column, self.spec.weight_column)]
        if not (self.start or self.end):
            need = [c for c in need if c != self.spec.time_column]
        self._need = list(dict.fromkeys(need + list(self.keep)))
        used = {self.spec.label_column, self.spec.weight_column, *(f.column for f in self.spec.features), *self.keep}
        # a time column that is a partition key and nothing else prunes files only: no column of the rows
        self._prune_only = self.spec.time_column if self.spec.time_column not in used else None
        missing_ok = tuple(f.column for f in self.spec.features) if self.missing_as_null else ()
        self.files = discover(self.path, self.spec, self.start, self.end, need=self._need, missing_ok=missing_ok,
                              named_by={c: self.keep_option for c in self.keep if c not in need})
        self.featurizer = Featurizer(self.spec)
        self._check_types()

    def _check_types(self) -> None:
        """Refuse a feature column whose type its kind does not take before any row is read: the
        featurizer's own checks run on an empty table of the first file's schema (discover has made
        every file's types agree). Files whose features come partly from partition keys or absent
        columns are checked when read. (Its columns are ``pa.nulls(0)``: ``Schema.empty_table`` would
        import pandas, see :mod:`trainer.reader.buffers`.)"""
        f = self.files[0]
        cols = [feat.column for feat in self.spec.features]
        if all(f.schema.get_field_index(c) >= 0 for c in cols):
            fields = [f.schema.field(c) for c in cols]
            empty = pa.Table.from_arrays([pa.nulls(0, x.type) for x in fields], schema=pa.schema(fields))
            self.featurizer.transform(empty, str(f.path))

    def watch(self, observer) -> None:
        """Show an observer every chunk of rows hashed from now on (:meth:`Featurizer.watch`).

        Parameters
        ----------
        observer : object
            Has ``observe(tables, n_rows)``.
        """
        self.featurizer.watch(observer)

    def parts(self, max_rows: int) -> list[Part]:
        """The input cut into parts in file order; reads footers only.

        Parameters
        ----------
        max_rows : int
            Most rows in a part; a part is whole row groups of one file (a larger row group is a part of
            its own).

        Returns
        -------
        list of Part
        """
        out = []
        for fi, f in enumerate(self.files):
            meta = pq.ParquetFile(f.path).metadata
            first, rows = 0, 0
            for g in range(meta.num_row_groups):
                n = meta.row_group(g).num_rows
                if rows and rows + n > max_rows:
                    out.append(Part(fi, first, g, rows))
                    first, rows = g, 0
                rows += n
            if meta.num_row_groups:
                out.append(Part(fi, first, meta.num_row_groups, rows))
        return out

    def for_part(self, part: Part) -> "Reader":
        """A reader of the same input and options that reads only one part.

        Parameters
        ----------
        part : Part
            The part; rows, sampling and shuffling come out exactly as this reader reads them there.

        Returns
        -------
        Reader
            With its own counts and no observers; an empty part yields no batch instead of raising.
        """
        r = copy.copy(self)
        r.part, r.counts, r.featurizer = part, ReadCounts(), Featurizer(self.spec)
        return r

    @property
    def total_rows(self) -> int:
        """Rows in the selected files before row filters (an upper bound for progress bars)."""
        return sum(f.num_rows for f in self.files)

    def batches(self, pass_index: int = 0, start: Position | None = None, sizes=None) -> Iterator[Batch]:
        """Yield the batches of one pass.

        Parameters
        ----------
        pass_index : int
            The pass (it seeds shuffling and negative sampling).
        start : Position, optional
            Where to resume (a batch's ``position``); default the beginning.
        sizes : callable, optional
            ``sizes(rows)``, the next batch's row count (at least 1) after ``rows`` rows of this call's
            batches; default ``batch_rows`` every time.

        Yields
        ------
        Batch
            The next ``batch_rows`` (or ``sizes()``) rows, with the position after them.

        Raises
        ------
        UserError
            For bad data met on the way, and when the filters leave no rows (at the end of a pass
            that started at the beginning).
        """
        start = start or Position()
        pending: list[_Rows] = []
        have = 0
        emitted = 0
        size = sizes or (lambda rows: self.batch_rows)
        need = size(0)
        for rows in self._stream(pass_index, start):
            pending.append(rows)
            have += rows.n
            while have >= need:
                merged = _Rows.concat(pending)
                out, rest = merged.slice(0, need), merged.slice(need, merged.n)
                pending, have = ([rest] if rest.n else []), rest.n
                emitted += out.n
                yield self._batch(out)
                need = size(emitted)
        if have:
            emitted += have
            yield self._batch(_Rows.concat(pending))
        if emitted == 0 and start == Position() and self.part is None:
            raise UserError(f"{self.path}: no rows left after the filters (dates {self.start or '...'} to "
                            f"{self.end or '...'})")

    @staticmethod
    def _batch(rows: _Rows) -> Batch:
        position = Position(*(int(v) for v in rows.after[-1]))
        return Batch(rows.indptr, rows.indices, rows.data, rows.labels, rows.weights, rows.n, position, rows.columns)

    def _stream(self, pass_index: int, start: Position) -> Iterator[_Rows]:
        """Rows in file order, or shuffled within windows of ``shuffle_rows`` rows. A window is the
        next ``shuffle_rows`` rows from its origin (file, row), permuted by (seed, pass, window)."""
        chunks = self._chunks(pass_index, start.file, start.row)
        if self.shuffle_rows <= 0:
            yield from chunks
            return
        size, window, skip = self.shuffle_rows, start.window, start.skip
        buf: list[_Rows] = []
        have = 0
        while True:
            for nxt in chunks:
                buf.append(nxt)
                have += nxt.n
                if have >= size:
                    break
            if have == 0:
                return
            merged = _Rows.concat(buf)
            cut = min(size, merged.n)
            win, rest = merged.slice(0, cut), merged.slice(cut, merged.n)
            buf, have = ([rest] if rest.n else []), rest.n
            rng = np.random.Generator(np.random.PCG64([self.seed, pass_index, window]))
            shuffled = win.take(rng.permutation(win.n))
            shuffled.after = np.empty((win.n, 4), dtype=np.int64)
            shuffled.after[:, 0] = win.file[0]
            shuffled.after[:, 1] = win.raw[0]
            shuffled.after[:, 2] = np.arange(1, win.n + 1)
            shuffled.after[:, 3] = window
            shuffled.after[-1] = win.after[-1, :2].tolist() + [0, window + 1]
            if skip < shuffled.n:
                yield shuffled.slice(skip, shuffled.n)
            skip = 0
            window += 1

    def _chunks(self, pass_index: int, first_file: int, first_row: int) -> Iterator[_Rows]:
        """Filtered, hashed chunks of rows in file order from (first_file, first_row)."""
        for fi in range(first_file, len(self.files)) if self.part is None else (self.part.file,):
            f = self.files[fi]
            skip_to = first_row if fi == first_file else 0
            try:
                pf = pq.ParquetFile(f.path, read_dictionary=self._dict_columns(f) if self.dictionary else None)
                columns_read = [c for c in self._need if c not in f.partitions and f.schema.get_field_index(c) >= 0]
                base = 0
                for g in range(pf.metadata.num_row_groups):
                    rg_rows = pf.metadata.row_group(g).num_rows
                    outside = self.part is not None and not self.part.first_group <= g < self.part.end_group
                    if outside or base + rg_rows <= skip_to or row_group_outside(pf.metadata, g, self.spec.time_column,
                                                                      self.start, self.end):
                        base += rg_rows
                        continue
                    pos = base
                    for rb in pf.iter_batches(batch_size=self.chunk_rows, row_groups=[g], columns=columns_read,
                                              use_threads=False):
                        lo = max(skip_to - pos, 0)
                        if lo >= rb.num_rows:
                            pos += rb.num_rows
                            continue
                        rows = self._prepare(rb.slice(lo), f, fi, pos + lo, pass_index)
                        pos += rb.num_rows
                        if rows is not None:
                            yield rows
                    base += rg_rows
            except (pa.ArrowException, OSError) as exc:
                raise UserError(f"{f.path}: cannot read Parquet data ({str(exc).splitlines()[0]})") from None

    def _dict_columns(self, f: DataFile) -> list[str]:
        cols = []
        for feat in self.spec.features:
            i = f.schema.get_field_index(feat.column)
            if i < 0:
                continue
            t = f.schema.field(i).type
            if feat.kind == "categorical" and (pa.types.is_string(t) or pa.types.is_large_string(t)):
                cols.append(feat.column)
            elif feat.kind == "multi" and (pa.types.is_list(t) or pa.types.is_large_list(t)) and (
                    pa.types.is_string(t.value_type) or pa.types.is_large_string(t.value_type)):
                cols.append(f"{feat.column}.list.element")
        return cols

    def _prepare(self, rb: pa.RecordBatch, f: DataFile, fi: int, first_raw: int, pass_index: int) -> _Rows | None:
        spec = self.spec
        n = rb.num_rows
        table = pa.Table.from_batches([rb])
        for key, value in f.partitions.items():
            if key in self._need and key != self._prune_only and table.schema.get_field_index(key) < 0:
                table = table.append_column(key, pa.DictionaryArray.from_arrays(
                    pa.array(np.zeros(n, dtype=np.int32)), pa.array([value])))
        if self.missing_as_null:
            for feat in spec.features:
                if table.schema.get_field_index(feat.column) < 0:
                    kind_type = {"categorical": pa.string(), "multi": pa.list_(pa.string()),
                                 "numeric": pa.float64()}[feat.kind]
                    table = table.append_column(feat.column, pa.nulls(n, kind_type))
        keep = np.ones(n, dtype=bool)
        where = f"{f.path}: column"
        if spec.time_column and (self.start or self.end) and spec.time_column not in f.partitions:
            days = column_days(table.column(spec.time_column).combine_chunks(), f"{where} '{spec.time_column}'")
            keep &= valid_mask(days)
            epoch = dt.date(1970, 1, 1)  # date32 counts days from it
            if self.start:
                keep &= values_of(days) >= (self.start - epoch).days
            if self.end:
                keep &= values_of(days) <= (self.end - epoch).days
        if self.with_labels:
            y, ok = parse_labels(table.column(spec.label_column).combine_chunks(), spec, f"{where} '{spec.label_column}'")
            bad = keep & ~ok
            if bad.any():
                if not self.skip_bad_labels:
                    i = int(np.flatnonzero(bad)[0])
                    raise UserError(f"{where} '{spec.label_column}' has {int(bad.sum())} null or unaccepted "
                                    f"label values in rows {first_raw}..{first_raw + n - 1} (e.g. row {first_raw + i}: "
                                    f"{table.column(spec.label_column)[i]}); accepted: {accepted_labels(spec)}; "
                                    "--skip-bad-labels drops such rows")
                self.counts.bad_labels += int(bad.sum())
                keep &= ok
            w = (parse_weights(table.column(spec.weight_column).combine_chunks(), f"{where} '{spec.weight_column}'")
                 if spec.weight_column else np.ones(n))
            if self.negative_keep_rate < 1.0:
                u = keep_uniform(fi, np.arange(first_raw, first_raw + n, dtype=np.int64), self.seed, pass_index)
                sampled = keep & (y == 0) & (u >= self.negative_keep_rate)
                self.counts.sampled_out += int(sampled.sum())
                keep &= ~sampled
        else:
            y = np.full(n, np.nan)
            w = np.ones(n)
        raw = np.arange(first_raw, first_raw + n, dtype=np.int64)
        if not keep.all():
            idx = np.flatnonzero(keep)
            if idx.size == 0:
                return None
            table = table.take(index_array(idx))
            y, w, raw = y[idx], w[idx], raw[idx]
        indptr, indices, data = self.featurizer.transform(table, str(f.path))
        self.counts.rows += raw.size
        cols = table.select(list(self.keep)) if self.keep else None
        after = np.zeros((raw.size, 4), dtype=np.int64)
        after[:, 0] = fi
        after[:, 1] = raw + 1
        return _Rows(indptr, indices, data, y, w, np.full(raw.size, fi, dtype=np.int64), raw, after, cols)
