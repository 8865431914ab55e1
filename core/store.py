"""The project store: the only module in Kinemark that speaks SQL.

A project is a folder holding one SQLite database (``project.kinemark.sqlite``)
plus the media it references. The database runs in WAL mode with foreign keys
on; every user edit is its own committed transaction, and its row in the
append-only event log is written in that same transaction.

Schema changes are forward migrations: ``MIGRATIONS[i]`` takes a database
from version i to version i + 1. A database newer than this code is refused.
"""
from __future__ import annotations

import json
import math
import os
import re
import sqlite3
import threading
import time
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path
from typing import Iterable

import numpy as np

from .errors import KinemarkError
from .model import (ACCEPTED, ROLES, SOURCES, STATES, Annotation, Event, Frame, Media,
                    Participant, Proposal, ReviewNote, SecondLabel, Session, User)
from .skeleton import Skeleton

DB_NAME = "project.kinemark.sqlite"

_V1 = """
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE skeletons (
    id INTEGER PRIMARY KEY,
    name TEXT NOT NULL UNIQUE,
    definition TEXT NOT NULL
);
CREATE TABLE participants (
    id INTEGER PRIMARY KEY,
    code TEXT NOT NULL UNIQUE
);
CREATE TABLE sessions (
    id INTEGER PRIMARY KEY,
    participant_id INTEGER NOT NULL REFERENCES participants(id),
    number INTEGER NOT NULL,
    UNIQUE (participant_id, number)
);
CREATE TABLE media (
    id INTEGER PRIMARY KEY,
    session_id INTEGER REFERENCES sessions(id),
    kind TEXT NOT NULL CHECK (kind IN ('video', 'image')),
    path TEXT NOT NULL,
    path_base TEXT NOT NULL CHECK (path_base IN ('project', 'media_root', 'absolute')),
    sha256 TEXT NOT NULL UNIQUE,
    fps REAL,
    frame_count INTEGER NOT NULL,
    width INTEGER NOT NULL,
    height INTEGER NOT NULL,
    status TEXT NOT NULL DEFAULT 'ok' CHECK (status IN ('ok', 'changed')),
    added_at TEXT NOT NULL
);
CREATE TABLE frames (
    id INTEGER PRIMARY KEY,
    media_id INTEGER NOT NULL REFERENCES media(id),
    frame_index INTEGER NOT NULL,
    timestamp REAL,
    pixel_sha TEXT NOT NULL,
    UNIQUE (media_id, frame_index)
);
CREATE TABLE users (
    id INTEGER PRIMARY KEY,
    name TEXT NOT NULL UNIQUE,
    role TEXT NOT NULL CHECK (role IN ('annotator', 'reviewer', 'admin'))
);
CREATE TABLE annotations (
    id INTEGER PRIMARY KEY,
    frame_id INTEGER NOT NULL REFERENCES frames(id),
    person INTEGER NOT NULL DEFAULT 0,
    skeleton_id INTEGER NOT NULL REFERENCES skeletons(id),
    keypoints TEXT NOT NULL,
    sources TEXT NOT NULL,
    state TEXT NOT NULL CHECK (state IN ('prefilled', 'drafting', 'in_review', 'accepted', 'returned')),
    version INTEGER NOT NULL DEFAULT 1,
    bbox TEXT,
    updated_by INTEGER REFERENCES users(id),
    updated_at TEXT,
    UNIQUE (frame_id, person)
);
CREATE INDEX annotations_state ON annotations(state);
CREATE TABLE proposals (
    id INTEGER PRIMARY KEY,
    frame_id INTEGER NOT NULL REFERENCES frames(id),
    person INTEGER NOT NULL DEFAULT 0,
    model_id TEXT NOT NULL,
    model_hash TEXT NOT NULL,
    keypoints TEXT NOT NULL,
    confidence TEXT NOT NULL,
    signals TEXT NOT NULL,
    score REAL NOT NULL,
    region TEXT,
    embedding BLOB,
    adapted INTEGER NOT NULL DEFAULT 0,
    created_at TEXT NOT NULL,
    UNIQUE (frame_id, person, model_hash)
);
CREATE TABLE events (
    id INTEGER PRIMARY KEY,
    at TEXT NOT NULL,
    user_id INTEGER REFERENCES users(id),
    action TEXT NOT NULL,
    entity TEXT NOT NULL,
    entity_id INTEGER,
    before TEXT,
    after TEXT
);
"""

_V1_SQLITE_TRIGGERS = """
CREATE TRIGGER events_append_only_update BEFORE UPDATE ON events
BEGIN SELECT RAISE(ABORT, 'the event log is append-only'); END;
CREATE TRIGGER events_append_only_delete BEFORE DELETE ON events
BEGIN SELECT RAISE(ABORT, 'the event log is append-only'); END;
"""

# PostgreSQL: the same rule as a PL/pgSQL trigger (one statement each; the
# function body is quoted with $$ so it is never split at its semicolons).
_V1_PG_TRIGGERS = [
    "CREATE FUNCTION events_append_only() RETURNS trigger LANGUAGE plpgsql AS "
    "$$ BEGIN RAISE EXCEPTION 'the event log is append-only'; END $$",
    "CREATE TRIGGER events_append_only BEFORE UPDATE OR DELETE ON events "
    "FOR EACH ROW EXECUTE FUNCTION events_append_only()",
]

# Version 2: the review loop and agreement labels. Reviewer notes pinned to a keypoint
# of an annotation; the frames chosen for double labelling; the second annotator's
# labels, kept apart from ``annotations`` so that the first annotator never sees them
# (and no export picks them up); an index for reading one entity's events.
_V2 = """
CREATE TABLE review_notes (
    id INTEGER PRIMARY KEY,
    annotation_id INTEGER NOT NULL REFERENCES annotations(id),
    keypoint INTEGER,
    text TEXT NOT NULL,
    author_id INTEGER REFERENCES users(id),
    created_at TEXT NOT NULL,
    addressed_at TEXT,
    addressed_by INTEGER REFERENCES users(id)
);
CREATE INDEX review_notes_annotation ON review_notes(annotation_id);
CREATE TABLE agreement_frames (
    frame_id INTEGER PRIMARY KEY REFERENCES frames(id),
    rank INTEGER NOT NULL,
    chosen_at TEXT NOT NULL
);
CREATE TABLE second_labels (
    id INTEGER PRIMARY KEY,
    frame_id INTEGER NOT NULL REFERENCES frames(id),
    person INTEGER NOT NULL DEFAULT 0,
    keypoints TEXT NOT NULL,
    labelled_by INTEGER NOT NULL REFERENCES users(id),
    version INTEGER NOT NULL DEFAULT 1,
    created_at TEXT NOT NULL,
    updated_at TEXT NOT NULL,
    UNIQUE (frame_id, person, labelled_by)
);
CREATE INDEX events_entity ON events(entity, entity_id);
"""

# Version 3: team mode. A claim is a lease on one frame for one annotator, so that no
# two people get the same frame from the queue; an expired lease returns to the pool.
_V3 = """
CREATE TABLE claims (
    frame_id INTEGER PRIMARY KEY REFERENCES frames(id),
    user_id INTEGER NOT NULL REFERENCES users(id),
    claimed_at REAL NOT NULL,
    expires_at REAL NOT NULL
);
CREATE INDEX claims_user ON claims(user_id);
"""

#: MIGRATIONS[i] upgrades a database at schema version i to version i + 1. An entry is
#: SQL that both dialects run (PostgreSQL after the type translation in _pg_ddl), or a
#: dict with one entry per dialect: {"sqlite": script, "postgresql": [statements]}.
MIGRATIONS: list = [
    {"sqlite": _V1 + _V1_SQLITE_TRIGGERS, "postgresql": _V1, "postgresql_extra": _V1_PG_TRIGGERS},
    _V2,
    _V3,
]


_UPSERT_META = ("INSERT INTO meta(key, value) VALUES (?, ?) "
                "ON CONFLICT (key) DO UPDATE SET value = excluded.value")


def schema_version() -> int:
    return len(MIGRATIONS)


def now_iso() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="milliseconds")


def _kp_json(kps: np.ndarray) -> str:
    a = np.asarray(kps, dtype=float)
    return json.dumps([[x, y, int(v)] for x, y, v in a.tolist()])


def _kp_load(text: str) -> np.ndarray:
    arr = np.array(json.loads(text), dtype=float)
    return arr.reshape(-1, 3)


def _arr_list(a) -> list:
    """Floats for JSON; NaN and infinities (not valid JSON) become null."""
    return [x if math.isfinite(x) else None for x in np.asarray(a, float).ravel().tolist()]


def _arr_json(a) -> str:
    return json.dumps(_arr_list(a))


def _arr_load(text: str) -> np.ndarray:
    return np.array([np.nan if x is None else x for x in json.loads(text)], dtype=float)


def _pg_ddl(script: str) -> str:
    """Portable DDL in SQLite's spelling -> PostgreSQL's (ids, floats, blobs)."""
    script = re.sub(r"\bid INTEGER PRIMARY KEY\b", "id INTEGER GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY",
                    script)
    script = re.sub(r"\bREAL\b", "DOUBLE PRECISION", script)
    return re.sub(r"\bBLOB\b", "BYTEA", script)


try:   # PostgreSQL is optional: team mode only
    import psycopg
    _INTEGRITY = (sqlite3.IntegrityError, psycopg.errors.IntegrityError)
    _DBERROR = (sqlite3.DatabaseError, psycopg.Error)
except ImportError:   # pragma: no cover - depends on the installation
    psycopg = None
    _INTEGRITY = (sqlite3.IntegrityError,)
    _DBERROR = (sqlite3.DatabaseError,)


class _PgConnection:
    """psycopg 3 behind the small part of sqlite3's interface the store uses.

    SQL is written once with ``?`` placeholders; here they become ``%s``.
    """

    dialect = "postgresql"

    def __init__(self, conn):
        self.raw = conn

    @staticmethod
    def _sql(sql: str) -> str:
        return sql.replace("%", "%%").replace("?", "%s")

    def execute(self, sql, args=()):
        return self.raw.execute(self._sql(sql), tuple(args))

    def executemany(self, sql, rows):
        with self.raw.cursor() as cur:
            cur.executemany(self._sql(sql), list(rows))
            return cur

    def close(self):
        self.raw.close()


# SQLite errors that come from the file or the machine, never from Kinemark's own statements:
# said to the person as what to do (KinemarkError), not as an internal error
_SQLITE_TROUBLE = (
    ("attempt to write a readonly database",
     "the project database {path} is read-only here: check the permissions of the file and its folder "
     "(the change was not saved)"),
    ("database disk image is malformed",
     "the project database {path} is damaged (SQLite: database disk image is malformed): restore it from "
     "a backup; Kinemark wrote nothing"),
    ("file is not a database", "{path} is not a Kinemark project database (SQLite: file is not a database)"),
    ("database or disk is full",
     "the disk holding the project {path} is full: free some space (the change was not saved)"),
    ("disk I/O error", "the disk holding the project database {path} reported an error (the change was "
                       "not saved): check the disk, then restore from a backup if the project will not open"),
)


def _sqlite_trouble(e: Exception, path) -> KinemarkError | None:
    text = str(e)
    for key, words in _SQLITE_TROUBLE:
        if key in text:
            return KinemarkError(words.format(path=path))
    return None


def _folder_writable(folder: Path) -> bool:
    """Whether files can be made in ``folder`` (SQLite's journal lives beside the database).
    A read-only mount says so even to root, for whom permission bits say nothing."""
    if not os.access(folder, os.W_OK):
        return False
    try:
        return not bool(os.statvfs(folder).f_flag & os.ST_RDONLY)
    except (OSError, AttributeError):
        return True


class _SqliteConnection:
    dialect = "sqlite"

    def __init__(self, conn, path=None):
        self.raw = conn
        self.path = path

    def _run(self, method, sql, args):
        try:
            return method(sql, args)
        except sqlite3.DatabaseError as e:
            said = _sqlite_trouble(e, self.path)
            if said is None:
                raise
            raise said from None

    def execute(self, sql, args=()):
        return self._run(self.raw.execute, sql, args)

    def executemany(self, sql, rows):
        return self._run(self.raw.executemany, sql, rows)

    def close(self):
        self.raw.close()


def _pg_schema_name(name: str) -> str:
    if not re.fullmatch(r"[a-z][a-z0-9_]{0,62}", name or ""):
        raise KinemarkError(f"the team database schema name {name!r} must be lower-case letters, digits "
                            "and _ , starting with a letter")
    return name


def drop_postgres_project(dsn: str, schema: str) -> bool:
    """Remove a team project's schema (and every table in it) from the server.

    For throwaway projects (benchmarks, tests): a real study's schema is never dropped by
    Kinemark itself. Returns False when the server cannot be reached; the name is checked as
    for :meth:`Store.postgres`, so nothing but a project schema name reaches the statement.
    """
    if psycopg is None:
        return False
    schema = _pg_schema_name(schema)
    try:
        with psycopg.connect(dsn, autocommit=True, connect_timeout=10) as c:
            c.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
    except psycopg.Error:
        return False
    return True


def check_dsn_has_no_password(dsn: str):
    """A connection string that is stored in the project folder must carry no password."""
    if psycopg is None:
        raise KinemarkError("team mode needs psycopg (pip install 'psycopg[binary]')")
    try:
        params = psycopg.conninfo.conninfo_to_dict(dsn)
    except psycopg.ProgrammingError as e:
        raise KinemarkError(f"not a PostgreSQL connection string: {e}") from None
    if params.get("password"):
        raise KinemarkError("the connection string holds a password; it would be stored in the project "
                            "folder in clear. Remove it and give the password in the PGPASSWORD "
                            "environment variable or the standard PostgreSQL password file (~/.pgpass)")


class Store:
    """One open project database. Not shared between threads: open one per thread.

    SQLite (a file in the project folder) by default; PostgreSQL in team mode
    (:meth:`postgres`), same schema, same migrations, same methods.
    """

    def __init__(self, path: str | Path | None, *, create: bool = False, _pg=None):
        self._lock = threading.RLock()
        self._depth = 0
        self._skeleton_cache = None
        self.read_only = False          # True: opened from a read-only folder, to look at only
        if _pg is not None:
            self.path = Path(f"postgresql:{_pg[1]}")
            self._db = _PgConnection(_pg[0])
            self.dialect = "postgresql"
            self.migrate()
            return
        self.path = Path(path)
        self.dialect = "sqlite"
        if not create and not self.path.exists():
            raise KinemarkError(f"no Kinemark project database at {self.path}")
        if create and not self.path.exists():
            # made private before SQLite writes a byte (and its -wal/-shm files take this mode)
            os.close(os.open(str(self.path), os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))
        if not create and not _folder_writable(self.path.parent):
            self._open_read_only()
            return
        try:
            raw = sqlite3.connect(str(self.path), isolation_level=None, check_same_thread=False,
                                  timeout=30.0)
            self._db = _SqliteConnection(raw, self.path)
            if not create and self.version() == 0:
                # an empty file, or another program's SQLite database: look, never write (the
                # journal mode below and the migrations would change it)
                raw.close()
                raise KinemarkError(f"{self.path} is not a Kinemark project database (it is empty or "
                                    "belongs to another program); nothing was changed. If a project's "
                                    "creation was interrupted, remove the file and create the project again")
            self._db.execute("PRAGMA journal_mode=WAL")
            self._db.execute("PRAGMA foreign_keys=ON")
            self._db.execute("PRAGMA synchronous=NORMAL")
            self._db.execute("PRAGMA busy_timeout=30000")
            # without this, INSERT OR REPLACE on events would delete a row without firing the
            # append-only trigger (SQLite fires delete triggers on REPLACE only recursively)
            self._db.execute("PRAGMA recursive_triggers=ON")
        except sqlite3.DatabaseError as e:
            raise KinemarkError(f"cannot open project database {self.path}: {e}") from None
        if create:
            try:
                os.chmod(self.path, 0o600)
            except OSError:
                pass
        self.migrate()

    def _open_read_only(self):
        """A project on a folder nobody may write to (an archive, read-only media): opened to
        look at, never to change. SQLite cannot keep its journal there, so the file is read
        as it is (immutable); a change is refused with a one-line error (_SQLITE_TROUBLE)."""
        wal = Path(str(self.path) + "-wal")
        if wal.exists() and wal.stat().st_size > 0:
            raise KinemarkError(f"the project in the read-only folder {self.path.parent} was not closed "
                                "cleanly (its journal still holds changes), so it cannot be read there as it "
                                "is: copy the project to a folder you may write to and open it there")
        try:
            raw = sqlite3.connect(f"{self.path.resolve().as_uri()}?mode=ro&immutable=1", uri=True,
                                  isolation_level=None, check_same_thread=False)
        except sqlite3.DatabaseError as e:
            raise KinemarkError(f"cannot open project database {self.path}: {e}") from None
        self._db = _SqliteConnection(raw, self.path)
        self.read_only = True
        v = self.version()
        if v == 0:
            raw.close()
            raise KinemarkError(f"{self.path} is not a Kinemark project database (it is empty or belongs to "
                                "another program)")
        if v != len(MIGRATIONS):
            raw.close()
            raise KinemarkError(f"the project in the read-only folder {self.path.parent} needs its database "
                                f"brought up to date (schema {v}, this Kinemark writes {len(MIGRATIONS)}): copy "
                                "it to a folder you may write to and open it there")
        self._db.execute("PRAGMA foreign_keys=ON")

    @classmethod
    def postgres(cls, dsn: str, schema: str, *, create: bool = False) -> "Store":
        """Open (or with ``create``, set up) a team project: one schema on a PostgreSQL server.

        The password, if the server wants one, comes from PGPASSWORD or ~/.pgpass (libpq's rules).
        """
        if psycopg is None:
            raise KinemarkError("team mode needs psycopg (pip install 'psycopg[binary]')")
        schema = _pg_schema_name(schema)
        try:
            conn = psycopg.connect(dsn, autocommit=True, connect_timeout=10)
        except psycopg.Error as e:
            raise KinemarkError(f"cannot reach the team database: {str(e).strip().splitlines()[0]}") from None
        exists = conn.execute("SELECT 1 FROM information_schema.schemata WHERE schema_name = %s",
                              (schema,)).fetchone()
        if not exists:
            if not create:
                conn.close()
                raise KinemarkError(f"the team database has no project schema {schema!r}")
            conn.execute(f'CREATE SCHEMA "{schema}"')
        elif create:
            has = conn.execute("SELECT 1 FROM information_schema.tables WHERE table_schema = %s AND "
                               "table_name = 'meta'", (schema,)).fetchone()
            if has:
                conn.close()
                raise KinemarkError(f"the team database already holds a project in schema {schema!r}")
        conn.execute(f'SET search_path TO "{schema}"')
        return cls(None, _pg=(conn, schema))

    def _insert(self, db, sql: str, args=()) -> int:
        """Run an INSERT and return the new row's id (RETURNING works on both dialects)."""
        return db.execute(sql + " RETURNING id", args).fetchone()[0]

    # ---- transactions and schema -------------------------------------------------

    def close(self):
        self._db.close()

    @contextmanager
    def tx(self):
        """One committed transaction (nested calls join the outer one)."""
        with self._lock:
            if self._depth:
                self._depth += 1
                try:
                    yield self._db
                finally:
                    self._depth -= 1
                return
            self._db.execute("BEGIN IMMEDIATE" if self.dialect == "sqlite" else "BEGIN")
            self._depth = 1
            try:
                yield self._db
            except BaseException:
                self._db.execute("ROLLBACK")
                raise
            else:
                self._db.execute("COMMIT")
            finally:
                self._depth = 0

    def version(self) -> int:
        if self.dialect == "postgresql":
            has = self._db.execute("SELECT 1 FROM information_schema.tables WHERE table_schema = "
                                   "current_schema() AND table_name = 'meta'").fetchone()
            if not has:
                return 0
        try:
            row = self._db.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()
        except sqlite3.OperationalError as e:
            if "no such table" not in str(e):      # e.g. the file cannot be read: not "version 0"
                raise KinemarkError(f"cannot read the project database {self.path}: {e}") from None
            return 0
        except _DBERROR as e:
            raise KinemarkError(f"{self.path} is not a Kinemark project database ({e})") from None
        return int(row[0]) if row else 0

    def _migration_statements(self, m) -> list[str]:
        if isinstance(m, dict):
            if self.dialect == "sqlite":
                return _split_sql(m["sqlite"])
            return _split_sql(_pg_ddl(m["postgresql"])) + list(m.get("postgresql_extra", []))
        return _split_sql(m) if self.dialect == "sqlite" else _split_sql(_pg_ddl(m))

    def migrate(self, migrations: list[str] | None = None) -> int:
        """Bring the schema forward. Returns the number of migrations applied."""
        migrations = MIGRATIONS if migrations is None else migrations
        current = self.version()
        if current > len(migrations):
            raise KinemarkError(
                f"this project was written by a newer Kinemark (schema {current}; "
                f"this version understands up to {len(migrations)}): upgrade Kinemark")
        applied = 0
        for v in range(current, len(migrations)):
            with self.tx() as db:
                if self.dialect == "postgresql":
                    # one migrating client at a time; the others wait, then find nothing to do
                    db.execute("SELECT pg_advisory_xact_lock(7345001)")
                    if self.version() > v:
                        continue
                for stmt in self._migration_statements(migrations[v]):
                    db.execute(stmt)
                db.execute(_UPSERT_META, ("schema_version", str(v + 1)))
                db.execute("INSERT INTO events(at, user_id, action, entity, entity_id, before, after)"
                           " VALUES (?, NULL, 'migrate', 'schema', NULL, ?, ?)",
                           (now_iso(), json.dumps({"version": v}), json.dumps({"version": v + 1})))
            applied += 1
        return applied

    def integrity_check(self) -> str:
        """SQLite's own page-level check; PostgreSQL checks its pages itself (here: 'ok' if reachable)."""
        if self.dialect == "postgresql":
            self._db.execute("SELECT 1").fetchone()
            return "ok"
        return self._db.execute("PRAGMA integrity_check").fetchone()[0]

    # ---- meta ---------------------------------------------------------------------

    def get_meta(self, key: str, default: str | None = None) -> str | None:
        row = self._db.execute("SELECT value FROM meta WHERE key=?", (key,)).fetchone()
        return row[0] if row else default

    def set_meta(self, key: str, value: str, *, user_id: int | None = None):
        with self.tx() as db:
            before = self.get_meta(key)
            db.execute(_UPSERT_META, (key, value))
            self._event(db, user_id, "set", "meta", None, {key: before}, {key: value})

    # ---- event log ----------------------------------------------------------------

    @staticmethod
    def _event(db, user_id, action, entity, entity_id, before, after):
        db.execute(
            "INSERT INTO events(at, user_id, action, entity, entity_id, before, after)"
            " VALUES (?, ?, ?, ?, ?, ?, ?)",
            (now_iso(), user_id, action, entity, entity_id,
             None if before is None else json.dumps(before, sort_keys=True),
             None if after is None else json.dumps(after, sort_keys=True)))

    def events(self, *, entity: str | None = None, entity_id: int | None = None,
               limit: int | None = None) -> list[Event]:
        q, args = "SELECT id, at, user_id, action, entity, entity_id, before, after FROM events", []
        conds = []
        if entity is not None:
            conds.append("entity=?"); args.append(entity)
        if entity_id is not None:
            conds.append("entity_id=?"); args.append(entity_id)
        if conds:
            q += " WHERE " + " AND ".join(conds)
        q += " ORDER BY id"
        if limit is not None:
            q += " LIMIT ?"; args.append(int(limit))
        return [Event(*r) for r in self._db.execute(q, args)]

    # ---- skeletons ----------------------------------------------------------------

    def add_skeleton(self, skeleton: Skeleton, *, user_id: int | None = None) -> int:
        with self.tx() as db:
            new = self._insert(db, "INSERT INTO skeletons(name, definition) VALUES (?, ?)",
                               (skeleton.name, skeleton.to_json()))
            self._event(db, user_id, "add", "skeleton", new, None, skeleton.to_dict())
            return new

    def skeleton(self, skeleton_id: int | None = None) -> tuple[int, Skeleton]:
        """The project's skeleton (the first one, unless an id is given).

        The project's skeleton never changes once written (only added), so it is read once:
        every save checks against it, and a drag saves often."""
        if skeleton_id is None:
            if self._skeleton_cache is not None:
                return self._skeleton_cache
            row = self._db.execute("SELECT id, definition FROM skeletons ORDER BY id LIMIT 1").fetchone()
            if row is not None:
                self._skeleton_cache = (row[0], Skeleton.from_dict(json.loads(row[1]), source="project skeleton"))
                return self._skeleton_cache
        else:
            row = self._db.execute("SELECT id, definition FROM skeletons WHERE id=?",
                                   (skeleton_id,)).fetchone()
        if row is None:
            raise KinemarkError("the project has no skeleton")
        return row[0], Skeleton.from_dict(json.loads(row[1]), source="project skeleton")

    # ---- users --------------------------------------------------------------------

    def add_user(self, name: str, role: str, *, by: int | None = None) -> User:
        if role not in ROLES:
            raise KinemarkError(f"unknown role {role!r}; roles are {', '.join(ROLES)}")
        if not name or not name.strip():
            raise KinemarkError("a user needs a name")
        with self.tx() as db:
            try:
                new = self._insert(db, "INSERT INTO users(name, role) VALUES (?, ?)", (name.strip(), role))
            except _INTEGRITY:
                raise KinemarkError(f"there is already a user called {name!r}") from None
            self._event(db, by, "add", "user", new, None, {"name": name, "role": role})
            return User(new, name.strip(), role)

    def user(self, name_or_id) -> User:
        if isinstance(name_or_id, int):
            row = self._db.execute("SELECT id, name, role FROM users WHERE id=?", (name_or_id,)).fetchone()
        else:
            row = self._db.execute("SELECT id, name, role FROM users WHERE name=?", (name_or_id,)).fetchone()
        if row is None:
            raise KinemarkError(f"no user {name_or_id!r} in this project")
        return User(*row)

    def users(self) -> list[User]:
        return [User(*r) for r in self._db.execute("SELECT id, name, role FROM users ORDER BY id")]

    # ---- participants, sessions ---------------------------------------------------

    def participant(self, code: str, *, create: bool = False, user_id: int | None = None) -> Participant:
        row = self._db.execute("SELECT id, code FROM participants WHERE code=?", (code,)).fetchone()
        if row:
            return Participant(*row)
        if not create:
            raise KinemarkError(f"no participant {code!r}")
        with self.tx() as db:
            new = self._insert(db, "INSERT INTO participants(code) VALUES (?)", (code,))
            self._event(db, user_id, "add", "participant", new, None, {"code": code})
            return Participant(new, code)

    def participants(self) -> list[Participant]:
        return [Participant(*r) for r in self._db.execute("SELECT id, code FROM participants ORDER BY code")]

    def session(self, participant_id: int, number: int, *, create: bool = False,
                user_id: int | None = None) -> Session:
        row = self._db.execute("SELECT id, participant_id, number FROM sessions"
                               " WHERE participant_id=? AND number=?", (participant_id, number)).fetchone()
        if row:
            return Session(*row)
        if not create:
            raise KinemarkError(f"no session {number} for that participant")
        with self.tx() as db:
            new = self._insert(db, "INSERT INTO sessions(participant_id, number) VALUES (?, ?)",
                               (participant_id, number))
            self._event(db, user_id, "add", "session", new, None,
                        {"participant_id": participant_id, "number": number})
            return Session(new, participant_id, number)

    # ---- media and frames ---------------------------------------------------------

    _MEDIA_SELECT = (
        "SELECT m.id, m.session_id, m.kind, m.path, m.path_base, m.sha256, m.fps, m.frame_count,"
        " m.width, m.height, m.status, p.code, s.number FROM media m"
        " LEFT JOIN sessions s ON s.id = m.session_id"
        " LEFT JOIN participants p ON p.id = s.participant_id")

    def add_media(self, *, session_id: int | None, kind: str, path: str, path_base: str,
                  sha256: str, fps: float | None, frame_count: int, width: int, height: int,
                  frames: Iterable[tuple[int, float | None, str]], user_id: int | None = None
                  ) -> tuple[Media, list[int]]:
        """Insert a media record and its sampled frames (index, timestamp, pixel sha) in one transaction."""
        with self.tx() as db:
            other = self.media_by_sha(sha256)
            if other is not None:
                raise KinemarkError(f"this file is already in the project as {other.path!r} "
                                    f"(same sha256)", where=path)
            try:
                mid = self._insert(
                    db, "INSERT INTO media(session_id, kind, path, path_base, sha256, fps, frame_count,"
                    " width, height, status, added_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, 'ok', ?)",
                    (session_id, kind, path, path_base, sha256, fps, frame_count, width, height, now_iso()))
            except _INTEGRITY:
                raise KinemarkError("this file is already in the project (same sha256)", where=path) from None
            frame_ids = []
            for idx, ts, sha in frames:
                frame_ids.append(self._insert(db, "INSERT INTO frames(media_id, frame_index, timestamp,"
                                              " pixel_sha) VALUES (?, ?, ?, ?)", (mid, int(idx), ts, sha)))
            self._event(db, user_id, "add", "media", mid, None,
                        {"path": path, "kind": kind, "sha256": sha256, "frames": len(frame_ids)})
        return self.media(mid), frame_ids

    def media(self, media_id: int) -> Media:
        row = self._db.execute(self._MEDIA_SELECT + " WHERE m.id=?", (media_id,)).fetchone()
        if row is None:
            raise KinemarkError(f"no media {media_id}")
        return Media(*row)

    def media_by_sha(self, sha256: str) -> Media | None:
        row = self._db.execute(self._MEDIA_SELECT + " WHERE m.sha256=?", (sha256,)).fetchone()
        return Media(*row) if row else None

    def all_media(self) -> list[Media]:
        return [Media(*r) for r in self._db.execute(self._MEDIA_SELECT + " ORDER BY m.id")]

    def set_media_status(self, media_id: int, status: str, *, sha256: str | None = None,
                         path: str | None = None, path_base: str | None = None,
                         user_id: int | None = None):
        with self.tx() as db:
            before = self.media(media_id)
            db.execute("UPDATE media SET status=?, sha256=COALESCE(?, sha256), path=COALESCE(?, path),"
                       " path_base=COALESCE(?, path_base) WHERE id=?",
                       (status, sha256, path, path_base, media_id))
            self._event(db, user_id, "status", "media", media_id,
                        {"status": before.status, "sha256": before.sha256, "path": before.path},
                        {"status": status, "sha256": sha256 or before.sha256, "path": path or before.path})

    def update_frame_checksums(self, media_id: int, shas: dict[int, str], *, user_id=None):
        with self.tx() as db:
            for idx, sha in shas.items():
                db.execute("UPDATE frames SET pixel_sha=? WHERE media_id=? AND frame_index=?",
                           (sha, media_id, idx))
            self._event(db, user_id, "relink", "media", media_id, None, {"frames": len(shas)})

    def frames(self, media_id: int | None = None) -> list[Frame]:
        if media_id is None:
            rows = self._db.execute("SELECT id, media_id, frame_index, timestamp, pixel_sha FROM frames"
                                    " ORDER BY media_id, frame_index")
        else:
            rows = self._db.execute("SELECT id, media_id, frame_index, timestamp, pixel_sha FROM frames"
                                    " WHERE media_id=? ORDER BY frame_index", (media_id,))
        return [Frame(*r) for r in rows]

    def frame(self, frame_id: int) -> Frame:
        row = self._db.execute("SELECT id, media_id, frame_index, timestamp, pixel_sha FROM frames"
                               " WHERE id=?", (frame_id,)).fetchone()
        if row is None:
            raise KinemarkError(f"no frame {frame_id}")
        return Frame(*row)

    def frame_count(self) -> int:
        return self._db.execute("SELECT COUNT(*) FROM frames").fetchone()[0]

    # ---- annotations --------------------------------------------------------------

    _ANN_SELECT = ("SELECT id, frame_id, person, keypoints, sources, state, version, bbox,"
                   " updated_by, updated_at FROM annotations")

    @staticmethod
    def _ann(row) -> Annotation:
        bbox = json.loads(row[7]) if row[7] else None
        return Annotation(id=row[0], frame_id=row[1], person=row[2], keypoints=_kp_load(row[3]),
                          sources=tuple(json.loads(row[4])), state=row[5], version=row[6],
                          bbox=tuple(bbox) if bbox else None, updated_by=row[8], updated_at=row[9])

    @staticmethod
    def _ann_dict(a: Annotation | None):
        if a is None:
            return None
        return {"keypoints": np.asarray(a.keypoints).tolist(), "sources": list(a.sources),
                "state": a.state, "version": a.version, "bbox": list(a.bbox) if a.bbox else None}

    def annotation(self, frame_id: int, person: int = 0) -> Annotation | None:
        row = self._db.execute(self._ANN_SELECT + " WHERE frame_id=? AND person=?",
                               (frame_id, person)).fetchone()
        return self._ann(row) if row else None

    def annotation_by_id(self, annotation_id: int) -> Annotation:
        row = self._db.execute(self._ANN_SELECT + " WHERE id=?", (annotation_id,)).fetchone()
        if row is None:
            raise KinemarkError(f"no annotation {annotation_id}")
        return self._ann(row)

    def annotations(self, states: Iterable[str] | None = None) -> list[Annotation]:
        if states is None:
            rows = self._db.execute(self._ANN_SELECT + " ORDER BY frame_id, person")
        else:
            states = list(states)
            q = self._ANN_SELECT + f" WHERE state IN ({','.join('?' * len(states))}) ORDER BY frame_id, person"
            rows = self._db.execute(q, states)
        return [self._ann(r) for r in rows]

    def save_annotation(self, frame_id: int, keypoints: np.ndarray, sources: Iterable[str], *,
                        state: str, person: int = 0, bbox=None, user_id: int | None = None,
                        expected_version: int | None = None, action: str = "edit") -> Annotation:
        """Create or replace one person's keypoints on one frame, as one transaction.

        ``expected_version``: the version the caller last saw; if the stored one
        differs, the save is refused (optimistic concurrency), naming who changed it.
        """
        skel_id, skel = self.skeleton()
        kps = np.asarray(keypoints, dtype=float)
        sources = tuple(sources)
        if kps.shape != (skel.num_keypoints, 3):
            raise KinemarkError(f"expected {skel.num_keypoints} keypoints (x, y, v), got shape {kps.shape}")
        if len(sources) != skel.num_keypoints or any(s not in SOURCES for s in sources):
            raise KinemarkError(f"one source per keypoint, each one of {', '.join(SOURCES)}")
        if state not in STATES:
            raise KinemarkError(f"unknown state {state!r}")
        if not np.all(np.isin(kps[:, 2], (0, 1, 2))):
            raise KinemarkError("visibility must be 0, 1 or 2 (COCO)")
        if not np.all(np.isfinite(kps[:, :2])):
            raise KinemarkError("keypoint coordinates must be finite numbers")
        kps = kps.copy()
        kps[kps[:, 2] == 0, :2] = 0.0  # COCO stores unlabelled points as (0, 0, 0)
        with self.tx() as db:
            self.frame(frame_id)            # a clear error for a frame that does not exist
            before = self.annotation(frame_id, person)
            if expected_version is not None:
                have = before.version if before else 0
                if have != expected_version:
                    who = self.user(before.updated_by).name if before and before.updated_by else "someone"
                    raise KinemarkError(
                        f"this frame was changed by {who} at {before.updated_at if before else '?'} "
                        f"(version {have}, you had {expected_version}); reload it before saving")
            at = now_iso()
            bbox_text = json.dumps([float(b) for b in bbox]) if bbox is not None else None
            if before is None:
                try:
                    ann_id = self._insert(
                        db, "INSERT INTO annotations(frame_id, person, skeleton_id, keypoints, sources, state,"
                        " version, bbox, updated_by, updated_at) VALUES (?, ?, ?, ?, ?, ?, 1, ?, ?, ?)",
                        (frame_id, person, skel_id, _kp_json(kps), json.dumps(list(sources)), state,
                         bbox_text, user_id, at))
                except _INTEGRITY:
                    raise KinemarkError("someone else saved this frame at the same moment; reload it "
                                        "before saving") from None
            else:
                ann_id = before.id
                # compare-and-set on the version read above: a concurrent writer in between
                # (possible on PostgreSQL) makes this touch no row, and nothing is overwritten
                cur = db.execute("UPDATE annotations SET keypoints=?, sources=?, state=?, version=version+1,"
                                 " bbox=?, updated_by=?, updated_at=? WHERE id=? AND version=?",
                                 (_kp_json(kps), json.dumps(list(sources)), state, bbox_text, user_id, at,
                                  ann_id, before.version))
                if cur.rowcount != 1:
                    self._conflict(ann_id, before.version)
            after = self.annotation_by_id(ann_id)
            self._event(db, user_id, action, "annotation", ann_id, self._ann_dict(before), self._ann_dict(after))
        return after

    def _conflict(self, annotation_id: int, had: int):
        row = self._db.execute(self._ANN_SELECT + " WHERE id=?", (annotation_id,)).fetchone()
        if row is None:
            raise KinemarkError(f"this frame's labels were removed by someone since (you had version "
                                f"{had}); reload it before saving")
        now = self._ann(row)
        who = self.user(now.updated_by).name if now.updated_by else "someone"
        raise KinemarkError(f"this frame was changed by {who} at {now.updated_at} (version {now.version}, "
                            f"you had {had}); reload it before saving")

    def set_state(self, annotation_id: int, state: str, *, user_id: int | None = None,
                  note: str | None = None) -> Annotation:
        """Set the state without the review rules (imports, tests, tools); see review.py for those."""
        return self.transition_state(annotation_id, state, user_id=user_id, note=note)

    def state_counts(self) -> dict[str, int]:
        counts = {s: 0 for s in STATES}
        for state, n in self._db.execute("SELECT state, COUNT(*) FROM annotations GROUP BY state"):
            counts[state] = n
        labelled = self._db.execute("SELECT COUNT(DISTINCT frame_id) FROM annotations").fetchone()[0]
        counts["blank"] = self.frame_count() - labelled
        return counts

    def frame_counts_by_media(self) -> dict[int, int]:
        """media id -> how many of its frames the project keeps (media with none are left out)."""
        return dict(self._db.execute("SELECT media_id, COUNT(*) FROM frames GROUP BY media_id").fetchall())

    def counts_by_participant(self) -> list[tuple[str, int, int, int]]:
        """(participant code or '-', media, frames, accepted annotations) per participant."""
        q = """
        SELECT COALESCE(p.code, '-'), COUNT(DISTINCT m.id), COUNT(DISTINCT f.id),
               COUNT(DISTINCT CASE WHEN a.state = ? THEN a.id END)
        FROM media m
        LEFT JOIN sessions s ON s.id = m.session_id
        LEFT JOIN participants p ON p.id = s.participant_id
        LEFT JOIN frames f ON f.media_id = m.id
        LEFT JOIN annotations a ON a.frame_id = f.id
        GROUP BY COALESCE(p.code, '-') ORDER BY 1"""
        return [tuple(r) for r in self._db.execute(q, (ACCEPTED,))]

    def export_rows(self, states: Iterable[str]) -> list[tuple]:
        """Everything an export needs in one query: annotation x frame x media x participant.

        Returns tuples (annotation_id, frame_id, person, keypoints_json, bbox_json, state,
        media_id, frame_index, width, height, participant_code, media_path, timestamp).
        """
        states = list(states)
        q = f"""
        SELECT a.id, a.frame_id, a.person, a.keypoints, a.bbox, a.state,
               m.id, f.frame_index, m.width, m.height, p.code, m.path, f.timestamp
        FROM annotations a
        JOIN frames f ON f.id = a.frame_id
        JOIN media m ON m.id = f.media_id
        LEFT JOIN sessions s ON s.id = m.session_id
        LEFT JOIN participants p ON p.id = s.participant_id
        WHERE a.state IN ({','.join('?' * len(states))})
        ORDER BY a.frame_id, a.person"""
        return list(self._db.execute(q, states))

    # ---- proposals ----------------------------------------------------------------

    _PROP_SELECT = ("SELECT id, frame_id, person, model_id, model_hash, keypoints, confidence, signals,"
                    " score, region, embedding, adapted, created_at FROM proposals")

    @staticmethod
    def _prop(row) -> Proposal:
        emb = np.frombuffer(row[10], dtype=np.float32).copy() if row[10] is not None else None
        return Proposal(id=row[0], frame_id=row[1], person=row[2], model_id=row[3], model_hash=row[4],
                        keypoints=_kp_load(row[5]), confidence=_arr_load(row[6]),
                        signals={k: _arr_load(json.dumps(v)) for k, v in json.loads(row[7]).items()},
                        score=row[8], region=json.loads(row[9]) if row[9] else None,
                        embedding=emb, adapted=bool(row[11]), created_at=row[12])

    def save_proposal(self, frame_id: int, *, model_id: str, model_hash: str, keypoints, confidence,
                      signals: dict, score: float, region: dict | None = None, embedding=None,
                      adapted: bool = False, person: int = 0) -> int:
        emb = None if embedding is None else np.asarray(embedding, dtype=np.float32).tobytes()
        sig = {k: _arr_list(v) for k, v in signals.items()}
        with self.tx() as db:
            return self._insert(
                db, "INSERT INTO proposals(frame_id, person, model_id, model_hash, keypoints,"
                " confidence, signals, score, region, embedding, adapted, created_at)"
                " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)"
                " ON CONFLICT (frame_id, person, model_hash) DO UPDATE SET model_id = excluded.model_id,"
                " keypoints = excluded.keypoints, confidence = excluded.confidence,"
                " signals = excluded.signals, score = excluded.score, region = excluded.region,"
                " embedding = excluded.embedding, adapted = excluded.adapted,"
                " created_at = excluded.created_at",
                (frame_id, person, model_id, model_hash, _kp_json(keypoints), _arr_json(confidence),
                 json.dumps(sig), float(score), json.dumps(region) if region else None, emb,
                 int(adapted), now_iso()))

    def proposal(self, frame_id: int, person: int = 0, model_hash: str | None = None, *,
                 raw: bool = False) -> Proposal | None:
        """The frame's latest proposal (of ``model_hash``); with ``raw``, the latest from a model
        as shipped (not a project's tuned copy, see core.tuning)."""
        q = self._PROP_SELECT + " WHERE frame_id=? AND person=?"
        args = [frame_id, person]
        if model_hash:
            q += " AND model_hash=?"; args.append(model_hash)
        if raw:
            q += " AND adapted=0"
        row = self._db.execute(q + " ORDER BY id DESC LIMIT 1", args).fetchone()
        return self._prop(row) if row else None

    def proposals(self, model_hash: str | None = None) -> list[Proposal]:
        if model_hash is None:
            rows = self._db.execute(self._PROP_SELECT + " ORDER BY frame_id, person, id")
        else:
            rows = self._db.execute(self._PROP_SELECT + " WHERE model_hash=? ORDER BY frame_id, person",
                                    (model_hash,))
        return [self._prop(r) for r in rows]

    def proposal_count(self) -> int:
        return self._db.execute("SELECT COUNT(*) FROM proposals").fetchone()[0]

    def drop_tuned_proposals(self, frame_ids, keep_hash: str) -> int:
        """Delete the tuned-model proposals (adapted) on ``frame_ids`` that are not of
        ``keep_hash``: those of an earlier network tuning. The raw model's stay. Returns how many."""
        n = 0
        with self.tx() as db:
            for fid in frame_ids:
                n += db.execute("DELETE FROM proposals WHERE frame_id=? AND adapted=1 AND model_hash<>?",
                                (int(fid), keep_hash)).rowcount
        return n

    def proposed_frame_ids(self, model_hash: str) -> set[int]:
        return {r[0] for r in self._db.execute("SELECT frame_id FROM proposals WHERE model_hash=?",
                                                (model_hash,))}

    # ---- bulk (benchmarks and imports) --------------------------------------------

    def bulk_insert_frames(self, media_id: int, frames: Iterable[tuple[int, float | None, str]]):
        with self.tx() as db:
            db.executemany("INSERT INTO frames(media_id, frame_index, timestamp, pixel_sha) VALUES (?, ?, ?, ?)",
                           ((media_id, i, t, s) for i, t, s in frames))

    def bulk_insert_annotations(self, rows: Iterable[tuple[int, np.ndarray, str]], *, user_id: int | None = None):
        """Fast insert of (frame_id, keypoints, state) rows with human sources, no event rows.

        For benchmarks and synthetic projects only: user edits go through save_annotation.
        """
        skel_id, skel = self.skeleton()
        src = json.dumps(["human"] * skel.num_keypoints)
        at = now_iso()
        with self.tx() as db:
            db.executemany(
                "INSERT INTO annotations(frame_id, person, skeleton_id, keypoints, sources, state, version,"
                " bbox, updated_by, updated_at) VALUES (?, 0, ?, ?, ?, ?, 1, NULL, ?, ?)",
                ((fid, skel_id, _kp_json(k), src, state, user_id, at) for fid, k, state in rows))

    def frame_ids(self, media_id: int) -> dict[int, int]:
        return {idx: fid for fid, idx in self._db.execute(
            "SELECT id, frame_index FROM frames WHERE media_id=?", (media_id,))}

    # ---- used by the workspace

    def delete_annotation(self, annotation_id: int, *, user_id: int | None = None,
                          action: str = "delete", expected_version: int | None = None):
        """Remove one annotation (undo of a frame's first edit); the event log keeps what it held.

        ``expected_version``: the version the caller last saw; if the stored one differs (someone
        saved in between), nothing is removed (compare-and-set, as in :meth:`save_annotation`).
        """
        with self.tx() as db:
            before = self.annotation_by_id(annotation_id)
            try:
                if expected_version is None:
                    cur = db.execute("DELETE FROM annotations WHERE id=?", (annotation_id,))
                else:
                    cur = db.execute("DELETE FROM annotations WHERE id=? AND version=?",
                                     (annotation_id, expected_version))
            except _INTEGRITY:
                raise KinemarkError("this annotation has review notes or other records pointing at it; "
                                    "it cannot be removed") from None
            if expected_version is not None and cur.rowcount != 1:
                self._conflict(annotation_id, expected_version)
            self._event(db, user_id, action, "annotation", annotation_id, self._ann_dict(before), None)

    def annotation_states(self, frame_ids: Iterable[int] | None = None, person: int = 0) -> dict[int, str]:
        """frame id -> annotation state for one person (frames without an annotation are left out)."""
        rows = self._db.execute("SELECT frame_id, state FROM annotations WHERE person=?", (person,))
        out = {fid: st for fid, st in rows}
        if frame_ids is not None:
            want = set(frame_ids)
            out = {k: v for k, v in out.items() if k in want}
        return out

    # ---- review, QA and agreement -----------------------------------------------------
    # The rules (who may do what, which state follows which) live in core/review.py and
    # core/agreement.py; these methods only read and write, each write with its event row.

    def log_event(self, action: str, entity: str, entity_id: int | None = None, before=None,
                  after=None, *, user_id: int | None = None):
        """Write one event row on its own (e.g. an export's settings), as one transaction."""
        with self.tx() as db:
            self._event(db, user_id, action, entity, entity_id, before, after)

    def events_for(self, entity: str, ids: Iterable[int] | None = None, *,
                   actions: Iterable[str] | None = None) -> list[Event]:
        """The events of many entities of one kind at once, in log order."""
        base = "SELECT id, at, user_id, action, entity, entity_id, before, after FROM events WHERE entity=?"
        acts = list(actions) if actions is not None else None
        tail, targs = "", []
        if acts is not None:
            tail = f" AND action IN ({','.join('?' * len(acts))})"
            targs = acts
        if ids is None:
            return [Event(*r) for r in self._db.execute(base + tail + " ORDER BY id", [entity, *targs])]
        ids = sorted({int(i) for i in ids})
        out: list[Event] = []
        for i in range(0, len(ids), 500):
            chunk = ids[i:i + 500]
            q = base + f" AND entity_id IN ({','.join('?' * len(chunk))})" + tail
            out.extend(Event(*r) for r in self._db.execute(q, [entity, *chunk, *targs]))
        out.sort(key=lambda e: e.id)
        return out

    def annotations_on_frame(self, frame_id: int) -> list[Annotation]:
        """Every person's annotation on one frame, whatever its state."""
        return [self._ann(r) for r in self._db.execute(
            self._ANN_SELECT + " WHERE frame_id=? ORDER BY person", (frame_id,))]

    def transition_state(self, annotation_id: int, to_state: str, *, from_state: str | None = None,
                         transition: str | None = None, user_id: int | None,
                         note: str | None = None) -> Annotation:
        """Move an annotation to ``to_state``; with ``from_state``, refused if it is no longer in
        it (someone else moved it). The event records the transition's name, when there is one."""
        if to_state not in STATES:
            raise KinemarkError(f"unknown state {to_state!r}")
        with self.tx() as db:
            before = self.annotation_by_id(annotation_id)
            if from_state is not None and before.state != from_state:
                raise KinemarkError(f"annotation {annotation_id} is now {before.state}, not {from_state}; "
                                    "someone changed it meanwhile: reload it")
            cur = db.execute("UPDATE annotations SET state=?, version=version+1, updated_by=?, updated_at=?"
                             " WHERE id=? AND version=?", (to_state, user_id, now_iso(), annotation_id,
                                                           before.version))
            if cur.rowcount != 1:
                self._conflict(annotation_id, before.version)
            after = self.annotation_by_id(annotation_id)
            after_d = {"state": to_state, "version": after.version, "note": note}
            if transition is not None:
                after_d["transition"] = transition
            self._event(db, user_id, "state", "annotation", annotation_id,
                        {"state": before.state, "version": before.version}, after_d)
        return after

    _NOTE_SELECT = ("SELECT id, annotation_id, keypoint, text, author_id, created_at, addressed_at,"
                    " addressed_by FROM review_notes")

    def add_review_note(self, annotation_id: int, keypoint: int | None, text: str, *,
                        user_id: int | None) -> ReviewNote:
        with self.tx() as db:
            new = self._insert(db, "INSERT INTO review_notes(annotation_id, keypoint, text, author_id,"
                               " created_at) VALUES (?, ?, ?, ?, ?)",
                               (annotation_id, None if keypoint is None else int(keypoint), text, user_id,
                                now_iso()))
            self._event(db, user_id, "add", "review_note", new, None,
                        {"annotation_id": annotation_id, "keypoint": keypoint, "text": text})
            row = db.execute(self._NOTE_SELECT + " WHERE id=?", (new,)).fetchone()
        return ReviewNote(*row)

    def review_notes(self, annotation_ids: Iterable[int] | None = None, *,
                     open_only: bool = False) -> list[ReviewNote]:
        q, args = self._NOTE_SELECT, []
        conds = []
        if annotation_ids is not None:
            ids = [int(i) for i in annotation_ids]
            if not ids:
                return []
            conds.append(f"annotation_id IN ({','.join('?' * len(ids))})"); args.extend(ids)
        if open_only:
            conds.append("addressed_at IS NULL")
        if conds:
            q += " WHERE " + " AND ".join(conds)
        return [ReviewNote(*r) for r in self._db.execute(q + " ORDER BY id", args)]

    def address_review_notes(self, annotation_id: int, *, user_id: int | None) -> int:
        """Mark an annotation's open notes as addressed (its annotator resubmitted). Returns how many."""
        with self.tx() as db:
            ids = [r[0] for r in db.execute("SELECT id FROM review_notes WHERE annotation_id=?"
                                            " AND addressed_at IS NULL", (annotation_id,))]
            if ids:
                db.execute("UPDATE review_notes SET addressed_at=?, addressed_by=? WHERE annotation_id=?"
                           " AND addressed_at IS NULL", (now_iso(), user_id, annotation_id))
                self._event(db, user_id, "addressed", "annotation", annotation_id, None, {"notes": ids})
        return len(ids)

    def set_agreement_frames(self, frame_ids: list[int], *, seed: int, share: float,
                             user_id: int | None):
        """Replace the set of frames chosen for double labelling (kept in the order given)."""
        with self.tx() as db:
            before = [r[0] for r in db.execute("SELECT frame_id FROM agreement_frames ORDER BY rank")]
            db.execute("DELETE FROM agreement_frames")
            at = now_iso()
            db.executemany("INSERT INTO agreement_frames(frame_id, rank, chosen_at) VALUES (?, ?, ?)",
                           ((int(f), n, at) for n, f in enumerate(frame_ids)))
            db.execute(_UPSERT_META, ("agreement_seed", str(seed)))
            db.execute(_UPSERT_META, ("agreement_share", repr(share)))
            self._event(db, user_id, "choose", "agreement_frames", None, {"frames": len(before)},
                        {"frames": len(frame_ids), "seed": seed, "share": share})

    def agreement_frame_ids(self) -> list[int]:
        return [r[0] for r in self._db.execute("SELECT frame_id FROM agreement_frames ORDER BY rank")]

    _SECOND_SELECT = ("SELECT id, frame_id, person, keypoints, labelled_by, version, created_at, updated_at"
                      " FROM second_labels")

    @staticmethod
    def _second(row) -> SecondLabel:
        return SecondLabel(id=row[0], frame_id=row[1], person=row[2], keypoints=_kp_load(row[3]),
                           labelled_by=row[4], version=row[5], created_at=row[6], updated_at=row[7])

    def save_second_label(self, frame_id: int, keypoints: np.ndarray, *, user_id: int, person: int = 0,
                          expected_version: int | None = None) -> SecondLabel:
        """Create or replace one user's agreement label on a frame.

        The event row records who and which version, not the points: the event log
        is readable in the app, and the first annotator must not see the second label.
        """
        skel_id, skel = self.skeleton()
        kps = np.asarray(keypoints, dtype=float)
        if kps.shape != (skel.num_keypoints, 3):
            raise KinemarkError(f"expected {skel.num_keypoints} keypoints (x, y, v), got shape {kps.shape}")
        if not np.all(np.isin(kps[:, 2], (0, 1, 2))):
            raise KinemarkError("visibility must be 0, 1 or 2 (COCO)")
        if not np.all(np.isfinite(kps[:, :2])):
            raise KinemarkError("keypoint coordinates must be finite numbers")
        kps = kps.copy()
        kps[kps[:, 2] == 0, :2] = 0.0
        with self.tx() as db:
            row = db.execute(self._SECOND_SELECT + " WHERE frame_id=? AND person=? AND labelled_by=?",
                             (frame_id, person, user_id)).fetchone()
            have = row[5] if row else 0
            if expected_version is not None and have != expected_version:
                raise KinemarkError(f"your agreement label on this frame is at version {have}, you had "
                                    f"{expected_version}; reload it before saving")
            at = now_iso()
            if row is None:
                sid = self._insert(db, "INSERT INTO second_labels(frame_id, person, keypoints, labelled_by,"
                                   " version, created_at, updated_at) VALUES (?, ?, ?, ?, 1, ?, ?)",
                                   (frame_id, person, _kp_json(kps), user_id, at, at))
            else:
                sid = row[0]
                db.execute("UPDATE second_labels SET keypoints=?, version=version+1, updated_at=? WHERE id=?",
                           (_kp_json(kps), at, sid))
            out = self._second(db.execute(self._SECOND_SELECT + " WHERE id=?", (sid,)).fetchone())
            self._event(db, user_id, "edit", "second_label", sid, {"version": have},
                        {"version": out.version, "frame_id": frame_id, "person": person})
        return out

    def second_labels(self, *, frame_id: int | None = None, user_id: int | None = None) -> list[SecondLabel]:
        q, args, conds = self._SECOND_SELECT, [], []
        if frame_id is not None:
            conds.append("frame_id=?"); args.append(frame_id)
        if user_id is not None:
            conds.append("labelled_by=?"); args.append(user_id)
        if conds:
            q += " WHERE " + " AND ".join(conds)
        return [self._second(r) for r in self._db.execute(q + " ORDER BY frame_id, person, id", args)]

    # ---- team mode: claims (leases on frames) -------------------------------------------

    def claim_frames(self, user_id: int, candidates: Iterable[int], n: int, lease_seconds: float,
                     *, now: float | None = None) -> tuple[list[int], list[int]]:
        """Lease up to ``n`` frames to a user, in the order of ``candidates``, as one transaction.

        Expired leases are dropped first; the user's own live leases are renewed and count
        towards ``n``. A frame is taken with an insert that does nothing on conflict, so two
        people claiming at the same moment never get the same frame. Returns (new, renewed).
        """
        now = time.time() if now is None else float(now)
        until = now + float(lease_seconds)
        with self.tx() as db:
            db.execute("DELETE FROM claims WHERE expires_at <= ?", (now,))
            mine = [r[0] for r in db.execute("SELECT frame_id FROM claims WHERE user_id=? ORDER BY claimed_at,"
                                             " frame_id", (user_id,))]
            db.execute("UPDATE claims SET expires_at=? WHERE user_id=?", (until, user_id))
            got = []
            held = set(mine)
            for fid in candidates:
                if len(mine) + len(got) >= n:
                    break
                if fid in held:
                    continue
                row = db.execute("INSERT INTO claims(frame_id, user_id, claimed_at, expires_at) VALUES (?, ?, ?, ?)"
                                 " ON CONFLICT (frame_id) DO NOTHING RETURNING frame_id",
                                 (int(fid), user_id, now, until)).fetchone()
                if row is not None:
                    got.append(int(fid))
                    held.add(int(fid))
            self._event(db, user_id, "claim", "claims", None, None,
                        {"frames": got, "renewed": mine, "expires_at": until})
        return got, mine

    def release_claims(self, user_id: int, frame_ids: Iterable[int] | None = None) -> int:
        with self.tx() as db:
            if frame_ids is None:
                cur = db.execute("DELETE FROM claims WHERE user_id=?", (user_id,))
            else:
                ids = [int(f) for f in frame_ids]
                cur = db.executemany("DELETE FROM claims WHERE user_id=? AND frame_id=?",
                                     [(user_id, f) for f in ids]) if ids else None
            n = cur.rowcount if cur is not None else 0
            self._event(db, user_id, "release", "claims", None, None,
                        {"frames": None if frame_ids is None else list(frame_ids)})
        return n

    def claims(self, *, now: float | None = None) -> dict[int, tuple[int, float]]:
        """Live leases: frame id -> (user id, expires at, seconds since the epoch)."""
        now = time.time() if now is None else float(now)
        return {r[0]: (r[1], r[2]) for r in self._db.execute(
            "SELECT frame_id, user_id, expires_at FROM claims WHERE expires_at > ?", (now,))}

    def claim_holder(self, frame_id: int, *, now: float | None = None) -> tuple[int, float] | None:
        now = time.time() if now is None else float(now)
        row = self._db.execute("SELECT user_id, expires_at FROM claims WHERE frame_id=? AND expires_at > ?",
                               (frame_id, now)).fetchone()
        return (row[0], row[1]) if row else None


def _split_sql(script: str) -> list[str]:
    """Split a migration script into statements (triggers keep their BEGIN ... END; bodies)."""
    out, buf = [], []
    for line in script.strip().splitlines():
        buf.append(line)
        text = "\n".join(buf).strip()
        if text.endswith(";") and sqlite3.complete_statement(text):
            out.append(text)
            buf = []
    if "\n".join(buf).strip():
        out.append("\n".join(buf).strip())
    return out
