"""The small chart attached to an alert e-mail: a pair's tail coefficients over the last
window ends up to the event, the change window shaded.

Static export needs plotly's kaleido and a local Chromium; when either is missing (or export
fails) no chart is made and the message carries its table only.
"""

from __future__ import annotations

import contextlib
import threading
import warnings
from collections.abc import Callable, Iterator

import pandas as pd
import plotly.graph_objects as go

from monitor.alerts.rules import CHANGE_DAYS
from monitor.common.palette import BLUE, GREY, VERMILION, figure_layout

#: Window ends shown.
SHOWN = 250


def tail_figure(timeline: pd.DataFrame, a: str, b: str, until) -> go.Figure:
    """Nonparametric and model-implied lower and upper tail coefficients of the last
    :data:`SHOWN` window ends up to ``until``, the last :data:`CHANGE_DAYS` shaded."""
    t = timeline[pd.to_datetime(timeline["date"]) <= pd.Timestamp(until)].tail(SHOWN)
    x = pd.to_datetime(t["date"])
    fig = go.Figure()
    for tail, colour in (("lower", VERMILION), ("upper", BLUE)):
        fig.add_scatter(x=x, y=t[f"tail_{tail}_emp"], name=f"{tail}, nonparametric",
                        line={"color": colour, "width": 1.5})
        fig.add_scatter(x=x, y=t[f"tail_{tail}"], name=f"{tail}, model",
                        line={"color": colour, "width": 1.5, "dash": "dot"})
    fig.add_scatter(x=x, y=t["gauss_tail_q"], name="Gaussian at same tau",
                    line={"color": GREY, "width": 1})
    if len(x) > 1:
        fig.add_vrect(x0=x.iloc[max(len(x) - 1 - CHANGE_DAYS, 0)], x1=x.iloc[-1],
                      fillcolor=GREY, opacity=0.12, line_width=0)
    fig.update_layout(**figure_layout(title=f"{a}/{b}: tail coefficients",
                                      width=640, height=300,
                                      legend={"orientation": "h", "y": -0.2}))
    fig.update_yaxes(range=[0, 1])
    return fig


#: Longest wait for the export server to start or for one chart; past it the run's remaining
#: messages go without a chart (a hung browser must not hold up the alerts).
CHART_TIMEOUT = 60.0


def _within(seconds: float, fn, *args, **kwargs):
    """``fn(*args, **kwargs)`` in a daemon thread; its result, or None after ``seconds`` or
    on an error."""
    box: list = []

    def run():
        with contextlib.suppress(Exception):
            box.append(fn(*args, **kwargs))

    worker = threading.Thread(target=run, daemon=True)
    worker.start()
    worker.join(seconds)
    return box[0] if box else None


@contextlib.contextmanager
def chart_maker(store, rolling_key: str) -> Iterator[Callable[[dict], bytes | None]]:
    """A function outbox row -> PNG bytes (or None), with one export server for all rows,
    started at the first row that has a chart to draw; a server that does not start, or a
    chart not drawn, within :data:`CHART_TIMEOUT` seconds turns charts off for the run."""
    state = {"server": None}  # None: not started yet; True: running; False: unavailable

    def start() -> bool:
        if state["server"] is None:
            try:
                import kaleido
            except Exception:  # noqa: BLE001 - no static export here: no charts
                state["server"] = False
                return False
            started = _within(CHART_TIMEOUT, lambda: kaleido.start_sync_server(
                silence_warnings=True) or True)
            state["server"] = bool(started)
        return bool(state["server"])

    def make(row: dict) -> bytes | None:
        if not row.get("asset_a") or state["server"] is False:
            return None
        try:
            tl = store.read_timeline(rolling_key, row["asset_a"], row["asset_b"])
        except Exception:  # noqa: BLE001 - a chart is an extra; the table is in the message
            return None
        if tl.empty or not start():
            return None
        fig = tail_figure(tl, row["asset_a"], row["asset_b"], row["event_date"])

        def draw() -> bytes:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)  # plotly's note on the server
                return fig.to_image(format="png")

        png = _within(CHART_TIMEOUT, draw)
        if png is None:
            state["server"] = False
        return png

    try:
        yield make
    finally:
        if state["server"]:
            import kaleido

            _within(CHART_TIMEOUT, kaleido.stop_sync_server, silence_warnings=True)
