"""Benchmark: precision and recall of the demo's alert episodes against its truth file.

Run from the repository root::

    .venv/bin/python tests/benchmarks/bench_demo_alerts.py [--folder DIR]

It prepares the demo store in ``DIR`` (default ``comove-demo-bench/``; a second run reuses
it, as ``comove demo`` does), computes every stored pair's episodes from its stored timeline
with the default signal settings and with the earlier defaults (every statistic against the
Gaussian), and scores both with :func:`synthetic_feeds.scoring.score_episodes`: an episode is
true when it overlaps a truth segment whose tail coefficient differs from the previous
segment's by at least 0.1, extended by the window length (250 business days); a rise is
detected when an episode of its tail overlaps it. Targets: precision >= 80 % at recall
>= 80 %. It prints the missed rises and the false episodes. The demo store takes about
3 minutes to build on 2 cores; the scoring a few seconds. Nothing here is a pass/fail test.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import pandas as pd

from callbacks.serve import prepare_demo
from monitor.data.store import Store
from monitor.settings import rolling_key, rolling_settings
from monitor.stats.signals import EARLIER_DEFAULTS, SignalSettings, pair_signals
from synthetic_feeds import TRUTH_FILE
from synthetic_feeds.scoring import score_episodes


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--folder", default="comove-demo-bench")
    args = ap.parse_args()
    t0 = time.perf_counter()
    cfg = prepare_demo(args.folder, progress=False)
    truth = json.loads((Path(args.folder) / TRUTH_FILE).read_text())
    key = rolling_key(cfg)
    window = rolling_settings(cfg).window
    with Store(cfg.store.url) as store:
        timelines = {pair: store.read_timeline(key, *pair) for pair in store.stored_pairs(key)}
    print(f"demo: {len(timelines)} pairs, window {window}; store ready in "
          f"{time.perf_counter() - t0:.0f} s")
    for label, settings in (("defaults (own baseline)", SignalSettings()),
                            ("earlier defaults (against the Gaussian)", EARLIER_DEFAULTS)):
        episodes = {pair: pair_signals(t, settings).episodes for pair, t in timelines.items()}
        # Truth pairs may list the assets in the other order; tails do not depend on it.
        order = {tuple(sorted(p["pair"])): tuple(p["pair"]) for p in truth["pairs"]}
        score = score_episodes(truth, {order[p]: e for p, e in episodes.items()},
                               lag_days=window)
        n_true = int(score.episodes["true"].sum())
        n_hit = int(score.rises["detected"].sum())
        print(f"\n== {label}\nprecision {100 * score.precision:.0f} % ({n_true} of "
              f"{len(score.episodes)} episodes)   recall {100 * score.recall:.0f} % ({n_hit} of "
              f"{len(score.rises)} rises)   [targets >= 80 % / >= 80 %]")
        with pd.option_context("display.width", 160):
            missed = score.rises[~score.rises["detected"]]
            if len(missed):
                print("missed rises:\n" + missed.round({"before": 3, "after": 3}).to_string(index=False))
            false = score.episodes[~score.episodes["true"]]
            if len(false):
                print("false episodes:\n" + false.to_string(index=False))


if __name__ == "__main__":
    main()
