"""File intake: CSV/TSV/XLSX bytes -> Table + IntakeReport, or a clear IntakeError.

Owns the public entry points (``read_table``, ``read_path``), the report,
the first look at the bytes (size, emptiness, what kind of file) and
typing: column roles (id, metadata, variable, ignore), numbers, missing
markers, detection-limit values, sample ids and the checks on the result.
Reading the bytes is left to ``intake_text`` (delimited text) and
``intake_xlsx`` (workbooks); cells are read by ``intake_cells``.

Values below a detection limit ("<0.05") become LOD/2 by default, LOD/sqrt(2)
or missing on request (common practice for multivariate screening of
censored lab values); the policy and the counts are in the report.
Nothing is stored: this is a pure function of the bytes and the options.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd

from analysis.intake_cells import MARKER_SPELLINGS, MISSING_MARKERS, looks_numeric, parse_column
from analysis.intake_layout import Grid, IntakeError
from analysis.intake_text import read_text
from analysis.intake_xlsx import read_xlsx
from analysis.table import Table

__all__ = ["IntakeError", "IntakeReport", "read_table", "read_path"]

ROLES = ("id", "metadata", "variable", "ignore")
BELOW_LIMIT_POLICIES = ("half", "sqrt2", "missing")
BAD_CELL_POLICIES = ("error", "missing")
MAX_LISTED = 10
CLASSIFY_SAMPLE = 2000
WIDE = 200
_ID_NAME = re.compile(
    r"^(?:(?:sample|specimen|subject|respondent|participant|record|lot|batch|patient|unit)[ _.-]*)?"
    r"(?:id|no\.?|nr\.?|number|code|name|sample|specimen)$",
    re.IGNORECASE,
)
_BLANKS = (" ", "\t", "\r", "\n", "\u00a0", "\u202f", "\u3000")
_POLICY_TEXT = {"half": "LOD/2", "sqrt2": "LOD/sqrt(2)", "missing": "missing"}
_SIGNATURES = (
    (b"\x89PNG\r\n\x1a\n", "a PNG image"),
    (b"\xff\xd8\xff", "a JPEG image"),
    (b"GIF87a", "a GIF image"),
    (b"GIF89a", "a GIF image"),
    (b"%PDF", "a PDF document"),
    (b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1", "an old-style .xls workbook or a password-protected file"),
    (b"\x1f\x8b", "a gzip archive"),
    (b"7z\xbc\xaf\x27\x1c", "a 7-Zip archive"),
    (b"Rar!\x1a\x07", "a RAR archive"),
    (b"\x7fELF", "a program (ELF binary)"),
    (b"MZ", "a Windows program"),
    (b"II*\x00", "a TIFF image"),
    (b"MM\x00*", "a TIFF image"),
    (b"SQLite format 3\x00", "an SQLite database"),
)


@dataclass
class IntakeReport:
    """What intake found and decided; shown to the user beside the table.

    Attributes
    ----------
    filename, file_type ("csv" or "xlsx"), encoding, delimiter, decimal, sheet :
        how the file was read (None where not applicable).
    roles : dict[str, str]
        column -> "id" | "metadata" | "variable" | "ignore".
    units : dict[str, str]
        unit per variable from a units row under the header.
    missing_counts, below_limit_counts, above_range_counts : dict[str, int]
        per variable: missing cells (after cleaning), detection-limit values
        replaced, above-range values kept as their bound.
    below_limit_policy : str
        "half" (LOD/2), "sqrt2" (LOD/sqrt(2)) or "missing".
    dropped_rows : list[int]
        spreadsheet rows left out because every variable was missing.
    warnings : list[str]
    """

    filename: str
    file_type: str
    encoding: str | None = None
    delimiter: str | None = None
    decimal: str | None = None
    sheet: str | None = None
    header_row: int = 1
    id_column: str | None = None
    n_samples: int = 0
    n_variables: int = 0
    roles: dict[str, str] = field(default_factory=dict)
    units: dict[str, str] = field(default_factory=dict)
    missing_counts: dict[str, int] = field(default_factory=dict)
    below_limit_counts: dict[str, int] = field(default_factory=dict)
    above_range_counts: dict[str, int] = field(default_factory=dict)
    below_limit_policy: str = "half"
    dropped_rows: list[int] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        """JSON-safe copy (plain str/int/None, lists and dicts)."""
        return asdict(self)


def read_path(path, **options) -> tuple[Table, IntakeReport]:
    """Read a file from disk; the base name is used as the file name in messages."""
    name = os.path.basename(os.fspath(path))
    max_bytes = options.get("max_bytes", 200 * 1024**2)
    try:
        size = os.path.getsize(path)
        if size > max_bytes:
            raise IntakeError(_too_big(name, size, max_bytes))
        with open(path, "rb") as fh:
            raw = fh.read()
    except OSError as exc:
        raise IntakeError(f"{name}: cannot be opened ({exc.strerror or exc}).") from None
    return read_table(raw, name, **options)


def read_table(
    raw: bytes,
    filename: str,
    *,
    id_column: str | None = None,
    group_columns=(),
    sheet: str | None = None,
    below_limit: str = "half",
    bad_cells: str = "error",
    roles: dict[str, str] | None = None,
    max_bytes: int = 200 * 1024**2,
    max_columns: int = 20000,
    mostly_missing: float = 0.5,
    min_samples: int = 3,
    scoring: bool = False,
) -> tuple[Table, IntakeReport]:
    """Read CSV/TSV/XLSX bytes into a Table and an IntakeReport.

    Parameters
    ----------
    raw : bytes
        The file as uploaded.
    filename : str
        Shown in every message; its extension is a hint only (content decides).
    id_column : str, optional
        Column holding sample ids. Default: the first text column whose values
        are all present and unique; if none, ids are the spreadsheet rows ("row 2").
    group_columns : sequence of str
        Columns kept as metadata even when numeric.
    sheet : str, optional
        XLSX sheet name (default: the first sheet).
    below_limit : {"half", "sqrt2", "missing"}
        Replacement for "<LOD" values with a number: LOD/2, LOD/sqrt(2) or missing.
    bad_cells : {"error", "missing"}
        Text or infinities in a numeric column: refuse the file (listing the
        cells) or read them as missing with a warning.
    roles : dict[str, str], optional
        Column -> "id" | "metadata" | "variable" | "ignore"; overrides detection.
    max_bytes, max_columns : int
        Size limits; larger files are refused.
    mostly_missing : float
        Warn about variables and samples missing more than this fraction.
    min_samples : int
        Fewest samples accepted: 3 to fit a model, 1 to score new samples
        against a saved one.
    scoring : bool
        True when the rows are new samples to score against a saved model: a
        variable with one value throughout is then no concern (the model's own
        centring and scaling apply), so it is not warned about.

    Raises
    ------
    IntakeError
        The message names the file, the spreadsheet row (header = its row in
        the file), the column and the value.
    """
    filename = re.sub(r"[\x00-\x1f\x7f]", "?", str(filename)) or "upload"  # messages stay one line
    _check_options(filename, below_limit, bad_cells, roles, mostly_missing)
    raw = bytes(raw)
    if len(raw) > max_bytes:
        raise IntakeError(_too_big(filename, len(raw), max_bytes))
    if not raw or raw.isspace():
        raise IntakeError(f"{filename}: the file is empty.")
    sheet = sheet or None  # forms send "" for "not given"
    id_column = id_column or None
    roles = dict(roles or {})
    if id_column is not None:
        roles[str(id_column)] = "id"
    for g in [group_columns] if isinstance(group_columns, str) else group_columns or ():
        if g:
            roles.setdefault(str(g), "metadata")
    ids = [c for c, r in roles.items() if r == "id"]
    if len(ids) > 1:
        raise IntakeError(f"{filename}: more than one id column requested: {', '.join(map(repr, ids))}.")
    if raw.startswith(b"PK\x03\x04") or filename.lower().endswith((".xlsx", ".xlsm")):
        if not raw.startswith(b"PK"):
            raise IntakeError(
                f"{filename}: is not a valid XLSX file (an XLSX file is a zip container; this one is not)."
                + _kind_hint(raw)
            )
        grid = read_xlsx(raw, filename, sheet=sheet, max_bytes=max_bytes, max_columns=max_columns)
    else:
        for magic, kind in _SIGNATURES:
            if raw.startswith(magic):
                raise IntakeError(f"{filename}: is {kind}, not a table. Upload a CSV, TSV or XLSX file.")
        if sheet is not None:
            raise IntakeError(f"{filename}: sheet {sheet!r} was asked for, but this is a text file without sheets.")
        text_columns = {c for c, r in roles.items() if r in ("id", "metadata")}  # keep "007" as written
        grid = read_text(raw, filename, text_columns=text_columns, max_columns=max_columns)
    return _typed(grid, filename, roles, below_limit, bad_cells, mostly_missing, min_samples, scoring)


def _too_big(filename: str, size: int, limit: int) -> str:
    return (
        f"{filename}: the file is {size / 1024**2:.1f} MB ({size} bytes), over the limit of "
        f"{limit / 1024**2:.1f} MB ({limit} bytes)."
    )


def _kind_hint(raw: bytes) -> str:
    for magic, kind in _SIGNATURES:
        if raw.startswith(magic):
            return f" It looks like {kind}."
    return ""


def _check_options(filename, below_limit, bad_cells, roles, mostly_missing) -> None:
    if below_limit not in BELOW_LIMIT_POLICIES:
        raise IntakeError(f"below_limit must be one of {', '.join(BELOW_LIMIT_POLICIES)}, not {below_limit!r}.")
    if bad_cells not in BAD_CELL_POLICIES:
        raise IntakeError(f"bad_cells must be one of {', '.join(BAD_CELL_POLICIES)}, not {bad_cells!r}.")
    for col, role in (roles or {}).items():
        if role not in ROLES:
            raise IntakeError(f"role {role!r} for column {col!r} is not one of {', '.join(ROLES)}.")
    if not 0 < mostly_missing <= 1:
        raise IntakeError(f"mostly_missing must be a fraction in (0, 1], not {mostly_missing!r}.")


def _typed(
    grid: Grid, filename: str, roles: dict, below_limit: str, bad_cells: str, mostly_missing: float, min_samples: int,
    scoring: bool = False,
):
    frame, rows = grid.frame, grid.row_numbers
    report = IntakeReport(
        filename=filename, file_type=grid.file_type, encoding=grid.encoding, delimiter=grid.delimiter,
        decimal=grid.decimal, sheet=grid.sheet, header_row=grid.header_row, below_limit_policy=below_limit,
    )
    unknown = [c for c in roles if c not in frame.columns]
    if unknown:
        raise IntakeError(
            f"{filename}: no column named {', '.join(map(repr, unknown))} in the header (row {grid.header_row}); "
            f"the columns are: {', '.join(map(repr, frame.columns[:30]))}."
        )
    if frame.shape[0] == 0:
        raise IntakeError(f"{filename}: has a header (row {grid.header_row}) but no data rows.")

    def where(col: str) -> str:
        return f"column {col!r} ({grid.letters[col]})"

    decided, numbers, parses = _decide_roles(frame, roles, grid.decimal, below_limit)
    # Fully blank rows and columns (trailing separators, blank lines) vanish silently.
    blank_row = _blank_rows(frame)
    keep = ~blank_row
    all_kept = bool(keep.all())
    texts: dict[str, np.ndarray] = {}  # metadata and id columns as clean text of the kept rows, None where missing

    def text_of(col: str) -> np.ndarray:
        if col not in texts:
            cells = _text(frame[col], grid.markers_read)
            texts[col] = cells if all_kept else cells[keep]
        return texts[col]

    for col in list(decided):
        if decided[col] == "variable" and np.isnan(numbers[col][keep]).all() and col not in roles:
            empty_text = parses[col] is None or not (parses[col].bare_limit or parses[col].bad)
            if empty_text:
                decided[col] = "ignore"
                del numbers[col]
                if col not in grid.unnamed:
                    report.warnings.append(f"{where(col)} has no values and was left out.")
        elif decided[col] == "metadata" and col not in roles and all(c is None for c in text_of(col)):
            decided[col] = "ignore"
            if col not in grid.unnamed:
                report.warnings.append(f"{where(col)} has no values and was left out.")
    rows = rows[keep]

    # Sample ids.
    id_col, ids_checked = next((c for c, r in decided.items() if r == "id"), None), False
    if id_col is None:
        id_col, ids_checked = _detect_id(frame, text_of, decided, roles)
        if id_col is not None:
            decided[id_col] = "id"
    if id_col is not None:
        ids = text_of(id_col)
        if not ids_checked:
            _check_ids(ids, rows, id_col, where(id_col), filename)
    else:
        ids = np.array([f"row {r}" for r in rows], dtype=object)
        first = frame.columns[0]
        if decided[first] == "variable" and _ID_NAME.match(first) and first not in roles:
            report.warnings.append(
                f"{where(first)} is named like sample ids but holds numbers, so it is analysed as a variable; "
                "name it as the id column if it holds ids."
            )
    report.id_column = id_col
    report.roles = dict(decided)

    # Numbers: bad cells, infinities, counts.
    variables = [c for c, r in decided.items() if r == "variable"]
    problems = []
    for col in variables:
        values = numbers[col] if keep.all() else numbers[col][keep]
        parse = parses[col]
        if parse is not None:
            bad = [(p, v, why) for p, v, why in parse.bad if keep[p]]
        else:
            inf_pos = np.flatnonzero(np.isinf(numbers[col]) & keep)
            bad = [(int(p), str(numbers[col][p]), "infinite value") for p in inf_pos]
        if bad:
            values = values.copy() if not values.flags.writeable or values is numbers[col] else values
            pos_in_kept = np.cumsum(keep) - 1
            for p, v, why in bad:
                problems.append((int(grid.row_numbers[p]), col, v, why))
                values[pos_in_kept[p]] = np.nan
            if bad_cells == "missing":
                report.warnings.append(
                    f"{where(col)}: {len(bad)} cell(s) that are not numbers read as missing "
                    f"(first: row {grid.row_numbers[bad[0][0]]}, {bad[0][1]!r})."
                )
        numbers[col] = values
        if parse is not None:
            _count_parse(report, col, where(col), parse, below_limit)
    if problems and bad_cells == "error":
        position = {c: j for j, c in enumerate(frame.columns)}
        problems.sort(key=lambda p: (p[0], position[p[1]]))
        listed = "; ".join(
            f"row {r}, {where(c)}: {v!r} ({why})" for r, c, v, why in problems[:MAX_LISTED]
        )
        more = f"; and {len(problems) - MAX_LISTED} more" if len(problems) > MAX_LISTED else ""
        raise IntakeError(
            f"{filename}: {len(problems)} cell(s) in numeric columns are not numbers: {listed}{more}. "
            "Correct them, or read them as missing (bad cells: missing)."
        )
    if not variables:
        raise IntakeError(
            f"{filename}: no numeric variables found; at least 2 are needed. "
            f"Columns read as text: {', '.join(map(repr, list(frame.columns)[:20]))}."
        )
    if len(variables) > WIDE:
        # One 2-D block: pandas reduces block by block, so thousands of 1-D blocks would crawl.
        data = pd.DataFrame(np.column_stack([numbers[c] for c in variables]), columns=variables)
    else:
        data = pd.DataFrame(numbers, columns=variables, copy=False)  # long tables: no copy of the values
    data.index = pd.Index(ids, dtype=object, name=id_col or "sample")
    metadata_cols = [c for c, r in decided.items() if r == "metadata"]
    metadata = pd.DataFrame({c: text_of(c) for c in metadata_cols}, index=data.index, columns=metadata_cols)

    # Rows where every variable is missing are left out, with a warning.
    columns = _column_arrays(data)
    col_missing, row_missing = _missing_counts(columns, len(data))
    empty = row_missing == data.shape[1]
    if empty.any():
        report.dropped_rows = [int(r) for r in rows[empty]]
        shown = ", ".join(str(r) for r in report.dropped_rows[:MAX_LISTED])
        report.warnings.append(
            f"{int(empty.sum())} row(s) with no numeric values were left out (rows {shown}"
            + (", ..." if empty.sum() > MAX_LISTED else "") + ")."
        )
        data, metadata, row_missing = data[~empty], metadata[~empty], row_missing[~empty]
        columns, col_missing = _column_arrays(data), col_missing - int(empty.sum())
    if data.shape[0] < min_samples:
        raise IntakeError(
            f"{filename}: only {data.shape[0]} sample(s) with numeric values; at least {min_samples} "
            f"{'is' if min_samples == 1 else 'are'} needed."
        )
    if data.shape[1] < 2:
        raise IntakeError(
            f"{filename}: only {data.shape[1]} numeric variable ({', '.join(map(repr, variables))}); at least 2 "
            f"are needed. Text columns: {', '.join(map(repr, metadata_cols[:20])) or 'none'}."
        )
    _warn_about_values(report, data, columns, col_missing, row_missing, where, mostly_missing, scoring)
    report.missing_counts = {c: int(n) for c, n in zip(data.columns, col_missing)}
    report.units = {c: u for c, u in grid.units.items() if c in numbers}
    report.n_samples, report.n_variables = data.shape
    table = Table(data=data, metadata=metadata, units=dict(report.units), id_column=id_col)
    return table, report


def _decide_roles(frame: pd.DataFrame, roles: dict, decimal: str, below_limit: str):
    """Role of every column, and the numbers of the variables.

    Returns (roles decided, {variable: float64 values}, {variable: ColumnParse or None
    when pandas already typed the column}). Text columns stay raw until the end.
    """
    decided: dict[str, str] = {}
    numbers: dict[str, np.ndarray] = {}
    parses: dict = {}
    block = {}
    if len(frame.columns) > WIDE:
        # Wide tables: take the numeric columns in one go; a pandas Series per column costs more than the parse.
        typed = [c for c, dt in frame.dtypes.items() if _is_numeric_dtype(dt) and c not in roles]
        block = dict(zip(typed, frame[typed].to_numpy(dtype=np.float64).T))
    for col in frame.columns:
        if col in block:
            decided[col], parses[col], numbers[col] = "variable", None, block[col]
            continue
        series = frame[col]
        if col in roles:
            decided[col] = roles[col]
        elif _is_numeric(series) or _looks_like_numbers(series, decimal):
            decided[col] = "variable"
        else:
            decided[col] = "metadata"
        if decided[col] != "variable":
            continue
        if _is_numeric(series):
            parses[col] = None
            numbers[col] = series.to_numpy(dtype=np.float64)
        else:
            parses[col] = parse_column(series.to_numpy(dtype=object), decimal, below_limit)
            numbers[col] = parses[col].values
    return decided, numbers, parses


def _is_numeric_dtype(dtype) -> bool:
    return pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_bool_dtype(dtype)


def _is_numeric(series: pd.Series) -> bool:
    return _is_numeric_dtype(series.dtype)


def _looks_like_numbers(series: pd.Series, decimal: str) -> bool:
    """Classify a text column from a sample of its filled cells: numbers if half or more read as numbers."""
    if len(series) > 2 * CLASSIFY_SAMPLE:  # evenly spaced rows: cheap and deterministic
        series = series.iloc[np.linspace(0, len(series) - 1, 2 * CLASSIFY_SAMPLE).astype(np.int64)]
    cells = series.dropna()
    cells = [c for c in cells.astype(object) if not (isinstance(c, str) and c.strip().lower() in MISSING_MARKERS)]
    if not cells:
        return True  # nothing but missing markers: an empty variable
    return sum(looks_numeric(c, decimal) for c in cells) >= 0.5 * len(cells)


def _blank_rows(frame: pd.DataFrame) -> np.ndarray:
    """Rows where every cell is missing; numeric columns first, stopping once no row is left."""
    blank = np.ones(len(frame), dtype=bool)
    for col in sorted(frame.columns, key=lambda c: not _is_numeric(frame[c])):
        blank &= frame[col].isna().to_numpy()
        if not blank.any():
            break
    return blank


def _text(series: pd.Series, markers_read: bool = False) -> np.ndarray:
    """Cells as stripped strings, None where blank or a missing marker; whole numbers lose their '.0'.

    ``markers_read``: the reader already read the marker spellings as missing, so
    unpadded text needs no second look.
    """
    cells = series.to_numpy(dtype=object, na_value=None) if not _is_numeric(series) else series.to_numpy(dtype=object)
    plain = all(isinstance(c, str) or c is None for c in cells[:1000]) and pd.api.types.is_string_dtype(series.dtype)
    if not plain or _has_padding(cells):
        cells = np.array([_cell_text(c) for c in cells] or [], dtype=object)
    elif markers_read:
        return cells
    missing = pd.Series(cells, dtype=object).isin(MARKER_SPELLINGS).to_numpy() | np.equal(cells, None)
    if missing.any():
        cells = cells.copy()
        cells[missing] = None
    return cells


def _cell_text(c):
    if c is None or (isinstance(c, float) and math.isnan(c)):
        return None
    if isinstance(c, float) and c.is_integer():
        return str(int(c))
    return str(c).strip()


def _has_padding(cells: np.ndarray) -> bool:
    """True when some text cell starts or ends with blanks (checked on one joined string, not cell by cell)."""
    joined = "\x00" + "\x00".join(pd.Series(cells, dtype=object).fillna("").tolist()) + "\x00"
    return any(b in joined and (f"\x00{b}" in joined or f"{b}\x00" in joined) for b in _BLANKS)


def _detect_id(frame: pd.DataFrame, text_of, decided: dict, roles: dict) -> tuple[str | None, bool]:
    """First metadata column (not named by the user) whose values are all present and unique.

    A first column named like an id ("Sample ID", "Code", ...) or holding
    nearly unique text (at least 80% distinct) is taken as the id column too,
    so that a duplicated id is reported, not hidden. Returns the column (or
    None) and whether its ids are already known to be present and unique.
    """
    for j, col in enumerate(frame.columns):
        if decided[col] != "metadata" or col in roles:
            continue
        cells = text_of(col)
        if pd.isna(cells).any():
            continue
        index = pd.Index(cells, dtype=object)
        if index.is_unique:
            return col, True
        if j == 0 and (_ID_NAME.match(col) or index.nunique() >= 0.8 * len(index)):
            return col, False
    return None, False


def _check_ids(ids: np.ndarray, rows: np.ndarray, col: str, where: str, filename: str) -> None:
    empty = [int(r) for r in rows[pd.isna(ids)]]
    if empty:
        listed = ", ".join(map(str, empty[:MAX_LISTED])) + (", ..." if len(empty) > MAX_LISTED else "")
        raise IntakeError(f"{filename}: {len(empty)} sample id(s) missing in {where}: rows {listed}.")
    index = pd.Index(ids)
    if index.is_unique:
        return
    dup_mask = index.duplicated(keep=False)
    groups: dict[str, list[int]] = {}
    for v, r in zip(ids[dup_mask], rows[dup_mask]):
        groups.setdefault(v, []).append(int(r))
    listed = "; ".join(
        f"{v!r} (rows {', '.join(map(str, rs[:5]))}{', ...' if len(rs) > 5 else ''})"
        for v, rs in list(groups.items())[:MAX_LISTED]
    )
    more = f"; and {len(groups) - MAX_LISTED} more" if len(groups) > MAX_LISTED else ""
    raise IntakeError(f"{filename}: duplicate sample ids in {where}: {listed}{more}. Each sample needs its own id.")


def _count_parse(report: IntakeReport, col: str, where: str, parse, policy: str) -> None:
    if parse.below:
        report.below_limit_counts[col] = parse.below
        report.warnings.append(
            f"{where}: {parse.below} value(s) below a detection limit replaced by {_POLICY_TEXT[policy]}."
        )
    if parse.above:
        report.above_range_counts[col] = parse.above
        report.warnings.append(f"{where}: {parse.above} value(s) above the range ('> x') kept as the bound x.")
    if parse.bare_limit:
        report.warnings.append(
            f"{where}: {parse.bare_limit} value(s) below a detection limit without a number ('<LOD') read as missing."
        )
    if parse.mixed:
        report.warnings.append(
            f"{where}: mixes decimal marks; {parse.mixed} value(s) written with the other mark than "
            f"'{report.decimal}' were read as decimals. Please check them."
        )


def _column_arrays(data: pd.DataFrame) -> list[np.ndarray]:
    """The variables' values column by column, without copying a long table into one 2-D block."""
    if len(data.columns) > WIDE:
        return list(data.to_numpy().T)  # already one block
    return [data[c].to_numpy() for c in data.columns]


def _missing_counts(columns: list[np.ndarray], n_rows: int) -> tuple[np.ndarray, np.ndarray]:
    """Missing cells per column and per row (rows are only summed over columns that have any)."""
    per_col = np.zeros(len(columns), dtype=np.int64)
    per_row = np.zeros(n_rows, dtype=np.int64)
    for j, values in enumerate(columns):
        missing = np.isnan(values)
        per_col[j] = np.count_nonzero(missing)
        if per_col[j]:
            per_row += missing
    return per_col, per_row


def _warn_about_values(report, data: pd.DataFrame, columns: list[np.ndarray], col_missing: np.ndarray,
                       row_missing: np.ndarray, where, mostly_missing: float, scoring: bool) -> None:
    n_rows = data.shape[0]
    for c, values, missing in zip(data.columns, columns, col_missing):
        if not scoring and missing < n_rows and n_rows > 1:
            present = values if missing == 0 else values[~np.isnan(values)]
            if present.min() == present.max():
                report.warnings.append(f"{where(c)} is constant; it cannot be autoscaled.")
        if missing / n_rows > mostly_missing:
            report.warnings.append(f"{where(c)} is {missing / n_rows:.0%} missing.")
    frac_row = row_missing / data.shape[1]
    mostly = np.flatnonzero(frac_row > mostly_missing)
    if len(mostly):
        shown = ", ".join(repr(str(s)) for s in data.index[mostly[:MAX_LISTED]])
        report.warnings.append(
            f"{len(mostly)} sample(s) have more than {mostly_missing:.0%} of their values missing: {shown}"
            + (", ..." if len(mostly) > MAX_LISTED else "") + "."
        )
