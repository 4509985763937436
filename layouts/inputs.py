"""The Inputs page: coverage of the stored returns, the ingest and revision history, the
marginal model of every asset and the diagnostics of one asset's residuals.

Query string: ``?asset=NAME`` opens the diagnostics of that asset.
"""

from __future__ import annotations

from types import MappingProxyType

from dash import dcc, html

from monitor.common.errors import InputError
from monitor.settings import settings_words
from monitor.views.common import for_browser
from monitor.views.inputs import (
    PARAMETER_NAMES,
    coverage_figure,
    coverage_table,
    ingest_table,
    marginal_table,
    mode_label,
    monthly_coverage,
    parse_inputs_query,
    read_presence,
    revision_table,
)

from . import ids
from .components import graph, message, panel, table, typed_table
from .theme import NOTE_STYLE

TITLE = "Inputs"

#: Default and bounds of the autocorrelation lags control.
LAGS = (20, 5, 100)

COVERAGE_LABELS = MappingProxyType({
    "calendar_days": "calendar dates", "missing_share": "missing share",
    "largest_gap": "largest gap (dates)", "largest_gap_from": "gap from",
    "largest_gap_to": "gap to",
})
MARGINAL_LABELS = MappingProxyType({
    "fit_end": "latest refit (sample end)", "specs_used": "specs used (refits)",
    "fallback_now": "EWMA-t fallback now", "fallback_fits": "fallback refits",
    "lb_lags": "LB lags", "lb_pvalue": "LB p (z)", "lb_squared_pvalue": "LB p (z^2)",
    "first_residual": "first residual", "last_residual": "last residual",
})


#: Marginal-table columns hidden at first ("Toggle Columns" shows them; the CSV has all):
#: the parameters (percent scale) and the residuals' date range.
MARGINAL_SECONDARY = (*PARAMETER_NAMES, "lb_lags", "first_residual", "last_residual")


def layout(view, query: dict[str, str]) -> html.Div:
    """The page for ``view``; ``query`` may name the asset whose diagnostics open."""
    assets, panels = view.store.kept(("inputs page", view.marginal_key),
                                     lambda: _store_panels(view))
    problem, asset = None, None
    try:
        asset = parse_inputs_query(query, assets)
    except InputError as exc:
        problem = str(exc)
    if asset is None and assets:
        asset = assets[0]
    return html.Div([
        html.H2("Inputs", style={"margin": "4px 0"}),
        html.P("Stored returns and their marginal models; "
               f"{settings_words(view.marginal_key)}.", style=NOTE_STYLE),
        message(problem, kind="problem") if problem else None,
        *panels,
        panel("Residual diagnostics", _diagnostics_controls(assets, asset),
              html.P(id=ids.INPUTS_NOTE, style=NOTE_STYLE),
              graph(ids.INPUTS_RESIDUALS, filename="comove-residuals"),
              html.Div([
                  html.Div(graph(ids.INPUTS_ACF, filename="comove-acf-squared"),
                           style={"flex": "1 1 480px"}),
                  html.Div(graph(ids.INPUTS_QQ, filename="comove-qq"),
                           style={"flex": "1 1 420px"}),
              ], style={"display": "flex", "flexWrap": "wrap", "gap": "12px"}),
              table(ids.INPUTS_LJUNG_BOX, page_size=4),
              note="The stored standardised residuals of one asset over time with their "
                   "conditional volatility; autocorrelations of the squared residuals with "
                   "the 95% band +-1.96/sqrt(n) of an independent series; and a QQ plot of "
                   "the normal scores of F_t(z_t), F_t the innovation distribution (Student-t, "
                   "skew-t, or the EWMA-t fallback's Student-t) of the refit that filtered day t, "
                   "against N(0,1)."),
    ])


def _store_panels(view) -> tuple[list[str], tuple[html.Div, ...]]:
    """The filtered assets and the panels that show the store alike to every user (coverage,
    ingests, revisions, marginal models): the page keeps them until the store changes
    (:meth:`monitor.data.store.Store.kept`), so that a desk opening the page after the
    morning update reads the store once."""
    store, key = view.store, view.marginal_key
    models = marginal_table(store, key)
    presence = read_presence(store)
    return list(models["asset"]), (
        panel("Coverage", _coverage(coverage_table(presence), presence),
              note="Per asset: first and last stored log return, their number, and the dates "
                   "of the union calendar (every date on which some asset has a return) "
                   "between the two without a return: holidays of the asset's market or gaps "
                   "of the feed, kept as such, never filled."),
        panel("Ingests", typed_table(ids.INPUTS_INGESTS, ingest_table(store), page_size=10,
                                     secondary=("id", "checksum")),
              note="Every storing ingest, newest first (outcome, rows, values, checksum and "
                   "the gaps it found). A refused file changes nothing in the store; "
                   "'comove ingest' prints the reason, naming file, row or date and column."),
        panel("Revisions", _revisions(revision_table(store)),
              note="Stored values replaced by an ingest run with --accept-revisions; the "
                   "results derived from them were dropped and recomputed."),
        panel("Marginal models", _models(models),
              note=f"The model of every asset at its latest refit ({mode_label(key)}): BIC "
                   "choice among constant or AR(1) mean x GARCH(1,1) or GJR-GARCH(1,1) x "
                   "Student-t or skew-t; parameters on percent returns; Ljung-Box p-values "
                   "(LB) of the latest refit's standardised residuals z and of z^2, as "
                   "stored."))


def _coverage(coverage, presence) -> html.Div:
    if coverage.empty:
        return message("No returns stored yet: run 'comove ingest' first.")
    return html.Div([
        typed_table(ids.INPUTS_COVERAGE, coverage, labels=COVERAGE_LABELS, page_size=12,
                    percent=("missing_share",)),
        graph(ids.INPUTS_COVERAGE_FIGURE,
              for_browser(coverage_figure(monthly_coverage(presence)).to_plotly_json()),
              filename="comove-coverage"),
    ])


def _revisions(revisions) -> html.Div:
    if revisions.empty:
        return message("No stored value has been revised.")
    return typed_table(ids.INPUTS_REVISIONS, revisions, page_size=10)


def _models(models) -> html.Div:
    if models.empty:
        return message("No asset has been filtered under these settings yet: run "
                       "'comove update'.")
    # the settings are named in words above the page; the spec key repeats the model's name
    shown = models.drop(columns=[c for c in ("settings", "spec") if c in models.columns])
    return typed_table(ids.INPUTS_MARGINAL, shown, labels=MARGINAL_LABELS, page_size=12,
                       secondary=MARGINAL_SECONDARY)


def _diagnostics_controls(assets: list[str], asset: str | None) -> html.Div:
    label = {"marginRight": "6px", "fontWeight": 600}
    default, low, high = LAGS
    return html.Div([
        html.Label("Asset", htmlFor=ids.INPUTS_ASSET, style=label),
        dcc.Dropdown(id=ids.INPUTS_ASSET, options=[{"label": a, "value": a} for a in assets],
                     value=asset, clearable=False, placeholder="no filtered asset",
                     style={"width": "240px", "marginRight": "18px"}),
        html.Label("ACF lags", htmlFor=ids.INPUTS_LAGS, style=label),
        dcc.Input(id=ids.INPUTS_LAGS, type="number", value=default, min=low, max=high, step=1,
                  debounce=True, style={"width": "70px"}),
    ], style={"display": "flex", "alignItems": "center", "flexWrap": "wrap",
              "margin": "4px 0 8px 0"})
