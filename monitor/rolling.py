"""The rolling engine: every metric of every window end of a pair, batched over windows.

For a pair, the standardised residuals of both assets are aligned on the dates both have;
windows are ``window`` consecutive common dates, with ends every ``step`` dates counted from
the pair's first common date (so appending data only adds window ends). Within each window the
residuals are ranked into pseudo-observations (all windows at once, :mod:`monitor.sliding`), and
for every window end the engine computes:

- Kendall's tau (with an influence-function standard error) and Spearman's rho;
- nonparametric tail dependence C_n(q,q)/q and its upper analogue (binomial standard errors);
- every candidate family by maximum pseudo-likelihood, the AIC (or BIC) choice, its
  parameters and model-implied tail coefficients, the Gaussian's log-likelihood, and the best
  lower- and upper-tail-dependent log-likelihoods;
- the signal inputs: the Gaussian copula's tail concordance C(q,q)/q at the window's tau, and
  the newest day's log-likelihood ratios of Clayton (lower tail) and survival Clayton (upper
  tail) against the Gaussian, all three with the same Kendall's tau as the previous window.

Everything is vectorised over the windows of a pair (arrays of shape (windows, n)); rolling
windows are fitted with warm starts along the chain (:func:`monitor.fitting.fit_batched`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .copulas import FAMILY_NAMES, family
from .empirical import spearman_rho, tail_dependence
from .fitting import select_batched
from .sliding import sliding_dominance, sliding_kendall_tau, sliding_ranks

#: Stored columns of a pair's timeline, in order (DESIGN.md's export contract is a subset).
METRIC_COLUMNS = (
    "date", "start", "n", "kendall_tau", "kendall_tau_se", "spearman_rho", "family", "rotation",
    "param1", "param2", "converged", "loglik", "aic", "loglik_gauss", "aic_gauss",
    "tail_lower", "tail_upper", "tail_lower_emp", "tail_upper_emp", "tail_lower_emp_se",
    "tail_upper_emp_se", "gauss_tail_q", "loglik_best_lower", "loglik_best_upper",
    "llr_lower", "llr_upper",
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
    (``dominance / n``, from :func:`monitor.sliding.sliding_dominance`); the same estimator
    as :func:`monitor.inference.kendall_tau_interval`, batched.
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


def pair_metrics(dates: pd.DatetimeIndex, za: np.ndarray, zb: np.ndarray,
                 settings: RollingSettings, positions: np.ndarray, *,
                 start: dict[tuple[str, int], np.ndarray] | None = None,
                 previous_tau: float | None = None) -> PairMetrics:
    """Metrics of the windows ending at ``positions`` of a pair's common dates.

    Parameters
    ----------
    dates : DatetimeIndex
        The pair's common dates.
    za, zb : ndarray
        The two assets' standardised residuals on those dates.
    settings : RollingSettings
    positions : ndarray of int
        Window-end positions (from :func:`window_end_positions`), increasing.
    start : dict, optional
        Warm starts per slot (family, slot rotation) for the first window: the previous
        window's estimates, broadcast to all windows of the batch as a start.
    previous_tau : float, optional
        Kendall's tau of the window before the first one (for the first day's ratios).
    """
    w = settings.window
    if positions.size == 0:
        return PairMetrics(pd.DataFrame(columns=METRIC_COLUMNS), start or {},
                           previous_tau if previous_tau is not None else np.nan)
    first = positions - (w - 1)
    u = sliding_ranks(za, w, first) / (w + 1.0)
    v = sliding_ranks(zb, w, first) / (w + 1.0)
    tau = sliding_kendall_tau(za, zb, w, first)
    tau_se = kendall_tau_se(u, v, tau, sliding_dominance(za, zb, w, first))
    rho_s = spearman_rho(u, v)
    q = settings.tail_q
    emp = tail_dependence(u, v, q)
    emp_lo, emp_hi = np.asarray(emp.lower, float), np.asarray(emp.upper, float)

    def binomial_se(lam):
        p = np.clip(lam * q, 0.0, 1.0)
        return np.sqrt(p * (1 - p) / w) / q

    families = tuple(settings.families)
    if "gaussian" not in families:
        families = (*families, "gaussian")
    starts = None
    if start:
        starts = {k: np.broadcast_to(p, (len(positions), p.size)) for k, p in start.items()}
    sel = select_batched(u, v, families, settings.criterion, tau=tau, start=starts,
                         chain=8 if len(positions) > 16 else 0)
    fits = sel.fits
    candidate = np.array([f.family in settings.families for f in fits])
    scores = sel.score()
    scores[~candidate] = np.inf
    best = np.argmin(scores, axis=0)
    cols = np.arange(len(positions))
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
    params = np.full((len(positions), 2), np.nan)
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
    n_obs = w

    def aic_or_bic(ll, k):
        return (2 * k - 2 * ll) if settings.criterion == "aic" else (k * np.log(n_obs) - 2 * ll)

    tail_floor = 1e-6
    ll_lower = np.where(lower > tail_floor, loglik, -np.inf).max(axis=0)
    ll_upper = np.where(upper > tail_floor, loglik, -np.inf).max(axis=0)
    prev = np.concatenate([[tau[0] if previous_tau is None or not np.isfinite(previous_tau)
                            else previous_tau], tau[:-1]])
    llr_lo, llr_hi = _newest_day_ratios(u[:, -1], v[:, -1], prev)
    gauss_q = _gaussian_tail_concordance(tau, q)
    frame = pd.DataFrame({
        "date": dates[positions], "start": dates[first], "n": np.full(len(positions), w),
        "kendall_tau": tau, "kendall_tau_se": tau_se, "spearman_rho": rho_s,
        "family": names, "rotation": rots, "param1": params[:, 0], "param2": params[:, 1],
        "converged": conv, "loglik": ll_best, "aic": aic_or_bic(ll_best, k_best),
        "loglik_gauss": loglik[gauss], "aic_gauss": aic_or_bic(loglik[gauss], 1),
        "tail_lower": lower[best, cols], "tail_upper": upper[best, cols],
        "tail_lower_emp": emp_lo, "tail_upper_emp": emp_hi,
        "tail_lower_emp_se": binomial_se(emp_lo), "tail_upper_emp_se": binomial_se(emp_hi),
        "gauss_tail_q": gauss_q, "loglik_best_lower": ll_lower, "loglik_best_upper": ll_upper,
        "llr_lower": llr_lo, "llr_upper": llr_hi,
    }, columns=list(METRIC_COLUMNS))
    # Slot keys as select_batched takes them: rotation 0 or 180 (90 and 270 are their turns).
    last = {(f.family, int(f.rotations[-1]) // 180 * 180): f.params[-1].copy()
            for f in fits if f.n_params}
    return PairMetrics(frame, last, float(tau[-1]))


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
