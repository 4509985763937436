"""The nonparametric tail figures C_n(q,q)/q are finite-level quantities, not the limit lambda:
every place that shows them says so and shows what an independent pair gives at the same q
(q itself: C(q, q) = q^2 for the independence copula, Nelsen 2006, section 2.2, so
C(q, q)/q = q).

A tail with no dependence therefore reads about q, not 0: the check below draws independent
pairs and finds C_n(q,q)/q near q (binomial sampling error only).
"""

from __future__ import annotations

import html

import numpy as np
import pytest

from callbacks.board import show_board
from callbacks.timeline import show_pair
from layouts.drilldown import results
from monitor.alerts.rules import compose_pair
from monitor.common.wording import finite_level_note
from monitor.stats.empirical import pseudo_observations, tail_dependence
from monitor.views.drilldown import study_pair, tail_figure, tail_table
from monitor.views.report import report_html
from monitor.views.timeline import pair_history, timeline_figure

from .plotted import as_figure
from .tree import text


def test_an_independent_pair_reads_q_not_zero():
    rng = np.random.default_rng(11)
    q, n = 0.1, 250
    values = []
    for _ in range(400):
        x = rng.standard_normal((n, 2))
        u, v = pseudo_observations(x[:, 0]), pseudo_observations(x[:, 1])
        values.append(float(tail_dependence(u, v, q).lower))
    # E C_n(q,q)/q = q for independent margins; the s.e. of one window is sqrt(q(1-q)/n)/1,
    # about 0.019 at n = 250, so the mean of 400 windows is within 4 s.e. / 20 of q.
    assert np.mean(values) == pytest.approx(q, abs=4 * np.sqrt(q * (1 - q) / n) / 20)


@pytest.fixture(scope="module")
def pair(view):
    return min(view.store.stored_pairs(view.rolling_key))


def test_board_and_timeline_say_it_and_show_q(view, pair):
    q = view.rolling.tail_q
    note = finite_level_note(q)
    assert f"an independent pair gives q = {q:g}" in note
    out = show_board(view, None, "nonparametric")
    assert note in out[-4]  # the board's note
    cells = as_figure(out[1]).data[0].text  # the lower tail matrix's hover lines
    assert any(f"independent pair {q:g}" in str(c) for row in cells for c in row if c)
    history = pair_history(view, *pair)
    fig = as_figure(timeline_figure(history))
    lines = [t for t in fig.data if t.name == f"independent pair (= q = {q:g})"]
    assert len(lines) == 2 and all(list(t.y) == [q, q] for t in lines)
    assert "(finite level)" in fig.layout.annotations[1].text
    assert note in show_pair(view, f"{pair[0]}/{pair[1]}")[1]


def test_drilldown_report_and_email_say_it_and_show_q(view, pair):
    q = view.rolling.tail_q
    timeline = view.store.read_timeline(view.rolling_key, *pair)
    last = timeline.iloc[-1]
    study = study_pair(view, pair[0], pair[1], last["start"], last["date"], reference="none",
                       replicates=0)
    res = study.study
    assert list(tail_table(res)["independent pair at q"]) == [q, q]
    line = [t for t in tail_figure(study, res).data if t.name == "independent pair (= q)"]
    assert len(line) == 2 and np.allclose(line[0].x, line[0].y)
    assert finite_level_note(q) in html.unescape(report_html(study))
    _, plain, body = compose_pair(view.cfg, *pair, "lower", timeline, len(timeline) - 1, "test")
    assert finite_level_note(q) in plain and "finite-level" in body
    assert "finite-level" in text(results(study))
