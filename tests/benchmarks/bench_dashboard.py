"""Benchmark: the dashboard's server-side work on a real store, and the demo's start-up.

Run from the repository root::

    .venv/bin/python tests/benchmarks/bench_dashboard.py --store sqlite:///path/store.sqlite
    .venv/bin/python tests/benchmarks/bench_dashboard.py --demo     # time the demo build

With ``--store`` (e.g. the 30 x 5000 store ``bench_rolling.py --keep DIR`` leaves): every
page's layout and callbacks called as plain functions, ``--repeat`` times each, plus Dash's
JSON encoding of the outputs (what a browser waits for, short of the network and drawing);
p50 and p95 per callback. Targets (issue): Board ready <= 1.5 s for 30 assets; other callbacks
p95 <= 300 ms. The window study's timing has its own script (``bench_drilldown.py``).

With ``--demo``: the demo pipeline (scenario, ingest, GARCH filtering, rolling backfill,
signals) in a fresh folder, timed end to end; target <= 60 s after installation.
Prints the figures; nothing here is a pass/fail test.
"""

from __future__ import annotations

import argparse
import json
import tempfile
import time
from pathlib import Path

import numpy as np
import plotly

from callbacks import board, episodes, inputs, timeline
from layouts import board as board_layout
from layouts import episodes as episodes_layout
from layouts import inputs as inputs_layout
from layouts import timeline as timeline_layout
from monitor.config import Config, RollingConfig, StoreConfig
from monitor.data.store import Store
from monitor.views.common import StoreView


def _time(fn, repeat: int) -> tuple[float, float]:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        json.dumps(out, cls=plotly.utils.PlotlyJSONEncoder)
        times.append(time.perf_counter() - t0)
    return float(np.median(times)), float(np.percentile(times, 95))


def bench_store(url: str, window: int, repeat: int) -> None:
    cfg = Config(store=StoreConfig(url=url), rolling=RollingConfig(window=window))
    with Store(url, create=False) as store:
        view = StoreView.open(cfg, store)
        pairs = store.monitored_pairs(view.rolling_key)
        assets = sorted({a for p in pairs for a in p})
        print(f"store: {len(assets)} assets, {len(pairs)} pairs ({url})")
        a, b = pairs[len(pairs) // 2]
        cases = {
            "Board: layout + first callback (latest date)":
                lambda: (board_layout.layout(view, {}), board.show_board(view, None, "model")),
            "Board: a past date, nonparametric":
                lambda: board.show_board(view, "2019-06-28", "nonparametric"),
            "Timeline: layout + pair": lambda: (timeline_layout.layout(view, {}),
                                                timeline.show_pair(view, f"{a}/{b}")),
            "Episodes: layout": lambda: episodes_layout.layout(view, {}),
            "Episodes: filter one pair": lambda: episodes.show_episodes(view, f"{a}/{b}",
                                                                        ["lower"], None),
            "Inputs: layout": lambda: inputs_layout.layout(view, {}),
            "Inputs: diagnostics of an asset": lambda: inputs.show_diagnostics(view, assets[0],
                                                                               20),
        }
        print(f"{'callback':48s} {'p50 ms':>8s} {'p95 ms':>8s}")
        for name, fn in cases.items():
            p50, p95 = _time(fn, repeat)
            print(f"{name:48s} {p50 * 1e3:8.0f} {p95 * 1e3:8.0f}")


def bench_demo() -> None:
    from callbacks.serve import prepare_demo

    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        prepare_demo(Path(tmp) / "demo", progress=False)
        first = time.perf_counter() - t0
        t0 = time.perf_counter()
        prepare_demo(Path(tmp) / "demo", progress=False)
        again = time.perf_counter() - t0
    print(f"demo store from nothing: {first:.1f} s; second start (store reused): {again:.1f} s")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--store", help="store URL to time the pages on")
    ap.add_argument("--window", type=int, default=250, help="the store's rolling window")
    ap.add_argument("--repeat", type=int, default=20)
    ap.add_argument("--demo", action="store_true", help="time the demo build instead")
    args = ap.parse_args()
    if args.demo:
        bench_demo()
    if args.store:
        bench_store(args.store, args.window, args.repeat)


if __name__ == "__main__":
    main()
