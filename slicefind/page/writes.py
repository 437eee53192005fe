"""What the review page writes: reviews, names, categories, an imported sheet; and the files it serves."""
from __future__ import annotations

import json
import os
import re
import shutil
import tempfile
from typing import Mapping


from slicefind.exceptions import SlicefindError, WorkspaceBusyError
from slicefind.page.common import (HTTPError, IMAGE_TYPES, MAX_IMAGE_FILE_BYTES, MAX_NOTE_LENGTH,
                                   MAX_TAG_LENGTH, SOURCE, png_bytes, tags_list, within)
from slicefind.review.queue import REST
from slicefind.review.tally import UNTAGGED, WRONG_LABEL, normalize_tag


class PageWrites:
    """What the review page writes: reviews, names, categories, an imported sheet; and the files it serves."""

    def _after_write(self, row: int | None = None) -> dict:
        """What the page redraws after a write; the tally it reads from ``api/tally`` later."""
        _, names, categories, version = self._current()
        out = {"names": names, "categories": categories, "version": version}
        if row is not None:
            out["row"] = {"row": row, **self._row_state(row)}
        return out

    @staticmethod
    def _category_name(value, what: str) -> str:
        if not isinstance(value, str):
            raise HTTPError(400, f"{what} must be a string; got {json.dumps(value)[:80]}.")
        name = normalize_tag(value)
        if len(name) > MAX_TAG_LENGTH:
            raise HTTPError(400, f"{what} is {len(name)} characters long; at most {MAX_TAG_LENGTH}.")
        if ";" in name:
            raise HTTPError(400, f"{what} {name!r} holds ';', which separates tags on the sheet.")
        if name == UNTAGGED:
            raise HTTPError(400, f"{what} {UNTAGGED!r} is reserved for reviewed rows without a tag.")
        return name

    def _queued_row(self, body: Mapping) -> int:
        row = body.get("row")
        if isinstance(row, bool) or not isinstance(row, int):
            raise HTTPError(400, f"row must be an integer row number; got {json.dumps(row)[:80]}.")
        if row not in set(self._current_queue().table["row"].tolist()):
            raise HTTPError(404, f"row {row} is not in the review queue.")
        return row

    def review(self, body: Mapping) -> dict:
        """Toggle one tag, or set a row's whole state; keeps what the body does not mention."""
        allowed = {"row", "toggle", "tags", "reviewed", "note"}
        unknown = sorted(set(body) - allowed)
        if unknown:
            raise HTTPError(400, f"unknown fields {unknown}; a review takes {sorted(allowed)}.")
        row = self._queued_row(body)
        if "toggle" in body and "tags" in body:
            raise HTTPError(400, "send either toggle (one tag) or tags (the whole list), not both.")
        toggle = self._category_name(body["toggle"], "toggle") if "toggle" in body else None
        if toggle == "":
            raise HTTPError(400, "toggle must name a category; got an empty name.")
        tags = None
        if "tags" in body:
            if not isinstance(body["tags"], list):
                raise HTTPError(400, "tags must be a list of category names.")
            tags = [self._category_name(t, "each tag") for t in body["tags"]]
            tags = [t for t in tags if t]
        reviewed = body.get("reviewed")
        if reviewed is not None and not isinstance(reviewed, bool):
            raise HTTPError(400, f"reviewed must be true or false; got {json.dumps(reviewed)[:80]}.")
        note = body.get("note")
        if note is not None and not isinstance(note, str):
            raise HTTPError(400, "note must be a string.")
        if note is not None and len(note) > MAX_NOTE_LENGTH:
            raise HTTPError(400, f"note is {len(note)} characters long; at most {MAX_NOTE_LENGTH}.")
        if reviewed is False and (toggle is not None or tags):
            raise HTTPError(400, "reviewed=false cannot carry tags; clear them or mark it reviewed.")
        with self.lock:
            state = self._row_state(row)
            current = set(state["tags"])
            if toggle is not None:                  # a tag toggled on or off: the row is reviewed
                current ^= {toggle}
                new_reviewed = True
            elif tags is not None:
                current = set(tags)
                new_reviewed = True if reviewed is None else reviewed
            elif reviewed is False:                 # back to "not reviewed": tags go too
                current, new_reviewed = set(), False
            else:                                   # marked reviewed, or only the note changes
                new_reviewed = state["reviewed"] if reviewed is None else True
            new_note = state["note"] if note is None else note
            try:
                self.ws.record_review(row, reviewed=bool(new_reviewed), tags=sorted(current),
                                      note=new_note, source=SOURCE, scan_id=self.scan_id)
            except WorkspaceBusyError:
                raise
            except SlicefindError as exc:
                raise HTTPError(400, str(exc)) from None
            self._remember(sorted(current))
            return self._after_write(row)

    def name(self, body: Mapping) -> dict:
        """Name a queued candidate (its category); an empty name clears it."""
        unknown = sorted(set(body) - {"slice_id", "name"})
        if unknown:
            raise HTTPError(400, f"unknown fields {unknown}; a name takes slice_id and name.")
        sid = body.get("slice_id")
        candidates = [s for s in self._current_queue().strata["stratum"] if s != REST]
        if not isinstance(sid, str) or sid not in candidates:
            raise HTTPError(404, f"slice_id {json.dumps(sid)[:40]} is not a queued candidate; "
                                  f"candidates: {candidates}.")
        name = self._category_name(body.get("name"), "name")
        with self.lock:
            try:
                self.ws.set_name(sid, name, source=SOURCE, scan_id=self.scan_id)
            except WorkspaceBusyError:
                raise
            except SlicefindError as exc:
                raise HTTPError(400, str(exc)) from None
            return self._after_write()

    def category(self, body: Mapping) -> dict:
        """Add a category to the list (it may stay unused), or remove an unused one."""
        unknown = sorted(set(body) - {"name", "remove"})
        if unknown:
            raise HTTPError(400, f"unknown fields {unknown}; a category takes name (and remove).")
        name = self._category_name(body.get("name"), "name")
        if not name:
            raise HTTPError(400, "name must not be empty.")
        if name == WRONG_LABEL:
            raise HTTPError(400, f"name {WRONG_LABEL!r} is reserved for rows whose dev-set label is "
                                  "wrong; use its own button (key w) on an example.")
        remove = body.get("remove", False)
        if not isinstance(remove, bool):
            raise HTTPError(400, "remove must be true or false.")
        with self.lock:
            listed = self._stored_categories()
            if remove:
                reviews = self.ws.reviews(self.scan_id)
                in_use = any(name in tags_list(t) for t in reviews["tags"])
                if in_use or name in self.ws.names(self.scan_id).values():
                    raise HTTPError(409, f"category {name!r} is in use; untag its rows (or rename "
                                          "the candidate) before removing it.")
                if name in listed:
                    self._store_categories([c for c in listed if c != name])
            elif name not in listed:
                self._store_categories(listed + [name])
            return self._after_write()

    def import_sheet(self, data: bytes, filename: str) -> dict:
        """Import a filled-in sheet; on any problem nothing is written and the lines are listed.

        The upload is written to a temporary file for `Workspace.import_sheet`; messages
        name the uploaded file (`filename`) instead of that temporary path.
        """
        folder = tempfile.mkdtemp(prefix="slicefind-import-")
        try:
            path = os.path.join(folder, "sheet.csv")
            with open(path, "wb") as handle:
                handle.write(data)
            with self.lock:
                try:
                    counts = self.ws.import_sheet(path, source=f"{SOURCE}:import:{filename}",
                                                  scan_id=self.scan_id)
                except WorkspaceBusyError:
                    raise
                except SlicefindError as exc:
                    message = str(exc).replace(path, filename).replace(folder, "")
                    raise HTTPError(400, message) from None
                reviews = self.ws.reviews(self.scan_id)
                self._remember(t for text in reviews["tags"] for t in tags_list(text))
                out = self._after_write()
        finally:
            shutil.rmtree(folder, ignore_errors=True)
        return {"imported": {k: int(v) for k, v in counts.items()}, **out}

    def export_sheet(self) -> bytes:
        """The review sheet with every stored review filled in (UTF-8 with BOM)."""
        folder = tempfile.mkdtemp(prefix="slicefind-export-")
        try:
            path = os.path.join(folder, "queue.csv")
            with self.lock:
                queue = self._current_queue()
                reviews = self.ws.reviews(self.scan_id)
                reviews = reviews[reviews["row"].isin(queue.table["row"])]
                queue.to_csv(path, reviews=reviews, overwrite=True)
            with open(path, "rb") as handle:
                return handle.read()
        finally:
            shutil.rmtree(folder, ignore_errors=True)

    def image(self, row_text: str) -> tuple[bytes, str]:
        """The thumbnail of one row: (bytes, content type); 404/403 otherwise."""
        if not re.fullmatch(r"[0-9]{1,12}", row_text):
            raise HTTPError(404, "no such image.")
        row = int(row_text)
        if self.images is not None:
            if row >= self.images.shape[0]:
                raise HTTPError(404, f"row {row} has no pixel array.")
            return png_bytes(self.images[row], *self.ink), "image/png"
        if not self.image_column:
            raise HTTPError(404, "this review has no images.")
        at = self._by_position.get(row)
        value = None if at is None else self.found.eval_table.data[self.image_column].iat[int(at)]
        if not isinstance(value, str) or not value:
            raise HTTPError(404, f"row {row} has no image path.")
        path = value if os.path.isabs(value) else os.path.join(self.data_folder, value)
        real = os.path.realpath(path)
        if not any(within(real, root) for root in self.roots):
            raise HTTPError(403, f"the image of row {row} lies outside the workspace and the image "
                                  "folders; pass its folder in image_folders to show it.")
        kind = IMAGE_TYPES.get(os.path.splitext(real)[1].lower())
        if kind is None:
            raise HTTPError(415, f"the image of row {row} is not one of {sorted(IMAGE_TYPES)}.")
        try:
            if os.path.getsize(real) > MAX_IMAGE_FILE_BYTES:
                raise HTTPError(413, f"the image of row {row} is larger than 20 MB.")
            with open(real, "rb") as handle:
                return handle.read(), kind
        except OSError:
            raise HTTPError(404, f"the image of row {row} cannot be read.") from None
