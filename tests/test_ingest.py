"""Tests for ingest (monitor.data.ingest, the ``ingest`` and ``export returns`` commands, SQL sources
and ``[[sources]]`` in the config) on both store backends, SQLite and PostgreSQL.

The contracts are docs/contracts.md: "``comove ingest FILE… [--kind prices|returns]`` validates and
stores; refuses bad files whole", "``--kind prices`` stores log returns ln(P_t / P_{t-1})",
"every write of a step is one transaction ... re-running is idempotent", "nothing is silently
dropped: ingest reports every row or column it could not use", exit code 2 with one ``error:``
line naming the file, row/date, column or option at fault, and ``export returns`` as a wide
CSV (date + one column per asset). A refusal must leave the store exactly as it was: for SQLite
the file's SHA-256 is compared, for PostgreSQL an ordered dump of every table
(tests/conftest.py ``store_snapshot``).

Expected returns are computed here independently with ``np.log(P_t / P_s)`` (s the asset's
previous priced date). The store computes ln P_t - ln P_s, which equals it up to rounding: both
are within a few units in the last place of ln P (IEEE 754 binary64, machine epsilon 2.2e-16;
Goldberg 1991, "What every computer scientist should know about floating-point arithmetic",
section 1.2), hence the absolute tolerance ``LOG_ATOL`` below. Checksums are checked against
``hashlib.sha256`` of the file bytes (FIPS 180-4).

Fictional assets only (tree names).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import io
import math
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa
from sqlalchemy.pool import NullPool

from monitor import cli
from monitor.common.errors import InputError
from monitor.config import SourceConfig, load_config
from monitor.data.ingest import (
    coverage,
    expand_paths,
    ingest_sources,
    read_file_source,
    read_sql_table_source,
)
from monitor.data.store import Store, marginal_fits, residuals
from monitor.data.store import prices as prices_table
from monitor.data.store import returns as returns_table

# ln P is at most ~ln(1e3) ~ 7 here; a few ulps of that (7 * 2.2e-16 * 4 ~ 6e-15) bounds the
# difference between ln(P_t / P_s) and ln P_t - ln P_s.
LOG_ATOL = 1e-14

BASE = (
    "date,ALDER,BIRCH\n"
    "2021-03-01,100.0,50.0\n"
    "2021-03-02,101.5,\n"          # BIRCH has no price on 03-02
    "2021-03-03,99.25,50.5\n"
    "2021-03-04,102.0,51.25\n"
    "2021-03-05,103.5,50.75\n"
)
# BASE with ALDER's 03-03 price revised from 99.25 to 99.5.
REVISED = BASE.replace("2021-03-03,99.25,", "2021-03-03,99.5,")
# Repeats BASE's last date unchanged, then two new dates.
LATER = (
    "date,ALDER,BIRCH\n"
    "2021-03-05,103.5,50.75\n"
    "2021-03-08,104.0,51.5\n"
    "2021-03-09,102.75,52.0\n"
)


def day(text: str) -> dt.date:
    return dt.date.fromisoformat(text)


def write(tmp_path: Path, name: str, content: str | bytes) -> Path:
    path = tmp_path / name
    path.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(content, bytes):
        path.write_bytes(content)
    else:
        path.write_text(content, encoding="utf-8")
    return path


def frame_of(text: str) -> pd.DataFrame:
    return pd.read_csv(io.StringIO(text), index_col="date", parse_dates=["date"])


def ingest(url: str, *paths: Path, kind: str = "prices", accept: bool = False):
    sources = [read_file_source(p, kind) for p in paths]
    with Store(url) as store:
        return ingest_sources(store, sources, accept_revisions=accept)


def stored(url: str, table: sa.Table) -> dict[tuple[str, dt.date], float]:
    """{(asset, date): value} of a store table, read directly (not through Store)."""
    engine = sa.create_engine(url, poolclass=NullPool)
    try:
        with engine.connect() as conn:
            rows = conn.execute(sa.select(table.c.asset, table.c.date, table.c.value)).all()
    finally:
        engine.dispose()
    return {(a, d): v for a, d, v in rows}


def query(url: str, stmt) -> list[tuple]:
    engine = sa.create_engine(url, poolclass=NullPool)
    try:
        with engine.connect() as conn:
            return [tuple(r) for r in conn.execute(stmt)]
    finally:
        engine.dispose()


def expected_returns(*texts_or_frames) -> dict[tuple[str, dt.date], float]:
    """ln(P_t / P_s) per asset on its own calendar (s = previous date with a price), from the
    prices of all inputs together (later inputs win on a shared date)."""
    frames = [frame_of(x) if isinstance(x, str) else x for x in texts_or_frames]
    out = {}
    assets = sorted({c for f in frames for c in f.columns})
    for asset in assets:
        series = pd.concat([f[asset].dropna() for f in frames if asset in f.columns])
        series = series[~series.index.duplicated(keep="last")].sort_index()
        p = series.to_numpy()
        for d, r in zip(series.index[1:], np.log(p[1:] / p[:-1]), strict=True):
            out[(asset, d.date())] = float(r)
    return out


def assert_returns_equal(actual: dict, expected: dict) -> None:
    assert sorted(actual) == sorted(expected)
    keys = sorted(expected)
    np.testing.assert_allclose([actual[k] for k in keys], [expected[k] for k in keys],
                               rtol=0, atol=LOG_ATOL)


def one_error_line(err: str, *needles: str) -> str:
    """The contract's refusal: exactly one line, starting 'error: ', no traceback."""
    lines = err.splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("error: "), err
    assert "Traceback" not in err
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])
    return lines[0]


@pytest.fixture(autouse=True)
def clean_environment(monkeypatch, tmp_path):
    """No config or store from the machine; the working directory is the test's own."""
    monkeypatch.delenv("COMOVE_CONFIG", raising=False)
    monkeypatch.delenv("COMOVE_STORE", raising=False)
    monkeypatch.chdir(tmp_path)


@pytest.fixture
def run(capsys):
    """``comove`` in process: (exit code, stdout, stderr)."""
    def run_(*args) -> tuple[int, str, str]:
        code = cli.main([str(a) for a in args])
        captured = capsys.readouterr()
        return code, captured.out, captured.err
    return run_


# ----------------------------------------------------------------------------- refusals
def _csv(*rows: str) -> str:
    return "\n".join(rows) + "\n"


# (id, content or None for a missing file, the message after "<path>").
REFUSALS = [
    ("empty", "", r": file is empty$"),
    ("header_only", "date,ALDER,BIRCH\n", r": header only, no data rows$"),
    ("no_date_column", _csv("day,ALDER", "2021-03-08,1.0", "2021-03-09,2.0"),
     (r": no 'date' column \(columns: day, ALDER\); give --columns date=day if 'day' holds "
     r"the dates$")),
    ("duplicate_date", _csv("date,ALDER", "2021-03-08,1.0", "2021-03-08,2.0", "2021-03-09,3.0"),
     r": date 2021-03-08 appears more than once with different values$"),
    ("text_in_number", _csv("date,ALDER", "2021-03-08,1.0", "2021-03-09,abc"),
     r": line 3 \(2021-03-09\), column 'ALDER': 'abc' is not a finite number$"),
    ("zero_price", _csv("date,ALDER", "2021-03-08,1.0", "2021-03-09,0"),
     r": price 0\.0 on 2021-03-09 in column 'ALDER' is not a positive finite number$"),
    ("negative_price", _csv("date,ALDER", "2021-03-08,1.0", "2021-03-09,-5"),
     r": price -5\.0 on 2021-03-09 in column 'ALDER' is not a positive finite number$"),
    ("infinite_price", _csv("date,ALDER", "2021-03-08,1.0", "2021-03-09,inf"),
     r": line 3 \(2021-03-09\), column 'ALDER': 'inf' is not a finite number$"),
    ("nan_price", _csv("date,ALDER", "2021-03-08,1.0", "2021-03-09,NaN"),
     r": line 3 \(2021-03-09\), column 'ALDER': 'NaN' is not a finite number$"),
    ("unparseable_date", _csv("date,ALDER", "2021-03-08,1.0", "2021-13-45,2.0"),
     r": line 3: cannot read date '2021-13-45' \(expected YYYY-MM-DD\)$"),
    # One day of closes is refused only when an asset has no earlier stored price (issue 12).
    ("one_day_new_asset", _csv("date,ALDER,CEDAR", "2021-03-08,104.0,1.0"),
     (r": 2021-03-08, column 'CEDAR': the store holds no earlier price of 'CEDAR', so this price "
     r"gives no return \(a one-day file of closes needs each asset's previous close\); a new "
     r"asset needs a history file first$")),
    ("one_day_before_the_history", _csv("date,asset,value", "2021-02-26,ALDER,99.0"),
     (r": 2021-02-26, column 'ALDER': the store holds no earlier price of 'ALDER' before "
     r"2021-03-01, so this price gives no return .*")),
    ("column_without_values", _csv("date,ALDER,BIRCH", "2021-03-08,1.0,", "2021-03-09,2.0,"),
     r": column 'BIRCH' has no values$"),
    ("binary", b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR\x00\x00",
     r": binary file, expected CSV or Parquet$"),
    ("missing_file", None, r": file not found$"),
    ("conflicts_with_stored", REVISED,
     (r": 2021-03-03, column 'ALDER': price 99\.5 differs from the stored 99\.25 \(1 value\(s\) "
      r"differ; pass --accept-revisions to replace them, keeping the old values in the audit "
      r"table\)$")),
]


@pytest.mark.parametrize(("content", "message"), [c[1:] for c in REFUSALS],
                         ids=[c[0] for c in REFUSALS])
def test_refusal_leaves_the_store_unchanged(store_url, tmp_path, store_snapshot, run, content,
                                            message):
    ingest(store_url, write(tmp_path, "base.csv", BASE))
    bad = tmp_path / "bad.csv"
    if content is not None:
        write(tmp_path, "bad.csv", content)
    before = store_snapshot(store_url)
    with pytest.raises(InputError, match="^" + re.escape(str(bad)) + message):
        ingest(store_url, bad)
    assert store_snapshot(store_url) == before
    code, out, err = run("ingest", bad, "--store", store_url)
    assert (code, out) == (2, "")
    assert re.fullmatch("error: " + re.escape(str(bad)) + message, one_error_line(err))
    assert store_snapshot(store_url) == before


def test_conflicting_returns_are_refused(store_url, tmp_path, store_snapshot):
    ingest(store_url, write(tmp_path, "r1.csv", _csv("date,OAK", "2021-03-01,0.01",
                                                     "2021-03-02,-0.02")), kind="returns")
    before = store_snapshot(store_url)
    bad = write(tmp_path, "r2.csv", _csv("date,OAK", "2021-03-02,-0.025", "2021-03-03,0.0"))
    with pytest.raises(InputError, match=r"r2\.csv: 2021-03-02, column 'OAK': return -0\.025 "
                                         r"differs from the stored -0\.02 \(1 value"):
        ingest(store_url, bad, kind="returns")
    assert store_snapshot(store_url) == before


def test_filling_a_gap_revises_a_stored_return_only_when_accepted(store_url, tmp_path,
                                                                  store_snapshot):
    # A price filled into BIRCH's 03-02 gap changes the stored 03-03 return, which spanned
    # the gap: that is a revision of a stored value, so it needs the same consent.
    ingest(store_url, write(tmp_path, "base.csv", BASE))
    before = store_snapshot(store_url)
    fill = write(tmp_path, "fill.csv", _csv("date,BIRCH", "2021-03-01,50.0", "2021-03-02,50.25"))
    with pytest.raises(InputError, match=r"fill\.csv: 2021-03-03, column 'BIRCH': the log "
                                         r"return implied by the prices, .* differs"):
        ingest(store_url, fill)
    assert store_snapshot(store_url) == before
    (report,) = ingest(store_url, fill, accept=True)
    assert (report.new_values, report.revised_values) == (1, 0)
    assert_returns_equal(stored(store_url, returns_table),
                         expected_returns(BASE, _csv("date,BIRCH", "2021-03-02,50.25")))
    with Store(store_url) as store:
        audit = store.revision_history()
    assert list(zip(audit["table_name"], audit["asset"], audit["date"], strict=True)) == [
        ("returns", "BIRCH", day("2021-03-03"))]
    assert math.isclose(audit["old_value"].iloc[0], math.log(50.5 / 50.0), abs_tol=LOG_ATOL)
    assert math.isclose(audit["new_value"].iloc[0], math.log(50.5 / 50.25), abs_tol=LOG_ATOL)


def test_accepted_revision_is_audited_and_updates_prices_and_returns(store_url, tmp_path, run):
    ingest(store_url, write(tmp_path, "base.csv", BASE))
    dates = [day(f"2021-03-0{k}") for k in range(1, 6)]
    with Store(store_url) as store, store.transaction() as conn:
        # Stand-ins for marginal results derived from the returns, to see which are dropped.
        for asset in ("ALDER", "BIRCH"):
            conn.execute(residuals.insert(), [
                {"settings": "m", "asset": asset, "date": d, "value": 0.1, "sigma": 1.0,
                 "fit_seq": 0} for d in dates])
            conn.execute(marginal_fits.insert(), [
                {"settings": "m", "asset": asset, "seq": k, "fit_end": d, "spec": "x",
                 "converged": True, "fallback": "", "payload": "{}"}
                for k, d in enumerate(dates)])
    revised = write(tmp_path, "revised.csv", REVISED)
    (report,) = ingest(store_url, revised, accept=True)
    assert (report.outcome, report.new_values, report.revised_values) == ("stored", 0, 1)

    assert stored(store_url, prices_table)[("ALDER", day("2021-03-03"))] == 99.5
    assert_returns_equal(stored(store_url, returns_table), expected_returns(REVISED))
    with Store(store_url) as store:
        audit = store.revision_history()
        history = store.ingest_history()
    assert [h.revised_values for h in history] == [1, 0]
    assert set(audit["ingest_id"]) == {history[0].id}
    rows = sorted(zip(audit["table_name"], audit["asset"], audit["date"], audit["old_value"],
                      audit["new_value"], strict=True))
    assert [r[:3] for r in rows] == [("prices", "ALDER", day("2021-03-03")),
                                     ("returns", "ALDER", day("2021-03-03")),
                                     ("returns", "ALDER", day("2021-03-04"))]
    assert rows[0][3:] == (99.25, 99.5)  # the old price is kept exactly
    # The returns on either side of the revised price: ln(99.25/101.5) -> ln(99.5/101.5) and
    # ln(102/99.25) -> ln(102/99.5).
    np.testing.assert_allclose(
        [rows[1][3], rows[1][4], rows[2][3], rows[2][4]],
        [np.log(99.25 / 101.5), np.log(99.5 / 101.5), np.log(102 / 99.25), np.log(102 / 99.5)],
        rtol=0, atol=LOG_ATOL)
    # Results derived from ALDER's returns on or after the revised date are dropped;
    # earlier ones and the other asset's stay.
    kept = query(store_url, sa.select(residuals.c.asset, residuals.c.date))
    assert sorted(kept) == sorted([("ALDER", d) for d in dates[:2]]
                                  + [("BIRCH", d) for d in dates])
    kept_fits = query(store_url, sa.select(marginal_fits.c.asset, marginal_fits.c.fit_end))
    assert sorted(kept_fits) == sorted(kept)

    # The command line: the same revision again is nothing new; a second one is accepted.
    code, out, err = run("ingest", revised, "--store", store_url, "--accept-revisions")
    assert (code, err) == (0, "") and "nothing new" in out
    again = write(tmp_path, "again.csv", REVISED.replace(",99.5,", ",99.75,"))
    code, out, err = run("ingest", again, "--store", store_url, "--accept-revisions")
    assert (code, err) == (0, "")
    assert "stored 0 new value(s) and 1 revision(s)" in out
    assert stored(store_url, prices_table)[("ALDER", day("2021-03-03"))] == 99.75


# ----------------------------------------------------------------------------- all or nothing
def test_second_bad_file_stores_nothing_from_the_first(store_url, tmp_path, store_snapshot, run):
    later = write(tmp_path, "later.csv", LATER)
    bad = write(tmp_path, "bad.csv", _csv("date,ALDER", "2021-03-10,1.0", "2021-03-11,x"))
    # A fresh store: the refusal must not even create it.
    empty = store_snapshot(store_url)
    code, out, err = run("ingest", later, bad, "--store", store_url)
    assert (code, out) == (2, "")
    one_error_line(err, str(bad), "line 3")
    assert store_snapshot(store_url) == empty
    # An existing store.
    ingest(store_url, write(tmp_path, "base.csv", BASE))
    before = store_snapshot(store_url)
    with pytest.raises(InputError, match=re.escape(str(bad))):
        ingest(store_url, later, bad)
    code, out, err = run("ingest", later, bad, "--store", store_url)
    assert code == 2
    assert store_snapshot(store_url) == before


def test_second_file_conflicting_stores_nothing_from_the_first(store_url, tmp_path,
                                                               store_snapshot, run):
    ingest(store_url, write(tmp_path, "base.csv", BASE))
    later = write(tmp_path, "later.csv", LATER)
    conflict = write(tmp_path, "revised.csv", REVISED)
    # The second file revises a value the first one stores in the same call.
    later_revised = write(tmp_path, "later_revised.csv", LATER.replace("104.0", "104.5"))
    before = store_snapshot(store_url)
    with pytest.raises(InputError, match=re.escape(str(conflict)) + r": 2021-03-03"):
        ingest(store_url, later, conflict)
    assert store_snapshot(store_url) == before
    with pytest.raises(InputError, match=re.escape(str(later_revised)) + r": 2021-03-08, "
                                         r"column 'ALDER': price 104\.5 differs from the "
                                         r"stored 104\.0"):
        ingest(store_url, later, later_revised)
    assert store_snapshot(store_url) == before
    code, out, err = run("ingest", later, conflict, "--store", store_url)
    assert (code, out) == (2, "")
    one_error_line(err, str(conflict), "--accept-revisions")
    assert store_snapshot(store_url) == before


# ----------------------------------------------------------------------------- idempotence
def test_same_file_again_changes_nothing(store_url, tmp_path, store_snapshot, run):
    path = write(tmp_path, "base.csv", BASE)
    ingest(store_url, path)
    before = store_snapshot(store_url)
    (report,) = ingest(store_url, path)
    assert report.outcome == "unchanged" and report.ingest_id is None
    assert report.lines()[0] == (f"{path}: nothing new (5 rows already stored); the store is "
                                 "unchanged")
    assert store_snapshot(store_url) == before
    code, out, err = run("ingest", path, "--store", store_url)
    assert (code, err) == (0, "")
    assert out.startswith(f"{path}: nothing new")
    assert store_snapshot(store_url) == before
    # The same values in long layout are the same data: nothing new either.
    tidy = frame_of(BASE).stack().dropna().rename("value").rename_axis(["date", "asset"]).reset_index()
    long = tmp_path / "base_long.csv"
    tidy.to_csv(long, index=False, date_format="%Y-%m-%d")
    code, out, err = run("ingest", long, "--store", store_url)
    assert (code, err) == (0, "") and "nothing new" in out
    assert store_snapshot(store_url) == before


def test_later_file_stores_only_the_new_dates(store_url, tmp_path):
    ingest(store_url, write(tmp_path, "base.csv", BASE))
    (report,) = ingest(store_url, write(tmp_path, "later.csv", LATER))
    # 03-05 is repeated unchanged; 03-08 and 03-09 are new for both assets.
    assert (report.outcome, report.new_values, report.revised_values) == ("stored", 4, 0)
    assert (report.first_date, report.last_date) == (day("2021-03-05"), day("2021-03-09"))
    with Store(store_url) as store:
        first, second = sorted(h.id for h in store.ingest_history())
    by_ingest = query(store_url, sa.select(prices_table.c.date, prices_table.c.ingest_id))
    assert {d for d, i in by_ingest if i == second} == {day("2021-03-08"), day("2021-03-09")}
    assert all(i == first for d, i in by_ingest if d <= day("2021-03-05"))
    rets = query(store_url, sa.select(returns_table.c.asset, returns_table.c.date,
                                      returns_table.c.ingest_id))
    assert sorted((a, d) for a, d, i in rets if i == second) == [
        ("ALDER", day("2021-03-08")), ("ALDER", day("2021-03-09")),
        ("BIRCH", day("2021-03-08")), ("BIRCH", day("2021-03-09"))]
    assert_returns_equal(stored(store_url, returns_table), expected_returns(BASE, LATER))


def test_every_storing_ingest_is_recorded(store_url, tmp_path, run):
    path = write(tmp_path, "base.csv", BASE)
    t0 = dt.datetime.now(dt.UTC).replace(tzinfo=None, microsecond=0)
    code, _, err = run("ingest", path, "--store", store_url)
    t1 = dt.datetime.now(dt.UTC).replace(tzinfo=None)
    assert (code, err) == (0, "")
    later = frame_of(LATER).iloc[1:]
    parquet = tmp_path / "later.parquet"
    later.to_parquet(parquet)
    assert run("ingest", parquet, "--store", store_url)[0] == 0
    assert run("ingest", path, "--store", store_url)[0] == 0  # nothing new: not recorded
    with Store(store_url) as store:
        second, first = store.ingest_history()
    assert first.source == str(path)
    # FIPS 180-4 SHA-256 of the file bytes, as hashlib computes it.
    assert first.checksum == hashlib.sha256(path.read_bytes()).hexdigest()
    assert (first.kind, first.rows, first.assets) == ("prices", 5, ("ALDER", "BIRCH"))
    assert (first.first_date, first.last_date) == (day("2021-03-01"), day("2021-03-05"))
    assert (first.new_values, first.revised_values, first.outcome) == (9, 0, "stored")
    assert t0 <= first.started_at <= t1
    assert second.source == str(parquet)
    assert second.checksum == hashlib.sha256(parquet.read_bytes()).hexdigest()
    assert (second.rows, second.new_values) == (2, 4)
    started, finished = query(store_url, sa.text(
        "SELECT started_at, finished_at FROM ingests WHERE id = :i").bindparams(i=first.id))[0]
    assert str(started) <= str(finished)


# ----------------------------------------------------------------------------- log returns
def test_log_returns_per_asset_calendar_across_two_ingests(store_url, tmp_path):
    first = _csv("date,ALDER,BIRCH",
                 "2021-03-01,100.0,50.0",
                 "2021-03-02,101.0,50.5",
                 "2021-03-03,,51.0",          # ALDER has no price: no return that day
                 "2021-03-04,99.0,50.25",
                 "2021-03-05,98.5,")          # BIRCH's last price in this file is 03-04
    second = _csv("date,ALDER,BIRCH,CEDAR",
                  "2021-03-08,99.5,50.75,20.0",
                  "2021-03-09,100.25,50.5,20.5")
    ingest(store_url, write(tmp_path, "first.csv", first))
    ingest(store_url, write(tmp_path, "second.csv", second))
    got = stored(store_url, returns_table)
    # Written out: the return after a gap spans it, and the second file's first return uses
    # the last price stored by the first file.
    hand = {("ALDER", "2021-03-02"): np.log(101.0 / 100.0),
            ("ALDER", "2021-03-04"): np.log(99.0 / 101.0),
            ("ALDER", "2021-03-05"): np.log(98.5 / 99.0),
            ("ALDER", "2021-03-08"): np.log(99.5 / 98.5),
            ("ALDER", "2021-03-09"): np.log(100.25 / 99.5),
            ("BIRCH", "2021-03-02"): np.log(50.5 / 50.0),
            ("BIRCH", "2021-03-03"): np.log(51.0 / 50.5),
            ("BIRCH", "2021-03-04"): np.log(50.25 / 51.0),
            ("BIRCH", "2021-03-08"): np.log(50.75 / 50.25),
            ("BIRCH", "2021-03-09"): np.log(50.5 / 50.75),
            ("CEDAR", "2021-03-09"): np.log(20.5 / 20.0)}
    assert_returns_equal(got, {(a, day(d)): float(v) for (a, d), v in hand.items()})
    origins = set(query(store_url, sa.select(returns_table.c.origin).distinct()))
    assert origins == {("prices",)}


def test_log_returns_of_a_longer_random_panel_in_two_parts(store_url, tmp_path):
    rng = np.random.default_rng(20210301)
    dates = pd.bdate_range("2021-03-01", periods=120, name="date")
    logp = np.log(100.0) + np.cumsum(rng.normal(0.0, 0.012, (120, 3)), axis=0)
    panel = pd.DataFrame(np.exp(logp), index=dates, columns=["ALDER", "BIRCH", "CEDAR"])
    panel = panel.mask(rng.random(panel.shape) < 0.1)  # about one price in ten missing
    panel.iloc[0] = 100.0
    first, second = panel.iloc[:70], panel.iloc[70:]
    first.to_csv(tmp_path / "p1.csv", date_format="%Y-%m-%d")
    second.to_csv(tmp_path / "p2.csv", date_format="%Y-%m-%d")
    ingest(store_url, tmp_path / "p1.csv")
    ingest(store_url, tmp_path / "p2.csv")
    assert_returns_equal(stored(store_url, returns_table), expected_returns(panel))
    # Prices are stored exactly as written (pandas writes the shortest round-trip repr).
    prices_now = stored(store_url, prices_table)
    assert prices_now == {(a, d.date()): float(v)
                          for (d, a), v in panel.stack().dropna().items()}


def test_returns_are_stored_as_given(store_url, tmp_path, run):
    text = _csv("date,OAK,PINE",
                "2021-03-01,0.012345678901234567,-0.0",
                "2021-03-02,-0.5,1e-300",
                "2021-03-03,0.0,",
                "2021-03-04,2.5,-3.25e-05")
    path = write(tmp_path, "returns.csv", text)
    # 2.5 is beyond the plausibility bound (|r| > 1): stored with --accept-outliers, named.
    code, out, err = run("ingest", path, "--kind", "returns", "--store", store_url)
    assert code == 2 and "2021-03-04, column 'OAK': implausible log return 2.5" in err
    code, out, err = run("ingest", path, "--kind", "returns", "--accept-outliers",
                         "--store", store_url)
    assert (code, err) == (0, "")
    assert "stored 7 new value(s) (returns)" in out
    assert "1 implausible return(s) stored with --accept-outliers (|r| > 1): OAK 2021-03-04" in out
    # Exactly the given numbers, including the first date (no differencing).
    expected = {(a, d.date()): v for (d, a), v in frame_of(text).stack().dropna().items()}
    assert stored(store_url, returns_table) == expected
    assert set(query(store_url, sa.select(returns_table.c.origin).distinct())) == {("returns",)}
    assert stored(store_url, prices_table) == {}


# ----------------------------------------------------------------------------- coverage
COVERAGE = _csv("date,ALDER,BIRCH,CEDAR",
                "2021-03-01,10.0,,30.0",      # BIRCH not started yet: not a gap
                "2021-03-02,10.5,20.0,30.5",
                "2021-03-03,,20.5,31.0",      # ALDER gap
                "2021-03-04,11.0,,31.5",      # BIRCH gap
                "2021-03-05,11.5,21.0,32.0",
                "2021-03-08,12.0,,32.5")      # BIRCH ended: not a gap


def test_coverage_counts_missing_and_lost_dates(store_url, tmp_path, run):
    # Counted by hand: ALDER misses 03-03; BIRCH (03-02..03-05) misses 03-04; CEDAR nothing.
    # ALDER/BIRCH on 03-02..03-05 lose 03-03 and 03-04; ALDER/CEDAR lose 03-03;
    # BIRCH/CEDAR on 03-02..03-05 lose 03-04.
    cov = coverage(frame_of(COVERAGE))
    assert cov.missing == {"ALDER": 1, "BIRCH": 1, "CEDAR": 0}
    assert cov.lost == {("ALDER", "BIRCH"): 2, ("ALDER", "CEDAR"): 1, ("BIRCH", "CEDAR"): 1}
    assert cov.lines() == [
        "  dates missing per asset (holidays and gaps are kept as such): ALDER 1, BIRCH 1",
        ("  dates lost per pair (only one side has a value), largest 3 of 3 pairs: "
         "ALDER/BIRCH 2, BIRCH/CEDAR 1, ALDER/CEDAR 1"),
    ]
    path = write(tmp_path, "coverage.csv", COVERAGE)
    code, out, err = run("ingest", path, "--store", store_url)
    assert (code, err) == (0, "")
    assert out.splitlines()[1:] == cov.lines()
    summary = query(store_url, sa.text("SELECT summary FROM ingests"))
    assert summary == [("; ".join(cov.lines()),)]
    assert coverage(frame_of(BASE.replace("2021-03-02,101.5,\n", ""))).lines() == []


# ----------------------------------------------------------------------------- export returns
@pytest.fixture
def three_assets(store_url, tmp_path):
    rng = np.random.default_rng(7)
    dates = pd.bdate_range("2021-03-01", periods=40, name="date")
    panel = pd.DataFrame(100.0 * np.exp(np.cumsum(rng.normal(0, 0.01, (40, 3)), axis=0)),
                         index=dates, columns=["ALDER", "BIRCH", "CEDAR"])
    panel.iloc[5, 0] = np.nan
    panel.iloc[:8, 2] = np.nan      # CEDAR starts later
    panel.iloc[20:23, 1] = np.nan
    panel.to_csv(tmp_path / "panel.csv", date_format="%Y-%m-%d")
    ingest(store_url, tmp_path / "panel.csv")
    return panel


def read_export(text: str) -> pd.DataFrame:
    return pd.read_csv(io.StringIO(text), dtype={"date": str})


def test_export_returns_round_trips(store_url, three_assets, tmp_path, run):
    code, out, err = run("export", "returns", "--store", store_url)
    assert (code, err) == (0, "")
    exported = read_export(out)
    assert list(exported.columns) == ["date", "ALDER", "BIRCH", "CEDAR"]
    with Store(store_url) as store:
        held = store.read_returns()
    assert list(exported["date"]) == [d.strftime("%Y-%m-%d") for d in held.index]
    # Round trip of the stored numbers (%.17g is exact for binary64, IEEE 754-2008 5.12.2).
    np.testing.assert_allclose(exported[held.columns].to_numpy(), held.to_numpy(), rtol=1e-15,
                               atol=0)
    got = {(a, day(d)): v for a in held.columns
           for d, v in zip(exported["date"], exported[a], strict=True) if not np.isnan(v)}
    assert_returns_equal(got, expected_returns(three_assets))

    code, out_subset, err = run("export", "returns", "--assets", "CEDAR", "ALDER",
                                "--store", store_url)
    assert (code, err) == (0, "")
    subset = read_export(out_subset)
    assert list(subset.columns) == ["date", "CEDAR", "ALDER"]
    both = {d for (a, d) in got if a in ("CEDAR", "ALDER")}
    assert [day(d) for d in subset["date"]] == sorted(both)
    np.testing.assert_allclose(
        subset[["CEDAR", "ALDER"]].to_numpy(),
        held.loc[pd.to_datetime(subset["date"]), ["CEDAR", "ALDER"]].to_numpy(), rtol=1e-15,
        atol=0)

    code, out, err = run("export", "returns", "--assets", "ALDER", "NOPE", "--store", store_url)
    assert (code, out) == (2, "")
    one_error_line(err, "--assets", "'NOPE'", "stored: ALDER, BIRCH, CEDAR")

    target = tmp_path / "out" / "returns.csv"
    target.parent.mkdir()
    code, out, err = run("export", "returns", "--store", store_url, "--out", target)
    assert (code, out, err) == (0, "", "")
    full = run("export", "returns", "--store", store_url)[1]
    assert target.read_text(encoding="utf-8") == full


def test_export_without_a_store_creates_none(store_url, store_snapshot, run):
    before = store_snapshot(store_url)
    code, out, err = run("export", "returns", "--store", store_url)
    assert (code, out) == (2, "")
    one_error_line(err, "store ")
    assert re.search(r"no store there yet|not a comove store", err)
    assert store_snapshot(store_url) == before


# ----------------------------------------------------------------------------- SQL sources
def make_source(url: str) -> None:
    """Source tables: BASE wide and long, CEDAR long, an oddly named table, and a decoy
    named like the store's own ``prices`` table."""
    frame = frame_of(BASE)
    long_rows = [{"d": d.strftime("%Y-%m-%d"), "a": a, "v": float(v)}
                 for (d, a), v in frame.stack().dropna().items()]
    long_rows += [{"d": f"2021-03-0{k}", "a": "CEDAR", "v": 20.0 + k} for k in range(1, 6)]
    engine = sa.create_engine(url, poolclass=NullPool)
    try:
        with engine.begin() as conn:
            conn.execute(sa.text('CREATE TABLE close_wide (date DATE, "ALDER" DOUBLE PRECISION,'
                                 ' "BIRCH" DOUBLE PRECISION)'))
            conn.execute(sa.text("INSERT INTO close_wide VALUES (:d, :a, :b)"), [
                {"d": d.strftime("%Y-%m-%d"), "a": a, "b": None if np.isnan(b) else b}
                for d, a, b in zip(frame.index, frame["ALDER"], frame["BIRCH"], strict=True)])
            conn.execute(sa.text("CREATE TABLE close_long (date DATE, asset VARCHAR(32), "
                                 "value DOUBLE PRECISION, note VARCHAR(32))"))
            conn.execute(sa.text("INSERT INTO close_long VALUES (:d, :a, :v, :note)"),
                         [{**row, "note": "at 17:30 :close"} for row in long_rows])
            conn.execute(sa.text('CREATE TABLE "odd ""name""; x" (date DATE, "OAK" DOUBLE '
                                 'PRECISION)'))
            conn.execute(sa.text('INSERT INTO "odd ""name""; x" VALUES (:d, :v)'),
                         [{"d": "2021-03-01", "v": 5.0}, {"d": "2021-03-02", "v": 5.5}])
            conn.execute(sa.text("CREATE TABLE prices (x INTEGER)"))
    finally:
        engine.dispose()


def source_tables(url: str) -> dict[str, int]:
    engine = sa.create_engine(url, poolclass=NullPool)
    try:
        with engine.connect() as conn:
            return {t: conn.execute(sa.select(sa.func.count()).select_from(sa.table(t))).scalar()
                    for t in sa.inspect(conn).get_table_names()}
    finally:
        engine.dispose()


@pytest.fixture
def sqlite_source(tmp_path) -> str:
    url = f"sqlite:///{tmp_path / 'source.sqlite'}"
    make_source(url)
    return url


def check_sql_ingests(source: str, store_url: str, run) -> None:
    code, out, err = run("ingest", "--sql", source, "--table", "close_wide", "--store", store_url)
    assert (code, err) == (0, ""), err
    assert out.startswith("sql close_wide: stored 9 new value(s) (prices) for 2 asset(s)")
    assert_returns_equal(stored(store_url, returns_table), expected_returns(BASE))
    code, out, err = run("ingest", "--sql", source, "--table", "close_wide", "--store", store_url)
    assert (code, err) == (0, "") and "nothing new" in out
    # Long layout; the ':close' and '%' in the string literals must reach the database as
    # written, not as bind parameters or format placeholders.
    select = ("SELECT date, asset, value FROM close_long WHERE asset = 'CEDAR' "
              "AND note LIKE 'at 17:30 :close%'")
    code, out, err = run("ingest", "--sql", source, "--query", select, "--store", store_url)
    assert (code, err) == (0, ""), err
    assert "stored 5 new value(s) (prices) for 1 asset(s)" in out
    cedar = {k: v for k, v in stored(store_url, returns_table).items() if k[0] == "CEDAR"}
    assert_returns_equal(cedar, {("CEDAR", day(f"2021-03-0{k}")): float(np.log((20 + k)
                                                                               / (19 + k)))
                                 for k in range(2, 6)})
    with Store(store_url) as store:
        history = store.ingest_history()
    assert [h.source for h in history] == ["sql query", "sql close_wide"]
    assert all(re.fullmatch(r"[0-9a-f]{64}", h.checksum) for h in history)


def check_sql_refusals(source: str, store_url: str, run, store_snapshot) -> None:
    tables_before = source_tables(source)
    before = store_snapshot(store_url)
    # Each refusal: exit 2, one line naming the source and the query or table at fault.
    cases = [
        (["--query", "SELECT nope FROM nowhere"], ["(query 'SELECT nope FROM nowhere')",
                                                   "nowhere"]),
        (["--query", 'SELECT "ALDER" FROM close_wide'], ["no 'date' column"]),
        (["--table", "no_such_table"], ["(table 'no_such_table')", "no_such_table"]),
        # Not SQL to run: an identifier, quoted, so the statement is never executed.
        (["--table", "x; DROP TABLE prices"], ["(table 'x; DROP TABLE prices')"]),
        (["--table", 'close_wide"; DROP TABLE close_long; --'], ["DROP TABLE close_long"]),
        # A source is only read: a query that writes is refused by the database.
        (["--query", "DROP TABLE close_long"], ["(query 'DROP TABLE close_long')"]),
        (["--query", "DELETE FROM close_wide"], ["(query 'DELETE FROM close_wide')"]),
    ]
    for args, needles in cases:
        code, out, err = run("ingest", "--sql", source, *args, "--store", store_url)
        assert (code, out) == (2, ""), (args, err)
        one_error_line(err, *needles)
        assert store_snapshot(store_url) == before, args
    assert source_tables(source) == tables_before
    assert {"prices", "returns", "ingests", "schema_info"} <= set(before.tables)
    # The odd name is a real table, read as one.
    code, out, err = run("ingest", "--sql", source, "--table", 'odd "name"; x', "--store",
                         store_url)
    assert (code, err) == (0, ""), err
    assert stored(store_url, returns_table)[("OAK", day("2021-03-02"))] == pytest.approx(
        np.log(5.5 / 5.0), abs=LOG_ATOL)


def test_sql_source_sqlite(store_url, sqlite_source, run, store_snapshot):
    check_sql_ingests(sqlite_source, store_url, run)
    check_sql_refusals(sqlite_source, store_url, run, store_snapshot)


@pytest.mark.postgres
def test_sql_source_postgresql(pg_database, tmp_path, run, store_snapshot):
    source = pg_database()
    make_source(source)
    store_url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    check_sql_ingests(source, store_url, run)
    check_sql_refusals(source, store_url, run, store_snapshot)


def test_sql_source_in_process_refusals(sqlite_source):
    with pytest.raises(InputError, match=r"exactly one of a query and a table"):
        read_sql_table_source(sqlite_source, "prices")
    with pytest.raises(InputError, match=r"^SQL source: 'nonsense' is not a database URL$"):
        read_sql_table_source("nonsense", "prices", table="close_wide")
    with pytest.raises(InputError, match=r"--kind must be prices or returns"):
        read_sql_table_source(sqlite_source, "uniforms", table="close_wide")
    src = read_sql_table_source(sqlite_source, "prices", table="close_wide")
    assert (src.name, src.kind, list(src.frame.columns)) == ("sql close_wide", "prices",
                                                             ["ALDER", "BIRCH"])


# ----------------------------------------------------------------------------- command line
@pytest.mark.parametrize(("args", "needle"), [
    (["ingest", "a.csv", "--sql", "sqlite:///x.sqlite", "--table", "t"], "give files or --sql"),
    (["ingest", "--sql", "sqlite:///x.sqlite"], "--sql needs --table or --query"),
    (["ingest", "a.csv", "--table", "t"], "--table and --query go with --sql"),
    (["ingest"], "name at least one file"),
    (["ingest", "nothing-here/*.csv"], "source 'nothing-here/*.csv': no file matches"),
    (["ingest", "a.csv", "--kind", "uniforms"], "invalid choice: 'uniforms'"),
])
def test_ingest_usage_errors(tmp_path, run, args, needle):
    code, out, err = run(*args, "--store", f"sqlite:///{tmp_path / 's.sqlite'}")
    assert (code, out) == (2, "")
    one_error_line(err, needle)
    assert not (tmp_path / "s.sqlite").exists()


def test_glob_ingests_matching_files_in_order(tmp_path, run):
    write(tmp_path, "feeds/a.csv", BASE)
    write(tmp_path, "feeds/b.csv", LATER)
    write(tmp_path, "feeds/notes.txt", "not a feed")
    assert expand_paths(str(tmp_path / "feeds" / "*.csv")) == [
        str(tmp_path / "feeds" / "a.csv"), str(tmp_path / "feeds" / "b.csv")]
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    code, out, err = run("ingest", "feeds/*.csv", "--store", url)
    assert (code, err) == (0, "")
    heads = [line.split(":")[0] for line in out.splitlines() if not line.startswith(" ")]
    assert heads == ["feeds/a.csv", "feeds/b.csv"]
    assert_returns_equal(stored(url, returns_table), expected_returns(BASE, LATER))


def _comove() -> str:
    found = shutil.which("comove", path=str(Path(sys.executable).parent))
    if found is None:
        pytest.fail("the comove console script is not installed next to this Python; run "
                    "'pip install -e .' first")
    return found


def test_console_script_refusals_and_export(store_url, tmp_path, store_snapshot):
    """The installed command, as cron runs it: exit codes and one error line."""
    env = {k: v for k, v in os.environ.items() if k not in ("COMOVE_CONFIG", "COMOVE_STORE")}

    def comove(*args) -> subprocess.CompletedProcess:
        return subprocess.run([_comove(), *map(str, args), "--store", store_url],
                              capture_output=True, text=True, cwd=tmp_path, env=env,
                              timeout=120, check=False)

    ingest(store_url, write(tmp_path, "base.csv", BASE))
    before = store_snapshot(store_url)
    bad = write(tmp_path, "bad.csv", _csv("date,ALDER", "2021-03-08,1.0", "2021-03-09,abc"))
    revised = write(tmp_path, "revised.csv", REVISED)
    for path, needle in ((bad, "line 3 (2021-03-09), column 'ALDER'"),
                         (revised, "2021-03-03, column 'ALDER'")):
        done = comove("ingest", path)
        assert (done.returncode, done.stdout) == (2, ""), done.stderr
        one_error_line(done.stderr, str(path), needle)
        assert store_snapshot(store_url) == before
    done = comove("export", "returns", "--out", "returns.csv")
    assert (done.returncode, done.stdout, done.stderr) == (0, "", "")
    exported = read_export((tmp_path / "returns.csv").read_text(encoding="utf-8"))
    got = {(a, day(d)): v for a in ("ALDER", "BIRCH")
           for d, v in zip(exported["date"], exported[a], strict=True) if not np.isnan(v)}
    assert_returns_equal(got, expected_returns(BASE))


# ----------------------------------------------------------------------------- [[sources]]
def config(tmp_path: Path, text: str) -> Path:
    return write(tmp_path, "comove.toml", text)


def test_sources_are_read(tmp_path, monkeypatch):
    path = config(tmp_path, """
[[sources]]
path = "feeds/*.csv"

[[sources]]
path = "closes.parquet"
kind = "returns"

[[sources]]
url = "sqlite:///source.sqlite"
table = "close_wide"

[[sources]]
url_env = "COMOVE_SOURCE_URL"
query = "SELECT date, asset, value FROM close_long"
accept_revisions = true
""")
    cfg = load_config(path)
    assert cfg.sources == (
        SourceConfig(path="feeds/*.csv"),
        SourceConfig(path="closes.parquet", kind="returns"),
        SourceConfig(url="sqlite:///source.sqlite", table="close_wide"),
        SourceConfig(url_env="COMOVE_SOURCE_URL",
                     query="SELECT date, asset, value FROM close_long", accept_revisions=True),
    )
    assert cfg.sources[0].kind == "prices" and not cfg.sources[0].accept_revisions
    assert load_config(config(tmp_path, "")).sources == ()


GOOD_SOURCE = '[[sources]]\npath = "feeds/*.csv"\n\n[[sources]]\n'


@pytest.mark.parametrize(("entry", "message"), [
    ("", r"sources\[2\] needs exactly one of path and url \(or url_env\)"),
    ('path = "a.csv"\nurl = "sqlite:///s.sqlite"\ntable = "t"',
     r"sources\[2\] needs exactly one of path and url"),
    ('path = "a.csv"\nurl_env = "SRC"\ntable = "t"',
     r"sources\[2\] needs exactly one of path and url"),
    ('url = "sqlite:///s.sqlite"\nurl_env = "SRC"\ntable = "t"',
     r"sources\[2\]: give url or url_env, not both"),
    ('url = "sqlite:///s.sqlite"', r"sources\[2\] needs exactly one of table and query"),
    ('url_env = "SRC"', r"sources\[2\] needs exactly one of table and query"),
    ('url = "sqlite:///s.sqlite"\ntable = "t"\nquery = "SELECT 1"',
     r"sources\[2\] needs exactly one of table and query"),
    ('path = "a.csv"\ntable = "t"', r"sources\[2\]: table and query go with url"),
    ('path = "a.csv"\nquery = "SELECT 1"', r"sources\[2\]: table and query go with url"),
    ('path = "a.csv"\nkind = "uniforms"',
     r"sources\[2\]\.kind must be \"prices\" or \"returns\", got 'uniforms'"),
    ('path = "a.csv"\nfile = "b.csv"', r"unknown key sources\[2\]\.file"),
    ('path = "a.csv"\naccept_revisions = "yes"',
     r"sources\[2\]\.accept_revisions must be true or false"),
    ("path = 3", r"sources\[2\]\.path must be a string"),
    ('path = "a.csv"\nsep = ";;"', r"sources\[2\]\.sep: ';;' is not a field separator"),
    ('path = "a.csv"\ndecimal = ";"', r"sources\[2\]\.decimal must be '\.' or ','"),
    ('path = "a.csv"\ndate_format = "%Y"', r"sources\[2\]\.date_format: '%Y' is not a date "),
    ('path = "a.csv"\ncolumns = { asset = "Ticker" }',
     r"sources\[2\]\.columns: a long file needs both asset and value"),
    ('path = "a.csv"\ncolumns = { ticker = "T" }', r"unknown key sources\[2\]\.columns\.ticker"),
    ('path = "a.csv"\ncolumns = "date=Day"', r"\[sources\[2\]\.columns\] must be a table"),
    ('url = "sqlite:///s.sqlite"\ntable = "t"\nsep = ";"',
     r"sources\[2\]: sep, decimal, thousands, date_format and columns go with path"),
])
def test_invalid_sources_name_the_entry(tmp_path, entry, message):
    path = config(tmp_path, GOOD_SOURCE + entry + "\n")
    with pytest.raises(InputError, match="^" + re.escape(str(path)) + ": .*" + message):
        load_config(path)


@pytest.mark.parametrize("text", ['sources = "feeds/*.csv"', '[sources]\npath = "a.csv"',
                                  "sources = [1, 2]"])
def test_sources_must_be_an_array_of_tables(tmp_path, text):
    path = config(tmp_path, text + "\n")
    with pytest.raises(InputError, match=r"sources must be an array of tables \(\[\[sources\]\]\)"):
        load_config(path)


# ----------------------------------------------------------------------------- exported files
# BASE as a spreadsheet with a German locale exports it: semicolons, decimal commas, a
# thousands point, day-first dates, a long layout with its own column names.
EXPORTED = ("Datum;Symbol;Schluss;Volumen\n"
            + "".join(f"{d};{a};{v};1.000\n" for d, a, v in (
                ("01.03.2021", "ALDER", "1.100,0"), ("01.03.2021", "BIRCH", "50,0"),
                ("02.03.2021", "ALDER", "1.101,5"), ("03.03.2021", "ALDER", "1.099,25"),
                ("03.03.2021", "BIRCH", "50,5"), ("04.03.2021", "ALDER", "1.102,0"),
                ("04.03.2021", "BIRCH", "51,25"), ("05.03.2021", "ALDER", "1.103,5"),
                ("05.03.2021", "BIRCH", "50,75"))))
EXPORTED_OPTIONS = ("--sep", ";", "--decimal", ",", "--thousands", ".", "--date-format",
                    "%d.%m.%Y", "--columns", "date=Datum,asset=Symbol,value=Schluss")
# The same prices as a plain wide CSV (BASE with ALDER + 1000).
EXPORTED_PLAIN = BASE.replace("100.0,", "1100.0,").replace("101.5,", "1101.5,").replace(
    "99.25,", "1099.25,").replace("102.0,", "1102.0,").replace("103.5,", "1103.5,")


def test_exported_file_is_read_with_its_options(store_url, tmp_path, run):
    path = write(tmp_path, "export.csv", EXPORTED)
    code, out, err = run("ingest", path, "--store", store_url, *EXPORTED_OPTIONS)
    assert code == 0, err
    assert "stored 9 new value(s) (prices) for 2 asset(s), 2021-03-01 to 2021-03-05" in out
    assert_returns_equal(stored(store_url, returns_table), expected_returns(EXPORTED_PLAIN))
    # The plain file of the same prices is the same data: nothing new.
    code, out, _ = run("ingest", write(tmp_path, "plain.csv", EXPORTED_PLAIN), "--store",
                       store_url)
    assert code == 0 and "nothing new" in out


@pytest.mark.parametrize(("drop", "needle"), [
    ("--sep", "give --sep ';'"),
    ("--date-format", ("dates like 01.03.2021 could be day-first or month-first; give "
                      "--date-format '%d.%m.%Y' or '%m.%d.%Y'")),
    ("--decimal", "'1.100,0' is not a finite number; give --decimal , --thousands ."),
    ("--columns", ("if the file is long (one row per date and asset), give --columns "
                  "date=Datum,asset=Symbol,value=Volumen")),
])
def test_exported_file_without_an_option_is_refused_naming_it(store_url, tmp_path, run,
                                                              store_snapshot, drop, needle):
    ingest(store_url, write(tmp_path, "base.csv", BASE))
    before = store_snapshot(store_url)
    k = EXPORTED_OPTIONS.index(drop)
    options = EXPORTED_OPTIONS[:k] + EXPORTED_OPTIONS[k + 2:]
    if drop == "--decimal":  # the thousands point alone would be the decimal mark
        options = options[:2] + options[4:]
    if drop == "--columns":
        options = ("--sep", ";", "--decimal", ",", "--thousands", ".", "--date-format",
                   "%d.%m.%Y", "--columns", "date=Datum")
    path = write(tmp_path, "export.csv", EXPORTED)
    code, out, err = run("ingest", path, "--store", store_url, *options)
    assert (code, out) == (2, "")
    assert one_error_line(err, str(path), needle)
    assert store_snapshot(store_url) == before


def test_excel_file_is_refused_and_the_store_unchanged(store_url, tmp_path, run, store_snapshot):
    ingest(store_url, write(tmp_path, "base.csv", BASE))
    before = store_snapshot(store_url)
    book = write(tmp_path, "closes.xlsx", b"PK\x03\x04" + b"xl/workbook.xml" + b"\x00" * 32)
    code, out, err = run("ingest", book, "--store", store_url)
    assert (code, out) == (2, "")
    assert one_error_line(err) == f"error: {book}: Excel files are not read; save the sheet as CSV"
    assert store_snapshot(store_url) == before


def test_reading_options_refused_with_sql(tmp_path, run):
    code, _, err = run("ingest", "--sql", "sqlite:///x.sqlite", "--table", "t", "--sep", ";")
    assert code == 2
    assert one_error_line(err, "--sep, --decimal, --thousands, --date-format and --columns go "
                               "with files")


def test_configured_source_with_reading_options(tmp_path, monkeypatch, capsys):
    from monitor.engine.pipeline import read_configured_sources

    write(tmp_path, "feeds/export.csv", EXPORTED)
    path = config(tmp_path, """
[[sources]]
path = "feeds/*.csv"
sep = ";"
decimal = ","
thousands = "."
date_format = "%d.%m.%Y"
columns = { date = "Datum", asset = "Symbol", value = "Schluss" }
""")
    cfg = load_config(path)
    (src,) = read_configured_sources(cfg)
    want = frame_of(EXPORTED_PLAIN)
    np.testing.assert_array_equal(src.frame[["ALDER", "BIRCH"]].to_numpy(), want.to_numpy())
    # Without the decimal mark the refusal names the key to set in the entry.
    config(tmp_path, path.read_text().replace('decimal = ","\nthousands = "."\n', ""))
    with pytest.raises(InputError, match=r"'1\.100,0' is not a finite number; give "
                                         r"decimal = ',' thousands = '\.'$"):
        read_configured_sources(load_config(path))


def test_return_days_kept_between_reads_follow_the_next_ingest(store_url, tmp_path):
    # The Timeline keeps each asset's return days until the store's fingerprint changes:
    # a later ingest (a new day, a price that did not move) shows in the next read.
    first = tmp_path / "first.csv"
    first.write_text("date,ASPEN,BIRCH\n2024-01-02,10,20\n2024-01-03,10,21\n"
                     "2024-01-04,11,21\n", encoding="utf-8")
    later = tmp_path / "later.csv"
    later.write_text("date,ASPEN,BIRCH\n2024-01-05,11,22\n", encoding="utf-8")
    ingest(store_url, first)
    with Store(store_url) as store:
        days, zero = store.return_days("ASPEN")
        assert store.return_days("ASPEN")[0] is days  # kept, not read again
        assert [str(d) for d in days] == ["2024-01-03", "2024-01-04"]
        assert zero.tolist() == [True, False]  # log(10/10) is exactly 0
        ingest(store_url, later)
        days, zero = store.return_days("ASPEN")
        assert [str(d) for d in days] == ["2024-01-03", "2024-01-04", "2024-01-05"]
        assert zero.tolist() == [True, False, True]
        assert store.return_days("NOPE")[0].size == 0
