"""The window study's HTML report: self-contained (plotly.js embedded once, no external
address), with the provenance, every candidate, the cautions, and numbers that match the study.

The study is computed for real on invented data (the ``tail-shift`` scenario: a Gaussian
copula, then a Clayton copula with the same Kendall's tau), ranked log returns of two assets.
"""

from __future__ import annotations

import datetime as dt
import html
import re

import numpy as np
import pandas as pd
import pytest

from monitor.common.wording import CAUTION
from monitor.engine.window_study import study_window
from monitor.views.drilldown import PairStudy, window_result
from monitor.views.report import html_table, report_filename, report_html
from synthetic_feeds import generate


@pytest.fixture(scope="module")
def study() -> PairStudy:
    scen = generate("tail-shift", seed=5, calm_years=1.0, shifted_years=1.0, n_assets=2)
    a, b = scen.prices.columns[:2]
    returns = np.log(scen.prices).diff().iloc[1:]
    change = pd.Timestamp(scen.truth["change_points"][0])
    dates = returns[[a, b]].dropna().index
    calm = dates[dates < change]
    shifted = dates[dates >= change]
    out = []
    for role, days, seed in (("study", shifted, 1), ("reference", calm, 2)):
        lo, hi = days[0].strftime("%Y-%m-%d"), days[-1].strftime("%Y-%m-%d")
        w = study_window(returns, a, b, kind="returns", start=lo, end=hi, bootstrap=20,
                         rng=seed, filter_info={"mode": "none"})
        inside = returns[[a, b]].dropna().loc[lo:hi].index
        out.append(window_result(w, inside, role))
    return PairStudy(pair=(a, b), study=out[0], reference=out[1],
                     reference_rule="the range chosen by the user", marginal_mode="in-sample",
                     marginal_key="in-sample/min250/all8/v2", criterion="aic", families=("all",),
                     replicates=20, seed=0, seconds=1.0, notes=("invented data",))


@pytest.fixture(scope="module")
def document(study) -> str:
    return report_html(study, generated=dt.datetime(2026, 12, 1, 9, 30, tzinfo=dt.UTC))


def _outside_scripts(text: str) -> str:
    return re.sub(r"<script\b[^>]*>.*?</script>", "<script></script>", text, flags=re.DOTALL)


def test_report_is_self_contained_with_plotly_embedded_once(document):
    assert document.startswith("<!DOCTYPE html>") and document.rstrip().endswith("</html>")
    # No element loads anything from elsewhere: no src or href attribute at all outside
    # the embedded scripts, no <link>, <img>, <iframe> or @import.
    markup = _outside_scripts(document)
    assert not re.search(r"\b(src|href)\s*=", markup, flags=re.IGNORECASE)
    assert not re.search(r"<(link|img|iframe)\b|@import|url\(", markup, flags=re.IGNORECASE)
    # Every script element is inline (none has a src).
    scripts = re.findall(r"<script\b([^>]*)>", document)
    assert scripts and all("src" not in attrs for attrs in scripts)
    # plotly.js itself appears exactly once (its banner comment), and six figures use it.
    assert document.count("plotly.js v") == 1
    assert document.count("Plotly.newPlot(") == 6


def test_report_carries_provenance_cautions_and_every_candidate(study, document):
    text = html.unescape(document)
    assert CAUTION in text
    a, b = study.pair
    assert f"Window study {a} / {b}" in text
    for res in study.windows:
        w = res.window
        assert f"{w.start.date()} to {w.end.date()} (n = {w.n} common dates)" in text
        # One row per candidate slot (14 with every family) in each window's table.
        assert len(w.selection.fits) == 14
    marked = re.findall(r'<tr class="selected( flagged)?">', text)
    assert len(marked) == 2
    assert "20 parametric-bootstrap replicates per candidate with re-ranking, seed 0" in text
    # issue 12: the settings in words, never the stored key
    assert ("in-sample mode (marginals: GARCH-type filter, in-sample mode (one fit on all "
            "data, at least 250 observations), BIC choice among the 8 standard "
            "specifications)") in text
    assert "in-sample/min250" not in text
    assert "selection criterion</td><td class=\"text\">AIC" in text
    assert "2026-12-01 09:30 UTC" in text
    assert "invented data" in text


def test_report_numbers_match_the_study(study, document):
    text = html.unescape(document)
    for res in study.windows:
        sel = res.selected
        crash = res.crash[0]
        # The crash table prints fitted and Gaussian C(q, q) in percent with 6 significant
        # digits of the rounded value.
        assert f"{round(100 * crash.fitted, 4):.6g}" in text
        assert f"{round(100 * crash.gaussian, 4):.6g}" in text
        assert f"{sel.label}: " in text
        g = res.window.gof[sel.label]
        assert f"{g.p_value:.3f}" in text


def test_html_table_escapes_and_marks_rows():
    frame = pd.DataFrame({"name": ["<b>x</b>", "y"], "value": [1.5, float("nan")]})
    out = html_table(frame, selected=pd.Series([True, False]), flagged=pd.Series([False, True]))
    assert "&lt;b&gt;x&lt;/b&gt;" in out and "<b>x</b>" not in out
    assert "<tr class=\"selected\">" in out and "<tr class=\"flagged\">" in out
    assert "<td>–</td>" in out  # NaN shown as a dash


def test_report_filename_is_safe(study):
    name = report_filename(study)
    assert name.endswith(".html") and re.fullmatch(r"[A-Za-z0-9._-]+", name)
    assert study.study.window.start.strftime("%Y-%m-%d") in name
