"""The store: one DuckDB file with facts, embeddings, trained policies and recorded runs."""
from __future__ import annotations

import contextlib
import errno
import fcntl
import os
import random
import time
from pathlib import Path

try:
    # The engine alone (~20 ms to import), not the duckdb package's Python layer over it
    # (~100 ms more: its relation API, and its version read through importlib.metadata).
    # Everything here is plain connect/execute/fetch, which the engine module provides (the
    # package re-exports these very objects).  Code that builds relations (``con.sql``,
    # ``register``: load, reading a store into a graph) imports ``duckdb`` itself, which
    # extends connections made before it too.
    import _duckdb as duckdb

    duckdb.connect, duckdb.Error, duckdb.CatalogException, duckdb.BinderException  # noqa: B018
except (ImportError, AttributeError):  # another build of duckdb: the package, as usual
    import duckdb

from .errors import InputError, StoreBusyError

SCHEMA_VERSION = 1
DIM = 384  # the embedding width of all-MiniLM-L6-v2; the model identity is checked in meta

# Every table is plain SQL so users can query a store with the duckdb client.
SCHEMA = f"""
CREATE TABLE IF NOT EXISTS meta (key VARCHAR PRIMARY KEY, value VARCHAR);
CREATE TABLE IF NOT EXISTS entities (
    entity_id INTEGER PRIMARY KEY, name VARCHAR NOT NULL UNIQUE, embedding FLOAT[{DIM}]);
CREATE TABLE IF NOT EXISTS relations (
    relation_id INTEGER PRIMARY KEY, name VARCHAR NOT NULL UNIQUE, embedding FLOAT[{DIM}]);
CREATE TABLE IF NOT EXISTS facts (
    fact_id INTEGER PRIMARY KEY,
    subject_id INTEGER NOT NULL, relation_id INTEGER NOT NULL, object_id INTEGER NOT NULL,
    subject VARCHAR NOT NULL, relation VARCHAR NOT NULL, object VARCHAR NOT NULL,
    text VARCHAR NOT NULL, source VARCHAR, source_id VARCHAR,
    content_hash VARCHAR NOT NULL UNIQUE, load_id INTEGER NOT NULL, loaded_at TIMESTAMP NOT NULL);
CREATE TABLE IF NOT EXISTS fact_vectors (fact_id INTEGER PRIMARY KEY, embedding FLOAT[{DIM}] NOT NULL);
CREATE TABLE IF NOT EXISTS loads (
    load_id INTEGER PRIMARY KEY, loaded_at TIMESTAMP NOT NULL, files VARCHAR[] NOT NULL,
    rows_read BIGINT, facts_added BIGINT, duplicates BIGINT, rejected BIGINT);
CREATE TABLE IF NOT EXISTS policies (
    version INTEGER PRIMARY KEY, created_at TIMESTAMP NOT NULL, active BOOLEAN NOT NULL,
    format VARCHAR NOT NULL, model VARCHAR NOT NULL, settings JSON, scores JSON);
CREATE TABLE IF NOT EXISTS policy_tensors (
    version INTEGER NOT NULL, name VARCHAR NOT NULL, shape INTEGER[] NOT NULL,
    dtype VARCHAR NOT NULL, data BLOB NOT NULL, PRIMARY KEY (version, name));
CREATE TABLE IF NOT EXISTS runs (
    run_id VARCHAR PRIMARY KEY, created_at TIMESTAMP NOT NULL, question VARCHAR NOT NULL,
    subject VARCHAR, relation VARCHAR, strategy VARCHAR NOT NULL, policy_version INTEGER,
    answer VARCHAR, confidence DOUBLE, abstained BOOLEAN NOT NULL, reason VARCHAR,
    ranked JSON, start_entities JSON, facts_version INTEGER, elapsed_ms DOUBLE);
CREATE TABLE IF NOT EXISTS run_fetches (
    run_id VARCHAR NOT NULL, hop INTEGER NOT NULL, fact_id INTEGER NOT NULL,
    probability DOUBLE NOT NULL, from_entity VARCHAR, to_entity VARCHAR,
    alternatives JSON, direction VARCHAR, PRIMARY KEY (run_id, hop));
"""

# Columns added after a store format shipped: (table, column, type).  A write connection adds
# any that are missing (ALTER TABLE appends, so positional INSERTs see the same order).
_ADDED_COLUMNS = [("run_fetches", "direction", "VARCHAR")]

_DUCKDB_MAGIC = b"DUCK"
LOCK_TIMEOUT = float(os.environ.get("HOPPER_LOCK_TIMEOUT", "120"))


def first(cursor):
    """The first row of a query (or None), reading the result to its end.

    DuckDB refuses some work on a connection whose last result was not read to the end, so
    hopper never leaves one half-read.
    """
    rows = cursor.fetchall()
    return rows[0] if rows else None


def default_path() -> Path:
    return Path(os.environ.get("HOPPER_STORE") or "hopper.duckdb")


def _is_lock_error(exc: Exception) -> bool:
    text = str(exc).lower()
    return "lock" in text and ("conflict" in text or "could not set" in text)


_MAX_BACKOFF = 0.05  # seconds; each wait is jittered to 50-150 % of the current step


def _busy(path) -> StoreBusyError:
    return StoreBusyError(
        f"{path}: another process has held the store for too long; try again "
        "(HOPPER_LOCK_TIMEOUT sets the wait in seconds)")


def _open_lock_file(path: Path) -> int | None:
    """A descriptor for a lock file, creating it if we may; None when it cannot be opened
    (a read-only folder without the file), in which case the caller goes without flock."""
    try:
        return os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o666)
    except OSError:
        try:  # flock needs no write access, so an existing file in a read-only folder works
            return os.open(path, os.O_RDONLY | os.O_CLOEXEC)
        except OSError:
            return None


def _flock(path: Path, exclusive: bool, deadline: float, store: Path) -> int | None:
    """Lock ``path`` (shared or exclusive), polling until ``deadline``.

    Returns the descriptor holding the lock, or None when flock is unavailable there.  When the
    file was removed or replaced while we waited (someone deleted the store and its side files),
    the lock is on a dead inode, so we start again on the current file.
    """
    mode = (fcntl.LOCK_EX if exclusive else fcntl.LOCK_SH) | fcntl.LOCK_NB
    delay = 0.002
    while True:
        fd = _open_lock_file(path)
        if fd is None:
            return None
        try:
            while True:
                try:
                    fcntl.flock(fd, mode)
                    break
                except OSError as exc:
                    if exc.errno not in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                        os.close(fd)  # no flock on this file system: go without
                        fd = None
                        return None
                if time.monotonic() > deadline:
                    raise _busy(store)
                time.sleep(delay * (0.5 + random.random()))
                delay = min(delay * 2, _MAX_BACKOFF)
            held = os.fstat(fd)
            try:
                now = os.stat(path)
                current = (now.st_dev, now.st_ino) == (held.st_dev, held.st_ino)
            except OSError:
                current = False
        except BaseException:
            if fd is not None:
                os.close(fd)
            raise
        if current:
            return fd
        os.close(fd)


class Store:
    """A hopper store on disk.  Connections are short-lived: open, work, close.

    DuckDB lets one process write a file at a time, and a reader cannot open the file while
    another process writes it.  So every command holds a connection only for as long as it
    reads or writes, and waits with jittered back-off when another process holds the lock.

    DuckDB reads the file header before it takes its own lock, so a connection opened while
    another process checkpoints can work from a stale header (lost rows, "Could not read enough
    bytes").  So hopper guards each connection with ``flock`` on two files beside the store:
    a writer takes ``<store>.gate`` and then ``<store>.lock`` exclusively, a reader both shared;
    each lets go of ``.gate`` once it holds ``.lock`` and keeps ``.lock`` until it closes.  No
    connection opens while a writer is open, and a writer waiting for ``.lock`` (holding
    ``.gate``) stops new readers, so a stream of readers cannot starve writers.
    Waits poll with jittered back-off (at most 50 ms) until the same deadline as DuckDB's lock
    (``StoreBusyError``).  DuckDB's lock errors are still retried, for other clients that ignore
    these files.  In a read-only folder without the files, hopper goes without them.
    """

    def __init__(self, path: str | os.PathLike | None = None):
        self.path = Path(path) if path is not None else default_path()

    # -- opening -----------------------------------------------------------------------
    def exists(self) -> bool:
        return self.path.exists()

    def check_file(self) -> None:
        """Refuse a path that exists but is not a DuckDB file, before DuckDB touches it."""
        if not self.path.exists():
            return
        if self.path.is_dir():
            raise InputError("is a folder, not a hopper store", file=str(self.path),
                             hint="give --store a .duckdb file path")
        try:
            with open(self.path, "rb") as fh:
                head = fh.read(16)
        except OSError as exc:
            raise InputError(f"cannot read the store: {exc.strerror}", file=str(self.path)) from None
        if len(head) == 0:
            raise InputError("is an empty file, not a hopper store", file=str(self.path),
                             hint="remove it or give --store another path")
        if head[8:12] != _DUCKDB_MAGIC:
            raise InputError("is not a DuckDB file; hopper will not overwrite it",
                             file=str(self.path), hint="give --store another path")

    def require(self) -> None:
        """Raise a clear error when there is no store yet."""
        self.check_file()
        if not self.path.exists():
            raise InputError("no hopper store here", file=str(self.path),
                             hint="create one with 'hopper load FILE --store PATH'")

    @contextlib.contextmanager
    def connect(self, write: bool = False, timeout: float | None = None):
        """Yield a DuckDB connection, waiting for another process's lock to be released.

        ``write=True`` creates the file and schema when missing.  Read connections require an
        existing store.
        """
        if write:
            self.check_file()
            self.path.parent.mkdir(parents=True, exist_ok=True)
        else:
            self.require()  # before any lock file is made: none for a path that is no store
        deadline = time.monotonic() + (LOCK_TIMEOUT if timeout is None else timeout)
        gate = data = None
        try:
            gate = _flock(Path(str(self.path) + ".gate"), write, deadline, self.path)
            if gate is not None:
                data = _flock(Path(str(self.path) + ".lock"), write, deadline, self.path)
                os.close(gate)  # the gate only orders arrivals; .lock guards the file
                gate = None
            # the store may have been removed or replaced while we waited
            if write:
                self.check_file()
            else:
                self.require()
            con = self._open(write, deadline)
            try:
                # DuckDB draws a progress bar on stdout for queries over 2 s (the graph step
                # of a million facts): it would break `--json` output.
                con.execute("SET enable_progress_bar = false")
                if write:
                    self._ensure_schema(con)
                elif not self._has_schema(con):
                    raise InputError("is a DuckDB file but not a hopper store", file=str(self.path),
                                     hint="give --store a hopper store or a new path")
                yield con
            finally:
                con.close()
        finally:
            for fd in (data, gate):
                if fd is not None:
                    os.close(fd)

    def _open(self, write: bool, deadline: float):
        """duckdb.connect, retrying DuckDB's own lock errors (clients that ignore our files)."""
        delay = 0.02
        while True:
            try:
                return duckdb.connect(str(self.path), read_only=not write)
            except duckdb.Error as exc:
                if not _is_lock_error(exc):
                    if "not a valid duckdb" in str(exc).lower() or "unable to open" in str(exc).lower():
                        raise InputError(f"cannot open as a DuckDB store: {str(exc).splitlines()[0]}",
                                         file=str(self.path)) from None
                    raise
                if time.monotonic() > deadline:
                    raise _busy(self.path) from None
                time.sleep(delay * (0.5 + random.random()))
                delay = min(delay * 2, 0.5)

    @contextlib.contextmanager
    def transaction(self, timeout: float | None = None, after_commit=None):
        """A write connection inside one transaction: all of it lands, or none of it.
        ``after_commit()`` runs once it has landed, still under the write lock."""
        with self.connect(write=True, timeout=timeout) as con:
            con.execute("BEGIN TRANSACTION")
            try:
                yield con
            except BaseException:
                con.execute("ROLLBACK")
                raise
            con.execute("COMMIT")
            if after_commit is not None:
                after_commit()

    @staticmethod
    def _has_schema(con) -> bool:
        # One query on the table itself (information_schema views cost ~10-20 ms each on a
        # busy machine, on every connection of every command).
        try:
            return first(con.execute("SELECT count(*) FROM main.meta "
                                     "WHERE key = 'schema_version'"))[0] > 0
        except (duckdb.CatalogException, duckdb.BinderException):
            return False  # no table main.meta, or one of another shape

    def _ensure_schema(self, con) -> None:
        if self._has_schema(con):
            self._add_columns(con)
            return
        tables = first(con.execute("SELECT count(*) FROM information_schema.tables "
                             "WHERE table_schema = 'main'"))[0]
        if tables:
            raise InputError("is a DuckDB file with other tables, not a hopper store; "
                             "hopper will not change it", file=str(self.path),
                             hint="give --store another path")
        con.execute("BEGIN TRANSACTION")
        con.execute(SCHEMA)
        con.execute("INSERT INTO meta VALUES ('schema_version', ?), ('facts_version', '0')",
                    [str(SCHEMA_VERSION)])
        con.execute("COMMIT")

    @staticmethod
    def _add_columns(con) -> None:
        """Bring a store made before a column was added up to date (write connections only)."""
        for table, column, kind in _ADDED_COLUMNS:
            try:
                first(con.execute(f"SELECT {column} FROM main.{table} LIMIT 0"))
            except duckdb.CatalogException:
                continue  # no such table (yet): nothing to bring up to date
            except duckdb.BinderException:  # the table lacks the column
                con.execute(f"ALTER TABLE {table} ADD COLUMN {column} {kind}")

    # -- small helpers -------------------------------------------------------------------
    @staticmethod
    def get_meta(con, key: str, default: str | None = None) -> str | None:
        row = first(con.execute("SELECT value FROM meta WHERE key = ?", [key]))
        return row[0] if row else default

    @staticmethod
    def set_meta(con, key: str, value: str) -> None:
        con.execute("INSERT OR REPLACE INTO meta VALUES (?, ?)", [key, value])

    # -- the training checkpoint beside the store --------------------------------------------
    @property
    def checkpoint_path(self) -> Path:
        """Where an unfinished training run keeps its state (``STORE.train-checkpoint.npz``)."""
        return Path(str(self.path) + ".train-checkpoint.npz")

    def save_checkpoint(self, arrays: dict, meta: dict) -> None:
        """Replace the checkpoint atomically: numeric arrays in a ``.npz`` and ``meta`` as JSON.

        Never pickle: every array must be numeric, and ``read_checkpoint`` loads with
        ``allow_pickle=False``.
        """
        import io
        import json

        import numpy as np

        from .files import write_atomic

        out = {}
        for name, value in arrays.items():
            a = np.asarray(value)
            if a.dtype.kind not in "biuf":
                raise TypeError(f"checkpoint array {name}: {a.dtype} is not numeric")
            out[name] = a
        out["meta"] = np.frombuffer(json.dumps(meta).encode("utf-8"), np.uint8)
        buf = io.BytesIO()
        np.savez(buf, **out)
        write_atomic(self.checkpoint_path, buf.getvalue())

    def read_checkpoint(self) -> tuple[dict, dict] | None:
        """(arrays, meta) of the checkpoint, None when there is none; a damaged one is bad input."""
        import json
        import zipfile

        import numpy as np

        path = self.checkpoint_path
        if not path.exists():
            return None
        try:
            with np.load(path, allow_pickle=False) as z:
                arrays = {k: z[k] for k in z.files if k != "meta"}
                meta = json.loads(z["meta"].tobytes().decode("utf-8"))
        except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile) as exc:
            raise InputError(f"the training checkpoint cannot be read ({type(exc).__name__})",
                             file=str(path), hint="train without --resume to start again") from None
        if not isinstance(meta, dict):
            raise InputError("the training checkpoint has no settings", file=str(path),
                             hint="train without --resume to start again")
        return arrays, meta

    def drop_checkpoint(self) -> None:
        try:
            self.checkpoint_path.unlink()
        except FileNotFoundError:
            pass

    def info(self) -> dict:
        """Counts and the active policy, as in the command-line contract."""
        import json

        with self.connect() as con:
            facts, entities, relations, runs = first(con.execute(
                "SELECT (SELECT count(*) FROM facts), (SELECT count(*) FROM entities), "
                "(SELECT count(*) FROM relations), (SELECT count(*) FROM runs)"))
            model = self.get_meta(con, "model_name")
            dim = self.get_meta(con, "model_dim")
            digest = self.get_meta(con, "model_sha256")
            precision = self.get_meta(con, "model_precision", "fp32" if model else None)
            row = first(con.execute("SELECT version, created_at, settings, scores FROM policies "
                              "WHERE active ORDER BY version DESC LIMIT 1"))
            n_policies = first(con.execute("SELECT count(*) FROM policies"))[0]
        policy = None
        if row:
            policy = {"version": row[0], "created_at": row[1].isoformat(timespec="seconds"),
                      "versions": n_policies, "settings": json.loads(row[2] or "{}"),
                      "scores": json.loads(row[3] or "{}")}
        return {"facts": int(facts), "entities": int(entities), "relations": int(relations),
                "runs": int(runs),
                "model": model or "none", "model_dim": int(dim) if dim else None,
                "model_sha256": digest, "model_precision": precision,
                "policy": policy, "store": str(self.path)}
