"""What the parts of the store share: the connection handling every part of
:class:`~monitor.data.store.Store` builds on (:class:`StoreBase`), and the conversions between
result rows, frames and statement parameters.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager
from typing import Any, TypeAlias

import pandas as pd
import sqlalchemy as sa

#: The handle of one transaction (what :meth:`StoreBase.transaction` yields); the writing
#: methods of the store take it so that a step's writes commit together.
Connection: TypeAlias = sa.Connection
#: A table of the schema (:mod:`monitor.data.schema`), for the methods that take one.
Table: TypeAlias = sa.Table


class StoreBase:
    """The engine of a store and the transactions and connections its methods run in.

    Attributes
    ----------
    engine : Engine
        The SQLAlchemy engine of the store's URL (set by :class:`~monitor.data.store.Store`).
    """

    engine: sa.Engine

    @contextmanager
    def transaction(self) -> Iterator[sa.Connection]:
        """One transaction: everything inside commits together or not at all."""
        with self.engine.begin() as conn:
            yield conn

    @contextmanager
    def _conn(self, conn: sa.Connection | None) -> Iterator[sa.Connection]:
        """``conn`` when given (the caller's transaction), else a new connection."""
        if conn is not None:
            yield conn
        else:
            with self.engine.connect() as c:
                yield c


def of_pair(table: sa.Table) -> sa.ColumnElement[bool]:
    """``settings, asset_a, asset_b`` equal to the bound ``p_s, p_a, p_b``."""
    return sa.and_(table.c.settings == sa.bindparam("p_s"),
                   table.c.asset_a == sa.bindparam("p_a"),
                   table.c.asset_b == sa.bindparam("p_b"))


def utc_now() -> dt.datetime:
    """The current UTC time to the second, without time zone (as the store keeps times)."""
    return dt.datetime.now(dt.UTC).replace(tzinfo=None, microsecond=0)


def row_frame(rows: Sequence[Any], columns: list[str]) -> pd.DataFrame:
    """A frame from fetched result rows, built column by column.

    pandas inspects every row object it is given (SQLAlchemy rows are not plain tuples), so
    transposing first is several times faster on the large reads of the daily update.
    """
    data = list(zip(*rows, strict=True)) if rows else [()] * len(columns)
    return pd.DataFrame({c: list(v) for c, v in zip(columns, data, strict=True)},
                        columns=columns)


def raw_date(column: sa.ColumnElement[Any]) -> sa.ColumnElement[str]:
    """A date column as the driver gives it (ISO text on SQLite, dates on PostgreSQL), for
    large reads that convert the whole column at once with ``pd.to_datetime``; SQLAlchemy's
    per-value date parsing dominates such reads otherwise."""
    return sa.type_coerce(column, sa.String)


def to_dates(index: Iterable[Any]) -> list[dt.date]:
    """Dates (anything ``pandas.Timestamp`` reads) as ``datetime.date`` parameters."""
    return [pd.Timestamp(d).date() for d in index]


def materialises(conn: sa.Connection) -> bool:
    """Whether the database takes ``WITH name AS MATERIALIZED (...)``."""
    dialect = conn.dialect
    if dialect.name == "sqlite":
        import sqlite3

        return sqlite3.sqlite_version_info >= (3, 35)
    if dialect.name == "postgresql":
        return (dialect.server_version_info or (0,)) >= (12,)
    return False
