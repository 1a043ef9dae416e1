"""User text on pages, in figures and in messages: escaped where it lands.

Study names, report titles, variable labels, reason labels, column and level names come
from a params file or a data file; on a page they are text, never markup. Use:

- :func:`md_escape` for text put into Markdown (``IPython.display.Markdown``, generated
  sentences that a notebook shows as Markdown): HTML special characters become entities
  and Markdown/maths punctuation is backslash-escaped, so ``<script>`` stays visible text
  and ``*x*``, ``[a](b)`` or ``$x$`` do not format;
- :func:`html_escape` for text put into HTML (the landing page, HTML tables);
- :func:`show_invisible` over a whole page: bidirectional controls in a table cell that came
  from the data are shown, not obeyed;
- :func:`one_line` for text put into a one-line message (control characters escaped);
- :func:`spreadsheet_safe` for text put into a record's ``tables/*.csv`` (a cell that a
  spreadsheet would read as a formula starts with a single quote), and
  :func:`spreadsheet_original` to read such a cell back as it was.

Figures need no escaping: :mod:`gapbook.plots` turns matplotlib's mathtext off for every
figure, so a ``$`` in a title, label or tick label is drawn as it is.
"""
from __future__ import annotations

import html
import math
import numbers
import re
from typing import Any

__all__ = ["one_line", "show_invisible", "html_escape", "md_escape", "md_code", "level_text",
           "spreadsheet_safe", "spreadsheet_original", "counted", "quantity", "first_upper"]

# CommonMark lets any ASCII punctuation be backslash-escaped. Escaped everywhere: what formats
# inside a line (code, emphasis, links and images, strikethrough, maths in Jupyter's renderer,
# table cells, autolinked e-mail addresses) and raw HTML and entities ('<', '>', '&'). Backslash
# escapes rather than entities: a renderer that escapes raw HTML itself (pages.py) shows an entity
# as typed ("&lt;"), while every CommonMark renderer shows '\<' as '<'.
_INLINE_PUNCTUATION = re.compile(r"([\\`*\[\]~$|{}^@<>&])")
# '_' emphasises only at a word's edge (CommonMark's flanking rules): 'hba1c_12m' stays as it is.
_EDGE_UNDERSCORE = re.compile(r"(?<![0-9A-Za-z])_|_(?![0-9A-Za-z])")
# What formats only at the start of a line: headings, list items, setext underlines, numbered items.
_LINE_START = re.compile(r"^(\s*)([#+=-]|\d+(?=[.)]))")
# Autolinks (GFM): 'www.' and 'scheme://' become links in Jupyter's renderer.
_AUTOLINK = re.compile(r"(?i)(www)\.|(?<=[a-z0-9])(:)(?=//)")
_LINE_BREAKS = re.compile(r"[\r\n\t\v\f\x85\u2028\u2029]+")
# Characters that are no markup but change what a reader sees: bidirectional embeddings,
# overrides, isolates and marks (they can reorder a table cell or a sentence, Unicode UAX #9),
# and C0/C1 control characters other than tab and line breaks.
_INVISIBLE = re.compile("[\u202a-\u202e\u2066-\u2069\u200e\u200f\u061c\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f]")

# Spreadsheet formula injection (OWASP, "CSV Injection", recalled from memory): a spreadsheet
# reads a cell that starts with '=', '+', '-', '@', a tab or a carriage return as a formula. The
# common defence is a single quote in front of such a text cell, which spreadsheets read as "this is
# text". Quotes already in front of those characters count too, so reading back removes exactly one
# quote and every text comes back as it was. A plain number ('-0.25', '+3', '1e-5') is no formula
# and stays as it is written.
_FORMULA_START = re.compile("'*[=+\\-@\t\r]")
_QUOTED_FORMULA_START = re.compile("'+[=+\\-@\t\r]")
_PLAIN_NUMBER = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?\Z")


def _shown_as_escape(ch: str) -> str:
    """A character written as its Python escape (``\\xNN`` below 256, else ``\\uNNNN``)."""
    code = ord(ch)
    return f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"


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
        else:
            out.append(_shown_as_escape(ch))
    flat = "".join(out)
    return flat if not limit or len(flat) <= limit else flat[: max(limit - 3, 0)] + "..."


def show_invisible(text: Any) -> str:
    """``text`` with bidirectional controls and control characters shown as ``\\uNNNN``/``\\xNN``.

    Line breaks and tabs are kept, so it serves whole pages and preformatted blocks.

    Parameters
    ----------
    text : object
        Any value; it is converted with ``str``.

    Returns
    -------
    str
    """
    return _INVISIBLE.sub(lambda match: _shown_as_escape(match.group(0)), str(text))


def html_escape(text: Any) -> str:
    """``text`` safe inside HTML element content and quoted attribute values (invisible controls shown).

    Parameters
    ----------
    text : object
        Any value; it is converted with ``str``.

    Returns
    -------
    str
    """
    return html.escape(show_invisible(text), quote=True)


def md_escape(text: Any) -> str:
    """``text`` safe inside Markdown: shown literally, never as markup, on one line.

    Only what can format is escaped, so the Markdown source stays readable (``tables/report_text.md``
    is edited by people): punctuation that formats inside a line, the start-of-line markers of
    headings and lists, and autolinks.

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
    escaped = _INLINE_PUNCTUATION.sub(r"\\\1", flat)
    escaped = _EDGE_UNDERSCORE.sub(r"\\_", escaped)
    escaped = _AUTOLINK.sub(lambda m: "www\\." if m.group(1) else "\\:", escaped)
    escaped = _LINE_START.sub(lambda m: m.group(1) + ("\\" + m.group(2) if not m.group(2).isdigit()
                                                      else m.group(2) + "\\"), escaped)
    return escaped


def md_code(text: Any) -> str:
    """``text`` as an inline code span in Markdown (for expressions and formulas), shown literally.

    Inside a code span nothing is markup (CommonMark 6.1), so only the fence needs care: it is one
    backtick longer than the longest run of backticks in the text, with a space inside each end.

    Parameters
    ----------
    text : object
        Any value; it is converted with ``str``.

    Returns
    -------
    str
    """
    flat = one_line(_LINE_BREAKS.sub(" ", str(text)))
    runs = [len(run) for run in re.findall(r"`+", flat)]
    fence = "`" * (max(runs, default=0) + 1)
    return f"{fence} {flat} {fence}"


def level_text(value: Any) -> str:
    """A category level as the data file wrote it: a whole number stored as a float (2.0) reads ``2``.

    Numeric category columns are kept as floats after intake; shown with ``str`` their levels
    read ``1.0`` and ``2.0`` in table columns and wording, which the file never said.

    Parameters
    ----------
    value : object
        A level (number or text).

    Returns
    -------
    str
    """
    if isinstance(value, numbers.Real) and not isinstance(value, numbers.Integral) and math.isfinite(value):
        number = float(value)
        return str(int(number)) if number.is_integer() and abs(number) < 1e15 else repr(number)
    return str(value)


def spreadsheet_safe(text: str) -> str:
    """``text`` as a CSV cell a spreadsheet shows as text: a single quote in front of a would-be formula.

    A cell that starts with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return (after any single
    quotes) gets one more single quote in front; a plain number (``-0.25``) is left as it is, so it
    stays a number. :func:`spreadsheet_original` undoes it exactly.

    Parameters
    ----------
    text : str
        A text cell or column name.

    Returns
    -------
    str

    References
    ----------
    OWASP Foundation, "CSV Injection" (community page; the list of formula-starting characters and
    the single-quote prefix are recalled from memory).
    """
    if _FORMULA_START.match(text) and not _PLAIN_NUMBER.match(text):
        return "'" + text
    return text


def spreadsheet_original(cell: str) -> str:
    """The text :func:`spreadsheet_safe` was given: one leading single quote removed from a quoted would-be formula.

    Parameters
    ----------
    cell : str
        A text cell or column name as written in a record's table.

    Returns
    -------
    str
    """
    return cell[1:] if _QUOTED_FORMULA_START.match(cell) else cell


def counted(n: int, noun: str, plural: str = "") -> str:
    """A count with its noun in the number English needs: '1 variable', '3 variables', '1,200 rows'.

    Parameters
    ----------
    n : int
        The count.
    noun : str
        The singular noun.
    plural : str, optional
        The plural when it is not ``noun + 's'`` (e.g. 'analyses').

    Returns
    -------
    str
    """
    return f"{n:,} {noun if n == 1 else (plural or noun + 's')}"


def quantity(number: str, unit: str) -> str:
    """A number written as text with its unit, the unit singular after exactly one.

    'more than 1 percentage point', '2 percentage points', '1 day', '1.0 days' (a decimal
    reads plural in English), '1 mmHg'. Only a unit whose last word is a regular English
    plural (ending in 's' after a letter other than 's' or 'u', at least three letters)
    is made singular; symbols such as '%', 'mmHg', 'kg/m2' or 'mmol/mol' stay as written.

    Parameters
    ----------
    number : str
        The number as it will be read (already rounded), e.g. '1' or '2.5'.
    unit : str
        The unit as the params give it (``variables.<x>.unit``).

    Returns
    -------
    str
    """
    words = unit.rsplit(" ", 1)
    last = words[-1]
    plural = len(last) >= 3 and last.isalpha() and last.endswith("s") and last[-2].lower() not in "su"
    if number.strip().lstrip("+-") == "1" and plural:
        unit = " ".join(words[:-1] + [last[:-1]])
    return f"{number} {unit}"


def first_upper(text: str) -> str:
    """``text`` with its first letter in upper case and the rest as written.

    ``str.capitalize`` lower-cases everything after the first letter, which turned the
    column names in a drafted sentence ('methods: ADAS_WK24 pmm') into names the data
    does not have ('Methods: adas_wk24 pmm').

    Parameters
    ----------
    text : str
        A sentence that may hold column names, levels or proper names.

    Returns
    -------
    str
    """
    return text[:1].upper() + text[1:]
