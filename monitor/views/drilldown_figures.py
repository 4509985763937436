"""Plotly figures of the window study (the Drill-down page and its HTML report).

Every figure's title says what produced it: pair, window, n, selected family and criterion,
marginal mode. Colours are the Okabe-Ito set of :mod:`monitor.common.palette`.
"""

from __future__ import annotations

import numpy as np
import plotly.graph_objects as go
from plotly.subplots import make_subplots
from scipy import special

from monitor.common.palette import (
    BLACK,
    BLUE,
    GREEN,
    GREY,
    MUTED,
    RULE,
    SKY,
    VERMILION,
    figure_layout,
)
from monitor.stats.copulas import family
from monitor.views.drilldown import PairStudy, WindowResult

#: Normal scores of the density grid: +-3.5 covers pseudo-observations of n up to ~4000.
_SCORE_LIMIT = 3.5
#: Uniform grid kept off the corners, where tail-dependent densities are unbounded.
_UNIFORM_MARGIN = 0.01
#: Log-density contour levels below the model's peak on the grid.
_LOG_LEVELS = 7.0


def provenance_line(study: PairStudy, result: WindowResult) -> str:
    """One line naming what produced a window's numbers."""
    w = result.window
    sel = result.selected
    a, b = study.pair
    return (f"{a} / {b}, {result.role} window {w.start.date()} to {w.end.date()}, n = {w.n}; "
            f"{sel.label} by {study.criterion.upper()}; {study.marginal_mode} GARCH residuals")


def _title(text: str, sub: str) -> dict:
    return {"text": f"{text}<br><span style='font-size:11px;color:{MUTED}'>{sub}</span>",
            "x": 0.0, "xanchor": "left", "font": {"size": 14}}


def scatter_figure(study: PairStudy, result: WindowResult, *, scale: str = "normal",
                   grid: int = 81, crash_q: float = 0.05) -> go.Figure:
    """Pseudo-observations with contours of the fitted copula's density.

    Parameters
    ----------
    study : PairStudy
    result : WindowResult
        The window to draw.
    scale : {"normal", "uniform"}
        ``"normal"`` (default): points at normal scores (Phi^-1(U), Phi^-1(V)) and contours of
        the density with standard-normal margins, c(Phi(x), Phi(y)) phi(x) phi(y), on
        [-3.5, 3.5]^2; tail asymmetry shows as a pointed end of the contours, and the
        dashed contours of the Gaussian copula with the same Kendall's tau (at the same
        levels) are ellipses. ``"uniform"``: points at (U, V) and contours of log c(u, v) on
        [0.01, 0.99]^2, away from the corners where tail-dependent densities are unbounded.
    grid : int
        Grid points per axis.
    crash_q : float
        Days with both pseudo-observations at or below this level are marked.

    Returns
    -------
    plotly Figure

    Notes
    -----
    Contours are drawn at log-density levels 1, 2, ..., 7 below the fitted density's largest
    value on the grid, for both copulas, so the two sets of lines are comparable.
    """
    if scale not in ("normal", "uniform"):
        raise ValueError(f"scale must be 'normal' or 'uniform'; got {scale!r}")
    w = result.window
    sel = result.selected
    a, b = study.pair
    fam, p = sel.copula, sel.param_tuple
    gauss, gp = family("gaussian"), (result.gaussian_rho,)
    if scale == "normal":
        axis = np.linspace(-_SCORE_LIMIT, _SCORE_LIMIT, grid)
        xs, ys = special.ndtri(w.u), special.ndtri(w.v)
        gu, gv = np.meshgrid(special.ndtr(axis), special.ndtr(axis))
        gx, gy = np.meshgrid(axis, axis)
        margins = -0.5 * (gx**2 + gy**2) - np.log(2 * np.pi)
        labels = (f"normal score of {a}", f"normal score of {b}")
    else:
        axis = np.linspace(_UNIFORM_MARGIN, 1 - _UNIFORM_MARGIN, grid)
        xs, ys = w.u, w.v
        gu, gv = np.meshgrid(axis, axis)
        margins = 0.0
        labels = (f"pseudo-observation of {a}", f"pseudo-observation of {b}")
    z_fit = np.asarray(fam.logpdf(gu, gv, p), dtype=float) + margins
    z_gauss = np.asarray(gauss.logpdf(gu, gv, gp), dtype=float) + margins
    top = float(np.nanmax(z_fit))
    levels = {"start": top - _LOG_LEVELS, "end": top - 1.0, "size": 1.0}
    crash = (w.u <= crash_q) & (w.v <= crash_q)
    dates = np.array([d.strftime("%Y-%m-%d") for d in result.dates]) if result.dates else None
    fig = go.Figure()
    fig.add_trace(go.Contour(
        x=axis, y=axis, z=z_gauss, contours={**levels, "coloring": "none"}, autocontour=False,
        line={"color": BLUE, "dash": "dash", "width": 1}, showscale=False, hoverinfo="skip",
        name=f"Gaussian, same tau (rho = {result.gaussian_rho:.3f})", showlegend=True))
    fig.add_trace(go.Contour(
        x=axis, y=axis, z=z_fit, contours={**levels, "coloring": "none"}, autocontour=False,
        line={"color": VERMILION, "width": 1.5}, showscale=False, hoverinfo="skip",
        name=f"fitted {sel.label} (log-density)", showlegend=True))
    for mask, colour, name, size in ((~crash, GREY, "days", 5),
                                     (crash, BLACK, f"both <= {crash_q:g} quantile", 7)):
        if not mask.any():
            continue
        custom = np.column_stack([w.u[mask], w.v[mask]])
        text = dates[mask] if dates is not None and dates.size == w.n else None
        fig.add_trace(go.Scatter(
            x=xs[mask], y=ys[mask], mode="markers", name=f"{name} ({int(mask.sum())})",
            marker={"color": colour, "size": size, "opacity": 0.75}, text=text,
            customdata=custom,
            hovertemplate="%{text}<br>U = %{customdata[0]:.3f}, V = %{customdata[1]:.3f}"
                          "<extra></extra>"))
    lim = [-_SCORE_LIMIT, _SCORE_LIMIT] if scale == "normal" else [0, 1]
    fig.update_layout(**figure_layout(
        title=_title(f"Pseudo-observations and fitted density ({result.role})",
                     provenance_line(study, result)),
        xaxis={"title": labels[0], "range": lim, "zeroline": False, "gridcolor": RULE},
        yaxis={"title": labels[1], "range": lim, "zeroline": False, "gridcolor": RULE,
               "scaleanchor": "x", "scaleratio": 1},
        legend={"orientation": "h", "y": -0.18, "x": 0}, height=480,
        margin={"l": 56, "r": 16, "t": 64, "b": 40}))
    return fig


def tail_figure(study: PairStudy, result: WindowResult) -> go.Figure:
    """Tail concordance over q: empirical (with its 95% binomial band) against the fitted
    copula and the Gaussian copula with the same Kendall's tau, lower and upper tail."""
    sel = result.selected
    fig = make_subplots(rows=1, cols=2, horizontal_spacing=0.1, subplot_titles=(
        "lower tail: P(U ≤ q, V ≤ q) / q", "upper tail: P(U > 1−q, V > 1−q) / q"))
    for col, curve in ((1, result.lower_curve), (2, result.upper_curve)):
        first = col == 1
        q = np.asarray(curve.q)
        fig.add_trace(go.Scatter(
            x=np.concatenate([q, q[::-1]]),
            y=np.concatenate([curve.empirical_upper, np.asarray(curve.empirical_lower)[::-1]]),
            fill="toself", fillcolor="rgba(86,180,233,0.25)", line={"width": 0},
            name="empirical 95% band (binomial)", legendgroup="band", showlegend=first,
            hoverinfo="skip"), row=1, col=col)
        fig.add_trace(go.Scatter(
            x=q, y=curve.empirical, mode="lines+markers", name="empirical",
            line={"color": SKY, "width": 2}, marker={"size": 4, "color": BLUE},
            legendgroup="emp", showlegend=first,
            hovertemplate="q = %{x:.2f}: %{y:.3f}<extra>empirical</extra>"), row=1, col=col)
        fig.add_trace(go.Scatter(
            x=q, y=curve.model, mode="lines", name=f"fitted {sel.label}",
            line={"color": VERMILION, "width": 2}, legendgroup="model", showlegend=first,
            hovertemplate="q = %{x:.2f}: %{y:.3f}<extra>fitted</extra>"), row=1, col=col)
        fig.add_trace(go.Scatter(
            x=q, y=curve.gaussian, mode="lines",
            name=f"Gaussian, same tau ({result.gaussian_tau:.3f})",
            line={"color": BLACK, "width": 1.5, "dash": "dash"}, legendgroup="gauss",
            showlegend=first,
            hovertemplate="q = %{x:.2f}: %{y:.3f}<extra>Gaussian</extra>"), row=1, col=col)
        fig.update_xaxes(title_text="q", gridcolor=RULE, row=1, col=col)
        fig.update_yaxes(range=[0, 1], gridcolor=RULE, row=1, col=col)
    fig.update_layout(**figure_layout(
        title=_title(f"Tail concordance, empirical against model ({result.role})",
                     provenance_line(study, result)),
        legend={"orientation": "h", "y": -0.22, "x": 0}, height=400,
        margin={"l": 56, "r": 16, "t": 80, "b": 40}))
    return fig


def crash_figure(study: PairStudy, result: WindowResult) -> go.Figure:
    """P(both at or below their q-quantile) for each q: empirical (95% Wilson interval),
    fitted, Gaussian with the same tau, independence; the Frechet-Hoeffding upper bound q
    drawn as a line (the lower bound max(2q - 1, 0) is 0 for q < 1/2)."""
    sel = result.selected
    crash = result.crash
    fig = make_subplots(rows=1, cols=len(crash), horizontal_spacing=0.12, subplot_titles=[
        f"q = {100 * c.q:g}%: fitted / Gaussian = {c.ratio:.2f}x" for c in crash])
    names = ("empirical", f"fitted {sel.label}", "Gaussian, same tau", "independence q²")
    colours = (SKY, VERMILION, BLUE, GREEN)
    for col, c in enumerate(crash, start=1):
        values = np.array([c.empirical, c.fitted, c.gaussian, c.independence]) * 100
        err_hi = np.array([c.empirical_upper - c.empirical, 0, 0, 0]) * 100
        err_lo = np.array([c.empirical - c.empirical_lower, 0, 0, 0]) * 100
        fig.add_trace(go.Bar(
            x=list(names), y=values, marker={"color": list(colours)}, showlegend=False,
            error_y={"type": "data", "array": err_hi, "arrayminus": err_lo, "color": BLACK,
                     "visible": True},
            text=[f"{x:.3f}%" for x in values], textposition="outside",
            hovertemplate="%{x}: %{y:.4f}%<extra></extra>"), row=1, col=col)
        fig.add_trace(go.Scatter(
            x=list(names), y=[100 * c.upper_bound] * len(names), mode="lines",
            line={"color": GREY, "dash": "dot"}, name="upper bound M(q,q) = q",
            showlegend=col == 1, hoverinfo="skip"), row=1, col=col)
        fig.update_yaxes(title_text="probability, %" if col == 1 else None,
                         range=[0, 100 * c.upper_bound * 1.08], gridcolor=RULE, row=1, col=col)
    fig.update_layout(**figure_layout(
        title=_title(f"Joint-crash probability P(U ≤ q, V ≤ q) ({result.role})",
                     provenance_line(study, result) + "; lower bound max(2q−1, 0) = 0"),
        legend={"orientation": "h", "y": -0.25, "x": 0}, height=400, bargap=0.3,
        margin={"l": 56, "r": 16, "t": 80, "b": 60}))
    return fig
