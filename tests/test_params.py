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


def test_shipped_params_files_validate():
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    for name in ("demo.yaml", "template.yaml"):
        load_params(root / "params" / name)


def test_repository_demo_params_match_the_packaged_ones():
    from pathlib import Path

    from gapbook.demo import demo_params

    root = Path(__file__).resolve().parents[1]
    shown, packaged = load_params(root / "params" / "demo.yaml"), demo_params()
    assert shown.data_path == packaged.data_path
    assert shown.model_dump(exclude={"source", "data"}) == packaged.model_dump(exclude={"source", "data"})


def test_an_unknown_data_encoding_is_named_before_any_file_is_read():
    import codecs
    # Python's codec registry is the reference: it knows latin-1 and not latin-9x.
    codecs.lookup("latin-1")
    with pytest.raises(LookupError):
        codecs.lookup("latin-9x")
    assert Params.from_dict({"data": {"path": "x.csv", "encoding": "latin-1"}}).data.encoding == "latin-1"
    with pytest.raises(InputError, match=r"data.encoding: unknown text encoding.*'latin-9x'"):
        Params.from_dict({"data": {"path": "x.csv", "encoding": "latin-9x"}})
