"""Storing scans: their parameters, slice tables, rows and per-row arrays."""
from __future__ import annotations

import json
from typing import Sequence

import numpy as np
import pandas as pd

from slicefind.discovery.find import FoundSlices
from slicefind.discovery.table import EvalTable
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError, did_you_mean
from slicefind.workspace.blobs import (blob_rows, json_default, pack, pack_frame, rows_blob,
                                       unpack, unpack_frame)
from slicefind.workspace.stamps import data_fingerprint as fingerprint_of, library_version, now


class ScanStore:
    """Storing scans: their parameters, slice tables, rows and per-row arrays."""

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
        fingerprint = data_fingerprint if data_fingerprint is not None else fingerprint_of(table.data)
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
