"""Spreadsheet extraction checked against pandas, a raw read of the SpreadsheetML parts and the
lines the csv module's writer wrote.

Tolerance of every value comparison: exact string equality once the reference's cell value is
rendered by ``_shown`` below, which applies the documented rendering independently of the
extractor (integers without ".0", other floats as ``repr``, dates in ISO 8601, booleans as
TRUE/FALSE). The one other step is on the CSV references: a line break inside a quoted value is
collapsed to a space, as the extractor documents for all text.
"""

from __future__ import annotations

import csv
import datetime
import io
import json
import math
import subprocess
import sys
import zipfile
from pathlib import Path

import openpyxl
import pandas
import pytest
from lxml import etree
from openpyxl.cell import WriteOnlyCell
from openpyxl.styles import PatternFill
from openpyxl.utils import get_column_letter

from pipeline.chunking import chunk_segments
from pipeline.errors import CorruptDocument, DocumentTooLarge, EmptyDocument
from pipeline.formats.sheets import (
    CSV_TYPE,
    MAX_FIELD_CHARS,
    MAX_ROWS,
    TSV_TYPE,
    XLSX_TYPE,
    extract_csv,
    extract_tsv,
    extract_xlsx,
)
from pipeline.records import TABLE_ROW, Limits
from pipeline.tokens import TokenCounter

ROOT = Path(__file__).resolve().parents[1]
LIMITS = Limits()
# SpreadsheetML main namespace (ECMA-376 Part 1, 18; from memory).
S = "{http://schemas.openxmlformats.org/spreadsheetml/2006/main}"
# Day 0 of the 1900 date system as Excel counts it, valid for serials after 60 (ECMA-376 Part 1,
# 18.17.4.1; from memory).
EXCEL_EPOCH = datetime.datetime(1899, 12, 30)
ONE_GIB_KIB = 1024 * 1024  # ru_maxrss is in KiB on Linux


def _shown(value: object) -> str:
    """A reference cell value as the documented rendering shows it ("" for an empty cell)."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if isinstance(value, float) and value == int(value):
        return str(int(value))
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, datetime.datetime):
        if value.time() == datetime.time(0):
            return value.strftime("%Y-%m-%d")
        return value.strftime("%Y-%m-%dT%H:%M:%S")
    return str(value)


def _expected_rows(
    grid: dict[int, list[str]], sheet: str | None, unnamed: str
) -> list[tuple[str | None, int, str]]:
    """(heading, row, text) per data row of a grid of shown values keyed by 1-based row number:
    the first row with a value is the header, "name: value" for each non-empty cell."""
    expected = []
    header: list[str] | None = None
    for number in sorted(grid):
        cells = grid[number]
        if not any(cells):
            continue
        if header is None:
            header = cells
            continue
        pairs = []
        for index, value in enumerate(cells):
            if value:
                name = header[index] if index < len(header) and header[index] else ""
                if not name:
                    name = (
                        get_column_letter(index + 1)
                        if unnamed == "letter"
                        else f"column {index + 1}"
                    )
                pairs.append(f"{name}: {value}")
        expected.append((sheet, number, ", ".join(pairs)))
    return expected


def _ours(extracted) -> list[tuple[str | None, int, str]]:
    for segment in extracted.segments:
        assert segment.kind == TABLE_ROW
        assert segment.anchor.line_start == segment.anchor.line_end
    return [(s.anchor.heading, s.anchor.line_start, s.text) for s in extracted.segments]


# --- Excel .xlsx fixtures --------------------------------------------------------------------


def _save(workbook: openpyxl.Workbook) -> bytes:
    buffer = io.BytesIO()
    workbook.save(buffer)
    return buffer.getvalue()


def _parts_workbook() -> bytes:
    """An invented Marrowby parts list and price list: numbers, dates, booleans, gaps."""
    workbook = openpyxl.Workbook()
    workbook.properties.title = "Marrowby spring parts list"
    parts = workbook.active
    parts.title = "Parts"
    parts.append([])  # the header is the first non-empty row, here row 2
    parts.append(["Part", "Description", "Price", "Effective", None, "In stock"])
    parts.append(
        ["HB2-114", "Headset bearing, sealed", 12.4, datetime.datetime(2026, 3, 2), 4, True]
    )
    parts.append(["HB2-115", "Headset cup", 12.0, datetime.datetime(2026, 3, 2), None, False])
    parts.append([])
    parts.append(["FR-0931", "Fellrunner frame, 56 cm", 489.95, None, 1, True, "ECN-2207"])
    parts.append([None, None, 1 / 3, datetime.datetime(2026, 4, 1, 14, 30)])
    prices = workbook.create_sheet("Prices 2026")
    prices.append(["Serial", "Model", "Gross"])
    prices.append(["MCW-26-00417", "Fellrunner", 1249])
    prices.append(["MCW-26-00418", "Tarnway", -3.5e-05])
    return _save(workbook)


def _raw_sheet_grid(data: bytes, part: str, date_columns: set[int]) -> dict[int, list[str]]:
    """Shown values read straight from a worksheet part with lxml (no openpyxl), entities off.

    Per ECMA-376 Part 1, 18.3.1.4 c and 18.18.11 ST_CellType (from memory): t="s" indexes
    xl/sharedStrings.xml (18.4.8 si: its t, or the t of each rich run r), t="inlineStr" holds
    is/t, t="str" a formula's string result in v, t="b" 0/1, t="e" an error text, else a number
    in v. Dates are numbers styled as dates; the caller names the date columns (0-based).
    """
    parser = etree.XMLParser(resolve_entities=False, no_network=True)
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        shared: list[str] = []
        if "xl/sharedStrings.xml" in archive.namelist():
            strings = etree.fromstring(archive.read("xl/sharedStrings.xml"), parser)
            for item in strings.iter(f"{S}si"):
                shared.append("".join(t.text or "" for t in item.iter(f"{S}t")))
        root = etree.fromstring(archive.read(part), parser)
    grid: dict[int, list[str]] = {}
    for row in root.iter(f"{S}row"):
        cells: dict[int, str] = {}
        for cell in row.iter(f"{S}c"):
            letters = "".join(ch for ch in cell.get("r") if ch.isalpha())
            column = openpyxl.utils.column_index_from_string(letters) - 1
            kind = cell.get("t", "n")
            value_element = cell.find(f"{S}v")
            raw = value_element.text if value_element is not None else None
            if kind == "inlineStr":
                value = "".join(t.text or "" for t in cell.iter(f"{S}t"))
            elif raw is None:
                value = ""
            elif kind == "s":
                value = shared[int(raw)]
            elif kind == "b":
                value = _shown(raw == "1")
            elif kind in ("str", "e"):
                value = raw
            elif column in date_columns:
                # A serial is a float of days: round to the second the writer stored.
                seconds = round(float(raw) * 86400)
                value = _shown(EXCEL_EPOCH + datetime.timedelta(seconds=seconds))
            else:
                number = float(raw)
                value = _shown(int(raw) if raw.lstrip("-").isdigit() else number)
            cells[column] = value
        width = max(cells, default=-1) + 1
        grid[int(row.get("r"))] = [cells.get(i, "") for i in range(width)]
    return grid


def _pandas_grids(data: bytes) -> dict[str, dict[int, list[str]]]:
    """Shown values per sheet from pandas.read_excel (header=None: row i is sheet row i + 1)."""
    frames = pandas.read_excel(io.BytesIO(data), sheet_name=None, header=None, dtype=object)
    grids = {}
    for name, frame in frames.items():
        grids[name] = {
            index + 1: [_shown(value) for value in row]
            for index, row in enumerate(frame.itertuples(index=False))
        }
    return grids


def test_xlsx_rows_match_pandas_and_the_raw_sheet_xml():
    data = _parts_workbook()
    extracted = extract_xlsx(data, LIMITS)
    assert extracted.media_type == XLSX_TYPE
    assert extracted.title == "Marrowby spring parts list"
    assert extracted.warnings == ()
    ours = _ours(extracted)

    # Reference 1: pandas.read_excel, every sheet, rendered with _shown; exact equality.
    by_pandas = []
    for name, grid in _pandas_grids(data).items():
        by_pandas.extend(_expected_rows(grid, name, "letter"))
    assert ours == by_pandas

    # Reference 2: the worksheet parts read with lxml per ECMA-376 (column D of Parts is dates).
    by_xml = _expected_rows(
        _raw_sheet_grid(data, "xl/worksheets/sheet1.xml", {3}), "Parts", "letter"
    ) + _expected_rows(
        _raw_sheet_grid(data, "xl/worksheets/sheet2.xml", set()), "Prices 2026", "letter"
    )
    assert ours == by_xml

    # The documented rendering on values a reader can check by eye.
    assert ours[0] == (
        "Parts",
        3,
        "Part: HB2-114, Description: Headset bearing, sealed, Price: 12.4, "
        "Effective: 2026-03-02, E: 4, In stock: TRUE",
    )
    assert ours[1][2].startswith("Part: HB2-115, Description: Headset cup, Price: 12, ")
    assert "G: ECN-2207" in ours[2][2]
    assert ours[3] == ("Parts", 7, "Price: 0.3333333333333333, Effective: 2026-04-01T14:30:00")
    assert ours[-1] == ("Prices 2026", 3, "Serial: MCW-26-00418, Model: Tarnway, Gross: -3.5e-05")


def _rewrite_part(data: bytes, part: str, change) -> bytes:
    """The same zip with one part's bytes replaced by ``change(old bytes)``."""
    out = io.BytesIO()
    with zipfile.ZipFile(io.BytesIO(data)) as source, zipfile.ZipFile(out, "w") as target:
        for member in source.infolist():
            content = source.read(member)
            if member.filename == part:
                content = change(content)
            target.writestr(member, content)
    return out.getvalue()


def test_xlsx_formula_cell_gives_the_cached_value_not_the_formula():
    workbook = openpyxl.Workbook()
    sheet = workbook.active
    sheet.title = "Order"
    sheet.append(["Part", "Unit", "Total"])
    sheet.append(["BB-68", 12.4, "=B2*2"])
    sheet.append(["CH-11", 7, "=B3*2"])  # left without a cached value, as openpyxl writes it
    data = _save(workbook)

    def cache_first_result(xml: bytes) -> bytes:
        # Give C2 the cached value Excel would have saved (18.3.1.96 v beside 18.3.1.40 f).
        root = etree.fromstring(xml, etree.XMLParser(resolve_entities=False))
        cell = root.find(f".//{S}c[@r='C2']")
        value = cell.find(f"{S}v")
        if value is None:
            value = etree.SubElement(cell, f"{S}v")
        value.text = "24.8"
        return etree.tostring(root, xml_declaration=True, encoding="UTF-8")

    data = _rewrite_part(data, "xl/worksheets/sheet1.xml", cache_first_result)
    ours = _ours(extract_xlsx(data, LIMITS))
    # Reference: the raw sheet XML's v elements (no formula text, no value where v is empty).
    assert ours == _expected_rows(
        _raw_sheet_grid(data, "xl/worksheets/sheet1.xml", set()), "Order", "letter"
    )
    assert ours == [
        ("Order", 2, "Part: BB-68, Unit: 12.4, Total: 24.8"),
        ("Order", 3, "Part: CH-11, Unit: 7"),
    ]


def test_xlsx_rows_chunk_per_sheet_with_their_row_numbers():
    extracted = extract_xlsx(_parts_workbook(), LIMITS)
    chunks = chunk_segments("share:parts.xlsx", extracted.segments, TokenCounter())
    # The chunker's guarantee: chunk texts cover the segments once, never across a heading.
    assert (
        " ".join(c.text for c in chunks).split()
        == " ".join(s.text for s in extracted.segments).split()
    )
    rows = {(s.anchor.heading, s.anchor.line_start) for s in extracted.segments}
    for chunk in chunks:
        assert chunk.heading in ("Parts", "Prices 2026")
        assert (chunk.heading, chunk.line_start) in rows
        assert (chunk.heading, chunk.line_end) in rows
    assert {c.heading for c in chunks} == {"Parts", "Prices 2026"}


# --- .xlsx: bad input ------------------------------------------------------------------------


def test_xlsx_that_is_not_a_zip_says_what_it_looks_like():
    with pytest.raises(CorruptDocument, match="not an Excel .xlsx.*plain text"):
        extract_xlsx(b"Part,Price\nHB2-114,12.40\n", LIMITS)
    with pytest.raises(CorruptDocument, match="legacy Office file"):
        extract_xlsx(b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(600), LIMITS)
    with pytest.raises(CorruptDocument, match="zip container is damaged"):
        extract_xlsx(b"PK\x03\x04" + b"\x00" * 200, LIMITS)


def test_xlsx_without_a_workbook_part_is_corrupt():
    data = _parts_workbook()
    out = io.BytesIO()
    with zipfile.ZipFile(io.BytesIO(data)) as source, zipfile.ZipFile(out, "w") as target:
        for member in source.infolist():
            if member.filename != "xl/workbook.xml":
                target.writestr(member, source.read(member))
    with pytest.raises(CorruptDocument, match="no xl/workbook.xml part"):
        extract_xlsx(out.getvalue(), LIMITS)


def test_xlsx_zip_bomb_part_is_refused_before_inflating():
    data = _parts_workbook()
    out = io.BytesIO()
    with zipfile.ZipFile(io.BytesIO(data)) as source:
        with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as target:
            for member in source.infolist():
                target.writestr(member, source.read(member))
            # 16 MiB of zeros deflates about a thousand times (over the default 200).
            with target.open("xl/media/padding.bin", "w") as stream:
                for _ in range(16):
                    stream.write(bytes(1024 * 1024))
    with pytest.raises(DocumentTooLarge, match="padding.bin inflates .* zip bomb"):
        extract_xlsx(out.getvalue(), LIMITS)


def test_xlsx_whose_parts_inflate_past_the_limit_is_too_large():
    data = _parts_workbook()
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        total = sum(member.file_size for member in archive.infolist())
    with pytest.raises(DocumentTooLarge, match="would inflate to"):
        extract_xlsx(data, Limits(max_inflated_bytes=total - 1))
    assert extract_xlsx(data, Limits(max_inflated_bytes=total)).segments


def test_xlsx_with_an_entity_bomb_in_a_sheet_is_refused_unexpanded():
    laughs = (
        b'<?xml version="1.0" encoding="UTF-8"?>\n<!DOCTYPE worksheet [\n'
        b'<!ENTITY lol "lol">\n'
        + b"".join(
            b'<!ENTITY lol%d "%s">\n' % (n, (b"&lol%d;" % (n - 1) if n > 1 else b"&lol;") * 10)
            for n in range(1, 10)
        )
        + b"]>\n"
    )

    def add_bomb(xml: bytes) -> bytes:
        body = xml.split(b"?>", 1)[1] if xml.startswith(b"<?xml") else xml
        return laughs + body.replace(b"HB2-114", b"&lol9;", 1)

    data = _rewrite_part(_parts_workbook(), "xl/worksheets/sheet1.xml", add_bomb)
    with pytest.raises(CorruptDocument, match="sheet1.xml declares a DOCTYPE"):
        extract_xlsx(data, LIMITS)


def test_empty_workbook_and_header_only_workbook_are_empty():
    with pytest.raises(EmptyDocument, match="no cells with values"):
        extract_xlsx(_save(openpyxl.Workbook()), LIMITS)
    workbook = openpyxl.Workbook()
    workbook.active.append(["Part", "Price"])
    workbook.create_sheet("Notes")
    with pytest.raises(EmptyDocument, match="only a header row"):
        extract_xlsx(_save(workbook), LIMITS)


def test_xlsx_row_and_cell_limits_cut_with_a_warning_naming_sheet_and_row():
    workbook = openpyxl.Workbook()
    first = workbook.active
    first.title = "Spokes"
    first.append(["Spoke", "Length"])
    for n in range(1, 11):
        first.append([f"SP-{n:03d}", 260 + n])
    workbook.create_sheet("Rims").append(["Rim", "ERD"])
    data = _save(workbook)

    cut = extract_xlsx(data, LIMITS, max_rows=5)
    # The header and four data rows are read; row 6 is where it stopped.
    assert [s.anchor.line_start for s in cut.segments] == [2, 3, 4, 5]
    assert cut.warnings[0] == (
        "sheet 'Spokes' was cut at row 6: the file reached the limit of 5 rows read, "
        "so the rest was not read"
    )
    assert "'Rims'" in cut.warnings[1]

    by_cells = extract_xlsx(data, LIMITS, max_cells=2 * 4)
    assert [s.anchor.line_start for s in by_cells.segments] == [2, 3, 4]
    assert "sheet 'Spokes' was cut at row 5" in by_cells.warnings[0]
    assert "8 cells" in by_cells.warnings[0]


_MEASURE = """
import json, resource, sys
from pipeline.errors import ExtractionError
from pipeline.formats import sheets
from pipeline.records import Limits
data = open(sys.argv[2], "rb").read()
try:
    result = getattr(sheets, sys.argv[1])(data, Limits())
    outcome = {"texts": [s.text for s in result.segments], "warnings": list(result.warnings)}
except ExtractionError as error:
    outcome = {"error": type(error).__name__, "message": str(error)}
# VmHWM, not ru_maxrss: Linux carries ru_maxrss across exec from the forking parent (here the
# test runner, with the model loaded), while VmHWM belongs to this process's own memory.
outcome["max_rss_kib"] = next(
    int(line.split()[1]) for line in open("/proc/self/status") if line.startswith("VmHWM:")
)
print(json.dumps(outcome))
"""


def _measure(function: str, path: Path) -> dict:
    """Run one extractor in a fresh interpreter; its outcome and peak resident memory."""
    done = subprocess.run(
        [sys.executable, "-c", _MEASURE, function, str(path)],
        cwd=ROOT,
        capture_output=True,
        text=True,
        check=True,
    )
    return json.loads(done.stdout)


@pytest.mark.slow
def test_a_million_formatted_empty_rows_stop_the_sheet_in_bounded_memory(tmp_path):
    workbook = openpyxl.Workbook(write_only=True)
    sheet = workbook.create_sheet("Stock")
    sheet.append(["Part", "Bin"])
    sheet.append(["HB2-114", "A3"])
    formatted = WriteOnlyCell(sheet, value=None)
    formatted.fill = PatternFill("solid", fgColor="FFF2CC")
    sheet.append([formatted])
    sheet.append(["HB9-999", "below the gap"])
    small = io.BytesIO()
    workbook.save(small)

    def million_rows(xml: bytes) -> bytes:
        # openpyxl's writer takes about a minute for a million rows; the same rows are written
        # here as text: row 3 (one formatted, empty cell) repeated for rows 3..1,000,002, and
        # the last row renumbered below them.
        text = xml.decode("utf-8")
        start = text.index('<row r="3"')
        end = text.index("</row>", start) + len("</row>")
        row3 = text[start:end]
        repeated = "".join(
            row3.replace('r="3"', f'r="{n}"').replace('r="A3"', f'r="A{n}"')
            for n in range(3, 1_000_003)
        )
        last = text[end:].replace('r="4"', 'r="1000003"')
        last = last.replace('r="A4"', 'r="A1000003"').replace('r="B4"', 'r="B1000003"')
        return (text[:start] + repeated + last).encode("utf-8")

    sheet_part = next(
        name for name in zipfile.ZipFile(small).namelist() if name.startswith("xl/worksheets/sheet")
    )
    path = tmp_path / "stock.xlsx"
    path.write_bytes(_rewrite_part(small.getvalue(), sheet_part, million_rows))
    # Reference: openpyxl's own reader sees the formatted cells as empty rows.
    check = openpyxl.load_workbook(path, read_only=True)
    assert next(check["Stock"].iter_rows(min_row=3, max_row=3, values_only=True)) == (None,)
    check.close()

    outcome = _measure("extract_xlsx", path)
    assert outcome["texts"] == ["Part: HB2-114, Bin: A3"]
    assert outcome["warnings"] == [
        "sheet 'Stock' was cut at row 10,002 after 10,000 empty rows in a row; anything below "
        "them was not read"
    ]
    assert outcome["max_rss_kib"] < ONE_GIB_KIB


# --- CSV and TSV -----------------------------------------------------------------------------


def _write_delimited(rows: list[list[str]], **dialect) -> tuple[bytes, list[tuple[int, int]]]:
    """The text the csv module's writer makes, and each row's (first, last) physical line."""
    text = io.StringIO()
    spans = []
    line = 1
    for row in rows:
        piece = io.StringIO()
        csv.writer(piece, **dialect).writerow(row)
        written = piece.getvalue()
        lines = written.replace("\r\n", "\n").count("\n")
        spans.append((line, line + lines - 1))
        line += lines
        text.write(written)
    return text.getvalue().encode("utf-8"), spans


PARTS_ROWS = [
    ["Part", "Description", "", "Price"],
    ["HB2-114", "Headset bearing, sealed", "ECN-2207", "12.40"],
    ["HB2-115", 'Headset cup "long"', "", "12.00"],
    [],
    ["FR-0931", "Fellrunner frame\nhand brazed", "", "489.95"],
    ["", "", "", ""],
    ["BB-68", "", "", "", "spare"],
]


def _expected_from_pandas(data: bytes, spans, separator: str, encoding: str = "utf-8"):
    """(None, first line, text) per data row, values from pandas.read_csv as strings."""
    frame = pandas.read_csv(
        io.BytesIO(data),
        sep=separator,
        header=None,
        dtype=str,
        keep_default_na=False,
        skip_blank_lines=False,
        encoding=encoding,
        names=range(5),  # the widest row has five values
    )
    grid = {}
    for (first, _last), row in zip(spans, frame.itertuples(index=False), strict=True):
        cells = [" ".join(value.split()) for value in row]
        while cells and not cells[-1]:
            cells.pop()
        grid[first] = cells
    return _expected_rows(grid, None, "position")


def test_csv_rows_match_pandas_and_the_writers_lines():
    data, spans = _write_delimited(PARTS_ROWS)
    extracted = extract_csv(data, LIMITS)
    assert extracted.media_type == CSV_TYPE
    assert extracted.warnings == ()
    ours = _ours_delimited(extracted, spans)
    # Reference: pandas.read_csv values; line numbers from what the csv writer wrote.
    assert ours == _expected_from_pandas(data, spans, ",")
    assert ours[0] == (
        None,
        2,
        "Part: HB2-114, Description: Headset bearing, sealed, column 3: ECN-2207, Price: 12.40",
    )
    assert ours[2] == (
        None,
        5,
        "Part: FR-0931, Description: Fellrunner frame hand brazed, Price: 489.95",
    )
    assert ours[3] == (None, 8, "Part: BB-68, column 5: spare")


def _ours_delimited(extracted, spans):
    """(heading, first line, text), checking each last line against the writer's span."""
    last_of = dict(spans)
    out = []
    for segment in extracted.segments:
        assert segment.kind == TABLE_ROW
        assert segment.anchor.line_end == last_of[segment.anchor.line_start]
        out.append((segment.anchor.heading, segment.anchor.line_start, segment.text))
    return out


def test_semicolon_csv_and_tsv_are_sniffed():
    rows = [["Serial", "Model", "Gross"], ["MCW-26-00417", "Fellrunner", "1249,00"]]
    data, spans = _write_delimited(rows, delimiter=";")
    ours = _ours_delimited(extract_csv(data, LIMITS), spans)
    assert ours == _expected_from_pandas(data, spans, ";")  # reference: pandas.read_csv sep=";"
    assert ours == [(None, 2, "Serial: MCW-26-00417, Model: Fellrunner, Gross: 1249,00")]

    data, spans = _write_delimited(PARTS_ROWS, dialect="excel-tab")
    extracted = extract_tsv(data, LIMITS)
    assert extracted.media_type == TSV_TYPE
    # Reference: pandas.read_csv with sep="\t".
    assert _ours_delimited(extracted, spans) == _expected_from_pandas(data, spans, "\t")


def test_csv_in_a_legacy_code_page_and_with_a_bom_decode_like_pandas():
    rows = [["Teil", "Größe", "Preis"], ["SP-261", "Rahmengröße 56 cm", "12,40 €"]]
    data, spans = _write_delimited(rows, delimiter=";")
    cp1252 = data.decode("utf-8").encode("cp1252")
    # Reference: pandas.read_csv told the encoding (the extractor must work it out).
    assert _ours_delimited(extract_csv(cp1252, LIMITS), spans) == _expected_from_pandas(
        cp1252, spans, ";", encoding="cp1252"
    )
    with_bom = b"\xef\xbb\xbf" + data
    assert _ours_delimited(extract_csv(with_bom, LIMITS), spans) == _expected_from_pandas(
        with_bom, spans, ";", encoding="utf-8-sig"
    )


def test_csv_of_binary_bytes_is_corrupt():
    junk = bytes(range(256)) * 64  # every byte value, mostly control characters once decoded
    with pytest.raises(CorruptDocument, match="binary data"):
        extract_csv(junk, LIMITS)


def test_empty_and_header_only_csv_are_empty():
    with pytest.raises(EmptyDocument, match="no cells with values"):
        extract_csv(b"\n\n,,\n", LIMITS)
    with pytest.raises(EmptyDocument, match="only a header row"):
        extract_tsv(b"Part\tPrice\n\n", LIMITS)


def test_csv_stops_at_the_default_row_limit_with_a_warning():
    rows = [["Serial", "Model"]] + [[f"MCW-26-{n:06d}", "Fellrunner"] for n in range(MAX_ROWS + 5)]
    data, spans = _write_delimited(rows)
    extracted = extract_csv(data, LIMITS)
    # The header and MAX_ROWS - 1 data rows are read; reference: the writer's line numbers.
    assert len(extracted.segments) == MAX_ROWS - 1
    assert extracted.segments[-1].anchor.line_start == spans[MAX_ROWS - 1][0]
    stop = spans[MAX_ROWS][0]
    assert extracted.warnings == (
        f"the file was cut at line {stop:,}: the file reached the limit of {MAX_ROWS:,} rows "
        "read, so the rest was not read",
    )


def test_csv_empty_lines_stop_the_file_after_the_empty_run():
    rows = [["Part", "Bin"], ["HB2-114", "A3"]] + [[]] * 5 + [["HB9-999", "B1"]]
    data, spans = _write_delimited(rows)
    extracted = extract_csv(data, LIMITS, max_empty_run=5)
    assert [s.text for s in extracted.segments] == ["Part: HB2-114, Bin: A3"]
    assert extracted.warnings == (
        "the file was cut at line 7 after 5 empty lines in a row; anything below them was not read",
    )
    # One empty line fewer and the row below the gap is read.
    assert len(extract_csv(data, LIMITS, max_empty_run=6).segments) == 2


def test_csv_field_over_the_limit_cuts_the_file_after_earlier_rows():
    rows = [["Part", "Notes"], ["HB2-114", "sealed"], ["HB2-115", "x" * (MAX_FIELD_CHARS + 1)]]
    data, spans = _write_delimited(rows)
    extracted = extract_csv(data, LIMITS)
    assert [s.text for s in extracted.segments] == ["Part: HB2-114, Notes: sealed"]
    assert extracted.warnings == (
        f"the file was cut at line 3: a value at line 3 is longer than {MAX_FIELD_CHARS:,} "
        "characters",
    )


def test_csv_with_one_100_megabyte_line_is_refused_in_bounded_memory(tmp_path):
    path = tmp_path / "notes.csv"
    with path.open("w", newline="", encoding="utf-8") as stream:
        writer = csv.writer(stream)
        writer.writerow(["Part", "Notes"])
        writer.writerow(["HB2-114", "spoke tension log " * (100 * 1024 * 1024 // 18)])
    assert path.stat().st_size > 100 * 1024 * 1024
    outcome = _measure("extract_csv", path)
    assert outcome["error"] == "DocumentTooLarge"
    assert outcome["message"] == (
        f"a value at line 2 is longer than {MAX_FIELD_CHARS:,} characters"
    )
    assert outcome["max_rss_kib"] < ONE_GIB_KIB
