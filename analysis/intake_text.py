"""Delimited text (CSV, TSV, semicolon or pipe separated) -> Grid.

Owns encoding detection (UTF-8 with or without BOM, UTF-16, cp1252 /
Latin-1 fallback), refusing binary content, delimiter detection from a
sample, and the fast path: pandas' C parser over the whole byte string (a
large one cut at line breaks into one piece per core, parsed in threads), so
only columns that did not parse as numbers are read cell by cell later.
"""

from __future__ import annotations

import codecs
import csv
import io
import os
import re
import warnings
from collections import Counter
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pandas as pd

from analysis.intake_cells import MARKER_SPELLINGS, MISSING_MARKERS
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

SAMPLE_BYTES = 64 * 1024
MAX_SAMPLE = 16 * 1024 * 1024
PARALLEL_MIN_BYTES = 8 * 1024 * 1024  # below this, threads cost more than they save
SAMPLE_CELLS = 20_000
SAMPLE_LINES = 200
DELIMITERS = (",", ";", "\t", "|")
_DELIMITER_NAMES = {",": "comma", ";": "semicolon", "\t": "tab", "|": "pipe"}
_CONTROL = re.compile("[\x00-\x08\x0b\x0e-\x1f\x7f-\x9f\ufffd]")
_LINE_BREAK = re.compile(r"\r\n|\n|\r")
# A line starting with '#' is a comment unless it starts with a spreadsheet error marker.
_COMMENT_LINE = re.compile(
    rb"(?m)^#(?!N/A|NA\b|VALUE!|DIV/0!|NUM!|REF!|NAME\?|NULL!|CALC!|SPILL!)[^\r\n]*"
)


def decode(raw: bytes, filename: str) -> tuple[str, bytes, str, str, bool]:
    """Pick the encoding.

    Returns (encoding name, bytes for pandas, pandas encoding, sample text,
    whether the sample stops short of the end of the file).
    """
    if raw.startswith(codecs.BOM_UTF8):
        name = "utf-8-sig"
    elif raw.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)) or _looks_utf16(raw):
        name = "utf-16" if raw.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)) else _utf16_order(raw)
        try:
            text = raw.decode(name).lstrip("\ufeff")
        except UnicodeDecodeError as exc:
            raise IntakeError(
                f"{filename}: looks like UTF-16 text but byte {exc.start} cannot be decoded; "
                "the file is damaged or not text."
            ) from None
        end = _sample_end(text, "\n", "\r")
        return name, text.encode("utf-8"), "utf-8", text[:end], end < len(text)
    else:
        name = "utf-8"
    nul = raw.find(b"\x00")
    if nul >= 0:
        raise IntakeError(
            f"{filename}: contains binary data (a NUL byte at byte {nul}); it is not a text table. "
            "Upload a CSV, TSV or XLSX file."
        )
    end = _sample_end(raw, b"\n", b"\r")
    if raw.isascii():
        return "utf-8", raw, "utf-8", raw[:end].decode("ascii"), end < len(raw)
    try:
        raw.decode("utf-8")
        return name, raw, name, raw[:end].decode(name, errors="ignore"), end < len(raw)
    except UnicodeDecodeError:
        pass
    try:
        text = raw.decode("cp1252")
        name = "cp1252"
    except UnicodeDecodeError:
        text = raw.decode("latin-1")
        name = "latin-1"
    end = _sample_end(text, "\n", "\r")
    return name, text.encode("utf-8"), "utf-8", text[:end], end < len(text)


def _sample_end(buf, newline, carriage) -> int:
    """End of the sample: at least SAMPLE_BYTES and SAMPLE_LINES whole lines (wide files), at most MAX_SAMPLE."""
    mark = newline if newline in buf[:SAMPLE_BYTES] or carriage not in buf[:SAMPLE_BYTES] else carriage
    pos = 0
    for _ in range(SAMPLE_LINES):
        pos = buf.find(mark, pos, MAX_SAMPLE)
        if pos < 0:
            return min(len(buf), MAX_SAMPLE)
        pos += 1
    return min(max(pos, SAMPLE_BYTES), len(buf))


def _looks_utf16(raw: bytes) -> bool:
    head = raw[:2000]
    if len(head) < 4:
        return False
    even, odd = head[0::2], head[1::2]
    return max(even.count(0) / len(even), odd.count(0) / len(odd)) > 0.4 and min(even.count(0), odd.count(0)) < 0.05 * len(odd)


def _utf16_order(raw: bytes) -> str:
    head = raw[:2000]
    return "utf-16-le" if head[1::2].count(0) > head[0::2].count(0) else "utf-16-be"


def refuse_binary(sample: str, filename: str) -> None:
    """Control characters in more than 1% of the sample mean it is not text."""
    if not sample:
        return
    bad = len(_CONTROL.findall(sample))
    if bad > 0.01 * len(sample):
        raise IntakeError(
            f"{filename}: does not look like a text table ({bad} control characters in the first "
            f"{len(sample)} characters); it may be binary data. Upload a CSV, TSV or XLSX file."
        )


def detect_delimiter(lines: list[str], filename: str) -> str:
    """The candidate that splits most sample lines into the same number (>= 2) of fields."""
    lines = [ln for ln in lines if ln.strip() and not ln.lstrip().startswith("#")]
    best, best_key = None, None
    for d in DELIMITERS:
        try:
            counts = [len(r) for r in csv.reader(lines, delimiter=d)]
        except csv.Error:  # e.g. a whole wide line as one over-long field: d does not split these lines
            continue
        if not counts:
            continue
        mode, hits = Counter(counts).most_common(1)[0]
        key = (mode >= 2, round(hits / len(counts), 2), mode)
        if mode >= 2 and (best_key is None or key > best_key):
            best, best_key = d, key
    if best is None:
        head = lines[0][:60] if lines else ""
        if head.lstrip().lower().startswith(("<!doctype", "<html", "<?xml")):
            raise IntakeError(f"{filename}: looks like a web page or XML document, not a table.")
        raise IntakeError(
            f"{filename}: no columns found: no comma, semicolon, tab or pipe splits the lines into "
            f"two or more fields (first line: {head!r})."
        )
    return best


def sample_records(sample: str, delimiter: str, truncated: bool, filename: str) -> list[list[str]]:
    """The first records of the sample, split into fields: the rows as a spreadsheet counts them.

    A quoted field may contain line breaks (RFC 4180, Shafranovich 2005, section 2 rule 6);
    its record is still one row. Wide files: about SAMPLE_CELLS cells, 10 to SAMPLE_LINES
    records. The last record of a truncated sample may be cut short and is left out.
    """
    reader = csv.reader(io.StringIO(sample, newline=""), delimiter=delimiter)
    rows: list[list[str]] = []
    try:
        for row in reader:
            rows.append(row)
            if len(rows) > SAMPLE_LINES or (len(rows) >= 40 and len(rows) > _records_kept(rows)):
                break
        else:
            if truncated and len(rows) > 1:
                rows.pop()
    except csv.Error as exc:  # e.g. a quote never closed makes an over-long field; pandas names it later
        if not rows:
            raise IntakeError(
                f"{filename}: the first lines cannot be split into fields ({' '.join(str(exc).split())})."
            ) from None
    return rows[: _records_kept(rows)]


def _records_kept(rows: list[list[str]]) -> int:
    """Detection is cell by cell: wide samples keep about SAMPLE_CELLS cells (widths of the first 40 records)."""
    widest = max((len(r) for r in rows[:40]), default=1)
    return max(10, min(SAMPLE_LINES, SAMPLE_CELLS // max(1, widest)))


def read_text(raw: bytes, filename: str, *, text_columns: set[str], max_columns: int) -> Grid:
    """Read delimited text into a Grid (numbers typed by pandas, other cells as text)."""
    encoding, data, pandas_encoding, sample, truncated = decode(raw, filename)
    refuse_binary(sample[:SAMPLE_BYTES], filename)
    lines = _LINE_BREAK.split(sample)
    if truncated and len(lines) > 1:
        lines = lines[:-1]  # the last line of a sample may be cut short
    delimiter = detect_delimiter(lines[:40], filename)
    rows = sample_records(sample, delimiter, truncated, filename)
    header = find_header(rows, filename)
    body = [c for r in rows[header + 1 :] if not is_comment_row(r) for c in r][:SAMPLE_CELLS]
    decimal = guess_decimal(body, delimiter)
    units_at = find_units_row(rows, header, decimal)
    width = max(len(r) for r in rows[header:])
    if width > max_columns:
        raise IntakeError(
            f"{filename}: row {header + 1} has {width} columns, more than the limit of {max_columns}."
        )
    names, unnamed = column_names(rows[header], width, filename, header + 1)
    units = {}
    if units_at is not None:
        units = {n: one_line(u) for n, u in zip(names, rows[units_at]) if u.strip() and u.strip().lower() not in MISSING_MARKERS}
    skip = (units_at if units_at is not None else header) + 1
    if b"#" in data and b"\n#" in data:  # one fast byte scan first; most files have no '#'
        data = _blank_comment_lines(data, delimiter)
    options = dict(
        sep=delimiter,
        decimal=decimal,
        names=names,
        skip_blank_lines=False,
        keep_default_na=False,
        na_values=MARKER_SPELLINGS,
        dtype={n: str for j, n in enumerate(names) if n in text_columns or j >= len(rows[header])},
        encoding=pandas_encoding,
        engine="c",
        index_col=False,
    )
    try:
        frame = _parse(data, skip, rows[skip - 1], options)
    except Exception as exc:  # pandas raises several types on malformed text; all mean "cannot be read"
        raise _parser_error(exc, filename, delimiter, header + 1, width) from None
    _refuse_unnamed_values(frame, names[len(rows[header]):], skip, filename, header + 1, len(rows[header]))
    return Grid(
        frame=frame,
        row_numbers=np.arange(skip + 1, skip + 1 + len(frame), dtype=np.int64),
        letters={n: column_letter(j) for j, n in enumerate(names)},
        header_row=header + 1,
        file_type="csv",
        decimal=decimal,
        units=units,
        unnamed=unnamed,
        encoding=encoding,
        delimiter=delimiter,
        markers_read=True,
    )


def _parse(data: bytes, skip: int, last_row_above: list[str], options: dict) -> pd.DataFrame:
    """pandas' C parser over the text below the ``skip`` rows above the data.

    Large texts are cut at line breaks into one piece per core, parsed side by
    side in threads (the C parser releases the GIL) and joined: about 1.6x
    faster on 2 cores for 1,000,000 rows (docs/performance.md). Only where a
    line break always ends a row (no quote character, no bare carriage
    return). If a piece fails, the whole text is parsed again in one piece,
    so pandas' message names the right line.
    """
    pieces = _pieces(data, skip)
    with warnings.catch_warnings():
        # A column with text far down is typed chunk by chunk ("mixed types"); _typed reads
        # such columns cell by cell, so pandas' DtypeWarning says nothing to the user.
        warnings.simplefilter("ignore", pd.errors.DtypeWarning)
        if len(pieces) > 1:
            piece_options = {**options, "header": None, "encoding": "utf-8"}  # a BOM stays above the data
            try:
                with ThreadPoolExecutor(len(pieces)) as pool:
                    frames = list(pool.map(lambda piece: pd.read_csv(_PieceReader(piece), **piece_options), pieces))
                return pd.concat(frames, ignore_index=True)  # a column typed differently by two pieces joins as text
            except Exception:  # noqa: BLE001 - any failure: the one-piece read below raises the message
                pass
        return pd.read_csv(io.BytesIO(data), **_rows_above_data(last_row_above, len(options["names"]), skip),
                           **options)


def _workers() -> int:
    """Cores this process may use (CPU affinity), at most 4."""
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    return max(1, min(4, cores))


def _pieces(data: bytes, skip: int) -> list[memoryview]:
    """The data rows cut at line breaks into one piece per worker, or [] when not safe or not worth it."""
    workers = _workers()
    if workers < 2 or len(data) < PARALLEL_MIN_BYTES or b'"' in data:
        return []
    if b"\r" in data and data.count(b"\r") != data.count(b"\r\n"):
        return []  # a bare carriage return ends a row for pandas but not for this cut
    start = 0
    for _ in range(skip):
        start = data.find(b"\n", start) + 1
        if start == 0:
            return []
    cuts = [start]
    for k in range(1, workers):
        cut = data.find(b"\n", start + (len(data) - start) * k // workers) + 1
        if cut == 0 or cut <= cuts[-1] or cut >= len(data):
            break
        cuts.append(cut)
    cuts.append(len(data))
    view = memoryview(data)
    return [view[a:b] for a, b in zip(cuts, cuts[1:])] if len(cuts) > 2 else []


class _PieceReader:
    """A read-only file over a slice of bytes, copied out a block at a time (not all at once)."""

    def __init__(self, view: memoryview):
        self._view, self._pos = view, 0

    def read(self, size: int = -1) -> bytes:
        end = len(self._view) if size is None or size < 0 else min(len(self._view), self._pos + size)
        block, self._pos = bytes(self._view[self._pos:end]), end
        return block


def _rows_above_data(last_row: list[str], width: int, skip: int) -> dict:
    """How pandas passes over the ``skip`` rows above the data.

    When the last of them (header or units row) has as many fields as there are
    columns, it is read as pandas' header (and replaced by our names): as fast as
    a plain read. Otherwise (rows wider than the header) ``skiprows``, which checks
    every row against a skip list: about 40% slower on 1,000,000 rows (measured
    with pandas 3.1, see docs/performance.md).
    """
    if len(last_row) == width:
        return {"header": skip - 1}
    return {"header": None, "skiprows": skip}


def _blank_comment_lines(data: bytes, delimiter: str) -> bytes:
    """Empty the '#' comment lines, keeping their line breaks so that row numbers stay put.

    A line inside a quoted field that spans lines (RFC 4180 section 2 rule 6) is cell text even
    when it starts with '#'; so, when the file has quotes, only lines that start a record are emptied.
    """
    if b'"' not in data:
        return _COMMENT_LINE.sub(b"", data)
    found, at, line, pos = [], [], 0, 0
    for m in _COMMENT_LINE.finditer(data):
        line += data.count(b"\n", pos, m.start())
        pos = m.start()
        found.append(m)
        at.append(line)  # 0-based index of the physical line
    if not found:
        return data
    wanted, starts = set(at), set()
    # Only up to the last comment line; data is UTF-8 here (decode() re-encoded the other encodings).
    text = data[: found[-1].end()].decode("utf-8", errors="replace")
    reader = csv.reader(io.StringIO(text, newline="\n"), delimiter=delimiter)  # one item per '\n' line
    start = 0
    try:
        for _ in reader:
            if start in wanted:
                starts.add(start)
            if start >= at[-1]:
                break
            start = reader.line_num
    except csv.Error:  # a stray '\r' or an over-long field: pandas' own reading will tell
        return _COMMENT_LINE.sub(b"", data)
    pieces, pos = [], 0
    for m, line in zip(found, at):
        if line in starts:
            pieces.append(data[pos : m.start()])
            pos = m.end()
    pieces.append(data[pos:])
    return b"".join(pieces)


def _parser_error(exc: Exception, filename: str, delimiter: str, header_row: int, width: int) -> IntakeError:
    # pandas' tokenizer counts records, skipped ones included (a quoted line break does not start a new
    # one): "line L" is 1-based, "row R" 0-based. The multi-line tests in test_intake.py hold it to that.
    text = str(exc)
    m = re.search(r"Expected (\d+) fields in line (\d+), saw (\d+)", text)
    if m:
        return IntakeError(
            f"{filename}: row {m.group(2)} has {m.group(3)} fields but the header (row {header_row}) has "
            f"{width}; check the {_DELIMITER_NAMES[delimiter]} separators and quotes on that row."
        )
    m = re.search(r"EOF inside string starting (?:at|on) (?:row|line) (\d+)", text)
    if m:
        return IntakeError(f"{filename}: a quote opened near row {int(m.group(1)) + 1} is never closed.")
    first = " ".join(text.split())[:160] or type(exc).__name__
    return IntakeError(f"{filename}: could not be read as a {_DELIMITER_NAMES[delimiter]}-separated table ({first}).")


def _refuse_unnamed_values(frame, extra: list[str], skip: int, filename: str, header_row: int, named: int) -> None:
    """Fields beyond the header are fine when empty (trailing separators); values there are misaligned."""
    for name in extra:
        filled_at = np.flatnonzero(frame[name].notna().to_numpy())
        if len(filled_at):
            row = skip + 1 + int(filled_at[0])
            value = frame[name].iloc[filled_at[0]]
            raise IntakeError(
                f"{filename}: row {row} has a value ({value!r}) in {name}, beyond the {named} columns "
                f"of the header (row {header_row}); check the separators and quotes on that row."
            )
