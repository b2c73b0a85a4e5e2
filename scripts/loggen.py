"""Seeded, streaming generator of invented event logs with a known logistic ground truth.

A ``LogConfig`` lists the fields of a log (categorical, multi-valued, numeric), the interactions of the
ground-truth model, its base rate and its day-to-day drift. ``build_truth`` draws the model from a seed;
``write_logs`` streams rows chunk by chunk into Parquet (one file, or hive partitions
``logs/event_day=YYYY-MM-DD/part-0.parquet``) and writes the matching feature spec. Every step is
vectorised numpy; memory is bounded by one chunk plus the model tables, so ten million rows and more
stream through in constant memory.

Ground truth (logistic regression, "The regression analysis of binary sequences", Journal of the Royal
Statistical Society Series B, 1958):

    z = bias + sum_f effect_f[day][value_f] + sum_tags effect_tags[tag]
          + sum_numeric coef * log1p(x) + sum_pairs table[value_a, value_b]
    P(label) = 1 / (1 + exp(-z))

Categorical values follow a truncated Zipf law, P(rank k) proportional to k^-s for k = 1..V (Zipf's law,
"Human Behavior and the Principle of Least Effort", Addison-Wesley, 1949). Drift is a Gaussian random
walk of the per-value effects, one step per day (common practice for slowly moving effects). The bias
is set so that the mean true probability on the first day equals the configured base rate, found with
Brent's method ("Algorithms for Minimization without Derivatives", Prentice-Hall, 1973) via scipy.

Command line::

    python scripts/loggen.py --config bench20 --rows 1000000 --out DIR          # DIR/logs/... + DIR/spec.json
    python scripts/loggen.py --config bench20 --rows 1000000 --out FILE.parquet # + FILE.spec.json
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime as dt
import json
import shutil
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from scipy.optimize import brentq
from scipy.special import expit

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from trainer.atomic import atomic_path, write_atomic  # noqa: E402
from trainer.errors import UserError  # noqa: E402

TIME_COLUMN = "event_day"
TRUTH_COLUMN = "p_true"
PILOT_ROWS = 1 << 16
MAX_TABLE_CELLS = 10_000_000
WEEKDAYS = ("Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun")
_STRING_OR_INT = ("string", "int32", "int64")


@dataclass(frozen=True)
class Categorical:
    """One categorical field.

    ``vocab`` values (or the explicit ``labels``, most frequent first) drawn with a truncated Zipf law of
    exponent ``zipf``, or with the explicit ``probs``. ``by_day="weekday"`` makes the value the weekday
    of the event day (labels Mon..Sun). ``dtype`` is "string", "int32" or "int64". Each value gets an
    effect drawn from N(0, effect_sd^2); ``drift_sd`` is the standard deviation of its daily random-walk
    step; ``null_rate`` the fraction of nulls (a null adds nothing to the margin).
    """

    name: str
    vocab: int = 0
    zipf: float = 1.0
    probs: tuple[float, ...] | None = None
    labels: tuple | None = None
    prefix: str = ""
    dtype: str = "string"
    effect_sd: float = 0.3
    drift_sd: float = 0.0
    null_rate: float = 0.0
    by_day: str | None = None


@dataclass(frozen=True)
class Multi:
    """One multi-valued field (list<string>).

    A row holds k elements with probability ``lengths[k]``; elements are drawn with replacement from a
    Zipf vocabulary of ``vocab`` values named ``prefix`` + number; repeated elements add their effect
    again. ``null_rate`` of the rows hold a null list (no effect).
    """

    name: str
    vocab: int
    zipf: float
    lengths: tuple[float, ...]
    prefix: str = ""
    effect_sd: float = 0.2
    null_rate: float = 0.0


@dataclass(frozen=True)
class Numeric:
    """One numeric field: x = exp(N(loc, scale^2)), rounded to ``decimals`` ("float64") or floored ("int32").

    The true effect is ``coef * log1p(x)``; ``spec`` is what the feature spec says about the column
    (``{"transform": "log1p"}`` or ``{"edges": [...]}``). ``null_rate`` of the values are null.
    """

    name: str
    loc: float
    scale: float
    coef: float
    spec: dict
    dtype: str = "float64"
    decimals: int = 2
    null_rate: float = 0.0


@dataclass(frozen=True)
class Interaction:
    """A two-way interaction of two categorical fields: one effect per value pair, drawn from N(0, sd^2)."""

    fields: tuple[str, str]
    effect_sd: float


@dataclass(frozen=True)
class LogConfig:
    """A whole log: label column name, fields in column order, interactions, base rate, first day, spec bits."""

    name: str
    label: str
    fields: tuple
    interactions: tuple[Interaction, ...]
    base_rate: float
    start_day: str = "2024-05-06"
    bits: int = 18


@dataclass
class _FieldTruth:
    values: pa.Array | None
    cdf: np.ndarray | None
    effects: np.ndarray
    walk: np.ndarray | None


@dataclass
class Truth:
    """The drawn ground truth: per-field value labels, sampling tables and effects, interaction tables, bias.

    ``fields`` maps a field name to its tables (``values`` Arrow array of labels by rank, ``cdf``,
    ``effects`` by rank, ``walk`` (days, vocab) daily drift or None); ``tables`` maps an interaction's
    field pair to its (V_a, V_b) effect table; ``bias`` is the intercept.
    """

    config: LogConfig
    seed: int
    fields: dict
    tables: dict
    bias: float

    def effects(self, name: str, day: int) -> np.ndarray:
        """Effects by rank of field ``name`` on day index ``day`` (base effect plus drift walk)."""
        ft = self.fields[name]
        if ft.walk is None:
            return ft.effects
        return ft.effects + ft.walk[day]


@dataclass
class WrittenLogs:
    """What ``write_logs`` wrote: data path (file or logs folder), spec path, per-day dates, rows,
    positives and mean true probability, total bytes of the Parquet files."""

    data_path: Path
    spec_path: Path
    days: list[str]
    rows: list[int]
    positives: list[int]
    mean_p: list[float]
    bytes: int


def zipf_probs(vocab: int, s: float) -> np.ndarray:
    """Truncated Zipf probabilities P(rank k) = k^-s / sum_j j^-s for k = 1..vocab (float64, length vocab).

    Source: Zipf's law, "Human Behavior and the Principle of Least Effort", Addison-Wesley, 1949.
    Raises UserError when vocab < 1 or s < 0.
    """
    if vocab < 1:
        raise UserError(f"vocab must be an integer >= 1 (got {vocab})")
    if not s >= 0:
        raise UserError(f"zipf exponent must be >= 0 (got {s})")
    w = np.arange(1, vocab + 1, dtype=np.float64) ** -s
    return w / w.sum()


def sample_ranks(rng: np.random.Generator, cdf: np.ndarray, n: int) -> np.ndarray:
    """Draw ``n`` ranks (int64, 0-based) by inverse-CDF sampling from the cumulative probabilities ``cdf``.

    Inverse transform sampling (common practice). Returns an int64 array of length n.
    """
    u = rng.random(n)
    return np.minimum(np.searchsorted(cdf, u, side="right"), cdf.size - 1)


def field_vocab(f) -> int:
    """Number of distinct values of a Categorical or Multi field (labels, probs, weekday or vocab)."""
    if isinstance(f, Categorical):
        if f.by_day == "weekday":
            return len(WEEKDAYS)
        if f.labels is not None:
            return len(f.labels)
        if f.probs is not None:
            return len(f.probs)
    return f.vocab


def validate_config(config: LogConfig) -> None:
    """Check a ``LogConfig``; raise UserError naming the field and the accepted range on the first problem.

    Returns None.
    """
    if not 0.0 < config.base_rate < 1.0:
        raise UserError(f"{config.name}: base_rate must be in (0, 1) (got {config.base_rate})")
    if not 1 <= config.bits <= 30:
        raise UserError(f"{config.name}: bits must be in 1..30 (got {config.bits})")
    try:
        dt.date.fromisoformat(config.start_day)
    except ValueError:
        raise UserError(f"{config.name}: start_day must be YYYY-MM-DD (got {config.start_day!r})") from None
    names = [f.name for f in config.fields]
    if len(set(names)) != len(names) or config.label in names or TIME_COLUMN in names or TRUTH_COLUMN in names:
        raise UserError(f"{config.name}: field names must be unique and differ from the label, "
                        f"{TIME_COLUMN} and {TRUTH_COLUMN} (got {names})")
    for f in config.fields:
        if not isinstance(f, (Categorical, Multi, Numeric)):
            raise UserError(f"{config.name}: field {f!r} must be a Categorical, Multi or Numeric")
        if not 0.0 <= f.null_rate < 1.0:
            raise UserError(f"field {f.name}: null_rate must be in [0, 1) (got {f.null_rate})")
        if isinstance(f, Categorical):
            if f.by_day not in (None, "weekday"):
                raise UserError(f"field {f.name}: by_day must be None or 'weekday' (got {f.by_day!r})")
            if f.dtype not in _STRING_OR_INT:
                raise UserError(f"field {f.name}: dtype must be one of {_STRING_OR_INT} (got {f.dtype!r})")
            vocab = field_vocab(f)
            if vocab < 1:
                raise UserError(f"field {f.name}: vocab must be >= 1 (got {vocab})")
            if f.probs is not None and (len(f.probs) != vocab or min(f.probs) < 0 or sum(f.probs) <= 0):
                raise UserError(f"field {f.name}: probs must be {vocab} non-negative numbers with a positive sum")
            if f.effect_sd < 0 or f.drift_sd < 0:
                raise UserError(f"field {f.name}: effect_sd and drift_sd must be >= 0")
            if f.by_day is None and f.probs is None and not f.zipf >= 0:
                raise UserError(f"field {f.name}: zipf must be >= 0 (got {f.zipf})")
        elif isinstance(f, Multi):
            if f.vocab < 1 or not f.zipf >= 0 or f.effect_sd < 0:
                raise UserError(f"field {f.name}: vocab must be >= 1, zipf >= 0, effect_sd >= 0")
            if len(f.lengths) < 1 or min(f.lengths) < 0 or sum(f.lengths) <= 0:
                raise UserError(f"field {f.name}: lengths must be non-negative probabilities with a positive sum")
        else:
            if f.dtype not in ("float64", "int32") or f.scale < 0:
                raise UserError(f"field {f.name}: dtype must be 'float64' or 'int32' and scale >= 0")
            edges = f.spec.get("edges")
            if edges is not None and list(edges) != sorted(set(edges)):
                raise UserError(f"field {f.name}: spec edges must be strictly increasing (got {edges})")
            if f.spec.get("transform", "identity") not in ("identity", "log1p"):
                raise UserError(f"field {f.name}: spec transform must be 'identity' or 'log1p'")
    cats = {f.name: f for f in config.fields if isinstance(f, Categorical)}
    for inter in config.interactions:
        a, b = inter.fields
        if a not in cats or b not in cats or a == b:
            raise UserError(f"interaction {inter.fields}: needs two distinct categorical fields of the config")
        cells = field_vocab(cats[a]) * field_vocab(cats[b])
        if cells > MAX_TABLE_CELLS:
            raise UserError(f"interaction {inter.fields}: {cells} value pairs, accepted at most {MAX_TABLE_CELLS}")
        if inter.effect_sd < 0:
            raise UserError(f"interaction {inter.fields}: effect_sd must be >= 0")


def _labels(f, rng: np.random.Generator) -> pa.Array:
    vocab = field_vocab(f)
    if isinstance(f, Categorical) and f.by_day == "weekday":
        return pa.array(WEEKDAYS, type=pa.string())
    dtype = f.dtype if isinstance(f, Categorical) else "string"
    if isinstance(f, Categorical) and f.labels is not None:
        return pa.array(list(f.labels), type=getattr(pa, dtype)())
    if dtype == "string":
        width = len(str(vocab))
        numbers = rng.permutation(vocab) + 1
        return pa.array([f"{f.prefix}{k:0{width}d}" for k in numbers.tolist()], type=pa.string())
    high = 2**31 - 1 if dtype == "int32" else 10**12
    ints = rng.choice(high, size=vocab, replace=False)
    return pa.array(ints, type=getattr(pa, dtype)())


def build_truth(config: LogConfig, seed: int, days: int) -> Truth:
    """Draw the ground-truth model of ``config`` for ``days`` days from ``seed`` and calibrate its bias.

    Field i draws its labels, effects and drift walk from its own stream SeedSequence(seed, (0, i)), so
    the model depends only on (config, seed) and not on the number of rows. The bias solves
    mean(sigmoid(z + bias)) = base_rate on a 65536-row pilot sample of the first day (Brent's method,
    "Algorithms for Minimization without Derivatives", Prentice-Hall, 1973).
    Returns a ``Truth``. Raises UserError for an invalid config, seed or days.
    """
    validate_config(config)
    if seed < 0:
        raise UserError(f"--seed must be an integer >= 0 (got {seed})")
    if days < 1:
        raise UserError(f"--days must be an integer >= 1 (got {days})")
    fields = {}
    for i, f in enumerate(config.fields):
        rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(0, i)))
        if isinstance(f, Numeric):
            fields[f.name] = _FieldTruth(None, None, np.array([f.coef]), None)
            continue
        vocab = field_vocab(f)
        values = _labels(f, rng)
        if isinstance(f, Categorical) and f.probs is not None:
            p = np.asarray(f.probs, dtype=np.float64) / np.sum(f.probs)
        else:
            p = zipf_probs(vocab, f.zipf)
        effects = rng.normal(0.0, f.effect_sd, vocab)
        walk = None
        if isinstance(f, Categorical) and f.drift_sd > 0:
            steps = rng.normal(0.0, f.drift_sd, (days, vocab))
            steps[0] = 0.0
            walk = np.cumsum(steps, axis=0)
        fields[f.name] = _FieldTruth(values, np.cumsum(p), effects, walk)
    tables = {}
    for j, inter in enumerate(config.interactions):
        rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(3, j)))
        a, b = inter.fields
        shape = (fields[a].effects.size, fields[b].effects.size)
        tables[inter.fields] = rng.normal(0.0, inter.effect_sd, shape)
    truth = Truth(config, seed, fields, tables, 0.0)
    pilot = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(2,)))
    z0 = _draw(truth, 0, PILOT_ROWS, pilot)[1]
    truth.bias = brentq(lambda b: expit(z0 + b).mean() - config.base_rate, -60.0, 60.0, xtol=1e-12)
    return truth


def _day_date(config: LogConfig, day: int) -> dt.date:
    return dt.date.fromisoformat(config.start_day) + dt.timedelta(days=day)


def _draw(truth: Truth, day: int, n: int, rng: np.random.Generator):
    """Raw draws of every field for n rows of day ``day`` and their margin without the bias."""
    z = np.zeros(n)
    raw = {}
    weekday = _day_date(truth.config, day).weekday()
    for f in truth.config.fields:
        ft = truth.fields[f.name]
        null = rng.random(n) < f.null_rate if f.null_rate > 0 else np.zeros(n, dtype=bool)
        if isinstance(f, Categorical):
            if f.by_day == "weekday":
                r = np.full(n, weekday, dtype=np.int64)
            else:
                r = sample_ranks(rng, ft.cdf, n)
            z += np.where(null, 0.0, truth.effects(f.name, day)[r])
            raw[f.name] = (r, null)
        elif isinstance(f, Multi):
            len_cdf = np.cumsum(np.asarray(f.lengths, dtype=np.float64) / np.sum(f.lengths))
            lengths = sample_ranks(rng, len_cdf, n)
            lengths[null] = 0
            offsets = np.zeros(n + 1, dtype=np.int64)
            np.cumsum(lengths, out=offsets[1:])
            elems = sample_ranks(rng, ft.cdf, int(offsets[-1]))
            rows = np.repeat(np.arange(n), lengths)
            z += np.bincount(rows, weights=ft.effects[elems], minlength=n)
            raw[f.name] = (offsets, elems, null)
        else:
            x = np.exp(rng.normal(f.loc, f.scale, n))
            x = np.floor(x) if f.dtype == "int32" else np.round(x, f.decimals)
            z += np.where(null, 0.0, ft.effects[0] * np.log1p(x))
            raw[f.name] = (x, null)
    for (a, b), table in truth.tables.items():
        (ra, null_a), (rb, null_b) = raw[a], raw[b]
        z += np.where(null_a | null_b, 0.0, table[ra, rb])
    return raw, z


def arrow_schema(config: LogConfig, with_truth: bool = False, with_time: bool = False) -> pa.Schema:
    """Arrow schema of the generated files.

    Columns: ``event_day`` date32 first when ``with_time`` (single-file output; hive output keeps the day
    in the path only), then the fields in config order (categorical: string/int32/int64, multi:
    list<string>, numeric: float64/int32), the label (bool), then ``p_true`` float64 when ``with_truth``.
    Returns a pyarrow Schema.
    """
    cols = [pa.field(TIME_COLUMN, pa.date32(), nullable=False)] if with_time else []
    for f in config.fields:
        if isinstance(f, Categorical):
            cols.append(pa.field(f.name, pa.string() if f.by_day else getattr(pa, f.dtype)()))
        elif isinstance(f, Multi):
            cols.append(pa.field(f.name, pa.list_(pa.string())))
        else:
            cols.append(pa.field(f.name, getattr(pa, f.dtype)()))
    cols.append(pa.field(config.label, pa.bool_(), nullable=False))
    if with_truth:
        cols.append(pa.field(TRUTH_COLUMN, pa.float64(), nullable=False))
    return pa.schema(cols)


def generate_chunk(truth: Truth, day: int, chunk: int, n: int, with_truth: bool = False,
                   with_time: bool = False) -> pa.Table:
    """Generate chunk number ``chunk`` (n rows) of day index ``day`` as an Arrow table.

    The rows come from the stream SeedSequence(seed, (1, day, chunk)), so a chunk is the same whatever
    else is generated. Labels are Bernoulli(sigmoid(bias + z)) (logistic model, "The regression analysis
    of binary sequences", Journal of the Royal Statistical Society Series B, 1958).
    Returns a table with ``arrow_schema(config, with_truth, with_time)``.
    """
    config = truth.config
    rng = np.random.default_rng(np.random.SeedSequence(truth.seed, spawn_key=(1, day, chunk)))
    raw, z = _draw(truth, day, n, rng)
    p = expit(z + truth.bias)
    label = rng.random(n) < p
    schema = arrow_schema(config, with_truth, with_time)
    arrays = []
    if with_time:
        arrays.append(pa.array(np.full(n, np.datetime64(_day_date(config, day), "D")), type=pa.date32()))
    for f in config.fields:
        ft = truth.fields[f.name]
        if isinstance(f, Categorical):
            r, null = raw[f.name]
            arrays.append(ft.values.take(pa.array(r, mask=null)))
        elif isinstance(f, Multi):
            offsets, elems, null = raw[f.name]
            values = ft.values.take(pa.array(elems))
            arrays.append(pa.ListArray.from_arrays(pa.array(offsets.astype(np.int32)), values,
                                                   mask=pa.array(null)))
        else:
            x, null = raw[f.name]
            arrays.append(pa.array(x.astype(f.dtype), mask=null, type=getattr(pa, f.dtype)()))
    arrays.append(pa.array(label, type=pa.bool_()))
    if with_truth:
        arrays.append(pa.array(p, type=pa.float64()))
    return pa.Table.from_arrays(arrays, schema=schema)


def make_spec(config: LogConfig, bits: int | None = None, hash_seed: int = 0) -> dict:
    """The feature spec (README.md, section 'Hashing contract') matching ``config``: label, time column, hashing, one feature
    per field (categorical, multi, or numeric with the field's transform/edges), and one cross per
    interaction. ``bits`` defaults to ``config.bits``. Returns a JSON-ready dict.
    """
    features = []
    for f in config.fields:
        if isinstance(f, Categorical):
            features.append({"column": f.name, "kind": "categorical"})
        elif isinstance(f, Multi):
            features.append({"column": f.name, "kind": "multi"})
        else:
            features.append({"column": f.name, "kind": "numeric", **f.spec})
    return {
        "label": {"column": config.label},
        "time": {"column": TIME_COLUMN},
        "hashing": {"bits": config.bits if bits is None else bits, "seed": hash_seed},
        "features": features,
        "crosses": [list(inter.fields) for inter in config.interactions],
    }


def _split_rows(rows: int, days: int) -> list[int]:
    base, extra = divmod(rows, days)
    return [base + (1 if d < extra else 0) for d in range(days)]


def _write_part(truth: Truth, path: Path, days: list[int], rows_per_day: list[int], chunk_rows: int,
                with_truth: bool, with_time: bool, stats: dict) -> None:
    schema = arrow_schema(truth.config, with_truth, with_time)
    with atomic_path(path) as tmp, pq.ParquetWriter(tmp, schema) as writer:
        for day, n_day in zip(days, rows_per_day):
            for chunk, start in enumerate(range(0, n_day, chunk_rows)):
                n = min(chunk_rows, n_day - start)
                table = generate_chunk(truth, day, chunk, n, with_truth=True, with_time=with_time)
                label = table.column(truth.config.label).to_numpy()
                stats["positives"][day] += int(np.count_nonzero(label))
                stats["psum"][day] += float(np.sum(table.column(TRUTH_COLUMN).to_numpy()))
                if not with_truth:
                    table = table.drop_columns([TRUTH_COLUMN])
                writer.write_table(table, row_group_size=chunk_rows)


def write_logs(config: LogConfig, out: str | Path, rows: int, days: int = 1, seed: int = 7,
               chunk_rows: int = 16384, with_truth: bool = False, overwrite: bool = False,
               bits: int | None = None) -> WrittenLogs:
    """Generate ``rows`` rows over ``days`` days (split evenly, first day first) and write them with their spec.

    ``out`` ending in ".parquet": one file holding an ``event_day`` date32 column, spec beside it as
    ``<stem>.spec.json``. Otherwise ``out`` is a folder: hive partitions
    ``out/logs/event_day=YYYY-MM-DD/part-0.parquet`` (no event_day column inside) and ``out/spec.json``.
    Rows are generated and written ``chunk_rows`` at a time, one row group per chunk; each file is written
    beside its target and renamed. Same (config, rows, days, seed, chunk_rows) -> identical bytes.
    ``with_truth`` adds the true probability column ``p_true``.
    Returns a ``WrittenLogs``. Raises UserError for a bad option or an output that exists without
    ``overwrite``.
    """
    if rows < days:
        raise UserError(f"--rows must be an integer >= --days ({days}) (got {rows})")
    if chunk_rows < 1:
        raise UserError(f"--chunk-rows must be an integer >= 1 (got {chunk_rows})")
    if bits is not None and not 1 <= bits <= 30:
        raise UserError(f"--bits must be in 1..30 (got {bits})")
    truth = build_truth(config, seed, days)
    out = Path(out)
    per_day = _split_rows(rows, days)
    dates = [_day_date(config, d).isoformat() for d in range(days)]
    stats = {"positives": [0] * days, "psum": [0.0] * days}
    if out.suffix == ".parquet":
        spec_path = out.with_name(out.stem + ".spec.json")
        if (out.exists() or spec_path.exists()) and not overwrite:
            raise UserError(f"--out: {out} or {spec_path} already exists; pass --overwrite to replace them")
        out.parent.mkdir(parents=True, exist_ok=True)
        _write_part(truth, out, list(range(days)), per_day, chunk_rows, with_truth, True, stats)
        files = [out]
        data_path = out
    else:
        data_path = out / "logs"
        spec_path = out / "spec.json"
        if data_path.exists() and any(data_path.iterdir()):
            if not overwrite:
                raise UserError(f"--out: {data_path} is not empty; pass --overwrite to replace its partitions")
            for old in data_path.glob(f"{TIME_COLUMN}=*"):
                shutil.rmtree(old)
        files = []
        for d in range(days):
            part_dir = data_path / f"{TIME_COLUMN}={dates[d]}"
            part_dir.mkdir(parents=True, exist_ok=True)
            path = part_dir / "part-0.parquet"
            _write_part(truth, path, [d], [per_day[d]], chunk_rows, with_truth, False, stats)
            files.append(path)
    write_atomic(spec_path, [(json.dumps(make_spec(config, bits), indent=2) + "\n").encode("utf-8")])
    return WrittenLogs(data_path, spec_path, dates, per_day, stats["positives"],
                       [s / n for s, n in zip(stats["psum"], per_day)], sum(f.stat().st_size for f in files))


_HOUR_WEIGHTS = (1.0, 0.6, 0.4, 0.3, 0.3, 0.5, 1.2, 2.5, 3.5, 3.8, 4.0, 4.5,
                 5.0, 4.6, 4.0, 3.8, 4.2, 5.0, 6.0, 6.2, 5.5, 4.0, 2.6, 1.6)

GROCERY_PUSH = LogConfig(
    name="grocery-push",
    label="ordered",
    fields=(
        Categorical("campaign", vocab=400, zipf=1.1, prefix="cmp-", effect_sd=0.4, drift_sd=0.04),
        Categorical("promo_type", labels=("percent_off", "free_delivery", "bundle", "new_product",
                                          "loyalty_points", "reminder"), zipf=0.8, effect_sd=0.3, drift_sd=0.03),
        Categorical("trigger", labels=("scheduled", "cart_abandoned", "back_in_stock", "price_drop",
                                       "reorder_reminder"), zipf=0.9, effect_sd=0.45),
        Categorical("template", vocab=60, zipf=1.0, prefix="tpl-", effect_sd=0.15),
        Categorical("store_zone", vocab=40, zipf=0.7, prefix="zone-", effect_sd=0.2),
        Categorical("device_os", labels=("android", "ios", "web"), zipf=1.3, effect_sd=0.15),
        Categorical("app_version", vocab=30, zipf=1.4, prefix="7.", effect_sd=0.08, null_rate=0.03),
        Categorical("hour", labels=tuple(range(24)), probs=_HOUR_WEIGHTS, dtype="int32", effect_sd=0.25),
        Categorical("weekday", by_day="weekday", effect_sd=0.1),
        Categorical("customer_segment", labels=("weekly_shopper", "occasional", "new_customer", "family_bulk",
                                                "budget", "premium", "lapsed", "student"),
                    zipf=0.6, effect_sd=0.5),
        Categorical("postcode_prefix", vocab=3000, zipf=0.9, prefix="pc", effect_sd=0.15),
        Categorical("recipient_cohort", vocab=100_000, zipf=0.8, prefix="rc", effect_sd=0.5),
        Categorical("favourite_aisle", labels=("produce", "dairy", "bakery", "frozen", "snacks", "beverages",
                                               "pantry", "meat", "seafood", "deli", "household", "baby", "pet",
                                               "health", "breakfast", "world_foods", "organic", "wine_beer",
                                               "cleaning", "personal_care", "canned", "spices", "sweets",
                                               "plant_based"),
                    zipf=0.9, effect_sd=0.15, null_rate=0.12),
        Multi("recent_tags", vocab=200, zipf=1.0, lengths=(0.15, 0.25, 0.25, 0.18, 0.10, 0.07),
              prefix="tag-", effect_sd=0.15, null_rate=0.05),
        Numeric("basket_value_avg", loc=3.4, scale=0.5, coef=0.35, spec={"transform": "log1p"},
                null_rate=0.08),
        Numeric("days_since_last_order", loc=2.3, scale=1.0, coef=-0.3, dtype="int32",
                spec={"edges": [1, 3, 7, 14, 30, 60, 120]}, null_rate=0.1),
    ),
    interactions=(Interaction(("campaign", "hour"), 0.25),),
    base_rate=0.04,
    start_day="2024-05-06",
    bits=18,
)

_BENCH_VOCABS = np.round(np.geomspace(3, 200_000, 20)).astype(int).tolist()
_BENCH_INT_FIELDS = (2, 6, 10, 14)

BENCH20 = LogConfig(
    name="bench20",
    label="converted",
    fields=tuple(
        Categorical(f"c{i + 1:02d}", vocab=v, zipf=(0.7, 0.9, 1.1, 1.3)[i % 4], prefix=f"c{i + 1:02d}-",
                    dtype="int64" if i in _BENCH_INT_FIELDS else "string", effect_sd=0.25)
        for i, v in enumerate(_BENCH_VOCABS)
    ),
    interactions=(Interaction(("c04", "c09"), 0.3),),
    base_rate=0.04,
    start_day="2024-05-06",
    bits=20,
)

#: Regimes of scripts/bench_regimes.py. ``drift12``: a response log whose hour, weekday and campaign
#: effects move day by day (a random walk), read in time order or shuffled. ``ordinal80``: 80 dense
#: ordinal columns of 2-10 levels, nearly every column set in every row. ``rare20``: the benchmark's
#: 20 fields at a base rate of 0.4%. ``tags200``: two long multi-valued tag lists (about 120 tags a
#: row) beside eight categorical fields; the regime's spec adds tag x field crosses (200+ entries a row).
DRIFT12 = LogConfig(
    name="drift12",
    label="responded",
    fields=(
        Categorical("campaign", vocab=300, zipf=1.1, prefix="cmp-", effect_sd=0.4, drift_sd=0.06),
        Categorical("hour", labels=tuple(range(24)), probs=_HOUR_WEIGHTS, dtype="int32", effect_sd=0.3,
                    drift_sd=0.08),
        Categorical("weekday", by_day="weekday", effect_sd=0.15, drift_sd=0.05),
        Categorical("segment", labels=("new", "active", "lapsed", "loyal", "bargain", "premium"), zipf=0.6,
                    effect_sd=0.4),
        Categorical("region", vocab=50, zipf=0.8, prefix="r", effect_sd=0.2),
        Categorical("device", labels=("android", "ios", "web"), zipf=1.2, effect_sd=0.15),
        Categorical("placement", vocab=1000, zipf=1.0, prefix="pl", effect_sd=0.25, drift_sd=0.02),
        Categorical("app_version", vocab=30, zipf=1.4, prefix="9.", effect_sd=0.08, null_rate=0.03),
        Categorical("item", vocab=20_000, zipf=1.0, prefix="it", effect_sd=0.3),
        Categorical("cohort", vocab=50_000, zipf=0.8, prefix="co", effect_sd=0.4),
        Categorical("channel", vocab=12, zipf=0.9, prefix="ch", effect_sd=0.3, drift_sd=0.04),
        Categorical("locale", vocab=40, zipf=1.1, prefix="lc", effect_sd=0.1),
    ),
    interactions=(Interaction(("campaign", "hour"), 0.2),),
    base_rate=0.04,
    start_day="2024-06-03",
    bits=20,
)

ORDINAL80 = LogConfig(
    name="ordinal80",
    label="bought",
    fields=tuple(
        Categorical(f"q{i + 1:02d}", labels=tuple(range(2 + i % 9)), dtype="int32", zipf=0.5,
                    effect_sd=0.12, null_rate=0.01)
        for i in range(80)
    ),
    interactions=(Interaction(("q01", "q02"), 0.2),),
    base_rate=0.06,
    start_day="2024-06-03",
    bits=18,
)

RARE20 = dataclasses.replace(BENCH20, name="rare20", base_rate=0.004)


def _uniform_lengths(low: int, high: int) -> tuple[float, ...]:
    """List-length probabilities, uniform on low..high."""
    return tuple(0.0 if k < low else 1.0 for k in range(high + 1))


TAGS200 = LogConfig(
    name="tags200",
    label="clicked",
    fields=(
        Categorical("device", labels=("android", "ios", "web"), zipf=1.2, effect_sd=0.15),
        Categorical("slot", vocab=6, zipf=0.8, prefix="s", effect_sd=0.3),
        Categorical("site", vocab=400, zipf=1.1, prefix="site", effect_sd=0.3),
        Categorical("advertiser", vocab=2000, zipf=1.0, prefix="adv", effect_sd=0.3),
        Categorical("creative", vocab=20_000, zipf=1.0, prefix="cr", effect_sd=0.25),
        Categorical("user_bucket", vocab=30_000, zipf=0.8, prefix="u", effect_sd=0.3),
        Categorical("hour", labels=tuple(range(24)), probs=_HOUR_WEIGHTS, dtype="int32", effect_sd=0.2),
        Categorical("country", vocab=60, zipf=1.2, prefix="cc", effect_sd=0.15),
        Multi("interests", vocab=5000, zipf=1.0, lengths=_uniform_lengths(50, 110), prefix="in",
              effect_sd=0.05),
        Multi("context_tags", vocab=300, zipf=0.9, lengths=_uniform_lengths(20, 60), prefix="ct",
              effect_sd=0.05),
    ),
    interactions=(Interaction(("advertiser", "slot"), 0.2),),
    base_rate=0.03,
    start_day="2024-06-03",
    bits=20,
)

CONFIGS = {c.name: c for c in (GROCERY_PUSH, BENCH20, DRIFT12, ORDINAL80, RARE20, TAGS200)}


def int_option(low: int):
    """An argparse ``type`` that accepts an integer >= ``low`` and otherwise reports the accepted range."""
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"must be an integer >= {low} (got {text!r})") from None
        if value < low:
            raise argparse.ArgumentTypeError(f"must be an integer >= {low} (got {value})")
        return value
    return parse


def main(argv: list[str] | None = None) -> int:
    """Command line: generate ``--rows`` rows of ``--config`` into ``--out`` (file or folder) with its spec.

    Returns the exit code: 0 on success, 2 after printing a one-line UserError message.
    """
    ap = argparse.ArgumentParser(prog="loggen.py", description="Generate invented event logs with a known "
                                 "logistic ground truth, as Parquet plus a matching feature spec.")
    ap.add_argument("--config", choices=sorted(CONFIGS), required=True, help="which built-in log to generate")
    ap.add_argument("--rows", type=int_option(1), required=True, help="total rows, split evenly over days")
    ap.add_argument("--out", required=True, help="FILE.parquet (one file) or a folder (hive partitions)")
    ap.add_argument("--days", type=int_option(1), default=1, help="number of event days (default 1)")
    ap.add_argument("--seed", type=int_option(0), default=7, help="generator seed (default 7)")
    ap.add_argument("--chunk-rows", type=int_option(1), default=16384,
                    help="rows generated and written per row group (default 16384)")
    ap.add_argument("--bits", type=int_option(1), default=None, help="hashing bits written to the spec")
    ap.add_argument("--with-truth", action="store_true", help=f"add the true probability column {TRUTH_COLUMN}")
    ap.add_argument("--overwrite", action="store_true", help="replace an existing output")
    args = ap.parse_args(argv)
    try:
        written = write_logs(CONFIGS[args.config], args.out, args.rows, days=args.days, seed=args.seed,
                             chunk_rows=args.chunk_rows, with_truth=args.with_truth,
                             overwrite=args.overwrite, bits=args.bits)
    except UserError as exc:
        print(f"loggen.py: error: {exc}", file=sys.stderr)
        return 2
    total = sum(written.rows)
    rate = sum(written.positives) / total
    print(f"wrote {total} rows over {len(written.days)} day(s) to {written.data_path} "
          f"({written.bytes / 1e6:.1f} MB, positive rate {rate:.4f}); spec {written.spec_path}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
