"""Checks of the one-parameter Archimedean families (Clayton, Gumbel, Frank, Joe) against
sources outside the project: statsmodels' copula classes, published closed forms, and the check
values of docs/check-values.md sections 1 and 2 (recomputed there from the closed forms and
cross-checked by finite differences, quadrature and simulation).

Notation: h_{1|2}(u|v) = dC/dv is ``h_u_given_v(u, v, params)``; h_{2|1}(v|u) = dC/du is
``h_v_given_u(u, v, params)``.
"""

from __future__ import annotations

import warnings
from decimal import Decimal, getcontext

import numpy as np
import pytest
from scipy import integrate, stats
from statsmodels.distributions.copula.api import ClaytonCopula, FrankCopula, GumbelCopula

from monitor.stats.copulas import family
from monitor.stats.copulas.archimedean import _debye

POINTS = np.array([[0.3, 0.7], [0.05, 0.1], [0.9, 0.95], [0.5, 0.5], [0.2, 0.8], [0.01, 0.99]])


# ------------------------------------------------------------------ statsmodels as reference
@pytest.mark.parametrize(
    ("name", "cls", "theta"),
    [
        ("clayton", ClaytonCopula, 0.5),
        ("clayton", ClaytonCopula, 2.0),
        ("clayton", ClaytonCopula, 10.0),
        ("gumbel", GumbelCopula, 1.5),
        ("gumbel", GumbelCopula, 2.0),
        ("gumbel", GumbelCopula, 8.0),
        ("frank", FrankCopula, -3.0),
        ("frank", FrankCopula, 5.0),
        ("frank", FrankCopula, 0.5),
    ],
)
def test_cdf_logpdf_tau_match_statsmodels(name, cls, theta):
    # Reference: statsmodels 0.15, statsmodels.distributions.copula.api (ClaytonCopula,
    # GumbelCopula, FrankCopula), an independent implementation of the closed forms of
    # Joe (1997), Multivariate Models and Dependence Concepts, section 5.1.
    # statsmodels' Frank loses accuracy for large theta: at theta = 20 its log-density at
    # (0.9, 0.95) is 1.8408 against 1.5776 at (0.05, 0.1), although Frank is radially symmetric,
    # and its cdf at (0.9, 0.95) is 1e-10 off; ours agrees with the 60-digit evaluation of
    # test_closed_forms_in_high_precision there. So large Frank theta is checked only there.
    fam = family(name)
    ref = cls(theta=theta)
    u, v = POINTS[:, 0], POINTS[:, 1]
    np.testing.assert_allclose(fam.cdf(u, v, (theta,)), ref.cdf(POINTS), rtol=1e-9, atol=1e-14)
    with warnings.catch_warnings():
        # statsmodels' Frank log-density takes logs of negative numbers for theta < 0; its
        # density is fine there, so compare against log(pdf).
        warnings.simplefilter("ignore", RuntimeWarning)
        ref_logpdf = np.log(ref.pdf(POINTS))
    np.testing.assert_allclose(fam.logpdf(u, v, (theta,)), ref_logpdf, rtol=1e-9, atol=1e-10)
    if theta > 0:
        assert float(fam.kendall_tau((theta,))) == pytest.approx(ref.tau(), abs=1e-12)
    else:
        # statsmodels' Frank tau at theta = -3 is -0.3072422, 5e-6 from the definition
        # tau = 1 + (4/theta)[D_1(theta) - 1] integrated by scipy.integrate.quad, -0.30724696,
        # which ours matches; so check against the definition there.
        integral = integrate.quad(lambda t: t / np.expm1(t), 0.0, theta, epsabs=0,
                                  epsrel=1e-13)[0]
        tau = 1 + 4 / theta * (integral / theta - 1)
        assert float(fam.kendall_tau((theta,))) == pytest.approx(tau, abs=1e-12)
        assert abs(ref.tau() - tau) < 1e-5


# ------------------------------------------------------------------ 50-digit closed forms
getcontext().prec = 60  # decimal context for the high-precision references below
_ONE = Decimal(1)


def _clayton_decimal(u, v, th):
    # Joe (1997), family B4; Nelsen (2006), (4.2.1).
    s = u**-th + v**-th - 1
    return s ** (-_ONE / th), v ** (-th - 1) * s ** (-_ONE / th - 1), (
        (1 + th) * (u * v) ** (-th - 1) * s ** (-_ONE / th - 2))


def _gumbel_decimal(u, v, th):
    # Joe (1997), family B6: C = exp(-A^(1/theta)), A = x^theta + y^theta, x = -ln u.
    x, y = -u.ln(), -v.ln()
    a = x**th + y**th
    c = (-(a ** (_ONE / th))).exp()
    h = c / v * y ** (th - 1) * a ** (_ONE / th - 1)
    dens = c / (u * v) * (x * y) ** (th - 1) * a ** (2 / th - 2) * (1 + (th - 1) * a ** (-_ONE / th))
    return c, h, dens


def _frank_decimal(u, v, th):
    # Joe (1997), family B3, with the density of docs/check-values.md section 1.
    e = Decimal.exp
    c = -(_ONE / th) * (1 + (e(-th * u) - 1) * (e(-th * v) - 1) / (e(-th) - 1)).ln()
    h = e(-th * v) * (e(-th * u) - 1) / ((e(-th) - 1) + (e(-th * u) - 1) * (e(-th * v) - 1))
    dens = th * (1 - e(-th)) * e(-th * (u + v)) / (
        (1 - e(-th)) - (1 - e(-th * u)) * (1 - e(-th * v))) ** 2
    return c, h, dens


def _joe_decimal(u, v, th):
    # Joe (1997), family B5: C = 1 - S^(1/theta), S = a + b - ab, a = (1-u)^theta.
    a, b = (1 - u) ** th, (1 - v) ** th
    s = a + b - a * b
    h = s ** (_ONE / th - 1) * (1 - v) ** (th - 1) * (1 - a)
    dens = s ** (_ONE / th - 2) * (1 - u) ** (th - 1) * (1 - v) ** (th - 1) * (th - 1 + s)
    return 1 - s ** (_ONE / th), h, dens


HIGH_PRECISION = [
    ("clayton", _clayton_decimal, (0.5, 2.0, 30.0)),
    ("gumbel", _gumbel_decimal, (1.0, 1.5, 30.0)),
    ("frank", _frank_decimal, (-45.0, -1e-5, 1e-5, 5.0, 45.0)),
    ("joe", _joe_decimal, (1.0, 1.5, 30.0)),
]


@pytest.mark.parametrize(("name", "reference", "thetas"), HIGH_PRECISION,
                         ids=[c[0] for c in HIGH_PRECISION])
def test_closed_forms_in_high_precision(name, reference, thetas):
    # The closed forms (sources beside each reference function) evaluated in 60-digit decimal
    # arithmetic (Python's decimal module) at the exact binary inputs, including 1e-10 from
    # the edges: C and h to 1e-12 relative, log c to 1e-12 relative (absolute below 1).
    fam = family(name)
    grid = [1e-10, 1e-4, 0.3, 0.7, 1 - 1e-4, 1 - 1e-10]
    for th in thetas:
        for u in grid:
            for v in grid:
                c, h, dens = reference(Decimal(u), Decimal(v), Decimal(th))
                p = (th,)
                assert float(fam.cdf(u, v, p)) == pytest.approx(float(c), rel=1e-12, abs=0)
                assert float(fam.h_u_given_v(u, v, p)) == pytest.approx(float(h), rel=1e-12,
                                                                        abs=0)
                log_c = float(dens.ln())
                assert float(fam.logpdf(u, v, p)) == pytest.approx(log_c, rel=1e-12, abs=1e-12)


# ------------------------------------------------------------------ docs/check-values.md section 1
# Check values at (u, v) = (0.3, 0.7), printed to 6 decimals: C, h_{1|2}(.3|.7), c, tau, rho_S,
# lambda_L, lambda_U. Source: closed forms of Joe (1997), Multivariate Models and Dependence
# Concepts, section 5.1 (families B3 Frank, B4 Clayton, B5 Joe, B6 Gumbel) and Nelsen (2006),
# An Introduction to Copulas, 2nd ed., chapters 4-5, as tabulated in docs/check-values.md section 1
# ("Check values at (u,v) = (0.3, 0.7)"). rho_S of Clayton, Gumbel and Joe is numeric there
# (12 int int C - 3); Joe's tau uses the digamma form, which is (from memory) but was checked
# there against the series.
TABLE = {
    ("clayton", 2.0): (0.286865, 0.068824, 0.629289, 0.5, 0.682234, 0.707107, 0.0),
    ("gumbel", 2.0): (0.284878, 0.115598, 0.663678, 0.5, 0.682234, 0.0, 0.585786),
    ("frank", 5.0): (0.284195, 0.097808, 0.581669, 0.456701, 0.643487, 0.0, 0.0),
    ("joe", 2.0): (0.267948, 0.209002, 0.822160, 0.355066, 0.504206, 0.0, 0.585786),
}


@pytest.mark.parametrize(("name", "theta"), list(TABLE), ids=[n for n, _ in TABLE])
def test_reference_table_at_point(name, theta):
    fam = family(name)
    p = (theta,)
    got = (
        fam.cdf(0.3, 0.7, p), fam.h_u_given_v(0.3, 0.7, p), fam.pdf(0.3, 0.7, p),
        fam.kendall_tau(p), fam.spearman_rho(p), fam.tail_lower(p), fam.tail_upper(p),
    )
    # Six printed decimals: half a unit in the last place.
    np.testing.assert_allclose(np.array(got, dtype=float), TABLE[name, theta], rtol=0, atol=5e-7)


def test_debye_values():
    # D_1(5) = 0.320876, D_2(5) = 0.172329: docs/check-values.md section 1, "Further check values"
    # (Debye function D_k(x) = (k/x^k) int_0^x t^k/(e^t-1) dt).
    assert float(_debye(1, 5.0)) == pytest.approx(0.320876, abs=5e-7)
    assert float(_debye(2, 5.0)) == pytest.approx(0.172329, abs=5e-7)
    # The definition by adaptive quadrature (scipy.integrate.quad), including x < 0 where the
    # implementation uses D_k(-x) = D_k(x) + kx/(k+1) (docs/check-values.md section 1) and x beyond the
    # cut-off at 50 where it uses k! zeta(k+1) k / x^k.
    for k in (1, 2):
        for x in (-30.0, -2.0, 0.3, 5.0, 44.0, 80.0):
            integral = integrate.quad(lambda t, k=k: t**k / np.expm1(t), 0.0, x, epsabs=0,
                                      epsrel=1e-13)[0]
            assert float(_debye(k, x)) == pytest.approx(k / x**k * integral, rel=1e-12)


def test_frank_further_values():
    # docs/check-values.md section 1, "Further check values": Frank tau at theta = 10, 1, -5 and
    # rho_S at theta = 10, from tau = 1 - (4/theta)[1 - D_1(theta)] and
    # rho_S = 1 - (12/theta)[D_1(theta) - D_2(theta)] (Nelsen 2006, section 5.1).
    fam = family("frank")
    assert float(fam.kendall_tau((10.0,))) == pytest.approx(0.665777, abs=5e-7)
    assert float(fam.kendall_tau((1.0,))) == pytest.approx(0.110019, abs=5e-7)
    assert float(fam.kendall_tau((-5.0,))) == pytest.approx(-0.456701, abs=5e-7)
    assert float(fam.spearman_rho((10.0,))) == pytest.approx(0.860234, abs=5e-7)
    assert float(fam.spearman_rho((-10.0,))) == pytest.approx(-0.860234, abs=5e-7)


def test_joe_further_values_and_series():
    # docs/check-values.md section 1: Joe tau(1.5) = 0.219272, tau(3) = 0.517962, tau(2) = 2 - pi^2/6.
    # The digamma form used by the implementation is (from memory); the series
    # tau = 1 - 4 sum_{k>=1} 1/[k(theta k + 2)(theta(k-1) + 2)] (Joe 1997, family B5) is the check.
    fam = family("joe")
    assert float(fam.kendall_tau((1.5,))) == pytest.approx(0.219272, abs=5e-7)
    assert float(fam.kendall_tau((3.0,))) == pytest.approx(0.517962, abs=5e-7)
    assert float(fam.kendall_tau((2.0,))) == pytest.approx(2 - np.pi**2 / 6, abs=1e-15)
    k = np.arange(1.0, 200_001.0)
    big_k = k[-1]
    for theta in (1.0, 1.3, 1.9, 1.999999, 2.0, 2.000001, 2.2, 5.0, 30.0):
        terms = 1.0 / (k * (theta * k + 2) * (theta * (k - 1) + 2))
        # Tail beyond K: sum_{k>K} 1/(theta^2 k^3) ~ 1/(2 theta^2 K^2).
        series = 1.0 - 4.0 * (terms.sum() + 1.0 / (2 * theta**2 * big_k**2))
        assert float(fam.kendall_tau((theta,))) == pytest.approx(series, abs=1e-12)


@pytest.mark.parametrize(
    ("name", "expected"),
    [("clayton", 2.0), ("gumbel", 2.0), ("frank", 5.736283), ("joe", 2.856257)],
)
def test_tau_inversion_at_one_half(name, expected):
    # docs/check-values.md section 1, "tau-inversion at tau = 0.5": Clayton 2 tau/(1 - tau) = 2,
    # Gumbel 1/(1 - tau) = 2, Frank 5.736283 and Joe 2.856257 by root finding.
    (theta,) = family(name).params_from_tau(0.5)
    assert float(theta) == pytest.approx(expected, abs=5e-7)


@pytest.mark.parametrize("name", ["gumbel", "frank", "joe"])
def test_tau_inversion_accuracy(name):
    # Round trip through the closed-form tau (Gumbel 1 - 1/theta; Frank and Joe as above):
    # the root finders are accurate to 1e-10 in tau, over the whole range.
    fam = family(name)
    tau = np.concatenate([np.linspace(1e-6, 0.999, 500), [1e-12, 0.3, 0.9999]])
    if name == "frank":
        tau = np.concatenate([tau, -tau, [0.0]])
    (theta,) = fam.params_from_tau(tau)
    np.testing.assert_allclose(fam.kendall_tau((theta,)), tau, rtol=0, atol=1e-10)
    # Frank's tau is odd (radial symmetry; Nelsen 2006, section 5.1), so theta is too.
    if name == "frank":
        np.testing.assert_array_equal(theta[:503], -theta[503:1006])
        assert theta[-1] == 0.0


def test_negative_tau_maps_gumbel_and_joe_to_independence():
    # Gumbel and Joe only reach tau >= 0 (Joe 1997, families B5, B6); below that the nearest
    # member is independence, theta = 1.
    for name in ("gumbel", "joe"):
        (theta,) = family(name).params_from_tau(np.array([-0.4, 0.0]))
        np.testing.assert_array_equal(theta, [1.0, 1.0])


def test_spearman_rho_clayton_gumbel_curiosity():
    # docs/check-values.md section 1: rho_S of Clayton(2) equals rho_S of Gumbel(2) to 30 digits
    # (mpmath), 0.6822338332806563; at tau = 1/3 (Clayton 1, Gumbel 1.5) they differ:
    # 0.478418 vs 0.476661.
    clayton, gumbel = family("clayton"), family("gumbel")
    assert float(clayton.spearman_rho((2.0,))) == pytest.approx(0.6822338332806563, abs=1e-9)
    assert float(gumbel.spearman_rho((2.0,))) == pytest.approx(0.6822338332806563, abs=1e-9)
    (c,) = clayton.params_from_tau(1 / 3)
    (g,) = gumbel.params_from_tau(1 / 3)
    assert float(clayton.spearman_rho((c,))) == pytest.approx(0.478418, abs=5e-7)
    assert float(gumbel.spearman_rho((g,))) == pytest.approx(0.476661, abs=5e-7)


@pytest.mark.parametrize(("name", "theta"), [("gumbel", 1.2), ("gumbel", 6.0), ("gumbel", 30.0),
                                             ("joe", 1.3), ("joe", 5.0), ("joe", 30.0)])
def test_spearman_rho_quadrature_against_adaptive_reference(name, theta):
    # rho_S = 12 int int C(u, v) du dv - 3 (Nelsen 2006, eq. 5.1.15c); Gumbel and Joe use the
    # base class's fixed 200 x 200 Gauss-Legendre rule. Reference: adaptive cubature
    # (scipy.integrate.cubature, Genz-Malik rule) to 1e-10. Asked accuracy is 1e-6; the fixed
    # rule is within 5e-9 over the fit box, largest at theta = 30.
    fam = family(name)
    ref = integrate.cubature(lambda x: fam.cdf(x[:, 0], x[:, 1], (theta,)), [0, 0], [1, 1],
                             rtol=1e-10, atol=1e-12)
    assert ref.status == "converged"
    assert float(fam.spearman_rho((theta,))) == pytest.approx(12 * ref.estimate - 3, abs=1e-8)


# ------------------------------------------------------------------ docs/check-values.md section 2
# Clayton(2) at (0.2, 0.4): C, c, h_{1|2}, h_{2|1}, tau per rotation. Source: Nelsen (2006),
# An Introduction to Copulas, section 2.6 (survival copulas) for the formulas; the 90/270
# labels are a common convention (from memory); values as tabulated in docs/check-values.md section 2.
ROTATION_TABLE = {
    0: (0.181818, 1.164227, 0.093914, 0.751315, 0.5),
    90: (0.016869, 0.755797, 0.121260, 0.109842, -0.5),
    180: (0.147153, 1.330274, 0.241645, 0.680069, 0.5),
    270: (0.006753, 0.467887, 0.033411, 0.097913, -0.5),
}


@pytest.mark.parametrize("rotation", list(ROTATION_TABLE))
def test_clayton_rotation_table(rotation):
    fam = family("clayton", rotation=rotation)
    p = (2.0,)
    got = (fam.cdf(0.2, 0.4, p), fam.pdf(0.2, 0.4, p), fam.h_u_given_v(0.2, 0.4, p),
           fam.h_v_given_u(0.2, 0.4, p), fam.kendall_tau(p))
    np.testing.assert_allclose(np.array(got, dtype=float), ROTATION_TABLE[rotation], rtol=0,
                               atol=5e-7)


@pytest.mark.parametrize(("rotation", "corner"), [(0, (0, 0)), (90, (1, 0)), (180, (1, 1)),
                                                  (270, (0, 1))])
def test_clayton_rotated_tail_corner(rotation, corner):
    # docs/check-values.md section 2: the tail mass 2^(-1/2) = 0.7071 of Clayton(2) sits at (0,0),
    # (1,0), (1,1), (0,1) for rotations 0, 90, 180, 270. Corner probability of a q-square
    # divided by q, from C by inclusion-exclusion (Nelsen 2006, Def. 5.4.1 for the diagonal).
    fam = family("clayton", rotation=rotation)
    p, q = (2.0,), 1e-6
    a = q if corner[0] == 0 else 1 - q
    b = q if corner[1] == 0 else 1 - q
    c = float(fam.cdf(a, b, p))
    mass = {(0, 0): c, (1, 0): b - c, (1, 1): 1 - a - b + c, (0, 1): a - c}[corner]
    assert mass / q == pytest.approx(2**-0.5, abs=2e-3)
    lam = (float(fam.tail_lower(p)), float(fam.tail_upper(p)))
    assert lam == {0: (2**-0.5, 0), 90: (0, 0), 180: (0, 2**-0.5), 270: (0, 0)}[rotation]


# ------------------------------------------------------------------ derivatives of C
FD_CASES = [
    ("clayton", 0, 2.0), ("gumbel", 0, 1.0), ("gumbel", 0, 1.5), ("gumbel", 180, 4.0),
    ("gumbel", 90, 12.0), ("frank", 0, 5.0), ("frank", 0, -7.0), ("frank", 0, 1e-5),
    ("frank", 0, -1e-9), ("frank", 0, 40.0), ("joe", 0, 1.0), ("joe", 0, 2.0),
    ("joe", 270, 6.0), ("joe", 180, 1.2),
]
FD_IDS = [f"{n}-{r}-{t:g}" for n, r, t in FD_CASES]


@pytest.mark.parametrize(("name", "rotation", "theta"), FD_CASES, ids=FD_IDS)
def test_h_and_density_are_derivatives_of_cdf(name, rotation, theta):
    # Nelsen (2006), Thm 2.2.7: dC/dv = P(U <= u | V = v); c = d^2 C / du dv. Central
    # differences of C with step e: truncation O(e^2), rounding O(eps/e) and O(eps/e^2).
    fam = family(name, rotation)
    p = (theta,)
    g = np.array([0.07, 0.2, 0.35, 0.5, 0.64, 0.81, 0.93])
    u, v = np.meshgrid(g, g, indexing="ij")
    e = 1e-6
    dcdv = (fam.cdf(u, v + e, p) - fam.cdf(u, v - e, p)) / (2 * e)
    dcdu = (fam.cdf(u + e, v, p) - fam.cdf(u - e, v, p)) / (2 * e)
    np.testing.assert_allclose(fam.h_u_given_v(u, v, p), dcdv, rtol=0, atol=1e-8)
    np.testing.assert_allclose(fam.h_v_given_u(u, v, p), dcdu, rtol=0, atol=1e-8)
    e = 3e-5
    mixed = (fam.cdf(u + e, v + e, p) - fam.cdf(u + e, v - e, p) - fam.cdf(u - e, v + e, p)
             + fam.cdf(u - e, v - e, p)) / (4 * e * e)
    # On the density scale everywhere (the second difference carries ~1e-6 of rounding), and
    # on the log scale where the density is not small.
    log_c = fam.logpdf(u, v, p)
    np.testing.assert_allclose(np.exp(log_c), mixed, rtol=1e-5, atol=2e-6)
    big = mixed > 0.05
    np.testing.assert_allclose(log_c[big], np.log(mixed[big]), rtol=0, atol=1e-4)


def test_frank_near_independence():
    # Frank tends to independence as theta -> 0 with first-order term
    # C = uv[1 + (theta/2)(1-u)(1-v)] (expansion of the closed form, Nelsen 2006, section 4.2;
    # Frank is then the FGM copula to first order), so c = 1 + (theta/2)(1-2u)(1-2v) + O(theta^2),
    # tau = theta/9 + O(theta^3) and rho_S = theta/6 + O(theta^3).
    fam = family("frank")
    g = np.array([1e-10, 0.1, 0.5, 0.77, 1 - 1e-10])
    u, v = np.meshgrid(g, g, indexing="ij")
    # The remainders are O(theta^2); 5e-14 allows for rounding in the closed forms, whose
    # log-density is a sum of logs of size |ln theta|.
    for theta in (-1e-5, -1e-7, -1e-9, 0.0, 1e-9, 1e-7, 1e-5):
        p = (theta,)
        first = 0.5 * theta * (1 - 2 * u) * (1 - 2 * v)
        np.testing.assert_allclose(fam.logpdf(u, v, p), first, rtol=0, atol=theta**2 + 5e-14)
        np.testing.assert_allclose(fam.cdf(u, v, p), u * v * (1 + 0.5 * theta * (1 - u) * (1 - v)),
                                   rtol=1e-15 + theta**2, atol=1e-18)
        np.testing.assert_allclose(fam.h_u_given_v(u, v, p),
                                   u + 0.5 * theta * u * (1 - u) * (1 - 2 * v),
                                   rtol=0, atol=theta**2 + 1e-16)
        assert float(fam.kendall_tau(p)) == pytest.approx(theta / 9, rel=1e-14,
                                                          abs=abs(theta) ** 3 / 800)
        assert float(fam.spearman_rho(p)) == pytest.approx(theta / 6, rel=1e-14,
                                                           abs=abs(theta) ** 3 / 400)
    # Across the switch from the Maclaurin series to the closed form (|theta| = 0.5): the
    # Taylor polynomial theta/9 - theta^3/900 + theta^5/52920 (from t/(e^t-1) = sum B_n t^n/n!,
    # Abramowitz & Stegun 1964, 23.1.1) with its next term as the error bound, and the
    # definition tau = 1 - (4/theta)[1 - D_1(theta)] integrated by scipy.integrate.quad.
    for theta in (0.02, 0.1, 0.3, 0.5 * (1 - 1e-12), 0.5 * (1 + 1e-12), 0.7, -0.5):
        tau = float(fam.kendall_tau((theta,)))
        taylor = theta / 9 - theta**3 / 900 + theta**5 / 52920
        assert tau == pytest.approx(taylor, abs=abs(theta) ** 7 / 2.7e6 + 1e-17)
        d1 = integrate.quad(lambda t: t / np.expm1(t), 0.0, theta, epsabs=0,
                            epsrel=1e-13)[0] / theta
        assert tau == pytest.approx(1 - 4 / theta * (1 - d1), abs=2e-14)


# ------------------------------------------------------------------ numerics at the edges
EDGE_CASES = [
    ("gumbel", r, t) for r in (0, 90, 180, 270) for t in (1.0, 30.0)
] + [("joe", r, t) for r in (0, 90, 180, 270) for t in (1.0, 30.0)] + [
    ("frank", 0, t) for t in (-45.0, 45.0, -1e-5, 1e-5, 0.0)
]


@pytest.mark.parametrize(("name", "rotation", "theta"), EDGE_CASES,
                         ids=[f"{n}-{r}-{t:g}" for n, r, t in EDGE_CASES])
def test_finite_at_corners_and_ends_of_fit_box(name, rotation, theta):
    # Requirement of the rolling fitter: finite log-densities for u, v within 1e-10 of 0 or 1 at
    # both ends of the fit box (no source; a numerical property of the implementation).
    fam = family(name, rotation)
    g = np.array([1e-10, 1 - 1e-10])
    u, v = np.meshgrid(g, g, indexing="ij")
    p = (theta,)
    assert np.all(np.isfinite(fam.logpdf(u, v, p)))
    for h in (fam.h_u_given_v(u, v, p), fam.h_v_given_u(u, v, p),
              fam.h_u_given_v_inverse(u, v, p), fam.h_v_given_u_inverse(u, v, p)):
        assert np.all(np.isfinite(h)) and np.all((h >= 0) & (h <= 1))
    c = fam.cdf(u, v, p)
    assert np.all((c >= np.maximum(u + v - 1, 0)) & (c <= np.minimum(u, v)))


@pytest.mark.parametrize(("name", "theta"), [("gumbel", 1.0), ("gumbel", 1.0001), ("gumbel", 2.0),
                                             ("gumbel", 30.0), ("joe", 1.0), ("joe", 1.0001),
                                             ("joe", 2.0), ("joe", 30.0), ("frank", -45.0),
                                             ("frank", 1e-5), ("frank", 5.0), ("frank", 45.0)])
def test_h_inverse_round_trip(name, theta):
    # h(h^-1(w | v) | v) = w to 1e-10 (the definition of an inverse), for w across (0, 1)
    # including 1e-10 from the ends and conditioning values v in [1e-3, 1 - 1e-3]. Closer to
    # the corners the h-function changes by more than 1e-10 per double-precision step in u,
    # so no inverse can do better there.
    fam = family(name)
    w = np.concatenate([[1e-10, 1e-6], np.linspace(0.01, 0.99, 25), [1 - 1e-6, 1 - 1e-10]])
    cond = np.concatenate([[1e-3], np.linspace(0.02, 0.98, 13), [1 - 1e-3]])
    ww, vv = np.meshgrid(w, cond, indexing="ij")
    u = fam.h_u_given_v_inverse(ww, vv, (theta,))
    np.testing.assert_allclose(fam.h_u_given_v(u, vv, (theta,)), ww, rtol=0, atol=1e-10)
    v = fam.h_v_given_u_inverse(ww, vv, (theta,))
    np.testing.assert_allclose(fam.h_v_given_u(vv, v, (theta,)), ww, rtol=0, atol=1e-10)


@pytest.mark.parametrize("name", ["gumbel", "frank", "joe"])
def test_parameters_broadcast_over_windows(name):
    # Parameters of shape (windows, 1) against data of shape (windows, n): each row equals the
    # scalar evaluation (the contract of monitor.stats.copulas.base).
    fam = family(name)
    thetas = {"gumbel": [1.0, 1.7, 9.0], "frank": [-8.0, 0.0, 3.0], "joe": [1.0, 2.5, 12.0]}[name]
    rng = np.random.default_rng(3)
    u = rng.uniform(0.01, 0.99, (3, 6))
    v = rng.uniform(0.01, 0.99, (3, 6))
    pw = (np.array(thetas)[:, None],)
    for method in ("cdf", "logpdf", "h_u_given_v", "h_v_given_u", "h_u_given_v_inverse",
                   "h_v_given_u_inverse"):
        batch = getattr(fam, method)(u, v, pw)
        assert batch.shape == (3, 6)
        for i, t in enumerate(thetas):
            np.testing.assert_allclose(batch[i], getattr(fam, method)(u[i], v[i], (t,)),
                                       rtol=1e-12, atol=1e-15)
    tau = fam.kendall_tau(pw)
    assert tau.shape == (3, 1)
    (back,) = fam.params_from_tau(tau)
    np.testing.assert_allclose(back, pw[0], rtol=1e-9, atol=1e-12)


# ------------------------------------------------------------------ sampling
SAMPLE_CASES = [("gumbel", 0, 2.0), ("gumbel", 180, 1.0), ("gumbel", 90, 30.0),
                ("frank", 0, 5.0), ("frank", 0, -12.0), ("joe", 0, 2.0), ("joe", 270, 8.0)]


@pytest.mark.parametrize(("name", "rotation", "theta"), SAMPLE_CASES,
                         ids=[f"{n}-{r}-{t:g}" for n, r, t in SAMPLE_CASES])
def test_sampled_tau_matches_implied(name, rotation, theta):
    # Sample Kendall's tau (scipy.stats.kendalltau) against the implied tau. Tolerance: four
    # standard errors, the s.e. from the influence function of tau_n, 8C(u,v) - 4u - 4v + 2 - 2 tau
    # (docs/check-values.md section 3, derived there from the U-statistic projection; Hoeffding 1948),
    # evaluated at the sample.
    fam = family(name, rotation)
    p = (theta,)
    n = 20_000
    uv = fam.sample(n, p, rng=np.random.default_rng(20240601))
    assert uv.shape == (n, 2)
    assert np.all((uv > 0) & (uv < 1))
    tau = float(fam.kendall_tau(p))
    influence = 8 * fam.cdf(uv[:, 0], uv[:, 1], p) - 4 * uv[:, 0] - 4 * uv[:, 1] + 2 - 2 * tau
    se = np.std(influence) / np.sqrt(n)
    tau_hat = stats.kendalltau(uv[:, 0], uv[:, 1]).statistic
    assert abs(tau_hat - tau) <= 4 * se + 1e-12
    # Margins are uniform (Kolmogorov-Smirnov, scipy.stats.kstest), at the 0.1% level.
    assert stats.kstest(uv[:, 0], "uniform").pvalue > 1e-3
    assert stats.kstest(uv[:, 1], "uniform").pvalue > 1e-3


def test_sample_is_reproducible():
    fam = family("gumbel")
    a = fam.sample(100, (3.0,), rng=7)
    b = fam.sample(100, (3.0,), rng=np.random.default_rng(7))
    np.testing.assert_array_equal(a, b)


# ------------------------------------------------------------------ validation
def test_invalid_parameters_and_rotations():
    with pytest.raises(ValueError, match=r"gumbel copula parameter theta=0.5 is outside \[1.0, inf\)"):
        family("gumbel").logpdf(0.5, 0.5, (0.5,))
    with pytest.raises(ValueError, match=r"joe copula parameter theta=nan is outside"):
        family("joe").cdf(0.5, 0.5, (np.nan,))
    with pytest.raises(ValueError, match="frank copula does not support rotation 180"):
        family("frank", rotation=180)
    with pytest.raises(ValueError, match=r"tau must lie in \(-1, 1\)"):
        family("frank").params_from_tau(1.0)
