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

The programs of one request share a :class:`Budget` of wall-clock time (the audit's ``PROGRAM_SECONDS``): each
program's limit is cut to what is left, and once it is spent the next program raises :class:`BudgetSpent`, and the
audit refuses the request. Refused, not released with its searches named as not run: a request crafted to spend
the budget on a few stalling programs would otherwise skip every search after them.

Nothing here decides what is released: the program, its options and the answer are scipy's
:func:`scipy.optimize.milp` exactly; only where it runs changes. The worker's output goes to the audit alone (its
own standard output and error are closed to the site's terminal).

Run as a script, this file is the worker: it reads ``milp``'s arguments from its standard input and writes the
result to the descriptor it was given, each length-prefixed and as numpy arrays only (their raw bytes after a
JSON header of names, types and shapes: what crosses the pipes is data, never code).
"""

from __future__ import annotations

import atexit
import contextlib
import contextvars
import ctypes
import json
import os
import select
import struct
import subprocess
import sys
import threading
import time
from typing import Any

import numpy as np
from scipy import sparse
from scipy.optimize import Bounds, LinearConstraint, OptimizeResult, milp

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


class Budget:
    """Wall-clock time the integer programs of one request may take together (threat model R9): each program's
    limit is cut to what is left, and once it is spent the next program raises :class:`BudgetSpent` (counted in
    ``not_run``)."""

    def __init__(self, seconds: float) -> None:
        self.seconds = float(seconds)
        self.deadline = time.monotonic() + self.seconds
        self.not_run = 0

    def left(self) -> float:
        return self.deadline - time.monotonic()


_budget: contextvars.ContextVar[Budget | None] = contextvars.ContextVar("program_budget", default=None)


@contextlib.contextmanager
def within(budget: Budget) -> Any:
    """Run the programs of this block under ``budget`` (per thread: a context variable)."""
    token = _budget.set(budget)
    try:
        yield budget
    finally:
        _budget.reset(token)


class BudgetSpent(Exception):  # noqa: N818 - not a RuntimeError: no search may take it for a failed program
    """The request's time for integer programs is spent: the audit cannot finish, and the request is refused."""


def integer_program(
    c: Any, *, constraints: Any = None, integrality: Any = None, bounds: Any = None, options: dict | None = None
) -> OptimizeResult:
    """:func:`scipy.optimize.milp` with the same arguments, run in the worker under a wall-clock limit of the
    options' ``time_limit`` plus :data:`GRACE`. A program stopped there, or whose worker died, returns
    ``status`` 1 and no ``x``, as HiGHS does at its own time limit. The ``ValueError`` or ``RuntimeError`` that
    ``milp`` raises for a malformed program is raised here too."""
    options = dict(options or {})
    budget = _budget.get()
    if budget is not None:
        left = budget.left()
        if left <= 0:
            budget.not_run += 1
            raise BudgetSpent(f"the request's {budget.seconds:g} s for integer programs are spent")
        options["time_limit"] = min(float(options.get("time_limit", DEFAULT_LIMIT)), left)
    limit = float(options.get("time_limit", DEFAULT_LIMIT)) + GRACE
    if os.name == "nt":  # pragma: no cover - no select() on pipes: in-process, HiGHS's own limits only (R9)
        return milp(c, constraints=constraints, integrality=integrality, bounds=bounds, options=options)
    payload = _program_bytes(c, constraints, integrality, bounds, options)
    global _worker, stopped
    with _lock:
        answer = _running().ask(payload, limit)
        if answer is None:  # stopped at the limit, or died: a new worker for the next program
            _worker.kill()
            _worker = None
            stopped += 1
            return OptimizeResult(
                status=1, success=False, x=None, fun=None, message="stopped at the audit's wall-clock limit"
            )
    return _result_of(answer)


# --- what crosses the pipes: numpy arrays only (raw bytes and a JSON header, never a pickle: data, not code) -----

_OPTIONS = {"node_limit": int, "time_limit": float, "mip_rel_gap": float, "presolve": bool, "disp": bool}


def _to_bytes(arrays: dict[str, Any]) -> bytes:
    """Named arrays as one byte string: a JSON header (each name, dtype and shape) and the arrays' raw bytes."""
    arrays = {name: np.asarray(value) for name, value in arrays.items()}  # tobytes() is in C order
    header = json.dumps([[name, a.dtype.str, list(a.shape)] for name, a in arrays.items()]).encode()
    return b"".join([_HEADER.pack(len(header)), header, *(a.tobytes() for a in arrays.values())])


def _from_bytes(data: bytes) -> dict[str, np.ndarray]:
    """:func:`_to_bytes` read back: numbers, booleans and text only (no object can be built from these bytes)."""
    size = _HEADER.unpack_from(data)[0]
    at = _HEADER.size + size
    out = {}
    for name, kind, shape in json.loads(data[_HEADER.size : at]):
        dtype = np.dtype(kind)
        if dtype.kind not in "fiubU":
            raise ValueError(f"the worker's answer holds an array of kind {dtype.kind!r}")
        count = int(np.prod(shape, dtype=np.int64))
        out[name] = np.frombuffer(data, dtype, count, at).reshape(shape).copy()  # writable, as milp gives it
        at += count * dtype.itemsize
    return out


def _program_bytes(c: Any, constraints: Any, integrality: Any, bounds: Any, options: dict) -> bytes:
    """The program as arrays: the costs, integrality and bounds (each as long as the costs), each constraint's
    matrix (dense, or a sparse one's CSR parts) and row bounds, and the options (only those listed in
    :data:`_OPTIONS`; any other raises ``ValueError``)."""
    c = np.asarray(c, float)
    arrays: dict[str, Any] = {"c": c}
    if integrality is not None:
        arrays["integrality"] = np.broadcast_to(np.asarray(integrality, float), c.shape)
    if bounds is not None:
        arrays["lower"] = np.broadcast_to(np.asarray(bounds.lb, float), c.shape)
        arrays["upper"] = np.broadcast_to(np.asarray(bounds.ub, float), c.shape)
    if constraints is None:
        constraints = []
    elif isinstance(constraints, LinearConstraint):
        constraints = [constraints]
    arrays["constraints"] = np.array(len(constraints))
    for i, constraint in enumerate(constraints):
        matrix = constraint.A
        if sparse.issparse(matrix):
            matrix = sparse.csr_matrix(matrix)
            arrays |= {f"A{i}.data": matrix.data, f"A{i}.indices": matrix.indices, f"A{i}.indptr": matrix.indptr}
            arrays[f"A{i}.shape"] = np.array(matrix.shape)
        else:
            arrays[f"A{i}"] = np.atleast_2d(np.asarray(matrix, float))
        rows = (arrays[f"A{i}.shape"][0],) if f"A{i}.shape" in arrays else (arrays[f"A{i}"].shape[0],)
        arrays[f"lb{i}"] = np.broadcast_to(np.asarray(constraint.lb, float), rows)
        arrays[f"ub{i}"] = np.broadcast_to(np.asarray(constraint.ub, float), rows)
    for name, value in options.items():
        if name not in _OPTIONS:
            raise ValueError(f"the audit's integer programs take no option {name!r}")
        arrays[f"option.{name}"] = np.array(value, float)
    return _to_bytes(arrays)


def _program_of(data: bytes) -> tuple[tuple[Any, ...], dict[str, Any]]:
    """``milp``'s arguments from :func:`_program_bytes`."""
    arrays = _from_bytes(data)
    constraints = []
    for i in range(int(arrays["constraints"])):
        if f"A{i}" in arrays:
            matrix: Any = arrays[f"A{i}"]
        else:
            parts = (arrays[f"A{i}.data"], arrays[f"A{i}.indices"], arrays[f"A{i}.indptr"])
            matrix = sparse.csr_matrix(parts, shape=tuple(arrays[f"A{i}.shape"]))
        constraints.append(LinearConstraint(matrix, arrays[f"lb{i}"], arrays[f"ub{i}"]))
    options = {
        name[len("option.") :]: _OPTIONS[name[len("option.") :]](arrays[name].item())
        for name in arrays
        if name.startswith("option.")
    }
    bounds = Bounds(arrays["lower"], arrays["upper"]) if "lower" in arrays else None
    kwargs = dict(constraints=constraints, integrality=arrays.get("integrality"), bounds=bounds, options=options)
    return (arrays["c"],), kwargs


def _result_bytes(result: OptimizeResult | None, error: Exception | None = None) -> bytes:
    if error is not None:
        kind = "ValueError" if isinstance(error, ValueError) else "RuntimeError"
        return _to_bytes({"error": np.array(kind), "message": np.array(str(error))})
    arrays: dict[str, Any] = {"status": np.array(int(result.status)), "message": np.array(str(result.message))}
    if result.x is not None:
        arrays["x"] = np.asarray(result.x, float)
    if result.fun is not None:
        arrays["fun"] = np.array(float(result.fun))
    return _to_bytes(arrays)


def _result_of(data: bytes) -> OptimizeResult:
    """The worker's answer as ``milp`` returns it (status, x, fun, message, success), or its error raised."""
    arrays = _from_bytes(data)
    if "error" in arrays:
        raise {"ValueError": ValueError}.get(str(arrays["error"]), RuntimeError)(str(arrays["message"]))
    status = int(arrays["status"])
    return OptimizeResult(
        status=status,
        success=status == 0,
        x=arrays.get("x"),
        fun=float(arrays["fun"]) if "fun" in arrays else None,
        message=str(arrays["message"]),
    )


def start() -> None:
    """Start the worker now, if none runs, without waiting for it: it imports scipy (about 0.4 s) while the
    audit builds its system, so that the first program does not wait for it."""
    if os.name == "nt":  # pragma: no cover - the programs run in-process there (integer_program)
        return
    with _lock:
        _running()


def _running() -> _Worker:
    """The live worker, started if none runs (one that died is killed and its pipes closed first); called with
    :data:`_lock` held."""
    global _worker
    if _worker is None or not _worker.alive():
        if _worker is not None:
            _worker.kill()
        _worker = _Worker()
    return _worker


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
            try:
                args, kwargs = _program_of(programs.read(_HEADER.unpack(head)[0]))
                data = _result_bytes(milp(*args, **kwargs))
            except Exception as error:  # noqa: BLE001 - returned to the agent, which raises it there
                data = _result_bytes(None, error)
            out.write(_HEADER.pack(len(data)) + data)
            out.flush()


if __name__ == "__main__":
    _serve(int(sys.argv[1]))
