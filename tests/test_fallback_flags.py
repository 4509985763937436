"""Residuals from the EWMA-t fallback are flagged wherever they or their pairs are shown: the
store's spans, the Timeline (frame, note, figure), the Drill-down notes and the alert e-mail.

Data: two invented price series (demo data); BIRCH's volatility grows exponentially over its
last 250 days, which no stationary GARCH candidate fits, so its later refits fall back.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor.alerts.rules import compose_pair
from monitor.config import Config, RollingConfig, StoreConfig
from monitor.data.ingest import ingest_sources, read_file_source
from monitor.data.store import Store
from monitor.engine.pipeline import run_update
from monitor.views.common import StoreView
from monitor.views.drilldown import study_pair
from monitor.views.timeline import pair_history, timeline_figure
from tests.dashboard.plotted import as_figure


def _garch(n: int, rng: np.random.Generator, w: float = 0.05, a: float = 0.12,
           b: float = 0.86) -> np.ndarray:
    """A GARCH(1,1) path with standardised t(6) shocks, in log-return units."""
    s2, r = w / (1 - a - b), np.empty(n)
    z = rng.standard_t(6, n) / np.sqrt(1.5)
    for i in range(n):
        r[i] = np.sqrt(s2) * z[i]
        s2 = w + a * r[i] ** 2 + b * s2
    return r / 100


def _prices(seed: int = 4) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    steady = _garch(850, rng)
    # BIRCH: 600 GARCH days, then 250 days whose volatility grows exponentially (no
    # stationary GARCH fits the expanding sample any more: its later refits fall back).
    t = np.arange(250)
    birch = np.clip(np.r_[_garch(600, rng), rng.standard_normal(250) * 0.01 * np.exp(t / 60.0)],
                    -0.5, 0.5)
    return pd.DataFrame({"ALDER": 100 * np.exp(np.cumsum(steady)),
                         "BIRCH": 100 * np.exp(np.cumsum(birch))},
                        index=pd.bdate_range("2015-01-01", periods=850, name="date"))


@pytest.fixture(scope="module")
def flagged(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fallback")
    path = folder / "prices.csv"
    _prices().to_csv(path, float_format="%.12g", date_format="%Y-%m-%d")
    cfg = Config(store=StoreConfig(url=f"sqlite:///{folder / 'store.sqlite'}"),
                 rolling=RollingConfig(window=60))
    with Store(cfg.store.url) as store:
        ingest_sources(store, [read_file_source(str(path), "prices")])
    run_update(cfg, progress=False)
    store = Store(cfg.store.url)
    yield cfg, StoreView.open(cfg, store)
    store.close()


def _fallback_days(view, asset: str) -> pd.DatetimeIndex:
    """The days whose residual of ``asset`` a fallback fit filtered, from its stored fits."""
    series = view.store.load_filtered(view.marginal_key, asset)
    flags = np.array([bool(f.fallback) for f in series.fits])[series.fit_index]
    return pd.DatetimeIndex(series.dates)[flags]


def test_the_store_names_the_days_each_fallback_fit_filtered(flagged):
    _, view = flagged
    spans = view.store.fallback_spans(view.marginal_key)
    assert list(spans.columns) == ["asset", "fallback", "first", "last", "days"]
    assert "BIRCH" in set(spans["asset"]) and set(spans["fallback"]) == {"ewma-0.94-t"}
    for asset in ("ALDER", "BIRCH"):
        days = _fallback_days(view, asset)
        mine = view.store.fallback_spans(view.marginal_key, [asset])
        assert set(mine["asset"]) <= {asset} and int(mine["days"].sum()) == len(days)
        if len(days):
            assert mine["first"].min() == days.min() and mine["last"].max() == days.max()
    assert len(_fallback_days(view, "BIRCH")) > 0


def test_the_timeline_marks_windows_holding_fallback_residuals(flagged):
    _, view = flagged
    history = pair_history(view, "ALDER", "BIRCH")
    # Expected from the residuals' own fits, day by day: a window is flagged when one of its
    # days was filtered by a fallback fit.
    days = _fallback_days(view, "ALDER").union(_fallback_days(view, "BIRCH"))
    expected = [bool(((days >= s) & (days <= e)).any())
                for s, e in zip(history.frame["start"], history.frame["date"], strict=True)]
    np.testing.assert_array_equal(history.frame["fallback"].to_numpy(), expected)
    assert 0 < history.frame["fallback"].sum() < len(history.frame)
    note = history.fallback_note()
    assert "EWMA-t fallback" in note and "BIRCH" in note and "GARCH refused" in note
    assert f"{int(history.frame['fallback'].sum())} window(s)" in note
    marks = [t for t in as_figure(timeline_figure(history)).data
             if t.name == "window holds EWMA-t fallback residuals"]
    assert len(marks) == 1 and len(marks[0].x) == int(history.frame["fallback"].sum())


def test_the_drilldown_and_the_email_name_the_fallback_days(flagged):
    cfg, view = flagged
    timeline = view.store.read_timeline(view.rolling_key, "ALDER", "BIRCH")
    last = timeline.iloc[-1]
    study = study_pair(view, "ALDER", "BIRCH", last["start"], last["date"], reference="none",
                       replicates=0)
    notes = [n for n in study.notes if "EWMA-t fallback" in n]
    assert len(notes) == 1 and notes[0].startswith("60 of the study window's 60 days of BIRCH")
    first = timeline.iloc[0]
    calm = study_pair(view, "ALDER", "BIRCH", first["start"], first["date"], reference="none",
                      replicates=0)
    assert not any("fallback" in n for n in calm.notes)
    spans = view.store.fallback_spans(view.marginal_key)
    _, text, body = compose_pair(cfg, "ALDER", "BIRCH", "lower", timeline, len(timeline) - 1,
                                 "test", spans)
    assert "Caution: part of this window's residuals of BIRCH come from the EWMA-t" in text
    assert "EWMA-t" in body
    _, clean, _ = compose_pair(cfg, "ALDER", "BIRCH", "lower", timeline, 0, "test", spans)
    assert "EWMA-t" not in clean
