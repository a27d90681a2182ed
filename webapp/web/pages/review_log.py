"""A dataset's review log: who did what and when, filterable, with exports.

``/review/log?dataset=<id>[&action=...][&actor=<user id>]``.  The chain's state
(intact, or the first broken entry) is shown on top; the CSV export (formula
injection neutralised) and the printable sign-off report are links.
"""

from __future__ import annotations

import dash
from dash import Input, Output, State, callback, dcc, html
from urllib.parse import urlencode

from webapp import url_state
from webapp.store.ids import parse_id
from webapp.web.ui import fields, ids

dash.register_page(__name__, path="/review/log", name="Review log", title="Review log · LatentDesk")

ACTIONS = {
    "propose": "proposals",
    "approve": "approvals",
    "reject": "rejections",
    "withdraw": "withdrawals",
    "sign_failed": "failed signing attempts",
    "save_view": "saved views",
}


def log_table(entries: list[dict]) -> html.Table | html.P:
    if not entries:
        return html.P("No entries.", className="ld-muted")
    header = html.Tr([html.Th("#"), html.Th("UTC"), html.Th("Person"), html.Th("Action"), html.Th("What"),
                      html.Th("Hash")])
    rows = [
        html.Tr(
            [
                html.Td(e["seq"], className="ld-num"),
                html.Td(e["at"][:19].replace("T", " ")),  # UTC, to the second
                html.Td(e["actor_name"]),
                html.Td(e["action"], className=f"ld-log-{e['action']}"),
                html.Td(e["summary"]),
                html.Td(e["hash"][:10] + "…", title=e["hash"], className="ld-muted ld-mono"),
            ]
        )
        for e in entries
    ]
    return html.Table([html.Thead(header), html.Tbody(rows)], className="ld-table ld-log-table")


def entries_for(dataset_id: int, action: str | None, actor: str | None) -> list[dict]:
    from webapp.services import review

    actor_id = parse_id(str(actor)) if actor is not None else None
    return review.log_for_dataset(dataset_id, actions=[action] if action else None, actor_id=actor_id)


def _verify_banner() -> html.P:
    from webapp.services import audit, record_audit
    from webapp.services.context import session_scope

    with session_scope() as session:
        intact, broken, reason = audit.verify_chain(session)
        head = audit.chain_head_summary(session)
        checked, findings = record_audit.check_records(session)
    if intact and findings:
        shown = "; ".join(str(f) for f in findings[:5]) + (" …" if len(findings) > 5 else "")
        return html.P(f"Review log chain intact, but {len(findings)} record(s) differ from the log entries that "
                      f"wrote them: {shown}", className="ld-alert")
    if intact:
        return html.P(
            f"Review log verified: the hash chain of all {head['seq']} entries (every dataset) is intact and "
            f"{checked} record(s) match the entries that wrote them; chain head {str(head['hash'])[:16]}…",
            className="ld-success",
            title=str(head["hash"]),
        )
    return html.P(f"Review log BROKEN at entry {broken}: {reason}", className="ld-alert")


def layout(dataset=None, action=None, actor=None, **_query) -> html.Div:
    from webapp.services import ingest, review

    dataset_id = parse_id(dataset)
    if dataset_id is None:
        return html.Div([html.H1("Review log"), html.P("Open the log from a dataset or a proposal.",
                                                      className="ld-muted")])
    try:
        info = ingest.dataset_info(dataset_id)
    except ingest.DatasetNotFound:
        return html.Div([html.H1("Review log"), html.P(f"There is no dataset {dataset_id}.", className="ld-alert")])
    people = review.log_actors(dataset_id)
    action = action if action in ACTIONS else None
    return html.Div(
        [
            html.H1(f"Review log · {info['name']}"),
            html.P(f"Dataset SHA-256 {info['sha256']}", className="ld-muted ld-mono"),
            html.Div(_verify_banner(), id=ids.LOG_VERIFY),
            dcc.Store(id=ids.LOG_CONTEXT, data={"dataset_id": dataset_id}),
            html.Section(
                [
                    html.Div(
                        [
                            *fields.labelled("Show the action", dcc.Dropdown(
                                id=ids.LOG_ACTION_FILTER, value=action, placeholder="All actions",
                                options=[{"label": label, "value": key} for key, label in ACTIONS.items()]),
                                hidden=True),
                            *fields.labelled("Show the person", dcc.Dropdown(
                                id=ids.LOG_ACTOR_FILTER, value=actor, placeholder="Everyone",
                                options=[{"label": name, "value": str(pid)} for pid, name in people
                                         if pid is not None]), hidden=True),
                            html.A("Export CSV", href=url_state.review_log_csv_url(dataset_id), id=ids.LOG_EXPORT,
                                   className="ld-button ld-button-quiet"),
                            html.A("Printable sign-off report", href=url_state.signoff_report_url(dataset_id),
                                   target="_blank", className="ld-button ld-button-quiet"),
                            html.A("Sign-off report as PDF", href=url_state.signoff_report_pdf_url(dataset_id),
                                   className="ld-button ld-button-quiet"),
                        ],
                        className="ld-filter-row",
                    ),
                    html.Div(log_table(entries_for(dataset_id, action, actor)), id=ids.LOG_TABLE),
                ],
                className="ld-panel",
            ),
        ]
    )


@callback(
    Output(ids.LOG_TABLE, "children"),
    Output(ids.LOG_EXPORT, "href"),
    Input(ids.LOG_ACTION_FILTER, "value"),
    Input(ids.LOG_ACTOR_FILTER, "value"),
    State(ids.LOG_CONTEXT, "data"),
    prevent_initial_call=True,
)
def _on_filter(action, actor, context):
    dataset_id = int(context["dataset_id"])
    query = urlencode([(k, v) for k, v in (("action", action), ("actor", actor)) if v])
    csv_url = url_state.review_log_csv_url(dataset_id) + (f"?{query}" if query else "")
    return log_table(entries_for(dataset_id, action, actor)), csv_url
