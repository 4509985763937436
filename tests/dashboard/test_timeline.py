"""The Timeline page's library (monitor.views.timeline) and callbacks called as plain functions.

Outside references: statsmodels' Wilson interval for the binomial bands, the normal quantile
for the tau band, and ``pair_signals`` recomputed from the stored timeline for the states and
episodes the page reads from the store."""

from __future__ import annotations

from urllib.parse import parse_qs, urlsplit

import dash
import numpy as np
import pandas as pd
import pytest
from dash import no_update
from statsmodels.stats.proportion import proportion_confint

from callbacks.timeline import (
    OUTPUTS,
    open_link,
    pick_range,
    register,
    selected_range,
    show_pair,
)
from layouts import ids
from layouts import timeline as page
from monitor.common.errors import InputError
from monitor.common.palette import FAMILY_COLOURS, ROTATION_SHADES, SERIES_COLOURS, STATE_COLOURS
from monitor.stats.signals import pair_signals
from monitor.views.common import binomial_band, parse_pair, tau_band
from monitor.views.timeline import (
    EPISODE_COLOURS,
    family_runs,
    pair_history,
    study_link,
    tau_axis_range,
    timeline_figure,
)

from .plotted import as_figure
from .tree import find, text


# ----------------------------------------------------------------------------- bands
def test_binomial_band_is_the_wilson_interval():
    n, q = 120, 0.1
    tail = np.array([0.0, 1 / 12, 0.5, 1.0])  # 0, 1, 6 and 12 joint exceedances of 120
    low, high = binomial_band(tail, n, q)
    # Wilson (1927) score interval, as statsmodels computes it.
    ref_lo, ref_hi = proportion_confint(np.round(tail * q * n), n, alpha=0.05, method="wilson")
    np.testing.assert_allclose(low, np.clip(ref_lo / q, 0, 1), rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(high, np.clip(ref_hi / q, 0, 1), rtol=1e-10)
    assert low[0] == 0.0 and high[0] > 0.0  # no collapse at zero exceedances
    with pytest.raises(ValueError, match="q must lie in"):
        binomial_band(tail, n, 1.5)


def test_tau_band_is_normal_and_clipped():
    low, high = tau_band([0.3, 0.95], [0.05, 0.1])
    z = 1.959963984540054  # Phi^{-1}(0.975) (standard tables, from memory)
    np.testing.assert_allclose(low, [0.3 - z * 0.05, 0.95 - z * 0.1])
    np.testing.assert_allclose(high, [0.3 + z * 0.05, 1.0])


# ----------------------------------------------------------------------------- pair history
def test_parse_pair_accepts_either_order_and_names_the_problem():
    pairs = [("ALPHA", "BETA"), ("ALPHA", "GAMMA")]
    assert parse_pair("ALPHA/BETA", pairs) == ("ALPHA", "BETA")
    assert parse_pair(" GAMMA / ALPHA ", pairs) == ("ALPHA", "GAMMA")
    with pytest.raises(InputError, match=r"pair 'BETA/GAMMA': no stored timeline .*2 stored"):
        parse_pair("BETA/GAMMA", pairs)
    with pytest.raises(InputError, match=r"pair 'ALPHABETA': write it as A/B"):
        parse_pair("ALPHABETA", pairs)
    with pytest.raises(InputError, match="none chosen"):
        parse_pair("", pairs)


def test_pair_history_matches_the_stored_signals(view, dash_store):
    a, b = min(view.store.stored_pairs(view.rolling_key))
    history = pair_history(view, a, b)
    f = history.frame
    timeline = view.store.read_timeline(view.rolling_key, a, b)
    sig = pair_signals(timeline)
    assert len(f) == len(timeline)
    np.testing.assert_array_equal(f["kendall_tau"], timeline["kendall_tau"])
    np.testing.assert_array_equal(f["tail_lower_emp"], timeline["tail_lower_emp"])
    # States decoded from the stored runs equal the from-scratch daily states.
    for tail in ("lower", "upper"):
        assert f[f"state_{tail}"].tolist() == sig.frame[f"state_{tail}"].tolist()
    # Bands: tau -+ z se; Wilson for the nonparametric tails (n = window 120).
    z = 1.959963984540054
    np.testing.assert_allclose(f["tau_low"], np.clip(f["kendall_tau"] - z * f["kendall_tau_se"],
                                                     -1, 1))
    _, hi = proportion_confint(f["tail_upper_emp"] * 0.1 * 120, 120, method="wilson")
    np.testing.assert_allclose(f["tail_upper_high"], np.clip(hi / 0.1, 0, 1), rtol=1e-10)
    assert (f["tail_lower_low"] <= f["tail_lower_emp"] + 1e-12).all()
    # Family runs rebuild the family column.
    runs = history.families
    assert runs["windows"].sum() == len(f)
    assert np.repeat(runs["family"].to_numpy(), runs["windows"]).tolist() == \
        f["family"].astype(str).tolist()
    # Episode spans are the stored episodes, which are those of pair_signals.
    spans = history.episodes
    assert len(spans) == len(sig.episodes)
    for span, ep in zip(spans.itertuples(index=False), sig.episodes, strict=True):
        assert (span.tail, span.start, span.cause) == (ep.tail, ep.start, ep.cause)
        assert span.end == (ep.end if ep.end is not None else f["date"].iloc[-1])
    assert "window 120 days" in history.provenance and "real-time" in history.provenance


def test_timeline_figure_traces(view):
    pairs = sorted(view.store.stored_pairs(view.rolling_key))
    # The pair with the most episodes shows the shading best.
    counts = {p: len(view.store.read_episodes(view.signals_key, p)) for p in pairs}
    a, b = max(pairs, key=lambda p: (counts[p], p))
    history = pair_history(view, a, b)
    fig = as_figure(timeline_figure(history))
    names = [t.name for t in fig.data]
    tau = fig.data[names.index("Kendall's tau")]
    # Plotted values are rounded to 4 decimals (the hover shows 3).
    np.testing.assert_allclose(np.array(tau.y, float), history.frame["kendall_tau"], atol=5e-5)
    assert names.count("nonparametric C(q,q)/q") == 2  # lower and upper rows
    assert names.count("model-implied (selected family)") == 2
    # issue 12: the model-based line shown is the model-averaged one; the selected family's,
    # which flips with the selection, waits in the legend.
    averaged = [t for t in fig.data if t.name == "model-averaged (Akaike weights)"]
    assert len(averaged) == 2 and all(t.visible is None for t in averaged)
    np.testing.assert_allclose(np.array(averaged[0].y, float),
                               history.frame["tail_lower_avg"], atol=5e-5)
    assert {t.visible for t in fig.data if t.name == "model-implied (selected family)"} == {
        "legendonly"}
    heat = [t for t in fig.data if t.type == "heatmap"]
    # issue 12: the strip gained a rotation row beneath the family row
    assert len(heat) == 1 and list(heat[0].y) == ["family", "rotation", "lower state",
                                                  "upper state"]
    for fam in set(history.frame["family"]):
        legend = [t for t in fig.data if t.name and t.name.startswith(f"{fam} (")]
        assert len(legend) == 1 and legend[0].marker.color == FAMILY_COLOURS[fam]
    shapes = fig.layout.shapes
    assert len(shapes) == 2 * len(history.episodes)
    assert counts[(a, b)] > 0
    lower = [s for s in shapes if "213,94,0" in s.fillcolor]  # EPISODE_COLOURS["lower"]
    assert EPISODE_COLOURS["lower"] == "#D55E00"
    assert len(lower) == 2 * int((history.episodes["tail"] == "lower").sum())
    assert all(ax.fixedrange for ax in (fig.layout.yaxis, fig.layout.yaxis2, fig.layout.yaxis3))


# ----------------------------------------------------------------------------- page
def test_layout_preselects_the_pair_from_the_address(view):
    pairs = sorted(view.store.stored_pairs(view.rolling_key))
    a, b = pairs[1]
    tree = page.layout(view, {"pair": f"{b}/{a}"})
    assert find(tree, ids.TIMELINE_PAIR).value == f"{a}/{b}"
    assert len(find(tree, ids.TIMELINE_PAIR).options) == 6
    bad = page.layout(view, {"pair": "NOPE/ZIP"})
    assert find(bad, ids.TIMELINE_PAIR).value is None
    assert "pair 'NOPE/ZIP': no stored timeline" in text(bad)
    assert find(page.layout(view, {}), ids.TIMELINE_PAIR).value == f"{pairs[0][0]}/" \
        f"{pairs[0][1]}"


def test_show_pair_callback(view):
    app = dash.Dash(__name__)
    register(app, view)
    keys = list(app.callback_map)
    assert len(keys) == 3 and all(f"{i}.{p}" in keys[0] for i, p in OUTPUTS)
    a, b = min(view.store.stored_pairs(view.rolling_key))
    out = dict(zip([f"{i}.{p}" for i, p in OUTPUTS], show_pair(view, f"{b}/{a}"), strict=True))
    fig = as_figure(out[f"{ids.TIMELINE_FIGURE}.figure"])
    timeline = view.store.read_timeline(view.rolling_key, a, b)
    tau = next(t for t in fig.data if t.name == "Kendall's tau")
    np.testing.assert_allclose(np.array(tau.y, float), timeline["kendall_tau"], atol=5e-5)
    note = out[f"{ids.TIMELINE_NOTE}.children"]
    assert f"{a} / {b}: {len(timeline)} window ends" in note
    assert "window 120 days" in note and "AIC" in note and "real-time" in note
    episodes = view.store.read_episodes(view.signals_key, (a, b))
    assert len(out[f"{ids.TIMELINE_EPISODES}.data"]) == len(episodes)
    assert out[f"{ids.TIMELINE_MESSAGE}.children"] == ""
    assert out[f"{ids.TIMELINE_RANGE}.min_date_allowed"] == \
        timeline["date"].iloc[0].strftime("%Y-%m-%d")
    bad = show_pair(view, "NOPE/ZIP")
    assert "pair 'NOPE/ZIP': no stored timeline" in bad[4].children
    assert bad[2] == [] and len(bad[0].data) == 0


def test_a_drag_fills_the_range_and_the_link_opens_the_study():
    zoom = {"xaxis2.range[0]": "2021-03-04 10:31:07.2", "xaxis2.range[1]": "2021-05-01 02:00"}
    assert selected_range(zoom, None) == ("2021-03-04", "2021-05-01")
    assert pick_range({"xaxis.range": ["2021-06-30", "2021-02-01"]}, None) == (
        "2021-02-01", "2021-06-30")
    box = {"range": {"x3": ["2020-01-06 00:00", "2020-04-01 12:00"]}, "points": []}
    assert pick_range(None, box) == ("2020-01-06", "2020-04-01")
    assert pick_range({"xaxis.autorange": True}, None) == (no_update, no_update)
    href, label = open_link("ALPHA/BETA", "2021-02-01", "2021-06-30")
    assert href == study_link(("ALPHA", "BETA"), "2021-02-01", "2021-06-30")
    parts = urlsplit(href)
    assert parts.path == "/drilldown"
    assert parse_qs(parts.query) == {"pair": ["ALPHA/BETA"], "start": ["2021-02-01"],
                                     "end": ["2021-06-30"]}
    assert "2021-02-01 to 2021-06-30" in label
    href, label = open_link("ALPHA/BETA", None, None)
    assert href == "/drilldown?pair=ALPHA/BETA" and "no range chosen" in label
    assert open_link("ALPHA/BETA", "2021-06-30", "2021-02-01")[0].endswith(
        "start=2021-02-01&end=2021-06-30")


def test_family_runs_of_a_small_frame():
    frame = pd.DataFrame({"date": pd.bdate_range("2024-01-01", periods=5),
                          "family": ["gaussian", "gaussian", "clayton", "clayton", "gaussian"],
                          "rotation": [0, 0, 0, 180, 0]})
    runs = family_runs(frame)
    assert runs[["family", "rotation", "windows"]].values.tolist() == [
        ["gaussian", 0, 2], ["clayton", 0, 1], ["clayton", 180, 1], ["gaussian", 0, 1]]
    assert runs["last_date"].iloc[0] == pd.Timestamp("2024-01-02")


# ----------------------------------------------------------------------------- colours, axes
def test_family_colours_are_not_state_colours_and_tau_is_not_a_tail_colour(view):
    states = {c.upper() for c in STATE_COLOURS.values()}
    assert not states & {c.upper() for c in FAMILY_COLOURS.values()}
    assert len(set(FAMILY_COLOURS.values())) == len(FAMILY_COLOURS)  # one colour a family
    a, b = min(view.store.stored_pairs(view.rolling_key))
    fig = as_figure(timeline_figure(pair_history(view, a, b)))
    by_name = {t.name: t for t in fig.data if t.name}
    tau = by_name["Kendall's tau"].line.color
    tails = {by_name["nonparametric C(q,q)/q"].line.color,
             by_name["model-implied (selected family)"].line.color}
    assert tau == SERIES_COLOURS["tau"] and tau not in tails and len(tails) == 2


def test_tau_axis_fits_the_band():
    # band 0.30..0.50: span 0.2, 10% room each side -> 0.28..0.52
    assert tau_axis_range([0.30, 0.35], [0.45, 0.50]) == (0.28, 0.52)
    # a band near zero keeps zero in view; a flat series still gets a span of 0.2
    assert tau_axis_range([0.05], [0.09]) == (-0.03, 0.17)
    assert tau_axis_range([0.12], [0.18]) == (0.0, 0.25)  # 0.05..0.25 pulled down to zero
    assert tau_axis_range([-0.5, np.nan], [-0.3, np.nan]) == (-0.52, -0.28)
    assert tau_axis_range([-0.98], [0.99]) == (-1.0, 1.0)  # never beyond [-1, 1]
    assert tau_axis_range([np.nan], [np.nan]) == (-1.0, 1.0)


def test_timeline_tau_axis_and_rotation_strip(view):
    from dataclasses import replace

    a, b = min(view.store.stored_pairs(view.rolling_key))
    history = pair_history(view, a, b)
    fig = as_figure(timeline_figure(history))
    f = history.frame
    lo, hi = fig.layout.yaxis.range
    assert (lo, hi) == tau_axis_range(f["tau_low"].round(4), f["tau_high"].round(4))
    assert -1 < lo <= f["tau_low"].min() and f["tau_high"].max() <= hi < 1
    # A constructed selection: clayton at 0 and 180 degrees, gumbel at 90.
    frame = f.copy()
    k = len(frame)
    frame["family"] = np.where(np.arange(k) < k // 2, "clayton", "gumbel")
    frame["rotation"] = np.select([np.arange(k) < k // 4, np.arange(k) < k // 2], [0, 180], 90)
    fig = as_figure(timeline_figure(replace(history, frame=frame)))
    heat = next(t for t in fig.data if t.type == "heatmap")
    z = np.asarray(heat.z, dtype=float)
    rot_codes = z[1]
    assert len(set(rot_codes[: k // 4])) == 1 and len(set(rot_codes)) == 3
    # each code reads its own shade from the stepped scale
    n_labels = heat.zmax + 0.5
    shade = {r: heat.colorscale[2 * int(c)][1] for r, c in
             ((0, rot_codes[0]), (180, rot_codes[k // 4]), (90, rot_codes[-1]))}
    assert shade == {r: ROTATION_SHADES[r] for r in (0, 180, 90)} and n_labels > 3
    text = np.asarray(heat.text)
    assert text[0][0] == "clayton 0°" and text[0][k // 4] == "clayton 180°"
    assert text[1][-1] == "gumbel 90°"
    legend = [t.name for t in fig.data if t.legendgroup == "rotations"]
    shares = [(k // 4) / k, (k - k // 2) / k, (k // 2 - k // 4) / k]
    assert legend == [f"{r}° ({p:.0%})" for r, p in zip((0, 90, 180), shares, strict=True)]
