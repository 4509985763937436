"""The dashboard's page styles; colours and figure defaults come from
:mod:`monitor.common.palette` (shared with the HTML report and alert e-mails)."""

from __future__ import annotations

from monitor.common.palette import FONT, GROUND, INK, MUTED, PANEL, RULE

PAGE_STYLE = {"backgroundColor": GROUND, "color": INK, "fontFamily": FONT,
              "minHeight": "100vh", "margin": 0}
PANEL_STYLE = {"backgroundColor": PANEL, "border": f"1px solid {RULE}", "borderRadius": "6px",
               "padding": "12px 16px", "marginBottom": "14px"}
NOTE_STYLE = {"color": MUTED, "fontSize": "0.85rem", "margin": "4px 0"}
