"""Reading Dash layout trees and registered callbacks in the dashboard tests."""

from __future__ import annotations


def find_all(component, wanted) -> list:
    """Every component in a layout tree whose id satisfies the predicate ``wanted``."""
    out, stack = [], [component]
    while stack:
        c = stack.pop()
        if isinstance(c, list | tuple):
            stack.extend(reversed(c))
            continue
        if not hasattr(c, "to_plotly_json"):
            continue
        if wanted(getattr(c, "id", None)):
            out.append(c)
        children = getattr(c, "children", None)
        if children is not None:
            stack.append(children)
    return out


def find(component, component_id):
    """The first component with id ``component_id`` in a layout tree, or None."""
    hits = find_all(component, lambda i: i == component_id)
    return hits[0] if hits else None


def texts(component) -> list[str]:
    """Every string in a layout tree, in document order."""
    if isinstance(component, str):
        return [component]
    if isinstance(component, list | tuple):
        return [t for c in component for t in texts(c)]
    children = getattr(component, "children", None)
    return [] if children is None else texts(children)


def text(component) -> str:
    """The strings of a layout tree joined by spaces."""
    return " ".join(texts(component))


def registered(app, output_id: str):
    """The plain function of the app's callback that writes ``output_id``."""
    for key, entry in app.callback_map.items():
        if f"{output_id}." in key:
            return entry["callback"].__wrapped__
    raise KeyError(output_id)
