"""Ingest: validated price or return tables into the store, all or nothing.

A file (or SQL source) is read and checked in full before the store is touched
(:mod:`monitor.data.tables`); an invocation's sources are then written in **one** transaction, so
a refusal anywhere leaves the store exactly as it was. Values that differ from stored values
for the same asset and date are refused unless revisions are accepted, in which case the old
values go to the ``revisions`` audit table and results derived from them are dropped for
recomputation. Sources that add nothing (the same file again) write nothing.

A file of a single day (one row wide, or one date long) is what the daily job feeds: its
prices are accepted whenever the store already holds an earlier price of each asset (a
return needs the previous close), and refused whole, naming the asset and the date, when
some asset has none. A source of several days goes through the same checks.
"""

from __future__ import annotations

import datetime as dt
import glob
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from monitor.common.errors import InputError
from monitor.data.store import (
    Store,
    as_tidy,
    checksum_bytes,
    frame_checksum,
    prices,
    returns,
    values_differ,
)
from monitor.data.store_base import utc_now
from monitor.data.tables import (
    DEFAULT_LIMITS,
    Limits,
    ReadOptions,
    check_returns,
    log_returns,
    read_sql_source,
    read_table,
)

KINDS = ("prices", "returns")


@dataclass(frozen=True, slots=True)
class Source:
    """One validated input: its name, checksum, kind and wide frame; the limits it was read
    within, whether implausible returns are stored anyway (``--accept-outliers``), the date of
    a last line without a line ending, and the outliers and notes found so far."""

    name: str
    checksum: str
    kind: str
    frame: pd.DataFrame = field(repr=False)
    limits: Limits = DEFAULT_LIMITS
    accept_outliers: bool = False
    open_end: pd.Timestamp | None = None
    outliers: tuple[tuple[pd.Timestamp, str, float], ...] = ()
    notes: tuple[str, ...] = ()
    #: Accept values that differ from stored ones for this source alone (a ``[[sources]]``
    #: entry's ``accept_revisions``).
    accept_revisions: bool = False


def _checked(name: str, checksum: str, kind: str, frame: pd.DataFrame, limits: Limits,
             accept: bool, open_end: pd.Timestamp | None = None) -> Source:
    """A Source whose in-file returns (derived from prices, or given) passed
    :func:`~monitor.data.tables.check_returns`."""
    if kind == "prices":
        rets = log_returns(frame, name)  # refuses zero, negative and non-finite prices
        what = "log return implied by the prices"
    else:
        rets, what = frame, "log return"
    found = check_returns(rets, name, limits, accept=accept, open_end=open_end, what=what)
    notes: tuple[str, ...] = ()
    if open_end is not None:
        note = (f"the file did not end with a line ending; its last line ({open_end.date()}) "
                "passed the plausibility checks")
        notes = (note,)
    return Source(name, checksum, kind, frame, limits, accept, open_end, tuple(found), notes)


@dataclass(frozen=True, slots=True)
class Coverage:
    """Gaps of a wide frame: per asset, the dates of the frame's calendar (inside the asset's
    own first..last range) where it has no value; per pair, the dates where only one of the two
    has a value, inside their common range."""

    missing: dict[str, int]
    lost: dict[tuple[str, str], int]

    def lines(self, top: int = 5) -> list[str]:
        out = []
        gaps = {a: m for a, m in self.missing.items() if m}
        if gaps:
            out.append("  dates missing per asset (holidays and gaps are kept as such): "
                       + ", ".join(f"{a} {m}" for a, m in sorted(gaps.items())))
        worst = sorted(((v, k) for k, v in self.lost.items() if v), reverse=True)[:top]
        if worst:
            out.append(f"  dates lost per pair (only one side has a value), largest {len(worst)}"
                       f" of {len(self.lost)} pairs: "
                       + ", ".join(f"{a}/{b} {v}" for v, (a, b) in worst))
        return out


def coverage(wide: pd.DataFrame) -> Coverage:
    """Per-asset missing dates and per-pair lost dates of a wide frame (see :class:`Coverage`)."""
    have = wide.notna().to_numpy()
    index = np.arange(len(wide))
    first = np.array([index[h].min() if h.any() else 0 for h in have.T])
    last = np.array([index[h].max() if h.any() else -1 for h in have.T])
    inside = (index[:, None] >= first[None, :]) & (index[:, None] <= last[None, :])
    cols = [str(c) for c in wide.columns]
    missing = {c: int(np.sum(inside[:, j] & ~have[:, j])) for j, c in enumerate(cols)}
    lost = {}
    for i in range(len(cols)):
        for j in range(i + 1, len(cols)):
            both_range = inside[:, i] & inside[:, j]
            lost[(cols[i], cols[j])] = int(np.sum(both_range & (have[:, i] ^ have[:, j])))
    return Coverage(missing, lost)


@dataclass(frozen=True, slots=True)
class IngestReport:
    """What an ingest did, for the terminal and the tests."""

    source: str
    kind: str
    outcome: str
    rows: int
    assets: tuple[str, ...]
    first_date: dt.date | None
    last_date: dt.date | None
    new_values: int
    revised_values: int
    coverage: Coverage
    ingest_id: int | None
    notes: tuple[str, ...] = ()

    def lines(self) -> list[str]:
        head = {
            "stored": f"{self.source}: stored {self.new_values} new value(s)"
                      + (f" and {self.revised_values} revision(s)" if self.revised_values else "")
                      + f" ({self.kind}) for {len(self.assets)} asset(s), "
                        f"{self.first_date} to {self.last_date}",
            "unchanged": f"{self.source}: nothing new ({self.rows} rows already stored); "
                         "the store is unchanged",
        }[self.outcome]
        return [head, *self.coverage.lines(), *(f"  note: {n}" for n in self.notes)]


def read_file_source(path: str | Path, kind: str, options: ReadOptions | None = None,
                     limits: Limits | None = None, *, accept_outliers: bool = False) -> Source:
    """Read and fully validate one file (nothing is stored yet).

    ``options`` as in :func:`monitor.data.tables.read_series`; ``limits`` as in
    :func:`monitor.data.tables.read_table`; ``accept_outliers`` stores returns beyond
    ``limits.max_abs_log_return`` instead of refusing the file (they are recorded with the
    ingest), except on a last line without a line ending.
    """
    if kind not in KINDS:
        raise InputError(f"--kind must be prices or returns, got {kind!r}")
    path = Path(path)
    limits = limits or DEFAULT_LIMITS
    table = read_table(path, options, limits)
    return _checked(str(path), checksum_bytes(path.read_bytes()), kind, table.frame, limits,
                    accept_outliers, table.open_end)


def read_sql_table_source(url: str, kind: str, *, query: str | None = None,
                          table: str | None = None, limits: Limits | None = None,
                          accept_outliers: bool = False) -> Source:
    """Read and validate a SQL source (nothing is stored yet); ``limits`` and
    ``accept_outliers`` as in :func:`read_file_source`."""
    if kind not in KINDS:
        raise InputError(f"--kind must be prices or returns, got {kind!r}")
    limits = limits or DEFAULT_LIMITS
    frame = read_sql_source(url, query=query, table=table, limits=limits)
    return _checked(f"sql {table or 'query'}", frame_checksum(frame), kind, frame, limits,
                    accept_outliers)


def expand_paths(pattern: str) -> list[str]:
    """A path, or the sorted matches of a glob pattern (a pattern matching nothing is an
    error naming it)."""
    if any(ch in pattern for ch in "*?["):
        matches = sorted(glob.glob(pattern, recursive=True))
        if not matches:
            raise InputError(f"source {pattern!r}: no file matches")
        return matches
    return [pattern]


def ingest_sources(store: Store, sources: list[Source], *, accept_revisions: bool = False
                   ) -> list[IngestReport]:
    """Store validated sources in one transaction (all or nothing).

    Parameters
    ----------
    store : Store
    sources : list of Source
        From :func:`read_file_source` / :func:`read_sql_table_source`.
    accept_revisions : bool
        Replace stored values that differ (the old ones go to the audit table); otherwise
        such a difference refuses the whole invocation.

    Returns
    -------
    list of IngestReport
    """
    reports = []
    with store.transaction() as conn:
        for src in sources:
            reports.append(_ingest_one(store, conn, src,
                                       accept_revisions or src.accept_revisions))
    return reports


def _compare(stored: pd.DataFrame, incoming: pd.DataFrame):
    """Split incoming (asset, date, value) rows into new ones and ones that differ."""
    merged = incoming.merge(stored, on=["asset", "date"], how="left", suffixes=("", "_old"))
    is_new = merged["value_old"].isna().to_numpy()
    old = merged["value_old"].to_numpy(dtype=float)
    differ = ~is_new & values_differ(np.nan_to_num(old), merged["value"].to_numpy(dtype=float))
    new_rows = merged.loc[is_new, ["asset", "date", "value"]]
    changed = merged.loc[differ, ["asset", "date", "value", "value_old"]].rename(
        columns={"value": "new", "value_old": "old"})
    return new_rows, changed


def _refuse_revision(src: Source, changed: pd.DataFrame, what: str) -> None:
    first = changed.sort_values(["date", "asset"]).iloc[0]
    raise InputError(
        f"{src.name}: {first['date'].date()}, column {first['asset']!r}: {what} "
        f"{float(first['new'])!r} differs from the stored {float(first['old'])!r} "
        f"({len(changed)} value(s) differ; pass --accept-revisions to replace them, "
        "keeping the old values in the audit table)")


def _ingest_one(store: Store, conn, src: Source, accept: bool) -> IngestReport:
    started = utc_now()
    wide = src.frame
    assets = [str(c) for c in wide.columns]
    tidy = as_tidy(wide)
    cov = coverage(wide)
    first, last = wide.index.min().date(), wide.index.max().date()

    notes = list(src.notes)

    def report(outcome, new=0, revised=0, ingest_id=None):
        return IngestReport(src.name, src.kind, outcome, len(wide), tuple(assets), first, last,
                            new, revised, cov, ingest_id, tuple(notes))

    table = prices if src.kind == "prices" else returns
    stored = store.stored_values(conn, table, assets)
    new_rows, changed = _compare(stored, tidy)
    if src.kind == "prices":
        _refuse_lone_prices(src, tidy, stored, new_rows)
    if len(changed) and not accept:
        _refuse_revision(src, changed, "price" if src.kind == "prices" else "return")
    if new_rows.empty and changed.empty:
        return report("unchanged")
    upserts = pd.concat([new_rows, changed.rename(columns={"new": "value"})[
        ["asset", "date", "value"]]])
    derived = None
    outliers = set(src.outliers)
    if src.kind == "prices":
        touched = upserts.groupby("asset")["date"].min()
        derived = _derive_returns(store, conn, src, touched, accept, upserts)
        outliers |= set(derived[2])
    if outliers:
        shown = ", ".join(f"{a} {d.date()} {v:.4g}" for d, a, v in sorted(outliers)[:5])
        notes.append(f"{len(outliers)} implausible return(s) stored with --accept-outliers "
                     f"(|r| > {src.limits.max_abs_log_return:g}): {shown}")
    ingest_id = store.insert_ingest(
        conn, source=src.name, checksum=src.checksum, kind=src.kind, rows=len(wide),
        assets=json.dumps(assets), first_date=first, last_date=last,
        new_values=len(new_rows), revised_values=len(changed), started_at=started,
        outcome="stored", summary="; ".join([*cov.lines(), *notes]) or "no gaps")
    if derived is not None:
        store.upsert_values(conn, prices, upserts, {"ingest_id": ingest_id})
        store.record_revisions(conn, ingest_id, "prices", changed)
        derived_new, derived_changed, _ = derived
        store.upsert_values(conn, returns, derived_new, {"origin": "prices",
                                                         "ingest_id": ingest_id})
        store.upsert_values(conn, returns, derived_changed.rename(columns={"new": "value"}),
                            {"origin": "prices", "ingest_id": ingest_id})
        store.record_revisions(conn, ingest_id, "returns", derived_changed)
        revised_returns = derived_changed
    else:
        store.upsert_values(conn, returns, upserts, {"origin": "returns",
                                                     "ingest_id": ingest_id})
        store.record_revisions(conn, ingest_id, "returns", changed)
        revised_returns = changed
    for asset, day in revised_returns.groupby("asset")["date"].min().items():
        store.invalidate_from(conn, asset, pd.Timestamp(day).date())
    return report("stored", len(new_rows), len(changed), ingest_id)


def _refuse_lone_prices(src: Source, tidy: pd.DataFrame, stored: pd.DataFrame,
                        new_rows: pd.DataFrame) -> None:
    """Refuse a source in which a new price of some asset can give no return: the asset's only
    price in the source, with no earlier price of it stored (a new asset in a one-day file).

    Notes
    -----
    A log return ln(P_t / P_s) needs the asset's previous price P_s: in the source, or
    stored. A price already stored with the same value changes nothing and is not checked
    (the same day's file again is idempotent).
    """
    if new_rows.empty:
        return
    counts = tidy.groupby("asset")["date"].agg(["count", "min"])
    lone = counts[counts["count"] == 1]
    lone = lone[lone.index.isin(new_rows["asset"].unique())]
    if lone.empty:
        return
    earliest = stored.groupby("asset")["date"].min()
    for asset, row in lone.sort_values("min").iterrows():
        before = earliest.get(asset)
        if before is None or before >= row["min"]:
            when = "" if before is None else f" before {pd.Timestamp(before).date()}"
            days = "a one-day file" if src.frame.shape[0] == 1 else "the file"
            raise InputError(
                f"{src.name}: {row['min'].date()}, column {asset!r}: the store holds no earlier "
                f"price of {asset!r}{when}, so this price gives no return ({days} of closes "
                "needs each asset's previous close); a new asset needs a history file first")


def _derive_returns(store: Store, conn, src: Source, touched: pd.Series, accept: bool,
                    upserts: pd.DataFrame):
    """Log returns implied by the stored prices with this source's ``upserts`` (not written
    yet) of the touched assets, from the first touched date on: (new rows, differing rows,
    the implausible ones stored with ``--accept-outliers``). A return against the previous
    stored close is checked as the source's own are (a one-day file's only returns)."""
    assets = list(touched.index)
    first = pd.Timestamp(touched.min()).date()
    # Only the prices the touched returns need: a daily append reads a few days, not the
    # whole history (each return uses its asset's previous price, however far back).
    stored_prices = store.read_prices(assets, conn, since=store.last_price_date_before(
        conn, assets, first) or first)
    incoming = upserts.pivot(index="date", columns="asset", values="value")
    stored_prices = incoming.combine_first(stored_prices).sort_index()
    rets = log_returns(stored_prices, src.name)
    tidy = as_tidy(rets)
    since = tidy["asset"].map(touched)
    # The return on the first touched date uses the price before it, so it is included.
    tidy = tidy[tidy["date"] >= since]
    new_rows, changed = _compare(store.stored_values(conn, returns, assets, since=first), tidy)
    if len(changed) and not accept:
        _refuse_revision(src, changed, "the log return implied by the prices,")
    fresh = pd.concat([new_rows, changed.rename(columns={"new": "value"})[
        ["asset", "date", "value"]]])
    found = check_returns(fresh.pivot(index="date", columns="asset", values="value"),
                          src.name, src.limits, accept=src.accept_outliers,
                          open_end=src.open_end, what="log return implied by the prices")
    return new_rows, changed, found
