"""The password policy for new passwords (NIST SP 800-63B, 2017, section 5.1.1.2).

A new password needs ``MIN_LENGTH`` to ``MAX_LENGTH`` characters (each Unicode code
point counts as one) and no composition rules (no "one digit, one symbol"). It is
refused when it is, ignoring case:

- on the shipped list of commonly used passwords (``common_passwords.txt``), or one
  list entry typed several times;
- one short group of characters repeated (``aaaaaaaaaaaa``, ``abcabcabcabc``);
- a run of consecutive letters or digits (``abcdefghijkl``, ``123456789012``);
- the account name or the application's name, repeated or with only digits and
  symbols added (``latentdesk2024!``).

Messages say which rule refused the password and never repeat it.

References
----------
Grassi, P.A. et al. (2017) NIST SP 800-63B, Digital Identity Guidelines:
Authentication and Lifecycle Management, section 5.1.1.2 (memorized secret
verifiers) and appendix A (strength of memorized secrets).
"""

from __future__ import annotations

from functools import cache
from importlib import resources

from analysis.errors import InputError

MIN_LENGTH = 12
MAX_LENGTH = 256
# Groups this short repeated are refused on their own; longer ones only when on the list.
SHORT_GROUP = 4
APPLICATION_NAME = "latentdesk"
LIST_FILE = "common_passwords.txt"
DIGITS = "0123456789"


@cache
def common_passwords() -> frozenset[str]:
    """The shipped list, lower case, read once on first use."""
    text = resources.files(__package__).joinpath(LIST_FILE).read_text(encoding="utf-8")
    lines = (line.strip() for line in text.splitlines())
    return frozenset(line.casefold() for line in lines if line and not line.startswith("#"))


def check(password: str, name: str | None = None) -> None:
    """Raise InputError (field ``password``) unless ``password`` may be set for ``name``."""
    reason = _refusal(password, name)
    if reason is not None:
        raise InputError(reason, field="password")


def _refusal(password: str, name: str | None = None) -> str | None:
    """Why ``password`` is refused for the account ``name``, or None when it is fine."""
    if len(password) < MIN_LENGTH:
        return (
            f"password too short: at least {MIN_LENGTH} characters needed"
            " (a phrase of a few words is easy to remember)"
        )
    if len(password) > MAX_LENGTH:
        return f"password too long: at most {MAX_LENGTH} characters"
    folded = password.casefold()
    group = _repeated_group(folded)
    if folded in common_passwords() or group in common_passwords():
        return "password refused: it is on the list of commonly used passwords that attackers try first"
    if len(group) <= SHORT_GROUP:
        return "password refused: it is one short group of characters repeated"
    if _is_consecutive_run(folded):
        return "password refused: it is a run of consecutive letters or digits"
    if _is_context_word(folded, group, name):
        return "password refused: it is the account name or the application's name, or a variant of one"
    return None


def _repeated_group(text: str) -> str:
    """The shortest group that ``text`` is made of, repeated ('abab' -> 'ab', 'abc' -> 'abc')."""
    for size in range(1, len(text) // 2 + 1):
        if len(text) % size == 0 and text[:size] * (len(text) // size) == text:
            return text[:size]
    return text


def _is_consecutive_run(text: str) -> bool:
    """Whether each character follows the one before it, all up or all down.

    Letters and other characters follow by code point; digits also wrap from 9 to 0
    (and 0 to 9 going down), as on a keyboard's digit row.
    """
    if len(text) < 2:
        return False
    steps = {_step(a, b) for a, b in zip(text, text[1:])}
    return steps == {1} or steps == {-1}


def _step(a: str, b: str) -> int | None:
    if a in DIGITS and b in DIGITS:
        difference = (DIGITS.index(b) - DIGITS.index(a)) % len(DIGITS)
        return {1: 1, len(DIGITS) - 1: -1}.get(difference)
    difference = ord(b) - ord(a)
    return difference if difference in (1, -1) else None


def _letters(text: str) -> str:
    return "".join(ch for ch in text if ch.isalpha())


def _is_context_word(folded: str, group: str, name: str | None) -> bool:
    """The password is a context word, that word repeated, or that word plus non-letters."""
    words = {APPLICATION_NAME}
    if name and name.strip():
        words.add(name.strip().casefold())
    cores = {folded, group, _letters(folded), _repeated_group(_letters(folded))}
    return any(word in cores or (_letters(word) and _letters(word) in cores) for word in words)
