"""The store: SQLAlchemy Core over an embedded SQLite file or a PostgreSQL server.

Every step's writes are one transaction; results are keyed by the settings that produced them,
so changing a setting never mixes results, and re-running a step is idempotent. The schema
(:mod:`monitor.data.schema`) is versioned in ``schema_info``; opening a store written by a
newer comove is refused.

:class:`Store` combines the parts of the store, one module per domain, each holding every
statement on its tables as a named method:

- :mod:`monitor.data.store_prices`: prices, returns, ingest records and revisions;
- :mod:`monitor.data.store_residuals`: marginal fits and standardised residuals;
- :mod:`monitor.data.store_metrics`: the rolling metrics timeline and the pairs' rolling
  states;
- :mod:`monitor.data.store_signals`: episodes, state runs and the signals' resume points;
- :mod:`monitor.data.store_universe`: the universe summary;
- :mod:`monitor.data.store_outbox`: the alert e-mail queue.

The tables and the helpers of an ingest are importable from here too.
"""

from __future__ import annotations

from collections.abc import Callable, Hashable
from pathlib import Path
from typing import Any, Self

import numpy as np
import sqlalchemy as sa

from monitor.common.arrays import read_only
from monitor.common.errors import InputError
from monitor.data.schema import (
    SCHEMA_VERSION,
    UNIVERSE_COUNTS,
    UNIVERSE_MEANS,
    episodes,
    ingests,
    marginal_fits,
    marginal_state,
    metadata,
    metrics,
    open_schema,
    outbox,
    pair_state,
    prices,
    residuals,
    returns,
    revisions,
    schema_info,
    signal_resume,
    state_runs,
    universe_daily,
)
from monitor.data.store_base import Connection, Table
from monitor.data.store_metrics import MetricStore
from monitor.data.store_outbox import OutboxStore
from monitor.data.store_prices import (
    IngestRecord,
    PriceStore,
    as_tidy,
    checksum_bytes,
    frame_checksum,
    values_differ,
)
from monitor.data.store_residuals import ResidualStore, StoredMarginals
from monitor.data.store_signals import SignalStore
from monitor.data.store_universe import UniverseStore

__all__ = [
    "SCHEMA_VERSION", "UNIVERSE_COUNTS", "UNIVERSE_MEANS", "Connection", "IngestRecord",
    "Store", "StoredMarginals", "Table", "as_tidy", "checksum_bytes", "episodes",
    "frame_checksum", "ingests", "marginal_fits", "marginal_state", "metadata", "metrics",
    "outbox", "pair_state", "prices", "residuals", "returns", "revisions", "schema_info",
    "shown_url", "signal_resume", "state_runs", "universe_daily", "values_differ",
]


def shown_url(url: str) -> str:
    """A store URL as messages show it (password hidden); the URL itself if it is not one."""
    try:
        return sa.engine.make_url(url).render_as_string(hide_password=True)
    except sa.exc.ArgumentError:
        return url


class Store(PriceStore, ResidualStore, MetricStore, SignalStore, UniverseStore,
            OutboxStore):
    """A comove store at a SQLAlchemy URL.

    Parameters
    ----------
    url : str
        ``sqlite:///path`` (relative paths are under the working directory; the folder is
        created) or ``postgresql+psycopg://user@host:port/db``.
    create : bool
        Create the schema if the store is new. With False a missing SQLite file is an error
        and nothing is written (used by read-only commands and by refusals).
    """

    def __init__(self, url: str, *, create: bool = True) -> None:
        try:
            parsed = sa.engine.make_url(url)
        except sa.exc.ArgumentError:
            raise InputError(f"--store / store.url: {url!r} is not a database URL") from None
        self.url = url
        self.shown_url = shown_url(url)
        #: Values derived from the store, each with the store fingerprint it was computed
        #: under (:meth:`kept`).
        self._kept: dict[Hashable, tuple[tuple, Any]] = {}
        if parsed.get_backend_name() == "sqlite" and parsed.database not in (None, "", ":memory:"):
            path = Path(parsed.database)
            if not path.exists():
                if not create:
                    raise InputError(f"store {self.shown_url}: no store there yet "
                                     "(run 'comove ingest' first)")
                path.parent.mkdir(parents=True, exist_ok=True)
        try:
            self.engine = sa.create_engine(url)
            try:
                with self.engine.begin() as conn:
                    open_schema(conn, self.shown_url, create)
            except BaseException:
                # A refused store keeps no pooled connection open (a server counts them, and
                # a database with open connections cannot be dropped).
                self.engine.dispose()
                raise
        except sa.exc.OperationalError as exc:
            raise InputError(f"store {self.shown_url}: cannot open "
                             f"({str(exc.orig).splitlines()[0]})") from None
        except ModuleNotFoundError as exc:
            raise InputError(f"store {self.shown_url}: database driver missing ({exc.name})"
                             ) from None

    def data_version(self) -> tuple:
        """A fingerprint of what the store holds, in one cheap statement: it changes whenever
        an ingest, an update or an ``alerts send`` stores something (the dashboard caches
        its pages against it)."""
        stmt = sa.select(
            sa.select(sa.func.max(ingests.c.id)).scalar_subquery(),
            sa.select(sa.func.max(marginal_state.c.updated_at)).scalar_subquery(),
            sa.select(sa.func.max(pair_state.c.updated_at)).scalar_subquery(),
            sa.select(sa.func.max(episodes.c.updated_at)).scalar_subquery(),
            sa.select(sa.func.max(signal_resume.c.updated_at)).scalar_subquery(),
            sa.select(sa.func.max(universe_daily.c.date)).scalar_subquery(),
            sa.select(sa.func.count()).select_from(outbox).scalar_subquery(),
            sa.select(sa.func.sum(outbox.c.attempts)).scalar_subquery(),
            sa.select(sa.func.count(outbox.c.sent_at)).scalar_subquery())
        with self.engine.connect() as conn:
            return tuple(conn.execute(stmt).one())

    def kept(self, name: Hashable, compute: Callable[[], Any]) -> Any:
        """``compute()``, computed once per store fingerprint (:meth:`data_version`) and kept
        under ``name`` until the store changes: for what a page derives from the whole store
        and shows to every user alike (an asset's return days, the Inputs page's tables).
        Two threads asking at once may both compute it; the value is the same."""
        version = self.data_version()
        held = self._kept.get(name)
        if held is not None and held[0] == version:
            return held[1]
        value = compute()
        self._kept[name] = (version, value)
        return value

    def return_days(self, asset: str) -> tuple[np.ndarray, np.ndarray]:
        """The asset's return dates (``datetime64[D]``, ascending) and whether each return is
        exactly 0 (a price that did not move): what a zero-return share over any window needs,
        without reading the values into a wide frame. Kept until the store's fingerprint
        changes (:meth:`kept`): a Timeline reads two assets' 5,000 days each time it is
        drawn, and they change only with an ingest."""
        return self.kept(("return days", asset), lambda: self._read_return_days(asset))

    def _read_return_days(self, asset: str) -> tuple[np.ndarray, np.ndarray]:
        # One row, the dates joined by the database and each marked "z" where the return is
        # exactly 0: a string to split, not 5,000 rows to fetch (4x faster).
        mark = sa.case((returns.c.value == 0, "z"), else_="")
        text = sa.cast(returns.c.date, sa.String(10)).concat(mark)
        stmt = sa.select(sa.func.aggregate_strings(text, ",")).where(returns.c.asset == asset)
        with self.engine.connect() as conn:
            joined = conn.execute(stmt).scalar()
        items = joined.split(",") if joined else []
        zero = np.fromiter((x[-1] == "z" for x in items), bool, len(items))
        days = np.array([x[:10] for x in items], dtype="datetime64[D]")
        order = np.argsort(days, kind="stable")  # the database joins them in no set order
        return read_only(days[order]), read_only(zero[order])

    def close(self) -> None:
        """Close the store's pooled connections."""
        self.engine.dispose()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
