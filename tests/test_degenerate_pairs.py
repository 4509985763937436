"""One degenerate pair never stops the update: two copies of one series (exact, or with noise
at 1e-8) and a stale price (constant for months) are stored, reported once in the update
summary, and marked on the Timeline; every other pair is computed as usual.

Invented demo data (fictional asset names).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor import cli
from monitor.config import load_config
from monitor.data.store import Store
from monitor.settings import rolling_key
from monitor.stats.rolling import degeneracy
from monitor.views.common import StoreView
from monitor.views.timeline import pair_history


@pytest.fixture(scope="module")
def degenerate_store(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("degenerate")
    rng = np.random.default_rng(1)
    n = 700
    r = rng.standard_t(5, (n, 3)) * 0.01
    px = pd.DataFrame(100 * np.exp(np.cumsum(r, axis=0)), columns=["ALDER", "BIRCH", "CEDAR"],
                      index=pd.bdate_range("2020-01-01", periods=n, name="date"))
    px["ALDERB"] = px["ALDER"]  # the same instrument under a second name
    px["ALDERN"] = px["ALDER"] * np.exp(rng.standard_normal(n) * 1e-8)
    px.iloc[-80:, 2] = px.iloc[-81, 2]  # CEDAR's price not refreshed for its last 80 days
    px.to_csv(tmp / "prices.csv", float_format="%.12g")
    url = f"sqlite:///{tmp / 'store.sqlite'}"
    assert cli.main(["ingest", str(tmp / "prices.csv"), "--store", url]) == 0
    config = tmp / "comove.toml"
    config.write_text(f'[store]\nurl = "{url}"\n[rolling]\nwindow = 60\n')
    return config


def test_the_update_finishes_and_reports_the_degenerate_pairs_once(degenerate_store, capsys):
    # Before: "error: unexpected failure: ValueError: gaussian copula parameter rho=1.0 is
    # outside (-1.0, 1.0)", exit 1, nothing stored for any pair.
    assert cli.main(["update", "--config", str(degenerate_store)]) == 0
    out = capsys.readouterr().out
    assert "10 of 10 pair(s) updated" in out
    line = next(x for x in out.splitlines() if "degenerate pair(s)" in x)
    assert out.count("degenerate pair(s)") == 1
    for pair in ("ALDER/ALDERB |tau| 1.00", "ALDER/ALDERN |tau| 1.00",
                 "ALDERB/ALDERN |tau| 1.00"):
        assert pair in line
    assert "CEDAR price stale on 100% of the window" in line
    assert "ALDER/BIRCH" not in line
    cfg = load_config(str(degenerate_store))
    with Store(cfg.store.url) as store:
        key = rolling_key(cfg)
        assert len(store.stored_pairs(key)) == 10
        ordinary = store.read_timeline(key, "ALDER", "BIRCH")
        # 699 returns, the first 251 held for the first GARCH fit, windows of 60
        assert len(ordinary) == 699 - 251 - 60 + 1
        assert ordinary["kendall_tau"].abs().max() < 0.5
        copies = store.read_timeline(key, "ALDER", "ALDERB")
        assert np.allclose(copies["kendall_tau"], 1.0)


def test_the_timeline_marks_the_degenerate_windows(degenerate_store):
    cfg = load_config(str(degenerate_store))
    with Store(cfg.store.url) as store:
        view = StoreView.open(cfg, store)
        copies = pair_history(view, "ALDER", "ALDERN")
        assert copies.frame["degenerate"].str.startswith("|tau| 1.00").all()
        assert "389 window(s) are degenerate" in copies.degenerate_note()
        stale = pair_history(view, "BIRCH", "CEDAR")
        flagged = stale.frame["degenerate"].ne("")
        # Windows of 60 days are stale once more than 30 of their days are in the last 80.
        assert flagged.sum() == 80 - 30 and flagged.iloc[-1] and not flagged.iloc[0]
        assert "CEDAR price stale" in stale.degenerate_note()
        assert pair_history(view, "ALDER", "BIRCH").degenerate_note() == ""


def test_degeneracy_names_each_reason():
    why = degeneracy([0.3, 0.99, -0.985, 0.2, 1.0], [0.0, 0.0, 0.0, 0.6, 0.7],
                     [0.0, 0.0, 0.0, 0.0, 0.55])
    assert list(why) == ["", "|tau| 0.99: copies of one series?",
                         "|tau| 0.98: copies of one series?",
                         "A price stale on 60% of the window",
                         ("|tau| 1.00: copies of one series?; A price stale on 70% of the "
                          "window; B price stale on 55% of the window")]


def test_a_pair_that_cannot_be_computed_leaves_the_others_in_its_batch():
    # Defence in depth: whatever makes one pair's computation raise, its batch is redone pair
    # by pair and only that pair is reported (here: window ends beyond its data).
    from monitor.engine.pipeline import _pair_batch, _PairTask
    from monitor.stats.rolling import RollingSettings, window_end_positions

    rng = np.random.default_rng(3)
    settings = RollingSettings(window=60)
    dates = pd.bdate_range("2021-01-01", periods=120)
    z = rng.standard_normal((120, 2))
    good = _PairTask("ALDER", "BIRCH", dates, z[:, 0], z[:, 1],
                     window_end_positions(120, settings)[-3:], None, None, False)
    bad = _PairTask("ALDER", "CEDAR", dates, z[:, 0], z[:, 1], np.array([500]), None, None,
                    False)
    (t1, ok), (t2, failed) = _pair_batch([good, bad], settings)
    assert (t1.b, t2.b) == ("BIRCH", "CEDAR")
    assert len(ok.frame) == 3 and isinstance(failed, str) and "Error" in failed
