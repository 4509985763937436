"""Figures as the tests read them: what a page receives (typed arrays, from
:func:`monitor.views.common.for_browser`) or a view's figure dictionary, as a checked
``plotly.graph_objects.Figure`` with numpy arrays."""

from __future__ import annotations

import base64
from typing import Any

import numpy as np
import plotly.graph_objects as go

#: plotly.js typed-array element types (the ``dtype`` of a ``{"dtype", "bdata"}`` array).
_DTYPES = {"f8": np.float64, "f4": np.float32, "i4": np.int32, "i2": np.int16,
           "i1": np.int8, "u4": np.uint32, "u2": np.uint16, "u1": np.uint8}


def decoded(value: Any) -> Any:
    """``value`` with every plotly.js typed array (base64) back as a numpy array."""
    if isinstance(value, dict):
        if set(value) >= {"dtype", "bdata"}:
            array = np.frombuffer(base64.b64decode(value["bdata"]), dtype=_DTYPES[value["dtype"]])
            if "shape" in value:
                array = array.reshape([int(n) for n in str(value["shape"]).split(",")])
            return array
        return {k: decoded(v) for k, v in value.items()}
    if isinstance(value, list):
        return [decoded(v) for v in value]
    return value


def as_figure(fig: Any) -> go.Figure:
    """A checked plotly figure of a figure dictionary, a page's figure or a figure."""
    return fig if isinstance(fig, go.Figure) else go.Figure(decoded(fig))
