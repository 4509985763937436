"""Callbacks of the Episodes page: the pair, tail and cause filters redraw the chart and the
history table."""

from __future__ import annotations

from dash import Input, Output

from layouts import ids
from layouts.episodes import HISTORY_COLUMNS, count_text, episode_records, short_provenance
from monitor.views.episodes import EpisodeFilter, episode_frame, episodes_figure, filter_episodes


def show_episodes(view, pair: str | None, tails: list[str] | None, causes: list[str] | None):
    """Outputs of the filter callback: history rows and columns, chart, count line."""
    frame = episode_frame(view)
    flt = EpisodeFilter(pair or None, tuple(tails or ()), tuple(causes or ()))
    shown = filter_episodes(frame, flt)
    data, columns = episode_records(shown, HISTORY_COLUMNS)
    return (data, columns, episodes_figure(shown, provenance=short_provenance(view)),
            count_text(shown, len(frame)))


def register(app, view) -> None:
    """Attach this page's callbacks to app."""

    @app.callback(Output(ids.EPISODES_HISTORY, "data"), Output(ids.EPISODES_HISTORY, "columns"),
                  Output(ids.EPISODES_CHART, "figure"), Output(ids.EPISODES_COUNT, "children"),
                  Input(ids.EPISODES_PAIR, "value"), Input(ids.EPISODES_TAILS, "value"),
                  Input(ids.EPISODES_CAUSES, "value"), prevent_initial_call=True)
    def filter_changed(pair, tails, causes):
        return show_episodes(view, pair, tails, causes)
