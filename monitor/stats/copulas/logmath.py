"""Log-space elementary functions shared by the Archimedean kernels.

They run on every element of every window the estimators evaluate, so each works in place on
one output array (NumPy's own ``logaddexp`` is a scalar loop, several times slower than the
vectorised ``exp`` and ``log1p`` it is made of) and evaluates a branch only where it is used.
"""

from __future__ import annotations

import numpy as np

_LN2 = float(np.log(2.0))

#: Gaps beyond this are capped: exp(-708) = 3e-308 is still a normal number (NumPy's exp is
#: slow on subnormal results) and below half an ulp of anything it is added to.
_GAP_CAP = 708.0


def logaddexp(a, b):
    """log(exp(a) + exp(b)) = max(a, b) + log1p(exp(-|a - b|)); -inf where both are -inf,
    +inf where either is +inf."""
    with np.errstate(invalid="ignore"):
        d = np.asarray(np.abs(np.subtract(a, b, dtype=float)))
    np.fmin(d, _GAP_CAP, out=d)  # fmin also maps the nan of inf - inf to the cap
    np.negative(d, out=d)
    np.exp(d, out=d)
    np.log1p(d, out=d)
    d += np.maximum(a, b)
    return d


def log1mexp(x):
    """log(1 - exp(-x)) for x >= 0 to full relative accuracy: log(-expm1(-x)) below log 2,
    log1p(-exp(-x)) above (Maechler 2012, "Accurately computing log(1 - exp(-|a|))"; from
    memory). -inf at x = 0; beyond x = 708, where exp(-x) leaves the normal range (and
    NumPy's exp its fast path), the value is held at -exp(-708) = -3e-308.

    Both branches are evaluated in full and one is kept per element: faster than masked
    ufunc loops, which do not vectorise.
    """
    x = np.asarray(x, dtype=float)
    near = np.asarray(np.negative(x))  # 0-d arrays, not scalars, for the out= calls
    far = np.asarray(np.maximum(near, -708.0))
    np.expm1(near, out=near)
    np.negative(near, out=near)
    np.exp(far, out=far)
    np.negative(far, out=far)
    with np.errstate(divide="ignore", invalid="ignore"):
        np.log(near, out=near)
        np.log1p(far, out=far)
    return np.where(x < _LN2, near, far)


def log_expm1(x):
    """log(exp(x) - 1) for x >= 0 without overflow: x + log(1 - exp(-x))."""
    out = log1mexp(x)  # a fresh array of x's shape
    out += x
    return out
