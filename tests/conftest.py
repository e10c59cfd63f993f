"""Shared fixtures."""

from __future__ import annotations

import os

os.environ.setdefault("FLWR_TELEMETRY_ENABLED", "0")
os.environ.setdefault("FLWR_DISABLE_UPDATE_CHECK", "1")
