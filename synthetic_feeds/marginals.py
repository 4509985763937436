"""Marginal return processes: constant mean, GARCH(1,1) or GJR-GARCH(1,1), standardised t or
skewed-t innovations, in the parameterisation of the ``arch`` package (percent log returns).

For asset k on its own trading days t = 1, 2, ...:

.. math::
    r_t = \\mu + \\sigma_t z_t, \\qquad
    \\sigma_{t+1}^2 = \\omega + (\\alpha + \\gamma\\,1\\{z_t < 0\\})\\,\\sigma_t^2 z_t^2
                     + \\beta\\,\\sigma_t^2

(Bollerslev 1986, *J. Econometrics* 31, 307-327; Glosten, Jagannathan & Runkle 1993,
*J. Finance* 48, 1779-1801), with r_t = 100 ln(P_t / P_{t-1}) and z_t of mean 0 and variance
1. The innovations are z_t = F^{-1}(U_t) for the copula uniform U_t of that asset and date, so
the conditional copula of the returns of two assets given the past is exactly the copula of
the U's.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from arch.univariate import SkewStudent, StudentsT
from numpy.typing import NDArray

VOLATILITY_MODELS = ("garch", "gjr-garch")
DISTRIBUTIONS = ("student_t", "skew_t")


@dataclass(frozen=True, slots=True)
class MarginalModel:
    """Known parameters of one asset's return process (percent log returns).

    Attributes
    ----------
    volatility : {"garch", "gjr-garch"}
    distribution : {"student_t", "skew_t"}
        Standardised (unit-variance) Student-t, or Hansen's (1994) skewed t as in ``arch``'s
        ``SkewStudent`` (its ``eta`` is ``nu`` here, its ``lambda`` is ``skew``).
    mu, omega, alpha, gamma, beta : float
        Mean and variance-equation parameters; ``gamma`` is 0 for plain GARCH.
    nu : float
        Degrees of freedom, > 2 so that the innovations have unit variance.
    skew : float
        Skewness parameter lambda in (-1, 1); 0 for ``student_t``.
    """

    volatility: str
    distribution: str
    mu: float
    omega: float
    alpha: float
    beta: float
    nu: float
    gamma: float = 0.0
    skew: float = 0.0

    def __post_init__(self) -> None:
        if self.volatility not in VOLATILITY_MODELS:
            raise ValueError(f"volatility must be one of {VOLATILITY_MODELS}, "
                             f"got {self.volatility!r}")
        if self.distribution not in DISTRIBUTIONS:
            raise ValueError(f"distribution must be one of {DISTRIBUTIONS}, "
                             f"got {self.distribution!r}")
        if self.volatility == "garch" and self.gamma != 0.0:
            raise ValueError("a plain GARCH model has gamma = 0; use 'gjr-garch'")
        if self.distribution == "student_t" and self.skew != 0.0:
            raise ValueError("a symmetric Student-t has skew = 0; use 'skew_t'")
        if not (self.omega > 0 and self.alpha >= 0 and self.beta >= 0 and self.gamma >= 0):
            raise ValueError("need omega > 0 and alpha, beta, gamma >= 0")
        if not (self.nu > 2 and -1 < self.skew < 1):
            raise ValueError(f"need nu > 2 and -1 < skew < 1, got nu={self.nu}, "
                             f"skew={self.skew}")
        if not self.persistence < 1:
            raise ValueError(f"variance process is not stationary: persistence "
                             f"{self.persistence:.4f} >= 1")

    @property
    def negative_second_moment(self) -> float:
        """E[z^2 1{z < 0}] of the innovations (1/2 for a symmetric law)."""
        if self.distribution == "student_t":
            return 0.5
        return float(SkewStudent().partial_moment(2, 0.0, [self.nu, self.skew]))

    @property
    def persistence(self) -> float:
        """alpha + beta + gamma E[z^2 1{z<0}], the mean of the variance multiplier."""
        return self.alpha + self.beta + self.gamma * self.negative_second_moment

    @property
    def unconditional_variance(self) -> float:
        """omega / (1 - persistence): the stationary mean of sigma_t^2 (percent squared)."""
        return self.omega / (1.0 - self.persistence)

    def ppf(self, u: NDArray[np.float64]) -> NDArray[np.float64]:
        """Quantile function of the standardised innovation distribution, via ``arch``."""
        if self.distribution == "student_t":
            return np.asarray(StudentsT().ppf(u, [self.nu]), dtype=float)
        return np.asarray(SkewStudent().ppf(u, [self.nu, self.skew]), dtype=float)

    def to_json(self) -> dict:
        """JSON-ready description: model names, parameters and derived moments."""
        params = {"mu": self.mu, "omega": self.omega, "alpha": self.alpha}
        if self.volatility == "gjr-garch":
            params["gamma"] = self.gamma
        params["beta"] = self.beta
        params["nu"] = self.nu
        if self.distribution == "skew_t":
            params["lambda"] = self.skew
        return {
            "mean": "constant",
            "volatility": self.volatility,
            "distribution": self.distribution,
            "units": "percent log return, r_t = 100 ln(P_t / P_{t-1})",
            "params": params,
            "persistence": self.persistence,
            "unconditional_variance": self.unconditional_variance,
        }


def simulate_paths(models: Sequence[MarginalModel], z: NDArray[np.float64]
                   ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Run the variance recursion of every asset at once on given innovations.

    Parameters
    ----------
    models : sequence of MarginalModel
        One per column of ``z``.
    z : ndarray, shape (T, k)
        Standardised innovations, row t being the asset's t-th own trading day. Columns that
        are shorter may be padded at the end with anything finite; padding never feeds back.

    Returns
    -------
    returns, sigma : ndarray, shape (T, k)
        Percent log returns ``mu + sigma_t z_t`` and conditional volatilities ``sigma_t``.

    Notes
    -----
    The recursion sigma_{t+1}^2 = omega + a_t sigma_t^2 with a_t = beta + (alpha + gamma
    1{z_t<0}) z_t^2 is linear in sigma^2 with random coefficients, so the multipliers are
    computed for all days at once and only the cheap scalar update runs per day (vectorised
    over assets). sigma_1^2 is the stationary mean of sigma^2, omega / (1 - persistence)
    (Bollerslev 1986).
    """
    z = np.asarray(z, dtype=float)
    if z.ndim != 2 or z.shape[1] != len(models):
        raise ValueError(f"z must have shape (T, {len(models)}), got {z.shape}")
    mu = np.array([m.mu for m in models])
    omega = np.array([m.omega for m in models])
    alpha = np.array([m.alpha for m in models])
    gamma = np.array([m.gamma for m in models])
    beta = np.array([m.beta for m in models])
    multiplier = beta + (alpha + gamma * (z < 0.0)) * z * z
    var = np.empty_like(z)
    current = np.array([m.unconditional_variance for m in models])
    for t in range(z.shape[0]):
        var[t] = current
        current = omega + multiplier[t] * current
    sigma = np.sqrt(var)
    return mu + sigma * z, sigma
