"""Callbacks of the Board page: the date, the horizon and the tail source in; change,
level and excess matrices and the ranking out (all computed by
:func:`monitor.views.board.board_data`). The universe summary over time comes once per page
load (it does not change with the date); a change of date only moves its date marker."""

from __future__ import annotations

from functools import partial
from urllib.parse import quote

from dash import Input, Output, Patch, State, no_update

from layouts import ids
from layouts.components import filter_action, message, shape_columns
from monitor.common.errors import InputError
from monitor.common.wording import finite_level_note
from monitor.views.board import (
    DEFAULT_HORIZON,
    DEFAULT_TAIL_SOURCE,
    HORIZONS,
    QUANTITIES,
    TAIL_SOURCES,
    board_data,
    board_range,
    change_figure,
    date_marker,
    excess_figure,
    matrix_figure,
    ranking_table,
    universe_figure,
)
from monitor.views.common import blank_figure, for_browser

#: Outputs of :func:`show_board`, in order.
OUTPUTS = ((ids.BOARD_MATRIX_TAU, "figure"), (ids.BOARD_MATRIX_LOWER, "figure"),
           (ids.BOARD_MATRIX_UPPER, "figure"), (ids.BOARD_RANKING, "data"),
           (ids.BOARD_RANKING, "columns"), (ids.BOARD_CHANGE_TAU, "figure"), (ids.BOARD_CHANGE_LOWER, "figure"),
           (ids.BOARD_CHANGE_UPPER, "figure"), (ids.BOARD_EXCESS_LOWER, "figure"),
           (ids.BOARD_EXCESS_UPPER, "figure"), (ids.BOARD_CHANGE_NOTE, "children"),
           (ids.BOARD_NOTE, "children"), (ids.BOARD_MESSAGE, "children"),
           (ids.BOARD_RANKING, "hidden_columns"), (ids.BOARD_RANKING, "filter_action"))


def _table(data) -> tuple[list[dict], list[dict], list[str], str]:
    """(data, columns, hidden columns, filter action) of the ranking table: the model-based,
    per-tail state and reference columns start hidden ("Toggle Columns" shows them, the CSV
    has them all), so that the main ones fit a 1600-pixel screen."""
    frame = ranking_table(data)
    links = [f"[timeline](/timeline?pair={quote(p, safe='/')})" for p in frame["pair"]]
    frame.insert(2, "history", links)
    # Shown headers drop "nonparametric" (the page's note says the tails are C(q,q)/q), so
    # that no header word is wider than its numbers; the ids keep the full names.
    columns = [{"name": str(c).replace(" tail nonparametric", " tail")
                .replace(" nonparametric", " tail"), "id": str(c)} for c in frame.columns]
    columns[2]["presentation"] = "markdown"
    for c in columns:
        if frame[c["id"]].dtype.kind in "fi":
            c["type"] = "numeric"  # sorts as numbers, not as text
    secondary = [c for c in frame.columns
                 if "averaged" in c or "selected family" in c or c.startswith("compared with")
                 or c in ("lower-tail state", "upper-tail state", "tau 95%",
                          "Gaussian at same tau", "family", "window end")]
    columns, hidden = shape_columns(columns, secondary=secondary)
    return frame.to_dict("records"), columns, hidden, filter_action(len(frame))


def _change_note(data) -> str:
    p = data.pairs
    z = p["change_kendall_tau_z"].abs()
    moved = int((z >= 2).sum())
    lo = p["change_tail_lower_emp_z"].abs()
    hi = p["change_tail_upper_emp_z"].abs()
    tails = int(((lo >= 2) | (hi >= 2)).sum())
    missing = int(p["date_then"].isna().sum())
    return (f"Change over {data.horizon_label} ({data.back} window ends, {data.lag} "
            f"trading days) up to {data.as_of:%Y-%m-%d}: {moved} of {len(p)} pairs moved "
            f"in tau by at least 2 s.e., {tails} in a nonparametric tail."
            + (f" {missing} pair(s) have no window that far back." if missing else ""))


def show_board(view, date: str | None, source: str | None,
               horizon: str | None = DEFAULT_HORIZON) -> tuple:
    """Everything the page shows for a date, a tail source and a horizon (the values of
    :data:`OUTPUTS`); a bad date gives blank figures and a one-line message."""
    horizon = horizon if horizon in HORIZONS else DEFAULT_HORIZON
    try:
        data = board_data(view, date or None, horizon)
    except InputError as exc:
        blank = blank_figure()
        return (blank, blank, blank, [], [], blank, blank, blank, blank, blank, "", "",
                message(str(exc), kind="problem"), [], filter_action(0))
    source = source if source in TAIL_SOURCES else DEFAULT_TAIL_SOURCE
    figures = [for_browser(matrix_figure(data, q, source)) for q in QUANTITIES]
    changes = [for_browser(change_figure(data, q, source)) for q in QUANTITIES]
    excess = [for_browser(excess_figure(data, t)) for t in ("lower", "upper")]
    rows, columns, hidden, filtering = _table(data)
    counts = data.pairs["state"].value_counts()
    standing = int(data.pairs["standing"].fillna("").ne("").sum())
    stale = int(data.pairs["date"].lt(data.pairs["date"].max()).sum())
    note = (f"{len(data.pairs)} pairs of {len(data.assets)} assets as of "
            f"{data.as_of:%Y-%m-%d}: {int(counts.get('alert', 0))} in alert, "
            f"{int(counts.get('watch', 0))} on watch, {standing} with a standing heavy tail. "
            f"{data.provenance}. Hover a cell for its value with a 95% interval (tau: "
            "influence-function s.e.; nonparametric tails: Wilson binomial interval); "
            "model-based tails have no stored s.e. — the Drill-down page gives bootstrap "
            f"intervals. {finite_level_note(data.tail_q)}"
            + (f" {stale} pair(s) have no window ending on the latest date shown and use "
               "their previous one." if stale else "")
            + (f" {data.averaged_missing} pair(s) were stored by an older comove: their "
               "model-averaged tails are not computed by this version."
               if data.averaged_missing else ""))
    return (*figures, rows, columns, *changes, *excess, _change_note(data), note, "", hidden,
            filtering)


def show_universe(view) -> dict:
    """The universe summary over time as the page receives it, marked at the latest date (a
    blank figure when none is stored)."""
    try:
        return for_browser(universe_figure(view))
    except InputError:
        return blank_figure().to_plotly_json()


def marked(summary: dict, date: str | None) -> dict:
    """``summary`` (from :func:`show_universe`) with its date marker on ``date`` (the latest
    when None); its data are shared, not copied."""
    if date is None or not summary.get("data"):
        return summary
    return {**summary, "layout": {**summary["layout"], "shapes": date_marker(date)}}


def move_marker(view, date: str | None):
    """A patch moving the universe summary's date marker to ``date`` (the latest stored date
    when None): a few hundred bytes instead of the whole summary again."""
    bounds = board_range(view)
    if bounds is None:
        return no_update
    patch = Patch()
    patch["layout"]["shapes"] = date_marker(date or bounds[1])
    return patch


def register(app, view) -> None:
    """Attach this page's callbacks to ``app``."""

    @app.callback(*[Output(i, p) for i, p in OUTPUTS], Input(ids.BOARD_DATE, "date"),
                  Input(ids.BOARD_TAIL_SOURCE, "value"), Input(ids.BOARD_HORIZON, "value"))
    def board(date, source, horizon):
        return app.responses("board", partial(show_board, view), date, source, horizon)

    @app.callback(Output(ids.BOARD_SUMMARY, "figure"), Input(ids.BOARD_UNIVERSE, "data"),
                  State(ids.BOARD_DATE, "date"))
    def universe(_range, date):
        return marked(app.responses("universe", partial(show_universe, view)), date)

    @app.callback(Output(ids.BOARD_SUMMARY, "figure", allow_duplicate=True),
                  Input(ids.BOARD_DATE, "date"), prevent_initial_call=True)
    def marker(date):
        return move_marker(view, date)
