"""A two-arm follow-up trial of our own, generated with a fixed seed: the second demo study.

Scenario (invented for the demo and the tests; not a real trial): participants with a
symptom score (lower is better) are randomised 1:1 to ``control`` or ``active`` and seen
at weeks 2, 4, 8, 12 and 16. The outcome is the change from the baseline score ``base``.

Complete-data model (the truth):
- change at week w = control mean(w) + effect(w) [active] + baseline_slope x (base - 50) + error;
- control mean (-2, -3.5, -5, -6, -6.5), effect of active (-1, -2, -3, -3.5, -4) by week,
  baseline slope -0.2 (higher baseline, larger fall);
- errors multivariate normal with SD (4, 4.5, 5, 5.5, 6) and correlation 0.7^|i - j|.
So the effect of active at week 16 is -4 points, at week 12 -3.5, and so on: that is what
an analysis valid under missing at random should recover (the hypothetical estimand: the
effect had everybody stayed in follow-up).

Dropout is missing at random: before each visit after the first, a participant still in
follow-up leaves with probability ``expit(a + 0.6 (y_last + 4) / 4)``, where y_last is
their last observed change (less improvement, more leaving) and ``a`` is -2.4 in control,
-2.7 in active. Independently, 3 % of visits are missed and the participant returns
(intermittent, missing completely at random). Leavers get a reason: lack of efficacy
when their last change was above -2, otherwise adverse event, withdrew consent or lost to
follow-up at random.

As a data file (``gapbook/data/followup_trial.csv``, long layout, one row per participant
per planned visit), a missed visit's ``chg`` holds a reason code: ``LOE`` lack of efficacy,
``AE`` adverse event, ``WC`` withdrew consent, ``MV`` missed visit (the participant came
back); participants lost to follow-up have no rows after they left. ``write_followup_csv``
regenerates the shipped file byte for byte.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
from scipy.special import expit

if TYPE_CHECKING:
    from ..params import Params

__all__ = ["EFFECT", "FollowupTrial", "simulate_followup_trial", "followup_demo_frame",
           "followup_demo_files", "followup_demo_params"]

WEEKS = (2, 4, 8, 12, 16)
CONTROL_MEAN = (-2.0, -3.5, -5.0, -6.0, -6.5)
EFFECT = (-1.0, -2.0, -3.0, -3.5, -4.0)
SD = (4.0, 4.5, 5.0, 5.5, 6.0)
CORRELATION = 0.7
BASELINE_SLOPE = -0.2
DROPOUT_INTERCEPT = {"control": -2.4, "active": -2.7}
DROPOUT_SLOPE = 0.6
INTERMITTENT = 0.03
SEED = 20261202
OTHER_REASONS = ("adverse event", "withdrew consent", "lost to follow-up")
REASON_CODES = {"lack of efficacy": "LOE", "adverse event": "AE", "withdrew consent": "WC", "missed visit": "MV"}
DEMO_CSV = "followup_trial.csv"
DEMO_PARAMS = "followup_params.yaml"


@dataclass(frozen=True)
class FollowupTrial:
    """A simulated trial: the long data, the complete outcomes and the true effects by visit."""

    data: pd.DataFrame
    complete: np.ndarray = field(repr=False)
    observed: np.ndarray = field(repr=False)
    arm: np.ndarray = field(repr=False)
    reasons: np.ndarray = field(repr=False)
    effect: Tuple[float, ...]
    weeks: Tuple[int, ...]


def simulate_followup_trial(*, n_per_arm: int = 150, weeks: Sequence[int] = WEEKS,
                            control_mean: Sequence[float] = CONTROL_MEAN, effect: Sequence[float] = EFFECT,
                            sd: Sequence[float] = SD, correlation: float = CORRELATION,
                            baseline_slope: float = BASELINE_SLOPE,
                            dropout_intercept: Optional[dict] = None, dropout_slope: float = DROPOUT_SLOPE,
                            intermittent: float = INTERMITTENT, seed: Optional[int] = SEED) -> FollowupTrial:
    """Simulate the follow-up trial described in the module docstring (defaults: the demo).

    Parameters
    ----------
    n_per_arm : int
        Participants per arm.
    weeks : sequence of int
        The planned visits.
    control_mean, effect, sd : sequence of float
        Per visit: the control arm's mean change, the active arm's effect, the error SD.
    correlation : float
        rho in the errors' correlation rho^|i - j|.
    baseline_slope : float
        The change per point of baseline above 50.
    dropout_intercept : dict, optional
        {arm: a}, the intercept of the log-odds of leaving before each visit after the first;
        default the demo's (-2.4 control, -2.7 active).
    dropout_slope : float
        The slope of that log-odds on (last observed change + 4) / 4 (missing at random).
    intermittent : float
        The chance of missing one visit and coming back (missing completely at random).
    seed : int, optional
        The seed of the ``numpy.random.Generator``.

    Returns
    -------
    FollowupTrial
    """
    rng = np.random.default_rng(seed)
    t = len(weeks)
    intercepts = dict(DROPOUT_INTERCEPT if dropout_intercept is None else dropout_intercept)
    n = 2 * n_per_arm
    arm = np.repeat(np.array(["control", "active"], dtype=object), n_per_arm)
    active = (arm == "active").astype(float)
    base = np.round(rng.normal(50.0, 8.0, n), 1)
    index = np.arange(t)
    corr = correlation ** np.abs(index[:, None] - index[None, :])
    cov = corr * np.outer(sd, sd)
    errors = rng.multivariate_normal(np.zeros(t), cov, size=n)
    mean = np.asarray(control_mean)[None, :] + active[:, None] * np.asarray(effect)[None, :] \
        + baseline_slope * (base[:, None] - 50.0)
    complete = np.round(mean + errors, 1)
    observed = np.ones((n, t), dtype=bool)
    in_study = np.ones(n, dtype=bool)
    last_value = complete[:, 0].copy()
    reasons = np.full((n, t), None, dtype=object)
    a = np.array([intercepts[g] for g in arm])
    for k in range(1, t):
        leave = in_study & (rng.random(n) < expit(a + dropout_slope * (last_value + 4.0) / 4.0))
        why = np.where(last_value > -2.0, "lack of efficacy",
                       np.array(OTHER_REASONS, dtype=object)[rng.integers(0, len(OTHER_REASONS), n)])
        for i in np.flatnonzero(leave):
            reasons[i, k:] = why[i]
        in_study &= ~leave
        observed[:, k] = in_study
        # Intermittent misses (completely at random) among those still in follow-up, not at the last visit.
        if k < t - 1:
            skipped = in_study & (rng.random(n) < intermittent)
            observed[skipped, k] = False
            reasons[skipped, k] = "missed visit"
        last_value = np.where(observed[:, k], complete[:, k], last_value)
    values = np.where(observed, complete, np.nan)
    subject = np.array([f"P{i + 1:04d}" for i in range(n)], dtype=object)
    data = pd.DataFrame({
        "subject": np.repeat(subject, t),
        "arm": pd.Categorical(np.repeat(arm, t), categories=["control", "active"]),
        "base": np.repeat(base, t),
        "week": np.tile(np.asarray(weeks), n),
        "chg": values.ravel(),
    })
    return FollowupTrial(data=data, complete=complete, observed=observed, arm=arm, reasons=reasons,
                         effect=tuple(float(e) for e in effect), weeks=tuple(int(w) for w in weeks))


def followup_demo_frame(trial: Optional[FollowupTrial] = None) -> pd.DataFrame:
    """The trial as a data manager would send it: long layout, reason codes in ``chg``, no rows after loss.

    Parameters
    ----------
    trial : a simulated trial; None simulates the demo's with its fixed seed.

    Returns
    -------
    pandas.DataFrame
        One row per participant per attended visit (and a reason-coded row at the visit of loss).
    """
    trial = simulate_followup_trial() if trial is None else trial
    reasons = trial.reasons.ravel()
    values = trial.data["chg"].to_numpy()
    text = np.array([f"{v:.1f}" if v == v else REASON_CODES.get(r, "") for v, r in zip(values, reasons)],
                    dtype=object)
    frame = pd.DataFrame({"subject": trial.data["subject"].to_numpy(), "arm": trial.data["arm"].astype(str).to_numpy(),
                          "base": trial.data["base"].map(lambda v: f"{v:.1f}").to_numpy(),
                          "week": trial.data["week"].to_numpy(), "chg": text})
    lost = np.array([r == "lost to follow-up" for r in reasons]) & np.isnan(values)
    return frame[~lost].reset_index(drop=True)


def write_followup_csv(path: Path) -> Path:
    """Write the demo data file (the shipped one is this, byte for byte)."""
    path = Path(path)
    followup_demo_frame().to_csv(path, index=False, lineterminator="\n")
    return path


def followup_demo_files() -> Tuple[Path, Path]:
    """The shipped data file and params file of the follow-up demo.

    Returns
    -------
    (Path, Path)
        The CSV file and the params file inside the installed package.
    """
    folder = Path(str(resources.files("gapbook") / "data"))
    return folder / DEMO_CSV, folder / DEMO_PARAMS


def followup_demo_params() -> "Params":
    """The follow-up demo's params (``gapbook demo --study followup``), the data path pointing at the shipped CSV.

    Returns
    -------
    Params
        The validated params of the follow-up demo.
    """
    from ..params import load_params

    return load_params(followup_demo_files()[1])
