"""Canonical JSON bytes for checksums that any language can recompute.

The form is the JSON Canonicalization Scheme ("JSON Canonicalization Scheme (JCS)", RFC 8785, 2020):
no whitespace; object keys sorted by their UTF-16 code units; strings escaped as ECMAScript's
``JSON.stringify`` does (``\\"``, ``\\\\``, ``\\b \\f \\n \\r \\t``, other control characters as
``\\u00xx`` in lower-case hex, everything else as UTF-8); numbers as IEEE 754 doubles written by
ECMAScript's Number-to-String (shortest round-trip digits, plain notation for exponents from -7 to 20,
else ``d.ddde+N``). A JCS library in another language (or ``JSON.stringify`` of a key-sorted object in
JavaScript) gives the same bytes.
"""

from __future__ import annotations

import json
import math
from decimal import Decimal

_EXACT_INT = 2**53


def _number(x) -> str:
    """ECMAScript Number::toString of the double ``x`` (RFC 8785 section 3.2.2.3)."""
    if isinstance(x, int) and abs(x) > _EXACT_INT:
        raise ValueError(f"canonical JSON: integer {x} is not exactly representable as a double")
    x = float(x)
    if not math.isfinite(x):
        raise ValueError("canonical JSON: NaN and infinity have no JSON form")
    if x == 0.0:
        return "0"
    sign, digits, exp = Decimal(repr(abs(x))).normalize().as_tuple()
    s = "".join(map(str, digits))
    k = len(s)
    n = exp + k  # x = 0.s * 10^n
    if k <= n <= 21:
        body = s + "0" * (n - k)
    elif 0 < n <= 21:
        body = s[:n] + "." + s[n:]
    elif -6 < n <= 0:
        body = "0." + "0" * (-n) + s
    else:
        e = n - 1
        body = (s[0] + ("." + s[1:] if k > 1 else "")) + ("e+" if e >= 0 else "e-") + str(abs(e))
    return ("-" if x < 0 else "") + body


def _encode(obj, out: list[str]) -> None:
    if obj is None:
        out.append("null")
    elif obj is True:
        out.append("true")
    elif obj is False:
        out.append("false")
    elif isinstance(obj, str):
        out.append(json.dumps(obj, ensure_ascii=False))
    elif isinstance(obj, (int, float)):
        out.append(_number(obj))
    elif isinstance(obj, (list, tuple)):
        out.append("[")
        for i, v in enumerate(obj):
            if i:
                out.append(",")
            _encode(v, out)
        out.append("]")
    elif isinstance(obj, dict):
        bad = [k for k in obj if not isinstance(k, str)]
        if bad:
            raise ValueError(f"canonical JSON: object keys must be strings, got {bad[0]!r}")
        out.append("{")
        for i, key in enumerate(sorted(obj, key=lambda k: k.encode("utf-16-be"))):
            if i:
                out.append(",")
            out.append(json.dumps(key, ensure_ascii=False))
            out.append(":")
            _encode(obj[key], out)
        out.append("}")
    else:
        raise ValueError(f"canonical JSON: {type(obj).__name__} is not a JSON value")


def canonical_json(obj) -> bytes:
    """The RFC 8785 canonical UTF-8 bytes of a JSON value.

    Parameters
    ----------
    obj : dict, list, str, int, float, bool or None
        The value (nested).

    Returns
    -------
    bytes
        Its canonical form: sorted keys by UTF-16 code units, no whitespace, numbers in the
        ECMAScript shortest form.

    Raises
    ------
    ValueError
        For NaN, infinity, an integer beyond 2^53, a non-string key or a value JSON cannot hold.

    References
    ----------
    "JSON Canonicalization Scheme (JCS)", RFC 8785, IETF, 2020.
    """
    out: list[str] = []
    _encode(obj, out)
    return "".join(out).encode("utf-8")
