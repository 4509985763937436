"""Small array helpers shared across the core."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray


def read_only(a: ArrayLike) -> NDArray:
    """A read-only copy of ``a`` (results are immutable: DEVELOPERS.md, 'Conventions')."""
    arr = np.array(a)
    arr.flags.writeable = False
    return arr


def overlap_days(starts: ArrayLike, ends: ArrayLike, firsts: ArrayLike, lasts: ArrayLike
                 ) -> NDArray[np.bool_]:
    """Which closed date ranges ``[starts[i], ends[i]]`` meet any of ``[firsts[j], lasts[j]]``.

    Parameters
    ----------
    starts, ends : array_like of datetime64
        The ranges asked about (e.g. rolling windows), same length.
    firsts, lasts : array_like of datetime64
        The ranges looked for (e.g. the days a fallback fit filtered), same length.

    Returns
    -------
    ndarray of bool
        One flag per range asked about (read-only).

    Examples
    --------
    >>> d = np.array(["2020-01-01", "2020-02-01", "2020-03-01"], dtype="datetime64[D]")
    >>> overlap_days(d[:2], d[1:], d[2:], d[2:]).tolist()
    [False, True]
    """
    s = np.asarray(starts, dtype="datetime64[ns]")[:, None]
    e = np.asarray(ends, dtype="datetime64[ns]")[:, None]
    f = np.asarray(firsts, dtype="datetime64[ns]")[None, :]
    g = np.asarray(lasts, dtype="datetime64[ns]")[None, :]
    return read_only(((s <= g) & (e >= f)).any(axis=1))
