"""A throwaway PostgreSQL server for tests and the benchmark: started, used, stopped.

The server binaries come from the distribution's packages (Debian installs them under
``/usr/lib/postgresql/<version>/bin``; ``.ci/run`` installs them). ``initdb`` refuses to run
as root, so as root the server runs as the ``postgres`` user (``runuser``), with its data
directory in a temporary folder that user owns. It listens on 127.0.0.1 only, on a random free
port, with password authentication (scram-sha-256) so wrong passwords can be tested.
"""

from __future__ import annotations

import os
import pwd
import secrets
import shutil
import socket
import subprocess
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import quote

ADMIN = "ascertain_admin"


def find_bindir() -> Path | None:
    """The folder holding initdb and pg_ctl (newest Debian version first, then PATH)."""
    versions = sorted(
        Path("/usr/lib/postgresql").glob("*/bin/initdb"),
        key=lambda p: int(p.parent.parent.name) if p.parent.parent.name.isdigit() else 0,
    )
    if versions:
        return versions[-1].parent
    found = shutil.which("initdb")
    return Path(found).parent if found else None


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


@dataclass(frozen=True)
class Server:
    """A running server: where it listens and the administrator's password."""

    host: str
    port: int
    admin: str
    admin_password: str

    def uri(self, database: str = "postgres", user: str | None = None) -> str:
        """A connection URI without password (libpq reads it from PGPASSWORD or a file)."""
        return f"postgresql://{user or self.admin}@{self.host}:{self.port}/{database}"

    def connect(self, database: str = "postgres", user: str | None = None, password: str = ""):
        """An ADBC DB-API connection in autocommit mode (for loading test data)."""
        import adbc_driver_postgresql.dbapi as pg

        secret = quote(password or self.admin_password, safe="")
        uri = self.uri(database, user).replace("@", f":{secret}@", 1)
        return pg.connect(uri, autocommit=True)


@contextmanager
def running_server() -> Iterator[Server]:
    """Start a server in a temporary data directory and stop it (and delete it) afterwards.

    Raises:
        RuntimeError: No PostgreSQL binaries, or the server did not start.
    """
    bindir = find_bindir()
    if bindir is None:
        raise RuntimeError("PostgreSQL server binaries (initdb, pg_ctl) are not installed")
    as_root = os.geteuid() == 0
    prefix = ["runuser", "-u", "postgres", "--"] if as_root else []
    folder = Path(tempfile.mkdtemp(prefix="ascertain-pg-"))
    data, pwfile = folder / "data", folder / "pw"
    password = secrets.token_urlsafe(16)
    pwfile.write_text(password + "\n", encoding="utf-8")
    if as_root:
        user = pwd.getpwnam("postgres")
        for path in (folder, pwfile):
            os.chown(path, user.pw_uid, user.pw_gid)
    port = _free_port()

    def run(*args: str) -> None:
        subprocess.run([*prefix, *args], check=True, capture_output=True, cwd=folder)

    started = False
    try:
        run(
            str(bindir / "initdb"), "-D", str(data), "-U", ADMIN, "--auth=scram-sha-256",
            f"--pwfile={pwfile}", "--no-sync", "--encoding=UTF8", "--locale=C",
        )  # fmt: skip
        options = f"-c listen_addresses=127.0.0.1 -p {port} -k {folder} -c fsync=off"
        run(
            str(bindir / "pg_ctl"),
            "-D",
            str(data),
            "-o",
            options,
            "-w",
            "-l",
            str(folder / "log"),
            "start",
        )
        started = True
        yield Server("127.0.0.1", port, ADMIN, password)
    except subprocess.CalledProcessError as err:
        log = folder / "log"
        detail = log.read_text(errors="replace") if log.exists() else ""
        raise RuntimeError(f"PostgreSQL failed: {err.stderr!r} {detail}") from err
    finally:
        if started:
            subprocess.run(
                [*prefix, str(bindir / "pg_ctl"), "-D", str(data), "-m", "immediate", "stop"],
                check=False,
                capture_output=True,
            )
        shutil.rmtree(folder, ignore_errors=True)
