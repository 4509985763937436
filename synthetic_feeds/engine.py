"""From a scenario design to prices and ground truth.

A design lays copula regimes end to end on a master calendar of weekdays. In each regime the
assets are partitioned into blocks: assets in different blocks (or in no block) are
independent, and within a block a multivariate copula from :mod:`synthetic_feeds.samplers`
ties them. So on every date each pair's copula is known exactly (the bivariate margin of its
block's copula, or independence) and is written to the truth with tau and tail coefficients
computed by :mod:`monitor.stats.copulas`, so conventions match the rest of the project.

Uniforms are drawn for every asset on every master date; an asset's draws on the days its venue
is closed are discarded (it does not trade, so no return happens). The copula therefore holds
exactly between the innovations of two assets on every date both trade, and each return
computed from consecutive available prices is exactly one simulated daily return.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from monitor.common.arrays import read_only
from monitor.stats.copulas import family as copula_family

from . import samplers
from .calendars import Venue, business_days, trading_mask
from .marginals import simulate_paths
from .universe import Asset

BLOCK_FAMILIES = ("gaussian", "student_t", "clayton", "gumbel")

PairCopula = tuple[str, int, tuple[tuple[str, float], ...]]
INDEPENDENCE: PairCopula = ("independence", 0, ())


@dataclass(frozen=True, slots=True)
class Block:
    """A group of assets tied by one multivariate copula during a regime.

    Build with :meth:`gaussian`, :meth:`student_t`, :meth:`clayton` or :meth:`gumbel`.

    Attributes
    ----------
    assets : tuple of str
        Member asset names, in the order of the correlation matrix rows.
    family : str
        One of :data:`BLOCK_FAMILIES`.
    rotation : {0, 180}
        180 gives the survival copula (Archimedean blocks only).
    theta : float or None
        Archimedean parameter.
    nu : float or None
        Student-t degrees of freedom.
    correlation : tuple of tuples or None
        Correlation matrix of an elliptical block.
    """

    assets: tuple[str, ...]
    family: str
    rotation: int = 0
    theta: float | None = None
    nu: float | None = None
    correlation: tuple[tuple[float, ...], ...] | None = None

    def __post_init__(self) -> None:
        if len(self.assets) < 2 or len(set(self.assets)) != len(self.assets):
            raise ValueError(f"a block needs two or more distinct assets, got {self.assets}")
        if self.family not in BLOCK_FAMILIES:
            raise ValueError(f"block family must be one of {BLOCK_FAMILIES}, "
                             f"got {self.family!r}")
        if self.rotation not in (0, 180) or (self.rotation and self.correlation is not None):
            raise ValueError("rotation 180 is for Archimedean blocks only")
        if self.correlation is not None:
            r = np.array(self.correlation)
            if r.shape != (len(self.assets),) * 2:
                raise ValueError(f"correlation of shape {r.shape} for {len(self.assets)} assets")
            samplers.correlation_cholesky(r)

    @classmethod
    def gaussian(cls, assets: Sequence[str], correlation: NDArray) -> Block:
        """Gaussian copula with the given correlation matrix."""
        return cls(tuple(assets), "gaussian", correlation=_as_tuples(correlation))

    @classmethod
    def student_t(cls, assets: Sequence[str], correlation: NDArray, nu: float) -> Block:
        """Student-t copula with the given correlation matrix and degrees of freedom."""
        return cls(tuple(assets), "student_t", nu=float(nu), correlation=_as_tuples(correlation))

    @classmethod
    def clayton(cls, assets: Sequence[str], theta: float, rotation: int = 0) -> Block:
        """Exchangeable Clayton copula (rotation 180: survival Clayton, upper tail)."""
        return cls(tuple(assets), "clayton", rotation=rotation, theta=float(theta))

    @classmethod
    def gumbel(cls, assets: Sequence[str], theta: float, rotation: int = 0) -> Block:
        """Exchangeable Gumbel copula (rotation 180: survival Gumbel, lower tail)."""
        return cls(tuple(assets), "gumbel", rotation=rotation, theta=float(theta))

    def sample(self, n: int, rng: np.random.Generator) -> NDArray[np.float64]:
        """Draw ``n`` rows of uniforms, one column per member asset."""
        d = len(self.assets)
        if self.family == "gaussian":
            u = samplers.sample_gaussian(n, self.correlation, rng)
        elif self.family == "student_t":
            u = samplers.sample_student_t(n, self.correlation, self.nu, rng)
        elif self.family == "clayton":
            u = samplers.sample_clayton(n, d, self.theta, rng)
        else:
            u = samplers.sample_gumbel(n, d, self.theta, rng)
        return samplers.survival(u) if self.rotation == 180 else u

    def pair_copula(self, a: str, b: str) -> PairCopula:
        """The bivariate copula of members ``a`` (first argument) and ``b``."""
        i, j = self.assets.index(a), self.assets.index(b)
        if self.family in ("gaussian", "student_t"):
            rho = float(self.correlation[i][j])
            if self.family == "gaussian":
                # A Gaussian copula with rho = 0 is the independence copula: say so, so that
                # equal copulas never start a new truth segment.
                return INDEPENDENCE if rho == 0.0 else ("gaussian", 0, (("rho", rho),))
            return ("student_t", 0, (("rho", rho), ("nu", float(self.nu))))
        if self.family == "gumbel" and self.theta == 1.0:
            return INDEPENDENCE
        return (self.family, self.rotation, (("theta", float(self.theta)),))

    def to_json(self) -> dict:
        """JSON-ready description of the block."""
        out: dict = {"assets": list(self.assets), "family": self.family,
                     "rotation": self.rotation}
        if self.family in ("clayton", "gumbel"):
            out["params"] = {"theta": self.theta}
            out["construction"] = ("Marshall-Olkin frailty (gamma)" if self.family == "clayton"
                                   else "Marshall-Olkin frailty (positive stable)")
            if self.rotation == 180:
                out["construction"] += ", survival (1 - U)"
        else:
            out["params"] = {"nu": self.nu} if self.family == "student_t" else {}
            out["correlation"] = [list(row) for row in self.correlation]
        return out


def _as_tuples(matrix: NDArray) -> tuple[tuple[float, ...], ...]:
    return tuple(tuple(float(x) for x in row) for row in np.asarray(matrix, dtype=float))


@dataclass(frozen=True, slots=True)
class Regime:
    """A stretch of consecutive master-calendar days with one dependence structure.

    Attributes
    ----------
    name : str
        Short identifier (lower-case, hyphenated).
    description : str
        What happens, for people.
    days : int
        Length in master-calendar (weekday) days.
    blocks : tuple of Block
        Disjoint groups; assets outside every block are independent of all others.
    """

    name: str
    description: str
    days: int
    blocks: tuple[Block, ...]

    def __post_init__(self) -> None:
        if self.days < 1:
            raise ValueError(f"regime {self.name!r} must last at least one day")
        members = [a for b in self.blocks for a in b.assets]
        if len(members) != len(set(members)):
            raise ValueError(f"regime {self.name!r}: an asset is in two blocks")

    def pair_copula(self, a: str, b: str) -> PairCopula:
        """The copula of assets ``a`` and ``b`` during this regime."""
        for block in self.blocks:
            if a in block.assets and b in block.assets:
                return block.pair_copula(a, b)
        return INDEPENDENCE


@dataclass(frozen=True, slots=True)
class Closure:
    """A one-off closure of a venue on a master-calendar day (e.g. an emergency halt)."""

    venue: str
    date: pd.Timestamp
    reason: str


@dataclass(frozen=True, slots=True)
class Design:
    """Everything that defines a scenario apart from the seed.

    Attributes
    ----------
    name, description : str
        Scenario name and one-line description.
    assets : tuple of Asset
        In column order.
    venues : tuple of Venue
        Every venue an asset refers to.
    start : pandas.Timestamp
        First master-calendar day (moved to the next weekday if needed).
    regimes : tuple of Regime
        Laid end to end from ``start``.
    closures : tuple of Closure
        One-off venue closures in addition to the holiday rules.
    options : mapping
        The resolved scenario options, recorded in the truth.
    """

    name: str
    description: str
    assets: tuple[Asset, ...]
    venues: tuple[Venue, ...]
    start: pd.Timestamp
    regimes: tuple[Regime, ...]
    closures: tuple[Closure, ...] = ()
    options: Mapping[str, object] = field(default_factory=dict)

    def __post_init__(self) -> None:
        names = [a.name for a in self.assets]
        if len(set(names)) != len(names):
            raise ValueError("asset names must be unique")
        known = {v.name for v in self.venues}
        for a in self.assets:
            if a.venue not in known:
                raise ValueError(f"asset {a.name}: unknown venue {a.venue!r}")
        for r in self.regimes:
            for b in r.blocks:
                missing = set(b.assets) - set(names)
                if missing:
                    raise ValueError(f"regime {r.name!r} refers to unknown assets {missing}")

    @property
    def n_days(self) -> int:
        """Length of the master calendar."""
        return sum(r.days for r in self.regimes)

    def dates(self) -> pd.DatetimeIndex:
        """The master calendar."""
        return business_days(self.start, self.n_days)


@dataclass(frozen=True, slots=True)
class Simulation:
    """Raw output of :func:`simulate` on the master calendar (rows = master days).

    Attributes
    ----------
    dates : DatetimeIndex
    trading : ndarray of bool, shape (T, k)
        Whether each asset trades on each day.
    prices, innovations, volatility : ndarray, shape (T, k)
        NaN where the asset does not trade; volatility is sigma_t in percent. All arrays are
        read-only.
    """

    dates: pd.DatetimeIndex
    trading: NDArray[np.bool_]
    prices: NDArray[np.float64]
    innovations: NDArray[np.float64]
    volatility: NDArray[np.float64]


def closed_days(design: Design, dates: pd.DatetimeIndex) -> dict[str, pd.DatetimeIndex]:
    """Per venue, the master-calendar days on which it is closed (holidays and closures)."""
    start, end = dates[0], dates[-1]
    out = {}
    for venue in design.venues:
        extra = [c.date for c in design.closures if c.venue == venue.name]
        out[venue.name] = venue.holiday_dates(start, end).union(pd.DatetimeIndex(extra))
    return out


def sample_uniforms(design: Design, rng: np.random.Generator) -> NDArray[np.float64]:
    """Copula uniforms for every asset on every master-calendar day, regime by regime."""
    names = [a.name for a in design.assets]
    col = {n: k for k, n in enumerate(names)}
    u = np.empty((design.n_days, len(names)))
    row = 0
    for regime in design.regimes:
        rows = slice(row, row + regime.days)
        free = set(names)
        for block in regime.blocks:
            u[rows, [col[a] for a in block.assets]] = block.sample(regime.days, rng)
            free -= set(block.assets)
        lone = [col[a] for a in names if a in free]
        if lone:
            u[rows, lone] = samplers.sample_independence(regime.days, len(lone), rng)
        row += regime.days
    return u


def simulate(design: Design, rng: np.random.Generator) -> Simulation:
    """Simulate the design: uniforms -> innovations -> GARCH paths -> prices.

    Parameters
    ----------
    design : Design
    rng : numpy.random.Generator

    Returns
    -------
    Simulation
        Arrays on the master calendar; NaN where an asset does not trade.

    Notes
    -----
    Innovations are z = F^{-1}(U) with F the asset's standardised innovation law (Sklar 1959),
    the variance recursion runs over the asset's own trading days only, and the log price
    is ln P_0 + sum of r_t / 100.
    """
    dates = design.dates()
    closed = closed_days(design, dates)
    trading = np.column_stack([trading_mask(dates, closed[a.venue]) for a in design.assets])
    u = sample_uniforms(design, rng)
    z_full = np.column_stack([a.marginal.ppf(u[:, k]) for k, a in enumerate(design.assets)])
    n_own = trading.sum(axis=0)
    # Pack each asset's trading-day innovations at the top of its column; the zero padding
    # below never feeds back into earlier days.
    z_own = np.zeros_like(z_full)
    for k in range(len(design.assets)):
        z_own[: n_own[k], k] = z_full[trading[:, k], k]
    r_own, sigma_own = simulate_paths([a.marginal for a in design.assets], z_own)
    log_p0 = np.log([a.start_price for a in design.assets])
    log_p_own = log_p0 + np.cumsum(r_own / 100.0, axis=0)
    prices = np.full(z_full.shape, np.nan)
    innovations = np.full(z_full.shape, np.nan)
    volatility = np.full(z_full.shape, np.nan)
    for k in range(len(design.assets)):
        m, n = trading[:, k], n_own[k]
        prices[m, k] = np.exp(log_p_own[:n, k])
        innovations[m, k] = z_own[:n, k]
        volatility[m, k] = sigma_own[:n, k]
    return Simulation(dates, read_only(trading), read_only(prices), read_only(innovations),
                      read_only(volatility))


# ------------------------------------------------------------------------------- truth
def _fmt(d: pd.Timestamp) -> str:
    return d.strftime("%Y-%m-%d")


def _pair_segments(design: Design, dates: pd.DatetimeIndex) -> list[dict]:
    names = [a.name for a in design.assets]
    bounds = np.cumsum([0] + [r.days for r in design.regimes])
    measures: dict[PairCopula, tuple[float, float, float]] = {}

    def measure(key: PairCopula) -> tuple[float, float, float]:
        if key not in measures:
            fam = copula_family(key[0], key[1])
            params = dict(key[2])
            measures[key] = (float(fam.kendall_tau(params)), float(fam.tail_lower(params)),
                             float(fam.tail_upper(params)))
        return measures[key]

    pairs = []
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            runs: list[list] = []  # [first regime index, last regime index, key]
            for g, regime in enumerate(design.regimes):
                key = regime.pair_copula(a, b)
                if runs and runs[-1][2] == key:
                    runs[-1][1] = g
                else:
                    runs.append([g, g, key])
            segments = []
            for g0, g1, key in runs:
                tau, lower, upper = measure(key)
                segments.append({
                    "start": _fmt(dates[bounds[g0]]),
                    "end": _fmt(dates[bounds[g1 + 1] - 1]),
                    "regimes": [r.name for r in design.regimes[g0:g1 + 1]],
                    "family": key[0],
                    "rotation": key[1],
                    "params": dict(key[2]),
                    "kendall_tau": tau,
                    "tail_lower": lower,
                    "tail_upper": upper,
                })
            pairs.append({"pair": [a, b], "segments": segments})
    return pairs


def build_truth(design: Design, sim: Simulation, seed: int) -> dict:
    """The JSON-ready ground truth of a simulated design.

    Keys: ``scenario, description, note, seed, start, end, settings, venues, assets, regimes,
    change_points, pairs``. ``pairs`` holds, for every unordered pair (in column order), its
    segments: maximal date ranges with one copula, covering the master calendar without gaps
    or overlaps.
    """
    dates = sim.dates
    bounds = np.cumsum([0] + [r.days for r in design.regimes])
    regimes = []
    for g, r in enumerate(design.regimes):
        in_block = {a for b in r.blocks for a in b.assets}
        regimes.append({
            "name": r.name,
            "start": _fmt(dates[bounds[g]]),
            "end": _fmt(dates[bounds[g + 1] - 1]),
            "business_days": r.days,
            "description": r.description,
            "blocks": [b.to_json() for b in r.blocks],
            "independent_assets": [a.name for a in design.assets if a.name not in in_block],
        })
    assets = []
    for k, a in enumerate(design.assets):
        own = dates[sim.trading[:, k]]
        assets.append({
            "name": a.name,
            "class": a.asset_class,
            "description": a.description,
            "venue": a.venue,
            "start_price": a.start_price,
            "first_date": _fmt(own[0]),
            "last_date": _fmt(own[-1]),
            "trading_days": int(sim.trading[:, k].sum()),
            "closed_weekdays": [_fmt(d) for d in dates[~sim.trading[:, k]]],
            "marginal": a.marginal.to_json(),
        })
    pairs = _pair_segments(design, dates)
    change_points = sorted({s["start"] for p in pairs for s in p["segments"][1:]})
    return {
        "scenario": design.name,
        "description": design.description,
        "note": ("Invented data: every market, venue, asset, currency and holiday in this file "
                 "is fictional and was simulated from the models recorded here."),
        "seed": seed,
        "start": _fmt(dates[0]),
        "end": _fmt(dates[-1]),
        "settings": {
            "master_calendar": "Monday to Friday; each asset trades on its venue's open days",
            "business_days": len(dates),
            "options": dict(design.options),
            "copula_of": ("standardised innovations z_t of two assets on a date both trade; "
                          "equivalently the conditional copula of their returns given the past"),
            "returns": "r_t = 100 ln(P_t / P_prev), P_prev the asset's previous available price",
            "price_precision": "prices.csv holds 10 significant digits",
            "closures": [{"venue": c.venue, "date": _fmt(c.date), "reason": c.reason}
                         for c in design.closures],
        },
        "venues": [v.to_json() for v in design.venues
                   if any(a.venue == v.name for a in design.assets)],
        "assets": assets,
        "regimes": regimes,
        "change_points": change_points,
        "pairs": pairs,
    }
