"""A small real store for the dashboard tests: the ``tail-shift`` scenario (invented data, four
fictional indices; Gaussian copula for two years, then Clayton with the same Kendall's tau
0.35), ingested, filtered (real-time GARCH), rolled with window 120 and signals computed."""

from __future__ import annotations

from dataclasses import dataclass

import pytest

from monitor.config import ComputeConfig, Config, RollingConfig, StoreConfig
from monitor.data.ingest import ingest_sources, read_file_source
from monitor.data.store import Store
from monitor.engine.pipeline import update_marginals, update_rolling, update_signals
from monitor.views.common import StoreView
from synthetic_feeds import generate


@dataclass(frozen=True, slots=True)
class DashStore:
    cfg: Config
    url: str
    assets: tuple[str, ...]
    change_date: str  # first day of the Clayton regime (truth.json)


@pytest.fixture(scope="session")
def dash_store(tmp_path_factory) -> DashStore:
    tmp = tmp_path_factory.mktemp("dash-store")
    scen = generate("tail-shift", seed=3, calm_years=2.0, shifted_years=1.5, n_assets=4)
    path = tmp / "prices.csv"
    scen.prices.to_csv(path, float_format="%.12g", date_format="%Y-%m-%d")
    url = f"sqlite:///{tmp / 'store.sqlite'}"
    cfg = Config(store=StoreConfig(url=url), rolling=RollingConfig(window=120),
                 compute=ComputeConfig(workers=1))
    with Store(url) as store:
        ingest_sources(store, [read_file_source(path, "prices")])
        update_marginals(store, cfg, progress=False)
        update_rolling(store, cfg, progress=False)
        update_signals(store, cfg)
    change = scen.truth["change_points"][0]
    return DashStore(cfg, url, tuple(scen.prices.columns), str(change)[:10])


@pytest.fixture(scope="module")
def view(dash_store):
    """The fixture store opened under its configuration (read-only use)."""
    with Store(dash_store.url, create=False) as store:
        yield StoreView.open(dash_store.cfg, store)
