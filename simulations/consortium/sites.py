"""The eight invented sites: setting, prevalence, size, spectrum and how each one's export spells things."""

from __future__ import annotations

from dataclasses import dataclass

from .schema import LONG_ITEMS


@dataclass(frozen=True)
class LocalCoding:
    """How one site's export spells things: column names, codes, missing values, age unit."""

    item_columns: tuple[str, ...]
    age_column: str
    age_in_years: bool
    sex_column: str
    sex_codes: tuple[tuple[str, str], ...]  # (local code, schema category)
    unknown_sex_code: str  # a code that appears in a few broken records and is not mapped
    outcome_column: str
    positive: str
    negative: str
    missing: tuple[str, ...]  # local spellings of a missing value; the first is the one written
    record_prefix: str
    outcome_first: bool = False  # column order of the export
    subtype_column: str = "subtype"
    subtype_codes: tuple[tuple[str, str], ...] = (("E", "early_onset"), ("L", "late_onset"))
    second_instrument_column: str | None = None  # a second reference standard (another instrument)
    second_rater_column: str | None = None  # a second rater's verdict on a sample


@dataclass(frozen=True)
class SiteSpec:
    """One invented site: its setting, target prevalence, size, spectrum and local coding."""

    site_id: str
    setting: str  # "community", "primary care", "specialist" or "referral"
    prevalence: float
    n_records: int
    age_range: tuple[int, int]  # inclusive, months
    severity: float  # mean severity of cases (1.0 = development cohort)
    control_shift: float  # raised latent answer level among non-cases
    missing_rate: float  # share of records with one or two unanswered items
    local: LocalCoding


def _numbered(prefix: str, width: int = 0) -> tuple[str, ...]:
    """The site's names of all twenty items (the short form's ten first)."""
    return tuple(f"{prefix}{j:0{width}d}" for j in range(1, 21))


SITES: tuple[SiteSpec, ...] = (
    SiteSpec(
        "northvale-community",
        "community",
        0.05,
        3200,
        (18, 48),
        0.85,
        0.0,
        0.03,
        LocalCoding(
            _numbered("Q"),
            "age_m",
            False,
            "gender",
            (("F", "female"), ("M", "male")),
            "U",
            "dx",
            "yes",
            "no",
            ("",),
            "NV",
            subtype_column="dx_subtype",
            second_rater_column="dx_second_rater",
        ),
    ),
    SiteSpec(
        "quillbrook-community",
        "community",
        0.06,
        1500,
        (18, 60),
        0.9,
        0.1,
        0.02,
        LocalCoding(
            _numbered("itm"),
            "age_years",
            True,
            "sex",
            (("2", "female"), ("1", "male")),
            "9",
            "confirmed",
            "1",
            "0",
            ("", "NA"),
            "QB",
            subtype_codes=(("1", "early_onset"), ("2", "late_onset")),
        ),
    ),
    SiteSpec(
        "tarrowby-primary",
        "primary care",
        0.12,
        1200,
        (18, 72),
        0.95,
        0.1,
        0.04,
        LocalCoding(
            _numbered("q", 2),
            "age_months",
            False,
            "sex",
            (("female", "female"), ("male", "male")),
            "unknown",
            "case_status",
            "case",
            "control",
            (".", ""),
            "TB",
            subtype_column="subtype_onset",
            subtype_codes=(("early", "early_onset"), ("late", "late_onset")),
            second_instrument_column="case_status_b",
            outcome_first=True,
        ),
    ),
    SiteSpec(
        "ostermead-primary",
        "primary care",
        0.15,
        900,
        (24, 72),
        1.0,
        0.0,
        0.03,
        LocalCoding(
            LONG_ITEMS,
            "AGE",
            False,
            "SEX",
            (("F", "female"), ("M", "male")),
            "X",
            "ref_standard",
            "positive",
            "negative",
            ("",),
            "OM",
            subtype_column="SUBTYPE",
            subtype_codes=(("EO", "early_onset"), ("LO", "late_onset")),
            second_rater_column="ref_standard_rater_b",
        ),
    ),
    SiteSpec(
        "vellacombe-primary",
        "primary care",
        0.10,
        450,
        (18, 72),
        1.0,
        0.2,
        0.05,
        LocalCoding(
            _numbered("answer_"),
            "age_yrs",
            True,
            "child_sex",
            (("girl", "female"), ("boy", "male")),
            "not stated",
            "diagnosis",
            "Y",
            "N",
            ("-99", ""),
            "VC",
            subtype_column="child_subtype",
            subtype_codes=(("early", "early_onset"), ("late", "late_onset")),
        ),
    ),
    SiteSpec(
        "brackenholt-specialist",
        "specialist",
        0.35,
        600,
        (24, 72),
        1.1,
        0.5,
        0.03,
        LocalCoding(
            _numbered("A"),
            "agemo",
            False,
            "sex",
            (("0", "female"), ("1", "male")),
            "7",
            "dx_confirmed",
            "TRUE",
            "FALSE",
            ("NA", ""),
            "BH",
            subtype_column="subtype_code",
            subtype_codes=(("1", "early_onset"), ("2", "late_onset")),
            second_instrument_column="dx_confirmed_alt",
            outcome_first=True,
        ),
    ),
    SiteSpec(
        "skarrow-specialist",
        "specialist",
        0.45,
        28,
        (30, 72),
        0.8,
        0.9,
        0.03,
        LocalCoding(
            _numbered("question"),
            "age_in_months",
            False,
            "gender",
            (("f", "female"), ("m", "male")),
            "?",
            "final_dx",
            "present",
            "absent",
            ("",),
            "SK",
            subtype_column="final_dx_subtype",
            subtype_codes=(("e", "early_onset"), ("l", "late_onset")),
        ),
    ),
    SiteSpec(
        "amberlow-referral",
        "referral",
        0.60,
        350,
        (30, 72),
        1.3,
        0.4,
        0.04,
        LocalCoding(
            _numbered("I"),
            "months",
            False,
            "sex_code",
            (("1", "female"), ("2", "male")),
            "3",
            "status",
            "affected",
            "unaffected",
            ("", "NA", "."),
            "AL",
            subtype_column="subtype_group",
            subtype_codes=(("A", "early_onset"), ("B", "late_onset")),
            second_instrument_column="status_second",
        ),
    ),
)
SMALL_SITE_ID = "skarrow-specialist"
