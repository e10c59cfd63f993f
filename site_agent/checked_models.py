"""The static check of a model, remembered per model in the site folder, so a round does not repeat it.

Checking an ONNX graph (:mod:`federation.protocol.model_check`) needs the ``onnx`` package, whose import
alone costs about 0.7 s of CPU (its numeric-types extension), in every ClientApp process a round starts. The
check is a pure function of the model's bytes and of the checker itself, so its result is kept once it has
been made, normally when a person at the site reviews or approves the model (``site-agent model review`` /
``approve``), and reused by every request naming the same model:

``SITEDIR/models/MODEL16.checked.json``  the model's SHA-256, the checker's fingerprint (SHA-256 of the
                                        checker's source and the ``onnx`` version), the score output, the
                                        operators and the SHA-256 of the pruned graph
``SITEDIR/models/MODEL16.checked.onnx``  the pruned graph onnxruntime runs (the ancestors of the score only)

An entry is used only when every one of those matches (a changed checker, a different model, a pruned graph
whose bytes changed: the check runs again and the entry is rewritten). The files are as trusted as the rest
of the site folder (``site.toml``, the allowlist, the keys): only the site's service account can write it.
"""

from __future__ import annotations

import hashlib
import json
from functools import lru_cache
from importlib import metadata
from pathlib import Path
from typing import Any

from federation.protocol import Bundle, sha256_hex
from federation.protocol.cli_support import write_atomic
from federation.protocol.model_check import CheckedGraph
from federation.protocol.scoring import OnnxScorer, Scorer, make_scorer

from .config import Site

MODELS_DIR = "models"


@lru_cache(maxsize=1)
def checker_fingerprint() -> str:
    """SHA-256 of the checker's source and the ``onnx`` version: a new rule or parser makes old entries stale."""
    from federation.protocol import model_check

    try:
        onnx_version = metadata.version("onnx")
    except metadata.PackageNotFoundError:
        onnx_version = "absent"
    source = Path(model_check.__file__).read_bytes()
    return hashlib.sha256(source + b"\0onnx " + onnx_version.encode()).hexdigest()


def _paths(site: Site, model_sha256: str) -> tuple[Path, Path]:
    folder = site.root / MODELS_DIR  # (``with_suffix`` on "X.checked" would drop ".checked")
    return folder / f"{model_sha256[:16]}.checked.json", folder / f"{model_sha256[:16]}.checked.onnx"


def remembered(site: Site, model_bytes: bytes) -> CheckedGraph | None:
    """The kept result of the check for exactly these model bytes and this checker, or None."""
    digest = sha256_hex(model_bytes)
    facts_path, graph_path = _paths(site, digest)
    try:
        facts: dict[str, Any] = json.loads(facts_path.read_bytes())
        pruned = graph_path.read_bytes()
    except (OSError, ValueError):
        return None
    if not isinstance(facts, dict):
        return None
    if facts.get("model_sha256") != digest or facts.get("checker") != checker_fingerprint():
        return None
    if facts.get("pruned_sha256") != sha256_hex(pruned):
        return None
    output, operators = facts.get("output"), facts.get("operators")
    if not isinstance(output, str) or not isinstance(operators, list) or not all(isinstance(o, str) for o in operators):
        return None
    return CheckedGraph(pruned, output, tuple(operators))


def remember(site: Site, model_bytes: bytes, checked: CheckedGraph) -> None:
    """Keep a check's result (the graph first, its facts last: a half-written entry is never used)."""
    digest = sha256_hex(model_bytes)
    facts_path, graph_path = _paths(site, digest)
    write_atomic(graph_path, checked.model_bytes)
    facts = {
        "model_sha256": digest,
        "checker": checker_fingerprint(),
        "output": checked.output,
        "operators": list(checked.operators),
        "pruned_sha256": sha256_hex(checked.model_bytes),
    }
    write_atomic(facts_path, json.dumps(facts, indent=2, sort_keys=True).encode() + b"\n")


def site_scorer(site: Site, bundle: Bundle) -> Scorer:
    """The bundle's scorer, its static check taken from the site folder when this model was checked before.

    A scorecard needs no such help (checking it is a few arithmetic steps); an ONNX model is checked once per
    model and checker, and the result kept (:func:`remember`). A model that fails the check raises
    BundleError exactly as :func:`federation.protocol.make_scorer` does; nothing is kept for it.
    """
    if bundle.manifest.model_format != "onnx":
        return make_scorer(bundle)
    model = bundle.model_bytes
    checked = remembered(site, model)
    scorer = OnnxScorer(model, len(bundle.schema.features), checked=checked)
    if checked is None:
        try:
            remember(site, model, scorer.checked)
        except OSError:  # a read-only site folder still scores; it only checks again next time
            pass
    return scorer
