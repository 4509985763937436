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

#: A colour per copula family, for the family band of the timeline. None of them is a state
#: colour (a strip cell must never read as "alert" because Clayton was selected): the blues,
#: yellow and reddish purple of Okabe-Ito, plus greys, a brown, a violet and a sand for the
#: rest (checked distinct from every state colour in tests/dashboard/test_timeline.py).
FAMILY_COLOURS = {
    "independence": "#D9D9D9", "gaussian": BLUE, "student_t": SKY, "clayton": PURPLE,
    "gumbel": YELLOW, "frank": "#8C6D46", "joe": "#6A3D9A", "bb1": "#4D4D4D",
    "bb7": "#E4C59E",
}

#: Shading of the rotation row beneath the family band: light to dark by angle.
ROTATION_SHADES = {0: "#F2F2F2", 90: "#BDBDBD", 180: "#737373", 270: "#262626"}

#: Line colours of the timeline's series: Kendall's tau is drawn in black so that it never
#: shares a colour with the tail series (nonparametric in blue, model-implied in orange).
SERIES_COLOURS = {"tau": BLACK, "tail_empirical": BLUE, "tail_model": ORANGE,
                  "gaussian_same_tau": GREY}

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
