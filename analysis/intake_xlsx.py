"""XLSX workbook -> Grid, values only.

Owns the checks made before openpyxl touches the bytes (a real zip, an Excel
workbook inside, plausible uncompressed size and compression ratio: zip
bombs are refused from the zip directory alone) and the read itself with
``read_only=True, data_only=True, keep_links=False``: cached values only,
formulas never evaluated, external links never followed.
"""

from __future__ import annotations

import io
import zipfile

import numpy as np
import pandas as pd

from analysis.intake_layout import (
    Grid,
    IntakeError,
    column_letter,
    column_names,
    find_header,
    find_units_row,
    guess_decimal,
    is_comment_row,
    one_line,
)
from analysis.intake_cells import MISSING_MARKERS

MAX_MEMBERS = 10_000
MAX_RATIO = 200  # deflate tops out near 1000:1; real sheet XML compresses about 5-30:1 (common practice)
RATIO_CHECK_FROM = 1024 * 1024
SAMPLE_ROWS = 200


def check_zip(raw: bytes, filename: str, max_bytes: int) -> None:
    """Refuse anything that is not a plausible XLSX, reading only the zip directory."""
    try:
        archive = zipfile.ZipFile(io.BytesIO(raw))
        infos = archive.infolist()
    except (zipfile.BadZipFile, zipfile.LargeZipFile, ValueError, EOFError, OSError, NotImplementedError):
        raise IntakeError(f"{filename}: is not a valid XLSX file (the zip container is damaged or missing).") from None
    names = {i.filename for i in infos}
    if len(infos) > MAX_MEMBERS:
        raise IntakeError(f"{filename}: the XLSX container holds {len(infos)} parts, more than {MAX_MEMBERS}; refused.")
    if "[Content_Types].xml" not in names or "xl/workbook.xml" not in names:
        kind = "an OpenDocument file" if "mimetype" in names else "a zip archive"
        raise IntakeError(
            f"{filename}: is {kind}, not an Excel workbook (no [Content_Types].xml / xl/workbook.xml). "
            "Save it as .xlsx or .csv."
        )
    total = sum(i.file_size for i in infos)
    limit = 5 * max_bytes
    if total > limit:
        raise IntakeError(
            f"{filename}: unpacks to {total} bytes, more than the limit of {limit} bytes; refused "
            "(this is how zip bombs look)."
        )
    for info in infos:
        if info.file_size > RATIO_CHECK_FROM and info.file_size > MAX_RATIO * max(info.compress_size, 1):
            raise IntakeError(
                f"{filename}: part {info.filename} is compressed {info.file_size // max(info.compress_size, 1)}:1, "
                f"more than the plausible {MAX_RATIO}:1; refused (this is how zip bombs look)."
            )


def read_xlsx(raw: bytes, filename: str, *, sheet: str | None, max_bytes: int, max_columns: int) -> Grid:
    """Read one sheet (the first, or ``sheet``) into a Grid."""
    check_zip(raw, filename, max_bytes)
    import openpyxl  # imported here: only XLSX uploads pay for it

    try:
        book = openpyxl.load_workbook(io.BytesIO(raw), read_only=True, data_only=True, keep_links=False)
    except Exception as exc:  # openpyxl raises many types on damaged files; all mean the same to the user
        raise IntakeError(f"{filename}: is a damaged XLSX file ({_one_line(exc)}).") from None
    try:
        return _read_sheet(book, filename, sheet, max_columns)
    except IntakeError:
        raise
    except Exception as exc:  # damaged sheet XML surfaces only while rows are read
        raise IntakeError(f"{filename}: a sheet of this XLSX file is damaged ({_one_line(exc)}).") from None
    finally:
        book.close()


def _read_sheet(book, filename: str, sheet: str | None, max_columns: int) -> Grid:
    worksheets = book.worksheets
    if sheet is None:
        if not worksheets:
            raise IntakeError(f"{filename}: the workbook has no worksheet.")
        ws = worksheets[0]
    else:
        by_name = {w.title: w for w in worksheets}
        if sheet not in by_name:
            raise IntakeError(
                f"{filename}: has no sheet named {sheet!r}; its sheets are: "
                + ", ".join(repr(t) for t in by_name)
            )
        ws = by_name[sheet]
    ws.reset_dimensions()  # never trust the stored dimension (it may claim 16,384 columns)
    rows: list[list] = []
    for number, values in enumerate(ws.iter_rows(values_only=True), start=1):
        row = list(values)
        while row and row[-1] is None:
            row.pop()
        if len(row) > max_columns:
            raise IntakeError(
                f"{filename}: row {number} of sheet {ws.title!r} has {len(row)} columns, more than the limit of {max_columns}."
            )
        rows.append(row)
    if not any(rows):
        raise IntakeError(f"{filename}: sheet {ws.title!r} is empty.")
    header = find_header(rows[:SAMPLE_ROWS], filename)
    body = [c for r in rows[header + 1 : header + 1 + SAMPLE_ROWS] if not is_comment_row(r) for c in r]
    decimal = guess_decimal(body)
    units_at = find_units_row(rows[: header + 1 + SAMPLE_ROWS], header, decimal)
    width = max(len(r) for r in rows[header:])
    names, unnamed = column_names(rows[header], width, filename, header + 1)
    units = {}
    if units_at is not None:
        for n, u in zip(names, rows[units_at]):
            text = "" if u is None else one_line(str(u))
            if text and text.lower() not in MISSING_MARKERS:
                units[n] = text
    start = (units_at if units_at is not None else header) + 1
    data_rows = [r for r in rows[start:]]
    numbers = np.arange(start + 1, start + 1 + len(data_rows), dtype=np.int64)
    keep = [k for k, r in enumerate(data_rows) if not is_comment_row(r)]
    data_rows = [data_rows[k] for k in keep]
    columns = {}
    for j, name in enumerate(names):
        cells = [r[j] if j < len(r) else None for r in data_rows]
        columns[name] = _as_column(cells)
    return Grid(
        frame=pd.DataFrame(columns, index=pd.RangeIndex(len(data_rows))),
        row_numbers=numbers[keep],
        letters={n: column_letter(j) for j, n in enumerate(names)},
        header_row=header + 1,
        file_type="xlsx",
        decimal=decimal,
        units=units,
        unnamed=unnamed,
        sheet=ws.title,
    )


def _as_column(cells: list) -> np.ndarray:
    """float64 when every filled cell is a number, else the raw cells as objects."""
    if all(c is None or (isinstance(c, (int, float)) and not isinstance(c, bool)) for c in cells):
        return np.array([np.nan if c is None else float(c) for c in cells], dtype=np.float64)
    return np.array(cells, dtype=object)


def _one_line(exc: Exception) -> str:
    text = " ".join(str(exc).split())[:120]
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__
