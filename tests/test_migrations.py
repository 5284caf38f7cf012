"""Schema version and migrations (Alembic): new databases, and databases older than migrations."""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

import pytest
import sqlalchemy as sa

from service import storage as st
from service.storage import Storage

LEGACY = Path(__file__).resolve().parent / "cases" / "legacy_0.1.0.sqlite3"


def _head() -> str:
    from alembic.script import ScriptDirectory

    return ScriptDirectory(str(Path(st.__file__).parent / "migrations")).get_current_head()


def test_new_database_is_created_at_the_newest_revision(tmp_path):
    storage = Storage(f"sqlite:///{tmp_path / 'new.sqlite3'}", tmp_path / "blobs")
    assert storage.schema_revision() is None
    storage.create_schema()
    assert storage.schema_revision() == _head()
    storage.create_schema()  # every start runs it; a second run changes nothing
    assert storage.schema_revision() == _head()
    with storage.read() as conn:
        tables = set(sa.inspect(conn).get_table_names())
    assert {t.name for t in st.metadata.sorted_tables} <= tables


def test_database_made_before_migrations_is_upgraded_with_its_rows(tmp_path):
    # Made by tests/cases/make_legacy_database.py with the storage module of that time.
    path = tmp_path / "legacy.sqlite3"
    shutil.copy(LEGACY, path)
    storage = Storage(f"sqlite:///{path}", tmp_path / "blobs")
    assert storage.schema_revision() is None
    storage.create_schema()
    assert storage.schema_revision() == _head()
    with storage.read() as conn:
        assert conn.execute(sa.select(st.users.c.username)).scalars().all() == ["ines"]
        assert conn.execute(sa.select(st.counters.c.value)).scalar() == 7
    with storage.write() as conn:  # and it is writable through today's code
        assert storage.next_counter(conn, "certificate-2026") == 8
    # The append-only triggers are still in force after the upgrade.
    with pytest.raises(sa.exc.DBAPIError, match="append-only"), storage.write() as conn:
        conn.execute(st.events.delete())


def test_a_foreign_unversioned_database_is_refused(tmp_path):
    path = tmp_path / "other.sqlite3"
    db = sqlite3.connect(path)
    db.execute("CREATE TABLE certificates (id TEXT PRIMARY KEY)")
    db.commit()
    db.close()
    with pytest.raises(RuntimeError, match="not made by coldcert"):
        Storage(f"sqlite:///{path}", tmp_path / "blobs").create_schema()
