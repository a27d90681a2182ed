"""Reading one cell of a lab or survey table as a number.

Owns the cell vocabulary of intake: missing-value markers, detection-limit
values ("<0.05"), above-range values ("> 1000"), thousands separators and
the two decimal marks. Used for the columns that pandas' C parser could not
type as numbers, and for text cells of XLSX sheets.

Detection-limit substitution (LOD/2, LOD/sqrt(2)) is common practice for
multivariate screening of censored lab values; the policy is always reported.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

# Compared in lower case after stripping blanks.
MISSING_MARKERS = frozenset(
    {
        "", "na", "n/a", "n.a.", "n.a", "nan", "-nan", "null", "none", "missing", "-", "--", "---",
        "?", "??", ".", "nd", "n.d.", "n.d", "n/d", "#n/a", "#n/a n/a", "#na", "#value!", "#div/0!",
        "#num!", "#ref!", "#name?", "#null!", "#calc!", "#spill!", "#getting_data", "not available",
    }
)
# The spellings matched exactly (pandas' C parser, text columns): as written, upper case,
# capitalised and title case, plus "NaN".
MARKER_SPELLINGS = sorted(
    {v for m in MISSING_MARKERS for v in (m, m.upper(), m.capitalize(), m.title())} | {"NaN"}
)

_SIGN = r"[+-]?"
_EXP = r"(?:[eE][+-]?\d+)?"
_PLAIN = {
    ".": re.compile(rf"^{_SIGN}(?:\d+(?:\.\d*)?|\.\d+){_EXP}$"),
    ",": re.compile(rf"^{_SIGN}(?:\d+(?:,\d*)?|,\d+){_EXP}$"),
}
# Digits grouped by the *other* mark: "1.234,5" (decimal comma) or "1,234.5" (decimal point).
_GROUPED = {
    ".": re.compile(r"^[+-]?\d{1,3}((?:,\d{3})+)(\.\d+)?$"),
    ",": re.compile(r"^[+-]?\d{1,3}((?:\.\d{3})+)(,\d+)?$"),
}
_SPACE_GROUPED = re.compile(r"^[+-]?\d{1,3}(?:[ \u00a0\u202f']\d{3})+(?:[.,]\d+)?$")
_INFINITE = re.compile(r"^[+-]?(?:inf|infinity|\u221e|#inf)$", re.IGNORECASE)
_BELOW = re.compile(r"^(?:<=?|\u2264|&lt;)\s*(.+)$")
_ABOVE = re.compile(r"^(?:>=?|\u2265|&gt;)\s*(.+)$")
_BARE_LIMIT = re.compile(
    r"^(?:(?:<=?|\u2264)\s*(?:lod|loq|dl|mdl|lor|ql|rl|pql|d\.l\.|l\.o\.d\.|l\.o\.q\.|detection limit)"
    r"|bdl|bql|blq|below lod|below loq|below detection limit|not detected)$",
    re.IGNORECASE,
)

# Cell kinds.
NUMBER, OTHER_MARK, AMBIGUOUS, MISSING, BARE_LIMIT, BELOW, ABOVE, BAD, INFINITE = range(9)


def parse_number(text: str, decimal: str):
    """Read ``text`` as a number written with decimal mark ``decimal``.

    Returns ``(kind, value, alternative)``: kind NUMBER, OTHER_MARK (the other
    decimal mark was used, e.g. "0.5" in a decimal-comma file), AMBIGUOUS
    (e.g. "1.234" in a decimal-comma file: thousands grouping by default,
    ``alternative`` holds the reading as a decimal) or BAD.
    """
    other = "," if decimal == "." else "."
    t = text.replace("\u2212", "-")
    if _PLAIN[decimal].match(t):
        return NUMBER, float(t.replace(",", ".")), None
    m = _GROUPED[decimal].match(t)
    if m:
        plain = t.replace(other, "").replace(",", ".")
        if m.group(2) is None and m.group(1).count(other) == 1:
            return AMBIGUOUS, float(plain), float(t.replace(",", "."))
        return NUMBER, float(plain), None
    if _SPACE_GROUPED.match(t):
        return NUMBER, float(re.sub(r"[ \u00a0\u202f']", "", t).replace(",", ".")), None
    if _PLAIN[other].match(t):
        return OTHER_MARK, float(t.replace(",", ".")), None
    return BAD, math.nan, None


def parse_cell(value, decimal: str):
    """Classify one raw cell; returns ``(kind, value, alternative)``.

    Numbers (int/float from a spreadsheet) pass through; text is read with
    :func:`parse_number`, after missing markers, infinities, "<LOD", "<0.05"
    and "> 1000" are recognised.
    """
    if value is None:
        return MISSING, math.nan, None
    if isinstance(value, bool):
        return BAD, math.nan, None
    if isinstance(value, (int, float, np.integer, np.floating)):
        v = float(value)
        if math.isnan(v):
            return MISSING, v, None
        return (NUMBER if math.isfinite(v) else INFINITE), v, None
    text = str(value).strip().strip("\"'").strip()
    if text.lower() in MISSING_MARKERS:
        return MISSING, math.nan, None
    if _INFINITE.match(text):
        return INFINITE, math.nan, None
    if _BARE_LIMIT.match(text):
        return BARE_LIMIT, math.nan, None
    for pattern, kind in ((_BELOW, BELOW), (_ABOVE, ABOVE)):
        m = pattern.match(text)
        if m:
            inner, v, alt = parse_number(m.group(1).strip(), decimal)
            if inner in (NUMBER, OTHER_MARK, AMBIGUOUS) and math.isfinite(v):
                return kind, v, alt
            return BAD, math.nan, None
    kind, v, alt = parse_number(text, decimal)
    if kind != BAD and not math.isfinite(v):
        return INFINITE, math.nan, None
    return kind, v, alt


def looks_numeric(value, decimal: str) -> bool:
    """True when the cell holds a number (infinite included), a detection-limit value or a range bound."""
    return parse_cell(value, decimal)[0] in (NUMBER, OTHER_MARK, AMBIGUOUS, BELOW, ABOVE, BARE_LIMIT, INFINITE)


@dataclass
class ColumnParse:
    """Result of reading one text column as numbers."""

    values: np.ndarray
    missing: int = 0
    bare_limit: int = 0
    below: int = 0
    above: int = 0
    mixed: int = 0
    bad: list = field(default_factory=list)  # (position, raw text, reason)


def parse_column(cells, decimal: str, below_limit: str) -> ColumnParse:
    """Read a sequence of raw cells as float64, applying the detection-limit policy.

    ``below_limit``: "half" (LOD/2), "sqrt2" (LOD/sqrt(2)) or "missing".
    Cells written with the other decimal mark count as ``mixed``; if a column
    has any, ambiguous cells such as "1.234" are read as decimals too,
    otherwise as thousands groupings.
    """
    cells = np.asarray(cells, dtype=object)
    codes, uniques = _factorize(cells)
    vals = _plain_numbers(uniques, decimal)
    kinds = np.full(len(uniques), NUMBER, dtype=np.int8)
    alternatives = {}
    for i in np.flatnonzero(np.isnan(vals)):  # only what the vectorised pass could not read
        kinds[i], vals[i], alt = parse_cell(uniques[i], decimal)
        if alt is not None:
            alternatives[i] = alt
    counts = np.bincount(codes, minlength=len(uniques))
    if ((kinds == OTHER_MARK) & (counts > 0)).any():
        for i, alt in alternatives.items():
            vals[i] = alt
            kinds[i] = OTHER_MARK if kinds[i] == AMBIGUOUS else kinds[i]
    factor = {"half": 0.5, "sqrt2": 1.0 / math.sqrt(2.0), "missing": math.nan}[below_limit]
    below_mask = kinds == BELOW
    vals[below_mask] = vals[below_mask] * factor
    bad_mask = (kinds == BAD) | (kinds == INFINITE)
    vals[bad_mask | (kinds == BARE_LIMIT)] = math.nan
    out = ColumnParse(values=vals[codes] if len(cells) else np.empty(0))

    def total(mask):
        return int(counts[mask].sum())

    out.missing = total(kinds == MISSING)
    out.bare_limit = total(kinds == BARE_LIMIT)
    out.below = total(below_mask)
    out.above = total(kinds == ABOVE)
    out.mixed = total(kinds == OTHER_MARK)
    if bad_mask.any():
        positions = np.flatnonzero(bad_mask[codes])
        for pos in positions:
            u = int(codes[pos])
            reason = "infinite value" if kinds[u] == INFINITE else "not a number"
            out.bad.append((int(pos), str(uniques[u]), reason))
    return out


def _plain_numbers(uniques: list, decimal: str) -> np.ndarray:
    """Finite plain numbers read in one vectorised pass; NaN for everything else.

    Text holding the other decimal mark is left out here (it may be a thousands
    grouping), as are infinities, so :func:`parse_cell` decides those.
    """
    other = "." if decimal == "," else ","
    text = pd.Series([u if isinstance(u, str) else None for u in uniques], dtype=object)
    plain = text.where(~text.str.contains(other, regex=False, na=True))
    if decimal == ",":
        plain = plain.str.replace(",", ".", regex=False)
    values = pd.to_numeric(plain, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan, copy=True)
    readable = np.isfinite(values)
    try:
        # to_numeric only decides what is readable; numpy converts as float() does (correctly rounded).
        values[readable] = np.asarray(plain[readable].tolist(), dtype=np.float64)
    except ValueError:
        return np.full(len(uniques), np.nan)  # something float() refuses: let parse_cell read every cell
    return np.where(readable, values, np.nan)


def _factorize(cells: np.ndarray):
    """Codes and unique values of an object array; None/NaN get one extra code."""
    codes, uniques = pd.factorize(cells, use_na_sentinel=True)
    uniques = list(uniques)
    codes = np.where(codes < 0, len(uniques), codes)
    uniques.append(None)
    return codes, uniques
