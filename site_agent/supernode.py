"""Joining the coordinator's federation: the site's node key, SuperNode and app runner, supervised.

``site-agent join`` runs three kinds of process, all on the site's machine:

- ``flower-supernode`` (``--isolation process``): dials the coordinator's SuperLink over TLS, proves it
  holds the site's node key, and pulls messages. It never runs app code itself.
- ``flower-superexec`` (the app runner): started by us, not by the SuperNode, with ``--parent-pid`` set
  to the SuperNode so it exits with its node; its ``PATH`` starts with ``SITEDIR/runtime/bin``, whose
  ``flwr-clientapp`` is the site's launcher (:mod:`site_agent.launcher`), which checks the app bundle's
  SHA-256 against the site's allowlist before Flower installs it. Each ClientApp it starts is given
  ``--parent-pid`` of the app runner, and the launcher watches its parent too: when the node goes, the
  runner goes, and a hung ClientApp goes with it.
- the supervisor (this process): restarts SuperNode and app runner when the SuperNode exits, e.g. with
  Flower's exit code 305 after a SuperLink restart, with a growing pause between attempts.

Flower reports its reason for exiting as ``Exit Code: NNN`` in its log (the process status is just 1),
so the supervisor reads the SuperNode's log to tell a configuration error (stop) from a lost
connection (restart).
"""

from __future__ import annotations

import os
import re
import shlex
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric import ec

from federation.protocol import ValidationToolError
from federation.protocol.cli_support import EXIT_OFFLINE, EXIT_REFUSED

from .config import load_site

NODE_KEY = "node.key"
NODE_PUBLIC_KEY = "node.pub"
RUNTIME_DIR = "runtime"

# Flower exit codes (flwr.supercore.exit.ExitCode) the supervisor acts on.
EXIT_NODE_KEY_INVALID = 302
EXIT_TLS_REQUIRED = 303
EXIT_CONNECTION = 305
DO_NOT_RESTART = {EXIT_NODE_KEY_INVALID: "the node key cannot be read", EXIT_TLS_REQUIRED: "TLS is required"}
_EXIT_CODE = re.compile(r"Exit Code: (\d+)")

QUIET_FLOWER = {"FLWR_TELEMETRY_ENABLED": "0", "FLWR_DISABLE_UPDATE_CHECK": "1"}


def write_node_key(site_dir: Path) -> tuple[Path, Path]:
    """Create ``node.key`` (OpenSSH private key, mode 0600) and ``node.pub`` (OpenSSH public key).

    The SuperNode proves it holds this key on every call; the coordinator registers ``node.pub`` with its
    SuperLink (``federation enrol --node-key``). Flower accepts NIST curves only; P-384 is used.
    """
    private_path, public_path = site_dir / NODE_KEY, site_dir / NODE_PUBLIC_KEY
    for path in (private_path, public_path):
        if path.exists():
            raise ValidationToolError(f"{path}: already exists; refusing to overwrite a key")
    key = ec.generate_private_key(ec.SECP384R1())
    data = key.private_bytes(
        serialization.Encoding.PEM, serialization.PrivateFormat.OpenSSH, serialization.NoEncryption()
    )
    fd = os.open(private_path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "wb") as handle:
        handle.write(data)
    public = key.public_key().public_bytes(serialization.Encoding.OpenSSH, serialization.PublicFormat.OpenSSH)
    public_path.write_bytes(public + b"\n")
    return private_path, public_path


def _die_with_parent() -> None:  # pragma: no cover - runs in the child between fork and exec
    """Linux: have the kernel send SIGTERM to this child when the supervisor dies, even by SIGKILL."""
    if sys.platform.startswith("linux"):
        import ctypes

        pr_set_pdeathsig = 1
        ctypes.CDLL("libc.so.6", use_errno=True).prctl(pr_set_pdeathsig, signal.SIGTERM)


def free_port(host: str = "127.0.0.1") -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind((host, 0))
        return int(sock.getsockname()[1])


def flower_exit_code(log_text: str) -> int | None:
    """The last ``Exit Code: NNN`` Flower wrote, if any."""
    found = _EXIT_CODE.findall(log_text)
    return int(found[-1]) if found else None


@dataclass
class JoinSettings:
    """What ``site-agent join`` needs to run one site's node."""

    site_dir: Path
    superlink: str
    root_certificates: Path | None = None
    runtime_port: int | None = None
    max_restarts: int | None = None  # None: keep restarting while the supervisor runs
    first_pause_s: float = 1.0
    longest_pause_s: float = 30.0
    task_poll_s: float | None = None  # FLWR_SUPEREXEC_TASK_POLL_INTERVAL for the app runner (Flower: 1 s)
    bin_dir: Path = field(default_factory=lambda: Path(sys.executable).parent)


class SiteNode:
    """Supervise one site's SuperNode and app runner; restart both when the SuperNode exits."""

    def __init__(self, settings: JoinSettings, say: Callable[[str], None] = print) -> None:
        self.settings = settings
        self.site_dir = Path(settings.site_dir).resolve()
        self.site = load_site(self.site_dir)  # fail early, with the agent's own message, on a bad folder
        self.say = say
        self.runtime = self.site_dir / RUNTIME_DIR
        self.node_key = self.site_dir / NODE_KEY
        if not self.node_key.is_file():
            raise ValidationToolError(f"{self.node_key}: not found (site folders made by `site-agent init` have one)")
        root = settings.root_certificates
        if root is not None and not Path(root).is_file():
            raise ValidationToolError(f"{root}: root certificate not found (the coordinator's ca.crt)")
        self.supernode: subprocess.Popen[bytes] | None = None
        self.app_runner: subprocess.Popen[bytes] | None = None
        self.starts = 0
        self.last_exit_code: int | None = None
        self._stopping = threading.Event()

    # --- files the processes use --------------------------------------------------------------------
    def _prepare_runtime(self) -> None:
        (self.runtime / "bin").mkdir(parents=True, exist_ok=True)
        (self.runtime / "flwr-home").mkdir(exist_ok=True)
        launcher = self.settings.bin_dir / "site-agent-clientapp"
        command = (
            shlex.quote(str(launcher)) if launcher.exists() else f"{shlex.quote(sys.executable)} -m site_agent.launcher"
        )
        script = self.runtime / "bin" / "flwr-clientapp"
        script.write_text(
            "#!/bin/sh\n"
            "# Written by `site-agent join`: the app runner starts this for every message; it runs an app\n"
            "# bundle only if its SHA-256 is listed in site.toml [app] allowed_fab_sha256.\n"
            f'exec {command} --site-dir {shlex.quote(str(self.site_dir))} "$@"\n'
        )
        script.chmod(0o755)

    def _environment(self) -> dict[str, str]:
        env = dict(os.environ)
        env.update(QUIET_FLOWER)
        env["FLWR_HOME"] = str(self.runtime / "flwr-home")
        env["PATH"] = os.pathsep.join([str(self.runtime / "bin"), str(self.settings.bin_dir), env.get("PATH", "")])
        if self.settings.task_poll_s is not None:
            env["FLWR_SUPEREXEC_TASK_POLL_INTERVAL"] = str(self.settings.task_poll_s)
        return env

    def supernode_command(self, runtime_port: int) -> list[str]:
        command = [
            str(self.settings.bin_dir / "flower-supernode"),
            "--superlink",
            self.settings.superlink,
            "--auth-supernode-private-key",
            str(self.node_key),
            "--isolation",
            "process",
            "--host",
            "127.0.0.1",
            "--port",
            str(runtime_port),
            "--node-config",
            f'site-dir="{self.site_dir}"',
        ]
        if self.settings.root_certificates is not None:
            command += ["--root-certificates", str(Path(self.settings.root_certificates).resolve())]
        return command

    def app_runner_command(self, runtime_port: int, supernode_pid: int) -> list[str]:
        return [
            str(self.settings.bin_dir / "flower-superexec"),
            "--insecure",  # loopback only: the Runtime API listens on 127.0.0.1 inside the site
            "--runtime-api-address",
            f"127.0.0.1:{runtime_port}",
            "--parent-pid",
            str(supernode_pid),
        ]

    # --- one start ----------------------------------------------------------------------------------
    def start(self) -> None:
        """Start the SuperNode and, once its Runtime API listens, the app runner."""
        self._prepare_runtime()
        port = self.settings.runtime_port or free_port()
        env = self._environment()
        log = open(self.runtime / "supernode.log", "ab")  # noqa: SIM115 - handed to the child
        self._log_offset = log.tell()
        self.supernode = subprocess.Popen(
            self.supernode_command(port),
            stdout=log,
            stderr=subprocess.STDOUT,
            env=env,
            cwd=self.runtime,
            preexec_fn=_die_with_parent,
        )
        log.close()
        self._wait_listening(port, self.supernode)
        runner_log = open(self.runtime / "app-runner.log", "ab")  # noqa: SIM115 - handed to the child
        self.app_runner = subprocess.Popen(
            self.app_runner_command(port, self.supernode.pid),
            stdout=runner_log,
            stderr=subprocess.STDOUT,
            env=env,
            cwd=self.runtime,
            preexec_fn=_die_with_parent,
        )
        runner_log.close()
        self.starts += 1

    def _wait_listening(self, port: int, process: subprocess.Popen[bytes], timeout_s: float = 30.0) -> None:
        end = time.monotonic() + timeout_s
        while time.monotonic() < end and process.poll() is None:
            try:
                with socket.create_connection(("127.0.0.1", port), timeout=0.5):
                    return
            except OSError:
                time.sleep(0.1)

    def _stop_processes(self, grace_s: float = 5.0) -> None:
        for process in (self.app_runner, self.supernode):
            if process is not None and process.poll() is None:
                process.send_signal(signal.SIGTERM)
        for process in (self.app_runner, self.supernode):
            if process is None:
                continue
            try:
                process.wait(timeout=grace_s)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(timeout=grace_s)

    def _exit_reason(self) -> int | None:
        try:
            with open(self.runtime / "supernode.log", "rb") as handle:
                handle.seek(self._log_offset)
                return flower_exit_code(handle.read().decode("utf-8", errors="replace"))
        except OSError:
            return None

    # --- supervision ----------------------------------------------------------------------------------
    def stop(self) -> None:
        self._stopping.set()

    def run(self) -> int:
        """Keep the node up until :meth:`stop` (or a signal); return the process exit status for the CLI."""
        pause = self.settings.first_pause_s
        restarts = 0
        try:
            while not self._stopping.is_set():
                started_at = time.monotonic()
                self.start()
                assert self.supernode is not None
                self.say(
                    f"site {self.site.site_id}: SuperNode started (pid {self.supernode.pid}), "
                    f"app runner pid {self.app_runner.pid if self.app_runner else '-'}"
                )
                while self.supernode.poll() is None and not self._stopping.is_set():
                    self._stopping.wait(0.2)
                if self._stopping.is_set():
                    break
                self._stop_processes()
                code = self._exit_reason()
                self.last_exit_code = code
                if code in DO_NOT_RESTART:
                    self.say(
                        f"site {self.site.site_id}: SuperNode stopped (Flower exit code {code}: "
                        f"{DO_NOT_RESTART[code]}); not restarting"
                    )
                    return EXIT_REFUSED
                if code == EXIT_CONNECTION:
                    why = (
                        "the SuperLink refused or lost this node (exit code 305: after a SuperLink restart, "
                        "or the node key is not registered: ask the coordinator to run "
                        "`federation enrol --node-key`)"
                    )
                else:
                    why = f"the SuperNode exited (Flower exit code {code})" if code else "the SuperNode exited"
                if self.settings.max_restarts is not None and restarts >= self.settings.max_restarts:
                    self.say(f"site {self.site.site_id}: {why}; no restarts left")
                    return EXIT_OFFLINE  # 4: the node could not stay online (3 means a release is held)
                if time.monotonic() - started_at > 60:
                    pause = self.settings.first_pause_s  # it ran fine for a while: start the back-off afresh
                self.say(f"site {self.site.site_id}: {why}; restarting in {pause:.0f} s")
                restarts += 1
                if self._stopping.wait(pause):
                    break
                pause = min(pause * 2, self.settings.longest_pause_s)
        finally:
            self._stop_processes()
        return 0


def run_join(settings: JoinSettings, say: Callable[[str], None] = print) -> int:
    """``site-agent join`` in the foreground: SIGTERM or Ctrl-C stops the node and its app runner."""
    node = SiteNode(settings, say)

    def _stop(signum: int, frame: object) -> None:
        node.stop()

    previous = {sig: signal.signal(sig, _stop) for sig in (signal.SIGTERM, signal.SIGINT)}
    try:
        return node.run()
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
