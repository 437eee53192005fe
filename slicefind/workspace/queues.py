"""Storing review queues and reading them back."""
from __future__ import annotations

import json

import numpy as np

from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.review.queue import Queue, assemble_queue
from slicefind.workspace.blobs import (blob_rows, json_default, pack_frame, rows_blob, unpack,
                                       unpack_frame)
from slicefind.workspace.stamps import now


class QueueStore:
    """Storing review queues and reading them back."""

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
