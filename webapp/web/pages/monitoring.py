"""Reference models: the list by name and version, and the form proposing a fitted model.

``/monitoring`` lists every reference model with its state, proposer and
signatures; ``/monitoring?model=<id>`` (the dataset page's "Make this model a
reference model" link) opens the proposal form for that fitted model.  Analysts
propose; a reviewer other than the proposer signs on the reference model's own
page (``monitoring_model``).  The callback hands its inputs to
``webapp.services.reference_models`` (``propose_reference_model`` below is the
plain function the tests call).
"""

from __future__ import annotations

import dash
from dash import Input, Output, State, callback, dcc, html, no_update
from flask_login import current_user

from analysis.errors import InputError
from webapp import auth
from webapp import url_state
from webapp.auth.projects import visible_projects
from webapp.store.ids import parse_id
from webapp.web.pages.review import when
from webapp.web.ui import ids
from webapp.web.ui.fields import labelled

dash.register_page(__name__, path=url_state.monitoring_url(), name="Monitoring", title="Monitoring · LatentDesk",
                   nav=True, order=30)

CAUTION = ("Flags support, and never replace, QA judgement and site procedures; "
           "regulated use needs the site's own validation.")
CONFIDENCE_CHOICES = (0.9, 0.95, 0.975, 0.99, 0.995, 0.999)


def signature_lines(reference_model: dict) -> list:
    """Each signature as words: meaning, printed name, UTC time, comment."""
    return [
        html.Div(f"{s['meaning']} by {s['printed_name']} at {when(s['signed_at'])}"
                 + (f": {s['comment']}" if s["comment"] else ""), className="ld-signature-line")
        for s in reference_model["signatures"]
    ]


def reference_model_table(reference_models: list[dict]) -> html.Table | html.P:
    """Reference models by name and version: state, proposer, signatures, each linking to its page."""
    if not reference_models:
        return html.P("No reference model yet. Fit a model on a dataset page and choose "
                      "'Make this model a reference model'.", className="ld-muted")
    header = html.Tr([html.Th("Name"), html.Th("Version"), html.Th("State"), html.Th("Proposed by"),
                      html.Th("Signatures")])
    body = [
        html.Tr([
            html.Td(dcc.Link(m["name"], href=url_state.reference_model_url(m["id"]))),
            html.Td(f"v{m['version']}", className="ld-num"),
            html.Td(m["state"]),
            html.Td([m["proposed_by_name"] or "", html.Br(), html.Span(when(m["created_at"]), className="ld-muted")]),
            html.Td(signature_lines(m) or "none yet"),
        ])
        for m in sorted(reference_models, key=lambda m: (m["name"].lower(), m["version"]))
    ]
    return html.Table([html.Thead(header), html.Tbody(body)], className="ld-table")


def _level_choice(control_id: str, value: float) -> dcc.Dropdown:
    return dcc.Dropdown(id=control_id, options=[{"label": f"{100 * c:g}%", "value": c} for c in CONFIDENCE_CHOICES],
                        value=value, clearable=False)


def _rule_choice() -> dcc.Checklist:
    """The run rules to pick from, each with its published source; the defaults ticked."""
    from webapp.services import reference_models as reference

    choices = reference.described_rules(list(reference.RULE_CHOICES))
    defaults = {r["id"] for r in reference.described_rules(list(reference.DEFAULT_RUN_RULES))}
    return dcc.Checklist(id=ids.MON_PROPOSE_RULES, className="ld-checklist",
                         options=[{"label": f" {r['label']} ({r['source']})", "value": r["id"]} for r in choices],
                         value=[r["id"] for r in choices if r["id"] in defaults])


def chosen_rules(rule_ids) -> list[dict]:
    """The settings of the ticked rules (``RULE_CHOICES`` by id), in the catalogue's order."""
    from webapp.services import reference_models as reference

    ticked = set(rule_ids or [])
    return [{k: v for k, v in r.items() if k not in ("id", "label", "source")}
            for r in reference.described_rules(list(reference.RULE_CHOICES)) if r["id"] in ticked]


def propose_form(model_id: int | None) -> html.Section:
    """The proposal form (analysts); the model id comes from the link of the dataset page."""
    if not auth.has_role(current_user.role, "analyst"):
        return html.Section(html.P("Analysts propose reference models; your role can read them.",
                                   className="ld-muted"), className="ld-panel")
    return html.Section(
        [
            html.H2("Propose a reference model"),
            html.P("A fitted model becomes a reference model once a reviewer other than you approves it. "
                   "Its preprocessing, loadings, limits, variables and units are frozen now, with the training "
                   "data's SHA-256.", className="ld-muted"),
            html.Div(
                [
                    *labelled("Fitted model id (from the dataset page)",
                              dcc.Input(id=ids.MON_PROPOSE_MODEL, type="number", min=1, step=1, value=model_id,
                                        className="ld-input")),
                    *labelled("Name (for example \"Line 2 release assays\")",
                              dcc.Input(id=ids.MON_PROPOSE_NAME, type="text", maxLength=200, className="ld-input")),
                    *labelled("Note", dcc.Textarea(id=ids.MON_PROPOSE_NOTE, className="ld-textarea",
                                                   maxLength=4000)),
                    *labelled("Warning confidence", _level_choice(ids.MON_PROPOSE_WARNING, 0.95)),
                    *labelled("Action confidence", _level_choice(ids.MON_PROPOSE_ACTION, 0.99)),
                    *labelled("Run rules on every chart (T², SPE and the scores)", _rule_choice()),
                    html.Button("Propose", id=ids.MON_PROPOSE_SUBMIT, className="ld-button"),
                ],
                className="ld-form",
            ),
            html.Div(id=ids.MON_PROPOSE_MESSAGE, role="status"),
        ],
        className="ld-panel",
    )


def layout(model=None, **_query) -> html.Div:
    from webapp.services import reference_models as reference

    model_id = parse_id(model)
    return html.Div(
        [
            html.H1("Monitoring"),
            html.P(CAUTION, className="ld-alert ld-caution"),
            propose_form(model_id),
            html.Section([html.H2("Reference models"),
                          html.Div(reference_model_table(reference.list_reference_models(visible=visible_projects(current_user))), id=ids.MON_LIST)],
                         className="ld-panel"),
        ]
    )


def propose_reference_model(user, model_id, name, note, warning, action, rule_ids=None):
    """Propose for ``user`` with the ticked run rules (``RULE_CHOICES`` ids; None: the defaults);
    returns (message component, reference model dict or None)."""
    from webapp.services import reference_models as reference

    try:
        whole = isinstance(model_id, float) and model_id.is_integer()
        rules = None if rule_ids is None else chosen_rules(rule_ids)
        chosen = reference.propose(int(model_id) if whole else model_id, name, note or "", [warning, action],
                                   user=user, run_rules=rules)
    except InputError as exc:  # ReviewRefused is an InputError too
        return html.P(str(exc), className="ld-alert", role="alert"), None
    except LookupError:
        return html.P(f"There is no fitted model {model_id}; fit one on a dataset page first.",
                      className="ld-alert", role="alert"), None
    return (
        html.P([f"{chosen['name']} v{chosen['version']} is proposed and waits for a reviewer. ",
                dcc.Link("Open it", href=url_state.reference_model_url(chosen["id"]))], className="ld-success"),
        chosen,
    )


@callback(
    Output(ids.MON_PROPOSE_MESSAGE, "children"),
    Output(ids.MON_LIST, "children"),
    Input(ids.MON_PROPOSE_SUBMIT, "n_clicks"),
    State(ids.MON_PROPOSE_MODEL, "value"),
    State(ids.MON_PROPOSE_NAME, "value"),
    State(ids.MON_PROPOSE_NOTE, "value"),
    State(ids.MON_PROPOSE_WARNING, "value"),
    State(ids.MON_PROPOSE_ACTION, "value"),
    State(ids.MON_PROPOSE_RULES, "value"),
    prevent_initial_call=True,
)
def _on_propose(n_clicks, model_id, name, note, warning, action, rule_ids):
    from webapp.services import reference_models as reference

    if not n_clicks:
        return no_update, no_update
    message, chosen = propose_reference_model(current_user, model_id, name, note, warning, action, rule_ids or [])
    if chosen is None:
        return message, no_update
    return message, reference_model_table(reference.list_reference_models(visible=visible_projects(current_user)))
