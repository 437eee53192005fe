"""Things derived from a scan (a map, descriptions, report settings), stored without pickle."""
from __future__ import annotations

import io
import json

import numpy as np

from slicefind.exceptions import SlicefindValueError
from slicefind.workspace.blobs import decode_tree, encode_tree
from slicefind.workspace.stamps import now


class ArtifactStore:
    """Things derived from a scan (a map, descriptions, report settings), stored without pickle."""

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
