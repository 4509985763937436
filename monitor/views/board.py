"""The board: the whole universe as of one date, from what ``comove update`` stored.

For a date D the board shows, for every monitored pair, the window ending on or before D:
Kendall's tau, the model-implied and the nonparametric tail coefficients, the pair's tail
states, and a divergence score; the assets ordered so that related ones sit together; and
the universe-level summary over time. :func:`board_data` reads it all with four queries
(one row per pair, not per window) and is what the dashboard's Board page times.

Divergence
----------
For each tail, the standardised finite-level excess of the nonparametric tail concordance
over the value the centre alone implies:

.. math:: d_L = \\frac{\\hat\\lambda_L(q) - C_{Ga}(q, q; \\rho_\\tau)/q}{\\mathrm{se}_L}

with ``lambda_L(q) = C_n(q, q)/q`` (column ``tail_lower_emp``), its binomial standard error
(``tail_lower_emp_se``) and the Gaussian copula's ``C(q, q)/q`` at ``rho = sin(pi tau / 2)``,
the Gaussian with the window's Kendall's tau (``gauss_tail_q``; radially symmetric, so the
same value serves the upper tail). ``d_U`` is the same with the upper columns. A window with
no joint exceedance has se 0 and scores 0. The pair's divergence is ``max(d_L, d_U)``; the
statistic equals the ``excess_*`` columns of :func:`monitor.stats.signals.pair_signals`, the gate of
its window statistic. Pairs are ranked by state (alert, then watch, then calm, by the more
severe tail) and within a state by divergence, largest first.

Tails: which figure
-------------------
Three tail figures are stored per window (:data:`TAIL_SOURCES`): the nonparametric
``C_n(q,q)/q`` (the board's default: model-free, with a binomial standard error, the figure
the divergence, the alerts and the ranking use), the model-averaged coefficient (every
candidate family's limit coefficient weighted by its Akaike weight; smooth from one window to
the next) and the selected family's coefficient (kept for comparison: it flips between 0 and
a large value when the AIC choice flips between a tail-free and a tail-dependent family).

Change view
-----------
For a horizon of ``h`` trading days (:data:`HORIZONS`) each pair's window end is compared
with its window end ``h / step`` window ends earlier: the change ``x_t - x_{t-h}`` of tau and
of each tail figure, and, where standard errors are stored (tau, nonparametric tails), its
standard error and ``z = change / se`` (:func:`change_se`).

Standing tail-heaviness
-----------------------
A tail-dependent pair whose dependence never changes (a Student-t copula, as equity pairs
often are) is a standing condition, not a regime shift: the excess matrices show it as a
level, and :func:`standing_labels` names it ("standing heavy lower tail") when the
model-averaged coefficient has been at least :data:`STANDING_LEVEL` on at least
:data:`STANDING_SHARE` of the pair's window ends in the year up to the date.

Ordering
--------
Assets are ordered by average-linkage hierarchical clustering on the distance ``1 - tau``
of the pairs' Kendall's tau at D (a pair without a window gets distance 1, as for tau = 0),
with the leaves put in the optimal order of Bar-Joseph, Gifford & Jaakkola (2001,
*Bioinformatics* 17, S22-S29; ``scipy.cluster.hierarchy.optimal_leaf_ordering``), starting
from the assets in alphabetical order, so the order is deterministic.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy.cluster import hierarchy
from scipy.spatial.distance import squareform

from monitor.common.arrays import read_only
from monitor.common.errors import InputError
from monitor.common.palette import (
    BLUE,
    DIVERGING,
    MUTED,
    ORANGE,
    PURPLE,
    SEQUENTIAL,
    SKY,
    VERMILION,
    figure_layout,
)
from monitor.data.store_metrics import HEAVY_TAIL_LEVEL, RUN_COLUMNS
from monitor.stats.signals import STATES, TAILS, states_on, universe_key
from monitor.views.common import (
    FigureDict,
    StoreView,
    binomial_band,
    figure,
    on_row,
    parse_date,
    rounded_for_plot,
    row_span,
    stacked_layout,
    tau_band,
)

__all__ = [
    "BOARD_COLUMNS",
    "CHANGE_COLUMNS",
    "DEFAULT_HORIZON",
    "DEFAULT_TAIL_SOURCE",
    "HORIZONS",
    "QUANTITIES",
    "TAIL_SOURCES",
    "BoardData",
    "board_data",
    "board_range",
    "change_figure",
    "change_se",
    "change_z",
    "cluster_order",
    "date_marker",
    "divergence",
    "excess_figure",
    "matrix_figure",
    "pair_changes",
    "pair_matrix",
    "rank_pairs",
    "ranking_table",
    "standing_labels",
    "summary_figure",
    "tail_column",
    "universe_figure",
    "worse_state",
]

#: Metric columns the board reads for each pair.
BOARD_COLUMNS = ("date", "n", "kendall_tau", "kendall_tau_se", "family", "rotation",
                 "tail_lower", "tail_upper", "tail_lower_emp", "tail_upper_emp",
                 "tail_lower_emp_se", "tail_upper_emp_se", "gauss_tail_q",
                 "tail_lower_avg", "tail_upper_avg")
#: Where the tail figures come from: the nonparametric estimate (the default), the
#: model-averaged coefficient, or the selected family's.
TAIL_SOURCES = ("nonparametric", "averaged", "model")
DEFAULT_TAIL_SOURCE = "nonparametric"
#: Matrix quantities of the board.
QUANTITIES = ("kendall_tau", "tail_lower", "tail_upper")
#: Horizons of the change view, in trading days (window ends at step 1).
HORIZONS = {"1w": 5, "1m": 21, "3m": 63, "1y": 252}
HORIZON_LABELS = {"1w": "1 week", "1m": "1 month", "3m": "3 months", "1y": "1 year"}
DEFAULT_HORIZON = "1m"
#: Columns whose change the board computes, and the standard error stored for each.
CHANGE_COLUMNS = ("kendall_tau", "tail_lower_emp", "tail_upper_emp", "tail_lower_avg",
                  "tail_upper_avg", "tail_lower", "tail_upper")
SE_COLUMNS = {"kendall_tau": "kendall_tau_se", "tail_lower_emp": "tail_lower_emp_se",
              "tail_upper_emp": "tail_upper_emp_se"}
#: Standing tail-heaviness: the model-averaged coefficient at least this ...
STANDING_LEVEL = HEAVY_TAIL_LEVEL
#: ... on at least this share of the window ends of the last year ...
STANDING_SHARE = 0.8
#: ... (calendar days up to the date; a trading year is 252 window ends at step 1).
STANDING_DAYS = 365
_TRADING_YEAR = 252
#: Colour range of the excess matrices, in standard errors (fixed, so dates compare).
EXCESS_RANGE = 4.0
#: Colour ranges of the change matrices (fixed, so horizons and dates compare).
CHANGE_RANGE = {"kendall_tau": 0.3, "tail_lower": 0.5, "tail_upper": 0.5}
NOT_COMPUTED = "not computed by this version (stored by an older comove)"
_SEVERITY = {s: i for i, s in enumerate(STATES)}
_SOURCE_WORDS = {"nonparametric": "nonparametric C(q,q)/q", "averaged": "model-averaged",
                 "model": "selected family"}


def tail_column(tail: str, source: str) -> str:
    """The metrics column of a tail figure.

    Parameters
    ----------
    tail : {"lower", "upper"}
    source : one of :data:`TAIL_SOURCES`

    Returns
    -------
    str
        ``tail_<tail>_emp``, ``tail_<tail>_avg`` or ``tail_<tail>``.
    """
    if tail not in TAILS:
        raise ValueError(f"tail must be one of {TAILS}, got {tail!r}")
    if source not in TAIL_SOURCES:
        raise ValueError(f"source must be one of {TAIL_SOURCES}, got {source!r}")
    return {"nonparametric": f"tail_{tail}_emp", "averaged": f"tail_{tail}_avg",
            "model": f"tail_{tail}"}[source]


def change_se(se_now: ArrayLike, se_then: ArrayLike, lag: ArrayLike, n: ArrayLike
              ) -> NDArray[np.float64]:
    """Standard error of the change between two rolling-window estimates.

    Parameters
    ----------
    se_now, se_then : array_like
        Standard errors of the two estimates.
    lag : array_like
        Observations between the two window ends.
    n : array_like
        Observations per window.

    Returns
    -------
    ndarray
        ``sqrt(se_now^2 + se_then^2 - 2 rho se_now se_then)`` with
        ``rho = max(0, 1 - lag / n)`` (read-only).

    Notes
    -----
    Two windows of ``n`` observations whose ends are ``lag`` apart share ``n - lag`` of them.
    For the mean of ``n`` independent terms the covariance of the two window means is
    ``(n - lag) / n`` times the variance, so their correlation is ``1 - lag / n`` (our
    derivation); Kendall's tau (to first order the mean of its influence function, Hoeffding
    1948) and the binomial tail proportion are such means. It is an approximation: the
    pseudo-observations are re-ranked in each window, and daily returns are not independent.
    From ``lag >= n`` on the windows are disjoint and the two estimates independent.
    """
    a = np.asarray(se_now, dtype=float)
    b = np.asarray(se_then, dtype=float)
    rho = np.clip(1.0 - np.asarray(lag, dtype=float) / np.asarray(n, dtype=float), 0.0, 1.0)
    return read_only(np.sqrt(np.maximum(a * a + b * b - 2.0 * rho * a * b, 0.0)))


def change_z(change: ArrayLike, se: ArrayLike) -> NDArray[np.float64]:
    """Standardised change ``change / se``: 0 for no change, NaN where the s.e. is 0 or
    unknown for a non-zero change (read-only)."""
    d = np.asarray(change, dtype=float)
    e = np.asarray(se, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(e > 0, d / e, np.where(d == 0, 0.0, np.nan))
    return read_only(out)


def pair_changes(now: pd.DataFrame, then: pd.DataFrame, lag: int) -> pd.DataFrame:
    """Per pair, the change of every :data:`CHANGE_COLUMNS` between two window ends.

    Parameters
    ----------
    now, then : DataFrame
        One metric row per pair (``asset_a, asset_b, date, n`` and the columns): the current
        window end and the one ``lag`` observations before it.
    lag : int
        Observations between the two window ends (horizon in window ends times the step).

    Returns
    -------
    DataFrame
        Rows of ``now`` in order: ``asset_a, asset_b, date_then`` and per column
        ``change_<col>``, and for the columns of :data:`SE_COLUMNS` ``change_<col>_se``
        (:func:`change_se`) and ``change_<col>_z`` (:func:`change_z`); NaN for a pair
        without a window end that far back.
    """
    keys = ["asset_a", "asset_b"]
    old = then[[*keys, "date", *CHANGE_COLUMNS, *SE_COLUMNS.values()]].rename(
        columns=lambda c: c if c in keys else f"{c}_then")
    both = now[[*keys, "n", *CHANGE_COLUMNS, *SE_COLUMNS.values()]].merge(
        old, on=keys, how="left")
    out = pd.DataFrame({"asset_a": both["asset_a"], "asset_b": both["asset_b"],
                        "date_then": pd.to_datetime(both["date_then"])})
    for col in CHANGE_COLUMNS:
        out[f"change_{col}"] = (pd.to_numeric(both[col]).astype(float)
                                - pd.to_numeric(both[f"{col}_then"]).astype(float))
        se_col = SE_COLUMNS.get(col)
        if se_col is not None:
            se = change_se(pd.to_numeric(both[se_col]).astype(float),
                           pd.to_numeric(both[f"{se_col}_then"]).astype(float),
                           lag, pd.to_numeric(both["n"]).astype(float))
            out[f"change_{col}_se"] = se
            out[f"change_{col}_z"] = change_z(out[f"change_{col}"], se)
    return out


def standing_labels(counts: pd.DataFrame, expected_ends: int,
                    share: float = STANDING_SHARE) -> pd.Series:
    """Pair labels for standing tail-heaviness.

    Parameters
    ----------
    counts : DataFrame
        Per pair ``n_ends`` (window ends in the last year with the averaged tails computed)
        and ``n_tail_lower_avg``, ``n_tail_upper_avg`` (of them, those with the
        model-averaged coefficient at least :data:`STANDING_LEVEL`), as
        :meth:`monitor.data.store.Store.tail_level_counts` gives them.
    expected_ends : int
        Window ends a year has (252 at step 1): a pair with fewer than ``share`` of them
        (new, or stored by an older comove) gets no label.
    share : float
        Share of the year's window ends the level must hold on.

    Returns
    -------
    Series of str
        "standing heavy lower tail", "standing heavy upper tail", "standing heavy tails"
        (both) or "" (no standing condition, or not enough history).

    Notes
    -----
    A rule of our own: the model-averaged coefficient (limit tail dependence, 0 for the
    Gaussian) of a Student-t copula with rho = 0.5 and nu = 4 (lambda = 0.25) stays above
    0.1 on nearly every window of 250 days, a Gaussian one's most of the time below; the
    nonparametric ``C_n(q,q)/q`` at q = 0.1 is too noisy in one window (its excess over the
    Gaussian is about one standard error for that t copula) to carry a daily label.
    """
    n = counts["n_ends"].to_numpy(dtype=float)
    enough = n >= share * expected_ends
    lower = enough & (counts["n_tail_lower_avg"].to_numpy(dtype=float) >= share * n)
    upper = enough & (counts["n_tail_upper_avg"].to_numpy(dtype=float) >= share * n)
    out = np.where(lower & upper, "standing heavy tails",
                   np.where(lower, "standing heavy lower tail",
                            np.where(upper, "standing heavy upper tail", "")))
    return pd.Series(out, index=counts.index, dtype="string")


def divergence(tail_emp: ArrayLike, tail_emp_se: ArrayLike, gauss_tail_q: ArrayLike
               ) -> NDArray[np.float64]:
    """Standardised finite-level tail excess over the Gaussian with the same tau.

    Parameters
    ----------
    tail_emp, tail_emp_se : array_like
        Nonparametric tail concordance ``C_n(q,q)/q`` (or its upper analogue) and its
        binomial standard error.
    gauss_tail_q : array_like
        The Gaussian copula's ``C(q,q)/q`` at the window's Kendall's tau.

    Returns
    -------
    ndarray
        ``(tail_emp - gauss_tail_q) / tail_emp_se``; where the s.e. is 0 (no joint
        exceedance), ``+inf`` for a positive difference and 0 otherwise (read-only).

    Notes
    -----
    The module docstring gives the method; the Gaussian reference uses
    ``rho = sin(pi tau / 2)`` (Lindskog, McNeil & Schmock 2003).
    """
    emp = np.asarray(tail_emp, dtype=float)
    se = np.asarray(tail_emp_se, dtype=float)
    diff = emp - np.asarray(gauss_tail_q, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(se > 0, diff / se, np.where(diff > 0, np.inf, 0.0))
    return read_only(out)


def worse_state(lower: pd.Series, upper: pd.Series) -> pd.Series:
    """The pair state: the more severe of its two tails' states.

    Parameters
    ----------
    lower, upper : Series of str
        States from :data:`monitor.stats.signals.STATES` (missing allowed).

    Returns
    -------
    Series of str
        Per row the later of the two in ``STATES`` order (calm < watch < alert); missing
        where both are missing.
    """
    lo = lower.map(_SEVERITY).astype(float)
    hi = upper.map(_SEVERITY).astype(float)
    worst = np.fmax(lo.to_numpy(), hi.to_numpy())
    names = np.array(STATES, dtype=object)
    out = np.where(np.isnan(worst), None, names[np.nan_to_num(worst).astype(int)])
    return pd.Series(pd.array(out, dtype="string"), index=lower.index)


def cluster_order(tau: pd.DataFrame) -> tuple[str, ...]:
    """Assets ordered so that strongly dependent ones sit together.

    Parameters
    ----------
    tau : DataFrame
        Square, symmetric matrix of Kendall's tau indexed and columned by asset (NaN where a
        pair has no value; the diagonal is ignored).

    Returns
    -------
    tuple of str
        The leaf order of average-linkage clustering on ``1 - tau`` after optimal leaf
        ordering (module docstring), from the assets sorted alphabetically.
    """
    assets = sorted(str(a) for a in tau.index)
    if len(assets) < 3:
        return tuple(assets)
    m = tau.loc[assets, assets].to_numpy(dtype=float)
    m = np.where(np.isnan(m), np.where(np.isnan(m.T), 0.0, m.T), m)
    dist = np.clip(1.0 - (m + m.T) / 2, 0.0, 2.0)
    np.fill_diagonal(dist, 0.0)
    condensed = squareform(dist, checks=False)
    tree = hierarchy.optimal_leaf_ordering(hierarchy.linkage(condensed, method="average"),
                                           condensed)
    return tuple(assets[i] for i in hierarchy.leaves_list(tree))


def pair_matrix(pairs: pd.DataFrame, assets: tuple[str, ...] | list[str], column: str
                ) -> pd.DataFrame:
    """Asset-by-asset matrix of a per-pair quantity.

    Parameters
    ----------
    pairs : DataFrame
        One row per pair: ``asset_a``, ``asset_b`` and ``column``.
    assets : sequence of str
        Row and column order; pairs of other assets are left out.
    column : str
        The quantity.

    Returns
    -------
    DataFrame
        Symmetric, NaN on the diagonal and where a pair has no row.
    """
    idx = {a: i for i, a in enumerate(assets)}
    out = np.full((len(assets), len(assets)), np.nan)
    keep = pairs["asset_a"].isin(idx) & pairs["asset_b"].isin(idx)
    i = pairs.loc[keep, "asset_a"].map(idx).to_numpy(dtype=int)
    j = pairs.loc[keep, "asset_b"].map(idx).to_numpy(dtype=int)
    v = pd.to_numeric(pairs.loc[keep, column]).to_numpy(dtype=float)
    out[i, j] = v
    out[j, i] = v
    return pd.DataFrame(out, index=list(assets), columns=list(assets))


def rank_pairs(pairs: pd.DataFrame) -> pd.DataFrame:
    """Pairs in board order.

    Parameters
    ----------
    pairs : DataFrame
        ``asset_a``, ``asset_b``, ``state`` (missing allowed) and ``divergence``.

    Returns
    -------
    DataFrame
        Sorted by state (alert, watch, calm, then missing), within a state by divergence
        (largest first, missing last), then by pair name; ``rank`` (1 = first) in front.
    """
    severity = pairs["state"].map(_SEVERITY).astype(float).fillna(-1.0)
    order = np.lexsort((pairs["asset_b"].to_numpy(dtype=str),
                        pairs["asset_a"].to_numpy(dtype=str),
                        -np.nan_to_num(pairs["divergence"].to_numpy(dtype=float), nan=-np.inf),
                        -severity.to_numpy()))
    out = pairs.iloc[order].reset_index(drop=True)
    out.insert(0, "rank", np.arange(1, len(out) + 1))
    return out


@dataclass(frozen=True, slots=True)
class BoardData:
    """The board as of one date.

    Attributes
    ----------
    as_of : Timestamp
        The date asked for; each pair's row is its latest window end on or before it.
    first_date, last_date : Timestamp
        The stored range of window ends (what the date control offers).
    assets : tuple of str
        Assets in cluster order (:func:`cluster_order`).
    pairs : DataFrame
        One row per pair, ranked (:func:`rank_pairs`): ``rank, asset_a, asset_b`` and
        :data:`BOARD_COLUMNS`, ``tau_low, tau_high``, the Wilson bands ``tail_*_emp_low``
        / ``tail_*_emp_high``, ``state_lower, state_upper, state``, ``divergence_lower,
        divergence_upper, divergence``, the changes over the horizon
        (:func:`pair_changes`: ``date_then``, ``change_*``) and the standing label
        (``standing``, :func:`standing_labels`).
    tail_q : float
    provenance : str
    horizon : str
        Key of :data:`HORIZONS`.
    back : int
        Window ends between a pair's current window and the one its change compares with.
    lag : int
        Observations between the two (``back`` times the step).
    """

    as_of: pd.Timestamp
    first_date: pd.Timestamp
    last_date: pd.Timestamp
    assets: tuple[str, ...]
    pairs: pd.DataFrame
    tail_q: float
    provenance: str
    horizon: str = DEFAULT_HORIZON
    back: int = HORIZONS[DEFAULT_HORIZON]
    lag: int = HORIZONS[DEFAULT_HORIZON]

    @property
    def horizon_label(self) -> str:
        """The horizon in words ("1 month")."""
        return HORIZON_LABELS[self.horizon]

    @property
    def averaged_missing(self) -> int:
        """Pairs whose shown window has no model-averaged tails (stored by an older comove)."""
        return int(self.pairs["tail_lower_avg"].isna().sum())

    def matrix(self, column: str) -> pd.DataFrame:
        """Asset-by-asset matrix of a column of :attr:`pairs`, in cluster order."""
        i, j = _positions(self)
        out = np.full((len(self.assets), len(self.assets)), np.nan)
        out[i, j] = out[j, i] = pd.to_numeric(self.pairs[column]).to_numpy(dtype=float)
        return pd.DataFrame(out, index=list(self.assets), columns=list(self.assets))


def board_range(view: StoreView) -> tuple[pd.Timestamp, pd.Timestamp] | None:
    """The dates the board can show.

    Parameters
    ----------
    view : StoreView

    Returns
    -------
    (Timestamp, Timestamp) or None
        First and last date of the stored universe summary; None before the first
        ``comove update`` of the signals.
    """
    got = view.store.universe_range(universe_key(view.signals_key))
    return None if got is None else (pd.Timestamp(got[0]), pd.Timestamp(got[1]))


def board_data(view: StoreView, as_of: object = None, horizon: str = DEFAULT_HORIZON
               ) -> BoardData:
    """Everything the Board page shows, as of a date.

    Parameters
    ----------
    view : StoreView
    as_of : str, date or None
        ``YYYY-MM-DD``; the latest stored window end when None.
    horizon : str
        Key of :data:`HORIZONS`: how far back the change view compares.

    Returns
    -------
    BoardData

    Raises
    ------
    InputError
        When nothing is stored yet, ``as_of`` is not a date, or it lies outside the stored
        range of window ends.

    Notes
    -----
    Six reads: the stored range of dates (two index seeks), the latest window end, one
    metric row per pair now and one a horizon earlier
    (:meth:`monitor.data.store.Store.metrics_as_of`, an index seek per pair), the state runs
    around the date, and the per-pair counts of the last year's averaged tails (one grouped
    query over a year of window ends). The universe summary over time is read apart
    (:func:`universe_figure`): it does not change with the date. Divergence,
    changes, labels, ranking and ordering are in the module docstring.
    """
    if horizon not in HORIZONS:
        raise InputError(f"horizon: {horizon!r} is not one of {', '.join(HORIZONS)}")
    store = view.store
    stored = board_range(view)
    latest = store.latest_window_end(view.rolling_key)
    if latest is None or stored is None:
        raise InputError("board: no signals stored under the current settings yet "
                         "(run 'comove update')")
    first, last = stored[0], max(stored[1], pd.Timestamp(latest))
    day = last if as_of is None or as_of == "" else parse_date(as_of, "board date")
    if not first <= day <= last:
        raise InputError(f"board date: {day.date()} is outside the stored window ends "
                         f"({first.date()} to {last.date()})")
    rows = store.metrics_as_of(view.rolling_key, day.date(), (*BOARD_COLUMNS, *RUN_COLUMNS))
    if rows.empty:
        raise InputError(f"board date: no pair has a window ending by {day.date()}")
    for col in BOARD_COLUMNS:
        if col not in ("date", "family", "rotation", "n"):
            rows[col] = pd.to_numeric(rows[col]).astype(float)
    runs = store.read_state_runs(view.signals_key, starting_by=day.date(),
                                 ending_from=rows["date"].min().date())
    rows = pd.concat([rows, states_on(runs, rows)], axis=1)
    rows["state"] = worse_state(rows["state_lower"], rows["state_upper"])
    low, high = tau_band(rows["kendall_tau"], rows["kendall_tau_se"])
    rows["tau_low"], rows["tau_high"] = low, high
    q = view.rolling.tail_q
    for tail in TAILS:
        low, high = binomial_band(rows[f"tail_{tail}_emp"], rows["n"], q)
        rows[f"tail_{tail}_emp_low"], rows[f"tail_{tail}_emp_high"] = low, high
        rows[f"divergence_{tail}"] = divergence(rows[f"tail_{tail}_emp"],
                                                rows[f"tail_{tail}_emp_se"],
                                                rows["gauss_tail_q"])
    rows["divergence"] = np.fmax(rows["divergence_lower"], rows["divergence_upper"])
    step = view.rolling.step
    back = max(1, round(HORIZONS[horizon] / step))
    then = store.metrics_as_of(view.rolling_key, day.date(), BOARD_COLUMNS, back=back)
    changes = pair_changes(rows, then, back * step).set_axis(rows.index)
    rows = pd.concat([rows, changes.drop(columns=["asset_a", "asset_b"])], axis=1)
    counts = store.tail_level_counts(view.rolling_key,
                                     (day - pd.Timedelta(days=STANDING_DAYS - 1)).date(),
                                     day.date(), STANDING_LEVEL,
                                     latest=rows[["asset_a", "asset_b", "date", *RUN_COLUMNS]])
    counts = rows[["asset_a", "asset_b"]].merge(counts, on=["asset_a", "asset_b"],
                                                how="left").fillna(0)
    rows["standing"] = standing_labels(counts, _TRADING_YEAR // step).to_numpy()
    assets = sorted(set(rows["asset_a"]) | set(rows["asset_b"]))
    order = cluster_order(pair_matrix(rows, assets, "kendall_tau"))
    return BoardData(day, first, last, order, rank_pairs(rows), q, view.settings.provenance(),
                     horizon, back, back * step)


# ----------------------------------------------------------------------------- display
def ranking_table(data: BoardData) -> pd.DataFrame:
    """The ranked pairs as the page's table shows and exports them.

    Parameters
    ----------
    data : BoardData

    Returns
    -------
    DataFrame
        One row per pair in rank order, labelled columns: states, the standing label,
        divergence and the two tails' excess (in standard errors), the changes over the
        horizon (tau and the nonparametric tails with their z, the model-averaged tails
        without one: no standard error is stored for them), tau with its 95 % interval,
        the nonparametric, model-averaged and selected family's tails, the Gaussian
        same-tau reference, the selected family and the window ends; numbers rounded to 3
        decimals (scores to 2). Every numeric column sorts in the page's table.
    """
    p = data.pairs
    h = data.horizon

    def r3(col: str) -> pd.Series:
        return pd.to_numeric(p[col]).astype(float).round(3)

    def interval(lo: str, hi: str) -> pd.Series:
        return p[lo].map("{:.2f}".format) + " to " + p[hi].map("{:.2f}".format)

    def score(col: str) -> pd.Series:
        # +inf (a joint exceedance with zero s.e.) cannot happen for C_n(q,q)/q <= 1; blank.
        return p[col].replace([np.inf, -np.inf], np.nan).round(2)

    return pd.DataFrame({
        "rank": p["rank"],
        "pair": p["asset_a"] + "/" + p["asset_b"],
        "state": p["state"].fillna("no state"),
        "lower-tail state": p["state_lower"].fillna("no state"),
        "upper-tail state": p["state_upper"].fillna("no state"),
        "standing": p["standing"].fillna(""),
        "divergence (z)": score("divergence"),
        "lower excess (z)": score("divergence_lower"),
        "upper excess (z)": score("divergence_upper"),
        f"Δ tau {h}": r3("change_kendall_tau"),
        f"Δ tau {h} (z)": score("change_kendall_tau_z"),
        f"Δ lower nonparametric {h}": r3("change_tail_lower_emp"),
        f"Δ lower nonparametric {h} (z)": score("change_tail_lower_emp_z"),
        f"Δ upper nonparametric {h}": r3("change_tail_upper_emp"),
        f"Δ upper nonparametric {h} (z)": score("change_tail_upper_emp_z"),
        f"Δ lower averaged {h}": r3("change_tail_lower_avg"),
        f"Δ upper averaged {h}": r3("change_tail_upper_avg"),
        "Kendall's tau": r3("kendall_tau"),
        "tau 95%": interval("tau_low", "tau_high"),
        "lower tail nonparametric": r3("tail_lower_emp"),
        "upper tail nonparametric": r3("tail_upper_emp"),
        "Gaussian at same tau": r3("gauss_tail_q"),
        "lower tail averaged": r3("tail_lower_avg"),
        "upper tail averaged": r3("tail_upper_avg"),
        "lower tail selected family": r3("tail_lower"),
        "upper tail selected family": r3("tail_upper"),
        "family": p["family"].astype(str) + " " + p["rotation"].astype(str) + "°",
        "window end": p["date"].dt.strftime("%Y-%m-%d"),
        f"compared with ({h})": p["date_then"].dt.strftime("%Y-%m-%d").fillna(""),
    })


def _fmt(values: pd.Series, spec: str = "{:.3f}", missing: str = "n/a") -> np.ndarray:
    """Numbers as text, ``missing`` where there is none (an object array, so that the hover
    lines are joined element by element in numpy rather than through pandas)."""
    x = pd.to_numeric(values).to_numpy(dtype=float)
    out = np.array([spec.format(v) for v in x.tolist()], dtype=object)
    out[~np.isfinite(x)] = missing
    return out


def _text(values: pd.Series, missing: str = "") -> np.ndarray:
    """A text column as an object array, ``missing`` where it has none."""
    return values.astype(object).where(values.notna(), missing).to_numpy(dtype=object)


def _dates(values: pd.Series, missing: str = "n/a") -> np.ndarray:
    return _text(values.dt.strftime("%Y-%m-%d"), missing)


def _positions(data: BoardData) -> tuple[np.ndarray, np.ndarray]:
    """Row and column of each pair (in the order of ``data.pairs``) in the matrices."""
    idx = {a: k for k, a in enumerate(data.assets)}
    p = data.pairs
    i, j = ([idx[a] for a in p[c].to_numpy(dtype=object)] for c in ("asset_a", "asset_b"))
    return np.array(i, dtype=int), np.array(j, dtype=int)


def _cells(data: BoardData, text: np.ndarray) -> np.ndarray:
    """Per-pair text laid out as the asset-by-asset matrix (blank on the diagonal)."""
    i, j = _positions(data)
    out = np.full((len(data.assets), len(data.assets)), "", dtype=object)
    out[i, j] = out[j, i] = text
    return out


def _pair_names(data: BoardData) -> np.ndarray:
    p = data.pairs
    return _text(p["asset_a"]) + " / " + _text(p["asset_b"])


def _standing_lines(data: BoardData) -> np.ndarray:
    label = _text(data.pairs["standing"])
    return np.where(label == "", "", "<br>" + label)


def _tail_text(data: BoardData, tail: str, source: str) -> np.ndarray:
    """Hover line of a pair's tail figure from one source, with its uncertainty."""
    p = data.pairs
    if source == "nonparametric":
        col = f"tail_{tail}_emp"
        return (f"{tail} tail C(q,q)/q, nonparametric " + _fmt(p[col]) + " (95%: "
                + _fmt(p[f"{col}_low"]) + " to " + _fmt(p[f"{col}_high"]) + ")<br>Gaussian at "
                "same tau " + _fmt(p["gauss_tail_q"]) + ", excess "
                + _fmt(p[f"divergence_{tail}"], "{:.1f}") + " s.e.; independent pair "
                + f"{data.tail_q:g} (finite level, not the limit)")
    if source == "averaged":
        return (f"{tail} tail, model-averaged (Akaike weights) "
                + _fmt(p[f"tail_{tail}_avg"], missing=NOT_COMPUTED)
                + "<br>no stored s.e.; selected family "
                + _text(p["family"]) + " gives " + _fmt(p[f"tail_{tail}"]))
    return (f"{tail} tail, selected family's model-implied " + _fmt(p[f"tail_{tail}"])
            + " (no stored s.e.; Drill-down gives bootstrap intervals)")


def _hover(data: BoardData, quantity: str, source: str) -> np.ndarray:
    """Per-cell hover lines: value, its interval or why there is none, and provenance."""
    p = data.pairs
    fam = _text(p["family"]) + " " + p["rotation"].astype(str).to_numpy(dtype=object) + "°"
    end = " · window ending " + _dates(p["date"]) + " · " + fam
    if quantity == "kendall_tau":
        text = (_pair_names(data) + "<br>Kendall's tau " + _fmt(p["kendall_tau"])
                + " (95%: " + _fmt(p["tau_low"]) + " to " + _fmt(p["tau_high"]) + ")")
    else:
        text = (_pair_names(data) + "<br>"
                + _tail_text(data, quantity.removeprefix("tail_"), source))
    return _cells(data, text + _standing_lines(data) + "<br>state "
                  + _text(p["state"], "no state") + end)


def _heatmap_figure(data: BoardData, z: np.ndarray, hover: np.ndarray, title: str, *,
                    colorscale, zmin: float, zmax: float, cell_format: str,
                    note: str | None = None) -> FigureDict:
    labels = list(data.assets)
    heat = {"type": "heatmap", "z": z, "x": labels, "y": labels, "text": hover,
            "hovertemplate": "%{text}<extra></extra>", "colorscale": colorscale,
            "zmin": zmin, "zmax": zmax, "hoverongaps": False,
            "colorbar": {"thickness": 10, "len": 0.85}}
    if len(labels) <= 12:
        heat.update(texttemplate=cell_format, textfont={"size": 10})
    notes = [] if not note else [{
        "text": note, "xref": "paper", "yref": "paper", "x": 0, "y": -0.3,
        "showarrow": False, "xanchor": "left", "font": {"size": 10, "color": MUTED}}]
    return figure([heat], figure_layout(
        title={"text": title, "x": 0.01, "font": {"size": 13}}, height=420,
        margin={"l": 70, "r": 10, "t": 36, "b": 70 if note is None else 92},
        yaxis={"autorange": "reversed", "tickfont": {"size": 10}},
        xaxis={"tickangle": -45, "tickfont": {"size": 10}}, annotations=notes))


def _check(quantity: str, source: str) -> None:
    if quantity not in QUANTITIES:
        raise ValueError(f"quantity must be one of {QUANTITIES}, got {quantity!r}")
    if source not in TAIL_SOURCES:
        raise ValueError(f"source must be one of {TAIL_SOURCES}, got {source!r}")


def _column(quantity: str, source: str) -> str:
    return (quantity if quantity == "kendall_tau"
            else tail_column(quantity.removeprefix("tail_"), source))


def _missing_note(data: BoardData, quantity: str, source: str) -> str | None:
    if quantity == "kendall_tau" or source != "averaged" or not data.averaged_missing:
        return None
    return (f"{data.averaged_missing} of {len(data.pairs)} pairs blank: model-averaged tails "
            f"{NOT_COMPUTED}")


def matrix_figure(data: BoardData, quantity: str, source: str = DEFAULT_TAIL_SOURCE
                  ) -> FigureDict:
    """Heatmap of one quantity over every pair, assets in cluster order.

    Parameters
    ----------
    data : BoardData
    quantity : {"kendall_tau", "tail_lower", "tail_upper"}
    source : one of :data:`TAIL_SOURCES`
        For the tails: ``C_n(q,q)/q`` (default), the model-averaged coefficient or the
        selected family's.

    Returns
    -------
    FigureDict
        Diagonal blank; tau on the diverging scale over [-1, 1], tails on the sequential
        scale over [0, 1]; hover gives the value, its 95 % interval where one is stored,
        the standing label, state, window end and family. Pairs whose averaged tails were
        stored by an older comove are blank, and a note under the matrix says so.
    """
    _check(quantity, source)
    m = data.matrix(_column(quantity, source))
    tau = quantity == "kendall_tau"
    title = {"kendall_tau": "Kendall's tau", "tail_lower": "Lower tail",
             "tail_upper": "Upper tail"}[quantity]
    if not tau:
        title += {"model": " (selected family, model-implied)",
                  "averaged": " (model-averaged, Akaike weights)",
                  "nonparametric": f" C(q,q)/q, q = {data.tail_q:g}"}[source]
    return _heatmap_figure(data, m.to_numpy(), _hover(data, quantity, source), title,
                           colorscale=DIVERGING if tau else SEQUENTIAL,
                           zmin=-1 if tau else 0, zmax=1, cell_format="%{z:.2f}",
                           note=_missing_note(data, quantity, source))


def excess_figure(data: BoardData, tail: str) -> FigureDict:
    """Heatmap of a tail's excess over the Gaussian copula with the same tau.

    Parameters
    ----------
    data : BoardData
    tail : {"lower", "upper"}

    Returns
    -------
    FigureDict
        ``(C_n(q,q)/q - C_Ga(q,q)/q) / se`` per pair (:func:`divergence`, the units of the
        ranking) on the diverging scale over +-:data:`EXCESS_RANGE` standard errors: a
        pair whose tails are heavier than its centre implies shows red whether or not its
        dependence changed. Hover: both values, the excess, the model-averaged tail and
        the standing label.
    """
    if tail not in TAILS:
        raise ValueError(f"tail must be one of {TAILS}, got {tail!r}")
    p = data.pairs
    col = f"divergence_{tail}"
    z = data.matrix(col).replace([np.inf, -np.inf], np.nan).to_numpy()
    text = (_pair_names(data) + f"<br>{tail}-tail excess over Gaussian "
            + _fmt(p[col], "{:+.1f}") + " s.e.<br>C(q,q)/q " + _fmt(p[f"tail_{tail}_emp"])
            + " vs Gaussian at tau " + _fmt(p["kendall_tau"], "{:.2f}") + ": "
            + _fmt(p["gauss_tail_q"]) + "<br>model-averaged tail "
            + _fmt(p[f"tail_{tail}_avg"], missing=NOT_COMPUTED) + _standing_lines(data)
            + "<br>window ending " + _dates(p["date"]))
    title = (f"{tail.capitalize()} tail: excess over Gaussian at same tau "
             f"(s.e., q = {data.tail_q:g})")
    return _heatmap_figure(data, z, _cells(data, text), title, colorscale=DIVERGING,
                           zmin=-EXCESS_RANGE, zmax=EXCESS_RANGE, cell_format="%{z:+.1f}")


def change_figure(data: BoardData, quantity: str, source: str = DEFAULT_TAIL_SOURCE
                  ) -> FigureDict:
    """Heatmap of each pair's change of one quantity over the board's horizon.

    Parameters
    ----------
    data : BoardData
    quantity : {"kendall_tau", "tail_lower", "tail_upper"}
    source : one of :data:`TAIL_SOURCES`
        Which tail figure changes.

    Returns
    -------
    FigureDict
        ``x_t - x_{t-h}`` on the diverging scale over +-:data:`CHANGE_RANGE` (fixed, so
        horizons compare); hover: both values and dates, the change's standard error and
        z where one is stored (tau, nonparametric tails; :func:`change_se`), else why not.
    """
    _check(quantity, source)
    p = data.pairs
    col = _column(quantity, source)
    change = f"change_{col}"
    z = data.matrix(change).to_numpy()
    then = _fmt(pd.to_numeric(p[col]) - pd.to_numeric(p[change]))
    text = (_pair_names(data) + "<br>"
            + ("Kendall's tau" if quantity == "kendall_tau"
               else f"{quantity.removeprefix('tail_')} tail, {_SOURCE_WORDS[source]}")
            + " " + then + " on " + _dates(p["date_then"])
            + " → " + _fmt(p[col]) + " on " + _dates(p["date"])
            + "<br>change " + _fmt(p[change], "{:+.3f}"))
    if col in SE_COLUMNS:
        text = (text + " (s.e. " + _fmt(p[f"{change}_se"]) + ", z "
                + _fmt(p[f"{change}_z"], "{:+.1f}") + "; overlapping windows, "
                f"correlation {max(0.0, 1 - data.lag / float(p['n'].max())):.2f} assumed)")
    else:
        text = text + " (no stored s.e. for a model-based tail; see the nonparametric change)"
    title = ({"kendall_tau": "Δ Kendall's tau", "tail_lower": "Δ lower tail",
              "tail_upper": "Δ upper tail"}[quantity]
             + ("" if quantity == "kendall_tau" else f", {_SOURCE_WORDS[source]}")
             + f", over {data.horizon_label}")
    r = CHANGE_RANGE[quantity]
    return _heatmap_figure(data, z, _cells(data, text), title, colorscale=DIVERGING,
                           zmin=-r, zmax=r, cell_format="%{z:+.2f}",
                           note=_missing_note(data, quantity, source))


def date_marker(as_of: object) -> list[dict]:
    """The shapes marking the board's date on the universe summary: a dashed line across
    each of its three rows (:func:`summary_figure`); the page moves them when the date
    changes instead of sending the whole summary again."""
    day = pd.Timestamp(as_of).strftime("%Y-%m-%d")
    return [row_span(row, {"type": "line", "x0": day, "x1": day,
                           "line": {"color": MUTED, "width": 1, "dash": "dash"}})
            for row in (1, 2, 3)]


def summary_figure(summary: pd.DataFrame, as_of: pd.Timestamp | None = None) -> FigureDict:
    """The universe over time.

    Parameters
    ----------
    summary : DataFrame
        The universe summary (:meth:`monitor.data.store.Store.read_universe`).
    as_of : Timestamp, optional
        The board's date, marked by a dashed line.

    Returns
    -------
    FigureDict
        Top: cross-pair means of Kendall's tau and of both tails (nonparametric solid,
        model-averaged dashed, selected family dotted). Middle: the share of pairs in alert
        per tail. Bottom: the pairs counted each date and, of them, those carried forward
        from an earlier window end (:func:`monitor.stats.signals.universe_summary`).
    """
    x = summary.index.strftime("%Y-%m-%d").to_numpy()
    summary = rounded_for_plot(summary)
    layout = stacked_layout([0.5, 0.3, 0.2], 0.07, (
        "Cross-pair means", "Share of pairs in alert",
        "Pairs counted (carried: latest window from an earlier date)"))

    lines = [("kendall_tau", "Kendall's tau", BLUE, "solid"),
             ("tail_lower_emp", "lower tail, nonparametric", VERMILION, "solid"),
             ("tail_lower_avg", "lower tail, model-averaged", VERMILION, "dash"),
             ("tail_lower", "lower tail, selected family", VERMILION, "dot"),
             ("tail_upper_emp", "upper tail, nonparametric", SKY, "solid"),
             ("tail_upper_avg", "upper tail, model-averaged", SKY, "dash"),
             ("tail_upper", "upper tail, selected family", SKY, "dot")]
    traces = [on_row(1, {"x": x, "y": summary[col].to_numpy(), "name": name, "mode": "lines",
                         "line": {"color": colour, "dash": dash, "width": 1.4},
                         "hovertemplate": f"{name} %{{y:.3f}}<extra></extra>"})
              for col, name, colour, dash in lines
              # e.g. averaged tails of a store written before they existed
              if col in summary and not summary[col].isna().all()]
    n = summary["n_pairs"].to_numpy(dtype=float)
    for tail, colour in (("lower", ORANGE), ("upper", PURPLE)):
        alerts = summary[f"n_alert_{tail}"].to_numpy(dtype=float)
        traces.append(on_row(2, {
            "x": x, "y": alerts / n, "name": f"in {tail}-tail alert", "mode": "lines",
            "line": {"color": colour, "width": 1.4}, "customdata": np.c_[alerts, n],
            "hovertemplate": (f"{tail}-tail alert %{{y:.1%}} (%{{customdata[0]:.0f}} of "
                              "%{customdata[1]:.0f} pairs)<extra></extra>")}))
    traces.append(on_row(3, {"x": x, "y": summary["n_pairs"].to_numpy(),
                             "name": "pairs counted", "mode": "lines",
                             "line": {"color": MUTED, "width": 1.4, "shape": "hv"},
                             "hovertemplate": "%{y:.0f} pairs counted<extra></extra>"}))
    carried = (summary["n_carried"].to_numpy() if "n_carried" in summary
               else np.zeros(len(summary), dtype=int))
    traces.append(on_row(3, {"type": "bar", "x": x, "y": carried,
                             "name": "of them carried forward", "marker": {"color": ORANGE},
                             "hovertemplate": "%{y:.0f} carried forward<extra></extra>"}))
    if as_of is not None:
        layout["shapes"] = date_marker(as_of)
    layout["yaxis2"].update(tickformat=".0%", rangemode="tozero")
    layout["yaxis3"].update(rangemode="tozero")
    fig = figure(traces, figure_layout(
        **layout, height=560, hovermode="x unified", bargap=0,
        legend={"orientation": "h", "y": -0.1, "x": 0, "font": {"size": 11}}))
    return fig


def universe_figure(view: StoreView, as_of: object = None) -> FigureDict:
    """The universe summary over time as stored (:func:`summary_figure`), the board's date
    marked.

    Parameters
    ----------
    view : StoreView
    as_of : str, date or None
        ``YYYY-MM-DD``; the latest stored date when None.

    Returns
    -------
    FigureDict

    Raises
    ------
    InputError
        When no universe summary is stored under the current settings, or ``as_of`` is not
        a date.
    """
    summary = view.store.read_universe(universe_key(view.signals_key))
    if summary.empty:
        raise InputError("board: no signals stored under the current settings yet "
                         "(run 'comove update')")
    day = summary.index[-1] if as_of is None or as_of == "" else parse_date(as_of, "board date")
    return summary_figure(summary, day)
