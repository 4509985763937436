"""What the Episodes page shows: alert episodes (open and past), the rules in force and the
alert outbox, as data frames and figures computable without the dashboard.

Episodes come from the store's ``episodes`` table under the view's signals key (written by
:func:`monitor.engine.pipeline.update_signals` from :func:`monitor.stats.signals.pair_signals`); the
duration of each is counted on the pair's own stored window ends. The rules are the
thresholds of :class:`monitor.stats.signals.SignalSettings` in force and the ``[alerts.email]``
settings, never a secret: the e-mail credentials are shown only as the *names* of the
environment variables that hold them. The outbox is the alert e-mail queue, a store table
named ``outbox``; until a store has it, :func:`read_outbox` returns an empty frame with the
documented columns.

>>> rules_table(SignalSettings()).loc[0, ["setting", "value"]].tolist()
['cusum_reference', '0.01']
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from types import MappingProxyType
from urllib.parse import quote

import numpy as np
import pandas as pd
import plotly.graph_objects as go

from monitor.common.errors import InputError
from monitor.common.palette import BLUE, MUTED, VERMILION, figure_layout
from monitor.config import EmailConfig
from monitor.data.store import Store
from monitor.stats.signals import CAUSES, TAILS, SignalSettings
from monitor.views.common import StoreView

__all__ = [
    "EPISODE_COLUMNS",
    "OUTBOX_COLUMNS",
    "OUTBOX_STATES",
    "RULE_COLUMNS",
    "TAIL_STYLE",
    "EpisodeFilter",
    "episode_frame",
    "episodes_figure",
    "filter_episodes",
    "monitored_pairs",
    "parse_episode_query",
    "read_outbox",
    "rules_table",
    "timeline_link",
]

#: Columns of :func:`episode_frame`, in order.
EPISODE_COLUMNS = (
    "pair", "asset_a", "asset_b", "tail", "status", "onset", "start", "end", "last_day",
    "duration_days", "cause", "statistic", "peak_date", "peak_value", "peak_kendall_tau",
    "peak_kendall_tau_se", "peak_tail_emp", "peak_tail_emp_se", "peak_tail_model",
    "peak_gauss_tail", "latest_date", "latest_value",
)

#: Documented columns of the alert outbox (the ``outbox`` store table, issue 6).
OUTBOX_COLUMNS = ("created", "pair", "tail", "rule", "kind", "event_date", "subject", "state",
                  "attempts", "last_error", "next_attempt", "sent_at")
#: States of an outbox row (a temporary failure stays pending, with its error and attempts;
#: "sending" while a sender holds it; "failed" when refused for good).
OUTBOX_STATES = ("pending", "sending", "sent", "failed")

#: Columns of :func:`rules_table`.
RULE_COLUMNS = ("group", "setting", "value", "meaning", "calibration")

#: How each tail is drawn: colour and marker differ both (colour-blind safe), plus a hatch.
TAIL_STYLE = MappingProxyType({
    "lower": {"colour": VERMILION, "symbol": "triangle-down", "pattern": "",
              "label": "lower tail (joint falls)"},
    "upper": {"colour": BLUE, "symbol": "triangle-up", "pattern": "/",
              "label": "upper tail (joint rises)"},
})

# The thresholds the calibration grid of tests/benchmarks/bench_detection.py varied; the
# others kept their designed values through the tuning.
_TUNED = frozenset({"cusum_entry", "cusum_exit", "cusum_cap", "window_entry", "window_exit",
                    "switch_entry", "baseline_z"})
_CALIBRATION_WINDOW = 250

_MEANINGS = MappingProxyType({
    "cusum_reference": "least nats taken off each day's log-likelihood ratio (Clayton or "
                       "survival Clayton against the Gaussian copula at the same Kendall's "
                       "tau) before it joins the sequential sum",
    "cusum_entry": "sequential sum at or above this is active evidence of tail divergence",
    "cusum_exit": "sequential sum below this is quiet",
    "cusum_cap": "ceiling of the sequential sum; bounds how long it takes to calm down",
    "window_entry": "window log-likelihood ratio, best tail-dependent family over the Gaussian, "
                    "at or above this is active evidence (against the own baseline: its rise "
                    "over the reference level, in standard deviations)",
    "window_exit": "window log-likelihood ratio below this is quiet",
    "excess_gate": "least standardised tail excess (empirical C(q,q)/q minus the Gaussian value "
                   "at the window's tau, over its s.e.) for the window ratio to open an episode",
    "excess_hold": "least standardised tail excess for the window ratio to keep an episode open",
    "spike_entry": "robust z-score of the empirical tail coefficient (against the own "
                   "baseline: of its excess over the Gaussian at the window's tau) against "
                   "the pair's own history at or above this is active",
    "spike_exit": "robust z-score below this is quiet",
    "reference_windows": "window ends in the pair's reference history (ending before the current "
                         "window starts, so no shared day)",
    "switch_min_tail": "least model tail coefficient for a window's selected family to count as "
                       "tail-dependent",
    "switch_aic_margin": "least AIC advantage over the Gaussian for that window to count",
    "switch_windows": "recent window ends whose share of tail-dependent selections is compared "
                      "with the reference share",
    "switch_entry": "rise of that share over the reference share at or above this is active",
    "switch_exit": "rise of that share below this is quiet",
    "entry_days": "consecutive days of active evidence before an episode opens (watch until "
                  "then)",
    "exit_days": "consecutive quiet days that close an episode",
    "alert_min_tail": "least model-averaged tail coefficient for an episode to open on that "
                      "tail (a tail no model sees is not alerted on)",
    "baseline": "1: each statistic measured against the pair's own history before the "
                "current window, so that a standing heavy tail is a level, not an alert; "
                "0: against the Gaussian copula at the window's tau",
    "baseline_z": "standard errors of the reference mean added to it to centre the "
                  "sequential sum",
    "baseline_min": "least reference window ends for a baseline; a young pair uses its first "
                    "ones until the block before its window holds as many",
})


# ------------------------------------------------------------------------------ episodes
def timeline_link(pair: str) -> str:
    """Address of the Timeline page of a pair.

    Parameters
    ----------
    pair : str
        ``"A/B"``.

    Returns
    -------
    str
        ``/timeline?pair=A/B``, the asset names percent-encoded (the slash kept).
    """
    return f"/timeline?pair={quote(pair, safe='/')}"


def monitored_pairs(view: StoreView) -> list[str]:
    """Every pair with stored metrics under the view's rolling key.

    Parameters
    ----------
    view : StoreView

    Returns
    -------
    list of str
        ``"A/B"``, sorted; read from the per-pair state table (one row a pair), not from the
        metrics themselves.
    """
    return sorted(f"{a}/{b}" for a, b in view.store.monitored_pairs(view.rolling_key))


def episode_frame(view: StoreView) -> pd.DataFrame:
    """Every stored episode under the view's signals key, with its duration.

    Parameters
    ----------
    view : StoreView
        Episodes are read under ``view.signals_key``; durations count the window ends stored
        under ``view.rolling_key``.

    Returns
    -------
    pandas.DataFrame
        :data:`EPISODE_COLUMNS`, one row per episode and tail, newest start first:
        ``pair`` (``"A/B"``), ``status`` (``"open"`` while the episode runs at the pair's last
        window end, else ``"ended"``), ``onset`` (first day of the evidence run that opened
        it), ``start`` (first day in alert), ``end`` (last day in alert; NaT while open),
        ``last_day`` (``end``, or the pair's latest window end while open), ``duration_days``,
        ``cause`` and ``statistic``, and at the peak of the evidence: ``peak_date``,
        ``peak_value`` (largest statistic-to-entry-threshold ratio), ``peak_kendall_tau``,
        ``peak_tail_emp`` (empirical C_n(q,q)/q or its upper analogue), ``peak_tail_model``
        (the selected family's coefficient) and ``peak_gauss_tail`` (the Gaussian copula's
        C(q,q)/q at the window's tau), with the standard errors the rolling engine stored
        for that window: ``peak_kendall_tau_se`` (influence function) and
        ``peak_tail_emp_se`` (binomial). ``latest_value`` is the evidence (the same ratio) on
        ``latest_date``: the newest window end while the episode is open, its end once it
        ended; beside the peak it says whether the evidence is still there (below 1: no
        statistic at its entry level any more). Both are empty in rows of an older store.

    Notes
    -----
    ``duration_days`` is the number of the pair's window ends from ``start`` to ``last_day``
    inclusive, i.e. the days the pair spent in alert in :func:`monitor.stats.signals.pair_signals`
    (at step 1 one window end per trading day the pair shares). One query counts them for
    all episodes at once, walking the metrics index over each episode's days only.
    """
    frame = view.store.read_episodes(view.signals_key)
    if frame.empty:
        return _empty(EPISODE_COLUMNS)
    counts = view.store.episode_durations(view.signals_key, view.rolling_key)
    frame = frame.merge(counts, on=["asset_a", "asset_b", "tail", "start"], how="left")
    for col in ("latest_date", "latest_value"):
        if col not in frame.columns:
            frame[col] = None
    for col in ("onset", "start", "end", "peak_date", "last_day", "latest_date"):
        frame[col] = pd.to_datetime(frame[col])
    frame["latest_value"] = pd.to_numeric(frame["latest_value"], errors="coerce").astype(float)
    frame["pair"] = frame["asset_a"].astype(str) + "/" + frame["asset_b"].astype(str)
    frame["status"] = np.where(frame["end"].isna(), "open", "ended")
    frame["duration_days"] = frame["duration_days"].fillna(0).astype(np.int64)
    for col in ("peak_kendall_tau_se", "peak_tail_emp_se"):  # NULL (not stored) -> NaN
        frame[col] = pd.to_numeric(frame[col], errors="coerce").astype(float)
    frame = frame.sort_values(["start", "pair", "tail"], ascending=[False, True, True])
    return frame[list(EPISODE_COLUMNS)].reset_index(drop=True)


def _iso(day) -> str:
    return "?" if pd.isna(day) else pd.Timestamp(day).strftime("%Y-%m-%d")


def _empty(columns) -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})


@dataclass(frozen=True, slots=True)
class EpisodeFilter:
    """Which episodes to show: one pair (None: all), and the tails and causes to keep."""

    pair: str | None = None
    tails: tuple[str, ...] = TAILS
    causes: tuple[str, ...] = CAUSES


def parse_episode_query(query: dict[str, str], pairs: list[str]) -> EpisodeFilter:
    """The filter asked for by the Episodes page's query string.

    Parameters
    ----------
    query : dict of str
        ``pair`` (``"A/B"``, one of ``pairs``), ``tail`` (``lower``, ``upper`` or ``both``)
        and ``cause`` (one of :data:`monitor.stats.signals.CAUSES` or ``all``); all optional.
    pairs : list of str
        The pairs the store knows (``"A/B"``).

    Returns
    -------
    EpisodeFilter

    Raises
    ------
    InputError
        For an unknown key, an unknown pair or a bad tail or cause, naming it.
    """
    unknown = sorted(set(query) - {"pair", "tail", "cause"})
    if unknown:
        raise InputError(f"query: unknown parameter {unknown[0]!r}; known: pair, tail, cause")
    pair = query.get("pair")
    if pair is not None:
        pair = pair.strip()
        if pair not in pairs:
            parts = [p.strip() for p in pair.split("/")]
            flipped = "/".join(parts[::-1])
            hint = (f" (stored as {flipped!r})" if flipped in pairs else
                    " (write it as A/B)" if len(parts) != 2 else "")
            raise InputError(f"query: pair={pair!r} is not a monitored pair{hint}")
    tails = TAILS
    if "tail" in query:
        tail = query["tail"].strip().lower()
        if tail not in (*TAILS, "both"):
            raise InputError(f"query: tail={query['tail']!r}; use lower, upper or both")
        tails = TAILS if tail == "both" else (tail,)
    causes = CAUSES
    if "cause" in query:
        cause = query["cause"].strip().lower()
        if cause not in (*CAUSES, "all"):
            raise InputError(f"query: cause={query['cause']!r}; use {', '.join(CAUSES)} or all")
        causes = CAUSES if cause == "all" else (cause,)
    return EpisodeFilter(pair, tails, causes)


def filter_episodes(frame: pd.DataFrame, flt: EpisodeFilter) -> pd.DataFrame:
    """The rows of an :func:`episode_frame` that pass a filter.

    Parameters
    ----------
    frame : pandas.DataFrame
        From :func:`episode_frame`.
    flt : EpisodeFilter
        With no tail (or no cause) to keep, nothing passes.

    Returns
    -------
    pandas.DataFrame
        The passing rows, in the frame's order, with a fresh index.
    """
    keep = (frame["tail"].isin(flt.tails) & frame["cause"].isin(flt.causes)).to_numpy()
    if flt.pair:
        keep = keep & (frame["pair"] == flt.pair).to_numpy()
    return frame[keep].reset_index(drop=True)


def episodes_figure(frame: pd.DataFrame, *, provenance: str = "") -> go.Figure:
    """Episodes over time: one row per pair, a bar from start to last day per episode.

    Parameters
    ----------
    frame : pandas.DataFrame
        Rows of :func:`episode_frame`.
    provenance : str
        Shown under the title (window, signal settings).

    Returns
    -------
    plotly.graph_objects.Figure
        Lower-tail episodes in vermilion, solid, with a downward triangle at the peak;
        upper-tail ones in blue, hatched, with an upward triangle: colour, fill and marker
        all tell the tails apart. Open episodes run to the pair's latest window end and carry
        an open circle there.
    """
    fig = go.Figure()
    pairs = sorted(frame["pair"].unique(), reverse=True) if len(frame) else []
    day = pd.Timedelta(days=1)
    for tail in TAILS:
        part = frame[frame["tail"] == tail]
        style = TAIL_STYLE[tail]
        if part.empty:
            continue
        start = pd.to_datetime(part["start"])
        # a one-day episode still gets a visible bar: it covers its whole last day
        stop = pd.to_datetime(part["last_day"]).fillna(start) + day
        width_ms = ((stop - start) / pd.Timedelta(milliseconds=1)).to_numpy()
        text = [f"{p} {tail} tail, {c} ({s})<br>{_iso(a)} to "
                f"{'now (open)' if st == 'open' else _iso(e)}, {d} day(s)"
                for p, c, s, a, e, st, d in zip(part["pair"], part["cause"], part["statistic"],
                                                start, part["last_day"], part["status"],
                                                part["duration_days"], strict=True)]
        fig.add_trace(go.Bar(
            y=part["pair"], x=width_ms, base=start.dt.strftime("%Y-%m-%d").tolist(),
            orientation="h", name=style["label"], legendgroup=tail, offsetgroup=tail,
            marker={"color": style["colour"], "line": {"color": style["colour"], "width": 1},
                    "pattern": {"shape": style["pattern"], "fgcolor": "#FFFFFF",
                                "bgcolor": style["colour"]}},
            hovertext=text, hoverinfo="text"))
        fig.add_trace(go.Scatter(
            y=part["pair"], x=pd.to_datetime(part["peak_date"]), mode="markers",
            name=f"peak, {tail} tail", legendgroup=tail, showlegend=True,
            marker={"symbol": style["symbol"], "size": 10, "color": "#FFFFFF",
                    "line": {"color": style["colour"], "width": 2}},
            customdata=np.column_stack([part["peak_value"], part["peak_tail_emp"],
                                        1.96 * part["peak_tail_emp_se"].astype(float),
                                        part["peak_gauss_tail"]]),
            hovertemplate="%{y} peak %{x|%Y-%m-%d}: evidence %{customdata[0]:.2f} x entry, "
                          "empirical tail %{customdata[1]:.3f} +- %{customdata[2]:.3f} (95%) "
                          "vs Gaussian %{customdata[3]:.3f}<extra></extra>"))
    open_ = frame[frame["status"] == "open"]
    if len(open_):
        fig.add_trace(go.Scatter(
            y=open_["pair"], x=pd.to_datetime(open_["last_day"]), mode="markers",
            name="still open", marker={"symbol": "circle-open", "size": 11, "color": MUTED,
                                       "line": {"width": 2}},
            hovertemplate="%{y}: open at %{x|%Y-%m-%d}<extra></extra>"))
    title = "Alert episodes per pair" + (f"<br><sup>{provenance}</sup>" if provenance else "")
    fig.update_layout(**figure_layout(
        title={"text": title, "x": 0, "font": {"size": 14}}, barmode="group",
        height=max(260, 140 + 34 * len(pairs)), bargap=0.3,
        legend={"orientation": "h", "y": -0.18 if len(pairs) > 3 else -0.35},
        margin={"l": 120, "r": 16, "t": 56 if provenance else 36, "b": 40}))
    fig.update_xaxes(type="date", title_text="date (window end)")
    fig.update_yaxes(type="category", categoryorder="array", categoryarray=pairs)
    if not pairs:
        fig.add_annotation(text="no episodes", showarrow=False, x=0.5, y=0.5, xref="paper",
                           yref="paper", font={"color": MUTED})
    return fig


# --------------------------------------------------------------------------------- rules
def rules_table(settings: SignalSettings, email: EmailConfig | None = None, *,
                window: int | None = None) -> pd.DataFrame:
    """The alert rules in force: every signal threshold and the e-mail settings.

    Parameters
    ----------
    settings : SignalSettings
        The thresholds that produced the stored episodes.
    email : EmailConfig, optional
        ``[alerts.email]``; its credentials appear only as the names of the environment
        variables that hold them (nothing is read from the environment).
    window : int, optional
        The rolling window of the store; named in the calibration column when it differs
        from the window the thresholds were tuned with (250).

    Returns
    -------
    pandas.DataFrame
        :data:`RULE_COLUMNS`; values as text. ``calibration`` says whether the grid of
        ``tests/benchmarks/bench_detection.py`` tuned a threshold (calibration seeds of the
        ``tail-shift`` and ``steady-pair`` scenarios, window 250, checked on separate
        evaluation seeds; docs/signals.md) or whether it kept its designed value.
    """
    if not isinstance(settings, SignalSettings):
        raise TypeError(f"settings must be SignalSettings, got {type(settings).__name__}")
    other = (f"; this store's window is {window}, so the tuned figures need not carry over"
             if window is not None and window != _CALIBRATION_WINDOW else "")
    rows = []
    for f in fields(settings):
        value = getattr(settings, f.name)
        tuned = f.name in _TUNED
        calib = (f"tuned on calibration seeds (window {_CALIBRATION_WINDOW}){other}" if tuned
                 else f"designed value, kept while the others were tuned{other}")
        if value != getattr(SignalSettings(), f.name):
            calib = "set by the configuration (not the calibrated default)"
        shown = ("yes" if value else "no") if isinstance(value, bool) else (
            "inf (statistic off)" if value == np.inf else f"{value:g}")
        rows.append({"group": _group(f.name), "setting": f.name, "value": shown,
                     "meaning": _MEANINGS[f.name], "calibration": calib})
    if email is not None:
        rows.extend(_email_rows(email))
    return pd.DataFrame(rows, columns=list(RULE_COLUMNS))


def _group(name: str) -> str:
    if name.startswith("cusum"):
        return "sequential divergence"
    if name.startswith(("window", "excess")):
        return "window divergence"
    if name.startswith("spike") or name == "reference_windows":
        return "tail spike"
    if name.startswith("switch"):
        return "family switch"
    if name.startswith("baseline") or name == "alert_min_tail":
        return "baseline and materiality"
    return "states"


def _email_rows(email: EmailConfig) -> list[dict]:
    def row(key: str, value: str, meaning: str) -> dict:
        return {"group": "alert e-mail", "setting": f"alerts.email.{key}", "value": value,
                "meaning": meaning, "calibration": "configuration"}

    def env(name: str) -> str:
        return f"${name}" if name else "(none)"

    off = "" if email.host else " (none configured: no alert e-mail can be delivered)"
    return [
        row("host", email.host or "(not set)", "SMTP server" + off),
        row("port", str(email.port), "SMTP port"),
        row("sender", email.sender or "(not set)", "From address"),
        row("recipients", ", ".join(email.recipients) or "(none)",
            f"{len(email.recipients)} recipient(s), one e-mail per episode"),
        row("starttls", str(email.starttls).lower(), "upgrade the connection with STARTTLS"),
        row("ssl", str(email.ssl).lower(), "connect over TLS from the start"),
        row("username_env", env(email.username_env),
            "environment variable holding the SMTP user name (its value is never shown)"),
        row("password_env", env(email.password_env),
            "environment variable holding the SMTP password (its value is never shown)"),
    ]


# -------------------------------------------------------------------------------- outbox
def read_outbox(store: Store, *, limit: int = 500) -> pd.DataFrame:
    """The alert e-mail queue (:data:`monitor.data.store.outbox`), newest first.

    Parameters
    ----------
    store : Store
    limit : int
        At most this many rows.

    Returns
    -------
    pandas.DataFrame
        :data:`OUTBOX_COLUMNS`: when queued, the pair ("A/B", empty for universe events),
        tail, rule and kind of event, its date, the subject, ``state`` (one of
        :data:`OUTBOX_STATES`), delivery attempts, the last error, the next attempt and when
        it was sent. The message bodies are not read.
    """
    if isinstance(limit, bool) or not isinstance(limit, int) or limit < 1:
        raise ValueError(f"limit must be a positive integer, got {limit!r}")
    frame = store.read_outbox(limit)
    pair = frame.pop("asset_a").fillna("") + "/" + frame.pop("asset_b").fillna("")
    frame.insert(1, "pair", pair.where(pair != "/", ""))
    return frame[list(OUTBOX_COLUMNS)]
