"""The params schema: defaults, resolution of paths, and one-line errors with suggestions."""
from __future__ import annotations

import pytest

from gapbook.errors import InputError
from gapbook.params import Params, load_params


def write(tmp_path, text):
    path = tmp_path / "study.yaml"
    path.write_text(text)
    return path


def test_defaults_and_relative_data_path(tmp_path):
    params = load_params(write(tmp_path, "data: {path: data/x.csv}\n"))
    assert params.data_path == (tmp_path / "data" / "x.csv").resolve()
    assert params.audit.threshold == 0.20  # common practice, no source
    assert params.imputation.m == 20 and params.analysis.family == "gaussian"
    # the resolved dict rebuilds the same params (what notebooks receive)
    again = Params.from_dict(params.to_dict())
    assert again.data_path == params.data_path and again.imputation == params.imputation


@pytest.mark.parametrize("text,needle", [
    ("data: {path: x.csv}\nimputaton: {m: 5}\n", "unknown key 'imputaton' in (top level); did you mean 'imputation'?"),
    ("data: {path: x.csv}\nvariables: {age: {type: continous}}\n",
     "variables.age.type: 'continous' is not one of continuous, binary, nominal, ordinal, count; did you mean 'continuous'?"),
    ("data: {path: x.csv}\nanalysis: {family: binomal}\n", "did you mean 'binomial'?"),
    ("data: {paht: x.csv}\n", "unknown key 'paht' in data; did you mean 'path'?"),
    ("study: {name: x}\n", "data is required"),
    ("data: {path: x.csv}\naudit: {threshold: 1.5}\n", "audit.threshold"),
    ("data: {path: x.csv}\nimputation: {m: 0}\n", "imputation.m"),
    ("data: {path: x.csv}\nvariables: {w: {range: [10, 2]}}\n", "lower bound above its upper bound"),
    ("data: {path: x.csv}\nsensitivity: {delta: {y: {byy: arm}}}\n", "unknown key 'byy' in sensitivity.delta.y; did you mean 'by'?"),
    ("data: [path\n", "not valid YAML at line"),
    ("", "the params file is empty"),
])
def test_bad_params_give_one_line_with_the_key(tmp_path, text, needle):
    with pytest.raises(InputError) as info:
        load_params(write(tmp_path, text))
    message = str(info.value)
    assert needle in message
    assert "\n" not in message and str(tmp_path) in message


def test_missing_params_file(tmp_path):
    with pytest.raises(InputError, match="params file not found"):
        load_params(tmp_path / "nope.yaml")


def test_yaml_is_loaded_safely(tmp_path):
    with pytest.raises(InputError):
        load_params(write(tmp_path, "data: !!python/object/apply:os.system ['echo hi']\n"))


def test_shipped_params_files_validate_and_point_at_their_data():
    from pathlib import Path

    import pandas as pd

    from gapbook.models import check_formula

    root = Path(__file__).resolve().parents[1]
    demo = load_params(root / "params" / "demo.yaml")
    assert demo.data_path.is_file(), demo.data_path
    header = list(pd.read_csv(demo.data_path, nrows=0).columns)   # pandas reading the file's header
    assert demo.data.id in header and set(demo.variables) <= set(header)
    outcome, covariates = check_formula(demo.analysis.formula, header)
    assert outcome in header and set(covariates) <= set(header)
    template = load_params(root / "params" / "template.yaml")
    assert template.audit.threshold == 0.20   # the default DESIGN.md documents (common practice, no source)


def test_repository_demo_params_match_the_packaged_ones():
    from pathlib import Path

    from gapbook.demo import demo_params

    root = Path(__file__).resolve().parents[1]
    shown, packaged = load_params(root / "params" / "demo.yaml"), demo_params()
    assert shown.data_path == packaged.data_path
    assert shown.model_dump(exclude={"source", "data"}) == packaged.model_dump(exclude={"source", "data"})


def test_an_unknown_data_encoding_is_named_before_any_file_is_read(tmp_path):
    # The file does not exist: the encoding is refused when the params are read, before any file is opened.
    with pytest.raises(InputError, match=r"data.encoding: unknown text encoding.*'latin-9x'"):
        Params.from_dict({"data": {"path": str(tmp_path / "absent.csv"), "encoding": "latin-9x"}})


def test_a_declared_encoding_reads_the_file_as_pandas_does(tmp_path):
    from gapbook.intake import load_study

    # A Latin-1 file (as exported by older spreadsheet tools) with accented levels; the reference is
    # pandas.read_csv with the same encoding.
    import pandas as pd

    path = tmp_path / "site.csv"
    path.write_bytes("id,site,score\n1,Z\u00fcrich,3.5\n2,Gen\u00e8ve,\n3,Z\u00fcrich,4.0\n".encode("latin-1"))
    study = load_study(Params.from_dict({"data": {"path": str(path), "id": "id", "encoding": "latin-1"}}))
    reference = pd.read_csv(path, encoding="latin-1")
    assert list(study.data["site"].astype(str)) == list(reference["site"])
    assert study.data["score"].isna().tolist() == reference["score"].isna().tolist()
    # Read as the default UTF-8 the same bytes are not text: one line naming the key to set.
    with pytest.raises(InputError, match="set data.encoding"):
        load_study(Params.from_dict({"data": {"path": str(path), "id": "id"}}))


# ---------------------------------------------------------------------------
# bounds (issue 9 §6): checked when the params are read, one line, naming the key

BOUNDS = [
    ("imputation", "m", "MAX_M"), ("imputation", "iterations", "MAX_ITERATIONS"),
    ("imputation", "donors", "MAX_DONORS"), ("imputation", "n_jobs", "MAX_JOBS"),
    ("imputation", "seed", "MAX_SEED"), ("sensitivity", "m", "MAX_M"),
    ("simulation", "replicates", "MAX_REPLICATES"), ("simulation", "m", "MAX_M"),
    ("simulation", "n_jobs", "MAX_JOBS"), ("simulation", "seed", "MAX_SEED"),
    ("audit", "top_patterns", "MAX_TOP_PATTERNS"), ("mechanism", "em_max_iterations", "MAX_EM_ITERATIONS"),
]


@pytest.mark.parametrize("section,key,bound", BOUNDS)
def test_each_bound_holds_at_its_value_and_refuses_one_more(tmp_path, section, key, bound):
    import gapbook.params as schema

    limit = getattr(schema, bound)
    params = load_params(write(tmp_path, f"data: {{path: x.csv}}\n{section}: {{{key}: {limit}}}\n"))
    assert getattr(getattr(params, section), key) == limit
    with pytest.raises(InputError) as info:
        load_params(write(tmp_path, f"data: {{path: x.csv}}\n{section}: {{{key}: {limit + 1}}}\n"))
    assert f"{section}.{key}: {limit + 1} is above the upper bound {limit}" in str(info.value)


def test_a_billion_imputations_stop_up_front(tmp_path):
    # measured: m: 1000000000 passed check and died with MemoryError a minute into the run
    with pytest.raises(InputError, match="imputation.m: 1000000000 is above the upper bound 500"):
        load_params(write(tmp_path, "data: {path: x.csv}\nimputation: {m: 1000000000}\n"))


@pytest.mark.parametrize("text,needle", [
    ("sensitivity: {delta: {y: []}}", "the delta grid of 'y' is empty"),
    ("sensitivity: {delta: {y: {by: arm, groups: {control: [0], treatment: []}}}}",
     "the delta grid of group 'treatment' is empty"),
    ("sensitivity: {delta: {y: {values: []}}}", "the delta grid is empty"),
    ("sensitivity: {delta: {y: {by: arm}}}", "give the delta grid as values"),
    ("sensitivity: {delta: {y: [" + ", ".join(["0.1"] * 102) + "]}}", "has 102 values; at most 101"),
    ("sensitivity: {delta: {y: [0, .nan]}}", "finite number"),
    ("variables: {w: {range: [.nan, 3]}}", "finite number"),
    ("variables: {w: {range: [0, .inf]}}", "finite number"),
    ("study: {name: '" + "x" * 501 + "'}", "study.name: String should have at most 500 characters"),
    ("missing: {reasons: {60: ''}}", "missing.reasons.60"),
    ("missing: {markers: [" + ", ".join(str(i) for i in range(1001)) + "]}", "missing.markers"),
    ("variables: {bmi: {applies_if: \"@np.load.__globals__['os']\"}}", "variables.bmi.applies_if: "),
    ("variables: {bmi: {applies_if: \"__import__('os').system('x')\"}}",
     "variables.bmi.applies_if: '__import__' is not allowed"),
    ("imputation: {passive: {bmi: \"np.lib._npyio_impl.os.system('x')\"}}",
     "imputation.passive.bmi: '_npyio_impl' is not allowed"),
    ("analysis: {formula: \"y ~ I(0*np.lib._npyio_impl.os.system('x'))\"}",
     "analysis.formula: '_npyio_impl' is not allowed"),
    ("analysis: {formula: \"y ~ alk.phos\"}", "analysis.formula: 'alk.phos' is not allowed; a column name with dots "
                                               "is written Q(\"alk.phos\")"),
])
def test_bad_values_and_expressions_stop_when_the_params_are_read(tmp_path, text, needle):
    with pytest.raises(InputError) as info:
        load_params(write(tmp_path, f"data: {{path: x.csv}}\n{text}\n"))
    assert needle in str(info.value) and "\n" not in str(info.value)


def test_deep_huge_and_odd_yaml_give_one_line(tmp_path):
    with pytest.raises(InputError, match="nested too deeply"):  # measured: 3,000 levels gave a traceback
        load_params(write(tmp_path, "data: {path: x.csv}\nx: " + "[" * 3000 + "]" * 3000 + "\n"))
    with pytest.raises(InputError, match="nested more than 20 levels"):
        load_params(write(tmp_path, "data: {path: x.csv}\nvariables: " + "{a: " * 30 + "1" + "}" * 30 + "\n"))
    with pytest.raises(InputError, match="number thousands of digits"):
        load_params(write(tmp_path, "data: {path: x.csv}\nimputation: {m: 1" + "0" * 5000 + "}\n"))
    with pytest.raises(InputError, match="too many entries"):  # aliases: a small file, a huge structure
        lines = ["a0: &a0 [x, x, x, x, x, x, x, x, x, x]"]
        lines += [f"a{i}: &a{i} [" + ", ".join([f"*a{i - 1}"] * 10) + "]" for i in range(1, 8)]
        load_params(write(tmp_path, "data: {path: x.csv}\nstudy:\n  " + "\n  ".join(lines) + "\n"))
    big = tmp_path / "big.yaml"
    big.write_text("data: {path: x.csv}\n" + "# padding\n" * 600_000)
    with pytest.raises(InputError, match="at most 5,000,000 are allowed"):
        load_params(big)


def test_the_template_documents_the_bounds_and_has_one_twin():
    from pathlib import Path

    import gapbook.params as schema

    root = Path(__file__).resolve().parents[1]
    template = (root / "params" / "template.yaml").read_text()
    assert template == (root / "src" / "gapbook" / "data" / "params_template.yaml").read_text()
    for _, _, bound in BOUNDS:
        if bound != "MAX_SEED":
            assert f"at most {getattr(schema, bound)}" in template, bound
    for bound in ("MAX_GRID", "MAX_DELTA_VARIABLES", "MAX_TEXT", "MAX_LIST", "MAX_PARAMS_DEPTH"):
        assert f"{getattr(schema, bound):,}" in template or str(getattr(schema, bound)) in template, bound
