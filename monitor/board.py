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
statistic equals the ``excess_*`` columns of :func:`monitor.signals.pair_signals`, the gate of
its window statistic. Pairs are ranked by state (alert, then watch, then calm, by the more
severe tail) and within a state by divergence, largest first.

Ordering
--------
Assets are ordered by average-linkage hierarchical clustering on the distance ``1 - tau``
of the pairs' Kendall's tau at D (a pair without a window gets distance 1, as for tau = 0),
with the leaves put in the optimal order of Bar-Joseph, Gifford & Jaakkola (2001,
*Bioinformatics* 17, S22-S29; ``scipy.cluster.hierarchy.optimal_leaf_ordering``), starting
from the assets in alphabetical order, so the order is deterministic.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from numpy.typing import ArrayLike, NDArray
from plotly.subplots import make_subplots
from scipy.cluster import hierarchy
from scipy.spatial.distance import squareform

from .arrays import read_only
from .errors import InputError
from .history import binomial_band, rounded_for_plot, tau_band
from .palette import (
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
from .pipeline import states_on
from .signals import STATES, TAILS, universe_key
from .views import StoreView

__all__ = [
    "BOARD_COLUMNS",
    "QUANTITIES",
    "TAIL_SOURCES",
    "BoardData",
    "board_data",
    "board_range",
    "cluster_order",
    "divergence",
    "matrix_figure",
    "pair_matrix",
    "parse_date",
    "rank_pairs",
    "ranking_table",
    "summary_figure",
    "worse_state",
]

#: Metric columns the board reads for each pair.
BOARD_COLUMNS = ("date", "n", "kendall_tau", "kendall_tau_se", "family", "rotation",
                 "tail_lower", "tail_upper", "tail_lower_emp", "tail_upper_emp",
                 "tail_lower_emp_se", "tail_upper_emp_se", "gauss_tail_q")
#: Where the tail matrices come from: the selected family, or the nonparametric estimate.
TAIL_SOURCES = ("model", "nonparametric")
#: Matrix quantities of the board.
QUANTITIES = ("kendall_tau", "tail_lower", "tail_upper")
_SEVERITY = {s: i for i, s in enumerate(STATES)}


def parse_date(text: object, what: str = "date") -> pd.Timestamp:
    """A calendar date from user input.

    Parameters
    ----------
    text : str, date or Timestamp
        ``YYYY-MM-DD`` (a longer ISO string keeps its first ten characters).
    what : str
        What the date is, named in the error message.

    Returns
    -------
    Timestamp
        Midnight of that date.

    Raises
    ------
    InputError
        When ``text`` is empty or not a date.
    """
    if isinstance(text, dt.date | pd.Timestamp):
        return pd.Timestamp(text).normalize()
    if not isinstance(text, str) or not text.strip():
        raise InputError(f"{what}: no date given (YYYY-MM-DD)")
    try:
        return pd.Timestamp(dt.date.fromisoformat(text.strip()[:10]))
    except ValueError:
        raise InputError(f"{what}: {text!r} is not a date (YYYY-MM-DD)") from None


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
        States from :data:`monitor.signals.STATES` (missing allowed).

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
        divergence_upper, divergence``.
    summary : DataFrame
        The stored universe summary over time
        (:meth:`monitor.store.Store.read_universe`).
    tail_q : float
    provenance : str
    """

    as_of: pd.Timestamp
    first_date: pd.Timestamp
    last_date: pd.Timestamp
    assets: tuple[str, ...]
    pairs: pd.DataFrame
    summary: pd.DataFrame
    tail_q: float
    provenance: str

    def matrix(self, column: str) -> pd.DataFrame:
        """Asset-by-asset matrix of a column of :attr:`pairs`, in cluster order."""
        return pair_matrix(self.pairs, self.assets, column)


def _provenance(view: StoreView) -> str:
    r = view.rolling
    return (f"window {r.window} days, step {r.step}, selection by {r.criterion.upper()}, "
            f"tail level q = {r.tail_q:g}, {view.cfg.marginals.mode} marginals")


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


def board_data(view: StoreView, as_of: object = None) -> BoardData:
    """Everything the Board page shows, as of a date.

    Parameters
    ----------
    view : StoreView
    as_of : str, date or None
        ``YYYY-MM-DD``; the latest stored window end when None.

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
    Four reads: the universe summary (one row per date), the latest window end, one metric
    row per pair (:meth:`monitor.store.Store.metrics_as_of`, an index seek per pair) and
    the state runs around the date; none scans the metrics. Divergence, ranking and
    ordering are in the module docstring.
    """
    store = view.store
    summary = store.read_universe(universe_key(view.signals_key))
    latest = store.latest_window_end(view.rolling_key)
    if latest is None or summary.empty:
        raise InputError("board: no signals stored under the current settings yet "
                         "(run 'comove update')")
    first, last = summary.index[0], max(summary.index[-1], pd.Timestamp(latest))
    day = last if as_of is None or as_of == "" else parse_date(as_of, "board date")
    if not first <= day <= last:
        raise InputError(f"board date: {day.date()} is outside the stored window ends "
                         f"({first.date()} to {last.date()})")
    rows = store.metrics_as_of(view.rolling_key, day.date(), BOARD_COLUMNS)
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
    assets = sorted(set(rows["asset_a"]) | set(rows["asset_b"]))
    order = cluster_order(pair_matrix(rows, assets, "kendall_tau"))
    return BoardData(day, first, last, order, rank_pairs(rows), summary, q, _provenance(view))


# ----------------------------------------------------------------------------- display
def ranking_table(data: BoardData) -> pd.DataFrame:
    """The ranked pairs as the page's table shows and exports them.

    Parameters
    ----------
    data : BoardData

    Returns
    -------
    DataFrame
        One row per pair in rank order, labelled columns: states, divergence and the two
        tails' excess (in standard errors), tau with its 95 % interval, the nonparametric
        and model-implied tails, the Gaussian same-tau reference, the selected family and
        the window end; numbers rounded to 3 decimals (scores to 2).
    """
    p = data.pairs

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
        "divergence (z)": score("divergence"),
        "lower excess (z)": score("divergence_lower"),
        "upper excess (z)": score("divergence_upper"),
        "Kendall's tau": r3("kendall_tau"),
        "tau 95%": interval("tau_low", "tau_high"),
        "lower tail nonparametric": r3("tail_lower_emp"),
        "upper tail nonparametric": r3("tail_upper_emp"),
        "Gaussian at same tau": r3("gauss_tail_q"),
        "lower tail model": r3("tail_lower"),
        "upper tail model": r3("tail_upper"),
        "family": p["family"].astype(str) + " " + p["rotation"].astype(str) + "°",
        "window end": p["date"].dt.strftime("%Y-%m-%d"),
    })


def _hover(data: BoardData, quantity: str, source: str) -> np.ndarray:
    """Per-cell hover lines: value, its interval or why there is none, and provenance."""
    p = data.pairs
    pair = p["asset_a"] + " / " + p["asset_b"]
    fam = p["family"].astype(str) + " " + p["rotation"].astype(str) + "°"
    end = " · window ending " + p["date"].dt.strftime("%Y-%m-%d") + " · " + fam
    if quantity == "kendall_tau":
        text = (pair + "<br>Kendall's tau " + p["kendall_tau"].map("{:.3f}".format)
                + " (95%: " + p["tau_low"].map("{:.3f}".format) + " to "
                + p["tau_high"].map("{:.3f}".format) + ")")
    else:
        tail = quantity.removeprefix("tail_")
        if source == "model":
            text = (pair + f"<br>{tail} tail, model-implied " + p[quantity].map("{:.3f}".format)
                    + " (no stored s.e.; Drill-down gives bootstrap intervals)")
        else:
            text = (pair + f"<br>{tail} tail C(q,q)/q, nonparametric "
                    + p[f"{quantity}_emp"].map("{:.3f}".format) + " (95%: "
                    + p[f"{quantity}_emp_low"].map("{:.3f}".format) + " to "
                    + p[f"{quantity}_emp_high"].map("{:.3f}".format) + ")<br>Gaussian at "
                    "same tau " + p["gauss_tail_q"].map("{:.3f}".format) + ", excess "
                    + p[f"divergence_{tail}"].map("{:.1f}".format) + " s.e.")
    text = text + "<br>state " + p["state"].fillna("no state") + end
    frame = p[["asset_a", "asset_b"]].assign(text=text.to_numpy())
    m = pair_matrix(frame.assign(code=np.arange(len(frame))), data.assets, "code")
    codes = m.to_numpy()
    out = np.full(codes.shape, "", dtype=object)
    ok = ~np.isnan(codes)
    out[ok] = frame["text"].to_numpy()[codes[ok].astype(int)]
    return out


def matrix_figure(data: BoardData, quantity: str, source: str = "model") -> go.Figure:
    """Heatmap of one quantity over every pair, assets in cluster order.

    Parameters
    ----------
    data : BoardData
    quantity : {"kendall_tau", "tail_lower", "tail_upper"}
    source : {"model", "nonparametric"}
        For the tails: the selected family's coefficient, or ``C_n(q,q)/q``.

    Returns
    -------
    plotly Figure
        Diagonal blank; tau on the diverging scale over [-1, 1], tails on the sequential
        scale over [0, 1]; hover gives the value, its 95 % interval where one is stored,
        the state, window end and family.
    """
    if quantity not in QUANTITIES:
        raise ValueError(f"quantity must be one of {QUANTITIES}, got {quantity!r}")
    if source not in TAIL_SOURCES:
        raise ValueError(f"source must be one of {TAIL_SOURCES}, got {source!r}")
    column = quantity if quantity == "kendall_tau" or source == "model" else f"{quantity}_emp"
    m = data.matrix(column)
    tau = quantity == "kendall_tau"
    labels = list(data.assets)
    heat = go.Heatmap(z=m.to_numpy(), x=labels, y=labels, text=_hover(data, quantity, source),
                      hovertemplate="%{text}<extra></extra>",
                      colorscale=DIVERGING if tau else SEQUENTIAL,
                      zmin=-1 if tau else 0, zmax=1, hoverongaps=False,
                      colorbar={"thickness": 10, "len": 0.85})
    if len(labels) <= 12:
        heat.update(texttemplate="%{z:.2f}", textfont={"size": 10})
    title = {"kendall_tau": "Kendall's tau", "tail_lower": "Lower tail",
             "tail_upper": "Upper tail"}[quantity]
    if not tau:
        title += " (model-implied)" if source == "model" else f" C(q,q)/q, q = {data.tail_q:g}"
    fig = go.Figure(heat)
    fig.update_layout(**figure_layout(
        title={"text": title, "x": 0.01, "font": {"size": 13}}, height=420,
        margin={"l": 70, "r": 10, "t": 36, "b": 70}))
    fig.update_yaxes(autorange="reversed", tickfont={"size": 10})
    fig.update_xaxes(tickangle=-45, tickfont={"size": 10})
    return fig


def summary_figure(summary: pd.DataFrame, as_of: pd.Timestamp | None = None) -> go.Figure:
    """The universe over time.

    Parameters
    ----------
    summary : DataFrame
        The universe summary (:meth:`monitor.store.Store.read_universe`).
    as_of : Timestamp, optional
        The board's date, marked by a dashed line.

    Returns
    -------
    plotly Figure
        Top: cross-pair means of Kendall's tau and of both tails (nonparametric solid,
        model-implied dotted). Bottom: the share of pairs in alert per tail.
    """
    x = summary.index.strftime("%Y-%m-%d").to_numpy()
    summary = rounded_for_plot(summary)
    fig = make_subplots(rows=2, cols=1, shared_xaxes=True, vertical_spacing=0.08,
                        row_heights=[0.6, 0.4], subplot_titles=(
                            "Cross-pair means", "Share of pairs in alert"))
    lines = [("kendall_tau", "Kendall's tau", BLUE, "solid"),
             ("tail_lower_emp", "lower tail, nonparametric", VERMILION, "solid"),
             ("tail_lower", "lower tail, model-implied", VERMILION, "dot"),
             ("tail_upper_emp", "upper tail, nonparametric", SKY, "solid"),
             ("tail_upper", "upper tail, model-implied", SKY, "dot")]
    for col, name, colour, dash in lines:
        fig.add_trace(go.Scatter(x=x, y=summary[col], name=name, mode="lines",
                                 line={"color": colour, "dash": dash, "width": 1.4},
                                 hovertemplate=f"{name} %{{y:.3f}}<extra></extra>"), row=1, col=1)
    n = summary["n_pairs"].to_numpy(dtype=float)
    for tail, colour in (("lower", ORANGE), ("upper", PURPLE)):
        fig.add_trace(go.Scatter(
            x=x, y=summary[f"n_alert_{tail}"] / n, name=f"in {tail}-tail alert", mode="lines",
            line={"color": colour, "width": 1.4}, customdata=np.c_[summary[f"n_alert_{tail}"], n],
            hovertemplate=(f"{tail}-tail alert %{{y:.1%}} (%{{customdata[0]:.0f}} of "
                           "%{customdata[1]:.0f} pairs)<extra></extra>")), row=2, col=1)
    if as_of is not None:
        for row in (1, 2):
            fig.add_vline(x=pd.Timestamp(as_of).strftime("%Y-%m-%d"), line={"color": MUTED, "width": 1,
                                                       "dash": "dash"}, row=row, col=1)
    fig.update_yaxes(tickformat=".0%", rangemode="tozero", row=2, col=1)
    fig.update_layout(**figure_layout(
        height=440, hovermode="x unified",
        legend={"orientation": "h", "y": -0.12, "x": 0, "font": {"size": 11}}))
    return fig
