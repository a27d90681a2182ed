"""The printable batch report (HTML and PDF) under the app's reserved ``/-/`` prefix.

Viewers and above read it; an unknown batch id (also one past the id range)
is a plain 404.  Routes call ``webapp.services.batch_report`` / ``batch_pdf`` only.
"""

from __future__ import annotations

from flask import Blueprint, Response

from webapp.api.responses import requires
from webapp.services import batches

bp = Blueprint("api_batch_reports", __name__)
NO_STORE = {"Cache-Control": "no-store"}


def _printed_by() -> str:
    from webapp.auth import api_user

    return api_user().display_name


def _not_found() -> Response:
    return Response("not found", status=404, mimetype="text/plain")


@bp.get("/-/monitoring/batches/<id:batch_id>/report")
@requires("viewer")
def batch_report(batch_id: int):
    from webapp.services.batch_report import report_html

    try:
        html = report_html(batch_id, printed_by=_printed_by())
    except batches.BatchNotFound:
        return _not_found()
    return Response(html, mimetype="text/html", headers=NO_STORE)


@bp.get("/-/monitoring/batches/<id:batch_id>/report.pdf")
@requires("viewer")
def batch_report_pdf(batch_id: int):
    from webapp.services.batch_pdf import report_pdf

    try:
        pdf = report_pdf(batch_id, printed_by=_printed_by())
    except batches.BatchNotFound:
        return _not_found()
    disposition = f'attachment; filename="batch-report-{batch_id}.pdf"'
    return Response(pdf, mimetype="application/pdf", headers={**NO_STORE, "Content-Disposition": disposition})
