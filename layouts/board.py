"""The Board page: the universe as of a date — dependence matrices, pairs ranked by state and
divergence, and the universe summary over time (figures from :mod:`monitor.board`)."""

from __future__ import annotations

from dash import dcc, html

from monitor.board import TAIL_SOURCES, board_range, parse_date
from monitor.errors import InputError
from monitor.history import translucent
from monitor.palette import STATE_COLOURS

from . import ids
from .components import graph, message, panel, table

TITLE = "Board"

#: Labels of the tail-source toggle.
SOURCE_LABELS = {"model": "model-implied (selected family)",
                 "nonparametric": "nonparametric C(q,q)/q"}

DIVERGENCE_NOTE = (
    "Ranked by state (alert, watch, calm: the more severe tail), then by divergence: the "
    "larger of the two tails' excess of the nonparametric C(q,q)/q over the Gaussian "
    "copula's value at the same Kendall's tau, in binomial standard errors, "
    "(λ_emp − C_Gauss(q,q)/q) / s.e. Each row is the pair's latest window ending on or "
    "before the date. Click a pair's timeline link for its history.")


def layout(view, query: dict[str, str]) -> html.Div:
    """The page; ``query`` may hold ``date=YYYY-MM-DD`` and ``tails=model|nonparametric``."""
    problems = []
    bounds = board_range(view)
    date = None if bounds is None else bounds[1].strftime("%Y-%m-%d")
    if query.get("date"):
        try:
            asked = parse_date(query["date"], "date in the address")
            date = asked.strftime("%Y-%m-%d")
        except InputError as exc:
            problems.append(message(str(exc), kind="problem"))
    source = query.get("tails", "model")
    if source not in TAIL_SOURCES:
        problems.append(message(f"tails in the address: {source!r} is not one of "
                                f"{', '.join(TAIL_SOURCES)}; showing model-implied",
                                kind="problem"))
        source = "model"
    picker = dcc.DatePickerSingle(
        id=ids.BOARD_DATE, date=date, display_format="YYYY-MM-DD", first_day_of_week=1,
        min_date_allowed=None if bounds is None else bounds[0].strftime("%Y-%m-%d"),
        max_date_allowed=None if bounds is None else bounds[1].strftime("%Y-%m-%d"))
    toggle = dcc.RadioItems(
        id=ids.BOARD_TAIL_SOURCE, value=source, inline=True,
        options=[{"label": SOURCE_LABELS[s], "value": s} for s in TAIL_SOURCES],
        inputStyle={"marginRight": "4px"}, labelStyle={"marginRight": "16px"})
    controls = html.Div([
        html.Label(["As of ", picker], style={"marginRight": "28px"}),
        html.Span("Tail matrices: ", style={"marginRight": "6px"}), toggle,
    ], style={"display": "flex", "alignItems": "center", "flexWrap": "wrap", "gap": "6px"})
    matrices = html.Div([
        html.Div(graph(ids.BOARD_MATRIX_TAU, filename="board-kendall-tau"),
                 style={"flex": "1 1 360px", "minWidth": "320px"}),
        html.Div(graph(ids.BOARD_MATRIX_LOWER, filename="board-lower-tail"),
                 style={"flex": "1 1 360px", "minWidth": "320px"}),
        html.Div(graph(ids.BOARD_MATRIX_UPPER, filename="board-upper-tail"),
                 style={"flex": "1 1 360px", "minWidth": "320px"}),
    ], style={"display": "flex", "flexWrap": "wrap", "gap": "8px"})
    state_rows = [{"if": {"filter_query": f'{{state}} = "{s}"'},
                   "backgroundColor": translucent(STATE_COLOURS[s], 0.12)} for s in ("alert", "watch")]
    ranking = table(ids.BOARD_RANKING, page_size=20, markdown_options={"link_target": "_self"},
                    style_data_conditional=state_rows)
    return html.Div([
        panel("Universe on a date",
              controls, *problems, html.Div(id=ids.BOARD_MESSAGE),
              note="Pick a date to see every pair's window ending on or before it; the "
                   "matrices place related assets next to each other."),
        panel("Dependence matrices", html.P(id=ids.BOARD_NOTE, style={
            "margin": "0 0 6px 0", "fontSize": "0.85rem"}), matrices),
        panel("Pairs by state and divergence", ranking, note=DIVERGENCE_NOTE),
        panel("Universe over time", graph(ids.BOARD_SUMMARY, filename="board-universe"),
              note="Cross-pair averages of the window estimates on each date (pairs with a "
                   "window ending that day) and the share of pairs in alert per tail; the "
                   "dashed line marks the board's date. A pair's own uncertainty bands are on "
                   "its timeline."),
    ])
