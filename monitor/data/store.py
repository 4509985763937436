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

from pathlib import Path
from typing import Self

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
        #: Per asset, its return days as last read, with the store fingerprint then
        #: (:meth:`return_days`).
        self._return_days: dict[str, tuple[tuple, np.ndarray, np.ndarray]] = {}
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

    def return_days(self, asset: str) -> tuple[np.ndarray, np.ndarray]:
        """The asset's return dates (``datetime64[D]``, ascending) and whether each return is
        exactly 0 (a price that did not move): what a zero-return share over any window needs,
        without reading the values into a wide frame. Kept per asset until the store's
        fingerprint (:meth:`data_version`) changes: a Timeline reads two assets' 5,000 days
        each time it is drawn, and they change only with an ingest."""
        version = self.data_version()
        kept = self._return_days.get(asset)
        if kept is not None and kept[0] == version:
            return kept[1], kept[2]
        # Plain SQL text: no per-row result processing (a third of the time otherwise);
        # the same statement on SQLite (dates as ISO text) and PostgreSQL (dates).
        stmt = sa.text("SELECT date, value = 0 FROM returns WHERE asset = :asset "
                       "ORDER BY date")
        with self.engine.connect() as conn:
            rows = conn.execute(stmt, {"asset": asset}).all()
        days, zero = zip(*rows, strict=True) if rows else ((), ())
        out = (read_only(np.array(days, dtype="datetime64[D]")),
               read_only(np.array(zero, dtype=bool)))
        self._return_days[asset] = (version, *out)
        return out

    def close(self) -> None:
        """Close the store's pooled connections."""
        self.engine.dispose()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
