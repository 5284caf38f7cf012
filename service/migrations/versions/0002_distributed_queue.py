"""Distributed queue: blobs in the database, the job that drafted a certificate, dispatch time.

* ``blob_data``: blob contents in the database (``BLOB_STORE = "database"``), so analysis
  workers on other machines need no shared folder.
* ``certificates.job_id`` with a unique index: a job delivered twice can never leave two drafts.
* ``jobs.dispatched_at``: when the job's message was last handed to the broker.

Revision ID: 0002_distributed_queue
Revises: 0001_baseline
"""

import sqlalchemy as sa
from alembic import op

revision = "0002_distributed_queue"
down_revision = "0001_baseline"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "blob_data",
        sa.Column("sha256", sa.String(length=64), nullable=False),
        sa.Column("data", sa.LargeBinary(), nullable=False),
        sa.PrimaryKeyConstraint("sha256"),
    )
    op.add_column("jobs", sa.Column("dispatched_at", sa.String(length=40), nullable=True))
    op.add_column("certificates", sa.Column("job_id", sa.String(length=40), nullable=True))
    op.create_index("ux_certificates_job_id", "certificates", ["job_id"], unique=True)


def downgrade() -> None:
    op.drop_index("ux_certificates_job_id", table_name="certificates")
    with op.batch_alter_table("certificates") as batch:
        batch.drop_column("job_id")
    with op.batch_alter_table("jobs") as batch:
        batch.drop_column("dispatched_at")
    op.drop_table("blob_data")
