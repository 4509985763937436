"""Callbacks of the Drill-down page: run the window study in the background with a progress
bar and a cancel button, and download it as a self-contained HTML report.

The work is in plain functions (:func:`run_study`, :func:`download_report`) that take the view
explicitly, so they can be called without Dash; :func:`register` only wires them.
"""

from __future__ import annotations

import os

from dash import Input, Output, State, dcc, no_update

from layouts import ids
from layouts.components import message
from layouts.drilldown import HIDDEN, VISIBLE, results
from monitor.common.errors import InputError
from monitor.views.common import parse_pair
from monitor.views.drilldown import PairStudy, study_pair
from monitor.views.report import report_filename, report_html


def _reference(mode: str | None, start, end):
    if mode in (None, "calmest"):
        return "calmest"
    if mode == "none":
        return "none"
    if mode == "range":
        if not start or not end:
            raise InputError("reference window: choose its first and last date, or choose "
                             "'calmest stored window'")
        return (start, end)
    raise InputError(f"reference: unknown choice {mode!r}")


def _replicates(value) -> int:
    try:
        out = int(value)
    except (TypeError, ValueError):
        raise InputError(f"replicates: expected a whole number, got {value!r}") from None
    if out != value and str(out) != str(value):
        raise InputError(f"replicates: expected a whole number, got {value!r}")
    return out


def run_study(view, n_clicks, pair, start, end, reference_mode, ref_start, ref_end,
              replicates, set_progress=None):
    """Outputs of the Run button: (results, stored study, message, report button disabled).

    ``set_progress`` receives ``(done, total, text)`` tuples while the study runs (Dash's
    progress setter of a background callback).
    """
    if not n_clicks:
        return no_update, no_update, no_update, no_update

    def progress(done, total, text):
        if set_progress is not None:
            set_progress((str(done), str(total), text))

    try:
        a, b = parse_pair(pair)
        if not start or not end:
            raise InputError("study window: choose its first and last date")
        study = study_pair(view, a, b, start, end,
                           reference=_reference(reference_mode, ref_start, ref_end),
                           replicates=_replicates(replicates), progress=progress)
    except InputError as exc:
        return [], None, message(str(exc), kind="problem"), True
    w = study.study.window
    done = (f"Studied {a} / {b} from {w.start.date()} to {w.end.date()} (n = {w.n})"
            + ("" if study.reference is None else " and its reference window")
            + f" in {study.seconds:.1f} s.")
    return results(study), study.to_dict(), message(done), False


def download_report(n_clicks, data):
    """Output of the report button: the HTML report of the stored study, for dcc.Download."""
    if not n_clicks or not data:
        return no_update
    study = PairStudy.from_dict(data)
    return dcc.send_string(report_html(study), report_filename(study), type="text/html")


def autorun(flag, clicks):
    """A link with a pair and a window (from the Timeline page) starts the study once."""
    return (clicks or 0) + 1 if flag else no_update


def register(app, view) -> None:
    """Attach this page's callbacks to ``app``."""
    parent = os.getpid()

    app.callback(Output(ids.STUDY_RUN, "n_clicks"), Input(ids.STUDY_AUTORUN, "data"),
                 State(ids.STUDY_RUN, "n_clicks"))(autorun)

    @app.callback(
        Output(ids.STUDY_RESULT, "children"), Output(ids.STUDY_STORE, "data"),
        Output(ids.STUDY_MESSAGE, "children"), Output(ids.STUDY_REPORT, "disabled"),
        Input(ids.STUDY_RUN, "n_clicks"),
        State(ids.STUDY_PAIR, "value"),
        State(ids.STUDY_RANGE, "start_date"), State(ids.STUDY_RANGE, "end_date"),
        State(ids.STUDY_REFERENCE_MODE, "value"),
        State(ids.STUDY_REFERENCE, "start_date"), State(ids.STUDY_REFERENCE, "end_date"),
        State(ids.STUDY_REPLICATES, "value"),
        background=True,
        progress=[Output(ids.STUDY_PROGRESS, "value"), Output(ids.STUDY_PROGRESS, "max"),
                  Output(ids.STUDY_PROGRESS_LABEL, "children")],
        running=[(Output(ids.STUDY_RUN, "disabled"), True, False),
                 (Output(ids.STUDY_CANCEL, "disabled"), False, True),
                 (Output(ids.STUDY_PROGRESS_BOX, "style"), VISIBLE, HIDDEN)],
        cancel=[Input(ids.STUDY_CANCEL, "n_clicks")],
        prevent_initial_call=True)
    def run(set_progress, n_clicks, pair, start, end, mode, ref_start, ref_end, replicates):
        if os.getpid() != parent:
            # A forked worker must not share the parent's pooled database connections
            # (SQLAlchemy's advice for multiprocessing: a fresh pool in the child).
            view.store.engine.dispose(close=False)
        return run_study(view, n_clicks, pair, start, end, mode, ref_start, ref_end,
                         replicates, set_progress)

    app.callback(Output(ids.STUDY_REPORT_DOWNLOAD, "data"), Input(ids.STUDY_REPORT, "n_clicks"),
                 State(ids.STUDY_STORE, "data"), prevent_initial_call=True)(download_report)
