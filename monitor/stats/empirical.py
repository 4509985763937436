"""Empirical (rank-based) dependence measures for one sample or a batch of rolling windows.

Every function takes a 1-D sample of length ``n`` or a batch of samples along the last axis,
e.g. an array of shape ``(windows, n)`` from the rolling engine, and is vectorised over the
batch: the cost is a few whole-array NumPy passes, never a Python loop over windows. Results
have the batch shape (0-d arrays for a single sample); multi-value results are read-only frozen
dataclasses.

Conventions (as in the rest of :mod:`monitor`): pseudo-observations are ``U_i = R_i / (n + 1)``
with average ranks for ties; the empirical copula is ``C_n(a, b) = n^-1 sum 1{U_i <= a, V_i <= b}``.

>>> x = [1.2, -0.5, 0.3, 2.1, -1.7, 0.9, -0.2, 1.5]
>>> y = [0.8, -1.1, 0.5, 1.9, -0.4, 0.1, -0.9, 2.2]
>>> round(float(kendall_tau(x, y)), 6), round(float(spearman_rho(x, y)), 6)
(0.714286, 0.880952)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from monitor.common.arrays import read_only

__all__ = [
    "ConditionalCorrelation",
    "ExceedanceCorrelation",
    "ExtremeValueTailDependence",
    "PlateauTailDependence",
    "RankTailDependence",
    "TailDependence",
    "conditional_correlation",
    "empirical_copula",
    "exceedance_correlation",
    "kendall_tau",
    "pseudo_observations",
    "spearman_rho",
    "tail_dependence",
    "tail_dependence_cfg",
    "tail_dependence_plateau",
    "tail_dependence_rank",
    "tail_share_interval",
    "wilson_interval",
]

#: Largest number of elements one broadcast comparison block of :func:`empirical_copula` holds;
#: bounds memory when a batch of windows is evaluated at many points.
_BLOCK_ELEMENTS = 1 << 22

_SCALES = ("standardised", "quantile", "data")


# ---------------------------------------------------------------------------------- helpers
def _as_samples(x: ArrayLike, name: str, *, min_n: int = 1) -> NDArray[np.float64]:
    """Validate one sample or a batch along the last axis; returns a float array."""
    raw = np.asarray(x)
    if raw.dtype.kind not in "biuf":
        raise TypeError(f"{name} must be real numbers, got dtype {raw.dtype}")
    arr = raw.astype(float, copy=False)
    if arr.ndim == 0:
        raise ValueError(
            f"{name} must be a 1-D sample or a batch along the last axis, got a scalar"
        )
    if arr.shape[-1] < min_n:
        raise ValueError(
            f"{name} needs at least {min_n} observations along the last axis, got {arr.shape[-1]}"
        )
    if np.isnan(arr).any():
        raise ValueError(
            f"{name} contains NaN; ranks are undefined for missing values, so drop or align "
            "them before calling"
        )
    return arr


def _as_pair(x: ArrayLike, y: ArrayLike, names: tuple[str, str], *, min_n: int = 1
             ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Validate two samples and broadcast them to a common shape ``(..., n)``."""
    a = _as_samples(x, names[0], min_n=min_n)
    b = _as_samples(y, names[1], min_n=min_n)
    if a.shape[-1] != b.shape[-1]:
        raise ValueError(
            f"{names[0]} and {names[1]} must have the same sample length along the last axis, "
            f"got {a.shape[-1]} and {b.shape[-1]}"
        )
    try:
        a, b = np.broadcast_arrays(a, b)
    except ValueError:
        raise ValueError(
            f"batch shapes of {names[0]} {a.shape[:-1]} and {names[1]} {b.shape[:-1]} "
            "do not broadcast"
        ) from None
    return a, b


def _check_unit(arr: NDArray[np.float64], name: str) -> None:
    bad = ~((arr >= 0.0) & (arr <= 1.0))
    if bad.any():
        raise ValueError(f"{name} must lie in [0, 1]; found {arr[bad].flat[0]!r}")


def _rank_runs(x: NDArray[np.float64]) -> tuple[NDArray[np.intp], NDArray[np.intp],
                                                 NDArray[np.intp], NDArray[np.bool_]]:
    """Sort each row of a 2-D array and locate its runs of tied values.

    Returns the sorting permutation, the first and last sorted position of the run each sorted
    element belongs to, and the flags marking where a new run starts.
    """
    n = x.shape[-1]
    order = np.argsort(x, axis=-1)
    xs = np.take_along_axis(x, order, axis=-1)
    new = np.ones(xs.shape, dtype=bool)
    new[:, 1:] = xs[:, 1:] != xs[:, :-1]
    idx = np.arange(n)
    first = np.maximum.accumulate(np.where(new, idx, 0), axis=-1)
    last_flag = np.ones(xs.shape, dtype=bool)
    last_flag[:, :-1] = new[:, 1:]
    last = np.minimum.accumulate(np.where(last_flag, idx, n - 1)[:, ::-1], axis=-1)[:, ::-1]
    return order, first, last, new


def _scatter(order: NDArray[np.intp], sorted_values: NDArray) -> NDArray:
    out = np.empty_like(sorted_values)
    np.put_along_axis(out, order, sorted_values, axis=-1)
    return out


def _average_ranks_2d(x: NDArray[np.float64]) -> NDArray[np.float64]:
    """Average ranks (1-based) along the last axis of a 2-D array."""
    order, first, last, _ = _rank_runs(x)
    return _scatter(order, 0.5 * (first + last) + 1.0)


def _dense_codes_and_ties(x: NDArray[np.float64]) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Dense integer codes (0, 1, ... in order of value) and the number of tied pairs per row.

    The tied-pair count is sum_g t_g (t_g - 1) / 2 over the groups of equal values, computed as
    the sum over sorted positions of the distance to the start of their run.
    """
    order, first, _, new = _rank_runs(x)
    codes = _scatter(order, np.cumsum(new, axis=-1, dtype=np.int64) - 1)
    ties = (np.arange(x.shape[-1]) - first).sum(axis=-1, dtype=np.int64)
    return codes, ties


def _tied_pairs_sorted(s: NDArray) -> NDArray[np.int64]:
    """Tied pairs per row of a 2-D array already sorted along the last axis."""
    n = s.shape[-1]
    new = np.ones(s.shape, dtype=bool)
    new[:, 1:] = s[:, 1:] != s[:, :-1]
    idx = np.arange(n)
    first = np.maximum.accumulate(np.where(new, idx, 0), axis=-1)
    return np.sum(idx - first, axis=-1, dtype=np.int64)


def _inversions(a: NDArray[np.int64]) -> NDArray[np.int64]:
    """Pairs i < j with a[i] > a[j] in each row, by bottom-up merge sort.

    Each of the ceil(log2 n) passes merges neighbouring sorted blocks of width w in every row
    at once, by sorting the keys 2 * value + side (side 1 for the right block), so that among
    equal values the left ones come first and ties are not counted. If the right elements land
    at merged positions p_0 < ... < p_{w-1}, the j-th has p_j - j left elements before it and
    w - p_j + j after it, so the pass adds w^2 + w(w - 1)/2 - sum_j p_j inversions per block.
    Values must be integers in [0, n).
    """
    rows, n = a.shape
    size = 1 << max(0, (n - 1).bit_length())
    dtype: type[np.signedinteger] = np.int32 if 2 * n + 1 < np.iinfo(np.int32).max else np.int64
    a = a.astype(dtype)
    if size > n:
        # Padding larger than every value at the end creates no inversion.
        a = np.concatenate([a, np.full((rows, size - n), n, dtype=dtype)], axis=1)
    # Position sums stay below 2**53, so float sums (and BLAS products) are exact.
    total = np.zeros(rows)
    width = 1
    while width < size:
        n_blocks = size // (2 * width)
        side = (np.arange(2 * width) >= width).astype(dtype)
        # A stable sort (timsort for 32/64-bit integers) finds the two sorted runs of each
        # block and merges them in linear time, which keeps the whole count O(n log n).
        merged = np.sort(2 * a.reshape(rows, n_blocks, 2 * width) + side, axis=-1, kind="stable")
        positions = np.tile(np.arange(2 * width, dtype=float), n_blocks)
        right_position_sum = (merged & 1).reshape(rows, size).astype(float) @ positions
        total += n_blocks * (width * width + width * (width - 1) / 2) - right_position_sum
        a = (merged >> 1).reshape(rows, size)
        width *= 2
    return np.rint(total).astype(np.int64)


def _flatten_batch(*arrays: NDArray) -> tuple[tuple[int, ...], list[NDArray]]:
    batch = arrays[0].shape[:-1]
    n = arrays[0].shape[-1]
    return batch, [np.ascontiguousarray(a).reshape(-1, n) for a in arrays]


# ---------------------------------------------------------------------------------- ranks
def pseudo_observations(x: ArrayLike, axis: int = -1) -> NDArray[np.float64]:
    """Pseudo-observations: ranks divided by ``n + 1``, ties getting their average rank.

    Parameters
    ----------
    x : array_like
        One sample, or a batch of samples along ``axis``.
    axis : int
        Axis along which observations are ranked (default: the last).

    Returns
    -------
    ndarray
        ``R_i / (n + 1)`` in (0, 1), same shape as ``x``.

    Raises
    ------
    ValueError
        If ``x`` contains NaN (ranks of missing values are undefined) or is a scalar.

    Notes
    -----
    ``U_i = R_i / (n + 1)`` with ``R_i`` the rank of ``x_i`` among ``x_1..x_n``; tied values
    share the mean of the ranks they occupy, as ``scipy.stats.rankdata(method="average")``.
    Rescaling by ``n + 1`` rather than ``n`` keeps every value inside (0, 1) so copula
    log-densities stay finite (Genest, Ghoudi & Rivest 1995, *Biometrika* 82, 543-552).

    Examples
    --------
    >>> pseudo_observations([0.3, -1.0, 0.3, 2.0])
    array([0.5, 0.2, 0.5, 0.8])
    """
    arr = _as_samples(x, "x")
    moved = np.moveaxis(arr, axis, -1)
    batch, (flat,) = _flatten_batch(moved)
    ranks = _average_ranks_2d(flat).reshape(*batch, flat.shape[-1])
    return np.moveaxis(ranks / (flat.shape[-1] + 1.0), -1, axis)


# ---------------------------------------------------------------------------------- concordance
def kendall_tau(x: ArrayLike, y: ArrayLike) -> NDArray[np.float64]:
    """Kendall's tau-b of each sample pair, in O(n log n) per window.

    Parameters
    ----------
    x, y : array_like
        Paired samples along the last axis; batch shapes broadcast (e.g. ``(windows, n)``).

    Returns
    -------
    ndarray
        tau-b with the broadcast batch shape (0-d for a single sample); NaN where ``x`` or
        ``y`` is constant, since tau-b is then undefined.

    Raises
    ------
    ValueError
        For NaN input, unequal sample lengths or fewer than 2 observations.

    Notes
    -----
    With ``n0 = n(n-1)/2``, ``n1`` and ``n2`` the pairs tied in x and in y, ``n3`` the pairs
    tied in both and ``D`` the discordant pairs, the concordant pairs number
    ``C = n0 - n1 - n2 + n3 - D`` and

    .. math:: \\tau_b = (C - D) / \\sqrt{(n_0 - n_1)(n_0 - n_2)}

    (Kendall 1945, *Biometrika* 33, 239-251). ``D`` is counted as in Knight (1966), "A
    computer method for calculating Kendall's tau with ungrouped data", *JASA* 61, 436-439:
    sort the pairs by x and, within ties in x, by y; the discordant pairs are then exactly the
    strict inversions of the y sequence, counted by merge sort. Pairs tied in x are in y order
    and pairs tied in y are not strict inversions, so neither is counted. All windows are
    sorted and merged together in ceil(log2 n) whole-batch passes of linear merges, so the
    cost is O(n log n) per window and no Python loop runs over windows. Agrees with
    ``scipy.stats.kendalltau`` (variant "b").

    Examples
    --------
    >>> float(kendall_tau([1, 2, 2, 3], [1, 3, 2, 3]))
    0.8
    """
    a, b = _as_pair(x, y, ("x", "y"), min_n=2)
    batch, (fa, fb) = _flatten_batch(a, b)
    n = fa.shape[-1]
    rx, ties_x = _dense_codes_and_ties(fa)
    ry, ties_y = _dense_codes_and_ties(fb)
    joint = rx * n + ry
    order = np.argsort(joint, axis=-1)
    ties_xy = _tied_pairs_sorted(np.take_along_axis(joint, order, axis=-1))
    discordant = _inversions(np.take_along_axis(ry, order, axis=-1))
    n0 = n * (n - 1) // 2
    numerator = (n0 - ties_x - ties_y + ties_xy - 2 * discordant).astype(float)
    denominator = np.sqrt((n0 - ties_x).astype(float) * (n0 - ties_y).astype(float))
    with np.errstate(invalid="ignore", divide="ignore"):
        tau = np.where(denominator > 0, numerator / denominator, np.nan)
    return np.clip(tau, -1.0, 1.0).reshape(batch)


def spearman_rho(x: ArrayLike, y: ArrayLike) -> NDArray[np.float64]:
    """Spearman's rho of each sample pair: the Pearson correlation of average ranks.

    Parameters
    ----------
    x, y : array_like
        Paired samples along the last axis; batch shapes broadcast.

    Returns
    -------
    ndarray
        rho_S with the broadcast batch shape; NaN where ``x`` or ``y`` is constant.

    Raises
    ------
    ValueError
        For NaN input, unequal sample lengths or fewer than 2 observations.

    Notes
    -----
    .. math:: \\rho_S = \\frac{\\sum (R_i - \\bar R)(S_i - \\bar S)}
              {\\sqrt{\\sum (R_i - \\bar R)^2 \\sum (S_i - \\bar S)^2}}

    with average ranks for ties (Spearman 1904, *Am. J. Psychol.* 15, 72-101; Nelsen 2006,
    *An Introduction to Copulas*, section 5.1.2), as ``scipy.stats.spearmanr``. Without ties
    this equals ``1 - 6 sum d_i^2 / (n (n^2 - 1))``.

    Examples
    --------
    >>> float(spearman_rho([1, 2, 3, 4], [1, 3, 2, 4]))
    0.8
    """
    a, b = _as_pair(x, y, ("x", "y"), min_n=2)
    batch, (fa, fb) = _flatten_batch(a, b)
    ra = _average_ranks_2d(fa)
    rb = _average_ranks_2d(fb)
    ra -= ra.mean(axis=-1, keepdims=True)
    rb -= rb.mean(axis=-1, keepdims=True)
    sxy = np.sum(ra * rb, axis=-1)
    denominator = np.sqrt(np.sum(ra * ra, axis=-1) * np.sum(rb * rb, axis=-1))
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.where(denominator > 0, sxy / denominator, np.nan)
    return np.clip(rho, -1.0, 1.0).reshape(batch)


# ---------------------------------------------------------------------------------- copula
def _joint_lower_counts(u: NDArray, v: NDArray, at_u: NDArray, at_v: NDArray) -> NDArray:
    """#{i : u_i <= a, v_i <= b} for points of shape (..., m) against samples (..., n).

    Batch axes must already broadcast. The comparison is done in blocks of sample positions so
    that no temporary exceeds :data:`_BLOCK_ELEMENTS` elements.
    """
    n = u.shape[-1]
    out_shape = np.broadcast_shapes(u.shape[:-1], at_u.shape[:-1]) + at_u.shape[-1:]
    u = np.broadcast_to(u, out_shape[:-1] + (n,))[..., None, :]
    v = np.broadcast_to(v, out_shape[:-1] + (n,))[..., None, :]
    a = np.broadcast_to(at_u, out_shape)[..., None]
    b = np.broadcast_to(at_v, out_shape)[..., None]
    step = max(1, _BLOCK_ELEMENTS // max(1, int(np.prod(out_shape))))
    counts = np.zeros(out_shape, dtype=np.int64)
    for start in range(0, n, step):
        stop = start + step
        counts += np.count_nonzero(
            (u[..., start:stop] <= a) & (v[..., start:stop] <= b), axis=-1
        )
    return counts


def empirical_copula(u: ArrayLike, v: ArrayLike, at_u: ArrayLike, at_v: ArrayLike
                     ) -> NDArray[np.float64]:
    """Empirical copula of pseudo-observations, evaluated at given points.

    Parameters
    ----------
    u, v : array_like
        Pseudo-observations in [0, 1] (see :func:`pseudo_observations`) along the last axis;
        batch shapes broadcast, e.g. ``(windows, n)``.
    at_u, at_v : array_like
        Evaluation points in [0, 1]; broadcast together. A scalar pair gives one value per
        window; otherwise the last axis indexes the ``m`` points and the leading axes broadcast
        against the batch shape (so points of shape ``(m,)`` are shared by all windows and
        points of shape ``(windows, m)`` are per window).

    Returns
    -------
    ndarray
        ``C_n(a, b)``, shape ``batch`` for scalar points, else ``broadcast(batch, points[:-1])
        + (m,)``.

    Raises
    ------
    ValueError
        For NaN input or values outside [0, 1].

    Notes
    -----
    .. math:: C_n(a, b) = \\frac{1}{n} \\sum_{i=1}^n 1\\{U_i \\le a, V_i \\le b\\}

    (Deheuvels 1979, *Acad. Roy. Belg. Bull. Cl. Sci.* 65, 274-292; as used by Genest,
    Rémillard & Beaudoin 2009, *Insur. Math. Econ.* 44, 199-213). Memory stays bounded by
    comparing in blocks of sample positions.

    Examples
    --------
    >>> u = pseudo_observations([1.2, -0.5, 0.3, 2.1, -1.7, 0.9, -0.2, 1.5])
    >>> v = pseudo_observations([0.8, -1.1, 0.5, 1.9, -0.4, 0.1, -0.9, 2.2])
    >>> empirical_copula(u, v, [0.25, 0.5, 0.75], [0.25, 0.5, 0.5])
    array([0.125, 0.375, 0.5  ])
    """
    uu, vv = _as_pair(u, v, ("u", "v"))
    _check_unit(uu, "u")
    _check_unit(vv, "v")
    a = np.asarray(at_u, dtype=float)
    b = np.asarray(at_v, dtype=float)
    for arr, name in ((a, "at_u"), (b, "at_v")):
        if np.isnan(arr).any():
            raise ValueError(f"{name} contains NaN")
        _check_unit(arr, name)
    try:
        a, b = np.broadcast_arrays(a, b)
    except ValueError:
        raise ValueError(f"at_u {a.shape} and at_v {b.shape} do not broadcast") from None
    scalar = a.ndim == 0
    if scalar:
        a, b = a[None], b[None]
    try:
        counts = _joint_lower_counts(uu, vv, a, b)
    except ValueError:
        raise ValueError(
            f"evaluation points of shape {a.shape} do not broadcast against the batch shape "
            f"{uu.shape[:-1]}"
        ) from None
    result = counts / uu.shape[-1]
    return result[..., 0] if scalar else result


# ---------------------------------------------------------------------------------- tails
@dataclass(frozen=True, slots=True)
class TailDependence:
    """Empirical tail-dependence estimates at quantile level ``q``.

    Attributes
    ----------
    lower, upper : ndarray
        lambda_L(q) and lambda_U(q), one per window.
    q : ndarray
        The quantile level used, broadcast to the result shape.
    """

    lower: NDArray[np.float64]
    upper: NDArray[np.float64]
    q: NDArray[np.float64]


@dataclass(frozen=True, slots=True)
class RankTailDependence:
    """Rank-based (Schmidt-Stadtmüller) tail-dependence estimates with ``k`` extremes.

    Attributes
    ----------
    lower, upper : ndarray
        Estimates of lambda_L and lambda_U, one per window.
    k : int
        Number of extreme ranks used in each tail.
    n : int
        Sample size per window.
    """

    lower: NDArray[np.float64]
    upper: NDArray[np.float64]
    k: int
    n: int


@dataclass(frozen=True, slots=True)
class PlateauTailDependence:
    """Tail-dependence estimates with ``k`` chosen by the plateau rule.

    Attributes
    ----------
    lower, upper : ndarray
        Plateau means; 0 where no plateau was found (the rule's convention).
    k_lower, k_upper : ndarray of int
        Number of extreme ranks at the centre of the chosen plateau; 0 where none was found.
    found_lower, found_upper : ndarray of bool
        Whether a plateau satisfying the stopping condition exists.
    bandwidth : int
        Box-kernel half-width ``b``: each smoothed value averages ``2b + 1`` raw estimates.
    length : int
        Plateau length ``m`` in smoothed values; a plateau spans raw k from
        ``k - b - (m - 1) // 2`` to ``k + b + m // 2``.
    n : int
        Sample size per window.
    """

    lower: NDArray[np.float64]
    upper: NDArray[np.float64]
    k_lower: NDArray[np.int64]
    k_upper: NDArray[np.int64]
    found_lower: NDArray[np.bool_]
    found_upper: NDArray[np.bool_]
    bandwidth: int
    length: int
    n: int


@dataclass(frozen=True, slots=True)
class ExtremeValueTailDependence:
    """Tail-dependence estimates that assume an extreme-value copula (CFG estimator).

    Attributes
    ----------
    lower, upper : ndarray
        lambda_L (from the survival copula) and lambda_U, one per window. Meaningful only if
        the (survival) copula is of extreme-value type.
    n : int
        Sample size per window.
    """

    lower: NDArray[np.float64]
    upper: NDArray[np.float64]
    n: int


def tail_dependence(u: ArrayLike, v: ArrayLike, q: ArrayLike) -> TailDependence:
    """Empirical lower and upper tail dependence at quantile level ``q``.

    Parameters
    ----------
    u, v : array_like
        Pseudo-observations in [0, 1] along the last axis (see :func:`pseudo_observations`).
    q : float or array_like
        Quantile level(s) in (0, 1); broadcasts against the batch shape.

    Returns
    -------
    TailDependence
        ``lower``, ``upper`` and the ``q`` used, all with the broadcast batch shape.

    Raises
    ------
    ValueError
        For NaN input, values outside [0, 1], or ``q`` outside (0, 1).

    Notes
    -----
    .. math:: \\hat\\lambda_L(q) = C_n(q, q) / q, \\qquad
              \\hat\\lambda_U(q) = [1 - 2(1 - q) + C_n(1 - q, 1 - q)] / q

    the finite-q versions of lambda_L = lim C(q, q)/q and lambda_U = lim P(U > 1-q, V > 1-q)/q
    (Joe 1997, *Multivariate Models and Dependence Concepts*, section 2.1.10; Schmidt &
    Stadtmüller 2006, *Scand. J. Stat.* 33, 307-335). At a fixed q they estimate the
    pre-asymptotic quantity, not the limit: a Gaussian copula with rho = 0.5 has C(q,q)/q =
    0.24 at q = 0.05 although lambda_L = 0.

    Examples
    --------
    >>> u = pseudo_observations([1.2, -0.5, 0.3, 2.1, -1.7, 0.9, -0.2, 1.5])
    >>> v = pseudo_observations([0.8, -1.1, 0.5, 1.9, -0.4, 0.1, -0.9, 2.2])
    >>> float(tail_dependence(u, v, 0.25).lower)
    0.5
    """
    uu, vv = _as_pair(u, v, ("u", "v"))
    _check_unit(uu, "u")
    _check_unit(vv, "v")
    qq = np.asarray(q, dtype=float)
    bad = ~((qq > 0.0) & (qq < 1.0))
    if bad.any():
        raise ValueError(f"q must lie in (0, 1); found {qq[bad].flat[0]!r}")
    n = uu.shape[-1]
    try:
        shape = np.broadcast_shapes(uu.shape[:-1], qq.shape)
    except ValueError:
        raise ValueError(
            f"q of shape {qq.shape} does not broadcast against the batch shape {uu.shape[:-1]}"
        ) from None
    qb = np.broadcast_to(qq, shape)[..., None]
    lower_count = _joint_lower_counts(uu, vv, qb, qb)[..., 0]
    upper_count = _joint_lower_counts(uu, vv, 1.0 - qb, 1.0 - qb)[..., 0]
    qs = qb[..., 0]
    lower = lower_count / n / qs
    upper = (1.0 - 2.0 * (1.0 - qs) + upper_count / n) / qs
    return TailDependence(read_only(lower), read_only(upper), read_only(qs))


def _extreme_rank_bounds(x: ArrayLike, y: ArrayLike, min_n: int):
    """Average ranks of both samples flattened to (rows, n), with max and min of each pair."""
    a, b = _as_pair(x, y, ("x", "y"), min_n=min_n)
    batch, (fa, fb) = _flatten_batch(a, b)
    r = _average_ranks_2d(fa)
    s = _average_ranks_2d(fb)
    return batch, np.maximum(r, s), np.minimum(r, s)


def tail_dependence_rank(x: ArrayLike, y: ArrayLike, k: int | None = None) -> RankTailDependence:
    """Rank form of the nonparametric tail-dependence estimators with ``k`` extreme ranks.

    Parameters
    ----------
    x, y : array_like
        Paired samples along the last axis (raw data or pseudo-observations: only ranks
        enter); batch shapes broadcast.
    k : int, optional
        Number of extreme ranks per tail, 1 <= k <= n; default ``floor(sqrt(n))``.

    Returns
    -------
    RankTailDependence
        ``lower``, ``upper`` with the batch shape, and the ``k`` used.

    Raises
    ------
    ValueError
        For NaN input, ``k`` outside [1, n], or fewer than 2 observations.

    Notes
    -----
    With ranks ``R_i`` of x and ``S_i`` of y (average ranks for ties),

    .. math:: \\hat\\lambda_L = k^{-1} \\sum 1\\{R_i \\le k, S_i \\le k\\}, \\qquad
              \\hat\\lambda_U = k^{-1} \\sum 1\\{R_i > n - k, S_i > n - k\\}

    (Schmidt & Stadtmüller 2006, *Scand. J. Stat.* 33, 307-335; Huang 1992, PhD thesis,
    Erasmus University Rotterdam). ``k`` trades bias (large k) against variance (small k);
    ``k ~ sqrt(n)`` is a common rule of thumb (from memory). See
    :func:`tail_dependence_plateau` for a data-driven choice.

    Examples
    --------
    >>> r = tail_dependence_rank([1.2, -0.5, 0.3, 2.1, -1.7, 0.9, -0.2, 1.5],
    ...                          [0.8, -1.1, 0.5, 1.9, -0.4, 0.1, -0.9, 2.2], k=2)
    >>> float(r.lower), float(r.upper), r.k
    (0.5, 1.0, 2)
    """
    batch, hi, lo = _extreme_rank_bounds(x, y, min_n=2)
    n = hi.shape[-1]
    if k is None:
        k = int(np.floor(np.sqrt(n)))
    if isinstance(k, bool) or not isinstance(k, int | np.integer):
        raise TypeError(f"k must be an integer, got {type(k).__name__}")
    if not 1 <= k <= n:
        raise ValueError(f"k must lie in [1, n] = [1, {n}], got {k}")
    lower = np.count_nonzero(hi <= k, axis=-1) / k
    upper = np.count_nonzero(lo > n - k, axis=-1) / k
    return RankTailDependence(
        read_only(lower.reshape(batch)), read_only(upper.reshape(batch)), int(k), n
    )


def _plateau(counts_at: NDArray[np.int64], n: int, b: int, m: int):
    """Apply the plateau rule to raw estimates lambda(k) = count(k) / k, k = 1..n, per row."""
    k = np.arange(1, n + 1)
    raw = np.cumsum(counts_at, axis=-1) / k
    csum = np.concatenate([np.zeros((raw.shape[0], 1)), np.cumsum(raw, axis=-1)], axis=-1)
    width = 2 * b + 1
    smooth = (csum[:, width:] - csum[:, :-width]) / width  # n - 2b values
    sigma = smooth.std(axis=-1)
    starts = smooth.shape[-1] - m + 1
    deviation = np.zeros((raw.shape[0], starts))
    for i in range(1, m):
        deviation += np.abs(smooth[:, i:i + starts] - smooth[:, :starts])
    ok = deviation <= 2.0 * sigma[:, None]
    found = ok.any(axis=-1)
    first = np.argmax(ok, axis=-1)
    scum = np.concatenate([np.zeros((raw.shape[0], 1)), np.cumsum(smooth, axis=-1)], axis=-1)
    rows = np.arange(raw.shape[0])
    mean = (scum[rows, first + m] - scum[rows, first]) / m
    # Smoothed value j (0-based) averages raw k = j+1 .. j+1+2b; report the plateau centre.
    centre = first + 1 + b + (m - 1) // 2
    return np.where(found, mean, 0.0), np.where(found, centre, 0), found


def tail_dependence_plateau(x: ArrayLike, y: ArrayLike, *, bandwidth: int | None = None,
                            length: int | None = None) -> PlateauTailDependence:
    """Rank tail-dependence estimates with ``k`` chosen by the plateau-finding rule.

    Parameters
    ----------
    x, y : array_like
        Paired samples along the last axis (only ranks enter); batch shapes broadcast.
    bandwidth : int, optional
        Box-kernel half-width ``b``; default ``floor(0.005 n)``.
    length : int, optional
        Plateau length ``m``; default ``floor(sqrt(n - 2b))``; at least 2.

    Returns
    -------
    PlateauTailDependence
        Estimates, the chosen ``k`` per tail and window, whether a plateau was found, and the
        ``b`` and ``m`` used.

    Raises
    ------
    ValueError
        For NaN input, too short samples, or ``b``/``m`` that leave no plateau to test.

    Notes
    -----
    Frahm, Junker & Schmidt (2005), "Estimating the tail-dependence coefficient: properties
    and pitfalls", *Insur. Math. Econ.* 37, 80-100 (rule details from memory):

    1. compute the rank estimates lambda(k), k = 1..n, of :func:`tail_dependence_rank`;
    2. smooth them with a box kernel of bandwidth b, i.e. average 2b + 1 consecutive values,
       giving lambda_bar_1..lambda_bar_{n-2b};
    3. a plateau is p_j = (lambda_bar_j, .., lambda_bar_{j+m-1}); take the first j (smallest
       k, i.e. most extreme) with sum_{i=1}^{m-1} |lambda_bar_{j+i} - lambda_bar_j| <= 2 sigma,
       sigma the standard deviation (ddof = 0) of all lambda_bar;
    4. the estimate is the plateau mean; if no plateau qualifies it is 0.

    The whole sequence lambda(k) of every window comes from one cumulative count: a pair is
    in the lower tail at level k iff ceil(max(R_i, S_i)) <= k, and in the upper tail iff
    floor(n - min(R_i, S_i)) + 1 <= k.

    The rule targets tail-dependent data: for a tail-independent pair it usually still finds
    a plateau at the pre-asymptotic level (e.g. about 0.2 for the upper tail of a Clayton
    sample of 250), so read a small value as "no evidence of tail dependence".

    Examples
    --------
    >>> from monitor.stats.copulas import family
    >>> x, y = family("clayton").sample(5000, (2.0,), rng=1).T
    >>> res = tail_dependence_plateau(x, y)
    >>> res.bandwidth, res.length, bool(res.found_lower), round(float(res.lower), 2)
    (25, 70, True, 0.72)
    """
    batch, hi, lo = _extreme_rank_bounds(x, y, min_n=4)
    rows, n = hi.shape
    b = int(np.floor(0.005 * n)) if bandwidth is None else bandwidth
    if isinstance(b, bool) or not isinstance(b, int | np.integer) or b < 0:
        raise ValueError(f"bandwidth must be a non-negative integer, got {bandwidth!r}")
    if n - 2 * b < 2:
        raise ValueError(f"bandwidth {b} leaves fewer than 2 smoothed values for n = {n}")
    m = int(np.floor(np.sqrt(n - 2 * b))) if length is None else length
    if isinstance(m, bool) or not isinstance(m, int | np.integer) or not 2 <= m <= n - 2 * b:
        raise ValueError(f"length must be an integer in [2, n - 2b] = [2, {n - 2 * b}], got {m!r}")
    offsets = (np.arange(rows) * n)[:, None]
    # Level k at which each pair enters the tail (1..n), turned into counts per level.
    enter_lower = np.ceil(hi).astype(np.int64)
    enter_upper = np.floor(n - lo).astype(np.int64) + 1
    hist_lower = np.bincount((enter_lower - 1 + offsets).ravel(), minlength=rows * n)
    hist_upper = np.bincount((enter_upper - 1 + offsets).ravel(), minlength=rows * n)
    lower, k_lower, found_lower = _plateau(hist_lower.reshape(rows, n), n, b, m)
    upper, k_upper, found_upper = _plateau(hist_upper.reshape(rows, n), n, b, m)
    return PlateauTailDependence(
        lower=read_only(lower.reshape(batch)),
        upper=read_only(upper.reshape(batch)),
        k_lower=read_only(k_lower.reshape(batch)),
        k_upper=read_only(k_upper.reshape(batch)),
        found_lower=read_only(found_lower.reshape(batch)),
        found_upper=read_only(found_upper.reshape(batch)),
        bandwidth=b,
        length=m,
        n=n,
    )


def _cfg_upper(u: NDArray[np.float64], v: NDArray[np.float64]) -> NDArray[np.float64]:
    # log of sqrt(log(1/U) log(1/V)) / log(1/max(U, V)^2), kept in logs of positive terms.
    terms = (0.5 * (np.log(-np.log(u)) + np.log(-np.log(v)))
             - np.log(-2.0 * np.log(np.maximum(u, v))))
    return 2.0 - 2.0 * np.exp(np.mean(terms, axis=-1))


def tail_dependence_cfg(x: ArrayLike, y: ArrayLike) -> ExtremeValueTailDependence:
    """Capéraà-Fougères-Genest tail-dependence estimates, valid only for extreme-value copulas.

    Parameters
    ----------
    x, y : array_like
        Paired samples along the last axis (only ranks enter); batch shapes broadcast.

    Returns
    -------
    ExtremeValueTailDependence
        ``upper`` from the copula of (x, y) and ``lower`` from that of (-x, -y).

    Raises
    ------
    ValueError
        For NaN input or fewer than 2 observations.

    Notes
    -----
    With pseudo-observations U_i, V_i (Frahm, Junker & Schmidt 2005, *Insur. Math. Econ.* 37,
    80-100, after Capéraà, Fougères & Genest 1997, *Biometrika* 84, 567-577; closed form from
    memory),

    .. math:: \\hat\\lambda_U = 2 - 2 \\exp\\Big\\{\\frac{1}{n} \\sum_i \\log
              \\frac{\\sqrt{\\log(1/U_i) \\log(1/V_i)}}{\\log(1/\\max(U_i, V_i)^2)}\\Big\\}

    i.e. 2(1 - A_n(1/2)) with A_n the endpoint-corrected CFG estimate of the Pickands
    dependence function. The lower coefficient applies the same formula to 1 - U, 1 - V.

    **Caveat.** The estimator uses the whole sample through the Pickands function, so it is
    consistent only if the copula (for ``lower``: the survival copula) is of extreme-value
    type, e.g. Gumbel. Otherwise it is biased however large n is: for a Clayton(2) sample it
    reports lambda_U close to 0.5 although lambda_U = 0. Use it as a model-based comparison,
    not as the default estimator.

    Examples
    --------
    >>> res = tail_dependence_cfg([0.1, 0.5, 0.2, 0.9], [1.0, 5.0, 2.0, 9.0])
    >>> round(float(res.upper), 12), round(float(res.lower), 12)
    (1.0, 1.0)
    """
    a, b = _as_pair(x, y, ("x", "y"), min_n=2)
    batch, (fa, fb) = _flatten_batch(a, b)
    n = fa.shape[-1]
    u = _average_ranks_2d(fa) / (n + 1.0)
    v = _average_ranks_2d(fb) / (n + 1.0)
    upper = _cfg_upper(u, v)
    lower = _cfg_upper(1.0 - u, 1.0 - v)
    return ExtremeValueTailDependence(
        read_only(lower.reshape(batch)), read_only(upper.reshape(batch)), n
    )


# ---------------------------------------------------------------------------------- correlation
@dataclass(frozen=True, slots=True)
class ConditionalCorrelation:
    """Pearson correlation within a conditioning region.

    Attributes
    ----------
    correlation : ndarray
        The correlation, NaN where it cannot be computed.
    count : ndarray of int
        Number of observations in the region.
    reason : ndarray of str
        Empty where ``correlation`` is a number, otherwise why it is NaN.
    """

    correlation: NDArray[np.float64]
    count: NDArray[np.int64]
    reason: NDArray[np.str_]


@dataclass(frozen=True, slots=True)
class ExceedanceCorrelation:
    """Exceedance correlations rho+(xi) and rho-(xi).

    Attributes
    ----------
    xi : ndarray
        Thresholds, broadcast to the result shape.
    scale : str
        ``"standardised"``, ``"quantile"`` or ``"data"``: the scale on which ``xi`` applies.
    upper, lower : ndarray
        rho+(xi) = corr(X, Y | X > xi, Y > xi) and rho-(xi) = corr(X, Y | X < xi, Y < xi).
    count_upper, count_lower : ndarray of int
        Joint exceedances used for each.
    reason_upper, reason_lower : ndarray of str
        Empty where the value is a number, otherwise why it is NaN.
    """

    xi: NDArray[np.float64]
    scale: str
    upper: NDArray[np.float64]
    lower: NDArray[np.float64]
    count_upper: NDArray[np.int64]
    count_lower: NDArray[np.int64]
    reason_upper: NDArray[np.str_]
    reason_lower: NDArray[np.str_]


def _masked_correlation(x: NDArray, y: NDArray, where: NDArray[np.bool_], min_count: int):
    count = np.count_nonzero(where, axis=-1)
    safe = np.maximum(count, 1)
    mx = np.sum(np.where(where, x, 0.0), axis=-1) / safe
    my = np.sum(np.where(where, y, 0.0), axis=-1) / safe
    # Two-pass (centred) sums: exceedance regions hold nearly equal values far from 0, where
    # the one-pass formula cancels badly.
    dx = np.where(where, x - mx[..., None], 0.0)
    dy = np.where(where, y - my[..., None], 0.0)
    sxx = np.sum(dx * dx, axis=-1)
    syy = np.sum(dy * dy, axis=-1)
    sxy = np.sum(dx * dy, axis=-1)
    few = count < min_count
    flat = ~few & ((sxx <= 0.0) | (syy <= 0.0))
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = np.clip(sxy / np.sqrt(sxx * syy), -1.0, 1.0)
    corr = np.where(few | flat, np.nan, corr)
    reason = np.where(
        few, f"fewer than {min_count} observations in the region",
        np.where(flat, "no variation in x or y within the region", ""),
    )
    return corr, count, reason


def _check_min_count(min_count: int) -> None:
    if isinstance(min_count, bool) or not isinstance(min_count, int | np.integer):
        raise TypeError(f"min_count must be an integer, got {type(min_count).__name__}")
    if min_count < 3:
        raise ValueError(f"min_count must be at least 3, got {min_count}")


def conditional_correlation(x: ArrayLike, y: ArrayLike, where: ArrayLike, *,
                            min_count: int = 10) -> ConditionalCorrelation:
    """Pearson correlation of the observations selected by a mask, per window.

    Parameters
    ----------
    x, y : array_like
        Paired samples along the last axis.
    where : array_like of bool
        Selection mask; broadcasts against ``x`` and ``y`` (extra leading axes give several
        regions at once).
    min_count : int
        Fewer selected observations than this give NaN (default 10, at least 3).

    Returns
    -------
    ConditionalCorrelation
        The correlation, the number of selected observations, and a reason where NaN.

    Notes
    -----
    .. math:: \\rho_A = \\mathrm{corr}(X, Y \\mid (X, Y) \\in A)

    Conditioning on a region changes the correlation even when the dependence structure does
    not (Boyer, Gibson & Loretan 1999, "Pitfalls in tests for changes in correlations",
    Federal Reserve Board Int. Finance Discussion Paper 597 (number from memory)): for a
    bivariate normal with rho = 0.5, conditioning on |X| above its upper quartile gives 0.62
    and below it 0.21. Compare conditional correlations with the value the
    fitted model implies for the same region, not with the unconditional correlation.

    Examples
    --------
    >>> x = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0])
    >>> r = conditional_correlation(x, [2.0, 1.0, 4.0, 3.0, 6.0, 5.0], x > 2, min_count=3)
    >>> round(float(r.correlation), 12), int(r.count), str(r.reason)
    (0.6, 4, '')
    """
    _check_min_count(min_count)
    a, b = _as_pair(x, y, ("x", "y"), min_n=1)
    if not (np.isfinite(a).all() and np.isfinite(b).all()):
        raise ValueError("x and y must be finite for a correlation")
    mask = np.asarray(where)
    if mask.dtype != bool:
        raise TypeError(f"where must be a boolean mask, got dtype {mask.dtype}")
    try:
        shape = np.broadcast_shapes(a.shape, mask.shape)
    except ValueError:
        raise ValueError(f"where {mask.shape} does not broadcast against x {a.shape}") from None
    corr, count, reason = _masked_correlation(
        np.broadcast_to(a, shape), np.broadcast_to(b, shape), np.broadcast_to(mask, shape),
        min_count,
    )
    return ConditionalCorrelation(read_only(corr), read_only(count), read_only(reason))


def exceedance_correlation(x: ArrayLike, y: ArrayLike, xi: ArrayLike, *,
                           scale: str = "standardised", min_count: int = 10
                           ) -> ExceedanceCorrelation:
    """Exceedance correlations above and below a common threshold (Longin-Solnik).

    Parameters
    ----------
    x, y : array_like
        Paired returns (or standardised residuals) along the last axis.
    xi : float or array_like
        Threshold(s), signed. Broadcasts against the batch shape; to get a curve for every
        window pass ``xi`` with a trailing singleton axis, e.g. ``xi[:, None]`` for a batch of
        shape ``(windows,)``, giving results of shape ``(len(xi), windows)``.
    scale : {"standardised", "quantile", "data"}
        Where ``xi`` applies. ``"standardised"`` (default): to each window's x and y centred by
        its mean and divided by its standard deviation (ddof = 1), so xi is in standard
        deviations. ``"quantile"``: to the pseudo-observations, so xi is a quantile level in
        (0, 1) and X > xi means X above its empirical xi-quantile (Ang & Chen 2002). ``"data"``:
        to x and y as given (e.g. GARCH standardised residuals).
    min_count : int
        Fewer joint exceedances than this give NaN with a reason (default 10, at least 3).

    Returns
    -------
    ExceedanceCorrelation
        ``upper`` = rho+(xi), ``lower`` = rho-(xi), the joint-exceedance counts and reasons.

    Raises
    ------
    ValueError
        For non-finite input, an unknown ``scale`` or a quantile level outside (0, 1).

    Notes
    -----
    Convention (Longin & Solnik 2001, *J. Finance* 56, 649-676; Ang & Chen 2002, *J. Financial
    Econ.* 63, 443-494), with the same signed threshold on both sides:

    .. math:: \\rho^+(\\xi) = \\mathrm{corr}(X, Y \\mid X > \\xi, Y > \\xi), \\qquad
              \\rho^-(\\xi) = \\mathrm{corr}(X, Y \\mid X < \\xi, Y < \\xi)

    Downside against upside at distance d is therefore ``lower`` at ``xi = -d`` against
    ``upper`` at ``xi = +d`` (for a symmetric distribution rho-(-d) = rho+(d)); on the
    quantile scale, ``lower`` at q against ``upper`` at 1 - q. The correlation itself is the
    Pearson correlation of the returns in the region (it does not depend on the
    standardisation). Even under normality it falls towards 0 as |xi| grows (bivariate normal,
    rho = 0.5: rho+(0) = 0.27, rho+(1) = 0.18), so compare with a model benchmark, not with
    the unconditional correlation (see :func:`conditional_correlation`).

    Examples
    --------
    >>> x = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0]
    >>> res = exceedance_correlation(x, [2.0, 1.0, 4.0, 3.0, 6.0, 5.0], 0.0)
    >>> int(res.count_upper), str(res.reason_upper)
    (2, 'fewer than 10 observations in the region')
    """
    _check_min_count(min_count)
    if scale not in _SCALES:
        raise ValueError(f"scale must be one of {', '.join(_SCALES)}; got {scale!r}")
    a, b = _as_pair(x, y, ("x", "y"), min_n=2)
    if not (np.isfinite(a).all() and np.isfinite(b).all()):
        raise ValueError("x and y must be finite for an exceedance correlation")
    level = np.asarray(xi, dtype=float)
    if not np.isfinite(level).all():
        raise ValueError("xi must be finite")
    za, zb, constant = _on_threshold_scale(a, b, level, scale)
    try:
        shape = np.broadcast_shapes(a.shape[:-1], level.shape)
    except ValueError:
        raise ValueError(
            f"xi of shape {level.shape} does not broadcast against the batch shape {a.shape[:-1]}"
        ) from None
    t = np.broadcast_to(level, shape)[..., None]
    full = shape + a.shape[-1:]
    xa, xb = np.broadcast_to(a, full), np.broadcast_to(b, full)
    up = (za > t) & (zb > t)
    down = (za < t) & (zb < t)
    upper, n_up, why_up = _masked_correlation(xa, xb, up, min_count)
    lower, n_down, why_down = _masked_correlation(xa, xb, down, min_count)
    if constant.any():
        c = np.broadcast_to(constant, shape)
        upper, lower = np.where(c, np.nan, upper), np.where(c, np.nan, lower)
        why_up = np.where(c, "x or y is constant in the window", why_up)
        why_down = np.where(c, "x or y is constant in the window", why_down)
    return ExceedanceCorrelation(
        xi=read_only(t[..., 0]),
        scale=scale,
        upper=read_only(upper),
        lower=read_only(lower),
        count_upper=read_only(n_up),
        count_lower=read_only(n_down),
        reason_upper=read_only(why_up),
        reason_lower=read_only(why_down),
    )


def _on_threshold_scale(a: NDArray[np.float64], b: NDArray[np.float64],
                        level: NDArray[np.float64], scale: str
                        ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.bool_]]:
    """``x`` and ``y`` on the scale the thresholds apply to (see
    :func:`exceedance_correlation`), and the windows where x or y is constant (only the
    standardised scale marks them; their values are then 0)."""
    constant = np.zeros(a.shape[:-1], dtype=bool)
    if scale == "standardised":
        sa = a.std(axis=-1, ddof=1, keepdims=True)
        sb = b.std(axis=-1, ddof=1, keepdims=True)
        constant = (sa[..., 0] <= 0.0) | (sb[..., 0] <= 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            za = (a - a.mean(axis=-1, keepdims=True)) / sa
            zb = (b - b.mean(axis=-1, keepdims=True)) / sb
        return (np.where(constant[..., None], 0.0, za), np.where(constant[..., None], 0.0, zb),
                constant)
    if scale == "quantile":
        bad = ~((level > 0.0) & (level < 1.0))
        if bad.any():
            raise ValueError(f"quantile levels xi must lie in (0, 1); found {level[bad].flat[0]!r}")
        return pseudo_observations(a), pseudo_observations(b), constant
    return a, b, constant


def wilson_interval(share: ArrayLike, n: ArrayLike, level: float = 0.95
                    ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Wilson score interval of a binomial proportion ``share`` observed on ``n`` trials.

    Parameters
    ----------
    share : array_like
        Observed proportions, in [0, 1].
    n : array_like
        Trials (e.g. the window's days).
    level : float
        Coverage, in (0, 1).

    Returns
    -------
    (ndarray, ndarray)
        Lower and upper ends, in [0, 1].

    Notes
    -----
    (p + z^2/2n -+ z sqrt(p(1 - p)/n + z^2/4n^2)) / (1 + z^2/n), z the normal quantile
    (Wilson 1927, "Probable inference, the law of succession, and statistical inference",
    *J. Amer. Statist. Assoc.* 22, 209-212). Unlike p -+ z se it stays inside [0, 1] and is
    not empty when no joint exceedance was seen, which is common in a tail.
    """
    if not 0 < level < 1:
        raise ValueError(f"level must lie in (0, 1), got {level!r}")
    z = float(stats.norm.ppf(0.5 + level / 2))
    p = np.clip(np.asarray(share, dtype=float), 0.0, 1.0)
    m = np.asarray(n, dtype=float)
    z2n = z * z / m
    centre = p + z2n / 2
    half = z * np.sqrt(p * (1 - p) / m + z2n / (4 * m))
    return (np.clip((centre - half) / (1 + z2n), 0.0, 1.0),
            np.clip((centre + half) / (1 + z2n), 0.0, 1.0))


def tail_share_interval(share: ArrayLike, n: ArrayLike, q: ArrayLike, level: float = 0.95
                        ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Wilson interval of a joint tail share ``P(U <= q, V <= q)``, kept inside [0, q].

    Parameters
    ----------
    share : array_like
        Observed share of the ``n`` days with both pseudo-observations in the tail (lower:
        both at or below ``q``; upper: both above ``1 - q``).
    n : array_like
        Days in the window.
    q : array_like
        Tail level(s) in (0, 1); broadcast against ``share``.
    level : float
        Coverage, in (0, 1).

    Returns
    -------
    (ndarray, ndarray)
        Lower and upper ends, in [0, q]. Dividing by ``q`` gives an interval of the tail
        concordance ``C(q, q)/q`` in [0, 1].

    Notes
    -----
    :func:`wilson_interval` treats the share as a binomial proportion on [0, 1] (Wilson 1927,
    *J. Amer. Statist. Assoc.* 22, 209-212). A copula's diagonal cannot exceed either margin:
    ``C(q, q) <= min(q, q) = q`` (the Frechet-Hoeffding upper bound, Nelsen 2006, *An
    Introduction to Copulas*, Theorem 2.2.3), so the interval is clipped to [0, q]; the
    clipping only ever acts on the upper end, when the sample share is close to ``q`` (every
    tail day of one asset is a tail day of the other).
    """
    qq = np.asarray(q, dtype=float)
    if np.any(~((qq > 0) & (qq < 1))):
        raise ValueError(f"q must lie in (0, 1), got {q!r}")
    lo, hi = wilson_interval(share, n, level)
    return np.clip(lo, 0.0, qq), np.clip(hi, 0.0, qq)
