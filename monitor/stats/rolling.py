"""The rolling engine: every metric of every window end of a pair, batched over windows.

For a pair, the standardised residuals of both assets are aligned on the dates both have;
windows are ``window`` consecutive common dates, with ends every ``step`` dates counted from
the pair's first common date (so appending data only adds window ends). Within each window the
residuals are ranked into pseudo-observations (all windows at once, :mod:`monitor.stats.sliding`), and
for every window end the engine computes:

- Kendall's tau (with an influence-function standard error) and Spearman's rho;
- nonparametric tail dependence C_n(q,q)/q and its upper analogue (binomial standard errors);
- every candidate family by maximum pseudo-likelihood, the AIC (or BIC) choice, its
  parameters and model-implied tail coefficients, the Gaussian's log-likelihood, and the best
  lower- and upper-tail-dependent log-likelihoods;
- the model-averaged tail coefficients ``tail_lower_avg``, ``tail_upper_avg``: every
  candidate slot's (family x rotation) model-implied coefficient weighted by its Akaike
  weight (:func:`monitor.stats.fitting.akaike_weights`; BIC weights under ``criterion = "bic"``),
  so the figure moves smoothly when the selection flips between a tail-free family (Gaussian,
  Frank: 0) and a tail-dependent one from one window to the next;
- the signal inputs: the Gaussian copula's tail concordance C(q,q)/q at the window's tau, and
  the newest day's log-likelihood ratios of Clayton (lower tail) and survival Clayton (upper
  tail) against the Gaussian, all three with the same Kendall's tau as the previous window.

Everything is vectorised over the windows of a pair (arrays of shape (windows, n)); rolling
windows are fitted with warm starts along the chain (:func:`monitor.stats.fitting.fit_batched`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.lib.stride_tricks import sliding_window_view

from monitor.stats.copulas import FAMILY_NAMES, family
from monitor.stats.criteria import information_criterion
from monitor.stats.empirical import kendall_tau, pseudo_observations, spearman_rho, tail_dependence
from monitor.stats.fitting import akaike_weights, model_average, select_batched
from monitor.stats.sliding import (
    sliding_dominance,
    sliding_kendall_tau,
    sliding_ranks,
    window_dominance,
)

#: Stored columns of a pair's timeline, in order (docs/contracts.md's export contract is a subset).
METRIC_COLUMNS = (
    "date", "start", "n", "kendall_tau", "kendall_tau_se", "spearman_rho", "family", "rotation",
    "param1", "param2", "converged", "loglik", "aic", "loglik_gauss", "aic_gauss",
    "tail_lower", "tail_upper", "tail_lower_emp", "tail_upper_emp", "tail_lower_emp_se",
    "tail_upper_emp_se", "gauss_tail_q", "loglik_best_lower", "loglik_best_upper",
    "llr_lower", "llr_upper", "tail_lower_avg", "tail_upper_avg",
)

#: Below this |tau| no same-tau Clayton alternative is defined; the day's ratios are 0.
TAU_FLOOR = 0.02


@dataclass(frozen=True, slots=True)
class RollingSettings:
    """Everything that determines a pair's rolling metrics besides the residuals."""

    window: int = 250
    step: int = 1
    families: tuple[str, ...] = FAMILY_NAMES
    criterion: str = "aic"
    tail_q: float = 0.10

    def key(self, marginal_key: str) -> str:
        """Settings key of stored metrics: the marginal settings plus these."""
        fams = "all" if set(self.families) == set(FAMILY_NAMES) else "+".join(self.families)
        return (f"{marginal_key}|w{self.window}/s{self.step}/{self.criterion}/"
                f"q{self.tail_q:g}/{fams}/v1")


def window_end_positions(n_common: int, settings: RollingSettings, after: int = -1
                         ) -> np.ndarray:
    """Positions (in the pair's common dates) of the window ends later than ``after``."""
    first = settings.window - 1
    if n_common <= first:
        return np.empty(0, dtype=np.intp)
    ends = np.arange(first, n_common, settings.step, dtype=np.intp)
    return ends[ends > after]


def kendall_tau_se(u: np.ndarray, v: np.ndarray, tau: np.ndarray,
                   dominance: np.ndarray) -> np.ndarray:
    """Influence-function standard error of the sample Kendall's tau of each row.

    IF(u, v) = 8 C(u, v) - 4u - 4v + 2 - 2 tau, the first-order (Hoeffding 1948) projection
    of the U-statistic, estimated with the empirical copula at the sample points
    (``dominance / n``, from :func:`monitor.stats.sliding.sliding_dominance`); the same estimator
    as :func:`monitor.stats.inference.kendall_tau_interval`, batched.
    """
    n = u.shape[1]
    infl = 8 * (dominance / n) - 4 * u - 4 * v + 2 - 2 * tau[:, None]
    return np.std(infl, axis=1, ddof=1) / np.sqrt(n)


@dataclass(frozen=True, slots=True)
class PairMetrics:
    """A batch of window ends of one pair: the metric rows and what the next batch starts
    from (the last window's estimates per slot and its tau)."""

    frame: pd.DataFrame
    last_params: dict[tuple[str, int], np.ndarray]
    last_tau: float


@dataclass(frozen=True, slots=True)
class PairWindows:
    """The window ends of one pair still to compute.

    ``dates`` are the pair's common dates and ``za``, ``zb`` the two assets' standardised
    residuals on them; ``positions`` the window-end positions (from
    :func:`window_end_positions`, increasing); ``start`` the warm starts per slot (family,
    slot rotation) -- the estimates of the window before the first, broadcast to every window
    as a start -- and ``previous_tau`` that window's Kendall's tau (for the first day's
    ratios), both None for a first run.
    """

    dates: pd.DatetimeIndex
    za: np.ndarray
    zb: np.ndarray
    positions: np.ndarray
    start: dict[tuple[str, int], np.ndarray] | None = None
    previous_tau: float | None = None


#: Windows of one pair beyond which its rows are fitted coarse to fine (``chain``).
CHAIN_FROM = 16


def pair_metrics(dates: pd.DatetimeIndex, za: np.ndarray, zb: np.ndarray,
                 settings: RollingSettings, positions: np.ndarray, *,
                 start: dict[tuple[str, int], np.ndarray] | None = None,
                 previous_tau: float | None = None) -> PairMetrics:
    """Metrics of the windows ending at ``positions`` of one pair (see :class:`PairWindows`
    for the arguments and :func:`batch_metrics`)."""
    return batch_metrics([PairWindows(dates, za, zb, positions, start, previous_tau)],
                         settings)[0]


def batch_metrics(items: list[PairWindows], settings: RollingSettings) -> list[PairMetrics]:
    """Metrics of the new window ends of several pairs, fitted as one batch.

    The windows of all pairs are stacked as the rows of one batch (the daily update: one new
    window per pair, hundreds of pairs, costs about as much as a few windows each). The
    windows of a single pair with more than :data:`CHAIN_FROM` of them are fitted coarse to
    fine along the chain instead (consecutive windows have nearby optima).
    """
    w = settings.window
    q = settings.tail_q
    sizes = np.array([len(it.positions) for it in items], dtype=np.intp)
    results: list[PairMetrics | None] = [None] * len(items)
    for i, it in enumerate(items):
        if sizes[i] == 0:
            results[i] = PairMetrics(pd.DataFrame(columns=METRIC_COLUMNS), it.start or {},
                                     it.previous_tau if it.previous_tau is not None else np.nan)
    live = [i for i in range(len(items)) if sizes[i]]
    if not live:
        return results
    firsts = [items[i].positions - (w - 1) for i in live]
    u, v, tau, dominance = _window_statistics(
        [(items[i].za, items[i].zb, f) for i, f in zip(live, firsts)], w)
    tau_se = kendall_tau_se(u, v, tau, dominance)
    rho_s = spearman_rho(u, v)
    emp = tail_dependence(u, v, q)
    emp_lo, emp_hi = np.asarray(emp.lower, float), np.asarray(emp.upper, float)
    rows = len(tau)
    bounds = np.concatenate([[0], np.cumsum(sizes[live])])

    def binomial_se(lam):
        p = np.clip(lam * q, 0.0, 1.0)
        return np.sqrt(p * (1 - p) / w) / q

    families = tuple(settings.families)
    if "gaussian" not in families:
        families = (*families, "gaussian")
    # Warm starts per row: each pair's stored estimates on its rows, NaN (tau start) elsewhere.
    starts: dict[tuple[str, int], np.ndarray] = {}
    for j, i in enumerate(live):
        for key, p in (items[i].start or {}).items():
            arr = starts.setdefault(key, np.full((rows, np.size(p)), np.nan))
            arr[bounds[j]:bounds[j + 1]] = p
    chain = 8 if len(live) == 1 and rows > CHAIN_FROM else 0
    sel = select_batched(u, v, families, settings.criterion, tau=tau, start=starts or None,
                         chain=chain)
    fits = sel.fits
    candidate = np.array([f.family in settings.families for f in fits])
    scores = sel.score()
    scores[~candidate] = np.inf
    best = np.argmin(scores, axis=0)
    cols = np.arange(rows)
    loglik = np.stack([f.loglik for f in fits])
    lower = np.zeros_like(loglik)
    upper = np.zeros_like(loglik)
    for s, f in enumerate(fits):
        if f.n_params == 0:
            continue
        for rot in np.unique(f.rotations):
            m = f.rotations == rot
            fam = family(f.family, int(rot))
            p = tuple(f.params[m, j] for j in range(f.n_params))
            lower[s, m] = fam.tail_lower(p)
            upper[s, m] = fam.tail_upper(p)
    params = np.full((rows, 2), np.nan)
    names, rots, conv = [], [], []
    for c, s in enumerate(best):
        f = fits[s]
        params[c, :f.n_params] = f.params[c]
        names.append(f.family)
        rots.append(int(f.rotations[c]))
        conv.append(bool(f.converged[c]))
    gauss = next(i for i, f in enumerate(fits) if f.family == "gaussian")
    k_best = np.array([fits[s].n_params for s in best])
    ll_best = loglik[best, cols]

    # The stored "aic" columns hold the settings' criterion (AIC or BIC).
    score_best = information_criterion(ll_best, k_best, w, settings.criterion)
    score_gauss = information_criterion(loglik[gauss], 1, w, settings.criterion)
    tail_floor = 1e-6
    ll_lower = np.where(lower > tail_floor, loglik, -np.inf).max(axis=0)
    ll_upper = np.where(upper > tail_floor, loglik, -np.inf).max(axis=0)
    # Each row's previous window: the row before within its pair, or the stored one.
    prev = np.empty(rows)
    for j, i in enumerate(live):
        lo, hi = bounds[j], bounds[j + 1]
        before = items[i].previous_tau
        prev[lo] = tau[lo] if before is None or not np.isfinite(before) else before
        prev[lo + 1:hi] = tau[lo:hi - 1]
    llr_lo, llr_hi = _newest_day_ratios(u[:, -1], v[:, -1], prev)
    gauss_q = _gaussian_tail_concordance(tau, q)
    # Akaike weights over the candidate slots only (the Gaussian fitted as a reference
    # outside the candidates has score +inf, so weight 0).
    weights = akaike_weights(scores)
    frame = pd.DataFrame({
        "date": np.concatenate([items[i].dates[items[i].positions] for i in live]),
        "start": np.concatenate([items[i].dates[f] for i, f in zip(live, firsts)]),
        "n": np.full(rows, w),
        "kendall_tau": tau, "kendall_tau_se": tau_se, "spearman_rho": rho_s,
        "family": names, "rotation": rots, "param1": params[:, 0], "param2": params[:, 1],
        "converged": conv, "loglik": ll_best, "aic": score_best,
        "loglik_gauss": loglik[gauss], "aic_gauss": score_gauss,
        "tail_lower": lower[best, cols], "tail_upper": upper[best, cols],
        "tail_lower_emp": emp_lo, "tail_upper_emp": emp_hi,
        "tail_lower_emp_se": binomial_se(emp_lo), "tail_upper_emp_se": binomial_se(emp_hi),
        "gauss_tail_q": gauss_q, "loglik_best_lower": ll_lower, "loglik_best_upper": ll_upper,
        "llr_lower": llr_lo, "llr_upper": llr_hi,
        "tail_lower_avg": model_average(weights, lower),
        "tail_upper_avg": model_average(weights, upper),
    }, columns=list(METRIC_COLUMNS))
    for j, i in enumerate(live):
        lo, hi = bounds[j], bounds[j + 1]
        # Slot keys as select_batched takes them: rotation 0 or 180 (90 and 270 are turns).
        last = {(f.family, int(f.rotations[hi - 1]) // 180 * 180): f.params[hi - 1].copy()
                for f in fits if f.n_params}
        results[i] = PairMetrics(frame.iloc[lo:hi].reset_index(drop=True), last,
                                 float(tau[hi - 1]))
    return results


#: Pairs with at most this many windows have them counted window by window (sorting), the
#: rest along their own series by banded prefix sums.
FEW_WINDOWS = 8


def _window_statistics(series: list[tuple[np.ndarray, np.ndarray, np.ndarray]], w: int):
    """Pseudo-observations of both margins, Kendall's tau and dominance counts of the
    windows starting at ``first`` of each ``(x, y, first)``, rows in that order.

    A series with many windows is counted along itself (the banded prefix sums of
    :mod:`monitor.stats.sliding` cover its overlapping windows once). The windows of series with
    few (the daily update: one each, hundreds of pairs) are stacked and counted together by
    sorting: the same integer counts, so the same numbers to the last bit.
    """
    parts: list[tuple | None] = [None] * len(series)
    few = []
    for k, (x, y, f) in enumerate(series):
        if len(f) <= FEW_WINDOWS:
            few.append(k)
        else:
            parts[k] = (sliding_ranks(x, w, f) / (w + 1.0), sliding_ranks(y, w, f) / (w + 1.0),
                        sliding_kendall_tau(x, y, w, f), sliding_dominance(x, y, w, f))
    if few:
        xw = np.concatenate([sliding_window_view(series[k][0], w)[series[k][2]] for k in few])
        yw = np.concatenate([sliding_window_view(series[k][1], w)[series[k][2]] for k in few])
        stacked = (pseudo_observations(xw), pseudo_observations(yw), kendall_tau(xw, yw),
                   window_dominance(xw, yw))
        at = np.cumsum([0] + [len(series[k][2]) for k in few])
        for j, k in enumerate(few):
            parts[k] = tuple(a[at[j]:at[j + 1]] for a in stacked)
    return tuple(np.concatenate([p[m] for p in parts]) for m in range(4))


def _newest_day_ratios(u: np.ndarray, v: np.ndarray, tau: np.ndarray):
    """log c_alt(u, v) - log c_Gauss(u, v) for the newest day of each window, with Clayton
    (lower tail) and survival Clayton (upper tail) alternatives and the Gaussian all at the
    same Kendall's tau (theta = 2 tau/(1 - tau), rho = sin(pi tau / 2)); 0 where tau is below
    :data:`TAU_FLOOR` (no positive-dependence alternative with that tau)."""
    ok = tau > TAU_FLOOR
    t = np.where(ok, tau, 0.5)
    theta = np.clip(2 * t / (1 - t), 1e-4, 30.0)
    rho = np.sin(np.pi * t / 2)
    gauss = family("gaussian").logpdf(u, v, (rho,))
    lo = family("clayton").logpdf(u, v, (theta,)) - gauss
    hi = family("clayton", 180).logpdf(u, v, (theta,)) - gauss
    return np.where(ok, lo, 0.0), np.where(ok, hi, 0.0)


def _gaussian_tail_concordance(tau: np.ndarray, q: float) -> np.ndarray:
    """C(q, q)/q of the Gaussian copula with the same Kendall's tau (rho = sin(pi tau/2)):
    what central dependence alone implies for the finite-level tail (equal in both tails by
    radial symmetry)."""
    rho = np.clip(np.sin(np.pi * tau / 2), -0.999, 0.999)
    return family("gaussian").cdf(q, q, (rho,)) / q
