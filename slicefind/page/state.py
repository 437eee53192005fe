"""What the review page reads: the scan, the queue, descriptions, rows and the live tally."""
from __future__ import annotations

import hashlib
import json
import os
import threading
import warnings
from typing import Any, Iterable, Mapping

import numpy as np
import pandas as pd

from slicefind.exceptions import SlicefindValueError
from slicefind.page.common import CATEGORIES_ARTIFACT, check_images, ink_range, records, tags_list
from slicefind.page.rows import PageRows
from slicefind.review.tally import WRONG_LABEL, normalize_tag
from slicefind.values import json_scalar


class PageState(PageRows):
    """What the review page reads: the scan, the queue, descriptions, rows and the live tally."""

    def _load(self, images, image_column, text_column, image_folders, data_folder) -> None:
        """Read the scan, queue and artifacts; check the display options against them."""
        self.lock = threading.RLock()               # serialises writes (read-modify-write of a row)
        self._cache_lock = threading.Lock()         # one tally / layout computed at a time
        self._tally_cache: tuple[str, dict] | None = None     # (version, tally JSON)
        self._layout_cache: tuple[Any, tuple[list, list]] | None = None   # (queue, layout)
        self.found = self.ws.load_found()
        self.scan_id = int(self.found.extras["scan_id"])  # the page reviews this scan, even if a newer one comes
        self.queue = self.ws.load_queue(self.scan_id)   # raises, with advice, when there is none
        report = self._artifact("report", {}) or {}
        if not isinstance(report, Mapping):
            report = {}
        table = self.found.eval_table
        columns = set(map(str, table.data.columns))
        self.image_column = image_column if image_column is not None else report.get("image_column")
        self.text_column = text_column if text_column is not None else report.get("text_column")
        for name, column in (("image_column", self.image_column), ("text_column", self.text_column)):
            if column is not None and column not in columns:
                msg = (f"{name}={column!r} is not a column the scan stored (stored: "
                       f"{sorted(columns)}); store it with save_scan(show=...).")
                raise SlicefindValueError(msg)
        if images is None and report.get("images"):
            images = str(report["images"])
            if not os.path.isfile(images):
                warnings.warn(f"the scan's pixel arrays {images!r} are gone, so the page shows no "
                              "thumbnails; pass images= (slicefind review --images FILE.npy) to show "
                              "them.", stacklevel=3)
                images = None
        self.images = check_images(images, table.n_input_rows)
        self.ink = ink_range(self.images) if self.images is not None else (0.0, 1.0)
        folder = data_folder if data_folder is not None else report.get("data_folder")
        self.data_folder = os.path.realpath(folder) if folder else os.path.realpath(self.ws.path)
        roots = [self.ws.path, self.data_folder, *map(os.fspath, image_folders)]
        self.roots = tuple(dict.fromkeys(os.path.realpath(r) for r in roots))
        self._by_position = pd.Series(np.arange(len(table.positions)), index=table.positions)
        self._descriptions = self._describe()

    def _artifact(self, name: str, default):
        """An artifact of the page's scan, or `default`."""
        return self.ws.load_artifact(name, default=default, scan_id=self.scan_id)

    def _stored_categories(self) -> list[str]:
        stored = self._artifact(CATEGORIES_ARTIFACT, None) or []
        return [normalize_tag(c) for c in stored if isinstance(c, str) and normalize_tag(c)]

    def _store_categories(self, categories: list[str]) -> None:
        self.ws.save_artifact(CATEGORIES_ARTIFACT, list(categories), scan_id=self.scan_id)

    def categories(self, reviews: pd.DataFrame, names: Mapping[str, str]) -> list[str]:
        """The stored list, then tags in use and candidate names not on it (alphabetically).

        `WRONG_LABEL` is left out: the page gives it a button (and a key) of its own.
        """
        listed = self._stored_categories()
        used = {t for text in reviews["tags"] for t in tags_list(text)} | set(names.values())
        return [c for c in listed + sorted(used - set(listed)) if c != WRONG_LABEL]

    def _remember(self, tags: Iterable[str]) -> None:
        """Append new category names to the stored list."""
        listed = self._stored_categories()
        new = [t for t in tags if t and t not in listed]
        if new:
            self._store_categories(listed + list(dict.fromkeys(new)))

    def _current_queue(self):
        queue = self.ws.load_queue(self.scan_id)
        self.queue = queue
        return queue

    def tally(self, version: str | None = None) -> dict:
        """The live tally as JSON: categories, slices, summary, and any warning.

        Cached by `version` (read now when not given): requests at one version, such as
        many tabs loading at once, compute it once.
        """
        if version is None:
            version = self.version()
        with self._cache_lock:
            cached = self._tally_cache
            if cached is not None and cached[0] == version:
                return cached[1]
            out = self._compute_tally()
            self._tally_cache = (version, out)
            return out

    def _compute_tally(self) -> dict:
        """`Workspace.tally` of the page's scan as JSON, its warnings as notes."""
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            result = self.ws.tally(scan_id=self.scan_id)
        summary = {k: json_scalar(v) for k, v in result.summary.items()}
        notes = [str(w.message) for w in caught]
        latest = self._latest_scan()
        if latest != self.scan_id:
            notes.append(f"The workspace now holds a newer scan ({latest}); this page still reviews "
                         f"scan {self.scan_id}. Restart 'slicefind review' to review the new one.")
        return {"categories": records(result.categories), "slices": records(result.slices),
                "summary": summary, "warnings": notes}

    def _latest_scan(self) -> int:
        return int(self.ws.scans()["scan_id"].max())

    def _current(self) -> tuple[pd.DataFrame, dict, list[str], str]:
        """Reviews, names, categories and their version, read once."""
        reviews = self.ws.reviews(self.scan_id)
        names = self.ws.names(self.scan_id)
        categories = self.categories(reviews, names)
        digest = hashlib.sha256()
        digest.update(json.dumps([reviews["row"].tolist(), reviews["updated_at"].tolist(),
                                  reviews["tags"].tolist(), reviews["note"].tolist()]).encode())
        digest.update(json.dumps([sorted(names.items()), categories]).encode())
        queue = self._current_queue()
        digest.update(json.dumps([queue.table["row"].tolist(), queue.strata["stratum"].tolist(),
                                  self._latest_scan()]).encode())
        return reviews, names, categories, digest.hexdigest()[:16]

    def version(self) -> str:
        """Changes whenever reviews, notes, names, categories or the queue change (any tab)."""
        return self._current()[3]


