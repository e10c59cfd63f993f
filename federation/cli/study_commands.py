"""`federation` commands that set a study up: keys, model bundles, requests, site enrolment, ingesting releases."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from federation.protocol import (
    BundleError,
    DocumentError,
    KeyRing,
    Request,
    Schema,
    ValidationToolError,
    key_id,
    load_bundle,
    load_private_key,
    load_public_key,
    write_keypair,
)
from federation.protocol.bundle import split_bundle
from federation.protocol.cli_support import print_json, write_atomic

from ..modelpack import model_format_for, pack_model
from ..store import Store
from ..study import analysis_specs, costly_analyses, issue_request


def _read(path: Path, what: str) -> bytes:
    try:
        return Path(path).read_bytes()
    except FileNotFoundError:
        raise ValidationToolError(f"{path}: {what} not found") from None


def cmd_keys_new(args: argparse.Namespace) -> int:
    private, public = write_keypair(args.out_dir, "coordinator")
    kid = key_id(load_public_key(public))
    if args.json:
        print_json({"private_key": str(private), "public_key": str(public), "key_id": kid})
        return 0
    print(f"wrote {private} (private, keep it secret) and {public} (give this to every site)")
    print(f"key id: {kid}")
    return 0


def cmd_bundle_pack(args: argparse.Namespace) -> int:
    schema_text = _read(args.schema, "schema file").decode("utf-8", errors="replace")
    schema = Schema.from_toml(schema_text, str(args.schema))
    model = _read(args.model, "model file")
    thresholds = [args.threshold] if args.threshold is not None else None
    data = pack_model(model, model_format_for(args.model), schema, load_private_key(args.sign), thresholds, args.name)
    write_atomic(args.out, data)
    if args.json:
        print_json({"out": str(args.out), "sha256": load_bundle_hash(data)})
        return 0
    print(f"wrote {args.out} (sha256 {load_bundle_hash(data)})")
    return 0


def load_bundle_hash(data: bytes) -> str:
    from federation.protocol import sha256_hex

    return sha256_hex(data)


def cmd_bundle_show(args: argparse.Namespace) -> int:
    data = _read(args.bundle, "bundle")
    signer, _, _ = split_bundle(data, str(args.bundle))
    if args.trust:
        bundle = load_bundle(data, KeyRing.from_paths(args.trust), str(args.bundle))
        verified = True
    else:
        # Our own file: show it, saying plainly that the signature was not checked.
        public_ring = _self_ring_unverified(data, str(args.bundle))
        bundle = load_bundle(data, public_ring, str(args.bundle)) if public_ring else None
        verified = False
    if bundle is None:
        raise BundleError(f"{args.bundle}: give --trust COORDINATOR.pub to check and show it")
    manifest = bundle.manifest.to_dict()
    info = {
        "file": str(args.bundle),
        "sha256": bundle.sha256,
        "signer_key_id": signer,
        "signature_verified": verified,
        "manifest": manifest,
    }
    if args.json:
        print_json(info)
        return 0
    print(f"bundle      {args.bundle}")
    print(f"name        {bundle.manifest.name}")
    print(f"sha256      {bundle.sha256}")
    print(f"signed by   {signer} ({'verified' if verified else 'NOT verified: give --trust'})")
    print(f"model       {bundle.manifest.model_format}, score = {bundle.manifest.score_kind}")
    print(f"thresholds  {', '.join(str(t) for t in bundle.manifest.thresholds)} (positive when score >= threshold)")
    print("inputs")
    for feature in bundle.schema.features:
        rule = (
            "categories " + "/".join(feature.categories)
            if feature.categories
            else f"{feature.type} in [{feature.minimum}, {feature.maximum}]"
        )
        # what a site's reviewer sees too (site-agent model review): required or not, and what a missing value
        # is scored as, which every bundle of a study must declare alike
        if not feature.required:
            rule += " (optional)"
        if feature.missing_value is not None:
            rule += f"; a missing value is scored as {feature.missing_value}"
        print(f"  {feature.name:<20} {rule}")
    return 0


def _self_ring_unverified(data: bytes, source: str) -> KeyRing | None:
    """A ring that accepts the bundle's own signature, for showing a file without a pinned key."""
    from federation.protocol.keys import verify as _verify  # noqa: F401 - kept explicit for readers

    class _Accept(KeyRing):
        def verify(self, signer_key_id: str, message: bytes, signature_b64: str, what: str) -> None:
            return None

    return _Accept({})


def cmd_request_new(args: argparse.Namespace) -> int:
    from federation.protocol import sha256_hex
    from federation.protocol.documents import SubgroupSpec

    thresholds = tuple(_float_list(args.thresholds, "--thresholds")) if args.thresholds else ()
    compare_bytes = _read(args.compare, "comparison bundle") if args.compare else None
    subgroups = []
    for text in args.subgroup or []:
        variable, _, edges = text.partition("=")
        raw = {"name": variable.strip(), **({"edges": _float_list(edges, "--subgroup")} if edges else {})}
        subgroups.append(SubgroupSpec.from_dict(raw, f"--subgroup {variable.strip()[:64]}"))
    specs = analysis_specs(
        [name.strip() for name in args.analyses.split(",") if name.strip()],
        thresholds,
        tuple(_float_list(args.roc_bands, "--roc-bands")) if args.roc_bands else (),
        tuple(_float_list(args.margin_bands, "--margin-bands")) if args.margin_bands else (),
        tuple(_float_list(args.calibration_bands, "--calibration-bands")) if args.calibration_bands else (),
        tuple(subgroups),
        sha256_hex(compare_bytes) if compare_bytes else "",
    )
    for line in costly_analyses(specs):  # not blocking: the coordinator may still ask
        print(f"federation: warning: {line}", file=sys.stderr)
    document = issue_request(
        Store(args.store),
        args.study_id,
        _read(args.bundle, "bundle"),
        load_private_key(args.sign),
        thresholds,
        args.request_id,
        specs,
        compare_bytes,
        float(_float_list(args.primary_threshold, "--primary-threshold")[0]) if args.primary_threshold else None,
    )
    write_atomic(args.out, document)
    request = Request.from_bytes(document, None, str(args.out))
    if args.json:
        print_json(
            {
                "out": str(args.out),
                "study_id": request.study_id,
                "request_id": request.request_id,
                "bundle_sha256": request.bundle_sha256,
                "analyses": [a.name for a in request.analyses],
                "compare_bundle_sha256": request.compare_bundle_sha256 or None,
            }
        )
        return 0
    print(f"wrote {args.out} (study {request.study_id}, request {request.request_id})")
    print(f"  analyses: {', '.join(a.name for a in request.analyses)}")
    if request.compare_bundle_sha256:
        print(f"  send {args.compare} with it: sites need both bundles for the paired comparison")
    return 0


def _float_list(text: str, flag: str) -> list[float]:
    try:
        return [float(part) for part in text.split(",") if part.strip()]
    except ValueError:
        raise DocumentError(f"{flag}: must be comma-separated numbers") from None


def cmd_enrol(args: argparse.Namespace) -> int:
    store = Store(args.store)
    kid = store.enrol(args.site_id, _read(args.key, "site public key"), str(args.key))
    if args.json:
        if args.node_key:  # the node-key lines go to stderr so that stdout stays one JSON document
            import contextlib
            import sys

            from ..deploy.commands import enrol_node_key

            with contextlib.redirect_stdout(sys.stderr):
                enrol_node_key(store, args.site_id, args.node_key)
        print_json({"site_id": args.site_id, "key_id": kid, "node_key": str(args.node_key) if args.node_key else None})
        return 0
    print(f"enrolled site {args.site_id} with release-signing key {kid}")
    if args.node_key:
        from ..deploy.commands import enrol_node_key

        enrol_node_key(store, args.site_id, args.node_key)
    return 0


def cmd_ingest(args: argparse.Namespace) -> int:
    store = Store(args.store)
    documents = [(_read(path, "release file"), str(path)) for path in args.releases]
    releases = store.ingest(documents)
    if args.json:
        print_json(
            [
                {"site_id": r.site_id, "study_id": r.study_id, "request_id": r.request_id, "file": source}
                for r, (_, source) in zip(releases, documents, strict=True)
            ]
        )
        return 0
    for release in releases:
        print(f"ingested release of site {release.site_id} for request {release.request_id}")
    return 0
