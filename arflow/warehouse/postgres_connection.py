"""Connections to PostgreSQL for the source and the target: URLs, credentials, one-line errors.

arflow talks to PostgreSQL through ``adbc-driver-postgresql`` (Arrow-native
reads; binary ``COPY`` for bulk loads; measured against psycopg 3 in
``bench/postgres_drivers.py``). The driver is libpq underneath, so the
standard conventions hold: ``PGHOST``/``PGUSER``/``PGPASSWORD``/``PGSERVICE``
and the other PG* variables, the password file (``~/.pgpass`` or
``PGPASSFILE``) and the service file (``~/.pg_service.conf`` or
``PGSERVICEFILE``; ``postgresql:///?service=name``).

A job file never carries a password: a URL with one is refused. Everything
arflow prints or records shows :func:`redact`'s form of a URL.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any
from urllib.parse import parse_qsl, unquote, urlsplit

from ..errors import ArflowError, SettingsError

#: the distribution's extra that installs the driver
EXTRA = "postgres"
#: seconds libpq waits for a connection when the URL does not say (``connect_timeout``)
CONNECT_TIMEOUT = 10
_SCHEMES = ("postgresql", "postgres")
_SECRET_PARAMS = ("password", "sslpassword")


def driver() -> Any:
    """The DB-API module of the driver, or a one-line error naming the extra to install."""
    try:
        import adbc_driver_postgresql.dbapi as dbapi
    except ImportError:
        raise SettingsError(
            "PostgreSQL support is not installed; install it with: python -m pip install 'arflow-gated[postgres]'"
        ) from None
    return dbapi


def driver_errors() -> tuple[type[BaseException], ...]:
    """The exception classes the driver raises."""
    import adbc_driver_manager

    return (adbc_driver_manager.Error,)


@dataclass(frozen=True)
class PgAddress:
    """A checked, password-free PostgreSQL URL."""

    url: str
    key: str  # the job-file key it came from (for messages)

    def describe(self) -> str:
        """``postgresql://user@host:port/db`` (never a password)."""
        return redact(self.url)

    @property
    def database(self) -> str:
        path = urlsplit(self.url).path.lstrip("/")
        return unquote(path) if path else "(default database)"

    @property
    def server(self) -> str:
        parts = urlsplit(self.url)
        host = parts.hostname or "(PGHOST or local socket)"
        return f"{host}:{parts.port}" if parts.port else host

    @property
    def user(self) -> str:
        parts = urlsplit(self.url)
        return unquote(parts.username) if parts.username else "(PGUSER or the login name)"

    def connect_url(self) -> str:
        """The URL handed to libpq: a connection timeout and ``application_name=arflow`` unless the URL sets them."""
        query = dict(parse_qsl(urlsplit(self.url).query))
        extra = [f"{k}={v}" for k, v in (("connect_timeout", CONNECT_TIMEOUT), ("application_name", "arflow"))
                 if k not in query]
        if not extra:
            return self.url
        return self.url + ("&" if "?" in self.url else "?") + "&".join(extra)


def check_url(value: object, key: str) -> PgAddress:
    """A URL from a job file: ``postgresql://[user@][host][:port][/database][?param=value...]``, no password."""
    if not isinstance(value, str) or not value.strip():
        raise SettingsError(f"{key} must be a PostgreSQL URL like \"postgresql://forecaster@db.internal:5432/warehouse\"")
    text = value.strip()
    try:
        parts = urlsplit(text)
        parts.port  # noqa: B018  (raises ValueError for a bad port)
    except ValueError:
        raise SettingsError(f"{key} = {redact(text)!r} is not a valid PostgreSQL URL; e.g. postgresql://forecaster@db.internal:5432/warehouse") from None
    if parts.scheme not in _SCHEMES:
        raise SettingsError(
            f"{key} must start with postgresql:// (got {redact(text)[:60]!r}); e.g. postgresql://forecaster@db.internal:5432/warehouse"
        )
    if parts.password is not None or any(k.lower() in _SECRET_PARAMS for k, _ in parse_qsl(parts.query)):
        raise SettingsError(
            f"{key} contains a password; remove it from the job file and give it through PGPASSWORD, "
            "the password file (~/.pgpass or PGPASSFILE) or a service file (?service=name)"
        )
    return PgAddress(text, key)


_NETLOC_PASSWORD = re.compile(r"(://[^:/@?#\s]*):[^@/?#\s]*@")
_PARAM_PASSWORD = re.compile(r"((?:^|[?&\s])(?:ssl)?password=)[^&\s]*", re.IGNORECASE)


def redact(text: str) -> str:
    """``text`` with any password of a URL or key=value connection string replaced by ``***``."""
    text = _NETLOC_PASSWORD.sub(r"\1:***@", text)
    return _PARAM_PASSWORD.sub(r"\1***", text)


def _detail(exc: BaseException) -> str:
    """The server's or libpq's own words, one line, without the driver's prefixes."""
    text = str(exc)
    text = re.sub(r"^[A-Z_]+: ", "", text.strip())
    text = re.sub(r"^\[libpq\] ", "", text)
    text = re.sub(r"Query was: .*", "", text, flags=re.DOTALL)
    text = re.sub(r"\.? ?SQLSTATE: \w+", "", text)
    m = re.search(r"(?:FATAL|ERROR):\s+(.*)", text, flags=re.DOTALL)
    if m:
        text = m.group(1)
    text = re.sub(r"^(Failed to (?:connect|execute[^:]*|prepare query|begin COPY)[^:]*): ", "", text)
    text = re.sub(r"^could not begin COPY: ", "", text)
    first = " ".join(text.split("\n")[0].split())
    return redact(first.rstrip(" .")) or type(exc).__name__


def sqlstate(exc: BaseException) -> str | None:
    """The SQLSTATE of a driver error (None for connection-level errors)."""
    state = getattr(exc, "sqlstate", None)
    if state:
        return str(state)
    m = re.search(r"SQLSTATE: (\w{5})", str(exc))
    return m.group(1) if m else None


def connect_error(exc: BaseException, address: PgAddress, role: str, error: type[ArflowError]) -> ArflowError:
    """A one-line error for a failed connection: unreachable, wrong credentials, missing database."""
    detail = _detail(exc)
    low = str(exc).lower()
    where = f"{role} {address.describe()} ({address.key})"
    if "password authentication failed" in low or "no password supplied" in low or "authentication failed" in low:
        return error(
            f"the PostgreSQL server refused the login of role {address.user} for {where}: {detail}; check the password "
            "in PGPASSWORD, ~/.pgpass (PGPASSFILE) or the service file, and the role name"
        )
    if re.search(r'database "[^"]*" does not exist', low):
        return error(f"database {address.database} does not exist on {address.server} ({where}); create it or fix the URL")
    if re.search(r'role "[^"]*" does not exist', low):
        return error(f"role {address.user} does not exist on {address.server} ({where}); create it or fix the URL")
    if "permission denied" in low or "not permitted" in low or "no pg_hba.conf entry" in low:
        return error(f"the PostgreSQL server does not let role {address.user} connect ({where}): {detail}; ask its administrator for CONNECT")
    if any(s in low for s in ("connection refused", "could not translate host", "timeout expired", "could not connect",
                              "no route to host", "network is unreachable", "name or service not known", "no such file")):
        return error(f"cannot reach the PostgreSQL server for {where}: {detail}; check that the server runs and the host and port")
    return error(f"cannot connect to {where}: {detail}")


def connect(address: PgAddress, role: str, error: type[ArflowError], *, autocommit: bool = False) -> Any:
    """An open driver connection, or a one-line ``error``."""
    dbapi = driver()
    try:
        return dbapi.connect(address.connect_url(), autocommit=autocommit)
    except driver_errors() as exc:
        raise connect_error(exc, address, role, error) from None


def lost_connection(exc: BaseException) -> bool:
    """True when the server ended the session (terminated backend, server shut down, network dropped)."""
    state = sqlstate(exc) or ""
    low = str(exc).lower()
    return state.startswith("08") or state in ("57P01", "57P02", "57P03") or any(
        s in low for s in ("terminating connection", "server closed the connection", "connection to server",
                           "no connection to the server", "connection not open", "broken pipe"))


def statement_timed_out(exc: BaseException) -> bool:
    return sqlstate(exc) == "57014" and "statement timeout" in str(exc).lower()


def detail(exc: BaseException) -> str:
    """Public alias of the one-line detail of a driver error."""
    return _detail(exc)
