"""One-parameter Archimedean families: Clayton, Gumbel, Frank and Joe.

Closed forms from Joe (1997), *Multivariate Models and Dependence Concepts*, section 5.1
(families B4 Clayton, B6 Gumbel, B3 Frank, B5 Joe) and Nelsen (2006), chapter 4. Every formula
is written in log space where powers of u or v can overflow, so log-densities stay finite for
u, v within 1e-10 of 0 or 1 and parameters at the ends of the fit box.
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
from scipy import special

from .base import QUAD_NODES, QUAD_WEIGHTS, UNIT_EPS, CopulaFamily, GridData, gather
from .logmath import log1mexp, log_expm1, logaddexp

_ROTATIONS = (0, 90, 180, 270)


#: Below this, log(exp(a) + exp(b) - 1) is summed in plain space (expm1, log1p).
_PLAIN_LOG = 30.0


def _log_sum_minus_one(la, lb):
    """log(exp(la) + exp(lb) - 1) for la, lb >= 0, without overflow, and with relative
    accuracy when both are tiny (Clayton near independence): ``log1p(expm1(la) +
    expm1(lb))`` below :data:`_PLAIN_LOG`, the shifted form above it."""
    la, lb = np.broadcast_arrays(np.asarray(la, dtype=float), np.asarray(lb, dtype=float))
    m = np.maximum(la, lb)
    small = m < _PLAIN_LOG
    with np.errstate(over="ignore"):
        plain = np.log1p(np.expm1(np.where(small, la, 0.0)) + np.expm1(np.where(small, lb, 0.0)))
    big = m + np.log(np.exp(la - m) + np.exp(lb - m) - np.exp(-m))
    return np.where(small, plain, big)


class Clayton(CopulaFamily):
    """Clayton copula C(u, v) = (u^-theta + v^-theta - 1)^(-1/theta), theta > 0.

    Lower tail dependence 2^(-1/theta), none in the upper tail; tau = theta / (theta + 2)
    (Joe 1997, family B4; Nelsen 2006, example 5.4).
    """

    name = "clayton"
    param_names = ("theta",)
    domain = ((0.0, np.inf),)
    domain_open = ((True, True),)
    # theta's lower end is near its limit 0 (independence), which the density reaches
    # without loss of accuracy (_log_sum_minus_one's plain branch).
    fit_bounds = ((1e-10, 30.0),)
    rotations = _ROTATIONS

    def _log_s(self, u, v, theta):
        return _log_sum_minus_one(-theta * np.log(u), -theta * np.log(v))

    def _cdf(self, u, v, p):
        (theta,) = p
        return np.exp(-self._log_s(u, v, theta) / theta)

    def _logpdf(self, u, v, p):
        (theta,) = p
        lu, lv = np.log(u), np.log(v)
        log_s = _log_sum_minus_one(-theta * lu, -theta * lv)
        return np.log1p(theta) - (theta + 1.0) * (lu + lv) - (1.0 / theta + 2.0) * log_s

    def _h_u_given_v(self, u, v, p):
        (theta,) = p
        return np.exp(-(theta + 1.0) * np.log(v) - (1.0 / theta + 1.0) * self._log_s(u, v, theta))

    def _h_u_given_v_inverse(self, w, v, p):
        # Solve v^(-theta-1) s^(-1/theta-1) = w for u: u^-theta = 1 + v^-theta (w^(-theta/(1+theta)) - 1).
        (theta,) = p
        log_term = -theta * np.log(v) + np.log(np.expm1(-theta / (1.0 + theta) * np.log(w)))
        return np.exp(-logaddexp(0.0, log_term) / theta)

    def _kendall_tau(self, p):
        (theta,) = p
        return theta / (theta + 2.0)

    def prepare(self, u, v, grid=None):
        data = self._grid_data(u, v, grid, lambda points: np.log(points))
        if data is not None:
            return data
        ru, rv = self._rotate_uv(u, v)
        lu, lv = np.log(ru), np.log(rv)
        return lu, lv, np.sum(lu + lv, axis=-1)

    def loglik_prepared(self, data, p):
        (theta,) = p
        if isinstance(data, GridData):
            # On the rank grid s = 1 + x_u + x_v with x = u^-theta - 1 (expm1: relative
            # accuracy near u = 1), a sum of positive numbers, in plain space; past its range
            # (x overflows), the log-space form below on the gathered logs.
            lg = data.table
            with np.errstate(over="ignore"):
                x = np.expm1(-theta[:, None] * lg)
            log_s = np.log1p(gather(x, data.ru) + gather(x, data.rv))
            out = (lg.size * np.log1p(theta) - (theta + 1.0) * 2.0 * lg.sum()
                   - (1.0 / theta + 2.0) * np.sum(log_s, axis=-1))
            if np.all(np.isfinite(out)):
                return out
            lu, lv = lg[data.ru], lg[data.rv]
            data = lu, lv, np.sum(lu + lv, axis=-1)
        lu, lv, sum_log = data
        log_s = _log_sum_minus_one(-theta[:, None] * lu, -theta[:, None] * lv)
        n = lu.shape[-1]
        return n * np.log1p(theta) - (theta + 1.0) * sum_log - (1.0 / theta + 2.0) * np.sum(
            log_s, axis=-1)

    def _params_from_tau(self, tau):
        return (2.0 * tau / (1.0 - tau),)

    def _tail_lower(self, p):
        (theta,) = p
        return 2.0 ** (-1.0 / theta)


# ---------------------------------------------------------------------- shared numerics
def _newton_increasing(fun, x0, lo, hi, *, rtol: float = 1e-13, atol: float = 0.0,
                       max_iter: int = 100):
    """Elementwise root of an increasing function by Newton's method safeguarded by a bracket.

    ``fun(x)`` returns ``(f, df)`` with ``f`` increasing in ``x``; ``lo`` and ``hi`` are finite
    with ``f(lo) <= 0 <= f(hi)``. A Newton step that leaves the current bracket (or is not
    finite) is replaced by bisection, so convergence is guaranteed; for convex or concave ``f``
    started on the right side of the root the Newton steps never leave the bracket and
    converge monotonically and quadratically. Stops per element once the step is below
    ``rtol * |x| + atol``, or once small steps stop shrinking, which means ``f`` is at its
    rounding-noise floor.
    """
    x, lo, hi = (np.array(a, dtype=float) for a in np.broadcast_arrays(x0, lo, hi))
    active = np.ones(x.shape, dtype=bool)
    previous = np.full(x.shape, np.inf)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for _ in range(max_iter):
            f, df = fun(x)
            lo = np.where(f < 0, x, lo)
            hi = np.where(f > 0, x, hi)
            step = np.where(f == 0, 0.0, f / df)
            size = np.abs(step)
            tol = rtol * np.abs(x) + atol
            done = (size <= tol) | (hi - lo <= tol)
            done |= (size <= 1e3 * tol) & (size >= 0.5 * previous)
            previous = np.where(np.isfinite(size), size, np.inf)
            x_new = x - step
            bad = ~done & (~np.isfinite(x_new) | (x_new <= lo) | (x_new >= hi))
            x_new = np.where(bad, 0.5 * (lo + hi), x_new)
            x = np.where(active, x_new, x)
            active &= ~done
            if not active.any():
                break
    return x


def _clip_unit(x):
    return np.clip(x, UNIT_EPS, 1.0 - UNIT_EPS)


def _upper_tail_gumbel_joe(theta):
    """lambda_U = 2 - 2^(1/theta), shared by Gumbel and Joe (Joe 1997, families B5, B6)."""
    return 2.0 - np.exp2(1.0 / theta)


class Gumbel(CopulaFamily):
    """Gumbel copula C(u, v) = exp{-[(-ln u)^theta + (-ln v)^theta]^(1/theta)}, theta >= 1.

    An extreme-value copula with upper tail dependence 2 - 2^(1/theta) and none in the lower
    tail; tau = 1 - 1/theta; theta = 1 is independence (Joe 1997, family B6; Nelsen 2006,
    section 4.2, the Gumbel-Hougaard family).
    """

    name = "gumbel"
    param_names = ("theta",)
    domain = ((1.0, np.inf),)
    domain_open = ((False, True),)
    fit_bounds = ((1.0, 30.0),)
    rotations = _ROTATIONS

    @staticmethod
    def _parts(u, v, theta):
        # x = -ln u, y = -ln v; A = x^theta + y^theta in logs; m = A^(1/theta).
        lx, ly = np.log(-np.log(u)), np.log(-np.log(v))
        log_a = logaddexp(theta * lx, theta * ly)
        return lx, ly, log_a, np.exp(log_a / theta)

    def _cdf(self, u, v, p):
        (theta,) = p
        return np.exp(-self._parts(u, v, theta)[3])

    @staticmethod
    def _log_density_core(lx, ly, theta):
        # The theta-dependent part of log c that does not split over u and v:
        # (1/theta - 2) ln A - m + ln(m + theta - 1).
        log_a = logaddexp(theta * lx, theta * ly)
        m = np.exp(log_a / theta)
        return (1.0 / theta - 2.0) * log_a - m + np.log(m + (theta - 1.0))

    def _logpdf(self, u, v, p):
        # log c = -m - ln u - ln v + (theta-1)(ln x + ln y) + (1/theta - 2) ln A + ln(m + theta - 1),
        # which is Joe's density with A^(-1/theta)(1 + (theta-1)A^(-1/theta)) folded into logs.
        (theta,) = p
        lx, ly = np.log(-np.log(u)), np.log(-np.log(v))
        return (np.exp(lx) + np.exp(ly) + (theta - 1.0) * (lx + ly)
                + self._log_density_core(lx, ly, theta))

    def prepare(self, u, v, grid=None):
        # The double logs and the sums that do not involve theta are computed once per fit.
        data = self._grid_data(u, v, grid, lambda points: np.log(-np.log(points)))
        if data is not None:
            return data
        ru, rv = self._rotate_uv(u, v)
        lx, ly = np.log(-np.log(ru)), np.log(-np.log(rv))
        return lx, ly, np.sum(np.exp(lx) + np.exp(ly), axis=-1), np.sum(lx + ly, axis=-1)

    def loglik_prepared(self, data, p):
        (theta,) = p
        t = theta[:, None]
        if isinstance(data, GridData):
            # On the rank grid A = x^theta + y^theta in plain space (a sum of positive
            # numbers); past its range, the log-space core on the gathered logs.
            lx = data.table
            with np.errstate(all="ignore"):
                power = np.exp(t * lx)
                log_a = np.log(gather(power, data.ru) + gather(power, data.rv))
                m = np.exp(log_a / t)
                core = (1.0 / t - 2.0) * log_a - m + np.log(m + (t - 1.0))
            out = 2.0 * (np.exp(lx).sum() + (theta - 1.0) * lx.sum()) + np.sum(core, axis=-1)
            if np.all(np.isfinite(out)):
                return out
            at_u, at_v = lx[data.ru], lx[data.rv]
            data = (at_u, at_v, np.sum(np.exp(at_u) + np.exp(at_v), axis=-1),
                    np.sum(at_u + at_v, axis=-1))
        lx, ly, sum_xy, sum_log = data
        core = self._log_density_core(lx, ly, t)
        return sum_xy + (theta - 1.0) * sum_log + np.sum(core, axis=-1)

    def _h_u_given_v(self, u, v, p):
        # h = C v^-1 y^(theta-1) A^(1/theta-1); note -ln v = y.
        (theta,) = p
        _, ly, log_a, m = self._parts(u, v, theta)
        # Rounding in the logs can push h a few ulps above 1 near u = 1.
        return np.minimum(
            np.exp(-m + np.exp(ly) + (theta - 1.0) * ly + (1.0 / theta - 1.0) * log_a), 1.0)

    def _h_u_given_v_inverse(self, w, v, p):
        # With m = A^(1/theta) >= y, ln h = -m + y + (theta-1) ln y + (1-theta) ln m, so
        # h = w is the scalar equation e^t + (theta-1) t = r in t = ln m, r = y - ln w +
        # (theta-1) ln y. Its left side is increasing and convex, so Newton from the right of
        # the root converges monotonically. Two right-hand starts bound the root: dropping
        # (theta-1)(t - ln y) >= 0 gives m <= y - ln w, dropping e^t gives t <= r/(theta-1).
        (theta,) = p
        y = -np.log(v)
        ly = np.log(y)
        lw = -np.log(w)
        r = y + lw + (theta - 1.0) * ly
        with np.errstate(divide="ignore", invalid="ignore"):
            alt = np.where(theta > 1.0, ly + (y + lw) / (theta - 1.0), np.inf)
        hi = np.minimum(np.log(y + lw), alt)

        def fun(t):
            e = np.exp(t)
            return e + (theta - 1.0) * t - r, e + theta - 1.0

        t = _newton_increasing(fun, hi, ly, hi, atol=1e-13)
        # x^theta = m^theta - y^theta, so ln x = t + ln(1 - (y/m)^theta)/theta.
        with np.errstate(divide="ignore"):
            lx = t + log1mexp(theta * np.maximum(t - ly, 0.0)) / theta
        return _clip_unit(np.exp(-np.exp(lx)))

    def _sample(self, n, p, rng):
        # Marshall-Olkin (1988): V positive stable with Laplace transform exp(-s^(1/theta)),
        # drawn by Kanter's (1975) representation; U_i = psi(E_i / V), psi(s) = exp(-s^(1/theta)).
        (theta,) = p
        alpha = 1.0 / float(theta)
        e = rng.standard_exponential((n, 2))
        if alpha == 1.0:
            return _clip_unit(np.exp(-e))
        phi = rng.uniform(0.0, np.pi, n)
        w = rng.standard_exponential(n)
        log_v = (np.log(np.sin(alpha * phi)) - np.log(np.sin(phi)) / alpha
                 + (1.0 - alpha) / alpha * (np.log(np.sin((1.0 - alpha) * phi)) - np.log(w)))
        return _clip_unit(np.exp(-np.exp(alpha * (np.log(e) - log_v[:, None]))))

    def _kendall_tau(self, p):
        (theta,) = p
        return 1.0 - 1.0 / theta

    def _params_from_tau(self, tau):
        # theta = 1/(1 - tau); tau <= 0 lies outside the family and maps to its nearest
        # member, independence (theta = 1).
        return (np.maximum(1.0 / (1.0 - tau), 1.0),)

    def _tail_upper(self, p):
        (theta,) = p
        return _upper_tail_gumbel_joe(theta)


# Frank: below this |theta| the first-order expansion about independence is exact to rounding.
_FRANK_SMALL = 1e-8
# Below this |theta| tau and rho_S are evaluated by their Maclaurin series; the closed forms
# lose about 4 eps/|theta| to cancellation there.
_FRANK_SERIES = 0.5
# Coefficients of x, x^3, ..., x^17 in tau(x) = 4 sum_{n>=2} B_n x^(n-1) / (n! (n+1)) and in
# rho_S(x) = 12 sum_{n>=2} B_n x^(n-1) / ((n-1)! (n+1) (n+2)), from the Bernoulli-number series
# t/(e^t - 1) = sum B_n t^n / n! (Abramowitz & Stegun 1964, 23.1.1; from memory) in the Debye
# functions; the first terms are theta/9 and theta/6. At |x| < 0.5 the omitted terms are
# below 1e-19.
_BERNOULLI_EVEN = {2: Fraction(1, 6), 4: Fraction(-1, 30), 6: Fraction(1, 42), 8: Fraction(-1, 30),
                   10: Fraction(5, 66), 12: Fraction(-691, 2730), 14: Fraction(7, 6),
                   16: Fraction(-3617, 510), 18: Fraction(43867, 798)}
_FRANK_TAU_SERIES = tuple(
    float(4 * b / (math.factorial(n) * (n + 1))) for n, b in _BERNOULLI_EVEN.items()
)
_FRANK_RHO_SERIES = tuple(
    float(12 * b / (math.factorial(n - 1) * (n + 1) * (n + 2))) for n, b in _BERNOULLI_EVEN.items()
)
# Beyond this argument the Debye integral over (x, inf) is below 1e-19 of the total.
_DEBYE_CAP = 50.0


def _odd_series(x, coefficients):
    x2 = x * x
    return x * sum(c * x2**k for k, c in enumerate(coefficients))


def _odd_series_derivative(x, coefficients):
    x2 = x * x
    return sum((2 * k + 1) * c * x2**k for k, c in enumerate(coefficients))


def _debye(k: int, x):
    """Debye function D_k(x) = (k / x^k) int_0^x t^k / (e^t - 1) dt, any real x.

    Written as D_k(x) = k int_0^1 s^(k-1) f(xs) ds with f(t) = t / (e^t - 1) and integrated by
    the base class's fixed Gauss-Legendre rule (the integrand is analytic, poles at 2 pi i / x).
    For x > 50 the integral is k! zeta(k+1) to double precision. For x < 0,
    D_k(-x) = D_k(x) + k x / (k+1), which follows from (-t)/(e^(-t) - 1) = t + t/(e^t - 1).
    """
    x = np.asarray(x, dtype=float)
    a = np.abs(x)
    t = np.minimum(a, _DEBYE_CAP)[..., None] * QUAD_NODES
    f = t / np.expm1(np.where(t == 0.0, 1.0, t))
    f = np.where(t == 0.0, 1.0, f)
    d = k * np.sum(QUAD_WEIGHTS * QUAD_NODES ** (k - 1) * f, axis=-1)
    with np.errstate(divide="ignore"):
        asymptotic = k * special.factorial(k) * special.zeta(k + 1.0) / a**k
    d = np.where(a > _DEBYE_CAP, asymptotic, d)
    return np.where(x < 0, d + k * a / (k + 1.0), d)


def _frank_tau_abs(t):
    """Kendall's tau of Frank at t >= 0 and its derivative in t."""
    small = t < _FRANK_SERIES
    ts = np.where(small, 1.0, t)
    d1 = _debye(1, ts)
    tau = 1.0 - 4.0 / ts * (1.0 - d1)
    # d/dt [1 - 4/t + 4 D_1(t)/t] = (4/t^2) (1 - 2 D_1(t) + t/(e^t - 1)).
    dtau = 4.0 / ts**2 * (1.0 - 2.0 * d1 + ts / np.expm1(np.minimum(ts, 700.0)))
    tau = np.where(small, _odd_series(t, _FRANK_TAU_SERIES), tau)
    dtau = np.where(small, _odd_series_derivative(t, _FRANK_TAU_SERIES), dtau)
    return tau, dtau


class Frank(CopulaFamily):
    """Frank copula C(u, v) = -(1/theta) ln[1 + (e^(-theta u) - 1)(e^(-theta v) - 1) /
    (e^(-theta) - 1)], theta real.

    Radially symmetric, so it covers negative dependence through theta < 0 and takes no
    rotations; theta -> 0 is independence; no tail dependence; tau = 1 - (4/theta)[1 -
    D_1(theta)] (Joe 1997, family B3; Genest 1987, Biometrika 74, 549-555; Nelsen 2006,
    section 5.1).
    """

    name = "frank"
    param_names = ("theta",)
    domain = ((-np.inf, np.inf),)
    domain_open = ((True, True),)
    fit_bounds = ((-45.0, 45.0),)

    # Every formula is evaluated at t = |theta| > 0 and mapped to theta < 0 by the reflection
    # C_{-t}(u, v) = u - C_t(u, 1 - v), hence c_{-t}(u, v) = c_t(u, 1 - v) and
    # h_{-t}(u | v) = h_t(u | 1 - v) (Nelsen 2006, Thm 2.4.4 with one decreasing margin; the
    # theorem number from memory).
    @staticmethod
    def _split(theta):
        small = np.abs(theta) < _FRANK_SMALL
        return small, np.where(small, 1.0, np.abs(theta))

    @staticmethod
    def _log_n(u, v, vbar, t):
        # N = (1 - e^-t) - (1 - e^-tu)(1 - e^-tv) = e^-tu (1 - e^-tv) + e^-tv (1 - e^-t vbar),
        # a sum of positive terms, so ln N is free of cancellation even where N is tiny.
        return logaddexp(-t * u + log1mexp(t * v), -t * v + log1mexp(t * vbar))

    def _cdf(self, u, v, p):
        (theta,) = p
        small, t = self._split(theta)
        # theta > 0: 1 + q = 1 - s with s = (1-e^-tu)(1-e^-tv)/(1-e^-t) in (0, 1); log1p(-s)
        # where s is small (C small), ln N - ln(1 - e^-t) where 1 - s is small.
        log_s = log1mexp(t * u) + log1mexp(t * v) - log1mexp(t)
        with np.errstate(divide="ignore"):
            log_1ms = np.where(log_s < -np.log(2.0), np.log1p(-np.exp(np.minimum(log_s, 0.0))),
                               self._log_n(u, v, 1.0 - v, t) - log1mexp(t))
        positive = -log_1ms / t
        # theta < 0: 1 + q with q = (e^tu - 1)(e^tv - 1)/(e^t - 1) > 0.
        log_q = log_expm1(t * u) + log_expm1(t * v) - log_expm1(t)
        negative = logaddexp(0.0, log_q) / t
        # First order about independence: C = uv [1 + (theta/2)(1-u)(1-v)].
        near = u * v * (1.0 + 0.5 * theta * (1.0 - u) * (1.0 - v))
        return np.where(small, near, np.where(theta > 0, positive, negative))

    def _logpdf(self, u, v, p):
        # c = t (1 - e^-t) e^(-t(u+v)) / N^2 for t > 0.
        (theta,) = p
        small, t = self._split(theta)
        vv, vb = np.where(theta > 0, v, 1.0 - v), np.where(theta > 0, 1.0 - v, v)
        out = np.log(t) + log1mexp(t) - t * (u + vv) - 2.0 * self._log_n(u, vv, vb, t)
        near = 0.5 * theta * (1.0 - 2.0 * u) * (1.0 - 2.0 * v)
        return np.where(small, near, out)

    def prepare(self, u, v, grid=None):
        return u, v, 1.0 - v

    def loglik_prepared(self, data, p):
        # Inside the fit box (|theta| <= 45) every exponential below stays far from overflow
        # and underflow, so the estimator can work in plain space; N is again a sum of two
        # positive terms, e^-tu (1 - e^-tv) + e^-tv (1 - e^-t vbar), free of cancellation.
        u, v, vbar = data
        (theta,) = p
        small, t = self._split(theta)
        positive = (theta > 0)[:, None]
        vv = np.where(positive, v, vbar)
        vb = np.where(positive, vbar, v)
        tc = t[:, None]
        n_term = (np.exp(-tc * u) * -np.expm1(-tc * vv)
                  + np.exp(-tc * vv) * -np.expm1(-tc * vb))
        n = u.shape[-1]
        out = (n * (np.log(t) + log1mexp(t)) - t * np.sum(u + vv, axis=-1)
               - 2.0 * np.sum(np.log(n_term), axis=-1))
        near = 0.5 * theta * np.sum((1.0 - 2.0 * u) * (1.0 - 2.0 * v), axis=-1)
        return np.where(small, near, out)

    def _h_u_given_v(self, u, v, p):
        # h = e^-tv (1 - e^-tu) / N for t > 0.
        (theta,) = p
        small, t = self._split(theta)
        vv, vb = np.where(theta > 0, v, 1.0 - v), np.where(theta > 0, 1.0 - v, v)
        out = np.minimum(np.exp(-t * vv + log1mexp(t * u) - self._log_n(u, vv, vb, t)), 1.0)
        near = u + 0.5 * theta * u * (1.0 - u) * (1.0 - 2.0 * v)
        return np.where(small, near, out)

    def _h_u_given_v_inverse(self, w, v, p):
        # Solving e^-tv (1 - A)/N = w for A = e^-tu (t > 0) gives
        # 1 - A = w (1 - e^-t) / (e^-tv + w (1 - e^-tv)); u = -ln(A)/t, taken through
        # log1p(-(1-A)) while 1 - A is small and through ln A otherwise.
        (theta,) = p
        small, t = self._split(theta)
        vv = np.where(theta > 0, v, 1.0 - v)
        lw = np.log(w)
        log_den = logaddexp(-t * vv, lw + log1mexp(t * vv))
        log_1ma = lw + log1mexp(t) - log_den
        log_a = logaddexp(-t * vv + np.log1p(-w), lw - t) - log_den
        with np.errstate(divide="ignore"):
            u = np.where(log_1ma < -np.log(2.0), -np.log1p(-np.exp(np.minimum(log_1ma, 0.0))),
                         -log_a) / t
        near = w - 0.5 * theta * w * (1.0 - w) * (1.0 - 2.0 * v)
        return _clip_unit(np.where(small, near, u))

    def _kendall_tau(self, p):
        (theta,) = p
        return np.sign(theta) * _frank_tau_abs(np.abs(theta))[0]

    def _spearman_rho(self, p):
        # rho_S = 1 - (12/theta)[D_1(theta) - D_2(theta)] (Nelsen 2006, section 5.1); odd in theta.
        (theta,) = p
        t = np.abs(theta)
        small = t < _FRANK_SERIES
        ts = np.where(small, 1.0, t)
        rho = 1.0 - 12.0 / ts * (_debye(1, ts) - _debye(2, ts))
        return np.sign(theta) * np.where(small, _odd_series(t, _FRANK_RHO_SERIES), rho)

    def _params_from_tau(self, tau):
        # tau(theta) is odd, increasing and concave on theta > 0 with slope 1/9 at 0, so
        # 9|tau| <= theta; and tau >= 1 - 4/theta because D_1 > 0, so theta <= 4/(1 - |tau|).
        # Since theta D_1(theta) <= pi^2/6, also tau <= g(theta) = 1 - 4/theta + (2 pi^2/3)/theta^2;
        # g increases beyond pi^2/3, so for |tau| >= 1 - 6/pi^2 the larger root of g = |tau| is a
        # second lower bound, close to the root for strong dependence. Newton from the larger
        # lower bound converges monotonically.
        a = np.abs(tau)
        k = 2.0 * np.pi**2 / 3.0
        disc = np.maximum(16.0 - 4.0 * k * (1.0 - a), 0.0)
        # s = 1/theta as the smaller root of k s^2 - 4 s + (1 - a), in the cancellation-free form.
        s_root = 2.0 * (1.0 - a) / (4.0 + np.sqrt(disc))
        lo = np.where(a >= 1.0 - 6.0 / np.pi**2, np.maximum(9.0 * a, 1.0 / s_root), 9.0 * a)
        hi = 4.0 / (1.0 - a)

        def fun(t):
            value, slope = _frank_tau_abs(t)
            return value - a, slope

        t = _newton_increasing(fun, lo, lo, np.maximum(hi, lo))
        return (np.sign(tau) * t,)


# Joe tau: Taylor coefficients c_j = (-1)^(j+1) (zeta(j+1) - 1) of the divided difference
# Q(z) = [psi(z) - psi(2)] / (z - 2) = sum_{j>=1} c_j (z-2)^(j-1), from psi^(j)(2) / j! =
# (-1)^(j+1) (zeta(j+1) - 1) (Abramowitz & Stegun 1964, 6.4.2 and 6.4.6; from memory). Used
# for |z - 2| < 0.1, where the divided difference cancels; 16 terms leave a remainder below
# 1e-19.
_JOE_Q_TAYLOR = tuple(float((-1) ** (j + 1) * special.zetac(j + 1.0)) for j in range(1, 17))
_JOE_Q_NEAR = 0.1


def _joe_tau(theta):
    """Kendall's tau of Joe and its derivative in theta.

    tau = 1 + [2/(2-theta)] [psi(2) - psi(1 + 2/theta)] = 1 - (2/theta) Q(z), z = 1 + 2/theta
    (from memory; equals the series 1 - 4 sum 1/[k(theta k+2)(theta(k-1)+2)] of Joe 1997, B5).
    """
    z = 1.0 + 2.0 / theta
    delta = z - 2.0
    near = np.abs(delta) < _JOE_Q_NEAR
    ds = np.where(near, 1.0, delta)
    q = (special.digamma(z) - special.digamma(2.0)) / ds
    dq = (special.polygamma(1, z) - q) / ds
    coef = np.array(_JOE_Q_TAYLOR)
    q_near = np.polynomial.polynomial.polyval(delta, coef)
    dq_near = np.polynomial.polynomial.polyval(delta, coef[1:] * np.arange(1, coef.size))
    q = np.where(near, q_near, q)
    dq = np.where(near, dq_near, dq)
    # dz/dtheta = -2/theta^2.
    return 1.0 - 2.0 / theta * q, 2.0 * q / theta**2 + 4.0 * dq / theta**3


class Joe(CopulaFamily):
    """Joe copula C(u, v) = 1 - [(1-u)^theta + (1-v)^theta - (1-u)^theta (1-v)^theta]^(1/theta),
    theta >= 1.

    Upper tail dependence 2 - 2^(1/theta), none in the lower tail; theta = 1 is independence
    (Joe 1997, family B5; Nelsen 2006, section 4.2, family (4.2.6), number from memory).
    """

    name = "joe"
    param_names = ("theta",)
    domain = ((1.0, np.inf),)
    domain_open = ((False, True),)
    fit_bounds = ((1.0, 30.0),)
    rotations = _ROTATIONS

    @staticmethod
    def _parts(u, v, theta):
        return Joe._parts_from_logs(np.log1p(-u), np.log1p(-v), theta)

    @staticmethod
    def _parts_from_logs(lub, lvb, theta):
        # a = (1-u)^theta, b = (1-v)^theta in logs, their complements by expm1, and
        # ln S with S = a + b - ab = 1 - (1-a)(1-b): log1p where (1-a)(1-b) is small (u, v
        # near 0, C small), a log-sum where it is not (S small near u, v = 1).
        la, lb = theta * lub, theta * lvb
        oma, omb = -np.expm1(la), -np.expm1(lb)
        prod = oma * omb
        log_s = np.where(prod < 0.5, np.log1p(-np.minimum(prod, 0.5)),
                         logaddexp(la, lb + np.log(oma)))
        return lub, lvb, oma, omb, log_s

    def _cdf(self, u, v, p):
        (theta,) = p
        log_s = self._parts(u, v, theta)[4]
        return -np.expm1(log_s / theta)

    def _logpdf(self, u, v, p):
        # c = S^(1/theta-2) (1-u)^(theta-1) (1-v)^(theta-1) (theta - 1 + S).
        (theta,) = p
        lub, lvb, _, _, log_s = self._parts(u, v, theta)
        return ((1.0 / theta - 2.0) * log_s + (theta - 1.0) * (lub + lvb)
                + np.log(theta - 1.0 + np.exp(log_s)))

    def prepare(self, u, v, grid=None):
        data = self._grid_data(u, v, grid, lambda points: np.log1p(-points))
        if data is not None:
            return data
        ru, rv = self._rotate_uv(u, v)
        lub, lvb = np.log1p(-ru), np.log1p(-rv)
        return lub, lvb, np.sum(lub + lvb, axis=-1)

    def loglik_prepared(self, data, p):
        (theta,) = p
        t = theta[:, None]
        if isinstance(data, GridData):
            # On the rank grid S = a_u + a_v (1 - a_u) with a = (1 - u)^theta, a sum of
            # positive numbers in plain space (log S is needed to absolute accuracy only);
            # past its range (a underflows), the log-space form below on the gathered logs.
            lgb = data.table
            la = t * lgb
            a, oma = np.exp(la), -np.expm1(la)
            big_s = gather(a, data.ru) + gather(a, data.rv) * gather(oma, data.ru)
            with np.errstate(divide="ignore", invalid="ignore"):
                log_s = np.log(big_s)
                out = (theta - 1.0) * 2.0 * lgb.sum() + np.sum(
                    (1.0 / t - 2.0) * log_s + np.log(t - 1.0 + big_s), axis=-1)
            if np.all(np.isfinite(out)):
                return out
            lub, lvb = lgb[data.ru], lgb[data.rv]
            data = lub, lvb, np.sum(lub + lvb, axis=-1)
        lub, lvb, sum_log = data
        log_s = self._parts_from_logs(lub, lvb, t)[4]
        return (theta - 1.0) * sum_log + np.sum(
            (1.0 / t - 2.0) * log_s + np.log(t - 1.0 + np.exp(log_s)), axis=-1)

    def _h_u_given_v(self, u, v, p):
        # h = S^(1/theta-1) (1-v)^(theta-1) (1 - (1-u)^theta).
        (theta,) = p
        _, lvb, oma, _, log_s = self._parts(u, v, theta)
        return np.minimum(
            np.exp((1.0 / theta - 1.0) * log_s + (theta - 1.0) * lvb + np.log(oma)), 1.0)

    def _h_u_given_v_inverse(self, w, v, p):
        # In z = ln a = theta ln(1-u), and with k = (1-b)/b, ln h = -((theta-1)/theta)
        # ln(1 + k e^z) + ln(1 - e^z). So h = w is f(z) = kappa softplus(z + ln k) -
        # ln(1 - e^z) = -ln w, kappa = 1 - 1/theta: a sum of two increasing convex functions
        # of z. Each term alone reaching -ln w bounds the root from the right, and Newton
        # from the smaller of the two bounds converges monotonically.
        (theta,) = p
        lb = theta * np.log1p(-v)
        log_k = log1mexp(-lb) - lb
        c = -np.log(w)
        kappa = 1.0 - 1.0 / theta
        with np.errstate(divide="ignore", invalid="ignore"):
            y = np.where(kappa > 0, c / kappa, np.inf)
            hi = np.minimum(np.log1p(-w), log_expm1(y) - log_k)
        # f(z) <= e^z (k + 2) for z <= -ln 2, so this point lies left of the root.
        lo = np.minimum(np.log(c) - logaddexp(log_k, np.log(2.0)), -np.log(2.0))
        lo = np.minimum(lo, hi - 1.0)

        def fun(z):
            s = z + log_k
            f = kappa * logaddexp(0.0, s) - log1mexp(-z) - c
            return f, kappa * special.expit(s) + 1.0 / np.expm1(-z)

        z = _newton_increasing(fun, hi, lo, hi)
        return _clip_unit(-np.expm1(z / theta))

    def _kendall_tau(self, p):
        (theta,) = p
        return _joe_tau(theta)[0]

    def _params_from_tau(self, tau):
        # Joe's tau lies below Gumbel's 1 - 1/theta, so theta >= 1/(1 - tau); and above
        # 1 - 2/theta, so theta <= 2/(1 - tau). tau <= 0 lies outside the family and maps to
        # independence (theta = 1).
        tau = np.maximum(tau, 0.0)
        lo = 1.0 / (1.0 - tau)
        hi = 2.0 / (1.0 - tau)

        def fun(theta):
            value, slope = _joe_tau(theta)
            return value - tau, slope

        return (_newton_increasing(fun, lo, lo, hi),)

    def _tail_upper(self, p):
        (theta,) = p
        return _upper_tail_gumbel_joe(theta)
