"""Gaussian and Student-t copulas against outside references.

References used below:
- scipy.stats.multivariate_normal / multivariate_t (cdf and pdf of the bivariate distributions);
- statsmodels.distributions.copula.api GaussianCopula / StudentTCopula (used only here, as an
  outside reference);
- docs/check-values.md, section 1 (closed forms and the check values at (0.3, 0.7)) and
  section 4 (population values of C(q, q)/q);
- Sklar (1959): joint density = copula density x marginal densities;
- McNeil, Frey & Embrechts (2005), *Quantitative Risk Management*, Table 5.2 (t-copula tail
  coefficients; the table number and its 2-dp print are from memory, the 4-dp values were
  recomputed in docs/check-values.md from the closed form).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, special, stats
from statsmodels.distributions.copula.api import GaussianCopula, StudentTCopula

from monitor.stats.copulas import CopulaFamily, family
from monitor.stats.copulas.elliptical import NU_START

GAUSS = family("gaussian")
T = family("student_t")

POINTS = np.array([[0.3, 0.7], [0.1, 0.2], [0.5, 0.5], [0.9, 0.15], [0.02, 0.97], [0.8, 0.85],
                   [0.4, 0.40001], [1e-6, 0.5]])
RHOS = [-0.9, -0.5, -0.1, 0.0, 0.3, 0.5, 0.95]
T_PARAMS = [(0.5, 4.0), (-0.7, 3.0), (0.9, 10.0), (0.2, 2.0), (-0.3, 25.0), (0.999, 60.0)]


def _corr(rho):
    return [[1.0, rho], [rho, 1.0]]


# ------------------------------------------------------------------ outside libraries
@pytest.mark.parametrize("rho", RHOS + [-0.999, 0.999])
def test_gaussian_cdf_matches_scipy_multivariate_normal(rho):
    # C(u, v) = Phi_2(Phi^-1(u), Phi^-1(v); rho); reference scipy.stats.multivariate_normal.cdf
    # (Genz's algorithm) run at a tight tolerance.
    u, v = POINTS[:, 0], POINTS[:, 1]
    ref = [stats.multivariate_normal.cdf(special.ndtri([a, b]), cov=_corr(rho), abseps=1e-12,
                                         releps=1e-12) for a, b in POINTS]
    np.testing.assert_allclose(GAUSS.cdf(u, v, (rho,)), ref, atol=1e-9)


@pytest.mark.parametrize("rho", RHOS)
def test_gaussian_against_statsmodels(rho):
    # statsmodels GaussianCopula: cdf (via multivariate_normal at its default abseps 1e-5),
    # logpdf and tau = (2/pi) arcsin(rho).
    ref = GaussianCopula(corr=rho)
    u, v = POINTS[:, 0], POINTS[:, 1]
    np.testing.assert_allclose(GAUSS.cdf(u, v, (rho,)), ref.cdf(POINTS), atol=1e-5)
    np.testing.assert_allclose(GAUSS.logpdf(u, v, (rho,)), ref.logpdf(POINTS), rtol=1e-10,
                               atol=1e-10)
    assert float(GAUSS.kendall_tau((rho,))) == pytest.approx(ref.tau(), abs=1e-14)


@pytest.mark.parametrize(("rho", "nu"), T_PARAMS)
def test_student_t_against_statsmodels(rho, nu):
    # statsmodels StudentTCopula: logpdf, tau and the tail coefficient (it cites Joe 2014
    # p. 182); its cdf is not implemented, so the cdf is checked against scipy below.
    ref = StudentTCopula(corr=rho, df=nu)
    u, v = POINTS[:, 0], POINTS[:, 1]
    np.testing.assert_allclose(T.logpdf(u, v, (rho, nu)), ref.logpdf(POINTS), rtol=1e-10,
                               atol=1e-10)
    assert float(T.kendall_tau((rho, nu))) == pytest.approx(ref.tau(), abs=1e-14)
    lam_lower, lam_upper = ref.dependence_tail()
    assert float(T.tail_lower((rho, nu))) == pytest.approx(lam_lower, abs=1e-12)
    assert float(T.tail_upper((rho, nu))) == pytest.approx(lam_upper, abs=1e-12)


@pytest.mark.parametrize(("rho", "nu", "u", "v"), [
    (0.5, 4.0, 0.3, 0.7), (-0.7, 3.0, 0.2, 0.6), (0.9, 10.0, 0.05, 0.08), (0.5, 2.5, 0.9, 0.95),
])
def test_student_t_cdf_matches_scipy_multivariate_t(rho, nu, u, v):
    # scipy.stats.multivariate_t.cdf (Genz's randomised QMC); with maxpts = 1e6 and a fixed
    # seed its own error is a few 1e-8.
    x = special.stdtrit(nu, [u, v])
    ref = stats.multivariate_t.cdf(x, shape=_corr(rho), df=nu, maxpts=10**6, random_state=2)
    assert float(T.cdf(u, v, (rho, nu))) == pytest.approx(ref, abs=1e-7)


def _t_cdf_by_quad(u, v, rho, nu):
    """C(u, v) = int_{-inf}^{y} f_nu(s) P(X <= x | Y = s) ds by adaptive quadrature, with the
    conditional law X | Y = s ~ rho s + sqrt((nu + s^2)(1 - rho^2)/(nu + 1)) t_{nu+1}
    (docs/check-values.md section 1, h-function of the t copula)."""
    x, y = stats.t.ppf([u, v], nu)

    def integrand(s):
        scale = np.sqrt((nu + s * s) * (1 - rho * rho) / (nu + 1))
        return stats.t.pdf(s, nu) * stats.t.cdf((x - rho * s) / scale, nu + 1)

    breaks = [b for b in ([x / rho] if rho else []) if b < y] + [y]
    total, lo = 0.0, -np.inf
    for b in breaks:
        total += integrate.quad(integrand, lo, b, epsabs=1e-13, epsrel=1e-12, limit=400)[0]
        lo = b
    return total


@pytest.mark.parametrize(("rho", "nu"), T_PARAMS + [(-0.999, 2.0)])
def test_student_t_cdf_matches_adaptive_quadrature(rho, nu):
    # Independent route to the same number at tight tolerance: scipy.integrate.quad of the
    # conditional distribution (the brief's accuracy target is 1e-7 absolute).
    for u, v in POINTS[[0, 1, 3, 4, 6]]:
        assert float(T.cdf(u, v, (rho, nu))) == pytest.approx(
            _t_cdf_by_quad(u, v, rho, nu), abs=1e-9)


@pytest.mark.parametrize("rho", [-0.8, 0.0, 0.5, 0.99])
def test_gaussian_sklar_identity(rho):
    # Sklar (1959): the bivariate normal density factorises as
    # phi_2(x, y; rho) = c(Phi(x), Phi(y)) phi(x) phi(y) (scipy.stats.multivariate_normal.pdf).
    xy = np.array([[-1.2, 0.4], [0.0, 0.0], [2.1, 1.7], [-0.3, -2.5], [3.0, -3.0]])
    joint = stats.multivariate_normal.pdf(xy, cov=_corr(rho))
    u, v = special.ndtr(xy[:, 0]), special.ndtr(xy[:, 1])
    rhs = GAUSS.pdf(u, v, (rho,)) * stats.norm.pdf(xy[:, 0]) * stats.norm.pdf(xy[:, 1])
    np.testing.assert_allclose(rhs, joint, rtol=1e-10)


@pytest.mark.parametrize(("rho", "nu"), [(0.5, 4.0), (-0.6, 7.5)])
def test_student_t_sklar_identity(rho, nu):
    # Sklar (1959) with scipy.stats.multivariate_t.pdf and t_nu margins.
    xy = np.array([[-1.2, 0.4], [0.0, 0.0], [2.1, 1.7], [-0.3, -2.5], [6.0, -6.0]])
    joint = stats.multivariate_t.pdf(xy, shape=_corr(rho), df=nu)
    u, v = stats.t.cdf(xy[:, 0], nu), stats.t.cdf(xy[:, 1], nu)
    rhs = T.pdf(u, v, (rho, nu)) * stats.t.pdf(xy[:, 0], nu) * stats.t.pdf(xy[:, 1], nu)
    np.testing.assert_allclose(rhs, joint, rtol=1e-9)


# ------------------------------------------------------------------ published check values
@pytest.mark.parametrize(("fam", "params", "expected"), [
    # docs/check-values.md section 1, check values at (0.3, 0.7): C, h_{1|2}, c, tau, rho_S, lambda.
    (GAUSS, (0.5,), (0.266904, 0.181863, 0.877082, 1 / 3, 0.482584, 0.0)),
    # rho_S of the t copula is marked "(num)" there: numerical, no closed form.
    (T, (0.5, 4.0), (0.261428, 0.168985, 0.831762, 1 / 3, 0.469020, 0.253170)),
], ids=["gauss", "t"])
def test_check_values_at_point(fam, params, expected):
    c, h, dens, tau, rho_s, lam = expected
    assert float(fam.cdf(0.3, 0.7, params)) == pytest.approx(c, abs=5e-7)
    assert float(fam.h_u_given_v(0.3, 0.7, params)) == pytest.approx(h, abs=5e-7)
    assert float(fam.pdf(0.3, 0.7, params)) == pytest.approx(dens, abs=5e-7)
    assert float(fam.kendall_tau(params)) == pytest.approx(tau, abs=1e-12)
    assert float(fam.spearman_rho(params)) == pytest.approx(rho_s, abs=5e-7)
    assert float(fam.tail_lower(params)) == pytest.approx(lam, abs=5e-7)
    assert float(fam.tail_upper(params)) == pytest.approx(lam, abs=5e-7)


@pytest.mark.parametrize(("fam", "params", "expected"), [
    # docs/check-values.md section 4, population C(q, q)/q at q = 0.10, 0.05, 0.01 (exact values).
    (GAUSS, (0.5,), (0.3240, 0.2438, 0.1294)),
    (T, (0.5, 4.0), (0.3842, 0.3387, 0.2877)),
], ids=["gauss", "t"])
def test_diagonal_ratio_population_values(fam, params, expected):
    q = np.array([0.10, 0.05, 0.01])
    np.testing.assert_allclose(fam.cdf(q, q, params) / q, expected, atol=5e-5)


# McNeil, Frey & Embrechts (2005), Quantitative Risk Management, Table 5.2 (from memory: table
# number and 2-dp print); 4-dp values recomputed in docs/check-values.md from
# 2 t_{nu+1}(-sqrt((nu+1)(1-rho)/(1+rho))).
TAIL_TABLE = {
    2.0: (0.0577, 0.1817, 0.3910, 0.7177),
    4.0: (0.0117, 0.0756, 0.2532, 0.6298),
    10.0: (0.0001, 0.0069, 0.0819, 0.4627),
}


@pytest.mark.parametrize("nu", sorted(TAIL_TABLE))
def test_student_t_tail_table(nu):
    rho = np.array([-0.5, 0.0, 0.5, 0.9])
    np.testing.assert_allclose(T.tail_lower((rho, nu)), TAIL_TABLE[nu], atol=5e-5)
    np.testing.assert_allclose(T.tail_upper((rho, nu)), TAIL_TABLE[nu], atol=5e-5)
    # Column rho = 1 of the table: lambda -> 1 as rho -> 1.
    assert float(T.tail_lower((1 - 1e-12, nu))) == pytest.approx(1.0, abs=1e-5)


def test_student_t_tail_vanishes_as_nu_grows():
    # Row nu = infinity of the same table (McNeil, Frey & Embrechts 2005, Table 5.2, from
    # memory): the Gaussian limit has no tail dependence.
    rho = np.array([-0.5, 0.0, 0.5, 0.9])
    np.testing.assert_allclose(T.tail_lower((rho, 1e6)), 0.0, atol=5e-5)
    np.testing.assert_allclose(GAUSS.tail_lower((rho,)), 0.0)
    np.testing.assert_allclose(GAUSS.tail_upper((rho,)), 0.0)


# ------------------------------------------------------------------ Spearman's rho
@pytest.mark.parametrize("rho", [-0.9, -0.3, 0.2, 0.5, 0.95])
def test_gaussian_spearman_closed_form_matches_quadrature(rho):
    # rho_S = (6/pi) arcsin(rho/2) (docs/check-values.md section 1) against the base class's
    # 12 int int C - 3 (Nelsen 2006, eq. 5.1.15c) by 200 x 200 Gauss-Legendre quadrature.
    closed = float(GAUSS.spearman_rho((rho,)))
    assert closed == pytest.approx(6 / np.pi * np.arcsin(rho / 2), abs=1e-15)
    quad = float(CopulaFamily._spearman_rho(GAUSS, GAUSS.as_params((rho,))))
    assert quad == pytest.approx(closed, abs=1e-6)


@pytest.mark.parametrize(("rho", "nu"), [(0.5, 4.0), (-0.8, 2.0), (0.9, 30.0)])
def test_student_t_spearman_matches_quadrature(rho, nu):
    # The t family's mixture formula against 12 int int C - 3 (Nelsen 2006, eq. 5.1.15c).
    fast = float(T.spearman_rho((rho, nu)))
    quad = float(CopulaFamily._spearman_rho(T, T.as_params((rho, nu))))
    assert fast == pytest.approx(quad, abs=1e-6)
    # Heavier tails than the Gaussian lower rho_S at the same rho (Gaussian limit nu -> inf).
    assert abs(fast) < abs(float(GAUSS.spearman_rho((rho,))))
    assert float(T.spearman_rho((rho, 1e7))) == pytest.approx(
        float(GAUSS.spearman_rho((rho,))), abs=1e-5)


# ------------------------------------------------------------------ sampling
def _tau_standard_error(fam, params, uv, tau):
    # n Var(tau_n) -> Var(8C(U,V) - 4U - 4V + 2 - 2 tau), the U-statistic projection of
    # Kendall's tau (docs/check-values.md section 3; Hoeffding 1948).
    u, v = uv[:, 0], uv[:, 1]
    infl = 8 * fam.cdf(u, v, params) - 4 * u - 4 * v + 2 - 2 * tau
    return float(np.std(infl) / np.sqrt(len(u)))


@pytest.mark.parametrize(("fam", "params"), [
    (GAUSS, (0.6,)), (GAUSS, (-0.4,)), (T, (0.5, 4.0)), (T, (-0.7, 3.0)),
], ids=["gauss+", "gauss-", "t+", "t-"])
def test_sampled_tau_and_rho_close_to_implied(fam, params):
    n = 20_000
    uv = fam.sample(n, params, rng=np.random.default_rng(20240601))
    assert uv.shape == (n, 2)
    assert np.all((uv > 0) & (uv < 1))
    # Uniform margins: Kolmogorov-Smirnov test (scipy.stats.kstest) at level 1e-3.
    assert stats.kstest(uv[:, 0], "uniform").pvalue > 1e-3
    assert stats.kstest(uv[:, 1], "uniform").pvalue > 1e-3
    tau = float(fam.kendall_tau(params))
    tau_hat = stats.kendalltau(uv[:, 0], uv[:, 1]).statistic
    assert tau_hat == pytest.approx(tau, abs=4 * _tau_standard_error(fam, params, uv, tau))
    # Spearman's rho: standard error of the full-sample estimate from 20 batch estimates
    # (batch means; the variance of rho_S-hat scales as 1/n).
    rho_s = float(fam.spearman_rho(params))
    rho_hat = stats.spearmanr(uv[:, 0], uv[:, 1]).statistic
    batches = [stats.spearmanr(b[:, 0], b[:, 1]).statistic for b in np.split(uv, 20)]
    se = np.std(batches, ddof=1) / np.sqrt(20)
    assert rho_hat == pytest.approx(rho_s, abs=4 * se)


def test_student_t_sample_has_tail_dependence():
    # Joint exceedances below q = 0.01 against C(q, q) (docs/check-values.md section 4: 0.2877 q for
    # t(0.5, 4)), binomial standard error; the Gaussian at the same rho has 0.1294 q.
    n, q = 200_000, 0.01
    uv = T.sample(n, (0.5, 4.0), rng=np.random.default_rng(5))
    p_joint = float(T.cdf(q, q, (0.5, 4.0)))
    hits = np.mean((uv[:, 0] < q) & (uv[:, 1] < q))
    assert hits == pytest.approx(p_joint, abs=4 * np.sqrt(p_joint / n))
    assert p_joint / q == pytest.approx(0.2877, abs=5e-5)


# ------------------------------------------------------------------ h-functions
EXTREME = np.array([1e-10, 1e-6, 0.3, 0.5, 0.7, 1 - 1e-6, 1 - 1e-10])
EXTREME_CASES = [
    (GAUSS, (0.999,)), (GAUSS, (-0.999,)), (GAUSS, (0.3,)),
    (T, (0.999, 2.0)), (T, (-0.999, 2.0)), (T, (0.999, 60.0)), (T, (-0.999, 60.0)),
    (T, (0.4, 7.0)),
]
EXTREME_IDS = ["gauss.999", "gauss-.999", "gauss.3", "t.999-2", "t-.999-2", "t.999-60",
               "t-.999-60", "t.4-7"]


@pytest.mark.parametrize(("fam", "params"), EXTREME_CASES, ids=EXTREME_IDS)
def test_h_inverse_round_trips(fam, params):
    # h(h^-1(w | v) | v) = w, both conditioning directions, including w and v within 1e-10 of
    # the ends (closed forms: Gaussian Phi(rho y + sqrt(1-rho^2) Phi^-1(w)); t through the
    # t_{nu+1} quantile). Near u = 1 a double resolves u only to eps = 2.2e-16, and
    # dh_{1|2}/du = c(u, v), so the attainable accuracy in w is about c(u, v) eps (16 eps
    # allows for the quantile functions' own rounding).
    w, v = np.meshgrid(EXTREME, EXTREME, indexing="ij")
    eps = np.finfo(float).eps
    u = fam.h_u_given_v_inverse(w, v, params)
    assert np.all((u > 0) & (u < 1))
    err = np.abs(fam.h_u_given_v(u, v, params) - w)
    assert np.all(err <= 1e-9 + 16 * eps * fam.pdf(u, v, params))
    v2 = fam.h_v_given_u_inverse(w, v, params)
    assert np.all((v2 > 0) & (v2 < 1))
    err = np.abs(fam.h_v_given_u(v, v2, params) - w)
    assert np.all(err <= 1e-9 + 16 * eps * fam.pdf(v, v2, params))
    # The other direction, h^-1(h(u | v) | v) = u, where h(u | v) is not within 1e-6 of 0 or 1
    # (closer to the ends a double no longer resolves w well enough to recover u).
    mid = np.linspace(0.05, 0.95, 7)
    a, b = np.meshgrid(mid, mid, indexing="ij")
    hw = fam.h_u_given_v(a, b, params)
    keep = (hw > 1e-6) & (hw < 1 - 1e-6)
    back = fam.h_u_given_v_inverse(hw[keep], b[keep], params)
    np.testing.assert_allclose(back, a[keep], atol=1e-9)


@pytest.mark.parametrize(("fam", "params"), [(GAUSS, (0.5,)), (T, (0.5, 4.0)), (T, (-0.6, 2.5))],
                         ids=["gauss", "t", "t-neg"])
def test_h_is_partial_derivative_of_cdf(fam, params):
    # h_{1|2}(u|v) = dC/dv (Nelsen 2006, Thm 2.2.7), central differences of the cdf.
    u, v = np.meshgrid([0.1, 0.4, 0.8], [0.2, 0.5, 0.9], indexing="ij")
    e = 1e-5
    dcdv = (fam.cdf(u, v + e, params) - fam.cdf(u, v - e, params)) / (2 * e)
    np.testing.assert_allclose(fam.h_u_given_v(u, v, params), dcdv, atol=1e-7)


# ------------------------------------------------------------------ stability and shapes
@pytest.mark.parametrize(("fam", "params"), EXTREME_CASES, ids=EXTREME_IDS)
def test_extreme_inputs_are_finite(fam, params):
    u, v = np.meshgrid(EXTREME, EXTREME, indexing="ij")
    logc = fam.logpdf(u, v, params)
    assert np.all(np.isfinite(logc))
    for h in (fam.h_u_given_v(u, v, params), fam.h_v_given_u(u, v, params)):
        assert np.all(np.isfinite(h)) and np.all((h >= 0) & (h <= 1))
    c = fam.cdf(u, v, params)
    # Frechet-Hoeffding bounds (Nelsen 2006, Thm 2.2.3).
    assert np.all(c >= np.maximum(u + v - 1, 0) - 1e-12)
    assert np.all(c <= np.minimum(u, v) + 1e-12)


def test_logpdf_finite_over_the_t_fit_box():
    # nu over the whole fit box [2, 60] and rho = +-0.999, at u, v in {1e-10, 1 - 1e-10}.
    nu = np.linspace(2.0, 60.0, 30)[:, None, None]
    rho = np.array([-0.999, 0.999])[None, :, None]
    corners = np.array([1e-10, 1 - 1e-10])
    u, v = np.meshgrid(corners, corners, indexing="ij")
    logc = T.logpdf(u.ravel(), v.ravel(), (rho, nu))
    assert logc.shape == (30, 2, 4)
    assert np.all(np.isfinite(logc))


@pytest.mark.parametrize(("fam", "params"), [(GAUSS, (0.5,)), (T, (0.5, 4.0))],
                         ids=["gauss", "t"])
def test_parameters_broadcast_over_windows(fam, params):
    # Parameters of shape (windows, 1) against data of shape (windows, n): each row equals the
    # scalar evaluation at that row's parameters.
    rng = np.random.default_rng(3)
    u = rng.uniform(0.01, 0.99, size=(4, 6))
    v = rng.uniform(0.01, 0.99, size=(4, 6))
    rho = np.array([-0.8, -0.2, 0.4, 0.9])[:, None]
    pw = (rho,) + tuple(np.full((4, 1), x) for x in params[1:])
    for method in ("cdf", "logpdf", "h_u_given_v", "h_v_given_u"):
        batched = getattr(fam, method)(u, v, pw)
        rows = [getattr(fam, method)(u[i], v[i], (rho[i, 0],) + params[1:]) for i in range(4)]
        np.testing.assert_allclose(batched, np.array(rows), rtol=1e-12, atol=1e-15)
    flat = (rho[:, 0],) + tuple(np.full(4, x) for x in params[1:])
    for method in ("kendall_tau", "spearman_rho", "tail_lower"):
        batched = getattr(fam, method)(flat)
        rows = [float(getattr(fam, method)((rho[i, 0],) + params[1:])) for i in range(4)]
        np.testing.assert_allclose(batched, rows, rtol=1e-12, atol=1e-15)


# ------------------------------------------------------------------ tau inversion and errors
def test_params_from_tau():
    # rho = sin(pi tau / 2) inverts tau = (2/pi) arcsin(rho) (docs/check-values.md section 3 table:
    # tau = 0.5 gives 0.707107).
    assert float(GAUSS.params_from_tau(0.5)[0]) == pytest.approx(0.707107, abs=5e-7)
    rho, nu = T.params_from_tau(np.array([-0.5, 0.5]))
    np.testing.assert_allclose(rho, [-0.707107, 0.707107], atol=5e-7)
    # tau does not identify nu: the documented fixed starting value is used.
    np.testing.assert_array_equal(nu, [NU_START, NU_START])
    rho, nu = T.start_params(0.999)
    lo, hi = T.fit_bounds[1]
    assert lo <= float(nu) <= hi and float(nu) == NU_START
    assert abs(float(rho)) <= 0.999


def test_input_errors():
    with pytest.raises(ValueError, match=r"rho=1.0 is outside \(-1.0, 1.0\)"):
        GAUSS.cdf(0.5, 0.5, (1.0,))
    with pytest.raises(ValueError, match=r"nu=0.0 is outside \(0.0, inf\)"):
        T.logpdf(0.5, 0.5, (0.5, 0.0))
    with pytest.raises(ValueError, match="does not support rotation 180"):
        family("student_t", 180)
    with pytest.raises(ValueError, match="takes 1 parameter"):
        GAUSS.logpdf(0.5, 0.5, (0.5, 4.0))


def test_estimator_fast_paths_equal_the_density():
    # The estimator's prepared likelihoods (Gaussian: three sums per window; Student-t:
    # quantiles interpolated in 1/nu on the rank grid) must equal the sum of the log-density
    # computed with scipy.special.stdtrit / ndtri directly.
    from monitor.stats.copulas import family as get
    from monitor.stats.empirical import pseudo_observations

    rng = np.random.default_rng(3)
    nu = np.array([2.0, 2.37, 3.1, 5.5, 9.9, 17.3, 33.0, 59.9, 60.0])
    rho = np.linspace(-0.9, 0.95, nu.size)
    uv = get("student_t").sample(250 * nu.size, (0.5, 4.0), rng).reshape(nu.size, 250, 2)
    u, v = pseudo_observations(uv[..., 0]), pseudo_observations(uv[..., 1])
    for name, params in (("student_t", (rho, nu)), ("gaussian", (rho,))):
        fam = get(name)
        direct = np.sum(fam.logpdf(u, v, tuple(p[:, None] for p in params)), axis=1)
        fast = fam.loglik_prepared(fam.prepare(u, v), params)
        np.testing.assert_allclose(fast, direct, atol=1e-6, rtol=0)
    # Off the rank grid (ties, or uniforms as given) the exact path is used.
    t = get("student_t")
    u2 = np.clip(u + 1e-4, 0, 1 - 1e-9)
    data = t.prepare(u2, v)
    assert len(data) == 2
    np.testing.assert_allclose(t.loglik_prepared(data, (rho, nu)),
                               np.sum(t.logpdf(u2, v, (rho[:, None], nu[:, None])), axis=1))
