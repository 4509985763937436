"""``comove serve`` and ``comove demo``: start the dashboard (the CLI hands over to here, so
that the library in ``monitor/`` never imports dash).

Security: the server binds 127.0.0.1 unless told otherwise; any other address needs an access
secret in the environment variable :data:`callbacks.app.SECRET_ENV` (HTTP basic
authentication, any user name), and the server refuses to start without it. Debug mode is
never on.

Host names: requests must name a host the dashboard answers to (``Host`` header): the
loopback names, the bind address, and any ``--server-name`` given; others get 400 (a guard
against DNS rebinding of the unauthenticated loopback server).

Serving: the dashboard runs on waitress, a production WSGI server in pure Python, not on
Flask's development server: :data:`DEFAULT_PROCESSES` server processes (``--processes``), each
with :data:`SERVER_THREADS` threads, accept on one listening socket. Threads of one process
share one interpreter, so pages computed at the same time for different users queue behind
each other there; several processes compute them side by side, one per core. Window studies
(background jobs) are shared by every process: one job folder, one bound on the studies
computing at once. A server process that dies is replaced. Behind a reverse proxy (TLS, a
team's host name), keep ``comove serve`` on 127.0.0.1 and let the proxy forward to it.
"""

from __future__ import annotations

import base64
import ipaddress
import os
import signal
import socket
import sys
import tempfile
import threading
import time
import webbrowser
from dataclasses import replace
from pathlib import Path

import pandas as pd

from monitor.common.errors import InputError
from monitor.config import Config, StoreConfig

from .app import LOOPBACK_HOSTS, SECRET_ENV, create_app
from .jobs import job_slots

#: Worker threads of each server process (waitress's default is 4).
SERVER_THREADS = 8
#: Bytes of a response waitress holds in memory before it spills to a temporary file (its
#: default is 1 MB; a Board or a Timeline response is 2 to 3 MB).
OUTPUT_IN_MEMORY = 64 * 2**20
#: Server processes by default: one per core, at most 4.
DEFAULT_PROCESSES = max(1, min(4, os.cpu_count() or 1))
#: A server process that stops within this many seconds of starting is not replaced: the
#: server stops with an error instead of restarting it in a loop.
QUICK_EXIT_SECONDS = 10.0
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


def _listen(host: str, port: int) -> socket.socket:
    """The listening socket every server process accepts on."""
    if not 0 < port < 65536:
        raise InputError(f"--port must be a TCP port (1-65535), got {port}")
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)  # a restart right after a stop
    try:
        sock.bind((host, port))
        sock.listen(1024)
    except OSError as exc:
        sock.close()
        raise InputError(f"--host {host} --port {port}: cannot listen there "
                         f"({exc.strerror or exc})") from None
    return sock


def serve(cfg: Config, host: str = "127.0.0.1", port: int = 8050, *,
          open_browser: bool = False, server_names: tuple[str, ...] = (),
          processes: int = DEFAULT_PROCESSES) -> None:
    """Serve the dashboard of ``cfg``'s store until interrupted; it answers to the loopback
    names, the bind address (unless a wildcard) and ``server_names``, from ``processes``
    server processes."""
    secret = access_secret(host)
    if isinstance(processes, bool) or not isinstance(processes, int) or processes < 1:
        raise InputError(f"--processes must be a whole number of at least 1, got {processes}")
    listener = _listen(host, port)
    from monitor.data.store import Store

    try:
        with Store(cfg.store.url, create=False) as store:  # refuses a missing store here
            shown = store.shown_url
    except BaseException:
        listener.close()
        raise
    bound = () if host in ("0.0.0.0", "::") else (host,)
    shared = {"secret": secret, "hosts": (*bound, *server_names),
              "cache_dir": tempfile.mkdtemp(prefix="comove-dash-"), "slots": job_slots()}
    url = f"http://{'127.0.0.1' if host in ('0.0.0.0', '::') else host}:{port}/"
    where = (f"{processes} processes x {SERVER_THREADS} threads" if processes > 1
             else f"{SERVER_THREADS} threads")
    print(f"dashboard on {url} (store {shown}; waitress, {where}; Ctrl+C stops it)",
          flush=True)
    if open_browser:
        threading.Timer(1.0, webbrowser.open, args=(url,)).start()
    try:
        if processes == 1:
            _serve_here(cfg, listener, shared)
        else:
            _supervise(cfg, listener, shared, processes)
    finally:
        listener.close()


def _serve_here(cfg: Config, listener: socket.socket, shared: dict) -> None:
    """One server process: its own store connections and app, on the shared socket."""
    from waitress import create_server

    from monitor.data.store import Store

    # A terminated server process still stops its window studies and closes the store.
    signal.signal(signal.SIGTERM, lambda *_: sys.exit(0))
    store = Store(cfg.store.url, create=False)
    app = create_app(cfg, store=store, secret=shared["secret"], hosts=shared["hosts"],
                     cache_dir=shared["cache_dir"], slots=shared["slots"])
    _render_index(app, shared["secret"])
    server = create_server(app.server, sockets=[listener], threads=SERVER_THREADS,
                           outbuf_overflow=OUTPUT_IN_MEMORY,
                           ident="comove")
    try:
        server.run()
    except KeyboardInterrupt:
        pass
    finally:
        server.close()
        app.jobs.shutdown()  # no window study outlives the server
        store.close()


def _render_index(app, secret: str | None) -> None:
    """Render the page once before serving: Dash registers the script bundles it serves
    while rendering it, and another server process may have answered the browser's first
    request (without this, that process refuses every script)."""
    headers = {"Host": LOOPBACK_HOSTS[0]}
    if secret:
        token = base64.b64encode(f"comove:{secret}".encode()).decode()
        headers["Authorization"] = f"Basic {token}"
    response = app.server.test_client().get("/", headers=headers)
    if response.status_code != 200:
        raise RuntimeError(f"the dashboard page did not render (HTTP {response.status_code})")


def _supervise(cfg: Config, listener: socket.socket, shared: dict, processes: int) -> None:
    """Start ``processes`` server processes, replace any that dies, stop them all on
    Ctrl+C or SIGTERM."""
    import multiprocess

    context = multiprocess.get_context("fork")  # the socket and job slots are inherited

    def start() -> tuple:
        child = context.Process(target=_serve_here, args=(cfg, listener, shared),
                                name="comove-server")
        child.start()
        return child, time.monotonic()

    previous = signal.signal(signal.SIGTERM, lambda *_: sys.exit(0))
    children = [start() for _ in range(processes)]
    try:
        while True:
            time.sleep(0.5)
            for k, (child, started) in enumerate(children):
                if child.is_alive():
                    continue
                if time.monotonic() - started < QUICK_EXIT_SECONDS:
                    raise InputError(f"a server process stopped right after starting (exit "
                                     f"code {child.exitcode}); see the lines above")
                print(f"server process {child.pid} stopped (exit code {child.exitcode}); "
                      "starting another", flush=True)
                children[k] = start()
    except KeyboardInterrupt:
        pass
    finally:
        signal.signal(signal.SIGTERM, previous)
        for child, _ in children:
            if child.is_alive():
                child.terminate()
        for child, _ in children:
            child.join(timeout=15)
            if child.is_alive():
                child.kill()
                child.join(timeout=5)


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
    _listen("127.0.0.1", port).close()  # refuse a busy port before building the store
    cfg = prepare_demo(store_url=store_url)
    serve(cfg, "127.0.0.1", port, open_browser=open_browser)
