"""Maximum pseudo-likelihood estimation of copula families, batched over windows.

The estimator is the maximum pseudo-likelihood (canonical maximum likelihood) estimator of
Genest, Ghoudi & Rivest (1995, *Biometrika* 82, 543-552): maximise sum_i log c(U_i, V_i; theta)
over the parameters, with U, V the rank pseudo-observations. It starts from tau inversion.

The batched estimator fits one family on many windows at once (arrays of shape
``(windows, n)``): a vectorised trust-region Newton method in transformed coordinates, with
finite-difference derivatives of the summed log-likelihood and the bounds of the family's fit
box enforced by projection. Every window carries its own trust radius, convergence flag and
iteration count; only windows still running are evaluated. :func:`fit_copula_reference` is an
independent one-window path through :func:`scipy.optimize.minimize` used to check it.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize

from monitor.common.arrays import read_only
from monitor.stats.copulas import CopulaFamily, family
from monitor.stats.copulas.base import UNIT_EPS, rank_grid
from monitor.stats.criteria import check_criterion, information_criterion
from monitor.stats.empirical import kendall_tau

#: Finite-difference steps in transformed coordinates: central differences for gradient and
#: Hessian, forward differences for a gradient alone under a borrowed Hessian.
_FD_STEP = 1e-4
_FD_GRADIENT_STEP = 1e-6
#: Numbers per block when evaluating log-likelihoods over many windows.
_BLOCK = 1 << 15
#: Newton stops after a step when it estimates less than this gain left (see _settled);
#: only local steps (predicted gain below _SETTLE_STEP) qualify.
_SETTLE_GAIN = 2.5e-5
_SETTLE_STEP = 1e-2
#: Newton iterations at most per window (default).
_MAX_ITER = 100


@dataclass(frozen=True, slots=True)
class BatchFit:
    """One family fitted on many windows.

    Attributes
    ----------
    family : str
        Family name.
    param_names : tuple of str
        Parameter names, the columns of ``params``.
    rotations : ndarray of int, shape (windows,)
        Rotation of each window's fit (differs between windows only when the rotation follows
        the sign of each window's tau).
    params : ndarray, shape (windows, k)
        Estimates.
    loglik : ndarray, shape (windows,)
        Maximised pseudo-log-likelihood.
    converged : ndarray of bool, shape (windows,)
        Whether the convergence criterion was met.
    iterations : ndarray of int, shape (windows,)
        Newton iterations used.
    n : int
        Observations per window.
    """

    family: str
    param_names: tuple[str, ...]
    rotations: NDArray[np.int64]
    params: NDArray[np.float64]
    loglik: NDArray[np.float64]
    converged: NDArray[np.bool_]
    iterations: NDArray[np.int64]
    n: int

    @property
    def n_params(self) -> int:
        return len(self.param_names)

    def score(self, criterion: str) -> NDArray[np.float64]:
        """The information criterion ("aic" or "bic") of every window (see
        :func:`monitor.stats.criteria.information_criterion`)."""
        return information_criterion(self.loglik, self.n_params, self.n, criterion)

    @property
    def aic(self) -> NDArray[np.float64]:
        """Akaike information criterion 2k - 2 loglik (Akaike 1974)."""
        return self.score("aic")

    @property
    def bic(self) -> NDArray[np.float64]:
        """Bayesian information criterion k log n - 2 loglik (Schwarz 1978)."""
        return self.score("bic")

    def window(self, i: int) -> CopulaFit:
        """The fit of window ``i`` as a :class:`CopulaFit`."""
        fam = family(self.family, int(self.rotations[i]))
        p = tuple(float(x) for x in self.params[i])
        return CopulaFit.from_estimate(fam, p, float(self.loglik[i]), self.n,
                                       bool(self.converged[i]), int(self.iterations[i]))


@dataclass(frozen=True, slots=True)
class CopulaFit:
    """One family fitted on one window, with the quantities a user asks for next.

    ``params`` maps parameter names to estimates; ``kendall_tau``, ``tail_lower`` and
    ``tail_upper`` are implied by the fitted parameters.
    """

    family: str
    rotation: int
    params: dict[str, float] = field(hash=False)
    loglik: float
    n: int
    converged: bool
    iterations: int
    kendall_tau: float
    tail_lower: float
    tail_upper: float

    @classmethod
    def from_estimate(cls, fam: CopulaFamily, p: tuple[float, ...], loglik: float, n: int,
                      converged: bool, iterations: int) -> CopulaFit:
        return cls(
            family=fam.name, rotation=fam.rotation,
            params=dict(zip(fam.param_names, p, strict=True)), loglik=loglik, n=n,
            converged=converged, iterations=iterations,
            kendall_tau=float(fam.kendall_tau(p)), tail_lower=float(fam.tail_lower(p)),
            tail_upper=float(fam.tail_upper(p)),
        )

    @property
    def copula(self) -> CopulaFamily:
        """The fitted family object (rotation included)."""
        return family(self.family, self.rotation)

    @property
    def param_tuple(self) -> tuple[float, ...]:
        return tuple(self.params.values())

    @property
    def n_params(self) -> int:
        return len(self.params)

    def score(self, criterion: str) -> float:
        """The information criterion ("aic" or "bic") of the fit (see
        :func:`monitor.stats.criteria.information_criterion`)."""
        return float(information_criterion(self.loglik, self.n_params, self.n, criterion))

    @property
    def aic(self) -> float:
        """Akaike information criterion 2k - 2 loglik (Akaike 1974)."""
        return self.score("aic")

    @property
    def bic(self) -> float:
        """Bayesian information criterion k log n - 2 loglik (Schwarz 1978)."""
        return self.score("bic")

    @property
    def label(self) -> str:
        return self.family if self.rotation == 0 else f"{self.family} {self.rotation}"

    @property
    def at_bound(self) -> tuple[str, ...]:
        """The parameters estimated at an end of the family's search box (``fit_bounds``),
        e.g. ``("theta lower",)``: the optimum may lie on or beyond that end, and the fit is
        the best inside the box. Empty for an interior optimum."""
        return bounds_hit(self.copula, self.param_tuple)


# ----------------------------------------------------------------------------- coordinates
def _coordinates(fam: CopulaFamily):
    """Per-parameter maps between parameters and the optimiser's coordinates.

    Parameters bounded below by 1 or more whose box spans more than a factor of ten (the t
    copula's nu, Gumbel's theta, ...) are optimised on the log scale, where their likelihoods
    are closer to quadratic; the others on their own scale. Parameters that may approach 0
    (Clayton's theta, BB1's theta) stay on their own scale: on the log scale an optimum near
    the lower end would be reached only in tiny steps.
    """
    logs = np.array([lo >= 1 and hi / lo >= 10 for lo, hi in fam.fit_bounds], dtype=bool)
    lo = np.array([b[0] for b in fam.fit_bounds], dtype=float)
    hi = np.array([b[1] for b in fam.fit_bounds], dtype=float)
    xlo = np.where(logs, np.log(np.where(logs, lo, 1.0)), lo)
    xhi = np.where(logs, np.log(np.where(logs, hi, 1.0)), hi)

    def to_x(p: NDArray) -> NDArray:
        p = np.clip(p, lo, hi)
        return np.where(logs, np.log(np.where(logs, p, 1.0)), p)

    def to_p(x: NDArray) -> NDArray:
        return np.clip(np.where(logs, np.exp(x), x), lo, hi)

    return xlo, xhi, to_x, to_p


#: Relative distance (in the optimiser's coordinates, per unit of the box's width) within
#: which an estimate counts as at an end of the search box.
BOUND_TOLERANCE = 1e-6


def bounds_hit(fam: CopulaFamily, params: tuple[float, ...]) -> tuple[str, ...]:
    """Which parameters of one fit sit at an end of ``fam.fit_bounds``.

    Parameters
    ----------
    fam : CopulaFamily
    params : tuple of float
        One estimate per parameter.

    Returns
    -------
    tuple of str
        ``"<name> lower"`` or ``"<name> upper"`` per parameter within
        :data:`BOUND_TOLERANCE` of that end (measured in the optimiser's coordinates).
    """
    if not params:
        return ()
    xlo, xhi, to_x, _ = _coordinates(fam)
    x = to_x(np.asarray(params, dtype=float))
    tol = BOUND_TOLERANCE * (xhi - xlo)
    out = []
    for name, xi, lo, hi, t in zip(fam.param_names, x, xlo, xhi, tol, strict=True):
        if xi <= lo + t:
            out.append(f"{name} lower")
        elif xi >= hi - t:
            out.append(f"{name} upper")
    return tuple(out)


def _validate_batch(u: ArrayLike, v: ArrayLike) -> tuple[NDArray, NDArray]:
    u = np.asarray(u, dtype=float)
    v = np.asarray(v, dtype=float)
    if u.ndim == 1:
        u = u[None, :]
    if v.ndim == 1:
        v = v[None, :]
    if u.shape != v.shape or u.ndim != 2:
        raise ValueError(f"u and v must both have shape (windows, n); got {u.shape} and {v.shape}")
    if u.shape[1] < 2:
        raise ValueError("each window needs at least 2 observations")
    for name, a in (("u", u), ("v", v)):
        bad = ~((a > 0) & (a < 1))
        if bad.any():
            w, i = np.argwhere(bad)[0]
            raise ValueError(f"{name}[{w}, {i}] = {float(a[w, i])!r} is not in (0, 1)")
    return np.clip(u, UNIT_EPS, 1 - UNIT_EPS), np.clip(v, UNIT_EPS, 1 - UNIT_EPS)


# ----------------------------------------------------------------------------- batched fit
def fit_batched(fam: CopulaFamily | str, u: ArrayLike, v: ArrayLike, *,
                start: ArrayLike | None = None, tau: ArrayLike | None = None,
                rotation_by_sign: bool = False, chain: int = 0,
                max_iter: int = _MAX_ITER) -> BatchFit:
    """Fit one family by maximum pseudo-likelihood on every window of a batch.

    Parameters
    ----------
    fam : CopulaFamily or str
        The family (with its rotation), or a family name.
    u, v : array_like, shape (windows, n) or (n,)
        Pseudo-observations in (0, 1), one window per row.
    start : array_like, shape (windows, k), optional
        Warm starts (e.g. the previous window's estimates); default (and on rows holding a
        NaN) the family's start from tau.
    tau : array_like, shape (windows,), optional
        Sample Kendall's tau of each window, if already known (used for the start and, with
        ``rotation_by_sign``, the rotation).
    rotation_by_sign : bool
        For a rotatable family given at rotation 0 or 180: use that rotation on windows with
        tau >= 0 and the rotation 90 degrees further (90 or 270) on windows with tau < 0, so
        that one call covers the sign of every window.
    chain : int
        When the rows are consecutive rolling windows: fit a coarse lattice of rows first
        (every ``chain``-th, or every ``chain**2``-th, ... row when there are many), then each
        ``chain`` times finer lattice and finally every row from its nearest fitted neighbour
        (overlapping windows have nearby optima and curvature, so Newton needs few steps).
        0 or 1 fits all rows from ``start``.
    max_iter : int
        Newton iterations at most per window.

    Returns
    -------
    BatchFit

    Notes
    -----
    Trust-region Newton with central finite differences (step 1e-4 in the transformed
    coordinates) for the gradient and diagonal Hessian and a forward cross difference;
    bounds by projection (a coordinate at a bound with the gradient pointing out is held);
    a non-concave local model is shifted by a multiple of the identity (Levenberg-Marquardt).
    A window converges when the concave local model predicts a gain below 1e-7 from a step
    below 1e-4, when an accepted step changes no coordinate by more than 1e-7 and the
    log-likelihood by less than 1e-9, when the projected gradient is below 1e-7, or once an
    accepted full step's gain agrees with its prediction closely enough that less than
    2.5e-5 nats are estimated to be left (``_SETTLE_GAIN``; see ``_settled``). Windows that
    hit ``max_iter`` are reported with ``converged`` False; their estimates are never
    replaced. With ``chain`` the later rows borrow a neighbour's Hessian for two iterations
    and use forward-difference gradients (step 1e-6) meanwhile.
    """
    fam = family(fam) if isinstance(fam, str) else fam
    u, v = _validate_batch(u, v)
    return _fit_valid(fam, u, v, start, tau, rotation_by_sign, chain, max_iter, None)


def _fit_valid(fam: CopulaFamily, u: NDArray, v: NDArray, start: ArrayLike | None,
               tau: ArrayLike | None, rotation_by_sign: bool, chain: int, max_iter: int,
               grid: tuple | None) -> BatchFit:
    """:func:`fit_batched` on validated data; ``grid`` optionally holds the rank-grid ranks
    of u and v (see :meth:`CopulaFamily.prepare`)."""
    windows, n = u.shape
    # The sample tau of each window, computed (on the data as given) when first needed.
    taus = None if tau is None else np.broadcast_to(np.asarray(tau, dtype=float), (windows,))
    rotations = np.full(windows, fam.rotation, dtype=np.int64)
    flip = np.zeros(windows, dtype=bool)
    if rotation_by_sign and len(fam.rotations) > 1:
        if fam.rotation not in (0, 180):
            raise ValueError("rotation_by_sign takes a family at rotation 0 or 180")
        if taus is None:
            taus = kendall_tau(u, v)
        flip = taus < 0
        rotations[flip] += 90
        u = np.where(flip[:, None], 1.0 - u, u)
        if grid is not None and grid[0] is not None:
            grid = (np.where(flip[:, None], n - 1 - grid[0], grid[0]), grid[1])
    k = fam.n_params
    if k == 0:
        ll = np.zeros(windows)
        return BatchFit(fam.name, fam.param_names, read_only(rotations),
                        read_only(np.zeros((windows, 0))), read_only(ll),
                        read_only(np.ones(windows, bool)),
                        read_only(np.zeros(windows, np.int64)), n)
    # NaN marks a row without a warm start.
    starts = (np.full((windows, k), np.nan) if start is None
              else np.broadcast_to(np.asarray(start, dtype=float), (windows, k)))
    # The first rows are the only ones fitted from ``starts``; missing ones start from tau.
    missing = np.isnan(starts).any(axis=1) & _first_rows(windows, chain)
    if missing.any():
        if taus is None:  # u is not flipped: flipping needed the taus
            taus = kendall_tau(u, v)
        t = np.where(flip, -taus, taus)[missing]
        starts = np.array(starts)
        starts[missing] = np.column_stack(fam.start_params(t))
    data = fam.prepare(u, v, grid)
    params, ll, conv, iters = _solve(fam, data, starts, chain, max_iter, n)
    return BatchFit(fam.name, fam.param_names, read_only(rotations), read_only(params),
                    read_only(ll), read_only(conv), read_only(iters), n)


def _chain_step(windows: int, chain: int) -> int:
    """Spacing of the coarsest lattice of rows fitted along a chain (1: no chain)."""
    if not (chain > 1 and windows > chain):
        return 1
    step = chain
    while step * chain * 4 <= windows:
        step *= chain
    return step


def _first_rows(windows: int, chain: int) -> NDArray[np.bool_]:
    """The rows fitted from the given starts (the coarsest lattice of a chain)."""
    rows = np.zeros(windows, dtype=bool)
    rows[::_chain_step(windows, chain)] = True
    return rows


def _solve(fam: CopulaFamily, data: tuple, start: NDArray, chain: int, max_iter: int, n: int
           ) -> tuple[NDArray, NDArray, NDArray[np.bool_], NDArray[np.int64]]:
    """:func:`_newton` on every row of ``start``, coarse to fine along the chain when
    ``chain`` asks for it (see :func:`fit_batched`)."""
    windows, k = start.shape
    step = _chain_step(windows, chain)
    if step == 1:
        return _newton(fam, data, start, max_iter, n)[:4]
    # Coarse to fine: the coarsest lattice of rows from the given starts, then each finer
    # lattice (and finally every row) from the nearest row already fitted -- its estimate
    # *and* its Hessian (overlapping windows have nearly the same curvature), so most rows
    # need only gradient evaluations and one trial point.
    params = np.empty((windows, k))
    ll = np.empty(windows)
    conv = np.empty(windows, dtype=bool)
    iters = np.empty(windows, dtype=np.int64)
    hess = np.empty((windows, k, k))
    done = np.zeros(windows, dtype=bool)
    while True:
        rows = np.arange(0, windows, step)
        rows = rows[~done[rows]]
        if not done.any():
            out = _newton(fam, fam.take(data, rows), start[rows], max_iter, n)
        else:
            fitted = np.flatnonzero(done)
            at = np.searchsorted(fitted, rows)
            left = fitted[np.clip(at - 1, 0, fitted.size - 1)]
            right = fitted[np.clip(at, 0, fitted.size - 1)]
            # Between two fitted rows: linear interpolation of their estimates and Hessians
            # (a convex combination stays inside the box); beyond the last: the nearest.
            span = np.maximum(right - left, 1)
            wr = np.clip((rows - left) / span, 0.0, 1.0)[:, None]
            x0 = (1 - wr) * params[left] + wr * params[right]
            h0 = (1 - wr[:, :, None]) * hess[left] + wr[:, :, None] * hess[right]
            out = _newton(fam, fam.take(data, rows), x0, max_iter, n, hess0=h0)
        params[rows], ll[rows], conv[rows], iters[rows], hess[rows] = out
        done[rows] = True
        if step == 1:
            return params, ll, conv, iters
        step = max(step // chain, 1)


def _newton(fam: CopulaFamily, data: tuple, start: NDArray, max_iter: int, n: int,
            hess0: NDArray | None = None
            ) -> tuple[NDArray, NDArray, NDArray[np.bool_], NDArray[np.int64], NDArray]:
    """Trust-region Newton on every window; returns estimates, logliks, flags, iterations and
    the last finite-difference Hessians (in the optimiser's coordinates).

    Without ``hess0`` the Hessian is recomputed (central differences) at every new point;
    with it, the given Hessian is kept for two iterations while steps succeed and only the
    gradient is taken (forward differences), the Hessian being recomputed after a rejected
    step or after those two iterations.

    Each iteration, on the windows still running: derivatives where the point is new
    (:func:`_refresh_derivatives`), a projected, trust-region-limited Newton step
    (:func:`_propose`), the log-likelihood at the trial point, and the update of points,
    radii and convergence flags (:func:`_take_step`).
    """
    xlo, xhi, to_x, to_p = _coordinates(fam)
    obj = _Objective(fam, data, xlo, xhi, to_p, max(1, _BLOCK // n))
    st = _NewtonState.at(obj, to_x(start.copy()), hess0)
    reuse = hess0 is not None
    for _ in range(max_iter):
        idx = np.flatnonzero(st.active)
        if idx.size == 0:
            break
        st.iterations[idx] += 1
        _refresh_derivatives(obj, st, idx)
        step = _propose(obj, st.x[idx], st.grad[idx].copy(), st.hess[idx].copy(),
                        st.radius[idx])
        fn = np.full(idx.size, -np.inf)
        trial = np.flatnonzero(~step.done)
        if trial.size:
            fn[trial] = obj.loglik(fam.take(data, idx[trial]), step.xn[trial])
        _take_step(st, idx, step, fn, reuse)
    return to_p(st.x), st.f, st.converged, st.iterations, st.hess


@dataclass(frozen=True, slots=True)
class _Objective:
    """The pseudo-log-likelihood of each window as a function of the optimiser's coordinates
    ``x`` (inside the box ``xlo``..``xhi``), with its finite-difference derivatives."""

    fam: CopulaFamily
    data: tuple
    xlo: NDArray
    xhi: NDArray
    to_p: Callable[[NDArray], NDArray]
    block_rows: int

    def loglik(self, d: tuple, x: NDArray) -> NDArray:
        """Log-likelihood of the windows of prepared data ``d`` at ``x`` (-inf where not
        finite)."""
        p = self.to_p(x)
        k, rows = p.shape[1], self.block_rows
        # Blocks of about 2**15 numbers stay in cache through the family's chain of NumPy
        # temporaries: markedly faster than one pass over all windows.
        val = np.concatenate([
            self.fam.loglik_prepared(self.fam.take(d, slice(lo, lo + rows)),
                                     tuple(p[lo:lo + rows, j] for j in range(k)))
            for lo in range(0, len(x), rows)
        ]) if len(x) else np.empty(0)
        return np.where(np.isfinite(val), val, -np.inf)

    def stencil(self, rows: NDArray[np.intp], x: NDArray, f: NDArray
                ) -> tuple[NDArray, NDArray]:
        """Central-difference gradient and Hessian of the windows ``rows`` at their points
        ``x`` (log-likelihoods ``f``), the stencil kept inside the box."""
        h = _FD_STEP
        k = x.shape[1]
        eye = np.eye(k)
        d = self.fam.take(self.data, rows)
        xc = np.clip(x, self.xlo + h, self.xhi - h)
        moved = np.any(xc != x, axis=1)
        fc = f.copy()
        if moved.any():
            fc[moved] = self.loglik(self.fam.take(d, np.flatnonzero(moved)), xc[moved])
        fp = np.column_stack([self.loglik(d, xc + h * eye[j]) for j in range(k)])
        fm = np.column_stack([self.loglik(d, xc - h * eye[j]) for j in range(k)])
        g = (fp - fm) / (2 * h)
        hs = np.zeros((rows.size, k, k))
        for j in range(k):
            hs[:, j, j] = (fp[:, j] - 2 * fc + fm[:, j]) / h**2
        if k == 2:
            cross = (self.loglik(d, xc + h * (eye[0] + eye[1])) - fp[:, 0] - fp[:, 1]
                     + fc) / h**2
            hs[:, 0, 1] = hs[:, 1, 0] = cross
        return np.where(np.isfinite(g), g, 0.0), np.where(np.isfinite(hs), hs, -1.0)

    def gradient(self, rows: NDArray[np.intp], x: NDArray, f: NDArray) -> NDArray:
        """Forward-difference gradient alone (the Hessian is kept), inside the box: its
        bias, half the step times the curvature, moves the optimum by about 5e-7."""
        hg = _FD_GRADIENT_STEP
        k = x.shape[1]
        eye = np.eye(k)
        d = self.fam.take(self.data, rows)
        g = np.empty((rows.size, k))
        for j in range(k):
            sign = np.where(x[:, j] + hg > self.xhi[j], -1.0, 1.0)
            g[:, j] = (self.loglik(d, x + (sign * hg)[:, None] * eye[j]) - f) / (sign * hg)
        return np.where(np.isfinite(g), g, 0.0)


@dataclass(frozen=True, slots=True)
class _NewtonState:
    """Per-window state of the iteration; the arrays are updated in place.

    ``x``, ``f``: current point (optimiser's coordinates) and its log-likelihood; ``radius``:
    trust radius (max-norm); ``active``: still iterating; ``converged``, ``iterations``: the
    results; ``grad``: gradient at ``x`` where ``fresh``; ``hess``: Hessian (own or
    borrowed) where ``has_hess``.
    """

    x: NDArray
    f: NDArray
    radius: NDArray
    active: NDArray[np.bool_]
    converged: NDArray[np.bool_]
    iterations: NDArray[np.int64]
    grad: NDArray
    hess: NDArray
    has_hess: NDArray[np.bool_]
    fresh: NDArray[np.bool_]

    @classmethod
    def at(cls, obj: _Objective, x: NDArray, hess0: NDArray | None) -> _NewtonState:
        """The state at the starting points ``x``; windows whose start has no finite
        log-likelihood do not iterate."""
        windows, k = x.shape
        f = obj.loglik(obj.data, x)
        reuse = hess0 is not None
        return cls(x=x, f=f, radius=np.full(windows, 1.0), active=np.isfinite(f),
                   converged=np.zeros(windows, dtype=bool),
                   iterations=np.zeros(windows, dtype=np.int64), grad=np.zeros((windows, k)),
                   hess=np.array(hess0, dtype=float) if reuse else np.zeros((windows, k, k)),
                   has_hess=np.full(windows, reuse), fresh=np.zeros(windows, dtype=bool))


def _refresh_derivatives(obj: _Objective, st: _NewtonState, idx: NDArray[np.intp]) -> None:
    """Gradients of the windows ``idx`` whose point is new, with a fresh Hessian where
    none is kept."""
    need = idx[~st.fresh[idx]]
    full = need[~st.has_hess[need]]
    if full.size:
        st.grad[full], st.hess[full] = obj.stencil(full, st.x[full], st.f[full])
        st.has_hess[full] = True
    quick = need[st.has_hess[need] & ~np.isin(need, full)]
    if quick.size:
        st.grad[quick] = obj.gradient(quick, st.x[quick], st.f[quick])
    st.fresh[need] = True


@dataclass(frozen=True, slots=True)
class _Step:
    """A step proposed for the active windows (one row each)."""

    #: Coordinates held at a bound (gradient pointing outwards).
    held: NDArray[np.bool_]
    #: Max-norm of the projected gradient.
    gnorm: NDArray
    #: The local model was concave (no Levenberg-Marquardt shift).
    concave: NDArray[np.bool_]
    #: Gain the local model predicts for the full (uncut) step.
    pred: NDArray
    #: Converged at the current point: no trial is needed.
    done: NDArray[np.bool_]
    #: Factor the trust region cut the step by (1 for the full step).
    shrink: NDArray
    #: The step after the cut, and the trial point (projected into the box).
    step: NDArray
    xn: NDArray
    #: Max-norm of the move from the current point to ``xn``.
    sn: NDArray


def _propose(obj: _Objective, xa: NDArray, g: NDArray, hs: NDArray, radius: NDArray
             ) -> _Step:
    """The projected Newton step from the points ``xa`` with gradients ``g`` and Hessians
    ``hs`` (both modified), cut to the trust ``radius`` and projected into the box."""
    k = xa.shape[1]
    # Projection: hold coordinates at a bound whose gradient points outwards.
    held = ((xa <= obj.xlo + 1e-12) & (g < 0)) | ((xa >= obj.xhi - 1e-12) & (g > 0))
    g[held] = 0.0
    for j in range(k):
        hj = held[:, j]
        hs[hj, j, :] = 0.0
        hs[hj, :, j] = 0.0
        hs[hj, j, j] = -1.0
    gnorm = np.max(np.abs(g), axis=1)
    step, concave = _newton_step(-hs, g)
    scale = np.max(np.abs(step), axis=1)
    # Converged at x: the gradient vanishes, or the concave local model predicts a gain
    # below 1e-7 from a step below 1e-4 -- no trial evaluation is then needed.
    pred = 0.5 * np.sum(g * step, axis=1)
    done = (gnorm < 1e-7) | (concave & (pred < 1e-7) & (scale < 1e-4))
    shrink = np.where(scale > radius, radius / np.maximum(scale, 1e-300), 1.0)
    step *= shrink[:, None]
    xn = np.clip(xa + step, obj.xlo, obj.xhi)
    sn = np.max(np.abs(xn - xa), axis=1)
    return _Step(held, gnorm, concave, pred, done, shrink, step, xn, sn)


def _settled(xa: NDArray, step: _Step, gain: NDArray, accept: NDArray[np.bool_]
             ) -> NDArray[np.bool_]:
    """Accepted steps after which less than ``_SETTLE_GAIN`` is estimated to be left.

    A full step (neither cut by the trust region nor by the box) of a concave local model
    with predicted gain ``pred`` below ``_SETTLE_STEP`` and actual ``gain`` leaves about
    ``(gain - pred)^2 / pred``; with two parameters 16 times that, or, when a coordinate
    is held at a bound, ``pred / 4`` if ``gain`` is within half of ``pred`` (else it does
    not settle). Derivation and checks: docs/method.md, 'Estimation' (stopping rule).
    """
    pred = step.pred
    left = (gain - pred) ** 2 / np.maximum(pred, 1e-300)
    if xa.shape[1] > 1:
        small_step = np.where(np.abs(gain - pred) <= 0.5 * pred + 1e-10, 0.25 * pred, np.inf)
        left = np.where(step.held.any(axis=1), small_step, 16.0 * left)
    inside = np.all(step.xn == xa + step.step, axis=1)
    return (accept & step.concave & inside & (step.shrink == 1.0) & (pred < _SETTLE_STEP)
            & (left < _SETTLE_GAIN))


def _take_step(st: _NewtonState, idx: NDArray[np.intp], step: _Step, fn: NDArray,
               reuse: bool) -> None:
    """Accept or reject the trial points ``step.xn`` (log-likelihoods ``fn``) of the windows
    ``idx``, adapt their trust radii, and mark the windows that converged or got stuck."""
    xa, fa = st.x[idx], st.f[idx]
    accept = (fn >= fa - 1e-12 * (1 + np.abs(fa))) & ~step.done
    small = (step.sn < 1e-7) & (np.abs(fn - fa) < 1e-9)
    settle = _settled(xa, step, fn - fa, accept)
    ia = idx[accept]
    st.x[ia], st.f[ia] = step.xn[accept], fn[accept]
    st.fresh[ia] = False
    # A borrowed Hessian serves two iterations (usually a step and its confirmation);
    # afterwards Newton uses its own (a stale one converges only linearly where the
    # likelihood is flat, e.g. large nu).
    st.has_hess[ia] = False if not reuse else st.has_hess[ia] & (st.iterations[ia] < 2)
    st.radius[ia] = np.minimum(np.maximum(st.radius[ia], 2.0 * step.sn[accept]), 4.0)
    rej = idx[~accept & ~step.done]
    st.radius[rej] = 0.25 * step.sn[~accept & ~step.done]
    # A rejected step under a kept Hessian: recompute it before shrinking further.
    stale = rej[st.has_hess[rej] & reuse]
    st.has_hess[stale] = False
    st.fresh[stale] = False
    ok = step.done | (accept & small) | settle
    # A trust radius that collapsed without an accepted step: stationary only if the
    # projected gradient is already negligible.
    stuck = (st.radius[idx] < 1e-12) & ~ok
    st.converged[idx[ok]] = True
    st.converged[idx[stuck]] = step.gnorm[stuck] < 1e-4
    st.active[idx[ok | stuck]] = False


def _newton_step(a: NDArray, g: NDArray) -> tuple[NDArray, NDArray]:
    """Solve a s = g for each window (k = 1 or 2), with a shifted by a multiple of the identity
    where it is not positive definite; also returns where no shift was needed."""
    k = g.shape[1]
    if k == 1:
        d = a[:, 0, 0]
        concave = d > 1e-10 * (1 + np.abs(g[:, 0]))
        d = np.where(concave, d, np.abs(d) + 1e-3 + np.abs(g[:, 0]))
        return g / d[:, None], concave
    p, q, r = a[:, 0, 0], a[:, 0, 1], a[:, 1, 1]
    half_tr = 0.5 * (p + r)
    disc = np.sqrt(0.25 * (p - r) ** 2 + q**2)
    lam_min = half_tr - disc
    floor = 1e-8 * (1 + np.abs(half_tr) + disc)
    concave = lam_min > floor
    mu = np.where(concave, 0.0, floor - lam_min + 1e-3 * (1 + np.abs(half_tr)))
    p, r = p + mu, r + mu
    det = p * r - q * q
    s0 = (r * g[:, 0] - q * g[:, 1]) / det
    s1 = (p * g[:, 1] - q * g[:, 0]) / det
    return np.column_stack([s0, s1]), concave


# ----------------------------------------------------------------------------- reference path
def fit_copula_reference(fam: CopulaFamily | str, u: ArrayLike, v: ArrayLike) -> CopulaFit:
    """One-window maximum pseudo-likelihood through :func:`scipy.optimize.minimize`.

    An independent path (L-BFGS-B in the same transformed coordinates, tight tolerances, from
    tau inversion) used to check :func:`fit_batched`; slower, not used on hot paths.
    """
    fam = family(fam) if isinstance(fam, str) else fam
    u2, v2 = _validate_batch(u, v)
    u1, v1 = u2[0], v2[0]
    n = u1.size
    if fam.n_params == 0:
        return CopulaFit.from_estimate(fam, (), 0.0, n, True, 0)
    xlo, xhi, to_x, to_p = _coordinates(fam)
    tau = float(kendall_tau(u1, v1))
    x0 = to_x(np.array([float(a) for a in fam.start_params(tau)]))

    def nll(x):
        p = tuple(to_p(np.asarray(x)))
        val = np.sum(fam.rotated_logpdf(u1, v1, p))
        return -val if np.isfinite(val) else 1e300

    res = optimize.minimize(nll, x0, method="L-BFGS-B", bounds=list(zip(xlo, xhi, strict=True)),
                            options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 2000})
    p = tuple(float(a) for a in to_p(res.x))
    return CopulaFit.from_estimate(fam, p, -float(res.fun), n, bool(res.success), int(res.nit))


# ----------------------------------------------------------------------------- selection
def candidate_slots(names: tuple[str, ...] | list[str]) -> list[CopulaFamily]:
    """The fitting slots for a candidate set: each rotatable family twice (rotation 0 and its
    survival rotation 180, each turned by 90 degrees on windows with negative tau), every other
    family once."""
    slots = []
    for name in names:
        fam = family(name)
        slots.append(fam)
        if len(fam.rotations) > 1:
            slots.append(family(name, 180))
    return slots


@dataclass(frozen=True, slots=True)
class Selection:
    """Every candidate fitted on one window, sorted by the criterion (best first)."""

    fits: tuple[CopulaFit, ...]
    criterion: str
    n: int
    kendall_tau: float

    @property
    def selected(self) -> CopulaFit:
        return self.fits[0]

    def fit_of(self, name: str) -> CopulaFit:
        """The best-scoring fit of the family ``name`` (over its rotations)."""
        for f in self.fits:
            if f.family == name:
                return f
        raise ValueError(f"family {name!r} was not among the candidates")


def select_copula(u: ArrayLike, v: ArrayLike, families: tuple[str, ...] | list[str] | None = None,
                  criterion: str = "aic") -> Selection:
    """Fit every candidate family on one window and rank them by AIC (or BIC).

    Parameters
    ----------
    u, v : array_like, shape (n,)
        Pseudo-observations of one window.
    families : sequence of str, optional
        Candidate family names (default: every family).
    criterion : {"aic", "bic"}

    Notes
    -----
    Rotations follow the sign of the sample Kendall's tau: with tau >= 0 the rotatable
    families are tried at 0 and 180 degrees, with tau < 0 at 90 and 270 degrees; Gaussian,
    Student-t and Frank cover both signs through their parameters. Ties in the criterion are
    broken by the order of ``families``.
    """
    from monitor.stats.copulas import FAMILY_NAMES

    check_criterion(criterion)
    names = tuple(families) if families is not None else FAMILY_NAMES
    u2, v2 = _validate_batch(u, v)
    tau = kendall_tau(u2, v2)
    fits = [fit_batched(fam, u2, v2, tau=tau, rotation_by_sign=True).window(0)
            for fam in candidate_slots(names)]
    order = sorted(range(len(fits)), key=lambda i: (fits[i].score(criterion), i))
    return Selection(tuple(fits[i] for i in order), criterion, u2.shape[1], float(tau[0]))


@dataclass(frozen=True, slots=True)
class BatchSelection:
    """Every candidate slot fitted on every window of a batch, and the winner per window."""

    fits: tuple[BatchFit, ...]
    criterion: str
    best: NDArray[np.int64]

    def score(self) -> NDArray[np.float64]:
        """Criterion values, shape (slots, windows)."""
        return np.stack([f.score(self.criterion) for f in self.fits])


def select_batched(u: ArrayLike, v: ArrayLike, families: tuple[str, ...] | list[str] | None = None,
                   criterion: str = "aic", tau: ArrayLike | None = None,
                   start: dict[tuple[str, int], NDArray] | None = None,
                   chain: int = 0) -> BatchSelection:
    """:func:`select_copula` on every window of a batch at once.

    ``start`` optionally maps (family, slot rotation) to warm starts of shape (windows, k);
    ``chain`` is passed to :func:`fit_batched` (rows are consecutive rolling windows).
    ``best[w]`` indexes ``fits`` for window ``w``.
    """
    from monitor.stats.copulas import FAMILY_NAMES

    check_criterion(criterion)
    names = tuple(families) if families is not None else FAMILY_NAMES
    u2, v2 = _validate_batch(u, v)
    tau = kendall_tau(u2, v2) if tau is None else np.asarray(tau, dtype=float)
    start = start or {}
    grid = rank_grid(u2), rank_grid(v2)  # shared by every slot
    fits = tuple(
        _fit_valid(fam, u2, v2, start.get((fam.name, fam.rotation)), tau, True, chain,
                   _MAX_ITER, grid)
        for fam in candidate_slots(names)
    )
    scores = np.stack([f.score(criterion) for f in fits])
    return BatchSelection(fits, criterion, read_only(np.argmin(scores, axis=0)))


# ----------------------------------------------------------------------------- averaging
def akaike_weights(scores: ArrayLike, axis: int = 0) -> NDArray[np.float64]:
    """Akaike weights of candidate models from their information-criterion values.

    Parameters
    ----------
    scores : array_like
        AIC (or BIC) values, candidates along ``axis``; ``+inf`` (or NaN) marks a slot that
        is not a candidate and gets weight 0.
    axis : int
        The candidates' axis.

    Returns
    -------
    ndarray
        Weights of the same shape, non-negative and summing to 1 along ``axis`` (read-only).

    Notes
    -----
    .. math:: w_k = \\frac{\\exp(-\\Delta_k / 2)}{\\sum_j \\exp(-\\Delta_j / 2)},
              \\qquad \\Delta_k = \\mathrm{AIC}_k - \\min_j \\mathrm{AIC}_j

    (Burnham & Anderson 2002, *Model Selection and Multimodel Inference*, 2nd ed., sect.
    2.9, eq. 2.14 -- equation number from memory). Subtracting the minimum first keeps the
    exponentials finite. With BIC values in place of AIC the same formula gives the
    approximate posterior model probabilities of equal prior weights (ibid., sect. 6.4,
    from memory).
    """
    s = np.asarray(scores, dtype=float)
    s = np.where(np.isnan(s), np.inf, s)
    best = np.min(s, axis=axis, keepdims=True)
    if not np.all(np.isfinite(best)):
        raise ValueError("akaike_weights: every candidate's score is infinite or missing")
    e = np.exp(-0.5 * (s - best))
    return read_only(e / e.sum(axis=axis, keepdims=True))


def model_average(weights: ArrayLike, values: ArrayLike, axis: int = 0) -> NDArray[np.float64]:
    """Weighted model average ``sum_k w_k x_k`` of a per-candidate quantity.

    Parameters
    ----------
    weights : array_like
        From :func:`akaike_weights` (candidates along ``axis``).
    values : array_like
        The quantity under each candidate (same shape); where a weight is 0 the value may
        be anything finite or not.
    axis : int

    Returns
    -------
    ndarray
        The model-averaged estimate (Burnham & Anderson 2002, sect. 4.2, eq. 4.1, from
        memory).
    """
    w = np.asarray(weights, dtype=float)
    x = np.asarray(values, dtype=float)
    return np.sum(np.where(w > 0, w * np.nan_to_num(x), 0.0), axis=axis)
