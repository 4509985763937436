"""Building blocks shared by the pages: panels, figures that download as PNG, tables that
download as CSV."""

from __future__ import annotations

import pandas as pd
from dash import dash_table, dcc, html

from monitor.palette import FONT, GROUND, INK, MUTED, RULE, VERMILION

from .theme import NOTE_STYLE, PANEL_STYLE


def panel(title: str, *children, note: str | None = None, **style) -> html.Section:
    """A titled white panel; ``note`` is a short line under the title (what the numbers are)."""
    head = [html.H3(title, style={"margin": "0 0 4px 0", "fontSize": "1.05rem"})]
    if note:
        head.append(html.P(note, style=NOTE_STYLE))
    return html.Section([*head, *children], style={**PANEL_STYLE, **style})


def graph(component_id, figure=None, *, filename: str, height: int | None = None,
          **props) -> dcc.Graph:
    """A plotly figure whose camera button downloads a PNG named ``filename``."""
    style = {"height": f"{height}px"} if height else {}
    return dcc.Graph(id=component_id, figure=figure if figure is not None else {},
                     style=style, config={
                         "displaylogo": False,
                         "toImageButtonOptions": {"format": "png", "filename": filename,
                                                  "scale": 2},
                         "modeBarButtonsToRemove": ["lasso2d"]}, **props)


def table(component_id, frame: pd.DataFrame | None = None, *, page_size: int = 15,
          **props) -> dash_table.DataTable:
    """A sortable, filterable table with an Export button that downloads CSV."""
    frame = frame if frame is not None else pd.DataFrame()
    return dash_table.DataTable(
        id=component_id,
        data=frame.to_dict("records"),
        columns=[{"name": str(c), "id": str(c)} for c in frame.columns],
        page_size=page_size, sort_action="native", filter_action="native",
        export_format="csv", export_headers="display",
        style_table={"overflowX": "auto"},
        style_cell={"fontFamily": FONT, "fontSize": "0.85rem", "padding": "4px 8px",
                    "color": INK, "textAlign": "right", "maxWidth": "260px",
                    "overflow": "hidden", "textOverflow": "ellipsis"},
        style_header={"backgroundColor": GROUND, "fontWeight": 600,
                      "borderBottom": f"2px solid {RULE}"},
        style_data={"borderBottom": f"1px solid {RULE}"},
        **props)


def records(frame: pd.DataFrame) -> tuple[list[dict], list[dict]]:
    """(data, columns) of a DataTable for ``frame`` (a callback's outputs)."""
    return (frame.to_dict("records"),
            [{"name": str(c), "id": str(c)} for c in frame.columns])


def message(text: str, *, kind: str = "info") -> html.P:
    """A one-line message in a panel (``kind``: info or problem)."""
    colour = MUTED if kind == "info" else VERMILION
    return html.P(text, style={"color": colour, "margin": "6px 0"})

