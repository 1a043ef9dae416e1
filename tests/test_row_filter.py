"""data.keep_rows: the rows a study uses, said in the params, applied alike by both engines.

The reference file is palmerpenguins (PyPI package palmerpenguins: 344 penguins) laid out as a
multi-parameter long file in the shape of a CDISC ADaM basic data structure dataset (one row per
penguin and parameter: PARAMCD, AVAL, an analysis flag ANL01FL coded 'Y'/blank and a derivation
type DTYPE that is blank on observed rows). Kept rows and missing counts are checked against
pandas filtering and counting that file (the reference), and the two engines against each other.
"""
from __future__ import annotations

import subprocess
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from gapbook.audit import audit_study
from gapbook.audit_duckdb import audit_scanned
from gapbook.cli import main
from gapbook.errors import InputError
from gapbook.intake import load_study
from gapbook.intake_duckdb import scan_study
from gapbook.params import Params
from gapbook.report import summarise
from gapbook.stage import write_csv

MEASURES = {"BILLLEN": "bill_length_mm", "BILLDEP": "bill_depth_mm", "FLIPLEN": "flipper_length_mm",
            "BODYMASS": "body_mass_g"}


@pytest.fixture(scope="module")
def bds(penguins, tmp_path_factory) -> Path:
    """palmerpenguins in a long, multi-parameter layout, plus a derived (DTYPE) row and an unflagged row each."""
    rows = []
    for k, penguin in enumerate(penguins.itertuples(index=False), start=1):
        for code, column in MEASURES.items():
            value = getattr(penguin, column)
            aval = "" if pd.isna(value) else f"{value:g}"
            base = dict(USUBJID=f"P{k:03d}", SPECIES=penguin.species, SEX="" if pd.isna(penguin.sex) else penguin.sex,
                        PARAMCD=code, ANL01FL="Y", DTYPE="", AVAL=aval)
            rows.append(base)
            if aval == "":  # an imputed row beside the missing one, as ADaM's DTYPE rows are
                rows.append({**base, "DTYPE": "AVERAGE", "AVAL": "1"})
        rows.append(dict(USUBJID=f"P{k:03d}", SPECIES=penguin.species, SEX="", PARAMCD="BILLLEN", ANL01FL="",
                         DTYPE="", AVAL="999"))
    path = tmp_path_factory.mktemp("bds") / "adpeng.csv"
    pd.DataFrame(rows).to_csv(path, index=False)
    return path


CONDITION = "PARAMCD == 'BILLLEN' and ANL01FL == 'Y' and DTYPE == ''"


def _params(path: Path, condition: str = CONDITION, **data) -> Params:
    return Params.from_dict({"data": {"path": str(path), "keep_rows": condition, **data},
                             "missing": {"markers": [""]}})


def _written(result, folder: Path):
    return {name: write_csv(frame, folder / f"{name}.csv").read_bytes() for name, frame in result.tables().items()}


def test_kept_rows_match_pandas_filtering_and_engines_agree(bds, penguins, tmp_path):
    study = load_study(_params(bds))
    # Reference: pandas filtering the file as written (blank cells read as '').
    file = pd.read_csv(bds, dtype=str, keep_default_na=False)
    kept = file[(file.PARAMCD == "BILLLEN") & (file.ANL01FL == "Y") & (file.DTYPE == "")]
    assert (study.rows_kept.n_read, study.rows_kept.n_kept) == (len(file), len(kept)) == (len(file), len(penguins))
    # The kept AVAL is palmerpenguins' bill length: its 2 missing values (pandas isna on the shipped data).
    assert int(study.missing["AVAL"].sum()) == int(penguins["bill_length_mm"].isna().sum()) == 2
    assert np.allclose(study.data["AVAL"].dropna().to_numpy(), penguins["bill_length_mm"].dropna().to_numpy())
    pandas_audit = audit_study(study)
    with scan_study(_params(bds)) as scanned:
        duck_audit = audit_scanned(scanned)
    pandas_tables, duck_tables = _written(pandas_audit, tmp_path / "p"), _written(duck_audit, tmp_path / "d")
    assert pandas_tables.keys() == duck_tables.keys() and "audit_rows_kept" in pandas_tables
    for name in pandas_tables:
        assert pandas_tables[name] == duck_tables[name], name
    row = pandas_audit.tables()["audit_rows_kept"].iloc[0]
    assert (row["rows_read"], row["rows_kept"], row["condition"]) == (len(file), len(kept), CONDITION)
    assert pandas_audit.sentences[0].startswith(f"Rows kept by data.keep_rows: 344 of the {len(file):,} rows")


def test_filter_columns_in_ignore_are_read_for_the_filter_only(bds, tmp_path):
    params = _params(bds, ignore=["PARAMCD", "ANL01FL", "DTYPE"])
    study = load_study(params)
    assert list(study.data.columns) == ["USUBJID", "SPECIES", "SEX", "AVAL"] and len(study.data) == 344
    with scan_study(params) as scanned:
        assert list(scanned.columns) == list(study.data.columns)
        assert _written(audit_scanned(scanned), tmp_path / "d") == _written(audit_study(study), tmp_path / "p")


def test_without_the_filter_the_file_is_audited_whole(bds):
    # No keep_rows: every row is a row of the study (nothing changes for params that do not use it).
    study = load_study(Params.from_dict({"data": {"path": str(bds)}, "missing": {"markers": [""]}}))
    assert study.rows_kept is None and len(study.data) == len(pd.read_csv(bds, dtype=str))


@pytest.mark.parametrize("condition, needle", [
    ("PARAMCD == 'BILLEN'", "no row of"),                         # a value no cell holds, with the nearest one
    ("PARAMCOD == 'BILLLEN'", "'PARAMCOD' is not a column"),
    ("PARAMCD == 'BILLLEN' and DTYPE == 'AVERAGE' and ANL01FL == ''", "is true for no row"),
    ("PARAMCD == 3", "cannot be compared"),
    ("__import__('os').system('true')", "is not allowed"),
])
def test_check_refuses_a_bad_condition_naming_the_key(bds, tmp_path, gapbook_check, condition, needle):
    result = gapbook_check(bds, tmp_path, condition)
    assert result.returncode == 2, result.stderr
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "data.keep_rows" in lines[0] and needle in lines[0], lines
    if "BILLEN" in condition:
        assert "did you mean 'BILLLEN'" in lines[0]


@pytest.fixture
def gapbook_check(capsys):
    def call(data: Path, folder: Path, condition: str, engine: str = "pandas", design=None, analysis=None):
        body = {"data": {"path": str(data), "keep_rows": condition, "engine": engine, "id": None},
                "missing": {"markers": [""]}}
        if design:
            body["design"], body["analysis"] = design, analysis
        params = folder / "params.yaml"
        params.write_text(yaml.safe_dump(body))
        capsys.readouterr()
        code = main(["check", str(params)])
        out, err = capsys.readouterr()
        return subprocess.CompletedProcess(["gapbook"], code, out, err)
    return call


def test_check_says_what_was_kept_and_duckdb_agrees(bds, tmp_path, gapbook_check):
    for engine in ("pandas", "duckdb"):
        result = gapbook_check(bds, tmp_path, CONDITION, engine=engine)
        assert result.returncode == 0, result.stderr
        assert f"rows:   344 of {len(pd.read_csv(bds)):,} kept by data.keep_rows ({CONDITION})" in result.stdout


def test_follow_up_layout_uses_the_kept_rows(bds, tmp_path, gapbook_check):
    # The long layout needs one row per subject and visit: the whole file has several parameters per
    # penguin, which the refusal says to filter with data.keep_rows; the filtered file passes.
    design = {"layout": "long", "subject": "USUBJID", "visit": "PARAMCD", "visits": ["BILLLEN", "BILLDEP"]}
    analysis = {"formula": "AVAL ~ SPECIES * C(PARAMCD)", "exposure": "SPECIES"}
    whole = gapbook_check(bds, tmp_path, "ANL01FL == 'Y'", design=design,
                          analysis=analysis)
    assert whole.returncode == 2 and "data.keep_rows" in whole.stderr, whole.stderr
    kept = gapbook_check(bds, tmp_path, "PARAMCD in ['BILLLEN', 'BILLDEP'] and ANL01FL == 'Y' and DTYPE == ''",
                         design=design, analysis=analysis)
    assert kept.returncode == 0, kept.stderr
    assert "344 participants" in kept.stdout


def test_duplicate_ids_of_a_multi_parameter_file_point_at_the_filter(bds, tmp_path):
    # The BDS-shaped file read one row per penguin without a filter: the same id on several rows (one per
    # parameter), and the refusal says which key chooses one row each; both engines say the same line.
    messages = []
    for engine in ("pandas", "duckdb"):
        params = Params.from_dict({"data": {"path": str(bds), "id": "USUBJID", "engine": engine},
                                   "missing": {"markers": [""]}})
        with pytest.raises(InputError) as error:
            if engine == "pandas":
                load_study(params)
            else:
                with scan_study(params):
                    pass
        messages.append(str(error.value))
    assert messages[0] == messages[1] and "duplicate id 'P001'" in messages[0] and "data.keep_rows" in messages[0]


def test_messages_name_file_rows_not_kept_positions(tmp_path):
    # Two kept rows share an id: the message names their rows in the file (3 and 5), counted by hand.
    path = tmp_path / "dup.csv"
    pd.DataFrame({"pid": ["A", "B", "C", "D", "C"], "keep": ["n", "n", "y", "n", "y"], "x": ["1"] * 5}).to_csv(
        path, index=False)
    with pytest.raises(InputError, match=r"duplicate id 'C' in column 'pid' \(data rows 3, 5\)"):
        load_study(_params(path, "keep == 'y'", id="pid"))


def test_methods_say_which_rows_were_analysed(bds):
    study = load_study(_params(bds))
    summary = summarise(study, tables={}, title="t")
    first = summary.flow.steps.iloc[0]
    assert first["description"] == f"rows kept by data.keep_rows (344 of the {len(pd.read_csv(bds)):,} in the data file)"
    text = summary.methods_text
    assert text.startswith(f"The analysis used the 344 of {len(pd.read_csv(bds)):,} rows of the data file for "
                           f"which {CONDITION} holds")


def test_follow_up_visit_message_names_the_file_row(tmp_path, gapbook_check):
    # A kept row at an unplanned visit: the message names its place in the file (hand-counted: the 5th data
    # row), not its place among the kept rows (4th).
    long = tmp_path / "long.csv"
    pd.DataFrame({"subject": ["A", "A", "B", "B", "B"], "keep": ["n", "y", "y", "y", "y"],
                  "week": ["1", "1", "1", "2", "3"], "y": ["1", "2", "3", "4", "5"], "arm": ["a", "a", "b", "b", "b"]}
                 ).to_csv(long, index=False)
    result = gapbook_check(long, tmp_path, "keep == 'y'", design={
        "layout": "long", "subject": "subject", "visit": "week", "visits": [1, 2]},
        analysis={"formula": "y ~ arm * C(week)", "exposure": "arm"})
    assert result.returncode == 2 and "subject B has visit 3 (data row 5)" in result.stderr, result.stderr


def test_negative_time_message_names_the_file_row(tmp_path, capsys):
    # The 4th data row (id D) holds -2 and is the 3rd kept row: the message names the file's row.
    cohort = tmp_path / "cohort.csv"
    pd.DataFrame({"pid": ["A", "B", "C", "D", "E", "F"], "cohort": ["x", "y", "y", "y", "y", "y"],
                  "days": ["5", "9", "3", "-2", "7", "4"], "dead": ["1", "0", "1", "1", "0", "1"],
                  "arm": ["a", "b", "a", "b", "a", "b"]}).to_csv(cohort, index=False)
    params = tmp_path / "params.yaml"
    params.write_text(yaml.safe_dump({"data": {"path": str(cohort), "id": "pid", "keep_rows": "cohort == 'y'"},
                                      "analysis": {"formula": "days ~ arm", "family": "cox", "event": "dead"}}))
    capsys.readouterr()
    assert main(["check", str(params)]) == 2
    assert "is -2 at data row 4 (id D)" in capsys.readouterr().err
