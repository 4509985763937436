"""Marginal filtering: GARCH-type models per asset, standardised residuals out.

Each asset's daily log returns are filtered by a univariate model fitted with :mod:`arch`:
a constant or AR(1) conditional mean, a GARCH(1,1) or GJR-GARCH(1,1) conditional variance and
Student-t or skewed-t innovations, eight candidate specifications chosen between by BIC. The
standardised residuals ``z_t = (r_t - m_t) / sigma_t`` are what the copula layer ranks.

Two modes, named in every result (``FilteredSeries.mode``):

``"real-time"`` (default)
    Parameters are re-estimated every ``refit_every`` observations on the data up to that day
    only (an expanding window that starts at the asset's first return), and the residuals of
    the following days are filtered with those fixed parameters. Refit ``k`` uses returns
    ``0 .. min_obs + k * refit_every`` (positions counted from the asset's first return; the
    first return is held back as the AR lag, so the likelihood has ``min_obs + k * refit_every``
    observations) and produces the residuals of positions
    ``min_obs + k * refit_every + 1 .. min_obs + (k + 1) * refit_every``. The schedule depends on
    positions only, so appending data never changes a past residual, and
    :func:`extend_series` computes only what is new.

    Model choice: refit ``k`` selects by BIC among the candidates when ``k`` is a multiple of
    ``reselect_every`` (refit 0 included; 0 means only at refit 0), when the previous refit
    used the fallback, or when re-estimating the previous spec fails; otherwise it re-estimates
    the previous refit's spec warm-started from its estimates. At a selection each candidate
    starts from the previous refit's estimates mapped to its parameters (see ``_start_from``;
    arch's own starting values at the first refit and after a fallback). All of it is a
    function of the data up to the refit day.

``"in-sample"``
    One selection and fit on all the data, residuals from it (research only: every residual
    then depends on the whole sample).

Numerics: returns are scaled to percent (``SCALE = 100``) before fitting, so parameters such as
``mu`` and ``omega`` are in percent units; residuals are scale-free and ``sigma`` is reported
in the units of the input returns. A candidate is accepted when arch reports convergence
(flag 0), its estimates and residuals are finite, its persistence is below ``1 - 1e-5`` (not
on arch's stationarity boundary: integrated or explosive), its conditional variance stays
within a factor :data:`VARIANCE_PATH_LIMIT` of the sample variance on every day, and it is not
a deterministic decay: a fit whose response to shocks ``alpha + gamma / 2`` is below
:data:`MIN_SHOCK_RESPONSE` while its level ``omega / (1 - beta)`` is more than a factor 10 from
the sample variance only carries its start-up value towards a level unrelated to the data. A
near-integrated fit (persistence 0.9996, common on long daily samples) is accepted: its implied
unconditional variance may be many times the sample variance while its path follows the data. Fallback: when no candidate is accepted, the refit uses an EWMA variance with decay 0.94
(RiskMetrics), a constant mean equal to the sample mean and standardised Student-t innovations
whose degrees of freedom are estimated by maximum likelihood given that variance path (the
tails stay heavy); the fit records ``fallback="ewma-0.94-t"``, ``converged=False`` and every
problem met.

The variance filter for fixed parameters is our own vectorised recursion
(:func:`scipy.signal.lfilter`), with the presample variance ``sigma^2_0`` set as arch does: an
exponentially weighted (0.94) mean of the first 75 squared residuals -- here the residuals at
the fixed mean parameters, which lie inside the first estimation sample (``min_obs >= 100``),
so the start-up never looks ahead.

>>> import numpy as np, pandas as pd
>>> dates = pd.bdate_range("2001-01-01", periods=400)
>>> r = pd.Series(np.random.default_rng(1).standard_normal(400) / 100, index=dates, name="ALPHA")
>>> f = filter_series(r, refit_every=50)
>>> f.mode, len(f.residuals), [fit.sample_end.isoformat() for fit in f.fits]
('real-time', 149, ['2001-12-17', '2002-02-25', '2002-05-06'])
"""

from __future__ import annotations

import datetime as dt
import hashlib
import math
import warnings
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from typing import Any, TypeVar

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy import optimize, signal, special, stats

from monitor.common.arrays import read_only
from monitor.common.errors import InputError
from monitor.stats.criteria import information_criterion

__all__ = [
    "CANDIDATE_SPECS",
    "EWMA_DECAY",
    "FALLBACK_SPEC",
    "LJUNG_BOX_LAGS",
    "MIN_SHOCK_RESPONSE",
    "SCALE",
    "VARIANCE_PATH_LIMIT",
    "CandidateFit",
    "FilteredSeries",
    "LjungBox",
    "MarginalFit",
    "MarginalSettings",
    "MarginalSpec",
    "extend_series",
    "filter_series",
    "ljung_box",
    "select_marginal",
    "standardised_t_loglik",
]

#: Returns are multiplied by this before fitting (percent returns keep arch's optimiser well
#: conditioned); parameters are reported on this scale.
SCALE = 100.0

#: RiskMetrics decay of the EWMA fallback variance (J.P. Morgan/Reuters 1996, RiskMetrics --
#: Technical Document, 4th ed., section 5.3: lambda = 0.94 for daily data).
EWMA_DECAY = 0.94

#: Lags of the Ljung-Box diagnostics reported with every fit (common practice).
LJUNG_BOX_LAGS = 10

#: Version of the filtering algorithm, part of every settings key so results computed by a
#: different algorithm are never mixed with these in the store.
ALGORITHM_VERSION = "v2"

# A fit counts as stationary only below this persistence: arch constrains it to <= 1 and
# SLSQP lands within ~1e-6 of the boundary when the data are integrated or explosive.
_PERSISTENCE_LIMIT = 1.0 - 1e-5
#: A fit whose conditional variance leaves [var / limit, var * limit] on some day (var: the
#: sample variance of the fitted returns) is refused as broken: a factor 10^4 in variance is
#: 100 in volatility, far beyond any calm or crisis day of a daily series.
VARIANCE_PATH_LIMIT = 1.0e4
#: Least response of the variance to a shock, ``alpha + gamma / 2``, below which a fit whose
#: level is far from the sample variance is refused as a deterministic decay (our choice: a
#: daily GARCH responds with 0.02 to 0.15).
MIN_SHOCK_RESPONSE = 1.0e-3
# ... and "far": the level omega / (1 - beta) off the sample variance by more than this factor.
_DECAY_LEVEL_FACTOR = 10.0
#: Bounds of the fallback's degrees of freedom (arch's own bounds for its Student-t).
_NU_BOUNDS = (2.05, 500.0)
# arch's presample variance: EWMA weights 0.94**j over the first 75 residuals (arch 8.0,
# arch.univariate.volatility.GARCH.backcast).
_BACKCAST_DECAY = 0.94
_BACKCAST_SPAN = 75
# Largest plausible daily log return in absolute value; larger values are prices or percent.
_MAX_ABS_RETURN = 5.0

_MEANS = ("constant", "ar1")
_VOLATILITIES = ("garch", "gjr")
_DISTRIBUTIONS = ("t", "skewt")
_MODES = ("real-time", "in-sample")


# ------------------------------------------------------------------------------- specs
@dataclass(frozen=True, slots=True)
class MarginalSpec:
    """One model specification: conditional mean, variance process, innovation distribution.

    ``mean`` is ``"constant"`` (``m_t = mu``) or ``"ar1"`` (``m_t = mu + phi r_{t-1}``);
    ``volatility`` is ``"garch"`` or ``"gjr"`` (``"ewma"`` only for the fallback);
    ``distribution`` is ``"t"`` or ``"skewt"`` (the fallback's is ``"t"``; fits stored by
    algorithm v1 used ``"normal"``).
    """

    mean: str
    volatility: str
    distribution: str

    def __post_init__(self) -> None:
        fallback = (self.mean == "constant" and self.volatility == "ewma"
                    and self.distribution in ("t", "normal"))
        if not fallback and (self.mean not in _MEANS or self.volatility not in _VOLATILITIES
                             or self.distribution not in _DISTRIBUTIONS):
            raise ValueError(
                f"unknown marginal spec {self.mean!r}/{self.volatility!r}/{self.distribution!r}; "
                f"mean in {_MEANS}, volatility in {_VOLATILITIES}, distribution in "
                f"{_DISTRIBUTIONS}"
            )

    @property
    def key(self) -> str:
        """Stable short name, e.g. ``"ar1-gjr-skewt"``."""
        return f"{self.mean}-{self.volatility}-{self.distribution}"

    @classmethod
    def from_key(cls, key: str) -> MarginalSpec:
        """Inverse of :attr:`key`."""
        parts = key.split("-")
        if len(parts) != 3:
            raise ValueError(f"not a marginal spec key: {key!r} (expected mean-volatility-dist)")
        return cls(*parts)

    @property
    def label(self) -> str:
        """Human-readable name, e.g. ``"AR(1) GJR-GARCH(1,1) skew-t"``."""
        mean = {"constant": "constant-mean", "ar1": "AR(1)"}[self.mean]
        vol = {"garch": "GARCH(1,1)", "gjr": "GJR-GARCH(1,1)",
               "ewma": f"EWMA({EWMA_DECAY})"}[self.volatility]
        dist = {"t": "Student-t", "skewt": "skew-t", "normal": "normal"}[self.distribution]
        return f"{mean} {vol} {dist}"

    @property
    def param_names(self) -> tuple[str, ...]:
        """Parameter names in arch's order (our names: ``nu`` for arch's ``eta``)."""
        names = ["mu"] + (["phi"] if self.mean == "ar1" else [])
        names += {"garch": ["omega", "alpha", "beta"], "gjr": ["omega", "alpha", "gamma", "beta"],
                  "ewma": ["omega", "alpha", "beta"]}[self.volatility]
        names += {"t": ["nu"], "skewt": ["nu", "lambda"], "normal": []}[self.distribution]
        return tuple(names)

    @property
    def is_fallback(self) -> bool:
        return self.volatility == "ewma"


#: The eight candidates, in a fixed order (ties in BIC go to the earlier one).
CANDIDATE_SPECS: tuple[MarginalSpec, ...] = tuple(
    MarginalSpec(m, v, d) for m in _MEANS for v in _VOLATILITIES for d in _DISTRIBUTIONS
)
#: The stated fallback: constant mean, EWMA(0.94) variance, Student-t innovations.
FALLBACK_SPEC = MarginalSpec("constant", "ewma", "t")
_FALLBACK_NAME = f"ewma-{EWMA_DECAY}-t"


@dataclass(frozen=True, slots=True)
class MarginalSettings:
    """Everything that determines the residuals of a series; :attr:`key` names them in the store.

    Parameters
    ----------
    mode : {"real-time", "in-sample"}
        In-sample results ignore ``refit_every`` and ``reselect_every`` (not in their key).
    refit_every : int
        Observations between re-estimations (real-time). Default 21, about a trading month.
    min_obs : int
        Likelihood observations in the first estimation sample (real-time) and the least any
        fit accepts; at least 100. Default 250, about one trading year (common practice).
        A series needs ``min_obs + 1`` returns (one is held back as the AR lag).
    reselect_every : int
        Refits between BIC selections (real-time); 0 selects only at the first refit.
        Default 12, i.e. about a year at ``refit_every=21``.
    candidates : tuple of MarginalSpec
        Specifications compared by BIC; default all eight.
    """

    mode: str = "real-time"
    refit_every: int = 21
    min_obs: int = 250
    reselect_every: int = 12
    candidates: tuple[MarginalSpec, ...] = CANDIDATE_SPECS

    def __post_init__(self) -> None:
        if self.mode not in _MODES:
            raise ValueError(f"mode must be one of {_MODES}, got {self.mode!r}")
        for name, low in (("refit_every", 1), ("min_obs", 100), ("reselect_every", 0)):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < low:
                raise ValueError(f"{name} must be an integer >= {low}, got {value!r}")
        cands = tuple(self.candidates)
        if not cands or not all(isinstance(c, MarginalSpec) and not c.is_fallback
                                for c in cands) or len(set(cands)) != len(cands):
            raise ValueError("candidates must be distinct non-fallback MarginalSpec objects")
        object.__setattr__(self, "candidates", cands)

    @property
    def min_returns(self) -> int:
        """Fewest returns a series must have to be filtered (``min_obs + 1``)."""
        return self.min_obs + 1

    @property
    def key(self) -> str:
        """Stable store key, e.g. ``"real-time/refit21/min250/reselect12/all8/v2"``."""
        cands = ("all8" if self.candidates == CANDIDATE_SPECS
                 else "+".join(c.key for c in self.candidates))
        if self.mode == "in-sample":
            return f"in-sample/min{self.min_obs}/{cands}/{ALGORITHM_VERSION}"
        return (f"real-time/refit{self.refit_every}/min{self.min_obs}/"
                f"reselect{self.reselect_every}/{cands}/{ALGORITHM_VERSION}")

    @classmethod
    def from_key(cls, key: str) -> MarginalSettings:
        """Inverse of :attr:`key` (refuses keys of another algorithm version)."""
        parts = key.split("/")
        if not parts or parts[-1] != ALGORITHM_VERSION:
            raise ValueError(f"settings key {key!r} is not of algorithm {ALGORITHM_VERSION}")
        fields: dict[str, Any]  # keyword arguments of the settings
        try:
            if parts[0] == "in-sample" and len(parts) == 4:
                fields = {"mode": "in-sample", "min_obs": int(parts[1].removeprefix("min"))}
                cands = parts[2]
            elif parts[0] == "real-time" and len(parts) == 6:
                fields = {"mode": "real-time",
                          "refit_every": int(parts[1].removeprefix("refit")),
                          "min_obs": int(parts[2].removeprefix("min")),
                          "reselect_every": int(parts[3].removeprefix("reselect"))}
                cands = parts[4]
            else:
                raise ValueError(key)
        except ValueError:
            raise ValueError(f"not a marginal settings key: {key!r}") from None
        if cands != "all8":
            fields["candidates"] = tuple(MarginalSpec.from_key(c) for c in cands.split("+"))
        return cls(**fields)


# ------------------------------------------------------------------------------ results
@dataclass(frozen=True, slots=True)
class LjungBox:
    """Ljung-Box portmanteau test: statistic ``Q``, chi-square p-value, number of lags."""

    lags: int
    statistic: float
    pvalue: float

    def to_dict(self) -> dict[str, Any]:
        return {"lags": self.lags, "statistic": _json_float(self.statistic),
                "pvalue": _json_float(self.pvalue)}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> LjungBox:
        return cls(int(d["lags"]), _float(d["statistic"]), _float(d["pvalue"]))


@dataclass(frozen=True, slots=True)
class CandidateFit:
    """One candidate spec estimated at a selection refit (kept for reports and warm starts)."""

    spec: MarginalSpec
    params: dict[str, float] = field(hash=False)
    loglik: float
    bic: float
    accepted: bool
    problem: str

    def to_dict(self) -> dict[str, Any]:
        return {"spec": self.spec.key, "params": _json_params(self.params),
                "loglik": _json_float(self.loglik), "bic": _json_float(self.bic),
                "accepted": self.accepted, "problem": self.problem}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> CandidateFit:
        return cls(MarginalSpec.from_key(d["spec"]), _params(d["params"]), _float(d["loglik"]),
                   _float(d["bic"]), bool(d["accepted"]), str(d["problem"]))


@dataclass(frozen=True, slots=True)
class MarginalFit:
    """One estimation of one asset's marginal model and the residual dates it applies to.

    Attributes
    ----------
    spec : MarginalSpec
        The model used (``FALLBACK_SPEC`` when the fallback was used).
    params : dict
        Parameter name -> estimate, on the percent scale (``scale``); the fallback's are
        ``mu`` (sample mean), ``omega = 0``, ``alpha = 1 - 0.94``, ``beta = 0.94``.
    std_errors : dict
        arch's robust (Bollerslev-Wooldridge) standard errors; in-sample fits only (empty for
        real-time refits, where the numerical Hessian would double the cost).
    loglik, bic : float
        Log-likelihood and BIC on the estimation sample (``nobs`` observations); the
        fallback's are Gaussian with one parameter (``mu``).
    nobs, sample_start, sample_end
        Size and first/last date of the estimation sample's likelihood.
    converged : bool
        True when a GARCH-type candidate converged to a plausible estimate and is used.
    fallback : str
        ``""`` or the fallback used (``"ewma-0.94"``).
    problems : tuple of str
        Every failure met at this refit (candidates refused, failed re-estimation), so a
        fallback or a reselection always says why.
    persistence : float
        ``alpha + beta + gamma / 2`` (the half is exact for symmetric innovations and is arch's
        own stationarity constraint for skewed ones).
    ljung_box, ljung_box_squared : LjungBox
        Ljung-Box tests (``LJUNG_BOX_LAGS`` lags) on the estimation sample's standardised
        residuals and on their squares.
    refit : int
        Position in the refit schedule (0 for the first fit and for in-sample fits).
    method : {"selection", "re-estimate"}
        Whether the spec was chosen by BIC here or carried over and re-estimated.
    warm_start : bool
        Whether the optimiser started from earlier estimates (arch refuses starting values
        outside its bounds and then uses its own).
    applies_from, applies_to, n_applied
        First and last date (None before any) and count of residuals filtered with this fit.
    candidates : tuple of CandidateFit
        All candidates at a selection refit, empty otherwise.
    scale : float
        The factor applied to returns before fitting (``SCALE``).
    """

    spec: MarginalSpec
    params: dict[str, float] = field(hash=False)
    std_errors: dict[str, float] = field(hash=False)
    loglik: float
    bic: float
    nobs: int
    sample_start: dt.date
    sample_end: dt.date
    converged: bool
    fallback: str
    problems: tuple[str, ...]
    persistence: float
    ljung_box: LjungBox
    ljung_box_squared: LjungBox
    refit: int
    method: str
    warm_start: bool
    applies_from: dt.date | None
    applies_to: dt.date | None
    n_applied: int
    candidates: tuple[CandidateFit, ...]
    scale: float = SCALE

    def to_dict(self) -> dict[str, Any]:
        """JSON-able dict (dates as ISO strings, non-finite floats as None)."""
        return {
            "spec": self.spec.key, "params": _json_params(self.params),
            "std_errors": _json_params(self.std_errors), "loglik": _json_float(self.loglik),
            "bic": _json_float(self.bic), "nobs": self.nobs,
            "sample_start": self.sample_start.isoformat(),
            "sample_end": self.sample_end.isoformat(), "converged": self.converged,
            "fallback": self.fallback, "problems": list(self.problems),
            "persistence": _json_float(self.persistence),
            "ljung_box": self.ljung_box.to_dict(),
            "ljung_box_squared": self.ljung_box_squared.to_dict(),
            "refit": self.refit, "method": self.method, "warm_start": self.warm_start,
            "applies_from": _iso(self.applies_from), "applies_to": _iso(self.applies_to),
            "n_applied": self.n_applied, "candidates": [c.to_dict() for c in self.candidates],
            "scale": self.scale,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> MarginalFit:
        """Inverse of :meth:`to_dict`."""
        return cls(
            spec=MarginalSpec.from_key(d["spec"]), params=_params(d["params"]),
            std_errors=_params(d["std_errors"]), loglik=_float(d["loglik"]),
            bic=_float(d["bic"]), nobs=int(d["nobs"]),
            sample_start=dt.date.fromisoformat(d["sample_start"]),
            sample_end=dt.date.fromisoformat(d["sample_end"]), converged=bool(d["converged"]),
            fallback=str(d["fallback"]), problems=tuple(d["problems"]),
            persistence=_float(d["persistence"]),
            ljung_box=LjungBox.from_dict(d["ljung_box"]),
            ljung_box_squared=LjungBox.from_dict(d["ljung_box_squared"]),
            refit=int(d["refit"]), method=str(d["method"]), warm_start=bool(d["warm_start"]),
            applies_from=_date_or_none(d["applies_from"]),
            applies_to=_date_or_none(d["applies_to"]), n_applied=int(d["n_applied"]),
            candidates=tuple(CandidateFit.from_dict(c) for c in d["candidates"]),
            scale=float(d["scale"]),
        )


@dataclass(frozen=True, slots=True, eq=False)
class FilteredSeries:
    """Standardised residuals of one asset and the fits that produced them.

    Attributes
    ----------
    asset : str
    settings : MarginalSettings
    dates : ndarray of datetime64[D]
        Dates that have a residual (real-time: after the first estimation sample; in-sample:
        all but the first return, held back as the AR lag). Read-only, as are the arrays below.
    residuals : ndarray
        Standardised residuals ``z_t = (y_t - m_t) / sigma_t`` (scale-free).
    sigma : ndarray
        Conditional standard deviations in the units of the input returns.
    fit_index : ndarray of int
        Position in ``fits`` of the fit that produced each residual.
    fits : tuple of MarginalFit
        In refit order; each says which dates it applies to.
    n_input, input_start, input_end, input_digest
        The input series the result was computed from (count, first and last date, SHA-256
        of dates and values), which :func:`extend_series` checks before appending.
    """

    asset: str
    settings: MarginalSettings
    dates: NDArray[np.datetime64]
    residuals: NDArray[np.float64]
    sigma: NDArray[np.float64]
    fit_index: NDArray[np.int64]
    fits: tuple[MarginalFit, ...]
    n_input: int
    input_start: dt.date
    input_end: dt.date
    input_digest: str

    @property
    def mode(self) -> str:
        """``"real-time"`` or ``"in-sample"``: label every figure made from these residuals."""
        return self.settings.mode

    @property
    def key(self) -> str:
        """The settings key these residuals are stored under."""
        return self.settings.key

    @property
    def n_fallback(self) -> int:
        """Number of fits that used the fallback."""
        return sum(1 for f in self.fits if f.fallback)

    def to_frame(self) -> pd.DataFrame:
        """Residual rows: index ``date``; columns ``residual``, ``sigma``, ``fit_end``.

        ``fit_end`` is the ``sample_end`` of the fit that produced the row, which identifies
        that fit within the asset and settings key.
        """
        ends = np.array([np.datetime64(f.sample_end, "D") for f in self.fits],
                        dtype="datetime64[D]")
        return pd.DataFrame(
            {"residual": self.residuals, "sigma": self.sigma,
             "fit_end": pd.to_datetime(ends[self.fit_index]) if len(self.fits) else []},
            index=pd.DatetimeIndex(self.dates, name="date"),
        )

    def diagnostics(self, lags: int = LJUNG_BOX_LAGS) -> tuple[LjungBox, LjungBox]:
        """Ljung-Box tests on the filtered residuals and on their squares."""
        return ljung_box(self.residuals, lags), ljung_box(self.residuals ** 2, lags)

    def is_prefix_of(self, returns: pd.Series) -> bool:
        """Whether ``returns`` starts with exactly the series this result was computed from."""
        _, days, values = _validate(returns, self.settings)
        return (len(values) >= self.n_input
                and _digest(days[:self.n_input], values[:self.n_input]) == self.input_digest)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able dict (floats round-trip exactly through JSON)."""
        return {
            "asset": self.asset, "settings": self.settings.key, "mode": self.mode,
            "dates": [str(d) for d in self.dates],
            "residuals": [float(x) for x in self.residuals],
            "sigma": [float(x) for x in self.sigma],
            "fit_index": [int(i) for i in self.fit_index],
            "fits": [f.to_dict() for f in self.fits],
            "input": {"n": self.n_input, "start": self.input_start.isoformat(),
                      "end": self.input_end.isoformat(), "digest": self.input_digest},
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> FilteredSeries:
        """Inverse of :meth:`to_dict` (e.g. from what the store keeps)."""
        inp = d["input"]
        return cls(
            asset=str(d["asset"]), settings=MarginalSettings.from_key(d["settings"]),
            dates=read_only(np.array(d["dates"], dtype="datetime64[D]")),
            residuals=read_only(np.array(d["residuals"], dtype=float)),
            sigma=read_only(np.array(d["sigma"], dtype=float)),
            fit_index=read_only(np.array(d["fit_index"], dtype=np.int64)),
            fits=tuple(MarginalFit.from_dict(f) for f in d["fits"]),
            n_input=int(inp["n"]), input_start=dt.date.fromisoformat(inp["start"]),
            input_end=dt.date.fromisoformat(inp["end"]), input_digest=str(inp["digest"]),
        )


# ------------------------------------------------------------------------- Ljung-Box
def ljung_box(x: ArrayLike, lags: int = LJUNG_BOX_LAGS) -> LjungBox:
    """Ljung-Box portmanteau test of no autocorrelation up to lag ``lags``.

    Parameters
    ----------
    x : array_like
        A 1-D finite sample (e.g. standardised residuals, or their squares).
    lags : int
        Number of autocorrelations ``m`` in the statistic, ``1 <= m < len(x)``.

    Returns
    -------
    LjungBox
        Statistic ``Q`` and its chi-square(m) upper-tail p-value.

    Notes
    -----
    ``Q = n (n + 2) sum_{k=1}^{m} rho_k^2 / (n - k)`` with sample autocorrelations
    ``rho_k = sum_{t>k} (x_t - xbar)(x_{t-k} - xbar) / sum_t (x_t - xbar)^2``; under the null
    ``Q`` is approximately chi-square with ``m`` degrees of freedom (Ljung & Box 1978,
    "On a measure of lack of fit in time series models", Biometrika 65, 297-303, eq. 2.2).
    Applied to squared residuals it is the McLeod-Li test of remaining ARCH effects
    (McLeod & Li 1983, J. Time Series Analysis 4, 269-273); no degrees of freedom are
    subtracted for estimated parameters.
    """
    arr = np.asarray(x, dtype=float)
    if arr.ndim != 1:
        raise ValueError(f"ljung_box needs a 1-D sample, got shape {arr.shape}")
    if isinstance(lags, bool) or not isinstance(lags, (int, np.integer)):
        raise TypeError(f"lags must be an integer, got {lags!r}")
    n, m = arr.shape[0], int(lags)
    if not 1 <= m < n:
        raise ValueError(f"lags must be between 1 and n - 1 = {n - 1}, got {m}")
    if not np.isfinite(arr).all():
        raise ValueError("ljung_box needs finite values (got NaN or inf)")
    d = arr - arr.mean()
    denom = d @ d
    if denom == 0.0:
        raise ValueError("ljung_box is undefined for a constant sample")
    ks = np.arange(1, m + 1)
    # m is small (tens); one dot product per lag keeps the sums exact rather than via FFT
    acov = np.array([d[k:] @ d[:-k] for k in ks])
    rho = acov / denom
    q = float(n * (n + 2) * np.sum(rho ** 2 / (n - ks)))
    return LjungBox(lags=m, statistic=q, pvalue=float(stats.chi2.sf(q, m)))


# --------------------------------------------------------------- fixed-parameter filter
def _backcast(eps: NDArray[np.float64]) -> float:
    """arch's presample variance: EWMA-weighted mean of the first 75 squared residuals."""
    tau = min(_BACKCAST_SPAN, eps.shape[0])
    w = _BACKCAST_DECAY ** np.arange(tau)
    return float(np.sum(eps[:tau] ** 2 * (w / w.sum())))


def _mean_residuals(spec: MarginalSpec, params: Mapping[str, float],
                    y: NDArray[np.float64]) -> NDArray[np.float64]:
    """``eps_t = y_t - m_t`` for positions 1..len(y)-1 (position 0 is the held-back lag)."""
    eps = y[1:] - params["mu"]
    if spec.mean == "ar1":
        eps = eps - params["phi"] * y[:-1]
    return eps


def _variance_recursion(eps: NDArray[np.float64], omega: float, alpha: float, gamma: float,
                        beta: float, backcast: float) -> NDArray[np.float64]:
    """Conditional variances of a GJR-GARCH(1,1) with fixed parameters (gamma=0: GARCH).

    ``sigma2_t = omega + (alpha + gamma 1{eps_{t-1} < 0}) eps_{t-1}^2 + beta sigma2_{t-1}``,
    started as arch starts it: ``sigma2_0 = omega + (alpha + gamma / 2 + beta) backcast``.
    A first-order linear filter in ``sigma2`` driven by the lagged shocks, so ``lfilter``
    runs it in C; output ``t`` depends on ``eps_0 .. eps_{t-1}`` only.
    """
    e2 = eps * eps
    drive = np.empty_like(eps)
    drive[0] = omega + (alpha + 0.5 * gamma) * backcast
    drive[1:] = omega + (alpha + gamma * (eps[:-1] < 0.0)) * e2[:-1]
    sigma2, _ = signal.lfilter([1.0], [1.0, -beta], drive, zi=[beta * backcast])
    return sigma2


def _filter(spec: MarginalSpec, params: Mapping[str, float], y: NDArray[np.float64]
            ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Residuals and conditional variances for positions 1..len(y)-1 at fixed parameters."""
    eps = _mean_residuals(spec, params, y)
    gamma = params.get("gamma", 0.0)
    sigma2 = _variance_recursion(eps, params["omega"], params["alpha"], gamma, params["beta"],
                                 _backcast(eps))
    return eps, sigma2


# ----------------------------------------------------------------------- estimation
@dataclass(frozen=True, slots=True)
class _Estimate:
    """One spec estimated on one sample (internal)."""

    spec: MarginalSpec
    params: dict[str, float]
    loglik: float
    bic: float
    std_resid: NDArray[np.float64]
    sigma: NDArray[np.float64]
    problem: str
    warm_start: bool
    std_errors: dict[str, float]
    result: Any = None  # arch's result object (None for the fallback and for failures)

    @property
    def accepted(self) -> bool:
        return not self.problem


def _persistence(params: Mapping[str, float]) -> float:
    return params["alpha"] + params["beta"] + 0.5 * params.get("gamma", 0.0)


def _arch_model(spec: MarginalSpec, y: NDArray[np.float64]) -> Any:
    from arch import arch_model  # heavy import, only when a fit is needed

    extra = {"lags": 1} if spec.mean == "ar1" else {}
    # hold_back=1 for every spec: all candidates share one likelihood sample, so BICs compare
    return arch_model(y, mean="AR" if spec.mean == "ar1" else "Constant", vol="GARCH", p=1,
                      o=1 if spec.volatility == "gjr" else 0, q=1,
                      dist="skewt" if spec.distribution == "skewt" else "t",
                      hold_back=1, rescale=False, **extra)


@contextmanager
def _constraint_jacobians() -> Iterator[None]:
    """Within the block, arch's linear constraints ``a x - b >= 0`` reach SLSQP with their
    exact Jacobians ``a``.

    arch (8.0) builds them with ``arch.univariate.base.constraint`` as dicts without a
    Jacobian, so SLSQP differentiates every constraint numerically at every iteration: about
    45% of a warm refit's time went into differencing these linear functions. The block wraps
    that builder (adding ``"jac"`` only to what has the expected form) and restores it.
    """
    from arch.univariate import base

    build = base.constraint

    def with_jacobians(a, b):
        cons = build(a, b)
        rows = np.array(a, dtype=float)  # a copy: each Jacobian keeps its own row
        if isinstance(cons, list) and len(cons) == len(rows) and all(
                isinstance(c, dict) and c.get("type") == "ineq" for c in cons):
            for con, row in zip(cons, rows, strict=True):
                con.setdefault("jac", lambda x, *args, row=row: row)
        return cons

    base.constraint = with_jacobians
    try:
        yield
    finally:
        base.constraint = build


def _estimate(spec: MarginalSpec, y: NDArray[np.float64], start: Mapping[str, float] | None
              ) -> _Estimate:
    """Fit ``spec`` on ``y`` (percent returns, position 0 held back) with arch; never raises."""
    from arch.utility.exceptions import StartingValueWarning

    names = spec.param_names
    nan_params = dict.fromkeys(names, math.nan)
    sv = None if start is None else np.array([start[k] for k in names], dtype=float)
    try:
        with warnings.catch_warnings(record=True) as caught, _constraint_jacobians():
            # arch switches its ConvergenceWarning filter globally; this scopes that too
            warnings.simplefilter("always")
            res = _arch_model(spec, y).fit(disp="off", show_warning=False, starting_values=sv)
    except (ValueError, ArithmeticError, RuntimeError, np.linalg.LinAlgError) as exc:
        nan_series = np.full(y.shape[0] - 1, np.nan)
        return _Estimate(spec, nan_params, math.nan, math.nan, nan_series, nan_series,
                         f"{spec.key}: arch failed ({type(exc).__name__}: {exc})", False, {})
    warm = sv is not None and not any(issubclass(w.category, StartingValueWarning)
                                      for w in caught)
    params = dict(zip(names, (float(v) for v in np.asarray(res.params)), strict=True))
    loglik, bic = float(res.loglikelihood), float(res.bic)
    std_resid = np.asarray(res.std_resid, dtype=float)[1:]
    sigma = np.asarray(res.conditional_volatility, dtype=float)[1:]
    problem = ""
    if res.convergence_flag != 0:
        problem = (f"{spec.key}: optimiser did not converge (code {res.convergence_flag}: "
                   f"{res.optimization_result.message})")
    elif not (np.isfinite(list(params.values())).all() and math.isfinite(loglik)
              and np.isfinite(std_resid).all()):
        problem = f"{spec.key}: non-finite estimates or residuals"
    elif _persistence(params) >= _PERSISTENCE_LIMIT:
        problem = (f"{spec.key}: persistence {_persistence(params):.6f} "
                   f"(1 - persistence = {1.0 - _persistence(params):.1e}) at the stationarity "
                   "boundary (integrated or explosive variance)")
    else:
        problem = _variance_path_problem(spec, params, sigma, y)
    return _Estimate(spec, params, loglik, bic, std_resid, sigma, problem, warm, {}, res)


def _variance_path_problem(spec: MarginalSpec, params: Mapping[str, float],
                           sigma: NDArray[np.float64], y: NDArray[np.float64]) -> str:
    """Why a fit's conditional variance path is broken ("" when it is not): non-finite, beyond
    :data:`VARIANCE_PATH_LIMIT` times the sample variance either way on some day, or a
    deterministic decay (no response to shocks, a level far from the sample variance)."""
    if not np.isfinite(sigma).all() or (sigma <= 0).any():
        return f"{spec.key}: non-finite or zero conditional variance"
    var = float(np.var(y[1:]))
    ratio = sigma * sigma / var
    low, high = float(ratio.min()), float(ratio.max())
    if low < 1.0 / VARIANCE_PATH_LIMIT or high > VARIANCE_PATH_LIMIT:
        return (f"{spec.key}: conditional variance from {low:.3g} to {high:.3g} times the "
                "sample variance (a variance path unrelated to the data)")
    response = params["alpha"] + 0.5 * params.get("gamma", 0.0)
    level = params["omega"] / max(1.0 - params["beta"], 1e-300) / var
    if response < MIN_SHOCK_RESPONSE and not (
            1.0 / _DECAY_LEVEL_FACTOR <= level <= _DECAY_LEVEL_FACTOR):
        return (f"{spec.key}: no response to shocks (alpha + gamma/2 = {response:.2g}) and a "
                f"level {level:.3g} times the sample variance (a deterministic decay from the "
                "start-up variance)")
    return ""


def _with_std_errors(est: _Estimate) -> _Estimate:
    """Add arch's robust standard errors (a numerical Hessian: costs about one more fit)."""
    if est.result is None:
        return est
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        se = np.asarray(est.result.std_err, dtype=float)
    return replace(est, std_errors=dict(zip(est.spec.param_names, (float(v) for v in se),
                                            strict=True)))


def _start_from(fit: MarginalFit, spec: MarginalSpec) -> dict[str, float]:
    """Starting values for ``spec`` from the latest fit of another spec on almost the same data.

    Shared parameters carry over; a GJR leverage term starts at 0 (from GARCH) or is folded
    into ``alpha`` as ``alpha + gamma / 2`` (to GARCH); ``phi`` and ``lambda`` start at 0.
    """
    p = fit.params
    start = {"mu": p["mu"], "phi": 0.0, "omega": p["omega"], "alpha": p["alpha"],
             "gamma": 0.0, "beta": p["beta"], "nu": p.get("nu", 8.0), "lambda": 0.0}
    if fit.spec.mean == "ar1" and spec.mean == "ar1":
        start["phi"] = p["phi"]
    if fit.spec.volatility == "gjr":
        if spec.volatility == "gjr":
            start["gamma"] = p["gamma"]
        else:
            start["alpha"] = p["alpha"] + 0.5 * p["gamma"]
    if fit.spec.distribution == "skewt" and spec.distribution == "skewt":
        start["lambda"] = p["lambda"]
    # the skewed t's upper bound on nu in arch is 300, the t's 500
    start["nu"] = min(start["nu"], 299.0) if spec.distribution == "skewt" else start["nu"]
    return {k: start[k] for k in spec.param_names}


def standardised_t_loglik(z: ArrayLike, nu: float) -> float:
    """Log-likelihood of residuals ``z`` under the unit-variance Student-t with ``nu`` > 2
    degrees of freedom (arch's ``StudentsT``; the density of ``T_nu`` scaled by
    ``sqrt((nu - 2) / nu)``), without the ``-log sigma_t`` terms."""
    z = np.asarray(z, dtype=float)
    c = (special.gammaln((nu + 1) / 2) - special.gammaln(nu / 2)
         - 0.5 * math.log(math.pi * (nu - 2)))
    return float(z.size * c - (nu + 1) / 2 * np.sum(np.log1p(z * z / (nu - 2))))


def _fallback_estimate(y: NDArray[np.float64]) -> _Estimate:
    """The EWMA(0.94) fallback on ``y``: constant mean at the sample mean, standardised
    Student-t innovations with ``nu`` by maximum likelihood given the EWMA variance path."""
    params = {"mu": float(np.mean(y[1:])), "omega": 0.0, "alpha": 1.0 - EWMA_DECAY,
              "beta": EWMA_DECAY}
    eps, sigma2 = _filter(FALLBACK_SPEC, params, y)
    sigma = np.sqrt(sigma2)
    z = eps / sigma
    best = optimize.minimize_scalar(lambda nu: -standardised_t_loglik(z, nu),
                                    bounds=_NU_BOUNDS, method="bounded",
                                    options={"xatol": 1e-6})
    params["nu"] = float(best.x)
    loglik = standardised_t_loglik(z, params["nu"]) - float(np.sum(np.log(sigma)))
    bic = float(information_criterion(loglik, 2, eps.shape[0], "bic"))  # k = 2: mu, nu
    return _Estimate(FALLBACK_SPEC, params, loglik, bic, z, sigma, "", False, {})


def _select(y: NDArray[np.float64], candidates: Sequence[MarginalSpec],
            starts: Mapping[MarginalSpec, Mapping[str, float]]
            ) -> tuple[_Estimate, tuple[CandidateFit, ...], list[str]]:
    """Fit every candidate; the accepted one with the lowest BIC, else the fallback."""
    ests = [_estimate(s, y, starts.get(s)) for s in candidates]
    cands = tuple(CandidateFit(e.spec, e.params, e.loglik, e.bic, e.accepted, e.problem)
                  for e in ests)
    problems = [e.problem for e in ests if e.problem]
    ok = [e for e in ests if e.accepted]
    if ok:
        return min(ok, key=lambda e: e.bic), cands, problems
    problems.append(f"no candidate converged to a plausible estimate: using the {_FALLBACK_NAME} "
                    "fallback (constant mean, RiskMetrics EWMA variance, Student-t "
                    "innovations)")
    return _fallback_estimate(y), cands, problems


def _make_fit(est: _Estimate, days: NDArray[np.datetime64], end: int, *, refit: int,
              method: str, candidates: tuple[CandidateFit, ...], problems: Sequence[str]
              ) -> MarginalFit:
    """Record an estimate on returns 0..end (likelihood on positions 1..end)."""
    z = est.std_resid
    lags = min(LJUNG_BOX_LAGS, z.shape[0] - 1)
    return MarginalFit(
        spec=est.spec, params=est.params, std_errors=est.std_errors, loglik=est.loglik,
        bic=est.bic, nobs=end, sample_start=_date(days[1]), sample_end=_date(days[end]),
        converged=not est.spec.is_fallback, fallback=_FALLBACK_NAME if est.spec.is_fallback
        else "", problems=tuple(problems), persistence=_persistence(est.params),
        ljung_box=ljung_box(z, lags), ljung_box_squared=ljung_box(z * z, lags), refit=refit,
        method=method, warm_start=est.warm_start, applies_from=None, applies_to=None,
        n_applied=0, candidates=candidates,
    )


def select_marginal(returns: pd.Series, settings: MarginalSettings | None = None,
                    ) -> MarginalFit:
    """Choose and fit the marginal model of one asset by BIC on all the data given.

    Parameters
    ----------
    returns : pandas.Series
        Daily log returns indexed by date (finite, no NaN, strictly increasing dates, at least
        ``settings.min_returns`` of them).
    settings : MarginalSettings, optional
        Supplies ``candidates`` and ``min_obs``.

    Returns
    -------
    MarginalFit
        The selected fit (with arch's robust standard errors) or the EWMA fallback, with every
        candidate's loglik and BIC in ``candidates``.

    Notes
    -----
    ``BIC = -2 loglik + k ln n`` (Schwarz 1978, "Estimating the dimension of a model", Annals
    of Statistics 6, 461-464), all candidates on the same ``n`` (the first return is held
    back as the AR lag for every spec). GJR-GARCH: Glosten, Jagannathan & Runkle (1993),
    J. Finance 48, 1779-1801; skewed t: Hansen (1994), Int. Economic Review 35, 705-730, in
    arch's parametrisation.
    """
    settings = settings or MarginalSettings()
    _, days, values = _validate(returns, settings)
    y = SCALE * values
    est, cands, problems = _select(y, settings.candidates, {})
    est = _with_std_errors(est)
    return _make_fit(est, days, y.shape[0] - 1, refit=0, method="selection", candidates=cands,
                     problems=problems)


# ----------------------------------------------------------------------- filtering
def filter_series(returns: pd.Series, settings: MarginalSettings | None = None,
                  **changes: Any) -> FilteredSeries:
    """Filter one asset's log returns into standardised residuals.

    Parameters
    ----------
    returns : pandas.Series
        Daily log returns (not percent) indexed by date: finite, no NaN, strictly increasing
        dates, at least ``settings.min_returns`` values. ``returns.name`` names the asset.
    settings : MarginalSettings, optional
        Defaults to ``MarginalSettings()`` (real-time, refit every 21, first fit on 250).
    **changes
        Field overrides of ``settings``, e.g. ``mode="in-sample"`` or ``refit_every=5``.

    Returns
    -------
    FilteredSeries

    Raises
    ------
    InputError
        NaN, non-finite or implausible values, unsorted or duplicate dates, too few returns,
        or returns constant over the first estimation sample.

    Notes
    -----
    Model, for positions ``t >= 1`` of the percent returns ``y``:
    ``y_t = mu [+ phi y_{t-1}] + eps_t``, ``eps_t = sigma_t z_t``,
    ``sigma_t^2 = omega + (alpha + gamma 1{eps_{t-1} < 0}) eps_{t-1}^2 + beta sigma_{t-1}^2``
    (Bollerslev 1986, J. Econometrics 31, 307-327; Glosten, Jagannathan & Runkle 1993), with
    ``z_t`` standardised Student-t or skewed t. The real-time schedule and the selection rule
    are in the module docstring. Real-time residuals come from our own fixed-parameter
    recursion (checked against arch's ``fix()``); in-sample residuals are arch's own.
    """
    settings = replace(settings or MarginalSettings(), **changes)
    asset, days, values = _validate(returns, settings)
    if settings.mode == "in-sample":
        return _in_sample(asset, settings, days, values)
    return _real_time(asset, settings, days, values, previous=None)


def extend_series(previous: FilteredSeries, returns: pd.Series) -> FilteredSeries:
    """Extend a result to a longer series, computing only what is new.

    Parameters
    ----------
    previous : FilteredSeries
        An earlier result (e.g. rebuilt with :meth:`FilteredSeries.from_dict`).
    returns : pandas.Series
        The asset's returns: exactly the series ``previous`` was computed from, followed by
        new days.

    Returns
    -------
    FilteredSeries
        Identical to ``filter_series(returns, previous.settings)``. Real-time: past residuals
        and fits are kept as they are, only new days are filtered and new refits run (a
        one-day extension is one fixed-parameter pass, or one re-estimation on a refit day).
        In-sample: the single fit depends on all data, so everything is recomputed.

    Raises
    ------
    InputError
        When ``returns`` does not start with the series ``previous`` was computed from (data
        revised, another asset): recompute with :func:`filter_series`.
    """
    if not isinstance(previous, FilteredSeries):
        raise TypeError(f"previous must be a FilteredSeries, got {type(previous).__name__}")
    settings = previous.settings
    asset, days, values = _validate(returns, settings)
    n_prev = previous.n_input
    if len(values) < n_prev:
        raise InputError(f"returns of {asset}: {len(values)} returns given, fewer than the "
                         f"{n_prev} the stored residuals were computed from")
    if _digest(days[:n_prev], values[:n_prev]) != previous.input_digest:
        raise InputError(
            f"returns of {asset}: the first {n_prev} returns "
            f"({previous.input_start} to {previous.input_end}) differ from those the stored "
            "residuals were computed from (revised data?); recompute with filter_series"
        )
    if len(values) == n_prev:
        return previous
    if settings.mode == "in-sample":
        return _in_sample(asset, settings, days, values)
    return _real_time(asset, settings, days, values, previous=previous)


def _in_sample(asset: str, settings: MarginalSettings, days: NDArray[np.datetime64],
               values: NDArray[np.float64]) -> FilteredSeries:
    y = SCALE * values
    n = y.shape[0]
    est, cands, problems = _select(y, settings.candidates, {})
    est = _with_std_errors(est)
    fit = _make_fit(est, days, n - 1, refit=0, method="selection", candidates=cands,
                    problems=problems)
    fit = replace(fit, applies_from=_date(days[1]), applies_to=_date(days[-1]), n_applied=n - 1)
    # arch's own residuals (same presample convention as its likelihood); the fallback's own
    return _result(asset, settings, days, values, days[1:], est.std_resid, est.sigma / SCALE,
                   np.zeros(n - 1, dtype=np.int64), (fit,))


def _real_time(asset: str, settings: MarginalSettings, days: NDArray[np.datetime64],
               values: NDArray[np.float64], previous: FilteredSeries | None) -> FilteredSeries:
    y = SCALE * values
    n = y.shape[0]
    m, r = settings.min_obs, settings.refit_every

    def sample_end(k: int) -> int:  # last position in refit k's sample
        return m + k * r

    def block_stop(k: int) -> int:  # last position filtered with refit k
        return min(sample_end(k + 1), n - 1)

    fits: list[MarginalFit] = []
    z_parts: list[NDArray[np.float64]] = []
    s_parts: list[NDArray[np.float64]] = []
    i_parts: list[NDArray[np.int64]] = []
    done = m + 1  # first position without a residual yet
    if previous is not None and previous.fits:
        fits = list(previous.fits)
        z_parts, s_parts = [previous.residuals], [previous.sigma]
        i_parts = [previous.fit_index]
        done = max(previous.n_input, m + 1)

    def run_block(k: int) -> None:
        """Filter positions done..block_stop(k) with fit k's fixed parameters."""
        nonlocal done
        stop = block_stop(k)
        if stop < done:
            return
        fit = fits[k]
        # recursion from the series start: position t depends on returns up to t only, so a
        # longer input gives bit-identical values for the positions filtered before
        eps, sigma2 = _filter(fit.spec, fit.params, y[:stop + 1])
        sl = slice(done - 1, stop)  # eps[t - 1] belongs to position t
        sigma = np.sqrt(sigma2[sl])
        z_parts.append(eps[sl] / sigma)
        s_parts.append(sigma / SCALE)
        i_parts.append(np.full(stop + 1 - done, k, dtype=np.int64))
        fits[k] = replace(fit, applies_from=fit.applies_from or _date(days[done]),
                          applies_to=_date(days[stop]), n_applied=fit.n_applied + stop + 1 - done)
        done = stop + 1

    if fits:
        run_block(len(fits) - 1)
    k = len(fits)
    while sample_end(k) <= n - 1:
        end = sample_end(k)
        ys = y[:end + 1]
        prev = fits[-1] if fits else None
        scheduled = k == 0 or (settings.reselect_every > 0 and k % settings.reselect_every == 0)
        problems: list[str] = []
        est = None
        if prev is not None and not prev.fallback and not scheduled:
            est = _estimate(prev.spec, ys, prev.params)
            if not est.accepted:
                problems.append(f"re-estimation failed, reselecting: {est.problem}")
                est = None
        if est is None:
            starts = {} if prev is None or prev.fallback else {
                c: _start_from(prev, c) for c in settings.candidates}
            est, cands, sel_problems = _select(ys, settings.candidates, starts)
            fit = _make_fit(est, days, end, refit=k, method="selection", candidates=cands,
                            problems=problems + sel_problems)
        else:
            fit = _make_fit(est, days, end, refit=k, method="re-estimate", candidates=(),
                            problems=problems)
        fits.append(fit)
        run_block(k)
        k += 1

    z, sigma = _joined(z_parts, np.float64), _joined(s_parts, np.float64)
    index = _joined(i_parts, np.int64)
    start = m + 1
    return _result(asset, settings, days, values, days[start:start + z.shape[0]], z, sigma,
                   index, tuple(fits))


_ScalarT = TypeVar("_ScalarT", bound=np.generic)


def _joined(parts: Sequence[NDArray[_ScalarT]], dtype: type[_ScalarT]) -> NDArray[_ScalarT]:
    """The parts end to end; an empty array of ``dtype`` when there are none."""
    return np.concatenate(parts) if parts else np.empty(0, dtype=dtype)


def _result(asset: str, settings: MarginalSettings, days: NDArray[np.datetime64],
            values: NDArray[np.float64], res_days: NDArray[np.datetime64],
            z: NDArray[np.float64], sigma: NDArray[np.float64], index: NDArray[np.int64],
            fits: tuple[MarginalFit, ...]) -> FilteredSeries:
    return FilteredSeries(
        asset=asset, settings=settings, dates=read_only(res_days), residuals=read_only(z),
        sigma=read_only(sigma), fit_index=read_only(index), fits=fits, n_input=values.shape[0],
        input_start=_date(days[0]), input_end=_date(days[-1]),
        input_digest=_digest(days, values),
    )


# ----------------------------------------------------------------------- validation
def _validate(returns: pd.Series, settings: MarginalSettings
              ) -> tuple[str, NDArray[np.datetime64], NDArray[np.float64]]:
    """Check one asset's returns; gives (asset name, datetime64[D] days, float values)."""
    if not isinstance(returns, pd.Series):
        raise TypeError(f"returns must be a pandas Series indexed by date, got "
                        f"{type(returns).__name__}")
    asset = "returns" if returns.name is None else str(returns.name)
    try:
        values = returns.to_numpy(dtype=float, na_value=np.nan)
    except (TypeError, ValueError):
        raise InputError(f"returns of {asset}: values must be numbers, got dtype "
                         f"{returns.dtype}") from None
    try:
        index = pd.DatetimeIndex(returns.index)
    except (TypeError, ValueError):
        raise InputError(f"returns of {asset}: the index must be dates") from None
    if index.hasnans:
        raise InputError(f"returns of {asset}: missing date (NaT) at row "
                         f"{int(np.flatnonzero(index.isna())[0])}")
    if index.tz is not None:
        index = index.tz_localize(None)
    days = index.to_numpy().astype("datetime64[D]")
    step = np.diff(days.astype(np.int64))
    if (step <= 0).any():
        i = int(np.flatnonzero(step <= 0)[0]) + 1
        what = "duplicate date" if step[i - 1] == 0 else "dates out of order at"
        raise InputError(f"returns of {asset}: {what} {days[i]}; dates must be strictly "
                         "increasing")
    bad = ~np.isfinite(values)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        kind = "missing value (NaN)" if np.isnan(values[i]) else f"non-finite value {values[i]}"
        raise InputError(f"returns of {asset}: {kind} on {days[i]}; drop days without a "
                         "return (filtering runs on the asset's own trading days)")
    big = np.abs(values) > _MAX_ABS_RETURN
    if big.any():
        i = int(np.flatnonzero(big)[0])
        raise InputError(f"returns of {asset}: implausible daily log return {values[i]:g} on "
                         f"{days[i]} (|r| > {_MAX_ABS_RETURN:g}); pass log returns, not prices "
                         "or percent")
    if values.shape[0] < settings.min_returns:
        span = f" ({days[0]} to {days[-1]})" if values.shape[0] else ""
        raise InputError(f"returns of {asset}: too short, {values.shape[0]} returns{span}; the "
                         f"marginal model needs at least {settings.min_returns} "
                         f"(min_obs = {settings.min_obs} plus one lag)")
    first = values[:settings.min_returns]
    if np.ptp(first) == 0.0:
        raise InputError(f"returns of {asset}: constant over the first {settings.min_returns} "
                         f"returns ({days[0]} to {days[settings.min_obs]}), stale prices?")
    return asset, days, values


def _digest(days: NDArray[np.datetime64], values: NDArray[np.float64]) -> str:
    h = hashlib.sha256()
    h.update(np.ascontiguousarray(days.astype("datetime64[D]").astype(np.int64)).tobytes())
    h.update(np.ascontiguousarray(values, dtype=np.float64).tobytes())
    return h.hexdigest()


# ----------------------------------------------------------------------- conversions
def _date(d: np.datetime64) -> dt.date:
    return d.astype("datetime64[D]").astype(dt.date)


def _iso(d: dt.date | None) -> str | None:
    return None if d is None else d.isoformat()


def _date_or_none(s: str | None) -> dt.date | None:
    return None if s is None else dt.date.fromisoformat(s)


def _json_float(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _float(x: float | None) -> float:
    return math.nan if x is None else float(x)


def _json_params(p: Mapping[str, float]) -> dict[str, float | None]:
    return {k: _json_float(v) for k, v in p.items()}


def _params(p: Mapping[str, float | None]) -> dict[str, float]:
    return {str(k): _float(v) for k, v in p.items()}
