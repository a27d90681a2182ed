"""The reviewer queue: open proposals, one proposal's details, and the signing form.

``/review`` lists open and recently decided proposals (``?dataset=`` narrows it);
``/review?proposal=<id>`` opens one with its stored comparison.  Reviewers sign
with a comment after re-entering their password; the proposer may withdraw.
The callback hands its inputs to ``webapp.services.review`` (``sign_or_withdraw``
below is the plain function the tests call).
"""

from __future__ import annotations

from typing import Any, Mapping

import dash
from dash import Input, Output, State, callback, ctx, dcc, html, no_update
from flask_login import current_user

from analysis.errors import InputError
from webapp import auth
from webapp import url_state
from webapp.store.ids import parse_id
from webapp.web.ui import ids, messages
from webapp.auth.projects import visible_projects

dash.register_page(__name__, path="/review", name="Review", title="Review · LatentDesk", nav=True, order=20)

CAUTION = (
    "Statistics support, and never replace, QA judgement and local procedures. "
    "An extreme sample is not necessarily a wrong one."
)
RECENT_DECIDED = 20


def when(iso: str | None) -> str:
    """``2026-12-01T22:17:53.295960Z`` as ``2026-12-01 22:17:53 UTC`` (seconds are enough on screen)."""
    return f"{iso[:19].replace('T', ' ')} UTC" if iso else ""


def _pct(value) -> str:
    return "–" if value is None else f"{100 * float(value):.2f}%"


def _num(value) -> str:
    return "–" if value is None else f"{float(value):.3g}"


def method_support_block(support: Mapping[str, Any] | None) -> html.Div | None:
    """Which method flags each proposed sample: the classical fit (T², SPE), the robust fit
    (ROBPCA score and orthogonal distances, Hubert, Rousseeuw & Vanden Branden 2005), both or
    neither; the same rows and note as the sign-off report (``signoff_report.method_support``)."""
    from webapp.services import signoff_report

    shown = signoff_report.method_support(support)
    if not shown:
        return None  # stored before the robust option existed
    rows = [html.Tr([html.Td(r["sample"]), html.Td(r["classical"]), html.Td(r["robust"]),
                     html.Td(html.Strong(r["supported_by"]))]) for r in shown["rows"]]
    return html.Div(
        [
            html.H3("Which method flags each sample", className="ld-subhead"),
            html.Table(
                [html.Thead(html.Tr([html.Th("Sample"), html.Th("Classical fit (T², SPE)"),
                                     html.Th("Robust fit (score and orthogonal distance)"),
                                     html.Th("Supported by")])),
                 html.Tbody(rows)],
                className="ld-table ld-method-support",
            ),
            html.P(shown["note"], className="ld-muted"),
        ]
    )


def comparison_block(comparison: Mapping[str, Any] | None) -> html.Div:
    """What a proposal changes: fingerprints, explained variance, principal angles, crossings,
    and which method (classical, robust) flags each proposed sample."""
    if not comparison:
        return html.Div(html.P("No comparison stored.", className="ld-muted"))
    before, after = comparison["before"], comparison["after"]
    compared = comparison.get("compare") or {}
    rows = [
        html.Tr([html.Td("Samples in the fit"), html.Td(before["n_samples"], className="ld-num"),
                 html.Td(after["n_samples"], className="ld-num"), html.Td("")]),
    ]
    for row in compared.get("explained", []):
        delta = row.get("delta")
        rows.append(
            html.Tr([
                html.Td(f"Explained, PC{row['component']}"),
                html.Td(_pct(row.get("before")), className="ld-num"),
                html.Td(_pct(row.get("after")), className="ld-num"),
                html.Td("" if delta is None else f"{100 * delta:+.2f} points", className="ld-num"),
            ])
        )
    table = html.Table(
        [html.Thead(html.Tr([html.Th(""), html.Th("now"), html.Th("if approved"), html.Th("change")])),
         html.Tbody(rows)],
        className="ld-table",
    )
    angles = compared.get("principal_angles") or []
    crossings = compared.get("crossings") or []
    crossing_list = (
        html.Table(
            [html.Thead(html.Tr([html.Th("Sample"), html.Th("Statistic"), html.Th("Now / limit"),
                                 html.Th("If approved / limit"), html.Th("Change")])),
             html.Tbody([
                 html.Tr([html.Td(c["sample"]), html.Td(c["statistic"].upper()),
                          html.Td(f"{_num(c.get('before'))} / {_num(c.get('before_limit'))}", className="ld-num"),
                          html.Td(f"{_num(c.get('after'))} / {_num(c.get('after_limit'))}", className="ld-num"),
                          html.Td(c["change"])])
                 for c in crossings
             ])],
            className="ld-table",
        )
        if crossings
        else html.P("No sample crosses a T² or SPE limit between the two fits.", className="ld-muted")
    )
    return html.Div(
        [
            table,
            html.P(
                ["Principal angles between the loading subspaces: ",
                 html.Strong(", ".join(f"{a:.2f}°" for a in angles) or "none"),
                 " (0° = the same directions; Björck & Golub 1973)."]
            ),
            html.H3("Samples crossing a limit", className="ld-subhead"),
            crossing_list,
            method_support_block(comparison.get("methods")),
            html.P(
                [f"Model now: {before['fingerprint'][:16]}… · if approved: {after['fingerprint'][:16]}…"],
                className="ld-muted",
                title=f"{before['fingerprint']} / {after['fingerprint']}",
            ),
        ]
    )


def _proposal_rows(proposals: list[dict], names: Mapping[int, str]) -> html.Table | html.P:
    if not proposals:
        return html.P("Nothing here.", className="ld-muted")
    header = html.Tr([html.Th("#"), html.Th("Dataset"), html.Th("Proposal"), html.Th("Reason"),
                      html.Th("Proposed by"), html.Th("State")])
    body = []
    for p in proposals:
        samples = ", ".join(p["samples"][:8]) + (" …" if len(p["samples"]) > 8 else "")
        body.append(
            html.Tr([
                html.Td(dcc.Link(str(p["id"]), href=url_state.proposal_url(p["id"]))),
                html.Td(dcc.Link(names.get(p["dataset_id"], str(p["dataset_id"])),
                                 href=url_state.dataset_url(p["dataset_id"]))),
                html.Td(f"{p['action']} {samples}"),
                html.Td([html.Strong(p["reason_category"]), html.Br(), p["reason"]]),
                html.Td([p["proposed_by_name"] or "", html.Br(),
                         html.Span(when(p["created_at"]), className="ld-muted")]),
                html.Td(p["state"] if not p["sign_off"] else
                        f"{p['state']} by {p['sign_off']['printed_name']}"),
            ])
        )
    return html.Table([html.Thead(header), html.Tbody(body)], className="ld-table")


def _dataset_names() -> dict[int, str]:
    from webapp.services.ingest import list_datasets

    return {d["id"]: d["name"] for d in list_datasets(visible_projects(current_user))}


def _signing_form(proposal: dict) -> html.Div:
    """Approve / reject (reviewers other than the proposer) or withdraw (the proposer)."""
    if proposal["state"] != "proposed":
        return html.Div()
    children = []
    is_proposer = current_user.id == proposal["proposed_by"]
    if auth.has_role(current_user.role, "reviewer") and not is_proposer:
        children += [
            html.H2("Sign"),
            html.P(
                f"You sign as {current_user.display_name}. Your signature records your printed name, "
                "the UTC date and time and its meaning (approved or rejected).",
                className="ld-muted",
            ),
            html.Label("Comment", htmlFor=ids.REVIEW_COMMENT),
            dcc.Textarea(id=ids.REVIEW_COMMENT, className="ld-textarea", maxLength=4000),
            html.Label("Your password (asked again for every signature)", htmlFor=ids.REVIEW_PASSWORD),
            dcc.Input(id=ids.REVIEW_PASSWORD, type="password", autoComplete="current-password",
                      className="ld-input", debounce=False),
            html.Div(
                [html.Button("Approve", id=ids.REVIEW_APPROVE, className="ld-button"),
                 html.Button("Reject", id=ids.REVIEW_REJECT, className="ld-button ld-button-quiet")],
                className="ld-button-row",
            ),
        ]
    elif is_proposer:
        children += [
            html.P("This is your proposal: a second person signs it. You may withdraw it until then.",
                   className="ld-muted"),
            html.Label("Comment (optional)", htmlFor=ids.REVIEW_COMMENT),
            dcc.Textarea(id=ids.REVIEW_COMMENT, className="ld-textarea", maxLength=4000),
            html.Button("Withdraw", id=ids.REVIEW_WITHDRAW, className="ld-button ld-button-quiet"),
        ]
    else:
        children.append(html.P("Reviewers sign proposals; your role can read them.", className="ld-muted"))
    return html.Div(children, className="ld-form ld-sign-form")


def proposal_detail(proposal: dict) -> html.Div:
    sig = proposal.get("sign_off")
    signature = (
        html.Div(
            [html.Strong(f"Signed: {sig['meaning']}"), html.Br(),
             f"Printed name: {sig['printed_name']}", html.Br(),
             f"Date and time: {when(sig['signed_at'])}", html.Br(),
             f"Comment: {sig['comment'] or '—'}"],
            className="ld-signature",
        )
        if sig
        else None
    )
    return html.Div(
        [
            html.H2(f"Proposal {proposal['id']}: {proposal['action']} {len(proposal['samples'])} sample(s)"),
            html.P(", ".join(proposal["samples"]), className="ld-sample-list"),
            html.P([html.Strong(proposal["reason_category"]), ": ", proposal["reason"]]),
            html.P(
                f"Proposed by {proposal['proposed_by_name']} at {when(proposal['created_at'])}. "
                f"State: {proposal['state']}.",
                className="ld-muted",
            ),
            signature,
            html.H2("What it changes"),
            comparison_block(proposal.get("comparison")),
            html.P(
                [dcc.Link("Review log of this dataset", href=url_state.review_log_url(proposal["dataset_id"])),
                 " · ",
                 html.A("Printable sign-off report",
                        href=url_state.signoff_report_url(proposal["dataset_id"], proposal["id"]),
                        target="_blank")],
            ),
        ]
    )


def layout(proposal=None, dataset=None, **_query) -> html.Div:
    from webapp.services import review

    dataset_id = parse_id(dataset)
    names = _dataset_names()
    detail: Any = None
    if proposal is not None:
        try:
            known = parse_id(proposal)
            if known is None:  # not spelled as an id: no proposal can have it
                raise review.ProposalNotFound(proposal)
            chosen = review.get_proposal(known)
        except review.ProposalNotFound:
            detail = html.P(f"There is no proposal {proposal}.", className="ld-alert")
        else:
            detail = html.Div(
                [proposal_detail(chosen), _signing_form(chosen)],
                id=ids.REVIEW_DETAIL,
            )
            detail = html.Section(
                [dcc.Store(id=ids.REVIEW_CONTEXT, data={"proposal_id": chosen["id"], "dataset_id": dataset_id}),
                 detail,
                 html.Div(id=ids.REVIEW_MESSAGE, role="status")],
                className="ld-panel",
            )
    return html.Div(
        [
            html.H1("Review"),
            html.P(CAUTION, className="ld-muted"),
            detail,
            html.Div(queue_sections(dataset_id, names), id=ids.REVIEW_QUEUE),
        ]
    )


def queue_sections(dataset_id: int | None, names: Mapping[int, str]) -> list:
    """The open proposals and the recently decided ones."""
    from webapp.services import review

    everything = review.list_proposals(dataset_id)
    open_items = [p for p in everything if p["state"] == "proposed"]
    decided = [p for p in everything if p["state"] != "proposed"][-RECENT_DECIDED:]
    return [
        html.Section([html.H2(f"Waiting for a decision ({len(open_items)})"), _proposal_rows(open_items, names)],
                     className="ld-panel"),
        html.Section([html.H2("Recently decided"), _proposal_rows(list(reversed(decided)), names)],
                     className="ld-panel"),
    ]


def sign_or_withdraw(which: str, proposal_id: int, comment: str | None, password: str | None):
    """Run one action for the signed-in user; returns (message component, proposal or None)."""
    from webapp.services import review

    try:
        if which == ids.REVIEW_WITHDRAW:
            result = review.withdraw(proposal_id, current_user, comment=comment or "")
            return html.P("Withdrawn.", className="ld-success"), result
        decision = "approve" if which == ids.REVIEW_APPROVE else "reject"
        result = review.sign(proposal_id, current_user, decision=decision, password=password,
                             comment=comment or "")
    except InputError as exc:  # ReviewRefused is an InputError too
        return messages.problem(exc), None
    sig = result["sign_off"]
    return (
        html.P(f"Signed as {sig['printed_name']} at {when(sig['signed_at'])}: {sig['meaning']}.",
               className="ld-success"),
        result,
    )


@callback(
    Output(ids.REVIEW_MESSAGE, "children"),
    Output(ids.REVIEW_DETAIL, "children"),
    Output(ids.REVIEW_QUEUE, "children"),
    # Reviewers see approve/reject and the password field, the proposer sees withdraw.
    Input(ids.REVIEW_APPROVE, "n_clicks", allow_optional=True),
    Input(ids.REVIEW_REJECT, "n_clicks", allow_optional=True),
    Input(ids.REVIEW_WITHDRAW, "n_clicks", allow_optional=True),
    State(ids.REVIEW_COMMENT, "value", allow_optional=True),
    State(ids.REVIEW_PASSWORD, "value", allow_optional=True),
    State(ids.REVIEW_CONTEXT, "data", allow_optional=True),
    prevent_initial_call=True,
)
def _on_sign(_approve, _reject, _withdraw, comment, password, context):
    if not ctx.triggered_id or not context:
        return no_update, no_update, no_update
    message, result = sign_or_withdraw(ctx.triggered_id, int(context["proposal_id"]), comment, password)
    if result is None:
        return message, no_update, no_update
    queue = queue_sections(context.get("dataset_id"), _dataset_names())
    return message, [proposal_detail(result), _signing_form(result)], queue
