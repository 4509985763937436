"""The store: SQLAlchemy Core over an embedded SQLite file or a PostgreSQL server.

Every step's writes are one transaction; results are keyed by the settings that produced them,
so changing a setting never mixes results, and re-running a step is idempotent. The schema is
versioned in ``schema_info``; opening a store written by a newer comove is refused.

Tables (schema version 1):

- ``ingests``: every stored ingest (source, checksum, kind, rows, assets, dates, time, outcome).
- ``prices``, ``returns``: per asset and date; ``returns.origin`` says whether a return was
  given or derived from stored prices.
- ``revisions``: the audit trail of values replaced by an ingest run with revisions accepted.
- ``metrics``, ``pair_state``: the rolling engine's timeline per settings key and pair (one
  row per window end) and what the next incremental batch of a pair starts from.
- ``episodes``: alert episodes per signal settings key, pair and tail (open ones have no
  end), written when the signals change.
- ``state_runs``: each pair's daily tail states (calm / watch / alert) per signal settings key,
  run-length encoded (tail, state, first and last window end of each run), written in the
  same transaction as the pair's episodes.
- ``universe_daily``: the universe-level summary per signal settings key and window end (see
  :func:`monitor.stats.signals.universe_summary`), kept current by ``comove update``; a change to a
  pair's states or metrics removes the rows from the first date it touches, and the update
  recomputes the missing dates.
- ``marginal_fits``, ``marginal_state``, ``residuals``: per marginal settings key and asset
  (see :mod:`monitor.stats.marginals`): every fit with its diagnostics, the input the residuals
  were computed from, and the standardised residuals with their conditional sigma.
"""

from __future__ import annotations

import datetime as dt
import json
import math
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Self

import numpy as np
import pandas as pd
import sqlalchemy as sa

from monitor.common.errors import InputError

SCHEMA_VERSION = 1

metadata = sa.MetaData()
_DOUBLE = sa.Float(precision=53)

schema_info = sa.Table(
    "schema_info", metadata,
    sa.Column("key", sa.String(64), primary_key=True),
    sa.Column("value", sa.Text, nullable=False),
)

ingests = sa.Table(
    "ingests", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("source", sa.Text, nullable=False),
    sa.Column("checksum", sa.String(64), nullable=False),
    sa.Column("kind", sa.String(16), nullable=False),
    sa.Column("rows", sa.Integer, nullable=False),
    sa.Column("assets", sa.Text, nullable=False),
    sa.Column("first_date", sa.Date),
    sa.Column("last_date", sa.Date),
    sa.Column("new_values", sa.Integer, nullable=False),
    sa.Column("revised_values", sa.Integer, nullable=False),
    sa.Column("started_at", sa.DateTime, nullable=False),
    sa.Column("finished_at", sa.DateTime, nullable=False),
    sa.Column("outcome", sa.String(16), nullable=False),
    sa.Column("summary", sa.Text, nullable=False),
)

prices = sa.Table(
    "prices", metadata,
    sa.Column("asset", sa.String(128), primary_key=True),
    sa.Column("date", sa.Date, primary_key=True),
    sa.Column("value", _DOUBLE, nullable=False),
    sa.Column("ingest_id", sa.Integer, nullable=False),
)

returns = sa.Table(
    "returns", metadata,
    sa.Column("asset", sa.String(128), primary_key=True),
    sa.Column("date", sa.Date, primary_key=True),
    sa.Column("value", _DOUBLE, nullable=False),
    sa.Column("origin", sa.String(16), nullable=False),
    sa.Column("ingest_id", sa.Integer, nullable=False),
)

revisions = sa.Table(
    "revisions", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("ingest_id", sa.Integer, nullable=False),
    sa.Column("table_name", sa.String(16), nullable=False),
    sa.Column("asset", sa.String(128), nullable=False),
    sa.Column("date", sa.Date, nullable=False),
    sa.Column("old_value", _DOUBLE, nullable=False),
    sa.Column("new_value", _DOUBLE, nullable=False),
    sa.Column("revised_at", sa.DateTime, nullable=False),
)

marginal_fits = sa.Table(
    "marginal_fits", metadata,
    sa.Column("settings", sa.String(128), primary_key=True),
    sa.Column("asset", sa.String(128), primary_key=True),
    sa.Column("seq", sa.Integer, primary_key=True),
    sa.Column("fit_end", sa.Date, nullable=False),
    sa.Column("spec", sa.String(64), nullable=False),
    sa.Column("converged", sa.Boolean, nullable=False),
    sa.Column("fallback", sa.Text, nullable=False),
    sa.Column("payload", sa.Text, nullable=False),
)

marginal_state = sa.Table(
    "marginal_state", metadata,
    sa.Column("settings", sa.String(128), primary_key=True),
    sa.Column("asset", sa.String(128), primary_key=True),
    sa.Column("n_input", sa.Integer, nullable=False),
    sa.Column("input_start", sa.Date, nullable=False),
    sa.Column("input_end", sa.Date, nullable=False),
    sa.Column("input_digest", sa.String(64), nullable=False),
    sa.Column("updated_at", sa.DateTime, nullable=False),
)

residuals = sa.Table(
    "residuals", metadata,
    sa.Column("settings", sa.String(128), primary_key=True),
    sa.Column("asset", sa.String(128), primary_key=True),
    sa.Column("date", sa.Date, primary_key=True),
    sa.Column("value", _DOUBLE, nullable=False),
    sa.Column("sigma", _DOUBLE, nullable=False),
    sa.Column("fit_seq", sa.Integer, nullable=False),
)


def _pair_key() -> list[sa.Column]:
    """Key columns of per-pair tables (fresh objects: a Column belongs to one table)."""
    return [sa.Column("settings", sa.String(255), primary_key=True),
            sa.Column("asset_a", sa.String(128), primary_key=True),
            sa.Column("asset_b", sa.String(128), primary_key=True)]


metrics = sa.Table(
    "metrics", metadata, *_pair_key(),
    sa.Column("date", sa.Date, primary_key=True),
    sa.Column("start", sa.Date, nullable=False),
    sa.Column("n", sa.Integer, nullable=False),
    *[sa.Column(name, _DOUBLE) for name in (
        "kendall_tau", "kendall_tau_se", "spearman_rho")],
    sa.Column("family", sa.String(32), nullable=False),
    sa.Column("rotation", sa.Integer, nullable=False),
    sa.Column("param1", _DOUBLE),
    sa.Column("param2", _DOUBLE),
    sa.Column("converged", sa.Boolean, nullable=False),
    *[sa.Column(name, _DOUBLE) for name in (
        "loglik", "aic", "loglik_gauss", "aic_gauss", "tail_lower", "tail_upper",
        "tail_lower_emp", "tail_upper_emp", "tail_lower_emp_se", "tail_upper_emp_se",
        "gauss_tail_q", "loglik_best_lower", "loglik_best_upper", "llr_lower", "llr_upper",
        "tail_lower_avg", "tail_upper_avg")],
)

pair_state = sa.Table(
    "pair_state", metadata, *_pair_key(),
    sa.Column("last_date", sa.Date, nullable=False),
    sa.Column("last_tau", _DOUBLE, nullable=False),
    sa.Column("warm_starts", sa.Text, nullable=False),
    sa.Column("updated_at", sa.DateTime, nullable=False),
)


episodes = sa.Table(
    "episodes", metadata, *_pair_key(),
    sa.Column("tail", sa.String(8), primary_key=True),
    sa.Column("start", sa.Date, primary_key=True),
    sa.Column("onset", sa.Date, nullable=False),
    sa.Column("end", sa.Date),
    sa.Column("cause", sa.String(16), nullable=False),
    sa.Column("statistic", sa.String(16), nullable=False),
    sa.Column("peak_date", sa.Date, nullable=False),
    *[sa.Column(name, _DOUBLE) for name in (
        "peak_value", "peak_tail_emp", "peak_tail_model", "peak_gauss_tail",
        "peak_kendall_tau")],
    sa.Column("updated_at", sa.DateTime, nullable=False),
    # The evidence on the episode's latest day (its end, or the newest window end while open);
    # NULL in rows of an older store.
    sa.Column("latest_date", sa.Date),
    sa.Column("latest_value", _DOUBLE),
)


state_runs = sa.Table(
    "state_runs", metadata, *_pair_key(),
    sa.Column("tail", sa.String(8), primary_key=True),
    sa.Column("first_date", sa.Date, primary_key=True),
    sa.Column("last_date", sa.Date, nullable=False),
    sa.Column("state", sa.String(8), nullable=False),
)

#: Where each pair's signals continue from (:class:`monitor.stats.signals.Resume`, as JSON). A row
#: vouches that the pair's stored states and episodes agree with its stored metrics, so
#: anything that drops or replaces metric rows drops the pair's row here too.
signal_resume = sa.Table(
    "signal_resume", metadata, *_pair_key(),
    sa.Column("rolling", sa.String(255), nullable=False),  # the metrics' settings key
    sa.Column("through", sa.Date, nullable=False),  # last window end covered
    sa.Column("payload", sa.Text, nullable=False),
    sa.Column("updated_at", sa.DateTime, nullable=False),
)

#: Cross-pair means kept per date in ``universe_daily`` (columns of the metrics timeline).
UNIVERSE_MEANS = ("kendall_tau", "tail_lower", "tail_upper", "tail_lower_emp", "tail_upper_emp",
                  "tail_lower_avg", "tail_upper_avg")
#: Counts kept per date in ``universe_daily`` (``n_carried``: of ``n_pairs``, those counted
#: with an earlier window end, see :func:`monitor.stats.signals.universe_summary`).
UNIVERSE_COUNTS = ("n_pairs", "n_carried", "n_alert", "n_alert_lower", "n_alert_upper")

universe_daily = sa.Table(
    "universe_daily", metadata,
    sa.Column("settings", sa.String(255), primary_key=True),
    sa.Column("date", sa.Date, primary_key=True),
    *[sa.Column(name, sa.Integer, nullable=name == "n_carried") for name in UNIVERSE_COUNTS],
    *[sa.Column(name, _DOUBLE) for name in UNIVERSE_MEANS],
)

#: The alert e-mail queue (monitor.alerts.rules writes it, monitor.alerts.mailer delivers it).
outbox = sa.Table(
    "outbox", metadata,
    sa.Column("message_id", sa.String(128), primary_key=True),
    sa.Column("settings", sa.String(255), nullable=False),
    sa.Column("rule", sa.String(64), nullable=False),
    sa.Column("kind", sa.String(16), nullable=False),
    sa.Column("asset_a", sa.String(64)),
    sa.Column("asset_b", sa.String(64)),
    sa.Column("tail", sa.String(8)),
    sa.Column("event_date", sa.Date, nullable=False),
    sa.Column("subject", sa.Text, nullable=False),
    sa.Column("body_text", sa.Text, nullable=False),
    sa.Column("body_html", sa.Text, nullable=False),
    sa.Column("state", sa.String(8), nullable=False),  # pending, sent
    sa.Column("attempts", sa.Integer, nullable=False),
    sa.Column("last_error", sa.Text),
    sa.Column("created", sa.DateTime, nullable=False),
    sa.Column("next_attempt", sa.DateTime, nullable=False),
    sa.Column("sent_at", sa.DateTime),
    sa.Column("sent_as", sa.String(128)),  # the Message-ID it went out under (digests)
)


def _of_pair(table: sa.Table) -> sa.ColumnElement[bool]:
    """``settings, asset_a, asset_b`` equal to the bound ``p_s, p_a, p_b``."""
    return sa.and_(table.c.settings == sa.bindparam("p_s"),
                   table.c.asset_a == sa.bindparam("p_a"),
                   table.c.asset_b == sa.bindparam("p_b"))


# Statements the signals step runs for every pair, built once: building and compiling SQL
# expressions per call would cost more than running them.
_EPISODE_COLUMNS = [c for c in episodes.c
                    if c.name not in ("settings", "asset_a", "asset_b", "updated_at")]
_SELECT_EPISODES = sa.select(*_EPISODE_COLUMNS).where(_of_pair(episodes))
_DELETE_EPISODE = episodes.delete().where(
    _of_pair(episodes), episodes.c.tail == sa.bindparam("p_t"),
    episodes.c.start == sa.bindparam("p_f"))
_SELECT_RUNS = sa.select(state_runs.c.tail, state_runs.c.first_date, state_runs.c.last_date,
                         state_runs.c.state).where(_of_pair(state_runs))
_DELETE_RUN = state_runs.delete().where(
    _of_pair(state_runs), state_runs.c.tail == sa.bindparam("p_t"),
    state_runs.c.first_date == sa.bindparam("p_f"))
# The summary of a signals key is stored under that key extended by "|..." (the carry-forward
# limit, monitor.stats.signals.universe_key): ``p_l`` is the key as a LIKE prefix (_like_prefix).
_DELETE_UNIVERSE_FROM = universe_daily.delete().where(
    sa.or_(universe_daily.c.settings == sa.bindparam("p_s"),
           universe_daily.c.settings.like(sa.bindparam("p_l"), escape="\\")),
    universe_daily.c.date >= sa.bindparam("p_f"))


def _like_prefix(key: str) -> str:
    """``key|`` followed by anything, as a LIKE pattern with ``\\`` as the escape."""
    escaped = key.replace("\\", "\\\\").replace("%", "\\%").replace("_", "\\_")
    return f"{escaped}|%"
_DELETE_RESUME = signal_resume.delete().where(_of_pair(signal_resume))


def _timeline_statements() -> tuple[sa.Select, sa.Select]:
    """A pair's metric rows in date order: all of them, and those from the ``p_n``-th
    window end before ``p_d`` on (all when it has fewer)."""
    from monitor.stats.rolling import METRIC_COLUMNS

    # Dates come through as the driver gives them (ISO text on SQLite) and are converted
    # per column: several times faster than converting value by value, which matters when
    # every pair's timeline is read daily.
    cols = [_raw(metrics.c[c]) if c in ("date", "start") else metrics.c[c]
            for c in METRIC_COLUMNS]
    whole = sa.select(*cols).where(_of_pair(metrics)).order_by(metrics.c.date)
    first = (sa.select(metrics.c.date)
             .where(_of_pair(metrics), metrics.c.date <= sa.bindparam("p_d"))
             .order_by(metrics.c.date.desc()).limit(1).offset(sa.bindparam("p_n"))
             .scalar_subquery())
    newest = whole.where(metrics.c.date >= sa.func.coalesce(first, dt.date(1, 1, 1)))
    return whole, newest


def _now() -> dt.datetime:
    return dt.datetime.now(dt.UTC).replace(tzinfo=None, microsecond=0)


def _frame(rows: list, columns: list[str]) -> pd.DataFrame:
    """A frame from fetched result rows, built column by column.

    pandas inspects every row object it is given (SQLAlchemy rows are not plain tuples), so
    transposing first is several times faster on the large reads of the daily update.
    """
    data = list(zip(*rows, strict=True)) if rows else [()] * len(columns)
    return pd.DataFrame({c: list(v) for c, v in zip(columns, data, strict=True)},
                        columns=columns)


def _records(frame: pd.DataFrame, extra: dict) -> list[dict]:
    """Insert parameters from a metrics frame: ``date``/``start`` as dates, non-finite
    numbers as NULL, Python scalars; ``extra`` added to every row. Built column by column,
    which is several times faster than ``DataFrame.to_dict`` on the daily one-row frames."""
    columns = []
    for name, col in frame.items():
        arr = col.to_numpy()
        if name in ("date", "start"):
            values = _dates(arr)
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


def _raw(column: sa.ColumnElement) -> sa.ColumnElement:
    """A date column as the driver gives it (ISO text on SQLite, dates on PostgreSQL), for
    large reads that convert the whole column at once with ``pd.to_datetime``; SQLAlchemy's
    per-value date parsing dominates such reads otherwise."""
    return sa.type_coerce(column, sa.String)


_SELECT_TIMELINE, _SELECT_TIMELINE_FROM = _timeline_statements()


def _dates(index: Iterable) -> list[dt.date]:
    return [pd.Timestamp(d).date() for d in index]


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


class Store:
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
        self.shown_url = parsed.render_as_string(hide_password=True)
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
                    self._check_schema(conn, create)
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

    def _check_schema(self, conn: sa.Connection, create: bool) -> None:
        inspector = sa.inspect(conn)
        if not inspector.has_table("schema_info"):
            if not create:
                raise InputError(f"store {self.shown_url}: not a comove store (no schema)")
            metadata.create_all(conn)
            conn.execute(schema_info.insert().values(key="version", value=str(SCHEMA_VERSION)))
            return
        row = conn.execute(sa.select(schema_info.c.value).where(
            schema_info.c.key == "version")).scalar_one_or_none()
        version = int(row) if row is not None else 0
        if version > SCHEMA_VERSION:
            raise InputError(f"store {self.shown_url}: schema version {version} is newer than "
                             f"this comove understands ({SCHEMA_VERSION}); upgrade comove")
        missing = [t for t in metadata.sorted_tables if not inspector.has_table(t.name)]
        if missing and create:
            metadata.create_all(conn, tables=missing)
        _add_missing_columns(conn, inspector, [t for t in metadata.sorted_tables
                                               if t not in missing])

    def close(self) -> None:
        self.engine.dispose()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    @contextmanager
    def transaction(self) -> Iterator[sa.Connection]:
        """One transaction: everything inside commits together or not at all."""
        with self.engine.begin() as conn:
            yield conn

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

    def _read_wide(self, table: sa.Table, assets, conn, since=None) -> pd.DataFrame:
        stmt = sa.select(table.c.asset, _raw(table.c.date), table.c.value)
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
        tidy = _frame(rows, ["asset", "date", "value"])
        tidy["date"] = pd.to_datetime(tidy["date"])
        wide = tidy.pivot(index="date", columns="asset", values="value").astype(float)
        wide.columns = [str(c) for c in wide.columns]
        wide.columns.name = None
        if assets is not None:
            wide = wide.reindex(columns=[a for a in assets if a in wide.columns])
        return wide

    @contextmanager
    def _conn(self, conn: sa.Connection | None) -> Iterator[sa.Connection]:
        if conn is not None:
            yield conn
        else:
            with self.engine.connect() as c:
                yield c

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
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(revisions).order_by(revisions.c.id)).mappings().all()
        return pd.DataFrame([dict(r) for r in rows])

    # ------------------------------------------------------------------ writes (in a transaction)
    @staticmethod
    def insert_ingest(conn: sa.Connection, **values) -> int:
        values.setdefault("finished_at", _now())
        return int(conn.execute(ingests.insert().values(**values)).inserted_primary_key[0])

    @staticmethod
    def stored_values(conn: sa.Connection, table: sa.Table, assets: Iterable[str],
                      since: dt.date | None = None) -> pd.DataFrame:
        """Stored (asset, date, value) rows of ``table`` for ``assets`` (dated ``since`` or
        later when given)."""
        stmt = sa.select(table.c.asset, _raw(table.c.date), table.c.value).where(
            table.c.asset.in_(list(assets)))
        if since is not None:
            stmt = stmt.where(table.c.date >= since)
        rows = conn.execute(stmt).all()
        tidy = _frame(rows, ["asset", "date", "value"])
        tidy["date"] = pd.to_datetime(tidy["date"])
        return tidy

    @staticmethod
    def upsert_values(conn: sa.Connection, table: sa.Table, rows: pd.DataFrame,
                      extra: dict) -> None:
        """Replace-or-insert (asset, date, value) rows, with ``extra`` columns added."""
        if rows.empty:
            return
        keys = [{"a": a, "d": d} for a, d in zip(rows["asset"], _dates(rows["date"]),
                                                strict=True)]
        conn.execute(table.delete().where(sa.and_(table.c.asset == sa.bindparam("a"),
                                                  table.c.date == sa.bindparam("d"))), keys)
        payload = [{"asset": a, "date": d, "value": float(v), **extra}
                   for a, d, v in zip(rows["asset"], _dates(rows["date"]), rows["value"],
                                      strict=True)]
        conn.execute(table.insert(), payload)

    @staticmethod
    def record_revisions(conn: sa.Connection, ingest_id: int, table_name: str,
                         changed: pd.DataFrame) -> None:
        if changed.empty:
            return
        now = _now()
        conn.execute(revisions.insert(), [
            {"ingest_id": ingest_id, "table_name": table_name, "asset": a, "date": d,
             "old_value": float(o), "new_value": float(n), "revised_at": now}
            for a, d, o, n in zip(changed["asset"], _dates(changed["date"]), changed["old"],
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

    # ------------------------------------------------------------------ marginal results
    def load_filtered(self, settings_key: str, asset: str, conn: sa.Connection | None = None):
        """The stored :class:`~monitor.stats.marginals.FilteredSeries` of an asset, or None."""
        from monitor.stats.marginals import FilteredSeries

        with self._conn(conn) as c:
            state = c.execute(sa.select(marginal_state).where(sa.and_(
                marginal_state.c.settings == settings_key,
                marginal_state.c.asset == asset))).mappings().one_or_none()
            if state is None:
                return None
            fits = c.execute(sa.select(marginal_fits.c.payload).where(sa.and_(
                marginal_fits.c.settings == settings_key, marginal_fits.c.asset == asset))
                .order_by(marginal_fits.c.seq)).scalars().all()
            rows = c.execute(sa.select(_raw(residuals.c.date), residuals.c.value,
                                       residuals.c.sigma, residuals.c.fit_seq).where(sa.and_(
                residuals.c.settings == settings_key, residuals.c.asset == asset))
                .order_by(residuals.c.date)).all()
        return FilteredSeries.from_dict({
            "asset": asset, "settings": settings_key,
            "dates": [str(r[0]) for r in rows], "residuals": [r[1] for r in rows],
            "sigma": [r[2] for r in rows], "fit_index": [r[3] for r in rows],
            "fits": [json.loads(f) for f in fits],
            "input": {"n": state["n_input"], "start": state["input_start"].isoformat(),
                      "end": state["input_end"].isoformat(), "digest": state["input_digest"]},
        })

    @staticmethod
    def save_filtered(conn: sa.Connection, series, previous=None) -> int:
        """Store a FilteredSeries, writing only what is new relative to ``previous`` (the
        stored result it extends; None replaces whatever is stored). Returns the number of
        residual rows written."""
        key, asset = series.key, series.asset
        where_r = sa.and_(residuals.c.settings == key, residuals.c.asset == asset)
        where_f = sa.and_(marginal_fits.c.settings == key, marginal_fits.c.asset == asset)
        if previous is None:
            conn.execute(residuals.delete().where(where_r))
            conn.execute(marginal_fits.delete().where(where_f))
            old_rows, old_fits = 0, 0
        else:
            old_rows = len(previous.dates)
            # The last stored fit may have grown (it applies to more days now): rewrite it.
            old_fits = max(len(previous.fits) - 1, 0)
            conn.execute(marginal_fits.delete().where(sa.and_(
                where_f, marginal_fits.c.seq >= old_fits)))
        fits = series.fits[old_fits:]
        if fits:
            conn.execute(marginal_fits.insert(), [
                {"settings": key, "asset": asset, "seq": old_fits + i, "fit_end": f.sample_end,
                 "spec": f.spec.key, "converged": bool(f.converged),
                 "fallback": f.fallback or "", "payload": json.dumps(f.to_dict())}
                for i, f in enumerate(fits)])
        new = slice(old_rows, None)
        dates = [pd.Timestamp(d).date() for d in series.dates[new]]
        if dates:
            conn.execute(residuals.insert(), [
                {"settings": key, "asset": asset, "date": d, "value": float(z),
                 "sigma": float(sg), "fit_seq": int(k)}
                for d, z, sg, k in zip(dates, series.residuals[new], series.sigma[new],
                                       series.fit_index[new], strict=True)])
        conn.execute(marginal_state.delete().where(sa.and_(
            marginal_state.c.settings == key, marginal_state.c.asset == asset)))
        conn.execute(marginal_state.insert().values(
            settings=key, asset=asset, n_input=series.n_input, input_start=series.input_start,
            input_end=series.input_end, input_digest=series.input_digest, updated_at=_now()))
        return len(dates)

    def residual_count(self, settings_key: str, asset: str) -> int:
        """Stored residual rows of an asset under a settings key."""
        with self.engine.connect() as conn:
            return int(conn.execute(sa.select(sa.func.count()).select_from(residuals).where(
                sa.and_(residuals.c.settings == settings_key,
                        residuals.c.asset == asset))).scalar_one())

    # ------------------------------------------------------------------ rolling metrics
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
    def save_pair_metrics(conn: sa.Connection, settings_key: str, a: str, b: str,
                          frame: pd.DataFrame, warm: dict, last_tau: float,
                          replace_all: bool = False) -> None:
        """Append a pair's new metric rows and its state, in the caller's transaction
        (``replace_all`` first drops whatever the pair had under the key)."""
        Store.save_metrics(conn, settings_key, [(a, b, frame, warm, last_tau, replace_all)])

    @staticmethod
    def save_metrics(conn: sa.Connection, settings_key: str,
                     items: list[tuple[str, str, pd.DataFrame, dict, float, bool]]) -> int:
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
            conn.execute(metrics.delete().where(_of_pair(metrics)), replaced)
            # Resume points are keyed by the signals' settings; their ``rolling`` column
            # names the metrics they continue.
            conn.execute(signal_resume.delete().where(
                signal_resume.c.rolling == sa.bindparam("p_s"),
                signal_resume.c.asset_a == sa.bindparam("p_a"),
                signal_resume.c.asset_b == sa.bindparam("p_b")), replaced)
            # Every date of the universe summary may have used the replaced rows.
            conn.execute(universe_daily.delete().where(universe_daily.c.settings.startswith(
                f"{settings_key}|", autoescape=True)))
        live = [(a, b, frame) for a, b, frame, *_ in items if not frame.empty]
        rows = []
        if live:
            # One frame for all pairs: converting it costs about as much as one pair's.
            both = pd.concat([f for *_, f in live], ignore_index=True)
            sizes = [len(f) for *_, f in live]
            both["asset_a"] = np.repeat([a for a, _, _ in live], sizes)
            both["asset_b"] = np.repeat([b for _, b, _ in live], sizes)
            rows = _records(both, {"settings": settings_key})
        states = []
        now = _now()
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
            conn.execute(pair_state.delete().where(_of_pair(pair_state)),
                         [{"p_s": settings_key, "p_a": a, "p_b": b} for a, b, *_ in items])
        if states:
            conn.execute(pair_state.insert(), states)
        return len(rows)

    def read_timeline(self, settings_key: str, a: str, b: str, *,
                      context_from: dt.date | None = None, context_rows: int = 0
                      ) -> pd.DataFrame:
        """A pair's stored metric rows, oldest first (columns of the rolling engine).

        With ``context_from``, only the newest rows: those from ``context_rows`` window
        ends up to and including ``context_from`` on (all rows when it has fewer before).
        """
        from monitor.stats.rolling import METRIC_COLUMNS

        params = {"p_s": settings_key, "p_a": a, "p_b": b}
        if context_from is None:
            stmt = _SELECT_TIMELINE
        else:
            stmt = _SELECT_TIMELINE_FROM
            params.update(p_d=context_from, p_n=max(context_rows - 1, 0))
        with self.engine.connect() as conn:
            rows = conn.execute(stmt, params).fetchall()
        data = list(zip(*rows, strict=True)) if rows else [()] * len(METRIC_COLUMNS)
        out = {}
        for name, values in zip(METRIC_COLUMNS, data, strict=True):
            kind = metrics.c[name].type.python_type
            if kind is dt.date:  # ISO text (SQLite) or dates (PostgreSQL)
                out[name] = np.array(values, dtype="datetime64[D]").astype("datetime64[us]")
            elif kind in (float, int, bool):
                # Typed arrays up front (NULL reads as NaN): no per-value type inference.
                out[name] = np.array(values, dtype=kind)
            else:
                out[name] = pd.array(values, dtype="str")
        return pd.DataFrame(out, columns=list(METRIC_COLUMNS))

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
        now = _now()
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
                "through": through, "payload": json.dumps(payload), "updated_at": _now()})

    # ------------------------------------------------------------------ states and universe
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
            runs["tail"], _dates(runs["first_date"]), _dates(runs["last_date"]),
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
        frame = _frame(rows, ["asset_a", "asset_b", "tail", "first_date", "last_date", "state"])
        for col in ("first_date", "last_date"):
            frame[col] = pd.to_datetime(frame[col])
        return frame

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
            if _materialises(conn):
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
        frame = _frame(rows, ["asset_a", "asset_b", *columns])
        for col in ("date", "start"):
            if col in frame.columns:
                frame[col] = pd.to_datetime(frame[col])
        return frame

    def tail_level_counts(self, settings_key: str, first: dt.date, last: dt.date,
                          level: float, columns: tuple[str, str] = ("tail_lower_avg",
                                                                    "tail_upper_avg")
                          ) -> pd.DataFrame:
        """Per pair, how many of its window ends in ``[first, last]`` have each of two tail
        columns at or above ``level``: one grouped query over those dates.

        Returns
        -------
        DataFrame
            ``asset_a, asset_b, n_ends`` (window ends with both columns computed: rows of
            an older comove with NULL there are not counted) and ``n_<column>`` per column.
        """
        m = metrics.c
        a, b = columns
        known = sa.and_(m[a].is_not(None), m[b].is_not(None))

        def above(col: str) -> sa.ColumnElement:
            return sa.func.sum(sa.case((sa.and_(known, m[col] >= level), 1), else_=0))

        stmt = (sa.select(m.asset_a, m.asset_b,
                          sa.func.sum(sa.case((known, 1), else_=0)), above(a), above(b))
                .where(m.settings == settings_key, m.date >= first, m.date <= last)
                .group_by(m.asset_a, m.asset_b).order_by(m.asset_a, m.asset_b))
        with self.engine.connect() as conn:
            frame = _frame(conn.execute(stmt).all(),
                           ["asset_a", "asset_b", "n_ends", f"n_{a}", f"n_{b}"])
        for c in ("n_ends", f"n_{a}", f"n_{b}"):
            frame[c] = pd.to_numeric(frame[c]).fillna(0).astype(np.int64)
        return frame

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

        def covered(tail: str, conn: sa.Connection) -> sa.Select:
            r = state_runs.c
            runs = sa.select(r.asset_a, r.asset_b, r.first_date, r.last_date).where(
                r.settings == signals_settings_key, r.tail == tail, r.state == "alert")
            if after is not None:
                runs = runs.where(r.last_date > after)
            runs = runs.cte(f"alert_{tail}")
            if _materialises(conn):
                runs = runs.prefix_with("MATERIALIZED")
            return (sa.select(m.date, m.asset_a, m.asset_b)
                    .select_from(runs.join(metrics, sa.and_(
                        m.asset_a == runs.c.asset_a, m.asset_b == runs.c.asset_b,
                        m.date >= runs.c.first_date, m.date <= runs.c.last_date)))
                    .where(*base))

        def per_date(rows: sa.Select) -> sa.Select:
            sub = rows.subquery()
            return sa.select(sub.c.date, sa.func.count()).group_by(sub.c.date)

        names = ["date", "n_pairs", *(c.name for c in sums)]
        with self.engine.connect() as conn:
            frame = _frame(conn.execute(fresh).all(), names)
            counts = {}
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
        days = sa.select(m.date).where(*scope).distinct().subquery()
        cal = sa.select(days.c.date, sa.func.lead(days.c.date).over(
            order_by=days.c.date).label("cal_next")).subquery()
        rows = sa.select(m.asset_a, m.asset_b, m.date, *[m[c] for c in UNIVERSE_MEANS],
                         sa.func.lead(m.date).over(partition_by=(m.asset_a, m.asset_b),
                                                   order_by=m.date).label("pair_next")
                         ).where(*scope).subquery()
        gaps = (sa.select(rows).join(cal, rows.c.date == cal.c.date)
                .where(cal.c.cal_next.is_not(None),
                       sa.or_(rows.c.pair_next.is_(None), rows.c.pair_next > cal.c.cal_next)))
        cols = ["asset_a", "asset_b", "date", *UNIVERSE_MEANS, "pair_next"]
        gap = _frame(conn.execute(gaps).all(), cols)
        if gap.empty:
            return pd.DataFrame()
        r = state_runs.c
        runs = _frame(conn.execute(sa.select(r.asset_a, r.asset_b, r.tail, r.first_date,
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

    def latest_window_end(self, settings_key: str) -> dt.date | None:
        """The latest stored window end of any pair under a rolling settings key."""
        with self.engine.connect() as conn:
            return conn.execute(sa.select(sa.func.max(pair_state.c.last_date)).where(
                pair_state.c.settings == settings_key)).scalar_one_or_none()

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
        for day, r in zip(_dates(summary.index), summary.to_dict("records"), strict=True):
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
        frame = _frame(rows, ["date", *UNIVERSE_COUNTS, *UNIVERSE_MEANS])
        frame.index = pd.DatetimeIndex(pd.to_datetime(frame.pop("date")), name="date")
        for c in UNIVERSE_COUNTS:
            # n_carried is NULL in rows of an older comove (which carried nothing): 0.
            frame[c] = pd.to_numeric(frame[c]).fillna(0).astype(np.int64)
        for c in UNIVERSE_MEANS:
            frame[c] = pd.to_numeric(frame[c]).astype(float)
        frame.insert(3, "share_alert", frame["n_alert"] / frame["n_pairs"])
        return frame

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
        with self.engine.connect() as conn:
            return [tuple(r) for r in conn.execute(
                sa.select(metrics.c.asset_a, metrics.c.asset_b).where(
                    metrics.c.settings == settings_key).distinct())]

    def residual_assets(self, settings_key: str) -> list[str]:
        """Assets with stored residuals under a marginal settings key, sorted."""
        with self.engine.connect() as conn:
            return sorted(conn.execute(sa.select(residuals.c.asset).where(
                residuals.c.settings == settings_key).distinct()).scalars())

    def read_residuals(self, settings_key: str, assets: Iterable[str] | None = None,
                       since: dt.date | None = None) -> pd.DataFrame:
        """Stored standardised residuals as a wide frame (date x asset), dated ``since`` or
        later when given."""
        stmt = sa.select(residuals.c.asset, _raw(residuals.c.date), residuals.c.value).where(
            residuals.c.settings == settings_key)
        if since is not None:
            stmt = stmt.where(residuals.c.date >= since)
        if assets is not None:
            stmt = stmt.where(residuals.c.asset.in_(list(assets)))
        with self.engine.connect() as conn:
            rows = conn.execute(stmt.order_by(residuals.c.date)).all()
        frame = _frame(rows, ["asset", "date", "value"])
        frame["date"] = pd.to_datetime(frame["date"])
        wide = frame.pivot(index="date", columns="asset", values="value")
        wide.columns = [str(c) for c in wide.columns]
        wide.columns.name = None
        return wide


def _add_missing_columns(conn: sa.Connection, inspector, tables: list[sa.Table]) -> list[str]:
    """Add the nullable columns a newer comove defines to the tables of an older store (the
    schema version stays: the change is additive). Rows stored before read NULL there.

    Returns the ``table.column`` names added. ``ALTER TABLE ... ADD COLUMN`` of a nullable
    column without default is the same statement on SQLite and PostgreSQL and rewrites no
    rows on either.
    """
    quote = conn.dialect.identifier_preparer.quote
    added = []
    for table in tables:
        have = {c["name"] for c in inspector.get_columns(table.name)}
        for col in table.columns:
            if col.name in have:
                continue
            if not col.nullable:
                raise InputError(f"store: table {table.name} lacks column {col.name}, which "
                                 "this comove cannot add to an existing store")
            kind = col.type.compile(dialect=conn.dialect)
            conn.execute(sa.text(f"ALTER TABLE {quote(table.name)} "
                                 f"ADD COLUMN {quote(col.name)} {kind}"))
            added.append(f"{table.name}.{col.name}")
    return added


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


def _materialises(conn: sa.Connection) -> bool:
    """Whether the database takes ``WITH name AS MATERIALIZED (...)``."""
    dialect = conn.dialect
    if dialect.name == "sqlite":
        import sqlite3

        return sqlite3.sqlite_version_info >= (3, 35)
    if dialect.name == "postgresql":
        return (dialect.server_version_info or (0,)) >= (12,)
    return False


def checksum_bytes(data: bytes) -> str:
    import hashlib

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
