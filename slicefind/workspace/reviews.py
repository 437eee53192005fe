"""Review events: one row's reviews, their history and the latest state of every row."""
from __future__ import annotations

from typing import Iterable

import numpy as np
import pandas as pd

from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.review.tally import normalize_tag
from slicefind.workspace.stamps import now


class ReviewStore:
    """Review events: one row's reviews, their history and the latest state of every row."""

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
