"""Bivariate copula families and their registry.

>>> from monitor.stats.copulas import family
>>> round(float(family("clayton", rotation=180).tail_upper((2.0,))), 8)
0.70710678
"""

from __future__ import annotations

from .archimedean import Clayton, Frank, Gumbel, Joe
from .base import CopulaFamily
from .bb import BB1, BB7
from .elliptical import Gaussian, StudentT
from .independence import Independence

#: Family name -> class; the single place that maps names to implementations.
FAMILIES: dict[str, type[CopulaFamily]] = {
    cls.name: cls
    for cls in (Independence, Gaussian, StudentT, Clayton, Gumbel, Frank, Joe, BB1, BB7)
}

#: Every family name, in the contract's order.
FAMILY_NAMES: tuple[str, ...] = tuple(FAMILIES)


def family(name: str, rotation: int = 0) -> CopulaFamily:
    """Return the copula family called ``name`` with the given rotation.

    Parameters
    ----------
    name : str
        One of :data:`FAMILY_NAMES`.
    rotation : {0, 90, 180, 270}
        Counter-clockwise rotation in degrees.

    Raises
    ------
    ValueError
        For an unknown name or a rotation the family does not take.
    """
    if not isinstance(name, str):
        raise TypeError(f"family name must be a string, got {type(name).__name__}")
    try:
        cls = FAMILIES[name]
    except KeyError:
        raise ValueError(
            f"unknown copula family {name!r}; known: {', '.join(FAMILY_NAMES)}"
        ) from None
    return cls(rotation)


__all__ = [
    "BB1", "BB7", "FAMILIES", "FAMILY_NAMES", "Clayton", "CopulaFamily", "Frank", "Gaussian",
    "Gumbel", "Independence", "Joe", "StudentT", "family",
]
