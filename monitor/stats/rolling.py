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
from itertools import pairwise

import numpy as np
import pandas as pd
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import ArrayLike, NDArray

from monitor.stats.copulas import FAMILY_NAMES, family
from monitor.stats.criteria import information_criterion
from monitor.stats.empirical import kendall_tau, pseudo_observations, spearman_rho, tail_dependence
from monitor.stats.fitting import BatchFit, akaike_weights, model_average, select_batched
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
#: Above this tau the same-tau alternatives are taken at it (Clayton theta = 2t/(1-t) = 30,
#: the end of its box); tau = 1 is a pair of copies of one series.
TAU_CEILING = 30.0 / 32.0


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
    fine along the chain instead (consecutive windows have nearby optima). A pair without
    new window ends gets an empty frame and its given starts and tau back.
    """
    live = [it for it in items if len(it.positions)]
    computed = iter(_stacked_metrics(live, settings) if live else [])
    return [next(computed) if len(it.positions) else _no_new_windows(it) for it in items]


def _no_new_windows(item: PairWindows) -> PairMetrics:
    """The metrics of a pair with nothing to compute: no rows, what it started from."""
    return PairMetrics(pd.DataFrame(columns=METRIC_COLUMNS), item.start or {},
                       item.previous_tau if item.previous_tau is not None else np.nan)


def _stacked_metrics(items: list[PairWindows], settings: RollingSettings) -> list[PairMetrics]:
    """:func:`batch_metrics` of pairs that each have new window ends: their windows are the
    rows of one batch, pair ``j`` owning rows ``bounds[j]:bounds[j + 1]``."""
    w = settings.window
    firsts = [it.positions - (w - 1) for it in items]
    u, v, tau, dominance = _window_statistics(
        [(it.za, it.zb, f) for it, f in zip(items, firsts)], w)
    rows = len(tau)
    bounds = np.concatenate([[0], np.cumsum([len(it.positions) for it in items])])
    chain = 8 if len(items) == 1 and rows > CHAIN_FROM else 0
    fits, scores = _fit_slots(u, v, tau, settings, _stacked_starts(items, bounds, rows), chain)
    frame = pd.DataFrame({
        "date": np.concatenate([it.dates[it.positions] for it in items]),
        "start": np.concatenate([it.dates[f] for it, f in zip(items, firsts)]),
        "n": np.full(rows, w),
        **_empirical_columns(u, v, tau, dominance, w, settings.tail_q),
        **_model_columns(fits, scores, w, settings.criterion),
        **_signal_inputs(u, v, tau, _previous_taus(items, bounds, tau), settings.tail_q),
    }, columns=list(METRIC_COLUMNS))
    return [PairMetrics(frame.iloc[lo:hi].reset_index(drop=True), _last_params(fits, hi - 1),
                        float(tau[hi - 1]))
            for lo, hi in pairwise(bounds)]


def _stacked_starts(items: list[PairWindows], bounds: NDArray[np.intp], rows: int
                    ) -> dict[tuple[str, int], NDArray[np.float64]]:
    """Warm starts per row and slot: each pair's stored estimates on its rows, NaN (the tau
    start) elsewhere."""
    starts: dict[tuple[str, int], NDArray[np.float64]] = {}
    for j, it in enumerate(items):
        for key, p in (it.start or {}).items():
            arr = starts.setdefault(key, np.full((rows, np.size(p)), np.nan))
            arr[bounds[j]:bounds[j + 1]] = p
    return starts


def _previous_taus(items: list[PairWindows], bounds: NDArray[np.intp],
                   tau: NDArray[np.float64]) -> NDArray[np.float64]:
    """Kendall's tau of each row's previous window: the row before within its pair, or the
    pair's stored one (the row's own where none is stored)."""
    prev = np.empty(len(tau))
    for j, it in enumerate(items):
        lo, hi = bounds[j], bounds[j + 1]
        before = it.previous_tau
        prev[lo] = tau[lo] if before is None or not np.isfinite(before) else before
        prev[lo + 1:hi] = tau[lo:hi - 1]
    return prev


def _empirical_columns(u: NDArray[np.float64], v: NDArray[np.float64],
                       tau: NDArray[np.float64], dominance: NDArray, w: int, q: float
                       ) -> dict[str, NDArray[np.float64]]:
    """Kendall's tau with its standard error, Spearman's rho, and the nonparametric tail
    coefficients at level ``q`` with their binomial standard errors
    ``sqrt(p (1 - p) / w) / q``, ``p = lambda q``."""
    emp = tail_dependence(u, v, q)
    lower, upper = np.asarray(emp.lower, float), np.asarray(emp.upper, float)

    def binomial_se(lam: NDArray[np.float64]) -> NDArray[np.float64]:
        p = np.clip(lam * q, 0.0, 1.0)
        return np.sqrt(p * (1 - p) / w) / q

    return {"kendall_tau": tau, "kendall_tau_se": kendall_tau_se(u, v, tau, dominance),
            "spearman_rho": spearman_rho(u, v),
            "tail_lower_emp": lower, "tail_upper_emp": upper,
            "tail_lower_emp_se": binomial_se(lower), "tail_upper_emp_se": binomial_se(upper)}


def _fit_slots(u: NDArray[np.float64], v: NDArray[np.float64], tau: NDArray[np.float64],
               settings: RollingSettings, starts: dict[tuple[str, int], NDArray[np.float64]],
               chain: int) -> tuple[tuple[BatchFit, ...], NDArray[np.float64]]:
    """Every candidate slot fitted on every row, and the Gaussian (the signals' reference)
    also when it is not a candidate; with the criterion values, shape (slots, rows), +inf on
    the slots that are not candidates."""
    families = tuple(settings.families)
    if "gaussian" not in families:
        families = (*families, "gaussian")
    sel = select_batched(u, v, families, settings.criterion, tau=tau, start=starts or None,
                         chain=chain)
    candidate = np.array([f.family in settings.families for f in sel.fits])
    scores = sel.score()
    scores[~candidate] = np.inf
    return sel.fits, scores


def _model_columns(fits: tuple[BatchFit, ...], scores: NDArray[np.float64], w: int,
                   criterion: str) -> dict[str, NDArray]:
    """The columns of the fitted families: the selected one (lowest score) with its
    log-likelihood, criterion value (stored as ``aic`` whatever the criterion) and tail
    coefficients; the Gaussian's; the best lower- and upper-tail-dependent log-likelihoods;
    and the tail coefficients averaged with the Akaike weights of the candidate slots (the
    Gaussian fitted as a reference outside the candidates has score +inf, so weight 0)."""
    best = np.argmin(scores, axis=0)
    cols = np.arange(best.size)
    loglik = np.stack([f.loglik for f in fits])
    lower, upper = _slot_tails(fits)
    ll_best = loglik[best, cols]
    k_best = np.array([fits[s].n_params for s in best])
    gauss = next(i for i, f in enumerate(fits) if f.family == "gaussian")
    weights = akaike_weights(scores)
    return {
        **_selected_columns(fits, best),
        "loglik": ll_best, "aic": information_criterion(ll_best, k_best, w, criterion),
        "loglik_gauss": loglik[gauss],
        "aic_gauss": information_criterion(loglik[gauss], fits[gauss].n_params, w, criterion),
        "tail_lower": lower[best, cols], "tail_upper": upper[best, cols],
        "loglik_best_lower": _best_tail_loglik(loglik, lower),
        "loglik_best_upper": _best_tail_loglik(loglik, upper),
        "tail_lower_avg": model_average(weights, lower),
        "tail_upper_avg": model_average(weights, upper),
    }


def _slot_tails(fits: tuple[BatchFit, ...]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Model-implied lower and upper tail coefficients of every slot on every row, shape
    (slots, rows); 0 for a family without parameters."""
    lower = np.zeros((len(fits), fits[0].loglik.size))
    upper = np.zeros_like(lower)
    for s, f in enumerate(fits):
        if f.n_params == 0:
            continue
        for rot in np.unique(f.rotations):
            m = f.rotations == rot
            fam = family(f.family, int(rot))
            p = tuple(f.params[m, j] for j in range(f.n_params))
            lower[s, m] = fam.tail_lower(p)
            upper[s, m] = fam.tail_upper(p)
    return lower, upper


def _selected_columns(fits: tuple[BatchFit, ...], best: NDArray[np.intp]) -> dict[str, NDArray]:
    """Family, rotation, parameters (NaN past the family's count) and convergence flag of
    each row's selected slot ``best``."""
    params = np.full((best.size, 2), np.nan)
    rotation = np.empty(best.size, dtype=np.int64)
    converged = np.empty(best.size, dtype=bool)
    for s, f in enumerate(fits):
        m = best == s
        params[m, :f.n_params] = f.params[m]
        rotation[m] = f.rotations[m]
        converged[m] = f.converged[m]
    return {"family": np.array([f.family for f in fits], dtype=object)[best],
            "rotation": rotation, "param1": params[:, 0], "param2": params[:, 1],
            "converged": converged}


#: A slot counts as tail-dependent on a row when its model tail coefficient exceeds this.
_TAIL_FLOOR = 1e-6


def _best_tail_loglik(loglik: NDArray[np.float64], tail: NDArray[np.float64]
                      ) -> NDArray[np.float64]:
    """The largest log-likelihood per row over the slots dependent in that tail (-inf when
    none is)."""
    return np.where(tail > _TAIL_FLOOR, loglik, -np.inf).max(axis=0)


def _signal_inputs(u: NDArray[np.float64], v: NDArray[np.float64], tau: NDArray[np.float64],
                   previous_tau: NDArray[np.float64], q: float) -> dict[str, NDArray]:
    """The signals' inputs: the Gaussian tail concordance at each window's tau, and the newest
    day's log-likelihood ratios at the previous window's tau."""
    llr_lower, llr_upper = _newest_day_ratios(u[:, -1], v[:, -1], previous_tau)
    return {"gauss_tail_q": _gaussian_tail_concordance(tau, q),
            "llr_lower": llr_lower, "llr_upper": llr_upper}


def _last_params(fits: tuple[BatchFit, ...], row: int) -> dict[tuple[str, int], np.ndarray]:
    """Each slot's estimates on ``row``, keyed as :func:`select_batched` takes warm starts:
    (family, rotation 0 or 180; 90 and 270 are turns of those)."""
    return {(f.family, int(f.rotations[row]) // 180 * 180): f.params[row].copy()
            for f in fits if f.n_params}


#: Pairs with at most this many windows have them counted window by window (sorting), the
#: rest along their own series by banded prefix sums.
FEW_WINDOWS = 8


#: Per window (rows): pseudo-observations of both margins, Kendall's tau, dominance counts.
_WindowStatistics = tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64],
                          NDArray[np.int64]]


def _window_statistics(series: list[tuple[np.ndarray, np.ndarray, np.ndarray]], w: int
                       ) -> _WindowStatistics:
    """Pseudo-observations of both margins, Kendall's tau and dominance counts of the
    windows starting at ``first`` of each ``(x, y, first)``, rows in that order.

    A series with many windows is counted along itself (the banded prefix sums of
    :mod:`monitor.stats.sliding` cover its overlapping windows once). The windows of series with
    few (the daily update: one each, hundreds of pairs) are stacked and counted together by
    sorting: the same integer counts, so the same numbers to the last bit.
    """
    parts: dict[int, _WindowStatistics] = {}
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
        u, v = pseudo_observations(xw), pseudo_observations(yw)
        tau, dominance = kendall_tau(xw, yw), window_dominance(xw, yw)
        at = np.cumsum([0] + [len(series[k][2]) for k in few])
        for j, k in enumerate(few):
            rows = slice(at[j], at[j + 1])
            parts[k] = (u[rows], v[rows], tau[rows], dominance[rows])
    ordered = [parts[k] for k in range(len(series))]
    return (np.concatenate([p[0] for p in ordered]), np.concatenate([p[1] for p in ordered]),
            np.concatenate([p[2] for p in ordered]), np.concatenate([p[3] for p in ordered]))


#: |tau| at or above which a window's two series are taken for copies of one series.
COPY_TAU = 0.98
#: Share of a window's returns at exactly 0 above which an asset's prices are taken as stale.
STALE_SHARE = 0.5


def degeneracy(tau: ArrayLike, stale_a: ArrayLike, stale_b: ArrayLike,
               name_a: ArrayLike = "A", name_b: ArrayLike = "B") -> NDArray[np.object_]:
    """Why windows are degenerate ("" where they are not).

    Parameters
    ----------
    tau : array_like
        Kendall's tau of each window.
    stale_a, stale_b : array_like
        Share of each asset's returns in the window that are exactly 0.
    name_a, name_b : str or array_like of str
        The assets, as the reasons name them (one per window, or one for all).

    Returns
    -------
    ndarray of str
        ``"|tau| 1.00: copies of one series?"`` at or above :data:`COPY_TAU` (the same
        instrument under two names, a share class and its ordinary line: the copula is then
        at the comonotone bound and says nothing about tails); ``"A price stale on 60% of the
        window"`` (``A`` the asset's name) above :data:`STALE_SHARE` (a suspended or
        unrefreshed price: the window's ranks are mostly ties); both joined by "; ".
    """
    tau, share_a, share_b = np.broadcast_arrays(
        *(np.asarray(x, dtype=float) for x in (tau, stale_a, stale_b)))
    names = [np.broadcast_to(np.asarray(n, dtype=object), tau.shape) for n in (name_a, name_b)]
    copies = np.abs(tau) >= COPY_TAU
    stale = np.stack([share_a > STALE_SHARE, share_b > STALE_SHARE])
    out = np.full(tau.shape, "", dtype=object)
    for i in zip(*np.nonzero(copies | stale.any(axis=0)), strict=True):  # flagged ones only
        parts = [f"|tau| {abs(tau[i]):.2f}: copies of one series?"] if copies[i] else []
        parts += [f"{name[i]} price stale on {share[i]:.0%} of the window"
                  for name, share, hit in zip(names, (share_a, share_b), stale, strict=True)
                  if hit[i]]
        out[i] = "; ".join(parts)
    return out


def _newest_day_ratios(u: np.ndarray, v: np.ndarray, tau: np.ndarray):
    """log c_alt(u, v) - log c_Gauss(u, v) for the newest day of each window, with Clayton
    (lower tail) and survival Clayton (upper tail) alternatives and the Gaussian all at the
    same Kendall's tau (theta = 2 tau/(1 - tau), rho = sin(pi tau / 2)); 0 where tau is below
    :data:`TAU_FLOOR` (no positive-dependence alternative with that tau)."""
    ok = tau > TAU_FLOOR
    # inside the families' boxes: tau -> 1 (two copies of one series) has no finite theta
    t = np.clip(np.where(ok, tau, 0.5), None, TAU_CEILING)
    theta = np.clip(2 * t / (1 - t), 1e-4, 30.0)
    rho = np.clip(np.sin(np.pi * t / 2), -0.999, 0.999)
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
