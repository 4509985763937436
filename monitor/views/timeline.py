"""A pair's history: its stored timeline with uncertainty bands, the selected family over time,
its tail states and alert episodes, and the figure the dashboard's Timeline page shows.

Everything here reads what ``comove update`` stored (metrics, state runs, episodes) through a
:class:`monitor.views.common.StoreView`; nothing is re-estimated. The bands are pointwise 95 %
intervals of each window's estimate:

- Kendall's tau: ``tau +- z * se`` with the stored influence-function standard error
  (column ``kendall_tau_se``; Hoeffding 1948 projection, see :mod:`monitor.stats.rolling`),
  clipped to [-1, 1];
- nonparametric tail concordance ``C_n(q, q)/q`` (and its upper analogue): the Wilson score
  interval of the binomial proportion ``p = lambda * q`` out of ``n`` window days, divided by
  ``q`` (Wilson 1927); the stored ``tail_*_emp_se`` is the normal approximation of the same
  binomial model, and unlike ``lambda +- z * se`` the Wilson interval does not collapse to a
  point when no joint exceedance is seen;
- the model-implied tail coefficients have no stored standard error (the window study gives
  bootstrap intervals for a chosen window).
"""

from __future__ import annotations

from dataclasses import dataclass
from urllib.parse import urlencode

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike

from monitor.common.arrays import overlap_days
from monitor.common.errors import InputError
from monitor.common.palette import (
    FAMILY_COLOURS,
    MUTED,
    PURPLE,
    ROTATION_SHADES,
    RULE,
    SERIES_COLOURS,
    STATE_COLOURS,
    VERMILION,
    figure_layout,
)
from monitor.stats.rolling import degeneracy
from monitor.stats.signals import STATES, TAILS, states_on
from monitor.views.common import (
    FigureDict,
    StoreView,
    binomial_band,
    figure,
    on_row,
    rounded_for_plot,
    row_axes,
    row_span,
    stacked_layout,
    tau_band,
)

__all__ = [
    "EPISODE_COLOURS",
    "PairHistory",
    "episode_spans",
    "episodes_table",
    "family_runs",
    "pair_history",
    "study_link",
    "tau_axis_range",
    "timeline_figure",
    "translucent",
]

#: Shading of alert episodes on the timeline, per tail.
EPISODE_COLOURS = {"lower": VERMILION, "upper": PURPLE}


def study_link(pair: tuple[str, str], start: pd.Timestamp | str,
               end: pd.Timestamp | str) -> str:
    """The Drill-down page's address for a pair and a date range.

    Parameters
    ----------
    pair : (str, str)
    start, end : Timestamp or str
        First and last date of the range.

    Returns
    -------
    str
        ``/drilldown?pair=A/B&start=YYYY-MM-DD&end=YYYY-MM-DD`` (query URL-encoded).
    """
    iso = [pd.Timestamp(d).strftime("%Y-%m-%d") for d in (start, end)]
    query = urlencode({"pair": f"{pair[0]}/{pair[1]}", "start": iso[0], "end": iso[1]},
                      safe="/")
    return f"/drilldown?{query}"


def family_runs(frame: pd.DataFrame) -> pd.DataFrame:
    """Runs of the selected family (and rotation) over a timeline.

    Returns
    -------
    DataFrame
        ``family, rotation, first_date, last_date, windows``: one row per run of window ends
        with the same selection, in date order.
    """
    cols = ["family", "rotation", "first_date", "last_date", "windows"]
    if frame.empty:
        return pd.DataFrame(columns=cols)
    fam = frame["family"].astype(str).to_numpy()
    rot = frame["rotation"].to_numpy(dtype=np.int64)
    dates = pd.to_datetime(frame["date"]).to_numpy()
    change = np.flatnonzero((fam[1:] != fam[:-1]) | (rot[1:] != rot[:-1])) + 1
    first = np.concatenate([[0], change])
    last = np.concatenate([change - 1, [fam.size - 1]])
    return pd.DataFrame({"family": fam[first], "rotation": rot[first],
                         "first_date": dates[first], "last_date": dates[last],
                         "windows": last - first + 1}, columns=cols)


def episode_spans(episodes: pd.DataFrame, last_date: pd.Timestamp | None) -> pd.DataFrame:
    """Alert episodes as date spans to shade.

    Parameters
    ----------
    episodes : DataFrame
        Stored episodes of one pair (:meth:`monitor.data.store.Store.read_episodes`).
    last_date : Timestamp or None
        The pair's last window end: where an open episode's span stops.

    Returns
    -------
    DataFrame
        ``tail, cause, statistic, onset, start, end, open, peak_date, peak_value`` in start
        order; ``end`` is the last alert day, or ``last_date`` while the episode is open.
    """
    cols = ["tail", "cause", "statistic", "onset", "start", "end", "open", "peak_date",
            "peak_value"]
    if episodes.empty:
        return pd.DataFrame(columns=cols)
    out = episodes[["tail", "cause", "statistic", "onset", "start", "end", "peak_date",
                    "peak_value"]].copy()
    out["open"] = out["end"].isna()
    for col in ("onset", "start", "end", "peak_date"):
        out[col] = pd.to_datetime(out[col])
    out.loc[out["open"], "end"] = pd.Timestamp(last_date) if last_date is not None else pd.NaT
    return out.sort_values(["start", "tail"], kind="stable").reset_index(drop=True)[cols]


@dataclass(frozen=True, slots=True)
class PairHistory:
    """Everything the Timeline page shows for one pair.

    Attributes
    ----------
    pair : (str, str)
    frame : DataFrame
        One row per window end: ``date, start, n, kendall_tau, kendall_tau_se, tau_low,
        tau_high, family, rotation, converged, tail_lower, tail_upper, tail_lower_emp,
        tail_upper_emp, tail_lower_low, tail_lower_high, tail_upper_low, tail_upper_high,
        gauss_tail_q, state_lower, state_upper, fallback, degenerate`` (bands at
        :data:`monitor.views.common.LEVEL`; ``fallback``: the window holds residuals of either
        asset filtered by a fallback marginal fit, see ``fallbacks``; ``degenerate``:
        :func:`monitor.stats.rolling.degeneracy` of the window, "" when it is not).
    families : DataFrame
        :func:`family_runs` of the frame.
    episodes : DataFrame
        :func:`episode_spans` of the stored episodes.
    tail_q : float
    provenance : str
        :meth:`monitor.settings.Settings.provenance`.
    fallbacks : DataFrame
        :meth:`monitor.data.store.Store.fallback_spans` of the two assets: the residuals a
        fallback fit (GARCH refused) filtered.
    """

    pair: tuple[str, str]
    frame: pd.DataFrame
    families: pd.DataFrame
    episodes: pd.DataFrame
    tail_q: float
    provenance: str
    fallbacks: pd.DataFrame

    def degenerate_note(self) -> str:
        """A sentence on the degenerate windows ("" when there are none)."""
        why = self.frame["degenerate"]
        hit = why.ne("")
        if not hit.any():
            return ""
        first = why.iloc[-1] if hit.iloc[-1] else why[hit].iloc[0]
        return (f"{int(hit.sum())} window(s) are degenerate (e.g. {first}): the copula there "
                "is at a bound of what it can describe; read their figures with care.")

    def fallback_note(self) -> str:
        """A sentence naming the fallback days behind the timeline ("" when there are none)."""
        if self.fallbacks.empty:
            return ""
        parts = [f"{asset} {int(g['days'].sum())} day(s), {g['first'].min():%Y-%m-%d} to "
                 f"{g['last'].max():%Y-%m-%d}" for asset, g in self.fallbacks.groupby("asset")]
        return (f"Residuals from the EWMA-t fallback (GARCH refused): {'; '.join(parts)}; "
                f"{int(self.frame['fallback'].sum())} window(s) hold some (marked x on the "
                "tau row): read their tails with care.")


def pair_history(view: StoreView, a: str, b: str) -> PairHistory:
    """The stored history of pair ``(a, b)`` (stored order) with its bands and states.

    Raises
    ------
    InputError
        When nothing is stored for the pair under the view's settings.

    Notes
    -----
    Three reads: the pair's metric rows, its state runs and its episodes. States come from
    the stored runs (:func:`monitor.engine.pipeline.states_on`), so they are those of the last
    ``comove update``; a window end newer than the last signal update has no state.
    """
    frame = view.store.read_timeline(view.rolling_key, a, b, columns=(
        "date", "start", "n", "kendall_tau", "kendall_tau_se", "family", "rotation",
        "converged", "tail_lower", "tail_upper", "tail_lower_avg", "tail_upper_avg",
        "tail_lower_emp", "tail_upper_emp", "gauss_tail_q"))
    if frame.empty:
        raise InputError(f"pair {a}/{b}: no rolling metrics stored under the current settings "
                         "(run 'comove update')")
    q = view.rolling.tail_q
    for col in ("kendall_tau", "kendall_tau_se", "tail_lower", "tail_upper", "tail_lower_avg",
                "tail_upper_avg", "tail_lower_emp", "tail_upper_emp", "gauss_tail_q"):
        frame[col] = pd.to_numeric(frame[col]).astype(float)
    low, high = tau_band(frame["kendall_tau"], frame["kendall_tau_se"])
    frame.insert(5, "tau_low", low)
    frame.insert(6, "tau_high", high)
    for tail in TAILS:
        low, high = binomial_band(frame[f"tail_{tail}_emp"], frame["n"], q)
        frame[f"tail_{tail}_low"] = low
        frame[f"tail_{tail}_high"] = high
    runs = view.store.read_state_runs(view.signals_key, (a, b))
    states = states_on(runs, frame.assign(asset_a=a, asset_b=b))
    frame = pd.concat([frame, states], axis=1)
    fallbacks = view.store.fallback_spans(view.marginal_key, (a, b))
    frame["fallback"] = overlap_days(frame["start"], frame["date"], fallbacks["first"],
                                     fallbacks["last"])
    frame["degenerate"] = degeneracy(frame["kendall_tau"], *(
        _zero_share(*view.store.return_days(x), frame) for x in (a, b)), a, b)
    spans = episode_spans(view.store.read_episodes(view.signals_key, (a, b)),
                          frame["date"].iloc[-1])
    return PairHistory((a, b), frame, family_runs(frame), spans, q, view.settings.provenance(),
                       fallbacks)


def _zero_share(days: np.ndarray, zero: np.ndarray, frame: pd.DataFrame) -> np.ndarray:
    """Share of an asset's returns that are exactly 0 within each window [start, date], from
    its return dates and zero marks (:meth:`monitor.data.store.Store.return_days`)."""
    zeros = np.concatenate([[0], np.cumsum(zero)])
    lo = np.searchsorted(days, frame["start"].to_numpy().astype("datetime64[D]"), side="left")
    hi = np.searchsorted(days, frame["date"].to_numpy().astype("datetime64[D]"), side="right")
    return (zeros[hi] - zeros[lo]) / np.maximum(hi - lo, 1)


def episodes_table(history: PairHistory) -> pd.DataFrame:
    """The pair's episodes as the page's table shows and exports them.

    Parameters
    ----------
    history : PairHistory

    Returns
    -------
    DataFrame
        One row per episode: tail, cause, statistic, onset, first and last alert day
        (``open`` while it runs), peak day and peak evidence.
    """
    e = history.episodes
    if e.empty:
        return pd.DataFrame(columns=["tail", "cause", "statistic", "onset", "first alert day",
                                     "last alert day", "peak day", "peak evidence"])

    def iso(col: str) -> pd.Series:
        return pd.to_datetime(e[col]).dt.strftime("%Y-%m-%d")

    return pd.DataFrame({
        "tail": e["tail"], "cause": e["cause"], "statistic": e["statistic"],
        "onset": iso("onset"), "first alert day": iso("start"),
        "last alert day": iso("end").where(~e["open"].astype(bool), "open"),
        "peak day": iso("peak_date"),
        "peak evidence": pd.to_numeric(e["peak_value"]).astype(float).round(2)})


# ----------------------------------------------------------------------------- figure
def translucent(colour: str, alpha: float) -> str:
    """A palette colour made translucent, for bands and shading.

    Parameters
    ----------
    colour : str
        ``#RRGGBB``.
    alpha : float
        Opacity in [0, 1].

    Returns
    -------
    str
        ``rgba(r,g,b,alpha)``.
    """
    c = colour.lstrip("#")
    r, g, b = (int(c[i:i + 2], 16) for i in (0, 2, 4))
    return f"rgba({r},{g},{b},{alpha})"


def _band(x, low, high, colour: str, name: str, row: int, group: str,
          showlegend: bool = True) -> list[dict]:
    return [on_row(row, {"x": x, "y": high, "mode": "lines", "line": {"width": 0},
                      "hoverinfo": "skip", "showlegend": False, "legendgroup": group}),
            on_row(row, {"x": x, "y": low, "mode": "lines", "line": {"width": 0},
                      "fill": "tonexty", "fillcolor": translucent(colour, 0.2), "name": name,
                      "legendgroup": group, "hoverinfo": "skip", "showlegend": showlegend})]


#: Rows of the strip beneath the timeline, top to bottom.
STRIP_ROWS = ("family", "rotation", "lower state", "upper state")


def _strip(frame: pd.DataFrame) -> tuple[np.ndarray, list[str], list[list[float | str]],
                                          np.ndarray]:
    """Codes, labels, a stepped colour scale and hover text of the strip: the selected family,
    its rotation (shaded light to dark by angle) and each tail's state."""
    fams = list(FAMILY_COLOURS)
    rots = [f"rotated {r}°" for r in ROTATION_SHADES]
    labels = [*fams, *rots, *STATES, "no state"]
    colours = [*FAMILY_COLOURS.values(), *ROTATION_SHADES.values(),
               *(STATE_COLOURS[s] for s in STATES), RULE]
    code = {name: i for i, name in enumerate(labels)}
    fam = frame["family"].astype(str).map(code).fillna(code["independence"]).to_numpy(float)
    rot_deg = frame["rotation"].astype(int)
    rot = ("rotated " + rot_deg.astype(str) + "°").map(code).to_numpy(float)
    label = (frame["family"].astype(str) + " " + rot_deg.astype(str) + "°").to_numpy()
    rows = [fam, rot]
    text = [label, label]
    for tail in TAILS:
        st = frame[f"state_{tail}"].fillna("no state").astype(str)
        rows.append(st.map(code).to_numpy(float))
        text.append(st.to_numpy())
    k = len(labels)
    scale = []
    for i, c in enumerate(colours):
        scale += [[i / k, c], [(i + 1) / k, c]]
    return np.vstack(rows), labels, scale, np.vstack(text)


def tau_axis_range(low: ArrayLike, high: ArrayLike, pad: float = 0.1,
                   least: float = 0.2) -> tuple[float, float]:
    """The tau axis of the timeline: the data's band with some room, inside [-1, 1].

    Parameters
    ----------
    low, high : array_like
        Lower and upper ends of the tau band of each window (NaN ignored).
    pad : float
        Share of the data's span added above and below.
    least : float
        Smallest span shown, so a flat series still shows its wiggles at a readable scale.

    Returns
    -------
    (float, float)
        ``(lo, hi)`` with ``-1 <= lo < hi <= 1``; ``(-1, 1)`` when no value is finite.

    Notes
    -----
    The span is ``max(high) - min(low)``, widened by ``pad`` of itself on each side and to
    at least ``least`` around its middle; zero is kept in view when the band comes within
    ``least`` of it, so that the sign of the dependence stays readable.
    """
    lo_v = np.asarray(low, dtype=float)
    hi_v = np.asarray(high, dtype=float)
    finite = np.concatenate([lo_v[np.isfinite(lo_v)], hi_v[np.isfinite(hi_v)]])
    if finite.size == 0:
        return -1.0, 1.0
    lo, hi = float(finite.min()), float(finite.max())
    span = hi - lo
    lo, hi = lo - pad * span, hi + pad * span
    if hi - lo < least:
        mid = (hi + lo) / 2
        lo, hi = mid - least / 2, mid + least / 2
    if 0 < lo <= least:
        lo = 0.0
    if -least <= hi < 0:
        hi = 0.0
    return max(-1.0, round(lo, 3)), min(1.0, round(hi, 3))


def timeline_figure(history: PairHistory) -> FigureDict:
    """The pair's timeline: four rows sharing the date axis.

    Rows: Kendall's tau with its 95 % band; the lower and the upper tail, each with the
    nonparametric concordance ``C_n(q,q)/q`` and its Wilson band, the model-averaged
    coefficient (Akaike weights), the selected family's own coefficient (hidden until its
    legend entry is clicked: it flips with the selection) and the Gaussian copula's value at
    the window's tau; a strip
    of four rows (:data:`STRIP_ROWS`): the selected family, its rotation (shaded light to
    dark: 0, 90, 180, 270 degrees; the hover names both, e.g. "clayton 180°"), and each
    tail's state. Family colours are never state colours, and tau (black) never shares a
    colour with the tail series. The tau axis fits the band (:func:`tau_axis_range`); the
    tail axes span [0, 1]. Alert episodes are shaded (lower-tail episodes on the tau and
    lower rows, upper-tail ones on the tau and upper rows). The y axes are fixed, so
    dragging selects a date range.

    Parameters
    ----------
    history : PairHistory

    Returns
    -------
    FigureDict
        Traces in order: tau band (two traces) and tau; per tail the Wilson band (two), the
        nonparametric line, the model-averaged line, the selected family's line and the
        Gaussian same-tau line; the
        strip heatmap; legend-only markers for families, rotations, states and episode
        shading. One
        shaded rectangle per episode and row.
    """
    f = rounded_for_plot(history.frame)
    x = f["date"].dt.strftime("%Y-%m-%d").to_numpy()
    layout = stacked_layout([0.29, 0.29, 0.29, 0.13], 0.035, (
        "Kendall's tau (95% band)", f"Lower tail at q = {history.tail_q:g} (finite level)",
        f"Upper tail at q = {history.tail_q:g} (finite level)",
        "Selected family, its rotation, and the tail states"))
    traces = [*_tau_row(f, x), *_fallback_marks(f, x), *_tail_rows(f, x, history.tail_q),
              *_strip_row(f, x)]
    layout["shapes"] = _episode_shading(history.episodes)
    return figure(traces, _finish(layout, f, history.pair))


def _tau_row(f: pd.DataFrame, x: np.ndarray) -> list[dict]:
    """Row 1: Kendall's tau and its band."""
    tau_colour = SERIES_COLOURS["tau"]
    return [*_band(x, f["tau_low"].to_numpy(), f["tau_high"].to_numpy(), tau_colour,
                   "tau 95% band", 1, "tau"),
            on_row(1, {"x": x, "y": f["kendall_tau"].to_numpy(), "mode": "lines",
                    "name": "Kendall's tau", "line": {"color": tau_colour, "width": 1.5},
                    "legendgroup": "tau", "customdata": np.c_[f["tau_low"], f["tau_high"]],
                    "hovertemplate": "tau %{y:.3f} (95%: %{customdata[0]:.3f} to "
                                     "%{customdata[1]:.3f})<extra></extra>"})]


def _fallback_marks(f: pd.DataFrame, x: np.ndarray) -> list[dict]:
    """On the tau row, an x on every window holding residuals from a fallback fit."""
    hit = f["fallback"].to_numpy(dtype=bool)
    if not hit.any():
        return []
    return [on_row(1, {
        "x": x[hit], "y": f["kendall_tau"].to_numpy()[hit], "mode": "markers",
        "name": "window holds EWMA-t fallback residuals", "legendgroup": "fallback",
        "marker": {"symbol": "x-thin", "size": 7, "color": MUTED, "line": {"width": 1}},
        "hovertemplate": "residuals from the EWMA-t fallback in this window<extra></extra>"})]


def _tail_rows(f: pd.DataFrame, x: np.ndarray, q: float) -> list[dict]:
    """Rows 2 and 3: per tail the Wilson band, the nonparametric, model-averaged, selected
    family's and Gaussian same-tau lines, and the independent pair's value q (the legend
    entries once, from the lower tail)."""
    emp_colour, model_colour = SERIES_COLOURS["tail_empirical"], SERIES_COLOURS["tail_model"]
    traces = []
    for row, tail in ((2, "lower"), (3, "upper")):
        first = tail == "lower"
        low, high = f[f"tail_{tail}_low"].to_numpy(), f[f"tail_{tail}_high"].to_numpy()
        traces += _band(x, low, high, emp_colour, "nonparametric 95% band (Wilson)", row,
                        "emp-band", showlegend=first)
        traces += [on_row(row, {
            "x": x, "y": f[f"tail_{tail}_emp"].to_numpy(), "mode": "lines",
            "name": "nonparametric C(q,q)/q", "line": {"color": emp_colour, "width": 1.2},
            "legendgroup": "emp", "showlegend": first, "customdata": np.c_[low, high],
            "hovertemplate": f"{tail} nonparametric %{{y:.3f}} (95%: %{{customdata[0]:.3f}} "
                             "to %{customdata[1]:.3f})<extra></extra>"}), on_row(row, {
            "x": x, "y": f[f"tail_{tail}_avg"].to_numpy(), "mode": "lines",
            "name": "model-averaged (Akaike weights)",
            "line": {"color": model_colour, "width": 1.5}, "legendgroup": "averaged",
            "showlegend": first,
            "hovertemplate": f"{tail} model-averaged %{{y:.3f}} (no stored s.e.)<extra></extra>"}),
            # The selected family's own coefficient jumps between 0 and a large value as the
            # choice flips between tail-free and tail-dependent families: a click in the
            # legend shows it.
            on_row(row, {
                "x": x, "y": f[f"tail_{tail}"].to_numpy(), "mode": "lines",
                "name": "model-implied (selected family)",
                "line": {"color": model_colour, "width": 1, "dash": "dot"},
                "legendgroup": "model", "showlegend": first, "visible": "legendonly",
                "hovertemplate": f"{tail} selected family %{{y:.3f}} (no stored s.e.)"
                                 "<extra></extra>"}),
            on_row(row, {
                "x": x, "y": f["gauss_tail_q"].to_numpy(), "mode": "lines",
                "name": "Gaussian at the same tau",
                "line": {"color": SERIES_COLOURS["gaussian_same_tau"], "width": 1,
                         "dash": "dot"}, "legendgroup": "gauss", "showlegend": first,
                "hovertemplate": "Gaussian same-tau %{y:.3f}<extra></extra>"}),
            # C_n(q,q)/q is a finite-level figure: an independent pair reads q, not 0.
            on_row(row, {
                "x": [x[0], x[-1]], "y": [q, q], "mode": "lines",
                "name": f"independent pair (= q = {q:g})",
                "line": {"color": MUTED, "width": 1, "dash": "dash"},
                "legendgroup": "independent", "showlegend": first, "hoverinfo": "skip"})]
    return traces


def _key(row: int, name: str, group: str, title: str, marker: dict) -> dict:
    """A legend-only entry: a coloured square naming a colour of the strip or shading."""
    return on_row(row, {"x": [None], "y": [None], "mode": "markers", "name": name,
                     "legendgroup": group, "legendgrouptitle": {"text": title},
                     "marker": {"symbol": "square", "size": 11, **marker}})


def _strip_row(f: pd.DataFrame, x: np.ndarray) -> list[dict]:
    """Row 4: the family/rotation/state strip, and legend-only keys for its colours and for
    the episode shading."""
    z, labels, scale, text = _strip(f)
    traces = [on_row(4, {"type": "heatmap", "x": x, "y": list(STRIP_ROWS), "z": z, "text": text,
                      "colorscale": scale, "zmin": -0.5, "zmax": len(labels) - 0.5,
                      "showscale": False, "hovertemplate": "%{y}: %{text}<extra></extra>",
                      "ygap": 1})]
    families = f["family"].astype(str)
    for fam, colour in FAMILY_COLOURS.items():
        if (families == fam).any():
            traces.append(_key(4, f"{fam} ({(families == fam).mean():.0%} of windows)",
                               "families", "selected family", {"color": colour}))
    rotations = f["rotation"].astype(int)
    for rot, shade in ROTATION_SHADES.items():
        if (rotations == rot).any():
            traces.append(_key(4, f"{rot}° ({(rotations == rot).mean():.0%})", "rotations",
                               "rotation (counter-clockwise)",
                               {"color": shade, "line": {"color": MUTED, "width": 1}}))
    traces += [_key(4, state, "states", "tail state", {"color": STATE_COLOURS[state]})
               for state in STATES]
    traces += [_key(1, f"{tail}-tail alert episode", "episodes", "shaded",
                    {"color": translucent(EPISODE_COLOURS[tail], 0.35)}) for tail in TAILS]
    return traces


def _episode_shading(episodes: pd.DataFrame) -> list[dict]:
    """One shaded rectangle per episode on the tau row and its tail's row."""
    shapes = []
    for e in episodes.itertuples(index=False):
        for row in ((1, 2) if e.tail == "lower" else (1, 3)):
            shapes.append(row_span(row, {
                "type": "rect", "x0": e.start, "x1": e.end, "layer": "below",
                "line": {"width": 0},
                "fillcolor": translucent(EPISODE_COLOURS[e.tail], 0.14)}))
    return shapes


def _finish(layout: dict, f: pd.DataFrame, pair: tuple[str, str]) -> dict:
    """Fixed y axes (a drag selects dates), the tau axis fitted to its band, the layout."""
    a, b = pair
    for row in range(1, 5):
        x_axis, y_axis = row_axes(row, layout=True)
        layout[y_axis]["fixedrange"] = True
        layout[x_axis].update(showspikes=True, spikemode="across", spikecolor=MUTED,
                              spikethickness=1)
    layout["yaxis"].update(range=list(tau_axis_range(f["tau_low"], f["tau_high"])),
                           zeroline=True, zerolinecolor=RULE)
    layout["yaxis2"]["range"] = layout["yaxis3"]["range"] = [0, 1]
    return figure_layout(
        **layout, height=900, dragmode="zoom", hovermode="x unified",
        legend={"orientation": "h", "y": -0.05, "yanchor": "top", "x": 0,
                "font": {"size": 11}, "groupclick": "toggleitem"},
        margin={"l": 56, "r": 16, "t": 48, "b": 120},
        title={"text": f"{a} / {b}", "x": 0.01, "font": {"size": 14}})
