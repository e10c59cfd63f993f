"""The audit's integer programs, each under a hard wall-clock limit.

HiGHS's own time and node limits are checked between its steps, not inside them: one union program of 352 sets
(a block of 365 open atoms) ran for minutes past both (threat model R9). A request crafted to make HiGHS
stall could then hold the site's agent until its IT staff stopped it. So every integer program of the audit runs
here, in one long-lived worker process (a fresh interpreter that imports only numpy and scipy, started by the
first program of the agent's process), and a program that has not answered within its own time limit and
:data:`GRACE` seconds more is stopped by killing that worker. The caller then sees HiGHS's own "time limit
reached" status (1, no solution), which every search of the audit already treats as a program that did not finish
(the search is named in the release's record as not run in full, or the count keeps its linear bounds). The next
program starts a new worker. A worker that dies without an answer gives the same status.

Nothing here decides what is released: the program, its options and the answer are scipy's
:func:`scipy.optimize.milp` exactly; only where it runs changes. The worker's output goes to the audit alone (its
own standard output and error are closed to the site's terminal).

Run as a script, this file is the worker: it reads length-prefixed pickles of ``milp``'s arguments from its
standard input and writes the result's pickle to the descriptor it was given.
"""

from __future__ import annotations

import atexit
import ctypes
import os
import pickle
import select
import struct
import subprocess
import sys
import threading
import time
from typing import Any

from scipy.optimize import OptimizeResult, milp

# seconds a program may run past its own time limit before its worker is killed (HiGHS stops within a fraction
# of a second of the limit when it checks it at all), and how long a new worker may take to start (a fresh
# interpreter importing numpy and scipy: about 0.5 s on the team's 2-core machines)
GRACE = 2.0
START_SECONDS = 60.0
# no time limit in the options: HiGHS's own default is none; the worker's limit is then this many seconds
DEFAULT_LIMIT = 30.0

_HEADER = struct.Struct("<Q")
_lock = threading.Lock()
_worker: _Worker | None = None
# workers started, and programs stopped at their wall-clock limit (or whose worker died), in this process
started = 0
stopped = 0


def integer_program(
    c: Any, *, constraints: Any = None, integrality: Any = None, bounds: Any = None, options: dict | None = None
) -> OptimizeResult:
    """:func:`scipy.optimize.milp` with the same arguments, run in the worker under a wall-clock limit of the
    options' ``time_limit`` plus :data:`GRACE`. A program stopped there, or whose worker died, returns
    ``status`` 1 and no ``x``, as HiGHS does at its own time limit. The ``ValueError`` or ``RuntimeError`` that
    ``milp`` raises for a malformed program is raised here too."""
    options = dict(options or {})
    limit = float(options.get("time_limit", DEFAULT_LIMIT)) + GRACE
    if os.name == "nt":  # pragma: no cover - no select() on pipes: in-process, HiGHS's own limits only (R9)
        return milp(c, constraints=constraints, integrality=integrality, bounds=bounds, options=options)
    payload = pickle.dumps(
        ((c,), dict(constraints=constraints, integrality=integrality, bounds=bounds, options=options))
    )
    global _worker, stopped
    with _lock:
        if _worker is None or not _worker.alive():
            if _worker is not None:
                _worker.kill()
            _worker = _Worker()
        answer = _worker.ask(payload, limit)
        if answer is None:  # stopped at the limit, or died: a new worker for the next program
            _worker.kill()
            _worker = None
            stopped += 1
            return OptimizeResult(
                status=1, success=False, x=None, fun=None, message="stopped at the audit's wall-clock limit"
            )
    kind, value = pickle.loads(answer)
    if kind == "result":
        return value
    error = {"ValueError": ValueError}.get(value[0], RuntimeError)
    raise error(value[1])


def start() -> None:
    """Start the worker now, if none runs, without waiting for it: it imports scipy (about 0.4 s) while the
    audit builds its system, so that the first program does not wait for it."""
    global _worker
    with _lock:
        if _worker is None or not _worker.alive():
            _worker = _Worker()


def worker_pid() -> int | None:
    """The running worker's process id (None before the first program or after a kill)."""
    return _worker.process.pid if _worker is not None and _worker.alive() else None


class _Worker:
    """One worker process and its two pipes (programs in on standard input, answers out on a descriptor of
    its own, so that nothing HiGHS might print reaches the answers)."""

    def __init__(self) -> None:
        global started
        read, write = os.pipe()
        try:
            self.process = subprocess.Popen(
                [sys.executable, "-I", os.path.abspath(__file__), str(write)],
                stdin=subprocess.PIPE,
                stdout=subprocess.DEVNULL,
                stderr=subprocess.DEVNULL,
                pass_fds=(write,),
                close_fds=True,
            )
        finally:
            os.close(write)
        self.answers = read
        self.ready = False  # the worker says so once numpy and scipy are imported
        started += 1
        atexit.register(self.kill)

    def alive(self) -> bool:
        return self.process.poll() is None

    def ask(self, payload: bytes, limit: float) -> bytes | None:
        """Send one program and wait for its answer at most ``limit`` seconds (the first time, after the worker
        has said it is ready, at most :data:`START_SECONDS` after its start); None if none came."""
        if not self.ready:
            self.ready = self._read(_HEADER.size, time.monotonic() + START_SECONDS) is not None
            if not self.ready:
                return None
        try:
            assert self.process.stdin is not None
            self.process.stdin.write(_HEADER.pack(len(payload)) + payload)
            self.process.stdin.flush()
        except (BrokenPipeError, OSError):
            return None
        deadline = time.monotonic() + limit
        head = self._read(_HEADER.size, deadline)
        return None if head is None else self._read(_HEADER.unpack(head)[0], deadline)

    def _read(self, size: int, deadline: float) -> bytes | None:
        chunks, left = [], size
        while left:
            wait = deadline - time.monotonic()
            if wait <= 0 or not select.select([self.answers], [], [], wait)[0]:
                return None
            chunk = os.read(self.answers, min(left, 1 << 20))
            if not chunk:  # the worker died
                return None
            chunks.append(chunk)
            left -= len(chunk)
        return b"".join(chunks)

    def kill(self) -> None:
        if self.process.poll() is None:
            self.process.kill()
        try:
            self.process.wait(timeout=10)
        except subprocess.TimeoutExpired:  # pragma: no cover - a process that survives SIGKILL
            pass
        self.close_pipes()

    def close_pipes(self) -> None:
        """This process's ends of the two pipes (the worker itself is left alone)."""
        for close in (getattr(self.process.stdin, "close", None), lambda: os.close(self.answers)):
            try:
                if close is not None:
                    close()
            except OSError:
                pass
        atexit.unregister(self.kill)


def _forget_in_child() -> None:
    """In a forked copy of the agent's process (site_agent.warmstart forks one per message): the parent's worker
    is not this copy's; its pipes are closed here and the copy starts its own worker."""
    global _worker, _lock
    if _worker is not None:
        _worker.close_pipes()
    _worker, _lock = None, threading.Lock()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_forget_in_child)


def _serve(answers: int) -> None:
    """The worker: one program at a time until its standard input closes (the agent's process ended)."""
    if sys.platform.startswith("linux"):  # killed with the agent's process, even mid-program
        try:
            ctypes.CDLL(None, use_errno=True).prctl(1, 9)  # PR_SET_PDEATHSIG, SIGKILL
        except (OSError, AttributeError):  # pragma: no cover
            pass
        if os.getppid() == 1:  # pragma: no cover - the agent ended before the line above
            return
    programs = sys.stdin.buffer
    with os.fdopen(answers, "wb") as out:
        out.write(_HEADER.pack(0))  # ready
        out.flush()
        while True:
            head = programs.read(_HEADER.size)
            if len(head) < _HEADER.size:
                return
            args, kwargs = pickle.loads(programs.read(_HEADER.unpack(head)[0]))
            try:
                answer: tuple[str, Any] = ("result", milp(*args, **kwargs))
            except Exception as error:  # noqa: BLE001 - returned to the agent, which raises it there
                answer = ("error", (type(error).__name__, str(error)))
            data = pickle.dumps(answer)
            out.write(_HEADER.pack(len(data)) + data)
            out.flush()


if __name__ == "__main__":
    _serve(int(sys.argv[1]))
