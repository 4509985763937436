"""Rank statistics of every window of a rolling sequence at once, by banded prefix sums.

Within a window, ranks, concordance and dominance counts depend only on the order of the
values, so they can be counted once per point against its neighbours: for a point i and
offsets k = -(w-1) .. w-1, an indicator such as [x_{i+k} < x_i] is laid out in a band of
width 2w - 1 and summed cumulatively along k; the count for point i in the window starting at
s is then a difference of two prefix sums, k running from s - i to s + w - 1 - i. Every
window costs O(w) gathers instead of a sort, with no Python loop over windows or points; the
band covers only the points the requested windows use.

All functions take the whole series and the start positions ``first`` of the windows wanted
(increasing), and return arrays of shape ``(len(first), w)`` or ``(len(first),)``. Values must
be finite. Ties are handled as in :mod:`monitor.stats.empirical` (average ranks; tau-b).
"""

from __future__ import annotations

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import NDArray


def _span(first: NDArray, w: int, n: int) -> tuple[int, int]:
    lo, hi = int(first[0]), int(first[-1]) + w
    if lo < 0 or hi > n:
        raise ValueError(f"windows of {w} starting at {lo}..{int(first[-1])} do not fit a "
                         f"series of {n}")
    return lo, hi


def _band(x: NDArray, lo: int, hi: int, w: int) -> NDArray:
    """Rows i = lo..hi-1 of the band B[i, t] = x[i + t - (w - 1)] (NaN outside lo..hi-1)."""
    pad = np.full(w - 1, np.nan)
    seg = np.concatenate([pad, x[lo:hi], pad])
    return sliding_window_view(seg, 2 * w - 1)


def _prefix(indicator: NDArray) -> NDArray:
    """Cumulative sums along the band with a leading zero column (shape (m, 2w))."""
    out = np.zeros((indicator.shape[0], indicator.shape[1] + 1), dtype=np.int32)
    np.cumsum(indicator, axis=1, dtype=np.int32, out=out[:, 1:])
    return out


def _window_counts(prefix: NDArray, first: NDArray, lo: int, w: int) -> NDArray:
    """For each window s and member m (point i = s + m): the band's count over the window,
    prefix[i, 2w - 1 - m] - prefix[i, w - 1 - m]."""
    m = np.arange(w)
    rows = (first - lo)[:, None] + m
    return prefix[rows, 2 * w - 1 - m] - prefix[rows, w - 1 - m]


def sliding_ranks(x: NDArray, w: int, first: NDArray) -> NDArray[np.float64]:
    """Average ranks (1..w) of every member of every window, shape (windows, w).

    Equal to ``scipy.stats.rankdata(window, method="average")`` per window.
    """
    x = np.asarray(x, dtype=float)
    lo, hi = _span(first, w, len(x))
    band = _band(x, lo, hi, w)
    centre = x[lo:hi, None]
    below = _window_counts(_prefix(band < centre), first, lo, w)
    if np.unique(x[lo:hi]).size == hi - lo:
        return 1.0 + below
    equal = _window_counts(_prefix(band == centre), first, lo, w)  # includes the point itself
    return 1.0 + below + 0.5 * (equal - 1)


def _forward_sums(values: NDArray, first: NDArray, lo: int, w: int) -> NDArray:
    """Sum over pairs i < j of each window of a pairwise quantity given forward in a band
    values[i, k - 1] for j = i + k, k = 1..w-1."""
    prefix = np.zeros((values.shape[0], w), dtype=np.int64)
    np.cumsum(values, axis=1, out=prefix[:, 1:])
    m = np.arange(w)
    rows = (first - lo)[:, None] + m
    return prefix[rows, w - 1 - m].sum(axis=1)


def sliding_kendall_tau(x: NDArray, y: NDArray, w: int, first: NDArray
                        ) -> NDArray[np.float64]:
    """Kendall's tau-b of every window, tau_b = S / sqrt((n0 - n1)(n0 - n2)) with S the
    concordant minus discordant pairs, n0 = w(w-1)/2 and n1, n2 the tied pairs in x and y
    (Kendall 1945, *Biometrika* 33, 239-251); NaN where one variable is constant."""
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    lo, hi = _span(first, w, len(x))
    fx = _band(x, lo, hi, w)[:, w:]  # x[i + k] for k = 1..w-1
    fy = _band(y, lo, hi, w)[:, w:]
    cx, cy = x[lo:hi, None], y[lo:hi, None]
    with np.errstate(invalid="ignore"):
        sx = np.sign(fx - cx)
        sy = np.sign(fy - cy)
    # NaN (beyond the segment) counts as neither concordant nor tied.
    prod = np.nan_to_num(sx * sy).astype(np.int8)
    s = _forward_sums(prod, first, lo, w)
    n0 = w * (w - 1) / 2
    n1 = _forward_sums((fx == cx).astype(np.int8), first, lo, w)
    n2 = _forward_sums((fy == cy).astype(np.int8), first, lo, w)
    with np.errstate(invalid="ignore", divide="ignore"):
        return s / np.sqrt((n0 - n1) * (n0 - n2))


def sliding_dominance(x: NDArray, y: NDArray, w: int, first: NDArray) -> NDArray[np.int64]:
    """#{j in the window : x_j <= x_i and y_j <= y_i} for every member i of every window,
    ties broken by position (j before i counts as below), the point itself included: the
    empirical copula at the sample points times w."""
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    lo, hi = _span(first, w, len(x))
    bx, by = _band(x, lo, hi, w), _band(y, lo, hi, w)
    cx, cy = x[lo:hi, None], y[lo:hi, None]
    before = np.arange(2 * w - 1) < w - 1  # k < 0: the neighbour comes first
    dom = (((bx < cx) | ((bx == cx) & before)) & ((by < cy) | ((by == cy) & before)))
    return _window_counts(_prefix(dom), first, lo, w) + 1


#: Windows per block in :func:`window_dominance` (bounds its (block, w, w) comparisons).
_DOMINANCE_BLOCK = 32


def window_dominance(x: NDArray, y: NDArray) -> NDArray[np.int64]:
    """:func:`sliding_dominance` of separate windows, the rows of ``x`` and ``y`` (shape
    (windows, w)): the same counts by direct comparison, for a few windows of many series.

    Ties are broken by position as there: a stable sort's ordinal ranks order equal values by
    position, and a point dominates those with both ordinal ranks at most its own.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    ox = np.argsort(np.argsort(x, axis=1, kind="stable"), axis=1)
    oy = np.argsort(np.argsort(y, axis=1, kind="stable"), axis=1)
    out = np.empty(x.shape, dtype=np.int64)
    for lo in range(0, len(x), _DOMINANCE_BLOCK):
        bx, by = ox[lo:lo + _DOMINANCE_BLOCK], oy[lo:lo + _DOMINANCE_BLOCK]
        below = (bx[:, None, :] <= bx[:, :, None]) & (by[:, None, :] <= by[:, :, None])
        out[lo:lo + _DOMINANCE_BLOCK] = below.sum(axis=2)
    return out
