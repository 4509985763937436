"""Alert e-mail: rules and queue written by `comove update`, delivery by `comove alerts send`
to a real SMTP server (aiosmtpd on 127.0.0.1), with nothing lost and nothing sent twice."""

from __future__ import annotations

import datetime as dt
import email
import email.policy
import shutil
from dataclasses import replace
from pathlib import Path

import pandas as pd
import pytest
import sqlalchemy as sa
from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult

from monitor import cli
from monitor.alerts import rules as alerts
from monitor.config import AlertRule, AlertsConfig, Config, EmailConfig, RollingConfig, StoreConfig
from monitor.data.ingest import ingest_sources, read_file_source
from monitor.data.store import Store, episodes, outbox
from monitor.engine.pipeline import update_marginals, update_rolling, update_signals
from synthetic_feeds import generate

from .conftest import free_port


class _Inbox:
    def __init__(self):
        self.messages: list[email.message.EmailMessage] = []
        self.envelopes = []

    async def handle_DATA(self, server, session, envelope):
        self.envelopes.append(envelope)
        self.messages.append(email.message_from_bytes(envelope.content,
                                                      policy=email.policy.default))
        return "250 OK"


class _Server:
    """A real SMTP server on 127.0.0.1 (optionally requiring AUTH LOGIN/PLAIN)."""

    def __init__(self, port: int, credentials: tuple[str, str] | None = None):
        self.inbox = _Inbox()
        kwargs = {}
        if credentials is not None:
            def authenticator(server, session, envelope, mechanism, auth_data):
                ok = (auth_data.login.decode(), auth_data.password.decode()) == credentials
                # handled=False: the server itself answers 235 or 535.
                return AuthResult(success=ok, handled=False)
            kwargs = {"authenticator": authenticator, "auth_require_tls": False,
                      "auth_required": True}
        self.controller = Controller(self.inbox, hostname="127.0.0.1", port=port, **kwargs)

    def __enter__(self):
        self.controller.start()
        return self.inbox

    def __exit__(self, *exc):
        self.controller.stop()


@pytest.fixture(scope="module")
def built_store(tmp_path_factory) -> Path:
    """A tail-shift pair (invented data: Gaussian, then Clayton at the same tau 0.35) with
    metrics and signals, and no alert rules run yet (its signals step queues nothing: the
    default max_age keeps the history out)."""
    tmp = tmp_path_factory.mktemp("alerts")
    scen = generate("tail-shift", seed=3, calm_years=2.0, shifted_years=1.5, n_assets=2)
    path = tmp / "prices.csv"
    scen.prices.to_csv(path, float_format="%.12g", date_format="%Y-%m-%d")
    url = f"sqlite:///{tmp / 'store.sqlite'}"
    cfg = Config(store=StoreConfig(url=url), rolling=RollingConfig(window=120))
    with Store(url) as store:
        ingest_sources(store, [read_file_source(path, "prices")])
        update_marginals(store, cfg, progress=False)
        update_rolling(store, cfg, progress=False)
    return tmp / "store.sqlite"


def _cfg(db: Path, port: int, **alerts_options) -> Config:
    email_cfg = EmailConfig(host="127.0.0.1", port=port, sender="comove@risk.example",
                            recipients=("desk@risk.example", "cro@risk.example"))
    opts = {"max_age_days": 100_000, "retry_seconds": 0, "email": email_cfg}
    opts.update(alerts_options)
    return Config(store=StoreConfig(url=f"sqlite:///{db}"), rolling=RollingConfig(window=120),
                  alerts=AlertsConfig(**opts))


@pytest.fixture
def store_copy(built_store, tmp_path) -> Path:
    db = tmp_path / "store.sqlite"
    shutil.copy(built_store, db)
    return db


def _outbox(db: Path) -> pd.DataFrame:
    with Store(f"sqlite:///{db}") as store, store.engine.connect() as conn:
        return pd.DataFrame(conn.execute(sa.select(outbox)).mappings().all())


def _episodes(db: Path) -> pd.DataFrame:
    with Store(f"sqlite:///{db}") as store, store.engine.connect() as conn:
        return pd.DataFrame(conn.execute(sa.select(episodes)).mappings().all())


def _update_signals(cfg: Config) -> None:
    with Store(cfg.store.url) as store:
        update_signals(store, cfg)


def _send(cfg: Config, *extra: str, tmp: Path) -> int:
    path = tmp / "comove.toml"
    path.write_text(_toml(cfg))
    return cli.main(["alerts", "send", "--config", str(path), *extra])


def _toml(cfg: Config) -> str:
    a, e = cfg.alerts, cfg.alerts.email
    lines = ["[store]", f'url = "{cfg.store.url}"', "[rolling]", "window = 120", "[alerts]",
             f"max_age_days = {a.max_age_days}", f"retry_seconds = {a.retry_seconds}",
             f"digest = {str(a.digest).lower()}", "[alerts.email]", f'host = "{e.host}"',
             f"port = {e.port}", f'sender = "{e.sender}"',
             "recipients = [" + ", ".join(f'"{r}"' for r in e.recipients) + "]",
             f"starttls = {str(e.starttls).lower()}",
             f'username_env = "{e.username_env}"', f'password_env = "{e.password_env}"']
    return "\n".join(lines) + "\n"


def test_update_queues_one_message_per_new_episode_once(store_copy):
    cfg = _cfg(store_copy, free_port())
    _update_signals(cfg)
    eps, box = _episodes(store_copy), _outbox(store_copy)
    assert len(eps) >= 1, "the Clayton regime should raise at least one episode"
    starts = box[box["kind"] == "episode-start"]
    # One message per episode except repeats within the cool-down after the previous one.
    assert len(starts) <= len(eps) and len(starts) >= 1
    assert starts["message_id"].is_unique and (starts["state"] == "pending").all()
    for row in starts.itertuples():
        assert ((eps["tail"] == row.tail) & (eps["start"] == row.event_date)).any()
    _update_signals(cfg)  # idempotent: the same events have the same ids
    assert len(_outbox(store_copy)) == len(box)


def test_queue_and_episode_change_share_one_transaction(store_copy, monkeypatch):
    cfg = _cfg(store_copy, free_port())

    def broken(*args, **kwargs):
        raise RuntimeError("disk full while queueing")

    monkeypatch.setattr(alerts, "queue", broken)
    with pytest.raises(RuntimeError, match="disk full"):
        _update_signals(cfg)
    # The failing queue rolled back the pair's episode change with it.
    assert _episodes(store_copy).empty and _outbox(store_copy).empty


def test_default_age_limit_keeps_history_out_of_the_queue(store_copy):
    cfg = replace(_cfg(store_copy, free_port()), alerts=AlertsConfig())
    _update_signals(cfg)
    assert not _episodes(store_copy).empty
    newest = pd.Timestamp(_episodes(store_copy)["start"].max())
    box = _outbox(store_copy)
    assert box.empty or (pd.to_datetime(box["event_date"]) > newest - pd.Timedelta(days=5)).all()


def test_delivery_content_and_no_duplicates(store_copy, tmp_path, capsys):
    port = free_port()
    cfg = _cfg(store_copy, port)
    _update_signals(cfg)
    queued = _outbox(store_copy)
    with _Server(port) as inbox:
        assert _send(cfg, tmp=tmp_path) == 0
        assert len(inbox.messages) == len(queued)
        msg = inbox.messages[0]
        row = queued.set_index("message_id").loc[msg["Message-ID"]]
        assert msg["Subject"] == row["subject"] and "MRW40/OSV25" in msg["Subject"]
        assert msg["To"] == "desk@risk.example, cro@risk.example"
        text = msg.get_body(("plain",)).get_content()
        for needle in ("Kendall's tau", "lower tail, nonparametric", "lower tail, model",
                       "upper tail, model", "selected family", "not investment advice"):
            assert needle.lower() in text.lower(), needle
        html_part = msg.get_body(("html",)).get_content()
        assert "<table" in html_part
        if shutil.which("chromium"):
            # With plotly's static export (kaleido + the local Chromium): the chart, inline.
            images = [p for p in msg.walk() if p.get_content_type() == "image/png"]
            assert len(images) == 1 and images[0].get_content()[:8] == b"\x89PNG\r\n\x1a\n"
            assert f"cid:{images[0]['Content-ID'][1:-1]}" in html_part
        assert inbox.envelopes[0].rcpt_tos == ["desk@risk.example", "cro@risk.example"]
        # Sending again sends nothing: every message went out exactly once.
        assert _send(cfg, tmp=tmp_path) == 0
        assert len(inbox.messages) == len(queued)
        assert len({m["Message-ID"] for m in inbox.messages}) == len(queued)
    box = _outbox(store_copy)
    assert (box["state"] == "sent").all() and (box["attempts"] == 1).all()
    assert "alerts: nothing to send" in capsys.readouterr().out


def test_server_down_then_up_delivers_every_alert_once(store_copy, tmp_path, capsys):
    port = free_port()  # nothing listens there yet
    cfg = _cfg(store_copy, port)
    _update_signals(cfg)
    n = len(_outbox(store_copy))
    assert _send(cfg, tmp=tmp_path) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and f"connection refused by 127.0.0.1:{port}" in err
    box = _outbox(store_copy)
    assert (box["state"] == "pending").all() and (box["attempts"] == 1).all()
    assert box["last_error"].str.contains("connection refused").all()
    with _Server(port) as inbox:
        assert _send(cfg, tmp=tmp_path) == 0
        assert _send(cfg, tmp=tmp_path) == 0
    assert len(inbox.messages) == n == len({m["Message-ID"] for m in inbox.messages})
    assert (_outbox(store_copy)["attempts"] == 2).all()


def test_backoff_spaces_failures_but_a_reachable_server_gets_everything(store_copy, tmp_path,
                                                                         capsys):
    # issue 14: with the server back, every pending alert goes at once; the back-off only
    # spaces the attempts recorded while the server keeps failing, at most 30 minutes apart.
    cfg = _cfg(store_copy, free_port(), retry_seconds=600)
    _update_signals(cfg)
    n = len(_outbox(store_copy))
    assert _send(cfg, tmp=tmp_path) == 1
    assert f"{n} pending, {n} due: 0 sent, {n} failed" in capsys.readouterr().out
    assert _send(cfg, tmp=tmp_path) == 0  # still down, and nothing due for ten minutes
    assert f"{n} pending, 0 due: 0 sent, 0 failed (queued again), 0 refused for good, " \
           f"{n} deferred; 0 late" in capsys.readouterr().out
    box = _outbox(store_copy)
    assert (box["attempts"] == 1).all() and (box["state"] == "pending").all()
    wait = (pd.to_datetime(box["next_attempt"]) - pd.to_datetime(box["created"]))
    assert (wait >= pd.Timedelta(seconds=600)).all()
    with _Server(cfg.alerts.email.port) as inbox:
        assert _send(cfg, tmp=tmp_path) == 0  # not due by the back-off, sent all the same
        assert len(inbox.messages) == n
    assert (_outbox(store_copy)["state"] == "sent").all()


def test_backoff_is_capped_at_thirty_minutes_and_late_alerts_exit_1(store_copy, tmp_path,
                                                                      capsys):
    from monitor.alerts.mailer import send_pending

    cfg = _cfg(store_copy, free_port(), retry_seconds=7 * 24 * 3600)
    _update_signals(cfg)
    n = len(_outbox(store_copy))
    with Store(cfg.store.url) as store:
        report = send_pending(store, cfg)
        assert (report.due, report.failed, report.late) == (n, n, 0) and not report.ok
        box = _outbox(store_copy)
        wait = pd.to_datetime(box["next_attempt"]) - pd.to_datetime(box["created"])
        assert (wait <= pd.Timedelta(minutes=30, seconds=5)).all()
        # Two hours later, still down: every alert is late (older than 60 minutes).
        later = dt.datetime.now(dt.UTC).replace(tzinfo=None) + dt.timedelta(hours=2)
        report = send_pending(store, cfg, now=later)
        assert (report.pending, report.late) == (n, n)
        assert f"{n} late" in report.lines()[0]


def test_authentication_with_credentials_from_the_environment(store_copy, tmp_path,
                                                              monkeypatch, capsys):
    port = free_port()
    cfg = _cfg(store_copy, port)
    cfg = replace(cfg, alerts=replace(cfg.alerts, email=replace(
        cfg.alerts.email, username_env="COMOVE_TEST_SMTP_USER",
        password_env="COMOVE_TEST_SMTP_PASSWORD")))
    _update_signals(cfg)
    monkeypatch.setenv("COMOVE_TEST_SMTP_USER", "alerts")
    monkeypatch.delenv("COMOVE_TEST_SMTP_PASSWORD", raising=False)
    assert _send(cfg, tmp=tmp_path) == 2
    assert "password_env names COMOVE_TEST_SMTP_PASSWORD, which is not set" in \
        capsys.readouterr().err
    with _Server(port, credentials=("alerts", "s3cret-pass")) as inbox:
        monkeypatch.setenv("COMOVE_TEST_SMTP_PASSWORD", "wrong")
        assert _send(cfg, tmp=tmp_path) == 1
        assert "refused the credentials (535)" in capsys.readouterr().err
        assert inbox.messages == []
        monkeypatch.setenv("COMOVE_TEST_SMTP_PASSWORD", "s3cret-pass")
        assert _send(cfg, tmp=tmp_path) == 0
        assert len(inbox.messages) == len(_outbox(store_copy))
    # The secret is never written into the store.
    assert not _outbox(store_copy).astype(str).apply(
        lambda c: c.str.contains("s3cret-pass")).any().any()


def test_starttls_refused_by_the_server_is_a_clear_error(store_copy, tmp_path, capsys):
    port = free_port()
    cfg = _cfg(store_copy, port)
    cfg = replace(cfg, alerts=replace(cfg.alerts, email=replace(cfg.alerts.email,
                                                                starttls=True)))
    _update_signals(cfg)
    with _Server(port) as inbox:  # no TLS context: it does not offer STARTTLS
        assert _send(cfg, tmp=tmp_path) == 1
        assert inbox.messages == []
    err = capsys.readouterr().err
    assert f"127.0.0.1:{port} does not offer STARTTLS (alerts.email.starttls = true)" in err
    assert (_outbox(store_copy)["state"] == "pending").all()


def test_dry_run_prints_and_changes_nothing(store_copy, tmp_path, capsys):
    cfg = _cfg(store_copy, free_port())
    _update_signals(cfg)
    before = _outbox(store_copy)
    assert _send(cfg, "--dry-run", tmp=tmp_path) == 0
    out = capsys.readouterr().out
    assert out.count("would send <") == len(before)
    assert "desk@risk.example, cro@risk.example" in out
    pd.testing.assert_frame_equal(_outbox(store_copy), before)


def test_digest_sends_one_message_with_every_alert(store_copy, tmp_path):
    port = free_port()
    cfg = _cfg(store_copy, port, digest=True)
    _update_signals(cfg)
    box = _outbox(store_copy)
    with _Server(port) as inbox:
        assert _send(cfg, tmp=tmp_path) == 0
    assert len(inbox.messages) == 1
    text = inbox.messages[0].get_body(("plain",)).get_content()
    assert all(s in text for s in box["subject"])
    after = _outbox(store_copy)
    assert (after["state"] == "sent").all() and after["sent_as"].nunique() == 1


@pytest.mark.parametrize(("snippet", "message"), [
    ('recipients = ["desk at risk"]',
     r"alerts\.email\.recipients\[1\]: 'desk at risk' is not an e-mail address"),
    ('sender = "comove@"', r"alerts\.email\.sender: 'comove@' is not an e-mail address"),
    ('recipients = ["a@risk.example", "a@risk.example"]', r"lists an address twice"),
    ('username_env = "MY-USER"\npassword_env = "P"', r"must name an environment variable"),
])
def test_malformed_addresses_are_refused_at_config_load(tmp_path, capsys, snippet, message):
    path = tmp_path / "comove.toml"
    sender = "" if "sender" in snippet else 'sender = "s@risk.example"\n'
    path.write_text(f'[alerts.email]\nhost = "h"\n{sender}{snippet}\n')
    assert cli.main(["alerts", "send", "--config", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and pd.Series([err]).str.contains(message).all(), err


@pytest.mark.parametrize(("rules", "message"), [
    ('[[alerts.rules]]\nkind = "tail-level"\n', r"alerts\.rules\[1\]\.above must lie in"),
    ('[[alerts.rules]]\nkind = "spike"\n', r"alerts\.rules\[1\]\.kind must be one of"),
    ('[[alerts.rules]]\nkind = "episode"\n[[alerts.rules]]\nkind = "episode"\n',
     r"alerts\.rules\[2\]\.name: 'episode' names two rules"),
    ('[alerts]\nwatchlist = ["MRW40"]\n', r"alerts\.watchlist: 'MRW40' is not of the form"),
])
def test_invalid_rules_are_refused_naming_the_key(tmp_path, capsys, rules, message):
    path = tmp_path / "comove.toml"
    path.write_text(rules)
    assert cli.main(["alerts", "send", "--config", str(path)]) == 2
    assert pd.Series([capsys.readouterr().err]).str.contains(message).all()


def test_rule_helpers():
    a = AlertsConfig(watchlist=("A/B",), quiet=("B", "C/D"))
    assert alerts.pair_alerts("A", "B", a) == (True, True)  # the watchlist wins
    assert alerts.pair_alerts("B", "E", a) == (False, False)
    assert alerts.pair_alerts("D", "C", a) == (False, False)
    assert alerts.pair_alerts("E", "F", a) == (True, False)
    assert alerts.message_id("k", 1) == alerts.message_id("k", 1) != alerts.message_id("k", 2)
    import datetime as dt
    first = {"tail": "lower", "start": dt.date(2020, 1, 1), "end": dt.date(2020, 2, 1)}
    soon = {"tail": "lower", "start": dt.date(2020, 2, 20), "end": None}
    later = {"tail": "lower", "start": dt.date(2020, 4, 1), "end": None}
    assert not alerts._cooled_down(soon, [first, soon], 30)
    assert alerts._cooled_down(later, [first, later], 30)
    assert alerts.rules_in_force(Config()) == alerts.DEFAULT_RULES
    assert alerts.rule_name(AlertRule(kind="tail-level", above=0.3)) == "tail-level"


def _frame(values: list[float]) -> pd.DataFrame:
    """A signal frame with a given nonparametric lower tail path (invented numbers)."""
    n = len(values)
    dates = pd.bdate_range("2024-01-01", periods=n)
    return pd.DataFrame({
        "date": dates, "start": dates - pd.Timedelta(days=360), "n": 250,
        "kendall_tau": 0.35, "family": "clayton", "rotation": 0,
        "tail_lower_emp": values, "tail_lower": 0.3, "tail_upper_emp": 0.1, "tail_upper": 0.0,
        "tail_lower_emp_se": 0.06, "tail_upper_emp_se": 0.05, "gauss_tail_q": 0.28,
        "state_lower": "calm", "state_upper": "calm"})


def test_tail_level_and_tail_rise_rules_fire_once_per_crossing():
    path = [0.3] * 80 + [0.5, 0.5, 0.3, 0.6]  # crosses 0.45 twice near the end
    rules = (AlertRule(name="deep", kind="tail-level", tail="lower", above=0.45),
             AlertRule(name="rise", kind="tail-rise", tail="lower", rise=0.25, days=60))
    cfg = Config(alerts=AlertsConfig(rules=rules, max_age_days=10))
    events = alerts.pair_events(cfg, "k", "A", "B", _frame(path), [], [], [])
    deep = [e for e in events if e.rule == "deep"]
    rise = [e for e in events if e.rule == "rise"]
    dates = pd.bdate_range("2024-01-01", periods=len(path))
    assert [e.date for e in deep] == [dates[80].date(), dates[83].date()]
    assert [e.date for e in rise] == [dates[83].date()]  # 0.6 - 0.3 >= 0.25; 0.5 - 0.3 is not
    assert all(e.kind in ("tail-level", "tail-rise") and e.tail == "lower" for e in events)
    # The message reports the change over the last 60 window ends: 0.600 now, 0.300 then.
    text = deep[-1].text
    assert "lower tail, nonparametric" in text and "0.600" in text and "0.300" in text
    # Older crossings are outside max_age; quiet pairs never alert, the watchlist always.
    quiet = replace(cfg, alerts=replace(cfg.alerts, quiet=("A",)))
    assert alerts.pair_events(quiet, "k", "A", "B", _frame(path), [], [], []) == []
    assert alerts.pair_events(cfg, "k", "A", "B", _frame([0.5] + [0.3] * 90), [], [], []) == []
