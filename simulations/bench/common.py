"""What every stage shares: the machine description, fresh-subprocess measurements, medians."""

from __future__ import annotations

import json
import os
import platform
import resource
import statistics
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[2]
MARK = "BENCH-RESULT "  # the line of a child's output that carries its measurement


def machine() -> dict[str, Any]:
    """Cores, memory, CPU model, Python and the load average when the run starts."""
    model = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        model = platform.processor()
    memory = 0
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                memory = int(line.split()[1]) * 1024
                break
    except OSError:
        pass
    return {
        "cores": os.cpu_count(),
        "memory_gib": round(memory / 2**30, 1),
        "cpu_model": model,
        "python": platform.python_version(),
        "platform": platform.platform(),
        "load_average_at_start": [round(x, 2) for x in os.getloadavg()],
    }


def peak_rss_mib() -> float:
    """Peak resident memory of this process so far (Linux reports ru_maxrss in KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def report(result: dict[str, Any]) -> None:
    """Print a child's measurement for :func:`run_child` (adds its peak RSS)."""
    result = {**result, "peak_rss_mib": round(peak_rss_mib(), 1)}
    print(MARK + json.dumps(result), flush=True)


def run_child(module: str, args: Sequence[str], timeout_s: float = 3600) -> dict[str, Any]:
    """Run ``python -m module args`` in a fresh interpreter and return the measurement it reported."""
    env = {**os.environ, "FLWR_TELEMETRY_ENABLED": "0", "FLWR_DISABLE_UPDATE_CHECK": "1"}
    started = time.perf_counter()
    done = subprocess.run(
        [sys.executable, "-m", module, *args],
        cwd=ROOT,
        env=env,
        capture_output=True,
        text=True,
        timeout=timeout_s,
        check=False,
    )
    process_s = time.perf_counter() - started
    lines = [line for line in done.stdout.splitlines() if line.startswith(MARK)]
    if done.returncode != 0 or not lines:
        tail = (done.stderr or done.stdout).strip().splitlines()[-5:]
        raise RuntimeError(f"{module} {' '.join(args)} failed (exit {done.returncode}): {' | '.join(tail)}")
    result = json.loads(lines[-1][len(MARK) :])
    result["process_s"] = round(process_s, 3)
    return result


def median(values: Sequence[float]) -> float:
    return float(statistics.median(values))


def best_of(function: Callable[..., Any], repeats: int, *args: Any, **kwargs: Any) -> tuple[float, Any]:
    """Shortest wall time of ``repeats`` calls (the least disturbed on a shared machine), and the last value."""
    times, value = [], None
    for _ in range(repeats):
        started = time.perf_counter()
        value = function(*args, **kwargs)
        times.append(time.perf_counter() - started)
    return min(times), value


def say(text: str) -> None:
    print(text, file=sys.stderr, flush=True)
