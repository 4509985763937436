"""Tests for monitor.stats.empirical: rank correlations, empirical copula, tail and exceedance measures.

Reference values come from scipy.stats, from docs/check-values.md (sections 3, 4 and 7,
each recomputed there from the published formulas) and from closed forms. Simulation
tolerances are about four standard errors of the estimator at the sample size used; the
standard error is stated beside each check.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from monitor.stats.copulas import family
from monitor.stats.empirical import (
    conditional_correlation,
    empirical_copula,
    exceedance_correlation,
    kendall_tau,
    pseudo_observations,
    spearman_rho,
    tail_dependence,
    tail_dependence_cfg,
    tail_dependence_plateau,
    tail_dependence_rank,
)

# docs/check-values.md section 3, "Deterministic toy data".
TOY_X = np.array([1.2, -0.5, 0.3, 2.1, -1.7, 0.9, -0.2, 1.5])
TOY_Y = np.array([0.8, -1.1, 0.5, 1.9, -0.4, 0.1, -0.9, 2.2])


def _scipy_tau(x, y):
    pairs = zip(x, y, strict=True)
    return np.array([stats.kendalltau(a, b, variant="b").statistic for a, b in pairs])


def _scipy_rho(x, y):
    return np.array([stats.spearmanr(a, b).statistic for a, b in zip(x, y, strict=True)])


def _gumbel_sample(n: int, theta: float, rng: np.random.Generator) -> np.ndarray:
    """Gumbel copula by the Marshall & Olkin (1988, JASA 83, 834-841) frailty construction.

    The frailty V is positive stable with Laplace transform exp(-t^(1/theta)), drawn by
    Kanter's (1975, Ann. Probab. 3, 697-707) representation; then U_j = exp(-(E_j/V)^(1/theta))
    with E_j standard exponential. Independent of monitor.stats.copulas on purpose.
    """
    alpha = 1.0 / theta
    angle = rng.uniform(0.0, np.pi, n)
    w = rng.exponential(size=n)
    frailty = (np.sin(alpha * angle) / np.sin(angle) ** (1.0 / alpha)
               * (np.sin((1.0 - alpha) * angle) / w) ** ((1.0 - alpha) / alpha))
    e = rng.exponential(size=(n, 2))
    return np.exp(-((e / frailty[:, None]) ** alpha))


@pytest.fixture(scope="module")
def gaussian_large():
    # Bivariate normal, rho = 0.5, n = 200,000 (numpy's multivariate normal sampler).
    rng = np.random.default_rng(20240601)
    return rng.multivariate_normal([0.0, 0.0], [[1.0, 0.5], [0.5, 1.0]], size=200_000).T


@pytest.fixture(scope="module")
def clayton_large():
    return family("clayton").sample(200_000, (2.0,), rng=20240602).T


@pytest.fixture(scope="module")
def gumbel_large():
    return _gumbel_sample(200_000, 2.0, np.random.default_rng(20240603)).T


# ---------------------------------------------------------------------------------- toy data
def test_toy_ranks_and_rank_correlations():
    u = pseudo_observations(TOY_X)
    v = pseudo_observations(TOY_Y)
    # docs/check-values.md section 3: ranks x -> [6,2,4,8,1,5,3,7], y -> [6,1,5,7,3,4,2,8].
    np.testing.assert_array_equal(u * 9, [6, 2, 4, 8, 1, 5, 3, 7])
    np.testing.assert_array_equal(v * 9, [6, 1, 5, 7, 3, 4, 2, 8])
    # docs/check-values.md section 3: tau = 0.714286 (= 20/28), rho_S = 0.880952 (= 74/84).
    assert kendall_tau(TOY_X, TOY_Y) == pytest.approx(0.714286, abs=5e-7)
    assert kendall_tau(TOY_X, TOY_Y) == pytest.approx(20 / 28, abs=1e-15)
    assert spearman_rho(TOY_X, TOY_Y) == pytest.approx(0.880952, abs=5e-7)


def test_toy_empirical_copula():
    u = pseudo_observations(TOY_X)
    v = pseudo_observations(TOY_Y)
    # docs/check-values.md section 3: C_n(.5,.5) = 0.375, C_n(.25,.25) = 0.125, C_n(.75,.5) = 0.5.
    got = empirical_copula(u, v, [0.5, 0.25, 0.75], [0.5, 0.25, 0.5])
    np.testing.assert_allclose(got, [0.375, 0.125, 0.5], atol=1e-15)
    assert empirical_copula(u, v, 0.5, 0.5) == pytest.approx(0.375, abs=1e-15)


# ---------------------------------------------------------------------------------- ranks
def test_pseudo_observations_match_scipy_rankdata_with_ties():
    rng = np.random.default_rng(1)
    x = rng.integers(0, 6, size=(7, 40)).astype(float)
    # scipy.stats.rankdata(method="average") along each row, divided by n + 1.
    expected = stats.rankdata(x, method="average", axis=-1) / 41
    np.testing.assert_allclose(pseudo_observations(x), expected, rtol=0, atol=1e-15)
    np.testing.assert_allclose(pseudo_observations(x.T, axis=0), expected.T, rtol=0, atol=1e-15)


def test_pseudo_observations_rejects_nan():
    with pytest.raises(ValueError, match="contains NaN"):
        pseudo_observations([0.1, np.nan, 0.3])
    with pytest.raises(ValueError, match="got a scalar"):
        pseudo_observations(1.0)


# ---------------------------------------------------------------------------------- kendall
@pytest.mark.parametrize("n", [2, 3, 8, 31, 250, 1000])
@pytest.mark.parametrize("levels", [None, 3, 12])
def test_kendall_tau_matches_scipy(n, levels):
    rng = np.random.default_rng(n)
    x = rng.normal(size=(20, n))
    y = 0.6 * x + rng.normal(size=(20, n))
    if levels is not None:
        # Heavy ties in x, in y and jointly.
        x = np.floor(levels * stats.norm.cdf(x))
        y = np.floor(levels * stats.norm.cdf(y / 1.2))
    # scipy.stats.kendalltau, variant "b" (tau-b, Kendall 1945).
    expected = _scipy_tau(x, y)
    got = kendall_tau(x, y)
    assert got.shape == (20,)
    np.testing.assert_array_equal(np.isnan(got), np.isnan(expected))
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-12, equal_nan=True)


def test_kendall_tau_batched_equals_row_by_row_and_broadcasts():
    rng = np.random.default_rng(2)
    x = rng.normal(size=(3, 4, 60))
    y = x + rng.normal(size=(3, 4, 60))
    batched = kendall_tau(x, y)
    rows = np.array([[float(kendall_tau(x[i, j], y[i, j])) for j in range(4)] for i in range(3)])
    np.testing.assert_array_equal(batched, rows)
    # One x shared by every window of y; scipy.stats.kendalltau row by row as reference.
    shared = kendall_tau(x[0, 0], y[0])
    np.testing.assert_allclose(shared, _scipy_tau(np.broadcast_to(x[0, 0], y[0].shape), y[0]),
                               atol=1e-12)


def test_kendall_tau_large_sample_matches_scipy():
    rng = np.random.default_rng(3)
    x = rng.normal(size=100_000)
    y = np.round(x + rng.normal(size=100_000), 1)
    # scipy.stats.kendalltau (also O(n log n)), variant "b".
    assert float(kendall_tau(x, y)) == pytest.approx(stats.kendalltau(x, y).statistic, abs=1e-12)


def test_kendall_tau_degenerate_and_invalid_input():
    # A constant sample leaves tau-b undefined: 0/0 (scipy also returns NaN).
    assert np.isnan(kendall_tau([1.0, 1.0, 1.0], [1.0, 2.0, 3.0]))
    # Perfect concordance and discordance: tau = 1 and -1 (Kendall 1938 definition).
    assert kendall_tau([1, 2, 3, 4], [2, 5, 7, 9]) == 1.0
    assert kendall_tau([1, 2, 3, 4], [9, 7, 5, 2]) == -1.0
    with pytest.raises(ValueError, match="at least 2 observations"):
        kendall_tau([1.0], [2.0])
    with pytest.raises(ValueError, match="same sample length"):
        kendall_tau([1.0, 2.0, 3.0], [1.0, 2.0])
    with pytest.raises(ValueError, match="y contains NaN"):
        kendall_tau([1.0, 2.0, 3.0], [1.0, np.nan, 2.0])
    with pytest.raises(TypeError, match="real numbers"):
        kendall_tau(["a", "b"], [1, 2])


# ---------------------------------------------------------------------------------- spearman
@pytest.mark.parametrize("levels", [None, 4])
def test_spearman_rho_matches_scipy(levels):
    rng = np.random.default_rng(4)
    x = rng.normal(size=(30, 120))
    y = -0.4 * x + rng.normal(size=(30, 120))
    if levels is not None:
        x, y = np.floor(levels * stats.norm.cdf(x)), np.floor(levels * stats.norm.cdf(y))
    # scipy.stats.spearmanr: Pearson correlation of average ranks.
    np.testing.assert_allclose(spearman_rho(x, y), _scipy_rho(x, y), rtol=0, atol=1e-12)
    rows = np.array([float(spearman_rho(a, b)) for a, b in zip(x, y, strict=True)])
    np.testing.assert_array_equal(spearman_rho(x, y), rows)


def test_spearman_rho_constant_is_nan():
    # Zero rank variance: the Pearson correlation of ranks is 0/0 (scipy returns NaN too).
    assert np.isnan(spearman_rho([2.0, 2.0, 2.0], [1.0, 2.0, 3.0]))


# ---------------------------------------------------------------------------------- properties
_tied = st.lists(st.integers(-4, 4), min_size=2, max_size=60)
_pairs = st.integers(2, 60).flatmap(
    lambda n: st.tuples(
        st.lists(st.integers(-5, 5), min_size=n, max_size=n),
        st.lists(st.floats(-1e3, 1e3, allow_nan=False), min_size=n, max_size=n),
    )
)


@settings(max_examples=80, deadline=None)
@given(_pairs)
def test_property_kendall_tau_bounds_and_agreement_with_scipy(pair):
    x, y = map(np.asarray, pair)
    tau = float(kendall_tau(x, y))
    # scipy.stats.kendalltau variant "b" on the same (heavily tied) data.
    expected = stats.kendalltau(x, y).statistic
    if np.isnan(expected):
        assert np.isnan(tau)
    else:
        assert -1.0 <= tau <= 1.0
        assert tau == pytest.approx(expected, abs=1e-12)


@settings(max_examples=60, deadline=None)
@given(_pairs)
def test_property_rank_measures_invariant_under_increasing_maps(pair):
    x, y = (np.asarray(a, dtype=float) for a in pair)
    tau, rho = kendall_tau(x, y), spearman_rho(x, y)
    # Rank statistics are invariant under strictly increasing transforms of either margin
    # (Nelsen 2006, Theorem 5.1.8 (from memory)); exp of small integers and scaling by a
    # power of two stay strictly increasing in floating point.
    np.testing.assert_allclose(kendall_tau(np.exp(x), 8.0 * y), tau, atol=1e-12)
    np.testing.assert_allclose(spearman_rho(np.exp(x), 8.0 * y), rho, atol=1e-12)
    # A strictly decreasing transform of one margin flips the sign (Nelsen 2006, Theorem
    # 5.1.9 (from memory)).
    np.testing.assert_allclose(kendall_tau(-x, y), -tau, atol=1e-12)
    np.testing.assert_allclose(spearman_rho(x, -y), -rho, atol=1e-12)
    # Both are symmetric in their arguments.
    np.testing.assert_allclose(kendall_tau(y, x), tau, atol=1e-12)


@settings(max_examples=40, deadline=None)
@given(_tied)
def test_property_pseudo_observations_match_rankdata(values):
    x = np.asarray(values, dtype=float)
    # scipy.stats.rankdata(method="average") / (n + 1).
    expected = stats.rankdata(x, method="average") / (len(x) + 1)
    np.testing.assert_allclose(pseudo_observations(x), expected, atol=1e-15)


# ---------------------------------------------------------------------------------- copula
def test_empirical_copula_batched_against_definition():
    rng = np.random.default_rng(5)
    u = pseudo_observations(rng.normal(size=(40, 600)))
    v = pseudo_observations(rng.normal(size=(40, 600)))
    # Evaluating at the sample points, 40 * 600 * 600 comparisons, exceeds one block.
    got = empirical_copula(u, v, u, v)
    # Definition (Deheuvels 1979): C_n(a, b) = n^-1 sum 1{U_i <= a, V_i <= b}.
    expected = np.mean((u[:, None, :] <= u[:, :, None]) & (v[:, None, :] <= v[:, :, None]),
                       axis=-1)
    np.testing.assert_array_equal(got, expected)
    # Points shared by all windows broadcast to (windows, m).
    shared = empirical_copula(u, v, [0.2, 0.9], [0.3, 0.9])
    assert shared.shape == (40, 2)
    np.testing.assert_array_equal(shared[7], empirical_copula(u[7], v[7], [0.2, 0.9],
                                                              [0.3, 0.9]))


def test_empirical_copula_margins_and_bounds():
    rng = np.random.default_rng(6)
    n = 50
    u = pseudo_observations(rng.normal(size=n))
    v = pseudo_observations(rng.normal(size=n))
    a = np.arange(1, n + 1) / (n + 1)
    # Margins of C_n on untied pseudo-observations: C_n(i/(n+1), 1) = i/n.
    np.testing.assert_allclose(empirical_copula(u, v, a, 1.0), np.arange(1, n + 1) / n)
    # Frechet-Hoeffding bounds hold for C_n up to 1/n (Nelsen 2006, Thm 2.2.3 (from memory)).
    c = empirical_copula(u, v, a, a[::-1])
    assert np.all(c <= np.minimum(a, a[::-1]) + 1.0 / n)
    assert np.all(c >= np.maximum(a + a[::-1] - 1.0, 0.0) - 1.0 / n)
    with pytest.raises(ValueError, match=r"u must lie in \[0, 1\]"):
        empirical_copula(u * 2, v, 0.5, 0.5)
    with pytest.raises(ValueError, match="at_v contains NaN"):
        empirical_copula(u, v, 0.5, np.nan)


# ---------------------------------------------------------------------------------- tails
def _poisson_sd(lam: float, n: int, q: float) -> float:
    # Joint exceedance count ~ Poisson(n * q * lam): sd of count / (n q) is sqrt(lam / (n q)).
    return float(np.sqrt(lam / (n * q)))


@pytest.mark.parametrize(("q", "population"), [(0.10, 0.3240), (0.05, 0.2438), (0.01, 0.1294)])
def test_tail_dependence_gaussian_population_values(gaussian_large, q, population):
    x, y = gaussian_large
    n = x.size
    res = tail_dependence(pseudo_observations(x), pseudo_observations(y), q)
    # docs/check-values.md section 4, population C(q,q)/q for the Gaussian copula rho = 0.5 at
    # q = .10/.05/.01; by radial symmetry the upper value is the same. Tolerance 4 sd.
    tol = 4.0 * _poisson_sd(population, n, q)
    assert float(res.lower) == pytest.approx(population, abs=tol)
    assert float(res.upper) == pytest.approx(population, abs=tol)
    assert float(res.q) == q


def test_tail_dependence_batched_and_q_broadcast(gaussian_large):
    x, y = gaussian_large
    u = pseudo_observations(x[:5000].reshape(20, 250))
    v = pseudo_observations(y[:5000].reshape(20, 250))
    qs = np.array([0.05, 0.1])[:, None]
    res = tail_dependence(u, v, qs)
    assert res.lower.shape == (2, 20)
    single = tail_dependence(u[3], v[3], 0.1)
    assert res.lower[1, 3] == single.lower and res.upper[1, 3] == single.upper
    # The estimator as printed in docs/check-values.md section 4, computed directly.
    q = 0.05
    c_low = np.mean((u[3] <= q) & (v[3] <= q))
    c_up = np.mean((u[3] <= 1 - q) & (v[3] <= 1 - q))
    assert res.lower[0, 3] == pytest.approx(c_low / q, abs=1e-14)
    assert res.upper[0, 3] == pytest.approx((1 - 2 * (1 - q) + c_up) / q, abs=1e-12)
    with pytest.raises(ValueError, match=r"q must lie in \(0, 1\)"):
        tail_dependence(u, v, 0.0)


def test_tail_dependence_clayton_lower_tail(clayton_large):
    x, y = clayton_large
    n = x.size
    # docs/check-values.md section 1/4: Clayton(2) lambda_L = 2^(-1/2) = 0.7071, lambda_U = 0;
    # population C(q,q)/q at q = .01 is .7071 (section 4 table).
    emp = tail_dependence(pseudo_observations(x), pseudo_observations(y), 0.01)
    assert float(emp.lower) == pytest.approx(0.7071, abs=4 * _poisson_sd(0.7071, n, 0.01))
    # docs/check-values.md section 4 simulated row for Clayton(2), n = 200,000: upper emp q=.01 is
    # .0310, i.e. the finite-q estimate of a tail-independent copula is small but positive.
    assert 0.0 < float(emp.upper) < 0.06
    ss = tail_dependence_rank(x, y)
    # Schmidt & Stadtmuller (2006) rank form with k = floor(sqrt(n)) = 447 (docs/check-values.md
    # section 4: k ~ sqrt(n) (from memory); simulated .7159 / .0067). The joint count given k
    # marginal extremes is about Binomial(k, lambda): sd sqrt(lambda (1 - lambda) / k) = .022.
    assert ss.k == 447 and ss.n == n
    assert float(ss.lower) == pytest.approx(0.7071, abs=4 * np.sqrt(0.7071 * 0.2929 / 447))
    assert float(ss.upper) < 0.03


def test_tail_dependence_rank_against_definition():
    rng = np.random.default_rng(7)
    x = rng.normal(size=(6, 300))
    y = x + rng.normal(size=(6, 300))
    res = tail_dependence_rank(x, y, k=30)
    r = stats.rankdata(x, axis=-1)
    s = stats.rankdata(y, axis=-1)
    # Schmidt & Stadtmuller (2006), rank form as in docs/check-values.md section 4.
    np.testing.assert_allclose(res.lower, np.sum((r <= 30) & (s <= 30), axis=-1) / 30)
    np.testing.assert_allclose(res.upper, np.sum((r > 270) & (s > 270), axis=-1) / 30)
    with pytest.raises(ValueError, match=r"k must lie in \[1, n\]"):
        tail_dependence_rank(x, y, k=0)


def _plateau_reference(x, y, tail):
    """Slow, literal plateau rule of Frahm, Junker & Schmidt (2005) (rule from memory)."""
    n = len(x)
    r, s = stats.rankdata(x), stats.rankdata(y)
    if tail == "lower":
        raw = [np.sum((r <= k) & (s <= k)) / k for k in range(1, n + 1)]
    else:
        raw = [np.sum((r > n - k) & (s > n - k)) / k for k in range(1, n + 1)]
    b = int(0.005 * n)
    smooth = [np.mean(raw[j:j + 2 * b + 1]) for j in range(n - 2 * b)]
    m = int(np.sqrt(n - 2 * b))
    sigma = np.std(smooth)
    for j in range(n - 2 * b - m + 1):
        if sum(abs(smooth[j + i] - smooth[j]) for i in range(1, m)) <= 2 * sigma:
            return np.mean(smooth[j:j + m])
    return 0.0


def test_tail_dependence_plateau_against_literal_rule():
    rng = np.random.default_rng(8)
    uv = family("clayton").sample(3 * 400, (1.5,), rng=rng).reshape(3, 400, 2)
    x, y = uv[..., 0], uv[..., 1]
    res = tail_dependence_plateau(x, y)
    assert res.bandwidth == 2 and res.length == int(np.sqrt(396))
    for i in range(3):
        assert res.lower[i] == pytest.approx(_plateau_reference(x[i], y[i], "lower"), abs=1e-12)
        assert res.upper[i] == pytest.approx(_plateau_reference(x[i], y[i], "upper"), abs=1e-12)
    assert np.all(res.found_lower) and np.all(res.k_lower > 0)


def test_tail_dependence_plateau_clayton():
    x, y = family("clayton").sample(20_000, (2.0,), rng=20240604).T
    res = tail_dependence_plateau(x, y)
    # docs/check-values.md section 4: Clayton(2) lambda_L = 0.7071; plateau rule (Frahm, Junker &
    # Schmidt 2005, from memory) with b = floor(0.005 n) = 100 and m = floor(sqrt(n - 2b)).
    # Over 20 replications here at n = 20,000 the estimate had sd 0.017; tolerance 4 sd.
    assert (res.bandwidth, res.length) == (100, 140)
    assert bool(res.found_lower)
    assert float(res.lower) == pytest.approx(0.7071, abs=0.07)
    with pytest.raises(ValueError, match="length must be an integer"):
        tail_dependence_plateau(x[:100], y[:100], length=1)


def test_tail_dependence_cfg_gumbel_and_clayton_pitfall(gumbel_large, clayton_large):
    gx, gy = gumbel_large
    # Self-check of the frailty sampler: Gumbel tau = 1 - 1/theta = 0.5 (docs/check-values.md s.1);
    # sd of tau_n at n = 200,000 is about 0.001.
    assert float(kendall_tau(gx, gy)) == pytest.approx(0.5, abs=0.005)
    cfg = tail_dependence_cfg(gx, gy)
    # docs/check-values.md section 4: Gumbel(2) lambda_U = 2 - 2^(1/2) = 0.5858; simulated CFG at
    # n = 200,000 gave .5863. Over 8 replications here the sd was 0.0009; tolerance ~5 sd.
    assert float(cfg.upper) == pytest.approx(0.5858, abs=0.005)
    cx, cy = clayton_large
    clayton_cfg = tail_dependence_cfg(cx, cy)
    # The pitfall (docs/check-values.md section 4; Frahm, Junker & Schmidt 2005): Clayton is not an
    # extreme-value copula, lambda_U = 0, yet CFG reports about 0.4971 (sd 0.0009 here),
    # while the rank estimator correctly stays near 0.
    assert float(clayton_cfg.upper) == pytest.approx(0.4971, abs=0.005)
    assert float(tail_dependence_rank(cx, cy).upper) < 0.03


def test_tail_dependence_cfg_boundary_cases():
    rng = np.random.default_rng(9)
    x = rng.normal(size=(4, 500))
    # Comonotone data: A(1/2) = 1/2 exactly, so lambda = 2 - 2 * 1/2 = 1 (Pickands 1981).
    res = tail_dependence_cfg(x, np.exp(x))
    np.testing.assert_allclose(res.upper, 1.0, atol=1e-12)
    np.testing.assert_allclose(res.lower, 1.0, atol=1e-12)
    # Independence: A = 1 so lambda = 0; the CFG estimator's sd at n = 20,000 is well below
    # 0.01 (its variance is O(1/n)).
    big = rng.normal(size=(2, 20_000))
    assert abs(float(tail_dependence_cfg(big[0], big[1]).upper)) < 0.03


def test_tail_results_are_read_only():
    rng = np.random.default_rng(10)
    x, y = rng.normal(size=(2, 3, 100))
    res = tail_dependence_rank(x, y, k=10)
    with pytest.raises(dataclasses.FrozenInstanceError):
        res.k = 3  # type: ignore[misc]
    with pytest.raises(ValueError, match="read-only"):
        res.lower[0] = 0.5


# ---------------------------------------------------------------------------------- exceedance
def _corr_sd(rho: float, count: int) -> float:
    # Large-sample sd of a Pearson correlation, (1 - rho^2) / sqrt(m) (Fisher 1915).
    return (1.0 - rho * rho) / np.sqrt(count)


@pytest.fixture(scope="module")
def gaussian_million():
    rng = np.random.default_rng(20240605)
    return rng.multivariate_normal([0.0, 0.0], [[1.0, 0.5], [0.5, 1.0]], size=1_000_000).T


def test_exceedance_correlation_gaussian_benchmark(gaussian_million):
    x, y = gaussian_million
    xi = np.array([0.0, 0.5, 1.0])
    benchmark = np.array([0.2687, 0.2200, 0.1789])
    up = exceedance_correlation(x, y, xi)
    down = exceedance_correlation(x, y, -xi)
    # docs/check-values.md section 7, Gaussian benchmark rho = 0.5 (Longin & Solnik 2001
    # definition): rho+(xi) at xi = 0, 0.5, 1; by symmetry rho-(-xi) is the same.
    for i, target in enumerate(benchmark):
        assert up.upper[i] == pytest.approx(target, abs=4 * _corr_sd(target, up.count_upper[i]))
        assert down.lower[i] == pytest.approx(target, abs=4 * _corr_sd(target,
                                                                       down.count_lower[i]))
    assert np.all(up.count_upper > 30_000) and np.all(up.reason_upper == "")
    # The same threshold on quantile levels: X, Y above their medians is xi = 0.
    quant = exceedance_correlation(x, y, 0.5, scale="quantile")
    assert float(quant.upper) == pytest.approx(0.2687, abs=4 * _corr_sd(0.2687,
                                                                      int(quant.count_upper)))


def test_exceedance_correlation_exact_symmetry_and_batching():
    rng = np.random.default_rng(11)
    x = rng.standard_t(4, size=(25, 250))
    y = 0.5 * x + rng.standard_t(4, size=(25, 250))
    xi = np.array([-1.0, 0.0, 0.5])[:, None]
    res = exceedance_correlation(x, y, xi, min_count=5)
    mirrored = exceedance_correlation(-x, -y, -xi, min_count=5)
    # Negating both series maps {X > xi, Y > xi} onto {X < -xi, Y < -xi}: rho-(-xi) of the
    # negated data equals rho+(xi) (Longin & Solnik 2001 definition).
    np.testing.assert_allclose(mirrored.lower, res.upper, atol=1e-12, equal_nan=True)
    np.testing.assert_array_equal(mirrored.count_lower, res.count_upper)
    assert res.upper.shape == (3, 25)
    # Row by row against numpy's Pearson correlation on the standardised exceedance region.
    z = (x - x.mean(-1, keepdims=True)) / x.std(-1, ddof=1, keepdims=True)
    w = (y - y.mean(-1, keepdims=True)) / y.std(-1, ddof=1, keepdims=True)
    for j in (0, 9, 24):
        keep = (z[j] > 0.5) & (w[j] > 0.5)
        assert res.upper[2, j] == pytest.approx(np.corrcoef(x[j, keep], y[j, keep])[0, 1],
                                                abs=1e-12)
        assert res.count_upper[2, j] == keep.sum()
    # On already standardised data the "data" scale applies the same thresholds.
    as_given = exceedance_correlation(z, w, xi, scale="data", min_count=5)
    np.testing.assert_allclose(as_given.upper, res.upper, atol=1e-12, equal_nan=True)


def test_exceedance_correlation_too_few_points_and_errors():
    rng = np.random.default_rng(12)
    x, y = rng.normal(size=(2, 2, 100))
    res = exceedance_correlation(x, y, 2.5)
    assert np.all(np.isnan(res.upper))
    assert np.all(res.reason_upper == "fewer than 10 observations in the region")
    flat = exceedance_correlation(np.ones(50), rng.normal(size=50), 0.0)
    assert np.isnan(flat.upper) and str(flat.reason_upper) == "x or y is constant in the window"
    with pytest.raises(ValueError, match="scale must be one of"):
        exceedance_correlation(x, y, 0.0, scale="sigma")
    with pytest.raises(ValueError, match=r"quantile levels xi must lie in \(0, 1\)"):
        exceedance_correlation(x, y, 1.5, scale="quantile")
    with pytest.raises(ValueError, match="min_count must be at least 3"):
        exceedance_correlation(x, y, 0.0, min_count=2)


def test_conditional_correlation_boyer_gibson_loretan(gaussian_million):
    x, y = gaussian_million
    c = stats.norm.ppf(0.75)  # 0.6745
    outer = conditional_correlation(x, y, np.abs(x) > c)
    inner = conditional_correlation(x, y, np.abs(x) < c)
    # docs/check-values.md section 7, conditioning bias (Boyer, Gibson & Loretan): for rho = 0.5,
    # corr(X, Y | |X| > 0.6745) = 0.6184 and corr(X, Y | |X| < 0.6745) = 0.2131.
    assert float(outer.correlation) == pytest.approx(
        0.6184, abs=4 * _corr_sd(0.6184, int(outer.count)))
    assert float(inner.correlation) == pytest.approx(
        0.2131, abs=4 * _corr_sd(0.2131, int(inner.count)))
    with pytest.raises(TypeError, match="boolean mask"):
        conditional_correlation(x, y, np.ones(x.size))
