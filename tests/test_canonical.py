"""scoring_sha256: the canonical JSON under it (RFC 8785) and what the checksum covers."""

import hashlib
import json
import struct

import pytest

from trainer.canonical import canonical_json
from trainer.errors import UserError
from trainer.api import export as export_model
from trainer.export import scoring_sha256
from trainer.model import load_model
from trainer.spec import parse_spec

from conftest import SMALL_SPEC, make_model
from test_reference_scorer import ref

# RFC 8785 ("JSON Canonicalization Scheme (JCS)", 2020), Appendix B: IEEE 754 bit patterns and their
# serialization (also checked against Node's JSON.stringify when these lines were written).
RFC8785_NUMBERS = [
    ("0000000000000000", "0"), ("8000000000000000", "0"), ("0000000000000001", "5e-324"),
    ("8000000000000001", "-5e-324"), ("7fefffffffffffff", "1.7976931348623157e+308"),
    ("ffefffffffffffff", "-1.7976931348623157e+308"), ("4340000000000000", "9007199254740992"),
    ("c340000000000000", "-9007199254740992"), ("4430000000000000", "295147905179352830000"),
    ("44b52d02c7e14af5", "9.999999999999997e+22"), ("44b52d02c7e14af6", "1e+23"),
    ("44b52d02c7e14af7", "1.0000000000000001e+23"), ("444b1ae4d6e2ef4e", "999999999999999700000"),
    ("444b1ae4d6e2ef4f", "999999999999999900000"), ("444b1ae4d6e2ef50", "1e+21"),
    ("3eb0c6f7a0b5ed8c", "9.999999999999997e-7"), ("3eb0c6f7a0b5ed8d", "0.000001"),
    ("41b3de4355555553", "333333333.3333332"), ("41b3de4355555554", "333333333.33333325"),
    ("41b3de4355555555", "333333333.3333333"), ("41b3de4355555556", "333333333.3333334"),
    ("41b3de4355555557", "333333333.33333343"), ("becbf647612f3696", "-0.0000033333333333333333"),
    ("43143ff3c1cb0959", "1424953923781206.2"),
]


@pytest.mark.parametrize("bits,text", RFC8785_NUMBERS)
def test_numbers_as_rfc8785_appendix_b(bits, text):
    x = struct.unpack(">d", bytes.fromhex(bits))[0]
    assert canonical_json(x) == text.encode()
    assert ref.jcs_number(x) == text  # the reference scorer's own port agrees


def test_objects_strings_and_refusals():
    # RFC 8785 section 3.2.3: keys sorted by UTF-16 code units (U+1F600 sorts before U+FB33, unlike
    # by code point); section 3.2.2.2: JSON.stringify's string escapes, non-ASCII kept as UTF-8.
    obj = {"\ufb33": 1, "\U0001f600": 2, "b": [True, None, 1.0, "é\n\"\\\x1f"], "a": {}}
    expected = '{"a":{},"b":[true,null,1,"é\\n\\"\\\\\\u001f"],"\U0001f600":2,"\ufb33":1}'.encode()
    assert canonical_json(obj) == expected
    assert ref.jcs(obj).encode() == expected
    for bad in (float("nan"), float("inf"), 2**60, {1: 2}, {"a": object()}):
        with pytest.raises(ValueError):
            canonical_json(bad)


@pytest.fixture
def export(tmp_path):
    make_model(parse_spec(SMALL_SPEC), seed=3).save(tmp_path / "m")
    return export_model(tmp_path / "m", tmp_path / "e")


def test_scoring_sha256_as_documented(export):
    # README "Export format": SHA-256 of the canonical JSON of exactly these keys.
    doc = json.loads((export / "model.json").read_text())
    keys = ("format", "version", "loss", "link", "score", "calibration", "intercept", "hashing", "spec", "n_buckets",
            "weights_file", "weights_columns", "absent_bucket_weight", "weights_sha256")
    assert doc["scoring_sha256"] == hashlib.sha256(canonical_json({k: doc[k] for k in keys})).hexdigest()
    assert doc["scoring_sha256"] == scoring_sha256(doc)


def test_only_scoring_fields_are_covered(export):
    path = export / "model.json"
    doc = json.loads(path.read_text())
    doc["holdout"] = {"rows": 1}
    doc["created"] = "2030-01-01T00:00:00Z"
    path.write_text(json.dumps(doc, indent=4, sort_keys=True))  # other layout, other descriptive fields
    load_model(export)
    ref.load_export(export)
    doc["intercept"] += 1e-12
    path.write_text(json.dumps(doc))
    with pytest.raises(UserError, match="model.json: the fields that decide a score"):
        load_model(export)
    with pytest.raises(ValueError, match="scoring_sha256"):
        ref.load_export(export)
