"""Tests for monitor.stats.marginals: GARCH-type marginal filtering with arch.

External references: statsmodels' ``acorr_ljungbox`` for the Ljung-Box statistic; arch's own
``fix()`` and ``simulate()`` for the variance recursion and simulated data; arch's documented
example output on ``arch.data.sp500`` (docs/check-values.md section 10, marked (mem) there); the
RiskMetrics EWMA recursion (J.P. Morgan/Reuters 1996, RiskMetrics -- Technical Document,
4th ed., section 5.3) for the fallback. Simulation tolerances are four standard errors as
reported by arch.
"""

from __future__ import annotations

import dataclasses
import json
import pickle

import numpy as np
import pandas as pd
import pytest
from arch import arch_model
from arch.data import nasdaq, sp500
from arch.univariate import GARCH, ConstantMean, StudentsT
from statsmodels.stats.diagnostic import acorr_ljungbox

from monitor.common.errors import InputError
from monitor.stats import marginals
from monitor.stats.marginals import (
    CANDIDATE_SPECS,
    EWMA_DECAY,
    FALLBACK_SPEC,
    SCALE,
    FilteredSeries,
    MarginalSettings,
    MarginalSpec,
    _filter,
    _variance_recursion,
    extend_series,
    filter_series,
    ljung_box,
    select_marginal,
)

GARCH_T = MarginalSpec("constant", "garch", "t")
# Small schedule so a few hundred days cross several refits and reselections quickly.
QUICK = MarginalSettings(refit_every=40, min_obs=250, reselect_every=3)


@pytest.fixture(scope="module")
def sp500_log_returns() -> pd.Series:
    prices = sp500.load()["Adj Close"]
    r = np.log(prices).diff().dropna()
    r.name = "INDEX"
    return r


def _simulate_garch_t(n: int, seed: int, params=(0.05, 0.05, 0.08, 0.9, 6.0)) -> pd.Series:
    """Constant-mean GARCH(1,1)-t percent returns from arch's simulator, as log returns."""
    model = ConstantMean(None, volatility=GARCH(p=1, q=1),
                         distribution=StudentsT(seed=np.random.default_rng(seed)))
    y = model.simulate(list(params), n, burn=500)["data"].to_numpy()
    dates = pd.bdate_range("2000-01-03", periods=n)
    return pd.Series(y / SCALE, index=dates, name=f"SIM{seed}")


@pytest.fixture(scope="module")
def sim700() -> pd.Series:
    return _simulate_garch_t(700, seed=11)


# ----------------------------------------------------------------------------- Ljung-Box
@pytest.mark.parametrize("lags", [1, 5, 10, 20])
@pytest.mark.parametrize("kind", ["white", "ar", "squared"])
def test_ljung_box_matches_statsmodels(kind, lags):
    rng = np.random.default_rng(lags)
    x = rng.standard_normal(800)
    if kind == "ar":
        for t in range(1, x.size):
            x[t] += 0.3 * x[t - 1]
    elif kind == "squared":
        x = x ** 2
    got = ljung_box(x, lags)
    # statsmodels 0.15, statsmodels.stats.diagnostic.acorr_ljungbox (Ljung & Box 1978, eq. 2.2)
    ref = acorr_ljungbox(x, lags=[lags], return_df=True)
    assert got.lags == lags
    assert got.statistic == pytest.approx(float(ref["lb_stat"].iloc[0]), rel=1e-10)
    assert got.pvalue == pytest.approx(float(ref["lb_pvalue"].iloc[0]), rel=1e-8, abs=1e-300)


def test_ljung_box_rejects_bad_input():
    with pytest.raises(ValueError, match="between 1 and n - 1"):
        ljung_box(np.arange(5.0), 5)
    with pytest.raises(ValueError, match="finite"):
        ljung_box([1.0, np.nan, 2.0, 3.0], 1)
    with pytest.raises(ValueError, match="constant"):
        ljung_box(np.ones(20), 2)
    with pytest.raises(TypeError, match="integer"):
        ljung_box(np.arange(20.0), 2.5)


# --------------------------------------------------------- exact constraint Jacobians
def test_constraint_jacobians_are_exact_and_scoped(sim700):
    # arch's linear constraints a x - b >= 0 get their Jacobian a inside the block only; a
    # fit with them reaches arch's own unmodified fit to optimiser tolerance (SLSQP, ftol
    # 1e-6 on the scaled objective) on simulated GARCH(1,1)-t returns, every candidate spec.
    import arch.univariate.base as arch_base

    from monitor.stats.marginals import _arch_model, _constraint_jacobians, _estimate

    a = np.array([[0.0, 1.0, -1.0], [0.5, 0.0, 2.0]])
    b = np.array([0.0, -1.0])
    built = arch_base.constraint
    with _constraint_jacobians():
        cons = arch_base.constraint(a, b)
        x = np.array([0.3, -0.2, 0.7])
        for row, val, con in zip(a, b, cons, strict=True):
            np.testing.assert_array_equal(con["jac"](x), row)
            assert con["fun"](x) == pytest.approx(row @ x - val, abs=1e-15)
    assert arch_base.constraint is built and "jac" not in built(a, b)[0]
    y = SCALE * sim700.to_numpy()
    for spec in CANDIDATE_SPECS:
        ours = _estimate(spec, y, None)
        plain = _arch_model(spec, y).fit(disp="off", show_warning=False)
        assert ours.loglik == pytest.approx(float(plain.loglikelihood), abs=2e-3), spec.key
        assert ours.loglik >= float(plain.loglikelihood) - 2e-3


# ------------------------------------------------------------ fixed-parameter recursion
@pytest.mark.parametrize("vol", ["garch", "gjr"])
def test_variance_recursion_matches_arch_fix(sp500_log_returns, vol):
    y = SCALE * sp500_log_returns.to_numpy()[:1500]
    spec = MarginalSpec("ar1", vol, "skewt")
    model = arch_model(y, mean="AR", lags=1, vol="GARCH", p=1, o=int(vol == "gjr"), q=1,
                       dist="skewt", hold_back=1, rescale=False)
    params = model.fit(disp="off").params.to_numpy()
    fixed = model.fix(params)
    named = dict(zip(spec.param_names, params, strict=True))
    eps = y[1:] - named["mu"] - named["phi"] * y[:-1]
    # arch's presample value: its GARCH.backcast of the residuals at the OLS mean (arch 8.0,
    # ARCHModel.fix); passed in so the whole path is compared, first value included
    arch_backcast = model.volatility.backcast(np.asarray(model.resids(model.starting_values())))
    ours = _variance_recursion(eps, named["omega"], named["alpha"], named.get("gamma", 0.0),
                               named["beta"], arch_backcast)
    theirs = fixed.conditional_volatility[1:] ** 2
    np.testing.assert_allclose(ours, theirs, rtol=1e-12)
    np.testing.assert_allclose(eps, fixed.resid[1:], rtol=1e-12, atol=1e-13)
    # with our own presample value (residuals at the fixed mean) the paths merge within a
    # few hundred days: the start-up effect decays like beta^t
    _, sigma2 = _filter(spec, named, y)
    np.testing.assert_allclose(sigma2[300:], theirs[300:], rtol=1e-8)


def test_real_time_residual_is_arch_fix_on_data_to_date(sim700):
    f = filter_series(sim700, QUICK)
    y = SCALE * sim700.to_numpy()
    for j in (0, len(f.residuals) // 2, len(f.residuals) - 1):
        fit = f.fits[f.fit_index[j]]
        t = int(np.searchsorted(sim700.index.values.astype("datetime64[D]"), f.dates[j]))
        assert fit.sample_end < f.dates[j].astype(object)  # fitted strictly before the day
        spec = fit.spec
        model = arch_model(y[:t + 1], mean="AR" if spec.mean == "ar1" else "Constant",
                           lags=1 if spec.mean == "ar1" else 0, vol="GARCH", p=1,
                           o=int(spec.volatility == "gjr"), q=1, dist=spec.distribution,
                           hold_back=1, rescale=False)
        # arch 8.0 ARCHModel.fix on the data up to day t with the fit's parameters; its
        # presample value differs from ours only in the mean used, negligible after 250 days
        fixed = model.fix([fit.params[k] for k in spec.param_names])
        assert f.residuals[j] == pytest.approx(fixed.std_resid[t], rel=1e-7)
        assert f.sigma[j] * SCALE == pytest.approx(fixed.conditional_volatility[t], rel=1e-7)


# ------------------------------------------------------------------------- recovery
@pytest.mark.slow
def test_recovers_simulated_garch_t():
    true = {"mu": 0.05, "omega": 0.05, "alpha": 0.08, "beta": 0.9, "nu": 6.0}
    r = _simulate_garch_t(4000, seed=2024, params=tuple(true.values()))
    fit = select_marginal(r, MarginalSettings(candidates=(GARCH_T,)))
    assert fit.converged and fit.spec == GARCH_T and not fit.fallback
    for name, value in true.items():
        # sampling error: arch's robust standard errors (Bollerslev & Wooldridge 1992)
        assert abs(fit.params[name] - value) <= 4 * fit.std_errors[name], name
    full = filter_series(r, mode="in-sample")
    # McLeod & Li (1983) via Ljung & Box (1978): no ARCH left in the squared residuals, while
    # the squared returns themselves are strongly autocorrelated
    assert full.diagnostics()[1].pvalue > 0.01
    assert ljung_box(r.to_numpy() ** 2, 10).pvalue < 1e-6
    assert full.fits[0].ljung_box_squared.pvalue > 0.01


# ----------------------------------------------------------------------- open data
def test_sp500_arch_documented_example(sp500_log_returns):
    # docs/check-values.md section 10 (arch docs example output, (mem)): Gaussian GARCH(1,1) with
    # constant mean on 100 x pct_change of sp500 'Adj Close' -- checks the data load under
    # pandas 3 (a DatetimeIndex, 5,030 returns)
    prices = sp500.load()["Adj Close"]
    assert isinstance(prices.index, pd.DatetimeIndex) and prices.index.is_monotonic_increasing
    res = arch_model(100 * prices.pct_change().dropna()).fit(disp="off")
    assert res.nobs == 5030
    expected = {"mu": 0.0564, "omega": 0.0175, "alpha[1]": 0.1022, "beta[1]": 0.8852}
    for name, value in expected.items():
        assert res.params[name] == pytest.approx(value, abs=6e-5), name
    assert res.loglikelihood == pytest.approx(-6936.72, abs=0.01)


def test_sp500_filtering_removes_volatility_clustering(sp500_log_returns):
    raw = sp500_log_returns.to_numpy()
    # McLeod & Li (1983) on raw squared returns: hugely significant
    assert ljung_box(raw ** 2, 10).pvalue < 1e-100
    ins = filter_series(sp500_log_returns, mode="in-sample")
    assert ins.mode == "in-sample" and ins.fits[0].converged
    assert ins.diagnostics()[1].pvalue > 0.01
    rt = filter_series(sp500_log_returns, refit_every=250, reselect_every=4)
    assert rt.mode == "real-time" and rt.n_fallback == 0
    assert rt.diagnostics()[1].pvalue > 0.01
    # out-of-sample residuals of a well-specified filter have about unit variance
    assert 0.9 < float(np.var(rt.residuals)) < 1.1


def test_nasdaq_in_sample_filtering_removes_volatility_clustering():
    prices = nasdaq.load()["Adj Close"]
    r = np.log(prices).diff().dropna()
    r.name = "COMPOSITE"
    # McLeod & Li (1983): strong ARCH effects in the raw squares, none left after filtering
    assert ljung_box(r.to_numpy() ** 2, 10).pvalue < 1e-100
    f = filter_series(r, mode="in-sample")
    assert f.fits[0].converged and f.diagnostics()[1].pvalue > 0.01


# ------------------------------------------------------------- real time, incremental
def _prefix_equal(short: FilteredSeries, long: FilteredSeries) -> None:
    k = len(short.residuals)
    assert np.array_equal(long.dates[:k], short.dates)
    assert np.array_equal(long.residuals[:k], short.residuals)  # bit for bit
    assert np.array_equal(long.sigma[:k], short.sigma)
    assert np.array_equal(long.fit_index[:k], short.fit_index)
    for a, b in zip(short.fits, long.fits, strict=False):
        da, db = a.to_dict(), b.to_dict()
        # the last short fit covers more days later (its first one too if it had none yet)
        for grows in ("applies_from", "applies_to", "n_applied"):
            if grows != "applies_from" or a.n_applied == 0:
                da.pop(grows), db.pop(grows)
        assert da == db


def test_appending_data_never_changes_the_past(sim700):
    full = filter_series(sim700, QUICK)
    assert [f.method for f in full.fits][:4] == ["selection", "re-estimate", "re-estimate",
                                                 "selection"]
    # cut points: inside a block, on a refit day, the day after a refit, the first fit day
    for t in (251, 290, 291, 330, 455, 600):
        _prefix_equal(filter_series(sim700.iloc[:t], QUICK), full)


def test_extend_equals_full_recomputation(sim700):
    full = filter_series(sim700, QUICK)
    state = filter_series(sim700.iloc[:285], QUICK)
    for t in range(286, 296):  # one day at a time across the refit on position 290
        state = extend_series(state, sim700.iloc[:t])
        # what the store keeps goes through JSON and back
        state = FilteredSeries.from_dict(json.loads(json.dumps(state.to_dict())))
    state = extend_series(state, sim700)  # then a long jump over several refits
    assert state.to_dict() == full.to_dict()
    assert extend_series(full, sim700) is full


def test_one_day_extension_inside_a_block_refits_nothing(sim700, monkeypatch):
    state = filter_series(sim700.iloc[:300], QUICK)
    calls = []
    monkeypatch.setattr(marginals, "_estimate", lambda *a, **k: calls.append(a))
    nxt = extend_series(state, sim700.iloc[:301])
    assert calls == [] and len(nxt.residuals) == len(state.residuals) + 1


def test_failed_re_estimation_triggers_a_reselection(sim700, monkeypatch):
    real = marginals._estimate
    seen = []

    def first_call_at_refit_1_fails(spec, y, start, **kw):
        est = real(spec, y, start, **kw)
        seen.append(y.shape[0])
        if y.shape[0] == 291 and seen.count(291) == 1:  # the re-estimate of refit 1
            return dataclasses.replace(est, problem=f"{spec.key}: forced failure")
        return est

    monkeypatch.setattr(marginals, "_estimate", first_call_at_refit_1_fails)
    f = filter_series(sim700.iloc[:400], QUICK)
    fit = f.fits[1]
    assert fit.method == "selection" and fit.converged and len(fit.candidates) == 8
    assert fit.problems[0].startswith("re-estimation failed, reselecting")
    assert [x.method for x in f.fits[2:]] == ["re-estimate", "selection"]  # 370: scheduled


def test_extend_refuses_revised_history(sim700):
    state = filter_series(sim700.iloc[:400], QUICK)
    revised = sim700.copy()
    revised.iloc[100] += 1e-4
    with pytest.raises(InputError, match="differ from those the stored residuals"):
        extend_series(state, revised)
    with pytest.raises(InputError, match="fewer than the 400"):
        extend_series(state, sim700.iloc[:399])
    assert not state.is_prefix_of(revised) and state.is_prefix_of(sim700)


def test_results_are_labelled_and_storable(sim700):
    rt = filter_series(sim700, QUICK)
    ins = filter_series(sim700, QUICK, mode="in-sample")
    assert rt.mode == "real-time" and rt.key == "real-time/refit40/min250/reselect3/all8/v2"
    assert ins.mode == "in-sample" and ins.key == "in-sample/min250/all8/v2"
    assert len(ins.residuals) == len(sim700) - 1 and len(ins.fits) == 1
    assert len(rt.residuals) == len(sim700) - 251
    assert rt.dates[0] == np.datetime64(sim700.index[251].date())
    for s in (rt, ins):
        assert MarginalSettings.from_key(s.key).key == s.key  # in-sample ignores refit fields
        assert not s.residuals.flags.writeable and not s.sigma.flags.writeable
        again = FilteredSeries.from_dict(json.loads(json.dumps(s.to_dict(), allow_nan=False)))
        assert again.to_dict() == s.to_dict()
        assert pickle.loads(pickle.dumps(s)).to_dict() == s.to_dict()
        frame = s.to_frame()
        assert list(frame.columns) == ["residual", "sigma", "fit_end"]
    frame = rt.to_frame()
    assert (frame["fit_end"] < frame.index).all()  # real time: every fit ends before its days
    # every residual date is covered by exactly the fit that says it applies there
    for i, fit in enumerate(rt.fits):
        mine = rt.dates[rt.fit_index == i]
        assert fit.n_applied == mine.size
        if mine.size:
            assert (fit.applies_from, fit.applies_to) == (mine[0].astype(object),
                                                          mine[-1].astype(object))


def test_in_sample_residuals_are_arch_residuals(sim700):
    ins = filter_series(sim700, mode="in-sample")
    fit = ins.fits[0]
    spec = fit.spec
    y = SCALE * sim700.to_numpy()
    model = arch_model(y, mean="AR" if spec.mean == "ar1" else "Constant",
                       lags=1 if spec.mean == "ar1" else 0, vol="GARCH", p=1,
                       o=int(spec.volatility == "gjr"), q=1, dist=spec.distribution,
                       hold_back=1, rescale=False)
    # arch 8.0 fix() with the selected parameters reproduces the in-sample residuals
    fixed = model.fix([fit.params[k] for k in spec.param_names])
    np.testing.assert_allclose(ins.residuals, fixed.std_resid[1:], rtol=1e-8)
    assert fit.loglik == pytest.approx(fixed.loglikelihood, rel=1e-10)
    # every candidate is reported; the selected one has the least BIC (Schwarz 1978)
    assert {c.spec for c in fit.candidates} == set(CANDIDATE_SPECS)
    assert fit.bic == min(c.bic for c in fit.candidates if c.accepted)


# --------------------------------------------------------------------------- fallback
def _explosive(n: int = 400, seed: int = 0) -> pd.Series:
    rng = np.random.default_rng(seed)
    r = rng.standard_normal(n) * np.exp(np.arange(n) / 100.0) / 1000.0
    return pd.Series(r, index=pd.bdate_range("2010-01-04", periods=n), name="EXPLODE")


def _riskmetrics(y: np.ndarray, mu: float) -> np.ndarray:
    """RiskMetrics (1996, section 5.3) EWMA variance, started at arch's presample value."""
    eps = y[1:] - mu
    s2 = np.empty_like(eps)
    w = 0.94 ** np.arange(75)
    s2[0] = float(np.sum(eps[:75] ** 2 * w / w.sum()))
    for t in range(1, eps.size):
        s2[t] = EWMA_DECAY * s2[t - 1] + (1 - EWMA_DECAY) * eps[t - 1] ** 2
    return s2


def test_fallback_is_used_and_reported_in_sample():
    r = _explosive()
    f = filter_series(r, mode="in-sample")
    fit = f.fits[0]
    assert fit.spec == FALLBACK_SPEC and fit.fallback == "ewma-0.94-t" and not fit.converged
    assert len(fit.problems) == len(CANDIDATE_SPECS) + 1
    assert all("stationarity boundary" in p or "did not converge" in p
               for p in fit.problems[:-1])
    assert "fallback" in fit.problems[-1]
    assert f.n_fallback == 1
    y = SCALE * r.to_numpy()
    assert fit.params["mu"] == pytest.approx(y[1:].mean(), rel=1e-12)
    s2 = _riskmetrics(y, fit.params["mu"])
    np.testing.assert_allclose(f.sigma * SCALE, np.sqrt(s2), rtol=1e-12)
    np.testing.assert_allclose(f.residuals, (y[1:] - fit.params["mu"]) / np.sqrt(s2),
                               rtol=1e-12)
    # Heavy-tailed innovations: nu maximises arch's own standardised Student-t likelihood
    # (arch.univariate.StudentsT) given the EWMA variance path, and the stored loglik is it.
    eps = y[1:] - fit.params["mu"]
    arch_t = StudentsT()

    def arch_loglik(nu: float) -> float:
        return float(arch_t.loglikelihood([nu], eps, s2))

    assert fit.loglik == pytest.approx(arch_loglik(fit.params["nu"]), rel=1e-10)
    grid = np.linspace(2.1, 60, 400)
    assert fit.loglik >= max(arch_loglik(nu) for nu in grid) - 1e-9
    assert fit.spec.distribution == "t" and 2.05 < fit.params["nu"] < 500


def test_near_integrated_garch_on_the_sp500_is_kept():
    # The constant-mean GARCH(1,1)-t of the S&P 500 1999-2018 (shipped in arch) converges
    # with persistence 0.99965 and an implied unconditional variance about 17 times the
    # sample variance; near-integrated GARCH is normal on long daily samples, so the fit is
    # kept: it equals arch's own fit on the same sample and is 183 nats better than the
    # EWMA fallback with normal innovations that an earlier rule substituted.
    close = sp500.load()["Adj Close"]
    r = np.log(close).diff().dropna().rename("SP500")
    spec = MarginalSpec("constant", "garch", "t")
    f = filter_series(r, mode="in-sample", candidates=(spec,))
    fit = f.fits[0]
    assert fit.spec == spec and not fit.fallback and fit.converged and f.n_fallback == 0
    assert fit.persistence == pytest.approx(0.99965, abs=5e-5)
    y = SCALE * r.to_numpy()
    direct = arch_model(y, mean="Constant", vol="GARCH", p=1, q=1, dist="t").fit(
        disp="off", first_obs=1)
    assert fit.loglik == pytest.approx(direct.loglikelihood, abs=1e-3)
    assert fit.loglik == pytest.approx(-6832.71, abs=0.05)
    params = direct.params
    ratio = params["omega"] / (1 - params["alpha[1]"] - params["beta[1]"]) / y[1:].var()
    assert ratio > 10  # the earlier rule's limit, which threw this fit away


def test_fallback_in_real_time_reselects_at_every_refit():
    r = _explosive()
    f = filter_series(r, refit_every=50)
    # Every refit of a series that fell back re-selects among all candidates. Whether a
    # candidate then lands just inside the stationarity boundary depends on where SLSQP stops
    # at rounding level (one of the three refits did so with today's numpy/scipy builds), so
    # the count of fallbacks is not pinned: each refit is either the stated EWMA fallback or a
    # converged candidate.
    assert len(f.fits) == 3 and f.fits[0].fallback == "ewma-0.94-t"
    assert all(fit.method == "selection" for fit in f.fits)
    assert all(fit.fallback == "ewma-0.94-t" or (fit.converged and not fit.fallback)
               for fit in f.fits)
    assert f.n_fallback == sum(fit.fallback == "ewma-0.94-t" for fit in f.fits) >= 2
    assert json.loads(json.dumps(f.to_dict()))["fits"][0]["fallback"] == "ewma-0.94-t"


# ------------------------------------------------------------------------- validation
def _series(values, dates=None, name="ASSET"):
    dates = pd.bdate_range("2015-01-01", periods=len(values)) if dates is None else dates
    return pd.Series(values, index=dates, name=name)


@pytest.mark.parametrize(("make", "message"), [
    (lambda r: r.where(r.index != r.index[7]), r"ASSET: missing value \(NaN\) on 2015-01-12"),
    (lambda r: r.where(r.index != r.index[3], np.inf), "non-finite value inf on 2015-01-06"),
    (lambda r: r.iloc[:200], "too short, 200 returns .* at least 251"),
    (lambda r: 100 + r.cumsum(), r"implausible daily log return 100.* not prices or percent"),
    (lambda r: _series(r.to_numpy(), r.index[::-1]), "dates out of order"),
    (lambda r: _series(r.to_numpy(), r.index.where(r.index != r.index[5], r.index[4])),
     "duplicate date 2015-01-07"),
    (lambda r: _series(np.zeros(300)), "constant over the first 251 returns"),
    (lambda r: pd.Series(r.to_numpy(), index=[f"day{i}" for i in range(len(r))], name="ASSET"),
     "index must be dates"),
])
def test_bad_input_is_refused_with_a_clear_message(make, message):
    base = _series(np.random.default_rng(3).standard_normal(300) / 100)
    with pytest.raises(InputError, match=message):
        filter_series(make(base))


def test_type_and_settings_errors():
    with pytest.raises(TypeError, match="pandas Series"):
        filter_series(np.zeros(300))
    with pytest.raises(ValueError, match="mode must be"):
        MarginalSettings(mode="hindsight")
    with pytest.raises(ValueError, match="min_obs must be an integer >= 100"):
        MarginalSettings(min_obs=50)
    with pytest.raises(ValueError, match="unknown marginal spec"):
        MarginalSpec("ar2", "garch", "t")
    s = MarginalSettings(candidates=(GARCH_T, MarginalSpec("ar1", "gjr", "skewt")))
    assert MarginalSettings.from_key(s.key) == s
    assert s.key == "real-time/refit21/min250/reselect12/constant-garch-t+ar1-gjr-skewt/v2"
    assert dataclasses.replace(s, mode="in-sample").key.startswith("in-sample/")
    with pytest.raises(ValueError, match="algorithm"):
        MarginalSettings.from_key("real-time/refit21/min250/reselect12/all8/v0")
