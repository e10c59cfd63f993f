"""Each site's data as its export writes it (local names, codes, missing values, broken records) and
its mapping file.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
from sklearn.linear_model import LogisticRegression

from .cohort import generate_cohort
from .model import model_inputs
from .schema import AGE_DECIMALS, ITEMS, LONG_ITEMS, MIN_CELL_SIZE, OUTCOME, THRESHOLD
from .sites import SMALL_SITE_ID, LocalCoding, SiteSpec


def _format_years(months: int) -> str:
    text = f"{months / 12:.{AGE_DECIMALS}f}".rstrip("0").rstrip(".")
    return text or "0"


def _localise(frame: pd.DataFrame, coding: LocalCoding) -> pd.DataFrame:
    """The schema-terms frame as the site's export would write it: local names, codes, text cells."""
    to_local_sex = {schema: local for local, schema in coding.sex_codes}
    ages = frame["age_months"].astype(int)
    columns: dict[str, pd.Series] = {
        "record_id": pd.Series([f"{coding.record_prefix}-{i + 1:05d}" for i in range(len(frame))]),
        coding.outcome_column: frame[OUTCOME].map({1: coding.positive, 0: coding.negative}),
        coding.age_column: ages.map(_format_years) if coding.age_in_years else ages.astype(str),
        coding.sex_column: frame["sex"].map(to_local_sex),
    }
    items = LONG_ITEMS if LONG_ITEMS[-1] in frame else ITEMS
    for item, column in zip(items, coding.item_columns, strict=False):
        columns[column] = frame[item].astype(str)
    order = ["record_id", coding.age_column, coding.sex_column, *coding.item_columns[: len(items)]]
    if "subtype" in frame:
        to_local_subtype = {schema: local for local, schema in coding.subtype_codes} | {"none": coding.missing[0]}
        columns[coding.subtype_column] = frame["subtype"].map(to_local_subtype)
        order.append(coding.subtype_column)
    verdict = {1: coding.positive, 0: coding.negative}
    for column, source in (
        (coding.second_instrument_column, "reference2_instrument"),
        (coding.second_rater_column, "reference2_rater"),
    ):
        if column is not None and source in frame:
            columns[column] = frame[source].map(verdict)
            order.append(column)
    order.insert(1 if coding.outcome_first else len(order), coding.outcome_column)
    return pd.DataFrame({name: columns[name].reset_index(drop=True) for name in order})


def _blank_extras(local: pd.DataFrame, spec: SiteSpec, rng: np.random.Generator) -> np.ndarray:
    """What the full-length instrument and the second verdicts lack: a few unanswered further items, the
    second instrument not administered to some children, the second rater seeing only a sample. Returns
    the mask of records with every further item answered."""
    coding = spec.local
    n = len(local)
    complete = np.ones(n, dtype=bool)
    long_columns = list(coding.item_columns[len(ITEMS) :])
    for row in np.flatnonzero(rng.random(n) < spec.missing_rate / 3):
        local.loc[row, long_columns[int(rng.integers(len(long_columns)))]] = coding.missing[0]
        complete[row] = False
    if coding.second_instrument_column is not None:
        local.loc[rng.random(n) < 0.25, coding.second_instrument_column] = coding.missing[0]
    if coding.second_rater_column is not None:
        local.loc[rng.random(n) >= 0.5, coding.second_rater_column] = coding.missing[0]
    return complete


def _add_problems(local: pd.DataFrame, spec: SiteSpec, rng: np.random.Generator) -> np.ndarray:
    """Blank a few answers and (at larger sites) break a handful of records; return the valid-record mask."""
    coding = spec.local
    n = len(local)
    valid = np.ones(n, dtype=bool)
    with_missing = np.zeros(n, dtype=bool)
    with_missing[rng.choice(n, size=max(1, round(spec.missing_rate * n)), replace=False)] = True
    for row in np.flatnonzero(with_missing):
        how_many = 1 if rng.random() < 0.7 else 2
        for column in rng.choice(coding.item_columns[: len(ITEMS)], size=how_many, replace=False):
            local.loc[row, column] = coding.missing[0]
    valid &= ~with_missing
    if spec.site_id == SMALL_SITE_ID:
        return valid
    n_broken = int(min(9, max(3, round(n * 0.003))))
    broken = rng.choice(np.flatnonzero(valid), size=n_broken, replace=False)
    for k, row in enumerate(broken):
        kind = k % 4
        if kind == 0:  # an answer outside 0-3
            local.loc[row, coding.item_columns[int(rng.integers(len(ITEMS)))]] = "7"
        elif kind == 1:  # a sex code the mapping does not know
            local.loc[row, coding.sex_column] = coding.unknown_sex_code
        elif kind == 2:  # no reference standard
            local.loc[row, coding.outcome_column] = coding.missing[0]
        else:  # a typing slip: age far beyond the schema's 240 months
            local.loc[row, coding.age_column] = _format_years(400) if coding.age_in_years else "400"
    valid[broken] = False
    return valid


def _two_by_two(model: LogisticRegression, frame: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Cells (TP, FP, FN, TN) at THRESHOLD, and the scores."""
    score = model.predict_proba(model_inputs(frame))[:, 1]
    positive = score >= THRESHOLD
    truth = frame[OUTCOME].to_numpy() == 1
    cells = np.array(
        [(positive & truth).sum(), (positive & ~truth).sum(), (~positive & truth).sum(), (~positive & ~truth).sum()]
    )
    return cells, score


def _site_data(
    spec: SiteSpec, rng: np.random.Generator, model: LogisticRegression, extra: np.random.Generator | None = None
) -> pd.DataFrame:
    """The site's export. The small site is redrawn until its 2x2 cells all lie in [1, MIN_CELL_SIZE - 1]
    and no score sits within 1e-3 of the threshold (so float32 scoring elsewhere gives the same table).

    ``extra`` draws what the full-length instrument and the second verdicts add (see generate_cohort), so the
    short form's records are the same with or without them."""
    for _ in range(1000):
        frame = generate_cohort(
            rng,
            spec.n_records,
            spec.prevalence,
            age_range=spec.age_range,
            severity=spec.severity,
            control_shift=spec.control_shift,
            extra=extra,
        )
        local = _localise(frame, spec.local)
        valid = _add_problems(local, spec, rng)
        if extra is not None:
            valid &= _blank_extras(local, spec, extra)
        if spec.site_id != SMALL_SITE_ID:
            return local
        cells, score = _two_by_two(model, frame[valid])
        if cells.min() >= 1 and cells.max() < MIN_CELL_SIZE and np.abs(score - THRESHOLD).min() > 1e-3:
            return local
    raise RuntimeError(f"could not draw {spec.site_id} with every 2x2 cell in [1, {MIN_CELL_SIZE - 1}]")


def _toml_string(text: str) -> str:
    return json.dumps(text)  # a JSON string of ASCII text is a valid TOML basic string


def mapping_toml(spec: SiteSpec, full: bool = False) -> str:
    """The site's mapping file (docs/formats.md): local names and codes -> schema names and categories.

    ``full``: also the full-length instrument's further items and the site's second reference standard, for
    a request with the paired comparison (a mapping may name only features of the models it runs)."""
    coding = spec.local
    lines = [
        f"# Mapping for {spec.site_id} (invented demo site): local columns and codes -> schema.",
        f"missing = [{', '.join(_toml_string(m) for m in coding.missing)}]",
        "",
        "[outcome]",
        f"column = {_toml_string(coding.outcome_column)}",
        f"positive = [{_toml_string(coding.positive)}]",
        f"negative = [{_toml_string(coding.negative)}]",
    ]
    for item, column in zip(ITEMS, coding.item_columns, strict=False):
        if column != item:
            lines += ["", f"[features.{item}]", f"column = {_toml_string(column)}"]
    if coding.age_column != "age_months" or coding.age_in_years:
        lines += ["", "[features.age_months]", f"column = {_toml_string(coding.age_column)}"]
        if coding.age_in_years:
            lines.append("multiply = 12")
    codes = ", ".join(f"{_toml_string(local)} = {_toml_string(schema)}" for local, schema in coding.sex_codes)
    lines += ["", "[features.sex]", f"column = {_toml_string(coding.sex_column)}", f"codes = {{ {codes} }}"]
    codes = ", ".join(f"{_toml_string(local)} = {_toml_string(schema)}" for local, schema in coding.subtype_codes)
    lines += ["", "[features.subtype]", f"column = {_toml_string(coding.subtype_column)}", f"codes = {{ {codes} }}"]
    if not full:
        return "\n".join(lines) + "\n"
    lines += ["", "# The full-length instrument's further items (its scoring rule is the paired comparison's model)."]
    for item, column in zip(LONG_ITEMS[len(ITEMS) :], coding.item_columns[len(ITEMS) :], strict=True):
        if column != item:
            lines += ["", f"[features.{item}]", f"column = {_toml_string(column)}"]
    second = coding.second_instrument_column or coding.second_rater_column
    if second is not None:
        what = "a second diagnostic instrument" if coding.second_instrument_column else "a second rater, on a sample"
        lines += [
            "",
            f"[reference2]  # {what}",
            f"column = {_toml_string(second)}",
            f"positive = [{_toml_string(coding.positive)}]",
            f"negative = [{_toml_string(coding.negative)}]",
        ]
    return "\n".join(lines) + "\n"
