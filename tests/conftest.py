"""Shared fixtures: a throwaway PostgreSQL server, store URLs on both backends, store snapshots.

``postgres_url`` starts one PostgreSQL server per test session on a free 127.0.0.1 port
(``initdb`` and ``pg_ctl`` from ``/usr/lib/postgresql/*/bin``, through ``runuser -u postgres``
when running as root, because ``initdb`` refuses root) and stops it at the end. Without the
binaries the tests that need it skip with the reason, unless ``COMOVE_REQUIRE_POSTGRES=1``
(set by ``.ci/run``), in which case they fail.

``store_url`` runs a test twice: on a SQLite file in ``tmp_path`` and on a fresh PostgreSQL
database (``CREATE DATABASE`` with a unique name, dropped afterwards), so a store test covers
both backends the design names. ``store_snapshot(url)`` captures everything a store holds so a
test can assert that a refusal left it exactly as it was.

Figures are built with plotly's property checks on (``COMOVE_VALIDATE_FIGURES=1``, set here
before anything imports the views; servers the tests start inherit it), which serving skips.
"""

from __future__ import annotations

import os

os.environ.setdefault("COMOVE_VALIDATE_FIGURES", "1")

import glob
import hashlib
import re
import shutil
import socket
import subprocess
import tempfile
import uuid
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest
import sqlalchemy as sa
from sqlalchemy.pool import NullPool

REQUIRE_POSTGRES = "COMOVE_REQUIRE_POSTGRES"


def pytest_configure(config: pytest.Config) -> None:
    config.addinivalue_line("markers", "postgres: needs the throwaway PostgreSQL server")


# ----------------------------------------------------------------------------- PostgreSQL
def _unavailable(reason: str) -> None:
    """Skip, or fail when the run promised PostgreSQL (CI)."""
    if os.environ.get(REQUIRE_POSTGRES) == "1":
        pytest.fail(f"{REQUIRE_POSTGRES}=1 but {reason}", pytrace=False)
    pytest.skip(reason)


def _postgres_bindir() -> Path | None:
    """The newest installed server's bin directory (Debian layout), else one on PATH."""
    def major(path: str) -> int:
        m = re.search(r"/postgresql/(\d+)/", path)
        return int(m.group(1)) if m else 0

    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/pg_ctl"), key=major)
    if found:
        return Path(found[-1]).parent
    on_path = shutil.which("pg_ctl")
    if on_path and shutil.which("initdb"):
        return Path(on_path).parent
    return None


def free_port() -> int:
    """A free TCP port on 127.0.0.1 for a test server (aiosmtpd, PostgreSQL, the dashboard)."""
    # Port 0 lets the kernel choose; the socket is closed again before the server binds.
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@dataclass(frozen=True, slots=True)
class _Server:
    bindir: Path
    data: Path
    prefix: tuple[str, ...]

    def run(self, *args: str, timeout: float = 60) -> subprocess.CompletedProcess:
        return subprocess.run([*self.prefix, *args], capture_output=True, text=True,
                              timeout=timeout, check=False)

    def stop(self) -> None:
        self.run(str(self.bindir / "pg_ctl"), "-D", str(self.data), "-m", "fast", "-w",
                 "stop")


@pytest.fixture(scope="session")
def postgres_url() -> Iterator[str]:
    """URL of the maintenance database of a throwaway PostgreSQL server (user ``test``)."""
    bindir = _postgres_bindir()
    if bindir is None:
        _unavailable("PostgreSQL server binaries (initdb, pg_ctl) are not installed; "
                     "apt-get install postgresql")
    try:
        import psycopg  # noqa: F401
    except ImportError:
        _unavailable("the psycopg driver is not installed (pip install 'psycopg[binary]')")
    prefix: tuple[str, ...] = ()
    owner = None
    if os.geteuid() == 0:
        # initdb refuses to run as root: run the server as the postgres system user.
        runuser = shutil.which("runuser") or next(
            (p for p in ("/usr/sbin/runuser", "/sbin/runuser") if os.access(p, os.X_OK)), None)
        if runuser is None:
            _unavailable("running as root and runuser is missing")
        try:
            import pwd

            owner = pwd.getpwnam("postgres")
        except KeyError:
            _unavailable("running as root and there is no 'postgres' user to run initdb as")
        prefix = (runuser, "-u", "postgres", "--")
    base = Path(tempfile.mkdtemp(prefix="comove-pg-"))
    data, sockets = base / "data", base / "sockets"
    sockets.mkdir()
    if owner is not None:
        for p in (base, sockets):
            os.chown(p, owner.pw_uid, owner.pw_gid)
    server = _Server(bindir, data, prefix)
    started = False
    try:
        init = server.run(str(bindir / "initdb"), "-D", str(data), "-U", "test",
                          "--auth=trust", "--no-sync", "-E", "UTF8", "--locale=C")
        if init.returncode != 0:
            _unavailable(f"initdb failed: {(init.stderr or init.stdout).strip()[-500:]}")
        for _attempt in range(3):  # another process may take the free port before we bind it
            port = free_port()
            options = (f"-c listen_addresses=127.0.0.1 -p {port} -k {sockets} -c fsync=off "
                       "-c synchronous_commit=off -c full_page_writes=off")
            start = server.run(str(bindir / "pg_ctl"), "-D", str(data), "-l",
                               str(base / "server.log"), "-w", "-t", "30", "-o", options,
                               "start")
            if start.returncode == 0:
                started = True
                break
        if not started:
            log = (base / "server.log")
            tail = log.read_text(errors="replace")[-500:] if log.exists() else start.stderr
            _unavailable(f"PostgreSQL did not start: {tail.strip()}")
        yield f"postgresql+psycopg://test@127.0.0.1:{port}/postgres"
    finally:
        if started:
            server.stop()
        shutil.rmtree(base, ignore_errors=True)


@pytest.fixture(scope="session")
def _postgres_admin(postgres_url: str) -> Iterator[sa.Engine]:
    engine = sa.create_engine(postgres_url, isolation_level="AUTOCOMMIT")
    yield engine
    engine.dispose()


@pytest.fixture
def pg_database(postgres_url: str, _postgres_admin: sa.Engine) -> Iterator[Callable[[], str]]:
    """A factory of fresh, empty PostgreSQL databases (URLs), all dropped after the test."""
    made: list[str] = []

    def make() -> str:
        name = f"comove_test_{uuid.uuid4().hex[:12]}"
        with _postgres_admin.connect() as conn:
            conn.execute(sa.text(f'CREATE DATABASE "{name}"'))
        made.append(name)
        return (sa.engine.make_url(postgres_url).set(database=name)
                .render_as_string(hide_password=False))

    yield make
    with _postgres_admin.connect() as conn:
        for name in made:
            # FORCE: a store a test forgot to close must not keep its database alive.
            conn.execute(sa.text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))


# ----------------------------------------------------------------------------- stores
@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def store_url(request: pytest.FixtureRequest, tmp_path: Path) -> str:
    """A URL where no store exists yet: a SQLite file in tmp_path, or a fresh PostgreSQL
    database."""
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path / 'store.sqlite'}"
    return request.getfixturevalue("pg_database")()


@dataclass(frozen=True, slots=True)
class StoreSnapshot:
    """Everything a store holds: every table's columns and rows in a fixed order, and for
    SQLite the SHA-256 of the file bytes and the names of any side files (journal, WAL)."""

    file_sha256: str | None
    side_files: tuple[str, ...]
    tables: dict[str, tuple[tuple[str, ...], tuple[tuple, ...]]]


def _dump(url: str) -> dict[str, tuple[tuple[str, ...], tuple[tuple, ...]]]:
    engine = sa.create_engine(url, poolclass=NullPool)
    try:
        with engine.connect() as conn:
            inspector = sa.inspect(conn)
            out = {}
            for name in sorted(inspector.get_table_names()):
                cols = tuple(c["name"] for c in inspector.get_columns(name))
                table = sa.table(name, *(sa.column(c) for c in cols))
                rows = conn.execute(sa.select(table).order_by(*table.c)).all()
                out[name] = (cols, tuple(tuple(r) for r in rows))
            return out
    finally:
        engine.dispose()


def take_snapshot(url: str) -> StoreSnapshot:
    """Snapshot of the store at ``url`` (a missing SQLite file gives an empty snapshot)."""
    parsed = sa.engine.make_url(url)
    if parsed.get_backend_name() == "sqlite":
        path = Path(parsed.database)
        side = tuple(sorted(p.name for p in path.parent.glob(path.name + "-*")))
        if not path.exists():
            return StoreSnapshot(None, side, {})
        # Hash before opening a connection, so the dump cannot disturb what is compared.
        digest = hashlib.sha256(path.read_bytes()).hexdigest()
        return StoreSnapshot(digest, side, _dump(url))
    return StoreSnapshot(None, (), _dump(url))


@pytest.fixture
def store_snapshot() -> Callable[[str], StoreSnapshot]:
    """``store_snapshot(url)``: a :class:`StoreSnapshot` to compare before and after."""
    return take_snapshot


# ----------------------------------------------------------------------------- browser
REQUIRE_BROWSER = "COMOVE_REQUIRE_BROWSER"


def pytest_setup_options():
    """Chrome options for dash.testing's headless browser: nothing may reach the network."""
    from selenium.webdriver.chrome.options import Options

    options = Options()
    for flag in ("--disable-background-networking", "--disable-component-update",
                 "--disable-sync", "--no-first-run", "--disable-quic",
                 "--window-size=1400,900"):
        options.add_argument(flag)
    return options


@pytest.fixture
def browser_available() -> None:
    """Skip (or fail under ``COMOVE_REQUIRE_BROWSER=1``) without chromium and its driver."""
    missing = [b for b in ("chromium", "chromedriver") if shutil.which(b) is None]
    if missing:
        reason = f"browser tests need {' and '.join(missing)} on PATH"
        if os.environ.get(REQUIRE_BROWSER) == "1":
            pytest.fail(f"{REQUIRE_BROWSER}=1 but {reason}", pytrace=False)
        pytest.skip(reason)
