"""Review API (``/api/v1``): exclusion proposals, sign-offs, the review log, saved views.

Same shapes as ``webapp.api.datasets`` (``json_ok`` / ``json_error``); routes call
``webapp.services.review``, ``audit`` and ``views`` only.  Also serves the
printable sign-off report (HTML and PDF) under the app's reserved ``/-/`` prefix.
"""

from __future__ import annotations

from datetime import datetime, timezone
from typing import Any

from flask import Blueprint, Response, request

from analysis.errors import InputError
from webapp.api.responses import (
    API_PREFIX, json_body, json_error, json_ok, query_id, register_common_errors, register_not_found, requires,
)
from webapp.auth import api_user
from webapp.services import exclusions, ingest, review, views
from webapp.services.context import session_scope
from webapp.services.exports import to_csv_bytes
from webapp.store.ids import check_id

bp = Blueprint("api_review", __name__)
LOG_FILTERS = ("action", "actor", "since", "until")
register_common_errors(bp)


register_not_found(bp, review.ProposalNotFound, "exclusion proposal")


@bp.errorhandler(views.ViewNotFound)
def _no_view(exc):
    return json_error("not_found", f"no saved view with id {exc.args[0]!r}", 404)


@bp.post(f"{API_PREFIX}/datasets/<id:dataset_id>/exclusions")
@requires("analyst")
def propose(dataset_id: int):
    body = json_body({"samples", "reason_category", "reason", "action", "settings"})
    ingest.dataset_info(dataset_id)
    proposal = review.propose(
        dataset_id,
        api_user(),
        samples=body.get("samples"),
        reason_category=body.get("reason_category"),
        reason=body.get("reason"),
        action=body.get("action", "exclude"),
        settings=body.get("settings"),
    )
    return json_ok(status=201, proposal=proposal)


@bp.get(f"{API_PREFIX}/datasets/<id:dataset_id>/exclusions")
@requires("viewer")
def list_proposals(dataset_id: int):
    ingest.dataset_info(dataset_id)
    states = [s for s in request.args.getlist("state") if s]
    return json_ok(
        proposals=review.list_proposals(dataset_id, states or None),
        approved_exclusions=exclusions.approved_exclusions(dataset_id),
    )


@bp.get(f"{API_PREFIX}/exclusions/<id:proposal_id>")
@requires("viewer")
def get_proposal(proposal_id: int):
    return json_ok(proposal=review.get_proposal(proposal_id))


def _sign(proposal_id: int, decision: str):
    body = json_body()
    proposal = review.sign(
        proposal_id,
        api_user(),
        decision=decision,
        password=body.get("password"),
        comment=body.get("comment", ""),
    )
    return json_ok(proposal=proposal)


@bp.post(f"{API_PREFIX}/exclusions/<id:proposal_id>/approve")
@requires("reviewer")
def approve(proposal_id: int):
    return _sign(proposal_id, "approve")


@bp.post(f"{API_PREFIX}/exclusions/<id:proposal_id>/reject")
@requires("reviewer")
def reject(proposal_id: int):
    return _sign(proposal_id, "reject")


@bp.post(f"{API_PREFIX}/exclusions/<id:proposal_id>/withdraw")
@requires("analyst")
def withdraw(proposal_id: int):
    body = json_body()
    return json_ok(proposal=review.withdraw(proposal_id, api_user(), comment=body.get("comment", "")))


# --- the review log -----------------------------------------------------------------------


def _when(name: str) -> datetime | None:
    text = request.args.get(name)
    if not text:
        return None
    try:
        moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise InputError(f"'{name}' must be an ISO date or time such as 2026-12-01, got {text!r}") from None
    return moment if moment.tzinfo else moment.replace(tzinfo=timezone.utc)


def _log_entries(dataset_id: int) -> list[dict[str, Any]]:
    ingest.dataset_info(dataset_id)
    return review.log_for_dataset(
        dataset_id,
        actions=[a for a in request.args.getlist("action") if a] or None,
        actor_id=query_id("actor"),
        since=_when("since"),
        until=_when("until"),
    )


@bp.get(f"{API_PREFIX}/datasets/<id:dataset_id>/review-log")
@requires("viewer")
def review_log(dataset_id: int):
    return json_ok(dataset_id=dataset_id, entries=_log_entries(dataset_id))


@bp.get(f"{API_PREFIX}/datasets/<id:dataset_id>/review-log.csv")
@requires("viewer")
def review_log_csv(dataset_id: int):
    frame = review.log_frame(_log_entries(dataset_id))
    return Response(
        to_csv_bytes(frame),
        mimetype="text/csv",
        headers={
            "Content-Disposition": f'attachment; filename="dataset-{dataset_id}-review-log.csv"',
            "Cache-Control": "no-store",
        },
    )


@bp.get(f"{API_PREFIX}/review-log/verify")
@requires("viewer")
def verify_log():
    from webapp.services import audit, record_audit

    with session_scope() as session:
        intact, broken, reason = audit.verify_chain(session)
        head = audit.chain_head_summary(session)
        checked, findings = record_audit.check_records(session)
    return json_ok(intact=intact and not findings, chain_intact=intact, first_broken_seq=broken, reason=reason,
                   head=head, records_checked=checked,
                   record_findings=[{"table": f.table, "record_id": f.record_id, "field": f.field, "seq": f.seq,
                                     "message": str(f)} for f in findings])


# --- saved views --------------------------------------------------------------------------


@bp.post(f"{API_PREFIX}/views")
@requires("analyst")
def save_view():
    body = json_body({"dataset_id", "query", "title", "note", "selection", "page"})
    dataset_id = check_id(body.get("dataset_id"), "dataset_id")
    query = body.get("query", "")
    if not isinstance(query, (str, dict)):
        raise InputError("query must be the page's query string (text) or an object of its keys", field="query")
    view = views.save_view(
        api_user(),
        dataset_id,
        query=query,
        title=body.get("title"),
        note=body.get("note", ""),
        selection=body.get("selection"),
        page=body.get("page", "dataset"),
    )
    return json_ok(status=201, view=view)


@bp.get(f"{API_PREFIX}/views/<view_id>")
@requires("viewer")
def get_view(view_id: str):
    opened = views.open_view(view_id, user_id=api_user().id)
    return json_ok(**opened)


@bp.get(f"{API_PREFIX}/datasets/<id:dataset_id>/views")
@requires("viewer")
def list_views(dataset_id: int):
    ingest.dataset_info(dataset_id)
    return json_ok(views=views.list_views(dataset_id))


# --- the printable sign-off report --------------------------------------------------------


def _render_report(dataset_id: int, render):
    """The report rendered for the dataset (and ``?proposal=N``), or the 400/404 answer."""
    try:
        proposal = query_id("proposal")
    except InputError as exc:
        return None, Response(str(exc), status=400, mimetype="text/plain")
    try:
        return render(dataset_id, proposal, printed_by=api_user().display_name), None
    except (ingest.DatasetNotFound, review.ProposalNotFound):
        return None, Response("not found", status=404, mimetype="text/plain")


@bp.get("/-/review/datasets/<id:dataset_id>/report")
@requires("viewer")
def signoff_report(dataset_id: int):
    from webapp.services.signoff_report import report_html

    html, refusal = _render_report(dataset_id, report_html)
    if refusal is not None:
        return refusal
    return Response(html, mimetype="text/html", headers={"Cache-Control": "no-store"})


@bp.get("/-/review/datasets/<id:dataset_id>/report.pdf")
@requires("viewer")
def signoff_report_pdf(dataset_id: int):
    from webapp.services.signoff_pdf import report_pdf

    pdf, refusal = _render_report(dataset_id, report_pdf)
    if refusal is not None:
        return refusal
    disposition = f'attachment; filename="signoff-report-dataset-{dataset_id}.pdf"'
    return Response(pdf, mimetype="application/pdf",
                    headers={"Cache-Control": "no-store", "Content-Disposition": disposition})
