"""The process ``federation serve`` becomes: Flower's own SuperLink, with two things added in the same process.

``python -m federation.deploy.link_process --study STUDY -- FLOWER-SUPERLINK-ARGUMENTS``

1. **Registration at start.** Once the SuperLink listens, every node key bound in the study store
   (``federation enrol --node-key``) that the SuperLink does not know is registered, so sites enrolled while
   the SuperLink was down connect without waiting for the first ``federation run``. One line per key.
2. **Node keys by fingerprint in the log.** Flower logs the full public key of every node it refuses, on
   every attempt; here the key is replaced by the fingerprint ``federation enrol`` printed when it bound the
   key (SHA-256 of its DER form, first 16 hex digits), which is what a person matches against the store.

Everything else is ``flower-superlink`` unchanged (:func:`flwr.superlink.cli.flower_superlink`).
"""

from __future__ import annotations

import argparse
import logging
import re
import socket
import sys
import threading
import time
from collections.abc import Sequence
from pathlib import Path

_PEM_REPR = re.compile(r"b'(-----BEGIN PUBLIC KEY-----(?:\\n|[^'])*?-----END PUBLIC KEY-----)(?:\\n)?'")
REGISTER_WAIT_S = 120.0


def shorten_keys(text: str) -> str:
    """Replace every PEM public key Flower printed (as a bytes repr) with its fingerprint."""
    from .nodes import fingerprint_of_reported

    def _short(match: re.Match[str]) -> str:
        pem = match.group(1).replace("\\n", "\n").encode("ascii", errors="replace")
        fingerprint = fingerprint_of_reported(pem)
        return f"node key sha256 {fingerprint[:16]}" if fingerprint else "a node key"

    return _PEM_REPR.sub(_short, text)


class _KeyFingerprints(logging.Filter):
    def filter(self, record: logging.LogRecord) -> bool:
        try:
            message = record.getMessage()
        except Exception:  # a record Flower formats badly is passed on untouched
            return True
        if "BEGIN PUBLIC KEY" in message:
            record.msg, record.args = shorten_keys(message), ()
        return True


def install_log_filter() -> None:
    from flwr.supercore.logger import FLOWER_LOGGER

    FLOWER_LOGGER.addFilter(_KeyFingerprints())


def _listening(address: str) -> bool:
    host, _, port = address.rpartition(":")
    try:
        with socket.create_connection((host.strip("[]"), int(port)), timeout=1.0):
            return True
    except OSError:
        return False


def register_bound_keys(study: Path, say=print) -> int:  # noqa: ANN001 - say(str) -> None
    """Register every bound node key the SuperLink does not know; return how many were registered."""
    from federation.store import Store

    from .superlink import LinkSettings, SuperLinkError, register_node, registered_nodes

    link = LinkSettings.for_study(study)
    store = Store(study / "study.db")
    try:
        bound = store.node_keys()
    finally:
        store.close()
    if not bound:
        return 0
    try:
        known = registered_nodes(link)
    except SuperLinkError as exc:
        say(f"node keys not registered at start ({exc}); `federation run` registers them")
        return 0
    done = 0
    for site, (fingerprint, pem) in sorted(bound.items()):
        if fingerprint in known:
            continue
        try:
            node_id = register_node(link, pem, site)
        except SuperLinkError as exc:
            say(f"node key of site {site} not registered at start ({exc})")
            continue
        say(f"registered the node key of site {site} (sha256 {fingerprint[:16]}) as node {node_id}")
        done += 1
    if not done:
        say(f"all {len(bound)} enrolled node keys were already registered")
    return done


def _register_when_listening(study: Path) -> None:
    from .superlink import LinkSettings

    def say(line: str) -> None:
        print(f"federation serve: {line}", flush=True)

    try:
        address = LinkSettings.for_study(study).address
        end = time.monotonic() + REGISTER_WAIT_S
        while not _listening(address):
            if time.monotonic() > end:
                say(f"the SuperLink did not listen on {address} within {REGISTER_WAIT_S:g} s; keys not registered")
                return
            time.sleep(0.2)
        register_bound_keys(study, say)
    except Exception as exc:  # never take the SuperLink down over this; `federation run` registers too
        say(f"node keys not registered at start ({type(exc).__name__}: {exc})")


def main(argv: Sequence[str] | None = None) -> None:
    parser = argparse.ArgumentParser(prog="federation-superlink", description=__doc__.splitlines()[0])
    parser.add_argument("--study", type=Path, required=True)
    parser.add_argument("flower", nargs=argparse.REMAINDER, help="-- then flower-superlink's arguments")
    args = parser.parse_args(argv)
    flower_args = args.flower[1:] if args.flower[:1] == ["--"] else args.flower
    install_log_filter()
    threading.Thread(target=_register_when_listening, args=(args.study,), daemon=True, name="register").start()
    from flwr.superlink.cli import flower_superlink

    sys.argv = ["flower-superlink", *flower_args]
    sys.exit(flower_superlink())


if __name__ == "__main__":
    main()
