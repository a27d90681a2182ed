"""Every LatentDesk table (SQLAlchemy 2 declarative mapping).

The schema is changed only through Alembic migrations in ``webapp/migrations``;
this module is the source the migrations are written against.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import (
    JSON,
    Boolean,
    CheckConstraint,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Text,
    BigInteger,
    UniqueConstraint,
    text,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

from webapp.store.types import UTCDateTime, utcnow

ROLES = ("viewer", "analyst", "reviewer", "admin")
PROPOSAL_ACTIONS = ("exclude", "reinstate")
PROPOSAL_STATES = ("proposed", "approved", "rejected", "withdrawn")
SIGN_OFF_MEANINGS = ("approved", "rejected")
REFERENCE_MODEL_STATES = ("proposed", "approved", "rejected", "retired")
REFERENCE_MODEL_MEANINGS = ("approved", "rejected", "retired")
BATCH_STATES = ("open", "reviewed")
BATCH_OUTCOMES = ("assignable_cause", "no_cause_accepted", "rejected")
TOKEN_SCOPES = ("read-only", "read-write")

# Deterministic constraint names so migrations can refer to them on every engine.
NAMING = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


def _in(column: str, values: tuple[str, ...]) -> str:
    return f"{column} IN ({', '.join(repr(v) for v in values)})"


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)
    type_annotation_map = {datetime: UTCDateTime(), dict[str, Any]: JSON, list[Any]: JSON}


class User(Base):
    __tablename__ = "users"
    __table_args__ = (CheckConstraint(_in("role", ROLES), name="role"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(80), unique=True)
    display_name: Mapped[str] = mapped_column(String(200))
    role: Mapped[str] = mapped_column(String(16))
    password_hash: Mapped[str] = mapped_column(String(256))
    active: Mapped[bool] = mapped_column(Boolean, default=True)
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    failed_logins: Mapped[int] = mapped_column(Integer, default=0)
    locked_until: Mapped[datetime | None] = mapped_column(nullable=True)
    # Set by an administrator's password reset: nothing but choosing a new one until then (0010_account_admin).
    must_change_password: Mapped[bool] = mapped_column(Boolean, default=False)
    # When an administrator last unlocked the account: earlier failed sign-ins no longer count.
    unlocked_at: Mapped[datetime | None] = mapped_column(nullable=True)


class LoginAttempt(Base):
    __tablename__ = "login_attempts"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(200), index=True)
    client_addr: Mapped[str] = mapped_column(String(64), index=True)
    ok: Mapped[bool] = mapped_column(Boolean)
    at: Mapped[datetime] = mapped_column(default=utcnow, index=True)
    # Whether a password was checked (False: refused by a lockout first; None: before 0009_sessions).
    evaluated: Mapped[bool | None] = mapped_column(Boolean, nullable=True)


class ApiToken(Base):
    __tablename__ = "api_tokens"
    __table_args__ = (CheckConstraint(_in("scope", TOKEN_SCOPES), name="scope"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id"), index=True)
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    label: Mapped[str] = mapped_column(String(200), default="")
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    revoked_at: Mapped[datetime | None] = mapped_column(nullable=True)
    last_used_at: Mapped[datetime | None] = mapped_column(nullable=True)
    # Migration 0010_account_admin: refused from this moment (None: never expires), and what it may do.
    expires_at: Mapped[datetime | None] = mapped_column(nullable=True)
    scope: Mapped[str] = mapped_column(String(16), default="read-write")


class OidcIdentity(Base):
    """A user's account at an OpenID provider: the pair (issuer, subject) is the
    stable identifier (OpenID Connect Core 1.0, section 5.7); ``sub`` is at most
    255 ASCII characters (section 2)."""

    __tablename__ = "oidc_identities"
    __table_args__ = (UniqueConstraint("issuer", "subject", name="uq_oidc_identities_issuer_subject"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    issuer: Mapped[str] = mapped_column(String(500))
    subject: Mapped[str] = mapped_column(String(255))
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id"), index=True)
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    last_signed_in_at: Mapped[datetime | None] = mapped_column(nullable=True)


class Dataset(Base):
    __tablename__ = "datasets"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    sha256: Mapped[str] = mapped_column(String(64), index=True)
    name: Mapped[str] = mapped_column(String(500))
    stored_path: Mapped[str] = mapped_column(String(200))
    size_bytes: Mapped[int] = mapped_column(BigInteger)
    id_column: Mapped[str | None] = mapped_column(String(500), nullable=True)
    sheet: Mapped[str | None] = mapped_column(String(500), nullable=True)
    intake_options: Mapped[dict[str, Any]] = mapped_column(default=dict)
    n_samples: Mapped[int] = mapped_column(Integer)
    n_variables: Mapped[int] = mapped_column(Integer)
    variables: Mapped[list[Any]] = mapped_column(default=list)
    metadata_columns: Mapped[list[Any]] = mapped_column(default=list)
    warnings: Mapped[list[Any]] = mapped_column(default=list)
    report: Mapped[dict[str, Any]] = mapped_column(default=dict)
    uploaded_by: Mapped[int] = mapped_column(ForeignKey("users.id"))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    # Always set by the app, and filled for older rows by 0011_projects; nullable only because
    # SQLite cannot add a NOT NULL column to a filled table without rebuilding it.
    project_id: Mapped[int | None] = mapped_column(ForeignKey("projects.id"), nullable=True, index=True)


class Model(Base):
    __tablename__ = "models"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    dataset_id: Mapped[int] = mapped_column(ForeignKey("datasets.id"), index=True)
    fingerprint: Mapped[str] = mapped_column(String(64), unique=True)
    settings: Mapped[dict[str, Any]] = mapped_column(default=dict)
    summary: Mapped[dict[str, Any]] = mapped_column(default=dict)
    created_by: Mapped[int] = mapped_column(ForeignKey("users.id"))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)


class ExclusionProposal(Base):
    __tablename__ = "exclusion_proposals"
    __table_args__ = (
        CheckConstraint(_in("action", PROPOSAL_ACTIONS), name="action"),
        CheckConstraint(_in("state", PROPOSAL_STATES), name="state"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    dataset_id: Mapped[int] = mapped_column(ForeignKey("datasets.id"), index=True)
    action: Mapped[str] = mapped_column(String(16), default="exclude")
    samples: Mapped[list[Any]] = mapped_column(default=list)
    reason_category: Mapped[str] = mapped_column(String(64))
    reason: Mapped[str] = mapped_column(Text)
    proposed_by: Mapped[int] = mapped_column(ForeignKey("users.id"))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    state: Mapped[str] = mapped_column(String(16), default="proposed", index=True)
    decided_at: Mapped[datetime | None] = mapped_column(nullable=True)
    comparison: Mapped[dict[str, Any] | None] = mapped_column(JSON, nullable=True)


class SignOff(Base):
    __tablename__ = "sign_offs"
    __table_args__ = (CheckConstraint(_in("meaning", SIGN_OFF_MEANINGS), name="meaning"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    # UNIQUE: one decision per proposal, enforced by the database itself.
    proposal_id: Mapped[int] = mapped_column(ForeignKey("exclusion_proposals.id"), unique=True)
    signer_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    printed_name: Mapped[str] = mapped_column(String(200))
    meaning: Mapped[str] = mapped_column(String(16))
    comment: Mapped[str] = mapped_column(Text, default="")
    signed_at: Mapped[datetime] = mapped_column(default=utcnow)


class ReviewLogEntry(Base):
    __tablename__ = "review_log"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    seq: Mapped[int] = mapped_column(Integer, unique=True)
    dataset_id: Mapped[int | None] = mapped_column(
        ForeignKey("datasets.id"), nullable=True, index=True
    )
    at: Mapped[datetime] = mapped_column(default=utcnow)
    actor_id: Mapped[int | None] = mapped_column(ForeignKey("users.id"), nullable=True)
    actor_name: Mapped[str] = mapped_column(String(200))
    action: Mapped[str] = mapped_column(String(64))
    payload: Mapped[dict[str, Any]] = mapped_column(default=dict)
    prev_hash: Mapped[str] = mapped_column(String(64))
    hash: Mapped[str] = mapped_column(String(64))
    # The canonical JSON ``hash`` was computed under (webapp.services.audit, migration 0006_hash_scheme).
    hash_scheme: Mapped[str] = mapped_column(String(32))


class SavedView(Base):
    __tablename__ = "saved_views"

    id: Mapped[str] = mapped_column(String(64), primary_key=True)
    dataset_id: Mapped[int] = mapped_column(ForeignKey("datasets.id"), index=True)
    title: Mapped[str] = mapped_column(String(300))
    note: Mapped[str] = mapped_column(Text, default="")
    state: Mapped[dict[str, Any]] = mapped_column(default=dict)
    model_fingerprint: Mapped[str | None] = mapped_column(String(64), nullable=True)
    excluded: Mapped[list[Any]] = mapped_column(default=list)
    created_by: Mapped[int] = mapped_column(ForeignKey("users.id"))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)


class ReviewLogHead(Base):
    """One row: the last review-log entry's seq and hash (catches entries removed at the end)."""

    __tablename__ = "review_log_head"
    __table_args__ = (CheckConstraint("id = 1", name="single_row"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    seq: Mapped[int] = mapped_column(Integer)
    hash: Mapped[str] = mapped_column(String(64))


class ReferenceModel(Base):
    """A fitted model proposed, signed and frozen as the reference for checking new batches.

    Everything that defines the model is written once, at proposal: the open
    model file (``document``, what ``latentdesk apply`` reads) and its SHA-256,
    the limits at both confidence levels, the variables with units.  The
    database refuses any change to those columns and any move other than
    proposed -> approved | rejected and approved -> retired (migration
    0003_reference_models); only ``state``, ``decided_at``, ``retired_at`` and
    ``superseded_by`` ever change.
    """

    __tablename__ = "reference_models"
    __table_args__ = (
        CheckConstraint(_in("state", REFERENCE_MODEL_STATES), name="state"),
        CheckConstraint(
            "warning_confidence > 0 AND warning_confidence < action_confidence AND action_confidence < 1",
            name="confidence",
        ),
        CheckConstraint("version >= 1", name="version"),
        UniqueConstraint("name", "version", name="uq_reference_models_name_version"),
        # At most one approved version per name (a partial unique index on both engines).
        Index(
            "ix_reference_models_one_approved_per_name",
            "name",
            unique=True,
            sqlite_where=text("state = 'approved'"),
            postgresql_where=text("state = 'approved'"),
        ),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(200))
    version: Mapped[int] = mapped_column(Integer)
    note: Mapped[str] = mapped_column(Text, default="")
    state: Mapped[str] = mapped_column(String(16), default="proposed", index=True)
    dataset_id: Mapped[int] = mapped_column(ForeignKey("datasets.id"), index=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id"))
    fingerprint: Mapped[str] = mapped_column(String(64))
    training_sha256: Mapped[str] = mapped_column(String(64))
    warning_confidence: Mapped[float] = mapped_column(Float)
    action_confidence: Mapped[float] = mapped_column(Float)
    variables: Mapped[list[Any]] = mapped_column(default=list)
    limits: Mapped[dict[str, Any]] = mapped_column(default=dict)
    training: Mapped[dict[str, Any]] = mapped_column(default=dict)
    document: Mapped[dict[str, Any]] = mapped_column(deferred=True)
    document_sha256: Mapped[str] = mapped_column(String(64))
    proposed_by: Mapped[int] = mapped_column(ForeignKey("users.id"))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    decided_at: Mapped[datetime | None] = mapped_column(nullable=True)
    retired_at: Mapped[datetime | None] = mapped_column(nullable=True)
    superseded_by: Mapped[int | None] = mapped_column(ForeignKey("reference_models.id"), nullable=True)


class ReferenceModelSignature(Base):
    """A signature on a reference model: the decision (approved | rejected) or the retirement.

    Append-only (database triggers); one per step, and never by the proposer
    (a trigger compares ``signer_id`` with the model's ``proposed_by``).
    """

    __tablename__ = "reference_model_signatures"
    __table_args__ = (
        CheckConstraint(_in("meaning", REFERENCE_MODEL_MEANINGS), name="meaning"),
        CheckConstraint(
            "(step = 'decision' AND meaning IN ('approved', 'rejected')) "
            "OR (step = 'retirement' AND meaning = 'retired')",
            name="step",
        ),
        UniqueConstraint("reference_model_id", "step", name="uq_reference_model_signatures_step"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    reference_model_id: Mapped[int] = mapped_column(ForeignKey("reference_models.id"), index=True)
    step: Mapped[str] = mapped_column(String(16))
    signer_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    printed_name: Mapped[str] = mapped_column(String(200))
    meaning: Mapped[str] = mapped_column(String(16))
    comment: Mapped[str] = mapped_column(Text, default="")
    signed_at: Mapped[datetime] = mapped_column(default=utcnow)


class Batch(Base):
    """A file of new samples checked against an approved reference model.

    Written once; only ``state`` (open -> reviewed) and ``reviewed_at`` ever
    change (migration 0004_batches).
    """

    __tablename__ = "batches"
    __table_args__ = (CheckConstraint(_in("state", BATCH_STATES), name="state"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    reference_model_id: Mapped[int] = mapped_column(ForeignKey("reference_models.id"), index=True)
    file_name: Mapped[str] = mapped_column(String(500))
    file_sha256: Mapped[str] = mapped_column(String(64), index=True)
    intake_options: Mapped[dict[str, Any]] = mapped_column(default=dict)
    uploaded_by: Mapped[int] = mapped_column(ForeignKey("users.id"))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    n_samples: Mapped[int] = mapped_column(Integer)
    n_flagged: Mapped[int] = mapped_column(Integer)
    state: Mapped[str] = mapped_column(String(16), default="open")
    warnings: Mapped[list[Any]] = mapped_column(default=list)
    retest: Mapped[bool] = mapped_column(Boolean, default=False)
    reviewed_at: Mapped[datetime | None] = mapped_column(nullable=True)


class BatchSample(Base):
    """One checked sample: its place in the reference model's run order and its statistics.

    Append-only (migration 0004_batches). ``run_index`` continues across every
    batch of the reference model (1, 2, ...); ``violations`` holds the run-rule
    violations that fired at this sample. Its scores and measured values are
    a row of its batch's ``BatchArrays``.
    """

    __tablename__ = "batch_samples"
    __table_args__ = (
        UniqueConstraint("reference_model_id", "run_index", name="uq_batch_samples_run_index"),
        Index("ix_batch_samples_reference_model_sample", "reference_model_id", "sample_id"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    batch_id: Mapped[int] = mapped_column(ForeignKey("batches.id"), index=True)
    reference_model_id: Mapped[int] = mapped_column(ForeignKey("reference_models.id"))
    run_index: Mapped[int] = mapped_column(Integer)
    sample_id: Mapped[str] = mapped_column(String(500))
    t2: Mapped[float] = mapped_column(Float)
    spe: Mapped[float] = mapped_column(Float)
    incomplete: Mapped[bool] = mapped_column(Boolean, default=False)
    t2_warning: Mapped[bool] = mapped_column(Boolean)
    t2_action: Mapped[bool] = mapped_column(Boolean)
    spe_warning: Mapped[bool] = mapped_column(Boolean)
    spe_action: Mapped[bool] = mapped_column(Boolean)
    flagged: Mapped[bool] = mapped_column(Boolean)
    violations: Mapped[list[Any]] = mapped_column(default=list)


class BatchArrays(Base):
    """A batch's scores and measured values, one float64 matrix each (migration 0005_batch_arrays).

    Little-endian float64 bytes, rows in run order (the batch's samples by
    ``run_index``): ``scores`` n_samples x n_components, ``measured``
    n_samples x n_variables in the model's variable order, NaN where a value
    was missing. Append-only.
    """

    __tablename__ = "batch_arrays"

    batch_id: Mapped[int] = mapped_column(ForeignKey("batches.id"), primary_key=True)
    n_components: Mapped[int] = mapped_column(Integer)
    n_variables: Mapped[int] = mapped_column(Integer)
    scores: Mapped[bytes] = mapped_column(LargeBinary)
    measured: Mapped[bytes] = mapped_column(LargeBinary)


class BatchOutcome(Base):
    """A signed outcome for a flagged batch sample; append-only, a correction is a new row."""

    __tablename__ = "batch_outcomes"
    __table_args__ = (CheckConstraint(_in("outcome", BATCH_OUTCOMES), name="outcome"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    batch_sample_id: Mapped[int] = mapped_column(ForeignKey("batch_samples.id"), index=True)
    outcome: Mapped[str] = mapped_column(String(32))
    reason: Mapped[str] = mapped_column(Text)
    cause: Mapped[str | None] = mapped_column(Text, nullable=True)
    signer_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    printed_name: Mapped[str] = mapped_column(String(200))
    signed_at: Mapped[datetime] = mapped_column(default=utcnow)


class UserSession(Base):
    """A browser sign-in, checked on every request (``webapp.auth.sessions``, migration 0009_sessions).

    The signed cookie carries a random secret; only its SHA-256 is stored here.
    ``revoked_at`` and ``revoked_reason`` are set once, when the session ends.
    """

    __tablename__ = "user_sessions"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id"), index=True)
    secret_hash: Mapped[str] = mapped_column(String(64), unique=True)
    created_at: Mapped[datetime] = mapped_column(default=utcnow, index=True)
    last_seen_at: Mapped[datetime] = mapped_column(default=utcnow)
    user_agent: Mapped[str] = mapped_column(String(200), default="")
    client_addr: Mapped[str] = mapped_column(String(64), default="")
    revoked_at: Mapped[datetime | None] = mapped_column(nullable=True)
    revoked_reason: Mapped[str | None] = mapped_column(String(64), nullable=True)


class AdminLogEntry(Base):
    """The admin log: every account change (who, to whom, what), chained by SHA-256 like the
    review log (``webapp.services.audit``). Append-only: database triggers refuse UPDATE and
    DELETE (migration 0010_account_admin)."""

    __tablename__ = "admin_log"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    seq: Mapped[int] = mapped_column(Integer, unique=True)
    at: Mapped[datetime] = mapped_column(default=utcnow)
    actor_id: Mapped[int | None] = mapped_column(ForeignKey("users.id"), nullable=True)
    actor_name: Mapped[str] = mapped_column(String(200))
    action: Mapped[str] = mapped_column(String(64))
    payload: Mapped[dict[str, Any]] = mapped_column(default=dict)
    prev_hash: Mapped[str] = mapped_column(String(64))
    hash: Mapped[str] = mapped_column(String(64))
    hash_scheme: Mapped[str] = mapped_column(String(32))


class AdminLogHead(Base):
    """One row: the last admin-log entry's seq and hash (catches entries removed at the end)."""

    __tablename__ = "admin_log_head"
    __table_args__ = (CheckConstraint("id = 1", name="single_row"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    seq: Mapped[int] = mapped_column(Integer)
    hash: Mapped[str] = mapped_column(String(64))


PROJECT_ROLES = ("viewer", "analyst", "reviewer")


class Project(Base):
    """A team's own space: its datasets (and through them their models, reference models,
    batches, saved views and review log entries) and its members (migration 0011_projects)."""

    __tablename__ = "projects"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(200), unique=True)
    description: Mapped[str] = mapped_column(Text, default="")
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    created_by: Mapped[int | None] = mapped_column(ForeignKey("users.id"), nullable=True)


class ProjectMember(Base):
    """A user's role in one project (viewer, analyst or reviewer); site admins need none."""

    __tablename__ = "project_members"
    __table_args__ = (CheckConstraint(_in("role", PROJECT_ROLES), name="role"),)

    project_id: Mapped[int] = mapped_column(ForeignKey("projects.id"), primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id"), primary_key=True, index=True)
    role: Mapped[str] = mapped_column(String(16))
    added_at: Mapped[datetime] = mapped_column(default=utcnow)
