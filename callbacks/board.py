"""Callbacks of the Board page: the date and the tail source in, matrices, ranking and the
universe summary out (all computed by :func:`monitor.board.board_data`)."""

from __future__ import annotations

from urllib.parse import quote

import plotly.graph_objects as go
from dash import Input, Output

from layouts import ids
from layouts.components import message
from monitor.board import QUANTITIES, board_data, matrix_figure, ranking_table, summary_figure
from monitor.errors import InputError
from monitor.palette import figure_layout

#: Outputs of :func:`show_board`, in order.
OUTPUTS = ((ids.BOARD_MATRIX_TAU, "figure"), (ids.BOARD_MATRIX_LOWER, "figure"),
           (ids.BOARD_MATRIX_UPPER, "figure"), (ids.BOARD_RANKING, "data"),
           (ids.BOARD_RANKING, "columns"), (ids.BOARD_SUMMARY, "figure"),
           (ids.BOARD_NOTE, "children"), (ids.BOARD_MESSAGE, "children"))


def _blank() -> go.Figure:
    return go.Figure(layout=figure_layout(height=200, xaxis={"visible": False},
                                          yaxis={"visible": False}))


def _table(data) -> tuple[list[dict], list[dict]]:
    frame = ranking_table(data)
    links = [f"[timeline](/timeline?pair={quote(p, safe='/')})" for p in frame["pair"]]
    frame.insert(2, "history", links)
    columns = [{"name": str(c), "id": str(c)} for c in frame.columns]
    columns[2]["presentation"] = "markdown"
    return frame.to_dict("records"), columns


def show_board(view, date: str | None, source: str | None) -> tuple:
    """Everything the page shows for a date and a tail source (the values of
    :data:`OUTPUTS`); a bad date gives blank figures and a one-line message."""
    try:
        data = board_data(view, date or None)
    except InputError as exc:
        blank = _blank()
        return blank, blank, blank, [], [], blank, "", message(str(exc), kind="problem")
    source = source if source in ("model", "nonparametric") else "model"
    figures = [matrix_figure(data, q, source) for q in QUANTITIES]
    rows, columns = _table(data)
    counts = data.pairs["state"].value_counts()
    stale = int(data.pairs["date"].lt(data.pairs["date"].max()).sum())
    note = (f"{len(data.pairs)} pairs of {len(data.assets)} assets as of "
            f"{data.as_of:%Y-%m-%d}: {int(counts.get('alert', 0))} in alert, "
            f"{int(counts.get('watch', 0))} on watch. {data.provenance}. Hover a cell for its "
            "value with a 95% interval (tau: influence-function s.e.; nonparametric tails: "
            "Wilson binomial interval); model-implied tails have no stored s.e. — the "
            "Drill-down page gives bootstrap intervals."
            + (f" {stale} pair(s) have no window ending on the latest date shown and use "
               "their previous one." if stale else ""))
    return (*figures, rows, columns, summary_figure(data.summary, data.as_of), note, "")


def register(app, view) -> None:
    """Attach this page's callbacks to ``app``."""

    @app.callback(*[Output(i, p) for i, p in OUTPUTS], Input(ids.BOARD_DATE, "date"),
                  Input(ids.BOARD_TAIL_SOURCE, "value"))
    def board(date, source):
        return show_board(view, date, source)
