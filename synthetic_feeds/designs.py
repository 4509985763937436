"""The scenarios: each is a function of its options returning a :class:`~.engine.Design`.

Options are keyword arguments with defaults; bad values raise
:class:`monitor.common.errors.InputError` naming the option and the scenario.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from types import MappingProxyType

import numpy as np
import pandas as pd

from monitor.common.errors import InputError

from .calendars import business_days
from .engine import Block, Closure, Design, Regime
from .universe import Asset, calm_correlation, factor_correlation, venues
from .universe import assets as universe_assets

EQUITIES = ("MRW40", "MRWSC", "MRWBK", "OSV25", "SDR100")
OTHERS = ("MGB10", "OGB5", "CNDR", "SEDG", "TNQL", "FNQL", "PLQL")
UNIVERSE = EQUITIES + OTHERS


def gaussian_rho_from_tau(tau: float) -> float:
    """rho = sin(pi tau / 2), the Gaussian (and t) copula with Kendall's tau ``tau``.

    Notes
    -----
    Inverse of tau = (2/pi) arcsin(rho) (Lindskog, McNeil & Schmock 2003; docs/check-values.md
    section 1).
    """
    return math.sin(math.pi * tau / 2.0)


def clayton_theta_from_tau(tau: float) -> float:
    """theta = 2 tau / (1 - tau), the Clayton copula with Kendall's tau ``tau`` in (0, 1).

    Notes
    -----
    Inverse of tau = theta / (theta + 2) (Joe 1997, family B4; docs/check-values.md section 1).
    """
    return 2.0 * tau / (1.0 - tau)


def gumbel_theta_from_tau(tau: float) -> float:
    """theta = 1 / (1 - tau), the Gumbel copula with Kendall's tau ``tau`` in [0, 1).

    Notes
    -----
    Inverse of tau = 1 - 1/theta (Joe 1997, family B6; docs/check-values.md section 1).
    """
    return 1.0 / (1.0 - tau)


def _equicorrelation(d: int, rho: float) -> np.ndarray:
    r = np.full((d, d), rho)
    np.fill_diagonal(r, 1.0)
    return r


def _pick(names: tuple[str, ...]):
    by_name = {a.name: a for a in universe_assets()}
    return tuple(by_name[n] for n in names)


# ------------------------------------------------------------------------ option checks
def _fail(scenario: str, option: str, message: str) -> InputError:
    return InputError(f"scenario {scenario!r}: option {option} {message}")


def _date(scenario: str, option: str, value: object) -> pd.Timestamp:
    try:
        d = pd.Timestamp(value)
    except (ValueError, TypeError):
        raise _fail(scenario, option, f"must be a date YYYY-MM-DD, got {value!r}") from None
    if d is pd.NaT or d != d.normalize():
        raise _fail(scenario, option, f"must be a date YYYY-MM-DD, got {value!r}")
    return d


def _int(scenario: str, option: str, value: object, lo: int, hi: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or not lo <= value <= hi:
        raise _fail(scenario, option, f"must be an integer in [{lo}, {hi}], got {value!r}")
    return int(value)


def _float(scenario: str, option: str, value: object, lo: float, hi: float) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float | np.floating | np.integer):
        raise _fail(scenario, option, f"must be a number in ({lo}, {hi}), got {value!r}")
    x = float(value)
    if not lo < x < hi:
        raise _fail(scenario, option, f"must lie in ({lo}, {hi}), got {value!r}")
    return x


def _months(scenario: str, option: str, years: float) -> int:
    months = round(12 * years)
    if months < 1:
        raise _fail(scenario, option, f"must be at least one month (1/12), got {years!r}")
    return months


def _weekdays_between(start: pd.Timestamp, months: int) -> int:
    """Number of master-calendar days from ``start`` up to (not including) start + months."""
    first = business_days(start, 1)[0]
    return len(pd.bdate_range(first, first + pd.DateOffset(months=months) - pd.Timedelta(days=1)))


# ------------------------------------------------------------------------------ designs
MAIN_NAME = "marrowmere-decade"


def marrowmere_decade(start: str = "2015-01-05") -> Design:
    """The main demo: twelve assets of the Marrowmere market over 2,500 weekdays, eight regimes.

    Parameters
    ----------
    start : str
        First date (YYYY-MM-DD); moved to the next weekday if needed.

    Notes
    -----
    Regimes, in order (weekday counts): calm Gaussian (500); Ostvale debt stress with an
    exchangeable Clayton(4) among the five equity indices, tau 2/3 and lambda_L = 2^(-1/4)
    (130); nervous Student-t(5) recovery (370); quiet Gaussian plateau with equity tau 0.4
    (500); tail build-up, equities Clayton with the *same* tau 0.4 (250); harvest crash, a
    survival Gumbel(2.5) joining equities and commodities (120); Ostvale decoupling, the Ostvale
    assets and the tarn independent of the rest (300); calm again (330).
    """
    name = MAIN_NAME
    start_ts = _date(name, "start", start)
    tau_plateau = 0.4
    rest_block = Block.gaussian(OTHERS, calm_correlation(OTHERS))
    equity_plateau = Block.gaussian(
        EQUITIES, _equicorrelation(len(EQUITIES), gaussian_rho_from_tau(tau_plateau)))
    ostvale = ("OSV25", "OGB5")
    decoupled_rest = tuple(a for a in UNIVERSE if a not in ostvale + ("TNQL",))
    crash = EQUITIES + ("CNDR", "SEDG")
    crash_rest = tuple(a for a in UNIVERSE if a not in crash)
    regimes = (
        Regime("calm-expansion", "Calm growth: one Gaussian copula for the whole market, "
               "factor correlations, bonds negatively correlated with equities.", 500,
               (Block.gaussian(UNIVERSE, calm_correlation(UNIVERSE)),)),
        Regime("ostvale-debt-stress", "Ostvale sovereign-debt stress: the five equity indices "
               "fall together, exchangeable Clayton(4) (tau 2/3, strong lower tail "
               "dependence); they decouple from bonds, commodities and currencies.", 130,
               (Block.clayton(EQUITIES, 4.0), rest_block)),
        Regime("nervous-recovery", "Nervous recovery: calm correlations but a Student-t(5) "
               "copula for the whole market, symmetric tail dependence.", 370,
               (Block.student_t(UNIVERSE, calm_correlation(UNIVERSE), 5.0),)),
        Regime("quiet-plateau", "Quiet plateau: equity indices exchangeable Gaussian with "
               "Kendall's tau 0.4; the rest Gaussian with calm correlations, independent of "
               "equities.", 500,
               (equity_plateau, rest_block)),
        Regime("tail-build-up", "Tail build-up: equity indices switch to an exchangeable "
               "Clayton copula with the same Kendall's tau 0.4 - lower tail dependence rises "
               "from 0 to 2^(-3/4) while tau is unchanged.", 250,
               (Block.clayton(EQUITIES, clayton_theta_from_tau(tau_plateau)), rest_block)),
        Regime("harvest-crash", "Harvest crash: equities and commodities crash together, "
               "survival Gumbel(2.5) (tau 0.6, lower tail dependence 2 - 2^0.4).", 120,
               (Block.gumbel(crash, 2.5, rotation=180),
                Block.gaussian(crash_rest, calm_correlation(crash_rest)))),
        Regime("ostvale-decoupling", "Ostvale capital controls: the Ostvale index and bond "
               "keep their mutual Gaussian dependence but become independent of everything "
               "else; the tarn (TNQL) floats independently.", 300,
               (Block.gaussian(ostvale, calm_correlation(ostvale)),
                Block.gaussian(decoupled_rest, calm_correlation(decoupled_rest)))),
        Regime("late-calm", "Calm again: the calm-expansion Gaussian copula.", 330,
               (Block.gaussian(UNIVERSE, calm_correlation(UNIVERSE)),)),
    )
    dates = business_days(start_ts, sum(r.days for r in regimes))
    offset = {r.name: sum(q.days for q in regimes[:i]) for i, r in enumerate(regimes)}
    closures = tuple(
        [Closure("ostvale-bourse", dates[offset["ostvale-debt-stress"] + 60 + i],
                 "emergency closure during the debt stress") for i in range(3)]
        + [Closure("sunderreach-exchange", dates[offset["harvest-crash"] + 40 + i],
                   "storm closure") for i in range(2)])
    return Design(name, SCENARIO_DESCRIPTIONS[name], _pick(UNIVERSE), venues(), start_ts,
                  regimes, closures, {"start": start_ts.strftime("%Y-%m-%d")})


TAIL_SHIFT_ASSETS = ("MRW40", "OSV25", "SDR100", "MRWSC", "MRWBK")


def tail_shift(start: str = "2016-01-04", calm_years: float = 4.0, shifted_years: float = 2.0,
               tau: float = 0.35, n_assets: int = 2) -> Design:
    """A long calm Gaussian stretch, then Clayton with the same Kendall's tau.

    Parameters
    ----------
    start : str
        First date (YYYY-MM-DD).
    calm_years, shifted_years : float
        Lengths of the two regimes in years (rounded to whole months).
    tau : float
        Kendall's tau of every pair in both regimes, in (0, 0.95).
    n_assets : int
        2 to 5 equity indices on different venues' calendars; all pairs are exchangeable.

    Notes
    -----
    Gaussian rho = sin(pi tau / 2), Clayton theta = 2 tau / (1 - tau): equal tau, lower tail
    dependence 0 before and 2^(-1/theta) after (Joe 1997, family B4). The change date is the
    start of the second regime (``truth["change_points"][0]``).
    """
    name = "tail-shift"
    start_ts = _date(name, "start", start)
    tau = _float(name, "tau", tau, 0.0, 0.95)
    n = _int(name, "n_assets", n_assets, 2, len(TAIL_SHIFT_ASSETS))
    calm_m = _months(name, "calm_years", _float(name, "calm_years", calm_years, 0.0, 200.0))
    shift_m = _months(name, "shifted_years",
                      _float(name, "shifted_years", shifted_years, 0.0, 200.0))
    first = business_days(start_ts, 1)[0]
    calm_days = _weekdays_between(first, calm_m)
    change = business_days(first, calm_days + 1)[-1]
    shifted_days = _weekdays_between(change, shift_m)
    names = TAIL_SHIFT_ASSETS[:n]
    theta = clayton_theta_from_tau(tau)
    regimes = (
        Regime("calm", f"Gaussian copula, Kendall's tau {tau:g} for every pair.", calm_days,
               (Block.gaussian(names, _equicorrelation(n, gaussian_rho_from_tau(tau))),)),
        Regime("tail-shift", f"Clayton({theta:.6g}) copula with the same Kendall's tau "
               f"{tau:g}: lower tail dependence appears, tau is unchanged.", shifted_days,
               (Block.clayton(names, theta),)),
    )
    options = {"start": start_ts.strftime("%Y-%m-%d"), "calm_years": calm_m / 12,
               "shifted_years": shift_m / 12, "tau": tau, "n_assets": n}
    return Design(name, SCENARIO_DESCRIPTIONS[name], _pick(names), venues(), start_ts,
                  regimes, (), options)


STEADY_COPULAS = ("gaussian", "student-t", "clayton")


def steady_pair(start: str = "2004-01-05", years: float = 20.0, tau: float = 0.35,
                copula: str = "gaussian", nu: float = 4.0) -> Design:
    """A pair whose copula never changes, with Kendall's tau ``tau`` for ``years``.

    Parameters
    ----------
    start : str
        First date (YYYY-MM-DD).
    years : float
        Length in years (rounded to whole months).
    tau : float
        Kendall's tau, in (-0.95, 0.95); in (0, 0.95) for ``clayton``.
    copula : {"gaussian", "student-t", "clayton"}
        The copula throughout: Gaussian (no tail dependence), Student-t with ``nu`` degrees
        of freedom (the same tail dependence in both tails, standing all along) or Clayton
        (lower tail only).
    nu : float
        Degrees of freedom of the Student-t copula, in [1, 100].

    Notes
    -----
    For false-alarm calibration: the dependence never changes, so any alert raised on this
    pair is a false alarm; heavy tails present throughout are a standing condition, not a
    change. Gaussian and Student-t: rho = sin(pi tau / 2); Clayton: theta = 2 tau / (1 - tau)
    (Lindskog, McNeil & Schmock 2003; Joe 1997, family B4).
    """
    name = "steady-pair"
    start_ts = _date(name, "start", start)
    if copula not in STEADY_COPULAS:
        raise _fail(name, "copula", f"must be one of {', '.join(STEADY_COPULAS)}, "
                    f"got {copula!r}")
    lo = 0.0 if copula == "clayton" else -0.95
    tau = _float(name, "tau", tau, lo, 0.95)
    nu = _float(name, "nu", nu, 1.0, 100.0)
    months = _months(name, "years", _float(name, "years", years, 0.0, 200.0))
    names = ("MRW40", "SDR100")
    days = _weekdays_between(start_ts, months)
    corr = _equicorrelation(2, gaussian_rho_from_tau(tau))
    if copula == "gaussian":
        block, what = Block.gaussian(names, corr), "Gaussian copula"
    elif copula == "student-t":
        block, what = Block.student_t(names, corr, nu), f"Student-t({nu:g}) copula"
    else:
        theta = clayton_theta_from_tau(tau)
        block, what = Block.clayton(names, theta), f"Clayton({theta:.6g}) copula"
    regimes = (Regime("steady", f"{what}, Kendall's tau {tau:g}, throughout.", days,
                      (block,)),)
    options = {"start": start_ts.strftime("%Y-%m-%d"), "years": months / 12, "tau": tau,
               "copula": copula, "nu": nu}
    return Design(name, SCENARIO_DESCRIPTIONS[name], _pick(names), venues(), start_ts,
                  regimes, (), options)


_GOLDEN = (math.sqrt(5.0) - 1.0) / 2.0


def _grid_blocks(names: tuple[str, ...], size: int, offset: int, nu: float | None
                 ) -> tuple[Block, ...]:
    # One-factor correlations inside each block; loadings spread deterministically over
    # [0.35, 0.85) by the golden-ratio sequence, so the truth does not depend on the seed.
    groups = [names[:offset]] if offset else []
    groups += [names[i:i + size] for i in range(offset, len(names), size)]
    blocks = []
    for g in groups:
        if len(g) < 2:
            continue
        idx = np.array([names.index(a) for a in g])
        loadings = (0.35 + 0.5 * ((idx + 1) * _GOLDEN % 1.0))[:, None]
        corr = factor_correlation(loadings)
        blocks.append(Block.gaussian(g, corr) if nu is None else Block.student_t(g, corr, nu))
    return tuple(blocks)


def wide_grid(n_assets: int = 30, n_days: int = 5000, block_size: int = 5,
              start: str = "2005-01-03") -> Design:
    """Many assets over many days for speed benchmarks: block Gaussian / Student-t copulas.

    Parameters
    ----------
    n_assets : int
        Number of assets, 2 to 500 (columns ``AS01``, ``AS02``, ...).
    n_days : int
        Master-calendar weekdays, 3 to 50,000.
    block_size : int
        Assets per dependence block, 2 or more.
    start : str
        First date (YYYY-MM-DD).

    Notes
    -----
    Three regimes of about equal length: Gaussian blocks; the same correlations under a
    Student-t(5) copula; Gaussian blocks shifted by half a block (a change of structure).
    Marginal models and calendars cycle through the twelve assets of the main scenario.
    """
    name = "wide-grid"
    n = _int(name, "n_assets", n_assets, 2, 500)
    days = _int(name, "n_days", n_days, 3, 50_000)
    size = _int(name, "block_size", block_size, 2, 500)
    start_ts = _date(name, "start", start)
    width = max(2, len(str(n)))
    templates = universe_assets()
    names = tuple(f"AS{i + 1:0{width}d}" for i in range(n))
    grid_assets = []
    for i, a in enumerate(names):
        t = templates[i % len(templates)]
        grid_assets.append(Asset(a, t.asset_class, f"Grid asset {i + 1} (modelled like "
                                   f"{t.name}: {t.description})", t.venue, t.start_price,
                                   t.marginal))
    lengths = [days // 3, days // 3, days - 2 * (days // 3)]
    regimes = (
        Regime("grid-gaussian", f"Gaussian copula in blocks of {size}.", lengths[0],
               _grid_blocks(names, size, 0, None)),
        Regime("grid-student-t", "Student-t(5) copula, same blocks and correlations.",
               lengths[1], _grid_blocks(names, size, 0, 5.0)),
        Regime("grid-shifted", f"Gaussian copula in blocks of {size} shifted by "
               f"{size // 2}.", lengths[2], _grid_blocks(names, size, size // 2, None)),
    )
    options = {"n_assets": n, "n_days": days, "block_size": size,
               "start": start_ts.strftime("%Y-%m-%d")}
    return Design(name, SCENARIO_DESCRIPTIONS[name], tuple(grid_assets), venues(), start_ts,
                  regimes, (), options)


SCENARIO_DESCRIPTIONS = MappingProxyType({
    MAIN_NAME: "Main demo: 12 fictional assets (equities, bonds, commodities, currencies), "
               "~10 years, calm, stress, equal-tau tail build-up and decoupling regimes.",
    "tail-shift": "Detection benchmark: calm Gaussian (tau 0.35) for 4 years, then Clayton "
                  "with the same tau for 2 years.",
    "steady-pair": "False-alarm calibration: one pair, Gaussian copula with tau 0.35 for 20 "
                   "years, never changing (option copula: student-t or clayton).",
    "wide-grid": "Performance benchmark: 30 assets x 5000 days (options n_assets, n_days), "
                 "block Gaussian / Student-t dependence.",
})

DESIGNERS: MappingProxyType[str, Callable[..., Design]] = MappingProxyType({
    MAIN_NAME: marrowmere_decade,
    "tail-shift": tail_shift,
    "steady-pair": steady_pair,
    "wide-grid": wide_grid,
})
