"""The window study of a stored pair: what the dashboard's Drill-down page and its HTML report
show.

:func:`study_pair` reads the pair's stored filtered residuals, runs the one-window study of
:mod:`monitor.engine.window_study` (every candidate family fitted, ranked, tested with a
parametric-bootstrap goodness of fit, and the selected family's intervals) on the chosen
window and on a calm reference window, and adds what a risk analyst asks next:

- the **joint-crash probability** P(U <= q, V <= q) = C(q, q) at q = 1% and 5% under the
  selected copula, under the Gaussian copula with the same Kendall's tau, empirically, under
  independence (q^2) and the Frechet-Hoeffding bounds max(2q - 1, 0) <= C(q, q) <= q;
- the **tail concordance curves** C(q, q)/q (lower tail) and P(U > 1 - q, V > 1 - q)/q (upper
  tail) over a grid of q, empirical (with a binomial band) against the model and against the
  Gaussian with the same tau.

The reference window is, by default, the calmest stored rolling window of the pair whose
Kendall's tau is within 0.1 of the study window's, so that the comparison isolates the tails
(see :func:`choose_reference`); a range may be given instead.

The figures of the study (:func:`scatter_figure`, :func:`crash_figure`, :func:`tail_figure`)
each say in their title what produced them: pair, window, n, selected family and criterion,
marginal mode. Colours are the Okabe-Ito set of :mod:`monitor.common.palette`.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from numpy.typing import ArrayLike, NDArray
from plotly.subplots import make_subplots
from scipy import special

from monitor.common.arrays import read_only
from monitor.common.errors import InputError
from monitor.common.palette import (
    BLACK,
    BLUE,
    GREEN,
    GREY,
    MUTED,
    RULE,
    SKY,
    VERMILION,
    figure_layout,
)
from monitor.engine.window_study import MIN_ROWS, WindowStudy, study_window
from monitor.stats.copulas import family
from monitor.stats.empirical import (
    empirical_copula,
    kendall_tau,
    tail_dependence,
    tail_share_interval,
)
from monitor.stats.fitting import CopulaFit, Selection, candidate_slots
from monitor.stats.inference import FitUncertainty, GoodnessOfFit, Interval
from monitor.views.common import parse_date

#: Quantile levels of the joint-crash probabilities.
CRASH_LEVELS = (0.01, 0.05)
#: Quantile levels of the tail concordance curves.
TAIL_GRID = tuple(round(0.01 * k, 2) for k in range(1, 31))
#: Replicate counts the dashboard offers (0: no bootstrap).
REPLICATE_CHOICES = (0, 100, 200, 500)
#: Two-sided 95% normal quantile (binomial bands).

Progress = Callable[[int, int, str], None]


# ----------------------------------------------------------------------------- small formulas
def gaussian_rho_from_tau(tau: ArrayLike) -> NDArray[np.float64]:
    """Correlation of the Gaussian copula with Kendall's tau ``tau``.

    Notes
    -----
    tau = (2 / pi) arcsin(rho) for every elliptical copula (Lindskog, McNeil & Schmock 2003,
    "Kendall's tau for elliptical distributions"), so rho = sin(pi tau / 2). Clipped to
    |rho| <= 0.9999 so the Gaussian density stays defined.
    """
    return np.clip(np.sin(np.pi * np.asarray(tau, dtype=float) / 2.0), -0.9999, 0.9999)


def frechet_hoeffding_bounds(u: ArrayLike, v: ArrayLike
                             ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """The bounds W(u, v) <= C(u, v) <= M(u, v) that hold for every copula.

    Notes
    -----
    W(u, v) = max(u + v - 1, 0) and M(u, v) = min(u, v) (Nelsen 2006, *An Introduction to
    Copulas*, Theorem 2.2.3). On the diagonal: max(2q - 1, 0) <= C(q, q) <= q.
    """
    u = np.asarray(u, dtype=float)
    v = np.asarray(v, dtype=float)
    return np.maximum(u + v - 1.0, 0.0), np.minimum(u, v)


# ----------------------------------------------------------------------------- results
@dataclass(frozen=True, slots=True)
class CrashProbability:
    """P(U <= q, V <= q) at one level q under several copulas.

    ``fitted`` is the selected copula's C(q, q); ``gaussian`` the Gaussian copula's with the
    selected copula's Kendall's tau; ``empirical`` the share of the window's days with both
    pseudo-observations at or below q (``empirical_count`` days, Wilson 95% interval);
    ``independence`` q^2; ``lower_bound`` and ``upper_bound`` the Frechet-Hoeffding bounds.
    """

    q: float
    fitted: float
    gaussian: float
    empirical: float
    empirical_count: int
    empirical_lower: float
    empirical_upper: float
    independence: float
    lower_bound: float
    upper_bound: float

    @property
    def ratio(self) -> float:
        """fitted / gaussian: how much likelier a joint crash is than central dependence
        alone implies."""
        return self.fitted / self.gaussian if self.gaussian > 0 else math.nan


@dataclass(frozen=True, slots=True)
class TailCurve:
    """Finite-level tail concordance of one tail over a grid of q.

    Lower tail: C(q, q)/q; upper tail: P(U > 1 - q, V > 1 - q)/q. ``empirical`` with its
    Wilson 95% band (``empirical_lower``, ``empirical_upper``), ``model`` under the selected
    copula, ``gaussian`` under the Gaussian copula with the same Kendall's tau.
    """

    tail: str
    q: NDArray[np.float64]
    empirical: NDArray[np.float64]
    empirical_lower: NDArray[np.float64]
    empirical_upper: NDArray[np.float64]
    model: NDArray[np.float64]
    gaussian: NDArray[np.float64]


@dataclass(frozen=True, slots=True)
class WindowResult:
    """One window of a pair study: the window study and what the page adds to it.

    ``role`` is ``"study"`` or ``"reference"``; ``dates`` are the window's dates (the order
    of ``window.u`` and ``window.v``); ``gaussian_tau`` is the selected copula's Kendall's
    tau and ``gaussian_rho`` the correlation of the Gaussian copula with that tau.
    """

    role: str
    window: WindowStudy
    dates: tuple[pd.Timestamp, ...]
    gaussian_tau: float
    gaussian_rho: float
    crash: tuple[CrashProbability, ...]
    lower_curve: TailCurve
    upper_curve: TailCurve
    seconds: float

    @property
    def selected(self) -> CopulaFit:
        return self.window.selection.selected


@dataclass(frozen=True, slots=True)
class PairStudy:
    """The study window of a pair beside its reference window, with their provenance.

    ``reference_rule`` says how the reference window was chosen; ``marginal_mode`` and
    ``marginal_key`` which stored filtered residuals were ranked; ``replicates`` and ``seed``
    the bootstrap behind the goodness-of-fit p-values and intervals.
    """

    pair: tuple[str, str]
    study: WindowResult
    reference: WindowResult | None
    reference_rule: str
    marginal_mode: str
    marginal_key: str
    criterion: str
    families: tuple[str, ...]
    replicates: int
    seed: int
    seconds: float
    notes: tuple[str, ...] = field(default=())

    @property
    def windows(self) -> tuple[WindowResult, ...]:
        return (self.study,) if self.reference is None else (self.study, self.reference)

    def to_dict(self) -> dict:
        """A JSON-ready dict (non-finite numbers as None); :meth:`from_dict` inverts it."""
        return _clean({
            "pair": list(self.pair), "reference_rule": self.reference_rule,
            "marginal_mode": self.marginal_mode, "marginal_key": self.marginal_key,
            "criterion": self.criterion, "families": list(self.families),
            "replicates": self.replicates, "seed": self.seed, "seconds": self.seconds,
            "notes": list(self.notes),
            "study": _result_to_dict(self.study),
            "reference": None if self.reference is None else _result_to_dict(self.reference),
        })

    @classmethod
    def from_dict(cls, data: dict) -> PairStudy:
        """The study back from :meth:`to_dict` (e.g. from a page's browser-side store)."""
        try:
            return cls(
                pair=tuple(data["pair"]), study=_result_from_dict(data["study"]),
                reference=(None if data["reference"] is None
                           else _result_from_dict(data["reference"])),
                reference_rule=data["reference_rule"], marginal_mode=data["marginal_mode"],
                marginal_key=data["marginal_key"], criterion=data["criterion"],
                families=tuple(data["families"]), replicates=int(data["replicates"]),
                seed=int(data["seed"]), seconds=_num(data["seconds"]),
                notes=tuple(data.get("notes", ())))
        except (KeyError, TypeError, ValueError) as exc:
            raise InputError(f"stored window study: unreadable ({type(exc).__name__}: {exc})"
                             ) from None


# ----------------------------------------------------------------------------- computations
def joint_crash_probabilities(u: ArrayLike, v: ArrayLike, fit: CopulaFit,
                              levels: tuple[float, ...] = CRASH_LEVELS
                              ) -> tuple[CrashProbability, ...]:
    """P(U <= q, V <= q) for each q under the fitted copula, the Gaussian copula with its
    Kendall's tau, the sample, independence, and the Frechet-Hoeffding bounds.

    Parameters
    ----------
    u, v : array_like, shape (n,)
        Pseudo-observations of the window.
    fit : CopulaFit
        The selected copula.
    levels : tuple of float
        Quantile levels q in (0, 0.5).

    Returns
    -------
    tuple of CrashProbability

    Notes
    -----
    C(q, q) is the probability that both assets fall at or below their own q-quantile on the
    same day. Gaussian: rho = sin(pi tau / 2) with tau the fitted copula's Kendall's tau
    (:func:`gaussian_rho_from_tau`), so the two copulas share their central dependence and
    differ only in shape. Empirical: C_n(q, q) = #{i : U_i <= q, V_i <= q} / n (Deheuvels
    1979), with a Wilson 95% interval kept inside [0, q], since C(q, q) <= q
    (:func:`monitor.stats.empirical.tail_share_interval`). Bounds: Nelsen (2006), Theorem 2.2.3.
    """
    u = np.asarray(u, dtype=float)
    v = np.asarray(v, dtype=float)
    q = np.asarray(levels, dtype=float)
    n = u.size
    fam = fit.copula
    fitted = np.asarray(fam.cdf(q, q, fit.param_tuple), dtype=float)
    rho = gaussian_rho_from_tau(fit.kendall_tau)
    gauss = np.asarray(family("gaussian").cdf(q, q, (rho,)), dtype=float)
    share = np.asarray(empirical_copula(u, v, q, q), dtype=float)
    lo, hi = tail_share_interval(share, n, q)
    w, m = frechet_hoeffding_bounds(q, q)
    return tuple(
        CrashProbability(q=float(q[i]), fitted=float(fitted[i]), gaussian=float(gauss[i]),
                         empirical=float(share[i]), empirical_count=int(np.rint(share[i] * n)),
                         empirical_lower=float(lo[i]), empirical_upper=float(hi[i]),
                         independence=float(q[i] ** 2), lower_bound=float(w[i]),
                         upper_bound=float(m[i]))
        for i in range(q.size))


def tail_concordance(u: ArrayLike, v: ArrayLike, fit: CopulaFit, tail: str = "lower",
                     levels: tuple[float, ...] = TAIL_GRID) -> TailCurve:
    """Empirical against model tail concordance over a grid of q.

    Parameters
    ----------
    u, v : array_like, shape (n,)
        Pseudo-observations of the window.
    fit : CopulaFit
        The selected copula.
    tail : {"lower", "upper"}
    levels : tuple of float
        Quantile levels in (0, 0.5].

    Returns
    -------
    TailCurve

    Notes
    -----
    lambda_L(q) = C(q, q)/q and lambda_U(q) = [1 - 2(1 - q) + C(1 - q, 1 - q)]/q, the
    finite-level forms whose limits q -> 0 are the tail-dependence coefficients (Joe 1997,
    section 2.1.10); the empirical ones are :func:`monitor.stats.empirical.tail_dependence`. The band
    treats q lambda(q) as a binomial share of n days (Wilson 95% interval, kept inside
    [0, q] by :func:`monitor.stats.empirical.tail_share_interval`, so the band of lambda lies in
    [0, 1]): a pointwise band that ignores the rank step and the overlap between levels.
    """
    if tail not in ("lower", "upper"):
        raise ValueError(f"tail must be 'lower' or 'upper'; got {tail!r}")
    u = np.asarray(u, dtype=float)
    v = np.asarray(v, dtype=float)
    q = np.asarray(levels, dtype=float)
    emp = tail_dependence(u, v, q)
    empirical = np.asarray(emp.lower if tail == "lower" else emp.upper, dtype=float)
    lo, hi = tail_share_interval(empirical * q, u.size, q)
    at = q if tail == "lower" else 1.0 - q
    rho = gaussian_rho_from_tau(fit.kendall_tau)

    def concordance(c):
        return c / q if tail == "lower" else (1.0 - 2.0 * (1.0 - q) + c) / q

    model = concordance(np.asarray(fit.copula.cdf(at, at, fit.param_tuple), dtype=float))
    gauss = concordance(np.asarray(family("gaussian").cdf(at, at, (rho,)), dtype=float))
    return TailCurve(tail, read_only(q), read_only(empirical), read_only(lo / q),
                     read_only(hi / q), read_only(model), read_only(gauss))


def window_result(window: WindowStudy, dates: pd.DatetimeIndex | tuple, role: str = "study",
                  seconds: float = 0.0) -> WindowResult:
    """The page's numbers for one window study (crash probabilities and tail curves)."""
    fit = window.selection.selected
    return WindowResult(
        role=role, window=window, dates=tuple(pd.Timestamp(d) for d in dates),
        gaussian_tau=float(fit.kendall_tau),
        gaussian_rho=float(gaussian_rho_from_tau(fit.kendall_tau)),
        crash=joint_crash_probabilities(window.u, window.v, fit),
        lower_curve=tail_concordance(window.u, window.v, fit, "lower"),
        upper_curve=tail_concordance(window.u, window.v, fit, "upper"),
        seconds=float(seconds))


# ----------------------------------------------------------------------------- stored inputs
def pair_residuals(view, a: str, b: str) -> pd.DataFrame:
    """The pair's stored filtered residuals: columns ``a``, ``b`` on every date either has.

    Raises
    ------
    InputError
        When either asset has no stored residuals under the view's marginal settings.
    """
    frame = view.store.read_residuals(view.marginal_key, [a, b])
    for col in (a, b):
        if col not in frame.columns:
            known = ", ".join(view.store.assets()) or "none"
            raise InputError(f"pair {a}/{b}: no stored filtered residuals for {col!r} "
                             f"(stored assets: {known}; run 'comove update' for new ones)")
    return frame[[a, b]]


def _stored_order(view, a: str, b: str) -> tuple[str, str] | None:
    pairs = set(view.store.monitored_pairs(view.rolling_key))
    if (a, b) in pairs:
        return a, b
    if (b, a) in pairs:
        return b, a
    return None


#: Largest |tau_reference - tau_study| of a default reference window, widened in this order
#: when no stored window qualifies.
TAU_TOLERANCES = (0.1, 0.2)


@dataclass(frozen=True, slots=True)
class ReferenceChoice:
    """The default reference window and why it was chosen.

    ``start`` and ``end`` bound the window; ``rule`` is the sentence the page and the report
    show after "reference chosen by:"; ``kendall_tau`` and ``tail_excess`` are the stored
    window's values (NaN for the fallback without stored windows); ``tolerance`` the tau
    tolerance that found it (None when tau was not matched); ``candidates`` how many stored
    windows qualified under that rule.
    """

    start: pd.Timestamp
    end: pd.Timestamp
    rule: str
    kendall_tau: float
    tail_excess: float
    tolerance: float | None
    candidates: int


def tail_excess(timeline: pd.DataFrame) -> NDArray[np.float64]:
    """How far each stored window's tails stand above what its Kendall's tau implies.

    Parameters
    ----------
    timeline : DataFrame
        Stored metrics rows (:meth:`monitor.data.store.Store.read_timeline`) with
        ``tail_lower_emp``, ``tail_upper_emp`` and ``gauss_tail_q``.

    Returns
    -------
    ndarray
        ``max(lambda_L(q) - g, lambda_U(q) - g)`` per row, with ``lambda(q)`` the
        nonparametric tail concordance at the stored level q and ``g`` the Gaussian copula's
        C(q, q)/q at the window's tau (the same for both tails: the Gaussian copula is
        radially symmetric). Where ``g`` is missing the excess over zero is used.
    """
    g = pd.to_numeric(timeline["gauss_tail_q"], errors="coerce").fillna(0.0).to_numpy(float)
    lower = pd.to_numeric(timeline["tail_lower_emp"], errors="coerce").to_numpy(float)
    upper = pd.to_numeric(timeline["tail_upper_emp"], errors="coerce").to_numpy(float)
    return np.fmax(lower - g, upper - g)


def choose_reference(timeline: pd.DataFrame, start: pd.Timestamp, end: pd.Timestamp,
                     study_tau: float, *, window: int, tail_q: float,
                     tolerances: tuple[float, ...] = TAU_TOLERANCES) -> ReferenceChoice | None:
    """The calmest stored window whose Kendall's tau is close to the study window's.

    Parameters
    ----------
    timeline : DataFrame
        The pair's stored metrics (one row per window end: ``date``, ``start``,
        ``kendall_tau``, ``tail_lower_emp``, ``tail_upper_emp``, ``gauss_tail_q``).
    start, end : Timestamp
        The study window.
    study_tau : float
        Sample Kendall's tau of the study window.
    window : int
        Stored window length (days), for the rule's wording.
    tail_q : float
        Stored tail level q, for the rule's wording.
    tolerances : tuple of float
        Tau tolerances tried in order.

    Returns
    -------
    ReferenceChoice or None
        None when no stored window has a tail value.

    Notes
    -----
    The comparison should isolate the tails: two windows with the same Kendall's tau share
    their central dependence, so what differs between them is the shape of the copula in the
    corners. Hence the rule, in order:

    1. windows not overlapping the study window with ``|tau - tau_study| <= 0.1``;
    2. the same with the tolerance widened to 0.2;
    3. every window not overlapping the study window (tau not matched, said so);
    4. every stored window (all overlap the study window, said so).

    Among the candidates of the first rule that has any, the *calmest* is the one with the
    smallest :func:`tail_excess`, the larger of the two tails' nonparametric C(q,q)/q above
    the Gaussian copula's value at the window's own tau. Calm thus means "the tails look
    the way the central dependence alone implies" -- the null of the tail-divergence
    signals -- rather than "few joint crashes", which at a matched tau would favour windows
    that merely drew fewer tail days (a noisy low count) and, with tau unmatched, windows of
    weak overall dependence. Realised volatility is not used: the pseudo-observations are
    ranks of GARCH-filtered residuals, from which volatility has been taken out. Ties go to
    the closer tau, then to the latest window.
    """
    rows = timeline.dropna(subset=["tail_lower_emp"]).reset_index(drop=True)
    if rows.empty:
        return None
    dates = pd.to_datetime(rows["date"])
    starts = pd.to_datetime(rows["start"])
    tau = pd.to_numeric(rows["kendall_tau"], errors="coerce").to_numpy(float)
    excess = tail_excess(rows)
    distance = np.abs(tau - float(study_tau))
    apart = ((dates < start) | (starts > end)).to_numpy()
    what = f"calmest stored {window}-day window"
    calm = (f"smallest tail excess (larger of the two tails' empirical C(q,q)/q above the "
            f"Gaussian copula's at the window's tau, q = {tail_q:g})")
    pools = []
    for i, tol in enumerate(tolerances):
        none_closer = f"; none within {tolerances[i - 1]:g}" if i else ""
        pools.append((apart & (distance <= tol), tol,
                      (f"{what} with Kendall's tau within {tol:g} of the study window's "
                       f"({study_tau:.3f}{none_closer}), not overlapping it, by {calm}")))
    pools.append((apart, None,
                  (f"{what} not overlapping the study window, by {calm}; no stored window "
                   f"has Kendall's tau within {tolerances[-1]:g} of the study window's "
                   f"({study_tau:.3f}), so the taus differ")))
    pools.append((np.ones(len(rows), bool), None,
                  f"{what} by {calm}; every stored window overlaps the study window"))
    for mask, tol, text in pools:
        if not mask.any():
            continue
        idx = np.flatnonzero(mask)
        order = np.lexsort((-dates.to_numpy()[idx].astype("datetime64[ns]").astype(np.int64),
                            distance[idx], np.nan_to_num(excess[idx], nan=np.inf)))
        best = int(idx[order[0]])
        text += (f": tau {tau[best]:.3f}, tail excess {excess[best]:+.3f}; "
                 f"{idx.size} of {len(rows)} stored windows qualified")
        return ReferenceChoice(pd.Timestamp(starts.iloc[best]), pd.Timestamp(dates.iloc[best]),
                               text, float(tau[best]), float(excess[best]), tol, int(idx.size))
    return None  # pragma: no cover - the last pool always has rows


def calm_reference(view, a: str, b: str, start: pd.Timestamp, end: pd.Timestamp,
                   common: pd.DatetimeIndex, n: int, study_tau: float | None = None
                   ) -> tuple[pd.Timestamp, pd.Timestamp, str]:
    """The default reference window of a pair, and the rule that chose it.

    Parameters
    ----------
    view : StoreView
    a, b : str
    start, end : Timestamp
        The study window.
    common : DatetimeIndex
        The pair's common dates.
    n : int
        The study window's number of common dates.
    study_tau : float, optional
        Sample Kendall's tau of the study window (computed from the stored residuals when
        not given).

    Returns
    -------
    (start, end, rule)

    Notes
    -----
    :func:`choose_reference` on the pair's stored timeline: the calmest stored window with
    a Kendall's tau within 0.1 of the study window's (then 0.2, then any), not overlapping
    it. Without stored windows: the earliest ``n`` common dates.
    """
    order = _stored_order(view, a, b)
    timeline = (view.store.read_timeline(view.rolling_key, *order) if order is not None
                else pd.DataFrame())
    if not timeline.empty:
        if study_tau is None:
            frame = pair_residuals(view, a, b).dropna()
            part = frame[(frame.index >= start) & (frame.index <= end)]
            study_tau = float(kendall_tau(part[a].to_numpy(), part[b].to_numpy()))
        choice = choose_reference(timeline, start, end, study_tau, window=view.rolling.window,
                                  tail_q=view.rolling.tail_q)
        if choice is not None:
            return choice.start, choice.end, choice.rule
    lo, hi = common[0], common[min(n, len(common)) - 1]
    return lo, hi, (f"no stored rolling windows for this pair: the earliest {n} common dates "
                    "(the study window's length)")


def _window_dates(common: pd.DatetimeIndex, start: pd.Timestamp, end: pd.Timestamp
                  ) -> pd.DatetimeIndex:
    return common[(common >= start) & (common <= end)]


def _checked_window(frame: pd.DataFrame, a: str, b: str, start, end, what: str
                    ) -> tuple[pd.Timestamp, pd.Timestamp, pd.DatetimeIndex]:
    lo = parse_date(start, f"{what} start")
    hi = parse_date(end, f"{what} end")
    if lo > hi:
        raise InputError(f"{what}: start {lo.date()} is after end {hi.date()}")
    common = frame.dropna().index
    dates = _window_dates(common, lo, hi)
    if len(dates) < MIN_ROWS:
        span = (f"stored residuals of both run from {common[0].date()} to {common[-1].date()}"
                if len(common) else "the two assets have no common dates")
        raise InputError(f"{what} {lo.date()} to {hi.date()}: only {len(dates)} dates with "
                         f"residuals of both {a} and {b}; at least {MIN_ROWS} are needed "
                         f"({span})")
    return lo, hi, dates


def _study_one(frame, a, b, lo, hi, dates, view, replicates, rng, role, progress, base,
               total) -> WindowResult:
    t0 = time.perf_counter()
    r = view.rolling

    def tick(done, count, label):
        if progress is not None:
            progress(base + 1 + done, total, f"{role} window: bootstrap of {done} of {count} "
                     f"candidates done (last: {label})")

    if progress is not None:
        progress(base, total, f"{role} window: fitting every candidate")
    info = {"mode": view.cfg.marginals.mode, "settings": view.marginal_key,
            "note": "stored filtered residuals"}
    window = study_window(frame, a, b, kind="returns", start=lo.strftime("%Y-%m-%d"),
                          end=hi.strftime("%Y-%m-%d"), families=tuple(r.families),
                          criterion=r.criterion, tail_q=r.tail_q, bootstrap=replicates,
                          rng=rng, source=f"pair {a}/{b}", filter_info=info, progress=tick)
    return window_result(window, dates, role, time.perf_counter() - t0)


def study_pair(view, a: str, b: str, start, end, *, reference=None, replicates: int = 200,
               progress: Progress | None = None, seed: int = 0) -> PairStudy:
    """The window study of a stored pair beside a reference window.

    Parameters
    ----------
    view : StoreView
        Store and settings (families, criterion, tail level, marginal settings).
    a, b : str
        The assets, in the order of the study (rotations 90 and 270 depend on it).
    start, end : str or Timestamp
        The study window (inclusive), YYYY-MM-DD.
    reference : None, "calmest", "none" or (start, end)
        None or "calmest": the calmest stored window (:func:`calm_reference`); "none": no
        reference; a pair of dates: that range.
    replicates : int
        Parametric-bootstrap replicates per candidate for the goodness-of-fit p-values and
        the selected family's intervals: 0 or at least 20.
    progress : callable, optional
        ``progress(done, total, text)`` as the work advances.
    seed : int
        Seed of the bootstrap (each window gets its own stream from it).

    Returns
    -------
    PairStudy

    Raises
    ------
    InputError
        Unknown asset, unreadable or reversed dates, fewer than 30 common dates in a window,
        a bad replicate count.

    Notes
    -----
    The columns are the stored standardised residuals of the marginal model (real-time mode
    by default: each residual uses data up to its own day only); within each window they are
    ranked into pseudo-observations R_i / (n + 1). Everything else is
    :func:`monitor.engine.window_study.study_window` plus :func:`joint_crash_probabilities` and
    :func:`tail_concordance`.
    """
    t0 = time.perf_counter()
    if isinstance(replicates, bool) or not isinstance(replicates, int | np.integer):
        raise InputError(f"replicates: expected a whole number, got {replicates!r}")
    if replicates < 0 or 0 < replicates < 20:
        raise InputError(f"replicates must be 0 or at least 20, got {replicates}")
    frame = pair_residuals(view, a, b)
    lo, hi, dates = _checked_window(frame, a, b, start, end, "study window")
    common = frame.dropna().index
    if reference is None or (isinstance(reference, str) and reference == "calmest"):
        part = frame.loc[dates]
        study_tau = float(kendall_tau(part[a].to_numpy(), part[b].to_numpy()))
        r_lo, r_hi, rule = calm_reference(view, a, b, lo, hi, common, len(dates), study_tau)
        r_lo, r_hi, r_dates = _checked_window(frame, a, b, r_lo, r_hi, "reference window")
    elif isinstance(reference, str) and reference == "none":
        r_dates, rule = None, "no reference window"
    elif isinstance(reference, tuple | list) and len(reference) == 2:
        r_lo, r_hi, r_dates = _checked_window(frame, a, b, reference[0], reference[1],
                                              "reference window")
        rule = "the range chosen by the user"
    else:
        raise InputError(f"reference: expected 'calmest', 'none' or two dates, got "
                         f"{reference!r}")
    slots = _slot_count(view.rolling.families)
    per_window = 1 + (slots if replicates else 0)
    total = per_window * (1 if r_dates is None else 2)
    streams = np.random.SeedSequence(seed).spawn(2)
    study = _study_one(frame, a, b, lo, hi, dates, view, replicates,
                       np.random.default_rng(streams[0]), "study", progress, 0, total)
    ref = None
    notes = []
    if r_dates is not None:
        ref = _study_one(frame, a, b, r_lo, r_hi, r_dates, view, replicates,
                         np.random.default_rng(streams[1]), "reference", progress,
                         per_window, total)
        if r_lo <= hi and r_hi >= lo:
            notes.append("the reference window overlaps the study window")
    spans = view.store.fallback_spans(view.marginal_key, (a, b))
    for role, days in (("study", dates), ("reference", r_dates)):
        if days is not None:
            notes += _fallback_notes(spans, role, days)
    if progress is not None:
        progress(total, total, "done")
    return PairStudy(
        pair=(a, b), study=study, reference=ref, reference_rule=rule,
        marginal_mode=view.cfg.marginals.mode, marginal_key=view.marginal_key,
        criterion=view.rolling.criterion, families=tuple(view.rolling.families),
        replicates=int(replicates), seed=int(seed), seconds=time.perf_counter() - t0,
        notes=tuple(notes))


def _fallback_notes(spans: pd.DataFrame, role: str, dates) -> list[str]:
    """Per asset, how many of a window's days were filtered by a fallback marginal fit."""
    days = pd.DatetimeIndex(dates)
    out = []
    for asset, g in spans.groupby("asset"):
        hit = np.zeros(len(days), dtype=bool)
        for first, last in zip(g["first"], g["last"], strict=True):
            hit |= (days >= first) & (days <= last)
        if hit.any():
            out.append(f"{int(hit.sum())} of the {role} window's {len(days)} days of {asset} "
                       "were filtered by the EWMA-t fallback (GARCH refused): its ranks there "
                       "rest on a simpler volatility model")
    return out


def _slot_count(families) -> int:
    return len(candidate_slots(tuple(families)))


# ----------------------------------------------------------------------------- tables
def _params_text(fit: CopulaFit) -> str:
    return ", ".join(f"{k}={v:.4g}" for k, v in fit.params.items()) or "-"


def candidate_table(result: WindowResult) -> pd.DataFrame:
    """Every candidate of a window, best first: parameters, loglik, AIC, BIC, the criterion's
    distance to the best, implied tau and tail coefficients, goodness-of-fit p-value,
    convergence, the parameters estimated at an end of the search box
    (:attr:`monitor.stats.fitting.CopulaFit.at_bound`), and which one was selected."""
    w = result.window
    crit = w.selection.criterion
    fits = sorted(w.selection.fits, key=lambda f: getattr(f, crit))
    best = getattr(fits[0], crit)
    rows = []
    for f in fits:
        g = w.gof.get(f.label)
        rows.append({
            "family": f.family, "rotation": f.rotation, "parameters": _params_text(f),
            "loglik": round(f.loglik, 3), "AIC": round(f.aic, 3), "BIC": round(f.bic, 3),
            f"Δ{crit.upper()}": round(getattr(f, crit) - best, 3),
            "tau": round(f.kendall_tau, 4), "tail lower": round(f.tail_lower, 4),
            "tail upper": round(f.tail_upper, 4),
            "GoF p": None if g is None else round(g.p_value, 4),
            "converged": "yes" if f.converged else "no",
            "at box end": ", ".join(f.at_bound),
            "selected": "yes" if f is w.selection.selected else "",
        })
    return pd.DataFrame(rows)


def crash_table(result: WindowResult) -> pd.DataFrame:
    """Joint-crash probabilities in percent, with the fitted-to-Gaussian ratio and bounds."""
    sel = result.selected
    rows = []
    for c in result.crash:
        rows.append({
            "q %": round(100 * c.q, 2),
            "empirical %": round(100 * c.empirical, 4),
            "empirical days": c.empirical_count,
            "empirical 95% interval %": (f"{100 * c.empirical_lower:.3f} to "
                                         f"{100 * c.empirical_upper:.3f}"),
            f"fitted ({sel.label}) %": round(100 * c.fitted, 4),
            "Gaussian same tau %": round(100 * c.gaussian, 4),
            "fitted / Gaussian": round(c.ratio, 3),
            "independence q² %": round(100 * c.independence, 4),
            "lower bound max(2q-1,0) %": round(100 * c.lower_bound, 4),
            "upper bound q %": round(100 * c.upper_bound, 4),
        })
    return pd.DataFrame(rows)


def tail_table(result: WindowResult) -> pd.DataFrame:
    """Empirical against model tail dependence at the study's level q (finite-level figures,
    beside an independent pair's value q), with the model's limiting coefficient and its
    bootstrap interval when there is one."""
    w = result.window
    sel = result.selected
    q = w.tail_q
    unc = w.uncertainty
    rows = []
    for tail, emp, curve in (("lower", w.tail_lower_emp, result.lower_curve),
                             ("upper", w.tail_upper_emp, result.upper_curve)):
        lo, hi = tail_share_interval(emp * q, w.n, q)
        model_q = float(np.interp(q, curve.q, curve.model))
        gauss_q = float(np.interp(q, curve.q, curve.gaussian))
        limit = sel.tail_lower if tail == "lower" else sel.tail_upper
        interval = ""
        if unc is not None and f"tail_{tail}" in unc.quantities:
            iv = unc.quantities[f"tail_{tail}"]
            interval = f"{iv.lower:.3f} to {iv.upper:.3f}"
        rows.append({
            "tail": tail, "q": q, "empirical at q": round(emp, 4),
            "empirical 95% interval": f"{float(lo) / q:.3f} to {float(hi) / q:.3f}",
            f"model at q ({sel.label})": round(model_q, 4),
            "Gaussian same tau at q": round(gauss_q, 4),
            "independent pair at q": q,
            "model limit λ": round(limit, 4),
            "model limit 95% interval (bootstrap)": interval or "-",
        })
    return pd.DataFrame(rows)


def summary_table(study: PairStudy) -> pd.DataFrame:
    """The study and reference windows side by side: one row per quantity."""
    cols = {}
    for res in study.windows:
        w = res.window
        sel = res.selected
        kt = w.kendall_tau
        unc = w.uncertainty

        def boot(key, unc=unc):
            if unc is None or key not in unc.quantities:
                return ""
            iv = unc.quantities[key]
            return f" ({iv.lower:.3f} to {iv.upper:.3f})"

        crash = {c.q: c for c in res.crash}
        col = {
            "window": f"{w.start.date()} to {w.end.date()}",
            "n (common dates)": str(w.n),
            "dates with one asset only": str(w.dropped),
            "Kendall's tau (95% interval)": f"{kt.estimate:.3f} ({kt.lower:.3f} to "
                                            f"{kt.upper:.3f})",
            "Spearman's rho": f"{w.spearman_rho:.3f}",
            f"selected family ({w.selection.criterion.upper()})":
                f"{sel.label}: {_params_text(sel)}" + ("" if sel.converged
                                                       else " (did not converge)"),
            "model tau (bootstrap interval)": f"{sel.kendall_tau:.3f}{boot('kendall_tau')}",
            "model tail lower λ": f"{sel.tail_lower:.3f}{boot('tail_lower')}",
            "model tail upper λ": f"{sel.tail_upper:.3f}{boot('tail_upper')}",
            f"empirical tail lower at q = {w.tail_q:g}": f"{w.tail_lower_emp:.3f}",
            f"empirical tail upper at q = {w.tail_q:g}": f"{w.tail_upper_emp:.3f}",
        }
        for q, c in crash.items():
            col[f"P(both ≤ {100 * q:g}% quantile): fitted / Gaussian same tau"] = (
                f"{100 * c.fitted:.3f}% / {100 * c.gaussian:.3f}% = {c.ratio:.2f}x")
        g = w.gof.get(sel.label)
        col["GoF p of the selected family"] = "-" if g is None else f"{g.p_value:.3f}"
        cols[res.role] = col
    frame = pd.DataFrame(cols)
    frame.index.name = "quantity"
    return frame.reset_index()


# ----------------------------------------------------------------------------- serialisation
def _num(x) -> float:
    return math.nan if x is None else float(x)


def _clean(obj):
    """JSON-ready copy: numpy scalars and arrays to Python, non-finite floats to None."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _clean(obj.tolist())
    if isinstance(obj, bool | np.bool_):
        return bool(obj)
    if isinstance(obj, int | np.integer):
        return int(obj)
    if isinstance(obj, float | np.floating):
        return float(obj) if math.isfinite(obj) else None
    if isinstance(obj, pd.Timestamp):
        return obj.strftime("%Y-%m-%d")
    return obj


def _fit_to_dict(f: CopulaFit) -> dict:
    return {"family": f.family, "rotation": f.rotation, "params": dict(f.params),
            "loglik": f.loglik, "n": f.n, "converged": f.converged,
            "iterations": f.iterations, "kendall_tau": f.kendall_tau,
            "tail_lower": f.tail_lower, "tail_upper": f.tail_upper}


def _fit_from_dict(d: dict) -> CopulaFit:
    # JSON layers may sort keys (Flask does): rebuild the parameters in the family's order,
    # which is the order ``CopulaFit.param_tuple`` hands to the family.
    names = family(d["family"], int(d["rotation"])).param_names
    return CopulaFit(family=d["family"], rotation=int(d["rotation"]),
                     params={k: _num(d["params"][k]) for k in names},
                     loglik=_num(d["loglik"]), n=int(d["n"]), converged=bool(d["converged"]),
                     iterations=int(d["iterations"]), kendall_tau=_num(d["kendall_tau"]),
                     tail_lower=_num(d["tail_lower"]), tail_upper=_num(d["tail_upper"]))


def _interval_to_dict(iv: Interval) -> dict:
    return {"estimate": iv.estimate, "std_error": iv.std_error, "lower": iv.lower,
            "upper": iv.upper}


def _interval_from_dict(d: dict) -> Interval:
    return Interval(_num(d["estimate"]), _num(d["std_error"]), _num(d["lower"]),
                    _num(d["upper"]))


def _result_to_dict(r: WindowResult) -> dict:
    w = r.window
    sel = w.selection
    unc = w.uncertainty
    return {
        "role": r.role, "dates": [d.strftime("%Y-%m-%d") for d in r.dates],
        "gaussian_tau": r.gaussian_tau, "gaussian_rho": r.gaussian_rho, "seconds": r.seconds,
        "crash": [{k: getattr(c, k) for k in CrashProbability.__dataclass_fields__}
                  for c in r.crash],
        "curves": [{k: getattr(c, k) for k in TailCurve.__dataclass_fields__}
                   for c in (r.lower_curve, r.upper_curve)],
        "window": {
            "pair": list(w.pair), "kind": w.kind, "start": w.start, "end": w.end, "n": w.n,
            "dropped": w.dropped, "u": w.u, "v": w.v,
            "kendall_tau": _interval_to_dict(w.kendall_tau), "spearman_rho": w.spearman_rho,
            "tail_q": w.tail_q, "tail_lower_emp": w.tail_lower_emp,
            "tail_upper_emp": w.tail_upper_emp, "filter_info": w.filter_info,
            "selection": {"fits": [_fit_to_dict(f) for f in sel.fits],
                          "criterion": sel.criterion, "n": sel.n,
                          "kendall_tau": sel.kendall_tau},
            "gof": {k: {"statistic": g.statistic, "p_value": g.p_value,
                        "replicates": g.replicates, "failed": g.failed}
                    for k, g in w.gof.items()},
            "uncertainty": None if unc is None else {
                "method": unc.method, "level": unc.level, "replicates": unc.replicates,
                "failed": unc.failed, "caveat": unc.caveat,
                "quantities": {k: _interval_to_dict(q) for k, q in unc.quantities.items()}},
        },
    }


def _result_from_dict(d: dict) -> WindowResult:
    w = d["window"]
    s = w["selection"]
    unc = w["uncertainty"]
    fits = tuple(_fit_from_dict(f) for f in s["fits"])
    if unc is not None:
        # The order of fit_uncertainty: the selected family's parameters, then tau and tails.
        first = (*fits[0].params, "kendall_tau", "tail_lower", "tail_upper")
        order = [k for k in first if k in unc["quantities"]]
        order += [k for k in unc["quantities"] if k not in order]
    window = WindowStudy(
        pair=tuple(w["pair"]), kind=w["kind"], start=pd.Timestamp(w["start"]),
        end=pd.Timestamp(w["end"]), n=int(w["n"]), dropped=int(w["dropped"]),
        u=read_only(np.array(w["u"], dtype=float)), v=read_only(np.array(w["v"], dtype=float)),
        kendall_tau=_interval_from_dict(w["kendall_tau"]),
        spearman_rho=_num(w["spearman_rho"]), tail_q=_num(w["tail_q"]),
        tail_lower_emp=_num(w["tail_lower_emp"]), tail_upper_emp=_num(w["tail_upper_emp"]),
        selection=Selection(fits, s["criterion"], int(s["n"]), _num(s["kendall_tau"])),
        gof={k: GoodnessOfFit(_num(g["statistic"]), _num(g["p_value"]), int(g["replicates"]),
                              int(g["failed"])) for k, g in w["gof"].items()},
        uncertainty=None if unc is None else FitUncertainty(
            unc["method"], _num(unc["level"]),
            {k: _interval_from_dict(unc["quantities"][k]) for k in order},
            int(unc["replicates"]), int(unc["failed"]), unc["caveat"]),
        filter_info=w["filter_info"],
    )

    def arr(x):
        return read_only(np.array([_num(a) for a in x], dtype=float))

    crash = tuple(CrashProbability(**{k: (int(c[k]) if k == "empirical_count" else _num(c[k]))
                                      for k in CrashProbability.__dataclass_fields__})
                  for c in d["crash"])
    curves = [TailCurve(c["tail"], *(arr(c[k]) for k in
                                     ("q", "empirical", "empirical_lower", "empirical_upper",
                                      "model", "gaussian")))
              for c in d["curves"]]
    return WindowResult(role=d["role"], window=window,
                        dates=tuple(pd.Timestamp(x) for x in d["dates"]),
                        gaussian_tau=_num(d["gaussian_tau"]),
                        gaussian_rho=_num(d["gaussian_rho"]), crash=crash,
                        lower_curve=curves[0], upper_curve=curves[1],
                        seconds=_num(d["seconds"]))


# ----------------------------------------------------------------------------- figures
#: Normal scores of the density grid: +-3.5 covers pseudo-observations of n up to ~4000.
_SCORE_LIMIT = 3.5
#: Uniform grid kept off the corners, where tail-dependent densities are unbounded.
_UNIFORM_MARGIN = 0.01
#: Log-density contour levels below the model's peak on the grid.
_LOG_LEVELS = 7.0


def provenance_line(study: PairStudy, result: WindowResult) -> str:
    """One line naming what produced a window's numbers."""
    w = result.window
    sel = result.selected
    a, b = study.pair
    return (f"{a} / {b}, {result.role} window {w.start.date()} to {w.end.date()}, n = {w.n}; "
            f"{sel.label} by {study.criterion.upper()}; {study.marginal_mode} GARCH residuals")


def _title(text: str, sub: str) -> dict:
    return {"text": f"{text}<br><span style='font-size:11px;color:{MUTED}'>{sub}</span>",
            "x": 0.0, "xanchor": "left", "font": {"size": 14}}


def scatter_figure(study: PairStudy, result: WindowResult, *, scale: str = "normal",
                   grid: int = 81, crash_q: float = 0.05) -> go.Figure:
    """Pseudo-observations with contours of the fitted copula's density.

    Parameters
    ----------
    study : PairStudy
    result : WindowResult
        The window to draw.
    scale : {"normal", "uniform"}
        ``"normal"`` (default): points at normal scores (Phi^-1(U), Phi^-1(V)) and contours of
        the density with standard-normal margins, c(Phi(x), Phi(y)) phi(x) phi(y), on
        [-3.5, 3.5]^2; tail asymmetry shows as a pointed end of the contours, and the
        dashed contours of the Gaussian copula with the same Kendall's tau (at the same
        levels) are ellipses. ``"uniform"``: points at (U, V) and contours of log c(u, v) on
        [0.01, 0.99]^2, away from the corners where tail-dependent densities are unbounded.
    grid : int
        Grid points per axis.
    crash_q : float
        Days with both pseudo-observations at or below this level are marked.

    Returns
    -------
    plotly Figure

    Notes
    -----
    Contours are drawn at log-density levels 1, 2, ..., 7 below the fitted density's largest
    value on the grid, for both copulas, so the two sets of lines are comparable.
    """
    if scale not in ("normal", "uniform"):
        raise ValueError(f"scale must be 'normal' or 'uniform'; got {scale!r}")
    w = result.window
    sel = result.selected
    a, b = study.pair
    fam, p = sel.copula, sel.param_tuple
    gauss, gp = family("gaussian"), (result.gaussian_rho,)
    if scale == "normal":
        axis = np.linspace(-_SCORE_LIMIT, _SCORE_LIMIT, grid)
        xs, ys = special.ndtri(w.u), special.ndtri(w.v)
        gu, gv = np.meshgrid(special.ndtr(axis), special.ndtr(axis))
        gx, gy = np.meshgrid(axis, axis)
        margins = -0.5 * (gx**2 + gy**2) - np.log(2 * np.pi)
        labels = (f"normal score of {a}", f"normal score of {b}")
    else:
        axis = np.linspace(_UNIFORM_MARGIN, 1 - _UNIFORM_MARGIN, grid)
        xs, ys = w.u, w.v
        gu, gv = np.meshgrid(axis, axis)
        margins = 0.0
        labels = (f"pseudo-observation of {a}", f"pseudo-observation of {b}")
    z_fit = np.asarray(fam.logpdf(gu, gv, p), dtype=float) + margins
    z_gauss = np.asarray(gauss.logpdf(gu, gv, gp), dtype=float) + margins
    top = float(np.nanmax(z_fit))
    levels = {"start": top - _LOG_LEVELS, "end": top - 1.0, "size": 1.0}
    crash = (w.u <= crash_q) & (w.v <= crash_q)
    dates = np.array([d.strftime("%Y-%m-%d") for d in result.dates]) if result.dates else None
    fig = go.Figure()
    fig.add_trace(go.Contour(
        x=axis, y=axis, z=z_gauss, contours={**levels, "coloring": "none"}, autocontour=False,
        line={"color": BLUE, "dash": "dash", "width": 1}, showscale=False, hoverinfo="skip",
        name=f"Gaussian, same tau (rho = {result.gaussian_rho:.3f})", showlegend=True))
    fig.add_trace(go.Contour(
        x=axis, y=axis, z=z_fit, contours={**levels, "coloring": "none"}, autocontour=False,
        line={"color": VERMILION, "width": 1.5}, showscale=False, hoverinfo="skip",
        name=f"fitted {sel.label} (log-density)", showlegend=True))
    for mask, colour, name, size in ((~crash, GREY, "days", 5),
                                     (crash, BLACK, f"both <= {crash_q:g} quantile", 7)):
        if not mask.any():
            continue
        custom = np.column_stack([w.u[mask], w.v[mask]])
        text = dates[mask] if dates is not None and dates.size == w.n else None
        fig.add_trace(go.Scatter(
            x=xs[mask], y=ys[mask], mode="markers", name=f"{name} ({int(mask.sum())})",
            marker={"color": colour, "size": size, "opacity": 0.75}, text=text,
            customdata=custom,
            hovertemplate="%{text}<br>U = %{customdata[0]:.3f}, V = %{customdata[1]:.3f}"
                          "<extra></extra>"))
    lim = [-_SCORE_LIMIT, _SCORE_LIMIT] if scale == "normal" else [0, 1]
    fig.update_layout(**figure_layout(
        title=_title(f"Pseudo-observations and fitted density ({result.role})",
                     provenance_line(study, result)),
        xaxis={"title": labels[0], "range": lim, "zeroline": False, "gridcolor": RULE},
        yaxis={"title": labels[1], "range": lim, "zeroline": False, "gridcolor": RULE,
               "scaleanchor": "x", "scaleratio": 1},
        legend={"orientation": "h", "y": -0.18, "x": 0}, height=480,
        margin={"l": 56, "r": 16, "t": 64, "b": 40}))
    return fig


def tail_figure(study: PairStudy, result: WindowResult) -> go.Figure:
    """Tail concordance over q: empirical (with its 95% binomial band) against the fitted
    copula, the Gaussian copula with the same Kendall's tau and an independent pair (the line
    q: these are finite-level figures, whose limits q -> 0 are the tail coefficients), lower
    and upper tail."""
    sel = result.selected
    fig = make_subplots(rows=1, cols=2, horizontal_spacing=0.1, subplot_titles=(
        "lower tail: P(U ≤ q, V ≤ q) / q", "upper tail: P(U > 1−q, V > 1−q) / q"))
    for col, curve in ((1, result.lower_curve), (2, result.upper_curve)):
        first = col == 1
        q = np.asarray(curve.q)
        fig.add_trace(go.Scatter(
            x=np.concatenate([q, q[::-1]]),
            y=np.concatenate([curve.empirical_upper, np.asarray(curve.empirical_lower)[::-1]]),
            fill="toself", fillcolor="rgba(86,180,233,0.25)", line={"width": 0},
            name="empirical 95% band (binomial)", legendgroup="band", showlegend=first,
            hoverinfo="skip"), row=1, col=col)
        fig.add_trace(go.Scatter(
            x=q, y=curve.empirical, mode="lines+markers", name="empirical",
            line={"color": SKY, "width": 2}, marker={"size": 4, "color": BLUE},
            legendgroup="emp", showlegend=first,
            hovertemplate="q = %{x:.2f}: %{y:.3f}<extra>empirical</extra>"), row=1, col=col)
        fig.add_trace(go.Scatter(
            x=q, y=curve.model, mode="lines", name=f"fitted {sel.label}",
            line={"color": VERMILION, "width": 2}, legendgroup="model", showlegend=first,
            hovertemplate="q = %{x:.2f}: %{y:.3f}<extra>fitted</extra>"), row=1, col=col)
        fig.add_trace(go.Scatter(
            x=q, y=curve.gaussian, mode="lines",
            name=f"Gaussian, same tau ({result.gaussian_tau:.3f})",
            line={"color": BLACK, "width": 1.5, "dash": "dash"}, legendgroup="gauss",
            showlegend=first,
            hovertemplate="q = %{x:.2f}: %{y:.3f}<extra>Gaussian</extra>"), row=1, col=col)
        # A finite-level figure: an independent pair reads q itself, not 0.
        fig.add_trace(go.Scatter(
            x=q, y=q, mode="lines", name="independent pair (= q)",
            line={"color": GREY, "width": 1, "dash": "dot"}, legendgroup="independent",
            showlegend=first,
            hovertemplate="q = %{x:.2f}: %{y:.3f}<extra>independent</extra>"), row=1, col=col)
        fig.update_xaxes(title_text="q", gridcolor=RULE, row=1, col=col)
        fig.update_yaxes(range=[0, 1], gridcolor=RULE, row=1, col=col)
    fig.update_layout(**figure_layout(
        title=_title(f"Tail concordance, empirical against model ({result.role})",
                     provenance_line(study, result)),
        legend={"orientation": "h", "y": -0.22, "x": 0}, height=400,
        margin={"l": 56, "r": 16, "t": 80, "b": 40}))
    return fig


def crash_figure(study: PairStudy, result: WindowResult) -> go.Figure:
    """P(both at or below their q-quantile) for each q: empirical (95% Wilson interval),
    fitted, Gaussian with the same tau, independence; the Frechet-Hoeffding upper bound q
    drawn as a line (the lower bound max(2q - 1, 0) is 0 for q < 1/2)."""
    sel = result.selected
    crash = result.crash
    fig = make_subplots(rows=1, cols=len(crash), horizontal_spacing=0.12, subplot_titles=[
        f"q = {100 * c.q:g}%: fitted / Gaussian = {c.ratio:.2f}x" for c in crash])
    names = ("empirical", f"fitted {sel.label}", "Gaussian, same tau", "independence q²")
    colours = (SKY, VERMILION, BLUE, GREEN)
    for col, c in enumerate(crash, start=1):
        values = np.array([c.empirical, c.fitted, c.gaussian, c.independence]) * 100
        err_hi = np.array([c.empirical_upper - c.empirical, 0, 0, 0]) * 100
        err_lo = np.array([c.empirical - c.empirical_lower, 0, 0, 0]) * 100
        fig.add_trace(go.Bar(
            x=list(names), y=values, marker={"color": list(colours)}, showlegend=False,
            error_y={"type": "data", "array": err_hi, "arrayminus": err_lo, "color": BLACK,
                     "visible": True},
            text=[f"{x:.3f}%" for x in values], textposition="outside",
            hovertemplate="%{x}: %{y:.4f}%<extra></extra>"), row=1, col=col)
        fig.add_trace(go.Scatter(
            x=list(names), y=[100 * c.upper_bound] * len(names), mode="lines",
            line={"color": GREY, "dash": "dot"}, name="upper bound M(q,q) = q",
            showlegend=col == 1, hoverinfo="skip"), row=1, col=col)
        fig.update_yaxes(title_text="probability, %" if col == 1 else None,
                         range=[0, 100 * c.upper_bound * 1.08], gridcolor=RULE, row=1, col=col)
    fig.update_layout(**figure_layout(
        title=_title(f"Joint-crash probability P(U ≤ q, V ≤ q) ({result.role})",
                     provenance_line(study, result) + "; lower bound max(2q−1, 0) = 0"),
        legend={"orientation": "h", "y": -0.25, "x": 0}, height=400, bargap=0.3,
        margin={"l": 56, "r": 16, "t": 80, "b": 60}))
    return fig
