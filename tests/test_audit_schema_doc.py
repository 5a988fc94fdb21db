"""docs/policy.md documents every key of agent.policy.SCHEMA and is in step with it."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from agent.audit import schema_doc
from agent.policy import SCHEMA

DOC = Path(__file__).resolve().parents[1] / "docs" / "policy.md"
ALL = [f"{s}.{k}" for s, f in SCHEMA.items() for k in f]


@pytest.mark.parametrize("dotted", ALL)
def test_key_documented(dotted):
    text = DOC.read_text("utf-8")
    row = re.search(rf"^\| `{re.escape(dotted)}` \|(.+)$", text, re.M)
    assert row, f"{dotted} has no row in docs/policy.md"
    cells = [c.strip() for c in row.group(1).split("|")]
    assert cells[0] and cells[1] and cells[2] and cells[4], f"{dotted}: empty type/default/range/meaning"


def test_every_section_has_a_heading():
    text = DOC.read_text("utf-8")
    for s in SCHEMA:
        assert f"### [{s}]" in text


def test_generated_block_in_step():
    text = DOC.read_text("utf-8")
    assert schema_doc.splice(text) == text, (
        "docs/policy.md is stale; run: python -m agent.audit.schema_doc --write docs/policy.md")


def test_range_read_from_schema():
    # The range column is read back from the schema's own check, not retyped.
    assert schema_doc.range_words(SCHEMA["retention"]["raw_seconds"]) == "≥ 1.0, ≤ 86400.0"
    assert schema_doc.range_words(SCHEMA["privacy"]["epsilon_total"]).startswith("> 0.0")
    assert "`\"week\"`" in schema_doc.range_words(SCHEMA["export"]["time_granularity"])


def test_fingerprint_definition_documented():
    text = DOC.read_text("utf-8")
    assert "SHA-256" in text and "sort_keys=True" in text and 'separators=(",", ":")' in text
