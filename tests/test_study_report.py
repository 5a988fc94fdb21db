"""The cohort page's HTML: every value from the data is escaped (jinja2 autoescape).

Checked with Python's own HTML parser (``html.parser``, the stdlib reference
for HTML tokenising): a hostile value must come back as the text of its cell,
and must not become an element or an attribute.
"""

from __future__ import annotations

from html.parser import HTMLParser

import pytest

from agent.policy_summary import CAUTIONS
from agent.study.report import render_page, table_view

HOSTILE = '<script>alert("x")</script> & <img src=x onerror=alert(1)>'


class _Cells(HTMLParser):
    """Collects the text of every <td>, the tags opened and every attribute name seen."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.cells: list[str] = []
        self.tags: list[str] = []
        self.attrs: set[str] = set()
        self._in_td = False

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.update(a for a, _ in attrs)
        if tag == "td":
            self._in_td = True
            self.cells.append("")

    def handle_endtag(self, tag):
        if tag == "td":
            self._in_td = False

    def handle_data(self, data):
        if self._in_td:
            self.cells[-1] += data


def _context(**over):
    row = {"pseudonym": HOSTILE, "seq": 1, "hours": 2.5, "note": None}
    ctx = {"study_id": "s<1>", "version": "0", "n_enrolled": 1, "n_sending": 1, "n_opened": 1,
           "plots": {"accuracy": False, "parameters": False, "coverage": False},
           "quiz": table_view([], ["pseudonym"], empty="No quiz summaries yet."),
           "coverage": table_view([row], ["pseudonym", "seq", "hours", "note"]),
           "compliance": table_view([], ["pseudonym"]),
           "withdrawn": [], "cautions": list(CAUTIONS)}
    ctx.update(over)
    return ctx


def test_cell_content_is_escaped_and_comes_back_as_text():
    page = render_page(_context())
    p = _Cells()
    p.feed(page)
    assert HOSTILE in p.cells  # the parser reads the escaped cell back as the original text
    assert "script" not in p.tags and p.tags.count("img") == 0
    assert "onerror" not in p.attrs
    assert "&lt;script&gt;" in page and "&amp;" in page


def test_cells_are_formatted_as_text():
    # None as a dash, floats to three significant figures (common practice, no source).
    p = _Cells()
    p.feed(render_page(_context()))
    assert p.cells[1:] == ["1", "2.5", "—"]


def test_study_id_and_withdrawn_names_are_escaped():
    page = render_page(_context(withdrawn=[HOSTILE]))
    p = _Cells()
    p.feed(page)
    assert "script" not in p.tags and "onerror" not in p.attrs
    assert "<title>lethe cohort report: s&lt;1&gt;</title>" in page


def test_page_carries_the_cautions():
    page = render_page(_context())
    assert page.count('class="caution"') == len(CAUTIONS) and "NIST SP 800-88" in page


def test_long_table_says_how_many_rows_are_left_out():
    view = table_view([{"a": i} for i in range(7)], ["a"], limit=5)
    assert len(view["rows"]) == 5 and view["more"] == 2
    assert "… and 2 more rows" in render_page(_context(coverage=view))


def test_empty_table_shows_its_message():
    assert "No quiz summaries yet." in render_page(_context())


def test_negative_row_limit_is_refused():
    with pytest.raises(ValueError, match="non-negative"):
        table_view([], ["a"], limit=-1)
