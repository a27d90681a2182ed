"""create every table

Revision ID: 0001
Revises: 
Create Date: 2026-12-01

Every table of the first schema (see webapp/store/tables.py). Timestamps are
stored as naive UTC (webapp.store.types.UTCDateTime).
"""
from alembic import op
import sqlalchemy as sa


revision = '0001'
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('login_attempts',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=200), nullable=False),
    sa.Column('client_addr', sa.String(length=64), nullable=False),
    sa.Column('ok', sa.Boolean(), nullable=False),
    sa.Column('at', sa.DateTime(), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_login_attempts'))
    )
    op.create_index(op.f('ix_login_attempts_at'), 'login_attempts', ['at'], unique=False)
    op.create_index(op.f('ix_login_attempts_client_addr'), 'login_attempts', ['client_addr'], unique=False)
    op.create_index(op.f('ix_login_attempts_name'), 'login_attempts', ['name'], unique=False)

    op.create_table('users',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=80), nullable=False),
    sa.Column('display_name', sa.String(length=200), nullable=False),
    sa.Column('role', sa.String(length=16), nullable=False),
    sa.Column('password_hash', sa.String(length=256), nullable=False),
    sa.Column('active', sa.Boolean(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('failed_logins', sa.Integer(), nullable=False),
    sa.Column('locked_until', sa.DateTime(), nullable=True),
    sa.CheckConstraint("role IN ('viewer', 'analyst', 'reviewer', 'admin')", name=op.f('ck_users_role')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_users')),
    sa.UniqueConstraint('name', name=op.f('uq_users_name'))
    )
    op.create_table('api_tokens',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('user_id', sa.Integer(), nullable=False),
    sa.Column('token_hash', sa.String(length=64), nullable=False),
    sa.Column('label', sa.String(length=200), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('revoked_at', sa.DateTime(), nullable=True),
    sa.Column('last_used_at', sa.DateTime(), nullable=True),
    sa.ForeignKeyConstraint(['user_id'], ['users.id'], name=op.f('fk_api_tokens_user_id_users')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_api_tokens')),
    sa.UniqueConstraint('token_hash', name=op.f('uq_api_tokens_token_hash'))
    )
    op.create_index(op.f('ix_api_tokens_user_id'), 'api_tokens', ['user_id'], unique=False)

    op.create_table('datasets',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('sha256', sa.String(length=64), nullable=False),
    sa.Column('name', sa.String(length=500), nullable=False),
    sa.Column('stored_path', sa.String(length=200), nullable=False),
    sa.Column('size_bytes', sa.BigInteger(), nullable=False),
    sa.Column('id_column', sa.String(length=500), nullable=True),
    sa.Column('sheet', sa.String(length=500), nullable=True),
    sa.Column('intake_options', sa.JSON(), nullable=False),
    sa.Column('n_samples', sa.Integer(), nullable=False),
    sa.Column('n_variables', sa.Integer(), nullable=False),
    sa.Column('variables', sa.JSON(), nullable=False),
    sa.Column('metadata_columns', sa.JSON(), nullable=False),
    sa.Column('warnings', sa.JSON(), nullable=False),
    sa.Column('report', sa.JSON(), nullable=False),
    sa.Column('uploaded_by', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['uploaded_by'], ['users.id'], name=op.f('fk_datasets_uploaded_by_users')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_datasets'))
    )
    op.create_index(op.f('ix_datasets_sha256'), 'datasets', ['sha256'], unique=False)

    op.create_table('exclusion_proposals',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('dataset_id', sa.Integer(), nullable=False),
    sa.Column('action', sa.String(length=16), nullable=False),
    sa.Column('samples', sa.JSON(), nullable=False),
    sa.Column('reason_category', sa.String(length=64), nullable=False),
    sa.Column('reason', sa.Text(), nullable=False),
    sa.Column('proposed_by', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('state', sa.String(length=16), nullable=False),
    sa.Column('decided_at', sa.DateTime(), nullable=True),
    sa.Column('comparison', sa.JSON(), nullable=True),
    sa.CheckConstraint("action IN ('exclude', 'reinstate')", name=op.f('ck_exclusion_proposals_action')),
    sa.CheckConstraint("state IN ('proposed', 'approved', 'rejected', 'withdrawn')", name=op.f('ck_exclusion_proposals_state')),
    sa.ForeignKeyConstraint(['dataset_id'], ['datasets.id'], name=op.f('fk_exclusion_proposals_dataset_id_datasets')),
    sa.ForeignKeyConstraint(['proposed_by'], ['users.id'], name=op.f('fk_exclusion_proposals_proposed_by_users')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_exclusion_proposals'))
    )
    op.create_index(op.f('ix_exclusion_proposals_dataset_id'), 'exclusion_proposals', ['dataset_id'], unique=False)
    op.create_index(op.f('ix_exclusion_proposals_state'), 'exclusion_proposals', ['state'], unique=False)

    op.create_table('models',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('dataset_id', sa.Integer(), nullable=False),
    sa.Column('fingerprint', sa.String(length=64), nullable=False),
    sa.Column('settings', sa.JSON(), nullable=False),
    sa.Column('summary', sa.JSON(), nullable=False),
    sa.Column('created_by', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['created_by'], ['users.id'], name=op.f('fk_models_created_by_users')),
    sa.ForeignKeyConstraint(['dataset_id'], ['datasets.id'], name=op.f('fk_models_dataset_id_datasets')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_models')),
    sa.UniqueConstraint('fingerprint', name=op.f('uq_models_fingerprint'))
    )
    op.create_index(op.f('ix_models_dataset_id'), 'models', ['dataset_id'], unique=False)

    op.create_table('review_log',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('seq', sa.Integer(), nullable=False),
    sa.Column('dataset_id', sa.Integer(), nullable=True),
    sa.Column('at', sa.DateTime(), nullable=False),
    sa.Column('actor_id', sa.Integer(), nullable=True),
    sa.Column('actor_name', sa.String(length=200), nullable=False),
    sa.Column('action', sa.String(length=64), nullable=False),
    sa.Column('payload', sa.JSON(), nullable=False),
    sa.Column('prev_hash', sa.String(length=64), nullable=False),
    sa.Column('hash', sa.String(length=64), nullable=False),
    sa.ForeignKeyConstraint(['actor_id'], ['users.id'], name=op.f('fk_review_log_actor_id_users')),
    sa.ForeignKeyConstraint(['dataset_id'], ['datasets.id'], name=op.f('fk_review_log_dataset_id_datasets')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_review_log')),
    sa.UniqueConstraint('seq', name=op.f('uq_review_log_seq'))
    )
    op.create_index(op.f('ix_review_log_dataset_id'), 'review_log', ['dataset_id'], unique=False)

    op.create_table('saved_views',
    sa.Column('id', sa.String(length=64), nullable=False),
    sa.Column('dataset_id', sa.Integer(), nullable=False),
    sa.Column('title', sa.String(length=300), nullable=False),
    sa.Column('note', sa.Text(), nullable=False),
    sa.Column('state', sa.JSON(), nullable=False),
    sa.Column('model_fingerprint', sa.String(length=64), nullable=True),
    sa.Column('excluded', sa.JSON(), nullable=False),
    sa.Column('created_by', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['created_by'], ['users.id'], name=op.f('fk_saved_views_created_by_users')),
    sa.ForeignKeyConstraint(['dataset_id'], ['datasets.id'], name=op.f('fk_saved_views_dataset_id_datasets')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_saved_views'))
    )
    op.create_index(op.f('ix_saved_views_dataset_id'), 'saved_views', ['dataset_id'], unique=False)

    op.create_table('sign_offs',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('proposal_id', sa.Integer(), nullable=False),
    sa.Column('signer_id', sa.Integer(), nullable=False),
    sa.Column('printed_name', sa.String(length=200), nullable=False),
    sa.Column('meaning', sa.String(length=16), nullable=False),
    sa.Column('comment', sa.Text(), nullable=False),
    sa.Column('signed_at', sa.DateTime(), nullable=False),
    sa.CheckConstraint("meaning IN ('approved', 'rejected')", name=op.f('ck_sign_offs_meaning')),
    sa.ForeignKeyConstraint(['proposal_id'], ['exclusion_proposals.id'], name=op.f('fk_sign_offs_proposal_id_exclusion_proposals')),
    sa.ForeignKeyConstraint(['signer_id'], ['users.id'], name=op.f('fk_sign_offs_signer_id_users')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_sign_offs')),
    sa.UniqueConstraint('proposal_id', name=op.f('uq_sign_offs_proposal_id'))
    )


def downgrade() -> None:
    op.drop_table('sign_offs')
    op.drop_index(op.f('ix_saved_views_dataset_id'), table_name='saved_views')

    op.drop_table('saved_views')
    op.drop_index(op.f('ix_review_log_dataset_id'), table_name='review_log')

    op.drop_table('review_log')
    op.drop_index(op.f('ix_models_dataset_id'), table_name='models')

    op.drop_table('models')
    op.drop_index(op.f('ix_exclusion_proposals_state'), table_name='exclusion_proposals')
    op.drop_index(op.f('ix_exclusion_proposals_dataset_id'), table_name='exclusion_proposals')

    op.drop_table('exclusion_proposals')
    op.drop_index(op.f('ix_datasets_sha256'), table_name='datasets')

    op.drop_table('datasets')
    op.drop_index(op.f('ix_api_tokens_user_id'), table_name='api_tokens')

    op.drop_table('api_tokens')
    op.drop_table('users')
    op.drop_index(op.f('ix_login_attempts_name'), table_name='login_attempts')
    op.drop_index(op.f('ix_login_attempts_client_addr'), table_name='login_attempts')
    op.drop_index(op.f('ix_login_attempts_at'), table_name='login_attempts')

    op.drop_table('login_attempts')
