"""Two-parameter Archimedean families BB1 (Clayton-Gumbel) and BB7 (Joe-Clayton), from Joe
(1997), *Multivariate Models and Dependence Concepts*, section 5.2; both have lower and upper
tail dependence governed by separate parameters.

Both are written as C(u, v) = psi(phi(u) + phi(v)) with generator phi and inverse psi, so that

- h_{1|2}(u | v) = dC/dv = psi'(s) phi'(v),
- c(u, v) = psi''(s) phi'(u) phi'(v),  s = phi(u) + phi(v).

Every quantity is evaluated in log space from log u and log(1 - u): powers such as u^-theta
overflow at u = 1e-10 with theta = 15, and 1 - (1 - u)^theta cancels for u near 0. The
conditional inverse is a safeguarded Newton iteration on logit h against logit u, with the
density as derivative, and the Kendall's tau of BB7 is a closed form rearranged so that its
removable singularity at theta = 2 is harmless.
"""

from __future__ import annotations

from abc import abstractmethod

import numpy as np
from scipy import special

from .base import UNIT_EPS, CopulaFamily, GridData
from .logmath import log1mexp, log_expm1, logaddexp

_ROTATIONS = (0, 90, 180, 270)
_LN2 = float(np.log(2.0))

#: Starting rules treat a sample tau below this as near-independence (BB1 and BB7 only reach
#: tau >= 0, and an interior point is a better start for an optimiser than the box corner).
_TAU_FLOOR = 1e-3

#: |2/theta - 1| below which BB7's tau uses the Taylor series of log R (see ``_bb7_tau``).
_BB7_SERIES_RADIUS = 0.05
_BB7_SERIES_TERMS = 12

_LOGIT_MAX = float(np.log((1.0 - UNIT_EPS) / UNIT_EPS))
_NEWTON_MAX_ITER = 60

#: The grid log-likelihoods work in plain space while every generator power on the grid lies
#: within e^+-700 (normal doubles, and sums of two stay finite) and, for BB7, above 1e-290
#: (far from the subnormal range); inside the fit box at n = 250 that is every point but
#: BB1's corner of large theta and delta.
_PLAIN_RANGE = 700.0
_PLAIN_TINY = 1e-290


# ---------------------------------------------------------------------- log-space helpers
def _log_of_unit(x):
    """(log x, log(1 - x)) for x in (0, 1)."""
    return np.log(x), np.log1p(-x)


def _logit_to_logs(z):
    """(log u, log(1 - u)) for u = 1 / (1 + exp(-z)), accurate at both ends."""
    return -logaddexp(0.0, -z), -logaddexp(0.0, z)


class _Archimedean2(CopulaFamily):
    """Shared machinery of the two-parameter Archimedean families.

    The logs of h_{1|2}(u | v) and of the density split into per-margin and joint parts. A
    subclass provides

    - ``_margin(lu, lub, p)``: the parameter-dependent transforms of one margin (a tuple of
      arrays, the first the one the joint part needs) from log u and log(1 - u);
    - ``_separable(lu, lub, m, p)``: the part of log c that belongs to that margin alone --
      it is also the v-margin's part of log h_{1|2};
    - ``_joint(mu, mv, p, want_h, want_c)``: the remaining parts (log h minus the v-margin's
      part, log c minus both margins' parts) from the first margin transform of u and of v,
      each None where not wanted;

    and this class turns them into the private API of :class:`CopulaFamily`. On the rank
    grid (pseudo-observations without ties) both margins of every window are permutations of
    the same n points, so the estimator evaluates the margin transforms once per window on the
    grid, sums the separable parts there and gathers only what the joint part needs.
    """

    __slots__ = ()

    @abstractmethod
    def _margin(self, lu, lub, p):
        """Per-margin transforms (a tuple) from log u and log(1 - u)."""

    @abstractmethod
    def _separable(self, lu, lub, m, p):
        """The margin's own part of log c (and the v-margin's part of log h_{1|2})."""

    @abstractmethod
    def _joint(self, mu, mv, p, want_h=True, want_c=True):
        """(joint part of log h_{1|2}, joint part of log c) from the margins' first transforms,
        each None where not wanted."""

    def _log_h_and_log_c(self, lu, lub, lv, lvb, p, want_h=True, want_c=True):
        """(log h_{1|2}, log c), each None where not wanted."""
        mu, mv = self._margin(lu, lub, p), self._margin(lv, lvb, p)
        hj, cj = self._joint(mu[0], mv[0], p, want_h, want_c)
        sep_v = self._separable(lv, lvb, mv, p)
        log_h = None if hj is None else hj + sep_v
        log_c = None if cj is None else cj + sep_v + self._separable(lu, lub, mu, p)
        return log_h, log_c

    def _logpdf(self, u, v, p):
        lu, lub = _log_of_unit(u)
        lv, lvb = _log_of_unit(v)
        return self._log_h_and_log_c(lu, lub, lv, lvb, p, want_h=False)[1]

    def prepare(self, u, v, grid=None):
        # The logs do not depend on the parameters: computed once per optimisation, on the
        # grid when the data are ranks.
        data = self._grid_data(u, v, grid, _log_of_unit)
        if data is None:
            ru, rv = self._rotate_uv(u, v)
            return (*_log_of_unit(ru), *_log_of_unit(rv))
        return data

    def loglik_prepared(self, data, p):
        pw = tuple(a[:, None] for a in p)
        if not isinstance(data, GridData):
            lu, lub, lv, lvb = data
            return np.sum(self._log_h_and_log_c(lu, lub, lv, lvb, pw, want_h=False)[1],
                          axis=-1)
        gu, gv, (lg, lgb) = data
        windows, n = gu.shape
        # Gathered by flat index (see base.gather), computed once for both paths.
        flat = np.arange(0, windows * n, n)[:, None]
        fu, fv = gu + flat, gv + flat
        with np.errstate(all="ignore"):
            fast = self._grid_loglik(fu, fv, lg, lgb, pw)
        if fast is not None and np.all(np.isfinite(fast)):
            return fast
        m = self._margin(lg, lgb, pw)  # each (windows, n): the grid's transforms
        first = m[0].ravel()
        joint = self._joint(np.take(first, fu), np.take(first, fv), pw, want_h=False)[1]
        return 2.0 * np.sum(self._separable(lg, lgb, m, pw), axis=-1) + np.sum(joint, axis=-1)

    @abstractmethod
    def _grid_loglik(self, fu, fv, lg, lgb, p):
        """The grid log-likelihood in plain (not log) space where every power stays within
        e^+-_PLAIN_RANGE -- about half as many NumPy passes -- else None; ``fu``, ``fv`` index
        the flattened (windows, n) grid transforms. A non-finite result also falls back to the
        log-space path."""

    def _h_u_given_v(self, u, v, p):
        lu, lub = _log_of_unit(u)
        lv, lvb = _log_of_unit(v)
        log_h = self._log_h_and_log_c(lu, lub, lv, lvb, p, want_c=False)[0]
        return np.clip(np.exp(log_h), 0.0, 1.0)

    def _h_u_given_v_inverse(self, w, v, p):
        """Solve h_{1|2}(u | v) = w for u.

        Newton's method on g(z) = logit h(u(z) | v) - logit w in z = logit u, whose
        derivative is c(u, v) u (1 - u) / (h (1 - h)). In both tails h behaves like a power of
        u (or of 1 - u), so g is close to linear in z there and Newton converges in a few
        steps from z = logit w. The root is kept bracketed; a step that leaves the bracket (or
        is not finite) is replaced by bisection of the bracket, so the iteration cannot
        diverge; as in the safeguarded Newton-Raphson of Press et al. (2007, *Numerical
        Recipes*, 3rd ed., section 9.4), it also bisects when a Newton step is not at most half
        the step before last, which breaks two-point cycles where h bends sharply. Stops when
        |h - w| <= 1e-13 or the step is at rounding level.
        """
        lv, lvb = _log_of_unit(v)
        shape = np.broadcast_shapes(np.shape(w), np.shape(v), *(np.shape(a) for a in p))
        w = np.broadcast_to(w, shape)
        target = np.log(w) - np.log1p(-w)
        z = np.clip(target, -_LOGIT_MAX, _LOGIT_MAX).copy()
        lo = np.full(shape, -_LOGIT_MAX)
        hi = np.full(shape, _LOGIT_MAX)
        active = np.ones(shape, dtype=bool)
        step_last = np.full(shape, 2.0 * _LOGIT_MAX)
        step_before = step_last.copy()
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            for _ in range(_NEWTON_MAX_ITER):
                lu, lub = _logit_to_logs(z)
                log_h, log_c = self._log_h_and_log_c(lu, lub, lv, lvb, p)
                log_h = np.minimum(log_h, 0.0)
                log_1mh = np.log(-np.expm1(log_h))
                g = log_h - log_1mh - target
                below = g < 0.0
                lo = np.where(active & below, z, lo)
                hi = np.where(active & ~below, z, hi)
                step = g * np.exp(log_h + log_1mh - log_c - lu - lub)
                z_new = z - step
                bad = ~((z_new > lo) & (z_new < hi)) | ~(np.abs(step) <= 0.5 * step_before)
                z_new = np.where(bad, 0.5 * (lo + hi), z_new)
                step_before = step_last
                step_last = np.abs(z_new - z)
                done = (np.abs(np.exp(log_h) - w) <= 1e-13) | (
                    np.abs(z_new - z) <= 1e-15 * (1.0 + np.abs(z))
                )
                active &= ~done
                z = np.where(active, z_new, z)
                if not active.any():
                    break
        return 1.0 / (1.0 + np.exp(-z))

    def _params_from_tau(self, tau):
        # Kendall's tau does not identify two parameters; the starting rule picks one member.
        return self._start_params(tau)


class BB1(_Archimedean2):
    """BB1 copula, theta > 0, delta >= 1.

    C(u, v) = {1 + [(u^-theta - 1)^delta + (v^-theta - 1)^delta]^(1/delta)}^(-1/theta).

    Notes
    -----
    Generator phi(t) = (t^-theta - 1)^delta, inverse psi(s) = (1 + s^(1/delta))^(-1/theta)
    (Joe 1997, section 5.2, family BB1). With x = u^-theta - 1, y = v^-theta - 1,
    s = x^delta + y^delta and z = s^(1/delta):

    - h_{1|2}(u | v) = (1 + z)^(-1/theta - 1) s^(1/delta - 1) y^(delta - 1) v^(-theta - 1),
    - c(u, v) = (1 + z)^(-1/theta - 2) s^(1/delta - 2) [theta (delta - 1) + (theta delta + 1) z]
      (x y)^(delta - 1) (u v)^(-theta - 1),

    the second from psi''(s) = (1 + z)^(-1/theta - 2) s^(1/delta - 2)
    [theta (delta - 1) + (theta delta + 1) z] / (theta delta)^2.
    Kendall's tau 1 - 2 / (delta (theta + 2)); tail dependence lambda_L = 2^(-1/(theta delta)),
    lambda_U = 2 - 2^(1/delta). delta = 1 is Clayton(theta); theta -> 0 gives Gumbel(delta).

    Starting rule (also used by ``params_from_tau``, since tau cannot identify two
    parameters): as 1 - tau = (1 - tau_Clayton(theta)) (1 - tau_Gumbel(delta)), split it
    equally, tau_Clayton = tau_Gumbel = t = 1 - sqrt(1 - tau), i.e. theta = 2t/(1 - t) and
    delta = 1/(1 - t). Where that leaves the fit box (tau > 1 - (2/17)^2) theta is held at 15
    and delta = 2 / (17 (1 - tau)), at most 15. tau below 1e-3 is raised to 1e-3 (BB1 has
    tau >= 0 only), which gives a near-independence interior point.
    """

    name = "bb1"
    param_names = ("theta", "delta")
    domain = ((0.0, np.inf), (1.0, np.inf))
    domain_open = ((True, True), (False, True))
    # theta's lower end is near its limit 0 (the Gumbel copula), which the density reaches
    # without loss of accuracy (log_expm1 and log1p below): an optimum at the Gumbel limit is
    # not stopped short.
    fit_bounds = ((1e-10, 15.0), (1.0, 15.0))
    rotations = _ROTATIONS

    __slots__ = ()

    @staticmethod
    def _log_x(lu, theta):
        """log(u^-theta - 1) from log u."""
        return log_expm1(-theta * lu)

    def _cdf(self, u, v, p):
        theta, delta = p
        ls = logaddexp(delta * self._log_x(np.log(u), theta),
                          delta * self._log_x(np.log(v), theta))
        return np.exp(-logaddexp(0.0, ls / delta) / theta)

    def _margin(self, lu, lub, p):
        theta, _ = p
        return (self._log_x(lu, theta),)

    def _separable(self, lu, lub, m, p):
        theta, delta = p
        return (delta - 1.0) * m[0] - (theta + 1.0) * lu

    def _joint(self, mu, mv, p, want_h=True, want_c=True):
        theta, delta = p
        ls = logaddexp(delta * mu, delta * mv)
        lz = ls / delta
        log1p_z = logaddexp(0.0, lz)
        h = c = None
        if want_h:
            h = -(1.0 / theta + 1.0) * log1p_z + (1.0 / delta - 1.0) * ls
        if want_c:
            with np.errstate(divide="ignore"):
                # theta (delta - 1) vanishes at delta = 1 (Clayton); logaddexp takes -inf.
                bracket = logaddexp(np.log(theta) + np.log(delta - 1.0),
                                       np.log1p(theta * delta) + lz)
            c = -(1.0 / theta + 2.0) * log1p_z + (1.0 / delta - 2.0) * ls + bracket
        return h, c

    def _grid_loglik(self, fu, fv, lg, lgb, p):
        # With x = u^-theta - 1 on the grid (expm1: relative accuracy near u = 1),
        # s = x_u^delta + x_v^delta and z = s^(1/delta), the terms of the density above are
        # sums of positive numbers: log c = log[theta (delta - 1) + (theta delta + 1) z]
        # - (1/theta + 2) log1p(z) + (1/delta - 2) log s + the margins' parts.
        theta, delta = p
        log_x = np.log(np.expm1(-theta * lg))
        dlx = delta * log_x
        if not (dlx.max() < _PLAIN_RANGE and dlx.min() > -_PLAIN_RANGE):
            return None
        power = np.exp(dlx).ravel()
        s = np.take(power, fu)
        s += np.take(power, fv)
        ls = np.log(s)
        z = np.exp(ls / delta)
        joint = (np.log(theta * (delta - 1.0) + (theta * delta + 1.0) * z)
                 - (1.0 / theta + 2.0) * np.log1p(z) + (1.0 / delta - 2.0) * ls)
        margins = (delta[:, 0] - 1.0) * np.sum(log_x, axis=-1) - (theta[:, 0] + 1.0) * lg.sum()
        return 2.0 * margins + np.sum(joint, axis=-1)

    def _kendall_tau(self, p):
        theta, delta = p
        return 1.0 - 2.0 / (delta * (theta + 2.0))

    def _tail_lower(self, p):
        theta, delta = np.broadcast_arrays(*p)
        return 2.0 ** (-1.0 / (theta * delta))

    def _tail_upper(self, p):
        _, delta = np.broadcast_arrays(*p)
        return 2.0 - 2.0 ** (1.0 / delta)

    def _start_params(self, tau):
        tau = np.maximum(np.asarray(tau, dtype=float), _TAU_FLOOR)
        r = np.sqrt(1.0 - tau)  # = 1 - t
        (_, theta_hi), (_, delta_hi) = self.fit_bounds
        inside = 2.0 / r - 2.0 <= theta_hi
        theta = np.where(inside, 2.0 / r - 2.0, theta_hi)
        delta = np.where(inside, 1.0 / r, 2.0 / ((theta_hi + 2.0) * (1.0 - tau)))
        return theta, np.minimum(delta, delta_hi)


def _bb7_tau(theta, delta):
    """Kendall's tau of BB7, tau = 1 - 2/(delta (2 - theta)) + 4 B(delta + 2, 2/theta - 1) /
    (theta^2 delta) (Joe 1997, section 5.2), rearranged without its theta = 2 singularity.

    With e = 2/theta - 1 and Gamma(e) = Gamma(1 + e)/e, B(delta + 2, e) = R/e with
    R = Gamma(1 + e) Gamma(delta + 2) / Gamma(delta + 2 + e), and the formula becomes
    tau = 1 + (1 + e) [(R - 1)/e + R] / delta. All Gamma arguments are positive for
    theta >= 1 (no continuation is needed for theta > 2), and (R - 1)/e is finite at e = 0.
    For |e| < 0.05, log R comes from its Taylor series
    log R = sum_k [psi^(k-1)(1) - psi^(k-1)(delta + 2)] e^k / k!, which avoids cancellation
    in the differences of log-gamma values.
    """
    theta, delta = np.broadcast_arrays(np.asarray(theta, float), np.asarray(delta, float))
    e = 2.0 / theta - 1.0
    with np.errstate(divide="ignore", invalid="ignore"):
        log_r_over_e = (special.gammaln(1.0 + e) + special.gammaln(delta + 2.0)
                        - special.gammaln(delta + 2.0 + e)) / e
    near = np.abs(e) < _BB7_SERIES_RADIUS
    if np.any(near):
        en, dn = e[near], delta[near]
        series = np.zeros_like(en)
        power = np.ones_like(en)  # e^(k-1) / k!
        for k in range(1, _BB7_SERIES_TERMS + 1):
            power = power / k if k > 1 else power
            coeff = special.polygamma(k - 1, 1.0) - special.polygamma(k - 1, dn + 2.0)
            series = series + coeff * power
            power = power * en
        log_r_over_e = np.array(log_r_over_e, copy=True)
        log_r_over_e[near] = series
    r_minus_1_over_e = log_r_over_e * special.exprel(e * log_r_over_e)
    r = np.exp(e * log_r_over_e)
    return 1.0 + (1.0 + e) * (r_minus_1_over_e + r) / delta


class BB7(_Archimedean2):
    """BB7 (Joe-Clayton) copula, theta >= 1, delta > 0.

    C(u, v) = 1 - (1 - [(1 - ubar^theta)^-delta + (1 - vbar^theta)^-delta - 1]^(-1/delta))
    ^(1/theta), with ubar = 1 - u.

    Notes
    -----
    Generator phi(t) = (1 - (1 - t)^theta)^-delta - 1, inverse
    psi(s) = 1 - (1 - (1 + s)^(-1/delta))^(1/theta) (Joe 1997, section 5.2, family BB7).
    With a = 1 - ubar^theta, b = 1 - (1 + s)^(-1/delta):

    - h_{1|2}(u | v) = b^(1/theta - 1) (1 + s)^(-1/delta - 1) a_v^(-delta - 1) vbar^(theta - 1),
    - c(u, v) = b^(1/theta - 2) (1 + s)^(-1/delta - 2) [theta (delta + 1) b + (theta - 1)(1 - b)]
      (a_u a_v)^(-delta - 1) (ubar vbar)^(theta - 1),

    the second from psi''(s) = b^(1/theta - 2) (1 + s)^(-1/delta - 2)
    [theta (delta + 1) b + (theta - 1)(1 - b)] / (theta delta)^2. Kendall's tau: see
    ``_bb7_tau``. Tail dependence lambda_L = 2^(-1/delta), lambda_U = 2 - 2^(1/theta).
    theta = 1 is Clayton(delta); delta -> 0 gives Joe(theta).

    Starting rule (also used by ``params_from_tau``, since tau cannot identify two
    parameters): theta and delta are the Gumbel and Clayton parameters of one common tau
    level t, theta = 1/(1 - t), delta = 2t/(1 - t) -- the same split as BB1's, with BB7's
    upper-tail parameter in the Gumbel role and its lower-tail parameter in the Clayton role --
    and t is solved by bisection so that BB7's tau equals the target. tau increases along
    this path (checked on a fine grid), although for delta above about 3.4 BB7's tau is not
    monotone in theta alone (at delta = 15 it falls from theta = 1 to about 3.4). Past the fit
    box the path runs along its faces (delta = 15, then theta = 15), so a tau above that of
    (15, 15), 0.9034, gives (15, 15). tau below 1e-3 is raised to 1e-3 (BB7 has tau >= 0
    only).
    """

    name = "bb7"
    param_names = ("theta", "delta")
    domain = ((1.0, np.inf), (0.0, np.inf))
    domain_open = ((False, True), (True, True))
    # delta's lower end is near its limit 0 (the Joe copula): at 1e-7 a fit at the limit
    # loses about 1e-6 nats, and Kendall's tau (_bb7_tau, which cancels as delta -> 0) is
    # still right to 1e-8.
    fit_bounds = ((1.0, 15.0), (1e-7, 15.0))
    rotations = _ROTATIONS

    __slots__ = ()

    @staticmethod
    def _logs_a_phi(lub, theta, delta):
        """(log a, log phi) with a = 1 - (1 - u)^theta and phi = a^-delta - 1, from log(1 - u)."""
        g = theta * lub
        la = log1mexp(-g)
        # Where (1 - u)^theta underflows, log a = -(1 - u)^theta is lost but phi ~ delta e^g.
        return la, np.where(g < -700.0, np.log(delta) + g, log_expm1(-delta * la))

    @staticmethod
    def _logs_b(ls, delta, relative=True):
        """(log(1 + s), log b, log(1 - b)) with b = 1 - (1 + s)^(-1/delta), from log s.

        With ``relative`` False, log b is only accurate in absolute terms (log(-expm1(-y))
        throughout, one branch instead of two): enough for the density, where log b is only
        added and exponentiated, but not for C = 1 - b^(1/theta) near 0."""
        log1p_s = logaddexp(0.0, ls)
        y = log1p_s / delta
        if relative:
            lb = log1mexp(y)
        else:
            with np.errstate(divide="ignore"):
                lb = np.log(-np.expm1(-y))
        # Where 1 + s rounds to 1, b ~ s / delta.
        return log1p_s, np.where(ls < -700.0, ls - np.log(delta), lb), -y

    def _cdf(self, u, v, p):
        theta, delta = p
        _, lphi_u = self._logs_a_phi(np.log1p(-u), theta, delta)
        _, lphi_v = self._logs_a_phi(np.log1p(-v), theta, delta)
        _, lb, _ = self._logs_b(logaddexp(lphi_u, lphi_v), delta)
        return -np.expm1(lb / theta)

    def _margin(self, lu, lub, p):
        theta, delta = p
        la, lphi = self._logs_a_phi(lub, theta, delta)
        return lphi, la

    def _separable(self, lu, lub, m, p):
        theta, delta = p
        return (theta - 1.0) * lub - (delta + 1.0) * m[1]

    def _joint(self, mu, mv, p, want_h=True, want_c=True):
        theta, delta = p
        log1p_s, lb, l1mb = self._logs_b(logaddexp(mu, mv), delta, relative=want_h)
        h = c = None
        if want_h:
            h = (1.0 / theta - 1.0) * lb - (1.0 / delta + 1.0) * log1p_s
        if want_c:
            with np.errstate(divide="ignore"):
                # theta - 1 vanishes at theta = 1 (Clayton); logaddexp takes -inf.
                bracket = logaddexp(np.log(theta * (delta + 1.0)) + lb,
                                       np.log(theta - 1.0) + l1mb)
            c = (1.0 / theta - 2.0) * lb - (1.0 / delta + 2.0) * log1p_s + bracket
        return h, c

    def _grid_loglik(self, fu, fv, lg, lgb, p):
        # With a = 1 - (1 - u)^theta (log1mexp: relative accuracy at both ends) and
        # phi = a^-delta - 1 (expm1) on the grid, s = phi_u + phi_v, y = log1p(s) / delta and
        # b = -expm1(-y), the bracket above is theta (delta + 1) b + (theta - 1)(1 - b)
        # = (theta delta + 1) b + theta - 1, a sum of positive numbers:
        # log c = (1/theta - 2) log b - (1/delta + 2) log1p(s) + log[(theta delta + 1) b
        # + theta - 1] + the margins' parts.
        theta, delta = p
        g = theta * lgb
        if not g.min() > -_PLAIN_RANGE:
            return None
        la = log1mexp(-g)
        e = -delta * la
        if not (e.max() < _PLAIN_RANGE and e.min() > _PLAIN_TINY):
            return None
        phi = np.expm1(e).ravel()
        s = np.take(phi, fu)
        s += np.take(phi, fv)
        log1p_s = np.log1p(s)
        b = -np.expm1(-log1p_s / delta)
        joint = ((1.0 / theta - 2.0) * np.log(b) - (1.0 / delta + 2.0) * log1p_s
                 + np.log((theta * delta + 1.0) * b + (theta - 1.0)))
        margins = (theta[:, 0] - 1.0) * lgb.sum() - (delta[:, 0] + 1.0) * np.sum(la, axis=-1)
        return 2.0 * margins + np.sum(joint, axis=-1)

    def _kendall_tau(self, p):
        theta, delta = p
        return _bb7_tau(theta, delta)

    def _tail_lower(self, p):
        _, delta = np.broadcast_arrays(*p)
        return 2.0 ** (-1.0 / delta)

    def _tail_upper(self, p):
        theta, _ = np.broadcast_arrays(*p)
        return 2.0 - 2.0 ** (1.0 / theta)

    def _start_params(self, tau):
        tau = np.maximum(np.asarray(tau, dtype=float), _TAU_FLOOR)
        (_, theta_hi), (delta_lo, delta_hi) = self.fit_bounds

        def path(t):
            return (np.minimum(1.0 / (1.0 - t), theta_hi),
                    np.minimum(2.0 * t / (1.0 - t), delta_hi))

        # Bisection in t: 55 halvings of an interval shorter than 1 reach rounding level.
        a = np.full(tau.shape, delta_lo / (2.0 + delta_lo))
        b = np.full(tau.shape, 1.0 - 1.0 / theta_hi)
        for _ in range(55):
            m = 0.5 * (a + b)
            below = self._kendall_tau(path(m)) < tau
            a = np.where(below, m, a)
            b = np.where(below, b, m)
        return path(0.5 * (a + b))
