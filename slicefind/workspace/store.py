"""The workspace: a folder whose ``slicefind.sqlite`` keeps scans, queues, reviews and names.

Everything later steps need is stored, so ``queue`` and ``tally`` work without the
original data file: each scan's parameters, a fingerprint of the data, the library
version, the slice table, every slice's rows, and the per-row arrays (positions, error
flags, labels, predictions, ids, pointer columns). Reviews and names are append-only
events with timestamps: the latest event of a row wins and the history is kept. Every
write is one transaction (SQLite in WAL mode, ``synchronous=FULL``), so a click is
written at once and a killed process loses nothing already committed.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import io
import json
import os
import shutil
import sqlite3
import threading
import time
import warnings
from typing import Iterable, Mapping, Sequence

import numpy as np
import pandas as pd

from slicefind.exceptions import (SlicefindTypeError, SlicefindValueError, WorkspaceBusyError,
                                  did_you_mean)
from slicefind.review.queue import Queue, REST, assemble_queue
from slicefind.discovery.find import FoundSlices
from slicefind.discovery.table import EvalTable
from slicefind.review.tally import Tally, UNTAGGED, normalize_tag, read_reviews, tally

from slicefind.workspace.blobs import (blob_rows, decode_tree, encode_tree, json_default, pack,
                                       pack_frame, rows_blob, unpack, unpack_frame)
from slicefind.workspace.schema import (BUSY_RETRIES, BUSY_TIMEOUT, DB_NAME, MIGRATIONS, SCHEMA,
                                        SCHEMA_VERSION, statements)

__all__ = ["Workspace", "data_fingerprint"]


def now() -> str:
    """UTC time as ISO 8601 with microseconds."""
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="microseconds")


def library_version() -> str:
    from slicefind import __version__
    return __version__


def data_fingerprint(frame: pd.DataFrame) -> str:
    """A SHA-256 of a frame's columns, dtypes, index and values: same data, same string.

    Examples
    --------
    >>> a = pd.DataFrame({"scanner": ["S1", "S2"], "speed": [1.5, 2.5]})
    >>> data_fingerprint(a) == data_fingerprint(a.copy()), data_fingerprint(a) == data_fingerprint(a.iloc[::-1])
    (True, False)
    """
    if not isinstance(frame, pd.DataFrame):
        raise SlicefindTypeError(f"frame must be a DataFrame; got {type(frame).__name__}.")
    digest = hashlib.sha256()
    digest.update(json.dumps([[str(c), str(t)] for c, t in frame.dtypes.items()]).encode())
    digest.update(str(frame.shape).encode())
    try:
        hashed = pd.util.hash_pandas_object(frame, index=True).to_numpy()
    except TypeError:                                   # unhashable cells: hash their text
        hashed = pd.util.hash_pandas_object(frame.astype(str), index=True).to_numpy()
    digest.update(hashed.tobytes())
    return "sha256:" + digest.hexdigest()


_fingerprint = data_fingerprint     # save_scan's argument of the same name hides the function


# --- the workspace ------------------------------------------------------------------------


class Workspace:
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
        `slicefind.discovery.table.WorkspaceBusyError` and writes nothing.
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

    def save_scan(self, found: FoundSlices, *, data_fingerprint: str | None = None,
                  show: Sequence[str] | str = ()) -> int:
        """Store a scan: its parameters, slices, their rows and the per-row arrays.

        Parameters
        ----------
        found : FoundSlices
        data_fingerprint : str, optional
            Fingerprint of the user's data (`data_fingerprint`); default one of the analysed
            rows as held by ``found``.
        show : str or sequence of str, default=()
            Pointer columns of the data (image path, text) to keep for later queues.

        Returns
        -------
        int
            The new scan's id.
        """
        if not isinstance(found, FoundSlices):
            raise SlicefindTypeError(f"found must be a FoundSlices; got {type(found).__name__}.")
        table = found.eval_table
        show = (show,) if isinstance(show, str) else tuple(show)
        for column in show:
            if column not in table.data.columns:
                msg = f"show names {column!r}, which is not a column of data.{did_you_mean(column, table.data.columns)}"
                raise SlicefindValueError(msg)
        fingerprint = data_fingerprint if data_fingerprint is not None else _fingerprint(table.data)
        if not isinstance(fingerprint, str):
            raise SlicefindTypeError(f"data_fingerprint must be a string; got {type(fingerprint).__name__}.")
        arrays = {"positions": np.asarray(table.positions, dtype=np.int64),
                  "errors": np.asarray(table.errors, dtype=bool)}
        if table.label is not None:
            arrays["label"] = np.asarray(table.label)
        if table.prediction is not None:
            arrays["prediction"] = np.asarray(table.prediction)
        columns = ([table.id_column] if table.id_column else []) + [c for c in show if c != table.id_column]
        params = json.loads(json.dumps(dict(found.params), default=json_default))
        with self._transaction() as conn:
            cursor = conn.execute(
                "INSERT INTO scans (created_at, library_version, fingerprint, params, n_input_rows, "
                "n_rows, n_errors, id_column, error_definition, show, skipped, slice_table, "
                "tested_table) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (now(), library_version(), fingerprint, json.dumps(params), int(table.n_input_rows),
                 table.n_rows, table.n_errors, table.id_column, table.error_definition,
                 json.dumps(list(show)), json.dumps(dict(table.skipped)),
                 pack_frame(found.table), pack_frame(found.tested)))
            scan_id = int(cursor.lastrowid)
            conn.execute("INSERT INTO scan_arrays (scan_id, name, data) VALUES (?, ?, ?)",
                         (scan_id, "arrays", pack(arrays, {})))
            conn.execute("INSERT INTO scan_arrays (scan_id, name, data) VALUES (?, ?, ?)",
                         (scan_id, "columns", pack_frame(table.data[columns].reset_index(drop=True))))
            conn.executemany("INSERT INTO slice_rows (scan_id, slice_id, rows) VALUES (?, ?, ?)",
                             [(scan_id, sid, rows_blob(found.rows(sid))) for sid in found.table["slice_id"]])
        return scan_id

    def _scan_id(self, scan_id: int | None) -> int:
        """The given scan id checked, or the latest; a clear error when there is none."""
        with self._lock:
            if scan_id is None:
                row = self._conn.execute("SELECT MAX(scan_id) FROM scans").fetchone()
                if row[0] is None:
                    msg = f"the workspace {self.path!r} holds no scan yet; run a scan first (save_scan)."
                    raise SlicefindValueError(msg)
                return int(row[0])
            if isinstance(scan_id, bool) or not isinstance(scan_id, (int, np.integer)):
                raise SlicefindTypeError(f"scan_id must be an integer; got {scan_id!r}.")
            if self._conn.execute("SELECT 1 FROM scans WHERE scan_id = ?", (int(scan_id),)).fetchone() is None:
                ids = [r[0] for r in self._conn.execute("SELECT scan_id FROM scans ORDER BY scan_id")]
                raise SlicefindValueError(f"scan_id={scan_id!r} is not in this workspace; scans: {ids}.")
            return int(scan_id)

    def scans(self) -> pd.DataFrame:
        """One line per stored scan: id, time, library version, fingerprint, sizes."""
        with self._lock:
            return pd.read_sql_query(
                "SELECT scan_id, created_at, library_version, fingerprint, n_input_rows, n_rows, "
                "n_errors, id_column, error_definition FROM scans ORDER BY scan_id", self._conn)

    def load_found(self, scan_id: int | None = None) -> FoundSlices:
        """Rebuild a stored scan's `FoundSlices` (default the latest) without the data file.

        The eval table holds the stored per-row arrays and the id and pointer columns; its
        mined columns are not kept, so it serves the queue, tally and comparisons, not a
        new search.
        """
        scan_id = self._scan_id(scan_id)
        with self._lock:
            scan = self._conn.execute(
                "SELECT params, n_input_rows, id_column, error_definition, skipped, slice_table, "
                "tested_table, fingerprint, library_version, created_at FROM scans WHERE scan_id = ?",
                (scan_id,)).fetchone()
            blobs = dict(self._conn.execute(
                "SELECT name, data FROM scan_arrays WHERE scan_id = ?", (scan_id,)).fetchall())
            slice_rows = dict(self._conn.execute(
                "SELECT slice_id, rows FROM slice_rows WHERE scan_id = ?", (scan_id,)).fetchall())
        params, n_input, id_column, definition, skipped, table_blob, tested_blob, fp, version, created = scan
        arrays, _ = unpack(blobs["arrays"])
        positions = arrays["positions"].astype(np.intp)
        columns = unpack_frame(blobs["columns"])
        columns.index = pd.Index(positions)
        params = json.loads(params)
        names = {role: params[f"{role}_column"] for role in ("label", "prediction")
                 if params.get(f"{role}_column")}        # how descriptions name them
        eval_table = EvalTable(data=columns, errors=arrays["errors"].astype(bool), positions=positions,
                               n_input_rows=int(n_input), kinds={}, skipped=json.loads(skipped),
                               label=arrays.get("label"), prediction=arrays.get("prediction"),
                               embeddings=None, id_column=id_column, error_definition=definition,
                               columns_used=names)
        table = unpack_frame(table_blob)
        rows = {sid: blob_rows(slice_rows[sid]) for sid in table["slice_id"]}
        return FoundSlices(table=table, tested=unpack_frame(tested_blob), eval_table=eval_table,
                           params=params, _rows=rows,
                           extras={"scan_id": scan_id, "fingerprint": fp, "library_version": version,
                                   "created_at": created})

    def stored_columns(self, scan_id: int | None = None) -> tuple[str, ...]:
        """The pointer columns (image path, text) stored with a scan, for ``build_queue(show=)``."""
        scan_id = self._scan_id(scan_id)
        with self._lock:
            show = self._conn.execute("SELECT show FROM scans WHERE scan_id = ?", (scan_id,)).fetchone()[0]
        return tuple(json.loads(show))

    def save_artifact(self, name: str, value, *, scan_id: int | None = None) -> None:
        """Keep something derived from a scan (a 2-d map, descriptions, report settings).

        ``value`` may hold numbers, strings, lists, tuples, dicts, numpy arrays, DataFrames
        and slicefind's own dataclasses; it is stored without pickle. Saving under the same
        name replaces the earlier value (artifacts are derived, unlike reviews).
        """
        scan_id = self._scan_id(scan_id)
        if not isinstance(name, str) or not name:
            raise SlicefindValueError(f"artifact name must be a non-empty string; got {name!r}.")
        arrays: dict[str, np.ndarray] = {}
        tree = encode_tree(value, arrays)
        arrays["__tree__"] = np.frombuffer(json.dumps(tree).encode("utf-8"), dtype=np.uint8)
        buffer = io.BytesIO()
        np.savez_compressed(buffer, **arrays)
        with self._transaction() as conn:
            conn.execute("INSERT OR REPLACE INTO artifacts (scan_id, name, created_at, data) "
                         "VALUES (?, ?, ?, ?)", (scan_id, name, now(), buffer.getvalue()))

    def load_artifact(self, name: str, *, default=None, scan_id: int | None = None):
        """An artifact saved with `save_artifact`, or `default` when there is none."""
        scan_id = self._scan_id(scan_id)
        with self._lock:
            row = self._conn.execute("SELECT data FROM artifacts WHERE scan_id = ? AND name = ?",
                                     (scan_id, name)).fetchone()
        if row is None:
            return default
        with np.load(io.BytesIO(row[0]), allow_pickle=False) as npz:
            arrays = {key: npz[key] for key in npz.files}
        tree = json.loads(arrays.pop("__tree__").tobytes().decode("utf-8"))
        return decode_tree(tree, arrays)

    # -- queues ----------------------------------------------------------------------------

    def save_queue(self, queue: Queue, *, scan_id: int | None = None, replace: bool = False) -> int:
        """Store a queue for a scan (default the latest); returns its id.

        Saving the queue already stored changes nothing. A queue that leaves out rows
        already reviewed in this scan is refused unless ``replace=True`` (extend the
        stored queue instead, `Queue.extend`); the reviews are kept either way.
        """
        if not isinstance(queue, Queue):
            raise SlicefindTypeError(f"queue must be a Queue; got {type(queue).__name__}.")
        scan_id = self._scan_id(scan_id)
        with self._lock:
            n_rows, n_errors, blob = self._conn.execute(
                "SELECT n_rows, n_errors, (SELECT data FROM scan_arrays WHERE scan_id = s.scan_id "
                "AND name = 'arrays') FROM scans s WHERE scan_id = ?", (scan_id,)).fetchone()
        if (queue.n_rows, queue.n_errors) != (n_rows, n_errors):
            msg = (f"the queue was drawn from a scan with {queue.n_rows} rows and {queue.n_errors} "
                   f"errors, but scan {scan_id} has {n_rows} and {n_errors}; draw it from "
                   "Workspace.load_found().")
            raise SlicefindValueError(msg)
        arrays, _ = unpack(blob)
        error_rows = arrays["positions"][arrays["errors"].astype(bool)]
        rows = queue.table["row"].to_numpy(dtype=np.int64)
        outside = np.setdiff1d(rows, error_rows)
        if outside.size:
            msg = (f"the queue holds rows that are not error rows of scan {scan_id} (first: "
                   f"{outside[:5].tolist()}); draw it from Workspace.load_found().")
            raise SlicefindValueError(msg)
        current = self._latest_queue_id(scan_id)
        if current is not None:
            stored = self.load_queue(scan_id)
            if stored.table.equals(queue.table) and stored.strata.equals(queue.strata):
                return current
        state = self._latest_reviews(scan_id)
        informative = state[(state["reviewed"] == 1) | (state["tags"] != "") | (state["note"] != "")]
        dropped = np.setdiff1d(informative["row"].to_numpy(dtype=np.int64), rows)
        if dropped.size and not replace:
            msg = (f"scan {scan_id} has reviews of {dropped.size} rows that this queue does not hold "
                   f"(first: {dropped[:5].tolist()}); extend the stored queue (load_queue().extend(n)) "
                   "or pass replace=True (the reviews stay in the workspace).")
            raise SlicefindValueError(msg)
        strata = queue.strata.drop(columns="n_queued")
        rowdata = queue._rowdata.reset_index()
        with self._transaction() as conn:
            cursor = conn.execute(
                "INSERT INTO queues (scan_id, created_at, params, batches, n_rows, n_errors, strata, "
                "rowdata, queue_table) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (scan_id, now(), json.dumps(dict(queue.params), default=json_default),
                 json.dumps([{str(k): int(v) for k, v in b.items()} for b in queue._batches]),
                 queue.n_rows, queue.n_errors, pack_frame(strata), pack_frame(rowdata),
                 pack_frame(queue.table)))
            queue_id = int(cursor.lastrowid)
            conn.executemany("INSERT INTO queue_order (queue_id, stratum, rows) VALUES (?, ?, ?)",
                             [(queue_id, s, rows_blob(queue.order(s))) for s in strata["stratum"]])
        self._queue_cache = None
        return queue_id

    def _latest_queue_id(self, scan_id: int) -> int | None:
        with self._lock:
            row = self._conn.execute("SELECT MAX(queue_id) FROM queues WHERE scan_id = ?",
                                     (scan_id,)).fetchone()
        return None if row[0] is None else int(row[0])

    def load_queue(self, scan_id: int | None = None) -> Queue:
        """The latest queue stored for a scan (default the latest scan)."""
        scan_id = self._scan_id(scan_id)
        queue_id = self._latest_queue_id(scan_id)
        if queue_id is None:
            msg = f"scan {scan_id} has no queue yet; build one (build_queue) and save_queue it."
            raise SlicefindValueError(msg)
        if self._queue_cache is not None and self._queue_cache[0] == queue_id:
            return self._queue_cache[1]
        return self._read_queue(queue_id)[0]

    def _queued_rows(self, scan_id: int) -> frozenset:
        """Rows of the scan's latest queue (cached until another queue is saved)."""
        queue_id = self._latest_queue_id(scan_id)
        if queue_id is None:
            msg = f"scan {scan_id} has no queue yet; build one (build_queue) and save_queue it."
            raise SlicefindValueError(msg)
        if self._queue_cache is None or self._queue_cache[0] != queue_id:
            self._read_queue(queue_id)
        return self._queue_cache[2]

    def _read_queue(self, queue_id: int):
        """Rebuild queue `queue_id` from its stored parts and cache it."""
        with self._lock:
            params, batches, n_rows, n_errors, strata, rowdata, stored = self._conn.execute(
                "SELECT params, batches, n_rows, n_errors, strata, rowdata, queue_table FROM queues "
                "WHERE queue_id = ?", (queue_id,)).fetchone()
            order = dict(self._conn.execute("SELECT stratum, rows FROM queue_order WHERE queue_id = ?",
                                            (queue_id,)).fetchall())
        strata = unpack_frame(strata)
        rowdata = unpack_frame(rowdata).set_index("row")
        rowdata.index = rowdata.index.astype(np.int64)
        order = {s: blob_rows(order[s]).astype(np.int64) for s in strata["stratum"]}
        queue = assemble_queue(strata, order, rowdata, tuple(json.loads(batches)), json.loads(params),
                          int(n_rows), int(n_errors))
        stored = unpack_frame(stored)
        same = all(np.array_equal(queue.table[c].to_numpy(), stored[c].to_numpy())
                   for c in ("position", "stratum", "row"))
        if not same:
            msg = (f"queue {queue_id} in {self.db_path!r} does not match its recorded order; the "
                   "database may have been edited by hand. Rebuild the queue with the same options.")
            raise SlicefindValueError(msg)
        self._queue_cache = (queue_id, queue, frozenset(int(r) for r in queue.table["row"]))
        return queue, self._queue_cache[2]

    # -- reviews ---------------------------------------------------------------------------

    def _latest_reviews(self, scan_id: int) -> pd.DataFrame:
        """Latest event per row of a scan: row, reviewed, tags, note, source, updated_at, event_id."""
        with self._lock:
            return pd.read_sql_query(
                "SELECT r.row, r.reviewed, r.tags, r.note, r.source, r.created_at AS updated_at, "
                "r.event_id FROM reviews r JOIN (SELECT row, MAX(event_id) AS event_id FROM reviews "
                "WHERE scan_id = ? GROUP BY row) m ON r.event_id = m.event_id ORDER BY r.row",
                self._conn, params=(scan_id,))

    def _state_of(self, conn, scan_id: int, row: int):
        found = conn.execute(
            "SELECT reviewed, tags, note FROM reviews WHERE scan_id = ? AND row = ? "
            "ORDER BY event_id DESC LIMIT 1", (scan_id, row)).fetchone()
        return (0, "", "") if found is None else (int(found[0]), found[1], found[2])

    def record_review(self, row: int, *, reviewed: bool = True, tags: str | Iterable[str] = (),
                      note: str = "", source: str = "python", scan_id: int | None = None) -> int | None:
        """Record one review at once (one small transaction); returns the event id.

        Nothing is written (and None returned) when the row's latest state is already this.
        The row must be in the scan's stored queue. Tags are normalised like the sheet's
        (trimmed, lower case); ``tags`` may be ``"a;b"`` or a list.
        """
        scan_id = self._scan_id(scan_id)
        if isinstance(row, bool) or not isinstance(row, (int, np.integer)):
            raise SlicefindTypeError(f"row must be an integer row number; got {row!r}.")
        if int(row) not in self._queued_rows(scan_id):
            raise SlicefindValueError(f"row={row!r} is not in the queue of scan {scan_id}.")
        if not isinstance(reviewed, (bool, np.bool_)):
            raise SlicefindTypeError(f"reviewed must be True or False; got {reviewed!r}.")
        tag_text = self._tag_text(tags)
        if not reviewed and tag_text:
            raise SlicefindValueError(f"reviewed=False with tags {tag_text!r}; mark it reviewed or clear the tags.")
        if not isinstance(note, str):
            raise SlicefindTypeError(f"note must be a string; got {type(note).__name__}.")
        if not isinstance(source, str):
            raise SlicefindTypeError(f"source must be a string; got {type(source).__name__}.")
        state = (int(bool(reviewed)), tag_text, note.strip())
        with self._transaction() as conn:
            if self._state_of(conn, scan_id, int(row)) == state:
                return None
            cursor = conn.execute(
                "INSERT INTO reviews (scan_id, row, reviewed, tags, note, source, created_at) "
                "VALUES (?, ?, ?, ?, ?, ?, ?)", (scan_id, int(row), *state, source, now()))
            return int(cursor.lastrowid)

    @staticmethod
    def _tag_text(tags) -> str:
        """Normalised, sorted, ';'-joined tags from 'a;b' or a list of names."""
        if isinstance(tags, str):
            parts = tags.split(";")
        else:
            try:
                parts = list(tags)
            except TypeError:
                raise SlicefindTypeError(f"tags must be a string or a list of strings; got {tags!r}.") from None
            if not all(isinstance(t, str) for t in parts):
                raise SlicefindTypeError(f"tags must be strings; got {parts!r}.")
        cleaned = sorted({normalize_tag(t) for t in parts if normalize_tag(t)})
        return ";".join(cleaned)

    def import_sheet(self, sheet, *, source: str | None = None, batch_size: int = 500,
                     scan_id: int | None = None, trust_order: bool = False) -> dict[str, int]:
        """Import a filled-in review sheet (CSV path or DataFrame) as review events.

        The whole sheet is checked first (see `read_reviews`); on any problem nothing is
        written. Then each line that says something and differs from the row's latest
        state is recorded, all in one transaction: a sheet is in or out as a whole, even
        when the process is killed halfway, and importing the same sheet twice changes
        nothing. The sheet's values become the rows' latest state; earlier ones stay in
        `history`.

        A blank ``reviewed`` cell with blank ``tags`` leaves the row as it was (a note on
        such a line is recorded, the review and its tags kept); ``reviewed = no``
        withdraws a review.

        Parameters
        ----------
        sheet : str, os.PathLike or DataFrame
        source : str, optional
            Recorded with each event (default ``sheet:PATH``).
        batch_size : int, default=500
            Lines per ``executemany`` call inside the one transaction.
        scan_id : int, optional
        trust_order : bool, default=False
            Passed to `read_reviews`: skip the check for a ``tags`` column sorted on its own.

        Returns
        -------
        dict
            ``lines`` (rows the sheet mentions), ``recorded`` (events written),
            ``unchanged``, ``blank`` (lines that say nothing).
        """
        scan_id = self._scan_id(scan_id)
        if isinstance(batch_size, bool) or not isinstance(batch_size, (int, np.integer)) or batch_size < 1:
            raise SlicefindValueError(f"batch_size must be an integer >= 1; got {batch_size!r}.")
        if source is None:
            source = f"sheet:{os.fspath(sheet)}" if isinstance(sheet, (str, os.PathLike)) else "sheet"
        reviews, changes, blank, unchanged = self._plan_import(sheet, scan_id, trust_order)
        pending = [(scan_id, row, *state, source) for row, state in changes]
        with self._transaction() as conn:
            stamp = now()
            for start in range(0, len(pending), int(batch_size)):
                conn.executemany(
                    "INSERT INTO reviews (scan_id, row, reviewed, tags, note, source, created_at) "
                    "VALUES (?, ?, ?, ?, ?, ?, ?)",
                    [c + (stamp,) for c in pending[start:start + int(batch_size)]])
        return {"lines": len(reviews), "recorded": len(pending), "unchanged": unchanged, "blank": blank}

    def _plan_import(self, sheet, scan_id: int, trust_order: bool):
        """The sheet's reviews and the (row, (reviewed, tags, note)) changes importing it would record."""
        queue = self.load_queue(scan_id)
        reviews = read_reviews(sheet, queue, trust_order=trust_order)
        latest = self._latest_reviews(scan_id)
        before_of = {int(r): (int(d), t, n) for r, d, t, n in
                     zip(latest["row"], latest["reviewed"], latest["tags"], latest["note"])}
        changes = []
        blank = unchanged = 0
        for row, done, tags, note, explicit, marked in zip(
                reviews["row"], reviews["reviewed"], reviews["tags"], reviews["note"],
                reviews["explicit"], reviews["marked"]):
            if not explicit:
                blank += 1
                continue
            before = before_of.get(int(row), (0, "", ""))
            state = (int(bool(done)), tags, note) if marked else (before[0], before[1], note)
            if before == state:
                unchanged += 1
                continue
            changes.append((int(row), state))
        return reviews, changes, blank, unchanged

    def preview_import(self, sheet, *, scan_id: int | None = None,
                       trust_order: bool = False) -> pd.DataFrame:
        """The rows' latest state as `reviews` would give it after `import_sheet`; writes nothing.

        Lets a caller check what depends on the imported reviews (a tally's categories,
        say) before anything is stored. Columns ``row``, ``reviewed``, ``tags``, ``note``.
        """
        scan_id = self._scan_id(scan_id)
        _, changes, _, _ = self._plan_import(sheet, scan_id, trust_order)
        state = self.reviews(scan_id)[["row", "reviewed", "tags", "note"]]
        merged = {int(r): (bool(d), t, n) for r, d, t, n in state.itertuples(index=False, name=None)}
        for row, (done, tags, note) in changes:
            merged[row] = (bool(done), tags, note)
        frame = pd.DataFrame([(r, *v) for r, v in sorted(merged.items())],
                             columns=["row", "reviewed", "tags", "note"])
        return frame.astype({"row": np.int64, "reviewed": bool, "tags": "str", "note": "str"})

    def reviews(self, scan_id: int | None = None) -> pd.DataFrame:
        """The latest state of every row reviewed in a scan, ready for `tally` or `Queue.to_csv`.

        Columns ``row``, ``reviewed`` (bool), ``tags``, ``note``, ``source``, ``updated_at``.
        """
        scan_id = self._scan_id(scan_id)
        state = self._latest_reviews(scan_id)
        state["reviewed"] = state["reviewed"].astype(bool)
        return state.drop(columns="event_id").astype({"row": np.int64}).reset_index(drop=True)

    def history(self, row: int | None = None, scan_id: int | None = None) -> pd.DataFrame:
        """Every review event of a scan (or of one row), oldest first."""
        scan_id = self._scan_id(scan_id)
        query = ("SELECT event_id, row, reviewed, tags, note, source, created_at FROM reviews "
                 "WHERE scan_id = ?")
        args: tuple = (scan_id,)
        if row is not None:
            query += " AND row = ?"
            args += (int(row),)
        with self._lock:
            events = pd.read_sql_query(query + " ORDER BY event_id", self._conn, params=args)
        events["reviewed"] = events["reviewed"].astype(bool)
        return events

    # -- names -----------------------------------------------------------------------------

    def set_name(self, slice_id: str, name: str, *, source: str = "python",
                 scan_id: int | None = None) -> int | None:
        """Name a slice (the category it stands for); an empty name clears it. Returns the event id.

        The name is checked first (`check_name`); nothing is written when it is refused.
        """
        scan_id = self._scan_id(scan_id)
        name = self.check_name(slice_id, name, scan_id=scan_id)
        with self._transaction() as conn:
            old = conn.execute("SELECT name FROM names WHERE scan_id = ? AND slice_id = ? "
                               "ORDER BY event_id DESC LIMIT 1", (scan_id, slice_id)).fetchone()
            if (old[0] if old else "") == name:
                return None
            cursor = conn.execute("INSERT INTO names (scan_id, slice_id, name, source, created_at) "
                                  "VALUES (?, ?, ?, ?, ?)", (scan_id, slice_id, name, source, now()))
            return int(cursor.lastrowid)

    def check_name(self, slice_id: str, name: str, *, scan_id: int | None = None) -> str:
        """The normalised name `set_name` would store, or a clear error (nothing is written).

        ``slice_id`` must be a slice of the scan; ``name`` a string, not the reserved
        ``(untagged)``; an empty name clears a name.
        """
        scan_id = self._scan_id(scan_id)
        with self._lock:
            ids = [r[0] for r in self._conn.execute(
                "SELECT slice_id FROM slice_rows WHERE scan_id = ?", (scan_id,))]
        if slice_id not in ids:
            msg = f"slice_id={slice_id!r} is not a slice of scan {scan_id}.{did_you_mean(slice_id, ids)}"
            raise SlicefindValueError(msg)
        if not isinstance(name, str):
            raise SlicefindTypeError(f"name must be a string; got {type(name).__name__}.")
        name = normalize_tag(name)
        if name == UNTAGGED:
            raise SlicefindValueError(f"the name {UNTAGGED!r} (for {slice_id}) is reserved for reviewed "
                                      "rows without tags; choose another name.")
        return name

    def names(self, scan_id: int | None = None) -> dict[str, str]:
        """slice_id -> its latest (non-empty) name."""
        scan_id = self._scan_id(scan_id)
        with self._lock:
            rows = self._conn.execute(
                "SELECT n.slice_id, n.name FROM names n JOIN (SELECT slice_id, MAX(event_id) AS e "
                "FROM names WHERE scan_id = ? GROUP BY slice_id) m ON n.event_id = m.e "
                "ORDER BY n.slice_id", (scan_id,)).fetchall()
        return {sid: name for sid, name in rows if name}

    # -- tally -----------------------------------------------------------------------------

    def tally(self, *, names: Mapping[str, str] | None = None, threshold: float = 0.5,
              confidence_level: float = 0.95, scan_id: int | None = None,
              reviews: pd.DataFrame | None = None) -> Tally:
        """`tally` of the stored queue with the stored reviews and names (``names`` override).

        ``reviews`` (e.g. from `preview_import`) replaces the stored reviews for this call.
        """
        scan_id = self._scan_id(scan_id)
        queue = self.load_queue(scan_id)
        candidates = set(queue.strata["stratum"]) - {REST}
        merged = {sid: nm for sid, nm in self.names(scan_id).items() if sid in candidates}
        merged.update(names or {})
        state = self.reviews(scan_id) if reviews is None else reviews
        inside = state["row"].isin(queue.table["row"])
        if not inside.all():
            msg = (f"{int((~inside).sum())} reviewed rows of scan {scan_id} are not in its current "
                   "queue (it was replaced) and are left out of the tally; they stay in history(). "
                   "Extend the queue instead of replacing it to keep them in.")
            warnings.warn(msg, stacklevel=2)
        state = state[inside]
        return tally(queue, state[["row", "reviewed", "tags", "note"]], names=merged,
                     threshold=threshold, confidence_level=confidence_level, trust_order=True)
