"""The daily job: configured sources, marginal filtering into the store, incremental = full,
no look-ahead, revisions recomputed; and `comove fit --kind prices` using data up to --end."""

from __future__ import annotations

import json
from dataclasses import replace

import numpy as np
import pandas as pd
import sqlalchemy as sa

from monitor import cli
from monitor.config import ComputeConfig, Config, SourceConfig, StoreConfig
from monitor.ingest import ingest_sources, read_file_source
from monitor.pipeline import marginal_settings, run_update
from monitor.store import Store, residuals

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
