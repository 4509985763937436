"""The rolling engine: per-window metrics against the one-window path and outside references;
the stored timeline: incremental, idempotent, resumable after kill -9, identical on Dask."""

from __future__ import annotations

import io
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa
from scipy import stats

from monitor.config import ComputeConfig, Config, RollingConfig, StoreConfig
from monitor.data.store import Store, metrics
from monitor.engine.pipeline import run_update
from monitor.settings import rolling_key
from monitor.stats.copulas import family
from monitor.stats.empirical import pseudo_observations, spearman_rho, tail_dependence
from monitor.stats.fitting import select_copula
from monitor.stats.inference import kendall_tau_interval
from monitor.stats.rolling import (
    PairWindows,
    RollingSettings,
    batch_metrics,
    pair_metrics,
    window_end_positions,
)


def _pair(n: int, seed: int):
    rng = np.random.default_rng(seed)
    half = n // 2
    uv = np.vstack([family("gaussian").sample(half, (0.5,), rng),
                    family("clayton").sample(n - half, (1.08,), rng)])
    dates = pd.bdate_range("2016-01-01", periods=n)
    return dates, stats.norm.ppf(uv[:, 0]), stats.norm.ppf(uv[:, 1])


def test_window_metrics_equal_the_one_window_path_and_references():
    dates, za, zb = _pair(700, seed=2)
    settings = RollingSettings(window=250)
    pos = window_end_positions(len(dates), settings)
    assert pos[0] == 249 and len(pos) == 451
    frame = pair_metrics(dates, za, zb, settings, pos).frame
    for w in (0, 200, 450):
        end = pos[w]
        u = pseudo_observations(za[end - 249:end + 1])
        v = pseudo_observations(zb[end - 249:end + 1])
        row = frame.iloc[w]
        assert row["date"] == dates[end] and row["start"] == dates[end - 249]
        # Kendall's tau-b and Spearman's rho against scipy.stats (Kendall 1938; Spearman 1904).
        assert row["kendall_tau"] == pytest.approx(stats.kendalltau(u, v)[0], abs=1e-12)
        assert row["spearman_rho"] == pytest.approx(float(spearman_rho(u, v)), abs=1e-12)
        assert row["kendall_tau_se"] == pytest.approx(kendall_tau_interval(u, v).std_error,
                                                      rel=1e-10)
        td = tail_dependence(u, v, 0.1)
        assert row["tail_lower_emp"] == float(td.lower)
        assert row["tail_upper_emp"] == float(td.upper)
        one = select_copula(u, v)
        assert (row["family"], row["rotation"]) == (one.selected.family, one.selected.rotation)
        # Rolling fits stop once Newton estimates < 2.5e-5 of gain left (fitting._SETTLE_GAIN).
        assert row["aic"] == pytest.approx(one.selected.aic, abs=1e-5)
        assert row["loglik_gauss"] == pytest.approx(one.fit_of("gaussian").loglik, abs=5e-6)
        # Gaussian copula tail concordance at the window's tau (reference sheet, section 4:
        # rho = 0.5 gives C(q,q)/q = .3240 at q = .10).
        rho = np.sin(np.pi * row["kendall_tau"] / 2)
        assert row["gauss_tail_q"] == pytest.approx(
            stats.multivariate_normal([0, 0], [[1, rho], [rho, 1]]).cdf(
                [stats.norm.ppf(0.1)] * 2) / 0.1, abs=1e-6)
        prev = frame.iloc[w - 1]["kendall_tau"] if w else row["kendall_tau"]
        theta, r = 2 * prev / (1 - prev), np.sin(np.pi * prev / 2)
        llr = (family("clayton").logpdf(u[-1], v[-1], (theta,))
               - family("gaussian").logpdf(u[-1], v[-1], (r,)))
        assert row["llr_lower"] == pytest.approx(float(llr), abs=1e-10)
    rho_half = family("gaussian").cdf(0.1, 0.1, (0.5,)) / 0.1
    assert float(rho_half) == pytest.approx(0.3240, abs=5e-5)


def test_many_pairs_in_one_batch_equal_each_pair_alone():
    # The daily update stacks one new window of every pair into one batch: each pair's rows,
    # with its own warm starts and previous tau, must equal that pair computed on its own.
    settings = RollingSettings(window=120)
    items = []
    for seed in range(4):
        dates, za, zb = _pair(200, seed)
        before = window_end_positions(len(dates), settings)[:-2 - seed % 2]
        prior = pair_metrics(dates, za, zb, settings, before[-3:])
        after = window_end_positions(len(dates), settings, after=int(before[-1]))
        items.append(PairWindows(dates, za, zb, after, prior.last_params, prior.last_tau))
    items.append(PairWindows(dates, za, zb, np.empty(0, np.intp)))  # nothing new
    batch = batch_metrics(items, settings)
    assert batch[-1].frame.empty
    for it, got in zip(items[:-1], batch[:-1], strict=True):
        alone = pair_metrics(it.dates, it.za, it.zb, settings, it.positions, start=it.start,
                             previous_tau=it.previous_tau)
        assert len(got.frame) == len(it.positions) in (2, 3)
        pd.testing.assert_frame_equal(got.frame, alone.frame)
        assert got.last_tau == alone.last_tau
        for key, p in alone.last_params.items():
            np.testing.assert_array_equal(got.last_params[key], p)


def test_positions_are_anchored_so_appending_only_adds_window_ends():
    s = RollingSettings(window=50, step=5)
    short, long = window_end_positions(120, s), window_end_positions(200, s)
    np.testing.assert_array_equal(long[:len(short)], short)
    np.testing.assert_array_equal(window_end_positions(200, s, after=int(short[-1])),
                                  long[len(short):])


# ----------------------------------------------------------------------------- stored timeline
def _prices(n_assets: int, n_days: int, seed: int) -> pd.DataFrame:
    """Invented GARCH-free demo prices with Gaussian dependence (fictional assets)."""
    rng = np.random.default_rng(seed)
    corr = 0.4 + 0.3 * np.eye(n_assets)
    corr /= 0.7
    x = rng.multivariate_normal(np.zeros(n_assets), corr, size=n_days) * 0.01
    names = [f"TREE{i}" for i in range(n_assets)]
    return pd.DataFrame(100 * np.exp(np.cumsum(x, axis=0)), columns=names,
                        index=pd.bdate_range("2016-01-01", periods=n_days, name="date"))


def _setup(tmp_path: Path, name: str, prices: pd.DataFrame, **compute) -> Config:
    url = f"sqlite:///{tmp_path / name}.sqlite"
    path = tmp_path / f"{name}.csv"
    prices.to_csv(path, float_format="%.12g")
    cfg = Config(store=StoreConfig(url=url), rolling=RollingConfig(window=60),
                 compute=ComputeConfig(**({"workers": 1} | compute)))
    from monitor.data.ingest import ingest_sources, read_file_source

    with Store(url) as store:
        ingest_sources(store, [read_file_source(path, "prices")])
    return cfg


def _metric_rows(url: str) -> list[tuple]:
    with Store(url) as store, store.engine.connect() as conn:
        return conn.execute(sa.select(metrics).order_by(
            metrics.c.asset_a, metrics.c.asset_b, metrics.c.date)).all()


def test_update_is_incremental_and_idempotent(tmp_path):
    prices = _prices(3, 330, seed=3)
    cfg = _setup(tmp_path, "s", prices.iloc[:320])
    first = run_update(cfg, progress=False)
    # 319 returns; the real-time filter's first sample takes 251 of them, leaving 68
    # residuals, hence 68 - 60 + 1 windows of 60 per pair.
    assert first.rolling.updated_pairs == 3
    assert first.rolling.new_windows == 3 * (319 - 251 - 60 + 1)
    again = run_update(cfg, progress=False)
    assert again.rolling.updated_pairs == 0 and again.rolling.new_windows == 0
    from monitor.data.ingest import ingest_sources, read_file_source

    prices.iloc[:321].to_csv(tmp_path / "day.csv", float_format="%.12g")
    with Store(cfg.store.url) as store:
        ingest_sources(store, [read_file_source(tmp_path / "day.csv", "prices")])
    day = run_update(cfg, progress=False)
    # A new day costs one window per pair.
    assert day.rolling.new_windows == 3
    key = rolling_key(cfg)
    with Store(cfg.store.url) as store:
        tl = store.read_timeline(key, "TREE0", "TREE1")
    assert tl["date"].is_monotonic_increasing and tl["date"].iloc[-1] == prices.index[320]
    assert (tl["n"] == 60).all()


def test_a_revision_recomputes_the_affected_windows_like_a_fresh_run(tmp_path):
    # A revised price drops the derived results from its date on (the pair's rolling state
    # too, while older metric rows stay); the next update must recompute the pair, not
    # collide with the rows it kept, and end where a store built from the revised data does.
    from monitor.data.ingest import ingest_sources, read_file_source

    prices = _prices(2, 340, seed=6)
    cfg = _setup(tmp_path, "r", prices)
    run_update(cfg, progress=False)
    revised = prices.copy()
    revised.iloc[330, 0] *= 1.01
    revised.to_csv(tmp_path / "revised.csv", float_format="%.12g")
    with Store(cfg.store.url) as store:
        ingest_sources(store, [read_file_source(tmp_path / "revised.csv", "prices")],
                       accept_revisions=True)
    run_update(cfg, progress=False)
    fresh = _setup(tmp_path, "f", revised)
    run_update(fresh, progress=False)
    key = rolling_key(cfg)
    with Store(cfg.store.url) as store, Store(fresh.store.url) as other:
        got, want = store.read_timeline(key, "TREE0", "TREE1"), other.read_timeline(
            key, "TREE0", "TREE1")
    assert len(got) == len(want) > 0
    pd.testing.assert_frame_equal(got, want, check_exact=False, atol=1e-5)


def test_kill_minus_nine_then_rerun_gives_the_uninterrupted_result(tmp_path):
    prices = _prices(6, 420, seed=4)
    reference = _setup(tmp_path, "ref", prices)
    run_update(reference, progress=False)
    victim = _setup(tmp_path, "victim", prices)
    (tmp_path / "victim.toml").write_text(
        f'[store]\nurl = "{victim.store.url}"\n[rolling]\nwindow = 60\n[compute]\nworkers = 1\n')
    comove = str(Path(sys.executable).parent / "comove")
    proc = subprocess.Popen([comove, "update", "--config", str(tmp_path / "victim.toml")],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.time() + 120
    try:
        while time.time() < deadline and proc.poll() is None:
            try:
                if _metric_rows(victim.store.url):
                    break  # some pairs are stored, others not yet
            except sa.exc.OperationalError:
                pass
            time.sleep(0.05)
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
        proc.wait(10)
    finally:
        if proc.poll() is None:
            proc.kill()
    partial = len(_metric_rows(victim.store.url))
    total = len(_metric_rows(reference.store.url))
    assert partial < total, "the update finished before it could be interrupted"
    run_update(victim, progress=False)
    assert _metric_rows(victim.store.url) == _metric_rows(reference.store.url)


@pytest.fixture(scope="module")
def dask_scheduler():
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       host="127.0.0.1", dashboard_address=None)
    yield cluster.scheduler_address
    cluster.close()


def test_dask_backend_gives_identical_results(tmp_path, dask_scheduler):
    prices = _prices(4, 360, seed=5)
    local = _setup(tmp_path, "local", prices)
    run_update(local, progress=False)
    dask = _setup(tmp_path, "dask", prices, backend="dask", scheduler=dask_scheduler)
    summary = run_update(dask, progress=False)
    assert summary.rolling.backend == "dask" and summary.rolling.updated_pairs == 6
    assert _metric_rows(dask.store.url) == _metric_rows(local.store.url)


def test_signals_are_stored_and_the_timeline_exports_per_contract(tmp_path, capsys):
    from monitor import cli
    from monitor.engine.pipeline import read_pair_signals
    from monitor.settings import signals_key

    prices = _prices(3, 360, seed=6)
    cfg = _setup(tmp_path, "sig", prices)
    summary = run_update(cfg, progress=False)
    assert summary.signals.pairs == 3
    (tmp_path / "c.toml").write_text(
        f'[store]\nurl = "{cfg.store.url}"\n[rolling]\nwindow = 60\n')
    assert cli.main(["export", "timeline", "--pair", "TREE0", "TREE1", "--config",
                     str(tmp_path / "c.toml")]) == 0
    out = pd.read_csv(io.StringIO(capsys.readouterr().out))
    contract = ["date", "n", "kendall_tau", "spearman_rho", "family", "rotation", "tail_lower",
                "tail_upper", "tail_lower_emp", "tail_upper_emp", "alert"]
    assert list(out.columns[:len(contract)]) == contract
    with Store(cfg.store.url) as store:
        sig = read_pair_signals(store, cfg, "TREE0", "TREE1")
        stored = store.read_episodes(signals_key(cfg), ("TREE0", "TREE1"))
    assert len(out) == len(sig.frame)
    np.testing.assert_array_equal(out["alert"].to_numpy(), sig.frame["alert"].to_numpy())
    assert set(out["alert"].unique()) <= {0, 1}
    assert len(stored) == len(sig.episodes)
    # The other order of the pair exports the same rows.
    assert cli.main(["export", "timeline", "--pair", "TREE1", "TREE0", "--config",
                     str(tmp_path / "c.toml")]) == 0
    other = pd.read_csv(io.StringIO(capsys.readouterr().out))
    np.testing.assert_allclose(other["kendall_tau"], out["kendall_tau"])
    assert cli.main(["export", "timeline", "--pair", "TREE0", "OAK", "--config",
                     str(tmp_path / "c.toml")]) == 2
    assert "no stored returns for 'OAK'" in capsys.readouterr().err


def test_universe_summary_over_time(tmp_path):
    from monitor.engine.pipeline import read_pair_signals, read_universe_summary

    prices = _prices(3, 340, seed=8)
    cfg = _setup(tmp_path, "uni", prices)
    run_update(cfg, progress=False)
    with Store(cfg.store.url) as store:
        summary = read_universe_summary(store, cfg)
        frames = [read_pair_signals(store, cfg, a, b).frame
                  for a, b in (("TREE0", "TREE1"), ("TREE0", "TREE2"), ("TREE1", "TREE2"))]
    assert (summary["n_pairs"] == 3).all()
    day = summary.index[len(summary) // 2]
    rows = [f[f["date"] == day].iloc[0] for f in frames]
    assert summary.loc[day, "n_alert"] == sum(int(r["alert"]) for r in rows)
    assert summary.loc[day, "share_alert"] == pytest.approx(summary.loc[day, "n_alert"] / 3)
    assert summary.loc[day, "kendall_tau"] == pytest.approx(np.mean([r["kendall_tau"]
                                                                     for r in rows]))
    assert summary.loc[day, "tail_lower_emp"] == pytest.approx(np.mean([r["tail_lower_emp"]
                                                                        for r in rows]))


def _shifting_prices(n_days: int, seed: int) -> pd.DataFrame:
    """Invented prices of three fictional assets: the first two Gaussian-dependent, then
    Clayton-dependent with about the same Kendall's tau (0.5) from day 400; the third
    Gaussian throughout."""
    rng = np.random.default_rng(seed)
    uv = np.vstack([family("gaussian").sample(400, (np.sin(np.pi / 4),), rng),
                    family("clayton").sample(n_days - 400, (2.0,), rng)])
    third = stats.norm.cdf(0.6 * stats.norm.ppf(uv[:, 0]) + 0.8 * rng.standard_normal(n_days))
    x = stats.norm.ppf(np.column_stack([uv, third])) * 0.01
    return pd.DataFrame(100 * np.exp(np.cumsum(x, axis=0)), columns=["FERN", "MOSS", "REED"],
                        index=pd.bdate_range("2016-01-01", periods=n_days, name="date"))


def test_daily_signals_continue_to_the_states_and_episodes_of_a_fresh_run(tmp_path):
    # The daily update continues each pair's signals from a stored resume point instead of
    # its whole timeline; after days added one, a few and many at a time, and a revision,
    # the stored state runs, episodes and universe summary must be those of a store built
    # in one go.
    from monitor.data.ingest import ingest_sources, read_file_source
    from monitor.engine.pipeline import read_universe_summary
    from monitor.settings import signals_key

    prices = _shifting_prices(780, seed=2)
    cfg = _setup(tmp_path, "d", prices.iloc[:700])
    run_update(cfg, progress=False)
    key = signals_key(cfg)
    for stop in (701, 702, 703, 708, 709, 740, 780):
        prices.iloc[:stop].to_csv(tmp_path / "day.csv", float_format="%.12g")
        with Store(cfg.store.url) as store:
            before = store.read_resumes(key)
            ingest_sources(store, [read_file_source(tmp_path / "day.csv", "prices")])
        assert len(before) == 3  # every pair continues from a resume point
        run_update(cfg, progress=False)
    # A revision inside the continued stretch drops the pairs' resume points with their
    # metrics: their signals are recomputed from the whole timeline.
    prices.iloc[760, 1] *= 1.02
    prices.to_csv(tmp_path / "day.csv", float_format="%.12g")
    with Store(cfg.store.url) as store:
        ingest_sources(store, [read_file_source(tmp_path / "day.csv", "prices")],
                       accept_revisions=True)
        assert set(store.read_resumes(key)) == {("FERN", "REED")}
    run_update(cfg, progress=False)
    fresh = _setup(tmp_path, "f", prices)
    run_update(fresh, progress=False)
    with Store(cfg.store.url) as store, Store(fresh.store.url) as other:
        runs, runs_fresh = store.read_state_runs(key), other.read_state_runs(key)
        eps, eps_fresh = (s.read_episodes(key).drop(columns="updated_at")
                          for s in (store, other))
        uni, uni_fresh = read_universe_summary(store, cfg), read_universe_summary(other, cfg)
    assert (eps_fresh["cause"] == "divergence").any() and len(runs_fresh) > 6
    pd.testing.assert_frame_equal(runs, runs_fresh)
    # Model-based figures differ at the estimator's tolerance: a daily fit starts from the
    # previous window's estimate, the backfill from interpolated ones (atol as in the
    # revision test above).
    pd.testing.assert_frame_equal(eps, eps_fresh, check_exact=False, rtol=0, atol=1e-4)
    pd.testing.assert_frame_equal(uni, uni_fresh, check_exact=False, rtol=0, atol=1e-4)


def test_daily_update_reads_recent_residuals_and_gets_the_same_tasks(tmp_path):
    # The daily path reads only recent residuals; its tasks (days, values and window-end
    # positions the workers get) must equal those from the whole history, and a read too
    # short for some pair's window must fall back to the whole history.
    from monitor.data.ingest import ingest_sources, read_file_source
    from monitor.engine.pipeline import (
        _pair_tasks,
        _rolling_tasks,
        _universe_pairs,
    )
    from monitor.settings import marginal_settings, rolling_settings

    prices = _prices(3, 420, seed=5)
    cfg = _setup(tmp_path, "t", prices.iloc[:415])
    run_update(cfg, progress=False)
    prices.to_csv(tmp_path / "more.csv", float_format="%.12g")
    with Store(cfg.store.url) as store:
        ingest_sources(store, [read_file_source(tmp_path / "more.csv", "prices")])
    from monitor.engine.pipeline import update_marginals

    with Store(cfg.store.url) as store:
        update_marginals(store, cfg, progress=False)
        m_key, settings = marginal_settings(cfg).key, rolling_settings(cfg)
        key = rolling_key(cfg)
        reads, read = [], store.read_residuals
        store.read_residuals = lambda *a, **kw: (reads.append(kw.get("since")), read(*a, **kw))[1]
        pairs, daily = _rolling_tasks(store, m_key, key, settings, cfg)
        store.read_residuals = read
        z = store.read_residuals(m_key)
        states = store.load_pair_states(key)
        whole = _pair_tasks(store, key, settings, z, pairs, states, recent_only=False)
        short = _pair_tasks(store, key, settings, z.iloc[-settings.window:], pairs, states,
                            recent_only=True)
    assert pairs == _universe_pairs(list(prices.columns), cfg) and short is None
    # One read, of about three window lengths of calendar days before the oldest stored end.
    assert len(reads) == 1 and reads[0] is not None and reads[0] > z.index[0].date()
    assert [len(t.positions) for t in daily] == [5, 5, 5]
    for got, want in zip(daily, whole, strict=True):
        assert (got.a, got.b, got.replace_all) == (want.a, want.b, want.replace_all)
        np.testing.assert_array_equal(got.positions, want.positions)
        np.testing.assert_array_equal(got.dates, want.dates)
        np.testing.assert_array_equal(got.za, want.za)
        np.testing.assert_array_equal(got.zb, want.zb)
