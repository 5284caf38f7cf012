"""Baseline: the schema of coldcert 0.1.0, as databases made before migrations existed have it.

Revision ID: 0001_baseline
Revises: (none)
"""

import sqlalchemy as sa
from alembic import op

revision = '0001_baseline'
down_revision = None
branch_labels = None
depends_on = None

APPEND_ONLY_TABLES = ("chain", "events")


def upgrade() -> None:
    """Create today's tables, indexes and triggers. Long because it is one frozen list of DDL
    (generated once from the metadata), which must never change once shipped."""
    op.create_table('blobs',
    sa.Column('sha256', sa.String(length=64), nullable=False),
    sa.Column('size', sa.Integer(), nullable=False),
    sa.Column('stored_at', sa.String(length=40), nullable=False),
    sa.PrimaryKeyConstraint('sha256')
    )
    op.create_table('chain',
    sa.Column('sequence', sa.Integer(), autoincrement=False, nullable=False),
    sa.Column('entry_type', sa.String(length=20), nullable=False),
    sa.Column('certificate_id', sa.String(length=60), nullable=False),
    sa.Column('entry_json', sa.Text(), nullable=False),
    sa.Column('sha256', sa.String(length=64), nullable=False),
    sa.Column('previous_sha256', sa.String(length=64), nullable=False),
    sa.Column('signature', sa.String(length=128), nullable=False),
    sa.Column('key_id', sa.String(length=64), nullable=False),
    sa.Column('recorded_at', sa.String(length=40), nullable=False),
    sa.PrimaryKeyConstraint('sequence'),
    sa.UniqueConstraint('sha256')
    )
    with op.batch_alter_table('chain', schema=None) as batch_op:
        batch_op.create_index('ix_chain_certificate', ['certificate_id'], unique=False)

    op.create_table('counters',
    sa.Column('name', sa.String(length=60), nullable=False),
    sa.Column('value', sa.Integer(), nullable=False),
    sa.PrimaryKeyConstraint('name')
    )
    op.create_table('events',
    sa.Column('id', sa.Integer(), autoincrement=True, nullable=False),
    sa.Column('at', sa.String(length=40), nullable=False),
    sa.Column('actor', sa.String(length=80), nullable=False),
    sa.Column('action', sa.String(length=60), nullable=False),
    sa.Column('subject', sa.String(length=120), nullable=False),
    sa.Column('detail_json', sa.Text(), nullable=False),
    sa.PrimaryKeyConstraint('id')
    )
    op.create_table('users',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('username', sa.String(length=80), nullable=False),
    sa.Column('display_name', sa.String(length=200), nullable=False),
    sa.Column('password_hash', sa.String(length=255), nullable=True),
    sa.Column('roles', sa.String(length=200), nullable=False),
    sa.Column('active', sa.Boolean(), nullable=False),
    sa.Column('created_at', sa.String(length=40), nullable=False),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('username')
    )
    op.create_table('api_tokens',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('user_id', sa.Integer(), nullable=False),
    sa.Column('token_sha256', sa.String(length=64), nullable=False),
    sa.Column('label', sa.String(length=200), nullable=False),
    sa.Column('created_at', sa.String(length=40), nullable=False),
    sa.Column('revoked_at', sa.String(length=40), nullable=True),
    sa.ForeignKeyConstraint(['user_id'], ['users.id'], ),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('token_sha256')
    )
    op.create_table('runs',
    sa.Column('id', sa.String(length=40), nullable=False),
    sa.Column('kind', sa.String(length=40), nullable=False),
    sa.Column('item', sa.String(length=400), nullable=False),
    sa.Column('submitted_by', sa.Integer(), nullable=False),
    sa.Column('submitted_at', sa.String(length=40), nullable=False),
    sa.Column('manifest_json', sa.Text(), nullable=False),
    sa.Column('seed', sa.Integer(), nullable=False),
    sa.Column('replaces', sa.String(length=60), nullable=True),
    sa.Column('amendment_reason', sa.Text(), nullable=True),
    sa.ForeignKeyConstraint(['submitted_by'], ['users.id'], ),
    sa.PrimaryKeyConstraint('id')
    )
    op.create_table('certificates',
    sa.Column('id', sa.String(length=60), nullable=False),
    sa.Column('number', sa.String(length=40), nullable=False),
    sa.Column('revision', sa.Integer(), nullable=False),
    sa.Column('run_id', sa.String(length=40), nullable=False),
    sa.Column('kind', sa.String(length=40), nullable=False),
    sa.Column('item', sa.String(length=400), nullable=False),
    sa.Column('state', sa.String(length=20), nullable=False),
    sa.Column('record_json', sa.Text(), nullable=False),
    sa.Column('seed', sa.Integer(), nullable=False),
    sa.Column('software_json', sa.Text(), nullable=False),
    sa.Column('options_json', sa.Text(), nullable=False),
    sa.Column('plots_sha256', sa.String(length=64), nullable=True),
    sa.Column('extras_json', sa.Text(), nullable=False),
    sa.Column('submitted_by', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.String(length=40), nullable=False),
    sa.Column('replaces', sa.String(length=60), nullable=True),
    sa.Column('amendment_reason', sa.Text(), nullable=True),
    sa.Column('superseded_by', sa.String(length=60), nullable=True),
    sa.Column('issued_by', sa.Integer(), nullable=True),
    sa.Column('issued_at', sa.String(length=40), nullable=True),
    sa.Column('sequence', sa.Integer(), nullable=True),
    sa.Column('withdrawn_reason', sa.Text(), nullable=True),
    sa.Column('withdrawn_at', sa.String(length=40), nullable=True),
    sa.ForeignKeyConstraint(['issued_by'], ['users.id'], ),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], ),
    sa.ForeignKeyConstraint(['submitted_by'], ['users.id'], ),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('sequence')
    )
    with op.batch_alter_table('certificates', schema=None) as batch_op:
        batch_op.create_index('ix_certificates_search', ['state', 'kind', 'created_at'], unique=False)

    op.create_table('jobs',
    sa.Column('id', sa.String(length=40), nullable=False),
    sa.Column('purpose', sa.String(length=20), nullable=False),
    sa.Column('run_id', sa.String(length=40), nullable=False),
    sa.Column('certificate_id', sa.String(length=60), nullable=True),
    sa.Column('requested_by', sa.Integer(), nullable=False),
    sa.Column('status', sa.String(length=20), nullable=False),
    sa.Column('fraction', sa.Float(), nullable=False),
    sa.Column('step', sa.Text(), nullable=False),
    sa.Column('error', sa.Text(), nullable=True),
    sa.Column('attempts', sa.Integer(), nullable=False),
    sa.Column('claimed_by', sa.String(length=120), nullable=True),
    sa.Column('heartbeat_at', sa.String(length=40), nullable=True),
    sa.Column('created_at', sa.String(length=40), nullable=False),
    sa.Column('started_at', sa.String(length=40), nullable=True),
    sa.Column('finished_at', sa.String(length=40), nullable=True),
    sa.Column('result_json', sa.Text(), nullable=True),
    sa.ForeignKeyConstraint(['requested_by'], ['users.id'], ),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], ),
    sa.PrimaryKeyConstraint('id')
    )
    with op.batch_alter_table('jobs', schema=None) as batch_op:
        batch_op.create_index('ix_jobs_status', ['status', 'created_at'], unique=False)

    op.create_table('run_files',
    sa.Column('run_id', sa.String(length=40), nullable=False),
    sa.Column('name', sa.String(length=400), nullable=False),
    sa.Column('sha256', sa.String(length=64), nullable=False),
    sa.Column('size', sa.Integer(), nullable=False),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], ),
    sa.ForeignKeyConstraint(['sha256'], ['blobs.sha256'], ),
    sa.PrimaryKeyConstraint('run_id', 'name')
    )
    if op.get_bind().dialect.name == "sqlite":
        # chain and events are append-only: an UPDATE or DELETE aborts (service/storage.py).
        for table in APPEND_ONLY_TABLES:
            for verb in ("UPDATE", "DELETE"):
                op.execute(
                    f"CREATE TRIGGER IF NOT EXISTS {table}_no_{verb.lower()} "
                    f"BEFORE {verb} ON {table} BEGIN "
                    f"SELECT RAISE(ABORT, '{table} is append-only'); END"
                )


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        for table in APPEND_ONLY_TABLES:
            for verb in ("update", "delete"):
                op.execute(f"DROP TRIGGER IF EXISTS {table}_no_{verb}")
    op.drop_table('run_files')
    with op.batch_alter_table('jobs', schema=None) as batch_op:
        batch_op.drop_index('ix_jobs_status')

    op.drop_table('jobs')
    with op.batch_alter_table('certificates', schema=None) as batch_op:
        batch_op.drop_index('ix_certificates_search')

    op.drop_table('certificates')
    op.drop_table('runs')
    op.drop_table('api_tokens')
    op.drop_table('users')
    op.drop_table('events')
    op.drop_table('counters')
    with op.batch_alter_table('chain', schema=None) as batch_op:
        batch_op.drop_index('ix_chain_certificate')

    op.drop_table('chain')
    op.drop_table('blobs')
