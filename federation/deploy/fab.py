"""The app bundle the coordinator submits; defined once in :mod:`federation.protocol.app_bundle`."""

from federation.protocol.app_bundle import (
    APP_NAME,
    DISTRIBUTION,
    PUBLISHER,
    RUN_CONFIG_DEFAULTS,
    AppBundle,
    app_pyproject,
    build_app_bundle,
)

__all__ = [
    "APP_NAME",
    "DISTRIBUTION",
    "PUBLISHER",
    "RUN_CONFIG_DEFAULTS",
    "AppBundle",
    "app_pyproject",
    "build_app_bundle",
]
