"""Stylised facts on open data shipped inside a registry package (the daily index series of
the ``arch`` package): the marginal filter removes volatility clustering, and the dependence of
two equity indices is asymmetric -- stronger in joint falls than in joint rises (Longin &
Solnik 2001, *J. Finance* 56, "Extreme correlation of international equity markets"; Ang & Chen
2002, *J. Financial Economics* 63, "Asymmetric correlations of equity portfolios")."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor.stats.empirical import exceedance_correlation, pseudo_observations, tail_dependence
from monitor.stats.fitting import select_copula
from monitor.stats.marginals import filter_series, ljung_box


@pytest.fixture(scope="module")
def residuals():
    arch_data = pytest.importorskip("arch.data")
    from arch.data import nasdaq, sp500

    closes = pd.DataFrame({"SPX": sp500.load()["Adj Close"], "NDQ": nasdaq.load()["Adj Close"]})
    rets = np.log(closes).diff().dropna()
    assert arch_data is not None and len(rets) > 5000
    filtered = {c: filter_series(rets[c].rename(c), mode="in-sample") for c in rets}
    z = pd.DataFrame({c: pd.Series(f.residuals, index=pd.DatetimeIndex(f.dates))
                      for c, f in filtered.items()}).dropna()
    return rets, z


def test_filter_removes_volatility_clustering(residuals):
    rets, z = residuals
    for col in rets:
        # Ljung & Box (1978) on squares at 10 lags: clustering in raw returns, none left after
        # the GARCH-type filter (1% level, common practice).
        assert ljung_box(rets[col].to_numpy() ** 2, 10).pvalue < 1e-10
        assert ljung_box(z[col].to_numpy() ** 2, 10).pvalue > 0.01


def test_joint_falls_are_more_dependent_than_joint_rises(residuals):
    _, z = residuals
    x, y = z["SPX"].to_numpy(), z["NDQ"].to_numpy()
    # Exceedance correlation one standard deviation out: corr given both below -1 exceeds
    # corr given both above +1 (Longin & Solnik 2001; Ang & Chen 2002, the downside gap).
    ec = exceedance_correlation(x, y, [-1.0, 1.0])
    downside, upside = float(ec.lower[0]), float(ec.upper[1])
    assert downside > upside + 0.1, (downside, upside)
    u, v = pseudo_observations(x), pseudo_observations(y)
    # Nonparametric tail dependence at q = 5%: C_n(q,q)/q above its upper analogue.
    td = tail_dependence(u, v, 0.05)
    assert float(td.lower) > float(td.upper)
    # Among families that put the tail on one side, the lower-tail version fits better.
    sel = select_copula(u, v, families=("clayton", "gumbel", "bb1"))
    for name in ("clayton", "gumbel", "bb1"):
        a = next(f for f in sel.fits if f.family == name and f.rotation == 0)
        b = next(f for f in sel.fits if f.family == name and f.rotation == 180)
        heavier_lower = a if a.tail_lower > b.tail_lower else b
        assert heavier_lower.aic == min(a.aic, b.aic), name
