"""The README's by-hand sequence works as written, on the demo's data (run with bash, as a person would)."""

from __future__ import annotations

import json
import re
import subprocess
from pathlib import Path

from simulations.demo import prepare_study, run_offline

ROOT = Path(__file__).resolve().parents[1]


def readme_block() -> str:
    text = (ROOT / "README.md").read_text()
    start = text.index("<!-- offline-sequence")
    match = re.search(r"```bash\n(.*?)```", text[start:], re.S)
    assert match
    return match.group(1)


def test_readme_offline_sequence(tmp_path):
    demo = tmp_path / "demo"
    run_offline(prepare_study(demo))  # what `make demo` leaves behind, without Ray
    work = tmp_path / "by-hand"
    script = f"set -euo pipefail\nexport D={demo} W={work}\ncd {ROOT}\n" + readme_block()
    result = subprocess.run(["bash", "-c", script], capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stderr
    # Three sites are too few for the bivariate headline; the univariate sensitivity analysis pools two.
    assert "sensitivity: not estimable: 3 usable site(s)" in result.stdout
    assert "left out of the univariate sensitivity analysis: skarrow-specialist" in result.stdout
    analysis = json.loads((work / "analysis.json").read_text())
    assert [s["site_id"] for s in analysis["sites"]] == [
        "amberlow-referral",
        "northvale-community",
        "skarrow-specialist",
    ]
    assert analysis["pooled"]["sensitivity"] is None
    univariate = analysis["pooled"]["sensitivity_analyses"]["univariate"]
    assert univariate["sites_pooled"] == ["amberlow-referral", "northvale-community"]
    assert 0.0 < univariate["sensitivity"]["estimate"] < 1.0
