"""Drawing a cohort in schema terms from the item response model (see the package docstring)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .schema import ITEMS, LONG_ITEMS, OUTCOME

# Item response model (latent logistic, cut into answers 0-3). Items differ in how well they separate.
_DISCRIMINATION = np.array([2.0, 1.8, 1.6, 1.4, 1.2, 1.1, 0.9, 0.8, 0.6, 0.4])
# Per standard deviation of age (15 months) above 45 months; negative: younger children answer higher.
_AGE_EFFECT = np.array([0.0, 0.0, -0.5, 0.0, 0.0, 0.2, -0.4, 0.0, 0.3, 0.0])
_SEX_EFFECT = np.array([0.0, -0.3, 0.0, 0.0, 0.5, 0.0, 0.0, 0.3, 0.0, 0.0])  # shift for boys
_CUTPOINTS = np.array([0.8, 2.2, 3.6])
# The full-length instrument's further items (item_11 .. item_20): a little more discriminating on the whole.
_LONG_DISCRIMINATION = np.array([1.9, 1.7, 1.5, 1.5, 1.3, 1.2, 1.0, 0.9, 0.8, 0.6])
_LONG_AGE_EFFECT = np.array([0.0, -0.3, 0.0, 0.2, 0.0, 0.0, -0.2, 0.0, 0.0, 0.0])
_MALE_SHARE = {0: 0.5, 1: 0.65}  # the condition is more common in boys


def generate_cohort(
    rng: np.random.Generator,
    n_records: int,
    prevalence: float,
    *,
    age_range: tuple[int, int] = (18, 72),
    severity: float = 1.0,
    control_shift: float = 0.0,
    extra: np.random.Generator | None = None,
) -> pd.DataFrame:
    """Draw a cohort in schema terms: items, ``age_months``, ``sex`` (text) and ``outcome`` (1/0).

    With ``extra`` (a second generator, so that the short form's draws do not change) the cohort also gets
    the full-length instrument's further items ``item_11`` .. ``item_20``, ``subtype`` (``none`` without
    the condition), and two further verdicts on every child, ``reference2_instrument`` (another diagnostic
    instrument) and ``reference2_rater`` (a second rater using the same one), 1/0; sites keep only some.

    Parameters
    ----------
    rng : the generator every draw comes from.
    n_records : number of children.
    prevalence : probability that the condition is present.
    age_range : inclusive range of age in whole months.
    severity : mean severity of cases; below 1 a milder spectrum than the development cohort.
    control_shift : added to the latent answer level of non-cases (raised answers at specialist clinics).
    """
    outcome = (rng.random(n_records) < prevalence).astype(int)
    male = rng.random(n_records) < np.where(outcome == 1, _MALE_SHARE[1], _MALE_SHARE[0])
    age = rng.integers(age_range[0], age_range[1] + 1, size=n_records)
    case_severity = severity * np.exp(rng.normal(0.0, 0.35, size=n_records))
    latent = (
        _DISCRIMINATION[None, :] * (outcome * case_severity)[:, None]
        + _AGE_EFFECT[None, :] * ((age - 45) / 15)[:, None]
        + _SEX_EFFECT[None, :] * male[:, None]
        + control_shift * (1 - outcome)[:, None]
        + rng.logistic(0.0, 1.0, size=(n_records, len(ITEMS)))
    )
    answers = (latent[:, :, None] > _CUTPOINTS[None, None, :]).sum(axis=2)
    frame = pd.DataFrame(answers, columns=list(ITEMS))
    frame["age_months"] = age
    frame["sex"] = np.where(male, "male", "female")
    frame[OUTCOME] = outcome
    if extra is None:
        return frame
    severe = outcome * case_severity
    latent_long = (
        _LONG_DISCRIMINATION[None, :] * severe[:, None]
        + _LONG_AGE_EFFECT[None, :] * ((age - 45) / 15)[:, None]
        + control_shift * (1 - outcome)[:, None]
        + extra.logistic(0.0, 1.0, size=(n_records, len(LONG_ITEMS) - len(ITEMS)))
    )
    long_answers = (latent_long[:, :, None] > _CUTPOINTS[None, None, :]).sum(axis=2)
    for j, item in enumerate(LONG_ITEMS[len(ITEMS) :]):
        frame[item] = long_answers[:, j]
    early = extra.random(n_records) < 1.0 / (1.0 + np.exp(-3.0 * (case_severity - 1.0)))
    frame["subtype"] = np.where(outcome == 1, np.where(early, "early_onset", "late_onset"), "none")
    # Another instrument misses milder cases more often and calls some children with other difficulties.
    miss = extra.random(n_records) < np.clip(0.35 - 0.2 * case_severity, 0.05, 0.35)
    false_call = extra.random(n_records) < 0.04 + 0.08 * min(control_shift, 1.0)
    frame["reference2_instrument"] = np.where(outcome == 1, (~miss).astype(int), false_call.astype(int))
    rater_flip = extra.random(n_records) < np.where(outcome == 1, 0.15, 0.03)
    frame["reference2_rater"] = np.where(rater_flip, 1 - outcome, outcome)
    return frame
