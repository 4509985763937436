"""Tests for monitor.data.store on both backends: SQLite files and a real PostgreSQL server.

The contract is docs/contracts.md ("Store: SQLAlchemy Core ... every write of a step is one
transaction") and the module's own schema note: a new store is written at schema version 1, a
store written by a newer comove is refused untouched, and ``create=False`` never creates one.
Every test that takes ``store_url`` runs once per backend (tests/conftest.py). Stored floats are
compared bit for bit: SQLite REAL and PostgreSQL DOUBLE PRECISION are both IEEE 754 binary64
(SQLite documentation "Datatypes In SQLite" section 2; PostgreSQL 15 manual section 8.1.3).
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa
from sqlalchemy.pool import NullPool

from monitor.common.errors import InputError
from monitor.data.store import (
    SCHEMA_VERSION,
    Store,
    as_tidy,
    marginal_fits,
    metadata,
    residuals,
    returns,
    values_differ,
)
from monitor.data.store_metrics import HEAVY_TAIL_LEVEL

D = [dt.date(2021, 3, day) for day in (1, 2, 3, 4, 5, 8, 9)]


def execute(url: str, sql: str, **params) -> list[tuple]:
    """Run one statement on its own connection, committed; rows if it returns any."""
    engine = sa.create_engine(url, poolclass=NullPool)
    try:
        with engine.begin() as conn:
            result = conn.execute(sa.text(sql), params)
            return [tuple(r) for r in result] if result.returns_rows else []
    finally:
        engine.dispose()


def table_names(url: str) -> set[str]:
    engine = sa.create_engine(url, poolclass=NullPool)
    try:
        return set(sa.inspect(engine).get_table_names())
    finally:
        engine.dispose()


def tidy(rows: list[tuple[str, dt.date, float]]) -> pd.DataFrame:
    return pd.DataFrame(rows, columns=["asset", "date", "value"]).assign(
        date=lambda f: pd.to_datetime(f["date"]))


# ----------------------------------------------------------------------------- schema
def test_new_store_has_schema_version_1_and_every_table(store_url):
    with Store(store_url):
        pass
    assert SCHEMA_VERSION == 1
    assert execute(store_url, "SELECT key, value FROM schema_info") == [("version", "1")]
    assert {t.name for t in metadata.sorted_tables} <= table_names(store_url)


def test_reopening_a_store_changes_nothing(store_url, store_snapshot):
    with Store(store_url):
        pass
    before = store_snapshot(store_url)
    with Store(store_url) as store:
        assert store.assets() == []
    with Store(store_url, create=False):
        pass
    assert store_snapshot(store_url) == before


@pytest.mark.parametrize("create", [True, False])
def test_store_from_a_newer_comove_is_refused_untouched(store_url, store_snapshot, create):
    with Store(store_url):
        pass
    execute(store_url, "UPDATE schema_info SET value = '2' WHERE key = 'version'")
    # A newer schema may have dropped a table; refusing must not recreate it either.
    execute(store_url, "DROP TABLE residuals")
    before = store_snapshot(store_url)
    with pytest.raises(InputError, match=r"schema version 2 is newer than this comove "
                                         r"understands \(1\); upgrade comove"):
        Store(store_url, create=create)
    assert store_snapshot(store_url) == before
    assert "residuals" not in table_names(store_url)


def test_older_store_gets_its_missing_tables(store_url):
    with Store(store_url):
        pass
    execute(store_url, "DROP TABLE residuals")
    with Store(store_url):
        pass
    assert "residuals" in table_names(store_url)


def test_create_false_on_a_missing_sqlite_file_creates_nothing(tmp_path):
    path = tmp_path / "sub" / "store.sqlite"
    with pytest.raises(InputError, match=r"store sqlite:///.*store\.sqlite: no store there yet"):
        Store(f"sqlite:///{path}", create=False)
    assert not path.exists()
    assert not path.parent.exists()


def test_create_true_makes_the_folder_of_a_sqlite_file(tmp_path):
    path = tmp_path / "comove-data" / "store.sqlite"
    with Store(f"sqlite:///{path}"):
        pass
    assert path.is_file()


def test_create_false_on_an_empty_database_is_refused_untouched(store_url, store_snapshot):
    if store_url.startswith("sqlite"):
        path = store_url.removeprefix("sqlite:///")
        open(path, "wb").close()  # an existing, empty SQLite file is no store either
    before = store_snapshot(store_url)
    with pytest.raises(InputError, match=r"not a comove store \(no schema\)"):
        Store(store_url, create=False)
    assert store_snapshot(store_url) == before
    assert table_names(store_url) == set()


def test_not_a_url_is_refused():
    with pytest.raises(InputError, match=r"^--store / store.url: 'no-such-scheme' is not a "
                                         r"database URL$"):
        Store("no-such-scheme")


def test_unreachable_server_is_refused_in_one_line(unused_tcp_port):
    url = f"postgresql+psycopg://test@127.0.0.1:{unused_tcp_port}/postgres"
    with pytest.raises(InputError, match=r"^store postgresql\+psycopg://test@127\.0\.0\.1:\d+"
                                         r"/postgres: cannot open \(") as info:
        Store(url)
    assert "\n" not in str(info.value)


@pytest.fixture
def unused_tcp_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


# ----------------------------------------------------------------------------- reads and writes
# Values chosen to expose any lossy path: many significant digits, subnormal-adjacent
# magnitudes, negative zero's neighbour, large returns.
EXACT = [1e-300, -0.012345678901234567, 0.1 + 0.2, 2.5e-17, -3.0, 123456.78901234567]


def test_values_round_trip_bit_for_bit_and_read_wide(store_url):
    rows = [("BIRCH", D[0], EXACT[0]), ("BIRCH", D[1], EXACT[1]), ("BIRCH", D[3], EXACT[2]),
            ("ALDER", D[1], EXACT[3]), ("ALDER", D[2], EXACT[4]), ("ALDER", D[3], EXACT[5])]
    with Store(store_url) as store:
        with store.transaction() as conn:
            store.upsert_values(conn, returns, tidy(rows), {"origin": "returns", "ingest_id": 1})
        assert store.assets() == ["ALDER", "BIRCH"]
        wide = store.read_returns()
        subset = store.read_returns(["BIRCH", "NOPE", "ALDER"])
        empty = store.read_returns(["NOPE"])
    assert list(wide.columns) == ["ALDER", "BIRCH"]
    assert wide.index.name == "date"
    assert [d.date() for d in wide.index] == D[:4]
    expected = np.array([[np.nan, EXACT[0]], [EXACT[3], EXACT[1]], [EXACT[4], np.nan],
                         [EXACT[5], EXACT[2]]])
    # Bit-for-bit: assert_array_equal treats NaN == NaN and compares floats exactly.
    np.testing.assert_array_equal(wide.to_numpy(), expected)
    assert list(subset.columns) == ["BIRCH", "ALDER"]  # requested order, unknown left out
    np.testing.assert_array_equal(subset.to_numpy(), expected[:, ::-1])
    assert empty.empty and empty.index.name == "date"


def test_upsert_replaces_existing_keys(store_url):
    with Store(store_url) as store:
        with store.transaction() as conn:
            store.upsert_values(conn, returns, tidy([("ALDER", D[0], 1.0), ("ALDER", D[1], 2.0)]),
                                {"origin": "returns", "ingest_id": 1})
        with store.transaction() as conn:
            store.upsert_values(conn, returns, tidy([("ALDER", D[1], 5.0), ("ALDER", D[2], 6.0)]),
                                {"origin": "returns", "ingest_id": 2})
        wide = store.read_returns()
    np.testing.assert_array_equal(wide["ALDER"].to_numpy(), [1.0, 5.0, 6.0])
    assert sorted(execute(store_url, "SELECT date, ingest_id FROM returns")) in (
        [(D[0], 1), (D[1], 2), (D[2], 2)],
        [(str(D[0]), 1), (str(D[1]), 2), (str(D[2]), 2)])  # SQLite stores dates as text


def test_a_failed_transaction_leaves_nothing(store_url, store_snapshot):
    with Store(store_url) as store:
        before = store_snapshot(store_url)
        with pytest.raises(RuntimeError, match="boom"), store.transaction() as conn:
            store.upsert_values(conn, returns, tidy([("ALDER", D[0], 1.0)]),
                                {"origin": "returns", "ingest_id": 1})
            raise RuntimeError("boom")
        assert store.assets() == []
    assert store_snapshot(store_url) == before


def test_empty_history(store_url):
    with Store(store_url) as store:
        assert store.ingest_history() == []
        assert store.revision_history().empty


def test_invalidate_from_drops_only_dependent_results(store_url):
    with Store(store_url) as store:
        with store.transaction() as conn:
            for asset in ("ALDER", "BIRCH"):
                conn.execute(residuals.insert(), [
                    {"settings": "s", "asset": asset, "date": d, "value": 0.5, "sigma": 1.0,
                     "fit_seq": 0} for d in D[:5]])
                conn.execute(marginal_fits.insert(), [
                    {"settings": "s", "asset": asset, "seq": k, "fit_end": D[k], "spec": "x",
                     "converged": True, "fallback": "", "payload": "{}"} for k in range(5)])
        with store.transaction() as conn:
            store.invalidate_from(conn, "ALDER", D[2])
        with store.transaction() as conn:
            res = conn.execute(sa.select(residuals.c.asset, residuals.c.date)).all()
            fits = conn.execute(sa.select(marginal_fits.c.asset, marginal_fits.c.fit_end)).all()
    # A residual on or after the revised date depends on it; one before it does not.
    assert sorted(res) == sorted([("ALDER", d) for d in D[:2]] + [("BIRCH", d) for d in D[:5]])
    assert sorted(fits) == sorted(res)


# ----------------------------------------------------------------------------- helpers
def test_as_tidy_leaves_out_missing_cells():
    wide = pd.DataFrame({"ALDER": [1.0, np.nan], "BIRCH": [np.nan, 2.0]},
                        index=pd.DatetimeIndex(["2021-03-01", "2021-03-02"], name="date"))
    out = as_tidy(wide)
    assert list(out.columns) == ["asset", "date", "value"]
    assert sorted(zip(out["asset"], out["date"].dt.date, out["value"], strict=True)) == [
        ("ALDER", D[0], 1.0), ("BIRCH", D[1], 2.0)]


def test_values_differ_ignores_only_round_off():
    old = np.array([0.1, 100.0, 1e-300, 5.0])
    new = np.array([0.1 * (1 + 1e-15), 100.0 * (1 + 1e-9), 1e-300, -5.0])
    np.testing.assert_array_equal(values_differ(old, new), [False, True, False, True])


@pytest.mark.postgres
def test_a_refused_store_keeps_no_connection_open(pg_database, postgres_url):
    url = pg_database()
    with pytest.raises(InputError, match="not a comove store") as info:
        Store(url, create=False)
    assert info.value is not None  # the traceback, and the half-built store, are still alive
    name = sa.engine.make_url(url).database
    rows = execute(postgres_url, "SELECT count(*) FROM pg_stat_activity WHERE datname = :n",
                   n=name)
    assert rows == [(0,)]


# ----------------------------------------------------------------------------- signals state
def _metric_frame(days: pd.DatetimeIndex, seed: int) -> pd.DataFrame:
    """Invented metric rows of one pair (every column of the rolling engine)."""
    from monitor.stats.rolling import METRIC_COLUMNS

    rng = np.random.default_rng(seed)
    n = len(days)
    frame = pd.DataFrame({c: rng.uniform(0.05, 0.5, n) for c in METRIC_COLUMNS})
    frame["date"], frame["start"] = days, days - pd.Timedelta(days=300)
    frame["n"], frame["rotation"] = 250, 0
    frame["family"], frame["converged"] = "clayton", True
    frame.loc[::3, "param2"] = np.nan
    return frame


def test_older_store_gets_its_missing_columns_and_its_rows_read_null(store_url, store_snapshot):
    """A store of an older comove (no model-averaged tails in ``metrics``, no carried count
    in ``universe_daily``) is upgraded in place by ALTER TABLE ... ADD COLUMN: the rows it
    held keep every value and read NULL (NaN) in the new columns; the schema version stays 1
    and opening it again changes nothing."""
    days = pd.bdate_range("2022-01-03", periods=6)
    frame = _metric_frame(days, 3)
    with Store(store_url) as store, store.transaction() as conn:
        store.save_metrics(conn, "r", [("ALDER", "BIRCH", frame, {}, 0.3, False)])
    for table, column in (("metrics", "tail_lower_avg"), ("metrics", "tail_upper_avg"),
                          ("universe_daily", "n_carried")):
        execute(store_url, f"ALTER TABLE {table} DROP COLUMN {column}")
    with Store(store_url) as store:
        got = store.read_timeline("r", "ALDER", "BIRCH")
        row = store.metrics_as_of("r", days[-1].date(), ["date", "tail_lower_avg",
                                                         "kendall_tau"])
        later = _metric_frame(pd.bdate_range("2022-01-11", periods=2), 4)
        with store.transaction() as conn:
            store.save_metrics(conn, "r", [("ALDER", "BIRCH", later, {}, 0.3, False)])
        both = store.read_timeline("r", "ALDER", "BIRCH")
    assert np.isnan(got["tail_lower_avg"]).all() and np.isnan(got["tail_upper_avg"]).all()
    keep = [c for c in frame.columns if c not in ("tail_lower_avg", "tail_upper_avg")]
    pd.testing.assert_frame_equal(got[keep].drop(columns=["date", "start"]),
                                  frame[keep].drop(columns=["date", "start"]),
                                  check_dtype=False)
    assert row["tail_lower_avg"].isna().all() and row["kendall_tau"].iloc[0] == frame[
        "kendall_tau"].iloc[-1]
    # Rows written after the upgrade carry the new columns.
    np.testing.assert_array_equal(both["tail_lower_avg"].to_numpy()[-2:],
                                  later["tail_lower_avg"].to_numpy())
    assert execute(store_url, "SELECT value FROM schema_info WHERE key = 'version'") == [("1",)]
    before = store_snapshot(store_url)
    with Store(store_url):
        pass
    assert store_snapshot(store_url) == before


def test_metrics_of_an_earlier_window_end_and_tail_level_counts(store_url):
    days = pd.bdate_range("2022-01-03", periods=10)
    a, b = _metric_frame(days, 5), _metric_frame(days[4:], 6)
    with Store(store_url) as store:
        with store.transaction() as conn:
            store.save_metrics(conn, "r", [("ALDER", "BIRCH", a, {}, 0.3, False),
                                           ("ALDER", "CEDAR", b, {}, 0.3, False)])
        now = store.metrics_as_of("r", days[8].date(), ["date", "kendall_tau"])
        back = store.metrics_as_of("r", days[8].date(), ["date", "kendall_tau"], back=5)
        counts = store.tail_level_counts("r", days[2].date(), days[8].date(), 0.3)
        last = [store.last_window("r", *p) for p in (("ALDER", "CEDAR"), ("CEDAR", "ALDER"),
                                                      ("ALDER", "ELM"))]
        with pytest.raises(ValueError, match="back must be an integer >= 0"):
            store.metrics_as_of("r", days[8].date(), ["date"], back=-1)
    assert now["date"].tolist() == [days[8], days[8]]
    # Five of the pair's own window ends back: ALDER/BIRCH on day 3; ALDER/CEDAR (from day
    # 4 on) has only four before day 8, so it is left out.
    assert back[["asset_a", "asset_b"]].values.tolist() == [["ALDER", "BIRCH"]]
    assert back["date"].tolist() == [days[3]] and back["kendall_tau"].iloc[0] == a[
        "kendall_tau"].iloc[3]
    # The latest stored window, in the stored order only; None for a pair never rolled.
    assert last == [(b["start"].iloc[-1].date(), days[-1].date()), None, None]
    # Counted by hand from the frames: window ends in [day 2, day 8] at or above 0.3.
    for frame, (x, y) in ((a, ("ALDER", "BIRCH")), (b, ("ALDER", "CEDAR"))):
        part = frame[(frame["date"] >= days[2]) & (frame["date"] <= days[8])]
        got = counts[(counts["asset_a"] == x) & (counts["asset_b"] == y)].iloc[0]
        assert got["n_ends"] == len(part)
        assert got["n_tail_lower_avg"] == int((part["tail_lower_avg"] >= 0.3).sum())
        assert got["n_tail_upper_avg"] == int((part["tail_upper_avg"] >= 0.3).sum())


def _heavy_counts(frame: pd.DataFrame, first, last) -> tuple[int, int, int]:
    """Counted by hand: window ends in [first, last] with both averaged tails, and of them
    those at or above the store's level, per tail."""
    part = frame[(frame["date"] >= first) & (frame["date"] <= last)]
    known = part["tail_lower_avg"].notna() & part["tail_upper_avg"].notna()
    return (int(known.sum()), int((known & (part["tail_lower_avg"] >= HEAVY_TAIL_LEVEL)).sum()),
            int((known & (part["tail_upper_avg"] >= HEAVY_TAIL_LEVEL)).sum()))


def test_running_counts_of_heavy_tails_give_a_years_counts_by_difference(store_url):
    """Each metric row carries running counts of its pair's window ends with heavy averaged
    tails: written with new rows (continuing a pair's last row across appends, restarting
    when a pair is replaced), recounted in one statement for an older store's rows, and a
    range's counts are their difference; the same as counting the rows by hand."""
    days = pd.bdate_range("2022-01-03", periods=30)
    a, b = _metric_frame(days, 11), _metric_frame(days[7:], 12)
    for frame in (a, b):  # around the level, with some windows lacking averaged tails
        frame["tail_lower_avg"] = np.linspace(0.02, 0.2, len(frame))[::-1]
        frame.loc[frame.index[::5], "tail_upper_avg"] = np.nan
    key = [("ALDER", "BIRCH"), ("ALDER", "CEDAR")]

    def counted(store, first, last) -> dict:
        got = store.tail_level_counts("r", first.date(), last.date(), HEAVY_TAIL_LEVEL)
        return {(x, y): (n, lo, hi) for x, y, n, lo, hi in got.itertuples(index=False)}

    def by_hand(first, last) -> dict:
        return {k: _heavy_counts(f, first, last) for k, f in zip(key, (a, b), strict=True)}

    with Store(store_url) as store:
        # Two appends (the second continues each pair's last row) ...
        for part in (slice(0, 18), slice(18, None)):
            with store.transaction() as conn:
                store.save_metrics(conn, "r", [
                    (*key[0], a[(a["date"] >= days[part][0]) & (a["date"] <= days[part][-1])],
                     {}, 0.3, False),
                    (*key[1], b[(b["date"] >= days[part][0]) & (b["date"] <= days[part][-1])],
                     {}, 0.3, False)])
        assert not store.runs_missing("r")
        assert store._counts_from_runs("r", days[0].date(), days[-1].date()) is not None
        ranges = [(days[0], days[-1]), (days[3], days[12]), (days[10], days[25]),
                  (days[20], days[20])]
        for first, last in ranges:
            assert counted(store, first, last) == by_hand(first, last), (first, last)
        runs = execute(store_url, "SELECT run_averaged, run_heavy_lower, run_heavy_upper "
                                  "FROM metrics ORDER BY asset_a, asset_b, date")
        # ... an older store's rows (no counts) still count right, from the rows ...
        execute(store_url, "UPDATE metrics SET run_averaged = NULL, run_heavy_lower = NULL, "
                           "run_heavy_upper = NULL")
        assert store.runs_missing("r")
        assert store._counts_from_runs("r", days[0].date(), days[-1].date()) is None
        assert counted(store, *ranges[2]) == by_hand(*ranges[2])
        # ... and one statement recounts them as they were written.
        assert store.recount_runs("r") == len(a) + len(b)
        assert not store.runs_missing("r")
        assert execute(store_url, "SELECT run_averaged, run_heavy_lower, run_heavy_upper "
                                  "FROM metrics ORDER BY asset_a, asset_b, date") == runs
        # A replaced pair counts from its new first row.
        with store.transaction() as conn:
            store.save_metrics(conn, "r", [(*key[1], b.iloc[4:], {}, 0.3, True)])
        b = b.iloc[4:]
        for first, last in ranges:
            assert counted(store, first, last) == by_hand(first, last), (first, last)


def test_metrics_timelines_resume_points_and_continued_state_runs(store_url):
    days = pd.bdate_range("2022-01-03", periods=40)
    a, b = _metric_frame(days, 1), _metric_frame(days, 2)
    with Store(store_url) as store:
        with store.transaction() as conn:
            assert store.save_metrics(conn, "r", [("ALDER", "BIRCH", a, {}, 0.3, False),
                                                  ("ALDER", "CEDAR", b, {}, 0.2, False)]) == 80
        whole = store.read_timeline("r", "ALDER", "BIRCH")
        newest = store.read_timeline("r", "ALDER", "BIRCH", context_from=days[30].date(),
                                     context_rows=5)
        everything = store.read_timeline("r", "ALDER", "BIRCH", context_from=days[3].date(),
                                         context_rows=9)
        # Resume points: read back by pair; dropped with the pair's metrics when they are
        # replaced, and with every pair of an asset on a revision.
        with store.transaction() as conn:
            for pair in (("ALDER", "BIRCH"), ("ALDER", "CEDAR")):
                store.save_resume(conn, "r|s", "r", *pair, days[-1].date(), {"at": pair[1]})
        assert store.read_resumes("r|s") == {("ALDER", "BIRCH"): {"at": "BIRCH"},
                                             ("ALDER", "CEDAR"): {"at": "CEDAR"}}
        with store.transaction() as conn:
            store.save_metrics(conn, "r", [("ALDER", "BIRCH", a, {}, 0.3, True)])
        assert set(store.read_resumes("r|s")) == {("ALDER", "CEDAR")}
        with store.transaction() as conn:
            store.invalidate_from(conn, "CEDAR", days[-1].date())
        assert store.read_resumes("r|s") == {}
        # State runs continued after a date: a run through it joins the first new one of
        # its tail when the states agree; a new state starts a run of its own.
        d = [x.date() for x in days]

        def runs(rows):
            return pd.DataFrame(rows, columns=["tail", "first_date", "last_date", "state"])

        with store.transaction() as conn:
            store.sync_state_runs(conn, "r|s", "ALDER", "BIRCH", runs([
                ("lower", d[0], d[9], "calm"), ("upper", d[0], d[4], "calm"),
                ("upper", d[5], d[9], "watch")]))
            store.sync_state_runs(conn, "r|s", "ALDER", "BIRCH", runs([
                ("lower", d[10], d[11], "calm"), ("upper", d[10], d[10], "calm"),
                ("upper", d[11], d[11], "watch")]), since=d[9])
            # Episodes continued after a date keep the ones that ended before it.
            old = {"tail": "lower", "start": d[1], "onset": d[0], "end": d[2],
                   "cause": "spike", "statistic": "spike", "peak_date": d[1],
                   "peak_value": 1.5, "peak_tail_emp": 0.4, "peak_tail_model": 0.3,
                   "peak_gauss_tail": 0.2, "peak_kendall_tau": 0.35}
            new_, ended, every = store.sync_episodes(conn, "r|s", "ALDER", "BIRCH", [old])
            assert len(new_) == 1 and not ended and every == [old]
            later = {**old, "start": d[8], "onset": d[7], "end": None, "peak_date": d[8]}
            new_, ended, every = store.sync_episodes(conn, "r|s", "ALDER", "BIRCH", [later],
                                                     since=d[5])
            assert new_ == [later] and [e["start"] for e in every] == [d[1], d[8]]
        stored = store.read_state_runs("r|s", ("ALDER", "BIRCH"))
    pd.testing.assert_frame_equal(whole.drop(columns=["date", "start"]),
                                  a.drop(columns=["date", "start"]), check_dtype=False)
    assert (whole["date"] == days).all() and np.isnan(whole["param2"].iloc[0])
    assert newest["date"].tolist() == list(days[26:])
    assert everything["date"].tolist() == list(days)
    assert [(r.tail, r.first_date.date(), r.last_date.date(), r.state)
            for r in stored.itertuples()] == [
        ("lower", d[0], d[11], "calm"), ("upper", d[0], d[4], "calm"),
        ("upper", d[5], d[9], "watch"), ("upper", d[10], d[10], "calm"),
        ("upper", d[11], d[11], "watch")]
