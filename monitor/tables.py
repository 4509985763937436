"""Reading series files: CSV or Parquet, wide or long, checked cell by cell.

A *wide* file has a ``date`` column and one column per asset; a *long* file has exactly the
columns ``date, asset, value``. Column names are matched case-insensitively for ``date``,
``asset`` and ``value``. An empty cell means the asset has no value on that date (holidays
and gaps are normal); anything else that is not a finite number refuses the whole file with
an :class:`~monitor.errors.InputError` naming file, line, date and column.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from .errors import InputError

_PARQUET_MAGIC = b"PAR1"


def _line(i: int) -> int:
    """File line of data row ``i`` (0-based) in a CSV with one header line."""
    return i + 2


def _parse_dates(raw: pd.Series, path: str, is_csv: bool) -> pd.DatetimeIndex:
    if pd.api.types.is_datetime64_any_dtype(raw):
        dates = pd.DatetimeIndex(raw)
    else:
        text = raw.astype("string").str.strip()
        dates = pd.DatetimeIndex(pd.to_datetime(text, format="ISO8601", errors="coerce"))
        bad = np.flatnonzero(dates.isna())
        if bad.size:
            i = int(bad[0])
            where = f"line {_line(i)}" if is_csv else f"row {i + 1}"
            raise InputError(f"{path}: {where}: cannot read date {str(raw.iloc[i])!r} "
                             "(expected YYYY-MM-DD)")
    if dates.tz is not None:
        dates = dates.tz_localize(None)
    return dates.normalize()


def _parse_numbers(raw: pd.Series, path: str, column: str, dates: pd.DatetimeIndex,
                   is_csv: bool) -> np.ndarray:
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
        where = f"line {_line(i)}" if is_csv else f"row {i + 1}"
        raise InputError(f"{path}: {where} ({dates[i].date()}), column {column!r}: "
                         f"{str(raw.iloc[i])!r} is not a finite number")
    return values


def _read_raw(path: Path) -> tuple[pd.DataFrame, bool]:
    if not path.exists():
        raise InputError(f"{path}: file not found")
    if not path.is_file():
        raise InputError(f"{path}: not a file")
    with path.open("rb") as fh:
        head = fh.read(8192)
    if not head:
        raise InputError(f"{path}: file is empty")
    if head.startswith(_PARQUET_MAGIC):
        try:
            return pd.read_parquet(path), False
        except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file
            raise InputError(f"{path}: unreadable Parquet file ({type(exc).__name__})") from None
    if b"\x00" in head:
        raise InputError(f"{path}: binary file, expected CSV or Parquet")
    try:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True,
                            encoding="utf-8")
    except pd.errors.EmptyDataError:
        raise InputError(f"{path}: file is empty") from None
    except UnicodeDecodeError:
        raise InputError(f"{path}: not UTF-8 text, expected CSV or Parquet") from None
    except pd.errors.ParserError as exc:
        raise InputError(f"{path}: not a readable CSV file ({str(exc).splitlines()[0]})") from None
    return frame, True


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
        Missing, empty, binary or unreadable file; header only; no date column; an unparseable
        date; text or a non-finite number in a value column; a duplicated date (or date and
        asset) with different values; a column with no values; a single row.
    """
    path = Path(path)
    frame, is_csv = _read_raw(path)
    if frame.shape[1] == 0:
        raise InputError(f"{path}: file is empty")
    if frame.shape[0] == 0:
        raise InputError(f"{path}: header only, no data rows")
    lower = {str(c).strip().lower(): c for c in frame.columns}
    if "date" not in lower:
        raise InputError(f"{path}: no 'date' column (columns: "
                         f"{', '.join(map(str, frame.columns))})")
    dates = _parse_dates(frame[lower["date"]], str(path), is_csv)
    long = set(lower) == {"date", "asset", "value"}
    if long:
        assets = frame[lower["asset"]].astype("string").str.strip().fillna("")
        blank = np.flatnonzero((assets == "").to_numpy())
        if blank.size:
            raise InputError(f"{path}: line {_line(int(blank[0]))}: empty asset name")
        values = _parse_numbers(frame[lower["value"]], str(path), "value", dates, is_csv)
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
        cols = [c for c in frame.columns if c != lower["date"]]
        if not cols:
            raise InputError(f"{path}: no asset columns besides 'date'")
        names = [str(c).strip() for c in cols]
        if any(not n or n.lower().startswith("unnamed:") for n in names):
            raise InputError(f"{path}: a column has no name in the header")
        if len(set(names)) != len(names):
            raise InputError(f"{path}: a column name appears twice in the header")
        data = {name: _parse_numbers(frame[c], str(path), name, dates, is_csv)
                for name, c in zip(names, cols, strict=True)}
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

    Each asset keeps its own calendar: a missing price skips that date rather than breaking
    the series. Zero, negative or non-finite prices are refused naming date and column.
    """
    out = {}
    for col in prices.columns:
        s = prices[col].dropna()
        bad = s[~(np.isfinite(s.to_numpy()) & (s.to_numpy() > 0))]
        if len(bad):
            raise InputError(f"{source}: price {bad.iloc[0]!r} on {bad.index[0].date()} in "
                             f"column {col!r} is not positive")
        out[col] = np.log(s).diff().iloc[1:]
    result = pd.DataFrame(out).reindex(columns=prices.columns)
    result.index.name = "date"
    return result
