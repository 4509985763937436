"""Signals in the store: per signal settings key and pair, the alert episodes, the daily tail
states as run-length encoded runs, and the point each pair's signals continue from; all three
are written in one transaction per pair, so they always agree with each other.

Tables (:mod:`monitor.data.schema`): ``episodes``, ``state_runs``, ``signal_resume``.
"""

from __future__ import annotations

import datetime as dt
import json
import math

import pandas as pd
import sqlalchemy as sa

from monitor.data.schema import episodes, metrics, signal_resume, state_runs, universe_daily
from monitor.data.store_base import StoreBase, of_pair, row_frame, to_dates, utc_now

# Statements the signals step runs for every pair, built once: building and compiling SQL
# expressions per call would cost more than running them.
_EPISODE_COLUMNS = [c for c in episodes.c
                    if c.name not in ("settings", "asset_a", "asset_b", "updated_at")]
_SELECT_EPISODES = sa.select(*_EPISODE_COLUMNS).where(of_pair(episodes))
_DELETE_EPISODE = episodes.delete().where(
    of_pair(episodes), episodes.c.tail == sa.bindparam("p_t"),
    episodes.c.start == sa.bindparam("p_f"))
_SELECT_RUNS = sa.select(state_runs.c.tail, state_runs.c.first_date, state_runs.c.last_date,
                         state_runs.c.state).where(of_pair(state_runs))
_DELETE_RUN = state_runs.delete().where(
    of_pair(state_runs), state_runs.c.tail == sa.bindparam("p_t"),
    state_runs.c.first_date == sa.bindparam("p_f"))
# The summary of a signals key is stored under that key extended by "|..." (the carry-forward
# limit, monitor.stats.signals.universe_key): ``p_l`` is the key as a LIKE prefix (_like_prefix).
_DELETE_UNIVERSE_FROM = universe_daily.delete().where(
    sa.or_(universe_daily.c.settings == sa.bindparam("p_s"),
           universe_daily.c.settings.like(sa.bindparam("p_l"), escape="\\")),
    universe_daily.c.date >= sa.bindparam("p_f"))
_DELETE_RESUME = signal_resume.delete().where(of_pair(signal_resume))


def _like_prefix(key: str) -> str:
    """``key|`` followed by anything, as a LIKE pattern with ``\\`` as the escape."""
    escaped = key.replace("\\", "\\\\").replace("%", "\\%").replace("_", "\\_")
    return f"{escaped}|%"


class SignalStore(StoreBase):
    """The episodes, state runs and signal resume points of a store (a part of
    :class:`~monitor.data.store.Store`)."""

    def read_episodes(self, settings_key: str, pair: tuple[str, str] | None = None
                      ) -> pd.DataFrame:
        """Stored episodes (all pairs, or one), in start order."""
        stmt = sa.select(episodes).where(episodes.c.settings == settings_key)
        if pair is not None:
            stmt = stmt.where(sa.and_(episodes.c.asset_a == pair[0],
                                      episodes.c.asset_b == pair[1]))
        with self.engine.connect() as conn:
            rows = conn.execute(stmt.order_by(episodes.c.start)).mappings().all()
        return pd.DataFrame([dict(r) for r in rows])

    def episode_durations(self, settings_key: str, rolling_key: str) -> pd.DataFrame:
        """Per stored episode, its length in window ends and the standard errors at its peak.

        Parameters
        ----------
        settings_key : str
            Signal settings key of the episodes.
        rolling_key : str
            Rolling settings key of the metrics they were computed from.

        Returns
        -------
        DataFrame
            ``asset_a, asset_b, tail, start`` (the episode's key), ``duration_days`` (the
            pair's window ends from ``start`` to ``last_day`` inclusive), ``last_day`` (the
            episode's end, or the pair's latest window end while open) and, from the metric
            row at the peak date, ``peak_kendall_tau_se`` and ``peak_tail_emp_se`` (of the
            episode's tail; NULL where not stored).

        Notes
        -----
        One query for all episodes: both bounds of each date range are plain comparisons, so
        the database walks the metrics index over the episode's own window ends only.
        """
        e, m = episodes, metrics
        last = sa.func.coalesce(e.c.end, sa.literal(dt.date(9999, 12, 31), sa.Date))
        pair = sa.and_(m.c.settings == rolling_key, m.c.asset_a == e.c.asset_a,
                       m.c.asset_b == e.c.asset_b)
        days = (sa.select(sa.func.count()).select_from(m)
                .where(pair, m.c.date >= e.c.start, m.c.date <= last).scalar_subquery())
        latest = sa.select(sa.func.max(m.c.date)).where(pair).scalar_subquery()
        at_peak = sa.and_(pair, m.c.date == e.c.peak_date)
        tau_se = sa.select(m.c.kendall_tau_se).where(at_peak).scalar_subquery()
        emp_se = sa.select(sa.case((e.c.tail == "lower", m.c.tail_lower_emp_se),
                                   else_=m.c.tail_upper_emp_se)).where(at_peak).scalar_subquery()
        stmt = sa.select(e.c.asset_a, e.c.asset_b, e.c.tail, e.c.start,
                         days.label("duration_days"),
                         sa.case((e.c.end.is_(None), latest), else_=e.c.end).label("last_day"),
                         tau_se.label("peak_kendall_tau_se"), emp_se.label("peak_tail_emp_se")
                         ).where(e.c.settings == settings_key)
        with self.engine.connect() as conn:
            rows = conn.execute(stmt).all()
        return pd.DataFrame(rows, columns=["asset_a", "asset_b", "tail", "start",
                                           "duration_days", "last_day", "peak_kendall_tau_se",
                                           "peak_tail_emp_se"])

    @staticmethod
    def sync_episodes(conn: sa.Connection, settings_key: str, a: str, b: str,
                      current: list[dict], since: dt.date | None = None
                      ) -> tuple[list[dict], list[dict], list[dict]]:
        """Make the stored episodes of a pair equal ``current`` (dicts with the table's
        columns but the key).

        With ``since``, ``current`` holds only the episodes in alert on that date or later
        (a continued computation) and the stored ones that ended before it are kept.

        Returns
        -------
        (new, ended, all) : tuple of lists of dict
            The episodes that are new, those that just ended, and every episode of the pair
            now stored, in start order.
        """
        key = {"p_s": settings_key, "p_a": a, "p_b": b}
        stored_all = [dict(r) for r in conn.execute(_SELECT_EPISODES, key).mappings()]

        def ended_before(e: dict) -> bool:
            return since is not None and e["end"] is not None and e["end"] < since

        kept = [e for e in stored_all if ended_before(e)]
        stored = {(e["tail"], e["start"]): e for e in stored_all if not ended_before(e)}
        fresh = {(e["tail"], e["start"]): e for e in current}
        new = [e for k, e in fresh.items() if k not in stored]
        ended = [e for k, e in fresh.items()
                 if k in stored and stored[k]["end"] is None and e["end"] is not None]
        changed = [e for k, e in fresh.items() if k in stored and any(
            not _same(stored[k][c], e[c]) for c in e)]
        gone = [k for k in stored if k not in fresh]
        if gone or changed:
            conn.execute(_DELETE_EPISODE, [{**key, "p_t": t, "p_f": f} for t, f in
                                           gone + [(e["tail"], e["start"]) for e in changed]])
        now = utc_now()
        rows = [{**e, "settings": settings_key, "asset_a": a, "asset_b": b, "updated_at": now}
                for e in new + changed]
        if rows:
            conn.execute(episodes.insert(), rows)
        return new, ended, sorted([*kept, *fresh.values()],
                                  key=lambda e: (e["start"], e["tail"]))

    def read_resumes(self, settings_key: str) -> dict[tuple[str, str], dict]:
        """Every pair's stored resume point under a signals key: ``{(a, b): payload}``
        (the JSON form of :class:`monitor.stats.signals.Resume`)."""
        r = signal_resume.c
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(r.asset_a, r.asset_b, r.payload).where(
                r.settings == settings_key)).all()
        return {(a, b): json.loads(p) for a, b, p in rows}

    @staticmethod
    def save_resume(conn: sa.Connection, settings_key: str, rolling_key: str, a: str, b: str,
                    through: dt.date, payload: dict | None) -> None:
        """Replace a pair's resume point (None only drops it), in the caller's transaction
        (the one that stores the states and episodes it continues)."""
        conn.execute(_DELETE_RESUME, {"p_s": settings_key, "p_a": a, "p_b": b})
        if payload is not None:
            conn.execute(signal_resume.insert(), {
                "settings": settings_key, "asset_a": a, "asset_b": b, "rolling": rolling_key,
                "through": through, "payload": json.dumps(payload), "updated_at": utc_now()})

    @staticmethod
    def sync_state_runs(conn: sa.Connection, settings_key: str, a: str, b: str,
                        runs: pd.DataFrame, since: dt.date | None = None) -> dt.date | None:
        """Make the stored state runs of a pair equal ``runs``, writing only the runs that
        changed, and drop the universe-summary rows from the first date whose state changed.

        Parameters
        ----------
        conn : Connection
            The caller's transaction (the one that syncs the pair's episodes).
        settings_key : str
            Signal settings key.
        a, b : str
            The pair.
        runs : DataFrame
            Columns ``tail, first_date, last_date, state`` (one row per run of equal state;
            see :func:`monitor.engine.pipeline.state_runs`).
        since : date, optional
            ``runs`` cover only the window ends after this one (a continued computation);
            the stored states up to it are kept, a run through it joining the first new
            run of its tail when their states agree.

        Returns
        -------
        datetime.date or None
            The first date whose stored state differs from before (None when none does).

        Notes
        -----
        A run that only grew (same tail, first date and state, a later last date) changes
        nothing up to its old last date, so the daily update rewrites one run per tail.
        """
        key = {"p_s": settings_key, "p_a": a, "p_b": b}
        stored = {(r[0], r[1]): (r[2], r[3]) for r in conn.execute(_SELECT_RUNS, key)}
        fresh = {(str(t), f): (last, str(st)) for t, f, last, st in zip(
            runs["tail"], to_dates(runs["first_date"]), to_dates(runs["last_date"]),
            runs["state"], strict=True)}
        if since is not None:
            fresh = _join_runs(stored, fresh, since)
        gone = [k for k in stored if k not in fresh]
        new = [k for k in fresh if k not in stored]
        changed = [k for k in fresh if k in stored and stored[k] != fresh[k]]
        touched = [k[1] for k in gone + new]
        for k in changed:
            (last0, state0), (last1, state1) = stored[k], fresh[k]
            touched.append(k[1] if state0 != state1
                           else min(last0, last1) + dt.timedelta(days=1))
        if not touched:
            return None
        if gone or changed:
            conn.execute(_DELETE_RUN, [{**key, "p_t": t, "p_f": f} for t, f in gone + changed])
        if new or changed:
            conn.execute(state_runs.insert(), [
                {"settings": settings_key, "asset_a": a, "asset_b": b, "tail": t,
                 "first_date": f, "last_date": fresh[(t, f)][0], "state": fresh[(t, f)][1]}
                for t, f in new + changed])
        first = min(touched)
        conn.execute(_DELETE_UNIVERSE_FROM, {"p_s": settings_key, "p_l": _like_prefix(settings_key),
                                             "p_f": first})
        return first

    def read_state_runs(self, settings_key: str, pair: tuple[str, str] | None = None, *,
                        starting_by: dt.date | None = None, ending_from: dt.date | None = None
                        ) -> pd.DataFrame:
        """Stored state runs (columns ``asset_a, asset_b, tail, first_date, last_date,
        state``; dates as Timestamps), of one pair or all, optionally only the runs that start
        on or before ``starting_by`` and end on or after ``ending_from``."""
        c = state_runs.c
        stmt = sa.select(c.asset_a, c.asset_b, c.tail, c.first_date, c.last_date, c.state).where(
            c.settings == settings_key)
        if pair is not None:
            stmt = stmt.where(c.asset_a == pair[0], c.asset_b == pair[1])
        if starting_by is not None:
            stmt = stmt.where(c.first_date <= starting_by)
        if ending_from is not None:
            stmt = stmt.where(c.last_date >= ending_from)
        with self.engine.connect() as conn:
            rows = conn.execute(stmt.order_by(c.asset_a, c.asset_b, c.tail, c.first_date)).all()
        frame = row_frame(rows, ["asset_a", "asset_b", "tail", "first_date", "last_date", "state"])
        for col in ("first_date", "last_date"):
            frame[col] = pd.to_datetime(frame[col])
        return frame


def _same(old: object, new: object) -> bool:
    """Whether a stored value equals a recomputed one, floats to rounding (a continued
    computation's CUSUM agrees with the whole timeline's to about 1e-15)."""
    if isinstance(old, float) and isinstance(new, float):
        return old == new or math.isclose(old, new, rel_tol=1e-12, abs_tol=1e-15)
    return old == new


def _join_runs(stored: dict, fresh: dict, since: dt.date) -> dict:
    """Stored state runs up to ``since`` followed by the fresh runs after it (both keyed by
    (tail, first date) with (last date, state) values), a run through ``since`` joined with
    its tail's first fresh run when their states agree."""
    out = {k: (min(last, since), state) for k, (last, state) in stored.items()
           if k[1] <= since}
    through = {k[0]: k for k, (last, _) in out.items() if last == since}
    joined = set()
    for (tail, first), (last, state) in sorted(fresh.items(), key=lambda kv: kv[0][1]):
        old = through.get(tail)
        if tail not in joined and old is not None and out[old][1] == state:
            out[old] = (last, state)
        else:
            out[(tail, first)] = (last, state)
        joined.add(tail)
    return out
