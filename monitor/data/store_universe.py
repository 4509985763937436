"""The universe summary in the store: per signal settings key and window end, the cross-pair
means and counts of :func:`monitor.stats.signals.universe_summary`, kept current by ``comove
update`` and aggregated by the database from the stored metrics and state runs.

Tables (:mod:`monitor.data.schema`): ``universe_daily`` (read with ``metrics`` and
``state_runs``).
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa

from monitor.data.schema import UNIVERSE_COUNTS, UNIVERSE_MEANS, metrics, state_runs, universe_daily
from monitor.data.store_base import StoreBase, materialises, row_frame, to_dates


class UniverseStore(StoreBase):
    """The universe summary of a store (a part of :class:`~monitor.data.store.Store`)."""

    def universe_after(self, rolling_settings_key: str, signals_settings_key: str,
                       after: dt.date | None, stale_limit: int = 0) -> pd.DataFrame:
        """The universe summary of the dates after ``after`` (all when None), aggregated by
        the database from the stored metrics and state runs.

        Parameters
        ----------
        rolling_settings_key, signals_settings_key : str
            Keys of the metrics and of the state runs.
        after : date or None
            Last date already summarised.
        stale_limit : int
            Calendar dates a pair's latest window end is carried forward
            (:func:`monitor.stats.signals.universe_summary`; 0 counts only fresh window ends).

        Returns
        -------
        DataFrame
            :data:`monitor.stats.signals.UNIVERSE_COLUMNS`, indexed by ``date``, equal to
            :func:`monitor.stats.signals.universe_summary` of the pairs' signal frames.

        Notes
        -----
        The fresh window ends are summed per date by the database (five grouped queries;
        the alert counts join the few alert runs, materialised first, to the metrics key
        range they cover, so they cost what the alerts cover, not the whole history). Only
        the window ends that are carried -- those after which the pair skips a date of the
        universe's calendar, found with ``lead()`` window functions -- are read here and
        added to the dates they cover; on a normal day there are none.
        """
        from monitor.stats.signals import UNIVERSE_COLUMNS

        m = metrics.c
        base = [m.settings == rolling_settings_key]
        if after is not None:
            base.append(m.date > after)
        sums = [f(m[c]).label(f"{name}_{c}") for c in UNIVERSE_MEANS
                for name, f in (("sum", sa.func.sum), ("count", sa.func.count))]
        fresh = (sa.select(m.date, sa.func.count().label("n_pairs"), *sums)
                 .where(*base).group_by(m.date))

        def covered(tail: str, conn: sa.Connection) -> sa.Select[Any]:
            r = state_runs.c
            alert = sa.select(r.asset_a, r.asset_b, r.first_date, r.last_date).where(
                r.settings == signals_settings_key, r.tail == tail, r.state == "alert")
            if after is not None:
                alert = alert.where(r.last_date > after)
            runs = alert.cte(f"alert_{tail}")
            if materialises(conn):
                runs = runs.prefix_with("MATERIALIZED")
            return (sa.select(m.date, m.asset_a, m.asset_b)
                    .select_from(runs.join(metrics, sa.and_(
                        m.asset_a == runs.c.asset_a, m.asset_b == runs.c.asset_b,
                        m.date >= runs.c.first_date, m.date <= runs.c.last_date)))
                    .where(*base))

        def per_date(rows: sa.Select[Any] | sa.CompoundSelect[Any]) -> sa.Select[Any]:
            sub = rows.subquery()
            return sa.select(sub.c.date, sa.func.count()).group_by(sub.c.date)

        names = ["date", "n_pairs", *(c.name for c in sums)]
        with self.engine.connect() as conn:
            frame = row_frame(conn.execute(fresh).all(), names)
            counts: dict[str, dict[Any, int]] = {}
            for name, rows in (("n_alert", sa.union(covered("lower", conn),
                                                    covered("upper", conn))),
                               ("n_alert_lower", covered("lower", conn)),
                               ("n_alert_upper", covered("upper", conn))):
                counts[name] = dict(conn.execute(per_date(rows)).all())
            carried = (self._carried(conn, rolling_settings_key, signals_settings_key, after,
                                     stale_limit, pd.to_datetime(frame["date"]))
                       if stale_limit > 0 and len(frame) else None)
        for name, got in counts.items():
            frame[name] = frame["date"].map(got).fillna(0).astype(np.int64)
        frame.index = pd.DatetimeIndex(pd.to_datetime(frame.pop("date")), name="date")
        frame = frame.sort_index()
        for c in frame.columns:
            frame[c] = pd.to_numeric(frame[c]).astype(float)
        frame["n_carried"] = 0.0
        if carried is not None and len(carried):
            more = carried.reindex(frame.index).fillna(0.0)
            frame["n_carried"] = more["n_pairs"]
            frame[more.columns] += more
        for c in UNIVERSE_MEANS:
            with np.errstate(invalid="ignore", divide="ignore"):
                frame[c] = np.where(frame[f"count_{c}"] > 0,
                                    frame[f"sum_{c}"] / frame[f"count_{c}"], np.nan)
        for c in ("n_pairs", "n_carried", *counts):
            frame[c] = frame[c].astype(np.int64)
        frame["share_alert"] = frame["n_alert"] / frame["n_pairs"]
        return frame[list(UNIVERSE_COLUMNS)]

    @staticmethod
    def _carried(conn: sa.Connection, rolling_key: str, signals_key: str,
                 after: dt.date | None, stale_limit: int, new_days: pd.Series) -> pd.DataFrame:
        """Per date after ``after``: counts and sums (``sum_*``, ``count_*``, alert counts)
        of the window ends carried forward onto it (see :meth:`universe_after`)."""
        from monitor.stats.signals import carried_positions

        m = metrics.c
        scope = [m.settings == rolling_key]
        before: list = []
        if after is not None:
            before = list(conn.execute(
                sa.select(m.date).where(m.settings == rolling_key, m.date <= after).distinct()
                .order_by(m.date.desc()).limit(stale_limit)).scalars())
            scope.append(m.date >= min(before) if before else m.date > after)
        # Each date's place k in the universe's calendar (dense_rank) and the pair's next
        # window end with its place: a pair misses the calendar's next date when that place
        # is not k + 1 (a join of the rows with the calendar instead took O(rows x dates)
        # on SQLite, which does not index a subquery).
        ranked = sa.select(m.asset_a, m.asset_b, m.date, *[m[c] for c in UNIVERSE_MEANS],
                           sa.func.dense_rank().over(order_by=m.date).label("k")
                           ).where(*scope).subquery()
        by_pair = (ranked.c.asset_a, ranked.c.asset_b)
        rows = sa.select(
            *ranked.c,
            sa.func.lead(ranked.c.date).over(partition_by=by_pair, order_by=ranked.c.date)
            .label("pair_next"),
            sa.func.lead(ranked.c.k).over(partition_by=by_pair, order_by=ranked.c.date)
            .label("k_next"),
            sa.func.max(ranked.c.k).over().label("k_last")).subquery()
        gaps = (sa.select(rows.c.asset_a, rows.c.asset_b, rows.c.date,
                          *[rows.c[c] for c in UNIVERSE_MEANS], rows.c.pair_next)
                .where(rows.c.k < rows.c.k_last,
                       sa.or_(rows.c.k_next.is_(None), rows.c.k_next > rows.c.k + 1)))
        cols = ["asset_a", "asset_b", "date", *UNIVERSE_MEANS, "pair_next"]
        gap = row_frame(conn.execute(gaps).all(), cols)
        if gap.empty:
            return pd.DataFrame()
        r = state_runs.c
        runs = row_frame(conn.execute(sa.select(r.asset_a, r.asset_b, r.tail, r.first_date,
                                             r.last_date).where(
            r.settings == signals_key, r.state == "alert",
            r.last_date >= min(gap["date"]))).all(),
            ["asset_a", "asset_b", "tail", "first_date", "last_date"])
        calendar = pd.DatetimeIndex(sorted(set(pd.to_datetime(pd.Series(before, dtype=object)))
                                           | set(new_days)))
        gap["date"] = pd.to_datetime(gap["date"])
        nxt = pd.to_datetime(gap["pair_next"])
        pos = calendar.searchsorted(gap["date"])
        next_pos = np.where(nxt.isna(), len(calendar), calendar.searchsorted(nxt.fillna(
            calendar[-1])))
        idx, at = carried_positions(pos, next_pos, stale_limit)
        keep = at != pos[idx]
        idx, at = idx[keep], at[keep]
        if after is not None:
            later = calendar[at] > pd.Timestamp(after)
            idx, at = idx[later], at[later]
        out = gap.iloc[idx].reset_index(drop=True)
        for tail in ("lower", "upper"):
            t = runs[runs["tail"] == tail].assign(
                first_date=lambda x: pd.to_datetime(x["first_date"]),
                last_date=lambda x: pd.to_datetime(x["last_date"]))
            if t.empty:  # no alert run (an empty frame's key columns are not text)
                out[f"alert_{tail}"] = 0.0
                continue
            hit = out.reset_index().merge(t, on=["asset_a", "asset_b"])
            hit = hit[(hit["first_date"] <= hit["date"]) & (hit["date"] <= hit["last_date"])]
            out[f"alert_{tail}"] = out.index.isin(hit["index"]).astype(float)
        out["alert"] = np.fmax(out["alert_lower"], out["alert_upper"])
        out["day"] = calendar[at]
        for c in UNIVERSE_MEANS:
            out[c] = pd.to_numeric(out[c]).astype(float)
        g = out.groupby("day")
        agg = pd.DataFrame({"n_pairs": g.size().astype(float)})
        for c in UNIVERSE_MEANS:
            agg[f"sum_{c}"] = g[c].sum()
            agg[f"count_{c}"] = g[c].count().astype(float)
        for name, col in (("n_alert", "alert"), ("n_alert_lower", "alert_lower"),
                          ("n_alert_upper", "alert_upper")):
            agg[name] = g[col].sum()
        agg.index.name = "date"
        return agg

    def universe_range(self, settings_key: str) -> tuple[dt.date, dt.date] | None:
        """First and last date of the stored universe summary (None when none is stored)."""
        u = universe_daily.c
        with self.engine.connect() as conn:
            first, last = conn.execute(sa.select(sa.func.min(u.date), sa.func.max(u.date)).where(
                u.settings == settings_key)).one()
        return None if last is None else (first, last)

    @staticmethod
    def append_universe(conn: sa.Connection, settings_key: str, summary: pd.DataFrame) -> int:
        """Store universe-summary rows (a frame like :func:`monitor.stats.signals.universe_summary`'s,
        for dates not stored yet); returns the number of rows written."""
        if summary.empty:
            return 0
        rows = []
        for day, r in zip(to_dates(summary.index), summary.to_dict("records"), strict=True):
            row = {"settings": settings_key, "date": day}
            row.update({c: int(r[c]) for c in UNIVERSE_COUNTS if c in r})
            row.update({c: float(r[c]) if np.isfinite(r[c]) else None for c in UNIVERSE_MEANS})
            rows.append(row)
        conn.execute(universe_daily.insert(), rows)
        return len(rows)

    def read_universe(self, settings_key: str) -> pd.DataFrame:
        """The stored universe summary, oldest first, with the columns of
        :func:`monitor.stats.signals.universe_summary` (``share_alert`` is ``n_alert / n_pairs``)."""
        u = universe_daily.c
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(u.date, *[u[c] for c in UNIVERSE_COUNTS],
                                          *[u[c] for c in UNIVERSE_MEANS]).where(
                u.settings == settings_key).order_by(u.date)).all()
        frame = row_frame(rows, ["date", *UNIVERSE_COUNTS, *UNIVERSE_MEANS])
        frame.index = pd.DatetimeIndex(pd.to_datetime(frame.pop("date")), name="date")
        for c in UNIVERSE_COUNTS:
            # n_carried is NULL in rows of an older comove (which carried nothing): 0.
            frame[c] = pd.to_numeric(frame[c]).fillna(0).astype(np.int64)
        for c in UNIVERSE_MEANS:
            frame[c] = pd.to_numeric(frame[c]).astype(float)
        frame.insert(3, "share_alert", frame["n_alert"] / frame["n_pairs"])
        return frame
