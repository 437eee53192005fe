"""The `Workspace`: the folder, its database connection and transactions.

What it stores and reads comes from the mixins (scans, artifacts, queues, reviews, sheets, names).
"""
from __future__ import annotations

import os
import shutil
import sqlite3
import threading
import time

from slicefind.exceptions import SlicefindTypeError, SlicefindValueError, WorkspaceBusyError
from slicefind.review.queue import Queue
from slicefind.workspace.artifacts import ArtifactStore
from slicefind.workspace.names import NameStore
from slicefind.workspace.queues import QueueStore
from slicefind.workspace.reviews import ReviewStore
from slicefind.workspace.scans import ScanStore
from slicefind.workspace.schema import (BUSY_RETRIES, BUSY_TIMEOUT, DB_NAME, MIGRATIONS, SCHEMA,
                                        SCHEMA_VERSION, statements)
from slicefind.workspace.sheets import SheetImport
from slicefind.workspace.stamps import data_fingerprint, library_version, now

__all__ = ["Workspace", "data_fingerprint"]


# --- the workspace ------------------------------------------------------------------------


class Workspace(ScanStore, ArtifactStore, QueueStore, ReviewStore, SheetImport, NameStore):
    """A folder holding ``slicefind.sqlite``: scans, queues, reviews and names.

    Opening a folder that does not exist creates it. A database written by an older
    schema is migrated (after a copy is kept as ``slicefind.sqlite.v<N>.bak``); one
    written by a newer slicefind, or a file that is not a slicefind database, is refused
    with a message that says so. One `Workspace` may be shared by threads; several
    processes may open the same folder (writes wait for each other, up to ``timeout``).

    Parameters
    ----------
    path : str or os.PathLike
        The workspace folder.
    timeout : float, optional
        Seconds a write waits for another process's lock, per attempt (default
        `BUSY_TIMEOUT`, 30); after ``len(BUSY_RETRIES) + 1`` attempts it raises
        `slicefind.exceptions.WorkspaceBusyError` and writes nothing.
    create : bool, default=True
        Create the folder and database when missing; with False a missing workspace is
        an error (for commands that need an existing one).

    Examples
    --------
    >>> import tempfile
    >>> from slicefind.demodata import example_scan
    >>> from slicefind.review.queue import build_queue
    >>> ws = Workspace(tempfile.mkdtemp())
    >>> scan_id = ws.save_scan(example_scan())
    >>> queue = build_queue(ws.load_found(), budget=20, rest=5)
    >>> queue_id = ws.save_queue(queue)
    >>> first = int(queue.table["row"][0])
    >>> ws.record_review(first, tags="Smudged print") is not None
    True
    >>> print(ws.reviews()[["row", "reviewed", "tags"]].to_string(index=False))
     row  reviewed          tags
     232      True smudged print
    >>> ws.close()
    """

    def __init__(self, path, *, timeout: float | None = None, create: bool = True):
        timeout = BUSY_TIMEOUT if timeout is None else timeout
        if not isinstance(path, (str, os.PathLike)):
            raise SlicefindTypeError(f"path must be a folder path; got {type(path).__name__}.")
        self.path = os.fspath(path)
        if os.path.exists(self.path) and not os.path.isdir(self.path):
            msg = (f"path={self.path!r} is a file; a workspace is a folder that holds {DB_NAME}. "
                   "Pass the folder (or a new folder name).")
            raise SlicefindValueError(msg)
        self.db_path = os.path.join(self.path, DB_NAME)
        if not create and not os.path.exists(self.db_path):
            msg = (f"{self.path!r} is not a slicefind workspace (it has no {DB_NAME}); create one "
                   "with a scan first (slicefind scan DATA --out FOLDER, or Workspace(path).save_scan).")
            raise SlicefindValueError(msg)
        os.makedirs(self.path, exist_ok=True)
        self._lock = threading.RLock()
        fresh = not os.path.exists(self.db_path) or os.path.getsize(self.db_path) == 0
        self._conn = sqlite3.connect(self.db_path, timeout=timeout, isolation_level=None,
                                     check_same_thread=False)
        try:
            self._conn.execute(f"PRAGMA busy_timeout = {int(timeout * 1000)}")
            self._open(fresh)
        except BaseException:
            self._conn.close()
            raise
        self._queue_cache: tuple[int, Queue, frozenset] | None = None

    # -- opening, schema -------------------------------------------------------------------

    def _open(self, fresh: bool) -> None:
        """Create the schema, or check (and migrate) the one found."""
        conn = self._conn
        try:
            tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        except sqlite3.DatabaseError as exc:
            msg = (f"{self.db_path!r} is not a SQLite database ({exc}); it cannot be a slicefind "
                   "workspace. Move it away or choose another folder.")
            raise SlicefindValueError(msg) from None
        if fresh or not tables:
            conn.execute("PRAGMA journal_mode = WAL")
            conn.execute("PRAGMA synchronous = FULL")
            with self._transaction():
                for statement in statements(SCHEMA):
                    conn.execute(statement)
                conn.executemany("INSERT INTO meta (key, value) VALUES (?, ?)",
                                 [("schema_version", str(SCHEMA_VERSION)),
                                  ("created_at", now()),
                                  ("created_by", f"slicefind {library_version()}")])
            return
        if "meta" not in tables:
            msg = (f"{self.db_path!r} is a SQLite database but not a slicefind workspace (it has "
                   f"no meta table; tables: {sorted(tables)[:6]}). Choose another folder.")
            raise SlicefindValueError(msg)
        row = conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
        try:
            version = int(row[0])
        except (TypeError, ValueError):
            msg = f"{self.db_path!r} has no readable schema version ({row!r}); it cannot be opened."
            raise SlicefindValueError(msg) from None
        created_by = conn.execute("SELECT value FROM meta WHERE key = 'created_by'").fetchone()
        if version > SCHEMA_VERSION:
            msg = (f"{self.db_path!r} was written by a newer slicefind "
                   f"({created_by[0] if created_by else 'unknown'}, schema version {version}); this "
                   f"slicefind {library_version()} reads schema version {SCHEMA_VERSION} and older. "
                   "Upgrade slicefind (pip install -U slicefind) to open it.")
            raise SlicefindValueError(msg)
        conn.execute("PRAGMA journal_mode = WAL")
        conn.execute("PRAGMA synchronous = FULL")
        if version < SCHEMA_VERSION:
            self._migrate(version)

    def _migrate(self, version: int) -> None:
        """Upgrade the schema from `version` step by step, in one transaction, after a backup."""
        steps = list(range(version, SCHEMA_VERSION))
        missing = [v for v in steps if v not in MIGRATIONS]
        if missing:
            msg = (f"{self.db_path!r} uses schema version {version}, which this slicefind "
                   f"{library_version()} (schema {SCHEMA_VERSION}) cannot migrate (no step from "
                   f"version {missing[0]}). Open it with the slicefind that wrote it and export the "
                   "reviews, or start a new workspace.")
            raise SlicefindValueError(msg)
        backup = f"{self.db_path}.v{version}.bak"
        self._conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        shutil.copy2(self.db_path, backup)
        with self._transaction():
            for v in steps:
                MIGRATIONS[v](self._conn)
            self._conn.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'",
                               (str(SCHEMA_VERSION),))
            self._conn.execute("INSERT OR REPLACE INTO meta (key, value) VALUES (?, ?)",
                               (f"migrated_from_{version}", now()))

    def _begin(self) -> None:
        """BEGIN IMMEDIATE, waiting out another process's lock; WorkspaceBusyError after the retries.

        Each attempt waits SQLite's busy timeout; between attempts it pauses
        `BUSY_RETRIES` seconds. Nothing has been written when it gives up.
        """
        for pause in (*BUSY_RETRIES, None):
            try:
                self._conn.execute("BEGIN IMMEDIATE")
                return
            except sqlite3.OperationalError as exc:
                if "locked" not in str(exc) and "busy" not in str(exc):
                    raise
                if pause is None:
                    msg = (f"another process held {self.db_path!r} for longer than "
                           f"{len(BUSY_RETRIES) + 1} waits of the busy timeout; nothing was written. "
                           "Close the other slicefind process (a review page, a tally) or try again.")
                    raise WorkspaceBusyError(msg) from None
                time.sleep(pause)

    def _transaction(self):
        """Context manager: BEGIN IMMEDIATE ... COMMIT (ROLLBACK on error), under the lock."""
        workspace = self

        class _Tx:
            def __enter__(self):
                workspace._lock.acquire()
                try:
                    workspace._begin()
                except BaseException:
                    workspace._lock.release()
                    raise
                return workspace._conn

            def __exit__(self, kind, value, tb):
                try:
                    if kind is None:
                        workspace._conn.execute("COMMIT")
                    else:
                        workspace._conn.execute("ROLLBACK")
                finally:
                    workspace._lock.release()
                return False

        return _Tx()

    @property
    def schema_version(self) -> int:
        """The schema version of the open database."""
        with self._lock:
            return int(self._conn.execute(
                "SELECT value FROM meta WHERE key = 'schema_version'").fetchone()[0])

    def close(self) -> None:
        """Close the database (every write is already committed)."""
        with self._lock:
            self._conn.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def __repr__(self):
        return f"Workspace({self.path!r})"

    # -- scans -----------------------------------------------------------------------------


    # -- queues ----------------------------------------------------------------------------


    # -- reviews ---------------------------------------------------------------------------


    # -- names -----------------------------------------------------------------------------


    # -- tally -----------------------------------------------------------------------------

