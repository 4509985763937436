"""`comove serve` security and start-up: loopback by default, a secret beyond it, basic
authentication enforced by the real Flask server of the app (its WSGI test client)."""

from __future__ import annotations

import base64
import re
import socket

import pytest

from callbacks.app import SECRET_ENV, create_app
from callbacks.serve import MIN_SECRET, access_secret, is_loopback
from monitor import cli
from monitor.common.errors import InputError
from monitor.data.store import Store

from ..conftest import free_port


@pytest.mark.parametrize("host", ["127.0.0.1", "127.0.0.2", "::1", "localhost"])
def test_loopback_needs_no_secret(host):
    assert is_loopback(host)
    assert access_secret(host, environ={}) is None


@pytest.mark.parametrize("host", ["0.0.0.0", "192.168.1.20", "::", "dash.example"])
def test_other_addresses_need_a_long_secret(host):
    assert not is_loopback(host)
    with pytest.raises(InputError, match=rf"--host {host}: .*{SECRET_ENV}; refusing to start"):
        access_secret(host, environ={})
    with pytest.raises(InputError, match=f"at least {MIN_SECRET} characters"):
        access_secret(host, environ={SECRET_ENV: "short"})
    assert access_secret(host, environ={SECRET_ENV: "x" * MIN_SECRET}) == "x" * MIN_SECRET


def test_serve_refuses_to_start_without_the_secret(dash_store, monkeypatch, capsys):
    monkeypatch.delenv(SECRET_ENV, raising=False)
    code = cli.main(["serve", "--host", "0.0.0.0", "--store", dash_store.url])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1
    assert err.startswith("error: --host 0.0.0.0: serving beyond this machine needs an access")


def test_serve_refuses_a_port_in_use_and_a_missing_store(dash_store, tmp_path, capsys):
    with socket.socket() as busy:
        busy.bind(("127.0.0.1", 0))
        busy.listen()
        port = busy.getsockname()[1]
        assert cli.main(["serve", "--port", str(port), "--store", dash_store.url]) == 2
    assert f"--port {port}: cannot listen there" in capsys.readouterr().err
    missing = f"sqlite:///{tmp_path / 'none.sqlite'}"
    assert cli.main(["serve", "--store", missing]) == 2
    assert "no store there yet" in capsys.readouterr().err
    assert not (tmp_path / "none.sqlite").exists()


def test_secret_is_enforced_on_every_request(dash_store):
    secret = "correct horse battery"
    with Store(dash_store.url, create=False) as store:
        app = create_app(dash_store.cfg, store=store, secret=secret)
        client = app.server.test_client()
        for path in ("/", "/_dash-layout", "/_dash-dependencies"):
            denied = client.get(path)
            assert denied.status_code == 401
            assert denied.headers["WWW-Authenticate"].startswith("Basic")
        wrong = base64.b64encode(b"analyst:wrong-secret-here").decode()
        assert client.get("/", headers={"Authorization": f"Basic {wrong}"}).status_code == 401
        good = base64.b64encode(f"analyst:{secret}".encode()).decode()
        assert client.get("/", headers={"Authorization": f"Basic {good}"}).status_code == 200


def test_loopback_app_serves_without_credentials(dash_store):
    with Store(dash_store.url, create=False) as store:
        app = create_app(dash_store.cfg, store=store)
        client = app.server.test_client()
        assert client.get("/").status_code == 200
        layout = client.get("/_dash-layout").get_json()
        assert "statistical estimates with model risk" in str(layout)




def _comove_serve(port: int, store_url: str, *args: str):
    """`comove serve` as a user starts it: a process of its own, output captured, no secret."""
    import os
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[2]
    env = {**os.environ, "PYTHONPATH": str(root), "PYTHONUNBUFFERED": "1"}
    env.pop(SECRET_ENV, None)
    return subprocess.Popen(
        [sys.executable, "-c", "import sys; from monitor.cli import main; sys.exit(main())",
         "serve", "--port", str(port), "--store", store_url, *args],
        cwd=root, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)


def test_comove_serve_answers_on_a_production_wsgi_server(dash_store):
    """`comove serve` as a user starts it: a real process on a free port, HTTP 200 from the
    page, and no Flask development-server warning (it runs on waitress)."""
    import time
    import urllib.request

    port = free_port()
    proc = _comove_serve(port, dash_store.url)
    try:
        status, body, deadline = None, "", time.monotonic() + 60
        while time.monotonic() < deadline and proc.poll() is None:
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/", timeout=5) as r:
                    status, body = r.status, r.read().decode()
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/_dash-layout",
                                            timeout=10) as r:
                    layout_status = r.status
                break
            except OSError:
                time.sleep(0.3)
        assert status == 200 and layout_status == 200, proc.poll()
        assert "<title>comove</title>" in body or "comove" in body
    finally:
        proc.terminate()
        out, _ = proc.communicate(timeout=30)
    assert f"dashboard on http://127.0.0.1:{port}/" in out
    assert "waitress" in out
    # Flask's development server announces itself with this warning; waitress never does.
    assert "development server" not in out.lower() and "WARNING: This is" not in out
    assert "Traceback" not in out


# ----------------------------------------------------------------------------- issue 14
def test_only_the_allowed_host_names_are_answered(dash_store):
    # DNS rebinding: a page on evil.example whose name resolves to 127.0.0.1 sends
    # "Host: evil.example"; the loopback server has no authentication, so it must refuse.
    from callbacks.app import host_name

    assert host_name("[::1]:8050") == "::1" and host_name("Localhost:8050") == "localhost"
    assert host_name("127.0.0.1") == "127.0.0.1"
    with Store(dash_store.url, create=False) as store:
        app = create_app(dash_store.cfg, store=store, hosts=("risk-board.example",))
        client = app.server.test_client()
        for host in ("localhost", "127.0.0.1:8050", "[::1]:8050", "risk-board.example"):
            assert client.get("/", headers={"Host": host}).status_code == 200, host
        for host in ("evil.example", "evil.example:8050", "127.0.0.1.evil.example", ""):
            denied = client.get("/_dash-layout", headers={"Host": host})
            assert denied.status_code == 400 and b"unknown host name" in denied.data, host


def test_a_path_leaving_the_asset_folders_is_404(dash_store):
    with Store(dash_store.url, create=False) as store:
        client = create_app(dash_store.cfg, store=store).server.test_client()
        for path in ("/_dash-component-suites/dash/../../../../etc/passwd",
                     "/_dash-component-suites/dash/%2e%2e/%2e%2e/etc/passwd"):
            assert client.get(path).status_code == 404, path


def test_window_studies_are_bounded_queued_and_reaped(tmp_path):
    import time

    import diskcache
    import multiprocess
    import psutil

    from callbacks.jobs import BoundedJobs

    cache = diskcache.Cache(str(tmp_path / "jobs"))
    jobs = BoundedJobs(cache, max_jobs=1)

    def job(key, progress_key, args, context):
        cache.set(f"start-{key}", time.monotonic())
        time.sleep(args)
        cache.set(key, f"done {key}")

    first = jobs.call_job_fn("a", job, 1.5, {})
    time.sleep(0.5)
    second = jobs.call_job_fn("b", job, 0.1, {})
    deadline = time.monotonic() + 30
    label = None
    while time.monotonic() < deadline and label is None:
        label = cache.get(jobs._make_progress_key("b"))
        time.sleep(0.05)
    assert label[2] == "waiting: 1 study running, this one 1 in the queue"
    while time.monotonic() < deadline and not (jobs.result_ready("a") and jobs.result_ready("b")):
        time.sleep(0.05)
    # One slot: the second started only after the first finished (1.5 s after it began).
    assert cache.get("start-b") - cache.get("start-a") >= 1.4
    time.sleep(0.2)
    assert not jobs.job_running(first) and not jobs.job_running(second)
    alive = {p.pid for p in multiprocess.active_children()}  # (reaps the finished ones)
    assert first not in alive and second not in alive
    assert not psutil.pid_exists(first) and not psutil.pid_exists(second)  # no zombie left
    third = jobs.call_job_fn("c", job, 60, {})
    time.sleep(0.5)
    assert jobs.job_running(third)
    jobs.shutdown()  # the server stops: no study outlives it
    assert not jobs.job_running(third) and not psutil.pid_exists(third)


def test_responses_are_reused_until_the_store_changes(dash_store, tmp_path):
    import datetime as dt
    import shutil

    import sqlalchemy as sa

    from callbacks.cache import ResponseCache
    from monitor.data.store import outbox

    path = tmp_path / "store.sqlite"
    shutil.copy(sa.engine.make_url(dash_store.url).database, path)
    with Store(f"sqlite:///{path}", create=False) as store:
        cache = ResponseCache(store, size=2)
        calls = []

        def compute(*x):
            calls.append(x)
            return len(calls)

        assert cache("board", compute, "2021-01-04", "model") == 1
        assert cache("board", compute, "2021-01-04", "model") == 1  # the same store: reused
        assert cache("board", compute, "2021-01-05", "model") == 2  # other inputs
        with store.transaction() as conn:  # anything stored changes the fingerprint
            store.queue_messages(conn, [{
                "message_id": "<x@test>", "settings": "s", "rule": "r", "kind": "episode",
                "asset_a": "A", "asset_b": "B", "tail": "lower",
                "event_date": dt.date(2021, 1, 4), "subject": "s", "body_text": "t",
                "body_html": "h"}], outbox)
        assert cache("board", compute, "2021-01-04", "model") == 3
        assert (cache.hits, cache.misses) == (1, 3)


def test_several_server_processes_answer_side_by_side_and_stop_together(dash_store):
    """`comove serve --processes 2`: two server processes accept on one port, concurrent
    requests are all answered, and SIGTERM to the command stops every one of them."""
    import signal
    import time
    import urllib.request
    from concurrent.futures import ThreadPoolExecutor

    import psutil

    port = free_port()
    proc = _comove_serve(port, dash_store.url, "--processes", "2")
    url = f"http://127.0.0.1:{port}/_dash-layout"

    def get(address):
        with urllib.request.urlopen(address if isinstance(address, str) else url,
                                    timeout=30) as r:
            return r.status

    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and proc.poll() is None:
            try:
                get(0)
                break
            except OSError:
                time.sleep(0.3)
        servers = psutil.Process(proc.pid).children()
        assert len(servers) == 2, servers
        with ThreadPoolExecutor(8) as pool:
            assert list(pool.map(get, range(40))) == [200] * 40
            # The page's scripts, from whichever process answers (each registers them).
            with urllib.request.urlopen(f"http://127.0.0.1:{port}/", timeout=30) as r:
                page = r.read().decode()
            scripts = re.findall(r'src="(/_dash-component-suites/[^"]+)"', page)
            assert scripts
            urls = [f"http://127.0.0.1:{port}{s}" for s in scripts] * 6
            assert list(pool.map(get, urls)) == [200] * len(urls)
        proc.send_signal(signal.SIGTERM)
        out, _ = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, out
    assert "waitress, 2 processes x 8 threads" in out and "Traceback" not in out
    gone = time.monotonic() + 10
    while time.monotonic() < gone and any(psutil.pid_exists(s.pid) for s in servers):
        time.sleep(0.1)
    assert not any(psutil.pid_exists(s.pid) for s in servers)


def test_serve_refuses_a_process_count_below_one(dash_store, capsys):
    assert cli.main(["serve", "--store", dash_store.url, "--processes", "0"]) == 2
    err = capsys.readouterr().err
    assert err == "error: --processes must be a whole number of at least 1, got 0\n"


def test_each_server_process_serves_the_scripts_of_a_page_another_rendered(dash_store):
    # The browser's page may come from one server process and its scripts from another.
    # Dash registers the script bundles of a process while rendering the page there, so
    # each server process renders it once before serving (callbacks.serve._render_index).
    # A process of its own per case: the registry is per interpreter.
    import os
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[2]
    with Store(dash_store.url, create=False) as store:
        page = create_app(dash_store.cfg, store=store).server.test_client().get(
            "/", headers={"Host": "127.0.0.1"}).get_data(as_text=True)
    scripts = re.findall(r'src="(/_dash-component-suites/[^"]+)"', page)
    assert len(scripts) >= 5
    probe = (
        "import sys\n"
        "from callbacks.app import create_app\n"
        "from callbacks.serve import _render_index\n"
        "from monitor.config import Config, StoreConfig\n"
        "app = create_app(Config(store=StoreConfig(url=sys.argv[1])))\n"
        "if sys.argv[2] == 'render':\n"
        "    _render_index(app, None)\n"
        "import threading\n"
        "from concurrent.futures import ThreadPoolExecutor\n"
        "go = threading.Barrier(len(sys.argv[3:]))\n"
        "def get(path):\n"
        "    go.wait()\n"  # the scripts requested at once, as a browser does
        "    return app.server.test_client().get(path, headers={'Host': '127.0.0.1'})"
        ".status_code\n"
        "with ThreadPoolExecutor(len(sys.argv[3:])) as pool:\n"
        "    print(*pool.map(get, sys.argv[3:]))\n")

    def statuses(case: str) -> list[str]:
        out = subprocess.run([sys.executable, "-c", probe, dash_store.url, case, *scripts],
                             cwd=root, capture_output=True, text=True, timeout=120,
                             env={**os.environ, "PYTHONPATH": str(root)}, check=True)
        return out.stdout.split()

    assert statuses("render") == ["200"] * len(scripts)
    # What a process that had not rendered the page answered: Dash marks its set-up done
    # before doing it, so the scripts requested meanwhile find no registered bundle (a
    # race; it showed on every try here, three tries allowed).
    assert any("500" in statuses("no") for _ in range(3))
