"""What the review page reads: the scan, the queue, descriptions, rows and the live tally."""
from __future__ import annotations

import hashlib
import json
import os
import threading
import warnings
from typing import Any, Iterable, Mapping, Sequence

import numpy as np
import pandas as pd

from slicefind.discovery.describe import exemplars, label_column, prediction_column
from slicefind.discovery.text import mark_terms
from slicefind.exceptions import SlicefindValueError
from slicefind.page.common import (CATEGORIES_ARTIFACT, MAX_TEXT_SHOWN, N_EXEMPLARS, N_TERMS,
                                   SOURCE, check_images, ink_range, records, tags_list)
from slicefind.review.queue import QUEUE_COLUMNS, REST
from slicefind.review.tally import UNTAGGED, WRONG_LABEL, normalize_tag
from slicefind.values import json_scalar


class PageState:
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

    def _describe(self) -> dict[str, dict]:
        """Per queued candidate: summary, slice statistics and exemplar rows."""
        stored = self._artifact("descriptions", {}) or {}
        table = self.found.eval_table
        by_id = self.found.table.set_index("slice_id")
        out = {}
        for sid in self.queue.strata["stratum"]:
            if sid == REST or sid not in by_id.index:
                continue
            record = by_id.loc[sid]
            description = stored.get(sid) if isinstance(stored, Mapping) else None   # SliceDescription
            summary = str(getattr(description, "summary", "") or "")
            own = f"{record['description']}: "
            if summary.startswith(own):               # a rule's summary repeats the rule
                summary = summary[len(own):]
            summary = summary.rpartition("; ")[0]     # size and error rate are shown beside it
            picked = getattr(description, "exemplars", None)
            if not isinstance(picked, pd.DataFrame) or "row" not in picked.columns:
                rows = self._by_position.loc[self.found.rows(sid)].to_numpy()
                picked = exemplars(table, rows, n_exemplars=N_EXEMPLARS, random_state=0)
            stats = {f"slice_{k}": json_scalar(record.get(k)) for k in
                     ("n_rows", "error_rate", "ci_low", "ci_high")}
            found_terms = getattr(description, "terms", None)
            terms = ([str(t) for t in found_terms["term"].head(N_TERMS)]
                     if isinstance(found_terms, pd.DataFrame) and "term" in found_terms.columns else [])
            out[sid] = {"summary": summary, **stats, "terms": terms,
                        "exemplars": [self._example(int(r), terms) | {"kind": json_scalar(k), "error": json_scalar(e)}
                                      for r, k, e in zip(picked["row"],
                                                         picked.get("kind", ["random"] * len(picked)),
                                                         picked.get("error", [None] * len(picked)))]}
        return out

    def _example(self, row: int, terms: Sequence[str] = ()) -> dict:
        """What any row shows: id, label, prediction, text, and whether it has a thumbnail.

        With `terms`, ``text_parts`` cuts the text into ``[marked, piece]`` pairs
        (`slicefind.discovery.text.mark_terms`) that the page inserts as text, never as HTML.
        """
        table = self.found.eval_table
        at = self._by_position.get(row)
        info: dict[str, Any] = {"row": row}
        if at is None:
            return info | {"has_image": False}
        at = int(at)
        if table.id_column:
            info["id"] = json_scalar(table.data[table.id_column].iat[at])
        if table.label is not None:
            info["label"] = json_scalar(table.label[at])
        if table.prediction is not None:
            info["prediction"] = json_scalar(table.prediction[at])
        if self.text_column:
            info["text"] = json_scalar(table.data[self.text_column].iat[at])
            if terms and isinstance(info["text"], str):
                info["text_parts"] = [[m, p] for m, p in mark_terms(info["text"], terms, limit=MAX_TEXT_SHOWN)]
        info["has_image"] = self._has_image(row)
        return info

    def _has_image(self, row: int) -> bool:
        if self.images is not None:
            return 0 <= row < self.images.shape[0]
        if self.image_column:
            at = self._by_position.get(row)
            value = None if at is None else self.found.eval_table.data[self.image_column].iat[int(at)]
            return isinstance(value, str) and bool(value)
        return False

    def _row_state(self, row: int) -> dict:
        history = self.ws.history(row, scan_id=self.scan_id)
        if len(history) == 0:
            return {"reviewed": False, "tags": [], "note": "", "updated_at": None, "source": None}
        last = history.iloc[-1]
        return {"reviewed": bool(last["reviewed"]), "tags": tags_list(last["tags"]),
                "note": str(last["note"]), "updated_at": str(last["created_at"]),
                "source": str(last["source"])}

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

    def _layout(self, queue) -> tuple[list[dict], list[dict]]:
        """The parts of the page that change only with the queue: rows and strata, unreviewed.

        Cached for the queue object `Workspace.load_queue` returns (the same object until
        another queue is saved). Callers copy the dicts before adding to them.
        """
        with self._cache_lock:
            cached = self._layout_cache
            if cached is not None and cached[0] is queue:
                return cached[1]
            extra = [c for c in queue.table.columns if c not in QUEUE_COLUMNS]
            rows = []
            for line in records(queue.table):
                row = int(line["row"])
                info = self._example(row, self._descriptions.get(line["stratum"], {}).get("terms", ()))
                item = {"position": line["position"], "stratum": line["stratum"], "row": row,
                        "id": line.get("id"), "label": line.get("label"),
                        "prediction": line.get("prediction"),
                        "meta": {c: line[c] for c in extra
                                 if c not in (self.text_column, self.image_column)},
                        "text": info.get("text"), "text_parts": info.get("text_parts"),
                        "has_image": info["has_image"]}
                if self.image_column:
                    item["image_path"] = line.get(self.image_column)
                rows.append(item)
            strata = []
            for s in records(queue.strata):
                s.update(self._descriptions.get(s["stratum"], {"summary": "", "exemplars": []}))
                strata.append(s)
            self._layout_cache = (queue, (rows, strata))
            return rows, strata

    def state(self) -> dict:
        """Everything the page needs to draw itself."""
        queue = self._current_queue()
        reviews, names, categories, version = self._current()
        fixed_rows, fixed_strata = self._layout(queue)
        latest = {int(r): (bool(d), t, n, u) for r, d, t, n, u in zip(
            reviews["row"], reviews["reviewed"], reviews["tags"], reviews["note"], reviews["updated_at"])}
        rows = []
        for fixed in fixed_rows:
            item = dict(fixed)
            done = latest.get(item["row"])
            if done is None:
                item.update(reviewed=False, tags=[], note="", updated_at=None)
            else:
                item.update(reviewed=done[0], tags=tags_list(done[1]), note=str(done[2]),
                            updated_at=str(done[3]))
            rows.append(item)
        strata = [{**s, "name": names.get(s["stratum"], "") if s["stratum"] != REST else ""}
                  for s in fixed_strata]
        return {"workspace": os.path.abspath(self.ws.path), "rows": rows, "strata": strata,
                "names": names, "categories": categories,
                "reserved": UNTAGGED, "wrong_label": WRONG_LABEL, "tally": self.tally(version), "version": version,
                "n_rows": queue.n_rows, "n_errors": queue.n_errors,
                "error_rate": queue.error_rate, "source": SOURCE,
                "label_name": label_column(self.found.eval_table),
                "prediction_name": prediction_column(self.found.eval_table),
                "image_kind": ("pixels" if self.images is not None
                               else "files" if self.image_column else None)}
