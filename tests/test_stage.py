"""The notebook-facing layer: params -> options adapters, params keys in errors, the result
contract, and a record written the same way twice."""
from __future__ import annotations

import dataclasses

import pandas as pd
import pytest

from gapbook.audit import AuditResult
from gapbook.cases import AvailableCaseSummary, CompleteCaseResult, CompletenessBaseline, StrategyComparison
from gapbook.demo import demo_params
from gapbook.errors import InputError
from gapbook.followup.analysis import FollowupAnalysis
from gapbook.followup.audit import FollowupAudit
from gapbook.followup.estimand import EstimandDescription
from gapbook.impute import ChainedImputation, ImputationPlan
from gapbook.indicator import MissingCategoryResult
from gapbook.little import LittleTest
from gapbook.mechanism import GroupComparison, MechanismResult, MissingnessModels
from gapbook.pool import PooledResult, WaldTest
from gapbook.report import RecordSuppression, ReportSummary
from gapbook.sensitivity import DeltaResult, SensitivityResult, StrategyAndDelta
from gapbook.simulate import SimulationResult
from gapbook.stage import open_stage

RESULTS = (AuditResult, MechanismResult, GroupComparison, LittleTest, MissingnessModels, CompleteCaseResult,
           AvailableCaseSummary, CompletenessBaseline, StrategyComparison, MissingCategoryResult, ImputationPlan,
           ChainedImputation, PooledResult, WaldTest, DeltaResult, StrategyAndDelta, SensitivityResult,
           SimulationResult, ReportSummary, RecordSuppression, FollowupAudit, FollowupAnalysis, EstimandDescription)


@pytest.mark.parametrize("result", RESULTS, ids=lambda c: c.__name__)
def test_every_result_keeps_the_one_contract(result):
    # DESIGN.md: a frozen dataclass; tables() gives {record table name: DataFrame}; sentences the wording;
    # derived values are methods. No name means two things: 'table', 'fit' and 'summary' are not attributes.
    assert dataclasses.is_dataclass(result) and result.__dataclass_params__.frozen
    fields = {f.name: f for f in dataclasses.fields(result)}
    assert "sentences" in fields
    assert callable(getattr(result, "tables", None))
    for name in ("table", "fit", "summary"):
        assert not callable(getattr(result, name, None)), name
    properties = [name for name, value in vars(result).items() if isinstance(value, property)]
    assert not properties, f"derived values are methods, not properties: {properties}"


@pytest.fixture(scope="module")
def context(tmp_path_factory):
    return open_stage(None, str(tmp_path_factory.mktemp("record")))


def test_a_whole_result_is_saved_with_one_call(context):
    audit = context.audit()
    context.save_result(audit)
    for name, frame in audit.tables().items():
        written = pd.read_csv(context.tables_dir / f"{name}.csv", keep_default_na=False)
        assert list(written.columns) == [str(c) for c in frame.columns] and len(written) == len(frame), name
    complete = context.complete_cases()
    context.save_result(complete)
    context.save_result(complete)           # saved again: its estimates rows replace themselves, not duplicate
    estimates = context.read_table("estimates")
    assert list(estimates["strategy"].unique()) == ["complete_case"]
    assert len(estimates) == len(complete.estimates())
    assert (context.tables_dir / "flow_complete_case.csv").is_file()


def test_figures_are_written_as_png_at_150_dpi_and_svg_with_the_same_bytes_twice(context):
    import matplotlib.pyplot as plt
    from PIL import Image

    def draw():
        figure, axes = plt.subplots(figsize=(3, 2))
        axes.plot([0, 1, 2], [1, 0, 2])
        axes.set_title("a question")
        return figure

    first = context.save_figure("check", draw())
    png, svg = first.read_bytes(), first.with_suffix(".svg").read_bytes()
    context.save_figure("check", draw())
    assert first.read_bytes() == png and first.with_suffix(".svg").read_bytes() == svg
    # PIL reads the PNG's pHYs chunk: 150 dots per inch (issue 10 asks 150 or more)
    assert round(Image.open(first).info["dpi"][0]) == 150
    assert b"<dc:date>" not in svg and b"Software" not in png
    plt.close("all")


def test_a_stage_error_names_the_params_file_and_key(tmp_path):
    raw = demo_params().to_dict()
    raw["imputation"]["auxiliary"] = ["educaton"]
    with pytest.raises(InputError) as error:
        open_stage(raw, str(tmp_path)).imputation_plan()
    message = str(error.value)
    assert message.endswith("demo_params.yaml: imputation.auxiliary: 'educaton' is not a column of the data; "
                            "did you mean 'education'?")
    # the stage module alone names the option it was given
    from gapbook.impute import plan_imputation
    context = open_stage(None, str(tmp_path))
    with pytest.raises(InputError, match=r"^auxiliary: 'educaton' is not a column"):
        plan_imputation(context.study, model=context.model(), auxiliary=["educaton"])


def test_the_same_option_name_maps_to_its_own_section(tmp_path):
    raw = demo_params().to_dict()
    raw["mechanism"]["variables"] = ["clinic"]
    with pytest.raises(InputError, match=r"demo_params.yaml: mechanism.variables: 'clinic' is nominal"):
        open_stage(raw, str(tmp_path)).mechanism()
    raw = demo_params().to_dict()
    raw["analysis"]["exposure"] = "armm"
    with pytest.raises(InputError, match=r"demo_params.yaml: analysis.exposure: 'armm' matches no term"):
        open_stage(raw, str(tmp_path)).complete_cases()


def test_the_demo_check_and_model_header(context, tmp_path):
    assert context.is_demo() and context.reference_effect() == -0.40
    import mistune

    header = mistune.create_markdown(escape=True)(context.model_header())  # as the pages render it
    assert "exposure: <code>arm</code>" in header and "<code>hba1c_12m ~ arm" in header
    raw = demo_params().to_dict()
    raw["analysis"]["formula"] = "hba1c_12m ~ arm + age"
    assert open_stage(raw, str(tmp_path)).reference_effect() is None
