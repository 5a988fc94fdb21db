"""agent.contracts.compiled answers exactly as jsonschema (the reference validator) does.

The compiled predicate is an optimisation of ``contracts.is_valid``; jsonschema
(Draft202012Validator) is the reference for every check below, on generated
instances (hypothesis) and on hand-picked edge cases of draft 2020-12.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from jsonschema import Draft202012Validator

from agent import contracts
from agent.contracts.compiled import compile_schema

LEDGER = json.loads((Path(__file__).resolve().parent.parent / "agent" / "contracts" / "schemas"
                     / "ledger-entry.json").read_text("utf-8"))
PARTS = sorted(k for k in LEDGER["$defs"] if k.startswith("event-"))
NAMES = sorted({k for p in PARTS for k in LEDGER["$defs"][p]["properties"]} | {"extra", "Place", "place"})

# values near the edges of the ledger's field types, and of JSON's
SCALARS = st.one_of(
    st.none(), st.booleans(), st.integers(-3, 3), st.integers(2 ** 53 - 2, 2 ** 53 + 2),
    st.floats(allow_nan=False, allow_infinity=False), st.sampled_from([0.0, -0.0, 1.0, 1.5, 1e300, -5.0]),
    st.text(max_size=5), st.sampled_from(["0" * 16, "a" * 32, "f" * 64, "F" * 64, "0" * 15, "audio", "video",
                                          "damaged_line", "Bad Code", "0.1.0", "x" * 65]),
)
VALUES = st.recursive(SCALARS, lambda inner: st.one_of(st.lists(inner, max_size=3),
                                                       st.dictionaries(st.sampled_from(NAMES), inner, max_size=3)),
                      max_leaves=6)
INSTANCES = st.one_of(st.dictionaries(st.sampled_from(NAMES), VALUES, max_size=6), VALUES)


def reference(schema_part):
    return Draft202012Validator(LEDGER).evolve(schema=schema_part)


@pytest.mark.parametrize("part", PARTS)
def test_every_ledger_part_compiles(part):
    assert compile_schema(LEDGER, LEDGER["$defs"][part]) is not None


def test_the_whole_ledger_schema_compiles():
    assert compile_schema(LEDGER) is not None


@pytest.mark.parametrize("part", PARTS)
@settings(max_examples=150, deadline=None)
@given(obj=INSTANCES)
def test_ledger_parts_agree_with_jsonschema(part, obj):
    ref = reference({"$ref": f"#/$defs/{part}"})
    assert compile_schema(LEDGER, LEDGER["$defs"][part])(obj) == ref.is_valid(obj)


@settings(max_examples=300, deadline=None)
@given(fields=st.dictionaries(st.sampled_from(NAMES), VALUES, max_size=5),
       event=st.sampled_from([p[len("event-"):] for p in PARTS] + ["nope"]),
       v=st.sampled_from([1, 2, 3, True, 2.0]))
def test_whole_entries_agree_with_jsonschema(fields, event, v):
    entry = {"v": v, "seq": 0, "prev": "0" * 64, "t": 1.0, "event": event, "hash": "0" * 64, "sig": "0" * 128,
             **fields}
    assert compile_schema(LEDGER)(entry) == Draft202012Validator(LEDGER).is_valid(entry)


# -- edge cases of draft 2020-12, each against the reference ------------------------------

EDGES = [
    ({"type": "integer"}, [1, 1.0, 1.5, True, "1", None]),
    ({"type": "number"}, [1, 1.5, True, "1"]),
    ({"enum": [1, 2]}, [1, 1.0, True, 2, "1", [1]]),
    ({"const": False}, [False, 0, None, 0.0]),
    ({"type": ["string", "null"]}, ["a", None, 0]),
    ({"pattern": "^a"}, ["abc", "bac", 5, None]),
    ({"pattern": "b"}, ["abc", "xyz"]),  # search, not match
    ({"minLength": 2, "maxLength": 3}, ["a", "ab", "abcd", "\U0001f600\U0001f600", 12]),
    ({"minimum": 0, "exclusiveMaximum": 10}, [0, -1, 10, 9.99, "5", True]),
    ({"exclusiveMinimum": 0, "maximum": 1}, [0, 0.5, 1, 1.01]),
    ({"required": ["a"]}, [{"a": 1}, {}, [], "a"]),
    ({"properties": {"a": {"type": "string"}}, "additionalProperties": False}, [{"a": "x"}, {"a": 1}, {"b": 1}, 3]),
    ({"additionalProperties": {"type": "integer"}}, [{"x": 1}, {"x": "1"}, {}]),
    ({"propertyNames": {"pattern": "^[a-z]+$"}}, [{"ab": 1}, {"Ab": 1}, {}]),
    ({"anyOf": [{"type": "null"}, {"type": "number", "minimum": 0}]}, [None, 0, -1, "x"]),
    ({"allOf": [{"type": "number"}, {"maximum": 3}]}, [2, 4, "x"]),
    ({"if": {"type": "string"}, "then": {"minLength": 2}, "else": {"type": "null"}}, ["ab", "a", None, 3]),
    ({"if": {"required": ["k"]}, "then": {"required": ["m"]}}, [{"k": 1}, {"k": 1, "m": 2}, {}]),
    (True, [1, None]),
    (False, [1, None]),
]


@pytest.mark.parametrize(("schema", "instances"), EDGES, ids=[json.dumps(s) for s, _ in EDGES])
def test_edge_cases_agree_with_jsonschema(schema, instances):
    check = compile_schema({}, schema)
    ref = Draft202012Validator(schema)
    for x in instances:
        assert check(x) == ref.is_valid(x), x


def test_unknown_keyword_is_left_to_jsonschema():
    assert compile_schema({}, {"type": "string", "format": "date"}) is None


def test_recursive_schema_is_left_to_jsonschema():
    doc = {"$defs": {"node": {"type": "object", "properties": {"next": {"$ref": "#/$defs/node"}}}}}
    assert compile_schema(doc, {"$ref": "#/$defs/node"}) is None


def test_is_valid_uses_jsonschema_for_a_schema_it_cannot_compile():
    # the policy schema uses "format" (IANA time zones), so it is not compiled; is_valid still answers
    assert contracts.is_valid("policy", {}) is Draft202012Validator(contracts.schema("policy")).is_valid({})


def test_is_valid_refuses_an_unknown_part():
    with pytest.raises(ValueError, match="has no part 'event-nope'"):
        contracts.is_valid("ledger-entry", {}, part="event-nope")
