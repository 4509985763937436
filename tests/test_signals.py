"""Tests for monitor.stats.signals: CUSUM, hysteresis, divergence, spikes, switches, episodes and the
universe summary.

External references: Page (1954, "Continuous inspection schemes", Biometrika 41, 100-115) for
the CUSUM recursion; Siegmund (1985, *Sequential Analysis*) for the average run length of a
CUSUM of normal increments (from memory); docs/check-values.md section 4 for the
Gaussian tail concordance; scipy.stats for normal quantiles. Hand-made timelines check the
state machine day by day. Simulation tolerances are stated beside each check.
"""

from __future__ import annotations

import dataclasses
import itertools

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from monitor.common.errors import InputError
from monitor.stats.copulas import family
from monitor.stats.rolling import (
    RollingSettings,
    _gaussian_tail_concordance,
    pair_metrics,
    window_end_positions,
)
from monitor.stats.signals import (
    EARLIER_DEFAULTS,
    IQR_TO_SIGMA,
    REQUIRED_COLUMNS,
    SIGNAL_COLUMNS,
    STATES,
    SignalSettings,
    cusum,
    hysteresis,
    pair_signals,
    robust_z_against_history,
    states_on,
    universe_summary,
)

WINDOW = 50  # window length of the hand-made timelines (only the ``start`` column uses it)


def _timeline(n: int, **columns) -> pd.DataFrame:
    """A neutral hand-made timeline: no statistic has any evidence unless a column says so.

    Gaussian everywhere (tail model 0, equal log-likelihoods and AIC), empirical tails at the
    Gaussian value, and per-day ratios of -1 (the CUSUM stays at 0).
    """
    days = pd.bdate_range("2019-01-01", periods=n + WINDOW - 1)
    base = {
        "date": days[WINDOW - 1:], "start": days[:n], "n": WINDOW, "kendall_tau": 0.35,
        "family": "gaussian", "rotation": 0, "aic": -50.0, "aic_gauss": -50.0,
        "loglik_gauss": 26.0, "tail_lower": 0.0, "tail_upper": 0.0, "tail_lower_emp": 0.3,
        "tail_upper_emp": 0.3, "tail_lower_emp_se": 0.1, "tail_upper_emp_se": 0.1,
        "gauss_tail_q": 0.3, "loglik_best_lower": 26.0, "loglik_best_upper": 26.0,
        "llr_lower": -1.0, "llr_upper": -1.0,
    }
    base.update(columns)
    return pd.DataFrame({k: (np.broadcast_to(v, n) if np.ndim(v) == 0 else np.asarray(v))
                         for k, v in base.items()})


def _ratios_for_path(path) -> np.ndarray:
    """Per-day ratios whose CUSUM (k = 0, no cap) is exactly ``path`` (values >= 0)."""
    p = np.concatenate([[0.0], np.asarray(path, float)])
    steps = np.diff(p)
    # A day at 0 gets a step well below what is needed to reach 0.
    return np.where(p[1:] > 0, steps, -p[:-1] - 1.0)


# The hand-made timelines test the mechanics against the Gaussian yardstick (no baseline, no
# materiality gate); the pair's own baseline has its own tests below.
YARDSTICK = {"baseline": False, "alert_min_tail": 0.0}
# Only the sequential statistic, with levels that make hand paths easy to read.
SEQUENTIAL_ONLY = SignalSettings(**YARDSTICK, cusum_reference=0.0, cusum_entry=1.0, cusum_exit=0.5,
                                 cusum_cap=100.0, window_entry=np.inf, spike_entry=np.inf,
                                 switch_entry=np.inf, entry_days=3, exit_days=2)


# --------------------------------------------------------------------------------- CUSUM
def test_cusum_matches_hand_recursion():
    # Page (1954), S_t = max(0, S_{t-1} + x_t - k), S_0 = 0, worked by hand with k = 0.2:
    # 0.6, 0.1, 1.1, 0, 0.3, 1.0; with a ceiling of 0.8 the third and sixth become 0.8.
    x = [0.8, -0.3, 1.2, -2.0, 0.5, 0.9]
    np.testing.assert_allclose(cusum(x, 0.2), [0.6, 0.1, 1.1, 0.0, 0.3, 1.0], atol=1e-12)
    np.testing.assert_allclose(cusum(x, 0.2, cap=0.8), [0.6, 0.1, 0.8, 0.0, 0.3, 0.8],
                               atol=1e-12)
    # NaN is a day without an observation: S carries over (hand: 0.6, 0.6, 0.1).
    np.testing.assert_allclose(cusum([0.8, np.nan, -0.3], 0.2), [0.6, 0.6, 0.1], atol=1e-12)


def test_cusum_equals_plain_loop_on_random_paths():
    # Page (1954) recursion written as a loop, with the ceiling, against the loop-free form.
    rng = np.random.default_rng(11)
    for _ in range(200):
        n = int(rng.integers(1, 300))
        x = rng.normal(rng.normal(0, 0.5), 1.0, n)
        k, cap = rng.uniform(0, 0.5), rng.choice([np.inf, rng.uniform(0.1, 5.0)])
        s, want = 0.0, []
        for xi in x:
            s = min(cap, max(0.0, s + xi - k))
            want.append(s)
        np.testing.assert_allclose(cusum(x, k, cap), want, atol=1e-9)
    batch = rng.normal(size=(3, 50))
    np.testing.assert_allclose(cusum(batch, 0.1), np.stack([cusum(r, 0.1) for r in batch]))


def test_cusum_without_drift_stays_at_zero():
    # Page (1954): increments never above the reference value k never leave S_t = 0.
    assert np.all(cusum(np.full(100, 0.3), 0.3) == 0.0)
    assert np.all(cusum(-np.abs(np.random.default_rng(2).normal(size=100)), 0.0) == 0.0)


def _run_lengths(mean: float, k: float, h: float, reps: int, days: int, seed: int):
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(0, reps, 500):  # chunks keep the memory small
        hit = np.asarray(cusum(rng.normal(mean, 1.0, (500, days)), k)) >= h
        assert hit.any(axis=1).all()  # every path signals within the horizon
        out.append(hit.argmax(axis=1) + 1)
    return np.concatenate(out)


def _siegmund_arl(delta: float, h: float) -> float:
    # Siegmund (1985), Sequential Analysis, ARL of a one-sided CUSUM of N(mu, 1) increments
    # with delta = mu - k and the corrected barrier b = h + 1.166 (from memory).
    b = h + 1.166
    return (np.exp(-2 * delta * b) + 2 * delta * b - 1) / (2 * delta ** 2)


def test_cusum_average_run_length_on_iid_normal_noise():
    # In control, N(0, 1) with k = 0.5, h = 4: Siegmund's approximation gives 338 days; the
    # tabulated two-sided ARL of 168 (Montgomery, Introduction to Statistical Quality
    # Control, tabular CUSUM with k = 1/2, h = 4; from memory) is half the one-sided one.
    # Run lengths are near-exponential (sd ~ mean), so the mean of 2000 has s.e. ~ 2.2 %;
    # 10 % is over four s.e.
    arl0 = _run_lengths(0.0, 0.5, 4.0, reps=2000, days=6000, seed=5).mean()
    assert _siegmund_arl(-0.5, 4.0) == pytest.approx(338.0, abs=1.0)
    assert arl0 == pytest.approx(_siegmund_arl(-0.5, 4.0), rel=0.10)
    # Out of control, a one-s.d. shift: Siegmund 8.34 (the same table: 8.38, from memory).
    arl1 = _run_lengths(1.0, 0.5, 4.0, reps=2000, days=200, seed=6).mean()
    assert arl1 == pytest.approx(_siegmund_arl(0.5, 4.0), rel=0.05)


# ---------------------------------------------------------------------------- hysteresis
def test_hysteresis_needs_persistence_to_open_and_to_close():
    # Hand sequences, entry 3 days, exit 2 days.
    a = np.array([0, 1, 0, 1, 1, 0, 0, 0, 0, 0], bool)  # blip, then two days: never opens
    q = ~a
    assert hysteresis(a, q, 3, 2) == []
    a = np.array([0, 1, 1, 1, 1, 0, 0, 1, 0, 0, 0], bool)
    q = np.array([1, 0, 0, 0, 0, 1, 0, 0, 1, 1, 1], bool)
    # Opens on the third active day (3); a quiet day, an in-between day and an active day
    # do not close it; the second of two quiet days in a row (9) does.
    assert hysteresis(a, q, 3, 2) == [(3, 9)]
    assert hysteresis(a[:9], q[:9], 3, 2) == [(3, None)]  # still open at the end
    with pytest.raises(ValueError, match="both active and quiet"):
        hysteresis([1], [1], 1, 1)


def test_single_day_blip_never_opens_an_episode():
    path = [0, 0, 3.0, 0, 0, 0, 2.0, 1.5, 0, 0]
    sig = pair_signals(_timeline(len(path), llr_lower=_ratios_for_path(path)), SEQUENTIAL_ONLY)
    np.testing.assert_allclose(sig.frame["sequential_lower"], path, atol=1e-12)
    assert sig.episodes == ()
    assert sig.frame["alert"].sum() == 0
    assert sig.frame["state_lower"].tolist() == ["calm", "calm", "watch", "calm", "calm",
                                                 "calm", "watch", "watch", "calm", "calm"]


def test_episode_opens_after_m_days_closes_after_m_prime_and_records_the_peak():
    # Entry level 1, exit level 0.5, entry 3 days, exit 2 days (SEQUENTIAL_ONLY).
    path = [0, 0, 1.2, 1.5, 1.1, 1.8, 0.9, 0.4, 0.7, 0.4, 0.3, 0, 0]
    sig = pair_signals(_timeline(len(path), llr_lower=_ratios_for_path(path)), SEQUENTIAL_ONLY)
    f = sig.frame
    (ep,) = sig.episodes
    d = f["date"]
    assert (ep.tail, ep.cause, ep.statistic) == ("lower", "divergence", "sequential")
    assert ep.onset == d[2] and ep.start == d[4]   # third day of the active run
    # Day 7 is quiet, day 8 (0.7) between the levels resets the quiet run; days 9, 10 close.
    assert ep.end == d[9]
    assert f["alert_lower"].tolist() == [0, 0, 0, 0, 1, 1, 1, 1, 1, 1, 0, 0, 0]
    assert ep.peak_date == d[5] and ep.peak_value == pytest.approx(1.8)
    assert ep.peak_tail_emp == 0.3 and ep.peak_kendall_tau == 0.35
    assert f["state_lower"].iloc[4:10].eq("alert").all()
    assert f["state_upper"].eq("calm").all() and f["alert_upper"].eq(0).all()


def test_open_episode_and_its_dict():
    path = [0, 1.2, 1.3, 1.4, 1.5]
    sig = pair_signals(_timeline(len(path), llr_upper=_ratios_for_path(path)), SEQUENTIAL_ONLY)
    (ep,) = sig.episodes
    assert ep.tail == "upper" and ep.is_open and ep.end is None
    doc = ep.to_dict()
    assert doc["end"] is None and doc["start"] == sig.frame["date"][3].strftime("%Y-%m-%d")
    table = sig.episodes_frame()
    assert list(table.columns)[:3] == ["tail", "cause", "statistic"] and len(table) == 1


def test_alert_column_matches_episodes():
    # Two lower episodes and one upper, overlapping in time.
    lower = [0, 2, 2, 2, 2, 0, 0, 0, 0, 2, 2, 2, 0, 0, 0, 0]
    upper = [0, 0, 0, 0, 2, 2, 2, 2, 0, 0, 0, 0, 0, 0, 0, 0]
    frame = _timeline(len(lower), llr_lower=_ratios_for_path(lower),
                      llr_upper=_ratios_for_path(upper))
    sig = pair_signals(frame, SEQUENTIAL_ONLY)
    f = sig.frame
    assert [e.tail for e in sig.episodes] == ["lower", "upper", "lower"]  # by start date
    for tail in ("lower", "upper"):
        inside = np.zeros(len(f), bool)
        for e in sig.episodes:
            if e.tail == tail:
                inside |= ((f["date"] >= e.start)
                           & (f["date"] <= (e.end if e.end is not None else f["date"].max())))
        assert (f[f"alert_{tail}"].to_numpy() == inside).all()
        assert ((f[f"state_{tail}"] == "alert").to_numpy() == inside).all()
        # One 0 -> 1 step per episode.
        steps = np.diff(np.concatenate([[0], f[f"alert_{tail}"].to_numpy()]))
        assert (steps == 1).sum() == sum(e.tail == tail for e in sig.episodes)
    assert (f["alert"] == np.maximum(f["alert_lower"], f["alert_upper"])).all()
    assert set(f["state_lower"]) <= set(STATES)
    assert all(c in f.columns for c in SIGNAL_COLUMNS)


# ------------------------------------------------------------------- window statistics
@pytest.fixture(scope="module")
def gaussian_and_clayton_signals():
    """600 days of a Gaussian and of a Clayton copula with the same Kendall's tau 0.5."""
    tau, n = 0.5, 600
    cases = {"gaussian": (np.sin(np.pi * tau / 2),), "clayton": (2 * tau / (1 - tau),)}
    rs = RollingSettings()
    dates = pd.bdate_range("2020-01-01", periods=n)
    out = {}
    for name, params in cases.items():
        uv = family(name).sample(n, params, np.random.default_rng(1))
        z = stats.norm.ppf(uv)
        m = pair_metrics(dates, z[:, 0], z[:, 1], rs, window_end_positions(n, rs))
        out[name] = pair_signals(m.frame, EARLIER_DEFAULTS)
        out[f"{name}, own baseline"] = pair_signals(m.frame)
    return out


def test_divergence_is_near_zero_on_gaussian_and_positive_on_clayton(
        gaussian_and_clayton_signals):
    # Same tau: Gaussian rho = sin(pi tau / 2), Clayton theta = 2 tau / (1 - tau)
    # (docs/check-values.md section 1). The Gaussian has no tail dependence and Clayton has
    # lambda_L = 2^(-1/theta), with C(q,q)/q = .7089 at q = .1, theta = 2 (docs/check-values.md
    # section 4). So the finite-level excess over the same-tau Gaussian is about 0 for the
    # first and positive in the lower tail only for the second.
    gauss = gaussian_and_clayton_signals["gaussian"].frame
    clay = gaussian_and_clayton_signals["clayton"].frame
    # One window's excess has s.d. about 0.7 s.e. units and the 351 windows share most of
    # their data, so the bounds allow about 1.5 s.d. of the median.
    assert abs(gauss["excess_lower"].median()) < 1.0
    assert abs(gauss["excess_upper"].median()) < 1.0
    assert clay["excess_lower"].median() > 0.75
    assert clay["excess_lower"].median() > clay["excess_upper"].median() + 2.0
    # Likelihood evidence of the best lower-tail family against the Gaussian: near 0 under
    # the Gaussian (one or two extra parameters buy a few nats at most), large under Clayton
    # (about n * KL = 250 * 0.1 nats at tau 0.5).
    ratio = {k: (f["loglik_best_lower"] - f["loglik_gauss"]).median()
             for k, f in (("gaussian", gauss), ("clayton", clay))}
    assert ratio["gaussian"] < 3.0 and ratio["clayton"] > 10.0
    # The sequential statistic: near 0 under the Gaussian, near its ceiling under Clayton.
    # (Bounds chosen to hold for seeds 0-7, not only this one.)
    s = EARLIER_DEFAULTS
    assert gauss["sequential_lower"].median() < s.cusum_exit
    assert clay["sequential_lower"].iloc[-100:].median() > s.cusum_exit
    assert gauss["alert"].sum() == 0
    assert clay["alert_lower"].mean() > 0.6 and clay["alert_upper"].sum() == 0
    ep = gaussian_and_clayton_signals["clayton"].episodes[0]
    assert ep.tail == "lower" and ep.cause == "divergence" and ep.peak_tail_emp > 0.3
    # Against the pair's own baseline (the defaults) a Clayton copula that never changes is a
    # standing condition, not a shift: its excess stays, its alerts go.
    own = gaussian_and_clayton_signals["clayton, own baseline"].frame
    assert own["excess_lower"].median() > 0.75
    assert own["alert"].sum() == 0
    assert gaussian_and_clayton_signals["gaussian, own baseline"].frame["alert"].sum() == 0


def test_appending_rows_never_changes_past_signals(gaussian_and_clayton_signals):
    # Every statistic and the state machine look only backwards (docs/contracts.md: appending data
    # never changes past results), so the signals of a prefix are the prefix of the signals.
    for name, cut in itertools.product(("clayton", "clayton, own baseline"), (120, 260, 400)):
        full = gaussian_and_clayton_signals[name]
        part = pair_signals(full.frame.iloc[:cut], full.settings)
        cols = [c for c in SIGNAL_COLUMNS if not c.startswith("state")]
        np.testing.assert_array_equal(part.frame[cols].to_numpy(float),
                                      full.frame[cols].iloc[:cut].to_numpy(float))
        assert part.frame["state_lower"].tolist() == full.frame["state_lower"].iloc[:cut].tolist()
        assert [(e.tail, e.start) for e in part.episodes] == [
            (e.tail, e.start) for e in full.episodes if e.start <= part.frame["date"].iloc[-1]]


def test_gaussian_tail_concordance_matches_reference_values():
    # docs/check-values.md section 4: the Gaussian copula with rho = 0.5 (tau = 1/3) has
    # C(q,q)/q = .3240 / .2438 / .1294 at q = .10 / .05 / .01.
    for q, want in ((0.10, 0.3240), (0.05, 0.2438), (0.01, 0.1294)):
        assert float(_gaussian_tail_concordance(np.array([1 / 3]), q)[0]) == pytest.approx(
            want, abs=5e-5)


WINDOW_ONLY = SignalSettings(**YARDSTICK, window_entry=8.0, window_exit=3.0, excess_gate=1.0,
                             excess_hold=0.5, cusum_entry=np.inf, spike_entry=np.inf,
                             switch_entry=np.inf, entry_days=3, exit_days=4)


def test_window_statistic_needs_finite_level_excess_in_its_tail():
    # The gate (module docstring, "window"): a large likelihood ratio counts for a tail only
    # where the empirical tail exceeds the same-tau Gaussian value, here only the lower one.
    frame = _timeline(10, loglik_best_upper=46.0, loglik_best_lower=46.0,
                      tail_lower_emp=0.6, tail_upper_emp=0.3)
    sig = pair_signals(frame, WINDOW_ONLY)
    f = sig.frame
    np.testing.assert_allclose(f["excess_lower"], 3.0)  # (0.6 - 0.3) / 0.1
    np.testing.assert_allclose(f["excess_upper"], 0.0)
    np.testing.assert_allclose(f["window_lower"], 20.0)
    np.testing.assert_allclose(f["window_upper"], 20.0)
    np.testing.assert_allclose(f["evidence_lower"], 20.0 / 8.0)
    np.testing.assert_allclose(f["evidence_upper"], 0.0)
    assert [(e.tail, e.statistic, e.start) for e in sig.episodes] == [
        ("lower", "window", f["date"][2])]


def test_window_gate_has_its_own_hysteresis():
    # Excess 3 s.e. (opens), then 0.7 (below the gate, above the hold: stays open), then 0.2
    # (below the hold: quiet, closes on the fourth such day).
    emp = np.repeat([0.6, 0.37, 0.32], 10)
    sig = pair_signals(_timeline(30, loglik_best_lower=46.0, tail_lower_emp=emp), WINDOW_ONLY)
    (ep,) = sig.episodes
    d = sig.frame["date"]
    assert ep.start == d[2] and ep.end == d[22]
    assert sig.frame["alert_lower"].tolist() == [0] * 2 + [1] * 21 + [0] * 7


# ------------------------------------------------------------------------- spikes, switch
def test_robust_z_against_history_by_hand():
    # Common practice: (x - median) / robust scale, with the IQR scaled by 2 * z_.75 = 1.349
    # (scipy.stats.norm.ppf) and the value's own s.e. added in quadrature.
    assert IQR_TO_SIGMA == pytest.approx(2 * stats.norm.ppf(0.75), rel=1e-12)
    rng = np.random.default_rng(4)
    x = rng.normal(size=40)
    se = np.full(40, 0.3)
    ends = np.clip(np.arange(40) - 5, 0, None)  # reference: 10 values ending 6 days back
    z = robust_z_against_history(x, se, ends, 10)
    for t in (15, 30, 39):
        ref = x[ends[t] - 10:ends[t]]
        iqr = np.percentile(ref, 75) - np.percentile(ref, 25)
        want = (x[t] - np.median(ref)) / np.hypot(iqr / IQR_TO_SIGMA, 0.3)
        assert z[t] == pytest.approx(want, rel=1e-12)
    assert np.isnan(z[:15]).all()  # fewer than 10 reference values
    assert not np.isnan(z[15:]).any()


def test_tail_spike_against_own_history_opens_a_spike_episode():
    n = 500
    emp = np.full(n, 0.3) + 0.02 * np.sin(np.arange(n))
    emp[320:] = 0.8  # the empirical lower tail jumps, the Gaussian benchmark does not move
    frame = _timeline(n, tail_lower_emp=emp)
    s = SignalSettings(reference_windows=100, alert_min_tail=0.0)
    sig = pair_signals(frame, s)
    f = sig.frame
    # The reference of a row is the 100 rows before its window's first day: NaN until then.
    assert f["spike_lower"].iloc[:WINDOW - 1 + 100].isna().all()
    assert f["spike_lower"].iloc[320] > 3.0
    (ep,) = [e for e in sig.episodes if e.cause == "spike"]
    assert ep.tail == "lower" and ep.start == f["date"][320 + s.entry_days - 1]
    # Once the reference itself holds the new level, the spike fades (from row 320 + 49 + 100).
    assert abs(f["spike_lower"].iloc[-1]) < s.spike_exit
    assert ep.end is not None


def test_family_switch_into_lower_tail_class():
    n, change = 500, 350
    tail = np.where(np.arange(n) >= change, 0.5, 0.0)
    aic = np.where(np.arange(n) >= change, -70.0, -50.0)  # AIC 20 better than the Gaussian
    frame = _timeline(n, tail_lower=tail, tail_upper=0.4 * tail, aic=aic,
                      family=np.where(tail > 0, "bb7", "gaussian"))
    s = SignalSettings(switch_entry=0.9, reference_windows=250)
    sig = pair_signals(frame, s)
    f = sig.frame
    # By hand: share of lower-tail windows among the last 60 minus their share among the
    # 250 window ends before the current window's first day (row i - WINDOW + 1).
    counts = tail > 0
    want = np.full(n, np.nan)
    for i in range(n):
        ref_end = i - WINDOW + 1
        if ref_end >= s.reference_windows and i >= s.switch_windows - 1:
            want[i] = (counts[i - s.switch_windows + 1:i + 1].mean()
                       - counts[ref_end - s.reference_windows:ref_end].mean())
    np.testing.assert_allclose(f["switch_lower"], want, atol=1e-12)
    # A family with both tails counts for its heavier tail only: no upper switch.
    assert np.nanmax(f["switch_upper"]) == 0.0
    eps = [e for e in sig.episodes if e.cause == "switch"]
    assert [e.tail for e in eps] == ["lower"]
    assert eps[0].onset == f["date"].iloc[int(np.argmax(want >= s.switch_entry))]
    assert eps[0].peak_tail_model == 0.5


# ------------------------------------------------------------------ settings and inputs
def test_settings_are_frozen_validated_and_keyed():
    s = SignalSettings()
    with pytest.raises(dataclasses.FrozenInstanceError):
        s.cusum_entry = 1.0
    assert s.key == SignalSettings().key
    assert s.key != SignalSettings(cusum_entry=5.25).key and s.key.endswith("/v2")
    assert SignalSettings(baseline=False).key != s.key
    with pytest.raises(ValueError, match="cusum_exit"):
        SignalSettings(cusum_exit=6.0)
    with pytest.raises(ValueError, match="cusum_cap"):
        SignalSettings(cusum_cap=4.0)
    with pytest.raises(ValueError, match="excess_hold"):
        SignalSettings(excess_gate=0.5, excess_hold=1.0)
    with pytest.raises(ValueError, match="entry_days"):
        SignalSettings(entry_days=0)
    with pytest.raises(TypeError, match="spike_entry"):
        SignalSettings(spike_entry="3")
    assert SignalSettings(window_entry=np.inf, window_exit=2.0).thresholds("window") == (
        np.inf, 2.0)


def test_bad_timelines_are_refused():
    frame = _timeline(5)
    with pytest.raises(InputError, match=r"missing column.*llr_lower"):
        pair_signals(frame.drop(columns=["llr_lower"]))
    with pytest.raises(InputError, match="strictly increasing"):
        pair_signals(frame.iloc[[0, 2, 1, 3, 4]])
    with pytest.raises(TypeError):
        pair_signals(frame.to_numpy())
    empty = pair_signals(frame.iloc[:0])
    assert len(empty.frame) == 0 and empty.episodes == ()
    assert set(REQUIRED_COLUMNS) <= set(frame.columns)


# ---------------------------------------------------------------------------- universe
def test_universe_summary_arithmetic():
    d = pd.to_datetime(["2024-01-02", "2024-01-03", "2024-01-04"])

    def frame(dates, alert_lower, alert_upper, tl, tu):
        return pd.DataFrame({
            "date": dates, "alert_lower": alert_lower, "alert_upper": alert_upper,
            "alert": np.maximum(alert_lower, alert_upper), "kendall_tau": 0.3,
            "tail_lower": tl, "tail_upper": tu, "tail_lower_emp": np.asarray(tl) + 0.1,
            "tail_upper_emp": np.asarray(tu) + 0.1})

    frames = {
        ("A", "B"): frame(d, [0, 1, 1], [0, 0, 1], [0.0, 0.2, 0.4], [0.0, 0.0, 0.1]),
        ("A", "C"): frame(d[1:], [0, 0], [1, 0], [0.6, 0.6], [0.3, 0.3]),  # starts later
        ("B", "C"): frame(d[[0, 2]], [0, 0], [0, 0], [0.0, 0.0], [0.0, 0.0]),  # a holiday
    }
    # Without carrying forward: each date counts the pairs with a window end that day.
    out = universe_summary(frames, stale_limit=0)
    assert out.index.tolist() == list(d)
    assert out["n_pairs"].tolist() == [2, 2, 3]
    assert out["n_carried"].tolist() == [0, 0, 0]
    assert out["n_alert"].tolist() == [0, 2, 1]
    np.testing.assert_allclose(out["share_alert"], [0.0, 1.0, 1 / 3])
    assert out["n_alert_lower"].tolist() == [0, 1, 1]
    assert out["n_alert_upper"].tolist() == [0, 1, 1]
    np.testing.assert_allclose(out["tail_lower"], [0.0, 0.4, (0.4 + 0.6 + 0.0) / 3])
    np.testing.assert_allclose(out["tail_upper_emp"], [0.1, 0.25, (0.2 + 0.4 + 0.1) / 3])
    assert universe_summary(list(frames.values()), stale_limit=0).equals(out)
    # Carried forward (the default): B/C's window of 01-02 counts on its holiday 01-03, with
    # its values and states of 01-02 (by hand: tau, tails and no alert).
    carried = universe_summary(frames)
    assert carried["n_pairs"].tolist() == [2, 3, 3]
    assert carried["n_carried"].tolist() == [0, 1, 0]
    assert carried["n_alert"].tolist() == [0, 2, 1]
    np.testing.assert_allclose(carried["share_alert"], [0.0, 2 / 3, 1 / 3])
    np.testing.assert_allclose(carried["tail_lower"], [0.0, (0.2 + 0.6 + 0.0) / 3,
                                                       (0.4 + 0.6 + 0.0) / 3])
    np.testing.assert_allclose(carried["tail_upper_emp"], [0.1, (0.1 + 0.4 + 0.1) / 3,
                                                           (0.2 + 0.4 + 0.1) / 3])
    # A limit of one date: a pair whose data stopped two dates ago no longer counts.
    stopped = {**frames, ("A", "B"): frames[("A", "B")].iloc[:1]}
    got = universe_summary(stopped, stale_limit=1)
    assert got["n_pairs"].tolist() == [2, 3, 2] and got["n_carried"].tolist() == [0, 2, 0]
    assert len(universe_summary({})) == 0
    with pytest.raises(InputError, match="missing column"):
        universe_summary([frames[("A", "B")].drop(columns=["alert"])])


# -------------------------------------------------------------------- continued computation
def _busy_timeline(n: int, seed: int) -> pd.DataFrame:
    """A hand-made timeline whose regime changes every 30 days among calm, a CUSUM drift, a
    jump of the empirical tail and a tail-dependent selected family, so that every cause
    opens and closes episodes (invented data)."""
    rng = np.random.default_rng(seed)
    regime = np.repeat(rng.integers(0, 4, n // 30 + 1), 30)[:n]
    drift = np.where(regime == 1, 0.25, -0.08)
    emp = 0.3 + 0.01 * rng.standard_normal(n) + 0.2 * (regime == 2)
    switched = regime == 3
    return _timeline(
        n, llr_lower=drift + 0.3 * rng.standard_normal(n),
        llr_upper=drift[::-1] + 0.3 * rng.standard_normal(n),
        tail_lower_emp=emp, tail_lower_emp_se=0.03,
        aic=np.where(switched, -70.0, -50.0), tail_lower=np.where(switched, 0.3, 0.0),
        tail_upper=np.where(switched[::-1], 0.2, 0.0))


BUSY = SignalSettings(**YARDSTICK, reference_windows=60, switch_windows=20, switch_entry=0.6,
                      switch_exit=0.3)


@pytest.mark.parametrize("seed", [0, 2, 3])
def test_continued_computation_equals_the_whole_timeline(seed):
    # The daily update continues each pair from a stored resume point instead of recomputing
    # its whole timeline. Chains of continuations (1 to 40 new rows at a time, resume points
    # 0 to 30 rows before the end, through a JSON round trip, with only context_rows rows
    # before each resume date) must give the whole timeline's states, statistics and
    # episodes: a property of the method (every statistic but the CUSUM looks a bounded
    # number of rows back), checked here against the plain computation.
    from monitor.stats.signals import Resume, context_rows

    rng = np.random.default_rng(seed)
    tl = _busy_timeline(1200, seed)
    full = pair_signals(tl, BUSY)
    causes = {e.cause for e in full.episodes}
    assert len(full.episodes) >= 10 and causes == {"divergence", "spike", "switch"}
    assert {e.tail for e in full.episodes} == {"lower", "upper"}
    context = context_rows(BUSY, WINDOW + 1)
    dates = tl["date"].to_numpy()
    k = 200
    sig = pair_signals(tl.iloc[:k], BUSY)
    continued_episodes = 0
    while k < len(tl):
        lag = min(int(rng.integers(0, 31)), len(sig.frame) - 1)
        res = Resume.from_dict(sig.resume_at(lag).to_dict())
        k2 = min(len(tl), k + int(rng.choice([1, 1, 2, 7, 40])))
        row = int(np.flatnonzero(dates == res.date.to_datetime64())[0])
        sig = pair_signals(tl.iloc[max(0, row - context + 1):k2], BUSY, resume=res)
        want = full.frame.iloc[row + 1:k2].reset_index(drop=True)
        for col in ("state_lower", "state_upper"):
            assert sig.frame[col].tolist() == want[col].tolist()
        for col in SIGNAL_COLUMNS:
            if not col.startswith("state"):
                np.testing.assert_allclose(sig.frame[col].to_numpy(float),
                                           want[col].to_numpy(float), rtol=0, atol=1e-12)
        # The episodes in alert on the resume date or later, as the prefix's plain computation
        # has them (the peak of a continued one is compared over its whole extent).
        prefix = pair_signals(tl.iloc[:k2], BUSY).episodes
        expect = [e for e in prefix if e.end is None or e.end >= res.date]
        assert [(e.tail, e.cause, e.onset, e.start, e.end, e.peak_date) for e in sig.episodes] \
            == [(e.tail, e.cause, e.onset, e.start, e.end, e.peak_date) for e in expect]
        np.testing.assert_allclose([e.peak_value for e in sig.episodes],
                                   [e.peak_value for e in expect], rtol=0, atol=1e-12)
        continued_episodes += len(res.episodes)
        k = k2
    assert continued_episodes > 0  # some resume points fell inside an episode


def test_resume_needs_its_date_and_enough_rows():
    from monitor.stats.signals import Resume

    tl = _busy_timeline(300, 0)
    res = pair_signals(tl.iloc[:200], BUSY).resume_at(0)
    assert isinstance(res, Resume) and res.date == tl["date"].iloc[199]
    with pytest.raises(InputError, match="resume date .* is not one of its window ends"):
        pair_signals(tl.iloc[210:], BUSY, resume=res)
    with pytest.raises(InputError, match="too few rows up to the resume date"):
        pair_signals(tl.iloc[197:], BUSY, resume=res)
    assert pair_signals(tl.iloc[:3], BUSY).resume_at(0) is None
    with pytest.raises(ValueError, match="lag must be >= 0"):
        pair_signals(tl, BUSY).resume_at(-1)


def test_cusum_continues_from_a_start_level():
    # Page (1954) recursion continued: S from a level equals the tail of the series whose
    # earlier increments led to that level.
    x = np.random.default_rng(4).normal(0.05, 1.0, 400)
    whole = cusum(x, 0.1, cap=5.0)
    np.testing.assert_allclose(cusum(x[150:], 0.1, cap=5.0, start=whole[149]), whole[150:],
                               rtol=0, atol=1e-12)
    with pytest.raises(ValueError, match="start must be in"):
        cusum(x, 0.1, cap=5.0, start=6.0)


def test_hysteresis_continues_an_open_spell():
    a = np.array([1, 1, 1, 0, 0, 0, 1, 1, 1, 1], bool)
    q = np.array([0, 0, 0, 1, 1, 0, 0, 0, 0, 0], bool)
    assert hysteresis(a, q, 3, 2) == [(2, 4), (8, None)]
    # Continuing from day 3 with the spell open: it closes on day 4, then reopens.
    assert hysteresis(a, q, 3, 2, start=3, open_at_start=True) == [(3, 4), (8, None)]
    assert hysteresis(a, q, 3, 2, start=5, open_at_start=False) == [(8, None)]
    with pytest.raises(ValueError, match="start must be in"):
        hysteresis(a, q, 3, 2, start=11)


# ------------------------------------------------------------------ the pair's own baseline
BASELINE_SEQUENTIAL = SignalSettings(reference_windows=100, baseline_min=20, baseline_z=2.0,
                                     cusum_reference=0.01, cusum_entry=5.0, cusum_exit=4.0,
                                     cusum_cap=6.0, window_entry=np.inf, spike_entry=np.inf,
                                     alert_min_tail=0.0)


def test_baseline_cusum_is_centred_on_the_reference_block_by_hand():
    # Page's recursion (Page 1954) on llr_t - c_t, where c_t = max(k, m + z s / sqrt(n)) and
    # m, s, n are the mean, standard deviation and count of the ratios of the reference block:
    # the reference_windows window ends before the current window's first day (the young
    # pair's first baseline_min window ends until that block holds as many).
    n = 400
    llr = np.random.default_rng(5).normal(0.06, 0.3, n)  # a standing heavy lower tail
    frame = _timeline(n, llr_lower=llr)
    s = BASELINE_SEQUENTIAL
    sig = pair_signals(frame, s)
    centre = np.full(n, np.nan)
    for i in range(n):
        ref_end = i - WINDOW + 1  # rows before this window's first day
        if i < s.baseline_min - 1:
            continue
        ref_end = max(ref_end, s.baseline_min)
        block = llr[max(0, ref_end - s.reference_windows):ref_end]
        centre[i] = max(s.cusum_reference,
                        block.mean() + s.baseline_z * block.std(ddof=1) / np.sqrt(block.size))
    want = cusum(np.where(np.isnan(centre), np.nan, llr - np.nan_to_num(centre)), 0.0,
                 s.cusum_cap)
    np.testing.assert_allclose(sig.frame["sequential_lower"], want, atol=1e-9)
    # The same ratios against the Gaussian yardstick (k only) climb to the cap: the standing
    # tail is an alert there, and not against its own baseline.
    yard = pair_signals(frame, dataclasses.replace(s, baseline=False))
    assert yard.frame["sequential_lower"].iloc[-100:].median() > s.cusum_exit
    assert yard.frame["alert_lower"].mean() > 0.5
    assert sig.frame["alert_lower"].sum() == 0


def test_baseline_cusum_flags_a_rise_against_the_own_history():
    n, change = 600, 400
    rng = np.random.default_rng(6)
    llr = np.where(np.arange(n) < change, rng.normal(0.06, 0.3, n), rng.normal(0.16, 0.3, n))
    sig = pair_signals(_timeline(n, llr_lower=llr), BASELINE_SEQUENTIAL)
    (ep,) = [e for e in sig.episodes if e.tail == "lower"]
    # Drift after the change at least 0.16 - (0.06 + 2 * 0.3 / 10) = 0.04 a day, so the level 5
    # is reached within about 125 days (a level already above 0 at the change shortens it).
    delay = int((sig.frame["date"] < ep.start).sum()) - change
    assert 0 < delay < 150


def test_spike_follows_the_excess_so_a_rise_of_tau_alone_is_no_spike():
    # Regression of the demo's false open episode (a bond pair whose tau rose from 0 to 0.45):
    # the empirical tail coefficient rose with the Gaussian value at the window's tau and
    # stayed above its own history, holding the spike statistic over its exit level. Against
    # the pair's own baseline the spike reads the excess over that Gaussian value instead.
    n = 500
    gauss_q = np.where(np.arange(n) < 300, 0.12, 0.45)
    emp = gauss_q + 0.02 * np.sin(np.arange(n))
    frame = _timeline(n, tail_lower_emp=emp, gauss_tail_q=gauss_q)
    only_spike = {"cusum_entry": np.inf, "window_entry": np.inf, "alert_min_tail": 0.0,
                  "reference_windows": 100}
    own = pair_signals(frame, SignalSettings(**only_spike))
    yard = pair_signals(frame, SignalSettings(**only_spike, baseline=False))
    assert np.nanmax(np.abs(own.frame["spike_lower"])) < 1.0
    assert own.episodes == ()
    assert np.nanmax(yard.frame["spike_lower"]) > 3.0 and len(yard.episodes) == 1


def test_no_episode_opens_on_a_tail_the_models_do_not_see():
    # The same strong evidence opens an episode only where the model-averaged tail
    # coefficient reaches alert_min_tail (0.1 by default); where the column is missing (an
    # older store) the selected family's coefficient stands in.
    n = 300
    frame = _timeline(n, llr_lower=np.full(n, 0.5), tail_lower=0.3,
                      tail_lower_avg=np.where(np.arange(n) < 150, 0.05, 0.3))
    s = dataclasses.replace(SEQUENTIAL_ONLY, alert_min_tail=0.1)
    sig = pair_signals(frame, s)
    (ep,) = sig.episodes
    assert ep.onset == frame["date"].iloc[150]
    old = pair_signals(frame.drop(columns="tail_lower_avg"), s)
    # The sum reaches the entry level 1 on the second day (0.5 a day from 0).
    assert old.episodes[0].onset == frame["date"].iloc[1]


def test_states_on_finds_the_run_covering_each_date_as_a_scan_of_the_runs_does():
    # Reference: for each row, a plain scan of its pair's runs of each tail for one with
    # first_date <= date <= last_date (runs of a pair and tail do not overlap).
    rng = np.random.default_rng(5)
    days = pd.bdate_range("2021-01-04", periods=120)
    pairs = [("ASH", "BEECH"), ("ASH", "CEDAR"), ("BEECH", "CEDAR"), ("ELM", "FIR")]
    runs = []
    for a, b in pairs[:3]:  # ELM/FIR has no runs at all
        for tail in ("lower", "upper"):
            cuts = np.sort(rng.choice(np.arange(1, 119), size=6, replace=False))
            for lo, hi in zip(cuts[:-1:2], cuts[1::2], strict=True):  # gaps between runs
                runs.append((a, b, tail, days[lo], days[hi], str(rng.choice(STATES))))
    runs = pd.DataFrame(runs, columns=["asset_a", "asset_b", "tail", "first_date",
                                       "last_date", "state"]).sample(frac=1, random_state=1)
    rows = pd.DataFrame([(a, b, d) for a, b in pairs for d in days[::3]],
                        columns=["asset_a", "asset_b", "date"]).sample(frac=1, random_state=2)
    got = states_on(runs, rows)
    assert list(got.index) == list(rows.index)
    for tail in ("lower", "upper"):
        want = []
        for a, b, d in rows.itertuples(index=False):
            cover = runs[(runs["asset_a"] == a) & (runs["asset_b"] == b) & (runs["tail"] == tail)
                         & (runs["first_date"] <= d) & (d <= runs["last_date"])]
            want.append(cover["state"].iloc[0] if len(cover) else None)
        assert got[f"state_{tail}"].tolist() == [w if w is not None else pd.NA for w in want]
    assert got["state_lower"].notna().sum() > 20  # the test covers hits and misses
    empty = states_on(runs.iloc[:0], rows)
    assert empty.isna().all().all() and len(empty) == len(rows)
