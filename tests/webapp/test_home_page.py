"""The home page's upload callback, called the way the browser calls it."""

from __future__ import annotations

import base64
from pathlib import Path

from webapp.web.ui import ids

# Invented measurements (made up for this test).
CSV = b"sample,alpha,beta\nS1,1.0,2.0\nS2,1.5,2.5\nS3,0.5,1.0\nS4,1.2,2.2\n"


def _upload(client, raw: bytes, filename: str):
    deps = client.get("/_dash-dependencies").get_json()
    callback = next(d for d in deps if f"{ids.HOME_UPLOAD_MESSAGE}.children" in d["output"])
    contents = "data:text/csv;base64," + base64.b64encode(raw).decode()
    body = {
        "output": callback["output"],
        "outputs": [{"id": ids.HOME_UPLOAD_MESSAGE, "property": "children"},
                    {"id": ids.HOME_DATASET_LIST, "property": "children"}],
        "inputs": [{"id": ids.HOME_UPLOAD, "property": "contents", "value": contents}],
        "state": [{"id": ids.HOME_UPLOAD, "property": "filename", "value": filename}],
        "changedPropIds": [f"{ids.HOME_UPLOAD}.contents"],
    }
    response = client.post("/_dash-update-component", json=body)
    assert response.status_code == 200
    return str(response.get_json()["response"])


def _dataset_count(client) -> int:
    return len(client.get("/api/v1/datasets").get_json()["datasets"])


def test_analyst_upload_adds_a_dataset(client, auth):
    auth.login("analyst")
    answer = _upload(client, CSV, "tiny.csv")
    assert "Added tiny.csv (4 samples x 2 variables)" in answer
    assert _dataset_count(client) == 1


def _stored_files(app) -> list[Path]:
    folder = Path(app.config["HOME"]) / "files"
    return [p for p in folder.rglob("*") if p.is_file()] if folder.exists() else []


def test_viewer_upload_is_refused_and_stores_nothing(app, client, auth):
    auth.login("viewer")
    assert "Your role cannot add datasets" in _upload(client, CSV, "tiny.csv")
    assert _dataset_count(client) == 0
    assert _stored_files(app) == []


def test_bad_file_shows_the_intake_message_and_stores_nothing(app, client, auth):
    auth.login("analyst")
    answer = _upload(client, b"sample,alpha,beta\nS1,abc,1\nS2,1.0,2\nS3,2.0,1\n", "bad.csv")
    assert "ld-alert" in answer and "bad.csv:" in answer and "'abc'" in answer
    assert _dataset_count(client) == 0
    assert _stored_files(app) == []
