"""The rows the review page shows: candidates' descriptions and exemplars, queued rows, the whole state."""
from __future__ import annotations

import os
from typing import Any, Mapping, Sequence

import pandas as pd

from slicefind.discovery.describe import exemplars, label_column, prediction_column
from slicefind.discovery.text import mark_terms
from slicefind.page.common import MAX_TEXT_SHOWN, N_EXEMPLARS, N_TERMS, SOURCE, records, tags_list
from slicefind.review.queue import QUEUE_COLUMNS, REST
from slicefind.review.tally import UNTAGGED, WRONG_LABEL
from slicefind.values import json_scalar


class PageRows:
    """The rows the review page shows: candidates' descriptions and exemplars, queued rows, the whole state."""

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
