"""Typed errors shared by both sides.

Every message is written for a person who must act on it (site IT, a coordinator) and never contains a
value read from a participant record: only file names, field names and the rule that was broken.
"""

from __future__ import annotations


class ValidationToolError(Exception):
    """Base of every error the tool raises on purpose; the CLIs print its message as one line."""

    exit_code = 1


class DocumentError(ValidationToolError):
    """A request, release, schema or mapping document is malformed (names the field and the rule)."""


class SignatureError(ValidationToolError):
    """A signature does not verify, or the signer is not a pinned/enrolled key."""

    exit_code = 2


class BundleError(ValidationToolError):
    """A model bundle cannot be used (bad format, hash mismatch, unsupported model)."""

    exit_code = 2


class BundleSignatureError(SignatureError, BundleError):
    """A model bundle's signature does not verify against any pinned coordinator key."""


class DataValidationError(ValidationToolError):
    """Site data cannot be read or mapped at all (as opposed to single records being excluded)."""


class PolicyViolation(ValidationToolError):
    """The site's disclosure policy refuses the request or the release."""

    exit_code = 2


class IngestError(ValidationToolError):
    """The coordinator refuses a release (unknown site, unknown request, duplicate, mismatch)."""

    exit_code = 2


class ScoringError(ValidationToolError):
    """Scoring the site's records failed, or a score was not a finite number in the model's range.

    Its message is fixed: which record failed, and how, could tell something about the records.
    """

    exit_code = 2


class LimitReached(PolicyViolation):
    """A cap of the site's policy (requests per study, studies) is reached."""


class ModelNotApproved(PolicyViolation):
    """The site's policy asks for its own approval of each model bundle, and this one has none yet."""


class ModelRejected(ModelNotApproved):
    """A person at the site rejected this model bundle (for good)."""


# What travels to the coordinator when a site refuses a request: one of these, and, only for a refusal made
# before any record was read (or by the disclosure audit, which names an analysis and a rule), our own
# one-line message after a colon. See docs/formats.md, "Refusals".
REFUSAL_CATEGORIES = (
    "request not accepted",
    "bundle not accepted",
    "request not accepted by the site's policy",
    "limit reached",
    "model not approved by the site",
    "data could not be read",
    "scoring failed",
    "release withheld by the site's disclosure control",
    "internal error at the site",
)
