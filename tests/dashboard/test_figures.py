"""The figure builders every page uses (`monitor.views.common.figure`, `stacked_layout`):
the same figures plotly's own checked constructors give, without their cost when serving."""

from __future__ import annotations

import numpy as np
import plotly.graph_objects as go
import pytest
from plotly.subplots import make_subplots

from monitor.views import common
from monitor.views.common import figure, row_axes, stacked_layout


def _layout(fig: go.Figure) -> dict:
    out = fig.to_plotly_json()["layout"]
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
    assert unchecked.to_json() == checked.to_json()
    assert unchecked.data[0].zmax == 5 and unchecked.layout.yaxis.autorange == "reversed"
    # ... and fails in the test suite.
    with pytest.raises(ValueError, match="zmni"):
        figure([{"type": "heatmap", "zmni": 0}], {})
