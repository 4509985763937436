"""One ``comove update`` at a time per store.

Two updates of one store at once would both compute and both write the same new rows; the
second then fails on the store's keys. :func:`update_lock` takes a lock held for the whole
update and released when the process ends, however it ends (``kill -9`` included):

- SQLite: an exclusive ``flock`` on the file ``<store>.update-lock`` beside the store, which
  also records who holds it (process id, host, since when);
- PostgreSQL: a session advisory lock (``pg_try_advisory_lock``) on a connection held open
  for the update, its holder recorded in ``pg_stat_activity`` (application name and backend
  start).

A second update waits up to ``wait`` seconds for it, then is refused with an
:class:`~monitor.common.errors.InputError` naming who holds the lock and since when.
"""

from __future__ import annotations

import datetime as dt
import fcntl
import os
import socket
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import sqlalchemy as sa

from monitor.common.errors import InputError

#: Advisory lock key of the update (PostgreSQL), any fixed 64-bit integer.
_PG_KEY = 0x636F6D6F7665  # "comove"
_POLL = 0.25


@contextmanager
def update_lock(url: str, shown_url: str, *, wait: float = 0.0) -> Iterator[None]:
    """Hold the store's update lock for the block.

    Parameters
    ----------
    url : str
        The store's URL.
    shown_url : str
        The URL as messages show it.
    wait : float
        Seconds to wait for a running update to finish (0: refuse at once).

    Raises
    ------
    InputError
        Another update holds the lock after ``wait`` seconds.
    """
    parsed = sa.engine.make_url(url)
    if parsed.get_backend_name() == "sqlite":
        if parsed.database in (None, "", ":memory:") or not Path(parsed.database).parent.is_dir():
            yield  # no store folder yet: nothing to lock, and nothing is created for it
            return
        with _file_lock(Path(parsed.database + ".update-lock"), shown_url, wait):
            yield
        return
    with _advisory_lock(url, shown_url, wait):
        yield


def _refusal(shown_url: str, holder: str, wait: float) -> InputError:
    waited = f" (waited {wait:g} s)" if wait else ""
    return InputError(f"store {shown_url}: another update is running {holder}{waited}; it "
                      "stops on its own: run this one later, or pass --wait SECONDS")


@contextmanager
def _file_lock(path: Path, shown_url: str, wait: float) -> Iterator[None]:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        deadline = time.monotonic() + wait
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() >= deadline:
                    holder = os.pread(fd, 200, 0).decode(errors="replace").strip()
                    raise _refusal(shown_url, holder or "(holder unknown)", wait) from None
                time.sleep(_POLL)
        since = dt.datetime.now().astimezone().strftime("%Y-%m-%d %H:%M:%S %Z")
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"since {since} (process {os.getpid()} on {socket.gethostname()})"
                  .encode(), 0)
        try:
            yield
        finally:
            os.ftruncate(fd, 0)
            fcntl.flock(fd, fcntl.LOCK_UN)
    finally:
        os.close(fd)


@contextmanager
def _advisory_lock(url: str, shown_url: str, wait: float) -> Iterator[None]:
    engine = sa.create_engine(url, poolclass=sa.pool.NullPool,
                              connect_args={"application_name": "comove update"})
    try:
        with engine.connect() as conn:
            deadline = time.monotonic() + wait
            while not conn.execute(sa.text("SELECT pg_try_advisory_lock(:k)"),
                                   {"k": _PG_KEY}).scalar_one():
                conn.rollback()
                if time.monotonic() >= deadline:
                    raise _refusal(shown_url, _pg_holder(conn), wait)
                time.sleep(_POLL)
            conn.commit()
            try:
                yield
            finally:
                conn.execute(sa.text("SELECT pg_advisory_unlock(:k)"), {"k": _PG_KEY})
                conn.commit()
    finally:
        engine.dispose()


def _pg_holder(conn: sa.Connection) -> str:
    """Who holds the advisory lock: ``since <backend start> (<application> from <client>)``."""
    row = conn.execute(sa.text(
        "SELECT a.backend_start, a.application_name, a.client_addr FROM pg_locks l "
        "JOIN pg_stat_activity a ON a.pid = l.pid WHERE l.locktype = 'advisory' "
        "AND l.granted AND l.objid = (:k & 4294967295)"), {"k": _PG_KEY}).first()
    conn.rollback()
    if row is None:
        return "(holder unknown)"
    start = row[0].astimezone().strftime("%Y-%m-%d %H:%M:%S %Z")
    return f"since {start} ({row[1] or 'a client'} from {row[2] or 'this host'})"
