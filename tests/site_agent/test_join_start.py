"""What `site-agent join` says before it connects (site_agent.supernode), on a real site folder."""

from __future__ import annotations

from pathlib import Path

from federation.cli import main as federation
from site_agent.cli import main as site_agent
from site_agent.supernode import JoinSettings, SiteNode


def test_an_empty_app_allowlist_is_named_at_start(tmp_path: Path) -> None:
    """Found by following the site-IT guide: with `[app] allowed_fab_sha256` empty (as `init` writes it), `join`
    connected and retried in silence, and the site learnt only from the first refused round."""
    assert federation(["keys", "new", "--out-dir", str(tmp_path / "c")]) == 0
    site = tmp_path / "site"
    init = ["init", "--site-id", "a", "--trust", str(tmp_path / "c" / "coordinator.pub"), "--site-dir", str(site)]
    assert site_agent(init) == 0
    said: list[str] = []
    node = SiteNode(JoinSettings(site, "127.0.0.1:9"), said.append)
    node.stop()  # stopped before it starts: run() says what it checks up front, and starts no process
    node.run()
    assert any("allowed_fab_sha256 is empty, so every round will be refused" in line for line in said), said
    assert node.supernode is None
    # with a hash listed, nothing is said
    config = site / "site.toml"
    config.write_text(config.read_text().replace("allowed_fab_sha256 = []", f'allowed_fab_sha256 = ["{"ab" * 32}"]'))
    said.clear()
    node = SiteNode(JoinSettings(site, "127.0.0.1:9"), said.append)
    node.stop()
    node.run()
    assert not any("allowed_fab_sha256" in line for line in said), said
