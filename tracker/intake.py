"""Read a wave file, check it against the codebook and harmonize it.

Nothing here writes to disk: :func:`check_wave` returns the harmonized table and the list
of problems; the study module decides whether to store it.
"""

from __future__ import annotations

import csv
import difflib
import hashlib
import io
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .codebook import Codebook, Variable, _fmt_code
from .errors import TrackerError
from .filecolumns import FileColumn, plain, plain_text, read_column
from .statfiles import FORMATS as STAT_FORMATS
from .statfiles import read_stat_file

MAX_EXAMPLES = 5


@dataclass(frozen=True)
class Problem:
    """One thing wrong (or worth knowing) about a wave file."""

    severity: str  # "error" stops the add; "warning" does not
    column: str
    message: str
    rows: tuple[int, ...] = ()
    count: int = 0

    def describe(self, file: str) -> str:
        where = f"{file}, column {self.column}" if self.column else file
        text = f"{self.severity}: {where}: {self.message}"
        if self.count:
            shown = ", ".join(str(r) for r in self.rows)
            more = f" (and {self.count - len(self.rows)} more)" if self.count > len(self.rows) else ""
            text += f" [{self.count} row{'s' if self.count != 1 else ''}: {shown}{more}]"
        return text


@dataclass
class WaveFile:
    """A wave file as read: every cell as text, plus how to number its rows for messages."""

    path: Path
    table: pd.DataFrame
    first_row: int  # the spreadsheet row number of the first respondent
    sha256: str
    problems: list[Problem] = field(default_factory=list)
    content_sha256: str = ""  # of the harmonized table, set by Study's check
    labels: Any = None  # a statistics package's value labels and missing codes (tracker.statfiles.FileLabels)
    row_numbers: Any = None  # each respondent's line (CSV) or sheet row (XLSX) as the file numbers it


def file_sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


#: Weights above this, or a largest weight more than MAX_WEIGHT_RATIO times the smallest,
#: are refused: no survey design produces them, and squares of 1e300 overflow.
MAX_WEIGHT = 1e12
MAX_WEIGHT_RATIO = 1e6

#: What the first bytes of a file say it is, whatever its name.
MAGIC = ((b"PAR1", "Parquet", ".parquet"), (b"PK\x03\x04", "XLSX (a zip archive)", ".xlsx"),
         (b"$FL2", "an SPSS data file", ".sav"), (b"$FL3", "a compressed SPSS data file", ".zsav"),
         (b"\xff\xfe", "UTF-16 text", None), (b"\xfe\xff", "UTF-16 text", None))


#: The signature of the old binary Excel format (OLE2 compound file), which is not read.
_OLE2 = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"


def _utf16_without_bom(head: bytes) -> str | None:
    """'utf-16-le' or 'utf-16-be' when ``head`` reads as UTF-16 text of Latin letters with no
    byte-order mark (every other byte NUL, on one side), else None."""
    even, odd = head[0:len(head) - len(head) % 2:2], head[1:len(head) - len(head) % 2:2]
    if len(even) < 8:
        return None
    if odd.count(0) >= 0.9 * len(odd) and even.count(0) == 0:
        return "utf-16-le"
    if even.count(0) >= 0.9 * len(even) and odd.count(0) == 0:
        return "utf-16-be"
    return None


def _sniff(path: Path, suffix: str) -> str | None:
    """Refuse a file whose content is not what its name says, naming what it looks like; for
    a CSV file of UTF-16 text without a byte-order mark, return that encoding."""
    with open(path, "rb") as fh:
        head = fh.read(4096)
    if suffix in STAT_FORMATS and not head.startswith((b"PAR1", b"PK\x03\x04")):
        return None  # pyreadstat checks the file's own signature and says what is wrong
    if head.startswith(_OLE2):
        raise TrackerError(f"{path}: the file is an old-style Excel workbook (.xls), which is not read; open it "
                           f"and save it as .xlsx, or as CSV (UTF-8)")
    for magic, what, right in MAGIC:
        if head.startswith(magic):
            if right == suffix or (right == ".xlsx" and suffix == ".xlsm"):
                return None
            if right is None:
                raise TrackerError(f"{path}: the file is {what}; save it as UTF-8 CSV, or give --encoding utf-16")
            raise TrackerError(f"{path}: the file is {what} although its name ends in {suffix or 'nothing'}; "
                               f"rename it to end in {right}")
    if suffix in (".parquet", ".xlsx", ".xlsm"):
        what = "a Parquet file" if suffix == ".parquet" else "an XLSX workbook"
        raise TrackerError(f"{path}: the file is not {what} (its first bytes say otherwise); "
                           f"is it a CSV file with the wrong name?")
    utf16 = _utf16_without_bom(head)
    if utf16:
        return utf16
    if b"\x00" in head:
        raise TrackerError(f"{path}: the file holds binary data, not CSV text (a NUL byte in its first 4 KB)")
    if head.lstrip()[:1] in (b"{", b"["):
        raise TrackerError(f"{path}: the file looks like JSON, not CSV; export the wave as CSV, XLSX or Parquet")
    return None


def read_wave_file(path: str | Path, encoding: str | None = None, sheet: str | None = None,
                   header_row: int | None = None, decimal: str | None = None) -> WaveFile:
    """Read CSV (delimiter sniffed, UTF-8 with or without BOM by default, UTF-16 found
    without one), Parquet, XLSX, or a statistics package's file (SPSS .sav/.zsav/.por,
    Stata .dta, SAS .sas7bdat/.xpt, with its value labels: tracker.statfiles), within the
    bounds of :mod:`tracker.limits`.

    XLSX: ``sheet`` names the sheet (required when several hold data); ``header_row`` the
    spreadsheet row holding the column names (default: found as the first row that fills
    at least half the table's width with text)."""
    from .limits import MAX_FILE_BYTES, regular_file

    path = Path(path)
    st = regular_file(path, "a wave file", MAX_FILE_BYTES)
    if st.st_size == 0:
        raise TrackerError(f"{path}: the file is empty")
    try:
        sha = file_sha256(path)
    except OSError as exc:
        raise TrackerError(f"{path}: cannot be read ({(exc.strerror or str(exc)).lower()})") from None
    suffix = path.suffix.lower()
    found_encoding = None
    if not (encoding and suffix not in (".parquet", ".xlsx", ".xlsm", *STAT_FORMATS)):
        found_encoding = _sniff(path, suffix)
    problems: list[Problem] = []
    labels = None
    row_numbers = None
    if suffix == ".parquet":
        table, problems = _read_parquet(path)
        first_row = 1
    elif suffix in STAT_FORMATS:
        table, labels = read_stat_file(path)
        first_row = 1
    elif suffix in (".xlsx", ".xlsm"):
        table, row_numbers, problems = _read_xlsx(path, sheet, header_row)
        first_row = int(row_numbers[0]) if len(row_numbers) else 2
    else:
        table, row_numbers = _read_csv(path, encoding or found_encoding, decimal)
        first_row = int(row_numbers[0]) if len(row_numbers) else 2
        if found_encoding:
            problems.append(Problem("warning", "", f"read as {found_encoding.upper()} text (no byte-order mark)"))
    table.columns = [str(c).strip() for c in table.columns]
    table = _by_position(table)
    if table.shape[1] == 0:
        raise TrackerError(f"{path}: the file has no columns")
    if len(table) == 0:
        raise TrackerError(f"{path}: the file has a header but no respondents")
    if row_numbers is not None and len(row_numbers) != len(table):
        row_numbers = None  # numbered by position then, from first_row
    return WaveFile(path, table, first_row, sha, problems, labels=labels, row_numbers=row_numbers)


#: A number written with a decimal comma (1,25 or -0,5): read with --decimal ,.
DECIMAL_COMMA = r"^\s*(-?\d+),(\d+)\s*$"


def _decimal_hint(example: str) -> str:
    """For a number that failed to read: the cause, when it is a decimal comma."""
    if re.fullmatch(DECIMAL_COMMA, example):
        return "; the file writes decimals with a comma: give --decimal , (or save the file with decimal points)"
    return ""


#: Control characters (C0, DEL, C1): never part of an id or a design label.
_CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f]")

#: The names pandas gives a stored index that has no name of its own (row numbers, not answers).
_UNNAMED_INDEX = re.compile(r"__index_level_\d+__")


def _read_parquet(path: Path) -> tuple[pd.DataFrame, list[Problem]]:
    """A Parquet file's columns by their names, every cell as text. Whatever pandas stored as
    the index is never used to place rows: an unnamed index (the row numbers of a filtered
    frame) is dropped, a named one is read as the ordinary column it is, and the rows keep
    the order in which they are stored."""
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    try:
        names = pq.read_schema(path).names
    except Exception:  # noqa: BLE001 - pyarrow raises many types for a broken file; reading says which
        names = []
    from .limits import MAX_COLUMNS

    if len(names) > MAX_COLUMNS:
        raise TrackerError(f"{path}: the file has {len(names):,} columns, more than {MAX_COLUMNS:,}; is this a wave "
                           f"file?")
    twice = _twice(names)
    if twice:
        raise TrackerError(f"{path}, column {twice[0]}: the column name appears more than once")
    try:
        arrow = pq.read_table(path)
    except Exception as exc:  # noqa: BLE001 - pyarrow raises many types for a broken file
        text = str(exc)
        if "duplicate" in text.lower():
            raise TrackerError(f"{path}: a column name appears more than once; every column needs its own "
                               f"name") from None
        raise TrackerError(f"{path}: cannot be read as Parquet ({text.splitlines()[0][:200]})") from None
    meta = arrow.schema.pandas_metadata or {}
    stored_index = [c for c in meta.get("index_columns", []) if isinstance(c, str)]
    dropped = [c for c in stored_index if _UNNAMED_INDEX.fullmatch(c)]
    problems = [Problem("warning", c, "stored as the file's index (pandas' to_parquet): read as an ordinary "
                                      "column") for c in stored_index if c not in dropped]
    arrow = arrow.drop_columns(dropped) if dropped else arrow
    for name, kind in zip(arrow.column_names, arrow.schema.types):
        if pa.types.is_binary(kind) or pa.types.is_large_binary(kind) or pa.types.is_fixed_size_binary(kind):
            try:
                pc.cast(arrow[name], pa.string())
            except Exception:  # noqa: BLE001 - pyarrow says ArrowInvalid for bytes that are not UTF-8
                raise TrackerError(f"{path}, column {name}: binary data that is not UTF-8 text; store the "
                                   f"column as text (string) or numbers") from None
    return _typed_frame(arrow), problems


def _typed_frame(arrow) -> pd.DataFrame:
    """An Arrow table as the checks read it, never through text where the type allows: whole
    numbers, floats and booleans (with no missing cells) as numpy numbers, text as Arrow text
    (missing as ''), anything else (dates, decimals, binary text) as plain text."""
    import pyarrow as pa
    import pyarrow.compute as pc

    columns = {}
    for name, col in zip(arrow.column_names, arrow.columns):
        kind = col.type
        if pa.types.is_floating(kind) or ((pa.types.is_integer(kind) or pa.types.is_boolean(kind))
                                          and col.null_count == 0):
            values = col.to_numpy()
            columns[name] = pd.Series(values.astype(np.int64) if pa.types.is_boolean(kind) else values)
        elif pa.types.is_integer(kind):
            columns[name] = pd.Series(col.to_numpy().astype(float))  # with missing cells: floats, NaN where blank
        elif pa.types.is_string(kind) or pa.types.is_large_string(kind):
            columns[name] = pd.Series(pd.arrays.ArrowExtensionArray(pc.fill_null(col, "").cast(pa.string())))
        else:
            # by name and position only: ignore_metadata keeps pandas from restoring a stored index
            columns[name] = plain_text(pa.table({name: col}).to_pandas(ignore_metadata=True)[name])
    return pd.DataFrame(columns, columns=arrow.column_names, copy=False)


def _xlsx_within_bounds(path: Path, sheet: str | None) -> None:
    """Refuse a workbook too large to load whole, from its zip directory and by streaming its
    rows (read-only: a few rows in memory at a time) before anything is built."""
    import zipfile

    from openpyxl import load_workbook

    from .limits import MAX_COLUMNS, MAX_XLSX_CELLS, MAX_XLSX_UNPACKED

    try:
        with zipfile.ZipFile(path) as z:
            unpacked = sum(i.file_size for i in z.infolist())
    except (zipfile.BadZipFile, OSError, ValueError) as exc:
        raise TrackerError(f"{path}: cannot be read as XLSX ({str(exc)[:200]})") from None
    if unpacked > MAX_XLSX_UNPACKED:
        raise TrackerError(f"{path}: the workbook unpacks to {unpacked / (1 << 30):.1f} GiB, more than "
                           f"{MAX_XLSX_UNPACKED >> 30} GiB; deliver a wave this large as CSV or Parquet")
    try:
        book = load_workbook(path, read_only=True, data_only=True)
    except Exception as exc:  # noqa: BLE001 - openpyxl raises many types for a broken workbook
        raise TrackerError(f"{path}: cannot be read as XLSX ({str(exc)[:200]})") from None
    try:
        sheets = [book[sheet]] if sheet in book.sheetnames else book.worksheets
        for ws in sheets:
            cells = 0
            for row in ws.iter_rows(values_only=True):  # streamed: the declared size can lie
                if len(row) > MAX_COLUMNS:
                    raise TrackerError(f"{path}, sheet {ws.title}: more than {MAX_COLUMNS:,} columns; is this a "
                                       f"wave file?")
                cells += len(row)
                if cells > MAX_XLSX_CELLS:
                    raise TrackerError(f"{path}, sheet {ws.title}: more than {MAX_XLSX_CELLS:,} cells, more than "
                                       f"a workbook is read for; deliver a wave this large as CSV or Parquet")
    finally:
        book.close()


def _read_xlsx(path: Path, sheet: str | None, header_row: int | None):
    """One sheet of a workbook as text cells, refusing what would silently lose data:
    merged cells, formulas with no stored result, data on a sheet not chosen."""
    from openpyxl import load_workbook

    _xlsx_within_bounds(path, sheet)
    try:
        book = load_workbook(path, data_only=True)
        formulas = load_workbook(path, data_only=False)
    except Exception as exc:  # noqa: BLE001 - a foreign file's reader may raise any type; the message names it
        raise TrackerError(f"{path}: cannot be read as XLSX ({str(exc)[:200]})") from None
    sheet = _xlsx_sheet(path, book, sheet)
    ws = book[sheet]
    # rows from the sheet's first row, so that rows[i] is sheet row i + 1
    rows = [list(r) for r in ws.iter_rows(min_row=1, values_only=True)]
    _xlsx_refusals(path, sheet, ws, formulas[sheet])
    header_row = _xlsx_header_row(path, sheet, rows, header_row)
    header = rows[header_row - 1] if rows else []
    keep = [j for j, v in enumerate(header) if v is not None and str(v).strip() != ""]
    numbered = [(header_row + 1 + i, [r[j] if j < len(r) else None for j in keep])
                for i, r in enumerate(rows[header_row:])]
    numbered = [(n, r) for n, r in numbered if any(v is not None and str(v).strip() != "" for v in r)]
    body = [r for _, r in numbered]
    names = [str(header[j]).strip() for j in keep]
    dupes = _twice(names)
    if dupes:
        raise TrackerError(f"{path}, sheet {sheet}, column {dupes[0]}: the column name appears more than once")
    table = pd.DataFrame(body, columns=names, dtype=object)
    table = pd.DataFrame({c: _xlsx_column(table[c]) for c in table.columns}, columns=table.columns)
    problems = [Problem("warning", "", f"sheet {sheet}: column names read from row {header_row}; rows above it "
                                       f"left out")] if header_row > 1 else []
    problems += _xlsx_hidden_rows(sheet, ws, rows, header_row)
    return table, np.array([n for n, _ in numbered], dtype=np.int64), problems


def _xlsx_column(values: pd.Series) -> pd.Series:
    """A sheet's column: floats when every filled cell holds a number (never through text),
    else every cell as text ('' where empty)."""
    filled = values[values.notna()]
    if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in filled):
        return values.astype(float)
    return values.where(values.notna(), "").map(lambda v: v if isinstance(v, str) else plain(v))


def _xlsx_sheet(path: Path, book, sheet: str | None) -> str:
    """The sheet to read: the one named, or the only one holding data."""
    filled = [ws.title for ws in book.worksheets
              if ws.max_row > 1 or ws.max_column > 1 or ws.cell(1, 1).value is not None]
    if sheet is None:
        if len(filled) > 1:
            raise TrackerError(f"{path}: {len(filled)} sheets hold data ({', '.join(filled)}); choose one with --sheet")
        if not filled:
            raise TrackerError(f"{path}: every sheet is empty")
        return filled[0]
    if sheet not in book.sheetnames:
        raise TrackerError(f"{path}: no sheet named {sheet!r} (sheets: {', '.join(book.sheetnames)})")
    return sheet


def _xlsx_refusals(path: Path, sheet: str, ws, formulas) -> None:
    """Merged cells, and formulas whose result the file does not store, are refused."""
    from openpyxl.utils import get_column_letter

    if ws.merged_cells.ranges:
        shown = ", ".join(str(r) for r in list(ws.merged_cells.ranges)[:5])
        raise TrackerError(f"{path}, sheet {sheet}: merged cells ({shown}); unmerge them so that every respondent "
                           f"has their own value")
    lost = [f"{get_column_letter(c.column)}{c.row}" for r in formulas.iter_rows() for c in r
            if c.data_type == "f" and ws.cell(c.row, c.column).value is None]
    if lost:
        raise TrackerError(f"{path}, sheet {sheet}: {len(lost)} formula cell(s) have no stored value (e.g. "
                           f"{', '.join(lost[:5])}); open the file in a spreadsheet program and save it, or paste "
                           f"the values")


def _xlsx_header_row(path: Path, sheet: str, rows: list[list], header_row: int | None) -> int:
    """The header's row: the one given, or the first row of text at least half as wide as the
    widest row (titles and notes above a table are skipped)."""
    width = max((sum(v is not None for v in r) for r in rows), default=0)
    if header_row is None:
        return next((i + 1 for i, r in enumerate(rows)
                     if sum(isinstance(v, str) and v.strip() != "" for v in r) >= max(1, width / 2)
                     and all(v is None or isinstance(v, str) for v in r)), 1)
    if not 1 <= header_row <= len(rows):
        raise TrackerError(f"{path}, sheet {sheet}: --header-row {header_row} is outside rows 1 to {len(rows)}")
    return header_row


def _xlsx_hidden_rows(sheet: str, ws, rows: list[list], header_row: int) -> list[Problem]:
    """Rows hidden in the sheet are read like any other: a warning names them."""
    hidden = [r for r, dim in ws.row_dimensions.items() if dim.hidden and header_row < r <= len(rows)
              and any(v is not None and str(v).strip() != "" for v in rows[r - 1])]
    if not hidden:
        return []
    shown = ", ".join(str(r) for r in sorted(hidden)[:MAX_EXAMPLES])
    more = f" (and {len(hidden) - MAX_EXAMPLES} more)" if len(hidden) > MAX_EXAMPLES else ""
    return [Problem("warning", "", f"sheet {sheet}: {len(hidden)} row(s) are hidden in the sheet "
                                   f"(rows {shown}{more}); they are read like every other row: if the "
                                   f"sender hid respondents to leave them out, delete those rows")]


def _by_position(table: pd.DataFrame) -> pd.DataFrame:
    """The table with rows numbered 0..n-1: every check and the harmonized table line rows up
    by position, so no index carried from a reader can move an answer to another row."""
    if table.index.equals(pd.RangeIndex(len(table))):
        return table
    return table.reset_index(drop=True)


def _twice(names: list[str]) -> list[str]:
    """The names that appear more than once (in one pass: headers can be wide)."""
    from collections import Counter

    return sorted(n for n, k in Counter(names).items() if k > 1)


def _record_lines(text: str, delimiter: str) -> list[tuple[int, int]]:
    """(the line a record starts on, its number of fields) of every non-blank record: the file's
    own line numbers, whatever blank lines or quoted line breaks come before."""
    reader = csv.reader(io.StringIO(text), delimiter=delimiter)
    out, start = [], 1
    for record in reader:
        if record:
            out.append((start, len(record)))
        start = reader.line_num + 1
    return out


def _read_csv(path: Path, encoding: str | None, decimal: str | None = None) -> tuple[pd.DataFrame, np.ndarray]:
    """A delimited text file as text cells: decoded (:func:`_decode`), its delimiter sniffed,
    its header checked (:func:`_csv_header`), every row as wide as the header. With
    ``decimal=','`` a number written with a decimal comma (1,25) is read as 1.25."""
    if decimal not in (None, ".", ","):
        raise TrackerError(f"decimal {decimal}: give . or ,")
    fast = _read_csv_arrow(path, encoding, decimal)
    if fast is not None:
        return fast
    text = _decode(path, encoding)
    first = text[: text.find("\n")] if "\n" in text else text
    sample = text[: max(65536, len(first) + 1)]
    try:
        delimiter = csv.Sniffer().sniff(sample[:65536], delimiters=",;\t|").delimiter
    except csv.Error:
        delimiter = ","
    names, blank_tail = _csv_header(path, first, sample, delimiter)
    widths = _record_lines(text, delimiter)
    want = widths[0][1] if widths else 0
    odd = [(i, n) for i, n in widths if n != want]
    if odd:
        shown = ", ".join(f"line {i} ({n})" for i, n in odd[:5])
        raise TrackerError(f"{path}: {len(odd)} row(s) do not have the header's {want} fields: {shown}; a row cut "
                           f"short or a stray delimiter would shift answers between columns")
    try:
        # in one piece: read in chunks, a wide file becomes one text array per column per chunk
        table = pd.read_csv(io.StringIO(text), sep=delimiter, dtype=str, keep_default_na=False,
                            skip_blank_lines=True, low_memory=False)
    except (pd.errors.ParserError, csv.Error) as exc:
        raise TrackerError(f"{path}: cannot be read as CSV ({str(exc)[:200]})") from None
    if blank_tail:  # empty columns after the last named one (a spreadsheet's export): ignored when empty
        tail = list(table.columns[len(names) - blank_tail:])
        if (table[tail] == "").all().all():
            table = table.drop(columns=tail)
    if decimal == ",":
        if delimiter == ",":
            raise TrackerError(f"{path}: --decimal ,: the columns are separated by commas too, so a comma cannot "
                               f"also be the decimal mark")
        table = table.apply(lambda col: col.str.replace(DECIMAL_COMMA, r"\1.\2", regex=True))
    return table, np.array([line for line, _ in widths[1:]], dtype=np.int64)


#: Wider files go to the careful reader: a table of tens of thousands of Arrow columns costs
#: more to build than the careful reader spends on a wide file's few rows. Also the width up
#: to which check_wave takes each checked column out of the file's table.
ARROW_MAX_COLUMNS = 2000


def _read_csv_arrow(path: Path, encoding: str | None, decimal: str | None) -> tuple[pd.DataFrame, np.ndarray] | None:
    """The common case at the speed of the file: UTF-8 text with LF or CRLF line ends parsed
    by pyarrow, every column as Arrow text (so the checks see what the file says, as with
    the careful reader), rows numbered by the file's own lines. None when the file needs the
    careful reader of :func:`_read_csv`, which then says what is wrong: another encoding,
    lone CR line ends, bytes that are not UTF-8, a row of another width than the header."""
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.csv as pcsv

    if encoding not in (None, "utf-8", "utf8", "utf-8-sig"):
        return None
    raw = path.read_bytes()
    if raw.count(b"\r") != raw.count(b"\r\n") or not raw.strip():
        return None
    end = raw.find(b"\n")
    first_raw = raw[: end if end >= 0 else len(raw)].rstrip(b"\r")
    if not first_raw.strip() or first_raw.count(b'"') % 2:
        return None  # no header on the first line, or a header broken over lines: the careful reader
    try:
        first = first_raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        return None
    sample = raw[: max(65536, len(first_raw) + 1)].decode("utf-8", errors="ignore").removeprefix("\ufeff")
    try:
        delimiter = csv.Sniffer().sniff(sample[:65536], delimiters=",;\t|").delimiter
    except csv.Error:
        delimiter = ","
    names, blank_tail = _csv_header(path, first, sample, delimiter)
    if len(names) > ARROW_MAX_COLUMNS:
        return None
    if decimal == "," and delimiter == ",":
        raise TrackerError(f"{path}: --decimal ,: the columns are separated by commas too, so a comma cannot "
                           f"also be the decimal mark")
    keys = [f"c{i}" for i in range(len(names))]
    odd: list = []

    def wrong_width(row) -> str:
        odd.append(row)
        return "skip"

    quoted = b'"' in raw
    try:
        arrow = pcsv.read_csv(
            pa.BufferReader(raw),
            read_options=pcsv.ReadOptions(skip_rows=1, column_names=keys, block_size=max(1 << 24, 4 * len(first_raw))),
            parse_options=pcsv.ParseOptions(delimiter=delimiter, newlines_in_values=quoted,
                                            invalid_row_handler=wrong_width),
            convert_options=pcsv.ConvertOptions(column_types={k: pa.string() for k in keys}, strings_can_be_null=False,
                                                quoted_strings_can_be_null=False))
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return None
    if odd:
        return None
    columns = {}
    for key, name in zip(keys, names):
        col = arrow[key]
        if decimal == ",":
            col = pc.replace_substring_regex(col, pattern=DECIMAL_COMMA, replacement=r"\1.\2")
        columns[name or key] = pd.Series(pd.arrays.ArrowExtensionArray(col))
    table = pd.DataFrame(columns)
    if blank_tail:  # empty columns after the last named one (a spreadsheet's export): ignored when empty
        tail = list(table.columns[len(names) - blank_tail:])
        if all(bool(pc.all(pc.equal(arrow[keys[len(names) - blank_tail + j]], "")).as_py() is not False)
               for j in range(blank_tail)):
            table = table.drop(columns=tail)
        else:
            return None
    lines = _filled_lines(raw)
    if len(lines) - 1 != len(table):
        # a quoted answer holds a line break: each record's first line, by the careful reader
        lines = np.array([line for line, _ in _record_lines(raw.decode("utf-8-sig"), delimiter)], dtype=np.int64)
    return table, lines[1:]


def _filled_lines(raw: bytes) -> np.ndarray:
    """The numbers (from 1) of the lines of ``raw`` that hold anything (LF or CRLF line ends).
    Where no answer holds a line break, these are the header's line and each record's."""
    buf = np.frombuffer(raw, dtype=np.uint8)
    breaks = np.flatnonzero(buf == 10)
    starts = np.concatenate([[0], breaks + 1])
    ends = np.append(breaks, buf.size)
    cr = np.zeros(ends.size, dtype=bool)
    inside = ends > starts
    cr[inside] = buf[ends[inside] - 1] == 13
    return np.flatnonzero(ends - starts - cr > 0) + 1


def _decode(path: Path, encoding: str | None) -> str:
    """The file's text in the encoding given (UTF-8 by default, its byte-order mark dropped),
    with old Mac line ends (CR alone) read as line ends; a byte that does not decode is named
    by its line."""
    raw = path.read_bytes()
    enc = encoding or "utf-8-sig"
    try:
        text = raw.decode(enc)
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise TrackerError(
            f"{path}: line {line}: byte 0x{raw[exc.start]:02x} is not valid {enc} text; "
            "give the file's encoding with --encoding (for example --encoding latin-1)"
        ) from None
    except LookupError:
        raise TrackerError(f"{path}: unknown encoding {enc!r}") from None
    del raw
    text = text.removeprefix("\ufeff")
    if not text.strip():
        raise TrackerError(f"{path}: the file is empty")
    if "\n" not in text and "\r" in text:
        text = text.replace("\r", "\n")  # line ends of old Mac software: CR alone
    return text


def _csv_header(path: Path, first: str, sample: str, delimiter: str) -> tuple[list[str], int]:
    """The header's names and how many empty names end it; refuses too many columns, columns
    separated by spaces, and a name given twice."""
    from .limits import MAX_COLUMNS

    if first.count(delimiter) + 1 > MAX_COLUMNS:
        raise TrackerError(f"{path}: the header has more than {MAX_COLUMNS:,} columns; is this a wave file?")
    csv.field_size_limit(1 << 30)  # a long free-text answer is an answer, not an error
    header = next(csv.reader(io.StringIO(first), delimiter=delimiter), [])
    names = [h.strip() for h in header]
    if len(names) == 1 and " " in first.strip():
        lines = [ln.split() for ln in sample.splitlines()[:20] if ln.strip()]
        if len(lines) > 1 and len(lines[0]) > 1 and all(len(ln) == len(lines[0]) for ln in lines):
            raise TrackerError(f"{path}: the columns are separated by spaces, which answers can also hold; save the "
                               f"file with commas, semicolons or tabs between columns")
    blank_tail = 0
    while blank_tail < len(names) and names[len(names) - 1 - blank_tail] == "":
        blank_tail += 1
    dupes = _twice(names[: len(names) - blank_tail])
    if dupes:
        shown = dupes[0] or "(a blank name)"
        raise TrackerError(f"{path}, column {shown}: the column name appears more than once in the header")
    return names, blank_tail


def wave_in_span(label: str, first: str | None, last: str | None, order: dict[str, str]) -> bool:
    """Whether wave ``label`` lies within [first, last].

    Waves are ordered by fieldwork date when both labels are known to the study; otherwise
    their labels are compared as text (which orders labels such as 2025-Q1 or 2025-09).
    """
    def before(a: str, b: str) -> bool:
        if a in order and b in order:
            return order[a] < order[b]
        return a < b

    if first is not None and label != first and before(label, first):
        return False
    return not (last is not None and label != last and before(last, label))


def _rows(mask: np.ndarray, first_row: int, row_numbers=None) -> tuple[tuple[int, ...], int]:
    """The first rows of ``mask`` as the file numbers them, and how many there are."""
    idx = np.flatnonzero(mask)
    if row_numbers is not None:
        return tuple(int(row_numbers[i]) for i in idx[:MAX_EXAMPLES]), int(idx.size)
    return tuple(int(i) + first_row for i in idx[:MAX_EXAMPLES]), int(idx.size)


class _Found:
    """The problems found in one wave file, each with its rows (as the file numbers them)."""

    def __init__(self, first_row: int, row_numbers=None):
        self.first_row, self.row_numbers = first_row, row_numbers
        self.problems: list[Problem] = []

    def __call__(self, sev: str, col: str, msg: str, mask=None) -> None:
        rows, count = _rows(mask, self.first_row, self.row_numbers) if mask is not None else ((), 0)
        self.problems.append(Problem(sev, col, msg, rows, count))


def check_wave(codebook: Codebook, wf: WaveFile, label: str, order: dict[str, str],
               rake: bool = False) -> tuple[pd.DataFrame, list[Problem]]:
    """Apply aliases and recodes, check every rule, and return (harmonized table, problems).

    The harmonized table has one column per codebook variable (one per option of a multi
    variable) under its codebook name, codes as floats (blank = NaN), plus the id, weight,
    strata and clusters columns. The rules, in the order their messages come: the header
    (:func:`_header_rules`), the columns each variable reads (:func:`_sources`), the design
    columns (:func:`_design_rules`), the variables (:func:`_variable_rules`). The variables'
    columns are taken out of ``wf.table`` as they are checked (a large wave is not held twice).
    """
    table = _by_position(wf.table)
    add = _Found(wf.first_row, wf.row_numbers)
    if wf.path.suffix.lower() == ".por":
        table = _names_without_case(codebook, table, add)
    if not _header_rules(list(table.columns), add):
        return pd.DataFrame(), add.problems
    source, claimed = _sources(codebook, table, add)
    out: dict[str, pd.Series] = {}
    if len(table.columns) == 1:
        add("error", table.columns[0], "the header was read as a single column; is the delimiter right?")
    _design_rules(codebook, table, rake, out, add)
    known = set(source.values()) | set(codebook.design_columns())
    known |= {c for found in claimed.values() for c in found}
    extra = [c for c in table.columns if c not in known]
    present = _variable_rules(codebook, table, label, order, source, extra, out, add, set(claimed))
    if extra:
        shown = ", ".join(extra[:10]) + (" ..." if len(extra) > 10 else "")
        add.problems.append(Problem("warning", "", f"{len(extra)} column(s) not in the codebook are left out: {shown}"))
    design = [c for c in codebook.design_columns() if c in out]
    # copy=False: the columns are not copied into one block (a large wave would be held twice)
    harmonized = pd.DataFrame({c: out[c] for c in design + present}, index=table.index, copy=False)
    harmonized = harmonized.reset_index(drop=True)
    return harmonized, add.problems


def _names_without_case(codebook: Codebook, table: pd.DataFrame, add: _Found) -> pd.DataFrame:
    """An SPSS portable file stores its names in capitals (SPSS names ignore case): each
    codebook name the file holds only in another case is read under the codebook's spelling."""
    wanted = [*codebook.design_columns()]
    for v in codebook.variables.values():
        wanted += list(v.options) if v.type == "multi" else [v.name, *v.aliases]
    by_upper: dict[str, list[str]] = {}
    for c in table.columns:
        by_upper.setdefault(str(c).upper(), []).append(c)
    renames = {}
    for name in wanted:
        found = by_upper.get(name.upper(), [])
        if name not in table.columns and len(found) == 1:
            renames[found[0]] = name
    if renames:
        add("warning", "", f"{len(renames)} column name(s) matched to the codebook without regard to case (an SPSS "
                           f"portable file stores names in capitals)")
    return table.rename(columns=renames)


def _header_rules(cols: list, add: _Found) -> bool:
    """Each column name once in the header; False when the file cannot be read on."""
    dupes = _twice(cols)
    for c in dupes:
        add("error", c, "the column name appears more than once in the header")
    return not dupes


def _sources(codebook: Codebook, table: pd.DataFrame, add: _Found) -> tuple[dict[str, str], dict[str, list[str]]]:
    """Which file column feeds each codebook column (aliases resolved), and the variables
    that more than one present column claims (an error)."""
    source: dict[str, str] = {}
    claimed: dict[str, list[str]] = {}
    for v in codebook.variables.values():
        if v.type == "multi":
            for opt in v.options:
                if opt in table.columns:
                    source[opt] = opt
            continue
        found = [c for c in (v.name, *v.aliases) if c in table.columns]
        if len(found) > 1:
            claimed[v.name] = found
        elif found:
            source[v.name] = found[0]
    for vname, found in claimed.items():
        add("error", ", ".join(found), f"these columns all map to variable {vname} (its name and aliases); keep one")
    return source, claimed


def _design_rules(codebook: Codebook, table: pd.DataFrame, rake: bool, out: dict, add: _Found) -> None:
    """The id, weight, strata and clusters columns: present and well formed."""
    for role, col in (("id", codebook.id), ("weight", codebook.weight),
                      ("strata", codebook.strata), ("clusters", codebook.clusters)):
        if col is None:
            continue
        if col not in table.columns:
            if not (role == "weight" and (rake or codebook.rake.get("always"))):
                add("error", col, f"the {role} column is missing")
            continue
        cells = read_column(table[col])
        if role == "weight":
            out[col] = _weight_rules(col, cells, add)
        else:
            out[col] = _label_column_rules(role, col, cells, add)
    for col in (codebook.replicates.columns if codebook.replicates else ()):
        if col not in table.columns:
            add("error", col, "the replicate weight column is missing")
            continue
        out[col] = _replicate_rules(col, read_column(table[col]), add)


def _numbers_or_errors(col: str, cells: FileColumn, what: str, add: _Found) -> np.ndarray:
    """A column that must hold a number in every row: its numbers, with an error for blank
    cells and for text (naming a decimal comma when that is the cause)."""
    if cells.blank.any():
        add("error", col, f"blank {what}", cells.blank)
    text = cells.not_numbers
    if text.any():
        example = cells.example(text)
        add("error", col, f"{what} is not a number (e.g. {example!r}){_decimal_hint(example)}", text)
    return cells.numbers


def _replicate_rules(col: str, cells: FileColumn, add: _Found) -> pd.Series:
    """A replicate weight: a finite number of 0 or more (a jackknife replicate gives the
    respondents it leaves out a weight of 0)."""
    num = _numbers_or_errors(col, cells, "replicate weight", add)
    bad = ~np.isnan(num) & ~(np.isfinite(num) & (num >= 0) & (num <= MAX_WEIGHT))
    if bad.any():
        add("error", col, "replicate weight is negative, not finite or above 1e12", bad)
    return pd.Series(num)


def _weight_rules(col: str, cells: FileColumn, add: _Found) -> pd.Series:
    """A weight: present, a positive finite number, within bounds; the numbers."""
    num = _numbers_or_errors(col, cells, "weight", add)
    nonpos = ~np.isnan(num) & ~(num > 0)
    if nonpos.any():
        add("error", col, "weight is zero or negative", nonpos)
    inf = np.isinf(num)
    if inf.any():
        add("error", col, "weight is not finite", inf)
    huge = np.isfinite(num) & (num > MAX_WEIGHT)
    if huge.any():
        add("error", col, f"weight above {MAX_WEIGHT:.0e} (sums of squares would overflow)", huge)
    fine = np.isfinite(num) & (num > 0) & ~huge
    if fine.any() and num[fine].max() > MAX_WEIGHT_RATIO * num[fine].min():
        ratio = num[fine].max() / num[fine].min()
        add("error", col, f"the largest weight is {ratio:,.3g} times the smallest (over "
                          f"{MAX_WEIGHT_RATIO:,.0f}): a scaling slip or a broken weight; the rows are the "
                          f"largest", fine & (num == num[fine].max()))
    return pd.Series(num)


def _label_column_rules(role: str, col: str, cells: FileColumn, add: _Found) -> pd.Series:
    """An id, stratum or cluster column: no blanks, no control characters, finite strata and
    clusters, each id once; the values as text. Searched by Arrow, a column at a time."""
    import pyarrow as pa
    import pyarrow.compute as pc

    values, blank = cells.text, cells.blank
    if blank.any():
        add("error", col, f"blank {role}", blank)
    arr = pa.array(values, type=pa.string())
    control = pc.match_substring_regex(arr, _CONTROL.pattern).to_numpy(zero_copy_only=False).astype(bool)
    if control.any():
        code = next(c for c in values[control].iloc[0] if _CONTROL.match(c))
        add("error", col, f"{role} value(s) hold the control character U+{ord(code):04X} (a NUL byte, "
                          f"an escape sequence or the like): a damaged export?", control)
    if role in ("strata", "clusters"):
        word = pc.utf8_ltrim(pc.utf8_lower(arr), characters="+-")
        endless = pc.is_in(word, value_set=pa.array(["inf", "infinity", "nan"])).to_numpy(
            zero_copy_only=False).astype(bool)
        if endless.any():
            add("error", col, f"{role} {values[endless].iloc[0]!r} is not a finite number", endless)
    if role == "id":
        dup = values.duplicated(keep=False).to_numpy() & ~blank
        if dup.any():
            add("error", col, f"{values[dup].nunique()} id(s) appear more than once (e.g. {values[dup].iloc[0]!r})",
                dup)
    return values


def _missing_hint(v: Variable, extra: list[str]) -> str:
    """For a missing column: a present column that may be it under a new name."""
    if v.type == "multi":
        return ""
    near = ([c for c in extra if v.name.lower() in c.lower() or c.lower() in v.name.lower()]
            or (difflib.get_close_matches(v.name, extra, n=1, cutoff=0.6) if len(extra) <= 5000 else []))
    return (f"; is column {near[0]!r} this variable under a new name? then add it to the "
            f"variable's aliases") if near else ""


def _variable_rules(codebook: Codebook, table: pd.DataFrame, label: str, order: dict[str, str],
                    source: dict[str, str], extra: list[str], out: dict, add: _Found,
                    claimed: frozenset[str] | set[str] = frozenset()) -> list[str]:
    """Every variable: present when the codebook expects it in this wave, each column's
    values checked and recoded (:func:`_check_column`); the harmonized columns in order."""
    present_cols: list[str] = []
    hinted = 0
    for v in codebook.variables.values():
        if v.name in claimed:  # several columns map to it: said once, by _sources
            continue
        expected = wave_in_span(label, v.first_wave, v.last_wave, order)
        file_cols = list(v.options) if v.type == "multi" else [v.name]
        present = [c for c in file_cols if c in source]
        if not present:
            if expected:
                hinted += 1
                what = f"option columns {', '.join(v.options)}" if v.type == "multi" else "column"
                alias = f" (or an alias: {', '.join(v.aliases)})" if v.aliases else ""
                # hints for the first few: a wide file stays fast
                hint = _missing_hint(v, extra) if hinted <= 10 else ""
                add("error", v.name, f"required {what}{alias} is missing for variable {v.name}{hint}")
            continue
        if v.type == "multi" and len(present) < len(file_cols):
            lost = [c for c in file_cols if c not in present]
            add("error", ", ".join(lost), f"option column(s) of {v.name} missing")
            continue
        if not expected:
            span = f"{v.first_wave or '...'} to {v.last_wave or '...'}"
            add("warning", v.name, f"present although the codebook says it exists only in waves {span}; kept")
        for c in file_cols:
            if source[c] != c:
                add("warning", source[c], f"read as {c} (an alias in the codebook)")
            # taken out of the file's table once read, so a long wave is not held twice (a pop
            # costs a pass over the columns: a very wide file keeps its few rows instead)
            cells = table.pop(source[c]) if table.shape[1] <= ARROW_MAX_COLUMNS else table[source[c]]
            out[c] = _check_column(v, c, read_column(cells), label, add)
            present_cols.append(c)
    return present_cols


def _check_column(v: Variable, col: str, cells: FileColumn, label: str, add) -> pd.Series:
    blank = cells.blank
    if blank.all() and v.type != "multi":  # a multi option nobody ticked may be all blank
        add("error", col, "the column is blank in every row (a lost export or a wrong sheet?)")
    if v.type == "text":
        return cells.text
    num = cells.numbers.copy() if any(label in rc.waves for rc in v.recode) else cells.numbers
    text = cells.not_numbers
    if text.any():
        example = cells.example(text)
        add("error", col, f"text where a number belongs (e.g. {example!r}){_decimal_hint(example)}", text)
    ok = ~np.isnan(num)
    if v.type == "multi":
        bad = ok & ~np.isin(num, (0.0, 1.0))
        if bad.any():
            add("error", col, f"an option column holds only 0, 1 or blank (found {_fmt_code(num[bad][0])})", bad)
        return pd.Series(num)
    if v.type == "number":
        if v.range is not None:
            lo, hi = v.range
            out_rng = ok & ((num < lo) | (num > hi))
            if out_rng.any():
                add("error", col, f"value outside the range [{lo:g}, {hi:g}] (e.g. {num[out_rng][0]:g})", out_rng)
        return pd.Series(num)
    # category / scale: recode first, then every value must be a code or a missing code
    for rc in v.recode:
        if label in rc.waves:
            old = num.copy()
            done = []
            for a, b in rc.map.items():
                hit = old == a
                num[hit] = b
                if hit.any():
                    done.append(f"code {_fmt_code(a)} -> {_fmt_code(b)} in {int(hit.sum()):,} row(s)")
            if done:  # said, so that a recode is never silent
                add("warning", col, f"recoded as the codebook says for {label}: {'; '.join(done)}")
    allowed = np.array(sorted(set(v.codes) | set(v.missing)), dtype=float)
    unknown = ok & ~np.isin(num, allowed)
    if unknown.any():
        codes = sorted(set(num[unknown].tolist()))
        shown = ", ".join(_fmt_code(c) for c in codes[:5])
        hint = ""
        scoped = sorted({w for rc in v.recode if set(codes) & set(rc.map) for w in rc.waves})
        if scoped and label not in scoped:
            hint = f" (the codebook recodes it in waves {', '.join(scoped)}; is the wave label right?)"
        add("error", col, f"code(s) {shown} not in the codebook for {v.name}{hint}", unknown)
    return pd.Series(num)
