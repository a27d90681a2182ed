"""A refused input shown to a person: the service's message as a sentence.

Services word their messages for both the API and the pages ("the password is
not correct; nothing was signed"); on a page the message starts with a capital
letter, ends with a full stop and is announced by screen readers (role="alert",
WAI-ARIA 1.2).
"""

from __future__ import annotations

from dash import html


def as_sentence(text: str) -> str:
    """``text`` with a capital first letter and a closing full stop."""
    text = str(text).strip()
    if not text:
        return text
    text = text[0].upper() + text[1:]
    return text if text.endswith((".", "!", "?")) else text + "."


def problem(exc: Exception) -> html.P:
    """The alert paragraph for a refused input."""
    return html.P(as_sentence(str(exc)), className="ld-alert", role="alert")
