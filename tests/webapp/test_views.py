"""Saved views: another user reopening a view sees the same numbers, bit for bit.

The model fingerprint (docs/design.md section 3) is the proof; the check here compares the scores
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

from webapp.web.ui import ids

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


# --------------------------- a shared link keeps its word on the full dataset page
def _page_modules():
    import importlib

    return (importlib.import_module("webapp.web.pages.dataset"),
            importlib.import_module("webapp.web.pages.dataset_views"),
            importlib.import_module("webapp.web.pages.dataset_samples"),
            importlib.import_module("webapp.web.pages.views_open"))


def _page_fit(page, dataset_id: int, link: str, user_id: int) -> dict:
    """The fit a dataset page shows for ``link``: its query string -> applied settings -> fit."""
    from webapp import url_state as U

    path, _, query = link.partition("?")
    assert path == f"/datasets/{dataset_id}"
    state, notes = U.parse_query(query)
    assert notes == []
    return page.fit_summary(dataset_id, page.applied_settings(state), user_id)


def _t2_of_outlier_table(views_page, result) -> dict[str, float]:
    rows, _, _ = views_page.outlier_rows(result)
    return {r["sample_id"]: r["T2"] for r in rows}


def test_include_all_is_a_link_value_meaning_no_sample_left_out():
    from webapp import url_state as U

    state = U.ViewState(components=3, include_all=True)
    assert U.to_query(state) == "a=3&include=all"
    assert U.parse_query("a=3&include=all") == (state, [])
    # an empty exclusion list, not "the approved ones" (None)
    assert state.model_settings(["Fe"])["exclude"] == []
    assert U.ViewState(components=3).model_settings(["Fe"])["exclude"] is None
    back, notes = U.parse_query("include=some")
    assert back == U.ViewState() and notes == ["ignored include='some' in the link: expected all"]


def test_shared_link_shows_the_saved_numbers_on_the_dataset_page_and_current_state_differs(
        app, client, people, dataset_id):
    page, views_page, samples_page, open_page = _page_modules()
    analyst, viewer = people["analyst"], people["viewer"]
    with app.app_context():
        at_save = _page_fit(page, dataset_id, f"/datasets/{dataset_id}?{QUERY}", analyst.id)
    view = _save(client, analyst, dataset_id).get_json()["view"]
    assert view["model_fingerprint"] == at_save["fingerprint"]
    with app.app_context():
        csv_at_save = samples_page.download_payload(at_save, "samples", "csv")[0]
        t2_at_save = _t2_of_outlier_table(views_page, at_save)
    assert t2_at_save  # some sample is beyond a limit, so the table has rows to compare

    proposal = propose(client, analyst, dataset_id, samples=["W-010"]).get_json()["proposal"]
    assert sign(client, people["reviewer"], proposal["id"]).status_code == 200

    body = client.get(f"/api/v1/views/{view['id']}", headers=viewer.headers).get_json()
    assert body["change"] == "Approved exclusions changed since this view was saved: 1 more sample excluded (W-010)."
    _empty_model_cache(app)  # the dataset page fits afresh
    with app.app_context():
        as_saved = _page_fit(page, dataset_id, body["links"]["as_saved"], viewer.id)
        current = _page_fit(page, dataset_id, body["links"]["current"], viewer.id)
        # the page the link opens shows the saved model: same fingerprint, same numbers to the last digit
        assert as_saved["fingerprint"] == view["model_fingerprint"] and as_saved["cache_hit"] is False
        assert as_saved["n_samples"] == 40 and as_saved["excluded"] == []
        assert samples_page.download_payload(as_saved, "samples", "csv")[0] == csv_at_save
        assert _t2_of_outlier_table(views_page, as_saved) == t2_at_save
        # the current state: W-010 left out by the approval, another model, other numbers
        assert current["fingerprint"] != view["model_fingerprint"]
        assert current["excluded"] == ["W-010"] and current["n_samples"] == 39
        assert _t2_of_outlier_table(views_page, current) != t2_at_save

        search_saved = "?" + body["links"]["as_saved"].split("?", 1)[1]
        search_current = "?" + body["links"]["current"].split("?", 1)[1]
        banner_saved = str(open_page.banner_for(search_saved, dataset_id, as_saved, viewer))
        banner_current = str(open_page.banner_for(search_current, dataset_id, current, viewer))
    assert "the model as saved (same fingerprint, so the same numbers)" in banner_saved
    # the current state is one click away, labelled with what differs
    assert "Approved exclusions changed since this view was saved: 1 more sample excluded (W-010). " in banner_saved
    assert "Open the current state (a different model)" in banner_saved and body["links"]["current"] in banner_saved
    assert "not the model saved in it" in banner_current
    assert "1 more sample excluded (W-010)" in banner_current
    assert body["links"]["as_saved"] in banner_current


def test_saved_view_page_links_to_the_dataset_page_and_labels_the_current_state(app, client, people, dataset_id):
    _, _, _, open_page = _page_modules()
    view = _save(client, people["analyst"], dataset_id).get_json()["view"]
    proposal = propose(client, people["analyst"], dataset_id, samples=["W-010", "W-011"]).get_json()["proposal"]
    sign(client, people["reviewer"], proposal["id"])
    body = client.get(f"/api/v1/views/{view['id']}", headers=people["viewer"].headers).get_json()
    assert body["links"]["as_saved"].startswith(f"/datasets/{dataset_id}?")  # not the view's own page again
    assert "include=all" in body["links"]["as_saved"]
    shown = str(open_page.opened_view(body))
    assert "Open on the dataset page" in shown and f"href='{body['links']['as_saved']}'" in shown
    assert "Approved exclusions changed since this view was saved: 2 more samples excluded (W-010, W-011)." in shown
    assert "Open the current state (a different model)" in shown and body["links"]["current"] in shown


def _save_through_the_page(client, who, dataset_id, title, base_url):
    """Press "Save view" the way the browser does (Dash's callback request)."""
    deps = client.get("/_dash-dependencies", headers=who.headers).get_json()
    callback = next(d for d in deps if f"{ids.VIEW_SAVE_MESSAGE}.children" in d["output"])
    body = {
        "output": callback["output"],
        "outputs": [{"id": ids.VIEW_SAVE_MESSAGE, "property": "children"},
                    {"id": ids.VIEWS_LIST, "property": "children"}],
        "inputs": [{"id": ids.VIEW_SAVE_BUTTON, "property": "n_clicks", "value": 1}],
        "state": [{"id": ids.VIEW_SAVE_CONTEXT, "property": "data",
                   "value": {"dataset_id": dataset_id, "query": QUERY, "selection": ["W-002"]}},
                  {"id": ids.VIEW_SAVE_TITLE, "property": "value", "value": title},
                  {"id": ids.VIEW_SAVE_NOTE, "property": "value", "value": ""}],
        "changedPropIds": [f"{ids.VIEW_SAVE_BUTTON}.n_clicks"],
    }
    response = client.post("/_dash-update-component", json=body, headers=who.headers, base_url=base_url)
    assert response.status_code == 200, response.get_data(as_text=True)
    return response.get_json()["response"]


def test_saving_shows_the_full_address_with_a_copy_button_and_refreshes_the_list(client, people, dataset_id):
    answer = _save_through_the_page(client, people["analyst"], dataset_id, "Cultivars on PC3",
                                    "https://qa.example.test")
    view_id = client.get(f"/api/v1/datasets/{dataset_id}/views",
                         headers=people["viewer"].headers).get_json()["views"][0]["id"]
    message, listed = str(answer[ids.VIEW_SAVE_MESSAGE]["children"]), str(answer[ids.VIEWS_LIST]["children"])
    address = f"https://qa.example.test/views/{view_id}"
    assert f"'href': '{address}'" in message and f"'children': '{address}'" in message
    assert f"'children': 'Copy link', 'id': '{ids.VIEW_SAVE_COPY}'" in message and "'type': 'Button'" in message
    assert "Cultivars on PC3" in listed and f"/views/{view_id}" in listed  # the list shows it at once

    refused = _save_through_the_page(client, people["analyst"], dataset_id, "  ", "https://qa.example.test")
    assert "title is required" in str(refused[ids.VIEW_SAVE_MESSAGE]["children"])
    assert ids.VIEWS_LIST not in refused  # nothing saved, the list stays as it is
