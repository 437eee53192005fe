"""The review page: a local web server that writes every tag to the workspace at once.

`make_server` opens a workspace (which must already hold a scan and a queue) and binds
a `http.server.ThreadingHTTPServer` to the loopback interface on a free port. Every
request must carry a random token as the first segment of its path
(``http://127.0.0.1:PORT/TOKEN/``); anything else is refused before it is read. The page
(HTML, CSS and JavaScript in ``slicefind/page/static``) talks to a small JSON API:

=======  ===================  ======================================================
GET      ``api/state``        the queue, its strata, reviews, names, categories, tally
GET      ``api/version``      a fingerprint of reviews, names and categories (polled)
GET      ``api/tally``        the live tally (`Workspace.tally`)
GET      ``api/export``       the review sheet (`Queue.to_csv`) with every review filled in
GET      ``img/ROW``          a thumbnail: a PNG of the row's pixel array, or its image file
POST     ``api/review``       ``{"row": 12, "toggle": "faded ink"}`` or ``{"row": 12,
                              "reviewed": true, "tags": ["a", "b"]}``, optional ``"note"``
POST     ``api/name``         ``{"slice_id": "R1", "name": "faded ink"}`` ("" clears it)
POST     ``api/category``     ``{"name": "torn label"}``; ``"remove": true`` drops an unused one
POST     ``api/import``       a filled-in sheet (``text/csv``), checked whole before anything is written
=======  ===================  ======================================================

Each write is one `Workspace.record_review` or `Workspace.set_name` call (one small
transaction): there is no save button and closing the tab loses nothing. A write answers
with the row's new state, the names, the categories and the version, not the tally: the
page reads ``api/tally`` once its writes have settled, so a burst of key presses costs
one tally. The tally and the page's fixed parts are cached until something changes. A
toggle is applied to the row's latest stored state under a lock, so two tabs toggling
different tags of one row both take effect; otherwise the latest write wins and the
workspace keeps the history.

Bad requests get a 4xx answer and change nothing. A write (any POST) is refused with 403
when its ``Sec-Fetch-Site`` header says ``cross-site`` or ``same-site`` or its ``Origin``
is not the page's own (``null`` included); requests without either header (scripts) are
taken. The JSON routes take only ``application/json`` and ``api/import`` only
``text/csv``, so a form on another site cannot write even with the token. JSON bodies
are bounded in size (`MAX_JSON_BYTES`) and nesting (`MAX_JSON_DEPTH`). When another
process holds the workspace's database past its retries the answer is 503 with
``Retry-After``, and the page keeps the change on screen so it can be sent again.
Images are served only by row number, from the pixel array given or from the path the
scan stored for that row, and only when the file lies inside the workspace, the data
folder or a folder passed in ``image_folders``.
"""
from __future__ import annotations

import hashlib
import http.server
import importlib.resources
import json
import os
import re
import secrets
import shutil
import socket
import struct
import sys
import tempfile
import threading
import urllib.parse
import warnings
import zlib
from dataclasses import dataclass, field
from typing import Any, Iterable, Mapping, Sequence

import numpy as np
import pandas as pd

from slicefind.discovery.describe import exemplars, label_column, prediction_column
from slicefind.exceptions import (SlicefindError, SlicefindTypeError, SlicefindValueError,
                                  WorkspaceBusyError)
from slicefind.review.queue import QUEUE_COLUMNS, REST
from slicefind.review.tally import UNTAGGED, WRONG_LABEL, normalize_tag
from slicefind.discovery.text import mark_terms
from slicefind.values import json_scalar
from slicefind.workspace import Workspace

__all__ = ["ReviewServer", "make_server", "serve", "MAX_JSON_BYTES", "MAX_JSON_DEPTH",
           "MAX_SHEET_BYTES", "MAX_TAG_LENGTH", "IMAGE_TYPES", "CATEGORIES_ARTIFACT", "SOURCE"]

#: largest JSON body a write may send
MAX_JSON_BYTES = 64 * 1024
#: deepest nesting of arrays and objects a JSON body may have (a write needs 2)
MAX_JSON_DEPTH = 32
#: largest review sheet the import accepts
MAX_SHEET_BYTES = 32 * 1024 * 1024
#: longest category name, candidate name or note accepted (characters)
MAX_TAG_LENGTH = 200
MAX_NOTE_LENGTH = 4000
#: file types served as thumbnails (SVG is left out: it can carry script)
IMAGE_TYPES = {".png": "image/png", ".jpg": "image/jpeg", ".jpeg": "image/jpeg",
               ".gif": "image/gif", ".webp": "image/webp", ".bmp": "image/bmp"}
#: the workspace artifact holding the page's category list, in the order it was built
CATEGORIES_ARTIFACT = "review_categories"
#: the ``source`` recorded with every event the page writes
SOURCE = "review-page"
_MAX_IMAGE_FILE_BYTES = 20 * 1024 * 1024
_DRAIN_LIMIT = 1024 * 1024               # an oversized body up to this is read and dropped
_STATIC = {"review.css": "text/css; charset=utf-8",
           "review.js": "text/javascript; charset=utf-8"}
_LOOPBACK = ("127.0.0.1", "localhost", "::1")
_REQUEST_QUEUE = 256                     # connections the kernel holds before the server accepts them
_BUSY_RETRY_S = 2                        # Retry-After of a 503 (workspace busy)
#: what a client that leaves early raises; answered by dropping the connection, quietly
_GONE = (BrokenPipeError, ConnectionResetError, ConnectionAbortedError, socket.timeout)
_JSON_TOKENS = re.compile(rb'[\[\]{}"\\]')
_N_EXEMPLARS = 6
#: distinctive terms marked in a candidate's texts
_N_TERMS = 8
#: characters of a row's text the page shows (the rest is cut, with "…")
MAX_TEXT_SHOWN = 4000
_SECURITY_HEADERS = {
    "Cache-Control": "no-store",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "X-Frame-Options": "DENY",
    "Content-Security-Policy": ("default-src 'none'; script-src 'self'; style-src 'self'; "
                                "img-src 'self' data:; connect-src 'self'; form-action 'none'; "
                                "frame-ancestors 'none'; base-uri 'none'"),
}


class _HTTPError(Exception):
    """An answer other than 200: status code and a message for the page."""

    def __init__(self, status: int, message: str, headers: Mapping[str, str] | None = None):
        super().__init__(message)
        self.status = status
        self.message = message
        self.headers = dict(headers or {})


# --- small pure helpers ---------------------------------------------------------------------


def _records(frame: pd.DataFrame) -> list[dict]:
    """Rows of a frame as JSON-ready dicts."""
    columns = [str(c) for c in frame.columns]
    return [{c: json_scalar(v) for c, v in zip(columns, values)}
            for values in frame.itertuples(index=False, name=None)]


def _tags_list(text: str) -> list[str]:
    """'a;b' -> ['a', 'b'] (empty text, no tags)."""
    return [t for t in str(text).split(";") if t]


def _png(pixels: np.ndarray, low: float, high: float) -> bytes:
    """A PNG of one pixel array: 2-D as grey ink (high values dark), (h, w, 3|4) as colour.

    Values are scaled from [low, high] to 0..255 unless the array is already uint8.
    """
    a = np.asarray(pixels)
    if a.dtype != np.uint8:
        a = np.nan_to_num(a.astype(np.float64), nan=low)
        span = high - low
        a = np.clip((a - low) / span, 0.0, 1.0) if span > 0 else np.zeros_like(a)
        a = np.round(a * 255).astype(np.uint8)
        if a.ndim == 2:
            a = 255 - a                                   # ink on paper, as in the report
    if a.ndim == 2:
        colour_type, channels = 0, 1
    else:
        channels = a.shape[2]
        colour_type = 2 if channels == 3 else 6
    h, w = a.shape[:2]
    a = np.ascontiguousarray(a.reshape(h, w * channels))
    raw = b"".join(b"\x00" + a[i].tobytes() for i in range(h))

    def chunk(kind: bytes, data: bytes) -> bytes:
        return (struct.pack(">I", len(data)) + kind + data
                + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))

    return (b"\x89PNG\r\n\x1a\n"
            + chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, colour_type, 0, 0, 0))
            + chunk(b"IDAT", zlib.compress(raw, 6)) + chunk(b"IEND", b""))


def _within(path: str, root: str) -> bool:
    """Whether real path `path` lies inside real folder `root`."""
    try:
        return os.path.commonpath([path, root]) == root
    except ValueError:                                     # different drives
        return False


def _check_images(images, n_input_rows: int):
    """Pixel arrays from a path to .npy or an array: (n, h, w) or (n, h, w, 3|4), n >= rows."""
    if images is None:
        return None
    if isinstance(images, (str, os.PathLike)):
        path = os.fspath(images)
        if not os.path.isfile(path):
            raise SlicefindValueError(f"images={path!r} is not a file; pass a .npy of pixel arrays.")
        try:
            images = np.load(path, mmap_mode="r", allow_pickle=False)
        except (ValueError, OSError) as exc:
            raise SlicefindValueError(f"images={path!r} is not a readable .npy file ({exc}).") from None
    if not isinstance(images, np.ndarray):
        raise SlicefindTypeError(f"images must be a path to a .npy file or a numpy array; got "
                                 f"{type(images).__name__}.")
    shape = images.shape
    colour = images.ndim == 4 and shape[3] in (3, 4)
    if not (images.ndim == 3 or colour) or images.dtype.kind not in "biuf":
        msg = (f"images must hold numeric pixel arrays shaped (n, height, width) or (n, height, "
               f"width, 3); got shape {shape} and dtype {images.dtype}.")
        raise SlicefindValueError(msg)
    if colour and images.dtype != np.uint8:
        raise SlicefindValueError(f"colour images must be uint8; got {images.dtype}.")
    if shape[0] < n_input_rows:
        msg = (f"images holds {shape[0]} arrays but the scan's data has {n_input_rows} rows; "
               "pass one array per row of the data, in the data's order.")
        raise SlicefindValueError(msg)
    return images


def _ink_range(images: np.ndarray) -> tuple[float, float]:
    """Low and high pixel values over (a sample of up to 4,000 of) the arrays."""
    if images.dtype == np.uint8:
        return 0.0, 255.0
    step = max(1, images.shape[0] // 4000)
    sample = np.asarray(images[::step], dtype=np.float64)
    finite = sample[np.isfinite(sample)]
    if finite.size == 0:
        return 0.0, 1.0
    return float(finite.min()), float(finite.max())


def _static(name: str) -> bytes:
    """The bytes of one file of the page, shipped inside the package."""
    return (importlib.resources.files("slicefind.page") / "static" / name).read_bytes()


def _nests_deeper(data: bytes, limit: int) -> bool:
    """Whether JSON text nests ``[``/``{`` more than `limit` deep (brackets in strings skipped).

    One pass over the brackets, quotes and backslashes, stopping at the first level past
    `limit`; a text with at most `limit` brackets is not scanned. Assumes nothing of the
    text's validity: whatever the parser accepts recurses no deeper than this counts.
    """
    if data.count(b"[") + data.count(b"{") <= limit:          # the usual body: no scan needed
        return False
    depth = 0
    in_string, escaped_at = False, -1
    for match in _JSON_TOKENS.finditer(data):
        at = match.start()
        if at == escaped_at:
            continue
        char = data[at]
        if in_string:
            if char == 0x5C:                                    # backslash: the next byte is escaped
                escaped_at = at + 1
            elif char == 0x22:
                in_string = False
        elif char == 0x22:
            in_string = True
        elif char in (0x5B, 0x7B):
            depth += 1
            if depth > limit:
                return True
        elif char in (0x5D, 0x7D):
            depth -= 1
    return False


# --- the application (no HTTP in here) ------------------------------------------------------


class _ReviewApp:
    """What the API does, on one open workspace; the request handler only translates."""

    def __init__(self, workspace, *, images=None, image_column=None, text_column=None,
                 image_folders: Sequence[str] = (), data_folder=None):
        self.ws = Workspace(workspace, create=False)
        try:
            self._load(images, image_column, text_column, image_folders, data_folder)
        except BaseException:
            self.ws.close()
            raise

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
        self.images = _check_images(images, table.n_input_rows)
        self.ink = _ink_range(self.images) if self.images is not None else (0.0, 1.0)
        folder = data_folder if data_folder is not None else report.get("data_folder")
        self.data_folder = os.path.realpath(folder) if folder else os.path.realpath(self.ws.path)
        roots = [self.ws.path, self.data_folder, *map(os.fspath, image_folders)]
        self.roots = tuple(dict.fromkeys(os.path.realpath(r) for r in roots))
        self._by_position = pd.Series(np.arange(len(table.positions)), index=table.positions)
        self._descriptions = self._describe()

    # -- workspace access ----------------------------------------------------------------

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
        used = {t for text in reviews["tags"] for t in _tags_list(text)} | set(names.values())
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

    # -- what the page shows ---------------------------------------------------------------

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
                picked = exemplars(table, rows, n_exemplars=_N_EXEMPLARS, random_state=0)
            stats = {f"slice_{k}": json_scalar(record.get(k)) for k in
                     ("n_rows", "error_rate", "ci_low", "ci_high")}
            found_terms = getattr(description, "terms", None)
            terms = ([str(t) for t in found_terms["term"].head(_N_TERMS)]
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
        return {"reviewed": bool(last["reviewed"]), "tags": _tags_list(last["tags"]),
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
        return {"categories": _records(result.categories), "slices": _records(result.slices),
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
            for line in _records(queue.table):
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
            for s in _records(queue.strata):
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
                item.update(reviewed=done[0], tags=_tags_list(done[1]), note=str(done[2]),
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

    # -- writes ----------------------------------------------------------------------------

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
            raise _HTTPError(400, f"{what} must be a string; got {json.dumps(value)[:80]}.")
        name = normalize_tag(value)
        if len(name) > MAX_TAG_LENGTH:
            raise _HTTPError(400, f"{what} is {len(name)} characters long; at most {MAX_TAG_LENGTH}.")
        if ";" in name:
            raise _HTTPError(400, f"{what} {name!r} holds ';', which separates tags on the sheet.")
        if name == UNTAGGED:
            raise _HTTPError(400, f"{what} {UNTAGGED!r} is reserved for reviewed rows without a tag.")
        return name

    def _queued_row(self, body: Mapping) -> int:
        row = body.get("row")
        if isinstance(row, bool) or not isinstance(row, int):
            raise _HTTPError(400, f"row must be an integer row number; got {json.dumps(row)[:80]}.")
        if row not in set(self._current_queue().table["row"].tolist()):
            raise _HTTPError(404, f"row {row} is not in the review queue.")
        return row

    def review(self, body: Mapping) -> dict:
        """Toggle one tag, or set a row's whole state; keeps what the body does not mention."""
        allowed = {"row", "toggle", "tags", "reviewed", "note"}
        unknown = sorted(set(body) - allowed)
        if unknown:
            raise _HTTPError(400, f"unknown fields {unknown}; a review takes {sorted(allowed)}.")
        row = self._queued_row(body)
        if "toggle" in body and "tags" in body:
            raise _HTTPError(400, "send either toggle (one tag) or tags (the whole list), not both.")
        toggle = self._category_name(body["toggle"], "toggle") if "toggle" in body else None
        if toggle == "":
            raise _HTTPError(400, "toggle must name a category; got an empty name.")
        tags = None
        if "tags" in body:
            if not isinstance(body["tags"], list):
                raise _HTTPError(400, "tags must be a list of category names.")
            tags = [self._category_name(t, "each tag") for t in body["tags"]]
            tags = [t for t in tags if t]
        reviewed = body.get("reviewed")
        if reviewed is not None and not isinstance(reviewed, bool):
            raise _HTTPError(400, f"reviewed must be true or false; got {json.dumps(reviewed)[:80]}.")
        note = body.get("note")
        if note is not None and not isinstance(note, str):
            raise _HTTPError(400, "note must be a string.")
        if note is not None and len(note) > MAX_NOTE_LENGTH:
            raise _HTTPError(400, f"note is {len(note)} characters long; at most {MAX_NOTE_LENGTH}.")
        if reviewed is False and (toggle is not None or tags):
            raise _HTTPError(400, "reviewed=false cannot carry tags; clear them or mark it reviewed.")
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
                raise _HTTPError(400, str(exc)) from None
            self._remember(sorted(current))
            return self._after_write(row)

    def name(self, body: Mapping) -> dict:
        """Name a queued candidate (its category); an empty name clears it."""
        unknown = sorted(set(body) - {"slice_id", "name"})
        if unknown:
            raise _HTTPError(400, f"unknown fields {unknown}; a name takes slice_id and name.")
        sid = body.get("slice_id")
        candidates = [s for s in self._current_queue().strata["stratum"] if s != REST]
        if not isinstance(sid, str) or sid not in candidates:
            raise _HTTPError(404, f"slice_id {json.dumps(sid)[:40]} is not a queued candidate; "
                                  f"candidates: {candidates}.")
        name = self._category_name(body.get("name"), "name")
        with self.lock:
            try:
                self.ws.set_name(sid, name, source=SOURCE, scan_id=self.scan_id)
            except WorkspaceBusyError:
                raise
            except SlicefindError as exc:
                raise _HTTPError(400, str(exc)) from None
            return self._after_write()

    def category(self, body: Mapping) -> dict:
        """Add a category to the list (it may stay unused), or remove an unused one."""
        unknown = sorted(set(body) - {"name", "remove"})
        if unknown:
            raise _HTTPError(400, f"unknown fields {unknown}; a category takes name (and remove).")
        name = self._category_name(body.get("name"), "name")
        if not name:
            raise _HTTPError(400, "name must not be empty.")
        if name == WRONG_LABEL:
            raise _HTTPError(400, f"name {WRONG_LABEL!r} is reserved for rows whose dev-set label is "
                                  "wrong; use its own button (key w) on an example.")
        remove = body.get("remove", False)
        if not isinstance(remove, bool):
            raise _HTTPError(400, "remove must be true or false.")
        with self.lock:
            listed = self._stored_categories()
            if remove:
                reviews = self.ws.reviews(self.scan_id)
                in_use = any(name in _tags_list(t) for t in reviews["tags"])
                if in_use or name in self.ws.names(self.scan_id).values():
                    raise _HTTPError(409, f"category {name!r} is in use; untag its rows (or rename "
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
                    raise _HTTPError(400, message) from None
                reviews = self.ws.reviews(self.scan_id)
                self._remember(t for text in reviews["tags"] for t in _tags_list(text))
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
            raise _HTTPError(404, "no such image.")
        row = int(row_text)
        if self.images is not None:
            if row >= self.images.shape[0]:
                raise _HTTPError(404, f"row {row} has no pixel array.")
            return _png(self.images[row], *self.ink), "image/png"
        if not self.image_column:
            raise _HTTPError(404, "this review has no images.")
        at = self._by_position.get(row)
        value = None if at is None else self.found.eval_table.data[self.image_column].iat[int(at)]
        if not isinstance(value, str) or not value:
            raise _HTTPError(404, f"row {row} has no image path.")
        path = value if os.path.isabs(value) else os.path.join(self.data_folder, value)
        real = os.path.realpath(path)
        if not any(_within(real, root) for root in self.roots):
            raise _HTTPError(403, f"the image of row {row} lies outside the workspace and the image "
                                  "folders; pass its folder in image_folders to show it.")
        kind = IMAGE_TYPES.get(os.path.splitext(real)[1].lower())
        if kind is None:
            raise _HTTPError(415, f"the image of row {row} is not one of {sorted(IMAGE_TYPES)}.")
        try:
            if os.path.getsize(real) > _MAX_IMAGE_FILE_BYTES:
                raise _HTTPError(413, f"the image of row {row} is larger than 20 MB.")
            with open(real, "rb") as handle:
                return handle.read(), kind
        except OSError:
            raise _HTTPError(404, f"the image of row {row} cannot be read.") from None

    def close(self) -> None:
        self.ws.close()


# --- HTTP ----------------------------------------------------------------------------------


class _Handler(http.server.BaseHTTPRequestHandler):
    """Checks the host, token and (for writes) origin, routes, and turns errors into answers."""

    server_version = "slicefind-review"
    sys_version = ""
    protocol_version = "HTTP/1.1"
    timeout = 30
    # headers and body go out as two writes: without this, Nagle's algorithm holds the body
    # until the client's delayed ACK (about 40 ms on every answer of a keep-alive connection)
    disable_nagle_algorithm = True

    # set on a subclass per server
    app: _ReviewApp
    token: str
    hosts: frozenset                 # accepted Host headers, "127.0.0.1:PORT" ...
    origins: frozenset               # accepted Origin headers, "http://127.0.0.1:PORT" ...
    quiet: bool = True

    def log_message(self, format, *args):            # noqa: A002 (the stdlib's name)
        if not self.quiet:
            sys.stderr.write("review: " + (format % args).replace(self.token, "TOKEN") + "\n")

    # -- answering -------------------------------------------------------------------------

    def _send(self, status: int, body: bytes, kind: str, headers: Mapping[str, str] = ()):
        self.send_response(status)
        self.send_header("Content-Type", kind)
        self.send_header("Content-Length", str(len(body)))
        for key, value in {**_SECURITY_HEADERS, **dict(headers)}.items():
            self.send_header(key, value)
        if self.close_connection:
            self.send_header("Connection", "close")
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(body)

    def _json(self, status: int, payload, headers: Mapping[str, str] = ()):
        body = json.dumps(payload, allow_nan=False, default=json_scalar).encode("utf-8")
        self._send(status, body, "application/json; charset=utf-8", headers)

    def _fail(self, exc: _HTTPError):
        self._json(exc.status, {"error": exc.message, "status": exc.status}, exc.headers)

    def _route(self) -> list[str]:
        """The path segments after the token; raises 403 for a wrong host or token."""
        host = (self.headers.get("Host") or "").lower()
        if host not in self.hosts:
            raise _HTTPError(403, "unexpected Host header; open the URL the server printed.")
        split = urllib.parse.urlsplit(self.path)
        parts = split.path.split("/")
        if len(parts) < 2 or not secrets.compare_digest(parts[1].encode("utf-8", "replace"),
                                                        self.token.encode("ascii")):
            raise _HTTPError(403, "missing or wrong token; open the URL the server printed.")
        if any(p in ("..", ".") or "\\" in p or "%" in p for p in parts[2:]):
            raise _HTTPError(404, "no such page.")
        return parts[2:]

    def _check_origin(self) -> None:
        """Refuse (403) a write another site's page sent: by Sec-Fetch-Site, or a foreign Origin.

        A request with neither header (a script, curl) passes. The body is drained first
        so the connection stays usable.
        """
        site = (self.headers.get("Sec-Fetch-Site") or "").strip().lower()
        foreign = [o for o in self.headers.get_all("Origin", ())
                   if o.strip().lower() not in self.origins]
        if site in ("cross-site", "same-site"):
            why = f"Sec-Fetch-Site is {site!r}"
        elif foreign:
            why = f"Origin {foreign[0][:100]!r} is not this server's"
        else:
            return
        self._drain()
        raise _HTTPError(403, f"write refused: {why}; only the review page itself (open the URL "
                              "the server printed) or a script without an Origin header may write.")

    def _kind(self) -> str:
        """The media type of the body, lower case, parameters dropped."""
        return (self.headers.get("Content-Type") or "").split(";")[0].strip().lower()

    def _require_kind(self, kind: str, what: str) -> None:
        """Refuse (415) a body of another media type, draining it; forms cannot send `kind`."""
        if self._kind() != kind:
            self._drain()
            sent = self.headers.get("Content-Type")
            got = repr(sent[:100]) if sent else "no Content-Type"
            raise _HTTPError(415, f"send {what} as Content-Type {kind}; got {got}.")

    def _drain(self) -> None:
        """Read and drop a refused request's body (up to 1 MB) so the connection stays usable.

        A body that cannot be drained (chunked, unsized, larger) closes the connection.
        """
        length = self.headers.get("Content-Length")
        if (self.headers.get("Transfer-Encoding") or length is None or not length.isdigit()
                or int(length) > _DRAIN_LIMIT):
            self.close_connection = True
            return
        self.rfile.read(int(length))
        self._consumed = True

    def _body(self, limit: int) -> bytes:
        if self.headers.get("Transfer-Encoding"):
            self.close_connection = True
            raise _HTTPError(411, "send the body with a Content-Length, not chunked.")
        length = self.headers.get("Content-Length")
        if length is None or not length.isdigit():
            self.close_connection = True
            raise _HTTPError(411, "a Content-Length header is required.")
        length = int(length)
        if length > limit:
            if length <= _DRAIN_LIMIT:
                self.rfile.read(length)
            self.close_connection = True
            raise _HTTPError(413, f"the body is {length} bytes; at most {limit} are accepted here.")
        data = self.rfile.read(length)
        self._consumed = True
        return data

    def _json_body(self) -> dict:
        self._require_kind("application/json", "the body")
        data = self._body(MAX_JSON_BYTES)
        if _nests_deeper(data, MAX_JSON_DEPTH):
            raise _HTTPError(400, f"the body nests arrays or objects more than {MAX_JSON_DEPTH} "
                                  "levels deep; a write is one flat JSON object.")
        try:
            body = json.loads(data.decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise _HTTPError(400, f"the body is not valid JSON ({exc}).") from None
        except RecursionError:                          # cannot pass the depth check; kept as a guard
            raise _HTTPError(400, "the body nests arrays or objects too deep.") from None
        if not isinstance(body, dict):
            raise _HTTPError(400, "the body must be a JSON object.")
        return body

    def _refuse(self, exc: _HTTPError) -> None:
        if self.command not in ("GET", "HEAD") and not self._consumed:
            self.close_connection = True              # an unread body would poison the next request
        self._fail(exc)

    def _guarded(self, action):
        """Run `action`; answer its refusals, a busy workspace (503) and bugs (500).

        A client that went away (broken pipe, reset, timeout), even while an error is
        being answered, only closes the connection: nothing is printed.
        """
        self._consumed = False
        try:
            try:
                action()
            except _GONE:
                raise
            except WorkspaceBusyError as exc:
                self._refuse(_HTTPError(503, str(exc), {"Retry-After": str(_BUSY_RETRY_S)}))
            except (_HTTPError, SlicefindError) as exc:
                self._refuse(exc if isinstance(exc, _HTTPError) else _HTTPError(400, str(exc)))
            except Exception as exc:                      # a bug: say so, keep serving
                if self.command not in ("GET", "HEAD") and not self._consumed:
                    self.close_connection = True
                self._json(500, {"error": f"internal error: {type(exc).__name__}: {exc}", "status": 500})
        except _GONE:
            self.close_connection = True

    # -- methods ---------------------------------------------------------------------------

    def do_GET(self):
        self._guarded(self._get)

    def do_HEAD(self):
        self._guarded(self._get)

    def do_POST(self):
        self._guarded(self._post)

    def _not_allowed(self):
        def refuse():
            self._route()
            raise _HTTPError(405, f"{self.command} is not used here.", {"Allow": "GET, POST"})
        self._guarded(refuse)

    do_PUT = do_DELETE = do_PATCH = do_OPTIONS = _not_allowed

    def _get(self):
        parts = self._route()
        app = self.app
        if parts == []:
            raise _HTTPError(308, "the page lives at the token's folder.",
                             {"Location": f"/{self.token}/"})
        if parts == [""]:
            self._send(200, _static("index.html"), "text/html; charset=utf-8")
        elif len(parts) == 2 and parts[0] == "static" and parts[1] in _STATIC:
            self._send(200, _static(parts[1]), _STATIC[parts[1]])
        elif len(parts) == 2 and parts[0] == "img":
            data, kind = app.image(parts[1])
            self._send(200, data, kind)
        elif parts == ["api", "state"]:
            self._json(200, app.state())
        elif parts == ["api", "tally"]:
            self._json(200, app.tally())
        elif parts == ["api", "version"]:
            self._json(200, {"version": app.version()})
        elif parts == ["api", "export"]:
            self._send(200, app.export_sheet(), "text/csv; charset=utf-8",
                       {"Content-Disposition": 'attachment; filename="queue-reviewed.csv"'})
        elif parts and parts[0] == "api" and len(parts) == 2 and parts[1] in (
                "review", "name", "category", "import"):
            raise _HTTPError(405, f"api/{parts[1]} takes POST.", {"Allow": "POST"})
        else:
            raise _HTTPError(404, "no such page.")

    def _post(self):
        parts = self._route()
        self._check_origin()
        app = self.app
        if parts == ["api", "import"]:
            self._require_kind("text/csv", "the review sheet")
            data = self._body(MAX_SHEET_BYTES)
            name = urllib.parse.unquote(self.headers.get("X-Sheet-Name") or "sheet.csv")[:200]
            self._json(200, app.import_sheet(data, name))
            return
        routes = {"review": app.review, "name": app.name, "category": app.category}
        if len(parts) != 2 or parts[0] != "api" or parts[1] not in routes:
            self._body(MAX_JSON_BYTES)                    # read it so the connection stays usable
            raise _HTTPError(404, "no such API.")
        self._json(200, routes[parts[1]](self._json_body()))


class _Server(http.server.ThreadingHTTPServer):
    """One thread per connection; a deep listen queue; quiet about clients that left early."""

    daemon_threads = True
    allow_reuse_address = False
    request_queue_size = _REQUEST_QUEUE          # the listen backlog: many tabs or clients at once

    def handle_error(self, request, client_address):
        """Drop a connection the client closed or let time out; print other errors in one line."""
        exc = sys.exc_info()[1]
        if isinstance(exc, _GONE):
            return
        sys.stderr.write(f"review: error answering a request from {client_address[0]}: "
                         f"{type(exc).__name__}: {exc}\n")


def _family(host: str) -> int:
    return socket.AF_INET6 if ":" in host else socket.AF_INET


@dataclass(frozen=True, repr=False)
class ReviewServer:
    """A bound, not yet serving, review server (from `make_server`).

    Attributes
    ----------
    url : str
        ``http://127.0.0.1:PORT/TOKEN/``, the page.
    token : str
        The random token every request must carry.
    httpd : http.server.ThreadingHTTPServer
        The server; `serve_forever` or `start` serves it.
    """

    url: str
    token: str
    httpd: http.server.ThreadingHTTPServer
    _app: _ReviewApp
    _threads: list = field(default_factory=list)

    @property
    def workspace(self):
        """The open `Workspace` the server writes to."""
        return self._app.ws

    def serve_forever(self) -> None:
        """Serve until `close` (from another thread) or KeyboardInterrupt."""
        self.httpd.serve_forever(poll_interval=0.05)

    def start(self) -> "ReviewServer":
        """Serve in a background (daemon) thread; returns self."""
        thread = threading.Thread(target=self.serve_forever, name="slicefind-review", daemon=True)
        thread.start()
        self._threads.append(thread)
        return self

    def close(self) -> None:
        """Stop serving, release the port and close the workspace (every write is committed)."""
        if self._threads:
            self.httpd.shutdown()
            for thread in self._threads:
                thread.join(timeout=5)
        self.httpd.server_close()
        self._app.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def __repr__(self):
        return f"ReviewServer({self.url.replace(self.token, '…')!r})"


def make_server(workspace_path, *, host: str = "127.0.0.1", port: int = 0, images=None,
                image_column: str | None = None, text_column: str | None = None,
                image_folders: Sequence[str] = (), data_folder: str | None = None,
                token: str | None = None, quiet: bool = True) -> ReviewServer:
    """Bind the review server for a workspace on the loopback interface, without serving.

    Parameters
    ----------
    workspace_path : str or os.PathLike
        A workspace folder holding a scan and a queue.
    host : str, default="127.0.0.1"
        ``"127.0.0.1"``, ``"localhost"`` or ``"::1"``; the page is never served beyond
        this machine.
    port : int, default=0
        0 picks a free port.
    images : str, os.PathLike or ndarray, optional
        Pixel arrays, one per row of the scanned data, shaped (n, h, w) (grey; high values
        drawn dark, like ink) or (n, h, w, 3) uint8; a path to a ``.npy``. Default the
        workspace's ``report`` artifact's ``images``, when it has one.
    image_column, text_column : str, optional
        Stored columns (``save_scan(show=...)``) holding image paths or text to show;
        default those of the ``report`` artifact.
    image_folders : sequence of str, default=()
        Folders besides the workspace and the data folder that images may be read from.
    data_folder : str, optional
        The folder relative image paths start from; default the ``report`` artifact's,
        else the workspace.
    token : str, optional
        Default a fresh ``secrets.token_urlsafe(24)``.
    quiet : bool, default=True
        Leave requests unlogged (False logs them to stderr, the token masked).

    Returns
    -------
    ReviewServer
        With ``url``, ``token`` and ``httpd``; `ReviewServer.start` or `serve_forever`
        serves it and `ReviewServer.close` stops it.
    """
    if host not in _LOOPBACK:
        msg = (f"host={host!r} is not a loopback address; the review page is only served on "
               f"this machine ({', '.join(map(repr, _LOOPBACK))}).")
        raise SlicefindValueError(msg)
    if isinstance(port, bool) or not isinstance(port, int) or not 0 <= port <= 65535:
        raise SlicefindValueError(f"port must be an integer in 0..65535 (0 = any free port); got {port!r}.")
    if token is None:
        token = secrets.token_urlsafe(24)
    if not isinstance(token, str) or not re.fullmatch(r"[A-Za-z0-9_-]{16,}", token):
        raise SlicefindValueError("token must be at least 16 URL-safe characters (A-Z a-z 0-9 _ -).")
    if isinstance(image_folders, (str, os.PathLike)):
        image_folders = (image_folders,)
    app = _ReviewApp(workspace_path, images=images, image_column=image_column,
                     text_column=text_column, image_folders=tuple(image_folders),
                     data_folder=data_folder)
    bind = "127.0.0.1" if host == "localhost" else host
    server_class = type("_BoundServer", (_Server,), {"address_family": _family(bind)})
    try:
        handler = type("_BoundHandler", (_Handler,), {"app": app, "token": token, "quiet": quiet,
                                                     "hosts": frozenset(), "origins": frozenset()})
        httpd = server_class((bind, port), handler)
    except OSError as exc:
        app.close()
        raise SlicefindValueError(f"cannot listen on {bind}:{port} ({exc}); try port=0.") from None
    bound = httpd.server_address[1]
    handler.hosts = frozenset({f"127.0.0.1:{bound}", f"localhost:{bound}", f"[::1]:{bound}"})
    handler.origins = frozenset(f"http://{h}" for h in handler.hosts)
    shown = f"[{bind}]" if ":" in bind else bind
    return ReviewServer(url=f"http://{shown}:{bound}/{token}/", token=token, httpd=httpd, _app=app)


def serve(workspace_path, *, host: str = "127.0.0.1", port: int = 0, open_browser: bool = False,
          images=None, **options) -> None:
    """Serve the review page until Ctrl+C; prints the URL (with its token).

    Parameters are those of `make_server`; ``open_browser=True`` also opens the page in
    the default browser.
    """
    server = make_server(workspace_path, host=host, port=port, images=images, **options)
    print(f"review page for {os.path.abspath(os.fspath(workspace_path))}:\n  {server.url}\n"
          "every click is saved to the workspace at once; Ctrl+C stops the server.", flush=True)
    if open_browser:
        import webbrowser
        webbrowser.open(server.url)
    try:
        server.serve_forever()
    except KeyboardInterrupt:
        print("\nstopped; every review was already saved.", flush=True)
    finally:
        server.close()
