"""Uncertainty and goodness of fit for copulas fitted by maximum pseudo-likelihood.

Two routes to standard errors and intervals are offered, because they answer different needs:

- ``"bootstrap"`` (default): parametric bootstrap. Draw ``n`` points from the fitted copula,
  **re-rank** them into pseudo-observations, re-estimate, repeat ``B`` times; percentile
  intervals for the parameters and for every quantity derived from them (Kendall's tau, tail
  coefficients). Re-ranking reproduces the extra variability that the unknown margins add to
  a pseudo-likelihood estimate (Genest, Ghoudi & Rivest 1995), so this is the interval to
  report. Caveat: it is conditional on the fitted family being right.
- ``"hessian"``: the inverse observed information of the pseudo-likelihood with the delta
  method. Fast, but it treats the pseudo-observations as if the margins were known, so it is
  too small in general (Genest, Ghoudi & Rivest 1995, section 4: the asymptotic variance of the
  pseudo-likelihood estimator is a sandwich, not the inverse information): 82% coverage at
  nominal 95% for Clayton(2), n = 250 (docs/method.md, "Uncertainty"). No page, report or
  e-mail shows it; use it only as a quick lower bound.

Goodness of fit is the Cramer-von Mises distance between the empirical copula and the fitted
one, with a parametric-bootstrap p-value (Genest, Remillard & Beaudoin 2009, *Insurance:
Mathematics and Economics* 44, 199-213, test based on S_n).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from monitor.stats.copulas import CopulaFamily
from monitor.stats.copulas.base import rank_grid
from monitor.stats.empirical import empirical_copula, kendall_tau, pseudo_observations
from monitor.stats.fitting import CopulaFit, _validate_batch, fit_batched

METHODS = ("bootstrap", "hessian")


@dataclass(frozen=True, slots=True)
class Interval:
    """A point estimate with its standard error and a confidence interval."""

    estimate: float
    std_error: float
    lower: float
    upper: float


@dataclass(frozen=True, slots=True)
class FitUncertainty:
    """Intervals for a fitted copula's parameters and implied quantities.

    ``quantities`` maps ``"kendall_tau"``, ``"tail_lower"``, ``"tail_upper"`` and each parameter
    name to an :class:`Interval`. ``replicates`` is the number of bootstrap fits used (0 for the
    Hessian method); ``failed`` counts bootstrap refits that did not converge (kept out).
    """

    method: str
    level: float
    quantities: dict[str, Interval]
    replicates: int
    failed: int
    caveat: str


@dataclass(frozen=True, slots=True)
class GoodnessOfFit:
    """Cramer-von Mises test of a fitted copula.

    ``statistic`` is S_n = sum_i (C_n(U_i, V_i) - C_theta(U_i, V_i))^2; ``p_value`` is
    (#{S*_b >= S_n} + 1/2) / (B + 1) over ``replicates`` parametric-bootstrap statistics.
    """

    statistic: float
    p_value: float
    replicates: int
    failed: int


def _implied(fam: CopulaFamily, params: NDArray) -> dict[str, NDArray]:
    p = tuple(params[:, j] for j in range(params.shape[1]))
    out = {name: params[:, j] for j, name in enumerate(fam.param_names)}
    out["kendall_tau"] = np.asarray(fam.kendall_tau(p), dtype=float) * np.ones(len(params))
    out["tail_lower"] = np.asarray(fam.tail_lower(p), dtype=float) * np.ones(len(params))
    out["tail_upper"] = np.asarray(fam.tail_upper(p), dtype=float) * np.ones(len(params))
    return out


def bootstrap_samples(fit: CopulaFit, replicates: int, rng: np.random.Generator
                      ) -> tuple[NDArray, NDArray]:
    """``replicates`` samples of size ``fit.n`` from the fitted copula, re-ranked into
    pseudo-observations; two arrays of shape (replicates, n)."""
    uv = fit.copula.sample(replicates * fit.n, fit.param_tuple, rng).reshape(replicates, fit.n, 2)
    return pseudo_observations(uv[..., 0]), pseudo_observations(uv[..., 1])


def _refit(fit: CopulaFit, replicates: int, rng: np.random.Generator):
    u, v = bootstrap_samples(fit, replicates, rng)
    start = np.broadcast_to(np.array(fit.param_tuple, dtype=float), (replicates, fit.n_params))
    return u, v, fit_batched(fit.copula, u, v, start=start)


def fit_uncertainty(fit: CopulaFit, u: ArrayLike | None = None, v: ArrayLike | None = None, *,
                    method: str = "bootstrap", replicates: int = 200, level: float = 0.95,
                    rng: np.random.Generator | int | None = None) -> FitUncertainty:
    """Standard errors and intervals for a fit's parameters, Kendall's tau and tail coefficients.

    Parameters
    ----------
    fit : CopulaFit
        The fit (from :func:`monitor.stats.fitting.select_copula` or a :class:`BatchFit` window).
    u, v : array_like, optional
        The pseudo-observations it was fitted on (needed by ``method="hessian"``).
    method : {"bootstrap", "hessian"}
        See the module docstring for what each assumes.
    replicates : int
        Bootstrap size.
    level : float
        Confidence level of the intervals.
    rng : Generator or int, optional
        Random source of the bootstrap.

    Returns
    -------
    FitUncertainty
    """
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}; got {method!r}")
    if not 0 < level < 1:
        raise ValueError(f"level must lie in (0, 1); got {level!r}")
    fam = fit.copula
    point = _implied(fam, np.array([fit.param_tuple], dtype=float).reshape(1, -1))
    alpha = 1 - level
    if fit.n_params == 0:
        zero = Interval(0.0, 0.0, 0.0, 0.0)
        return FitUncertainty(method, level, {k: zero for k in point}, 0, 0, "no parameters")
    if method == "bootstrap":
        if replicates < 20:
            raise ValueError(f"replicates must be at least 20 for intervals; got {replicates}")
        gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
        _, _, refit = _refit(fit, replicates, gen)
        return _bootstrap_uncertainty(fit, refit.params, refit.converged, level)
    if u is None or v is None:
        raise ValueError("method='hessian' needs the pseudo-observations u and v")
    cov = _inverse_information(fam, np.array(fit.param_tuple), *_validate_batch(u, v))
    z = stats.norm.ppf(1 - alpha / 2)
    quantities = {}
    base = np.array(fit.param_tuple, dtype=float)
    for key, value in point.items():
        grad = _gradient(lambda p, key=key: _implied(fam, p[None, :])[key][0], base, fam)
        se = float(np.sqrt(max(grad @ cov @ grad, 0.0)))
        est = float(value[0])
        quantities[key] = Interval(est, se, est - z * se, est + z * se)
    return FitUncertainty(method, level, quantities, 0, 0,
                          "inverse observed information: ignores rank uncertainty, too narrow")


def _bootstrap_uncertainty(fit: CopulaFit, params: NDArray, converged: NDArray,
                           level: float) -> FitUncertainty:
    """Percentile intervals from bootstrap refits (rows of ``params``; non-converged left out)."""
    fam = fit.copula
    point = _implied(fam, np.array([fit.param_tuple], dtype=float).reshape(1, -1))
    alpha = 1 - level
    ok = np.asarray(converged, dtype=bool)
    if ok.sum() < 2:
        # Too few converged refits for an interval: say so (NaN), never guess.
        quantities = {k: Interval(float(point[k][0]), np.nan, np.nan, np.nan) for k in point}
        return FitUncertainty("bootstrap", level, quantities, int(ok.sum()), int((~ok).sum()),
                              "parametric bootstrap with re-ranking; too few converged refits")
    reps = _implied(fam, params[ok])
    quantities = {
        k: Interval(float(point[k][0]), float(np.std(reps[k], ddof=1)),
                    float(np.quantile(reps[k], alpha / 2)),
                    float(np.quantile(reps[k], 1 - alpha / 2)))
        for k in point
    }
    return FitUncertainty("bootstrap", level, quantities, int(ok.sum()), int((~ok).sum()),
                          "parametric bootstrap with re-ranking; conditional on the family")


def _gradient(func, p: NDArray, fam: CopulaFamily) -> NDArray:
    out = np.zeros_like(p)
    for j, (lo, hi) in enumerate(fam.fit_bounds):
        h = 1e-5 * max(1.0, abs(p[j]))
        a, b = p.copy(), p.copy()
        a[j] = min(p[j] + h, hi)
        b[j] = max(p[j] - h, lo)
        out[j] = (func(a) - func(b)) / (a[j] - b[j])
    return out


def _inverse_information(fam: CopulaFamily, p: NDArray, u: NDArray, v: NDArray) -> NDArray:
    def ll(q):
        return float(np.sum(fam.rotated_logpdf(u, v, tuple(q))))

    k = p.size
    hess = np.zeros((k, k))
    steps = [1e-4 * max(1.0, abs(x)) for x in p]
    for i in range(k):
        for j in range(i, k):
            vals = []
            for si, sj in ((1, 1), (1, -1), (-1, 1), (-1, -1)):
                q = p.copy()
                q[i] += si * steps[i]
                q[j] += sj * steps[j]
                vals.append(ll(q))
            hess[i, j] = hess[j, i] = (vals[0] - vals[1] - vals[2] + vals[3]) / (
                4 * steps[i] * steps[j])
    info = -hess
    return np.linalg.pinv(info)


def cramer_von_mises(u: ArrayLike, v: ArrayLike, fit: CopulaFit) -> float:
    """S_n = sum_i (C_n(U_i, V_i) - C_theta(U_i, V_i))^2 (Genest, Remillard & Beaudoin 2009,
    eq. for S_n)."""
    u2, v2 = _validate_batch(u, v)
    return float(_cvm(u2, v2, fit.copula, np.array([fit.param_tuple], dtype=float))[0])


#: Largest number of booleans compared at once by :func:`_rank_dominance`.
_DOMINANCE_BLOCK = 1 << 22


def _rank_dominance(ru: NDArray, rv: NDArray) -> NDArray[np.int64]:
    """#{j : R_j <= R_i, S_j <= S_i} for every point i of every row of tie-free ranks.

    With pseudo-observations on the rank grid (no ties) this is n C_n(U_i, V_i) exactly. The
    comparison runs on small integers in blocks of rows, a few times faster than the general
    :func:`monitor.stats.empirical.empirical_copula` on float data.
    """
    rows, n = ru.shape
    dtype: type[np.signedinteger] = np.int16 if n < np.iinfo(np.int16).max else np.int32
    r = ru.astype(dtype)
    s = rv.astype(dtype)
    out = np.empty((rows, n), dtype=np.int64)
    step = max(1, _DOMINANCE_BLOCK // (n * n))
    for lo in range(0, rows, step):
        rr, ss = r[lo:lo + step], s[lo:lo + step]
        out[lo:lo + step] = np.count_nonzero(
            (rr[:, None, :] <= rr[:, :, None]) & (ss[:, None, :] <= ss[:, :, None]), axis=-1)
    return out


def _cvm(u: NDArray, v: NDArray, fam: CopulaFamily, params: NDArray) -> NDArray:
    if u.shape[0] == 0:
        return np.zeros(0)
    ru, rv = rank_grid(u), rank_grid(v)
    if ru is not None and rv is not None:
        emp = _rank_dominance(ru, rv) / u.shape[-1]
    else:
        emp = empirical_copula(u, v, u, v)
    p = tuple(params[:, j:j + 1] for j in range(params.shape[1]))
    model = fam.cdf(u, v, p)
    return np.sum((emp - model) ** 2, axis=-1)


def goodness_of_fit(u: ArrayLike, v: ArrayLike, fit: CopulaFit, *, replicates: int = 200,
                    rng: np.random.Generator | int | None = None) -> GoodnessOfFit:
    """Cramer-von Mises goodness-of-fit test with a parametric-bootstrap p-value.

    Notes
    -----
    Genest, Remillard & Beaudoin (2009), section 4 (parametric bootstrap): for b = 1..B draw
    n points from C_theta_n, re-rank, re-estimate theta*_b with the same estimator (here the
    batched pseudo-likelihood fitter, warm-started at theta_n), and compute S*_b; the p-value is
    (#{S*_b >= S_n} + 1/2) / (B + 1). Refits that fail to converge are left out and counted.
    """
    if replicates < 1:
        raise ValueError(f"replicates must be positive; got {replicates}")
    u2, v2 = _validate_batch(u, v)
    gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    s_n = cramer_von_mises(u2, v2, fit)
    if fit.n_params == 0:
        ub, vb = bootstrap_samples(fit, replicates, gen)
        boot = _cvm(ub, vb, fit.copula, np.zeros((replicates, 0)))
        failed = 0
    else:
        ub, vb, refit = _refit(fit, replicates, gen)
        ok = refit.converged
        boot = _cvm(ub[ok], vb[ok], fit.copula, refit.params[ok])
        failed = int((~ok).sum())
    p = (np.sum(boot >= s_n) + 0.5) / (boot.size + 1)
    return GoodnessOfFit(s_n, float(p), int(boot.size), failed)


def kendall_tau_interval(u: ArrayLike, v: ArrayLike, level: float = 0.95) -> Interval:
    """Asymptotic interval for the sample Kendall's tau from its influence function.

    Notes
    -----
    tau_n is a U-statistic; its first-order projection gives the influence function
    IF(u, v) = 8 C(u, v) - 4u - 4v + 2 - 2 tau (Hoeffding 1948 projection; the form is the
    one in the project's reference sheet), so Var(tau_n) ~ Var(IF)/n, estimated with the
    empirical copula at the sample points.
    """
    u2, v2 = _validate_batch(u, v)
    n = u2.shape[1]
    tau = float(kendall_tau(u2, v2)[0])
    emp = empirical_copula(u2, v2, u2, v2)[0]
    infl = 8 * emp - 4 * u2[0] - 4 * v2[0] + 2 - 2 * tau
    se = float(np.std(infl, ddof=1) / np.sqrt(n))
    z = stats.norm.ppf(0.5 + level / 2)
    return Interval(tau, se, max(tau - z * se, -1.0), min(tau + z * se, 1.0))


@dataclass(frozen=True, slots=True)
class CandidateBootstrap:
    """Goodness of fit of every candidate and intervals of one of them, from one parametric
    bootstrap per candidate.

    ``gof`` maps each fit's label to its :class:`GoodnessOfFit`; ``uncertainty`` holds the
    intervals of the fit given as ``selected`` (None if none was given).
    """

    gof: dict[str, GoodnessOfFit]
    uncertainty: FitUncertainty | None
    replicates: int


def bootstrap_candidates(u: ArrayLike, v: ArrayLike, fits: Sequence[CopulaFit], *,
                         replicates: int = 200, selected: CopulaFit | None = None,
                         level: float = 0.95, rng: np.random.Generator | int | None = None,
                         progress: Callable[[int, int, str], None] | None = None
                         ) -> CandidateBootstrap:
    """Goodness-of-fit p-values of every candidate and intervals of the selected one.

    Parameters
    ----------
    u, v : array_like, shape (n,)
        The pseudo-observations the candidates were fitted on.
    fits : sequence of CopulaFit
        The candidates (e.g. ``Selection.fits``).
    replicates : int
        Bootstrap replicates per candidate (at least 20 when ``selected`` is given).
    selected : CopulaFit, optional
        One of ``fits`` whose parameters, Kendall's tau and tail coefficients get percentile
        intervals from the same refits.
    level : float
        Confidence level of the intervals.
    rng : Generator or int, optional
    progress : callable, optional
        Called as ``progress(done, total, label)`` after each candidate.

    Returns
    -------
    CandidateBootstrap

    Notes
    -----
    For each candidate C_theta: draw ``replicates`` samples of size n from C_theta (one array
    of shape (replicates, n)), re-rank them, refit all of them at once with
    :func:`monitor.stats.fitting.fit_batched` warm-started at theta, and compute the Cramer-von
    Mises statistics S*_b; p = (#{S*_b >= S_n} + 1/2) / (B + 1) (Genest, Remillard & Beaudoin
    2009, section 4, as :func:`goodness_of_fit`). The refits theta*_b of the selected family
    are the parametric bootstrap with re-ranking of :func:`fit_uncertainty`; both procedures
    draw from the same fitted copula and re-estimate the same way, so one set of refits
    serves both (the two results then share their random draws). The empirical copula at the
    sample points of a tie-free bootstrap sample is a dominance count, computed in
    O(n log n) per replicate (see :func:`_rank_dominance`).
    """
    if replicates < 1:
        raise ValueError(f"replicates must be positive; got {replicates}")
    if selected is not None and replicates < 20:
        raise ValueError(f"replicates must be at least 20 for intervals; got {replicates}")
    u2, v2 = _validate_batch(u, v)
    gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    fits = list(fits)
    gof: dict[str, GoodnessOfFit] = {}
    uncertainty = None
    for i, fit in enumerate(fits):
        s_n = cramer_von_mises(u2, v2, fit)
        if fit.n_params == 0:
            ub, vb = bootstrap_samples(fit, replicates, gen)
            params = np.zeros((replicates, 0))
            ok = np.ones(replicates, dtype=bool)
        else:
            ub, vb, refit = _refit(fit, replicates, gen)
            params, ok = refit.params, refit.converged
        boot = _cvm(ub[ok], vb[ok], fit.copula, params[ok])
        # No converged refit leaves no reference distribution: the p-value is NaN, not 1/2.
        p = (np.sum(boot >= s_n) + 0.5) / (boot.size + 1) if boot.size else np.nan
        gof[fit.label] = GoodnessOfFit(s_n, float(p), int(boot.size), int((~ok).sum()))
        if selected is not None and fit is selected:
            uncertainty = (_bootstrap_uncertainty(fit, params, ok, level) if fit.n_params
                           else fit_uncertainty(fit, level=level))
        if progress is not None:
            progress(i + 1, len(fits), fit.label)
    return CandidateBootstrap(gof, uncertainty, int(replicates))
