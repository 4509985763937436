"""The figure builders every page uses (`monitor.views.common.figure`, `stacked_layout`,
`for_browser`): the same figures plotly's own checked constructors give, without their cost
when serving."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import plotly.io as pio
import pytest
from plotly.subplots import make_subplots

from monitor.views import common
from monitor.views.common import figure, for_browser, row_axes, stacked_layout

from .plotted import as_figure, decoded


def _layout(fig) -> dict:
    out = as_figure(fig).to_plotly_json()["layout"]
    out.pop("template")
    return out


@pytest.mark.parametrize(("heights", "spacing"), [([0.5, 0.3, 0.2], 0.07),
                                                  ([0.29, 0.29, 0.29, 0.13], 0.035),
                                                  ([1.0], 0.1)])
def test_stacked_layout_is_what_plotly_lays_out_for_rows_sharing_x(heights, spacing):
    # Reference: plotly's own make_subplots(rows=n, cols=1, shared_xaxes=True), the layout
    # the Board's universe summary and the Timeline were drawn with before.
    titles = tuple(f"row {k}" for k in range(1, len(heights) + 1))
    ref = make_subplots(rows=len(heights), cols=1, shared_xaxes=True, row_heights=heights,
                        vertical_spacing=spacing, subplot_titles=titles)
    ours = figure([], stacked_layout(heights, spacing, titles))
    want, got = _layout(ref), _layout(ours)
    assert set(got) == set(want)
    for key in want:
        if key == "annotations":
            for a, b in zip(want[key], got[key], strict=True):
                assert a.pop("y") == pytest.approx(b.pop("y"), abs=1e-12) and a == b
        else:
            assert want[key].pop("domain") == pytest.approx(got[key].pop("domain"), abs=1e-12)
            assert want[key] == got[key], key
    assert row_axes(1) == ("x", "y") and row_axes(3, layout=True) == ("xaxis3", "yaxis3")


def test_unchecked_figures_equal_checked_ones_and_the_suite_checks():
    z = np.arange(6.0).reshape(2, 3)
    traces = [{"type": "heatmap", "z": z, "x": ["A", "B", "C"], "y": ["A", "B"],
               "colorscale": [[0, "#ffffff"], [1, "#000000"]], "zmin": 0, "zmax": 5}]
    layout = {"height": 300, "yaxis": {"autorange": "reversed"}}
    checked = go.Figure({"data": traces, "layout": layout})
    assert common.VALIDATE_FIGURES  # tests/conftest.py turns the checks on
    common.VALIDATE_FIGURES = False
    try:
        unchecked = figure(traces, layout)
        # Unchecked, a misspelt property passes silently (what serving accepts) ...
        figure([{"type": "heatmap", "zmni": 0}], {})
    finally:
        common.VALIDATE_FIGURES = True
    assert go.Figure(unchecked).to_json() == checked.to_json()
    assert unchecked["data"][0]["zmax"] == 5 and unchecked["layout"] == layout
    # ... and fails in the test suite.
    with pytest.raises(ValueError, match="zmni"):
        figure([{"type": "heatmap", "zmni": 0}], {})


def _same(a, b) -> None:
    """Equal JSON values, arrays compared element by element (NaN equal to NaN or null)."""
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        x, y = (np.asarray(v, dtype=float) for v in (a, b))
        np.testing.assert_array_equal(x, y)
    elif isinstance(a, dict):
        assert set(a) == set(b)
        for k in a:
            _same(a[k], b[k])
    elif isinstance(a, list) and all(isinstance(v, int | float | None) for v in a):
        _same(np.array(a, dtype=float), np.array(b, dtype=float))
    elif isinstance(a, list):
        assert len(a) == len(b)
        for x, y in zip(a, b, strict=True):
            _same(x, y)
    else:
        assert a == b


def test_a_page_receives_the_figure_plotly_would_send():
    # Reference: plotly's own JSON of the same figure (plotly.io.to_json of a checked
    # Figure), what Dash sent before; both decoded the way plotly.js reads typed arrays.
    days = pd.date_range("2024-01-02", periods=4, freq="B")
    z = np.array([[np.nan, 0.25], [0.25, np.nan]])
    text = np.array([["", "A / B<br>0.250"], ["A / B<br>0.250", ""]], dtype=object)
    fig = figure([
        {"type": "heatmap", "z": z, "text": text, "x": ["A", "B"], "y": ["A", "B"],
         "customdata": np.arange(8.0).reshape(2, 2, 2), "hoverongaps": False},
        {"type": "scatter", "x": days.strftime("%Y-%m-%d").to_numpy(),
         "y": np.array([0.1, np.nan, 0.3, 0.4]), "xaxis": "x2", "yaxis": "y2",
         "marker": {"color": np.array([1, 2, 3, 4])}},
        {"type": "bar", "x": days.to_numpy(), "y": pd.Series([3, 0, 1, 2])}],
        {"height": 300, "xaxis2": {"anchor": "y2"}, "yaxis2": {"anchor": "x2"}})
    sent = json.loads(json.dumps(for_browser(fig), allow_nan=False))
    want = json.loads(pio.to_json(go.Figure(fig)))
    _same(decoded(want), decoded(sent))
    # Numbers travel as base64 (the NaN of a blank cell too), text as text.
    heat = sent["data"][0]
    assert heat["z"]["dtype"] == "f8" and heat["z"]["shape"] == "2, 2"
    assert heat["customdata"]["shape"] == "2, 2, 2" and heat["text"][0] == ["", "A / B<br>0.250"]
    assert sent["data"][2]["x"][0] == "2024-01-02T00:00:00.000000"
