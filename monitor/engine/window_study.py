"""One-window study of a pair: every candidate family fitted, ranked, tested and bounded.

This is the library behind ``comove fit`` (and the dashboard's window study): given two
aligned columns it computes the sample dependence measures, fits every candidate copula by
maximum pseudo-likelihood, ranks them by AIC (or BIC), and optionally adds parametric-bootstrap
goodness-of-fit p-values and intervals.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from monitor.common.errors import InputError
from monitor.data.tables import log_returns
from monitor.stats.copulas import FAMILY_NAMES
from monitor.stats.empirical import pseudo_observations, spearman_rho, tail_dependence
from monitor.stats.fitting import Selection, akaike_weights, model_average, select_copula
from monitor.stats.inference import (
    FitUncertainty,
    GoodnessOfFit,
    Interval,
    bootstrap_candidates,
    kendall_tau_interval,
)
from monitor.stats.marginals import MarginalSettings, filter_series

#: Fewest usable rows a window study accepts.
MIN_ROWS = 30
KINDS = ("prices", "returns", "uniforms")
FILTERS = ("real-time", "in-sample", "none")


@dataclass(frozen=True, slots=True)
class WindowStudy:
    """Everything computed for one pair on one window.

    ``kind`` says what the columns were (``returns``: rank pseudo-observations of the returns;
    ``uniforms``: pseudo-observations as given; ``prices``: filtered residuals of the log
    returns); ``dropped`` counts dates in the window that only one of the two columns had.
    """

    pair: tuple[str, str]
    kind: str
    start: pd.Timestamp
    end: pd.Timestamp
    n: int
    dropped: int
    u: np.ndarray
    v: np.ndarray
    kendall_tau: Interval
    spearman_rho: float
    tail_q: float
    tail_lower_emp: float
    tail_upper_emp: float
    selection: Selection
    gof: dict[str, GoodnessOfFit]
    uncertainty: FitUncertainty | None
    filter_info: dict = field(default_factory=lambda: {"mode": "none"})

    def model_average(self) -> dict:
        """The candidates' model-implied tail coefficients averaged with their Akaike
        weights (BIC weights under BIC selection; :func:`monitor.stats.fitting.akaike_weights`):
        ``{"criterion", "tail_lower", "tail_upper", "weights": {label: weight}}``, weights
        rounded to 6 decimals, largest first."""
        fits = self.selection.fits
        crit = self.selection.criterion
        w = akaike_weights([getattr(f, crit) for f in fits])
        order = np.argsort(-w, kind="stable")
        return {"criterion": crit,
                "tail_lower": float(model_average(w, [f.tail_lower for f in fits])),
                "tail_upper": float(model_average(w, [f.tail_upper for f in fits])),
                "weights": {fits[i].label: round(float(w[i]), 6) for i in order}}

    def to_json(self) -> dict:
        """The ``comove fit --json`` object (docs/contracts.md contract, with extra keys)."""
        fits = sorted(self.selection.fits, key=lambda f: f.aic)
        out_fits = []
        for f in fits:
            item = {
                "family": f.family, "rotation": f.rotation, "params": dict(f.params),
                "loglik": f.loglik, "aic": f.aic, "bic": f.bic, "kendall_tau": f.kendall_tau,
                "tail_lower": f.tail_lower, "tail_upper": f.tail_upper,
                "converged": f.converged, "at_bound": list(f.at_bound),
            }
            g = self.gof.get(f.label)
            if g is not None:
                item["gof"] = {"statistic": g.statistic, "p_value": g.p_value,
                               "replicates": g.replicates}
            out_fits.append(item)
        sel = self.selection.selected
        out = {
            "n": self.n, "start": self.start.strftime("%Y-%m-%d"),
            "end": self.end.strftime("%Y-%m-%d"),
            "kendall_tau": self.kendall_tau.estimate, "spearman_rho": self.spearman_rho,
            "empirical_tail": {"q": self.tail_q, "lower": self.tail_lower_emp,
                               "upper": self.tail_upper_emp},
            "fits": out_fits,
            "selected": {"family": sel.family, "rotation": sel.rotation},
            "pair": list(self.pair), "kind": self.kind, "criterion": self.selection.criterion,
            "marginals": self.filter_info,
            "dropped_dates": self.dropped,
            "model_average": self.model_average(),
            "kendall_tau_interval": {"lower": self.kendall_tau.lower,
                                     "upper": self.kendall_tau.upper,
                                     "std_error": self.kendall_tau.std_error,
                                     "method": "influence function, asymptotic normal"},
        }
        if self.uncertainty is not None:
            unc = self.uncertainty
            out["selected"]["intervals"] = {
                "method": unc.method, "level": unc.level, "replicates": unc.replicates,
                **{k: {"estimate": q.estimate, "std_error": q.std_error, "lower": q.lower,
                       "upper": q.upper} for k, q in unc.quantities.items()},
            }
        return out


def _date(text: str | None, option: str) -> pd.Timestamp | None:
    if text is None:
        return None
    try:
        return pd.Timestamp(pd.to_datetime(text, format="ISO8601"))
    except (ValueError, TypeError):
        raise InputError(f"{option}: cannot read date {text!r} (expected YYYY-MM-DD)") from None


def _check_pair(frame: pd.DataFrame, a: str, b: str, source: str) -> None:
    for col in (a, b):
        if col not in frame.columns:
            raise InputError(f"{source}: no column {col!r} (columns: "
                             f"{', '.join(map(str, frame.columns))})")
    if a == b:
        raise InputError("--pair: the two columns must differ")


def pair_window(frame: pd.DataFrame, a: str, b: str, start: str | None = None,
                end: str | None = None, source: str = "input") -> tuple[pd.DataFrame, int]:
    """The two columns on the dates both have, inside [start, end].

    Returns the aligned frame and how many dates in the range only one column had.
    """
    _check_pair(frame, a, b, source)
    lo, hi = _date(start, "--start"), _date(end, "--end")
    if lo is not None and hi is not None and lo > hi:
        raise InputError(f"--start {start} is after --end {end}")
    sub = frame[[a, b]]
    if lo is not None:
        sub = sub[sub.index >= lo]
    if hi is not None:
        sub = sub[sub.index <= hi]
    either = sub.notna().any(axis=1)
    both = sub.dropna()
    return both, int(either.sum() - len(both))


def study_window(frame: pd.DataFrame, a: str, b: str, *, kind: str = "returns",
                 start: str | None = None, end: str | None = None,
                 families: tuple[str, ...] = FAMILY_NAMES, criterion: str = "aic",
                 tail_q: float = 0.10, bootstrap: int = 0,
                 rng: np.random.Generator | int | None = None,
                 source: str = "input", filter_info: dict | None = None,
                 progress: Callable[[int, int, str], None] | None = None) -> WindowStudy:
    """Study one pair on one window.

    Parameters
    ----------
    frame : DataFrame
        Wide frame indexed by date. For ``kind="uniforms"`` the columns are
        pseudo-observations in (0, 1) taken as given; otherwise they are ranked within the
        window (returns, or the filtered residuals of :func:`filtered_pair`).
    a, b : str
        The two columns.
    start, end : str, optional
        Inclusive window bounds (YYYY-MM-DD).
    families : tuple of str
        Candidate families.
    criterion : {"aic", "bic"}
    tail_q : float
        Level of the empirical tail dependence C_n(q, q)/q.
    bootstrap : int
        Parametric-bootstrap replicates for goodness-of-fit p-values (every candidate) and
        intervals (the selected family); 0 skips them.
    filter_info : dict, optional
        Provenance of the columns (from :func:`filtered_pair`), carried into the result.
    progress : callable, optional
        Called as ``progress(done, total, label)`` after each candidate's bootstrap.

    Raises
    ------
    InputError
        Unknown column, fewer than :data:`MIN_ROWS` usable rows, a constant column, uniforms
        outside (0, 1).

    Notes
    -----
    With ``bootstrap`` > 0 every candidate gets one parametric bootstrap (all replicates
    refitted at once) that yields its goodness-of-fit p-value; the selected family's
    intervals come from the same refits (:func:`monitor.stats.inference.bootstrap_candidates`).
    """
    if kind not in KINDS:
        raise InputError(f"--kind must be one of {', '.join(KINDS)}, got {kind!r}")
    if not 0 < tail_q < 0.5:
        raise InputError(f"--tail-q must lie in (0, 0.5), got {tail_q}")
    if bootstrap < 0 or 0 < bootstrap < 20:
        raise InputError(f"--bootstrap must be 0 or at least 20, got {bootstrap}")
    both, dropped = pair_window(frame, a, b, start, end, source)
    n = len(both)
    if n < MIN_ROWS:
        raise InputError(f"{source}: only {n} dates with both {a!r} and {b!r} in the window; "
                         f"at least {MIN_ROWS} are needed")
    x = both[a].to_numpy(dtype=float)
    y = both[b].to_numpy(dtype=float)
    for col, arr in ((a, x), (b, y)):
        if np.all(arr == arr[0]):
            raise InputError(f"{source}: column {col!r} is constant in the window "
                             f"({float(arr[0])!r} on every date)")
    if kind == "uniforms":
        for col, arr in ((a, x), (b, y)):
            bad = np.flatnonzero(~((arr > 0) & (arr < 1)))
            if bad.size:
                d = both.index[bad[0]].date()
                raise InputError(f"{source}: {d}, column {col!r}: {float(arr[bad[0]])!r} is not in "
                                 "(0, 1) as uniforms must be")
        u, v = x, y
    else:
        u, v = pseudo_observations(x), pseudo_observations(y)
    gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    selection = select_copula(u, v, families, criterion)
    tail = tail_dependence(u, v, tail_q)
    gof: dict[str, GoodnessOfFit] = {}
    uncertainty = None
    if bootstrap:
        boot = bootstrap_candidates(u, v, selection.fits, replicates=bootstrap,
                                    selected=selection.selected, rng=gen, progress=progress)
        gof, uncertainty = boot.gof, boot.uncertainty
    return WindowStudy(
        pair=(a, b), kind=kind, start=both.index[0], end=both.index[-1], n=n, dropped=dropped,
        u=u, v=v, kendall_tau=kendall_tau_interval(u, v),
        spearman_rho=float(spearman_rho(u, v)), tail_q=float(tail_q),
        tail_lower_emp=float(tail.lower), tail_upper_emp=float(tail.upper),
        selection=selection, gof=gof, uncertainty=uncertainty,
        filter_info=filter_info or {"mode": "none"},
    )


def filtered_pair(frame: pd.DataFrame, a: str, b: str, *, kind: str, end: str | None,
                  settings: MarginalSettings | None, source: str = "input"
                  ) -> tuple[pd.DataFrame, dict]:
    """The two columns as the window study should rank them, with their provenance.

    Prices become log returns; returns are filtered with the GARCH-type marginal model of
    :mod:`monitor.stats.marginals` using data up to ``end`` only (``settings`` None: returns ranked
    as they are). Uniforms pass through.
    """
    _check_pair(frame, a, b, source)
    if kind == "uniforms":
        return frame[[a, b]], {"mode": "none", "note": "uniforms as given"}
    data = log_returns(frame[[a, b]], source) if kind == "prices" else frame[[a, b]]
    hi = _date(end, "--end")
    if hi is not None:
        data = data[data.index <= hi]
    if settings is None:
        return data, {"mode": "none", "note": "raw returns ranked, no marginal filter"}
    out, models = {}, {}
    for col in (a, b):
        series = data[col].dropna()
        series.name = col
        if len(series) < settings.min_returns:
            raise InputError(
                f"{source}: column {col!r} has {len(series)} returns up to the window end; "
                f"the {settings.mode} filter needs {settings.min_returns} "
                "(use --filter none to rank raw returns)")
        filtered = filter_series(series, settings)
        out[col] = pd.Series(filtered.residuals, index=pd.DatetimeIndex(filtered.dates))
        last = filtered.fits[-1]
        models[col] = {"spec": last.spec.key, "fallback": last.fallback or None,
                       "fits": len(filtered.fits), "n_fallback": filtered.n_fallback}
    resid = pd.DataFrame(out)
    resid.index.name = "date"
    return resid, {"mode": settings.mode, "settings": settings.key, "models": models}
