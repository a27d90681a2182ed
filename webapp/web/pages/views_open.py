"""One saved view, opened from its link: ``/views/<view_id>``.

Refits (or reads from the cache) the model with the saved settings and
exclusions and shows whether its fingerprint equals the saved one: equal
fingerprints mean the same numbers.  When the dataset's approved exclusions
changed since the view was saved, both versions are offered.
"""

from __future__ import annotations

import dash
from dash import dcc, html
from flask_login import current_user

from analysis.errors import InputError
from webapp.web.pages.review import when
from webapp.web.ui import ids

dash.register_page(__name__, path_template="/views/<view_id>", name="Saved view", title="Saved view · LatentDesk")


def _pct(values) -> str:
    return ", ".join(f"PC{i + 1} {100 * v:.1f}%" for i, v in enumerate(values))


def opened_view(opened: dict) -> html.Div:
    view, model = opened["view"], opened["model"]
    proof = (
        html.P(f"Same model as saved: fingerprint {opened['fingerprint_now'][:16]}… matches.", className="ld-success",
               title=opened["fingerprint_now"])
        if opened["reproduced"]
        else html.P(
            f"The model no longer matches the saved fingerprint ({opened['fingerprint_saved'][:16]}… saved, "
            f"{opened['fingerprint_now'][:16]}… now): the software version or the data reading changed.",
            className="ld-alert",
        )
    )
    change = None
    if opened["exclusions_changed"]:
        change = html.Div(
            [
                html.P(
                    "The approved exclusions changed since this view was saved "
                    f"(then: {', '.join(opened['excluded_as_saved']) or 'none'}; "
                    f"now: {', '.join(opened['excluded_current']) or 'none'}).",
                    className="ld-alert",
                ),
                html.P([dcc.Link("Open as saved", href=opened["links"]["as_saved"]), " · ",
                        dcc.Link("Open with the current exclusions", href=opened["links"]["current"])]),
            ]
        )
    return html.Div(
        [
            html.H1(view["title"]),
            html.P(view["note"]) if view["note"] else None,
            html.P(f"Saved by {view['created_by_name']} at {when(view['created_at'])}.", className="ld-muted"),
            proof,
            change,
            html.Section(
                [
                    html.P(f"{model['n_samples']} samples, {model['n_components']} component(s): "
                           f"{_pct(model['explained_variance_ratio'])}."),
                    html.P(f"Left out of the fit: {', '.join(opened['excluded_as_saved']) or 'none'}."),
                    html.P(f"Selected: {', '.join(view['state'].get('selection') or []) or 'nothing'}.",
                           className="ld-muted"),
                    dcc.Link("Open on the dataset page", href=opened["links"]["as_saved"], className="ld-button"),
                ],
                className="ld-panel",
            ),
        ],
        id=ids.VIEW_OPEN,
    )


def layout(view_id=None, **_query) -> html.Div:
    from webapp.services import views

    try:
        opened = views.open_view(str(view_id), user_id=current_user.id)
    except views.ViewNotFound:
        return html.Div([html.H1("Saved view"), html.P("There is no saved view at this link.", className="ld-alert")])
    except InputError as exc:
        return html.Div([html.H1("Saved view"), html.P(str(exc), className="ld-alert")])
    return opened_view(opened)
