"""A real PostgreSQL server for the tests: the one named by ARFLOW_TEST_PG_URL, or a throwaway cluster.

Without ``ARFLOW_TEST_PG_URL`` the harness looks for the server binaries
(``initdb``/``pg_ctl`` on PATH, ``pg_config --bindir``, or Debian's
``/usr/lib/postgresql/<version>/bin``), creates a cluster in a temporary folder
owned by a non-root user (``postgres`` when running as root: the server refuses
to run as root), listening only on 127.0.0.1 at a free port and on a Unix socket
inside that folder, and removes it all at the end. TCP logins need a password
(SCRAM); the tests give it through a password file, as users do.

``ARFLOW_TEST_PG_URL`` must name a role that may create databases and roles
(e.g. ``postgresql://postgres@127.0.0.1:5432/postgres``; its password comes from
the usual PG* variables or ~/.pgpass).

Also a command: ``python tests/pg_server.py`` starts a cluster, prints its
admin URL and keeps it up until Ctrl-C (for trying things by hand).
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
import time
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import quote, unquote, urlsplit

# statements on an ADBC connection: the package's own helpers (one cursor per statement, rows as tuples)
from arflow.warehouse.postgres_target import execute
from arflow.warehouse.postgres_target import fetch_rows as fetch

ADMIN = "arflow_admin"
#: the throwaway cluster's superuser password (the cluster lives for one test session, on 127.0.0.1 only)
ADMIN_PASSWORD = "arflow-test-" + uuid.uuid4().hex[:12]


class ServerUnavailable(RuntimeError):
    """No server URL was given and no PostgreSQL server binaries were found."""


def find_bindir() -> Path | None:
    """The folder holding initdb and pg_ctl, or None."""
    on_path = shutil.which("initdb")
    if on_path and shutil.which("pg_ctl"):
        return Path(on_path).parent
    pg_config = shutil.which("pg_config")
    if pg_config:
        try:
            out = subprocess.run([pg_config, "--bindir"], capture_output=True, text=True, timeout=10).stdout.strip()
            if out and (Path(out) / "initdb").is_file():
                return Path(out)
        except (OSError, subprocess.SubprocessError):
            pass
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"), key=lambda p: int(Path(p).parts[-3]) if Path(p).parts[-3].isdigit() else 0)
    return Path(found[-1]).parent if found else None


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class PgServer:
    """Where the test server is and how to reach it as its administrator."""

    host: str
    port: int
    admin_user: str
    admin_password: str | None
    admin_db: str = "postgres"
    folder: Path | None = None  # the throwaway cluster's folder (None: a server we did not start)
    _run_as: list[str] = field(default_factory=list)
    _bindir: Path | None = None

    def url(self, user: str | None = None, database: str | None = None) -> str:
        """A password-free URL (passwords come from a password file or PGPASSWORD)."""
        return f"postgresql://{user or self.admin_user}@{self.host}:{self.port}/{database or self.admin_db}"

    def admin_conninfo(self, database: str | None = None) -> str:
        parts = [f"host={self.host}", f"port={self.port}", f"user={self.admin_user}", f"dbname={database or self.admin_db}"]
        if self.admin_password is not None:
            parts.append(f"password={self.admin_password}")
        return " ".join(parts)

    def admin_url(self, database: str | None = None) -> str:
        """The administrator's URL, password included (test harness only: never a job file)."""
        secret = f":{quote(self.admin_password, safe='')}" if self.admin_password else ""
        return f"postgresql://{quote(self.admin_user, safe='')}{secret}@{self.host}:{self.port}/{database or self.admin_db}"

    def stop(self) -> None:
        if self.folder is None or self._bindir is None:
            return
        stop_cluster(self._bindir, self._run_as, self.folder / "data")
        shutil.rmtree(self.folder, ignore_errors=True)
        self.folder = None


def from_url(url: str) -> PgServer:
    """The server named by a libpq URL (password from the URL, else PGPASSWORD, else the password file)."""
    parts = urlsplit(url)
    return PgServer(
        host=parts.hostname or os.environ.get("PGHOST") or "127.0.0.1",
        port=int(parts.port or os.environ.get("PGPORT") or 5432),
        admin_user=unquote(parts.username) if parts.username else (os.environ.get("PGUSER") or pwd.getpwuid(os.getuid()).pw_name),
        admin_password=unquote(parts.password) if parts.password else os.environ.get("PGPASSWORD"),
        admin_db=unquote(parts.path.lstrip("/")) or "postgres",
    )


OWNER_FILE = "owner.pid"


def stop_cluster(bindir: Path, run_as: list[str], data: Path) -> None:
    """Stop the server of the cluster in ``data`` at once (``pg_ctl -m immediate``; its folder is thrown away)."""
    subprocess.run([*run_as, str(bindir / "pg_ctl"), "-D", str(data), "-m", "immediate", "-w", "stop"],
                   capture_output=True, timeout=60)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def sweep_orphans(bindir: Path, run_as: list[str]) -> None:
    """Stop and remove clusters of earlier test sessions whose process is gone (killed before it could clean up)."""
    for folder in Path(tempfile.gettempdir()).glob("arflow-pg-*"):
        try:
            owner = int((folder / OWNER_FILE).read_text().strip())
        except (OSError, ValueError):
            continue  # not ours, or still being set up
        if _alive(owner):
            continue
        if (folder / "data" / "postmaster.pid").exists():
            stop_cluster(bindir, run_as, folder / "data")
        shutil.rmtree(folder, ignore_errors=True)


def start_cluster() -> PgServer:
    """initdb + pg_ctl start in a fresh temporary folder; raises ServerUnavailable without binaries."""
    bindir = find_bindir()
    if bindir is None:
        raise ServerUnavailable("no PostgreSQL server binaries (initdb, pg_ctl) found and ARFLOW_TEST_PG_URL is not set")
    run_as: list[str] = []
    if os.geteuid() == 0 and shutil.which("runuser"):
        try:
            pwd.getpwnam("postgres")
            sweep_orphans(bindir, [shutil.which("runuser") or "runuser", "-u", "postgres", "--"])
        except KeyError:
            pass
    elif os.geteuid() != 0:
        sweep_orphans(bindir, [])
    folder = Path(tempfile.mkdtemp(prefix="arflow-pg-"))
    if os.geteuid() == 0:  # the server refuses to run as root: run it as the postgres user (or nobody)
        try:
            user = pwd.getpwnam("postgres")
        except KeyError:
            user = pwd.getpwnam("nobody")
        os.chown(folder, user.pw_uid, user.pw_gid)
        runuser = shutil.which("runuser")
        run_as = [runuser, "-u", user.pw_name, "--"] if runuser else ["su", "-s", "/bin/sh", user.pw_name, "-c"]
        if not runuser:
            raise ServerUnavailable("running as root without runuser: cannot start a cluster as a non-root user")
    folder.chmod(0o700)
    (folder / OWNER_FILE).write_text(str(os.getpid()), encoding="ascii")
    pwfile = folder / "pw"
    pwfile.write_text(ADMIN_PASSWORD + "\n", encoding="ascii")
    if os.geteuid() == 0:
        os.chown(pwfile, folder.stat().st_uid, folder.stat().st_gid)
    data = folder / "data"
    env = {**os.environ, "LC_ALL": "C", "LANG": "C"}
    for key in [k for k in env if k.startswith("PG")]:
        env.pop(key)
    init = subprocess.run(
        [*run_as, str(bindir / "initdb"), "-D", str(data), "-U", ADMIN, f"--pwfile={pwfile}", "--auth-local=trust",
         "--auth-host=scram-sha-256", "-E", "UTF8", "--no-instructions", "--no-sync"],
        capture_output=True, text=True, timeout=180, env=env, cwd=str(folder),
    )
    pwfile.unlink()
    if init.returncode != 0:
        shutil.rmtree(folder, ignore_errors=True)
        raise RuntimeError(f"initdb failed: {init.stderr.strip() or init.stdout.strip()}")
    for _attempt in range(3):
        port = _free_port()
        options = (f"-c listen_addresses=127.0.0.1 -c port={port} -c unix_socket_directories={folder} "
                   "-c fsync=off -c full_page_writes=off -c synchronous_commit=off -c max_connections=60 "
                   "-c shared_buffers=128MB -c max_wal_size=2GB -c log_min_messages=warning")
        start = subprocess.run(
            [*run_as, str(bindir / "pg_ctl"), "-D", str(data), "-l", str(folder / "server.log"), "-w", "-t", "60",
             "-o", options, "start"],
            capture_output=True, text=True, timeout=120, env=env, cwd=str(folder),
        )
        if start.returncode == 0:
            return PgServer("127.0.0.1", port, ADMIN, ADMIN_PASSWORD, "postgres", folder, run_as, bindir)
    log = (folder / "server.log").read_text(errors="replace")[-2000:] if (folder / "server.log").exists() else ""
    shutil.rmtree(folder, ignore_errors=True)
    raise RuntimeError(f"pg_ctl start failed: {start.stderr.strip()} {log}")


def server_from_environment() -> PgServer:
    """ARFLOW_TEST_PG_URL's server, else a throwaway cluster (ServerUnavailable when neither can be had)."""
    url = os.environ.get("ARFLOW_TEST_PG_URL")
    if url:
        return from_url(url)
    return start_cluster()


#: the roles the tests use: the job's (owns the test databases) and a read-only dashboard role
JOB_ROLE = "arflow_job"
READER_ROLE = "arflow_dashboard"
OTHER_ROLE = "arflow_stranger"
ROLE_PASSWORD = {JOB_ROLE: "job-" + uuid.uuid4().hex[:12], READER_ROLE: "dash-" + uuid.uuid4().hex[:12],
                 OTHER_ROLE: "other-" + uuid.uuid4().hex[:12]}
_ORIGINAL_PASSFILE = os.environ.get("PGPASSFILE") or os.path.expanduser("~/.pgpass")


@contextmanager
def admin(server: PgServer, database: str | None = None) -> Iterator[Any]:
    """An autocommit connection as the server's administrator."""
    import adbc_driver_postgresql.dbapi as dbapi

    con = dbapi.connect(server.admin_url(database), autocommit=True)
    try:
        yield con
    finally:
        con.close()


@contextmanager
def connect_as(server: PgServer, role: str, database: str, autocommit: bool = True) -> Iterator[Any]:
    """A connection as one of the test roles (password given explicitly: a second session of a test)."""
    import adbc_driver_postgresql.dbapi as dbapi

    url = f"postgresql://{role}:{quote(ROLE_PASSWORD[role], safe='')}@{server.host}:{server.port}/{database}"
    con = dbapi.connect(url, autocommit=autocommit)
    try:
        yield con
    finally:
        try:
            con.close()
        except Exception:  # noqa: BLE001 - a terminated session
            pass


def create_roles(con: Any) -> None:
    """The test roles, with this session's passwords (created when missing)."""
    for role, password in ROLE_PASSWORD.items():
        literal = password.replace("'", "''")
        execute(con, f"DO $$ BEGIN IF NOT EXISTS (SELECT 1 FROM pg_roles WHERE rolname = '{role}') THEN "
                     f"CREATE ROLE {role} LOGIN; END IF; END $$")
        execute(con, f"ALTER ROLE {role} LOGIN NOSUPERUSER NOCREATEDB NOCREATEROLE PASSWORD '{literal}'")


def passfile_text(server: PgServer) -> str:
    """A password file for the test roles (and the administrator), as a user would write ~/.pgpass."""
    lines = [f"{server.host}:{server.port}:*:{role}:{pw}" for role, pw in ROLE_PASSWORD.items()]
    if server.admin_password:
        lines.append(f"{server.host}:{server.port}:*:{server.admin_user}:{server.admin_password}")
    try:
        lines.append(Path(_ORIGINAL_PASSFILE).read_text(encoding="utf-8").strip())
    except OSError:
        pass
    return "\n".join(lines) + "\n"


@dataclass
class ScratchDatabase:
    """One test's database on the session's server."""

    server: PgServer
    name: str
    passfile: Path

    def url(self, role: str = JOB_ROLE, database: str | None = None) -> str:
        """A password-free URL (the password comes from the password file, as in a job file)."""
        return self.server.url(role, database or self.name)

    def admin(self) -> Any:
        return admin(self.server, self.name)

    def connect_as(self, role: str = JOB_ROLE, autocommit: bool = True) -> Any:
        return connect_as(self.server, role, self.name, autocommit)

    def fetch(self, sql: str, params: tuple[Any, ...] | None = None) -> list[tuple[Any, ...]]:
        with self.admin() as con:
            return fetch(con, sql, params)

    def execute(self, sql: str, params: tuple[Any, ...] | None = None) -> None:
        with self.admin() as con:
            execute(con, sql, params)


def wait_until_gone(server: PgServer, timeout: float = 30.0) -> None:  # pragma: no cover - helper for manual use
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and server.folder is not None and (server.folder / "data" / "postmaster.pid").exists():
        time.sleep(0.1)


if __name__ == "__main__":  # pragma: no cover - manual use
    srv = start_cluster()
    print(f"admin URL: {srv.url()}  (password {srv.admin_password}); socket folder {srv.folder}")
    try:
        while True:
            time.sleep(3600)
    except KeyboardInterrupt:
        srv.stop()
