"""The warm start of a site's ClientApps (site_agent.warmstart), with real processes and Flower's own entry point.

A real round through the warm start (and one site cold, ``--cold-start``) runs in tests/deploy; these tests
check what a round cannot show: a copy behaves as a cold start (same output, same exit status), a client
falls back to a cold start when there is no warm process, and a copy does not outlive the process the app
runner started, nor the app runner itself.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.deploy.harness import children, gone, wait_until

PYTHON = sys.executable


def _serve(runtime: Path) -> tuple[subprocess.Popen[bytes], Path]:
    runtime.mkdir(mode=0o700, parents=True, exist_ok=True)
    log = runtime / "warm-start.log"
    with open(log, "ab") as out:
        process = subprocess.Popen(
            [PYTHON, "-m", "site_agent.warmstart", "serve", str(runtime / "warm.sock")],
            stdout=out,
            stderr=subprocess.STDOUT,
        )
    wait_until(lambda: "ready" in log.read_text() or process.poll() is not None, 120, "the warm process")
    assert process.poll() is None, log.read_text()
    return process, log


def _stop(process: subprocess.Popen[bytes]) -> None:
    process.terminate()
    process.wait(timeout=20)


def _client(runtime: Path, *args: str) -> list[str]:
    return [PYTHON, "-m", "site_agent.warmstart", "client", str(runtime / "warm.sock"), "--site-dir", "/nowhere", *args]


def _refused_flag(runtime: Path) -> subprocess.CompletedProcess[str]:
    argv = _client(runtime, "--token", "t", "--no-such-flag")
    return subprocess.run(argv, capture_output=True, text=True, timeout=120)


def _copies(log: Path) -> list[int]:
    return [int(line.rsplit(" ", 1)[1]) for line in log.read_text().splitlines() if "copy started, pid" in line]


def test_a_copy_answers_as_a_cold_start_and_the_socket_is_the_users_alone(tmp_path: Path) -> None:
    runtime = tmp_path / "runtime"
    # Flower's own parser refuses an unknown flag: exit status 2 and its usage line on stderr, in both.
    cold = _refused_flag(runtime)
    process, log = _serve(runtime)
    try:
        sock = runtime / "warm.sock"
        assert sock.stat().st_mode & 0o777 == 0o600
        warm = _refused_flag(runtime)
    finally:
        _stop(process)
    assert cold.returncode == warm.returncode == 2
    assert "flwr-clientapp: error: unrecognized arguments: --no-such-flag" in cold.stderr
    assert warm.stderr.splitlines()[-1] == cold.stderr.splitlines()[-1]
    assert len(_copies(log)) == 1  # the warm client was served by a copy; the cold one ran before the warm process
    assert not (runtime / "warm.sock").exists()  # removed when the warm process ends


def test_a_long_socket_path_still_works(tmp_path: Path) -> None:
    runtime = tmp_path.joinpath(*(["a-rather-long-folder-name"] * 5), "runtime")
    assert len(str(runtime / "warm.sock")) > 108  # longer than a Unix socket address may be
    process, log = _serve(runtime)
    try:
        warm = _refused_flag(runtime)
    finally:
        _stop(process)
    assert warm.returncode == 2 and len(_copies(log)) == 1


@pytest.fixture
def silent_runtime_api():  # noqa: ANN201
    """A loopback port that accepts connections and never answers: a ClientApp waits on it."""
    listener = socket.socket()
    listener.bind(("127.0.0.1", 0))
    listener.listen(8)
    try:
        yield f"127.0.0.1:{listener.getsockname()[1]}"
    finally:
        listener.close()


def _hung_copy(runtime: Path, launcher: list[str]) -> tuple[subprocess.Popen[bytes], int]:
    log = runtime / "warm-start.log"
    before = len(_copies(log))
    started = subprocess.Popen(launcher, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    wait_until(lambda: len(_copies(log)) > before, 60, "a warm copy")
    copy = _copies(log)[-1]
    time.sleep(1.0)
    assert not gone(copy), "the copy should still be waiting for the Runtime API"
    return started, copy


def test_a_copy_ends_with_the_process_the_app_runner_started(tmp_path: Path, silent_runtime_api: str) -> None:
    runtime = tmp_path / "runtime"
    process, _ = _serve(runtime)
    try:
        argv = _client(runtime, "--runtime-api-address", silent_runtime_api, "--token", "t", "--insecure")
        client, copy = _hung_copy(runtime, argv)
        os.kill(client.pid, signal.SIGKILL)  # as when the app runner kills the ClientApp it started
        client.wait(timeout=10)
        wait_until(lambda: gone(copy), 15, "the copy to end with its client")
    finally:
        _stop(process)


def test_a_copy_ends_when_the_app_runner_goes(tmp_path: Path, silent_runtime_api: str) -> None:
    runtime = tmp_path / "runtime"
    process, _ = _serve(runtime)
    try:
        argv = _client(runtime, "--runtime-api-address", silent_runtime_api, "--token", "t", "--insecure")
        # A stand-in app runner: a shell that starts the client and waits; killing it re-parents the client.
        runner = subprocess.Popen(["/bin/sh", "-c", " ".join(f"'{a}'" for a in argv) + "; exit 0"])
        wait_until(lambda: children(runner.pid), 30, "the client under the stand-in app runner")
        client = children(runner.pid)[0]
        log = runtime / "warm-start.log"
        wait_until(lambda: _copies(log), 60, "a warm copy")
        copy = _copies(log)[-1]
        os.kill(runner.pid, signal.SIGKILL)
        runner.wait(timeout=10)
        wait_until(lambda: gone(copy) and gone(client), 20, "the copy and its client to end with the app runner")
    finally:
        _stop(process)
