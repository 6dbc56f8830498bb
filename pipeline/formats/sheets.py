"""Spreadsheet extraction: Excel .xlsx with openpyxl, CSV and TSV with the standard csv module.

Every sheet is read as a table whose first non-empty row is the header. Each later row with at
least one value becomes one TABLE_ROW segment, "Part: HB2-114, Price: 12.4": the header's name for
each non-empty cell, then its value. A header cell that is empty is named by its column letter in
a workbook ("C") or by its position in a CSV file ("column 3"). The anchor's heading is the sheet
name (None for CSV and TSV, which hold one table) and ``line_start`` = ``line_end`` = the 1-based
row number in the sheet. For CSV and TSV the line range is the record's physical lines, which
differ only when a quoted value holds a line break.

Cell values are rendered as text the same way for every format: integers without ".0" (Excel
stores 12 and 12.0 alike, so an integral float is shown as an integer), other floats in Python's
shortest round-trip form (12.4 -> "12.4"), dates and times in ISO 8601 ("2026-03-02", or
"2026-03-02T14:30:00" when there is a time of day), booleans as Excel shows them (TRUE, FALSE).
Workbooks are opened with ``data_only=True``: a formula cell gives the value Excel cached when it
last saved the file, never the formula; a formula with no cached value reads as empty.

Checks before openpyxl sees an .xlsx (it reads shared strings and styles whole):

* the bytes are a zip archive with an ``xl/workbook.xml`` part (else ``CorruptDocument``);
* the declared uncompressed sizes sum to at most ``limits.max_inflated_bytes`` and no part larger
  than 1 MiB inflates by more than ``limits.max_inflate_ratio`` (else ``DocumentTooLarge``), as
  for .docx;
* no XML part declares a DOCTYPE or entity (else ``CorruptDocument``): SpreadsheetML has no use
  for one and an internal entity subset is how an entity-expansion bomb is carried.

These are the shared checks of ``pipeline.formats.container``.

Bounded work per file, whatever the file claims: at most ``MAX_ROWS`` non-empty rows and
``MAX_CELLS`` cells are read; a sheet stops after ``MAX_EMPTY_RUN`` consecutive empty rows (a
sheet formatted down to its millionth row holds a million empty rows). An empty row costs one
unit of the cell budget, so gaps cannot make the scan unbounded either. Each cut adds a warning
naming the sheet and the row where reading stopped. A CSV field longer than ``MAX_FIELD_CHARS``
stops the file there (``DocumentTooLarge`` if nothing was read before it).
"""

from __future__ import annotations

import csv
import datetime
import io
import re
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass, field

import openpyxl
from openpyxl.utils import get_column_letter

from pipeline.errors import CorruptDocument, DocumentTooLarge, EmptyDocument, ExtractionError
from pipeline.formats.container import open_checked_zip, require_zip_bytes
from pipeline.formats.text import decode_text, normalise_text
from pipeline.records import TABLE_ROW, Anchor, Extracted, Limits, Segment

__all__ = [
    "CSV_TYPE",
    "MAX_CELLS",
    "MAX_EMPTY_RUN",
    "MAX_FIELD_CHARS",
    "MAX_ROWS",
    "TSV_TYPE",
    "XLSX_TYPE",
    "check_xlsx_bytes",
    "extract_csv",
    "extract_tsv",
    "extract_xlsx",
    "render_value",
]

XLSX_TYPE = "application/vnd.openxmlformats-officedocument.spreadsheetml.sheet"
CSV_TYPE = "text/csv"
TSV_TYPE = "text/tab-separated-values"

WORKBOOK_PART = "xl/workbook.xml"

#: Non-empty rows read per file, over all its sheets.
MAX_ROWS = 100_000
#: Cells read per file, over all its sheets; an empty row counts as one.
MAX_CELLS = 2_000_000
#: Consecutive empty rows after which the rest of a sheet is not read.
MAX_EMPTY_RUN = 10_000
#: Longest CSV field, in characters: four times Excel's 32,767-character cell limit (from memory).
MAX_FIELD_CHARS = 128 * 1024

# Leading text handed to csv.Sniffer: enough lines to see a pattern, small enough to be quick.
_SNIFF_CHARS = 64 * 1024
_SNIFF_DELIMITERS = ",;\t|"
# One physical line with its ending; CRLF, CR and LF all end a line, as in split_lines.
_PHYSICAL_LINE = re.compile(r"[^\r\n]*(?:\r\n|\r|\n)|[^\r\n]+")
_MIDNIGHT = datetime.time(0)


def render_value(value: object) -> str:
    """The text a cell value is shown as in a segment (before whitespace normalisation)."""
    if value is None:
        return ""
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if value.is_integer() and abs(value) < 2**53:
            return str(int(value))
        return repr(value)
    if isinstance(value, datetime.datetime):
        if value.tzinfo is None and value.time() == _MIDNIGHT:
            return value.date().isoformat()
        return value.isoformat()
    if isinstance(value, (datetime.date, datetime.time)):
        return value.isoformat()
    return str(value)


# --- the table reader every format shares --------------------------------------------------------


@dataclass
class _Budget:
    """What is left of one file's allowance, shared by its sheets."""

    rows: int
    cells: int
    max_rows: int
    max_cells: int
    max_empty_run: int
    segments: list[Segment] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    rows_with_values: int = 0


def _where(sheet: str | None) -> str:
    return f"sheet '{sheet}'" if sheet is not None else "the file"


def _read_table(
    rows: Iterable[tuple[int, int, Sequence[object]]],
    sheet: str | None,
    column_name: Callable[[int], str],
    budget: _Budget,
    unit: str,
) -> bool:
    """Append the segments of one sheet to ``budget.segments``; False when the file's budget ran
    out (later sheets are then not read).

    ``rows`` yields (first line, last line, cell values) with 1-based row or line numbers;
    ``column_name(i)`` names the 0-based column ``i`` when the header leaves it unnamed.
    """
    header: list[str] | None = None
    empty_run = 0
    iterator = iter(rows)
    for first, last, values in iterator:
        cost = max(1, len(values))
        if cost > budget.cells:
            budget.warnings.append(
                f"{_where(sheet)} was cut at {unit} {first:,}: the file reached the limit of "
                f"{budget.max_cells:,} cells read, so the rest was not read"
            )
            return False
        budget.cells -= cost
        texts = [normalise_text(render_value(v)) if v is not None else "" for v in values]
        if not any(texts):
            empty_run += 1
            if empty_run >= budget.max_empty_run:
                if next(iterator, None) is not None:
                    budget.warnings.append(
                        f"{_where(sheet)} was cut at {unit} {last:,} after "
                        f"{budget.max_empty_run:,} empty {unit}s in a row; anything below them "
                        "was not read"
                    )
                return True
            continue
        empty_run = 0
        if budget.rows <= 0:
            budget.warnings.append(
                f"{_where(sheet)} was cut at {unit} {first:,}: the file reached the limit of "
                f"{budget.max_rows:,} rows read, so the rest was not read"
            )
            return False
        budget.rows -= 1
        budget.rows_with_values += 1
        if header is None:
            header = texts
            continue
        pairs = []
        for index, text in enumerate(texts):
            if text:
                name = header[index] if index < len(header) and header[index] else ""
                pairs.append(f"{name or column_name(index)}: {text}")
        anchor = Anchor(heading=sheet, line_start=first, line_end=last)
        budget.segments.append(Segment(", ".join(pairs), anchor, TABLE_ROW))
    return True


#: One sheet for ``_read_sheets``: its name, the name the warning lists it by when it is not
#: read, and its rows (a generator, not started until the sheet is read).
_Sheet = tuple[str, str, Iterable[tuple[int, int, Sequence[object]]]]


def _read_sheets(sheets: Sequence[_Sheet], budget: _Budget) -> None:
    """Read the sheets of a workbook in order, columns named by letter, until the file's budget
    runs out; then warn which sheets were not read."""
    for position, (name, _, rows) in enumerate(sheets):
        if not _read_table(rows, name, lambda index: get_column_letter(index + 1), budget, "row"):
            skipped = [listed for _, listed, _ in sheets[position + 1 :]]
            if skipped:
                budget.warnings.append(
                    "sheets not read because of the limit: "
                    + ", ".join(f"'{listed}'" for listed in skipped)
                )
            return


def _result(budget: _Budget, media_type: str, what: str, title: str | None = None) -> Extracted:
    """The segments and warnings the file's tables gave; EmptyDocument when no data row was read
    (``what`` names the file in its message: "workbook", "file")."""
    if not budget.segments:
        if budget.rows_with_values:
            raise EmptyDocument(f"the {what} has only a header row, no rows of data under it")
        raise EmptyDocument(f"the {what} has no cells with values")
    return Extracted(
        media_type=media_type,
        segments=tuple(budget.segments),
        title=title,
        warnings=tuple(budget.warnings),
    )


# --- Excel .xlsx ---------------------------------------------------------------------------------


def check_xlsx_bytes(data: bytes) -> None:
    """The .xlsx check for the formats table: a zip archive, else say what it looks like."""
    require_zip_bytes(data, "an Excel .xlsx")


def _open_checked(data: bytes, limits: Limits) -> openpyxl.Workbook:
    if len(data) > limits.max_file_bytes:
        raise DocumentTooLarge(
            f"file is {len(data):,} bytes, over the limit of {limits.max_file_bytes:,} bytes"
        )
    check_xlsx_bytes(data)
    open_checked_zip(
        data, limits, label=".xlsx", kind="an Excel workbook", required=(WORKBOOK_PART,)
    ).close()
    try:
        return openpyxl.load_workbook(io.BytesIO(data), read_only=True, data_only=True)
    except Exception as error:  # noqa: BLE001 - zipfile, lxml, KeyError and openpyxl's own alike
        raise CorruptDocument(f"damaged .xlsx ({type(error).__name__}: {error})") from error


def _sheet_rows(worksheet: object) -> Iterator[tuple[int, int, Sequence[object]]]:
    # The <dimension> element is the writer's claim and may be wrong or huge; without it openpyxl
    # makes each row only as wide as its last cell and a missing row an empty tuple.
    worksheet.reset_dimensions()  # type: ignore[attr-defined]
    for number, values in enumerate(worksheet.iter_rows(values_only=True), start=1):  # type: ignore[attr-defined]
        yield number, number, values


def extract_xlsx(
    data: bytes,
    limits: Limits,
    *,
    max_rows: int = MAX_ROWS,
    max_cells: int = MAX_CELLS,
    max_empty_run: int = MAX_EMPTY_RUN,
) -> Extracted:
    """One TABLE_ROW per data row of every worksheet, in sheet order; title from the properties."""
    workbook = _open_checked(data, limits)
    budget = _Budget(max_rows, max_cells, max_rows, max_cells, max_empty_run)
    try:
        title = normalise_text(workbook.properties.title or "") or None
        _read_sheets(
            [(sheet.title, sheet.title, _sheet_rows(sheet)) for sheet in workbook.worksheets],
            budget,
        )
    except ExtractionError:
        raise
    except Exception as error:  # noqa: BLE001 - a damaged sheet part fails inside openpyxl's parser
        raise CorruptDocument(f"damaged .xlsx sheet ({type(error).__name__}: {error})") from error
    finally:
        workbook.close()
    return _result(budget, XLSX_TYPE, "workbook", title)


# --- CSV and TSV ---------------------------------------------------------------------------------


class _FieldTooLong(Exception):
    def __init__(self, line: int) -> None:
        super().__init__(line)
        self.line = line


def _physical_lines(text: str) -> Iterator[str]:
    for match in _PHYSICAL_LINE.finditer(text):
        yield match.group()


def _dialect(text: str, fallback: type[csv.Dialect], prefer_tab: bool) -> type[csv.Dialect]:
    sample = text[:_SNIFF_CHARS]
    cut = max(sample.rfind("\n"), sample.rfind("\r"))
    if cut > 0 and len(text) > len(sample):
        sample = sample[:cut]  # whole lines only: a cut line misleads the sniffer
    try:
        sniffed = csv.Sniffer().sniff(sample, delimiters=_SNIFF_DELIMITERS)
    except csv.Error:
        return fallback
    if prefer_tab and sniffed.delimiter != "\t" and "\t" in sample.partition("\n")[0]:
        # A .tsv's free text may hold commas; a tab in its first line settles it.
        return fallback
    return sniffed


def _records(text: str, dialect: type[csv.Dialect]) -> Iterator[tuple[int, int, Sequence[object]]]:
    reader = csv.reader(_physical_lines(text), dialect)
    previous = 0
    while True:
        try:
            values = next(reader)
        except StopIteration:
            return
        except csv.Error as error:
            if "field larger than field limit" in str(error):
                raise _FieldTooLong(previous + 1) from error
            raise CorruptDocument(
                f"damaged delimited text at line {previous + 1:,} ({error})"
            ) from error
        yield previous + 1, reader.line_num, values
        previous = reader.line_num


def _extract_delimited(
    data: bytes,
    limits: Limits,
    media_type: str,
    fallback: type[csv.Dialect],
    *,
    max_rows: int,
    max_cells: int,
    max_empty_run: int,
) -> Extracted:
    if len(data) > limits.max_file_bytes:
        raise DocumentTooLarge(
            f"file is {len(data):,} bytes, over the limit of {limits.max_file_bytes:,} bytes"
        )
    text = decode_text(data)
    dialect = _dialect(text, fallback, prefer_tab=fallback is csv.excel_tab)
    # Process-wide, and set to the same value on every call, so concurrent calls agree.
    csv.field_size_limit(MAX_FIELD_CHARS)
    budget = _Budget(max_rows, max_cells, max_rows, max_cells, max_empty_run)
    try:
        _read_table(
            _records(text, dialect),
            None,
            lambda index: f"column {index + 1}",
            budget,
            "line",
        )
    except _FieldTooLong as stop:
        reason = f"a value at line {stop.line:,} is longer than {MAX_FIELD_CHARS:,} characters"
        if not budget.segments:
            raise DocumentTooLarge(reason) from None
        budget.warnings.append(f"the file was cut at line {stop.line:,}: {reason}")
    return _result(budget, media_type, "file")


def extract_csv(
    data: bytes,
    limits: Limits,
    *,
    max_rows: int = MAX_ROWS,
    max_cells: int = MAX_CELLS,
    max_empty_run: int = MAX_EMPTY_RUN,
) -> Extracted:
    """One TABLE_ROW per data record; the delimiter is sniffed, else a comma."""
    return _extract_delimited(
        data,
        limits,
        CSV_TYPE,
        csv.excel,
        max_rows=max_rows,
        max_cells=max_cells,
        max_empty_run=max_empty_run,
    )


def extract_tsv(
    data: bytes,
    limits: Limits,
    *,
    max_rows: int = MAX_ROWS,
    max_cells: int = MAX_CELLS,
    max_empty_run: int = MAX_EMPTY_RUN,
) -> Extracted:
    """One TABLE_ROW per data record; the delimiter is a tab unless the sniffer finds another."""
    return _extract_delimited(
        data,
        limits,
        TSV_TYPE,
        csv.excel_tab,
        max_rows=max_rows,
        max_cells=max_cells,
        max_empty_run=max_empty_run,
    )
