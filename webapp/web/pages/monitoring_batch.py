"""One checked batch: ``/monitoring/batches/<batch_id>``.

The batch's samples with T², SPE, their limits, flags, run rules and
outcomes; choosing a sample shows its contributions (classical and
reconstruction-based, Alcala & Qin 2009) and the explanation sentence; for
reviewers the outcome form, which signs an outcome for flagged samples with
the re-entered password (``webapp.services.batches.record_outcome``).  The
batch shows *open* until every flagged sample has an outcome, then *reviewed*.
The plain functions below are what the tests call.
"""

from __future__ import annotations

import dash
from dash import Input, Output, State, callback, dcc, html, no_update
from flask_login import current_user

from analysis.errors import InputError
from webapp import auth
from webapp import url_state
from webapp.store.ids import parse_id
from webapp.web.pages.monitoring import CAUTION
from webapp.web.pages.review import when
from webapp.web.ui import ids
from webapp.web.ui.fields import labelled
from webapp.web.ui.graph_config import SMALL_GRAPH_CONFIG

dash.register_page(__name__, path_template=url_state.batch_path_template(), name="Batch",
                   title="Batch · LatentDesk", order=31)  # before /monitoring/<id>, which would match too

OUTCOME_LABELS = {
    "assignable_cause": "Assignable cause found (name the cause)",
    "no_cause_accepted": "No cause found - accepted",
    "rejected": "Rejected",
}


def _num(value) -> str:
    return "–" if value is None else f"{float(value):.4g}"


def flag_words(sample: dict) -> str:
    """The flags of a sample in words (never colour alone)."""
    words = []
    for key, name in (("t2", "T²"), ("spe", "SPE")):
        if sample[f"{key}_exceeds"]:
            words.append(f"{name} beyond the action limit")
        elif sample[f"{key}_exceeds_warning"]:
            words.append(f"{name} beyond the warning limit")
    if sample["rules"]:
        words.append("run rule")
    if sample["incomplete"]:
        words.append("incomplete (scored by projection)")
    text = "; ".join(words) or "within limits"
    return f"FLAGGED: {text}" if sample["flagged"] else text


def _outcome_words(sample: dict) -> str:
    outcome = sample["outcome"]
    if outcome is None:
        return "needs an outcome" if sample["flagged"] else ""
    cause = f"; cause: {outcome['cause']}" if outcome["cause"] else ""
    return (f"{outcome['outcome_words']}{cause}; reason: {outcome['reason']}; signed by "
            f"{outcome['printed_name']}, {when(outcome['signed_at'])}")


def samples_table(batch: dict) -> html.Table:
    """Every sample: run, id, T² and SPE with their action (warning) limits, flags, rules, outcome."""
    header = html.Tr([html.Th(t) for t in ("Run", "Sample", "T²", "T² limit (warning)", "SPE", "SPE limit (warning)",
                                           "Flags", "Run rules", "Outcome")])
    rows = [
        html.Tr(
            [html.Td(s["run_index"], className="ld-num"), html.Td(s["sample"]),
             html.Td(_num(s["t2"]), className="ld-num"),
             html.Td(f"{_num(s['t2_limit'])} ({_num(s['t2_warning_limit'])})", className="ld-num"),
             html.Td(_num(s["spe"]), className="ld-num"),
             html.Td(f"{_num(s['spe_limit'])} ({_num(s['spe_warning_limit'])})", className="ld-num"),
             html.Td(html.Strong(flag_words(s)) if s["flagged"] else flag_words(s)),
             html.Td("; ".join(f"{r['chart']}: {r['label']}" for r in s["rules"])),
             html.Td(_outcome_words(s))],
            className="ld-row-flagged" if s["flagged"] else None,
        )
        for s in batch["samples"]
    ]
    return html.Table([html.Thead(header), html.Tbody(rows)], className="ld-table")


def state_words(batch: dict) -> str:
    """'open' with what is missing, or 'reviewed' with the time."""
    waiting = [s["sample"] for s in batch["samples"] if s["flagged"] and s["outcome"] is None]
    if batch["state"] == "reviewed":
        return f"State: reviewed at {when(batch['reviewed_at'])} (every flagged sample has an outcome)."
    return f"State: open ({len(waiting)} flagged sample(s) need an outcome: {', '.join(waiting)})."


def awaiting_outcome(batch: dict) -> list[str]:
    """The flagged samples without an outcome, in run order."""
    return [s["sample"] for s in batch["samples"] if s["flagged"] and s["outcome"] is None]


def contributions_panel(batch_id: int, sample_id: str | None) -> html.Div:
    """The explanation sentence and four contribution bar charts of one sample."""
    from webapp.services import batches
    from webapp.web.ui.figures import contribution_figure

    if not sample_id:
        return html.Div(html.P("Choose a sample to see why it was flagged.", className="ld-muted"))
    try:
        found = batches.sample_contributions(batch_id, sample_id)
    except (batches.BatchNotFound, batches.BatchSampleNotFound):
        return html.Div(html.P(f"There is no sample {sample_id} in batch {batch_id}.", className="ld-alert"))
    plots = [("t2", "T² contributions (classical)"), ("spe", "SPE contributions (squared residuals)"),
             (("reconstruction", "t2"), "T² reconstruction-based contributions (Alcala & Qin 2009)"),
             (("reconstruction", "spe"), "SPE reconstruction-based contributions (Alcala & Qin 2009)")]
    graphs = []
    for key, title in plots:
        values = found[key[0]][key[1]] if isinstance(key, tuple) else found[key]
        names = list(values)
        graphs.append(dcc.Graph(figure=contribution_figure(names, [values[n] for n in names], title=title),
                                config=SMALL_GRAPH_CONFIG))
    scores = score_position(batch_id, found["sample"])
    return html.Div([html.P(found["explanation"]["sentence"], className="ld-explanation"), *graphs,
                     dcc.Graph(figure=scores, config=SMALL_GRAPH_CONFIG) if scores is not None else None])


def score_position(batch_id: int, sample_id: str):
    """The sample on the reference model's PC1/PC2 score plot among its training samples (None: one component).

    The training scores come from the fitted model the reference model was
    proposed from (``modelling.model_by_id``, cached), whose frozen copy scored the batch.
    """
    from webapp.services import batches, modelling
    from webapp.services import reference_models as reference
    from webapp.web.ui.monitoring_figures import reference_score_figure

    batch = batches.batch_info(batch_id)
    sample = next(s for s in batch["samples"] if s["sample"] == sample_id)
    if len(sample["scores"]) < 2:
        return None
    model, _ = modelling.model_by_id(reference.get_reference_model(batch["reference_model_id"])["model_id"])
    return reference_score_figure(model.scores_, [str(i) for i in model.sample_ids_], sample["scores"], sample_id)


def outcome_form(batch: dict, user) -> html.Section | None:
    """The outcome form for reviewers: flagged samples without an outcome, outcome, reason, cause, password."""
    if not auth.has_role(user.role, "reviewer"):
        return None
    waiting = awaiting_outcome(batch)
    return html.Section(
        [
            html.H2("Record an outcome"),
            html.P(f"You sign as {user.display_name}. Your signature records your printed name, the UTC date and "
                   "time and the outcome; it is never changed in place (a correction is a new signed outcome). "
                   + CAUTION, className="ld-muted"),
            html.Div(
                [
                    *labelled("Flagged samples without an outcome",
                              dcc.Checklist(id=ids.MON_OUTCOME_SAMPLES, className="ld-checklist", value=[],
                                            options=[{"label": f" {s}", "value": s} for s in waiting])),
                    *labelled("Outcome", dcc.RadioItems(
                        id=ids.MON_OUTCOME, className="ld-radio",
                        options=[{"label": f" {v}", "value": k} for k, v in OUTCOME_LABELS.items()])),
                    *labelled("Reason (required)", dcc.Textarea(id=ids.MON_OUTCOME_REASON, className="ld-textarea",
                                                                maxLength=4000)),
                    *labelled("Cause (required for an assignable cause)",
                              dcc.Textarea(id=ids.MON_OUTCOME_CAUSE, className="ld-textarea", maxLength=4000)),
                    *labelled("Your password (asked again for every signature)",
                              dcc.Input(id=ids.MON_OUTCOME_PASSWORD, type="password",
                                        autoComplete="current-password", className="ld-input", debounce=False)),
                    html.Button("Sign the outcome", id=ids.MON_OUTCOME_SUBMIT, className="ld-button"),
                ],
                className="ld-form ld-sign-form",
            ),
            html.Div(id=ids.MON_OUTCOME_MESSAGE, role="status"),
        ],
        className="ld-panel",
    )


def _batch_or_none(batch_id):
    from webapp.services import batches

    known = parse_id(batch_id)
    if known is None:
        return None
    try:
        return batches.batch_info(known)
    except batches.BatchNotFound:
        return None


def layout(batch_id=None, **_query) -> html.Div:
    batch = _batch_or_none(batch_id)
    if batch is None:
        return html.Div([html.H1("Batch"), html.P(f"There is no batch {batch_id}.", className="ld-alert"),
                         dcc.Link("All reference models", href=url_state.monitoring_url())])
    reference = batch["reference_model"]
    flagged = [s["sample"] for s in batch["samples"] if s["flagged"]]
    chosen = (awaiting_outcome(batch) or flagged or [None])[0]
    return html.Div(
        [
            dcc.Store(id=ids.MON_CONTEXT, data={"batch_id": batch["id"]}),
            html.H1(f"Batch {batch['id']}: {batch['file_name']}"),
            html.P(CAUTION, className="ld-alert ld-caution"),
            html.P([dcc.Link(f"{reference['name']} v{reference['version']} ({reference['state']})",
                             href=url_state.reference_model_url(batch["reference_model_id"])),
                    f" · checked by {batch['uploaded_by_name']} at {when(batch['created_at'])}"
                    f" · {batch['n_samples']} samples, {batch['n_flagged']} flagged"
                    + (" · re-test" if batch["retest"] else "")]),
            html.P(f"File SHA-256: {batch['file_sha256']}", className="ld-hash"),
            html.P(["Batch report: ", html.A("printable page", href=url_state.batch_report_url(batch["id"])),
                    " · ", html.A("PDF", href=url_state.batch_report_url(batch["id"], pdf=True))]),
            html.P(html.Strong(state_words(batch)), id=ids.MON_BATCH_STATE, role="status"),
            html.Ul([html.Li(w) for w in batch["warnings"]]) if batch["warnings"] else None,
            html.Section([html.H2("Samples"), html.Div(samples_table(batch), id=ids.MON_SAMPLES)],
                         className="ld-panel"),
            html.Section(
                [
                    html.H2("Why a sample was flagged"),
                    html.Div(labelled("Sample", dcc.Dropdown(
                        id=ids.MON_SAMPLE_CHOICE, value=chosen, clearable=False,
                        options=[{"label": f"{s['sample']}" + (" (flagged)" if s["flagged"] else ""),
                                  "value": s["sample"]} for s in batch["samples"]])), className="ld-field"),
                    html.Div(id=ids.MON_CONTRIBUTIONS),
                ],
                className="ld-panel",
            ),
            outcome_form(batch, current_user),
        ]
    )


def sign_outcome(user, batch_id: int, samples, outcome, reason, cause, password):
    """Record an outcome for ``user``; returns (message component, batch dict or None)."""
    from webapp.services import batches

    try:
        batch = batches.record_outcome(batch_id, list(samples or []), outcome, reason, password, user,
                                       cause=cause or None)
    except InputError as exc:  # ReviewRefused (wrong password, role) is an InputError too
        return html.P(str(exc), className="ld-alert", role="alert"), None
    return html.P(f"Outcome signed as {user.display_name} for {', '.join(samples)}. {state_words(batch)}",
                  className="ld-success"), batch


@callback(
    Output(ids.MON_CONTRIBUTIONS, "children"),
    Input(ids.MON_SAMPLE_CHOICE, "value"),
    State(ids.MON_CONTEXT, "data"),
)
def _show_contributions(sample_id, context):
    return contributions_panel(int(context["batch_id"]), sample_id)


@callback(
    Output(ids.MON_OUTCOME_MESSAGE, "children"),
    Output(ids.MON_BATCH_STATE, "children"),
    Output(ids.MON_SAMPLES, "children"),
    Output(ids.MON_OUTCOME_SAMPLES, "options"),
    Output(ids.MON_OUTCOME_SAMPLES, "value"),
    Input(ids.MON_OUTCOME_SUBMIT, "n_clicks"),
    State(ids.MON_OUTCOME_SAMPLES, "value"),
    State(ids.MON_OUTCOME, "value"),
    State(ids.MON_OUTCOME_REASON, "value"),
    State(ids.MON_OUTCOME_CAUSE, "value"),
    State(ids.MON_OUTCOME_PASSWORD, "value"),
    State(ids.MON_CONTEXT, "data"),
    prevent_initial_call=True,
)
def _on_outcome(n_clicks, samples, outcome, reason, cause, password, context):
    if not n_clicks or not context:
        return (no_update,) * 5
    message, batch = sign_outcome(current_user, int(context["batch_id"]), samples, outcome, reason, cause, password)
    if batch is None:
        return message, no_update, no_update, no_update, no_update
    options = [{"label": f" {s}", "value": s} for s in awaiting_outcome(batch)]
    return message, html.Strong(state_words(batch)), samples_table(batch), options, []
