"""Prices and returns in the store: reading them, and the writes of an ingest (the ingest
record, the values, the revisions and what a revision invalidates).

Tables (:mod:`monitor.data.schema`): ``ingests``, ``prices``, ``returns``, ``revisions``.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa

from monitor.data.schema import (
    ingests,
    marginal_fits,
    marginal_state,
    metrics,
    pair_state,
    prices,
    residuals,
    returns,
    revisions,
    signal_resume,
    universe_daily,
)
from monitor.data.store_base import StoreBase, raw_date, row_frame, to_dates, utc_now


@dataclass(frozen=True, slots=True)
class IngestRecord:
    """One row of the ingest history."""

    id: int
    source: str
    checksum: str
    kind: str
    rows: int
    assets: tuple[str, ...]
    first_date: dt.date | None
    last_date: dt.date | None
    new_values: int
    revised_values: int
    started_at: dt.datetime
    outcome: str
    summary: str


class PriceStore(StoreBase):
    """The prices, returns and ingest records of a store (a part of
    :class:`~monitor.data.store.Store`)."""

    # ------------------------------------------------------------------ reads
    def assets(self) -> list[str]:
        """Every asset with stored returns, sorted."""
        with self.engine.connect() as conn:
            return sorted(conn.execute(sa.select(returns.c.asset).distinct()).scalars())

    def read_returns(self, assets: Iterable[str] | None = None,
                     conn: sa.Connection | None = None) -> pd.DataFrame:
        """Stored log returns as a wide frame (date index, one column per asset, NaN where an
        asset has no value)."""
        return self._read_wide(returns, assets, conn)

    def zero_return_shares(self, assets: Iterable[str], last: int) -> dict[str, float]:
        """Per asset, the share of its ``last`` stored returns (its newest) that are exactly
        0: a price that did not move (counted in the database, the returns are not read)."""
        newest = sa.select(returns.c.asset, returns.c.value, sa.func.row_number().over(
            partition_by=returns.c.asset, order_by=returns.c.date.desc()).label("k")).where(
            returns.c.asset.in_(list(assets))).subquery()
        stmt = (sa.select(newest.c.asset, sa.func.avg(sa.case((newest.c.value == 0, 1.0),
                                                               else_=0.0)))
                .where(newest.c.k <= last).group_by(newest.c.asset))
        with self.engine.connect() as conn:
            return {a: float(share) for a, share in conn.execute(stmt).all()}

    def read_prices(self, assets: Iterable[str] | None = None,
                    conn: sa.Connection | None = None, since: dt.date | None = None
                    ) -> pd.DataFrame:
        """Stored prices as a wide frame (dated ``since`` or later when given)."""
        return self._read_wide(prices, assets, conn, since)

    @staticmethod
    def last_price_date_before(conn: sa.Connection, assets: Iterable[str], day: dt.date
                               ) -> dt.date | None:
        """The earliest of the assets' last price dates before ``day`` (None when none of
        them has a price before it): prices from there on give every return from ``day``
        on."""
        last = (sa.select(sa.func.max(prices.c.date).label("d"))
                .where(prices.c.asset.in_(list(assets)), prices.c.date < day)
                .group_by(prices.c.asset).subquery())
        return conn.execute(sa.select(sa.func.min(last.c.d))).scalar_one()

    def _read_wide(self, table: sa.Table, assets: Iterable[str] | None,
                   conn: sa.Connection | None, since: dt.date | None = None) -> pd.DataFrame:
        """``prices`` or ``returns`` as a wide frame (date x asset; the assets in the order
        given), dated ``since`` or later when given."""
        stmt = sa.select(table.c.asset, raw_date(table.c.date), table.c.value)
        if since is not None:
            stmt = stmt.where(table.c.date >= since)
        if assets is not None:
            assets = list(assets)
            stmt = stmt.where(table.c.asset.in_(assets))
        with self._conn(conn) as c:
            rows = c.execute(stmt.order_by(table.c.date)).all()
        if not rows:
            frame = pd.DataFrame(columns=assets or [], dtype=float)
            frame.index = pd.DatetimeIndex([], name="date")
            return frame
        tidy = row_frame(rows, ["asset", "date", "value"])
        tidy["date"] = pd.to_datetime(tidy["date"])
        wide = tidy.pivot(index="date", columns="asset", values="value").astype(float)
        wide.columns = [str(c) for c in wide.columns]
        wide.columns.name = None
        if assets is not None:
            wide = wide.reindex(columns=[a for a in assets if a in wide.columns])
        return wide

    def return_date_lists(self) -> list[tuple[str, str]]:
        """Every asset with stored returns and its return dates, one row per asset sorted by
        asset: ``(asset, dates)`` with the ISO dates joined by commas by the database
        (``group_concat`` / ``string_agg``), in no particular order."""
        text = sa.cast(returns.c.date, sa.String(10))
        stmt = (sa.select(returns.c.asset, sa.func.aggregate_strings(text, ","))
                .group_by(returns.c.asset).order_by(returns.c.asset))
        with self.engine.connect() as conn:
            return [(a, joined) for a, joined in conn.execute(stmt).all()]

    def ingest_history(self, limit: int | None = None) -> list[IngestRecord]:
        """Stored ingests, newest first."""
        stmt = sa.select(ingests).order_by(ingests.c.id.desc())
        if limit:
            stmt = stmt.limit(limit)
        with self.engine.connect() as conn:
            out = []
            for r in conn.execute(stmt).mappings():
                out.append(IngestRecord(
                    id=r["id"], source=r["source"], checksum=r["checksum"], kind=r["kind"],
                    rows=r["rows"], assets=tuple(json.loads(r["assets"])),
                    first_date=r["first_date"], last_date=r["last_date"],
                    new_values=r["new_values"], revised_values=r["revised_values"],
                    started_at=r["started_at"], outcome=r["outcome"], summary=r["summary"]))
            return out

    def revision_history(self) -> pd.DataFrame:
        """Every stored revision (the columns of ``revisions``), oldest first."""
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(revisions).order_by(revisions.c.id)).mappings().all()
        return pd.DataFrame([dict(r) for r in rows])

    # ------------------------------------------------------------------ writes (in a transaction)
    @staticmethod
    def insert_ingest(conn: sa.Connection, **values: Any) -> int:
        """Store one ingest record (``ingests`` columns; ``finished_at`` now unless given)
        and return its id."""
        values.setdefault("finished_at", utc_now())
        key = conn.execute(ingests.insert().values(**values)).inserted_primary_key
        if key is None:  # only an executemany insert has no single key
            raise RuntimeError("the ingest insert returned no primary key")
        return int(key[0])

    @staticmethod
    def stored_values(conn: sa.Connection, table: sa.Table, assets: Iterable[str],
                      since: dt.date | None = None) -> pd.DataFrame:
        """Stored (asset, date, value) rows of ``table`` for ``assets`` (dated ``since`` or
        later when given)."""
        stmt = sa.select(table.c.asset, raw_date(table.c.date), table.c.value).where(
            table.c.asset.in_(list(assets)))
        if since is not None:
            stmt = stmt.where(table.c.date >= since)
        rows = conn.execute(stmt).all()
        tidy = row_frame(rows, ["asset", "date", "value"])
        tidy["date"] = pd.to_datetime(tidy["date"])
        return tidy

    @staticmethod
    def upsert_values(conn: sa.Connection, table: sa.Table, rows: pd.DataFrame,
                      extra: dict[str, Any]) -> None:
        """Replace-or-insert (asset, date, value) rows, with ``extra`` columns added."""
        if rows.empty:
            return
        keys = [{"a": a, "d": d} for a, d in zip(rows["asset"], to_dates(rows["date"]),
                                                strict=True)]
        conn.execute(table.delete().where(sa.and_(table.c.asset == sa.bindparam("a"),
                                                  table.c.date == sa.bindparam("d"))), keys)
        payload = [{"asset": a, "date": d, "value": float(v), **extra}
                   for a, d, v in zip(rows["asset"], to_dates(rows["date"]), rows["value"],
                                      strict=True)]
        conn.execute(table.insert(), payload)

    @staticmethod
    def record_revisions(conn: sa.Connection, ingest_id: int, table_name: str,
                         changed: pd.DataFrame) -> None:
        """Record replaced values (``changed``: ``asset, date, old, new``) of ``table_name``
        under an ingest."""
        if changed.empty:
            return
        now = utc_now()
        conn.execute(revisions.insert(), [
            {"ingest_id": ingest_id, "table_name": table_name, "asset": a, "date": d,
             "old_value": float(o), "new_value": float(n), "revised_at": now}
            for a, d, o, n in zip(changed["asset"], to_dates(changed["date"]), changed["old"],
                                  changed["new"], strict=True)])

    @staticmethod
    def invalidate_from(conn: sa.Connection, asset: str, first: dt.date) -> None:
        """Drop derived results of ``asset`` that depend on returns dated ``first`` or later
        (a revision): residuals on or after it, marginal fits whose sample reaches it, and the
        record of the input (so the next update recomputes the asset's residuals)."""
        conn.execute(residuals.delete().where(sa.and_(residuals.c.asset == asset,
                                                      residuals.c.date >= first)))
        conn.execute(marginal_fits.delete().where(sa.and_(marginal_fits.c.asset == asset,
                                                          marginal_fits.c.fit_end >= first)))
        conn.execute(marginal_state.delete().where(marginal_state.c.asset == asset))
        involves = sa.or_(metrics.c.asset_a == asset, metrics.c.asset_b == asset)
        # A window ending on or after the revised date contains it.
        conn.execute(metrics.delete().where(sa.and_(involves, metrics.c.date >= first)))
        conn.execute(pair_state.delete().where(sa.or_(pair_state.c.asset_a == asset,
                                                      pair_state.c.asset_b == asset)))
        conn.execute(signal_resume.delete().where(sa.or_(signal_resume.c.asset_a == asset,
                                                         signal_resume.c.asset_b == asset)))
        # The universe summary from that date on mixes the dropped metrics: the next update
        # recomputes it (under every settings key, as the metrics of each are dropped).
        conn.execute(universe_daily.delete().where(universe_daily.c.date >= first))


def checksum_bytes(data: bytes) -> str:
    """The SHA-256 of a source's bytes, as hex."""
    return hashlib.sha256(data).hexdigest()


def frame_checksum(frame: pd.DataFrame) -> str:
    """A checksum of a wide frame's content (for SQL sources, which have no file bytes)."""
    body = frame.to_csv(float_format="%.17g", date_format="%Y-%m-%d").encode()
    return checksum_bytes(body)


def as_tidy(wide: pd.DataFrame) -> pd.DataFrame:
    """(asset, date, value) rows of a wide frame, NaN cells left out."""
    stacked = wide.stack(future_stack=True).dropna()
    tidy = stacked.reset_index()
    tidy.columns = ["date", "asset", "value"]
    return tidy[["asset", "date", "value"]].astype({"value": float})


def values_differ(old: np.ndarray, new: np.ndarray) -> np.ndarray:
    """Whether stored and incoming values differ beyond round-off of a CSV round trip."""
    return ~np.isclose(old, new, rtol=1e-12, atol=0.0)
