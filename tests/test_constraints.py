"""constraints.txt pins every package the agent and its tests use, and the installed environment is the pinned one.

The site agent's releases depend on numerical libraries (which cells the audit withholds turns on scipy's
HiGHS and numpy), so `make install` takes every package at the version in constraints.txt; these checks
catch a dependency added to pyproject.toml without `make constraints`, and an environment that drifted.
"""

from __future__ import annotations

import importlib.metadata
import re
import tomllib
from pathlib import Path

from packaging.requirements import Requirement
from packaging.utils import canonicalize_name

ROOT = Path(__file__).resolve().parents[1]


def pins() -> dict[str, str]:
    out = {}
    for number, line in enumerate((ROOT / "constraints.txt").read_text().splitlines(), 1):
        if not line.strip() or line.startswith("#"):
            continue
        match = re.fullmatch(r"([A-Za-z0-9._-]+)==([A-Za-z0-9.+!_-]+)", line.strip())
        assert match, f"constraints.txt line {number}: not 'name==version': {line!r}"
        out[canonicalize_name(match[1])] = match[2]
    return out


def test_every_dependency_is_pinned() -> None:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    wanted = [*project["dependencies"], *project["optional-dependencies"]["test"]]
    pinned = pins()
    missing = [r for r in wanted if canonicalize_name(Requirement(r).name) not in pinned]
    assert not missing, f"not in constraints.txt (run make constraints): {missing}"
    for requirement in map(Requirement, wanted):  # each pin satisfies pyproject's own range
        assert requirement.specifier.contains(pinned[canonicalize_name(requirement.name)], prereleases=True)


def test_the_environment_is_the_pinned_one() -> None:
    installed = {canonicalize_name(d.metadata["Name"]): d.version for d in importlib.metadata.distributions()}
    drifted = {name: (pinned, installed.get(name)) for name, pinned in pins().items() if installed.get(name) != pinned}
    assert not drifted, f"installed versions differ from constraints.txt (pinned, installed): {drifted}"
