"""Callbacks of the Timeline page: the pair in, its history figure, note and episodes out; a
drag on the figure fills the date range; the range and the pair make the Drill-down link."""

from __future__ import annotations

import re
from functools import partial
from urllib.parse import urlencode

import pandas as pd
from dash import Input, Output, no_update

from layouts import ids
from layouts.components import filter_action, message, records
from monitor.common.errors import InputError
from monitor.common.wording import finite_level_note
from monitor.views.common import blank_figure, for_browser, parse_pair
from monitor.views.timeline import (
    episodes_table,
    pair_history,
    study_link,
    timeline_figure,
)

#: Outputs of :func:`show_pair`, in order.
OUTPUTS = ((ids.TIMELINE_FIGURE, "figure"), (ids.TIMELINE_NOTE, "children"),
           (ids.TIMELINE_EPISODES, "data"), (ids.TIMELINE_EPISODES, "columns"),
           (ids.TIMELINE_MESSAGE, "children"), (ids.TIMELINE_RANGE, "min_date_allowed"),
           (ids.TIMELINE_RANGE, "max_date_allowed"), (ids.TIMELINE_EPISODES, "filter_action"))

_RANGE_KEY = re.compile(r"^xaxis\d*\.range\[([01])\]$")


def show_pair(view, pair_text: str | None) -> tuple:
    """The values of :data:`OUTPUTS` for the chosen pair (``A/B``); an unknown pair gives a
    blank figure and a one-line message."""
    blank = blank_figure()
    if not pair_text:
        return blank, "", [], [], message("Choose a pair above."), None, None, "none"
    try:
        a, b = parse_pair(pair_text, view.store.monitored_pairs(view.rolling_key))
        history = pair_history(view, a, b)
    except InputError as exc:
        return blank, "", [], [], message(str(exc), kind="problem"), None, None, "none"
    f = history.frame
    last = f.iloc[-1]
    state = "/".join(str(last[f"state_{t}"]) if pd.notna(last[f"state_{t}"]) else "no state"
                     for t in ("lower", "upper"))
    note = (f"{a} / {b}: {len(f)} window ends, {f['date'].iloc[0]:%Y-%m-%d} to "
            f"{f['date'].iloc[-1]:%Y-%m-%d}; {history.provenance}. Latest window: tau "
            f"{last['kendall_tau']:.3f}, selected {last['family']} {int(last['rotation'])}°, "
            f"state (lower/upper tail) {state}; {len(history.episodes)} alert episode(s). "
            f"{int((~f['converged'].astype(bool)).sum())} window(s) whose selected fit did not "
            f"converge are shown as estimated. {finite_level_note(history.tail_q)}"
            + "".join(f" {n}" for n in (history.degenerate_note(), history.fallback_note())
                      if n))
    data, columns = records(episodes_table(history))
    first, end = (d.strftime("%Y-%m-%d") for d in (f["date"].iloc[0], f["date"].iloc[-1]))
    return (for_browser(timeline_figure(history)), note, data, columns, "", first, end,
            filter_action(len(data)))


def _day(value) -> str | None:
    try:
        return pd.Timestamp(value).strftime("%Y-%m-%d")
    except (TypeError, ValueError):
        return None


def selected_range(relayout: dict | None, selected: dict | None) -> tuple[str, str] | None:
    """The date range of a drag on the timeline: a box selection (``selectedData``) or an
    x-axis zoom (``relayoutData``, any of the shared axes); None when there is none."""
    if selected and isinstance(selected.get("range"), dict):
        for key, ends in selected["range"].items():
            if key.startswith("x") and isinstance(ends, list) and len(ends) == 2:
                days = [_day(v) for v in ends]
                if None not in days:
                    return min(days), max(days)
    if relayout:
        ends = {}
        for key, value in relayout.items():
            m = _RANGE_KEY.match(key)
            if m:
                ends[int(m.group(1))] = value
            elif re.match(r"^xaxis\d*\.range$", key) and isinstance(value, list):
                ends = dict(enumerate(value[:2]))
            if len(ends) == 2:
                break
        if len(ends) == 2:
            days = [_day(ends[0]), _day(ends[1])]
            if None not in days:
                return min(days), max(days)
    return None


def pick_range(relayout: dict | None, selected: dict | None) -> tuple:
    """(start_date, end_date) of the range control after a drag (unchanged when the event
    carries no range, e.g. a double-click back to the full view)."""
    got = selected_range(relayout, selected)
    return (no_update, no_update) if got is None else got


def open_link(pair_text: str | None, start: str | None, end: str | None) -> tuple[str, str]:
    """(href, text) of the Drill-down link for the pair and range."""
    pair_text = (pair_text or "").strip()
    if "/" not in pair_text:
        return "/drilldown", "Open in Drill-down"
    a, _, b = pair_text.partition("/")
    start, end = _day(start) if start else None, _day(end) if end else None
    if not start or not end:
        return ("/drilldown?" + urlencode({"pair": f"{a}/{b}"}, safe="/"),
                f"Open {a}/{b} in Drill-down (no range chosen yet: drag on the timeline)")
    if start > end:
        start, end = end, start
    return study_link((a, b), start, end), f"Open {a}/{b}, {start} to {end}, in Drill-down"


def register(app, view) -> None:
    """Attach this page's callbacks to ``app``."""

    @app.callback(*[Output(i, p) for i, p in OUTPUTS], Input(ids.TIMELINE_PAIR, "value"))
    def pair(pair_text):
        return app.responses("timeline", partial(show_pair, view), pair_text)

    @app.callback(Output(ids.TIMELINE_RANGE, "start_date"),
                  Output(ids.TIMELINE_RANGE, "end_date"),
                  Input(ids.TIMELINE_FIGURE, "relayoutData"),
                  Input(ids.TIMELINE_FIGURE, "selectedData"), prevent_initial_call=True)
    def drag(relayout, selected):
        return pick_range(relayout, selected)

    @app.callback(Output(ids.TIMELINE_OPEN_STUDY, "href"),
                  Output(ids.TIMELINE_OPEN_STUDY, "children"),
                  Input(ids.TIMELINE_PAIR, "value"), Input(ids.TIMELINE_RANGE, "start_date"),
                  Input(ids.TIMELINE_RANGE, "end_date"))
    def link(pair_text, start, end):
        return open_link(pair_text, start, end)
