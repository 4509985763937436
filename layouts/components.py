"""Building blocks shared by the pages: panels, figures that download as PNG, tables that
download as CSV."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import pandas as pd
from dash import dash_table, dcc, html
from dash.dash_table import FormatTemplate

from monitor.common.palette import FONT, GROUND, INK, MUTED, RULE, VERMILION

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


#: Fewest rows for which a table shows its per-column filter row (below that the rows are
#: all in view, and the row only costs space).
FILTER_MIN_ROWS = 20


def filter_action(rows: int | None) -> str:
    """``"native"`` (a filter row under the headers) for ``rows >= FILTER_MIN_ROWS`` or an
    unknown count (None: filled later by a callback), else ``"none"``."""
    return "native" if rows is None or rows >= FILTER_MIN_ROWS else "none"


def percent_column(spec: dict, digits: int = 1) -> dict:
    """A DataTable column spec whose values (fractions, 0.25) show as percentages (25.0%)."""
    return {**spec, "type": "numeric", "format": FormatTemplate.percentage(digits)}


def shape_columns(columns: list[dict], *, percent=(), secondary=()
                  ) -> tuple[list[dict], list[str]]:
    """(columns, hidden_columns) of a DataTable: ids in ``percent`` formatted as percentages,
    ids in ``secondary`` hidden at first (every column then hideable)."""
    columns = [percent_column(c) if c["id"] in percent else c for c in columns]
    hidden = [c["id"] for c in columns if c["id"] in secondary]
    if hidden:
        columns = [{**c, "hideable": True} for c in columns]
    return columns, hidden


def table(component_id, frame: pd.DataFrame | None = None, *, page_size: int = 15,
          rows: int | None = None, percent: tuple[str, ...] = (),
          secondary: tuple[str, ...] = (), **props) -> dash_table.DataTable:
    """A sortable table with an Export button that downloads CSV.

    ``rows`` (default: the frame's length, or unknown without a frame) decides the filter
    row (:func:`filter_action`). Columns named in ``percent`` hold fractions shown as
    percentages; columns in ``secondary`` start hidden (the "Toggle Columns" button shows
    them; the CSV export always has every column). Headers wrap and cells wrap at word
    boundaries, so that the main columns fit a 1600-pixel-wide screen without a horizontal
    scroll bar (a scroll bar remains the fallback on narrow screens).
    """
    if rows is None and frame is not None:
        rows = len(frame)
    columns = [] if frame is None else [{"name": str(c), "id": str(c)} for c in frame.columns]
    columns, hidden = shape_columns(columns, percent=percent, secondary=secondary)
    return dash_table.DataTable(
        id=component_id,
        data=[] if frame is None else frame.to_dict("records"),
        columns=columns, hidden_columns=hidden,
        page_size=page_size, sort_action="native", filter_action=filter_action(rows),
        export_format="csv", export_headers="display", export_columns="all",
        style_table={"overflowX": "auto"},
        style_cell={"fontFamily": FONT, "fontSize": "0.85rem", "padding": "4px 6px",
                    "color": INK, "textAlign": "right", "maxWidth": "240px",
                    "whiteSpace": "normal", "height": "auto", "overflow": "hidden",
                    "textOverflow": "ellipsis"},
        style_header={"backgroundColor": GROUND, "fontWeight": 600, "whiteSpace": "normal",
                      "height": "auto", "lineHeight": "1.15", "verticalAlign": "bottom",
                      "borderBottom": f"2px solid {RULE}"},
        style_data={"borderBottom": f"1px solid {RULE}"},
        css=[{"selector": ".show-hide", "rule": "font-size: 0.8rem; margin-left: 6px"},
             *props.pop("css", [])],
        **props)


def records(frame: pd.DataFrame) -> tuple[list[dict], list[dict]]:
    """(data, columns) of a DataTable for ``frame`` (a callback's outputs)."""
    return (frame.to_dict("records"),
            [{"name": str(c), "id": str(c)} for c in frame.columns])


def message(text: str, *, kind: str = "info") -> html.P:
    """A one-line message in a panel (``kind``: info or problem)."""
    colour = MUTED if kind == "info" else VERMILION
    return html.P(text, style={"color": colour, "margin": "6px 0"})


def table_frame(frame: pd.DataFrame, digits: int = 4) -> pd.DataFrame:
    """A frame ready for a table: dates as ``YYYY-MM-DD`` (with the time where one is set),
    floats to ``digits`` significant digits, booleans as yes/no, missing values empty."""
    out = {}
    for c in frame.columns:
        s = frame[c]
        if pd.api.types.is_datetime64_any_dtype(s):
            known = s.dropna()
            timed = bool(len(known)) and bool((known != known.dt.normalize()).any())
            text = s.dt.strftime("%Y-%m-%d %H:%M" if timed else "%Y-%m-%d")
            out[c] = text.astype(object).where(s.notna(), None)
        elif pd.api.types.is_bool_dtype(s):
            out[c] = s.map({True: "yes", False: "no"}).astype(object)
        elif pd.api.types.is_float_dtype(s):
            v = s.to_numpy(dtype=float)
            with np.errstate(divide="ignore", invalid="ignore"):
                mag = np.floor(np.log10(np.abs(v)))
                scale = 10.0 ** np.where(np.isfinite(mag), digits - 1 - mag, 0)
                rounded = np.where(np.isfinite(v) & (v != 0), np.round(v * scale) / scale, v)
            out[c] = pd.Series(rounded, index=s.index).astype(object).where(np.isfinite(v), None)
        else:
            out[c] = s.astype(object).where(s.notna(), None)
    return pd.DataFrame(out, index=frame.index, columns=frame.columns)


def typed_columns(frame: pd.DataFrame, labels: Mapping[str, str] | None = None) -> list[dict]:
    """DataTable column specs of ``frame`` (before :func:`table_frame`): numbers typed
    numeric and dates datetime, so that the native filter reads ``>20`` or ``>2020-03-01``
    as a comparison; ``labels`` renames the shown headers."""
    labels = labels or {}
    out = []
    for c in frame.columns:
        s = frame[c]
        kind = ("datetime" if pd.api.types.is_datetime64_any_dtype(s) else
                "numeric" if pd.api.types.is_numeric_dtype(s) and not
                pd.api.types.is_bool_dtype(s) else "text")
        name = labels.get(str(c), str(c))
        out.append({"name": name, "id": name, "type": kind})
    return out


def typed_table(component_id: str, frame: pd.DataFrame, *,
                labels: Mapping[str, str] | None = None, percent: tuple[str, ...] = (),
                secondary: tuple[str, ...] = (), **props):
    """:func:`table` of ``frame`` with typed columns and shown labels;
    ``percent`` and ``secondary`` name columns of ``frame`` (before relabelling) shown as
    percentages and hidden at first."""
    labels = labels or {}
    component = table(component_id, table_frame(frame).rename(columns=labels), **props)
    component.columns, component.hidden_columns = shape_columns(
        typed_columns(frame, labels), percent=tuple(labels.get(c, c) for c in percent),
        secondary=tuple(labels.get(c, c) for c in secondary))
    return component
