"""agent.contracts: the JSON Schema documents and the messages of validate()."""

from __future__ import annotations

import json
import tomllib

import pytest
from jsonschema import Draft202012Validator

from agent import contracts
from agent.contracts import ContractError, apply_defaults, validate
from agent.errors import DataError
from agent.policy import bundled_policy_path


@pytest.mark.parametrize("name", contracts.SCHEMA_NAMES)
def test_every_schema_is_valid_draft_2020_12(name):
    # The JSON Schema 2020-12 meta-schema (shipped with jsonschema) as the reference.
    doc = contracts.schema(name)
    assert doc["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    Draft202012Validator.check_schema(doc)


@pytest.mark.parametrize("name", ["default", "strict"])
def test_shipped_policies_validate_with_a_plain_2020_12_validator(name):
    # What a board member would do in another language: TOML -> JSON -> any validator.
    doc = tomllib.loads(bundled_policy_path(name).read_text("utf-8"))
    doc = json.loads(json.dumps(doc))
    errors = list(Draft202012Validator(contracts.schema("policy")).iter_errors(doc))
    assert errors == []


def test_unknown_contract_name_is_refused():
    with pytest.raises(ValueError, match="unknown contract"):
        contracts.schema("nonesuch")


def _policy(**edits):
    doc = tomllib.loads(bundled_policy_path("default").read_text("utf-8"))
    for dotted, value in edits.items():
        section, key = dotted.split("__")
        doc[section][key] = value
    return doc


def test_error_names_source_key_and_expectation():
    with pytest.raises(ContractError) as e:
        validate("policy", _policy(quiz__options=1), "p.json")
    assert e.value.key == "quiz.options"
    assert str(e.value) == "p.json: [quiz.options] expected >= 2, got 1"
    assert isinstance(e.value, DataError)


def test_json_syntax_calls_an_object_an_object():
    doc = _policy()
    doc["episodes"] = 3
    with pytest.raises(ContractError, match=r"\[episodes\] expected an object, got an integer"):
        validate("policy", doc, "p.json")


def test_toml_syntax_words_values_and_tables():
    doc = _policy(quiz__options=1)
    with pytest.raises(ContractError, match=r"\[quiz.options\] value 1 is out of range: expected >= 2"):
        validate("policy", doc, "p.toml", syntax="toml")
    doc = _policy()
    doc["episodes"] = 3
    with pytest.raises(ContractError, match=r"\[episodes\] expected a table \[episodes\], got int"):
        validate("policy", doc, "p.toml", syntax="toml")


def test_non_finite_number_is_refused():
    with pytest.raises(ContractError, match=r"\[retention.raw_seconds\] expected a finite number, got inf"):
        validate("policy", _policy(retention__raw_seconds=float("inf")), "p.json")


def test_error_class_can_be_chosen():
    class Mine(DataError):
        def __init__(self, source, key, message):
            super().__init__(f"{source}|{key}|{message}")

    with pytest.raises(Mine, match=r"^x\|quiz.foils\|expected one of 'uniform', 'frequency', got 'often'"):
        validate("policy", _policy(quiz__foils="often"), "x", error=Mine)


def test_apply_defaults_fills_missing_sections_and_keys():
    doc = {"policy": {"schema": 1, "name": "n", "version": "v"}}
    filled = apply_defaults("policy", doc)
    assert filled["retention"]["raw_seconds"] == 30.0
    assert filled["graph"]["nodes"][0] == "hour"
    assert "retention" not in doc  # the input is not changed


def test_policy_types_mirror_the_schema():
    # agent/policy_types.py is written by hand from policy.json: the same sections,
    # the same keys in the same order, and Python types matching the JSON types.
    import dataclasses
    import typing

    from agent import policy_types

    py = {"number": float, "integer": int, "string": str, "boolean": bool, "array": tuple[str, ...]}
    doc = contracts.schema("policy")
    assert list(policy_types.SECTION_TYPES) == list(doc["properties"])
    for section, cls in policy_types.SECTION_TYPES.items():
        hints = typing.get_type_hints(cls)
        keys = list(doc["properties"][section]["properties"])
        assert [f.name for f in dataclasses.fields(cls)] == keys
        for key in keys:
            assert hints[key] == py[doc["properties"][section]["properties"][key]["type"]], (section, key)


def test_loaded_policy_is_frozen():
    from agent.policy import load_policy

    p = load_policy(bundled_policy_path("default"))
    with pytest.raises(dataclasses_frozen_error()):
        p.retention.raw_seconds = 1.0  # type: ignore[misc]
    with pytest.raises(AttributeError):
        p.retention = None  # type: ignore[misc]
    assert isinstance(p.export.allow, tuple)


def dataclasses_frozen_error():
    import dataclasses

    return dataclasses.FrozenInstanceError


def test_example_board_limits_validate_with_a_plain_2020_12_validator(repo):
    doc = tomllib.loads((repo / "policies" / "board-limits.example.toml").read_text("utf-8"))
    assert list(Draft202012Validator(contracts.schema("board-limits")).iter_errors(doc)) == []


def test_a_built_payload_validates_with_a_plain_2020_12_validator():
    # The researcher's side in another language: the opened payload against payload.json.
    from _bundle_fixtures import make_payload

    doc = json.loads(json.dumps(make_payload()))
    assert list(Draft202012Validator(contracts.schema("payload")).iter_errors(doc)) == []


def test_unexpected_map_key_names_the_key():
    from _bundle_fixtures import make_payload

    p = make_payload()
    p["counts"]["hours_by_kind"]["gps"] = 1
    with pytest.raises(ContractError, match=r"\[counts.hours_by_kind.gps\] unexpected key: expected a non-time"):
        validate("payload", p, "b.json")


def test_a_doc_without_its_generated_block_markers_is_refused_by_name():
    from agent.contracts import docblock

    with pytest.raises(ValueError, match=r"docs/x\.md has no generated block markers"):
        docblock.splice("no markers here", "<!-- b -->", "<!-- e -->", "<!-- b -->t<!-- e -->", name="docs/x.md")
    assert docblock.splice("a<!-- b -->old<!-- e -->z", "<!-- b -->", "<!-- e -->", "<!-- b -->new<!-- e -->",
                           name="docs/x.md") == "a<!-- b -->new<!-- e -->z"
