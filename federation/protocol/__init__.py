"""The contract both sides share: bundle format, request and release documents, keys and signatures.

The site agent imports only this package from :mod:`federation`.
"""

from .bundle import Bundle, Manifest, load_bundle, pack_bundle, read_bundle_file
from .canonical import canonical_bytes, sha256_hex
from .documents import AnalysisSpec, ConfusionTable, Release, Request
from .errors import (
    BundleError,
    BundleSignatureError,
    DataValidationError,
    DocumentError,
    IngestError,
    PolicyViolation,
    SignatureError,
    ValidationToolError,
)
from .keys import KeyRing, key_id, load_private_key, load_public_key, write_keypair
from .schema import Feature, Schema
from .scoring import make_scorer

__all__ = [
    "AnalysisSpec",
    "Bundle",
    "BundleError",
    "BundleSignatureError",
    "ConfusionTable",
    "DataValidationError",
    "DocumentError",
    "Feature",
    "IngestError",
    "KeyRing",
    "Manifest",
    "PolicyViolation",
    "Release",
    "Request",
    "Schema",
    "SignatureError",
    "ValidationToolError",
    "canonical_bytes",
    "key_id",
    "load_bundle",
    "load_private_key",
    "load_public_key",
    "make_scorer",
    "pack_bundle",
    "read_bundle_file",
    "sha256_hex",
    "write_keypair",
]
