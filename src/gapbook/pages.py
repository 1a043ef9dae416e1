"""The record's HTML pages: one page per stage notebook and the landing page ``report/index.html``.

Pages are what a principal investigator reads, so they show outputs (tables, figures,
wording), never code: the executed ``.ipynb`` beside them keeps the code. They are
rendered here rather than with nbconvert's templates, for three reasons: the templates
load require.js, MathJax and fonts from the internet (an archived record must render
offline years later), they are looked up on Jupyter's shared search paths (a planted
template there would run), and they carry the input cells we leave out. Markdown is
rendered with mistune (nbconvert's own renderer) with raw HTML escaped, so text that
reached a notebook's markdown from a data or params file can never become markup.
A page references nothing outside the record; figures are embedded in stage pages and
linked relatively from the landing page.
"""
from __future__ import annotations

import html
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from . import __version__
from .inference import format_estimate, format_p, format_p_cell, is_false_cell
from .stage import read_csv
from .text import show_invisible
from .vocabulary import (LEAD_STRATEGIES, STRATEGY_ASSUMPTIONS, STRATEGY_PHRASES, STRATEGY_TITLES, cautions,
                         effect_scale, has_ratio_scale)

__all__ = ["parameters_summary", "notebook_to_html", "effect_table", "write_index"]

# The figure that answers "what is the effect under each strategy" (saved by the imputation stage,
# or by the missing-category stage when imputation did not run).
EFFECT_FIGURE = "strategy_comparison"

STYLE = """
:root{--ink:#1f2328;--muted:#5b6470;--rule:#d8dde3;--band:#f5f7f9;--accent:#2b5d8a;--warn:#fbf6ec}
*{box-sizing:border-box}
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,"Helvetica Neue",Arial,sans-serif;color:var(--ink);
 line-height:1.5;margin:0;padding:1.5rem;max-width:64rem;margin-inline:auto}
h1{font-size:1.7rem;line-height:1.25;margin:.5rem 0 1rem} h2{font-size:1.3rem;margin-top:2rem;
 border-bottom:1px solid var(--rule);padding-bottom:.2rem} h3{font-size:1.1rem}
a{color:var(--accent)} nav{font-size:.9rem;margin-bottom:1rem}
code{background:var(--band);padding:0 .25em;border-radius:3px;font-size:.92em}
pre{background:var(--band);padding:.6rem .8rem;overflow-x:auto;font-size:.85rem;white-space:pre-wrap}
pre.stderr{background:var(--warn)} pre.error{background:#fbeaea}
img{max-width:100%;height:auto;display:block;margin:.5rem 0}
.scroll{overflow-x:auto;max-width:100%;margin:.5rem 0 1rem}
table{border-collapse:collapse;font-size:.88rem;font-variant-numeric:tabular-nums}
th,td{border-bottom:1px solid var(--rule);padding:.25rem .6rem;text-align:right;vertical-align:top;white-space:nowrap}
th{background:var(--band);font-weight:600} tbody tr:nth-child(even){background:#fafbfc}
th:first-child,td:first-child,td.text,th.text{text-align:left}
td.wrap,th.wrap{white-space:normal;min-width:12rem;max-width:20rem}
.answer{font-size:1.08rem;background:var(--band);border-left:4px solid var(--accent);padding:.5rem 1rem}
table.dataframe{border:none} .dataframe thead th{text-align:right}
.params{background:var(--band);border-left:4px solid var(--accent);padding:.5rem 1rem;margin:1rem 0}
.params dl{display:grid;grid-template-columns:max-content 1fr;gap:.1rem 1rem;margin:.3rem 0}
.params dt{color:var(--muted)} .params dd{margin:0;overflow-wrap:anywhere}
.caution{background:var(--warn);border-left:4px solid #8a6d2b;padding:.5rem 1rem;margin:1rem 0}
.incomplete{background:#fbeaea;border-left:4px solid #8a2b2b;padding:.5rem 1rem}
.muted,.t{color:var(--muted);font-size:.9em}
"""


# The only raw HTML a page keeps from Markdown: the code element ``gapbook.text.md_code`` writes
# around a formula (its content is HTML-escaped there). Every other tag is shown as text.
_KEPT_INLINE_HTML = ("<code>", "</code>")


def _markdown(text: str) -> str:
    import mistune  # nbconvert's own markdown renderer
    from mistune.renderers.html import HTMLRenderer
    from mistune.util import safe_entity

    class PageRenderer(HTMLRenderer):
        """Raw HTML escaped, except md_code's <code>; entities written by md_escape (&lt;) read as the
        character, as CommonMark and Jupyter show them, not as '&lt;'."""

        def text(self, text: str) -> str:
            return safe_entity(text)

        def inline_html(self, html_text: str) -> str:
            return html_text if html_text in _KEPT_INLINE_HTML else self.escape_raw(html_text)

    render = mistune.create_markdown(renderer=PageRenderer(escape=True), plugins=["table", "strikethrough"])
    return render(text)


def _page(title: str, body: str, *, back: bool = True) -> str:
    # Bidirectional controls and control characters from the params or the data (in headings, tables
    # rendered in the kernel, sentences) are shown as escapes, never obeyed: they reorder what a reader sees.
    title, body = show_invisible(title), show_invisible(body)
    nav = '<nav><a href="index.html">&larr; Summary of this record</a></nav>\n' if back else ""
    return (f'<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
            f'<meta name="viewport" content="width=device-width, initial-scale=1">\n'
            f"<title>{html.escape(title)}</title>\n<style>{STYLE}</style>\n</head>\n<body>\n{nav}<main>\n{body}\n"
            f"</main>\n</body>\n</html>\n")


# ---------------------------------------------------------------------------
# stage pages

def _text(value: Any) -> str:
    return "".join(value) if isinstance(value, list) else str(value)


_ANSI = re.compile(r"\x1b\[[0-9;]*[A-Za-z]")


def _output_html(output: Mapping[str, Any]) -> str:
    kind = output.get("output_type")
    if kind == "stream":
        text = _ANSI.sub("", _text(output.get("text", "")))
        css = "stderr" if output.get("name") == "stderr" else "stream"
        return f'<pre class="{css}">{html.escape(text)}</pre>' if text.strip() else ""
    if kind == "error":
        return (f'<pre class="error">{html.escape(str(output.get("ename", "")))}: '
                f'{html.escape(_ANSI.sub("", str(output.get("evalue", ""))))}</pre>')
    data = output.get("data", {})
    if kind == "execute_result" and set(data) <= {"text/plain"}:
        return ""  # a stray return value (a count, a path): neither a table nor a figure nor wording
    if "image/png" in data:
        payload = re.sub(r"\s+", "", _text(data["image/png"]))
        return f'<img alt="figure" src="data:image/png;base64,{payload}">'
    if "image/svg+xml" in data:
        import base64

        payload = base64.b64encode(_text(data["image/svg+xml"]).encode("utf-8")).decode("ascii")
        return f'<img alt="figure" src="data:image/svg+xml;base64,{payload}">'
    if "text/html" in data:
        return f'<div class="scroll">{readable_cells(_text(data["text/html"]))}</div>'
    if "text/markdown" in data:
        return f'<div class="markdown">{_markdown(_text(data["text/markdown"]))}</div>'
    if "text/plain" in data:
        return f"<pre>{html.escape(_text(data['text/plain']))}</pre>"
    return ""


_CELL = re.compile(r"(<td[^>]*>)([^<]*)(</td>)")
_MISSING_CELLS = {"<NA>", "NaN", "nan", "None", "NaT", "<na>"}


def readable_cell(text: str, digits: int = 4) -> str:
    """A table cell as text for reading: whole numbers as integers, others to ``digits`` significant
    digits, and missing markers (``<NA>``, ``NaN``) as an empty cell. Anything else is left as it is."""
    stripped = text.strip()
    if stripped in _MISSING_CELLS:
        return ""
    try:
        value = float(stripped.replace(",", "")) if re.fullmatch(r"[-+]?[\d,]*\.?\d+(e[-+]?\d+)?", stripped, re.I) \
            else None
    except ValueError:
        value = None
    if value is None:
        return text
    if value.is_integer() and abs(value) < 1e15:
        return f"{int(value):,}" if abs(value) >= 10_000 else f"{int(value)}"
    return _number(value, digits)


_ROW = re.compile(r"<tr[^>]*>(.*?)</tr>", re.S)
_HEADER_CELL = re.compile(r"<th[^>]*>([^<]*)</th>")
P_VALUE_COLUMNS = re.compile(r"^(p|p_value|p_adjusted|p_.*|.*_p_value)$")


def readable_cells(table_html: str) -> str:
    """A pandas table's HTML with every data cell passed through :func:`readable_cell` (the markup pandas
    wrote, already escaped, is kept; only cell text changes). Cells under a p-value column (``p``,
    ``p_value``, ``p_adjusted``) read as ``format_p_cell`` writes them ('< 0.001', '0.012')."""
    head = re.search(r"<thead>(.*?)</thead>", table_html, re.S)
    header_rows = _ROW.findall(head.group(1)) if head else []
    columns = [html.unescape(c).strip() for c in _HEADER_CELL.findall(header_rows[-1])] if header_rows else []

    def one_row(row: "re.Match[str]") -> str:
        body = row.group(1)
        index_cells = len(re.findall(r"<th[^>]*>", body))
        position = iter(range(index_cells, index_cells + 10 ** 6))

        def one(match: "re.Match[str]") -> str:
            at = next(position)
            raw = html.unescape(match.group(2))
            name = columns[at] if at < len(columns) else ""
            if P_VALUE_COLUMNS.match(name) and (format_p_cell(raw) or raw.strip() in _MISSING_CELLS):
                shown = format_p_cell(raw)
            else:
                shown = readable_cell(raw)
            return match.group(1) + (match.group(2) if shown == raw else html.escape(shown)) + match.group(3)

        return row.group(0).replace(body, _CELL.sub(one, body), 1)

    if "<tbody>" not in table_html:
        return _CELL.sub(lambda m: m.group(1) + html.escape(readable_cell(html.unescape(m.group(2)))) + m.group(3),
                         table_html)
    start = table_html.index("<tbody>")
    return table_html[:start] + _ROW.sub(one_row, table_html[start:])


def parameters_summary(params: Any) -> List[Tuple[str, str]]:
    """The injected parameters as a reader needs them: study, data file relative to the params file, key settings.

    Parameters
    ----------
    params : dict or Params
        The injected params.

    Returns
    -------
    list of (label, value)
    """
    rows: List[Tuple[str, str]] = [("study", str(params.study.name))]
    data = Path(params.data.path).expanduser()
    if data.is_absolute() and params.source:
        try:
            data = Path(os.path.relpath(data, Path(params.source).parent))
        except ValueError:
            data = Path(data.name)
    rows.append(("data file", f"{data.as_posix()} (relative to the params file)" if params.source else data.name))
    if params.data.id:
        rows.append(("id column", str(params.data.id)))
    analysis = params.analysis
    if analysis.formula:
        rows.append(("model", f"{analysis.formula} ({analysis.family})"))
        if analysis.exposure:
            rows.append(("exposure", str(analysis.exposure)))
        imputation = params.imputation
        rows.append(("imputation", f"m = {imputation.m}, {imputation.iterations} iterations, seed {imputation.seed}"))
    rows.append(("missing share flagged above", f"{params.audit.threshold:g}"))
    return rows


def _parameters_html(rows: Sequence[Tuple[str, str]]) -> str:
    items = "".join(f"<dt>{html.escape(k)}</dt><dd>{html.escape(v)}</dd>" for k, v in rows)
    return (f'<section class="params"><b>Parameters of this run</b> <span class="muted">(all of them: '
            f'params.yaml in this record)</span><dl>{items}</dl></section>')


def _merged_streams(outputs: Sequence[Mapping[str, Any]]) -> List[Mapping[str, Any]]:
    """Consecutive writes to one stream as one block, with carriage returns applied as a terminal does
    (a progress counter that rewrites its line shows its last state, not every step)."""
    merged: List[Dict[str, Any]] = []
    for output in outputs:
        if (output.get("output_type") == "stream" and merged and merged[-1].get("output_type") == "stream"
                and merged[-1].get("name") == output.get("name")):
            merged[-1]["text"] += _text(output.get("text", ""))
        else:
            merged.append(dict(output, text=_text(output.get("text", ""))) if output.get("output_type") == "stream"
                          else output)
    for output in merged:
        if output.get("output_type") == "stream":
            output["text"] = "\n".join(line.rsplit("\r", 1)[-1] for line in output["text"].split("\n"))
    return merged


def render_notebook(notebook: Any, *, title: str, parameters: Sequence[Tuple[str, str]]) -> str:
    """An executed stage notebook as a page of outputs: markdown, tables, figures; no code."""
    parts: List[str] = []
    for cell in notebook.cells:
        tags = cell.get("metadata", {}).get("tags", [])
        if cell.cell_type == "markdown":
            parts.append(_markdown(_text(cell.source)))
        elif cell.cell_type == "code":
            if "injected-parameters" in tags:
                parts.append(_parameters_html(parameters))
            elif "parameters" in tags:
                continue
            else:
                outputs = _merged_streams(cell.get("outputs", []))
                parts.extend(piece for piece in (_output_html(o) for o in outputs) if piece)
    return _page(title, "\n".join(parts))


def notebook_to_html(notebook_path: Path, target: Path, *, title: str, parameters: Sequence[Tuple[str, str]]) -> Path:
    """Render an executed notebook as one offline HTML page (outputs only, text escaped).

    Parameters
    ----------
    notebook_path : Path
        The executed notebook.
    target : Path
        The HTML file to write.
    title : str
        The page title.
    parameters : sequence of (label, value)
        The settings shown at the top (from :func:`parameters_summary`).

    Returns
    -------
    Path
        ``target``.
    """
    import nbformat

    notebook = nbformat.read(notebook_path, as_version=4)
    target.write_text(render_notebook(notebook, title=title, parameters=parameters), encoding="utf-8")
    return target


# ---------------------------------------------------------------------------
# the landing page

def _number(value: Any, digits: int = 3) -> str:
    """A value for reading: integers as integers (with thousands separators), others to ``digits``
    significant digits."""
    if value is None or isinstance(value, str):
        return "" if value is None else value
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    value = float(value)
    if math.isnan(value):
        return ""
    if value.is_integer() and abs(value) < 1e15:
        return f"{int(value):,}"
    if abs(value) >= 10 ** digits:
        return f"{value:,.0f}"
    if abs(value) >= 1e-3:
        return f"{value:.{digits}g}"
    return f"{value:.{digits - 1}e}"




def _table(frame: pd.DataFrame, *, table_id: str, text_columns: Sequence[str] = (),
           wrap_columns: Sequence[str] = ()) -> str:
    def css(column: Any) -> str:
        return " ".join(name for name, on in (("text", column in text_columns), ("wrap", column in wrap_columns))
                        if on)

    head = "".join(f'<th class="{css(c)}">{html.escape(str(c))}</th>' for c in frame.columns)
    rows = []
    for record in frame.itertuples(index=False):
        cells = "".join(f'<td class="{css(c)}">{html.escape(_number(v))}</td>' for c, v in zip(frame.columns, record))
        rows.append(f"<tr>{cells}</tr>")
    return (f'<div class="scroll"><table id="{table_id}"><thead><tr>{head}</tr></thead>'
            f'<tbody>{"".join(rows)}</tbody></table></div>')


@dataclass(frozen=True)
class EffectTable:
    """The exposure's effect under every strategy, as the landing page shows it.

    ``frame`` holds the cells as text; ``scale`` says what the numbers are (e.g. 'odds ratio');
    ``lead`` is the one sentence that answers "what is the effect, under which assumption, how sure".
    """

    frame: pd.DataFrame
    scale: str
    terms: Tuple[str, ...]
    lead: str = ""


def _estimate_text(value: Any) -> str:
    """An estimate or interval end as the landing page shows it (empty when missing)."""
    text = format_estimate(value)
    return "" if text == "n/a" else text


def effect_table(estimates: pd.DataFrame, *, family: str, exposure: Optional[str], alpha: float,
                 labels: Optional[Mapping[str, str]] = None) -> Optional[EffectTable]:
    """The exposure's rows of ``estimates.csv`` under every strategy, on the ratio scale for ratio families.

    ``labels`` names the strategies for reading (the stages' ``strategy_comparison.csv`` has them).
    Each row says what the strategy assumes about why values are missing.

    Parameters
    ----------
    estimates : DataFrame
        ``estimates.csv``.
    family : str
        The model family.
    exposure : str, optional
        The exposure column or term.
    alpha : float
        One minus the confidence level.
    labels : mapping of str to str, optional
        Strategy -> label.

    Returns
    -------
    EffectTable or None
        None when the estimates have no term but the intercept.
    """
    labels = {**STRATEGY_TITLES, **(labels or {})}
    from .errors import InputError
    from .models import exposure_terms

    terms = [t for t in dict.fromkeys(estimates["term"].astype(str)) if t != "Intercept"]
    if not terms:
        return None
    try:
        chosen = exposure_terms(terms, exposure)
    except InputError:
        chosen = terms[:1]
    ratio = has_ratio_scale(family) and {"exp_estimate", "exp_ci_lower", "exp_ci_upper"} <= set(estimates.columns)
    prefix = "exp_" if ratio else ""
    level = f"{100 * (1 - alpha):g}%"
    scale = effect_scale(family, exponentiated=ratio)
    rows, lead_rows = [], {}
    for row in estimates[estimates["term"].astype(str).isin(chosen)].itertuples(index=False):
        values = row._asdict()
        strategy = str(values["strategy"])
        estimate = _estimate_text(values[f"{prefix}estimate"])
        interval = f"{_estimate_text(values[f'{prefix}ci_lower'])} to {_estimate_text(values[f'{prefix}ci_upper'])}"
        failed = is_false_cell(values.get("converged"))
        if not estimate:  # the fit failed (e.g. did not converge): say so rather than show ' to '
            estimate, interval = "not estimated", "did not converge" if failed else ""
        elif failed:  # numbers from a fit that did not converge are shown, never as a result to lead with
            interval += " (the fit did not converge: not reliable; its stage page says why)"
        rows.append({
            "strategy": labels.get(strategy, strategy.replace("_", " ")),
            "assumes about the missing values": STRATEGY_ASSUMPTIONS.get(strategy, ""),
            "term": str(values["term"]),
            scale: estimate,
            f"{level} CI": interval,
            "p": format_p_cell(values.get("p_value")),
            "rows used": _number(values.get("n_used")),
        })
        if estimate != "not estimated" and not failed:
            lead_rows.setdefault(strategy, (str(values["term"]), estimate, interval, values.get("p_value")))
    lead = ""
    first = next((s for s in LEAD_STRATEGIES if s in lead_rows), next(iter(lead_rows), None))
    if first is not None:
        term, estimate, interval, p = lead_rows[first]
        assumption = STRATEGY_ASSUMPTIONS.get(first)
        lead = (f"Under {STRATEGY_PHRASES.get(first, first.replace('_', ' '))}"
                + (f" (which assumes {assumption})" if assumption else "")
                + f", the {scale} for {term} is {estimate} ({level} confidence interval {interval}; "
                + f"{format_p(p)})" + (" on the first term of the exposure" if len(chosen) > 1 else "") + ".")
    return EffectTable(pd.DataFrame(rows), scale, tuple(chosen), lead)


def _tipping_statements(folder: Path) -> str:
    """The sensitivity stage's tipping-point statements (``tables/tipping_point.csv``), or '' when it did not run."""
    path = folder / "tables" / "tipping_point.csv"
    if not path.is_file():
        return ""
    table = read_csv(path)
    if "statement" not in table.columns:
        return ""
    return " ".join(str(s) for s in table["statement"].dropna())


def _figure_link(folder: Path, name: str) -> str:
    for suffix in (".png", ".svg"):
        path = folder / "figures" / f"{name}{suffix}"
        if path.is_file():
            return (f'<img id="effect-figure" alt="The exposure effect under each strategy" '
                    f'src="../figures/{html.escape(path.name)}">')
    return ""


def _report_sections(folder: Path) -> Tuple[str, Optional[str]]:
    """Methods and results from ``tables/report_text.md``, and its cautions (shown once, at the end)."""
    path = folder / "tables" / "report_text.md"
    if not path.is_file():
        return "", None
    text = path.read_text(encoding="utf-8")
    sections = re.split(r"(?m)^## ", text)
    kept, caution_text = [], None
    for section in sections[1:]:
        heading = section.splitlines()[0] if section else ""
        if heading.startswith(("Methods", "Results")):
            kept.append("### " + section)
        elif heading.startswith("Cautions"):
            caution_text = section.split("\n", 1)[1] if "\n" in section else ""
    return _markdown("\n".join(kept)), (_markdown(caution_text) if caution_text and caution_text.strip() else None)


def write_index(folder: Path, *, params: Any, pages: Sequence[Tuple[str, str, float]], started: str,
                data_sha256: str, error: Optional[Dict[str, Any]] = None) -> Path:
    """``report/index.html``: the answer first (effect under every strategy, with its figure), then the
    participant flow, the drafted methods and results, the stage pages, and the cautions once.

    Parameters
    ----------
    folder : Path
        The record folder.
    params : dict
        The resolved params.
    pages : sequence of (stage, file, seconds)
        The stage pages written.
    started : str
        The run's start, as shown.
    data_sha256 : str
        The data file's digest.
    error : dict, optional
        The failing stage and message of an incomplete run.

    Returns
    -------
    Path
        ``report/index.html``.
    """
    title = params.report.title or params.study.name
    parts = [f"<h1>{html.escape(title)}</h1>",
             f'<p class="muted">Study <b>{html.escape(params.study.name)}</b> &middot; data file '
             f"<code>{html.escape(params.data_path.name)}</code> (sha256 <code>{html.escape(data_sha256[:12])}</code>) "
             f"&middot; run {html.escape(started)} &middot; gapbook {html.escape(__version__)}</p>"]
    if error:
        parts.append(f'<p class="incomplete"><b>Incomplete record.</b> Stage {html.escape(str(error.get("stage")))} '
                     f'failed: {html.escape(str(error.get("message")))}. The stages listed below finished.</p>')
    estimates_path = folder / "tables" / "estimates.csv"
    if estimates_path.is_file():
        estimates = read_csv(estimates_path)
        labels = None
        comparison = folder / "tables" / "strategy_comparison.csv"
        if comparison.is_file():
            named = read_csv(comparison)
            if {"strategy", "label"} <= set(named.columns):
                labels = dict(zip(named["strategy"].astype(str), named["label"].astype(str)))
        effect = effect_table(estimates, family=params.analysis.family, exposure=params.analysis.exposure,
                              alpha=params.analysis.alpha, labels=labels)
        if effect is not None and len(effect.frame):
            parts.append("<h2>The exposure effect under each strategy</h2>")
            parts.append(f'<p class="answer"><b>{html.escape(effect.lead)}</b></p>')
            tipping = _tipping_statements(folder)
            if tipping:
                parts.append(f"<p><b>If the data are missing not at random.</b> {html.escape(tipping)}</p>")
            parts.append(f"<p>{html.escape(', '.join(effect.terms))}: {html.escape(effect.scale)} with its "
                         f"confidence interval, one row per way of handling the missing values, each with what it "
                         f"assumes about why values are missing"
                         + ("; the model's own estimates are on the log scale in tables/estimates.csv"
                            if has_ratio_scale(params.analysis.family) else "") + ".</p>")
            parts.append(_table(effect.frame, table_id="estimates",
                                text_columns=("strategy", "assumes about the missing values", "term"),
                                wrap_columns=("assumes about the missing values",)))
            parts.append(_figure_link(folder, EFFECT_FIGURE))
    flow_path = folder / "tables" / "participant_flow.csv"
    if flow_path.is_file():
        flow = read_csv(flow_path, keep_default_na=False, na_values=[""])
        if "description" in flow.columns and "step" in flow.columns:
            flow = flow.drop(columns="step")  # the machine-readable key; the description says the same
        parts.append("<h2>Participant flow</h2>")
        parts.append(_table(flow, table_id="participant-flow", text_columns=(flow.columns[0],)))
    drafted, report_cautions = _report_sections(folder)
    if drafted:
        parts.append("<h2>Drafted methods and results</h2>")
        parts.append(f'<section class="summary">{drafted}</section>')
    if pages:
        # run times are in manifest.json; a reader of the answer does not need them
        items = "\n".join(f'<li><a href="{html.escape(page)}">{html.escape(label)}</a></li>'
                          for label, page, _seconds in pages)
        parts.append(f"<h2>Stage pages</h2><ol>{items}</ol>")
    tables = "\n".join(f'<li><a href="../tables/{html.escape(p.name)}">{html.escape(p.name)}</a></li>'
                       for p in sorted((folder / "tables").glob("*.csv")))
    if tables:
        parts.append(f"<h2>Tables</h2><ul>{tables}</ul>")
    caution_html = report_cautions or "<ul>" + "".join(
        f"<li>{html.escape(c)}</li>" for c in cautions(with_model=bool(params.analysis.formula))) + "</ul>"
    parts.append(f'<section class="caution"><b>Cautions</b>{caution_html}</section>')
    parts.append('<p class="t">Check this record and re-run it with <code>gapbook verify &lt;this folder&gt;</code>; '
                 "the executed notebooks (with their code) are in <code>notebooks/</code>.</p>")
    path = folder / "report" / "index.html"
    path.write_text(_page(title, "\n".join(parts), back=False), encoding="utf-8")
    return path
