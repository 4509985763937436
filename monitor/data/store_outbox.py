"""The alert e-mail queue in the store: :mod:`monitor.alerts.rules` queues messages in the
transaction that stores the state change they report, :mod:`monitor.alerts.mailer` reads the
due ones and records each delivery or failed attempt in its own transaction.

Table (:mod:`monitor.data.schema`): ``outbox`` (``state`` is ``pending`` or ``sent``; only
pending messages are ever sent or updated).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable
from typing import Any

import pandas as pd
import sqlalchemy as sa

from monitor.data.schema import outbox
from monitor.data.store_base import StoreBase

#: The columns :meth:`OutboxStore.read_outbox` reads (the message bodies are left out).
OUTBOX_LISTING = ("created", "asset_a", "asset_b", "tail", "rule", "kind", "event_date",
                  "subject", "state", "attempts", "last_error", "next_attempt", "sent_at")

_MARK_FAILED = outbox.update().where(
    outbox.c.message_id == sa.bindparam("p_id"), outbox.c.state == "pending").values(
        attempts=sa.bindparam("p_attempts"), last_error=sa.bindparam("p_error"),
        next_attempt=sa.bindparam("p_next"))


class OutboxStore(StoreBase):
    """The alert e-mail queue of a store (a part of :class:`~monitor.data.store.Store`)."""

    @staticmethod
    def queue_messages(conn: sa.Connection, messages: list[dict[str, Any]],
                       table: sa.Table = outbox) -> int:
        """Queue the messages not queued yet, in the caller's transaction.

        Parameters
        ----------
        conn : Connection
            The caller's transaction (the one storing the change the messages report).
        messages : list of dict
            The message columns of the queue: ``message_id, settings, rule, kind, asset_a,
            asset_b, tail, event_date, subject, body_text, body_html``. A message whose id
            is queued already is left out; of several with one id the last is queued.
        table : Table
            The queue (:data:`monitor.data.schema.outbox`).

        Returns
        -------
        int
            How many messages were new. Each is queued pending, with no attempt yet and due
            at once (``created`` and ``next_attempt`` the current UTC time).
        """
        if not messages:
            return 0
        ids = [m["message_id"] for m in messages]
        known = set(conn.execute(sa.select(table.c.message_id).where(
            table.c.message_id.in_(ids))).scalars())
        now = dt.datetime.now(dt.UTC).replace(tzinfo=None)
        rows = [{**m, "state": "pending", "attempts": 0, "last_error": None, "created": now,
                 "next_attempt": now, "sent_at": None, "sent_as": None}
                for m in {m["message_id"]: m for m in messages}.values()
                if m["message_id"] not in known]
        if rows:
            conn.execute(table.insert(), rows)
        return len(rows)

    def due_messages(self, now: dt.datetime) -> list[dict[str, Any]]:
        """Every pending message whose next attempt is due at ``now`` (UTC, no time zone),
        oldest first (by ``created``, then id): all columns of the queue."""
        with self.engine.connect() as conn:
            return [dict(r) for r in conn.execute(
                sa.select(outbox).where(sa.and_(outbox.c.state == "pending",
                                                outbox.c.next_attempt <= now))
                .order_by(outbox.c.created, outbox.c.message_id)).mappings()]

    def mark_sent(self, message_ids: Iterable[str], sent_as: str, at: dt.datetime) -> None:
        """Record in one transaction that the server accepted the messages: those still
        pending become ``sent`` at ``at`` under the Message-ID ``sent_as`` (theirs, or the
        digest's), with one more attempt and no error."""
        with self.transaction() as conn:
            conn.execute(outbox.update().where(sa.and_(
                outbox.c.message_id.in_(list(message_ids)),
                outbox.c.state == "pending")).values(
                    state="sent", sent_at=at, sent_as=sent_as,
                    attempts=outbox.c.attempts + 1, last_error=None))

    def record_failures(self, failures: list[tuple[str, int, str, dt.datetime]]) -> None:
        """Record failed attempts in one transaction: per ``(message_id, attempts, error,
        next_attempt)`` the message's attempt count, last error and next attempt, where it
        is still pending."""
        if not failures:
            return
        with self.transaction() as conn:
            conn.execute(_MARK_FAILED, [{"p_id": m, "p_attempts": n, "p_error": e, "p_next": t}
                                        for m, n, e, t in failures])

    def read_outbox(self, limit: int) -> pd.DataFrame:
        """The newest ``limit`` messages of the queue (newest ``created`` first, then by id):
        the columns :data:`OUTBOX_LISTING`."""
        cols = [outbox.c[name] for name in OUTBOX_LISTING]
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(*cols).order_by(outbox.c.created.desc(),
                                                          outbox.c.message_id)
                                .limit(limit)).all()
        return pd.DataFrame(rows, columns=list(OUTBOX_LISTING))
