"""The audit's integer programs run under a hard wall-clock limit (site_agent/audit/programs.py; threat model R9).

stalling_program.npz is one union program of the audit (352 sets of atoms, 49 row variables) that HiGHS
(scipy 1.17.1, constraints.txt) ran for minutes past its own 30 s time limit and 1,000-node limit. It was taken
from ``make bench``'s 200-release history (simulations/bench/audit.py, the bench's own invented site) at its 17th
release, with the union search allowed in blocks of up to 1,500 atoms and its cost of the time (1 + rank/(m(m+1))
per set), on 2026-12-05. The checks below run scipy's own ``milp`` on it in a separate process as the reference."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
from scipy import sparse
from scipy.optimize import Bounds, LinearConstraint, milp

from site_agent.audit import programs

STALLING = Path(__file__).with_name("stalling_program.npz")
ROOT = Path(__file__).resolve().parents[2]


def _stalling() -> tuple[np.ndarray, list[LinearConstraint], np.ndarray, Bounds]:
    data = np.load(STALLING)
    rows = sparse.csr_matrix(
        (data["value"], (data["row"], data["col"])), shape=(len(data["row_lower"]), len(data["c"]))
    )
    constraints = [LinearConstraint(rows, data["row_lower"], data["row_upper"])]
    return data["c"], constraints, data["integrality"], Bounds(data["lower"], data["upper"])


def _example() -> dict:
    """scipy's own example for ``milp`` (its documentation: maximise y subject to -x + y <= 1, 3x + 2y <= 12,
    2x + 3y <= 12, x and y whole numbers >= 0); its optimum y = 2 is quoted from memory and checked here against
    ``milp`` in this process."""
    a = np.array([[-1, 1], [3, 2], [2, 3]], float)
    return dict(
        c=-np.array([0.0, 1.0]),
        constraints=[LinearConstraint(a, np.full(3, -np.inf), np.array([1.0, 12.0, 12.0]))],
        integrality=np.ones(2),
        bounds=Bounds(0, np.inf),
    )


def test_the_worker_answers_what_milp_answers_in_process() -> None:
    example = _example()
    c = example.pop("c")
    mine = programs.integer_program(c, **example, options={"time_limit": 5.0})
    theirs = milp(c, **example, options={"time_limit": 5.0})
    assert mine.status == theirs.status == 0
    assert mine.fun == theirs.fun == -2.0
    assert np.array_equal(mine.x, theirs.x)
    # a malformed program raises the ValueError milp raises, whose words the audit's callers expect
    with pytest.raises(ValueError, match="shape"):
        programs.integer_program(c, constraints=[LinearConstraint(np.ones((1, 3)), 0, 1)], integrality=np.ones(2))
    # only the options the audit uses cross to the worker (as numbers: nothing but arrays crosses the pipes)
    with pytest.raises(ValueError, match="no option 'threads'"):
        programs.integer_program(c, **example, options={"threads": 2})


def test_a_program_highs_runs_past_its_own_limits_is_stopped_at_the_wall_clock_limit() -> None:
    c, constraints, integrality, bounds = _stalling()
    options = {"node_limit": 1_000, "time_limit": 1.0, "mip_rel_gap": 0.0}
    # the reference: scipy's milp itself, in a process of its own, is still running 4 s after its 1 s time limit
    reference = textwrap.dedent(
        f"""
        import sys
        sys.path.insert(0, {str(ROOT)!r})
        from tests.site_agent.test_programs import _stalling
        from scipy.optimize import milp
        c, constraints, integrality, bounds = _stalling()
        milp(c, constraints=constraints, integrality=integrality, bounds=bounds, options={options!r})
        """
    )
    still_running = 1.0 + programs.GRACE + 3.0
    with pytest.raises(subprocess.TimeoutExpired):
        subprocess.run([sys.executable, "-c", reference], timeout=still_running, cwd=ROOT)

    example = _example()
    assert programs.integer_program(example.pop("c"), **example).status == 0  # the worker is up
    first, stopped = programs.worker_pid(), programs.stopped
    started = time.monotonic()
    result = programs.integer_program(
        c, constraints=constraints, integrality=integrality, bounds=bounds, options=options
    )
    elapsed = time.monotonic() - started
    # stopped after its limit and the grace, and before the time at which scipy's own milp was still running;
    # it reports what HiGHS reports at its own limit
    assert programs.GRACE + 1.0 <= elapsed < still_running
    assert result.status == 1 and result.x is None and not result.success
    assert programs.stopped == stopped + 1
    assert programs.worker_pid() is None
    with pytest.raises(ProcessLookupError):
        os.kill(first, 0)
    # the next program starts a new worker and is answered
    example = _example()
    again = programs.integer_program(example.pop("c"), **example, options={"time_limit": 5.0})
    assert again.status == 0 and again.fun == -2.0
    assert programs.worker_pid() not in (None, first)


def test_the_worker_ends_with_the_agents_process_even_mid_program() -> None:
    agent = textwrap.dedent(
        f"""
        import sys
        sys.path.insert(0, {str(ROOT)!r})
        from tests.site_agent.test_programs import _example, _stalling
        from site_agent.audit import programs
        example = _example()
        programs.integer_program(example.pop("c"), **example)
        print(programs.worker_pid(), flush=True)
        c, constraints, integrality, bounds = _stalling()
        programs.integer_program(
            c, constraints=constraints, integrality=integrality, bounds=bounds, options={{"time_limit": 600.0}}
        )
        """
    )
    process = subprocess.Popen([sys.executable, "-c", agent], stdout=subprocess.PIPE, text=True, cwd=ROOT)
    try:
        worker = int(process.stdout.readline())
        time.sleep(0.5)  # the stalling program is now in the worker
        os.kill(worker, 0)
        process.send_signal(signal.SIGKILL)  # the agent's process ends without any clean-up
        process.wait(timeout=10)
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline:
            try:
                os.kill(worker, 0)
            except ProcessLookupError:
                break
            # a killed worker is reaped by init; until then it may linger as a zombie, which has stopped running
            if _state(worker) == "Z":
                break
            time.sleep(0.1)
        else:
            pytest.fail(f"the worker {worker} outlived the agent's process")
    finally:
        if process.poll() is None:
            process.kill()


def _state(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (FileNotFoundError, IndexError):
        return "gone"


def test_a_forked_copy_of_the_agent_starts_its_own_worker() -> None:
    # site_agent.warmstart forks one copy of the warm process per message: a copy must not write into the
    # parent's worker (two processes on one pair of pipes would mix their programs and answers)
    example = _example()
    assert programs.integer_program(example.pop("c"), **example).status == 0
    parent = programs.worker_pid()
    child = os.fork()
    if child == 0:  # pragma: no cover - in the fork
        code = 1
        try:
            example = _example()
            mine = programs.integer_program(example.pop("c"), **example)
            code = 0 if mine.fun == -2.0 and programs.worker_pid() not in (None, parent) else 2
        finally:
            os._exit(code)
    _, status = os.waitpid(child, 0)
    assert os.waitstatus_to_exitcode(status) == 0
    example = _example()
    assert programs.integer_program(example.pop("c"), **example).fun == -2.0
    assert programs.worker_pid() == parent


def test_the_programs_of_one_request_share_one_budget_of_time() -> None:
    # A request crafted so that many programs run to their limit would cost 32 s each: the programs of one request
    # share a budget (the audit's PROGRAM_SECONDS), each program's limit is cut to what is left, and once it is
    # spent the next program raises BudgetSpent (the audit then refuses the request).
    c, constraints, integrality, bounds = _stalling()
    example = _example()
    assert programs.integer_program(example.pop("c"), **example).status == 0  # the worker is up
    budget = programs.Budget(1.5)
    with programs.within(budget):
        started = time.monotonic()
        result = programs.integer_program(
            c, constraints=constraints, integrality=integrality, bounds=bounds, options={"time_limit": 30.0}
        )
        elapsed = time.monotonic() - started
        # cut to the 1.5 s left (HiGHS stops there, or the worker is killed GRACE later), far from its own 30 s
        assert result.status == 1 and result.x is None
        assert elapsed >= 1.0 and elapsed < 1.5 + programs.GRACE + 1.0
        assert budget.not_run == 0 and budget.left() <= 0
        example = _example()
        started = time.monotonic()
        with pytest.raises(programs.BudgetSpent, match="1.5 s for integer programs are spent"):
            programs.integer_program(example.pop("c"), **example)
        assert time.monotonic() - started < 0.5 and budget.not_run == 1
    # outside the request the programs run as before
    example = _example()
    assert programs.integer_program(example.pop("c"), **example).fun == -2.0
