"""Database schema and engines (SQLAlchemy 2 Core): SQLite or PostgreSQL.

SQLite (the embedded default) runs in WAL mode with a busy timeout and
synchronous=FULL, and every transaction starts with BEGIN IMMEDIATE so that
claims and commits serialise. PostgreSQL is selected by URL; claims there use
SELECT ... FOR UPDATE SKIP LOCKED.
"""

from sqlalchemy import (BigInteger, Column, Float, ForeignKey, Index, Integer, MetaData,
                        String, Table, Text, create_engine, event)
from sqlalchemy.engine import make_url

from orbitledger.runner import defaults
from orbitledger.runner.errors import LedgerError

metadata = MetaData()

jobs = Table(
    "jobs", metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("name", String(100), nullable=False),
    Column("spec_json", Text, nullable=False),
    Column("spec_sha256", String(64), nullable=False),
    Column("status", String(16), nullable=False),
    Column("method", String(32), nullable=False),
    Column("n_bodies", Integer, nullable=False),
    Column("dt", Float, nullable=False),
    Column("total_steps", BigInteger, nullable=False),
    Column("chunk_steps", BigInteger, nullable=False),
    Column("output_steps", BigInteger, nullable=False),
    Column("steps_done", BigInteger, nullable=False, default=0),
    Column("n_checkpoints", Integer, nullable=False, default=0),
    Column("n_samples", BigInteger, nullable=False, default=0),
    Column("energy0", Float, nullable=False),
    Column("angmom0", Text, nullable=False),
    Column("last_energy_error", Float, nullable=False, default=0.0),
    Column("max_energy_error", Float, nullable=False, default=0.0),
    Column("last_angmom_error", Float, nullable=False, default=0.0),
    Column("max_angmom_error", Float, nullable=False, default=0.0),
    Column("outcome", String(32)),
    Column("outcome_step", BigInteger),
    Column("outcome_time", Float),
    Column("outcome_bodies", String(200)),
    Column("reason", Text),
    Column("requested", String(16)),
    Column("owner", String(200)),
    Column("lease_expires", Float),
    Column("fence", BigInteger, nullable=False, default=0),
    Column("priority", Integer, nullable=False, default=0),
    Column("ensemble_id", Integer),
    Column("parent_job_id", Integer),
    Column("parent_checkpoint", Integer),
    Column("wall_seconds", Float, nullable=False, default=0.0),
    Column("rate", Float),
    Column("created_at", Float, nullable=False),
    Column("updated_at", Float, nullable=False),
    sqlite_autoincrement=True,
)
Index("ix_jobs_status", jobs.c.status)
# An ensemble's members (outcomes, `status --ensemble`, the jobs outside ensembles).
Index("ix_jobs_ensemble", jobs.c.ensemble_id)
# The claim's two orders (breadth-first and depth-first) over queued jobs, read
# from an index instead of sorting every queued row (a 100 000-member ensemble).
Index("ix_jobs_claim_breadth", jobs.c.status, jobs.c.priority.desc(), jobs.c.steps_done,
      jobs.c.id)
Index("ix_jobs_claim_depth", jobs.c.status, jobs.c.priority.desc(), jobs.c.steps_done.desc(),
      jobs.c.id)

checkpoints = Table(
    "checkpoints", metadata,
    Column("job_id", Integer, ForeignKey("jobs.id"), primary_key=True),
    Column("idx", Integer, primary_key=True),
    Column("step", BigInteger, nullable=False),
    Column("time", Float, nullable=False),
    Column("fence", BigInteger, nullable=False),
    Column("state_sha256", String(64), nullable=False),
    Column("chain_sha256", String(64), nullable=False),
    Column("samples_sha256", String(64), nullable=False),
    Column("n_samples", BigInteger, nullable=False),
    Column("energy_error", Float, nullable=False),
    Column("angmom_error", Float, nullable=False),
    Column("segment_id", Integer),
    Column("created_at", Float, nullable=False),
)

segments = Table(
    "segments", metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("job_id", Integer, ForeignKey("jobs.id"), nullable=False),
    Column("fence", BigInteger, nullable=False),
    Column("worker", String(200), nullable=False),
    Column("host", String(200), nullable=False),
    Column("pid", Integer, nullable=False),
    Column("user", String(100)),
    Column("argv", Text),
    Column("versions", Text),
    Column("platform", String(200)),
    Column("cpu", String(200)),
    Column("start_step", BigInteger, nullable=False),
    Column("end_step", BigInteger),
    Column("started_at", Float, nullable=False),
    Column("ended_at", Float),
    Column("end_reason", String(64)),
    sqlite_autoincrement=True,
)
Index("ix_segments_job", segments.c.job_id)

events = Table(
    "events", metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("job_id", Integer, ForeignKey("jobs.id"), nullable=False),
    Column("kind", String(32), nullable=False),
    Column("step", BigInteger),
    Column("time", Float),
    Column("bodies", String(200)),
    Column("detail", Text),
    Column("created_at", Float, nullable=False),
    sqlite_autoincrement=True,
)
Index("ix_events_job", events.c.job_id)


ensembles = Table(
    "ensembles", metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("name", String(100), nullable=False),
    Column("spec_json", Text, nullable=False),
    Column("spec_sha256", String(64), nullable=False),
    Column("members", Integer, nullable=False),
    Column("created_at", Float, nullable=False),
    sqlite_autoincrement=True,
)


def is_sqlite(engine):
    """True for the embedded SQLite backend."""
    return engine.dialect.name == "sqlite"


def redact(url):
    """A URL safe to print or store: the password is replaced by ***."""
    try:
        return make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - an unparsable URL is printed as a placeholder
        return "<unparsable database URL>"


def read_only_engine(url):
    """A read-only engine on an existing ledger, or None if there is none.

    SQLite: opened ``mode=ro``, which sees what writers commit while it is
    open (SQLite makes its -shm and -wal coordination files if they are
    missing; the database file is not written). On a read-only medium, where
    those files cannot be made and nobody can write, a database whose -wal
    file is gone (closed cleanly) is opened immutable.
    PostgreSQL: every transaction read-only (``default_transaction_read_only``).
    """
    import os

    parsed = make_url(url)
    if parsed.get_backend_name() == "postgresql":
        engine = create_engine(url, pool_pre_ping=True, pool_size=2, max_overflow=2,
                               connect_args={"options": "-c default_transaction_read_only=on"})
        try:
            with engine.connect() as conn:
                conn.exec_driver_sql("SELECT count(*) FROM jobs")
        except Exception:  # noqa: BLE001 - not a readable ledger
            engine.dispose()
            return None
        return engine
    if parsed.get_backend_name() != "sqlite" or not parsed.database:
        return None
    path = os.path.abspath(parsed.database)
    if not os.path.exists(path):
        return None
    writable = os.access(os.path.dirname(path), os.W_OK)
    flags = "mode=ro" if writable or os.path.exists(path + "-wal") else "immutable=1"
    engine = create_engine(f"sqlite:///file:{path}?{flags}&uri=true",
                           connect_args={"timeout": defaults.SQLITE_BUSY_MS / 1000,
                                         "check_same_thread": False})
    try:
        with engine.connect() as conn:
            conn.exec_driver_sql("SELECT count(*) FROM jobs")
    except Exception:  # noqa: BLE001 - not a readable ledger
        engine.dispose()
        return None
    return engine


def make_engine(url):
    """An engine for url, configured for the ledger's transaction discipline."""
    try:
        parsed = make_url(url)
    except Exception:  # noqa: BLE001
        raise LedgerError(f"database URL {redact(url)} could not be parsed; give "
                          "sqlite:///path or postgresql+psycopg://user@host/db.") from None
    if parsed.get_backend_name() == "sqlite":
        # A small pool: the PRAGMAs below run once per connection, not per
        # transaction. Worker processes are started fresh, never forked with
        # open connections.
        engine = create_engine(url, pool_size=2, max_overflow=4,
                               connect_args={"timeout": defaults.SQLITE_BUSY_MS / 1000,
                                             "check_same_thread": False})

        @event.listens_for(engine, "connect")
        def _on_connect(dbapi_conn, _record):
            # Let SQLAlchemy's BEGIN below be the only transaction control.
            dbapi_conn.isolation_level = None
            cur = dbapi_conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute(f"PRAGMA busy_timeout={defaults.SQLITE_BUSY_MS}")
            cur.execute("PRAGMA synchronous=FULL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.close()

        @event.listens_for(engine, "begin")
        def _on_begin(conn):
            # Take the write lock up front: claims and commits never interleave.
            conn.exec_driver_sql("BEGIN IMMEDIATE")

        return engine
    if parsed.get_backend_name() == "postgresql":
        try:
            return create_engine(url, pool_pre_ping=True, pool_size=2, max_overflow=2)
        except ModuleNotFoundError as err:
            raise LedgerError(f"database URL {redact(url)} needs the {err.name!r} driver, which "
                              "is not installed; install it with "
                              "pip install 'orbitledger[postgres]'.") from None
    raise LedgerError(f"database URL {redact(url)} names backend {parsed.get_backend_name()!r}; "
                      "use sqlite:/// or postgresql+psycopg://.")


def create_schema(engine):
    """Create the tables and indexes that do not exist (indexes added by later versions
    are created on ledgers made before them)."""
    metadata.create_all(engine)
    for table in metadata.sorted_tables:
        for index in table.indexes:
            index.create(engine, checkfirst=True)
