"""agent.templates: report pages and tables through jinja2 with autoescape."""

from __future__ import annotations

from agent.templates import Markup, esc, page, table


def test_table_cells_are_escaped():
    # The finding: table() used to put cells in unescaped.
    html = table(["name"], [["<script>alert(1)</script>"], ['a "quoted" & <b>']])
    assert "<script>" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "a &#34;quoted&#34; &amp; &lt;b&gt;" in html


def test_markup_cells_are_kept_and_escaped_values_not_escaped_twice():
    html = table(["result", "who"], [[Markup('<span class="pass">pass</span>'), esc("<P&1>")]])
    assert '<span class="pass">pass</span>' in html
    assert "&lt;P&amp;1&gt;" in html and "&amp;lt;" not in html


def test_numeric_columns_are_marked():
    html = table(["k", "n"], [["a", 3]], num_cols=(1,))
    assert '<td class="num">3</td>' in html and "<td>a</td>" in html


def test_page_escapes_the_title_and_keeps_the_body():
    doc = page("A <report>", Markup("<h1>ok</h1>"), css="body { margin: 0; }")
    assert doc.startswith("<!DOCTYPE html>")
    assert "<title>A &lt;report&gt;</title>" in doc
    assert "<h1>ok</h1>" in doc and "body { margin: 0; }" in doc
