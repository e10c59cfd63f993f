"""Warm start for the site's ClientApps: one process imports the agent once, and forks a copy per message.

Flower's app runner starts a new ``flwr-clientapp`` process for every message, and a fresh Python process
spends most of its time importing: Flower's client runtime (about 1 s of CPU on this project's build
machine), then, for a validation, pandas, pyarrow, scipy and onnxruntime (about 0.6 s more), against about
0.1 s of real work. ``site-agent join`` therefore starts one more process of its own, the **warm process**
(``python -m site_agent.warmstart serve``): it imports those modules once, reads nothing of the site (no
``site.toml``, no key, no record), and waits on a Unix socket in the site's ``runtime`` folder. The
``flwr-clientapp`` that the app runner starts is then a small client (:func:`hand_over`, standard library
only) that passes its arguments, environment, working folder and standard streams to the warm process,
which forks: the copy runs exactly what a cold start runs (:func:`site_agent.launcher.run_checked`, the
allowlist check of the app bundle first), with the client's streams and environment. The client relays
signals to the copy and exits with its status, so to the app runner it is the ClientApp.

What a site's IT staff should know:

- **Nothing is shared between messages**: each copy starts from the warm process's memory as it was after
  the imports, and ends when its message is answered. No site data or key is ever in the warm process.
- **Who may connect**: the socket lies in ``SITEDIR/runtime`` (mode 0700) with mode 0600, and the warm
  process serves only a peer of its own user id (checked with ``SO_PEERCRED``): whoever can connect could
  already run the agent's code as that user.
- **Fork safety**: the warm process forks only while it is single-threaded (checked before each fork; it
  imports numpy with one BLAS thread); otherwise it refuses, and the client runs a cold start.
- **Falling back**: if the socket is missing or the warm process does not answer, the client starts the
  launcher itself (a cold start), so a message is never lost to the warm process. ``site-agent join
  --cold-start`` turns the warm process off.
- **Ending**: the warm process exits with the ``join`` that started it; each copy exits when its client
  (the process the app runner started) goes away, as a cold ClientApp exits when its app runner goes.
"""

from __future__ import annotations

import json
import os
import signal
import socket
import struct
import sys
from collections.abc import Sequence

SOCKET_NAME = "warm.sock"
_LENGTH = struct.Struct("!I")
_PID = struct.Struct("!q")
_STATUS = struct.Struct("!i")
_MAX_REQUEST = 1 << 20  # arguments and environment; anything larger is not from our client

# Imported once by the warm process: what a readiness check or a validation imports, except onnxruntime, whose
# import starts a thread (a copy imports it, about 0.1 s).
WARM_MODULES = (
    "flwr.supernode.cli.flwr_clientapp",
    "flwr.supernode.runtime.run_clientapp",
    "site_agent.launcher",
    "site_agent.flower_client",
    "site_agent.readiness",
    "site_agent.approval",
    "site_agent.runner",
    "site_agent.audit.check",
    "federation.protocol.acknowledgement",
    "pandas",
    "pyarrow.csv",
    "pyarrow.parquet",
)


def _short(path: str) -> tuple[str, int | None]:
    """A socket path short enough for ``sun_path`` (108 bytes): through ``/proc/self/fd`` when it is long."""
    if len(os.fsencode(path)) < 100:
        return path, None
    folder = os.open(os.path.dirname(path) or ".", os.O_RDONLY | os.O_DIRECTORY)
    return f"/proc/self/fd/{folder}/{os.path.basename(path)}", folder


def _recv_exactly(conn: socket.socket, size: int) -> bytes | None:
    data = b""
    while len(data) < size:
        chunk = conn.recv(size - len(data))
        if not chunk:
            return None
        data += chunk
    return data


# --- the client: what the app runner starts as flwr-clientapp ------------------------------------------------
def hand_over(socket_path: str, argv: Sequence[str]) -> int | None:
    """Have the warm process run ``site-agent-clientapp argv``; return its exit status, or None if it cannot.

    None means nothing was started (no socket, no warm process, or it refused): the caller starts a cold
    launcher. Once a copy has started, its status is returned, whatever it is.
    """
    runner = os.getppid()  # the app runner: when it goes, the copy goes (as a cold launcher watches it)
    path, folder = _short(socket_path)
    conn = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    try:
        try:
            conn.connect(path)
        except OSError:
            return None
        finally:
            if folder is not None:
                os.close(folder)
        request = json.dumps({"argv": list(argv), "env": dict(os.environ), "cwd": os.getcwd()}).encode()
        try:
            conn.sendmsg(
                [_LENGTH.pack(len(request)), request],
                [(socket.SOL_SOCKET, socket.SCM_RIGHTS, struct.pack("3i", 0, 1, 2))],
            )
            started = _recv_exactly(conn, _PID.size)
        except OSError:
            return None
        if started is None:
            return None  # refused (e.g. not single-threaded): nothing ran
        child = _PID.unpack(started)[0]

        def relay(signum: int, frame: object) -> None:
            _signal(child, signum)

        for sig in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP, signal.SIGQUIT):
            signal.signal(sig, relay)
        return _wait_for_copy(conn, child, runner)
    finally:
        conn.close()


def _wait_for_copy(conn: socket.socket, child: int, runner: int, grace_s: float = 3.0) -> int:
    """The copy's exit status; if the app runner goes first, end the copy (SIGINT, then SIGKILL) and return 70."""
    import time

    conn.settimeout(0.2)
    status = b""
    ending_since: float | None = None
    while len(status) < _STATUS.size:
        try:
            chunk = conn.recv(_STATUS.size - len(status))
        except (TimeoutError, InterruptedError):
            chunk = None
        if chunk == b"":
            return 1  # the connection closed without a status: the copy was killed
        if chunk:
            status += chunk
            continue
        if os.getppid() != runner:  # re-parented: the app runner is gone
            if ending_since is None:
                ending_since = time.monotonic()
                _signal(child, signal.SIGINT)
            elif time.monotonic() - ending_since > grace_s:
                _signal(child, signal.SIGKILL)
                return 70
    return _STATUS.unpack(status)[0]


def _signal(pid: int, sig: int) -> None:
    try:
        os.kill(pid, sig)
    except ProcessLookupError:
        pass


def client_main(args: Sequence[str]) -> None:
    """``client SOCKET ARGS...``: the launcher with ARGS in a warm copy, else in a cold process."""
    status = hand_over(args[0], args[1:])
    if status is None:  # a cold start: the launcher, as if there were no warm process
        os.execv(sys.executable, [sys.executable, "-m", "site_agent.launcher", *args[1:]])
    sys.exit(status)


# --- the warm process ----------------------------------------------------------------------------------------
def _threads() -> int:
    try:
        return len(os.listdir("/proc/self/task"))
    except OSError:
        import threading

        return threading.active_count()


def _run_copy(conn: socket.socket, request: dict, streams: list[int]) -> None:  # pragma: no cover - in a fork
    """In the forked copy: become the client's ClientApp, run it, send the status, exit. Never returns."""
    status = 1
    try:
        for target, fd in enumerate(streams):
            os.dup2(fd, target)
            os.close(fd)
        sys.stdin, sys.stdout, sys.stderr = (
            os.fdopen(0, "r", closefd=False),
            os.fdopen(1, "w", closefd=False, buffering=1),
            os.fdopen(2, "w", closefd=False, buffering=1),
        )
        os.environ.clear()
        os.environ.update({str(k): str(v) for k, v in request["env"].items()})
        os.chdir(request["cwd"])
        for sig in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP, signal.SIGCHLD):
            signal.signal(sig, signal.SIG_DFL)
        signal.signal(signal.SIGINT, signal.default_int_handler)
        conn.sendall(_PID.pack(os.getpid()))
        from .launcher import run_checked, watch_connection

        watch_connection(conn)
        try:
            run_checked([str(a) for a in request["argv"]])
            status = 0
        except SystemExit as exc:
            code = exc.code
            status = code if isinstance(code, int) else (0 if code is None else 1)
            if code is not None and not isinstance(code, int):
                print(code, file=sys.stderr)
        except BaseException:
            import traceback

            traceback.print_exc()
            status = 1
    finally:
        try:
            sys.stdout.flush()
            sys.stderr.flush()
            import atexit

            atexit._run_exitfuncs()
            conn.sendall(_STATUS.pack(status))
        finally:
            os._exit(status)


def _reap() -> None:
    while True:
        try:
            pid, _ = os.waitpid(-1, os.WNOHANG)
        except ChildProcessError:
            return
        if pid == 0:
            return


def _serve_one(conn: socket.socket, listener: socket.socket) -> None:
    """Read one client's request and fork its copy; the copy never comes back here."""
    streams: list[int] = []
    try:
        creds = conn.getsockopt(socket.SOL_SOCKET, socket.SO_PEERCRED, struct.calcsize("3i"))
        _, uid, _ = struct.unpack("3i", creds)
        if uid != os.getuid():
            return
        conn.settimeout(10)
        head, fds, _, _ = conn.recvmsg(_LENGTH.size, socket.CMSG_SPACE(struct.calcsize("3i")))
        for level, kind, data in fds:
            if level == socket.SOL_SOCKET and kind == socket.SCM_RIGHTS:
                streams += list(struct.unpack(f"{len(data) // 4}i", data[: len(data) - len(data) % 4]))
        if len(head) != _LENGTH.size or len(streams) != 3:
            return
        size = _LENGTH.unpack(head)[0]
        body = _recv_exactly(conn, size) if 0 < size <= _MAX_REQUEST else None
        if body is None:
            return
        request = json.loads(body)
        if not isinstance(request, dict) or not isinstance(request.get("argv"), list):
            return
        if _threads() != 1:
            print("warm start: this process is not single-threaded; the client starts cold", file=sys.stderr)
            return
        conn.settimeout(None)
        pid = os.fork()
        if pid == 0:  # pragma: no cover - the copy
            listener.close()  # the copy serves nobody
            _run_copy(conn, request, streams)
        print(f"warm start: ClientApp copy started, pid {pid}", flush=True)
    except (OSError, ValueError) as exc:
        print(
            f"warm start: a request could not be served ({type(exc).__name__}); the client starts cold", file=sys.stderr
        )
    finally:
        for fd in streams:
            try:
                os.close(fd)
            except OSError:
                pass
        conn.close()


def serve(socket_path: str, parent: int | None = None) -> None:
    """Import the agent once, then fork one copy per client until the process that started us is gone."""
    import importlib
    import select

    # No thread may run when the process forks: one BLAS thread (numpy starts none), no background thread in
    # pyarrow's allocator.
    os.environ["OPENBLAS_NUM_THREADS"] = os.environ["OMP_NUM_THREADS"] = "1"
    os.environ["JE_ARROW_MALLOC_CONF"] = "background_thread:false"
    for name in WARM_MODULES:
        importlib.import_module(name)
    parent = os.getppid() if parent is None else parent
    try:
        os.unlink(socket_path)
    except FileNotFoundError:
        pass
    path, folder = _short(socket_path)
    listener = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    old = os.umask(0o177)
    try:
        listener.bind(path)
    finally:
        os.umask(old)
        if folder is not None:
            os.close(folder)
    os.chmod(socket_path, 0o600)
    listener.listen(16)
    stop = []
    signal.signal(signal.SIGTERM, lambda signum, frame: stop.append(signum))
    print(f"warm start: ready ({len(WARM_MODULES)} modules imported), pid {os.getpid()}", flush=True)
    try:
        while not stop and os.getppid() == parent:
            _reap()
            try:
                ready, _, _ = select.select([listener], [], [], 0.5)
            except InterruptedError:
                continue
            if ready:
                conn, _ = listener.accept()
                _serve_one(conn, listener)
    finally:
        listener.close()
        try:
            os.unlink(socket_path)
        except FileNotFoundError:
            pass


def main(argv: Sequence[str] | None = None) -> None:
    args = list(sys.argv[1:] if argv is None else argv)
    if len(args) >= 2 and args[0] == "client":
        client_main(args[1:])
    elif len(args) == 2 and args[0] == "serve":
        serve(args[1])
    else:
        sys.exit(
            "usage: python -m site_agent.warmstart serve SOCKET | client SOCKET --site-dir SITEDIR [FLOWER ARGS ...]"
        )


if __name__ == "__main__":
    main()
