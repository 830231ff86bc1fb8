"""The HTML every patchwood page shares: escaping, headline cards, legend swatches, and the page
itself from the package files in ``assets/`` (``page.html``, the template; ``base.css``, the rules
every page uses; one style sheet per page). Pages are single files with no external assets, so
they open offline; the style sheets are read with :mod:`importlib.resources`, so an installed
package finds them.
"""

from __future__ import annotations

import html
import json
from functools import lru_cache
from importlib import resources
from string import Template
from typing import Any, Iterable

from detector.reporting.drawing import hex_colour

__all__ = ["asset", "card", "esc", "json_script", "page", "swatch"]


@lru_cache(maxsize=None)
def asset(name: str) -> str:
    """The text of one file in ``detector/reporting/assets/``.

    Examples
    --------
    >>> asset("page.html").startswith("<!DOCTYPE html>")
    True
    """
    return resources.files("detector.reporting").joinpath("assets", name).read_text(encoding="utf-8")


def esc(value: Any) -> str:
    """``str(value)`` escaped for HTML text and attribute values.

    Examples
    --------
    >>> esc('<a href="x">')
    '&lt;a href=&quot;x&quot;&gt;'
    """
    return html.escape(str(value), quote=True)


def card(value: Any, name: str, cls: str = "") -> str:
    """One headline card: a big value over its name (``cls`` adds classes).

    Examples
    --------
    >>> card(0.5, "AP", "point")
    '<div class="card point"><div class="value">0.5</div><div class="name">AP</div></div>'
    """
    classes = f"card {cls}" if cls else "card"
    return (f'<div class="{classes}"><div class="value">{esc(value)}</div>'
            f'<div class="name">{esc(name)}</div></div>')


def swatch(rgb: tuple[int, int, int], style: str, text: str) -> str:
    """A legend entry: a box outline in a colour and line style, and what it means."""
    return (f'<span><span class="swatch" style="background:none;border:3px {style} '
            f'{hex_colour(rgb)}"></span>{esc(text)}</span>')


def json_script(element_id: str, data: Any) -> str:
    """``data`` as JSON inside ``<script type="application/json">``, for a page's script to read
    with ``JSON.parse(element.textContent)``. ``<``, ``>`` and ``&`` are written as ``\\u`` escapes,
    so no value (an image name, say) can end the element; non-ASCII text too, so names that are
    not UTF-8 survive.

    Examples
    --------
    >>> print(json_script("d", {"image": "</script>é"}))
    <script type="application/json" id="d">{"image":"\\u003c/script\\u003e\\u00e9"}</script>
    """
    text = json.dumps(data, ensure_ascii=True, allow_nan=False, separators=(",", ":"))
    text = text.replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")
    return f'<script type="application/json" id="{esc(element_id)}">{text}</script>'


def page(title: str, style_sheet: str, body: Iterable[str],
         script: str | Iterable[str] | None = None) -> str:
    """A whole page: ``page.html`` with ``base.css`` and ``style_sheet`` (a file in ``assets/``)
    inlined, and ``body`` (lines of HTML) inside ``<main>``; ``script``, a file in ``assets/`` (or
    several, in order), inlined after it.

    Examples
    --------
    >>> text = page("a <test>", "audit.css", ["<h1>Hello</h1>"])
    >>> "<title>a &lt;test&gt;</title>" in text, "<main>\\n<h1>Hello</h1>\\n</main>" in text
    (True, True)
    """
    style = "\n" + asset("base.css") + asset(style_sheet)
    scripts = [] if script is None else [script] if isinstance(script, str) else list(script)
    code = "".join("\n<script>\n" + asset(name) + "</script>" for name in scripts)
    code += "\n" if scripts else ""
    return Template(asset("page.html")).substitute(title=esc(title), style=style,
                                                   body="\n".join(body), script=code)
