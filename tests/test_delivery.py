"""Alert delivery under faults: one bad message never blocks the others, a permanent refusal
is recorded and not retried forever, and concurrent senders never send a message twice (two
and eight `comove alerts send` processes at once, on SQLite and on PostgreSQL).

A real SMTP server (aiosmtpd) on 127.0.0.1; messages are queued straight into the store's
outbox (invented subjects and bodies).
"""

from __future__ import annotations

import datetime as dt
import email
import email.policy
import re
import subprocess
import sys
from contextlib import contextmanager
from pathlib import Path

import pandas as pd
import pytest
import sqlalchemy as sa
from aiosmtpd.controller import Controller

from monitor import cli
from monitor.data.store import Store, outbox

from .conftest import free_port


class _Inbox:
    """Accepts every message except those whose subject holds REJECT (550) or BUSY (451)."""

    def __init__(self):
        self.messages = []

    async def handle_DATA(self, server, session, envelope):
        msg = email.message_from_bytes(envelope.content, policy=email.policy.default)
        if "REJECT" in msg["Subject"]:
            return "550 5.7.1 message refused by policy"
        if "BUSY" in msg["Subject"]:
            return "451 4.3.0 try again later"
        self.messages.append(msg)
        return "250 OK"


@contextmanager
def _smtp():
    """A real SMTP server on a free 127.0.0.1 port: (inbox, port)."""
    port = free_port()
    inbox = _Inbox()
    controller = Controller(inbox, hostname="127.0.0.1", port=port)
    controller.start()
    try:
        yield inbox, port
    finally:
        controller.stop()


def _queue(url: str, subjects: list[str]) -> None:
    now = dt.datetime.now(dt.UTC).replace(tzinfo=None)
    rows = [{"message_id": f"<m{i:03d}@comove.test>", "settings": "s", "rule": "episodes",
             "kind": "episode", "asset_a": "ALDER", "asset_b": "BIRCH", "tail": "lower",
             "event_date": dt.date(2024, 1, 2), "subject": subject, "body_text": "text",
             "body_html": "<p>html</p>"} for i, subject in enumerate(subjects)]
    with Store(url) as store, store.transaction() as conn:
        store.queue_messages(conn, rows)
    assert now  # queued "now": none is late


def _config(tmp: Path, url: str, port: int) -> Path:
    path = tmp / "comove.toml"
    path.write_text(f'[store]\nurl = "{url}"\n[alerts]\nretry_seconds = 600\n'
                    f'[alerts.email]\nhost = "127.0.0.1"\nport = {port}\n'
                    'sender = "comove@risk.example"\nrecipients = ["desk@risk.example"]\n')
    return path


def _box(url: str) -> pd.DataFrame:
    with Store(url) as store, store.engine.connect() as conn:
        return pd.DataFrame(conn.execute(sa.select(outbox)).mappings().all()).set_index(
            "message_id")


def test_a_poison_message_and_a_permanent_refusal_block_nothing(store_url, tmp_path, capsys):
    subjects = [f"comove: alert {i}" for i in range(6)]
    subjects[1] = "comove: ALDER/BIR\r\nBcc: everyone@example.com"  # cannot be a header
    subjects[3] = "comove: REJECT this one"
    subjects[4] = "comove: BUSY this one"
    _queue(store_url, subjects)
    with _smtp() as (inbox, port):
        config = str(_config(tmp_path, store_url, port))
        assert cli.main(["alerts", "send", "--config", config]) == 1
        out, err = capsys.readouterr()
        assert len(inbox.messages) == 3  # 0, 2 and 5
        assert "6 pending, 6 due: 3 sent, 1 failed (queued again), 2 refused for good" in out
        assert err.count("\n") == 1 and "2 message(s) refused for good" in err
        box = _box(store_url)
        state = box["state"].to_dict()
        assert [state[f"<m{i:03d}@comove.test>"] for i in range(6)] == [
            "sent", "failed", "sent", "failed", "pending", "sent"]
        assert "cannot build the message: ValueError" in box.loc["<m001@comove.test>",
                                                                "last_error"]
        assert "550" in box.loc["<m003@comove.test>", "last_error"]
        assert "451" in box.loc["<m004@comove.test>", "last_error"]
        # Refused messages are not retried: the next run tries only the temporary failure.
        assert cli.main(["alerts", "send", "--config", config]) == 1
        assert "1 pending, 1 due: 0 sent, 1 failed" in capsys.readouterr().out
        assert _box(store_url)["attempts"].to_dict()["<m003@comove.test>"] == 1
        # --retry-failed puts them back (the policy refusal is refused again).
        assert cli.main(["alerts", "send", "--retry-failed", "--config", config]) == 1
        out = capsys.readouterr().out
        assert "2 refused message(s) queued again" in out and "3 pending, 3 due" in out


@pytest.mark.parametrize("senders", [2, 8])
def test_concurrent_senders_never_send_a_message_twice(store_url, tmp_path, senders):
    n = 35
    _queue(store_url, [f"comove: alert {i}" for i in range(n)])
    with _smtp() as (inbox, port):
        config = str(_config(tmp_path, store_url, port))
        code = "import sys; from monitor.cli import main; sys.exit(main(sys.argv[1:]))"
        procs = [subprocess.Popen([sys.executable, "-c", code, "alerts", "send", "--config",
                                   config], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                  text=True) for _ in range(senders)]
        results = [p.communicate(timeout=300) for p in procs]
        assert [p.returncode for p in procs] == [0] * senders, results
    ids = [m["Message-ID"] for m in inbox.messages]
    assert len(ids) == n == len(set(ids))  # every message once, none twice
    box = _box(store_url)
    assert (box["state"] == "sent").all() and (box["attempts"] == 1).all()
    # A sender that starts after the others claimed everything says "nothing to send".
    sent = [re.search(r" due: (\d+) sent", out) for out, _ in results]
    assert all(m or "alerts: nothing to send" in out
               for m, (out, _) in zip(sent, results, strict=True)), results
    assert sum(int(m.group(1)) for m in sent if m) == n
