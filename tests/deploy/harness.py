"""Real processes on loopback for the deployment tests: start them, find them, stop them by PID.

Every Flower process a test starts (SuperLink, its ServerApp runner and ServerApp, SuperNodes, app runners,
ClientApps) inherits ``FLWR_HOME`` under the test's own folder, so :func:`processes_under` finds them all,
including the ones Flower starts itself, and teardown can prove none is left.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

BIN = Path(sys.executable).parent
QUIET = {"FLWR_TELEMETRY_ENABLED": "0", "FLWR_DISABLE_UPDATE_CHECK": "1"}


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def port_is_free(port: int) -> bool:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            sock.bind(("127.0.0.1", port))
        except OSError:
            return False
    return True


def wait_until(condition: Callable[[], object], timeout_s: float, what: str, step_s: float = 0.1) -> object:
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        value = condition()
        if value:
            return value
        time.sleep(step_s)
    raise AssertionError(f"timed out after {timeout_s:g} s waiting for {what}")


def port_listening(port: int) -> bool:
    try:
        with socket.create_connection(("127.0.0.1", port), timeout=0.5):
            return True
    except OSError:
        return False


def _read(path: str) -> bytes:
    try:
        with open(path, "rb") as handle:
            return handle.read()
    except OSError:
        return b""


def cmdline(pid: int) -> str:
    return _read(f"/proc/{pid}/cmdline").replace(b"\0", b" ").decode("utf-8", errors="replace").strip()


def _alive(pid: int) -> bool:
    stat = _read(f"/proc/{pid}/stat").decode(errors="replace")
    if not stat:
        return False
    state = stat.rsplit(")", 1)[-1].split()[0]
    return state not in ("Z", "X")  # a zombie has exited; only its parent's wait() is missing


def processes_under(root: Path) -> list[int]:
    """Live processes whose environment names a path under ``root`` (our Flower processes all do)."""
    marker = str(root).encode()
    found = []
    for entry in os.listdir("/proc"):
        if entry.isdigit() and int(entry) != os.getpid() and marker in _read(f"/proc/{entry}/environ"):
            if _alive(int(entry)):
                found.append(int(entry))
    return found


def children(pid: int) -> list[int]:
    found = []
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            stat = _read(f"/proc/{entry}/stat").decode(errors="replace")
            if stat and stat.rsplit(")", 1)[-1].split()[1] == str(pid) and _alive(int(entry)):
                found.append(int(entry))
    return found


def gone(pid: int) -> bool:
    return not _alive(pid)


class Fleet:
    """Processes a test started, by name; each in its own session so a crash can be simulated per site."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.procs: dict[str, subprocess.Popen[bytes]] = {}
        self.logs = root / "logs"
        self.logs.mkdir(parents=True, exist_ok=True)
        self.env = {**os.environ, **QUIET, "FLWR_HOME": str(root / "flwr-home-tests")}

    def start(self, name: str, argv: list[str]) -> subprocess.Popen[bytes]:
        log = open(self.logs / f"{name}.log", "ab")  # noqa: SIM115 - handed to the child
        process = subprocess.Popen(argv, stdout=log, stderr=subprocess.STDOUT, env=self.env, start_new_session=True)
        log.close()
        self.procs[name] = process
        return process

    def log(self, name: str) -> str:
        return (self.logs / f"{name}.log").read_text(errors="replace")

    def stop(self, name: str, sig: int = signal.SIGTERM, timeout_s: float = 20.0) -> int | None:
        process = self.procs.pop(name, None)
        if process is None:
            return None
        if process.poll() is None:
            process.send_signal(sig)
            try:
                process.wait(timeout=timeout_s)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(timeout=timeout_s)
        return process.returncode

    def stop_all(self, timeout_s: float = 20.0) -> None:
        """SIGTERM every process at once (sites before the SuperLink), then wait for each by PID."""
        names = sorted(self.procs, key=lambda n: n == "superlink")
        for name in names:
            if self.procs[name].poll() is None:
                self.procs[name].send_signal(signal.SIGTERM)
        for name in names:
            self.stop(name, timeout_s=timeout_s)

    def run(self, argv: list[str], timeout_s: float) -> subprocess.CompletedProcess[str]:
        return subprocess.run(argv, capture_output=True, text=True, env=self.env, timeout=timeout_s, check=False)
