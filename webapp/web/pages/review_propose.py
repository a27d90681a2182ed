"""The proposal form: exclude (or reinstate) the samples selected on a dataset page.

``/review/propose?dataset=<id>&action=exclude&sample=...&<model settings>`` (built by
``url_state.propose_url`` from the dataset page's selection); ``&category=`` may preset
the reason category (one of ``REASON_CATEGORIES``; the screening tab sends "careless
response").  Before anything is submitted the page shows what approval would change
(``review.preview``): explained variance before/after, principal angles, samples
crossing a limit.
"""

from __future__ import annotations

import dash
from dash import Input, Output, State, callback, dcc, html, no_update
from flask_login import current_user

from analysis.errors import InputError
from webapp import auth
from webapp.web.pages.review import CAUTION, comparison_block
from webapp.services.review_rules import REASON_CATEGORIES
from webapp import url_state
from webapp.store.ids import parse_id
from webapp.web.ui import ids, messages

dash.register_page(
    __name__, path="/review/propose", name="Propose", title="Propose · LatentDesk", min_role="analyst"
)


def _list(value) -> list[str]:
    if value is None:
        return []
    return [str(v) for v in value] if isinstance(value, (list, tuple)) else [str(value)]


def layout(dataset=None, action="exclude", sample=None, category=None, **query) -> html.Div:
    from webapp.services import ingest, review

    samples = _list(sample)
    dataset_id = parse_id(dataset)
    if dataset_id is None:
        return html.Div([html.H1("Propose"), html.P(
            "Open a dataset, select samples on a plot and choose 'Propose exclusion'.", className="ld-muted")])
    try:
        info = ingest.dataset_info(dataset_id)
    except ingest.DatasetNotFound:
        return html.Div([html.H1("Propose"), html.P(f"There is no dataset {dataset_id}.", className="ld-alert")])
    state, _ = url_state.parse_query(query)
    settings = {k: v for k, v in state.model_settings(info["variables"]).items() if k != "exclude"}
    try:
        comparison = review.preview(dataset_id, action=action, samples=samples, settings=settings,
                                    user_id=current_user.id)
        preview = comparison_block(comparison)
        problem = None
    except InputError as exc:
        preview, problem = None, messages.as_sentence(str(exc))
    verb = "Exclude" if action == "exclude" else "Reinstate"
    return html.Div(
        [
            html.H1(f"{verb} {len(samples)} sample(s) of {info['name']}"),
            html.P(", ".join(samples) or "No samples chosen.", className="ld-sample-list"),
            html.P(
                "The data stay as they are: an exclusion is an annotation. It applies once a second person "
                "signs it. " + CAUTION,
                className="ld-muted",
            ),
            dcc.Store(id=ids.PROPOSE_CONTEXT,
                      data={"dataset_id": dataset_id, "samples": samples, "action": action, "settings": settings}),
            html.Section(
                [html.H2("If approved"),
                 html.Div(preview if problem is None else html.P(problem, className="ld-alert"),
                          id=ids.PROPOSE_PREVIEW)],
                className="ld-panel",
            ),
            html.Section(
                [
                    html.H2("Reason"),
                    html.Div(
                        [
                            html.Label("Category", htmlFor=ids.PROPOSE_CATEGORY),
                            dcc.Dropdown(id=ids.PROPOSE_CATEGORY, options=list(REASON_CATEGORIES),
                                         value=category if category in REASON_CATEGORIES else None,
                                         placeholder="Choose a category", clearable=False),
                            html.Div(id=ids.PROPOSE_CATEGORY_MESSAGE, role="alert", className="ld-field-message"),
                            html.Label("Reason in words (required)", htmlFor=ids.PROPOSE_REASON),
                            dcc.Textarea(id=ids.PROPOSE_REASON, className="ld-textarea", maxLength=4000),
                            html.Div(id=ids.PROPOSE_REASON_MESSAGE, role="alert", className="ld-field-message"),
                            html.Button("Submit for review", id=ids.PROPOSE_SUBMIT, className="ld-button",
                                        disabled=problem is not None
                                        or not auth.has_role(current_user.role, "analyst")),
                        ],
                        className="ld-form",
                    ),
                    html.Div(id=ids.PROPOSE_MESSAGE, role="status"),
                ],
                className="ld-panel",
            ),
        ]
    )


FIELD_MESSAGES = {"reason_category": 1, "reason": 2}  # position of each field's message in submit's answer


def submit(context: dict, category: str | None, reason: str | None):
    """Store the proposal for the signed-in user.

    Returns (message, category message, reason message, disable the button?): a
    problem with one field is shown beside that field, any other above the button."""
    from webapp.services import review

    try:
        proposal = review.propose(
            int(context["dataset_id"]), current_user, samples=context["samples"], action=context["action"],
            reason_category=category, reason=reason, settings=context["settings"],
        )
    except InputError as exc:
        answer = [None, None, None, False]
        answer[FIELD_MESSAGES.get(exc.field, 0)] = messages.problem(exc)
        return tuple(answer)
    return (
        html.P(
            [f"Proposal {proposal['id']} is waiting for a reviewer. ",
             dcc.Link("Open it", href=url_state.proposal_url(proposal["id"])), " · ",
             dcc.Link("Back to the dataset", href=url_state.dataset_url(proposal["dataset_id"]))],
            className="ld-success",
        ),
        None,
        None,
        True,
    )


@callback(
    Output(ids.PROPOSE_MESSAGE, "children"),
    Output(ids.PROPOSE_CATEGORY_MESSAGE, "children"),
    Output(ids.PROPOSE_REASON_MESSAGE, "children"),
    Output(ids.PROPOSE_SUBMIT, "disabled"),
    Input(ids.PROPOSE_SUBMIT, "n_clicks"),
    State(ids.PROPOSE_CONTEXT, "data"),
    State(ids.PROPOSE_CATEGORY, "value"),
    State(ids.PROPOSE_REASON, "value"),
    prevent_initial_call=True,
)
def _on_submit(n_clicks, context, category, reason):
    if not n_clicks or not context:
        return no_update, no_update, no_update, no_update
    return submit(context, category, reason)
