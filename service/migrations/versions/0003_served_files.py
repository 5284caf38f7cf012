"""served_files: the SHA-256 of every file of an issued certificate the service handed out, so
that a customer's copy can be recognised by the public check (docs/history.md). Append-only.

Revision ID: 0003_served_files
Revises: 0002_distributed_queue
"""

import sqlalchemy as sa
from alembic import op

revision = "0003_served_files"
down_revision = "0002_distributed_queue"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "served_files",
        sa.Column("certificate_id", sa.String(length=60), nullable=False),
        sa.Column("sha256", sa.String(length=64), nullable=False),
        sa.Column("rendering", sa.String(length=20), nullable=False),
        sa.Column("first_served_at", sa.String(length=40), nullable=False),
        sa.PrimaryKeyConstraint("certificate_id", "sha256"),
    )
    if op.get_bind().dialect.name == "sqlite":
        for verb in ("UPDATE", "DELETE"):
            op.execute(
                f"CREATE TRIGGER IF NOT EXISTS served_files_no_{verb.lower()} "
                f"BEFORE {verb} ON served_files BEGIN "
                "SELECT RAISE(ABORT, 'served_files is append-only'); END"
            )


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        for verb in ("update", "delete"):
            op.execute(f"DROP TRIGGER IF EXISTS served_files_no_{verb}")
    op.drop_table("served_files")
