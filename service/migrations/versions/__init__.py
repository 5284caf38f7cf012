"""Migration revisions, applied in order by Alembic."""
