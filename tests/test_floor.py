"""The declared minimum versions and the constraints file CI installs them from agree.

.ci/run installs chargebook with constraints-floor.txt in a second virtualenv and runs a short
smoke there; this test keeps that file the floors pyproject.toml declares, so the floor job
tests what a lab's pip may really install.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

from packaging.requirements import Requirement
from packaging.version import Version

ROOT = Path(__file__).parents[1]


def _floors() -> dict[str, Version]:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    floors = {}
    for text in project["dependencies"]:
        requirement = Requirement(text)
        (lower,) = [s.version for s in requirement.specifier if s.operator == ">="]
        floors[requirement.name.lower()] = Version(lower)
    return floors


def _pins() -> dict[str, Version]:
    pins = {}
    for line in (ROOT / "constraints-floor.txt").read_text().splitlines():
        line = line.split("#")[0].strip()
        if line:
            requirement = Requirement(line)
            (pin,) = [s.version for s in requirement.specifier if s.operator == "=="]
            pins[requirement.name.lower()] = Version(pin)
    return pins


def test_every_dependency_has_a_floor_and_the_constraints_pin_exactly_it():
    floors = _floors()
    assert set(floors) == set(_pins()), "constraints-floor.txt names other packages"
    assert _pins() == floors  # Version("1.26") == Version("1.26.0")


def test_the_declared_python_versions_are_the_classifiers():
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    declared = {c.rsplit(" ", 1)[1] for c in project["classifiers"] if "Python :: 3." in c}
    assert declared == {"3.11", "3.12", "3.13"}
    assert project["requires-python"] == ">=3.11"
