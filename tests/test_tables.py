"""Tests for monitor.data.tables: reading wide and long CSV/Parquet files and refusing bad ones.

The input contract is docs/contracts.md ("Input files" and the exit-code rule that every refusal names
the file, row/date and column at fault). Expected frames are written out by hand; log returns
are checked against numpy's own ``np.log(P_t / P_s)``. Every refusal pins its message with
``pytest.raises(InputError, match=...)`` so that a message which stops naming its file, line,
date or column fails here.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.common.errors import InputError
from monitor.data.tables import log_returns, read_series

# Fictional universe: tree names, no real tickers.
WIDE_CSV = (
    "date,ALDER,BIRCH\n"
    "2021-03-03,101.5,52.25\n"
    "2021-03-01,100.0,50.0\n"
    "2021-03-02,,51.0\n"       # ALDER has no price on 2021-03-02 (a holiday on its market)
    "2021-03-04,102.0,53.5\n"
)
LONG_CSV = (
    "date,asset,value\n"
    "2021-03-04,BIRCH,53.5\n"
    "2021-03-01,ALDER,100.0\n"
    "2021-03-03,ALDER,101.5\n"
    "2021-03-01,BIRCH,50.0\n"
    "2021-03-02,BIRCH,51.0\n"
    "2021-03-03,BIRCH,52.25\n"
    "2021-03-04,ALDER,102.0\n"
)


def expected_frame() -> pd.DataFrame:
    """WIDE_CSV and LONG_CSV written out by hand: sorted dates, NaN for the missing price."""
    index = pd.DatetimeIndex(pd.to_datetime(
        ["2021-03-01", "2021-03-02", "2021-03-03", "2021-03-04"]), name="date")
    return pd.DataFrame({"ALDER": [100.0, np.nan, 101.5, 102.0],
                         "BIRCH": [50.0, 51.0, 52.25, 53.5]}, index=index)


def write(tmp_path: Path, name: str, content: str | bytes) -> Path:
    path = tmp_path / name
    if isinstance(content, str):
        path.write_text(content, encoding="utf-8")
    else:
        path.write_bytes(content)
    return path


def assert_same_frame(actual: pd.DataFrame, expected: pd.DataFrame) -> None:
    """Values, dates and column names equal; the datetime unit (ns/us) is not part of it."""
    assert list(actual.columns) == list(expected.columns)
    assert actual.index.name == "date"
    assert list(actual.index) == list(expected.index)
    np.testing.assert_array_equal(actual.to_numpy(), expected.to_numpy())
    assert all(actual.dtypes == np.float64)


def at(path: Path, rest: str) -> str:
    """Pattern for a message that starts with the file's path, then ``rest`` (a regex)."""
    return "^" + re.escape(str(path)) + rest


# --------------------------------------------------------------------------- accepted inputs
def test_wide_csv(tmp_path):
    assert_same_frame(read_series(write(tmp_path, "wide.csv", WIDE_CSV)), expected_frame())


def test_long_csv_reads_to_the_same_frame(tmp_path):
    assert_same_frame(read_series(write(tmp_path, "long.csv", LONG_CSV)), expected_frame())


def test_wide_and_long_parquet_read_to_the_same_frame(tmp_path):
    wide = pd.read_csv(write(tmp_path, "w.csv", WIDE_CSV))        # date as text, NaN cell
    wide.to_parquet(tmp_path / "wide.parquet", index=False)
    assert_same_frame(read_series(tmp_path / "wide.parquet"), expected_frame())

    long = pd.read_csv(write(tmp_path, "l.csv", LONG_CSV))
    long["date"] = pd.to_datetime(long["date"])                   # date as a timestamp column
    long.to_parquet(tmp_path / "long.parquet", index=False)
    assert_same_frame(read_series(tmp_path / "long.parquet"), expected_frame())


def test_parquet_saved_with_its_date_index(tmp_path):
    # df.to_parquet() keeps a named DatetimeIndex as the index, not as a column.
    expected_frame().to_parquet(tmp_path / "indexed.parquet")
    assert_same_frame(read_series(tmp_path / "indexed.parquet"), expected_frame())


def test_parquet_extension_does_not_matter(tmp_path):
    # The reader goes by the file's content (Parquet magic bytes), not its name.
    pd.read_csv(write(tmp_path, "w.csv", WIDE_CSV)).to_parquet(tmp_path / "prices.dat")
    assert_same_frame(read_series(tmp_path / "prices.dat"), expected_frame())


@pytest.mark.parametrize("header", ["DATE", "Date", " date "])
def test_date_column_name_is_case_insensitive(tmp_path, header):
    text = WIDE_CSV.replace("date", header, 1)
    assert_same_frame(read_series(write(tmp_path, "wide.csv", text)), expected_frame())


def test_long_column_names_are_case_insensitive(tmp_path):
    text = LONG_CSV.replace("date,asset,value", "Date,ASSET,Value", 1)
    assert_same_frame(read_series(write(tmp_path, "long.csv", text)), expected_frame())


def test_blank_cell_is_missing_for_that_asset_only(tmp_path):
    frame = read_series(write(tmp_path, "wide.csv", WIDE_CSV))
    day = pd.Timestamp("2021-03-02")
    assert np.isnan(frame.loc[day, "ALDER"])
    assert frame.loc[day, "BIRCH"] == 51.0          # the other asset keeps its value that day


def test_dates_are_sorted_and_normalised(tmp_path):
    text = ("date,ALDER\n2021-03-04,4\n2021-03-01T00:00:00,1\n2021-03-03,3\n"
            "2021-03-02 00:00,2\n")
    frame = read_series(write(tmp_path, "w.csv", text))
    assert frame.index.is_monotonic_increasing
    assert list(frame["ALDER"]) == [1.0, 2.0, 3.0, 4.0]
    assert (frame.index == frame.index.normalize()).all()


def test_exact_duplicated_rows_collapse(tmp_path):
    wide = WIDE_CSV + "2021-03-01,100.0,50.0\n"
    assert_same_frame(read_series(write(tmp_path, "w.csv", wide)), expected_frame())
    long = LONG_CSV + "2021-03-03,ALDER,101.5\n"
    assert_same_frame(read_series(write(tmp_path, "l.csv", long)), expected_frame())


def test_blank_lines_bom_crlf_and_spaces_are_tolerated(tmp_path):
    text = "\ufeff" + WIDE_CSV.replace("\n", "\r\n").replace(",", ", ") + "\r\n\r\n"
    text = text.replace("2021-03-02", "\r\n2021-03-02", 1)        # a blank line inside
    assert_same_frame(read_series(write(tmp_path, "w.csv", text)), expected_frame())


def test_random_frame_round_trips_through_csv_and_parquet(tmp_path):
    rng = np.random.default_rng(20240611)
    n, k = 300, 4
    values = rng.standard_t(4, size=(n, k)) * 0.01
    values[rng.random((n, k)) < 0.05] = np.nan
    index = pd.DatetimeIndex(pd.bdate_range("2015-01-01", periods=n), name="date")
    frame = pd.DataFrame(values, index=index, columns=["ALDER", "BIRCH", "CEDAR", "DOGWOOD"])
    frame.to_csv(tmp_path / "w.csv")          # pandas writes floats at round-trip precision
    assert_same_frame(read_series(tmp_path / "w.csv"), frame)
    long = frame.stack().rename("value").rename_axis(["date", "asset"]).reset_index()
    long.sample(frac=1.0, random_state=1).to_parquet(tmp_path / "l.parquet", index=False)
    assert_same_frame(read_series(tmp_path / "l.parquet"), frame)


# --------------------------------------------------------------------------------- refusals
# (file name, content, expected message after the path). Lines count from 1 = the header.
CSV_REFUSALS = [
    ("empty", "", r": file is empty$"),
    ("blank_lines_only", "\n\n  \n", r": file is empty$"),
    ("header_only", "date,ALDER,BIRCH\n", r": header only, no data rows$"),
    ("no_date_column", "day,ALDER\n2021-03-01,1\n2021-03-02,2\n",
     (r": no 'date' column \(columns: day, ALDER\); give --columns date=day if 'day' holds "
     r"the dates$")),
    ("only_date_column", "date\n2021-03-01\n2021-03-02\n", r": no asset columns besides 'date'"),
    ("bad_date", "date,ALDER\n2021-03-01,1\n2021-13-45,2\n",
     r": line 3: cannot read date '2021-13-45' \(expected YYYY-MM-DD\)$"),
    ("day_first_date", "date,ALDER\n01/03/2021,1\n02/03/2021,2\n",
     (r": line 2: dates like 01/03/2021 could be day-first or month-first; give "
     r"--date-format '%d/%m/%Y' or '%m/%d/%Y'$")),
    ("blank_date", "date,ALDER\n2021-03-01,1\n,2\n", r": line 3: cannot read date ''"),
    ("text_in_number", "date,ALDER,BIRCH\n2021-03-01,1,2\n2021-03-02,1,2\n2021-03-03,3,n/a\n",
     r": line 4 \(2021-03-03\), column 'BIRCH': 'n/a' is not a finite number$"),
    ("decimal_comma", 'date,ALDER\n2021-03-01,"1,5"\n2021-03-02,2\n',
     (r": line 2 \(2021-03-01\), column 'ALDER': '1,5' is not a finite number; give "
     r"--decimal ,$")),
    ("literal_NaN", "date,ALDER\n2021-03-01,1\n2021-03-02,NaN\n",
     r": line 3 \(2021-03-02\), column 'ALDER': 'NaN' is not a finite number$"),
    ("literal_nan_lower", "date,ALDER\n2021-03-01,nan\n2021-03-02,1\n",
     r": line 2 \(2021-03-01\), column 'ALDER': 'nan' is not a finite number$"),
    ("literal_NA", "date,ALDER\n2021-03-01,1\n2021-03-02,NA\n",
     r": line 3 \(2021-03-02\), column 'ALDER': 'NA' is not a finite number$"),
    ("literal_inf", "date,ALDER\n2021-03-01,1\n2021-03-02,inf\n",
     r": line 3 \(2021-03-02\), column 'ALDER': 'inf' is not a finite number$"),
    ("literal_minus_Infinity", "date,ALDER\n2021-03-01,-Infinity\n2021-03-02,1\n",
     r": line 2 \(2021-03-01\), column 'ALDER': '-Infinity' is not a finite number$"),
    ("overflow_to_inf", "date,ALDER\n2021-03-01,1e400\n2021-03-02,1\n",
     r": line 2 \(2021-03-01\), column 'ALDER': '1e400' is not a finite number$"),
    ("wide_duplicate_date", "date,ALDER\n2021-03-01,1\n2021-03-02,2\n2021-03-02,2.5\n",
     r": date 2021-03-02 appears more than once with different values$"),
    ("long_duplicate_date",
     "date,asset,value\n2021-03-01,ALDER,1\n2021-03-02,ALDER,2\n2021-03-02,ALDER,3\n",
     r": date 2021-03-02 appears more than once for asset 'ALDER' with different values$"),
    ("long_empty_asset", "date,asset,value\n2021-03-01,ALDER,1\n2021-03-02,,2\n",
     r": line 3: empty asset name$"),
    ("long_text_value", "date,asset,value\n2021-03-01,ALDER,1\n2021-03-02,ALDER,x\n",
     r": line 3 \(2021-03-02\), column 'value': 'x' is not a finite number$"),
    ("column_without_values", "date,ALDER,BIRCH\n2021-03-01,1,\n2021-03-02,2,\n",
     r": column 'BIRCH' has no values$"),
    ("unnamed_column", "date,ALDER,\n2021-03-01,1,2\n2021-03-02,2,3\n",
     r": column 3 has no name in the header$"),
    ("duplicate_column", "date,ALDER,ALDER\n2021-03-01,1,2\n2021-03-02,2,3\n",
     r": column name 'ALDER' appears twice in the header \(columns 2 and 3\)$"),
    ("two_date_columns", "Date,date,ALDER\n2021-03-01,2021-03-01,1\n2021-03-02,2021-03-02,2\n",
     r": column name 'date' appears twice in the header \(columns 1 and 2\)$"),
    ("row_too_long", "date,ALDER\n2021-03-01,1,7\n2021-03-02,2\n",
     r": line 2: 3 fields where the header has 2$"),
    ("row_too_short", "date,ALDER,BIRCH\n2021-03-01,1,2\n2021-03-02,2\n",
     r": line 3: 2 fields where the header has 3$"),
    ("unclosed_quote", 'date,ALDER\n2021-03-01,1\n2021-03-02,"2\n2021-03-03,3\n',
     r": line 3: not a readable CSV row"),
    ("mixed_time_zones", "date,ALDER\n2021-03-01T10:00+02:00,1\n2021-03-02,2\n",
     r": the dates mix time zones"),
]


@pytest.mark.parametrize(("name", "content", "message"), CSV_REFUSALS,
                         ids=[c[0] for c in CSV_REFUSALS])
def test_csv_refusals_name_file_and_place(tmp_path, name, content, message):
    path = write(tmp_path, f"{name}.csv", content)
    with pytest.raises(InputError, match=at(path, message)):
        read_series(path)


def test_line_numbers_count_blank_lines_and_quoted_line_breaks(tmp_path):
    # Lines 1-2: a quoted line break inside the header's second name, which is then refused
    # (issue 14: a name with a control character would reach e-mail headers and the store).
    text = 'date,"ALDER\nclose"\n\n2021-03-01,1\n2021-03-02,2\n2021-03-03,oops\n'
    path = write(tmp_path, "lines.csv", text)
    with pytest.raises(InputError, match=at(path, r": column 2: asset name 'ALDER\\nclose' "
                                                  r"holds the control character '\\n'")):
        read_series(path)
    # Line 1: header; lines 2-3: a date cell with a quoted line break (read, once trimmed);
    # line 4 blank; line 5 good; line 6 the bad cell: lines are counted through both.
    text = 'date,ALDER\n"2021-03-01\n",1\n\n2021-03-02,2\n2021-03-03,oops\n'
    path = write(tmp_path, "lines2.csv", text)
    with pytest.raises(InputError, match=at(path, r": line 6 \(2021-03-03\), column "
                                                  r"'ALDER': 'oops'")):
        read_series(path)


def test_first_bad_cell_is_reported(tmp_path):
    text = "date,ALDER,BIRCH\n2021-03-01,1,2\n2021-03-02,x,2\n2021-03-03,1,y\n"
    path = write(tmp_path, "two_bad.csv", text)
    with pytest.raises(InputError, match=r"line 3 \(2021-03-02\), column 'ALDER': 'x'"):
        read_series(path)


def test_long_runaway_cell_is_cut_short_in_the_message(tmp_path):
    path = write(tmp_path, "runaway.csv", "date,ALDER\n2021-03-01,1\n2021-03-02," + "z" * 500
                 + "\n")
    with pytest.raises(InputError, match=r"'z{37}\.\.\.' is not a finite number$"):
        read_series(path)


def test_missing_file(tmp_path):
    path = tmp_path / "nowhere.csv"
    with pytest.raises(InputError, match=at(path, r": file not found$")):
        read_series(path)


def test_directory_is_not_a_file(tmp_path):
    with pytest.raises(InputError, match=at(tmp_path, r": not a file$")):
        read_series(tmp_path)


def test_binary_file(tmp_path):
    rng = np.random.default_rng(5)
    junk = b"\x89BIN" + rng.integers(0, 256, 2000, dtype=np.uint8).tobytes() + b"\x00\x01"
    path = write(tmp_path, "blob.csv", junk)
    with pytest.raises(InputError, match=at(path, r": binary file, expected CSV or Parquet$")):
        read_series(path)


def test_nul_byte_late_in_a_text_file(tmp_path):
    path = write(tmp_path, "late_nul.csv", WIDE_CSV.encode() * 500 + b"2021-04-01,1\x00,2\n")
    with pytest.raises(InputError, match=at(path, r": binary file")):
        read_series(path)


def test_non_utf8_file_names_the_line(tmp_path):
    text = "date,ALDER,BIRCH\n2021-03-01,1,2\n2021-03-02,1,2 # caf\u00e9\n"
    path = write(tmp_path, "latin1.csv", text.encode("latin-1"))
    with pytest.raises(InputError, match=at(path, r": line 3: not UTF-8 text")):
        read_series(path)


# ---------------------------------------------------------------------------- Parquet refusals
def _dates(n: int = 3) -> pd.DatetimeIndex:
    return pd.DatetimeIndex(pd.bdate_range("2021-03-01", periods=n))


@pytest.mark.parametrize(("frame", "message"), [
    (pd.DataFrame({"date": _dates(), "ALDER": [1.0, np.inf, 3.0]}),
     r": row 2 \(2021-03-02\), column 'ALDER': 'inf' is not a finite number$"),
    (pd.DataFrame({"date": _dates(), "ALDER": ["1", "2", "three"]}),
     r": row 3 \(2021-03-03\), column 'ALDER': 'three' is not a finite number$"),
    (pd.DataFrame({"date": _dates(), "ALDER": [True, False, True]}),
     r": row 1 \(2021-03-01\), column 'ALDER': 'True' is not a finite number$"),
    (pd.DataFrame({"date": ["2021-03-01", "soon", "2021-03-03"], "ALDER": [1.0, 2.0, 3.0]}),
     r": row 2: cannot read date 'soon'"),
    (pd.DataFrame({"date": pd.to_datetime(["2021-03-01", None, "2021-03-03"]),
                   "ALDER": [1.0, 2.0, 3.0]}),
     r": row 2: the date is missing$"),
    (pd.DataFrame({"date": _dates(), "ALDER": [np.nan] * 3, "BIRCH": [1.0, 2.0, 3.0]}),
     r": column 'ALDER' has no values$"),
    (pd.DataFrame({"when": _dates(), "ALDER": [1.0, 2.0, 3.0]}),
     r": no 'date' column \(columns: when, ALDER\); give --columns date=when"),
], ids=["inf", "text", "bool", "bad_date", "missing_date", "empty_column", "no_date"])
def test_parquet_refusals_name_file_row_and_column(tmp_path, frame, message):
    path = tmp_path / "bad.parquet"
    frame.to_parquet(path, index=False)
    with pytest.raises(InputError, match=at(path, message)):
        read_series(path)


def test_truncated_parquet(tmp_path):
    good = tmp_path / "good.parquet"
    pd.DataFrame({"date": _dates(), "ALDER": [1.0, 2.0, 3.0]}).to_parquet(good)
    path = write(tmp_path, "cut.parquet", good.read_bytes()[:120])
    with pytest.raises(InputError, match=at(path, r": unreadable Parquet file")):
        read_series(path)


# ------------------------------------------------------------------------------ log returns
def test_log_returns_per_asset_on_its_own_calendar(tmp_path):
    prices = read_series(write(tmp_path, "wide.csv", WIDE_CSV))
    got = log_returns(prices)
    p_a, p_b = [100.0, 101.5, 102.0], [50.0, 51.0, 52.25, 53.5]
    # Continuously compounded return r_t = ln(P_t / P_{t-1}) (docs/contracts.md, "--kind prices";
    # Campbell, Lo & MacKinlay 1997, The Econometrics of Financial Markets, sec. 1.4,
    # from memory). ALDER has no 2021-03-02 price, so its 2021-03-03 return spans the gap.
    want = pd.DataFrame({
        "ALDER": [np.nan, np.log(p_a[1] / p_a[0]), np.log(p_a[2] / p_a[1])],
        "BIRCH": np.log(np.array(p_b[1:]) / np.array(p_b[:-1])),
    }, index=pd.DatetimeIndex(pd.to_datetime(["2021-03-02", "2021-03-03", "2021-03-04"]),
                              name="date"))
    assert list(got.columns) == ["ALDER", "BIRCH"]
    assert got.index.name == "date"
    assert list(got.index) == list(want.index)
    np.testing.assert_allclose(got.to_numpy(), want.to_numpy(), rtol=0, atol=1e-15)


def test_log_returns_first_dates_differ_between_assets():
    index = pd.DatetimeIndex(pd.to_datetime(["2021-03-01", "2021-03-02", "2021-03-03"]),
                             name="date")
    prices = pd.DataFrame({"ALDER": [10.0, 11.0, 12.1], "BIRCH": [np.nan, 20.0, 19.0]},
                          index=index)
    got = log_returns(prices)
    assert list(got.index) == list(index[1:])
    np.testing.assert_allclose(got["ALDER"], np.log([11.0 / 10.0, 12.1 / 11.0]), atol=1e-15)
    assert np.isnan(got.loc["2021-03-02", "BIRCH"])            # BIRCH's first price: no return
    assert got.loc["2021-03-03", "BIRCH"] == pytest.approx(np.log(19.0 / 20.0), abs=1e-15)


@pytest.mark.parametrize(("price", "shown"), [(0.0, "0.0"), (-3.5, "-3.5"), (np.inf, "inf")])
def test_log_returns_refuse_non_positive_prices(price, shown):
    index = pd.DatetimeIndex(pd.to_datetime(["2021-03-01", "2021-03-02", "2021-03-03"]),
                             name="date")
    prices = pd.DataFrame({"ALDER": [1.0, 2.0, 3.0], "BIRCH": [5.0, price, 6.0]}, index=index)
    with pytest.raises(InputError, match=rf"^prices\.csv: price {re.escape(shown)} on "
                                         r"2021-03-02 in column 'BIRCH' is not a positive"):
        log_returns(prices, source="prices.csv")


# --------------------------------------------------------------------------- exported files
# The same prices as WIDE_CSV, written as spreadsheets in other locales export them.
def read_with(tmp_path: Path, name: str, content: str | bytes, **options) -> pd.DataFrame:
    from monitor.data.tables import parse_columns, read_options

    if "columns" in options:
        options["columns"] = parse_columns(options["columns"])
    return read_series(write(tmp_path, name, content), read_options(**options))


def test_semicolon_decimal_comma_and_day_first_dates(tmp_path):
    text = ("Date;ALDER;BIRCH\n03/03/2021;101,5;52,25\n01/03/2021;100,0;50\n"
            "02/03/2021;;51,0\n04/03/2021;102;53,5\n")
    got = read_with(tmp_path, "de.csv", text, sep=";", decimal=",", date_format="%d/%m/%Y")
    assert_same_frame(got, expected_frame())


def test_thousands_separators_give_the_plain_numbers(tmp_path):
    text = ('date,ALDER,BIRCH\n2021-03-01,"1,234.5","1,000,000"\n2021-03-02,987.25,"12,345"\n')
    got = read_with(tmp_path, "us.csv", text, thousands=",")
    np.testing.assert_array_equal(got.to_numpy(), [[1234.5, 1e6], [987.25, 12345.0]])
    text = "date;ALDER\n2021-03-01;1.234,56\n2021-03-02;-1.000.000,5\n2021-03-03;7,25\n"
    got = read_with(tmp_path, "eu.csv", text, sep=";", decimal=",", thousands=".")
    # float("1234.56") is the binary64 value nearest 1234.56, as for any plain CSV.
    np.testing.assert_array_equal(got["ALDER"].to_numpy(), [1234.56, -1000000.5, 7.25])
    text = "date\tALDER\n2021-03-01\t1 234,5\n2021-03-02\t2 000\n"
    got = read_with(tmp_path, "fr.tsv", text, sep="\\t", decimal=",", thousands=" ")
    np.testing.assert_array_equal(got["ALDER"].to_numpy(), [1234.5, 2000.0])


def test_long_file_with_other_column_names_and_extra_columns(tmp_path):
    text = ("Ticker,Day,Open,Close,Volume\n"
            + "".join(f"{a},{d},0,{v},9\n" for d, a, v in (
                ("2021-03-04", "BIRCH", 53.5), ("2021-03-01", "ALDER", 100.0),
                ("2021-03-03", "ALDER", 101.5), ("2021-03-01", "BIRCH", 50.0),
                ("2021-03-02", "BIRCH", 51.0), ("2021-03-03", "BIRCH", 52.25),
                ("2021-03-04", "ALDER", 102.0))))
    got = read_with(tmp_path, "long.csv", text, columns="date=Day,asset=Ticker,value=close")
    assert_same_frame(got, expected_frame())
    wide = WIDE_CSV.replace("date,", "Datum,", 1)
    assert_same_frame(read_with(tmp_path, "w.csv", wide, columns="date=Datum"),
                      expected_frame())


def test_month_first_dates_with_their_format(tmp_path):
    text = "date,ALDER\n03/13/2021,1\n03/14/2021,2\n"
    got = read_with(tmp_path, "m.csv", text, date_format="%m/%d/%Y")
    assert list(got.index) == list(pd.to_datetime(["2021-03-13", "2021-03-14"]))


def test_one_row_is_a_valid_file(tmp_path):
    # A day of closes (issue 12): whether it gives returns depends on the store (ingest).
    got = read_series(write(tmp_path, "day.csv", "date,ALDER,BIRCH\n2021-03-05,103.5,50.75\n"))
    assert got.shape == (1, 2) and got.index[0] == pd.Timestamp("2021-03-05")
    # A blank cell in a one-day file is that asset's holiday: the asset is left out. A day
    # with no price at all is still refused.
    got = read_series(write(tmp_path, "hol.csv", "date,ALDER,BIRCH\n2021-03-05,103.5,\n"))
    assert list(got.columns) == ["ALDER"] and got.iloc[0, 0] == 103.5
    with pytest.raises(InputError, match=r"column 'ALDER' has no values$"):
        read_series(write(tmp_path, "none.csv", "date,ALDER,BIRCH\n2021-03-05,,\n"))


EXPORT_REFUSALS = [
    ("semicolons", "date;ALDER\n2021-03-01;1\n2021-03-02;2\n", {},
     (r": line 1: the header 'date;ALDER' reads as one column; its fields look separated by "
     r"';': give --sep ';'$")),
    ("tabs", "date\tALDER\n2021-03-01\t1\n", {},
     (r": line 1: the header 'date\\tALDER' reads as one column; its fields look separated by "
     r"tab: give --sep '\\t'$")),
    ("decimal_comma_and_thousands_point", "date;ALDER\n2021-03-01;1.234,56\n", {"sep": ";"},
     (r": line 2 \(2021-03-01\), column 'ALDER': '1\.234,56' is not a finite number; give "
     r"--decimal , --thousands \.$")),
    ("thousands_comma", 'date,ALDER\n2021-03-01,"1,234.5"\n', {},
     (r": line 2 \(2021-03-01\), column 'ALDER': '1,234\.5' is not a finite number; give "
     r"--thousands ,$")),
    ("comma_or_thousands", 'date,ALDER\n2021-03-01,"1,234"\n', {},
     (r".*'1,234' is not a finite number; give --decimal , if ',' is the decimal mark, or "
     r"--thousands , if it separates thousands$")),
    ("point_with_decimal_comma", "date;ALDER\n2021-03-01;1,5\n2021-03-02;1.5\n",
     {"sep": ";", "decimal": ","},
     (r": line 3 \(2021-03-02\), column 'ALDER': '1\.5' is not a finite number; '\.' is not the "
     r"decimal mark given \(--decimal ,\)$")),
    ("bad_grouping", 'date,ALDER\n2021-03-01,"12,34.5"\n', {"thousands": ","},
     (r".*'12,34\.5' is not a finite number; digits must come in groups of three around the "
     r"thousands separator ','$")),
    ("day_first", "date,ALDER\n25/03/2021,1\n26/03/2021,2\n", {},
     r": line 2: dates like 25/03/2021 are day-first: give --date-format '%d/%m/%Y'$"),
    ("month_first", "date,ALDER\n03.25.21,1\n", {},
     r": line 2: dates like 03\.25\.21 are month-first: give --date-format '%m\.%d\.%y'$"),
    ("ambiguous", "date,ALDER\n03/04/2020,1\n04/04/2020,2\n", {},
     (r": line 2: dates like 03/04/2020 could be day-first or month-first; give "
     r"--date-format '%d/%m/%Y' or '%m/%d/%Y'$")),
    ("wrong_format", "date,ALDER\n03/04/2020,1\n2020-04-05,2\n", {"date_format": "%d/%m/%Y"},
     r": line 3: cannot read date '2020-04-05' \(expected --date-format '%d/%m/%Y'\)$"),
    ("words", "date,ALDER\nMar 3 2021,1\n", {},
     (r": line 2: cannot read date 'Mar 3 2021' \(expected YYYY-MM-DD, or give the layout, "
     r"e\.g\. --date-format '%d\.%m\.%Y'\)$")),
    ("long_without_columns", "Date,Ticker,Close\n2021-03-01,ALDER,1\n2021-03-01,BIRCH,2\n", {},
     (r": line 2 \(2021-03-01\), column 'Ticker': 'ALDER' is not a finite number; if the file "
     r"is long \(one row per date and asset\), give --columns "
     r"date=Date,asset=Ticker,value=Close$")),
    ("mapped_column_missing", "Date,Ticker,Close\n2021-03-01,ALDER,1\n",
     {"columns": "date=Date,asset=Symbol,value=Close"},
     r": --columns asset=Symbol: no column 'Symbol' \(columns: Date, Ticker, Close\)$"),
]


@pytest.mark.parametrize(("name", "content", "options", "message"), EXPORT_REFUSALS,
                         ids=[c[0] for c in EXPORT_REFUSALS])
def test_exported_files_are_refused_naming_the_option_that_reads_them(tmp_path, name, content,
                                                                      options, message):
    path = tmp_path / f"{name}.csv"
    with pytest.raises(InputError, match=at(path, message)):
        read_with(tmp_path, path.name, content, **options)


def test_excel_files_are_refused(tmp_path):
    import zipfile

    book = tmp_path / "closes.xlsx"
    with zipfile.ZipFile(book, "w") as z:
        z.writestr("[Content_Types].xml", "<Types/>")
        z.writestr("xl/workbook.xml", "<workbook/>")
    renamed = write(tmp_path, "closes.csv", book.read_bytes())
    legacy = write(tmp_path, "old.xls", b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + b"\x00" * 64)
    for path in (book, renamed, legacy):
        with pytest.raises(InputError, match=at(path, r": Excel files are not read; save the "
                                                      r"sheet as CSV$")):
            read_series(path)


@pytest.mark.parametrize(("options", "message"), [
    ({"sep": ";;"}, r"^--sep: ';;' is not a field separator"),
    ({"decimal": ";"}, r"^--decimal must be '\.' or ',', got ';'$"),
    ({"thousands": "x"}, r"^--thousands must be one of"),
    ({"decimal": ",", "thousands": ","}, r"^--thousands ',' is also the decimal mark$"),
    ({"date_format": "%d/%m"}, r"^--date-format: '%d/%m' is not a date layout with year, "),
    ({"columns": {"asset": "Ticker"}}, r"^--columns: a long file needs both asset and value"),
    ({"columns": {"ticker": "T"}}, r"^--columns: unknown role 'ticker'; roles: date, asset, "),
])
def test_bad_reading_options_name_the_option(options, message):
    from monitor.data.tables import read_options

    with pytest.raises(InputError, match=message):
        read_options(**options)
