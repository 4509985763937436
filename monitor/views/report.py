"""The window study as one self-contained HTML file.

Everything is inside the file: plotly.js is embedded once (with the first figure), the styles
are inline, and there are no links, fonts or images from elsewhere, so the report opens
offline and can be archived or mailed as it is.
"""

from __future__ import annotations

import datetime as dt
import html
import re

import pandas as pd

from monitor.common.palette import FONT, GROUND, INK, MUTED, PANEL, RULE, VERMILION
from monitor.common.wording import CAUTION, finite_level_note
from monitor.settings import settings_words
from monitor.views.drilldown import (
    PairStudy,
    WindowResult,
    candidate_table,
    crash_figure,
    crash_table,
    provenance_line,
    scatter_figure,
    summary_table,
    tail_figure,
)
from monitor.views.drilldown import tail_table as tail_dependence_table

_STYLE = f"""
body {{ font-family: {FONT}; color: {INK}; background: {GROUND}; margin: 0; padding: 18px 28px; }}
h1 {{ font-size: 1.5rem; margin: 0 0 6px 0; }}
h2 {{ font-size: 1.2rem; margin: 22px 0 8px 0; }}
h3 {{ font-size: 1.0rem; margin: 14px 0 6px 0; }}
section {{ background: {PANEL}; border: 1px solid {RULE}; border-radius: 6px;
          padding: 12px 16px; margin-bottom: 14px; }}
p.note {{ color: {MUTED}; font-size: 0.85rem; margin: 4px 0; }}
p.caution {{ font-weight: 600; color: {MUTED}; }}
table {{ border-collapse: collapse; font-size: 0.85rem; margin: 6px 0; }}
th {{ background: {GROUND}; text-align: left; border-bottom: 2px solid {RULE};
      padding: 4px 8px; }}
td {{ border-bottom: 1px solid {RULE}; padding: 3px 8px; text-align: right; }}
td.text {{ text-align: left; }}
tr.selected td {{ font-weight: 700; background: #EAF3FA; }}
tr.flagged td {{ color: {VERMILION}; }}
"""


def _cell(value) -> tuple[str, bool]:
    if value is None or (isinstance(value, float) and pd.isna(value)):
        return "–", False
    if isinstance(value, float):
        return f"{value:.6g}", False
    if isinstance(value, int):
        return str(value), False
    return html.escape(str(value)), True


def html_table(frame: pd.DataFrame, *, selected: pd.Series | None = None,
               flagged: pd.Series | None = None) -> str:
    """An HTML table of ``frame`` (escaped); rows where ``selected`` is true are highlighted,
    rows where ``flagged`` is true are marked (e.g. fits that did not converge)."""
    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in frame.columns)
    rows = []
    for i, (_, row) in enumerate(frame.iterrows()):
        classes = []
        if selected is not None and bool(selected.iloc[i]):
            classes.append("selected")
        if flagged is not None and bool(flagged.iloc[i]):
            classes.append("flagged")
        cells = []
        for value in row:
            text, is_text = _cell(value)
            cells.append(f"<td class=\"text\">{text}</td>" if is_text else f"<td>{text}</td>")
        attr = f" class=\"{' '.join(classes)}\"" if classes else ""
        rows.append(f"<tr{attr}>{''.join(cells)}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>"


def provenance_table(study: PairStudy) -> pd.DataFrame:
    """What produced the report's numbers, one row per item."""
    a, b = study.pair
    rows = [("pair", f"{a} / {b}")]
    for res in study.windows:
        w = res.window
        rows.append((f"{res.role} window", (f"{w.start.date()} to {w.end.date()} "
                                           f"(n = {w.n} common dates)")))
    rows += [
        ("reference chosen by", study.reference_rule),
        ("columns", (f"stored standardised residuals of the GARCH-type marginal model, "
                    f"{study.marginal_mode} mode ({settings_words(study.marginal_key)}), "
                    "ranked within "
                    "each window into pseudo-observations R/(n+1)")),
        ("candidate families", ", ".join(study.families)),
        ("selection criterion", study.criterion.upper()),
        ("bootstrap", (f"{study.replicates} parametric-bootstrap replicates per candidate "
                       f"with re-ranking, seed {study.seed}") if study.replicates
         else "none (no goodness-of-fit p-values or bootstrap intervals)"),
        ("Kendall's tau interval", "asymptotic, from the influence function"),
    ]
    rows += [("note", n) for n in study.notes]
    return pd.DataFrame(rows, columns=["item", "value"])


def _figure_html(fig, first: bool) -> str:
    # include_plotlyjs=True embeds the whole plotly.js bundle in a script element (no URL);
    # later figures reuse it.
    return fig.to_html(full_html=False, include_plotlyjs=bool(first),
                       config={"displaylogo": False, "responsive": True})


def _window_section(study: PairStudy, res: WindowResult, first_figure: bool) -> str:
    cands = candidate_table(res)
    w = res.window
    unc = w.uncertainty
    parts = [(f"<section><h2>{html.escape(res.role.capitalize())} window: "
             f"{w.start.date()} to {w.end.date()}</h2>"),
             f"<p class=\"note\">{html.escape(provenance_line(study, res))}</p>",
             "<h3>Every candidate copula</h3>",
             ("<p class=\"note\">Sorted by the criterion; the selected row is bold; fits that "
             "did not converge are marked in colour (their numbers are kept, never replaced). "
             "GoF p: Cramér–von Mises test with a parametric-bootstrap p-value.</p>"),
             html_table(cands, selected=cands["selected"] == "yes",
                        flagged=cands["converged"] == "no"),
             "<h3>Joint-crash probability</h3>",
             ("<p class=\"note\">P(both at or below their own q-quantile on the same day); the "
             "Gaussian copula has the selected copula's Kendall's tau "
             f"({res.gaussian_tau:.3f}, rho = {res.gaussian_rho:.3f}); bounds: "
             "Fréchet–Hoeffding.</p>"),
             html_table(crash_table(res)),
             "<h3>Tail dependence, empirical against model</h3>",
             f"<p class=\"note\">{html.escape(finite_level_note(res.window.tail_q))}</p>",
             html_table(tail_dependence_table(res))]
    if unc is not None:
        frame = pd.DataFrame([
            {"quantity": k, "estimate": q.estimate, "std. error": q.std_error,
             "lower": q.lower, "upper": q.upper} for k, q in unc.quantities.items()])
        parts += [(f"<h3>Intervals of the selected family ({int(100 * unc.level)}%, "
                  f"{html.escape(unc.method)}, {unc.replicates} refits, {unc.failed} "
                  "failed)</h3>"), f"<p class=\"note\">{html.escape(unc.caveat)}</p>",
                  html_table(frame)]
    figures = [scatter_figure(study, res), tail_figure(study, res), crash_figure(study, res)]
    for i, fig in enumerate(figures):
        parts.append(_figure_html(fig, first_figure and i == 0))
    parts.append("</section>")
    return "\n".join(parts)


def report_html(study: PairStudy, *, generated: dt.datetime | None = None) -> str:
    """The window study of a pair as one self-contained HTML document.

    Parameters
    ----------
    study : PairStudy
        From :func:`monitor.views.drilldown.study_pair`.
    generated : datetime, optional
        Time stamp printed in the report (default: now, UTC).

    Returns
    -------
    str
        The document: provenance, the two windows side by side, then per window the
        candidate table, joint-crash probabilities, tail dependence, intervals and figures;
        plotly.js embedded once; the cautions.
    """
    stamp = (generated or dt.datetime.now(dt.UTC)).strftime("%Y-%m-%d %H:%M UTC")
    a, b = study.pair
    title = f"Window study {a} / {b}"
    body = [
        f"<h1>{html.escape(title)}</h1>",
        (f"<p class=\"note\">comove report generated {stamp}; figures are interactive "
        "(hover for values) and work offline.</p>"),
        f"<p class=\"caution\">{html.escape(CAUTION)}</p>",
        "<section><h2>Provenance</h2>", html_table(provenance_table(study)), "</section>",
        "<section><h2>Study and reference side by side</h2>",
        html_table(summary_table(study)), "</section>",
    ]
    for i, res in enumerate(study.windows):
        body.append(_window_section(study, res, first_figure=i == 0))
    body.append(f"<p class=\"caution\">{html.escape(CAUTION)}</p>")
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{html.escape(title)}</title><style>{_STYLE}</style></head>\n<body>\n"
            + "\n".join(body) + "\n</body></html>\n")


def report_filename(study: PairStudy) -> str:
    """A file name for the report: pair and study window, safe on every file system."""
    a, b = study.pair
    w = study.study.window
    raw = f"comove-study-{a}-{b}-{w.start.date()}-{w.end.date()}.html"
    return re.sub(r"[^A-Za-z0-9._-]+", "_", raw)
