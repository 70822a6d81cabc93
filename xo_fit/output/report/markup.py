"""The report's HTML pieces: text is escaped unless it is :class:`Markup` the report built itself.

Every value a result file carries (a job name, a stage, a part's source, a prune step) reaches the page
through :func:`text`, i.e. :func:`html.escape`; only markup made by these helpers passes unescaped.
"""

from __future__ import annotations

import base64
import html
import math


class Markup(str):
    """HTML the report made itself (never text from a file): passes :func:`text` unescaped."""


def esc(x) -> str:
    """``x`` as escaped HTML text (quotes too)."""
    return html.escape(str(x))


def text(x) -> Markup:
    """``x`` as HTML: escaped, unless it is :class:`Markup`; None is empty."""
    if x is None:
        return Markup("")
    return x if isinstance(x, Markup) else Markup(esc(x))


def num(x, fmt: str, missing: str = "") -> str:
    """A number formatted with ``fmt``; ``missing`` for None; anything else (a hand-edited result file's text) as
    it is, for :func:`text` to escape."""
    if x is None:
        return missing
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        return str(x)
    if not math.isfinite(float(x)):
        return str(x)
    return format(x, fmt)


def join(*parts) -> Markup:
    """Parts as HTML, each escaped unless it is :class:`Markup`."""
    return Markup("".join(text(p) for p in parts))


def tag(name: str, *parts, attrs: str = "") -> Markup:
    """``<name attrs>parts</name>``; ``attrs`` is the report's own (never a file's)."""
    return Markup(f"<{name}{' ' + attrs if attrs else ''}>{join(*parts)}</{name}>")


def heading(title) -> Markup:
    """An ``<h2>`` heading, its text escaped."""
    return tag("h2", title)


def para(*parts) -> Markup:
    """A ``<p>`` paragraph of the parts (each escaped unless it is Markup)."""
    return tag("p", *parts)


def bold(x) -> Markup:
    """``<b>x</b>``, x escaped unless it is Markup."""
    return tag("b", x)


def code(x) -> Markup:
    """``<code>x</code>``, x escaped unless it is Markup."""
    return tag("code", x)


def bullets(items, empty: str | None = None) -> Markup:
    """An unordered list; ``empty`` as its one item where there are none ("" where the list is left out)."""
    items = list(items)
    if not items:
        return tag("ul", tag("li", empty)) if empty else Markup("")
    return tag("ul", *(tag("li", x) for x in items))


def table(heads, rows, cls: str = "") -> Markup:
    """A table: ``heads`` the column heads, ``rows`` lists of cells (each escaped unless :class:`Markup`)."""
    head = tag("tr", *(tag("th", h) for h in heads))
    body = [tag("tr", *(tag("td", c) for c in row)) for row in rows]
    return tag("table", head, *body, attrs=f'class="{cls}"' if cls else "")


def section(title, *parts) -> Markup:
    """A titled section: its heading, then its parts."""
    return join(heading(title), *parts)


def image(alt: str, png: bytes) -> Markup:
    """A PNG inline (a data: URI), the page stays one file."""
    return Markup(f'<figure><img alt="{esc(alt)}" src="data:image/png;base64,{base64.b64encode(png).decode()}">'
                  "</figure>")
