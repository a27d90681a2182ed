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
