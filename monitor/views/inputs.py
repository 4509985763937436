"""What the Inputs page shows: coverage of the stored returns, the ingest and revision
history, the marginal model of every asset and the diagnostics of its residuals, as data
frames and figures computable without the dashboard.

Coverage is measured against the **union calendar**: every date on which at least one asset
has a stored return. An asset "misses" a date of that calendar inside its own first..last
range when it has no return there (a holiday of its market or a gap in the feed; comove
keeps each asset's own calendar, so neither is filled).

The marginal model is read from what :mod:`monitor.stats.marginals` stored (``marginal_fits``,
``marginal_state``, ``residuals`` under a marginal settings key, whose mode, real-time or
in-sample, labels every number). The diagnostics of an asset are its standardised residuals
and conditional volatility over time, the autocorrelations of the squared residuals with a
95% band, Ljung-Box tests, and a QQ plot of the residuals' probability-integral transforms
under the innovation distribution each day was filtered with, on the N(0, 1) scale.

>>> import numpy as np
>>> x = np.random.default_rng(0).standard_normal(500)
>>> bool(abs(autocorrelation(x, 5)[0]) < 0.2)
True
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from numpy.typing import ArrayLike, NDArray
from plotly.subplots import make_subplots
from scipy import special, stats

from monitor.common.arrays import read_only
from monitor.common.errors import InputError
from monitor.common.palette import BLUE, GROUND, MUTED, ORANGE, VERMILION, figure_layout
from monitor.data.store import Store
from monitor.stats.marginals import (
    LJUNG_BOX_LAGS,
    FilteredSeries,
    LjungBox,
    MarginalFit,
    MarginalSettings,
)

__all__ = [
    "COVERAGE_COLUMNS",
    "INGEST_COLUMNS",
    "MARGINAL_COLUMNS",
    "PARAMETER_NAMES",
    "REVISION_COLUMNS",
    "MarginalDiagnostics",
    "MonthlyCoverage",
    "acf_figure",
    "autocorrelation",
    "coverage_figure",
    "coverage_table",
    "ingest_table",
    "innovation_pit",
    "ljung_box_table",
    "marginal_diagnostics",
    "marginal_table",
    "mode_label",
    "monthly_coverage",
    "parse_inputs_query",
    "parse_lags",
    "qq_figure",
    "read_presence",
    "residuals_figure",
    "revision_table",
    "skewt_cdf",
]

#: Columns of :func:`coverage_table`.
COVERAGE_COLUMNS = ("asset", "first", "last", "returns", "calendar_days", "missing",
                    "missing_share", "largest_gap", "largest_gap_from", "largest_gap_to")
#: Columns of :func:`ingest_table`.
INGEST_COLUMNS = ("id", "started_at", "source", "kind", "outcome", "rows", "n_assets",
                  "assets", "first_date", "last_date", "new_values", "revised_values",
                  "checksum", "detail")
#: Columns of :func:`revision_table`.
REVISION_COLUMNS = ("id", "ingest_id", "table_name", "asset", "date", "old_value",
                    "new_value", "change", "revised_at")
#: Every parameter name of the marginal specifications (percent scale), in arch's order.
PARAMETER_NAMES = ("mu", "phi", "omega", "alpha", "gamma", "beta", "nu", "lambda")
#: Columns of :func:`marginal_table`.
MARGINAL_COLUMNS = ("asset", "mode", "spec", "model", "fit_end", "refits", "specs_used",
                    "fallback_now", "fallback_fits", "persistence", *PARAMETER_NAMES,
                    "lb_lags", "lb_pvalue", "lb_squared_pvalue", "residuals",
                    "first_residual", "last_residual", "settings")

_Z95 = float(stats.norm.ppf(0.975))


def mode_label(settings_key: str) -> str:
    """How to label numbers computed from a marginal settings key.

    Parameters
    ----------
    settings_key : str
        A :attr:`monitor.stats.marginals.MarginalSettings.key`.

    Returns
    -------
    str
        ``"real-time"`` or ``"in-sample (research only)"``.
    """
    mode = MarginalSettings.from_key(settings_key).mode
    return mode if mode == "real-time" else f"{mode} (research only)"


def _empty(columns) -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})


# ------------------------------------------------------------------------------ coverage
def read_presence(store: Store) -> pd.DataFrame:
    """Which asset has a stored return on which date.

    Parameters
    ----------
    store : Store

    Returns
    -------
    pandas.DataFrame
        Boolean, indexed by the union calendar (every date on which some asset has a
        return, ascending), one column per asset (sorted).

    Notes
    -----
    One row per asset comes back, its dates joined into one string by the database
    (``group_concat`` / ``string_agg``): parsing them is a single NumPy conversion, where
    fetching one row per stored return would cost seconds for a large universe.
    """
    rows = store.return_date_lists()
    if not rows:
        return pd.DataFrame(index=pd.DatetimeIndex([], name="date"), dtype=bool)
    per_asset = [np.array(joined.split(","), dtype="datetime64[D]") for _, joined in rows]
    calendar = np.unique(np.concatenate(per_asset))
    have = np.zeros((calendar.shape[0], len(rows)), dtype=bool)
    for j, days in enumerate(per_asset):  # one vectorised lookup per asset
        have[np.searchsorted(calendar, days), j] = True
    return pd.DataFrame(have, index=pd.DatetimeIndex(calendar.astype("datetime64[ns]"),
                                                     name="date"),
                        columns=[str(a) for a, _ in rows])


def _spans(have: NDArray[np.bool_]) -> tuple[NDArray[np.intp], NDArray[np.intp],
                                             NDArray[np.bool_]]:
    """First and last position with a value per column, and the mask inside that range."""
    n = have.shape[0]
    any_ = have.any(axis=0)
    first = np.where(any_, have.argmax(axis=0), 0)
    last = np.where(any_, n - 1 - have[::-1].argmax(axis=0), -1)
    index = np.arange(n)[:, None]
    return first, last, (index >= first) & (index <= last)


def coverage_table(presence: pd.DataFrame) -> pd.DataFrame:
    """Coverage of every asset on the union calendar.

    Parameters
    ----------
    presence : pandas.DataFrame
        Boolean date x asset frame (:func:`read_presence`); its index is the calendar.

    Returns
    -------
    pandas.DataFrame
        :data:`COVERAGE_COLUMNS`, one row per asset: ``first`` and ``last`` date with a
        return, ``returns`` (their number), ``calendar_days`` (calendar dates from first to
        last), ``missing`` (those without a return), ``missing_share``, and the longest run
        of consecutive missing calendar dates (``largest_gap``, in calendar dates, with its
        first and last date; NaT when nothing is missing).

    Notes
    -----
    ``missing = calendar_days - returns``. The run lengths are computed for all assets at
    once: at each date, the distance to the latest date with a return.
    """
    if presence.shape[1] == 0:
        return _empty(COVERAGE_COLUMNS)
    have = presence.to_numpy(dtype=bool)
    days = presence.index
    first, last, inside = _spans(have)
    miss = inside & ~have
    index = np.arange(have.shape[0])[:, None]
    latest_present = np.maximum.accumulate(np.where(miss, -1, index), axis=0)
    run = index - latest_present  # length of the missing run ending here (0: not missing)
    gap = run.max(axis=0)
    gap_end = run.argmax(axis=0)
    has_gap = gap > 0
    calendar = inside.sum(axis=0)
    missing = miss.sum(axis=0)
    nat = pd.NaT
    out = pd.DataFrame({
        "asset": list(presence.columns),
        "first": days[first], "last": days[np.maximum(last, 0)],
        "returns": have.sum(axis=0).astype(np.int64), "calendar_days": calendar.astype(np.int64),
        "missing": missing.astype(np.int64),
        "missing_share": np.divide(missing, calendar, out=np.zeros(len(calendar)),
                                   where=calendar > 0),
        "largest_gap": gap.astype(np.int64),
        "largest_gap_from": np.where(has_gap, days[gap_end - gap + 1], nat),
        "largest_gap_to": np.where(has_gap, days[gap_end], nat),
    })
    for c in ("largest_gap_from", "largest_gap_to"):
        out[c] = pd.to_datetime(out[c])
    return out[list(COVERAGE_COLUMNS)]


@dataclass(frozen=True, slots=True)
class MonthlyCoverage:
    """Per month (rows, first day of the month) and asset (columns): ``present`` returns,
    ``possible`` calendar dates inside the asset's range, and ``share = present / possible``
    (NaN in months outside the asset's range)."""

    present: pd.DataFrame
    possible: pd.DataFrame
    share: pd.DataFrame


def monthly_coverage(presence: pd.DataFrame) -> MonthlyCoverage:
    """Share of the union calendar's dates with a return, per asset and calendar month.

    Parameters
    ----------
    presence : pandas.DataFrame
        Boolean date x asset frame (:func:`read_presence`).

    Returns
    -------
    MonthlyCoverage
    """
    have = presence.to_numpy(dtype=bool)
    _, _, inside = _spans(have)
    month = presence.index.to_period("M").to_timestamp()
    cols = list(presence.columns)
    present = pd.DataFrame(have.astype(np.int64), index=month, columns=cols).groupby(
        level=0).sum()
    possible = pd.DataFrame(inside.astype(np.int64), index=month, columns=cols).groupby(
        level=0).sum()
    share = present / possible.where(possible > 0)
    for f in (present, possible, share):
        f.index.name = "month"
    return MonthlyCoverage(present, possible, share)


def coverage_figure(monthly: MonthlyCoverage) -> go.Figure:
    """Heat strip of missing dates: one row per asset, one cell per month.

    Parameters
    ----------
    monthly : MonthlyCoverage
        From :func:`monthly_coverage`.

    Returns
    -------
    plotly.graph_objects.Figure
        The colour is the share of the month's calendar dates *without* a return (white:
        none missing, vermilion: all missing); months outside an asset's first..last range
        are left grey. Hovering shows the counts.
    """
    share = monthly.share
    missing = 1.0 - share
    text = (monthly.present.astype(str) + " of " + monthly.possible.astype(str)
            + " dates").where(monthly.possible > 0, "outside the asset's range")
    fig = go.Figure(go.Heatmap(
        z=missing.T.to_numpy(), x=share.index, y=list(share.columns), zmin=0.0, zmax=1.0,
        colorscale=[[0.0, "#FFFFFF"], [0.05, "#FBE3D6"], [1.0, VERMILION]],
        colorbar={"title": {"text": "missing"}, "tickformat": ".0%", "len": 0.9},
        text=text.T.to_numpy(), xgap=1, ygap=2,
        hovertemplate="%{y} %{x|%Y-%m}: %{text} (%{z:.0%} missing)<extra></extra>"))
    fig.update_layout(**figure_layout(
        title={"text": "Missing dates per month, against the union calendar of all assets",
               "x": 0, "font": {"size": 14}},
        plot_bgcolor=GROUND, height=max(220, 110 + 22 * share.shape[1])))
    fig.update_yaxes(autorange="reversed", type="category")
    fig.update_xaxes(type="date")
    return fig


# ------------------------------------------------------------------ ingests and revisions
def ingest_table(store: Store, *, limit: int | None = None) -> pd.DataFrame:
    """The ingest history, newest first (:meth:`monitor.data.store.Store.ingest_history`).

    Returns
    -------
    pandas.DataFrame
        :data:`INGEST_COLUMNS`: ``outcome`` as stored (``stored``; a refusal leaves the store
        unchanged, so it is recorded only where a recorder of refusals stores one, with its
        reason in ``detail``), ``assets`` named (the first ten), ``checksum`` shortened to 12
        hexadecimal digits, ``detail`` the stored summary (gaps found, or the reason).
    """
    records = store.ingest_history(limit)
    if not records:
        return _empty(INGEST_COLUMNS)

    def names(assets: tuple[str, ...]) -> str:
        shown = ", ".join(assets[:10])
        return shown + (f" and {len(assets) - 10} more" if len(assets) > 10 else "")

    return pd.DataFrame([{
        "id": r.id, "started_at": pd.Timestamp(r.started_at), "source": r.source,
        "kind": r.kind, "outcome": r.outcome, "rows": r.rows, "n_assets": len(r.assets),
        "assets": names(r.assets), "first_date": pd.Timestamp(r.first_date),
        "last_date": pd.Timestamp(r.last_date), "new_values": r.new_values,
        "revised_values": r.revised_values, "checksum": r.checksum[:12], "detail": r.summary,
    } for r in records], columns=list(INGEST_COLUMNS))


def revision_table(store: Store) -> pd.DataFrame:
    """Stored values replaced by ingests with revisions accepted, newest first.

    Returns
    -------
    pandas.DataFrame
        :data:`REVISION_COLUMNS`; ``change = new_value - old_value`` (a log return or a
        price, per ``table_name``).
    """
    frame = store.revision_history()
    if frame.empty:
        return _empty(REVISION_COLUMNS)
    frame["change"] = frame["new_value"] - frame["old_value"]
    for c in ("date", "revised_at"):
        frame[c] = pd.to_datetime(frame[c])
    return frame.sort_values("id", ascending=False)[list(REVISION_COLUMNS)].reset_index(
        drop=True)


# ------------------------------------------------------------------------ marginal models
def marginal_table(store: Store, settings_key: str) -> pd.DataFrame:
    """The marginal model of every filtered asset under a settings key.

    Parameters
    ----------
    store : Store
    settings_key : str
        A :attr:`monitor.stats.marginals.MarginalSettings.key` (e.g. ``StoreView.marginal_key``).

    Returns
    -------
    pandas.DataFrame
        :data:`MARGINAL_COLUMNS`, one row per asset: ``mode`` (:func:`mode_label`), the
        latest refit's ``spec`` and readable ``model``, its sample end ``fit_end``, the
        number of ``refits``, ``specs_used`` (spec and number of refits, most used first),
        ``fallback_now`` (the latest refit uses the EWMA fallback), ``fallback_fits``, the
        latest refit's ``persistence`` and parameters (percent scale; empty where the spec
        has none), its stored Ljung-Box p-values on the estimation sample's standardised
        residuals and their squares (``lb_lags`` lags), the stored residuals' count and
        range, and the ``settings`` key.

    Notes
    -----
    Four grouped queries, whatever the number of refits: per asset the fit counts, the
    latest fit's stored record, the specs used and the residual counts.
    """
    overview = store.marginal_overview(settings_key)
    fits, used = overview.latest, overview.specs
    stored, current = overview.residuals, overview.current
    if not fits:
        return _empty(MARGINAL_COLUMNS)
    spec_text: dict[str, list[tuple[int, str]]] = {}
    for asset, spec, n in used:
        spec_text.setdefault(asset, []).append((n, spec))
    mode = mode_label(settings_key)
    stale = f"{mode}; input revised, redone at the next update"
    rows = []
    for asset, refits, fb, payload in sorted(fits):
        fit = MarginalFit.from_dict(json.loads(payload))
        n, lo, hi = stored.get(asset, (0, None, None))
        rows.append({
            "asset": asset, "mode": mode if asset in current else stale,
            "spec": fit.spec.key, "model": fit.spec.label,
            "fit_end": pd.Timestamp(fit.sample_end), "refits": int(refits),
            "specs_used": ", ".join(f"{s} x{k}" for k, s in sorted(spec_text[asset],
                                                                   reverse=True)),
            "fallback_now": bool(fit.fallback), "fallback_fits": int(fb or 0),
            "persistence": fit.persistence,
            **{p: fit.params.get(p, np.nan) for p in PARAMETER_NAMES},
            "lb_lags": fit.ljung_box.lags, "lb_pvalue": fit.ljung_box.pvalue,
            "lb_squared_pvalue": fit.ljung_box_squared.pvalue, "residuals": int(n),
            "first_residual": pd.Timestamp(lo) if lo is not None else pd.NaT,
            "last_residual": pd.Timestamp(hi) if hi is not None else pd.NaT,
            "settings": settings_key})
    return pd.DataFrame(rows, columns=list(MARGINAL_COLUMNS))


# ---------------------------------------------------------------------- innovation PIT
def skewt_cdf(z: ArrayLike, nu: ArrayLike, lam: ArrayLike) -> NDArray[np.float64]:
    """Distribution function of Hansen's standardised skewed t (mean 0, variance 1).

    Parameters
    ----------
    z : array_like
        Points.
    nu : array_like
        Degrees of freedom, > 2 (broadcast against ``z``).
    lam : array_like
        Skewness in (-1, 1).

    Returns
    -------
    ndarray

    Notes
    -----
    With ``c = Gamma((nu+1)/2) / (sqrt(pi (nu-2)) Gamma(nu/2))``,
    ``a = 4 lam c (nu-2)/(nu-1)``, ``b = sqrt(1 + 3 lam^2 - a^2)`` and ``T`` the Student-t
    distribution function with ``nu`` degrees of freedom, ``s = sqrt(nu / (nu - 2))``:
    ``F(z) = (1-lam) T(s (bz+a)/(1-lam))`` for ``z < -a/b``, else
    ``F(z) = (1-lam)/2 + (1+lam) (T(s (bz+a)/(1+lam)) - 1/2)``; integrated from the density
    of Hansen (1994, "Autoregressive conditional density estimation", International Economic
    Review 35, 705-730, eq. 10), the parametrisation of arch's ``SkewStudent``.
    """
    z, nu, lam = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (z, nu, lam)))
    c = np.exp(special.gammaln((nu + 1) / 2) - special.gammaln(nu / 2)) / np.sqrt(
        np.pi * (nu - 2))
    a = 4 * lam * c * (nu - 2) / (nu - 1)
    b = np.sqrt(1 + 3 * lam ** 2 - a ** 2)
    s = np.sqrt(nu / (nu - 2))
    y = b * z + a
    left = z < -a / b
    low = (1 - lam) * stats.t.cdf(s * y / (1 - lam), nu)
    high = (1 - lam) / 2 + (1 + lam) * (stats.t.cdf(s * y / (1 + lam), nu) - 0.5)
    return np.where(left, low, high)


def innovation_pit(series: FilteredSeries) -> NDArray[np.float64]:
    """Probability-integral transforms ``F_t(z_t)`` of a filtered series' residuals.

    Parameters
    ----------
    series : FilteredSeries

    Returns
    -------
    ndarray
        One value in (0, 1) per residual (read-only).

    Notes
    -----
    ``F_t`` is the innovation distribution of the fit that filtered day ``t``: the
    standardised Student-t (arch's ``StudentsT``: ``T_nu(z sqrt(nu / (nu - 2)))``), Hansen's
    skewed t (:func:`skewt_cdf`); the EWMA-t fallback's is a Student-t too (N(0, 1) for
    fallback fits stored by algorithm v1, which had normal innovations). Under a correct model
    the transforms are uniform (Diebold, Gunther & Tay 1998, "Evaluating density forecasts",
    International Economic Review 39, 863-883).
    """
    z = np.asarray(series.residuals, dtype=float)
    idx = np.asarray(series.fit_index, dtype=np.intp)
    if z.size == 0:
        return read_only(np.empty(0))
    dist = np.array([f.spec.distribution for f in series.fits])[idx]
    nu = np.array([f.params.get("nu", np.nan) for f in series.fits])[idx]
    lam = np.array([f.params.get("lambda", 0.0) for f in series.fits])[idx]
    u = stats.norm.cdf(z)
    t = dist == "t"
    if t.any():
        u[t] = stats.t.cdf(z[t] * np.sqrt(nu[t] / (nu[t] - 2)), nu[t])
    sk = dist == "skewt"
    if sk.any():
        u[sk] = skewt_cdf(z[sk], nu[sk], lam[sk])
    return read_only(u)


# ----------------------------------------------------------------------- diagnostics
def autocorrelation(x: ArrayLike, lags: int) -> NDArray[np.float64]:
    """Sample autocorrelations at lags 1..``lags``.

    Parameters
    ----------
    x : array_like
        A finite 1-D sample.
    lags : int
        Largest lag, ``1 <= lags < len(x)``.

    Returns
    -------
    ndarray
        ``r_1 .. r_lags`` (read-only).

    Notes
    -----
    ``r_k = sum_{t>k} (x_t - xbar)(x_{t-k} - xbar) / sum_t (x_t - xbar)^2`` (Box, Jenkins &
    Reinsel, *Time Series Analysis*, eq. 2.1.12; the estimator of statsmodels'
    ``acf(adjusted=False)``), computed with one FFT of the zero-padded series.
    """
    arr = np.asarray(x, dtype=float)
    if arr.ndim != 1 or not np.isfinite(arr).all():
        raise ValueError("autocorrelation needs a finite 1-D sample")
    if isinstance(lags, bool) or not isinstance(lags, int | np.integer):
        raise TypeError(f"lags must be an integer, got {lags!r}")
    n = arr.shape[0]
    if not 1 <= lags < n:
        raise ValueError(f"lags must be between 1 and n - 1 = {n - 1}, got {lags}")
    d = arr - arr.mean()
    size = 1 << int(2 * n - 1).bit_length()
    spec = np.fft.rfft(d, size)
    acov = np.fft.irfft(spec * np.conj(spec), size)[:lags + 1]
    if acov[0] <= 0:
        raise ValueError("autocorrelation is undefined for a constant sample")
    return read_only(acov[1:] / acov[0])


@dataclass(frozen=True, slots=True)
class MarginalDiagnostics:
    """Residual diagnostics of one asset's marginal model (arrays read-only).

    Attributes
    ----------
    asset, settings_key, mode : str
        ``mode`` is :func:`mode_label` of the key.
    latest : MarginalFit
        The latest refit (spec, parameters, stored Ljung-Box tests).
    dates, residuals, sigma : ndarray
        Standardised residuals and conditional volatility (return units) per filtered day.
    fallback : ndarray of bool
        Days filtered by an EWMA fallback fit.
    refit_ends : ndarray of datetime64
        Sample end of every refit.
    lags, acf_squared : ndarray
        Lags 1..L and the autocorrelations of the squared residuals.
    band : float
        Half-width of the 95% band of an autocorrelation under independence,
        ``1.96 / sqrt(n)``.
    pit : ndarray
        :func:`innovation_pit` of the residuals.
    qq_theoretical, qq_sample : ndarray
        N(0, 1) quantiles at ``(i - 1/2) / n`` and the sorted normal scores ``Phi^-1(pit)``.
    ljung_box, ljung_box_squared : LjungBox
        On all filtered residuals and on their squares (``LJUNG_BOX_LAGS`` lags).
    """

    asset: str
    settings_key: str
    mode: str
    latest: MarginalFit
    dates: NDArray[np.datetime64]
    residuals: NDArray[np.float64]
    sigma: NDArray[np.float64]
    fallback: NDArray[np.bool_]
    refit_ends: NDArray[np.datetime64]
    lags: NDArray[np.int64]
    acf_squared: NDArray[np.float64]
    band: float
    pit: NDArray[np.float64]
    qq_theoretical: NDArray[np.float64]
    qq_sample: NDArray[np.float64]
    ljung_box: LjungBox
    ljung_box_squared: LjungBox


def marginal_diagnostics(store: Store, settings_key: str, asset: str, *, lags: int = 20
                         ) -> MarginalDiagnostics:
    """Diagnostics of the stored residuals of one asset.

    Parameters
    ----------
    store : Store
    settings_key : str
        Marginal settings key (``StoreView.marginal_key``).
    asset : str
    lags : int
        Largest lag of the autocorrelations (default 20, about a trading month).

    Returns
    -------
    MarginalDiagnostics

    Raises
    ------
    InputError
        When the asset has no residuals stored under the key, or too few for the lags.

    Notes
    -----
    The band ``+-1.96 / sqrt(n)`` is the large-sample 95% interval of an autocorrelation of
    an independent series (Box, Jenkins & Reinsel, *Time Series Analysis*, section 2.1.6,
    Bartlett's approximation at lag 1; from memory). The QQ plot compares the normal scores
    ``Phi^-1(F_t(z_t))`` with N(0, 1): each residual is judged against the innovation
    distribution of the refit that filtered it (real-time refits change the parameters).
    """
    series = store.load_filtered(settings_key, asset)
    if series is None or len(series.residuals) == 0:
        raise InputError(f"asset {asset!r}: no filtered residuals stored under marginal "
                         f"settings {settings_key}")
    z = np.asarray(series.residuals, dtype=float)
    n = z.shape[0]
    if n <= max(lags, LJUNG_BOX_LAGS):
        raise InputError(f"asset {asset!r}: {n} residuals, too few for {lags} lags")
    pit = innovation_pit(series)
    scores = stats.norm.ppf(np.clip(pit, 1e-12, 1 - 1e-12))
    theoretical = stats.norm.ppf((np.arange(1, n + 1) - 0.5) / n)
    lb, lb2 = series.diagnostics()
    fallback = np.array([bool(f.fallback) for f in series.fits])[series.fit_index]
    return MarginalDiagnostics(
        asset=asset, settings_key=settings_key, mode=mode_label(settings_key),
        latest=series.fits[-1], dates=series.dates, residuals=series.residuals,
        sigma=series.sigma, fallback=read_only(fallback),
        refit_ends=read_only(np.array([np.datetime64(f.sample_end, "D") for f in series.fits])),
        lags=read_only(np.arange(1, lags + 1)), acf_squared=autocorrelation(z * z, lags),
        band=_Z95 / np.sqrt(n), pit=pit, qq_theoretical=read_only(theoretical),
        qq_sample=read_only(np.sort(scores)), ljung_box=lb, ljung_box_squared=lb2)


def ljung_box_table(diag: MarginalDiagnostics) -> pd.DataFrame:
    """Ljung-Box tests of one asset: stored at the latest refit and on all filtered days.

    Parameters
    ----------
    diag : MarginalDiagnostics

    Returns
    -------
    pandas.DataFrame
        Columns ``sample``, ``series`` (residuals or squares), ``lags``, ``statistic``,
        ``pvalue``. The latest refit's tests are on its estimation sample (as stored); the
        others on every filtered residual (real-time: each filtered with parameters
        estimated before that day).
    """
    refit = f"latest refit, sample to {diag.latest.sample_end} (stored)"
    everything = f"all {len(diag.residuals)} filtered days"
    rows = [(refit, "residuals", diag.latest.ljung_box),
            (refit, "squared residuals", diag.latest.ljung_box_squared),
            (everything, "residuals", diag.ljung_box),
            (everything, "squared residuals", diag.ljung_box_squared)]
    return pd.DataFrame([{"sample": s, "series": k, "lags": t.lags, "statistic": t.statistic,
                          "pvalue": t.pvalue} for s, k, t in rows])


def _title(diag: MarginalDiagnostics, what: str) -> dict:
    return {"text": f"{diag.asset}: {what}<br><sup>{diag.latest.spec.label} at the latest refit"
                    f"; {diag.mode} marginals</sup>",
            "x": 0, "font": {"size": 14}}


def residuals_figure(diag: MarginalDiagnostics) -> go.Figure:
    """Standardised residuals and conditional volatility of one asset over time.

    Parameters
    ----------
    diag : MarginalDiagnostics

    Returns
    -------
    plotly.graph_objects.Figure
        Top: the residuals ``z_t`` with dotted lines at +-3 and the days filtered by the EWMA
        fallback marked by crosses; bottom: ``sigma_t`` in percent a day. The subtitle names
        the latest refit's model, the mode and the settings key.
    """
    dates = pd.to_datetime(diag.dates)
    fig = make_subplots(rows=2, cols=1, shared_xaxes=True, vertical_spacing=0.08,
                        row_heights=[0.62, 0.38])
    fig.add_trace(go.Scattergl(x=dates, y=diag.residuals, mode="markers", name="residual",
                               marker={"size": 3, "color": BLUE}), row=1, col=1)
    if diag.fallback.any():
        fig.add_trace(go.Scattergl(
            x=dates[diag.fallback], y=np.asarray(diag.residuals)[diag.fallback], mode="markers",
            name="filtered by the EWMA-t fallback",
            marker={"size": 6, "symbol": "x", "color": VERMILION}), row=1, col=1)
    for level in (-3.0, 3.0):
        fig.add_hline(y=level, line={"color": MUTED, "dash": "dot", "width": 1}, row=1, col=1)
    fig.add_trace(go.Scattergl(x=dates, y=100 * np.asarray(diag.sigma), mode="lines",
                               name="conditional volatility", line={"color": ORANGE,
                                                                    "width": 1.5}),
                  row=2, col=1)
    fig.update_yaxes(title_text="z", row=1, col=1)
    fig.update_yaxes(title_text="sigma, % a day", row=2, col=1)
    fig.update_layout(**figure_layout(title=_title(diag, "standardised residuals"), height=420,
                                      legend={"orientation": "h", "y": -0.12},
                                      margin={"l": 56, "r": 16, "t": 60, "b": 40}))
    return fig


def acf_figure(diag: MarginalDiagnostics) -> go.Figure:
    """Autocorrelations of the squared residuals with the 95% band under independence.

    Parameters
    ----------
    diag : MarginalDiagnostics

    Returns
    -------
    plotly.graph_objects.Figure
        One bar per lag (vermilion where outside the band ``+-1.96 / sqrt(n)``, dashed);
        the title gives the Ljung-Box p-value of the squares on all filtered days.
    """
    lb2 = diag.ljung_box_squared
    fig = go.Figure()
    outside = np.abs(diag.acf_squared) > diag.band
    fig.add_trace(go.Bar(x=diag.lags, y=diag.acf_squared, name="autocorrelation",
                         marker={"color": np.where(outside, VERMILION, BLUE)}, width=0.5,
                         hovertemplate="lag %{x}: %{y:.3f}<extra></extra>"))
    for sign in (-1, 1):
        fig.add_hline(y=sign * diag.band, line={"color": MUTED, "dash": "dash", "width": 1})
    fig.update_layout(**figure_layout(
        title=_title(diag, f"ACF of squared residuals (dashed: 95% band +-{diag.band:.3f}; "
                           f"Ljung-Box({lb2.lags}) p = {lb2.pvalue:.3g})"),
        height=320, showlegend=False, margin={"l": 56, "r": 16, "t": 60, "b": 40}))
    fig.update_xaxes(title_text="lag (trading days)", dtick=5 if len(diag.lags) > 10 else 1)
    fig.update_yaxes(title_text="autocorrelation")
    return fig


def qq_figure(diag: MarginalDiagnostics) -> go.Figure:
    """QQ plot of the residuals' normal scores ``Phi^-1(F_t(z_t))`` against N(0, 1).

    Parameters
    ----------
    diag : MarginalDiagnostics

    Returns
    -------
    plotly.graph_objects.Figure
        Sorted normal scores against the N(0, 1) quantiles at ``(i - 1/2) / n``, with the
        line y = x; points off the line at the ends are innovations heavier- or
        lighter-tailed than the fitted distributions.
    """
    x, y = diag.qq_theoretical, diag.qq_sample
    lim = float(np.nanmax(np.abs(np.concatenate([x, y])))) * 1.05
    fig = go.Figure()
    fig.add_trace(go.Scattergl(x=x, y=y, mode="markers", name="residuals",
                               marker={"size": 4, "color": BLUE}))
    fig.add_trace(go.Scatter(x=[-lim, lim], y=[-lim, lim], mode="lines", name="y = x",
                             line={"color": VERMILION, "dash": "dash", "width": 1}))
    fig.update_layout(**figure_layout(
        title=_title(diag, "QQ against the fitted innovation distributions, on the N(0,1) "
                           "scale"),
        height=360, showlegend=False, margin={"l": 56, "r": 16, "t": 60, "b": 40}))
    fig.update_xaxes(title_text="N(0,1) quantile", range=[-lim, lim])
    fig.update_yaxes(title_text="normal score of F_t(z_t)", range=[-lim, lim],
                     scaleanchor="x", scaleratio=1)
    return fig


# --------------------------------------------------------------------------- the query
def parse_inputs_query(query: dict[str, str], assets: list[str]) -> str | None:
    """The asset asked for by the Inputs page's query string (``?asset=NAME``), or None.

    Parameters
    ----------
    query : dict of str
        The URL's query parameters.
    assets : list of str
        Assets with filtered residuals.

    Returns
    -------
    str or None

    Raises
    ------
    InputError
        For an unknown key or an asset without filtered residuals, naming it.
    """
    unknown = sorted(set(query) - {"asset"})
    if unknown:
        raise InputError(f"query: unknown parameter {unknown[0]!r}; known: asset")
    asset = query.get("asset")
    if asset is None:
        return None
    asset = asset.strip()
    if asset not in assets:
        raise InputError(f"query: asset={asset!r} has no filtered residuals (assets: "
                         f"{', '.join(assets[:12]) or 'none'}{' ...' if len(assets) > 12 else ''})")
    return asset


def parse_lags(value: object, low: int = 5, high: int = 100) -> int:
    """A typed number of autocorrelation lags, checked to be a whole number in [low, high].

    Parameters
    ----------
    value : object
        What the control holds (a number, a numeric string or None).
    low, high : int
        Bounds, inclusive.

    Returns
    -------
    int

    Raises
    ------
    InputError
        Naming the value when it is not a whole number in range.
    """
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise InputError(f"ACF lags: {value!r} is not a number") from None
    if not math.isfinite(number) or number != int(number) or not low <= number <= high:
        raise InputError(f"ACF lags: {value!r}; give a whole number from {low} to {high}")
    return int(number)
