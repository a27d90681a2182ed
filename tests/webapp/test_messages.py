"""Refused input on a page reads as a sentence (common practice for user-facing text)."""

from analysis.errors import InputError
from webapp.web.ui import messages


def test_a_service_message_becomes_a_sentence():
    assert messages.as_sentence("the password is not correct; nothing was signed") == \
        "The password is not correct; nothing was signed."
    assert messages.as_sentence("Choose a reason category (a, b); none was chosen.") == \
        "Choose a reason category (a, b); none was chosen."
    assert messages.as_sentence("") == ""


def test_the_alert_is_announced():
    paragraph = messages.problem(InputError("'x' is missing"))
    assert paragraph.role == "alert" and paragraph.children == "'x' is missing."
