"""The daily job behind ``comove update``: pull configured sources, filter every asset's
returns, store what is new.

Each step is one transaction: an interrupted update leaves the store as it was before that
step, and running it again continues from there (work already stored is not redone).
"""

from __future__ import annotations

import datetime as dt
import os
import time
from collections.abc import Callable, Iterator
from concurrent.futures import ProcessPoolExecutor, as_completed
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from functools import partial
from itertools import combinations
from typing import Any

import numpy as np
import pandas as pd

from monitor.alerts import rules as alerts
from monitor.common.errors import InputError
from monitor.common.progress import StepProgress
from monitor.config import Config, SourceConfig, source_read_options
from monitor.data.ingest import (
    IngestReport,
    Source,
    expand_paths,
    ingest_sources,
    read_file_source,
    read_sql_table_source,
)
from monitor.data.store import Store, outbox, shown_url
from monitor.data.store_lock import update_lock
from monitor.data.tables import Limits
from monitor.settings import marginal_settings, rolling_key, rolling_settings, signals_key
from monitor.stats.marginals import FilteredSeries, MarginalSettings, extend_series, filter_series
from monitor.stats.rolling import (
    CHAIN_FROM,
    PairWindows,
    RollingSettings,
    batch_metrics,
    degeneracy,
    window_end_positions,
)
from monitor.stats.signals import (
    TAILS,
    UNIVERSE_STALE_LIMIT,
    PairSignals,
    Resume,
    SignalSettings,
    context_rows,
    pair_signals,
    state_runs,
    universe_key,
)


def read_configured_sources(cfg: Config) -> list[Source]:
    """Read and validate every ``[[sources]]`` entry (nothing is stored yet)."""
    out = []
    for i, src in enumerate(cfg.sources, start=1):
        out.extend(_read_source(src, i, cfg.ingest))
    return out


def _read_source(src: SourceConfig, i: int, limits: Limits) -> list[Source]:
    if src.path:
        options = source_read_options(src, f"sources[{i}]")
        read = [read_file_source(p, src.kind, options, limits,
                                 accept_outliers=src.accept_outliers)
                for p in expand_paths(src.path)]
    else:
        url = src.url or os.environ.get(src.url_env, "")
        if not url:
            raise InputError(f"sources[{i}]: environment variable {src.url_env} is not set")
        read = [read_sql_table_source(url, src.kind, query=src.query or None,
                                      table=src.table or None, limits=limits,
                                      accept_outliers=src.accept_outliers)]
    return [replace(s, accept_revisions=src.accept_revisions) for s in read]


@dataclass(frozen=True, slots=True)
class MarginalSummary:
    """What the marginal step did."""

    settings_key: str
    filtered: int
    new_residuals: int
    recomputed: tuple[str, ...]
    fallbacks: dict[str, int]
    skipped: dict[str, str] = field(default_factory=dict)
    #: Stored returns per asset (every asset, filtered or not).
    held: dict[str, int] = field(default_factory=dict)

    def lines(self) -> list[str]:
        out = [(f"marginals ({self.settings_key}): {self.filtered} asset(s) filtered, "
               f"{self.new_residuals} new residual(s)")]
        if self.recomputed:
            out.append(f"  recomputed from the start: {', '.join(self.recomputed)}")
        if self.fallbacks:
            out.append("  fits on the EWMA-t fallback (GARCH refused; see the Inputs page): "
                       + ", ".join(f"{a} {n}" for a, n in sorted(self.fallbacks.items())))
        for asset, why in sorted(self.skipped.items()):
            out.append(f"  skipped {asset}: {why}")
        return out


def _filter_one(store: Store, key: str, asset: str, returns: pd.Series,
                settings: MarginalSettings
                ) -> tuple[str, FilteredSeries, bool, FilteredSeries | None] | None:
    """One asset: None when its stored result is up to date; else (asset, result, whether
    it was recomputed from the start, the stored result it extends)."""
    previous = store.load_filtered(key, asset)
    if previous is not None and previous.is_prefix_of(returns):
        if previous.n_input == len(returns):
            return None  # nothing new for this asset
        return asset, extend_series(previous, returns), False, previous
    # A stored result whose input record was dropped (a revision) is recomputed too.
    redone = previous is not None or store.residual_count(key, asset) > 0
    return asset, filter_series(returns, settings), redone, None


def _filter_task(args: tuple) -> tuple | None:
    return _filter_one(_WORKER_STORE, *args)


def update_marginals(store: Store, cfg: Config, *, progress: bool = True) -> MarginalSummary:
    """Filter every stored asset (incrementally where possible) and store the new residuals.

    Assets run in a process pool (``compute.workers``; 0 means one per core), each worker
    reading the asset's stored result itself: the GARCH fits are independent, and the
    ``arch`` package is not thread-safe in its warning handling.
    """
    settings = marginal_settings(cfg)
    key = settings.key
    returns = store.read_returns()
    todo, skipped, held = [], {}, {}
    for asset in returns.columns:
        series = returns[asset].dropna()
        series.name = asset
        held[str(asset)] = len(series)
        if len(series) < settings.min_returns:
            skipped[asset] = (f"{len(series)} returns, the filter needs {settings.min_returns}")
            continue
        todo.append((key, asset, series, settings))
    results: list[tuple[str, FilteredSeries, bool, FilteredSeries | None]] = []
    with (StepProgress("marginals", len(todo), "asset", enabled=progress) as bar,
          _pool_results(_filter_task, todo, _workers(cfg), store_url=store.url,
                        local=lambda args: _filter_one(store, *args)) as done):
        for out in done:
            if out is not None:
                results.append(out)
            bar.update()
    written = 0
    with store.transaction() as conn:
        for _asset, fs, redone, previous in results:
            written += store.save_filtered(conn, fs, None if redone else previous)
    return MarginalSummary(
        settings_key=key, filtered=len(results), new_residuals=written,
        recomputed=tuple(sorted(a for a, _, redone, _ in results if redone)),
        fallbacks={a: fs.n_fallback for a, fs, _, _ in results if fs.n_fallback},
        skipped=skipped, held=held)


def _workers(cfg: Config) -> int:
    """Worker processes of the local pool: ``compute.workers``, 0 meaning one per core."""
    return cfg.compute.workers or os.cpu_count() or 1


_WORKER_STORE: Store | None = None


def _open_worker_store(url: str) -> None:
    """Pool initializer: one store connection per worker process, for all its tasks."""
    global _WORKER_STORE
    _WORKER_STORE = Store(url, create=False)


@contextmanager
def _pool_results(fn: Callable[[Any], Any], items: list, workers: int, *,
                  local: Callable[[Any], Any] | None = None, store_url: str | None = None,
                  ordered: bool = True, chunksize: int = 1) -> Iterator[Iterator[Any]]:
    """The results of ``fn`` on every item, from a local process pool when it pays.

    Parameters
    ----------
    fn : callable
        A module-level function of one item (it is pickled to the workers).
    items : list
    workers : int
        Most worker processes; with one (or one item) everything runs in this process.
    local : callable, optional
        What runs in this process instead of ``fn`` (e.g. with the caller's open store).
    store_url : str, optional
        Each worker opens this store once (:data:`_WORKER_STORE`) before its first item.
    ordered : bool
        Results in the order of ``items``; otherwise as they finish.
    chunksize : int
        Items sent to a worker at a time (``ordered`` only).

    Yields
    ------
    iterator
        The results; leaving the block shuts the pool down, also on an error.
    """
    workers = min(workers, len(items))
    if workers <= 1:
        yield map(local or fn, items)
        return
    init = {"initializer": _open_worker_store, "initargs": (store_url,)} if store_url else {}
    with ProcessPoolExecutor(workers, **init) as pool:
        if ordered:
            yield pool.map(fn, items, chunksize=chunksize)
        else:
            yield (f.result() for f in as_completed([pool.submit(fn, i) for i in items]))


# ----------------------------------------------------------------------------- rolling engine
def _universe_pairs(assets: list[str], cfg: Config) -> list[tuple[str, str]]:
    if cfg.rolling.pairs:
        out = []
        for text in cfg.rolling.pairs:
            a, b = (x.strip() for x in text.split("/"))
            for asset in (a, b):
                if asset not in assets:
                    raise InputError(f"rolling.pairs: {text!r}: no filtered residuals for "
                                     f"{asset!r} (assets: {', '.join(assets) or 'none'})")
            out.append((a, b))
        return out
    return list(combinations(sorted(assets), 2))


@dataclass(frozen=True, slots=True)
class _PairTask:
    a: str
    b: str
    dates: pd.DatetimeIndex
    za: np.ndarray
    zb: np.ndarray
    positions: np.ndarray
    warm: dict | None
    last_tau: float | None
    replace_all: bool


def _pair_batch(batch: list[_PairTask], settings: RollingSettings):
    """Worker: the new window ends of a few pairs, fitted as one batch (or one big pair).
    When the batch fails, its pairs are computed one by one, so that one pair that cannot be
    computed (its reason recorded in place of its metrics) never stops the others."""
    items = [PairWindows(t.dates, t.za, t.zb, t.positions, t.warm, t.last_tau) for t in batch]
    try:
        return list(zip(batch, batch_metrics(items, settings), strict=True))
    except Exception as exc:  # noqa: BLE001 - retried pair by pair below
        if len(batch) == 1:  # that pair's own failure: nothing to retry
            return [(batch[0], _reason(exc))]
        return [(t, _alone(it, settings)) for t, it in zip(batch, items, strict=True)]


def _alone(item: PairWindows, settings: RollingSettings):
    """One pair's metrics, or the reason it cannot be computed (a string)."""
    try:
        return batch_metrics([item], settings)[0]
    except Exception as exc:  # noqa: BLE001 - reported in the update summary
        return _reason(exc)


def _reason(exc: Exception) -> str:
    """An exception in one line, for the update summary."""
    return f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}"


#: Pairs with at most CHAIN_FROM new windows are fitted together, up to this many windows
#: per batch (the daily update: one window per pair).
BATCH_WINDOWS = 256


def _batches(tasks: list[_PairTask], parts: int = 1) -> list[list[_PairTask]]:
    """Large pairs alone; small ones grouped into batches of at most BATCH_WINDOWS windows,
    and into at least ``parts`` batches of about equal size (one per worker)."""
    small = sum(len(t.positions) for t in tasks if len(t.positions) <= CHAIN_FROM)
    limit = max(1, min(BATCH_WINDOWS, -(-small // max(parts, 1))))
    out, current, size = [], [], 0
    for t in tasks:
        n = len(t.positions)
        if n > CHAIN_FROM:
            out.append([t])
            continue
        if current and size + n > limit:
            out.append(current)
            current, size = [], 0
        current.append(t)
        size += n
    if current:
        out.append(current)
    return out


@dataclass(frozen=True, slots=True)
class RollingSummary:
    settings_key: str
    pairs: int
    updated_pairs: int
    new_windows: int
    backend: str
    #: Pairs that could not be computed, with the reason (the others were stored).
    failed: dict[tuple[str, str], str] = field(default_factory=dict)
    #: Pairs whose latest window is degenerate, with why (:func:`degenerate_pairs`).
    degenerate: dict[tuple[str, str], str] = field(default_factory=dict)

    def lines(self) -> list[str]:
        out = [(f"rolling ({self.settings_key}, {self.backend}): {self.updated_pairs} of "
                f"{self.pairs} pair(s) updated, {self.new_windows} new window end(s)")]
        if self.failed:
            out.append(f"  {len(self.failed)} pair(s) could not be computed (the others were "
                       "stored): " + "; ".join(f"{a}/{b}: {why}"
                                               for (a, b), why in sorted(self.failed.items())))
        if self.degenerate:
            out.append(f"  {len(self.degenerate)} degenerate pair(s) in their latest window "
                       "(stored; read with care): " + "; ".join(
                           f"{a}/{b} {why}" for (a, b), why in sorted(self.degenerate.items())))
        return out


def _pair_tasks(store: Store, key: str, settings: RollingSettings, z: pd.DataFrame,
                pairs: list[tuple[str, str]], states: dict, recent_only: bool
                ) -> list[_PairTask] | None:
    """The new window ends of every pair. ``recent_only``: ``z`` holds only recent days,
    and None is returned when some pair needs more history than that."""
    tasks = []
    values, index = z.to_numpy(dtype=float), pd.DatetimeIndex(z.index)
    column = {str(c): i for i, c in enumerate(z.columns)}
    present = ~np.isnan(values)
    for a, b in pairs:
        ia, ib = column[a], column[b]
        common = np.flatnonzero(present[:, ia] & present[:, ib])
        dates = index[common]
        state = states.get((a, b))
        after, warm, last_tau, replace_all = -1, None, None, False
        hit = -1 if state is None else dates.get_indexer([pd.Timestamp(state["last_date"])])[0]
        if recent_only and hit < settings.window - 1:
            return None  # a new pair, a restart, or a window reaching further back
        if state is None:
            # A revision dropped the pair's state but kept its older rows: start over.
            replace_all = store.has_metrics(key, a, b)
        elif hit >= 0:
            after, warm, last_tau = int(hit), state["warm"], state["last_tau"]
        else:
            replace_all = True  # the stored end is no longer a common date: start over
        positions = window_end_positions(len(dates), settings, after)
        if positions.size:
            # The workers get the days the new windows cover, not the pair's whole history.
            lo = int(positions[0]) - settings.window + 1
            rows = common[lo:]
            tasks.append(_PairTask(a, b, dates[lo:], values[rows, ia], values[rows, ib],
                                   positions - lo, warm, last_tau, replace_all))
    return tasks


#: Calendar days of residuals the daily update reads before the pairs' oldest stored window
#: end (windows of ``window`` trading days span about 1.45 times as many calendar days).
RECENT_DAYS_PER_WINDOW_DAY = 3


def _rolling_tasks(store: Store, m_key: str, key: str, settings: RollingSettings,
                   cfg: Config) -> tuple[list[tuple[str, str]], list[_PairTask]]:
    """The universe's pairs and their tasks. A daily update reads only the recent residuals
    (every pair continues from a stored window end); anything else reads them all. Window
    ends at step 1 do not depend on how far back the read starts; at larger steps they are
    counted from the pair's first common day, so the whole history is read."""
    states = store.load_pair_states(key)
    pairs = _universe_pairs(store.residual_assets(m_key), cfg)
    if states and settings.step == 1 and set(pairs) <= set(states):
        since = (min(pd.Timestamp(states[p]["last_date"]) for p in pairs)
                 - pd.Timedelta(days=RECENT_DAYS_PER_WINDOW_DAY * settings.window)).date()
        z = store.read_residuals(m_key, since=since)
        if {a for p in pairs for a in p} <= {str(c) for c in z.columns}:
            tasks = _pair_tasks(store, key, settings, z, pairs, states, recent_only=True)
            if tasks is not None:
                return pairs, tasks
    z = store.read_residuals(m_key)
    return pairs, _pair_tasks(store, key, settings, z, pairs, states, recent_only=False)


def _run_tasks(tasks: list[_PairTask], settings: RollingSettings, cfg: Config,
               progress: bool):
    """Yield lists of (task, PairMetrics), one per batch, as batches finish, on the
    configured backend."""
    workers = _workers(cfg)
    batches = _batches(tasks, 1 if cfg.compute.backend == "dask" else workers)
    with StepProgress("rolling", len(tasks), "pair", enabled=progress) as bar:
        if cfg.compute.backend == "dask":
            from distributed import Client
            from distributed import as_completed as dask_completed

            with Client(cfg.compute.scheduler, timeout="20s") as client:
                futures = client.map(_pair_batch, batches, settings=settings, pure=False)
                for fut in dask_completed(futures):
                    done = fut.result()
                    yield done
                    bar.update(len(done))
            return
        with _pool_results(partial(_pair_batch, settings=settings), batches, workers,
                           ordered=False) as finished:
            for done in finished:
                yield done
                bar.update(len(done))


def update_rolling(store: Store, cfg: Config, *, progress: bool = True) -> RollingSummary:
    """Compute every window end not yet stored, for every monitored pair, and store each batch
    of pairs (one large pair, or many with few new windows) in one transaction as it finishes
    (an interrupted update keeps the finished batches; a rerun computes exactly the missing
    pairs, from the same stored state)."""
    m_key = marginal_settings(cfg).key
    settings = rolling_settings(cfg)
    key = settings.key(m_key)
    if store.runs_missing(key):
        # Rows of an older store: their running counts of heavy tails, once (one statement;
        # about 25 s for 1.9 M rows on SQLite), so that the new rows continue them.
        with StepProgress("recounting tail levels of stored windows", 1, "table",
                          enabled=progress) as bar:
            store.recount_runs(key)
            bar.update()
    pairs, tasks = _rolling_tasks(store, m_key, key, settings, cfg)
    new = 0
    failed: dict[tuple[str, str], str] = {}
    for done in _run_tasks(tasks, settings, cfg, progress):
        failed.update({(t.a, t.b): out for t, out in done if isinstance(out, str)})
        # One transaction per batch: a pair's rows and state always land together.
        with store.transaction() as conn:
            new += store.save_metrics(conn, key, [
                (t.a, t.b, out.frame, out.last_params, out.last_tau, t.replace_all)
                for t, out in done if not isinstance(out, str)])
    return RollingSummary(key, len(pairs), len(tasks) - len(failed), new, cfg.compute.backend,
                          failed, degenerate_pairs(store, key, settings.window))


def degenerate_pairs(store: Store, key: str, window: int) -> dict[tuple[str, str], str]:
    """Pairs whose latest stored window is degenerate, with why: two copies of one series
    (:func:`monitor.stats.rolling.degeneracy`), or an asset whose price did not move on most
    days of the window (stale prices)."""
    states = store.load_pair_states(key)
    if not states:
        return {}
    pairs = sorted(states)
    stale = store.zero_return_shares(sorted({x for p in pairs for x in p}), window)
    taus = np.array([states[p]["last_tau"] for p in pairs], dtype=float)
    why = degeneracy(taus, [stale[a] for a, _ in pairs], [stale[b] for _, b in pairs],
                     [a for a, _ in pairs], [b for _, b in pairs])
    return {p: reason for p, reason in zip(pairs, why, strict=True) if reason}


# ----------------------------------------------------------------------------- signals
def read_pair_signals(store: Store, cfg: Config, a: str, b: str,
                      settings: SignalSettings | None = None) -> PairSignals | None:
    """A pair's signals from its stored timeline (None when nothing is stored)."""
    key = rolling_key(cfg)
    timeline = store.read_timeline(key, a, b)
    if timeline.empty:
        return None
    return pair_signals(timeline, settings)


def _episode_rows(sig: PairSignals) -> list[dict]:
    """A pair's episodes as store rows, each with its evidence on its latest day (the end, or
    the newest window end while open) when the signals' frame holds that day (a continued
    computation's frame may not hold an end before its new rows: the stored figure then
    stays)."""
    dates = pd.to_datetime(sig.frame["date"]).to_numpy()
    rows = []
    for e in sig.episodes:
        row = {"tail": e.tail, "start": e.start.date(), "onset": e.onset.date(),
               "end": None if e.end is None else e.end.date(), "cause": e.cause,
               "statistic": e.statistic, "peak_date": e.peak_date.date(),
               "peak_value": float(e.peak_value), "peak_tail_emp": float(e.peak_tail_emp),
               "peak_tail_model": float(e.peak_tail_model),
               "peak_gauss_tail": float(e.peak_gauss_tail),
               "peak_kendall_tau": float(e.peak_kendall_tau)}
        latest = dates[-1] if e.end is None else e.end.to_datetime64()
        at = np.flatnonzero(dates == latest)
        if at.size:
            row["latest_date"] = pd.Timestamp(latest).date()
            row["latest_value"] = float(sig.frame[f"evidence_{e.tail}"].iloc[at[0]])
        rows.append(row)
    return rows


@dataclass(frozen=True, slots=True)
class SignalSummary:
    settings_key: str
    pairs: int
    in_alert: tuple[tuple[str, str, str], ...]
    new_episodes: int
    ended_episodes: int
    queued: int = 0

    def lines(self) -> list[str]:
        out = [(f"signals: {len(self.in_alert)} of {self.pairs} pair(s) in alert; "
               f"{self.new_episodes} new episode(s), {self.ended_episodes} ended; "
               f"{self.queued} alert message(s) queued")]
        for a, b, tails in self.in_alert[:20]:
            out.append(f"  in alert: {a}/{b} ({tails} tail)")
        if len(self.in_alert) > 20:
            out.append(f"  ... and {len(self.in_alert) - 20} more")
        return out


@dataclass(frozen=True, slots=True)
class _PairSignalsOut:
    """A worker's signals of one pair: what the main process stores and alerts on."""

    a: str
    b: str
    episodes: list[dict]
    runs: pd.DataFrame
    alert_tails: tuple[str, ...]
    frame: pd.DataFrame  # the signal frame's recent rows (what the alert rules look at)
    since: dt.date | None  # the resume date a continued computation started from
    through: dt.date  # the last window end covered
    resume: dict | None  # where the next update continues from (None: nowhere)
    resume_changed: bool  # whether that differs from the stored one


def _alert_rows_needed(cfg: Config) -> int:
    """Window ends of a signal frame the alert rules need: the age limit (about 5 window
    ends per 7 days), the longest change they report, a margin."""
    days = max([r.days for r in alerts.rules_in_force(cfg)] + [alerts.CHANGE_DAYS])
    return int(cfg.alerts.max_age_days * 5 / 7) + days + 20


@dataclass(frozen=True, slots=True)
class _SignalJob:
    """What a worker needs to compute one pair's signals."""

    r_key: str
    a: str
    b: str
    settings: SignalSettings
    keep: int  # recent rows the alert rules need, and the lag of the next resume point
    context: int  # rows before a resume date the continued computation reads
    resume: dict | None


def _pair_signals_job(store: Store, job: _SignalJob) -> _PairSignalsOut | None:
    """One pair's signals: continued from its stored resume point when there is one (reading
    only the newest rows of its timeline), else from its whole timeline."""
    sig = None
    if job.resume is not None:
        resume = Resume.from_dict(job.resume)
        timeline = store.read_timeline(job.r_key, job.a, job.b,
                                       context_from=resume.date.date(),
                                       context_rows=job.context)
        try:
            sig = pair_signals(timeline, job.settings, resume=resume)
        except InputError:
            sig = None  # not a window end any more: recompute the whole timeline
        if sig is not None and len(sig.frame) < job.keep:
            sig = None  # the alert rules now look further back than the resume point
    if sig is None:
        timeline = store.read_timeline(job.r_key, job.a, job.b)
        if timeline.empty:
            return None
        sig = pair_signals(timeline, job.settings)
    last = sig.frame.iloc[-1]
    tails = tuple(t for t in TAILS if last[f"alert_{t}"])
    # With no new rows the old point still holds (its rows are all still in the frame).
    nxt = sig.resume_at(job.keep) or sig.resumed_from
    payload = None if nxt is None else nxt.to_dict()
    since = None if sig.resumed_from is None else sig.resumed_from.date.date()
    return _PairSignalsOut(job.a, job.b, _episode_rows(sig),
                           state_runs(sig.frame), tails, sig.frame.tail(job.keep), since,
                           pd.Timestamp(last["date"]).date(), payload,
                           payload != job.resume)


def _signals_task(job: _SignalJob) -> _PairSignalsOut | None:
    return _pair_signals_job(_WORKER_STORE, job)


#: Pairs whose signals are stored together in one transaction.
SIGNAL_CHUNK = 32


def update_signals(store: Store, cfg: Config, pairs: list[tuple[str, str]] | None = None,
                   *, progress: bool = False) -> SignalSummary:
    """Bring every pair's signals up to its stored timeline and store its episodes, state
    runs and alert messages, in transactions of up to :data:`SIGNAL_CHUNK` pairs; then
    complete the stored universe summary.

    Notes
    -----
    A pair continues from its stored resume point (:class:`monitor.stats.signals.Resume`, a
    fixed number of window ends before its last one), so a daily update reads a few hundred
    rows of each timeline rather than all of them and gives the same states and episodes.
    A pair without one (new, or its metrics were replaced or revised) is computed from its
    whole timeline. The pairs are computed in a local process pool (``compute.workers``;
    each worker reads the store itself). A pair's episodes, state runs, queued alerts and
    resume point are written in one transaction, so an alert is queued exactly when the
    change it reports is stored. A pair whose states changed drops the universe rows from
    the first changed date in that same transaction (as do revisions and replaced
    metrics), so the summary is always recomputed from the first date it is missing, even
    after an interrupted update; a quiet day recomputes one date.
    """
    settings = SignalSettings()
    r_key = rolling_key(cfg)
    key = signals_key(cfg, settings)
    todo = sorted(pairs if pairs is not None else store.monitored_pairs(r_key))
    keep = _alert_rows_needed(cfg)
    r = cfg.rolling
    context = context_rows(settings, r.window // r.step + 1)
    resumes = store.read_resumes(key)
    jobs = [_SignalJob(r_key, a, b, settings, keep, context, resumes.get((a, b)))
            for a, b in todo]
    in_alert: list[tuple[str, str, str]] = []
    counts = (0, 0, 0)  # new episodes, ended episodes, queued messages
    fallbacks = store.fallback_spans(marginal_settings(cfg).key)
    with (StepProgress("signals", len(jobs), "pair", enabled=progress) as bar,
          _pool_results(_signals_task, jobs, _workers(cfg), store_url=store.url, chunksize=8,
                        local=lambda job: _pair_signals_job(store, job)) as results):
        chunk: list[_PairSignalsOut] = []
        for out in results:
            bar.update()
            if out is None:
                continue
            if out.alert_tails:
                in_alert.append((out.a, out.b, " and ".join(out.alert_tails)))
            chunk.append(out)
            if len(chunk) == SIGNAL_CHUNK:
                counts = _add(counts, _store_signals(store, cfg, r_key, key, chunk, fallbacks))
                chunk = []
        if chunk:
            counts = _add(counts, _store_signals(store, cfg, r_key, key, chunk, fallbacks))
    new_n, ended_n, queued = counts
    u_key = universe_key(key)
    stored = store.universe_range(u_key)
    stored_to = None if stored is None else stored[1]
    latest = store.latest_window_end(r_key)
    if latest is not None and (stored_to is None or latest > stored_to):
        summary = store.universe_after(r_key, key, stored_to, UNIVERSE_STALE_LIMIT)
        prior = store.read_universe(u_key)
        with store.transaction() as conn:
            store.append_universe(conn, u_key, summary)
            share = pd.concat([prior["share_alert"],
                               summary["n_alert"] / summary["n_pairs"]]).sort_index()
            queued += alerts.queue(conn, outbox, key, alerts.universe_events(cfg, key, share))
    return SignalSummary(key, len(todo), tuple(in_alert), new_n, ended_n, queued)


def _add(a: tuple[int, ...], b: tuple[int, ...]) -> tuple[int, ...]:
    return tuple(x + y for x, y in zip(a, b, strict=True))


def _store_signals(store: Store, cfg: Config, r_key: str, key: str,
                   chunk: list[_PairSignalsOut], fallbacks: pd.DataFrame
                   ) -> tuple[int, int, int]:
    """Store a chunk of pairs' episodes, state runs, alert events and resume points in one
    transaction; returns (new episodes, ended episodes, queued messages). ``fallbacks``
    (:meth:`~monitor.data.store.Store.fallback_spans`) lets a message name fallback days."""
    new_n = ended_n = queued = 0
    with store.transaction() as conn:
        for o in chunk:
            new, ended, every = store.sync_episodes(conn, key, o.a, o.b, o.episodes,
                                                    since=o.since)
            store.sync_state_runs(conn, key, o.a, o.b, o.runs, since=o.since)
            # The alert queue changes with the state it reports, in the same transaction.
            pair_fallbacks = fallbacks[fallbacks["asset"].isin((o.a, o.b))]
            queued += alerts.queue(conn, outbox, key, alerts.pair_events(
                cfg, key, o.a, o.b, o.frame, new, ended, every, pair_fallbacks))
            if o.resume_changed:
                store.save_resume(conn, key, r_key, o.a, o.b, o.through, o.resume)
            new_n += len(new)
            ended_n += len(ended)
    return new_n, ended_n, queued


def read_universe_summary(store: Store, cfg: Config) -> pd.DataFrame:
    """The universe-level summary over time (share of pairs in alert, mean tau and tails), as
    stored by the last update (see :func:`update_signals`)."""
    return store.read_universe(universe_key(signals_key(cfg)))


@dataclass(frozen=True, slots=True)
class HistoryNeed:
    """How many returns an asset needs before its pairs have a first full window.

    ``warmup`` returns go to the marginal filter before its first residual (real-time: the
    first estimation sample ``min_obs`` plus the return held back as the AR lag; in-sample:
    the lag alone, with at least ``min_obs + 1`` returns in all), then ``window`` residuals
    fill the first window; ``total`` is what an asset needs in all.
    """

    mode: str
    warmup: int
    window: int
    total: int

    def explain(self) -> str:
        if self.mode == "real-time":
            return (f"{self.warmup} (filter warm-up: {self.warmup - 1} returns and 1 lag) + "
                    f"{self.window} (window) = {self.total}")
        if self.total == self.window + 1:
            return f"1 (lag) + {self.window} (window) = {self.total}"
        return (f"{self.total} (the in-sample filter's least; a window needs "
                f"1 (lag) + {self.window})")


def history_need(cfg: Config) -> HistoryNeed:
    """Returns an asset needs for a first window under the configuration (see
    :class:`HistoryNeed`; :mod:`monitor.stats.marginals` gives the residual schedule)."""
    m = marginal_settings(cfg)
    window = cfg.rolling.window
    if m.mode == "real-time":
        return HistoryNeed(m.mode, m.min_returns, window, m.min_returns + window)
    return HistoryNeed(m.mode, 1, window, max(m.min_returns, window + 1))


@dataclass(frozen=True, slots=True)
class UpdateSummary:
    ingested: tuple[IngestReport, ...]
    marginals: MarginalSummary
    rolling: RollingSummary
    signals: SignalSummary
    seconds: float
    #: Returns an asset needs for a first window, and whether any window end is stored.
    need: HistoryNeed | None = None
    has_windows: bool = True

    def short_assets(self) -> dict[str, int]:
        """Assets with fewer returns than a first window needs (their returns held)."""
        if self.need is None:
            return {}
        return {a: n for a, n in sorted(self.marginals.held.items()) if n < self.need.total}

    def shortfall(self) -> str | None:
        """Why the update computed no window end at all (None when some are stored)."""
        if self.has_windows or self.need is None:
            return None
        held = sorted(self.marginals.held.items())
        shown = ", ".join(f"{a} {n}" if k else f"{a} has {n} returns"
                          for k, (a, n) in enumerate(held[:12]))
        more = f" and {len(held) - 12} more" if len(held) > 12 else ""
        if self.short_assets():
            return (f"no pair has a full window yet: {shown}{more}; each needs "
                    f"{self.need.explain()}")
        return (f"no pair has a full window yet: {shown}{more}, but no pair has "
                f"{self.need.window} common dates of residuals (the assets trade on different "
                "days); see the Inputs page or 'comove export returns'")

    def lines(self) -> list[str]:
        out = []
        for rep in self.ingested:
            out.extend(rep.lines())
        out.extend(self.marginals.lines())
        out.extend(self.rolling.lines())
        short = self.short_assets()
        if short and self.has_windows:
            out.append("  too little history for a first window yet: "
                       + ", ".join(f"{a} {n} returns" for a, n in short.items())
                       + f" (each needs {self.need.explain()})")
        out.extend(self.signals.lines())
        out.append(f"update finished in {self.seconds:.1f} s")
        return out


def _open_store(cfg: Config, create: bool) -> Store:
    """The configured store; a missing or empty one names the working directory, since a
    relative SQLite path (the default) is read from there."""
    try:
        store = Store(cfg.store.url, create=create)
    except InputError as exc:
        raise InputError(f"{exc}; is this the right working directory ({os.getcwd()})?"
                         ) from None
    if not store.assets():
        shown = store.shown_url
        store.close()
        raise InputError(f"store {shown} holds no returns: ingest a history file first (is "
                         f"this the right working directory? it is {os.getcwd()})")
    return store


def run_update(cfg: Config, *, progress: bool = True, wait: float = 0.0) -> UpdateSummary:
    """The whole daily job: configured sources, marginals, the rolling engine, signals (then,
    as it arrives, the alert queue), under the store's update lock
    (:func:`monitor.data.store_lock.update_lock`; ``wait`` seconds for a running update).

    Raises
    ------
    InputError
        No store at the configured URL (and no ``[[sources]]`` to fill one), a store
        holding no returns (the job would do nothing: a wrong working directory, say), or
        another update running after ``wait`` seconds.

    Notes
    -----
    A universe with too little history for any window is not an error here: the summary's
    :meth:`UpdateSummary.shortfall` says how many returns each asset has and needs (the
    ``comove update`` command exits 2 with it).
    """
    t0 = time.perf_counter()
    sources = read_configured_sources(cfg)
    with update_lock(cfg.store.url, shown_url(cfg.store.url), wait=wait):
        return _update(cfg, sources, progress, t0)


def _update(cfg: Config, sources: list[Source], progress: bool, t0: float) -> UpdateSummary:
    if sources:
        with Store(cfg.store.url) as store, StepProgress("sources", len(sources), "source",
                                                         enabled=progress) as bar:
            ingested = tuple(ingest_sources(store, sources))
            bar.update(len(sources))
    else:
        ingested = ()
    with _open_store(cfg, create=False) as store:
        marg = update_marginals(store, cfg, progress=progress)
        roll = update_rolling(store, cfg, progress=progress)
        sig = update_signals(store, cfg, progress=progress)
        has_windows = store.latest_window_end(rolling_key(cfg)) is not None
    return UpdateSummary(ingested, marg, roll, sig, time.perf_counter() - t0,
                         history_need(cfg), has_windows)
