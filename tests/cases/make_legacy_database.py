"""Make tests/cases/legacy_0.1.0.sqlite3: a database as coldcert made it before schema migrations.

It uses the storage module exactly as it was then (git commit fa0f387, the last one before the
migrations), so the upgrade test starts from the real old schema, not from today's idea of it.
Run from the repository root: ``.venv/bin/python tests/cases/make_legacy_database.py``.
"""

from __future__ import annotations

import importlib.util
import sqlite3
import subprocess
import sys
import tempfile
from pathlib import Path

OLD_COMMIT = "fa0f387"
HERE = Path(__file__).resolve().parent
OUT = HERE / "legacy_0.1.0.sqlite3"


def main() -> int:
    source = subprocess.run(["git", "show", f"{OLD_COMMIT}:service/storage.py"], check=True,
                            capture_output=True, text=True, cwd=HERE).stdout
    with tempfile.TemporaryDirectory() as tmp:
        module_path = Path(tmp) / "old_storage.py"
        module_path.write_text(source)
        spec = importlib.util.spec_from_file_location("old_storage", module_path)
        old = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(old)
        OUT.unlink(missing_ok=True)
        storage = old.Storage(f"sqlite:///{OUT}", Path(tmp) / "blobs")
        storage.create_schema()
        with storage.write() as conn:
            conn.execute(old.users.insert().values(
                id=1, username="ines", display_name="Ines Varga (invented)", password_hash=None,
                roles="operator", active=True, created_at="2026-11-30T09:00:00Z"))
            conn.execute(old.events.insert().values(
                at="2026-11-30T09:00:01Z", actor="ines", action="user.created", subject="ines",
                detail_json="{}"))
            conn.execute(old.counters.insert().values(name="certificate-2026", value=7))
        storage.dispose()
    # One self-contained file (no -wal beside it), through the plain driver.
    db = sqlite3.connect(OUT, isolation_level=None)
    db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    db.execute("PRAGMA journal_mode=DELETE")
    db.execute("VACUUM")
    db.close()
    print(f"wrote {OUT} ({OUT.stat().st_size} bytes)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
