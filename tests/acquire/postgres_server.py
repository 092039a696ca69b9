"""A private PostgreSQL server for the department record's tests, from Debian's packages.

``apt-get install postgresql`` (``.ci/run`` does) puts initdb and pg_ctl in
/usr/lib/postgresql/VERSION/bin. The cluster lives in a new folder under the system's temporary
directory, listens on a Unix socket there and on no TCP port (``listen_addresses=''``), trusts
local connections, and is stopped and removed at the end. PostgreSQL refuses to run as root (CI
runs as root): then the cluster runs as ``nobody``, through ``runuser``.
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import subprocess
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

#: The cluster's superuser, who owns the department database.
OWNER = "chargebook_owner"
DATABASE = "department"
UNPRIVILEGED = "nobody"


def server_bin() -> Path:
    """Return the folder of Debian's PostgreSQL programs (the newest version installed)."""
    found = sorted(
        glob.glob("/usr/lib/postgresql/*/bin/pg_ctl"), key=lambda p: int(Path(p).parts[4])
    )
    if not found:
        raise RuntimeError(
            "PostgreSQL's server is not installed: apt-get install -y postgresql "
            "(Debian's package; .ci/run installs it)"
        )
    return Path(found[-1]).parent


@dataclass(frozen=True)
class Server:
    """A running private cluster: its socket folder and how to reach a database on it."""

    folder: Path
    socket_dir: Path

    def url(self, user: str = OWNER, database: str = DATABASE) -> str:
        """Return the libpq URL of ``database`` as ``user``, over the Unix socket."""
        return f"postgresql://{user}@/{database}?host={self.socket_dir}"

    def new_database(self, name: str) -> str:
        """Create an empty database ``name`` owned by the cluster's owner; return its URL."""
        import psycopg

        with psycopg.connect(self.url(), autocommit=True) as connection:
            connection.execute(f'CREATE DATABASE "{name}"')
        return self.url(database=name)


def _as_server_user(command: list[str]) -> list[str]:
    if os.geteuid() != 0:
        return command
    return ["runuser", "-u", UNPRIVILEGED, "--", *command]


@contextmanager
def running_server() -> Iterator[Server]:
    """Start a private cluster with an empty ``department`` database; stop and remove it after."""
    programs = server_bin()
    folder = Path(tempfile.mkdtemp(prefix="chargebook-pg-"))
    data, sockets = folder / "data", folder / "run"
    sockets.mkdir()
    if os.geteuid() == 0:
        user = pwd.getpwnam(UNPRIVILEGED)
        for path in (folder, sockets):
            os.chown(path, user.pw_uid, user.pw_gid)
    log = folder / "server.log"
    run = dict(check=True, capture_output=True, text=True, timeout=120, cwd=folder)
    subprocess.run(
        _as_server_user(
            [str(programs / "initdb"), "-D", str(data), "-U", OWNER, "-A", "trust", "--no-sync"]
        ),
        **run,
    )
    options = f"-k {sockets} -c listen_addresses='' -c fsync=off -c full_page_writes=off"
    start = [str(programs / "pg_ctl"), "-D", str(data), "-l", str(log), "-o", options, "-w"]
    try:
        subprocess.run(_as_server_user([*start, "start"]), **run)
        server = Server(folder, sockets)
        subprocess.run(
            [str(programs / "createdb"), "-h", str(sockets), "-U", OWNER, DATABASE], **run
        )
        yield server
    finally:
        subprocess.run(
            _as_server_user([str(programs / "pg_ctl"), "-D", str(data), "-m", "fast", "stop"]),
            capture_output=True,
            timeout=120,
            cwd=folder,
        )
        shutil.rmtree(folder, ignore_errors=True)
