"""A study whose analysis-model variables are all complete, while other columns have gaps.

Common in trials: outcome, arm and stratification factors are complete and only other baseline
variables are missing. Found by running real files: the imputation stage crashed in its figures
(matplotlib: "Number of rows must be a positive integer, not 0"), and a Cox study was refused
up front by the sensitivity stage's default ("no covariate ... name one in sensitivity.delta")
although a gaussian study in the same position runs and says nothing was shifted (README,
`sensitivity`: "with every model variable complete the stage says so and shifts nothing").
"""
from __future__ import annotations

import warnings

import matplotlib
import pytest

matplotlib.use("Agg")

from lifelines.datasets import load_lung  # noqa: E402  (open dataset: NCCTG lung cancer, shipped by lifelines)

import gapbook  # noqa: E402
from gapbook.cli import main  # noqa: E402
from gapbook.plots import impute as impute_plots  # noqa: E402


@pytest.fixture(scope="module")
def lung_csv(tmp_path_factory):
    # NCCTG lung: time, status (1 = death here), sex and age are complete; meal.cal, wt.loss and others have gaps.
    data = load_lung()
    assert data[["time", "status", "sex", "age"]].notna().all().all() and data["meal.cal"].isna().sum() == 47
    folder = tmp_path_factory.mktemp("lung")
    data.insert(0, "pid", range(1, len(data) + 1))
    data.to_csv(folder / "lung.csv", index=False, na_rep="NA")
    return folder / "lung.csv"


def test_a_cox_study_with_complete_covariates_passes_check(lung_csv, capsys):
    params = lung_csv.parent / "params.yaml"
    params.write_text("data: {path: lung.csv, id: pid}\nmissing: {markers: [NA]}\n"
                      "variables: {sex: {type: binary, levels: [1, 2]}}\n"
                      "analysis: {formula: 'time ~ sex + age', family: cox, event: status, exposure: sex}\n")
    assert main(["check", str(params)]) == 0, capsys.readouterr().err


def test_the_sensitivity_default_is_nothing_to_shift_for_a_complete_cox_model(lung_csv):
    from gapbook.sensitivity import default_variable
    from gapbook.survival import EventCoding

    study = gapbook.read_study(lung_csv, id="pid", missing={"markers": ["NA"]})
    complete = gapbook.AnalysisModel("time ~ sex + age", family="cox", exposure="sex", event=EventCoding("status"))
    assert default_variable(gapbook.plan_imputation(study, model=complete)) is None
    # with an incomplete covariate the default is still that covariate (unchanged behaviour)
    incomplete = gapbook.AnalysisModel('time ~ sex + age + Q("meal.cal")', family="cox", exposure="sex",
                                       event=EventCoding("status"))
    assert default_variable(gapbook.plan_imputation(study, model=incomplete)) == "meal.cal"


def test_the_imputation_figures_and_wording_say_nothing_was_imputed(lung_csv):
    study = gapbook.read_study(lung_csv, id="pid", missing={"markers": ["NA"]})
    model = gapbook.AnalysisModel("age ~ sex", exposure="sex")  # both complete
    imputation = gapbook.plan_imputation(study, model=model).run(m=2, iterations=2)
    assert not imputation.imputed
    convergence = imputation.chain_convergence()
    assert convergence.sentences == ("No value was imputed (the variables in the imputation are complete), so "
                                     "there are no chains to compare.",)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the empty panels warned (singular limits, collapsed layout) on the page
        for figure in (impute_plots.plot_observed_vs_imputed(imputation),
                       impute_plots.plot_chain_convergence(convergence)):
            texts = [t.get_text() for ax in figure.axes for t in ax.texts]
            assert "No value was imputed: the variables in the imputation are complete." in texts
            figure.savefig(lung_csv.parent / "figure.png")
            matplotlib.pyplot.close(figure)
