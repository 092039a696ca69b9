"""A station file this user cannot write: the read side reads it, `serve` refuses it in words.

An archive or a reviewer's copy is a file of mode 0444, or a file in a folder of mode 0555.
Root ignores file modes, so under root each command runs in a forked child that has dropped to
the unprivileged uid 65534 (nobody) first; as a normal user the modes bind us directly. The
recorded session is the invented example worksheet (Example Clinic (fictional)).
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT, EXIT_OK
from chargebook.acquire.record.store import Store
from recorded_session import recorded_station

NOBODY = 65534
READ_COMMANDS = (
    ["sessions"],
    ["show", "1"],
    ["export", "1", "--format", "json"],
    ["history", "--beam", "6 MV"],
    ["verify", "1"],
)


@pytest.fixture
def shared_folder() -> Iterator[Path]:
    """A folder anyone can enter (pytest's own tmp folders are private to root)."""
    folder = Path(tempfile.mkdtemp(prefix="chargebook-ro-test-", dir="/tmp"))
    folder.chmod(0o755)
    yield folder
    for path in folder.rglob("*"):
        if path.is_dir():
            path.chmod(0o755)
    shutil.rmtree(folder)


def _run_unprivileged(argv: list[str]) -> tuple[int, str, str]:
    """Run ``chargebook argv`` as a user bound by file modes; return (status, stdout, stderr)."""

    def run() -> tuple[int, str, str]:
        out, err = io.StringIO(), io.StringIO()
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                status = main(argv)
            except SystemExit as exit_:
                status = int(exit_.code or 0)
            except Exception as error:  # a traceback is what the test must catch
                status, err = 99, io.StringIO(f"{type(error).__name__}: {error}")
        return status, out.getvalue(), err.getvalue()

    if os.getuid() != 0:
        return run()
    read_end, write_end = os.pipe()
    child = os.fork()
    if child == 0:  # pragma: no cover - runs in the child
        try:
            os.setgid(NOBODY)
            os.setuid(NOBODY)
            os.write(write_end, json.dumps(run()).encode())
        finally:
            os._exit(0)
    os.close(write_end)
    with os.fdopen(read_end, "rb") as reader:
        data = reader.read()
    os.waitpid(child, 0)
    status, out, err = json.loads(data)
    return status, out, err


def _station(folder: Path) -> Path:
    """Record the example session in ``folder`` and close it as a daemon leaves it."""
    path = recorded_station(folder)
    for path_in in folder.iterdir():
        path_in.chmod(0o644)
    return path


def _warm_up(path: Path, argv: list[str]) -> None:
    """Run the command once as ourselves on a writable copy, so that the modules it imports
    lazily are loaded before a child without access to the virtualenv runs it."""
    copy = path.with_name("warm-up.sqlite")
    shutil.copyfile(path, copy)
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        main([*argv, "--db", str(copy)])
    for leftover in path.parent.glob("warm-up.sqlite*"):
        leftover.unlink()


@pytest.mark.parametrize("argv", READ_COMMANDS, ids=lambda argv: argv[0])
def test_read_commands_read_a_file_of_mode_0444(shared_folder: Path, argv: list[str]) -> None:
    path = _station(shared_folder)
    _warm_up(path, argv)
    path.chmod(0o444)
    status, out, err = _run_unprivileged([*argv, "--db", str(path)])
    assert (status, err) == (EXIT_OK, ""), err
    assert "readonly" not in out
    if argv[0] == "verify":
        assert "the record verifies" in out
    elif argv[0] == "show":
        assert "Correction factors" in out
    assert sorted(p.name for p in shared_folder.iterdir()) == [path.name]  # nothing left


@pytest.mark.parametrize("argv", READ_COMMANDS, ids=lambda argv: argv[0])
def test_read_commands_read_a_file_in_a_read_only_folder(
    shared_folder: Path, argv: list[str]
) -> None:
    path = _station(shared_folder / "archive")
    _warm_up(path, argv)
    path.parent.chmod(0o555)
    status, _out, err = _run_unprivileged([*argv, "--db", str(path)])
    assert (status, err) == (EXIT_OK, ""), err


def test_a_session_still_in_the_wal_is_read_from_an_unwritable_copy(shared_folder: Path) -> None:
    # After a kill -9 the last commits live only in the -wal file: the snapshot must carry it.
    live = _station(shared_folder / "live")
    _warm_up(live, ["sessions"])
    writer = Store.open(live)
    writer.db.execute("PRAGMA wal_autocheckpoint = 0")
    before = len(writer.sessions())
    writer.create_session({}, {}, "trs398", "6 MV")  # committed into the -wal only
    archive = shared_folder / "archive"
    archive.mkdir()
    for name in (live.name, live.name + "-wal"):  # the files as a crash leaves them
        shutil.copyfile(live.with_name(name), archive / name)
        (archive / name).chmod(0o444)
    writer.close()
    archive.chmod(0o555)
    status, out, err = _run_unprivileged(["sessions", "--json", "--db", str(archive / live.name)])
    assert (status, err) == (EXIT_OK, ""), err
    assert len(json.loads(out)) == before + 1


def test_serve_refuses_a_read_only_file_in_words(shared_folder: Path) -> None:
    path = _station(shared_folder)
    path.chmod(0o444)
    shared_folder.chmod(0o777)  # the folder is writable (by nobody too): only the file is not
    argv = ["serve", "--profile", "query-plain", "--port", "/dev/null", "--db", str(path)]
    argv += ["--socket", str(shared_folder / "run" / "daemon.sock")]  # its own 0700 folder
    _warm_up_serve()
    status, _out, err = _run_unprivileged(argv)
    assert status == EXIT_INVALID_INPUT
    assert "read-only for this user" in err and "Traceback" not in err


def test_serve_refuses_a_new_database_in_an_unwritable_folder_in_words(
    shared_folder: Path,
) -> None:
    folder = shared_folder / "locked"
    folder.mkdir(mode=0o555)
    folder.chmod(0o555)
    shared_folder.chmod(0o777)  # where the daemon may make its socket's own 0700 folder
    argv = ["serve", "--profile", "query-plain", "--port", "/dev/null"]
    argv += ["--db", str(folder / "new.sqlite")]
    argv += ["--socket", str(shared_folder / "run" / "daemon.sock")]  # its own 0700 folder
    _warm_up_serve()
    status, _out, err = _run_unprivileged(argv)
    assert status == EXIT_INVALID_INPUT
    assert f"the folder {folder} is not writable" in err
    assert list(folder.iterdir()) == []


def test_serve_refuses_a_damaged_file_in_words(tmp_path: Path, capsys) -> None:
    path = recorded_station(tmp_path)
    with path.open("r+b") as file:  # scribble over the second page, a table's b-tree
        file.seek(4096 + 8)
        file.write(b"\x07" * 3000)
    argv = ["serve", "--profile", "query-plain", "--port", "/dev/null", "--db", str(path)]
    status = main([*argv, "--socket", str(tmp_path / "daemon.sock")])
    err = capsys.readouterr().err
    assert status == EXIT_INVALID_INPUT
    assert "is damaged (SQLite's quick integrity check" in err and "Traceback" not in err
    assert not (tmp_path / "daemon.sock").exists()


def _warm_up_serve() -> None:
    """Load what `serve` imports lazily (see :func:`_warm_up`)."""
    from chargebook.acquire.daemon import daemon, main  # noqa: F401
    from chargebook.drivers_generic import build_electrometer, load_profile  # noqa: F401

    load_profile("query-plain")
