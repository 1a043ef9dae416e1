"""Time-to-event outcomes (issue 14): family cox through params, check and the model strategies.

References beside each check: statsmodels' proportional hazards regression (``PHReg``),
fitted here from plain arrays, is the reference for every Cox fit.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import record_path, run_gapbook
from statsmodels.duration.hazard_regression import PHReg

from gapbook.cases import complete_case_analysis
from gapbook.cli import main
from gapbook.errors import InputError
from gapbook.indicator import missing_category_analysis
from gapbook.intake import load_study
from gapbook.models import AnalysisModel
from gapbook.params import Params, load_params
from gapbook.pipeline import preflight
from gapbook.stage import analysis_model
from gapbook.survival import EventCoding, cumulative_hazard_at, kaplan_meier, nelson_aalen


def cohort(n: int = 300, seed: int = 11) -> pd.DataFrame:
    """A cohort of our own: Weibull event times, uniform censoring, whole-month times (many ties),
    age missing more often after an event, stage partly unknown, a few missing times and statuses."""
    rng = np.random.default_rng(seed)
    arm = rng.choice(["control", "active"], n)
    age = rng.normal(60, 10, n)
    stage = rng.choice(["I", "II", "III"], n, p=[0.4, 0.4, 0.2])
    lp = np.log(0.6) * (arm == "active") + 0.03 * (age - 60) + 0.5 * (stage == "III")
    event_time = rng.weibull(1.3, n) * 24 * np.exp(-lp / 1.3)
    censor_time = rng.uniform(6, 48, n)
    months = np.ceil(np.minimum(event_time, censor_time))
    status = np.where(event_time <= censor_time, 2, 1)
    frame = pd.DataFrame({"pid": np.arange(1, n + 1), "arm": arm, "age": age.round(1), "stage": stage,
                          "months": months, "status": status})
    frame["age"] = frame["age"].astype(object)
    frame.loc[rng.random(n) < 0.1 + 0.2 * (status == 2), "age"] = "NA"
    frame.loc[rng.random(n) < 0.08, "stage"] = "unknown"
    frame["months"] = frame["months"].astype(object)
    frame.loc[[3, 50], "months"] = "lost"
    frame["status"] = frame["status"].astype(object)
    frame.loc[[7, 60, 61], "status"] = "-9"
    return frame


PARAMS = """\
study: {name: Survival cohort}
data: {path: cohort.csv, id: pid}
variables:
  stage: {type: ordinal, levels: [I, II, III]}
missing:
  reasons: {unknown: "not recorded", lost: "time not known", "-9": "status not ascertained"}
analysis:
  formula: "months ~ arm + age + C(stage)"
  family: cox
  event: {column: status, event: [2], censored: [1]}
  exposure: arm
imputation: {m: 5, iterations: 5}
sensitivity: {m: 2}
simulation: {replicates: 4, m: 2}
"""


def write_study(folder: Path, frame: pd.DataFrame | None = None, params: str = PARAMS) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    (cohort() if frame is None else frame).to_csv(folder / "cohort.csv", index=False)
    (folder / "params.yaml").write_text(params)
    return folder / "params.yaml"


@pytest.fixture
def study(tmp_path):
    params = load_params(write_study(tmp_path / "study"))
    return params, load_study(params)


def phreg_by_hand(data: pd.DataFrame, ties: str) -> tuple[pd.Series, pd.Series]:
    """Reference: statsmodels PHReg fitted from arrays built here, on the rows with every model value."""
    rows = data[["months", "status", "arm", "age", "stage"]].dropna()
    rows = rows[rows["status"].isin([1.0, 2.0])]
    exog = pd.DataFrame({
        "arm[T.control]": (rows["arm"].astype(str) == "control").astype(float),
        "C(stage)[T.II]": (rows["stage"].astype(str) == "II").astype(float),
        "C(stage)[T.III]": (rows["stage"].astype(str) == "III").astype(float),
        "age": rows["age"].astype(float),
    })
    result = PHReg(rows["months"].to_numpy(float), exog.to_numpy(), status=(rows["status"] == 2).to_numpy(float),
                   ties=ties).fit()
    return pd.Series(result.params, index=exog.columns), pd.Series(result.bse, index=exog.columns)


@pytest.mark.parametrize("ties", ["efron", "breslow"])
def test_complete_case_cox_equals_statsmodels_phreg_on_the_same_rows(study, ties):
    # Reference: statsmodels.duration.hazard_regression.PHReg (Cox 1972; Efron 1977; Breslow 1974)
    params, data = study
    model = AnalysisModel(formula="months ~ arm + age + C(stage)", family="cox", exposure="arm",
                          event=EventCoding("status", event=(2,), censored=(1,)), ties=ties)
    result = complete_case_analysis(data.data, model=model, reasons=data.reasons,
                                    not_applicable=data.not_applicable)
    estimates = result.estimates().set_index("term")
    coefficients, errors = phreg_by_hand(data.data, ties)
    assert sorted(estimates.index) == sorted(coefficients.index)  # statsmodels' own term names
    np.testing.assert_allclose(estimates.loc[coefficients.index, "estimate"], coefficients, atol=1e-6)
    np.testing.assert_allclose(estimates.loc[coefficients.index, "std_error"], errors, atol=1e-6)
    np.testing.assert_allclose(estimates["exp_estimate"], np.exp(estimates["estimate"]), rtol=1e-12)
    assert result.model_fit.nobs == len(data.data[["months", "age", "stage"]].dropna()
                                         .join(data.data["status"]).dropna())
    assert result.exposure_terms == ("arm[T.control]",)


def test_the_two_ties_methods_differ_when_times_are_tied(study):
    # whole months give many ties, so Efron's and Breslow's approximations must differ (Efron 1977)
    _, data = study
    fits = [complete_case_analysis(data.data, model=AnalysisModel(
        formula="months ~ arm + age + C(stage)", family="cox", event=EventCoding("status", (2,), (1,)), ties=t))
        .model_fit.coefficients for t in ("efron", "breslow")]
    assert np.abs(fits[0] - fits[1]).max() > 1e-3


def test_params_default_to_efron_and_read_the_event_coding(study):
    params, _ = study
    model = analysis_model(params)
    assert model.ties == "efron" and model.event == EventCoding("status", event=(2,), censored=(1,))
    plain = Params.from_dict({"data": {"path": "x.csv"}, "analysis": {"formula": "t ~ x", "family": "cox",
                                                                       "event": "died"}})
    assert analysis_model(plain).event == EventCoding("died", event=(1,), censored=(0,))


def test_missing_time_or_event_is_missing_data_not_censoring(study):
    params, data = study
    result = complete_case_analysis(data.data, model=analysis_model(params), reasons=data.reasons,
                                    not_applicable=data.not_applicable)
    steps = result.flow.steps.set_index("variable")
    assert steps.loc["months", "n_lacking"] == 2 and steps.loc["months", "reasons"] == "time not known 2"
    assert steps.loc["status", "role"] == "event"
    assert steps.loc["status", "n_lacking"] == 3 and steps.loc["status", "reasons"] == "status not ascertained 3"
    # a row with an unknown status is left out, not counted as censored: the fit equals the fit
    # without those rows (reference: PHReg on the rows with every value, as above)
    coefficients, _ = phreg_by_hand(data.data, "efron")
    fitted = result.estimates().set_index("term")["estimate"]
    np.testing.assert_allclose(fitted.loc[coefficients.index], coefficients, atol=1e-6)


def test_event_coded_as_text_or_zero_one_gives_the_same_fit(tmp_path):
    frame = cohort()
    words = frame.assign(status=frame["status"].map({2: "died", 1: "alive", "-9": "-9"}))
    zero_one = frame.assign(status=frame["status"].map({2: 1, 1: 0, "-9": "-9"}))
    fits = []
    for name, table, event in (("coded", frame, "{column: status, event: [2], censored: [1]}"),
                               ("words", words, "{column: status, event: [died], censored: [alive]}"),
                               ("plain", zero_one, "status")):
        text = PARAMS.replace("event: {column: status, event: [2], censored: [1]}", f"event: {event}")
        params = load_params(write_study(tmp_path / name, table, text))
        data = load_study(params)
        fits.append(complete_case_analysis(data.data, model=analysis_model(params)).model_fit.coefficients)
    np.testing.assert_allclose(fits[1], fits[0], atol=1e-10)
    np.testing.assert_allclose(fits[2], fits[0], atol=1e-10)


def test_missing_category_fits_the_cox_model_with_a_missing_level(study):
    # Reference: PHReg on the same rows with the '(missing)' stage level and the age indicator built by hand
    params, data = study
    result = missing_category_analysis(data.data, model=analysis_model(params), types=data.types,
                                       missing=data.missing, reasons=data.reasons,
                                       not_applicable=data.not_applicable, indicator_for_continuous=True)
    handling = result.prepared.handling.set_index("variable")
    assert handling.loc["status", "handling"].startswith("rows dropped")
    frame = data.data
    keep = frame["months"].notna() & frame["status"].isin([1.0, 2.0])
    rows = frame[keep]
    stage = rows["stage"].astype(object).fillna("(missing)")
    age_missing = rows["age"].isna().astype(float)
    exog = pd.DataFrame({"arm[T.control]": (rows["arm"].astype(str) == "control").astype(float),
                         "C(stage)[T.II]": (stage == "II").astype(float),
                         "C(stage)[T.III]": (stage == "III").astype(float),
                         "C(stage)[T.(missing)]": (stage == "(missing)").astype(float),
                         "age": rows["age"].fillna(frame["age"].mean()),
                         "age_missing": age_missing})
    reference = PHReg(rows["months"].to_numpy(float), exog.to_numpy(float),
                      status=(rows["status"] == 2).to_numpy(float), ties="efron").fit()
    fitted = result.estimates().set_index("term")["estimate"]
    np.testing.assert_allclose(fitted.loc[exog.columns], reference.params, atol=1e-6)
    assert result.model_fit.nobs == int(keep.sum())


# ---------------------------------------------------------------------------
# what check refuses up front (exit 2, one line naming the key, row and id)

def one_line(capsys, argv):
    assert main([str(a) for a in argv]) == 2
    _, err = capsys.readouterr()
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


def test_check_refuses_a_negative_follow_up_time_and_accepts_zero(tmp_path, capsys):
    frame = cohort()
    frame.loc[20, "months"] = 0      # an event or censoring on the day of entry: valid
    frame.loc[30, "months"] = -3     # an end before the start: refused
    line = one_line(capsys, ["check", write_study(tmp_path, frame)])
    assert "analysis.formula" in line and "data row 31 (id 31)" in line and "negative in 1 row(s)" in line
    frame.loc[30, "months"] = 5
    assert main(["check", str(write_study(tmp_path, frame))]) == 0, capsys.readouterr().err


def _breslow_partial_likelihood_fit(time, status, x):
    """Reference: the Cox (1972) partial likelihood with Breslow's (1974) handling of ties, written from the
    formula and maximised by scipy: sum over event times t of [sum_{i in D(t)} x_i'b - d_t log sum_{j: t_j >= t}
    exp(x_j'b)]. A row with time 0 is in the risk set of every event time, 0 included."""
    from scipy import optimize

    def minus_log_likelihood(beta):
        eta = x @ beta
        total = 0.0
        for t in np.unique(time[status == 1]):
            dying = (time == t) & (status == 1)
            total += eta[dying].sum() - dying.sum() * np.log(np.exp(eta[time >= t]).sum())
        return -total
    return optimize.minimize(minus_log_likelihood, np.zeros(x.shape[1]), method="BFGS", options={"gtol": 1e-10}).x


def test_cox_fit_with_times_of_zero_equals_the_partial_likelihood_and_phreg(study):
    # Registry-style follow-up with same-day events and censorings (time 0) in the cohort of our own.
    _, data = study
    frame = data.data.copy()
    months = frame["months"].to_numpy(dtype=float, na_value=np.nan)
    zero_rows = np.flatnonzero(~np.isnan(months))[:12]
    frame.loc[frame.index[zero_rows], "months"] = 0.0
    model = AnalysisModel(formula="months ~ arm + age + C(stage)", family="cox", exposure="arm",
                          event=EventCoding("status", event=(2,), censored=(1,)), ties="breslow")
    estimates = complete_case_analysis(frame, model=model, reasons=data.reasons,
                                       not_applicable=data.not_applicable).estimates().set_index("term")
    coefficients, errors = phreg_by_hand(frame, "breslow")  # statsmodels PHReg on the same rows
    np.testing.assert_allclose(estimates.loc[coefficients.index, "estimate"], coefficients, atol=1e-6)
    rows = frame[["months", "status", "arm", "age", "stage"]].dropna()
    rows = rows[rows["status"].isin([1.0, 2.0])]
    assert (rows["months"] == 0).sum() >= 5 and ((rows["months"] == 0) & (rows["status"] == 2)).any()
    x = np.column_stack([(rows["arm"].astype(str) == "control"), (rows["stage"].astype(str) == "II"),
                         (rows["stage"].astype(str) == "III"), rows["age"].astype(float)]).astype(float)
    by_formula = _breslow_partial_likelihood_fit(rows["months"].to_numpy(float), (rows["status"] == 2).to_numpy(float), x)
    np.testing.assert_allclose(estimates.loc[list(coefficients.index), "estimate"], by_formula, atol=1e-4)


def test_weibull_times_place_zero_at_half_the_smallest_positive_time():
    from gapbook.survival import fit_weibull_ph, weibull_times
    # hand values: the smallest positive time is 2, so 0 is fitted at 1 (common practice, no source)
    assert weibull_times(np.array([0.0, 2.0, 5.0, 0.0])).tolist() == [1.0, 2.0, 5.0, 1.0]
    assert weibull_times(np.array([3.0, 4.0])).tolist() == [3.0, 4.0]
    fit = fit_weibull_ph(weibull_times(np.array([0.0, 1.0, 2.0, 4.0, 8.0])), np.array([1, 1, 0, 1, 1]))
    assert np.isfinite(fit.shape) and np.isfinite(fit.log_rate)


def test_check_refuses_an_event_value_outside_the_coding(tmp_path, capsys):
    frame = cohort()
    frame.loc[40, "status"] = 3
    line = one_line(capsys, ["check", write_study(tmp_path, frame)])
    assert "analysis.event" in line and "data row 41 (id 41)" in line and "neither an event value (2)" in line


@pytest.mark.parametrize("analysis, needle", [
    ("{formula: 'months ~ arm', family: cox}", "family cox needs analysis.event"),
    ("{formula: 'months ~ arm', event: status}", "analysis.event is used only with family: cox"),
    ("{formula: 'months ~ arm', family: cox, event: status, offset: age}", "family cox takes no offset"),
    ("{formula: 'months ~ arm', family: cox, event: status, ties: exact}", "'exact' is not one of efron, breslow"),
    ("{formula: 'months ~ arm', family: cox, event: {column: status, event: [1], censored: [1]}}",
     "listed both as an event and as censored"),
    ("{formula: 'months ~ arm', family: cox, event: statuz}", "analysis.event: 'statuz' is not a column"),
])
def test_check_refuses_an_inconsistent_time_to_event_model(tmp_path, capsys, analysis, needle):
    text = PARAMS.split("analysis:")[0] + f"analysis: {analysis}\n"
    assert needle in one_line(capsys, ["check", write_study(tmp_path, params=text)])


def test_check_plans_every_participant_stage_for_cox(tmp_path):
    lines = []
    plan = preflight(load_params(write_study(tmp_path)), log=lines.append)
    assert plan.stages == ("audit", "mechanism", "cases", "indicator", "impute", "sensitivity", "simulate", "report")
    assert not any("family cox" in line for line in lines)


# ---------------------------------------------------------------------------
# the estimators, against hand calculation

def test_nelson_aalen_and_kaplan_meier_by_hand():
    # Hand calculation (Nelson 1972; Kaplan & Meier 1958): times 2, 3+, 3, 5, 5, 8+ (+ censored)
    time = np.array([2, 3, 3, 5, 5, 8.0])
    event = np.array([1, 0, 1, 1, 1, 0])
    at, hazard = nelson_aalen(time, event)
    np.testing.assert_allclose(at, [2, 3, 5])
    np.testing.assert_allclose(hazard, [1 / 6, 1 / 6 + 1 / 5, 1 / 6 + 1 / 5 + 2 / 3])
    np.testing.assert_allclose(cumulative_hazard_at(time, event), [1 / 6, 11 / 30, 11 / 30, 31 / 30, 31 / 30, 31 / 30])
    km = kaplan_meier(time, event)
    np.testing.assert_allclose(km["survival"], [5 / 6, 5 / 6 * 4 / 5, 5 / 6 * 4 / 5 * 1 / 3, 5 / 6 * 4 / 5 * 1 / 3])
    assert km["at_risk"].tolist() == [6, 5, 3, 1] and km["censored"].tolist() == [0, 1, 0, 1]
    # Greenwood (1926): se = S(t) sqrt(sum over event times s <= t of d / (n (n - d))); the
    # censoring-only time 8 carries the value at 5.
    greenwood = np.sqrt(np.cumsum([1 / (6 * 5), 1 / (5 * 4), 2 / (3 * 1)]))
    survival = np.array([5 / 6, 2 / 3, 2 / 9])
    np.testing.assert_allclose(km["std_error"], np.r_[survival * greenwood, survival[-1] * greenwood[-1]])


def test_kaplan_meier_before_the_first_event_and_without_events():
    # The product-limit estimate is 1 (standard error 0) until the first event (Kaplan & Meier 1958).
    km = kaplan_meier(np.array([1.0, 2, 3, 4]), np.array([0, 0, 1, 0]))
    assert km["survival"].tolist()[:2] == [1.0, 1.0] and km["std_error"].tolist()[:2] == [0.0, 0.0]
    np.testing.assert_allclose(km["survival"], [1, 1, 0.5, 0.5])
    none = kaplan_meier(np.array([1.0, 2.0]), np.array([0, 0]))
    assert none["survival"].tolist() == [1.0, 1.0] and none["std_error"].tolist() == [0.0, 0.0]


def test_robust_standard_errors_are_lin_wei_sandwich_even_with_early_censoring():
    # Reference: statsmodels PHReg.fit(groups=one per row), the Lin & Wei (1989) sandwich, on the
    # rows that are at risk at some event time; rows censored before the first event add nothing
    # to the partial likelihood or its score, so the covariance is the same with them.
    rng = np.random.default_rng(5)
    n = 200
    frame = pd.DataFrame({"t": rng.exponential(size=n) + 0.01, "x": rng.normal(size=n),
                          "d": rng.integers(0, 2, n).astype(float)})
    first_event = frame.loc[frame["d"] == 1, "t"].min()
    frame.loc[0, ["t", "d"]] = [first_event / 2, 0.0]  # censored before any event
    model = AnalysisModel(formula="t ~ x", family="cox", event=EventCoding("d"), robust=True)
    ours = model.fit(frame).std_errors()
    at_risk = frame[frame["t"] >= first_event]
    reference = PHReg(at_risk["t"].to_numpy(), at_risk[["x"]].to_numpy(), status=at_risk["d"].to_numpy(),
                      ties="breslow").fit(groups=np.arange(len(at_risk)))
    assert np.isfinite(ours).all()
    plain = AnalysisModel(formula="t ~ x", family="cox", event=EventCoding("d"), ties="breslow", robust=True)
    np.testing.assert_allclose(plain.fit(frame).std_errors(), reference.bse, rtol=1e-8)


@pytest.mark.slow
def test_a_cox_study_runs_end_to_end(tmp_path):
    params = write_study(tmp_path / "study")
    result = run_gapbook("run", params, "--out", tmp_path / "records", cwd=tmp_path / "study")
    record = record_path(result)
    tables = record / "tables"
    performance = pd.read_csv(tables / "simulation_performance.csv")
    assert set(performance["mechanism"]) == {"MCAR", "MAR", "MNAR"} and (performance["n_rep"] == 4).all()
    estimates = pd.read_csv(tables / "estimates.csv")
    assert set(estimates["strategy"]) == {"complete_case", "missing_category", "multiple_imputation"}
    assert estimates["exp_estimate"].notna().all()
    # the audit keeps censoring apart from missing data (counts: pandas on the file written above)
    frame = cohort()
    known = frame[(frame["months"] != "lost") & frame["status"].isin([1, 2])]  # time and status both known
    audit = pd.read_csv(tables / "audit_time_to_event.csv").set_index("group")
    assert audit.loc["all", "n_events"] == (known["status"] == 2).sum()
    assert audit.loc["all", "n_censored"] == (known["status"] == 1).sum()
    assert audit.loc["all", "n_time_missing"] == 2 and audit.loc["all", "n_event_missing"] == 3
    assert (tables / "mechanism_time_to_event.csv").is_file()
    assert pd.read_csv(tables / "sensitivity_delta.csv")["variable"].eq("age").all()  # the most incomplete covariate
    for figure in ("strategy_comparison", "survival_by_exposure", "simulation_performance"):
        assert (record / "figures" / f"{figure}.png").is_file()


# ---------------------------------------------------------------------------
# a cox study with nothing a delta can shift

def without_missing_covariates() -> pd.DataFrame:
    """The cohort with every covariate observed: only follow-up times and statuses are missing."""
    frame = cohort()
    frame["age"] = np.random.default_rng(2).normal(60, 10, len(frame)).round(1)
    frame["stage"] = np.random.default_rng(3).choice(["I", "II", "III"], len(frame))
    return frame


@pytest.mark.parametrize("case", ["no incomplete covariate", "only an unordered category incomplete"])
def test_cox_study_with_nothing_to_shift_skips_the_delta_adjustment_and_check_says_so(tmp_path, capsys, case):
    from gapbook.stage import open_stage

    frame = without_missing_covariates()
    params_text = PARAMS
    if case != "no incomplete covariate":  # stage as a nominal variable: imputed by polytomous regression
        frame.loc[np.random.default_rng(4).random(len(frame)) < 0.1, "stage"] = "unknown"
        params_text = PARAMS.replace("stage: {type: ordinal, levels: [I, II, III]}",
                                     "stage: {type: nominal, levels: [I, II, III]}")
    path = write_study(tmp_path / "study", frame, params_text)
    code = main(["check", str(path), "--only", "audit,sensitivity"])
    out, err = capsys.readouterr()
    assert code == 0, err
    notes = [line for line in out.splitlines() if line.startswith("note: sensitivity: Nothing to shift")]
    assert len(notes) == 1
    # check = run: the stage, in process, skips with the very sentence check printed
    result = open_stage(str(path), str(tmp_path / "record")).sensitivity(
        open_stage(str(path), str(tmp_path / "record")).imputation_plan())
    assert result.skipped() and result.tables()["sensitivity_delta"].empty
    assert notes[0] == f"note: sensitivity: {result.sentences[0]}"
    # counts: pandas on the file written above (rows lacking a time or an event status)
    assert f"the {5:,} rows lacking one of them are left out" in result.sentences[0]
    if case == "no incomplete covariate":
        assert "no covariate of the cox model has a missing value," in result.sentences[0]
    else:
        assert "stage (" in result.sentences[0] and "cannot shift" in result.sentences[0]


def test_a_named_variable_that_cannot_be_shifted_still_stops_check(tmp_path, capsys):
    # asking for a delta on a complete covariate is a request that cannot be met: exit 2, as before
    path = write_study(tmp_path / "study", without_missing_covariates(),
                       PARAMS.replace("sensitivity: {m: 2}", "sensitivity: {m: 2, variable: age}"))
    assert "sensitivity.variable" in one_line(capsys, ["check", path])


# ---------------------------------------------------------------------------
# rows without a follow-up time or event status: left out of every strategy, and every page with an n says so

def test_every_page_with_an_n_says_how_many_rows_lack_a_time_or_status_and_why(study):
    from gapbook.impute.plan import plan_imputation
    from gapbook.report import participant_flow

    params, data = study
    model = analysis_model(params)
    # counts: pandas on the file cohort() writes (the markers 'lost' and '-9' and their reasons in PARAMS)
    frame = cohort()
    time_lost, status_unknown = frame["months"] == "lost", frame["status"] == "-9"
    lacking = int((time_lost | status_unknown).sum())
    expected = (f"{lacking} of {len(frame)} rows lack the follow-up time (months) or the event status (status) "
                f"(time not known: {int(time_lost.sum())}; status not ascertained: "
                f"{int((status_unknown & ~time_lost).sum())}) and are left out of every strategy")
    complete_case = complete_case_analysis(data.data, model=model, reasons=data.reasons,
                                           not_applicable=data.not_applicable)
    assert any(s.startswith(expected) for s in complete_case.sentences), complete_case.sentences
    category = missing_category_analysis(data.data, model=model, types=data.types, missing=data.missing,
                                         reasons=data.reasons)
    assert any(s.startswith(expected) for s in category.sentences), category.sentences
    assert not any("rows without the outcome were dropped" in s for s in category.sentences)
    plan = plan_imputation(data, model=model, m=2, iterations=1)
    assert any(s.startswith(expected) for s in plan.sentences), plan.sentences
    flow = participant_flow(data, formula=model.formula, event="status").steps.set_index("step")["all"]
    assert flow["outcome_observed"] == len(frame) - lacking
    assert flow["outcome_missing: time not known"] == time_lost.sum()
    assert flow["outcome_missing: status not ascertained"] == (status_unknown & ~time_lost).sum()
    # the strategies indeed leave exactly those rows out (statsmodels PHReg's rows: time, status and covariates)
    assert complete_case.model_fit.nobs == len(data.data.dropna(subset=["months", "status", "arm", "age", "stage"]))


def test_the_model_header_says_the_robust_cox_sandwich_uses_breslow_form_residuals(tmp_path):
    # the Lin & Wei sandwich is built from statsmodels' score residuals, which are Breslow's form whatever the
    # ties method (see test_robust_standard_errors_are_lin_wei_sandwich_even_with_early_censoring); the page says so
    from gapbook.stage import open_stage

    robust = write_study(tmp_path / "robust", params=PARAMS.replace("exposure: arm", "exposure: arm\n  robust: true"))
    plain = write_study(tmp_path / "plain")
    assert "Breslow-form score residuals" in open_stage(str(robust), str(tmp_path / "r1")).model_header()
    assert "Breslow-form" not in open_stage(str(plain), str(tmp_path / "r2")).model_header()


# ---------------------------------------------------------------------------
# fits whose maximum is hard to reach, or does not exist (statsmodels' heart data)

def heart_with(marker_rows) -> pd.DataFrame:
    """statsmodels' Stanford heart transplant data (shipped with statsmodels) with a 0/1 column on the given rows."""
    from statsmodels.datasets import heart

    frame = heart.load_pandas().data.copy()
    frame["marker"] = 0.0
    frame.loc[list(marker_rows), "marker"] = 1.0
    return frame


COX_MARKER = AnalysisModel("survival ~ age + marker", family="cox", exposure="age", event="censors")


@pytest.mark.parametrize("ties", ["efron", "breslow"])
def test_a_column_marking_one_early_event_reaches_the_finite_maximum(ties):
    # statsmodels' heart data: one of the two events at the first time (1 day) is marked. The maximum is finite
    # (a later death of a marked row is impossible, but earlier deaths of others with it at risk bound it);
    # statsmodels' default Newton from zero overshoots it (NaN, or a singular matrix) -- counted here first.
    frame = heart_with(heart_with([]).query("survival == 1 and censors == 1").index[:1])
    model = PHReg(frame["survival"].to_numpy(), frame[["age", "marker"]].to_numpy(), status=frame["censors"].to_numpy(),
                  ties=ties)
    with np.errstate(all="ignore"):
        try:
            default = np.asarray(model.fit().params, dtype=float)
        except np.linalg.LinAlgError:
            default = np.full(2, np.nan)
    assert not np.all(np.isfinite(default))
    fit = AnalysisModel(**{**COX_MARKER.__dict__, "ties": ties}).fit(frame)
    assert fit.converged and not fit.unbounded
    # Reference: statsmodels' own partial log-likelihood and score at our estimate -- the score is zero at the
    # maximum, and scipy's BFGS on that log-likelihood finds the same point.
    np.testing.assert_allclose(model.score(fit.coefficients), 0, atol=1e-6)
    from scipy.optimize import minimize
    found = minimize(lambda b: -model.loglike(b), np.zeros(2), method="BFGS").x
    np.testing.assert_allclose(fit.coefficients, found, atol=2e-3)
    assert np.all(np.isfinite(fit.std_errors()))


def test_a_column_whose_rows_have_no_event_is_named_as_monotone_likelihood():
    # Bryson & Johnson (1981): a 0/1 column whose 1-rows have no event makes the partial likelihood rise for
    # ever as its coefficient falls. heart: the first three censored rows (counted with pandas) are marked.
    censored = heart_with([]).query("censors == 0").index[:3]
    fit = COX_MARKER.fit(heart_with(censored))
    assert not fit.converged
    assert fit.unbounded == (("marker", "none of the 3 rows where it is 1 has an event, so its hazard ratio runs to 0"),)
    text = " ".join(fit.fit_sentences())
    assert "monotone likelihood" in text and "marker: none of the 3 rows" in text and "Firth" in text


def test_monotone_likelihood_towards_infinity_and_at_a_reference_level():
    # Bryson & Johnson (1981), the other way: every event of the unmarked rows comes after the marked rows
    # have left. heart: mark the two events at day 1 (the earliest time, pandas) -- the censored row at day 1 is
    # at risk then but has no event, so the unmarked rows' first event (day 3) comes after the marked ones left.
    early = heart_with([]).query("survival == 1 and censors == 1").index
    fit = COX_MARKER.fit(heart_with(early))
    assert not fit.converged
    assert fit.unbounded[0][0] == "marker" and "runs to infinity" in fit.unbounded[0][1]
    # A category whose reference level has no event: the other levels' hazard ratios run off together.
    frame = heart_with([])
    frame["site"] = np.where(frame.index % 2 == 0, "B", "C")
    frame.loc[frame.query("censors == 0").index[:4], "site"] = "A"
    fit = AnalysisModel("survival ~ age + C(site)", family="cox", event="censors").fit(frame)
    assert ("C(site)", "none of the 4 rows at its reference level has an event, so the hazard ratios of its other "
            "levels run to infinity") in fit.unbounded


def test_check_warns_when_the_missing_indicator_has_no_events(tmp_path):
    # heart: age missing for three censored participants; with a covariate beside it the missing-indicator fit has
    # an indicator without events (monotone likelihood); check names it before any stage runs
    frame = heart_with([]).rename(columns={"marker": "transplant"})
    frame["transplant"] = (frame.index % 3 == 0).astype(int)
    frame["age"] = frame["age"].astype(object)
    frame.loc[frame.query("censors == 0").index[:3], "age"] = "NA"
    frame.insert(0, "pid", range(1, len(frame) + 1))
    (tmp_path / "heart.csv").write_text(frame.to_csv(index=False))
    (tmp_path / "params.yaml").write_text("data: {path: heart.csv, id: pid}\nanalysis: {formula: 'survival ~ "
                                          "transplant + age', family: cox, event: censors, exposure: transplant}\n")
    lines: list = []
    preflight(load_params(tmp_path / "params.yaml"), only=["indicator"], log=lines.append)
    warned = [line for line in lines if line.startswith("warning: indicator:")]
    assert len(warned) == 1 and "age_missing: none of the 3 rows where it is 1 has an event" in warned[0]


def test_the_missing_category_page_says_which_variable_the_dropped_rows_lacked():
    # heart (statsmodels): age, the exposure, missing for the first four censored rows (counted with pandas); it
    # read '65 of 69 rows used (0 rows without the outcome were dropped)'
    frame = heart_with([])
    frame.loc[frame.query("censors == 0").index[:4], "age"] = np.nan
    result = missing_category_analysis(frame, model=COX_MARKER, indicator_for_continuous=True)
    assert "65 of 69 rows used (4 rows dropped: 4 without the exposure age)." in result.sentences
