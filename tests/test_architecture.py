"""The rooms keep to their rules: import-linter checks the contracts declared in pyproject.toml."""

import subprocess
import sys
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_import_contracts_hold() -> None:
    result = subprocess.run(
        ["bash", str(ROOT / ".ci" / "lint-imports")],
        capture_output=True,
        text=True,
        env={"PYTHON": sys.executable, "PATH": "/usr/bin:/bin"},
        timeout=120,
    )
    assert result.returncode == 0, result.stdout + result.stderr
    declared = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["importlinter"][
        "contracts"
    ]
    assert f"Contracts: {len(declared)} kept, 0 broken." in result.stdout
