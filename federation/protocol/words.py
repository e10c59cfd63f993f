"""The words every person-facing output uses (terminal tables, the report, the site's review page).

One name for each thing, so that the coordinator, site IT and an ethics board read the same word in the
command line, the report and the documents. JSON keys stay as they are (``suppressed`` lists the withheld
counts, ``calibration_intercept`` is the calibration intercept); these are the names shown to people.
"""

from __future__ import annotations

# A count the site did not release, whichever rule withheld it (minimum cell size, protection of another
# withheld count, the disclosure audit, an analysis cut back): one word and one mark.
WITHHELD = "withheld"
WITHHELD_MARK = "·"
WITHHELD_LEGEND = "· withheld by the site's disclosure control"
# A quantity the data cannot define (no participant with the condition, fewer than two sites ...).
NOT_DEFINED_MARK = "—"
NOT_DEFINED_LEGEND = "— not defined for these data"

# The split by reference standard.
WITH_CONDITION = "with the condition"
WITHOUT_CONDITION = "without the condition"

# Calibration.
CALIBRATION_INTERCEPT = "calibration intercept"
CALIBRATION_SLOPE = "calibration slope"
OBSERVED_EXPECTED = "O:E ratio"

# The pooled models, by their key in the analysis JSON ("pooled" = the separate models of sensitivity and
# specificity at the top of ``pooled``).
POOLED_MODELS = {
    "pooled": "bivariate binomial model, every site",
    "univariate": "univariate random-effects model (sensitivity analysis)",
    "bivariate": "bivariate normal model (sensitivity analysis)",
    "bivariate_glmm": "bivariate binomial model of complete tables (sensitivity analysis)",
    "bivariate_glmm_suppression_aware": "bivariate binomial model, every site",
}

# The four cells of a site's 2x2 table, as a person reads them.
CELLS = {
    "tp": "with the condition, screen +",
    "fn": "with the condition, screen −",
    "fp": "without the condition, screen +",
    "tn": "without the condition, screen −",
}


def withheld_cells(cells: tuple[str, ...] | list[str]) -> str:
    """Why a site's table is not pooled: "withheld counts: with the condition, screen + ; ..."."""
    return "withheld counts: " + "; ".join(CELLS.get(c, c) for c in cells)
