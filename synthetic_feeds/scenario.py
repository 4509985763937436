"""Generating, writing and querying scenarios: the public entry points of the package."""

from __future__ import annotations

import inspect
import json
import os
import tempfile
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType

import numpy as np
import pandas as pd

from monitor.common.errors import InputError

from .designs import DESIGNERS, SCENARIO_DESCRIPTIONS
from .engine import build_truth, simulate

#: Scenario name -> one-line description.
SCENARIOS: Mapping[str, str] = SCENARIO_DESCRIPTIONS

PRICES_FILE = "prices.csv"
TRUTH_FILE = "truth.json"
#: Significant digits of prices in ``prices.csv``: relative rounding 5e-11, far below any
#: daily return, so no ties or distortions arise in the returns.
PRICE_DIGITS = 10


@dataclass(frozen=True, slots=True)
class Scenario:
    """A generated scenario: prices, the simulated internals and the ground truth.

    Attributes
    ----------
    name : str
        Scenario name (a key of :data:`SCENARIOS`).
    seed : int
        Seed it was generated from.
    prices : pandas.DataFrame
        Wide prices: ``DatetimeIndex`` named ``date`` (weekdays on which at least one asset
        trades), one float column per asset, NaN where the asset does not trade.
    innovations : pandas.DataFrame
        The standardised innovations z_t (mean 0, variance 1) behind each return, same shape;
        their copula on common trading days is exactly the truth's.
    volatility : pandas.DataFrame
        Conditional volatility sigma_t of each percent return, same shape.
    truth : dict
        JSON-ready ground truth (see :func:`synthetic_feeds.engine.build_truth`); treat it as
        read-only.
    """

    name: str
    seed: int
    prices: pd.DataFrame
    innovations: pd.DataFrame
    volatility: pd.DataFrame
    truth: dict

    @property
    def assets(self) -> tuple[str, ...]:
        """Asset (column) names in order."""
        return tuple(self.prices.columns)

    def log_returns(self) -> pd.DataFrame:
        """Percent log returns 100 ln(P_t / P_prev) per asset on its own trading days.

        P_prev is the asset's previous available price, so a return after a holiday is one
        simulated daily return, not two. NaN on non-trading days and on the first day.
        """
        out = {}
        for col in self.prices.columns:
            p = self.prices[col].dropna()
            out[col] = (100.0 * np.log(p).diff()).reindex(self.prices.index)
        return pd.DataFrame(out, index=self.prices.index)

    def segment(self, a: str, b: str, date: str | pd.Timestamp) -> dict:
        """The true copula segment of pair (a, b) on ``date``; see :func:`true_segment`."""
        return true_segment(self.truth, a, b, date)


def _check_seed(seed: object) -> int:
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise InputError(f"seed must be a non-negative integer, got {seed!r}")
    return int(seed)


def _designer(name: object):
    if not isinstance(name, str) or name not in DESIGNERS:
        raise InputError(f"unknown scenario {name!r}; known: {', '.join(SCENARIOS)}")
    return DESIGNERS[name]


def scenario_options(name: str) -> dict[str, object]:
    """The options scenario ``name`` takes, with their defaults.

    Raises
    ------
    InputError
        For an unknown scenario.
    """
    designer = _designer(name)
    return {p.name: p.default for p in inspect.signature(designer).parameters.values()}


def generate(name: str, seed: int = 0, **options: object) -> Scenario:
    """Simulate scenario ``name``.

    Parameters
    ----------
    name : str
        A key of :data:`SCENARIOS`.
    seed : int
        Non-negative seed of ``numpy.random.default_rng``; the same seed gives identical
        output.
    **options
        Scenario options (see :func:`scenario_options`), e.g. ``n_assets=10`` for
        ``wide-grid`` or ``calm_years=3`` for ``tail-shift``.

    Returns
    -------
    Scenario

    Raises
    ------
    InputError
        For an unknown scenario or option, a bad option value or a bad seed.

    Notes
    -----
    Each asset's standardised innovations are F^{-1}(U) for copula uniforms U (Sklar 1959),
    filtered through its GARCH / GJR-GARCH recursion (Bollerslev 1986; Glosten, Jagannathan &
    Runkle 1993) on its own trading days and cumulated to prices.

    Examples
    --------
    >>> s = generate("tail-shift", seed=1, calm_years=2, shifted_years=1)
    >>> s.truth["change_points"]
    ['2018-01-04']
    """
    designer = _designer(name)
    seed = _check_seed(seed)
    allowed = scenario_options(name)
    unknown = [k for k in options if k not in allowed]
    if unknown:
        raise InputError(f"scenario {name!r} has no option {unknown[0]!r}; options: "
                         f"{', '.join(allowed) or 'none'}")
    design = designer(**options)
    sim = simulate(design, np.random.default_rng(seed))
    columns = [a.name for a in design.assets]
    # Master days on which no asset trades carry no information: leave them out of the files.
    keep = sim.trading.any(axis=1)
    index = pd.DatetimeIndex(sim.dates[keep], name="date")

    def frame(values: np.ndarray) -> pd.DataFrame:
        return pd.DataFrame(values[keep], index=index, columns=columns)

    prices = frame(sim.prices)
    # Round to what the file holds, so that generate() and a re-read prices.csv agree.
    prices = prices.map(lambda x: float(f"{x:.{PRICE_DIGITS}g}"))
    return Scenario(name, seed, prices, frame(sim.innovations), frame(sim.volatility),
                    build_truth(design, sim, seed))


def prices_csv_text(prices: pd.DataFrame) -> str:
    """``prices.csv`` as text: ``date`` column, one column per asset, empty cell if no price."""
    return prices.to_csv(date_format="%Y-%m-%d", float_format=f"%.{PRICE_DIGITS}g",
                         lineterminator="\n", index_label="date")


def truth_json_text(truth: Mapping) -> str:
    """``truth.json`` as text (indented, keys in a fixed order, no NaN)."""
    return json.dumps(truth, indent=2, allow_nan=False) + "\n"


def _write_atomic(path: Path, text: str) -> None:
    # A reader (or a crash) never sees half a file: write beside it, then rename.
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def write_scenario(name: str, out_dir: str | os.PathLike, seed: int = 0, **options: object
                   ) -> tuple[Path, Path]:
    """Generate scenario ``name`` and write ``out_dir/prices.csv`` and ``out_dir/truth.json``.

    Parameters
    ----------
    name : str
        A key of :data:`SCENARIOS`.
    out_dir : path-like
        Directory to write into; created (with parents) if missing. Existing files of the
        same names are replaced.
    seed : int
        Non-negative seed; the same seed gives byte-identical files.
    **options
        Scenario options, as for :func:`generate`.

    Returns
    -------
    (Path, Path)
        Paths of ``prices.csv`` and ``truth.json``.

    Raises
    ------
    InputError
        For an unknown scenario, bad options or seed, or an output directory that cannot be
        created or written.
    """
    _designer(name)
    _check_seed(seed)
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"output directory {out}: exists and is not a directory")
    scenario = generate(name, seed, **options)
    try:
        out.mkdir(parents=True, exist_ok=True)
        prices_path, truth_path = out / PRICES_FILE, out / TRUTH_FILE
        _write_atomic(prices_path, prices_csv_text(scenario.prices))
        _write_atomic(truth_path, truth_json_text(scenario.truth))
    except OSError as exc:
        raise InputError(f"output directory {out}: cannot write ({exc.strerror or exc})"
                         ) from None
    return prices_path, truth_path


_SWAPPED_ROTATION = MappingProxyType({0: 0, 90: 270, 180: 180, 270: 90})


def true_segment(truth: Mapping, a: str, b: str, date: str | pd.Timestamp) -> dict:
    """The true copula of pair (a, b) on ``date``, from a scenario's truth.

    Parameters
    ----------
    truth : mapping
        ``Scenario.truth`` or a loaded ``truth.json``.
    a, b : str
        Asset names, in either order; ``a`` is the first (u) argument of the copula.
    date : str or Timestamp
        A date between the truth's ``start`` and ``end``.

    Returns
    -------
    dict
        A copy of the segment: ``start, end, regimes, family, rotation, params, kendall_tau,
        tail_lower, tail_upper``. For (b, a) stored as (a, b) the rotation is mirrored
        (90 <-> 270), which is the copula of the swapped pair.

    Raises
    ------
    InputError
        If the pair is not in the truth or the date is outside it.

    Examples
    --------
    >>> truth = generate("steady-pair", years=1).truth
    >>> true_segment(truth, "SDR100", "MRW40", "2004-06-01")["family"]
    'gaussian'
    """
    ts = pd.Timestamp(date)
    key = None
    for entry in truth["pairs"]:
        first, second = entry["pair"]
        if (first, second) == (a, b) or (first, second) == (b, a):
            key = entry
            break
    if key is None:
        raise InputError(f"pair {a}/{b} is not in scenario {truth.get('scenario')!r}")
    for seg in key["segments"]:
        if pd.Timestamp(seg["start"]) <= ts <= pd.Timestamp(seg["end"]):
            out = {k: (dict(v) if isinstance(v, dict) else list(v) if isinstance(v, list)
                       else v) for k, v in seg.items()}
            if key["pair"][0] != a:
                out["rotation"] = _SWAPPED_ROTATION[out["rotation"]]
            return out
    raise InputError(f"date {ts.date()} is outside scenario {truth.get('scenario')!r} "
                     f"({truth['start']} to {truth['end']})")


def truth_table(truth: Mapping) -> pd.DataFrame:
    """Every pair's segments as one long table.

    Returns
    -------
    pandas.DataFrame
        Columns ``a, b, start, end, family, rotation, params, kendall_tau, tail_lower,
        tail_upper, regimes``; ``params`` as a JSON string; dates as Timestamps.
    """
    rows = []
    for entry in truth["pairs"]:
        a, b = entry["pair"]
        for seg in entry["segments"]:
            rows.append({"a": a, "b": b, "start": pd.Timestamp(seg["start"]),
                         "end": pd.Timestamp(seg["end"]), "family": seg["family"],
                         "rotation": seg["rotation"], "params": json.dumps(seg["params"]),
                         "kendall_tau": seg["kendall_tau"], "tail_lower": seg["tail_lower"],
                         "tail_upper": seg["tail_upper"],
                         "regimes": ", ".join(seg["regimes"])})
    return pd.DataFrame(rows)
