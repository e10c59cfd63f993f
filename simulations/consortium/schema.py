"""The invented instrument's item names, the demo's schemas and its fixed settings (threshold, minimum cell size)."""

from __future__ import annotations

ITEMS: tuple[str, ...] = tuple(f"item_{j:02d}" for j in range(1, 11))
LONG_ITEMS: tuple[str, ...] = tuple(f"item_{j:02d}" for j in range(1, 21))  # the full-length instrument
SUBTYPES: tuple[str, ...] = ("none", "early_onset", "late_onset")
MODEL_FEATURES: tuple[str, ...] = (*ITEMS, "age_months", "sex")  # what the screening model was fitted on
FEATURES: tuple[str, ...] = (*MODEL_FEATURES, "subtype")  # the schema: subtype enters with weight zero
SEX_CATEGORIES: tuple[str, ...] = ("female", "male")
LONG_THRESHOLD = 15  # the full-length instrument's cut-off, in points (invented)
OUTCOME = "outcome"
THRESHOLD = 0.5
MIN_CELL_SIZE = 10
AGE_DECIMALS = 10  # years written with this many decimals: years * 12 is within 1e-9 of whole months

# The twelve screening inputs alone (for a model fitted on them, as the benchmarks do).
MODEL_SCHEMA_TOML = (
    "# Input schema of the invented demo screening model, in model input order.\n"
    + "".join(f'\n[[features]]\nname = "{item}"\ntype = "int"\nmin = 0\nmax = 3\nrequired = true\n' for item in ITEMS)
    + '\n[[features]]\nname = "age_months"\ntype = "int"\nmin = 0\nmax = 240\nrequired = true\n'
    + '\n[[features]]\nname = "sex"\ntype = "category"\ncategories = ["female", "male"]\nrequired = true\n'
)
SCHEMA_TOML = (
    MODEL_SCHEMA_TOML
    + '\n[[features]]\nname = "subtype"\ntype = "category"\ncategories = ["none", "early_onset", "late_onset"]\n'
    + 'required = false\nmissing = "none"\n'
)
LONG_SCHEMA_TOML = "# Input schema of the invented full-length instrument's scoring rule.\n" + "".join(
    f'\n[[features]]\nname = "{item}"\ntype = "int"\nmin = 0\nmax = 3\nrequired = true\n' for item in LONG_ITEMS
)
