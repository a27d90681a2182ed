"""Finding the table inside a sheet of rows: header row, units row, decimal mark.

Owns what the text and XLSX readers share: the error type, the ``Grid``
they hand to typing, spreadsheet column letters, skipping title and comment
rows above the header, recognising a units row under it, naming columns,
and guessing the decimal mark from a sample of cells.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from analysis.errors import InputError
from analysis.intake_cells import MISSING_MARKERS, looks_numeric


class IntakeError(InputError):
    """A file that cannot be read as a table; the message names file, row, column and value."""


@dataclass
class Grid:
    """Cells below the header, before typing.

    ``frame`` columns are the header names, each float64 (already numbers)
    or object (raw cells). ``row_numbers[i]`` is the spreadsheet row of
    ``frame`` row i (header row counted as in the file, title lines included; a
    record whose quoted cell spans several lines is one row, as in a spreadsheet).
    """

    frame: pd.DataFrame
    row_numbers: np.ndarray
    letters: dict[str, str]
    header_row: int
    file_type: str
    decimal: str = "."
    units: dict[str, str] = field(default_factory=dict)
    unnamed: set[str] = field(default_factory=set)  # names made up for blank header cells
    encoding: str | None = None
    delimiter: str | None = None
    sheet: str | None = None
    markers_read: bool = False  # the reader already read every marker spelling as missing


def column_letter(index: int) -> str:
    """Spreadsheet letter of a 0-based column index: 0 -> A, 26 -> AA."""
    letters = ""
    index += 1
    while index:
        index, rem = divmod(index - 1, 26)
        letters = chr(65 + rem) + letters
    return letters


def _is_blank(cell) -> bool:
    if cell.__class__ is str:
        return not cell.strip()
    if cell is None:
        return True
    if isinstance(cell, float) and math.isnan(cell):
        return True
    return isinstance(cell, str) and not cell.strip()


def is_comment_row(row) -> bool:
    """A row whose first non-blank cell starts with '#' (but is not an error marker like '#N/A')."""
    for cell in row:
        if _is_blank(cell):
            continue
        text = str(cell).strip()
        return text.startswith("#") and text.lower() not in MISSING_MARKERS
    return False


def filled(row) -> int:
    return sum(not _is_blank(c) for c in row)


def find_header(rows: list[list], filename: str) -> int:
    """Index of the header row: the first non-comment row about as wide as the table.

    Title rows ("Batch report, line 3") and comment rows above the header
    fill fewer cells than the data, so they are skipped.
    """
    candidates = [i for i, r in enumerate(rows) if filled(r) and not is_comment_row(r)]
    if not candidates:
        raise IntakeError(f"{filename}: no table found (only blank or comment lines).")
    widths = [filled(rows[i]) for i in candidates]
    typical = max(set(widths), key=lambda w: (widths.count(w), w))
    need = max(2, typical - max(1, round(0.25 * typical)))
    for i in candidates:
        if filled(rows[i]) >= need:
            return i
    return candidates[0]


def _is_missing(cell) -> bool:
    """Blank, or a missing-value marker ("NA", "ND", "-", ...): says nothing about a column's type."""
    return _is_blank(cell) or str(cell).strip().lower() in MISSING_MARKERS


def find_units_row(rows: list[list], header: int, decimal: str) -> int | None:
    """Index of a units row just under the header ("mg/L", "%", "°C"), or None.

    It is a units row when the columns that hold numbers further down hold
    short text there instead, in at least half of those columns.
    """
    below = [i for i in range(header + 1, len(rows)) if filled(rows[i]) and not is_comment_row(rows[i])]
    if len(below) < 2:
        return None
    cand, data = below[0], below[1 : 1 + max(3, min(50, 20_000 // max(1, len(rows[header]))))]
    width = max(len(rows[i]) for i in [cand, *data])
    numeric_cols = []
    for j in range(0, width, max(1, width // 2000)):  # wide tables: about 2000 columns decide
        cells = [rows[i][j] for i in data if j < len(rows[i]) and not _is_missing(rows[i][j])]
        if cells and sum(looks_numeric(c, decimal) for c in cells) >= 0.8 * len(cells):
            numeric_cols.append(j)
    if not numeric_cols:
        return None
    row = rows[cand]
    unit_like = 0
    for j in numeric_cols:
        cell = row[j] if j < len(row) else None
        if _is_blank(cell):
            continue
        text = str(cell).strip()
        if looks_numeric(cell, decimal) or text.lower() in MISSING_MARKERS or len(text) > 24:
            return None
        unit_like += 1
    return cand if unit_like >= max(1, math.ceil(0.5 * len(numeric_cols))) else None


_WRAP = re.compile(r"\s*[\r\n]+\s*")


def one_line(text: str) -> str:
    """A header or units cell wrapped over lines ("Lead" / "level") as one line: "Lead level"."""
    return _WRAP.sub(" ", text).strip()


def column_names(header: list, width: int, filename: str, header_row: int) -> tuple[list[str], set[str]]:
    """Header cells as unique column names; blank ones become "column C" (returned as the second item).

    A cell wrapped over lines (Alt+Enter in a spreadsheet) gives a one-line name.
    """
    names, unnamed = [], set()
    for j in range(width):
        cell = header[j] if j < len(header) else None
        if _is_blank(cell):
            names.append(f"column {column_letter(j)}")
            unnamed.add(names[-1])
        elif isinstance(cell, float) and cell.is_integer():
            names.append(str(int(cell)))
        else:
            names.append(one_line(str(cell)))
    seen: dict[str, int] = {}
    dupes = []
    for j, n in enumerate(names):
        if n in seen:
            dupes.append(f"'{n}' (columns {column_letter(seen[n])} and {column_letter(j)})")
        else:
            seen[n] = j
    if dupes:
        raise IntakeError(
            f"{filename}: the header (row {header_row}) names a column twice: {', '.join(dupes[:10])}. "
            "Give each column a unique name."
        )
    return names, unnamed


_COMMA_DEC = re.compile(r"^[<>]?\s*[+-]?(\d+),(\d+)$")
_POINT_DEC = re.compile(r"^[<>]?\s*[+-]?(\d+)\.(\d+)$")
_EURO_GROUPED = re.compile(r"^[+-]?\d{1,3}(\.\d{3})+,\d+$")
_ANGLO_GROUPED = re.compile(r"^[+-]?\d{1,3}(,\d{3})+\.\d+$")


def guess_decimal(cells, delimiter: str | None = None) -> str:
    """',' when the sample's numbers mostly use a decimal comma, else '.'.

    "1,234" alone is ambiguous (decimal or thousands) and is not counted;
    when nothing else decides, a ';'-separated file with such cells is read
    with a decimal comma, because ';' is chosen where ',' is the decimal mark.
    Common practice: lab exports from European sites write "0,05" and ';'.
    """
    comma = point = ambiguous = 0
    for cell in cells:
        if not isinstance(cell, str):
            continue
        text = cell.strip()
        for pattern, is_comma in ((_COMMA_DEC, True), (_POINT_DEC, False)):
            m = pattern.match(text)
            if m and (len(m.group(2)) != 3 or m.group(1).startswith("0") or len(m.group(1)) > 3):
                comma += is_comma
                point += not is_comma
            elif m and is_comma:
                ambiguous += 1
        if _EURO_GROUPED.match(text):
            comma += 1
        elif _ANGLO_GROUPED.match(text):
            point += 1
    if comma == point == 0 and ambiguous and delimiter == ";":
        return ","
    return "," if comma > point else "."
