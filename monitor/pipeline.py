"""The daily job behind ``comove update``: pull configured sources, filter every asset's
returns, store what is new.

Each step is one transaction: an interrupted update leaves the store as it was before that
step, and running it again continues from there (work already stored is not redone).
"""

from __future__ import annotations

import os
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field
from itertools import combinations

import numpy as np
import pandas as pd
from tqdm import tqdm

from .config import Config, SourceConfig
from .errors import InputError
from .ingest import (
    IngestReport,
    Source,
    expand_paths,
    ingest_sources,
    read_file_source,
    read_sql_table_source,
)
from .marginals import FilteredSeries, MarginalSettings, extend_series, filter_series
from .rolling import RollingSettings, pair_metrics, window_end_positions
from .signals import PairSignals, SignalSettings, pair_signals, universe_summary
from .store import Store


def marginal_settings(cfg: Config) -> MarginalSettings:
    """The marginal settings the configuration asks for."""
    return MarginalSettings(mode=cfg.marginals.mode, refit_every=cfg.marginals.refit_every)


def read_configured_sources(cfg: Config) -> list[Source]:
    """Read and validate every ``[[sources]]`` entry (nothing is stored yet)."""
    out = []
    for i, src in enumerate(cfg.sources, start=1):
        out.extend(_read_source(src, i))
    return out


def _read_source(src: SourceConfig, i: int) -> list[Source]:
    if src.path:
        return [read_file_source(p, src.kind) for p in expand_paths(src.path)]
    url = src.url or os.environ.get(src.url_env, "")
    if not url:
        raise InputError(f"sources[{i}]: environment variable {src.url_env} is not set")
    return [read_sql_table_source(url, src.kind, query=src.query or None,
                                  table=src.table or None)]


@dataclass(frozen=True, slots=True)
class MarginalSummary:
    """What the marginal step did."""

    settings_key: str
    filtered: int
    new_residuals: int
    recomputed: tuple[str, ...]
    fallbacks: dict[str, int]
    skipped: dict[str, str] = field(default_factory=dict)

    def lines(self) -> list[str]:
        out = [(f"marginals ({self.settings_key}): {self.filtered} asset(s) filtered, "
               f"{self.new_residuals} new residual(s)")]
        if self.recomputed:
            out.append(f"  recomputed from the start: {', '.join(self.recomputed)}")
        if self.fallbacks:
            out.append("  fits on the EWMA fallback (GARCH refused; see the data page): "
                       + ", ".join(f"{a} {n}" for a, n in sorted(self.fallbacks.items())))
        for asset, why in sorted(self.skipped.items()):
            out.append(f"  skipped {asset}: {why}")
        return out


def _filter_one(asset: str, returns: pd.Series, previous: FilteredSeries | None,
                settings: MarginalSettings) -> tuple[str, FilteredSeries, bool]:
    """Worker: extend the stored result when it is a prefix of the data, else recompute."""
    if previous is not None and previous.is_prefix_of(returns):
        return asset, extend_series(previous, returns), False
    return asset, filter_series(returns, settings), previous is not None


def update_marginals(store: Store, cfg: Config, *, progress: bool = True) -> MarginalSummary:
    """Filter every stored asset (incrementally where possible) and store the new residuals.

    Assets run in a process pool (``compute.workers``; 0 means one per core): the GARCH fits
    are independent, and the ``arch`` package is not thread-safe in its warning handling.
    """
    settings = marginal_settings(cfg)
    key = settings.key
    returns = store.read_returns()
    todo, skipped = [], {}
    for asset in returns.columns:
        series = returns[asset].dropna()
        series.name = asset
        if len(series) < settings.min_returns:
            skipped[asset] = (f"{len(series)} returns, the filter needs {settings.min_returns}")
            continue
        previous = store.load_filtered(key, asset)
        if previous is not None and previous.n_input == len(series) and previous.is_prefix_of(
                series):
            continue  # nothing new for this asset
        # A stored result whose input record was dropped (a revision) is recomputed too.
        stale = previous is None and store.residual_count(key, asset) > 0
        todo.append((asset, series, previous, stale))
    results: list[tuple[str, FilteredSeries, bool, FilteredSeries | None]] = []
    workers = cfg.compute.workers or os.cpu_count() or 1
    bar = tqdm(total=len(todo), desc="marginals", unit="asset", disable=not progress or None,
               leave=False)
    try:
        if workers > 1 and len(todo) > 1:
            with ProcessPoolExecutor(min(workers, len(todo))) as pool:
                futures = {pool.submit(_filter_one, a, s, p, settings): (p, st)
                           for a, s, p, st in todo}
                for fut in as_completed(futures):
                    asset, fs, redone = fut.result()
                    previous, stale = futures[fut]
                    results.append((asset, fs, redone or stale, previous))
                    bar.update()
        else:
            for a, s, p, st in todo:
                asset, fs, redone = _filter_one(a, s, p, settings)
                results.append((asset, fs, redone or st, p))
                bar.update()
    finally:
        bar.close()
    written = 0
    with store.transaction() as conn:
        for _asset, fs, redone, previous in results:
            written += store.save_filtered(conn, fs, None if redone or previous is None
                                           else previous)
    return MarginalSummary(
        settings_key=key, filtered=len(results), new_residuals=written,
        recomputed=tuple(sorted(a for a, _, redone, _ in results if redone)),
        fallbacks={a: fs.n_fallback for a, fs, _, _ in results if fs.n_fallback},
        skipped=skipped)




# ----------------------------------------------------------------------------- rolling engine
def rolling_settings(cfg: Config) -> RollingSettings:
    r = cfg.rolling
    return RollingSettings(window=r.window, step=r.step, families=tuple(r.families),
                           criterion=r.criterion, tail_q=r.tail_q)


def rolling_key(cfg: Config) -> str:
    """Settings key of the stored rolling metrics (marginal settings plus rolling ones)."""
    return rolling_settings(cfg).key(marginal_settings(cfg).key)


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


def _pair_task(task: _PairTask, settings: RollingSettings):
    """Worker: one pair's new window ends."""
    out = pair_metrics(task.dates, task.za, task.zb, settings, task.positions,
                       start=task.warm, previous_tau=task.last_tau)
    return task, out


@dataclass(frozen=True, slots=True)
class RollingSummary:
    settings_key: str
    pairs: int
    updated_pairs: int
    new_windows: int
    backend: str

    def lines(self) -> list[str]:
        return [(f"rolling ({self.settings_key}, {self.backend}): {self.updated_pairs} of "
                f"{self.pairs} pair(s) updated, {self.new_windows} new window end(s)")]


def _pair_tasks(store: Store, key: str, settings: RollingSettings, z: pd.DataFrame,
                pairs: list[tuple[str, str]]) -> list[_PairTask]:
    tasks = []
    for a, b in pairs:
        common = z[[a, b]].dropna()
        dates = pd.DatetimeIndex(common.index)
        state = store.load_pair_state(key, a, b)
        after, warm, last_tau, replace_all = -1, None, None, False
        if state is not None:
            hit = dates.get_indexer([pd.Timestamp(state["last_date"])])[0]
            if hit >= 0:
                after, warm, last_tau = int(hit), state["warm"], state["last_tau"]
            else:
                replace_all = True  # the stored end is no longer a common date: start over
        positions = window_end_positions(len(dates), settings, after)
        if positions.size:
            tasks.append(_PairTask(a, b, dates, common[a].to_numpy(), common[b].to_numpy(),
                                   positions, warm, last_tau, replace_all))
    return tasks


def _run_tasks(tasks: list[_PairTask], settings: RollingSettings, cfg: Config,
               progress: bool):
    """Yield (task, PairMetrics) as pairs finish, on the configured backend."""
    bar = tqdm(total=len(tasks), desc="rolling", unit="pair", disable=not progress or None,
               leave=False)
    try:
        if cfg.compute.backend == "dask":
            from distributed import Client
            from distributed import as_completed as dask_completed

            with Client(cfg.compute.scheduler, timeout="20s") as client:
                futures = client.map(_pair_task, tasks, settings=settings, pure=False)
                for fut in dask_completed(futures):
                    yield fut.result()
                    bar.update()
            return
        workers = cfg.compute.workers or os.cpu_count() or 1
        if workers > 1 and len(tasks) > 1:
            with ProcessPoolExecutor(min(workers, len(tasks))) as pool:
                futures = [pool.submit(_pair_task, t, settings) for t in tasks]
                for fut in as_completed(futures):
                    yield fut.result()
                    bar.update()
        else:
            for t in tasks:
                yield _pair_task(t, settings)
                bar.update()
    finally:
        bar.close()


def update_rolling(store: Store, cfg: Config, *, progress: bool = True) -> RollingSummary:
    """Compute every window end not yet stored, for every monitored pair, and store each pair
    in its own transaction as it finishes (an interrupted update keeps the finished pairs;
    a rerun computes exactly the missing ones, from the same stored state)."""
    m_key = marginal_settings(cfg).key
    settings = rolling_settings(cfg)
    key = settings.key(m_key)
    z = store.read_residuals(m_key)
    pairs = _universe_pairs([str(c) for c in z.columns], cfg)
    tasks = _pair_tasks(store, key, settings, z, pairs)
    new = 0
    for task, out in _run_tasks(tasks, settings, cfg, progress):
        with store.transaction() as conn:
            store.save_pair_metrics(conn, key, task.a, task.b, out.frame, out.last_params,
                                    out.last_tau, replace_all=task.replace_all)
        new += len(out.frame)
    return RollingSummary(key, len(pairs), len(tasks), new, cfg.compute.backend)


# ----------------------------------------------------------------------------- signals
def signals_key(cfg: Config, settings: SignalSettings | None = None) -> str:
    """Settings key of stored episodes: rolling key plus the signal thresholds."""
    settings = settings or SignalSettings()
    return f"{rolling_key(cfg)}|{settings.key}"


def read_pair_signals(store: Store, cfg: Config, a: str, b: str,
                      settings: SignalSettings | None = None) -> PairSignals | None:
    """A pair's signals from its stored timeline (None when nothing is stored)."""
    key = rolling_key(cfg)
    timeline = store.read_timeline(key, a, b)
    if timeline.empty:
        return None
    return pair_signals(timeline, settings)


def _episode_row(e) -> dict:
    return {"tail": e.tail, "start": e.start.date(), "onset": e.onset.date(),
            "end": None if e.end is None else e.end.date(), "cause": e.cause,
            "statistic": e.statistic, "peak_date": e.peak_date.date(),
            "peak_value": float(e.peak_value), "peak_tail_emp": float(e.peak_tail_emp),
            "peak_tail_model": float(e.peak_tail_model),
            "peak_gauss_tail": float(e.peak_gauss_tail),
            "peak_kendall_tau": float(e.peak_kendall_tau)}


@dataclass(frozen=True, slots=True)
class SignalSummary:
    settings_key: str
    pairs: int
    in_alert: tuple[tuple[str, str, str], ...]
    new_episodes: int
    ended_episodes: int

    def lines(self) -> list[str]:
        out = [(f"signals: {len(self.in_alert)} of {self.pairs} pair(s) in alert; "
               f"{self.new_episodes} new episode(s), {self.ended_episodes} ended")]
        for a, b, tails in self.in_alert[:20]:
            out.append(f"  in alert: {a}/{b} ({tails} tail)")
        if len(self.in_alert) > 20:
            out.append(f"  ... and {len(self.in_alert) - 20} more")
        return out


def update_signals(store: Store, cfg: Config, pairs: list[tuple[str, str]] | None = None
                   ) -> SignalSummary:
    """Recompute every pair's signals from its stored timeline and store its episodes,
    each pair in its own transaction."""
    settings = SignalSettings()
    r_key = rolling_key(cfg)
    key = signals_key(cfg, settings)
    pairs = pairs if pairs is not None else store.stored_pairs(r_key)
    in_alert, new_n, ended_n = [], 0, 0
    for a, b in sorted(pairs):
        timeline = store.read_timeline(r_key, a, b)
        if timeline.empty:
            continue
        sig = pair_signals(timeline, settings)
        last = sig.frame.iloc[-1]
        tails = [t for t in ("lower", "upper") if last[f"alert_{t}"]]
        if tails:
            in_alert.append((a, b, " and ".join(tails)))
        with store.transaction() as conn:
            new, ended = store.sync_episodes(conn, key, a, b,
                                             [_episode_row(e) for e in sig.episodes])
        new_n += len(new)
        ended_n += len(ended)
    return SignalSummary(key, len(pairs), tuple(in_alert), new_n, ended_n)


def read_universe_summary(store: Store, cfg: Config) -> pd.DataFrame:
    """The universe-level summary over time (share of pairs in alert, mean tau and tails)."""
    r_key = rolling_key(cfg)
    frames = {}
    for a, b in store.stored_pairs(r_key):
        frames[(a, b)] = pair_signals(store.read_timeline(r_key, a, b)).frame
    return universe_summary(frames)


@dataclass(frozen=True, slots=True)
class UpdateSummary:
    ingested: tuple[IngestReport, ...]
    marginals: MarginalSummary
    rolling: RollingSummary
    signals: SignalSummary
    seconds: float

    def lines(self) -> list[str]:
        out = []
        for rep in self.ingested:
            out.extend(rep.lines())
        out.extend(self.marginals.lines())
        out.extend(self.rolling.lines())
        out.extend(self.signals.lines())
        out.append(f"update finished in {self.seconds:.1f} s")
        return out


def run_update(cfg: Config, *, progress: bool = True) -> UpdateSummary:
    """The whole daily job: configured sources, marginals, the rolling engine, signals (then,
    as it arrives, the alert queue)."""
    t0 = time.perf_counter()
    sources = read_configured_sources(cfg)
    with Store(cfg.store.url) as store:
        ingested = tuple(ingest_sources(store, sources)) if sources else ()
        marg = update_marginals(store, cfg, progress=progress)
        roll = update_rolling(store, cfg, progress=progress)
        sig = update_signals(store, cfg)
    return UpdateSummary(ingested, marg, roll, sig, time.perf_counter() - t0)
