"""One `comove update` at a time: a second one started while the first runs is refused with
exit 2 and one line saying who runs since when (or waits with --wait), on SQLite and on
PostgreSQL; the store ends as a single clean update leaves it. The lock dies with its
process (kill -9 included).

Invented demo data (the tail-shift scenario of synthetic_feeds).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from monitor.data.ingest import ingest_sources, read_file_source
from monitor.data.store import Store
from monitor.data.store_lock import update_lock
from synthetic_feeds import generate

from .conftest import take_snapshot

ROOT = Path(__file__).resolve().parents[1]
CODE = "import sys; from monitor.cli import main; sys.exit(main(sys.argv[1:]))"


def _comove(*args: str) -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.Popen([sys.executable, "-c", CODE, *args], cwd=ROOT, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _store(url: str, tmp_path: Path) -> Path:
    scen = generate("tail-shift", seed=2, calm_years=1.5, shifted_years=0.5, n_assets=3)
    path = tmp_path / "prices.csv"
    scen.prices.to_csv(path, float_format="%.12g", date_format="%Y-%m-%d")
    with Store(url) as store:
        ingest_sources(store, [read_file_source(path, "prices")])
    config = tmp_path / "comove.toml"
    config.write_text(f'[store]\nurl = "{url}"\n[rolling]\nwindow = 60\n')
    return config


def test_a_second_update_is_refused_while_one_runs(store_url, tmp_path):
    config = _store(store_url, tmp_path)
    with update_lock(store_url, "the store"):  # an update "running" in this process
        second = _comove("update", "--config", str(config))
        _, err = second.communicate(timeout=120)
    assert second.returncode == 2 and err.count("\n") == 1, err
    assert err.startswith("error: store ") and "another update is running since " in err
    holder = (f"(process {os.getpid()} on " if store_url.startswith("sqlite")
              else "(comove update from ")
    assert holder in err and "run this one later, or pass --wait SECONDS" in err


def test_two_updates_at_once_one_runs_the_other_is_refused_or_waits(store_url, tmp_path):
    config = _store(store_url, tmp_path)
    first = _comove("update", "--config", str(config))
    time.sleep(1.0)
    second = _comove("update", "--config", str(config))
    _, err2 = second.communicate(timeout=300)
    _, err1 = first.communicate(timeout=300)
    assert first.returncode == 0, err1
    if second.returncode == 0:  # the first had not taken the lock yet: they ran in turn
        assert "another update" not in err2
    else:
        assert second.returncode == 2 and "another update is running" in err2
    assert "Traceback" not in err1 + err2 and "IntegrityError" not in err1 + err2
    after = take_snapshot(store_url)
    # A third update finds nothing to do and changes nothing.
    third = _comove("update", "--config", str(config), "--wait", "60")
    assert third.communicate(timeout=300)[0] and third.returncode == 0
    assert take_snapshot(store_url).tables["metrics"] == after.tables["metrics"]


def test_the_lock_dies_with_its_process(store_url, tmp_path):
    config = _store(store_url, tmp_path)
    holder = subprocess.Popen([sys.executable, "-c", (
        "import sys, time; sys.path.insert(0, sys.argv[2]);"
        "from monitor.data.store_lock import update_lock\n"
        "with update_lock(sys.argv[1], 'store'):\n    print('held', flush=True); time.sleep(600)"),
        store_url, str(ROOT)], stdout=subprocess.PIPE, text=True)
    assert holder.stdout.readline().strip() == "held"
    refused = _comove("update", "--config", str(config))
    assert refused.communicate(timeout=120) and refused.returncode == 2
    holder.send_signal(signal.SIGKILL)
    holder.wait(timeout=30)
    after = _comove("update", "--config", str(config), "--wait", "30")
    _, err = after.communicate(timeout=300)
    assert after.returncode == 0, err


def test_wait_must_not_be_negative(tmp_path):
    proc = _comove("update", "--wait", "-1", "--store", f"sqlite:///{tmp_path / 's.sqlite'}")
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 2 and "--wait must be 0 or more seconds" in err
    pytest.importorskip("fcntl")
