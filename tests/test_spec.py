"""Spec validation: the hand-written validator against the JSON Schema (jsonschema library)."""

import copy
import json
from pathlib import Path

import jsonschema
import pytest

from trainer.errors import UserError
from trainer.spec import load_spec, parse_spec

from conftest import SMALL_SPEC

SCHEMA = json.loads((Path(__file__).parents[1] / "schemas" / "feature-spec.schema.json").read_text())


def mutate(path, value):
    spec = copy.deepcopy(SMALL_SPEC)
    node = spec
    for k in path[:-1]:
        node = node[k]
    if value is KeyError:
        del node[path[-1]]
    else:
        node[path[-1]] = value
    return spec


# (mutation, key the message must name); each is also rejected by the JSON Schema unless marked
BAD = [
    ((("hashing", "bits"), 31), "hashing.bits"),
    ((("hashing", "bits"), 0), "hashing.bits"),
    ((("hashing", "seed"), -1), "hashing.seed"),
    ((("hashing", "bits"), KeyError), "hashing.bits"),
    ((("label",), KeyError), "label"),
    ((("features",), []), "features"),
    ((("features", 0, "kind"), "text"), "features[0].kind"),
    ((("features", 3, "transform"), "sqrt"), "features[3].transform"),
    ((("features", 4, "edges"), [3, 1]), "features[4].edges"),
    ((("features", 0, "edges"), [1]), "features[0]"),
    ((("crosses",), [["shop"]]), "crosses[0]"),
    ((("colour",), 1), "colour"),
]


@pytest.mark.parametrize("mutation,key", BAD)
def test_bad_specs_name_the_key(mutation, key):
    spec = mutate(*mutation)
    with pytest.raises(UserError, match=key.replace("[", r"\[").replace("]", r"\]")):
        parse_spec(spec)
    if mutation[0] != ("features", 4, "edges"):  # ordering of edges is beyond JSON Schema
        with pytest.raises(jsonschema.ValidationError):
            jsonschema.validate(spec, SCHEMA)


def test_cross_of_unknown_or_plain_numeric_feature():
    # semantic rules JSON Schema cannot state: crosses name one-hot features of the spec
    with pytest.raises(UserError, match="not a feature column"):
        parse_spec(mutate(("crosses",), [["shop", "nope"]]))
    with pytest.raises(UserError, match="without 'edges'"):
        parse_spec(mutate(("crosses",), [["shop", "amount"]]))


def test_good_spec_passes_both_and_fingerprint_is_stable(tmp_path):
    jsonschema.validate(SMALL_SPEC, SCHEMA)  # reference: the JSON Schema, via jsonschema
    a = parse_spec(SMALL_SPEC)
    reordered = json.loads(json.dumps(SMALL_SPEC, sort_keys=True))
    assert parse_spec(reordered).fingerprint() == a.fingerprint()
    assert parse_spec(mutate(("hashing", "seed"), 1)).fingerprint() != a.fingerprint()
    assert a.n_buckets == 4096


def test_spec_file_errors(tmp_path):
    with pytest.raises(UserError, match="not found"):
        load_spec(tmp_path / "missing.json")
    bad = tmp_path / "bad.json"
    bad.write_text("{not json")
    with pytest.raises(UserError, match="not valid JSON"):
        load_spec(bad)
