"""Reading series files: CSV or Parquet, wide or long, checked cell by cell.

A *wide* file has a ``date`` column and one column per asset; a *long* file has exactly the
columns ``date, asset, value``. Column names are matched case-insensitively for ``date``,
``asset`` and ``value``. An empty cell means the asset has no value on that date (holidays
and gaps are normal); anything else that is not a finite number refuses the whole file with
an :class:`~monitor.errors.InputError` naming file, line, date and column.
"""

from __future__ import annotations

import csv
import io
import re
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import InputError

_PARQUET_MAGIC = b"PAR1"


def _where(i: int, lines: np.ndarray | None) -> str:
    """Where data row ``i`` (0-based) sits: its file line in a CSV, its row number otherwise."""
    return f"line {int(lines[i])}" if lines is not None else f"row {i + 1}"


def _show(cell: object, limit: int = 40) -> str:
    """A cell quoted for a one-line message, cut short so a runaway cell stays readable."""
    text = str(cell)
    return repr(text if len(text) <= limit else text[:limit - 3] + "...")


def _parse_dates(raw: pd.Series, path: str, lines: np.ndarray | None) -> pd.DatetimeIndex:
    if pd.api.types.is_datetime64_any_dtype(raw):
        dates = pd.DatetimeIndex(raw)
        bad = np.flatnonzero(dates.isna())
        if bad.size:
            raise InputError(f"{path}: {_where(int(bad[0]), lines)}: the date is missing")
    else:
        text = raw.astype("string").str.strip()
        try:
            parsed = pd.to_datetime(text, format="ISO8601", errors="coerce")
        except ValueError:
            # errors="coerce" does not cover dates that mix time zones (or a zone and none).
            raise InputError(f"{path}: the dates mix time zones; give plain YYYY-MM-DD "
                             "dates") from None
        dates = pd.DatetimeIndex(parsed)
        bad = np.flatnonzero(dates.isna())
        if bad.size:
            i = int(bad[0])
            raise InputError(f"{path}: {_where(i, lines)}: cannot read date "
                             f"{_show(raw.iloc[i])} (expected YYYY-MM-DD)")
    if dates.tz is not None:
        dates = dates.tz_localize(None)
    return dates.normalize()


def _parse_numbers(raw: pd.Series, path: str, column: str, dates: pd.DatetimeIndex,
                   lines: np.ndarray | None) -> np.ndarray:
    """Numbers of one column; empty cells become NaN (= no value on that date)."""
    if pd.api.types.is_numeric_dtype(raw) and not pd.api.types.is_bool_dtype(raw):
        values = raw.to_numpy(dtype=float, na_value=np.nan)
        text_bad = np.zeros(values.size, dtype=bool)
        nonfinite = np.isinf(values)
    else:
        text = raw.astype("string").str.strip().fillna("")
        empty = (text == "").to_numpy()
        values = pd.to_numeric(text.where(~empty, None), errors="coerce").to_numpy(
            dtype=float, na_value=np.nan)
        text_bad = np.isnan(values) & ~empty
        # "nan" and "inf" parse as numbers; they are not data.
        lowered = text.str.lower()
        text_bad |= lowered.isin(["nan", "+nan", "-nan"]).to_numpy()
        nonfinite = np.isinf(values)
    bad = np.flatnonzero(text_bad | nonfinite)
    if bad.size:
        i = int(bad[0])
        raise InputError(f"{path}: {_where(i, lines)} ({dates[i].date()}), column {column!r}: "
                         f"{_show(raw.iloc[i])} is not a finite number")
    return values


def _read_csv(path: Path, data: bytes) -> tuple[pd.DataFrame, np.ndarray]:
    """Cells of a CSV file as text, with the file line of every data row.

    The csv module rather than pandas' reader, because pandas renames a repeated header name
    (``A``, ``A.1``) where it must be refused, pads a short row with empty cells, turns a row
    with one extra field into an index, and skips blank lines so that its row numbers stop
    being file lines. Reading is I/O bound, so the loop over rows is not a hot path.
    """
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[:exc.start].count(b"\n") + 1
        raise InputError(f"{path}: line {line}: not UTF-8 text, expected CSV or "
                         "Parquet") from None
    reader = csv.reader(io.StringIO(text, newline=""), skipinitialspace=True, strict=True)
    header: list[str] | None = None
    rows: list[list[str]] = []
    lines: list[int] = []
    end = 0
    try:
        for row in reader:
            first, end = end + 1, reader.line_num
            if not any(cell.strip() for cell in row):
                continue  # a blank line (or only separators) holds no data to lose
            if header is None:
                header = row
                continue
            if len(row) != len(header):
                raise InputError(f"{path}: line {first}: {len(row)} fields where the header "
                                 f"has {len(header)}")
            rows.append(row)
            lines.append(first)
    except csv.Error as exc:
        raise InputError(f"{path}: line {end + 1}: not a readable CSV row ({exc})") from None
    if header is None:
        raise InputError(f"{path}: file is empty")
    frame = pd.DataFrame(rows, columns=range(len(header)), dtype=object)
    frame.columns = header
    return frame, np.asarray(lines, dtype=int)


def _read_raw(path: Path) -> tuple[pd.DataFrame, np.ndarray | None]:
    """The file's cells and, for a CSV, the file line of each row (None for Parquet)."""
    if not path.exists():
        raise InputError(f"{path}: file not found")
    if not path.is_file():
        raise InputError(f"{path}: not a file")
    data = path.read_bytes()
    if not data:
        raise InputError(f"{path}: file is empty")
    if data.startswith(_PARQUET_MAGIC):
        try:
            frame = pd.read_parquet(path)
        except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file
            raise InputError(f"{path}: unreadable Parquet file ({type(exc).__name__})") from None
        if any(name is not None for name in frame.index.names):
            # A frame saved together with its date index comes back with it as the index.
            frame = frame.reset_index()
        return frame, None
    if b"\x00" in data:
        raise InputError(f"{path}: binary file, expected CSV or Parquet")
    return _read_csv(path, data)


def _check_header(names: list[str], path: Path) -> None:
    """Refuse a header with a nameless, repeated or second date column."""
    for k, name in enumerate(names):
        if not name or name.lower().startswith("unnamed:"):
            raise InputError(f"{path}: column {k + 1} has no name in the header")
    seen: dict[str, int] = {}
    for k, name in enumerate(names):
        key = name.lower() if name.lower() == "date" else name
        if key in seen:
            raise InputError(f"{path}: column name {name!r} appears twice in the header "
                             f"(columns {seen[key] + 1} and {k + 1})")
        seen[key] = k


def read_series(path: str | Path) -> pd.DataFrame:
    """Read a wide or long series file into a wide frame.

    Parameters
    ----------
    path : str or Path
        CSV or Parquet file.

    Returns
    -------
    DataFrame
        Index ``date`` (sorted, unique, normalised to midnight), one float column per asset;
        NaN where an asset has no value on a date.

    Raises
    ------
    InputError
        Missing, empty, binary or unreadable file; header only; a header column without a
        name or named twice; a row with more or fewer fields than the header; no date column;
        an unparseable date; text or a non-finite number in a value column; a duplicated date
        (or date and asset) with different values; a column with no values; a single row.
    """
    path = Path(path)
    frame, lines = _read_raw(path)
    return tidy_frame(frame, path, lines)


def tidy_frame(frame: pd.DataFrame, path: str | Path, lines: np.ndarray | None = None
               ) -> pd.DataFrame:
    """Check a raw table of cells (wide or long, as read from a file or a SQL query) and
    return the wide frame :func:`read_series` describes; ``path`` names the source in
    messages and ``lines`` gives each row's file line (None: rows are numbered from 1)."""
    if frame.shape[1] == 0:
        raise InputError(f"{path}: file is empty")
    if frame.shape[0] == 0:
        raise InputError(f"{path}: header only, no data rows")
    names = [str(c).strip() for c in frame.columns]
    _check_header(names, path)
    frame.columns = names
    lower = {n.lower(): n for n in names}
    if "date" not in lower:
        raise InputError(f"{path}: no 'date' column (columns: {', '.join(names)})")
    dates = _parse_dates(frame[lower["date"]], str(path), lines)
    long = set(lower) == {"date", "asset", "value"} and len(names) == 3
    if long:
        assets = frame[lower["asset"]].astype("string").str.strip().fillna("")
        blank = np.flatnonzero((assets == "").to_numpy())
        if blank.size:
            raise InputError(f"{path}: {_where(int(blank[0]), lines)}: empty asset name")
        values = _parse_numbers(frame[lower["value"]], str(path), "value", dates, lines)
        tidy = pd.DataFrame({"date": dates, "asset": assets.to_numpy(dtype=object),
                             "value": values})
        tidy = tidy.dropna(subset=["value"])
        dup = tidy.duplicated(["date", "asset"], keep=False)
        if dup.any():
            clash = tidy[dup].groupby(["date", "asset"])["value"].nunique()
            clash = clash[clash > 1]
            if len(clash):
                d, a = clash.index[0]
                raise InputError(f"{path}: date {d.date()} appears more than once for asset "
                                 f"{a!r} with different values")
            tidy = tidy.drop_duplicates(["date", "asset"])
        wide = tidy.pivot(index="date", columns="asset", values="value")
        wide.columns = [str(c) for c in wide.columns]
    else:
        cols = [c for c in names if c != lower["date"]]
        if not cols:
            raise InputError(f"{path}: no asset columns besides 'date'")
        data = {c: _parse_numbers(frame[c], str(path), c, dates, lines) for c in cols}
        wide = pd.DataFrame(data, index=dates)
        dup = wide.index.duplicated(keep=False)
        if dup.any():
            groups = wide[dup].groupby(level=0)
            differing = groups.nunique(dropna=False).max(axis=1) > 1
            if differing.any():
                d = differing[differing].index[0]
                raise InputError(f"{path}: date {d.date()} appears more than once with "
                                 "different values")
            wide = wide[~wide.index.duplicated(keep="first")]
    wide.index.name = "date"
    wide = wide.sort_index()
    empty = [c for c in wide.columns if wide[c].notna().sum() == 0]
    if empty:
        raise InputError(f"{path}: column {empty[0]!r} has no values")
    if len(wide) < 2:
        raise InputError(f"{path}: a single row; at least two dates are needed")
    return wide.astype(float)


def log_returns(prices: pd.DataFrame, source: str = "prices") -> pd.DataFrame:
    """Log returns ln(P_t / P_s) per asset, s the asset's previous date with a price.

    Parameters
    ----------
    prices : DataFrame
        Wide prices indexed by date (as :func:`read_series` returns); NaN where an asset has
        no price on a date.
    source : str
        Name of the data used in error messages (usually the file).

    Returns
    -------
    DataFrame
        Same columns; row t holds ln(P_t / P_s) for every asset priced on t and on an earlier
        date s (its previous price), NaN elsewhere. Each asset's first price gives no return.

    Raises
    ------
    InputError
        A zero, negative or non-finite price, naming its date and column.

    Notes
    -----
    Each asset keeps its own calendar: a missing price skips that date rather than breaking
    the series, so the return after a gap spans the gap.
    """
    out = {}
    for col in prices.columns:
        s = prices[col].dropna()
        bad = s[~(np.isfinite(s.to_numpy()) & (s.to_numpy() > 0))]
        if len(bad):
            raise InputError(f"{source}: price {float(bad.iloc[0])!r} on {bad.index[0].date()} "
                             f"in column {col!r} is not a positive finite number")
        out[col] = np.log(s).diff().iloc[1:]
    result = pd.DataFrame(out).reindex(columns=prices.columns)
    result.index.name = "date"
    return result


def _read_only(conn) -> None:
    """Make the source connection refuse writes where the backend can: reading a source must
    never change it, whatever the query says (the connection is never committed either, but
    SQLite's Python driver runs DDL such as DROP TABLE outside any transaction)."""
    if conn.dialect.name == "sqlite":
        conn.exec_driver_sql("PRAGMA query_only = ON")
    elif conn.dialect.name == "postgresql":
        conn.exec_driver_sql("SET TRANSACTION READ ONLY")


def _database_message(exc: BaseException) -> str:
    """The first line of the database's own message (pandas wraps the driver's error)."""
    while isinstance(exc, pd.errors.DatabaseError) and exc.__cause__ is not None:
        exc = exc.__cause__
    orig = getattr(exc, "orig", None)
    text = str(orig if orig is not None else exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def read_sql_source(url: str, *, query: str | None = None, table: str | None = None
                    ) -> pd.DataFrame:
    """Read series from a SQL source: a whole table or a query, wide or long.

    Parameters
    ----------
    url : str
        SQLAlchemy URL of the source database.
    query : str, optional
        A SELECT statement returning ``date`` plus asset columns, or ``date, asset, value``.
    table : str, optional
        A table name (quoted as an identifier, never pasted into SQL); exactly one of
        ``query`` and ``table``.

    Returns
    -------
    DataFrame
        As :func:`read_series`.
    """
    import sqlalchemy as sa

    if (query is None) == (table is None):
        raise InputError("a SQL source needs exactly one of a query and a table")
    try:
        shown = sa.engine.make_url(url).render_as_string(hide_password=True)
    except sa.exc.ArgumentError:
        raise InputError(f"SQL source: {url!r} is not a database URL") from None
    name = f"{shown} ({'table ' + repr(table) if table else 'query ' + _show(query, 80)})"
    if table:
        stmt = sa.select(sa.text("*")).select_from(sa.table(table))
    else:
        # The query runs as written: text() would read ':word' (say inside a string literal)
        # as a bind parameter, so every such colon is escaped with its own pattern.
        stmt = sa.text(re.sub(r"(?<![:\w\\]):(\w+)(?!:)", r"\\:\1", query))
    engine = None
    try:
        engine = sa.create_engine(url)
        with engine.connect() as conn:
            _read_only(conn)
            frame = pd.read_sql(stmt, conn)
    except (sa.exc.SQLAlchemyError, pd.errors.DatabaseError) as exc:
        raise InputError(f"{name}: {_database_message(exc)}") from None
    except ModuleNotFoundError as exc:
        raise InputError(f"{name}: database driver missing ({exc.name})") from None
    finally:
        if engine is not None:
            engine.dispose()
    return tidy_frame(frame, name)
