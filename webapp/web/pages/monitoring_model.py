"""One reference model: ``/monitoring/<reference_model_id>``.

Its state and frozen facts (variables with units, limits at both levels, the
training data's SHA-256, the model fingerprint, signatures); for reviewers
other than the proposer the approve / reject / retire signature with a
comment and the re-entered password, as on the exclusion sign-off page; for
analysts the upload of a new batch; the continuing control chart across every
batch (``webapp.web.ui.monitoring_figures``), the run-rule violations and the
batches.  Callbacks hand their inputs to ``webapp.services.reference_models``
and ``webapp.services.batches``; the plain functions below are what the tests call.
"""

from __future__ import annotations

import dash
from dash import Input, Output, State, callback, ctx, dcc, html, no_update
from flask_login import current_user

from analysis.errors import InputError
from webapp import auth
from webapp import url_state
from webapp.store.ids import parse_id
from webapp.web.pages.monitoring import CAUTION, signature_lines
from webapp.web.pages.review import when
from webapp.web.ui import ids, plot_table
from webapp.web.ui.fields import labelled
from webapp.web.ui.graph_config import GRAPH_CONFIG

dash.register_page(__name__, path_template=url_state.reference_model_path_template(), name="Reference model",
                   title="Reference model · LatentDesk", order=32)

VERBS = {ids.MON_APPROVE: "approve", ids.MON_REJECT: "reject", ids.MON_RETIRE: "retire"}


def _num(value) -> str:
    return "–" if value is None else f"{float(value):.4g}"


def _model_or_none(reference_model_id):
    from webapp.services import reference_models as reference

    known = parse_id(reference_model_id)
    if known is None:
        return None
    try:
        return reference.get_reference_model(known)
    except reference.ReferenceModelNotFound:
        return None


def facts_block(info: dict) -> html.Div:
    """State and the frozen facts: variables with units, limits at both levels, hashes, signatures."""
    limits, levels = info["limits"], info["confidence"]
    variables = html.Table(
        [html.Thead(html.Tr([html.Th("Variable"), html.Th("Unit"), html.Th("log10")])),
         html.Tbody([html.Tr([html.Td(v["name"]), html.Td(v.get("unit") or "none given"),
                              html.Td("yes" if v.get("log10") else "no")]) for v in info["variables"]])],
        className="ld-table",
    )
    limit_rows = html.Table(
        [html.Thead(html.Tr([html.Th("Limit for new samples"), html.Th(f"warning ({100 * levels['warning']:g}%)"),
                             html.Th(f"action ({100 * levels['action']:g}%)")])),
         html.Tbody([
             html.Tr([html.Td("Hotelling's T² (F distribution)"), html.Td(_num(limits["warning"]["t2_new"]),
                      className="ld-num"), html.Td(_num(limits["action"]["t2_new"]), className="ld-num")]),
             html.Tr([html.Td(f"SPE ({limits.get('spe_method', '')})"), html.Td(_num(limits["warning"]["spe"]),
                      className="ld-num"), html.Td(_num(limits["action"]["spe"]), className="ld-num")]),
         ])],
        className="ld-table",
    )
    download = (html.A("Download the model file (latentdesk apply reads it)",
                       href=f"/api/v1/reference-models/{info['id']}/model.json")
                if info["state"] in ("approved", "retired") else None)
    return html.Div(
        [
            html.P([html.Strong(f"State: {info['state']}"),
                    f" · proposed by {info['proposed_by_name']} at {when(info['created_at'])}"]),
            html.P(info["note"]) if info["note"] else None,
            html.P(f"{info['n_samples']} training samples, {info['n_components']} components."),
            html.H3("Variables and units", className="ld-subhead"),
            variables,
            html.H3("Limits", className="ld-subhead"),
            limit_rows,
            html.H3("Run rules on every chart", className="ld-subhead"),
            html.Ul([html.Li(f"{r['label']} ({r['source']})") for r in info["run_rules"]]),
            html.P(f"Training data SHA-256: {info['training_sha256']}", className="ld-hash"),
            html.P(f"Model fingerprint: {info['fingerprint']}", className="ld-hash"),
            html.P(f"Model file SHA-256: {info['document_sha256']}", className="ld-hash"),
            html.H3("Signatures", className="ld-subhead"),
            html.Div(signature_lines(info) or html.P("None yet.", className="ld-muted")),
            download,
        ]
    )


def signing_form(info: dict, user) -> html.Div:
    """Approve / reject (proposed) or retire (approved): reviewers other than the proposer."""
    verbs = {"proposed": [("Approve", ids.MON_APPROVE), ("Reject", ids.MON_REJECT)],
             "approved": [("Retire", ids.MON_RETIRE)]}.get(info["state"])
    if not verbs:
        return html.Div()
    if user.id == info["proposed_by"]:
        return html.Div(html.P("This is your proposal: a second person signs it.", className="ld-muted"))
    if not auth.has_role(user.role, "reviewer"):
        return html.Div(html.P("Reviewers sign reference models; your role can read them.", className="ld-muted"))
    meaning = "approved or rejected" if info["state"] == "proposed" else "retired"
    return html.Div(
        [
            html.H2("Sign"),
            html.P(f"You sign as {user.display_name}. Your signature records your printed name, the UTC date and "
                   f"time and its meaning ({meaning}). " + CAUTION, className="ld-muted"),
            *labelled("Comment", dcc.Textarea(id=ids.MON_SIGN_COMMENT, className="ld-textarea", maxLength=4000)),
            *labelled("Your password (asked again for every signature)",
                      dcc.Input(id=ids.MON_SIGN_PASSWORD, type="password", autoComplete="current-password",
                                className="ld-input", debounce=False)),
            html.Div([html.Button(text, id=control, className="ld-button" if i == 0 else "ld-button ld-button-quiet")
                      for i, (text, control) in enumerate(verbs)], className="ld-button-row"),
        ],
        className="ld-form ld-sign-form",
    )


def upload_form(info: dict, user) -> html.Section | None:
    """The batch upload (analysts and reviewers) while the reference model is approved."""
    if info["state"] != "approved" or not auth.has_role(user.role, "analyst"):
        return None
    return html.Section(
        [
            html.H2("Check a new batch"),
            html.Div(
                [
                    *labelled("Sample id column (empty: as in the training data)",
                              dcc.Input(id=ids.MON_UPLOAD_ID_COLUMN, type="text", className="ld-input")),
                    dcc.Checklist(id=ids.MON_UPLOAD_RETEST, className="ld-checklist", value=[],
                                  options=[{"label": " This upload re-tests samples checked before", "value": "yes"}]),
                    dcc.Upload(html.Div(["Drop the batch file (CSV, TSV or XLSX) here, or ",
                                         html.U("choose a file")]),
                               id=ids.MON_UPLOAD, className="ld-upload", multiple=False),
                ],
                className="ld-form",
            ),
            html.Div(id=ids.MON_UPLOAD_MESSAGE, role="status"),
        ],
        className="ld-panel",
    )


def _statistic_options(info: dict) -> list[dict]:
    from webapp.services.monitoring_charts import DERIVED

    scores = [{"label": f" Score on PC{a}", "value": f"PC{a}"} for a in range(1, (info["n_components"] or 0) + 1)]
    derived = [{"label": f" {title}", "value": key} for key, (title, _source) in DERIVED.items()]
    return [{"label": " Hotelling's T²", "value": "t2"}, {"label": " SPE", "value": "spe"}, *scores, *derived]


def violations_table(chart: dict) -> html.Table | html.P:
    """Every run-rule violation: rule with its source, chart, samples, batch."""
    if not chart["violations"]:
        return html.P("No run rule has fired.", className="ld-muted")
    rows = [
        html.Tr([html.Td(f"{v['label']} ({v['source']})"), html.Td(v["chart"].upper() if v["chart"] in ("t2", "spe")
                                                                    else v["chart"]),
                 html.Td(", ".join(v["samples"])),
                 html.Td([dcc.Link(f"batch {b}", href=url_state.batch_url(b)) for b in v["batches"]])])
        for v in chart["violations"]
    ]
    return html.Table([html.Thead(html.Tr([html.Th("Rule"), html.Th("Chart"), html.Th("Samples"), html.Th("Batch")])),
                       html.Tbody(rows)], className="ld-table")


def batches_table(chart: dict) -> html.Table | html.P:
    """The batches checked, newest last, each with its state and a link."""
    if not chart["batches"]:
        return html.P("No batch checked yet.", className="ld-muted")
    rows = [
        html.Tr([html.Td(dcc.Link(f"batch {b['id']}", href=url_state.batch_url(b["id"]))), html.Td(b["file_name"]),
                 html.Td(when(b["created_at"])), html.Td(b["n_samples"], className="ld-num"),
                 html.Td(b["n_flagged"], className="ld-num"), html.Td(b["state"])])
        for b in chart["batches"]
    ]
    return html.Table([html.Thead(html.Tr([html.Th("Batch"), html.Th("File"), html.Th("Checked"), html.Th("Samples"),
                                           html.Th("Flagged"), html.Th("State")])), html.Tbody(rows)],
                      className="ld-table")


def _score_limits(reference_model_id: int, statistic: str, info: dict):
    from analysis import monitoring as mon
    from analysis.modelfile import model_from_dict
    from webapp.services import reference_models as reference

    if not statistic.startswith("PC") or info["state"] not in reference.DOWNLOADABLE:
        return None
    model = model_from_dict(reference.model_document(reference_model_id))
    levels = (info["confidence"]["warning"], info["confidence"]["action"])
    return mon.score_limits(model, int(statistic.removeprefix("PC")) - 1, levels)


def chart_figure(reference_model_id: int, statistic: str = "t2"):
    """The continuing control chart of ``statistic`` (t2, spe or PC<k>) for the page."""
    from webapp.services import batches
    from webapp.services import reference_models as reference
    from webapp.services.monitoring_charts import DERIVED
    from webapp.web.ui.monitoring_figures import control_chart_figure, derived_chart_figure

    if statistic in DERIVED:
        return derived_chart_figure(batches.chart(reference_model_id, with_training=False, derived=statistic))
    info = reference.get_reference_model(reference_model_id)
    chart = batches.chart(reference_model_id)
    return control_chart_figure(chart, statistic, _score_limits(reference_model_id, statistic, info))


def history_blocks(reference_model_id: int) -> tuple:
    """(violations table, batches table) of the continuing chart."""
    from webapp.services import batches

    chart = batches.chart(reference_model_id)
    return violations_table(chart), batches_table(chart)


def layout(reference_model_id=None, **_query) -> html.Div:
    info = _model_or_none(reference_model_id)
    if info is None:
        return html.Div([html.H1("Reference model"),
                         html.P(f"There is no reference model {reference_model_id}.", className="ld-alert"),
                         dcc.Link("All reference models", href=url_state.monitoring_url())])
    violations, batch_list = history_blocks(info["id"])
    return html.Div(
        [
            dcc.Store(id=ids.MON_CONTEXT, data={"reference_model_id": info["id"]}),
            html.H1(f"{info['name']} v{info['version']}"),
            html.P(CAUTION, className="ld-alert ld-caution"),
            html.P(dcc.Link("All reference models", href=url_state.monitoring_url())),
            html.Section([html.Div(facts_block(info), id=ids.MON_FACTS),
                          html.Div(signing_form(info, current_user), id=ids.MON_SIGN_FORM),
                          html.Div(id=ids.MON_SIGN_MESSAGE, role="status")], className="ld-panel"),
            upload_form(info, current_user),
            html.Section(
                [
                    html.H2("Control chart across every batch"),
                    html.Div(labelled("Chart", dcc.RadioItems(id=ids.MON_CHART_STATISTIC, value="t2", inline=True,
                                                              className="ld-radio",
                                                              options=_statistic_options(info))),
                             className="ld-field"),
                    plot_table.plot_figure(dcc.Graph(id=ids.MON_CHART, config=GRAPH_CONFIG)),
                    html.H3("Run-rule violations", className="ld-subhead"),
                    html.Div(violations, id=ids.MON_VIOLATIONS),
                    html.H3("Batches", className="ld-subhead"),
                    html.Div(batch_list, id=ids.MON_BATCHES),
                ],
                className="ld-panel",
            ),
        ]
    )


def sign_reference_model(user, verb: str, reference_model_id: int, comment: str | None, password: str | None):
    """Approve, reject or retire for ``user``; returns (message component, reference model or None)."""
    from webapp.services import reference_models as reference

    try:
        signed = getattr(reference, verb)(reference_model_id, password, comment or "", user=user)
    except InputError as exc:  # ReviewRefused is an InputError too
        return html.P(str(exc), className="ld-alert", role="alert"), None
    last = signed["signatures"][-1]
    return (html.P(f"Signed as {last['printed_name']} at {when(last['signed_at'])}: {last['meaning']}.",
                   className="ld-success"), signed)


def check_uploaded_batch(user, reference_model_id: int, contents: str | None, filename: str | None,
                         id_column: str | None, retest: bool):
    """Check an uploaded batch file for ``user``; returns (message component, batch dict or None).

    The service's message is shown in words: a missing variable, a different
    unit, a sample id checked before (with its batch) or the same file again.
    """
    from webapp.services import batches
    from webapp.web.pages.upload import decode_upload

    try:
        batch = batches.check_batch(reference_model_id, decode_upload(contents), filename or "batch",
                                    user, id_column=(id_column or "").strip() or None, retest=retest)
    except InputError as exc:  # ReviewRefused (a repeat, a model not approved) is an InputError too
        return html.P(str(exc), className="ld-alert", role="alert"), None
    words = (f"Batch {batch['id']} checked: {batch['n_samples']} samples, {batch['n_flagged']} flagged; "
             f"state {batch['state']}. ")
    notes = [html.Li(w) for w in batch["warnings"]]
    return (html.Div([html.P([words, dcc.Link("Open the batch", href=url_state.batch_url(batch["id"]))],
                             className="ld-alert" if batch["n_flagged"] else "ld-success"),
                      html.Ul(notes) if notes else None]), batch)


@callback(
    Output(ids.MON_SIGN_MESSAGE, "children"),
    Output(ids.MON_FACTS, "children"),
    Output(ids.MON_SIGN_FORM, "children"),
    Input(ids.MON_APPROVE, "n_clicks", allow_optional=True),
    Input(ids.MON_REJECT, "n_clicks", allow_optional=True),
    Input(ids.MON_RETIRE, "n_clicks", allow_optional=True),
    State(ids.MON_SIGN_COMMENT, "value", allow_optional=True),
    State(ids.MON_SIGN_PASSWORD, "value", allow_optional=True),
    State(ids.MON_CONTEXT, "data"),
    prevent_initial_call=True,
)
def _on_sign(_approve, _reject, _retire, comment, password, context):
    if ctx.triggered_id not in VERBS or not context or not ctx.triggered[0].get("value"):
        return no_update, no_update, no_update
    message, signed = sign_reference_model(current_user, VERBS[ctx.triggered_id],
                                           int(context["reference_model_id"]), comment, password)
    if signed is None:
        return message, no_update, no_update
    return message, facts_block(signed), signing_form(signed, current_user)


@callback(
    Output(ids.MON_UPLOAD_MESSAGE, "children"),
    Output(ids.MON_VIOLATIONS, "children"),
    Output(ids.MON_BATCHES, "children"),
    Input(ids.MON_UPLOAD, "contents"),
    State(ids.MON_UPLOAD, "filename"),
    State(ids.MON_UPLOAD_ID_COLUMN, "value"),
    State(ids.MON_UPLOAD_RETEST, "value"),
    State(ids.MON_CONTEXT, "data"),
    prevent_initial_call=True,
)
def _on_upload(contents, filename, id_column, retest, context):
    if not contents or not context:
        return no_update, no_update, no_update
    reference_model_id = int(context["reference_model_id"])
    message, batch = check_uploaded_batch(current_user, reference_model_id, contents, filename, id_column,
                                          "yes" in (retest or []))
    if batch is None:
        return message, no_update, no_update
    return (message, *history_blocks(reference_model_id))


@callback(
    Output(ids.MON_CHART, "figure"),
    Input(ids.MON_CHART_STATISTIC, "value"),
    Input(ids.MON_BATCHES, "children"),
    State(ids.MON_CONTEXT, "data"),
)
def _draw_chart(statistic, _batches, context):
    return chart_figure(int(context["reference_model_id"]), statistic or "t2")
