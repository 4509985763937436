"""The Timeline page: one pair's history — Kendall's tau and both tails with their bands,
the selected family and the tail states over time, alert episodes shaded — and the date
range to open in the Drill-down page (figures from :mod:`monitor.views.timeline`)."""

from __future__ import annotations

from dash import dcc, html

from monitor.common.errors import InputError
from monitor.views.common import parse_pair

from . import ids
from .components import graph, message, panel, table

TITLE = "Timeline"

BANDS_NOTE = (
    "Bands are pointwise 95% intervals: tau ± 1.96 influence-function s.e.; the nonparametric "
    "C(q,q)/q with the Wilson interval of its binomial proportion, cut at 1 (C(q,q) cannot "
    "exceed q). The model-based line is the model-averaged coefficient (each candidate "
    "family's weighted by its Akaike weight); the selected family's own, which jumps when the "
    "choice flips between tail-free and tail-dependent families, shows on a click in the "
    "legend. Model-based coefficients have no stored standard error (the Drill-down page "
    "gives bootstrap intervals for a chosen window). Shading: alert episodes, lower tail in vermilion on the "
    "tau and lower rows, upper tail in purple on the tau and upper rows.")


def pair_label(pair: tuple[str, str]) -> str:
    """How a pair is written in the page and its address: ``A/B``."""
    return f"{pair[0]}/{pair[1]}"


def layout(view, query: dict[str, str]) -> html.Div:
    """The page; ``query`` may hold ``pair=A/B`` (either order) to preselect a pair."""
    pairs = view.store.monitored_pairs(view.rolling_key)
    problems, chosen = [], None
    if query.get("pair"):
        try:
            chosen = pair_label(parse_pair(query["pair"], pairs))
        except InputError as exc:
            problems.append(message(str(exc), kind="problem"))
    elif pairs:
        chosen = pair_label(pairs[0])
    if not pairs:
        problems.append(message("No pair has stored rolling metrics under the current "
                                "settings yet (run 'comove update').", kind="problem"))
    picker = dcc.Dropdown(id=ids.TIMELINE_PAIR, value=chosen, clearable=False,
                          options=[{"label": pair_label(p), "value": pair_label(p)}
                                   for p in pairs],
                          placeholder="choose a pair", style={"width": "320px"})
    study = html.Div([
        dcc.DatePickerRange(id=ids.TIMELINE_RANGE, display_format="YYYY-MM-DD",
                            first_day_of_week=1, start_date_placeholder_text="start",
                            end_date_placeholder_text="end"),
        dcc.Link("Open in Drill-down", id=ids.TIMELINE_OPEN_STUDY, href="/drilldown",
                 style={"marginLeft": "18px", "fontWeight": 600}),
    ], style={"display": "flex", "alignItems": "center", "flexWrap": "wrap"})
    return html.Div([
        panel("Pair", html.Div([html.Label("Pair ", style={"marginRight": "8px"}), picker],
                               style={"display": "flex", "alignItems": "center"}),
              *problems, html.Div(id=ids.TIMELINE_MESSAGE)),
        panel("Dependence over time",
              html.P(id=ids.TIMELINE_NOTE, style={"margin": "0 0 6px 0",
                                                 "fontSize": "0.85rem"}),
              graph(ids.TIMELINE_FIGURE, filename="pair-timeline"), note=BANDS_NOTE),
        panel("Study a date range", study,
              note="Drag across the timeline (the y axes are fixed, so a drag picks dates) or "
                   "type the dates; the link opens the window study of the pair over that "
                   "range."),
        panel("Alert episodes of this pair", table(ids.TIMELINE_EPISODES, page_size=10),
              note="Every stored episode per tail: onset of the evidence, first and last "
                   "alert day (open episodes have no end), cause and the peak of the "
                   "evidence (ratio of the statistic to its entry level)."),
    ])
