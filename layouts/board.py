"""The Board page: the universe as of a date — what changed over a horizon, dependence
matrices, the excess over the Gaussian copula, pairs ranked by state and divergence, and the
universe summary over time (figures from :mod:`monitor.views.board`)."""

from __future__ import annotations

from dash import dcc, html

from monitor.common.errors import InputError
from monitor.common.palette import STATE_COLOURS
from monitor.stats.signals import UNIVERSE_STALE_LIMIT
from monitor.views.board import (
    DEFAULT_HORIZON,
    DEFAULT_TAIL_SOURCE,
    HORIZON_LABELS,
    HORIZONS,
    STANDING_LEVEL,
    STANDING_SHARE,
    TAIL_SOURCES,
    board_range,
    parse_date,
)
from monitor.views.timeline import translucent

from . import ids
from .components import graph, message, panel, table

TITLE = "Board"

#: Labels of the tail-source toggle.
SOURCE_LABELS = {"nonparametric": "nonparametric C(q,q)/q",
                 "averaged": "model-averaged (Akaike weights)",
                 "model": "selected family"}

CHANGE_NOTE = (
    "Each cell is the pair's change between its latest window and the window the chosen "
    "horizon earlier (5, 21, 63 or 252 trading days): red rose, blue fell. Hover for both "
    "values and dates and, for tau and the nonparametric tails, the change's standard error "
    "and z = change / s.e. (the overlapping windows' correlation 1 − h/n is allowed for). "
    "Sort the ranking table by a Δ or z column for the largest moves.")

EXCESS_NOTE = (
    "The nonparametric C(q,q)/q minus the value of a Gaussian copula with the same Kendall's "
    "tau, in binomial standard errors (the ranking's units): a heavy-tailed pair shows red "
    "even when its centre never changed. 'Standing heavy … tail' in the ranking marks a pair "
    f"whose model-averaged tail coefficient was at least {STANDING_LEVEL:g} on at least "
    f"{STANDING_SHARE:.0%} of its window ends of the last year: a standing condition, not a "
    "regime shift.")

TAIL_NOTE = (
    "Tail figures: the nonparametric C(q,q)/q (default: model-free, with a 95% interval; what "
    "the alerts and the ranking use), the model-averaged coefficient (each candidate family's "
    "limit coefficient weighted by its Akaike weight: no jump when the selected family flips), "
    "or the selected family's own value (can flip between 0 and a large value from one day "
    "to the next).")

DIVERGENCE_NOTE = (
    "Ranked by state (alert, watch, calm: the more severe tail), then by divergence: the "
    "larger of the two tails' excess of the nonparametric C(q,q)/q over the Gaussian "
    "copula's value at the same Kendall's tau, in binomial standard errors, "
    "(λ_emp − C_Gauss(q,q)/q) / s.e. Each row is the pair's latest window ending on or "
    "before the date. Click a pair's timeline link for its history.")


def _choice(query: dict, key: str, allowed, default: str, labels, problems: list) -> str:
    """The query parameter ``key`` if it is one of ``allowed``, else ``default`` with a note."""
    value = query.get(key, default)
    if value in allowed:
        return value
    problems.append(message(f"{key} in the address: {value!r} is not one of "
                            f"{', '.join(allowed)}; showing {labels[default]}", kind="problem"))
    return default


def layout(view, query: dict[str, str]) -> html.Div:
    """The page; ``query`` may hold ``date=YYYY-MM-DD``,
    ``tails=nonparametric|averaged|model`` and ``horizon=1w|1m|3m|1y``."""
    problems = []
    bounds = board_range(view)
    date = None if bounds is None else bounds[1].strftime("%Y-%m-%d")
    if query.get("date"):
        try:
            asked = parse_date(query["date"], "date in the address")
            date = asked.strftime("%Y-%m-%d")
        except InputError as exc:
            problems.append(message(str(exc), kind="problem"))
    source = _choice(query, "tails", TAIL_SOURCES, DEFAULT_TAIL_SOURCE, SOURCE_LABELS, problems)
    horizon = _choice(query, "horizon", HORIZONS, DEFAULT_HORIZON, HORIZON_LABELS, problems)
    picker = dcc.DatePickerSingle(
        id=ids.BOARD_DATE, date=date, display_format="YYYY-MM-DD", first_day_of_week=1,
        min_date_allowed=None if bounds is None else bounds[0].strftime("%Y-%m-%d"),
        max_date_allowed=None if bounds is None else bounds[1].strftime("%Y-%m-%d"))
    radio = {"inline": True, "inputStyle": {"marginRight": "4px"},
             "labelStyle": {"marginRight": "14px"}}
    toggle = dcc.RadioItems(
        id=ids.BOARD_TAIL_SOURCE, value=source,
        options=[{"label": SOURCE_LABELS[s], "value": s} for s in TAIL_SOURCES], **radio)
    horizons = dcc.RadioItems(
        id=ids.BOARD_HORIZON, value=horizon,
        options=[{"label": HORIZON_LABELS[h], "value": h} for h in HORIZONS], **radio)
    controls = html.Div([
        html.Label(["As of ", picker], style={"marginRight": "28px"}),
        html.Span("Change over: ", style={"marginRight": "6px"}), horizons,
        html.Span("Tail figures: ", style={"marginRight": "6px", "marginLeft": "16px"}),
        toggle,
    ], style={"display": "flex", "alignItems": "center", "flexWrap": "wrap", "gap": "6px"})

    def row(*pairs: tuple[str, str]) -> html.Div:
        return html.Div([html.Div(graph(i, filename=f), style={"flex": "1 1 360px",
                                                                "minWidth": "320px"})
                         for i, f in pairs],
                        style={"display": "flex", "flexWrap": "wrap", "gap": "8px"})

    small = {"margin": "0 0 6px 0", "fontSize": "0.85rem"}
    state_rows = [{"if": {"filter_query": f'{{state}} = "{s}"'},
                   "backgroundColor": translucent(STATE_COLOURS[s], 0.12)} for s in ("alert", "watch")]
    ranking = table(ids.BOARD_RANKING, page_size=20, markdown_options={"link_target": "_self"},
                    style_data_conditional=state_rows)
    return html.Div([
        panel("Universe on a date",
              controls, *problems, html.Div(id=ids.BOARD_MESSAGE),
              note="Pick a date to see every pair's window ending on or before it, and a "
                   "horizon to compare it with. " + TAIL_NOTE),
        panel("What changed", html.P(id=ids.BOARD_CHANGE_NOTE, style=small),
              row((ids.BOARD_CHANGE_TAU, "board-change-tau"),
                  (ids.BOARD_CHANGE_LOWER, "board-change-lower-tail"),
                  (ids.BOARD_CHANGE_UPPER, "board-change-upper-tail")),
              note=CHANGE_NOTE),
        panel("Dependence matrices", html.P(id=ids.BOARD_NOTE, style=small),
              row((ids.BOARD_MATRIX_TAU, "board-kendall-tau"),
                  (ids.BOARD_MATRIX_LOWER, "board-lower-tail"),
                  (ids.BOARD_MATRIX_UPPER, "board-upper-tail")),
              note="The matrices place related assets next to each other."),
        panel("Excess over Gaussian (standing tail-heaviness)",
              row((ids.BOARD_EXCESS_LOWER, "board-excess-lower"),
                  (ids.BOARD_EXCESS_UPPER, "board-excess-upper")),
              note=EXCESS_NOTE),
        panel("Pairs by state and divergence", ranking, note=DIVERGENCE_NOTE),
        panel("Universe over time", graph(ids.BOARD_SUMMARY, filename="board-universe"),
              dcc.Store(id=ids.BOARD_UNIVERSE, data=None if bounds is None else [
                  b.strftime("%Y-%m-%d") for b in bounds]),
              note="Cross-pair averages on each date and the share of pairs in alert per "
                   "tail. A pair without a window ending that day (one asset had no price) "
                   f"counts with its latest window for up to {UNIVERSE_STALE_LIMIT} dates, so "
                   "the averages do not "
                   "jump with the mix of pairs; the bottom strip shows how many pairs were "
                   "counted and how many of them were carried. The dashed line marks the "
                   "board's date; a pair's own uncertainty bands are on its timeline."),
    ])
