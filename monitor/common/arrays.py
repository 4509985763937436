"""Small array helpers shared across the core."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray


def read_only(a: ArrayLike) -> NDArray:
    """A read-only copy of ``a`` (results are immutable: DEVELOPERS.md, 'Conventions')."""
    arr = np.array(a)
    arr.flags.writeable = False
    return arr
