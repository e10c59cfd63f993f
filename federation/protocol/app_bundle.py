"""The app bundle (Flower FAB) of a validation round: configuration only, no code.

A FAB is what a SuperNode installs and imports for every message. Ours holds a single ``pyproject.toml``
whose components name the *installed* packages (``federation.flower_server:app`` at the coordinator,
``site_agent.flower_client:app`` at a site), so a site runs only code its IT installed, and the bundle's
SHA-256 is something a site can pin: it changes only when the package version, the Flower version or the
declared run settings change.

Both sides build it from this one definition: the coordinator to submit it (``federation.deploy.fab``),
the site to print the hash it pins (``site-agent app hash``). Flower's own builder
(``flwr.cli.build.build_fab_from_files``) writes the zip with fixed timestamps and sorted entries, so the
same text builds to the same bytes.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from importlib.metadata import PackageNotFoundError, version

from .errors import ValidationToolError

DISTRIBUTION = "multisite-validation"
APP_NAME = "msv-validation-app"
PUBLISHER = "multisite-validation"

# Run settings the ServerApp reads (Flower refuses run-config overrides that the bundle does not declare).
RUN_CONFIG_DEFAULTS: tuple[tuple[str, str], ...] = (
    ("study-dir", '""'),
    ("round-id", '""'),
    ("round-kind", '"validate"'),
    ("min-sites", "1"),
    ("deadline-s", "600.0"),
    ("poll-s", "0.2"),
)


@dataclass(frozen=True)
class AppBundle:
    """The FAB bytes and their SHA-256 (what sites list in ``site.toml [app] allowed_fab_sha256``)."""

    content: bytes
    sha256: str
    package_version: str
    flwr_version: str


def _installed_version(name: str) -> str:
    try:
        return version(name)
    except PackageNotFoundError:
        raise ValidationToolError(f"package {name!r} is not installed; install it to build the app bundle") from None


def app_pyproject(package_version: str, flwr_version: str) -> str:
    """The bundle's only file."""
    config = "".join(f"{key} = {value}\n" for key, value in RUN_CONFIG_DEFAULTS)
    return (
        "[project]\n"
        f'name = "{APP_NAME}"\n'
        f'version = "{package_version}"\n'
        'description = "Validation rounds: runs the installed coordinator and site agent, carries no code"\n'
        'license = "Apache-2.0"\n'
        f'dependencies = ["{DISTRIBUTION}=={package_version}", "flwr=={flwr_version}"]\n'
        "\n"
        "[tool.flwr.app]\n"
        f'publisher = "{PUBLISHER}"\n'
        "\n"
        "[tool.flwr.app.components]\n"
        'serverapp = "federation.flower_server:app"\n'
        'clientapp = "site_agent.flower_client:app"\n'
        "\n"
        "[tool.flwr.app.config]\n" + config
    )


def build_app_bundle() -> AppBundle:
    """Build the FAB from the installed package versions (deterministic: same versions, same bytes)."""
    from flwr.cli.build import build_fab_from_files  # imported here: only deployment commands need Flower

    package_version = _installed_version(DISTRIBUTION)
    flwr_version = _installed_version("flwr")
    text = app_pyproject(package_version, flwr_version)
    content, _ = build_fab_from_files({"pyproject.toml": text.encode("utf-8")})
    return AppBundle(content, hashlib.sha256(content).hexdigest(), package_version, flwr_version)
