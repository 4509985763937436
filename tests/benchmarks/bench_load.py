"""Benchmark: the dashboard under concurrent users, over real HTTP.

``comove serve`` is started on a store (a real process on waitress); N client threads then
each load every page the way a browser does after navigation, as Dash's own HTTP requests
(the router's ``/_dash-update-component`` call, then the page's main callback), one page
after another, for ``--rounds`` rounds. Printed per page and callback: p50 and p95 over all
requests, with 1 client and with ``--clients`` clients, and the ratio of the two p95s.

Run from the repository root (the 30-asset store ``bench_rolling.py --keep DIR`` leaves)::

    .venv/bin/python tests/benchmarks/bench_load.py --store sqlite:///DIR/store.sqlite

Targets (issue 14): with 10 concurrent clients every page's callbacks p95 <= 1 s; with one
client <= 300 ms. Nothing here is a pass/fail test.
"""

from __future__ import annotations

import argparse
import json
import os
import socket
import subprocess
import sys
import time
import urllib.request
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
PAGES = ("/", "/timeline", "/drilldown", "/episodes", "/inputs")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _post(base: str, payload: dict) -> float:
    data = json.dumps(payload).encode()
    req = urllib.request.Request(f"{base}/_dash-update-component", data=data,
                                 headers={"Content-Type": "application/json"})
    t0 = time.perf_counter()
    with urllib.request.urlopen(req, timeout=120) as r:
        r.read()
        if r.status != 200:
            raise RuntimeError(f"HTTP {r.status}")
    return time.perf_counter() - t0


def _spec(dep: dict, inputs: list[dict], state: list[dict] | None = None) -> dict:
    outputs = [{"id": o.rsplit(".", 1)[0], "property": o.rsplit(".", 1)[1]}
               for o in dep["output"].strip(".").split("...")]
    return {"output": dep["output"], "outputs": outputs if len(outputs) > 1 else outputs[0],
            "inputs": inputs, "state": state or [],
            "changedPropIds": [f"{i['id']}.{i['property']}" for i in inputs]}


def requests_per_page(base: str, pair: str, asset: str, day: str | None = None,
                      search: str = "", bounds: list[str] | None = None
                      ) -> dict[str, list[dict]]:
    """The Dash requests of each page load: the router (with ``search`` as the address's
    query), then the page's main callback (Board on ``day``, Timeline of ``pair``, Inputs of
    ``asset``) and, for the Board, its universe summary (stored range ``bounds``)."""
    with urllib.request.urlopen(f"{base}/_dash-dependencies", timeout=60) as r:
        deps = json.load(r)

    def dep(first_output: str) -> dict:
        return next(d for d in deps if d["output"].strip(".").startswith(first_output)
                    and "@" not in d["output"])  # not a duplicate output (a patch)

    router = dep("shell-nav.children")
    out = {}
    for page in PAGES:
        out[page] = [_spec(router, [{"id": "shell-url", "property": "pathname", "value": page}],
                           [{"id": "shell-url", "property": "search", "value": search}])]
    out["/"].append(_spec(dep("board-matrix-tau.figure"), [
        {"id": "board-date", "property": "date", "value": day},
        {"id": "board-tail-source", "property": "value", "value": "nonparametric"},
        {"id": "board-horizon", "property": "value", "value": "1m"}]))
    out["/"].append(_spec(dep("board-summary.figure"), [
        {"id": "board-universe-range", "property": "data", "value": bounds}],
        [{"id": "board-date", "property": "date", "value": day}]))
    out["/timeline"].append(_spec(dep("timeline-figure.figure"), [
        {"id": "timeline-pair", "property": "value", "value": pair}]))
    out["/inputs"].append(_spec(dep("inputs-residuals.figure"), [
        {"id": "inputs-asset", "property": "value", "value": asset},
        {"id": "inputs-lags", "property": "value", "value": 20}]))
    return out


def _client(base: str, plans: list[dict[str, list[dict]]], rounds: int
            ) -> dict[str, list[float]]:
    times: dict[str, list[float]] = {}
    for r in range(rounds):
        for page, payloads in plans[r % len(plans)].items():
            for k, payload in enumerate(payloads):
                name = f"{page} {('page', 'main callback', 'universe summary')[k]}"
                times.setdefault(name, []).append(_post(base, payload))
    return times


def run(base: str, plans: list[list[dict]], clients: int, rounds: int
        ) -> dict[str, tuple[float, float]]:
    """Each client ``c`` runs the plans ``plans[c % len(plans)]`` round after round."""
    with ThreadPoolExecutor(clients) as pool:
        parts = list(pool.map(lambda c: _client(base, plans[c % len(plans)], rounds),
                              range(clients)))
    merged: dict[str, list[float]] = {}
    for p in parts:
        for name, t in p.items():
            merged.setdefault(name, []).extend(t)
    return {name: (float(np.median(t)), float(np.percentile(t, 95)))
            for name, t in merged.items()}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--store", required=True)
    ap.add_argument("--window", type=int, default=250)
    ap.add_argument("--clients", type=int, default=10)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--processes", type=int, default=None,
                    help="server processes (default: the server's own, one per core)")
    ap.add_argument("--cold", action="store_true",
                    help="every request of every client different (another Board date, pair, "
                         "asset and address each time): no response is served from the cache")
    args = ap.parse_args()
    port = _free_port()
    config = Path(os.environ.get("TMPDIR", "/tmp")) / f"bench-load-{port}.toml"
    config.write_text(f'[store]\nurl = "{args.store}"\n[rolling]\nwindow = {args.window}\n')
    server = subprocess.Popen(
        [sys.executable, "-c", "import sys; from monitor.cli import main; sys.exit(main())",
         "serve", "--port", str(port), "--config", str(config),
         *([] if args.processes is None else ["--processes", str(args.processes)])], cwd=ROOT,
        env={**os.environ, "PYTHONPATH": str(ROOT)}, stdout=subprocess.DEVNULL,
        stderr=subprocess.STDOUT)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 120
        while True:
            try:
                urllib.request.urlopen(f"{base}/", timeout=5).read()
                break
            except OSError:
                if time.monotonic() > deadline or server.poll() is not None:
                    raise SystemExit("the server did not start") from None
                time.sleep(0.5)
        sys.path.insert(0, str(ROOT))
        from monitor.config import load_config
        from monitor.data.store import Store
        from monitor.settings import rolling_key, signals_key
        from monitor.stats.signals import universe_key

        cfg = load_config(str(config))
        with Store(args.store, create=False) as store:
            pairs = store.monitored_pairs(rolling_key(cfg))
            days = sorted(store.read_universe(universe_key(signals_key(cfg))).index)
        assets = sorted({a for p in pairs for a in p})

        def plan(k: int) -> dict[str, list[dict]]:
            a, b = pairs[(len(pairs) // 2 + 7 * k) % len(pairs)]
            day = None if not args.cold else f"{days[-1 - 5 * k]:%Y-%m-%d}"
            return requests_per_page(base, f"{a}/{b}", assets[k % len(assets)], day,
                                     f"?n={k}" if args.cold else "",
                                     [f"{days[0]:%Y-%m-%d}", f"{days[-1]:%Y-%m-%d}"])

        n = (args.clients + 1) * (args.rounds + 1) if args.cold else 1
        all_plans = [plan(k) for k in range(n)]
        run(base, [[all_plans[-1]]], 1, 1)  # warm-up: imports, first connections
        if args.cold:
            one = run(base, [all_plans[:args.rounds]], 1, args.rounds)
            many = run(base, [all_plans[args.rounds * (c + 1):args.rounds * (c + 2)]
                              for c in range(args.clients)], args.clients, args.rounds)
        else:
            one = run(base, [all_plans], 1, args.rounds)
            many = run(base, [all_plans], args.clients, args.rounds)
        print(f"store {args.store}: {len(pairs)} pairs; {args.rounds} rounds per client; "
              f"{'cold: every request different' if args.cold else 'the same requests'}; "
              f"waitress, {args.processes or 'default'} server process(es) on 127.0.0.1")
        print(f"{'request':34s} {'1 client p50':>12s} {'p95':>7s} "
              f"{f'{args.clients} clients p50':>17s} {'p95':>7s} {'ratio':>6s}")
        for name in one:
            (p1, q1), (pn, qn) = one[name], many[name]
            print(f"{name:34s} {p1 * 1e3:10.0f}ms {q1 * 1e3:5.0f}ms {pn * 1e3:15.0f}ms "
                  f"{qn * 1e3:5.0f}ms {qn / q1:6.1f}")
    finally:
        server.terminate()
        server.wait(timeout=30)
        config.unlink(missing_ok=True)


if __name__ == "__main__":
    main()
