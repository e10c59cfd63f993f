"""Reading a rendered report: a small tree from the standard library's HTML parser, and headless Chromium."""

from __future__ import annotations

import shutil
import subprocess
import tempfile
from dataclasses import dataclass, field
from html.parser import HTMLParser
from pathlib import Path

ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}


@dataclass
class Node:
    tag: str
    attrs: dict[str, str]
    children: list[Node | str] = field(default_factory=list)

    def text(self) -> str:
        return "".join(c if isinstance(c, str) else c.text() for c in self.children)

    def iter(self, tag: str | None = None):
        if tag is None or self.tag == tag:
            yield self
        for child in self.children:
            if isinstance(child, Node):
                yield from child.iter(tag)

    def find_id(self, element_id: str) -> Node | None:
        return next((n for n in self.iter() if n.attrs.get("id") == element_id), None)

    def classes(self) -> set[str]:
        return set(self.attrs.get("class", "").split())


class _TreeBuilder(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.root = Node("#document", {})
        self.stack = [self.root]

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        node = Node(tag, {k: v or "" for k, v in attrs})
        self.stack[-1].children.append(node)
        if tag not in VOID:
            self.stack.append(node)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.stack[-1].children.append(Node(tag, {k: v or "" for k, v in attrs}))

    def handle_endtag(self, tag: str) -> None:
        for depth in range(len(self.stack) - 1, 0, -1):
            if self.stack[depth].tag == tag:
                del self.stack[depth:]
                return

    def handle_data(self, data: str) -> None:
        self.stack[-1].children.append(data)


def parse(html: str) -> Node:
    builder = _TreeBuilder()
    builder.feed(html)
    builder.close()
    return builder.root


def chromium() -> str:
    """The browser binary; `make test` installs Debian's chromium when it is missing (Makefile `browser`)."""
    found = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)
    assert found, "chromium is not installed: run `make browser` (apt-get install chromium) before these tests"
    return found


def browser_flags(profile: Path) -> list[str]:
    # No network: every host name resolves to nothing and any proxy is a closed local port, so a fetch the
    # page tried would fail (and the page's own Content-Security-Policy forbids one anyway).
    return [
        chromium(),
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--hide-scrollbars",
        "--host-resolver-rules=MAP * ~NOTFOUND",
        "--proxy-server=127.0.0.1:9",
        f"--user-data-dir={profile}",
    ]


def render(html_file: Path, screenshot: Path | None = None, height: int = 4000) -> str:
    """Open ``html_file`` in headless Chromium; return the rendered DOM, and save a PNG if asked."""
    url = html_file.resolve().as_uri()
    with tempfile.TemporaryDirectory(prefix="report-chromium-") as profile:
        result = subprocess.run(
            [*browser_flags(Path(profile)), "--dump-dom", url], capture_output=True, text=True, timeout=120
        )
        assert result.returncode == 0, f"chromium --dump-dom failed: {result.stderr[-2000:]}"
        dom = result.stdout
    if screenshot is not None:
        screenshot.parent.mkdir(parents=True, exist_ok=True)
        screenshot.unlink(missing_ok=True)
        with tempfile.TemporaryDirectory(prefix="report-chromium-") as profile:
            result = subprocess.run(
                [*browser_flags(Path(profile)), f"--window-size=1200,{height}", f"--screenshot={screenshot}", url],
                capture_output=True,
                text=True,
                timeout=120,
            )
        assert result.returncode == 0 and screenshot.exists(), f"chromium --screenshot failed: {result.stderr[-2000:]}"
    return dom
