"""Fixtures for the adversarial tests: the invented demo consortium (simulations/), a coordinator that signs
whatever it likes with the key the sites pinned, and sites with chosen policies.

The demo data are invented (no real records); here they only serve as records that must not leak.
"""

from __future__ import annotations

import re
import shutil
import uuid
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest

from federation.protocol import AnalysisSpec, Request, load_private_key, sha256_hex
from simulations.demo import DemoStudy, prepare_study, set_site_data
from site_agent.config import Site, init_site, load_site

SITE = 2  # tarrowby-primary: 1,200 invented records


@dataclass(frozen=True)
class Coordinator:
    demo: DemoStudy
    key: Any  # Ed25519PrivateKey the sites pinned
    pub: Path

    @property
    def bundle_sha256(self) -> str:
        return sha256_hex(self.demo.bundle_bytes)

    def request(
        self, *analyses: AnalysisSpec, study: str = "probe", request_id: str | None = None, bundle_sha256: str = ""
    ) -> bytes:
        """A request signed with the pinned key: everything a curious coordinator can send."""
        return Request(
            study_id=study,
            request_id=request_id or uuid.uuid4().hex[:12],
            bundle_sha256=bundle_sha256 or self.bundle_sha256,
            analyses=tuple(analyses) or (AnalysisSpec("confusion"),),
            issued_at=datetime.now(UTC).replace(microsecond=0).isoformat(),
        ).signed_bytes(self.key)


@pytest.fixture(scope="session")
def coordinator(tmp_path_factory: pytest.TempPathFactory) -> Coordinator:
    demo = prepare_study(tmp_path_factory.mktemp("adversarial") / "demo")
    return Coordinator(
        demo,
        load_private_key(demo.root / "coordinator" / "coordinator.key"),
        demo.root / "coordinator" / "coordinator.pub",
    )


def make_site(coordinator: Coordinator, root: Path, site: int = SITE, **policy: object) -> Site:
    """A fresh site folder on one demo site's records, pinning the coordinator key, with these policy settings.

    Model approval is off unless asked for: the attacks here assume the worst, a site that runs whatever
    model the coordinator signs (test_model_approval.py shows the approval itself)."""
    policy = {"require_model_approval": False, **policy}
    files = coordinator.demo.consortium.sites[site]
    folder = init_site(root / f"site-{uuid.uuid4().hex[:8]}", files.site_id, [coordinator.pub])
    set_site_data(folder, files.data_path, files.mapping_path)
    text = (folder / "site.toml").read_text()
    for setting, value in policy.items():
        if setting == "min_band_width":
            text = text.replace(
                "[policy.min_band_width]\n",
                "[policy.min_band_width]\n" + "".join(f"{name} = {width}\n" for name, width in value.items()),
            )  # type: ignore[union-attr]
            continue
        rendered = "[" + ", ".join(f'"{v}"' for v in value) + "]" if isinstance(value, list) else str(value).lower()
        text, count = re.subn(rf"(?m)^#? ?{setting} = .*$", f"{setting} = {rendered}", text)
        assert count == 1, setting
    (folder / "site.toml").write_text(text)
    return load_site(folder)


def store_copy(coordinator: Coordinator, root: Path) -> Path:
    """A private copy of the demo study store (sites enrolled, one request issued)."""
    root.mkdir(parents=True, exist_ok=True)
    return Path(shutil.copy(coordinator.demo.store_path, root / "study.db"))


def count_leaves(node: Any, key: str = "") -> list[tuple[str, int | None]]:
    """Every count a release shows: integer leaves of flow and results, and nulls (suppressed counts).

    Band and bin indices (``merged_bands``, ``merged_bins``) are positions, not counts.
    """
    if isinstance(node, dict):
        return [
            leaf
            for k, v in node.items()
            if k not in ("merged_bands", "merged_bins", "suppressed", "edges")
            for leaf in count_leaves(v, f"{key}.{k}")
        ]
    if isinstance(node, list):
        return [leaf for i, v in enumerate(node) for leaf in count_leaves(v, f"{key}[{i}]")]
    if node is None:
        return [(key, None)]
    if isinstance(node, bool):
        return []
    if isinstance(node, int):
        return [(key, node)]
    return []
