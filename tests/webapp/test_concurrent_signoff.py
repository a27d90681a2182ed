"""Two reviewers signing the same proposal at the same moment get exactly one decision.

Against a real server (gunicorn, two worker processes) on SQLite and on PostgreSQL:
for each proposal two threads, released together by a barrier, send approve and
reject for two different reviewers.  Expected (docs/design.md section 6; the database enforces it
with UNIQUE(proposal_id) on sign_offs and a conditional UPDATE): one 200, one 409,
one sign-off row, one decision in the review log, and the chain still verifies.
"""

from __future__ import annotations

import threading
from concurrent.futures import ThreadPoolExecutor

import pytest
import requests
from sqlalchemy import func, select

from live_server import insert_dataset, insert_proposals, prepared_home, running_server
from webapp.services import audit
from webapp.store import session_scope
from webapp.store.tables import ExclusionProposal, ReviewLogEntry, SignOff

pytestmark = pytest.mark.slow
PROPOSALS = 12


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def database(request, tmp_path):
    return None if request.param == "sqlite" else request.getfixturevalue("pg_url")


def test_concurrent_sign_offs_give_one_decision(tmp_path, database):
    home = tmp_path / "home"
    people = prepared_home(home, database, [
        ("ana", "analyst", "Ana Proposer"),
        ("rev1", "reviewer", "First Reviewer"),
        ("rev2", "reviewer", "Second Reviewer"),
    ])
    app = people.pop("_app")
    dataset_id = insert_dataset(app, people["ana"]["id"])
    proposal_ids = insert_proposals(app, dataset_id, people["ana"]["id"], "Ana Proposer", PROPOSALS)

    with running_server(home, database) as base:
        def race(proposal_id):
            barrier = threading.Barrier(2)

            def sign(who, decision):
                barrier.wait()
                response = requests.post(
                    f"{base}/api/v1/exclusions/{proposal_id}/{decision}",
                    json={"password": people[who]["password"], "comment": f"{who} at once"},
                    headers=people[who]["headers"], timeout=60,
                )
                return response.status_code, response.json()

            with ThreadPoolExecutor(max_workers=2) as pair:
                first = pair.submit(sign, "rev1", "approve")
                second = pair.submit(sign, "rev2", "reject")
                return first.result(), second.result()

        with ThreadPoolExecutor(max_workers=4) as pool:
            outcomes = list(pool.map(race, proposal_ids))

    for (status_a, body_a), (status_b, body_b) in outcomes:
        assert sorted([status_a, status_b]) == [200, 409], (body_a, body_b)
        loser = body_a if status_a == 409 else body_b
        assert loser["error"]["code"] == "conflict"

    with app.app_context(), session_scope() as s:
        assert s.scalar(select(func.count()).select_from(SignOff)) == PROPOSALS
        states = s.scalars(select(ExclusionProposal.state)).all()
        assert set(states) <= {"approved", "rejected"} and len(states) == PROPOSALS
        decisions = s.scalar(
            select(func.count()).select_from(ReviewLogEntry).where(ReviewLogEntry.action.in_(["approve", "reject"]))
        )
        assert decisions == PROPOSALS
        assert audit.verify_chain(s) == (True, None, f"intact: {2 * PROPOSALS} entries")
    app.extensions["latentdesk.engine"].dispose()
