"""The one storage module: database tables, connection lifetime and the raw-file blob folder.

Everything the service keeps goes through here. Tables are declared with SQLAlchemy Core so the
same statements run on the embedded default (SQLite in WAL mode inside the instance folder) and on
a PostgreSQL server chosen by a database URL; nothing outside this module knows which one it is.

On the embedded default raw bytes (uploaded measurement files, plots, output files) do not go into
the database. They live in a blob folder, one file per content, named by its SHA-256, so
identical uploads share one copy and a stored file can always be checked against its name. On a
database server they go into the ``blob_data`` table instead, by the same content address, so
workers on other machines need no shared folder (:class:`DatabaseBlobStore`). A blob is written to a temporary file in the same folder,
flushed to disk (fsync) and then renamed into place: a crash leaves either the whole file or
nothing, never a partial blob under a valid name (POSIX rename is atomic within one file system).
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import os
import re
import shutil
import socket
import tempfile
import time
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path
from urllib.parse import quote

from sqlalchemy import (
    Boolean,
    Column,
    Connection,
    Engine,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Table,
    Text,
    create_engine,
    event,
    inspect,
    select,
)
from sqlalchemy.engine import make_url
from sqlalchemy.exc import IntegrityError

logger = logging.getLogger(__name__)

metadata = MetaData()

#: People and their roles (comma-separated subset of auth.ROLES).
users = Table(
    "users",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("username", String(80), nullable=False, unique=True),
    Column("display_name", String(200), nullable=False, default=""),
    Column("password_hash", String(255), nullable=True),
    Column("roles", String(200), nullable=False),
    Column("active", Boolean, nullable=False, default=True),
    Column("created_at", String(40), nullable=False),
)

#: API tokens; only the SHA-256 of each token is kept, the token itself is shown once.
api_tokens = Table(
    "api_tokens",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("user_id", Integer, ForeignKey("users.id"), nullable=False),
    Column("token_sha256", String(64), nullable=False, unique=True),
    Column("label", String(200), nullable=False, default=""),
    Column("created_at", String(40), nullable=False),
    Column("revoked_at", String(40), nullable=True),
)

#: Registry of stored raw files (the bytes are in the blob folder).
blobs = Table(
    "blobs",
    metadata,
    Column("sha256", String(64), primary_key=True),
    Column("size", Integer, nullable=False),
    Column("stored_at", String(40), nullable=False),
)

#: Blob contents when they live in the database (``BLOB_STORE = "database"``, the default on a
#: database server), so workers on other machines need no shared folder.
blob_data = Table(
    "blob_data",
    metadata,
    Column("sha256", String(64), primary_key=True),
    Column("data", LargeBinary, nullable=False),
)

#: An accepted upload: a validated run folder.
runs = Table(
    "runs",
    metadata,
    Column("id", String(40), primary_key=True),
    Column("kind", String(40), nullable=False),
    Column("item", String(400), nullable=False, default=""),
    Column("submitted_by", Integer, ForeignKey("users.id"), nullable=False),
    Column("submitted_at", String(40), nullable=False),
    Column("manifest_json", Text, nullable=False),
    Column("seed", Integer, nullable=False),
    Column("replaces", String(60), nullable=True),
    Column("amendment_reason", Text, nullable=True),
)

run_files = Table(
    "run_files",
    metadata,
    Column("run_id", String(40), ForeignKey("runs.id"), primary_key=True),
    Column("name", String(400), primary_key=True),
    Column("sha256", String(64), ForeignKey("blobs.sha256"), nullable=False),
    Column("size", Integer, nullable=False),
)

#: Background work: a fit that drafts a certificate, or a re-run for an audit.
jobs = Table(
    "jobs",
    metadata,
    Column("id", String(40), primary_key=True),
    Column("purpose", String(20), nullable=False),  # "certify" or "reproduce"
    Column("run_id", String(40), ForeignKey("runs.id"), nullable=False),
    Column("certificate_id", String(60), nullable=True),
    Column("requested_by", Integer, ForeignKey("users.id"), nullable=False),
    Column("status", String(20), nullable=False),  # queued, running, done, failed
    Column("fraction", Float, nullable=False, default=0.0),
    Column("step", Text, nullable=False, default=""),
    Column("error", Text, nullable=True),
    Column("attempts", Integer, nullable=False, default=0),
    Column("claimed_by", String(120), nullable=True),
    Column("heartbeat_at", String(40), nullable=True),
    Column("created_at", String(40), nullable=False),
    Column("started_at", String(40), nullable=True),
    Column("finished_at", String(40), nullable=True),
    Column("result_json", Text, nullable=True),
    # Distributed queue only: when the job's message was last handed to the broker.
    Column("dispatched_at", String(40), nullable=True),
)
Index("ix_jobs_status", jobs.c.status, jobs.c.created_at)

#: Certificates in every state. ``record_json`` is the canonical JSON of the document; once a
#: certificate is issued its authoritative, signed copy is the chain entry, and this row only
#: tracks the lifecycle state for searching.
certificates = Table(
    "certificates",
    metadata,
    Column("id", String(60), primary_key=True),
    Column("number", String(40), nullable=False),
    Column("revision", Integer, nullable=False),
    Column("run_id", String(40), ForeignKey("runs.id"), nullable=False),
    Column("kind", String(40), nullable=False),
    Column("item", String(400), nullable=False, default=""),
    Column("state", String(20), nullable=False),  # draft, issued, superseded, withdrawn
    Column("record_json", Text, nullable=False),
    Column("seed", Integer, nullable=False),
    Column("software_json", Text, nullable=False),
    # Options the analysis ran with (e.g. the short MCMC settings); reproduce uses the same.
    Column("options_json", Text, nullable=False, default="{}"),
    # Plots (SVG) of the draft, stored as a blob so renderings years later show the same figures.
    Column("plots_sha256", String(64), nullable=True),
    # Further output files of the analysis (e.g. calibration_table.csv): name -> sha256, size.
    Column("extras_json", Text, nullable=False, default="{}"),
    Column("submitted_by", Integer, ForeignKey("users.id"), nullable=False),
    Column("created_at", String(40), nullable=False),
    Column("replaces", String(60), nullable=True),
    Column("amendment_reason", Text, nullable=True),
    Column("superseded_by", String(60), nullable=True),
    Column("issued_by", Integer, ForeignKey("users.id"), nullable=True),
    Column("issued_at", String(40), nullable=True),
    Column("sequence", Integer, nullable=True, unique=True),
    Column("withdrawn_reason", Text, nullable=True),
    Column("withdrawn_at", String(40), nullable=True),
    # The job that drafted it (None for amendments). Unique: a job delivered twice by the queue
    # can never leave two drafts.
    Column("job_id", String(40), nullable=True),
)
Index("ux_certificates_job_id", certificates.c.job_id, unique=True)
Index(
    "ix_certificates_search", certificates.c.state, certificates.c.kind, certificates.c.created_at
)

#: The signed hash chain. Each entry's canonical JSON names the SHA-256 of the entry before it.
chain = Table(
    "chain",
    metadata,
    Column("sequence", Integer, primary_key=True, autoincrement=False),
    Column("entry_type", String(20), nullable=False),  # "issue" or "withdrawal"
    Column("certificate_id", String(60), nullable=False),
    Column("entry_json", Text, nullable=False),
    Column("sha256", String(64), nullable=False, unique=True),
    Column("previous_sha256", String(64), nullable=False),
    Column("signature", String(128), nullable=False),
    Column("key_id", String(64), nullable=False),
    Column("recorded_at", String(40), nullable=False),
)
Index("ix_chain_certificate", chain.c.certificate_id)

#: Who did what, when. Append-only (enforced by triggers on SQLite).
events = Table(
    "events",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("at", String(40), nullable=False),
    Column("actor", String(80), nullable=False),
    Column("action", String(60), nullable=False),
    Column("subject", String(120), nullable=False, default=""),
    Column("detail_json", Text, nullable=False, default="{}"),
)

#: The SHA-256 of every file of an issued certificate the service handed out (PDF, JSON, signed
#: entry, DCC, HTML), so that a customer can later show a file and ask whether it is authentic.
#: Append-only like chain and events (migration 0003_served_files).
served_files = Table(
    "served_files",
    metadata,
    Column("certificate_id", String(60), primary_key=True),
    Column("sha256", String(64), primary_key=True),
    Column("rendering", String(20), nullable=False),
    Column("first_served_at", String(40), nullable=False),
)

#: Named counters (certificate numbers, chain sequence lock row).
counters = Table(
    "counters",
    metadata,
    Column("name", String(60), primary_key=True),
    Column("value", Integer, nullable=False),
)

# Rows of ``chain`` and ``events`` must never change once written. On SQLite, triggers made by the
# baseline migration turn an UPDATE or DELETE into an error, so even a bug (or a careless hand in
# the database shell) cannot rewrite history silently; verify() still catches edits made with the
# triggers dropped.


def utc_now() -> str:
    """ISO 8601 UTC timestamp with microseconds, the one time format of the store."""
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


#: Temporary folders older than this are removed whoever made them (a process that runs a
#: day-long analysis keeps touching its files; common practice, no source).
SCRATCH_MAX_AGE_SECONDS = 24 * 3600
_SCRATCH_PREFIXES = ("coldcert-upload-", "coldcert-job-", "coldcert-reproduce-")
_OWNER = re.compile(r"(?P<pid>\d+)@(?P<host>[^+/]+)\+")


def _owner() -> str:
    """``PID@HOST+``: who made a temporary file, readable back by :data:`_OWNER`."""
    return f"{os.getpid()}@{socket.gethostname()}+"


def pid_alive(pid: int) -> bool:
    """Whether a process with this id exists on this host."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def clean_scratch_places(own: Path | None, older_than: float = SCRATCH_MAX_AGE_SECONDS) -> list[str]:
    """Remove what stopped processes left in ``own`` (a store's private temporary folder) and,
    by their coldcert prefixes, in the system's temporary folder. Returns the names removed."""
    removed = []
    host, now = socket.gethostname(), time.time()
    places = [p for p in (own, Path(tempfile.gettempdir())) if p is not None]
    for place in places:
        try:
            entries = list(place.iterdir())
        except OSError:
            continue
        for entry in entries:
            name = entry.name
            legacy = place != own
            if legacy and not name.startswith(_SCRATCH_PREFIXES):
                continue
            match = _OWNER.search(name)
            try:
                age = now - entry.lstat().st_mtime
            except OSError:
                continue
            dead = match is not None and match["host"] == host and not pid_alive(int(match["pid"]))
            if not (dead or age > older_than):
                continue
            try:
                if entry.is_dir() and not entry.is_symlink():
                    shutil.rmtree(entry)
                else:
                    entry.unlink()
            except OSError:
                continue
            removed.append(name)
    if removed:
        logger.warning("removed %d temporary file(s) left by stopped processes: %s",
                       len(removed), removed[:10])
    return removed


class BlobStore:
    """Content-addressed raw files under ``root``: ``root/ab/cd/abcd…`` named by SHA-256."""

    def __init__(self, root: str | os.PathLike[str], read_only: bool = False) -> None:
        self.root = Path(root)
        self.read_only = read_only
        if not read_only:
            (self.root / "tmp").mkdir(parents=True, exist_ok=True)

    def path(self, digest: str) -> Path:
        if len(digest) != 64 or any(c not in "0123456789abcdef" for c in digest):
            raise ValueError(f"not a SHA-256 hex digest: {digest!r}")
        return self.root / digest[:2] / digest[2:4] / digest

    def put(self, data: bytes) -> str:
        """Store ``data`` unchanged; return its SHA-256. Idempotent and crash-safe."""
        digest = sha256_hex(data)
        final = self.path(digest)
        if final.exists() and final.stat().st_size == len(data):
            return digest
        final.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp_name = tempfile.mkstemp(
            dir=self.root / "tmp", prefix=f"{_owner()}{digest[:12]}", suffix=".part"
        )
        try:
            with os.fdopen(fd, "wb") as handle:
                handle.write(data)
                handle.flush()
                os.fsync(handle.fileno())
            os.replace(tmp_name, final)
        except BaseException:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp_name)
            raise
        _fsync_directory(final.parent)
        return digest

    def get(self, digest: str) -> bytes:
        try:
            return self.path(digest).read_bytes()
        except FileNotFoundError:
            raise KeyError(
                f"raw file {digest} is missing from the blob folder {self.root}"
            ) from None

    def scratch(self, purpose: str) -> tempfile.TemporaryDirectory:
        """A private temporary folder for raw data being checked or analysed (removed on exit).

        It lives in the blob folder's ``tmp`` (same disk as the blobs, inside the instance) and
        its name carries this process's id and host, so that :meth:`clean_scratch` can remove
        what a killed process left behind without touching a live one's.
        """
        return tempfile.TemporaryDirectory(
            prefix=f"coldcert-{purpose}-{_owner()}", dir=self.root / "tmp"
        )

    def clean_scratch(self, older_than: float = SCRATCH_MAX_AGE_SECONDS) -> list[str]:
        """Remove temporary folders and partial blobs left by processes that are gone: those of
        this host whose process no longer exists, and any older than ``older_than`` seconds.
        Returns the names removed."""
        if self.read_only:
            return []
        return clean_scratch_places(self.root / "tmp", older_than)

    def exists(self, digest: str) -> bool:
        return self.path(digest).is_file()

    def size(self, digest: str) -> int:
        return self.path(digest).stat().st_size

    def digest_on_disk(self, digest: str) -> str | None:
        """SHA-256 of what is actually stored under ``digest`` (None if the file is missing)."""
        path = self.path(digest)
        if not path.is_file():
            return None
        hasher = hashlib.sha256()
        with path.open("rb") as handle:
            for chunk in iter(lambda: handle.read(1 << 20), b""):
                hasher.update(chunk)
        return hasher.hexdigest()


class DatabaseBlobStore:
    """The same content-addressed store as :class:`BlobStore`, kept in the ``blob_data`` table.

    For a database server shared by several machines: a worker elsewhere reads raw files and
    writes renderings through the database URL alone. Each blob is written in a transaction of
    its own (content-addressed, so a blob left behind by a rolled-back caller is harmless, as in
    the folder); a read returns exactly the stored bytes, and ``digest_on_disk`` hashes them so
    verify catches an altered row as it catches an altered file.
    """

    def __init__(self, engine: Engine) -> None:
        self.engine = engine

    def scratch(self, purpose: str) -> tempfile.TemporaryDirectory:
        """A private temporary folder in the system's temporary folder (there is no blob folder),
        named with this process's id and host so :meth:`clean_scratch` can tell it is orphaned."""
        return tempfile.TemporaryDirectory(prefix=f"coldcert-{purpose}-{_owner()}")

    def clean_scratch(self, older_than: float = SCRATCH_MAX_AGE_SECONDS) -> list[str]:
        return clean_scratch_places(None, older_than)

    @staticmethod
    def _check(digest: str) -> str:
        if len(digest) != 64 or any(c not in "0123456789abcdef" for c in digest):
            raise ValueError(f"not a SHA-256 hex digest: {digest!r}")
        return digest

    def put(self, data: bytes) -> str:
        digest = sha256_hex(data)
        with self.engine.begin() as conn:
            found = conn.execute(
                select(blob_data.c.sha256).where(blob_data.c.sha256 == digest)
            ).first()
            if found is None:
                try:
                    with conn.begin_nested():
                        conn.execute(blob_data.insert().values(sha256=digest, data=bytes(data)))
                except IntegrityError:  # the same content stored by another process meanwhile
                    pass
        return digest

    def _load(self, digest: str) -> bytes | None:
        with self.engine.connect() as conn:
            row = conn.execute(
                select(blob_data.c.data).where(blob_data.c.sha256 == self._check(digest))
            ).first()
        return None if row is None else bytes(row.data)

    def get(self, digest: str) -> bytes:
        data = self._load(digest)
        if data is None:
            raise KeyError(f"raw file {digest} is missing from the database blob table")
        return data

    def exists(self, digest: str) -> bool:
        return self._load(digest) is not None

    def size(self, digest: str) -> int:
        return len(self.get(digest))

    def digest_on_disk(self, digest: str) -> str | None:
        """SHA-256 of what is actually stored under ``digest`` (None if it is missing)."""
        data = self._load(digest)
        return None if data is None else sha256_hex(data)


def _fsync_directory(path: Path) -> None:
    # The rename is durable only once the directory entry is on disk (POSIX; a no-op elsewhere).
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


class Storage:
    """Database engine plus blob folder for one service instance."""

    def __init__(
        self,
        database_url: str,
        blob_root: str | os.PathLike[str] | None,
        blob_store: str = "auto",
        read_only: bool = False,
    ) -> None:
        """``blob_store``: "folder" (files under ``blob_root``), "database" (the ``blob_data``
        table) or "auto": the folder with SQLite, the database with a server. ``read_only``
        opens an archive copy for auditing: SQLite in read-only mode, no pragma or schema that
        writes, nothing created in the blob folder."""
        self.database_url = database_url
        self.read_only = read_only
        self.engine: Engine = _make_engine(database_url, read_only=read_only)
        if blob_store == "auto":
            blob_store = "folder" if self.is_sqlite else "database"
        if blob_store == "database" and self.is_sqlite:
            raise ValueError("BLOB_STORE 'database' needs a database server; SQLite keeps blobs in a folder")
        if blob_store == "database":
            self.blobs: BlobStore | DatabaseBlobStore = DatabaseBlobStore(self.engine)
        elif blob_store == "folder":
            if blob_root is None:
                raise ValueError("a blob folder is needed when BLOB_STORE is 'folder'")
            self.blobs = BlobStore(blob_root, read_only=read_only)
        else:
            raise ValueError(f"BLOB_STORE must be 'auto', 'folder' or 'database', not {blob_store!r}")

    @property
    def is_sqlite(self) -> bool:
        return self.engine.dialect.name == "sqlite"

    def create_schema(self) -> None:
        """Bring the database to the newest schema revision (service/migrations), on every start.

        A new database gets the baseline and every later revision. A database made before
        migrations existed has today's baseline tables but no ``alembic_version`` table; it is
        stamped at the baseline and then upgraded, so archives outlive releases.
        """
        if self.read_only:
            return  # an auditor's read-only copy is verified as it is, never migrated
        from alembic import command

        with self.engine.begin() as conn:
            config = _alembic_config(conn)
            tables = set(inspect(conn).get_table_names())
            if "alembic_version" not in tables and "certificates" in tables:
                missing = {t.name for t in metadata.sorted_tables if t.name in BASELINE_TABLES} - tables
                if missing:
                    raise RuntimeError(
                        f"{self.database_url}: an unversioned database without the tables "
                        f"{', '.join(sorted(missing))}; it was not made by coldcert"
                    )
                logger.info("database made before schema migrations: stamping the baseline")
                command.stamp(config, BASELINE_REVISION)
            command.upgrade(config, "head")

    def schema_revision(self) -> str | None:
        """The schema revision recorded in the database (None before ``create_schema``)."""
        with self.engine.connect() as conn:
            if "alembic_version" not in inspect(conn).get_table_names():
                return None
            return conn.exec_driver_sql("SELECT version_num FROM alembic_version").scalar()

    @contextlib.contextmanager
    def read(self) -> Iterator[Connection]:
        """A read transaction."""
        with self.engine.connect() as conn, conn.begin():
            yield conn

    @contextlib.contextmanager
    def write(self) -> Iterator[Connection]:
        """A write transaction, taking the write lock up front.

        On SQLite this is ``BEGIN IMMEDIATE``: a deferred transaction that reads first and writes
        later can fail with "database is locked" when another process commits in between, which
        the busy timeout does not cover. On other databases it is an ordinary transaction; code
        that must serialise (the chain) also locks a counter row.
        """
        with self.engine.connect() as conn:
            conn = conn.execution_options(coldcert_immediate=True)
            with conn.begin():
                yield conn

    def next_counter(self, conn: Connection, name: str) -> int:
        """Increment and return a named counter inside the caller's write transaction."""
        row = conn.execute(
            counters.select().where(counters.c.name == name).with_for_update()
        ).first()
        if row is None:
            conn.execute(counters.insert().values(name=name, value=1))
            return 1
        value = row.value + 1
        conn.execute(counters.update().where(counters.c.name == name).values(value=value))
        return value

    def dispose(self) -> None:
        self.engine.dispose()


#: The first revision; databases older than migrations have exactly its tables.
BASELINE_REVISION = "0001_baseline"
BASELINE_TABLES = frozenset({"users", "api_tokens", "blobs", "runs", "run_files", "jobs",
                             "certificates", "chain", "events", "counters"})


def _alembic_config(connection: Connection):
    """Alembic settings for the migrations shipped in the package, on an open connection."""
    from alembic.config import Config

    config = Config()
    config.set_main_option("script_location", str(Path(__file__).parent / "migrations"))
    config.attributes["connection"] = connection
    return config


def _make_engine(database_url: str, read_only: bool = False) -> Engine:
    if not database_url.startswith("sqlite"):
        if read_only:
            # The server refuses writes in this session; the role should lack them too.
            return create_engine(
                database_url,
                pool_pre_ping=True,
                execution_options={"postgresql_readonly": True},
            )
        return create_engine(database_url, pool_pre_ping=True)
    if read_only:
        database_url = _read_only_sqlite_url(database_url)
    else:
        _private_database_file(database_url)
    engine = create_engine(database_url, connect_args={"timeout": 60, "check_same_thread": False})

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn, _record) -> None:  # pragma: no cover - driver callback
        # Let SQLAlchemy's "begin" event issue BEGIN itself (the pysqlite driver would otherwise
        # start transactions lazily, defeating BEGIN IMMEDIATE).
        dbapi_conn.isolation_level = None
        cursor = dbapi_conn.cursor()
        if not read_only:
            # Both pragmas write to the file; a read-only copy keeps the mode it was saved in.
            cursor.execute("PRAGMA journal_mode=WAL")
            cursor.execute("PRAGMA synchronous=FULL")
        cursor.execute("PRAGMA foreign_keys=ON")
        cursor.execute("PRAGMA busy_timeout=60000")
        cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Connection) -> None:  # pragma: no cover - driver callback
        immediate = conn.get_execution_options().get("coldcert_immediate", False)
        conn.exec_driver_sql("BEGIN IMMEDIATE" if immediate else "BEGIN")

    return engine


def _read_only_sqlite_url(database_url: str) -> str:
    """The URI form of a SQLite URL opened read-only.

    With no pending write-ahead log (no ``-wal`` file, or an empty one) the file is also
    opened ``immutable``, so SQLite needs no ``-shm`` file and works on read-only media; with a
    pending log it must read the log, which needs its ``-shm`` beside it.
    """
    path = make_url(database_url).database
    if not path or path == ":memory:":
        return database_url
    wal = Path(path + "-wal")
    immutable = "&immutable=1" if not wal.exists() or wal.stat().st_size == 0 else ""
    return f"sqlite:///file:{quote(str(Path(path).resolve()))}?mode=ro{immutable}&uri=true"


def _private_database_file(database_url: str) -> None:
    """Create the SQLite file readable by the service's owner only (like the keys and blobs);
    SQLite gives its -wal and -shm files the same mode. An existing file is tightened too."""
    path = make_url(database_url).database
    if not path or path == ":memory:" or path.startswith("file:"):
        return
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        mode = os.stat(path).st_mode & 0o777
        if mode & 0o077 and os.access(path, os.W_OK) and os.stat(path).st_uid == os.geteuid():
            os.chmod(path, mode & 0o700)
        return
    except OSError:
        return  # a folder we cannot write: the engine reports it with the path
    os.close(fd)


def default_database_url(instance_path: str | os.PathLike[str]) -> str:
    return f"sqlite:///{Path(instance_path).resolve() / 'coldcert.sqlite3'}"
