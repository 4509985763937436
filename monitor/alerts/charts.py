"""The small chart attached to an alert e-mail: a pair's tail coefficients over the last
window ends up to the event, the change window shaded.

Static export needs plotly's kaleido and a local Chromium; when either is missing (or export
fails) no chart is made and the message carries its table only.
"""

from __future__ import annotations

import contextlib
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


@contextlib.contextmanager
def chart_maker(store, rolling_key: str) -> Iterator[Callable[[dict], bytes | None]]:
    """A function outbox row -> PNG bytes (or None), with one export server for all rows."""
    try:
        import kaleido

        kaleido.start_sync_server(silence_warnings=True)
    except Exception:  # noqa: BLE001 - no static export here: messages go without a chart
        yield lambda row: None
        return

    def make(row: dict) -> bytes | None:
        if not row.get("asset_a"):
            return None
        try:
            tl = store.read_timeline(rolling_key, row["asset_a"], row["asset_b"])
            if tl.empty:
                return None
            fig = tail_figure(tl, row["asset_a"], row["asset_b"], row["event_date"])
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)  # plotly's note on the server
                return fig.to_image(format="png")
        except Exception:  # noqa: BLE001 - a chart is an extra; the table is in the message
            return None

    try:
        yield make
    finally:
        with contextlib.suppress(Exception):
            kaleido.stop_sync_server(silence_warnings=True)
