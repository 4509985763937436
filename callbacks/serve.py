"""``comove serve`` and ``comove demo``: start the dashboard (the CLI hands over to here, so
that the library in ``monitor/`` never imports dash).

Security: the server binds 127.0.0.1 unless told otherwise; any other address needs an access
secret in the environment variable :data:`callbacks.app.SECRET_ENV` (HTTP basic
authentication, any user name), and the server refuses to start without it. Debug mode is
never on.

Host names: requests must name a host the dashboard answers to (``Host`` header): the
loopback names, the bind address, and any ``--server-name`` given; others get 400 (a guard
against DNS rebinding of the unauthenticated loopback server).

Serving: the dashboard runs on waitress, a production WSGI server in pure Python (several
threads, so that the board, a figure and a running window study are served side by side), not
on Flask's development server. Behind a reverse proxy (TLS, a team's host name), keep
``comove serve`` on 127.0.0.1 and let the proxy forward to it.
"""

from __future__ import annotations

import ipaddress
import os
import socket
import threading
import time
import webbrowser
from dataclasses import replace
from pathlib import Path

import pandas as pd

from monitor.common.errors import InputError
from monitor.config import Config, StoreConfig

from .app import SECRET_ENV, create_app

#: Worker threads of the WSGI server (waitress's default is 4).
SERVER_THREADS = 8
#: Shortest access secret accepted.
MIN_SECRET = 12
LOOPBACK_NAMES = ("localhost",)
DEMO_FOLDER = "comove-demo"
DEMO_SCENARIO = "marrowmere-decade"
#: The demo universe: eight of the scenario's twelve assets (every regime of the scenario is
#: among them), so that the first start -- filtering and the whole rolling backfill -- takes
#: about a minute on two cores.
DEMO_ASSETS = ("MRW40", "MRWSC", "OSV25", "SDR100", "MGB10", "OGB5", "CNDR", "TNQL")


def is_loopback(host: str) -> bool:
    """True for 127.0.0.0/8, ::1 and ``localhost``."""
    if host in LOOPBACK_NAMES:
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def access_secret(host: str, environ=os.environ) -> str | None:
    """The secret required to serve on ``host`` (None on the loopback interface).

    Raises
    ------
    InputError
        ``host`` is not a loopback address and the secret is missing or shorter than
        :data:`MIN_SECRET` characters.
    """
    if is_loopback(host):
        return None
    secret = environ.get(SECRET_ENV, "")
    if not secret:
        raise InputError(f"--host {host}: serving beyond this machine needs an access secret "
                         f"in the environment variable {SECRET_ENV}; refusing to start")
    if len(secret) < MIN_SECRET:
        raise InputError(f"{SECRET_ENV} must be at least {MIN_SECRET} characters long; "
                         "refusing to start")
    return secret


def _check_port(host: str, port: int) -> None:
    if not 0 < port < 65536:
        raise InputError(f"--port must be a TCP port (1-65535), got {port}")
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    with socket.socket(family, socket.SOCK_STREAM) as sock:
        try:
            sock.bind((host, port))
        except OSError as exc:
            raise InputError(f"--host {host} --port {port}: cannot listen there "
                             f"({exc.strerror or exc})") from None


def serve(cfg: Config, host: str = "127.0.0.1", port: int = 8050, *,
          open_browser: bool = False, server_names: tuple[str, ...] = ()) -> None:
    """Serve the dashboard of ``cfg``'s store until interrupted; it answers to the loopback
    names, the bind address (unless a wildcard) and ``server_names``."""
    secret = access_secret(host)
    _check_port(host, port)
    from monitor.data.store import Store

    store = Store(cfg.store.url, create=False)
    bound = () if host in ("0.0.0.0", "::") else (host,)
    app = create_app(cfg, store=store, secret=secret, hosts=(*bound, *server_names))
    url = f"http://{'127.0.0.1' if host in ('0.0.0.0', '::') else host}:{port}/"
    print(f"dashboard on {url} (store {store.shown_url}; waitress, {SERVER_THREADS} threads; "
          "Ctrl+C stops it)", flush=True)
    if open_browser:
        threading.Timer(1.0, webbrowser.open, args=(url,)).start()
    from waitress import create_server

    server = create_server(app.server, host=host, port=port, threads=SERVER_THREADS,
                           ident="comove")
    try:
        server.run()
    finally:
        server.close()
        app.jobs.shutdown()  # no window study outlives the server
        store.close()


def prepare_demo(folder: str | os.PathLike = DEMO_FOLDER, store_url: str | None = None,
                 *, progress: bool = True) -> Config:
    """Write the demo scenario, ingest it and bring the store up to date (idempotent: a second
    run finds everything stored and only checks it). Returns the demo's configuration."""
    from monitor.data.ingest import ingest_sources, read_file_source
    from monitor.data.store import Store
    from monitor.engine.pipeline import update_marginals, update_rolling, update_signals
    from synthetic_feeds import write_scenario

    t0 = time.perf_counter()
    out = Path(folder)
    prices = out / "demo-prices.csv"
    if not prices.is_file():
        full, _ = write_scenario(DEMO_SCENARIO, out, seed=0)
        frame = pd.read_csv(full, index_col=0)
        frame[list(DEMO_ASSETS)].dropna(how="all").to_csv(prices)
    url = store_url or f"sqlite:///{out / 'store.sqlite'}"
    cfg = replace(Config(), store=StoreConfig(url=url), source=f"demo ({DEMO_SCENARIO})")
    with Store(url) as store:
        ingest_sources(store, [read_file_source(prices, "prices")])
        update_marginals(store, cfg, progress=progress)
        update_rolling(store, cfg, progress=progress)
        update_signals(store, cfg, progress=progress)
    print(f"demo store ready in {time.perf_counter() - t0:.0f} s: {len(DEMO_ASSETS)} assets of "
          f"{DEMO_SCENARIO} (invented data) in {out}/", flush=True)
    return cfg


def demo(port: int = 8050, *, open_browser: bool = True, store_url: str | None = None) -> None:
    """``comove demo``: the demo store (built on first use), then the dashboard on 127.0.0.1."""
    _check_port("127.0.0.1", port)
    cfg = prepare_demo(store_url=store_url)
    serve(cfg, "127.0.0.1", port, open_browser=open_browser)
