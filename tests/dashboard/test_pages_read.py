"""Pages that read right (issue 12, section 4): no stored settings key reaches a page, the
Episodes page's "as of" is the store's newest window end, the filter row only on tables of
20 rows or more, fractions shown as percentages -- on the dashboard tests' store."""

from __future__ import annotations

import json
import re

import pandas as pd
import plotly
import pytest
import sqlalchemy as sa

from callbacks.episodes import show_episodes
from callbacks.inputs import show_diagnostics
from callbacks.timeline import OUTPUTS, show_pair
from layouts import board, drilldown, episodes, ids, inputs, timeline
from layouts.components import FILTER_MIN_ROWS, filter_action, table
from layouts.drilldown import results
from monitor.data.store import metrics
from monitor.settings import SETTINGS_KEY_PATTERN, settings_words
from monitor.views.drilldown import study_pair
from monitor.views.report import report_html

from .tree import find, text


@pytest.fixture(scope="module")
def pair(view):
    return min(view.store.stored_pairs(view.rolling_key))


def _dump(component) -> str:
    if hasattr(component, "to_plotly_json"):
        component = component.to_plotly_json()
    return json.dumps(component, cls=plotly.utils.PlotlyJSONEncoder)


def assert_no_key(blob: str, where: str) -> None:
    hit = SETTINGS_KEY_PATTERN.search(blob)
    assert hit is None, f"{where}: settings key shown: ...{blob[hit.start() - 40:hit.end() + 40]}"


def test_the_pattern_finds_every_stored_key(view):
    for key in (view.marginal_key, view.rolling_key, view.signals_key):
        assert SETTINGS_KEY_PATTERN.search(key), key
    assert SETTINGS_KEY_PATTERN.search("signal settings key cusum0.01:4.75-3.5:cap5.25")
    assert_no_key(settings_words(view.signals_key), "settings_words")
    assert_no_key(view.provenance(), "footer")


def test_settings_in_words(view):
    words = settings_words(view.signals_key)
    assert words.startswith("marginals: GARCH-type filter, real-time mode (refit every 21 days")
    assert "rolling copulas: window 120 days, step 1, all families, selection by AIC, tail " \
           "level q = 0.1" in words
    assert "signal thresholds: the calibrated defaults (measured against the pair's own 500 " \
           "window ends before the current window" in words
    assert "sequential divergence enters at 5 and leaves below 4, 0.01 nats a day taken " \
           "off at least, capped at 5.5;" in words
    assert "family switch off; no episode opens on a tail whose model-averaged coefficient " \
           "is below 0.1" in words
    # The key of an older version reads as words too, never raw.
    old = view.rolling_key + "|cusum0.01:4.75-3.5:cap5.25/window8-6:gate1-1/spike3-1.5:ref250" \
        "/switch0.9-0.5:tail0.1:aic10:last60/days3-5/v1"
    assert "enters at 4.75" in settings_words(old) and "family switch 0.9/0.5" in \
        settings_words(old)
    assert settings_words(view.signals_key, short=True) == (
        "real-time marginals; window 120 days, step 1, all families, AIC; signal thresholds: "
        "the calibrated defaults")
    assert settings_words("in-sample/min300/all8/v2") == (
        "marginals: GARCH-type filter, in-sample mode (one fit on all data, at least 300 "
        "observations), BIC choice among the 8 standard specifications")
    assert settings_words("no-such/key") == "stored settings of another version"
    with pytest.raises(TypeError):
        settings_words(3)


def test_no_page_shows_a_settings_key(view, pair):
    for module in (board, timeline, drilldown, episodes, inputs):
        assert_no_key(_dump(module.layout(view, {})), module.TITLE)
    a, b = pair
    assert_no_key(_dump(list(show_pair(view, f"{a}/{b}"))), "Timeline callback")
    assert_no_key(_dump(list(show_episodes(view, None, ["lower", "upper"],
                                     ["divergence", "spike", "switch"]))), "Episodes callback")
    assert_no_key(_dump(list(show_diagnostics(view, view.store.assets()[0], 10))), "Inputs callback")
    timeline_ = view.store.read_timeline(view.rolling_key, a, b)
    row = timeline_.iloc[-1]
    study = study_pair(view, a, b, row["start"], row["date"], replicates=0)
    assert_no_key(_dump(results(study)), "Drill-down results")
    assert_no_key(report_html(study), "report")


def test_episodes_as_of_is_the_newest_window_end_in_the_store(view):
    # Independent of the page: the largest window end of the metrics table under the key.
    with view.store.engine.connect() as conn:
        newest = conn.execute(sa.select(sa.func.max(metrics.c.date)).where(
            metrics.c.settings == view.rolling_key)).scalar_one()
    page = text(episodes.layout(view, {}))
    assert f"as of {pd.Timestamp(newest):%Y-%m-%d}" in page
    ended = view.store.read_episodes(view.signals_key).dropna(subset=["end"])
    assert len(ended) and pd.to_datetime(ended["end"]).max() < pd.Timestamp(newest)


def test_filter_row_only_from_twenty_rows(view, pair):
    assert FILTER_MIN_ROWS == 20
    assert [filter_action(n) for n in (0, 19, 20, 500, None)] == [
        "none", "none", "native", "native", "native"]
    assert table("t", pd.DataFrame({"x": range(19)})).filter_action == "none"
    assert table("t", pd.DataFrame({"x": range(20)})).filter_action == "native"
    page = episodes.layout(view, {})
    history = find(page, ids.EPISODES_HISTORY)
    assert len(history.data) < 20 and history.filter_action == "none"
    a, b = pair
    out = dict(zip([f"{i}.{p}" for i, p in OUTPUTS], show_pair(view, f"{a}/{b}"), strict=True))
    rows = len(out[f"{ids.TIMELINE_EPISODES}.data"])
    assert out[f"{ids.TIMELINE_EPISODES}.filter_action"] == filter_action(rows) == "none"


def test_missing_shares_show_as_percentages(view):
    page = inputs.layout(view, {})
    cov = find(page, ids.INPUTS_COVERAGE)
    col = next(c for c in cov.columns if c["name"] == "missing share")
    assert col["type"] == "numeric" and col["format"].to_plotly_json()["specifier"] == ".1%"
    for row in cov.data:
        # the stored value is the fraction missing / calendar dates (shown as e.g. 3.1%)
        assert row["missing share"] == pytest.approx(row["missing"] / row["calendar dates"],
                                                     rel=1e-3)
        assert 0 <= row["missing share"] <= 1


def test_secondary_columns_start_hidden_and_export_keeps_them(view):
    page = episodes.layout(view, {})
    history = find(page, ids.EPISODES_HISTORY)
    assert set(history.hidden_columns) == {"tau s.e.", "empirical tail s.e."}
    assert all(c.get("hideable") for c in history.columns)
    assert history.export_columns == "all"
    shown = [c["name"] for c in history.columns if c["id"] not in history.hidden_columns]
    assert shown[:3] == ["pair", "Timeline", "tail"] and "tau at peak" in shown
    models = find(inputs.layout(view, {}), ids.INPUTS_MARGINAL)
    assert {"omega", "alpha", "beta", "nu"} <= set(models.hidden_columns)
    assert not {c["id"] for c in models.columns} & {"settings", "spec"}
    assert not re.search(r"real-time/refit", _dump(models))
