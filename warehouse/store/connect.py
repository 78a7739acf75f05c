"""Finding, opening, creating and upgrading a warehouse.

Where it lives: the explicit location, else $BLOCKYARD_WAREHOUSE, else ./blockyard.db. A plain
path is SQLite (WAL, foreign keys on, a busy timeout); a postgresql:// URL is a team server
reached through psycopg 3. Passwords are never shown: `Warehouse.display` hides them.

A warehouse that cannot be written here (a read-only file, folder or mount, a full disk, a
read-only server session) is opened for reading, and `Warehouse.read_only` says why: the reading
commands work as usual, an analysis says once that it is not kept, and a write is refused in one
line (docs/reliability.md).
"""
from __future__ import annotations

import os
import sqlite3
import time
from dataclasses import dataclass
from pathlib import Path

from collections.abc import Callable

from ..errors import StorageError
from .revision import SCHEMA_REVISION, SQLITE_CURRENT_FROM

TYPE_CHECKING = False  # (typing.TYPE_CHECKING without importing typing)
if TYPE_CHECKING:
    from sqlalchemy.engine import Engine

# SQLAlchemy is imported where an engine is made, not here: a SQLite warehouse is found, opened
# and its revision read with the standard library's sqlite3, so that `blockyard --help` and
# `inventory` start without it (0.2 s of imports against 25 ms for `python -c pass`)

DEFAULT_FILE = "blockyard.db"
ENV_VAR = "BLOCKYARD_WAREHOUSE"
BUSY_TIMEOUT_MS = 60_000


@dataclass
class Warehouse:
    """An open warehouse: its engine (made when first asked for) plus how to name it to a user."""

    make_engine: Callable[[], Engine]
    location: str  # what the user gave (path or URL), password hidden
    path: Path | None  # the SQLite file, or None on a server
    read_only: str | None = None  # why it is open for reading only ("its file system is mounted read-only")
    how: str | None = None  # a SQLite file opened read-only: "ro" or "immutable" (see _sqlite_engine)
    _engine: Engine | None = None

    @property
    def engine(self) -> Engine:
        if self._engine is None:
            self._engine = self.make_engine()
        return self._engine

    @property
    def dialect(self) -> str:
        return "sqlite" if self.path is not None else self.engine.dialect.name

    @property
    def is_sqlite(self) -> bool:
        return self.path is not None

    def sqlite(self) -> sqlite3.Connection:
        """A plain sqlite3 connection to a SQLite warehouse (autocommit, the engine's settings),
        for the few reads that need no SQLAlchemy; the caller closes it."""
        return _sqlite_connect(self.path, self.how)

    @property
    def display(self) -> str:
        return str(self.path) if self.path is not None else self.location

    def write(self):
        """A connection whose transactions take the write lock at BEGIN (no lock upgrades)."""
        return self.engine.connect().execution_options(blockyard_write=True)

    def close(self) -> None:
        if self._engine is not None:
            self._engine.dispose()


def resolve_location(location: str | None) -> str:
    return location or os.environ.get(ENV_VAR) or DEFAULT_FILE


def _is_url(location: str) -> bool:
    return "://" in location


def shown(location: str) -> str:
    """The location as it may be printed: a URL's password replaced by ***."""
    if not _is_url(location):
        return location
    try:
        from sqlalchemy.engine import make_url

        return make_url(location).render_as_string(hide_password=True)
    except Exception:  # a URL that does not parse: show only its scheme
        return location.split("://", 1)[0] + "://..."


def _sqlite_uri(path: Path, read_only: str) -> str:
    """`read_only` "ro" opens a file read-only, "immutable" also without the -shm file (SQLite
    documentation, URI filenames: mode=ro, immutable=1)."""
    query = "mode=ro&immutable=1" if read_only == "immutable" else "mode=ro"
    return f"{path.resolve().as_uri()}?{query}"  # as_uri escapes ? # % and spaces in the path


def _set_up(dbapi_conn) -> None:
    # The driver's own transaction handling is switched off; we emit BEGIN ourselves so that
    # writers can take the lock up front (BEGIN IMMEDIATE) and never fail on an upgrade.
    dbapi_conn.isolation_level = None
    cur = dbapi_conn.cursor()
    cur.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
    cur.execute("PRAGMA foreign_keys = ON")
    # WAL is set once, when `init` creates the file (it persists); setting it here would
    # rewrite the header of any SQLite file a command is pointed at, warehouse or not
    cur.execute("PRAGMA synchronous = NORMAL")
    cur.execute("PRAGMA temp_store = MEMORY")
    cur.execute("PRAGMA cache_size = -65536")
    cur.close()


def _sqlite_connect(path: Path, read_only: str | None = None) -> sqlite3.Connection:
    """A plain connection set up as the engine sets up its own (autocommit: no transaction open)."""
    if read_only:
        con = sqlite3.connect(_sqlite_uri(path, read_only), uri=True, check_same_thread=False)
    else:
        con = sqlite3.connect(str(path), check_same_thread=False)
    try:
        _set_up(con)
    except BaseException:
        con.close()
        raise
    return con


def _sqlite_engine(path: Path, read_only: str | None = None) -> Engine:
    """An engine on a SQLite file, read-only when `read_only` says how (see _sqlite_uri)."""
    from sqlalchemy import create_engine, event

    extra = {}
    if read_only:
        uri = _sqlite_uri(path, read_only)
        # the URL still names the file, so that SQLAlchemy pools it as a file (not as :memory:)
        extra["creator"] = lambda: sqlite3.connect(uri, uri=True, check_same_thread=False)
    engine = create_engine(f"sqlite:///{path}", future=True, **extra)

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn, _record):
        _set_up(dbapi_conn)

    @event.listens_for(engine, "begin")
    def _on_begin(conn):
        write = conn.get_execution_options().get("blockyard_write", False)
        conn.exec_driver_sql("BEGIN IMMEDIATE" if write else "BEGIN")

    return engine


def _server_engine(location: str) -> tuple[Engine, str]:
    from sqlalchemy import create_engine, event
    from sqlalchemy.engine import make_url
    from sqlalchemy.exc import ArgumentError

    try:
        url = make_url(location)
        url.port  # noqa: B018  (a port that is not a number fails here, not later)
    except (ArgumentError, ValueError):
        raise StorageError(f"warehouse URL {shown(location)} does not parse; write postgresql://user@host:port/dbname") from None
    if url.drivername in ("postgresql", "postgres", "postgresql+psycopg"):
        url = url.set(drivername="postgresql+psycopg")
    else:
        raise StorageError(
            f"warehouse URL scheme '{url.drivername}' is not supported; use a file path (SQLite) "
            "or postgresql://user@host/dbname"
        )
    # libpq's keepalives (the client notices a server gone quiet); a keepalive named in the URL wins
    given = set(url.query)
    args = {k: v for k, v in CLIENT_KEEPALIVES.items() if k not in given}
    engine = create_engine(url, future=True, pool_pre_ping=True, connect_args=args)

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn, _record):
        # the server's side: a session whose client died or went quiet ends (and drops its locks)
        with dbapi_conn.cursor() as cur:
            for name, value in SERVER_WATCH.items():
                if name == "client_connection_check_interval" and dbapi_conn.info.server_version < 140000:
                    continue  # (PostgreSQL 14 brought it)
                cur.execute("SELECT set_config(%s, %s, false)", (name, value))
        dbapi_conn.commit()

    return engine, url.render_as_string(hide_password=True)


# A load killed or cut off must not leave its server session holding the runs table's lock
# (docs/reliability.md, "A load that dies on a server"). A client killed on a live machine closes
# its socket and the server ends the session at once; these cover the rest.
# libpq connection parameters (PostgreSQL documentation, "Parameter Key Words"): probe an idle
# connection after 30 s, every 10 s, give up after 3 unanswered probes.
CLIENT_KEEPALIVES = {"keepalives": 1, "keepalives_idle": 30, "keepalives_interval": 10, "keepalives_count": 3}
# Server settings each session sets for itself (all user-settable; PostgreSQL documentation,
# "Connection Settings"): the server probes a quiet client the same way (a machine that died or
# a network cut sends no close), and checks every 5 s, while a statement runs, that the client
# is still there (PostgreSQL 14 and later).
SERVER_WATCH = {"tcp_keepalives_idle": "30", "tcp_keepalives_interval": "10", "tcp_keepalives_count": "3",
                "client_connection_check_interval": "5s"}
# A load's transaction is never idle for long: between two statements the client reads and checks
# one chunk (well under a second). A client that stops there (stopped, hung, swapped out) has the
# server end its session after this long, with its locks (idle_in_transaction_session_timeout,
# set for the load's transaction alone).
LOAD_IDLE_SECONDS = 60
LOAD_IDLE_ENV = "BLOCKYARD_LOAD_IDLE_SECONDS"  # another limit, in seconds (the tests use a short one)


# PostgreSQL advisory locks (two-key form: a class of ours, then a hash of what is locked; each
# schema is a warehouse of its own, so the schema is in every key)
RUN_IDS_LOCK_CLASS = 7205514  # for an instant, while a load takes its block of run ids (written into revision 0011's function)
CAMPAIGN_LOCK_CLASS = 7205515  # a load's campaign, until it commits: two loads of one campaign take turns
NAMES_LOCK_CLASS = 7205516  # a load adding a name, until it commits (ingest/names.Dimensions)


def hold_runs_for_load(conn, campaign: str) -> None:
    """PostgreSQL, at the start of a load's transaction: the limit on how long the transaction may
    sit idle (`LOAD_IDLE_SECONDS`), the runs table's ROW EXCLUSIVE lock (the one every writer of
    runs takes: loads of other campaigns go on side by side, a retraction and its undo wait for
    the load and the load for them), and the campaign's own lock, so that two loads of one
    campaign take turns (its run key and its new partition are the campaign's alone). The lock
    is the parent table's alone (ONLY): the load's writes lock its own campaign's partition as
    they reach it, so that making the partition's run key (store/partitions.keyed) waits for
    no load of another campaign. A load that must add a name (a solver, instance, host or
    metric new to the warehouse) also takes the names lock when it first needs it
    (ingest/names.Dimensions)."""
    try:
        idle = max(1, int(os.environ.get(LOAD_IDLE_ENV, LOAD_IDLE_SECONDS)))
    except ValueError:
        idle = LOAD_IDLE_SECONDS
    conn.exec_driver_sql(f"SET LOCAL idle_in_transaction_session_timeout = '{idle}s'")
    conn.exec_driver_sql("LOCK TABLE ONLY runs IN ROW EXCLUSIVE MODE")
    conn.exec_driver_sql(f"SELECT pg_advisory_xact_lock({CAMPAIGN_LOCK_CLASS}, hashtext(current_schema() || '/' || %s))",
                         (campaign,))


def take_run_ids(conn, n: int) -> int:
    """PostgreSQL: the first of `n` run ids no other load is given (revision 0011)."""
    return int(conn.exec_driver_sql(f"SELECT blockyard_take_run_ids({max(1, int(n))})").scalar())


def _make(location: str) -> Warehouse:
    if _is_url(location):
        engine, shown = _server_engine(location)
        return Warehouse(lambda: engine, shown, None)
    path = Path(location).expanduser()
    return Warehouse(lambda: _sqlite_engine(path), str(path), path)


def _read_revision(wh: Warehouse) -> str | None:
    if wh.is_sqlite:
        con = wh.sqlite()
        try:
            if con.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = 'alembic_version'").fetchone() is None:
                return None
            row = con.execute("SELECT version_num FROM alembic_version").fetchone()
            return row[0] if row else None
        finally:
            con.close()
    from sqlalchemy import inspect, text

    with wh.engine.connect() as conn:
        if not inspect(conn).has_table("alembic_version"):
            return None
        return conn.execute(text("SELECT version_num FROM alembic_version")).scalar()


def _errors(wh: Warehouse) -> tuple[type, type]:
    """(could not open, not a database): the driver's own on SQLite (the revision is read with
    sqlite3 there), SQLAlchemy's on a server."""
    if wh.is_sqlite:
        return sqlite3.OperationalError, sqlite3.DatabaseError
    from sqlalchemy.exc import DatabaseError, OperationalError

    return OperationalError, DatabaseError


def stored_revision(wh: Warehouse) -> str | None:
    """The alembic revision a warehouse is at, or None when it has no schema."""
    cannot_open, not_database = _errors(wh)
    try:
        return _read_revision(wh)
    except cannot_open as exc:
        raise StorageError(f"cannot open warehouse {wh.display}: {_reason(exc)}") from None
    except not_database as exc:
        raise StorageError(f"{wh.display} is not a warehouse: {_reason(exc)}") from None


def _reason(exc: Exception) -> str:
    orig = getattr(exc, "orig", None) or exc
    return str(orig).strip().splitlines()[0] if str(orig).strip() else type(orig).__name__


def open_warehouse(location: str | None = None) -> Warehouse:
    """Open an existing warehouse at the current schema, or say exactly what to do."""
    location = resolve_location(location)
    if not _is_url(location) and not Path(location).expanduser().exists():
        raise StorageError(
            f"no warehouse at {location}; create one with: blockyard init -w {shown(location)} "
            "(or run blockyard demo)"
        )
    if not _is_url(location) and Path(location).expanduser().stat().st_size == 0:
        raise StorageError(f"{location} is an empty file, not a warehouse; create one there with: blockyard init -w {location}")
    wh = _open(location)
    rev = stored_revision(wh)
    if rev is None:
        wh.close()
        raise StorageError(f"{wh.display} has no Blockyard schema; create one with: blockyard init -w {shown(location)}")
    if rev != SCHEMA_REVISION and not (wh.is_sqlite and SQLITE_CURRENT_FROM <= rev < SCHEMA_REVISION):
        wh.close()
        if rev < SCHEMA_REVISION:
            raise StorageError(
                f"warehouse {wh.display} has schema {rev}, older than this Blockyard's {SCHEMA_REVISION}; "
                f"run: blockyard upgrade -w {shown(location)} (it copies the file aside first)"
            )
        raise StorageError(
            f"warehouse {wh.display} has schema {rev}, newer than this Blockyard's {SCHEMA_REVISION}; "
            "upgrade Blockyard"
        )
    if not wh.is_sqlite:
        wh.read_only = _server_read_only(wh)
    return wh


# --- opening for reading where writing is not possible -------------------------------------------

def _open(location: str) -> Warehouse:
    """The warehouse opened to read and write where it can be written, else to read only.

    SQLite documentation, Write-Ahead Logging ("Read-Only Databases"): a reader of a WAL database
    needs the -shm file beside it; it opens read-only when the -shm and -wal files exist or can be
    made, and otherwise only as immutable, which ignores the -wal file.
    """
    if _is_url(location):
        return _make(location)
    path = Path(location).expanduser()
    why = _cannot_write(path)
    if why is None:
        wh = _make(location)
        try:
            _read_revision(wh)
            return wh
        except sqlite3.OperationalError as exc:
            wh.close()
            # a folder where the -shm file cannot be made, or a disk without room for it
            why = _cannot_write(path, after_failure=True)
            if why is None or not _could_not_open(exc):
                raise StorageError(f"cannot open warehouse {wh.display}: {_reason(exc)}") from None
        except sqlite3.DatabaseError:
            return wh  # not a warehouse: stored_revision says so
    return _open_to_read(path, why)


def _cannot_write(path: Path, after_failure: bool = False) -> str | None:
    """Why a SQLite warehouse cannot be written here, or None. Before any try, only what is sure
    (a read-only mount or file); after an open failed, also the folder and the disk."""
    try:
        fs = os.statvfs(path.parent)
    except OSError:
        return None
    if fs.f_flag & os.ST_RDONLY:
        return "its file system is mounted read-only"
    if not os.access(path, os.W_OK):
        return "its file may not be written"
    if not after_failure:
        return None
    if not os.access(path.parent, os.W_OK):
        return "its folder may not be written, so SQLite cannot make its -shm file there"
    if fs.f_bavail == 0:
        return "the disk under it is full"
    return None


def _could_not_open(exc: Exception) -> bool:
    low = _reason(exc).lower()
    return any(w in low for w in ("unable to open", "disk i/o error", "readonly", "read-only", "full"))


def _wal_frames(path: Path) -> bool:
    """True when the -wal file beside the database holds anything (an empty one is what a failed
    open leaves behind)."""
    try:
        return os.path.getsize(f"{path}-wal") > 0
    except OSError:
        return False


def _open_to_read(path: Path, why: str) -> Warehouse:
    last: Exception | None = None
    for how in ("ro", "immutable"):
        if how == "immutable" and _wal_frames(path):
            # immutable would read the file without the changes still in its -wal: wrong numbers
            raise StorageError(
                f"cannot read warehouse {path}: it is read-only here ({why}), and its {path.name}-wal file holds "
                f"changes that SQLite reads only through a {path.name}-shm file it cannot make here; open it once "
                f"where it can be written, or copy {path.name} with {path.name}-wal to a folder that can be written")
        wh = Warehouse(lambda how=how: _sqlite_engine(path, how), str(path), path, read_only=why, how=how)
        try:
            _read_revision(wh)
            return wh
        except sqlite3.OperationalError as exc:
            wh.close()
            last = exc
        except sqlite3.DatabaseError:
            return wh  # not a warehouse: stored_revision says so
    raise StorageError(f"cannot open warehouse {path}: {_reason(last)} ({why})")


def _server_read_only(wh: Warehouse) -> str | None:
    """PostgreSQL documentation, transaction_read_only: on for a session set read-only
    (default_transaction_read_only) and on a hot standby."""
    from sqlalchemy.exc import DatabaseError

    try:
        with wh.engine.connect() as conn:
            on = conn.exec_driver_sql("SHOW transaction_read_only").scalar()
    except DatabaseError:
        return None
    return "the server session is read-only" if str(on).lower() == "on" else None


def migrations_dir() -> Path:
    """The alembic folder: the package `warehouse.migrations` (the repository's `migrations/`)."""
    try:
        from .. import migrations
    except ImportError:
        migrations = None
    where = Path(migrations.__file__).parent if migrations is not None and migrations.__file__ else None
    if where is None or not (where / "env.py").exists() or not (where / "versions").is_dir():
        raise StorageError("the schema migrations are missing from this installation; reinstall Blockyard")
    return where


def _alembic_config(conn):
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(migrations_dir()))
    cfg.attributes["connection"] = conn
    return cfg


def migrate(wh: Warehouse, revision: str = "head") -> None:
    """Bring the schema to `revision` through the migrations, in one transaction."""
    from alembic import command

    with wh.write() as conn:
        if wh.is_sqlite:
            # a migration that rebuilds a table drops the old one while other tables refer to it:
            # SQLite's prescribed way is foreign keys off around the transaction (they cannot be
            # switched inside one), and the rebuild copies every id as it was
            conn.connection.dbapi_connection.execute("PRAGMA foreign_keys = OFF")  # no autobegin
        try:
            with conn.begin():
                command.upgrade(_alembic_config(conn), revision)
        finally:
            if wh.is_sqlite:
                conn.connection.dbapi_connection.execute("PRAGMA foreign_keys = ON")


PAGE_BYTES = 16384  # new SQLite warehouses; a file keeps the page size it was made with


def init_warehouse(location: str | None = None, revision: str = "head") -> Warehouse:
    """Create a new warehouse (built through the migrations). Refuses to touch an existing one."""
    location = resolve_location(location)
    if not _is_url(location):
        path = Path(location).expanduser()
        if path.exists() and path.stat().st_size > 0:
            raise StorageError(f"{location} already exists; open it with -w {location} or pick another name")
        if not path.parent.exists():
            raise StorageError(f"folder {path.parent} does not exist")
        if not os.access(path.parent, os.W_OK):  # (on a read-only mount too, even for root)
            raise StorageError(f"cannot create warehouse {location}: the folder {path.parent} may not be written "
                               "here; pick a folder that can be")
    wh = _make(location)
    if stored_revision(wh) is not None:
        wh.close()
        raise StorageError(f"{wh.display} already holds a Blockyard schema")
    if wh.path is not None:
        con = sqlite3.connect(str(wh.path))
        try:
            # 16 KiB pages: a bulk load writes a quarter as many (a third of its commit's time);
            # an analysis reads a slice's index ranges in fewer, larger pages
            con.execute(f"PRAGMA page_size = {PAGE_BYTES}")
            con.execute("PRAGMA journal_mode = WAL")  # readers never wait for a loader
        finally:
            con.close()
    from sqlalchemy.exc import OperationalError

    try:
        migrate(wh, revision)
    except OperationalError as exc:
        wh.close()
        raise StorageError(f"cannot create warehouse {wh.display}: {_reason(exc)}") from None
    return wh


def upgrade_warehouse(location: str | None = None) -> tuple[Warehouse, str | None, str | None]:
    """Upgrade to the current schema. A SQLite file is first copied aside; returns (wh, old, backup)."""
    location = resolve_location(location)
    if not _is_url(location) and not Path(location).expanduser().exists():
        raise StorageError(f"no warehouse at {location}")
    wh = _open(location)
    old = stored_revision(wh)
    if old is None:
        wh.close()
        raise StorageError(f"{wh.display} has no Blockyard schema; nothing to upgrade")
    if old == SCHEMA_REVISION:
        return wh, old, None
    if old > SCHEMA_REVISION:
        wh.close()
        raise StorageError(f"warehouse {wh.display} has schema {old}, newer than this Blockyard's {SCHEMA_REVISION}; "
                           "upgrade Blockyard instead")
    if wh.read_only is None and not wh.is_sqlite:
        wh.read_only = _server_read_only(wh)
    if wh.read_only is None and wh.path is not None and not os.access(wh.path.parent, os.W_OK):
        wh.read_only = "its folder may not be written, and the upgrade copies the file aside there first"
    if wh.read_only is not None:
        wh.close()
        raise StorageError(f"cannot upgrade warehouse {wh.display}: it is read-only here ({wh.read_only}); "
                           "nothing was changed")
    backup = None
    if wh.path is not None:
        stamp = time.strftime("%Y%m%d-%H%M%S")
        backup_path = wh.path.with_name(f"{wh.path.name}.before-{SCHEMA_REVISION}-{stamp}")
        src = sqlite3.connect(str(wh.path))
        dst = sqlite3.connect(str(backup_path))
        try:
            src.backup(dst)  # consistent copy, WAL included
        finally:
            dst.close()
            src.close()
        backup = str(backup_path)
    migrate(wh, "head")
    return wh, old, backup




def database_trouble(exc: BaseException, where: str = "", read_only: str | None = None) -> StorageError | None:
    """A database error a user can act on (disk full, read-only, locked, gone) as one plain line.
    `read_only` is why the warehouse was opened for reading only, when it was (Warehouse.read_only).

    Returns None for anything that is not a database error, so callers can re-raise it.
    """
    from sqlalchemy.exc import DBAPIError

    if not isinstance(exc, (DBAPIError, sqlite3.Error)) and type(exc).__module__.split(".")[0] != "psycopg":
        return None
    text_ = _reason(exc)
    low = text_.lower()
    if "full" in low:
        why = "the disk (or the database's size limit) is full"
    elif read_only is not None:
        why = f"it is read-only here ({read_only})"
    elif "readonly" in low or "read-only" in low or "read only" in low:
        why = "it is read-only here"
    elif "locked" in low:
        why = "another process kept it locked too long; try again"
    else:
        place = f" {where}" if where else ""
        return StorageError(f"warehouse{place}: the database refused the work ({text_}); nothing was changed")
    place = f" {where}" if where else ""
    return StorageError(f"cannot write to warehouse{place}: {why}; nothing was changed")
