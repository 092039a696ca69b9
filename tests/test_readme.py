"""The README stays true: its quickstart is what CI runs, and every command is documented."""

import importlib
import re
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import COMMANDS
from chargebook.acquire.protocol import CAUTION

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")


def _quickstart_commands() -> list[str]:
    section = README.split("## Quickstart", 1)[1].split("\n## ", 1)[0]
    block = re.search(r"```bash\n(.*?)```", section, re.S)
    assert block, "the quickstart has a bash block"
    return [line for line in block.group(1).splitlines() if line.strip()]


def test_the_quickstart_is_two_commands_installing_and_running_the_demo_then_the_tests() -> None:
    install_and_run, run_tests = _quickstart_commands()
    assert "pip install -e '.[test]'" in install_and_run
    assert install_and_run.endswith("chargebook demo")
    assert "pytest" in run_tests


def test_ci_runs_the_readme_test_command() -> None:
    ci_lines = (ROOT / ".ci" / "run").read_text(encoding="utf-8").splitlines()
    assert _quickstart_commands()[1] in ci_lines


def test_the_readme_carries_the_safety_caution() -> None:
    flat = " ".join(README.split())
    assert CAUTION.replace("chargebook", "**chargebook", 1) in flat or CAUTION in flat


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_every_command_is_in_the_readme_with_its_help_text(name: str) -> None:
    module = importlib.import_module(f"chargebook.acquire.commands.{COMMANDS[name]}")
    assert f"`chargebook {name}` — {module.HELP}" in README


def test_no_placeholder_is_left_in_the_readme() -> None:
    assert not re.search(r"\b[A-Z]+_(SECTION|HELP)\b", README)
