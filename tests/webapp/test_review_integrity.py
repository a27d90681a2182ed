"""Review integrity: approvals re-checked when they are signed, and records checked against the log.

Sources beside the checks:
- Audit trails that record changes to records and never obscure what was recorded: US FDA
  21 CFR Part 11, 11.10(e); EU GMP Annex 11 (2011), section 9. ``latentdesk log verify`` is
  expected to notice a record edited behind the app's back (an attacker with database access
  switching the triggers off), naming table, record, field and log entry.
- Four-eyes principle (a proposer never signs their own proposal): EU GMP Annex 11 (2011),
  section 14 and 21 CFR Part 11, 11.70 - common practice in GMP review, enforced by the database
  as for reference-model signatures (migration 0003_reference_models).
- A model needs at least 3 samples, and one sample is decided in one proposal at a time: our
  product contract (docs/design.md section 6), common practice.
- Data: the wine recognition data (Aeberhard, Coomans & de Vel 1992) shipped with scikit-learn.

Every test runs on SQLite and on PostgreSQL.
"""

from __future__ import annotations

import io
from types import SimpleNamespace

import pytest
from review_helpers import actor, propose, sign
from sqlalchemy.exc import DBAPIError
from test_batches import approved_reference_model, as_csv, held_out, training, upload_batch
from wine_data import wine_csv, wine_frame

from webapp.cli import main
from webapp.store import get_engine, session_scope
from webapp.store import review as review_store


# --- the set-up ---------------------------------------------------------------------------


@pytest.fixture
def desk(app_factory, database_url, tmp_path, monkeypatch):
    """An app on the parametrized database, a team, and the CLI pointed at the same database."""
    home = tmp_path / "integrity"
    app = app_factory(DATABASE_URL=database_url, HOME=str(home))
    monkeypatch.setenv("LATENTDESK_HOME", str(home))
    monkeypatch.setenv("LATENTDESK_DATABASE_URL", database_url)
    return SimpleNamespace(
        app=app, client=app.test_client(),
        analyst=actor(app, "analyst", "Ana Analyst"), analyst2=actor(app, "analyst", "Abel Analyst"),
        reviewer=actor(app, "reviewer", "Rita Reviewer"),
    )


def upload(desk, frame, name="wine.csv") -> int:
    response = desk.client.post(
        "/api/v1/datasets", data={"file": (io.BytesIO(wine_csv(frame)), name), "id_column": "sample"},
        headers=desk.analyst.headers, content_type="multipart/form-data",
    )
    assert response.status_code == 201, response.get_json()
    return response.get_json()["dataset"]["id"]


def proposed(desk, who, dataset_id, samples) -> int:
    response = propose(desk.client, who, dataset_id, samples)
    assert response.status_code == 201, response.get_json()
    return response.get_json()["proposal"]["id"]


def state_of(desk, proposal_id) -> str:
    response = desk.client.get(f"/api/v1/exclusions/{proposal_id}", headers=desk.reviewer.headers)
    return response.get_json()["proposal"]["state"]


def actions_in_log(desk, dataset_id) -> list[str]:
    response = desk.client.get(f"/api/v1/datasets/{dataset_id}/review-log", headers=desk.reviewer.headers)
    return [e["action"] for e in response.get_json()["entries"]]


def scalar(desk, sql: str):
    with get_engine(desk.app).connect() as conn:
        return conn.exec_driver_sql(sql).scalar_one()


def as_attacker(desk, table: str, sql: str) -> None:
    """Run ``sql`` with ``table``'s guard triggers switched off, then switch them on again."""
    with get_engine(desk.app).begin() as conn:
        if conn.dialect.name == "sqlite":
            triggers = conn.exec_driver_sql(
                "SELECT name, sql FROM sqlite_master WHERE type = 'trigger' AND tbl_name = ?", (table,)
            ).all()
            assert triggers, f"{table} has no triggers to switch off"
            for name, _ in triggers:
                conn.exec_driver_sql(f'DROP TRIGGER "{name}"')
            conn.exec_driver_sql(sql)
            for _, create in triggers:
                conn.exec_driver_sql(create)
        else:
            conn.exec_driver_sql(f"ALTER TABLE {table} DISABLE TRIGGER USER")
            conn.exec_driver_sql(sql)
            conn.exec_driver_sql(f"ALTER TABLE {table} ENABLE TRIGGER USER")


def log_verify(capsys) -> tuple[int, str]:
    capsys.readouterr()
    code = main(["log", "verify"])
    return code, capsys.readouterr().out


# --- proposals: checked again when they are approved ---------------------------------------


def test_two_proposals_that_together_leave_too_few_samples_are_refused_at_the_second_approval(desk, capsys):
    dataset_id = upload(desk, wine_frame().head(10))
    # Each leaves 6 of 10 when it is made; together they would leave 2.
    first = proposed(desk, desk.analyst, dataset_id, ["W-001", "W-002", "W-003", "W-004"])
    second = proposed(desk, desk.analyst2, dataset_id, ["W-005", "W-006", "W-007", "W-008"])
    assert sign(desk.client, desk.reviewer, first).status_code == 200
    before = actions_in_log(desk, dataset_id)

    refused = sign(desk.client, desk.reviewer, second)
    assert refused.status_code == 409, refused.get_json()
    error = refused.get_json()["error"]
    assert error["code"] == "conflict"
    message = error["message"]
    assert f"proposal {second}" in message and "leave 2 of the dataset's 10 samples" in message
    assert "at least 3" in message
    # Nothing changed: still open, no signature, no log entry (not even a failed attempt).
    assert state_of(desk, second) == "proposed"
    assert actions_in_log(desk, dataset_id) == before
    assert log_verify(capsys)[0] == 0
    # Rejecting it is still possible.
    assert sign(desk.client, desk.reviewer, second, "reject").status_code == 200


def test_a_sample_in_an_open_proposal_cannot_be_proposed_again(desk):
    dataset_id = upload(desk, wine_frame().head(12))
    first = proposed(desk, desk.analyst, dataset_id, ["W-003", "W-004"])
    before = actions_in_log(desk, dataset_id)

    again = propose(desk.client, desk.analyst2, dataset_id, ["W-004", "W-009"])
    assert again.status_code == 409, again.get_json()
    error = again.get_json()["error"]
    assert error["code"] == "conflict"
    assert f"W-004 (open proposal {first})" in error["message"] and "W-009" not in error["message"]
    assert actions_in_log(desk, dataset_id) == before
    # A reinstatement proposal is refused the same way.
    assert propose(desk.client, desk.analyst2, dataset_id, ["W-003"], action="reinstate").status_code in (400, 409)

    # Once the first proposal is decided, the sample can be proposed again.
    withdrawn = desk.client.post(f"/api/v1/exclusions/{first}/withdraw", json={}, headers=desk.analyst.headers)
    assert withdrawn.status_code == 200
    assert propose(desk.client, desk.analyst2, dataset_id, ["W-004", "W-009"]).status_code == 201


def test_approval_rechecks_that_no_sample_was_excluded_meanwhile(desk):
    """Two open proposals naming one sample, as the store could hold them before the rule above."""
    dataset_id = upload(desk, wine_frame().head(12))
    first = proposed(desk, desk.analyst, dataset_id, ["W-005"])
    with desk.app.app_context(), session_scope() as s:
        row = review_store.get_proposal(s, first)
        twin = review_store.insert_proposal(
            s, dataset_id=dataset_id, action="exclude", samples=["W-005", "W-006"], reason_category="other",
            reason="older duplicate", proposed_by=desk.analyst2.id, created_at=row.created_at, state="proposed",
            comparison=None,
        ).id
    assert sign(desk.client, desk.reviewer, first).status_code == 200
    refused = sign(desk.client, desk.reviewer, twin)
    assert refused.status_code == 409, refused.get_json()
    message = refused.get_json()["error"]["message"]
    assert f"proposal {twin}" in message and "W-005" in message and "excluded meanwhile" in message
    assert "W-006" not in message
    assert state_of(desk, twin) == "proposed"


def test_the_database_refuses_a_sign_off_by_the_proposer(desk, capsys):
    dataset_id = upload(desk, wine_frame().head(12))
    proposal_id = proposed(desk, desk.analyst, dataset_id, ["W-002"])
    insert = ("INSERT INTO sign_offs (proposal_id, signer_id, printed_name, meaning, comment, signed_at) "
              f"VALUES ({proposal_id}, {{signer}}, 'Name', 'approved', '', CURRENT_TIMESTAMP)")
    with pytest.raises(DBAPIError, match="own proposal"):
        with get_engine(desk.app).begin() as conn:
            conn.exec_driver_sql(insert.format(signer=desk.analyst.id))
    # Another person passes the trigger; such a row written outside the app has no log entry.
    with get_engine(desk.app).begin() as conn:
        conn.exec_driver_sql(insert.format(signer=desk.reviewer.id))
    sign_off_id = scalar(desk, "SELECT id FROM sign_offs")
    code, out = log_verify(capsys)
    assert code == 1
    assert f"sign_offs id {sign_off_id}: no review-log entry records this signature on proposal {proposal_id}" in out


# --- latentdesk log verify checks every record against its entry ----------------------------


@pytest.fixture
def records(desk):
    """An approved exclusion, an approved reference model and a batch with signed outcomes."""
    client = desk.client
    frame = training()
    dataset_id = upload(desk, frame, "cellar.csv")
    proposal_id = proposed(desk, desk.analyst, dataset_id, [frame["sample"].iloc[0]])
    assert sign(client, desk.reviewer, proposal_id).status_code == 200
    approved_reference_model(client, desk.analyst, desk.reviewer)
    reference_model_id = scalar(desk, "SELECT id FROM reference_models")
    faulty = held_out()
    faulty.loc[0, "magnesium"] += 12 * training()["magnesium"].std(ddof=1)
    batch = upload_batch(client, desk.analyst, reference_model_id, as_csv(faulty)).get_json()["batch"]
    flagged = [s["sample"] for s in batch["samples"] if s["flagged"]]
    assert flagged
    signed = client.post(
        f"/api/v1/batches/{batch['id']}/outcomes",
        json={"samples": flagged, "outcome": "no_cause_accepted", "reason": "re-measured, in range",
              "password": desk.reviewer.password},
        headers=desk.reviewer.headers,
    )
    assert signed.status_code == 200, signed.get_json()
    return SimpleNamespace(n_outcomes=len(flagged))


def test_an_untouched_database_verifies(desk, records, capsys):
    code, out = log_verify(capsys)
    assert code == 0, out
    assert "review log intact" in out
    # 1 proposal, 1 sign-off, 1 reference model, 1 signature, 1 batch and its outcomes
    assert f"records: {5 + records.n_outcomes} checked, each matches" in out

    # More of the life of records: a withdrawn and a rejected proposal, a later version of the
    # reference model superseding the first, a correction of an outcome.
    dataset_id = scalar(desk, "SELECT MIN(id) FROM datasets")
    sample = training()["sample"]
    withdrawn = proposed(desk, desk.analyst, dataset_id, [sample.iloc[1]])
    assert desk.client.post(f"/api/v1/exclusions/{withdrawn}/withdraw", json={},
                            headers=desk.analyst.headers).status_code == 200
    rejected = proposed(desk, desk.analyst, dataset_id, [sample.iloc[2]])
    assert sign(desk.client, desk.reviewer, rejected, "reject").status_code == 200
    approved_reference_model(desk.client, desk.analyst, desk.reviewer)
    assert scalar(desk, "SELECT COUNT(*) FROM reference_models WHERE state = 'retired'") == 1
    batch_id = scalar(desk, "SELECT id FROM batches")
    flagged = scalar(desk, "SELECT MIN(sample_id) FROM batch_samples WHERE flagged")
    corrected = desk.client.post(
        f"/api/v1/batches/{batch_id}/outcomes",
        json={"samples": [flagged], "outcome": "rejected", "reason": "second look",
              "password": desk.reviewer.password},
        headers=desk.reviewer.headers,
    )
    assert corrected.status_code == 200, corrected.get_json()
    code, out = log_verify(capsys)
    assert code == 0, out
    # + 2 proposals and 1 sign-off, 1 reference model and its signature, 1 outcome
    assert f"records: {5 + records.n_outcomes + 3 + 2 + 1} checked, each matches" in out


TAMPERING = {
    "approved proposal's reason": (
        "exclusion_proposals", "reason", "propose",
        "UPDATE exclusion_proposals SET reason = 'written in later' WHERE id = {id}"),
    "sign-off's printed name": (
        "sign_offs", "printed_name", "approve",
        "UPDATE sign_offs SET printed_name = 'Someone Else' WHERE id = {id}"),
    "reference model signature's printed name": (
        "reference_model_signatures", "printed_name", "reference_model_approved",
        "UPDATE reference_model_signatures SET printed_name = 'Someone Else' WHERE id = {id}"),
    "batch outcome's reason": (
        "batch_outcomes", "reason", "batch_outcome_signed",
        "UPDATE batch_outcomes SET reason = 'no reason needed' WHERE id = {id}"),
}


@pytest.mark.parametrize("what", list(TAMPERING))
def test_a_record_edited_behind_the_apps_back_is_reported(desk, records, capsys, what):
    table, field, action, sql = TAMPERING[what]
    record_id = scalar(desk, f"SELECT MIN(id) FROM {table}")
    seq = scalar(desk, f"SELECT seq FROM review_log WHERE action = '{action}'")
    as_attacker(desk, table, sql.format(id=record_id))

    code, out = log_verify(capsys)
    assert code == 1, out
    assert "review log intact" in out  # the log itself was not touched: the record check finds it
    findings = [line.strip() for line in out.splitlines() if line.startswith("  ")]
    assert len(findings) == 1, out
    assert findings[0].startswith(f"{table} id {record_id}, field {field}: ")
    assert f"log entry {seq} recorded" in findings[0]
    # the API (and the review-log page) report the same finding
    answer = desk.client.get("/api/v1/review-log/verify", headers=desk.reviewer.headers).get_json()
    assert answer["chain_intact"] and not answer["intact"]
    assert [(f["table"], f["record_id"], f["field"], f["seq"]) for f in answer["record_findings"]] == [
        (table, record_id, field, seq)]


def test_a_deleted_outcome_is_reported_with_the_entry_that_recorded_it(desk, records, capsys):
    seq = scalar(desk, "SELECT seq FROM review_log WHERE action = 'batch_outcome_signed'")
    as_attacker(desk, "batch_outcomes", "DELETE FROM batch_outcomes WHERE id = (SELECT MAX(id) FROM batch_outcomes)")
    code, out = log_verify(capsys)
    assert code == 1
    assert f"batch_outcomes: log entry {seq} records an outcome for sample" in out
