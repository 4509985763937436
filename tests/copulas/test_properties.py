"""One generic property suite run over every family and rotation (cases in ``cases.py``).

The properties are the defining ones of a bivariate copula (Nelsen 2006, *An Introduction to
Copulas*, 2nd ed.): grounded with uniform margins (Def. 2.2.2), 2-increasing, inside the
Frechet-Hoeffding bounds W <= C <= M (Thm 2.2.3), h-functions equal to the partial derivatives
(Thm 2.2.7), density = mixed partial derivative integrating to one, and the tau/parameter maps
consistent with sampling.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.stats.copulas import FAMILY_NAMES, CopulaFamily, family
from monitor.stats.empirical import kendall_tau as sample_kendall_tau

from .cases import all_cases, case_id

CASES = all_cases()
IDS = [case_id(c) for c in CASES]
GRID = np.linspace(0.02, 0.98, 25)
U, V = np.meshgrid(GRID, GRID, indexing="ij")


def _fam(case):
    name, rotation, params = case
    return family(name, rotation), params


def test_every_family_and_rotation_is_covered():
    names = {c[0] for c in CASES}
    assert names == set(FAMILY_NAMES)
    for name in FAMILY_NAMES:
        for r in family(name).rotations:
            assert any(c[0] == name and c[1] == r for c in CASES), (name, r)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_frechet_hoeffding_bounds_and_margins(case):
    fam, p = _fam(case)
    c = fam.cdf(U, V, p)
    # Frechet-Hoeffding bounds, Nelsen (2006) Thm 2.2.3.
    assert np.all(c >= np.maximum(U + V - 1, 0) - 1e-12)
    assert np.all(c <= np.minimum(U, V) + 1e-12)
    # Uniform margins and groundedness, Nelsen (2006) Def. 2.2.2.
    np.testing.assert_allclose(fam.cdf(GRID, 1.0, p), GRID, atol=1e-9)
    np.testing.assert_allclose(fam.cdf(1.0, GRID, p), GRID, atol=1e-9)
    np.testing.assert_allclose(fam.cdf(GRID, 0.0, p), 0.0, atol=1e-9)
    np.testing.assert_allclose(fam.cdf(0.0, GRID, p), 0.0, atol=1e-9)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_h_functions_are_partial_derivatives(case):
    # h_{2|1} = dC/du and h_{1|2} = dC/dv (Nelsen 2006, Thm 2.2.7), central differences.
    fam, p = _fam(case)
    e = 1e-6
    g = GRID[2:-2]
    u, v = np.meshgrid(g, g, indexing="ij")
    dcdu = (fam.cdf(u + e, v, p) - fam.cdf(u - e, v, p)) / (2 * e)
    dcdv = (fam.cdf(u, v + e, p) - fam.cdf(u, v - e, p)) / (2 * e)
    np.testing.assert_allclose(fam.h_v_given_u(u, v, p), dcdu, atol=2e-5)
    np.testing.assert_allclose(fam.h_u_given_v(u, v, p), dcdv, atol=2e-5)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_density_is_mixed_partial_of_h(case):
    fam, p = _fam(case)
    e = 1e-6
    g = GRID[2:-2]
    u, v = np.meshgrid(g, g, indexing="ij")
    d = (fam.h_u_given_v(u + e, v, p) - fam.h_u_given_v(u - e, v, p)) / (2 * e)
    np.testing.assert_allclose(fam.pdf(u, v, p), d, rtol=1e-4, atol=1e-5)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_h_inverse_round_trip(case):
    fam, p = _fam(case)
    w = np.clip(GRID[None, :] + 0 * GRID[:, None], 1e-9, 1 - 1e-9)
    cond = GRID[:, None] + 0 * w
    v = fam.h_v_given_u_inverse(w, cond, p)
    np.testing.assert_allclose(fam.h_v_given_u(cond, v, p), w, atol=1e-9)
    u = fam.h_u_given_v_inverse(w, cond, p)
    np.testing.assert_allclose(fam.h_u_given_v(u, cond, p), w, atol=1e-9)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_density_integrates_to_one_and_matches_rectangle_volumes(case):
    fam, p = _fam(case)
    # Total mass by the trapezoid rule in logit coordinates u = 1/(1+exp(-z)), which tames the
    # corner singularities of tail-dependent densities.
    z = np.linspace(-23, 23, 601)
    x = 1 / (1 + np.exp(-z))
    jac = x * (1 - x)
    uu, vv = np.meshgrid(x, x, indexing="ij")
    f = fam.pdf(uu, vv, p) * jac[:, None] * jac[None, :]
    total = np.trapezoid(np.trapezoid(f, z, axis=1), z)
    assert total == pytest.approx(1.0, abs=3e-3)
    # Mass of a rectangle = its C-volume V_C([a,b]x[c,d]) (Nelsen 2006, Def. 2.1.1).
    a, b, c, d = 0.2, 0.6, 0.3, 0.9
    s = np.linspace(a, b, 201)
    t = np.linspace(c, d, 201)
    ss, tt = np.meshgrid(s, t, indexing="ij")
    mass = np.trapezoid(np.trapezoid(fam.pdf(ss, tt, p), t, axis=1), s)
    vol = fam.cdf(b, d, p) - fam.cdf(a, d, p) - fam.cdf(b, c, p) + fam.cdf(a, c, p)
    assert mass == pytest.approx(vol, abs=2e-4)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_tau_to_params_to_tau(case):
    fam, p = _fam(case)
    tau = float(fam.kendall_tau(p))
    start = fam.start_params(tau)
    if fam.n_params == 1:
        # One-parameter families: tau inversion is exact.
        np.testing.assert_allclose([float(a) for a in start], p, rtol=1e-7, atol=1e-9)
    if fam.n_params:
        # Every starting rule reproduces the tau it was given.
        assert float(fam.kendall_tau(start)) == pytest.approx(tau, abs=1e-7)
    # Numerical tau (Nelsen 2006, Thm 5.1.1: tau = 1 - 4 int int dC/du dC/dv) agrees with the
    # family's own (closed form where one exists).
    num = float(type(fam)._kendall_tau(fam, fam.as_params(p)))
    base = float(CopulaFamily._kendall_tau(fam, fam.as_params(p)))
    assert num == pytest.approx(base, abs=2e-3)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_sampled_tau_matches_implied(case):
    fam, p = _fam(case)
    n = 4000
    uv = fam.sample(n, p, rng=np.random.default_rng(12345))
    assert uv.shape == (n, 2)
    assert np.all((uv > 0) & (uv < 1))
    tau_hat = float(sample_kendall_tau(uv[:, 0], uv[:, 1]))
    # The asymptotic s.d. of the sample tau is at most about sqrt(4/(9n)) (its value under
    # independence, Kendall 1938) for these moderate dependences -- common practice bound,
    # with a 5-sigma allowance.
    assert tau_hat == pytest.approx(float(fam.kendall_tau(p)), abs=5 * np.sqrt(4 / (9 * n)))


_CDF_TAILS = {"clayton", "gumbel", "joe", "bb1", "bb7", "frank", "independence"}


@pytest.mark.parametrize("case", [c for c in CASES if c[0] in _CDF_TAILS],
                         ids=[case_id(c) for c in CASES if c[0] in _CDF_TAILS])
def test_tail_coefficients_are_diagonal_limits(case):
    # lambda_L = lim C(q,q)/q, lambda_U = lim (1 - 2(1-q) + C(1-q,1-q))/q (Nelsen 2006, Def. 5.4.1).
    fam, p = _fam(case)

    def lower(q):
        return float(fam.cdf(q, q, p)) / q

    def upper(q):
        return (1 - 2 * (1 - q) + float(fam.cdf(1 - q, 1 - q, p))) / q

    for ratio, limit in ((lower, float(fam.tail_lower(p))), (upper, float(fam.tail_upper(p)))):
        if limit > 0:
            assert ratio(1e-7) == pytest.approx(limit, abs=0.02)
        else:
            # A zero limit can be approached slowly (Gumbel's lower tail like
            # q^(2^(1/theta) - 1), as the reference sheet notes): require a clear decrease.
            assert ratio(1e-12) < max(0.05, 0.5 * ratio(1e-4))


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_broadcasting_over_windows(case):
    # Parameters of shape (windows, 1) against data of shape (windows, n): each row must equal
    # the scalar evaluation.
    fam, p = _fam(case)
    rng = np.random.default_rng(7)
    u = rng.uniform(0.01, 0.99, size=(3, 5))
    v = rng.uniform(0.01, 0.99, size=(3, 5))
    pw = tuple(np.full((3, 1), x) for x in p)
    np.testing.assert_allclose(fam.logpdf(u, v, pw), fam.logpdf(u, v, p), rtol=1e-12)
    np.testing.assert_allclose(fam.cdf(u, v, pw), fam.cdf(u, v, p), rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(fam.rotated_logpdf(u, v, fam.as_params(pw)),
                               fam.logpdf(u, v, p), rtol=1e-12)


CORNERS = [1e-10, 0.5, 1 - 1e-10]


def _param_strategy(fam):
    return st.tuples(*[st.floats(lo, hi, allow_nan=False) for lo, hi in fam.fit_bounds])


@pytest.mark.parametrize("name", [n for n in FAMILY_NAMES if n != "independence"])
@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_logpdf_and_h_finite_at_extremes(name, data):
    rotation = data.draw(st.sampled_from(family(name).rotations))
    fam = family(name, rotation)
    p = data.draw(_param_strategy(fam))
    if name == "frank" and abs(p[0]) < 1e-12:
        p = (1e-12,)
    u = data.draw(st.one_of(st.sampled_from(CORNERS), st.floats(1e-10, 1 - 1e-10)))
    v = data.draw(st.one_of(st.sampled_from(CORNERS), st.floats(1e-10, 1 - 1e-10)))
    assert np.isfinite(fam.logpdf(u, v, p))
    for h in (fam.h_u_given_v(u, v, p), fam.h_v_given_u(u, v, p)):
        assert np.isfinite(h) and -1e-12 <= h <= 1 + 1e-12
    c = fam.cdf(u, v, p)
    assert max(u + v - 1, 0) - 1e-12 <= c <= min(u, v) + 1e-12


@pytest.mark.parametrize("name", FAMILY_NAMES)
@settings(max_examples=40, deadline=None)
@given(data=st.data())
def test_two_increasing_on_random_rectangles(name, data):
    fam = family(name, data.draw(st.sampled_from(family(name).rotations)))
    lo_hi = [st.floats(lo, hi, allow_nan=False) for lo, hi in fam.fit_bounds]
    # Keep clear of the far ends, where the cdf is a difference of nearly equal numbers.
    p = tuple(data.draw(s) for s in lo_hi)
    p = tuple(min(x, 12.0) if fam.fit_bounds[i][1] > 12 else x for i, x in enumerate(p))
    if name == "frank" and abs(p[0]) < 1e-6:
        p = (1e-6,)
    a, b = sorted(data.draw(st.tuples(st.floats(0.01, 0.99), st.floats(0.01, 0.99))))
    c, d = sorted(data.draw(st.tuples(st.floats(0.01, 0.99), st.floats(0.01, 0.99))))
    vol = fam.cdf(b, d, p) - fam.cdf(a, d, p) - fam.cdf(b, c, p) + fam.cdf(a, c, p)
    assert vol >= -1e-9


def test_registry_errors():
    with pytest.raises(ValueError, match="unknown copula family 'claytn'"):
        family("claytn")
    with pytest.raises(ValueError, match="does not support rotation 90"):
        family("frank", 90)
    with pytest.raises(ValueError, match=r"theta=-1.0 is outside \(0.0, inf\)"):
        family("clayton").cdf(0.5, 0.5, (-1.0,))
    with pytest.raises(ValueError, match=r"u must lie in \(0, 1\)"):
        family("clayton").logpdf(0.0, 0.5, (1.0,))
    with pytest.raises(ValueError, match="takes 2 parameter"):
        family("student_t").logpdf(0.5, 0.5, (0.5,))
    with pytest.raises(TypeError, match="rotation must be an int"):
        family("clayton", 90.0)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_estimator_likelihood_equals_density_sum(case):
    # The estimator's prepared log-likelihood (cached transforms, plain-space shortcuts) must
    # equal the sum of the public log-density, including points within 1e-12 of the edges.
    fam, p = _fam(case)
    rng = np.random.default_rng(17)
    u = rng.uniform(0.001, 0.999, size=(3, 40))
    v = rng.uniform(0.001, 0.999, size=(3, 40))
    u[0, :4] = [1e-12, 1 - 1e-12, 1e-12, 0.5]
    v[0, :4] = [1e-12, 1 - 1e-12, 1 - 1e-12, 1e-12]
    pw = tuple(np.full(3, x) for x in p)
    direct = np.sum(fam.logpdf(u, v, tuple(a[:, None] for a in pw)), axis=1)
    fast = fam.loglik_prepared(fam.prepare(u, v), pw)
    np.testing.assert_allclose(fast, direct, rtol=1e-10, atol=1e-8)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_estimator_likelihood_on_ranks_with_and_without_a_shared_grid(case):
    # Pseudo-observations without ties lie on the grid i/(n+1); families that exploit it
    # (cached grid transforms, rotated ranks n-1-r) must give the sum of the public
    # log-density, whether they find the ranks themselves or are handed those of the
    # unrotated data, as select_batched does once for all slots.
    from monitor.stats.copulas.base import rank_grid

    fam, p = _fam(case)
    rng = np.random.default_rng(23)
    n, rows = 60, 4
    u = np.array([rng.permutation(n) + 1 for _ in range(rows)]) / (n + 1.0)
    v = np.array([rng.permutation(n) + 1 for _ in range(rows)]) / (n + 1.0)
    pw = tuple(np.full(rows, x) for x in p)
    direct = np.sum(fam.logpdf(u, v, tuple(a[:, None] for a in pw)), axis=1)
    # The t copula interpolates its grid quantiles in 1/nu (about 1e-10 relative, see
    # elliptical._QuantileTable): a few 1e-9 over 60 points.
    atol = 1e-8 if fam.name == "student_t" else 1e-10
    for grid in (None, (rank_grid(u), rank_grid(v))):
        fast = fam.loglik_prepared(fam.prepare(u, v, grid), pw)
        np.testing.assert_allclose(fast, direct, rtol=1e-11, atol=atol)


@pytest.mark.parametrize("name", ["clayton", "gumbel", "joe", "bb1", "bb7", "student_t"])
def test_grid_likelihood_at_and_past_the_fit_box_ends(name):
    # The grid kernels work in plain space while the powers stay in range and fall back to
    # the log-space forms past it (Clayton u^-200, Gumbel (-ln u)^500, Joe (1-u)^200 leave
    # it at n = 250); every case must equal the public log-density's sum.
    from monitor.stats.copulas.base import rank_grid

    fam = family(name)
    rng = np.random.default_rng(29)
    n, rows = 250, 3
    u = np.array([rng.permutation(n) + 1 for _ in range(rows)]) / (n + 1.0)
    v = np.array([rng.permutation(n) + 1 for _ in range(rows)]) / (n + 1.0)
    u[0, :] = v[0, :]  # a comonotone window: both at the top ranks together
    far = {"clayton": [(200.0,)], "gumbel": [(500.0,)], "joe": [(200.0,)]}.get(name, [])
    for p in [*itertools.product(*fam.fit_bounds), *far]:
        pw = tuple(np.full(rows, x) for x in p)
        direct = np.sum(fam.logpdf(u, v, tuple(a[:, None] for a in pw)), axis=1)
        fast = fam.loglik_prepared(fam.prepare(u, v, (rank_grid(u), rank_grid(v))), pw)
        atol = 1e-7 if name == "student_t" else 1e-9
        np.testing.assert_allclose(fast, direct, rtol=1e-10, atol=atol, err_msg=str(p))
