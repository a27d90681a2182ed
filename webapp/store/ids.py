"""The one rule for row ids that arrive from outside: in a URL, a query string or a JSON body.

An id is a whole number from 1 to ``MAX_ID``, the widest value the id columns
hold (``Integer`` primary keys: 32-bit on PostgreSQL). A URL id is written in
ASCII digits only, with no sign, no blanks and no leading zero, so each id has
exactly one spelling; anything else names no row. Checking this before a query
keeps a value the database cannot bind (SQLite refuses integers past 2**63 - 1)
from turning into a server error.

References: OWASP Input Validation Cheat Sheet (syntactic validation against an
allow-list, canonical form, range checks); Python's ``str.isdigit`` and ``int``
accept non-ASCII digits such as Arabic-Indic and full-width ones, hence the
explicit ASCII check.
"""

from __future__ import annotations

import re
from typing import Any

from analysis.errors import InputError

MAX_ID = 2**31 - 1  # the id columns are 32-bit integers on PostgreSQL
_CANONICAL = re.compile(r"[1-9][0-9]{0,9}")  # ASCII only ([0-9], not \d); MAX_ID has 10 digits


def is_id(value: Any) -> bool:
    """Whether ``value`` is an int (not a bool) that could name a stored row."""
    return isinstance(value, int) and not isinstance(value, bool) and 1 <= value <= MAX_ID


def parse_id(text: Any) -> int | None:
    """The id ``text`` spells (``"12"`` -> 12), or None for anything that names no row.

    None for: non-text, blanks, signs (``"-1"``, ``"+1"``), leading zeros, non-ASCII
    digits (``"١٢٣"``, ``"１２"``), zero and values past ``MAX_ID``.
    """
    if not isinstance(text, str) or _CANONICAL.fullmatch(text) is None:
        return None
    value = int(text)
    return value if value <= MAX_ID else None


def check_id(value: Any, field: str) -> int:
    """A row id sent in a request body: a JSON whole number from 1 to ``MAX_ID``.

    Raises InputError naming ``field`` for anything else: text (``"3"``), a bool,
    a float (``3.0``), a list, zero, a negative number or one past the range.
    """
    if isinstance(value, bool) or not isinstance(value, int):
        shown = "nothing" if value is None else f"{type(value).__name__} {value!r}"[:80]
        raise InputError(f"{field} must be a whole number (an id), got {shown}", field=field)
    if not is_id(value):
        # str() of an int past 4300 digits raises (Python's int/str conversion limit)
        shown = str(value) if value.bit_length() <= 128 else f"a {value.bit_length()}-bit number"
        raise InputError(f"{field} {shown} is out of range: ids run from 1 to {MAX_ID}", field=field)
    return value
