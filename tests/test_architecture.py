"""The rooms keep to their rules: import-linter checks the contracts declared in pyproject.toml."""

import subprocess
import sys
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
    assert "Contracts: 3 kept, 0 broken." in result.stdout
