"""Base class shared by every bivariate copula family.

A family is a *stateless* object: parameters are always passed explicitly, as a tuple of
array-likes in the order of :attr:`CopulaFamily.param_names` (or a mapping by name). The only
thing an instance holds is its rotation (0, 90, 180 or 270 degrees, counter-clockwise), which is
structural rather than a parameter.

Public methods validate and broadcast once, then call private ``_`` methods that are pure,
vectorised NumPy on already-valid input and implement the *unrotated* copula. Parameters
broadcast against data, so a family can be evaluated on arrays of shape ``(windows, n)`` with
parameters of shape ``(windows, 1)``.

Conventions (Nelsen 2006, *An Introduction to Copulas*, 2nd ed., section 2.6 for rotations):

- ``h_v_given_u(u, v) = dC(u, v)/du = P(V <= v | U = u)``
- ``h_u_given_v(u, v) = dC(u, v)/dv = P(U <= u | V = v)``
- rotation 180 is the survival copula ``C180(u, v) = u + v - 1 + C(1-u, 1-v)``;
  rotation 90 is ``C90(u, v) = v - C(1-u, v)``; rotation 270 is ``C270(u, v) = u - C(u, 1-v)``.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable, Mapping, Sequence
from typing import ClassVar, Generic, NamedTuple, TypeVar

import numpy as np
from numpy.typing import ArrayLike, NDArray

Params = tuple[NDArray[np.float64], ...]
#: A family's table of parameter-free transforms of the rank-grid points (see :class:`GridData`).
TableT = TypeVar("TableT")

#: Smallest distance from 0 or 1 at which densities and h-functions are evaluated.
UNIT_EPS = 1e-15

_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(200)
#: Gauss-Legendre nodes and weights on (0, 1), used by the numerical defaults.
QUAD_NODES = 0.5 * (_GL_NODES + 1.0)
QUAD_WEIGHTS = 0.5 * _GL_WEIGHTS


class CopulaFamily(ABC):
    """A bivariate parametric copula family, optionally rotated.

    Subclasses set the class attributes and implement at least ``_cdf``, ``_logpdf``,
    ``_h_u_given_v`` and ``_kendall_tau``; numerical defaults exist for everything else and
    closed forms override them where they exist.

    Parameters
    ----------
    rotation : {0, 90, 180, 270}
        Counter-clockwise rotation in degrees; must be one of :attr:`rotations`.
    """

    #: Registry name, e.g. ``"clayton"``.
    name: ClassVar[str] = ""
    #: Parameter names in the order the private methods take them.
    param_names: ClassVar[tuple[str, ...]] = ()
    #: Closed domain of each parameter as ``(lower, upper)``; ``lower_open``/``upper_open`` say
    #: whether an end point is excluded.
    domain: ClassVar[tuple[tuple[float, float], ...]] = ()
    domain_open: ClassVar[tuple[tuple[bool, bool], ...]] = ()
    #: Finite box used by the estimators (a sub-box of the domain).
    fit_bounds: ClassVar[tuple[tuple[float, float], ...]] = ()
    #: Rotations that give a different family (0 is always allowed).
    rotations: ClassVar[tuple[int, ...]] = (0,)

    __slots__ = ("rotation",)
    #: Counter-clockwise rotation in degrees (set once, in ``__init__``).
    rotation: int

    def __init__(self, rotation: int = 0) -> None:
        if isinstance(rotation, bool) or not isinstance(rotation, int | np.integer):
            raise TypeError(f"rotation must be an int, got {type(rotation).__name__}")
        if int(rotation) not in self.rotations:
            raise ValueError(
                f"{self.name} copula does not support rotation {rotation}; "
                f"allowed: {', '.join(map(str, self.rotations))}"
            )
        object.__setattr__(self, "rotation", int(rotation))

    def __setattr__(self, key: str, value: object) -> None:
        raise AttributeError(f"{type(self).__name__} is immutable")

    def __repr__(self) -> str:
        return f"{type(self).__name__}(rotation={self.rotation})"

    def __eq__(self, other: object) -> bool:
        return isinstance(other, CopulaFamily) and type(other) is type(self) \
            and other.rotation == self.rotation

    def __hash__(self) -> int:
        return hash((type(self).__name__, self.rotation))

    @property
    def n_params(self) -> int:
        """Number of parameters."""
        return len(self.param_names)

    @property
    def label(self) -> str:
        """Human-readable name with rotation, e.g. ``clayton`` or ``clayton 180``."""
        return self.name if self.rotation == 0 else f"{self.name} {self.rotation}"

    # ------------------------------------------------------------------ validation helpers
    def as_params(self, params: Sequence[ArrayLike] | Mapping[str, ArrayLike]) -> Params:
        """Validate parameters and return them as a tuple of float arrays.

        Parameters
        ----------
        params : sequence or mapping
            Values in the order of :attr:`param_names`, or a mapping by name.

        Raises
        ------
        TypeError
            If ``params`` is neither a sequence nor a mapping.
        ValueError
            If a parameter is missing, not finite or outside its domain.
        """
        if isinstance(params, Mapping):
            missing = [p for p in self.param_names if p not in params]
            extra = [p for p in params if p not in self.param_names]
            if missing or extra:
                raise ValueError(
                    f"{self.name} copula takes parameters {list(self.param_names)}; "
                    f"missing {missing}, unexpected {extra}"
                )
            values = [params[p] for p in self.param_names]
        elif isinstance(params, Sequence | np.ndarray) and not isinstance(params, str):
            values = list(params)
            if len(values) != self.n_params:
                raise ValueError(
                    f"{self.name} copula takes {self.n_params} parameter(s) "
                    f"{list(self.param_names)}, got {len(values)}"
                )
        else:
            raise TypeError(f"params must be a sequence or mapping, got {type(params).__name__}")
        out = []
        for name, value, (lo, hi), (lo_open, hi_open) in zip(
            self.param_names, values, self.domain, self.domain_open, strict=True
        ):
            arr = np.asarray(value, dtype=float)
            bad = ~np.isfinite(arr)
            bad |= (arr <= lo) if lo_open else (arr < lo)
            bad |= (arr >= hi) if hi_open else (arr > hi)
            if np.any(bad):
                first = float(arr[bad].flat[0]) if arr.ndim else float(arr)
                lb = "(" if lo_open else "["
                rb = ")" if hi_open else "]"
                raise ValueError(
                    f"{self.name} copula parameter {name}={first!r} is outside {lb}{lo}, {hi}{rb}"
                )
            out.append(arr)
        return tuple(out)

    @staticmethod
    def _unit(x: ArrayLike, name: str, *, closed: bool) -> NDArray[np.float64]:
        arr = np.asarray(x, dtype=float)
        if closed:
            bad = ~((arr >= 0.0) & (arr <= 1.0))
        else:
            bad = ~((arr > 0.0) & (arr < 1.0))
        if np.any(bad):
            interval = "[0, 1]" if closed else "(0, 1)"
            raise ValueError(f"{name} must lie in {interval}; found {float(arr[bad].flat[0])!r}")
        return np.clip(arr, UNIT_EPS, 1.0 - UNIT_EPS)

    # ------------------------------------------------------------------ public, rotated API
    def cdf(self, u: ArrayLike, v: ArrayLike, params) -> NDArray[np.float64]:
        """Copula distribution function C(u, v)."""
        u = self._unit(u, "u", closed=True)
        v = self._unit(v, "v", closed=True)
        p = self.as_params(params)
        return self._rot_cdf(u, v, p)

    def logpdf(self, u: ArrayLike, v: ArrayLike, params) -> NDArray[np.float64]:
        """Log copula density log c(u, v); finite for u, v in (0, 1)."""
        u = self._unit(u, "u", closed=False)
        v = self._unit(v, "v", closed=False)
        p = self.as_params(params)
        ru, rv = self._rotate_uv(u, v)
        return self._logpdf(ru, rv, p)

    def pdf(self, u: ArrayLike, v: ArrayLike, params) -> NDArray[np.float64]:
        """Copula density c(u, v)."""
        return np.exp(self.logpdf(u, v, params))

    def h_v_given_u(self, u: ArrayLike, v: ArrayLike, params) -> NDArray[np.float64]:
        """h-function dC(u, v)/du = P(V <= v | U = u)."""
        u = self._unit(u, "u", closed=False)
        v = self._unit(v, "v", closed=False)
        p = self.as_params(params)
        r = self.rotation
        if r == 0:
            return self._h_v_given_u(u, v, p)
        if r == 90:
            return self._h_v_given_u(1.0 - u, v, p)
        if r == 180:
            return 1.0 - self._h_v_given_u(1.0 - u, 1.0 - v, p)
        return 1.0 - self._h_v_given_u(u, 1.0 - v, p)

    def h_u_given_v(self, u: ArrayLike, v: ArrayLike, params) -> NDArray[np.float64]:
        """h-function dC(u, v)/dv = P(U <= u | V = v)."""
        u = self._unit(u, "u", closed=False)
        v = self._unit(v, "v", closed=False)
        p = self.as_params(params)
        r = self.rotation
        if r == 0:
            return self._h_u_given_v(u, v, p)
        if r == 90:
            return 1.0 - self._h_u_given_v(1.0 - u, v, p)
        if r == 180:
            return 1.0 - self._h_u_given_v(1.0 - u, 1.0 - v, p)
        return self._h_u_given_v(u, 1.0 - v, p)

    def h_v_given_u_inverse(self, w: ArrayLike, u: ArrayLike, params) -> NDArray[np.float64]:
        """Inverse of :meth:`h_v_given_u` in v: the v with P(V <= v | U = u) = w."""
        w = self._unit(w, "w", closed=False)
        u = self._unit(u, "u", closed=False)
        p = self.as_params(params)
        r = self.rotation
        if r == 0:
            return self._h_v_given_u_inverse(w, u, p)
        if r == 90:
            return self._h_v_given_u_inverse(w, 1.0 - u, p)
        if r == 180:
            return 1.0 - self._h_v_given_u_inverse(1.0 - w, 1.0 - u, p)
        return 1.0 - self._h_v_given_u_inverse(1.0 - w, u, p)

    def h_u_given_v_inverse(self, w: ArrayLike, v: ArrayLike, params) -> NDArray[np.float64]:
        """Inverse of :meth:`h_u_given_v` in u: the u with P(U <= u | V = v) = w."""
        w = self._unit(w, "w", closed=False)
        v = self._unit(v, "v", closed=False)
        p = self.as_params(params)
        r = self.rotation
        if r == 0:
            return self._h_u_given_v_inverse(w, v, p)
        if r == 90:
            return 1.0 - self._h_u_given_v_inverse(1.0 - w, v, p)
        if r == 180:
            return 1.0 - self._h_u_given_v_inverse(1.0 - w, 1.0 - v, p)
        return self._h_u_given_v_inverse(w, 1.0 - v, p)

    def sample(self, n: int, params, rng: np.random.Generator | int | None = None
               ) -> NDArray[np.float64]:
        """Draw ``n`` pairs by conditional inversion; returns an array of shape ``(n, 2)``.

        Parameters must be scalars here. ``rng`` is a NumPy Generator or a seed.
        """
        if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 1:
            raise ValueError(f"n must be a positive integer, got {n!r}")
        p = self.as_params(params)
        if any(a.ndim for a in p):
            raise ValueError("sample takes scalar parameters")
        gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
        uv = self._sample(int(n), p, gen)
        u, v = uv[:, 0], uv[:, 1]
        r = self.rotation
        if r == 90:
            u = 1.0 - u
        elif r == 180:
            u, v = 1.0 - u, 1.0 - v
        elif r == 270:
            v = 1.0 - v
        return np.column_stack([u, v])

    def kendall_tau(self, params) -> NDArray[np.float64]:
        """Kendall's tau implied by the parameters."""
        tau = self._kendall_tau(self.as_params(params))
        return -tau if self.rotation in (90, 270) else tau

    def spearman_rho(self, params) -> NDArray[np.float64]:
        """Spearman's rho implied by the parameters."""
        rho = self._spearman_rho(self.as_params(params))
        return -rho if self.rotation in (90, 270) else rho

    def tail_lower(self, params) -> NDArray[np.float64]:
        """Lower tail dependence lim_{q->0} C(q, q)/q."""
        p = self.as_params(params)
        if self.rotation in (90, 270):
            return np.zeros(np.broadcast_shapes(*(a.shape for a in p)))
        return self._tail_upper(p) if self.rotation == 180 else self._tail_lower(p)

    def tail_upper(self, params) -> NDArray[np.float64]:
        """Upper tail dependence lim_{q->0} P(U > 1-q, V > 1-q)/q."""
        p = self.as_params(params)
        if self.rotation in (90, 270):
            return np.zeros(np.broadcast_shapes(*(a.shape for a in p)))
        return self._tail_lower(p) if self.rotation == 180 else self._tail_upper(p)

    def params_from_tau(self, tau: ArrayLike) -> Params:
        """Parameters with the given Kendall's tau (one-parameter families; for two-parameter
        families the starting rule documented on the family)."""
        tau = np.asarray(tau, dtype=float)
        if np.any(~np.isfinite(tau)) or np.any(np.abs(tau) >= 1.0):
            raise ValueError("tau must lie in (-1, 1)")
        if self.rotation in (90, 270):
            tau = -tau
        params = self._params_from_tau(tau)
        try:
            return self.as_params(params)
        except ValueError:
            raise ValueError(f"{self.label} copula cannot reach every tau in "
                             f"{np.unique(np.round(tau, 6)).tolist()[:5]}") from None

    def start_params(self, tau: ArrayLike) -> Params:
        """Starting values for estimation from a sample Kendall's tau, inside :attr:`fit_bounds`."""
        t = np.clip(np.asarray(tau, dtype=float), -0.98, 0.98)
        if self.rotation in (90, 270):
            t = -t
        p = self._start_params(t)
        return tuple(np.clip(a, lo, hi) for a, (lo, hi) in zip(p, self.fit_bounds, strict=True))

    # ------------------------------------------------------------------ rotation plumbing
    def _rotate_uv(self, u, v):
        """Map (u, v) to the arguments of the unrotated density."""
        r = self.rotation
        if r == 0:
            return u, v
        if r == 90:
            return 1.0 - u, v
        if r == 180:
            return 1.0 - u, 1.0 - v
        return u, 1.0 - v

    def _rot_cdf(self, u, v, p):
        r = self.rotation
        if r == 0:
            c = self._cdf(u, v, p)
        elif r == 90:
            c = v - self._cdf(1.0 - u, v, p)
        elif r == 180:
            c = u + v - 1.0 + self._cdf(1.0 - u, 1.0 - v, p)
        else:
            c = u - self._cdf(u, 1.0 - v, p)
        # Frechet-Hoeffding bounds hold exactly; clip rounding noise.
        return np.clip(c, np.maximum(u + v - 1.0, 0.0), np.minimum(u, v))

    def rotated_logpdf(self, u: NDArray, v: NDArray, p: Params) -> NDArray[np.float64]:
        """Log density on already-valid input (no checks): the estimators' fast path."""
        ru, rv = self._rotate_uv(u, v)
        return self._logpdf(ru, rv, p)

    # ------------------------------------------------------------------ estimator hooks
    def prepare(self, u: NDArray, v: NDArray, grid: tuple | None = None) -> tuple:
        """Per-window data the likelihood needs, computed once before an optimisation.

        ``u`` and ``v`` have shape ``(windows, n)`` and are already valid pseudo-observations;
        ``grid`` optionally holds their :func:`rank_grid` ranks (a pair, either None when not
        on the grid), which a caller fitting several families computes once. The default
        keeps the rotated data; families override it to cache transforms (logs, normal
        scores) or sufficient statistics. The result must be accepted by :meth:`take` and
        :meth:`loglik_prepared`.
        """
        return self._rotate_uv(u, v)

    def _grid_ranks(self, u: NDArray, v: NDArray, grid: tuple | None
                    ) -> tuple[NDArray[np.intp], NDArray[np.intp]] | None:
        """:func:`rank_grid` ranks of the rotated (u, v) (as :meth:`_rotate_uv` rotates them),
        from ``grid`` or computed; None unless both are on the grid."""
        ru, rv = grid if grid is not None else (rank_grid(u), rank_grid(v))
        if ru is None or rv is None:
            return None
        top = u.shape[-1] - 1  # the rank of 1 - u is n - 1 minus the rank of u
        if self.rotation in (90, 180):
            ru = top - ru
        if self.rotation in (180, 270):
            rv = top - rv
        return ru, rv

    def _grid_data(self, u: NDArray, v: NDArray, grid: tuple | None,
                   table: Callable[[NDArray], TableT]) -> GridData[TableT] | None:
        """:class:`GridData` of the rotated (u, v) with ``table(points)`` of the grid points
        i/(n+1), or None when the data are not on the grid."""
        ranks = self._grid_ranks(u, v, grid)
        if ranks is None:
            return None
        n = u.shape[-1]
        return GridData(ranks[0].astype(np.int32), ranks[1].astype(np.int32),
                        table(np.arange(1, n + 1) / (n + 1.0)))

    def take(self, data: tuple, index: NDArray | slice) -> tuple:
        """The prepared data of the windows ``index`` (a subset for the active windows)."""
        if isinstance(data, GridData):
            return GridData(data.ru[index], data.rv[index], data.table)
        return tuple(a[index] for a in data)

    def loglik_prepared(self, data: tuple, p: Params) -> NDArray[np.float64]:
        """Pseudo-log-likelihood of each window, shape ``(windows,)``; parameters have shape
        ``(windows,)``."""
        u, v = data
        return np.sum(self._logpdf(u, v, tuple(a[:, None] for a in p)), axis=-1)

    # ------------------------------------------------------------------ private defaults
    @abstractmethod
    def _cdf(self, u, v, p):
        """C(u, v) of the unrotated copula."""

    @abstractmethod
    def _logpdf(self, u, v, p):
        """log c(u, v) of the unrotated copula."""

    @abstractmethod
    def _h_u_given_v(self, u, v, p):
        """dC(u, v)/dv of the unrotated copula."""

    def _h_v_given_u(self, u, v, p):
        # Every family here is exchangeable: C(u, v) = C(v, u).
        return self._h_u_given_v(v, u, p)

    def _h_u_given_v_inverse(self, w, v, p):
        return _invert_increasing(lambda x: self._h_u_given_v(x, v, p), w)

    def _h_v_given_u_inverse(self, w, u, p):
        return self._h_u_given_v_inverse(w, u, p)

    def _sample(self, n, p, rng):
        u = rng.uniform(size=n)
        w = rng.uniform(size=n)
        u = np.clip(u, UNIT_EPS, 1 - UNIT_EPS)
        w = np.clip(w, UNIT_EPS, 1 - UNIT_EPS)
        v = self._h_v_given_u_inverse(w, u, p)
        return np.column_stack([u, v])

    def _kendall_tau(self, p):
        """tau = 1 - 4 * int int dC/du * dC/dv du dv (Nelsen 2006, Thm 5.1.1 corollary)."""
        x = QUAD_NODES[:, None]
        y = QUAD_NODES[None, :]
        w = QUAD_WEIGHTS[:, None] * QUAD_WEIGHTS[None, :]
        pe = tuple(np.asarray(a)[..., None, None] for a in p)
        integrand = self._h_v_given_u(x, y, pe) * self._h_u_given_v(x, y, pe)
        return 1.0 - 4.0 * np.sum(integrand * w, axis=(-2, -1))

    def _spearman_rho(self, p):
        """rho_S = 12 * int int C(u, v) du dv - 3 (Nelsen 2006, eq. 5.1.15c), by quadrature."""
        x = QUAD_NODES[:, None]
        y = QUAD_NODES[None, :]
        w = QUAD_WEIGHTS[:, None] * QUAD_WEIGHTS[None, :]
        pe = tuple(np.asarray(a)[..., None, None] for a in p)
        return 12.0 * np.sum(self._cdf(x, y, pe) * w, axis=(-2, -1)) - 3.0

    def _tail_lower(self, p):
        return np.zeros(np.broadcast_shapes(*(np.shape(a) for a in p)))

    def _tail_upper(self, p):
        return np.zeros(np.broadcast_shapes(*(np.shape(a) for a in p)))

    def _params_from_tau(self, tau):
        """Numerical inversion of tau for a one-parameter family, by bisection in the fit box."""
        if self.n_params != 1:
            raise ValueError(f"{self.name}: tau does not determine its parameters")
        lo, hi = self.fit_bounds[0]
        tau = np.asarray(tau, dtype=float)
        a = np.full(tau.shape, lo)
        b = np.full(tau.shape, hi)
        for _ in range(80):
            m = 0.5 * (a + b)
            below = self._kendall_tau((m,)) < tau
            a = np.where(below, m, a)
            b = np.where(below, b, m)
        return (0.5 * (a + b),)

    def _start_params(self, tau):
        return self._params_from_tau(tau)


def _invert_increasing(func, target, lo: float = UNIT_EPS, hi: float = 1 - UNIT_EPS,
                       iterations: int = 60):
    """Solve func(x) = target for x in (lo, hi), func increasing; vectorised bisection in
    logit space (60 halvings reach double precision over the unit interval's scale)."""
    target = np.asarray(target, dtype=float)
    a = np.full(np.broadcast_shapes(target.shape, np.shape(func(np.full(target.shape, 0.5)))),
                np.log(lo / (1 - lo)))
    b = np.full(a.shape, np.log(hi / (1 - hi)))
    for _ in range(iterations):
        m = 0.5 * (a + b)
        x = 1.0 / (1.0 + np.exp(-m))
        below = func(x) < target
        a = np.where(below, m, a)
        b = np.where(below, b, m)
    m = 0.5 * (a + b)
    return 1.0 / (1.0 + np.exp(-m))


class GridData(NamedTuple, Generic[TableT]):
    """Prepared data of windows on the rank grid: both margins of every window are
    permutations of the same n points i/(n+1), so a family evaluates its per-margin
    transforms once per window on the grid and gathers them by rank.

    ``ru``, ``rv``: 0-based ranks, shape (windows, n) (int32: half the bytes to copy when the
    estimator takes active windows); ``table``: the family's parameter-free transforms of the
    grid points (shared by all windows).
    """

    ru: NDArray[np.int32]
    rv: NDArray[np.int32]
    table: TableT


def gather(values: NDArray, ranks: NDArray) -> NDArray:
    """``values[w, ranks[w, i]]`` for a (windows, n) table: np.take by flat index, several
    times faster than ``take_along_axis``."""
    flat = np.arange(0, values.size, values.shape[-1])[:, None]
    return np.take(values, ranks + flat)


def rank_grid(u: NDArray) -> NDArray[np.intp] | None:
    """0-based ranks if every row of ``u`` (shape (windows, n)) is a permutation of the grid
    1/(n+1), ..., n/(n+1) -- pseudo-observations without ties -- else None."""
    n = u.shape[-1]
    scaled = u * (n + 1)
    ranks = np.rint(scaled)
    scaled -= ranks
    if not np.abs(scaled).max(initial=0.0) < 1e-6:
        return None
    ranks = ranks.astype(np.intp)
    ranks -= 1
    if ranks.size and (ranks.min() < 0 or ranks.max() >= n):
        return None
    seen = np.zeros(ranks.size, dtype=bool)
    seen[(ranks.reshape(-1, n) + np.arange(0, ranks.size, n)[:, None]).ravel()] = True
    return ranks if seen.all() else None
