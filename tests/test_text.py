"""User text stays text: Markdown and HTML escaping checked by rendering with the renderers pages use.

The Markdown renderer is mistune (the one nbconvert uses for Markdown cells and outputs);
elements are counted with the standard library's html.parser.
"""
from __future__ import annotations

import io
import re
from html.parser import HTMLParser

import mistune
import pytest

from gapbook.errors import InputError
from gapbook.plots import new_figure
from gapbook.text import html_escape, md_code, md_escape, one_line, show_invisible

HOSTILE = [
    "<script>alert(1)</script>",
    "<img src=x onerror=alert(1)>",
    "\"><svg onload=alert(1)>",
    "[click](javascript:alert(1))",
    "![x](http://example.invalid/x.png)",
    "*bold* _it_ `code` ~~del~~ $x^2$",
    "# heading\n- item\n\n<b>x</b>",
    "&lt;b&gt;not an element&lt;/b&gt;",
    "<!-- comment --> <style>body{}</style>",
    "line\rbreak\x1b[31m\x00\u202e",
    "http://example.invalid www.example.invalid",
    "| a | b |\n|---|---|",
]


class _Elements(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)


def _tags(markup: str) -> list:
    parser = _Elements()
    parser.feed(markup)
    return parser.tags


@pytest.mark.parametrize("text", HOSTILE)
def test_markdown_escaped_text_renders_as_one_paragraph_of_text(text):
    rendered = mistune.create_markdown(escape=False)(md_escape(text))
    assert _tags(rendered) == ["p"], rendered  # no element came from the user's text


@pytest.mark.parametrize("text", HOSTILE)
def test_html_escaped_text_is_no_element(text):
    assert _tags(f"<td>{html_escape(text)}</td>") == ["td"]
    assert _tags(f'<a title="{html_escape(text)}">x</a>') == ["a"]


def test_markdown_escaping_keeps_the_words_readable():
    rendered = mistune.create_markdown(escape=False)(md_escape("HbA1c (%) < 7.0 & age_group"))
    assert rendered.strip() == "<p>HbA1c (%) &lt; 7.0 &amp; age_group</p>"


def test_code_spans_hold_formulas_literally():
    rendered = mistune.create_markdown(escape=False)(md_code('y ~ C(site, Treatment("<b>"))'))
    assert _tags(rendered) == ["p", "code"]
    assert "&lt;b&gt;" in rendered


def test_one_line_and_plot_text():
    assert one_line("a\nb\x1b") == "a\\x0ab\\x1b"
    assert one_line("x" * 50, limit=10) == "xxxxxxx..."
    assert "\n" not in str(InputError("col\nname")) and "\x1b" not in str(InputError("\x1b[2J"))
    # A figure's text is drawn as written: with matplotlib's default (mathtext on) this title,
    # dollars around an unknown command, stops the figure with a ValueError.
    figure, axes = new_figure(2, 2)
    axes.set_title(r"cost $\undefinedcommand$")
    figure.savefig(io.BytesIO(), format="png")
    assert axes.get_title() == r"cost $\undefinedcommand$"


class _Text(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.text: list = []

    def handle_data(self, data):
        self.text.append(data)


@pytest.mark.parametrize("escape", [True, False], ids=["raw-html-escaped", "raw-html-allowed"])
@pytest.mark.parametrize("text", HOSTILE + ["1. first", "+ plus", "= under", "> quote", "a@b.org", "hba1c_12m"])
def test_markdown_escaped_text_reads_exactly_as_written(text, escape):
    """Pages render with raw HTML escaped (pages.py), Jupyter with raw HTML allowed: in both the reader
    sees the characters that were written (line breaks as spaces, control characters as escapes)."""
    rendered = mistune.create_markdown(escape=escape, plugins=["table", "strikethrough"])(md_escape(text))
    assert _tags(rendered) == ["p"], rendered
    parser = _Text()
    parser.feed(rendered)
    expected = one_line(re.sub(r"[\r\n]+", " ", text))
    assert "".join(parser.text).strip() == expected.strip()


def test_invisible_characters_are_shown_not_obeyed():
    assert show_invisible("dose\u202egm\u2066x\u2069\x1b[2J\nnext\tcol") == "dose\\u202egm\\u2066x\\u2069\\x1b[2J\nnext\tcol"
    assert show_invisible("Persian \u200c joiner and emoji \u200d kept") == "Persian \u200c joiner and emoji \u200d kept"
    assert html_escape("<b>\u202e</b>") == "&lt;b&gt;\\u202e&lt;/b&gt;"


def test_counts_and_units_read_in_the_right_number():
    # English grammar (no source needed beyond it): one takes the singular, everything else the plural
    from gapbook.text import counted, quantity

    assert counted(1, "variable") == "1 variable" and counted(0, "variable") == "0 variables"
    assert counted(1200, "row") == "1,200 rows" and counted(2, "analysis", "analyses") == "2 analyses"
    assert quantity("1", "percentage points") == "1 percentage point" and quantity("-1", "days") == "-1 day"
    assert quantity("1.0", "days") == "1.0 days" and quantity("2", "years") == "2 years"
    for symbol in ("%", "mmHg", "kg/m2", "mmol/mol", "status", "s"):
        assert quantity("1", symbol) == f"1 {symbol}"


def test_first_upper_keeps_the_rest_as_written():
    # str.capitalize lower-cased CDISC names ('ADAS_WK24') in drafted sentences
    from gapbook.text import first_upper

    assert first_upper("methods: ADAS_WK24 pmm") == "Methods: ADAS_WK24 pmm" and first_upper("") == ""
