"""Review workflow: rules, role matrix over the API, signatures, withdrawal, reinstatement.

The rules follow docs/design.md section 6 (our product contract).  Signature content follows
US FDA 21 CFR Part 11 section 11.50 (printed name, date and time, meaning) and 11.200(a)
(two identification components at signing: user id + password); the four-eyes rule
(proposer never signs) is common practice in GMP review (EU GMP Annex 11, 2011, section 14).
"""

from __future__ import annotations

import io
from html.parser import HTMLParser

import pytest
from review_helpers import actor, propose, sign
from wine_data import wine_csv, wine_frame

from analysis.errors import InputError
from webapp.services import review_rules as rules

KNOWN = [f"S{i}" for i in range(1, 11)]


# --- rules without a database -------------------------------------------------------------


@pytest.mark.parametrize(
    "role,allowed", [("viewer", False), ("analyst", True), ("reviewer", True), ("admin", True)]
)
def test_who_may_propose(role, allowed):
    if allowed:
        rules.check_can_propose(role)
    else:
        with pytest.raises(rules.ReviewRefused) as err:
            rules.check_can_propose(role)
        assert err.value.status == 403


@pytest.mark.parametrize(
    "role,allowed", [("viewer", False), ("analyst", False), ("reviewer", True), ("admin", True)]
)
def test_who_may_sign(role, allowed):
    kwargs = dict(signer_id=2, role=role, proposed_by=1, state="proposed")
    if allowed:
        rules.check_can_sign(**kwargs)
    else:
        with pytest.raises(rules.ReviewRefused) as err:
            rules.check_can_sign(**kwargs)
        assert err.value.status == 403


def test_proposer_never_signs_own_proposal_even_as_reviewer():
    with pytest.raises(rules.ReviewRefused, match="own proposal"):
        rules.check_can_sign(signer_id=1, role="reviewer", proposed_by=1, state="proposed")


@pytest.mark.parametrize("state", ["approved", "rejected", "withdrawn"])
def test_decided_proposals_are_closed(state):
    with pytest.raises(rules.ReviewRefused) as err:
        rules.check_can_sign(signer_id=2, role="reviewer", proposed_by=1, state=state)
    assert err.value.status == 409
    with pytest.raises(rules.ReviewRefused):
        rules.check_can_withdraw(user_id=1, proposed_by=1, state=state)


def test_only_the_proposer_withdraws():
    rules.check_can_withdraw(user_id=1, proposed_by=1, state="proposed")
    with pytest.raises(rules.ReviewRefused, match="only the proposer"):
        rules.check_can_withdraw(user_id=2, proposed_by=1, state="proposed")


def _check(**overrides):
    args = dict(
        action="exclude",
        samples=["S3", "S1"],
        reason_category="measurement error",
        reason="  pipette fault noted in the bench log ",
        known_samples=KNOWN,
        excluded_now=[],
    )
    args.update(overrides)
    return rules.check_proposal(**args)


def test_valid_proposal_is_cleaned_and_sorted():
    assert _check() == (["S1", "S3"], "measurement error", "pipette fault noted in the bench log")


@pytest.mark.parametrize(
    "overrides,message",
    [
        ({"reason": "   "}, "The reason is required"),
        ({"reason": None}, "The reason is required"),
        ({"reason_category": "looked odd"}, "Choose a reason category .*'looked odd' is not one of them"),
        ({"reason_category": None}, "Choose a reason category .*none was chosen"),
        ({"samples": []}, "non-empty list"),
        ({"samples": ["S1", "S1"]}, "listed twice: S1"),
        ({"samples": ["S1", "nope"]}, "unknown sample id.*nope"),
        ({"excluded_now": ["S3"]}, "already excluded.*S3"),
        ({"action": "reinstate"}, "not excluded now.*S1, S3"),
        ({"action": "delete"}, "action must be one of"),
        ({"samples": KNOWN[:8]}, "would leave 2"),
    ],
)
def test_bad_proposals_are_refused_with_a_clear_message(overrides, message):
    with pytest.raises(InputError, match=message):
        _check(**overrides)


def test_reinstate_needs_the_samples_to_be_excluded():
    assert _check(action="reinstate", excluded_now=["S1", "S3", "S5"])[0] == ["S1", "S3"]


def test_exclusions_fold_in_decision_order():
    decided = [("exclude", ["S1", "S2"]), ("exclude", ["S5"]), ("reinstate", ["S2"]), ("exclude", ["S2"])]
    assert rules.fold_exclusions(decided) == ["S1", "S2", "S5"]
    assert rules.fold_exclusions(decided[:3]) == ["S1", "S5"]
    assert rules.after_exclusions("reinstate", ["S1"], ["S1", "S5"]) == ["S5"]


# --- the workflow over the API ------------------------------------------------------------

ROLES = ("viewer", "analyst", "reviewer", "admin")


@pytest.fixture
def team(app):
    return {role: actor(app, role, f"{role.title()} Person") for role in ROLES} | {
        "analyst2": actor(app, "analyst", "Second Analyst"),
        "reviewer2": actor(app, "reviewer", "Second Reviewer"),
    }


@pytest.fixture
def dataset_id(client, team):
    # Wine recognition data (Aeberhard, Coomans & de Vel 1992) as shipped by scikit-learn;
    # the first 40 samples keep the fits quick.
    raw = wine_csv(wine_frame().head(40))
    response = client.post(
        "/api/v1/datasets", data={"file": (io.BytesIO(raw), "wine40.csv"), "id_column": "sample"},
        headers=team["analyst"].headers, content_type="multipart/form-data",
    )
    assert response.status_code == 201, response.get_json()
    return response.get_json()["dataset"]["id"]




def log_of(client, who, dataset_id):
    response = client.get(f"/api/v1/datasets/{dataset_id}/review-log", headers=who.headers)
    assert response.status_code == 200
    return response.get_json()["entries"]


@pytest.mark.parametrize("role,status", [("viewer", 403), ("analyst", 201), ("reviewer", 201), ("admin", 201)])
def test_role_matrix_propose(client, team, dataset_id, role, status):
    response = propose(client, team[role], dataset_id)
    assert response.status_code == status, response.get_json()
    if status == 201:
        proposal = response.get_json()["proposal"]
        assert proposal["state"] == "proposed" and proposal["samples"] == ["W-003"]
        comparison = proposal["comparison"]
        assert comparison["before"]["excluded"] == [] and comparison["after"]["excluded"] == ["W-003"]
        assert comparison["before"]["fingerprint"] != comparison["after"]["fingerprint"]
        assert len(comparison["compare"]["principal_angles"]) == comparison["before"]["n_components"]


@pytest.mark.parametrize("body,field", [({"reason_category": None}, "reason_category"), ({"reason": ""}, "reason")])
def test_a_bad_field_is_named_in_the_api_answer(client, team, dataset_id, body, field):
    # docs/api.md, errors: the message is for a person, "field" names the JSON key at fault
    response = propose(client, team["analyst"], dataset_id, **body)
    assert response.status_code == 400
    error = response.get_json()["error"]
    assert error["field"] == field and error["message"][0].isupper() and "None" not in error["message"]


@pytest.mark.parametrize("settings", [[1], "autoscale", 3, {"scaling": ["autoscale"]}, {"components": [2]}])
def test_proposal_settings_of_the_wrong_type_are_a_clear_400(client, team, dataset_id, settings):
    # docs/design.md section 5: bad input is a 4xx with a message, never a 500; nothing is stored
    before = len(log_of(client, team["analyst"], dataset_id))
    response = propose(client, team["analyst"], dataset_id, settings=settings)
    assert response.status_code == 400, response.get_json()
    message = response.get_json()["error"]["message"]
    assert "settings" in message or "scaling" in message or "components" in message, message
    assert len(log_of(client, team["analyst"], dataset_id)) == before


@pytest.mark.parametrize("decision", ["approve", "reject"])
@pytest.mark.parametrize("role,status", [("viewer", 403), ("analyst", 403), ("reviewer", 200), ("admin", 200)])
def test_role_matrix_sign(client, team, dataset_id, decision, role, status):
    proposal_id = propose(client, team["analyst2"], dataset_id).get_json()["proposal"]["id"]
    response = sign(client, team[role], proposal_id, decision)
    assert response.status_code == status, response.get_json()
    if status == 200:
        signed = response.get_json()["proposal"]
        meaning = {"approve": "approved", "reject": "rejected"}[decision]
        assert signed["state"] == meaning
        # 21 CFR 11.50: printed name, date and time, meaning.
        assert signed["sign_off"]["printed_name"] == team[role].display_name
        assert signed["sign_off"]["meaning"] == meaning
        assert signed["sign_off"]["signed_at"].endswith("Z")


@pytest.mark.parametrize("role,status", [("viewer", 403), ("analyst", 403), ("reviewer", 403), ("admin", 403)])
def test_role_matrix_withdraw_by_someone_else(client, team, dataset_id, role, status):
    proposal_id = propose(client, team["analyst2"], dataset_id).get_json()["proposal"]["id"]
    response = client.post(f"/api/v1/exclusions/{proposal_id}/withdraw", json={}, headers=team[role].headers)
    assert response.status_code == status


@pytest.mark.parametrize("role", ROLES)
def test_role_matrix_reading(client, team, dataset_id, role):
    who = team[role]
    assert client.get(f"/api/v1/datasets/{dataset_id}/review-log", headers=who.headers).status_code == 200
    assert client.get(f"/api/v1/datasets/{dataset_id}/review-log.csv", headers=who.headers).status_code == 200
    assert client.get(f"/api/v1/datasets/{dataset_id}/exclusions", headers=who.headers).status_code == 200
    assert client.get("/api/v1/review-log/verify", headers=who.headers).status_code == 200


@pytest.mark.parametrize(
    "method,path",
    [
        ("post", "/api/v1/datasets/1/exclusions"),
        ("post", "/api/v1/exclusions/1/approve"),
        ("post", "/api/v1/exclusions/1/reject"),
        ("post", "/api/v1/exclusions/1/withdraw"),
        ("get", "/api/v1/datasets/1/review-log"),
        ("get", "/api/v1/review-log/verify"),
        ("post", "/api/v1/views"),
        ("get", "/api/v1/views/abc"),
    ],
)
def test_every_review_route_needs_a_user(client, method, path):
    response = getattr(client, method)(path, json={})
    assert response.status_code == 401
    assert response.get_json()["ok"] is False


def test_proposer_cannot_sign_own_proposal(client, team, dataset_id):
    proposal_id = propose(client, team["reviewer"], dataset_id).get_json()["proposal"]["id"]
    response = sign(client, team["reviewer"], proposal_id)
    assert response.status_code == 403
    assert "own proposal" in response.get_json()["error"]["message"]
    assert client.get(f"/api/v1/exclusions/{proposal_id}", headers=team["viewer"].headers).get_json()[
        "proposal"]["state"] == "proposed"


def test_wrong_password_is_refused_and_logged(client, team, dataset_id):
    proposal_id = propose(client, team["analyst"], dataset_id).get_json()["proposal"]["id"]
    response = sign(client, team["reviewer"], proposal_id, password="not-my-password")
    assert response.status_code == 403
    assert response.get_json()["error"]["code"] == "wrong_password"
    proposal = client.get(f"/api/v1/exclusions/{proposal_id}", headers=team["viewer"].headers).get_json()["proposal"]
    assert proposal["state"] == "proposed" and proposal["sign_off"] is None
    failed = [e for e in log_of(client, team["viewer"], dataset_id) if e["action"] == "sign_failed"]
    assert len(failed) == 1
    assert failed[0]["actor_name"] == team["reviewer"].display_name
    assert failed[0]["payload"]["proposal_id"] == proposal_id
    # The right password afterwards still signs.
    assert sign(client, team["reviewer"], proposal_id).status_code == 200


def test_missing_password_is_refused(client, team, dataset_id):
    proposal_id = propose(client, team["analyst"], dataset_id).get_json()["proposal"]["id"]
    response = client.post(f"/api/v1/exclusions/{proposal_id}/approve", json={"comment": "x"},
                           headers=team["reviewer"].headers)
    assert response.status_code == 403 and response.get_json()["error"]["code"] == "wrong_password"


def test_withdraw_by_proposer_then_nothing_changes_it(client, team, dataset_id):
    proposal_id = propose(client, team["analyst"], dataset_id).get_json()["proposal"]["id"]
    response = client.post(f"/api/v1/exclusions/{proposal_id}/withdraw", json={"comment": "wrong sample"},
                           headers=team["analyst"].headers)
    assert response.status_code == 200 and response.get_json()["proposal"]["state"] == "withdrawn"
    assert sign(client, team["reviewer"], proposal_id).status_code == 409
    again = client.post(f"/api/v1/exclusions/{proposal_id}/withdraw", json={}, headers=team["analyst"].headers)
    assert again.status_code == 409
    assert [e["action"] for e in log_of(client, team["viewer"], dataset_id)] == ["propose", "withdraw"]


def test_decided_proposal_cannot_be_signed_twice(client, team, dataset_id):
    proposal_id = propose(client, team["analyst"], dataset_id).get_json()["proposal"]["id"]
    assert sign(client, team["reviewer"], proposal_id).status_code == 200
    second = sign(client, team["reviewer2"], proposal_id, "reject")
    assert second.status_code == 409
    assert client.post(f"/api/v1/exclusions/{proposal_id}/withdraw", json={},
                       headers=team["analyst"].headers).status_code == 409


def test_bad_proposals_get_a_400_and_store_nothing(client, team, dataset_id):
    assert propose(client, team["analyst"], dataset_id, samples=["W-999"]).status_code == 400
    response = propose(client, team["analyst"], dataset_id, reason=" ")
    assert response.status_code == 400 and "reason is required" in response.get_json()["error"]["message"]
    response = propose(client, team["analyst"], dataset_id, reason_category="felt like it")
    assert response.status_code == 400
    assert client.post("/api/v1/datasets/999/exclusions", json={}, headers=team["analyst"].headers).status_code == 404
    assert log_of(client, team["viewer"], dataset_id) == []


def _fit(client, who, dataset_id, **body):
    response = client.post(f"/api/v1/datasets/{dataset_id}/models", json={"components": 2, **body},
                           headers=who.headers)
    assert response.status_code == 200, response.get_json()
    return response.get_json()["model"]


def test_approved_exclusions_apply_by_default_and_explicit_lists_are_what_if(client, team, dataset_id):
    proposal_id = propose(client, team["analyst"], dataset_id, samples=["W-007", "W-003"]).get_json()["proposal"]["id"]
    assert _fit(client, team["analyst"], dataset_id)["excluded"] == []  # nothing approved yet
    assert sign(client, team["reviewer"], proposal_id).status_code == 200

    current = _fit(client, team["analyst"], dataset_id)
    assert current["excluded"] == ["W-003", "W-007"] and current["what_if"] is False
    assert current["n_samples"] == 38

    preview = _fit(client, team["analyst"], dataset_id, exclude=[])
    assert preview["excluded"] == [] and preview["what_if"] is True and preview["n_samples"] == 40
    assert preview["fingerprint"] != current["fingerprint"]


def test_reinstate_needs_its_own_signed_proposal(client, team, dataset_id):
    first = propose(client, team["analyst"], dataset_id, samples=["W-003", "W-010"]).get_json()["proposal"]["id"]
    assert sign(client, team["reviewer"], first).status_code == 200
    # Reinstating a sample that is not excluded is refused.
    assert propose(client, team["analyst"], dataset_id, samples=["W-011"], action="reinstate").status_code == 400
    back = propose(client, team["analyst"], dataset_id, samples=["W-010"], action="reinstate",
                   reason_category="extreme but valid")
    assert back.status_code == 201
    back_id = back.get_json()["proposal"]["id"]
    # Until it is signed, the exclusion stands.
    assert _fit(client, team["analyst"], dataset_id)["excluded"] == ["W-003", "W-010"]
    assert sign(client, team["reviewer2"], back_id).status_code == 200
    assert _fit(client, team["analyst"], dataset_id)["excluded"] == ["W-003"]
    listing = client.get(f"/api/v1/datasets/{dataset_id}/exclusions", headers=team["viewer"].headers).get_json()
    assert listing["approved_exclusions"] == ["W-003"]


def test_log_records_who_did_what_and_verifies(client, team, dataset_id):
    proposal_id = propose(client, team["analyst"], dataset_id).get_json()["proposal"]["id"]
    sign(client, team["reviewer"], proposal_id, "reject", comment="=HYPERLINK(\"x\")")
    entries = log_of(client, team["viewer"], dataset_id)
    assert [(e["action"], e["actor_name"]) for e in entries] == [
        ("propose", team["analyst"].display_name), ("reject", team["reviewer"].display_name)]
    assert entries[1]["payload"]["meaning"] == "rejected"
    verified = client.get("/api/v1/review-log/verify", headers=team["viewer"].headers).get_json()
    assert verified["intact"] is True and verified["head"]["hash"] == entries[-1]["hash"]
    # OWASP CSV Injection: a text cell starting with '=' is prefixed with a single quote.
    csv_text = client.get(f"/api/v1/datasets/{dataset_id}/review-log.csv",
                          headers=team["viewer"].headers).get_data(as_text=True)
    assert "'=HYPERLINK" in csv_text and ",=HYPERLINK" not in csv_text


def test_log_filters(client, team, dataset_id):
    proposal_id = propose(client, team["analyst"], dataset_id).get_json()["proposal"]["id"]
    sign(client, team["reviewer"], proposal_id)
    url = f"/api/v1/datasets/{dataset_id}/review-log"
    only = client.get(f"{url}?action=approve", headers=team["viewer"].headers).get_json()["entries"]
    assert [e["action"] for e in only] == ["approve"]
    mine = client.get(f"{url}?actor={team['analyst'].id}", headers=team["viewer"].headers).get_json()["entries"]
    assert [e["action"] for e in mine] == ["propose"]
    bad = client.get(f"{url}?since=yesterday", headers=team["viewer"].headers)
    assert bad.status_code == 400 and "since" in bad.get_json()["error"]["message"]


def test_signoff_report_names_the_signature_and_escapes_user_text(client, team, dataset_id):
    proposal = propose(client, team["analyst"], dataset_id, reason="<script>alert(1)</script> balance fault")
    proposal_id = proposal.get_json()["proposal"]["id"]
    sign(client, team["reviewer"], proposal_id, comment="<b>ok</b>")
    page = client.get(f"/-/review/datasets/{dataset_id}/report?proposal={proposal_id}",
                      headers=team["viewer"].headers)
    assert page.status_code == 200 and page.mimetype == "text/html"
    html = page.get_data(as_text=True)
    # Text from users is shown as text (docs/design.md section 7): escaped, never markup.
    assert "<script>alert(1)</script>" not in html and "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&lt;b&gt;ok&lt;/b&gt;" in html
    # 21 CFR 11.50: printed name, date and time, meaning; plus the dataset's SHA-256.
    assert f"Printed name: {team['reviewer'].display_name}" in html and "Meaning: approved" in html
    sha = client.get(f"/api/v1/datasets/{dataset_id}", headers=team["viewer"].headers).get_json()["dataset"]["sha256"]
    assert sha in html
    assert "<svg" in html  # explained variance before/after as a static chart
    assert client.get(f"/-/review/datasets/{dataset_id}/report?proposal=999",
                      headers=team["viewer"].headers).status_code == 404


HOSTILE = "<script>alert(1)</script> \"'&"


class _Reader(HTMLParser):
    """The elements a browser would build from the page, and its text with references decoded."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.text = [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)

    def handle_data(self, data):
        self.text.append(data)


def test_signoff_report_shows_a_hostile_sample_id_reason_and_printed_name_as_text(app, client, team):
    # HTML Living Standard, section 13.1.2: "<" opens a tag and "&" a character reference, and quotes
    # end attribute values; all of them must reach the page as references and be read back as text.
    frame = wine_frame().head(40)
    frame.loc[2, "sample"] = HOSTILE
    upload = client.post(
        "/api/v1/datasets", data={"file": (io.BytesIO(wine_csv(frame)), "hostile.csv"), "id_column": "sample"},
        headers=team["analyst"].headers, content_type="multipart/form-data",
    )
    assert upload.status_code == 201, upload.get_json()
    dataset_id = upload.get_json()["dataset"]["id"]
    made = propose(client, team["analyst"], dataset_id, samples=(HOSTILE,), reason=HOSTILE)
    assert made.status_code == 201, made.get_json()
    signer = actor(app, "reviewer", HOSTILE)
    assert sign(client, signer, made.get_json()["proposal"]["id"]).status_code == 200
    html = client.get(f"/-/review/datasets/{dataset_id}/report", headers=team["viewer"].headers).get_data(as_text=True)
    assert "<script>" not in html and "\"'&" not in html
    reader = _Reader()
    reader.feed(html)
    assert "script" not in reader.tags
    text = "".join(reader.text)
    assert f"exclude {HOSTILE}" in text  # the sample id in the proposal's heading
    assert f"Reason: {HOSTILE}" in text and f"Printed name: {HOSTILE}" in text
    assert f"approved exclusions now{HOSTILE}" in text


def test_dataset_page_links_follow_selection_and_role():
    from webapp.web.pages.review_links import HIDDEN, links_for

    href, style, save = links_for(3, "?a=2&exclude=S9", {"sample_ids": ["S1", "S 2"]}, can_act=True)
    assert href.startswith("/review/propose?dataset=3&action=exclude&sample=S1&sample=S%202")
    assert "a=2" in href and "exclude=" not in href  # a what-if on the page is not carried into the proposal
    assert style is None and save.startswith("/views?save=1&dataset=3&sel=S1")
    assert links_for(3, "", {"sample_ids": []}, can_act=True)[1] == HIDDEN
    assert links_for(3, "", {"sample_ids": ["S1"]}, can_act=False)[1] == HIDDEN


def test_repeated_wrong_signature_passwords_lock_the_account(app, client, team, dataset_id):
    # OWASP Authentication Cheat Sheet (account lockout): re-entered passwords count like sign-ins.
    proposal_id = propose(client, team["analyst"], dataset_id).get_json()["proposal"]["id"]
    for _ in range(app.config["LOCKOUT_ATTEMPTS"]):
        response = sign(client, team["reviewer"], proposal_id, password="guess")
        assert response.status_code == 403
    assert "locked" in response.get_json()["error"]["message"]
    # Even the right password is refused while the account is locked.
    assert sign(client, team["reviewer"], proposal_id).status_code == 403
    failed = [e for e in log_of(client, team["viewer"], dataset_id) if e["action"] == "sign_failed"]
    assert len(failed) == app.config["LOCKOUT_ATTEMPTS"] + 1


@pytest.mark.parametrize(
    "role,path,status",
    [
        ("viewer", "/review/propose", 403),
        ("analyst", "/review/propose", 200),
        ("viewer", "/review", 200),
        ("viewer", "/review/log", 200),
        ("viewer", "/views", 200),
    ],
)
def test_review_pages_by_role(client, auth, role, path, status):
    auth.login(role)
    assert client.get(path).status_code == status
