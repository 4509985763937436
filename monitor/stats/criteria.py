"""Information criteria: the one place where AIC and BIC are computed.

>>> float(information_criterion(-10.0, 2, 100, "aic"))
24.0
>>> round(float(information_criterion(-10.0, 2, 100, "bic")), 4)
29.2103
"""

from __future__ import annotations

from typing import overload

import numpy as np
from numpy.typing import NDArray

#: The criteria by name: Akaike's (AIC) and Schwarz's Bayesian (BIC).
CRITERIA = ("aic", "bic")


def check_criterion(criterion: str) -> str:
    """Return ``criterion`` if it names one of :data:`CRITERIA`, else raise ValueError."""
    if criterion not in CRITERIA:
        raise ValueError(f"criterion must be one of {', '.join(CRITERIA)}; got {criterion!r}")
    return criterion


@overload
def information_criterion(loglik: float, k: int, n: int, criterion: str) -> float: ...
@overload
def information_criterion(loglik: NDArray[np.float64], k: int | NDArray[np.integer], n: int,
                          criterion: str) -> NDArray[np.float64]: ...
def information_criterion(loglik, k, n, criterion):
    """AIC or BIC of fitted models, elementwise.

    Parameters
    ----------
    loglik : float or ndarray
        Maximised log-likelihood.
    k : int or ndarray of int
        Number of estimated parameters (broadcasts against ``loglik``).
    n : int
        Observations the likelihood sums over (used by BIC only).
    criterion : {"aic", "bic"}

    Returns
    -------
    float or ndarray
        ``2 k - 2 loglik`` (Akaike 1974, "A new look at the statistical model
        identification", *IEEE Trans. Automat. Control* 19, 716-723) or ``k log n - 2 loglik``
        (Schwarz 1978, "Estimating the dimension of a model", *Ann. Statist.* 6, 461-464);
        smaller is better. For a float ``loglik`` a float (a NumPy scalar for BIC).
    """
    penalty = 2.0 * k if check_criterion(criterion) == "aic" else k * np.log(n)
    return penalty - 2.0 * loglik
