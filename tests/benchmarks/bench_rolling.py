"""Benchmark: full backfill and one-day update of a 30-asset universe, against a plain loop.

Run from the repository root (about a quarter of an hour for the default size on 2 cores)::

    .venv/bin/python tests/benchmarks/bench_rolling.py [--assets 30] [--days 5000] [--workers 0]

1. ``synthetic_feeds`` ``wide-grid`` scenario (invented data) with ``--assets`` x ``--days``
   (one extra day is held back), ingested into a fresh SQLite store in a temporary folder.
2. ``comove update`` from scratch (the full backfill): marginals, then every pair's rolling
   metrics with window 250, step 1, all candidate families; wall times printed per step.
3. The held-back day is ingested and ``update`` timed again (the daily incremental run).
4. Baseline: a plain per-window loop (`bench_fit.loop_fit` for every candidate slot, plus
   ``scipy.stats.kendalltau`` / ``spearmanr``) on a sample of the same windows, scaled to all
   windows; agreement with the stored metrics on that sample (same AIC winner, |d loglik|).
Prints the figures; nothing here is a pass/fail test.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy import stats

sys.path.insert(0, str(Path(__file__).parent))
from bench_fit import loop_fit

from monitor.config import ComputeConfig, Config, StoreConfig
from monitor.data.ingest import ingest_sources, read_file_source
from monitor.data.store import Store
from monitor.engine.pipeline import (
    update_marginals,
    update_rolling,
    update_signals,
)
from monitor.settings import marginal_settings, rolling_settings
from monitor.stats.copulas import FAMILY_NAMES
from monitor.stats.empirical import pseudo_observations
from monitor.stats.fitting import candidate_slots
from synthetic_feeds import generate


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--assets", type=int, default=30)
    ap.add_argument("--days", type=int, default=5000)
    ap.add_argument("--workers", type=int, default=0, help="0: one per core")
    ap.add_argument("--sample", type=int, default=60, help="windows in the loop sample")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--keep", metavar="DIR",
                    help="build the store in DIR and keep it (for bench_dashboard.py)")
    args = ap.parse_args()

    scen = generate("wide-grid", seed=args.seed, n_assets=args.assets, n_days=args.days + 1)
    prices = scen.prices
    with tempfile.TemporaryDirectory() as scratch:
        tmp = Path(args.keep or scratch)
        tmp.mkdir(parents=True, exist_ok=True)
        url = f"sqlite:///{tmp / 'store.sqlite'}"
        cfg = Config(store=StoreConfig(url=url), compute=ComputeConfig(workers=args.workers))
        prices.iloc[:-1].to_csv(tmp / "history.csv", float_format="%.12g")
        prices.to_csv(tmp / "today.csv", float_format="%.12g")
        with Store(url) as store:
            t0 = time.perf_counter()
            ingest_sources(store, [read_file_source(tmp / "history.csv", "prices")])
            t_ingest = time.perf_counter() - t0
            t0 = time.perf_counter()
            update_marginals(store, cfg, progress=True)
            t_marg = time.perf_counter() - t0
            t0 = time.perf_counter()
            roll = update_rolling(store, cfg, progress=True)
            t_roll = time.perf_counter() - t0
            t0 = time.perf_counter()
            update_signals(store, cfg)
            t_sig0 = time.perf_counter() - t0
            print(f"universe: {args.assets} assets x {args.days} days, {roll.pairs} pairs, "
                  f"{roll.new_windows} window ends (window 250, step 1, all families)")
            total = t_ingest + t_marg + t_roll + t_sig0
            print(f"full backfill: ingest {t_ingest:.1f} s, marginals {t_marg:.1f} s, rolling "
                  f"{t_roll:.1f} s, signals {t_sig0:.1f} s, total {total:.1f} s "
                  f"({total / 60:.1f} min)")
            t0 = time.perf_counter()
            ingest_sources(store, [read_file_source(tmp / "today.csv", "prices")])
            m1 = update_marginals(store, cfg, progress=False)
            r1 = update_rolling(store, cfg, progress=False)
            t_day = time.perf_counter() - t0
            update_signals(store, cfg)
            t_sig = time.perf_counter() - t0 - t_day
            print(f"one-day update: ingest + marginals + rolling {t_day:.1f} s "
                  f"({m1.new_residuals} residuals, {r1.new_windows} window ends); "
                  f"signals, episodes and alert queue {t_sig:.1f} s; total {t_day + t_sig:.1f} s")
            _baseline(store, cfg, roll.new_windows, t_roll, args)


def _baseline(store: Store, cfg: Config, total_windows: int, t_roll: float, args) -> None:
    rng = np.random.default_rng(args.seed)
    m_key = marginal_settings(cfg).key
    settings = rolling_settings(cfg)
    key = settings.key(m_key)
    z = store.read_residuals(m_key)
    pairs = store.stored_pairs(key)
    chosen = [pairs[i] for i in rng.choice(len(pairs), size=min(6, len(pairs)), replace=False)]
    slots = candidate_slots(FAMILY_NAMES)
    same, dll, n, t_loop = 0, [], 0, 0.0
    per_pair = max(1, args.sample // len(chosen))
    for a, b in chosen:
        tl = store.read_timeline(key, a, b)
        common = z[[a, b]].dropna()
        for row in tl.sample(per_pair, random_state=int(rng.integers(1 << 31))).itertuples():
            win = common.loc[row.start:row.date]
            t0 = time.perf_counter()
            u = pseudo_observations(win[a].to_numpy())
            v = pseudo_observations(win[b].to_numpy())
            tau = stats.kendalltau(u, v)[0]
            stats.spearmanr(u, v)
            results = []
            for fam in slots:
                ll = loop_fit(fam, u, v, tau)
                results.append((2 * fam.n_params - 2 * ll, fam.name, ll))
            t_loop += time.perf_counter() - t0
            _aic, name, ll = min(results)
            same += name == row.family
            dll.append(abs(ll - row.loglik))
            n += 1
    loop_total = t_loop / n * total_windows
    print(f"plain loop on {n} sampled windows: {t_loop / n * 1e3:.1f} ms per window -> "
          f"{loop_total / 60:.1f} min for all {total_windows} (estimated); engine {t_roll:.1f} s;"
          f" ratio {loop_total / t_roll:.0f}x")
    print(f"agreement on the sample: same AIC winner {same}/{n} ({same / n:.1%}), "
          f"max |d loglik| of the winner {max(dll):.2e}")


if __name__ == "__main__":
    main()
