"""A study's results, per site and pooled: from the store (:func:`analyze`) or from per-site tables."""

from __future__ import annotations

from typing import Any

from threadpoolctl import threadpool_limits

from ..further_analysis import further_results
from ..protocol import SignatureError
from ..store import Store, StoredRelease
from .accuracy import _proportion, _site_accuracy, headline_pooling
from .sections import _calibration, _discrimination, _paired, _subgroups
from .tables import CELLS, AnalysisError, SiteTable, choose_study, site_tables


def analyze_tables(
    study_id: str,
    tables: list[SiteTable],
    prevalence: float | None = None,
    covariates: dict[str, dict[str, float | str]] | None = None,
    integer_variables: frozenset[str] = frozenset(),
) -> dict[str, Any]:
    """Per-site and pooled results from each site's table and release sections (see the module docstring).

    ``covariates`` (optional, per site id) are coordinator-supplied site covariates for the meta-regression
    (:func:`federation.further_analysis.read_covariates`). ``integer_variables``: model inputs that take whole
    numbers, so that their subgroup bands are labelled by their first and last values ("36-47 months").
    """
    if prevalence is not None and (
        isinstance(prevalence, bool) or not isinstance(prevalence, int | float) or not 0 <= prevalence <= 1
    ):
        raise AnalysisError("prevalence: must be a number between 0 and 1")
    sites = []
    for table in tables:
        cells = table.cells
        entry: dict[str, Any] = {"site_id": table.site_id, "threshold": table.threshold}
        entry.update({c: cells[c] for c in CELLS})
        entry["suppressed"] = list(table.suppressed)
        entry["sensitivity"] = (
            _proportion(cells["tp"], cells["tp"] + cells["fn"])
            if cells["tp"] is not None and cells["fn"] is not None
            else None
        )
        entry["specificity"] = (
            _proportion(cells["tn"], cells["tn"] + cells["fp"])
            if cells["tn"] is not None and cells["fp"] is not None
            else None
        )
        entry["flow"] = table.flow
        entry["cut_back"] = [dict(cut) for cut in table.cut_back]
        entry.update(_site_accuracy(table, prevalence))
        sites.append(entry)
    pooled = headline_pooling(tables)
    result: dict[str, Any] = {"study_id": study_id, "sites": sites}
    for key, build in (
        ("discrimination", lambda t: _discrimination(t, integer_variables)),
        ("calibration", _calibration),
        ("paired", _paired),
        ("subgroups", lambda t: _subgroups(t, integer_variables)),
    ):
        value = build(tables)
        if value is not None:
            result[key] = value
    result["pooled"] = pooled
    # What a reviewer asks for beyond the headline (federation.further_analysis), kept apart from the above.
    result.update(further_results(tables, pooled, covariates, integer_variables))
    return result


def analyze(
    store: Store,
    study_id: str | None = None,
    prevalence: float | None = None,
    covariates: dict[str, dict[str, float | str]] | None = None,
) -> dict[str, Any]:
    """Per-site and pooled results of a study, as ``federation analyze --json`` prints them.

    ``prevalence`` (optional) is a pre-test probability at which every site's PPV and NPV are also given;
    ``covariates`` (optional) are coordinator-supplied site covariates for the meta-regression.
    """
    study = choose_study(store, study_id)
    return analyze_releases(store, study, verified_releases(store, study), prevalence, covariates)


def analyze_releases(
    store: Store,
    study: str,
    releases: list[StoredRelease],
    prevalence: float | None = None,
    covariates: dict[str, dict[str, float | str]] | None = None,
) -> dict[str, Any]:
    """:func:`analyze` of releases already read and verified (:func:`verified_releases`), so that a caller
    that also lists them (the report) computes from the same read of the store and checks each signature once."""
    if not releases:
        raise AnalysisError(f"{store.path}: study {study!r} has no ingested releases yet")
    # Every matrix here is tiny: OpenBLAS threads cost far more than they give (about 8x slower fits on a busy
    # 2-core machine), as in the site's disclosure audit.
    with threadpool_limits(limits=1, user_api="blas"):
        tables = site_tables(releases, auc_bounds=True)
        return analyze_tables(study, tables, prevalence, covariates, store.integer_features(study))


def verified_releases(store: Store, study_id: str) -> list[StoredRelease]:
    """The study's stored releases, each signature checked again against its site's enrolled key: no result
    (analysis, report or export) is computed from a release altered after ingest.

    Raises SignatureError (exit code 2) naming the site whose stored release no longer verifies.
    """
    rings = store.site_keys()
    releases = store.releases(study_id)
    for stored in releases:
        release = stored.release
        ring = rings.get(release.site_id)
        if ring is None:
            raise SignatureError(f"{store.path}: stored release of site {release.site_id!r} has no enrolled key")
        try:
            release.verify(ring, f"{store.path}: stored release of site {release.site_id}")
        except SignatureError as exc:
            raise SignatureError(f"{exc}; the store was altered after ingest, so nothing is computed from it") from None
    return releases


def release_sections(store: Store, study_id: str) -> dict[str, dict[str, Any]]:
    """Each site's further release sections (``roc``, ``calibration``, ``margin``, ...) from its latest release."""
    return {table.site_id: dict(table.extra) for table in site_tables(store.releases(study_id))}


def enrolled_without_release(store: Store, study_id: str) -> list[str]:
    """Sites enrolled in the store that have sent no release for ``study_id``."""
    answered = {stored.release.site_id for stored in store.releases(study_id)}
    return [site for site in store.sites() if site not in answered]
