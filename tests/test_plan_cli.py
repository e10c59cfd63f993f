"""`federation plan` end to end: the single-site plan against Buderer's (1996) sample size, the search for the
number of sites with its figure, and bad input as one line with exit code 1."""

from __future__ import annotations

import json
import re
import shlex
from pathlib import Path

import pytest

from federation.cli import main


def test_single_site_plan_meets_buderer(capsys: pytest.CaptureFixture[str]) -> None:
    # Buderer (1996): sensitivity 0.80 within +/- 0.05 at prevalence 0.20 needs 1.96^2 * 0.8 * 0.2 / 0.05^2 / 0.2
    # = 1229.3, so 1230 participants; one site of that size gives an interval about 0.10 wide.
    code = main(
        [
            "plan", "--sensitivity", "0.8", "--specificity", "0.9", "--prevalence", "0.2",
            "--tau-sensitivity", "0", "--tau-specificity", "0", "--sites", "1", "--participants", "1230",
            "--simulations", "400", "--json",
        ]
    )  # fmt: skip
    assert code == 0
    plan = json.loads(capsys.readouterr().out)["plan"]
    assert plan["sensitivity_ci"]["median"] == pytest.approx(0.10, abs=0.003)
    assert plan["sensitivity_prediction"]["computed"] == 0
    assert plan["scenario"]["site_sizes"] == [1230]


def test_search_for_sites_writes_table_and_figure(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    figure = tmp_path / "plan.svg"
    args = [
        "plan", "--sensitivity", "0.85", "--specificity", "0.8", "--prevalence", "0.2:0.3",
        "--tau-sensitivity", "0.2", "--tau-specificity", "0.2", "--sites", "3", "--participants", "1500",
        "--simulations", "2", "--target-width", "0.2", "--measure", "sensitivity", "--max-sites", "6",
    ]  # fmt: skip
    assert main([*args, "--plot", str(figure)]) == 0
    text = capsys.readouterr().out
    assert "Sites of 1500 participants" in text and "Buderer 1996" in text and f"wrote {figure}" in text
    assert figure.read_text().startswith("<svg") and "target width 0.2" in figure.read_text()
    assert main([*args, "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    needed = result["sites_needed"]
    assert needed["sites"] is not None and 2 <= needed["sites"] <= 6
    # Buderer (1996) for sensitivity 0.85 +/- 0.1 at prevalence 0.25: 1.96^2 * 0.85 * 0.15 / 0.01 / 0.25 -> 196.
    assert result["buderer"]["sensitivity"]["participants"] == 196


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--prevalence", "0.3:0.1"], "--prevalence"),
        (["--prevalence", "0.1", "--site-sizes", "100,abc"], "--site-sizes"),
        (["--prevalence", "0.1"], "--site-sizes N,N,... or --sites K --participants N"),
        (["--prevalence", "0.1", "--sites", "3", "--participants", "100", "--tau-sensitivity", "9"], "tau_sensitivity"),
    ],
)
def test_bad_input_is_one_line(extra: list[str], message: str, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["plan", "--sensitivity", "0.8", "--specificity", "0.9", *extra]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0] and "Traceback" not in err[0]


def test_the_coordinator_guides_plan_command_runs(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    text = (Path(__file__).resolve().parents[1] / "docs" / "coordinator.md").read_text()
    command = re.search(r"```sh\n\$F (plan .*?)```", text, re.S).group(1).replace("\\\n", " ")
    argv = [a.replace("$W", str(tmp_path)) for a in shlex.split(command)]
    assert main([*argv, "--simulations", "2", "--max-sites", "12"]) == 0
    assert "Sites of 400 participants" in capsys.readouterr().out
    assert (tmp_path / "plan.svg").read_text().startswith("<svg")
