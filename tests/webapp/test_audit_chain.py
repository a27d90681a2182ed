"""The review log's hash chain: canonical JSON, entry hashes, verification, tampering.

Sources: SHA-256 test vector "abc" from NIST FIPS 180-2 (2002), Appendix B.1; canonical JSON
by RFC 8785 (JSON Canonicalization Scheme, Rundgren, Jordan & Erdtman 2020), computed here with
the ``rfc8785`` package directly (its own examples are checked in tests/analysis/test_canonical_json.py);
entries written before migration 0006_hash_scheme by the legacy form ``ld-json-1``, Python's
``json.dumps(sort_keys=True, separators=(",", ":"), ensure_ascii=False)``, written out here; a hash
chain where each record carries the digest of its predecessor (Haber & Stornetta 1991, "How to
time-stamp a digital document", Journal of Cryptology 3(2), 99-111).  The database part runs on
SQLite and on PostgreSQL.
"""

from __future__ import annotations

import hashlib
import json
from datetime import datetime, timezone

import pytest
import rfc8785

from webapp.services import audit


def test_sha256_is_the_standard_one():
    # NIST FIPS 180-2 (2002), Appendix B.1: SHA-256("abc").
    assert hashlib.sha256(b"abc").hexdigest() == (
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    )


def test_json_safe_turns_non_finite_into_null():
    assert audit.json_safe({"x": float("inf"), "y": (1, 2.5)}) == {"x": None, "y": [1, 2.5]}


def test_utc_iso_converts_zones_and_treats_naive_as_utc():
    from datetime import timedelta

    plus_two = timezone(timedelta(hours=2))
    assert audit.utc_iso(datetime(2026, 5, 1, 12, 0, 0, 5, tzinfo=plus_two)) == "2026-05-01T10:00:00.000005Z"
    assert audit.utc_iso(datetime(2026, 5, 1, 12, 0, 0)) == "2026-05-01T12:00:00.000000Z"


def test_entry_hash_is_sha256_of_the_hand_written_canonical_body():
    at = datetime(2026, 1, 2, 3, 4, 5, 6, tzinfo=timezone.utc)
    # The body written out by hand, keys in code-point order (RFC 8785 section 3.2.3).
    text = (
        '{"action":"propose","actor":{"id":7,"name":"Ana Analyst"},'
        '"at":"2026-01-02T03:04:05.000006Z","dataset_id":3,'
        '"payload":{"samples":["B-12"]},"prev_hash":"' + "0" * 64 + '","seq":1}'
    )
    expected = hashlib.sha256(text.encode("utf-8")).hexdigest()
    got = audit.entry_hash(
        seq=1,
        at=at,
        actor={"id": 7, "name": "Ana Analyst"},
        action="propose",
        dataset_id=3,
        payload={"samples": ["B-12"]},
        prev_hash="0" * 64,
    )
    assert got == expected


def _legacy_bytes(body) -> bytes:
    """The ld-json-1 form, written out here: what entries were hashed over before 0006_hash_scheme."""
    return json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode("utf-8")


def _chain(n: int, schemes=None) -> list[dict]:
    """Build a chain by the definition in the module docstring (independent of verify).

    ``schemes`` lists each entry's scheme (default: all ``rfc8785``).
    """
    schemes = schemes or ["rfc8785"] * n
    serialise = {"rfc8785": rfc8785.dumps, "ld-json-1": _legacy_bytes}
    entries, prev = [], audit.GENESIS_HASH
    for seq in range(1, n + 1):
        entry = {
            "seq": seq,
            "at": f"2026-02-0{1 + seq % 9}T10:00:00.000000Z",
            "actor_id": seq % 3,
            "actor_name": f"user {seq % 3}",
            "action": "propose" if seq % 2 else "approve",
            "dataset_id": 1,
            # 1e-7, 1e16 and a name outside the BMP: the two schemes give different bytes for them.
            "payload": {"n": seq, "samples": [f"S{seq}"], "limit": 1e-7 * seq, "big": 1e16, "\ufb33": 1,
                        "\U0001f600": "Grün"},
            "prev_hash": prev,
            "hash_scheme": schemes[seq - 1],
        }
        body = {
            "seq": seq,
            "at": entry["at"],
            "actor": {"id": entry["actor_id"], "name": entry["actor_name"]},
            "action": entry["action"],
            "dataset_id": 1,
            "payload": entry["payload"],
            "prev_hash": prev,
        }
        entry["hash"] = hashlib.sha256(serialise[entry["hash_scheme"]](body)).hexdigest()
        prev = entry["hash"]
        entries.append(entry)
    return entries


def _head(entries):
    return {"seq": entries[-1]["seq"], "hash": entries[-1]["hash"]} if entries else {"seq": 0, "hash": audit.GENESIS_HASH}


def test_intact_chain_verifies():
    entries = _chain(6)
    ok, broken, reason = audit.verify_entries(entries, _head(entries))
    assert ok and broken is None, reason


def test_empty_chain_verifies():
    assert audit.verify_entries([], {"seq": 0, "hash": audit.GENESIS_HASH})[0]


@pytest.mark.parametrize("field", ["at", "actor_id", "actor_name", "action", "dataset_id", "payload"])
@pytest.mark.parametrize("victim", [1, 4, 6])
def test_editing_any_field_of_any_entry_is_caught(field, victim):
    entries = _chain(6)
    head = _head(entries)
    entry = entries[victim - 1]
    entry[field] = {"payload": {"n": -1}, "at": "2030-01-01T00:00:00.000000Z"}.get(field, 99)
    ok, broken, reason = audit.verify_entries(entries, head)
    assert not ok and broken == victim, reason


def test_rehashing_an_edited_entry_breaks_the_next_link():
    entries = _chain(5)
    head = _head(entries)
    entries[1]["hash"] = "f" * 64
    ok, broken, reason = audit.verify_entries(entries, head)
    assert (ok, broken) == (False, 2)


@pytest.mark.parametrize("victim", [1, 3, 5])
def test_deleting_any_entry_is_caught(victim):
    entries = _chain(5)
    head = _head(entries)
    del entries[victim - 1]
    ok, broken, reason = audit.verify_entries(entries, head)
    assert not ok and broken == victim, reason


def test_entry_added_behind_the_heads_back_is_caught():
    entries = _chain(4)
    head = _head(entries[:3])
    ok, broken, reason = audit.verify_entries(entries, head)
    assert (ok, broken) == (False, 4), reason


def test_each_entry_verifies_under_its_recorded_scheme():
    entries = _chain(6, ["ld-json-1"] * 3 + ["rfc8785"] * 3)
    assert audit.verify_entries(entries, _head(entries)) == (True, None, "intact: 6 entries")


@pytest.mark.parametrize("victim,other", [(2, "rfc8785"), (5, "ld-json-1")])
def test_relabelling_an_entrys_scheme_is_caught(victim, other):
    entries = _chain(6, ["ld-json-1"] * 3 + ["rfc8785"] * 3)
    entries[victim - 1]["hash_scheme"] = other
    ok, broken, reason = audit.verify_entries(entries, _head(entries))
    assert not ok and broken == victim, reason


def test_a_legacy_entry_after_an_rfc8785_one_is_refused():
    entries = _chain(3, ["rfc8785", "ld-json-1", "ld-json-1"])
    ok, broken, reason = audit.verify_entries(entries, _head(entries))
    assert (ok, broken) == (False, 2) and "legacy" in reason


def test_an_unknown_scheme_is_refused():
    entries = _chain(2)
    entries[1]["hash_scheme"] = "ld-json-ascii-1"  # the model files' legacy form, never the log's
    ok, broken, reason = audit.verify_entries(entries, _head(entries))
    assert (ok, broken) == (False, 2) and "unknown hashing scheme 'ld-json-ascii-1'" in reason


def test_entry_hash_follows_rfc8785_numbers_and_key_order():
    at = datetime(2026, 1, 2, 3, 4, 5, 6, tzinfo=timezone.utc)
    # Written by hand after RFC 8785: 1e-7 and 1e16 as ECMAScript writes them (section 3.2.2.3),
    # U+1F600 (UTF-16 D83D DE00) before U+FB33 (section 3.2.3).
    text = (
        '{"action":"note","actor":{"id":null,"name":"System"},"at":"2026-01-02T03:04:05.000006Z",'
        '"dataset_id":null,"payload":{"big":10000000000000000,"limit":1e-7,"\U0001f600":1,"\ufb33":2},'
        '"prev_hash":"' + "0" * 64 + '","seq":1}'
    )
    got = audit.entry_hash(seq=1, at=at, actor={"id": None, "name": "System"}, action="note", dataset_id=None,
                           payload={"limit": 1e-7, "big": 1e16, "\ufb33": 2, "\U0001f600": 1}, prev_hash="0" * 64)
    assert got == hashlib.sha256(text.encode("utf-8")).hexdigest()


# --- the stored chain, on SQLite and PostgreSQL -------------------------------------------

from sqlalchemy.exc import DBAPIError  # noqa: E402

from webapp.store import accounts, get_engine, session_scope  # noqa: E402


@pytest.fixture
def stored_chain(app_factory, database_url):
    """An app on the parametrized database with five log entries written by the app."""
    app = app_factory(DATABASE_URL=database_url)
    with app.app_context():
        with session_scope() as s:
            user = accounts.add_user(s, "ana", "analyst", "x", "Ana Analyst")
            user_id = user.id
        for i in range(5):
            with session_scope() as s:
                audit.append(
                    s, actor_id=user_id, actor_name="Ana Analyst", action="propose",
                    payload={"n": i, "reason": "Grün = green", "x": 0.1 * i},
                )
    return app


def _verify(app):
    with app.app_context(), session_scope() as s:
        return audit.verify_chain(s)


def _as_superuser(app, sql: str) -> None:
    """Change the log behind the app's back: switch the guards off, then run ``sql``."""
    engine = get_engine(app)
    with engine.begin() as conn:
        if conn.dialect.name == "sqlite":
            for name in ("review_log_no_update", "review_log_no_delete",
                         "review_log_head_forward", "review_log_head_no_delete"):
                conn.exec_driver_sql(f"DROP TRIGGER IF EXISTS {name}")
        else:
            conn.exec_driver_sql("SET LOCAL session_replication_role = replica")
        conn.exec_driver_sql(sql)


def test_stored_chain_verifies(stored_chain):
    assert _verify(stored_chain) == (True, None, "intact: 5 entries")


def test_a_new_entrys_hash_is_recomputed_from_its_stored_columns_with_rfc8785(stored_chain):
    """What an auditor does in any language: read the row, build the body, RFC 8785, SHA-256."""
    with stored_chain.app_context(), session_scope() as s:
        audit.append(s, actor_id=None, actor_name="Ana Analyst", action="note",
                     payload={"limit": 1e-7, "big": 1e16, "\ufb33": "dalet", "\U0001f600": "Grün"})
    with get_engine(stored_chain).connect() as conn:
        row = conn.exec_driver_sql(
            "SELECT seq, at, actor_id, actor_name, action, dataset_id, payload, prev_hash, hash, hash_scheme "
            "FROM review_log ORDER BY seq DESC LIMIT 1"
        ).mappings().one()
    at = row["at"] if isinstance(row["at"], datetime) else datetime.fromisoformat(row["at"])
    payload = json.loads(row["payload"]) if isinstance(row["payload"], str) else row["payload"]
    body = {
        "seq": row["seq"], "at": at.strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
        "actor": {"id": row["actor_id"], "name": row["actor_name"]}, "action": row["action"],
        "dataset_id": row["dataset_id"], "payload": payload, "prev_hash": row["prev_hash"],
    }
    assert row["hash_scheme"] == "rfc8785"
    assert hashlib.sha256(rfc8785.dumps(body)).hexdigest() == row["hash"]
    assert hashlib.sha256(_legacy_bytes(body)).hexdigest() != row["hash"]  # the payload tells the schemes apart
    assert _verify(stored_chain) == (True, None, "intact: 6 entries")


@pytest.mark.parametrize("statement", ["UPDATE review_log SET action = 'x' WHERE seq = 2",
                                       "DELETE FROM review_log WHERE seq = 5",
                                       "UPDATE review_log_head SET seq = 1",
                                       "DELETE FROM review_log_head"])
def test_database_refuses_changes_to_the_log(stored_chain, statement):
    with pytest.raises(DBAPIError):
        with get_engine(stored_chain).begin() as conn:
            conn.exec_driver_sql(statement)
    assert _verify(stored_chain)[0]


@pytest.mark.parametrize(
    "statement,broken",
    [
        ("UPDATE review_log SET action = 'approve' WHERE seq = 1", 1),
        ("UPDATE review_log SET actor_name = 'Someone Else' WHERE seq = 3", 3),
        ("UPDATE review_log SET payload = '{\"n\": 9}' WHERE seq = 4", 4),
        ("UPDATE review_log SET at = '2020-01-01 00:00:00' WHERE seq = 2", 2),
        ("DELETE FROM review_log WHERE seq = 3", 3),
        ("DELETE FROM review_log WHERE seq = 1", 1),
        ("DELETE FROM review_log WHERE seq = 5", 5),
    ],
)
def test_tampering_with_a_stored_entry_is_caught(stored_chain, statement, broken):
    _as_superuser(stored_chain, statement)
    ok, first_broken, reason = _verify(stored_chain)
    assert not ok and first_broken == broken, reason


def test_deleting_the_tail_and_the_head_together_is_caught(stored_chain):
    _as_superuser(stored_chain, "DELETE FROM review_log WHERE seq = 5")
    _as_superuser(stored_chain, "DELETE FROM review_log_head")
    ok, _, reason = _verify(stored_chain)
    assert not ok and "head" in reason


def test_concurrent_appends_in_threads_never_fork_the_chain(stored_chain):
    import threading

    errors = []

    def write(k):
        try:
            with stored_chain.app_context():
                from webapp.services.review import run_write

                for i in range(5):
                    run_write(lambda s: audit.append(s, actor_id=None, actor_name=f"w{k}",
                                                     action="note", payload={"i": i}))
        except Exception as exc:  # noqa: BLE001 - collected and reported below
            errors.append(exc)

    threads = [threading.Thread(target=write, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors, errors
    assert _verify(stored_chain) == (True, None, "intact: 25 entries")


# --- latentdesk log verify ----------------------------------------------------------------


@pytest.fixture
def sqlite_chain(app_factory, tmp_path, monkeypatch):
    home = tmp_path / "cli-home"
    app = app_factory(HOME=str(home))
    with app.app_context():
        for i in range(3):
            with session_scope() as s:
                audit.append(s, actor_id=None, actor_name="System Test", action="note", payload={"i": i})
    monkeypatch.setenv("LATENTDESK_HOME", str(home))
    monkeypatch.delenv("LATENTDESK_DATABASE_URL", raising=False)
    return app


def test_cli_log_verify_exits_0_when_intact(sqlite_chain, capsys):
    from webapp.cli import main

    assert main(["log", "verify"]) == 0
    assert "intact: 3 entries" in capsys.readouterr().out


def test_cli_log_verify_exits_1_naming_the_broken_entry(sqlite_chain, capsys):
    from webapp.cli import main

    _as_superuser(sqlite_chain, "UPDATE review_log SET actor_name = 'Nobody' WHERE seq = 2")
    assert main(["log", "verify"]) == 1
    assert "BROKEN at entry 2" in capsys.readouterr().out


def test_cli_log_verify_without_a_database_is_bad_input(tmp_path, monkeypatch, capsys):
    from webapp.cli import main

    monkeypatch.setenv("LATENTDESK_HOME", str(tmp_path / "nothing-here"))
    monkeypatch.delenv("LATENTDESK_DATABASE_URL", raising=False)
    assert main(["log", "verify"]) == 2
    assert "no database" in capsys.readouterr().err


def test_database_freezes_signatures_and_decided_proposals(stored_chain):
    """Sign-offs are append-only and a decided proposal cannot change, whatever the app does."""
    from webapp.store import review as store

    with stored_chain.app_context(), session_scope() as s:
        user_id = accounts.get_user_by_name(s, "ana").id
        reviewer = accounts.add_user(s, "rita", "reviewer", "x", "Rita Reviewer")
        from webapp.store import datasets

        dataset = datasets.insert_dataset(
            s, sha256="a" * 64, name="d.csv", stored_path="aa/none", size_bytes=0, id_column=None, sheet=None,
            intake_options={}, n_samples=0, n_variables=0, variables=[], metadata_columns=[], warnings=[],
            report={}, uploaded_by=user_id,
        )
        proposal = store.insert_proposal(
            s, dataset_id=dataset.id, action="exclude", samples=["S1"], reason_category="other", reason="r",
            proposed_by=user_id, created_at=audit.now_utc(), state="proposed", comparison=None,
        )
        assert store.close_proposal(s, proposal.id, "approved", audit.now_utc())
        store.insert_sign_off(s, proposal_id=proposal.id, signer_id=reviewer.id, printed_name="Rita Reviewer",
                              meaning="approved", comment="", signed_at=audit.now_utc())
        proposal_id = proposal.id
    for statement in (
        f"UPDATE exclusion_proposals SET state = 'proposed' WHERE id = {proposal_id}",
        f"DELETE FROM exclusion_proposals WHERE id = {proposal_id}",
        "UPDATE sign_offs SET meaning = 'rejected'",
        "DELETE FROM sign_offs",
    ):
        with pytest.raises(DBAPIError):
            with get_engine(stored_chain).begin() as conn:
                conn.exec_driver_sql(statement)
    with stored_chain.app_context(), session_scope() as s:
        assert not store.close_proposal(s, proposal_id, "rejected", audit.now_utc())  # the app's own guard
        assert store.get_proposal(s, proposal_id).state == "approved"


def test_verify_endpoint_names_the_first_broken_entry(stored_chain):
    from review_helpers import actor

    viewer = actor(stored_chain, "viewer", "Vera Viewer")
    client = stored_chain.test_client()
    intact = client.get("/api/v1/review-log/verify", headers=viewer.headers).get_json()
    assert intact["intact"] is True and intact["head"]["seq"] == 5
    _as_superuser(stored_chain, "UPDATE review_log SET actor_name = 'Mallory' WHERE seq = 4")
    broken = client.get("/api/v1/review-log/verify", headers=viewer.headers).get_json()
    assert broken["ok"] is True and broken["intact"] is False and broken["first_broken_seq"] == 4
