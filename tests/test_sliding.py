"""Rank statistics of all windows at once equal the per-window references (scipy.stats)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.lib.stride_tricks import sliding_window_view
from scipy import stats

from monitor.stats.sliding import sliding_dominance, sliding_kendall_tau, sliding_ranks


def _series(n, seed, decimals=None):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(n)
    y = 0.6 * x + rng.standard_normal(n)
    if decimals is not None:  # coarse rounding creates many ties
        x, y = np.round(x, decimals), np.round(y, decimals)
    return x, y


@pytest.mark.parametrize(("decimals", "w"), [(None, 40), (1, 40), (0, 25)])
def test_ranks_tau_and_dominance_equal_the_per_window_references(decimals, w):
    x, y = _series(400, 3, decimals)
    rng = np.random.default_rng(5)
    first = np.sort(rng.choice(len(x) - w + 1, size=60, replace=False))
    ranks_x = sliding_ranks(x, w, first)
    tau = sliding_kendall_tau(x, y, w, first)
    dom = sliding_dominance(x, y, w, first)
    for row, s in enumerate(first):
        wx, wy = x[s:s + w], y[s:s + w]
        # Average ranks (scipy.stats.rankdata, method "average").
        np.testing.assert_allclose(ranks_x[row], stats.rankdata(wx), atol=1e-12)
        # Kendall's tau-b with tie correction (Kendall 1945; scipy.stats.kendalltau).
        assert tau[row] == pytest.approx(stats.kendalltau(wx, wy)[0], abs=1e-12)
        # Dominance with ties broken by position: j <= i in the order (value, position).
        pos = np.arange(w)
        below_x = (wx[None, :] < wx[:, None]) | ((wx[None, :] == wx[:, None])
                                                 & (pos[None, :] <= pos[:, None]))
        below_y = (wy[None, :] < wy[:, None]) | ((wy[None, :] == wy[:, None])
                                                 & (pos[None, :] <= pos[:, None]))
        np.testing.assert_array_equal(dom[row], np.sum(below_x & below_y, axis=1))


def test_every_window_of_a_long_series_and_a_single_window():
    x, y = _series(1500, 8)
    w = 250
    first = np.arange(len(x) - w + 1)
    ranks = sliding_ranks(x, w, first)
    ref = stats.rankdata(sliding_window_view(x, w), axis=1)
    np.testing.assert_array_equal(ranks, ref)
    one = np.array([len(x) - w])
    assert sliding_kendall_tau(x, y, w, one)[0] == pytest.approx(
        stats.kendalltau(x[-w:], y[-w:])[0], abs=1e-12)


def test_windows_outside_the_series_are_refused():
    x, _ = _series(100, 1)
    with pytest.raises(ValueError, match="do not fit a series of 100"):
        sliding_ranks(x, 30, np.array([0, 71]))


@pytest.mark.parametrize("decimals", [None, 1, 0])
def test_stacked_windows_give_the_banded_counts_to_the_bit(decimals):
    # The daily update counts one window of each of hundreds of pairs by sorting the stacked
    # windows (monitor.stats.rolling._window_statistics); the numbers must be the banded ones
    # exactly, ties included, so a daily update equals a backfill to the last bit.
    from monitor.stats.rolling import _window_statistics
    from monitor.stats.sliding import window_dominance

    w = 40
    series = []
    for seed in range(5):
        x, y = _series(300, seed, decimals)
        first = np.sort(np.random.default_rng(seed).choice(len(x) - w + 1, 3, replace=False))
        series.append((x, y, first))
    few = _window_statistics(series, w)
    banded = [np.concatenate(parts) for parts in zip(*[
        (sliding_ranks(x, w, f) / (w + 1.0), sliding_ranks(y, w, f) / (w + 1.0),
         sliding_kendall_tau(x, y, w, f), sliding_dominance(x, y, w, f))
        for x, y, f in series])]
    for got, want in zip(few, banded, strict=True):
        np.testing.assert_array_equal(got, want)
    x, y, f = series[0]
    np.testing.assert_array_equal(
        window_dominance(sliding_window_view(x, w)[f], sliding_window_view(y, w)[f]),
        sliding_dominance(x, y, w, f))
