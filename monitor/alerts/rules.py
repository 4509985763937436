"""Alert rules, the events they raise and the messages queued for them.

``comove update`` calls :func:`pair_events` for each pair after its episodes are synced and
:func:`queue` in the same transaction, so an outbox entry exists exactly when the state
change it reports is stored. :mod:`monitor.alerts.mailer` delivers the queue.

Rules (``[[alerts.rules]]``, see :class:`monitor.config.AlertRule`):

- ``episode``: a tail/centre divergence, tail spike or family-switch episode starts (and,
  with ``on_end``, ends). A new episode of the same pair and tail within
  ``alerts.cooldown_days`` after the previous one ended is recorded but not mailed: about
  half of the true changes in the detection benchmark raise two episodes in a row.
- ``tail-level``: the tail coefficient (nonparametric C_n(q,q)/q or the selected family's)
  crosses above ``above``.
- ``tail-rise``: it rose by at least ``rise`` over the last ``days`` window ends.
- ``universe``: the share of monitored pairs in alert crosses ``share``.

Only events dated within ``alerts.max_age_days`` of the newest data are queued, so that a
first backfill does not mail years of history. Pairs on the ``watchlist`` also alert when a
tail enters the watch state; ``quiet`` pairs or assets never alert (the watchlist wins). Each
event has a message id derived from what it reports (rule, pair, tail, date), so re-running an
update never queues it twice.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import html
from dataclasses import dataclass

import numpy as np
import pandas as pd

from monitor.common.arrays import overlap_days
from monitor.common.wording import CAUTION, finite_level_note
from monitor.config import AlertRule, AlertsConfig, Config
from monitor.data.store import Connection, Store, Table
from monitor.settings import Settings

#: Rule in force when the configuration names none.
DEFAULT_RULES = (AlertRule(name="episodes", kind="episode"),)
#: Window ends over which a message reports the change of the tail coefficients.
CHANGE_DAYS = 60
TAILS = ("lower", "upper")


@dataclass(frozen=True, slots=True)
class AlertEvent:
    """Something worth one message: what happened, to which pair, on which date."""

    message_id: str
    rule: str
    kind: str  # episode-start, episode-end, tail-level, tail-rise, watch, universe
    pair: tuple[str, str] | None
    tail: str | None
    date: dt.date
    subject: str
    text: str
    html: str


def rules_in_force(cfg: Config) -> tuple[AlertRule, ...]:
    """The configured rules, or :data:`DEFAULT_RULES`."""
    return cfg.alerts.rules or DEFAULT_RULES


def rule_name(rule: AlertRule) -> str:
    return rule.name or rule.kind


def pair_alerts(a: str, b: str, alerts: AlertsConfig) -> tuple[bool, bool]:
    """(may alert, on the watchlist) for the pair ``a``/``b`` (either order)."""
    names = {f"{a}/{b}", f"{b}/{a}"}
    watched = bool(names & set(alerts.watchlist))
    quiet = bool(names & set(alerts.quiet)) or a in alerts.quiet or b in alerts.quiet
    return watched or not quiet, watched


def message_id(*parts: object) -> str:
    """A stable RFC 5322 Message-ID for an event (the same event, the same id)."""
    digest = hashlib.sha256("|".join(str(p) for p in parts).encode()).hexdigest()[:32]
    return f"<{digest}@comove.alerts>"


def _tails(rule: AlertRule) -> tuple[str, ...]:
    return TAILS if rule.tail == "both" else (rule.tail,)


def _recent(dates: pd.Series, newest: pd.Timestamp, max_age: int) -> np.ndarray:
    return (dates > newest - pd.Timedelta(days=max_age)).to_numpy()


def _up_crossings(flag: np.ndarray) -> np.ndarray:
    """Positions where a boolean series turns true (the first position counts if true)."""
    prev = np.concatenate([[False], flag[:-1]])
    return np.flatnonzero(flag & ~prev)


def pair_events(cfg: Config, settings_key: str, a: str, b: str, frame: pd.DataFrame,
                new_episodes: list[dict], ended_episodes: list[dict],
                all_episodes: list[dict], fallbacks: pd.DataFrame | None = None
                ) -> list[AlertEvent]:
    """The events of one pair after an update.

    Parameters
    ----------
    cfg : Config
    settings_key : str
        The signals settings key (part of every message id).
    a, b : str
        The pair.
    frame : DataFrame
        The pair's signal frame (:func:`monitor.stats.signals.pair_signals`), date order.
    new_episodes, ended_episodes : list of dict
        What :meth:`monitor.data.store.Store.sync_episodes` returned.
    all_episodes : list of dict
        Every current episode of the pair (for the cool-down of repeated episodes).
    fallbacks : DataFrame, optional
        :meth:`monitor.data.store.Store.fallback_spans` of the pair's assets: a message about a
        window holding such residuals says so.

    Returns
    -------
    list of AlertEvent
        Dated within ``alerts.max_age_days`` of the newest window end.
    """
    alerts = cfg.alerts
    allowed, watched = pair_alerts(a, b, alerts)
    if not allowed or frame.empty:
        return []
    dates = pd.to_datetime(frame["date"]).reset_index(drop=True)
    newest = dates.iloc[-1]
    recent = _recent(dates, newest, alerts.max_age_days)
    horizon = (newest - pd.Timedelta(days=alerts.max_age_days)).date()
    events: list[AlertEvent] = []

    def add(rule_label, kind, tail, pos, headline):
        date = dates.iloc[pos].date()
        mid = message_id(settings_key, rule_label, kind, a, b, tail, date)
        subject, text, body = compose_pair(cfg, a, b, tail, frame, pos, headline, fallbacks)
        events.append(AlertEvent(mid, rule_label, kind, (a, b), tail, date, subject, text,
                                 body))

    for rule in rules_in_force(cfg):
        label = rule_name(rule)
        tails = _tails(rule)
        if rule.kind == "episode":
            for e in new_episodes:
                if e["tail"] not in tails or e["start"] <= horizon:
                    continue
                if _cooled_down(e, all_episodes, alerts.cooldown_days):
                    pos = int(dates.searchsorted(pd.Timestamp(e["start"])))
                    add(label, "episode-start", e["tail"], min(pos, len(dates) - 1),
                        f"{e['tail']} tail episode ({e['cause']}, {e['statistic']}) started "
                        f"{e['start']:%Y-%m-%d}")
            if rule.on_end:
                for e in ended_episodes:
                    if e["tail"] in tails and e["end"] > horizon:
                        pos = int(dates.searchsorted(pd.Timestamp(e["end"])))
                        add(label, "episode-end", e["tail"], min(pos, len(dates) - 1),
                            f"{e['tail']} tail episode that started {e['start']:%Y-%m-%d} "
                            f"ended {e['end']:%Y-%m-%d}")
        elif rule.kind in ("tail-level", "tail-rise"):
            for tail in tails:
                value = _tail_series(frame, tail, rule.measure)
                if rule.kind == "tail-level":
                    flag = value > rule.above
                    what = f"above {rule.above:g}"
                else:
                    base = np.concatenate([np.full(rule.days, np.nan), value[:-rule.days]])
                    flag = (value - base) >= rule.rise
                    what = f"up by {rule.rise:g} or more over {rule.days} window ends"
                for pos in _up_crossings(np.nan_to_num(flag, nan=0).astype(bool)):
                    if recent[pos]:
                        add(label, rule.kind, tail, int(pos),
                            f"{tail} tail coefficient ({rule.measure}) {what}")
    if watched:
        for tail in TAILS:
            state = frame[f"state_{tail}"].astype(str).to_numpy()
            for pos in _up_crossings(state == "watch"):
                if recent[pos]:
                    add("watchlist", "watch", tail, int(pos),
                        f"{tail} tail entered the watch state (watchlist pair)")
    return events


def _cooled_down(episode: dict, all_episodes: list[dict], days: int) -> bool:
    """True unless a previous episode of the same tail ended within ``days`` before it."""
    for other in all_episodes:
        if (other["tail"] == episode["tail"] and other["start"] < episode["start"]
                and other["end"] is not None
                and (episode["start"] - other["end"]).days <= days):
            return False
    return True


def _tail_series(frame: pd.DataFrame, tail: str, measure: str) -> np.ndarray:
    col = f"tail_{tail}_emp" if measure == "nonparametric" else f"tail_{tail}"
    return frame[col].to_numpy(dtype=float)


def universe_events(cfg: Config, settings_key: str, share: pd.Series) -> list[AlertEvent]:
    """Universe-rule events from the share of monitored pairs in alert over time (a series on
    a date index), dated within ``alerts.max_age_days`` of its newest date."""
    rules = [r for r in rules_in_force(cfg) if r.kind == "universe"]
    if not rules or share.empty:
        return []
    dates = pd.Series(pd.to_datetime(share.index))
    recent = _recent(dates, dates.iloc[-1], cfg.alerts.max_age_days)
    values = share.to_numpy(dtype=float)
    out = []
    for rule in rules:
        label = rule_name(rule)
        for pos in _up_crossings(values >= rule.share):
            if not recent[pos]:
                continue
            date = dates.iloc[pos].date()
            subject = (f"comove: {values[pos]:.0%} of monitored pairs in alert on "
                       f"{date:%Y-%m-%d} (rule {label})")
            detail = (f"Share of pairs in alert: {values[pos]:.1%} (rule threshold "
                      f"{rule.share:.0%}).")
            out.append(AlertEvent(
                message_id(settings_key, label, "universe", date), label, "universe", None,
                None, date, subject, f"{subject}\n\n{detail}\n\n{CAUTION}",
                _html_page(subject, [("Share of pairs in alert", f"{values[pos]:.1%}")], "")))
    return out


# ----------------------------------------------------------------------------- messages
def _num(x: float, digits: int = 3) -> str:
    return "n/a" if x is None or not np.isfinite(x) else f"{x:.{digits}f}"


def change_table(frame: pd.DataFrame, pos: int, days: int = CHANGE_DAYS
                 ) -> list[tuple[str, str, str, str]]:
    """(measure, value now, value ``days`` window ends earlier, change) rows for a message."""
    then = max(pos - days, 0)
    rows = []
    for label, col in (("Kendall's tau", "kendall_tau"),
                       ("lower tail, nonparametric", "tail_lower_emp"),
                       ("lower tail, model", "tail_lower"),
                       ("upper tail, nonparametric", "tail_upper_emp"),
                       ("upper tail, model", "tail_upper"),
                       ("Gaussian at same tau (C(q,q)/q)", "gauss_tail_q")):
        now, before = float(frame[col].iloc[pos]), float(frame[col].iloc[then])
        rows.append((label, _num(now), _num(before), _num(now - before)))
    return rows


def compose_pair(cfg: Config, a: str, b: str, tail: str | None, frame: pd.DataFrame,
                 pos: int, headline: str, fallbacks: pd.DataFrame | None = None
                 ) -> tuple[str, str, str]:
    """(subject, plain text, HTML) of a pair's message about window end ``pos``; the window's
    residuals from a fallback marginal fit (``fallbacks``, per asset) are named in it."""
    row = frame.iloc[pos]
    date = pd.Timestamp(row["date"]).date()
    family = f"{row['family']} (rotation {int(row['rotation'])})"
    subject = f"comove: {a}/{b} {headline} ({date:%Y-%m-%d})"
    then = pd.Timestamp(frame["date"].iloc[max(pos - CHANGE_DAYS, 0)]).date()
    table = change_table(frame, pos)
    se = _num(float(row[f"tail_{tail or 'lower'}_emp_se"]))
    provenance = (f"Window of {int(row['n'])} trading days ending {date:%Y-%m-%d} "
                  f"(from {pd.Timestamp(row['start']).date():%Y-%m-%d}); selected family: "
                  f"{family}; nonparametric tails C_n(q,q)/q (binomial s.e. of the "
                  f"{tail or 'lower'} tail {se}); settings: {Settings.of(cfg).provenance()}.")
    provenance += _fallback_words(fallbacks, pd.Timestamp(row["start"]), pd.Timestamp(row["date"]))
    provenance += f" {finite_level_note(cfg.rolling.tail_q)}"
    lines = [f"{a}/{b}: {headline}.", "",
             f"{'measure':34s} {'now':>8s} {then:%Y-%m-%d} {'change':>8s}"]
    lines += [f"{m:34s} {now:>8s} {before:>10s} {ch:>8s}" for m, now, before, ch in table]
    lines += ["", provenance, "", CAUTION]
    cells = [("Pair", f"{a} / {b}"), ("Event", headline), ("Window end", f"{date:%Y-%m-%d}"),
             ("Selected family", family)]
    body = _change_html(table, then)
    page = _html_page(subject, cells, f"{body}<p>{html.escape(provenance)}</p>")
    return subject, "\n".join(lines), page


def _fallback_words(fallbacks: pd.DataFrame | None, start: pd.Timestamp, end: pd.Timestamp
                    ) -> str:
    """" Caution: ..." naming the assets whose residuals in [start, end] came from a fallback
    marginal fit ("" when none did)."""
    if fallbacks is None or fallbacks.empty:
        return ""
    hit = fallbacks[overlap_days(fallbacks["first"], fallbacks["last"], [start], [end])]
    if hit.empty:
        return ""
    assets = ", ".join(sorted(set(hit["asset"])))
    return (f" Caution: part of this window's residuals of {assets} come from the EWMA-t "
            "fallback (GARCH refused); the tail figures rest on a simpler volatility model.")


def _change_html(table, then: dt.date) -> str:
    head = ("<tr><th style='text-align:left'>measure</th><th>now</th>"
            f"<th>{then:%Y-%m-%d}</th><th>change</th></tr>")
    rows = "".join(f"<tr><td>{html.escape(m)}</td><td>{now}</td><td>{before}</td>"
                   f"<td>{ch}</td></tr>" for m, now, before, ch in table)
    return (f"<table cellpadding='4' style='border-collapse:collapse;font-size:13px'>"
            f"{head}{rows}</table>")


def _html_page(title: str, cells: list[tuple[str, str]], body: str) -> str:
    facts = "".join(f"<tr><td style='color:#5D6B75'>{html.escape(k)}</td>"
                    f"<td><b>{html.escape(v)}</b></td></tr>" for k, v in cells)
    return (f"<html><body style='font-family:Arial,sans-serif;color:#22303A'>"
            f"<h3 style='margin:0 0 8px 0'>{html.escape(title)}</h3>"
            f"<table cellpadding='3'>{facts}</table>{body}<!--chart-->"
            f"<p style='color:#5D6B75;font-size:12px'>{html.escape(CAUTION)}</p>"
            f"</body></html>")


# ----------------------------------------------------------------------------- queue
def queue(conn: Connection, outbox: Table, settings_key: str,
          events: list[AlertEvent]) -> int:
    """Insert the events not already queued (by message id) into the outbox
    (:data:`monitor.data.store.outbox`), in the caller's transaction; returns how many were
    new (:meth:`monitor.data.store.Store.queue_messages`)."""
    messages = [{"message_id": e.message_id, "settings": settings_key, "rule": e.rule,
                 "kind": e.kind, "asset_a": e.pair[0] if e.pair else None,
                 "asset_b": e.pair[1] if e.pair else None, "tail": e.tail,
                 "event_date": e.date, "subject": e.subject, "body_text": e.text,
                 "body_html": e.html}
                for e in events]
    return Store.queue_messages(conn, messages, outbox)
