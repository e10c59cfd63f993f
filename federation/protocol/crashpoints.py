"""Injected crash points for the crash-safety tests (tests/adversarial/test_crash_safety.py).

Inert by default: :func:`crash_point` does nothing unless the environment variable ``MSV_CRASH_AT`` names
exactly that point, in which case the process kills itself with SIGKILL (no cleanup, no flush, no
``finally``), the way a power cut or the OOM killer would. Points are named ``side:step``:

``site:after-ledger-release``   the ``release`` entry is in the ledger, nothing else written
``site:before-send``            the site's own copy in ``releases/`` is written, the output is not
``site:after-send``             the output file is written, the ``sent`` ledger entry is not
``coordinator:mid-ingest``      one release is inserted in the open ingest transaction, not committed
"""

from __future__ import annotations

import os
import signal

ENVIRONMENT_VARIABLE = "MSV_CRASH_AT"


def crash_point(name: str) -> None:
    """Kill this process now if ``MSV_CRASH_AT`` equals ``name``; otherwise do nothing."""
    if os.environ.get(ENVIRONMENT_VARIABLE) == name:
        os.kill(os.getpid(), signal.SIGKILL)
