"""Streaming Parquet -> Parquet scoring with a trained or exported model.

Rows are read in file order (no shuffle) by :class:`trainer.reader.Reader`, hashed batch by batch,
scored by :class:`trainer.model.Model` and appended to a ``pyarrow.parquet.ParquetWriter``; memory is
bounded by one batch. The output is written to a temporary file in the destination folder and renamed
into place only when complete.
"""

from __future__ import annotations

from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from trainer.atomic import atomic_path
from trainer.errors import UserError
from trainer.model import Model, load_model
from trainer.reader.files import parse_day
from trainer.reader.stream import Reader

SCORE = "score"
PROBABILITY = "probability"


def _plain(arr: pa.ChunkedArray) -> pa.ChunkedArray:
    """Dictionary columns decoded, large strings and lists narrowed: one type per column across files."""
    t = arr.type
    if pa.types.is_dictionary(t):
        arr = arr.cast(t.value_type)
        t = arr.type
    if pa.types.is_large_string(t):
        arr = arr.cast(pa.string())
    elif pa.types.is_large_list(t):
        arr = arr.cast(pa.list_(t.value_type))
    return arr


def check_paths(data: Path, out: Path, folder: bool = False) -> None:
    """Refuse an output path that would overwrite or sit inside the input.

    Parameters
    ----------
    data : Path
        The input log.
    out : Path
        The output path.
    folder : bool
        A dataset folder is written (otherwise an existing folder at ``out`` is refused).

    Raises
    ------
    UserError
        When ``out`` is the input, lies inside the input folder, or its folder does not exist; unless
        ``folder``, when it is an existing folder.
    """
    if out.exists() and out.is_dir() and not folder:
        raise UserError(f"--out {out}: is a folder; give the path of the Parquet file to write")
    d, o = data.resolve(), out.resolve()
    if o == d:
        raise UserError(f"--out {out}: is the input file; scoring never overwrites its input")
    if d.is_dir() and d in o.parents:
        raise UserError(f"--out {out}: lies inside the input folder {data}; write the scores elsewhere")
    if not o.parent.is_dir():
        raise UserError(f"--out {out}: folder {out.parent} does not exist")


def score_to_parquet(model_path: str | Path | Model, data: str | Path, out: str | Path, keep: tuple[str, ...] = (),
                     missing_as_null: bool = False, start=None, end=None, batch_rows: int = 65536) -> dict:
    """Score a Parquet log into one Parquet file.

    The output holds the kept columns, then ``score`` (float64: the probability 1/(1+exp(-z)) for a
    logistic model, the margin z for a squared-hinge model) and, for a squared-hinge model with Platt
    calibration, ``probability`` = 1/(1+exp(-(a z + b))) (sources in :class:`Model`). Rows keep their
    file order. The file appears only when complete (temporary file beside it, fsync, os.replace); on
    any error the temporary file is removed and an existing ``out`` is left untouched.

    Parameters
    ----------
    model_path : str, Path or Model
        A training model folder, an export folder, or a :class:`Model`.
    data : str or Path
        The log: file, folder or hive-partitioned folder.
    out : str or Path
        The Parquet file written.
    keep : tuple of str
        Input columns (or hive partition keys) copied to the output beside the scores, in the given
        order.
    missing_as_null : bool
        Feature columns absent from a file count as all null instead of an error.
    start, end : datetime.date or str, optional
        Inclusive date filter (``YYYY-MM-DD``) on the spec's time column.
    batch_rows : int, default 65536
        Rows per batch, 1..16777216 (bounds memory).

    Returns
    -------
    dict
        ``{"rows": int, "out": str}``.

    Raises
    ------
    UserError
        For a bad model, a missing feature or kept column (naming it), a bad option (naming it), an
        output path that is the input or inside the input folder, or unreadable data.
    """
    model = model_path if isinstance(model_path, Model) else load_model(model_path)
    if isinstance(batch_rows, bool) or not isinstance(batch_rows, int) or not 1 <= batch_rows <= 1 << 24:
        raise UserError(f"--batch-rows must be an integer from 1 to {1 << 24}, got {batch_rows!r}")
    keep = check_keep(keep)
    data, out = Path(data), Path(out)
    check_paths(data, out)
    reader = Reader(model.spec, data, start=parse_day(start, "--start"), end=parse_day(end, "--end"), batch_rows=batch_rows,
                    with_labels=False, keep=keep, missing_as_null=missing_as_null)
    try:
        with atomic_path(out) as tmp:
            rows = write_scores(model, reader, keep, tmp, data)
    except OSError as exc:
        raise UserError(f"--out {out}: cannot write the scores ({exc.strerror or exc})") from None
    return {"rows": rows, "out": str(out)}


def check_keep(keep) -> tuple[str, ...]:
    """Check the names of the kept columns.

    Parameters
    ----------
    keep : iterable of str
        The names.

    Returns
    -------
    tuple of str
        ``keep`` as a tuple.

    Raises
    ------
    UserError
        Naming the bad name: empty or not a string, clashing with an output column, or given twice.
    """
    keep = tuple(keep)
    reserved = {SCORE, PROBABILITY}
    for c in keep:
        if not isinstance(c, str) or not c:
            raise UserError(f"--keep: column names must be non-empty strings, got {c!r}")
        if c in reserved:
            raise UserError(f"--keep: column '{c}' would clash with an output column ({', '.join(sorted(reserved))})")
    if len(set(keep)) != len(keep):
        raise UserError(f"--keep: names a column twice ({', '.join(keep)})")
    return keep


def write_scores(model: Model, reader: Reader, keep: tuple[str, ...], path: Path, data: Path) -> int:
    """Score every batch of a reader into a Parquet file.

    Parameters
    ----------
    model : Model
        The model.
    reader : Reader
        The rows, read without labels, keeping ``keep``.
    keep : tuple of str
        Kept columns, written before ``score`` (and ``probability`` for a calibrated squared-hinge
        model; see :func:`score_to_parquet`).
    path : Path
        The file written; a reader that yields no rows leaves it untouched.
    data : Path
        The input, named in error messages.

    Returns
    -------
    int
        The rows written.

    Raises
    ------
    UserError
        When a kept column changes type between files, or for bad data met by the reader.
    """
    with_probability = model.loss == "squared-hinge" and model.has_probability
    rows = 0
    writer = None
    try:
        for batch in reader.batches():
            z = model.margin(batch)
            cols = {c: _plain(batch.columns.column(c)) for c in keep}
            cols[SCORE] = pa.array(model.probability_from_margin(z) if model.loss == "logistic" else z,
                                   pa.float64())
            if with_probability:
                cols[PROBABILITY] = pa.array(model.probability_from_margin(z), pa.float64())
            table = pa.table(cols)
            if writer is None:
                schema = table.schema.with_metadata({"hashcurve.loss": model.loss,
                                                     "hashcurve.score": "probability"
                                                     if model.loss == "logistic" else "margin"})
                writer = pq.ParquetWriter(path, schema)
            try:
                table = table.cast(writer.schema)
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as exc:
                raise UserError(f"{data}: a kept column changes type between files "
                                f"({str(exc).splitlines()[0]}); --keep columns must share one type") from None
            writer.write_table(table)
            rows += batch.n_rows
    finally:
        if writer is not None:
            writer.close()
    return rows
