"""The type checker of CI (.ci/typecheck, mypy as [tool.mypy] in pyproject.toml sets it).

The package passes it, and it catches what the typed vocabularies are for: an event detail of
the wrong shape, a driver command's value read as another quantity, a snapshot missing a key.
"""

import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

#: Code with one mistake per line the checker must name (the line numbers are asserted).
MISTAKES = textwrap.dedent(
    """\
    from chargebook.acquire.engine.driver_commands import SetBias
    from chargebook.acquire.protocol import LiveReading
    from chargebook.acquire.record.events import BiasChanged

    changed: BiasChanged = {"volts": 300.0}
    monitor_units: float = SetBias(bias_V=300.0).monitor_units
    live: LiveReading = {"phase": "idle"}
    """
)


@pytest.mark.slow
def test_the_package_passes_the_type_checker_and_it_names_each_mistake(tmp_path: Path) -> None:
    mistakes = tmp_path / "mistakes.py"
    mistakes.write_text(MISTAKES)
    result = subprocess.run(
        ["bash", str(ROOT / ".ci" / "typecheck"), str(mistakes)],
        capture_output=True,
        text=True,
        env={"PYTHON": sys.executable, "PATH": "/usr/bin:/bin"},
        timeout=300,
    )
    errors = [line for line in result.stdout.splitlines() if ": error:" in line]
    assert result.returncode == 1, result.stdout + result.stderr
    # Every error is in the mistakes: the package itself is clean.
    assert all(line.startswith(str(mistakes)) for line in errors), result.stdout
    by_line = {int(line.split(":")[1]): line for line in errors}
    assert '"how"' in by_line[5]  # the detail of bias_changed lacks its key
    assert '"monitor_units"' in by_line[6]  # SetBias carries volts, never MU
    assert "LiveReading" in by_line[7] and '"charge_nC"' in by_line[7]
    assert len(errors) == 3
