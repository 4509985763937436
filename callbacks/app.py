"""The app factory: builds the Dash app for a configuration and registers every page.

Pages are routed by our own small router (one callback on the URL) rather than Dash's global
page registry, so that several apps can live in one process (tests build many).

Every request must name one of the allowed host names in its ``Host`` header (the loopback
names by default, see :data:`LOOPBACK_HOSTS`): a page on another site cannot reach the
loopback server through a DNS name that it rebinds to 127.0.0.1. A path under Dash's asset
routes that leaves its folder (``..``) is answered 404, not 500.
"""

from __future__ import annotations

import hmac
import importlib
import tempfile
from urllib.parse import parse_qs, unquote

import dash
import diskcache
from dash import Input, Output, State
from flask import Response, request

from layouts import ids
from layouts.pages import PAGES
from layouts.shell import nav, not_found, shell
from monitor.config import Config
from monitor.data.store import Store
from monitor.views.common import StoreView

from .cache import ResponseCache
from .jobs import DEFAULT_JOBS, BoundedJobs

#: Environment variable holding the access secret required off the loopback interface.
SECRET_ENV = "COMOVE_DASHBOARD_SECRET"
#: Host names every dashboard answers to (with any port).
LOOPBACK_HOSTS = ("127.0.0.1", "localhost", "::1")


def page_modules(kind: str) -> dict[str, object]:
    """``layouts`` or ``callbacks`` module of every page, by path."""
    return {p.path: importlib.import_module(f"{kind}.{p.module}") for p in PAGES}


def create_app(cfg: Config, *, store: Store | None = None, secret: str | None = None,
               cache_dir: str | None = None, hosts: tuple[str, ...] = (),
               max_jobs: int = DEFAULT_JOBS, slots=None) -> dash.Dash:
    """The dashboard for ``cfg``.

    Parameters
    ----------
    cfg : Config
    store : Store, optional
        An open store (default: opened at ``cfg.store.url``, read by the dashboard).
    secret : str, optional
        When given, every request must carry it as the password of HTTP basic
        authentication (any user name): required whenever the server listens beyond
        127.0.0.1.
    cache_dir : str, optional
        Folder of the background-callback cache (default: a new temporary folder).
    hosts : tuple of str
        Host names the server answers to besides :data:`LOOPBACK_HOSTS` (the bind address,
        a team's name behind a reverse proxy); any other ``Host`` header gets 400.
    max_jobs : int
        Window studies computing at once (:class:`callbacks.jobs.BoundedJobs`); the app's
        ``jobs`` attribute holds the manager, to shut it down with the server.
    slots : semaphore, optional
        Job slots shared with other server processes (:func:`callbacks.jobs.job_slots` of
        ``max_jobs``), which then share ``cache_dir`` too.
    """
    store = store or Store(cfg.store.url, create=False)
    view = StoreView.open(cfg, store)
    manager = BoundedJobs(diskcache.Cache(cache_dir or tempfile.mkdtemp(
        prefix="comove-dash-")), max_jobs, slots)
    app = dash.Dash(__name__, title="comove", suppress_callback_exceptions=True,
                    background_callback_manager=manager, update_title=None)
    app.layout = shell(view.provenance())
    app.responses = ResponseCache(store)  # type: ignore[attr-defined]
    layouts = page_modules("layouts")

    @app.callback(Output(ids.NAV, "children"), Output(ids.PAGE, "children"),
                  Input(ids.URL, "pathname"), State(ids.URL, "search"))
    def route(path, search):
        path = path or "/"
        query = {k: v[-1] for k, v in parse_qs((search or "").lstrip("?")).items()}
        module = layouts.get(path)
        if module is None:
            return nav(path), not_found(path)
        return nav(path), app.responses(f"page {path}", lambda q: module.layout(view, dict(q)),
                                        tuple(sorted(query.items())))

    for module in page_modules("callbacks").values():
        module.register(app, view)
    _guard_requests(app, (*LOOPBACK_HOSTS, *hosts))
    if secret:
        _require_secret(app, secret)
    app.jobs = manager  # type: ignore[attr-defined]
    return app


def host_name(header: str) -> str:
    """The host of a ``Host`` header, without its port (``[::1]:8050`` -> ``::1``)."""
    header = header.strip().lower()
    if header.startswith("["):
        return header[1:].split("]", 1)[0]
    return header.rsplit(":", 1)[0] if header.count(":") == 1 else header


def _guard_requests(app: dash.Dash, hosts: tuple[str, ...]) -> None:
    allowed = {h.lower() for h in hosts}

    @app.server.before_request
    def check_host():
        if host_name(request.headers.get("Host", "")) not in allowed:
            return Response("comove: unknown host name (start the dashboard with "
                            "--server-name NAME to answer to it)", 400)
        if request.path.startswith("/_dash-") and ".." in unquote(request.path).split("/"):
            return Response("not found", 404)
        return None


def _require_secret(app: dash.Dash, secret: str) -> None:
    expected = secret.encode()

    @app.server.before_request
    def check():
        auth = request.authorization
        given = (auth.password or "").encode() if auth is not None else b""
        if not hmac.compare_digest(given, expected):
            return Response("comove: access secret required", 401,
                            {"WWW-Authenticate": 'Basic realm="comove"'})
        return None
