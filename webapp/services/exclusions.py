"""Which samples a dataset's current model leaves out.

The approved exclusions, folded in the order they were signed (an approved
reinstatement puts samples back), and the fit settings that apply them. Both
the modelling and the review services read this; neither owns it.
"""

from __future__ import annotations

from typing import Any, Mapping

from webapp.services.context import session_scope
from webapp.services.review_rules import fold_exclusions
from webapp.store import review as store


def approved_exclusions(dataset_id: int) -> list[str]:
    """Sorted sample ids the dataset's current model leaves out (exclusions minus reinstatements)."""
    with session_scope() as session:
        return approved_in(session, dataset_id)


def approved_in(session, dataset_id: int) -> list[str]:
    """``approved_exclusions`` inside an open transaction."""
    return fold_exclusions(store.approved_in_order(session, dataset_id))


def exclusion_settings(dataset_id: int, settings: Mapping[str, Any]) -> tuple[dict[str, Any], dict[str, Any]]:
    """Fit settings with the approved exclusions applied when no ``exclude`` is given.

    Returns ``(settings, note)``; ``note`` holds ``approved_exclusions`` and
    ``what_if``: True when an explicit ``exclude`` list differs from the approved
    exclusions (a preview that changes nothing in the record).
    """
    approved = approved_exclusions(dataset_id)
    settings = dict(settings)
    if settings.get("exclude") is None:
        settings["exclude"] = approved
        return settings, {"approved_exclusions": approved, "what_if": False}
    given = settings["exclude"]
    explicit = sorted({str(s) for s in given}) if isinstance(given, (list, tuple)) else given
    return settings, {"approved_exclusions": approved, "what_if": explicit != approved}
