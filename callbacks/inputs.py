"""Callbacks of the Inputs page: the asset and lags controls redraw the residual
diagnostics."""

from __future__ import annotations

from functools import partial

from dash import Input, Output

from layouts import ids
from layouts.components import table_frame, typed_columns
from layouts.inputs import LAGS
from monitor.common.errors import InputError
from monitor.settings import settings_words
from monitor.views.common import blank_figure
from monitor.views.inputs import (
    acf_figure,
    ljung_box_table,
    marginal_diagnostics,
    parse_lags,
    qq_figure,
    residuals_figure,
)


def show_diagnostics(view, asset: str | None, lags):
    """Outputs of the diagnostics callback: three figures, Ljung-Box rows and columns, note."""
    if not asset:
        blank = blank_figure("no filtered asset", height=160)
        return blank, blank, blank, [], [], "No asset has filtered residuals yet."
    try:
        diag = marginal_diagnostics(view.store, view.marginal_key, asset,
                                    lags=parse_lags(lags, LAGS[1], LAGS[2]))
    except InputError as exc:
        blank = blank_figure(str(exc), height=160)
        return blank, blank, blank, [], [], str(exc)
    tests = ljung_box_table(diag)
    data, columns = table_frame(tests).to_dict("records"), typed_columns(tests)
    fit = diag.latest
    params = ", ".join(f"{k} = {v:.4g}" for k, v in fit.params.items())
    note = (f"{asset}: {len(diag.residuals)} filtered days; "
            f"{settings_words(diag.settings_key)}; latest refit {fit.spec.label} on data to "
            f"{fit.sample_end} ({params}; percent scale)"
            + (f", EWMA-t fallback: {'; '.join(fit.problems)}" if fit.fallback else "") + ".")
    return (residuals_figure(diag), acf_figure(diag), qq_figure(diag), data, columns, note)


def register(app, view) -> None:
    """Attach this page's callbacks to app."""

    @app.callback(Output(ids.INPUTS_RESIDUALS, "figure"), Output(ids.INPUTS_ACF, "figure"),
                  Output(ids.INPUTS_QQ, "figure"), Output(ids.INPUTS_LJUNG_BOX, "data"),
                  Output(ids.INPUTS_LJUNG_BOX, "columns"), Output(ids.INPUTS_NOTE, "children"),
                  Input(ids.INPUTS_ASSET, "value"), Input(ids.INPUTS_LAGS, "value"))
    def diagnostics(asset, lags):
        return app.responses("inputs", partial(show_diagnostics, view), asset, lags)
