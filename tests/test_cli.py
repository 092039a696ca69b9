"""The command line as a shell user meets it: version, `python -m`, help, exit codes, completion."""

from __future__ import annotations

import shutil
import subprocess
import sys
from importlib.metadata import version
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import COMMANDS, build_parser
from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT, EXIT_OK

ROOT = Path(__file__).resolve().parents[1]


def _chargebook(*argv: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "chargebook", *argv], capture_output=True, text=True, timeout=60
    )


def test_version_comes_from_the_installed_metadata() -> None:
    done = _chargebook("--version")
    assert done.returncode == EXIT_OK, done.stderr
    assert done.stdout.strip() == f"chargebook {version('chargebook')}"


def test_python_dash_m_chargebook_is_the_command_line() -> None:
    done = _chargebook("--help")
    assert done.returncode == EXIT_OK, done.stderr
    assert done.stdout.startswith("usage: chargebook ")
    assert all(name in done.stdout for name in COMMANDS)


def test_no_command_prints_help_on_stderr_and_exits_2() -> None:
    done = _chargebook()
    assert done.returncode == EXIT_INVALID_INPUT
    assert done.stdout == ""
    assert done.stderr.startswith("usage: chargebook ")


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_every_command_states_its_exit_status_in_its_help(name: str) -> None:
    parser = build_parser()
    subparsers = next(a for a in parser._actions if a.dest == "command")
    text = " ".join(subparsers.choices[name].format_help().split())
    assert "exit status: 0 done; 1 the command ran and found a failure" in text
    assert "2 the input cannot be used" in text


@pytest.mark.skipif(shutil.which("bash") is None, reason="bash is not installed")
def test_the_bash_completion_script_completes_commands_and_options() -> None:
    script = _chargebook("completion", "bash")
    assert script.returncode == EXIT_OK, script.stderr
    # Source the generated script in a real bash and ask its completion function, as the
    # shell does at a Tab: first for "chargebook s", then for "chargebook export 1 --fo".
    probe = (
        script.stdout
        + """
complete_words() {
    COMP_WORDS=("$@"); COMP_CWORD=$(( ${#COMP_WORDS[@]} - 1 ))
    COMP_LINE="$*"; COMP_POINT=${#COMP_LINE}; COMPREPLY=()
    fn=$(complete -p chargebook | sed -E 's/.*-F ([^ ]+).*/\\1/')
    "$fn" chargebook "${COMP_WORDS[COMP_CWORD]}" "${COMP_WORDS[COMP_CWORD-1]}"
    printf '%s\\n' "${COMPREPLY[@]}"
}
echo "== commands"; complete_words chargebook s
echo "== options"; complete_words chargebook export 1 --fo
"""
    )
    done = subprocess.run(["bash", "-c", probe], capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    commands, options = done.stdout.split("== options")
    assert {"show", "sessions", "serve", "simulate"} <= set(commands.split())
    assert "export" not in commands.split()
    assert "--format" in options.split()


def test_the_zsh_completion_script_names_every_command() -> None:
    done = _chargebook("completion", "zsh")
    assert done.returncode == EXIT_OK, done.stderr
    assert done.stdout.startswith("#compdef chargebook")
    assert all(f"\n    {name}:'" in done.stdout for name in COMMANDS)


@pytest.mark.parametrize(
    "argv", [("correct", "acquire/examples/demo-la1-6mv.toml"), ("ports",), ("completion", "zsh")]
)
def test_every_command_stops_quietly_when_its_reader_goes_away(argv: tuple[str, ...]) -> None:
    process = subprocess.Popen(
        [sys.executable, "-m", "chargebook", *argv],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        cwd=ROOT,
    )
    process.stdout.close()  # like `| head` exiting before anything is written
    _, err = process.communicate(timeout=60)
    assert b"Traceback" not in err and err == b""
