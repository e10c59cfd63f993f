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
and the cause only in the lines after it, so the supervisor reads the SuperNode's log as it is written:
it says each connection retry as it happens, says when the node is connected, and, when the SuperNode
exits, says the cause in one line (:func:`diagnose`): a certificate problem stops ``join`` (retrying cannot
fix it); a node key the SuperLink does not accept (not registered yet, or still held by the node's earlier
connection after a SuperLink restart) restarts it with a growing pause.
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
from .warmstart import SOCKET_NAME

NODE_KEY = "node.key"
NODE_PUBLIC_KEY = "node.pub"
RUNTIME_DIR = "runtime"
RUNTIME_SECRET = "runtime.secret"  # the shared secret the app runner signs its Runtime API calls with

# Flower exit codes (flwr.supercore.exit.ExitCode) the supervisor acts on.
EXIT_NODE_KEY_INVALID = 302
EXIT_TLS_REQUIRED = 303
EXIT_CONNECTION = 305
DO_NOT_RESTART = {EXIT_NODE_KEY_INVALID: "the node key cannot be read", EXIT_TLS_REQUIRED: "TLS is required"}
_EXIT_CODE = re.compile(r"Exit Code: (\d+)")
_RETRY = re.compile(r"Connection attempt failed, retrying in ([\d.]+) seconds")
_CONNECTED = re.compile(r"SuperNode ID: (\d+)")
_ACTIVATION_FAILED = "[code: 2004]"  # Flower's FLEET_NODE_ACTIVATION_FAILED, as the SuperNode logs it

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


def _node_key_fingerprint(path: Path) -> str:
    """SHA-256 of the node key's DER form: the fingerprint `federation enrol` prints (never the key itself)."""
    import hashlib

    try:
        key = serialization.load_ssh_public_key(path.read_bytes().strip())
    except (OSError, ValueError):
        return ""
    der = key.public_bytes(serialization.Encoding.DER, serialization.PublicFormat.SubjectPublicKeyInfo)
    return hashlib.sha256(der).hexdigest()


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


@dataclass(frozen=True)
class ExitCause:
    """Why the SuperNode exited, for one line at the terminal; ``stop``: restarting cannot help."""

    code: int | None
    cause: str
    stop: bool


def diagnose(
    log_text: str, superlink: str, root_certificates: Path | None, connected_before: bool, node_key_sha256: str = ""
) -> ExitCause:
    """Read the cause of a SuperNode exit from the log it wrote since it started.

    Flower 1.42 exits with code 305 for every connection failure and writes the cause after the code: a TLS
    verification error (``CERTIFICATE_VERIFY_FAILED``), or the SuperLink refusing to activate the node
    (``[code: 2004]``, both for a key it does not know and for a node whose earlier connection it still
    holds, e.g. just after a SuperLink restart).
    """
    code = flower_exit_code(log_text)
    tail = log_text.split("Exit Code:", 1)[-1] if code is not None else log_text
    key = f" (node key sha256 {node_key_sha256[:16]})" if node_key_sha256 else ""
    if code in DO_NOT_RESTART:
        return ExitCause(code, f"{DO_NOT_RESTART[code]} (Flower exit code {code})", True)
    if "CERTIFICATE_VERIFY_FAILED" in tail:
        if "mismatch" in tail.lower():
            return ExitCause(
                code,
                f"TLS: the SuperLink's certificate does not name {superlink.rsplit(':', 1)[0]}; dial a name it lists, "
                "or ask the coordinator to re-issue it with `federation certs new --name`",
                True,
            )
        if root_certificates is None:
            return ExitCause(
                code,
                "TLS: no root certificate was given and the system's trust store does not know the SuperLink's "
                "CA; pass --root-certificates with the coordinator's ca.crt",
                True,
            )
        return ExitCause(
            code,
            f"TLS: the SuperLink's certificate is not signed by the CA in {root_certificates} (a certificate from "
            "another CA); ask the coordinator for the ca.crt of this study",
            True,
        )
    if "SSL" in tail and "handshake" in log_text.lower():
        return ExitCause(code, "TLS: the handshake with the SuperLink failed (is it a TLS endpoint?)", True)
    if _ACTIVATION_FAILED in tail:
        if connected_before:
            return ExitCause(
                code,
                "the SuperLink could not activate this node again: it still holds the node's earlier connection "
                "(after a SuperLink restart it lets go within about a minute)",
                False,
            )
        return ExitCause(
            code,
            f"the SuperLink does not accept this node key{key}: not registered yet (ask the coordinator to run "
            "`federation enrol --node-key` with this site's node.pub), or still held by an earlier connection",
            False,
        )
    if code == EXIT_CONNECTION:
        return ExitCause(code, f"lost the connection to the SuperLink at {superlink} (Flower exit code 305)", False)
    if code is not None:
        return ExitCause(code, f"the SuperNode exited (Flower exit code {code})", False)
    return ExitCause(None, "the SuperNode exited without saying why (see runtime/supernode.log)", False)


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
    warm_start: bool = True  # ClientApps forked from one warm process (site_agent.warmstart); False: cold starts


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
        self.warm: subprocess.Popen[bytes] | None = None
        self._warm_started = 0.0
        self.starts = 0
        self.last_exit_code: int | None = None
        self.last_cause: ExitCause | None = None
        self.connected_once = False  # this node was activated at least once since `join` started
        self._stopping = threading.Event()
        self._log_offset = 0
        self._read_offset = 0
        self._retries = 0
        self.node_key_sha256 = _node_key_fingerprint(self.site_dir / NODE_PUBLIC_KEY)

    # --- files the processes use --------------------------------------------------------------------
    def _prepare_runtime(self) -> None:
        (self.runtime / "bin").mkdir(parents=True, exist_ok=True)
        (self.runtime / "flwr-home").mkdir(exist_ok=True)
        self.runtime.chmod(0o700)  # the secret, logs and Flower's working files are for the agent's user only
        secret = self.runtime / RUNTIME_SECRET
        if not secret.is_file() or secret.stat().st_size < 32:
            fd = os.open(secret, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
            with os.fdopen(fd, "wb") as handle:
                handle.write(os.urandom(32))
        python = shlex.quote(sys.executable)
        if self.settings.warm_start:  # a copy of the warm process, else (no warm process) a cold launcher
            command = f"{python} -m site_agent.warmstart client {shlex.quote(str(self.runtime / SOCKET_NAME))}"
        else:
            launcher = self.settings.bin_dir / "site-agent-clientapp"
            command = shlex.quote(str(launcher)) if launcher.exists() else f"{python} -m site_agent.launcher"
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
            "--superexec-auth-secret-file",
            str(self.runtime / RUNTIME_SECRET),
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
            "--superexec-auth-secret-file",
            str(self.runtime / RUNTIME_SECRET),
        ]

    # --- one start ----------------------------------------------------------------------------------
    def start(self) -> None:
        """Start the SuperNode and, once its Runtime API listens, the warm process and the app runner."""
        self._prepare_runtime()
        port = self.settings.runtime_port or free_port()
        self._retries = 0
        if self.settings.warm_start and (self.warm is None or self.warm.poll() is not None):
            self._start_warm()  # first: its imports overlap the SuperNode's start
        self.supernode = self._spawn(self.supernode_command(port), "supernode.log", follow=True)
        self._wait_listening(port, self.supernode)
        self._wait_warm()  # so that the first message already finds it (else that ClientApp would start cold)
        self.app_runner = self._spawn(self.app_runner_command(port, self.supernode.pid), "app-runner.log")
        self.starts += 1

    def _start_warm(self) -> None:
        (self.runtime / SOCKET_NAME).unlink(missing_ok=True)  # a killed warm process leaves its socket behind
        serve = [sys.executable, "-m", "site_agent.warmstart", "serve", str(self.runtime / SOCKET_NAME)]
        self.warm = self._spawn(serve, "warm-start.log")
        self._warm_started = time.monotonic()

    def _wait_warm(self, timeout_s: float = 60.0) -> None:
        end = time.monotonic() + timeout_s
        while self.warm is not None and self.warm.poll() is None and time.monotonic() < end:
            if (self.runtime / SOCKET_NAME).exists():
                return
            time.sleep(0.05)

    def _keep_warm(self) -> None:
        """Start the warm process again if it exited; if it keeps exiting within a minute, leave ClientApps cold."""
        if self.warm is None or self.warm.poll() is None:
            return
        code = self.warm.returncode
        if time.monotonic() - self._warm_started < 60:
            self.say(
                f"site {self.site.site_id}: the warm process exited (status {code}) within a minute of starting; "
                "ClientApps start cold until the node restarts (see runtime/warm-start.log)"
            )
            self.warm = None
            return
        self.say(f"site {self.site.site_id}: the warm process exited (status {code}); starting it again")
        self._start_warm()

    def _spawn(self, argv: list[str], log_name: str, follow: bool = False) -> subprocess.Popen[bytes]:
        """Start one of join's processes, its output appended to ``runtime/LOG_NAME``; it dies with join."""
        with open(self.runtime / log_name, "ab") as log:
            if follow:  # the supervisor reads this log as it is written, from here on
                self._log_offset = self._read_offset = log.tell()
            return subprocess.Popen(
                argv,
                stdout=log,
                stderr=subprocess.STDOUT,
                env=self._environment(),
                cwd=self.runtime,
                preexec_fn=_die_with_parent,
            )

    def _wait_listening(self, port: int, process: subprocess.Popen[bytes], timeout_s: float = 30.0) -> None:
        end = time.monotonic() + timeout_s
        while time.monotonic() < end and process.poll() is None:
            try:
                with socket.create_connection(("127.0.0.1", port), timeout=0.5):
                    return
            except OSError:
                time.sleep(0.1)

    def _stop_processes(self, grace_s: float = 5.0, warm_too: bool = False) -> None:
        processes = (self.app_runner, self.supernode, self.warm) if warm_too else (self.app_runner, self.supernode)
        for process in processes:
            if process is not None and process.poll() is None:
                process.send_signal(signal.SIGTERM)
        for process in processes:
            if process is None:
                continue
            try:
                process.wait(timeout=grace_s)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(timeout=grace_s)

    def _since_start(self) -> str:
        try:
            with open(self.runtime / "supernode.log", "rb") as handle:
                handle.seek(self._log_offset)
                return handle.read().decode("utf-8", errors="replace")
        except OSError:
            return ""

    def _exit_reason(self) -> int | None:
        return flower_exit_code(self._since_start())

    def _follow_log(self) -> None:
        """Say what the SuperNode's log says as it happens: connection retries, and when the node is connected."""
        try:
            with open(self.runtime / "supernode.log", "rb") as handle:
                handle.seek(self._read_offset)
                data = handle.read()
        except OSError:
            return
        end = data.rfind(b"\n")
        if end < 0:
            return
        self._read_offset += end + 1
        for line in data[: end + 1].decode("utf-8", errors="replace").splitlines():
            retry = _RETRY.search(line)
            if retry:
                self._retries += 1
                self.say(
                    f"site {self.site.site_id}: cannot reach the SuperLink at {self.settings.superlink} "
                    f"(attempt {self._retries}); Flower retries in {float(retry.group(1)):.1f} s"
                )
                continue
            connected = _CONNECTED.search(line)
            if connected:
                self.connected_once = True
                self.say(f"site {self.site.site_id}: connected to the SuperLink as node {connected.group(1)}")

    # --- supervision ----------------------------------------------------------------------------------
    def stop(self) -> None:
        self._stopping.set()

    def run(self) -> int:
        """Keep the node up until :meth:`stop` (or a signal); return the process exit status for the CLI."""
        pause = self.settings.first_pause_s
        restarts = 0
        if not self.site.allowed_fab_sha256:  # found by following the site-IT guide: it said nothing until a round
            self.say(
                f"site {self.site.site_id}: warning: site.toml [app] allowed_fab_sha256 is empty, so every round will "
                "be refused; add the coordinator's app hash (`site-agent app hash FAB`) and join again"
            )
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
                    self._follow_log()
                    self._keep_warm()
                    self._stopping.wait(0.2)
                self._follow_log()
                if self._stopping.is_set():
                    break
                self._stop_processes()
                cause = diagnose(
                    self._since_start(),
                    self.settings.superlink,
                    self.settings.root_certificates,
                    self.connected_once,
                    self.node_key_sha256,
                )
                self.last_exit_code, self.last_cause = cause.code, cause
                if cause.stop:
                    self.say(f"site {self.site.site_id}: {cause.cause}; not retrying (fix this, then join again)")
                    return EXIT_REFUSED
                why = cause.cause
                if self.settings.max_restarts is not None and restarts >= self.settings.max_restarts:
                    self.say(f"site {self.site.site_id}: {why}; no restarts left")
                    return EXIT_OFFLINE  # 4: the node could not stay online (3 means a release is held)
                if time.monotonic() - started_at > 60:
                    pause = self.settings.first_pause_s  # it ran fine for a while: start the back-off afresh
                self.say(f"site {self.site.site_id}: {why}; retry {restarts + 1} in {pause:.0f} s")
                restarts += 1
                if self._stopping.wait(pause):
                    break
                pause = min(pause * 2, self.settings.longest_pause_s)
        finally:
            self._stop_processes(warm_too=True)
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
