"""What every page shares: the store opened with the configuration's settings, the parsing of
pairs and dates a user types, the uncertainty bands and a blank figure.

The dashboard, the HTML report and the alert e-mails read results through a :class:`StoreView`
so that every number they show carries the settings that produced it (window, families,
criterion, marginal model and mode, signal thresholds; :class:`monitor.settings.Settings`).
"""

from __future__ import annotations

import base64
import datetime as dt
import functools
import os
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import plotly.io as pio
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from monitor.common.arrays import read_only
from monitor.common.errors import InputError
from monitor.common.palette import figure_layout
from monitor.config import Config
from monitor.data.store import Store
from monitor.settings import Settings
from monitor.stats.empirical import tail_share_interval
from monitor.stats.rolling import RollingSettings

__all__ = ["LEVEL", "FigureDict", "StoreView", "binomial_band", "blank_figure", "figure",
           "for_browser", "on_row",
           "parse_date", "parse_pair", "rounded_for_plot", "row_axes", "row_span",
           "stacked_layout", "tau_band"]

#: Whether :func:`figure` has plotly check every property. Off when serving: for a 30-asset
#: heatmap with hover text, plotly's figure object (its checks and the copies it makes of
#: every array) costs several times the rest of building it. The test suite sets
#: ``COMOVE_VALIDATE_FIGURES=1``, so that a misspelt property fails there.
VALIDATE_FIGURES = os.environ.get("COMOVE_VALIDATE_FIGURES") == "1"

#: A figure as a dictionary, ``{"data": [trace, ...], "layout": {...}}``: what plotly.js
#: draws, what ``plotly.graph_objects.Figure`` accepts, and what a Dash graph takes.
FigureDict = dict[str, Any]


@dataclass(frozen=True, slots=True)
class StoreView:
    """A store and the settings of the results the configuration selects.

    Parameters
    ----------
    cfg : Config
    store : Store
        Open store (the view does not own it; close the store when done).
    settings : Settings
        Derived from ``cfg`` (:meth:`open`).
    """

    cfg: Config
    store: Store
    settings: Settings

    @classmethod
    def open(cls, cfg: Config, store: Store) -> StoreView:
        """The view of ``store`` under ``cfg``'s settings."""
        return cls(cfg, store, Settings.of(cfg))

    @property
    def marginal_key(self) -> str:
        return self.settings.marginal_key

    @property
    def rolling_key(self) -> str:
        return self.settings.rolling_key

    @property
    def signals_key(self) -> str:
        return self.settings.signals_key

    @property
    def rolling(self) -> RollingSettings:
        return self.settings.rolling

    def provenance(self) -> str:
        """One line naming what produced the stored results (shown in every page's footer)."""
        return f"{self.settings.provenance()}; store {self.store.shown_url}"


# ----------------------------------------------------------------------------- user input
def parse_pair(text: object, pairs: list[tuple[str, str]] | None = None) -> tuple[str, str]:
    """The pair a user's text names.

    Parameters
    ----------
    text : str or None
        ``A/B``, spaces around the names ignored.
    pairs : list of (str, str), optional
        The stored pairs. When given, ``text`` may name one in either order and the pair comes
        back in stored order (a name holding ``/`` is found by trying every cut); when not,
        ``text`` must be two different names around one ``/``.

    Returns
    -------
    (str, str)

    Raises
    ------
    InputError
        When ``text`` is empty, not of the form ``A/B`` or (with ``pairs``) names no stored pair.
    """
    text = text.strip() if isinstance(text, str) else ""
    if not text:
        raise InputError("pair: none chosen; choose a pair of assets (write it as A/B)")
    if "/" not in text:
        raise InputError(f"pair {text!r}: write it as A/B (expected two asset names)")
    if pairs is None:
        parts = [p.strip() for p in text.split("/")]
        if len(parts) != 2 or not all(parts):
            raise InputError(f"pair {text!r}: write it as A/B (expected two asset names)")
        if parts[0] == parts[1]:
            raise InputError(f"pair {text!r}: the two assets must differ")
        return parts[0], parts[1]
    known = set(pairs)
    for i in (i for i, ch in enumerate(text) if ch == "/"):
        a, b = text[:i].strip(), text[i + 1:].strip()
        if (a, b) in known:
            return a, b
        if (b, a) in known:
            return b, a
    example = f"; e.g. {pairs[0][0]}/{pairs[0][1]}" if pairs else ""
    raise InputError(f"pair {text!r}: no stored timeline under the current settings "
                     f"({len(pairs)} stored pair(s){example})")


def parse_date(text: object, what: str = "date") -> pd.Timestamp:
    """A calendar date from user input.

    Parameters
    ----------
    text : str, date or Timestamp
        ``YYYY-MM-DD`` or a longer ISO 8601 string (its time and zone are dropped).
    what : str
        What the date is, named in the error message.

    Returns
    -------
    Timestamp
        Midnight of that date, without a time zone.

    Raises
    ------
    InputError
        When ``text`` is empty or not a date.
    """
    if isinstance(text, dt.date | pd.Timestamp):
        out = pd.Timestamp(text)
    elif not isinstance(text, str) or not text.strip():
        raise InputError(f"{what}: no date given (expected YYYY-MM-DD)")
    else:
        try:
            out = pd.Timestamp(pd.to_datetime(text.strip(), format="ISO8601"))
        except (ValueError, TypeError, OverflowError):
            out = pd.NaT
        if pd.isna(out):
            raise InputError(f"{what}: cannot read date {text!r} (expected YYYY-MM-DD)")
    return (out.tz_localize(None) if out.tzinfo else out).normalize()


# ----------------------------------------------------------------------------- bands
#: Coverage of every band on the timeline and the board.
LEVEL = 0.95


def _normal_quantile(level: float) -> float:
    if not 0 < level < 1:
        raise ValueError(f"level must lie in (0, 1), got {level!r}")
    return float(stats.norm.ppf(0.5 + level / 2))


def tau_band(tau: ArrayLike, se: ArrayLike, level: float = LEVEL
             ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Pointwise normal interval of Kendall's tau.

    Parameters
    ----------
    tau, se : array_like
        Sample Kendall's tau of each window and its standard error.
    level : float
        Coverage, in (0, 1).

    Returns
    -------
    (ndarray, ndarray)
        Lower and upper ends, ``tau -+ z * se`` clipped to [-1, 1] (read-only).

    Notes
    -----
    ``z`` is the standard normal ``(1 + level) / 2`` quantile; the s.e. is the
    influence-function one of the U-statistic (Hoeffding 1948, *Ann. Math. Statist.* 19).
    """
    t, s = np.asarray(tau, dtype=float), np.asarray(se, dtype=float)
    z = _normal_quantile(level)
    return read_only(np.clip(t - z * s, -1, 1)), read_only(np.clip(t + z * s, -1, 1))


def binomial_band(tail: ArrayLike, n: ArrayLike, q: float, level: float = LEVEL
                  ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Wilson score interval of a finite-level tail concordance ``lambda = p / q``.

    Parameters
    ----------
    tail : array_like
        Nonparametric tail concordance of each window, ``C_n(q, q)/q`` or its upper analogue.
    n : array_like
        Observations in each window.
    q : float
        The tail level, in (0, 1).
    level : float
        Coverage, in (0, 1).

    Returns
    -------
    (ndarray, ndarray)
        Lower and upper ends for ``lambda``, in [0, 1] (read-only).

    Notes
    -----
    With ``p = lambda * q`` the share of window days on which both fall in the tail,
    ``z`` the normal quantile and ``m = n``:

    .. math:: \\frac{p + z^2 / 2m \\pm z \\sqrt{p(1-p)/m + z^2 / 4m^2}}{1 + z^2/m}

    (Wilson 1927, "Probable inference, the law of succession, and statistical inference",
    *J. Amer. Statist. Assoc.* 22, 209-212), kept inside [0, q] because ``C(q, q) <= q``
    (:func:`monitor.stats.empirical.tail_share_interval`), divided by ``q``.
    """
    if not 0 < q < 1:
        raise ValueError(f"q must lie in (0, 1), got {q!r}")
    lo, hi = tail_share_interval(np.asarray(tail, dtype=float) * q, n, q, level)
    return read_only(lo / q), read_only(hi / q)


def rounded_for_plot(frame: pd.DataFrame, digits: int = 4) -> pd.DataFrame:
    """A copy with float columns rounded, for plotting.

    Parameters
    ----------
    frame : DataFrame
    digits : int
        Decimals kept.

    Returns
    -------
    DataFrame

    Notes
    -----
    A figure travels to the browser as JSON; thousands of windows in full precision
    make it far larger for digits nobody reads (the hover shows three).
    """
    out = frame.copy()
    floats = out.select_dtypes("float").columns
    out[floats] = out[floats].round(digits)
    return out


def figure(traces: list[dict], layout: dict) -> FigureDict:
    """A figure dictionary of trace and layout dictionaries (arrays as numpy arrays), checked
    by plotly only when :data:`VALIDATE_FIGURES` is on (tests).

    ``plotly.graph_objects.Figure(fig)`` reads it as any other figure; :func:`for_browser`
    turns it into what a page sends.
    """
    fig = {"data": traces, "layout": layout}
    if VALIDATE_FIGURES:
        go.Figure(fig)  # raises on a misspelt or out-of-range property
    return fig


#: plotly.js element types of the typed arrays :func:`for_browser` sends (base64).
_TYPED = {"f": ("f8", np.float64), "i": ("i4", np.int32), "u": ("u4", np.uint32),
          "b": ("u1", np.uint8)}


def _wire(value: Any) -> Any:
    """``value`` ready for JSON: numeric arrays as plotly.js typed arrays (base64, with their
    shape), other arrays as lists, dictionaries and lists element by element."""
    if isinstance(value, pd.Series | pd.Index):
        value = value.to_numpy()
    if isinstance(value, np.ndarray):
        kind = value.dtype.kind
        if kind in _TYPED and value.size and (
                kind not in "iu" or np.abs(value).max() < 2**31):
            code, dtype = _TYPED[kind]
            array = np.ascontiguousarray(value, dtype=dtype)
            spec = {"dtype": code, "bdata": base64.b64encode(array).decode("ascii")}
            if array.ndim > 1:
                spec["shape"] = ", ".join(map(str, array.shape))
            return spec
        if kind == "M":
            return np.datetime_as_string(value.astype("datetime64[us]")).tolist()
        if kind != "O" or set(map(type, value.flat)) <= {str}:  # text: as it is
            return value.tolist()
        return [_wire(v) for v in value.tolist()]
    if isinstance(value, dict):
        return {k: _wire(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return (list(value) if set(map(type, value)) <= {str}
                else [_wire(v) for v in value])
    if isinstance(value, float) and not np.isfinite(value):
        return None
    if isinstance(value, np.generic):
        return _wire(value.item())
    return value


@functools.cache
def _template(name: str) -> dict:
    return pio.templates[name].to_plotly_json()


def for_browser(fig: FigureDict) -> FigureDict:
    """A figure dictionary as a page sends it: arrays encoded as plotly.js reads them
    (numbers as base64 typed arrays), with plotly's default template, which
    ``plotly.graph_objects.Figure`` would otherwise add.

    Notes
    -----
    Dash encodes a ``plotly.graph_objects.Figure`` through two deep copies and a walk of
    every array element in Python; for the Board's eight 30 x 30 heatmaps with hover text
    that was most of a response's cost. The result encodes to the same figure in the
    browser (``tests/dashboard/test_figures.py``).
    """
    layout = _wire(fig.get("layout", {}))
    layout.setdefault("template", _template(pio.templates.default))
    return {"data": [_wire(t) for t in fig.get("data", [])], "layout": layout}


def row_axes(row: int, *, layout: bool = False) -> tuple[str, str]:
    """The (x, y) axis names of row ``row`` (from 1) of :func:`stacked_layout`: as traces
    name them, ``("x", "y")``, ``("x2", "y2")``, ...; with ``layout``, as the layout's keys
    (``("xaxis", "yaxis")``, ``("xaxis2", "yaxis2")``, ...)."""
    suffix = "" if row == 1 else str(row)
    kind = "axis" if layout else ""
    return f"x{kind}{suffix}", f"y{kind}{suffix}"


def on_row(row: int, trace: dict) -> dict:
    """A trace dictionary drawn on row ``row`` of :func:`stacked_layout` (a scatter unless
    it says otherwise)."""
    x_axis, y_axis = row_axes(row)
    return {"type": "scatter", **trace, "xaxis": x_axis, "yaxis": y_axis}


def row_span(row: int, shape: dict) -> dict:
    """A shape dictionary spanning the full height of row ``row`` of :func:`stacked_layout`
    (a line or band at x positions of its own)."""
    x_axis, y_axis = row_axes(row)
    return {**shape, "xref": x_axis, "y0": 0, "y1": 1, "yref": f"{y_axis} domain"}


def stacked_layout(row_heights: list[float], spacing: float,
                   titles: tuple[str, ...] = ()) -> dict:
    """Layout entries of plots stacked in rows over one shared x axis (the tick labels on the
    bottom row), with a title above each row: what ``plotly.subplots.make_subplots(rows=n,
    cols=1, shared_xaxes=True)`` lays out, as a dictionary for :func:`figure`.

    Parameters
    ----------
    row_heights : list of float
        Relative heights, top row first.
    spacing : float
        Gap between rows, as a share of the plotting height.
    titles : tuple of str
        One per row (or none).

    Returns
    -------
    dict
        ``xaxis``/``yaxis`` entries per row (:func:`row_axes`) and ``annotations`` holding
        the titles; add the figure's own layout to it.
    """
    n = len(row_heights)
    heights = np.asarray(row_heights, dtype=float)
    heights = heights / heights.sum() * (1 - spacing * (n - 1))
    bottom_axis = row_axes(n)[0]
    layout: dict = {"annotations": []}
    top = 1.0
    for row, h in enumerate(heights, start=1):
        x, y = row_axes(row)
        x_key, y_key = row_axes(row, layout=True)
        low = max(0.0, top - h)
        layout[x_key] = {"anchor": y, "domain": [0.0, 1.0]}
        if row < n:
            layout[x_key].update(matches=bottom_axis, showticklabels=False)
        layout[y_key] = {"anchor": x, "domain": [low, top]}
        if titles:
            layout["annotations"].append({
                "text": titles[row - 1], "x": 0.5, "xanchor": "center", "xref": "paper",
                "y": top, "yanchor": "bottom", "yref": "paper", "showarrow": False,
                "font": {"size": 16}})
        top = low - spacing
    return layout


def blank_figure(text: str = "", height: int = 200) -> go.Figure:
    """An empty figure with hidden axes (and ``text`` in its middle), shown before a choice."""
    notes = ([{"text": text, "showarrow": False, "xref": "paper", "yref": "paper",
               "x": 0.5, "y": 0.5}] if text else [])
    return go.Figure(layout=figure_layout(height=height, xaxis={"visible": False},
                                          yaxis={"visible": False}, annotations=notes))
