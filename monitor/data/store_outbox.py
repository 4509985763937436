"""The alert e-mail queue in the store: :mod:`monitor.alerts.rules` queues messages in the
transaction that stores the state change they report, :mod:`monitor.alerts.mailer` reads the
due ones and records each delivery or failed attempt in its own transaction.

Table (:mod:`monitor.data.schema`): ``outbox``. ``state`` is ``pending`` (queued, or back
after a failed attempt), ``sending`` (claimed by one sender: ``claimed_by``, ``claimed_at``),
``sent`` or ``failed`` (refused for good: a permanent SMTP answer, or a message that cannot
be built). A sender claims the messages it will send with one ``UPDATE`` (atomic on SQLite,
which serialises writers, and on PostgreSQL, where a second sender's ``UPDATE`` waits for the
first to commit and then no longer matches the claimed rows), so two senders never send one
message; every later change is made only by the claim's holder.
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

#: A claim older than this is taken to be a sender that died: its messages may be claimed
#: again (one of them may then go out twice; its Message-ID is the same both times).
CLAIM_LEASE = dt.timedelta(hours=1)
#: States of a message not delivered yet.
UNDELIVERED = ("pending", "sending")

_RELEASE = outbox.update().where(
    outbox.c.message_id == sa.bindparam("p_id"), outbox.c.state == "sending",
    outbox.c.claimed_by == sa.bindparam("p_token")).values(
        state=sa.bindparam("p_state"), attempts=sa.bindparam("p_attempts"),
        last_error=sa.bindparam("p_error"), next_attempt=sa.bindparam("p_next"),
        claimed_by=None, claimed_at=None)


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

    def pending_messages(self) -> list[dict[str, Any]]:
        """Every pending message, oldest first (by ``created``, then id): all columns."""
        with self.engine.connect() as conn:
            return [dict(r) for r in conn.execute(
                sa.select(outbox).where(outbox.c.state == "pending")
                .order_by(outbox.c.created, outbox.c.message_id)).mappings()]

    def claim_messages(self, token: str, now: dt.datetime, *, due_only: bool
                       ) -> list[dict[str, Any]]:
        """Claim messages for one sender, in one transaction, and return them.

        Parameters
        ----------
        token : str
            The sender's claim (unique per run).
        now : datetime
            UTC, no time zone.
        due_only : bool
            Only messages whose ``next_attempt`` has come (the server is unreachable: back-off
            spaces the recorded attempts); otherwise every pending message.

        Returns
        -------
        list of dict
            The claimed messages (all columns, ``state`` ``sending``), oldest first. Pending
            messages and claims older than :data:`CLAIM_LEASE` can be claimed; a message
            another sender holds cannot.
        """
        free = sa.or_(outbox.c.state == "pending",
                      sa.and_(outbox.c.state == "sending",
                              outbox.c.claimed_at < now - CLAIM_LEASE))
        if due_only:
            free = sa.and_(free, outbox.c.next_attempt <= now)
        with self.transaction() as conn:
            conn.execute(outbox.update().where(free).values(
                state="sending", claimed_by=token, claimed_at=now))
            return [dict(r) for r in conn.execute(
                sa.select(outbox).where(sa.and_(outbox.c.claimed_by == token,
                                                outbox.c.state == "sending"))
                .order_by(outbox.c.created, outbox.c.message_id)).mappings()]

    def mark_sent(self, message_ids: Iterable[str], sent_as: str, at: dt.datetime,
                  token: str) -> None:
        """Record in one transaction that the server accepted the messages: those the claim
        ``token`` holds become ``sent`` at ``at`` under the Message-ID ``sent_as`` (theirs, or
        the digest's), with one more attempt and no error."""
        with self.transaction() as conn:
            conn.execute(outbox.update().where(sa.and_(
                outbox.c.message_id.in_(list(message_ids)), outbox.c.state == "sending",
                outbox.c.claimed_by == token)).values(
                    state="sent", sent_at=at, sent_as=sent_as, attempts=outbox.c.attempts + 1,
                    last_error=None, claimed_by=None, claimed_at=None))

    def release_messages(self, token: str,
                         outcomes: list[tuple[str, str, int, str, dt.datetime]]) -> None:
        """Hand claimed messages back, in one transaction: per ``(message_id, state,
        attempts, error, next_attempt)`` the message becomes ``state`` (``pending`` to be
        tried again, ``failed`` for good) with that attempt count, error and next attempt,
        where the claim ``token`` still holds it."""
        if not outcomes:
            return
        with self.transaction() as conn:
            conn.execute(_RELEASE, [
                {"p_id": m, "p_token": token, "p_state": st, "p_attempts": n, "p_error": e,
                 "p_next": t} for m, st, n, e, t in outcomes])

    def undelivered_count(self, created_before: dt.datetime | None = None) -> int:
        """Messages pending or being sent (created before ``created_before`` when given)."""
        cond: sa.ColumnElement[bool] = outbox.c.state.in_(UNDELIVERED)
        if created_before is not None:
            cond = sa.and_(cond, outbox.c.created < created_before)
        with self.engine.connect() as conn:
            return int(conn.execute(sa.select(sa.func.count()).select_from(outbox)
                                    .where(cond)).scalar_one())

    def requeue_failed(self, now: dt.datetime) -> int:
        """Put every message refused for good back in the queue (after the cause was fixed,
        e.g. a recipient); returns how many, each due at ``now``."""
        with self.transaction() as conn:
            return int(conn.execute(outbox.update().where(outbox.c.state == "failed").values(
                state="pending", next_attempt=now)).rowcount)

    def read_outbox(self, limit: int) -> pd.DataFrame:
        """The newest ``limit`` messages of the queue (newest ``created`` first, then by id):
        the columns :data:`OUTBOX_LISTING`."""
        cols = [outbox.c[name] for name in OUTBOX_LISTING]
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(*cols).order_by(outbox.c.created.desc(),
                                                          outbox.c.message_id)
                                .limit(limit)).all()
        return pd.DataFrame(rows, columns=list(OUTBOX_LISTING))
