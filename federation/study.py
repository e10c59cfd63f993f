"""Issuing a study request: sign it, record it in the store, return the document."""

from __future__ import annotations

import json
import uuid
from dataclasses import replace
from datetime import UTC, datetime

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from federation.protocol import AnalysisSpec, DocumentError, KeyRing, Request, key_id, load_bundle
from federation.protocol.documents import ANALYSES, SubgroupSpec

from .store import Store


def issue_request(
    store: Store,
    study_id: str,
    bundle_bytes: bytes,
    private_key: Ed25519PrivateKey,
    thresholds: tuple[float, ...] = (),
    request_id: str | None = None,
    analyses: tuple[AnalysisSpec, ...] | None = None,
    compare_bundle_bytes: bytes | None = None,
    primary_threshold: float | None = None,
) -> bytes:
    """Sign a request for ``bundle_bytes`` and record the request (and the bundle) in ``store``.

    ``analyses`` default to one confusion table at ``thresholds``; a paired analysis names the SHA-256 of
    ``compare_bundle_bytes``, which is verified and recorded too. The request's primary result is the 2×2
    table at the first confusion threshold listed: ``primary_threshold`` if given, else the bundle's own
    threshold when it is among those asked for (see :func:`primary_first`).
    """
    public = private_key.public_key()
    ring = KeyRing({key_id(public): public})
    bundle = load_bundle(bundle_bytes, ring, "bundle")
    specs = analyses if analyses is not None else (AnalysisSpec("confusion", thresholds),)
    specs = primary_first(specs, bundle.manifest.thresholds, primary_threshold)
    compare = load_bundle(compare_bundle_bytes, ring, "comparison bundle") if compare_bundle_bytes else None
    for spec in specs:
        if spec.name == "calibration" and bundle.manifest.score_kind != "probability":
            raise DocumentError("--analyses calibration: the bundle's score is not a probability")
        if spec.name == "margin" and not spec.bands and bundle.manifest.score_kind != "probability":
            raise DocumentError("--analyses margin: a points model needs --margin-bands")
        if spec.name == "paired" and (compare is None or compare.sha256 != spec.compare_bundle_sha256):
            raise DocumentError("--compare: the paired analysis needs the comparison bundle it names")
        for subgroup in spec.subgroups:
            if subgroup.variable not in bundle.schema.names:
                raise DocumentError(f"--subgroup {subgroup.variable}: not an input of the model's schema")
            numeric = bundle.schema.feature(subgroup.variable).type != "category"
            if numeric != bool(subgroup.edges):
                raise DocumentError(
                    f"--subgroup {subgroup.variable}: "
                    + ("a numeric variable needs edges (VAR=EDGE,...)" if numeric else "a category takes no edges")
                )
    request = Request(
        study_id=study_id,
        request_id=request_id or uuid.uuid4().hex,
        bundle_sha256=bundle.sha256,
        analyses=tuple(specs),
        issued_at=datetime.now(UTC).replace(microsecond=0).isoformat(),
    )
    document = request.signed_bytes(private_key)
    parsed = Request.from_bytes(document, ring, "request")  # validates ids and the signature we just made
    store.add_bundle(bundle.sha256, bundle.manifest.name, json.dumps(bundle.manifest.to_dict()))
    if compare is not None:
        store.add_bundle(compare.sha256, compare.manifest.name, json.dumps(compare.manifest.to_dict()))
    store.add_request(parsed, document)
    return document


def primary_first(
    specs: tuple[AnalysisSpec, ...], bundle_thresholds: tuple[float, ...], primary: float | None
) -> tuple[AnalysisSpec, ...]:
    """List the primary threshold first in the confusion analysis: the site keeps that table last when its
    disclosure control must withhold (docs/formats.md, "The primary result")."""
    out = []
    for spec in specs:
        if spec.name == "confusion":
            asked = spec.thresholds or bundle_thresholds
            if primary is None:
                primary = bundle_thresholds[0] if bundle_thresholds and bundle_thresholds[0] in asked else asked[0]
            spec = replace(spec, thresholds=(primary, *(t for t in asked if t != primary)))
        out.append(spec)
    if primary is not None and not any(s.name == "confusion" for s in out):
        raise DocumentError("--primary-threshold: the request has no confusion analysis")
    return tuple(out)


def analysis_specs(
    names: list[str],
    thresholds: tuple[float, ...] = (),
    bands: tuple[float, ...] = (),
    margin_bands: tuple[float, ...] = (),
    calibration_bands: tuple[float, ...] = (),
    subgroups: tuple[SubgroupSpec, ...] = (),
    compare_sha256: str = "",
) -> tuple[AnalysisSpec, ...]:
    """The analysis specs `federation request new` builds from its flags (validated like a parsed request)."""
    wanted = list(dict.fromkeys(names))
    if subgroups and "subgroups" not in wanted:
        wanted.append("subgroups")
    if compare_sha256 and "paired" not in wanted:
        wanted.append("paired")
    unknown = [n for n in wanted if n not in ANALYSES]
    if unknown:
        raise DocumentError(f"--analyses: unknown analysis {unknown[0]!r} (known: {', '.join(ANALYSES)})")
    if "subgroups" in wanted and not subgroups:
        raise DocumentError("--analyses subgroups: name at least one --subgroup VAR")
    if "paired" in wanted and not compare_sha256:
        raise DocumentError("--analyses paired: give --compare OTHER.bundle")
    specs = []
    for name in wanted:
        raw: dict = {"name": name}
        if name in ("confusion", "margin", "agreement") and thresholds:
            raw["thresholds"] = list(thresholds)
        if name == "roc" and bands:
            raw["bands"] = list(bands)
        if name == "calibration" and calibration_bands:
            raw["bands"] = list(calibration_bands)
        if name == "margin" and margin_bands:
            raw["bands"] = list(margin_bands)
        if name == "subgroups":
            raw["variables"] = [s.to_dict() for s in subgroups]
        if name == "paired":
            raw["compare_bundle_sha256"] = compare_sha256
            if thresholds:
                raw["thresholds"] = list(thresholds[:1])
        specs.append(AnalysisSpec.from_dict(raw, f"--analyses {name}"))
    return tuple(specs)


# What makes an analysis costly for the sites' disclosure control (docs/coordinator.md, "Costly analyses").
MANY_BANDS = 20  # more score band edges than the default 0.05 steps
NARROW_BAND = 0.05  # narrower probability bands than the default steps
MANY_THRESHOLDS = 5
MANY_LEVELS = 6


def costly_analyses(specs: tuple[AnalysisSpec, ...]) -> list[str]:
    """One line per requested analysis that is known to cost the sites' disclosure control dearly.

    Not a refusal: the coordinator may still ask. Each line names the analysis and why it is costly, so that
    a cut-back or withheld result at the sites comes as no surprise. Costly are: a second reference standard
    (agreement), which splits every record by a variable that is sometimes blank at a site; a paired
    comparison, whose second table overlaps the primary one record by record; fine or many score bands;
    many thresholds; subgroups with many levels.
    """
    lines = []
    for spec in specs:
        if spec.name == "agreement":
            lines.append(
                "agreement: a second reference standard with missing values at a site splits every record three "
                "ways; small cells follow and the sites' audit may withhold the agreement table and, to protect it, "
                "cells of the primary table"
            )
        if spec.name == "paired":
            lines.append(
                "paired: the second model's table overlaps the primary table record by record; the sites' audit "
                "may cut the paired comparison back to protect it, and the AUC difference's standard error needs "
                "a joint table of both scores that small sites withhold"
            )
        if spec.bands and spec.name in ("roc", "calibration", "margin"):
            gaps = [b - a for a, b in zip(spec.bands, spec.bands[1:], strict=False)]
            narrow = min(gaps) if gaps else None
            probability_like = all(0.0 <= b <= 1.0 for b in spec.bands)
            if len(spec.bands) > MANY_BANDS or (probability_like and narrow is not None and narrow < NARROW_BAND):
                flag = {"roc": "--roc-bands", "calibration": "--calibration-bands", "margin": "--margin-bands"}
                lines.append(
                    f"{spec.name} ({flag[spec.name]}): {len(spec.bands)} band edges"
                    + (f", the narrowest {narrow:g} wide" if narrow is not None else "")
                    + "; sites merge fine bands until every count is safe, and fine bands make the audit withhold "
                    "more (other analyses included)"
                )
        if spec.name in ("confusion", "margin", "agreement") and len(spec.thresholds) > MANY_THRESHOLDS:
            lines.append(
                f"{spec.name} (--thresholds): {len(spec.thresholds)} thresholds; close thresholds differ by few "
                "records, and the sites' audit withholds such differences"
            )
        for subgroup in spec.subgroups:
            levels = len(subgroup.edges) + 1 if subgroup.edges else 0
            if levels > MANY_LEVELS:
                lines.append(
                    f"subgroups ({subgroup.variable}): {levels} levels; every analysis is repeated within each level, "
                    "and small levels are withheld"
                )
    return lines
