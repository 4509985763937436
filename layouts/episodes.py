"""The Episodes page: pairs in alert now, the history of alert episodes (each linking to the
pair's Timeline), a chart of episodes over time, the rules in force and the e-mail outbox.

Query string: ``?pair=A/B`` (one pair), ``&tail=lower|upper|both``, ``&cause=...``.
"""

from __future__ import annotations

from types import MappingProxyType

import pandas as pd
from dash import dcc, html

from monitor.common.errors import InputError
from monitor.settings import settings_words
from monitor.stats.signals import CAUSES, TAILS, SignalSettings
from monitor.views.episodes import (
    OUTBOX_STATES,
    EpisodeFilter,
    episode_frame,
    episodes_figure,
    filter_episodes,
    monitored_pairs,
    parse_episode_query,
    read_outbox,
    rules_table,
    timeline_link,
)

from . import ids
from .components import (
    graph,
    message,
    panel,
    shape_columns,
    table,
    table_frame,
    typed_columns,
    typed_table,
)
from .theme import NOTE_STYLE

TITLE = "Episodes"

#: Shown column names of the episode tables.
EPISODE_LABELS = MappingProxyType({
    "pair": "pair", "tail": "tail", "status": "status", "cause": "cause",
    "statistic": "statistic", "onset": "onset", "start": "start", "end": "end",
    "last_day": "last day", "duration_days": "days in alert", "peak_date": "peak date",
    "peak_value": "peak evidence (x entry)", "peak_kendall_tau": "tau at peak",
    "peak_kendall_tau_se": "tau s.e.", "peak_tail_emp": "empirical tail at peak",
    "peak_tail_emp_se": "empirical tail s.e.", "peak_tail_model": "model tail at peak",
    "peak_gauss_tail": "Gaussian tail at peak",
    "latest_value": "current evidence (x entry)", "latest_date": "evidence as of",
})
OPEN_COLUMNS = ("pair", "tail", "cause", "statistic", "onset", "start", "duration_days",
                 "last_day", "latest_value", "peak_date", "peak_value", "peak_kendall_tau",
                 "peak_kendall_tau_se", "peak_tail_emp", "peak_tail_emp_se", "peak_tail_model",
                 "peak_gauss_tail")
HISTORY_COLUMNS = ("pair", "tail", "status", "cause", "statistic", "onset", "start", "end",
                    "duration_days", "peak_date", "peak_value", "peak_kendall_tau",
                    "peak_kendall_tau_se", "peak_tail_emp", "peak_tail_emp_se",
                    "peak_tail_model", "peak_gauss_tail")
LINK = "Timeline"
#: Episode columns hidden at first ("Toggle Columns" shows them; the CSV has them all): the
#: standard errors, which the chart's hover also gives as a 95% margin, and the last day
#: (the as-of date while an episode is open).
SECONDARY_COLUMNS = ("last_day", "peak_kendall_tau_se", "peak_tail_emp_se")


def episode_records(frame: pd.DataFrame, columns) -> tuple[list[dict], list[dict]]:
    """(data, columns) of an episode table: shown labels and, beside the pair (the first of
    ``columns``), a link to the pair's Timeline page."""
    part = frame[list(columns)]
    shown = table_frame(part).rename(columns=EPISODE_LABELS)
    # the link sits beside the pair, where the eye starts, not beyond a horizontal scroll
    shown.insert(1, LINK, [f"[open]({timeline_link(p)})" for p in frame["pair"]])
    typed = typed_columns(part, EPISODE_LABELS)
    cols = [typed[0], {"name": LINK, "id": LINK, "presentation": "markdown"}, *typed[1:]]
    cols, _ = shape_columns(cols, secondary=_secondary(columns))
    return shown.to_dict("records"), cols


def _secondary(columns) -> tuple[str, ...]:
    return tuple(EPISODE_LABELS[c] for c in SECONDARY_COLUMNS if c in columns)


def episode_table(component_id: str, frame: pd.DataFrame, columns, *, page_size: int = 15):
    """An episode table (sortable, filterable, CSV export) whose second column links each
    row to the pair's Timeline page."""
    data, cols = episode_records(frame, columns)
    component = table(component_id, page_size=page_size, rows=len(data),
                      markdown_options={"link_target": "_self"},
                      css=[{"selector": ".dash-cell-value p", "rule": "margin: 0"}])
    component.data, component.columns = data, cols
    component.hidden_columns = list(_secondary(columns))
    return component


def _provenance(view) -> str:
    return (f"Signals of the rolling metrics ({view.settings.provenance()}); "
            f"{settings_words(view.signals_key).rsplit('; ', 1)[-1]}.")


def layout(view, query: dict[str, str]) -> html.Div:
    """The page for ``view``; ``query`` may name a pair, a tail and a cause."""
    frame = episode_frame(view)
    pairs = monitored_pairs(view)
    problem = None
    try:
        flt = parse_episode_query(query, pairs)
    except InputError as exc:
        problem, flt = str(exc), EpisodeFilter()
    open_now = frame[frame["status"] == "open"]
    shown = filter_episodes(frame, flt)
    newest = view.store.latest_window_end(view.rolling_key)
    as_of = pd.Timestamp(newest) if newest is not None else None  # the store's, not an episode's
    return html.Div([
        html.H2("Episodes", style={"margin": "4px 0"}),
        html.P(_provenance(view), style=NOTE_STYLE),
        message(problem, kind="problem") if problem else None,
        panel("Open now", _open_panel(open_now, pairs, as_of),
              note="Pairs whose lower or upper tail is in an alert episode at their latest "
                   "window end. Evidence is the largest ratio of a signal statistic to its "
                   "entry threshold; tails are C(q,q)/q at q = "
                   f"{view.rolling.tail_q:g} (empirical, the selected family's, and the "
                   "Gaussian copula's at the window's Kendall's tau); s.e. are the window's "
                   "standard errors (tau: influence function; empirical tail: binomial)."),
        panel("Episodes over time", _controls(frame, flt),
              html.P(count_text(shown, len(frame)), id=ids.EPISODES_COUNT, style=NOTE_STYLE),
              graph(ids.EPISODES_CHART, episodes_figure(shown, provenance=short_provenance(view)),
                    filename="comove-episodes"),
              note="A bar per episode from its first to its last day in alert; lower tail "
                   "solid vermilion with a downward triangle at the peak, upper tail hatched "
                   "blue with an upward triangle; an open circle marks an episode still "
                   "running. The filters apply to the chart and to the history below."),
        panel("History", episode_table(ids.EPISODES_HISTORY, shown, HISTORY_COLUMNS),
              note="Every stored episode, newest first; 'open' beside a pair shows its "
                   "Timeline. Type in the row under a header to filter (e.g. >20 in days in "
                   "alert); Export downloads the rows shown as CSV."),
        panel("Rules in force", typed_table(ids.EPISODES_RULES, rules_table(
                  SignalSettings(), view.cfg.alerts.email, window=view.rolling.window),
                  page_size=30, style_cell_conditional=[
                      {"if": {"column_id": c}, "textAlign": "left", "whiteSpace": "normal",
                       "maxWidth": "520px"} for c in ("meaning", "calibration", "setting")]),
              note="The thresholds that produced these episodes (monitor.stats.signals."
                   "SignalSettings) and the alert e-mail settings of the configuration "
                   f"({view.cfg.source}); credentials appear only as the names of the "
                   "environment variables that hold them. How the defaults were measured "
                   "(delay to a tail change, alerts on pairs that never change, precision on "
                   "the demo): docs/signals.md in the installation."),
        panel("Outbox", _outbox(view),
              note="Alert e-mails queued by the daily update, one per event of a rule in force: "
                   "pending until delivered by 'comove alerts send' (a failed delivery stays "
                   "pending with its attempts and last error, and is retried with back-off), "
                   "then sent."),
    ])


def short_provenance(view) -> str:
    return settings_words(view.signals_key, short=True)


def _open_panel(open_now: pd.DataFrame, pairs: list[str], as_of) -> html.Div:
    if open_now.empty:
        when = f" as of {as_of:%Y-%m-%d}" if as_of is not None and not pd.isna(as_of) else ""
        return message(f"No pair is in an alert episode{when} ({len(pairs)} pairs monitored).")
    n_pairs = open_now["pair"].nunique()
    by_tail = ", ".join(f"{int((open_now['tail'] == t).sum())} {t}" for t in TAILS)
    when = f" as of {as_of:%Y-%m-%d}" if as_of is not None else ""
    return html.Div([
        html.P(f"{n_pairs} of {len(pairs)} pairs in alert{when} (open episodes: {by_tail} "
               "tail).",
               style={"margin": "2px 0 6px 0", "fontWeight": 600}),
        episode_table(ids.EPISODES_ACTIVE, open_now, OPEN_COLUMNS, page_size=10),
    ])


def _controls(frame: pd.DataFrame, flt: EpisodeFilter) -> html.Div:
    with_episodes = sorted(frame["pair"].unique()) if len(frame) else []
    options = [{"label": p, "value": p} for p in with_episodes]
    if flt.pair and flt.pair not in with_episodes:
        options.append({"label": f"{flt.pair} (no episodes)", "value": flt.pair})
    label = {"marginRight": "6px", "fontWeight": 600}
    return html.Div([
        html.Label("Pair", htmlFor=ids.EPISODES_PAIR, style=label),
        dcc.Dropdown(id=ids.EPISODES_PAIR, options=options, value=flt.pair,
                     placeholder="all pairs", clearable=True,
                     style={"width": "240px", "marginRight": "18px"}),
        html.Span("Tail", style=label),
        dcc.Checklist(id=ids.EPISODES_TAILS, options=[{"label": f" {t}", "value": t}
                                                      for t in TAILS],
                      value=list(flt.tails), inline=True,
                      inputStyle={"marginLeft": "8px"}, style={"marginRight": "18px"}),
        html.Span("Cause", style=label),
        dcc.Checklist(id=ids.EPISODES_CAUSES, options=[{"label": f" {c}", "value": c}
                                                       for c in CAUSES],
                      value=list(flt.causes), inline=True, inputStyle={"marginLeft": "8px"}),
    ], style={"display": "flex", "alignItems": "center", "flexWrap": "wrap",
              "margin": "4px 0 8px 0"})


def count_text(shown: pd.DataFrame, total: int) -> str:
    if total == 0:
        return "No episodes stored under these settings yet."
    open_ = int((shown["status"] == "open").sum())
    return (f"{len(shown)} of {total} episodes shown ({open_} open), over "
            f"{shown['pair'].nunique()} pair(s).")


def _outbox(view) -> html.Div:
    box = read_outbox(view.store)
    if box.empty:
        return message("Nothing queued.")
    counts = box["state"].value_counts()
    failing = int((box["state"].eq("pending") & box["attempts"].gt(0)).sum())
    # pending and sent always; a message being sent or refused for good only when there is one
    summary = ", ".join(f"{int(counts.get(s, 0))} {s}" for s in OUTBOX_STATES
                        if s in ("pending", "sent") or counts.get(s, 0))
    summary += f" ({failing} pending after a failed attempt)" if failing else ""
    return html.Div([html.P(f"{len(box)} e-mail(s): {summary}.", style=NOTE_STYLE),
                     typed_table(ids.EPISODES_OUTBOX, box, page_size=10)])


__all__ = ["HISTORY_COLUMNS", "OPEN_COLUMNS", "TITLE", "count_text", "episode_records",
           "episode_table", "layout", "short_provenance"]
