"""Rolling metrics in the store: the rolling engine's timeline per settings key and pair (one
row per window end) and what the next incremental batch of a pair starts from (its last
window end, tau and warm starts), with the cross-pair reads of the timeline the board and the
signals step make.

Tables (:mod:`monitor.data.schema`): ``metrics``, ``pair_state``.

Each metric row also carries running counts of the pair's window ends (:data:`RUN_COLUMNS`):
those with both model-averaged tails computed, and of them those with the lower or the upper
one at least :data:`HEAVY_TAIL_LEVEL`. How many of a year's window ends had a heavy tail is
then the difference of two rows (:meth:`MetricStore.tail_runs_as_of`), not a count over the
year's rows: the Board needs it for every pair on every date it shows.
"""

from __future__ import annotations

import datetime as dt
import functools
import json
from collections.abc import Iterable
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa

from monitor.data.schema import metrics, pair_state, signal_resume, universe_daily
from monitor.data.store_base import (
    StoreBase,
    materialises,
    of_pair,
    raw_date,
    row_frame,
    to_dates,
    utc_now,
)

#: A pair's metrics to store: ``(asset_a, asset_b, frame, warm_starts, last_tau, replace_all)``.
PairMetrics = tuple[str, str, pd.DataFrame, dict[Any, Any], float, bool]

#: The model-averaged tail coefficient counted as heavy by the running counts (a store's
#: counts hold for this level: changing it needs the counts recounted).
HEAVY_TAIL_LEVEL = 0.1
#: The running counts of each metric row, in the order (averaged, heavy lower, heavy upper).
RUN_COLUMNS = ("run_averaged", "run_heavy_lower", "run_heavy_upper")


def _run_indicators(lower: Any, upper: Any) -> tuple[Any, Any, Any]:
    """What each running count adds for a window end with these model-averaged tails (numpy
    arrays or SQL expressions): both computed; computed and lower heavy; computed and upper
    heavy. One definition for the counts written with new rows and those recounted."""
    if isinstance(lower, np.ndarray):
        known = np.isfinite(lower) & np.isfinite(upper)
        return (known, known & (np.nan_to_num(lower) >= HEAVY_TAIL_LEVEL),
                known & (np.nan_to_num(upper) >= HEAVY_TAIL_LEVEL))
    known = sa.and_(lower.is_not(None), upper.is_not(None))
    heavy_lower = sa.and_(known, lower >= HEAVY_TAIL_LEVEL)
    heavy_upper = sa.and_(known, upper >= HEAVY_TAIL_LEVEL)
    return (sa.case((known, 1), else_=0), sa.case((heavy_lower, 1), else_=0),
            sa.case((heavy_upper, 1), else_=0))


def _running_counts(frame: pd.DataFrame, sizes: list[int], bases: np.ndarray
                    ) -> dict[str, np.ndarray]:
    """:data:`RUN_COLUMNS` for the rows of ``frame``: consecutive blocks of ``sizes`` rows,
    one block per pair in date order, each continuing from its pair's counts in ``bases``
    (one row per pair, NaN where unknown: the block's counts are then unknown too). Values
    are Python ints, or None where unknown."""
    lengths = np.asarray(sizes)
    starts = np.r_[0, np.cumsum(lengths)[:-1]]
    out = {}
    indicators = _run_indicators(
        pd.to_numeric(frame["tail_lower_avg"]).to_numpy(dtype=float),
        pd.to_numeric(frame["tail_upper_avg"]).to_numpy(dtype=float))
    for k, (name, hit) in enumerate(zip(RUN_COLUMNS, indicators, strict=True)):
        total = np.cumsum(hit, dtype=float)
        before = np.r_[0.0, total][starts]
        counts = total - np.repeat(before, lengths) + np.repeat(bases[:, k], lengths)
        out[name] = np.array([None if not np.isfinite(v) else int(v) for v in counts.tolist()],
                             dtype=object)
    return out


def _records(frame: pd.DataFrame, extra: dict[str, Any]) -> list[dict[str, Any]]:
    """Insert parameters from a metrics frame: ``date``/``start`` as dates, non-finite
    numbers as NULL, Python scalars; ``extra`` added to every row. Built column by column,
    which is several times faster than ``DataFrame.to_dict`` on the daily one-row frames."""
    columns: list[list[Any]] = []
    for name, col in frame.items():
        arr = col.to_numpy()
        if name in ("date", "start"):
            values: list[Any] = to_dates(arr)
        elif arr.dtype.kind == "f":
            values = arr.tolist()
            for i in np.flatnonzero(~np.isfinite(arr)):
                values[i] = None
        else:
            values = [None if isinstance(x, float) and not np.isfinite(x) else x
                      for x in arr.tolist()]
        columns.append(values)
    names = list(frame.columns)
    return [{**dict(zip(names, row, strict=True)), **extra}
            for row in zip(*columns, strict=True)]


@functools.cache
def _timeline_statements(columns: tuple[str, ...] | None = None
                         ) -> tuple[sa.Select[Any], sa.Select[Any]]:
    """A pair's metric rows in date order (``columns``, default every column of the rolling
    engine): all of them, and those from the ``p_n``-th window end before ``p_d`` on (all
    when it has fewer)."""
    from monitor.stats.rolling import METRIC_COLUMNS

    # Dates come through as the driver gives them (ISO text on SQLite) and are converted
    # per column: several times faster than converting value by value, which matters when
    # every pair's timeline is read daily.
    cols = [raw_date(metrics.c[c]) if c in ("date", "start") else metrics.c[c]
            for c in (columns or METRIC_COLUMNS)]
    whole = sa.select(*cols).where(of_pair(metrics)).order_by(metrics.c.date)
    first = (sa.select(metrics.c.date)
             .where(of_pair(metrics), metrics.c.date <= sa.bindparam("p_d"))
             .order_by(metrics.c.date.desc()).limit(1).offset(sa.bindparam("p_n"))
             .scalar_subquery())
    newest = whole.where(metrics.c.date >= sa.func.coalesce(first, dt.date(1, 1, 1)))
    return whole, newest


class MetricStore(StoreBase):
    """The rolling metrics and the pairs' rolling states of a store (a part of
    :class:`~monitor.data.store.Store`)."""

    def load_pair_states(self, settings_key: str) -> dict[tuple[str, str], dict]:
        """Every pair's last stored window end, its tau and the warm starts, by pair."""
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(
                pair_state.c.asset_a, pair_state.c.asset_b, pair_state.c.last_date,
                pair_state.c.last_tau, pair_state.c.warm_starts).where(
                pair_state.c.settings == settings_key)).all()
        out = {}
        for a, b, last_date, last_tau, warm_json in rows:
            warm = {(k.split("|")[0], int(k.split("|")[1])): np.array(v, dtype=float)
                    for k, v in json.loads(warm_json).items()}
            out[(a, b)] = {"last_date": last_date, "last_tau": last_tau, "warm": warm}
        return out

    def has_metrics(self, settings_key: str, a: str, b: str) -> bool:
        """Whether any metric row of the pair is stored under the key."""
        where = sa.and_(metrics.c.settings == settings_key, metrics.c.asset_a == a,
                        metrics.c.asset_b == b)
        with self.engine.connect() as conn:
            return conn.execute(sa.select(sa.exists().where(where))).scalar_one()

    @staticmethod
    def _last_runs(conn: sa.Connection, settings_key: str
                   ) -> dict[tuple[str, str], tuple[float, ...]]:
        """Per pair with a rolling state, the running counts of its last stored row (NaN
        where that row has none: an older store's)."""
        m, p = metrics.c, pair_state.c
        stmt = (sa.select(m.asset_a, m.asset_b, *[m[c] for c in RUN_COLUMNS])
                .select_from(pair_state.join(metrics, sa.and_(
                    m.settings == p.settings, m.asset_a == p.asset_a, m.asset_b == p.asset_b,
                    m.date == p.last_date)))
                .where(p.settings == settings_key))
        return {(a, b): tuple(np.nan if v is None else float(v) for v in runs)
                for a, b, *runs in conn.execute(stmt)}

    def runs_missing(self, settings_key: str) -> bool:
        """Whether some pair's last stored row has no running counts (rows of an older
        store; :meth:`recount_runs` fills them). Rows are counted from their pair's first
        window end on, so a last row with counts means all of the pair's have them."""
        with self.engine.connect() as conn:
            return any(np.isnan(v).any() for v in
                       self._last_runs(conn, settings_key).values())

    def recount_runs(self, settings_key: str) -> int:
        """Write the running counts of every metric row under the key from its pair's
        stored rows (one statement; rows of an older store have none). Returns the rows
        written."""
        m = metrics.c
        counted = (sa.select(m.asset_a, m.asset_b, m.date, *[
            sa.func.sum(hit).over(partition_by=[m.asset_a, m.asset_b], order_by=m.date)
            .label(name) for name, hit in zip(
                RUN_COLUMNS, _run_indicators(m.tail_lower_avg, m.tail_upper_avg), strict=True)])
            .where(m.settings == settings_key).subquery("counted"))
        stmt = (metrics.update()
                .where(m.settings == settings_key, m.asset_a == counted.c.asset_a,
                       m.asset_b == counted.c.asset_b, m.date == counted.c.date)
                .values({name: counted.c[name] for name in RUN_COLUMNS}))
        with self.transaction() as conn:
            return int(conn.execute(stmt).rowcount)

    @staticmethod
    def save_pair_metrics(conn: sa.Connection, settings_key: str, a: str, b: str,
                          frame: pd.DataFrame, warm: dict, last_tau: float,
                          replace_all: bool = False) -> None:
        """Append a pair's new metric rows and its state, in the caller's transaction
        (``replace_all`` first drops whatever the pair had under the key)."""
        MetricStore.save_metrics(conn, settings_key, [(a, b, frame, warm, last_tau, replace_all)])

    @staticmethod
    def save_metrics(conn: sa.Connection, settings_key: str,
                     items: list[PairMetrics]) -> int:
        """:meth:`save_pair_metrics` for many pairs at once (one statement per table, which
        is what makes the daily update of hundreds of one-row pairs cheap); returns the
        number of metric rows written.

        Parameters
        ----------
        conn : Connection
            The caller's transaction.
        settings_key : str
            Rolling settings key.
        items : list of tuple
            ``(asset_a, asset_b, frame, warm_starts, last_tau, replace_all)`` per pair.
        """
        replaced = [{"p_s": settings_key, "p_a": a, "p_b": b}
                    for a, b, *_, replace_all in items if replace_all]
        if replaced:
            conn.execute(metrics.delete().where(of_pair(metrics)), replaced)
            # Resume points are keyed by the signals' settings; their ``rolling`` column
            # names the metrics they continue.
            conn.execute(signal_resume.delete().where(
                signal_resume.c.rolling == sa.bindparam("p_s"),
                signal_resume.c.asset_a == sa.bindparam("p_a"),
                signal_resume.c.asset_b == sa.bindparam("p_b")), replaced)
            # Every date of the universe summary may have used the replaced rows.
            conn.execute(universe_daily.delete().where(universe_daily.c.settings.startswith(
                f"{settings_key}|", autoescape=True)))
        live = [(a, b, frame, replace_all) for a, b, frame, *_, replace_all in items
                if not frame.empty]
        rows = []
        if live:
            # One frame for all pairs: converting it costs about as much as one pair's.
            both = pd.concat([f for _, _, f, _ in live], ignore_index=True)
            sizes = [len(f) for _, _, f, _ in live]
            both["asset_a"] = np.repeat([a for a, _, _, _ in live], sizes)
            both["asset_b"] = np.repeat([b for _, b, _, _ in live], sizes)
            last = MetricStore._last_runs(conn, settings_key)
            bases = np.array([(0.0, 0.0, 0.0) if replace_all
                              else last.get((a, b), (0.0, 0.0, 0.0))
                              for a, b, _, replace_all in live], dtype=float).reshape(-1, 3)
            for name, values in _running_counts(both, sizes, bases).items():
                both[name] = values
            rows = _records(both, {"settings": settings_key})
        states = []
        now = utc_now()
        for a, b, frame, warm, last_tau, _ in items:
            if frame.empty:
                continue
            states.append({
                "settings": settings_key, "asset_a": a, "asset_b": b,
                "last_date": pd.Timestamp(frame["date"].iloc[-1]).date(),
                "last_tau": float(last_tau),
                "warm_starts": json.dumps({f"{k[0]}|{k[1]}": [float(x) for x in v]
                                           for k, v in warm.items()}),
                "updated_at": now})
        if rows:
            conn.execute(metrics.insert(), rows)
        if items:
            conn.execute(pair_state.delete().where(of_pair(pair_state)),
                         [{"p_s": settings_key, "p_a": a, "p_b": b} for a, b, *_ in items])
        if states:
            conn.execute(pair_state.insert(), states)
        return len(rows)

    def read_timeline(self, settings_key: str, a: str, b: str, *,
                      context_from: dt.date | None = None, context_rows: int = 0,
                      columns: Iterable[str] | None = None) -> pd.DataFrame:
        """A pair's stored metric rows, oldest first (the columns of the rolling engine, or
        only ``columns`` of them: a page that shows a few reads a few).

        With ``context_from``, only the newest rows: those from ``context_rows`` window
        ends up to and including ``context_from`` on (all rows when it has fewer before).
        """
        from monitor.stats.rolling import METRIC_COLUMNS

        names = tuple(METRIC_COLUMNS if columns is None else columns)
        whole, newest = _timeline_statements(None if columns is None else names)
        params: dict[str, Any] = {"p_s": settings_key, "p_a": a, "p_b": b}
        if context_from is None:
            stmt = whole
        else:
            stmt = newest
            params.update(p_d=context_from, p_n=max(context_rows - 1, 0))
        with self.engine.connect() as conn:
            rows = conn.execute(stmt, params).fetchall()
        data = list(zip(*rows, strict=True)) if rows else [()] * len(names)
        out = {}
        for name, values in zip(names, data, strict=True):
            kind = metrics.c[name].type.python_type
            if kind is dt.date:  # ISO text (SQLite) or dates (PostgreSQL)
                out[name] = np.array(values, dtype="datetime64[D]").astype("datetime64[us]")
            elif kind in (float, int, bool):
                # Typed arrays up front (NULL reads as NaN): no per-value type inference.
                out[name] = np.array(values, dtype=kind)
            else:
                out[name] = pd.array(values, dtype="str")
        return pd.DataFrame(out, columns=list(names))

    def metrics_as_of(self, settings_key: str, as_of: dt.date,
                      columns: Iterable[str], back: int = 0) -> pd.DataFrame:
        """For every pair with a stored rolling state, its latest metric row dated on or before
        ``as_of``: one query (columns ``asset_a, asset_b`` and ``columns``; ``date`` as a
        Timestamp when asked for). Pairs with no window end by then are left out.

        With ``back`` > 0, the row ``back`` window ends before that one instead (the pair's
        own window ends; pairs with fewer are left out).

        Notes
        -----
        A common table expression first finds each pair's latest date with a correlated
        ``max`` over the metrics key (settings, pair, date): one index seek per pair. It is
        materialised where the database supports it (SQLite >= 3.35, PostgreSQL >= 12), so
        the planner cannot fold it into a scan of every window end (seconds instead of
        milliseconds for 435 pairs x 4750 windows).
        """
        columns = list(columns)
        if isinstance(back, bool) or not isinstance(back, int) or back < 0:
            raise ValueError(f"back must be an integer >= 0, got {back!r}")
        inner = metrics.alias("later")
        of_pair = (inner.c.settings == pair_state.c.settings,
                   inner.c.asset_a == pair_state.c.asset_a,
                   inner.c.asset_b == pair_state.c.asset_b, inner.c.date <= as_of)
        if back == 0:
            latest = sa.select(sa.func.max(inner.c.date)).where(*of_pair).scalar_subquery()
        else:
            latest = (sa.select(inner.c.date).where(*of_pair).order_by(inner.c.date.desc())
                      .limit(1).offset(back).scalar_subquery())
        with self.engine.connect() as conn:
            ends = sa.select(pair_state.c.asset_a, pair_state.c.asset_b,
                             latest.label("last_end")).where(
                pair_state.c.settings == settings_key).cte("ends")
            if materialises(conn):
                ends = ends.prefix_with("MATERIALIZED")
            stmt = (sa.select(metrics.c.asset_a, metrics.c.asset_b,
                              *[metrics.c[c] for c in columns])
                    .select_from(ends.join(metrics, sa.and_(
                        metrics.c.settings == settings_key,
                        metrics.c.asset_a == ends.c.asset_a,
                        metrics.c.asset_b == ends.c.asset_b,
                        metrics.c.date == ends.c.last_end)))
                    .order_by(metrics.c.asset_a, metrics.c.asset_b))
            rows = conn.execute(stmt).all()
        frame = row_frame(rows, ["asset_a", "asset_b", *columns])
        for col in ("date", "start"):
            if col in frame.columns:
                frame[col] = pd.to_datetime(frame[col])
        return frame

    def tail_level_counts(self, settings_key: str, first: dt.date, last: dt.date,
                          level: float, columns: tuple[str, str] = ("tail_lower_avg",
                                                                    "tail_upper_avg"),
                          latest: pd.DataFrame | None = None) -> pd.DataFrame:
        """Per pair with a stored rolling state, how many of its window ends in
        ``[first, last]`` have each of two tail columns at or above ``level``: one grouped
        query over those dates (pairs with none are left out).

        For the model-averaged tails at :data:`HEAVY_TAIL_LEVEL`, the counts are differences
        of the rows' running counts instead; ``latest``, when given, holds the pairs' rows by
        ``last`` (:meth:`metrics_as_of` with ``date`` and :data:`RUN_COLUMNS`) already read.

        Returns
        -------
        DataFrame
            ``asset_a, asset_b, n_ends`` (window ends with both columns computed: rows of
            an older comove with NULL there are not counted) and ``n_<column>`` per column.
        """
        if columns == ("tail_lower_avg", "tail_upper_avg") and level == HEAVY_TAIL_LEVEL:
            counted = self._counts_from_runs(settings_key, first, last, latest)
            if counted is not None:
                return counted
        m = metrics.c
        a, b = columns
        known = sa.and_(m[a].is_not(None), m[b].is_not(None))

        def above(col: str) -> sa.ColumnElement:
            return sa.func.sum(sa.case((sa.and_(known, m[col] >= level), 1), else_=0))

        # Joined from pair_state, so that each pair's dates are one range of the metrics key
        # (settings, pair, date) rather than a filter on every stored window end.
        p = pair_state.c
        stmt = (sa.select(p.asset_a, p.asset_b,
                          sa.func.sum(sa.case((known, 1), else_=0)), above(a), above(b))
                .select_from(pair_state.join(metrics, sa.and_(
                    m.settings == p.settings, m.asset_a == p.asset_a, m.asset_b == p.asset_b,
                    m.date >= first, m.date <= last)))
                .where(p.settings == settings_key)
                .group_by(p.asset_a, p.asset_b).order_by(p.asset_a, p.asset_b))
        with self.engine.connect() as conn:
            frame = row_frame(conn.execute(stmt).all(),
                           ["asset_a", "asset_b", "n_ends", f"n_{a}", f"n_{b}"])
        for c in ("n_ends", f"n_{a}", f"n_{b}"):
            frame[c] = pd.to_numeric(frame[c]).fillna(0).astype(np.int64)
        return frame

    def _counts_from_runs(self, settings_key: str, first: dt.date, last: dt.date,
                          latest: pd.DataFrame | None = None) -> pd.DataFrame | None:
        """:meth:`tail_level_counts` of the model-averaged tails at :data:`HEAVY_TAIL_LEVEL`
        as the difference of two rows' running counts per pair (an index seek each: the
        pair's last row by ``last`` and its last row before ``first``); None when a row
        needed has no counts (an older store's, before ``comove update`` recounts them)."""
        now = (self.metrics_as_of(settings_key, last, ["date", *RUN_COLUMNS])
               if latest is None else latest)
        now = now[now["date"] >= pd.Timestamp(first)].reset_index(drop=True)
        then = self.metrics_as_of(settings_key, first - dt.timedelta(days=1), RUN_COLUMNS)
        if now[list(RUN_COLUMNS)].isna().any().any() or then[list(RUN_COLUMNS)].isna().any().any():
            return None
        both = now.merge(then, on=["asset_a", "asset_b"], how="left", suffixes=("", "_then"))
        names = ("n_ends", "n_tail_lower_avg", "n_tail_upper_avg")
        out = both[["asset_a", "asset_b"]].copy()
        for name, run in zip(names, RUN_COLUMNS, strict=True):
            out[name] = (pd.to_numeric(both[run]).to_numpy(dtype=np.int64)
                         - pd.to_numeric(both[f"{run}_then"]).fillna(0).to_numpy(dtype=np.int64))
        return out

    def last_window(self, settings_key: str, a: str, b: str
                    ) -> tuple[dt.date, dt.date] | None:
        """(start, end) of the pair's latest stored window (in the stored order ``a, b``), or
        None: two index seeks, not a read of its timeline."""
        m = metrics.c
        last = (sa.select(pair_state.c.last_date).where(
            pair_state.c.settings == settings_key, pair_state.c.asset_a == a,
            pair_state.c.asset_b == b).scalar_subquery())
        with self.engine.connect() as conn:
            row = conn.execute(sa.select(m.start, m.date).where(
                m.settings == settings_key, m.asset_a == a, m.asset_b == b,
                m.date == last)).first()
        return None if row is None else (row[0], row[1])

    def latest_window_end(self, settings_key: str) -> dt.date | None:
        """The latest stored window end of any pair under a rolling settings key."""
        with self.engine.connect() as conn:
            return conn.execute(sa.select(sa.func.max(pair_state.c.last_date)).where(
                pair_state.c.settings == settings_key)).scalar_one_or_none()

    def monitored_pairs(self, settings_key: str) -> list[tuple[str, str]]:
        """Pairs with a stored rolling state under a rolling settings key, sorted: the pairs
        the dashboard lists (one row per pair, so cheap; :meth:`stored_pairs` scans the
        metrics)."""
        with self.engine.connect() as conn:
            return [tuple(r) for r in conn.execute(
                sa.select(pair_state.c.asset_a, pair_state.c.asset_b).where(
                    pair_state.c.settings == settings_key)
                .order_by(pair_state.c.asset_a, pair_state.c.asset_b))]

    def stored_pairs(self, settings_key: str) -> list[tuple[str, str]]:
        """Pairs with stored metric rows under a rolling settings key, in no particular
        order."""
        with self.engine.connect() as conn:
            return [tuple(r) for r in conn.execute(
                sa.select(metrics.c.asset_a, metrics.c.asset_b).where(
                    metrics.c.settings == settings_key).distinct())]
