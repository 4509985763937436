"""BB1 and BB7 families against published values, closed-form special cases, numerical
derivatives and integrals, and simulation.

Sources: Joe (1997), *Multivariate Models and Dependence Concepts*, section 5.2 (families BB1,
BB7 and their special cases); the check values of docs/check-values.md section 1, which
were recomputed there from Joe's formulas and cross-checked by finite differences, quadrature and
simulation; Nelsen (2006), *An Introduction to Copulas*, 2nd ed.; Genest & MacKay (1986) for
tau = 1 + 4 int phi/phi'.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import integrate, special, stats

from monitor.stats.copulas import BB1, BB7, family
from monitor.stats.copulas.base import CopulaFamily


def _corners(fam):
    """Every (theta, delta) combination of the ends of the fit box."""
    return list(itertools.product(*fam.fit_bounds))


# ---------------------------------------------------------------- published check values
@pytest.mark.parametrize(
    ("fam", "params", "expected"),
    [
        # docs/check-values.md section 1, check table at (0.3, 0.7), row "BB1 theta=.5, delta=1.5":
        # C, h and c from Joe (1997) section 5.2 (c = psi''(s) phi'(u) phi'(v)), tau
        # 1 - 2/(delta (theta + 2)), rho_S by numerical integration, lambda_L = 2^(-1/(theta delta)),
        # lambda_U = 2 - 2^(1/delta).
        (BB1(), (0.5, 1.5), {"cdf": 0.280579, "h": 0.118996, "pdf": 0.751546, "tau": 0.466667,
                             "rho": 0.642944, "lower": 0.396850, "upper": 0.412599}),
        # Same table, row "BB7 theta=1.5, delta=1" (the tau formula is marked there as from
        # memory, checked against a numerical integral): lambda_L = 2^(-1/delta),
        # lambda_U = 2 - 2^(1/theta). No rho_S is given for BB7.
        (BB7(), (1.5, 1.0), {"cdf": 0.275345, "h": 0.135236, "pdf": 0.835932, "tau": 0.428571,
                             "lower": 0.5, "upper": 0.412599}),
    ],
    ids=["bb1", "bb7"],
)
def test_check_values_at_point(fam, params, expected):
    u, v = 0.3, 0.7
    got = {
        "cdf": fam.cdf(u, v, params), "h": fam.h_u_given_v(u, v, params),
        "pdf": fam.pdf(u, v, params), "tau": fam.kendall_tau(params),
        "lower": fam.tail_lower(params), "upper": fam.tail_upper(params),
    }
    if "rho" in expected:
        # The base class's Gauss-Legendre rho_S default, checked against the "(num)" value.
        got["rho"] = fam.spearman_rho(params)
    for key, value in expected.items():
        # Table values are rounded to 6 decimals.
        assert float(got[key]) == pytest.approx(value, abs=6e-7), key


@pytest.mark.parametrize(
    ("fam", "params", "tau"),
    [
        # docs/check-values.md section 1, further check values: BB1 (1, 1.5) gives tau = 0.555556.
        (BB1(), (1.0, 1.5), 0.555556),
        # docs/check-values.md section 1: BB7 (2.5, 0.5) gives 0.510322 and (3, 2) gives 0.65 (BB7
        # tau formula from memory; there it matched a numerical integral, Gamma-continued for
        # theta > 2).
        (BB7(), (2.5, 0.5), 0.510322),
        (BB7(), (3.0, 2.0), 0.65),
    ],
)
def test_further_tau_values(fam, params, tau):
    assert float(fam.kendall_tau(params)) == pytest.approx(tau, abs=6e-7)


# ---------------------------------------------------------------- special cases (Joe 1997, 5.2)
GRID = np.linspace(0.02, 0.98, 17)
UG, VG = np.meshgrid(GRID, GRID, indexing="ij")


def _clayton(u, v, t):
    """Clayton(t): C, h_{1|2} and c from docs/check-values.md section 1 (Joe 1997 family B4)."""
    s = u**-t + v**-t - 1
    return (s ** (-1 / t), v ** (-t - 1) * s ** (-1 / t - 1),
            (1 + t) * (u * v) ** (-t - 1) * s ** (-1 / t - 2))


def _gumbel(u, v, t):
    """Gumbel(t): C, h_{1|2} and c from docs/check-values.md section 1 (Joe 1997 family B6)."""
    x, y = -np.log(u), -np.log(v)
    a = x**t + y**t
    c = np.exp(-(a ** (1 / t)))
    h = c / v * y ** (t - 1) * a ** (1 / t - 1)
    dens = c / (u * v) * (x * y) ** (t - 1) * a ** (2 / t - 2) * (1 + (t - 1) * a ** (-1 / t))
    return c, h, dens


def _joe(u, v, t):
    """Joe(t): C, h_{1|2} and c from docs/check-values.md section 1 (Joe 1997 family B5)."""
    ub, vb = 1 - u, 1 - v
    s = ub**t + vb**t - ub**t * vb**t
    return (1 - s ** (1 / t), s ** (1 / t - 1) * vb ** (t - 1) * (1 - ub**t),
            s ** (1 / t - 2) * ub ** (t - 1) * vb ** (t - 1) * (t - 1 + s))


def _family_values(fam, params):
    return (fam.cdf(UG, VG, params), fam.h_u_given_v(UG, VG, params),
            fam.pdf(UG, VG, params))


@pytest.mark.parametrize("theta", [0.3, 2.0, 8.0])
def test_bb1_with_delta_one_is_clayton(theta):
    # Joe (1997) section 5.2: BB1 with delta = 1 is family B4 (Clayton).
    for got, want in zip(_family_values(BB1(), (theta, 1.0)), _clayton(UG, VG, theta),
                         strict=True):
        np.testing.assert_allclose(got, want, rtol=1e-11)
    assert float(BB1().kendall_tau((theta, 1.0))) == pytest.approx(theta / (theta + 2))
    assert float(BB1().tail_lower((theta, 1.0))) == pytest.approx(2 ** (-1 / theta))


@pytest.mark.parametrize("delta", [0.3, 2.0, 8.0])
def test_bb7_with_theta_one_is_clayton(delta):
    # Joe (1997) section 5.2: BB7 with theta = 1 is family B4 (Clayton) with parameter delta.
    for got, want in zip(_family_values(BB7(), (1.0, delta)), _clayton(UG, VG, delta),
                         strict=True):
        np.testing.assert_allclose(got, want, rtol=1e-11)
    # Clayton tau theta/(theta + 2) (docs/check-values.md section 1).
    assert float(BB7().kendall_tau((1.0, delta))) == pytest.approx(delta / (delta + 2), abs=1e-13)


@pytest.mark.parametrize("delta", [1.2, 2.0, 5.0])
def test_bb1_tends_to_gumbel_as_theta_vanishes(delta):
    # Joe (1997) section 5.2: BB1 -> Gumbel(delta) (family B6) as theta -> 0; the gap is O(theta).
    theta = 1e-8
    for got, want in zip(_family_values(BB1(), (theta, delta)), _gumbel(UG, VG, delta),
                         strict=True):
        np.testing.assert_allclose(got, want, rtol=1e-6)
    # Gumbel tau 1 - 1/delta and lambda_U 2 - 2^(1/delta) (docs/check-values.md section 1).
    assert float(BB1().kendall_tau((theta, delta))) == pytest.approx(1 - 1 / delta, abs=1e-7)
    assert float(BB1().tail_upper((theta, delta))) == pytest.approx(2 - 2 ** (1 / delta))


def _joe_tau_series(t, terms=200_000):
    """Joe's tau 1 - 4 sum_k 1/[k (t k + 2)(t (k - 1) + 2)] (docs/check-values.md section 1); the
    neglected tail is below 4 / (t^2 * terms^2) / 2."""
    k = np.arange(1, terms + 1, dtype=float)
    return 1 - 4 * np.sum(1 / (k * (t * k + 2) * (t * (k - 1) + 2)))


@pytest.mark.parametrize(("theta", "tau"), [
    # docs/check-values.md section 1, Joe: theta = 1.5 gives 0.219272, theta = 3 gives 0.517962, and
    # tau(2) = 2 - pi^2/6.
    (1.5, 0.219272), (2.0, 2 - np.pi**2 / 6), (3.0, 0.517962),
])
def test_bb7_tends_to_joe_as_delta_vanishes(theta, tau):
    # Joe (1997) section 5.2: BB7 -> Joe(theta) (family B5) as delta -> 0; the gap is O(delta).
    delta = 1e-8
    for got, want in zip(_family_values(BB7(), (theta, delta)), _joe(UG, VG, theta),
                         strict=True):
        np.testing.assert_allclose(got, want, rtol=1e-6)
    assert float(BB7().kendall_tau((theta, delta))) == pytest.approx(tau, abs=6e-7)
    assert float(BB7().kendall_tau((theta, delta))) == pytest.approx(_joe_tau_series(theta),
                                                                      abs=1e-7)
    # Joe's digamma form 1 + [2/(2 - t)][psi(2) - psi(1 + 2/t)] (docs/check-values.md, from memory).
    if theta != 2.0:
        digamma = 1 + 2 / (2 - theta) * (special.digamma(2) - special.digamma(1 + 2 / theta))
        assert float(BB7().kendall_tau((theta, delta))) == pytest.approx(digamma, abs=1e-7)


# ---------------------------------------------------------------- finite differences
FD_CASES = [
    (BB1(), (0.5, 1.5)), (BB1(), (0.2, 1.1)), (BB1(), (2.0, 3.0)), (BB1(), (0.05, 6.0)),
    (BB7(), (1.5, 1.0)), (BB7(), (1.2, 0.3)), (BB7(), (3.0, 2.0)), (BB7(), (6.0, 0.05)),
]
FD_IDS = [f"{f.name}-{p[0]:g}-{p[1]:g}" for f, p in FD_CASES]


@pytest.mark.parametrize(("fam", "params"), FD_CASES, ids=FD_IDS)
def test_h_functions_and_density_are_derivatives_of_cdf(fam, params):
    # h_{1|2} = dC/dv, h_{2|1} = dC/du, c = d^2 C / du dv (Nelsen 2006, Thm 2.2.7 and
    # section 2.4), by central differences of the cdf on an interior grid.
    g = np.linspace(0.05, 0.95, 13)
    u, v = np.meshgrid(g, g, indexing="ij")
    e = 1e-6
    dcdv = (fam.cdf(u, v + e, params) - fam.cdf(u, v - e, params)) / (2 * e)
    dcdu = (fam.cdf(u + e, v, params) - fam.cdf(u - e, v, params)) / (2 * e)
    np.testing.assert_allclose(fam.h_u_given_v(u, v, params), dcdv, atol=2e-9)
    np.testing.assert_allclose(fam.h_v_given_u(u, v, params), dcdu, atol=2e-9)
    e = 1e-4
    mixed = (fam.cdf(u + e, v + e, params) - fam.cdf(u + e, v - e, params)
             - fam.cdf(u - e, v + e, params) + fam.cdf(u - e, v - e, params)) / (4 * e * e)
    # Truncation error of the second difference is O(e^2) relative to the density's curvature,
    # largest near the (0.05, 0.05) corner under strong lower-tail dependence.
    np.testing.assert_allclose(fam.pdf(u, v, params), mixed, rtol=1e-4, atol=1e-6)


@pytest.mark.parametrize(("fam", "params"), FD_CASES, ids=FD_IDS)
def test_h_function_near_lower_corner(fam, params):
    # dC/dv by central differences with a step relative to v, deep in the lower tail where the
    # family's powers u^-theta are large (Nelsen 2006, Thm 2.2.7).
    u = np.array([1e-8, 1e-6, 3e-6])
    v = np.array([1e-6, 1e-6, 1e-8])
    e = 1e-4 * v
    dcdv = (fam.cdf(u, v + e, params) - fam.cdf(u, v - e, params)) / (2 * e)
    np.testing.assert_allclose(fam.h_u_given_v(u, v, params), dcdv, rtol=1e-6, atol=1e-12)


# ---------------------------------------------------------------- conditional density at the edges
_LEVELS = np.array([1e-9, 1e-6, 1e-3, 0.05, 0.5, 0.95, 0.999, 1 - 1e-6, 1 - 1e-9])


@pytest.mark.parametrize("fam", [BB1(), BB7()], ids=["bb1", "bb7"])
def test_density_integrates_to_h_at_extreme_conditioning_values(fam):
    # For fixed v, u -> h_{1|2}(u | v) is the conditional cdf and c(., v) its density (Nelsen
    # 2006, Thm 2.2.7): h(b | v) - h(a | v) = int_a^b c(x, v) dx. Checked at the corners of the
    # fit box with v at 1e-10 and 1 - 1e-10, integrating in z = logit x between conditional
    # quantile knots (the knots only place the pieces; the check is integral versus h).
    nodes, weights = special.roots_legendre(64)
    for params in _corners(fam) + [(4.0, 4.0)]:
        for v in (1e-10, 0.5, 1 - 1e-10):
            u = fam.h_u_given_v_inverse(_LEVELS, v, params)
            z = np.unique(np.clip(np.log(u) - np.log1p(-u), -34, 34))
            half = 0.5 * np.diff(z)[:, None]
            zz = 0.5 * (z[1:] + z[:-1])[:, None] + half * nodes[None, :]
            x = 1 / (1 + np.exp(-zz))
            f = fam.pdf(x, v, params) * x * (1 - x)
            mass = np.sum(f * weights[None, :] * half, axis=1)
            dh = np.diff(fam.h_u_given_v(1 / (1 + np.exp(-z)), v, params))
            # Near v = 1 the argument x is resolved only to 1.1e-16, a relative error of 1e-6 in
            # 1 - x at 1 - x ~ 1e-10 where the mass sits, hence the looser bound there.
            tol = 1e-6 if v > 0.5 else 1e-9
            np.testing.assert_allclose(mass, dh, atol=tol, err_msg=f"{params} v={v}")


# ---------------------------------------------------------------- stability at the box corners
@pytest.mark.parametrize("fam", [BB1(), BB7()], ids=["bb1", "bb7"])
@pytest.mark.parametrize("rotation", [0, 90, 180, 270])
def test_finite_at_corners_and_ends_of_fit_box(fam, rotation):
    # Project numerics rule: finite log-densities for u, v within 1e-10 of 0 or 1 and parameters
    # at the ends of fit_bounds; h in [0, 1]; C within the Frechet-Hoeffding bounds (Nelsen
    # 2006, Thm 2.2.3).
    fam = type(fam)(rotation)
    pts = np.array([1e-10, 0.5, 1 - 1e-10])
    u, v = np.meshgrid(pts, pts, indexing="ij")
    for params in _corners(fam):
        lp = fam.logpdf(u, v, params)
        assert np.all(np.isfinite(lp)), (params, lp)
        for h in (fam.h_u_given_v(u, v, params), fam.h_v_given_u(u, v, params)):
            assert np.all((h >= 0) & (h <= 1)), (params, h)
        c = fam.cdf(u, v, params)
        assert np.all(c >= np.maximum(u + v - 1, 0) - 1e-15)
        assert np.all(c <= np.minimum(u, v) + 1e-15)


# ---------------------------------------------------------------- the estimator's grid path
@pytest.mark.parametrize("fam", [BB1(), BB7()], ids=["bb1", "bb7"])
@pytest.mark.parametrize("n", [20, 250])
def test_grid_likelihood_equals_log_space_density_sum(fam, n):
    # On ranks (pseudo-observations without ties) the estimator evaluates the likelihood in
    # plain space where every generator power is within e^+-700 and in log space past that;
    # both must equal the sum of the public log-density (written in log space throughout) to
    # rounding, over the fit box, its corners and mixed rows in one batch.
    rng = np.random.default_rng(5)
    rows = 12
    u = np.array([rng.permutation(n) + 1 for _ in range(rows)]) / (n + 1.0)
    v = np.array([rng.permutation(n) + 1 for _ in range(rows)]) / (n + 1.0)
    data = fam.prepare(u, v)
    (lo1, hi1), (lo2, hi2) = fam.fit_bounds
    batches = [tuple(np.full(rows, x) for x in c) for c in _corners(fam)]
    batches.append((np.exp(rng.uniform(np.log(lo1), np.log(hi1), rows)),
                    np.exp(rng.uniform(np.log(lo2), np.log(hi2), rows))))
    batches.append((np.full(rows, 0.8 if fam.name == "bb1" else 1.6), np.full(rows, 1.3)))
    for p in batches:
        direct = np.sum(fam.logpdf(u, v, tuple(a[:, None] for a in p)), axis=1)
        np.testing.assert_allclose(fam.loglik_prepared(data, p), direct, rtol=1e-11, atol=1e-10,
                                   err_msg=p)


# ---------------------------------------------------------------- Kendall's tau by integration
def _tau_by_double_integral(fam, params):
    """tau = 1 - 4 int int dC/du dC/dv du dv (Nelsen 2006, Thm 5.1.1 corollary; docs/check-values.md
    section 1), the inner integral by 400-point Gauss-Legendre, the outer adaptively."""

    def inner(x):
        def g(y):
            return fam.h_v_given_u(x, y, params) * fam.h_u_given_v(x, y, params)
        return integrate.fixed_quad(g, 0, 1, n=400)[0]

    return 1 - 4 * integrate.quad(inner, 0, 1, epsabs=1e-12, epsrel=1e-12, limit=200)[0]


@pytest.mark.parametrize(("fam", "params"), [
    (BB1(), (0.5, 1.5)), (BB1(), (0.2, 1.1)), (BB7(), (1.5, 1.0)), (BB7(), (2.0, 0.7)),
    (BB7(), (3.0, 2.0)), (BB7(), (1.2, 0.3)),
], ids=lambda x: getattr(x, "name", None) or "-".join(f"{a:g}" for a in x))
def test_tau_matches_double_integral(fam, params):
    assert float(fam.kendall_tau(params)) == pytest.approx(
        _tau_by_double_integral(fam, params), abs=1e-6)


def _bb7_tau_genest_mackay(theta, delta):
    """tau = 1 + 4 int_0^1 phi(t)/phi'(t) dt (Genest & MacKay 1986) with BB7's generator
    phi(t) = (1 - (1 - t)^theta)^-delta - 1 (Joe 1997 section 5.2; docs/check-values.md section 1)."""

    def ratio(x):  # phi/phi' at t = 1 - x, written with log1p/expm1 to keep x^theta
        log_a = np.log1p(-(x**theta))
        phi = np.expm1(-delta * log_a)
        dphi = -delta * np.exp((-delta - 1) * log_a) * theta * x ** (theta - 1)
        return phi / dphi

    return 1 + 4 * integrate.quad(ratio, 0, 1, epsabs=1e-13, epsrel=1e-12, limit=200)[0]


@pytest.mark.parametrize("delta", [1e-3, 0.5, 3.0, 15.0])
def test_bb7_tau_across_its_removable_singularity(delta):
    # docs/check-values.md: the BB7 closed form (from memory) is singular at theta = 2 and needs
    # Gamma-continuation for theta > 2; compare with the Genest-MacKay integral on both sides,
    # at 2 itself and at the edges of the series branch (2/1.05, 2/0.95).
    thetas = [1.0, 1.5, 1.9, 2 / 1.05 - 1e-9, 2 / 1.05 + 1e-9, 1.99, 1.999999, 2.0, 2.000001,
              2.01, 2 / 0.95 - 1e-9, 2 / 0.95 + 1e-9, 2.5, 8.0, 15.0]
    got = BB7().kendall_tau((np.array(thetas), delta))
    want = [_bb7_tau_genest_mackay(t, delta) for t in thetas]
    np.testing.assert_allclose(got, want, atol=1e-9)


# ---------------------------------------------------------------- Spearman's rho default
@pytest.mark.parametrize(("fam", "params"), [
    (BB7(), (1.5, 1.0)), (BB7(), (15.0, 15.0)), (BB1(), (15.0, 15.0)), (BB1(), (0.2, 1.1)),
], ids=["bb7-1.5-1", "bb7-15-15", "bb1-15-15", "bb1-0.2-1.1"])
def test_spearman_rho_default_is_accurate(fam, params):
    # rho_S = 12 int int C - 3 (Nelsen 2006, eq. 5.1.15c; docs/check-values.md section 1) by adaptive
    # quadrature split at the diagonal, where C has a near-kink under strong dependence.
    def inner(x):
        lo = integrate.fixed_quad(lambda y: fam.cdf(x, y * x, params) * x, 0, 1, n=200)[0]
        hi = integrate.fixed_quad(lambda y: fam.cdf(x, x + y * (1 - x), params) * (1 - x),
                                  0, 1, n=200)[0]
        return lo + hi

    rho = 12 * integrate.quad(inner, 0, 1, epsabs=1e-11, epsrel=1e-11, limit=200)[0] - 3
    assert float(fam.spearman_rho(params)) == pytest.approx(rho, abs=1e-5)


# ---------------------------------------------------------------- tail coefficients
@pytest.mark.parametrize(("fam", "params"), [
    (BB1(), (0.5, 1.5)), (BB1(), (2.0, 2.0)), (BB7(), (1.5, 1.0)), (BB7(), (3.0, 2.0)),
], ids=["bb1-0.5-1.5", "bb1-2-2", "bb7-1.5-1", "bb7-3-2"])
def test_tail_coefficients_are_diagonal_limits(fam, params):
    # lambda_L = lim C(q, q)/q and lambda_U = lim (1 - 2(1 - q) + C(1 - q, 1 - q))/q (Nelsen
    # 2006, Def. 5.4.1; docs/check-values.md section 1, confirmed there at q = 1e-12). At these
    # parameters the gap shrinks like q (checked: it falls tenfold per decade).
    lower = [fam.cdf(q, q, params) / q for q in (1e-9, 1e-10)]
    upper = [(1 - 2 * (1 - q) + fam.cdf(1 - q, 1 - q, params)) / q for q in (1e-4, 1e-5)]
    lam_l, lam_u = float(fam.tail_lower(params)), float(fam.tail_upper(params))
    assert float(lower[1]) == pytest.approx(lam_l, abs=1e-5)
    assert float(upper[1]) == pytest.approx(lam_u, abs=1e-5)
    assert abs(lower[1] - lam_l) <= abs(lower[0] - lam_l) + 1e-12
    assert abs(upper[1] - lam_u) <= abs(upper[0] - lam_u) + 1e-10


def test_tail_coefficients_swap_under_survival_rotation():
    # docs/check-values.md section 2: the 180-degree rotation swaps lambda_L and lambda_U; 90 and 270
    # have none on the main diagonal.
    p = (0.5, 1.5)
    assert float(BB1(180).tail_lower(p)) == pytest.approx(2 - 2 ** (1 / 1.5))
    assert float(BB1(180).tail_upper(p)) == pytest.approx(2 ** (-1 / 0.75))
    assert float(BB7(90).tail_lower((1.5, 1.0))) == 0.0


# ---------------------------------------------------------------- simulation
@pytest.mark.parametrize(("fam", "params"), [
    (BB1(), (0.5, 1.5)), (BB7(), (1.5, 1.0)), (BB7(), (3.0, 2.0)), (BB1(270), (2.0, 2.0)),
], ids=["bb1", "bb7", "bb7-strong", "bb1-270"])
def test_sampled_tau_matches_implied(fam, params):
    n = 20_000
    uv = fam.sample(n, params, rng=np.random.default_rng(20240601))
    assert uv.shape == (n, 2) and np.all((uv > 0) & (uv < 1))
    tau = float(fam.kendall_tau(params))
    tau_hat = stats.kendalltau(uv[:, 0], uv[:, 1]).statistic
    # Standard error from the influence function of tau_n, 8C(u, v) - 4u - 4v + 2 - 2 tau
    # (docs/check-values.md section 3, derived there from the U-statistic projection), evaluated at
    # the draws; 4 standard errors.
    influence = 8 * fam.cdf(uv[:, 0], uv[:, 1], params) - 4 * uv[:, 0] - 4 * uv[:, 1] + 2 - 2 * tau
    se = influence.std() / np.sqrt(n)
    assert tau_hat == pytest.approx(tau, abs=4 * se)


# ---------------------------------------------------------------- conditional inverse
@pytest.mark.parametrize("fam", [BB1(), BB7()], ids=["bb1", "bb7"])
def test_h_inverse_round_trip_and_matches_bisection(fam):
    # h(h^-1(w)) = w to 1e-10 over the fit box (corners and an interior point), including w
    # within 1e-10 of 0 and 1, and at least as accurately as the base class's generic
    # bisection (the slow reference path). The roots themselves are not compared: where h is
    # flat in u (w near 1 with v tiny) many u give the same h to rounding.
    # v stops at 0.999: beyond it, with strong upper-tail dependence, the root sits so close to
    # 1 that the spacing of doubles there (1.1e-16) times the density exceeds 1e-10.
    w = np.array([1e-10, 1e-6, 0.01, 0.2, 0.5, 0.8, 0.99, 1 - 1e-6, 1 - 1e-10])
    v = np.array([1e-10, 1e-6, 0.01, 0.3, 0.5, 0.7, 0.99, 0.999])[:, None]
    for params in _corners(fam) + [(3.0, 2.0)]:
        u = fam.h_u_given_v_inverse(w, v, params)
        inside = (u > 1e-14) & (u < 1 - 1e-14)  # roots past the clip at 1e-15 are unreachable
        err = np.abs(fam.h_u_given_v(u, v, params) - w)
        assert np.all(err[inside] <= 1e-10), (params, err.max())
        ref = CopulaFamily._h_u_given_v_inverse(fam, w, v, fam.as_params(params))
        assert np.all(err <= np.abs(fam.h_u_given_v(ref, v, params) - w) + 1e-12), params
        vv = fam.h_v_given_u_inverse(w, v, params)
        assert np.all(np.abs(fam.h_v_given_u(v, vv, params) - w)[inside] <= 1e-10)


@pytest.mark.parametrize("cls", [BB1, BB7])
def test_h_inverse_needs_far_fewer_evaluations_than_bisection(cls):
    # Speed, counted deterministically: the base class's bisection evaluates h 61 times; the
    # safeguarded Newton iteration should need a fraction of that over the whole fit box.
    calls = []

    class Counting(cls):
        __slots__ = ()

        def _log_h_and_log_c(self, *args):
            calls.append(1)
            return super()._log_h_and_log_c(*args)

    fam = Counting()
    rng = np.random.default_rng(11)
    w, v = rng.uniform(size=(2, 5000))
    for params in _corners(fam) + [(3.0, 2.0)]:
        calls.clear()
        fam.h_u_given_v_inverse(w, v, params)
        assert len(calls) <= 20, (params, len(calls))


def test_h_inverse_broadcasts_over_windows():
    # Parameters of shape (windows, 1) against data of shape (windows, n).
    rng = np.random.default_rng(3)
    w = rng.uniform(size=(3, 50))
    v = rng.uniform(size=(3, 50))
    theta = np.array([[0.3], [2.0], [9.0]])
    delta = np.array([[1.0], [1.7], [6.0]])
    for fam in (BB1(), BB7(180)):
        th = theta + (1.0 if fam.name == "bb7" else 0.0)
        u = fam.h_u_given_v_inverse(w, v, (th, delta))
        assert u.shape == (3, 50)
        for i in range(3):
            np.testing.assert_allclose(u[i], fam.h_u_given_v_inverse(w[i], v[i], (th[i, 0],
                                                                                 delta[i, 0])))
        np.testing.assert_allclose(fam.h_u_given_v(u, v, (th, delta)), w, atol=1e-10)


# ---------------------------------------------------------------- starting rule
@pytest.mark.parametrize("name", ["bb1", "bb7"])
def test_start_params_reproduce_tau_inside_fit_box(name):
    fam = family(name)
    tau = np.linspace(0.001, 0.9, 60)
    theta, delta = fam.start_params(tau)
    assert theta.shape == delta.shape == tau.shape
    (t_lo, t_hi), (d_lo, d_hi) = fam.fit_bounds
    assert np.all((theta >= t_lo) & (theta <= t_hi) & (delta >= d_lo) & (delta <= d_hi))
    np.testing.assert_allclose(fam.kendall_tau((theta, delta)), tau, atol=1e-10)
    # tau does not identify two parameters: params_from_tau is the same documented rule.
    for a, b in zip(fam.params_from_tau(tau), (theta, delta), strict=True):
        np.testing.assert_allclose(a, b)
    # Shape (windows, 1) in, shape (windows, 1) out.
    assert fam.start_params(tau[:4, None])[0].shape == (4, 1)


def test_start_params_bb1_equal_split():
    # BB1: 1 - tau = (1 - tau_Clayton(theta)) (1 - tau_Gumbel(delta)) with the Clayton and
    # Gumbel taus of docs/check-values.md section 1; the rule splits it equally.
    theta, delta = BB1().start_params(0.5)
    t = 1 - np.sqrt(0.5)
    assert float(theta) == pytest.approx(2 * t / (1 - t))
    assert float(delta) == pytest.approx(1 / (1 - t))


@pytest.mark.parametrize("name", ["bb1", "bb7"])
def test_start_params_clip_weak_and_extreme_tau(name):
    fam = family(name)
    # No BB1/BB7 member has tau < 0: such input gives a near-independence interior point.
    theta, delta = fam.start_params(np.array([-0.5, 0.0]))
    assert np.all(fam.kendall_tau((theta, delta)) == pytest.approx(1e-3))
    assert np.all(delta > fam.fit_bounds[1][0]) and np.all(theta > fam.fit_bounds[0][0])
    # Beyond the strongest dependence the box allows, the rule stays in the box.
    theta, delta = fam.start_params(0.99)
    (t_lo, t_hi), (d_lo, d_hi) = fam.fit_bounds
    assert t_lo <= float(theta) <= t_hi and d_lo <= float(delta) <= d_hi
    assert float(fam.kendall_tau((theta, delta))) > 0.9
    # Rotations by 90/270 carry negative tau.
    theta, delta = family(name, 90).start_params(-0.4)
    assert float(family(name, 90).kendall_tau((theta, delta))) == pytest.approx(-0.4, abs=1e-10)


# ---------------------------------------------------------------- validation
def test_parameter_domain_errors():
    with pytest.raises(ValueError, match=r"bb1 copula parameter delta=0.5 is outside \[1.0, inf\)"):
        BB1().logpdf(0.5, 0.5, (1.0, 0.5))
    with pytest.raises(ValueError, match=r"bb1 copula parameter theta=0.0 is outside \(0.0, inf\)"):
        BB1().cdf(0.5, 0.5, (0.0, 2.0))
    with pytest.raises(ValueError, match=r"bb7 copula parameter theta=0.9 is outside \[1.0, inf\)"):
        BB7().cdf(0.5, 0.5, {"theta": 0.9, "delta": 1.0})
    with pytest.raises(ValueError, match=r"bb7 copula takes 2 parameter\(s\)"):
        BB7().kendall_tau((2.0,))
