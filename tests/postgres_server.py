"""A throw-away PostgreSQL cluster with PostGIS for the tests: initdb + pg_ctl on a loopback port in a
temporary folder, torn down afterwards.  No mock: the merge is tested against the real server.

Where the server or PostGIS is not installed (Debian packages postgresql and postgresql-postgis;
.ci/run installs them best effort), ``start`` says why and the tests that need it are skipped.
"""

from __future__ import annotations

import glob
import os
import shutil
import socket
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path


@dataclass
class Server:
    folder: Path
    bindir: Path
    port: int
    as_user: list[str]

    @property
    def conninfo(self) -> str:
        return f"host=127.0.0.1 port={self.port} user=overlay dbname=postgres"

    def database(self, name: str) -> str:
        """A new database with PostGIS; its connection string."""
        import psycopg

        with psycopg.connect(self.conninfo, autocommit=True) as con:
            con.execute(f'DROP DATABASE IF EXISTS "{name}"')
            con.execute(f'CREATE DATABASE "{name}"')
        conninfo = f"host=127.0.0.1 port={self.port} user=overlay dbname={name}"
        with psycopg.connect(conninfo, autocommit=True) as con:
            con.execute("CREATE EXTENSION postgis")
        return conninfo

    def stop(self) -> None:
        subprocess.run([*self.as_user, str(self.bindir / "pg_ctl"), "-D", str(self.folder / "data"), "stop", "-m",
                        "immediate", "-w"], capture_output=True, timeout=60)
        shutil.rmtree(self.folder, ignore_errors=True)


def _bindir() -> Path | None:
    found = shutil.which("initdb")
    if found:
        return Path(os.path.realpath(found)).parent
    dirs = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"), key=lambda p: int(p.split("/")[4]))
    return Path(dirs[-1]).parent if dirs else None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def start() -> Server | str:
    """A running server, or the reason there is none."""
    try:
        import psycopg  # noqa: F401
    except ImportError:
        return "psycopg (PyPI psycopg[binary]) not installed"
    bindir = _bindir()
    if bindir is None:
        return "PostgreSQL server (Debian postgresql) not installed"
    share = Path("/usr/share/postgresql") / bindir.parent.name / "extension" / "postgis.control"
    if bindir.parent.parent.name == "postgresql" and not share.exists():
        return f"PostGIS (Debian postgresql-postgis) not installed for PostgreSQL {bindir.parent.name}"
    as_user: list[str] = []
    folder = Path(tempfile.mkdtemp(prefix="overlay-pg-"))
    if os.geteuid() == 0:  # initdb refuses to run as root: run the server as the postgres account
        try:
            import pwd

            pw = pwd.getpwnam("postgres")
        except KeyError:
            return "running as root and no postgres account to run the server as"
        os.chown(folder, pw.pw_uid, pw.pw_gid)
        as_user = ["runuser", "-u", "postgres", "--"]
    port = _free_port()
    data, log = folder / "data", folder / "log"
    steps = [
        [str(bindir / "initdb"), "-D", str(data), "-A", "trust", "-U", "overlay", "-E", "UTF8", "--no-sync"],
        [str(bindir / "pg_ctl"), "-D", str(data), "-l", str(log), "-w", "-t", "60", "-o",
         f"-p {port} -k {folder} -c listen_addresses=127.0.0.1 -c fsync=off -c max_connections=60", "start"],
    ]
    for cmd in steps:
        done = subprocess.run([*as_user, *cmd], capture_output=True, text=True, timeout=120)
        if done.returncode != 0:
            shutil.rmtree(folder, ignore_errors=True)
            return f"could not start a PostgreSQL cluster ({' '.join(cmd[:1])}: {(done.stderr or done.stdout)[-300:]})"
    server = Server(folder, bindir, port, as_user)
    try:
        server.database("probe")
    except Exception as exc:  # PostGIS missing for this server version, most likely
        server.stop()
        return f"PostGIS not available in the test cluster ({str(exc).strip()[:200]})"
    return server
