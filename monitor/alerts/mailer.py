"""Delivery of the alert outbox by SMTP (``comove alerts send``).

- Plain SMTP, STARTTLS (``alerts.email.starttls``) or SMTP over TLS (``alerts.email.ssl``);
  credentials come from the environment variables the configuration names, never from the
  file.
- Every message carries its outbox id as ``Message-ID``; a message is marked sent in its own
  transaction as soon as the server accepts it and only pending messages are ever sent, so a
  re-run never sends one twice.
- A failure leaves the message pending with its attempt count and last error, and the next
  attempt waits ``alerts.retry_seconds`` doubled per attempt (at most six hours).
- With ``alerts.digest`` the due messages of a run go out as one digest (its own id, derived
  from its members').
- A small chart of the pair's tail coefficients is attached inline when plotly's static
  export (kaleido with a local Chromium) works; the HTML part always has the table.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import os
import smtplib
import ssl
from collections.abc import Callable
from dataclasses import dataclass
from email.message import EmailMessage
from email.utils import format_datetime, make_msgid

from monitor.common.errors import InputError
from monitor.config import Config

#: Longest wait between attempts.
MAX_RETRY = dt.timedelta(hours=6)
SMTP_TIMEOUT = 20.0


@dataclass(frozen=True, slots=True)
class SendReport:
    """What one ``alerts send`` run did."""

    due: int
    sent: int
    failed: int
    dry_run: bool
    errors: tuple[str, ...] = ()

    def lines(self) -> list[str]:
        if self.dry_run:
            return [f"dry run: {self.due} message(s) would be sent; nothing was sent or changed"]
        out = [f"alerts: {self.sent} of {self.due} due message(s) sent"]
        if self.failed:
            out.append(f"  {self.failed} failed and stay queued: {self.errors[0]}")
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
    """Deliver every pending outbox message that is due.

    Parameters
    ----------
    store : monitor.data.store.Store
    cfg : Config
    dry_run : bool
        Print what would be sent (subjects and recipients); change nothing.
    chart : callable, optional
        Row -> PNG bytes or None (see :func:`monitor.alerts.charts.tail_chart`).
    echo : callable
        Where the dry run prints.
    now : datetime, optional
        The current UTC time (tests).

    Raises
    ------
    InputError
        Messages are due but no server, sender or recipients are configured, or a
        credential variable is missing.
    """
    now = now or _utcnow()
    rows = store.due_messages(now)
    if dry_run:
        e = cfg.alerts.email
        for r in rows:
            echo(f"would send {r['message_id']} to {', '.join(e.recipients) or '(none)'}: "
                 f"{r['subject']}")
        return SendReport(len(rows), 0, 0, True)
    if not rows:
        return SendReport(0, 0, 0, False)
    e = cfg.alerts.email
    if not (e.host and e.sender and e.recipients):
        raise InputError(f"{len(rows)} message(s) are due but alerts.email needs host, sender "
                         "and recipients; nothing sent")
    login = credentials(cfg)
    batches = [rows] if cfg.alerts.digest else [[r] for r in rows]
    try:
        server = _connect(cfg, login)
    except Exception as exc:  # noqa: BLE001 - every failure is recorded and reported
        reason = _describe(exc, cfg)
        _record_failure(store, rows, reason, cfg, now)
        return SendReport(len(rows), 0, len(rows), False, (reason,))
    sent = failed = 0
    errors: list[str] = []
    try:
        while batches:
            members = batches[0]
            if cfg.alerts.digest:
                sent_as, msg = digest_message(cfg, members)
            else:
                sent_as = members[0]["message_id"]
                msg = build_message(cfg, members[0], chart(members[0]) if chart else None)
            try:
                server.send_message(msg)
            except Exception as exc:  # noqa: BLE001
                reason = _describe(exc, cfg)
                errors.append(reason)
                # A lost connection fails everything still due; a refused message only itself.
                lost = isinstance(exc, smtplib.SMTPServerDisconnected | OSError)
                failing = [m for ms in batches for m in ms] if lost else members
                _record_failure(store, failing, reason, cfg, now)
                failed += len(failing)
                if lost:
                    break
                batches.pop(0)
                continue
            _mark_sent(store, members, sent_as)
            sent += len(members)
            batches.pop(0)
    finally:
        try:
            server.quit()
        except Exception:  # noqa: BLE001 - the messages are already accounted for
            server.close()
    return SendReport(len(rows), sent, failed, False, tuple(errors))


def _mark_sent(store, members: list[dict], sent_as: str) -> None:
    store.mark_sent([m["message_id"] for m in members], sent_as, _utcnow())


def _record_failure(store, members: list[dict], reason: str, cfg: Config,
                    now: dt.datetime) -> None:
    failures = []
    for m in members:
        attempts = int(m["attempts"]) + 1
        wait = min(dt.timedelta(seconds=cfg.alerts.retry_seconds * 2 ** (attempts - 1)),
                   MAX_RETRY)
        failures.append((m["message_id"], attempts, reason[:500], now + wait))
    store.record_failures(failures)
