"""The record's HTML pages: one page per stage notebook and the landing page ``report/index.html``."""
from __future__ import annotations

import html
import re
from pathlib import Path
from typing import Any, Dict, Sequence, Tuple

from . import __version__
from .vocabulary import CAUTIONS


def notebook_to_html(notebook: Path, target: Path) -> None:
    import nbformat
    from nbconvert import HTMLExporter

    exporter = HTMLExporter(template_name="lab")
    exporter.exclude_input_prompt = True
    exporter.exclude_output_prompt = True
    body, _ = exporter.from_notebook_node(nbformat.read(notebook, as_version=4))
    target.write_text(body, encoding="utf-8")


def write_index(folder: Path, title: str, pages: Sequence[Tuple[str, str, float]], manifest: Dict[str, Any]) -> Path:
    """``report/index.html``: the study, the cautions and one link per stage page."""
    items = "\n".join(
        f'<li><a href="{html.escape(page)}">{html.escape(label)}</a> <span class="t">({seconds:.1f} s)</span></li>'
        for label, page, seconds in pages
    )
    tables = "\n".join(f'<li><a href="../tables/{html.escape(p.name)}">{html.escape(p.name)}</a></li>'
                       for p in sorted((folder / "tables").glob("*.csv")))
    cautions = "\n".join(f"<li>{html.escape(c)}</li>" for c in CAUTIONS)
    summary = _summary_html(folder)
    failed = manifest.get("error")
    error = (f'<p class="caution"><b>Incomplete record:</b> stage {html.escape(str(failed["stage"]))} failed: '
             f'{html.escape(failed["message"])}</p>' if failed else "")
    body = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>
<style>body{{font-family:system-ui,sans-serif;max-width:52rem;margin:2rem auto;line-height:1.5;color:#222}}
.t{{color:#777;font-size:.9em}} .caution{{background:#fbf6ec;border-left:4px solid #D9822B;padding:.5rem 1rem}}
code{{background:#f3f3f3;padding:0 .2em}}</style></head>
<body>
<h1>{html.escape(title)}</h1>
<p>Study: <b>{html.escape(str(manifest.get('study')))}</b>. Data file <code>{html.escape(manifest['data'])}</code>
(sha256 <code>{html.escape(manifest['sha256'][:16])}…</code>). Run {html.escape(manifest['started'])}, gapbook {html.escape(__version__)}.</p>
{error}
<div class="caution"><b>Cautions</b><ul>{cautions}</ul></div>
{summary}
<h2>Stages</h2><ol>{items}</ol>
<h2>Tables</h2><ul>{tables}</ul>
<p class="t">Re-run and check this record with <code>gapbook verify &lt;this folder&gt;</code>.</p>
</body></html>
"""
    path = folder / "report" / "index.html"
    path.write_text(body, encoding="utf-8")
    return path


def _summary_html(folder: Path) -> str:
    """The summary stage's drafted text (``tables/report_text.md``) as the front page's body, when it ran."""
    text_path = folder / "tables" / "report_text.md"
    if not text_path.is_file():
        return ""
    import mistune  # nbconvert's own markdown renderer

    text = text_path.read_text(encoding="utf-8")
    # The page has its own title; drop the summary's first-level heading.
    text = re.sub(r"\A# [^\n]*\n", "", text)
    return f'<section class="summary">{mistune.html(text)}</section>'
