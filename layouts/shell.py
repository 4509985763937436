"""The frame around every page: navigation, the page area, the provenance line and cautions."""

from __future__ import annotations

from dash import dcc, html

from monitor.common.palette import BLUE, INK, MUTED, PANEL, RULE
from monitor.common.wording import CAUTION

from . import ids
from .pages import PAGES
from .theme import PAGE_STYLE


def nav(active: str) -> html.Nav:
    """The navigation bar; ``active`` is the current path."""
    links = []
    for page in PAGES:
        current = page.path == active
        links.append(dcc.Link(page.label, href=page.path, className="nav-link", style={
            "padding": "10px 14px", "textDecoration": "none", "fontWeight": 600,
            "color": BLUE if current else INK,
            "borderBottom": f"3px solid {BLUE if current else 'transparent'}"}))
    return html.Nav([
        html.Span("comove", style={"fontWeight": 700, "fontSize": "1.2rem", "marginRight": "18px",
                                   "letterSpacing": "0.04em"}),
        html.Span("dependence monitor", style={"color": MUTED, "marginRight": "24px"}),
        *links,
    ], style={"display": "flex", "alignItems": "center", "padding": "0 20px",
              "backgroundColor": PANEL, "borderBottom": f"1px solid {RULE}"})


def footer(provenance: str) -> html.Footer:
    """Provenance of the numbers and the cautions, on every page."""
    return html.Footer([
        html.P(provenance, id=ids.PROVENANCE, style={"margin": "2px 0"}),
        html.P(CAUTION, style={"margin": "2px 0", "fontWeight": 600}),
    ], style={"color": MUTED, "fontSize": "0.8rem", "padding": "10px 20px",
              "borderTop": f"1px solid {RULE}", "backgroundColor": PANEL})


def shell(provenance: str) -> html.Div:
    """The app layout: location, navigation (filled per page), page area, footer."""
    return html.Div([
        dcc.Location(id=ids.URL, refresh="callback-nav"),
        html.Div(nav("/"), id=ids.NAV),
        html.Div(id=ids.PAGE, style={"padding": "14px 20px", "minHeight": "70vh"}),
        footer(provenance),
    ], style=PAGE_STYLE)


def not_found(path: str) -> html.Div:
    return html.Div([
        html.H2("No such page"),
        html.P(f"{path!r} is not a page of this dashboard; choose one above."),
    ])
