"""The Drill-down page: one window of a pair studied in depth, beside a calm reference window.

``layout(view, query)`` builds the controls (prefilled from ``?pair=A/B&start=YYYY-MM-DD&
end=YYYY-MM-DD``, optionally ``&ref_start=…&ref_end=…``, as the Timeline page links here);
``results(study)`` turns a :class:`monitor.views.drilldown.PairStudy` into the two result columns.
"""

from __future__ import annotations

from itertools import combinations

from dash import dcc, html

from monitor.common.errors import InputError
from monitor.common.palette import MUTED, VERMILION
from monitor.common.wording import finite_level_note
from monitor.views.common import parse_date, parse_pair
from monitor.views.drilldown import (
    REPLICATE_CHOICES,
    PairStudy,
    WindowResult,
    candidate_table,
    crash_figure,
    crash_table,
    provenance_line,
    scatter_figure,
    summary_table,
    tail_figure,
    tail_table,
)

from . import ids
from .components import graph, message, panel, table
from .theme import NOTE_STYLE

TITLE = "Drill-down"

#: Default bootstrap size of the page.
DEFAULT_REPLICATES = 200
HIDDEN = {"visibility": "hidden", "display": "flex", "gap": "8px", "alignItems": "center"}
VISIBLE = {**HIDDEN, "visibility": "visible"}
_LABEL = {"fontWeight": 600, "fontSize": "0.85rem", "display": "block", "marginBottom": "2px"}
_FIELD = {"marginRight": "22px", "marginBottom": "8px"}
_BUTTON = {"padding": "6px 14px", "marginRight": "8px", "cursor": "pointer"}


def pair_options(view) -> list[dict]:
    """Dropdown options ``{"label": "A / B", "value": "A/B"}``: the pairs with stored rolling
    results, or every pair of stored assets when none has been rolled yet."""
    pairs = view.store.monitored_pairs(view.rolling_key)
    if not pairs:
        pairs = list(combinations(view.store.assets(), 2))
    return [{"label": f"{a} / {b}", "value": f"{a}/{b}"} for a, b in pairs]


def _latest_window(view, value: str | None) -> tuple[str | None, str | None]:
    """The pair's last stored rolling window (a sensible default range)."""
    if not value:
        return None, None
    a, b = parse_pair(value)
    for x, y in ((a, b), (b, a)):
        window = view.store.last_window(view.rolling_key, x, y)
        if window is not None:
            return window[0].strftime("%Y-%m-%d"), window[1].strftime("%Y-%m-%d")
    return None, None


def _from_query(view, query: dict[str, str], options: list[dict]):
    """(pair, start, end, ref_start, ref_end, autorun, problems) from the URL query."""
    problems = []
    values = {o["value"] for o in options}
    pair = options[0]["value"] if options else None
    text = query.get("pair")
    if text is not None:
        try:
            a, b = parse_pair(text)
        except InputError as exc:
            problems.append(f"link: {exc}")
        else:
            if f"{a}/{b}" in values:
                pair = f"{a}/{b}"
            elif f"{b}/{a}" in values:
                pair = f"{b}/{a}"  # the stored order; the dropdown shows it
            else:
                problems.append(f"link: pair {text!r} is not a stored pair; choose one")
                pair = None
    dates = {}
    for key in ("start", "end", "ref_start", "ref_end"):
        if query.get(key):
            try:
                dates[key] = parse_date(query[key], f"link: {key}").strftime("%Y-%m-%d")
            except InputError as exc:
                problems.append(str(exc))
    start, end = dates.get("start"), dates.get("end")
    ref_start, ref_end = dates.get("ref_start"), dates.get("ref_end")
    if start is None and end is None and pair is not None:
        start, end = _latest_window(view, pair)
    autorun = bool(pair and "start" in dates and "end" in dates and not problems)
    return pair, start, end, ref_start, ref_end, autorun, problems


def _field(label: str, control, **style) -> html.Div:
    return html.Div([html.Label(label, style=_LABEL), control], style={**_FIELD, **style})


def layout(view, query: dict[str, str]) -> html.Div:
    """The page: controls, progress, the message line, the results area."""
    options = pair_options(view)
    pair, start, end, ref_start, ref_end, autorun, problems = _from_query(view, query, options)
    mode = "range" if ref_start and ref_end else "calmest"
    controls = panel(
        "Window to study",
        html.Div([
            _field("Pair", dcc.Dropdown(id=ids.STUDY_PAIR, options=options, value=pair,
                                        clearable=False, placeholder="choose a pair"),
                   minWidth="200px"),
            _field("Study window (first and last date)", dcc.DatePickerRange(
                id=ids.STUDY_RANGE, start_date=start, end_date=end,
                display_format="YYYY-MM-DD", minimum_nights=0, clearable=True)),
            _field("Reference window", html.Div([
                dcc.RadioItems(id=ids.STUDY_REFERENCE_MODE, value=mode, options=[
                    {"label": " calmest stored window", "value": "calmest"},
                    {"label": " these dates:", "value": "range"},
                    {"label": " none", "value": "none"}],
                    inline=True, inputStyle={"marginLeft": "10px"}),
                dcc.DatePickerRange(id=ids.STUDY_REFERENCE, start_date=ref_start,
                                    end_date=ref_end, display_format="YYYY-MM-DD",
                                    minimum_nights=0, clearable=True)])),
            _field("Bootstrap replicates per candidate", dcc.RadioItems(
                id=ids.STUDY_REPLICATES, value=DEFAULT_REPLICATES, inline=True,
                options=[{"label": f" {r}", "value": r} for r in REPLICATE_CHOICES],
                inputStyle={"marginLeft": "10px"})),
        ], style={"display": "flex", "flexWrap": "wrap", "alignItems": "flex-end"}),
        html.Div([
            html.Button("Run study", id=ids.STUDY_RUN, n_clicks=0, style=_BUTTON),
            html.Button("Cancel", id=ids.STUDY_CANCEL, n_clicks=0, disabled=True,
                        style=_BUTTON),
            html.Button("Download report (HTML)", id=ids.STUDY_REPORT, n_clicks=0,
                        disabled=True, style=_BUTTON),
            dcc.Download(id=ids.STUDY_REPORT_DOWNLOAD),
            html.Div([html.Progress(id=ids.STUDY_PROGRESS, value="0", max="1",
                                    style={"width": "220px"}),
                      html.Span(id=ids.STUDY_PROGRESS_LABEL, style=NOTE_STYLE)],
                     id=ids.STUDY_PROGRESS_BOX, style=HIDDEN),
        ], style={"display": "flex", "alignItems": "center", "flexWrap": "wrap",
                  "marginTop": "6px"}),
        note=("Refits every candidate copula on the pair's stored filtered residuals in the "
              "window, tests each with a bootstrap goodness-of-fit test, and compares joint-"
              "crash probabilities with a Gaussian copula of the same Kendall's tau; the same "
              "for a calm reference window beside it."))
    first = (message("; ".join(problems), kind="problem") if problems else
             message("Choose a pair and a window, then Run study." if not autorun
                     else "Starting the study of the linked window…"))
    return html.Div([
        html.H2("Drill-down: one window of a pair against a calm one",
                style={"fontSize": "1.3rem", "margin": "4px 0 10px 0"}),
        controls,
        html.Div(first, id=ids.STUDY_MESSAGE),
        html.Div(id=ids.STUDY_RESULT),
        dcc.Store(id=ids.STUDY_STORE),
        dcc.Store(id=ids.STUDY_AUTORUN, data=autorun),
    ])


# ----------------------------------------------------------------------------- results
def _id(kind: str, role: str, name: str) -> dict:
    return {"type": kind, "role": role, "name": name}


def _slug(study: PairStudy, role: str, name: str) -> str:
    a, b = study.pair
    w = (study.study if role == "study" else study.reference).window
    return f"comove-{a}-{b}-{role}-{w.start.date()}-{w.end.date()}-{name}"


def _key_numbers(res: WindowResult) -> html.Ul:
    w = res.window
    kt = w.kendall_tau
    sel = res.selected
    unc = w.uncertainty
    items = [
        (f"Kendall's tau {kt.estimate:.3f} (95% interval {kt.lower:.3f} to {kt.upper:.3f}, "
        "influence function); Spearman's rho "
        f"{w.spearman_rho:.3f}"),
        f"selected {sel.label} by {w.selection.criterion.upper()}"
        + ("" if sel.converged else " — did not converge"),
    ]
    if unc is not None:
        q = unc.quantities
        items.append(
            f"bootstrap {int(100 * unc.level)}% intervals ({unc.replicates} refits"
            f"{f', {unc.failed} failed' if unc.failed else ''}): tau "
            f"{q['kendall_tau'].lower:.3f} to {q['kendall_tau'].upper:.3f}, tail lower "
            f"{q['tail_lower'].lower:.3f} to {q['tail_lower'].upper:.3f}, tail upper "
            f"{q['tail_upper'].lower:.3f} to {q['tail_upper'].upper:.3f}")
    else:
        items.append("no bootstrap (replicates 0): no goodness-of-fit p-values or intervals "
                     "of the selected family")
    if w.dropped:
        items.append(f"{w.dropped} date(s) in the range had only one of the two assets and "
                     "were left out")
    return html.Ul([html.Li(t) for t in items], style={"margin": "4px 0", "paddingLeft": "18px",
                                                       "fontSize": "0.9rem"})


#: Crash-table columns hidden at first (the figure beside the table draws them).
CRASH_SECONDARY = ("independence q² %", "lower bound max(2q-1,0) %", "upper bound q %")

_CANDIDATE_STYLE = [
    {"if": {"filter_query": '{selected} = "yes"'}, "fontWeight": 700,
     "backgroundColor": "#EAF3FA"},
    {"if": {"filter_query": '{converged} = "no"'}, "color": VERMILION},
]


def _column(study: PairStudy, res: WindowResult) -> html.Div:
    role = res.role
    w = res.window
    heading = "Study window" if role == "study" else "Reference window"
    chosen = ([html.P(f"Reference chosen by: {study.reference_rule}.", style=NOTE_STYLE)]
              if role == "reference" else [])
    return html.Div([
        panel(f"{heading}: {w.start.date()} to {w.end.date()} (n = {w.n})",
              *chosen, _key_numbers(res), note=provenance_line(study, res)),
        panel("Every candidate copula",
              table(_id(ids.STUDY_TABLE_TYPE, role, "candidates"), candidate_table(res),
                    page_size=20, style_data_conditional=_CANDIDATE_STYLE,
                    secondary=("loglik", "BIC" if res.window.selection.criterion == "aic"
                               else "AIC")),
              note="Best first by the criterion; bold: selected; red: did not converge "
                   "(kept as estimated). GoF p: Cramér–von Mises, parametric bootstrap."),
        panel("Joint-crash probability",
              table(_id(ids.STUDY_TABLE_TYPE, role, "crash"), crash_table(res),
                    secondary=CRASH_SECONDARY),
              graph(_id(ids.STUDY_FIGURE_TYPE, role, "crash"), crash_figure(study, res),
                    filename=_slug(study, role, "crash")),
              note=(f"P(both at or below their q-quantile). Gaussian with the selected "
                    f"copula's tau {res.gaussian_tau:.3f} (rho {res.gaussian_rho:.3f}); "
                    "Fréchet–Hoeffding bounds max(2q−1, 0) and q; empirical with a Wilson "
                    "95% interval, cut at q where it would pass it (no copula puts more than q "
                    "on both assets being below their q-quantile).")),
        panel("Tail dependence, empirical against model",
              table(_id(ids.STUDY_TABLE_TYPE, role, "tails"), tail_table(res)),
              graph(_id(ids.STUDY_FIGURE_TYPE, role, "tails"), tail_figure(study, res),
                    filename=_slug(study, role, "tails")),
              note=f"{finite_level_note(res.window.tail_q)} The band is a pointwise "
                   "binomial (Wilson) 95% band of the empirical curve, kept inside [0, 1]; "
                   "the dotted line is the independent pair's q."),
        panel("Pseudo-observations",
              graph(_id(ids.STUDY_FIGURE_TYPE, role, "scatter"), scatter_figure(study, res),
                    filename=_slug(study, role, "scatter")),
              note="Normal scores of the ranks; solid: fitted log-density contours, dashed: "
                   "Gaussian with the same tau at the same levels; black: days with both "
                   "below their 5% quantile."),
    ], style={"minWidth": 0})


def results(study: PairStudy) -> html.Div:
    """The study and its reference side by side, after a summary of both."""
    boot = (f"{study.replicates} bootstrap replicates per candidate (seed {study.seed})"
            if study.replicates else "no bootstrap")
    head = panel(
        "Both windows at a glance",
        table(_id(ids.STUDY_TABLE_TYPE, "both", "summary"), summary_table(study),
              page_size=30),
        html.P(f"Reference chosen by: {study.reference_rule}. {boot}. Columns: stored "
               f"{study.marginal_mode} GARCH-filtered residuals ranked within each window. "
               f"Computed in {study.seconds:.1f} s."
               + ("".join(f" Note: {n}." for n in study.notes)),
               style={**NOTE_STYLE, "color": MUTED}))
    columns = [_column(study, res) for res in study.windows]
    grid = {"display": "grid", "gap": "14px",
            "gridTemplateColumns": "1fr 1fr" if len(columns) == 2 else "1fr"}
    return html.Div([head, html.Div(columns, style=grid)])
