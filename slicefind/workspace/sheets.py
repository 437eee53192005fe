"""Importing a filled review sheet: all of it in one transaction, or none."""
from __future__ import annotations

import os

import numpy as np
import pandas as pd

from slicefind.exceptions import SlicefindValueError
from slicefind.review.tally import read_reviews
from slicefind.workspace.stamps import now


class SheetImport:
    """Importing a filled review sheet: all of it in one transaction, or none."""

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
