"""The site's own ``flwr-clientapp``: runs an app bundle only if the site listed its SHA-256.

Flower's SuperNode runs whatever app bundle (FAB) the coordinator submitted: for every message its app
runner starts ``flwr-clientapp`` (found on ``PATH``), which installs and imports the bundle. Flower 1.42 has
no hash allowlist (its ``--trusted-entities`` accepts only bundles signed through Flower's online hub), so
``site-agent join`` puts this launcher first on the app runner's ``PATH`` under that name. It:

1. reads the allowlist from ``site.toml [app] allowed_fab_sha256`` afresh for every message;
2. hands over to Flower's own entry point with the bundle installer wrapped, so the SHA-256 of the exact
   bytes about to be installed is checked before anything in them is unpacked or imported;
3. refuses an unlisted bundle: the refusal is written to the site ledger and travels back to the
   coordinator as the ClientApp's error (its text names the hash and the rule, nothing else);
4. exits when the process that started it (the app runner) goes away, so a hung ClientApp does not
   outlive its node.

The wrapped installer (``flwr.supernode.runtime.run_clientapp.install_from_fab``) is Flower-internal;
``flwr==1.42.0`` is pinned for that reason and a test runs the real launcher against a real SuperNode.

``build_app_bundle`` (from :mod:`federation.protocol.app_bundle`, the one definition both sides use) builds
the bundle the coordinator submits from this installation, so site IT can pin the hash of the code they
reviewed: ``site-agent app hash``.
"""

from __future__ import annotations

import argparse
import hashlib
import importlib
import os
import socket
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

from federation.protocol import PolicyViolation

from . import ledger
from .config import load_site

# Set in this process once the launcher has verified the bundle: the ClientApp's readiness check reports it.
CHECKED_BUNDLE_ENV = "SITE_AGENT_APP_BUNDLE_SHA256"


class AppBundleRefused(PolicyViolation):
    """The coordinator's app bundle is not one this site listed in ``[app] allowed_fab_sha256``."""


def check_app_bundle(site_dir: Path, content: bytes) -> str:
    """Return the bundle's SHA-256 if the site allows it; otherwise record the refusal and raise."""
    digest = hashlib.sha256(content).hexdigest()
    site = load_site(site_dir)
    if digest in site.allowed_fab_sha256:
        return digest
    reason = (
        f"site {site.site_id}: app bundle sha256 {digest} is not in this site's allowlist "
        "(site.toml [app] allowed_fab_sha256)"
    )
    ledger.append(
        site.ledger_path,
        site.private_key(),
        "refusal",
        {"reason": reason, "error": AppBundleRefused.__name__, "app_bundle_sha256": digest},
    )
    raise AppBundleRefused(reason)


def _parent_pid(flower_args: Sequence[str]) -> int:
    """The app runner's pid as it passed it (``--parent-pid``), else our parent now."""
    for index, value in enumerate(flower_args):
        if value == "--parent-pid" and index + 1 < len(flower_args) and flower_args[index + 1].isdigit():
            return int(flower_args[index + 1])
        if value.startswith("--parent-pid=") and value.split("=", 1)[1].isdigit():
            return int(value.split("=", 1)[1])
    return os.getppid()


def _end_after(wait: Callable[[], None], name: str, grace_s: float = 3.0) -> None:
    """In a thread: once ``wait()`` returns, stop this ClientApp. First as Flower does (SIGINT, so the ClientApp
    can stop cleanly); if the process is still there after ``grace_s`` (seen: a ClientApp whose runner died
    mid-task then waits forever at exit), it is ended outright. Ledger entries are single appended lines,
    fsynced before anything they record is sent, so ending here leaves the ledger consistent."""
    import signal
    import threading
    import time

    def watch() -> None:
        wait()
        signal.raise_signal(signal.SIGINT)
        time.sleep(grace_s)
        os._exit(70)  # nobody is left to take this ClientApp's answer

    threading.Thread(target=watch, daemon=True, name=name).start()


def _watch_parent(parent: int) -> None:
    """Exit when the app runner that started this process is gone (it is re-parented on Linux).

    ``parent`` is the pid the app runner passed (``--parent-pid``): a runner that died while this process was
    still starting is noticed at once.
    """
    import time

    def runner_gone() -> None:
        while os.getppid() == parent:
            time.sleep(0.2)

    _end_after(runner_gone, "parent-watch")


def watch_connection(conn: socket.socket) -> None:
    """In a warm copy (:mod:`site_agent.warmstart`): exit when the client the app runner started is gone.

    The client holds the other end of ``conn``; when it ends, by any signal, the connection reads as closed.
    """

    def client_gone() -> None:
        try:
            while conn.recv(1):
                pass
        except OSError:
            pass

    _end_after(client_gone, "client-watch")


def run_checked(argv: Sequence[str], watch_parent: bool = False) -> None:
    """Run Flower's ClientApp entry point with the app bundle's SHA-256 checked before it is installed."""
    parser = argparse.ArgumentParser(
        prog="site-agent-clientapp",
        description="Run one Flower ClientApp task if the app bundle's SHA-256 is in the site's allowlist. "
        "Started by the site's app runner in place of flwr-clientapp (see `site-agent join`).",
    )
    parser.add_argument(
        "--site-dir", "--site", dest="site_dir", type=Path, required=True, help="site folder (its allowlist)"
    )
    args, flower_args = parser.parse_known_args(argv)
    site_dir = args.site_dir.resolve()
    if watch_parent:
        # Watch the app runner before importing Flower (seconds on a busy host): a runner that died while this
        # process started is noticed at once, and this process does not outlive its node.
        _watch_parent(_parent_pid(flower_args))

    # Import the modules, not the same-named functions the package re-exports.
    entry = importlib.import_module("flwr.supernode.cli.flwr_clientapp")
    runtime = importlib.import_module("flwr.supernode.runtime.run_clientapp")

    flower_install = runtime.install_from_fab

    def install_checked(fab_file: Path | bytes, *more: object, **options: object) -> Path:
        content = fab_file.read_bytes() if isinstance(fab_file, Path) else fab_file
        os.environ[CHECKED_BUNDLE_ENV] = check_app_bundle(site_dir, content)
        return flower_install(content, *more, **options)

    runtime.install_from_fab = install_checked
    sys.argv = ["flwr-clientapp", *flower_args]
    entry.flwr_clientapp()


def main(argv: Sequence[str] | None = None) -> None:
    """Entry point ``site-agent-clientapp --site-dir SITEDIR [flwr-clientapp arguments ...]`` (a cold start)."""
    run_checked(sys.argv[1:] if argv is None else argv, watch_parent=True)


if __name__ == "__main__":
    main()
