"""Finding the input: files, folders and hive partitions, their days, and pruning by date.

A day filter prunes in three places, cheapest first: by a hive partition key named as the spec's time
column (the file is never opened), by a row group's min/max statistics of the time column (the row
group is never read), and row by row (:func:`column_days`, applied by the stream).
"""

from __future__ import annotations

import datetime as dt
import urllib.parse
from dataclasses import dataclass
from pathlib import Path

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from trainer.errors import UserError
from trainer.spec import Spec

PARQUET_SUFFIXES = (".parquet", ".parq")


@dataclass
class DataFile:
    """One Parquet file of the input.

    Attributes
    ----------
    path : Path
        The file.
    partitions : dict of str to str
        Its hive partition values (``key=value`` folders between the input root and the file).
    num_rows : int
        Rows in the file, from its footer.
    schema : pyarrow.Schema
        The file's Arrow schema, from its footer.
    """

    path: Path
    partitions: dict[str, str]
    num_rows: int
    schema: pa.Schema


def parse_day(text: str | dt.date | None, what: str) -> dt.date | None:
    """Parse a day.

    Parameters
    ----------
    text : str, datetime.date or None
        ``YYYY-MM-DD`` (ISO 8601 calendar date); a date or None passes through.
    what : str
        The option or path the text came from, named in the error.

    Returns
    -------
    datetime.date or None

    Raises
    ------
    UserError
        When ``text`` is not a date ``YYYY-MM-DD``.
    """
    if text is None or isinstance(text, dt.date):
        return text
    try:
        return dt.date.fromisoformat(str(text))
    except (TypeError, ValueError):
        raise UserError(f"{what}: expected a date YYYY-MM-DD, got '{text}'") from None


def _base_type(t: pa.DataType) -> pa.DataType:
    if pa.types.is_dictionary(t):
        t = t.value_type
    if pa.types.is_large_string(t):
        return pa.string()
    if pa.types.is_large_list(t) or pa.types.is_list(t):
        return pa.list_(_base_type(t.value_type))
    return t


def discover(path: str | Path, spec: Spec | None, start: dt.date | None = None,
             end: dt.date | None = None, *, need: list[str] | None = None,
             missing_ok: tuple[str, ...] = (), named_by: dict[str, str] | None = None) -> list[DataFile]:
    """Find the Parquet files of an input and check their footers.

    In a folder, files ending in .parquet or .parq count, in path order, except hidden ones (a path
    part starting with "." or "_"); other files are ignored. Files outside ``[start, end]`` by a
    partition key named as the spec's time column are pruned without being opened.

    Parameters
    ----------
    path : str or Path
        A file, a folder, or a hive-partitioned folder.
    spec : Spec or None
        The feature spec (its columns and time column); None with an explicit ``need``.
    start, end : datetime.date or None
        Inclusive day filter on the partition key named as the spec's time column.
    need : list of str, optional
        Columns every file must have (default: all the spec's columns).
    missing_ok : tuple of str
        Columns of ``need`` that a file may lack.
    named_by : dict of str to str, optional
        What named each column, for the error (e.g. "--by"; default "the spec").

    Returns
    -------
    list of DataFile
        The selected files, in path order.

    Raises
    ------
    UserError
        For a missing path, a folder without Parquet files, an unreadable file, a missing column, files
        that disagree on a column's type, or a day filter that selects no file; the message names the
        file and the column.
    """
    root = Path(path)
    if not root.exists():
        raise UserError(f"{root}: no such file or folder")
    if root.is_file():
        candidates = [root]
    else:
        candidates = sorted(p for p in root.rglob("*") if p.is_file() and p.suffix in PARQUET_SUFFIXES
                            and not any(part.startswith((".", "_")) for part in p.relative_to(root).parts))
        if not candidates:
            raise UserError(f"{root}: folder holds no Parquet files")
    need = spec.data_columns() if need is None else need
    time_col = spec.time_column if spec else None
    files: list[DataFile] = []
    seen_types: dict[str, tuple[pa.DataType, Path]] = {}
    for p in candidates:
        parts = {}
        if p != root:
            for seg in p.relative_to(root).parts[:-1]:
                if "=" in seg:
                    k, v = seg.split("=", 1)
                    parts[k] = urllib.parse.unquote(v)
        if time_col and time_col in parts and (start or end):
            day = parse_day(parts[time_col], f"{p}: partition key '{time_col}'")
            if (start and day < start) or (end and day > end):
                continue
        try:
            pf = pq.ParquetFile(p)
            schema = pf.schema_arrow
            num_rows = pf.metadata.num_rows
        except (pa.ArrowException, OSError) as exc:
            raise UserError(f"{p}: not a readable Parquet file ({str(exc).splitlines()[0]})") from None
        for col in need:
            if col in parts:
                continue
            if schema.get_field_index(col) < 0:
                if col in missing_ok:
                    continue
                raise UserError(f"{p}: column '{col}' named by {(named_by or {}).get(col, 'the spec')} is not in the file "
                                f"(columns: {', '.join(schema.names[:12])})")
            t = _base_type(schema.field(col).type)
            if col in seen_types and seen_types[col][0] != t:
                other_t, other_p = seen_types[col]
                raise UserError(f"{p}: column '{col}' is {t} but {other_p} has it as {other_t}; "
                                "all files of one input must share a schema")
            seen_types.setdefault(col, (t, p))
        files.append(DataFile(p, parts, num_rows, schema))
    if not files:
        raise UserError(f"{root}: the date filter {start or '...'} to {end or '...'} selects no files")
    return files


def column_days(arr: pa.Array, where: str) -> pa.Array:
    """The days of a time column.

    Parameters
    ----------
    arr : pyarrow.Array
        The time column: date32, date64 or timestamp.
    where : str
        The file and column, named in the error.

    Returns
    -------
    pyarrow.Array
        date32 days (dates as they are, date64 and timestamps cast to their day).

    Raises
    ------
    UserError
        For any other type.
    """
    t = arr.type
    if pa.types.is_date32(t):
        return arr
    if pa.types.is_date64(t) or pa.types.is_timestamp(t):
        return pc.cast(arr, pa.date32())
    raise UserError(f"{where} is {t}; the time column must be a date or a timestamp")


def _stat_day(value) -> dt.date | None:
    if isinstance(value, dt.datetime):
        return value.date()
    if isinstance(value, dt.date):
        return value
    return None


def row_group_outside(meta: pq.FileMetaData, group: int, column: str | None, start: dt.date | None,
                      end: dt.date | None) -> bool:
    """Whether a row group lies wholly outside a day filter, by its statistics.

    Parameters
    ----------
    meta : pyarrow.parquet.FileMetaData
        The file's footer.
    group : int
        The row group's number.
    column : str or None
        The time column.
    start, end : datetime.date or None
        The inclusive day filter.

    Returns
    -------
    bool
        True when the row group's min/max statistics of ``column`` put all its days outside
        ``[start, end]``; False when there is no filter, no such column or no usable statistics.
    """
    if not column or not (start or end):
        return False
    idx = next((i for i in range(meta.num_columns) if meta.schema.column(i).path == column), None)
    if idx is None:
        return False
    stats = meta.row_group(group).column(idx).statistics
    if stats is None or not stats.has_min_max:
        return False
    lo, hi = _stat_day(stats.min), _stat_day(stats.max)
    if lo is None or hi is None:
        return False
    return bool((end and lo > end) or (start and hi < start))
