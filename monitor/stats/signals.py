"""Regime signals: from a pair's metrics timeline to tail states, alert episodes and a
universe summary.

Every function here is a pure function of stored timelines (the frames of
:func:`monitor.stats.rolling.pair_metrics`). The work is vectorised over the rows of a timeline;
Python loops run only over alert episodes. Every statistic but the CUSUM looks a bounded
number of window ends back, so a computation can continue from a :class:`Resume` point
(the CUSUM levels of a few window ends and the episodes open there) on the newest rows of
a timeline only, with the whole timeline's results: that is what the daily update does.

Method
------
For each tail (lower and upper) separately, four statistics are computed on every window end,
each against the pair's own *reference block*: the ``reference_windows`` window ends before
the current window's first day (no shared observation); a young pair uses its first
``baseline_min`` window ends until that block holds as many. ``baseline=False`` measures
against the Gaussian alone instead. Each statistic has an entry and a lower exit threshold;
in :class:`SignalSettings` they sit under the names given here.

``sequential`` (cause ``divergence``)
    A one-sided CUSUM (Page 1954) of the newest day's log-likelihood ratio of a
    tail-dependent copula against the Gaussian with the same Kendall's tau (columns
    ``llr_lower`` / ``llr_upper``: Clayton / survival Clayton), centred on the reference
    block: ``S_t = min(cap, max(0, S_{t-1} + llr_t - c_t))`` with
    ``c_t = max(k, m_t + z s_t / sqrt(n_t))`` (mean, standard deviation and count of the
    block's ratios). A standing heavy tail raises ``m_t`` with the ratios, so only a rise
    above the pair's own past makes ``S`` climb.
``window`` (cause ``divergence``)
    The window's likelihood evidence that the best tail-dependent candidate beats the
    Gaussian, ``w = loglik_best_tail - loglik_gauss``, as its rise over the block's median
    level ``L >= 0`` in standard deviations, ``(w - L) / sqrt(1 + 2 L)`` (a likelihood-ratio
    statistic's variance grows about twice as fast as its mean). It is read together with
    the finite-level excess ``excess_* = (lambda_emp(q) - C_Gauss(q, q)/q) / se``: it opens
    an episode only while the excess is at least ``excess_gate`` and keeps one open while it
    is at least ``excess_hold``. The gate tells the tails apart.
``spike`` (cause ``spike``)
    A robust z-score of the window's excess ``lambda_emp(q) - C_Gauss(q, q)/q`` against the
    block: ``(x_t - median_ref) / sqrt((IQR_ref / 1.349)^2 + se_t^2)``. The excess, not the
    tail coefficient, so that a rise of tau alone does not move it.
``switch`` (cause ``switch``; off by default)
    The share of the last ``switch_windows`` windows whose selected family is tail-dependent
    in that tail (coefficient at least ``switch_min_tail``, no smaller than in the other
    tail, AIC at least ``switch_aic_margin`` better than the Gaussian's), minus that share in
    the block.

No episode opens on a tail whose model-averaged coefficient (``tail_*_avg``; the selected
family's where that is missing) is below ``alert_min_tail``.

State machine, per tail, with hysteresis: a statistic is *active* on a day when it is at or
above its entry threshold and *quiet* when it is below its exit threshold (missing values
are quiet; a statistic switched off is always quiet). The states are ``calm``, ``watch`` and
``alert``:

- ``watch``: some statistic is active, but not yet for ``entry_days`` days in a row;
- ``alert``: an episode opens on the ``entry_days``-th consecutive day with an active
  statistic. It closes on the ``exit_days``-th consecutive day on which every statistic is
  quiet; that day is calm again.

The ``alert`` column is 1 while either tail is in an episode. An :class:`Episode` records the
tail and its cause: the cause active on most days of the opening run, ties going to
divergence, then spike, then switch. It also records the first day of that run (``onset``),
``start`` (the first alert day), ``end`` (the last alert day, ``None`` while open), and the
peak of the evidence, i.e. the largest statistic-to-entry-threshold ratio during the episode.

Calibration of the defaults: docs/signals.md, 'Calibration' and 'Precision on the demo'.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from monitor.common.arrays import read_only
from monitor.common.errors import InputError

__all__ = [
    "CAUSES",
    "EARLIER_DEFAULTS",
    "IQR_TO_SIGMA",
    "REQUIRED_COLUMNS",
    "SIGNAL_COLUMNS",
    "STATES",
    "STATISTICS",
    "TAILS",
    "Episode",
    "PairSignals",
    "Resume",
    "SignalSettings",
    "carry_rows",
    "context_rows",
    "cusum",
    "hysteresis",
    "pair_signals",
    "robust_z_against_history",
    "state_runs",
    "states_on",
    "universe_summary",
]

TAILS = ("lower", "upper")
#: Pair states, in order of severity.
STATES = ("calm", "watch", "alert")
CAUSES = ("divergence", "spike", "switch")
#: Signal statistics and the cause each one reports; their order breaks ties between causes.
STATISTICS: Mapping[str, str] = MappingProxyType({
    "sequential": "divergence", "window": "divergence", "spike": "spike", "switch": "switch"})

#: Timeline columns the signals read.
REQUIRED_COLUMNS = (
    "date", "start", "kendall_tau", "aic", "aic_gauss", "loglik_gauss", "tail_lower",
    "tail_upper", "tail_lower_emp", "tail_upper_emp", "tail_lower_emp_se", "tail_upper_emp_se",
    "gauss_tail_q", "loglik_best_lower", "loglik_best_upper", "llr_lower", "llr_upper",
)

#: Columns :func:`pair_signals` adds to a timeline (``{t}`` is ``lower`` or ``upper``).
SIGNAL_COLUMNS = (
    *(f"{name}_{t}" for t in TAILS
      for name in ("excess", "window", "sequential", "spike", "switch", "evidence", "state",
                   "alert")),
    "alert",
)

#: Normal-consistency constant of the interquartile range: IQR of N(0, 1) = 2 * 0.6745.
IQR_TO_SIGMA = 1.3489795003921634


@dataclass(frozen=True, slots=True)
class SignalSettings:
    """Every threshold of the regime signals (calibration of the defaults: docs/signals.md,
    'Calibration').

    Parameters
    ----------
    cusum_reference : float
        Reference value ``k`` subtracted from each day's log-likelihood ratio (nats); a
        margin against model error of the plug-in ratio. 0 is Page's likelihood-ratio CUSUM.
    cusum_entry, cusum_exit : float
        Entry level ``h`` and exit level of the CUSUM (nats), ``0 <= exit <= entry``.
    cusum_cap : float
        Ceiling of the CUSUM, at least ``cusum_entry``; bounds the time to recover.
    window_entry, window_exit : float
        Thresholds of the window log-likelihood ratio, best tail family against Gaussian.
    excess_gate, excess_hold : float
        Least standardised finite-level tail excess for the window statistic to open an
        episode, and to keep one open (``excess_hold <= excess_gate``).
    spike_entry, spike_exit : float
        Thresholds of the robust z-score of the empirical tail coefficient.
    reference_windows : int
        Window ends in the trailing, non-overlapping reference (a year at step 1).
    switch_min_tail : float
        Least model tail coefficient for a window to count as tail-dependent.
    switch_aic_margin : float
        Least AIC advantage over the Gaussian for that window to count.
    switch_windows : int
        Recent window ends whose share is compared with the reference share.
    switch_entry, switch_exit : float
        Thresholds of that difference of shares, at most 1.
    entry_days, exit_days : int
        Consecutive days a statistic must be active to open an episode, and consecutive days
        every statistic must be quiet to close it.
    alert_min_tail : float
        Least model-averaged tail coefficient for an episode to open on that tail.
    baseline : bool
        Measure the statistics against the pair's reference block (True) or against the
        Gaussian at the window's tau alone (False).
    baseline_z : float
        Standard errors of the block's mean ratio added to it to centre the CUSUM.
    baseline_min : int
        Least window ends of a reference block, at most ``reference_windows``.

    Notes
    -----
    An entry threshold of ``inf`` switches its statistic off: it neither opens nor holds an
    episode.
    """

    cusum_reference: float = 0.01
    cusum_entry: float = 5.0
    cusum_exit: float = 4.0
    cusum_cap: float = 5.5
    window_entry: float = 8.0
    window_exit: float = 6.0
    excess_gate: float = 1.0
    excess_hold: float = 1.0
    spike_entry: float = 3.0
    spike_exit: float = 1.5
    reference_windows: int = 500
    switch_min_tail: float = 0.1
    switch_aic_margin: float = 10.0
    switch_windows: int = 60
    switch_entry: float = np.inf
    switch_exit: float = 0.5
    entry_days: int = 3
    exit_days: int = 5
    alert_min_tail: float = 0.1
    baseline: bool = True
    baseline_z: float = 3.5
    baseline_min: int = 20

    def __post_init__(self) -> None:
        if not isinstance(self.baseline, bool | np.bool_):
            raise TypeError(f"baseline must be True or False, got {self.baseline!r}")
        for name in ("reference_windows", "switch_windows", "entry_days", "exit_days",
                     "baseline_min"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 1:
                raise ValueError(f"{name} must be an integer >= 1, got {value!r}")
        for name in ("cusum_reference", "cusum_entry", "cusum_exit", "cusum_cap",
                     "window_entry", "window_exit", "excess_gate", "excess_hold",
                     "spike_entry", "spike_exit", "switch_min_tail", "switch_aic_margin",
                     "switch_entry", "switch_exit", "baseline_z", "alert_min_tail"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | float | np.floating):
                raise TypeError(f"{name} must be a number, got {type(value).__name__}")
            # An infinite entry threshold switches that statistic off.
            if not (np.isfinite(value) or (name.endswith("_entry") and value == np.inf)):
                raise ValueError(f"{name} must be finite, got {value!r}")
        for stat in ("cusum", "window", "spike", "switch"):
            entry, exit_ = getattr(self, f"{stat}_entry"), getattr(self, f"{stat}_exit")
            if exit_ > entry:
                raise ValueError(f"{stat}_exit ({exit_}) must not exceed {stat}_entry ({entry})")
        if self.excess_hold > self.excess_gate:
            raise ValueError(f"excess_hold ({self.excess_hold}) must not exceed excess_gate "
                             f"({self.excess_gate})")
        if self.cusum_exit < 0 or self.cusum_entry <= 0:
            raise ValueError("cusum_entry must be > 0 and cusum_exit >= 0")
        if np.isfinite(self.cusum_entry) and self.cusum_cap < self.cusum_entry:
            raise ValueError(f"cusum_cap ({self.cusum_cap}) must be at least cusum_entry "
                             f"({self.cusum_entry})")
        if not (0 < self.switch_entry <= 1 or self.switch_entry == np.inf):
            raise ValueError(f"switch_entry must be in (0, 1] or inf, got {self.switch_entry}")
        for name in ("window_entry", "spike_entry"):
            if getattr(self, name) <= 0:
                raise ValueError(f"{name} must be > 0, got {getattr(self, name)}")
        if self.baseline_z < 0:
            raise ValueError(f"baseline_z must be >= 0, got {self.baseline_z}")
        if self.baseline_min > self.reference_windows:
            raise ValueError(f"baseline_min ({self.baseline_min}) must not exceed "
                             f"reference_windows ({self.reference_windows})")

    @property
    def key(self) -> str:
        """Stable key naming these settings, e.g. for stored states and episodes."""
        base = (f"base{self.baseline_z:g}:min{self.baseline_min}" if self.baseline
                else "gaussian") + f":material{self.alert_min_tail:g}"
        return (f"cusum{self.cusum_reference:g}:{self.cusum_entry:g}-{self.cusum_exit:g}"
                f":cap{self.cusum_cap:g}/window{self.window_entry:g}-{self.window_exit:g}"
                f":gate{self.excess_gate:g}-{self.excess_hold:g}"
                f"/spike{self.spike_entry:g}-{self.spike_exit:g}:ref{self.reference_windows}/switch{self.switch_entry:g}-"
                f"{self.switch_exit:g}:tail{self.switch_min_tail:g}:aic"
                f"{self.switch_aic_margin:g}:last{self.switch_windows}/days"
                f"{self.entry_days}-{self.exit_days}/{base}/v2")

    def thresholds(self, statistic: str) -> tuple[float, float]:
        """(entry, exit) thresholds of a statistic named in :data:`STATISTICS`."""
        if statistic not in STATISTICS:
            raise ValueError(f"unknown statistic {statistic!r}; known: {', '.join(STATISTICS)}")
        prefix = "cusum" if statistic == "sequential" else statistic
        return getattr(self, f"{prefix}_entry"), getattr(self, f"{prefix}_exit")


#: Comparison settings: every statistic against the Gaussian at the window's tau
#: (``baseline=False``), with thresholds of its own. For comparisons (benchmarks, tests), not
#: for monitoring; the "before" column of docs/signals.md, 'Calibration'.
EARLIER_DEFAULTS = SignalSettings(baseline=False, cusum_entry=4.75, cusum_exit=3.5,
                                  cusum_cap=5.25, window_entry=8.0, window_exit=6.0,
                                  reference_windows=250, switch_entry=0.9, alert_min_tail=0.0)


@dataclass(frozen=True, slots=True)
class Episode:
    """One alert episode of one tail of a pair.

    Attributes
    ----------
    tail : {"lower", "upper"}
    cause : {"divergence", "spike", "switch"}
    statistic : str
        The statistic behind the cause (a key of :data:`STATISTICS`).
    onset : Timestamp
        First day of the run of active evidence that opened the episode.
    start : Timestamp
        First day in alert (the ``entry_days``-th day of that run).
    end : Timestamp or None
        Last day in alert; ``None`` while the episode is open.
    peak_date : Timestamp
        Day of the largest evidence during the episode.
    peak_value : float
        That evidence: the largest ratio of a statistic to its entry threshold (>= 1).
    peak_tail_emp, peak_tail_model, peak_gauss_tail, peak_kendall_tau : float
        On the peak day: the empirical tail coefficient C_n(q,q)/q (or its upper analogue),
        the selected family's tail coefficient, the Gaussian C(q,q)/q at the window's tau, and
        Kendall's tau.
    """

    tail: str
    cause: str
    statistic: str
    onset: pd.Timestamp
    start: pd.Timestamp
    end: pd.Timestamp | None
    peak_date: pd.Timestamp
    peak_value: float
    peak_tail_emp: float
    peak_tail_model: float
    peak_gauss_tail: float
    peak_kendall_tau: float

    @property
    def is_open(self) -> bool:
        """Whether the episode is still running at the end of the timeline."""
        return self.end is None

    def to_dict(self) -> dict[str, object]:
        """JSON-ready form: dates as ``YYYY-MM-DD`` (``end`` ``None`` while open)."""
        def iso(d: pd.Timestamp | None) -> str | None:
            return None if d is None else d.strftime("%Y-%m-%d")

        return {"tail": self.tail, "cause": self.cause, "statistic": self.statistic,
                "onset": iso(self.onset), "start": iso(self.start), "end": iso(self.end),
                "peak_date": iso(self.peak_date), "peak_value": self.peak_value,
                "peak_tail_emp": self.peak_tail_emp, "peak_tail_model": self.peak_tail_model,
                "peak_gauss_tail": self.peak_gauss_tail,
                "peak_kendall_tau": self.peak_kendall_tau}


@dataclass(frozen=True, slots=True)
class PairSignals:
    """Signals of one pair: the timeline with the :data:`SIGNAL_COLUMNS` added, its episodes
    (in start order, both tails) and the settings that produced them. ``resumed_from`` is
    the :class:`Resume` a continued computation started from (None for a whole timeline).
    """

    frame: pd.DataFrame
    episodes: tuple[Episode, ...]
    settings: SignalSettings = field(default_factory=SignalSettings)
    resumed_from: Resume | None = None

    def episodes_frame(self) -> pd.DataFrame:
        """The episodes as a table, one row each (columns are :class:`Episode`'s fields)."""
        cols = list(Episode.__slots__)
        return pd.DataFrame([[getattr(e, c) for c in cols] for e in self.episodes],
                            columns=cols)

    def resume_at(self, lag: int) -> Resume | None:
        """The point the next computation can continue from: ``lag`` window ends before the
        last row of ``frame`` (None when the frame is too short for it).

        Parameters
        ----------
        lag : int
            Window ends between the resume date and the end of the frame (>= 0). The next
            computation returns its frame from the row after the resume date, so ``lag``
            bounds from below the rows it can report without new data.
        """
        if lag < 0:
            raise ValueError(f"lag must be >= 0, got {lag}")
        m = carry_rows(self.settings)
        row = len(self.frame) - 1 - lag
        # The levels before the frame's first row: those a continued computation carried.
        carried = self.resumed_from
        before = 0 if carried is None else m
        if row < 0 or row - m + 1 < -before:
            return None
        date = pd.Timestamp(self.frame["date"].iloc[row])
        levels = {}
        for t in TAILS:
            seq = self.frame[f"sequential_{t}"].to_numpy(dtype=float)
            if carried is not None:
                seq = np.concatenate([carried.cusum[t], seq])
            levels[t] = tuple(float(x) for x in seq[row + before - m + 1:row + before + 1])
        open_ = tuple(e for e in self.episodes
                      if e.start <= date and (e.end is None or e.end >= date))
        return Resume(date, MappingProxyType(levels), open_)


def carry_rows(settings: SignalSettings) -> int:
    """Window ends of CUSUM levels a :class:`Resume` carries: enough for every run of
    active or quiet days that a later decision can depend on."""
    return max(settings.entry_days, settings.exit_days)


@dataclass(frozen=True, slots=True)
class Resume:
    """Where a pair's signals continue from, so that a daily update computes only its new
    window ends (see :func:`pair_signals`).

    Attributes
    ----------
    date : Timestamp
        A window end already computed. A continued computation takes its decisions from
        the window end after it.
    cusum : mapping of tail -> tuple of float
        The CUSUM (``sequential_*``) on the last :func:`carry_rows` window ends up to and
        including ``date``.
    episodes : tuple of Episode
        The episodes open on ``date`` (at most one per tail); a tail is in alert on
        ``date`` exactly when one of them is its own. Their peak is over at least their
        days up to ``date``.
    """

    date: pd.Timestamp
    cusum: Mapping[str, tuple[float, ...]]
    episodes: tuple[Episode, ...] = ()

    def to_dict(self) -> dict[str, object]:
        """JSON-ready form (the inverse of :meth:`from_dict`)."""
        return {"date": self.date.strftime("%Y-%m-%d"),
                "cusum": {t: list(self.cusum[t]) for t in TAILS},
                "episodes": [e.to_dict() for e in self.episodes]}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Resume:
        """Rebuild from :meth:`to_dict`'s form (as decoded from JSON)."""
        def day(x: object) -> pd.Timestamp | None:
            return None if x is None else pd.Timestamp(str(x))

        eps = []
        for e in data["episodes"]:
            fields = dict(e)
            for k in ("onset", "start", "end", "peak_date"):
                fields[k] = day(fields[k])
            eps.append(Episode(**fields))
        return cls(pd.Timestamp(str(data["date"])),
                   MappingProxyType({t: tuple(float(x) for x in data["cusum"][t])
                                     for t in TAILS}), tuple(eps))


# ----------------------------------------------------------------------- building blocks
def cusum(increments: ArrayLike, reference: float = 0.0, cap: float = np.inf,
          start: float = 0.0) -> NDArray[np.float64]:
    """One-sided CUSUM ``S_t = min(cap, max(0, S_{t-1} + x_t - k))`` from ``S_0 = start``.

    Parameters
    ----------
    increments : array_like
        The per-day scores ``x_t`` along the last axis (a batch of series may lead); NaN
        counts as "no observation" and leaves ``S`` unchanged that day.
    reference : float
        Reference value (drift allowance) ``k``.
    cap : float
        Ceiling (``inf`` for none); must be >= 0.
    start : float
        The level before the first increment, in ``[0, cap]`` (0 for a fresh start; a
        stored level to continue a series).

    Returns
    -------
    ndarray
        ``S_t`` for every t, same shape as ``increments`` (read-only).

    Notes
    -----
    Page (1954), "Continuous inspection schemes", *Biometrika* 41, 100-115. The recursion is
    evaluated without a loop over days. The lower reflection alone is the Lindley recursion:
    from a level ``L``, with partial sums ``W_t`` of ``x - k``,
    ``S_t = L + W_t - min(0, L + min_{r<=t} W_r)``. The upper reflection is the mirror image,
    ``S_t = L + W_t - max(0, L + max_{r<=t} W_r - cap)``. The two alternate, each running
    until the path first hits the other barrier, so the loop runs once per crossing between
    0 and the cap.

    Examples
    --------
    >>> cusum([1.0, -0.5, 2.0, -4.0, 1.0], reference=0.5).tolist()
    [0.5, 0.0, 1.5, 0.0, 0.5]
    """
    x = np.asarray(increments, dtype=float)
    if x.ndim == 0:
        raise ValueError("increments must have at least one axis (days)")
    if not np.isfinite(reference) or not cap >= 0:
        raise ValueError(f"reference must be finite and cap >= 0, got {reference}, {cap}")
    if not 0.0 <= start <= cap:
        raise ValueError(f"start must be in [0, cap], got {start}")
    steps = np.where(np.isnan(x), 0.0, x - reference)
    if steps.size == 0:
        return read_only(steps)
    flat = steps.reshape(-1, steps.shape[-1])
    out = np.empty_like(flat)
    for row in range(flat.shape[0]):
        out[row] = _reflected_path(flat[row], float(cap), float(start))
    return read_only(out.reshape(x.shape))


def _reflected_path(steps: NDArray[np.float64], cap: float, start: float
                    ) -> NDArray[np.float64]:
    n = steps.size
    out = np.empty(n)
    pos, level, lower = 0, start, True
    while pos < n:
        w = np.cumsum(steps[pos:])
        if lower:
            path = level + w - np.minimum(0.0, level + np.minimum.accumulate(w))
            hit = np.flatnonzero(path > cap)
        else:
            path = level + w - np.maximum(0.0, level + np.maximum.accumulate(w) - cap)
            hit = np.flatnonzero(path < 0.0)
        stop = hit[0] if hit.size else path.size
        out[pos:pos + stop] = path[:stop]
        if not hit.size:
            break
        # The crossing day sits on the barrier just hit; the other reflection starts there.
        level = cap if lower else 0.0
        out[pos + stop] = level
        pos += stop + 1
        lower = not lower
    return out


def _run_lengths(flags: NDArray[np.bool_]) -> NDArray[np.int64]:
    """Length of the run of True ending at each position (0 where False)."""
    idx = np.arange(flags.size)
    last_false = np.maximum.accumulate(np.where(flags, -1, idx))
    return np.where(flags, idx - last_false, 0)


def hysteresis(active: ArrayLike, quiet: ArrayLike, entry_days: int, exit_days: int, *,
               start: int = 0, open_at_start: bool = False) -> list[tuple[int, int | None]]:
    """Alert spells from daily flags: open after ``entry_days`` active days in a row, close
    after ``exit_days`` quiet days in a row.

    Parameters
    ----------
    active, quiet : array_like of bool
        Per day: evidence at or above the entry level; evidence below the exit level. A day
        may be neither (between the levels) but not both.
    entry_days, exit_days : int
        Persistence needed to open and to close (>= 1).
    start : int
        First day on which spells may open or close; the days before only count towards
        the runs of active and quiet days (to continue a series, they must include the last
        ``max(entry_days, exit_days) - 1`` days before ``start``).
    open_at_start : bool
        Whether a spell is open on the day before ``start``; it is returned first, as
        ``(start, closing_day)``.

    Returns
    -------
    list of (int, int or None)
        ``(first_alert_day, closing_day)`` positions; the closing day is the first day back
        out of alert (``None`` while still open at the end).

    Notes
    -----
    A two-level (Schmitt-trigger) rule with persistence counts. The runs of active and of
    quiet days are computed for the whole series at once. Since no day is both active and
    quiet, a run that opens an episode cannot have started before the previous closing day.
    So the loop runs once per episode.

    Examples
    --------
    >>> a = [0, 1, 1, 1, 0, 0, 0, 0, 1, 0]
    >>> q = [1, 0, 0, 0, 1, 1, 0, 1, 0, 1]
    >>> hysteresis(a, q, 3, 2)
    [(3, 5)]
    """
    a = np.asarray(active, dtype=bool)
    q = np.asarray(quiet, dtype=bool)
    if a.shape != q.shape or a.ndim != 1:
        raise ValueError("active and quiet must be 1-D and of equal length")
    if (a & q).any():
        raise ValueError("a day cannot be both active and quiet")
    if entry_days < 1 or exit_days < 1:
        raise ValueError("entry_days and exit_days must be >= 1")
    if not 0 <= start <= a.size:
        raise ValueError(f"start must be in [0, {a.size}], got {start}")
    opens = np.flatnonzero(_run_lengths(a) >= entry_days)
    closes = np.flatnonzero(_run_lengths(q) >= exit_days)
    spells: list[tuple[int, int | None]] = []
    after = start
    if open_at_start:
        j = np.searchsorted(closes, start)
        if j == closes.size:
            return [(start, None)]
        spells.append((start, int(closes[j])))
        after = int(closes[j]) + 1
    while True:
        i = np.searchsorted(opens, after)
        if i == opens.size:
            return spells
        first = int(opens[i])
        j = np.searchsorted(closes, first, side="right")
        if j == closes.size:
            spells.append((first, None))
            return spells
        close = int(closes[j])
        spells.append((first, close))
        after = close + 1


def _at_reference(rolled: NDArray[np.float64], reference_end: NDArray[np.intp]
                  ) -> NDArray[np.float64]:
    """A trailing statistic read at each row's reference block: the value the rolling
    computation has on the row before ``reference_end`` (NaN where there is none)."""
    end = reference_end - 1
    return np.where(end >= 0, rolled[np.maximum(end, 0)], np.nan)


def robust_z_against_history(values: ArrayLike, se: ArrayLike, reference_end: ArrayLike,
                             length: int) -> NDArray[np.float64]:
    """Robust z-score of each value against a trailing block of the same series.

    Parameters
    ----------
    values : array_like
        The series ``x`` (one value per window end).
    se : array_like
        Standard error of each value.
    reference_end : array_like of int
        For each position, one past the last position of its reference block; the block is
        the ``length`` positions before it.
    length : int
        Reference length; positions with a shorter history get NaN.

    Returns
    -------
    ndarray
        ``(x_t - median_ref) / sqrt((IQR_ref / 1.349)^2 + se_t^2)``, read-only.

    Notes
    -----
    The median and the interquartile range scaled to a normal standard deviation
    (IQR / 1.349) are the usual robust location and scale (common practice). The s.e. in the
    denominator keeps the score finite when the history is flat, and it stands for the
    current value's own sampling error, which the spread of a block of overlapping windows
    understates.
    """
    x = pd.Series(np.asarray(values, dtype=float))
    roll = x.rolling(length, min_periods=length)  # NaN where the block is short
    end = np.asarray(reference_end, dtype=np.intp)
    med = _at_reference(roll.median().to_numpy(), end)
    iqr = _at_reference((roll.quantile(0.75) - roll.quantile(0.25)).to_numpy(), end)
    scale = np.sqrt((iqr / IQR_TO_SIGMA) ** 2 + np.asarray(se, dtype=float) ** 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(scale > 0, (x.to_numpy() - med) / scale, np.nan)
    return read_only(z)


# ----------------------------------------------------------------------------- one pair
def _check_timeline(timeline: pd.DataFrame) -> pd.DataFrame:
    if not isinstance(timeline, pd.DataFrame):
        raise TypeError(f"timeline must be a pandas DataFrame, got {type(timeline).__name__}")
    missing = [c for c in REQUIRED_COLUMNS if c not in timeline.columns]
    if missing:
        raise InputError(f"timeline: missing column(s) {', '.join(missing)}")
    frame = timeline.reset_index(drop=True)
    for col in ("date", "start"):
        if frame[col].dtype.kind != "M":
            frame[col] = pd.to_datetime(frame[col])
    dates = frame["date"].to_numpy()
    down = np.flatnonzero(dates[1:] <= dates[:-1])
    if down.size:
        bad = int(down[0] + 1)
        raise InputError(f"timeline: dates must be strictly increasing (row {bad}, "
                         f"{frame['date'].iloc[bad].date()})")
    return frame


def _tail_statistics(frame: pd.DataFrame, tail: str, s: SignalSettings,
                     reference_end: NDArray[np.intp], resume_row: int,
                     carried: tuple[float, ...]
                     ) -> tuple[dict[str, NDArray[np.float64]], NDArray[np.bool_]]:
    """The statistics of one tail on every row (``excess`` and the :data:`STATISTICS`), and
    where the tail is material (model-averaged coefficient at least ``alert_min_tail``)."""
    def num(name: str) -> NDArray[np.float64]:
        col = frame[name]
        if col.dtype.kind == "f":  # as stored: no conversion needed
            return col.to_numpy()
        return pd.to_numeric(col, errors="coerce").to_numpy(dtype=float, na_value=np.nan)

    emp, se = num(f"tail_{tail}_emp"), num(f"tail_{tail}_emp_se")
    with np.errstate(divide="ignore", invalid="ignore"):
        diff = emp - num("gauss_tail_q")
        # Where the binomial s.e. is 0 the estimate is 0 (no joint exceedance): no excess.
        excess = np.where(se > 0, diff / se, np.where(diff > 0, np.inf, 0.0))
    window = num(f"loglik_best_{tail}") - num("loglik_gauss")
    llr = num(f"llr_{tail}")
    if s.baseline:
        # Against the pair's own reference block (window ends before the current window's
        # first day): the CUSUM's centre, the window ratio's level and the excess's history.
        def trailing(x: NDArray[np.float64]) -> pd.core.window.Rolling:
            return pd.Series(x).rolling(s.reference_windows, min_periods=s.baseline_min)

        # A young pair's reference is its first baseline_min window ends, until the block
        # before the current window holds that many; before that there is none.
        rows = np.arange(llr.size)
        ref_end = np.where(rows >= s.baseline_min - 1,
                           np.maximum(reference_end, s.baseline_min), 0)
        roll = trailing(llr)
        mean, sd, count = (_at_reference(r.to_numpy(), ref_end)
                           for r in (roll.mean(), roll.std(), roll.count()))
        with np.errstate(invalid="ignore"):
            centre = np.maximum(s.cusum_reference, mean + s.baseline_z * sd / np.sqrt(count))
        level = _at_reference(
            trailing(np.where(np.isfinite(window), window, np.nan)).median().to_numpy(),
            ref_end)
        # In standard deviations: a likelihood-ratio statistic's variance grows about
        # twice as fast as its mean (twice the log ratio is noncentral chi-square, mean
        # k + lambda, variance 2k + 4 lambda; from memory), so a heavy-tailed baseline moves
        # more from window to window. NaN (no evidence) until a level exists.
        floor = np.maximum(level, 0.0)
        window = (window - floor) / np.sqrt(1.0 + 2.0 * floor)
        spike_of = diff
    else:
        centre = np.full(llr.size, s.cusum_reference)
        spike_of = emp
    steps = llr - centre
    if carried:
        # Continued: the carried levels up to the resume row, the recursion after it.
        sequential = np.full(llr.size, np.nan)
        sequential[resume_row - len(carried) + 1:resume_row + 1] = carried
        sequential[resume_row + 1:] = cusum(steps[resume_row + 1:], 0.0, s.cusum_cap,
                                            start=carried[-1])
    else:
        sequential = np.asarray(cusum(steps, 0.0, s.cusum_cap))
    spike = np.asarray(robust_z_against_history(spike_of, se, reference_end,
                                                s.reference_windows))
    other = "upper" if tail == "lower" else "lower"
    model = num(f"tail_{tail}")
    # A family with both tails counts for the heavier one only (both when equal, as for t).
    counts = ((model >= s.switch_min_tail) & (model >= num(f"tail_{other}"))
              & (num("aic_gauss") - num("aic") >= s.switch_aic_margin)).astype(float)
    recent = pd.Series(counts).rolling(s.switch_windows, min_periods=s.switch_windows).mean()
    past = pd.Series(counts).rolling(s.reference_windows,
                                     min_periods=s.reference_windows).mean().to_numpy()
    switch = recent.to_numpy() - _at_reference(past, reference_end)
    # Materiality: no episode opens on a tail that, model-averaged, is not there at all
    # (older timelines without the averaged figure use the selected family's).
    if f"tail_{tail}_avg" in frame.columns:
        avg = num(f"tail_{tail}_avg")
        model = np.where(np.isnan(avg), model, avg)
    return ({"excess": excess, "window": window, "sequential": sequential, "spike": spike,
             "switch": switch}, ~(model < s.alert_min_tail))


def _tail_episodes(frame: pd.DataFrame, tail: str, stats: dict[str, NDArray[np.float64]],
                   material: NDArray[np.bool_], s: SignalSettings, first_row: int,
                   decide_from: int, continued: Episode | None
                   ) -> tuple[NDArray[np.float64], NDArray[np.bool_], NDArray, list[Episode]]:
    """Evidence, alert flags, states and episodes of one tail. Rows before ``first_row``
    are history only; spells open and close from ``decide_from`` on, continuing the
    ``continued`` episode when one is open the row before; no episode opens on a row
    that is not ``material``."""
    names = list(STATISTICS)
    values = np.stack([stats[n] for n in names])
    entry = np.array([s.thresholds(n)[0] for n in names])[:, None]
    exit_ = np.array([s.thresholds(n)[1] for n in names])[:, None]
    # NaN (no history yet) and -inf (no tail candidate) are no evidence; +inf is.
    finite = np.isfinite(values) | (values == np.inf)
    with np.errstate(invalid="ignore"):
        strength = np.where(finite, values / entry, 0.0)
        active_each = finite & (values >= entry)
        # A statistic switched off (entry inf) neither opens nor holds an episode.
        holding = finite & (values >= exit_) & np.isfinite(entry)
    # The window statistic's gate has its own hysteresis: the finite-level excess must reach
    # excess_gate to open, and keeps an episode open while it stays at excess_hold or more.
    w = names.index("window")
    excess = stats["excess"]
    strength[w] = np.where(excess >= s.excess_gate, strength[w], 0.0)
    active_each[w] &= excess >= s.excess_gate
    holding[w] &= excess >= s.excess_hold
    strength[:, ~material] = 0.0
    active_each &= material
    quiet = ~holding.any(axis=0)
    active = active_each.any(axis=0)
    evidence = np.clip(strength.max(axis=0), 0.0, None)
    n = len(frame)
    alert = np.zeros(n, dtype=bool)
    dates = frame["date"]

    def at(row: int) -> dict[str, Any]:
        """The ``peak_*`` fields of an :class:`Episode` peaking on ``row``."""
        r = frame.iloc[row]
        return {"peak_date": dates[row], "peak_value": float(evidence[row]),
                "peak_tail_emp": float(r[f"tail_{tail}_emp"]),
                "peak_tail_model": float(r[f"tail_{tail}"]),
                "peak_gauss_tail": float(r["gauss_tail_q"]),
                "peak_kendall_tau": float(r["kendall_tau"])}

    episodes = []
    spells = hysteresis(active[first_row:], quiet[first_row:], s.entry_days, s.exit_days,
                        start=decide_from - first_row, open_at_start=continued is not None)
    for k, (first, close) in enumerate(spells):
        first += first_row
        stop = n if close is None else close + first_row
        alert[first:stop] = True
        end = None if close is None else dates[stop - 1]
        if k == 0 and continued is not None:
            # Its peak so far against the new days' (the first maximum wins ties); a
            # continued episode may close on its first row, with no new day.
            kept = dataclasses.replace(continued, end=end)
            if stop > first:
                newest = first + int(np.argmax(evidence[first:stop]))
                if evidence[newest] > continued.peak_value:
                    kept = dataclasses.replace(kept, **at(newest))
            episodes.append(kept)
            continue
        # A spell that opens here has at least its opening day (it closes later).
        peak = first + int(np.argmax(evidence[first:stop]))
        run_start = first - s.entry_days + 1
        days_active = active_each[:, run_start:first + 1].sum(axis=1)
        best = int(np.argmax(days_active))  # first maximum: STATISTICS order breaks ties
        episodes.append(Episode(
            tail=tail, cause=STATISTICS[names[best]], statistic=names[best],
            onset=dates[run_start], start=dates[first], end=end, **at(peak)))
    state = np.where(alert, "alert", np.where(active, "watch", "calm"))
    return evidence, alert, state, episodes


def pair_signals(timeline: pd.DataFrame, settings: SignalSettings | None = None,
                 resume: Resume | None = None) -> PairSignals:
    """Tail-divergence, spike and switch signals, states and alert episodes of one pair.

    Parameters
    ----------
    timeline : pandas.DataFrame
        The pair's metrics timeline, one row per window end in date order, with at least
        the columns in ``REQUIRED_COLUMNS`` (as made by
        :func:`monitor.stats.rolling.pair_metrics`).
    settings : SignalSettings, optional
        Thresholds; the calibrated defaults if omitted.
    resume : Resume, optional
        Continue an earlier computation of the same pair and settings from its
        :meth:`PairSignals.resume_at` point. ``timeline`` must then be the newest rows of
        the pair's timeline: at least :func:`context_rows` rows up to the resume date (or
        every row up to it), and every row after it.

    Returns
    -------
    PairSignals
        ``frame`` is the timeline (fresh index) with :data:`SIGNAL_COLUMNS` added per tail.
        These are ``excess_*`` (standardised finite-level excess over the Gaussian at the
        same tau), ``window_*``, ``sequential_*``, ``spike_*`` and ``switch_*`` (the four
        statistics), ``evidence_*`` (largest statistic-to-entry ratio), ``state_*`` (one of
        :data:`STATES`), ``alert_*`` (0/1) and ``alert`` (1 while either tail is in an
        episode). With ``resume``, ``frame`` holds the rows after the resume date and
        ``episodes`` those in alert on the resume date or later: both as the whole timeline's
        computation gives them (the CUSUM to rounding, about 1e-15).

    Raises
    ------
    InputError
        If a required column is missing, the dates are not strictly increasing, or the
        resume date is not one of the timeline's window ends with enough rows before it.

    Notes
    -----
    The method and its sources are in the module docstring: Page (1954) for the CUSUM; the
    Gaussian tail concordance C(q, q)/q at rho = sin(pi tau / 2) (Lindskog, McNeil & Schmock
    2003, for the tau-rho relation); Clayton with theta = 2 tau / (1 - tau) (Joe 1997, family
    B4) as the tail-dependent alternative.

    Examples
    --------
    >>> from monitor.stats.rolling import RollingSettings, pair_metrics, window_end_positions
    >>> from monitor.stats.copulas import family
    >>> import numpy as np, pandas as pd
    >>> from scipy import stats
    >>> uv = family("gaussian").sample(400, (0.5,), np.random.default_rng(3))
    >>> z = stats.norm.ppf(uv)
    >>> dates = pd.bdate_range("2020-01-01", periods=400)
    >>> rs = RollingSettings(window=250, families=("gaussian", "clayton"))
    >>> m = pair_metrics(dates, z[:, 0], z[:, 1], rs, window_end_positions(400, rs))
    >>> sig = pair_signals(m.frame)
    >>> int(sig.frame["alert"].sum()), len(sig.episodes)
    (0, 0)
    """
    s = settings if settings is not None else SignalSettings()
    if not isinstance(s, SignalSettings):
        raise TypeError(f"settings must be SignalSettings, got {type(s).__name__}")
    frame = _check_timeline(timeline)
    dates = frame["date"].to_numpy()
    starts = frame["start"].to_numpy()
    # Reference windows end before the current window's first day: no shared observation.
    reference_end = np.searchsorted(dates, starts, side="left")
    row, first_row = (-1, 0) if resume is None else _resume_rows(dates, resume, s)
    new: dict[str, object] = {}
    episodes: list[Episode] = []
    any_alert = np.zeros(len(frame), dtype=bool)
    for tail in TAILS:
        carried = () if resume is None else resume.cusum[tail]
        stats, material = _tail_statistics(frame, tail, s, reference_end, row, carried)
        continued = None if resume is None else next(
            (e for e in resume.episodes if e.tail == tail), None)
        evidence, alert, state, eps = _tail_episodes(frame, tail, stats, material, s,
                                                     first_row, row + 1, continued)
        for name in ("excess", "window", "sequential", "spike", "switch"):
            new[f"{name}_{tail}"] = stats[name]
        new[f"evidence_{tail}"] = evidence
        new[f"state_{tail}"] = pd.array(state.astype(str), dtype="string")
        new[f"alert_{tail}"] = alert.astype(np.int64)
        any_alert |= alert
        episodes.extend(eps)
    new["alert"] = any_alert.astype(np.int64)
    out = frame.drop(columns=[c for c in SIGNAL_COLUMNS if c in frame.columns])
    out = pd.concat([out, pd.DataFrame(new, index=out.index)], axis=1)
    if resume is not None:
        out = out.iloc[row + 1:].reset_index(drop=True)
    episodes.sort(key=lambda e: (e.start, TAILS.index(e.tail)))
    return PairSignals(out, tuple(episodes), s, resume)


def _resume_rows(dates: NDArray[np.datetime64], resume: Resume, s: SignalSettings
                 ) -> tuple[int, int]:
    """The row of the resume date and the first row of the carried CUSUM levels; InputError
    when the date is not a window end of the timeline or too few rows lead up to it."""
    row = int(np.searchsorted(dates, resume.date.to_datetime64()))
    if row == len(dates) or dates[row] != resume.date.to_datetime64():
        raise InputError(f"timeline: the resume date {resume.date.date()} is not one of "
                         "its window ends")
    first_row = row - carry_rows(s) + 1
    if first_row < 0 or any(len(resume.cusum[t]) != carry_rows(s) for t in TAILS):
        raise InputError(f"timeline: too few rows up to the resume date "
                         f"{resume.date.date()}")
    return row, first_row


def context_rows(settings: SignalSettings, window_rows: int) -> int:
    """Rows of a timeline up to a resume date that :func:`pair_signals` needs to continue
    from it: the carried CUSUM rows, and for each of them the spike and switch references
    (the ``reference_windows`` window ends before its window's first day).

    Parameters
    ----------
    settings : SignalSettings
    window_rows : int
        Most window ends within one window's span (``window // step + 1`` for the rolling
        engine's windows of ``window`` common days at step ``step``).
    """
    return (carry_rows(settings) + window_rows + max(settings.reference_windows,
                                                     settings.switch_windows) + 1)


# ------------------------------------------------------------------------------ universe
#: Dates of the universe's calendar over which a pair's latest window is carried forward
#: when it has no window end (one asset's price missing): beyond it the pair is not counted.
UNIVERSE_STALE_LIMIT = 5
#: Cross-pair means of the universe summary (columns of the metrics timeline).
UNIVERSE_MEAN_COLUMNS = ("kendall_tau", "tail_lower", "tail_upper", "tail_lower_emp",
                         "tail_upper_emp", "tail_lower_avg", "tail_upper_avg")
#: Columns of :func:`universe_summary`, in order.
UNIVERSE_COLUMNS = ("n_pairs", "n_carried", "n_alert", "share_alert", "n_alert_lower",
                    "n_alert_upper", *UNIVERSE_MEAN_COLUMNS)


def universe_key(signals_key: str, stale_limit: int = UNIVERSE_STALE_LIMIT) -> str:
    """Settings key of the stored universe summary: the signals' key plus the carry-forward
    limit (a summary with another limit, or the earlier one without carrying, is never
    mixed in)."""
    return f"{signals_key}|carry{int(stale_limit)}"


def carried_positions(pos: ArrayLike, next_pos: ArrayLike, stale_limit: int
                      ) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """The calendar positions each window end counts for.

    Parameters
    ----------
    pos : array_like of int
        Position of each window end in the universe's calendar (the sorted dates on which
        any pair has a window end).
    next_pos : array_like of int
        Position of the same pair's next window end (the calendar's length for its last).
    stale_limit : int
        Most calendar dates a window end is carried forward.

    Returns
    -------
    (rows, positions) : ndarrays of int
        For every window end ``i`` the pairs ``(i, p)`` for ``p`` from ``pos[i]`` to
        ``min(next_pos[i] - 1, pos[i] + stale_limit)``: ``rows`` indexes the input, ``p - pos``
        is 0 for the window's own date and positive where it is carried.
    """
    pos = np.asarray(pos, dtype=np.intp)
    reach = np.minimum(np.asarray(next_pos, dtype=np.intp) - 1, pos + int(stale_limit))
    span = np.maximum(reach - pos + 1, 1)
    rows = np.repeat(np.arange(len(pos)), span)
    offset = np.arange(len(rows)) - np.repeat(np.cumsum(span) - span, span)
    return rows, pos[rows] + offset


def universe_summary(frames: Mapping[object, pd.DataFrame] | Iterable[pd.DataFrame],
                     stale_limit: int = UNIVERSE_STALE_LIMIT) -> pd.DataFrame:
    """Universe-level state over time from many pairs' signal frames.

    Parameters
    ----------
    frames : mapping of pair -> DataFrame, or iterable of DataFrames
        ``PairSignals.frame`` of each pair (at least ``date``, ``alert``, ``alert_lower``,
        ``alert_upper`` and the :data:`UNIVERSE_MEAN_COLUMNS`; ``tail_*_avg`` may be
        missing, as in a timeline stored by an older comove, and then count as NaN).
    stale_limit : int
        Calendar dates a pair's latest window end is carried forward (0: count only the
        pairs with a window end that day).

    Returns
    -------
    pandas.DataFrame
        Indexed by ``date`` (every date on which some pair has a window end: the universe's
        calendar), with :data:`UNIVERSE_COLUMNS`: ``n_pairs`` (pairs counted that day),
        ``n_carried`` (of them, counted with an earlier window end), ``n_alert``,
        ``share_alert`` (``n_alert / n_pairs``), ``n_alert_lower``, ``n_alert_upper``, and
        the cross-pair means (over the counted pairs with a value).

    Notes
    -----
    Pairs trade on different calendars: on a date where one asset has no price, its pairs
    have no window end. Averaging only the pairs with a window end that day makes the mean
    jump with the mix of pairs (a day with one pair shows that pair as the universe). Each
    pair therefore counts with its latest window end on or before the date, its values and
    alert states as of that window, for at most ``stale_limit`` dates of the calendar after
    it; a pair whose data stopped longer ago drops out, and ``n_pairs`` says how many were
    counted.
    """
    if isinstance(stale_limit, bool) or not isinstance(stale_limit, int | np.integer):
        raise TypeError(f"stale_limit must be an int, got {type(stale_limit).__name__}")
    if stale_limit < 0:
        raise ValueError(f"stale_limit must be >= 0, got {stale_limit}")
    items = list(frames.values()) if isinstance(frames, Mapping) else list(frames)
    means = list(UNIVERSE_MEAN_COLUMNS)
    counts = ["alert", "alert_lower", "alert_upper"]
    required = ["date", *counts, *(c for c in means if not c.endswith("_avg"))]
    parts = []
    for i, f in enumerate(items):
        missing = [c for c in required if c not in f.columns]
        if missing:
            raise InputError(f"signal frame {i}: missing column(s) {', '.join(missing)}")
        part = f.reindex(columns=["date", *counts, *means])
        part["date"] = pd.to_datetime(part["date"])
        part["pair"] = i
        parts.append(part)
    out_cols = list(UNIVERSE_COLUMNS)
    if not parts or all(len(p) == 0 for p in parts):
        return pd.DataFrame(columns=out_cols, index=pd.DatetimeIndex([], name="date"))
    long = pd.concat([p for p in parts if len(p)], ignore_index=True)
    long = long.sort_values(["pair", "date"], kind="stable").reset_index(drop=True)
    for c in [*counts, *means]:
        long[c] = pd.to_numeric(long[c], errors="coerce").astype(float)
    calendar = pd.DatetimeIndex(np.unique(long["date"].to_numpy()))
    pos = calendar.searchsorted(long["date"])
    nxt = pd.Series(pos).groupby(long["pair"].to_numpy()).shift(-1)
    rows, at = carried_positions(pos, nxt.fillna(len(calendar)).to_numpy(), stale_limit)
    wide = long.iloc[rows].reset_index(drop=True)
    wide["carried"] = (at != pos[rows]).astype(np.int64)
    g = wide.groupby(calendar[at], sort=True)
    out = pd.DataFrame({"n_pairs": g.size().astype(np.int64)})
    out["n_carried"] = g["carried"].sum().astype(np.int64)
    out["n_alert"] = g["alert"].sum().astype(np.int64)
    out["share_alert"] = out["n_alert"] / out["n_pairs"]
    out["n_alert_lower"] = g["alert_lower"].sum().astype(np.int64)
    out["n_alert_upper"] = g["alert_upper"].sum().astype(np.int64)
    for c in means:
        out[c] = g[c].mean()
    out.index.name = "date"
    return out[out_cols]


def state_runs(frame: pd.DataFrame) -> pd.DataFrame:
    """Run-length encoding of a pair's daily tail states.

    Parameters
    ----------
    frame : DataFrame
        ``PairSignals.frame`` (at least ``date``, ``state_lower``, ``state_upper``).

    Returns
    -------
    DataFrame
        One row per run of equal state per tail: ``tail, first_date, last_date, state``
        (first and last window end of the run), tails in :data:`monitor.stats.signals.TAILS`
        order, runs in date order.

    Notes
    -----
    A pair's states change on a few hundred days of thousands, so the runs are what the
    store keeps (:meth:`monitor.data.store.Store.sync_state_runs`); :func:`states_on` decodes
    them at any dates.
    """
    dates = pd.to_datetime(frame["date"]).to_numpy()
    tails: list[str] = []
    states: list[object] = []
    firsts: list[NDArray[np.datetime64]] = []
    lasts: list[NDArray[np.datetime64]] = []
    for tail in TAILS:
        state = frame[f"state_{tail}"].to_numpy(dtype=object)
        if state.size == 0:
            continue
        change = np.flatnonzero(state[1:] != state[:-1]) + 1
        first = np.concatenate([[0], change])
        last = np.concatenate([change - 1, [state.size - 1]])
        tails += [tail] * first.size
        firsts.append(dates[first])
        lasts.append(dates[last])
        states += list(state[first])

    def joined(parts: list[NDArray[np.datetime64]]) -> NDArray[np.datetime64]:
        return np.concatenate(parts) if parts else np.array([], "datetime64[ns]")

    return pd.DataFrame({"tail": tails, "first_date": joined(firsts),
                         "last_date": joined(lasts), "state": states},
                        columns=["tail", "first_date", "last_date", "state"])


def states_on(runs: pd.DataFrame, rows: pd.DataFrame) -> pd.DataFrame:
    """The tail states of pairs on given dates, from stored state runs.

    Parameters
    ----------
    runs : DataFrame
        ``asset_a, asset_b, tail, first_date, last_date, state`` (as read by
        :meth:`monitor.data.store.Store.read_state_runs`).
    rows : DataFrame
        ``asset_a, asset_b, date``: window ends of the pairs.

    Returns
    -------
    DataFrame
        ``state_lower`` and ``state_upper`` aligned with ``rows`` (same index): the state of
        the run that covers each date, missing where no stored run covers it (signals not
        yet computed for that window end).
    """
    # Each pair a code, each (pair, date) one sortable number: a row's run is the last one
    # of its pair starting on or before its date, if it has not ended by then (a binary
    # search, not a merge of frames: the Timeline decodes 5,000 dates per request).
    names = np.concatenate([rows["asset_a"].to_numpy(dtype=object) + "\0"
                            + rows["asset_b"].to_numpy(dtype=object),
                            runs["asset_a"].to_numpy(dtype=object) + "\0"
                            + runs["asset_b"].to_numpy(dtype=object)])
    codes = pd.factorize(names)[0].astype(np.int64)
    row_code, run_code = codes[:len(rows)], codes[len(rows):]

    def days(values) -> np.ndarray:
        return pd.to_datetime(values).to_numpy(dtype="datetime64[D]").astype(np.int64)

    span = np.int64(1) << 32
    row_key = row_code * span + days(rows["date"])
    out = {}
    for tail in TAILS:
        mine = (runs["tail"] == tail).to_numpy()
        first = run_code[mine] * span + days(runs.loc[mine, "first_date"])
        order = np.argsort(first, kind="stable")
        first = first[order]
        last = (run_code[mine] * span + days(runs.loc[mine, "last_date"]))[order]
        state = runs.loc[mine, "state"].to_numpy(dtype=object)[order]
        k = np.searchsorted(first, row_key, side="right") - 1
        safe = np.maximum(k, 0)
        hit = (k >= 0) & (row_key <= last[safe]) if len(first) else np.zeros(len(rows), bool)
        result = np.full(len(rows), None, dtype=object)
        result[hit] = state[safe[hit]]
        out[f"state_{tail}"] = pd.array(result, dtype="string")
    return pd.DataFrame(out, index=rows.index)
