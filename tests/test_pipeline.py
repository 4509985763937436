"""The daily job: configured sources, marginal filtering into the store, incremental = full,
no look-ahead, revisions recomputed; and `comove fit --kind prices` using data up to --end."""

from __future__ import annotations

import io
import json
import re
from dataclasses import replace

import numpy as np
import pandas as pd
import sqlalchemy as sa

from monitor import cli
from monitor.config import ComputeConfig, Config, SourceConfig, StoreConfig
from monitor.data.ingest import ingest_sources, read_file_source
from monitor.data.store import Store, residuals
from monitor.engine.pipeline import run_update
from monitor.settings import marginal_settings

from .conftest import take_snapshot


def _garch_prices(n: int, seed: int) -> pd.DataFrame:
    """Two invented GARCH(1,1)-t price series (demo data) with one holiday gap."""
    rng = np.random.default_rng(seed)
    out = {}
    for name, (w, a, b) in {"ALDER": (0.05, 0.08, 0.9), "BIRCH": (0.03, 0.1, 0.87)}.items():
        z = rng.standard_t(6, n) / np.sqrt(6 / 4)
        s2, r = w / (1 - a - b), np.empty(n)
        for t in range(n):
            r[t] = np.sqrt(s2) * z[t]
            s2 = w + a * r[t] ** 2 + b * s2
        out[name] = 100 * np.exp(np.cumsum(r / 100))
    frame = pd.DataFrame(out, index=pd.bdate_range("2018-01-01", periods=n, name="date"))
    frame.iloc[17, 1] = np.nan
    return frame


def _write(frame: pd.DataFrame, path) -> str:
    frame.to_csv(path, float_format="%.12g", date_format="%Y-%m-%d")
    return str(path)


def _cfg(url: str, workers: int = 1) -> Config:
    return Config(store=StoreConfig(url=url), compute=ComputeConfig(workers=workers))


def _stored_residuals(url: str) -> list[tuple]:
    with Store(url) as store, store.engine.connect() as conn:
        return conn.execute(sa.select(residuals.c.asset, residuals.c.date, residuals.c.value,
                                      residuals.c.sigma).order_by(residuals.c.asset,
                                                                  residuals.c.date)).all()


def _ingest(url: str, path: str, accept: bool = False) -> None:
    with Store(url) as store:
        ingest_sources(store, [read_file_source(path, "prices")], accept_revisions=accept)


def test_incremental_update_equals_full_and_never_rewrites_the_past(store_url, tmp_path):
    prices = _garch_prices(420, seed=1)
    cfg = _cfg(store_url)
    _ingest(store_url, _write(prices.iloc[:330], tmp_path / "a.csv"))
    first = run_update(cfg, progress=False)
    assert first.marginals.filtered == 2 and first.marginals.new_residuals > 0
    before = _stored_residuals(store_url)
    _ingest(store_url, _write(prices, tmp_path / "b.csv"))
    second = run_update(cfg, progress=False)
    assert second.marginals.recomputed == ()
    after = _stored_residuals(store_url)
    # No look-ahead: every residual stored before the new data arrived is unchanged, bit for
    # bit, and the incremental result equals a full run on a fresh store.
    assert set(before) <= set(after) and len(after) > len(before)
    fresh = str(tmp_path / "fresh.sqlite")
    fresh_url = f"sqlite:///{fresh}"
    _ingest(fresh_url, str(tmp_path / "b.csv"))
    run_update(_cfg(fresh_url), progress=False)
    assert _stored_residuals(fresh_url) == after
    # Nothing new: the update writes nothing at all.
    snap = take_snapshot(store_url)
    third = run_update(cfg, progress=False)
    assert third.marginals.filtered == 0 and take_snapshot(store_url) == snap


def test_process_pool_gives_the_same_residuals(tmp_path):
    prices = _garch_prices(330, seed=2)
    path = _write(prices, tmp_path / "p.csv")
    urls = [f"sqlite:///{tmp_path / name}.sqlite" for name in ("one", "two")]
    for url, workers in zip(urls, (1, 2), strict=True):
        _ingest(url, path)
        run_update(_cfg(url, workers=workers), progress=False)
    assert _stored_residuals(urls[0]) == _stored_residuals(urls[1])


def test_revision_recomputes_the_asset_and_keeps_earlier_residuals(tmp_path):
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    prices = _garch_prices(330, seed=3)
    _ingest(url, _write(prices, tmp_path / "p.csv"))
    run_update(_cfg(url), progress=False)
    before = {(a, d): z for a, d, z, _ in _stored_residuals(url)}
    revised = prices.copy()
    day = revised.index[300]
    revised.loc[day, "ALDER"] *= 1.02
    _ingest(url, _write(revised, tmp_path / "r.csv"), accept=True)
    summary = run_update(_cfg(url), progress=False)
    assert summary.marginals.recomputed == ("ALDER",)
    after = {(a, d): z for a, d, z, _ in _stored_residuals(url)}
    assert after.keys() == before.keys()
    for (asset, d), z in after.items():
        if asset == "BIRCH" or d < day.date():
            assert z == before[(asset, d)]  # real-time residuals never depend on later data
    assert after[("ALDER", day.date())] != before[("ALDER", day.date())]


def test_update_pulls_configured_sources_and_skips_young_assets(tmp_path):
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    prices = _garch_prices(330, seed=4)
    prices["CEDAR"] = np.nan
    prices.iloc[-40:, prices.columns.get_loc("CEDAR")] = np.linspace(10, 11, 40)
    _write(prices.iloc[:200].drop(columns="CEDAR"), tmp_path / "feed-1.csv")
    _write(prices.iloc[199:], tmp_path / "feed-2.csv")
    cfg = replace(_cfg(url), sources=(SourceConfig(path=str(tmp_path / "feed-*.csv")),))
    summary = run_update(cfg, progress=False)
    assert [r.outcome for r in summary.ingested] == ["stored", "stored"]
    assert summary.marginals.filtered == 2
    assert "CEDAR" in summary.marginals.skipped
    assert "needs 251" in summary.marginals.skipped["CEDAR"]
    with Store(url) as store:
        key = marginal_settings(cfg).key
        z = store.read_residuals(key)
        assert list(z.columns) == ["ALDER", "BIRCH"]
        fs = store.load_filtered(key, "ALDER")
        assert fs.mode == "real-time" and fs.fits[0].sample_end == prices.index[251].date()  # 251 returns
    again = run_update(cfg, progress=False)
    assert [r.outcome for r in again.ingested] == ["unchanged", "unchanged"]


def test_fit_prices_uses_data_up_to_end_only(tmp_path, capsys):
    prices = _garch_prices(420, seed=5)
    a = _write(prices, tmp_path / "a.csv")
    changed = prices.copy()
    changed.iloc[380:] *= np.exp(np.linspace(0, 0.3, 40))[:, None]
    b = _write(changed, tmp_path / "b.csv")
    outs = []
    for path in (a, b):
        code = cli.main(["fit", path, "--pair", "ALDER", "BIRCH", "--kind", "prices",
                         "--start", "2018-12-03", "--end", str(prices.index[370].date()),
                         "--json"])
        assert code == 0
        outs.append(json.loads(capsys.readouterr().out))
    # Data after --end differ, the study does not (real-time filter on data up to --end).
    assert outs[0] == outs[1]
    assert outs[0]["marginals"]["mode"] == "real-time"
    assert set(outs[0]["marginals"]["models"]) == {"ALDER", "BIRCH"}
    code = cli.main(["fit", a, "--pair", "ALDER", "BIRCH", "--kind", "prices", "--end",
                     "2018-06-01"])
    assert code == 2
    assert "the real-time filter needs 251" in capsys.readouterr().err


# ----------------------------------------------------------------------------- the daily job
# Real open series shipped inside the arch package: S&P 500 and NASDAQ Composite daily
# adjusted closes (arch.data.sp500 / arch.data.nasdaq, Yahoo! Finance, 1999-2018), here
# under the column names SP500 and NASDAQ.
DAILY_TOML = """\
[store]
url = "sqlite:///{store}"
[rolling]
window = 60
families = ["gaussian", "clayton", "frank"]
[compute]
workers = 1
"""


def _real_closes(n: int) -> pd.DataFrame:
    from arch.data import nasdaq, sp500

    frame = pd.DataFrame({"SP500": sp500.load()["Adj Close"],
                          "NASDAQ": nasdaq.load()["Adj Close"]}).iloc[:n]
    frame.index = pd.DatetimeIndex(frame.index, name="date")
    return frame


def _write_exact(frame: pd.DataFrame, path) -> str:
    """Prices with every digit of the binary64 value (the shortest repr round-trips)."""
    frame.to_csv(path, date_format="%Y-%m-%d")
    return str(path)


def _write_long_day(frame: pd.DataFrame, path) -> str:
    day = frame.index[0].strftime("%Y-%m-%d")
    lines = ["date,asset,value"] + [f"{day},{a},{float(frame.iloc[0][a])!r}" for a in frame.columns]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return str(path)


def _config(tmp_path, name: str) -> str:
    path = tmp_path / f"{name}.toml"
    path.write_text(DAILY_TOML.format(store=tmp_path / f"{name}.sqlite"), encoding="utf-8")
    return str(path)


def _main(capsys, *args) -> tuple[int, str, str]:
    code = cli.main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


def _timeline(capsys, config: str) -> pd.DataFrame:
    code, out, err = _main(capsys, "export", "timeline", "--pair", "NASDAQ", "SP500",
                           "--config", config)
    assert code == 0, err
    return pd.read_csv(io.StringIO(out))


def test_eight_one_day_files_each_add_one_window_end_and_equal_a_one_shot_run(
        tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("COMOVE_CONFIG", raising=False)
    monkeypatch.delenv("COMOVE_STORE", raising=False)
    closes = _real_closes(338)
    history, days = closes.iloc[:330], closes.iloc[330:]
    daily = _config(tmp_path, "daily")
    assert _main(capsys, "ingest", _write_exact(history, tmp_path / "history.csv"),
                 "--config", daily)[0] == 0
    code, out, err = _main(capsys, "update", "--config", daily)
    assert code == 0, err
    # 329 returns; the real-time filter's first sample takes 251 (250 and the AR lag), so 78
    # residuals and 78 - 60 + 1 = 19 window ends of the one pair.
    assert "1 of 1 pair(s) updated, 19 new window end(s)" in out
    # stderr is not a terminal under pytest: one plain line per step, with its time.
    for step, what in (("marginals", "2 assets"), ("rolling", "1 pair"), ("signals", "1 pair")):
        assert re.search(rf"^{step}: {what} in \d+\.\d s$", err, re.MULTILINE), err
    assert "\r" not in err
    ends = len(_timeline(capsys, daily))
    assert ends == 19
    for k in range(len(days)):
        one = days.iloc[[k]]
        path = (_write_exact(one, tmp_path / f"day{k}.csv") if k % 2 == 0
                else _write_long_day(one, tmp_path / f"day{k}.csv"))
        code, out, err = _main(capsys, "ingest", path, "--config", daily)
        assert code == 0, err
        assert f"stored 2 new value(s) (prices) for 2 asset(s), {one.index[0].date()}" in out
        code, out, err = _main(capsys, "update", "--config", daily)
        assert code == 0, err
        assert "1 of 1 pair(s) updated, 1 new window end(s)" in out
        timeline = _timeline(capsys, daily)
        assert len(timeline) == ends + 1 and timeline["date"].iloc[-1] == str(one.index[0].date())
        ends += 1
        # The same day's file again changes nothing.
        code, out, _ = _main(capsys, "ingest", path, "--config", daily)
        assert code == 0 and "nothing new" in out
    assert ends == 19 + 8
    # Stored log returns equal ln(P_t / P_{t-1}) computed here with numpy (to a few ulps of
    # ln P, as in tests/test_ingest.py).
    code, out, _ = _main(capsys, "export", "returns", "--config", daily)
    stored = pd.read_csv(io.StringIO(out), index_col="date")
    expected = np.log(closes.to_numpy()[1:] / closes.to_numpy()[:-1])
    np.testing.assert_allclose(stored[["SP500", "NASDAQ"]].to_numpy(), expected, rtol=0,
                               atol=1e-14)
    # One shot: the whole series in one file, one update.
    once = _config(tmp_path, "once")
    assert _main(capsys, "ingest", _write_exact(closes, tmp_path / "all.csv"),
                 "--config", once)[0] == 0
    code, out, err = _main(capsys, "update", "--config", once)
    assert code == 0 and "27 new window end(s)" in out, err
    got, want = _timeline(capsys, daily), _timeline(capsys, once)
    # Rank statistics of the same residuals are the same numbers, bit for bit.
    exact = ["date", "start", "n", "kendall_tau", "spearman_rho", "tail_lower_emp",
             "tail_upper_emp", "family", "rotation", "alert"]
    pd.testing.assert_frame_equal(got[exact], want[exact])
    # Fitted figures differ at the estimator's tolerance: a daily fit starts from the previous
    # window's estimate, the one-shot backfill from interpolated ones (as in test_rolling):
    # log-likelihoods and every statistic built on them within 1e-4; the parameters
    # themselves within 1e-3 relative, since near a flat optimum (Frank's theta around 6 on
    # 60 observations) such a step moves the log-likelihood by less than 1e-5.
    params = [c for c in want.columns if c.startswith("param")]
    model = [c for c in want.columns if c not in exact + params
             and pd.api.types.is_float_dtype(want[c])]
    assert {"tail_lower", "tail_upper", "loglik", "aic"} <= set(model)
    pd.testing.assert_frame_equal(got[model], want[model], check_exact=False, rtol=0,
                                  atol=1e-4)
    pd.testing.assert_frame_equal(got[params], want[params], check_exact=False, rtol=1e-3)


def test_update_without_a_store_or_returns_exits_2_naming_the_working_directory(
        tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("COMOVE_CONFIG", raising=False)
    monkeypatch.delenv("COMOVE_STORE", raising=False)
    code, out, err = _main(capsys, "update")
    assert (code, out) == (2, "")
    assert err.count("\n") == 1 and err.startswith("error: store sqlite:///comove-data/")
    assert f"is this the right working directory ({tmp_path})?" in err
    assert not (tmp_path / "comove-data").exists()  # no store is created by the attempt
    Store(f"sqlite:///{tmp_path / 'empty.sqlite'}").close()
    code, out, err = _main(capsys, "update", "--store", f"sqlite:///{tmp_path / 'empty.sqlite'}")
    assert (code, out) == (2, "")
    assert err == (f"error: store sqlite:///{tmp_path / 'empty.sqlite'} holds no returns: "
                   "ingest a history file first (is this the right working directory? it is "
                   f"{tmp_path})\n")


def test_update_with_too_little_history_says_how_much_each_asset_needs(tmp_path, monkeypatch,
                                                                       capsys):
    monkeypatch.delenv("COMOVE_CONFIG", raising=False)
    monkeypatch.delenv("COMOVE_STORE", raising=False)
    config = _config(tmp_path, "short")
    closes = _real_closes(300)
    closes.iloc[:10, 0] = np.nan  # SP500 starts ten days later
    assert _main(capsys, "ingest", _write_exact(closes, tmp_path / "h.csv"),
                 "--config", config)[0] == 0
    code, out, err = _main(capsys, "update", "--config", config)
    # 299 and 289 returns; a first window needs 251 for the filter + 60 = 311 (real time).
    assert code == 2
    assert "marginals (" in out and "0 of 1 pair(s) updated, 0 new window end(s)" in out
    assert err.splitlines()[-1] == (
        "error: no pair has a full window yet: NASDAQ has 299 returns, SP500 289; each needs "
        "251 (filter warm-up: 250 returns and 1 lag) + 60 (window) = 311")
    # With history enough for one pair, the update proceeds and names the short asset.
    longer = _real_closes(330)
    longer["CEDAR"] = np.nan  # an invented asset listed 40 days before the end
    longer.iloc[-40:, 2] = 10 * np.exp(np.cumsum(np.random.default_rng(7).normal(0, 0.01, 40)))
    assert _main(capsys, "ingest", _write_exact(longer.iloc[290:], tmp_path / "more.csv"),
                 "--config", config)[0] == 0
    code, out, err = _main(capsys, "update", "--config", config)
    assert code == 0, err
    # SP500 has 319 returns, 68 residuals (NASDAQ 78): 68 - 60 + 1 window ends; CEDAR is not
    # filtered yet, so it has no pairs.
    assert "1 of 1 pair(s) updated, 9 new window end(s)" in out
    assert ("  too little history for a first window yet: CEDAR 39 returns (each needs 251 "
            "(filter warm-up: 250 returns and 1 lag) + 60 (window) = 311)") in out.splitlines()


def test_step_progress_writes_plain_lines_with_elapsed_time_when_not_a_terminal():
    from monitor.common.progress import StepProgress

    times = iter([0.0, 0.5, 1.5, 2.0, 14.0, 15.0, 30.0])
    stream = io.StringIO()  # not a TTY, as a log file
    with StepProgress("rolling", 40, "pair", stream=stream, clock=lambda: next(times)) as bar:
        bar.update(2)   # 0.5 s: 5%, nothing due
        bar.update(3)   # 1.5 s: 12%, a new tenth -> a line
        bar.update(1)   # 2.0 s: 15%, same tenth, nothing
        bar.update(1)   # 14.0 s: ten seconds since the last line -> a line
        bar.update(33)  # 15.0 s: done, the closing line says it
    assert stream.getvalue().splitlines() == [
        "rolling: 5 of 40 pairs (12%), 1.5 s",
        "rolling: 7 of 40 pairs (17%), 14.0 s",
        "rolling: 40 pairs in 30.0 s",
    ]
    quiet = io.StringIO()
    with StepProgress("marginals", 3, "asset", stream=quiet, enabled=False) as bar:
        bar.update(3)
    assert quiet.getvalue() == ""


def test_fit_reads_an_exported_file_with_the_same_options_as_ingest(tmp_path, capsys):
    prices = _garch_prices(420, seed=5)
    plain = _write(prices, tmp_path / "plain.csv")
    exported = tmp_path / "export.csv"
    text = prices.to_csv(sep=";", decimal=",", float_format="%.12g", date_format="%d/%m/%Y")
    exported.write_text(text, encoding="utf-8")
    args = ["--pair", "ALDER", "BIRCH", "--kind", "prices", "--filter", "none", "--families",
            "gaussian", "frank", "--json"]
    assert cli.main(["fit", plain, *args]) == 0
    want = json.loads(capsys.readouterr().out)
    assert cli.main(["fit", str(exported), *args, "--sep", ";", "--decimal", ",",
                     "--date-format", "%d/%m/%Y"]) == 0
    assert json.loads(capsys.readouterr().out) == want
    assert cli.main(["fit", str(exported), *args]) == 2
    assert "give --sep ';'" in capsys.readouterr().err


def test_a_day_with_one_asset_closed_carries_its_pairs_and_the_next_day_updates(
        tmp_path, monkeypatch, capsys):
    # Real open series on two calendars: WTI crude (arch.data.wti, FRED spot price) trades on
    # days the equity indices do not, and the other way round. A one-day wide file with the
    # closed asset's cell blank is that asset's holiday; the universe summary then carries
    # its pairs, and an update on a recent past without any alert (no alert runs to match)
    # once failed there.
    from arch.data import wti

    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("COMOVE_CONFIG", raising=False)
    monkeypatch.delenv("COMOVE_STORE", raising=False)
    oil = wti.load().iloc[:, 0]
    oil.index = pd.DatetimeIndex(oil.index)
    closes = _real_closes(386)
    closes["WTI"] = oil.reindex(closes.index)  # blank on 1999-12-31, 2000-01-03, 2000-07-03
    history, days = closes.iloc[:370], closes.iloc[370:]
    daily = _config(tmp_path, "daily")
    assert _main(capsys, "ingest", _write_exact(history, tmp_path / "history.csv"),
                 "--config", daily)[0] == 0
    assert _main(capsys, "update", "--config", daily)[0] == 0
    blank = days[days.isna().any(axis=1)].index
    assert len(blank)  # the stretch has a day on which one asset has no price
    for k in range(len(days)):
        one = days.iloc[[k]]
        path = tmp_path / f"day{k}.csv"
        one.to_csv(path, date_format="%Y-%m-%d")
        code, out, err = _main(capsys, "ingest", str(path), "--config", daily)
        assert code == 0, err
        priced = int(one.notna().sum(axis=1).iloc[0])
        assert f"stored {priced} new value(s) (prices) for {priced} asset(s)" in out
        code, out, err = _main(capsys, "update", "--config", daily)
        assert code == 0, err
        assert "unexpected" not in err
