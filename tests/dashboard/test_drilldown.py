"""The Drill-down page and its library: joint-crash probabilities and tail curves against
closed forms and scipy, the study of a stored pair, input checks, and the callbacks called as
plain functions (the background one with a simple progress collector)."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import plotly
import pytest
from dash import no_update
from scipy import stats
from statsmodels.stats.proportion import proportion_confint

from callbacks.app import create_app
from callbacks.drilldown import autorun, download_report, run_study
from layouts import ids
from layouts.drilldown import layout, results
from monitor.common.errors import InputError
from monitor.data.store import Store
from monitor.stats.copulas import family
from monitor.stats.empirical import pseudo_observations, tail_share_interval, wilson_interval
from monitor.stats.fitting import CopulaFit, fit_batched
from monitor.stats.inference import (
    bootstrap_candidates,
    cramer_von_mises,
    fit_uncertainty,
    goodness_of_fit,
)
from monitor.views.common import parse_pair
from monitor.views.drilldown import (
    PairStudy,
    choose_reference,
    frechet_hoeffding_bounds,
    gaussian_rho_from_tau,
    joint_crash_probabilities,
    study_pair,
    tail_concordance,
    tail_excess,
)

from .tree import find_all, text


def _fit(name: str, params: tuple[float, ...], rotation: int = 0, n: int = 500) -> CopulaFit:
    return CopulaFit.from_estimate(family(name, rotation), params, 0.0, n, True, 0)


def _sample(name, params, n, seed, rotation=0):
    uv = family(name, rotation).sample(n, params, rng=seed)
    return pseudo_observations(uv[:, 0]), pseudo_observations(uv[:, 1])


def _by_id(component, cid):
    found = find_all(component, lambda i: i == cid)
    assert len(found) == 1, cid
    return found[0]


# ----------------------------------------------------------------------------- closed forms
def test_gaussian_crash_probability_matches_scipy_bivariate_normal():
    u, v = _sample("gaussian", (0.5,), 500, seed=1)
    rho = 0.5
    fit = _fit("gaussian", (rho,))
    for c in joint_crash_probabilities(u, v, fit):
        z = stats.norm.ppf(c.q)
        # C(q, q) = Phi_2(Phi^-1(q), Phi^-1(q); rho) (the Gaussian copula's definition), from
        # scipy's Genz integration.
        ref = stats.multivariate_normal.cdf([z, z], mean=[0, 0], cov=[[1, rho], [rho, 1]],
                                            abseps=1e-10, releps=1e-10)
        assert c.fitted == pytest.approx(ref, abs=1e-8)
        # The Gaussian with the same tau is the fitted Gaussian itself: tau = 2/pi arcsin rho.
        assert c.gaussian == pytest.approx(c.fitted, rel=1e-9)
        assert c.ratio == pytest.approx(1.0, rel=1e-9)


def test_clayton_crash_probability_closed_form_and_gaussian_with_the_same_tau():
    theta = 2.0
    u, v = _sample("clayton", (theta,), 500, seed=2)
    fit = _fit("clayton", (theta,))
    tau = theta / (theta + 2)  # Clayton's tau (Nelsen 2006, Example 5.4)
    assert fit.kendall_tau == pytest.approx(tau)
    rho = np.sin(np.pi * tau / 2)
    assert float(gaussian_rho_from_tau(tau)) == pytest.approx(rho)
    for c in joint_crash_probabilities(u, v, fit):
        q = c.q
        # Clayton (1978); Nelsen (2006) eq. 4.2.1: C(u, v) = (u^-theta + v^-theta - 1)^(-1/theta)
        assert c.fitted == pytest.approx((2 * q ** -theta - 1) ** (-1 / theta), rel=1e-10)
        z = stats.norm.ppf(q)
        ref = stats.multivariate_normal.cdf([z, z], mean=[0, 0], cov=[[1, rho], [rho, 1]],
                                            abseps=1e-10, releps=1e-10)
        assert c.gaussian == pytest.approx(ref, abs=1e-8)
        # Lower tail dependence makes joint crashes likelier than the same-tau Gaussian says.
        assert c.ratio > 1.5
        # Frechet-Hoeffding (Nelsen 2006, Thm 2.2.3) on the diagonal, and independence q^2.
        assert c.lower_bound == max(2 * q - 1, 0.0) == 0.0
        assert c.upper_bound == q
        assert c.independence == pytest.approx(q * q)
        assert c.lower_bound <= c.gaussian <= c.fitted <= c.upper_bound


def test_empirical_crash_share_counted_by_hand_with_wilson_interval():
    u, v = _sample("clayton", (1.5,), 400, seed=3)
    fit = _fit("clayton", (1.5,), n=400)
    for c in joint_crash_probabilities(u, v, fit, levels=(0.01, 0.05, 0.2)):
        count = sum(1 for a, b in zip(u, v, strict=True) if a <= c.q and b <= c.q)
        assert c.empirical_count == count
        assert c.empirical == count / 400
        # Wilson (1927) score interval, as statsmodels computes it, cut at q (issue 12:
        # C(q,q) <= q, Nelsen 2006, Theorem 2.2.3)
        lo, hi = proportion_confint(count, 400, alpha=0.05, method="wilson")
        assert (c.empirical_lower, c.empirical_upper) == pytest.approx((lo, min(hi, c.q)),
                                                                       abs=1e-12)


def test_wilson_interval_and_bounds_helpers():
    lo, hi = wilson_interval(np.array([0.0, 0.5]), 50)
    ref = [proportion_confint(k, 50, method="wilson") for k in (0, 25)]
    assert lo == pytest.approx([r[0] for r in ref]) and hi == pytest.approx([r[1] for r in ref])
    w, m = frechet_hoeffding_bounds([0.3, 0.8], [0.9, 0.7])
    assert w == pytest.approx([0.2, 0.5]) and m == pytest.approx([0.3, 0.7])


def test_tail_share_interval_stays_in_zero_to_q_and_is_wilson_inside():
    n, q = 250, 0.1
    counts = np.array([0, 1, 5, 12, 20, 24, 25])  # 25 = q * n: every tail day is a joint one
    lo, hi = tail_share_interval(counts / n, n, q)
    # Wilson (1927) score interval, as statsmodels computes it, cut at q (C(q,q) <= q,
    # Nelsen 2006, Theorem 2.2.3).
    ref_lo, ref_hi = proportion_confint(counts, n, alpha=0.05, method="wilson")
    np.testing.assert_allclose(lo, np.minimum(ref_lo, q), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(hi, np.minimum(ref_hi, q), rtol=1e-12)
    assert lo[0] == pytest.approx(0.0, abs=1e-15) and hi[0] > 0
    assert ref_hi[-1] > q and hi[-1] == q  # the raw Wilson end would pass q
    assert ref_hi[-1] == pytest.approx(0.14345, abs=1e-5)  # by hand from Wilson's formula
    assert np.all((0 <= lo) & (lo <= hi) & (hi <= q))
    assert np.all((0 <= lo / q) & (hi / q <= 1))  # C(q,q)/q in [0, 1]
    with pytest.raises(ValueError, match="q must lie"):
        tail_share_interval(0.1, 10, 0.0)


def test_drilldown_intervals_lie_on_their_scales():
    # A comonotone-ish sample: every lower-tail day of u is one of v, so the share reaches q.
    u = pseudo_observations(np.arange(200.0))
    fit = _fit("clayton", (8.0,), n=200)
    for c in joint_crash_probabilities(u, u, fit, levels=(0.01, 0.05)):
        assert 0 <= c.empirical_lower <= c.empirical_upper <= c.q
        assert c.empirical_upper == c.q  # clipped: raw Wilson would exceed q
    curve = tail_concordance(u, u, fit, "lower")
    assert np.all((curve.empirical_lower >= 0) & (curve.empirical_upper <= 1 + 1e-12))
    assert curve.empirical_upper.max() == pytest.approx(1.0)


def test_tail_curves_against_closed_forms_and_counts():
    theta = 1.5
    u, v = _sample("clayton", (theta,), 600, seed=4)
    lower = tail_concordance(u, v, _fit("clayton", (theta,), n=600), "lower")
    q = np.asarray(lower.q)
    assert lower.model == pytest.approx((2 * q ** -theta - 1) ** (-1 / theta) / q, rel=1e-10)
    # Counted by hand: #{U <= q, V <= q} / (n q).
    counts = np.array([np.sum((u <= x) & (v <= x)) for x in q])
    assert lower.empirical == pytest.approx(counts / (600 * q), abs=1e-12)
    assert np.all(lower.empirical_lower <= lower.empirical + 1e-12)
    assert np.all(lower.empirical <= lower.empirical_upper + 1e-12)
    # The survival Clayton's upper tail equals Clayton's lower tail (radial reflection).
    upper = tail_concordance(u, v, _fit("clayton", (theta,), rotation=180, n=600), "upper")
    assert upper.model == pytest.approx(lower.model, rel=1e-9)
    # As q -> 0 Clayton's C(q, q)/q tends to 2^(-1/theta) (Nelsen 2006, Example 5.22).
    assert lower.model[0] == pytest.approx(2 ** (-1 / theta), abs=0.02)
    # The same-tau Gaussian is radially symmetric: its two curves coincide.
    assert upper.gaussian == pytest.approx(lower.gaussian, rel=1e-9)


# ----------------------------------------------------------------------------- bootstrap
def test_cramer_von_mises_fast_path_matches_a_hand_count():
    # S_n = sum_i (C_n(U_i, V_i) - C_theta(U_i, V_i))^2 (Genest, Remillard & Beaudoin 2009),
    # C_n counted point by point; tie-free ranks take the integer fast path.
    u, v = _sample("clayton", (1.0,), 40, seed=6)
    fit = _fit("clayton", (1.0,), n=40)
    emp = np.array([np.mean((u <= a) & (v <= b)) for a, b in zip(u, v, strict=True)])
    model = family("clayton").cdf(u, v, (1.0,))
    assert cramer_von_mises(u, v, fit) == pytest.approx(np.sum((emp - model) ** 2), rel=1e-12)
    # With ties (the general path) the same formula holds.
    ut = np.round(u * 8) / 9 + 0.05
    emp_t = np.array([np.mean((ut <= a) & (v <= b)) for a, b in zip(ut, v, strict=True)])
    ref = np.sum((emp_t - family("clayton").cdf(ut, v, (1.0,))) ** 2)
    assert cramer_von_mises(ut, v, fit) == pytest.approx(ref, rel=1e-12)


def test_one_bootstrap_per_candidate_gives_the_same_numbers_as_the_separate_functions():
    # bootstrap_candidates draws, re-ranks and refits exactly as goodness_of_fit and
    # fit_uncertainty do; with one candidate and the same seed all three agree exactly, which
    # is what lets the window study take the selected family's intervals from its GoF refits.
    u, v = _sample("gumbel", (1.6,), 200, seed=7)
    fit = fit_batched(family("gumbel"), u, v).window(0)
    both = bootstrap_candidates(u, v, [fit], replicates=40, selected=fit, rng=8)
    gof = goodness_of_fit(u, v, fit, replicates=40, rng=8)
    unc = fit_uncertainty(fit, replicates=40, rng=8)
    assert both.gof[fit.label] == gof
    assert both.uncertainty == unc
    calls = []
    many = bootstrap_candidates(u, v, [fit, _fit("independence", (), n=200)], replicates=20,
                                rng=1, progress=lambda *x: calls.append(x))
    assert [c[:2] for c in calls] == [(1, 2), (2, 2)] and many.uncertainty is None
    assert many.gof["independence"].p_value < 0.05 < many.gof["gumbel"].p_value


def test_parse_pair_messages():
    assert parse_pair("AAA/BBB") == ("AAA", "BBB")
    for bad, pattern in ((None, "choose a pair"), ("AAA", "expected two asset names"),
                         ("A/B/C", "expected two"), ("AAA/AAA", "must differ")):
        with pytest.raises(InputError, match=pattern):
            parse_pair(bad)


# ----------------------------------------------------------------------------- stored pair
@pytest.fixture(scope="module")
def pair(view):
    return min(view.store.stored_pairs(view.rolling_key))


@pytest.fixture(scope="module")
def common(view, pair) -> pd.DatetimeIndex:
    """The pair's common dates of stored residuals."""
    return view.store.read_residuals(view.marginal_key, list(pair)).dropna().index


def _day(ts) -> str:
    return pd.Timestamp(ts).strftime("%Y-%m-%d")


@pytest.fixture(scope="module")
def shifted(dash_store, view, pair):
    """The study of the Clayton regime (from 40 days after the change to the end), with its
    default (calmest) reference, 50 replicates, and the progress it reported."""
    a, b = pair
    res = view.store.read_residuals(view.marginal_key, [a, b]).dropna()
    change = pd.Timestamp(dash_store.change_date)
    after = res.index[res.index >= change]
    start, end = after[40], after[-1]
    calls = []
    study = study_pair(view, a, b, start.strftime("%Y-%m-%d"), end.strftime("%Y-%m-%d"),
                       replicates=50, progress=lambda *x: calls.append(x))
    return study, calls, (start, end)


def test_study_of_the_clayton_regime_picks_lower_tail_and_crash_ratio_above_one(shifted):
    study, _, (start, end) = shifted
    w = study.study.window
    assert (w.start, w.end) == (start, end)
    sel = study.study.selected
    # Truth: Clayton with tau 0.35 (lower tail 2^(-1/theta) = 0.53, no upper tail).
    assert sel.tail_lower > 0.2 and sel.tail_lower > sel.tail_upper
    assert 0.2 < sel.kendall_tau < 0.5
    for c in study.study.crash:
        assert c.ratio > 1.0
    # Every candidate got a goodness-of-fit p-value; the selected one intervals of its tails.
    assert set(w.gof) == {f.label for f in w.selection.fits} and len(w.gof) == 14
    assert all(0 < g.p_value < 1 and g.replicates + g.failed == 50 for g in w.gof.values())
    unc = w.uncertainty
    assert unc is not None and unc.replicates + unc.failed == 50
    lo, hi = unc.quantities["tail_lower"].lower, unc.quantities["tail_lower"].upper
    assert lo <= sel.tail_lower <= hi
    assert study.replicates == 50 and study.marginal_mode == "real-time"


def test_default_reference_is_the_calmest_stored_window_apart_from_the_study(view, pair,
                                                                              shifted):
    # issue 12: the calmest window among those with a tau close to the study window's
    study, _, (start, end) = shifted
    timeline = view.store.read_timeline(view.rolling_key, *pair)
    apart = timeline[(timeline["date"] < start) | (timeline["start"] > end)]
    tau_study = stats.kendalltau(study.study.window.u, study.study.window.v).statistic
    close = apart[(apart["kendall_tau"] - tau_study).abs() <= 0.1]
    assert len(close) > 0
    excess = np.fmax(close["tail_lower_emp"], close["tail_upper_emp"]) - close["gauss_tail_q"]
    ref = study.reference.window
    row = timeline[timeline["date"] == ref.end].iloc[0]
    assert row["start"] == ref.start
    assert max(row["tail_lower_emp"], row["tail_upper_emp"]) - row["gauss_tail_q"] == \
        pytest.approx(excess.min(), abs=1e-12)
    assert abs(row["kendall_tau"] - tau_study) <= 0.1
    assert ref.end < start
    assert ref.n == view.rolling.window
    # The rolling engine's empirical tail at q is the reference window's own.
    assert ref.tail_lower_emp == pytest.approx(row["tail_lower_emp"], abs=1e-12)
    assert "calmest stored 120-day window with Kendall's tau within 0.1" in study.reference_rule
    assert f"{len(close)} of {len(timeline)} stored windows qualified" in study.reference_rule


def _timeline(rows):
    frame = pd.DataFrame(rows, columns=["end", "kendall_tau", "tail_lower_emp",
                                        "tail_upper_emp", "gauss_tail_q"])
    frame["date"] = pd.to_datetime(frame.pop("end"))
    frame["start"] = frame["date"] - pd.Timedelta(days=100)
    return frame


def test_reference_rule_on_a_constructed_timeline():
    study_start, study_end = pd.Timestamp("2021-01-01"), pd.Timestamp("2021-06-30")
    rows = [  # end, tau, lower, upper, Gaussian at the same tau -> excess
        ("2019-01-31", 0.40, 0.30, 0.25, 0.28),  # +0.02, |dtau| 0
        ("2019-06-30", 0.45, 0.26, 0.20, 0.30),  # -0.04, |dtau| 0.05: the calmest close one
        ("2019-12-31", 0.10, 0.05, 0.05, 0.15),  # -0.10, |dtau| 0.30
        ("2020-06-30", 0.55, 0.20, 0.20, 0.35),  # -0.15, |dtau| 0.15
        ("2021-03-31", 0.40, 0.00, 0.00, 0.30),  # -0.30, overlaps the study window
    ]
    kw = {"window": 120, "tail_q": 0.1}
    got = choose_reference(_timeline(rows), study_start, study_end, 0.40, **kw)
    assert (got.end, got.start) == (pd.Timestamp("2019-06-30"), pd.Timestamp("2019-03-22"))
    assert (got.tolerance, got.candidates) == (0.1, 2)
    assert got.kendall_tau == 0.45 and got.tail_excess == pytest.approx(-0.04)
    assert got.rule.startswith("calmest stored 120-day window with Kendall's tau within 0.1 "
                               "of the study window's (0.400)")
    assert got.rule.endswith("tau 0.450, tail excess -0.040; 2 of 5 stored windows qualified")
    # none within 0.1 -> widened to 0.2
    got = choose_reference(_timeline(rows[2:]), study_start, study_end, 0.40, **kw)
    assert got.end == pd.Timestamp("2020-06-30") and got.tolerance == 0.2
    assert "within 0.2 of the study window's (0.400; none within 0.1)" in got.rule
    # none within 0.2 -> the calmest apart from the study window, saying the taus differ
    got = choose_reference(_timeline(rows[2:3] + rows[4:]), study_start, study_end, 0.40, **kw)
    assert got.end == pd.Timestamp("2019-12-31") and got.tolerance is None
    assert "so the taus differ" in got.rule
    # every stored window overlaps: the calmest of them, saying so
    got = choose_reference(_timeline(rows[4:]), study_start, study_end, 0.40, **kw)
    assert got.end == pd.Timestamp("2021-03-31")
    assert "every stored window overlaps the study window" in got.rule
    # ties of the excess go to the closer tau, then to the later window
    tied = [("2019-01-31", 0.40, 0.2, 0.2, 0.2), ("2019-06-30", 0.38, 0.2, 0.2, 0.2),
            ("2019-09-30", 0.38, 0.2, 0.2, 0.2)]
    got = choose_reference(_timeline(tied), study_start, study_end, 0.40, **kw)
    assert got.end == pd.Timestamp("2019-01-31")  # the closest tau
    got = choose_reference(_timeline(tied[1:]), study_start, study_end, 0.40, **kw)
    assert got.end == pd.Timestamp("2019-09-30")  # same tau: the later window
    assert tail_excess(_timeline(tied)).tolist() == pytest.approx([0.0, 0.0, 0.0])


def test_progress_is_monotone_and_ends_at_the_total(shifted):
    _, calls, _ = shifted
    total = calls[-1][1]
    assert total == 2 * (1 + 14)
    done = [c[0] for c in calls]
    assert done == sorted(done) and done[-1] == total and done[0] == 0
    assert all(c[1] == total for c in calls)


def test_study_round_trips_through_json(shifted):
    study, _, _ = shifted
    # Sorted keys, as Flask's JSON provider sends them: parameters must keep their order.
    data = json.loads(json.dumps(study.to_dict(), allow_nan=False, sort_keys=True))
    back = PairStudy.from_dict(data)
    assert back.to_dict() == study.to_dict()
    assert back.study.selected == study.study.selected
    for res, orig in zip(back.windows, study.windows, strict=True):
        for f, g in zip(res.window.selection.fits, orig.window.selection.fits, strict=True):
            assert f.param_tuple == g.param_tuple and list(f.params) == list(g.params)
        if orig.window.uncertainty is not None:
            assert list(res.window.uncertainty.quantities) == list(
                orig.window.uncertainty.quantities)
    assert np.array_equal(back.reference.window.u, study.reference.window.u)


def test_input_errors_are_one_line(view, pair, common):
    a, b = pair
    lo, hi = _day(common[100]), _day(common[300])
    short = _day(common[120])
    cases = [
        (("NOPE", b, lo, hi), {}, r"no stored filtered residuals for 'NOPE'"),
        ((a, b, hi, lo), {}, rf"start {hi} is after end {lo}"),
        ((a, b, lo, short), {}, r"only 21 dates with residuals of both"),
        ((a, b, "1990-01-01", "1990-12-31"), {}, r"only 0 dates"),
        ((a, b, "June", hi), {}, r"study window start: cannot read date 'June'"),
        ((a, b, lo, hi), {"replicates": 5}, r"0 or at least 20"),
        ((a, b, lo, hi), {"reference": (lo, short)}, rf"reference window {lo} to {short}: only"),
    ]
    for args, kwargs, pattern in cases:
        with pytest.raises(InputError, match=pattern) as info:
            study_pair(view, *args, **kwargs)
        assert "\n" not in str(info.value)


# ----------------------------------------------------------------------------- page
def test_layout_prefills_from_the_query_and_flags_bad_links(view, pair, common):
    a, b = pair
    lo, hi = _day(common[10]), _day(common[200])
    page = layout(view, {"pair": f"{a}/{b}", "start": lo, "end": hi})
    assert _by_id(page, ids.STUDY_PAIR).value == f"{a}/{b}"
    rng = _by_id(page, ids.STUDY_RANGE)
    assert (rng.start_date, rng.end_date) == (lo, hi)
    assert _by_id(page, ids.STUDY_AUTORUN).data is True
    assert _by_id(page, ids.STUDY_REFERENCE_MODE).value == "calmest"
    with_ref = layout(view, {"pair": f"{a}/{b}", "start": lo, "end": hi, "ref_start": lo,
                             "ref_end": hi})
    assert _by_id(with_ref, ids.STUDY_REFERENCE_MODE).value == "range"
    # Reversed pair: shown in the stored order.
    page = layout(view, {"pair": f"{b}/{a}", "start": lo, "end": hi})
    assert _by_id(page, ids.STUDY_PAIR).value == f"{a}/{b}"
    assert _by_id(page, ids.STUDY_AUTORUN).data is True
    bad = layout(view, {"pair": "NOPE/ALSO", "start": "yesterday"})
    assert _by_id(bad, ids.STUDY_AUTORUN).data is False
    message = text(_by_id(bad, ids.STUDY_MESSAGE))
    assert "is not a stored pair" in message and "cannot read date 'yesterday'" in message
    # No query: the first pair and its last stored window, nothing started.
    plain = layout(view, {})
    timeline = view.store.read_timeline(view.rolling_key, a, b)
    rng = _by_id(plain, ids.STUDY_RANGE)
    assert rng.end_date == timeline["date"].iloc[-1].strftime("%Y-%m-%d")
    assert _by_id(plain, ids.STUDY_AUTORUN).data is False
    assert autorun(True, 0) == 1 and autorun(False, 0) is no_update


def test_run_and_download_callbacks_as_plain_functions(view, pair, shifted, common):
    a, b = pair
    _, _, (start, end) = shifted
    lo, hi = _day(common[0]), _day(common[99])
    seen = []
    out = run_study(view, 1, f"{a}/{b}", _day(start), _day(end), "range", lo, hi, 0,
                    set_progress=seen.append)
    children, data, note, disabled = out
    assert disabled is False and "Studied" in text(note)
    # Progress as (value, max, text) strings for the html.Progress bar.
    assert seen[-1][0] == seen[-1][1] == "2" and seen[-1][2] == "done"
    study = PairStudy.from_dict(data)
    assert study.reference_rule == "the range chosen by the user"
    assert (study.reference.window.start, study.reference.window.n) == (common[0], 100)
    assert study.replicates == 0 and study.study.window.gof == {}
    # Two columns of results: six figures and seven tables (summary + 3 per window).
    figures = find_all(children, lambda i: isinstance(i, dict) and i["type"] == ids.STUDY_FIGURE_TYPE)
    tables = find_all(children, lambda i: isinstance(i, dict) and i["type"] == ids.STUDY_TABLE_TYPE)
    assert len(figures) == 6 and len(tables) == 7
    cand = next(t for t in tables if t.id == {"type": ids.STUDY_TABLE_TYPE, "role": "study",
                                                 "name": "candidates"})
    assert sum(r["selected"] == "yes" for r in cand.data) == 1 and len(cand.data) == 14
    assert cand.data[0]["selected"] == "yes"
    # The whole result tree serialises as Dash sends it (figures included).
    assert len(json.dumps(children.to_plotly_json(), cls=plotly.utils.PlotlyJSONEncoder)) > 1000
    # The report of the stored study downloads as one HTML file.
    sent = download_report(1, data)
    assert sent["filename"].endswith(".html") and sent["type"] == "text/html"
    assert sent["content"].startswith("<!DOCTYPE html>")
    # Bad input: one line in the page, no results, the report button off.
    for args, pattern in (((None, lo, hi), "choose a pair"),
                          ((f"{a}/{b}", None, hi), "choose its first and last"),
                          ((f"{a}/{b}", hi, lo), "is after end"),
                          (("NOPE/" + b, lo, hi), "no stored filtered")):
        children, data, note, disabled = run_study(view, 1, *args, "calmest", None, None, 200)
        assert children == [] and data is None and disabled is True
        assert pattern in text(note) and "\n" not in text(note)
    children, _, note, _ = run_study(view, 1, f"{a}/{b}", lo, hi, "range", None, None, 0)
    assert children == [] and "reference window: choose" in text(note)
    # Nothing clicked yet: nothing changes.
    assert all(x is no_update for x in run_study(view, 0, None, None, None, None, None, None,
                                                 200))


def test_results_render_a_single_column_without_reference(view, pair, shifted):
    a, b = pair
    _, _, (start, end) = shifted
    study = study_pair(view, a, b, start, end, reference="none", replicates=0)
    assert study.reference is None and study.reference_rule == "no reference window"
    page = results(study)
    figures = find_all(page, lambda i: isinstance(i, dict) and i["type"] == ids.STUDY_FIGURE_TYPE)
    assert len(figures) == 3


def test_app_registers_the_background_study(dash_store, tmp_path):
    with Store(dash_store.url, create=False) as store:
        app = create_app(dash_store.cfg, store=store, cache_dir=str(tmp_path / "cache"))
        keys = " ".join(app.callback_map)
        assert f"{ids.STUDY_RESULT}.children" in keys
        assert f"{ids.STUDY_REPORT_DOWNLOAD}.data" in keys
        entry = next(v for k, v in app.callback_map.items() if f"{ids.STUDY_RESULT}.children" in k)
        assert entry.get("background")
