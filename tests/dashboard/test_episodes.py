"""The Episodes page and monitor.views.episodes: episodes as the signals define them, the rules
without secrets, the outbox reader with and without its table, filters and bad queries."""

from __future__ import annotations

import datetime as dt
from dataclasses import fields

import numpy as np
import pandas as pd
import pytest
from plotly.io.json import to_json_plotly

from callbacks.app import create_app
from layouts import episodes as page
from layouts import ids
from monitor.common.errors import InputError
from monitor.config import Config, EmailConfig, StoreConfig
from monitor.data.store import Store
from monitor.stats.signals import SignalSettings, pair_signals
from monitor.views.common import StoreView
from monitor.views.episodes import (
    EPISODE_COLUMNS,
    OUTBOX_COLUMNS,
    TAIL_STYLE,
    EpisodeFilter,
    episode_frame,
    episodes_figure,
    filter_episodes,
    monitored_pairs,
    parse_episode_query,
    read_outbox,
    rules_table,
    timeline_link,
)

from .tree import find, registered, texts


def test_episodes_equal_the_signals_of_the_stored_timelines(view):
    frame = episode_frame(view)
    assert list(frame.columns) == list(EPISODE_COLUMNS)
    # the scenario switches to Clayton at the same tau: the lower tail must have alerted
    assert (frame["tail"] == "lower").any()
    checked = 0
    for pair in monitored_pairs(view):
        a, b = pair.split("/")
        sig = pair_signals(view.store.read_timeline(view.rolling_key, a, b))
        mine = frame[frame["pair"] == pair]
        assert len(mine) == len(sig.episodes)
        dates = pd.to_datetime(sig.frame["date"])
        for e in sig.episodes:
            row = mine[(mine["tail"] == e.tail) & (mine["start"] == e.start)].iloc[0]
            last = dates.iloc[-1] if e.end is None else e.end
            inside = (dates >= e.start) & (dates <= last)
            # every window end of the episode is in alert, and the duration counts them
            assert sig.frame.loc[inside.to_numpy(), f"alert_{e.tail}"].eq(1).all()
            assert row["duration_days"] == int(inside.sum())
            assert row["last_day"] == last
            assert row["status"] == ("open" if e.end is None else "ended")
            assert row["onset"] == e.onset and row["peak_date"] == e.peak_date
            assert row["cause"] == e.cause and row["statistic"] == e.statistic
            for col in ("peak_value", "peak_kendall_tau", "peak_tail_emp", "peak_tail_model",
                        "peak_gauss_tail"):
                assert row[col] == pytest.approx(getattr(e, col), rel=1e-12)
            # the standard errors are the peak window's own
            at_peak = sig.frame[dates == e.peak_date].iloc[0]
            assert row["peak_kendall_tau_se"] == at_peak["kendall_tau_se"]
            assert row["peak_tail_emp_se"] == at_peak[f"tail_{e.tail}_emp_se"]
            # the current evidence is the latest day's, beside the peak (never above it)
            at_last = sig.frame[dates == last].iloc[0]
            assert row["latest_date"] == last
            assert row["latest_value"] == pytest.approx(at_last[f"evidence_{e.tail}"],
                                                        rel=1e-12)
            assert row["latest_value"] <= row["peak_value"]
            checked += 1
        # the days in alert of each tail are exactly the episodes' durations
        for tail in ("lower", "upper"):
            assert sig.frame[f"alert_{tail}"].sum() == mine.loc[mine["tail"] == tail,
                                                                 "duration_days"].sum()
    assert checked == len(frame) > 0
    # newest first
    assert frame["start"].is_monotonic_decreasing


def test_filters_and_query(view):
    frame = episode_frame(view)
    pairs = monitored_pairs(view)
    assert len(pairs) == 6  # four assets
    lower = filter_episodes(frame, EpisodeFilter(tails=("lower",)))
    assert len(lower) == (frame["tail"] == "lower").sum() and set(lower["tail"]) <= {"lower"}
    assert filter_episodes(frame, EpisodeFilter(tails=())).empty
    one = frame["pair"].iloc[0]
    assert set(filter_episodes(frame, EpisodeFilter(pair=one))["pair"]) == {one}

    flt = parse_episode_query({"pair": one, "tail": "upper", "cause": "all"}, pairs)
    assert flt == EpisodeFilter(one, ("upper",), ("divergence", "spike", "switch"))
    a, b = one.split("/")
    with pytest.raises(InputError, match=r"not a monitored pair \(stored as"):
        parse_episode_query({"pair": f"{b}/{a}"}, pairs)
    with pytest.raises(InputError, match="write it as A/B"):
        parse_episode_query({"pair": "NOPE"}, pairs)
    with pytest.raises(InputError, match="unknown parameter 'colour'"):
        parse_episode_query({"colour": "red"}, pairs)
    with pytest.raises(InputError, match="tail='sideways'"):
        parse_episode_query({"tail": "sideways"}, pairs)
    assert timeline_link("MRW 40/MRWSC") == "/timeline?pair=MRW%2040/MRWSC"


def test_rules_table_names_every_threshold_and_no_secret(monkeypatch):
    monkeypatch.setenv("COMOVE_TEST_SMTP_PASSWORD", "do-not-show-7731")
    email = EmailConfig(host="mail.invalid", port=587, sender="risk@invalid.example",
                        recipients=("desk@invalid.example",), starttls=True,
                        username_env="COMOVE_TEST_SMTP_USER",
                        password_env="COMOVE_TEST_SMTP_PASSWORD")
    rules = rules_table(SignalSettings(), email, window=120)
    settings = SignalSettings()
    by_name = rules.set_index("setting")
    for f in fields(SignalSettings):
        value = getattr(settings, f.name)
        want = ("yes" if value else "no") if isinstance(value, bool) else (
            "inf (statistic off)" if value == np.inf else f"{value:g}")
        assert by_name.loc[f.name, "value"] == want
        assert by_name.loc[f.name, "meaning"]
    assert by_name.loc["cusum_entry", "value"] == "5"  # docs/signals.md, the defaults
    assert by_name.loc["switch_entry", "value"] == "inf (statistic off)"
    assert by_name.loc["baseline", "value"] == "yes"
    assert by_name.loc["cusum_entry", "calibration"].startswith("tuned")
    assert by_name.loc["entry_days", "calibration"].startswith("designed")
    assert "window is 120" in by_name.loc["cusum_entry", "calibration"]
    assert by_name.loc["alerts.email.password_env", "value"] == "$COMOVE_TEST_SMTP_PASSWORD"
    assert by_name.loc["alerts.email.starttls", "value"] == "true"
    assert "do-not-show-7731" not in rules.to_csv()
    changed = rules_table(SignalSettings(cusum_entry=5.25))
    assert changed.set_index("setting").loc["cusum_entry", "calibration"].startswith("set by")
    assert not changed["group"].eq("alert e-mail").any()


def test_outbox_reader_lists_the_queue_newest_first(tmp_path):
    from monitor.alerts import rules as alerts
    from monitor.data.store import outbox

    with Store(f"sqlite:///{tmp_path / 'box.sqlite'}") as store:
        empty = read_outbox(store)
        assert empty.empty and list(empty.columns) == list(OUTBOX_COLUMNS)
        day = dt.date(2024, 3, 1)
        events = [alerts.AlertEvent(alerts.message_id("k", i), "episodes", "episode-start",
                                    pair, "lower", day + dt.timedelta(days=i), f"subject {i}",
                                    "secret body", "<p>x</p>")
                  for i, pair in enumerate([("A", "B"), ("A", "C"), None])]
        for e in events:  # one at a time, so that "created" orders them
            with store.transaction() as conn:
                alerts.queue(conn, outbox, "k", [e])
        with store.transaction() as conn:
            conn.execute(outbox.update().where(outbox.c.message_id == events[1].message_id)
                         .values(attempts=3, last_error="connection refused"))
        box = read_outbox(store)
        assert list(box.columns) == list(OUTBOX_COLUMNS)
        assert box["subject"].tolist() == ["subject 2", "subject 1", "subject 0"]
        assert box["pair"].tolist() == ["", "A/C", "A/B"]
        assert box.loc[1, "last_error"] == "connection refused"
        assert "secret body" not in box.to_csv()
        assert len(read_outbox(store, limit=2)) == 2
        with pytest.raises(ValueError, match="limit"):
            read_outbox(store, limit=0)
        cfg = Config(store=StoreConfig(url=store.url))
        shown = page._outbox(StoreView.open(cfg, store))
        assert "3 e-mail(s): 3 pending, 0 sent (1 pending after a failed attempt)." in \
            texts(shown)


def test_figure_tells_tails_apart_by_more_than_colour(view):
    fig = episodes_figure(episode_frame(view))
    bars = {t.legendgroup: t for t in fig.data if t.type == "bar"}
    peaks = {t.legendgroup: t for t in fig.data if t.type == "scatter" and t.legendgroup}
    assert "lower" in bars
    for tail, trace in bars.items():
        assert trace.marker.color == TAIL_STYLE[tail]["colour"]
        assert trace.marker.pattern.shape == TAIL_STYLE[tail]["pattern"]
        assert peaks[tail].marker.symbol == TAIL_STYLE[tail]["symbol"]
    assert TAIL_STYLE["lower"]["symbol"] != TAIL_STYLE["upper"]["symbol"]
    assert TAIL_STYLE["lower"]["pattern"] != TAIL_STYLE["upper"]["pattern"]
    # one bar per episode, as long as the episode (in milliseconds, plus its last day)
    lower = episode_frame(view).query("tail == 'lower'")
    spans = (lower["last_day"] - lower["start"] + pd.Timedelta(days=1)).dt.total_seconds()
    assert np.allclose(np.sort(np.asarray(bars["lower"].x)), np.sort(spans * 1000))
    assert "no episodes" in str(episodes_figure(episode_frame(view).iloc[:0]).layout)


def test_layout_and_callbacks_as_plain_functions(view, dash_store):
    root = page.layout(view, {})
    to_json_plotly(root)  # what Dash sends must encode
    history = find(root, ids.EPISODES_HISTORY)
    frame = episode_frame(view)
    assert len(history.data) == len(frame)
    assert history.export_format == "csv"
    link = history.columns[1]
    assert link["presentation"] == "markdown" and history.columns[0]["id"] == "pair"
    first = history.data[0]
    assert first[page.LINK] == f"[open]({timeline_link(first['pair'])})"
    assert {c["id"]: c.get("type") for c in history.columns}["days in alert"] == "numeric"
    assert find(root, ids.EPISODES_RULES) is not None
    assert "Nothing queued." in texts(root)
    assert find(root, ids.EPISODES_CHART).config["toImageButtonOptions"]["format"] == "png"
    # a bad query string: one line in the page, the page still whole
    bad = page.layout(view, {"pair": "NOT/APAIR"})
    assert any("query: pair='NOT/APAIR' is not a monitored pair" in t for t in texts(bad))
    assert len(find(bad, ids.EPISODES_HISTORY).data) == len(frame)

    app = create_app(dash_store.cfg, store=view.store)
    callback = registered(app, ids.EPISODES_HISTORY)
    data, columns, fig, count = callback(None, ["upper"], ["divergence", "spike", "switch"])
    assert len(data) == int((frame["tail"] == "upper").sum())
    assert all(r["tail"] == "upper" for r in data)
    assert columns[1]["id"] == page.LINK
    assert count.startswith(f"{len(data)} of {len(frame)} episodes shown")
    data, *_ = callback(None, [], None)
    assert data == []
    one = frame["pair"].iloc[-1]
    data, _, fig, _ = callback(one, ["lower", "upper"], ["divergence", "spike", "switch"])
    assert {r["pair"] for r in data} == {one}
    assert set(fig.layout.yaxis.categoryarray) == {one}


def test_page_of_a_store_without_results(tmp_path):
    url = f"sqlite:///{tmp_path / 'empty.sqlite'}"
    with Store(url) as store:
        empty = StoreView.open(Config(store=StoreConfig(url=url)), store)
        frame = episode_frame(empty)
        assert frame.empty and list(frame.columns) == list(EPISODE_COLUMNS)
        root = page.layout(empty, {"tail": "lower"})
        to_json_plotly(root)
    shown = texts(root)
    assert "No pair is in an alert episode (0 pairs monitored)." in shown
    assert "No episodes stored under these settings yet." in shown
    assert "Nothing queued." in shown
    assert find(root, ids.EPISODES_TAILS).value == ["lower"]
