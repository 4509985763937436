"""Colours and figure defaults shared by the dashboard, the HTML report and alert e-mails.

Colours are the eight-colour set of Okabe and Ito (2008, *Color Universal Design*), which stays
distinguishable under the common colour-vision deficiencies, on a calm warm-grey ground with
white panels.
"""

from __future__ import annotations

#: Okabe-Ito colours by role.
BLUE = "#0072B2"
ORANGE = "#E69F00"
SKY = "#56B4E9"
GREEN = "#009E73"
YELLOW = "#F0E442"
VERMILION = "#D55E00"
PURPLE = "#CC79A7"
BLACK = "#000000"
GREY = "#8C8C8C"

INK = "#22303A"
MUTED = "#5D6B75"
GROUND = "#F4F2EE"
PANEL = "#FFFFFF"
RULE = "#D9D4CC"

#: The state colours (signals.STATES): calm, watch, alert.
STATE_COLOURS = {"calm": GREEN, "watch": ORANGE, "alert": VERMILION}

#: A colour per copula family, for the family band of the timeline.
FAMILY_COLOURS = {
    "independence": GREY, "gaussian": BLUE, "student_t": SKY, "clayton": VERMILION,
    "gumbel": ORANGE, "frank": GREEN, "joe": YELLOW, "bb1": PURPLE, "bb7": BLACK,
}

#: Diverging scale for signed quantities (tau): blue negative, white zero, vermilion positive.
DIVERGING = [[0.0, BLUE], [0.5, "#F7F7F7"], [1.0, VERMILION]]
#: Sequential scale for quantities in [0, 1] (tail coefficients).
SEQUENTIAL = [[0.0, "#F7F7F7"], [0.5, SKY], [1.0, BLUE]]

FONT = "'Source Sans 3', 'Segoe UI', 'Helvetica Neue', Arial, sans-serif"

def figure_layout(**extra) -> dict:
    """Plotly layout defaults shared by every figure (fonts, margins, white panel)."""
    base = {"font": {"family": FONT, "color": INK, "size": 12},
            "paper_bgcolor": PANEL, "plot_bgcolor": PANEL,
            "margin": {"l": 56, "r": 16, "t": 36, "b": 40},
            "hoverlabel": {"font": {"family": FONT}}}
    base.update(extra)
    return base
