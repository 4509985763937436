"""The invented market: the Marrowmere Federation and its neighbours Ostvale, Sunderreach and
the Pellar Isles. Every name, venue, holiday and currency here is made up; any likeness to a
real market is accidental.

Currencies: the Marrowmere quill (QL), the Ostvale tarn (TN), the Sunderreach fenna (FN) and
the Pellar pell (PL); FX rates are quoted as quills per unit of foreign currency.
"""

from __future__ import annotations

from dataclasses import dataclass
from types import MappingProxyType

import numpy as np

from .calendars import HolidayRule, Venue
from .marginals import MarginalModel

ASSET_CLASSES = ("equity_index", "government_bond", "commodity", "currency")


@dataclass(frozen=True, slots=True)
class Asset:
    """One tradeable series of the fictional market.

    Attributes
    ----------
    name : str
        Column name in ``prices.csv`` (short, upper case).
    asset_class : str
        One of :data:`ASSET_CLASSES`.
    description : str
        One line for people.
    venue : str
        Name of the :class:`~synthetic_feeds.calendars.Venue` whose calendar it trades on.
    start_price : float
        Price level before the first simulated return.
    marginal : MarginalModel
        Its return process.
    """

    name: str
    asset_class: str
    description: str
    venue: str
    start_price: float
    marginal: MarginalModel

    def __post_init__(self) -> None:
        if self.asset_class not in ASSET_CLASSES:
            raise ValueError(f"asset {self.name}: unknown class {self.asset_class!r}")
        if not self.start_price > 0:
            raise ValueError(f"asset {self.name}: start price must be positive")


def venues() -> tuple[Venue, ...]:
    """The five venues of the fictional market, each with its own holidays."""
    return (
        Venue("marrowmere-exchange", "Marrowmere Exchange (equities and government bonds)", (
            HolidayRule("New Year", 1, day=1),
            HolidayRule("Founders' Day", 3, day=14),
            HolidayRule("Lantern Monday", 6, weekday=0, nth=1),
            HolidayRule("Harvest Friday", 9, weekday=4, nth=-1),
            HolidayRule("Midwinter Eve", 12, day=21),
            HolidayRule("Midwinter Day", 12, day=22),
        )),
        Venue("ostvale-bourse", "Ostvale Bourse (equities and government bonds)", (
            HolidayRule("New Year", 1, day=1),
            HolidayRule("Second New Year", 1, day=2),
            HolidayRule("Thaw Monday", 4, weekday=0, nth=1),
            HolidayRule("Charter Day", 5, day=9),
            HolidayRule("Ferry Thursday", 8, weekday=3, nth=3),
            HolidayRule("Lamp Night", 12, day=30),
        )),
        Venue("sunderreach-exchange", "Sunderreach Exchange (equities)", (
            HolidayRule("New Year", 1, day=1),
            HolidayRule("Tide Day", 2, day=20),
            HolidayRule("Sunder Monday", 7, weekday=0, nth=2),
            HolidayRule("Reach Day", 10, day=30),
            HolidayRule("Year's End", 12, day=31),
        )),
        Venue("cinder-hall", "Cinder Hall commodity market (ore and grain)", (
            HolidayRule("New Year", 1, day=1),
            HolidayRule("Miners' Monday", 5, weekday=0, nth=1),
            HolidayRule("Smelt Day", 9, day=1),
            HolidayRule("Midwinter Day", 12, day=22),
        )),
        Venue("fx-interbank", "Interbank currency market", (
            HolidayRule("New Year", 1, day=1),
        )),
    )


def assets() -> tuple[Asset, ...]:
    """The twelve assets of the main scenario, in column order.

    Notes
    -----
    Variance parameters are in percent-squared units, as ``arch`` estimates them on
    100 x log returns; the persistence (alpha + beta + gamma E[z^2 1{z<0}]) is between 0.97
    and 0.99, typical of daily index returns (e.g. alpha = 0.10, beta = 0.89 for the daily
    index series in docs/check-values.md section 10).
    """
    g, gjr, t, st = "garch", "gjr-garch", "student_t", "skew_t"
    return (
        Asset("MRW40", "equity_index", "Marrowmere 40 large-cap index", "marrowmere-exchange",
              4250.0, MarginalModel(gjr, st, mu=0.04, omega=0.02, alpha=0.03, gamma=0.10,
                                    beta=0.90, nu=7.0, skew=-0.10)),
        Asset("MRWSC", "equity_index", "Marrowmere small-cap index", "marrowmere-exchange",
              1830.0, MarginalModel(gjr, st, mu=0.05, omega=0.04, alpha=0.04, gamma=0.12,
                                    beta=0.88, nu=6.0, skew=-0.08)),
        Asset("MRWBK", "equity_index", "Marrowmere banks sector index", "marrowmere-exchange",
              612.0, MarginalModel(gjr, t, mu=0.03, omega=0.03, alpha=0.05, gamma=0.10,
                                   beta=0.88, nu=5.0)),
        Asset("OSV25", "equity_index", "Ostvale 25 index", "ostvale-bourse",
              9875.0, MarginalModel(g, t, mu=0.03, omega=0.03, alpha=0.08, beta=0.90, nu=6.0)),
        Asset("SDR100", "equity_index", "Sunderreach 100 index", "sunderreach-exchange",
              2140.0, MarginalModel(gjr, st, mu=0.04, omega=0.025, alpha=0.02, gamma=0.12,
                                    beta=0.91, nu=8.0, skew=-0.12)),
        Asset("MGB10", "government_bond", "Marrowmere 10-year government bond future",
              "marrowmere-exchange",
              121.5, MarginalModel(g, t, mu=0.005, omega=0.002, alpha=0.05, beta=0.93, nu=8.0)),
        Asset("OGB5", "government_bond", "Ostvale 5-year government bond future",
              "ostvale-bourse",
              108.2, MarginalModel(g, t, mu=0.004, omega=0.0015, alpha=0.06, beta=0.92,
                                   nu=10.0)),
        Asset("CNDR", "commodity", "Cinderite ore, front-month contract", "cinder-hall",
              84.6, MarginalModel(g, st, mu=0.02, omega=0.06, alpha=0.07, beta=0.90, nu=5.0,
                                  skew=0.10)),
        Asset("SEDG", "commodity", "Sedgewheat, front-month contract", "cinder-hall",
              312.0, MarginalModel(g, t, mu=0.01, omega=0.05, alpha=0.09, beta=0.88, nu=6.0)),
        Asset("TNQL", "currency", "Ostvale tarn in Marrowmere quills", "fx-interbank",
              1.3420, MarginalModel(g, t, mu=0.0, omega=0.006, alpha=0.04, beta=0.94, nu=7.0)),
        Asset("FNQL", "currency", "Sunderreach fenna in Marrowmere quills", "fx-interbank",
              0.7815, MarginalModel(g, st, mu=0.0, omega=0.01, alpha=0.05, beta=0.92, nu=6.0,
                                    skew=-0.05)),
        Asset("PLQL", "currency", "Pellar pell in Marrowmere quills", "fx-interbank",
              0.0926, MarginalModel(g, t, mu=0.0, omega=0.008, alpha=0.06, beta=0.92, nu=5.0)),
    )


#: Factor loadings of the main scenario's calm correlation matrix. Factors: world equity,
#: Marrowmere domestic, flight to quality (bonds up, equities down), commodity cycle, quill
#: weakness. The sign pattern gives negative equity/bond correlation.
_LOADINGS = MappingProxyType({
    "MRW40": (0.70, 0.45, -0.20, 0.00, 0.00),
    "MRWSC": (0.60, 0.50, -0.15, 0.00, 0.00),
    "MRWBK": (0.62, 0.48, -0.10, 0.00, 0.00),
    "OSV25": (0.72, 0.00, -0.15, 0.00, 0.00),
    "SDR100": (0.70, 0.00, 0.00, 0.20, 0.00),
    "MGB10": (-0.25, 0.00, 0.80, 0.00, 0.00),
    "OGB5": (-0.20, 0.00, 0.75, 0.00, 0.00),
    "CNDR": (0.30, 0.00, 0.00, 0.65, 0.00),
    "SEDG": (0.15, 0.00, 0.00, 0.55, 0.00),
    "TNQL": (0.15, 0.00, 0.00, 0.00, 0.60),
    "FNQL": (0.10, 0.00, 0.00, 0.25, 0.55),
    "PLQL": (0.08, 0.00, 0.05, 0.00, 0.50),
})


def factor_correlation(loadings: np.ndarray, decimals: int = 4) -> np.ndarray:
    """Correlation matrix ``L L' + diag(1 - diag(L L'))`` with off-diagonals rounded.

    Parameters
    ----------
    loadings : ndarray, shape (d, k)
        Factor loadings; every row must have squared norm below 1.
    decimals : int
        Off-diagonal entries are rounded so the truth file carries short numbers.

    Returns
    -------
    ndarray, shape (d, d)
        A positive-definite correlation matrix.

    Notes
    -----
    A factor structure with positive idiosyncratic variances is positive definite by
    construction. Rounding moves each eigenvalue by at most the spectral norm of the rounding
    error, itself at most d * 0.5 * 10^-decimals (Weyl's inequality); the rounded matrix is
    checked to keep its smallest eigenvalue above that margin.
    """
    lam = np.asarray(loadings, dtype=float)
    if np.any(np.sum(lam * lam, axis=1) >= 1.0):
        raise ValueError("every row of the loadings must have squared norm below 1")
    r = np.round(lam @ lam.T, decimals)
    np.fill_diagonal(r, 1.0)
    if np.linalg.eigvalsh(r)[0] <= r.shape[0] * 0.5 * 10.0 ** -decimals:
        raise ValueError("rounded factor correlation is too close to singular")
    return r


def calm_correlation(names: tuple[str, ...]) -> np.ndarray:
    """The main scenario's calm correlation matrix restricted to ``names`` (in that order)."""
    return factor_correlation(np.array([_LOADINGS[n] for n in names]))
