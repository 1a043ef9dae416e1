"""Hostile inputs through the real CLI (issue 9, "Done when").

Every case is a study folder (data file + params file) written by the test, run through
``gapbook.cli.main`` exactly as the ``gapbook`` command runs it. For each case:

- no code runs: every attack would create a canary file, which must not exist afterwards;
- no traceback reaches stdout or stderr, and a refusal is one line on stderr;
- the data file is byte-identical afterwards (sha256 before and after);
- a refused ``run`` leaves no record under a final name (nothing but what was there);
- the exit code is 2 for a refusal (0 where the input is legitimate but hostile-looking).

Most cases stop at ``check``/pre-flight, in process, in well under a second each; the cases
whose pages must be proven free of user markup share one full run (``test_pages_...``).
"""
from __future__ import annotations

import hashlib
import json
import re
import sys
from html.parser import HTMLParser
from pathlib import Path
from typing import Any, Callable, Dict, List, Optional

import numpy as np
import pandas as pd
import pytest
import yaml

from gapbook import cli

HERE = Path(__file__).resolve().parent


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _frame(n: int = 40, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(50, 10, n).round(1)
    y = (2 + 0.1 * x + rng.normal(0, 1, n)).round(2)
    frame = pd.DataFrame({"pid": [f"P{i:03d}" for i in range(n)], "x": x.astype(str), "y": y.astype(str),
                          "g": rng.choice(["a", "b"], n)})
    frame.loc[[3, 7, 11], "y"] = "NA"
    return frame


class Case:
    """One hostile study: how to write its files, which command, what must come out."""

    def __init__(self, name: str, *, params: Optional[Dict[str, Any]] = None, params_text: Optional[str] = None,
                 data: Optional[Callable[[Path], Path]] = None, command: str = "check", exit_code: int = 2,
                 needle: str = "", args: Optional[List[str]] = None):
        self.name, self.params, self.params_text, self.data = name, params, params_text, data
        self.command, self.exit_code, self.needle, self.args = command, exit_code, needle, args or []

    def __repr__(self) -> str:
        return self.name


def csv_data(frame: Optional[pd.DataFrame] = None, name: str = "study.csv") -> Callable[[Path], Path]:
    def write(folder: Path) -> Path:
        path = folder / name
        (frame if frame is not None else _frame()).to_csv(path, index=False)
        return path
    return write


def raw_data(content: bytes, name: str = "study.csv") -> Callable[[Path], Path]:
    def write(folder: Path) -> Path:
        path = folder / name
        path.write_bytes(content)
        return path
    return write


CANARY = "{canary}"  # replaced by the case's canary path
TOUCH = f"__import__('os').system('touch {CANARY}')"
NP_TOUCH = f"np.lib._npyio_impl.os.system('touch {CANARY}')"
HOSTILE_HEADER = f'x") + I(0*Q("x") + {TOUCH}) + Q("x'


def with_column(name: str) -> pd.DataFrame:
    frame = _frame()
    frame[name] = frame["x"]
    return frame


def _dates() -> pd.DataFrame:
    frame = _frame()
    frame["visit"] = [f"2026-02-{1 + i % 28:02d}" for i in range(len(frame))]
    return frame


def _ages() -> pd.DataFrame:
    frame = _frame()
    frame["age"] = [str(a) for a in np.random.default_rng(1).integers(20, 90, len(frame))]
    frame.loc[[0, 5], "age"] = "60"
    return frame


def _nested_parquet(folder: Path) -> Path:
    path = folder / "study.parquet"
    frame = _frame(12)
    frame["x"] = [[1.0, 2.0]] * 12
    frame.to_parquet(path, index=False)
    return path


def _wide(folder: Path) -> Path:
    rng = np.random.default_rng(5)
    values = rng.normal(size=(30, 2000)).round(2)
    values[rng.random(values.shape) < 0.05] = np.nan
    frame = pd.DataFrame(values, columns=[f"v{i}" for i in range(2000)])
    frame.insert(0, "pid", range(30))
    path = folder / "study.csv"
    frame.to_csv(path, index=False)
    return path


def _semicolon() -> bytes:
    lines = ["pid;x;y"] + [f"P{i};{50 + i},5;{2 + i},25" for i in range(20)]
    return ("\n".join(lines) + "\n").encode()


def _comma_decimals() -> pd.DataFrame:
    frame = _frame()
    frame["x"] = [v.replace(".", ",") for v in frame["x"]]
    return frame


BASE = {"data": {"path": "study.csv", "id": "pid"}}
MODEL = {"analysis": {"formula": "y ~ x + g"}}


def p(**sections: Any) -> Dict[str, Any]:
    body = json.loads(json.dumps(BASE))
    for key, value in sections.items():
        if key == "data":
            body["data"].update(value)
        else:
            body[key] = value
    return body


CASES = [
    # -- expressions written in the params (issue 9 §1, measured)
    Case("applies_if_globals", params=p(variables={"x": {"applies_if": "@np.load.__globals__['os']"}}),
         needle="variables.x.applies_if"),
    Case("applies_if_globals_call", params=p(variables={
        "x": {"applies_if": f"np.load.__globals__['os'].system('touch {CANARY}') == 0"}}),
         needle="'__globals__' is not allowed"),
    Case("applies_if_import", params=p(variables={"x": {"applies_if": f"{TOUCH} == 0"}}), command="run",
         needle="'__import__' is not allowed"),
    Case("applies_if_subclasses", params=p(variables={"x": {"applies_if": "().__class__.__bases__[0].__subclasses__()"}}),
         needle="is not allowed"),
    Case("applies_if_lambda", params=p(variables={"x": {"applies_if": "(lambda: 1)() == 1"}}), needle="lambda"),
    Case("applies_if_comprehension", params=p(variables={"x": {"applies_if": "[c for c in g] == 1"}}),
         needle="is not allowed"),
    Case("applies_if_query_at", params=p(variables={"x": {"applies_if": "@x > 1"}}), needle="not a valid expression"),
    Case("applies_if_unknown_level", params=p(variables={"g": {"type": "binary", "levels": ["a", "b"]},
                                                         "x": {"applies_if": "g == 'c'"}}),
         needle="'c' is not a level of 'g'"),
    Case("passive_np_lib", params=p(imputation={"passive": {"x": NP_TOUCH}}), command="run",
         needle="imputation.passive.x: '_npyio_impl' is not allowed"),
    Case("passive_import", params=p(imputation={"passive": {"x": TOUCH}}), needle="'__import__' is not allowed"),
    Case("passive_open", params=p(imputation={"passive": {"x": f"open('{CANARY}', 'w')"}}), needle="'open' is not allowed"),
    Case("formula_np_lib", params=p(analysis={"formula": f"y ~ I(0*{NP_TOUCH})"}), command="run",
         needle="analysis.formula: '_npyio_impl' is not allowed"),
    Case("formula_import", params=p(analysis={"formula": f"y ~ x + I({TOUCH})"}), needle="'__import__' is not allowed"),
    Case("formula_contrast_import", params=p(analysis={"formula": f"y ~ C(g, Treatment({TOUCH}))"}),
         needle="is not allowed"),
    Case("formula_keyword", params=p(analysis={"formula": f"y ~ bs(x, df={TOUCH})"}), needle="is not allowed"),
    Case("formula_dunder_attribute", params=p(analysis={"formula": "y ~ x.__class__"}), needle="'__class__'"),
    Case("formula_dotted_name", params=p(analysis={"formula": "y ~ alk.phos"}),
         data=csv_data(with_column("alk.phos")), needle='Q("alk.phos")'),
    # -- hostile column headers (issue 9 §1, measured: a params file with only a data section)
    Case("header_formula_injection", params=p(), data=csv_data(with_column(HOSTILE_HEADER)), command="run",
         needle="has a double quote in its name"),
    Case("header_newline_escape", params=p(), data=csv_data(with_column("a\nb\x1b[2J")), needle="control character"),
    Case("header_bidi_override", params=p(), data=csv_data(with_column("dose\u202egm")), needle="U+202E"),
    Case("header_backslash", params=p(), data=csv_data(with_column("a\\b")), needle="a backslash"),
    Case("header_duplicate", params=p(), data=raw_data(b"pid,x,x\nP1,1,2\nP2,3,4\n"),
         needle="columns 2 and 3 are both named 'x'"),
    Case("header_too_long", params=p(), data=csv_data(with_column("n" * 2000)), needle="characters long"),
    # -- params bounds and odd YAML (issue 9 §6, measured)
    Case("huge_m", params=p(imputation={"m": 1_000_000_000}), needle="imputation.m: 1000000000 is above"),
    Case("huge_iterations", params=p(imputation={"iterations": 10 ** 9}), needle="imputation.iterations"),
    Case("huge_replicates", params=p(simulation={"replicates": 10 ** 9}), needle="simulation.replicates"),
    Case("huge_delta_grid", params=p(sensitivity={"delta": {"y": [float(v) for v in np.linspace(0, 1, 5000)]}}),
         needle="at most 101"),
    Case("empty_delta_grid", params=p(sensitivity={"delta": {"y": []}}), needle="the delta grid of 'y' is empty"),
    Case("nan_range", params_text="data: {path: study.csv, id: pid}\nvariables: {x: {range: [.nan, 5]}}\n",
         needle="finite number"),
    Case("deep_yaml", params_text="data: {path: study.csv}\nx: " + "[" * 3000 + "]" * 3000 + "\n",
         needle="nested too deeply"),
    Case("yaml_python_tag", params_text=f"data: !!python/object/apply:os.system ['touch {CANARY}']\n",
         needle="not valid YAML"),
    Case("yaml_alias_bomb", params_text="data: {path: study.csv}\nstudy:\n  " + "\n  ".join(
        ["a0: &a0 [x, x, x, x, x, x, x, x, x, x]"]
        + [f"a{i}: &a{i} [" + ", ".join([f"*a{i - 1}"] * 10) + "]" for i in range(1, 9)]) + "\n",
         needle="too many entries"),
    Case("yaml_huge_integer", params_text="data: {path: study.csv}\nimputation: {m: 1" + "0" * 6000 + "}\n",
         needle="thousands of digits"),
    Case("long_study_name", params=p(study={"name": "<b>" * 5000}), needle="study.name"),
    Case("too_many_markers", params=p(missing={"markers": [str(i) for i in range(5000)]}), needle="missing.markers"),
    # -- values that would lose their meaning (issue 9 §5, measured)
    Case("code_among_real_values", params=p(missing={"reasons": {60: "refused"}}), data=csv_data(_ages()),
         needle="the missing code 60 ('refused', missing.reasons) lies among the real values of"),
    Case("marker_is_a_level", params=p(missing={"markers": ["", "a"]}, variables={"g": {"levels": ["a", "b"]}}),
         needle="'a' is both a missing marker"),
    Case("semicolon_file", params=p(), data=raw_data(_semicolon()), needle="looks semicolon-delimited"),
    Case("comma_decimals", params=p(), data=csv_data(_comma_decimals()), needle="set data.decimal: ','"),
    Case("dates_as_levels", params=p(), data=csv_data(_dates()), needle="column 'visit' holds dates"),
    # -- odd files (issue 9 §6, measured)
    Case("csv_named_xlsx", params=p(data={"path": "study.xlsx"}), data=raw_data(b"pid,x\nP1,1\n", "study.xlsx"),
         needle="cannot be read as xlsx"),
    Case("nested_parquet", params=p(data={"path": "study.parquet"}), data=_nested_parquet,
         needle="holds list<element: double> values"),
    Case("latin1_as_utf8", params=p(), data=raw_data("pid,caf\xe9\nP1,1\n".encode("latin-1")),
         needle="not readable as utf-8"),
    Case("binary_garbage", params=p(), data=raw_data(bytes(range(256)) * 16), needle="study.csv"),
    Case("empty_file", params=p(), data=raw_data(b""), needle="empty"),
    Case("data_is_a_folder", params=p(data={"path": "."}), needle="is not a regular file"),
    Case("ignore_unknown_column", params=p(data={"ignore": ["nope"]}), needle="data.ignore names 'nope'"),
    Case("out_in_sys", params=p(), command="run", args=["--out", "/sys/kernel/gapbook"], needle="/sys/kernel"),
    # -- legitimate but hostile-looking: exit 0, nothing runs
    Case("wide_2000_columns", params={"data": {"path": "study.csv", "id": "pid"}}, data=_wide, exit_code=0),
    Case("markup_in_names_check", params=p(study={"name": "<script>alert(1)</script>"},
                                           missing={"reasons": {-9: "<img src=x onerror=alert(1)>"}}),
         data=csv_data(with_column("<i>dose</i>")), exit_code=0),
]


def _materialise(case: Case, folder: Path) -> Dict[str, Any]:
    canary = folder / "canary-created"
    data = (case.data or csv_data())(folder)
    params_path = folder / "params.yaml"
    if case.params_text is not None:
        params_path.write_text(case.params_text.replace(CANARY, str(canary)), encoding="utf-8")
    else:
        text = yaml.safe_dump(case.params, allow_unicode=True, sort_keys=False)
        params_path.write_text(text.replace(CANARY, str(canary)), encoding="utf-8")
    return {"canary": canary, "data": data, "params": params_path}


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_hostile_input_runs_nothing_and_stops_with_one_line(case, tmp_path, capfd):
    files = _materialise(case, tmp_path)
    before = _sha(files["data"]) if files["data"].is_file() else None
    out = tmp_path / "records"
    args = [case.command, str(files["params"])]
    if case.command == "run":
        args += case.args or ["--out", str(out)]
    code = cli.main(args)
    stdout, stderr = capfd.readouterr()
    assert code == case.exit_code, (stdout, stderr)
    assert not files["canary"].exists(), "the attack ran code"
    assert "Traceback" not in stdout + stderr
    if before is not None:
        assert _sha(files["data"]) == before, "the data file changed"
    if case.exit_code == 2:
        lines = [line for line in stderr.splitlines() if line.strip()]
        assert len(lines) == 1 and lines[0].startswith("gapbook: error: "), stderr
        assert case.needle in lines[0], lines[0]
        assert "\x1b" not in stderr
    if case.command == "run":
        assert not out.exists() or not any(out.iterdir()), "a refused run left a record"


def test_the_battery_is_big_enough():
    # issue 9: at least 40 hostile cases through the real CLI
    assert len(CASES) >= 40


def test_one_case_through_the_installed_command(tmp_path):
    """The console script itself (a subprocess), for the measured header injection."""
    import subprocess

    case = next(c for c in CASES if c.name == "header_formula_injection")
    files = _materialise(case, tmp_path)
    before = _sha(files["data"])
    command = Path(sys.executable).parent / "gapbook"
    result = subprocess.run([str(command), "run", str(files["params"]), "--out", str(tmp_path / "records")],
                            capture_output=True, text=True, timeout=120)
    assert result.returncode == 2 and "Traceback" not in result.stderr + result.stdout
    assert not files["canary"].exists() and _sha(files["data"]) == before
    assert not (tmp_path / "records").exists() or not any((tmp_path / "records").iterdir())


# ---------------------------------------------------------------------------
# Pages never carry live markup from users' text (issue 9 §4): one full run of every stage on a
# small study whose every user-supplied string is hostile, then every page parsed.

SCRIPT = "<script>alert(1)</script>"
IMG = "<img src=x onerror=alert(2)>"
JS_LINK = "[click](javascript:alert(3))"
JS_IMAGE = "![pic](javascript:alert(4))"
COMMENT = "<!-- hidden -->"
CELL = "</td></tr></table><b>x</b>"
TICKS = "`tick`"
MATHS = "$x^2$"
BIDI = "\u202eevil\u202c"  # right-to-left override ... pop
MARKUP = [SCRIPT, IMG, JS_LINK, JS_IMAGE, COMMENT, CELL, TICKS, MATHS]


def _hostile_study(folder: Path) -> Path:
    """A two-arm study whose column headers, level names, labels, reason labels, marker text, ids,
    study name and report title all carry markup (headers without quotes or control characters,
    which intake refuses, see ``header_*`` above)."""
    rng = np.random.default_rng(7)
    n = 120
    arm, y, z, site = f"arm {IMG}", f"y {COMMENT} {MATHS}", f"z {JS_IMAGE}", f"site {CELL}"
    arms = [f"ctl {SCRIPT}", f"sms {JS_LINK}"]
    sites = [f"s1 {TICKS}", f"s2 {MATHS}", f"s3 {CELL}"]
    given = rng.choice(arms, n)
    age = rng.normal(50, 10, n).round(1)
    zz = (rng.normal(0, 1, n) + 0.02 * age).round(2)
    outcome = (1 + 0.5 * (given == arms[1]) + 0.05 * age + 0.3 * zz + rng.normal(0, 1, n)).round(2)
    frame = pd.DataFrame({"pid": [f"P{i:03d}{IMG}" for i in range(n)], arm: given, "age": age.astype(str),
                          z: zz.astype(str), site: rng.choice(sites, n), y: outcome.astype(str)})
    lost = rng.random(n) < 0.15 + 0.2 * (age > 55)
    frame.loc[lost, y] = np.where(rng.random(lost.sum()) < 0.5, "-9", f"nm {SCRIPT}")
    frame.loc[rng.random(n) < 0.12, z] = "-8"
    frame.loc[rng.random(n) < 0.05, "age"] = ""
    frame.loc[3, "age"] = "250"  # outside the range: listed for review with its (hostile) id
    # two legitimate inputs that warn, quoting names, ids and a marker: a dose recorded where it does not
    # apply, and a marker that blanks most of a column
    frame[f"on {IMG}"] = np.where(np.arange(n) % 2 == 0, "yes", "no")
    frame[f"dose {SCRIPT}"] = (10 + np.arange(n) % 7).astype(str)
    frame[f"smoker {JS_LINK}"] = np.where(np.arange(n) % 3 == 0, "yes", f"no {JS_IMAGE}")
    frame.to_csv(folder / "study.csv", index=False)
    params = {
        "study": {"name": f"Study {SCRIPT} {BIDI} {JS_LINK}"},
        "data": {"path": "study.csv", "id": "pid"},
        "variables": {
            arm: {"type": "binary", "levels": arms, "label": f"Arm {IMG} {JS_IMAGE}"},
            "age": {"type": "continuous", "range": [18, 100], "label": f"Age {SCRIPT} {MATHS} {BIDI}"},
            z: {"type": "continuous", "label": f"Z {CELL} {TICKS}"},
            site: {"type": "nominal", "levels": sites, "label": f"Site {COMMENT}"},
            y: {"type": "continuous", "label": f"Outcome {JS_LINK} {MATHS}"},
            f"dose {SCRIPT}": {"type": "continuous", "applies_if": f"`on {IMG}` == 'yes'"},
        },
        "missing": {"markers": ["", f"nm {SCRIPT}", f"no {JS_IMAGE}"],
                    "reasons": {-9: f"lost {IMG} {JS_LINK}", -8: f"not done {CELL} {TICKS} {MATHS} {BIDI}"}},
        "audit": {"by": [arm, site]},
        "analysis": {"formula": f'Q("{y}") ~ Q("{arm}") + age + Q("{z}") + C(Q("{site}"))', "exposure": arm},
        # small on purpose: the pages, not the statistics, are under test here
        "imputation": {"m": 3, "iterations": 3, "seed": 11},
        "sensitivity": {"delta": {y: [0.0, 1.0]}, "m": 2},
        "simulation": {"replicates": 4, "m": 2, "n_jobs": 1, "seed": 12},
        "report": {"title": f"Report {IMG} {SCRIPT} {JS_LINK} {COMMENT} {MATHS} {BIDI}", "group": arm},
    }
    path = folder / "params.yaml"
    path.write_text(yaml.safe_dump(params, allow_unicode=True, sort_keys=False), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def hostile_record(tmp_path_factory) -> Path:
    from conftest import record_path, run_gapbook

    folder = tmp_path_factory.mktemp("hostile-pages")
    params = _hostile_study(folder)
    before = _sha(folder / "study.csv")
    result = run_gapbook("run", params, "--out", folder / "records")
    assert "Traceback" not in result.stdout + result.stderr
    record = record_path(result)
    assert _sha(folder / "study.csv") == before
    return record


# Elements no user text may become, and the text of elements that only markup in users' text makes
FORBIDDEN = {"script", "iframe", "frame", "object", "embed", "svg", "math", "form", "input", "button", "base",
             "link", "audio", "video", "source", "template", "textarea", "select"}
FROM_MARKUP = {("b", "x"), ("code", "tick"), ("a", "click"), ("img", "pic")}


class _Live(HTMLParser):
    """Everything in a page that is live markup rather than text."""

    def __init__(self, page: Path, record: Path):
        super().__init__(convert_charrefs=True)
        self.page, self.record, self.findings, self.text, self._open = page, record, [], [], []

    def handle_starttag(self, tag, attrs):
        where = f"{self.page.name}:{self.getpos()[0]}"
        values = dict(attrs)
        if tag in FORBIDDEN:
            self.findings.append((where, tag))
        for key, value in attrs:
            if key.startswith("on"):
                self.findings.append((where, f"{tag} {key}"))
            if value and re.search(r"javascript:|vbscript:|#harmful-link", value, re.IGNORECASE):
                self.findings.append((where, f"{tag} {key}={value}"))
        if tag == "img":
            source = values.get("src") or ""
            if not source.startswith(("data:image/png;base64,", "data:image/svg+xml;base64,")):
                inside = (self.page.parent / source).resolve()
                if not (source.startswith("../figures/") and inside.is_file()):
                    self.findings.append((where, f"img src={source}"))
        if tag == "a":
            target = values.get("href") or ""
            inside = (self.page.parent / target).resolve()
            if re.match(r"[a-z][a-z0-9+.-]*:|/|#", target, re.IGNORECASE) or not inside.is_file() \
                    or self.record.resolve() not in inside.parents:
                self.findings.append((where, f"a href={target}"))
        if tag in ("img",) and (tag, values.get("alt")) in FROM_MARKUP:
            self.findings.append((where, f"img alt={values.get('alt')}"))
        if tag not in ("img", "meta", "br", "hr", "col", "input", "link", "source"):
            self._open.append([tag, ""])

    def handle_endtag(self, tag):
        while self._open:
            name, text = self._open.pop()
            if (name, text.strip()) in FROM_MARKUP:
                self.findings.append((f"{self.page.name}:{self.getpos()[0]}", f"<{name}>{text}"))
            if name == tag:
                break

    def handle_data(self, data):
        self.text.append(data)
        if self._open:
            self._open[-1][1] += data

    def handle_comment(self, data):
        self.findings.append((f"{self.page.name}:{self.getpos()[0]}", f"<!--{data}-->"))


def _live_markup(page: Path, record: Path, markup: Optional[str] = None):
    parser = _Live(page, record)
    parser.feed(page.read_text(encoding="utf-8") if markup is None else markup)
    parser.close()
    return parser.findings, "".join(parser.text)


@pytest.mark.slow
def test_pages_never_carry_live_markup_from_user_text(hostile_record):
    pages = sorted((hostile_record / "report").glob("*.html"))
    assert len(pages) == 9  # the landing page and one page per stage: every stage ran
    texts = {}
    for page in pages:
        findings, text = _live_markup(page, hostile_record)
        assert not findings, findings[:10]
        assert "\u202e" not in text and "\u202c" not in text, page.name  # bidi controls shown escaped
        texts[page.name] = text
    # the hostile strings did reach the pages, as text (so the checks above are not vacuous)
    everything = "\n".join(texts.values())
    for markup in MARKUP:
        assert markup in everything, markup
    assert "Report " + IMG in texts["index.html"] and "Report " + IMG in texts["08_report.html"]
    assert f"lost {IMG} {JS_LINK}" in texts["08_report.html"]  # a reason label, in the checklist
    assert f"lost {IMG} [click](java" in texts["01_audit.html"]  # ... and in the audit's reasons table
    assert "\\u202e" in texts["index.html"]
    # intake's warnings are on the audit page, as text, naming files by name only (a record travels)
    assert f"is false for 60 rows that hold a value of 'dose {SCRIPT}'" in texts["01_audit.html"]
    assert f"ids P001{IMG}, P003{IMG}" in texts["01_audit.html"]
    assert f"the missing marker 'no {JS_IMAGE}'" in texts["01_audit.html"]
    assert not [name for name, text in texts.items() if str(hostile_record.parent.parent) in text]


@pytest.mark.slow
def test_notebook_markdown_outputs_are_text_in_any_renderer(hostile_record):
    """JupyterLab renders a notebook's Markdown outputs with raw HTML allowed; rendered that way
    (mistune without escaping) no user text becomes an element, and no '$' opens maths."""
    import mistune

    render = mistune.create_markdown(escape=False, plugins=["table", "strikethrough"])
    shown = 0
    for path in sorted((hostile_record / "notebooks").glob("*.ipynb")):
        notebook = json.loads(path.read_text(encoding="utf-8"))
        for cell in notebook["cells"]:
            for output in cell.get("outputs", []):
                markdown = output.get("data", {}).get("text/markdown")
                if markdown is None:
                    continue
                source = "".join(markdown) if isinstance(markdown, list) else markdown
                shown += 1
                findings, _ = _live_markup(path, hostile_record, render(source))
                assert not findings, (path.name, source[:300], findings[:5])
                assert not re.search(r"(?<!\\)\$", re.sub(r"`+[^`]*`+", "", source)), (path.name, source[:300])
    assert shown > 20
