"""Shared jinja2 templates for the HTML reports (board, cohort), with autoescape on.

Every value put into a template is escaped unless it is :class:`markupsafe.Markup`
(HTML built on purpose, from escaped parts).  :func:`esc` escapes and marks the
result, so an escaped value is never escaped twice.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from functools import cache

from markupsafe import Markup, escape

__all__ = ["Markup", "esc", "page", "render", "table"]


@cache
def _env():
    import jinja2

    return jinja2.Environment(loader=jinja2.PackageLoader("agent", "templates"),
                              autoescape=jinja2.select_autoescape(["html"], default=True),
                              undefined=jinja2.StrictUndefined, keep_trailing_newline=True)


def esc(x) -> Markup:
    """``x`` as escaped HTML text (quotes too), marked safe for the templates."""
    return escape(str(x))


def page(title: str, body: Markup | str, css: str = "") -> str:
    """A complete HTML document: ``title`` is escaped, ``body`` must be Markup (built from escaped parts)."""
    return _env().get_template("report.html").render(title=title, css=Markup(css), body=Markup(body))


def render(name: str, **context) -> str:
    """Render the package template ``name`` (autoescape on) with ``context``."""
    return _env().get_template(name).render(**context)


def table(header: Sequence, rows: Iterable[Sequence], num_cols: Iterable[int] = (), cls: str = "") -> Markup:
    """An HTML table; every cell is escaped unless it is Markup."""
    return Markup(_env().get_template("table.html").render(header=list(header), rows=[list(r) for r in rows],
                                                           num_cols=set(num_cols), cls=cls).rstrip("\n"))
