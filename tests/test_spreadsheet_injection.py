"""A record's tables open safely in a spreadsheet: no text cell is read as a formula.

Source of the rule: OWASP's "CSV Injection" guidance (recalled from memory): a spreadsheet reads a
cell starting with '=', '+', '-', '@', a tab or a carriage return as a formula; the defence is a
single quote in front of such a text cell. Numbers, negative ones included, stay numbers.
"""
from __future__ import annotations

import csv
import io
import re

import numpy as np
import pandas as pd
import pytest
import yaml

from gapbook.stage import read_csv, write_csv
from gapbook.text import spreadsheet_original, spreadsheet_safe

DANGEROUS = ("=", "+", "-", "@", "\t", "\r")
PLAIN_NUMBER = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?\Z|[+-]?inf\Z")

COLUMNS = ["=arm", "-age", "@place", "+y"]            # intake drops tabs around a header, so no tab/CR here
LEVELS = ["=ctl", "+sms", "@home", "-clinic", "\tward", "\rhospice"]
REASONS = {-99: "=lost", -98: "+not done", -97: "-withdrew", -96: "@skip", -95: "\tdeclined", -94: "\rrefused"}


@pytest.mark.parametrize("text", ["=1+1", "+x", "-x", "@SUM(A1)", "\tx", "\rx", "-", "'=x", "''-y", "-1+1",
                                  "=HYPERLINK(\"http://x\")", "-inf"])
def test_a_would_be_formula_gets_one_quote_and_comes_back(text):
    written = spreadsheet_safe(text)
    assert written == "'" + text
    assert spreadsheet_original(written) == text


@pytest.mark.parametrize("text", ["-0.25", "+3", "1e-5", "-.5E3", "12", "abc", "'quoted", "a=b", " =x", ""])
def test_numbers_and_plain_text_stay_as_written(text):
    assert spreadsheet_safe(text) == text
    assert spreadsheet_original(text) == text


def test_a_table_without_formula_text_is_written_as_pandas_writes_it(tmp_path):
    # the demo record's tables must stay byte-identical: nothing changes unless a text cell needs it
    frame = pd.DataFrame({"term": ["Intercept", "arm[T.sms]"], "estimate": [-0.123456789012, 2.0],
                          "level": pd.Categorical(["a", "b"]), "n": [3, 4], "flag": [True, False]})
    path = write_csv(frame, tmp_path / "t.csv")
    assert path.read_bytes() == frame.to_csv(index=False, float_format="%.10g", lineterminator="\n").encode()


def test_texts_with_formula_starts_and_carriage_returns_come_back_exactly(tmp_path):
    frame = pd.DataFrame({"=a": ["x\ry", "=z", "\rq", None], "b": [1.5, -np.inf, -2.5, 2.0],
                          "c": pd.Categorical(["-1", "@", "+x", "a\x00\n\x00b"]), "\rd": ["'=", "''+", "-", "ok"]})
    path = write_csv(frame, tmp_path / "t.csv")
    rows = list(csv.reader(io.StringIO(path.read_bytes().decode("utf-8"), newline="")))
    assert len(rows) == 5 and all(len(row) == 4 for row in rows)  # a CR inside a text splits no row
    assert rows[0] == ["'=a", "b", "c", "'\rd"]
    assert [row[1] for row in rows[1:]] == ["1.5", "-inf", "-2.5", "2"]  # numbers untouched
    assert [row[2] for row in rows[1:]] == ["-1", "'@", "'+x", "a\x00\n\x00b"]
    back = read_csv(path)
    assert list(back.columns) == list(frame.columns)
    assert back["=a"].tolist()[:3] == ["x\ry", "=z", "\rq"]
    assert back["c"].tolist() == ["-1", "@", "+x", "a\x00\n\x00b"]
    assert back["\rd"].tolist() == ["'=", "''+", "-", "ok"]


def _formula_study(folder):
    """Column names, levels and reason labels starting with every character a spreadsheet reads as a formula."""
    rng = np.random.default_rng(5)
    n = 120
    arm = rng.choice(LEVELS[:2], n)
    age = rng.normal(50, 10, n).round(1)
    y = (1 - 0.8 * (arm == LEVELS[1]) - 0.05 * age + rng.normal(0, 1, n)).round(2)
    frame = pd.DataFrame({"pid": [f"P{i:03d}" for i in range(n)], COLUMNS[0]: arm, COLUMNS[1]: age.astype(str),
                          COLUMNS[2]: rng.choice(LEVELS[2:], n), COLUMNS[3]: y.astype(str)})
    for code in REASONS:
        frame.loc[rng.random(n) < 0.04, COLUMNS[1] if code % 2 else COLUMNS[3]] = str(code)
    frame.to_csv(folder / "study.csv", index=False, quoting=csv.QUOTE_ALL)  # quoted: a bare CR splits a row
    params = {"study": {"name": "=cmd|' /C calc'!A0"},
              "data": {"path": "study.csv", "id": "pid"},
              "variables": {COLUMNS[0]: {"type": "binary", "levels": LEVELS[:2]},
                            COLUMNS[1]: {"type": "continuous"},
                            COLUMNS[2]: {"type": "nominal", "levels": LEVELS[2:]},
                            COLUMNS[3]: {"type": "continuous"}},
              "missing": {"reasons": REASONS},
              "audit": {"by": [COLUMNS[0]]},
              "analysis": {"formula": 'Q("+y") ~ Q("=arm") + Q("-age") + C(Q("@place"))', "exposure": COLUMNS[0]},
              "report": {"group": COLUMNS[0]}}
    path = folder / "params.yaml"
    path.write_text(yaml.safe_dump(params, allow_unicode=True, sort_keys=False), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def formula_record(tmp_path_factory):
    from conftest import record_path, run_gapbook

    folder = tmp_path_factory.mktemp("formula-study")
    params = _formula_study(folder)
    result = run_gapbook("run", params, "--only", "audit,mechanism,cases,indicator,report",
                         "--out", folder / "records")
    assert result.returncode == 0, result.stderr[-2000:]
    return record_path(result)


def _cells(path):
    """Every cell of a table as written (header included), read by Python's csv module."""
    return [cell for row in csv.reader(io.StringIO(path.read_bytes().decode("utf-8"), newline="")) for cell in row]


def test_no_cell_of_the_record_starts_a_formula(formula_record):
    tables = sorted((formula_record / "tables").glob("*.csv"))
    assert len(tables) > 10
    every = []
    for table in tables:
        for cell in _cells(table):
            every.append(cell)
            assert not cell.startswith(DANGEROUS) or PLAIN_NUMBER.match(cell), (table.name, cell)
    # every hostile name, level and reason reached the tables, neutralised (so the check above is not vacuous)
    for text in COLUMNS + LEVELS + list(REASONS.values()):
        assert "'" + text in every, text
    # a column name is a header cell too: one 0/1 column per variable in the patterns table
    header = _cells(formula_record / "tables" / "audit_patterns.csv")[:8]
    assert {"'" + c for c in COLUMNS} <= set(header)
    # negative numbers are still numbers: written plain, and read back as floats
    estimates = pd.read_csv(formula_record / "tables" / "estimates.csv")
    assert estimates["ci_lower"].dtype == float and (estimates["ci_lower"] < 0).any()
    assert any(re.fullmatch(r"-\d+(\.\d+)?(e-?\d+)?", cell) for cell in _cells(formula_record / "tables" / "estimates.csv"))


def test_what_reads_a_table_back_sees_the_original_text(formula_record):
    variables = read_csv(formula_record / "tables" / "audit_variables.csv")
    assert variables["variable"].tolist() == COLUMNS
    reasons = read_csv(formula_record / "tables" / "audit_reasons.csv")
    assert set(reasons["reason"]) == set(REASONS.values())
    flow = read_csv(formula_record / "tables" / "participant_flow.csv", keep_default_na=False)
    assert {"=ctl", "+sms"} <= set(flow.columns)
    # the landing page shows the levels as written, not with the quote the table carries
    page = (formula_record / "report" / "index.html").read_text(encoding="utf-8")
    assert "=ctl" in page and "+sms" in page
    assert "&#x27;=ctl" not in page and "&#x27;+sms" not in page and "'=ctl" not in page


def test_verify_matches_the_neutralised_tables(formula_record):
    from conftest import run_gapbook

    result = run_gapbook("verify", formula_record)
    assert result.returncode == 0, result.stdout[-2000:] + result.stderr[-2000:]
