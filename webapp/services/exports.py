"""Table exports (CSV and XLSX) that are safe to open in a spreadsheet.

A text cell that starts with ``=``, ``+``, ``-``, ``@``, a tab or a carriage
return can run as a formula when the file is opened in a spreadsheet. Every
text cell and column name written here is neutralised by prefixing a single
quote, as the OWASP guidance on CSV injection recommends (OWASP "CSV
Injection"; ASVS 5.0 requirement 1.2.10). Numbers and booleans stay numbers
and booleans.
"""

from __future__ import annotations

import io
import os
import tempfile
from pathlib import Path

import pandas as pd

FORMULA_TRIGGERS = ("=", "+", "-", "@", "\t", "\r")


def neutralise_formula(text):
    """Return ``text`` with a leading ``'`` when a spreadsheet could read it as a formula.

    Values that are not ``str`` (numbers, booleans, None, NaN) are returned unchanged.
    """
    if isinstance(text, str) and text.startswith(FORMULA_TRIGGERS):
        return "'" + text
    return text


def _neutralised(df: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``df`` with every text cell and column name neutralised."""
    out = df.copy()
    out.columns = [neutralise_formula(str(c)) for c in out.columns]
    for position in range(out.shape[1]):
        column = out.iloc[:, position]
        if pd.api.types.is_numeric_dtype(column) or pd.api.types.is_bool_dtype(column):
            continue
        out.isetitem(position, column.map(neutralise_formula, na_action="ignore").astype(object))
    return out


def to_csv_bytes(df: pd.DataFrame) -> bytes:
    """UTF-8 CSV of ``df`` (no index column), text cells neutralised."""
    return _neutralised(df).to_csv(index=False, lineterminator="\n").encode("utf-8")


def write_csv(df: pd.DataFrame, path) -> None:
    """Write ``df`` as CSV to ``path``; the file appears complete or not at all."""
    write_atomic(Path(path), to_csv_bytes(df))


def to_xlsx_bytes(df: pd.DataFrame, sheet_name: str = "data") -> bytes:
    """XLSX workbook with one sheet holding ``df`` (no index column), text cells neutralised."""
    buffer = io.BytesIO()
    with pd.ExcelWriter(buffer, engine="openpyxl") as writer:
        _neutralised(df).to_excel(writer, sheet_name=sheet_name, index=False)
    return buffer.getvalue()


def write_atomic(path: Path, payload: bytes) -> None:
    """Write ``payload`` to a temporary file beside ``path`` and rename it into place."""
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(payload)
        os.replace(temporary, path)
    except BaseException:
        if os.path.exists(temporary):
            os.unlink(temporary)
        raise
