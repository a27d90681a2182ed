"""Saved views: a dataset page's state with a title and a note, behind a shareable link.

A view stores the page state (model settings, axes, colouring, selection, page)
as the query string ``webapp.url_state`` writes, the fingerprint of the model
it showed and the exclusions that model used.  Reopening refits (or reads from
the cache) the model with exactly those settings and exclusions; equal
fingerprints prove the same numbers (docs/design.md section 3).  The "as saved" link to the
dataset page writes the saved exclusions out (``include=all`` when there were
none), so the full page shows the saved model whatever was approved since; the
"current" link leaves them to today's approved exclusions.  When those changed,
both the view and the dataset page say what differs (``exclusion_change``,
``compare_with_view``).  Both links name the view (``view=<id>``), and the page
starts with the saved selection (``saved_selection``).  The id is a random
URL-safe slug (``secrets.token_urlsafe``), so links cannot be guessed from one
another.
"""

from __future__ import annotations

import secrets
from typing import Any, Mapping

from analysis.errors import InputError
from webapp.services import audit
from webapp.services.context import session_scope
from webapp.services.exclusions import approved_exclusions
from webapp.services.review import run_write
from webapp.services.review_rules import clean_text, forbidden
from webapp.store import review as store
from webapp import url_state

PAGES = ("dataset",)
MAX_TITLE_CHARS = 300
MAX_NOTE_CHARS = 4000
MAX_SELECTION = 100_000
SLUG_BYTES = 12


class ViewNotFound(LookupError):
    """No saved view with that id (the API answers 404)."""


def _selection(value) -> list[str]:
    if value is None:
        return []
    if not isinstance(value, (list, tuple)):
        raise InputError("selection must be a list of sample ids", field="selection")
    if len(value) > MAX_SELECTION:
        raise InputError(f"selection holds {len(value)} samples; the limit is {MAX_SELECTION}")
    return list(dict.fromkeys(str(v) for v in value))


def _fixed_state(state: url_state.ViewState, n_components: int, excluded: list[str]) -> url_state.ViewState:
    """The state with the component count and exclusions written out (what reproduces the model);
    no exclusions are written as ``include_all``, which later approvals do not change."""
    return state.with_changes(components=n_components, exclude=excluded, include_all=not excluded)


def save_view(
    user,
    dataset_id: int,
    *,
    query: str | Mapping[str, Any],
    title,
    note="",
    selection=None,
    page: str = "dataset",
) -> dict[str, Any]:
    """Store a view of a dataset page; returns ``{"id", "url", ...}``.

    ``query`` is the page's query string (or Dash's query dict).  Analysts,
    reviewers and admins may save; viewers only open views.
    """
    from webapp.auth import has_role
    from webapp.services import ingest, modelling

    if not has_role(user.role, "analyst"):
        raise forbidden(f"a {user.role} cannot save views; analysts and reviewers can")
    if page not in PAGES:
        raise InputError(f"page must be one of {', '.join(PAGES)}, got {page!r:.80}", field="page")
    title_text = clean_text(title, field="title", limit=MAX_TITLE_CHARS, required=True)
    note_text = clean_text(note, field="note", limit=MAX_NOTE_CHARS, required=False)
    chosen = _selection(selection)
    state, notes = url_state.parse_query(query)
    if notes:
        raise InputError("; ".join(notes))
    dataset = ingest.dataset_info(dataset_id)
    unknown = [s for s in chosen if s not in set(ingest.load_table(dataset_id).sample_ids)]
    if unknown:
        raise InputError(f"selection names unknown sample id(s): {', '.join(unknown[:10])}")
    _, info = modelling.get_model(dataset_id, state.model_settings(dataset["variables"]), user_id=user.id)
    explicit = bool(state.exclude) or state.include_all
    stored_state = {
        "page": page,
        "query": url_state.to_query(state),
        "selection": chosen,
        "explicit_exclude": explicit,
        "n_components": info["n_components"],
    }

    def work(session):
        view_id = secrets.token_urlsafe(SLUG_BYTES)
        row = store.insert_view(
            session,
            id=view_id,
            dataset_id=dataset_id,
            title=title_text,
            note=note_text,
            state=stored_state,
            model_fingerprint=info["fingerprint"],
            excluded=list(info["excluded"]),
            created_by=user.id,
            created_at=audit.now_utc(),
        )
        audit.append(
            session,
            actor_id=user.id,
            actor_name=user.display_name,
            action="save_view",
            dataset_id=dataset_id,
            payload={
                "account": user.name,
                "view_id": view_id,
                "title": title_text,
                "model_fingerprint": info["fingerprint"],
                "excluded": list(info["excluded"]),
            },
        )
        return _view_dict(row, {user.id: user.display_name})

    return run_write(work)


def _view_dict(row, names: Mapping[int, str]) -> dict[str, Any]:
    return {
        "id": row.id,
        "url": url_state.view_url(row.id),
        "dataset_id": row.dataset_id,
        "title": row.title,
        "note": row.note,
        "state": row.state,
        "model_fingerprint": row.model_fingerprint,
        "excluded": list(row.excluded),
        "created_by": row.created_by,
        "created_by_name": names.get(row.created_by),
        "created_at": audit.utc_iso(row.created_at),
    }


def list_views(dataset_id: int | None = None) -> list[dict[str, Any]]:
    """Saved views, newest first (one dataset or all)."""
    with session_scope() as session:
        rows = store.list_views(session, dataset_id)
        names = store.display_names(session, [r.created_by for r in rows])
        return [_view_dict(r, names) for r in rows]


def get_view(view_id: str) -> dict[str, Any]:
    with session_scope() as session:
        row = store.get_view(session, str(view_id))
        if row is None:
            raise ViewNotFound(view_id)
        return _view_dict(row, store.display_names(session, [row.created_by]))


def _samples(count: int) -> str:
    return f"{count} sample{'s' if count != 1 else ''}"


def _names(values, limit: int = 10) -> str:
    values = list(values)
    more = f" and {len(values) - limit} more" if len(values) > limit else ""
    return ", ".join(values[:limit]) + more


def exclusion_change(saved, now, *, approved: bool = True) -> str | None:
    """What differs between the samples a view's model left out (``saved``) and those
    left out ``now``, as a sentence; None when they are the same.

    ``approved``: ``now`` are the dataset's approved exclusions (else a what-if list).
    """
    more = sorted(set(now) - set(saved))
    fewer = sorted(set(saved) - set(now))
    if not more and not fewer:
        return None
    parts = []
    if more:
        parts.append(f"{len(more)} more sample{'s' if len(more) != 1 else ''} excluded ({_names(more)})")
    if fewer:
        parts.append(f"{_samples(len(fewer))} put back ({_names(fewer)})")
    lead = ("Approved exclusions changed since this view was saved" if approved
            else "Other samples are left out than in the saved view")
    return f"{lead}: {'; '.join(parts)}."


def _links(view: Mapping[str, Any], state: url_state.ViewState, explicit: bool) -> dict[str, str]:
    """Dataset-page links of a view: ``as_saved`` (exclusions written out) and ``current``
    (today's approved exclusions, unless the view was saved with its own what-if list)."""
    n_components = view["state"].get("n_components") or state.components
    as_saved = _fixed_state(state, n_components, view["excluded"])
    current = state if explicit else state.with_changes(exclude=(), include_all=False)
    return {
        "as_saved": url_state.dataset_url(view["dataset_id"], as_saved, view_id=view["id"]),
        "current": url_state.dataset_url(view["dataset_id"], current, view_id=view["id"]),
    }


def open_view(view_id: str, *, user_id: int | None = None) -> dict[str, Any]:
    """Reopen a view: the model as saved, whether it reproduces, and today's alternative.

    Returns ``view``, ``model`` (summary of the model refitted with the saved
    settings and exclusions), ``reproduced`` (its fingerprint equals the saved
    one), ``exclusions_changed``, ``excluded_as_saved``, ``excluded_current``,
    ``change`` (``exclusion_change`` of the two, or None) and ``links``
    (``as_saved`` and ``current`` dataset-page URLs; both name the view, so the
    dataset page starts with its selection, see ``saved_selection``).
    """
    from webapp.services import ingest, modelling

    view = get_view(view_id)
    dataset = ingest.dataset_info(view["dataset_id"])
    state = url_state.from_query(view["state"].get("query", ""))
    n_components = view["state"].get("n_components") or state.components
    saved = view["excluded"]
    as_saved = _fixed_state(state, n_components, saved)
    settings = as_saved.model_settings(dataset["variables"])  # exclusions as saved, even none
    _, info = modelling.get_model(view["dataset_id"], settings, user_id=user_id)
    explicit = bool(view["state"].get("explicit_exclude"))
    current = saved if explicit else approved_exclusions(view["dataset_id"])
    return {
        "view": view,
        "model": info,
        "fingerprint_saved": view["model_fingerprint"],
        "fingerprint_now": info["fingerprint"],
        "reproduced": info["fingerprint"] == view["model_fingerprint"],
        "exclusions_changed": current != saved,
        "excluded_as_saved": saved,
        "excluded_current": current,
        "change": exclusion_change(saved, current),
        "links": _links(view, state, explicit),
    }


def _view_for_page(view_id: str, dataset_id: int, user) -> dict[str, Any]:
    """The view a dataset page's link names, for a signed-in ``user``.

    Anyone signed in may open a view (as through the API); a view of another
    dataset is refused, so a link cannot carry one dataset's view to another.
    Raises ``ViewNotFound`` for an unknown id, ``forbidden`` without a signed-in user.
    """
    from webapp.auth import ROLE_RANK

    signed_in = user is not None and getattr(user, "is_authenticated", True)
    if not signed_in or getattr(user, "role", None) not in ROLE_RANK:
        raise forbidden("sign in to open a saved view")
    view = get_view(view_id)
    if int(view["dataset_id"]) != int(dataset_id):
        raise InputError(f"the saved view {view_id!r} belongs to another dataset")
    return view


def saved_selection(view_id: str, dataset_id: int, user) -> list[str]:
    """The sample ids selected when a view of ``dataset_id`` was saved, for its dataset page
    (refusals as in ``_view_for_page``)."""
    view = _view_for_page(view_id, dataset_id, user)
    return [str(s) for s in view["state"].get("selection") or []]


def _setting_changes(saved: url_state.ViewState, n_saved: int | None, variables: list[str],
                     shown: Mapping[str, Any]) -> list[str]:
    """Sentences for the fit settings of the model on a page (``shown``) that differ from a view's."""
    settings = shown.get("settings") or {}
    expected = saved.model_settings(variables)
    changes = []
    if n_saved and shown.get("n_components") != n_saved:
        changes.append(f"{shown.get('n_components')} component(s) instead of the saved {n_saved}.")
    if settings.get("scaling", expected["scaling"]) != expected["scaling"]:
        changes.append(f"Scaling {settings['scaling']} instead of the saved {expected['scaling']}.")
    kept = settings.get("variables")
    if kept is not None and list(kept) != expected["variables"]:
        out_now = [v for v in variables if v not in set(kept)]
        changes.append(f"Variables left out: {_names(out_now) or 'none'} (saved: {_names(saved.drop) or 'none'}).")
    if sorted(settings.get("log10") or []) != sorted(expected["log10"]):
        changes.append(f"log10 on {_names(settings.get('log10') or []) or 'no variable'} "
                       f"(saved: {_names(expected['log10']) or 'no variable'}).")
    confidence = shown.get("confidence")
    if confidence is not None and float(confidence) != saved.confidence:
        changes.append(f"Limits at {100 * float(confidence):g}% instead of the saved {100 * saved.confidence:g}%.")
    return changes


def compare_with_view(view_id: str, dataset_id: int, user, shown: Mapping[str, Any]) -> dict[str, Any]:
    """How the model on a dataset page compares with the saved view its link names.

    ``shown`` is the page's fit result (``fingerprint``, ``excluded``, ``what_if``,
    ``n_components``, ``settings``, ``confidence``). Returns ``view``, ``same``
    (equal fingerprints: the numbers as saved, docs/design.md section 3), ``differences``
    (sentences saying what differs; with equal fingerprints only the confidence
    level of the limits can), ``current_change`` (``exclusion_change`` between the
    view and today's approved exclusions: what the "current" link shows
    differently; None when nothing changed or the view has its own what-if list)
    and ``links`` (``as_saved``, ``current``, as in ``open_view``). Refusals as in
    ``_view_for_page``.
    """
    from webapp.services import ingest

    view = _view_for_page(view_id, dataset_id, user)
    saved = url_state.from_query(view["state"].get("query", ""))
    same = shown.get("fingerprint") == view["model_fingerprint"]
    differences = _setting_changes(saved, view["state"].get("n_components"),
                                   ingest.dataset_info(view["dataset_id"])["variables"], shown)
    change = exclusion_change(view["excluded"], shown.get("excluded") or [], approved=not shown.get("what_if"))
    if change and not same:
        differences.insert(0, change)
    if not same and not differences:
        differences.append("The model's fingerprint differs from the saved one although the settings are the same: "
                           "the software version or the reading of the data changed.")
    explicit = bool(view["state"].get("explicit_exclude"))
    return {
        "view": view,
        "same": same,
        "differences": differences,
        "current_change": None if explicit else exclusion_change(view["excluded"], approved_exclusions(dataset_id)),
        "links": _links(view, saved, explicit),
    }
