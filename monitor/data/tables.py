"""Reading series files: CSV or Parquet, wide or long, checked cell by cell.

A *wide* file has a ``date`` column and one column per asset; a *long* file has exactly the
columns ``date, asset, value``. Column names are matched case-insensitively for ``date``,
``asset`` and ``value``. An empty cell means the asset has no value on that date (holidays
and gaps are normal); anything else that is not a finite number refuses the whole file with
an :class:`~monitor.common.errors.InputError` naming file, line, date and column.

Files as spreadsheets and terminals export them are read with :class:`ReadOptions`: another
field separator, a decimal comma, a thousands separator, a date layout other than ISO 8601,
and the names of a long file's date, asset and value columns. Nothing is guessed: a file that
looks like one of these is refused with a message naming the option that reads it (a
day-first date such as 03/04/2020 is ambiguous until a date format is given).
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from monitor.common.errors import InputError

if TYPE_CHECKING:
    import sqlalchemy as sa

_PARQUET_MAGIC = b"PAR1"
#: An OLE2 compound file (legacy .xls) and the zip container of .xlsx/.xlsm/.ods.
_OLE_MAGIC = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"
_ZIP_MAGIC = b"PK\x03\x04"
_SPREADSHEET_SUFFIXES = (".xlsx", ".xlsm", ".xls", ".xlsb", ".ods")

#: Field separators a header is checked for when it reads as a single column.
_SEPARATORS = (";", "\t", "|", ",")
#: Thousands separators accepted (none, comma, point, space, apostrophe, underscore).
_THOUSANDS = ("", ",", ".", " ", "'", "_")
_ROLES = ("date", "asset", "value")
#: First characters a spreadsheet reads as the start of a formula (OWASP, "CSV Injection").
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
#: Longest asset name every store column holds (the outbox keeps names in 64 characters).
NAME_CHARS_CAP = 64


@dataclass(frozen=True, slots=True)
class Limits:
    """What one input may hold (``[ingest]`` in comove.toml); inputs beyond are refused.

    Parameters
    ----------
    max_megabytes : float
        Largest file.
    max_columns : int
        Most columns of a file or SQL source.
    max_line_bytes : int
        Longest line of a CSV file.
    max_name_chars : int
        Longest asset name, at most :data:`NAME_CHARS_CAP`.
    first_date : date
        Earliest date accepted.
    max_future_days : int
        Latest date accepted: this many days after today (UTC).
    max_abs_log_return : float
        Largest |log return| stored without ``--accept-outliers`` (1.0: a price falling to
        37% or rising to 272% of the day before).
    """

    max_megabytes: float = 256.0
    max_columns: int = 2000
    max_line_bytes: int = 100_000
    max_name_chars: int = NAME_CHARS_CAP
    first_date: dt.date = dt.date(1900, 1, 1)
    max_future_days: int = 1
    max_abs_log_return: float = 1.0

    @property
    def last_date(self) -> dt.date:
        """The latest date accepted today."""
        return dt.datetime.now(dt.UTC).date() + dt.timedelta(days=self.max_future_days)


DEFAULT_LIMITS = Limits()


@dataclass(frozen=True, slots=True)
class Table:
    """A checked input (:func:`read_table`): the wide frame, and the date of the row on a
    last line without a line ending (None when the file ended with one, or is not CSV)."""

    frame: pd.DataFrame
    open_end: pd.Timestamp | None = None


@dataclass(frozen=True, slots=True)
class ReadOptions:
    """How to read a CSV file's cells (build with :func:`read_options`, which checks them).

    Parameters
    ----------
    sep : str
        Field separator, one character (default ``","``).
    decimal : str
        Decimal mark of numbers, ``"."`` (default) or ``","``.
    thousands : str
        Thousands separator inside numbers, ``""`` (none, default), ``","``, ``"."``, ``" "``,
        ``"'"`` or ``"_"``; digits must then come in groups of three.
    date_format : str
        A ``strftime`` layout such as ``"%d/%m/%Y"``; empty (default) reads ISO 8601 dates.
    columns : tuple of (role, name)
        File columns holding the ``date``, ``asset`` and ``value`` roles: ``date`` alone
        renames a wide file's date column, ``asset`` with ``value`` reads a long file from
        those three columns (any other column is left out by this choice).
    style : {"option", "key"}
        How messages name a suggested setting: ``--sep ';'`` (command line) or ``sep = ';'``
        (a ``[[sources]]`` entry).
    """

    sep: str = ","
    decimal: str = "."
    thousands: str = ""
    date_format: str = ""
    columns: tuple[tuple[str, str], ...] = ()
    style: str = "option"

    def suggest(self, name: str, value: str) -> str:
        """A setting as the user writes it: ``--date-format '%d/%m/%Y'`` or
        ``date_format = '%d/%m/%Y'``."""
        if self.style == "key":
            return f"{name} = {value!r}"
        shown = "'\\t'" if value == "\t" else (
            value if re.fullmatch(r"[\w.,=%/-]+", value) and "%" not in value else f"'{value}'")
        return f"--{name.replace('_', '-')} {shown}"


def parse_columns(text: str, where: str = "--columns") -> dict[str, str]:
    """``"date=Date,asset=Ticker,value=Close"`` as ``{"date": "Date", ...}`` (checked by
    :func:`read_options`)."""
    out: dict[str, str] = {}
    for part in (p.strip() for p in text.split(",")):
        role, eq, name = part.partition("=")
        if not eq or not role.strip() or not name.strip():
            raise InputError(f"{where}: {part!r} is not of the form ROLE=COLUMN (e.g. "
                             "date=Date,asset=Ticker,value=Close)")
        role = role.strip().lower()
        if role in out:
            raise InputError(f"{where}: {role!r} is given twice")
        out[role] = name.strip()
    return out


def read_options(*, sep: str = ",", decimal: str = ".", thousands: str = "",
                 date_format: str = "", columns: Mapping[str, str] | None = None,
                 names: Mapping[str, str] | None = None, style: str = "option"
                 ) -> ReadOptions:
    """Check reading options and return them as :class:`ReadOptions`.

    Parameters
    ----------
    sep, decimal, thousands, date_format
        As :class:`ReadOptions`; ``sep`` may also be written ``"\\t"`` or ``"tab"``.
    columns : mapping, optional
        Role (``date``, ``asset``, ``value``) to file column name.
    names : mapping, optional
        How messages name each setting (default the command-line options, ``--sep`` ...).
    style : {"option", "key"}
        See :class:`ReadOptions`.

    Raises
    ------
    InputError
        A separator that is not one plain character, an unknown decimal mark or thousands
        separator, equal decimal and thousands marks, a date format without year, month and
        day, an unknown column role, or ``asset`` without ``value``.
    """
    label = {k: f"--{k.replace('_', '-')}" for k in ("sep", "decimal", "thousands",
                                                    "date_format", "columns")}
    label.update(names or {})
    if sep in ("\\t", "tab"):
        sep = "\t"
    if len(sep) != 1 or sep in "\"'\r\n" or sep.isalnum() or sep in ".":
        raise InputError(f"{label['sep']}: {sep!r} is not a field separator (one character "
                         "such as ',' ';' '|' or tab)")
    if decimal not in (".", ","):
        raise InputError(f"{label['decimal']} must be '.' or ',', got {decimal!r}")
    if thousands not in _THOUSANDS:
        raise InputError(f"{label['thousands']} must be one of "
                         f"{', '.join(repr(t) for t in _THOUSANDS if t)}, got {thousands!r}")
    if thousands == decimal:
        raise InputError(f"{label['thousands']} {thousands!r} is also the decimal mark")
    if date_format:
        probe = dt.date(2001, 12, 25)
        try:
            back = dt.datetime.strptime(probe.strftime(date_format), date_format).date()
        except ValueError:
            back = None
        if back != probe:
            raise InputError(f"{label['date_format']}: {date_format!r} is not a date layout "
                             "with year, month and day (e.g. '%d/%m/%Y')")
    pairs: list[tuple[str, str]] = []
    for role, name in (columns or {}).items():
        if role not in _ROLES:
            raise InputError(f"{label['columns']}: unknown role {role!r}; roles: "
                             f"{', '.join(_ROLES)}")
        if name:
            pairs.append((role, name))
    given = {r for r, _ in pairs}
    if ("asset" in given) != ("value" in given):
        raise InputError(f"{label['columns']}: a long file needs both asset and value "
                         "(and date unless its date column is named date)")
    if len({n for _, n in pairs}) != len(pairs):
        raise InputError(f"{label['columns']}: one column is given two roles")
    return ReadOptions(sep, decimal, thousands, date_format, tuple(pairs), style)


DEFAULT_OPTIONS = ReadOptions()


def _where(i: int, lines: np.ndarray | None) -> str:
    """Where data row ``i`` (0-based) sits: its file line in a CSV, its row number otherwise."""
    return f"line {int(lines[i])}" if lines is not None else f"row {i + 1}"


def _show(cell: object, limit: int = 40) -> str:
    """A cell quoted for a one-line message, cut short so a runaway cell stays readable."""
    text = str(cell)
    return repr(text if len(text) <= limit else text[:limit - 3] + "...")


_SLASHED = re.compile(r"^(\d{1,2})([/.-])(\d{1,2})\2(\d{4}|\d{2})$")


def _date_layout_hint(text: pd.Series, example: str, options: ReadOptions) -> str | None:
    """For a date like 03/04/2020: which ``--date-format`` reads the file, never a guess."""
    m = _SLASHED.match(example)
    if m is None:
        return None
    sep, year = m.group(2), "%Y" if len(m.group(4)) == 4 else "%y"
    found = text.str.extract(_SLASHED.pattern).dropna()
    first, second = found[0].astype(int), found[2].astype(int)
    day_first = f"%d{sep}%m{sep}{year}"
    month_first = f"%m{sep}%d{sep}{year}"
    if (first > 12).any() and (second <= 12).all():
        return (f"dates like {example} are day-first: give "
                f"{options.suggest('date_format', day_first)}")
    if (second > 12).any() and (first <= 12).all():
        return (f"dates like {example} are month-first: give "
                f"{options.suggest('date_format', month_first)}")
    return (f"dates like {example} could be day-first or month-first; give "
            f"{options.suggest('date_format', day_first)} or '{month_first}'")


def _parse_dates(raw: pd.Series, path: str, lines: np.ndarray | None,
                 options: ReadOptions = DEFAULT_OPTIONS) -> pd.DatetimeIndex:
    if pd.api.types.is_datetime64_any_dtype(raw):
        dates = pd.DatetimeIndex(raw)
        bad = np.flatnonzero(dates.isna())
        if bad.size:
            raise InputError(f"{path}: {_where(int(bad[0]), lines)}: the date is missing")
    else:
        text = raw.astype("string").str.strip()
        fmt = options.date_format or "ISO8601"
        try:
            parsed = pd.to_datetime(text, format=fmt, errors="coerce")
        except ValueError:
            # errors="coerce" does not cover dates that mix time zones (or a zone and none).
            raise InputError(f"{path}: the dates mix time zones; give plain YYYY-MM-DD "
                             "dates") from None
        dates = pd.DatetimeIndex(parsed)
        bad = np.flatnonzero(dates.isna())
        if bad.size:
            i = int(bad[0])
            where = f"{path}: {_where(i, lines)}"
            if options.date_format:
                raise InputError(f"{where}: cannot read date {_show(raw.iloc[i])} (expected "
                                 f"{options.suggest('date_format', options.date_format)})")
            example = str(text.iloc[i]) if pd.notna(text.iloc[i]) else ""
            hint = _date_layout_hint(text.fillna(""), example, options)
            if hint is not None:
                raise InputError(f"{where}: {hint}")
            tail = "" if not example or re.match(r"^\d{4}", example) else (
                ", or give the layout, e.g. " + options.suggest("date_format", "%d.%m.%Y"))
            raise InputError(f"{where}: cannot read date {_show(raw.iloc[i])} "
                             f"(expected YYYY-MM-DD{tail})")
    if dates.tz is not None:
        dates = dates.tz_localize(None)
    return dates.normalize()


def _number_hint(cell: str, options: ReadOptions) -> str | None:
    """The option that would read a number written with other marks, e.g. ``1.234,56``."""
    sign = r"[+-]?"
    if options.decimal == ".":
        if re.fullmatch(sign + r"\d{1,3}(\.\d{3})+,\d*", cell) or (
                re.fullmatch(sign + r"\d{1,3}(\.\d{3}){2,}", cell)):
            return (f"give {options.suggest('decimal', ',')} "
                    f"{options.suggest('thousands', '.')}")
        if options.thousands != "," and re.fullmatch(sign + r"\d{1,3}(,\d{3})+(\.\d*)?", cell):
            if re.fullmatch(sign + r"\d{1,3},\d{3}", cell):
                return (f"give {options.suggest('decimal', ',')} if ',' is the decimal mark, "
                        f"or {options.suggest('thousands', ',')} if it separates thousands")
            return f"give {options.suggest('thousands', ',')}"
        if re.fullmatch(sign + r"\d*,\d+", cell):
            return f"give {options.suggest('decimal', ',')}"
    else:
        if options.thousands != "." and re.fullmatch(sign + r"\d{1,3}(\.\d{3})+(,\d*)?", cell):
            return f"give {options.suggest('thousands', '.')}"
        if options.thousands != "," and re.fullmatch(sign + r"\d*\.\d+", cell):
            return f"'.' is not the decimal mark given ({options.suggest('decimal', ',')})"
    if options.thousands and options.thousands in cell:
        return f"digits must come in groups of three around the thousands separator " \
               f"{options.thousands!r}"
    return None


def _normalise_numbers(text: pd.Series, options: ReadOptions) -> tuple[pd.Series, np.ndarray]:
    """Text of numbers with the file's marks rewritten to plain ``1234.5``; also a mask of
    cells whose marks do not fit the options (thousands not in groups of three, a point
    where the decimal mark is a comma)."""
    bad = np.zeros(len(text), dtype=bool)
    if options.thousands:
        t = re.escape(options.thousands)
        d = re.escape(options.decimal)
        has = text.str.contains(t, regex=True).to_numpy(dtype=bool)
        grouped = text.str.fullmatch(rf"[+-]?\d{{1,3}}({t}\d{{3}})+({d}\d*)?").to_numpy(
            dtype=bool)
        bad |= has & ~grouped
        text = text.str.replace(options.thousands, "", regex=False)
    if options.decimal != ".":
        bad |= text.str.contains(".", regex=False).to_numpy(dtype=bool)
        text = text.str.replace(options.decimal, ".", regex=False)
    return text, bad


def _parse_numbers(raw: pd.Series, path: str, column: str, dates: pd.DatetimeIndex,
                   lines: np.ndarray | None, options: ReadOptions = DEFAULT_OPTIONS,
                   long_hint: str | None = None) -> np.ndarray:
    """Numbers of one column; empty cells become NaN (= no value on that date)."""
    if pd.api.types.is_numeric_dtype(raw) and not pd.api.types.is_bool_dtype(raw):
        values = raw.to_numpy(dtype=float, na_value=np.nan)
        text_bad = np.zeros(values.size, dtype=bool)
        nonfinite = np.isinf(values)
        text = None
    else:
        text = raw.astype("string").str.strip().fillna("")
        empty = (text == "").to_numpy()
        plain, marks_bad = _normalise_numbers(text, options)
        values = pd.to_numeric(plain.where(~empty, None), errors="coerce").to_numpy(
            dtype=float, na_value=np.nan)
        text_bad = (np.isnan(values) & ~empty) | marks_bad
        # "nan" and "inf" parse as numbers; they are not data.
        lowered = text.str.lower()
        text_bad |= lowered.isin(["nan", "+nan", "-nan"]).to_numpy()
        nonfinite = np.isinf(values)
    bad = np.flatnonzero(text_bad | nonfinite)
    if bad.size:
        i = int(bad[0])
        message = (f"{path}: {_where(i, lines)} ({dates[i].date()}), column {column!r}: "
                   f"{_show(raw.iloc[i])} is not a finite number")
        hint = None if text is None else _number_hint(str(text.iloc[i]), options)
        if hint is None and long_hint is not None and text is not None and not nonfinite[i]:
            filled = ~empty
            if filled.any() and text_bad[filled].all():
                hint = long_hint  # a whole column of text: a long file's asset names
        raise InputError(message + (f"; {hint}" if hint else ""))
    return values


def _check_lines(path: Path, data: bytes, limits: Limits) -> None:
    """Refuse a line longer than ``limits.max_line_bytes`` (before the CSV reader sees it)."""
    ends = np.flatnonzero(np.frombuffer(data, dtype=np.uint8) == 10)
    lengths = np.diff(np.concatenate([[-1], ends, [len(data)]])) - 1
    k = int(np.argmax(lengths))
    if lengths[k] > limits.max_line_bytes:
        raise InputError(f"{path}: line {k + 1}: {int(lengths[k])} bytes, longer than the limit "
                         f"{limits.max_line_bytes} (ingest.max_line_bytes)")


def _read_csv(path: Path, data: bytes, options: ReadOptions = DEFAULT_OPTIONS,
              limits: Limits = DEFAULT_LIMITS) -> tuple[pd.DataFrame, np.ndarray]:
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
    _check_lines(path, data, limits)
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=options.sep,
                        skipinitialspace=options.sep != " ", strict=True)
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
                _check_separator(path, first, header, options)
                _check_width(path, len(header), limits)
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


def _check_width(path: Path | str, columns: int, limits: Limits) -> None:
    if columns > limits.max_columns:
        raise InputError(f"{path}: {columns} columns, more than the limit {limits.max_columns} "
                         "(ingest.max_columns)")


def _check_separator(path: Path, line: int, header: list[str], options: ReadOptions) -> None:
    """A header read as one column that holds another separator: name the option."""
    if len(header) != 1:
        return
    for sep in _SEPARATORS:
        if sep != options.sep and sep in header[0]:
            shown = "tab" if sep == "\t" else repr(sep)
            raise InputError(f"{path}: line {line}: the header {_show(header[0])} reads as one "
                             f"column; its fields look separated by {shown}: give "
                             f"{options.suggest('sep', sep)}")


def _read_raw(path: Path, options: ReadOptions = DEFAULT_OPTIONS,
              limits: Limits = DEFAULT_LIMITS
              ) -> tuple[pd.DataFrame, np.ndarray | None, bool]:
    """The file's cells, for a CSV the file line of each row (None for Parquet), and whether
    a CSV's last line lacks a line ending."""
    if not path.exists():
        raise InputError(f"{path}: file not found")
    if not path.is_file():
        raise InputError(f"{path}: not a file")
    size = path.stat().st_size
    if size > limits.max_megabytes * 2**20:
        raise InputError(f"{path}: {size / 2**20:.1f} MB, larger than the limit "
                         f"{limits.max_megabytes:g} MB (ingest.max_megabytes)")
    data = path.read_bytes()
    if not data:
        raise InputError(f"{path}: file is empty")
    if (path.suffix.lower() in _SPREADSHEET_SUFFIXES or data.startswith(_OLE_MAGIC)
            or (data.startswith(_ZIP_MAGIC) and (b"xl/" in data[:4096]
                                                 or b"opendocument.spreadsheet" in data[:4096]))):
        raise InputError(f"{path}: Excel files are not read; save the sheet as CSV")
    if data.startswith(_PARQUET_MAGIC):
        try:
            frame = pd.read_parquet(path)
        except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file
            raise InputError(f"{path}: unreadable Parquet file ({type(exc).__name__})") from None
        if any(name is not None for name in frame.index.names):
            # A frame saved together with its date index comes back with it as the index.
            frame = frame.reset_index()
        return frame, None, False
    if b"\x00" in data:
        raise InputError(f"{path}: binary file, expected CSV or Parquet")
    frame, lines = _read_csv(path, data, options, limits)
    return frame, lines, not data.endswith((b"\n", b"\r"))


def _check_name(name: str, where: str, limits: Limits) -> None:
    """Refuse an asset name the store, an e-mail header or a spreadsheet would mishandle."""
    shown = _show(name, 24)
    if not name.isprintable():
        bad = next(ch for ch in name if not ch.isprintable())
        raise InputError(f"{where}: asset name {shown} holds the control character "
                         f"{bad!r}; names must be printable text")
    if len(name) > limits.max_name_chars:
        raise InputError(f"{where}: asset name {shown} has {len(name)} characters, more than "
                         f"the limit {limits.max_name_chars} (ingest.max_name_chars)")
    if name.startswith(FORMULA_STARTS):
        raise InputError(f"{where}: asset name {shown} starts with {name[0]!r}, which a "
                         "spreadsheet reads as a formula; rename the asset")


def _check_date_range(dates: pd.DatetimeIndex, path: str | Path, lines: np.ndarray | None,
                      limits: Limits) -> None:
    """Refuse dates before ``limits.first_date`` or after ``limits.last_date``."""
    low, high = pd.Timestamp(limits.first_date), pd.Timestamp(limits.last_date)
    bad = np.flatnonzero((dates < low) | (dates > high))
    if bad.size:
        i = int(bad[0])
        raise InputError(f"{path}: {_where(i, lines)}: date {dates[i].date()} is outside the "
                         f"plausible range {low.date()} to {high.date()} (ingest.first_date, "
                         "ingest.max_future_days)")


def _check_header(names: list[str], path: str | Path) -> None:
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


def read_series(path: str | Path, options: ReadOptions | None = None) -> pd.DataFrame:
    """Read a wide or long series file into a wide frame.

    Parameters
    ----------
    path : str or Path
        CSV or Parquet file.
    options : ReadOptions, optional
        Separator, decimal and thousands marks, date layout, column roles (default: comma,
        point, none, ISO 8601, columns named ``date`` / ``asset`` / ``value``). Parquet cells
        are typed, so only ``date_format`` (for text dates) and ``columns`` apply to them.

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
        (or date and asset) with different values; a column with no values; an Excel file.
        Where another option would read the file (a separator, decimal or thousands mark,
        date layout, long-file columns), the message names it.

    Notes
    -----
    A single row (one date) is a valid file: whether it gives returns depends on what is
    already stored (see :func:`monitor.data.ingest.ingest_sources`).
    """
    return read_table(path, options).frame


def read_table(path: str | Path, options: ReadOptions | None = None,
               limits: Limits | None = None) -> Table:
    """:func:`read_series` within ``limits`` (default :data:`DEFAULT_LIMITS`: file size,
    columns, line length, asset names, date range), and where a CSV's last line has no line
    ending, the date of its row (a file cut short in transfer ends that way)."""
    path = Path(path)
    options = options or DEFAULT_OPTIONS
    limits = limits or DEFAULT_LIMITS
    frame, lines, open_end = _read_raw(path, options, limits)
    last_row = None
    if open_end and lines is not None and len(lines):
        k = int(np.argmax(lines))
        last_row = (frame.iloc[[k]].copy(), lines[[k]])
    wide = tidy_frame(frame, path, lines, options, limits)
    last = None if last_row is None else pd.Timestamp(
        tidy_frame(*last_row[:1], path, last_row[1], options, limits).index[0])
    return Table(wide, last)


def _map_columns(frame: pd.DataFrame, names: list[str], path: str | Path,
                 options: ReadOptions) -> tuple[pd.DataFrame, list[str]]:
    """Apply ``options.columns``: rename the date column, or pick a long file's three."""
    if not options.columns:
        return frame, names
    exact = {n: k for k, n in enumerate(names)}
    folded = {n.lower(): k for k, n in enumerate(names)}
    picked: dict[str, int] = {}
    for role, name in options.columns:
        k = exact.get(name, folded.get(name.lower()))
        if k is None:
            raise InputError(f"{path}: {options.suggest('columns', f'{role}={name}')}: no "
                             f"column {name!r} (columns: {', '.join(names)})")
        picked[role] = k
    if "asset" in picked:
        if "date" not in picked:
            k = folded.get("date")
            if k is None:
                raise InputError(f"{path}: no 'date' column (columns: {', '.join(names)}); "
                                 "name it in the column roles, e.g. "
                                 f"{options.suggest('columns', 'date=Date,asset=..,value=..')}")
            picked["date"] = k
        order = [picked[r] for r in _ROLES]
        out = frame.iloc[:, order].copy()
        out.columns = list(_ROLES)
        return out, list(_ROLES)
    k = picked["date"]
    renamed = [("date" if j == k else n) for j, n in enumerate(names)]
    for j, n in enumerate(names):
        if j != k and n.lower() == "date":
            raise InputError(f"{path}: column {j + 1} is also named {n!r}; only the column "
                             f"{names[k]!r} holds the dates")
    frame.columns = renamed
    return frame, renamed


def tidy_frame(frame: pd.DataFrame, path: str | Path, lines: np.ndarray | None = None,
               options: ReadOptions | None = None, limits: Limits | None = None
               ) -> pd.DataFrame:
    """Check a raw table of cells (wide or long, as read from a file or a SQL query) and
    return the wide frame :func:`read_series` describes; ``path`` names the source in
    messages and ``lines`` gives each row's file line (None: rows are numbered from 1);
    ``options`` as in :func:`read_series`, ``limits`` as in :func:`read_table`."""
    options = options or DEFAULT_OPTIONS
    limits = limits or DEFAULT_LIMITS
    if frame.shape[1] == 0:
        raise InputError(f"{path}: file is empty")
    _check_width(path, frame.shape[1], limits)
    if frame.shape[0] == 0:
        raise InputError(f"{path}: header only, no data rows")
    names = [str(c).strip() for c in frame.columns]
    frame, names = _map_columns(frame, names, path, options)
    _check_header(names, path)
    frame.columns = names
    lower = {n.lower(): n for n in names}
    if "date" not in lower:
        raise InputError(f"{path}: no 'date' column (columns: {', '.join(names)}); give "
                         f"{options.suggest('columns', 'date=' + names[0])} if {names[0]!r} "
                         "holds the dates")
    dates = _parse_dates(frame[lower["date"]], str(path), lines, options)
    _check_date_range(dates, path, lines, limits)
    long = set(lower) == {"date", "asset", "value"} and len(names) == 3
    if long:
        assets = frame[lower["asset"]].astype("string").str.strip().fillna("")
        blank = np.flatnonzero((assets == "").to_numpy())
        if blank.size:
            raise InputError(f"{path}: {_where(int(blank[0]), lines)}: empty asset name")
        for name, first_row in zip(*np.unique(assets.to_numpy(dtype=object),
                                              return_index=True), strict=True):
            _check_name(str(name), f"{path}: {_where(int(first_row), lines)}", limits)
        values = _parse_numbers(frame[lower["value"]], str(path), "value", dates, lines,
                                options)
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
        for k, c in enumerate(names):
            if c in cols:
                _check_name(c, f"{path}: column {k + 1}", limits)
        data = {}
        date_name = dict(options.columns).get("date", lower["date"])
        for c in cols:
            others = [n for n in cols if n != c]
            long_hint = None if not others else (
                "if the file is long (one row per date and asset), give "
                + options.suggest("columns", f"date={date_name},asset={c},value={others[-1]}"))
            data[c] = _parse_numbers(frame[c], str(path), c, dates, lines, options, long_hint)
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
    if empty and len(wide) == 1 and len(empty) < wide.shape[1]:
        # One day of closes: a blank cell is an asset with no price that day (a holiday).
        wide = wide.drop(columns=empty)
    elif empty:
        raise InputError(f"{path}: column {empty[0]!r} has no values")
    return wide.astype(float)


def check_returns(rets: pd.DataFrame, source: str, limits: Limits, *, accept: bool = False,
                  open_end: pd.Timestamp | None = None, what: str = "log return"
                  ) -> list[tuple[pd.Timestamp, str, float]]:
    """Refuse implausible returns: |r| above ``limits.max_abs_log_return``.

    Parameters
    ----------
    rets : DataFrame
        Wide log returns (date x asset), NaN where there is none.
    source : str
        Named in the message.
    limits : Limits
    accept : bool
        Store them anyway (``--accept-outliers``): they are returned for the ingest record.
    open_end : Timestamp, optional
        The date of a last line without a line ending: its returns are refused even with
        ``accept`` (a file cut short inside a number reads as a plausible-looking price).
    what : str
        What the values are, for the message.

    Returns
    -------
    list of (Timestamp, str, float)
        The outliers accepted, by date then asset.

    Raises
    ------
    InputError
        The first outlier not accepted, naming date, column and value.
    """
    values = rets.to_numpy(dtype=float)
    with np.errstate(invalid="ignore"):
        big = np.abs(values) > limits.max_abs_log_return
    rows, cols = np.nonzero(big)
    found = sorted((rets.index[i], str(rets.columns[j]), float(values[i, j]))
                   for i, j in zip(rows, cols, strict=True))
    bound = f"|r| > {limits.max_abs_log_return:g}, ingest.max_abs_log_return"
    for day, asset, value in found:
        if open_end is not None and day == open_end:
            raise InputError(f"{source}: {day.date()}, column {asset!r}: implausible {what} "
                             f"{value:.4g} ({bound}) on the last line, which has no line "
                             "ending: the file looks cut short; send it again")
    if found and not accept:
        day, asset, value = found[0]
        raise InputError(f"{source}: {day.date()}, column {asset!r}: implausible {what} "
                         f"{value:.4g} ({bound}; {len(found)} such value(s)); check the "
                         "data, or pass --accept-outliers to store them")
    return found


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


def _source_statement(query: str | None, table: str | None
                      ) -> sa.Select[Any] | sa.TextClause:
    """The statement reading a SQL source: ``SELECT *`` from the table (quoted as an
    identifier), or the query as written; exactly one of them must be given."""
    import sqlalchemy as sa

    if table is not None and query is None:
        return sa.select(sa.text("*")).select_from(sa.table(table))
    if query is not None and table is None:
        # The query runs as written: text() would read ':word' (say inside a string literal)
        # as a bind parameter, so every such colon is escaped with its own pattern.
        return sa.text(re.sub(r"(?<![:\w\\]):(\w+)(?!:)", r"\\:\1", query))
    raise InputError("a SQL source needs exactly one of a query and a table")


def read_sql_source(url: str, *, query: str | None = None, table: str | None = None,
                    limits: Limits | None = None) -> pd.DataFrame:
    """Read series from a SQL source: a whole table or a query, wide or long, within
    ``limits`` (columns, asset names, dates; default :data:`DEFAULT_LIMITS`).

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

    stmt = _source_statement(query, table)
    try:
        shown = sa.engine.make_url(url).render_as_string(hide_password=True)
    except sa.exc.ArgumentError:
        raise InputError(f"SQL source: {url!r} is not a database URL") from None
    name = f"{shown} ({'table ' + repr(table) if table else 'query ' + _show(query, 80)})"
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
    return tidy_frame(frame, name, limits=limits)
