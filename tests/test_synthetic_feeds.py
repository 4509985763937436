"""Tests of the fictional-market scenario generators and their ground truth.

The generated data are checked against things outside the package: closed forms of tau and
tail coefficients (Joe 1997; Nelsen 2006; Embrechts, McNeil & Straumann 2002 - docs/check-values.md
section 1), scipy's Kendall's tau and Student-t, statsmodels' Ljung-Box test, and arch's
GARCH estimator.
"""

from __future__ import annotations

import doctest
import itertools
import json
import math

import numpy as np
import pandas as pd
import pytest
from arch import arch_model
from scipy import stats
from statsmodels.stats.diagnostic import acorr_ljungbox

import synthetic_feeds
import synthetic_feeds.scoring
from monitor.common.errors import InputError
from monitor.stats.copulas import family
from monitor.stats.empirical import pseudo_observations, tail_dependence
from synthetic_feeds import (
    SCENARIOS,
    generate,
    prices_csv_text,
    samplers,
    scenario_options,
    true_segment,
    truth_table,
    write_scenario,
)
from synthetic_feeds.marginals import MarginalModel, simulate_paths

MAIN = "marrowmere-decade"
SMALL_OPTIONS = {  # quick variants for structural checks of every scenario
    MAIN: {},
    "tail-shift": {"calm_years": 1, "shifted_years": 0.5},
    "steady-pair": {"years": 2},
    "wide-grid": {"n_assets": 7, "n_days": 300, "block_size": 3},
}


@pytest.fixture(scope="module")
def main():
    return generate(MAIN, seed=0)


@pytest.fixture(scope="module")
def small():
    return {name: generate(name, seed=3, **opts) for name, opts in SMALL_OPTIONS.items()}


def kendall_tau_se(x: np.ndarray, y: np.ndarray) -> float:
    """Standard error of the sample Kendall's tau from its U-statistic projection.

    Hoeffding (1948, *Ann. Math. Statist.* 19, 293-325): Var(tau_n) ~ 4 Var(h1) / n with
    h1(i) the mean concordance sign of point i with the others.
    """
    n = len(x)
    signs = np.sign((x[:, None] - x[None, :]) * (y[:, None] - y[None, :]))
    h1 = signs.sum(axis=1) / (n - 1)
    return 2.0 * float(np.std(h1)) / math.sqrt(n)


def regime(truth: dict, name: str) -> dict:
    return next(r for r in truth["regimes"] if r["name"] == name)


def common(frame: pd.DataFrame, a: str, b: str, reg: dict) -> pd.DataFrame:
    """Rows of the regime on which both assets have a value."""
    return frame.loc[reg["start"]:reg["end"], [a, b]].dropna()


# ----------------------------------------------------------------------------- registry
def test_registry_lists_four_scenarios_with_one_line_descriptions():
    assert set(SCENARIOS) == {MAIN, "tail-shift", "steady-pair", "wide-grid"}
    for name, text in SCENARIOS.items():
        assert name == name.lower() and " " not in name
        assert text and "\n" not in text
    assert scenario_options("tail-shift") == {
        "start": "2016-01-04", "calm_years": 4.0, "shifted_years": 2.0, "tau": 0.35,
        "n_assets": 2}


def test_package_docstring_examples_run():
    for module in (synthetic_feeds, synthetic_feeds.scenario, synthetic_feeds.scoring):
        result = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
        assert result.failed == 0 and result.attempted > 0


# -------------------------------------------------------------------------- determinism
def test_same_seed_gives_byte_identical_files_and_other_seeds_differ(tmp_path):
    first = write_scenario(MAIN, tmp_path / "a", seed=11)
    again = write_scenario(MAIN, tmp_path / "b", seed=11)
    other = write_scenario(MAIN, tmp_path / "c", seed=12)
    assert [p.name for p in first] == ["prices.csv", "truth.json"]
    for p, q in zip(first, again, strict=True):
        assert p.read_bytes() == q.read_bytes()
    assert first[0].read_bytes() != other[0].read_bytes()
    t11, t12 = (json.loads(p[1].read_text()) for p in (first, other))
    assert (t11["seed"], t12["seed"]) == (11, 12)
    # The design (regimes, pair truth) does not depend on the seed; only the draws do.
    assert t11["pairs"] == t12["pairs"]


def test_prices_csv_is_wide_with_empty_cells_and_reads_back_exactly(tmp_path, main):
    prices_path, _ = write_scenario(MAIN, tmp_path, seed=0)
    text = prices_path.read_text()
    header = text.split("\n", 1)[0]
    assert header == "date," + ",".join(main.assets)
    assert ",," in text  # an asset without a price that day leaves the cell empty
    back = pd.read_csv(prices_path, index_col="date", parse_dates=["date"])
    assert back.index.equals(main.prices.index)
    np.testing.assert_array_equal(back.to_numpy(), main.prices.to_numpy())
    assert text == prices_csv_text(main.prices)


def test_truth_json_is_marked_invented_and_has_the_documented_keys(tmp_path):
    _, truth_path = write_scenario("tail-shift", tmp_path, seed=5)
    truth = json.loads(truth_path.read_text())
    assert {"scenario", "seed", "note", "start", "end", "settings", "assets", "regimes",
            "pairs", "change_points"} <= set(truth)
    assert truth["scenario"] == "tail-shift" and truth["seed"] == 5
    assert "invented" in truth["note"].lower() and "fictional" in truth["note"].lower()
    asset = truth["assets"][0]
    assert {"name", "class", "marginal", "venue", "closed_weekdays"} <= set(asset)
    assert {"mu", "omega", "alpha", "beta", "nu"} <= set(asset["marginal"]["params"])
    for reg in truth["regimes"]:
        assert reg["description"] and reg["start"] <= reg["end"]


# ---------------------------------------------------------------------- truth structure
@pytest.mark.parametrize("name", list(SMALL_OPTIONS))
def test_every_pair_is_covered_by_segments_without_gaps_or_overlaps(small, name):
    truth = small[name].truth
    assets = [a["name"] for a in truth["assets"]]
    pairs = [tuple(p["pair"]) for p in truth["pairs"]]
    assert pairs == [(a, b) for i, a in enumerate(assets) for b in assets[i + 1:]]
    one_day = pd.offsets.BDay(1)
    for entry in truth["pairs"]:
        segs = entry["segments"]
        assert segs[0]["start"] == truth["start"] and segs[-1]["end"] == truth["end"]
        for seg, nxt in itertools.pairwise(segs):
            assert pd.Timestamp(seg["start"]) <= pd.Timestamp(seg["end"])
            # The next segment starts on the weekday right after this one ends.
            assert pd.Timestamp(nxt["start"]) == pd.Timestamp(seg["end"]) + one_day
            # Segments are maximal: neighbours differ in family, rotation or parameters.
            assert (seg["family"], seg["rotation"], seg["params"]) != (
                nxt["family"], nxt["rotation"], nxt["params"])
    starts = sorted({s["start"] for p in truth["pairs"] for s in p["segments"][1:]})
    assert truth["change_points"] == starts


def test_regimes_tile_the_master_calendar(main):
    regs = main.truth["regimes"]
    assert regs[0]["start"] == main.truth["start"] and regs[-1]["end"] == main.truth["end"]
    total = sum(r["business_days"] for r in regs)
    # Monday-to-Friday calendar: pandas' business-day range is the independent count.
    assert total == len(pd.bdate_range(main.truth["start"], main.truth["end"])) == 2500
    for r, nxt in itertools.pairwise(regs):
        assert pd.Timestamp(nxt["start"]) == pd.Timestamp(r["end"]) + pd.offsets.BDay(1)


def test_true_segment_lookup_by_date_and_in_either_order(main):
    plateau, build_up = regime(main.truth, "quiet-plateau"), regime(main.truth, "tail-build-up")
    seg = true_segment(main.truth, "MRW40", "SDR100", plateau["end"])
    assert seg["family"] == "gaussian" and seg["end"] == plateau["end"]
    seg = main.segment("SDR100", "MRW40", build_up["start"])
    assert seg["family"] == "clayton" and seg["regimes"] == ["tail-build-up"]
    table = truth_table(main.truth)
    assert len(table) == sum(len(p["segments"]) for p in main.truth["pairs"])
    with pytest.raises(InputError, match=r"pair MRW40/NOPE is not in scenario"):
        true_segment(main.truth, "MRW40", "NOPE", plateau["end"])
    with pytest.raises(InputError, match=r"date 1999-01-04 is outside scenario"):
        true_segment(main.truth, "MRW40", "SDR100", "1999-01-04")


def test_main_scenario_has_the_required_regimes(main):
    equity = [a["name"] for a in main.truth["assets"] if a["class"] == "equity_index"]
    classes = {a["class"] for a in main.truth["assets"]}
    assert classes == {"equity_index", "government_bond", "commodity", "currency"}
    assert 10 <= len(main.assets) <= 14 and len(equity) >= 3
    families = {s["family"] for p in main.truth["pairs"] for s in p["segments"]}
    assert {"gaussian", "student_t", "clayton", "gumbel", "independence"} <= families
    plateau, build_up = regime(main.truth, "quiet-plateau"), regime(main.truth, "tail-build-up")
    stress = regime(main.truth, "ostvale-debt-stress")
    for i, a in enumerate(equity):
        for b in equity[i + 1:]:
            before = true_segment(main.truth, a, b, plateau["end"])
            after = true_segment(main.truth, a, b, build_up["start"])
            # Equal tau, tails appear: rho = sin(pi tau/2) and theta = 2 tau/(1 - tau) both
            # give tau = 0.4 (Lindskog, McNeil & Schmock 2003; Joe 1997 B4).
            assert before["kendall_tau"] == pytest.approx(0.4, abs=1e-12)
            assert after["kendall_tau"] == pytest.approx(0.4, abs=1e-12)
            assert before["tail_lower"] == 0.0 and after["tail_lower"] > 0.5
            assert true_segment(main.truth, a, b, stress["start"])["tail_lower"] > 0.8
    decoupled = regime(main.truth, "ostvale-decoupling")
    seg = true_segment(main.truth, "MRW40", "OSV25", decoupled["start"])
    assert seg["family"] == "independence" and seg["kendall_tau"] == 0.0


def test_truth_tau_and_tails_match_closed_forms(small):
    # Closed forms, docs/check-values.md section 1 (Joe 1997, families B4 and B6; Nelsen 2006;
    # Lindskog, McNeil & Schmock 2003 for elliptical tau; Embrechts, McNeil & Straumann 2002
    # for the t tail); rotation 180 swaps the tails (Nelsen 2006, section 2.6).
    checked = set()
    for scenario in small.values():
        for entry in scenario.truth["pairs"]:
            for seg in entry["segments"]:
                p, fam, rot = seg["params"], seg["family"], seg["rotation"]
                if fam in ("gaussian", "student_t"):
                    tau = 2.0 / math.pi * math.asin(p["rho"])
                    if fam == "gaussian":
                        lower = upper = 0.0
                    else:
                        nu, rho = p["nu"], p["rho"]
                        lower = upper = 2.0 * stats.t.cdf(
                            -math.sqrt((nu + 1.0) * (1.0 - rho) / (1.0 + rho)), nu + 1.0)
                elif fam == "clayton":
                    tau, lower, upper = p["theta"] / (p["theta"] + 2.0), 2 ** (-1 / p["theta"]), 0
                elif fam == "gumbel":
                    tau, lower, upper = 1.0 - 1.0 / p["theta"], 0, 2.0 - 2 ** (1 / p["theta"])
                else:
                    assert fam == "independence" and p == {}
                    tau = lower = upper = 0.0
                if rot == 180:
                    lower, upper = upper, lower
                assert seg["kendall_tau"] == pytest.approx(tau, abs=1e-12)
                assert seg["tail_lower"] == pytest.approx(lower, abs=1e-9)
                assert seg["tail_upper"] == pytest.approx(upper, abs=1e-9)
                checked.add((fam, rot))
    assert {("gaussian", 0), ("student_t", 0), ("clayton", 0), ("gumbel", 180),
            ("independence", 0)} <= checked


# ---------------------------------------------------------------- prices and calendars
def test_prices_positive_and_calendars_differ_between_assets(main):
    values = main.prices.to_numpy()
    assert np.all(values[~np.isnan(values)] > 0)
    assert main.prices.notna().any(axis=1).all()  # no row without any price
    assert isinstance(main.prices.index, pd.DatetimeIndex) and main.prices.index.name == "date"
    assert (main.prices.index.day_of_week < 5).all()
    gaps = {a: frozenset(main.prices.index[main.prices[a].isna()]) for a in main.assets}
    assert len(set(gaps.values())) >= 4
    by_name = {a["name"]: a for a in main.truth["assets"]}
    for a, missing in gaps.items():
        closed = {pd.Timestamp(d) for d in by_name[a]["closed_weekdays"]}
        assert missing == closed & set(main.prices.index)
        assert by_name[a]["trading_days"] == main.prices[a].notna().sum()
    # Founders' Day, 14 March, closes the Marrowmere venue only; 2016-03-14 is a Monday
    # (Python's datetime calendar).
    assert pd.Timestamp("2016-03-14").day_of_week == 0
    day = main.prices.loc["2016-03-14"]
    assert np.isnan(day["MRW40"]) and np.isfinite(day["OSV25"]) and np.isfinite(day["TNQL"])


def test_returns_follow_the_recorded_garch_recursion(main):
    # Bollerslev (1986) / Glosten, Jagannathan & Runkle (1993) variance equation, recomputed
    # here from the returns in prices.csv with the parameters in the truth.
    returns = main.log_returns()
    for spec in main.truth["assets"]:
        name, p = spec["name"], spec["marginal"]["params"]
        r = returns[name].dropna().to_numpy()
        sigma = main.volatility[name].dropna().to_numpy()[1:]
        eps = r - p["mu"]
        var = np.empty_like(r)
        var[0] = sigma[0] ** 2
        gamma = p.get("gamma", 0.0)
        for t in range(1, len(r)):
            var[t] = (p["omega"] + (p["alpha"] + gamma * (eps[t - 1] < 0)) * eps[t - 1] ** 2
                      + p["beta"] * var[t - 1])
        np.testing.assert_allclose(np.sqrt(var), sigma, rtol=1e-6)
        z = main.innovations[name].dropna().to_numpy()[1:]
        np.testing.assert_allclose(eps / sigma, z, atol=1e-6)


def test_squared_returns_are_autocorrelated_in_every_garch_asset(main):
    # Ljung & Box (1978) on squared returns (statsmodels acorr_ljungbox): volatility
    # clustering, the ARCH effect of Engle (1982), must be significant.
    returns = main.log_returns()
    for a in main.assets:
        r = returns[a].dropna()
        p_value = acorr_ljungbox((r - r.mean()) ** 2, lags=[10])["lb_pvalue"].iloc[0]
        assert p_value < 1e-3, a


def test_arch_recovers_the_marginal_parameters_roughly():
    # arch's maximum-likelihood GJR-GARCH(1,1) with skewed t (Hansen 1994) on ~5,100 days.
    steady = generate("steady-pair", seed=2)
    spec = steady.truth["assets"][0]
    assert spec["marginal"]["volatility"] == "gjr-garch"
    p = spec["marginal"]["params"]
    r = steady.log_returns()[spec["name"]].dropna()
    fit = arch_model(r, mean="Constant", vol="GARCH", p=1, o=1, q=1, dist="skewt").fit(
        disp="off")
    est = fit.params
    assert est["beta[1]"] == pytest.approx(p["beta"], abs=0.04)
    assert est["alpha[1]"] == pytest.approx(p["alpha"], abs=0.03)
    assert est["gamma[1]"] == pytest.approx(p["gamma"], abs=0.05)
    assert est["eta"] == pytest.approx(p["nu"], abs=3.0)
    assert est["lambda"] == pytest.approx(p["lambda"], abs=0.1)
    persistence = est["alpha[1]"] + est["beta[1]"] + est["gamma[1]"] * 0.5
    assert persistence == pytest.approx(spec["marginal"]["persistence"], abs=0.02)


# ------------------------------------------------------------ data match the dependence
LONG_REGIMES = ("calm-expansion", "nervous-recovery", "quiet-plateau", "tail-build-up",
                "ostvale-decoupling", "late-calm")
CHECK_PAIRS = (("MRW40", "MRWSC"), ("MRW40", "OSV25"), ("MRW40", "MGB10"), ("CNDR", "SEDG"),
               ("SDR100", "TNQL"), ("OSV25", "OGB5"))


@pytest.mark.parametrize("kind", ["innovations", "returns"])
def test_sample_kendall_tau_matches_the_truth_within_sampling_error(main, kind):
    # scipy.stats.kendalltau against the true tau; tolerance 4.5 standard errors (Hoeffding
    # 1948 projection variance) over 36 pair-regime checks. Returns carry the GARCH scale
    # but are a monotone transform of the innovations given the past.
    frame = main.innovations if kind == "innovations" else main.log_returns()
    worst = 0.0
    for name in LONG_REGIMES:
        reg = regime(main.truth, name)
        for a, b in CHECK_PAIRS:
            d = common(frame, a, b, reg)
            assert len(d) >= 230
            est = stats.kendalltau(d[a], d[b]).statistic
            truth = true_segment(main.truth, a, b, reg["start"])["kendall_tau"]
            z = (est - truth) / kendall_tau_se(d[a].to_numpy(), d[b].to_numpy())
            worst = max(worst, abs(z))
    assert worst < 4.5


def test_independence_regime_shows_tau_near_zero(main):
    # Under independence Var(tau_n) = 2(2n + 5) / (9 n (n - 1)) (Kendall 1938, Biometrika
    # 30, 81-93); |z| < 4 for each decoupled pair.
    reg = regime(main.truth, "ostvale-decoupling")
    returns = main.log_returns()
    n_checked = 0
    for other in main.assets:
        if other in ("OSV25", "OGB5"):
            continue
        assert true_segment(main.truth, "OSV25", other, reg["start"])["family"] == "independence"
        d = common(returns, "OSV25", other, reg)
        n = len(d)
        tau = stats.kendalltau(d["OSV25"], d[other]).statistic
        assert abs(tau) < 4.0 * math.sqrt(2.0 * (2 * n + 5) / (9.0 * n * (n - 1))), other
        n_checked += 1
    assert n_checked == 10


def test_tail_shift_raises_lower_tail_dependence_at_equal_tau():
    # Empirical lambda_L(q) = C_n(q, q)/q at q = 0.1 (Schmidt & Stadtmueller 2006, via
    # monitor.stats.empirical), pooled over 8 seeds of the default tail-shift scenario. Population
    # values from the closed-form cdfs: Gaussian rho = sin(0.35 pi/2) gives 0.3381, Clayton
    # theta = 0.7/0.65 gives 0.5467 (docs/check-values.md section 4 tabulates the same quantity for
    # other parameters). The innovations carry the copula exactly; raw returns mix in the
    # GARCH scales, which dampens their unconditional tail dependence, so for returns only
    # the jump at the switch is asserted.
    q, tau = 0.1, 0.35
    rho, theta = math.sin(math.pi * tau / 2), 2 * tau / (1 - tau)
    population = {"calm": float(family("gaussian").cdf(q, q, {"rho": rho})) / q,
                  "tail-shift": float(family("clayton").cdf(q, q, {"theta": theta})) / q}
    assert population["calm"] == pytest.approx(0.3381, abs=1e-4)
    names = ("calm", "tail-shift")
    lam = {(kind, name): [] for kind in ("innovations", "returns") for name in names}
    taus = {name: [] for name in names}
    sizes = {}
    for seed in range(8):
        s = generate("tail-shift", seed=seed)
        a, b = s.assets
        frames = {"innovations": s.innovations, "returns": s.log_returns()}
        for name in names:
            reg = regime(s.truth, name)
            assert true_segment(s.truth, a, b, reg["start"])["kendall_tau"] == pytest.approx(
                tau, abs=1e-12)
            for kind, frame in frames.items():
                d = common(frame, a, b, reg)
                u = pseudo_observations(d.to_numpy().T)
                lam[kind, name].append(float(tail_dependence(u[0], u[1], q).lower))
                if kind == "returns":
                    taus[name].append(stats.kendalltau(d[a], d[b]).statistic)
                    sizes[name] = len(d)
    assert sizes["calm"] > 950 and sizes["tail-shift"] > 470
    mean = {key: float(np.mean(v)) for key, v in lam.items()}
    for name in names:
        # Binomial standard error of C_n(q, q)/q over the pooled sample (common practice).
        c = population[name] * q
        se = math.sqrt(c * (1 - c) / (sizes[name] * 8)) / q
        assert mean["innovations", name] == pytest.approx(population[name], abs=4 * se)
        assert np.mean(taus[name]) == pytest.approx(tau, abs=0.03)
    assert mean["returns", "tail-shift"] - mean["returns", "calm"] > 0.1
    assert abs(np.mean(taus["tail-shift"]) - np.mean(taus["calm"])) < 0.04


def test_steady_pair_never_changes():
    s = generate("steady-pair", seed=0)
    (entry,) = s.truth["pairs"]
    (seg,) = entry["segments"]
    assert s.truth["change_points"] == []
    assert seg["family"] == "gaussian" and seg["kendall_tau"] == pytest.approx(0.35, abs=1e-12)
    assert len(pd.bdate_range(s.truth["start"], s.truth["end"])) > 5000  # about 20 years


def test_wide_grid_default_size_and_structure():
    s = generate("wide-grid", seed=0)
    assert s.prices.shape[1] == 30 and 4900 < s.prices.shape[0] <= 5000
    assert len(s.truth["pairs"]) == 30 * 29 // 2
    families = {seg["family"] for p in s.truth["pairs"] for seg in p["segments"]}
    assert families == {"gaussian", "student_t", "independence"}


# ---------------------------------------------------------------------- the samplers
@pytest.mark.parametrize("case", [
    ("gaussian", 0, {"rho": 0.6}, lambda n, r: samplers.sample_gaussian(
        n, [[1, .6, -.3], [.6, 1, .2], [-.3, .2, 1]], r)),
    ("student_t", 0, {"rho": 0.6, "nu": 4.0}, lambda n, r: samplers.sample_student_t(
        n, [[1, .6, -.3], [.6, 1, .2], [-.3, .2, 1]], 4.0, r)),
    ("clayton", 0, {"theta": 2.0}, lambda n, r: samplers.sample_clayton(n, 4, 2.0, r)),
    ("clayton", 180, {"theta": 1.0},
     lambda n, r: samplers.survival(samplers.sample_clayton(n, 3, 1.0, r))),
    ("gumbel", 0, {"theta": 2.5}, lambda n, r: samplers.sample_gumbel(n, 4, 2.5, r)),
    ("gumbel", 180, {"theta": 1.5},
     lambda n, r: samplers.survival(samplers.sample_gumbel(n, 3, 1.5, r))),
], ids=lambda c: f"{c[0]}-{c[1]}")
def test_multivariate_samplers_have_the_stated_bivariate_margins(case):
    # Empirical joint cdf of columns 0 and 1 against the bivariate family's cdf in
    # monitor.stats.copulas (checked there against docs/check-values.md section 1 values); binomial
    # standard errors, |z| < 4.5 at 6 points.
    name, rotation, params, draw = case
    u = draw(40_000, np.random.default_rng(2024))
    assert u.min() > 0 and u.max() < 1
    pts = np.array([[.05, .05], [.1, .1], [.3, .7], [.5, .5], [.9, .9], [.95, .95]])
    theory = family(name, rotation).cdf(pts[:, 0], pts[:, 1], params)
    emp = np.array([np.mean((u[:, 0] <= a) & (u[:, 1] <= b)) for a, b in pts])
    z = (emp - theory) / np.sqrt(theory * (1 - theory) / len(u))
    assert np.abs(z).max() < 4.5
    # Every margin is uniform: Kolmogorov-Smirnov against U(0, 1) (scipy.stats.kstest).
    assert stats.kstest(u[:, -1], "uniform").pvalue > 1e-3


def test_positive_stable_has_the_stated_laplace_transform():
    # Kanter (1975): E exp(-s S) = exp(-s^alpha); Monte Carlo, 200k draws.
    alpha = 0.4
    s_draws = samplers.positive_stable(200_000, alpha, np.random.default_rng(9))
    for s in (0.5, 1.0, 2.0):
        mc = np.exp(-s * s_draws)
        assert mc.mean() == pytest.approx(math.exp(-s ** alpha), abs=4 * mc.std() / 447)


def test_innovation_quantiles_match_scipy_and_unit_variance():
    # Standardised t: t_nu quantile times sqrt((nu - 2)/nu) (scipy.stats.t); the skewed t
    # (Hansen 1994, via arch) has mean 0 and variance 1 by construction - checked by
    # Gauss-Legendre quadrature of the quantile function.
    u = np.array([0.001, 0.1, 0.5, 0.77, 0.999])
    sym = MarginalModel("garch", "student_t", mu=0, omega=0.01, alpha=0.05, beta=0.9, nu=5.0)
    np.testing.assert_allclose(sym.ppf(u), stats.t.ppf(u, 5.0) * math.sqrt(3 / 5), rtol=1e-9)
    skew = MarginalModel("gjr-garch", "skew_t", mu=0, omega=0.01, alpha=0.03, beta=0.9,
                         gamma=0.1, nu=8.0, skew=-0.2)
    nodes, weights = np.polynomial.legendre.leggauss(400)
    grid, w = 0.5 * (nodes + 1), 0.5 * weights
    z = skew.ppf(grid)
    assert np.sum(w * z) == pytest.approx(0.0, abs=2e-3)
    assert np.sum(w * z * z) == pytest.approx(1.0, abs=2e-2)
    # Negative skew puts more than half the variance below zero.
    assert skew.negative_second_moment > 0.5
    assert sym.persistence == pytest.approx(0.05 + 0.9)


def test_simulate_paths_matches_a_plain_loop():
    # The vectorised recursion against a direct loop of sigma^2_{t+1} = omega +
    # (alpha + gamma 1{eps<0}) eps^2 + beta sigma^2 (Glosten, Jagannathan & Runkle 1993).
    m = MarginalModel("gjr-garch", "student_t", mu=0.02, omega=0.03, alpha=0.04, beta=0.9,
                      gamma=0.08, nu=6.0)
    z = np.random.default_rng(1).standard_normal((50, 1))
    r, sigma = simulate_paths([m], z)
    var = m.omega / (1 - m.alpha - m.beta - m.gamma / 2)
    for t in range(50):
        assert sigma[t, 0] == pytest.approx(math.sqrt(var), rel=1e-12)
        eps = sigma[t, 0] * z[t, 0]
        assert r[t, 0] == pytest.approx(m.mu + eps, rel=1e-12)
        var = m.omega + (m.alpha + m.gamma * (eps < 0)) * eps ** 2 + m.beta * var


# ----------------------------------------------------------------------------- errors
def test_unknown_scenario_names_the_known_ones(tmp_path):
    with pytest.raises(InputError, match=r"unknown scenario 'harbour'; known: marrowmere-"):
        write_scenario("harbour", tmp_path)
    with pytest.raises(InputError, match=r"unknown scenario"):
        generate("harbour")


@pytest.mark.parametrize("kwargs, message", [
    ({"seed": -1}, r"seed must be a non-negative integer, got -1"),
    ({"seed": 1.5}, r"seed must be a non-negative integer"),
    ({"colour": "red"}, r"scenario 'tail-shift' has no option 'colour'; options: start"),
    ({"tau": 1.2}, r"scenario 'tail-shift': option tau must lie in \(0.0, 0.95\)"),
    ({"n_assets": 9}, r"option n_assets must be an integer in \[2, 5\]"),
    ({"start": "someday"}, r"option start must be a date YYYY-MM-DD"),
    ({"calm_years": 0.01}, r"option calm_years must be at least one month"),
])
def test_bad_options_raise_input_error(kwargs, message):
    with pytest.raises(InputError, match=message):
        generate("tail-shift", **kwargs)


def test_unusable_output_directory_raises_input_error(tmp_path):
    blocker = tmp_path / "file.txt"
    blocker.write_text("not a directory")
    with pytest.raises(InputError, match=r"output directory .*file.txt: exists and is not a"):
        write_scenario("steady-pair", blocker, years=1)
    with pytest.raises(InputError, match=r"output directory .*file.txt/sub: cannot write"):
        write_scenario("steady-pair", blocker / "sub", years=1)
    nested = tmp_path / "new" / "deeper"
    prices, truth = write_scenario("steady-pair", nested, years=1)
    assert prices.exists() and truth.exists()
    assert sorted(p.name for p in nested.iterdir()) == ["prices.csv", "truth.json"]


# ----------------------------------------------------------------------------- scoring
def test_episodes_are_scored_against_the_truth_by_hand():
    # A worked example (invented truth): a lower tail rises at the start of 2021 and falls
    # at the start of 2022; a 10-business-day lag extends each segment.
    from synthetic_feeds.scoring import score_episodes
    truth = {"end": "2022-12-30", "pairs": [
        {"pair": ["A", "B"], "segments": [
            {"start": "2020-01-01", "end": "2020-12-31", "tail_lower": 0.0, "tail_upper": 0.0},
            {"start": "2021-01-01", "end": "2021-12-31", "tail_lower": 0.5, "tail_upper": 0.0},
            {"start": "2022-01-03", "end": "2022-12-30", "tail_lower": 0.0, "tail_upper": 0.05},
        ]},
        {"pair": ["A", "C"], "segments": [
            {"start": "2020-01-01", "end": "2020-12-31", "tail_lower": 0.0, "tail_upper": 0.0},
            {"start": "2021-01-01", "end": "2022-12-30", "tail_lower": 0.7, "tail_upper": 0.0},
        ]}]}
    eps = {("A", "B"): [
        {"tail": "lower", "start": "2021-06-01", "end": "2021-07-01"},   # in the rise: true
        {"tail": "lower", "start": "2023-01-20", "end": None},           # open, after all lags
        {"tail": "upper", "start": "2022-02-01", "end": "2022-03-01"},   # upper moved 0.05 only
        {"tail": "lower", "start": "2022-01-12", "end": "2022-01-20"},   # in the fall: true
    ]}
    s = score_episodes(truth, eps, lag_days=10, last_day="2023-02-01")
    assert s.episodes["true"].tolist() == [True, False, False, True]
    assert s.precision == 0.5
    # Only the scored pair's rises count (A/C has no episodes list): one rise, detected.
    assert s.rises[["pair", "tail", "after"]].values.tolist() == [["A/B", "lower", 0.5]]
    assert s.recall == 1.0
    # The lag: an episode starting 9 business days after the fall's segment ends is true.
    late = score_episodes(truth, {("A", "B"): [
        {"tail": "lower", "start": "2023-01-12", "end": "2023-01-20"}]}, lag_days=10)
    assert late.precision == 1.0
