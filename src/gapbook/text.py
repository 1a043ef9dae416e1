"""User text on pages, in figures and in messages: escaped where it lands.

Study names, report titles, variable labels, reason labels, column and level names come
from a params file or a data file; on a page they are text, never markup. Use:

- :func:`md_escape` for text put into Markdown (``IPython.display.Markdown``, generated
  sentences that a notebook shows as Markdown): HTML special characters become entities
  and Markdown/maths punctuation is backslash-escaped, so ``<script>`` stays visible text
  and ``*x*``, ``[a](b)`` or ``$x$`` do not format;
- :func:`html_escape` for text put into HTML (the landing page, HTML tables);
- :func:`plot_escape` for text put into matplotlib titles, labels and tick labels (a ``$``
  would otherwise start mathtext, and an unbalanced one stops the figure);
- :func:`one_line` for text put into a one-line message (control characters escaped).
"""
from __future__ import annotations

import html
import re
from typing import Any

__all__ = ["one_line", "html_escape", "md_escape", "md_code", "plot_escape"]

# CommonMark lets any ASCII punctuation be backslash-escaped; these are the ones that
# format (emphasis, links, headings, lists, tables, code, maths in Jupyter's renderer).
_MARKDOWN_PUNCTUATION = re.compile(r"([\\`*_{}\[\]()#+\-.!|~^$:])")
_LINE_BREAKS = re.compile(r"[\r\n\t\v\f\x85\u2028\u2029]+")


def one_line(text: Any, limit: int = 0) -> str:
    """``text`` on one printable line: control and format characters shown as ``\\xNN``/``\\uNNNN``.

    ``limit`` > 0 cuts the result to that many characters (ending in ``...``).

    Parameters
    ----------
    text : object
        Any value; it is converted with ``str``.
    limit : int
        The most characters kept (0: no limit).

    Returns
    -------
    str
    """
    out = []
    for ch in str(text):
        if ch.isprintable() or ch == " ":
            out.append(ch)
        elif ord(ch) < 0x100:
            out.append(f"\\x{ord(ch):02x}")
        else:
            out.append(f"\\u{ord(ch):04x}")
    flat = "".join(out)
    return flat if not limit or len(flat) <= limit else flat[: max(limit - 3, 0)] + "..."


def html_escape(text: Any) -> str:
    """``text`` safe inside HTML element content and quoted attribute values.

    Parameters
    ----------
    text : object
        Any value; it is converted with ``str``.

    Returns
    -------
    str
    """
    return html.escape(str(text), quote=True)


def md_escape(text: Any) -> str:
    """``text`` safe inside Markdown: shown literally, never as markup, on one line.

    Parameters
    ----------
    text : object
        Any value; it is converted with ``str``.

    Returns
    -------
    str
    """
    flat = _LINE_BREAKS.sub(" ", str(text))
    flat = one_line(flat)  # any control character left is shown escaped, not passed through
    # punctuation first, entities second: an entity's own '#' must not be escaped
    escaped = _MARKDOWN_PUNCTUATION.sub(r"\\\1", flat)
    return html.escape(escaped, quote=False).replace('"', "&quot;")


def md_code(text: Any) -> str:
    """``text`` as inline code in Markdown (for expressions and formulas), shown literally.

    Parameters
    ----------
    text : object
        Any value; it is converted with ``str``.

    Returns
    -------
    str
    """
    flat = one_line(_LINE_BREAKS.sub(" ", str(text)))
    # A code span cannot hold a backtick run of its own length; entities are not decoded inside it,
    # so the text is HTML-escaped as an HTML <code> element instead.
    return f"<code>{html.escape(flat, quote=True)}</code>"


def plot_escape(text: Any) -> str:
    """``text`` for a matplotlib title, label or tick label: ``$`` never starts mathtext.

    Parameters
    ----------
    text : object
        Any value; it is converted with ``str``.

    Returns
    -------
    str
    """
    return one_line(_LINE_BREAKS.sub(" ", str(text))).replace("$", r"\$")
