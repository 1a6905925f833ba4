"""Forecast import from CSV and .xlsx: values read back as written, and located errors.

Reference: the tables the tests write themselves (round trip), and openpyxl for the workbooks.
"""
from __future__ import annotations

import sys

import pytest
from hypothesis import given, settings, strategies as st

from realopt.errors import RealoptError
from realopt.forecast import ForecastError, read_forecast, read_series


def write(tmp_path, text, name="forecast.csv", encoding="utf-8"):
    path = tmp_path / name
    path.write_bytes(text.encode(encoding))
    return path


def test_csv_round_trip_sorted_by_year(tmp_path):
    path = write(tmp_path, "year,cash_flow,note\n2,9.5,b\n1,6.0,a\n3,-1.25,c\n\n")
    assert read_forecast(path, "year", "cash_flow") == ((1.0, 6.0), (2.0, 9.5), (3.0, -1.25))


def test_semicolon_bom_and_relaxed_header_case(tmp_path):
    path = write(tmp_path, "\ufeffYear ; Free cash flow\n1;6\n2;7.5\n", encoding="utf-8")
    assert read_forecast(path, "year", "free cash flow") == ((1.0, 6.0), (2.0, 7.5))


def test_windows_1252_file_is_read(tmp_path):
    path = write(tmp_path, "année\tflux\n1\t3\n", encoding="cp1252")
    assert read_forecast(path, "année", "flux") == ((1.0, 3.0),)


@settings(max_examples=50, deadline=None)
@given(st.dictionaries(st.integers(1, 60),
                       st.floats(-1e9, 1e9, allow_nan=False, allow_infinity=False),
                       min_size=1, max_size=30))
def test_any_table_round_trips(tmp_path_factory, table):
    # Property: writing (year, value) rows with repr() and reading them back gives them exactly.
    path = tmp_path_factory.mktemp("rt") / "f.csv"
    path.write_text("t,cf\n" + "".join(f"{y},{v!r}\n" for y, v in table.items()))
    assert read_forecast(path, "t", "cf") == tuple(sorted((float(y), v) for y, v in table.items()))


@pytest.mark.parametrize("text, words", [
    ("year,cashflow\n1,2\n", "no cash-flow column 'cash_flow' in the header row; columns are: "
                            "'year', 'cashflow'. Did you mean 'cashflow'?"),
    ("yr,cash_flow\n1,2\n", "forecast.csv, row 1: no year column 'year'"),
    ("year,cash_flow\n1,2\n2,abc\n", "forecast.csv, row 3, column 'cash_flow': found 'abc'; "
                                    "expected a number"),
    ("year;cash_flow\n1;2,5\n", "found '2,5'; expected a number. Fix: write it with a decimal "
                               "point (2.5)"),
    ('year,cash_flow\n1,"1,250.0"\n', "drop the thousands separators (1250.0)"),
    ("year,cash_flow\n1,2\n2,\n", "row 3, column 'cash_flow': empty cell"),
    ("year,cash_flow\n1,2\n3\n", "row 3, column 'cash_flow': empty cell"),
    ("year,cash_flow\n1,nan\n", "expected a finite number"),
    ("year,cash_flow\n1,2\n2,3\n1,4\n", "row 4, column 'year': year 1 appears twice (first at "
                                       "row 2)"),
    ("year,cash_flow\n0,2\n", "year 0 is not after the valuation date"),
    ("year,cash_flow\n-1,2\n", "year -1 is not after the valuation date"),
    ("year,cash_flow\n2026,2\n", "looks like a calendar year"),
    ("", "file is empty"),
    ("\n  \n", "file is empty"),
    ("year,cash_flow\n", "no data rows under the header row"),
    ("year,year,cash_flow\n1,1,2\n", "column 'year' appears 2 times"),
])
def test_csv_errors_name_row_and_column(tmp_path, text, words):
    path = write(tmp_path, text)
    with pytest.raises(ForecastError) as err:
        read_forecast(path, "year", "cash_flow")
    assert words in str(err.value)
    assert str(path) in str(err.value)


def test_missing_file_folder_and_wrong_kind(tmp_path):
    with pytest.raises(ForecastError, match="file not found"):
        read_forecast(tmp_path / "nope.csv", "year", "cf")
    with pytest.raises(ForecastError, match="is a folder"):
        read_forecast(tmp_path, "year", "cf")
    with pytest.raises(ForecastError, match="old .xls workbooks"):
        read_forecast(write(tmp_path, "x", "old.xls"), "year", "cf")
    with pytest.raises(ForecastError, match="expected a .csv or .xlsx file, found '.json'"):
        read_forecast(write(tmp_path, "{}", "f.json"), "year", "cf")
    with pytest.raises(ForecastError, match="CSV file has no sheets"):
        read_forecast(write(tmp_path, "year,cf\n1,2\n"), "year", "cf", sheet="Plan")


def test_forecast_error_is_a_realopt_error():
    assert issubclass(ForecastError, RealoptError)


# --- xlsx ---------------------------------------------------------------------------------------

def workbook(tmp_path, rows, title="Plan", extra_sheet=True):
    openpyxl = pytest.importorskip("openpyxl")
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = title
    for r in rows:
        ws.append(r)
    if extra_sheet:
        wb.create_sheet("Notes").append(["nothing here"])
    path = tmp_path / "plan.xlsx"
    wb.save(path)
    return path


def test_xlsx_first_sheet_by_default_and_named_sheet(tmp_path):
    path = workbook(tmp_path, [["Year", "Cash flow"], [1, 6.0], [2, "9.5"], [None, None], [3, 11]])
    want = ((1.0, 6.0), (2.0, 9.5), (3.0, 11.0))
    assert read_forecast(path, "Year", "Cash flow") == want
    assert read_forecast(path, "Year", "Cash flow", sheet="Plan") == want
    assert read_forecast(path, "Year", "Cash flow", sheet=1) == want   # numbered from 1
    with pytest.raises(ForecastError, match="no sheet number 3; sheets are numbered from 1 and "
                                            "the workbook has 2: Plan, Notes"):
        read_forecast(path, "Year", "Cash flow", sheet=3)


@pytest.mark.parametrize("rows, words", [
    ([["Year", "Cash flow"], [1, 6.0], [2, "n/a"]],
     "sheet 'Plan', cell B3 (row 3, column 'Cash flow'): found 'n/a'; expected a number"),
    ([["Year", "Cash flow"], [1, 6.0], [1, 7.0]], "cell A3 (row 3, column 'Year'): year 1 appears "
                                                  "twice (first at row 2)"),
    ([["Year", "Cash flow"], [1, 6.0], [2, None, "x"]], "cell B3 (row 3, column 'Cash flow'): "
                                                        "empty cell"),
    ([["Year", "Cash flow"], [1, True]], "found True; expected a number"),
    ([["Year", "Cashflow"], [1, 2]], "sheet 'Plan', row 1: no cash-flow column 'Cash flow'"),
])
def test_xlsx_errors_name_the_cell(tmp_path, rows, words):
    path = workbook(tmp_path, rows)
    with pytest.raises(ForecastError) as err:
        read_forecast(path, "Year", "Cash flow")
    assert words in str(err.value)


def test_xlsx_missing_sheet_lists_the_sheets(tmp_path):
    path = workbook(tmp_path, [["Year", "Cash flow"], [1, 2]])
    with pytest.raises(ForecastError, match="no sheet 'Plann'; sheets are: Plan, Notes. "
                                            "Did you mean 'Plan'"):
        read_forecast(path, "Year", "Cash flow", sheet="Plann")


def test_xlsx_damaged_and_empty(tmp_path):
    bad = write(tmp_path, "not a zip", "bad.xlsx")
    pytest.importorskip("openpyxl")
    with pytest.raises(ForecastError, match="not a readable .xlsx workbook"):
        read_forecast(bad, "Year", "Cash flow")
    empty = workbook(tmp_path, [], extra_sheet=False)
    with pytest.raises(ForecastError, match="sheet is empty"):
        read_forecast(empty, "Year", "Cash flow")


def test_xlsx_without_openpyxl_says_how_to_install(tmp_path, monkeypatch):
    path = write(tmp_path, "irrelevant", "plan.xlsx")
    monkeypatch.setitem(sys.modules, "openpyxl", None)  # makes `import openpyxl` fail
    with pytest.raises(ForecastError, match=r"pip install 'realopt\[xlsx\]'"):
        read_forecast(path, "Year", "Cash flow")


# --- price series -------------------------------------------------------------------------------

def test_series_in_file_order_and_positive_check(tmp_path):
    path = write(tmp_path, "date,close\n2024-01,10\n2024-02,11.5\n2024-03,9\n", "px.csv")
    assert read_series(path, "close") == (10.0, 11.5, 9.0)
    bad = write(tmp_path, "date,close\n2024-01,10\n2024-02,0\n", "bad.csv")
    with pytest.raises(ForecastError, match="row 3, column 'close': found 0; expected a price "
                                            "above zero"):
        read_series(bad, "close", positive=True)
