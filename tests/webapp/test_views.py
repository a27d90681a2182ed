"""Saved views: another user reopening a view sees the same numbers, bit for bit.

The model fingerprint (DESIGN.md 3) is the proof; the check here compares the scores
themselves after the model cache was emptied, so the reopened model is a fresh fit.
Data: the wine recognition data shipped with scikit-learn (Aeberhard, Coomans &
de Vel 1992), first 40 samples.
"""

from __future__ import annotations

import io
import re
import shutil
from pathlib import Path

import pytest

from review_helpers import actor, propose, sign
from wine_data import wine_csv, wine_frame

QUERY = "tab=scores&a=3&scaling=autoscale&pcx=1&pcy=3&colour=cultivar"


@pytest.fixture
def people(app):
    return {role: actor(app, role, f"{role.title()} Person") for role in ("viewer", "analyst", "reviewer")}


@pytest.fixture
def dataset_id(client, people):
    raw = wine_csv(wine_frame().head(40))
    response = client.post("/api/v1/datasets", data={"file": (io.BytesIO(raw), "wine40.csv"), "id_column": "sample"},
                           headers=people["analyst"].headers, content_type="multipart/form-data")
    assert response.status_code == 201, response.get_json()
    return response.get_json()["dataset"]["id"]


def _save(client, who, dataset, **extra):
    body = {"dataset_id": dataset, "query": QUERY, "title": "PC1 vs PC3 by cultivar",
            "note": "the three cultivars separate on PC1", "selection": ["W-002", "W-005"], **extra}
    return client.post("/api/v1/views", json=body, headers=who.headers)


def _scores(client, who, model_id):
    response = client.get(f"/api/v1/models/{model_id}/samples", headers=who.headers)
    assert response.status_code == 200
    return {s["sample_id"]: s["scores"] for s in response.get_json()["samples"]}


def _empty_model_cache(app):
    shutil.rmtree(Path(app.config["HOME"]) / "cache" / "models", ignore_errors=True)


def test_view_reopened_by_another_user_reproduces_scores_bit_for_bit(app, client, people, dataset_id):
    saved = _save(client, people["analyst"], dataset_id)
    assert saved.status_code == 201, saved.get_json()
    view = saved.get_json()["view"]
    assert re.fullmatch(r"[A-Za-z0-9_-]{16}", view["id"])  # secrets.token_urlsafe(12): 16 URL-safe characters
    assert view["url"] == f"/views/{view['id']}"

    first = client.get(f"/api/v1/views/{view['id']}", headers=people["analyst"].headers).get_json()
    scores_at_save = _scores(client, people["analyst"], first["model"]["id"])

    _empty_model_cache(app)
    reopened = client.get(f"/api/v1/views/{view['id']}", headers=people["viewer"].headers)
    assert reopened.status_code == 200
    body = reopened.get_json()
    assert body["reproduced"] is True
    assert body["model"]["cache_hit"] is False  # a fresh fit, not the cached object
    assert body["fingerprint_now"] == view["model_fingerprint"]
    assert body["model"]["n_components"] == 3
    assert body["view"]["state"]["selection"] == ["W-002", "W-005"]
    _empty_model_cache(app)
    scores_reopened = _scores(client, people["viewer"], body["model"]["id"])
    # JSON carries float64 values by their shortest round-trip repr, so equality here is bitwise.
    assert scores_reopened == scores_at_save


def test_view_says_when_approved_exclusions_changed(client, people, dataset_id):
    view = _save(client, people["analyst"], dataset_id).get_json()["view"]
    proposal = propose(client, people["analyst"], dataset_id, samples=["W-010"]).get_json()["proposal"]
    assert sign(client, people["reviewer"], proposal["id"]).status_code == 200

    body = client.get(f"/api/v1/views/{view['id']}", headers=people["viewer"].headers).get_json()
    assert body["reproduced"] is True  # as saved: without the later exclusion
    assert body["exclusions_changed"] is True
    assert body["excluded_as_saved"] == [] and body["excluded_current"] == ["W-010"]
    assert "exclude=" not in body["links"]["current"]
    assert body["links"]["as_saved"] != body["links"]["current"]


def test_view_saved_after_approval_keeps_its_exclusions(client, people, dataset_id):
    proposal = propose(client, people["analyst"], dataset_id, samples=["W-010"]).get_json()["proposal"]
    sign(client, people["reviewer"], proposal["id"])
    view = _save(client, people["analyst"], dataset_id).get_json()["view"]
    assert view["excluded"] == ["W-010"]
    body = client.get(f"/api/v1/views/{view['id']}", headers=people["viewer"].headers).get_json()
    assert body["exclusions_changed"] is False and body["model"]["n_samples"] == 39
    assert "exclude=W-010" in body["links"]["as_saved"]


def test_viewer_cannot_save_but_can_list(client, people, dataset_id):
    assert _save(client, people["viewer"], dataset_id).status_code == 403
    _save(client, people["analyst"], dataset_id)
    listed = client.get(f"/api/v1/datasets/{dataset_id}/views", headers=people["viewer"].headers).get_json()
    assert [v["title"] for v in listed["views"]] == ["PC1 vs PC3 by cultivar"]


@pytest.mark.parametrize(
    "extra,message",
    [
        ({"title": "  "}, "title is required"),
        ({"query": "tab=nowhere"}, "tab"),
        ({"selection": ["W-999"]}, "unknown sample"),
        ({"dataset_id": "3"}, "dataset_id must be a whole number"),
        ({"colour": "red"}, "unknown field"),
    ],
)
def test_bad_views_are_refused(client, people, dataset_id, extra, message):
    response = _save(client, people["analyst"], dataset_id, **extra)
    assert response.status_code == 400
    assert message in response.get_json()["error"]["message"]


def test_unknown_view_is_404(client, people):
    response = client.get("/api/v1/views/no-such-view", headers=people["viewer"].headers)
    assert response.status_code == 404 and response.get_json()["error"]["code"] == "not_found"


def test_saving_a_view_is_logged(client, people, dataset_id):
    view = _save(client, people["analyst"], dataset_id).get_json()["view"]
    entries = client.get(f"/api/v1/datasets/{dataset_id}/review-log", headers=people["viewer"].headers).get_json()
    assert [(e["action"], e["payload"]["view_id"]) for e in entries["entries"]] == [("save_view", view["id"])]


# ---------------------------------------------- reopening restores the selection
def test_view_links_name_the_view_and_round_trip_through_the_query_string():
    from urllib.parse import parse_qs

    from webapp import url_state as U

    state = U.ViewState(components=3, pcx=1, pcy=3, colour="cultivar", exclude=("W-010",))
    for view_id in ("Ab-_9xYz0123456789", "odd id&=/?"):
        url = U.dataset_url(4, state, view_id=view_id)
        path, query = url.split("?", 1)
        assert path == "/datasets/4"
        assert U.view_id_from_query(query) == view_id
        assert U.parse_query(query) == (state, [])  # the view key is not part of the view state
        # Dash hands a page layout(**query): one value -> str (dash/_pages.py _parse_query_string)
        kwargs = {k: v[0] if len(v) == 1 else v for k, v in parse_qs(query, keep_blank_values=True).items()}
        assert U.view_id_from_query(kwargs) == view_id and U.from_query(kwargs) == state
        assert U.page_query(state, view_id) == query
    assert U.dataset_url(4, view_id="v1") == "/datasets/4?view=v1"
    assert U.dataset_url(4, state) == U.dataset_url(4, state, view_id=None)
    assert U.view_id_from_query("tab=scores") is None and U.view_id_from_query("view=") is None
    assert U.view_id_from_query(None) is None


def test_view_links_open_the_dataset_page_with_the_view(client, people, dataset_id):
    from webapp import url_state as U

    view = _save(client, people["analyst"], dataset_id).get_json()["view"]
    body = client.get(f"/api/v1/views/{view['id']}", headers=people["viewer"].headers).get_json()
    for link in (body["links"]["as_saved"], body["links"]["current"]):
        path, query = link.split("?", 1)
        assert path == f"/datasets/{dataset_id}"
        assert U.view_id_from_query(query) == view["id"]
    as_saved = U.from_query(body["links"]["as_saved"].split("?", 1)[1])
    assert (as_saved.components, as_saved.pcx, as_saved.pcy, as_saved.colour) == (3, 1, 3, "cultivar")


def _dataset_page():
    import importlib

    # Dash's page loader runs the page modules when the app is built; take that module.
    return importlib.import_module("webapp.web.pages.dataset")


def test_dataset_page_starts_with_the_saved_selection_for_another_user(app, client, people, dataset_id):
    view = _save(client, people["analyst"], dataset_id).get_json()["view"]
    page = _dataset_page()
    with app.app_context():
        store, notes = page.initial_selection(dataset_id, {"a": "3", "view": view["id"]}, people["viewer"])
        assert (store, notes) == ({"dataset_id": dataset_id, "sample_ids": ["W-002", "W-005"]}, [])
        # no view in the link: nothing selected, nothing to say
        assert page.initial_selection(dataset_id, {"a": "3"}, people["viewer"]) == (
            {"dataset_id": dataset_id, "sample_ids": []}, [])


def test_selection_reaches_the_panel_and_the_propose_link(app, client, people, dataset_id):
    import importlib

    from webapp import url_state as U

    view = _save(client, people["analyst"], dataset_id).get_json()["view"]
    page, samples = _dataset_page(), importlib.import_module("webapp.web.pages.dataset_samples")
    links = importlib.import_module("webapp.web.pages.review_links")
    search = "?" + U.page_query(U.from_query(QUERY), view["id"])
    with app.app_context():
        store, _ = page.initial_selection(dataset_id, search, people["analyst"])
    panel = str(samples.selection_view(store))
    assert "2 samples selected" in panel and "W-002, W-005" in panel
    propose_href, style, save_href = links.links_for(dataset_id, search, store, can_act=True)
    assert style is None and "sample=W-002" in propose_href and "sample=W-005" in propose_href
    assert "sel=W-002" in save_href and "view=" not in propose_href


@pytest.mark.parametrize("case", ["unknown", "other dataset", "signed out"])
def test_dataset_page_refuses_a_view_it_cannot_use(app, client, people, dataset_id, case):
    from flask_login import AnonymousUserMixin

    from webapp.services import views
    from webapp.services.review_rules import ReviewRefused

    view = _save(client, people["analyst"], dataset_id).get_json()["view"]
    view_id, target, user = view["id"], dataset_id, people["viewer"]
    if case == "unknown":
        view_id = "no-such-view"
    elif case == "other dataset":
        raw = wine_csv(wine_frame().head(20))
        other = client.post("/api/v1/datasets", data={"file": (io.BytesIO(raw), "wine20.csv"), "id_column": "sample"},
                            headers=people["analyst"].headers, content_type="multipart/form-data")
        target = other.get_json()["dataset"]["id"]
    else:
        user = AnonymousUserMixin()
    with app.app_context():
        store, notes = _dataset_page().initial_selection(target, {"view": view_id}, user)
        assert store == {"dataset_id": target, "sample_ids": []}
        expected = {"unknown": "There is no saved view 'no-such-view'", "other dataset": "belongs to another dataset",
                    "signed out": "sign in to open a saved view"}[case]
        assert len(notes) == 1 and expected in notes[0]
        if case == "signed out":
            with pytest.raises(ReviewRefused) as refused:
                views.saved_selection(view_id, target, user)
            assert refused.value.status == 403
