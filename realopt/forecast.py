"""Read a cash-flow forecast or a price series from a CSV file or an .xlsx sheet.

A forecast is a table with a header row naming its columns and one row per cash-flow year; years
count from the valuation date (1 = one year from now) and must be positive and distinct. CSV
files are read with the standard library (UTF-8, or Windows-1252 as saved by some spreadsheet
programs; comma, semicolon or tab separated, found from the header row). .xlsx needs the extra
``xlsx`` (openpyxl); formulas are read as the values last saved by the spreadsheet program.

Every problem raises :class:`ForecastError` naming the file, the row (and sheet cell) and the
column.
"""
from __future__ import annotations

import csv
import difflib
import io
import math
import re
from pathlib import Path

from .errors import RealoptError

TEXT_SUFFIXES = (".csv", ".tsv", ".txt")
EXCEL_SUFFIXES = (".xlsx", ".xlsm")
CALENDAR_YEAR = 1000  # a "year" this large is a calendar year, not years from now


class ForecastError(RealoptError, ValueError):
    """A forecast or price file that cannot be used; the message names file, row and column."""


def read_forecast(path, year_column: str, value_column: str,
                  sheet: str | int | None = None) -> tuple[tuple[float, float], ...]:
    """(year, cash flow) pairs sorted by year from the two named columns of ``path``.

    ``sheet`` selects the worksheet of an .xlsx file by name, or by number counted from 1
    (default: the first). Years are years from
    the valuation date, > 0, distinct; values are the expected cash flows in the project's
    currency and unit.
    """
    table = _Table.open(path, sheet)
    ycol = table.column(year_column, "year")
    vcol = table.column(value_column, "cash-flow")
    out: list[tuple[float, float]] = []
    seen: dict[float, str] = {}
    for row in table.rows:
        year = table.number(row, ycol)
        value = table.number(row, vcol)
        where = table.where(row, ycol)
        if year <= 0:
            raise ForecastError(
                f"{where}: year {year:g} is not after the valuation date; expected years counted "
                "from today, 1 = one year from now (cash flows today belong in the investment)")
        if year >= CALENDAR_YEAR:
            raise ForecastError(
                f"{where}: year {year:g} looks like a calendar year; expected years counted from "
                "the valuation date (1 = one year from now). Fix: subtract the base year")
        if year in seen:
            raise ForecastError(
                f"{where}: year {year:g} appears twice (first at {seen[year]}); expected one row "
                "per year. Fix: add the two rows into one or correct the year")
        seen[year] = table.row_name(row)
        out.append((year, value))
    if not out:
        raise ForecastError(f"{table.name}: no data rows under the header row; expected one row "
                            f"per year with '{year_column}' and '{value_column}'")
    return tuple(sorted(out))


def read_series(path, column: str, sheet: str | None = None,
                positive: bool = False) -> tuple[float, ...]:
    """The numbers of one named column of ``path``, in file order (e.g. a price history).

    With ``positive``, every value must be > 0 (prices whose logarithm is taken).
    """
    table = _Table.open(path, sheet)
    col = table.column(column, "price")
    out = []
    for row in table.rows:
        value = table.number(row, col)
        if positive and value <= 0:
            raise ForecastError(f"{table.where(row, col)}: found {value:g}; expected a price "
                                "above zero (log returns need positive prices)")
        out.append(value)
    if not out:
        raise ForecastError(f"{table.name}: no data rows under the header row in column "
                            f"'{column}'")
    return tuple(out)


class _Table:
    """Header + data rows of a CSV file or a worksheet, with located messages."""

    def __init__(self, name: str, header: list, header_row: int, rows: list, excel: bool,
                 sheet: str | None = None):
        self.name = name
        self.header = [("" if h is None else str(h)).strip() for h in header]
        self.header_row = header_row
        self.rows = rows  # list of (row number, cells)
        self.excel = excel
        self.sheet = sheet

    # --- opening -------------------------------------------------------------------------------
    @classmethod
    def open(cls, path, sheet):
        p = Path(path)
        name = str(path)
        if not p.exists():
            raise ForecastError(f"{name}: file not found (paths inside a project file are "
                                "relative to that file)")
        if p.is_dir():
            raise ForecastError(f"{name}: is a folder; expected a .csv or .xlsx file")
        suffix = p.suffix.lower()
        if suffix in EXCEL_SUFFIXES:
            return cls._excel(p, name, sheet)
        if suffix == ".xls":
            raise ForecastError(f"{name}: old .xls workbooks are not read; save it as .xlsx "
                                "or as CSV")
        if suffix not in TEXT_SUFFIXES:
            raise ForecastError(f"{name}: expected a .csv or .xlsx file, found '{p.suffix}'")
        if sheet is not None:
            raise ForecastError(f"{name}: a sheet ('{sheet}') was given but a CSV file has no "
                                "sheets; remove the sheet key or point to an .xlsx file")
        return cls._csv(p, name)

    @classmethod
    def _csv(cls, p: Path, name: str):
        raw = p.read_bytes()
        for encoding in ("utf-8-sig", "cp1252"):
            try:
                text = raw.decode(encoding)
                break
            except UnicodeDecodeError:
                continue
        else:  # pragma: no cover - cp1252 decodes nearly everything
            raise ForecastError(f"{name}: not readable as text; save it as CSV (UTF-8)")
        first = next((line for line in text.splitlines() if line.strip()), "")
        if not first:
            raise ForecastError(f"{name}: file is empty; expected a header row naming the "
                                "columns, then one row per year")
        delimiter = max((",", ";", "\t"), key=first.count) if any(
            d in first for d in ",;\t") else ","
        reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
        header, header_row, rows = None, 0, []
        try:
            for cells in reader:
                if not any(c.strip() for c in cells):
                    continue
                if header is None:
                    header, header_row = cells, reader.line_num
                else:
                    rows.append((reader.line_num, cells))
        except csv.Error as err:
            raise ForecastError(f"{name}, row {reader.line_num}: not valid CSV ({err})") from None
        return cls(name, header, header_row, rows, excel=False)

    @classmethod
    def _excel(cls, p: Path, name: str, sheet):
        try:
            import openpyxl
        except ImportError:
            raise ForecastError(
                f"{name}: reading .xlsx files needs the optional extra: "
                "pip install 'realopt[xlsx]' (or save the sheet as CSV)") from None
        try:
            wb = openpyxl.load_workbook(p, read_only=True, data_only=True)
        except Exception as err:  # openpyxl raises several types for a damaged file
            raise ForecastError(f"{name}: not a readable .xlsx workbook ({type(err).__name__}: "
                                f"{err})") from None
        try:
            if sheet is None:
                ws = wb.worksheets[0]
            elif isinstance(sheet, int) and not isinstance(sheet, bool):
                if not 1 <= sheet <= len(wb.worksheets):
                    raise ForecastError(
                        f"{name}: no sheet number {sheet}; sheets are numbered from 1 and the "
                        f"workbook has {len(wb.worksheets)}: {', '.join(wb.sheetnames)}")
                ws = wb.worksheets[sheet - 1]
            elif str(sheet) in wb.sheetnames:
                sheet = str(sheet)
                ws = wb[sheet]
            else:
                hint = _did_you_mean(str(sheet), wb.sheetnames)
                raise ForecastError(f"{name}: no sheet '{sheet}'; sheets are: "
                                    f"{', '.join(wb.sheetnames)}.{hint}")
            header, header_row, rows = None, 0, []
            for number, cells in enumerate(ws.iter_rows(values_only=True), start=1):
                if all(c is None or (isinstance(c, str) and not c.strip()) for c in cells):
                    continue
                if header is None:
                    header, header_row = list(cells), number
                else:
                    rows.append((number, list(cells)))
            title = ws.title
        finally:
            wb.close()
        if header is None:
            raise ForecastError(f"{name}, sheet '{title}': sheet is empty; expected a header "
                                "row naming the columns, then one row per year")
        return cls(name, header, header_row, rows, excel=True, sheet=title)

    # --- access --------------------------------------------------------------------------------
    def column(self, wanted: str, what: str) -> int:
        wanted_s = str(wanted).strip()
        if wanted_s in self.header:
            idx = [i for i, h in enumerate(self.header) if h == wanted_s]
        else:
            idx = [i for i, h in enumerate(self.header) if h.lower() == wanted_s.lower()]
        if len(idx) == 1:
            return idx[0]
        where = self._where_row(self.header_row)
        if len(idx) > 1:
            raise ForecastError(f"{where}: column '{wanted}' appears {len(idx)} times in the "
                                "header row; expected column names to be distinct")
        names = [h for h in self.header if h]
        hint = _did_you_mean(wanted_s, names)
        raise ForecastError(
            f"{where}: no {what} column '{wanted}' in the header row; columns are: "
            f"{', '.join(repr(n) for n in names) or 'none'}.{hint}")

    def number(self, row, col: int) -> float:
        number, cells = row
        cell = cells[col] if col < len(cells) else None
        where = self.where(row, col)
        if isinstance(cell, bool):
            raise ForecastError(f"{where}: found {cell}; expected a number")
        if isinstance(cell, (int, float)):
            value = float(cell)
        elif cell is None or (isinstance(cell, str) and not cell.strip()):
            extra = (" (if the cell holds a spreadsheet formula, its value was never saved: open "
                     "and save the file in a spreadsheet program)") if self.excel else ""
            raise ForecastError(f"{where}: empty cell; expected a number{extra}")
        elif isinstance(cell, str):
            text = cell.strip()
            try:
                value = float(text)
            except ValueError:
                hint = ""
                if re.fullmatch(r"[+-]?\d+,\d+", text):
                    hint = f". Fix: write it with a decimal point ({text.replace(',', '.')})"
                elif re.fullmatch(r"[+-]?\d{1,3}(,\d{3})+(\.\d+)?", text):
                    hint = f". Fix: drop the thousands separators ({text.replace(',', '')})"
                raise ForecastError(f"{where}: found '{text}'; expected a number{hint}") from None
        else:
            raise ForecastError(f"{where}: found {type(cell).__name__} '{cell}'; expected a "
                                "number")
        if not math.isfinite(value):
            raise ForecastError(f"{where}: found {cell!r}; expected a finite number")
        return value

    def row_name(self, row) -> str:
        return f"row {row[0]}"

    def _where_row(self, number: int) -> str:
        if self.excel:
            return f"{self.name}, sheet '{self.sheet}', row {number}"
        return f"{self.name}, row {number}"

    def where(self, row, col: int) -> str:
        number = row[0]
        label = self.header[col] if col < len(self.header) else f"#{col + 1}"
        if self.excel:
            from openpyxl.utils import get_column_letter

            return (f"{self.name}, sheet '{self.sheet}', cell {get_column_letter(col + 1)}{number}"
                    f" (row {number}, column '{label}')")
        return f"{self.name}, row {number}, column '{label}'"


def _did_you_mean(word: str, options) -> str:
    close = difflib.get_close_matches(word, list(options), n=1, cutoff=0.6)
    return f" Did you mean '{close[0]}'?" if close else ""
