"""The JSON API of docs/design.md section 5: shapes, roles, errors, CSV twins, user text as text.

Outside references: HTTP status semantics (RFC 9110 sections 15.5.2, 15.5.4,
15.5.5, 15.5.6, 15.5.14); CSV formula injection (OWASP "CSV Injection");
reference numbers from scikit-learn's PCA on the wine data it ships.
"""

from __future__ import annotations

import csv
import io
import os
from urllib.parse import quote

import numpy as np
import pandas as pd
import pytest
from sklearn.decomposition import PCA

import analysis
from wine_data import variables, wine_csv, wine_frame

XSS = "<img src=x onerror=alert(1)>"
DATASET_KEYS = {"id", "sha256", "name", "n_samples", "n_variables", "variables", "metadata_columns", "warnings"}
MODEL_KEYS = {
    "id", "fingerprint", "n_components", "explained_variance_ratio", "cumulative",
    "t2_limit", "spe_limit", "excluded", "cache_hit",
}


def _upload(client, headers, raw=None, name="wine.csv", **fields):
    data = {"file": (io.BytesIO(wine_csv() if raw is None else raw), name), **fields}
    return client.post("/api/v1/datasets", data=data, headers=headers, content_type="multipart/form-data")


@pytest.fixture
def analyst(auth):
    return auth.token("analyst")


@pytest.fixture
def viewer(auth):
    return auth.token("viewer")


@pytest.fixture
def dataset(client, analyst):
    response = _upload(client, analyst)
    assert response.status_code == 201, response.get_json()
    return response.get_json()["dataset"]


@pytest.fixture
def model(client, analyst, dataset):
    response = client.post(f"/api/v1/datasets/{dataset['id']}/models", json={"components": 2}, headers=analyst)
    assert response.status_code == 200, response.get_json()
    return response.get_json()["model"]


def test_health_needs_no_sign_in(client):
    response = client.get("/health")
    assert response.status_code == 200
    assert response.get_json() == {"ok": True, "version": analysis.__version__, "database": "ok"}


def test_upload_answers_201_with_the_dataset(client, analyst):
    response = _upload(client, analyst)
    assert response.status_code == 201 and response.mimetype == "application/json"
    body = response.get_json()
    assert body["ok"] is True and DATASET_KEYS <= set(body["dataset"])
    assert body["dataset"]["variables"] == variables() and body["dataset"]["n_samples"] == 178
    again = _upload(client, analyst)
    assert again.status_code == 201 and again.get_json()["dataset"]["id"] == body["dataset"]["id"]
    assert again.get_json()["dataset"]["created"] is False


def test_upload_honours_id_column(client, analyst):
    response = _upload(client, analyst, id_column="cultivar", raw=wine_csv(wine_frame().drop_duplicates("cultivar")))
    # cultivar values are unique after dropping duplicates, so they can serve as ids
    body = response.get_json()
    assert response.status_code == 201, body
    assert body["dataset"]["id_column"] == "cultivar" and body["dataset"]["n_samples"] == 3


def test_list_and_get_datasets(client, analyst, viewer, dataset):
    listed = client.get("/api/v1/datasets", headers=viewer).get_json()
    assert [d["id"] for d in listed["datasets"]] == [dataset["id"]]
    one = client.get(f"/api/v1/datasets/{dataset['id']}", headers=viewer).get_json()["dataset"]
    assert one["sha256"] == dataset["sha256"] and one["report"]["file_type"] == "csv"
    assert "stored_path" not in one


def test_fit_answers_the_model_and_then_hits_the_cache(client, analyst, dataset, model):
    assert MODEL_KEYS <= set(model) and model["cache_hit"] is False and model["n_components"] == 2
    frame = wine_frame()[variables()].to_numpy(dtype=float)
    z = (frame - frame.mean(axis=0)) / frame.std(axis=0, ddof=1)
    reference = PCA(n_components=2).fit(z)  # scikit-learn, LAPACK SVD
    np.testing.assert_allclose(model["explained_variance_ratio"], reference.explained_variance_ratio_, rtol=1e-8)
    again = client.post(f"/api/v1/datasets/{dataset['id']}/models", json={"components": 2}, headers=analyst)
    body = again.get_json()["model"]
    assert body["cache_hit"] is True and body["id"] == model["id"] and body["fingerprint"] == model["fingerprint"]
    fetched = client.get(f"/api/v1/models/{model['id']}", headers=analyst).get_json()["model"]
    assert fetched["fingerprint"] == model["fingerprint"]


def test_fit_with_exclusions_reports_them(client, analyst, dataset):
    response = client.post(
        f"/api/v1/datasets/{dataset['id']}/models",
        json={"components": 2, "exclude": ["W-010", "W-003"], "confidence": 0.99},
        headers=analyst,
    )
    body = response.get_json()["model"]
    assert body["excluded"] == ["W-003", "W-010"] and body["n_samples"] == 176 and body["confidence"] == 0.99


@pytest.mark.parametrize(
    "payload, fragment",
    [
        ({"scaling": "zscore"}, "zscore"),
        ({"components": -1}, "-1"),
        ({"variables": ["nope"]}, "nope"),
        ({"exclude": ["W-999"]}, "W-999"),
        ({"components": 99}, "99"),
    ],
)
def test_bad_fit_settings_are_400_naming_the_value(client, analyst, dataset, payload, fragment):
    response = client.post(f"/api/v1/datasets/{dataset['id']}/models", json=payload, headers=analyst)
    body = response.get_json()
    assert response.status_code == 400 and body["ok"] is False
    assert body["error"]["code"] == "bad_input" and fragment in body["error"]["message"]


def test_body_that_is_not_json_is_400(client, analyst, dataset):
    response = client.post(
        f"/api/v1/datasets/{dataset['id']}/models", data="{not json", headers=analyst, content_type="application/json"
    )
    assert response.status_code == 400 and response.get_json()["error"]["code"] == "bad_input"


def test_samples_json_and_csv_agree(client, viewer, model):
    body = client.get(f"/api/v1/models/{model['id']}/samples", headers=viewer).get_json()
    samples = body["samples"]
    assert len(samples) == 178 and body["fingerprint"] == model["fingerprint"]
    first = samples[0]
    assert first["sample_id"] == "W-001" and first["metadata"] == {"cultivar": "cultivar 1"}
    assert len(first["scores"]) == 2 and set(first["flags"]) <= {"T2", "SPE"}
    for s in samples:
        assert ("T2" in s["flags"]) == (s["t2"] > s["t2_limit"])
        assert ("SPE" in s["flags"]) == (s["spe"] > s["spe_limit"])
    response = client.get(f"/api/v1/models/{model['id']}/samples.csv", headers=viewer)
    assert response.status_code == 200 and response.mimetype == "text/csv"
    rows = list(csv.DictReader(io.StringIO(response.get_data(as_text=True))))
    assert [r["sample_id"] for r in rows] == [s["sample_id"] for s in samples]
    assert float(rows[5]["T2"]) == pytest.approx(samples[5]["t2"], rel=1e-12)
    assert float(rows[5]["PC2"]) == pytest.approx(samples[5]["scores"][1], rel=1e-12)


def test_variables_json_and_csv_agree(client, viewer, model):
    body = client.get(f"/api/v1/models/{model['id']}/variables", headers=viewer).get_json()
    assert [v["variable"] for v in body["variables"]] == variables()
    assert all(len(v["loadings"]) == 2 and 0 <= v["explained"] <= 1 for v in body["variables"])
    # Loading vectors are unit length (definition of principal axes; Jolliffe 2002, sec. 1.1).
    matrix = np.array([v["loadings"] for v in body["variables"]])
    np.testing.assert_allclose(np.linalg.norm(matrix, axis=0), 1.0, rtol=1e-10)
    text = client.get(f"/api/v1/models/{model['id']}/variables.csv", headers=viewer).get_data(as_text=True)
    rows = list(csv.DictReader(io.StringIO(text)))
    assert float(rows[3]["PC1"]) == pytest.approx(matrix[3, 0], rel=1e-12)


def test_contributions_of_one_sample(client, viewer, model):
    response = client.get(f"/api/v1/models/{model['id']}/contributions/W-042", headers=viewer)
    result = response.get_json()["contributions"]
    assert result["sample_id"] == "W-042" and len(result["variables"]) == 13
    samples = client.get(f"/api/v1/models/{model['id']}/samples", headers=viewer).get_json()["samples"]
    spe = next(s["spe"] for s in samples if s["sample_id"] == "W-042")
    assert sum(v["spe_contribution"] for v in result["variables"]) == pytest.approx(spe, rel=1e-8)
    missing = client.get(f"/api/v1/models/{model['id']}/contributions/W-999", headers=viewer)
    assert missing.status_code == 404 and "W-999" in missing.get_json()["error"]["message"]


@pytest.mark.parametrize(
    "method, path",
    [
        ("get", "/api/v1/datasets"),
        ("post", "/api/v1/datasets"),
        ("get", "/api/v1/datasets/1"),
        ("post", "/api/v1/datasets/1/models"),
        ("get", "/api/v1/models/1"),
        ("get", "/api/v1/models/1/samples"),
        ("get", "/api/v1/models/1/samples.csv"),
        ("get", "/api/v1/models/1/variables"),
        ("get", "/api/v1/models/1/variables.csv"),
        ("get", "/api/v1/models/1/contributions/W-001"),
    ],
)
def test_every_route_needs_a_user(client, method, path):
    response = getattr(client, method)(path)
    assert response.status_code == 401 and response.get_json()["ok"] is False
    revoked = getattr(client, method)(path, headers={"Authorization": "Bearer ldt_not-a-token"})
    assert revoked.status_code == 401


@pytest.mark.parametrize("path", ["/api/v1/datasets", "/api/v1/datasets/{id}/models"])
def test_viewers_may_not_upload_or_fit(client, viewer, dataset, path):
    if path.endswith("models"):
        response = client.post(path.format(id=dataset["id"]), json={"components": 2}, headers=viewer)
    else:
        response = _upload(client, viewer)
    assert response.status_code == 403 and response.get_json()["error"]["code"] == "forbidden"


@pytest.mark.parametrize("role", ["analyst", "reviewer", "admin"])
def test_analyst_and_above_may_fit(client, auth, dataset, role):
    response = client.post(f"/api/v1/datasets/{dataset['id']}/models", json={"components": 2}, headers=auth.token(role))
    assert response.status_code == 200


def test_session_sign_in_works_like_a_token(client, auth, dataset):
    auth.login("viewer")
    assert client.get(f"/api/v1/datasets/{dataset['id']}").status_code == 200


@pytest.mark.parametrize(
    "method, path, status, code",
    [
        ("get", "/api/v1/datasets/999", 404, "not_found"),
        ("get", "/api/v1/models/999/samples", 404, "not_found"),
        ("post", "/api/v1/datasets/999/models", 404, "not_found"),
        ("get", "/api/v1/no-such-thing", 404, "not_found"),
        ("delete", "/api/v1/datasets/1", 405, "method_not_allowed"),
        ("put", "/api/v1/datasets", 405, "method_not_allowed"),
    ],
)
def test_errors_are_json(client, analyst, dataset, method, path, status, code):
    response = getattr(client, method)(path, headers=analyst)
    assert response.status_code == status and response.mimetype == "application/json"
    body = response.get_json()
    assert body["ok"] is False and body["error"]["code"] == code and body["error"]["message"]


def test_internal_faults_are_json_500(app_factory, monkeypatch):
    from tests.webapp.conftest import AuthActions
    from webapp.services import ingest

    app = app_factory(TESTING=False)
    client = app.test_client()
    headers = AuthActions(app, client).token("viewer")

    def broken():
        raise RuntimeError("disk on fire")

    monkeypatch.setattr(ingest, "list_datasets", broken)
    response = client.get("/api/v1/datasets", headers=headers)
    assert response.status_code == 500
    assert response.get_json() == {
        "ok": False,
        "error": {"code": "internal", "message": "internal error; the server log has the details"},
    }


def test_user_text_comes_back_as_plain_json_text(client, analyst):
    frame = wine_frame().iloc[:12].copy()
    frame.loc[0, "sample"] = XSS
    frame = frame.rename(columns={"cultivar": XSS + " group", "proline": '"><script>alert(2)</script>'})
    response = _upload(client, analyst, raw=wine_csv(frame), name=XSS + ".csv")
    assert response.status_code == 201, response.get_json()
    raw_body = response.get_data(as_text=True)
    dataset = response.get_json()["dataset"]
    assert dataset["name"] == XSS + ".csv"
    assert XSS + " group" in dataset["metadata_columns"]
    assert '"><script>alert(2)</script>' in dataset["variables"]
    assert response.mimetype == "application/json"
    assert response.headers["X-Content-Type-Options"] == "nosniff"
    assert "<img" in raw_body  # JSON text, not HTML-escaped: escaping is the pages' job
    model = client.post(f"/api/v1/datasets/{dataset['id']}/models", json={"components": 2}, headers=analyst)
    model_id = model.get_json()["model"]["id"]
    samples = client.get(f"/api/v1/models/{model_id}/samples", headers=analyst).get_json()["samples"]
    assert samples[0]["sample_id"] == XSS and samples[0]["metadata"] == {XSS + " group": "cultivar 1"}
    contributions = client.get(f"/api/v1/models/{model_id}/contributions/{quote(XSS, safe='')}", headers=analyst)
    assert contributions.status_code == 200 and contributions.get_json()["contributions"]["sample_id"] == XSS


def test_csv_twins_neutralise_formulas(client, analyst):
    frame = wine_frame().iloc[:12].copy()
    frame.loc[0, "sample"] = "=HYPERLINK(\"http://example.invalid\",\"x\")"
    frame.loc[1, "cultivar"] = "+SUM(A1:A2)"
    frame = frame.rename(columns={"ash": "@ash"})
    dataset = _upload(client, analyst, raw=wine_csv(frame)).get_json()["dataset"]
    model_id = client.post(
        f"/api/v1/datasets/{dataset['id']}/models", json={"components": 2}, headers=analyst
    ).get_json()["model"]["id"]
    samples = list(csv.reader(io.StringIO(
        client.get(f"/api/v1/models/{model_id}/samples.csv", headers=analyst).get_data(as_text=True)
    )))
    assert samples[1][0] == "'=HYPERLINK(\"http://example.invalid\",\"x\")"
    assert samples[2][1] == "'+SUM(A1:A2)"
    float(samples[1][3])  # numbers stay numbers (no quote prefix on PC1)
    variables_csv = list(csv.reader(io.StringIO(
        client.get(f"/api/v1/models/{model_id}/variables.csv", headers=analyst).get_data(as_text=True)
    )))
    assert ["'@ash"] == [row[0] for row in variables_csv if row[0].endswith("@ash")]
    # The JSON twin keeps the text as it is.
    body = client.get(f"/api/v1/models/{model_id}/samples", headers=analyst).get_json()
    assert body["samples"][0]["sample_id"].startswith("=HYPERLINK")


def test_dataset_models_are_listed_newest_first(client, analyst, viewer, dataset, model):
    other = client.post(f"/api/v1/datasets/{dataset['id']}/models", json={"components": 3}, headers=analyst)
    listed = client.get(f"/api/v1/datasets/{dataset['id']}/models", headers=viewer).get_json()["models"]
    assert [m["id"] for m in listed] == [other.get_json()["model"]["id"], model["id"]]
    assert listed[1]["fingerprint"] == model["fingerprint"] and listed[1]["settings"]["components"] == 2
    assert client.get("/api/v1/datasets/999/models", headers=viewer).status_code == 404


def test_group_column_keeps_a_numeric_column_as_metadata(client, analyst):
    response = _upload(client, analyst, group_column="magnesium")
    body = response.get_json()["dataset"]
    assert "magnesium" in body["metadata_columns"] and "magnesium" not in body["variables"]


@pytest.mark.skipif(not os.path.isdir("/proc/self/fd"), reason="needs Linux /proc to count open files")
def test_requests_do_not_leak_open_files(client, analyst, dataset, model):
    """Caches and locks are opened per request and must be closed again (common practice)."""

    def open_files() -> int:
        return len(os.listdir("/proc/self/fd"))

    def round_trip():
        _upload(client, analyst)
        client.post(f"/api/v1/datasets/{dataset['id']}/models", json={"components": 2}, headers=analyst)
        client.get(f"/api/v1/models/{model['id']}/samples", headers=analyst)

    for _ in range(5):  # warm up connection pools
        round_trip()
    before = open_files()
    for _ in range(40):
        round_trip()
    assert open_files() - before <= 3


def test_health_reports_an_unreachable_database_as_503(client, monkeypatch):
    from contextlib import contextmanager

    from sqlalchemy.exc import OperationalError

    from webapp.api import datasets as api

    @contextmanager
    def unreachable():
        raise OperationalError("SELECT 1", {}, Exception("connection refused"))
        yield  # pragma: no cover - never reached

    monkeypatch.setattr(api, "session_scope", unreachable)
    response = client.get("/health")
    assert response.status_code == 503
    assert response.get_json()["error"]["code"] == "database_unavailable"


def test_xlsx_upload_reads_the_named_sheet(client, analyst):
    frame = wine_frame()
    buffer = io.BytesIO()
    with pd.ExcelWriter(buffer, engine="openpyxl") as writer:
        frame.iloc[:20].to_excel(writer, sheet_name="first", index=False)
        frame.iloc[20:50].to_excel(writer, sheet_name="second", index=False)
    response = _upload(client, analyst, raw=buffer.getvalue(), name="wine.xlsx", sheet="second")
    body = response.get_json()
    assert response.status_code == 201, body
    assert body["dataset"]["sheet"] == "second" and body["dataset"]["n_samples"] == 30
    missing = _upload(client, analyst, raw=buffer.getvalue(), name="wine.xlsx", sheet="third")
    assert missing.status_code == 400 and "third" in missing.get_json()["error"]["message"]
