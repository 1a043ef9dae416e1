"""The demo study: a synthetic trial of our own, generated with a fixed seed.

Scenario: a two-arm randomised trial of a text-message support programme ("sms") against
usual care ("control") for adults with type 2 diabetes, across six clinics, 1,200
participants. The outcome is HbA1c (%) at 12 months.

True values used by the generator (what a correct analysis should recover):
- HbA1c at 12 months = 1.6 + 0.78 * baseline HbA1c - 0.40 * (arm == sms)
  + 0.025 * (BMI - 30) + clinic effect (SD 0.15) + 0.15 * (on insulin) + normal error (SD 0.75).
  The treatment effect of the programme is therefore -0.40 percentage points.
- Dropout (outcome coded -9 "lost to follow-up") is missing at random given baseline
  HbA1c: logit P(dropout) = -2.3 + 0.55 * (baseline HbA1c - 8), plus a little more in
  the control arm (+0.25). About 15 % drop out overall.
- Baseline HbA1c: 7 % coded -8 "not measured", completely at random.
- Weight: 5 % blank; height: 3 % "NA"; BMI is derived from weight and height and is
  blank when either is missing. Two keyed errors in weight (720 and 7.2 kg) and one in
  height (17.5 cm).
- Education (ordered: primary < secondary < tertiary): 6 % "unknown", more among older
  participants. Alcohol use (none, moderate, heavy): 9 % "prefer not to say", more among
  heavy drinkers (missing not at random by construction), plus a few "?".
- Insulin dose (units/day) applies only to participants on insulin; 8 % of those have
  -7 "declined".
- Age: a few "?" (illegible forms).

The CSV ships as package data (``gapbook/data/demo_trial.csv``); ``write_demo_csv``
regenerates it byte for byte.
"""
from __future__ import annotations

from importlib import resources
from pathlib import Path
from typing import Optional

import numpy as np
import pandas as pd

from .params import Params, load_params

__all__ = ["TRUE_ARM_EFFECT", "data_dir", "demo_csv_path", "demo_params_path", "demo_params"]

DEMO_SEED = 20261202
DEMO_N = 1200
TRUE_ARM_EFFECT = -0.40
CLINICS = ("C1", "C2", "C3", "C4", "C5", "C6")


def generate_demo(n: int = DEMO_N, seed: int = DEMO_SEED) -> pd.DataFrame:
    """The demo trial as it would arrive from a data manager: markers and keyed errors included."""
    rng = np.random.default_rng(seed)
    clinic = rng.choice(CLINICS, size=n, p=[0.22, 0.19, 0.17, 0.16, 0.14, 0.12])
    clinic_effect = dict(zip(CLINICS, rng.normal(0.0, 0.15, size=len(CLINICS))))
    arm = np.where(rng.random(n) < 0.5, "sms", "control")
    age = np.clip(rng.normal(58, 11, n), 25, 89).round()
    sex = np.where(rng.random(n) < 0.46, "female", "male")
    height = np.where(sex == "female", rng.normal(162, 6.5, n), rng.normal(175, 7, n)).round(1)
    bmi_true = np.clip(rng.normal(31, 5, n), 19, 55)
    weight = (bmi_true * (height / 100) ** 2).round(1)
    hba1c_0 = np.clip(rng.normal(8.2, 1.1, n) + 0.01 * (age - 58), 6.0, 13.5).round(1)
    education = rng.choice(["primary", "secondary", "tertiary"], size=n, p=[0.25, 0.45, 0.30])
    alcohol = rng.choice(["none", "moderate", "heavy"], size=n, p=[0.45, 0.42, 0.13])
    on_insulin = rng.random(n) < 1 / (1 + np.exp(-(-1.2 + 0.6 * (hba1c_0 - 8.2))))
    dose = np.where(on_insulin, np.clip(rng.lognormal(np.log(40), 0.45, n), 6, 200).round(), np.nan)
    bmi = weight / (height / 100) ** 2
    mean_12m = (1.6 + 0.78 * hba1c_0 + TRUE_ARM_EFFECT * (arm == "sms") + 0.025 * (bmi - 30)
                + np.array([clinic_effect[c] for c in clinic]) + 0.15 * on_insulin)
    hba1c_12m = (mean_12m + rng.normal(0, 0.75, n)).round(1)

    frame = pd.DataFrame({
        "participant_id": [f"P{i:04d}" for i in range(1, n + 1)],
        "clinic": clinic, "arm": arm, "age": age.astype(int).astype(str), "sex": sex,
        "weight_kg": weight.astype(str), "height_cm": height.astype(str), "bmi": bmi.round(2).astype(str),
        "hba1c_0": hba1c_0.astype(str), "education": education, "alcohol": alcohol,
        "on_insulin": np.where(on_insulin, "yes", "no"),
        "insulin_dose": np.where(on_insulin, pd.Series(dose).map(lambda v: f"{v:.0f}" if v == v else ""), ""),
        "hba1c_12m": hba1c_12m.astype(str),
    })

    def hit(p):
        return rng.random(n) < p

    weight_blank = hit(0.05)
    height_na = hit(0.03)
    frame.loc[weight_blank, "weight_kg"] = ""
    frame.loc[height_na, "height_cm"] = "NA"
    frame.loc[weight_blank | height_na, "bmi"] = ""
    keyed = rng.choice(np.flatnonzero(~(weight_blank | height_na)), size=3, replace=False)
    frame.loc[keyed[0], "weight_kg"] = "720"
    frame.loc[keyed[1], "weight_kg"] = "7.2"
    frame.loc[keyed[2], "height_cm"] = "17.5"
    frame.loc[keyed, "bmi"] = ""  # the data manager could not derive BMI from the bad entries
    frame.loc[hit(0.07), "hba1c_0"] = "-8"
    frame.loc[rng.random(n) < 0.03 + 0.08 * (age > 70), "education"] = "Unknown"
    heavy = alcohol == "heavy"
    frame.loc[rng.random(n) < np.where(heavy, 0.30, 0.06), "alcohol"] = "prefer not to say"
    frame.loc[hit(0.01), "alcohol"] = "?"
    frame.loc[on_insulin & hit(0.08), "insulin_dose"] = "-7"
    frame.loc[hit(0.005), "age"] = "?"
    dropout_logit = -2.3 + 0.55 * (hba1c_0 - 8.0) + 0.25 * (arm == "control")
    dropout = rng.random(n) < 1 / (1 + np.exp(-dropout_logit))
    frame.loc[dropout, "hba1c_12m"] = "-9"
    frame.loc[~dropout & hit(0.01), "hba1c_12m"] = " na "
    return frame


def data_dir() -> Path:
    """The folder of files shipped with the package.

    Returns
    -------
    Path
        ``gapbook/data`` in the installed package (demo data, demo params, params template).
    """
    return Path(str(resources.files("gapbook") / "data"))


def demo_csv_path() -> Path:
    """The shipped demo trial's data file.

    Returns
    -------
    Path
        ``demo_trial.csv``: 1,200 participants as :func:`generate_demo` writes them, markers included.
    """
    return data_dir() / "demo_trial.csv"


def demo_params_path() -> Path:
    """The shipped demo trial's params file.

    Returns
    -------
    Path
        ``demo_params.yaml``, whose ``data.path`` is the demo CSV beside it.
    """
    return data_dir() / "demo_params.yaml"


def write_demo_csv(path: Optional[Path] = None) -> Path:
    """Regenerate the shipped demo CSV (used when the generator changes).

    Parameters
    ----------
    path : Path, optional
        Where to write; default the shipped file itself.

    Returns
    -------
    Path
        The file written.
    """
    path = path or demo_csv_path()
    generate_demo().to_csv(path, index=False, lineterminator="\n")
    return path


def demo_params() -> Params:
    """The demo study's params, with the data path pointing at the shipped CSV.

    Returns
    -------
    Params
        Validated as any params file is.
    """
    return load_params(demo_params_path())
