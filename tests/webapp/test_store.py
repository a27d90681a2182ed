"""The store on SQLite and PostgreSQL: migrations, constraints, types, files.

SHA-256 test vector: FIPS 180-4 / NIST "Secure Hash Standard" example "abc"
(also RFC 6234 section 8.5 test 1).
"""

from __future__ import annotations

import os
from datetime import datetime, timedelta, timezone

import pytest
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from alembic.script import ScriptDirectory
from alembic.config import Config
from sqlalchemy import inspect, select
from sqlalchemy.exc import IntegrityError

from webapp.store import accounts, current_revision, engine_session, make_engine, migrate
from webapp.store.engine import MIGRATIONS
from webapp.store import files
from webapp.store.tables import Base, Dataset, ExclusionProposal, Model, SignOff, User

CONTRACT_TABLES = {
    "users", "login_attempts", "api_tokens", "datasets", "models",
    "exclusion_proposals", "sign_offs", "review_log", "saved_views",
}


@pytest.fixture
def engine(database_url):
    engine = make_engine(database_url)
    migrate(engine)
    yield engine
    engine.dispose()


def _head() -> str:
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS))
    return ScriptDirectory.from_config(cfg).get_current_head()


def test_migrations_create_every_contract_table(engine):
    assert CONTRACT_TABLES <= set(inspect(engine).get_table_names())
    assert current_revision(engine) == _head()


def test_migrating_again_changes_nothing(engine):
    migrate(engine)
    assert current_revision(engine) == _head()


def test_migrations_match_the_table_definitions(engine):
    with engine.connect() as conn:
        context = MigrationContext.configure(conn, opts={"compare_type": True})
        assert compare_metadata(context, Base.metadata) == []


def _user(s, name="ana", role="analyst"):
    return accounts.add_user(s, name, role, "hash")


def _dataset(s, user_id):
    row = Dataset(sha256="a" * 64, name="x.csv", stored_path=files.relative_path("a" * 64), size_bytes=3,
                  n_samples=2, n_variables=2, variables=["v1", "v2"], metadata_columns=[], warnings=[],
                  report={"note": "é"}, intake_options={}, uploaded_by=user_id)
    s.add(row)
    s.flush()
    return row


def test_user_names_are_unique(engine):
    with engine_session(engine) as s:
        _user(s)
    with pytest.raises(IntegrityError), engine_session(engine) as s:
        _user(s)


def test_roles_are_checked_by_the_database(engine):
    with pytest.raises(IntegrityError), engine_session(engine) as s:
        _user(s, role="superuser")


def test_foreign_keys_are_enforced(engine):
    with pytest.raises(IntegrityError), engine_session(engine) as s:
        _dataset(s, user_id=999)


def test_one_decision_per_proposal_is_enforced_by_the_database(engine):
    with engine_session(engine) as s:
        user = _user(s)
        dataset = _dataset(s, user.id)
        proposal = ExclusionProposal(dataset_id=dataset.id, samples=["S1"], reason_category="other",
                                     reason="typo", proposed_by=user.id)
        s.add(proposal)
        s.flush()
        signer = _user(s, "rita", "reviewer")  # never the proposer (migration 0007_review_integrity)
        s.add(SignOff(proposal_id=proposal.id, signer_id=signer.id, printed_name="A", meaning="approved"))
        proposal_id, signer_id = proposal.id, signer.id
    with pytest.raises(IntegrityError), engine_session(engine) as s:
        s.add(SignOff(proposal_id=proposal_id, signer_id=signer_id, printed_name="B", meaning="rejected"))


def test_model_fingerprints_are_unique(engine):
    with engine_session(engine) as s:
        user = _user(s)
        dataset = _dataset(s, user.id)
        s.add(Model(dataset_id=dataset.id, fingerprint="f" * 64, settings={}, summary={}, created_by=user.id))
        ids = dataset.id, user.id
    with pytest.raises(IntegrityError), engine_session(engine) as s:
        s.add(Model(dataset_id=ids[0], fingerprint="f" * 64, settings={}, summary={}, created_by=ids[1]))


def test_times_come_back_as_the_same_utc_instant(engine):
    plus_two = timezone(timedelta(hours=2))
    moment = datetime(2026, 3, 29, 3, 30, 15, 123456, tzinfo=plus_two)
    with engine_session(engine) as s:
        user = _user(s)
        user.locked_until = moment
        user_id = user.id
    with engine_session(engine) as s:
        back = s.get(User, user_id).locked_until
    assert back == moment and back.utcoffset() == timedelta(0)


def test_json_columns_round_trip(engine):
    with engine_session(engine) as s:
        dataset_id = _dataset(s, _user(s).id).id
    with engine_session(engine) as s:
        row = s.get(Dataset, dataset_id)
        assert row.variables == ["v1", "v2"] and row.report == {"note": "é"}


def test_failed_login_counter_adds_up_and_locks_at_the_limit(engine):
    # Lockout after a fixed number of failures: OWASP Authentication Cheat Sheet (account lockout).
    with engine_session(engine) as s:
        user_id = _user(s).id
    now = datetime.now(timezone.utc)
    until = now + timedelta(minutes=15)
    for expected in (1, 2, 3):
        with engine_session(engine) as s:
            assert accounts.reserve_password_check(s, user_id, now=now, max_failures=3, lock_until=until)
            assert s.scalar(select(User.failed_logins).where(User.id == user_id)) == expected
    with engine_session(engine) as s:
        assert accounts.locked_until(s, user_id) == until
        assert not accounts.reserve_password_check(s, user_id, now=now, max_failures=3, lock_until=until)
    later = until + timedelta(seconds=1)  # the lock has run out: the count starts again at one
    with engine_session(engine) as s:
        assert accounts.reserve_password_check(s, user_id, now=later, max_failures=3, lock_until=later)
        assert s.scalar(select(User.failed_logins).where(User.id == user_id)) == 1
        assert accounts.locked_until(s, user_id) is None
    with engine_session(engine) as s:
        accounts.clear_failed_logins(s, user_id)
        assert s.scalar(select(User.failed_logins).where(User.id == user_id)) == 0


def test_tokens_are_found_by_hash_and_revoked(engine):
    with engine_session(engine) as s:
        user_id = _user(s).id
        first = accounts.add_token(s, user_id, "1" * 64).id
        accounts.add_token(s, user_id, "2" * 64)
    with engine_session(engine) as s:
        assert accounts.revoke_tokens(s, user_id, first) == 1
        assert accounts.revoke_tokens(s, user_id, first) == 0
        assert accounts.find_token(s, "1" * 64).revoked_at is not None
        assert accounts.find_token(s, "2" * 64).revoked_at is None


def test_sqlite_runs_with_wal_and_foreign_keys(tmp_path):
    engine = make_engine(f"sqlite:///{tmp_path / 'x.db'}")
    with engine.connect() as conn:
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
        assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1
    engine.dispose()


# -- content-addressed files --------------------------------------------------------

ABC_SHA256 = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"  # FIPS 180-4 example


def test_files_are_stored_under_their_sha256(tmp_path):
    stored = files.store_bytes(tmp_path, b"abc")
    assert stored.sha256 == ABC_SHA256
    assert stored.stored_path == f"files/ba/{ABC_SHA256}"
    assert files.read_bytes(tmp_path, stored.stored_path) == b"abc"
    assert files.store_bytes(tmp_path, b"abc") == stored  # idempotent
    leftovers = [name for name in os.listdir(tmp_path / "files" / "ba") if name != ABC_SHA256]
    assert leftovers == []


@pytest.mark.parametrize("bad", ["../etc/passwd", "files/ba/../../x", "files/xx/" + ABC_SHA256,
                                 "files/ba/" + ABC_SHA256.upper(), "/tmp/x"])
def test_only_content_addressed_paths_are_accepted(tmp_path, bad):
    with pytest.raises(ValueError):
        files.absolute_path(tmp_path, bad)


def test_a_connection_opened_before_a_fork_is_never_reused(engine, monkeypatch):
    """SQLAlchemy docs, "Using Connection Pools with Multiprocessing or os.fork()":
    a pooled connection checked out in another process is discarded, not shared."""
    with engine.connect() as conn:
        first = conn.connection.dbapi_connection
    with engine.connect() as conn:
        assert conn.connection.dbapi_connection is first  # same process: pooled
    real_pid = os.getpid()
    monkeypatch.setattr(os, "getpid", lambda: real_pid + 1)  # as in a forked child
    with engine.connect() as conn:
        assert conn.connection.dbapi_connection is not first
        assert conn.exec_driver_sql("SELECT 1").scalar() == 1
