"""Vectorised samplers for multivariate copulas whose bivariate margins are known in closed form.

Every sampler returns an array of shape ``(n, d)`` of uniforms in (0, 1). The families are
chosen because each two-dimensional margin is again a member of a bivariate family of
:mod:`monitor.stats.copulas`, so the ground truth of every pair is exact:

========================  =====================================================
multivariate copula       bivariate margin of columns i, j
========================  =====================================================
Gaussian, matrix R        ``gaussian`` with rho = R[i, j]
Student-t, matrix R, nu   ``student_t`` with rho = R[i, j] and the same nu
exchangeable Clayton      ``clayton`` with the same theta
exchangeable Gumbel       ``gumbel`` with the same theta
survival of either        the same family rotated by 180 degrees
========================  =====================================================

The Archimedean samplers use the Marshall & Olkin (1988, *J. Amer. Statist. Assoc.* 83,
834-841) frailty construction: with a latent V whose Laplace transform is the generator psi and
independent unit exponentials E_1..E_d, the vector ``psi(E_i / V)`` has the d-dimensional
Archimedean copula with generator psi; every sub-vector has the same generator, hence the
bivariate margins above (McNeil, Frey & Embrechts 2005, *Quantitative Risk Management*,
section 5.4, from memory).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special

#: Uniforms are kept this far from 0 and 1, as in :mod:`monitor.stats.copulas`, so that quantile
#: functions of the margins stay finite.
UNIT_EPS = 1e-15


def _clip(u: NDArray[np.float64]) -> NDArray[np.float64]:
    return np.clip(u, UNIT_EPS, 1.0 - UNIT_EPS)


def _check_n_dim(n: int, dim: int) -> None:
    if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 0:
        raise ValueError(f"n must be a non-negative integer, got {n!r}")
    if isinstance(dim, bool) or not isinstance(dim, int | np.integer) or dim < 1:
        raise ValueError(f"dim must be a positive integer, got {dim!r}")


def correlation_cholesky(corr: ArrayLike) -> NDArray[np.float64]:
    """Lower Cholesky factor of a correlation matrix, after checking that it is one.

    Parameters
    ----------
    corr : array_like, shape (d, d)
        Symmetric, unit diagonal, positive definite.

    Returns
    -------
    ndarray, shape (d, d)
        L with ``L @ L.T == corr``.

    Raises
    ------
    ValueError
        If ``corr`` is not a square symmetric positive-definite matrix with unit diagonal.
    """
    r = np.asarray(corr, dtype=float)
    if r.ndim != 2 or r.shape[0] != r.shape[1]:
        raise ValueError(f"correlation matrix must be square, got shape {r.shape}")
    if not np.all(np.isfinite(r)):
        raise ValueError("correlation matrix has non-finite entries")
    if not np.allclose(r, r.T, atol=1e-12, rtol=0.0):
        raise ValueError("correlation matrix is not symmetric")
    if not np.allclose(np.diag(r), 1.0, atol=1e-12, rtol=0.0):
        raise ValueError("correlation matrix must have a unit diagonal")
    try:
        return np.linalg.cholesky(r)
    except np.linalg.LinAlgError:
        raise ValueError("correlation matrix is not positive definite") from None


def sample_gaussian(n: int, corr: ArrayLike, rng: np.random.Generator) -> NDArray[np.float64]:
    """Draw ``n`` points from the Gaussian copula with correlation matrix ``corr``.

    Parameters
    ----------
    n : int
        Number of points.
    corr : array_like, shape (d, d)
        Correlation matrix (positive definite).
    rng : numpy.random.Generator
        Source of randomness.

    Returns
    -------
    ndarray, shape (n, d)
        Uniforms ``Phi(L z)`` with z standard normal and ``L L' = corr``.

    Notes
    -----
    The (i, j) margin is the bivariate Gaussian copula with rho = corr[i, j], since a
    sub-vector of a multivariate normal is normal with the sub-matrix as covariance (Joe 2014,
    *Dependence Modeling with Copulas*, section 4.3).
    """
    chol = correlation_cholesky(corr)
    _check_n_dim(n, chol.shape[0])
    z = rng.standard_normal((n, chol.shape[0])) @ chol.T
    return _clip(special.ndtr(z))


def sample_student_t(n: int, corr: ArrayLike, nu: float, rng: np.random.Generator
                     ) -> NDArray[np.float64]:
    """Draw ``n`` points from the Student-t copula with matrix ``corr`` and ``nu`` dof.

    Parameters
    ----------
    n : int
        Number of points.
    corr : array_like, shape (d, d)
        Correlation (shape) matrix.
    nu : float
        Degrees of freedom, > 0.
    rng : numpy.random.Generator
        Source of randomness.

    Returns
    -------
    ndarray, shape (n, d)
        Uniforms ``t_nu(X)`` with ``X = L z / sqrt(W / nu)``, W ~ chi-square(nu) shared by
        the whole row.

    Notes
    -----
    The shared mixing variable W makes every sub-vector multivariate t with the same nu, so the
    (i, j) margin is the bivariate t copula t(rho = corr[i, j], nu) (Demarta & McNeil 2005,
    *Int. Stat. Rev.* 73, 111-129).
    """
    if not (np.isfinite(nu) and nu > 0):
        raise ValueError(f"nu must be positive and finite, got {nu!r}")
    chol = correlation_cholesky(corr)
    _check_n_dim(n, chol.shape[0])
    z = rng.standard_normal((n, chol.shape[0])) @ chol.T
    w = rng.chisquare(nu, size=(n, 1)) / nu
    return _clip(special.stdtr(nu, z / np.sqrt(w)))


def sample_clayton(n: int, dim: int, theta: float, rng: np.random.Generator
                   ) -> NDArray[np.float64]:
    """Draw ``n`` points from the exchangeable ``dim``-variate Clayton copula.

    Parameters
    ----------
    n, dim : int
        Number of points and dimension.
    theta : float
        Clayton parameter, > 0.
    rng : numpy.random.Generator
        Source of randomness.

    Returns
    -------
    ndarray, shape (n, dim)
        ``U_i = (1 + E_i / V)^(-1/theta)`` with V ~ Gamma(1/theta, 1) shared by the row.

    Notes
    -----
    Gamma frailty: the Laplace transform of Gamma(1/theta, 1) is (1 + s)^(-1/theta), the
    Clayton generator (Marshall & Olkin 1988). Every bivariate margin is Clayton(theta):
    tau = theta / (theta + 2), lambda_L = 2^(-1/theta) (Joe 1997, family B4).
    """
    if not (np.isfinite(theta) and theta > 0):
        raise ValueError(f"Clayton theta must be positive and finite, got {theta!r}")
    _check_n_dim(n, dim)
    v = rng.gamma(1.0 / theta, 1.0, size=(n, 1))
    e = rng.standard_exponential((n, dim))
    # log1p keeps U accurate when E/V is small (U near 1).
    return _clip(np.exp(-np.log1p(e / v) / theta))


def positive_stable(n: int, alpha: float, rng: np.random.Generator) -> NDArray[np.float64]:
    """Draw ``n`` positive alpha-stable variables with Laplace transform exp(-s^alpha).

    Parameters
    ----------
    n : int
        Number of draws.
    alpha : float
        Stability index in (0, 1].
    rng : numpy.random.Generator
        Source of randomness.

    Returns
    -------
    ndarray, shape (n,)

    Notes
    -----
    Kanter's (1975, *Ann. Probab.* 3, 697-707) representation, as used by Chambers, Mallows &
    Stuck (1976, *J. Amer. Statist. Assoc.* 71, 340-344):

    .. math:: S = \\frac{\\sin(\\alpha\\Theta)}{(\\sin\\Theta)^{1/\\alpha}}
              \\left(\\frac{\\sin((1-\\alpha)\\Theta)}{W}\\right)^{(1-\\alpha)/\\alpha}

    with Theta ~ U(0, pi) and W ~ Exp(1) independent. alpha = 1 gives S = 1.
    """
    if not (0.0 < alpha <= 1.0):
        raise ValueError(f"alpha must lie in (0, 1], got {alpha!r}")
    angle = rng.uniform(0.0, np.pi, size=n)
    w = rng.standard_exponential(n)
    if alpha == 1.0:
        return np.ones(n)
    # Logs avoid overflow of (sin Theta)^(-1/alpha) for small alpha.
    log_s = (np.log(np.sin(alpha * angle)) - np.log(np.sin(angle)) / alpha
             + (1.0 - alpha) / alpha * (np.log(np.sin((1.0 - alpha) * angle)) - np.log(w)))
    return np.exp(log_s)


def sample_gumbel(n: int, dim: int, theta: float, rng: np.random.Generator
                  ) -> NDArray[np.float64]:
    """Draw ``n`` points from the exchangeable ``dim``-variate Gumbel copula.

    Parameters
    ----------
    n, dim : int
        Number of points and dimension.
    theta : float
        Gumbel parameter, >= 1 (1 is independence).
    rng : numpy.random.Generator
        Source of randomness.

    Returns
    -------
    ndarray, shape (n, dim)
        ``U_i = exp(-(E_i / V)^(1/theta))`` with V positive stable of index 1/theta.

    Notes
    -----
    The Gumbel generator exp(-s^(1/theta)) is the Laplace transform of a positive stable law
    of index 1/theta (Marshall & Olkin 1988). Every bivariate margin is Gumbel(theta):
    tau = 1 - 1/theta, lambda_U = 2 - 2^(1/theta) (Joe 1997, family B6).
    """
    if not (np.isfinite(theta) and theta >= 1.0):
        raise ValueError(f"Gumbel theta must be >= 1 and finite, got {theta!r}")
    _check_n_dim(n, dim)
    v = positive_stable(n, 1.0 / theta, rng)[:, None]
    e = rng.standard_exponential((n, dim))
    return _clip(np.exp(-np.power(e / v, 1.0 / theta)))


def sample_independence(n: int, dim: int, rng: np.random.Generator) -> NDArray[np.float64]:
    """Draw ``n`` rows of ``dim`` independent uniforms (the independence copula)."""
    _check_n_dim(n, dim)
    return _clip(rng.random((n, dim)))


def survival(u: ArrayLike) -> NDArray[np.float64]:
    """Map a copula sample to its survival copula: ``1 - U`` (rotation by 180 degrees).

    Notes
    -----
    If U has copula C then 1 - U has the survival copula, whose bivariate margins are the
    180-degree rotations of those of C: lower and upper tail coefficients swap, tau is
    unchanged (Nelsen 2006, *An Introduction to Copulas*, section 2.6).
    """
    return _clip(1.0 - np.asarray(u, dtype=float))
