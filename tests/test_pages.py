"""The record's pages (issue 10, "Pages a principal investigator reads"): outputs not code, nothing
loaded from the network, the answer first on the landing page, every user string escaped.

The demo record comes from the session fixture (one `gapbook demo` per test session).
"""
from __future__ import annotations

import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import pandas as pd
import pytest
from conftest import record_path, run_gapbook

from gapbook import pages
from gapbook.params import Params

NETWORK = re.compile(r"^\s*(https?:)?//", re.IGNORECASE)


class Elements(HTMLParser):
    """Every start tag with its attributes, and the text of <style> elements."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.styles, self._in_style = [], [], False

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        self._in_style = tag == "style"

    def handle_endtag(self, tag):
        self._in_style = False

    def handle_data(self, data):
        if self._in_style:
            self.styles.append(data)


def parse(path: Path) -> Elements:
    parser = Elements()
    parser.feed(path.read_text(encoding="utf-8"))
    return parser


def all_pages(record: Path):
    found = sorted((record / "report").glob("*.html"))
    assert len(found) == 9  # the landing page and one page per stage
    return found


def test_no_page_loads_anything_from_the_network(demo_record):
    for page in all_pages(demo_record):
        parsed = parse(page)
        assert not [t for t, _ in parsed.tags if t in ("script", "iframe", "object", "embed", "base")], page.name
        for tag, attrs in parsed.tags:
            for key in ("src", "srcset", "data", "poster") + (("href",) if tag == "link" else ()):
                if key not in attrs:
                    continue
                value = attrs[key] or ""
                assert not NETWORK.match(value), (page.name, tag, value)
                if key == "src" and not value.startswith("data:"):
                    assert (page.parent / value).resolve().is_file(), (page.name, value)  # inside the record
            assert not re.search(r"url\(\s*['\"]?(https?:)?//", attrs.get("style") or ""), page.name
        for style in parsed.styles:
            assert "@import" not in style and not re.search(r"url\(\s*['\"]?(https?:)?//", style), page.name


def test_stage_pages_show_outputs_and_a_short_parameter_summary_not_code(demo_record):
    notebook = json.loads((demo_record / "notebooks" / "05_impute.ipynb").read_text())
    images = sum("image/png" in o.get("data", {}) for c in notebook["cells"] for o in c.get("outputs", []))
    for page in all_pages(demo_record):
        if page.name == "index.html":
            continue
        text = page.read_text()
        assert "from gapbook" not in text and "open_stage(" not in text, page.name  # no input cells
        assert "params = {" not in text and str(demo_record) not in text, page.name  # no injected dict, no paths
        summary = re.search(r'<section class="params">.*?</section>', text, re.S)
        assert summary and len(summary.group(0)) < 1500, page.name
        assert "<dd>demo_trial.csv (relative to the params file)</dd>" in summary.group(0)
        # every table scrolls sideways inside its own box instead of running off the page
        assert text.count("<table") == len(re.findall(r'<div class="scroll">\s*(<div>\s*)?(<style[^<]*</style>\s*)?<table',
                                                      text)), page.name
    impute = (demo_record / "report" / "05_impute.html").read_text()
    assert impute.count('<img alt="figure" src="data:image/png;base64,') == images > 0


def test_the_landing_page_leads_with_the_answer(demo_record):
    text = (demo_record / "report" / "index.html").read_text()
    order = [text.index(h) for h in ("The exposure effect under each strategy", 'id="effect-figure"',
                                     "Participant flow", "Drafted methods and results", "Stage pages", "<b>Cautions</b>")]
    assert order == sorted(order)
    estimates = pd.read_csv(demo_record / "tables" / "estimates.csv")
    arm = estimates[estimates["term"] == "arm[T.sms]"]
    table = re.search(r'<table id="estimates">.*?</table>', text, re.S).group(0)
    labels = pd.read_csv(demo_record / "tables" / "strategy_comparison.csv").set_index("strategy")["label"]
    for row in arm.itertuples():
        assert f'<td class="text">{labels[row.strategy]}</td>' in table
        assert f"{row.estimate:#.3g}" in table  # gaussian model: the coefficient itself, 3 significant digits
    assert "cannot be verified" in text and text.count("cannot be verified") == 1  # cautions once
    figure = re.search(r'<img id="effect-figure"[^>]*src="([^"]+)"', text).group(1)
    assert (demo_record / "report" / figure).resolve() == (demo_record / "figures" / "strategy_comparison.png")


def test_ratio_families_lead_with_the_ratio_columns():
    estimates = pd.DataFrame({
        "strategy": ["complete_case", "multiple_imputation"], "term": ["treat[T.yes]"] * 2,
        "estimate": [0.5, 0.4], "ci_lower": [0.1, 0.0], "ci_upper": [0.9, 0.8], "p_value": [0.01, 0.0004],
        "n_used": [300, 412], "exp_estimate": [1.6487, 1.4918], "exp_ci_lower": [1.1052, 1.0],
        "exp_ci_upper": [2.4596, 2.2255]})
    effect = pages.effect_table(estimates, family="binomial", exposure="treat", alpha=0.05)
    assert effect.scale == "odds ratio"
    assert list(effect.frame["odds ratio"]) == ["1.65", "1.49"]
    assert list(effect.frame["95% CI"]) == ["1.11 to 2.46", "1.00 to 2.23"]
    assert list(effect.frame["p"]) == ["0.010", "< 0.001"]
    # the answer in one sentence: the primary strategy, its assumption, the ratio and how sure
    assert effect.lead == ("Under multiple imputation (which assumes missing at random, given the variables in the "
                           "imputation model), the odds ratio for treat[T.yes] is 1.49 (95% confidence interval "
                           "1.00 to 2.23; p < 0.001).")
    plain = pages.effect_table(estimates.drop(columns=["exp_estimate", "exp_ci_lower", "exp_ci_upper"]),
                               family="binomial", exposure="treat", alpha=0.05)
    assert plain.scale == "log odds ratio" and list(plain.frame["log odds ratio"]) == ["0.500", "0.400"]


def test_table_cells_on_pages_read_as_numbers_not_machine_output():
    # pandas writes counts held as floats as 1200.000000 and missing integers as <NA>; a reader wants
    # 1200 and an empty cell, and 3-4 significant digits elsewhere (common practice, no source).
    frame = pd.DataFrame({"step": ["rows in the file", "excluded"], "n": [1200.0, 35.0],
                          "n_excluded": pd.array([None, 35], dtype="Int64"), "share": [0.123456789, 12345.678]})
    shown = pages.readable_cells(frame.to_html())
    cells = re.findall(r"<td>([^<]*)</td>", shown)
    assert cells == ["rows in the file", "1200", "", "0.1235", "excluded", "35", "35", "12,346"]
    assert "&lt;NA&gt;" not in shown and "NaN" not in shown
    # p-values read as sentences print them (one formatter, gapbook.inference.format_p_cell)
    tested = pd.DataFrame({"term": ["a", "b"], "p_value": [0.0000004, 0.83123]}).round(4).to_html()
    assert re.findall(r"<td>([^<]*)</td>", pages.readable_cells(tested)) == ["a", "&lt; 0.001", "b", "0.831"]
    hostile = pd.DataFrame({"name": ["<b>x</b>"], "n": [3.0]}).to_html()
    assert "&lt;b&gt;x&lt;/b&gt;" in pages.readable_cells(hostile)  # text cells keep pandas' escaping


def test_escaped_user_text_reads_as_written_and_formulas_as_code():
    # CommonMark (spec 0.31, "Entity and numeric character references"): an entity in text is the
    # character it names, so text escaped for Markdown (md_escape) reads "a < b", not "a &lt; b".
    from gapbook.text import md_code, md_escape

    shown = pages._markdown("- " + md_escape("a < b & <i>c</i>") + " " + md_code("y ~ Q('x<1')"))
    assert "a &lt; b &amp; &lt;i&gt;c&lt;/i&gt;" in shown and "&amp;lt;" not in shown
    assert "<code>y ~ Q(&#x27;x&lt;1&#x27;)</code>" in shown or "<code>y ~ Q('x&lt;1')</code>" in shown
    assert "<i>" not in shown and "&lt;code" not in shown
    raw = pages._markdown('<code onclick="x">a</code> <script>alert(1)</script>')
    assert "<script>" not in raw and "<code onclick" not in raw


HOSTILE = '<img src=x onerror="alert(1)"><script>alert(2)</script>'


def test_user_strings_on_the_landing_page_are_escaped(tmp_path):
    """Study name, title and model terms come from users; none may become an element."""
    data = tmp_path / "s.csv"
    data.write_text("id,x,g\n" + "".join(f"{i},{'' if i % 4 == 0 else i},{'a' if i % 2 else 'b'}\n"
                                          for i in range(1, 31)))
    params = tmp_path / "p.yaml"
    params.write_text(json.dumps({"study": {"name": "S " + HOSTILE}, "data": {"path": "s.csv", "id": "id"},
                                  "report": {"title": "T " + HOSTILE}}))
    record = record_path(run_gapbook("run", params, "--only", "audit", "--out", tmp_path / "out"))
    (record / "tables" / "estimates.csv").write_text(
        "strategy,term,estimate,std_error,ci_lower,ci_upper,p_value,n_used\n"
        f'complete_case,"x{HOSTILE.replace(chr(34), chr(34) * 2)}",1,0.1,0.8,1.2,0.01,20\n')
    loaded = Params.from_dict(json.loads(params.read_text()), source=str(params))
    pages.write_index(record, params=loaded, pages=[("Audit " + HOSTILE, "01_audit.html", 1.0)],
                      started="now", data_sha256="0" * 64)
    for page in (record / "report" / "index.html", record / "report" / "01_audit.html"):
        tags = [t for t, _ in parse(page).tags]
        assert "script" not in tags and not [a for t, a in parse(page).tags if "onerror" in a], page.name
    index = (record / "report" / "index.html").read_text()
    assert "&lt;script&gt;alert(2)&lt;/script&gt;" in index and "x&lt;img" in index


def _chromium():
    return shutil.which("chromium") or shutil.which("chromium-browser")


PROBE = """<script>
window.addEventListener("load", function () {
  var images = Array.prototype.map.call(document.images, function (i) {
    return [i.id || i.alt, i.complete && i.naturalWidth > 0]; });
  document.body.setAttribute("data-probe", JSON.stringify({
    images: images, tables: document.querySelectorAll("table").length,
    estimates: document.querySelectorAll("#estimates tbody tr").length }));
});
</script>"""


@pytest.mark.skipif(not _chromium(), reason="headless Chromium is not installed (.ci/run installs Debian's chromium)")
def test_every_page_renders_offline_in_a_real_browser(demo_record, tmp_path):
    """Headless Chromium opens each page from disk with every host unresolvable and no proxy; from the
    rendered DOM, the landing page has the estimates table and its figure, and every stage page shows
    every figure its notebook made."""
    copy = tmp_path / "record"
    shutil.copytree(demo_record, copy)
    for page in all_pages(copy):
        probe = page.with_name(f"probe-{page.name}")
        probe.write_text(page.read_text().replace("</body>", PROBE + "</body>"))
        result = subprocess.run(
            [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--no-proxy-server", "--host-resolver-rules=MAP * ~NOTFOUND", f"--user-data-dir={tmp_path / 'profile'}",
             "--virtual-time-budget=10000", "--dump-dom", probe.as_uri()],
            capture_output=True, text=True, timeout=120)
        found = re.search(r'data-probe="([^"]*)"', result.stdout)
        assert found, (page.name, result.stderr[-2000:])
        probe_data = json.loads(found.group(1).replace("&quot;", '"'))
        assert all(ok for _, ok in probe_data["images"]), (page.name, probe_data)
        if page.name == "index.html":
            assert probe_data["estimates"] == 3 and ["effect-figure", True] in probe_data["images"]
        else:
            notebook = json.loads((copy / "notebooks" / f"{page.stem}.ipynb").read_text())
            images = sum("image/png" in o.get("data", {}) for c in notebook["cells"] for o in c.get("outputs", []))
            assert len(probe_data["images"]) == images, page.name
