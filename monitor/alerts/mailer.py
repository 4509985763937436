"""Delivery of the alert outbox by SMTP (``comove alerts send``).

- Plain SMTP, STARTTLS (``alerts.email.starttls``) or SMTP over TLS (``alerts.email.ssl``);
  credentials come from the environment variables the configuration names, never from the
  file.
- A run first connects. When the server answers, it claims **every** pending message (one
  atomic claim, so concurrent runs never send a message twice) and tries each once: an alert
  goes out as soon as the server is back, whatever its back-off said. When the server does not
  answer, only the messages whose back-off is over record a failed attempt; the others are
  deferred. The back-off is ``alerts.retry_seconds`` doubled per failed attempt, at most
  :data:`MAX_RETRY` (30 minutes).
- Every message carries its outbox id as ``Message-ID`` and is marked sent in its own
  transaction as soon as the server accepts it.
- One message never blocks the others: a message that cannot be built, or that the server
  refuses for good (a 5xx answer), is recorded as ``failed`` with the reason and the run goes
  on; a temporary refusal (4xx) or a lost connection leaves it pending for the next run.
  ``comove alerts send --retry-failed`` puts the failed ones back in the queue.
- With ``alerts.digest`` the claimed messages of a run go out as one digest (its own id,
  derived from its members').
- A small chart of the pair's tail coefficients is attached inline when plotly's static
  export (kaleido with a local Chromium) works; the HTML part always has the table.
- The run's report says how many were pending, attempted, sent, failed (to be retried),
  refused for good and deferred, and how many are late: still undelivered more than
  ``alerts.late_after_minutes`` after they were queued (the command then exits 1).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import os
import smtplib
import ssl
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from email.message import EmailMessage
from email.utils import format_datetime, make_msgid

from monitor.common.errors import InputError
from monitor.config import Config

#: Longest wait between attempts while the server keeps failing.
MAX_RETRY = dt.timedelta(minutes=30)
SMTP_TIMEOUT = 20.0


@dataclass(frozen=True, slots=True)
class SendReport:
    """What one ``alerts send`` run did.

    Attributes
    ----------
    pending : int
        Messages waiting when the run started.
    due : int
        Messages this run tried (all pending when the server answered; those whose back-off
        was over when it did not).
    sent, failed, refused, deferred : int
        Accepted by the server; failed and queued again; refused for good (state
        ``failed``); not tried: the server unreachable and their back-off not over, or (with
        the server reachable) held by another ``alerts send`` running at the same time.
    late : int
        Still undelivered after the run and queued more than ``alerts.late_after_minutes``
        ago.
    dry_run : bool
    errors : tuple of str
        One line per distinct problem met.
    """

    pending: int
    due: int
    sent: int
    failed: int
    refused: int
    deferred: int
    late: int
    dry_run: bool
    errors: tuple[str, ...] = ()

    @property
    def ok(self) -> bool:
        """Nothing failed or was refused in this run, and nothing is late."""
        return not (self.failed or self.refused or self.late)

    def lines(self) -> list[str]:
        if self.dry_run:
            return [(f"dry run: {self.pending} pending message(s) would be tried; nothing "
                     "was sent or changed")]
        if not self.pending:
            return ["alerts: nothing to send"]
        out = [(f"alerts: {self.pending} pending, {self.due} due: {self.sent} sent, "
                f"{self.failed} failed (queued again), {self.refused} refused for good, "
                f"{self.deferred} deferred; {self.late} late")]
        if self.deferred and not self.errors:
            out.append(f"  {self.deferred} held by another alerts send running now")
        out += [f"  {e}" for e in self.errors]
        return out


def _utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC).replace(tzinfo=None)


def credentials(cfg: Config, environ=os.environ) -> tuple[str, str] | None:
    """(user, password) from the environment variables named in the config, or None.

    Raises
    ------
    InputError
        A named variable is not set.
    """
    e = cfg.alerts.email
    if not e.username_env:
        return None
    values = []
    for key in ("username_env", "password_env"):
        name = getattr(e, key)
        value = environ.get(name)
        if value is None:
            raise InputError(f"alerts.email.{key} names {name}, which is not set in the "
                             "environment; nothing sent")
        values.append(value)
    return values[0], values[1]


class DeliveryError(Exception):
    """A delivery problem worth one line to the user."""


def _connect(cfg: Config, login: tuple[str, str] | None) -> smtplib.SMTP:
    e = cfg.alerts.email
    context = ssl.create_default_context()
    if e.ssl:
        server = smtplib.SMTP_SSL(e.host, e.port, timeout=SMTP_TIMEOUT, context=context)
    else:
        server = smtplib.SMTP(e.host, e.port, timeout=SMTP_TIMEOUT)
    try:
        server.ehlo()
        if e.starttls:
            if not server.has_extn("starttls"):
                raise DeliveryError(f"{e.host}:{e.port} does not offer STARTTLS "
                                    "(alerts.email.starttls = true)")
            server.starttls(context=context)
            server.ehlo()
        if login is not None:
            server.login(*login)
    except BaseException:
        server.close()
        raise
    return server


def _describe(exc: BaseException, cfg: Config) -> str:
    e = cfg.alerts.email
    where = f"{e.host}:{e.port}"
    if isinstance(exc, DeliveryError):
        return str(exc)
    if isinstance(exc, ConnectionRefusedError):
        return f"connection refused by {where}"
    if isinstance(exc, TimeoutError):  # socket.timeout is TimeoutError
        return f"no answer from {where} within {SMTP_TIMEOUT:g} s"
    if isinstance(exc, smtplib.SMTPAuthenticationError):
        return f"{where} refused the credentials ({exc.smtp_code})"
    if isinstance(exc, smtplib.SMTPRecipientsRefused):
        return f"{where} refused the recipients"
    if isinstance(exc, smtplib.SMTPResponseException):
        return f"{where} answered {exc.smtp_code}: {exc.smtp_error!r}"
    if isinstance(exc, ssl.SSLError):
        return f"TLS with {where} failed ({exc.reason or exc})"
    if isinstance(exc, OSError):
        return f"cannot reach {where} ({exc.strerror or exc})"
    return f"{type(exc).__name__}: {exc}"


def build_message(cfg: Config, row: dict, chart: bytes | None = None) -> EmailMessage:
    """The e-mail of one outbox row: plain text and HTML, the chart inline if given."""
    e = cfg.alerts.email
    msg = EmailMessage()
    msg["From"] = e.sender
    msg["To"] = ", ".join(e.recipients)
    msg["Subject"] = row["subject"]
    msg["Message-ID"] = row["message_id"]
    msg["Date"] = format_datetime(dt.datetime.now(dt.UTC))
    msg["X-Comove-Rule"] = row["rule"]
    msg.set_content(row["body_text"])
    html = row["body_html"]
    if chart is not None:
        cid = make_msgid(domain="comove.alerts")
        html = html.replace("<!--chart-->", f"<p><img src='cid:{cid[1:-1]}' "
                            "alt='tail coefficients, last window ends' width='640'></p>")
        msg.add_alternative(html, subtype="html")
        msg.get_payload()[1].add_related(chart, "image", "png", cid=cid)
    else:
        msg.add_alternative(html, subtype="html")
    return msg


def digest_message(cfg: Config, rows: list[dict]) -> tuple[str, EmailMessage]:
    """(message id, message) of one digest of several outbox rows."""
    digest_id = "<" + hashlib.sha256("|".join(r["message_id"] for r in rows).encode()
                                     ).hexdigest()[:32] + "@comove.digest>"
    day = _utcnow().date()
    subject = f"comove: daily digest {day:%Y-%m-%d}, {len(rows)} alert(s)"
    text = "\n\n".join([subject, *(f"--- {r['subject']}\n{r['body_text']}" for r in rows)])
    body = "".join(f"<hr>{r['body_html']}" for r in rows)
    fake = {"subject": subject, "message_id": digest_id, "rule": "digest",
            "body_text": text, "body_html": f"<html><body>{body}</body></html>"}
    return digest_id, build_message(cfg, fake)


def send_pending(store, cfg: Config, *, dry_run: bool = False,
                 chart: Callable[[dict], bytes | None] | None = None,
                 echo: Callable[[str], None] = print, now: dt.datetime | None = None
                 ) -> SendReport:
    """Deliver the pending outbox messages (see the module notes for which are tried).

    Parameters
    ----------
    store : monitor.data.store.Store
    cfg : Config
    dry_run : bool
        Print what would be tried (subjects and recipients); change nothing.
    chart : callable, optional
        Row -> PNG bytes or None (see :func:`monitor.alerts.charts.tail_chart`).
    echo : callable
        Where the dry run prints.
    now : datetime, optional
        The current UTC time (tests).

    Raises
    ------
    InputError
        Messages are pending but no server, sender or recipients are configured, or a
        credential variable is missing.
    """
    now = now or _utcnow()
    if dry_run:
        rows = store.pending_messages()
        e = cfg.alerts.email
        for r in rows:
            echo(f"would send {r['message_id']} to {', '.join(e.recipients) or '(none)'}: "
                 f"{r['subject']}")
        return SendReport(len(rows), 0, 0, 0, 0, 0, 0, True)
    pending = store.undelivered_count()
    if not pending:
        return SendReport(0, 0, 0, 0, 0, 0, 0, False)
    e = cfg.alerts.email
    if not (e.host and e.sender and e.recipients):
        raise InputError(f"{pending} message(s) are pending but alerts.email needs host, "
                         "sender and recipients; nothing sent")
    login = credentials(cfg)
    token = uuid.uuid4().hex
    try:
        server = _connect(cfg, login)
    except Exception as exc:  # noqa: BLE001 - every failure is recorded and reported
        reason = _describe(exc, cfg)
        due = store.claim_messages(token, now, due_only=True)
        store.release_messages(token, [_retry(m, reason, cfg, now) for m in due])
        return _report(store, cfg, now, pending, len(due), 0, len(due), 0, (reason,))
    claimed = store.claim_messages(token, now, due_only=False)
    try:
        sent, failed, refused, errors = _deliver(store, cfg, server, claimed, token, chart, now)
    finally:
        try:
            server.quit()
        except Exception:  # noqa: BLE001 - the messages are already accounted for
            server.close()
    return _report(store, cfg, now, pending, len(claimed), sent, failed, refused, errors)


def _deliver(store, cfg: Config, server: smtplib.SMTP, claimed: list[dict], token: str,
             chart: Callable[[dict], bytes | None] | None, now: dt.datetime
             ) -> tuple[int, int, int, tuple[str, ...]]:
    """Send the claimed messages (or their digest) one by one; returns (sent, failed,
    refused, distinct errors). Every message ends sent, queued again or refused."""
    batches = [claimed] if cfg.alerts.digest else [[r] for r in claimed]
    sent = failed = refused = 0
    errors: dict[str, None] = {}
    for i, members in enumerate(batches):
        try:
            if cfg.alerts.digest:
                sent_as, msg = digest_message(cfg, members)
            else:
                sent_as = members[0]["message_id"]
                msg = build_message(cfg, members[0], chart(members[0]) if chart else None)
        except Exception as exc:  # noqa: BLE001 - a message that cannot be built is refused
            reason = f"cannot build the message: {type(exc).__name__}: {exc}"
            store.release_messages(token, [_refuse(m, reason) for m in members])
            refused += len(members)
            errors[reason] = None
            continue
        try:
            server.send_message(msg)
        except Exception as exc:  # noqa: BLE001
            reason = _describe(exc, cfg)
            errors[reason] = None
            if _permanent(exc):
                store.release_messages(token, [_refuse(m, reason) for m in members])
                refused += len(members)
                continue
            # A lost connection fails everything not tried yet; a temporary refusal only this.
            lost = isinstance(exc, smtplib.SMTPServerDisconnected) or (
                isinstance(exc, OSError) and not isinstance(exc, smtplib.SMTPException))
            failing = [m for ms in batches[i:] for m in ms] if lost else members
            store.release_messages(token, [_retry(m, reason, cfg, now) for m in failing])
            failed += len(failing)
            if lost:
                break
            continue
        store.mark_sent([m["message_id"] for m in members], sent_as, _utcnow(), token)
        sent += len(members)
    return sent, failed, refused, tuple(errors)


def _permanent(exc: BaseException) -> bool:
    """A 5xx answer: the server will refuse the message again (RFC 5321, section 4.2.1)."""
    if isinstance(exc, smtplib.SMTPRecipientsRefused):
        return all(code >= 500 for code, _ in exc.recipients.values())
    return isinstance(exc, smtplib.SMTPResponseException) and exc.smtp_code >= 500


def _retry(m: dict, reason: str, cfg: Config, now: dt.datetime
           ) -> tuple[str, str, int, str, dt.datetime]:
    """A failed attempt: pending again, due after the back-off."""
    attempts = int(m["attempts"]) + 1
    wait = min(dt.timedelta(seconds=cfg.alerts.retry_seconds * 2 ** (attempts - 1)), MAX_RETRY)
    return m["message_id"], "pending", attempts, reason[:500], now + wait


def _refuse(m: dict, reason: str) -> tuple[str, str, int, str, dt.datetime]:
    """A message refused for good: state failed, its error kept."""
    return m["message_id"], "failed", int(m["attempts"]) + 1, reason[:500], m["next_attempt"]


def _report(store, cfg: Config, now: dt.datetime, pending: int, due: int, sent: int,
            failed: int, refused: int, errors: tuple[str, ...]) -> SendReport:
    late = store.undelivered_count(now - dt.timedelta(minutes=cfg.alerts.late_after_minutes))
    return SendReport(pending, due, sent, failed, refused, pending - due, late, False, errors)
