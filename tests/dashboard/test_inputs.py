"""The Inputs page and monitor.views.inputs: coverage counted by hand on an ingested file with
known gaps, ingest and revision history, the stored marginal models, and the residual
diagnostics checked against statsmodels and arch."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa
from arch.univariate import SkewStudent, StudentsT
from plotly.io.json import to_json_plotly
from statsmodels.stats.diagnostic import acorr_ljungbox
from statsmodels.tsa.stattools import acf

from callbacks.app import create_app
from layouts import ids
from layouts import inputs as page
from monitor.common.errors import InputError
from monitor.config import Config, StoreConfig
from monitor.data.ingest import ingest_sources, read_file_source
from monitor.data.store import Store, marginal_fits
from monitor.views.common import StoreView
from monitor.views.inputs import (
    COVERAGE_COLUMNS,
    autocorrelation,
    coverage_table,
    ingest_table,
    innovation_pit,
    ljung_box_table,
    marginal_diagnostics,
    marginal_table,
    monthly_coverage,
    parse_inputs_query,
    parse_lags,
    read_presence,
    revision_table,
    skewt_cdf,
)
from synthetic_feeds import generate

from .tree import find, registered, texts


# ------------------------------------------------------------------------ coverage by hand
def _gappy_prices() -> pd.DataFrame:
    """40 complete days of three invented assets of the tail-shift scenario, then gaps:
    A0 lacks day 25; A1 days 10-12 and 20; A2 starts on day 5, ends on day 35, lacks 15."""
    scen = generate("tail-shift", seed=5, calm_years=1.0, shifted_years=0.5, n_assets=3)
    prices = scen.prices.dropna().iloc[:40].copy()
    prices.iloc[25, 0] = np.nan
    prices.iloc[[10, 11, 12, 20], 1] = np.nan
    prices.iloc[:5, 2] = np.nan
    prices.iloc[36:, 2] = np.nan
    prices.iloc[15, 2] = np.nan
    return prices


def _store_with(tmp_path, prices: pd.DataFrame) -> tuple[str, str]:
    path = tmp_path / "prices.csv"
    prices.to_csv(path, float_format="%.12g", date_format="%Y-%m-%d")
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    with Store(url) as store:
        ingest_sources(store, [read_file_source(path, "prices")])
    return url, str(path)


def test_coverage_counts_by_hand(tmp_path):
    prices = _gappy_prices()
    days = prices.index
    a0, a1, a2 = prices.columns
    url, _ = _store_with(tmp_path, prices)
    with Store(url, create=False) as store:
        presence = read_presence(store)
    # The union calendar: every date with some return, i.e. days 1..39 (day 0 has no return).
    assert presence.index.equals(pd.DatetimeIndex(days[1:], name="date"))
    cov = coverage_table(presence).set_index("asset")
    assert list(cov.reset_index().columns) == list(COVERAGE_COLUMNS)
    # A0: returns on days 1..39 but 25 -> 38 of 39 calendar dates, one gap of one date.
    assert cov.loc[a0, ["returns", "calendar_days", "missing", "largest_gap"]].tolist() == [
        38, 39, 1, 1]
    assert cov.loc[a0, "largest_gap_from"] == days[25] == cov.loc[a0, "largest_gap_to"]
    # A1: no price on 10, 11, 12 and 20 -> no return there (the return on day 13 spans
    # days 9 to 13): 35 returns, 4 missing, longest run 3 (days 10..12).
    assert cov.loc[a1, ["returns", "calendar_days", "missing", "largest_gap"]].tolist() == [
        35, 39, 4, 3]
    assert (cov.loc[a1, "largest_gap_from"], cov.loc[a1, "largest_gap_to"]) == (days[10],
                                                                                days[12])
    assert cov.loc[a1, "missing_share"] == pytest.approx(4 / 39)
    # A2: prices on days 5..35 but 15 -> returns on days 6..35 but 15: 29 of 30 dates.
    assert cov.loc[a2, ["first", "last"]].tolist() == [days[6], days[35]]
    assert cov.loc[a2, ["returns", "calendar_days", "missing", "largest_gap"]].tolist() == [
        29, 30, 1, 1]

    monthly = monthly_coverage(presence)
    month = days.to_period("M").to_timestamp()
    for j, asset in enumerate(prices.columns):
        for m in monthly.share.index:
            inside = [i for i in range(1, 40) if month[i] == m
                      and cov.loc[asset, "first"] <= days[i] <= cov.loc[asset, "last"]]
            present = [i for i in inside if presence.iloc[i - 1, j]]
            assert monthly.possible.loc[m, asset] == len(inside)
            assert monthly.present.loc[m, asset] == len(present)
            if inside:
                assert monthly.share.loc[m, asset] == pytest.approx(len(present) / len(inside))
            else:
                assert np.isnan(monthly.share.loc[m, asset])


def test_ingest_history_revisions_and_a_refusal(tmp_path):
    prices = _gappy_prices()
    url, _ = _store_with(tmp_path, prices)
    revised = prices.copy()
    a0 = prices.columns[0]
    revised.iloc[30, 0] *= 1.01
    path = tmp_path / "revised.csv"
    revised.to_csv(path, float_format="%.12g", date_format="%Y-%m-%d")
    with Store(url) as store:
        with pytest.raises(InputError, match="differs from the stored"):
            ingest_sources(store, [read_file_source(path, "prices")])
        assert len(ingest_table(store)) == 1  # a refusal leaves no trace in the store
        ingest_sources(store, [read_file_source(path, "prices")], accept_revisions=True)
        history = ingest_table(store)
        revisions = revision_table(store)
    assert history["id"].tolist() == [2, 1]
    assert history["outcome"].tolist() == ["stored", "stored"]
    assert history.loc[0, "revised_values"] == 1 and history.loc[1, "new_values"] > 0
    assert history.loc[1, "n_assets"] == 3 and len(history.loc[1, "checksum"]) == 12
    # one price and the two log returns that use it (days 30 and 31) were revised
    assert sorted(revisions["table_name"]) == ["prices", "returns", "returns"]
    assert set(revisions["asset"]) == {a0}
    price = revisions[revisions["table_name"] == "prices"].iloc[0]
    assert price["new_value"] / price["old_value"] == pytest.approx(1.01, rel=1e-9)
    rets = revisions[revisions["table_name"] == "returns"].sort_values("date")
    assert rets["change"].to_numpy() == pytest.approx([np.log(1.01), -np.log(1.01)], abs=1e-9)
    assert (revisions["change"] == revisions["new_value"] - revisions["old_value"]).all()


def test_page_of_a_store_without_marginals(tmp_path):
    url, _ = _store_with(tmp_path, _gappy_prices())
    with Store(url, create=False) as store:
        root = page.layout(StoreView.open(Config(store=StoreConfig(url=url)), store), {})
    assert any("No asset has been filtered" in t for t in texts(root))
    assert len(find(root, ids.INPUTS_COVERAGE).data) == 3
    assert find(root, ids.INPUTS_COVERAGE_FIGURE).config["toImageButtonOptions"][
        "format"] == "png"
    assert any("No stored value has been revised." in t for t in texts(root))


def test_page_reads_the_store_once_per_fingerprint_and_follows_the_next_ingest(tmp_path):
    # Coverage, ingests, revisions and models show every user the same store: the page keeps
    # them until the store changes (a desk opening it after the morning update reads the
    # store once), and an ingest shows in the next load.
    prices = _gappy_prices()
    url, _ = _store_with(tmp_path, prices.iloc[:30])
    later = tmp_path / "later.csv"
    prices.iloc[30:].to_csv(later, float_format="%.12g", date_format="%Y-%m-%d")
    with Store(url, create=False) as store:
        view = StoreView.open(Config(store=StoreConfig(url=url)), store)
        first = page.layout(view, {})
        again = page.layout(view, {"asset": "NOPE"})
        assert find(again, ids.INPUTS_COVERAGE) is find(first, ids.INPUTS_COVERAGE)  # kept
        assert any(t.startswith("query: asset='NOPE'") for t in texts(again))
        assert len(find(first, ids.INPUTS_INGESTS).data) == 1
        ingest_sources(store, [read_file_source(later, "prices")])
        after = page.layout(view, {})
    assert len(find(after, ids.INPUTS_INGESTS).data) == 2
    coverage = pd.DataFrame(find(after, ids.INPUTS_COVERAGE).data)
    assert coverage["last"].max().startswith(f"{prices.index[-1]:%Y-%m-%d}")


# ---------------------------------------------------------------------- marginal models
def test_marginal_table_equals_what_is_stored(view):
    table = marginal_table(view.store, view.marginal_key).set_index("asset")
    assert len(table) == 4
    with view.store.engine.connect() as conn:
        for asset, row in table.iterrows():
            seqs = conn.execute(sa.select(marginal_fits.c.seq, marginal_fits.c.payload).where(
                marginal_fits.c.settings == view.marginal_key,
                marginal_fits.c.asset == asset).order_by(marginal_fits.c.seq)).all()
            latest = json.loads(seqs[-1][1])
            assert row["refits"] == len(seqs)
            assert row["spec"] == latest["spec"]
            assert row["lb_pvalue"] == latest["ljung_box"]["pvalue"]
            assert row["lb_squared_pvalue"] == latest["ljung_box_squared"]["pvalue"]
            assert row["lb_lags"] == latest["ljung_box"]["lags"] == 10
            for name, value in latest["params"].items():
                assert row[name] == value
            assert row["fallback_now"] == bool(latest["fallback"])
            assert row["mode"] == "real-time" and row["settings"] == view.marginal_key
            series = view.store.load_filtered(view.marginal_key, asset)
            assert row["residuals"] == len(series.residuals)
            assert row["fallback_fits"] == series.n_fallback
            assert row["last_residual"] == pd.Timestamp(series.dates[-1])
            used = sum(int(part.rsplit(" x", 1)[1]) for part in row["specs_used"].split(", "))
            assert used == len(seqs)


def test_diagnostics_against_statsmodels(view):
    asset = view.store.assets()[1]
    diag = marginal_diagnostics(view.store, view.marginal_key, asset, lags=15)
    z = np.asarray(diag.residuals)
    n = len(z)
    # ACF: statsmodels.tsa.stattools.acf (the Box-Jenkins estimator, adjusted=False)
    with warnings.catch_warnings():  # statsmodels 0.15 announces a new return type
        warnings.simplefilter("ignore", FutureWarning)
        reference, confint = acf(z ** 2, nlags=15, fft=False, alpha=0.05)
    assert np.allclose(diag.acf_squared, reference[1:], rtol=0, atol=1e-12)
    # the 95% band equals statsmodels' Bartlett interval at lag 1 (variance 1/n there)
    assert diag.band == pytest.approx(confint[1, 1] - reference[1], rel=1e-9)
    assert diag.band == pytest.approx(1.959963984540054 / np.sqrt(n))
    x = np.random.default_rng(4).standard_normal(700)
    assert np.allclose(autocorrelation(x, 40), acf(x, nlags=40, fft=True)[1:], atol=1e-12)
    # Ljung-Box on all filtered days: statsmodels' acorr_ljungbox (Ljung & Box 1978)
    lb = acorr_ljungbox(z, lags=[10])
    lb2 = acorr_ljungbox(z ** 2, lags=[10])
    assert diag.ljung_box.statistic == pytest.approx(float(lb["lb_stat"].iloc[0]), rel=1e-10)
    assert diag.ljung_box.pvalue == pytest.approx(float(lb["lb_pvalue"].iloc[0]), rel=1e-8)
    assert diag.ljung_box_squared.pvalue == pytest.approx(float(lb2["lb_pvalue"].iloc[0]),
                                                          rel=1e-8)
    shown = ljung_box_table(diag)
    assert shown["pvalue"].iloc[0] == diag.latest.ljung_box.pvalue  # as stored
    # QQ: sorted normal scores against N(0,1) quantiles at (i - 1/2) / n
    assert len(diag.qq_sample) == n and np.all(np.diff(diag.qq_sample) >= 0)
    assert diag.qq_theoretical[0] == pytest.approx(-diag.qq_theoretical[-1])
    assert diag.mode == "real-time" and diag.settings_key == view.marginal_key
    with pytest.raises(InputError, match="no filtered residuals"):
        marginal_diagnostics(view.store, view.marginal_key, "NOPE")


def test_innovation_distributions_against_arch(view):
    z = np.linspace(-4, 4, 161)
    for nu, lam in ((5.0, -0.3), (8.0, 0.0), (30.0, 0.45)):
        # arch.univariate.SkewStudent: Hansen's (1994) standardised skewed t
        expected = SkewStudent().cdf(z, np.array([nu, lam]))
        assert np.allclose(skewt_cdf(z, nu, lam), expected, rtol=0, atol=1e-12)
    series = view.store.load_filtered(view.marginal_key, view.store.assets()[0])
    u = innovation_pit(series)
    assert ((u > 0) & (u < 1)).all()
    for k, fit in enumerate(series.fits[:40]):
        days = np.asarray(series.fit_index) == k
        if not days.any():
            continue
        r = np.asarray(series.residuals)[days]
        dist = fit.spec.distribution
        if dist == "t":
            ref = StudentsT().cdf(r, np.array([fit.params["nu"]]))
        elif dist == "skewt":
            ref = SkewStudent().cdf(r, np.array([fit.params["nu"], fit.params["lambda"]]))
        else:
            from scipy import stats
            ref = stats.norm.cdf(r)
        assert np.allclose(u[days], ref, atol=1e-12)


# ------------------------------------------------------------------- page and callbacks
def test_query_and_lags_parsing():
    assert parse_inputs_query({}, ["A", "B"]) is None
    assert parse_inputs_query({"asset": " B "}, ["A", "B"]) == "B"
    with pytest.raises(InputError, match="asset='C' has no filtered residuals"):
        parse_inputs_query({"asset": "C"}, ["A", "B"])
    with pytest.raises(InputError, match="unknown parameter 'pair'"):
        parse_inputs_query({"pair": "A/B"}, ["A", "B"])
    assert parse_lags(20) == 20 and parse_lags("12") == 12 and parse_lags(30.0) == 30
    for bad in (None, "abc", 2.5, 4, 101, float("nan")):
        with pytest.raises(InputError, match="ACF lags"):
            parse_lags(bad)


def test_layout_and_diagnostics_callback(view, dash_store):
    assets = view.store.assets()
    root = page.layout(view, {"asset": assets[2]})
    to_json_plotly(root)  # what Dash sends must encode
    assert find(root, ids.INPUTS_ASSET).value == assets[2]
    assert len(find(root, ids.INPUTS_MARGINAL).data) == 4
    assert len(find(root, ids.INPUTS_INGESTS).data) == 1
    assert find(root, ids.INPUTS_COVERAGE).export_format == "csv"
    bad = page.layout(view, {"asset": "NOPE"})
    assert any(t.startswith("query: asset='NOPE'") for t in texts(bad))
    assert find(bad, ids.INPUTS_ASSET).value == assets[0]

    app = create_app(dash_store.cfg, store=view.store)
    callback = registered(app, ids.INPUTS_RESIDUALS)
    res, acf_fig, qq, data, columns, note = callback(assets[2], 12)
    assert len(acf_fig.data[0].x) == 12
    assert [c["id"] for c in columns] == ["sample", "series", "lags", "statistic", "pvalue"]
    assert len(data) == 4 and note.startswith(f"{assets[2]}: ")
    # issue 12: the settings in words, never the stored key
    assert "real-time mode (refit every 21 days" in note and view.marginal_key not in note
    assert "real-time marginals" in res.layout.title.text
    assert view.marginal_key not in res.layout.title.text
    assert qq.layout.xaxis.title.text == "N(0,1) quantile"
    *_, note = callback(assets[2], "many")
    assert note == "ACF lags: 'many' is not a number"
