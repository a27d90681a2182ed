"""projects: datasets belong to a project, users have a role per project

Revision ID: 0011_projects
Revises: 0010_account_admin
Create Date: 2026-12-04

- ``projects`` and ``project_members`` (a user's role in a project: viewer,
  analyst or reviewer; site admins see every project without one).
- ``datasets.project_id``: models, reference models, batches, saved views and
  review-log entries belong to a project through their dataset.
- Existing data moves into a first project, "First project", with every current
  user who is not a site admin as a member in their current role.
"""
from datetime import datetime, timezone

from alembic import op
import sqlalchemy as sa


revision = "0011_projects"
down_revision = "0010_account_admin"
branch_labels = None
depends_on = None

FIRST_PROJECT = "First project"


def upgrade() -> None:
    op.create_table(
        "projects",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("description", sa.Text(), nullable=False),
        sa.Column("created_at", sa.DateTime(), nullable=False),
        sa.Column("created_by", sa.Integer(), nullable=True),
        sa.ForeignKeyConstraint(["created_by"], ["users.id"], name=op.f("fk_projects_created_by_users")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_projects")),
        sa.UniqueConstraint("name", name=op.f("uq_projects_name")),
    )
    op.create_table(
        "project_members",
        sa.Column("project_id", sa.Integer(), nullable=False),
        sa.Column("user_id", sa.Integer(), nullable=False),
        sa.Column("role", sa.String(length=16), nullable=False),
        sa.Column("added_at", sa.DateTime(), nullable=False),
        sa.CheckConstraint("role IN ('viewer', 'analyst', 'reviewer')", name=op.f("ck_project_members_role")),
        sa.ForeignKeyConstraint(["project_id"], ["projects.id"], name=op.f("fk_project_members_project_id_projects")),
        sa.ForeignKeyConstraint(["user_id"], ["users.id"], name=op.f("fk_project_members_user_id_users")),
        sa.PrimaryKeyConstraint("project_id", "user_id", name=op.f("pk_project_members")),
    )
    op.create_index(op.f("ix_project_members_user_id"), "project_members", ["user_id"], unique=False)
    if op.get_bind().dialect.name == "postgresql":
        op.add_column("datasets", sa.Column("project_id", sa.Integer(), nullable=True))
        op.create_foreign_key(op.f("fk_datasets_project_id_projects"), "datasets", "projects", ["project_id"], ["id"])
    else:  # SQLite adds a column with its REFERENCES clause in place, never a separate constraint
        op.execute("ALTER TABLE datasets ADD COLUMN project_id INTEGER REFERENCES projects (id)")
    op.create_index(op.f("ix_datasets_project_id"), "datasets", ["project_id"], unique=False)
    _first_project()


def _first_project() -> None:
    """Every existing dataset into "First project"; every non-admin user a member in their role."""
    bind = op.get_bind()
    has_data = bind.execute(sa.text("SELECT (SELECT COUNT(*) FROM datasets) + (SELECT COUNT(*) FROM users)")).scalar()
    if not has_data:
        return  # a new database: the first project is made with the first dataset (webapp.services.projects)
    now = datetime.now(timezone.utc).replace(tzinfo=None)  # stored as naive UTC, as UTCDateTime does
    bind.execute(sa.text("INSERT INTO projects (name, description, created_at) VALUES (:n, :d, :t)"),
                 {"n": FIRST_PROJECT, "d": "Data from before projects existed.", "t": now})
    project_id = bind.execute(sa.text("SELECT id FROM projects WHERE name = :n"), {"n": FIRST_PROJECT}).scalar_one()
    bind.execute(sa.text("UPDATE datasets SET project_id = :p"), {"p": project_id})
    bind.execute(sa.text(
        "INSERT INTO project_members (project_id, user_id, role, added_at) "
        "SELECT :p, id, role, :t FROM users WHERE role IN ('viewer', 'analyst', 'reviewer')"
    ), {"p": project_id, "t": now})


def downgrade() -> None:
    if op.get_bind().dialect.name == "postgresql":  # SQLite drops it with the column
        op.drop_constraint(op.f("fk_datasets_project_id_projects"), "datasets", type_="foreignkey")
    op.drop_index(op.f("ix_datasets_project_id"), table_name="datasets")
    op.execute("ALTER TABLE datasets DROP COLUMN project_id")
    op.drop_index(op.f("ix_project_members_user_id"), table_name="project_members")
    op.drop_table("project_members")
    op.drop_table("projects")
