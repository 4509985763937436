"""The store's schema: its tables, the schema version and the additive migration.

The schema is versioned in ``schema_info``; :func:`open_schema` creates it in a new store,
refuses a store written by a newer comove and adds what an older one lacks (tables, and
nullable columns: the change is additive, the version stays).

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
    # Running counts over the pair's window ends up to and including this one: of those
    # with both model-averaged tails computed, and of those, with the lower / upper one at
    # least HEAVY_TAIL_LEVEL (monitor.data.store_metrics). A year's count is the difference
    # of two rows. NULL in rows of an older store until the next update recounts them.
    *[sa.Column(name, sa.Integer) for name in (
        "run_averaged", "run_heavy_lower", "run_heavy_upper")],
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
    sa.Column("state", sa.String(8), nullable=False),  # pending, sending, sent, failed
    sa.Column("attempts", sa.Integer, nullable=False),
    sa.Column("last_error", sa.Text),
    sa.Column("created", sa.DateTime, nullable=False),
    sa.Column("next_attempt", sa.DateTime, nullable=False),
    sa.Column("sent_at", sa.DateTime),
    sa.Column("sent_as", sa.String(128)),  # the Message-ID it went out under (digests)
    # the sender holding a message while it is being sent (state "sending"), and since when
    sa.Column("claimed_by", sa.String(64)),
    sa.Column("claimed_at", sa.DateTime),
)


def open_schema(conn: sa.Connection, shown_url: str, create: bool) -> None:
    """Check the schema of the store on ``conn``, creating or completing it.

    Parameters
    ----------
    conn : Connection
        A transaction on the store.
    shown_url : str
        The store's URL as messages show it (password hidden).
    create : bool
        Create the schema of a new store and the tables an older one lacks; with False a
        store without a schema is refused.

    Raises
    ------
    InputError
        No schema (with ``create`` False), a newer schema version, or a missing column that
        cannot be added.
    """
    inspector = sa.inspect(conn)
    if not inspector.has_table("schema_info"):
        if not create:
            raise InputError(f"store {shown_url}: not a comove store (no schema)")
        metadata.create_all(conn)
        conn.execute(schema_info.insert().values(key="version", value=str(SCHEMA_VERSION)))
        return
    row = conn.execute(sa.select(schema_info.c.value).where(
        schema_info.c.key == "version")).scalar_one_or_none()
    version = int(row) if row is not None else 0
    if version > SCHEMA_VERSION:
        raise InputError(f"store {shown_url}: schema version {version} is newer than "
                         f"this comove understands ({SCHEMA_VERSION}); upgrade comove")
    missing = [t for t in metadata.sorted_tables if not inspector.has_table(t.name)]
    if missing and create:
        metadata.create_all(conn, tables=missing)
    _add_missing_columns(conn, inspector, [t for t in metadata.sorted_tables
                                           if t not in missing])


def _add_missing_columns(conn: sa.Connection, inspector: sa.Inspector, tables: list[sa.Table]
                         ) -> list[str]:
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
