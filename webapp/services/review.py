"""Exclusion proposals and their sign-off: propose, approve / reject, withdraw.

An exclusion is an annotation: the raw data never change.  The dataset's
current model leaves out ``approved_exclusions(dataset_id)``; reversing an
approved exclusion takes a new, signed proposal to reinstate (docs/design.md section 6).

Each write runs in one transaction that first takes the review write lock
(``webapp.store.review.lock_review``), changes the proposal and appends to the
review log, so the record and its log entry commit together.  Two reviewers
signing at once give one decision: the conditional ``UPDATE ... WHERE
state = 'proposed'`` and the ``UNIQUE(proposal_id)`` on ``sign_offs`` each refuse
the second, in the database.

Signatures record printed name, UTC time and meaning after re-entry of the
password (US FDA 21 CFR Part 11, 11.50, 11.70, 11.200(a); EU GMP Annex 11,
2011, section 14).  LatentDesk does not claim compliance; that is the site's
validation matter.
"""

from __future__ import annotations

import random
import time
from typing import Any, Callable, Mapping, TypeVar

from sqlalchemy.exc import IntegrityError, OperationalError

from analysis.errors import InputError

from webapp.services import audit
from webapp.services.exclusions import approved_exclusions, approved_in
from webapp.services.context import session_scope
from webapp.services.review_rules import (
    MAX_COMMENT_CHARS,
    MEANINGS,
    ReviewRefused,
    after_exclusions,
    check_approval,
    check_can_propose,
    check_can_sign,
    check_can_withdraw,
    check_not_in_open_proposal,
    check_open,
    check_proposal,
    clean_text,
    conflict,
)
from webapp.store import review as store

T = TypeVar("T")
WRITE_ATTEMPTS = 8


class ProposalNotFound(LookupError):
    """No proposal with that id (the API answers 404)."""


# --- the write transaction ----------------------------------------------------------------


def _retryable(exc: Exception) -> bool:
    text = str(getattr(exc, "orig", exc)).lower()
    if isinstance(exc, IntegrityError):
        return "review_log" in text  # two writers took the same seq: try again
    return any(word in text for word in ("locked", "busy", "deadlock", "could not serialize"))


def run_write(work: Callable[[Any], T]) -> T:
    """Run ``work(session)`` in a locked review transaction, retrying lost races.

    A second sign-off of the same proposal is not retried: it is a conflict.
    """
    for attempt in range(WRITE_ATTEMPTS):
        try:
            with session_scope() as session:
                store.lock_review(session)
                return work(session)
        except IntegrityError as exc:
            if "sign_offs" in str(exc.orig).lower():
                raise conflict("this proposal was decided by someone else a moment ago") from None
            if not _retryable(exc) or attempt == WRITE_ATTEMPTS - 1:
                raise
        except (OperationalError, audit.ChainMoved) as exc:
            if not (isinstance(exc, audit.ChainMoved) or _retryable(exc)) or attempt == WRITE_ATTEMPTS - 1:
                raise
        time.sleep(random.uniform(0.01, 0.05) * (attempt + 1))
    raise AssertionError("unreachable")


# --- reading ------------------------------------------------------------------------------


def _proposal_dict(row, sign_off=None, names: Mapping[int, str] | None = None) -> dict[str, Any]:
    names = names or {}
    signature = None
    if sign_off is not None:
        signature = {
            "signer_id": sign_off.signer_id,
            "printed_name": sign_off.printed_name,
            "meaning": sign_off.meaning,
            "comment": sign_off.comment,
            "signed_at": audit.utc_iso(sign_off.signed_at),
        }
    return {
        "id": row.id,
        "dataset_id": row.dataset_id,
        "action": row.action,
        "samples": list(row.samples),
        "reason_category": row.reason_category,
        "reason": row.reason,
        "proposed_by": row.proposed_by,
        "proposed_by_name": names.get(row.proposed_by),
        "created_at": audit.utc_iso(row.created_at),
        "state": row.state,
        "decided_at": audit.utc_iso(row.decided_at) if row.decided_at else None,
        "comparison": row.comparison,
        "sign_off": signature,
    }


def get_proposal(proposal_id: int) -> dict[str, Any]:
    with session_scope() as session:
        row = store.get_proposal(session, proposal_id)
        if row is None:
            raise ProposalNotFound(proposal_id)
        names = store.display_names(session, [row.proposed_by])
        return _proposal_dict(row, store.sign_off_of(session, proposal_id), names)


def list_proposals(dataset_id: int | None = None, states: list[str] | None = None) -> list[dict[str, Any]]:
    """Proposals (oldest first) with their sign-offs and the proposers' printed names."""
    with session_scope() as session:
        rows = store.list_proposals(session, dataset_id=dataset_id, states=states)
        sign_offs = store.sign_offs_for(session, [r.id for r in rows])
        names = store.display_names(session, [r.proposed_by for r in rows])
        return [_proposal_dict(r, sign_offs.get(r.id), names) for r in rows]


# --- what a proposal would change ---------------------------------------------------------


def _fit_settings(settings: Mapping[str, Any] | None) -> dict[str, Any]:
    if settings is None:
        return {}
    if not isinstance(settings, Mapping):
        raise InputError(f"'settings' must be an object of fit settings, got {settings!r:.80}", field="settings")
    return {k: v for k, v in settings.items() if k != "exclude"}


def preview(
    dataset_id: int,
    *,
    action: str,
    samples: list[str],
    settings: Mapping[str, Any] | None = None,
    user_id: int | None = None,
) -> dict[str, Any]:
    """The comparison a proposal would store, without storing anything.

    Fits the current model (approved exclusions) and the model after the
    proposal with the same settings and number of components, and compares
    them with ``analysis.compare.compare_fits``: explained variance per
    component before/after, principal angles between the loading subspaces
    (Björck & Golub 1973), samples crossing a T2 or SPE limit; ``methods``
    says for each proposed sample whether the classical and the robust fit of
    the current model flag it (``method_comparison.proposal_support``).
    """
    from analysis.compare import compare_fits
    from webapp.services import ingest, method_comparison, modelling

    table = ingest.load_table(dataset_id)
    excluded_now = approved_exclusions(dataset_id)
    ids, _, _ = check_proposal(
        action=action,
        samples=samples,
        reason_category="other",
        reason="preview",
        known_samples=table.sample_ids,
        excluded_now=excluded_now,
    )
    excluded_after = after_exclusions(action, ids, excluded_now)
    base = _fit_settings(settings)
    before_model, before = modelling.get_model(dataset_id, {**base, "exclude": excluded_now}, user_id=user_id)
    after_settings = {**base, "components": before["n_components"], "exclude": excluded_after}
    after_model, after = modelling.get_model(dataset_id, after_settings, user_id=user_id)
    data = table.data[list(before_model.variable_names_)]
    compared = compare_fits(before_model, after_model, X=data, sample_ids=list(table.sample_ids))
    support = method_comparison.proposal_support(dataset_id, ids, {**base, "exclude": excluded_now}, user_id=user_id)
    dataset = ingest.dataset_info(dataset_id)

    def side(info, excluded):
        return {
            "fingerprint": info["fingerprint"],
            "model_id": info["id"],
            "excluded": excluded,
            "n_samples": info["n_samples"],
            "n_components": info["n_components"],
            "explained_variance_ratio": info["explained_variance_ratio"],
            "cumulative": info["cumulative"],
            "t2_limit": info["t2_limit"],
            "spe_limit": info["spe_limit"],
        }

    return audit.json_safe(
        {
            "dataset_sha256": dataset["sha256"],
            "settings": {k: v for k, v in before["settings"].items() if k != "exclude"},
            "action": action,
            "samples": ids,
            "before": side(before, excluded_now),
            "after": side(after, excluded_after),
            "compare": compared,
            "methods": support,
        }
    )


# --- writing ------------------------------------------------------------------------------


def _refuse_samples_in_open_proposals(session, dataset_id: int, samples: list[str]) -> None:
    """409 when a sample already sits in another undecided proposal (``check_not_in_open_proposal``)."""
    open_now = store.list_proposals(session, dataset_id=dataset_id, states=["proposed"])
    check_not_in_open_proposal(samples, [(row.id, row.samples) for row in open_now])


def _check_approval_in(session, row) -> None:
    """``check_approval`` for proposal ``row`` against what is approved in this transaction."""
    dataset = store.get_dataset(session, row.dataset_id)
    check_approval(proposal_id=row.id, action=row.action, samples=row.samples, n_samples=dataset.n_samples,
                   excluded_now=approved_in(session, row.dataset_id))


def propose(
    dataset_id: int,
    user,
    *,
    samples,
    reason_category,
    reason,
    action: str = "exclude",
    settings: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """Store a proposal with its comparison and log it; returns the proposal.

    ``user`` has ``id``, ``name``, ``display_name`` and ``role`` (webapp.auth.CurrentUser).
    Raises ReviewRefused (403 for a viewer, 409 for a sample already in another
    open proposal), InputError for a bad proposal.
    """
    from webapp.services import ingest

    check_can_propose(user.role)
    table = ingest.load_table(dataset_id)
    excluded_now = approved_exclusions(dataset_id)
    ids, category, text = check_proposal(
        action=action,
        samples=samples,
        reason_category=reason_category,
        reason=reason,
        known_samples=table.sample_ids,
        excluded_now=excluded_now,
    )
    with session_scope() as session:  # before the fits; checked again under the write lock
        _refuse_samples_in_open_proposals(session, dataset_id, ids)
    comparison = preview(dataset_id, action=action, samples=ids, settings=settings, user_id=user.id)

    def work(session):
        if approved_in(session, dataset_id) != excluded_now:
            raise conflict("the approved exclusions changed while the proposal was prepared; look again")
        _refuse_samples_in_open_proposals(session, dataset_id, ids)
        row = store.insert_proposal(
            session,
            dataset_id=dataset_id,
            action=action,
            samples=ids,
            reason_category=category,
            reason=text,
            proposed_by=user.id,
            created_at=audit.now_utc(),
            state="proposed",
            comparison=comparison,
        )
        audit.append(
            session,
            actor_id=user.id,
            actor_name=user.display_name,
            action="propose",
            dataset_id=dataset_id,
            payload={
                "proposal_id": row.id,
                "account": user.name,
                "proposal_action": action,
                "samples": ids,
                "reason_category": category,
                "reason": text,
                "before_fingerprint": comparison["before"]["fingerprint"],
                "after_fingerprint": comparison["after"]["fingerprint"],
            },
        )
        return _proposal_dict(row, None, {user.id: user.display_name})

    return run_write(work)


def _password_ok(user_id: int, password) -> bool:
    from webapp.auth import check_password_again

    return isinstance(password, str) and bool(password) and check_password_again(user_id, password)


def _locked(user_id: int) -> bool:
    with session_scope() as session:
        row = store.get_user(session, user_id)
        return row is not None and row.locked_until is not None and row.locked_until > audit.now_utc()


def check_signing_password(user, password, *, dataset_id: int | None, payload: Mapping[str, Any]) -> None:
    """Re-check a signer's password before any signature (exclusions, reference models).

    A wrong or missing password is logged as ``sign_failed`` (``payload`` says
    what was attempted) and refused with ReviewRefused, code ``wrong_password``;
    it also counts toward the account lockout.  Nothing else changes.
    """
    if _password_ok(user.id, password):
        return

    def log_failure(session):
        audit.append(
            session,
            actor_id=user.id,
            actor_name=user.display_name,
            action="sign_failed",
            dataset_id=dataset_id,
            payload={**payload, "account": user.name, "reason": "wrong password"},
        )

    run_write(log_failure)
    locked = " Too many wrong passwords: the account is now locked for a while." if _locked(user.id) else ""
    raise ReviewRefused(
        "the password is not correct; nothing was signed (the attempt is in the review log)." + locked,
        code="wrong_password",
        status=403,
    )


def sign(proposal_id: int, user, *, decision: str, password, comment="") -> dict[str, Any]:
    """Approve or reject a proposal after re-checking the signer's password.

    ``decision`` is "approve" or "reject".  A wrong password is refused
    (ReviewRefused, code ``wrong_password``) and logged as a failed signing
    attempt; it also counts toward the account lockout.  An approval is
    re-checked against the exclusions approved by then (``check_approval``):
    refused (409) when it would leave too few samples for a model or when its
    samples were excluded or reinstated meanwhile.
    """
    if decision not in MEANINGS:
        raise ValueError(f"decision must be approve or reject, got {decision!r}")
    meaning = MEANINGS[decision]
    note = clean_text(comment, field="comment", limit=MAX_COMMENT_CHARS, required=False)
    with session_scope() as session:
        row = store.get_proposal(session, proposal_id)
        if row is None:  # the role is checked first, so outsiders cannot probe ids
            check_can_sign(signer_id=user.id, role=user.role, proposed_by=None, state="proposed")
            raise ProposalNotFound(proposal_id)
        check_can_sign(signer_id=user.id, role=user.role, proposed_by=row.proposed_by, state=row.state)
        if decision == "approve":
            _check_approval_in(session, row)
        dataset_id = row.dataset_id

    check_signing_password(user, password, dataset_id=dataset_id,
                           payload={"proposal_id": proposal_id, "attempted": meaning})

    def work(session):
        row = store.get_proposal(session, proposal_id)
        check_can_sign(signer_id=user.id, role=user.role, proposed_by=row.proposed_by, state=row.state)
        if decision == "approve":
            _check_approval_in(session, row)
        signed_at = audit.now_utc()
        if not store.close_proposal(session, proposal_id, meaning, signed_at):
            raise conflict("this proposal was decided by someone else a moment ago")
        sign_off = store.insert_sign_off(
            session,
            proposal_id=proposal_id,
            signer_id=user.id,
            printed_name=user.display_name,
            meaning=meaning,
            comment=note,
            signed_at=signed_at,
        )
        excluded = approved_in(session, row.dataset_id)
        audit.append(
            session,
            actor_id=user.id,
            actor_name=user.display_name,
            action=decision,
            dataset_id=row.dataset_id,
            payload={
                "proposal_id": proposal_id,
                "account": user.name,
                "printed_name": user.display_name,
                "meaning": meaning,
                "signed_at": audit.utc_iso(signed_at),
                "comment": note,
                "proposal_action": row.action,
                "samples": list(row.samples),
                "excluded_now": excluded,
            },
        )
        session.refresh(row)
        names = store.display_names(session, [row.proposed_by])
        return _proposal_dict(row, sign_off, names)

    return run_write(work)


def withdraw(proposal_id: int, user, *, comment="") -> dict[str, Any]:
    """The proposer takes back an undecided proposal; logged."""
    note = clean_text(comment, field="comment", limit=MAX_COMMENT_CHARS, required=False)

    def work(session):
        row = store.get_proposal(session, proposal_id)
        if row is None:
            raise ProposalNotFound(proposal_id)
        check_can_withdraw(user_id=user.id, proposed_by=row.proposed_by, state=row.state)
        if not store.close_proposal(session, proposal_id, "withdrawn", audit.now_utc()):
            check_open("decided")
        audit.append(
            session,
            actor_id=user.id,
            actor_name=user.display_name,
            action="withdraw",
            dataset_id=row.dataset_id,
            payload={"proposal_id": proposal_id, "account": user.name, "comment": note},
        )
        session.refresh(row)
        return _proposal_dict(row, None, store.display_names(session, [row.proposed_by]))

    return run_write(work)


def log_event(user, action: str, *, dataset_id: int | None, payload: Mapping[str, Any]) -> dict[str, Any]:
    """Append any other review event (e.g. a saved view) to the log."""

    def work(session):
        return audit.entry_dict(
            audit.append(
                session,
                actor_id=user.id,
                actor_name=user.display_name,
                action=action,
                dataset_id=dataset_id,
                payload={"account": user.name, **payload},
            )
        )

    return run_write(work)


# --- the log as people read it ------------------------------------------------------------

ACTION_WORDS = {
    "propose": "proposed",
    "approve": "approved (signed)",
    "reject": "rejected (signed)",
    "withdraw": "withdrew",
    "sign_failed": "failed signing attempt (wrong password)",
    "save_view": "saved a view",
    "reference_model_proposed": "proposed a reference model",
    "reference_model_approved": "approved a reference model (signed)",
    "reference_model_rejected": "rejected a reference model (signed)",
    "reference_model_retired": "retired a reference model (signed)",
    "reference_model_superseded": "a reference model was superseded by a later version",
    "batch_checked": "checked a batch of new samples against a reference model",
    "batch_outcome_signed": "signed the outcome of flagged batch samples",
}


def describe_entry(entry: Mapping[str, Any]) -> str:
    """One plain sentence for a log entry (shown as text, never as HTML)."""
    p = entry.get("payload") or {}
    what = ACTION_WORDS.get(entry["action"], entry["action"])
    parts = [what]
    if "proposal_id" in p:
        parts.append(f"proposal {p['proposal_id']}")
    if "reference_model_id" in p:
        named = f" ({p['name']} v{p['version']})" if p.get("name") and p.get("version") else ""
        parts.append(f"reference model {p['reference_model_id']}{named}")
    if p.get("proposal_action") and p.get("samples"):
        parts.append(f"{p['proposal_action']} {', '.join(p['samples'][:20])}"
                     + (" ..." if len(p["samples"]) > 20 else ""))
    if p.get("reason_category"):
        parts.append(f"[{p['reason_category']}] {p.get('reason', '')}")
    if p.get("comment"):
        parts.append(f"comment: {p['comment']}")
    if p.get("title"):
        parts.append(f"title: {p['title']}")
    return "; ".join(parts)


def log_for_dataset(
    dataset_id: int,
    *,
    actions: list[str] | None = None,
    actor_id: int | None = None,
    since=None,
    until=None,
) -> list[dict[str, Any]]:
    """A dataset's log entries, oldest first, each with a plain ``summary`` sentence."""
    with session_scope() as session:
        rows = store.log_entries(
            session, dataset_id=dataset_id, actions=actions, actor_id=actor_id, since=since, until=until
        )
        entries = [audit.entry_dict(r) for r in rows]
    for entry in entries:
        entry["summary"] = describe_entry(entry)
    return entries


def log_actors(dataset_id: int) -> list[tuple[int | None, str]]:
    with session_scope() as session:
        return store.log_actors(session, dataset_id)


def log_frame(entries: list[Mapping[str, Any]]):
    """The log as a table for CSV export (text cells are neutralised by the exporter)."""
    import pandas as pd

    rows = []
    for e in entries:
        p = e.get("payload") or {}
        rows.append(
            {
                "seq": e["seq"],
                "at_utc": e["at"],
                "person": e["actor_name"],
                "account": p.get("account", ""),
                "action": e["action"],
                "proposal_id": p.get("proposal_id", ""),
                "proposal_action": p.get("proposal_action", ""),
                "samples": ";".join(p.get("samples", []) or []),
                "reason_category": p.get("reason_category", ""),
                "reason": p.get("reason", ""),
                "meaning": p.get("meaning", ""),
                "comment": p.get("comment", ""),
                "summary": describe_entry(e),
                "hash": e["hash"],
                "prev_hash": e["prev_hash"],
            }
        )
    columns = ["seq", "at_utc", "person", "account", "action", "proposal_id", "proposal_action", "samples",
               "reason_category", "reason", "meaning", "comment", "summary", "hash", "prev_hash"]
    return pd.DataFrame(rows, columns=columns)
