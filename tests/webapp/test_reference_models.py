"""Reference models: propose, sign (four-eyes, re-entered password), supersede, retire, download.

Outside sources beside the checks:
- Signature content: US FDA 21 CFR Part 11, 11.50 (printed name, date and time, meaning) and
  11.200(a) (user id + password at signing); the four-eyes rule is common practice in GMP review
  (EU GMP Annex 11, 2011, section 14).
- New-observation T2 limit: NIST/SEMATECH e-Handbook of Statistical Methods, section 6.5.4.3,
  and Tracy, Young & Mason (1992): A (n+1)(n-1) / (n (n-A)) F(conf; A, n-A), F quantile from scipy.
- SPE limit: Jackson & Mudholkar (1979), "Control procedures for residuals associated with
  principal component analysis", Technometrics 21, eq. for Q_alpha (h0 form), normal quantile from
  scipy; computed here with numpy from the discarded eigenvalues.
- Data: the wine recognition data (Aeberhard, Coomans & de Vel 1992) shipped with scikit-learn; the
  unit labels in the units row are invented for the test.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pandas as pd
import pytest
from review_helpers import actor
from scipy import stats
from sqlalchemy.exc import DBAPIError
from wine_data import wine_frame

from analysis.errors import InputError
from analysis.modelfile import model_from_dict, read_model_file
from webapp.services import audit
from webapp.services import reference_models as reference
from webapp.services.review_rules import ReviewRefused
from webapp.store import get_engine, session_scope
from webapp.store import reference_models as store
from webapp.store.tables import ReferenceModel, ReferenceModelSignature, ReviewLogEntry

ROLES = ("viewer", "analyst", "reviewer", "admin")
NAME = "Cellar 3 release assays"
UNITS = {"alcohol": "% v/v", "malic_acid": "g/L", "magnesium": "mg/L", "proline": "mg/L"}  # invented labels


def training_csv() -> bytes:
    """The first 40 wine samples with a units row under the header."""
    frame = wine_frame().head(40)
    units = ",".join(["", ""] + [UNITS.get(c, "au") for c in frame.columns[2:]])
    lines = frame.to_csv(index=False).splitlines()
    return "\n".join([lines[0], units, *lines[1:]]).encode("utf-8") + b"\n"


# --- rules without a database -------------------------------------------------------------


@pytest.mark.parametrize(
    "value,message",
    [
        (None, "two numbers"),
        ([0.95], "two numbers"),
        ([0.95, 0.99, 0.999], "two numbers"),
        ("0.95,0.99", "two numbers"),
        ([0.99, 0.95], "warning level 0.99 is not below the action level 0.95"),
        ([0.95, 0.95], "not below"),
        ([0, 0.99], "0 is not between 0 and 1"),
        ([0.95, 1], "1 is not between 0 and 1"),
        ([True, 0.99], "not a number"),
        (["0.95", 0.99], "not a number"),
        ([float("nan"), 0.99], "not a number"),
    ],
)
def test_confidence_pairs_are_checked(value, message):
    with pytest.raises(InputError, match=message) as err:
        reference.check_confidence_pair(value)
    assert err.value.field == "confidence"


def test_good_confidence_pair_and_default():
    assert reference.check_confidence_pair([0.9, 0.999]) == (0.9, 0.999)
    assert reference.check_confidence_pair(reference.DEFAULT_CONFIDENCE) == (0.95, 0.99)


@pytest.mark.parametrize(
    "value,message",
    [(None, "must be text"), (7, "must be text"), ("   ", "name is required"), ("a" * 201, "201 characters"),
     ("line\nbreak", "control characters")],
)
def test_names_are_checked(value, message):
    with pytest.raises(InputError, match=message) as err:
        reference.check_name(value)
    assert err.value.field == "name"


@pytest.mark.parametrize("value", [None, "3", 3.0, True, [3], 0, -1, 2**31, 2**70])
def test_ids_are_whole_numbers_in_range(value):
    with pytest.raises(InputError, match="model_id") as err:
        reference.check_id(value, "model_id")
    assert err.value.field == "model_id"


def test_state_filter_is_checked():
    assert reference.check_states(["approved", ""]) == ["approved"]
    assert reference.check_states([]) is None
    with pytest.raises(InputError, match="'aproved' is not one of proposed, approved, rejected, retired"):
        reference.check_states(["aproved"])


# --- the workflow over the API ------------------------------------------------------------


@pytest.fixture
def team(app):
    return {role: actor(app, role, f"{role.title()} Person") for role in ROLES} | {
        "analyst2": actor(app, "analyst", "Second Analyst"),
        "reviewer2": actor(app, "reviewer", "Second Reviewer"),
    }


def _upload(client, who, raw: bytes):
    response = client.post(
        "/api/v1/datasets", data={"file": (io.BytesIO(raw), "cellar3.csv"), "id_column": "sample"},
        headers=who.headers, content_type="multipart/form-data",
    )
    assert response.status_code == 201, response.get_json()
    return response.get_json()["dataset"]["id"]


def _fit(client, who, dataset_id, components=2):
    response = client.post(f"/api/v1/datasets/{dataset_id}/models", json={"components": components},
                           headers=who.headers)
    assert response.status_code == 200, response.get_json()
    return response.get_json()["model"]


@pytest.fixture
def fitted(client, team):
    dataset_id = _upload(client, team["analyst"], training_csv())
    model = _fit(client, team["analyst"], dataset_id)
    return {"dataset_id": dataset_id, "model_id": model["id"], "model": model}


def propose(client, who, model_id, name=NAME, **extra):
    body = {"model_id": model_id, "name": name, "note": "weekly release check", **extra}
    return client.post("/api/v1/reference-models", json=body, headers=who.headers)


def sign(client, who, reference_model_id, verb="approve", password=None, comment="limits and variables checked"):
    return client.post(
        f"/api/v1/reference-models/{reference_model_id}/{verb}",
        json={"password": who.password if password is None else password, "comment": comment},
        headers=who.headers,
    )


def _proposed_id(client, who, model_id, **extra):
    response = propose(client, who, model_id, **extra)
    assert response.status_code == 201, response.get_json()
    return response.get_json()["reference_model"]["id"]


def _get(client, who, reference_model_id):
    response = client.get(f"/api/v1/reference-models/{reference_model_id}", headers=who.headers)
    assert response.status_code == 200, response.get_json()
    return response.get_json()["reference_model"]


def _log(client, who, dataset_id):
    response = client.get(f"/api/v1/datasets/{dataset_id}/review-log", headers=who.headers)
    assert response.status_code == 200
    return response.get_json()["entries"]


def _verified(client, who):
    return client.get("/api/v1/review-log/verify", headers=who.headers).get_json()


@pytest.mark.parametrize("role,status", [("viewer", 403), ("analyst", 201), ("reviewer", 201), ("admin", 201)])
def test_role_matrix_propose(client, team, fitted, role, status):
    response = propose(client, team[role], fitted["model_id"])
    assert response.status_code == status, response.get_json()
    if status == 201:
        proposed = response.get_json()["reference_model"]
        assert proposed["state"] == "proposed" and proposed["version"] == 1 and proposed["name"] == NAME
        assert proposed["signatures"] == [] and proposed["proposed_by_name"] == team[role].display_name


@pytest.mark.parametrize("verb", ["approve", "reject"])
@pytest.mark.parametrize("role,status", [("viewer", 403), ("analyst", 403), ("reviewer", 200), ("admin", 200)])
def test_role_matrix_sign(client, team, fitted, verb, role, status):
    reference_model_id = _proposed_id(client, team["analyst2"], fitted["model_id"])
    response = sign(client, team[role], reference_model_id, verb)
    assert response.status_code == status, response.get_json()
    if status == 200:
        signed = response.get_json()["reference_model"]
        meaning = {"approve": "approved", "reject": "rejected"}[verb]
        assert signed["state"] == meaning and signed["decided_at"].endswith("Z")
        # 21 CFR 11.50: printed name, date and time, meaning.
        [signature] = signed["signatures"]
        assert signature["printed_name"] == team[role].display_name and signature["meaning"] == meaning
        assert signature["signed_at"].endswith("Z") and signature["comment"] == "limits and variables checked"


@pytest.mark.parametrize("role", ROLES)
def test_every_role_reads(client, team, fitted, role):
    reference_model_id = _proposed_id(client, team["analyst"], fitted["model_id"])
    who = team[role]
    assert client.get("/api/v1/reference-models", headers=who.headers).status_code == 200
    assert client.get("/api/v1/reference-models.csv", headers=who.headers).status_code == 200
    assert _get(client, who, reference_model_id)["id"] == reference_model_id


@pytest.mark.parametrize(
    "method,path",
    [("post", "/api/v1/reference-models"), ("get", "/api/v1/reference-models"),
     ("get", "/api/v1/reference-models.csv"), ("get", "/api/v1/reference-models/1"),
     ("get", "/api/v1/reference-models/1/model.json"), ("post", "/api/v1/reference-models/1/approve"),
     ("post", "/api/v1/reference-models/1/reject"), ("post", "/api/v1/reference-models/1/retire")],
)
def test_every_route_needs_a_user(client, method, path):
    response = getattr(client, method)(path, json={})
    assert response.status_code == 401 and response.get_json()["ok"] is False


def test_proposal_freezes_variables_units_limits_and_provenance(client, team, fitted):
    proposed = propose(client, team["analyst"], fitted["model_id"], confidence=[0.9, 0.995]).get_json()[
        "reference_model"]
    dataset = client.get(f"/api/v1/datasets/{fitted['dataset_id']}", headers=team["viewer"].headers).get_json()[
        "dataset"]
    assert proposed["fingerprint"] == fitted["model"]["fingerprint"]
    assert proposed["training_sha256"] == dataset["sha256"]
    assert proposed["model_id"] == fitted["model_id"] and proposed["dataset_id"] == fitted["dataset_id"]
    assert proposed["confidence"] == {"warning": 0.9, "action": 0.995}
    units = {v["name"]: v["unit"] for v in proposed["variables"]}
    assert list(units) == fitted["model"]["variables"]
    assert units["alcohol"] == "% v/v" and units["magnesium"] == "mg/L" and units["hue"] == "au"
    assert proposed["training"]["excluded"] == [] and proposed["training"]["exclusions_signed_off"] is True
    n, a = proposed["n_samples"], proposed["n_components"]
    assert (n, a) == (40, 2)
    for level in ("warning", "action"):
        conf = proposed["limits"][level]["confidence"]
        # NIST/SEMATECH e-Handbook 6.5.4.3; Tracy, Young & Mason (1992): limit for a new observation.
        expected = a * (n + 1) * (n - 1) / (n * (n - a)) * stats.f.ppf(conf, a, n - a)
        assert proposed["limits"][level]["t2_new"] == pytest.approx(expected, rel=1e-12)
    assert proposed["limits"]["action"]["t2_new"] > proposed["limits"]["warning"]["t2_new"]
    entry = [e for e in _log(client, team["viewer"], fitted["dataset_id"])
             if e["action"] == "reference_model_proposed"][0]
    assert entry["payload"]["document_sha256"] == proposed["document_sha256"]
    assert entry["payload"]["version"] == 1 and entry["actor_name"] == team["analyst"].display_name


def _jackson_mudholkar(discarded: np.ndarray, conf: float) -> float:
    """Q_alpha of Jackson & Mudholkar (1979), written out with numpy and scipy's normal quantile."""
    theta1, theta2, theta3 = (np.sum(discarded**i) for i in (1, 2, 3))
    h0 = 1 - 2 * theta1 * theta3 / (3 * theta2**2)
    c = stats.norm.ppf(conf)
    return float(theta1 * (c * np.sqrt(2 * theta2 * h0**2) / theta1 + 1
                           + theta2 * h0 * (h0 - 1) / theta1**2) ** (1 / h0))


def test_proposer_cannot_sign_own_proposal(client, team, fitted):
    reference_model_id = _proposed_id(client, team["reviewer"], fitted["model_id"])
    for verb in ("approve", "reject"):
        response = sign(client, team["reviewer"], reference_model_id, verb)
        assert response.status_code == 403 and "own proposal" in response.get_json()["error"]["message"]
    assert _get(client, team["viewer"], reference_model_id)["state"] == "proposed"


def test_wrong_password_is_refused_logged_and_changes_nothing_else(client, team, fitted):
    reference_model_id = _proposed_id(client, team["analyst"], fitted["model_id"])
    before = _get(client, team["viewer"], reference_model_id)
    log_before = _log(client, team["viewer"], fitted["dataset_id"])
    response = sign(client, team["reviewer"], reference_model_id, password="not-my-password")
    assert response.status_code == 403 and response.get_json()["error"]["code"] == "wrong_password"
    assert "password is not correct" in response.get_json()["error"]["message"]
    assert _get(client, team["viewer"], reference_model_id) == before
    log_after = _log(client, team["viewer"], fitted["dataset_id"])
    assert log_after[: len(log_before)] == log_before
    [failed] = log_after[len(log_before):]
    assert failed["action"] == "sign_failed" and failed["actor_name"] == team["reviewer"].display_name
    assert failed["payload"]["reference_model_id"] == reference_model_id
    assert failed["payload"]["attempted"] == "approved"
    missing = client.post(f"/api/v1/reference-models/{reference_model_id}/approve", json={"comment": "x"},
                          headers=team["reviewer"].headers)
    assert missing.status_code == 403 and missing.get_json()["error"]["code"] == "wrong_password"
    assert sign(client, team["reviewer"], reference_model_id).status_code == 200
    assert _verified(client, team["viewer"])["intact"] is True


def test_a_decision_is_signed_once(client, team, fitted):
    reference_model_id = _proposed_id(client, team["analyst"], fitted["model_id"])
    assert sign(client, team["reviewer"], reference_model_id, "reject").status_code == 200
    for verb in ("approve", "reject", "retire"):
        again = sign(client, team["reviewer2"], reference_model_id, verb)
        assert again.status_code == 409 and again.get_json()["error"]["code"] == "conflict"
    assert len(_get(client, team["viewer"], reference_model_id)["signatures"]) == 1


def test_only_an_approved_model_is_retired_and_handed_out(client, team, fitted):
    reference_model_id = _proposed_id(client, team["analyst"], fitted["model_id"])
    assert sign(client, team["reviewer"], reference_model_id, "retire").status_code == 409
    download = client.get(f"/api/v1/reference-models/{reference_model_id}/model.json", headers=team["viewer"].headers)
    assert download.status_code == 409 and "proposed" in download.get_json()["error"]["message"]
    assert sign(client, team["reviewer"], reference_model_id).status_code == 200
    assert sign(client, team["analyst"], reference_model_id, "retire").status_code == 403
    retired = sign(client, team["reviewer2"], reference_model_id, "retire", comment="line rebuilt")
    assert retired.status_code == 200
    body = retired.get_json()["reference_model"]
    assert body["state"] == "retired" and body["retired_at"] and body["superseded_by"] is None
    assert [s["meaning"] for s in body["signatures"]] == ["approved", "retired"]
    assert client.get(f"/api/v1/reference-models/{reference_model_id}/model.json",
                      headers=team["viewer"].headers).status_code == 200  # still readable
    with client.application.app_context():
        with pytest.raises(ReviewRefused, match="retired") as err:
            reference.frozen_model(reference_model_id)
    assert err.value.status == 409


def test_a_later_version_supersedes_and_the_log_chain_verifies(app, client, team, fitted, monkeypatch, capsys):
    first = _proposed_id(client, team["analyst"], fitted["model_id"])
    assert sign(client, team["reviewer"], first).status_code == 200
    v1_file = client.get(f"/api/v1/reference-models/{first}/model.json", headers=team["viewer"].headers).data
    three = _fit(client, team["analyst"], fitted["dataset_id"], components=3)
    second = _proposed_id(client, team["analyst2"], three["id"])
    third = _proposed_id(client, team["analyst"], fitted["model_id"])
    assert [_get(client, team["viewer"], i)["version"] for i in (first, second, third)] == [1, 2, 3]
    assert sign(client, team["reviewer2"], third).status_code == 200
    # An earlier version cannot supersede a later approved one.
    late = sign(client, team["reviewer"], second)
    assert late.status_code == 409 and "version 3" in late.get_json()["error"]["message"]
    assert sign(client, team["reviewer"], second, "reject").status_code == 200

    old, new = _get(client, team["viewer"], first), _get(client, team["viewer"], third)
    assert old["state"] == "retired" and old["superseded_by"] == third and new["supersedes"] == first
    assert [s["meaning"] for s in old["signatures"]] == ["approved"]  # superseded, not signed as retired
    assert client.get(f"/api/v1/reference-models/{first}/model.json", headers=team["viewer"].headers).data == v1_file
    approved = client.get("/api/v1/reference-models?state=approved", headers=team["viewer"].headers).get_json()
    assert [m["id"] for m in approved["reference_models"]] == [third]

    actions = [e["action"] for e in _log(client, team["viewer"], fitted["dataset_id"])
               if e["action"].startswith("reference_model") or e["action"] == "sign_failed"]
    assert actions == ["reference_model_proposed", "reference_model_approved", "reference_model_proposed",
                       "reference_model_proposed", "reference_model_approved", "reference_model_superseded",
                       "reference_model_rejected"]
    assert _verified(client, team["viewer"])["intact"] is True
    from webapp.cli import main

    monkeypatch.setenv("LATENTDESK_HOME", app.config["HOME"])
    monkeypatch.delenv("LATENTDESK_DATABASE_URL", raising=False)
    assert main(["log", "verify"]) == 0
    assert "intact" in capsys.readouterr().out


def test_csv_twin_lists_the_same_models(client, team, fitted):
    first = _proposed_id(client, team["analyst"], fitted["model_id"], note="=HYPERLINK(\"x\")")
    sign(client, team["reviewer"], first)
    response = client.get("/api/v1/reference-models.csv?state=approved", headers=team["viewer"].headers)
    assert response.status_code == 200 and response.mimetype == "text/csv"
    frame = pd.read_csv(io.StringIO(response.get_data(as_text=True)), float_precision="round_trip")
    assert frame["id"].tolist() == [first] and frame["decided_by"].tolist() == [team["reviewer"].display_name]
    assert "alcohol (% v/v)" in frame["variables"][0]
    # OWASP CSV Injection: a text cell starting with '=' gets a leading quote.
    assert frame["note"][0].startswith("'=")


# --- bad input: a clear 4xx naming the field, nothing stored ------------------------------


def _nothing_stored(client, team, dataset_id):
    listed = client.get("/api/v1/reference-models", headers=team["viewer"].headers).get_json()["reference_models"]
    assert listed == []
    assert [e for e in _log(client, team["viewer"], dataset_id) if e["action"].startswith("reference_model")] == []


@pytest.mark.parametrize(
    "body,field",
    [
        ({}, "model_id"),
        ({"name": NAME}, "model_id"),
        ({"model_id": None, "name": NAME}, "model_id"),
        ({"model_id": "1", "name": NAME}, "model_id"),
        ({"model_id": 1.5, "name": NAME}, "model_id"),
        ({"model_id": True, "name": NAME}, "model_id"),
        ({"model_id": 2**64 + 1, "name": NAME}, "model_id"),
        ({"model_id": 1}, "name"),
        ({"model_id": 1, "name": ["a"]}, "name"),
        ({"model_id": 1, "name": ""}, "name"),
        ({"model_id": 1, "name": NAME, "note": {"a": 1}}, "note"),
        ({"model_id": 1, "name": NAME, "confidence": 0.95}, "confidence"),
        ({"model_id": 1, "name": NAME, "confidence": [0.99, 0.95]}, "confidence"),
        ({"model_id": 1, "name": NAME, "confidence": [[[0.95]], 0.99]}, "confidence"),
        ({"model_id": 1, "name": NAME, "owner": "me"}, "owner"),
    ],
)
def test_bad_proposals_name_the_field_and_store_nothing(client, team, fitted, body, field):
    response = client.post("/api/v1/reference-models", json=body, headers=team["analyst"].headers)
    assert response.status_code == 400, response.get_json()
    error = response.get_json()["error"]
    assert error["code"] == "bad_input" and error["field"] == field and field in error["message"]
    _nothing_stored(client, team, fitted["dataset_id"])


def test_unknown_model_deep_json_and_huge_ids_are_4xx(client, team, fitted):
    headers = team["analyst"].headers
    unknown = propose(client, team["analyst"], 999_999)
    assert unknown.status_code == 404 and unknown.get_json()["error"]["field"] == "model_id"
    deep = '{"model_id": ' + "[" * 100_000 + "]" * 100_000 + ', "name": "x"}'
    nested = client.post("/api/v1/reference-models", data=deep, content_type="application/json", headers=headers)
    assert nested.status_code == 400 and "nested too deeply" in nested.get_json()["error"]["message"]
    not_json = client.post("/api/v1/reference-models", data="{oops", content_type="application/json",
                           headers=headers)
    assert not_json.status_code == 400
    as_list = client.post("/api/v1/reference-models", json=[1, 2], headers=headers)
    assert as_list.status_code == 400 and "JSON object" in as_list.get_json()["error"]["message"]
    huge = 2**70
    for path in (f"/api/v1/reference-models/{huge}", f"/api/v1/reference-models/{huge}/model.json"):
        answer = client.get(path, headers=team["viewer"].headers)
        assert answer.status_code == 404 and str(huge) in answer.get_json()["error"]["message"]
    signed = sign(client, team["reviewer"], huge)
    assert signed.status_code == 404
    assert sign(client, team["viewer"], 999_999).status_code == 403  # the role is checked before existence
    # An id no row can have is refused by the route itself, whatever the role: it tells nothing of stored rows.
    assert sign(client, team["viewer"], huge).status_code == 404
    bad_state = client.get("/api/v1/reference-models?state=approvedd", headers=team["viewer"].headers)
    assert bad_state.status_code == 400 and bad_state.get_json()["error"]["field"] == "state"
    assert client.get("/api/v1/reference-models.csv?state=x", headers=team["viewer"].headers).status_code == 400
    _nothing_stored(client, team, fitted["dataset_id"])


def test_bad_signature_bodies_change_nothing(client, team, fitted):
    reference_model_id = _proposed_id(client, team["analyst"], fitted["model_id"])
    url = f"/api/v1/reference-models/{reference_model_id}/approve"
    headers = team["reviewer"].headers
    extra = client.post(url, json={"password": team["reviewer"].password, "signer": "someone"}, headers=headers)
    assert extra.status_code == 400 and extra.get_json()["error"]["field"] == "signer"
    comment = client.post(url, json={"password": team["reviewer"].password, "comment": ["x"]}, headers=headers)
    assert comment.status_code == 400 and comment.get_json()["error"]["field"] == "comment"
    assert _get(client, team["viewer"], reference_model_id)["state"] == "proposed"
    assert [e["action"] for e in _log(client, team["viewer"], fitted["dataset_id"])] == ["reference_model_proposed"]


# --- the frozen file: identical numbers online and offline --------------------------------


def test_model_document_scores_bit_for_bit_like_the_cached_model(app, client, team, fitted):
    reference_model_id = _proposed_id(client, team["analyst"], fitted["model_id"])
    assert sign(client, team["reviewer"], reference_model_id).status_code == 200
    from webapp.services import ingest, modelling

    with app.app_context():
        cached, _ = modelling.model_by_id(fitted["model_id"])
        document = reference.model_document(reference_model_id)
        frozen, info = reference.frozen_model(reference_model_id)
        table = ingest.load_table(fitted["dataset_id"])
    loaded = model_from_dict(json.loads(json.dumps(document)))
    data = table.data[list(cached.variable_names_)]
    for model in (loaded, frozen):
        assert np.array_equal(model.loadings_, cached.loadings_)
        assert np.array_equal(model.eigenvalues_, cached.eigenvalues_)
        assert np.array_equal(model.mean_, cached.mean_) and np.array_equal(model.scale_, cached.scale_)
        assert np.array_equal(model.transform(data), cached.scores_)
        assert np.array_equal(model.hotelling_t2(data), cached.t2_)
        assert np.array_equal(model.spe(data), cached.spe_)
    # The file's own limits are the action limits; both levels sit in extra.reference_model.
    assert document["settings"]["confidence"] == info["confidence"]["action"] == 0.99
    assert document["limits"]["t2_new"] == info["limits"]["action"]["t2_new"]
    assert document["extra"]["reference_model"]["limits"] == info["limits"]
    discarded = np.asarray(document["eigenvalues"][document["n_components"]:])
    for level in ("warning", "action"):
        conf = info["limits"][level]["confidence"]
        assert info["limits"][level]["spe"] == pytest.approx(_jackson_mudholkar(discarded, conf), rel=1e-10)


def test_downloaded_file_and_offline_apply_match_the_server(client, team, fitted, tmp_path):
    reference_model_id = _proposed_id(client, team["analyst"], fitted["model_id"])
    assert sign(client, team["reviewer"], reference_model_id).status_code == 200
    download = client.get(f"/api/v1/reference-models/{reference_model_id}/model.json",
                          headers=team["viewer"].headers)
    assert download.status_code == 200 and download.mimetype == "application/json"
    assert "attachment" in download.headers["Content-Disposition"]
    info = _get(client, team["viewer"], reference_model_id)
    assert download.headers["ETag"] == f'"{info["document_sha256"]}"'
    assert reference.document_sha256(json.loads(download.data)) == info["document_sha256"]

    model_path, data_path, out = tmp_path / "reference.json", tmp_path / "cellar3.csv", tmp_path / "out"
    model_path.write_bytes(download.data)
    data_path.write_bytes(training_csv())
    _, document = read_model_file(model_path)
    assert document["fingerprint"] == info["fingerprint"]
    from webapp.cli import main

    assert main(["apply", str(model_path), str(data_path), "--out", str(out)]) == 0
    offline = pd.read_csv(out / "samples.csv", float_precision="round_trip").set_index("sample")

    server = client.get(f"/api/v1/models/{fitted['model_id']}/samples", headers=team["viewer"].headers).get_json()
    assert len(server["samples"]) == len(offline) == 40
    for sample in server["samples"]:
        row = offline.loc[sample["sample_id"]]
        assert [row[f"PC{a + 1}"] for a in range(len(sample["scores"]))] == sample["scores"]
        assert row["t2"] == sample["t2"] and row["spe"] == sample["spe"]
        assert bool(row["t2_exceeds"]) == (sample["t2"] > info["limits"]["action"]["t2_new"])
        assert bool(row["spe_exceeds"]) == (sample["spe"] > info["limits"]["action"]["spe"])


# --- the database enforces the rules, on SQLite and PostgreSQL ----------------------------


@pytest.fixture
def guarded(app_factory, database_url):
    """An app on the parametrized database with a proposer, two reviewers, a dataset, a model
    and one proposed reference model, all written through the store functions."""
    from webapp.store import accounts, datasets

    app = app_factory(DATABASE_URL=database_url)
    with app.app_context(), session_scope() as s:
        ana = accounts.add_user(s, "ana", "analyst", "x", "Ana Analyst")
        rita = accounts.add_user(s, "rita", "reviewer", "x", "Rita Reviewer")
        rolf = accounts.add_user(s, "rolf", "reviewer", "x", "Rolf Reviewer")
        dataset = datasets.insert_dataset(
            s, sha256="a" * 64, name="d.csv", stored_path="aa/none", size_bytes=0, id_column=None, sheet=None,
            intake_options={}, n_samples=0, n_variables=0, variables=[], metadata_columns=[], warnings=[],
            report={}, uploaded_by=ana.id,
        )
        model = datasets.record_model(s, dataset_id=dataset.id, fingerprint="f" * 64, settings={}, summary={},
                                      created_by=ana.id)
        ids = {"ana": ana.id, "rita": rita.id, "rolf": rolf.id, "dataset": dataset.id, "model": model.id}
    ids["v1"] = _insert(app, ids, version=1)
    return app, ids


def _insert(app, ids, version, **override):
    fields = dict(
        name="Line 2", version=version, note="", state="proposed", dataset_id=ids["dataset"],
        model_id=ids["model"], fingerprint="f" * 64, training_sha256="a" * 64, warning_confidence=0.95,
        action_confidence=0.99, variables=[{"name": "x", "unit": "mg/L", "log10": False}],
        limits={"action": {"t2_new": 9.5}}, training={"n_samples": 10}, document={"loadings": [[0.5]]},
        document_sha256="d" * 64, proposed_by=ids["ana"], created_at=audit.now_utc(),
    )
    fields.update(override)
    with app.app_context(), session_scope() as s:
        return store.insert_reference_model(s, **fields).id


def _sign_row(app, reference_model_id, signer_id, meaning="approved", step="decision"):
    with app.app_context(), session_scope() as s:
        store.insert_signature(s, reference_model_id=reference_model_id, step=step, signer_id=signer_id,
                               printed_name="Someone", meaning=meaning, comment="", signed_at=audit.now_utc())


def _refused(app, statement: str, because: str | None = None) -> None:
    with pytest.raises(DBAPIError, match=because):
        with get_engine(app).begin() as conn:
            conn.exec_driver_sql(statement)


def _state(app, reference_model_id):
    with app.app_context(), session_scope() as s:
        return store.get_reference_model(s, reference_model_id).state


def test_database_refuses_a_reference_model_born_approved(guarded):
    app, ids = guarded
    with pytest.raises(DBAPIError):
        _insert(app, ids, version=2, state="approved", decided_at=audit.now_utc())


def test_database_refuses_the_proposer_signing_and_approval_without_a_signature(guarded):
    app, ids = guarded
    with pytest.raises(DBAPIError, match="proposer cannot sign"):
        _sign_row(app, ids["v1"], ids["ana"])  # four-eyes: the proposer
    _refused(app, f"UPDATE reference_models SET state = 'approved', decided_at = CURRENT_TIMESTAMP "
                  f"WHERE id = {ids['v1']}")
    with pytest.raises(DBAPIError):
        _sign_row(app, ids["v1"], ids["rita"], meaning="retired", step="retirement")  # not approved yet
    assert _state(app, ids["v1"]) == "proposed"
    _sign_row(app, ids["v1"], ids["rita"])
    with pytest.raises(DBAPIError):  # UNIQUE(reference_model_id, step): one decision per model
        _sign_row(app, ids["v1"], ids["rolf"], meaning="rejected")
    with app.app_context(), session_scope() as s:
        assert store.decide(s, ids["v1"], "approved", audit.now_utc())
    assert _state(app, ids["v1"]) == "approved"


def test_database_freezes_content_and_signatures(guarded):
    app, ids = guarded
    v1 = ids["v1"]
    frozen = [
        "document = '{\"loadings\": [[0.6]]}'", "name = 'Line 3'", "version = 7", "note = 'edited'",
        "limits = '{}'", "variables = '[]'", "training = '{}'", "action_confidence = 0.999",
        "fingerprint = 'e'", "document_sha256 = 'e'", f"proposed_by = {ids['rita']}", "model_id = model_id + 1",
    ]
    for change in frozen:  # while proposed ...
        _refused(app, f"UPDATE reference_models SET {change} WHERE id = {v1}")
    _sign_row(app, v1, ids["rita"])
    with app.app_context(), session_scope() as s:
        store.decide(s, v1, "approved", audit.now_utc())
    for change in frozen:  # ... and once approved
        _refused(app, f"UPDATE reference_models SET {change} WHERE id = {v1}")
    for statement in (
        f"UPDATE reference_models SET state = 'proposed' WHERE id = {v1}",
        f"UPDATE reference_models SET state = 'rejected' WHERE id = {v1}",
        f"UPDATE reference_models SET state = 'retired', retired_at = CURRENT_TIMESTAMP WHERE id = {v1}",
        f"DELETE FROM reference_models WHERE id = {v1}",
        "UPDATE reference_model_signatures SET meaning = 'rejected'",
        "UPDATE reference_model_signatures SET printed_name = 'Mallory'",
        "DELETE FROM reference_model_signatures",
    ):
        _refused(app, statement)
    with app.app_context(), session_scope() as s:
        row = s.get(ReferenceModel, v1)
        assert (row.state, row.name, row.document) == ("approved", "Line 2", {"loadings": [[0.5]]})
        [signature] = store.signatures_of(s, [v1])[v1]
        assert (signature.meaning, signature.printed_name) == ("approved", "Someone")
    with pytest.raises(DBAPIError):  # a decision is signed only while the model is proposed
        _sign_row(app, v1, ids["rolf"], meaning="rejected")


def test_database_freezes_content_even_inside_an_allowed_move(guarded):
    app, ids = guarded
    v1 = ids["v1"]
    _sign_row(app, v1, ids["rita"])
    approve = "UPDATE reference_models SET state = 'approved', decided_at = CURRENT_TIMESTAMP"
    for change in ("document = '{\"loadings\": [[0.6]]}'", "limits = '{}'", "warning_confidence = 0.9",
                   "training_sha256 = 'b'"):
        _refused(app, f"{approve}, {change} WHERE id = {v1}", because="frozen")
    with get_engine(app).begin() as conn:  # the same move without the change is allowed
        conn.exec_driver_sql(f"{approve} WHERE id = {v1}")
    assert _state(app, v1) == "approved"


def test_database_allows_one_approved_version_and_supersedes_only_forward(guarded):
    app, ids = guarded
    v1 = ids["v1"]
    _sign_row(app, v1, ids["rita"])
    with app.app_context(), session_scope() as s:
        store.decide(s, v1, "approved", audit.now_utc())
    v2 = _insert(app, ids, version=2)
    _sign_row(app, v2, ids["rolf"])
    with pytest.raises(DBAPIError):  # two approved versions of one name
        with app.app_context(), session_scope() as s:
            store.decide(s, v2, "approved", audit.now_utc())
    # Superseded only by a later version of the same name that has an approval signature.
    v3 = _insert(app, ids, version=3)
    other = _insert(app, ids, version=1, name="Line 9")
    _sign_row(app, other, ids["rita"])
    for successor in (v3, other, 999):
        _refused(app, f"UPDATE reference_models SET state = 'retired', retired_at = CURRENT_TIMESTAMP, "
                      f"superseded_by = {successor} WHERE id = {v1}")
    with app.app_context(), session_scope() as s:
        now = audit.now_utc()
        assert store.retire(s, v1, now, superseded_by=v2)
        assert store.decide(s, v2, "approved", now)
    assert (_state(app, v1), _state(app, v2)) == ("retired", "approved")
    _refused(app, f"UPDATE reference_models SET superseded_by = NULL WHERE id = {v1}")
    _refused(app, f"UPDATE reference_models SET state = 'approved' WHERE id = {v1}")


def test_database_retires_only_with_a_retirement_signature(guarded):
    app, ids = guarded
    v1 = ids["v1"]
    _sign_row(app, v1, ids["rita"])
    with app.app_context(), session_scope() as s:
        store.decide(s, v1, "approved", audit.now_utc())
    with pytest.raises(DBAPIError):
        with app.app_context(), session_scope() as s:
            store.retire(s, v1, audit.now_utc())
    with pytest.raises(DBAPIError, match="proposer cannot sign"):
        _sign_row(app, v1, ids["ana"], meaning="retired", step="retirement")  # four-eyes again
    _sign_row(app, v1, ids["rolf"], meaning="retired", step="retirement")
    with app.app_context(), session_scope() as s:
        assert store.retire(s, v1, audit.now_utc())
    assert _state(app, v1) == "retired"


def test_service_workflow_and_chain_on_both_databases(app_factory, database_url, tmp_path):
    """The whole lifecycle through the API on the parametrized database; the chain verifies."""
    app = app_factory(DATABASE_URL=database_url, HOME=str(tmp_path / "both"))
    client = app.test_client()
    ana, rita, rolf = (actor(app, role, name) for role, name in
                       (("analyst", "Ana Analyst"), ("reviewer", "Rita Reviewer"), ("reviewer", "Rolf Reviewer")))
    dataset_id = _upload(client, ana, training_csv())
    model_id = _fit(client, ana, dataset_id)["id"]
    first = _proposed_id(client, ana, model_id)
    assert sign(client, ana, first).status_code == 403  # an analyst never signs
    assert sign(client, rita, first, password="wrong").status_code == 403
    assert sign(client, rita, first).status_code == 200
    second = _proposed_id(client, rita, model_id)
    assert sign(client, rita, second).status_code == 403  # own proposal
    assert sign(client, rolf, second).status_code == 200
    assert sign(client, rita, second, "retire").status_code == 403  # own proposal, even to retire
    assert sign(client, rolf, second, "retire").status_code == 200
    with app.app_context(), session_scope() as s:
        states = dict(s.query(ReferenceModel.id, ReferenceModel.state).all())
        assert states == {first: "retired", second: "retired"}
        assert s.get(ReferenceModel, first).superseded_by == second
        assert s.query(ReferenceModelSignature).count() == 3
        actions = [r.action for r in s.query(ReviewLogEntry).order_by(ReviewLogEntry.seq)]
        assert actions == ["reference_model_proposed", "sign_failed", "reference_model_approved",
                           "reference_model_proposed", "reference_model_approved", "reference_model_superseded",
                           "reference_model_retired"]
        assert audit.verify_chain(s) == (True, None, "intact: 7 entries")
    _refused(app, f"UPDATE reference_models SET note = 'quietly edited' WHERE id = {first}")


def test_migration_downgrades_and_upgrades_again(database_url):
    from alembic import command
    from alembic.config import Config
    from sqlalchemy import inspect

    from webapp.store import current_revision, make_engine, migrate
    from webapp.store.engine import MIGRATIONS

    engine = make_engine(database_url)
    try:
        migrate(engine)
        head = current_revision(engine)
        assert {"reference_models", "reference_model_signatures"} <= set(inspect(engine).get_table_names())
        with engine.begin() as connection:
            config = Config()
            config.set_main_option("script_location", str(MIGRATIONS))
            config.attributes["connection"] = connection
            command.downgrade(config, "0002_review_guards")
        assert current_revision(engine) == "0002_review_guards"
        assert "reference_models" not in set(inspect(engine).get_table_names())
        migrate(engine)
        assert current_revision(engine) == head
    finally:
        engine.dispose()
