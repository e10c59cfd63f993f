"""`federation --help` and `site-agent --help` start fast: building either parser imports neither Flower nor
the statistics stack (scipy, pandas, matplotlib); the commands that need them import them when they run."""

from __future__ import annotations

import subprocess
import sys

import pytest

HEAVY = ("flwr", "scipy", "pandas", "matplotlib")


@pytest.mark.parametrize("module", ["federation.cli", "site_agent.cli"])
def test_building_the_parser_imports_nothing_heavy(module):
    code = (
        f"import sys; from {module} import build_parser; build_parser().format_help(); "
        f"print(sorted({{m.split('.')[0] for m in sys.modules}} & set({HEAVY!r})))"
    )
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "[]"


@pytest.mark.parametrize("argv", [["federation", "--help"], ["site-agent", "--help"]])
def test_help_names_exit_codes_and_guides(argv):
    module = "federation.cli" if argv[0] == "federation" else "site_agent.cli"
    result = subprocess.run([sys.executable, "-m", module, *argv[1:]], capture_output=True, text=True, timeout=60)
    assert result.returncode == 0
    assert "exit codes" in result.stdout and "docs/" in result.stdout and result.stderr == ""
