"""The Board page's library (monitor.views.board), the stored state runs and universe summary it
reads (monitor.data.store / monitor.engine.pipeline), and its callback called as a plain function.

Checks against outside references: scipy's hierarchical clustering for the ordering (the
leaf order must keep a block of strongly dependent assets together, whatever the input
order), hand-computed divergence scores, and the signals module's own from-scratch
computation (``pair_signals``, ``universe_summary``) for everything stored incrementally."""

from __future__ import annotations

import shutil
from itertools import pairwise

import dash
import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa
from scipy import stats
from sqlalchemy.pool import NullPool

from callbacks.board import (
    OUTPUTS,
    marked,
    move_marker,
    register,
    show_board,
    show_universe,
)
from layouts import board as board_page
from layouts import ids
from monitor.common.errors import InputError
from monitor.common.palette import DIVERGING, SEQUENTIAL
from monitor.data.store import Store, metrics, pair_state
from monitor.engine.pipeline import update_signals
from monitor.settings import signals_key
from monitor.stats.signals import pair_signals, state_runs, universe_key, universe_summary
from monitor.views.board import (
    CHANGE_COLUMNS,
    board_data,
    change_figure,
    change_se,
    change_z,
    cluster_order,
    date_marker,
    divergence,
    excess_figure,
    matrix_figure,
    pair_matrix,
    rank_pairs,
    ranking_table,
    standing_labels,
)
from monitor.views.common import StoreView

from .plotted import as_figure
from .tree import find, text


def _fresh_signals(view):
    """Every pair's signals recomputed from its stored timeline."""
    return {pair: pair_signals(view.store.read_timeline(view.rolling_key, *pair))
            for pair in sorted(view.store.stored_pairs(view.rolling_key))}


def _runs_of(view, pair):
    got = view.store.read_state_runs(view.signals_key, pair)
    return got[["tail", "first_date", "last_date", "state"]].reset_index(drop=True)


def _expected_runs(signals):
    runs = state_runs(signals.frame)
    runs = runs.astype({"first_date": "datetime64[ns]", "last_date": "datetime64[ns]"})
    return runs.sort_values(["tail", "first_date"]).reset_index(drop=True)


# ----------------------------------------------------------------------------- stored state
def test_stored_state_runs_and_universe_equal_a_fresh_computation(view):
    fresh = _fresh_signals(view)
    assert len(fresh) == 6
    for pair, sig in fresh.items():
        got = _runs_of(view, pair).astype({"first_date": "datetime64[ns]",
                                           "last_date": "datetime64[ns]"})
        want = _expected_runs(sig)
        assert got["state"].tolist() == want["state"].astype(str).tolist(), pair
        assert (got[["first_date", "last_date"]].to_numpy()
                == want[["first_date", "last_date"]].to_numpy()).all(), pair
        # The runs decode back to the daily states, day by day.
        for tail in ("lower", "upper"):
            r = want[want["tail"] == tail]
            lengths = [int(((sig.frame["date"] >= f) & (sig.frame["date"] <= last)).sum())
                       for f, last in zip(r["first_date"], r["last_date"], strict=True)]
            assert np.repeat(r["state"].astype(str).to_numpy(), lengths).tolist() == \
                sig.frame[f"state_{tail}"].astype(str).tolist()
    # The stored universe summary is signals.universe_summary of the fresh frames.
    stored = view.store.read_universe(universe_key(view.signals_key))
    want = universe_summary({p: s.frame for p, s in fresh.items()})
    assert stored.index.equals(pd.DatetimeIndex(want.index).astype(stored.index.dtype))
    for col in ("n_pairs", "n_alert", "n_alert_lower", "n_alert_upper"):
        np.testing.assert_array_equal(stored[col].to_numpy(), want[col].to_numpy(), col)
    for col in ("share_alert", "kendall_tau", "tail_lower", "tail_upper", "tail_lower_emp",
                "tail_upper_emp"):
        np.testing.assert_allclose(stored[col].to_numpy(), want[col].to_numpy(), rtol=1e-12,
                                   err_msg=col)
    assert stored["n_alert"].max() > 0  # the Clayton regime alerts somewhere


def _rowids(url, table, key):
    """{row content: SQLite rowid} of a table's rows under a settings key (a rewritten row
    gets a new rowid)."""
    engine = sa.create_engine(url, poolclass=NullPool)
    try:
        with engine.connect() as conn:
            rows = conn.execute(sa.text(f"SELECT rowid, * FROM {table} WHERE settings = :k"),
                                {"k": key}).all()
        return {tuple(r[1:]): r[0] for r in rows}
    finally:
        engine.dispose()


@pytest.mark.parametrize("cut", ["middle", "last-day"])
def test_incremental_update_equals_from_scratch(dash_store, tmp_path, cut):
    """Signals updated on a shorter timeline, then again after the rest arrives, store the
    same runs and universe as the from-scratch run of the fixture; a one-day step rewrites
    one run per pair and tail and one universe row."""
    from ..conftest import take_snapshot

    url = f"sqlite:///{tmp_path / 'copy.sqlite'}"
    shutil.copy(dash_store.url.removeprefix("sqlite:///"), tmp_path / "copy.sqlite")
    cfg = dash_store.cfg
    key = signals_key(cfg)
    with Store(dash_store.url, create=False) as original:
        want_universe = original.read_universe(universe_key(key))
        want_runs = original.read_state_runs(key)
        dates = original.read_universe(universe_key(key)).index
    cut_date = (dates[len(dates) // 2] if cut == "middle" else dates[-2]).date()
    with Store(url) as store:
        with store.transaction() as conn:
            later = [dict(r) for r in conn.execute(sa.select(metrics).where(
                metrics.c.date > cut_date)).mappings()]
            conn.execute(metrics.delete().where(metrics.c.date > cut_date))
        update_signals(store, cfg)
        short_view = StoreView.open(cfg, store)
        # On the shorter timeline the stored summary is again the from-scratch one.
        fresh = _fresh_signals(short_view)
        np.testing.assert_allclose(
            store.read_universe(universe_key(key))["tail_lower_emp"].to_numpy(),
            universe_summary({p: s.frame for p, s in fresh.items()})["tail_lower_emp"],
            rtol=1e-12)
        runs_before = _rowids(url, "state_runs", key)
        universe_before = _rowids(url, "universe_daily", universe_key(key))
        with store.transaction() as conn:
            conn.execute(metrics.insert(), later)
        update_signals(store, cfg)
        got_universe = store.read_universe(universe_key(key))
        got_runs = store.read_state_runs(key)
    pd.testing.assert_frame_equal(got_runs, want_runs)
    pd.testing.assert_frame_equal(got_universe, want_universe, rtol=1e-12)
    if cut == "last-day":
        runs_after = _rowids(url, "state_runs", key)
        universe_after = _rowids(url, "universe_daily", universe_key(key))
        rewritten = [k for k, rid in runs_after.items() if runs_before.get(k) != rid]
        assert 0 < len(rewritten) <= 2 * 6  # at most one run per tail of each pair
        # Every earlier universe row is untouched; the new day adds one.
        assert all(universe_after.get(k) == rid for k, rid in universe_before.items())
        assert len(universe_after) == len(universe_before) + 1
    # Nothing new: the update writes nothing.
    snap = take_snapshot(url)
    with Store(url) as store:
        update_signals(store, cfg)
    assert take_snapshot(url) == snap


# ----------------------------------------------------------------------------- the board
def test_board_as_of_a_date_equals_the_stored_timeline(view):
    universe = view.store.read_universe(universe_key(view.signals_key))
    # A Saturday in the middle of the history: every row is the window ending the day before.
    day = universe.index[len(universe) // 2]
    saturday = day + pd.Timedelta(days=(5 - day.weekday()) % 7)
    data = board_data(view, saturday.strftime("%Y-%m-%d"))
    assert data.as_of == saturday
    assert len(data.pairs) == 6 and data.pairs["rank"].tolist() == list(range(1, 7))
    fresh = _fresh_signals(view)
    for row in data.pairs.itertuples(index=False):
        frame = fresh[(row.asset_a, row.asset_b)].frame
        want = frame[frame["date"] <= saturday].iloc[-1]
        assert row.date == want["date"] and row.date.weekday() < 5
        for col in ("kendall_tau", "kendall_tau_se", "tail_lower", "tail_upper",
                    "tail_lower_emp", "tail_upper_emp", "gauss_tail_q"):
            assert getattr(row, col) == pytest.approx(want[col], rel=1e-15), col
        assert row.family == want["family"] and row.rotation == want["rotation"]
        # The state on the date is the from-scratch state of that window end.
        assert row.state_lower == want["state_lower"]
        assert row.state_upper == want["state_upper"]
        # Divergence by hand: (lambda_emp - C_Gauss(q,q)/q) / se, the signals' excess.
        for tail in ("lower", "upper"):
            by_hand = (want[f"tail_{tail}_emp"] - want["gauss_tail_q"]) / want[
                f"tail_{tail}_emp_se"]
            assert getattr(row, f"divergence_{tail}") == pytest.approx(by_hand, rel=1e-12)
            assert getattr(row, f"divergence_{tail}") == pytest.approx(
                want[f"excess_{tail}"], rel=1e-12)
        assert row.divergence == max(row.divergence_lower, row.divergence_upper)
        # 95% tau interval: tau -+ 1.959964 se (normal quantile, from memory).
        assert row.tau_low == pytest.approx(want["kendall_tau"]
                                            - 1.959963985 * want["kendall_tau_se"])
    # Ranking: by state severity, then divergence descending.
    sev = data.pairs["state"].map({"calm": 0, "watch": 1, "alert": 2}).to_numpy()
    assert (np.diff(sev) <= 0).all()
    for s in set(sev):
        d = data.pairs.loc[sev == s, "divergence"].to_numpy()
        assert (np.diff(d) <= 0).all()
    # The matrices are symmetric with a blank diagonal and hold the pair values.
    tau = data.matrix("kendall_tau")
    assert np.isnan(np.diag(tau.to_numpy())).all()
    np.testing.assert_array_equal(tau.to_numpy(), tau.to_numpy().T)
    first = data.pairs.iloc[0]
    assert tau.loc[first.asset_a, first.asset_b] == first.kendall_tau
    assert set(data.assets) == set(view.store.assets())


def test_latest_board_and_bad_dates(view):
    data = board_data(view)
    universe = view.store.read_universe(universe_key(view.signals_key))
    assert data.as_of == universe.index[-1] == data.last_date
    # Each pair's latest window end (pairs keep their own calendars).
    assert data.pairs["date"].max() == data.as_of
    with pytest.raises(InputError, match=r"board date: cannot read date '2021-13-40' \(expected YYYY-MM-DD\)"):
        board_data(view, "2021-13-40")
    with pytest.raises(InputError, match=r"board date: 1999-01-04 is outside the stored"):
        board_data(view, "1999-01-04")


def test_divergence_by_hand():
    got = divergence([0.30, 0.10, 0.00, 0.20], [0.05, 0.04, 0.0, 0.0], [0.20, 0.18, 0.15, 0.1])
    # (0.30 - 0.20) / 0.05 = 2; (0.10 - 0.18) / 0.04 = -2; no joint exceedance: 0; se 0 with a
    # positive difference: +inf (the signals module's convention).
    np.testing.assert_allclose(got[:2], [2.0, -2.0])
    assert got[2] == 0.0 and got[3] == np.inf


def test_cluster_order_keeps_a_dependent_block_together():
    # Two blocks whose names interleave alphabetically: {A, C, E, G} with tau 0.6 inside,
    # {B, D, F} with tau 0.45 inside, 0.05 across.
    names = list("ABCDEFG")
    block = {n: 0 if n in "ACEG" else 1 for n in names}
    tau = pd.DataFrame([[np.nan if a == b else (0.6 if block[a] == block[b] == 0 else
                         0.45 if block[a] == block[b] else 0.05) for b in names]
                        for a in names], index=names, columns=names)
    order = cluster_order(tau)
    assert sorted(order) == names
    labels = [block[n] for n in order]
    assert sum(x != y for x, y in pairwise(labels)) == 1  # each block contiguous
    # Deterministic whatever the input order.
    shuffled = tau.loc[names[::-1], names[::-1]]
    assert cluster_order(shuffled) == order
    # A missing pair counts as tau = 0 (distance 1): still a valid order.
    holey = tau.copy()
    holey.loc["A", "C"] = holey.loc["C", "A"] = np.nan
    assert sorted(cluster_order(holey)) == names


def test_pair_matrix_and_ranking_on_a_small_frame():
    pairs = pd.DataFrame({"asset_a": ["X", "X", "Y"], "asset_b": ["Y", "Z", "Z"],
                          "kendall_tau": [0.5, 0.1, -0.2],
                          "state": pd.array(["calm", "alert", "watch"], dtype="string"),
                          "divergence": [4.0, 1.0, np.inf]})
    m = pair_matrix(pairs, ("Z", "X", "Y"), "kendall_tau")
    assert m.loc["X", "Y"] == m.loc["Y", "X"] == 0.5 and m.loc["Z", "Y"] == -0.2
    assert np.isnan(m.loc["Z", "Z"])
    ranked = rank_pairs(pairs)
    assert (ranked["asset_a"] + ranked["asset_b"]).tolist() == ["XZ", "YZ", "XY"]


# ----------------------------------------------------------------------------- callback
def test_board_callback_returns_the_figures_and_the_table(dash_store, view):
    app = dash.Dash(__name__)
    register(app, view)
    key = next(k for k in app.callback_map if f"{ids.BOARD_MATRIX_TAU}.figure" in k)
    assert all(f"{i}.{p}" in key for i, p in OUTPUTS)
    assert f"{ids.BOARD_SUMMARY}.figure" not in key  # sent once per page load, below
    assert [i["id"] for i in app.callback_map[key]["inputs"]] == [
        ids.BOARD_DATE, ids.BOARD_TAIL_SOURCE, ids.BOARD_HORIZON]
    day = board_data(view).as_of.strftime("%Y-%m-%d")
    result = {k: as_figure(v) if k.endswith(".figure") else v
              for k, v in zip([f"{i}.{p}" for i, p in OUTPUTS], show_board(view, day, "model"),
                              strict=True)}
    data = board_data(view, day)
    tau_fig = result[f"{ids.BOARD_MATRIX_TAU}.figure"]
    heat = tau_fig.data[0]
    assert heat.type == "heatmap" and list(heat.x) == list(data.assets)
    z = np.array(heat.z, dtype=float)
    np.testing.assert_array_equal(z, data.matrix("kendall_tau").to_numpy())
    assert np.isnan(np.diag(z)).all()
    assert [list(c) for c in heat.colorscale] == [list(c) for c in DIVERGING]
    assert (heat.zmin, heat.zmax) == (-1, 1)
    lower = result[f"{ids.BOARD_MATRIX_LOWER}.figure"].data[0]
    np.testing.assert_array_equal(np.array(lower.z, float), data.matrix("tail_lower").to_numpy())
    assert [list(c) for c in lower.colorscale] == [list(c) for c in SEQUENTIAL]
    a, b = data.pairs.iloc[0][["asset_a", "asset_b"]]
    i, j = data.assets.index(a), data.assets.index(b)
    assert "no stored s.e." in lower.text[i][j]
    # The toggle: nonparametric tails with their Wilson intervals in the hover.
    emp = as_figure(show_board(view, day, "nonparametric")[1]).data[0]
    np.testing.assert_array_equal(np.array(emp.z, float),
                                  data.matrix("tail_lower_emp").to_numpy())
    assert "95%:" in emp.text[i][j]
    rows = result[f"{ids.BOARD_RANKING}.data"]
    assert len(rows) == 6 and rows[0]["rank"] == 1
    assert rows[0]["pair"] == f"{a}/{b}"
    assert rows[0]["history"] == f"[timeline](/timeline?pair={a}/{b})"
    columns = result[f"{ids.BOARD_RANKING}.columns"]
    assert columns[2] == {"name": "history", "id": "history", "presentation": "markdown",
                          "hideable": True}
    # Six rows: no filter row; the model-based columns start hidden (the main ones fit a
    # 1600-pixel screen), every column can be shown.
    assert result[f"{ids.BOARD_RANKING}.filter_action"] == "none"
    hidden = result[f"{ids.BOARD_RANKING}.hidden_columns"]
    assert "lower tail averaged" in hidden and "upper tail selected family" in hidden
    assert "divergence (z)" not in hidden and "lower tail nonparametric" not in hidden
    stored = view.store.read_universe(universe_key(view.signals_key))
    summary = as_figure(show_universe(view))
    # tau, three figures per tail, two alert shares, pairs counted and carried.
    assert len(summary.data) == 11
    np.testing.assert_allclose(np.array(summary.data[0].y, float),
                               stored["kendall_tau"].to_numpy(), atol=5e-5)
    counted = next(t for t in summary.data if t.name == "pairs counted")
    np.testing.assert_array_equal(np.array(counted.y, float), stored["n_pairs"])
    # The date marker on every row, at the latest date until the page says otherwise.
    latest = f"{stored.index[-1]:%Y-%m-%d}"
    assert [(s.x0, s.x1) for s in summary.layout.shapes] == [(latest, latest)] * 3
    earlier = f"{stored.index[-40]:%Y-%m-%d}"
    moved = as_figure(marked(show_universe(view), earlier))
    assert [(s.x0, s.x1) for s in moved.layout.shapes] == [(earlier, earlier)] * 3
    assert moved.data == summary.data
    patch = move_marker(view, earlier).to_plotly_json()["operations"]
    assert patch == [{"operation": "Assign", "location": ["layout", "shapes"],
                      "params": {"value": date_marker(earlier)}}]
    universe = next(k for k in app.callback_map if k.startswith(f"{ids.BOARD_SUMMARY}.figure"))
    assert [i["id"] for i in app.callback_map[universe]["inputs"]] == [ids.BOARD_UNIVERSE]
    note = result[f"{ids.BOARD_NOTE}.children"]
    assert "window 120 days" in note and "real-time" in note and "6 pairs of 4 assets" in note
    assert result[f"{ids.BOARD_MESSAGE}.children"] == ""
    bad = show_board(view, "1999-01-04", "model")
    shown = dict(zip([f"{i}.{p}" for i, p in OUTPUTS], bad, strict=True))
    assert "outside the stored window ends" in shown[f"{ids.BOARD_MESSAGE}.children"].children
    assert bad[3] == []


def test_matrix_figure_refuses_unknown_quantities(view):
    data = board_data(view)
    with pytest.raises(ValueError, match="quantity must be one of"):
        matrix_figure(data, "spearman_rho")
    with pytest.raises(ValueError, match="source must be one of"):
        matrix_figure(data, "tail_lower", "guess")


def test_layout_reads_the_date_and_tail_source_from_the_address(view):
    universe = view.store.read_universe(universe_key(view.signals_key))
    tree = board_page.layout(view, {})
    picker = find(tree, ids.BOARD_DATE)
    assert picker.date == universe.index[-1].strftime("%Y-%m-%d")
    assert picker.min_date_allowed == universe.index[0].strftime("%Y-%m-%d")
    # The default tail figure is the nonparametric one (issue 12; it was the selected
    # family's), the default horizon one month.
    assert find(tree, ids.BOARD_TAIL_SOURCE).value == "nonparametric"
    assert find(tree, ids.BOARD_HORIZON).value == "1m"
    day = universe.index[100].strftime("%Y-%m-%d")
    tree = board_page.layout(view, {"date": day, "tails": "model", "horizon": "1y"})
    assert find(tree, ids.BOARD_DATE).date == day
    assert find(tree, ids.BOARD_TAIL_SOURCE).value == "model"
    assert find(tree, ids.BOARD_HORIZON).value == "1y"
    bad = board_page.layout(view, {"date": "yesterday", "tails": "best", "horizon": "2d"})
    assert "date in the address: cannot read date 'yesterday' (expected YYYY-MM-DD)" in text(bad)
    assert ("tails in the address: 'best' is not one of nonparametric, averaged, model"
            in text(bad))
    assert "horizon in the address: '2d' is not one of 1w, 1m, 3m, 1y" in text(bad)
    assert find(bad, ids.BOARD_TAIL_SOURCE).value == "nonparametric"
    assert find(bad, ids.BOARD_HORIZON).value == "1m"
    assert "in binomial standard errors" in text(bad)  # the ranking's definition is shown


def test_the_same_board_on_both_backends(dash_store, view, store_url):
    """The fixture's metrics copied into a fresh store (SQLite file or PostgreSQL database):
    the signals update stores the same runs and universe, and the board reads the same."""
    cfg = dash_store.cfg
    with view.store.engine.connect() as conn:
        rows = [dict(r) for r in conn.execute(sa.select(metrics)).mappings()]
        states = [dict(r) for r in conn.execute(sa.select(pair_state)).mappings()]
    with Store(store_url) as target:
        with target.transaction() as conn:
            conn.execute(metrics.insert(), rows)
            conn.execute(pair_state.insert(), states)
        update_signals(target, cfg)
        other = StoreView.open(cfg, target)
        pd.testing.assert_frame_equal(target.read_state_runs(other.signals_key),
                                      view.store.read_state_runs(view.signals_key))
        pd.testing.assert_frame_equal(target.read_universe(universe_key(other.signals_key)),
                                      view.store.read_universe(universe_key(view.signals_key)), rtol=1e-12)
        day = view.store.read_universe(universe_key(view.signals_key)).index[300]
        got, want = board_data(other, day).pairs, board_data(view, day).pairs
    pd.testing.assert_frame_equal(got, want, rtol=1e-12)


def test_revisions_and_replaced_metrics_drop_the_universe_rows_they_touch(dash_store, tmp_path):
    shutil.copy(dash_store.url.removeprefix("sqlite:///"), tmp_path / "copy.sqlite")
    url = f"sqlite:///{tmp_path / 'copy.sqlite'}"
    cfg = dash_store.cfg
    key = signals_key(cfg)
    with Store(url) as store:
        view = StoreView.open(cfg, store)
        before = store.read_universe(universe_key(key))
        asset = dash_store.assets[0]
        first = before.index[len(before) // 2].date()
        # A revision of one asset drops its pairs' metrics from that date, and the universe
        # rows from that date (for every pair: they averaged the dropped rows).
        with store.transaction() as conn:
            store.invalidate_from(conn, asset, first)
        assert store.read_universe(universe_key(key)).index[-1].date() < first
        update_signals(store, cfg)
        fresh = _fresh_signals(view)
        want = universe_summary({p: s.frame for p, s in fresh.items()})
        got = store.read_universe(universe_key(key))
        np.testing.assert_array_equal(got["n_pairs"], want["n_pairs"])
        after = got[got.index.date >= first]
        # The revised asset's 3 pairs are carried forward over the first dates (at most
        # UNIVERSE_STALE_LIMIT = 5 of them), then only the other 3 pairs count.
        assert after["n_carried"].iloc[:5].tolist() == [3] * 5
        assert after["n_pairs"].iloc[:5].tolist() == [6] * 5
        assert after["n_pairs"].iloc[5:].max() == 3
        np.testing.assert_array_equal(got["n_carried"], want["n_carried"])
        np.testing.assert_allclose(got["kendall_tau"], want["kendall_tau"], rtol=1e-12)
        # Replacing a pair's metrics drops the whole summary under those settings.
        a, b = max(fresh)
        timeline = store.read_timeline(view.rolling_key, a, b)
        with store.transaction() as conn:
            store.save_pair_metrics(conn, view.rolling_key, a, b, timeline, {}, 0.3,
                                    replace_all=True)
        assert store.read_universe(universe_key(key)).empty
        update_signals(store, cfg)
        pd.testing.assert_frame_equal(store.read_universe(universe_key(key)), got, rtol=1e-12)


# ----------------------------------------------------------------------------- issue 12
def test_change_se_by_hand():
    # Overlap share 1 - lag/n: identical windows (lag 0) give |se_now - se_then|; disjoint
    # ones (lag >= n) the independent sqrt(0.03^2 + 0.04^2) = 0.05 (3-4-5); half-overlapping
    # sqrt(0.0009 + 0.0016 - 2 * 0.5 * 0.0012) = sqrt(0.0013).
    got = change_se([0.03, 0.03, 0.03, 0.03], [0.04, 0.04, 0.04, 0.04], [0, 250, 400, 125],
                    250)
    np.testing.assert_allclose(got, [0.01, 0.05, 0.05, np.sqrt(0.0013)], rtol=1e-12)
    np.testing.assert_allclose(change_z([0.1, 0.0, 0.2], [0.05, 0.0, 0.0]), [2.0, 0.0, np.nan])


def test_change_view_equals_the_stored_timeline(view):
    """Each pair's change over 3 months (63 window ends) and 1 year (252: disjoint windows of
    120) is its own timeline's difference, with the standard error of change_se by hand."""
    for horizon, back in (("3m", 63), ("1y", 252)):
        data = board_data(view, "2019-01-04", horizon)
        assert (data.back, data.lag) == (back, back)
        rho = max(0.0, 1 - back / 120)
        for row in data.pairs.itertuples(index=False):
            tl = view.store.read_timeline(view.rolling_key, row.asset_a, row.asset_b)
            tl = tl[tl["date"] <= data.as_of].reset_index(drop=True)
            now, then = tl.iloc[-1], tl.iloc[-1 - back]
            assert row.date == now["date"] and row.date_then == then["date"]
            for col in CHANGE_COLUMNS:
                assert getattr(row, f"change_{col}") == pytest.approx(now[col] - then[col],
                                                                      abs=1e-15), col
            for col, se in (("kendall_tau", "kendall_tau_se"),
                            ("tail_lower_emp", "tail_lower_emp_se")):
                a, b = now[se], then[se]
                want = np.sqrt(a * a + b * b - 2 * rho * a * b)
                assert getattr(row, f"change_{col}_se") == pytest.approx(want, rel=1e-12)
                if want > 0:
                    assert getattr(row, f"change_{col}_z") == pytest.approx(
                        (now[col] - then[col]) / want, rel=1e-12)
    # Pairs with too short a history compare with nothing (the fixture starts 2017-06-16).
    early = board_data(view, "2017-09-29", "1y")
    assert early.pairs["date_then"].isna().all()
    assert early.pairs["change_kendall_tau"].isna().all()


def test_excess_and_change_matrices_and_the_averaged_source(view):
    day = "2019-01-04"
    data = board_data(view, day, "3m")
    a, b = data.pairs.iloc[0][["asset_a", "asset_b"]]
    i, j = data.assets.index(a), data.assets.index(b)
    for tail in ("lower", "upper"):
        heat = as_figure(excess_figure(data, tail)).data[0]
        np.testing.assert_array_equal(np.array(heat.z, float),
                                      data.matrix(f"divergence_{tail}").to_numpy())
        assert (heat.zmin, heat.zmax) == (-4, 4)
        assert [list(c) for c in heat.colorscale] == [list(c) for c in DIVERGING]
        assert "excess over Gaussian" in heat.text[i][j] and "s.e." in heat.text[i][j]
    tau = as_figure(change_figure(data, "kendall_tau")).data[0]
    np.testing.assert_array_equal(np.array(tau.z, float),
                                  data.matrix("change_kendall_tau").to_numpy())
    assert "z " in tau.text[i][j] and "correlation 0.47 assumed" in tau.text[i][j]  # 1-63/120
    averaged = as_figure(change_figure(data, "tail_lower", "averaged")).data[0]
    np.testing.assert_array_equal(np.array(averaged.z, float),
                                  data.matrix("change_tail_lower_avg").to_numpy())
    assert "no stored s.e. for a model-based tail" in averaged.text[i][j]
    level = as_figure(matrix_figure(data, "tail_upper", "averaged")).data[0]
    np.testing.assert_array_equal(np.array(level.z, float),
                                  data.matrix("tail_upper_avg").to_numpy())
    assert "model-averaged (Akaike weights)" in level.text[i][j]
    # The callback with the averaged source and a one-week horizon.
    out = dict(zip([f"{k}.{p}" for k, p in OUTPUTS], show_board(view, day, "averaged", "1w"),
                   strict=True))
    lower = as_figure(out[f"{ids.BOARD_MATRIX_LOWER}.figure"]).data[0]
    week = board_data(view, day, "1w")
    np.testing.assert_array_equal(np.array(lower.z, float),
                                  week.matrix("tail_lower_avg").to_numpy())
    change = as_figure(out[f"{ids.BOARD_CHANGE_TAU}.figure"])
    assert "over 1 week" in change.layout.title.text
    assert "Change over 1 week (5 window ends, 5 trading days)" in out[
        f"{ids.BOARD_CHANGE_NOTE}.children"]
    columns = {c["id"]: c for c in out[f"{ids.BOARD_RANKING}.columns"]}
    assert columns["Δ tau 1w (z)"]["type"] == "numeric"
    rows = out[f"{ids.BOARD_RANKING}.data"]
    first = next(r for r in rows if r["pair"] == f"{a}/{b}")
    got = week.pairs.set_index(["asset_a", "asset_b"]).loc[(a, b)]
    assert first["Δ tau 1w"] == round(got["change_kendall_tau"], 3)
    assert first["lower tail averaged"] == round(got["tail_lower_avg"], 3)


def test_standing_tail_heaviness_label_on_the_demo(view):
    """The fixture's pairs are Gaussian until 2018-01-04, then Clayton with the same tau
    0.35 (lower tail dependence 2^(-1/theta) = 0.53 at theta = 2 tau / (1 - tau); Nelsen
    2006, An Introduction to Copulas, example 5.22, from memory). A year into the Clayton
    regime every pair is a standing heavy lower tail, upper tail not; in the Gaussian stretch
    none is."""
    late = board_data(view, "2019-01-04")
    assert late.pairs["standing"].tolist() == ["standing heavy lower tail"] * 6
    calm = board_data(view, "2017-12-29")
    assert calm.pairs["standing"].tolist() == [""] * 6
    # The label's counts are the timeline's own: window ends of the last 365 days with the
    # averaged lower tail >= 0.1, at least 80% of them and of 252 window ends.
    for row in late.pairs.itertuples(index=False):
        tl = view.store.read_timeline(view.rolling_key, row.asset_a, row.asset_b)
        year = tl[(tl["date"] > late.as_of - pd.Timedelta(days=365))
                  & (tl["date"] <= late.as_of)]
        assert len(year) >= 0.8 * 252
        assert (year["tail_lower_avg"] >= 0.1).mean() >= 0.8
        assert (year["tail_upper_avg"] >= 0.1).mean() < 0.8
    table = ranking_table(late)
    assert table["standing"].tolist() == ["standing heavy lower tail"] * 6


def test_standing_labels_by_hand():
    counts = pd.DataFrame({"n_ends": [252, 252, 252, 100, 252],
                           "n_tail_lower_avg": [250, 202, 100, 100, 201],
                           "n_tail_upper_avg": [240, 10, 240, 100, 0]})
    got = standing_labels(counts, 252)
    # 0.8 * 252 = 201.6: 202 is enough, 201 is not; 100 window ends are too few for a year.
    assert got.tolist() == ["standing heavy tails", "standing heavy lower tail",
                            "standing heavy upper tail", "", ""]


def test_standing_label_of_a_student_t_pair_and_not_of_a_gaussian_one():
    """A Student-t copula (rho 0.5, nu 4: lambda = 2 t_5(-sqrt(5 * 0.5 / 1.5)) = 0.25, Demarta
    & McNeil 2005, The t copula and related copulas, eq. 3.4, from memory) never changes
    but has heavy tails in both: a standing condition. A Gaussian copula with the same
    correlation does not get the label (simulated data, one fixed seed each)."""
    from monitor.stats.rolling import RollingSettings, pair_metrics, window_end_positions
    from synthetic_feeds.samplers import sample_gaussian, sample_student_t

    rng = np.random.default_rng(20261202)
    corr = [[1.0, 0.5], [0.5, 1.0]]
    settings = RollingSettings()
    labels = {}
    for name, u in (("t", sample_student_t(501, corr, 4.0, rng)),
                    ("gaussian", sample_gaussian(501, corr, rng))):
        z = stats.norm.ppf(u)
        dates = pd.bdate_range("2021-01-04", periods=len(z))
        frame = pair_metrics(dates, z[:, 0], z[:, 1], settings,
                             window_end_positions(len(z), settings)).frame
        assert len(frame) == 252
        counts = pd.DataFrame({"n_ends": [len(frame)],
                               "n_tail_lower_avg": [(frame["tail_lower_avg"] >= 0.1).sum()],
                               "n_tail_upper_avg": [(frame["tail_upper_avg"] >= 0.1).sum()]})
        labels[name] = standing_labels(counts, 252).iloc[0]
    assert labels == {"t": "standing heavy tails", "gaussian": ""}
