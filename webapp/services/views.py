"""Saved views: a dataset page's state with a title and a note, behind a shareable link.

A view stores the page state (model settings, axes, colouring, selection, page)
as the query string ``webapp.url_state`` writes, the fingerprint of the model
it showed and the exclusions that model used.  Reopening refits (or reads from
the cache) the model with exactly those settings and exclusions; equal
fingerprints prove the same numbers (DESIGN.md 3).  When the dataset's
approved exclusions changed since, the view says so and offers both "as saved"
and "current".  Both links to the dataset page name the view (``view=<id>``),
and the page starts with the saved selection (``saved_selection``).  The id is
a random URL-safe slug (``secrets.token_urlsafe``), so links cannot be guessed
from one another.
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
        raise InputError("selection must be a list of sample ids")
    if len(value) > MAX_SELECTION:
        raise InputError(f"selection holds {len(value)} samples; the limit is {MAX_SELECTION}")
    return list(dict.fromkeys(str(v) for v in value))


def _fixed_state(state: url_state.ViewState, n_components: int, excluded: list[str]) -> url_state.ViewState:
    """The state with the component count and exclusions written out (what reproduces the model)."""
    return state.with_changes(components=n_components, exclude=excluded)


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
        raise InputError(f"page must be one of {', '.join(PAGES)}, got {page!r}")
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
    explicit = bool(state.exclude)
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


def _as_saved_link(view: Mapping[str, Any], as_saved: url_state.ViewState, current: list[str]) -> str:
    """The dataset page as saved; when that would need "no exclusions" while some are
    approved now (a link without ``exclude`` means the approved ones), the view's own page,
    which shows the numbers as saved."""
    if not view["excluded"] and current:
        return url_state.view_url(view["id"])
    return url_state.dataset_url(view["dataset_id"], as_saved, view_id=view["id"])


def open_view(view_id: str, *, user_id: int | None = None) -> dict[str, Any]:
    """Reopen a view: the model as saved, whether it reproduces, and today's alternative.

    Returns ``view``, ``model`` (summary of the model refitted with the saved
    settings and exclusions), ``reproduced`` (its fingerprint equals the saved
    one), ``exclusions_changed``, ``excluded_as_saved``, ``excluded_current`` and
    ``links`` (``as_saved`` and ``current`` dataset-page URLs; both name the view,
    so the dataset page starts with its selection, see ``saved_selection``).
    """
    from webapp.services import ingest, modelling

    view = get_view(view_id)
    dataset = ingest.dataset_info(view["dataset_id"])
    state = url_state.from_query(view["state"].get("query", ""))
    n_components = view["state"].get("n_components") or state.components
    saved = view["excluded"]
    as_saved = _fixed_state(state, n_components, saved)
    settings = as_saved.model_settings(dataset["variables"])
    settings["exclude"] = list(saved)  # explicit, even when empty: the exclusions as saved
    _, info = modelling.get_model(view["dataset_id"], settings, user_id=user_id)
    explicit = bool(view["state"].get("explicit_exclude"))
    current = saved if explicit else approved_exclusions(view["dataset_id"])
    current_state = state if explicit else state.with_changes(exclude=())
    return {
        "view": view,
        "model": info,
        "fingerprint_saved": view["model_fingerprint"],
        "fingerprint_now": info["fingerprint"],
        "reproduced": info["fingerprint"] == view["model_fingerprint"],
        "exclusions_changed": current != saved,
        "excluded_as_saved": saved,
        "excluded_current": current,
        "links": {
            "as_saved": _as_saved_link(view, as_saved, current),
            "current": url_state.dataset_url(view["dataset_id"], current_state, view_id=view["id"]),
        },
    }


def saved_selection(view_id: str, dataset_id: int, user) -> list[str]:
    """The sample ids selected when a view of ``dataset_id`` was saved, for its dataset page.

    Anyone signed in may open a view (as through the API); a view of another
    dataset is refused, so a link cannot carry one dataset's selection to another.
    Raises ``ViewNotFound`` for an unknown id, ``forbidden`` without a signed-in user.
    """
    from webapp.auth import ROLE_RANK

    signed_in = user is not None and getattr(user, "is_authenticated", True)
    if not signed_in or getattr(user, "role", None) not in ROLE_RANK:
        raise forbidden("sign in to open a saved view")
    view = get_view(view_id)
    if int(view["dataset_id"]) != int(dataset_id):
        raise InputError(f"the saved view {view_id!r} belongs to another dataset")
    return [str(s) for s in view["state"].get("selection") or []]
