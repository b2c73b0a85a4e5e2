"""Load and validate the feature spec; describe the exact hashing contract it implies.

The spec is JSON (schema: ``schemas/feature-spec.schema.json``). Validation here is hand-written so
that the tool needs no schema library at run time; the test suite checks that both agree.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass
from pathlib import Path

from trainer.errors import UserError

KINDS = ("categorical", "multi", "numeric")
TRANSFORMS = ("identity", "log1p")
MAX_BITS = 30


@dataclass(frozen=True)
class Feature:
    """One input column of the spec.

    Attributes
    ----------
    column : str
        The column (or hive partition key).
    kind : {"categorical", "multi", "numeric"}
        How its values become tokens (see the hashing contract).
    transform : {"identity", "log1p"}
        A numeric feature's value transform.
    edges : tuple of float or None
        A numeric feature's bin edges (then each bin is a token of value 1.0).
    """

    column: str
    kind: str
    transform: str = "identity"
    edges: tuple[float, ...] | None = None

    @property
    def one_hot(self) -> bool:
        """True when the feature yields tokens with value 1.0 (everything but a plain numeric)."""
        return self.kind != "numeric" or self.edges is not None


@dataclass(frozen=True)
class Spec:
    """A validated feature spec.

    Attributes
    ----------
    label_column : str
        The 0/1 label.
    positive, negative : tuple of str or None
        The string label values read as 1 and as 0; with ``negative`` given, other strings are bad
        labels, without it they read as 0.
    weight_column : str or None
        Row weights.
    time_column : str or None
        The day column (or partition key) that date filters use.
    bits : int
        Hash bits: 2^bits buckets.
    seed : int
        The hash seed.
    features : tuple of Feature
        In spec order.
    crosses : tuple of tuple of str
        The crossed columns.
    raw : dict
        The normalized JSON object it came from.
    """

    label_column: str
    positive: tuple[str, ...] | None
    negative: tuple[str, ...] | None
    weight_column: str | None
    time_column: str | None
    bits: int
    seed: int
    features: tuple[Feature, ...]
    crosses: tuple[tuple[str, ...], ...]
    raw: dict

    @property
    def n_buckets(self) -> int:
        """Size of the hashed feature space, 2^bits."""
        return 1 << self.bits

    def fingerprint(self) -> str:
        """SHA-256 of the spec's JSON with sorted keys and no whitespace: equal specs, equal fingerprints.

        Returns
        -------
        str
            The hex digest.
        """
        text = json.dumps(self.raw, sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode("utf-8")).hexdigest()

    def data_columns(self) -> list[str]:
        """Every column the reader needs, without repeats, in spec order.

        Returns
        -------
        list of str
        """
        cols = [self.label_column, self.weight_column, self.time_column]
        cols += [f.column for f in self.features]
        return list(dict.fromkeys(c for c in cols if c))

    def feature(self, column: str) -> Feature:
        """The feature defined on a column.

        Parameters
        ----------
        column : str
            The column.

        Returns
        -------
        Feature

        Raises
        ------
        StopIteration
            When no feature is defined on ``column``.
        """
        return next(f for f in self.features if f.column == column)

    def contract(self) -> dict:
        """The hashing contract as data, for ``model.json``: algorithm, seed, bits and the token rules.

        Returns
        -------
        dict
            JSON-ready.

        References
        ----------
        "MurmurHash3", SMHasher project, 2011.
        """
        return {
            "algorithm": "murmur3_x86_32",
            "seed": self.seed,
            "bits": self.bits,
            "bucket": "murmur3_x86_32(token, seed) mod 2^bits, the hash read as unsigned 32-bit",
            "field_separator": "0x1F",
            "cross_separator": "0x1E",
            "rules": {
                "categorical": "token = utf8(column) 0x1F utf8(canonical(value)); value 1.0; "
                "canonical: strings as they are, integers in decimal, booleans true/false, "
                "dates YYYY-MM-DD; null adds nothing",
                "multi": "one categorical token per non-null list element; repeats add up",
                "numeric": "token = utf8(column); value = x (identity) or sign(x)*ln(1+|x|) (log1p); "
                "null adds nothing",
                "numeric_edges": "bin i = number of edges <= x; token = utf8(column) 0x1F '#' decimal(i); "
                "value 1.0",
                "cross": "token = token(c1) 0x1E token(c2) 0x1E ...; Cartesian product over list "
                "elements; a null component adds nothing; value 1.0",
                "collisions": "entries landing in one bucket add up",
                "margin": "intercept + sum(value * weight[bucket])",
            },
            "features": [_feature_json(f) for f in self.features],
            "crosses": [list(c) for c in self.crosses],
        }


def _feature_json(f: Feature) -> dict:
    out = {"column": f.column, "kind": f.kind}
    if f.kind == "numeric":
        if f.edges is not None:
            out["edges"] = list(f.edges)
        else:
            out["transform"] = f.transform
    return out


def load_spec(path: str | Path) -> Spec:
    """Read and validate a spec file.

    Parameters
    ----------
    path : str or Path
        The JSON spec file.

    Returns
    -------
    Spec

    Raises
    ------
    UserError
        Naming the file and the offending key, also for a missing or unreadable file or invalid JSON.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UserError(f"{path}: spec file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise UserError(f"{path}: cannot read spec file ({exc})") from None
    try:
        obj = json.loads(text)
    except json.JSONDecodeError as exc:
        raise UserError(f"{path}: spec is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})") from None
    return parse_spec(obj, str(path))


def parse_spec(obj: object, source: str = "spec") -> Spec:
    """Validate a spec given as a JSON-like object.

    Parameters
    ----------
    obj : object
        The parsed JSON.
    source : str, default "spec"
        Where it came from, named in errors.

    Returns
    -------
    Spec

    Raises
    ------
    UserError
        Naming the key.
    """

    def fail(key: str, expected: str, got: object = None) -> UserError:
        shown = "" if got is None else f", got {json.dumps(got)[:80]}"
        return UserError(f"{source}: key '{key}' must be {expected}{shown}")

    def obj_keys(o: object, key: str, required: set[str], allowed: set[str]) -> dict:
        if not isinstance(o, dict):
            raise fail(key, "an object", o)
        for k in required:
            if k not in o:
                raise UserError(f"{source}: key '{key}.{k}' is required" if key else f"{source}: key '{k}' is required")
        for k in o:
            if k not in allowed | required:
                where = f"{key}.{k}" if key else k
                raise UserError(f"{source}: key '{where}' is not a spec key (allowed here: {', '.join(sorted(allowed | required))})")
        return o

    def column(o: dict, key: str) -> str:
        c = o.get("column")
        if not isinstance(c, str) or not c:
            raise fail(f"{key}.column", "a non-empty string", c)
        return c

    def str_list(o: object, key: str) -> tuple[str, ...]:
        if not isinstance(o, list) or not o or not all(isinstance(s, str) for s in o):
            raise fail(key, "a non-empty list of strings", o)
        return tuple(o)

    top = obj_keys(obj, "", {"label", "hashing", "features"}, {"weight", "time", "crosses", "description"})
    label = obj_keys(top["label"], "label", {"column"}, {"positive", "negative"})
    label_column = column(label, "label")
    positive = str_list(label["positive"], "label.positive") if "positive" in label else None
    negative = str_list(label["negative"], "label.negative") if "negative" in label else None
    if negative is not None and positive is None:
        raise UserError(f"{source}: key 'label.negative' needs 'label.positive' beside it")
    weight_column = column(obj_keys(top["weight"], "weight", {"column"}, set()), "weight") if "weight" in top else None
    time_column = column(obj_keys(top["time"], "time", {"column"}, set()), "time") if "time" in top else None

    hashing = obj_keys(top["hashing"], "hashing", {"bits"}, {"seed"})
    bits = hashing["bits"]
    if isinstance(bits, bool) or not isinstance(bits, int) or not 1 <= bits <= MAX_BITS:
        raise fail("hashing.bits", f"an integer from 1 to {MAX_BITS}", bits)
    seed = hashing.get("seed", 0)
    if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed <= 0xFFFFFFFF:
        raise fail("hashing.seed", "an integer from 0 to 4294967295", seed)

    feats_raw = top["features"]
    if not isinstance(feats_raw, list) or not feats_raw:
        raise fail("features", "a non-empty list of feature objects", feats_raw)
    features: list[Feature] = []
    for i, f in enumerate(feats_raw):
        key = f"features[{i}]"
        f = obj_keys(f, key, {"column", "kind"}, {"transform", "edges"})
        col = column(f, key)
        kind = f["kind"]
        if kind not in KINDS:
            raise fail(f"{key}.kind", "one of " + ", ".join(KINDS), kind)
        if col in (label_column, weight_column):
            raise UserError(f"{source}: key '{key}.column' names '{col}', which is the label or weight column")
        if any(g.column == col for g in features):
            raise UserError(f"{source}: key '{key}.column' repeats column '{col}'; each column is one feature")
        transform, edges = "identity", None
        if kind != "numeric" and ("transform" in f or "edges" in f):
            raise UserError(f"{source}: key '{key}' has 'transform' or 'edges', which only numeric features take")
        if "transform" in f:
            transform = f["transform"]
            if transform not in TRANSFORMS:
                raise fail(f"{key}.transform", "one of " + ", ".join(TRANSFORMS), transform)
        if "edges" in f:
            if "transform" in f:
                raise UserError(f"{source}: key '{key}' takes 'transform' or 'edges', not both")
            e = f["edges"]
            ok = (isinstance(e, list) and e and all(isinstance(x, (int, float)) and not isinstance(x, bool)
                                                  and math.isfinite(x) for x in e)
                  and all(a < b for a, b in zip(e, e[1:])))
            if not ok:
                raise fail(f"{key}.edges", "a non-empty list of finite numbers in strictly increasing order", e)
            edges = tuple(float(x) for x in e)
        features.append(Feature(col, kind, transform, edges))

    crosses_raw = top.get("crosses", [])
    if not isinstance(crosses_raw, list):
        raise fail("crosses", "a list of lists of feature columns", crosses_raw)
    crosses: list[tuple[str, ...]] = []
    by_col = {f.column: f for f in features}
    for i, c in enumerate(crosses_raw):
        key = f"crosses[{i}]"
        if not isinstance(c, list) or len(c) < 2 or not all(isinstance(s, str) for s in c):
            raise fail(key, "a list of two or more feature columns", c)
        if len(set(c)) != len(c):
            raise fail(key, "a list of distinct feature columns", c)
        for s in c:
            if s not in by_col:
                raise UserError(f"{source}: key '{key}' names '{s}', which is not a feature column of the spec")
            if not by_col[s].one_hot:
                raise UserError(f"{source}: key '{key}' names numeric feature '{s}' without 'edges'; "
                                "only categorical, multi or bucketed numeric features can be crossed")
        crosses.append(tuple(c))

    raw = {"label": {"column": label_column}, "hashing": {"bits": bits, "seed": seed},
           "features": [_feature_json(f) for f in features], "crosses": [list(c) for c in crosses]}
    if positive is not None:
        raw["label"]["positive"] = list(positive)
    if negative is not None:
        raw["label"]["negative"] = list(negative)
    if weight_column:
        raw["weight"] = {"column": weight_column}
    if time_column:
        raw["time"] = {"column": time_column}
    return Spec(label_column, positive, negative, weight_column, time_column, bits, seed,
                tuple(features), tuple(crosses), raw)
