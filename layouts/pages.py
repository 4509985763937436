"""The dashboard's pages: path, navigation label and layout module, in navigation order.

Each layout module exposes ``layout(view, query) -> component`` (``query``: the URL's query
parameters as a dict of strings) and ``TITLE``; its callbacks live in the module of the same
name under ``callbacks/``.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Page:
    path: str
    label: str
    module: str  # layouts.<module> and callbacks.<module>


PAGES = (
    Page("/", "Board", "board"),
    Page("/timeline", "Timeline", "timeline"),
    Page("/drilldown", "Drill-down", "drilldown"),
    Page("/episodes", "Episodes", "episodes"),
    Page("/inputs", "Inputs", "inputs"),
)
