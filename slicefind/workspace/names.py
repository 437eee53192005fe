"""Candidate names, and the tally of the stored reviews under them."""
from __future__ import annotations

import warnings
from typing import Mapping

import pandas as pd

from slicefind.exceptions import SlicefindTypeError, SlicefindValueError, did_you_mean
from slicefind.review.queue import REST
from slicefind.review.tally import Tally, UNTAGGED, normalize_tag, tally
from slicefind.workspace.stamps import now


class NameStore:
    """Candidate names, and the tally of the stored reviews under them."""

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
